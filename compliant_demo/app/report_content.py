"""The report's content, gathered from the store: what :func:`compliant_demo.report.write_report`
shows for one skill version and one of its campaigns.

:func:`collect_report_content` loads the skill's demonstrations (aligned with DTW), the recorder's
stiffness estimate against the teacher's ground truth (:class:`GroundTruth`, read from the teacher
node's truth file), the schedule checks of the learned skill on the target, and the campaign's
results (a representative replay per perturbation kind, the metric distributions, the limit
violations), and turns them into figures, tables and summary facts.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from compliant_demo.alignment import align_demonstrations
from compliant_demo.campaign import ReplayCampaign
from compliant_demo.estimation import STIFFNESS_LATENCY_FLAG
from compliant_demo.evaluation import FLAG_KINDS, ScheduleReport
from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.ingest import STIFFNESS_MODEL_FLAG
from compliant_demo.learning import load_skill
from compliant_demo.model_stiffness import compare_with_estimate
from compliant_demo.plant import ReplayPlant, load_plant
from compliant_demo.plant_variation import campaign_failure_drivers
from compliant_demo.readiness import (
    Criteria,
    Verdict,
    assess,
    clamped_anchor,
    load_criteria,
    scenario_anchor,
    schedule_report,
    stretch_anchor,
)
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
from compliant_demo.store import Demonstration, DemoStore, ReplayResultInfo
from compliant_demo.teaching import cork_seat_scenario
from compliant_demo.tracking import DemonstrationBand, band_from_aligned, tracking_metrics

__all__ = ["CAMPAIGN_METRICS", "GroundTruth", "collect_report_content"]

#: Campaign metrics drawn as distributions: stored metric name -> axis label with unit.
CAMPAIGN_METRICS: dict[str, str] = {
    "goal_error_max_rad": "goal error, worst joint [rad]",
    "peak_deviation_max_rad": "peak deviation, worst joint [rad]",
    "recovery_time_max_s": "recovery time, slowest [s]",
    "peak_interaction_torque_max_Nm": "peak interaction torque [N*m]",
    "energy_injected_J": "energy injected by stiffening while deflected [J]",
    "energy_tank_deficit_J": "energy tank deficit, worst joint [J]",
}

# Schedule-check kinds grouped into the stretches the report hatches.
_FLAG_GROUPS: dict[str, tuple[str, ...]] = {
    "under-damped": ("under_damped",),
    "stability not shown": ("statically_unstable", "varying_impedance_unproven"),
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


def _tracking_table(band: DemonstrationBand, t: np.ndarray, q: np.ndarray, duration_s: float,
                    joints: Sequence[str], label: str
                    ) -> tuple[tuple[str, str], ReportTable]:
    """The replay against the demonstrations' band: a summary fact and a table per joint."""
    metrics = tracking_metrics(t, q, band, duration_s=duration_s)
    width = f"+-{band.n_sigma:g} standard deviations, at least {band.min_tolerance:g} rad"
    fact = (f"{label} vs demonstrations",
            f"outside their band ({width}) "
            f"{100 * metrics['tracking_outside_fraction_any']:.0f} % of the time")
    rows = tuple(
        (name, 100 * metrics["tracking_outside_fraction"][j],
         metrics["tracking_worst_error_rad"][j], metrics["tracking_worst_excess"][j],
         metrics["tracking_worst_excess_time_s"][j])
        for j, name in enumerate(joints))
    return fact, ReportTable(
        f"The {label} against the demonstrations",
        ("joint", "outside the band [%]", "worst |error| [rad]", "worst error / tolerance",
         "at [s]"), rows,
        caption=f"Error from the demonstrations' aligned mean (DTW), with their spread as the "
                f"tolerance ({width}); time maps to phase over the skill's duration, after it "
                "to the goal.", empty_text="no joint")


def _latest_campaign(store: DemoStore, skill_id: str) -> str | None:
    results = [r for r in store.find_replay_results(skill_id=skill_id) if r.campaign_id]
    if not results:
        return None
    return max(results, key=lambda r: r.created).campaign_id


def _metric_column(results: Sequence[ReplayResultInfo], name: str) -> np.ndarray:
    return np.array([np.nan if r.metrics.get(name) is None else float(r.metrics[name])
                     for r in results])


def _plant_variation_summary(results: Sequence[ReplayResultInfo], tables: list[ReportTable]
                             ) -> list[tuple[str, str]]:
    """With plant variation: a summary line naming the factor most associated with failure, and
    a table of every factor (appended to ``tables``); nothing for a nominal campaign."""
    drivers = campaign_failure_drivers(results)
    if not drivers:
        return []
    tables.append(ReportTable(
        "Plant parameters against failures",
        ("parameter", "joint", "AUC", "rank-biserial", "failed", "passed"),
        tuple((d.parameter, d.joint, d.auc, d.rank_biserial, d.n_failed, d.n_passed)
              for d in drivers),
        caption="Per drawn factor (parameter over its nominal value, per joint): the probability "
                "that a failed scenario drew a larger factor than a passed one (AUC, 0.5: no "
                "association) and 2*AUC - 1. A scenario fails when it left a limit or did not "
                "recover from a perturbation that acted. A screening measure over one campaign, "
                "not a causal estimate.",
        empty_text="no factor"))
    return [("plant variation", f"strongest with failure (screening): {drivers[0].describe()}")]


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


def _model_table(demo: Demonstration, joints: Sequence[str]) -> ReportTable:
    """The model-based stiffness of a demonstration against the estimate from its samples."""
    rows = compare_with_estimate(demo.t, demo.position, demo.torque, demo.stiffness,
                                 cork_seat_scenario().estimator_settings())
    return ReportTable(
        "Model-based stiffness against the estimate",
        ("joint", "compared [%]", "model median [N*m/rad]", "estimate median [N*m/rad]",
         "median (estimate - model) / model [%]", "RMS difference [N*m/rad]"),
        tuple((joint, f"{100 * r['compared']:.0f}", f"{r['model_median']:.3g}",
               f"{r['estimate_median']:.3g}", f"{100 * r['relative_difference_median']:.1f}",
               f"{r['rms_difference']:.3g}") for joint, r in zip(joints, rows, strict=True)),
        caption="The first demonstration recorded with the model channel (stiffness of the "
                "mechanism's springs from its motor angles) against the sliding-window estimate "
                "computed from the same samples with the simulated teacher's estimator settings "
                "(those of config/recorder.yaml), moved back by its latency; over the samples "
                "where both exist. The simulated arm sets its springs to the hand's stiffness "
                "within the mechanism's range, so where the hand is softer than the springs can "
                "be the model stays above the estimate.")


def collect_report_content(
    store: DemoStore,
    skill_name: str,
    *,
    version: int | None = None,
    campaign_id: str | None = None,
    plant: ReplayPlant | None = None,
    truth: GroundTruth | None = None,
    criteria: Criteria | None = None,
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
    criteria : acceptance criteria of the readiness verdict that opens the report (and whose
        ``min_damping_ratio`` flags under-damped stretches); None: the shipped ones

    Returns
    -------
    ReportContent
        With the readiness verdict of the skill on the plant: its schedule checks and the
        campaign's scenarios.
    """
    criteria = load_criteria() if criteria is None else criteria
    min_damping_ratio = criteria.thresholds.min_damping_ratio.value
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
    truth_note = " No ground truth was given for this store."
    if truth is not None and len(truth.series) != len(demos):
        # The truth file knows its demonstrations only by recording order: with another count
        # it describes other demonstrations, and drawing it would compare the wrong hands.
        truth_note = (f" The ground truth given describes {len(truth.series)} other "
                      "demonstration(s) and is left out.")
        warnings.warn(
            f"truth file: {len(truth.series)} demonstration(s), but {skill_name} version "
            f"{record.version} was learned from {len(demos)}; the truth is matched by recording "
            "order, so it is left out (learn from that run's demonstrations alone, "
            "learn --tag RUN_TAG)", stacklevel=2)
        truth = None
    summary: list[tuple[str, str]] = [
        ("skill", f"{skill.name} version {record.version} ({record.id})"),
        ("demonstrations", str(len(demos))),
        ("joints", ", ".join(joints)),
        ("plant", plant.describe()),
    ]
    demo_band = None
    if len(demos) >= 2:
        aligned = align_demonstrations([(d.t, d.position) for d in demos], band=0.1)
        demo_band = band_from_aligned(aligned)
        figures.append(ReportFigure(
            "demonstrations", "Demonstrations and their aligned mean",
            f"{len(demos)} demonstrations in their own time (thin grey), the mean after "
            "dynamic time warping (dashed, markers) and +-2 standard deviations (hatched).",
            plot_demonstrations([(d.t, d.position) for d in demos], aligned.time, aligned.mean,
                                np.sqrt(aligned.variance), joints)))
    from_model = [d for d in demos if d.info.flags.get(STIFFNESS_MODEL_FLAG)]
    with_stiffness = [(i, d, d.stiffness) for i, d in enumerate(demos) if d.stiffness is not None
                      and not d.info.flags.get(STIFFNESS_MODEL_FLAG)]
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
            + ("" if truth_k is not None else truth_note),
            plot_stiffness_estimate(demo.t, estimate, truth_k, excited, joints,
                                    latency_s=latency)))
        summary.append(("estimate coverage",
                        f"{100 * excited.mean():.0f} % of samples excited enough"))

    tables = [_model_table(from_model[0], joints)] if from_model else []
    rollout = (job.setup if job else ReplaySetup(skill, plant)).rollout
    checks = schedule_report(rollout, plant, criteria)
    figures.append(ReportFigure(
        "schedule_checks", "Learned stiffness and damping ratio along the skill",
        "The stiffness the skill commands (clamped to the mechanism's range) and the damping "
        "ratio on the target joint's inertia (gravity stiffness included); hatched stretches are "
        "flagged: under-damped, stability not shown (gravity outweighs the spring, or the "
        "Kronander-Billard condition for varying impedance fails), energy-injecting (the "
        "passivity tank would run empty), rate-limited or out of range.",
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
    tables.insert(0, ReportTable(
        "Flagged stretches of the schedule", ("joint", "check", "from [s]", "to [s]",
                                              "duration [s]", "worst", "unit"),
        tuple((s.joint, s.kind, s.t_start, s.t_end, s.t_end - s.t_start, s.worst, s.unit)
              for s in checks.stretches),
        caption=f"Checks: {', '.join(FLAG_KINDS)}. The verdict counts stretches at least "
                f"{criteria.thresholds.min_stretch_duration.value:g} s long.",
        empty_text="no stretch flagged",
        row_ids=tuple(stretch_anchor(i) for i in range(len(checks.stretches)))))
    clamped = skill.provenance.teacher_stiffness_clamped or []
    tables.insert(1, ReportTable(
        "The teacher's stiffness clamped to the mechanism's range",
        ("joint", "from [s]", "to [s]", "taught [N*m/rad]", "commanded [N*m/rad]"),
        tuple((c.joint, c.from_s, c.to_s, c.teacher_stiffness, c.clamped_to) for c in clamped),
        caption="Where the skill is stiffer or softer than taught, in the demonstrated duration "
                "(the verdict scales the times to the replayed one).",
        empty_text=("none" if skill.provenance.teacher_stiffness_clamped is not None
                    else "not recorded when this skill was learned"),
        row_ids=tuple(clamped_anchor(i) for i in range(len(clamped)))))
    results: list[ReplayResultInfo] = []

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
            "out), peak interaction torque, energy injected by stiffening while deflected "
            "(positive part: softening does not cancel it) and how far the passivity energy "
            "tank would go below zero.",
            plot_metric_distributions(metrics, kinds, CAMPAIGN_METRICS)))
        violations = [r for r in results if r.status != "ok"]
        tables.insert(0, ReportTable(
            "Limit violations in the campaign", ("scenario", "kind", "status", "first violation"),
            tuple((r.scenario_index, r.parameters.kind, r.status, r.reason)
                  for r in violations),
            caption="Scenarios whose mechanism torque or joint angle left the joint's limits.",
            empty_text="no scenario left the joint limits"))
        # scenarios whose only perturbations were walls never touched test no recovery
        untouched = np.array([r.metrics.get("n_untouched", 0) > 0 for r in results])
        acted = np.array([len(r.metrics.get("recovered", [])) > r.metrics.get("n_untouched", 0)
                          for r in results])
        recovered = (f"{100 * np.isfinite(metrics['recovery_time_max_s'][acted]).mean():.0f} %"
                     if acted.any() else "no perturbation acted")
        # A campaign whose command was killed holds only some of its scenarios: say so.
        unfinished = (f" (unfinished: {job.n_scenarios} planned; compliant-demo campaign "
                      f"--resume {campaign_id})" if len(results) < job.n_scenarios else "")
        summary += [
            ("campaign", f"{campaign_id}: {len(results)} scenarios over "
                         f"{len(set(kinds.tolist()))} perturbation kinds, seed "
                         f"{campaign.config.get('seed')}{unfinished}"),
            ("within limits", f"{len(results) - len(violations)} of {len(results)}"),
            ("recovered within the band",
             f"{recovered} (band {campaign.config.get('recovery_band')} rad)"),
            ("walls never touched",
             f"{int(untouched.sum())} scenario(s), reported as untouched, not as recovered"),
            *_plant_variation_summary(results, tables),
            ("median goal error",
             f"{np.nanmedian(metrics['goal_error_max_rad']):.3g} rad"),
            ("median peak deviation",
             f"{np.nanmedian(metrics['peak_deviation_max_rad']):.3g} rad"),
        ]
    if demo_band is not None:
        t_replay, q_replay = (job.unperturbed() if job is not None
                              else (rollout.t, rollout.position))
        fact, table = _tracking_table(demo_band, t_replay, q_replay, rollout.duration_s, joints,
                                      "unperturbed replay" if job is not None else "planned path")
        summary.append(fact)
        tables.append(table)
    summary.append(("schedule checks", "passed" if checks.ok else
                    f"{len(checks.stretches)} flagged stretch(es)"))
    # scenarios count only on the plant they ran on (a --plant other than the campaign's judges
    # the schedule alone)
    same_plant = job is not None and job.plant.digest == plant.digest
    verdict = assess(criteria, plant, checks, results if same_plant else [], skill=skill,
                     movement_s=job.setup.movement_s if job else None)
    if results and not same_plant:
        summary.append(("verdict basis", "schedule checks only: the campaign ran on another "
                                         "plant"))
    tables.append(_named_scenarios(verdict, results))
    summary.insert(0, ("readiness", _verdict_line(verdict)))
    return ReportContent(f"compliant_demo report: {skill.name} v{record.version}",
                         tuple(summary), tuple(figures), tuple(tables), verdict=verdict)


def _verdict_line(verdict: Verdict) -> str:
    if verdict.ready:
        return "ready: every acceptance criterion met in simulation"
    return f"not ready: {len(verdict.reasons)} reason(s), first {verdict.reasons[0].check}"


def _named_scenarios(verdict: Verdict, results: Sequence[ReplayResultInfo]) -> ReportTable:
    """The scenarios the verdict's reasons link to, each row with its anchor."""
    links = {reason.link for reason in verdict.reasons}
    named = [r for r in results if scenario_anchor(r) in links]
    return ReportTable(
        "Scenarios the verdict names",
        ("scenario", "kind", "status", "goal error [rad]", "settled",
         "peak interaction torque [N*m]", "first violation"),
        tuple((r.scenario_index, r.parameters.kind, r.status, r.metrics.get("goal_error_rad"),
               r.metrics.get("settled"), r.metrics.get("peak_interaction_torque_Nm"), r.reason)
              for r in named),
        caption="The worst scenario of each campaign criterion the skill fails (goal error is "
                "the mean over the final settling window, per joint).",
        empty_text="no campaign criterion failed", row_ids=tuple(scenario_anchor(r) for r in named))
