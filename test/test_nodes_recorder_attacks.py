"""The recorder under attack while it records: hostile motor_states on the model stiffness
channel and run-time parameter changes, over loopback DDS (its own ROS domain, 97)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from nodes_support import DiagnosticsOf, TestClient, set_parameter, start_module

from compliant_demo.nodes._common import recorded_qos, to_stamp
from compliant_demo.plant import load_plant
from compliant_demo.store import DemoStore

pytestmark = [pytest.mark.ros, pytest.mark.slow]

DOMAIN_ID = 97  # this file's own ROS domain (tests use 20-99)
JOINTS = ["shoulder", "elbow"]
MOTORS = ["shoulder_motor_1", "shoulder_motor_2", "elbow_motor_1", "elbow_motor_2"]
T0 = 1000.0  # first stamp, s (replayed stamps: the recorder's stamp_tolerance_s is 0)
RATE_HZ = 100.0
N_BEFORE_MOTORS, N_SAMPLES = 20, 200
STALE_FROM, N_STALE = 260, 20  # samples 0.6 s and more after the last motor angles
HELD = [0.3, -0.1, 0.2, -0.2]  # the one valid set of motor angles, rad
FLOOD = 300


def _joint_state(index: int, velocity: float = 0.0):
    from sensor_msgs.msg import JointState

    message = JointState(name=JOINTS, position=[0.1, -0.2], velocity=[velocity] * 2,
                         effort=[0.5, 0.25])
    message.header.stamp = to_stamp(T0 + index / RATE_HZ)
    return message


def _motors(stamp_s: float, names=MOTORS, position=HELD):
    from sensor_msgs.msg import JointState

    message = JointState(name=list(names), position=list(position))
    message.header.stamp = to_stamp(stamp_s)
    return message


def _finished(path: Path) -> bool:
    if not path.exists():
        return False
    with DemoStore(path, read_only=True) as store:
        return any(info.status != "recording" for info in store.find_demonstrations())


def _start_recorder(tmp_path: Path, *extra: str):
    return start_module("compliant_demo.nodes.recorder",
                        [f"store_path:={tmp_path / 'store.sqlite'}", "diagnostics_period_s:=0.2",
                         f"nominal_rate_hz:={RATE_HZ}", "max_message_joints:=16", *extra],
                        DOMAIN_ID, tmp_path / "recorder.log", "recorder")


def test_hostile_motor_states_and_parameters_while_recording_leave_a_sound_demonstration(
    tmp_path: Path,
) -> None:
    from sensor_msgs.msg import JointState

    nodes = _start_recorder(tmp_path, "stiffness_channel:=model")
    client = TestClient(DOMAIN_ID, "recorder_attack_client")
    diagnostics = DiagnosticsOf(client, "recorder")
    try:
        joint_states = client.node.create_publisher(JointState, "joint_states", recorded_qos(500))
        motor_states = client.node.create_publisher(JointState, "motor_states",
                                                    recorded_qos(2000))
        client.spin_until(lambda: joint_states.get_subscription_count() >= 1
                          and motor_states.get_subscription_count() >= 1, 60.0, "the recorder")
        assert client.call_trigger("start").success
        for index in range(N_BEFORE_MOTORS):
            joint_states.publish(_joint_state(index))
        client.spin_until(lambda: diagnostics.latest.get("accepted") == str(N_BEFORE_MOTORS),
                          30.0, "the samples before any motor angle")
        latest = T0 + N_BEFORE_MOTORS / RATE_HZ
        motor_states.publish(_motors(latest))
        hostile = {
            "oversized": _motors(latest + 1, MOTORS * 5, HELD * 5),
            "wrong_length": _motors(latest + 1, MOTORS, HELD[:3]),
            "duplicate_names": _motors(latest + 1, MOTORS[:3] + MOTORS[:1], [3.0] * 4),
            "missing_motors": _motors(latest + 1, [*MOTORS[:3], "wrist_motor_2"], HELD),
            "non_finite": _motors(latest + 1, MOTORS, [np.nan, *HELD[1:]]),
            "out_of_range": _motors(latest + 1, MOTORS, [1e300, *HELD[1:]]),
            "invalid_stamp": _motors(0.0, MOTORS, [3.0, -3.0, 3.0, -3.0]),
        }
        for message in hostile.values():
            motor_states.publish(message)
        # The same stamp again (a duplicate), then older ones, each with other angles: a flood.
        for count in range(FLOOD):
            motor_states.publish(_motors(latest - count / RATE_HZ, MOTORS, [3.0, -3.0, 3.0, -3.0]))
        # Run-time parameter changes while recording, as any participant could send them.
        refused = [
            ("stiffness_channel", "estimate", "read-only"),
            ("plant_file", "/etc/passwd", "read-only"),
            ("nominal_rate_hz", float("nan"), "read-only"),
            ("max_message_joints", -1, "read-only"),
            ("tags", "bench", "tags = 'bench': expected a list, got text"),
            ("notes", "x" * 4001, "notes: at most 4000 characters, got 4001"),
            ("operator", ["a", "b"], "operator = ['a', 'b']: expected text, got a list"),
            ("skill", 5, "skill = 5: expected text, got an integer"),
            # undeclaring would make every later start fail
            ("tags", None, "tags = None: expected a list, got no value"),
            ("notes", None, "notes = None: expected text, got no value"),
        ]
        for name, value, reason in refused:
            result = set_parameter(client, "/recorder", name, value)
            assert not result.successful and reason in result.reason, (name, result.reason)
        assert set_parameter(client, "/recorder", "skill", "").reason == "skill must not be empty"
        assert set_parameter(client, "/recorder", "skill", "bottle_cap").successful
        # A finite angle no joint has: its square would overflow the estimator's sums.
        implausible = _joint_state(N_BEFORE_MOTORS)
        implausible.position = [1e200, -0.2]
        joint_states.publish(implausible)
        for index in range(N_BEFORE_MOTORS, N_SAMPLES):
            joint_states.publish(_joint_state(index))
            motor_states.publish(_motors(T0 + (index + 1) / RATE_HZ))
        # Then motor_states stop: samples stamped over motor_states_max_age_s (0.5 s) after the
        # last motor angles get NaN, not those angles.
        for index in range(STALE_FROM, STALE_FROM + N_STALE):
            joint_states.publish(_joint_state(index))
        client.spin_until(lambda: diagnostics.latest.get("accepted") == str(N_SAMPLES + N_STALE),
                          30.0, "every sample")
        expected = {f"rejected/motor_states/{reason}": "1" for reason in hostile}
        expected["rejected/motor_states/out_of_order"] = str(FLOOD)
        expected["rejected/joint_states/implausible"] = "1"
        client.spin_until(lambda: all(diagnostics.latest.get(key) == value
                                      for key, value in expected.items()), 30.0,
                          f"the rejections counted as {expected}")
        stop = client.call_trigger("stop")
        assert stop.success, stop.message
        assert nodes["recorder"].poll() is None, nodes.log("recorder")
        assert nodes.interrupt("recorder") == 0, nodes.log("recorder")
    finally:
        diagnostics.close()
        client.close()
        nodes.close()
    with DemoStore(tmp_path / "store.sqlite", read_only=True) as store:
        assert store.verify() == []
        (info,) = store.find_demonstrations()
        demo = store.load_demonstration(info.id)
    # The open demonstration keeps the metadata it started with.
    assert (info.status, info.skill) == ("complete", "cork_seat")
    assert demo.stiffness.shape == (N_SAMPLES + N_STALE, 2)
    np.testing.assert_allclose(demo.position, np.tile([0.1, -0.2], (N_SAMPLES + N_STALE, 1)))
    assert np.isnan(demo.stiffness[:N_BEFORE_MOTORS]).all()
    assert np.isnan(demo.stiffness[N_SAMPLES:]).all()
    # K = 2 k1 + 2 k2 (theta1 - theta2 + 2 d0) while both springs are taut (Migliore, Brown and
    # DeWeerth, ICRA 2005): only the valid angles HELD were ever held.
    springs = load_plant().mechanisms_for(JOINTS)
    truth = [2 * p.k1 + 2 * p.k2 * (HELD[2 * j] - HELD[2 * j + 1] + 2 * p.pretension_offset)
             for j, p in enumerate(springs)]
    np.testing.assert_allclose(demo.stiffness[N_BEFORE_MOTORS:N_SAMPLES],
                               np.tile(truth, (N_SAMPLES - N_BEFORE_MOTORS, 1)), rtol=1e-12)


def test_motion_started_demonstrations_take_the_metadata_set_at_run_time(tmp_path: Path) -> None:
    from sensor_msgs.msg import JointState

    nodes = _start_recorder(tmp_path, "stiffness_channel:=none", "auto_start:=true",
                            "auto_stop_hold_s:=0.2")
    client = TestClient(DOMAIN_ID, "recorder_metadata_client")
    try:
        joint_states = client.node.create_publisher(JointState, "joint_states", recorded_qos(500))
        client.spin_until(lambda: joint_states.get_subscription_count() >= 1, 60.0,
                          "the recorder")
        for name, value in (("skill", "bottle_cap"), ("operator", "operator_b"),
                            ("tags", ["late_shift"]), ("notes", "set while idle")):
            assert set_parameter(client, "/recorder", name, value).successful, name
        # 50 moving samples start a demonstration; 50 still ones (0.5 s > 0.2 s) stop it.
        for index in range(100):
            joint_states.publish(_joint_state(index, velocity=0.5 if index < 50 else 0.0))
        client.spin_until(lambda: _finished(tmp_path / "store.sqlite"), 30.0,
                          "a demonstration started and stopped by motion")
        assert nodes.interrupt("recorder") == 0, nodes.log("recorder")
    finally:
        client.close()
        nodes.close()
    with DemoStore(tmp_path / "store.sqlite", read_only=True) as store:
        (info,) = store.find_demonstrations()
    assert (info.skill, info.operator, list(info.tags), info.notes) == (
        "bottle_cap", "operator_b", ["late_shift"], "set while idle")
    assert info.status == "complete" and info.flags["auto_stopped"] == 1
