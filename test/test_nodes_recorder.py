"""The recorder node as a real process: garbage counted and flagged, diagnostics, signals."""

from __future__ import annotations

import math
import signal
from pathlib import Path

import numpy as np
import pytest
from nodes_support import TestClient, launched, start_module

from compliant_demo.store import DemoStore

pytestmark = [pytest.mark.ros, pytest.mark.slow]

DOMAIN_ID = 41
JOINTS = ["shoulder", "elbow"]


@pytest.fixture(scope="module")
def client():
    ros = TestClient(DOMAIN_ID, "recorder_test_client")
    yield ros
    ros.close()


def _recorder(tmp_path: Path, store: Path, *extra: str):
    return start_module(
        "compliant_demo.nodes.recorder",
        [f"store_path:={store}", "stiffness_channel:=none", "diagnostics_period_s:=0.2", *extra],
        DOMAIN_ID,
        tmp_path / "recorder.log",
        "recorder",
    )


def _publisher(client: TestClient):
    from sensor_msgs.msg import JointState

    from compliant_demo.nodes._common import recorded_qos

    publisher = client.node.create_publisher(JointState, "joint_states", recorded_qos(2000))
    client.spin_until(lambda: publisher.get_subscription_count() >= 1, 20.0, "a subscriber")
    return publisher


def _message(stamp, names=JOINTS, position=(0.1, 0.2), velocity=(0.0, 0.0), effort=(1.0, 2.0)):
    from sensor_msgs.msg import JointState

    from compliant_demo.nodes._common import to_stamp

    message = JointState()
    message.header.stamp = to_stamp(stamp)
    message.name = list(names)
    message.position = [float(v) for v in position]
    message.velocity = [float(v) for v in velocity]
    message.effort = [float(v) for v in effort]
    return message


def _latest_diagnostics(client: TestClient):
    from diagnostic_msgs.msg import DiagnosticArray

    seen: list = []  # the recorder's own (the teacher publishes on the same topic)
    subscription = client.node.create_subscription(
        DiagnosticArray, "diagnostics",
        lambda m: seen.append(m) if m.status[0].name == "recorder" else None, 10,
    )
    return seen, subscription


def _values(diagnostic_array) -> dict[str, str]:
    (status,) = diagnostic_array.status
    return {kv.key: kv.value for kv in status.values}


def test_garbage_is_counted_flagged_and_not_stored(tmp_path: Path, client: TestClient) -> None:
    store = tmp_path / "store.sqlite"
    nodes = _recorder(tmp_path, store)
    try:
        publisher = _publisher(client)
        seen, subscription = _latest_diagnostics(client)
        assert client.call_trigger("start").success
        t0 = 1.8e9
        good = 0
        for i in range(400):
            publisher.publish(_message(t0 + i * 1e-3))
            good += 1
            if i % 50 == 25:  # one of each kind of garbage every 50 samples (8 rounds)
                publisher.publish(_message(t0 + i * 1e-3 + 2e-4, position=(math.nan, 0.0)))
                publisher.publish(_message(t0 + i * 1e-3 + 3e-4, velocity=(0.0,)))
                publisher.publish(_message(t0 + (i - 5) * 1e-3))  # backwards
                publisher.publish(_message(t0 + i * 1e-3))  # repeated
                publisher.publish(_message(t0 + i * 1e-3 + 4e-4, names=["shoulder"],
                                           position=[0.1], velocity=[0.0], effort=[1.0]))
        total = good + 8 * 5
        latest = client.spin_until(
            lambda: seen and _values(seen[-1])["received"] == str(total) and seen[-1],
            20.0, "diagnostics counting every message",
        )
        values = _values(latest)
        (status,) = latest.status
        assert status.level == status.WARN  # anomalies present
        assert values["accepted"] == str(good) and values["recording"] == "true"
        reply = client.call_trigger("stop")
        assert reply.success and f"{good} samples accepted of {total} received" in reply.message
        assert client.call_trigger("stop").success is False  # not recording any more
        client.node.destroy_subscription(subscription)
        assert nodes.interrupt("recorder") == 0, nodes.all_logs()
    finally:
        nodes.close()
    with DemoStore(store, read_only=True) as db:
        (info,) = db.find_demonstrations(skill="cork_seat")
        demo = db.load_demonstration(info.id)
    assert info.status == "complete" and info.n_samples == good
    assert np.isfinite(demo.position).all()
    np.testing.assert_allclose(np.diff(demo.t), 1e-3, atol=1e-6)  # no garbage in between
    assert info.flags == {
        "received": total, "accepted": good, "stored_samples": good,
        "non_finite": 8, "wrong_lengths": 8, "backwards_stamps": 8, "repeated_stamps": 8,
        "missing_joints": 8,
    }


def test_sigint_finishes_an_open_demonstration_with_every_sample(
    tmp_path: Path, client: TestClient
) -> None:
    store = tmp_path / "store.sqlite"
    nodes = _recorder(tmp_path, store, "flush_interval_s:=0.2")
    try:
        publisher = _publisher(client)
        seen, subscription = _latest_diagnostics(client)
        assert client.call_trigger("start").success
        for i in range(300):
            publisher.publish(_message(1.8e9 + i * 1e-3))
        client.spin_until(lambda: seen and _values(seen[-1])["accepted"] == "300", 20.0,
                          "300 samples accepted")
        client.node.destroy_subscription(subscription)
        assert nodes.interrupt("recorder") == 0, nodes.all_logs()
        assert "finished as incomplete (interrupted)" in nodes.log("recorder")
    finally:
        nodes.close()
    with DemoStore(store, read_only=True) as db:
        (info,) = db.find_demonstrations(skill="cork_seat")
    assert info.status == "incomplete" and info.n_samples == 300
    assert info.flags["interrupted"] == 1 and info.flags["stored_samples"] == 300


def test_sigkill_mid_demonstration_keeps_everything_older_than_the_flush_interval(
    tmp_path: Path, client: TestClient
) -> None:
    """Teacher and recorder from record.launch.xml; the recorder dies by SIGKILL mid-demo.

    The recorder's own diagnostics say how many samples it had accepted at a moment; it is
    killed 0.25 s after that message arrived, longer than its 0.1 s flush interval plus a write,
    so every one of those samples must be in the store. (Counting from the recorder's side keeps
    the test independent of how late a loaded machine delivers the teacher's messages.)
    """
    store = tmp_path / "store.sqlite"
    arguments = {"store": str(store), "demos": "1"}
    extra = {"recorder": {"stiffness_channel": "none", "flush_interval_s": "0.1",
                          "diagnostics_period_s": "0.2"},
             "teacher": {"duration_s": "20.0"}}
    seen, subscription = _latest_diagnostics(client)
    with launched("record.launch.xml", arguments, DOMAIN_ID, tmp_path, extra) as nodes:
        client.spin_until(lambda: seen and int(_values(seen[-1])["accepted"]) > 1500, 60.0,
                          "1.5 s of accepted samples")
        accepted_before = int(_values(seen[-1])["accepted"])
        client.spin_for(0.25)
        nodes["recorder"].send_signal(signal.SIGKILL)
        assert nodes.wait("recorder", 10.0) == -signal.SIGKILL
    client.node.destroy_subscription(subscription)
    with DemoStore(store) as db:  # the next writable open recovers the dead writer's demo
        assert db.integrity_check() == ["ok"]
        (info,) = db.find_demonstrations()
        demo = db.load_demonstration(info.id)
    assert info.status == "incomplete"
    # No hole (samples 1 ms apart), and every sample accepted 0.25 s before the kill is stored.
    np.testing.assert_allclose(np.diff(demo.t), 1e-3, atol=1e-6)
    assert info.n_samples >= accepted_before, (info.n_samples, accepted_before)
