"""The same campaign on a local Dask cluster (loopback only) gives the local pool's results."""

from __future__ import annotations

import json

import distributed
import pytest
from campaign_support import campaign_job, store_with_demos_and_skill

from compliant_demo.campaign import run_campaign
from compliant_demo.cli import main
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.store import DemoStore


@pytest.fixture(scope="module")
def scheduler_address():
    # Scheduler and workers listen on 127.0.0.1 only; no dashboard.
    with distributed.LocalCluster(host="127.0.0.1", n_workers=2, threads_per_worker=1,
                                  processes=True, dashboard_address=None,
                                  worker_dashboard_address=None) as cluster:
        yield cluster.scheduler_address


def _results(store: DemoStore, campaign_id: str) -> dict[int, tuple]:
    return {r.scenario_index: (r.status, r.reason, r.metrics, r.parameters)
            for r in store.find_replay_results(campaign_id=campaign_id)}


def test_dask_results_equal_the_local_pool_for_the_same_seed(tmp_path, scheduler_address):
    assert scheduler_address.startswith("tcp://127.0.0.1:")
    skill_id = store_with_demos_and_skill(tmp_path / "s.sqlite")
    job = campaign_job(n_scenarios=14, seed=23)
    with DemoStore(tmp_path / "s.sqlite", durable=False) as store:
        local = run_campaign(store, job, skill_id=skill_id, batch_size=4, workers=2)
        on_dask = run_campaign(store, job, skill_id=skill_id, batch_size=4,
                               scheduler=scheduler_address)
        local_results = _results(store, local.campaign_id)
        dask_results = _results(store, on_dask.campaign_id)
        trace_local = store.load_replay_result(
            next(store.find_replay_results(campaign_id=local.campaign_id)).id).trace
        trace_dask = store.load_replay_result(
            next(store.find_replay_results(campaign_id=on_dask.campaign_id)).id).trace
    assert (on_dask.backend, on_dask.workers, on_dask.n_run) == ("dask", 2, 14)
    assert sorted(dask_results) == list(range(14))
    assert dask_results == local_results
    assert trace_local.keys() == trace_dask.keys()
    for name in trace_local:
        assert (trace_local[name] == trace_dask[name]).all(), name


def test_dask_resumes_a_campaign_the_local_pool_started(tmp_path, scheduler_address):
    skill_id = store_with_demos_and_skill(tmp_path / "s.sqlite")
    job = campaign_job(n_scenarios=9, seed=4)
    stop_after_first = []

    def interrupt(outcomes):
        stop_after_first.append(outcomes)
        raise KeyboardInterrupt

    with DemoStore(tmp_path / "s.sqlite", durable=False) as store:
        reference = run_campaign(store, job, skill_id=skill_id, batch_size=3, workers=0)
        with pytest.raises(KeyboardInterrupt):
            run_campaign(store, job, skill_id=skill_id, batch_size=3, workers=0,
                         on_batch=interrupt)
        (campaign_id,) = {r.campaign_id for r in store.find_replay_results()} - {
            reference.campaign_id}
        resumed = run_campaign(store, job, skill_id=skill_id, campaign_id=campaign_id,
                               scheduler=scheduler_address)
        assert (resumed.n_run, resumed.n_skipped) == (6, 3)
        assert _results(store, campaign_id) == _results(store, reference.campaign_id)


def test_an_unusable_scheduler_address_is_a_clear_error(tmp_path):
    skill_id = store_with_demos_and_skill(tmp_path / "s.sqlite")
    # Dask would take other protocols; campaigns use TCP only, so anything else is refused at once
    with DemoStore(tmp_path / "s.sqlite") as store, pytest.raises(
            InvalidInputError, match=r"scheduler = 'nosuch://127.0.0.1:1': expected an address "
                                     r"tcp://HOST:PORT"):
        run_campaign(store, campaign_job(), skill_id=skill_id, scheduler="nosuch://127.0.0.1:1")


def test_the_campaign_command_runs_on_the_scheduler_it_is_given(tmp_path, scheduler_address,
                                                                capsys):
    store_with_demos_and_skill(tmp_path / "s.sqlite")
    status = main(["campaign", "--store", str(tmp_path / "s.sqlite"), "--scenarios", "7",
                   "--duration", "1.5", "--settle", "0.3", "--scheduler", scheduler_address,
                   "--json"])
    captured = capsys.readouterr()
    assert status == 0, captured.err
    data = json.loads(captured.out)
    assert (data["backend"], data["workers"], data["run"]) == ("dask", 2, 7)
