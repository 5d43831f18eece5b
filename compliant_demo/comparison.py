"""Skills side by side: the results of campaigns that replayed different skills (or versions) on
the same scenarios and seeds, summarised per skill and per perturbation kind.

:func:`summarise_side` reduces one campaign's stored results to counts and medians per kind;
:func:`comparison_rows` lays several sides out as one table, a row per kind and side, so that a
figure added to every side (a readiness verdict, say) is one more column of the sides' summary
rows and one more field of their JSON.
Medians are taken over the scenarios where a figure exists (recovery time: only where the
perturbation was recovered from; scenarios that never recovered are counted apart).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = [
    "COMPARED_METRICS",
    "ALL_KINDS",
    "COUNTS",
    "SideSummary",
    "summarise_side",
    "comparison_columns",
    "comparison_rows",
]

#: Scalar outcome metrics compared (median per kind) -> their column in the table, with unit.
COMPARED_METRICS: Mapping[str, str] = {
    "goal_error_max_rad": "goal_error_rad",
    "peak_deviation_max_rad": "peak_deviation_rad",
    "recovery_time_max_s": "recovery_s",
    "peak_interaction_torque_max_Nm": "interaction_Nm",
    "energy_injected_J": "energy_injected_J",
}

#: Count columns of the table, before the medians.
COUNTS: tuple[str, ...] = ("scenarios", "passed", "failed", "not_recovered")

#: The kind label of the row that sums every kind.
ALL_KINDS = "all"


@dataclass(frozen=True)
class SideSummary:
    """One skill's campaign, reduced.

    Attributes
    ----------
    label : how the side is named in the table (``NAME:VERSION``)
    skill_id, campaign_id : ids in the store
    per_kind : kind -> {"scenarios", "passed", "failed", "not_recovered", and the median of
        every metric named in :data:`COMPARED_METRICS` (None where no scenario has it)}; the kind
        :data:`ALL_KINDS` holds all scenarios
    extra : further per-side figures shown as rows of their own (e.g. a verdict)
    """

    label: str
    skill_id: str
    campaign_id: str
    per_kind: dict[str, dict[str, Any]]
    extra: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form."""
        return {"label": self.label, "skill_id": self.skill_id,
                "campaign_id": self.campaign_id, "per_kind": self.per_kind, **self.extra}


def _reduce(results: Sequence[Any]) -> dict[str, Any]:
    passed = sum(result.status == "ok" for result in results)
    reduced: dict[str, Any] = {
        "scenarios": len(results), "passed": passed, "failed": len(results) - passed,
        "not_recovered": sum(result.metrics.get("recovery_time_max_s") is None
                             and bool(result.metrics.get("recovery_time_s"))
                             for result in results),
    }
    for name in COMPARED_METRICS:
        values = [float(v) for v in (result.metrics.get(name) for result in results)
                  if v is not None]
        reduced[name] = float(np.median(values)) if values else None
    return reduced


def summarise_side(label: str, skill_id: str, campaign_id: str,
                   results: Iterable[Any]) -> SideSummary:
    """Counts and medians per kind of one campaign's results (objects with ``status``,
    ``metrics`` and ``parameters.kind``, as the store's ``find_replay_results`` gives)."""
    listed = list(results)
    by_kind: dict[str, list[Any]] = {}
    for result in listed:
        by_kind.setdefault(result.parameters.kind, []).append(result)
    per_kind = {ALL_KINDS: _reduce(listed)}
    per_kind.update({kind: _reduce(items) for kind, items in sorted(by_kind.items())})
    return SideSummary(label, skill_id, campaign_id, per_kind)


def comparison_columns(sides: Sequence[SideSummary]) -> tuple[str, ...]:
    """Columns of :func:`comparison_rows`: kind, skill, counts, medians, then the sides'
    ``extra`` figures."""
    extras = sorted({name for side in sides for name in side.extra})
    return ("kind", "skill", *COUNTS, *COMPARED_METRICS.values(), *extras)


def comparison_rows(sides: Sequence[SideSummary]) -> list[dict[str, Any]]:
    """One row per kind and side (kind :data:`ALL_KINDS` first), sides in their order: the
    counts and medians of that kind; each side's ``extra`` figures fill the
    :data:`ALL_KINDS` row, so a per-side figure (a verdict, say) is one more column."""
    kinds = list(dict.fromkeys(kind for side in sides for kind in side.per_kind))
    rows: list[dict[str, Any]] = []
    for kind in kinds:
        for side in sides:
            figures = side.per_kind.get(kind, {})
            row: dict[str, Any] = {"kind": kind, "skill": side.label}
            row.update({name: figures.get(name) for name in COUNTS})
            row.update({column: figures.get(name) for name, column in COMPARED_METRICS.items()})
            if kind == ALL_KINDS:
                row.update(side.extra)
            rows.append(row)
    return rows
