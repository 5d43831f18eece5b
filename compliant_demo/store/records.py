"""Records the demonstration store hands back: demonstration metadata and samples, skills, replay
results with their parameters, and the outcome of a merge. Plain frozen dataclasses, cheap to
build by the thousand; the replay parameters are a validated pydantic model."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict

__all__ = [
    "DEMO_SOURCES",
    "DEMO_STATUSES",
    "DemonstrationInfo",
    "Demonstration",
    "SkillRecord",
    "CampaignInfo",
    "CampaignProgress",
    "ReplayParameters",
    "ReplayResultInfo",
    "ReplayResult",
    "MergeConflict",
    "MergeReport",
    "VerdictRecord",
]

DEMO_SOURCES: tuple[str, ...] = ("recorded", "imported", "simulated")
DEMO_STATUSES: tuple[str, ...] = ("recording", "complete", "incomplete", "rejected")


@dataclass(frozen=True, slots=True)
class DemonstrationInfo:
    """Metadata and summary of one demonstration (no samples).

    Attributes
    ----------
    id : str
        UUID4 string; stable across stores, so merged stores never clash.
    skill, operator, notes : str
    tags : tuple of str
    source : {"recorded", "imported", "simulated"}
    joints : tuple of str
        Joint names, in the column order of every sample array.
    nominal_rate_hz : float
        Rate the recorder aimed for, Hz.
    start_time : float
        Absolute start, Unix time, s. Sample times are relative to it.
    status : {"recording", "complete", "incomplete", "rejected"}
    status_reason : str or None
        Why the status was set (rejections, recovery of a dead writer).
    has_stiffness : bool
        Whether the stiffness channel is stored.
    n_samples : int
    duration_s : float
        ``t[-1] - t[0]``, s (0 for fewer than two samples).
    mean_rate_hz : float or None
        ``(n_samples - 1) / duration_s``, Hz.
    range_of_motion : dict of str to float
        Per joint ``max(q) - min(q)``, rad. Filled when the demonstration is finished.
    peak_abs_torque : dict of str to float
        Per joint ``max(|tau|)``, N*m.
    stiffness_min, stiffness_max : dict of str to float
        Per joint extreme stiffness, N*m/rad (empty without stiffness).
    flags : dict
        Counters of recording trouble, e.g. ``{"drops": 3, "gaps": 1}``, and short notes.
    created_at, updated_at : float
        Unix time, s.
    """

    id: str
    skill: str
    operator: str
    tags: tuple[str, ...]
    notes: str
    source: str
    joints: tuple[str, ...]
    nominal_rate_hz: float
    start_time: float
    status: str
    status_reason: str | None
    has_stiffness: bool
    n_samples: int
    duration_s: float
    mean_rate_hz: float | None
    range_of_motion: dict[str, float] = field(default_factory=dict)
    peak_abs_torque: dict[str, float] = field(default_factory=dict)
    stiffness_min: dict[str, float] = field(default_factory=dict)
    stiffness_max: dict[str, float] = field(default_factory=dict)
    flags: dict[str, Any] = field(default_factory=dict)
    created_at: float = 0.0
    updated_at: float = 0.0

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict (tuples become lists)."""
        data = asdict(self)
        data["tags"] = list(self.tags)
        data["joints"] = list(self.joints)
        return data


@dataclass(frozen=True, slots=True)
class Demonstration:
    """Samples of one demonstration with its metadata.

    Attributes
    ----------
    info : DemonstrationInfo
    t : (n_samples,) array, s
        Relative to ``info.start_time``, strictly increasing.
    position : (n_samples, n_joints) array, rad
    velocity : (n_samples, n_joints) array, rad/s
    torque : (n_samples, n_joints) array, N*m
    stiffness : (n_samples, n_joints) array, N*m/rad, or None when not recorded
    joints : tuple of str
        Column names of the sample arrays (a subset of ``info.joints`` when asked for).
    """

    info: DemonstrationInfo
    t: np.ndarray
    position: np.ndarray
    velocity: np.ndarray
    torque: np.ndarray
    stiffness: np.ndarray | None
    joints: tuple[str, ...]

    @property
    def id(self) -> str:
        """The demonstration's UUID."""
        return self.info.id


@dataclass(frozen=True, slots=True)
class SkillRecord:
    """One saved version of a learned skill, with its provenance.

    Attributes
    ----------
    id : str
        UUID4 of this version.
    name : str
    version : int
        1 for the first save of ``name``, then increasing by one.
    payload : dict
        The skill itself (its layout belongs to the learner); numpy arrays round-trip exactly.
    demonstration_ids : tuple of str
        Demonstrations the skill was learned from.
    parameters : dict
        Learning parameters used.
    created : float
        Unix time, s.
    """

    id: str
    name: str
    version: int
    payload: dict[str, Any]
    demonstration_ids: tuple[str, ...]
    parameters: dict[str, Any]
    created: float


@dataclass(frozen=True, slots=True)
class CampaignInfo:
    """A replay campaign: one skill version replayed over a configured set of scenarios."""

    id: str
    skill_id: str
    config: dict[str, Any]
    created: float


@dataclass(frozen=True, slots=True)
class CampaignProgress:
    """A campaign as listed for people: its skill and how far it got.

    Attributes
    ----------
    id, skill_id : str
    skill_name : str
    skill_version : int
    created : float
        Unix time, s.
    scenarios_stored : int
        Scenarios with a stored result.
    scenarios_planned : int or None
        Scenarios its configuration asks for (None when the configuration does not say).
    """

    id: str
    skill_id: str
    skill_name: str
    skill_version: int
    created: float
    scenarios_stored: int
    scenarios_planned: int | None

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict."""
        return asdict(self)


class ReplayParameters(BaseModel):
    """What one replay was run with, whichever face ran it.

    Attributes
    ----------
    source : {"campaign", "command", "node"}
        What ran it: a campaign scenario, ``compliant-demo replay`` or the replay node.
    kind : str
        ``"+".join`` of the schedule's perturbation kinds, or ``"none"``.
    schedule : dict or None
        The perturbation schedule as its JSON dump (``PerturbationSchedule.model_dump``).
    scenario_index : int or None
        Index of the scenario within its campaign.
    skill_version : int or None
    plant : dict or None
        Plant description as JSON; None where the campaign's config holds it.
    plant_file, schedule_file : str or None
        Files the replay node read them from.
    dt : float or None, s
        Integrator step.
    duration_s : float or None, s
        Movement duration; None = the demonstrated one.
    settle_s : float or None, s
        Time simulated after the movement.
    goal : list of float or None, rad
        New goal per joint; None = the demonstrated one.
    seed : int or None
    method : str or None
        Integrator.
    max_stiffness_rate : float or None, N*m/rad/s
        Largest commanded stiffness rate before a safety stop; None = no limit.
    feedforward : bool or None
    real_time : bool or None
        Whether steps were paced by the wall clock.
    """

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    source: Literal["campaign", "command", "node"]
    kind: str = "none"
    schedule: dict[str, Any] | None = None
    scenario_index: int | None = None
    skill_version: int | None = None
    plant: dict[str, Any] | None = None
    plant_file: str | None = None
    schedule_file: str | None = None
    dt: float | None = None
    duration_s: float | None = None
    settle_s: float | None = None
    goal: list[float] | None = None
    seed: int | None = None
    method: str | None = None
    max_stiffness_rate: float | None = None
    feedforward: bool | None = None
    real_time: bool | None = None


@dataclass(frozen=True, slots=True)
class ReplayResultInfo:
    """Metrics of one replay, without its trace arrays.

    Attributes
    ----------
    id, skill_id : str
    campaign_id : str or None
    scenario_index : int or None
    status : str
        ``"ok"`` or a short word chosen by the replay code (e.g. ``"unstable"``).
    reason : str or None
    metrics : dict
    parameters : ReplayParameters
    trace_channels : tuple of str
        Names of the stored trace arrays.
    created : float
        Unix time, s.
    """

    id: str
    skill_id: str
    campaign_id: str | None
    scenario_index: int | None
    status: str
    reason: str | None
    metrics: dict[str, Any]
    parameters: ReplayParameters
    trace_channels: tuple[str, ...]
    created: float


@dataclass(frozen=True, slots=True)
class ReplayResult:
    """A replay result with its trace arrays (float64, shapes as saved)."""

    info: ReplayResultInfo
    trace: dict[str, np.ndarray]

    @property
    def parameters(self) -> ReplayParameters:
        """What the replay was run with (``info.parameters``)."""
        return self.info.parameters


@dataclass(frozen=True, slots=True)
class VerdictRecord:
    """A stored readiness verdict of one skill version on one plant under one set of criteria.

    Attributes
    ----------
    id : str
        UUID4 of the verdict.
    verdict : {"ready", "not_ready"}
    reasons : list of dict
        ``Reason.to_dict()`` of each reason, most severe first.
    skill_id : str
    skill_version : int
        Version of the skill ``skill_id`` names.
    plant_digest, criteria_digest : str
        SHA-256 (hex) of the plant and of the criteria the verdict was reached on.
    campaign_id : str or None
        Campaign whose scenarios it counts, None when it rests on the schedule checks alone.
    criteria : dict
        The criteria themselves, as JSON.
    created_at : float
        Unix time, s.
    """

    id: str
    verdict: str
    reasons: list[dict[str, Any]]
    skill_id: str
    skill_version: int
    plant_digest: str
    criteria_digest: str
    campaign_id: str | None
    criteria: dict[str, Any]
    created_at: float

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict."""
        return asdict(self)


@dataclass(frozen=True, slots=True)
class MergeConflict:
    """A demonstration present in both stores with different content."""

    id: str
    reason: str


@dataclass(slots=True)
class MergeReport:
    """What :meth:`DemoStore.merge_from` did.

    Attributes
    ----------
    added : list of str
        Ids copied into this store.
    skipped_duplicates : list of str
        Ids already here with identical metadata and samples.
    conflicts : list of MergeConflict
        Ids already here with different content, still recording in the other store, or
        (skills, campaigns, results) clashing with a record here or lacking the record they
        refer to; nothing was changed for them.
    skills_added, campaigns_added, results_added : list of str
        Ids of skill versions, campaigns and replay results copied (with provenance and traces).
    records_skipped : int
        Skill versions, campaigns and results already here, identical.
    """

    added: list[str] = field(default_factory=list)
    skipped_duplicates: list[str] = field(default_factory=list)
    conflicts: list[MergeConflict] = field(default_factory=list)
    skills_added: list[str] = field(default_factory=list)
    campaigns_added: list[str] = field(default_factory=list)
    results_added: list[str] = field(default_factory=list)
    records_skipped: int = 0

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict."""
        return asdict(self)
