"""Stiffness estimation: errors-in-variables regression of torque on deflection, online and offline.

Joint angle and interaction torque are both measured with noise, so the stiffness a teacher used is
estimated by Deming (total least squares) regression with the noise-variance ratio taken from the
sensor specification; ordinary least squares stays available for comparison. A sliding-window form
keeps running sums so that each new sample costs the same whatever the window length, band-passes
both channels around the dither the robot superimposes during teaching, reports its own
uncertainty and returns NaN with a flag where the window holds too little excitation. The other
routes to a stiffness channel live in :mod:`compliant_demo.variability` (spread of aligned
demonstrations) and :mod:`compliant_demo.model_stiffness` (a mechanism's own state).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import signal, stats

from compliant_demo.band_pass import BandPassMeasures, band_pass_measures, design_band_pass
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
    stiffness_low, stiffness_high : (n_samples, n_joints) arrays, N*m/rad
        Interval at the estimator's ``confidence``; NaN where ``excited`` is False.
    excited : (n_samples, n_joints) bool array
        Full window, band-pass settled, ``excitation`` at least ``min_excitation_rad``,
        ``conditioning`` at least ``min_conditioning`` and a positive slope (a non-positive one
        is no spring's stiffness).
    excitation : (n_samples, n_joints) array, rad
        Standard deviation of the (band-passed) deflection over the window, less the part the
        rate and acceleration regressors explain.
    conditioning : (n_samples, n_joints) array
        Share of the deflection's variance not explained by the other regressors (1 without).
    damping : (n_samples, n_joints) array, N*m*s/rad
        Coefficient of the rate (0 when not modelled); NaN where ``excited`` is False.
    inertia : (n_samples, n_joints) array, kg*m^2
        Coefficient of the acceleration: inertia between the torque sensor and the spring not
        given as ``link_inertia`` (0 when not modelled); NaN where ``excited`` is False.
    deflection : (n_samples, n_joints) array, rad
        The regressor: minus the (band-passed) joint angle, one sample late.
    torque : (n_samples, n_joints) array, N*m
        The regressand: the (band-passed) hand torque, one sample late (with ``link_inertia``,
        the measured torque plus the link's inertial torque).
    deflection_rate : (n_samples, n_joints) array, rad/s
    deflection_acceleration : (n_samples, n_joints) array, rad/s^2
        The nuisance regressors (computed whether they are fitted or not).
    """

    t: np.ndarray
    stiffness: np.ndarray
    stiffness_std: np.ndarray
    stiffness_low: np.ndarray
    stiffness_high: np.ndarray
    excited: np.ndarray
    excitation: np.ndarray
    conditioning: np.ndarray
    damping: np.ndarray
    inertia: np.ndarray
    deflection: np.ndarray
    torque: np.ndarray
    deflection_rate: np.ndarray
    deflection_acceleration: np.ndarray


# Regression channels in the running sums: deflection x, torque y, rate v, acceleration a.
_X, _Y, _V, _A = range(4)
_N_CHANNELS = 4
# Order of the running sums: first moments, then the products named by the pairs.
_PAIRS = tuple((i, j) for i in range(_N_CHANNELS) for j in range(i, _N_CHANNELS))


def _terms(channels: np.ndarray) -> np.ndarray:
    """Per-sample summands: the four channels (axis 1), then their products in ``_PAIRS`` order."""
    products = [channels[:, a] * channels[:, b] for a, b in _PAIRS]
    return np.concatenate([channels, np.stack(products, axis=1)], axis=1)


@dataclass(frozen=True)
class _WindowFit:
    """Arrays of one batch of window fits (see :func:`_fit_from_sums`)."""

    slope: Any
    intercept: Any
    std: Any
    excitation: Any
    conditioning: Any
    nuisance: dict


def _fit_from_sums(sums, n, ratio, n_effective, method: str, nuisance: tuple[int, ...],
                   band: tuple[BandPassMeasures, Any] | None = None):
    """Window fit from running sums; arrays broadcast.

    ``sums`` holds the first moments of (x, y, v, a) and their products (``_PAIRS``) over ``n``
    samples. The channels named in ``nuisance`` (rate, acceleration) enter as error-free
    regressors and are partialled out of the second moments one after the other first
    (Frisch-Waugh-Lovell; Fuller 1987, section 2.2, from memory); their coefficients follow by
    back substitution. ``ratio`` is var(torque noise) / var(deflection noise). The Deming slope
    std follows Fuller (1987), Theorem 1.3.1 (from memory), with ``n_effective`` independent
    samples in place of n, times :func:`_colour` when ``band`` (the band-pass's measures and the
    link inertia added back) is given. ``conditioning`` is the share of the deflection's
    variance that the nuisance regressors do not explain (1 / variance inflation factor; 1
    without nuisance) and ``excitation`` the standard deviation of that share, rad.
    """
    first = sums[:_N_CHANNELS]
    with np.errstate(divide="ignore", invalid="ignore"):
        dof = n - 1.0
        mean = [first[i] / n for i in range(_N_CHANNELS)]
        moments = {}
        for k, (a, b) in enumerate(_PAIRS):
            moments[a, b] = moments[b, a] = (sums[_N_CHANNELS + k] - first[a] * mean[b]) / dof
        raw = dict(moments)
        raw_xx = moments[_X, _X]
        stages = []
        kept = list(range(_N_CHANNELS))
        for pivot in nuisance:
            stages.append((pivot, dict(moments)))
            kept.remove(pivot)
            scale = moments[pivot, pivot]
            moments = dict(moments)
            for i in kept:
                for j in kept:
                    moments[i, j] = moments[i, j] - moments[i, pivot] * moments[pivot, j] / scale
        m_xx = np.maximum(moments[_X, _X], 0.0)
        m_yy = np.maximum(moments[_Y, _Y], 0.0)
        m_xy = moments[_X, _Y]
        # n_eff (n - 1) / n sample-sized squares of deviations; the fit takes (1 + p) n / n_eff
        # of the residual's n - 1 (n - 1 and n - 2 - p for independent samples).
        samples = np.maximum(n_effective, 2.0) * dof / n
        df_scale = dof / np.maximum(dof - (1.0 + len(nuisance)) * dof / samples, 1.0)
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
        coefficients: dict[int, Any] = {}
        for pivot, stage in reversed(stages):
            residual = stage[pivot, _Y] - slope * stage[pivot, _X]
            for later, value in coefficients.items():
                residual = residual - value * stage[pivot, later]
            coefficients[pivot] = residual / stage[pivot, pivot]
        intercept = mean[_Y] - slope * mean[_X]
        for pivot, value in coefficients.items():
            intercept = intercept - value * mean[pivot]
        conditioning = m_xx / raw_xx if nuisance else np.ones_like(raw_xx)
        if band is not None:
            variance = variance * _colour(raw, slope, coefficients, ratio, *band)
    return _WindowFit(
        slope, intercept, np.sqrt(np.abs(variance)), np.sqrt(m_xx), conditioning, coefficients
    )


def _colour(raw, slope, coefficients, ratio, band: BandPassMeasures, link_inertia):
    """Share of the residual's power at the deflection's frequencies against the band's mean.

    Angle noise n enters the residual as (K + D d/dt + M_e d^2/dt^2) n (M_e the fitted inertia
    plus the link inertia added back to the torque), torque noise as itself: with white noise of
    ratio r, the residual's density is proportional to r + |Z(w)|^2, |Z|^2 = K^2 +
    (D^2 - 2 K M_e) w^2 + M_e^2 w^4. The slope's error sees it at the deflection's frequencies
    (w^2, w^4 averaged over the band-passed deflection's power: m_vv / m_xx, m_aa / m_xx), the
    residual's power over the whole band (the filter's moments); their ratio rescales the
    variance. A white residual gives 1.
    """
    damping = coefficients.get(_V, 0.0)
    inertia = coefficients.get(_A, 0.0) + link_inertia
    cross = damping * damping - 2.0 * slope * inertia

    def impedance_sq(w2, w4):
        return slope * slope + cross * w2 + inertia * inertia * w4

    at_signal = impedance_sq(raw[_V, _V] / raw[_X, _X], raw[_A, _A] / raw[_X, _X])
    over_band = impedance_sq(band.mean_square_omega, band.mean_fourth_omega)
    return (ratio + at_signal) / (ratio + over_band)


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
    deflection: object,
    torque: object,
    extra: dict[str, object | None],
    ratio: float,
    method: str,
) -> StiffnessFit:
    """Validate the samples and fit one straight line, partialling out the given nuisances."""
    x = _finite_1d("deflection", deflection)
    y = _finite_1d("torque", torque, x.size)
    channels = [x, y, np.zeros_like(x), np.zeros_like(x)]
    nuisance = []
    for (name, values), index, unit in zip(extra.items(), (_V, _A), ("rad/s", "rad/s^2"),
                                           strict=True):
        if values is None:
            continue
        channels[index] = _finite_1d(name, values, x.size)
        if np.ptp(channels[index]) == 0:
            raise InvalidInputError(
                f"{name} is constant ({channels[index][0]} {unit}): drop it or vary it"
            )
        nuisance.append(index)
    if x.size < 3 + len(nuisance):
        raise InvalidInputError(
            f"deflection: need at least {3 + len(nuisance)} samples, got {x.size}"
        )
    if np.ptp(x) == 0:
        raise InvalidInputError(f"deflection is constant ({x[0]} rad): the slope is undefined")
    sums = _terms(np.stack(channels, axis=1)[:, :, None]).sum(axis=0)[:, 0]
    fit = _fit_from_sums(sums, x.size, ratio, x.size, method, tuple(nuisance))
    return StiffnessFit(
        float(fit.slope), float(fit.intercept), float(fit.std), x.size, float(fit.excitation)
    )


def tls_fit(
    deflection: object,
    torque: object,
    noise_variance_ratio: float,
    deflection_rate: object | None = None,
    deflection_acceleration: object | None = None,
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
    deflection_acceleration : (n,) array, rad/s^2, optional
        Taken as a further error-free regressor (torque = K x + D v + M a + c) and partialled
        out, so that an inertia between the torque sensor and the spring does not enter the
        slope as K - M w^2.

    Returns
    -------
    StiffnessFit
        ``excitation`` is the standard deviation of the part of the deflection that the
        nuisance regressors do not explain.

    Notes
    -----
    Minimises sum((y - a - b*X)^2 + ratio*(x - X)^2) over the line and the latent X, which is
    total least squares after scaling the deflection by sqrt(ratio) (Golub and Van Loan, Matrix
    Computations, section on total least squares). Closed form (Fuller, Measurement Error
    Models, 1987, eq. 1.3.7):
    ``b = (m_yy - r m_xx + sqrt((m_yy - r m_xx)^2 + 4 r m_xy^2)) / (2 m_xy)``.
    """
    ratio = _check_ratio(noise_variance_ratio)
    extra = {"deflection_rate": deflection_rate, "deflection_acceleration": deflection_acceleration}
    return _fit_arrays(deflection, torque, extra, ratio, "tls")


def ols_fit(
    deflection: object,
    torque: object,
    deflection_rate: object | None = None,
    deflection_acceleration: object | None = None,
) -> StiffnessFit:
    """Ordinary least squares fit of torque against deflection (noise on torque only).

    Parameters
    ----------
    deflection : (n,) array, rad
    torque : (n,) array, N*m
    deflection_rate : (n,) array, rad/s, optional
    deflection_acceleration : (n,) array, rad/s^2, optional
        Further regressors, as for :func:`tls_fit`.

    Returns
    -------
    StiffnessFit
        With noise on the deflection too, its stiffness is attenuated by
        var(x) / (var(x) + var(noise)) (Fuller 1987, section 1.1).
    """
    extra = {"deflection_rate": deflection_rate, "deflection_acceleration": deflection_acceleration}
    return _fit_arrays(deflection, torque, extra, 1.0, "ols")


class SlidingStiffnessEstimator:
    """Online sliding-window joint impedance estimate per joint with constant cost per sample.

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
        Windows in which the deflection not explained by the rate and acceleration regressors
        has a standard deviation below this are not excited: NaN stiffness. A window whose
        slope comes out zero or negative is reported as not excited too.
    method : {"tls", "ols"}
    order : int
        Butterworth order of the band-pass edges.
    model_damping : bool
        Fit the deflection rate as a regressor (default), so that the hand's damping, in
        quadrature at the dither, cannot leak into K through the window ends.
    settle_s : float, s, optional
        Time after the first sample before any window counts as excited, for the band-pass to
        settle on the slow motion; default two periods of the band's lower edge (0 without band).
    link_inertia : float or (n_joints,) array, kg*m^2, optional
        Give it when ``torque`` is measured on the robot side of the link (a joint torque sensor
        between drive and link): the link's inertial torque I q'' is then added back to recover
        the hand's torque. None (default): ``torque`` is the hand's torque on the link.
    model_inertia : bool
        Fit the deflection acceleration as a regressor too (default): the second-order joint
        impedance torque = K x + D x' + M x'', whose M takes the inertia on the operator's side
        of the sensor (hand, forearm, handle) and any error of ``link_inertia``. False gives
        the two-regressor fit, whose slope is K - M w^2 at the dither.
    min_conditioning : float
        Least share of the deflection's variance not explained by the other regressors
        (1 / variance inflation factor) for a window to count as excited: a dither whose tones
        are too close makes deflection and acceleration collinear and K unidentifiable.
    confidence : float
        Level of the interval returned by :meth:`update_interval` and stored in the series.

    Notes
    -----
    Model and method: the second-order (stiffness, viscosity, inertia) joint impedance
    identified by least squares on torque and angle under a small external perturbation, as
    reviewed by Kearney and Hunter (1990, Critical Reviews in Biomedical Engineering, from
    memory) and used for the multi-joint arm by Perreault, Kirsch and Crago (2004, Experimental
    Brain Research, from memory). The regressor is the deflection ``x = -q`` and the
    regressand the interaction torque ``tau`` (torque of the hand on the link), both
    band-passed by the same causal filter; a hand modelled as
    ``tau = K (q_h - q) + D (q_h' - q') - M q''`` with slow ``q_h`` gives
    ``tau = K x + D x' + M x''`` in the band. Rate and acceleration come from central
    differences of the band-passed angle (acceleration amplitude error (w dt)^2 / 12, 2e-4 at
    8 Hz and 1 kHz) and are partialled out before the Deming slope is taken, so the
    collinearity of x and x'' (x'' = -w^2 x for a single tone) shows directly as the share of
    x left: the ``conditioning`` test. A dither of several tones spread over the band keeps it
    away from zero. With a torque sensor on the robot side of the link the measured torque is
    the hand torque minus I q'': ``link_inertia`` adds I q'' back; whatever it misses ends up
    in M, not in K. Bearing friction on that side is viscous and is partialled out with the
    rate. All channels refer to the sample before the newest, so the estimate lags the input
    by one sample. With a band-pass the filtered samples are correlated: the reported std uses
    ``n_eff = min(n, 2 * B_s * window_s)`` independent samples, B_s the filter's statistical
    bandwidth (:func:`~compliant_demo.band_pass.band_pass_measures`), for the
    slope and for the residual's degrees of freedom, and rescales the residual's power to the
    deflection's frequencies (angle noise through the impedance rises with frequency; see
    ``_colour``); the interval is Student's t with ``n_eff - p`` degrees of freedom (p the
    number of fitted parameters). Running sums are recomputed from
    the window buffer once per window length so that rounding does not accumulate.
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
        link_inertia: float | Sequence[float] | np.ndarray | None = None,
        model_inertia: bool = True,
        min_conditioning: float = 0.02,
        confidence: float = 0.95,
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
        if not (math.isfinite(min_conditioning) and 0 <= min_conditioning <= 1):
            raise InvalidInputError(
                f"min_conditioning must be between 0 and 1, got {min_conditioning!r}"
            )
        if not (math.isfinite(confidence) and 0 < confidence < 1):
            raise InvalidInputError(f"confidence must be between 0 and 1, got {confidence!r}")
        ratio = np.broadcast_to(np.asarray(noise_variance_ratio, dtype=float), (n_joints,))
        for value in ratio:
            _check_ratio(value)
        self.n_joints = int(n_joints)
        self.window = int(window)
        self.rate_hz = float(rate_hz)
        self.method = method
        self.min_excitation_rad = float(min_excitation_rad)
        self.min_conditioning = float(min_conditioning)
        self.confidence = float(confidence)
        self.noise_variance_ratio = ratio.copy()
        self.band_hz = band_hz
        self.model_damping = bool(model_damping)
        self.model_inertia = bool(model_inertia)
        self.nuisance = tuple(
            index for index, used in ((_V, model_damping), (_A, model_inertia)) if used
        )
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
            self._band = band_pass_measures(self._sos, rate_hz)
            bandwidth = self._band.statistical_bandwidth_hz
            self.n_effective = min(float(window), 2.0 * bandwidth * window_s)
        n_params = 2 + len(self.nuisance)
        self.interval_quantile = float(
            stats.t.ppf(0.5 + 0.5 * confidence, max(self.n_effective - n_params, 1.0))
        )
        self.reset()

    def reset(self) -> None:
        """Forget all samples, filter state and summaries (start of a new demonstration)."""
        self._buffer = np.zeros((self.window, _N_CHANNELS, self.n_joints))
        self._count = 0
        self._since_refresh = 0
        self._sums = np.zeros((_N_CHANNELS + len(_PAIRS), self.n_joints))
        self._history: np.ndarray | None = None
        self._zi: np.ndarray | None = None
        self._tally = np.zeros(3)  # settled windows, excited windows, sum of relative half-widths

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

    def summary_flags(self) -> dict[str, float]:
        """Demonstration flags that summarise the estimate since the last :meth:`reset`.

        Returns
        -------
        dict
            ``stiffness_latency_s`` (s, :attr:`latency_s`), ``stiffness_excited_fraction`` (share
            of settled windows, over all joints, with an estimate) and
            ``stiffness_rel_halfwidth_mean`` (mean half-width of the interval at
            :attr:`confidence` over the estimate, excited windows only; left out without any).
        """
        settled, excited, halfwidth = self._tally
        flags = {
            STIFFNESS_LATENCY_FLAG: self.latency_s,
            "stiffness_excited_fraction": excited / settled if settled else 0.0,
        }
        if excited:
            flags["stiffness_rel_halfwidth_mean"] = halfwidth / excited
        return flags

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
        """Regression channels (x, y, v, a) per sample, (n, 4, n_joints), one sample late.

        Each output refers to the sample before the newest one, so the deflection rate and
        acceleration come from central differences with no phase error of their own.
        """
        history = self._history if self._history is not None else np.repeat(filtered[:1], 2, 0)
        padded = np.concatenate([history, filtered])
        self._history = padded[-2:].copy()
        centre = padded[1:-1]
        x_next, x_prev = padded[2:, 0], padded[:-2, 0]
        rate = 0.5 * (x_next - x_prev) * self.rate_hz
        accel = (x_next - 2.0 * centre[:, 0] + x_prev) * self.rate_hz**2
        torque = centre[:, 1]
        if self.link_inertia is not None:
            # Hand torque = measured link-side torque + I q'' and q'' = -x'' in the band.
            torque = torque - self.link_inertia * accel
        return np.stack([centre[:, 0], torque, rate, accel], axis=1)

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
            NaN where not excited; the interval is ``stiffness +- interval_quantile * std``.
        excited : (n, n_joints) bool array
        """
        result = self._update(position, torque)
        return result["stiffness"], result["stiffness_std"], result["excited"]

    def _update(self, position: object, torque: object) -> dict[str, np.ndarray]:
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
            result = {name: empty.copy() for name in _SERIES_FIELDS}
            result["excited"] = empty.astype(bool)
            result["channels"] = np.empty((0, _N_CHANNELS, self.n_joints))
            return result
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
        seen = (self._count - n_new + np.arange(1, n_new + 1))[:, None]
        n_in = np.minimum(seen, window).astype(float)
        fit = _fit_from_sums(
            np.moveaxis(running, 1, 0),
            n_in,
            self.noise_variance_ratio,
            np.minimum(n_in, self.n_effective),
            self.method,
            self.nuisance,
            None if self._sos is None else (
                self._band, 0.0 if self.link_inertia is None else self.link_inertia),
        )
        settled = seen >= window + self.settle
        # A spring cannot have a non-positive stiffness: such a slope (a noisy window about a
        # soft hand) carries no estimate, like a window with too little excitation or one in
        # which the deflection is nearly collinear with the other regressors.
        excited = (
            settled
            & (fit.excitation >= self.min_excitation_rad)
            & (fit.conditioning >= self.min_conditioning)
            & np.isfinite(fit.slope)
            & (fit.slope > 0)
        )
        stiffness = np.where(excited, fit.slope, np.nan)
        std = np.where(excited, fit.std, np.nan)
        halfwidth = self.interval_quantile * std
        self._tally += np.array([
            np.count_nonzero(np.broadcast_to(settled, excited.shape)),
            np.count_nonzero(excited),
            np.sum(halfwidth[excited] / stiffness[excited]),
        ], dtype=float)
        zeros = np.zeros_like(stiffness)
        return {
            "stiffness": stiffness,
            "stiffness_std": std,
            "stiffness_low": stiffness - halfwidth,
            "stiffness_high": stiffness + halfwidth,
            "excited": excited,
            "excitation": fit.excitation,
            "conditioning": fit.conditioning,
            "damping": np.where(excited, fit.nuisance.get(_V, zeros), np.nan),
            "inertia": np.where(excited, fit.nuisance.get(_A, zeros), np.nan),
            "channels": channels,
        }


_SERIES_FIELDS = (
    "stiffness",
    "stiffness_std",
    "stiffness_low",
    "stiffness_high",
    "excitation",
    "conditioning",
    "damping",
    "inertia",
)


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
        ``link_inertia``, ``model_inertia``, ``min_conditioning``, ``confidence``.

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
    joined = {name: np.concatenate([part[name] for part in parts]) for name in parts[0]}
    channels = joined.pop("channels")
    return StiffnessSeries(
        t=times,
        deflection=channels[:, _X],
        torque=channels[:, _Y],
        deflection_rate=channels[:, _V],
        deflection_acceleration=channels[:, _A],
        **joined,
    )
