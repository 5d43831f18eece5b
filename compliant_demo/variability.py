"""Stiffness from the spread of aligned demonstrations: stiff where the operator varied least.

One law, from per-sample variance across demonstrations to a stiffness schedule, with levels
anchored at a stated reference spread and stiffness rather than stretched over the range, and
the variance it takes pooled over a neighbourhood of the phase, with the degrees of freedom
that pooling buys; the width of that neighbourhood is given or chosen from the demonstrations
themselves by leave-one-demonstration-out likelihood.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.stats import chi2

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "VARIABILITY_BANDWIDTH",
    "VARIABILITY_BANDWIDTH_CANDIDATES",
    "VARIABILITY_REFERENCE_STD",
    "PooledVariance",
    "pooled_variance",
    "select_bandwidth",
    "stiffness_from_variability",
]

VARIABILITY_BANDWIDTH = 0.03
"""Default std of the Gaussian pooling kernel of :func:`pooled_variance`, fraction of the phase.

Our own choice: a third of the shortest stiffness change worth resolving (about a tenth of a
movement), so a change keeps most of its height while each level pools over a few times more
independent deviation than one sample gives.
"""

VARIABILITY_BANDWIDTH_CANDIDATES = (0.01, 0.02, 0.03, 0.05, 0.08)
"""Bandwidths :func:`select_bandwidth` chooses from, fraction of the phase (about x1.5 apart).

Our own choice: from a tenth of the shortest stiffness change worth resolving (about a tenth of
a movement) to a little less than that change, so no choice merges such a change into its
surroundings. With wider candidates (0.12, 0.18) the criterion took them for 3 or 4
demonstrations of the simulated teacher and flattened the press into the approach.
"""

# Most phase samples the bandwidth selection looks at: the deviations are smooth on this scale
# and the criterion only compares bandwidths of at least 0.01 of the phase.
_SELECTION_SAMPLES = 1000

VARIABILITY_REFERENCE_STD = 0.02
"""Default spread, rad, at which :func:`stiffness_from_variability` gives its reference stiffness.

Our own choice: about the spread of a relaxed operator's repeated guiding motions on a bench arm.
"""


@dataclass(frozen=True)
class PooledVariance:
    """Variance across demonstrations pooled along the phase, with its degrees of freedom.

    Attributes
    ----------
    variance : (n_samples, n_joints) array, rad^2
        Kernel-weighted mean of the per-sample variances (ddof=1).
    degrees_of_freedom : (n_joints,) array
        Effective degrees of freedom of ``variance`` away from the ends (Satterthwaite), at
        least ``n_demos - 1``.
    correlation_length : (n_joints,) array, fraction of the phase
        Lag at which the deviations' estimated correlation along the phase first drops below
        1/e (a description of how much independent deviation the kernel pools).
    """

    variance: np.ndarray
    degrees_of_freedom: np.ndarray
    correlation_length: np.ndarray


def pooled_variance(positions: object, bandwidth: float = VARIABILITY_BANDWIDTH) -> PooledVariance:
    """Variance across aligned demonstrations, pooled over a neighbourhood of the phase.

    Parameters
    ----------
    positions : (n_demos, n_samples, n_joints) array, rad
        Aligned demonstrations on one uniform phase grid (at least 2 demonstrations).
    bandwidth : float, fraction of the phase
        Std of the Gaussian kernel (default :data:`VARIABILITY_BANDWIDTH`); 0 gives the
        per-sample variance with ``n_demos - 1`` degrees of freedom.

    Returns
    -------
    PooledVariance

    Notes
    -----
    ``V(t) = sum_k w(t, t_k) s^2(t_k)`` with Gaussian weights normalised over the samples inside
    the phase (Nadaraya-Watson, so the ends pool one-sided). For normal deviations with a
    locally constant spread, ``cov(s_k^2, s_l^2) = 2 sigma^4 rho_kl^2 / (n - 1)``, so
    Satterthwaite's approximation (Biometrics Bulletin 2(6), 110-114, 1946) gives
    ``nu = 2 E[V]^2 / var V = (n - 1) / sum_lag rho(lag)^2 (w * w)(lag)``, ``w * w`` the
    kernel's autocorrelation (a Gaussian of std sqrt(2) * bandwidth). ``rho(lag)`` is the
    correlation along the phase of the deviations from the aligned mean, each scaled by its
    sample's spread, averaged over demonstrations and phase. Deviations that are correlated
    over the whole kernel add no degrees of freedom; independent ones add about
    ``1 / (2 sqrt(pi) bandwidth)`` per sample interval covered. Kernel smoothing of a
    variance function along the index is common practice (e.g. Fan and Yao, Biometrika
    85(3), 645-660, 1998, from memory).
    """
    x = _aligned_positions(positions)
    if not (math.isfinite(bandwidth) and 0 <= bandwidth <= 1):
        raise InvalidInputError(f"bandwidth must lie in [0, 1], got {bandwidth!r}")
    n_demos, n_samples, n_joints = x.shape
    deviation = x - x.mean(axis=0)
    variance = (deviation**2).sum(axis=0) / (n_demos - 1)
    base_dof = float(n_demos - 1)
    sigma = bandwidth * (n_samples - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        scaled = np.where(variance > 0, deviation / np.sqrt(variance), 0.0)
    rho = _phase_correlation(scaled)
    below = rho < math.exp(-1.0)
    first = np.where(below.any(axis=0), below.argmax(axis=0), n_samples - 1)
    length = first / (n_samples - 1)
    if sigma < 0.5:
        return PooledVariance(variance, np.full(n_joints, base_dof), length)
    pooled = _kernel_mean(variance, sigma)
    lags = np.arange(-(n_samples - 1), n_samples)
    kernel = np.exp(-0.25 * (lags / sigma) ** 2)
    kernel /= kernel.sum()
    rho_sq = np.concatenate([rho[:0:-1], rho]) ** 2
    dof = base_dof / np.maximum(kernel @ rho_sq, 1.0 / n_samples)
    return PooledVariance(pooled, np.maximum(dof, base_dof), length)


def _aligned_positions(positions: object) -> np.ndarray:
    """``positions`` as an (n_demos >= 2, n_samples >= 2, n_joints) float array, all finite."""
    x = np.asarray(positions, dtype=float)
    if x.ndim != 3 or x.shape[0] < 2 or x.shape[1] < 2:
        raise InvalidInputError(
            "positions must be an (n_demos, n_samples, n_joints) array with at least 2 "
            f"demonstrations and 2 samples, got shape {x.shape}"
        )
    if not np.isfinite(x).all():
        index = tuple(int(i) for i in np.argwhere(~np.isfinite(x))[0])
        raise InvalidInputError(f"positions{list(index)} = {x[index]} is not finite")
    return x


def _kernel_mean(values: np.ndarray, sigma: float) -> np.ndarray:
    """Nadaraya-Watson mean of (n_samples, ...) values along axis 0, Gaussian std sigma samples."""
    if sigma < 0.5:
        return values
    n_samples = values.shape[0]
    pooled = gaussian_filter1d(values, sigma, axis=0, mode="constant", cval=0.0)
    weight = gaussian_filter1d(np.ones(n_samples), sigma, mode="constant", cval=0.0)
    return pooled / weight.reshape((n_samples,) + (1,) * (values.ndim - 1))


def select_bandwidth(
    positions: object, candidates: tuple[float, ...] = VARIABILITY_BANDWIDTH_CANDIDATES
) -> float:
    """Pooling bandwidth that best predicts each demonstration from the others.

    Parameters
    ----------
    positions : (n_demos, n_samples, n_joints) array, rad
        Aligned demonstrations on one uniform phase grid (at least 2 demonstrations).
    candidates : tuple of float, fraction of the phase
        Bandwidths to choose from, each in (0, 1] (default
        :data:`VARIABILITY_BANDWIDTH_CANDIDATES`).

    Returns
    -------
    float, fraction of the phase
        The candidate with the highest leave-one-demonstration-out log-likelihood;
        :data:`VARIABILITY_BANDWIDTH` for 2 demonstrations (leaving one out leaves no spread)
        or demonstrations that do not differ at all.

    Notes
    -----
    Likelihood cross-validation (Stone, JRSS B 36(2), 111-147, 1974; Silverman, Density
    Estimation for Statistics and Data Analysis, 1986, Section 3.4.4; both from memory): for
    each demonstration ``i`` and bandwidth ``h``, the others give the mean ``m_-i`` and the
    pooled variance ``V_-i(h)``; demonstration ``i``'s deviation ``x_i - m_-i`` has variance
    ``sigma^2 (1 + 1 / (n - 1))`` and is scored by its normal log-density under
    ``V_-i(h) (1 + 1 / (n - 1))``, averaged over samples and joints and summed over ``i``.
    A narrow kernel leaves ``V`` noisy (a log-density punishes a variance that is too small
    more than one too large), a wide one blurs where the spread changes; the criterion
    weighs both on the demonstrations at hand. One bandwidth serves all joints (their
    criteria are summed). The deviations are scored on at most 1,000 evenly spaced phase
    samples.
    """
    x = _aligned_positions(positions)
    if len(candidates) == 0 or not all(math.isfinite(h) and 0 < h <= 1 for h in candidates):
        raise InvalidInputError(f"candidates must be bandwidths in (0, 1], got {candidates!r}")
    n_demos = x.shape[0]
    step = max(1, -(-x.shape[1] // _SELECTION_SAMPLES))
    x = x[:, ::step]
    total = x.var(axis=0).mean()
    if n_demos < 3 or not total > 0:
        return VARIABILITY_BANDWIDTH
    inflation = 1.0 + 1.0 / (n_demos - 1)
    scores = np.zeros(len(candidates))
    for i in range(n_demos):
        others = np.delete(x, i, axis=0)
        deviation_sq = (x[i] - others.mean(axis=0)) ** 2
        variance = others.var(axis=0, ddof=1)
        for k, bandwidth in enumerate(candidates):
            pooled = _kernel_mean(variance, bandwidth * (x.shape[1] - 1))
            # A floor far below any spread that matters keeps identical stretches finite.
            v = inflation * np.maximum(pooled, 1e-12 * total)
            scores[k] += float(np.mean(-0.5 * np.log(v) - 0.5 * deviation_sq / v))
    return float(candidates[int(np.argmax(scores))])


def _phase_correlation(scaled: np.ndarray) -> np.ndarray:
    """(n_samples, n_joints) correlation of scaled deviations at lags 0, 1, ... (FFT)."""
    n_samples = scaled.shape[1]
    size = 1 << int(2 * n_samples - 1).bit_length()
    spectrum = np.fft.rfft(scaled, n=size, axis=1)
    products = np.fft.irfft(spectrum * spectrum.conj(), n=size, axis=1)[:, :n_samples]
    overlap = (n_samples - np.arange(n_samples))[:, None]
    mean_product = products.sum(axis=0) / overlap
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.where(mean_product[:1] > 0, mean_product / mean_product[:1], 0.0)
    return np.clip(rho, -1.0, 1.0)


def stiffness_from_variability(
    variance: object,
    k_min: float | np.ndarray,
    k_max: float | np.ndarray,
    *,
    n_demos: int,
    reference_std: float = VARIABILITY_REFERENCE_STD,
    reference_stiffness: float | np.ndarray | None = None,
    exponent: float = 1.0,
    variance_floor: float | None = None,
    degrees_of_freedom: float | np.ndarray | None = None,
) -> np.ndarray:
    """Stiffness schedule from the spread of aligned demonstrations: stiff where they agree.

    Parameters
    ----------
    variance : (n_samples, n_joints) array, rad^2
        Sample variance (ddof=1) across aligned demonstrations, per sample
        (``AlignedSet.variance``) or pooled along the phase (:func:`pooled_variance`).
    k_min, k_max : float or (n_joints,) array, N*m/rad
        Target joint's stiffness range; the schedule is clipped to it.
    n_demos : int
        Number of demonstrations the variance came from; at least 2.
    reference_std : float, rad
        Spread at which the schedule equals ``reference_stiffness``
        (default :data:`VARIABILITY_REFERENCE_STD`).
    reference_stiffness : float or (n_joints,) array, N*m/rad, optional
        Stiffness at ``reference_std``; default ``k_min`` (a joint whose demonstrations vary by
        the reference spread is held as softly as the mechanism allows).
    exponent : float
        ``p`` of the law below; 1 is the inverse-variance law.
    variance_floor : float, rad^2, optional
        Lower bound on the variance before inversion; default none (a zero variance gives
        ``k_max`` through the clipping).
    degrees_of_freedom : float or (n_joints,) array, optional
        Degrees of freedom of ``variance``; default ``n_demos - 1`` (per-sample variance).
        Give ``PooledVariance.degrees_of_freedom`` for a pooled variance.

    Returns
    -------
    (n_samples, n_joints) array, N*m/rad
        ``clip(K_ref * (c * reference_std^2 / variance)^p, k_min, k_max)`` per joint, with
        ``c = m(nu) / nu``, ``m(nu)`` the median of the chi-square distribution with nu
        degrees of freedom (0.455 for nu = 1, ln 2 for nu = 2, 0.907 for nu = 7, towards 1).

    Notes
    -----
    Anchored levels instead of stretching the precision over the whole range: twice the spread
    gives a quarter of the stiffness (p = 1) wherever it occurs, so a profile learned from
    other demonstrations of the same task lands at the same level. The law is our own choice,
    after the inverse-variance weighting of Calinon, Sardellitti and Caldwell (IROS 2010) and
    the minimum-intervention principle of optimal feedback control (Todorov and Jordan, Nature
    Neuroscience 5(11), 1226-1235, 2002): an operator corrects deviations, so varies least,
    where the task needs stiffness.

    ``c`` makes the schedule median-unbiased: half of the schedules learned from independent
    sets of demonstrations lie above the law's stiffness at the true spread, half below, for
    any number of demonstrations and any ``p``. For normal deviations ``nu s^2 / sigma^2`` is
    chi-square with nu degrees of freedom (nu = n - 1 for a per-sample variance: Casella and
    Berger, Statistical Inference, 2nd ed., Theorem 5.3.1; approximately, with Satterthwaite's
    nu, for a pooled one), so ``P(c / s^2 <= 1 / sigma^2) = P(chi^2_nu <= m(nu)) = 1/2``; the
    schedule and its clipping are increasing functions of ``c / s^2``, and a median passes
    through increasing functions (median-unbiased estimation: Brown, Annals of Mathematical
    Statistics 18(4), 582-585, 1947, from memory). The same ``c / s^2`` is the posterior
    median of the precision under the usual non-informative prior ``p(mu, sigma^2) ~
    1 / sigma^2``, whose posterior of ``sigma^2`` is scaled-inverse-chi-square(nu, s^2)
    (Gelman et al., Bayesian Data Analysis, 3rd ed., Section 3.2, from memory). The
    mean-unbiased ``(nu - 2) / nu`` used before has no value at nu <= 2 and vanishes as nu
    falls to 2 (three demonstrations put the whole schedule at ``k_min``); ``m(nu) / nu`` is
    smooth and positive for every nu > 0.
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
    reference = low if reference_stiffness is None else np.broadcast_to(
        np.asarray(reference_stiffness, dtype=float), (var.shape[1],)
    )
    if not (np.isfinite(reference).all() and (reference > 0).all()):
        raise InvalidInputError(
            f"reference_stiffness must be positive and finite, got {reference_stiffness!r}"
        )
    for name, value in (("reference_std", reference_std), ("exponent", exponent)):
        if not (math.isfinite(value) and value > 0):
            raise InvalidInputError(f"{name} must be positive and finite, got {value!r}")
    if variance_floor is not None:
        if not (math.isfinite(variance_floor) and variance_floor > 0):
            raise InvalidInputError(f"variance_floor must be positive, got {variance_floor!r}")
        var = np.maximum(var, variance_floor)
    dof = np.broadcast_to(
        np.asarray(n_demos - 1 if degrees_of_freedom is None else degrees_of_freedom,
                   dtype=float), (var.shape[1],))
    if not (np.isfinite(dof).all() and (dof > 0).all()):
        raise InvalidInputError(
            f"degrees_of_freedom must be positive and finite, got {degrees_of_freedom!r}"
        )
    median_factor = chi2.median(dof) / dof
    with np.errstate(divide="ignore"):
        ratio = median_factor * reference_std**2 / var
    return np.clip(reference * ratio**exponent, low, high)
