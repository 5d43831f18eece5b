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
from compliant_demo.replay import ReplayRun, ReplaySetup, warm_up
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
    # without feedforward the equilibrium command is the rollout's path, as simulate_rollout sends
    setup = ReplaySetup(skill, plant, dt=1e-3, settle_s=0.3, feedforward=False)
    run = ReplayRun(setup, schedule, seed=9)
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
    # positive part of the injection's increments from the start to the last step
    steps = np.diff(direct.energy.stiffness_injection[: n + 1, 0, :], axis=0)
    injected = np.maximum(steps, 0.0).sum()
    assert metrics["energy_injected_J"] == pytest.approx(injected, rel=1e-9, abs=1e-12)
    # never below the net injection, which softening can cancel
    net = direct.energy.stiffness_injection[n, 0, :].sum()
    assert metrics["energy_injected_J"] >= net - 1e-12
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
        # the raw path: torque builds up as the joint sags (with feedforward the springs carry
        # gravity, above this limit, from the first step)
        ({"torque_limit": 0.05}, {"feedforward": False}, r"torque limit: \w+ mechanism torque"),
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
    with pytest.raises(InvalidInputError,
                       match=r"goal: 1 value\(s\) \[0\.1\] for the 2 joints .*one angle per joint"):
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


# ---------------------------------------------------------------- feedforward
# Elastic-joint feedforward q_eq = q_d + K^-1 * tau_ID(q_d, dq_d, ddq_d) (Spong, J. Dyn. Sys.
# Meas. Control 109, 1987; De Luca and Book, Springer Handbook of Robotics, 2008, ch. 13; from
# memory). Static sag of a spring of stiffness K holding a pendulum m*g*l*sin(q) against
# gravity: K * (q_eq - q) = m*g*l*sin(q) (common practice).

def _realised(plant: ReplayPlant, stiffness: np.ndarray) -> np.ndarray:
    """The stiffness the mechanism realises: the command clamped to its range, N*m/rad."""
    return np.clip(stiffness, plant.mechanism.stiffness_min, plant.mechanism.stiffness_max)


def _goal_errors(setup: ReplaySetup) -> np.ndarray:
    from compliant_demo.replay import UNPERTURBED

    result = setup.simulate([UNPERTURBED], seed=1)
    return np.abs(result.q[-1, 0, :] - setup.rollout.position[-1])


def test_feedforward_equilibrium_leads_the_path_by_its_inverse_dynamics(skill):
    """Independent joints: tau_ID = I*ddq + m*g*l*sin(q) + b*dq (the elbow has no gravity)."""
    plant = load_plant()
    on, off = ReplaySetup(skill, plant), ReplaySetup(skill, plant, feedforward=False)
    n = on.n_steps
    np.testing.assert_array_equal(off.commands.equilibrium, off.rollout.position[:n])
    q, dq, ddq = (getattr(on.rollout, name)[:n] for name in ("position", "velocity",
                                                                "acceleration"))
    inertia = np.array([j.inertia for j in plant.joints])
    viscous = np.array([j.viscous_damping for j in plant.joints])
    shoulder = plant.joints[0]
    gravity = np.zeros_like(q)
    gravity[:, 0] = (shoulder.gravity_mass * 9.80665 * shoulder.com_distance
                     * np.sin(q[:, 0]))
    torque = inertia * ddq + gravity + viscous * dq
    lead = (on.commands.equilibrium - q) * _realised(plant, on.commands.stiffness)
    np.testing.assert_allclose(lead, torque, rtol=1e-9, atol=1e-12)


@pytest.fixture(scope="module")
def stiff_skill(scenario):
    """The cork_seat skill held at 40 N*m/rad or more: both antagonistic springs stay taut under
    the shoulder's gravity load, so the joint is the linear spring of the closed forms."""
    records = teaching_series(scenario, 2, seed=3)
    demos = [{"t": r.t, "position": r.position, "stiffness": r.hand_stiffness_truth}
             for r in records]
    return learn_skill(demos, joints=JOINTS, n_basis=20, alignment="resample",
                       stiffness_range=(40.0, 200.0), name="cork_seat")


def test_feedforward_removes_the_sag_from_the_unperturbed_goal_error(stiff_skill):
    """Default plant (antagonistic springs, Coulomb friction c = 0.03 N*m on the shoulder), 3 s
    to settle: without feedforward the shoulder's goal error is the static sag
    m*g*l*sin(q)/K within the friction band c/K; with it what is left is tracking, far inside
    that band."""
    plant = load_plant()
    off = ReplaySetup(stiff_skill, plant, feedforward=False, settle_s=3.0)
    on = ReplaySetup(stiff_skill, plant, settle_s=3.0)
    goal = off.rollout.position[-1]
    stiffness = _realised(plant, off.commands.stiffness[-1])
    shoulder = plant.joints[0]
    sag = shoulder.gravity_mass * 9.80665 * shoulder.com_distance * np.sin(goal[0]) / stiffness[0]
    band = shoulder.coulomb_friction / stiffness[0]
    error_off, error_on = _goal_errors(off), _goal_errors(on)
    assert abs(error_off[0] - abs(sag)) <= band
    assert error_on[0] <= 0.05 * abs(sag)


def test_feedforward_on_a_frictionless_ideal_plant_reaches_the_goal(skill):
    """Ideal actuator without Coulomb friction, linear spring: with feedforward the steady state
    is the goal itself (the sag term cancelled), up to what 3 s of settling leaves of the
    transient (it decays exponentially: 1e-5 rad is a generous bound)."""
    plant = load_plant(Path(__file__).resolve().parent.parent / "config"
                       / "joint_cork_seat_ideal.yaml")
    assert _goal_errors(ReplaySetup(skill, plant, settle_s=3.0)).max() <= 1e-5
    assert _goal_errors(ReplaySetup(skill, plant, feedforward=False, settle_s=3.0)).max() >= 1e-3


def test_feedforward_on_the_coupled_arm_carries_pinocchio_gravity(skill):
    """Coupled arm: the lead times K is the arm's inverse dynamics, which at rest equals
    Pinocchio's generalized gravity g(q) (reference library: pin.computeGeneralizedGravity)."""
    import pinocchio as pin

    from compliant_demo.sim.feedforward import inverse_dynamics
    from compliant_demo.sim.urdf import pinocchio_model

    root = Path(__file__).resolve().parent.parent
    plant = load_plant(root / "config" / "arm_cork_seat.yaml")
    setup = ReplaySetup(skill, plant)
    goal = setup.rollout.position[-2]
    model = pinocchio_model(root / "compliant_demo" / "data" / "arm_cork_seat.urdf")
    gravity = pin.computeGeneralizedGravity(model, model.createData(), goal)
    stiffness = _realised(plant, setup.commands.stiffness[-1])
    rest = inverse_dynamics(setup.joints, goal[None], setup.rollout.velocity[-2:-1],
                            setup.rollout.acceleration[-2:-1], chain=plant.chain)[0]
    lead = (setup.commands.equilibrium[-1] - goal) * stiffness
    np.testing.assert_allclose(lead, rest, rtol=1e-12, atol=1e-12)
    # at rest (velocity and acceleration set to zero) the torque is Pinocchio's gravity alone
    still = inverse_dynamics(setup.joints, goal[None], np.zeros((1, 2)), np.zeros((1, 2)),
                             chain=plant.chain)[0]
    np.testing.assert_allclose(still, gravity, rtol=1e-10, atol=1e-12)
    error_on = _goal_errors(setup)
    assert error_on.max() < 0.25 * _goal_errors(ReplaySetup(skill, plant, feedforward=False)).max()


def test_campaign_config_names_feedforward_only_when_off(skill):
    from compliant_demo.campaign import ReplayCampaign, default_campaign_spec

    spec = default_campaign_spec(movement_s=1.0)
    on = ReplayCampaign(ReplaySetup(skill, _ideal()), spec, n_scenarios=1, seed=1)
    off = ReplayCampaign(ReplaySetup(skill, _ideal(), feedforward=False), spec, n_scenarios=1,
                         seed=1)
    assert "feedforward" not in on.config()
    assert off.config()["feedforward"] is False
    assert ReplayCampaign.from_config(skill, off.config()).setup.feedforward is False
    assert ReplayCampaign.from_config(skill, on.config()).setup.feedforward is True


def test_limit_messages_tell_the_reached_value_from_its_limit() -> None:
    # A torque 0.0004 N*m past a 10 N*m limit must not read "10 N*m beyond 10 N*m".
    from compliant_demo.evaluation import first_limit_violation

    joints = [JointParams(name="shoulder", torque_limit=10.0, lower_limit=-1.0, upper_limit=1.0)]
    message = first_limit_violation([0.5, 0.6], [[0.0], [0.0]], [[9.0], [-10.0004]], joints)
    assert message == ("torque limit: shoulder mechanism torque -10.0004 N*m beyond the "
                       "10 N*m limit at t = 0.600 s")
    message = first_limit_violation([0.1], [[1.00002]], [[0.0]], joints)
    assert message == "joint range: shoulder at 1.00002 rad outside [-1, 1] rad at t = 0.100 s"
    rate = first_limit_violation([0.2], [[0.0]], [[0.0]], joints, stiffness_rate=[[120.0]],
                                 max_stiffness_rate=100.0)
    assert rate == ("stiffness rate: shoulder commanded at 120 N*m/rad/s beyond the 100 "
                    "N*m/rad/s limit at t = 0.200 s")
    assert first_limit_violation([0.1], [[0.5]], [[9.99]], joints) is None


@pytest.mark.parametrize("plant_file", [None, "arm_cork_seat.yaml"], ids=["joints", "urdf_arm"])
def test_warm_up_steps_every_simulator_path_a_replay_takes(plant_file) -> None:
    config = Path(__file__).resolve().parent.parent / "config"
    plant = load_plant() if plant_file is None else load_plant(config / plant_file)
    warm_up(plant, "symplectic_euler")  # a step, a step with a live push, a whole run
    with pytest.raises(InvalidInputError, match="method = 'euler'"):
        warm_up(plant, "euler")
