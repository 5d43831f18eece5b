"""The simulated teacher's session (what the teacher node hands out as time passes), without ROS."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.teaching import TeachingSession, cork_seat_scenario, teaching_series

JOINTS = ["shoulder", "elbow"]


@pytest.fixture(scope="module")
def scenario():
    return cork_seat_scenario(duration_s=2.0)


def test_teaching_session_hands_out_each_demonstration_once_in_time_order(
    scenario, tmp_path: Path
) -> None:
    session = TeachingSession(scenario, n_demonstrations=2, seed=3)
    expected = teaching_series(scenario, 2, seed=3)  # demo i is simulate_teaching(seed + i)
    for index, record in enumerate(expected):
        assert session.next_demonstration() == index
        first = list(session.due(0.5))
        assert [row[0] for row in first] == record.t[record.t <= 0.5].tolist()
        assert not list(session.due(0.5))  # nothing new is due
        rest = list(session.due(1e9))
        assert len(first) + len(rest) == record.n_samples == session.current_published
        np.testing.assert_array_equal([row[1] for row in rest], record.position[len(first) :])
        np.testing.assert_array_equal(
            [row[4] for row in rest], record.hand_stiffness_truth[len(first) :]
        )
        assert session.current_finished
    assert session.all_finished
    with pytest.raises(InvalidInputError, match="all 2 demonstrations were handed out"):
        session.next_demonstration()
    session.save_truth(tmp_path / "truth.npz")
    truth = np.load(tmp_path / "truth.npz")
    assert [int(truth[f"count_{i}"]) for i in range(2)] == [r.n_samples for r in expected]
    np.testing.assert_array_equal(truth["stiffness_1"], expected[1].hand_stiffness_truth)
    assert truth["joints"].tolist() == JOINTS


def test_teaching_session_needs_at_least_one_demonstration(scenario) -> None:
    with pytest.raises(InvalidInputError, match="n_demonstrations: must be at least 1, got 0"):
        TeachingSession(scenario, 0, 1)


