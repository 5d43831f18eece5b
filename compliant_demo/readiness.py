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
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from compliant_demo.evaluation import FLAG_KINDS, ScheduleReport, Stretch, check_schedule
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import JointParams, MechanismParams, model_from_mapping, read_yaml
from compliant_demo.plant import ReplayPlant
from compliant_demo.primitives import Rollout, Skill
from compliant_demo.replay import ReplaySetup
from compliant_demo.resources import package_file
from compliant_demo.store.core import DemoStore
from compliant_demo.store.records import ReplayResultInfo

__all__ = [
    "CRITERIA_FILE",
    "THRESHOLD_UNITS",
    "VERDICTS",
    "Threshold",
    "ScheduleRule",
    "Criteria",
    "load_criteria",
    "Reason",
    "Verdict",
    "schedule_report",
    "assess",
    "assess_replays",
    "record_verdict",
    "scenario_anchor",
    "stretch_anchor",
    "CLAMPED_CHECK",
    "clamped_anchor",
]

#: The shipped acceptance criteria (in ``config/``).
CRITERIA_FILE = "readiness_criteria.yaml"
#: The two verdicts.
VERDICTS: tuple[str, ...] = ("ready", "not_ready")
#: Check name of a stretch where the skill commands a clamped version of the teacher's stiffness.
CLAMPED_CHECK = "teacher_stiffness_clamped"


def _one_line(value: str, name: str) -> str:
    if not value.strip() or "\n" in value or "\r" in value:
        raise ValueError(f"{name} must be one non-empty line")
    return value


class Threshold(BaseModel):
    """One acceptance threshold: its value, unit and why it is set there."""

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    value: float = Field(..., ge=0, strict=True, description="The threshold, in `unit`.")
    unit: str = Field(..., description="Unit of `value` (SI, or '1' for a ratio).")
    why: str = Field(..., description="One line: what crossing it means and where it comes from.")

    @field_validator("unit", "why")
    @classmethod
    def _single_line(cls, value: str, info: Any) -> str:
        return _one_line(value, info.field_name)


class ScheduleRule(BaseModel):
    """How a kind of flagged schedule stretch counts: why it blocks readiness and, for checks
    whose threshold is neither a plant limit nor ``min_damping_ratio``, the threshold."""

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    why: str = Field(..., description="One line: what a stretch of this kind means.")
    threshold: float | None = Field(
        None, description="Threshold in the unit of the check's figure; None: the plant's limit."
    )

    @field_validator("why")
    @classmethod
    def _single_line(cls, value: str) -> str:
        return _one_line(value, "why")


_FRACTION = "fraction of scenarios"
#: The unit each threshold is read in: a value in another unit would be taken as this one.
THRESHOLD_UNITS: dict[str, str] = {
    "min_stretch_duration": "s", "min_damping_ratio": "1", "settling_window": "s",
    "settling_tolerance": "rad", "max_goal_error": "rad", "max_interaction_torque": "N*m",
    "max_torque_limit_scenarios": _FRACTION, "max_failed_recovery": _FRACTION,
    "max_unsettled": _FRACTION, "max_safety_stops": _FRACTION, "tank_initial_energy": "J",
    "tank_max_energy": "J", "expected_interaction_torque": "N*m",
}


class Thresholds(BaseModel):
    """The named thresholds of the criteria (see ``config/readiness_criteria.yaml``), each in
    its unit of :data:`THRESHOLD_UNITS`; fractions of scenarios within [0, 1]."""

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
    tank_initial_energy: Threshold
    tank_max_energy: Threshold
    expected_interaction_torque: Threshold

    @field_validator("*")
    @classmethod
    def _in_its_unit(cls, threshold: Threshold, info: Any) -> Threshold:
        unit = THRESHOLD_UNITS[info.field_name]
        if threshold.unit.strip() != unit:
            raise ValueError(f"unit {threshold.unit!r}: this threshold is read in {unit!r}; "
                             f"convert the value to {unit!r}")
        if unit == _FRACTION and threshold.value > 1:
            raise ValueError(f"value {threshold.value!r}: a fraction of scenarios lies in [0, 1]")
        if info.field_name == "settling_window" and threshold.value == 0:
            raise ValueError("value 0: the settling window must be a positive duration in s")
        return threshold

    @model_validator(mode="after")
    def _tank_bounds(self) -> Thresholds:
        initial, upper = self.tank_initial_energy.value, self.tank_max_energy.value
        if upper < initial:
            raise ValueError(f"tank_max_energy.value = {upper!r} is below "
                             f"tank_initial_energy.value = {initial!r} J")
        return self


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

    @field_validator("schedule_checks")
    @classmethod
    def _known_checks(cls, rules: dict[str, ScheduleRule]) -> dict[str, ScheduleRule]:
        unknown = sorted(set(rules) - set(FLAG_KINDS) - {CLAMPED_CHECK})
        if unknown:
            raise ValueError(f"no such check {unknown}: expected names among "
                             f"{sorted((*FLAG_KINDS, CLAMPED_CHECK))}")
        return rules

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


def schedule_report(rollout: Rollout, plant: ReplayPlant, criteria: Criteria) -> ScheduleReport:
    """The schedule checks of a rollout on a plant with the criteria's damping ratio floor,
    energy tank and expected interaction torque
    (:func:`compliant_demo.evaluation.check_schedule`)."""
    joints = list(rollout.joints)
    limits = criteria.thresholds
    return check_schedule(rollout, plant.for_joints(joints), plant.mechanisms_for(joints),
                          min_damping_ratio=limits.min_damping_ratio.value,
                          energy_budget=limits.tank_initial_energy.value,
                          tank_max_energy=limits.tank_max_energy.value,
                          interaction_torque=limits.expected_interaction_torque.value,
                          chain=plant.chain)


def stretch_anchor(index: int) -> str:
    """HTML id of flagged stretch ``index`` of a :class:`ScheduleReport` (in the report)."""
    return f"stretch-{index}"


def clamped_anchor(index: int) -> str:
    """HTML id of stretch ``index`` of a skill's ``teacher_stiffness_clamped`` (in the report)."""
    return f"clamped-{index}"


def scenario_anchor(result: ReplayResultInfo) -> str:
    """HTML id of a replay result in the report: its campaign scenario, else its id."""
    if result.scenario_index is not None:
        return f"scenario-{result.scenario_index}"
    return f"replay-{result.id}"


def _relative_excess(value: float, threshold: float) -> float:
    """How far ``value`` lies past ``threshold``, relative to the larger of the two, in (0, 1]."""
    scale = max(abs(value), abs(threshold))
    return abs(value - threshold) / scale if scale > 0 else 0.0


def _nearer(value: float, low: float, high: float) -> float:
    return low if abs(value - low) <= abs(value - high) else high


# A stretch's threshold from its joint and mechanism, for checks of a plant's limits.
_PLANT_LIMITS: dict[str, Callable[[Stretch, JointParams, MechanismParams], float]] = {
    "torque_limit": lambda s, joint, m: joint.torque_limit,
    "position_range": lambda s, joint, m: _nearer(s.worst, joint.lower_limit, joint.upper_limit),
    "stiffness_range": lambda s, joint, m: _nearer(s.worst, m.stiffness_min, m.stiffness_max),
    "damping_range": lambda s, joint, m: _nearer(s.worst, getattr(m, "damping_min", math.nan),
                                                 getattr(m, "damping_max", math.nan)),
    "damping_rate": lambda s, joint, m: getattr(m, "damping_rate_limit", math.nan),
}


def _stretch_threshold(
    stretch: Stretch, column: int, schedule: ScheduleReport, rule: ScheduleRule,
    joint: JointParams, mechanism: MechanismParams,
) -> float:
    if rule.threshold is not None:
        return rule.threshold
    if stretch.kind == "under_damped":
        return float(schedule.summary["thresholds"]["min_damping_ratio"])
    if stretch.kind == "stiffness_rate":
        return float(schedule.summary["stiffness_rate_limit"][column])
    if stretch.kind in _PLANT_LIMITS:
        return float(_PLANT_LIMITS[stretch.kind](stretch, joint, mechanism))
    raise InvalidInputError(
        f"criteria schedule_checks.{stretch.kind}: no threshold, and the check is not one of a "
        f"plant limit ({', '.join(sorted(_PLANT_LIMITS))}, stiffness_rate, under_damped)"
    )


def _schedule_reasons(
    criteria: Criteria, plant: ReplayPlant, schedule: ScheduleReport
) -> list[Reason]:
    missing = [kind for kind in FLAG_KINDS if kind not in criteria.schedule_checks]
    missing += sorted({s.kind for s in schedule.stretches} - set(FLAG_KINDS) - set(missing))
    if missing:
        raise InvalidInputError(
            f"criteria schedule_checks: no entry for check(s) {missing}; every check the "
            "schedule can flag needs one"
        )
    joints = list(schedule.joints)
    params = plant.for_joints(joints)
    mechanisms = plant.mechanisms_for(joints)
    span = float(schedule.t[-1] - schedule.t[0]) or 1.0
    shortest = criteria.thresholds.min_stretch_duration.value
    reasons = []
    for index, stretch in enumerate(schedule.stretches):
        duration = stretch.t_end - stretch.t_start
        if duration < shortest:
            continue
        column = joints.index(stretch.joint)
        threshold = _stretch_threshold(stretch, column, schedule,
                                       criteria.schedule_checks[stretch.kind], params[column],
                                       mechanisms[column])
        if not math.isfinite(threshold):
            raise InvalidInputError(f"schedule check {stretch.kind!r} on {stretch.joint}: the "
                                    f"plant gives no finite threshold ({threshold!r})")
        reasons.append(Reason(
            check=stretch.kind, joint=stretch.joint, from_s=stretch.t_start, to_s=stretch.t_end,
            value=stretch.worst, threshold=threshold, unit=stretch.unit,
            severity=_relative_excess(stretch.worst, threshold) * min(duration / span, 1.0),
            link=stretch_anchor(index),
            detail=(f"{stretch.kind.replace('_', ' ')} on {stretch.joint} for {duration:.3g} s "
                    f"({stretch.t_start:.3g} to {stretch.t_end:.3g} s): worst {stretch.worst:.3g} "
                    f"against {threshold:.3g} {stretch.unit}"),
        ))
    return reasons


def _clamped_reasons(
    criteria: Criteria, schedule: ScheduleReport, skill: Skill, movement_s: float | None
) -> list[Reason]:
    """One reason per stretch of the skill's provenance where the teacher's stiffness was
    clamped to the target's range, its times scaled from the demonstrated duration to the
    replayed movement's."""
    stretches = skill.provenance.teacher_stiffness_clamped or []
    if not stretches:
        return []
    rule = criteria.schedule_checks.get(CLAMPED_CHECK)
    if rule is None:
        raise InvalidInputError(f"criteria schedule_checks: no entry for check(s) "
                                f"{[CLAMPED_CHECK]}; every check the schedule can flag needs one")
    if rule.threshold is not None:
        raise InvalidInputError(f"criteria schedule_checks.{CLAMPED_CHECK}.threshold: the "
                                "threshold is the range bound the stiffness was clamped to, "
                                f"got {rule.threshold!r}")
    scale = skill.duration_s if movement_s is None else movement_s
    if not (math.isfinite(scale) and scale > 0):
        raise InvalidInputError(f"movement_s: must be a positive duration in s, got {movement_s!r}")
    scale /= skill.duration_s
    span = float(schedule.t[-1] - schedule.t[0]) or 1.0
    shortest = criteria.thresholds.min_stretch_duration.value
    reasons = []
    for index, stretch in enumerate(stretches):
        if stretch.joint not in schedule.joints:
            raise InvalidInputError(f"skill provenance {CLAMPED_CHECK}: joint {stretch.joint!r} "
                                    f"is not one of the schedule's {list(schedule.joints)}")
        start, end = stretch.from_s * scale, stretch.to_s * scale
        duration = end - start
        if duration < shortest:
            continue
        side = "softer" if stretch.teacher_stiffness < stretch.clamped_to else "stiffer"
        reasons.append(Reason(
            check=CLAMPED_CHECK, joint=stretch.joint, from_s=start, to_s=end,
            value=stretch.teacher_stiffness, threshold=stretch.clamped_to, unit="N*m/rad",
            severity=(_relative_excess(stretch.teacher_stiffness, stretch.clamped_to)
                      * min(duration / span, 1.0)),
            link=clamped_anchor(index),
            detail=(f"the teacher was {side} than the mechanism allows on {stretch.joint} for "
                    f"{duration:.3g} s ({start:.3g} to {end:.3g} s): taught "
                    f"{stretch.teacher_stiffness:.3g}, commanded {stretch.clamped_to:.3g} "
                    "N*m/rad"),
        ))
    return reasons


def _per_joint(result: ReplayResultInfo, name: str, n_joints: int) -> list[float] | None:
    values = result.metrics.get(name)
    if values is None:
        return None
    if not isinstance(values, list) or len(values) != n_joints:
        raise InvalidInputError(f"scenario {scenario_anchor(result)}: metric {name} = "
                                f"{values!r}: expected {n_joints} values")
    return [float(v) for v in values]


def _scenario_reason(
    check: str, joint: str | None, failing: list[tuple[ReplayResultInfo, float]],
    n_scenarios: int, *, cap: Threshold | None = None, limit: Threshold | None = None,
    span: tuple[float | None, float | None] = (None, None), what: str,
) -> Reason | None:
    """One reason for the scenarios ``failing`` (each with its figure), or None.

    With ``limit`` every failing scenario counts: the value is the worst figure against that
    limit. With ``cap`` the value is the share of failing scenarios against that cap.
    """
    share = len(failing) / n_scenarios
    if not failing or (cap is not None and share <= cap.value):
        return None
    worst, figure = max(failing, key=lambda item: item[1])
    where = "" if joint is None else f" on {joint}"
    label = ("scenario " + str(worst.scenario_index) if worst.scenario_index is not None
             else "replay " + worst.id)
    if limit is not None:
        value, threshold, unit = figure, limit.value, limit.unit
        detail = (f"{what}{where} beyond {limit.value:.3g} {limit.unit} in {len(failing)} of "
                  f"{n_scenarios} scenarios; worst {figure:.3g} {limit.unit} ({label})")
    else:
        assert cap is not None
        value, threshold, unit = share, cap.value, cap.unit
        detail = (f"{what}{where} in {len(failing)} of {n_scenarios} scenarios "
                  f"({100 * share:.3g} %, at most {100 * cap.value:.3g} % allowed; first "
                  f"{label})")
    return Reason(check=check, joint=joint, from_s=span[0], to_s=span[1], value=value,
                  threshold=threshold, unit=unit,
                  severity=_relative_excess(value, threshold) * share,
                  link=scenario_anchor(worst), detail=detail)


def _settling_window(result: ReplayResultInfo) -> tuple[float | None, float | None]:
    start, end = result.metrics.get("settling_from_s"), result.metrics.get("settling_to_s")
    return (None if start is None else float(start), None if end is None else float(end))


def _campaign_reasons(
    criteria: Criteria, joints: Sequence[str], scenarios: Sequence[ReplayResultInfo]
) -> list[Reason]:
    limits = criteria.thresholds
    n = len(scenarios)
    window = limits.settling_window.value
    for result in scenarios:
        asked = result.metrics.get("settling_window_s")
        if asked is not None and not math.isclose(float(asked), window, rel_tol=1e-9):
            raise InvalidInputError(
                f"scenario {scenario_anchor(result)}: goal error was measured over the last "
                f"{float(asked):.3g} s; criteria settling_window asks for {window:.3g} s "
                "(replay again with that window)"
            )
    reasons: list[Reason | None] = []
    by_joint: dict[str, list[list[tuple[ReplayResultInfo, float]]]] = {
        name: [[], [], [], []] for name in joints}
    for result in scenarios:
        torque = (result.metrics.get("limit_violations") or {}).get("torque")
        peaks = _per_joint(result, "peak_interaction_torque_Nm", len(joints))
        errors = _per_joint(result, "goal_error_rad", len(joints))
        swings = _per_joint(result, "settling_peak_to_peak_rad", len(joints))
        for j, name in enumerate(joints):
            lists = by_joint[name]
            if torque is not None and torque["samples"][j] > 0:
                lists[0].append((result, float(torque["worst_excess"][j])))
            if peaks is not None and peaks[j] > limits.max_interaction_torque.value:
                lists[1].append((result, peaks[j]))
            if errors is not None and errors[j] > limits.max_goal_error.value:
                lists[2].append((result, errors[j]))
            if swings is not None and swings[j] > limits.settling_tolerance.value:
                lists[3].append((result, swings[j]))
    for name, (exceeding, pushing, missing, ringing) in by_joint.items():
        reasons += [
            _scenario_reason("torque_limit_scenarios", name, exceeding, n,
                             cap=limits.max_torque_limit_scenarios,
                             what="mechanism torque beyond the joint's torque limit"),
            _scenario_reason("interaction_torque", name, pushing, n,
                             limit=limits.max_interaction_torque,
                             what="peak interaction torque"),
            _scenario_reason("goal_error", name, missing, n, limit=limits.max_goal_error,
                             span=_settling_window(missing[0][0]) if missing else (None, None),
                             what="mean goal error over the settling window"),
            _scenario_reason("unsettled", name, ringing, n, cap=limits.max_unsettled,
                             span=_settling_window(ringing[0][0]) if ringing else (None, None),
                             what="still moving in the settling window"),
        ]
    unrecovered = [(r, 1.0) for r in scenarios if not all(r.metrics.get("recovered") or [True])]
    stopped = [(r, 1.0) for r in scenarios if r.status != "ok"]
    reasons += [
        _scenario_reason("failed_recovery", None, unrecovered, n, cap=limits.max_failed_recovery,
                         what="not back within the recovery band before the next perturbation"),
        _scenario_reason("safety_stops", None, stopped, n, cap=limits.max_safety_stops,
                         what="a limit stopped the replay (or would have)"),
    ]
    return [reason for reason in reasons if reason is not None]


def assess(
    criteria: Criteria,
    plant: ReplayPlant,
    schedule: ScheduleReport,
    scenarios: Sequence[ReplayResultInfo] = (),
    *,
    skill: Skill | None = None,
    movement_s: float | None = None,
) -> Verdict:
    """The readiness verdict of a skill on a plant.

    Parameters
    ----------
    criteria : acceptance criteria
    plant : the target the skill was checked and replayed on
    schedule : the skill's schedule checks on that plant (:func:`schedule_report`)
    scenarios : replay results on that plant (a campaign's, or one replay), with the metrics of
        :meth:`compliant_demo.replay.ReplaySetup.metrics`
    skill : the skill; its provenance's stretches where the teacher's stiffness was clamped to
        the target's range (``teacher_stiffness_clamped``) become reasons. None: not checked
    movement_s : the replayed movement's duration, s; the clamped stretches' times (recorded in
        the demonstrated duration) are scaled to it. None: the demonstrated duration

    Returns
    -------
    Verdict
        Not ready when any criterion fails, with one reason per flagged stretch at least
        ``min_stretch_duration`` long and per failing campaign criterion (per joint where it
        has one) and per clamped stretch of the teacher's stiffness at least that long, most
        severe first.

    Notes
    -----
    Severity is how far the figure lies past its threshold relative to the larger of the two
    (in (0, 1]) times the share it covers: the stretch's share of the skill's duration, or the
    share of scenarios that fail (a share-of-scenarios criterion counts the share past its cap
    relative to the share). A damping ratio of 0.011 against 0.5 along the whole skill has
    severity 0.98; a 1 ms stretch, next to none.
    """
    reasons = _schedule_reasons(criteria, plant, schedule)
    if skill is not None:
        reasons += _clamped_reasons(criteria, schedule, skill, movement_s)
    if scenarios:
        reasons += _campaign_reasons(criteria, schedule.joints, scenarios)
    return Verdict.from_reasons(reasons)


def assess_replays(
    criteria: Criteria, setup: ReplaySetup, results: Sequence[ReplayResultInfo]
) -> Verdict:
    """The verdict of the skill ``setup`` replays on its plant: its schedule checks
    (:func:`schedule_report`) and ``results``, the replays it ran (see :func:`assess`)."""
    schedule = schedule_report(setup.rollout, setup.plant, criteria)
    return assess(criteria, setup.plant, schedule, results, skill=setup.skill,
                  movement_s=setup.movement_s)


def record_verdict(
    store: DemoStore, verdict: Verdict, *, skill_id: str, plant: ReplayPlant, criteria: Criteria,
    campaign_id: str | None,
) -> str:
    """Store ``verdict`` with the plant's and the criteria's digests and the criteria; its id."""
    return store.save_verdict(verdict, skill_id=skill_id, plant_digest=plant.digest,
                              criteria_digest=criteria.digest, campaign_id=campaign_id,
                              criteria=criteria.model_dump(mode="json"))
