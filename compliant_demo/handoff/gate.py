"""Which skill versions may be sent to hardware: only one with a ready verdict.

The decision is a pure function of the stored verdict for the skill version on the same plant
description and acceptance criteria (looked up by their digests), so it is tested without a
store; the replay node's hardware mode looks the verdict up and asks :func:`gate_decision`. A
bench-test override lets a skill without a ready verdict through only when it is set explicitly,
and the decision then says so, to be logged and stored with the run.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

__all__ = ["GateDecision", "VerdictLike", "gate_decision"]

_REASONS_SHOWN = 3


class VerdictLike(Protocol):
    """What the gate reads of a stored verdict: ``verdict`` ("ready" or "not_ready") and its
    ``reasons`` (mappings with at least ``check``; ``joint``, ``value``, ``threshold``, ``unit``
    where they apply)."""

    @property
    def verdict(self) -> str: ...

    @property
    def reasons(self) -> Sequence[Mapping[str, Any]]: ...


@dataclass(frozen=True)
class GateDecision:
    """``allowed`` to send or not, the one-line ``reason``, and whether the bench-test override
    let it through (``overridden``)."""

    allowed: bool
    reason: str
    overridden: bool = False

    def as_dict(self) -> dict[str, object]:
        """The decision as plain data (stored with the run)."""
        return {"allowed": self.allowed, "reason": self.reason, "overridden": self.overridden}


def gate_decision(verdict: VerdictLike | None, *, skill: str, bench_override: bool = False
                  ) -> GateDecision:
    """May ``skill`` (a label such as "cork_seat version 3") be sent to hardware?

    Parameters
    ----------
    verdict : the latest verdict of that skill version for the same plant and criteria digests,
        or None when there is none
    skill : str
        How the skill is named in the reason.
    bench_override : bool
        Let a skill without a ready verdict through for a bench test (the reason says so).
    """
    if verdict is not None and verdict.verdict == "ready":
        return GateDecision(True, f"{skill}: verdict ready for this plant and these criteria")
    if verdict is None:
        refusal = f"{skill}: no verdict for this plant description and these criteria"
    elif verdict.verdict == "not_ready":
        refusal = f"{skill}: verdict not_ready ({_reasons(verdict.reasons)})"
    else:
        refusal = f"{skill}: unknown verdict {str(verdict.verdict)[:40]!r}"
    if bench_override:
        return GateDecision(True, f"bench-test override: {refusal}", overridden=True)
    return GateDecision(False, f"refused, {refusal}; only a skill version with a ready verdict "
                               "may be sent to hardware")


def _reasons(reasons: Sequence[Mapping[str, Any]]) -> str:
    if not reasons:
        return "no reason given"
    shown = []
    for reason in list(reasons)[:_REASONS_SHOWN]:
        text = str(reason.get("check", "?"))
        if reason.get("joint") is not None:
            text += f" on {reason['joint']}"
        if reason.get("value") is not None and reason.get("threshold") is not None:
            text += f": {reason['value']} against {reason['threshold']} {reason.get('unit', '')}"
        shown.append(text.strip())
    more = len(reasons) - _REASONS_SHOWN
    return "; ".join(shown) + (f"; {more} more" if more > 0 else "")
