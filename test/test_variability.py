"""Tests of the variance pooled along the phase and its degrees of freedom (variability.py)."""

import math

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter1d
from scipy.stats import chi2

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.variability import (
    VARIABILITY_BANDWIDTH,
    VARIABILITY_BANDWIDTH_CANDIDATES,
    held_level_variance,
    pooled_variance,
    select_bandwidth,
    select_level_penalties,
    select_variability_model,
    stiffness_from_variability,
)


def _correlated_deviations(n_reps, n_demos, n_samples, length, seed):
    """Deviations of unit variance whose correlation along the phase is Gaussian with std
    ``length`` samples (white noise through a Gaussian kernel of std length / sqrt(2))."""
    rng = np.random.default_rng(seed)
    white = rng.normal(size=(n_reps, n_demos, n_samples + 200, 1))
    smooth = gaussian_filter1d(white, length / math.sqrt(2.0), axis=2, mode="wrap")
    smooth = smooth[:, :, 100:-100]
    return smooth / smooth.std()


def test_zero_bandwidth_is_the_per_sample_variance():
    rng = np.random.default_rng(1)
    positions = rng.normal(size=(6, 50, 2))
    pooled = pooled_variance(positions, 0.0)
    np.testing.assert_allclose(pooled.variance, positions.var(axis=0, ddof=1), rtol=1e-12)
    np.testing.assert_array_equal(pooled.degrees_of_freedom, [5.0, 5.0])


def test_independent_deviations_gain_the_kernels_sample_count():
    # Independent samples: sum_k w_k^2 = 1 / (2 sqrt(pi) sigma) for a Gaussian kernel of std
    # sigma samples (closed form of the integral of a squared Gaussian), so
    # nu = (n - 1) * 2 sqrt(pi) sigma; within 5 % (the estimated correlations add a little).
    rng = np.random.default_rng(2)
    positions = rng.normal(size=(8, 2001, 1))
    pooled = pooled_variance(positions, 0.03)
    expected = 7 * 2 * math.sqrt(math.pi) * 0.03 * 2000
    assert pooled.degrees_of_freedom[0] == pytest.approx(expected, rel=0.05)
    assert pooled.correlation_length[0] < 0.001


def test_pooled_variance_is_unbiased_and_its_spread_matches_the_degrees_of_freedom():
    # Correlated normal deviations of unit variance, correlation exp(-lag^2 / (2 L^2)) with
    # L = 40 of 1,000 samples, 8 demonstrations, 300 seeded repetitions, kernel std
    # s = 30 samples. Closed form (sums as Gaussian integrals): sum_lag rho^2 (w * w) =
    # (L / sqrt2) / sqrt(L^2 / 2 + 2 s^2), so nu = 7 / 0.555 = 12.6; estimated within 10 %.
    # Satterthwaite (1946): nu V / sigma^2 is about chi-square with nu degrees of freedom, so
    # var(V) = 2 / nu: within 20 % (standard error of a variance from 300 repetitions: 8 %).
    # V is unbiased everywhere, the ends included (Nadaraya-Watson weights): the mean over the
    # repetitions within 0.1 at the ends (standard error there about 0.03) and 0.05 over the
    # middle.
    deviations = _correlated_deviations(300, 8, 1000, 40.0, seed=3)
    results = [pooled_variance(rep, 0.03) for rep in deviations]
    values = np.array([r.variance[:, 0] for r in results])
    nu = np.median([r.degrees_of_freedom[0] for r in results])
    expected = 7.0 / ((40.0 / math.sqrt(2.0)) / math.sqrt(40.0**2 / 2 + 2 * 30.0**2))
    assert nu == pytest.approx(expected, rel=0.1)
    mean = values.mean(axis=0)
    np.testing.assert_allclose(mean[[0, 999]], 1.0, atol=0.1)
    assert mean[400:600].mean() == pytest.approx(1.0, abs=0.05)
    middle = values[:, 400:600]
    assert middle.var(axis=0).mean() / (2.0 / nu) == pytest.approx(1.0, rel=0.2)


def test_pooling_leaves_a_step_of_the_spread_in_place():
    # A spread that steps from 0.02 to 0.005 rad at the middle: away from the step by three
    # bandwidths the pooled variance is the per-sample level within 30 % (30 demonstrations).
    rng = np.random.default_rng(4)
    sigma = np.where(np.arange(1000) < 500, 0.02, 0.005)
    positions = sigma[None, :, None] * rng.normal(size=(30, 1000, 1))
    pooled = pooled_variance(positions, 0.03).variance[:, 0]
    assert pooled[300] == pytest.approx(0.02**2, rel=0.3)
    assert pooled[700] == pytest.approx(0.005**2, rel=0.3)


def test_degrees_of_freedom_set_the_median_factor():
    # c = m(nu) / nu with m the chi-square median. Closed forms: chi-square with 2 degrees of
    # freedom is exponential with mean 2, so m(2) = 2 ln 2 and c = ln 2 (exact to 1e-12); for
    # large nu the Wilson-Hilferty approximation m(nu) = nu (1 - 2 / (9 nu))^3 (Wilson and
    # Hilferty, PNAS 17(12), 684-688, 1931), within 1e-4 at nu = 50. The variance equals the
    # reference spread squared and K_ref = 1, so the schedule is c itself (k_min far below).
    variance = np.full((3, 2), 0.02**2)
    k = stiffness_from_variability(variance, 1e-3, 10.0, n_demos=8, reference_stiffness=1.0,
                                   degrees_of_freedom=np.array([2.0, 50.0]))
    assert k[0, 0] == pytest.approx(math.log(2.0), abs=1e-12)
    assert k[0, 1] == pytest.approx((1 - 2 / 450) ** 3, abs=1e-4)
    # Smooth through nu = 2, where the former (nu - 2) / nu fell to zero: three demonstrations
    # whose pooled degrees of freedom came out just above 2 got k_min everywhere.
    near = stiffness_from_variability(variance, 1e-3, 10.0, n_demos=3, reference_stiffness=1.0,
                                      degrees_of_freedom=2.0 + 1e-12)
    np.testing.assert_allclose(near, math.log(2.0), rtol=1e-9)
    # The default is n_demos - 1 (per-sample variance): 2 demonstrations -> m(1) = 0.4549...
    # (scipy.stats.chi2 as the reference library; 0.455 from tables of the chi-square median).
    two = stiffness_from_variability(variance, 1e-3, 10.0, n_demos=2, reference_stiffness=1.0)
    np.testing.assert_allclose(two, chi2.median(1.0), rtol=1e-12)
    assert two[0, 0] == pytest.approx(0.455, abs=5e-4)


@pytest.mark.parametrize("n_demos", [2, 3, 4, 8])
def test_the_schedule_is_median_unbiased_for_normal_deviations(n_demos):
    # Per-sample variance of n normal draws with known sigma = 0.01 rad: the law's stiffness at
    # the true spread is K = 6 * (0.02 / 0.01)^2 = 24 N*m/rad. nu s^2 / sigma^2 is chi-square
    # with nu = n - 1 (Casella and Berger, Statistical Inference, 2nd ed., Theorem 5.3.1, from
    # memory), so exactly half of the schedules lie at or below 24, for exponent 1 and 0.5
    # alike (a median passes through increasing maps); 40,000 seeded sets, standard error of
    # the share 0.0025, tolerance 0.01. The mean-unbiased factor (nu - 2) / nu it replaces puts
    # P(chi^2_3 >= 1) = 0.80 of them below at n = 4 and cannot be formed at n <= 3.
    rng = np.random.default_rng(20 + n_demos)
    variance = (0.01 * rng.normal(size=(n_demos, 40_000, 1))).var(axis=0, ddof=1)
    for exponent, truth in ((1.0, 24.0), (0.5, 12.0)):
        k = stiffness_from_variability(variance, 1e-6, 1e9, n_demos=n_demos,
                                       reference_stiffness=6.0, exponent=exponent)
        assert np.isfinite(k).all()
        assert np.mean(k <= truth) == pytest.approx(0.5, abs=0.01)


@pytest.mark.parametrize("n_demos", [2, 3, 4, 8])
def test_pooled_schedule_is_about_median_unbiased_and_ordered(n_demos):
    # Independent normal deviations whose spread steps from 0.02 rad (K = 6 N*m/rad at the
    # anchor 0.02 rad / 6) to 0.0075 rad (K = 6 * (0.02 / 0.0075)^2 = 42.7) over the middle
    # third, 600 samples, 200 seeded repetitions, pooled with the default kernel (n - 1 times
    # 2 sqrt(pi) 0.03 * 599 = 64 degrees of freedom, Satterthwaite, so the chi-square median is
    # an approximation): three bandwidths away from the steps the share of schedules at or
    # below the truth is 1/2 within 0.08, every schedule is finite and inside the range
    # [2, 200], and each repetition's median over the stiff third exceeds its medians over
    # both soft thirds.
    rng = np.random.default_rng(40 + n_demos)
    phase = np.arange(600)
    sigma = np.where((phase >= 200) & (phase < 400), 0.0075, 0.02)
    truth = 6.0 * (0.02 / sigma) ** 2
    below = []
    for _ in range(200):
        positions = sigma[None, :, None] * rng.normal(size=(n_demos, 600, 1))
        pooled = pooled_variance(positions)
        k = stiffness_from_variability(pooled.variance, 2.0, 200.0, n_demos=n_demos,
                                       reference_stiffness=6.0,
                                       degrees_of_freedom=pooled.degrees_of_freedom)[:, 0]
        assert np.isfinite(k).all() and k.min() >= 2.0 and k.max() <= 200.0
        stiff = np.median(k[200:400])
        assert stiff > np.median(k[:200]) and stiff > np.median(k[400:])
        below.append([np.mean(k[part] <= truth[part]) for part in (slice(60, 140),
                                                                    slice(260, 340))])
    np.testing.assert_allclose(np.mean(below, axis=0), 0.5, atol=0.08)


def test_a_constant_spread_takes_the_widest_bandwidth():
    # Independent deviations of one constant spread: a wider kernel adds no bias and only
    # removes noise from the held-out likelihood, so the widest candidate wins (seeded, 8
    # demonstrations, 1,000 samples, 2 joints).
    rng = np.random.default_rng(5)
    chosen = select_bandwidth(0.01 * rng.normal(size=(8, 1000, 2)))
    assert chosen == max(VARIABILITY_BANDWIDTH_CANDIDATES)


def test_a_spread_that_changes_every_fiftieth_of_the_phase_takes_the_narrowest():
    # The spread alternates between 0.02 and 0.002 rad every 20 of 1,000 samples: any kernel
    # wider than the narrowest smears a tenfold change of the spread, which the held-out
    # likelihood punishes far more than the noise of the narrowest kernel (20 demonstrations).
    rng = np.random.default_rng(6)
    sigma = np.where((np.arange(1000) // 20) % 2 == 0, 0.02, 0.002)
    chosen = select_bandwidth(sigma[None, :, None] * rng.normal(size=(20, 1000, 1)))
    assert chosen == min(VARIABILITY_BANDWIDTH_CANDIDATES)


def test_too_few_or_identical_demonstrations_keep_the_default_bandwidth():
    rng = np.random.default_rng(7)
    assert select_bandwidth(rng.normal(size=(2, 100, 1))) == VARIABILITY_BANDWIDTH
    assert select_bandwidth(np.ones((5, 100, 2))) == VARIABILITY_BANDWIDTH
    # Given candidates are the only choices.
    assert select_bandwidth(rng.normal(size=(6, 500, 1)), (0.04,)) == 0.04


def test_error_select_bandwidth_inputs():
    with pytest.raises(InvalidInputError, match=r"2 demonstrations .* got shape \(1, 5, 2\)"):
        select_bandwidth(np.zeros((1, 5, 2)))
    bad = np.zeros((3, 5, 1))
    bad[2, 4, 0] = np.nan
    with pytest.raises(InvalidInputError, match=r"positions\[2, 4, 0\] = nan is not finite"):
        select_bandwidth(bad)
    with pytest.raises(InvalidInputError,
                       match=r"candidates must be bandwidths in \(0, 1\], got \(\)"):
        select_bandwidth(np.zeros((3, 5, 1)), ())
    with pytest.raises(InvalidInputError, match=r"candidates .* got \(0.05, 0.0\)"):
        select_bandwidth(np.zeros((3, 5, 1)), (0.05, 0.0))


def test_error_pooled_variance_inputs():
    with pytest.raises(InvalidInputError, match=r"2 demonstrations .* got shape \(1, 5, 2\)"):
        pooled_variance(np.zeros((1, 5, 2)))
    with pytest.raises(InvalidInputError, match=r"got shape \(5, 2\)"):
        pooled_variance(np.zeros((5, 2)))
    bad = np.zeros((3, 5, 2))
    bad[1, 2, 0] = np.inf
    with pytest.raises(InvalidInputError, match=r"positions\[1, 2, 0\] = inf is not finite"):
        pooled_variance(bad)
    with pytest.raises(InvalidInputError, match=r"bandwidth must lie in \[0, 1\], got -0.1"):
        pooled_variance(np.zeros((3, 5, 2)), -0.1)
    with pytest.raises(InvalidInputError, match="degrees_of_freedom must be positive and finite"):
        stiffness_from_variability(np.ones((4, 2)), 1.0, 2.0, n_demos=3, degrees_of_freedom=0.0)


def _held_spread(rng, n_demos=8):
    """Independent normal deviations, 2,000 samples: 0.02 rad, 0.005 rad over [600, 1200),
    0.02 rad again (a soft approach, a stiff hold, a soft retreat)."""
    phase = np.arange(2000)
    sigma = np.where((phase >= 600) & (phase < 1200), 0.005, 0.02)
    return sigma, sigma[None, :, None] * rng.normal(size=(n_demos, 2000, 1))


def test_held_levels_recover_known_changes_and_fuse_equal_levels():
    # The changes lie on block edges (200 blocks of 10 samples), so the stretches are exactly
    # [0, 600), [600, 1200), [1200, 2000) and the two soft ones share one level. Each level is
    # the mean of its samples' variances: nu s^2 / sigma^2 is chi-square with nu = 7 m for m
    # independent samples (Casella and Berger, Theorem 5.3.1), relative std sqrt(2 / nu) =
    # 1.4 % (soft, m = 1,400) and 2.2 % (stiff, m = 600); tolerance 6 % and 9 % (4 std).
    # Satterthwaite's nu for independent samples is (n - 1) m; the estimated correlations'
    # sampling noise only lowers it (by about a fifth for the soft level here): within
    # [0.7, 1] of (n - 1) m.
    sigma, positions = _held_spread(np.random.default_rng(8))
    held = held_level_variance(positions)
    assert held.n_stretches == (3,) and held.n_levels == (2,)
    np.testing.assert_array_equal(np.nonzero(np.diff(held.variance[:, 0]))[0], [599, 1199])
    assert held.variance[0, 0] == held.variance[1999, 0]
    assert held.variance[0, 0] == pytest.approx(0.02**2, rel=0.06)
    assert held.variance[700, 0] == pytest.approx(0.005**2, rel=0.09)
    for index, m in ((0, 1400), (700, 600)):
        assert 0.7 <= held.degrees_of_freedom[index, 0] / (7 * m) <= 1.0
    # Without a penalty per level every stretch keeps its own level.
    apart = held_level_variance(positions, level_penalty=0.0)
    assert apart.n_levels == (3,) and apart.variance[0, 0] != apart.variance[1999, 0]


def test_held_stretches_are_the_exact_optimum():
    # Optimal partitioning (Jackson et al., IEEE SPL 12(2), 2005) minimises
    # sum w ln(mean s^2) + penalty * stretches exactly: against all 2^11 partitions of 12
    # samples (12 blocks, shortest stretch 1 sample), the same levels to 1e-12, for several
    # penalties (level_penalty 0: no fusion).
    rng = np.random.default_rng(9)
    positions = rng.normal(size=(4, 12, 1)) * np.exp(rng.normal(size=(1, 12, 1)))
    sample = positions.var(axis=0, ddof=1)[:, 0]
    for penalty in (0.0, 0.02, 0.1, 0.5):
        best, best_levels = np.inf, None
        for mask in range(1 << 11):
            cuts = [0] + [i + 1 for i in range(11) if mask >> i & 1] + [12]
            levels = np.concatenate([np.full(b - a, sample[a:b].mean())
                                     for a, b in zip(cuts, cuts[1:], strict=False)])
            cost = np.mean(np.log(levels)) + penalty * (len(cuts) - 1)
            if cost < best - 1e-12:
                best, best_levels = cost, levels
        held = held_level_variance(positions, change_penalty=penalty, level_penalty=0.0)
        np.testing.assert_allclose(held.variance[:, 0], best_levels, rtol=1e-12)


def test_level_penalties_and_model_are_chosen_from_the_demonstrations():
    # Held levels predict left-out demonstrations of a spread held in levels better than any
    # kernel (which blurs the steps), and a kernel predicts a smoothly varying spread better
    # (three periods of a sinusoid) on 5 seeded sets each; 2 demonstrations or identical
    # ones leave nothing to choose by.
    for seed in range(5):
        rng = np.random.default_rng(100 + seed)
        _, held = _held_spread(rng)
        smooth = 0.01 * (1.5 + np.sin(6 * np.pi * np.arange(2000) / 2000))
        assert select_variability_model(held) == "levels"
        assert select_variability_model(smooth[None, :, None] * rng.normal(size=(8, 2000, 1))
                                        ) == "kernel"
    assert select_variability_model(np.random.default_rng(10).normal(size=(2, 50, 1))) == "kernel"
    assert select_variability_model(np.ones((4, 50, 2))) == "kernel"
    assert select_level_penalties(np.random.default_rng(11).normal(size=(2, 50, 1))) == (
        0.02, 0.04)
    assert select_level_penalties(np.ones((4, 50, 2))) == (0.02, 0.04)
    assert select_level_penalties(held, (0.03,), (0.05,)) == (0.03, 0.05)


def test_the_law_takes_degrees_of_freedom_per_sample():
    # Per-sample degrees of freedom (one per held level) give each sample the factor
    # m(nu) / nu of its own nu: the same as the law applied sample by sample.
    variance = np.full((3, 2), 0.02**2)
    dof = np.array([[2.0, 7.0], [50.0, 7.0], [2.0, 9.0]])
    k = stiffness_from_variability(variance, 1e-3, 10.0, n_demos=8, reference_stiffness=1.0,
                                   degrees_of_freedom=dof)
    np.testing.assert_allclose(k, chi2.median(dof) / dof, rtol=1e-12)


def test_error_held_level_inputs():
    with pytest.raises(InvalidInputError, match=r"2 demonstrations .* got shape \(1, 5, 2\)"):
        held_level_variance(np.zeros((1, 5, 2)))
    with pytest.raises(InvalidInputError, match=r"change_penalty must be finite and at least 0, "
                                                r"got -0.1"):
        held_level_variance(np.zeros((3, 5, 1)), change_penalty=-0.1)
    with pytest.raises(InvalidInputError, match=r"level_penalty must be .* got nan"):
        held_level_variance(np.zeros((3, 5, 1)), level_penalty=float("nan"))
    with pytest.raises(InvalidInputError, match=r"change_penalties must be penalties, .* got \(\)"):
        select_level_penalties(np.zeros((3, 5, 1)), ())
    with pytest.raises(InvalidInputError, match=r"level_penalties .* got \(0.0, -1.0\)"):
        select_level_penalties(np.zeros((3, 5, 1)), (0.02,), (0.0, -1.0))
    bad = np.zeros((3, 5, 1))
    bad[0, 1, 0] = np.nan
    with pytest.raises(InvalidInputError, match=r"positions\[0, 1, 0\] = nan is not finite"):
        select_variability_model(bad)
    with pytest.raises(InvalidInputError, match=r"degrees_of_freedom: shape \(3,\) does not "
                                                r"fit the variance's shape \(4, 2\)"):
        stiffness_from_variability(np.ones((4, 2)), 1.0, 2.0, n_demos=3,
                                   degrees_of_freedom=np.ones(3))
