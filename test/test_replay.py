"""The replay engine: stepping, batches, campaigns, the command and the node give equal traces."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
from nodes_support import simulate_rollout

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.learning import learn_skill
from compliant_demo.models import JointParams
from compliant_demo.perturbation import schedule_from_mapping
from compliant_demo.plant import ReplayPlant, load_plant
from compliant_demo.replay import ReplayRun, ReplaySetup
from compliant_demo.teaching import cork_seat_scenario, teaching_series

JOINTS = ["shoulder", "elbow"]


@pytest.fixture(scope="module")
def scenario():
    return cork_seat_scenario(duration_s=2.0)


@pytest.fixture(scope="module")
def skill(scenario):
    records = teaching_series(scenario, 2, seed=3)
    demos = [
        {"t": r.t, "position": r.position, "stiffness": r.hand_stiffness_truth} for r in records
    ]
    return learn_skill(
        demos,
        joints=JOINTS,
        n_basis=20,
        alignment="resample",
        stiffness_range=(5.0, 200.0),
        name="cork_seat",
    )




def _ideal() -> ReplayPlant:
    """The cork_seat joints on the ideal mechanism (default settings): it has a damping input."""
    return ReplayPlant(joints=cork_seat_scenario().joints)


def test_replay_run_steps_the_same_trajectory_as_simulate(skill) -> None:
    schedule = schedule_from_mapping(
        {
            "name": "push",
            "perturbations": [
                {
                    "kind": "torque_window",
                    "joint": 0,
                    "onset_s": 0.5,
                    "duration_s": 0.2,
                    "magnitude": 0.8,
                },
            ],
        }
    )
    plant = _ideal()
    run = ReplayRun(ReplaySetup(skill, plant, dt=1e-3, settle_s=0.3), schedule, seed=9)
    while not run.finished:
        run.step()
    status, reason, metrics, trace = run.outcome()
    assert (status, reason) == ("ok", None)
    assert metrics["steps"] == metrics["steps_planned"] == run.n_steps
    rollout = run.setup.rollout
    n = run.n_steps
    direct = simulate_rollout(run.joints, plant.mechanism, rollout, schedule, seed=9)
    # Same integrator on the same commands: equal to rounding (bound 1e-12 rad).
    np.testing.assert_allclose(trace["q"], direct.q[1:, 0, :], rtol=0, atol=1e-12)
    np.testing.assert_allclose(trace["t"], direct.t[1:], rtol=0, atol=1e-12)
    np.testing.assert_array_equal(trace["stiffness_commanded"], rollout.stiffness[:n])
    assert len(metrics["recovery_time_s"]) == 1
    injected = direct.energy.final()["stiffness_injection"][0].sum()
    assert metrics["energy_injected_J"] == pytest.approx(injected, rel=1e-9, abs=1e-12)
    assert metrics["energy_J"]["perturbation_work"] == pytest.approx(
        direct.energy.final()["perturbation_work"][0].tolist(), rel=1e-9, abs=1e-12
    )
    with pytest.raises(InvalidInputError, match="already finished"):
        run.step()


def _narrow(joint: JointParams, **changes) -> JointParams:
    return joint.model_copy(update=changes)


@pytest.mark.parametrize(
    "plant_changes, run_kwargs, reason",
    [
        ({"torque_limit": 0.05}, {}, r"torque limit: \w+ mechanism torque"),
        ({"upper_limit": 0.6}, {}, r"joint range: elbow at 0.6"),
        ({}, {"max_stiffness_rate": 1.0}, r"stiffness rate: \w+ commanded at"),
    ],
)
def test_replay_run_stops_safely_at_a_limit(
    skill, plant_changes: dict, run_kwargs: dict, reason: str
) -> None:
    base = _ideal()
    joints = tuple(
        _narrow(j, **plant_changes) if j.name == "elbow" or "torque_limit" in plant_changes else j
        for j in base.joints
    )
    run = ReplayRun(
        ReplaySetup(skill, ReplayPlant(joints=joints, mechanism=base.mechanism), **run_kwargs)
    )
    while not run.finished:
        run.step()
    status, message, metrics, trace = run.outcome()
    assert status == "stopped"
    assert pytest.approx(run.steps_done * 1e-3) == trace["t"][-1]
    assert 1 < run.steps_done < run.n_steps and metrics["steps"] == run.steps_done
    assert "goal_error_max_rad" in metrics
    assert re.match(reason, message), message


def test_replay_run_stopped_at_its_first_step_reports_without_outcome_metrics(skill) -> None:
    base = _ideal()
    joints = tuple(_narrow(j, lower_limit=0.5) if j.name == "elbow" else j for j in base.joints)
    run = ReplayRun(ReplaySetup(skill, ReplayPlant(joints=joints, mechanism=base.mechanism)))
    run.step()
    status, message, metrics, _trace = run.outcome()
    assert status == "stopped"
    assert re.match(r"joint range: elbow at 0\.\d+ rad outside \[0\.5, 2\.5\] rad at t = 0\.001 s",
                    message), message
    assert metrics == {"steps": 1, "steps_planned": run.n_steps}


def test_replay_run_cut_short_is_aborted(skill) -> None:
    run = ReplayRun(ReplaySetup(skill, _ideal()))
    with pytest.raises(InvalidInputError, match="no step yet"):
        run.outcome()
    for _ in range(10):
        run.step()
    status, message, metrics, trace = run.outcome()
    assert status == "aborted" and message == f"ended after 10 of {run.n_steps} steps"
    assert trace["q"].shape == (10, 2)


def test_replay_plant_needs_every_skill_joint(skill) -> None:
    plant = ReplayPlant(joints=(JointParams(name="shoulder"),))
    with pytest.raises(InvalidInputError, match=r"lack \['elbow'\]"):
        ReplaySetup(skill, plant)


@pytest.mark.parametrize(
    "kwargs, match",
    [({"settle_s": -1.0}, "settle_s"), ({"max_stiffness_rate": 0.0}, "max_stiffness_rate")],
)
def test_replay_setup_refuses_bad_settings(skill, kwargs: dict, match: str) -> None:
    with pytest.raises(InvalidInputError, match=match):
        ReplaySetup(skill, _ideal(), **kwargs)


def test_plant_file_errors_name_the_file(tmp_path: Path) -> None:
    path = tmp_path / "plant.yaml"
    path.write_text("joints: []\n")
    with pytest.raises(InvalidInputError, match=r"plant\.yaml: field 'joints'"):
        load_plant(path)


def test_replay_setup_refuses_a_goal_for_other_joints(skill) -> None:
    with pytest.raises(InvalidInputError, match=r"goal: need one angle per joint"):
        ReplaySetup(skill, _ideal(), goal=(0.1,))


@pytest.mark.parametrize("kind", ["wall", "torque_window", "random_torque"])
def test_node_stepping_the_command_and_a_campaign_give_identical_traces(
    tmp_path: Path, kind: str
) -> None:
    # One engine: the replay node steps a ReplayRun, `compliant-demo replay` steps a ReplayRun,
    # a campaign simulates its batch through ReplaySetup.simulate. Same skill, plant (the default,
    # antagonistic: no damping input), schedule and seed must give the same samples exactly.
    import yaml
    from campaign_support import store_with_demos_and_skill

    from compliant_demo.campaign import ReplayCampaign, default_campaign_spec, scenario_seed
    from compliant_demo.cli import main
    from compliant_demo.learning import load_skill
    from compliant_demo.store import DemoStore

    store_path = tmp_path / "store.sqlite"
    store_with_demos_and_skill(store_path)
    with DemoStore(store_path, read_only=True) as store:
        stored = load_skill(store, "cork_seat")
    setup = ReplaySetup(stored.skill, load_plant(), duration_s=1.5, settle_s=0.3)
    spec = default_campaign_spec(movement_s=1.5).model_copy(update={"kinds": {kind: 1.0}})
    job = ReplayCampaign(setup, spec, n_scenarios=1, seed=4, decimation=1)
    schedule, seed = job.schedule(0), scenario_seed(4, 0)
    (scenario,) = job.run_batch(0, (0,))

    stepped = ReplayRun(setup, schedule, seed=seed)
    while not stepped.finished:
        stepped.step()
    node_trace = stepped.trace()

    schedule_file = tmp_path / "schedule.yaml"
    schedule_file.write_text(yaml.safe_dump(schedule.model_dump(mode="json")))
    code = main(["replay", "--store", str(store_path), "--schedule", str(schedule_file),
                 "--duration", "1.5", "--settle", "0.3", "--seed", str(seed), "--json"])
    assert code in (0, 1)
    with DemoStore(store_path, read_only=True) as store:
        (info,) = store.find_replay_results(campaign_id=None)
        command_trace = store.load_replay_result(info.id).trace

    assert "damping_commanded" not in node_trace  # the antagonistic springs get no damping
    # A stepped replay stops safely at its first violation; the campaign runs on and records it.
    n = stepped.steps_done
    assert stepped.stop_reason == scenario.reason
    assert (stepped.stop_reason is None) == (scenario.status == "ok") == (n == stepped.n_steps)
    for name in ("q", "tau_external", "tau_mechanism", "stiffness_realised"):
        np.testing.assert_array_equal(node_trace[name], command_trace[name], err_msg=name)
        np.testing.assert_array_equal(node_trace[name], scenario.trace[name][1 : n + 1],
                                      err_msg=name)
    np.testing.assert_array_equal(node_trace["t"], scenario.trace["t"][1 : n + 1])
