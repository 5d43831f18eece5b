"""Campaign runner: seeds and batches, equal results inline / process pool / Dask, streaming into
the store, interruption and resume, and the metric pipeline against a closed form."""

from __future__ import annotations

import math
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from campaign_support import (
    JOINTS,
    campaign_job,
    cork_seat_skill,
    plant,
    stationary_skill,
    store_with_demos_and_skill,
)

from compliant_demo.campaign import (
    ReplayCampaign,
    plan_batches,
    run_batch,
    run_campaign,
    scenario_seed,
)
from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.perturbation import PERTURBATION_KINDS, CampaignSpec, Fixed, Impulse
from compliant_demo.plant import load_plant
from compliant_demo.replay import ReplaySetup
from compliant_demo.store import DemoStore

ROOT = Path(__file__).resolve().parents[1]


def _by_index(store: DemoStore, campaign_id: str) -> dict[int, tuple[str, dict]]:
    return {r.scenario_index: (r.status, r.metrics)
            for r in store.find_replay_results(campaign_id=campaign_id)}


def test_scenario_seeds_are_stable_and_distinct():
    seeds = [scenario_seed(5, i) for i in range(1000)]
    assert seeds == [scenario_seed(5, i) for i in range(1000)]
    assert len(set(seeds)) == 1000
    assert scenario_seed(6, 0) != scenario_seed(5, 0)


def test_batches_keep_fixed_boundaries_and_skip_only_whole_completed_batches():
    assert plan_batches(7, 3) == [(0, (0, 1, 2)), (1, (3, 4, 5)), (2, (6,))]
    # Batch 1 is partly done: it runs again whole (same draws), batch 0 is done and skipped.
    assert plan_batches(7, 3, {0, 1, 2, 4}) == [(1, (3, 4, 5)), (2, (6,))]
    assert plan_batches(7, 3, set(range(7))) == []


@pytest.mark.parametrize(("n", "size", "message"), [
    (0, 3, r"n_scenarios = 0: must be >= 1"),
    (5, 0, r"batch_size = 0: must be >= 1"),
])
def test_bad_batch_plans_are_refused(n, size, message):
    with pytest.raises(InvalidInputError, match=message):
        plan_batches(n, size)


def test_scenario_schedule_does_not_depend_on_batching_and_covers_every_kind():
    job = campaign_job(n_scenarios=21)
    kinds = [job.schedule(i).kinds[0] for i in range(21)]
    assert kinds == [sorted(PERTURBATION_KINDS)[i % 7] for i in range(21)]
    single = run_batch(job, 0, (9,))[0]
    inside = {o.index: o for o in run_batch(job, 2, (8, 9, 10))}[9]
    assert single.parameters == inside.parameters
    assert single.metrics == inside.metrics


def test_bad_job_settings_are_refused():
    with pytest.raises(InvalidInputError, match=r"n_scenarios = 0: must be >= 1"):
        campaign_job(n_scenarios=0)
    # its batches are planned up front: 1e11 scenarios hung before the first one ran
    with pytest.raises(InvalidInputError, match=r"n_scenarios = 100000000000: at most 1,000,000"):
        campaign_job(n_scenarios=100_000_000_000)
    with pytest.raises(InvalidInputError, match=r"decimation = 0: must be >= 1"):
        campaign_job(decimation=0)
    with pytest.raises(InvalidInputError, match=r"settle_s: must be non-negative, got -1.0"):
        campaign_job(settle_s=-1.0)


def test_impulse_peak_deviation_matches_the_damped_oscillator(tmp_path):
    # Closed form of the impulse response of a damped second-order system (Ogata, Modern Control
    # Engineering, 5th ed., sec. 5-3): x(t) = v0/wd * exp(-zeta*wn*t) * sin(wd*t), whose peak is
    # v0/wn * exp(-zeta/sqrt(1 - zeta^2) * atan(sqrt(1 - zeta^2)/zeta)).
    stiffness, impulse = 40.0, 0.01
    skill = stationary_skill(stiffness)
    target = plant()
    spec = CampaignSpec(name="one_impulse", kinds={"impulse": 1.0}, joints=[1],
                        onset_s=Fixed(value=1.0), magnitude={"impulse": Fixed(value=impulse)},
                        positive_sign_probability=1.0)
    job = ReplayCampaign(ReplaySetup(skill, target, settle_s=0.5), spec, n_scenarios=1, seed=1,
                         decimation=1)
    (outcome,) = run_batch(job, 0, (0,))
    elbow = target.for_joints(JOINTS)[1]
    inertia = elbow.inertia
    damping = 2 * skill.damping_policy.zeta * math.sqrt(stiffness * inertia) + elbow.viscous_damping
    wn = math.sqrt(stiffness / inertia)
    zeta = damping / (2 * math.sqrt(stiffness * inertia))
    root = math.sqrt(1 - zeta**2)
    expected = impulse / inertia / wn * math.exp(-zeta / root * math.atan(root / zeta))
    measured = outcome.metrics["peak_deviation_rad"][1]
    # 0.5 %: the peak is sampled every 1 ms (measured agreement is about 1e-4).
    assert measured == pytest.approx(expected, rel=0.005)
    assert outcome.metrics["peak_deviation_rad"][0] < 1e-9  # the other joint is not touched
    assert outcome.kind == "impulse" and outcome.status == "ok"
    assert isinstance(outcome.parameters["perturbations"][0], dict)
    assert Impulse.model_validate(outcome.parameters["perturbations"][0]).magnitude == impulse


def test_process_pool_equals_inline_and_results_stream_into_the_store(tmp_path):
    skill_id = store_with_demos_and_skill(tmp_path / "s.sqlite")
    job = campaign_job(n_scenarios=14)
    streamed = []
    with DemoStore(tmp_path / "s.sqlite", durable=False) as store:
        inline = run_campaign(store, job, skill_id=skill_id, batch_size=4, workers=0)
        pooled = run_campaign(store, job, skill_id=skill_id, batch_size=4, workers=2,
                              on_batch=lambda outcomes: streamed.append(len(outcomes)))
        first, second = _by_index(store, inline.campaign_id), _by_index(store, pooled.campaign_id)
        config = store.get_campaign(pooled.campaign_id).config
    assert (inline.backend, pooled.backend, pooled.workers) == ("inline", "processes", 2)
    assert sorted(streamed) == [2, 4, 4, 4]  # one store write per finished batch
    assert sorted(first) == list(range(14))
    assert first == second
    assert config["seed"] == 5 and config["batch_size"] == 4 and config["n_scenarios"] == 14
    kinds = {status_metrics[0] for status_metrics in first.values()}
    assert kinds <= {"ok", "violation"}


def test_interrupted_campaign_keeps_finished_batches_and_resumes_to_the_same_results(tmp_path):
    skill_id = store_with_demos_and_skill(tmp_path / "s.sqlite")
    job = campaign_job(n_scenarios=10)
    calls = []

    def interrupt_after_two(outcomes):
        calls.append(len(outcomes))
        if len(calls) == 2:
            raise KeyboardInterrupt

    with DemoStore(tmp_path / "s.sqlite", durable=False) as store:
        reference = run_campaign(store, job, skill_id=skill_id, batch_size=3, workers=0)
        expected = _by_index(store, reference.campaign_id)
        with pytest.raises(KeyboardInterrupt):
            run_campaign(store, job, skill_id=skill_id, batch_size=3, workers=0,
                         on_batch=interrupt_after_two)
        (campaign_id,) = {r.campaign_id for r in store.find_replay_results()} - {
            reference.campaign_id}
        assert store.completed_scenarios(campaign_id) == set(range(6))
        resumed = run_campaign(store, job, skill_id=skill_id, campaign_id=campaign_id,
                               batch_size=3, workers=2)
        again = run_campaign(store, job, skill_id=skill_id, campaign_id=campaign_id,
                             batch_size=3, workers=2)
        assert _by_index(store, campaign_id) == expected
    assert (resumed.n_run, resumed.n_skipped) == (4, 6)
    assert (again.n_run, again.n_skipped, again.backend) == (0, 10, "inline")


def test_resume_of_an_unknown_campaign_is_a_clear_error(tmp_path):
    skill_id = store_with_demos_and_skill(tmp_path / "s.sqlite")
    with DemoStore(tmp_path / "s.sqlite") as store, pytest.raises(
            NotFoundError, match=r"campaign '00000000-0000-4000-8000-000000000000' not found"):
        run_campaign(store, campaign_job(), skill_id=skill_id,
                     campaign_id="00000000-0000-4000-8000-000000000000", workers=0)


def test_contradictory_backend_options_are_refused(tmp_path):
    with DemoStore(":memory:") as store:
        with pytest.raises(InvalidInputError, match=r"workers = -1: must be >= 0"):
            run_campaign(store, campaign_job(), skill_id="x", workers=-1)
        with pytest.raises(InvalidInputError, match=r"workers = 2 and scheduler = 'tcp://"):
            run_campaign(store, campaign_job(), skill_id="x", workers=2,
                         scheduler="tcp://127.0.0.1:1")


def test_traces_hold_every_channel_per_joint():
    (outcome,) = run_batch(campaign_job(n_scenarios=2, decimation=20), 0, (1,))
    n = outcome.trace["t"].size
    assert outcome.trace["t"][0] == 0.0 and np.all(np.diff(outcome.trace["t"]) > 0)
    for name in ("q", "tau_external", "tau_mechanism", "stiffness_realised"):
        assert outcome.trace[name].shape == (n, len(JOINTS)), name


_STARTED = r"campaign (?P<id>[0-9a-f-]{36}): started\n"


@pytest.mark.parametrize(("signum", "status", "message"), [
    (signal.SIGKILL, -signal.SIGKILL, _STARTED),
    # Ctrl-C on a terminal reaches the whole process group, the workers included.
    (signal.SIGINT, 130, _STARTED + r"campaign (?P=id): interrupted with \d+ of 16 scenarios "
     r"stored; resume with: compliant-demo campaign --store \S+ --resume (?P=id)\n"
     r"compliant-demo campaign: interrupted\n"),
])
def test_an_interrupted_campaign_command_keeps_what_it_stored_and_resumes_to_the_same_results(
        tmp_path, signum, status, message):
    # A real interruption of the command line process while batches stream in.
    path = tmp_path / "s.sqlite"
    skill_id = store_with_demos_and_skill(path)
    argv = ["campaign", "--store", str(path), "--scenarios", "16", "--seed", "9",
            "--batch-size", "2", "--workers", "1", "--duration", "1.5", "--settle", "0.3",
            "--quiet"]
    entry = "import sys; from compliant_demo.cli import main; sys.exit(main(sys.argv[1:]))"
    env = dict(os.environ,
               PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    process = subprocess.Popen([sys.executable, "-c", entry, *argv], env=env,
                               stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                               start_new_session=True)
    deadline = time.monotonic() + 120
    stored: set[int] = set()
    while len(stored) < 4 and time.monotonic() < deadline and process.poll() is None:
        time.sleep(0.05)
        with DemoStore(path, read_only=True) as store:
            stored = {r.scenario_index for r in store.find_replay_results()}
    os.killpg(process.pid, signum)
    _, err = process.communicate(timeout=60)
    assert process.returncode == status and re.fullmatch(message, err), err
    with DemoStore(path) as store:
        assert store.integrity_check() == ["ok"]
        (campaign_id,) = {r.campaign_id for r in store.find_replay_results()}
        kept = store.completed_scenarios(campaign_id)
    assert 4 <= len(kept) < 16
    with DemoStore(path, durable=False) as store:
        resumed = run_campaign(store, ReplayCampaign.from_config(
            cork_seat_skill(), store.get_campaign(campaign_id).config), skill_id=skill_id,
            campaign_id=campaign_id, workers=0)
        # the command replays on the package's default plant
        reference = run_campaign(store, campaign_job(n_scenarios=16, seed=9, target=load_plant()),
                                 skill_id=skill_id, batch_size=8, workers=0)
        assert (resumed.n_run, resumed.n_skipped) == (16 - len(kept), len(kept))
        assert _by_index(store, campaign_id) == _by_index(store, reference.campaign_id)


def test_resume_with_other_settings_or_batches_is_refused(tmp_path):
    skill_id = store_with_demos_and_skill(tmp_path / "s.sqlite")
    with DemoStore(tmp_path / "s.sqlite", durable=False) as store:
        first = run_campaign(store, campaign_job(n_scenarios=4), skill_id=skill_id,
                             batch_size=2, workers=0)
        with pytest.raises(InvalidInputError, match=r"settings \['seed'\] differ"):
            run_campaign(store, campaign_job(n_scenarios=4, seed=99), skill_id=skill_id,
                         campaign_id=first.campaign_id, workers=0)
        with pytest.raises(InvalidInputError, match=r"batch_size = 3: campaign .* batches of 2"):
            run_campaign(store, campaign_job(n_scenarios=4), skill_id=skill_id,
                         campaign_id=first.campaign_id, batch_size=3, workers=0)
        with pytest.raises(InvalidInputError, match=r"replays skill .*, not 'other-skill'"):
            run_campaign(store, campaign_job(n_scenarios=4), skill_id="other-skill",
                         campaign_id=first.campaign_id, workers=0)


@pytest.mark.parametrize("address, message", [
    ("localhost:notaport", r"scheduler = 'localhost:notaport': expected an address tcp://HOST:PORT"),
    ("tcp://127.0.0.1:99999", r"expected an address tcp://HOST:PORT \(port 1 to 65535\)"),
    ("tcp://127.0.0.1:1", r"scheduler = 'tcp://127.0.0.1:1': cannot connect to the Dask scheduler"),
])
def test_a_bad_or_unreachable_scheduler_is_refused_at_once(tmp_path, address, message):
    # Port 1 on loopback has no listener here: the refusal comes from the plain connection
    # attempt, before a Dask client exists (one that cannot connect takes 20 s to close).
    skill_id = store_with_demos_and_skill(tmp_path / "s.sqlite")
    with DemoStore(tmp_path / "s.sqlite", durable=False) as store:
        with pytest.raises(InvalidInputError, match=message):
            run_campaign(store, campaign_job(), skill_id=skill_id, scheduler=address)
