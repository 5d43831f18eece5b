"""Live teaching feedback and the model stiffness channel end to end: the simulated teacher and
the recorder as real processes over loopback DDS, watched by ``compliant-demo teaching-watch``."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from nodes_support import ROOT, DiagnosticsOf, TestClient, launched, ros_env, start_module

from compliant_demo.app.supervisor import start_child, stop_children
from compliant_demo.ingest import STIFFNESS_MODEL_FLAG
from compliant_demo.store import DemoStore

pytestmark = [pytest.mark.ros, pytest.mark.slow]

DOMAIN_ID = 93  # this file's own ROS domain (tests use 20-99)
N_DEMOS = 3
TEACHER = {"duration_s": "2.5", "pause_s": "0.3", "settle_s": "0.3"}


def _watch(*options: str) -> tuple:
    """``compliant-demo teaching-watch OPTIONS`` started now, output captured."""
    command = [sys.executable, "-c", "import sys; from compliant_demo.cli import main; "
               "sys.exit(main(sys.argv[1:]))", "teaching-watch", *options]
    return start_child("teaching-watch", command, env=ros_env(DOMAIN_ID), cwd=ROOT,
                       stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def test_the_watch_says_which_demonstrations_to_take_again_and_why(tmp_path: Path) -> None:
    store = tmp_path / "store.sqlite"
    client = TestClient(DOMAIN_ID, "feedback_test_client")
    feedback = DiagnosticsOf(client, "recorder/teaching_feedback")
    watch = _watch("--demos", str(N_DEMOS), "--timeout", "150")
    try:
        client.spin_for(3.0)  # the watch subscribes before the first demonstration ends
        # A threshold below any real repetition: the 2nd and 3rd demonstrations are "far".
        recorder = {"feedback_period_s": "0.2", "feedback_max_deviation_rad": "0.0005",
                    "diagnostics_period_s": "0.5"}
        with launched("record.launch.xml", {"store": str(store), "demos": str(N_DEMOS)},
                      DOMAIN_ID, tmp_path, {"teacher": TEACHER, "recorder": recorder}) as nodes:
            client.spin_until(lambda: nodes["teacher"].poll() is not None, 120.0, "the teacher")
            assert nodes["teacher"].returncode == 0, nodes.all_logs()
            stdout, stderr = watch.process.communicate(timeout=60)
            client.spin_for(1.0)
    finally:
        stop_children([watch])
        feedback.close()
        client.close()
    assert watch.returncode == 1, stdout + stderr  # at least one to take again
    lines = stdout.strip().splitlines()
    with DemoStore(store, read_only=True) as db:
        infos = list(db.find_demonstrations(skill="cork_seat", status="complete"))
    assert [line.split(":")[0] for line in lines] == [f"demonstration {i.id}" for i in infos]
    first, *later = lines
    # The first has no earlier demonstration to compare with and the dither excites it.
    assert ": keep it (stiffness estimate in" in first, first
    assert "no earlier demonstration to compare with" in first
    for count, line in enumerate(later, start=1):
        assert ": take it again: far from the others: RMS deviation " in line, line
        assert (f"rad from the aligned mean of {count} earlier demonstration(s), at most "
                "0.001 rad") in line
        assert "poorly excited" not in line
    # The same status on diagnostics, WARN while a demonstration is far, with its figures.
    from diagnostic_msgs.msg import DiagnosticStatus

    assert DiagnosticStatus.WARN in feedback.levels
    finished = [v for v in feedback.seen if v.get("state") == "finished"]
    # diagnostics is volatile and the listener may miss an early status on a busy machine; the
    # last demonstration's final status, sent after its stop, is what is checked below
    assert {v["demonstration_id"] for v in finished} <= {i.id for i in infos}
    assert finished and finished[-1]["demonstration_id"] == infos[-1].id
    last = finished[-1]
    assert last["references"] == "2" and last["retake"] == "true"
    assert float(last["rms_deviation_rad"]) > 0.0005
    assert 0.6 <= float(last["excited_fraction"]) <= 1.0
    assert float(last["phase"]) > 0.9


def test_a_timeout_before_the_verdicts_says_so_and_a_fault_is_no_verdict(tmp_path: Path) -> None:
    """No recorder on this domain: the watch ends after --timeout with status 3 and a line."""
    watch = _watch("--demos", "2", "--timeout", "1")
    try:
        _, stderr = watch.process.communicate(timeout=120)
    finally:
        stop_children([watch])
    assert watch.returncode == 3, stderr
    assert "timeout_s = 1.0 s passed after 0 of 2 verdicts" in stderr
    # A node that raises ends with its own status, apart from the watch's verdicts 0, 1 and 3.
    script = ("from compliant_demo.nodes._common import run_node\n"
              "def broken():\n    raise RuntimeError('a fault of ours')\n"
              "raise SystemExit(run_node(broken))")
    failed = subprocess.run([sys.executable, "-c", script], env=ros_env(DOMAIN_ID), cwd=ROOT,
                            capture_output=True, text=True, timeout=120)
    assert failed.returncode == 70, failed.stderr
    assert "RuntimeError: a fault of ours" in failed.stderr


def test_the_model_channel_stores_the_springs_stiffness_the_teacher_set(tmp_path: Path) -> None:
    """Reference: the teacher's arm sets its springs to the hand's stiffness clamped to the
    default plant's range [15, 180] N*m/rad (``teaching_motor_angles``); the recorder stores
    the springs' stiffness from the motor angles it receives (held per sample)."""
    store, truth_path = tmp_path / "store.sqlite", tmp_path / "truth.npz"
    arguments = {"store": str(store), "demos": "1", "truth": str(truth_path),
                 "stiffness_channel": "model"}
    with launched("record.launch.xml", arguments, DOMAIN_ID, tmp_path,
                  {"teacher": TEACHER}) as nodes:
        assert nodes.wait("teacher", 90.0) == 0, nodes.all_logs()
    truth = np.load(truth_path)
    with DemoStore(store, read_only=True) as db:
        (info,) = db.find_demonstrations(skill="cork_seat")
        demo = db.load_demonstration(info.id)
    assert info.status == "complete" and info.flags[STIFFNESS_MODEL_FLAG] == 1
    expected = np.clip(truth["stiffness_0"], 15.0, 180.0)
    known = np.isfinite(demo.stiffness).all(axis=1)
    assert known[5:].all()  # motor angles arrive with the first samples
    # Held from the newest motor message: at most a few samples old; the hand's stiffness
    # changes by well under 1 % per sample.
    np.testing.assert_allclose(demo.stiffness[known], expected[known], rtol=0.02)


def test_motor_states_the_recorder_cannot_use_are_counted_and_ignored(tmp_path: Path) -> None:
    from sensor_msgs.msg import JointState

    from compliant_demo.nodes._common import recorded_qos

    nodes = start_module("compliant_demo.nodes.recorder",
                         [f"store_path:={tmp_path / 'store.sqlite'}", "stiffness_channel:=model",
                          "diagnostics_period_s:=0.2"], DOMAIN_ID, tmp_path / "recorder.log",
                         "recorder")
    client = TestClient(DOMAIN_ID, "motor_states_test_client")
    diagnostics = DiagnosticsOf(client, "recorder")
    try:
        publisher = client.node.create_publisher(JointState, "motor_states", recorded_qos(10))
        client.spin_until(lambda: publisher.get_subscription_count() >= 1, 30.0, "the recorder")
        names = ["shoulder_motor_1", "shoulder_motor_2", "elbow_motor_1", "elbow_motor_2"]
        for message in (JointState(name=names[:2], position=[0.1, 0.2]),
                        JointState(name=names, position=[0.1, 0.2]),
                        JointState(name=names, position=[0.1, float("nan"), 0.0, 0.0])):
            publisher.publish(message)
        client.spin_until(lambda: diagnostics.latest.get("rejected") == "3", 30.0,
                          "three rejected motor states")
        values = diagnostics.latest
        assert values["rejected/motor_states/missing_motors"] == "1"
        assert values["rejected/motor_states/wrong_length"] == "1"
        assert values["rejected/motor_states/non_finite"] == "1"
        assert nodes.interrupt("recorder") == 0, nodes.log("recorder")
    finally:
        diagnostics.close()
        client.close()
        nodes.close()


def test_the_model_channel_needs_antagonistic_springs(tmp_path: Path) -> None:
    nodes = start_module("compliant_demo.nodes.recorder",
                         [f"store_path:={tmp_path / 'store.sqlite'}", "stiffness_channel:=model",
                          f"plant_file:={ROOT / 'config' / 'joint_cork_seat_ideal.yaml'}"],
                         DOMAIN_ID, tmp_path / "recorder.log", "recorder")
    try:
        assert nodes.wait("recorder", 60.0) == 2
    finally:
        nodes.close()
    assert ("model stiffness needs one antagonistic mechanism per joint, got ['ideal', 'ideal']"
            in nodes.log("recorder")), nodes.log("recorder")
