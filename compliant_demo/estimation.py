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
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import signal

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "STIFFNESS_LATENCY_FLAG",
    "StiffnessFit",
    "StiffnessSeries",
    "tls_fit",
    "ols_fit",
    "design_band_pass",
    "SlidingStiffnessEstimator",
    "estimate_stiffness_series",
    "stiffness_from_variability",
]

STIFFNESS_LATENCY_FLAG = "stiffness_latency_s"
"""Demonstration flag: :attr:`SlidingStiffnessEstimator.latency_s` of the recorded estimate."""


@dataclass(frozen=True)
class StiffnessFit:
    """Straight-line fit torque = stiffness * deflection + intercept (+ a rate term if fitted).

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
        Full window, band-pass settled, deflection std at least ``min_excitation_rad`` and a
        positive slope (a non-positive one is no spring's stiffness).
    excitation : (n_samples, n_joints) array, rad
        Standard deviation of the (band-passed) deflection over the window.
    deflection : (n_samples, n_joints) array, rad
        The regressor: minus the (band-passed) joint angle, one sample late.
    torque : (n_samples, n_joints) array, N*m
        The regressand: the (band-passed) hand torque, one sample late (with ``link_inertia``,
        the measured torque plus the link's inertial torque).
    deflection_rate : (n_samples, n_joints) array, rad/s
        The nuisance regressor (zero when damping is not modelled).
    """

    t: np.ndarray
    stiffness: np.ndarray
    stiffness_std: np.ndarray
    excited: np.ndarray
    excitation: np.ndarray
    deflection: np.ndarray
    torque: np.ndarray
    deflection_rate: np.ndarray


# Order of the running sums: first moments, then the products named by the pairs.
_PAIRS = ((0, 0), (1, 1), (2, 2), (0, 1), (0, 2), (1, 2))


def _terms(channels: np.ndarray) -> np.ndarray:
    """Per-sample summands (x, y, v, xx, yy, vv, xy, xv, yv) of channels stacked on axis 1."""
    products = [channels[:, a] * channels[:, b] for a, b in _PAIRS]
    return np.concatenate([channels, np.stack(products, axis=1)], axis=1)


def _fit_from_sums(sums, n, ratio, n_effective, method: str, with_rate: bool):
    """Slope, intercept, slope std and deflection std from running sums; arrays broadcast.

    ``sums`` holds (x, y, v, xx, yy, vv, xy, xv, yv) over ``n`` samples. With ``with_rate`` the
    deflection rate v enters as an error-free nuisance regressor and is partialled out of the
    second moments first (Frisch-Waugh-Lovell; Fuller 1987, section 2.2, from memory). ``ratio``
    is var(torque noise) / var(deflection noise). The Deming slope std follows Fuller (1987),
    Theorem 1.3.1 (from memory), with ``n_effective`` independent samples in place of n.
    """
    sx, sy, sv, sxx, syy, svv, sxy, sxv, syv = sums
    with np.errstate(divide="ignore", invalid="ignore"):
        dof = n - 1.0
        mean_x, mean_y, mean_v = sx / n, sy / n, sv / n
        m_xx = (sxx - sx * mean_x) / dof
        m_yy = (syy - sy * mean_y) / dof
        m_xy = (sxy - sx * mean_y) / dof
        excitation = np.sqrt(np.maximum(m_xx, 0.0))
        n_params = 2
        if with_rate:
            m_vv = (svv - sv * mean_v) / dof
            m_xv = (sxv - sx * mean_v) / dof
            m_yv = (syv - sy * mean_v) / dof
            m_xx = m_xx - m_xv * m_xv / m_vv
            m_yy = m_yy - m_yv * m_yv / m_vv
            m_xy = m_xy - m_xv * m_yv / m_vv
            n_params = 3
        m_xx = np.maximum(m_xx, 0.0)
        m_yy = np.maximum(m_yy, 0.0)
        df_scale = dof / np.maximum(n - n_params, 1.0)
        samples = np.maximum(n_effective, 2.0) - 1.0
        if method == "tls":
            spread = m_yy - ratio * m_xx
            root = np.sqrt(spread * spread + 4.0 * ratio * m_xy * m_xy)
            # Two algebraically equal forms; each avoids the cancellation of the other.
            slope = np.where(
                spread >= 0, (spread + root) / (2.0 * m_xy), 2.0 * ratio * m_xy / (root - spread)
            )
            sigma_uu = (m_yy - 2.0 * slope * m_xy + slope * slope * m_xx) / (ratio + slope * slope)
            sigma_uu = np.maximum(sigma_uu * df_scale, 0.0)
            sigma_vv = (ratio + slope * slope) * sigma_uu
            true_xx = m_xy / slope
            variance = (sigma_vv / true_xx + ratio * sigma_uu * sigma_uu / true_xx**2) / samples
        else:
            slope = m_xy / m_xx
            variance = np.maximum(m_yy - slope * m_xy, 0.0) * df_scale / (m_xx * samples)
        std = np.sqrt(np.abs(variance))
        intercept = mean_y - slope * mean_x
        if with_rate:
            intercept = intercept - (m_yv - slope * m_xv) / m_vv * mean_v
    return slope, intercept, std, excitation


def _finite_1d(name: str, values: object, size: int | None = None) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 1 or (size is not None and arr.size != size):
        expected = "a 1-D array" if size is None else f"{size} samples like deflection"
        raise InvalidInputError(f"{name}: expected {expected}, got shape {arr.shape}")
    if not np.isfinite(arr).all():
        index = int(np.flatnonzero(~np.isfinite(arr))[0])
        raise InvalidInputError(f"{name}[{index}] = {arr[index]} is not finite")
    return arr


def _check_ratio(noise_variance_ratio: float) -> float:
    ratio = float(noise_variance_ratio)
    if not (math.isfinite(ratio) and ratio > 0):
        raise InvalidInputError(
            f"noise_variance_ratio must be positive and finite, got {noise_variance_ratio!r}"
        )
    return ratio


def _fit_arrays(
    deflection: object, torque: object, deflection_rate: object | None, ratio: float, method: str
) -> StiffnessFit:
    """Validate the samples and fit one straight line (with the rate partialled out if given)."""
    x = _finite_1d("deflection", deflection)
    y = _finite_1d("torque", torque, x.size)
    with_rate = deflection_rate is not None
    v = _finite_1d("deflection_rate", deflection_rate, x.size) if with_rate else np.zeros_like(x)
    if x.size < 3 + with_rate:
        raise InvalidInputError(f"deflection: need at least {3 + with_rate} samples, got {x.size}")
    if np.ptp(x) == 0:
        raise InvalidInputError(f"deflection is constant ({x[0]} rad): the slope is undefined")
    if with_rate and np.ptp(v) == 0:
        raise InvalidInputError(f"deflection_rate is constant ({v[0]} rad/s): drop it or vary it")
    sums = _terms(np.stack([x, y, v], axis=1)[:, :, None]).sum(axis=0)[:, 0]
    slope, intercept, std, spread = _fit_from_sums(sums, x.size, ratio, x.size, method, with_rate)
    return StiffnessFit(float(slope), float(intercept), float(std), x.size, float(spread))


def tls_fit(
    deflection: object,
    torque: object,
    noise_variance_ratio: float,
    deflection_rate: object | None = None,
) -> StiffnessFit:
    """Deming (total least squares) fit of torque against deflection.

    Parameters
    ----------
    deflection : (n,) array, rad
    torque : (n,) array, N*m
    noise_variance_ratio : float, (N*m/rad)^2
        var(torque noise) / var(deflection noise), from the sensor specification.
    deflection_rate : (n,) array, rad/s, optional
        Taken as an error-free second regressor (torque = K x + D v + c) and partialled out, so
        that a damping term in quadrature does not leak into the stiffness.

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
    ratio = _check_ratio(noise_variance_ratio)
    return _fit_arrays(deflection, torque, deflection_rate, ratio, "tls")


def ols_fit(
    deflection: object, torque: object, deflection_rate: object | None = None
) -> StiffnessFit:
    """Ordinary least squares fit of torque against deflection (noise on torque only).

    Parameters
    ----------
    deflection : (n,) array, rad
    torque : (n,) array, N*m
    deflection_rate : (n,) array, rad/s, optional
        Second regressor, as for :func:`tls_fit`.

    Returns
    -------
    StiffnessFit
        With noise on the deflection too, its stiffness is attenuated by
        var(x) / (var(x) + var(noise)) (Fuller 1987, section 1.1).
    """
    return _fit_arrays(deflection, torque, deflection_rate, 1.0, "ols")


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
    values = np.asarray(band_hz, dtype=float).ravel()
    low, high = (values[0], values[1]) if values.size == 2 else (np.nan, np.nan)
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
        A window whose slope comes out zero or negative is reported as not excited too.
    method : {"tls", "ols"}
    order : int
        Butterworth order of the band-pass edges.
    model_damping : bool
        Fit torque = K x + D dx/dt + c with the rate partialled out (default), so that the hand's
        damping, in quadrature at the dither, cannot leak into K through the window ends.
    settle_s : float, s, optional
        Time after the first sample before any window counts as excited, for the band-pass to
        settle on the slow motion; default two periods of the band's lower edge (0 without band).
    link_inertia : float or (n_joints,) array, kg*m^2, optional
        Give it when ``torque`` is measured on the robot side of the link (a joint torque sensor
        between drive and link): the link's inertial torque I q'' is then added back to recover
        the hand's torque. None (default): ``torque`` is the hand's torque on the link.

    Notes
    -----
    The regressor is the deflection ``-q`` and the regressand the interaction torque ``tau``
    (torque of the hand on the link), both band-passed by the same causal filter, so a hand
    modelled as ``tau = K (q_h - q) + D (dq_h - dq)`` with slow ``q_h`` gives slope K. The damping
    part is in quadrature at the dither frequency; with ``model_damping`` the deflection rate is
    a second regressor and is partialled out; without it, the part of the damping torque that
    correlates with x through the window ends leaks into K (about D / window_s).
    If the torque is measured on the robot side of the link, it is the hand torque minus
    I q'': at the dither angular frequency w the slope would be K - I w^2 (for the default
    shoulder, 0.08 kg*m^2 at 8 Hz: about 200 N*m/rad, far more than the hand's stiffness), which
    is why ``link_inertia`` adds I q'' back from the central second difference of the
    band-passed angle (amplitude error (w dt)^2 / 12, 2e-4 at 8 Hz and 1 kHz). Bearing friction
    on that side is viscous and is partialled out with the rate. All channels refer to the
    sample before the newest, so the estimate lags the input by one sample.
    With a band-pass the filtered samples are correlated: the reported std uses
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
        model_damping: bool = True,
        settle_s: float | None = None,
        link_inertia: float | np.ndarray | None = None,
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
        self.model_damping = bool(model_damping)
        if link_inertia is None:
            self.link_inertia: np.ndarray | None = None
        else:
            inertia = np.broadcast_to(np.asarray(link_inertia, dtype=float), (n_joints,))
            if not (np.isfinite(inertia).all() and (inertia >= 0).all()):
                raise InvalidInputError(
                    f"link_inertia must be non-negative and finite, got {link_inertia!r}"
                )
            self.link_inertia = inertia.copy()
        if settle_s is None:
            settle_s = 0.0 if band_hz is None else 2.0 / band_hz[0]
        if not (math.isfinite(settle_s) and settle_s >= 0):
            raise InvalidInputError(f"settle_s must be non-negative, got {settle_s!r}")
        self.settle = round(settle_s * rate_hz)
        if band_hz is None:
            self._sos = None
            self.n_effective = float(window)
        else:
            self._sos = design_band_pass(band_hz, rate_hz, order)
            self.n_effective = min(float(window), 2.0 * (band_hz[1] - band_hz[0]) * window_s)
        self.reset()

    def reset(self) -> None:
        """Forget all samples and filter state (start of a new demonstration)."""
        self._buffer = np.zeros((self.window, 3, self.n_joints))
        self._count = 0
        self._since_refresh = 0
        self._sums = np.zeros((9, self.n_joints))
        self._history: np.ndarray | None = None
        self._zi: np.ndarray | None = None

    @property
    def samples_seen(self) -> int:
        """Samples received since construction or the last :meth:`reset`."""
        return self._count

    @property
    def latency_s(self) -> float:
        """How far, in s, the estimate trails the stiffness it describes.

        The window is trailing, so its estimate describes the stiffness at the window's centre,
        ``(window - 1) / 2`` samples back, plus the one-sample lag of the central differences.
        The band-pass delays the dither's envelope (the stiffness changes) by its group delay at
        the band's geometric centre frequency. A learner or a plot shifts the recorded
        stiffness earlier by this much to put it back where the teacher applied it.
        """
        samples = (self.window - 1) / 2.0 + 1.0
        if self._sos is not None and self.band_hz is not None:
            centre_hz = math.sqrt(self.band_hz[0] * self.band_hz[1])
            numerator, denominator = signal.sos2tf(self._sos)
            _, delay = signal.group_delay((numerator, denominator), w=[centre_hz], fs=self.rate_hz)
            samples += float(delay[0])
        return samples / self.rate_hz

    def _filter(self, xy: np.ndarray) -> np.ndarray:
        """Band-pass (n, 2, n_joints) deflection and torque with filter state kept across calls."""
        if self._sos is None:
            return xy
        if self._zi is None:
            # Start in the steady state of the first sample, as if the signals had held that
            # value before: a band-pass then outputs zero instead of a start-up step response.
            self._zi = signal.sosfilt_zi(self._sos)[:, :, None, None] * xy[0][None, None]
        filtered, self._zi = signal.sosfilt(self._sos, xy, axis=0, zi=self._zi)
        return filtered

    def _channels(self, filtered: np.ndarray) -> np.ndarray:
        """Regression channels (x, y, v) per sample, (n, 3, n_joints), one sample late.

        Each output refers to the sample before the newest one, so the deflection rate and
        acceleration come from central differences with no phase error of their own: any
        amplitude error of the rate stays in quadrature and is partialled out with it.
        """
        history = self._history if self._history is not None else np.repeat(filtered[:1], 2, 0)
        padded = np.concatenate([history, filtered])
        self._history = padded[-2:].copy()
        centre = padded[1:-1]
        x_next, x_prev = padded[2:, 0], padded[:-2, 0]
        rate = 0.5 * (x_next - x_prev) * self.rate_hz
        torque = centre[:, 1]
        if self.link_inertia is not None:
            # Hand torque = measured link-side torque + I q'' and q'' = -x'' in the band.
            accel = (x_next - 2.0 * centre[:, 0] + x_prev) * self.rate_hz**2
            torque = torque - self.link_inertia * accel
        if not self.model_damping:
            rate = np.zeros_like(rate)
        return np.stack([centre[:, 0], torque, rate], axis=1)

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
        stiffness, std, excited, _, _ = self._update(position, torque)
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
        if q.shape[0] == 0:
            empty = np.empty((0, self.n_joints))
            channels = np.empty((0, 3, self.n_joints))
            return empty, empty.copy(), empty.astype(bool), empty.copy(), channels
        channels = self._channels(self._filter(np.stack([-q, tau], axis=1)))
        n_new, window = channels.shape[0], self.window
        slots = (self._count + np.arange(n_new)) % window
        leaving = self._buffer[slots]
        # Samples that leave the window inside this chunk arrived earlier in this chunk.
        if n_new > window:
            leaving[window:] = channels[:-window]
        leaving[self._count + np.arange(n_new) < window] = 0.0
        running = self._sums + np.cumsum(_terms(channels) - _terms(leaving), axis=0)
        self._buffer[slots[-window:]] = channels[-window:]
        self._count += n_new
        self._since_refresh += n_new
        if self._since_refresh >= window and self._count >= window:
            self._sums = _terms(self._buffer).sum(axis=0)
            self._since_refresh = 0
        else:
            self._sums = running[-1]
        n_in = np.minimum(self._count - n_new + np.arange(1, n_new + 1), window)[:, None]
        n_in = n_in.astype(float)
        slope, _, std, spread = _fit_from_sums(
            np.moveaxis(running, 1, 0),
            n_in,
            self.noise_variance_ratio,
            np.minimum(n_in, self.n_effective),
            self.method,
            self.model_damping,
        )
        seen = (self._count - n_new + np.arange(1, n_new + 1))[:, None]
        # A spring cannot have a non-positive stiffness: such a slope (a noisy window about a
        # soft hand) carries no estimate, like a window with too little excitation.
        excited = (
            (seen >= window + self.settle)
            & (spread >= self.min_excitation_rad)
            & np.isfinite(slope)
            & (slope > 0)
        )
        stiffness = np.where(excited, slope, np.nan)
        std = np.where(excited, std, np.nan)
        return stiffness, std, excited, spread, channels


def estimate_stiffness_series(
    t: object, position: object, torque: object, **settings: Any
) -> StiffnessSeries:
    """Offline sliding-window stiffness over a whole demonstration.

    Parameters
    ----------
    t : (n_samples,) array, s
        Strictly increasing; the rate is taken from the median step, and steps that differ from
        it by more than half (gaps, bursts) are reported with a warning.
    position : (n_samples, n_joints) array, rad
    torque : (n_samples, n_joints) array, N*m
    **settings
        Keyword arguments of :class:`SlidingStiffnessEstimator` other than ``n_joints`` and
        ``rate_hz``: ``window_s`` and ``noise_variance_ratio`` (required), ``band_hz``,
        ``min_excitation_rad``, ``method``, ``order``, ``model_damping``, ``settle_s``,
        ``link_inertia``.

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
    step = float(np.median(steps))
    irregular = np.abs(steps - step) > 0.5 * step
    if irregular.any():
        # Recorded stamps jitter and may have gaps; the estimator assumes equal spacing, so the
        # windows that span an irregular step are less accurate, but the rest stay valid.
        index = int(np.flatnonzero(irregular)[0]) + 1
        warnings.warn(
            f"t is not equally spaced: {int(irregular.sum())} steps differ from the median "
            f"{step} s by more than half, first before t[{index}] = {times[index]}",
            stacklevel=2,
        )
    tau = np.asarray(torque, dtype=float)
    tau = tau[:, None] if tau.ndim == 1 else tau
    estimator = SlidingStiffnessEstimator(q.shape[1], rate_hz=1.0 / step, **settings)
    # Chunks of one window let the estimator refresh its sums exactly as it does online.
    parts = [
        estimator._update(
            q[start : start + estimator.window], tau[start : start + estimator.window]
        )
        for start in range(0, q.shape[0], estimator.window)
    ]
    stiffness, std, excited, spread, channels = (
        np.concatenate(column) for column in zip(*parts, strict=True)
    )
    return StiffnessSeries(
        times, stiffness, std, excited, spread, channels[:, 0], channels[:, 1], channels[:, 2]
    )


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
