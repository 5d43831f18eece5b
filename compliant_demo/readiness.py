"""The readiness verdict: is a skill ready to go on from simulation to hardware trials on a plant?

:class:`Criteria` are the acceptance thresholds (a YAML file, ``config/readiness_criteria.yaml``
by default; every threshold with its value, unit and a one-line reason). A :class:`Verdict` is
``"ready"`` or ``"not_ready"`` with its :class:`Reason` list, most severe first; each reason names
the check, the joint, the time span, the figure against its threshold and an anchor (``link``) of
the stretch or scenario it comes from.

A ready verdict says only that the simulated skill met these criteria: simulation does not
certify a robot as safe; a risk assessment under the applicable standards (ISO 10218, ISO/TS
15066), local regulations and licensed practice decide.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import model_from_mapping, read_yaml
from compliant_demo.resources import package_file

__all__ = [
    "CRITERIA_FILE",
    "VERDICTS",
    "Threshold",
    "ScheduleRule",
    "Criteria",
    "load_criteria",
    "Reason",
    "Verdict",
]

#: The shipped acceptance criteria (in ``config/``).
CRITERIA_FILE = "readiness_criteria.yaml"
#: The two verdicts.
VERDICTS: tuple[str, ...] = ("ready", "not_ready")


def _one_line(value: str, name: str) -> str:
    if not value.strip() or "\n" in value or "\r" in value:
        raise ValueError(f"{name} must be one non-empty line")
    return value


class Threshold(BaseModel):
    """One acceptance threshold: its value, unit and why it is set there."""

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    value: float = Field(..., ge=0, description="The threshold, in `unit`.")
    unit: str = Field(..., description="Unit of `value` (SI, or '1' for a ratio).")
    why: str = Field(..., description="One line: what crossing it means and where it comes from.")

    @field_validator("unit", "why")
    @classmethod
    def _single_line(cls, value: str, info: Any) -> str:
        return _one_line(value, info.field_name)


class ScheduleRule(BaseModel):
    """How a kind of flagged schedule stretch counts: why it blocks readiness."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    why: str = Field(..., description="One line: what a stretch of this kind means.")

    @field_validator("why")
    @classmethod
    def _single_line(cls, value: str) -> str:
        return _one_line(value, "why")


class Thresholds(BaseModel):
    """The named thresholds of the criteria (see ``config/readiness_criteria.yaml``)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    min_stretch_duration: Threshold
    min_damping_ratio: Threshold
    settling_window: Threshold
    settling_tolerance: Threshold
    max_goal_error: Threshold
    max_interaction_torque: Threshold
    max_torque_limit_scenarios: Threshold
    max_failed_recovery: Threshold
    max_unsettled: Threshold
    max_safety_stops: Threshold


class Criteria(BaseModel):
    """Acceptance criteria of the readiness verdict.

    Attributes
    ----------
    thresholds : the named thresholds, each with value, unit and why
    schedule_checks : one rule per kind of stretch the schedule checks flag; a kind missing here
        is an error when a verdict is built, so a new check cannot be ignored silently
    """

    model_config = ConfigDict(frozen=True, extra="forbid")

    thresholds: Thresholds
    schedule_checks: dict[str, ScheduleRule] = Field(..., min_length=1)

    @property
    def digest(self) -> str:
        """SHA-256 (hex) of the criteria as canonical JSON (sorted keys, no spaces)."""
        text = json.dumps(self.model_dump(mode="json"), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode("utf-8")).hexdigest()


def load_criteria(path: str | Path | None = None) -> Criteria:
    """The acceptance criteria from a YAML file; None gives the shipped ones
    (:data:`CRITERIA_FILE`). A bad file raises InvalidInputError naming the field and value."""
    path = Path(path) if path is not None else package_file("config", CRITERIA_FILE)
    return model_from_mapping(Criteria, read_yaml(path), source=str(path))


def _finite(name: str, value: float | None, *, allow_none: bool = False) -> float | None:
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InvalidInputError(f"Reason.{name}: must be a finite number, got {value!r}")
    return float(value)


@dataclass(frozen=True)
class Reason:
    """Why a skill is not ready: one check that failed, where and by how much.

    Attributes
    ----------
    check : name of the check (a schedule stretch kind or a campaign criterion)
    joint : joint name, or None when the check spans all joints
    from_s, to_s : time span, s from the skill's start (None when it is a count over scenarios)
    value : the figure found (the worst value of a stretch, a fraction of scenarios ...), in unit
    threshold : the criterion it is held against, in unit
    unit : unit of value and threshold
    severity : how bad, larger is worse (e.g. the distance past the threshold relative to it)
    link : anchor of the stretch or scenario it comes from (an HTML id in the report)
    detail : one line for people
    """

    check: str
    joint: str | None
    from_s: float | None
    to_s: float | None
    value: float
    threshold: float
    unit: str
    severity: float
    link: str
    detail: str = ""

    def __post_init__(self) -> None:
        for name in ("value", "threshold", "severity"):
            object.__setattr__(self, name, _finite(name, getattr(self, name)))
        for name in ("from_s", "to_s"):
            object.__setattr__(self, name, _finite(name, getattr(self, name), allow_none=True))
        if not self.check:
            raise InvalidInputError("Reason.check: must name a check, got ''")

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict."""
        return asdict(self)


@dataclass(frozen=True)
class Verdict:
    """Ready or not ready, with the reasons (sorted most severe first on construction).

    Attributes
    ----------
    verdict : "ready" or "not_ready"; "ready" only without reasons
    reasons : tuple of Reason, most severe first
    """

    verdict: Literal["ready", "not_ready"]
    reasons: tuple[Reason, ...] = field(default_factory=tuple)

    def __post_init__(self) -> None:
        if self.verdict not in VERDICTS:
            raise InvalidInputError(f"verdict: must be one of {list(VERDICTS)}, got "
                                    f"{self.verdict!r}")
        ordered = tuple(sorted(self.reasons, key=lambda r: -r.severity))
        if self.verdict == "ready" and ordered:
            raise InvalidInputError(f"verdict: 'ready' with {len(ordered)} reason(s) against it")
        if self.verdict == "not_ready" and not ordered:
            raise InvalidInputError("verdict: 'not_ready' needs at least one reason")
        object.__setattr__(self, "reasons", ordered)

    @classmethod
    def from_reasons(cls, reasons: list[Reason] | tuple[Reason, ...]) -> Verdict:
        """Not ready when there is any reason, else ready."""
        return cls("not_ready" if reasons else "ready", tuple(reasons))

    @property
    def ready(self) -> bool:
        """Whether the verdict is "ready"."""
        return self.verdict == "ready"

    def to_dict(self) -> dict[str, Any]:
        """``{"verdict": ..., "reasons": [Reason.to_dict(), ...]}``, JSON-ready."""
        return {"verdict": self.verdict, "reasons": [r.to_dict() for r in self.reasons]}
