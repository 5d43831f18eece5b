"""Tests of the stiffness estimators: TLS/OLS fits, sliding window, batch series, variability."""

import math
import warnings

import numpy as np
import odrpack
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from compliant_demo.band_pass import band_pass_measures
from compliant_demo.estimation import (
    SlidingStiffnessEstimator,
    estimate_stiffness_series,
    ols_fit,
    tls_fit,
)
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.variability import stiffness_from_variability


def _noisy_line(seed, n=2000, stiffness=40.0, intercept=0.3, x_std=0.01, u_std=0.005, e_std=0.1):
    rng = np.random.default_rng(seed)
    true_x = rng.normal(0, x_std, n)
    x = true_x + rng.normal(0, u_std, n)
    y = stiffness * true_x + intercept + rng.normal(0, e_std, n)
    return x, y, (e_std / u_std) ** 2


def _odr(model, x, y, n_params, weight_x):
    start = np.zeros(n_params)
    start[0] = 1.0
    return odrpack.odr_fit(
        model, x, y, start, weight_x=weight_x, weight_y=1.0, sstol=1e-14, partol=1e-14
    )


def test_noise_free_line_is_exact_for_both_methods():
    x = np.linspace(-0.02, 0.03, 50)
    y = 25.0 * x - 0.4
    for fit in (tls_fit(x, y, 100.0), ols_fit(x, y)):
        assert fit.stiffness == pytest.approx(25.0, rel=1e-12)
        assert fit.intercept == pytest.approx(-0.4, rel=1e-10)
        assert fit.stiffness_std < 1e-6 * 25.0  # zero up to rounding of the moments
        assert fit.n == 50
        assert fit.excitation == pytest.approx(np.std(x, ddof=1), rel=1e-12)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_tls_agrees_with_odrpack(seed):
    x, y, ratio = _noisy_line(seed)
    fit = tls_fit(x, y, ratio)
    # Reference: odrpack (ODRPACK95 wrapper) orthogonal distance regression with weights equal
    # to inverse noise variances: weight_x / weight_y = ratio reproduces Deming regression.
    result = _odr(lambda xs, beta: beta[0] * xs + beta[1], x, y, 2, ratio)
    assert fit.stiffness == pytest.approx(result.beta[0], rel=1e-6)
    assert fit.intercept == pytest.approx(result.beta[1], rel=1e-6, abs=1e-8)


def test_tls_with_rate_agrees_with_odrpack_two_regressors():
    rng = np.random.default_rng(11)
    n = 1500
    true_x = rng.normal(0, 0.01, n)
    v = rng.normal(0, 0.2, n)
    x = true_x + rng.normal(0, 0.004, n)
    y = 30 * true_x + 0.5 * v + 0.1 + rng.normal(0, 0.08, n)
    ratio = (0.08 / 0.004) ** 2
    fit = tls_fit(x, y, ratio, deflection_rate=v)
    # Reference: odrpack with the rate as a second explanatory variable whose weight is huge
    # (an error-free regressor), the model Fuller (1987, section 2.2) treats by partialling out.
    model = lambda xs, beta: beta[0] * xs[0] + beta[1] * xs[1] + beta[2]  # noqa: E731
    result = _odr(model, np.vstack([x, v]), y, 3, np.array([ratio, 1e12]))
    assert fit.stiffness == pytest.approx(result.beta[0], rel=1e-5)
    assert fit.intercept == pytest.approx(result.beta[2], rel=1e-4, abs=1e-6)


def test_ols_attenuation_and_tls_consistency_monte_carlo():
    # Fuller, Measurement Error Models (1987), section 1.1: with noise u on x, the OLS slope
    # tends to K * var(x) / (var(x) + var(u)); the Deming/TLS slope is consistent for K.
    stiffness, x_std, u_std = 40.0, 0.01, 0.005
    attenuation = x_std**2 / (x_std**2 + u_std**2)
    ols, tls = [], []
    for seed in range(200):
        x, y, ratio = _noisy_line(seed, n=1000, stiffness=stiffness, x_std=x_std, u_std=u_std)
        ols.append(ols_fit(x, y).stiffness)
        tls.append(tls_fit(x, y, ratio).stiffness)
    assert np.mean(ols) == pytest.approx(stiffness * attenuation, rel=0.02)
    assert np.mean(tls) == pytest.approx(stiffness, rel=0.02)
    # The reported standard deviation matches the Monte Carlo spread within 20 %.
    x, y, ratio = _noisy_line(999, n=1000, stiffness=stiffness, x_std=x_std, u_std=u_std)
    assert tls_fit(x, y, ratio).stiffness_std == pytest.approx(np.std(tls), rel=0.2)


def test_rate_regressor_removes_quadrature_damping_bias():
    # torque = K x + D dx/dt over a window that is not a whole number of periods: the damping
    # term correlates with x through the window ends and biases a one-regressor fit.
    t = np.arange(0, 0.40625, 0.001)  # 3.25 periods: x starts at zero and ends at a peak
    x = 0.002 * np.sin(2 * np.pi * 8 * t)
    v = np.gradient(x, t)
    y = 6.0 * x + 0.3 * v
    assert abs(ols_fit(x, y).stiffness - 6.0) > 0.1
    assert ols_fit(x, y, deflection_rate=v).stiffness == pytest.approx(6.0, rel=1e-9)
    assert tls_fit(x, y, 1e5, deflection_rate=v).stiffness == pytest.approx(6.0, rel=1e-9)


def _dithered_spring(seed, n=4000, rate=1000.0, stiffness=None):
    """A hand spring-damper about a slow trajectory, excited by a dither, with sensor noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / rate
    k = np.full(n, 20.0) if stiffness is None else stiffness
    intended = 0.3 * np.sin(2 * np.pi * 0.2 * t)
    # Three tones, as the robot's dither: one tone would make deflection and acceleration
    # collinear, and the estimator, which also fits an inertia, would refuse every window.
    tones = 2 * np.pi * 8 * np.array([0.7, 1.0, 1.4])
    response = 0.002 / 3 * np.sin(tones * t[:, None] + rng.uniform(0, 6, 3)).sum(axis=1)
    q = intended - response
    dq = np.gradient(q, t)
    tau = k * (intended - q) + 0.2 * (np.gradient(intended, t) - dq)
    q_meas = q + rng.normal(0, 2e-5, n)
    tau_meas = tau + rng.normal(0, 0.005, n)
    return t, np.column_stack([q_meas, q_meas]), np.column_stack([tau_meas, 2 * tau_meas])


SETTINGS = dict(window_s=0.5, noise_variance_ratio=(0.005 / 2e-5) ** 2, band_hz=(4.8, 12.8))


def test_sliding_equals_batch_for_any_chunking():
    t, q, tau = _dithered_spring(3)
    series = estimate_stiffness_series(t, q, tau, **SETTINGS)
    estimator = SlidingStiffnessEstimator(2, rate_hz=1000.0, **SETTINGS)
    rng = np.random.default_rng(4)
    outputs, start = [], 0
    while start < len(t):
        stop = min(len(t), start + int(rng.integers(1, 700)))
        outputs.append(estimator.update(q[start:stop], tau[start:stop]))
        start = stop
    stiffness = np.concatenate([o[0] for o in outputs])
    std = np.concatenate([o[1] for o in outputs])
    excited = np.concatenate([o[2] for o in outputs])
    np.testing.assert_array_equal(excited, series.excited)
    np.testing.assert_allclose(stiffness, series.stiffness, rtol=1e-9, equal_nan=True)
    np.testing.assert_allclose(std, series.stiffness_std, rtol=1e-7, equal_nan=True)
    assert estimator.samples_seen == len(t)


@pytest.mark.parametrize("k", [916, 1234, 3999])
def test_series_equals_direct_fit_on_each_window(k):
    t, q, tau = _dithered_spring(5)
    series = estimate_stiffness_series(t, q, tau, **SETTINGS)
    window = slice(k - 499, k + 1)
    for joint in range(2):
        fit = tls_fit(
            series.deflection[window, joint],
            series.torque[window, joint],
            SETTINGS["noise_variance_ratio"],
            deflection_rate=series.deflection_rate[window, joint],
            deflection_acceleration=series.deflection_acceleration[window, joint],
        )
        assert series.stiffness[k, joint] == pytest.approx(fit.stiffness, rel=1e-9)
        assert series.excitation[k, joint] == pytest.approx(fit.excitation, rel=1e-9)


def test_series_recovers_constant_hand_stiffness():
    t, q, tau = _dithered_spring(6)
    series = estimate_stiffness_series(t, q, tau, **SETTINGS)
    # Excited from one window plus the settling time (2 / 4.8 Hz) on, never before.
    first = 499 + 417
    assert series.excited[first:].all() and not series.excited[:first].any()
    # Closed form: the torque channel of joint 1 is twice that of joint 0, so 40 and 20 N*m/rad.
    # Stated bound: 7 % once the band-pass has settled on the slow motion (after 1 s); the
    # two-regressor fit stays within 3 %, the inertia regressor costs a variance inflation of
    # 1 / conditioning (about 2.5 with this dither).
    np.testing.assert_allclose(series.stiffness[1000:, 0], 20.0, rtol=0.07)
    np.testing.assert_allclose(series.stiffness[1000:, 1], 40.0, rtol=0.07)
    ols = estimate_stiffness_series(t, q, tau, method="ols", **SETTINGS)
    np.testing.assert_allclose(ols.stiffness[1000:, 0], 20.0, rtol=0.07)
    two = estimate_stiffness_series(t, q, tau, model_inertia=False, **SETTINGS)
    np.testing.assert_allclose(two.stiffness[1000:, 0], 20.0, rtol=0.03)
    # The rate is nearly orthogonal to the deflection, the acceleration nearly collinear.
    assert (two.conditioning[1000:] > 0.9).all() and (series.conditioning[1000:] < 0.7).all()


def test_unexcited_windows_are_flagged_not_estimated():
    t = np.arange(2000) / 1000.0
    q = np.column_stack([0.2 * np.sin(2 * np.pi * 0.2 * t)])
    tau = 5.0 * (0.1 - q)
    series = estimate_stiffness_series(t, q, tau, min_excitation_rad=1e-4, **SETTINGS)
    assert not series.excited.any()
    assert np.isnan(series.stiffness).all() and np.isnan(series.stiffness_std).all()


def test_first_window_is_never_excited():
    t, q, tau = _dithered_spring(7, n=800)
    estimator = SlidingStiffnessEstimator(2, rate_hz=1000.0, settle_s=0.0, **SETTINGS)
    stiffness, _, excited = estimator.update(q, tau)
    # Without settling time the band-pass start-up transient leaves a few early windows without
    # a positive slope; from 0.6 s on every window holds an estimate.
    assert not excited[:499].any() and excited[600:].all()
    assert np.isnan(stiffness[:499]).all()
    estimator.reset()
    assert estimator.samples_seen == 0


def test_static_spring_without_band_pass():
    # No band-pass: torque = K (q0 - q) about a fixed equilibrium q0; the intercept absorbs q0.
    rng = np.random.default_rng(8)
    t = np.arange(1000) / 500.0
    q = 0.1 + 0.01 * rng.normal(size=(1000, 1))
    tau = 12.0 * (0.15 - q)
    series = estimate_stiffness_series(
        t, q, tau, window_s=0.2, noise_variance_ratio=1e4, band_hz=None, model_damping=False
    )
    np.testing.assert_allclose(series.stiffness[99:], 12.0, rtol=1e-9)


def test_non_positive_slope_is_not_excited():
    # Torque that grows with the angle (a "negative spring") has no stiffness to report: such
    # windows are flagged not excited (NaN) like unexcited ones; a positive spring is reported.
    rng = np.random.default_rng(18)
    t = np.arange(1000) / 500.0
    q = 0.1 + 0.01 * rng.normal(size=(1000, 2))
    tau = np.column_stack([-12.0 * (0.15 - q[:, 0]), 12.0 * (0.15 - q[:, 1])])
    series = estimate_stiffness_series(
        t, q, tau, window_s=0.2, noise_variance_ratio=1e4, band_hz=None, model_damping=False
    )
    assert not series.excited[:, 0].any() and np.isnan(series.stiffness[:, 0]).all()
    assert series.excited[99:, 1].all()
    np.testing.assert_allclose(series.stiffness[99:, 1], 12.0, rtol=1e-9)


def _synthetic_demos(n_demos, sigma, seed):
    rng = np.random.default_rng(seed)
    s = np.linspace(0, 1, sigma.shape[0])
    mean = np.column_stack([np.sin(np.pi * s), s**2])
    return mean[None] + sigma[None] * rng.normal(size=(n_demos, *sigma.shape))


@pytest.mark.parametrize("k_before, k_after", [(10.0, 40.0), (40.0, 10.0)])
def test_latency_is_the_mean_delay_of_a_stiffness_step(k_before, k_after):
    # Mean delays of cascaded linear smoothers add (common practice): a trailing window lags by
    # (window - 1) / 2 samples, a band-pass delays the dither's envelope by its group delay at
    # the band centre. The estimate's step response (first moment) must lag by latency_s, to
    # within 0.05 s (the ratio estimate is not exactly linear in the filtered signals).
    rate = 1000.0
    t = np.arange(0.0, 6.0, 1.0 / rate)
    slow = 0.3 * np.sin(2 * np.pi * 0.2 * t)
    q = slow + 2e-3 * np.sin(2 * np.pi * 8 * t) + 1.5e-3 * np.sin(2 * np.pi * 9.3 * t + 1)
    step_at = 3.0
    k = np.where(t < step_at, k_before, k_after)
    # Two tones: too close for the inertia to be told from the stiffness, and the latency does
    # not depend on which regressors are fitted, so the two-regressor model is used.
    estimator = SlidingStiffnessEstimator(1, window_s=0.5, rate_hz=rate,
                                          noise_variance_ratio=62500.0, band_hz=(6.0, 11.2),
                                          min_excitation_rad=2e-4, model_inertia=False)
    estimate = estimator.update(q[:, None], (k * (slow - q))[:, None])[0][:, 0]
    progress = (estimate - k_before) / (k_after - k_before)
    after = (t >= step_at) & (t < step_at + 1.5)
    mean_delay = np.sum(1.0 - progress[after]) / rate
    assert abs(mean_delay - estimator.latency_s) < 0.05
    assert 0.25 < estimator.latency_s < 0.45  # 0.25 s of window centre plus the band-pass


def test_variability_stiffness_follows_inverse_variance():
    s = np.linspace(0, 1, 400)
    sigma = np.column_stack([0.01 + 0.05 * s, 0.03 + 0.025 * np.cos(2 * np.pi * s)])
    n_demos = 30
    demos = _synthetic_demos(n_demos, sigma, seed=9)
    variance = demos.var(axis=0, ddof=1)
    k = stiffness_from_variability(
        variance, 1.0, 500.0, n_demos=n_demos, reference_std=0.02, reference_stiffness=10.0
    )
    assert k.shape == (400, 2)
    # Closed form of the inverse-variance law (our choice, see the docstring):
    # K = 10 N*m/rad * (0.02 rad / sigma)^2 with the chi-square median factor, so the estimate
    # from 30 normal demonstrations is median-unbiased: over the 400 samples (independent
    # draws of the same ratio distribution) the median ratio to the truth is 1 within 0.06 (the
    # sample median's standard error is about 0.018 here); each sample within a factor 2.5.
    truth = 10.0 * (0.02 / sigma) ** 2
    ratio = k / truth
    np.testing.assert_allclose(np.median(ratio, axis=0), 1.0, atol=0.06)
    assert ratio.min() > 0.4 and ratio.max() < 2.5


def test_variability_law_is_anchored_not_stretched():
    variance = np.array([[4e-4], [1e-4], [4e-6]])
    # Exact: K_ref = k_min = 10 at 0.02 rad, p = 1, degrees of freedom 2 (factor ln 2, the
    # chi-square median over nu, see test_variability.py): 4e-4 -> 6.93 clipped to 10,
    # 1e-4 -> 27.7, 4e-6 -> 693 clipped to 400.
    k = stiffness_from_variability(variance, 10.0, 400.0, n_demos=3)
    np.testing.assert_allclose(k[:, 0], [10.0, 40.0 * math.log(2.0), 400.0], rtol=1e-12)
    # Twice the spread everywhere gives a quarter of the stiffness (min-max scaling would not
    # move at all); exponent 0.5 gives the square root of the ratio.
    anchor = dict(n_demos=2, reference_stiffness=40.0)
    np.testing.assert_allclose(
        stiffness_from_variability(4 * variance[1:2], 1.0, 400.0, **anchor),
        stiffness_from_variability(variance[1:2], 1.0, 400.0, **anchor) / 4,
    )
    np.testing.assert_allclose(
        stiffness_from_variability(variance[1:2], 1.0, 400.0, n_demos=3, exponent=0.5),
        2.0 * math.sqrt(math.log(2.0)), rtol=1e-12,
    )
    flat = stiffness_from_variability(np.zeros((4, 1)), 10.0, 40.0, n_demos=2)
    np.testing.assert_allclose(flat, 40.0)


# ----- bad input -----


def test_error_nan_deflection():
    with pytest.raises(InvalidInputError, match=r"deflection\[1\] = nan is not finite"):
        tls_fit([0.0, np.nan, 1.0], [0.0, 1.0, 2.0], 1.0)


def test_error_length_mismatch():
    with pytest.raises(InvalidInputError, match="torque: expected 3 samples like deflection"):
        ols_fit([0.0, 1.0, 2.0], [0.0, 1.0])


def test_error_too_few_and_constant():
    with pytest.raises(InvalidInputError, match="need at least 3 samples, got 2"):
        ols_fit([0.0, 1.0], [0.0, 1.0])
    with pytest.raises(InvalidInputError, match=r"deflection is constant \(0.5 rad\)"):
        ols_fit([0.5] * 4, [0.0, 1.0, 2.0, 3.0])
    with pytest.raises(InvalidInputError, match="deflection_rate is constant"):
        ols_fit([0, 1, 2, 3.0], [0, 1, 2, 3.0], deflection_rate=[1.0] * 4)


@pytest.mark.parametrize("ratio", [0.0, -1.0, float("inf")])
def test_error_noise_variance_ratio(ratio):
    with pytest.raises(InvalidInputError, match="noise_variance_ratio must be positive"):
        tls_fit([0, 1, 2.0], [0, 1, 2.0], ratio)


def test_error_estimator_settings():
    with pytest.raises(InvalidInputError, match="window_s = 0.001 gives 1 samples"):
        SlidingStiffnessEstimator(1, 0.001, 1000.0, 1.0)
    with pytest.raises(InvalidInputError, match="method must be 'tls' or 'ols', got 'lsq'"):
        SlidingStiffnessEstimator(1, 0.5, 1000.0, 1.0, method="lsq")
    with pytest.raises(InvalidInputError, match=r"band_hz must satisfy .* got \(6.0, 600.0\)"):
        SlidingStiffnessEstimator(1, 0.5, 1000.0, 1.0, band_hz=(6.0, 600.0))
    with pytest.raises(InvalidInputError, match="n_joints must be a positive integer, got 0"):
        SlidingStiffnessEstimator(0, 0.5, 1000.0, 1.0)
    with pytest.raises(InvalidInputError, match="min_excitation_rad must be non-negative"):
        SlidingStiffnessEstimator(1, 0.5, 1000.0, 1.0, min_excitation_rad=-1.0)
    with pytest.raises(InvalidInputError, match="settle_s must be non-negative, got -0.1"):
        SlidingStiffnessEstimator(1, 0.5, 1000.0, 1.0, settle_s=-0.1)


def test_error_update_shape_and_nan():
    estimator = SlidingStiffnessEstimator(2, 0.5, 1000.0, 1.0)
    with pytest.raises(InvalidInputError, match=r"must be \(n, 2\) arrays of equal shape"):
        estimator.update(np.zeros((5, 3)), np.zeros((5, 3)))
    bad = np.zeros((5, 2))
    bad[3, 1] = np.nan
    with pytest.raises(InvalidInputError, match=r"torque\[3, 1\] = nan is not finite"):
        estimator.update(np.zeros((5, 2)), bad)


def test_error_series_time():
    q = np.zeros((5, 1))
    with pytest.raises(InvalidInputError, match=r"t must be strictly increasing .* t\[2\] = 0.1"):
        estimate_stiffness_series(
            [0, 0.1, 0.1, 0.2, 0.3], q, q, window_s=0.003, noise_variance_ratio=1.0
        )
    with pytest.raises(InvalidInputError, match=r"t\[1\] = nan is not finite"):
        estimate_stiffness_series(
            [0, np.nan, 0.2, 0.3, 0.4], q, q, window_s=0.3, noise_variance_ratio=1.0
        )
    with pytest.warns(UserWarning, match=r"1 steps differ .* first before t\[3\] = 0.5"):
        estimate_stiffness_series(
            [0, 0.1, 0.2, 0.5, 0.6], q, q, window_s=0.3, noise_variance_ratio=1.0
        )
    with pytest.raises(InvalidInputError, match="positive duration"):
        estimate_stiffness_series([0.0], q[:1], q[:1], window_s=0.3, noise_variance_ratio=1.0)


def test_error_variability_inputs():
    variance = np.ones((4, 2))
    with pytest.raises(InvalidInputError, match="n_demos = 1: stiffness from variability needs"):
        stiffness_from_variability(variance, 1.0, 2.0, n_demos=1)
    bad = variance.copy()
    bad[2, 1] = np.nan
    with pytest.raises(InvalidInputError, match=r"variance\[2, 1\] = nan is not finite"):
        stiffness_from_variability(bad, 1.0, 2.0, n_demos=3)
    bad[2, 1] = -0.5
    with pytest.raises(InvalidInputError, match=r"variance\[2, 1\] = -0.5 is negative"):
        stiffness_from_variability(bad, 1.0, 2.0, n_demos=3)
    with pytest.raises(InvalidInputError, match="k_min = 5.0 is above k_max = 2.0"):
        stiffness_from_variability(variance, 5.0, 2.0, n_demos=3)
    with pytest.raises(InvalidInputError, match="must be positive"):
        stiffness_from_variability(variance, 0.0, 2.0, n_demos=3)
    with pytest.raises(InvalidInputError, match="variance_floor must be positive, got -1"):
        stiffness_from_variability(variance, 1.0, 2.0, n_demos=3, variance_floor=-1)
    with pytest.raises(InvalidInputError, match="reference_std must be positive and finite"):
        stiffness_from_variability(variance, 1.0, 2.0, n_demos=3, reference_std=0.0)
    with pytest.raises(InvalidInputError, match="exponent must be positive and finite, got nan"):
        stiffness_from_variability(variance, 1.0, 2.0, n_demos=3, exponent=np.nan)
    with pytest.raises(InvalidInputError, match="reference_stiffness must be positive"):
        stiffness_from_variability(variance, 1.0, 2.0, n_demos=3, reference_stiffness=-3.0)


@settings(max_examples=60, deadline=None, derandomize=True)
@given(
    seed=st.integers(0, 2**31 - 1),
    stiffness=st.floats(0.5, 500.0),
    ratio=st.floats(1e-2, 1e6),
    n=st.integers(5, 200),
)
def test_deming_closed_form_equals_svd_total_least_squares(seed, stiffness, ratio, n):
    # Golub and Van Loan, Matrix Computations, section on total least squares: after scaling the
    # deflection by sqrt(ratio) the TLS line is normal to the right singular vector of the
    # centred data with the smallest singular value.
    rng = np.random.default_rng(seed)
    x = rng.normal(0, 0.01, n)
    y = stiffness * x + rng.normal(0, 0.05, n)
    fit = tls_fit(x, y, ratio)
    scale = np.sqrt(ratio)
    data = np.column_stack([scale * (x - x.mean()), y - y.mean()])
    normal = np.linalg.svd(data, full_matrices=False)[2][-1]
    svd_slope = -normal[0] * scale / normal[1]
    assert fit.stiffness == pytest.approx(svd_slope, rel=1e-7, abs=1e-9)


def test_link_inertia_term_closed_form():
    # Joint-side sensor: tau_m = tau_h - I q''. For q = -A sin(w t) about a fixed hand set point
    # and tau_h = K A sin(w t), tau_m = (K - I w^2) A sin(w t): a regression on the measured
    # torque gives K - I w^2 (closed form); with link_inertia the estimator recovers K.
    rate, stiffness, inertia, freq = 1000.0, 15.0, 0.05, 8.0
    t = np.arange(3000) / rate
    w = 2 * np.pi * freq
    q = -0.002 * np.sin(w * t)
    tau_m = (stiffness - inertia * w**2) * 0.002 * np.sin(w * t)
    # One tone: deflection and acceleration are collinear, so the inertia is given, not fitted.
    settings = dict(window_s=0.5, noise_variance_ratio=1e5, band_hz=(6.0, 11.0),
                    model_inertia=False)
    plain = estimate_stiffness_series(t, q[:, None], tau_m[:, None], **settings)
    fixed = estimate_stiffness_series(
        t, q[:, None], tau_m[:, None], link_inertia=inertia, **settings
    )
    # The plain slope K - I w^2 is negative here, so the series reports no estimate; the
    # direct fit on one of its windows shows the closed form.
    assert not plain.excited.any()
    window = slice(2000, 2500)
    slope = tls_fit(plain.deflection[window, 0], plain.torque[window, 0], 1e5,
                    deflection_rate=plain.deflection_rate[window, 0]).stiffness
    assert slope == pytest.approx(stiffness - inertia * w**2, rel=1e-3)
    # Central second difference: amplitude error (w dt)^2 / 12 of I w^2 (about 0.02 N*m/rad).
    np.testing.assert_allclose(fixed.stiffness[1500:], stiffness, atol=0.05)
    with pytest.raises(InvalidInputError, match="link_inertia must be non-negative"):
        SlidingStiffnessEstimator(1, 0.5, 1000.0, 1.0, link_inertia=-0.1)


def test_empty_chunk_changes_nothing_and_bad_band_shape():
    estimator = SlidingStiffnessEstimator(2, 0.5, 1000.0, 1.0, band_hz=(6.0, 11.0))
    stiffness, std, excited = estimator.update(np.empty((0, 2)), np.empty((0, 2)))
    assert stiffness.shape == std.shape == excited.shape == (0, 2)
    assert estimator.samples_seen == 0
    with pytest.raises(InvalidInputError, match=r"band_hz must satisfy .* got \(1.0, 2.0, 3.0\)"):
        SlidingStiffnessEstimator(1, 0.5, 1000.0, 1.0, band_hz=(1.0, 2.0, 3.0))


def test_jittered_stamps_are_accepted_without_warning():
    t, q, tau = _dithered_spring(12)
    jitter = t + np.random.default_rng(13).uniform(-2e-4, 2e-4, t.size)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        series = estimate_stiffness_series(jitter, q, tau, **SETTINGS)
    reference = estimate_stiffness_series(t, q, tau, **SETTINGS)
    # The rate comes from the median step, so the numbers move only by the tiny rate change.
    np.testing.assert_allclose(series.stiffness[1000:], reference.stiffness[1000:], rtol=1e-3)


# ----- second-order joint impedance -----
# Model: torque = K x + D x' + M x'' (stiffness, viscosity, inertia), identified by least squares
# under a small perturbation, as reviewed by Kearney and Hunter (1990, Critical Reviews in
# Biomedical Engineering; from memory) and used for the arm by Perreault, Kirsch and Crago
# (2004, Experimental Brain Research; from memory).

IMPEDANCE = dict(window_s=0.5, noise_variance_ratio=(0.005 / 2e-5) ** 2, band_hz=(4.8, 12.8),
                 min_excitation_rad=2e-4)


def _impedance_response(stiffness, damping, inertia, seed, n=3000, n_trials=1, rate=1000.0,
                        tones=(0.7, 1.0, 1.4), angle_noise=2e-5):
    """Deflection as a sum of dither tones about 8 Hz and the torque of a mass-spring-damper
    that produces it (exact derivatives), with seeded sensor noise; columns are trials."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / rate
    w = 2 * np.pi * 8.0 * np.asarray(tones)
    phase = rng.uniform(0, 2 * np.pi, (len(w), n_trials))
    angle = w[:, None, None] * t[None, :, None] + phase[:, None, :]
    x = 1e-3 * np.sin(angle).sum(axis=0)
    dx = 1e-3 * (w[:, None, None] * np.cos(angle)).sum(axis=0)
    ddx = -1e-3 * (w[:, None, None] ** 2 * np.sin(angle)).sum(axis=0)
    tau = stiffness * x + damping * dx + inertia * ddx
    q = -x + rng.normal(0, angle_noise, x.shape)
    return t, q, tau + rng.normal(0, 0.005, x.shape)


@pytest.mark.parametrize(("stiffness", "damping", "inertia"),
                         [(20.0, 0.3, 0.02), (5.0, 0.1, 0.05), (150.0, 1.5, 0.0),
                          (150.0, 1.5, 0.02)])
def test_mass_spring_damper_is_identified(stiffness, damping, inertia):
    t, q, tau = _impedance_response(stiffness, damping, inertia, seed=21)
    series = estimate_stiffness_series(t, q, tau, **IMPEDANCE)
    steady = slice(1500, None)
    assert series.excited[steady].all()
    # Stated tolerances over the windows after the band-pass settled (noise 2e-5 rad and
    # 0.005 N*m): median K within 3 %, median M within 0.003 kg*m^2, median D within 0.1 N*m*s/rad
    # (the central differences add (w dt)^2 / 12 to M's and (w dt)^2 / 6 to D's relative error).
    assert np.median(series.stiffness[steady]) == pytest.approx(stiffness, rel=0.03)
    assert np.median(series.inertia[steady]) == pytest.approx(inertia, abs=0.003)
    assert np.median(series.damping[steady]) == pytest.approx(damping, abs=0.1)


def test_two_regressor_slope_is_stiffness_less_inertia_times_omega_squared():
    # Closed form: with the inertia left out the slope is K - M w^2, w between the outer tones
    # (K = 150, M = 0.02: between 51 and 138 N*m/rad); the second-order fit finds K.
    t, q, tau = _impedance_response(150.0, 1.5, 0.02, seed=25)
    plain = estimate_stiffness_series(t, q, tau, model_inertia=False, **IMPEDANCE)
    full = estimate_stiffness_series(t, q, tau, **IMPEDANCE)
    w_low, w_high = 2 * np.pi * 8.0 * np.array([0.7, 1.4])
    slope = np.median(plain.stiffness[1500:])
    assert 150.0 - 0.02 * w_high**2 < slope < 150.0 - 0.02 * w_low**2
    assert np.median(full.stiffness[1500:]) == pytest.approx(150.0, rel=0.03)


def test_conditioning_refuses_a_single_tone_however_large():
    # One tone: x'' = -w^2 x exactly, so K and M cannot be told apart; the deflection is 100
    # times the least excitation, yet no window is excited.
    t, q, tau = _impedance_response(20.0, 0.3, 0.02, seed=22, tones=(1.0,))
    series = estimate_stiffness_series(t, q, tau, **IMPEDANCE)
    assert not series.excited.any()
    assert np.nanmax(series.conditioning[1000:]) < 1e-3
    assert np.isnan(series.stiffness).all() and np.isnan(series.inertia).all()
    # With the inertia given and subtracted instead, the same windows are excited and K is
    # found (3 %, as above).
    given = estimate_stiffness_series(
        t, q, tau, model_inertia=False, link_inertia=0.02, **IMPEDANCE
    )
    assert given.excited[1500:].all()
    np.testing.assert_allclose(given.stiffness[1500:], 20.0, rtol=0.03)


def test_interval_contains_the_truth_at_the_stated_rate():
    # 400 seeded trials (columns) of one mass-spring-damper; the 95 % interval of the last
    # window must contain K in at least 92 % of them (binomial standard error 1.1 %), and be
    # informative: median half-width below 15 % of K.
    stiffness = 20.0
    t, q, tau = _impedance_response(stiffness, 0.3, 0.02, seed=23, n=1500, n_trials=400)
    series = estimate_stiffness_series(t, q, tau, **IMPEDANCE)
    low, high = series.stiffness_low[-1], series.stiffness_high[-1]
    assert series.excited[-1].all()
    inside = (low <= stiffness) & (stiffness <= high)
    assert inside.mean() >= 0.92
    assert np.median((high - low) / 2) < 0.15 * stiffness
    estimator = SlidingStiffnessEstimator(1, rate_hz=1000.0, **IMPEDANCE)
    np.testing.assert_allclose(
        (high - low) / 2, estimator.interval_quantile * series.stiffness_std[-1], rtol=1e-9
    )


@pytest.mark.parametrize(("stiffness", "damping", "inertia"),
                         [(20.0, 0.3, 0.02), (150.0, 1.5, 0.0), (5.0, 0.1, 0.0)])
def test_interval_is_calibrated_when_the_residual_is_white_in_the_band(stiffness, damping, inertia):
    # 1,000 seeded windows (independent trials, last window each) whose residual is the torque
    # sensor's white noise through the band-pass (angle noise 2e-6 rad: its share through the
    # impedance is negligible). A calibrated 95 % interval covers K in 95 % of them: within
    # 0.93 to 0.975 (binomial standard error 0.7 %; the statistical bandwidth, Bendat and
    # Piersol, from memory, is an approximation for a three-tone dither). A calibrated std
    # gives a median |z| of 0.674 (normal quantile at 0.75; common practice; 0.71 for Student's
    # t with the interval's 7.8 degrees of freedom): within 0.6-0.8.
    t, q, tau = _impedance_response(stiffness, damping, inertia, seed=23, n=1500,
                                    n_trials=1000, angle_noise=2e-6)
    settings = dict(IMPEDANCE, noise_variance_ratio=(0.005 / 2e-6) ** 2)
    series = estimate_stiffness_series(t, q, tau, **settings)
    assert series.excited[-1].all()
    low, high = series.stiffness_low[-1], series.stiffness_high[-1]
    coverage = np.mean((low <= stiffness) & (stiffness <= high))
    assert 0.93 <= coverage <= 0.975
    z = (series.stiffness[-1] - stiffness) / series.stiffness_std[-1]
    assert 0.6 <= np.median(np.abs(z)) <= 0.8


def test_interval_follows_the_residual_coloured_by_angle_noise():
    # Angle noise 2e-5 rad through the impedance K - M w^2 + i w D grows towards the band's top,
    # while the deflection sits lower: the residual's power over the band overstates the noise
    # at the deflection's frequencies. Rescaled by the impedance at the deflection's spectral
    # moments against the band's, the 95 % interval covers K in 0.93 to 0.99 of 1,000 seeded
    # windows (without the rescaling: 99.8 %, median |z| 0.46); the deflection's moments are
    # taken before the rate and acceleration are partialled out, which errs slightly on the safe
    # side (measured 97-98 %).
    t, q, tau = _impedance_response(20.0, 0.3, 0.02, seed=24, n=1500, n_trials=1000)
    series = estimate_stiffness_series(t, q, tau, **IMPEDANCE)
    low, high = series.stiffness_low[-1], series.stiffness_high[-1]
    assert 0.93 <= np.mean((low <= 20.0) & (20.0 <= high)) <= 0.99
    z = (series.stiffness[-1] - 20.0) / series.stiffness_std[-1]
    assert 0.55 <= np.median(np.abs(z)) <= 0.8


def test_band_pass_measures_closed_forms():
    # Butterworth low-pass of order n, corner w_c (Beta-function integrals of x^2k / (1 + x^2n),
    # common practice): integral |H|^2 = f_c (pi / 2n) / sin(pi / 2n), integral |H|^4 =
    # (2n - 1) / 2n times that, so the statistical bandwidth (Bendat and Piersol, from memory)
    # is f_c (pi / 2n) / sin(pi / 2n) * 2n / (2n - 1); power-weighted mean of
    # w^2 w_c^2 sin(pi / 2n) / sin(3 pi / 2n), of w^4 w_c^4 sin(pi / 2n) / sin(5 pi / 2n).
    # Digital filter (bilinear transform) with the corner far below the rate: within 1 %.
    rate, corner = 10000.0, 50.0
    for order in (2, 4):
        measures = band_pass_measures(
            signal.butter(order, corner, btype="lowpass", fs=rate, output="sos"), rate)
        angle = np.pi / (2 * order)
        assert measures.statistical_bandwidth_hz == pytest.approx(
            corner * angle / np.sin(angle) * 2 * order / (2 * order - 1), rel=0.01)
    w_c = 2 * np.pi * corner
    assert measures.mean_square_omega == pytest.approx(
        w_c**2 * np.sin(angle) / np.sin(3 * angle), rel=0.01)
    assert measures.mean_fourth_omega == pytest.approx(
        w_c**4 * np.sin(angle) / np.sin(5 * angle), rel=0.01)


def test_summary_flags_count_excited_windows():
    t, q, tau = _impedance_response(20.0, 0.3, 0.02, seed=24, n=2000)
    estimator = SlidingStiffnessEstimator(1, rate_hz=1000.0, **IMPEDANCE)
    assert "stiffness_rel_halfwidth_mean" not in estimator.summary_flags()
    _, std, excited = estimator.update(q, tau)
    flags = estimator.summary_flags()
    settled = 2000 - (500 + round(2 / 4.8 * 1000)) + 1
    assert flags["stiffness_excited_fraction"] == pytest.approx(excited.sum() / settled)
    assert flags["stiffness_latency_s"] == estimator.latency_s
    assert 0 < flags["stiffness_rel_halfwidth_mean"] < 0.2
    estimator.reset()
    assert estimator.summary_flags()["stiffness_excited_fraction"] == 0.0


def test_error_impedance_settings():
    with pytest.raises(InvalidInputError, match="min_conditioning must be between 0 and 1, got 2"):
        SlidingStiffnessEstimator(1, 0.5, 1000.0, 1.0, min_conditioning=2)
    with pytest.raises(InvalidInputError, match="confidence must be between 0 and 1, got 1.0"):
        SlidingStiffnessEstimator(1, 0.5, 1000.0, 1.0, confidence=1.0)
    with pytest.raises(InvalidInputError, match=r"deflection_acceleration is constant \(0.0"):
        tls_fit([0.0, 1.0, 2.0, 3.0, 4.0], [0.0, 1.0, 2.0, 3.0, 5.0], 1.0,
                deflection_acceleration=np.zeros(5))
