"""The recorder's ROS-free ingest path: message checks, buffer, motion trigger, writer."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

from compliant_demo.estimation import SlidingStiffnessEstimator
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.ingest import (
    ChunkBuffer,
    ChunkWriter,
    DemonstrationRequest,
    IngestCounters,
    MotionTrigger,
    RecordingSession,
    SampleChecker,
)
from compliant_demo.store import DemoStore

JOINTS = ("shoulder", "elbow")
RATE = 1000.0


def _message(i: int, names=JOINTS, *, stamp=None, position=None, velocity=None, effort=None):
    n = len(names)
    return (
        1.7e9 + i / RATE if stamp is None else stamp,
        list(names),
        [0.1 * i + j for j in range(n)] if position is None else position,
        [0.5] * n if velocity is None else velocity,
        [0.01 * i] * n if effort is None else effort,
    )


# -- SampleChecker ----------------------------------------------------------------------------


def test_checker_accepts_good_messages_and_reorders_joints() -> None:
    checker = SampleChecker(JOINTS, RATE)
    counters = IngestCounters()
    q, qd, tau = checker.check(counters, *_message(0))
    np.testing.assert_array_equal(q, [0.0, 1.0])
    q, qd, tau = checker.check(
        counters, 1.7e9 + 0.001, ["elbow", "shoulder"], [2.0, 1.0], [0.2, 0.1], [20.0, 10.0]
    )
    np.testing.assert_array_equal(q, [1.0, 2.0])
    np.testing.assert_array_equal(qd, [0.1, 0.2])
    np.testing.assert_array_equal(tau, [10.0, 20.0])
    assert counters.received == 2 and counters.anomalies() == {}


@pytest.mark.parametrize(
    "message, counter",
    [
        (_message(1, position=[0.0, math.nan]), "non_finite"),
        (_message(1, effort=[math.inf, 0.0]), "non_finite"),
        (_message(1, stamp=math.nan), "non_finite"),
        (_message(1, velocity=[0.0]), "wrong_lengths"),
        (_message(1, names=("shoulder",)), "missing_joints"),
        (_message(0), "repeated_stamps"),
        (_message(-5), "backwards_stamps"),
    ],
)
def test_checker_rejects_and_counts_garbage(message, counter: str) -> None:
    checker = SampleChecker(JOINTS, RATE)
    counters = IngestCounters()
    assert checker.check(counters, *_message(0)) is not None
    assert checker.check(counters, *message) is None
    assert counters.anomalies() == {counter: 1}
    assert counters.rejected == 1
    # The next good message is still accepted: garbage does not poison the stamp history.
    assert checker.check(counters, *_message(2)) is not None


def test_checker_counts_gaps_and_unknown_joints_but_keeps_the_sample() -> None:
    checker = SampleChecker(JOINTS, RATE, gap_factor=1.5)
    counters = IngestCounters()
    checker.check(counters, *_message(0))
    assert checker.check(counters, *_message(11)) is not None  # 10 samples missing
    extra = _message(12, names=("shoulder", "elbow", "wrist"))
    assert checker.check(counters, *extra) is not None
    assert counters.gaps == 1 and counters.missing_samples_estimate == 10
    assert counters.unknown_joints == 1 and counters.rejected == 0


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"joints": ()}, "joints"),
        ({"joints": ("a", "a")}, "joints"),
        ({"nominal_rate_hz": 0.0}, "nominal_rate_hz"),
        ({"gap_factor": 1.0}, "gap_factor"),
    ],
)
def test_checker_refuses_bad_configuration(kwargs, match: str) -> None:
    arguments = {"joints": JOINTS, "nominal_rate_hz": RATE, **kwargs}
    with pytest.raises(InvalidInputError, match=match):
        SampleChecker(**arguments)


# -- ChunkBuffer ------------------------------------------------------------------------------


def test_buffer_round_trips_samples_and_refuses_beyond_capacity() -> None:
    buffer = ChunkBuffer(n_joints=2, capacity=3)
    rng = np.random.default_rng(1)
    rows = rng.normal(size=(4, 9))
    kept = [buffer.append(r[0], r[1:3], r[3:5], r[5:7], r[7:9]) for r in rows]
    assert kept == [True, True, True, False]
    assert buffer.fill_fraction == 1.0
    chunk = buffer.take()
    assert len(chunk) == 3 and len(buffer) == 0 and buffer.take() is None
    np.testing.assert_array_equal(chunk.t, rows[:3, 0])
    np.testing.assert_array_equal(chunk.position, rows[:3, 1:3])
    np.testing.assert_array_equal(chunk.velocity, rows[:3, 3:5])
    np.testing.assert_array_equal(chunk.torque, rows[:3, 5:7])
    np.testing.assert_array_equal(chunk.reference, rows[:3, 7:9])


@pytest.mark.parametrize("n_joints, capacity, match", [(0, 5, "n_joints"), (2, 0, "capacity")])
def test_buffer_refuses_bad_sizes(n_joints: int, capacity: int, match: str) -> None:
    with pytest.raises(InvalidInputError, match=match):
        ChunkBuffer(n_joints, capacity)


# -- MotionTrigger ----------------------------------------------------------------------------


def test_motion_trigger_starts_on_motion_and_stops_after_stillness() -> None:
    trigger = MotionTrigger(start_speed=0.1, stop_speed=0.05, stop_hold_s=0.5)
    assert not trigger.should_start(np.array([0.09, -0.09]))
    assert trigger.should_start(np.array([0.0, -0.2]))
    assert not trigger.should_stop(0.0, np.array([0.01, 0.0]))
    assert not trigger.should_stop(0.4, np.array([0.01, 0.0]))
    assert not trigger.should_stop(0.45, np.array([0.06, 0.0]))  # moved again: timer restarts
    assert not trigger.should_stop(0.5, np.array([0.0, 0.0]))
    assert trigger.should_stop(1.0, np.array([0.0, 0.0]))


@pytest.mark.parametrize(
    "args, match",
    [((0.1, 0.2, 1.0), "stop_speed"), ((0.1, 0.0, 1.0), "stop_speed"), ((0.1, 0.05, 0.0), "hold")],
)
def test_motion_trigger_refuses_bad_settings(args, match: str) -> None:
    with pytest.raises(InvalidInputError, match=match):
        MotionTrigger(*args)


# -- Writer and session against a real store -------------------------------------------------


def _session(path, *, source="reference", trigger=None, capacity=100_000, flush=0.05,
             make_estimator=None):
    writer = ChunkWriter(lambda: DemoStore(path), make_estimator, flush_interval_s=flush)
    writer.start()
    request = DemonstrationRequest(
        skill="cork_seat",
        joints=JOINTS,
        operator="operator_a",
        tags=("bench",),
        nominal_rate_hz=RATE,
        stiffness_channel=source,
    )
    return RecordingSession(writer, SampleChecker(JOINTS, RATE), request, capacity, trigger)


def test_session_stores_every_accepted_sample_with_flags(tmp_path) -> None:
    path = tmp_path / "store.sqlite"
    session = _session(path)
    assert session.set_reference([30.0, 40.0])
    assert not session.set_reference([30.0])
    assert session.start() == (True, "recording skill 'cork_seat'")
    assert session.start()[0] is False
    for i in range(500):
        session.ingest(*_message(i))
        if i == 250:
            session.ingest(*_message(i - 3))  # backwards stamp: counted, not stored
            session.ingest(*_message(i, position=[math.nan, 0.0]))
    ok, message = session.stop()
    assert ok and "500 samples accepted of 502 received" in message
    assert session.stop()[0] is False
    assert session.shutdown()
    with DemoStore(path, read_only=True) as store:
        (info,) = store.find_demonstrations(skill="cork_seat")
        demo = store.load_demonstration(info.id)
    assert info.status == "complete"
    assert demo.t.shape == (500,)
    # Stamps are relative to the first sample; exact closed form i / rate (common practice).
    np.testing.assert_allclose(demo.t, np.arange(500) / RATE, atol=1e-6)
    np.testing.assert_array_equal(demo.position[:, 1], 0.1 * np.arange(500) + 1)
    np.testing.assert_array_equal(demo.stiffness, np.tile([30.0, 40.0], (500, 1)))
    assert info.flags == {
        "received": 502,
        "accepted": 500,
        "backwards_stamps": 1,
        "non_finite": 1,
        "stored_samples": 500,
    }


def test_session_flushes_while_recording_and_shutdown_marks_incomplete(tmp_path) -> None:
    path = tmp_path / "store.sqlite"
    session = _session(path, source="none", flush=0.02)
    session.start()
    for i in range(100):
        session.ingest(*_message(i))
    deadline = time.monotonic() + 5.0
    stored = 0
    while stored < 100 and time.monotonic() < deadline:
        time.sleep(0.02)
        current = session.current
        stored = current.stored_samples
    assert stored == 100  # written by the periodic flush, before any stop
    assert session.shutdown()
    with DemoStore(path, read_only=True) as store:
        (info,) = store.find_demonstrations(skill="cork_seat")
    assert info.status == "incomplete" and info.flags["interrupted"] == 1


def test_session_counts_drops_when_the_buffer_is_full(tmp_path) -> None:
    session = _session(tmp_path / "store.sqlite", source="none", capacity=10, flush=0.2)
    session.start()
    accepted = sum(session.ingest(*_message(i)) for i in range(25))
    assert 10 <= accepted < 25
    assert session.counters.dropped_buffer_full == 25 - accepted
    level, message, values = session.health(1.0)
    assert level == "warn" and "dropped_buffer_full" in message
    assert values["rate_hz"] == "25.0" and values["recording"] == "true"
    session.shutdown()


def test_session_discard_and_auto_start_stop(tmp_path) -> None:
    path = tmp_path / "store.sqlite"
    trigger = MotionTrigger(start_speed=0.1, stop_speed=0.05, stop_hold_s=0.0505)
    session = _session(path, source="none", trigger=trigger)
    for i in range(10):
        assert not session.ingest(*_message(i, velocity=[0.0, 0.0]))  # still: idle
    moving = [session.ingest(*_message(i, velocity=[0.3, 0.0])) for i in range(10, 40)]
    assert all(moving) and session.recording
    for i in range(40, 200):
        session.ingest(*_message(i, velocity=[0.0, 0.0]))
    assert not session.recording  # stopped once still for 51 ms (stamps 40..91 ms)
    assert session.wait_finished(5.0)
    session.start()
    session.ingest(*_message(300))
    assert session.stop("rejected", discarded=1)[0]
    assert session.shutdown()
    with DemoStore(path, read_only=True) as store:
        statuses = sorted(
            (d.status, d.n_samples, d.flags.get("auto_stopped", 0))
            for d in store.find_demonstrations(skill="cork_seat")
        )
    assert statuses == [("complete", 30 + 52, 1), ("rejected", 1, 0)]


def test_writer_reports_a_store_that_cannot_open(tmp_path) -> None:
    bad = tmp_path / "not_a_store.sqlite"
    bad.write_bytes(b"this is not sqlite" * 100)
    writer = ChunkWriter(lambda: DemoStore(bad), None)
    with pytest.raises(Exception, match="not_a_store"):
        writer.start()


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"skill": ""}, "skill"),
        ({"stiffness_channel": "guess"}, "stiffness_channel"),
    ],
)
def test_request_refuses_bad_metadata(kwargs, match: str) -> None:
    arguments = {"skill": "cork_seat", "joints": JOINTS, **kwargs}
    with pytest.raises(InvalidInputError, match=match):
        DemonstrationRequest(**arguments)


def test_writer_refuses_flush_interval_above_200_ms() -> None:
    with pytest.raises(InvalidInputError, match="flush_interval_s"):
        ChunkWriter(lambda: DemoStore(), None, flush_interval_s=0.25)


def test_checker_accepts_huge_finite_values_whose_sum_overflows() -> None:
    checker = SampleChecker(JOINTS, RATE)
    counters = IngestCounters()
    message = _message(0, position=[1e308, 1e308], effort=[-1e308, -1e308])
    assert checker.check(counters, *message) is not None
    assert counters.non_finite == 0


def test_buffer_joins_message_arrays_and_mixed_sequences_alike() -> None:
    from array import array

    buffer = ChunkBuffer(n_joints=2, capacity=10)
    rng = np.random.default_rng(2)
    rows = rng.normal(size=(3, 9))
    for r in rows[:2]:  # as rclpy hands JointState fields: array('d')
        buffer.append(r[0], array("d", r[1:3]), array("d", r[3:5]), array("d", r[5:7]),
                      tuple(r[7:9]))
    r = rows[2]  # a reordered message: plain lists
    buffer.append(r[0], list(r[1:3]), list(r[3:5]), list(r[5:7]), tuple(r[7:9]))
    chunk = buffer.take()
    np.testing.assert_array_equal(chunk.position, rows[:, 1:3])
    np.testing.assert_array_equal(chunk.velocity, rows[:, 3:5])
    np.testing.assert_array_equal(chunk.torque, rows[:, 5:7])
    only_arrays = ChunkBuffer(n_joints=2, capacity=10)
    for r in rows:
        only_arrays.append(r[0], array("d", r[1:3]), array("d", r[3:5]), array("d", r[5:7]),
                           tuple(r[7:9]))
    np.testing.assert_array_equal(only_arrays.take().torque, rows[:, 5:7])


def test_stop_with_a_wait_reports_what_was_stored(tmp_path) -> None:
    session = _session(tmp_path / "store.sqlite", source="none")
    session.start()
    for i in range(50):
        session.ingest(*_message(i))
    assert session.stop(wait_s=5.0) == (True, "complete: 50 stored, 50 samples accepted of 50 "
                                              "received")
    session.start()
    assert session.stop(wait_s=5.0) == (False, "nothing stored: 0 samples accepted of 0 received")
    assert session.shutdown()


def test_stop_with_a_wait_says_when_the_store_refused_the_samples(tmp_path) -> None:
    path = tmp_path / "store.sqlite"
    DemoStore(path).close()  # an existing store, opened read-only by the writer below
    writer = ChunkWriter(lambda: DemoStore(path, read_only=True), None, flush_interval_s=0.02)
    writer.start()
    request = DemonstrationRequest(skill="cork_seat", joints=JOINTS, stiffness_channel="none")
    session = RecordingSession(writer, SampleChecker(JOINTS, RATE), request, 1000)
    session.start()
    for i in range(20):
        session.ingest(*_message(i))
    ok, message = session.stop(wait_s=5.0)
    assert not ok
    assert message.startswith("incomplete: store write failed (StoreReadOnlyError")
    assert message.endswith("0 stored, 20 samples accepted of 20 received")
    level, summary, values = session.health(1.0)
    assert level == "error" and summary.startswith("store write failed")
    assert values["store_write_errors"] == "1"
    assert session.shutdown()


def test_estimated_stiffness_is_stored_with_the_estimators_latency(tmp_path) -> None:
    path = tmp_path / "store.sqlite"

    def make_estimator(n_joints: int) -> SlidingStiffnessEstimator:
        return SlidingStiffnessEstimator(n_joints, window_s=0.1, rate_hz=RATE,
                                         noise_variance_ratio=1.0, band_hz=(6.0, 11.2))

    session = _session(path, source="estimate", make_estimator=make_estimator)
    assert session.start()[0]
    for i in range(300):
        session.ingest(*_message(i))
    assert session.stop()[0]
    assert session.shutdown()
    with DemoStore(path, read_only=True) as store:
        (info,) = store.find_demonstrations(skill="cork_seat")
        demo = store.load_demonstration(info.id)
    assert demo.stiffness is not None and demo.stiffness.shape == (300, 2)
    assert info.flags["stiffness_latency_s"] == make_estimator(2).latency_s
    assert 0.0 <= info.flags["stiffness_excited_fraction"] <= 1.0


def test_model_channel_stores_the_springs_stiffness_from_the_held_motor_angles(tmp_path) -> None:
    from compliant_demo.ingest import STIFFNESS_MODEL_FLAG
    from compliant_demo.model_stiffness import held_model_stiffness
    from compliant_demo.models import AntagonisticParams

    springs = [AntagonisticParams(k1=10.0, k2=100.0, pretension_offset=0.05)] * 2
    path = tmp_path / "store.sqlite"
    seen: list[tuple] = []

    class Observer:
        def chunk(self, demo_id, request, t, position, estimator):
            seen.append((demo_id, float(t[0]), len(t)))

        def finished(self, status):
            seen.append(("finished", status))

    writer = ChunkWriter(lambda: DemoStore(path), None, flush_interval_s=0.05,
                         model_stiffness=held_model_stiffness(springs), observer=Observer())
    writer.start()
    request = DemonstrationRequest(skill="cork_seat", joints=JOINTS, nominal_rate_hz=RATE,
                                   stiffness_channel="model")
    session = RecordingSession(writer, SampleChecker(JOINTS, RATE), request, 10_000,
                               held_width=4)
    assert not session.set_reference([0.3, -0.1])  # two angles per joint wanted
    session.start()
    for i in range(100):
        if i == 40:
            assert session.set_reference([0.3, -0.1, 2.0, 1.7])
        session.ingest(*_message(i, position=[0.1, 1.85]))
    assert session.stop(wait_s=5.0)[0]
    session.start()  # a demonstration that stores nothing tells the observer nothing
    assert session.stop(wait_s=5.0) == (False, "nothing stored: 0 samples accepted of 0 received")
    session.shutdown()
    with DemoStore(path, read_only=True) as store:
        (info,) = store.find_demonstrations(skill="cork_seat")
        demo = store.load_demonstration(info.id)
    # Both springs taut (elongations 0.25 and 0.2 rad): K = 2 k1 + 2 k2 (theta1 - theta2 + 2 d0)
    # (Migliore, Brown and DeWeerth, ICRA 2005), NaN before the first motor angles arrived.
    assert np.isnan(demo.stiffness[:40]).all()
    np.testing.assert_allclose(demo.stiffness[40:, 0], 20 + 200 * (0.4 + 0.1), rtol=1e-12)
    np.testing.assert_allclose(demo.stiffness[40:, 1], 20 + 200 * (0.3 + 0.1), rtol=1e-12)
    assert info.flags[STIFFNESS_MODEL_FLAG] == 1
    assert seen[0][:2] == (info.id, 0.0) and seen[-1] == ("finished", "complete")
    assert sum(item[2] for item in seen[:-1]) == 100


def test_a_failing_observer_neither_loses_nor_downgrades_the_demonstration(tmp_path) -> None:
    class Failing:
        def chunk(self, *_arguments):
            raise RuntimeError("feedback broke")

        def finished(self, _status):
            raise RuntimeError("feedback broke again")

    path = tmp_path / "store.sqlite"
    writer = ChunkWriter(lambda: DemoStore(path), None, flush_interval_s=0.05, observer=Failing())
    writer.start()
    request = DemonstrationRequest(skill="cork_seat", joints=JOINTS, nominal_rate_hz=RATE,
                                   stiffness_channel="none")
    session = RecordingSession(writer, SampleChecker(JOINTS, RATE), request, 10_000)
    session.start()
    for i in range(300):
        session.ingest(*_message(i))
        if i == 150:
            time.sleep(0.15)  # a flush in between: the observer fails more than once
    assert session.stop(wait_s=5.0) == (True, "complete: 300 stored, 300 samples accepted of "
                                              "300 received")
    level, _message_text, values = session.health(1.0)
    assert level == "ok" and values["store_write_errors"] == "0"
    assert int(values["feedback_errors"]) >= 3  # two chunks or more, and the finish
    assert session.shutdown()
    with DemoStore(path, read_only=True) as store:
        (info,) = store.find_demonstrations()
        assert store.verify() == []
    assert info.status == "complete" and info.n_samples == 300
    assert "store_write_failed" not in info.flags
