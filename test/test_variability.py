"""Tests of the variance pooled along the phase and its degrees of freedom (variability.py)."""

import math

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter1d

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.variability import pooled_variance, stiffness_from_variability


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


def test_degrees_of_freedom_set_the_bias_correction():
    # c = (nu - 2) / nu: nu = 10 gives 0.8 times the uncorrected ratio (K_ref = k_min = 1 at
    # 0.02 rad, variance 1e-4: 4 uncorrected); nu <= 2 leaves it uncorrected.
    variance = np.full((3, 2), 1e-4)
    k = stiffness_from_variability(variance, 1.0, 400.0, n_demos=8,
                                   degrees_of_freedom=np.array([10.0, 2.0]))
    np.testing.assert_allclose(k[0], [3.2, 4.0])
    # The default is n_demos - 1 (per-sample variance): 8 demonstrations -> 5 / 7.
    np.testing.assert_allclose(
        stiffness_from_variability(variance, 1.0, 400.0, n_demos=8)[0], 4.0 * 5 / 7
    )


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
