"""Stiffness estimation: errors-in-variables regression of torque on deflection, online and offline.

Joint angle and interaction torque are both measured with noise, so the stiffness a teacher used is
estimated by Deming (total least squares) regression with the noise-variance ratio taken from the
sensor specification; ordinary least squares stays available for comparison. A sliding-window form
keeps running sums so that each new sample costs the same whatever the window length, band-passes
both channels around the dither the robot superimposes during teaching, reports its own
uncertainty and returns NaN with a flag where the window holds too little excitation. A second
route derives a stiffness schedule from the spread of aligned demonstrations.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import signal

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "StiffnessFit",
    "StiffnessSeries",
    "tls_fit",
    "ols_fit",
    "design_band_pass",
    "SlidingStiffnessEstimator",
    "estimate_stiffness_series",
    "stiffness_from_variability",
]


@dataclass(frozen=True)
class StiffnessFit:
    """Straight-line fit torque = stiffness * deflection + intercept.

    Attributes
    ----------
    stiffness : float, N*m/rad
    intercept : float, N*m
    stiffness_std : float, N*m/rad
        Estimated standard deviation of ``stiffness`` (large-sample, independent samples).
    n : int
        Number of samples used.
    excitation : float, rad
        Standard deviation of the deflection over the samples.
    """

    stiffness: float
    intercept: float
    stiffness_std: float
    n: int
    excitation: float


@dataclass(frozen=True)
class StiffnessSeries:
    """Per-sample sliding-window estimates from :func:`estimate_stiffness_series`.

    Attributes
    ----------
    t : (n_samples,) array, s
    stiffness : (n_samples, n_joints) array, N*m/rad
        NaN where ``excited`` is False.
    stiffness_std : (n_samples, n_joints) array, N*m/rad
        NaN where ``excited`` is False.
    excited : (n_samples, n_joints) bool array
        Full window and deflection standard deviation at least ``min_excitation_rad``.
    excitation : (n_samples, n_joints) array, rad
        Standard deviation of the (band-passed) deflection over the window.
    deflection : (n_samples, n_joints) array, rad
        The regressor: minus the (band-passed) joint angle.
    torque : (n_samples, n_joints) array, N*m
        The regressand: the (band-passed) interaction torque.
    """

    t: np.ndarray
    stiffness: np.ndarray
    stiffness_std: np.ndarray
    excited: np.ndarray
    excitation: np.ndarray
    deflection: np.ndarray
    torque: np.ndarray


def _moments(n, sx, sy, sxx, syy, sxy):
    """Sample means and (n-1)-normalised second moments from plain sums (broadcasts)."""
    mean_x = sx / n
    mean_y = sy / n
    m_xx = np.maximum((sxx - sx * mean_x) / (n - 1), 0.0)
    m_yy = np.maximum((syy - sy * mean_y) / (n - 1), 0.0)
    m_xy = (sxy - sx * mean_y) / (n - 1)
    return mean_x, mean_y, m_xx, m_yy, m_xy


def _deming_from_sums(n, sx, sy, sxx, syy, sxy, ratio, n_effective):
    """Deming slope, intercept, slope std and deflection std from sums; arrays broadcast.

    ``ratio`` is var(torque noise) / var(deflection noise). The slope std follows Fuller (1987),
    Theorem 1.3.1 (from memory), with ``n_effective`` independent samples in place of n.
    """
    mean_x, mean_y, m_xx, m_yy, m_xy = _moments(n, sx, sy, sxx, syy, sxy)
    with np.errstate(divide="ignore", invalid="ignore"):
        spread = m_yy - ratio * m_xx
        root = np.sqrt(spread * spread + 4.0 * ratio * m_xy * m_xy)
        slope = (spread + root) / (2.0 * m_xy)
        intercept = mean_y - slope * mean_x
        sigma_uu = (
            (n - 1)
            / np.maximum(n - 2, 1)
            * (m_yy - 2.0 * slope * m_xy + slope * slope * m_xx)
            / (ratio + slope * slope)
        )
        sigma_uu = np.maximum(sigma_uu, 0.0)
        sigma_vv = (ratio + slope * slope) * sigma_uu
        true_xx = m_xy / slope
        variance = (sigma_vv / true_xx + ratio * sigma_uu * sigma_uu / true_xx**2) / (
            np.maximum(n_effective, 2.0) - 1.0
        )
        std = np.sqrt(np.abs(variance))
    return slope, intercept, std, np.sqrt(m_xx)


def _ols_from_sums(n, sx, sy, sxx, syy, sxy, n_effective):
    """OLS slope of y on x, intercept, slope std (classical formula) and deflection std."""
    mean_x, mean_y, m_xx, m_yy, m_xy = _moments(n, sx, sy, sxx, syy, sxy)
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = m_xy / m_xx
        intercept = mean_y - slope * mean_x
        residual = np.maximum(m_yy - slope * m_xy, 0.0) * (n - 1) / np.maximum(n - 2, 1)
        std = np.sqrt(residual / (m_xx * (np.maximum(n_effective, 2.0) - 1.0)))
    return slope, intercept, std, np.sqrt(m_xx)


def _pair(deflection: object, torque: object) -> tuple[np.ndarray, np.ndarray]:
    """Validate a deflection/torque pair of equal 1-D length with at least 3 finite samples."""
    x = np.asarray(deflection, dtype=float)
    y = np.asarray(torque, dtype=float)
    if x.ndim != 1 or y.shape != x.shape:
        raise InvalidInputError(
            f"deflection and torque must be 1-D of equal length, got shapes {x.shape} and {y.shape}"
        )
    if x.size < 3:
        raise InvalidInputError(f"deflection: need at least 3 samples, got {x.size}")
    for name, values in (("deflection", x), ("torque", y)):
        if not np.isfinite(values).all():
            index = int(np.flatnonzero(~np.isfinite(values))[0])
            raise InvalidInputError(f"{name}[{index}] = {values[index]} is not finite")
    if np.ptp(x) == 0:
        raise InvalidInputError(f"deflection is constant ({x[0]} rad): the slope is undefined")
    return x, y


def _check_ratio(noise_variance_ratio: float) -> float:
    ratio = float(noise_variance_ratio)
    if not (math.isfinite(ratio) and ratio > 0):
        raise InvalidInputError(
            f"noise_variance_ratio must be positive and finite, got {noise_variance_ratio!r}"
        )
    return ratio


def _sums(x: np.ndarray, y: np.ndarray) -> tuple[float, ...]:
    return (x.size, x.sum(), y.sum(), x @ x, y @ y, x @ y)


def tls_fit(deflection: object, torque: object, noise_variance_ratio: float) -> StiffnessFit:
    """Deming (total least squares) fit of torque against deflection.

    Parameters
    ----------
    deflection : (n,) array, rad
    torque : (n,) array, N*m
    noise_variance_ratio : float, (N*m/rad)^2
        var(torque noise) / var(deflection noise), from the sensor specification.

    Returns
    -------
    StiffnessFit

    Notes
    -----
    Minimises sum((y - a - b*X)^2 + ratio*(x - X)^2) over the line and the latent X, which is
    total least squares after scaling the deflection by sqrt(ratio) (Golub and Van Loan, Matrix
    Computations, section on total least squares). Closed form (Fuller, Measurement Error
    Models, 1987, eq. 1.3.7):
    ``b = (m_yy - r m_xx + sqrt((m_yy - r m_xx)^2 + 4 r m_xy^2)) / (2 m_xy)``.
    """
    x, y = _pair(deflection, torque)
    ratio = _check_ratio(noise_variance_ratio)
    sums = _sums(x, y)
    slope, intercept, std, spread = _deming_from_sums(*sums, ratio, x.size)
    return StiffnessFit(float(slope), float(intercept), float(std), x.size, float(spread))


def ols_fit(deflection: object, torque: object) -> StiffnessFit:
    """Ordinary least squares fit of torque against deflection (noise on torque only).

    Parameters
    ----------
    deflection : (n,) array, rad
    torque : (n,) array, N*m

    Returns
    -------
    StiffnessFit
        With noise on the deflection too, its stiffness is attenuated by
        var(x) / (var(x) + var(noise)) (Fuller 1987, section 1.1).
    """
    x, y = _pair(deflection, torque)
    slope, intercept, std, spread = _ols_from_sums(*_sums(x, y), x.size)
    return StiffnessFit(float(slope), float(intercept), float(std), x.size, float(spread))


def design_band_pass(band_hz: tuple[float, float], rate_hz: float, order: int = 2) -> np.ndarray:
    """Butterworth band-pass in second-order sections, the filter the estimator applies.

    Parameters
    ----------
    band_hz : (low, high), Hz
        Pass band; must satisfy 0 < low < high < rate_hz / 2.
    rate_hz : float, Hz
        Sample rate.
    order : int
        Butterworth order of each edge.

    Returns
    -------
    (n_sections, 6) array
        Second-order sections for :func:`scipy.signal.sosfilt`.
    """
    low, high = (float(v) for v in band_hz)
    if not (0 < low < high < rate_hz / 2):
        raise InvalidInputError(
            f"band_hz must satisfy 0 < low < high < rate_hz/2 = {rate_hz / 2}, got {band_hz!r}"
        )
    return signal.butter(order, [low, high], btype="bandpass", fs=rate_hz, output="sos")


class SlidingStiffnessEstimator:
    """Online sliding-window stiffness estimate per joint with constant cost per sample.

    Parameters
    ----------
    n_joints : int
    window_s : float, s
        Window length; ``round(window_s * rate_hz)`` samples.
    rate_hz : float, Hz
        Sample rate of the stream (samples are taken as equally spaced).
    noise_variance_ratio : float or (n_joints,) array, (N*m/rad)^2
        var(torque noise) / var(angle noise) per joint, from the sensor specification.
    band_hz : (low, high) in Hz or None
        Band-pass around the dither. None regresses the raw channels (a static spring about a
        fixed equilibrium within the window; the intercept absorbs the equilibrium).
    min_excitation_rad : float, rad
        Windows whose deflection standard deviation is below this are not excited: NaN stiffness.
    method : {"tls", "ols"}
    order : int
        Butterworth order of the band-pass edges.

    Notes
    -----
    The regressor is the deflection ``-q`` and the regressand the interaction torque ``tau``
    (torque of the hand on the link), both band-passed by the same causal filter, so a hand
    modelled as ``tau = K (q_h - q) + D (dq_h - dq)`` with slow ``q_h`` gives slope K. The damping
    part is in quadrature at the dither frequency; it does not bias OLS over whole periods and
    biases TLS by about (D w)^2 / ratio relative (w the dither angular frequency), negligible for
    ratios of sensor specifications (>= 1e4). The link's inertia sits on the robot side of the
    measured torque and does not enter the regression; it only sets how far the dither moves the
    joint. With a band-pass the filtered samples are correlated: the reported std uses
    ``n_eff = min(n, 2 * (high - low) * window_s)`` independent samples (noise-bandwidth rule,
    common practice). Running sums are recomputed from the window buffer once per window length
    so that rounding does not accumulate.
    """

    def __init__(
        self,
        n_joints: int,
        window_s: float,
        rate_hz: float,
        noise_variance_ratio: float | np.ndarray,
        band_hz: tuple[float, float] | None = None,
        min_excitation_rad: float = 1e-4,
        method: str = "tls",
        order: int = 2,
    ) -> None:
        if not isinstance(n_joints, int | np.integer) or n_joints < 1:
            raise InvalidInputError(f"n_joints must be a positive integer, got {n_joints!r}")
        if not (math.isfinite(rate_hz) and rate_hz > 0):
            raise InvalidInputError(f"rate_hz must be positive, got {rate_hz!r}")
        window = round(window_s * rate_hz) if math.isfinite(window_s) else 0
        if window < 3:
            raise InvalidInputError(
                f"window_s = {window_s!r} gives {window} samples at {rate_hz} Hz; need at least 3"
            )
        if method not in ("tls", "ols"):
            raise InvalidInputError(f"method must be 'tls' or 'ols', got {method!r}")
        if not (math.isfinite(min_excitation_rad) and min_excitation_rad >= 0):
            raise InvalidInputError(
                f"min_excitation_rad must be non-negative, got {min_excitation_rad!r}"
            )
        ratio = np.broadcast_to(np.asarray(noise_variance_ratio, dtype=float), (n_joints,))
        for value in ratio:
            _check_ratio(value)
        self.n_joints = int(n_joints)
        self.window = int(window)
        self.rate_hz = float(rate_hz)
        self.method = method
        self.min_excitation_rad = float(min_excitation_rad)
        self.noise_variance_ratio = ratio.copy()
        self.band_hz = band_hz
        if band_hz is None:
            self._sos = None
            self.n_effective = float(window)
        else:
            self._sos = design_band_pass(band_hz, rate_hz, order)
            self.n_effective = min(float(window), 2.0 * (band_hz[1] - band_hz[0]) * window_s)
        self.reset()

    def reset(self) -> None:
        """Forget all samples and filter state (start of a new demonstration)."""
        shape = (self.window, self.n_joints)
        self._buffer_x = np.zeros(shape)
        self._buffer_y = np.zeros(shape)
        self._count = 0
        self._since_refresh = 0
        self._sums = np.zeros((5, self.n_joints))
        self._zi_x: np.ndarray | None = None
        self._zi_y: np.ndarray | None = None

    @property
    def samples_seen(self) -> int:
        """Samples received since construction or the last :meth:`reset`."""
        return self._count

    def _filter(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        if self._sos is None:
            return x, y
        if self._zi_x is None or self._zi_y is None:
            # Start in the steady state of the first sample, as if the signals had held that
            # value before: a band-pass then outputs zero instead of a start-up step response.
            unit = signal.sosfilt_zi(self._sos)[:, :, None]
            self._zi_x = unit * x[0][None, None, :]
            self._zi_y = unit * y[0][None, None, :]
        x, self._zi_x = signal.sosfilt(self._sos, x, axis=0, zi=self._zi_x)
        y, self._zi_y = signal.sosfilt(self._sos, y, axis=0, zi=self._zi_y)
        return x, y

    def update(self, position: object, torque: object) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Add samples and return the window estimate after each of them.

        Parameters
        ----------
        position : (n, n_joints) array, rad
            Measured joint angles (a single sample may be given as (n_joints,)).
        torque : (n, n_joints) array, N*m
            Measured interaction torque, same shape.

        Returns
        -------
        stiffness : (n, n_joints) array, N*m/rad
            NaN where not excited.
        stiffness_std : (n, n_joints) array, N*m/rad
            NaN where not excited.
        excited : (n, n_joints) bool array
        """
        stiffness, std, excited, _, _, _ = self._update(position, torque)
        return stiffness, std, excited

    def _update(self, position: object, torque: object):
        q = np.atleast_2d(np.asarray(position, dtype=float))
        tau = np.atleast_2d(np.asarray(torque, dtype=float))
        if q.ndim != 2 or q.shape[1] != self.n_joints or tau.shape != q.shape:
            raise InvalidInputError(
                f"position and torque must be (n, {self.n_joints}) arrays of equal shape, got "
                f"{q.shape} and {tau.shape}"
            )
        for name, values in (("position", q), ("torque", tau)):
            if not np.isfinite(values).all():
                row, col = np.argwhere(~np.isfinite(values))[0]
                raise InvalidInputError(f"{name}[{row}, {col}] = {values[row, col]} is not finite")
        x, y = self._filter(-q, tau)
        n_new = x.shape[0]
        window = self.window
        positions = (self._count + np.arange(n_new)) % window
        leaving_x = self._buffer_x[positions]
        leaving_y = self._buffer_y[positions]
        # Samples that leave the window inside this chunk were written earlier in this chunk.
        if n_new > window:
            leaving_x[window:] = x[:-window]
            leaving_y[window:] = y[:-window]
        mask = (self._count + np.arange(n_new) >= window)[:, None]
        leaving_x = np.where(mask, leaving_x, 0.0)
        leaving_y = np.where(mask, leaving_y, 0.0)
        increments = np.stack(
            [
                x - leaving_x,
                y - leaving_y,
                x * x - leaving_x * leaving_x,
                y * y - leaving_y * leaving_y,
                x * y - leaving_x * leaving_y,
            ]
        )
        running = self._sums[:, None, :] + np.cumsum(increments, axis=1)
        self._buffer_x[positions[-window:]] = x[-window:]
        self._buffer_y[positions[-window:]] = y[-window:]
        self._count += n_new
        self._since_refresh += n_new
        if self._since_refresh >= window and self._count >= window:
            bx, by = self._buffer_x, self._buffer_y
            self._sums = np.stack(
                [bx.sum(0), by.sum(0), (bx * bx).sum(0), (by * by).sum(0), (bx * by).sum(0)]
            )
            self._since_refresh = 0
        else:
            self._sums = running[:, -1, :]
        n_in = np.minimum(self._count - n_new + np.arange(1, n_new + 1), window)[:, None]
        n_in = n_in.astype(float)
        n_eff = np.minimum(n_in, self.n_effective)
        if self.method == "tls":
            slope, _, std, spread = _deming_from_sums(
                n_in, *running, self.noise_variance_ratio, n_eff
            )
        else:
            slope, _, std, spread = _ols_from_sums(n_in, *running, n_eff)
        excited = (n_in >= window) & (spread >= self.min_excitation_rad) & np.isfinite(slope)
        excited = np.broadcast_to(excited, slope.shape)
        stiffness = np.where(excited, slope, np.nan)
        std = np.where(excited, std, np.nan)
        return stiffness, std, excited, spread, x, y


def estimate_stiffness_series(
    t: object,
    position: object,
    torque: object,
    *,
    window_s: float,
    noise_variance_ratio: float | np.ndarray,
    band_hz: tuple[float, float] | None = None,
    min_excitation_rad: float = 1e-4,
    method: str = "tls",
    order: int = 2,
) -> StiffnessSeries:
    """Offline sliding-window stiffness over a whole demonstration.

    Parameters
    ----------
    t : (n_samples,) array, s
        Strictly increasing, equally spaced within 1 % (the rate is taken from the mean step).
    position : (n_samples, n_joints) array, rad
    torque : (n_samples, n_joints) array, N*m
    window_s, noise_variance_ratio, band_hz, min_excitation_rad, method, order
        As for :class:`SlidingStiffnessEstimator`.

    Returns
    -------
    StiffnessSeries
        Sample k holds the fit over samples k - window + 1 .. k of the filtered channels, the
        same numbers the online estimator returns after sample k.
    """
    times = np.asarray(t, dtype=float)
    q = np.asarray(position, dtype=float)
    if q.ndim == 1:
        q = q[:, None]
    if times.ndim != 1 or times.size != q.shape[0]:
        raise InvalidInputError(f"t: expected {q.shape[0]} sample times, got shape {times.shape}")
    if not np.isfinite(times).all():
        index = int(np.flatnonzero(~np.isfinite(times))[0])
        raise InvalidInputError(f"t[{index}] = {times[index]} is not finite")
    steps = np.diff(times)
    if steps.size == 0 or not (steps > 0).all():
        index = int(np.flatnonzero(steps <= 0)[0]) + 1 if steps.size else 0
        raise InvalidInputError(
            f"t must be strictly increasing with positive duration; t[{index}] = {times[index]}"
        )
    mean_step = float(times[-1] - times[0]) / steps.size
    if np.abs(steps - mean_step).max() > 0.01 * mean_step:
        index = int(np.argmax(np.abs(steps - mean_step))) + 1
        raise InvalidInputError(
            f"t is not equally spaced: step before t[{index}] = {times[index]} is "
            f"{steps[index - 1]} s, mean step {mean_step} s"
        )
    tau = np.asarray(torque, dtype=float)
    tau = tau[:, None] if tau.ndim == 1 else tau
    estimator = SlidingStiffnessEstimator(
        q.shape[1],
        window_s,
        1.0 / mean_step,
        noise_variance_ratio,
        band_hz=band_hz,
        min_excitation_rad=min_excitation_rad,
        method=method,
        order=order,
    )
    # Chunks of one window let the estimator refresh its sums exactly as it does online.
    parts = [
        estimator._update(
            q[start : start + estimator.window], tau[start : start + estimator.window]
        )
        for start in range(0, q.shape[0], estimator.window)
    ]
    stiffness, std, excited, spread, x, y = (
        np.concatenate(column) for column in zip(*parts, strict=True)
    )
    return StiffnessSeries(times, stiffness, std, excited, spread, x, y)


def stiffness_from_variability(
    variance: object,
    k_min: float | np.ndarray,
    k_max: float | np.ndarray,
    *,
    n_demos: int,
    variance_floor: float | None = None,
) -> np.ndarray:
    """Stiffness schedule from the spread of aligned demonstrations: stiff where they agree.

    Parameters
    ----------
    variance : (n_samples, n_joints) array, rad^2
        Per-sample variance across aligned demonstrations (``AlignedSet.variance``).
    k_min, k_max : float or (n_joints,) array, N*m/rad
        Target joint's stiffness range.
    n_demos : int
        Number of demonstrations the variance came from; at least 2.
    variance_floor : float, rad^2, optional
        Lower bound on the variance before inversion (default 1e-6 times the largest variance
        of each joint), so that a sample where all demonstrations coincide does not dominate.

    Returns
    -------
    (n_samples, n_joints) array, N*m/rad
        ``k_min + (k_max - k_min) * (p - min p) / (max p - min p)`` with precision
        ``p = 1 / max(variance, floor)``, per joint; a joint with constant variance gets k_max.

    Notes
    -----
    Stiffness follows the inverse of the variance, scaled linearly so that its extremes over
    the movement meet the joint's range (Calinon, Sardellitti, Caldwell, IROS 2010).
    """
    var = np.asarray(variance, dtype=float)
    if var.ndim == 1:
        var = var[:, None]
    if var.ndim != 2 or var.shape[0] < 1:
        raise InvalidInputError(
            f"variance must be an (n_samples, n_joints) array, got shape {var.shape}"
        )
    if not isinstance(n_demos, int | np.integer) or n_demos < 2:
        raise InvalidInputError(
            f"n_demos = {n_demos!r}: stiffness from variability needs at least 2 demonstrations"
        )
    if not np.isfinite(var).all():
        row, col = np.argwhere(~np.isfinite(var))[0]
        raise InvalidInputError(f"variance[{row}, {col}] = {var[row, col]} is not finite")
    if (var < 0).any():
        row, col = np.argwhere(var < 0)[0]
        raise InvalidInputError(f"variance[{row}, {col}] = {var[row, col]} is negative")
    low = np.broadcast_to(np.asarray(k_min, dtype=float), (var.shape[1],))
    high = np.broadcast_to(np.asarray(k_max, dtype=float), (var.shape[1],))
    if not (np.isfinite(low).all() and np.isfinite(high).all() and (low > 0).all()):
        raise InvalidInputError(f"k_min = {k_min!r} and k_max = {k_max!r} must be positive")
    if (low > high).any():
        raise InvalidInputError(f"k_min = {k_min!r} is above k_max = {k_max!r}")
    if variance_floor is None:
        floor = 1e-6 * var.max(axis=0)
        floor = np.where(floor > 0, floor, np.finfo(float).tiny)
    elif math.isfinite(variance_floor) and variance_floor > 0:
        floor = np.full(var.shape[1], float(variance_floor))
    else:
        raise InvalidInputError(f"variance_floor must be positive, got {variance_floor!r}")
    precision = 1.0 / np.maximum(var, floor)
    span = precision.max(axis=0) - precision.min(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        scaled = np.where(span > 0, (precision - precision.min(axis=0)) / span, 1.0)
    return low + (high - low) * scaled
