"""Tests of banded multi-joint DTW, resampling and averaging of demonstrations."""

import numpy as np
import pytest
from dtaidistance import dtw as dtai_dtw
from dtaidistance import dtw_ndim
from hypothesis import given, settings
from hypothesis import strategies as st

from compliant_demo.alignment import (
    AlignedSet,
    DemoArrays,
    align_demonstrations,
    band_radius,
    dtw,
    resample,
)
from compliant_demo.exceptions import InvalidInputError


def _brute_force_dtw(a, b, radius):
    """Textbook O(n*m) recursion over a full matrix with the scaled-diagonal band mask."""
    n, m = len(a), len(b)
    acc = np.full((n + 1, m + 1), np.inf)
    acc[0, 0] = 0.0
    for i in range(n):
        centre = round(i * (m - 1) / (n - 1))
        for j in range(m):
            if abs(j - centre) <= radius:
                local = float(np.sum((a[i] - b[j]) ** 2))
                acc[i + 1, j + 1] = local + min(acc[i, j], acc[i, j + 1], acc[i + 1, j])
    return float(np.sqrt(acc[n, m]))


@pytest.mark.parametrize("seed", range(8))
def test_dtw_unbanded_matches_dtaidistance_cost_and_path(seed):
    rng = np.random.default_rng(seed)
    n, m = rng.integers(5, 60, size=2)
    a = rng.normal(size=(n, 3))
    b = rng.normal(size=(m, 3))
    cost, path = dtw(a, b, band=None)
    # Reference library dtaidistance 2.x: dtw_ndim.distance is sqrt of the summed squared
    # Euclidean distances along the best path, no length normalisation.
    assert cost == pytest.approx(dtw_ndim.distance(a, b), rel=1e-12)
    np.testing.assert_array_equal(path, np.array(dtw_ndim.warping_path(a, b)))


@pytest.mark.parametrize("radius", [1, 3, 10, 40])
def test_dtw_band_matches_dtaidistance_window_on_equal_lengths(radius):
    rng = np.random.default_rng(100 + radius)
    a = np.cumsum(rng.normal(size=(300, 7)), axis=0)
    b = np.cumsum(rng.normal(size=(300, 7)), axis=0)
    cost, path = dtw(a, b, band=radius / 300)
    assert band_radius(300, 300, radius / 300) == radius
    # dtaidistance keeps |i - j| < window, so our radius r corresponds to window = r + 1.
    ref_path, ref_cost = dtai_dtw.warping_path(
        a, b, window=radius + 1, use_c=True, use_ndim=True, include_distance=True
    )
    assert cost == pytest.approx(ref_cost, rel=1e-12)
    np.testing.assert_array_equal(path, np.array(ref_path))
    assert np.abs(path[:, 0] - path[:, 1]).max() <= radius


def test_dtw_band_changes_result_when_it_binds():
    rng = np.random.default_rng(7)
    a = np.cumsum(rng.normal(size=(200, 2)), axis=0)
    b = np.roll(a, 30, axis=0)
    narrow, _ = dtw(a, b, band=0.02)
    wide, _ = dtw(a, b, band=0.5)
    # dtaidistance (reference library) on the same pair, window = radius + 1.
    assert narrow == pytest.approx(dtw_ndim.distance(a, b, window=5), rel=1e-12)
    assert wide == pytest.approx(dtw_ndim.distance(a, b, window=101), rel=1e-12)
    assert wide < narrow


@pytest.mark.parametrize(("n", "m", "band"), [(40, 55, 0.1), (60, 31, 0.05), (25, 25, 0.2)])
def test_dtw_unequal_lengths_match_brute_force_band(n, m, band):
    rng = np.random.default_rng(n * m)
    a = rng.normal(size=(n, 2))
    b = rng.normal(size=(m, 2))
    cost, path = dtw(a, b, band=band)
    assert cost == pytest.approx(_brute_force_dtw(a, b, band_radius(n, m, band)), rel=1e-12)
    np.testing.assert_array_equal(path[0], [0, 0])
    np.testing.assert_array_equal(path[-1], [n - 1, m - 1])
    steps = np.diff(path, axis=0)
    assert ((steps >= 0) & (steps <= 1)).all() and (steps.sum(axis=1) >= 1).all()
    # The path's own cost reproduces the reported cost.
    along = np.sum((a[path[:, 0]] - b[path[:, 1]]) ** 2)
    assert np.sqrt(along) == pytest.approx(cost, rel=1e-12)


def test_dtw_recovers_known_multi_joint_time_warp():
    # A monotone time warp applied to a 3-joint trajectory must be undone by the path: the
    # matched indices follow the known warp within one sample (common practice for DTW checks).
    n = 400
    phase = np.linspace(0, 1, n)
    warp = phase + 0.08 * np.sin(np.pi * phase)
    traj = np.column_stack([np.sin(2 * np.pi * phase), np.cos(3 * phase), phase**2])
    warped = np.column_stack([np.sin(2 * np.pi * warp), np.cos(3 * warp), warp**2])
    cost, path = dtw(traj, warped, band=0.15)
    expected_j = np.interp(phase[path[:, 0]], warp, np.arange(n))
    assert np.median(np.abs(path[:, 1] - expected_j)) <= 1.0
    assert cost < 0.2


def test_dtw_identical_sequences_have_zero_cost_and_diagonal_path():
    x = np.linspace(0, 1, 50)[:, None] ** 2
    cost, path = dtw(x, x)
    assert cost == 0.0
    np.testing.assert_array_equal(path, np.column_stack([np.arange(50), np.arange(50)]))


def test_band_radius_widens_for_very_unequal_lengths():
    assert band_radius(100, 1000, 0.001) == 10
    assert band_radius(100, 100, None) == 100


def test_resample_is_exact_for_linear_signals():
    t = np.array([0.0, 0.1, 0.35, 0.6, 1.0])
    x = np.column_stack([2 * t + 1, -t])
    t_new, x_new = resample(t, x, 11)
    np.testing.assert_allclose(t_new, np.linspace(0, 1, 11))
    np.testing.assert_allclose(x_new, np.column_stack([2 * t_new + 1, -t_new]), atol=1e-14)
    _, flat = resample(t, t, 3)
    assert flat.shape == (3,)


def _demos(n_demos, seed, n=300, noise=0.0):
    rng = np.random.default_rng(seed)
    demos = []
    for _ in range(n_demos):
        duration = rng.uniform(0.8, 1.2)
        t = np.linspace(0, duration, n + int(rng.integers(-30, 30)))
        s = t / duration
        warp = s + rng.uniform(-0.05, 0.05) * np.sin(np.pi * s)
        position = np.column_stack([np.sin(np.pi * warp), warp**2])
        position += noise * rng.normal(size=position.shape)
        stiffness = 50 + 100 * warp
        demos.append(DemoArrays(t, position, {"stiffness": stiffness}, ("shoulder", "elbow")))
    return demos


def test_align_demonstrations_undoes_timing_variation():
    demos = _demos(5, seed=3)
    aligned = align_demonstrations(demos, band=0.1, n_out=200)
    assert isinstance(aligned, AlignedSet)
    assert aligned.n_demos == 5
    assert aligned.mean.shape == (200, 2) and aligned.variance.shape == (200, 2)
    assert aligned.warped_channels["stiffness"].shape == (5, 200)
    assert aligned.joint_names == ("shoulder", "elbow")
    # Every demonstration is the same curve in its own time, so after alignment the spread is
    # at the level of the sampling step, far below the spread in raw phase.
    raw = np.stack([resample(d.t, d.position, 200)[1] for d in demos])
    assert aligned.variance.max() < 0.05 * raw.var(axis=0, ddof=1).max()
    # The stiffness channel follows the same warp: it stays the same function of the position.
    expected_stiffness = 50 + 100 * np.sqrt(np.clip(aligned.warped_position[..., 1], 0, None))
    np.testing.assert_allclose(aligned.warped_channels["stiffness"], expected_stiffness, atol=2.0)
    assert aligned.time[-1] == pytest.approx(aligned.durations.mean())


def test_align_default_reference_is_median_duration():
    demos = _demos(4, seed=5)
    durations = [d.t[-1] for d in demos]
    aligned = align_demonstrations(demos)
    assert durations[aligned.reference_index] == sorted(durations)[1]
    assert aligned.mean.shape[0] == demos[aligned.reference_index].t.size
    assert aligned.dtw_costs[aligned.reference_index] == 0.0


def test_align_accepts_plain_arrays_and_tuples():
    x = np.linspace(0, 1, 30)[:, None]
    single = align_demonstrations([x])
    assert np.isnan(single.variance).all()
    longer = np.linspace(0, 1, 40)
    pair = align_demonstrations([(np.linspace(0, 1, 30), x), (np.linspace(0, 2, 40), longer)])
    assert pair.mean.shape == (30, 1)


def test_error_nan_position():
    x = np.zeros((10, 2))
    x[4, 1] = np.nan
    with pytest.raises(InvalidInputError, match=r"a: sample 4 is not finite"):
        dtw(x, np.zeros((10, 2)))


def test_error_channel_count():
    with pytest.raises(InvalidInputError, match="b: has 3 channels, a has 2"):
        dtw(np.zeros((5, 2)), np.zeros((5, 3)))


@pytest.mark.parametrize("band", [0.0, 1.5, float("nan"), "wide"])
def test_error_band(band):
    with pytest.raises(InvalidInputError, match="band must be a fraction"):
        dtw(np.zeros((5, 1)), np.zeros((5, 1)), band=band)


def test_error_non_increasing_time():
    t = np.array([0.0, 0.1, 0.1, 0.3])
    with pytest.raises(InvalidInputError, match=r"t is not increasing: t\[2\] = 0.1"):
        resample(t, np.zeros(4), 5)


def test_error_zero_duration():
    with pytest.raises(InvalidInputError, match="duration must be positive, got 0.0 s"):
        resample(np.array([1.0]), np.zeros(1), 5)


def test_error_resample_count():
    with pytest.raises(InvalidInputError, match="n must be an integer of at least 2, got 1"):
        resample(np.array([0.0, 1.0]), np.zeros(2), 1)


def test_error_nan_time_in_demo():
    t = np.linspace(0, 1, 5)
    t[2] = np.nan
    with pytest.raises(InvalidInputError, match=r"demonstrations\[0\].t\[2\] = nan"):
        align_demonstrations([(t, np.zeros((5, 1)))])


def test_error_mismatched_joint_sets():
    demos = _demos(2, seed=1)
    renamed = DemoArrays(demos[1].t, demos[1].position, demos[1].channels, ("shoulder", "wrist"))
    with pytest.raises(
        InvalidInputError,
        match=r"demonstrations\[1\].joint_names = "
        r"\['shoulder', 'wrist'\] differs",
    ):
        align_demonstrations([demos[0], renamed])
    with pytest.raises(InvalidInputError, match=r"demonstrations\[1\].position has 1 joints"):
        align_demonstrations([np.zeros((5, 2)), np.zeros((5, 1))])


def test_error_mismatched_channels():
    demos = _demos(2, seed=1)
    bare = DemoArrays(demos[1].t, demos[1].position, {}, demos[1].joint_names)
    with pytest.raises(InvalidInputError, match=r"demonstrations\[1\].channels = \[\] differs"):
        align_demonstrations([demos[0], bare])


def test_error_channel_length_and_reference():
    t = np.linspace(0, 1, 5)
    with pytest.raises(InvalidInputError, match=r"channels\['stiffness'\]: expected 5 samples"):
        align_demonstrations([(t, np.zeros((5, 1)), {"stiffness": np.zeros(4)})])
    with pytest.raises(InvalidInputError, match="reference must index one of 1"):
        align_demonstrations([(t, np.zeros((5, 1)))], reference=3)
    with pytest.raises(InvalidInputError, match="demonstrations: need at least one, got 0"):
        align_demonstrations([])


@settings(max_examples=40, deadline=None, derandomize=True)
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(2, 60), band=st.floats(0.01, 1.0))
def test_dtw_is_symmetric_and_bounded_by_the_diagonal(seed, n, band):
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(n, 3))
    b = rng.normal(size=(n, 3))
    cost, path = dtw(a, b, band=band)
    reverse, reverse_path = dtw(b, a, band=band)
    # Symmetric step pattern and band for equal lengths (Sakoe and Chiba 1978): same cost.
    assert reverse == pytest.approx(cost, rel=1e-12)
    # The diagonal is one admissible path, so the optimum cannot exceed it.
    assert cost <= np.sqrt(np.sum((a - b) ** 2)) * (1 + 1e-12)
    assert len(path) >= n and len(reverse_path) >= n
