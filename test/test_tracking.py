"""A replay against the demonstrations' aligned mean and spread, on closed-form demonstrations."""

from __future__ import annotations

import numpy as np
import pytest

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.tracking import demonstration_band, tracking_metrics

OFFSETS = (-0.1, 0.0, 0.1)
DURATIONS = (2.0, 2.5, 3.0)


def _minimum_jerk(s):
    """Minimum-jerk path from 0 to 1 over normalised time s (Flash and Hogan 1985)."""
    return 10 * s**3 - 15 * s**4 + 6 * s**5


def _demonstrations():
    """Joint 1: the same minimum-jerk motion at three durations (timing only, which DTW removes);
    joint 2: held still at a different angle each time (spread across the path, which stays)."""
    demos = []
    for duration, offset in zip(DURATIONS, OFFSETS, strict=True):
        t = np.linspace(0.0, duration, 501)
        demos.append((t, np.column_stack([_minimum_jerk(t / duration),
                                          np.full(t.size, offset)])))
    return demos


def test_band_is_the_aligned_mean_and_spread():
    band = demonstration_band(_demonstrations(), n_sigma=2.0, min_tolerance=0.01)
    assert band.n_demonstrations == 3 and band.duration_s == pytest.approx(2.5)
    # Joint 2: sample standard deviation (ddof 1) of -0.1, 0, 0.1 is 0.1 rad (closed form).
    np.testing.assert_allclose(band.spread[:, 1], 0.1, rtol=1e-12)
    np.testing.assert_allclose(band.tolerance[:, 1], 0.2, rtol=1e-12)
    np.testing.assert_allclose(band.mean[:, 1], 0.0, atol=1e-15)
    # Joint 1: after warping the mean is the minimum-jerk path in phase, to the DTW's sample
    # spacing (slope at most 1.875 per unit phase over 1/500: 3.75e-3 rad).
    np.testing.assert_allclose(band.mean[:, 0], _minimum_jerk(band.phase), atol=4e-3)
    assert band.tolerance[:, 0].min() == pytest.approx(0.01)


def test_replay_inside_and_outside_the_band():
    band = demonstration_band(_demonstrations())
    t = np.linspace(0.0, 3.5, 3501)  # 2.5 s of motion, then 1 s holding the goal
    q = np.column_stack([_minimum_jerk(np.clip(t / 2.5, 0, 1)), np.full(t.size, 0.3)])
    metrics = tracking_metrics(t, q, band, duration_s=2.5)
    # Joint 1 follows the mean within the DTW spacing (< the 0.01 rad floor); joint 2 sits
    # 0.3 rad from the mean with a 0.2 rad tolerance: 1.5 times the band, all the time.
    np.testing.assert_allclose(metrics["tracking_outside_fraction"], [0.0, 1.0], atol=1e-12)
    assert metrics["tracking_outside_fraction_any"] == pytest.approx(1.0, abs=1e-12)
    assert metrics["tracking_worst_excess"][0] < 0.4
    assert metrics["tracking_worst_excess"][1] == pytest.approx(1.5, rel=1e-12)
    assert metrics["tracking_worst_error_rad"][1] == pytest.approx(0.3, rel=1e-12)
    assert metrics["tracking_n_sigma"] == 2.0 and metrics["tracking_min_tolerance_rad"] == 0.01


def test_share_of_time_and_worst_time_of_a_bump():
    band = demonstration_band(_demonstrations())
    t = np.linspace(0.0, 2.5, 2501)
    bump = np.where((t >= 1.0) & (t < 1.5), 0.05 * np.sin(np.pi * (t - 1.0) / 0.5), 0.0)
    q = np.column_stack([_minimum_jerk(t / 2.5) + bump, np.zeros(t.size)])
    metrics = tracking_metrics(t, q, band)
    # Outside the 0.01 rad floor where 0.05 sin(pi s / 0.5) > 0.01 (plus the mean's < 4e-3 rad
    # DTW error): s in (0.5/pi asin(0.2), 0.5 - that), i.e. 0.436 s of 2.5 s (closed form).
    inside = 0.5 / np.pi * np.arcsin(0.2)
    assert metrics["tracking_outside_fraction"][0] == pytest.approx((0.5 - 2 * inside) / 2.5,
                                                                    abs=0.01)
    assert metrics["tracking_outside_fraction"][1] == 0.0
    assert metrics["tracking_worst_excess_time_s"][0] == pytest.approx(1.25, abs=0.02)
    assert metrics["tracking_worst_excess"][0] == pytest.approx(5.0, abs=0.4)


def test_tracking_bad_input():
    demos = _demonstrations()
    with pytest.raises(InvalidInputError, match=r"demonstrations: need at least 2 for a spread"):
        demonstration_band(demos[:1])
    with pytest.raises(InvalidInputError, match=r"n_sigma: must be positive, got 0"):
        demonstration_band(demos, n_sigma=0.0)
    with pytest.raises(InvalidInputError, match=r"min_tolerance: must be positive \(rad\)"):
        demonstration_band(demos, min_tolerance=-1.0)
    band = demonstration_band(demos)
    t = np.linspace(0.0, 1.0, 11)
    with pytest.raises(InvalidInputError, match=r"q: expected shape \(11, 2\), got \(11, 3\)"):
        tracking_metrics(t, np.zeros((11, 3)), band)
    with pytest.raises(InvalidInputError, match=r"duration_s: must be positive, got -1"):
        tracking_metrics(t, np.zeros((11, 2)), band, duration_s=-1.0)
    with pytest.raises(InvalidInputError, match=r"t: time must be strictly increasing"):
        tracking_metrics(t[::-1], np.zeros((11, 2)), band)
