"""End to end over loopback DDS: the nodes each launch file declares, as real processes.

record.launch.xml (teacher + recorder) records demonstrations; the ``compliant-demo launch``
command runs learn.launch.xml (learner) on them; replay.launch.xml (replay) replays the skill
with a perturbation schedule; pipeline.launch.xml runs all four nodes on a fresh store.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from nodes_support import LAUNCH, ROOT, TestClient, launched, run_cli, start_replay

from compliant_demo.learning import load_skill
from compliant_demo.perturbation import load_schedule_yaml
from compliant_demo.plant import load_plant
from compliant_demo.replay import ReplaySetup
from compliant_demo.store import DemoStore
from compliant_demo.teaching import windowed_truth

pytestmark = [pytest.mark.ros, pytest.mark.slow]

DOMAIN_ID = 43
PIPELINE_DOMAIN_ID = 57  # the fresh pipeline gets a domain of its own, far from the others
N_DEMOS = 2
SEED = 11


@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    """Two demonstrations recorded by the teacher and recorder of record.launch.xml."""
    work = tmp_path_factory.mktemp("e2e_record")
    store, truth = work / "store.sqlite", work / "truth.npz"
    arguments = {"store": str(store), "demos": str(N_DEMOS), "seed": str(SEED), "truth": str(truth)}
    with launched(
        "record.launch.xml", arguments, DOMAIN_ID, work, {"teacher": {"pause_s": "0.3"}}
    ) as nodes:
        assert nodes.wait("teacher", 120.0) == 0, nodes.all_logs()
        assert nodes.interrupt("recorder") == 0, nodes.all_logs()
    return store, np.load(truth), nodes


def test_every_published_sample_is_stored_in_complete_demonstrations(recorded) -> None:
    store, truth, _nodes = recorded
    with DemoStore(store, read_only=True) as db:
        infos = list(db.find_demonstrations(skill="cork_seat", status="complete"))
        demos = [db.load_demonstration(info.id) for info in infos]
    assert len(infos) == N_DEMOS
    for index, (info, demo) in enumerate(zip(infos, demos, strict=True)):
        count = int(truth[f"count_{index}"])
        assert info.n_samples == count, (index, info.n_samples, count)  # teacher's own count
        assert info.flags["received"] == count and info.flags["accepted"] == count
        assert info.operator == "operator_a" and info.joints == ("shoulder", "elbow")
        # Stamps relative to the first sample reproduce the teacher's sample times.
        np.testing.assert_allclose(demo.t, truth[f"t_{index}"], atol=2e-6)


def test_online_stiffness_matches_the_teachers_ground_truth_where_excited(recorded) -> None:
    """Reference: the simulated teacher's hand stiffness (ground truth of the simulation).

    Compared with the truth's mean over the estimator's 0.5 s window, where the recorder stored
    an estimate (excited window) and the truth varied by at most 5 % over that window (the
    sliding-window regression assumes a constant stiffness within it). Bounds: median relative
    error <= 5 %, 90th percentile <= 15 %, over at least 20 % of each demonstration.
    """
    store, truth, _nodes = recorded
    window = 500  # estimator_window_s 0.5 s at 1 kHz (config/recorder.yaml)
    errors = []
    with DemoStore(store, read_only=True) as db:
        infos = list(db.find_demonstrations(skill="cork_seat", status="complete"))
        for index, info in enumerate(infos):
            estimate = db.load_demonstration(info.id).stiffness
            mean, variation = windowed_truth(truth[f"stiffness_{index}"], window)
            use = np.isfinite(estimate) & (variation <= 0.05)
            assert use.mean() > 0.2, f"demo {index}: only {use.mean():.0%} usable samples"
            errors.append(np.abs(estimate[use] - mean[use]) / mean[use])
    errors = np.concatenate(errors)
    assert np.median(errors) <= 0.05, np.median(errors)
    assert np.percentile(errors, 90) <= 0.15, np.percentile(errors, 90)


@pytest.fixture(scope="module")
def learned(recorded):
    """The learner of learn.launch.xml started by ``compliant-demo launch``; fits by itself."""
    store, _truth, _nodes = recorded
    result = run_cli(["launch", str(LAUNCH / "learn.launch.xml"), f"store:={store}",
                      f"fit_when:={N_DEMOS}", "exit_after_fit:=true", "--until", "learner"],
                     DOMAIN_ID, timeout_s=120)
    return store, result


def test_learner_saves_a_skill_from_the_recorded_demonstrations(learned) -> None:
    store, result = learned
    assert result.returncode == 0, result.stdout + result.stderr
    output = result.stdout + result.stderr
    assert "skill 'cork_seat' version 1 from 2 demonstration(s)" in output
    with DemoStore(store, read_only=True) as db:
        record = db.load_skill_record("cork_seat")
        demo_ids = {info.id for info in db.find_demonstrations(status="complete")}
    assert record.version == 1 and set(record.demonstration_ids) == demo_ids
    # the learner's default formulation ([]) lets the criterion choose every joint's form
    choices = record.payload["provenance"]["formulation_choice"]
    assert [(c["joint"], c["chosen_by"]) for c in choices] == [("shoulder", "criterion"),
                                                                ("elbow", "criterion")]


def test_learner_refuses_clearly_when_too_few_demonstrations_match(learned, tmp_path: Path) -> None:
    store, _result = learned
    client = TestClient(DOMAIN_ID, "learner_test_client")
    try:
        with launched(
            "learn.launch.xml",
            {"store": str(store)},
            DOMAIN_ID,
            tmp_path,
            {"learner": {"min_demonstrations": "5", "tags": "['bench']"}},
        ) as nodes:
            reply = client.call_trigger("fit", timeout_s=30.0)
            assert not reply.success
            assert "0 complete demonstration(s) match skill='cork_seat', tags=['bench']" in (
                reply.message
            ), reply.message
            assert "need at least 5" in reply.message
            assert nodes.interrupt("learner") == 0
    finally:
        client.close()
    with DemoStore(store, read_only=True) as db:
        assert [s.version for s in db.list_skills()] == [1]  # nothing new saved


def test_replay_with_a_schedule_stores_metrics_and_matches_core_simulation(
    learned, tmp_path: Path
) -> None:
    store, _result = learned
    arguments = {
        "store": str(store),
        "auto": "true",
        "exit_after_run": "true",
        "real_time": "false",
        "seed": "5",
    }
    with launched("replay.launch.xml", arguments, DOMAIN_ID, tmp_path) as nodes:
        assert nodes.wait("replay", 120.0) == 0, nodes.all_logs()
    with DemoStore(store, read_only=True) as db:
        record = db.load_skill_record("cork_seat")
        skill = load_skill(db, "cork_seat").skill
        (info,) = db.find_replay_results(skill_id=record.id)
        result = db.load_replay_result(info.id)
    assert info.status == "ok" and info.reason is None
    metrics = info.metrics
    for key in (
        "goal_error_rad",
        "peak_deviation_rad",
        "recovery_time_s",
        "peak_interaction_torque_Nm",
        "energy_injected_J",
        "limit_violations",
    ):
        assert key in metrics, key
    assert len(metrics["recovery_time_s"]) == 2  # one per scheduled perturbation
    assert metrics["n_limit_violations"] == 0
    assert isinstance(metrics["energy_injected_J"], float)
    # The same skill through the replay engine's batch simulation, same seed and schedule.
    plant = load_plant(ROOT / "config" / "replay_plant.yaml")
    schedule = load_schedule_yaml(ROOT / "config" / "replay_bumps.yaml")
    setup = ReplaySetup(skill, plant)
    direct = setup.simulate([schedule], seed=5)
    trace = result.trace
    assert trace["q"].shape == (setup.n_steps, 2)
    # Bound: 1e-9 rad and rad/s; both step the same integrator on the same commands, so only
    # floating-point reassociation could separate them.
    np.testing.assert_allclose(trace["q"], direct.q[1:, 0, :], rtol=0, atol=1e-9)
    np.testing.assert_allclose(trace["dq"], direct.dq[1:, 0, :], rtol=0, atol=1e-9)
    # The perturbations were applied: the bumps moved the joint off its nominal path.
    assert max(metrics["peak_deviation_rad"]) > 1e-3


def test_pipeline_launch_runs_all_four_nodes_to_a_stored_replay(tmp_path: Path) -> None:
    store = tmp_path / "store.sqlite"
    arguments = {"store": str(store), "demos": "2", "seed": "21", "real_time": "false"}
    with launched(
        "pipeline.launch.xml",
        arguments,
        PIPELINE_DOMAIN_ID,
        tmp_path,
        {"teacher": {"pause_s": "0.2", "duration_s": "3.0"}},
    ) as nodes:
        assert nodes.names == ["recorder", "teacher", "learner", "replay"]
        assert nodes.wait("teacher", 60.0) == 0, nodes.all_logs()
        assert nodes.wait("learner", 40.0) == 0, nodes.all_logs()
        assert nodes.wait("replay", 60.0) == 0, nodes.all_logs()
        assert nodes.interrupt("recorder") == 0, nodes.all_logs()
    with DemoStore(store, read_only=True) as db:
        assert db.count_demonstrations(status="complete") == 2
        (skill,) = db.list_skills()
        (result,) = db.find_replay_results(skill_id=skill.id)
    assert result.status == "ok"


def test_replay_run_service_publishes_and_takes_live_pushes(learned, tmp_path: Path) -> None:
    """Real-time replay started by its ``run`` service; a live push on perturbation_command."""
    from sensor_msgs.msg import JointState
    from std_msgs.msg import Float64MultiArray

    store, _result = learned
    client = TestClient(DOMAIN_ID, "replay_test_client")
    received: dict[str, list] = {"joint_states": [], "stiffness_commanded": [],
                                 "stiffness_realised": [], "perturbation": []}
    for topic, kind in (("joint_states", JointState), ("stiffness_commanded", Float64MultiArray),
                        ("stiffness_realised", Float64MultiArray),
                        ("perturbation", Float64MultiArray)):
        client.node.create_subscription(kind, topic, received[topic].append, 100)
    push = client.node.create_publisher(Float64MultiArray, "perturbation_command", 10)
    try:
        arguments = {"store": str(store), "schedule": ""}
        with launched("replay.launch.xml", arguments, DOMAIN_ID, tmp_path,
                      {"replay": {"duration_s": "1.5", "settle_s": "0.3"}}) as nodes:
            start_replay(client, nodes)
            assert client.call_trigger("run").success is False  # one replay at a time
            client.spin_until(lambda: len(received["joint_states"]) > 20, 20.0, "joint states")
            push.publish(Float64MultiArray(data=[0.5, 0.0]))
            client.spin_for(0.3)
            push.publish(Float64MultiArray(data=[0.0, 0.0]))

            def stored():
                with DemoStore(store, read_only=True) as db:
                    return [r for r in db.find_replay_results()
                            if r.parameters.duration_s == 1.5]

            (info,) = client.spin_until(stored, 30.0, "the replay result")
            assert nodes.interrupt("replay") == 0, nodes.all_logs()
    finally:
        client.close()
    with DemoStore(store, read_only=True) as db:
        trace = db.load_replay_result(info.id).trace
    assert info.status == "ok" and info.parameters.real_time is True
    assert info.metrics["energy_injected_J"] is None  # live pushes: no energy rerun
    assert trace["q"].shape == (1800, 2)  # (1.5 s + 0.3 s) at 1 kHz
    pushed = trace["tau_external"][:, 0] == 0.5
    assert 0.1 <= pushed.mean() * 1.8 <= 0.6  # about 0.3 s of the push, within timing slack
    assert not trace["tau_external"][:, 1].any()
    # Every tenth step is published (publish_decimation 10) on each topic, one value per joint.
    for topic, messages in received.items():
        assert 150 <= len(messages) <= 180, (topic, len(messages))
    assert any(m.data[0] == 0.5 for m in received["perturbation"])
    assert list(received["joint_states"][0].name) == ["shoulder", "elbow"]


def test_launch_command_until_the_teacher_ends_stops_the_recorder_cleanly(tmp_path: Path) -> None:
    """``compliant-demo launch record.launch.xml --until teacher`` returns by itself, 0."""
    store = tmp_path / "store.sqlite"
    result = run_cli(["launch", str(LAUNCH / "record.launch.xml"), f"store:={store}", "demos:=1",
                      "seed:=4", "operator:=operator_b", "--until", "teacher"],
                     PIPELINE_DOMAIN_ID, timeout_s=90)
    assert result.returncode == 0, result.stdout + result.stderr
    with DemoStore(store, read_only=True) as db:
        (info,) = db.find_demonstrations()
    assert info.status == "complete" and info.operator == "operator_b"
    assert info.n_samples == info.flags["received"] > 5000  # a 6 s demonstration at 1 kHz
