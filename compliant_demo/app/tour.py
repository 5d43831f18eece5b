"""The whole job in one call: record, learn, run a perturbation campaign, write the report.

:func:`run_tour` starts the simulated teacher and the recorder as real ROS 2 processes from the
``record.launch.xml`` launch file (their environment confines DDS to the loopback interface and
sets the ROS domain), waits until they have recorded the cork_seat demonstrations into the store,
stops them, then learns a skill from exactly those demonstrations, replays it in a campaign of
perturbed scenarios over every perturbation kind, and writes the HTML report with the teacher's
ground truth. Nothing here imports rclpy: the nodes are separate processes.
"""

from __future__ import annotations

import subprocess
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from compliant_demo.app.domains import MAX_DOMAIN_ID
from compliant_demo.app.launch_file import read_launch_file, start_nodes
from compliant_demo.app.progress import advance_to, campaign_progress, progress_bar
from compliant_demo.app.report_content import GroundTruth, collect_report_content
from compliant_demo.app.run_plan import RunPlan, planned_run, run_tag
from compliant_demo.app.supervisor import deferred_signals, node_environment, stop_children
from compliant_demo.campaign import (
    MAX_SCENARIOS,
    CampaignSummary,
    ReplayCampaign,
    default_campaign_spec,
    run_campaign,
)
from compliant_demo.exceptions import CompliantDemoError, InvalidInputError
from compliant_demo.generalisation import check_goal
from compliant_demo.learning import LearnRequest, learn_from_store
from compliant_demo.plant import load_plant
from compliant_demo.readiness import Verdict, load_criteria, record_verdict
from compliant_demo.replay import DEFAULT_SETTLE_S, ReplaySetup, check_horizon
from compliant_demo.report import write_report
from compliant_demo.resources import package_launch_file
from compliant_demo.store import DemoStore

__all__ = [
    "TourSettings",
    "TourResult",
    "TourError",
    "run_tour",
    "record_demonstrations",
    "plan_dict",
]

SKILL = "cork_seat"


class TourError(CompliantDemoError, RuntimeError):
    """A step of the tour failed (a node exited early, recording timed out)."""


@dataclass(frozen=True)
class TourSettings:
    """What the tour does and where it writes.

    Attributes
    ----------
    store : store file (created if missing)
    out_dir : directory for the report, the PNG figures, the teacher's truth file and node log;
        None: a folder of the run's own under ``compliant_demo_runs/``
    n_demonstrations : demonstrations the simulated teacher gives (about 6 s each, real time)
    demo_duration_s : nominal duration of each demonstration, s (None: the scenario's 6 s)
    operator : operator name stored with each demonstration
    n_scenarios : perturbed scenarios of the campaign (spread evenly over every kind)
    seed : seed of the first demonstration and of the campaign; None draws one per run
    domain_id : ROS_DOMAIN_ID of the node processes (0-101), refused while another run holds it;
        None takes the first free one from $ROS_DOMAIN_ID (or 17) upward
    workers : local worker processes (None: every core; 0: in this process)
    scheduler : Dask scheduler address instead of local workers
    record_timeout_s : longest wait for the recording, s
    launch_file : the recording launch file; None uses the package's ``record.launch.xml``
    plant : the target joints and mechanism the skill is replayed on (YAML, see
        :func:`compliant_demo.plant.load_plant`); None uses the package's
        ``config/joint_cork_seat_antagonistic.yaml``: antagonistic springs, whose damping is
        not coupled to stiffness, on a bench arm with gravity, friction and torque limits
    criteria : readiness acceptance criteria (YAML, see
        :func:`compliant_demo.readiness.load_criteria`); None uses the shipped ones
    goal : new goal of the campaign's replays, one angle per plant joint, rad (None: the
        demonstrated goal); duration_s : their movement duration, s (None: the demonstrated
        one); settle_s : time simulated after the movement, s
    """

    store: Path
    out_dir: Path | None = None
    n_demonstrations: int = 4
    demo_duration_s: float | None = None
    operator: str = "operator_a"
    n_scenarios: int = 350
    seed: int | None = None
    domain_id: int | None = None
    workers: int | None = None
    scheduler: str | None = None
    record_timeout_s: float = 150.0
    launch_file: Path | None = None
    plant: Path | None = None
    criteria: Path | None = None
    goal: tuple[float, ...] | None = None
    duration_s: float | None = None
    settle_s: float = DEFAULT_SETTLE_S

    def __post_init__(self) -> None:
        if not 2 <= self.n_demonstrations <= 50:
            raise InvalidInputError(
                f"n_demonstrations = {self.n_demonstrations}: must be 2 to 50 (learning needs two)"
            )
        if self.demo_duration_s is not None and not 1.0 <= self.demo_duration_s <= 60.0:
            raise InvalidInputError(
                f"demo_duration_s = {self.demo_duration_s}: must be 1 to 60 s"
            )
        if not self.operator.strip():
            raise InvalidInputError(f"operator = {self.operator!r}: must not be empty")
        if self.n_scenarios < 1:
            raise InvalidInputError(f"n_scenarios = {self.n_scenarios}: must be >= 1")
        if self.n_scenarios > MAX_SCENARIOS:
            raise InvalidInputError(f"n_scenarios = {self.n_scenarios}: at most {MAX_SCENARIOS:,}")
        if self.seed is not None and not 0 <= self.seed <= 2**31 - 1 - self.n_demonstrations:
            raise InvalidInputError(
                f"seed = {self.seed}: must be 0 to 2**31 - 1 - n_demonstrations (demonstration i "
                "uses seed + i)"
            )
        if self.domain_id is not None and not 0 <= self.domain_id <= MAX_DOMAIN_ID:
            raise InvalidInputError(f"domain_id = {self.domain_id}: must be 0 to 101")
        if not self.record_timeout_s > 0:
            raise InvalidInputError(f"record_timeout_s = {self.record_timeout_s}: must be > 0 s")


@dataclass(frozen=True)
class TourResult:
    """What the tour produced: the run's tag and ids in the store, the campaign, the report, the
    readiness verdict (stored as ``verdict_id`` with the plant's and the criteria's digests) and
    step timings (s)."""

    store: Path
    plan: RunPlan
    demonstration_ids: tuple[str, ...]
    skill_id: str
    skill_version: int
    campaign: CampaignSummary
    report: Path
    figures: tuple[Path, ...]
    summary: tuple[tuple[str, str], ...]
    verdict: Verdict
    verdict_id: str
    plant_digest: str
    criteria_digest: str
    timings_s: dict[str, float] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready form."""
        return {
            **self.verdict.to_dict(),
            "verdict_id": self.verdict_id,
            "plant_digest": self.plant_digest,
            "criteria_digest": self.criteria_digest,
            "store": str(self.store),
            **plan_dict(self.plan),
            "demonstration_ids": list(self.demonstration_ids),
            "skill": {"name": SKILL, "id": self.skill_id, "version": self.skill_version},
            "campaign": {
                "id": self.campaign.campaign_id,
                "scenarios": self.campaign.n_scenarios,
                "violations": self.campaign.n_violations,
                "backend": self.campaign.backend,
                "workers": self.campaign.workers,
                "scenarios_per_s": self.campaign.scenarios_per_s,
            },
            "report": str(self.report),
            "figures": [str(p) for p in self.figures],
            "summary": dict(self.summary),
            "timings_s": self.timings_s,
        }


def _complete_with_tag(store_path: Path, tag: str) -> list[str]:
    with DemoStore(store_path, read_only=True) as store:
        infos = store.find_demonstrations(skill=SKILL, status="complete", tag=tag,
                                          order_by="start_time")
        return [info.id for info in infos]


def _tail(path: Path, lines: int = 8) -> str:
    try:
        text = path.read_text(encoding="utf-8", errors="replace").splitlines()
    except OSError:
        return ""
    return " | ".join(text[-lines:])


def plan_dict(plan: RunPlan) -> dict[str, Any]:
    """The run's tag, seed, ROS domain and files, JSON-ready."""
    return {"tag": plan.tag, "seed": plan.seed, "seed_drawn": plan.seed_drawn,
            "domain_id": plan.domain_id, "out_dir": str(plan.out_dir),
            "truth": str(plan.truth_path), "log": str(plan.log_path)}


def _node_overrides(settings: TourSettings, tag: str) -> dict[str, dict[str, str]]:
    overrides: dict[str, dict[str, str]] = {"recorder": {"tags": f"[{tag}]"}, "teacher": {}}
    if settings.demo_duration_s is not None:
        overrides["teacher"]["duration_s"] = repr(float(settings.demo_duration_s))
    return overrides


def record_demonstrations(settings: TourSettings, plan: RunPlan, progress: bool) -> list[str]:
    """Run teacher and recorder as processes until the demonstrations are in the store.

    The nodes run on the plan's ROS domain with its seed; the recorder tags every demonstration
    of this run with the plan's tag, the teacher writes the plan's truth file, both log to the
    plan's log. Returns the demonstration ids in recording order. Interrupted (Ctrl-C), the
    nodes are stopped cleanly (the open demonstration is flagged ``interrupted``, the truth file
    holds what was published) and KeyboardInterrupt is raised again.
    """
    tag, truth_path, log_path = plan.tag, plan.truth_path, plan.log_path
    with DemoStore(settings.store):  # create or migrate the file before the nodes open it
        pass
    launch = settings.launch_file or package_launch_file("record.launch.xml")
    description = read_launch_file(launch, {
        "store": str(settings.store),
        "demos": str(settings.n_demonstrations),
        "seed": str(plan.seed),
        "operator": settings.operator,
        "truth": str(truth_path),
    })
    names = [node.name or node.executable for node in description.nodes]
    if "teacher" not in names:
        raise InvalidInputError(f"launch file {str(launch)!r}: declares no node named 'teacher' "
                                f"(nodes: {names})")
    with open(log_path, "w", encoding="utf-8") as log:
        children = start_nodes(description, env=node_environment(plan.domain_id),
                                extra_parameters=_node_overrides(settings, tag),
                                stdout=log.fileno(), stderr=subprocess.STDOUT)
    teacher = children[names.index("teacher")].process
    deadline = time.monotonic() + settings.record_timeout_s
    recorded: list[str] = []
    try:
        with progress_bar("record", settings.n_demonstrations, "demo", progress) as bar:
            while True:
                recorded = _complete_with_tag(settings.store, tag)
                advance_to(bar, len(recorded))
                teacher_done = teacher.poll() is not None
                if len(recorded) >= settings.n_demonstrations and teacher_done:
                    break
                for child in children:
                    if child.process.poll() not in (None, 0):
                        raise TourError(f"{child.name} node exited with {child.returncode} during "
                                        f"recording; log {log_path}: {_tail(log_path)}")
                if teacher_done:
                    break  # counted again once the recorder has shut down (below)
                if time.monotonic() > deadline:
                    raise TourError(
                        f"recording took longer than {settings.record_timeout_s} s "
                        f"({len(recorded)} of {settings.n_demonstrations} demonstrations); "
                        f"log {log_path}: {_tail(log_path)}")
                time.sleep(0.2)
            advance_to(bar, len(recorded))
    finally:
        # Ctrl-C again while the nodes finish (the recorder flushing, the teacher writing its
        # truth file) must not cut their shutdown short.
        with deferred_signals():
            stop_children(children)
    # The teacher stops the recorder before it exits, but the recorder answers stop after at
    # most 5 s: a store slower than that (another run writing to it) finishes the last
    # demonstration only while the recorder shuts down, so count after that.
    recorded = _complete_with_tag(settings.store, tag)
    if len(recorded) < settings.n_demonstrations:
        raise TourError(f"teacher finished but {len(recorded)} of {settings.n_demonstrations} "
                        f"demonstrations are complete in {settings.store}; log {log_path}: "
                        f"{_tail(log_path)}")
    return recorded[: settings.n_demonstrations]


def _timed(timings: dict[str, float], name: str, step: Callable[[], Any]) -> Any:
    started = time.perf_counter()
    value = step()
    timings[name] = round(time.perf_counter() - started, 3)
    return value


def run_tour(
    settings: TourSettings, *, progress: bool = True,
    announce: Callable[[RunPlan], None] | None = None,
) -> TourResult:
    """Record, learn, run the campaign and write the report; see the module docstring.

    Parameters
    ----------
    settings : TourSettings
    progress : progress bars on stderr
    announce : called with the run's plan (tag, seed, ROS domain, folder) before anything starts

    Returns
    -------
    TourResult
    """
    timings: dict[str, float] = {}
    started = time.perf_counter()
    if settings.plant is not None and not Path(settings.plant).is_file():
        raise InvalidInputError(f"plant = {str(settings.plant)!r}: no such file")
    plant = load_plant(settings.plant)
    if settings.criteria is not None and not Path(settings.criteria).is_file():
        raise InvalidInputError(f"criteria = {str(settings.criteria)!r}: no such file")
    criteria = load_criteria(settings.criteria)
    if settings.goal is not None:  # before anything is recorded
        check_goal(settings.goal, plant.joints, "goal")
    if settings.duration_s is not None:
        check_horizon(settings.duration_s, settings.settle_s, ReplaySetup.dt,
                      settings.duration_s)
    with planned_run(run_tag("tour"), seed=settings.seed, domain_id=settings.domain_id,
                     out_dir=settings.out_dir) as plan:
        if announce is not None:
            announce(plan)
        demo_ids = _timed(timings, "record", lambda: record_demonstrations(
            settings, plan, progress))
    tag = plan.tag
    joints = tuple(joint.name for joint in plant.joints)
    mechanism = plant.mechanism
    # The learner node's path: exactly this run's demonstrations (by tag), the recorded estimate
    # clipped to the target's stiffness range, NaN (no estimate) bridged by the learner.
    request = LearnRequest(
        skill=SKILL, joints=joints, tags=(tag,), min_demonstrations=len(demo_ids),
        options={"n_basis": 30,
                 "stiffness_range": (mechanism.stiffness_min, mechanism.stiffness_max),
                 "target_inertia": [joint.inertia for joint in plant.joints]})
    with DemoStore(settings.store, durable=False) as store:
        def learn():
            with progress_bar("learn", 1, "skill", progress) as bar:
                outcome = learn_from_store(store, request)
                bar.update(1)
            return outcome.stored.skill, outcome.stored.record

        skill, record = _timed(timings, "learn", learn)
        setup = ReplaySetup(skill, plant, duration_s=settings.duration_s,
                            settle_s=settings.settle_s, goal=settings.goal)
        job = ReplayCampaign(setup, default_campaign_spec(len(joints), setup.movement_s),
                             settings.n_scenarios, seed=plan.seed)

        def campaign_run():
            with campaign_progress(progress) as bars:
                return run_campaign(store, job, skill_id=record.id, workers=settings.workers,
                                    scheduler=settings.scheduler, on_start=bars.on_start,
                                    on_batch=bars.on_batch)

        campaign = _timed(timings, "campaign", campaign_run)

        def report():
            with progress_bar("report", 2, "step", progress) as bar:
                content = collect_report_content(
                    store, SKILL, version=record.version, campaign_id=campaign.campaign_id,
                    plant=plant, truth=GroundTruth.from_npz(plan.truth_path), criteria=criteria)
                bar.update(1)
                files = write_report(content, plan.out_dir)
                bar.update(1)
            return content, files

        content, files = _timed(timings, "report", report)
        assert content.verdict is not None  # collect_report_content always judges the skill
        verdict_id = record_verdict(store, content.verdict, skill_id=record.id, plant=plant,
                                    criteria=criteria, campaign_id=campaign.campaign_id)
    timings["total"] = round(time.perf_counter() - started, 3)
    return TourResult(
        store=settings.store,
        plan=plan,
        demonstration_ids=tuple(demo_ids),
        skill_id=record.id,
        skill_version=record.version,
        campaign=campaign,
        report=files.html,
        figures=files.figures,
        summary=content.summary,
        verdict=content.verdict,
        verdict_id=verdict_id,
        plant_digest=plant.digest,
        criteria_digest=criteria.digest,
        timings_s=timings,
    )
