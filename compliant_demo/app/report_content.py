"""The report's content, gathered from the store: what :func:`compliant_demo.report.write_report`
shows for one skill version and one of its campaigns.

:func:`collect_report_content` loads the skill's demonstrations (aligned with DTW), the recorder's
stiffness estimate against the teacher's ground truth (:class:`GroundTruth`, read from the teacher
node's truth file), the schedule checks of the learned skill on the target, and the campaign's
results (a representative replay per perturbation kind, the metric distributions, the limit
violations), and turns them into figures, tables and summary facts.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from compliant_demo.alignment import align_demonstrations
from compliant_demo.campaign import ReplayCampaign
from compliant_demo.estimation import STIFFNESS_LATENCY_FLAG
from compliant_demo.evaluation import FLAG_KINDS, ScheduleReport, check_schedule
from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.learning import load_skill
from compliant_demo.plant import ReplayPlant, load_plant
from compliant_demo.replay import ReplaySetup
from compliant_demo.report import (
    ReportContent,
    ReportFigure,
    ReportTable,
    plot_demonstrations,
    plot_metric_distributions,
    plot_replay_traces,
    plot_schedule_checks,
    plot_stiffness_estimate,
    plot_task_space,
)
from compliant_demo.sim.task_space import task_space_view
from compliant_demo.store import DemoStore, ReplayResultInfo

__all__ = ["CAMPAIGN_METRICS", "GroundTruth", "collect_report_content"]

#: Campaign metrics drawn as distributions: stored metric name -> axis label with unit.
CAMPAIGN_METRICS: dict[str, str] = {
    "goal_error_max_rad": "goal error, worst joint [rad]",
    "peak_deviation_max_rad": "peak deviation, worst joint [rad]",
    "recovery_time_max_s": "recovery time, slowest [s]",
    "peak_interaction_torque_max_Nm": "peak interaction torque [N*m]",
    "energy_injected_J": "energy injected by stiffness changes [J]",
}

# Schedule-check kinds grouped into the stretches the report hatches.
_FLAG_GROUPS: dict[str, tuple[str, ...]] = {
    "under-damped": ("under_damped",),
    "energy-injecting": ("energy_tank_empty",),
    "rate-limited": ("stiffness_rate", "damping_rate"),
    "out of range": ("stiffness_range", "damping_range", "position_range", "torque_limit"),
}


@dataclass(frozen=True)
class GroundTruth:
    """The teacher's hand stiffness for each recorded demonstration, in recording order.

    Attributes
    ----------
    series : sequence of ``(t, stiffness)``; t : (n,) s from the demonstration's start,
        stiffness : (n, n_joints) N*m/rad
    """

    series: tuple[tuple[np.ndarray, np.ndarray], ...]

    @classmethod
    def from_npz(cls, path: str | Path) -> GroundTruth:
        """Read the teacher node's truth file (``t_<i>``, ``stiffness_<i>`` per demonstration)."""
        try:
            with np.load(Path(path), allow_pickle=False) as data:
                count = sum(1 for key in data.files if key.startswith("stiffness_"))
                series = tuple((np.asarray(data[f"t_{i}"]), np.asarray(data[f"stiffness_{i}"]))
                               for i in range(count))
        except (OSError, KeyError, ValueError) as exc:
            raise InvalidInputError(f"truth = {str(path)!r}: not a teacher truth file ({exc})"
                                    ) from None
        return cls(series)


def _flag_masks(checks: ScheduleReport) -> dict[str, np.ndarray]:
    masks = {}
    for label, kinds in _FLAG_GROUPS.items():
        mask = np.zeros(checks.t.size, dtype=bool)
        for stretch in checks.stretches:
            if stretch.kind in kinds:
                mask |= (checks.t >= stretch.t_start) & (checks.t <= stretch.t_end)
        masks[label] = mask
    return masks


def _latest_campaign(store: DemoStore, skill_id: str) -> str | None:
    results = [r for r in store.find_replay_results(skill_id=skill_id) if r.campaign_id]
    if not results:
        return None
    return max(results, key=lambda r: r.created).campaign_id


def _metric_column(results: Sequence[ReplayResultInfo], name: str) -> np.ndarray:
    return np.array([np.nan if r.metrics.get(name) is None else float(r.metrics[name])
                     for r in results])


def _representative_traces(
    store: DemoStore, results: Sequence[ReplayResultInfo], kinds: np.ndarray
) -> dict[str, tuple[np.ndarray, np.ndarray, tuple[float, float] | None]]:
    """Per kind, the scenario with the median peak deviation: its trace and perturbation window."""
    deviation = _metric_column(results, "peak_deviation_max_rad")
    traces = {}
    for kind in sorted(set(kinds.tolist())):
        members = np.flatnonzero(kinds == kind)
        order = members[np.argsort(np.nan_to_num(deviation[members]), kind="stable")]
        chosen = results[int(order[len(order) // 2])]
        trace = store.load_replay_result(chosen.id).trace
        perturbations = (chosen.parameters.schedule or {}).get("perturbations") or [{}]
        onset = perturbations[0].get("onset_s")
        window = None
        if onset is not None:
            length = perturbations[0].get("duration_s") or 0.0
            end = min(onset + (length if np.isfinite(length) else np.inf), float(trace["t"][-1]))
            window = (float(onset), float(max(end, onset + 0.01)))
        traces[f"{kind} (scenario {chosen.scenario_index})"] = (trace["t"], trace["q"], window)
    return traces


def collect_report_content(
    store: DemoStore,
    skill_name: str,
    *,
    version: int | None = None,
    campaign_id: str | None = None,
    plant: ReplayPlant | None = None,
    truth: GroundTruth | None = None,
    min_damping_ratio: float = 0.5,
) -> ReportContent:
    """Build the report of one skill version and one of its campaigns from the store.

    Parameters
    ----------
    store : an open :class:`compliant_demo.store.DemoStore`
    skill_name, version : the skill (latest version when None)
    campaign_id : the campaign to show; None takes the skill's latest campaign
    plant : target joints and mechanism for the schedule checks; None takes the campaign's
        plant, else the cork_seat default
    truth : the teacher's ground truth for the demonstrations (recording order), if known
    min_damping_ratio : damping ratio below which a stretch is flagged under-damped, 1

    Returns
    -------
    ReportContent
    """
    stored = load_skill(store, skill_name, version)
    record, skill = stored.record, stored.skill
    joints = list(skill.joints)
    if campaign_id is None:
        campaign_id = _latest_campaign(store, record.id)
    campaign = store.get_campaign(campaign_id) if campaign_id else None
    if campaign is not None and campaign.skill_id != record.id:
        raise InvalidInputError(f"campaign_id = {campaign_id!r}: replays another skill version "
                                f"than {skill_name!r} v{record.version}")
    job = ReplayCampaign.from_config(skill, campaign.config) if campaign else None
    if plant is None:
        plant = job.plant if job is not None else load_plant()

    figures = []
    demos = [store.load_demonstration(i, joints=joints) for i in record.demonstration_ids]
    summary: list[tuple[str, str]] = [
        ("skill", f"{skill.name} version {record.version} ({record.id})"),
        ("demonstrations", str(len(demos))),
        ("joints", ", ".join(joints)),
        ("plant", plant.describe()),
    ]
    if len(demos) >= 2:
        aligned = align_demonstrations([(d.t, d.position) for d in demos], band=0.1)
        figures.append(ReportFigure(
            "demonstrations", "Demonstrations and their aligned mean",
            f"{len(demos)} demonstrations in their own time (thin grey), the mean after "
            "dynamic time warping (dashed, markers) and +-2 standard deviations (hatched).",
            plot_demonstrations([(d.t, d.position) for d in demos], aligned.time, aligned.mean,
                                np.sqrt(aligned.variance), joints)))
    with_stiffness = [(i, d, d.stiffness) for i, d in enumerate(demos) if d.stiffness is not None]
    if with_stiffness:
        index, demo, estimate = with_stiffness[0]
        truth_k = None
        if truth is not None and index < len(truth.series):
            t_truth, k_truth = truth.series[index]
            k_truth = np.asarray(k_truth, dtype=float).reshape(len(t_truth), -1)
            truth_k = np.column_stack([np.interp(demo.t, t_truth, k_truth[:, j])
                                       for j in range(k_truth.shape[1])])
        excited = np.isfinite(estimate)
        latency = float(demo.info.flags.get(STIFFNESS_LATENCY_FLAG, 0.0))
        figures.append(ReportFigure(
            "stiffness_estimate", "Estimated stiffness against the teacher's ground truth",
            "The recorder's online sliding-window estimate for the first demonstration, drawn "
            f"{latency:.3f} s earlier than it was recorded (the estimator's latency: window "
            "centre plus band-pass delay), at the time it describes; dotted hatching marks "
            "windows the estimator flagged as not excited enough (no estimate)."
            + ("" if truth_k is not None else " No ground truth was given for this store."),
            plot_stiffness_estimate(demo.t, estimate, truth_k, excited, joints,
                                    latency_s=latency)))
        summary.append(("estimate coverage",
                        f"{100 * excited.mean():.0f} % of samples excited enough"))

    target = plant.for_joints(joints)
    rollout = (job.setup if job else ReplaySetup(skill, plant)).rollout
    checks = check_schedule(rollout, target, plant.mechanisms_for(joints),
                            min_damping_ratio=min_damping_ratio, chain=plant.chain)
    figures.append(ReportFigure(
        "schedule_checks", "Learned stiffness and damping ratio along the skill",
        "The stiffness the skill commands (clamped to the mechanism's range) and the damping "
        "ratio on the target joint's inertia; hatched stretches are flagged: under-damped, "
        "energy-injecting (the passivity tank would run empty), rate-limited or out of range.",
        plot_schedule_checks(checks.t, checks.stiffness, checks.damping_ratio,
                             _flag_masks(checks), joints, damping_ratio_floor=min_damping_ratio)))
    if plant.chain is not None and set(plant.chain.joint_names) <= set(joints):
        columns = [joints.index(name) for name in plant.chain.joint_names]
        view = task_space_view(plant.chain, rollout.position[:, columns],
                               checks.stiffness[:, columns])
        figures.append(ReportFigure(
            "task_space", "End-effector path and stiffness ellipses",
            "The skill's path of the end effector (the arm's tool point) in its plane of motion, "
            "and at points along it the stiffness the joint stiffness gives there, "
            "K_x = J^-T K_q J^-1 (Siciliano et al., Robotics: Modelling, Planning and Control, "
            "stiffness mapping): each ellipse is long where the arm is stiff (near a stretched "
            "or folded arm very long ones are shrunk, their shape kept). Where the arm is "
            "stretched or folded J^-1 does not exist; those points carry a cross, no ellipse.",
            plot_task_space(view.path, view.sample_index, view.stiffness, view.singular,
                            axis_names=view.axis_names)))
    tables = [ReportTable(
        "Flagged stretches of the schedule", ("joint", "check", "from [s]", "to [s]", "worst",
                                              "unit"),
        tuple((s.joint, s.kind, s.t_start, s.t_end, s.worst, s.unit) for s in checks.stretches),
        caption=f"Checks: {', '.join(FLAG_KINDS)}.", empty_text="no stretch flagged")]

    if campaign is not None and job is not None:
        results = list(store.find_replay_results(campaign_id=campaign_id))
        if not results:
            raise NotFoundError(f"campaign {campaign_id!r} has no results yet")
        kinds = np.array([r.parameters.kind for r in results])
        t_nominal, q_nominal = job.unperturbed()
        figures.append(ReportFigure(
            "replay_traces", "Replays under each perturbation kind",
            "For each kind the scenario with the median peak deviation (solid and dashed, "
            "markers) against the unperturbed replay (dotted); the perturbation's window is "
            "shaded.",
            plot_replay_traces(t_nominal, q_nominal,
                               _representative_traces(store, results, kinds), joints)))
        metrics = {name: _metric_column(results, name) for name in CAMPAIGN_METRICS}
        figures.append(ReportFigure(
            "campaign_metrics", "Distributions of the campaign metrics",
            "Per perturbation kind: goal error and peak deviation (worst joint), recovery time "
            "(slowest perturbation; scenarios that did not recover within the band are left "
            "out), peak interaction torque and energy injected by stiffness changes.",
            plot_metric_distributions(metrics, kinds, CAMPAIGN_METRICS)))
        violations = [r for r in results if r.status != "ok"]
        tables.insert(0, ReportTable(
            "Limit violations in the campaign", ("scenario", "kind", "status", "first violation"),
            tuple((r.scenario_index, r.parameters.kind, r.status, r.reason)
                  for r in violations),
            caption="Scenarios whose mechanism torque or joint angle left the joint's limits.",
            empty_text="no scenario left the joint limits"))
        recovered = np.isfinite(metrics["recovery_time_max_s"]).mean()
        summary += [
            ("campaign", f"{campaign_id}: {len(results)} scenarios over "
                         f"{len(set(kinds.tolist()))} perturbation kinds, seed "
                         f"{campaign.config.get('seed')}"),
            ("within limits", f"{len(results) - len(violations)} of {len(results)}"),
            ("recovered within the band",
             f"{100 * recovered:.0f} % (band {campaign.config.get('recovery_band')} rad)"),
            ("median goal error",
             f"{np.nanmedian(metrics['goal_error_max_rad']):.3g} rad"),
            ("median peak deviation",
             f"{np.nanmedian(metrics['peak_deviation_max_rad']):.3g} rad"),
        ]
    summary.append(("schedule checks", "passed" if checks.ok else
                    f"{len(checks.stretches)} flagged stretch(es)"))
    return ReportContent(f"compliant_demo report: {skill.name} v{record.version}",
                         tuple(summary), tuple(figures), tuple(tables))
