"""The replay node's hardware mode against the fake hardware node, as real processes over
loopback DDS: the gate, a run to its completed stop, the stop service, frozen feedback, the bench
override, one commander per robot and read-only safety limits.

Rates are 100 Hz and the stale-feedback timeout 20 periods here, so a loaded test machine does
not stop a run by a gap of its own; the 500 Hz figures are measured by bench/bench_handoff.py.
"""

from __future__ import annotations

import re
import signal
import time
from pathlib import Path

import numpy as np
import pytest
from nodes_support import DiagnosticsOf, TestClient, set_parameter, start_module

from compliant_demo.handoff.envelope import EnvelopeLimits, envelope_violations
from compliant_demo.learning import learn_skill, save_skill
from compliant_demo.nodes._common import to_stamp
from compliant_demo.plant import load_plant
from compliant_demo.readiness import Reason, Verdict, load_criteria
from compliant_demo.store import DemoStore
from compliant_demo.teaching import cork_seat_scenario, teaching_series

pytestmark = [pytest.mark.ros, pytest.mark.slow]

DOMAIN_ID = 86
HOSTILE_DOMAIN_ID = 88  # the hostile-feedback and shutdown test's own domain
TOPICS = ["equilibrium_topic:=/arm/equilibrium", "stiffness_topic:=/arm/stiffness",
          "damping_topic:=/arm/damping", "feedback_topic:=/arm/joint_states"]
FAKE = ["rate_hz:=100.0", "diagnostics_period_s:=0.2", *TOPICS]


@pytest.fixture(scope="module")
def store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Skills ``ready`` (a ready verdict), ``unready`` (not ready) and ``unjudged`` (none)."""
    records = teaching_series(cork_seat_scenario(duration_s=1.0), 2, seed=5)
    demos = [{"t": r.t, "position": r.position, "stiffness": r.hand_stiffness_truth}
             for r in records]
    path = tmp_path_factory.mktemp("hardware") / "store.sqlite"
    criteria = load_criteria()
    digests = {"plant_digest": load_plant().digest, "criteria_digest": criteria.digest,
               "campaign_id": None, "criteria": criteria.model_dump(mode="json")}
    with DemoStore(path) as db:
        for name in ("ready", "unready", "unjudged"):
            skill = learn_skill(demos, joints=["shoulder", "elbow"], n_basis=15,
                                alignment="resample", stiffness_range=(15.0, 180.0), name=name)
            record = save_skill(db, skill)
            if name == "ready":
                db.save_verdict(Verdict("ready"), skill_id=record.id, **digests)
            elif name == "unready":
                reason = Reason(check="damping_ratio", joint="elbow", from_s=0.0, to_s=1.0,
                                value=0.011, threshold=0.5, unit="1", severity=0.98, link="x")
                db.save_verdict(Verdict("not_ready", (reason,)), skill_id=record.id, **digests)
    return path


def replay_parameters(store: Path, *extra: str) -> list[str]:
    return [f"store_path:={store}", "mode:=hardware", "command_rate_hz:=100.0",
            "feedback_timeout_periods:=20.0", "soft_start_s:=0.3", "settle_s:=0.2",
            "max_stiffness_rate:=400.0", "commander_check_s:=0.5", *TOPICS, *extra]


def start_replay(store: Path, tmp_path: Path, namespace: str, *extra: str):
    """A replay node in hardware mode in ``namespace`` (its services there, topics absolute)."""
    return start_module("compliant_demo.nodes.replay", replay_parameters(store, *extra),
                        DOMAIN_ID, tmp_path / f"replay_{namespace}.log", "replay",
                        remaps=[f"__ns:=/{namespace}"])


def results(store: Path, skill: str) -> list:
    with DemoStore(store, read_only=True) as db:
        record = db.load_skill_record(skill)
        return [db.load_replay_result(info.id) for info in db.find_replay_results(
            skill_id=record.id)]


def wait_stop(client: TestClient, diagnostics: DiagnosticsOf, count: int) -> list[dict]:
    client.spin_until(lambda: len([s for s in diagnostics.seen if "stop_reason" in s]) >= count,
                      60.0, f"{count} stop(s) in diagnostics")
    return [s for s in diagnostics.seen if "stop_reason" in s]


def test_gate_run_stop_service_and_read_only_limits(store: Path, tmp_path: Path) -> None:
    fake = start_module("compliant_demo.nodes.fake_hardware", FAKE, DOMAIN_ID,
                        tmp_path / "fake.log", "fake_hardware")
    replay = start_replay(store, tmp_path, "a")
    client = TestClient(DOMAIN_ID, "hardware_test_client")
    diagnostics = DiagnosticsOf(client, "replay", "/a/diagnostics")
    try:
        client.spin_until(lambda: diagnostics.latest.get("feedback_received", "0") != "0", 60.0,
                          "joint states at the replay node")
        assert set_parameter(client, "/a/replay", "skill", "unjudged").successful
        refused = client.call_trigger("/a/run")
        assert not refused.success
        assert refused.message.startswith("refused, 'unjudged' version 1: no verdict for this "
                                          "plant description and these criteria")
        assert set_parameter(client, "/a/replay", "skill", "unready").successful
        refused = client.call_trigger("/a/run")
        assert "verdict not_ready (damping_ratio on elbow: 0.011 against 0.5 1)" in (
            refused.message)
        for name, value in (("max_interaction_torque", 1e3), ("bench_override", True),
                            ("safe_stiffness", 100.0), ("criteria_file", "/tmp/x.yaml")):
            answer = set_parameter(client, "/a/replay", name, value)
            assert not answer.successful and "read-only" in answer.reason, (name, answer)

        assert set_parameter(client, "/a/replay", "skill", "ready").successful
        started = client.call_trigger("/a/run")
        assert started.success, started.message + replay.log("replay")
        assert "commanding 2 joints at 100 Hz" in started.message
        stops = wait_stop(client, diagnostics, 1)
        assert stops[0]["stop_reason"] == "completed", replay.log("replay")
        client.spin_until(lambda: len(results(store, "ready")) == 1, 30.0, "the stored run")
        (result,) = results(store, "ready")
        metrics = result.info.metrics
        assert result.info.status == "ok" and metrics["mode"] == "hardware"
        assert metrics["gate"]["allowed"] and not metrics["bench_override"]
        assert [s["reason"] for s in metrics["stops"]] == ["completed"]
        assert metrics["steps"] == metrics["steps_planned"]
        limits = EnvelopeLimits(**metrics["envelope"])
        assert envelope_violations(result.trace, limits, 0.01) == []
        assert result.trace["stiffness"][-1].tolist() == [limits.safe_stiffness] * 2

        started = client.call_trigger("/a/run")
        assert started.success, started.message
        client.spin_for(0.5)
        stopped = client.call_trigger("/a/stop")
        assert stopped.success and stopped.message.startswith(
            "stopping: holding the measured pose, stiffness to 20 N*m/rad at 400 N*m/rad/s")
        assert wait_stop(client, diagnostics, 2)[1]["stop_reason"] == "requested"
        client.spin_until(lambda: len(results(store, "ready")) == 2, 30.0, "the stopped run")
        second = max(results(store, "ready"), key=lambda r: r.info.created)
        assert second.info.status == "stopped"
        assert second.info.reason == "requested: stop service"
        assert client.call_trigger("/a/stop").message == "no hardware run to stop"
        assert replay.interrupt("replay") == 0, replay.log("replay")
    finally:
        client.close()
        replay.close()
        fake.close()


def test_frozen_feedback_stops_a_bench_override_run(store: Path, tmp_path: Path) -> None:
    from trajectory_msgs.msg import JointTrajectory  # ROS messages load inside the tests

    fake = start_module("compliant_demo.nodes.fake_hardware", [*FAKE, "freeze_at_s:=0.5"],
                        DOMAIN_ID, tmp_path / "fake.log", "fake_hardware")
    replay = start_replay(store, tmp_path, "b", "skill:=unjudged", "bench_override:=true",
                          "trajectory_topic:=/arm/trajectory")
    client = TestClient(DOMAIN_ID, "hardware_freeze_client")
    diagnostics = DiagnosticsOf(client, "replay", "/b/diagnostics")
    trajectories: list = []
    client.node.create_subscription(JointTrajectory, "/arm/trajectory", trajectories.append, 10)
    fake_diagnostics = DiagnosticsOf(client, "fake_hardware")
    try:
        client.spin_until(lambda: diagnostics.latest.get("feedback_received", "0") != "0", 60.0,
                          "joint states at the replay node")
        started = client.call_trigger("/b/run")
        assert started.success, started.message
        (stop,) = wait_stop(client, diagnostics, 1)
        assert stop["stop_reason"] == "stale_feedback", replay.log("replay")
        assert "bench-test override: 'unjudged' version 1: no verdict" in replay.log("replay")
        client.spin_until(lambda: fake_diagnostics.latest.get("freeze_to_stop_ms", "none")
                          != "none", 30.0, "the stop command at the fake hardware")
        client.spin_until(lambda: results(store, "unjudged"), 30.0, "the stored run")
        (result,) = results(store, "unjudged")
        assert result.info.status == "stopped"
        assert result.info.reason.startswith("stale_feedback: no fresh joint state for")
        assert result.info.metrics["bench_override"] is True
        assert result.info.metrics["gate"]["overridden"] is True
        # the optional trajectory: the equilibrium as one point, one period ahead
        last = trajectories[-1]
        assert list(last.joint_names) == ["shoulder", "elbow"] and len(last.points) == 1
        assert last.points[0].time_from_start.nanosec == 10_000_000
        assert len(last.points[0].positions) == 2
        entry = int(np.flatnonzero(result.trace["stop_entry"])[0])
        np.testing.assert_array_equal(result.trace["equilibrium"][entry],
                                      result.trace["measured"][entry])
    finally:
        client.close()
        replay.close()
        fake.close()


def test_a_second_commander_is_refused_and_stops_a_running_one(store: Path,
                                                                tmp_path: Path) -> None:
    fake = start_module("compliant_demo.nodes.fake_hardware", FAKE, DOMAIN_ID,
                        tmp_path / "fake.log", "fake_hardware")
    first = start_replay(store, tmp_path, "c", "skill:=ready", "settle_s:=40.0")
    client = TestClient(DOMAIN_ID, "hardware_commander_client")
    diagnostics = DiagnosticsOf(client, "replay", "/c/diagnostics")
    second = None
    try:
        client.spin_until(lambda: diagnostics.latest.get("feedback_received", "0") != "0", 60.0,
                          "joint states at the replay node")
        assert client.call_trigger("/c/run").success
        second = start_replay(store, tmp_path, "d", "skill:=ready")
        stops = wait_stop(client, diagnostics, 1)
        assert stops[0]["stop_reason"] == "other_commander"
        # the publisher may be seen before discovery names its node
        assert re.match(r"another node commands this robot: (/d/replay|a node discovery has not "
                        r"named yet) on /arm/", stops[0]["stop_detail"]), stops[0]["stop_detail"]
        for _attempt in range(20):  # the first answer may ask to wait commander_check_s
            refused = client.call_trigger("/d/run", timeout_s=60.0)
            if not refused.message.startswith("watching for other commanders"):
                break
            client.spin_for(0.3)
        assert not refused.success
        assert re.match(r"another node commands this robot: (/c/replay|a node discovery has not "
                        r"named yet) on /arm/", refused.message), refused.message
    finally:
        client.close()
        if second is not None:
            second.close()
        first.close()
        fake.close()


def test_future_stamped_feedback_is_refused_and_a_terminated_run_ends_with_its_stop_ramp(
    store: Path, tmp_path: Path
) -> None:
    from sensor_msgs.msg import JointState  # ROS messages load inside the tests
    from std_msgs.msg import Float64MultiArray

    fake = start_module("compliant_demo.nodes.fake_hardware", FAKE, HOSTILE_DOMAIN_ID,
                        tmp_path / "fake.log", "fake_hardware")
    replay = start_module("compliant_demo.nodes.replay",
                          replay_parameters(store, "skill:=ready", "settle_s:=40.0"),
                          HOSTILE_DOMAIN_ID, tmp_path / "replay_e.log", "replay",
                          remaps=["__ns:=/e"])
    client = TestClient(HOSTILE_DOMAIN_ID, "hardware_hostile_client")
    diagnostics = DiagnosticsOf(client, "replay", "/e/diagnostics")
    stiffness: list = []
    client.node.create_subscription(Float64MultiArray, "/arm/stiffness", stiffness.append, 10)
    hostile = client.node.create_publisher(JointState, "/arm/joint_states", 10)
    try:
        client.spin_until(lambda: diagnostics.latest.get("feedback_received", "0") != "0", 60.0,
                          "joint states at the replay node")
        # one sample from an hour ahead, far from the true pose: before it was refused, every
        # real sample after it looked old, and a run could start only from its pose
        forged = JointState(name=["shoulder", "elbow"], position=[2.0, -2.0])
        forged.header.stamp = to_stamp(time.time() + 3600.0)
        unset = JointState(name=["shoulder", "elbow"], position=[2.0, -2.0])
        for _ in range(5):
            hostile.publish(forged)
            hostile.publish(unset)
            client.spin_for(0.05)
        rejected = {"future_stamp": "0", "invalid_stamp": "0"}

        def counted() -> bool:
            for key, value in diagnostics.latest.items():
                reason = key.rsplit("/", 1)[-1]
                if key.startswith("rejected/") and reason in rejected:
                    rejected[reason] = value
            return "0" not in rejected.values()

        client.spin_until(counted, 30.0, "the forged joint states counted as rejected")
        started = client.call_trigger("/e/run")
        assert started.success, started.message + replay.log("replay")
        client.spin_until(lambda: diagnostics.latest.get("phase") == "running", 30.0,
                          "the run past its soft start")
        replay["replay"].send_signal(signal.SIGTERM)
        assert replay.wait("replay", 30.0) == 0, replay.log("replay")
        client.spin_for(0.5)
        result = max(results(store, "ready"), key=lambda r: r.info.created)
        assert (result.info.status, result.info.reason) == ("stopped",
                                                            "shutdown: the node is ending")
        limits = EnvelopeLimits(**result.info.metrics["envelope"])
        assert envelope_violations(result.trace, limits, 0.01) == []
        # the hardware is left holding the safe stiffness, not a command of the path
        assert result.trace["stiffness"][-1].tolist() == [limits.safe_stiffness] * 2
        assert list(stiffness[-1].data) == [limits.safe_stiffness] * 2
        np.testing.assert_array_less(np.abs(result.trace["measured"]), 1.9)
    finally:
        client.close()
        replay.close()
        fake.close()


@pytest.mark.parametrize(
    "parameters, message",
    [
        (["mode:=robot"], "parameter mode = 'robot': expected one of simulation, hardware"),
        (["mode:=hardware", "run_when_available:=true"],
         "run_when_available is refused in hardware mode: a person starts a hardware run"),
        (["mode:=hardware", "safe_stiffness:=5.0"],
         "safe_stiffness = 5.0: must lie within [15.0, 180.0] N*m/rad"),
        (["mode:=hardware", "criteria_file:=/etc/hostname"],
         "criteria_file = '/etc/hostname': refused, files may only come from"),
    ],
)
def test_bad_hardware_settings_stop_the_node_with_the_reason(
    tmp_path: Path, parameters: list[str], message: str
) -> None:
    nodes = start_module("compliant_demo.nodes.replay", parameters, DOMAIN_ID,
                         tmp_path / "replay.log", "replay")
    try:
        assert nodes.wait("replay", 60.0) == 2, nodes.log("replay")
    finally:
        nodes.close()
    assert message in nodes.log("replay")
