"""Live teaching feedback: open-end DTW against closed forms, the advice on constructed signals."""

from __future__ import annotations

import json
import math
import re
from types import SimpleNamespace

import numpy as np
import pytest

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.store import DemoStore
from compliant_demo.teaching_feedback import (
    TRACK_RATE_HZ,
    FeedbackSettings,
    LiveFeedback,
    OpenEndTracker,
    RecentIds,
    advice,
    earlier_demonstrations,
    progress,
    reference_path,
)

# A reference path moving along joint 0 only: any offset along joint 1 is its distance exactly.
M = 101
LINE = np.column_stack([np.linspace(0.0, 1.0, M), np.zeros(M)])


def test_a_stream_at_half_speed_matches_exactly_and_the_phase_is_half_its_samples():
    # Each reference point twice: a zero-cost path exists (asymmetric steps of 0 and 1), so the
    # open-end cost is 0 and the best prefix ends at sample k // 2 (closed form).
    tracker = OpenEndTracker(LINE)
    stream = np.repeat(LINE, 2, axis=0)
    for k in (1, 7, 60, 150):
        tracker = OpenEndTracker(LINE)
        tracker.update(stream[:k])
        assert tracker.rms_deviation == pytest.approx(0.0, abs=1e-12)
        assert tracker.phase == pytest.approx(((k - 1) // 2) / (M - 1), abs=1e-12)


def test_an_offset_across_the_path_is_its_rms_deviation_and_the_end_is_open():
    # Offset 0.03 rad across the motion: every matched point is exactly 0.03 rad away, so the
    # RMS deviation is 0.03 rad (closed form); stopping at 51 samples leaves the phase at 0.5.
    tracker = OpenEndTracker(LINE)
    tracker.update(LINE[:51] + [0.0, 0.03])
    assert tracker.rms_deviation == pytest.approx(0.03, rel=1e-12)
    assert tracker.deviation == pytest.approx(0.03, rel=1e-12)
    assert tracker.phase == pytest.approx(0.5, abs=1e-12)


def test_a_faster_stream_is_followed_up_to_twice_the_reference_rate():
    tracker = OpenEndTracker(LINE)
    tracker.update(LINE[::2])  # every second point: reference steps of 2
    assert tracker.phase == pytest.approx(1.0)
    assert tracker.rms_deviation == pytest.approx(0.0, abs=1e-12)


def test_tracker_inputs_are_checked():
    with pytest.raises(InvalidInputError, match=r"reference: expected a finite \(m >= 2"):
        OpenEndTracker(np.zeros((1, 2)))
    with pytest.raises(InvalidInputError, match=r"samples: expected finite \(n, 2\) values"):
        OpenEndTracker(LINE).update(np.zeros((3, 3)))
    with pytest.raises(InvalidInputError, match=r"samples: expected finite"):
        OpenEndTracker(LINE).update([[0.0, math.nan]])
    assert math.isnan(OpenEndTracker(LINE).rms_deviation)


@pytest.mark.parametrize(("field", "value", "match"), [
    ("min_excited_fraction", 1.5, r"min_excited_fraction = 1.5: must be in \[0, 1\]"),
    ("max_deviation_rad", 0.0, r"max_deviation_rad = 0.0: must be a positive"),
    ("max_references", 0, r"max_references = 0: must be >= 1"),
])
def test_settings_are_checked(field, value, match):
    with pytest.raises(InvalidInputError, match=match):
        FeedbackSettings(**{field: value})


def _demo(rng: np.random.Generator, stretch: float = 1.0, offset: float = 0.0, n: int = 2001):
    t = np.linspace(0.0, 4.0 * stretch, n)
    phase = np.linspace(0.0, 4.0, n)
    q = np.column_stack([np.sin(phase), np.cos(phase) + offset])
    return t, q + 0.002 * rng.normal(size=q.shape)


def test_reference_path_of_time_warped_demonstrations():
    rng = np.random.default_rng(3)
    demos = [_demo(rng, stretch) for stretch in (0.95, 1.0, 1.08)]
    reference = reference_path(demos)
    assert reference.count == 3
    # The mean lasts about the mean duration at the tracking rate.
    assert reference.mean.shape[0] == pytest.approx(4.0 * 1.01 * TRACK_RATE_HZ, rel=0.02)
    assert (reference.others_rms_deviation < 0.01).all()
    with pytest.raises(InvalidInputError, match="need at least one earlier demonstration"):
        reference_path([])


class _Estimator:
    """What LiveFeedback reads of the online estimator, with a set excited share."""

    def __init__(self, share: float):
        self.window, self.settle, self.samples_seen = 10, 10, 0
        self.share = share

    def summary_flags(self):
        return {"stiffness_excited_fraction": self.share}


REQUEST = SimpleNamespace(skill="cork_seat", tags=("bench",), joints=("shoulder", "elbow"))


def _feed(feedback: LiveFeedback, demo_id: str, t, q, estimator, chunk: int = 100) -> None:
    for start in range(0, len(t), chunk):
        estimator.samples_seen += len(t[start:start + chunk])
        feedback.chunk(demo_id, REQUEST, t[start:start + chunk], q[start:start + chunk],
                       estimator)


def _watch(feedback: LiveFeedback, demo_id, t, q, share, status="complete"):
    _feed(feedback, demo_id, t, q, _Estimator(share))
    assert feedback.wait_ready(30.0)
    feedback.finished(status)
    return feedback.report()


def test_feedback_keeps_a_close_well_excited_demonstration():
    rng = np.random.default_rng(5)
    earlier = [_demo(rng, s) for s in (0.97, 1.03)]
    asked = []
    feedback = LiveFeedback(lambda *a: asked.append(a) or earlier)
    report = _watch(feedback, "d-1", *_demo(rng, 1.0), share=0.9)
    assert asked == [("cork_seat", ("bench",), ("shoulder", "elbow"), 10)]
    assert report.state == "finished" and report.reasons == ()
    assert report.references == 2 and report.phase == pytest.approx(1.0, abs=0.03)
    assert report.rms_deviation_rad < 0.01
    line = advice(report.values())
    assert line.startswith("demonstration d-1: keep it (stiffness estimate in 90% of the windows")


def test_feedback_advises_a_retake_when_poorly_excited_and_far_from_the_others():
    rng = np.random.default_rng(6)
    earlier = [_demo(rng, s) for s in (0.97, 1.03)]
    feedback = LiveFeedback(lambda *a: earlier, FeedbackSettings(0.6, 0.05))
    # 0.2 rad off on joint 1 over the whole path: the warping may match nearer points of the
    # curved path, but never farther than the offset (plus noise).
    report = _watch(feedback, "d-2", *_demo(rng, 1.0, offset=0.2), share=0.25)
    assert report.level == "warn"
    assert 0.1 < report.rms_deviation_rad < 0.21
    poorly, far = report.reasons
    assert poorly == ("poorly excited: a stiffness estimate in 25% of the windows, at least "
                      "60% wanted")
    assert far.startswith(f"far from the others: RMS deviation {report.rms_deviation_rad:.3f}")
    assert "rad from the aligned mean of 2 earlier demonstration(s), at most 0.050 rad" in far
    line = advice(report.values())
    assert line == f"demonstration d-2: take it again: {poorly}; {far}"
    record = json.loads(advice(report.values(), as_json=True))
    assert record["retake"] is True and record["reasons"] == [poorly, far]


def test_feedback_without_earlier_demonstrations_judges_the_excitation_only():
    rng = np.random.default_rng(7)
    feedback = LiveFeedback(lambda *a: [])
    t, q = _demo(rng)
    _feed(feedback, "d-3", t[:500], q[:500], _Estimator(0.8))
    assert feedback.wait_ready(30.0)
    live = feedback.report()
    assert live.state == "recording" and live.references == 0 and live.phase is None
    assert progress(live.values()).startswith("recording d-3: 1.00 s, estimate in 80%")
    assert advice(live.values()) is None
    feedback.finished("incomplete")
    report = feedback.report()
    assert report.reasons == ("stored as incomplete",)
    assert progress(report.values()) is None


def test_a_failing_reference_load_is_reported_and_recording_goes_on():
    def broken(*_args):
        raise OSError("disk gone")

    rng = np.random.default_rng(8)
    feedback = LiveFeedback(broken)
    report = _watch(feedback, "d-4", *_demo(rng), share=0.9)
    assert feedback.reference_error == "OSError: disk gone"
    assert report.reasons == () and report.references == 0


def test_earlier_demonstrations_come_from_the_store_by_skill_tags_and_status(tmp_path):
    rng = np.random.default_rng(9)
    with DemoStore(":memory:") as store:
        ids = []
        for index, (tags, status) in enumerate([(["bench"], "complete"), (["other"], "complete"),
                                                (["bench"], "rejected"), (["bench"], "complete")]):
            t = np.arange(0, 1.0, 1e-3)
            q = rng.normal(size=(t.size, 2))
            demo_id = store.add_demonstration(
                t=t, position=q, velocity=q, torque=q, skill="cork_seat",
                joints=["shoulder", "elbow"], tags=tags, start_time=1000.0 + index)
            if status != "complete":
                store.mark_status(demo_id, status)
            ids.append((demo_id, q))
        found = earlier_demonstrations(store, "cork_seat", ["bench"], ["elbow"], limit=5)
        assert len(found) == 2
        # oldest first, thinned to about twice the tracking rate (every 10th sample at 1 kHz)
        np.testing.assert_array_equal(found[0][1][:, 0], ids[0][1][::10, 1])
        np.testing.assert_array_equal(found[1][1][:, 0], ids[3][1][::10, 1])
        assert len(earlier_demonstrations(store, "cork_seat", ["bench"], ["elbow"], 1)) == 1


def test_forged_feedback_values_can_neither_write_lines_nor_send_escapes():
    forged = {"state": "finished", "retake": "true", "demonstration_id": "d-9\ndemonstration "
              "d-10: keep it", "reasons": "\x1b[2J" + "x" * 5000}
    line = advice(forged)
    assert line is not None and "\n" not in line and "\x1b" not in line
    assert line.startswith("demonstration d-9\\ndemonstration d-10: keep it: take it again: "
                           "\\x1b[2J")
    assert len(line) < 1000
    assert json.loads(advice(forged, as_json=True))["demonstration_id"].startswith("d-9\\n")
    recording = dict(forged, state="recording", elapsed_s="\u202e1.0")
    assert progress(recording).startswith("recording d-9\\ndemonstration d-10: keep it: "
                                          "\\u202e1.0 s")


@pytest.mark.parametrize(("option", "value", "match"), [
    ("--timeout", "0", r"--timeout: '0' is not a number of seconds in \(0, 1e7\]"),
    ("--demos", "0", r"--demos: 0 is out of range \(1..1000000\)"),
    ("--domain-id", "300", r"--domain-id: 300 is out of range \(0..232\)"),
    # the node died with a traceback and exit status 1, which reads as "take it again"
    ("--topic", "", r"--topic: '' is not a ROS topic name"),
    ("--topic", "bad topic!", r"--topic: 'bad topic!' is not a ROS topic name \(parts of"),
    ("--topic", "123", r"--topic: '123' is not a ROS topic name"),
    ("--topic", "[1,2]", r"--topic: '\[1,2\]' is not a ROS topic name"),
    ("--topic", "a//b", r"--topic: 'a//b' is not a ROS topic name"),
])
def test_teaching_watch_refuses_bad_bounds_before_starting_anything(capsys, option, value, match):
    from compliant_demo.cli import main

    assert main(["teaching-watch", option, value]) == 2
    assert re.search(match, capsys.readouterr().err)


def test_recent_ids_judge_each_id_once_and_forget_the_oldest_beyond_capacity():
    ids = RecentIds(3)
    assert [ids.add(i) for i in ("a", "b", "a", "c")] == [True, True, False, True]
    assert ids.add("d") and len(ids) == 3  # "a" forgotten
    assert ids.add("a") and not ids.add("d")
    for k in range(10_000):  # a flood of forged ids stays bounded
        ids.add(f"forged-{k}")
    assert len(ids) == 3
    with pytest.raises(InvalidInputError, match=r"capacity: need at least 1 id, got 0"):
        RecentIds(0)
