"""Perturbation campaigns: many seeded replays of one skill in batches, streamed into the store.

A campaign is a fixed list of scenario indexes ``0 .. n_scenarios-1`` cut into batches with fixed
boundaries. Each batch runs through one module-level function, :func:`run_batch`, either on a local
process pool (default, all cores) or on a Dask ``distributed`` cluster given its scheduler address;
the batch function and its inputs are the same on both, and every random draw comes from seeds
derived from the campaign seed and the batch or scenario index, so both give equal results. The
parent process writes each batch's results to the store as soon as the batch finishes, so an
interrupted campaign keeps every finished batch and a resumed one skips the scenario indexes the
store already holds.
"""

from __future__ import annotations

import concurrent.futures as cf
import json
import math
import multiprocessing
import os
import re
import socket
import sys
import time
from collections.abc import Callable, Generator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any, Protocol

import numpy as np

from compliant_demo.energy_tank import scenario_energy
from compliant_demo.evaluation import ACTUATOR_LOADS
from compliant_demo.exceptions import InvalidInputError, UnstableStepError
from compliant_demo.generalisation import ScenarioTarget, draw_target
from compliant_demo.perturbation import (
    CampaignSpec,
    Fixed,
    LogUniform,
    PerturbationSchedule,
    Uniform,
    draw_scenarios,
    place_relative_walls,
)
from compliant_demo.plant import ReplayPlant
from compliant_demo.plant_variation import (
    FailureDriver,
    campaign_failure_drivers,
    check_plant_variation,
    vary_plant,
)
from compliant_demo.primitives import Skill
from compliant_demo.replay import UNPERTURBED, ReplaySetup
from compliant_demo.sim import SimResult
from compliant_demo.store.records import ReplayParameters

__all__ = [
    "MAX_SCENARIOS",
    "TRACE_CHANNELS",
    "ScenarioOutcome",
    "CampaignJob",
    "ReplayCampaign",
    "CampaignSummary",
    "default_campaign_spec",
    "scenario_seed",
    "plan_batches",
    "run_batch",
    "run_campaign",
]

#: Third word of the seed sequence of a scenario's goal and duration draw (its schedule uses
#: the pair (seed, index) alone).
_TARGET_STREAM = 1
#: Third word of the seed of a scenario's plant draw: its own stream, apart from the schedule's
#: and the target's.
_PLANT_STREAM = 2

#: Most scenarios of one campaign.
MAX_SCENARIOS = 1_000_000

#: Trace channels a campaign keeps per scenario (besides ``t``), each (n_rec, n_joints).
TRACE_CHANNELS: tuple[str, ...] = ("q", "tau_external", "tau_mechanism", "stiffness_realised")


@dataclass(frozen=True)
class ScenarioOutcome:
    """What one perturbed replay produced, ready for ``DemoStore.save_replay_result``.

    Attributes
    ----------
    index : scenario index inside its campaign
    kind : perturbation kind of the scenario (``"impulse"``, ``"wall"``, ...)
    status : ``"ok"`` or ``"stopped"`` (a limit stopped the replay)
    reason : why the replay stopped, or None
    metrics : outcome metrics, SI units (see :func:`compliant_demo.evaluation.outcome_metrics`)
    parameters : the scenario's perturbation parameters, JSON-serialisable
    trace : named arrays of the decimated trace; ``t`` in s, angles in rad, torques in N*m
    plant : the drawn plant the scenario ran on (JSON), or None: the campaign's nominal plant
    target : the scenario's drawn goal and duration, or None when the campaign draws none
    """

    index: int
    kind: str
    status: str
    reason: str | None
    metrics: dict[str, Any]
    parameters: dict[str, Any]
    trace: dict[str, np.ndarray] = field(default_factory=dict)
    plant: dict[str, Any] | None = None
    target: ScenarioTarget | None = None


class CampaignJob(Protocol):
    """Everything a worker needs to run any batch of one campaign; must pickle.

    ``config()`` is stored with the campaign so a resumed run can check it matches.
    """

    @property
    def n_scenarios(self) -> int: ...

    def config(self) -> dict[str, Any]: ...

    def run_batch(self, batch_index: int, indexes: Sequence[int]) -> list[ScenarioOutcome]: ...


@dataclass(frozen=True)
class ReplayCampaign:
    """A skill replayed on a simulated plant under seeded perturbations: a :class:`CampaignJob`.

    Parameters
    ----------
    setup : the replay every scenario runs (skill, plant, duration, settle time, ...)
    spec : distributions the perturbations are drawn from
    n_scenarios : number of perturbed scenarios
    seed : campaign seed; scenario i draws its schedule from ``scenario_seed(seed, i)``
    decimation : steps per recorded trace sample
    stratify_kinds : scenario i gets kind ``sorted(spec.kinds)[i % n_kinds]``, so every kind has
        an equal share whatever the batch; False draws kinds by the spec's weights
    recovery_band : deviation from the unperturbed replay that counts as recovered, rad

    Notes
    -----
    Each batch simulates its scenarios plus one unperturbed scenario in one vectorised call of
    :meth:`compliant_demo.replay.ReplaySetup.simulate`. Deviation, recovery and peak deviation are
    measured against that unperturbed replay (so the joint's own tracking lag under gravity is
    not blamed on the perturbation); goal error against the rollout's goal. A scenario whose
    recorded samples leave a limit (:meth:`ReplaySetup.violation`) gets status ``"violation"``
    and the first violation as its reason.

    A spec that draws goal offsets or a duration scale (:meth:`target`) gives every scenario
    its own commands: each is then simulated with its own unperturbed replay (same goal and
    duration), seeded by ``scenario_seed(seed, index)``, at about the cost of a batch of two
    per scenario. Perturbation onsets are drawn in s as without these draws.
    """

    setup: ReplaySetup
    spec: CampaignSpec
    n_scenarios: int
    seed: int = 0
    decimation: int = 10
    stratify_kinds: bool = True
    recovery_band: float = 0.02

    def __post_init__(self) -> None:
        if self.n_scenarios < 1:
            raise InvalidInputError(f"n_scenarios = {self.n_scenarios}: must be >= 1")
        if self.n_scenarios > MAX_SCENARIOS:  # its batches are planned up front
            raise InvalidInputError(f"n_scenarios = {self.n_scenarios}: at most {MAX_SCENARIOS:,}")
        if self.decimation < 1:
            raise InvalidInputError(f"decimation = {self.decimation}: must be >= 1")
        check_plant_variation(self.setup.plant, self.spec.plant_variation)

    @property
    def skill(self) -> Skill:
        """The replayed skill."""
        return self.setup.skill

    @property
    def plant(self) -> ReplayPlant:
        """The simulated target."""
        return self.setup.plant

    def config(self) -> dict[str, Any]:
        """JSON-ready description stored with the campaign."""
        setup = self.setup
        config: dict[str, Any] = {
            "skill": setup.skill.name,
            "n_scenarios": self.n_scenarios,
            "seed": self.seed,
            "duration_s": setup.duration_s,
            "settle_s": setup.settle_s,
            "dt": setup.dt,
            "decimation": self.decimation,
            "method": setup.method,
            "stratify_kinds": self.stratify_kinds,
            "recovery_band": self.recovery_band,
            "spec": self.spec.model_dump(mode="json", exclude=self._legacy_spec_fields()),
            "plant": setup.plant.model_dump(mode="json"),
        }
        # only when set, so campaigns stored before these settings existed still resume
        if setup.goal is not None:
            config["goal"] = list(setup.goal)
        if math.isfinite(setup.max_stiffness_rate):
            config["max_stiffness_rate"] = setup.max_stiffness_rate
        if not setup.feedforward:
            config["feedforward"] = False
        return config

    def _legacy_spec_fields(self) -> set[str]:
        """Spec fields left out of the stored config: those at the value campaigns stored
        before the field existed ran with, so their configs still match on resume."""
        legacy: dict[str, Any] = {"wall_side": "as_drawn", "plant_variation": {}}
        return {name for name, value in legacy.items() if getattr(self.spec, name) == value}

    @classmethod
    def from_config(cls, skill: Skill, config: Mapping[str, Any]) -> ReplayCampaign:
        """Rebuild the job a stored campaign ran (``config`` as :meth:`config` wrote it)."""
        keys = ("n_scenarios", "seed", "duration_s", "settle_s", "dt", "decimation", "method",
                "stratify_kinds", "recovery_band", "plant", "spec")
        missing = [key for key in keys if key not in config]
        if missing:
            raise InvalidInputError(
                f"campaign config: lacks {missing}; not a campaign of perturbed replays")
        try:
            plant = ReplayPlant.model_validate(config["plant"])
            # a spec stored before wall_side existed placed its walls as drawn
            spec = CampaignSpec.model_validate({"wall_side": "as_drawn", **config["spec"]})
        except ValueError as exc:
            raise InvalidInputError(
                f"campaign config: {str(exc).splitlines()[0]}") from None
        goal = config.get("goal")
        setup = ReplaySetup(
            skill, plant, dt=config["dt"], duration_s=config["duration_s"],
            settle_s=config["settle_s"], method=config["method"],
            goal=None if goal is None else tuple(goal),
            max_stiffness_rate=config.get("max_stiffness_rate", math.inf),
            feedforward=config.get("feedforward", True),
        )
        return cls(setup, spec, config["n_scenarios"], seed=config["seed"],
                   decimation=config["decimation"], stratify_kinds=config["stratify_kinds"],
                   recovery_band=config["recovery_band"])

    def unperturbed(self) -> tuple[np.ndarray, np.ndarray]:
        """Time (s) and angles ((n_rec, n_joints), rad) of the replay without perturbation."""
        result = self.setup.simulate([UNPERTURBED], self.seed, decimation=self.decimation)
        return result.t, result.q[:, 0, :]

    def schedule(self, index: int) -> PerturbationSchedule:
        """The perturbation schedule of scenario ``index``; the same whatever the batching."""
        spec = self.spec
        if self.stratify_kinds:
            kinds = sorted(spec.kinds)
            spec = spec.model_copy(update={"kinds": {kinds[index % len(kinds)]: 1.0}})
        (drawn,) = draw_scenarios(spec, 1, scenario_seed(self.seed, index))
        drawn = place_relative_walls(drawn, self._path_excursion, self.spec.wall_side)
        return drawn.model_copy(update={"name": f"{self.spec.name}_{index:05d}"})

    def target(self, index: int) -> ScenarioTarget | None:
        """Goal and duration of scenario ``index`` when the spec draws them, else None; drawn
        from a stream of its own, so the scenario's perturbations stay as without them."""
        spec, setup = self.spec, self.setup
        if not spec.goal_offset_rad and spec.duration_scale is None:
            return None
        limits = np.array([(j.lower_limit, j.upper_limit) for j in setup.joints])
        if setup.skill.position_limits is not None:
            own = np.asarray(setup.skill.position_limits)
            limits = np.column_stack([np.maximum(limits[:, 0], own[:, 0]),
                                      np.minimum(limits[:, 1], own[:, 1])])
        goal = setup.skill.goal if setup.goal is None else setup.goal
        seed = np.random.SeedSequence([int(self.seed), int(index), _TARGET_STREAM])
        return draw_target(spec, goal, setup.movement_s, limits,
                           int(seed.generate_state(1)[0]))

    def _path_excursion(self, joint: int, onset_s: float, duration_s: float) -> float:
        """Largest displacement of the commanded path of ``joint`` from its angle at ``onset_s``
        within ``[onset_s, onset_s + duration_s]``, signed, rad."""
        path = self.setup.rollout.position[:, joint]
        first = min(round(onset_s / self.setup.dt), len(path) - 1)
        last = len(path) - 1 if math.isinf(duration_s) else min(
            round((onset_s + duration_s) / self.setup.dt), len(path) - 1)
        moved = path[first:last + 1] - path[first]
        return float(moved[int(np.argmax(np.abs(moved)))])

    def drawn_plant(self, index: int) -> tuple[ReplayPlant, dict[str, dict[str, float]]]:
        """The plant scenario ``index`` runs on and its factors per parameter and joint
        (:func:`compliant_demo.plant_variation.vary_plant`); the same whatever the batching."""
        rng = np.random.default_rng([int(self.seed), int(index), _PLANT_STREAM])
        return vary_plant(self.setup.plant, self.spec.plant_variation, rng)

    def run_batch(self, batch_index: int, indexes: Sequence[int]) -> list[ScenarioOutcome]:
        """Simulate scenarios ``indexes`` plus one unperturbed run and evaluate each.

        A scenario with a drawn goal and duration, or (``plant_variation``) its own drawn plant,
        runs alone together with its unperturbed twin on the same target and plant (deviations
        are then the perturbation's, not the difference from the nominal replay), one
        simulation per scenario.
        """
        schedules = [self.schedule(i) for i in indexes]
        targets = [self.target(i) for i in indexes]
        if not self.spec.plant_variation and all(target is None for target in targets):
            result = self.setup.simulate([*schedules, UNPERTURBED],
                                         scenario_seed(self.seed, batch_index),
                                         decimation=self.decimation)
            return [self._outcome(self.setup, result, column, len(schedules), index, schedule)
                    for column, (index, schedule) in enumerate(zip(indexes, schedules,
                                                                   strict=True))]
        return [self._run_alone(index, schedule, target)
                for index, schedule, target in zip(indexes, schedules, targets, strict=True)]

    def _run_alone(self, index: int, schedule: PerturbationSchedule,
                   target: ScenarioTarget | None) -> ScenarioOutcome:
        """Scenario ``index`` on its own target and drawn plant, with its unperturbed twin."""
        setup = self.setup if target is None else replace(
            self.setup, goal=target.goal, duration_s=target.duration_s)
        plant, factors = self.drawn_plant(index) if self.spec.plant_variation else (None, None)
        try:
            result = setup.simulate([schedule, UNPERTURBED], scenario_seed(self.seed, index),
                                    decimation=self.decimation, plant=plant)
        except UnstableStepError as exc:
            if plant is None:
                raise
            raise UnstableStepError(
                f"scenario {index} on its drawn plant (factors {factors}): {exc}") from None
        outcome = self._outcome(setup, result, 0, 1, index, schedule, target)
        if plant is None:
            return outcome
        return replace(outcome, metrics={**outcome.metrics, "plant_factors": factors},
                       plant=plant.model_dump(mode="json"))

    def _outcome(self, setup: ReplaySetup, result: SimResult, column: int, nominal_column: int,
                 index: int, schedule: PerturbationSchedule,
                 target: ScenarioTarget | None = None) -> ScenarioOutcome:
        """Metrics, limit check and trace of scenario ``column`` of ``result`` (a simulation of
        ``setup``) against the unperturbed scenario ``nominal_column``."""
        q, tau_mechanism = result.q[:, column, :], result.tau_mechanism[:, column, :]
        metrics = setup.metrics(
            result.t, q, result.q[:, nominal_column, :], result.tau_external[:, column, :],
            tau_mechanism, schedule, scenario_energy(result, column),
            recovery_band=self.recovery_band,
        )
        loads = {name: getattr(result, name)[:, column, :] for name in ACTUATOR_LOADS}
        # the command in force at recorded sample r (t = r * decimation * dt) is the one before
        steps = np.arange(len(result.t)) * self.decimation - 1
        reason = setup.violation(result.t, q, tau_mechanism, steps, loads)
        trace = {"t": result.t.copy()}
        trace.update({name: getattr(result, name)[:, column, :].copy()
                      for name in TRACE_CHANNELS})
        return ScenarioOutcome(
            index=index,
            kind=schedule.kind_label,
            status="ok" if reason is None else "violation",
            reason=reason,
            metrics=metrics,
            parameters=schedule.model_dump(mode="json"),
            trace=trace,
            target=target,
        )



@dataclass(frozen=True)
class CampaignSummary:
    """What :func:`run_campaign` did.

    Attributes
    ----------
    campaign_id : the campaign's id in the store
    n_scenarios : scenarios in the campaign
    n_run : scenarios run and stored by this call
    n_skipped : scenarios already in the store (resume) and not run again
    n_violations : scenarios of this call whose replay left a joint's torque or angle limits
    n_untouched_walls : scenarios of this call with a wall the link never touched (status
        ``"untouched"`` in their ``perturbation_status``, not counted as recovered)
    failure_drivers : with ``plant_variation``, every drawn factor of the whole campaign ranked
        by how it separates failed from passed scenarios, strongest first (a screening measure,
        :func:`compliant_demo.plant_variation.failure_drivers`); empty otherwise
    wall_s : wall time of this call, s
    backend : ``"inline"``, ``"processes"`` or ``"dask"``
    workers : worker processes used (Dask: workers of the cluster)
    """

    campaign_id: str
    n_scenarios: int
    n_run: int
    n_skipped: int
    n_violations: int
    wall_s: float
    backend: str
    workers: int
    n_untouched_walls: int = 0
    failure_drivers: tuple[FailureDriver, ...] = ()

    @property
    def scenarios_per_s(self) -> float:
        """Scenarios run per wall second by this call."""
        return self.n_run / self.wall_s if self.wall_s > 0 else float("nan")


def default_campaign_spec(n_joints: int = 2, movement_s: float = 6.0) -> CampaignSpec:
    """Perturbations sized for the cork_seat bench arm (inertia 0.03-0.08 kg*m^2, 4-40 N*m/rad).

    Every kind with equal weight, on any joint, starting between 8 % and 75 % of the movement's
    duration ``movement_s`` (s); windows and contacts last long enough to watch the recovery.
    Magnitudes range from barely noticeable to pushing a soft joint a few tenths of a radian
    (invented for the demo, not taken from a standard).
    """
    if not movement_s > 0:
        raise InvalidInputError(f"movement_s = {movement_s}: must be > 0 s")
    return CampaignSpec(
        name="cork_seat_campaign",
        kinds={kind: 1.0 for kind in (
            "impulse", "torque_step", "torque_window", "sinusoid", "random_torque", "wall", "hold"
        )},
        joints=list(range(n_joints)),
        perturbations_per_scenario=1,
        positive_sign_probability=0.5,
        onset_s=Uniform(low=0.08 * movement_s, high=0.75 * movement_s),
        duration_s={
            "torque_step": Uniform(low=0.2, high=1.0),
            "torque_window": Uniform(low=0.1, high=0.4),
            "sinusoid": Uniform(low=0.5, high=1.5),
            "random_torque": Uniform(low=0.5, high=1.5),
            "wall": Uniform(low=0.3, high=1.5),
            "hold": Uniform(low=0.2, high=1.5),
        },
        magnitude={
            "impulse": LogUniform(low=0.01, high=0.15),
            "torque_step": Uniform(low=0.2, high=2.0),
            "torque_window": Uniform(low=0.5, high=3.0),
            "sinusoid": Uniform(low=0.2, high=1.0),
            "random_torque": Uniform(low=0.2, high=1.0),
            "wall": LogUniform(low=200.0, high=2000.0),
        },
        fields={
            "sinusoid": {"frequency_hz": Uniform(low=0.5, high=5.0)},
            "random_torque": {"bandwidth_hz": Uniform(low=5.0, high=10.0)},
            "wall": {"position": Uniform(low=0.02, high=0.1), "relative": Fixed(value=1.0)},
        },
    )


def scenario_seed(campaign_seed: int, index: int) -> int:
    """Seed of scenario (or batch) ``index`` of a campaign: independent of batching and backend.

    Derived with :class:`numpy.random.SeedSequence` from the pair, so neighbouring indexes give
    statistically independent streams.
    """
    if index < 0:
        raise InvalidInputError(f"index = {index}: must be >= 0")
    return int(np.random.SeedSequence([int(campaign_seed), int(index)]).generate_state(1)[0])


def plan_batches(
    n_scenarios: int, batch_size: int, completed: set[int] | frozenset[int] = frozenset()
) -> list[tuple[int, tuple[int, ...]]]:
    """Batches still to run, as ``(batch_index, scenario indexes of the whole batch)``.

    Batch ``b`` always holds indexes ``b*batch_size .. (b+1)*batch_size - 1`` so that its random
    draws do not depend on what already ran; a batch is left out only when every index in it is
    in ``completed``.
    """
    if n_scenarios < 1:
        raise InvalidInputError(f"n_scenarios = {n_scenarios}: must be >= 1")
    if batch_size < 1:
        raise InvalidInputError(f"batch_size = {batch_size}: must be >= 1")
    batches = []
    for batch_index, start in enumerate(range(0, n_scenarios, batch_size)):
        indexes = tuple(range(start, min(start + batch_size, n_scenarios)))
        if not set(indexes) <= completed:
            batches.append((batch_index, indexes))
    return batches


def run_batch(
    job: CampaignJob, batch_index: int, indexes: Sequence[int]
) -> list[ScenarioOutcome]:
    """Run one batch of ``job``: the single function both local pools and Dask workers call."""
    return job.run_batch(batch_index, tuple(indexes))


BatchResults = Generator[list[ScenarioOutcome], None, None]


def _inline_results(job: CampaignJob, batches: list[tuple[int, tuple[int, ...]]]) -> BatchResults:
    # One batch at a time: nothing of a batch outlives the caller's use of it.
    for batch_index, indexes in batches:
        yield run_batch(job, batch_index, indexes)


#: prctl(2) option that has the kernel signal a process when its parent dies (linux/prctl.h).
_PR_SET_PDEATHSIG = 1
#: SIGKILL's number, fixed by the Linux ABI on every architecture (signal(7)); prctl exists only
#: there. Spelled out because the core does not import the signal module, whose place is the
#: command line; SIGKILL and not SIGTERM: a worker blocked in a pipe write must still go.
_PARENT_DEATH_SIGNAL = 9
#: Batches handed to the pool or cluster per worker before the first is taken back: one running,
#: one queued, so workers never wait and finished batches do not pile up in the parent.
_IN_FLIGHT_PER_WORKER = 2


def _die_with_parent(parent_pid: int) -> None:
    """Pool worker initializer: the kernel kills this worker when its parent dies (Linux).

    PR_SET_PDEATHSIG fires when the thread that started the worker ends; the pool's workers are
    started from the thread that iterates the campaign, which lives as long as the pool.
    """
    if not sys.platform.startswith("linux"):
        return
    import ctypes

    libc = ctypes.CDLL(None, use_errno=True)
    if libc.prctl(_PR_SET_PDEATHSIG, _PARENT_DEATH_SIGNAL, 0, 0, 0) != 0:
        errno = ctypes.get_errno()
        raise OSError(errno, f"prctl(PR_SET_PDEATHSIG) failed: {os.strerror(errno)}")
    if os.getppid() != parent_pid:
        # The parent died before the request took effect: nobody is left to signal us.
        os._exit(1)


def _pool_context() -> multiprocessing.context.BaseContext:
    # fork: workers start with numpy, scipy and the job's modules already imported (a fresh
    # interpreter spends seconds importing scipy.signal), and scripts need no __main__ guard.
    # The workers only compute on their arguments; they never touch the parent's store or locks.
    if "fork" in multiprocessing.get_all_start_methods():
        return multiprocessing.get_context("fork")
    return multiprocessing.get_context("spawn")


def _pool_results(
    job: CampaignJob, batches: list[tuple[int, tuple[int, ...]]], workers: int
) -> BatchResults:
    # Submitted lazily, a bounded number in flight; a finished future is dropped as soon as its
    # result is taken, so the parent's memory does not grow with the number of batches.
    todo = iter(batches)
    in_flight: set[cf.Future[list[ScenarioOutcome]]] = set()
    with cf.ProcessPoolExecutor(
        max_workers=workers, mp_context=_pool_context(), initializer=_die_with_parent,
        initargs=(os.getpid(),),
    ) as pool:

        def submit_next() -> None:
            batch = next(todo, None)
            if batch is not None:
                in_flight.add(pool.submit(run_batch, job, *batch))

        try:
            for _ in range(_IN_FLIGHT_PER_WORKER * workers):
                submit_next()
            while in_flight:
                done, _ = cf.wait(in_flight, return_when=cf.FIRST_COMPLETED)
                in_flight.difference_update(done)
                while done:
                    outcomes = done.pop().result()
                    submit_next()
                    yield outcomes
        finally:
            for future in in_flight:
                future.cancel()


def _dask_client(scheduler: str) -> Any:
    try:
        from distributed import Client
    except ImportError:
        raise InvalidInputError(
            f"scheduler = {scheduler!r}: Dask is not installed; "
            "install the extra with pip install 'compliant_demo[dask]'"
        ) from None
    host, port = _scheduler_address(scheduler)
    try:
        # A plain connection first, bounded in time: a Client that cannot reach its scheduler
        # spends another 20 s closing itself when it is collected.
        socket.create_connection((host, port), timeout=_CONNECT_TIMEOUT_S).close()
        return Client(scheduler, set_as_default=False, timeout="10s")
    except (OSError, TimeoutError, ValueError) as exc:
        reason = str(exc) or type(exc).__name__
        raise InvalidInputError(
            f"scheduler = {scheduler!r}: cannot connect to the Dask scheduler ({reason})"
        ) from None


_CONNECT_TIMEOUT_S = 5.0
_ADDRESS = re.compile(r"^(?:tcp://)?(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+):(\d{1,5})$")


def _scheduler_address(scheduler: str) -> tuple[str, int]:
    """(host, port) of a Dask scheduler address ``[tcp://]host:port``; InvalidInputError
    naming the value otherwise."""
    match = _ADDRESS.match(scheduler)
    port = int(match.group(2)) if match else 0
    if match is None or not 1 <= port <= 65535:
        raise InvalidInputError(
            f"scheduler = {scheduler!r}: expected an address tcp://HOST:PORT (port 1 to 65535)"
        )
    return match.group(1).strip("[]"), port


def _dask_results(
    job: CampaignJob, batches: list[tuple[int, tuple[int, ...]]], scheduler: str
) -> BatchResults:
    from distributed import as_completed

    with _dask_client(scheduler) as client:
        # One copy of the job per worker instead of one per batch.
        (job_on_cluster,) = client.scatter([job], broadcast=True)
        # As on the local pool: a bounded number in flight, and the last reference to each
        # future dropped once its result is here, which releases the result on the cluster.
        todo = iter(batches)
        in_flight: set[Any] = set()
        finished = as_completed(loop=client.loop)

        def submit_next() -> None:
            batch = next(todo, None)
            if batch is not None:
                future = client.submit(run_batch, job_on_cluster, *batch, pure=False)
                in_flight.add(future)
                finished.add(future)

        try:
            for _ in range(_IN_FLIGHT_PER_WORKER * max(1, sum(client.nthreads().values()))):
                submit_next()
            while in_flight:
                future = next(finished)
                in_flight.discard(future)
                outcomes = future.result()
                del future
                submit_next()
                yield outcomes
        finally:
            client.cancel(list(in_flight))


def _dask_worker_count(scheduler: str) -> int:
    with _dask_client(scheduler) as client:
        return len(client.scheduler_info(n_workers=-1)["workers"])


def run_campaign(
    store: Any,
    job: CampaignJob,
    *,
    skill_id: str,
    campaign_id: str | None = None,
    batch_size: int | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    on_start: Callable[[str, int], None] | None = None,
    on_batch: Callable[[list[ScenarioOutcome]], None] | None = None,
) -> CampaignSummary:
    """Run (or resume) a campaign and stream its results into ``store``.

    Parameters
    ----------
    store : an open :class:`compliant_demo.store.DemoStore`
    job : the campaign's job; ``job.config()`` is stored with a new campaign
    skill_id : id of the skill the campaign replays
    campaign_id : resume this campaign (its completed scenario indexes are skipped); None starts
        a new one
    batch_size : scenarios per batch (one vectorised simulation each); None picks about three
        batches per worker, 8 to 100 scenarios each. A resumed campaign keeps its own.
    workers : local worker processes; None uses every core; 0 runs the batches in this process
    scheduler : address of a Dask scheduler (``tcp://host:port``); the batches run there
        instead of locally, through the same :func:`run_batch`
    on_start : called once the campaign is created or found, before any batch runs, with its
        id and the number of scenarios this call will run (for progress displays)
    on_batch : called with each batch's outcomes after they are stored

    Returns
    -------
    CampaignSummary
    """
    if workers is not None and workers < 0:
        raise InvalidInputError(f"workers = {workers}: must be >= 0 (0 runs in this process)")
    if scheduler is not None and workers is not None:
        raise InvalidInputError(
            f"workers = {workers} and scheduler = {scheduler!r}: choose one; "
            "a Dask cluster decides its own workers"
        )
    started = time.perf_counter()
    if scheduler is not None:
        backend, n_workers = "dask", _dask_worker_count(scheduler)
    elif workers == 0:
        backend, n_workers = "inline", 0
    else:
        backend, n_workers = "processes", workers or os.cpu_count() or 1
    if campaign_id is None:
        if batch_size is None:
            batch_size = _auto_batch_size(job.n_scenarios, n_workers)
        config = dict(job.config(), batch_size=batch_size)
        campaign_id = store.create_campaign(skill_id, config)
        completed: set[int] = set()
    else:
        batch_size = _resumable_batch_size(store, job, skill_id, campaign_id, batch_size)
        completed = set(store.completed_scenarios(campaign_id))
    batches = plan_batches(job.n_scenarios, batch_size, completed)
    to_run = sum(len(set(idx) - completed) for _, idx in batches)

    if not batches:
        backend, n_workers = "inline", 0
    if backend == "dask" and scheduler is not None:
        results = _dask_results(job, batches, scheduler)
    elif backend == "inline":
        results = _inline_results(job, batches)
    else:
        n_workers = min(n_workers, len(batches))
        results = _pool_results(job, batches, n_workers)

    if on_start is not None:
        on_start(campaign_id, to_run)
    n_run = n_violations = n_untouched = 0
    try:
        for outcomes in results:
            fresh = [o for o in outcomes if o.index not in completed]
            _store_outcomes(store, skill_id, campaign_id, fresh)
            completed.update(o.index for o in fresh)
            n_run += len(fresh)
            n_violations += sum(o.status != "ok" for o in fresh)
            n_untouched += sum(o.metrics.get("n_untouched", 0) > 0 for o in fresh)
            if on_batch is not None:
                on_batch(fresh)
    finally:
        results.close()
    return CampaignSummary(
        campaign_id=campaign_id,
        n_scenarios=job.n_scenarios,
        n_run=n_run,
        n_skipped=job.n_scenarios - to_run,
        n_violations=n_violations,
        wall_s=time.perf_counter() - started,
        backend=backend,
        workers=n_workers,
        n_untouched_walls=n_untouched,
        failure_drivers=tuple(campaign_failure_drivers(
            store.find_replay_results(campaign_id=campaign_id))),
    )


def _auto_batch_size(n_scenarios: int, n_workers: int) -> int:
    # Each batch has a fixed cost (one Python-level loop over the time steps) that a wider batch
    # shares; about three batches per worker keeps all workers busy to the end.
    return int(min(100, max(8, math.ceil(n_scenarios / (3 * max(n_workers, 1))))))


def _resumable_batch_size(
    store: Any, job: CampaignJob, skill_id: str, campaign_id: str, batch_size: int | None
) -> int:
    """The stored campaign's batch size, after checking it is the same skill and settings."""
    info = store.get_campaign(campaign_id)
    stored = dict(info.config)
    stored_batch = int(stored.pop("batch_size"))
    if info.skill_id != skill_id:
        raise InvalidInputError(
            f"campaign_id = {campaign_id!r}: replays skill {info.skill_id!r}, not {skill_id!r}"
        )
    if json.loads(json.dumps(job.config())) != stored:
        changed = sorted(k for k in set(stored) | set(job.config())
                         if json.loads(json.dumps(job.config().get(k))) != stored.get(k))
        raise InvalidInputError(
            f"campaign_id = {campaign_id!r}: settings {changed} differ from the stored campaign"
        )
    if batch_size is not None and batch_size != stored_batch:
        raise InvalidInputError(
            f"batch_size = {batch_size}: campaign {campaign_id!r} runs in batches of "
            f"{stored_batch}"
        )
    return stored_batch


def _store_outcomes(
    store: Any, skill_id: str, campaign_id: str, outcomes: list[ScenarioOutcome]
) -> None:
    for outcome in outcomes:
        store.save_replay_result(
            skill_id=skill_id,
            metrics=outcome.metrics,
            parameters=ReplayParameters(
                source="campaign", kind=outcome.kind, schedule=outcome.parameters,
                scenario_index=outcome.index, plant=outcome.plant,
                goal=None if outcome.target is None else list(outcome.target.goal),
                duration_s=None if outcome.target is None else outcome.target.duration_s),
            status=outcome.status,
            reason=outcome.reason,
            trace=outcome.trace,
            campaign_id=campaign_id,
            scenario_index=outcome.index,
        )
