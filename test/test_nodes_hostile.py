"""Hostile messages: every node survives whatever any participant publishes to its topics.

Each test publishes every kind of bad message a node's subscriptions can receive to the node as a
real process, then checks that it is still running, that its diagnostics count the rejects per
reason, and that its work (a stored demonstration, a stored replay result) is intact.
"""

from __future__ import annotations

import math
import time
from pathlib import Path

import numpy as np
import pytest
from nodes_support import NODE_READY_S, DiagnosticsOf, TestClient, start_module, start_replay

from compliant_demo.nodes._common import recorded_qos, to_stamp
from compliant_demo.store import DemoStore

pytestmark = [pytest.mark.ros, pytest.mark.slow]

DOMAIN_ID = 71
JOINTS = ["shoulder", "elbow"]


@pytest.fixture(scope="module")
def client():
    ros = TestClient(DOMAIN_ID, "hostile_test_client")
    yield ros
    ros.close()


def _joint_state(stamp: float, names=JOINTS, values=(0.1, 0.2)):
    from sensor_msgs.msg import JointState

    message = JointState()
    message.header.stamp = to_stamp(stamp)
    message.name = list(names)
    message.position = [float(v) for v in values]
    message.velocity = [0.0] * len(values)
    message.effort = [1.0] * len(values)
    return message


def _alive(nodes, name: str) -> bool:
    return nodes[name].poll() is None


# -- recorder ------------------------------------------------------------------------------------


def _hostile_joint_states(now: float) -> list[tuple[str, object]]:
    """(diagnostic key, message) for each kind of bad joint state, stamped around ``now``."""
    from sensor_msgs.msg import JointState

    bad_nanosec = _joint_state(now)
    bad_nanosec.header.stamp.nanosec = 2_000_000_000
    zero = _joint_state(now)
    zero.header.stamp.sec, zero.header.stamp.nanosec = 0, 0
    huge = JointState()
    huge.header.stamp = to_stamp(now)
    huge.name = [f"j{i}" for i in range(100_000)]
    huge.position = huge.velocity = huge.effort = [0.0] * 100_000
    return [
        ("rejected/joint_states/oversized", huge),
        ("rejected/joint_states/duplicate_names",
         _joint_state(now, ["shoulder", "shoulder", "elbow"], (0.1, 0.9, 0.2))),
        ("rejected/joint_states/invalid_stamp", bad_nanosec),
        ("rejected/joint_states/invalid_stamp", zero),
        ("rejected/joint_states/stamp_off_clock", _joint_state(now + 1e6)),  # a far future
        ("rejected/joint_states/stamp_off_clock", _joint_state(now - 1e6)),
        ("non_finite", _joint_state(now, values=(math.nan, 0.2))),
        ("non_finite", _joint_state(now, values=(math.inf, 0.2))),
        ("wrong_lengths", _joint_state(now, values=(0.1,))),
        ("missing_joints", _joint_state(now, ["wrist", "hand"])),
    ]


def test_recorder_survives_every_bad_message_and_stores_only_good_samples(
    tmp_path: Path, client: TestClient
) -> None:
    from sensor_msgs.msg import JointState
    from std_msgs.msg import Float64MultiArray

    store = tmp_path / "store.sqlite"
    nodes = start_module(
        "compliant_demo.nodes.recorder",
        [f"store_path:={store}", "stiffness_channel:=reference", "diagnostics_period_s:=0.2",
         "stamp_tolerance_s:=60.0"],
        DOMAIN_ID, tmp_path / "recorder.log", "recorder",
    )  # fmt: skip
    diagnostics = DiagnosticsOf(client, "recorder")
    try:
        states = client.node.create_publisher(JointState, "joint_states", recorded_qos(2000))
        reference = client.node.create_publisher(
            Float64MultiArray, "stiffness_reference", recorded_qos(100)
        )
        client.spin_until(lambda: states.get_subscription_count() >= 1, 20.0, "the recorder")
        client.spin_until(lambda: reference.get_subscription_count() >= 1, 20.0, "reference")
        assert client.call_trigger("start").success
        reference.publish(Float64MultiArray(data=[30.0, 40.0]))  # held through what follows
        for values in ([50.0], [math.nan, 40.0], [-5.0, 40.0], [1.0] * 100_000):
            reference.publish(Float64MultiArray(data=values))
        client.spin_until(lambda: sum(int(v) for k, v in diagnostics.latest.items()
                                      if k.startswith("rejected/stiffness_reference/")) == 4,
                          20.0, "the bad references counted")
        t0 = time.time()
        good = 0
        for i in range(300):
            states.publish(_joint_state(t0 + i * 1e-3))
            good += 1
            if i % 100 == 50:  # every kind of bad message, three rounds
                for _key, message in _hostile_joint_states(t0 + i * 1e-3 + 5e-4):
                    states.publish(message)
        client.spin_until(lambda: diagnostics.latest.get("accepted") == str(good) and int(
            diagnostics.latest.get("rejected", "0")) >= 18, 30.0, "every message counted")
        client.spin_for(0.5)
        values = diagnostics.latest
        assert _alive(nodes, "recorder"), nodes.all_logs()
        expected: dict[str, int] = {}
        for key, _message in _hostile_joint_states(t0):
            expected[key] = expected.get(key, 0) + 3
        for key, count in expected.items():
            assert values[key] == str(count), (key, values)
        assert values["rejected/stiffness_reference/wrong_length"] == "2"
        assert values["rejected/stiffness_reference/non_finite"] == "1"
        assert values["rejected/stiffness_reference/negative"] == "1"
        assert "message ignored" in nodes.log("recorder")
        reply = client.call_trigger("stop")
        assert reply.success and f"{good} stored" in reply.message, reply.message
        assert nodes.interrupt("recorder") == 0, nodes.all_logs()
    finally:
        diagnostics.close()
        nodes.close()
    with DemoStore(store, read_only=True) as db:
        (info,) = db.find_demonstrations()
        demo = db.load_demonstration(info.id)
    assert info.status == "complete" and info.n_samples == good
    np.testing.assert_allclose(np.diff(demo.t), 1e-3, atol=1e-6)  # nothing bad in between
    np.testing.assert_array_equal(demo.position, np.tile([0.1, 0.2], (good, 1)))
    np.testing.assert_array_equal(demo.stiffness, np.tile([30.0, 40.0], (good, 1)))


# -- replay --------------------------------------------------------------------------------------


def _store_with_skill(path: Path) -> None:
    from compliant_demo.learning import learn_skill, save_skill
    from compliant_demo.teaching import cork_seat_scenario, teaching_series

    records = teaching_series(cork_seat_scenario(duration_s=2.0), 2, seed=3)
    demos = [{"t": r.t, "position": r.position, "stiffness": r.hand_stiffness_truth}
             for r in records]
    skill = learn_skill(demos, joints=JOINTS, n_basis=15, alignment="resample",
                        stiffness_range=(5.0, 200.0), name="cork_seat")
    with DemoStore(path) as store:
        save_skill(store, skill)


def test_replay_survives_every_bad_live_torque_and_stores_its_result(
    tmp_path: Path, client: TestClient
) -> None:
    from std_msgs.msg import Float64MultiArray

    store = tmp_path / "store.sqlite"
    _store_with_skill(store)
    nodes = start_module(
        "compliant_demo.nodes.replay",
        [f"store_path:={store}", "duration_s:=2.0", "settle_s:=0.5", "diagnostics_period_s:=0.2",
         "max_live_torque:=5.0"],
        DOMAIN_ID, tmp_path / "replay.log", "replay",
    )  # fmt: skip
    diagnostics = DiagnosticsOf(client, "replay")
    hostile = [
        ([math.nan, 0.0], "non_finite"),  # the message that used to end the node
        ([0.0, -math.inf], "non_finite"),
        ([1e300, 0.0], "too_large"),
        ([5.5, 0.0], "too_large"),
        ([1.0], "wrong_length"),
        ([], "wrong_length"),
        ([0.5] * 100_000, "wrong_length"),
    ]
    try:
        push = client.node.create_publisher(Float64MultiArray, "perturbation_command", 10)
        client.spin_until(lambda: push.get_subscription_count() >= 1, NODE_READY_S,
                          "the replay node")

        def ignored_before_a_run():  # the first messages may go before the reader matched
            push.publish(Float64MultiArray(data=[1.0, 0.0]))
            client.spin_for(0.2)
            return diagnostics.latest.get("rejected/perturbation_command/no_replay")

        client.spin_until(ignored_before_a_run, 20.0, "a push ignored")

        def idle_count_settled():  # every push sent so far counted: unchanged over 3 periods
            before = diagnostics.latest["rejected/perturbation_command/no_replay"]
            client.spin_for(0.6)
            after = diagnostics.latest["rejected/perturbation_command/no_replay"]
            return after if after == before else None

        idle_rejects = int(client.spin_until(idle_count_settled, 20.0, "the idle pushes counted"))
        start_replay(client, nodes)
        for data, _reason in hostile:
            push.publish(Float64MultiArray(data=data))
            client.spin_for(0.05)

        def stored():
            with DemoStore(store, read_only=True) as db:
                return list(db.find_replay_results())

        (info,) = client.spin_until(stored, 30.0, "the replay result")
        client.spin_for(0.5)
        assert _alive(nodes, "replay"), nodes.all_logs()
        values = diagnostics.latest
        assert values["rejected/perturbation_command/no_replay"] == str(idle_rejects)
        assert values["rejected/perturbation_command/non_finite"] == "2"
        assert values["rejected/perturbation_command/too_large"] == "2"
        assert values["rejected/perturbation_command/wrong_length"] == "3"
        assert values["rejected"] == str(idle_rejects + 7)
        assert "FATAL" not in nodes.log("replay")
        assert nodes.interrupt("replay") == 0, nodes.all_logs()
    finally:
        diagnostics.close()
        nodes.close()
    with DemoStore(store, read_only=True) as db:
        trace = db.load_replay_result(info.id).trace
    assert info.status == "ok", info
    assert trace["q"].shape == (2500, 2)  # (2.0 s + 0.5 s) at 1 kHz
    assert np.isfinite(trace["q"]).all() and not trace["tau_external"].any()


# -- teacher -------------------------------------------------------------------------------------


def test_teacher_survives_forged_recorder_diagnostics(tmp_path: Path, client: TestClient) -> None:
    from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue

    nodes = start_module(
        "compliant_demo.nodes.teacher",
        ["n_demonstrations:=1", "duration_s:=0.5", "control_recorder:=false",
         "wait_for_subscribers:=0", "settle_s:=5.0", "exit_when_done:=false"],
        DOMAIN_ID, tmp_path / "teacher.log", "teacher",
    )  # fmt: skip
    diagnostics = DiagnosticsOf(client, "teacher")
    forged = DiagnosticArray()
    statuses = []
    for received in ("abc", "-5", "9" * 40, "1e9", "", "٣"):  # the last: a non-ASCII digit
        values = [KeyValue(key="recording", value="true"),
                  KeyValue(key="received", value=received)]
        statuses.append(DiagnosticStatus(name="recorder", values=values))
    forged.status = statuses
    try:
        publisher = client.node.create_publisher(DiagnosticArray, "diagnostics", 10)
        client.spin_until(lambda: publisher.get_subscription_count() >= 1, 20.0, "the teacher")
        client.spin_until(lambda: diagnostics.latest.get("state") == "settling", 30.0,
                          "the teacher settling")
        for _ in range(3):
            publisher.publish(forged)
            client.spin_for(0.1)
        client.spin_until(lambda: diagnostics.latest.get("rejected") == "18", 10.0,
                          "18 rejected statuses")
        assert diagnostics.latest["rejected/diagnostics/malformed"] == "18"
        client.spin_until(lambda: diagnostics.latest.get("state") == "done", 20.0,
                          "the teacher done")
        assert _alive(nodes, "teacher"), nodes.all_logs()
        assert nodes.interrupt("teacher") == 0, nodes.all_logs()
    finally:
        diagnostics.close()
        nodes.close()


# -- the guards every callback and service goes through -------------------------------------------


class _LoggingOnly:
    """Just what RejectCounter and guarded_service use of a node: one logger."""

    def __init__(self) -> None:
        import rclpy.logging

        self.logger = rclpy.logging.get_logger("hostile_test")

    def get_logger(self):
        return self.logger


def test_a_failing_callback_is_counted_not_raised() -> None:
    from compliant_demo.nodes._common import RejectCounter

    rejects = RejectCounter(_LoggingOnly())  # type: ignore[arg-type]

    def fails(message: str) -> None:
        raise ValueError(f"cannot use {message}")

    guarded = rejects.guard("joint_states", fails)
    for message in ("a", "b", "c"):
        guarded(message)
    rejects.reject("joint_states", "oversized", "300 entries")
    assert rejects.values() == {"rejected": "4", "rejected/joint_states/callback_error": "3",
                                "rejected/joint_states/oversized": "1"}


def test_a_failing_service_answers_with_a_refusal() -> None:
    from std_srvs.srv import Trigger

    from compliant_demo.nodes._common import guarded_service

    def fails(_request, _response):
        raise ZeroDivisionError("division by zero")

    service = guarded_service(_LoggingOnly(), "run", fails)  # type: ignore[arg-type]
    response = service(Trigger.Request(), Trigger.Response())
    assert (response.success, response.message) == (False, "run failed: ZeroDivisionError")
