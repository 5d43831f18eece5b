"""Stiffness from the spread of aligned demonstrations: stiff where the operator varied least.

One law, from per-sample variance across demonstrations to a stiffness schedule, with levels
anchored at a stated reference spread and stiffness rather than stretched over the range, and
two estimates of the variance it takes, each with the degrees of freedom it buys: pooled over a
Gaussian neighbourhood of the phase, or held piecewise constant over stretches of the phase with
equal levels fused (an operator holds a few stiffness levels: soft approach, stiff press). The
kernel's width, or the penalties of the stretches and levels, are given or chosen from the
demonstrations themselves by leave-one-demonstration-out likelihood.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.stats import chi2

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "VARIABILITY_BANDWIDTH",
    "VARIABILITY_BANDWIDTH_CANDIDATES",
    "VARIABILITY_CHANGE_PENALTIES",
    "VARIABILITY_LEVEL_PENALTIES",
    "VARIABILITY_MIN_STRETCH",
    "VARIABILITY_REFERENCE_STD",
    "HeldLevels",
    "choose_variability_model",
    "PooledVariance",
    "held_level_variance",
    "pooled_variance",
    "select_bandwidth",
    "select_level_penalties",
    "select_variability_model",
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

VARIABILITY_CHANGE_PENALTIES = (0.01, 0.02, 0.04)
"""Penalties per stretch that :func:`select_level_penalties` chooses from.

Our own choice, in the criterion's units (negative log-likelihood per degree of freedom and per
unit of phase): splitting a stretch of 0.4 of the phase into two halves whose variances differ
by a factor ``r`` gains ``0.2 (2 ln((1 + r) / 2) - ln r)``, so the largest keeps a change of
about 2.5 between such halves, the smallest one of about 1.6. Larger penalties would merge a
stiffness change of more than twice over a fifth of the movement into its surroundings.
"""

VARIABILITY_LEVEL_PENALTIES = (0.0, 0.02, 0.04, 0.08)
"""Penalties per distinct level :func:`select_level_penalties` chooses from (same units).

Our own choice: 0 keeps every stretch at its own level; 0.08 fuses two stretches of a fifth of
the phase each whose variances differ by up to about 3.7, a ratio that two variances with 5
degrees of freedom each do not establish (the 95 % point of F(5, 5) is 5.05; the simulated
teacher's 8 demonstrations hold about 5-7 effective degrees of freedom per fifth of the
movement, as their deviations stay correlated over about a quarter of it).
"""

VARIABILITY_MIN_STRETCH = 0.02
"""Shortest stretch of :func:`held_level_variance`, fraction of the phase.

Our own choice: a fifth of the shortest stiffness change worth resolving (about a tenth of a
movement), as the narrowest pooling bandwidth is a tenth of it.
"""

# Penalties (per stretch, per level) used where leaving one demonstration out leaves too little
# to choose by: the middle candidates.
_DEFAULT_PENALTIES = (0.02, 0.04)

# Most blocks (equal runs of phase samples) the stretches are built from: 200 gives a
# resolution of 0.005 of the phase, a quarter of the shortest stretch.
_LEVEL_BLOCKS = 200

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
    rho = _deviation_correlation(deviation, variance)
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
    sampled = _selection_samples(x)
    if sampled is None:
        return VARIABILITY_BANDWIDTH
    return float(candidates[int(np.argmax(_bandwidth_scores(sampled, candidates)))])


def _selection_samples(x: np.ndarray) -> np.ndarray | None:
    """At most about ``_SELECTION_SAMPLES`` evenly spaced phase samples of ``x``, or None where
    leaving one demonstration out leaves no spread to choose by (2 demonstrations, or
    demonstrations that do not differ)."""
    x = x[:, :: max(1, -(-x.shape[1] // _SELECTION_SAMPLES))]
    return None if x.shape[0] < 3 or not x.var(axis=0).mean() > 0 else x


def _bandwidth_scores(x: np.ndarray, candidates: tuple[float, ...]) -> np.ndarray:
    """Held-out log-likelihood of each kernel bandwidth (fraction of the phase)."""
    sigmas = [bandwidth * (x.shape[1] - 1) for bandwidth in candidates]
    return _held_out_scores(x, lambda variance: [_kernel_mean(variance, s) for s in sigmas])


def _held_out_scores(
    x: np.ndarray, estimates: Callable[[np.ndarray], list[np.ndarray]]
) -> np.ndarray:
    """Leave-one-demonstration-out log-likelihood of each variance estimate, summed over demos.

    ``estimates`` maps the others' per-sample variance (n_samples, n_joints) to one estimate
    of the variance per candidate; demonstration ``i``'s deviation from the others' mean is
    scored by its normal log-density under ``estimate * (1 + 1 / (n - 1))``, averaged over
    samples and joints.
    """
    n_demos = x.shape[0]
    total = x.var(axis=0).mean()
    inflation = 1.0 + 1.0 / (n_demos - 1)
    scores: np.ndarray | None = None
    for i in range(n_demos):
        others = np.delete(x, i, axis=0)
        deviation_sq = (x[i] - others.mean(axis=0)) ** 2
        # A floor far below any spread that matters keeps identical stretches finite.
        fold = np.array([
            float(np.mean(-0.5 * np.log(v) - 0.5 * deviation_sq / v))
            for v in (inflation * np.maximum(e, 1e-12 * total)
                      for e in estimates(others.var(axis=0, ddof=1)))
        ])
        scores = fold if scores is None else scores + fold
    assert scores is not None
    return scores


@dataclass(frozen=True)
class HeldLevels:
    """Variance across demonstrations held constant over stretches of the phase.

    Attributes
    ----------
    variance : (n_samples, n_joints) array, rad^2
        Each sample's level: the mean per-sample variance (ddof=1) over all the stretches
        that share it.
    degrees_of_freedom : (n_samples, n_joints) array
        Satterthwaite's effective degrees of freedom of each sample's level, at least
        ``n_demos - 1``.
    change_penalty, level_penalty : float
        Penalties per stretch and per level the levels were found with.
    n_stretches, n_levels : tuple of int, one per joint
        Stretches of the phase and distinct levels among them.
    """

    variance: np.ndarray
    degrees_of_freedom: np.ndarray
    change_penalty: float
    level_penalty: float
    n_stretches: tuple[int, ...]
    n_levels: tuple[int, ...]


def held_level_variance(
    positions: object,
    change_penalty: float = _DEFAULT_PENALTIES[0],
    level_penalty: float = _DEFAULT_PENALTIES[1],
) -> HeldLevels:
    """Variance across aligned demonstrations, held constant where the data show no change.

    Parameters
    ----------
    positions : (n_demos, n_samples, n_joints) array, rad
        Aligned demonstrations on one uniform phase grid (at least 2 demonstrations).
    change_penalty : float
        Penalty per stretch (default 0.02, see :data:`VARIABILITY_CHANGE_PENALTIES` for its
        units), at least 0.
    level_penalty : float
        Penalty per distinct level (default 0.04, see :data:`VARIABILITY_LEVEL_PENALTIES`),
        at least 0; 0 keeps each stretch at its own level.

    Returns
    -------
    HeldLevels

    Notes
    -----
    Per joint, with ``s^2(t)`` the per-sample variance and ``w`` a stretch's share of the
    phase, the Gaussian negative log-likelihood of the deviations under a variance held at
    ``v`` over a stretch is, per degree of freedom and per unit of phase, ``w (ln v + s^2 /
    v)`` up to a constant, least at the stretch's mean ``v = mean s^2``, where it is ``w ln v +
    w``. First the stretches: the exact minimiser of ``sum w ln v + change_penalty *
    (stretches)`` over partitions of the phase into stretches of at least
    :data:`VARIABILITY_MIN_STRETCH`, by optimal partitioning on at most 200 blocks of equal
    length (Jackson et al., IEEE Signal Processing Letters 12(2), 105-108, 2005; the exact
    search that PELT prunes, Killick, Fearnhead and Eckley, JASA 107(500), 1590-1598, 2012;
    both from memory). Then the levels: the two groups of stretches whose union raises ``sum W
    ln v`` least (any two, not only neighbours: a soft approach and a soft retreat may be one
    hold) are merged while that rise stays below ``level_penalty`` (agglomerative merging,
    common practice). Total variation penalised likelihood of the log-variance (Tibshirani et
    al., JRSS B 67(1), 91-108, 2005) leads to the same piecewise-constant kind of estimate.
    Within a level the estimate carries no noise, so a stiffness profile from it does not
    rank phases the data cannot tell apart. A level's degrees of freedom follow from
    Satterthwaite's approximation with the deviations' correlation ``rho`` along the phase
    (as in :func:`pooled_variance`): ``nu = (n - 1) m^2 / sum_{k, l in level} rho(k - l)^2``
    over its ``m`` samples.
    """
    x = _aligned_positions(positions)
    for name, value in (("change_penalty", change_penalty), ("level_penalty", level_penalty)):
        if not (math.isfinite(value) and value >= 0):
            raise InvalidInputError(f"{name} must be finite and at least 0, got {value!r}")
    n_demos, n_samples, n_joints = x.shape
    deviation = x - x.mean(axis=0)
    sample_variance = (deviation**2).sum(axis=0) / (n_demos - 1)
    rho_sq = _deviation_correlation(deviation, sample_variance) ** 2
    edges = _block_edges(n_samples)
    variance = np.empty_like(sample_variance)
    dof = np.empty_like(sample_variance)
    stretches, levels = [], []
    for joint in range(n_joints):
        column = sample_variance[:, joint]
        found = _fuse(column, edges, _stretches(column, edges, change_penalty), level_penalty)
        stretches.append(sum(len(group) for group in found))
        levels.append(len(found))
        variance[:, joint] = _level_values(column, edges, found)
        for group in found:
            inside = np.zeros(n_samples, dtype=bool)
            for start, stop in group:
                inside[edges[start]:edges[stop]] = True
            dof[inside, joint] = _level_dof(inside, rho_sq[:, joint], n_demos)
    return HeldLevels(variance, dof, float(change_penalty), float(level_penalty),
                      tuple(stretches), tuple(levels))


def select_level_penalties(
    positions: object,
    change_penalties: tuple[float, ...] = VARIABILITY_CHANGE_PENALTIES,
    level_penalties: tuple[float, ...] = VARIABILITY_LEVEL_PENALTIES,
) -> tuple[float, float]:
    """Penalties of :func:`held_level_variance` that best predict each demonstration.

    Parameters
    ----------
    positions : (n_demos, n_samples, n_joints) array, rad
        Aligned demonstrations on one uniform phase grid (at least 2 demonstrations).
    change_penalties, level_penalties : tuple of float
        Candidates per stretch and per level, each finite and at least 0 (defaults
        :data:`VARIABILITY_CHANGE_PENALTIES` and :data:`VARIABILITY_LEVEL_PENALTIES`).

    Returns
    -------
    (change_penalty, level_penalty)
        The pair with the highest leave-one-demonstration-out log-likelihood (the criterion
        of :func:`select_bandwidth`, each demonstration scored under the others' held
        levels); (0.02, 0.04) for 2 demonstrations or demonstrations that do not differ.
    """
    x = _aligned_positions(positions)
    for name, values in (("change_penalties", change_penalties),
                         ("level_penalties", level_penalties)):
        if len(values) == 0 or not all(math.isfinite(v) and v >= 0 for v in values):
            raise InvalidInputError(
                f"{name} must be penalties, finite and at least 0, got {values!r}")
    sampled = _selection_samples(x)
    if sampled is None:
        return _DEFAULT_PENALTIES
    pairs, scores = _level_scores(sampled, change_penalties, level_penalties)
    return pairs[int(np.argmax(scores))]


def select_variability_model(positions: object) -> Literal["levels", "kernel"]:
    """The variance model along the phase that best predicts each demonstration.

    Parameters
    ----------
    positions : (n_demos, n_samples, n_joints) array, rad
        Aligned demonstrations on one uniform phase grid (at least 2 demonstrations).

    Returns
    -------
    "levels" or "kernel"
        "levels" (:func:`held_level_variance`) where its best penalties score a higher
        leave-one-demonstration-out log-likelihood than the kernel's best bandwidth
        (:func:`pooled_variance`), both over their default candidates and on the one
        criterion of :func:`select_bandwidth`; "kernel" for 2 demonstrations or
        demonstrations that do not differ.

    Notes
    -----
    A held-out likelihood compares models of any kind on the same footing (Stone, JRSS B
    36(2), 111-147, 1974, from memory): a teacher who holds a few stiffness levels is better
    predicted by held levels, one whose stiffness drifts smoothly by the kernel.
    """
    return choose_variability_model(positions)[0]


def choose_variability_model(
    positions: object,
) -> tuple[Literal["levels", "kernel"], tuple[float, ...]]:
    """:func:`select_variability_model` (same ``positions``) with the winner's parameters from
    the same scores.

    Returns
    -------
    ("kernel", (bandwidth,)) or ("levels", (change_penalty, level_penalty))
        What :func:`select_bandwidth` or :func:`select_level_penalties` would choose over
        their default candidates, without scoring the candidates a second time.
    """
    x = _selection_samples(_aligned_positions(positions))
    if x is None:
        return "kernel", (VARIABILITY_BANDWIDTH,)
    kernel = _bandwidth_scores(x, VARIABILITY_BANDWIDTH_CANDIDATES)
    pairs, levels = _level_scores(x, VARIABILITY_CHANGE_PENALTIES, VARIABILITY_LEVEL_PENALTIES)
    if levels.max() > kernel.max():
        return "levels", pairs[int(np.argmax(levels))]
    return "kernel", (float(VARIABILITY_BANDWIDTH_CANDIDATES[int(np.argmax(kernel))]),)


def _level_scores(
    x: np.ndarray, change_penalties: tuple[float, ...], level_penalties: tuple[float, ...]
) -> tuple[list[tuple[float, float]], np.ndarray]:
    """Held-out log-likelihood of each (change, level) penalty pair of the held levels."""
    pairs = [(c, g) for c in change_penalties for g in level_penalties]
    edges = _block_edges(x.shape[1])

    def estimates(variance: np.ndarray) -> list[np.ndarray]:
        held = np.empty((len(pairs),) + variance.shape)
        for joint in range(variance.shape[1]):
            column = variance[:, joint]
            for c in change_penalties:
                cuts = _stretches(column, edges, c)
                for k, (change, level) in enumerate(pairs):
                    if change == c:
                        held[k, :, joint] = _level_values(column, edges, _fuse(
                            column, edges, cuts, level))
        return list(held)

    return pairs, _held_out_scores(x, estimates)


def _block_edges(n_samples: int) -> np.ndarray:
    """Sample indices bounding at most ``_LEVEL_BLOCKS`` blocks of (nearly) equal length."""
    return np.unique(np.linspace(0, n_samples, min(_LEVEL_BLOCKS, n_samples) + 1).round()
                     ).astype(int)


def _block_sums(values: np.ndarray, edges: np.ndarray) -> tuple[np.ndarray, float]:
    """Sums of ``values`` up to each block edge, and the floor that keeps a mean's log finite."""
    sums = np.concatenate([[0.0], np.cumsum(values)])[edges]
    return sums, 1e-12 * max(float(values.mean()), 1e-300)


def _stretches(values: np.ndarray, edges: np.ndarray, penalty: float) -> list[tuple[int, int]]:
    """Optimal partition of the blocks (start, stop) minimising ``sum w ln v + penalty``."""
    n_blocks = edges.size - 1
    sums, floor = _block_sums(values, edges)
    counts = edges.astype(float)
    shortest = min(n_blocks, max(1, math.ceil(VARIABILITY_MIN_STRETCH * n_blocks)))
    best = np.full(n_blocks + 1, np.inf)
    best[0] = 0.0
    start = np.zeros(n_blocks + 1, dtype=int)
    for stop in range(shortest, n_blocks + 1):
        first = np.arange(0, stop - shortest + 1)
        first = first[np.isfinite(best[first])]
        length = counts[stop] - counts[first]
        mean = np.maximum((sums[stop] - sums[first]) / length, floor)
        cost = best[first] + length / counts[-1] * np.log(mean) + penalty
        pick = int(np.argmin(cost))
        best[stop], start[stop] = cost[pick], first[pick]
    if not np.isfinite(best[n_blocks]):
        return [(0, n_blocks)]
    cuts, stop = [], n_blocks
    while stop > 0:
        cuts.append((int(start[stop]), stop))
        stop = int(start[stop])
    return cuts[::-1]


def _fuse(values: np.ndarray, edges: np.ndarray, stretches: list[tuple[int, int]],
          penalty: float) -> list[list[tuple[int, int]]]:
    """Groups of stretches sharing a level: merge the cheapest pair while its cost < penalty."""
    sums, floor = _block_sums(values, edges)
    groups = [[stretch] for stretch in stretches]
    totals = [(sums[b] - sums[a], float(edges[b] - edges[a])) for a, b in stretches]

    def cost(total: tuple[float, float]) -> float:
        return total[1] * math.log(max(total[0] / total[1], floor))

    while len(groups) > 1:
        rises = [(cost((totals[i][0] + totals[j][0], totals[i][1] + totals[j][1]))
                  - cost(totals[i]) - cost(totals[j]), i, j)
                 for i in range(len(groups)) for j in range(i + 1, len(groups))]
        rise, i, j = min(rises)
        if not rise / edges[-1] < penalty:
            break
        groups[i] += groups.pop(j)
        merged = totals.pop(j)
        totals[i] = (totals[i][0] + merged[0], totals[i][1] + merged[1])
    return groups


def _level_values(values: np.ndarray, edges: np.ndarray,
                  groups: list[list[tuple[int, int]]]) -> np.ndarray:
    """Per-sample level: each group's mean of ``values`` over its samples."""
    out = np.empty_like(values)
    for group in groups:
        parts = [slice(edges[a], edges[b]) for a, b in group]
        level = sum(values[p].sum() for p in parts) / sum(p.stop - p.start for p in parts)
        for part in parts:
            out[part] = level
    return out


def _level_dof(inside: np.ndarray, rho_sq: np.ndarray, n_demos: int) -> float:
    """Satterthwaite's nu of the mean per-sample variance over the samples ``inside``."""
    n = inside.size
    size = 1 << int(2 * n - 1).bit_length()
    spectrum = np.fft.rfft(inside.astype(float), n=size)
    overlap = np.fft.irfft(spectrum * spectrum.conj(), n=size)[:n]
    weight = overlap[0] + 2.0 * float(overlap[1:] @ rho_sq[1:])
    nu = (n_demos - 1) * overlap[0] ** 2 / max(weight, overlap[0])
    return float(max(nu, n_demos - 1))


def _deviation_correlation(deviation: np.ndarray, variance: np.ndarray) -> np.ndarray:
    """(n_samples, n_joints) correlation along the phase, lags 0, 1, ..., of the deviations
    (n_demos, n_samples, n_joints) from the aligned mean, each scaled by its sample's spread."""
    with np.errstate(invalid="ignore", divide="ignore"):
        scaled = np.where(variance > 0, deviation / np.sqrt(variance), 0.0)
    return _phase_correlation(scaled)


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
        (``AlignedSet.variance``), pooled along the phase (:func:`pooled_variance`) or held
        in levels (:func:`held_level_variance`).
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
    degrees_of_freedom : float, (n_joints,) or (n_samples, n_joints) array, optional
        Degrees of freedom of ``variance``; default ``n_demos - 1`` (per-sample variance).
        Give ``PooledVariance.degrees_of_freedom`` for a pooled variance or
        ``HeldLevels.degrees_of_freedom`` for held levels.

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
    dof = np.asarray(n_demos - 1 if degrees_of_freedom is None else degrees_of_freedom,
                     dtype=float)
    try:
        dof = np.broadcast_to(dof, var.shape)
    except ValueError:
        raise InvalidInputError(f"degrees_of_freedom: shape {dof.shape} does not fit the "
                                f"variance's shape {var.shape}") from None
    if not (np.isfinite(dof).all() and (dof > 0).all()):
        raise InvalidInputError(
            f"degrees_of_freedom must be positive and finite, got {degrees_of_freedom!r}"
        )
    # a few distinct values (one per joint, or per held level) behind many samples
    distinct, index = np.unique(dof, return_inverse=True)
    median_factor = (chi2.median(distinct) / distinct)[index.reshape(dof.shape)]
    with np.errstate(divide="ignore"):
        ratio = median_factor * reference_std**2 / var
    return np.clip(reference * ratio**exponent, low, high)
