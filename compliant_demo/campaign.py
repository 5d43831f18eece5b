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
import multiprocessing
import os
import sys
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np
from tqdm import tqdm

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "ScenarioOutcome",
    "CampaignJob",
    "CampaignSummary",
    "scenario_seed",
    "plan_batches",
    "run_batch",
    "run_campaign",
]


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
    """

    index: int
    kind: str
    status: str
    reason: str | None
    metrics: dict[str, float]
    parameters: dict[str, Any]
    trace: dict[str, np.ndarray] = field(default_factory=dict)


class CampaignJob(Protocol):
    """Everything a worker needs to run any batch of one campaign; must pickle.

    ``config()`` is stored with the campaign so a resumed run can check it matches.
    """

    n_scenarios: int

    def config(self) -> dict[str, Any]: ...

    def run_batch(self, batch_index: int, indexes: Sequence[int]) -> list[ScenarioOutcome]: ...


@dataclass(frozen=True)
class CampaignSummary:
    """What :func:`run_campaign` did.

    Attributes
    ----------
    campaign_id : the campaign's id in the store
    n_scenarios : scenarios in the campaign
    n_run : scenarios run and stored by this call
    n_skipped : scenarios already in the store (resume) and not run again
    n_stopped : scenarios of this call whose replay a limit stopped
    wall_s : wall time of this call, s
    backend : ``"inline"``, ``"processes"`` or ``"dask"``
    workers : worker processes used (Dask: workers of the cluster)
    """

    campaign_id: str
    n_scenarios: int
    n_run: int
    n_skipped: int
    n_stopped: int
    wall_s: float
    backend: str
    workers: int

    @property
    def scenarios_per_s(self) -> float:
        """Scenarios run per wall second by this call."""
        return self.n_run / self.wall_s if self.wall_s > 0 else float("nan")


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


BatchResults = Iterator[list[ScenarioOutcome]]


def _inline_results(job: CampaignJob, batches: list[tuple[int, tuple[int, ...]]]) -> BatchResults:
    for batch_index, indexes in batches:
        yield run_batch(job, batch_index, indexes)


def _pool_context() -> multiprocessing.context.BaseContext:
    # forkserver: workers start from a clean single-threaded server, so threads of the parent
    # (tqdm's monitor, a Dask client, SQLite) are never duplicated mid-state by fork.
    if "forkserver" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload(["compliant_demo.campaign", "numpy"])
        return context
    return multiprocessing.get_context("spawn")


def _pool_results(
    job: CampaignJob, batches: list[tuple[int, tuple[int, ...]]], workers: int
) -> BatchResults:
    with cf.ProcessPoolExecutor(max_workers=workers, mp_context=_pool_context()) as pool:
        futures = [pool.submit(run_batch, job, b, idx) for b, idx in batches]
        try:
            for future in cf.as_completed(futures):
                yield future.result()
        finally:
            for future in futures:
                future.cancel()


def _dask_results(
    job: CampaignJob, batches: list[tuple[int, tuple[int, ...]]], scheduler: str
) -> BatchResults:
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise InvalidInputError(
            f"scheduler = {scheduler!r}: Dask is not installed; "
            "install the extra with pip install 'compliant_demo[dask]'"
        ) from None
    try:
        client = Client(scheduler, set_as_default=False, timeout="10s")
    except (OSError, TimeoutError) as exc:
        raise InvalidInputError(
            f"scheduler = {scheduler!r}: cannot connect to the Dask scheduler ({exc})"
        ) from None
    with client:
        # One copy of the job per worker instead of one per batch.
        (job_on_cluster,) = client.scatter([job], broadcast=True)
        futures = [
            client.submit(run_batch, job_on_cluster, b, idx, pure=False) for b, idx in batches
        ]
        try:
            for future in as_completed(futures):
                yield future.result()
        finally:
            client.cancel(futures)


def _dask_worker_count(scheduler: str) -> int:
    from distributed import Client

    with Client(scheduler, set_as_default=False, timeout="10s") as client:
        return len(client.scheduler_info(n_workers=-1)["workers"])


def run_campaign(
    store: Any,
    job: CampaignJob,
    *,
    skill_id: str,
    campaign_id: str | None = None,
    batch_size: int = 25,
    workers: int | None = None,
    scheduler: str | None = None,
    progress: bool = False,
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
    batch_size : scenarios per batch (one vectorised simulation each)
    workers : local worker processes; None uses every core; 0 runs the batches in this process
    scheduler : address of a Dask scheduler (``tcp://host:port``); the batches run there
        instead of locally, through the same :func:`run_batch`
    progress : show a progress bar on stderr
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
    if campaign_id is None:
        config = dict(job.config(), batch_size=batch_size)
        campaign_id = store.create_campaign(skill_id, config)
        completed: set[int] = set()
    else:
        completed = set(store.completed_scenarios(campaign_id))
    batches = plan_batches(job.n_scenarios, batch_size, completed)
    to_run = sum(len(set(idx) - completed) for _, idx in batches)

    if scheduler is not None:
        backend, n_workers = "dask", _dask_worker_count(scheduler) if batches else 0
        results = _dask_results(job, batches, scheduler)
    elif workers == 0 or not batches:
        backend, n_workers = "inline", 0
        results = _inline_results(job, batches)
    else:
        n_workers = min(workers or os.cpu_count() or 1, len(batches))
        backend = "processes"
        results = _pool_results(job, batches, n_workers)

    n_run = n_stopped = 0
    with tqdm(
        total=to_run,
        desc="campaign",
        unit="scenario",
        file=sys.stderr,
        disable=not progress,
        leave=False,
    ) as bar:
        try:
            for outcomes in results:
                fresh = [o for o in outcomes if o.index not in completed]
                _store_outcomes(store, skill_id, campaign_id, fresh)
                completed.update(o.index for o in fresh)
                n_run += len(fresh)
                n_stopped += sum(o.status != "ok" for o in fresh)
                bar.update(len(fresh))
                if on_batch is not None:
                    on_batch(fresh)
        finally:
            results.close()
    return CampaignSummary(
        campaign_id=campaign_id,
        n_scenarios=job.n_scenarios,
        n_run=n_run,
        n_skipped=job.n_scenarios - to_run,
        n_stopped=n_stopped,
        wall_s=time.perf_counter() - started,
        backend=backend,
        workers=n_workers,
    )


def _store_outcomes(
    store: Any, skill_id: str, campaign_id: str, outcomes: list[ScenarioOutcome]
) -> None:
    for outcome in outcomes:
        store.save_replay_result(
            skill_id=skill_id,
            metrics=outcome.metrics,
            parameters=dict(outcome.parameters, kind=outcome.kind),
            status=outcome.status,
            reason=outcome.reason,
            trace=outcome.trace,
            campaign_id=campaign_id,
            scenario_index=outcome.index,
        )
