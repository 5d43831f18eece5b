"""How closely a replay follows the demonstrations it was learned from.

:func:`demonstration_band` aligns the demonstrations with DTW (:mod:`compliant_demo.alignment`),
and forms their aligned mean and spread per joint; the spread, a number of standard deviations
wide and never narrower than a stated floor, is the tolerance band. :func:`tracking_metrics`
measures a replay against the mean: the share of time outside the band and the worst excess,
normalised by the band's half-width, with its time.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from compliant_demo.alignment import AlignedSet, align_demonstrations
from compliant_demo.arrays import finite_array, time_axis
from compliant_demo.exceptions import InvalidInputError

__all__ = ["DemonstrationBand", "demonstration_band", "band_from_aligned", "tracking_metrics"]


@dataclass(frozen=True)
class DemonstrationBand:
    """The demonstrations' aligned mean and tolerance, per joint.

    Attributes
    ----------
    phase : (n,) normalised time in [0, 1], 1
    duration_s : mean duration of the demonstrations, s
    mean : (n, n_joints) aligned mean, rad
    spread : (n, n_joints) sample standard deviation across the aligned demonstrations, rad
    tolerance : (n, n_joints) band half-width, max(n_sigma * spread, min_tolerance), rad
    n_sigma : band width in standard deviations, 1
    min_tolerance : floor of the half-width, rad
    n_demonstrations : how many demonstrations formed it
    """

    phase: NDArray[np.float64]
    duration_s: float
    mean: NDArray[np.float64]
    spread: NDArray[np.float64]
    tolerance: NDArray[np.float64]
    n_sigma: float
    min_tolerance: float
    n_demonstrations: int


def demonstration_band(
    demonstrations: Sequence[object],
    *,
    n_sigma: float = 2.0,
    min_tolerance: float = 0.01,
    band: float | None = 0.1,
) -> DemonstrationBand:
    """Align demonstrations and form their mean and tolerance band.

    Parameters
    ----------
    demonstrations : at least two, each as :func:`compliant_demo.alignment.align_demonstrations`
        takes them ((t, position) tuples, DemoArrays or arrays)
    n_sigma : half-width of the band in standard deviations, 1 (default 2: about 95 % of a
        normal spread, common practice)
    min_tolerance : smallest half-width, rad (default 0.01 rad), so that stretches where the
        demonstrations coincide (the held start and goal) do not demand an exact match
    band : Sakoe-Chiba band of the DTW, fraction of the length

    Returns
    -------
    DemonstrationBand
    """
    if len(demonstrations) < 2:
        raise InvalidInputError(f"demonstrations: need at least 2 for a spread, got "
                                f"{len(demonstrations)}")
    return band_from_aligned(align_demonstrations(demonstrations, band=band),
                             n_sigma=n_sigma, min_tolerance=min_tolerance)


def band_from_aligned(
    aligned: AlignedSet, *, n_sigma: float = 2.0, min_tolerance: float = 0.01
) -> DemonstrationBand:
    """The band of demonstrations already aligned (see :func:`demonstration_band`)."""
    if aligned.n_demos < 2:
        raise InvalidInputError(f"demonstrations: need at least 2 for a spread, got "
                                f"{aligned.n_demos}")
    if not (np.isfinite(n_sigma) and n_sigma > 0):
        raise InvalidInputError(f"n_sigma: must be positive, got {n_sigma!r}")
    if not (np.isfinite(min_tolerance) and min_tolerance > 0):
        raise InvalidInputError(f"min_tolerance: must be positive (rad), got {min_tolerance!r}")
    spread = np.sqrt(aligned.variance)
    return DemonstrationBand(
        phase=aligned.phase,
        duration_s=float(aligned.durations.mean()),
        mean=aligned.mean,
        spread=spread,
        tolerance=np.maximum(n_sigma * spread, min_tolerance),
        n_sigma=float(n_sigma),
        min_tolerance=float(min_tolerance),
        n_demonstrations=aligned.n_demos,
    )


def tracking_metrics(
    t: ArrayLike,
    q: ArrayLike,
    band: DemonstrationBand,
    *,
    duration_s: float | None = None,
) -> dict[str, Any]:
    """A replay against the demonstrations' mean, with their spread as the tolerance.

    Parameters
    ----------
    t : (n_samples,) s from the start of the motion, strictly increasing
    q : (n_samples, n_joints) rad
    band : the demonstrations' :class:`DemonstrationBand`
    duration_s : duration of the replayed motion, s (default: the demonstrations' mean
        duration); replay time t maps to phase t / duration_s, and samples after the motion are
        compared with the mean's end (the goal held)

    Returns
    -------
    dict with ``tracking_outside_fraction`` (per joint: share of time with |q - mean| above the
    tolerance), ``tracking_outside_fraction_any`` (share of time any joint is outside),
    ``tracking_worst_excess`` (per joint: max of |q - mean| / tolerance, 1 = on the band's edge),
    ``tracking_worst_excess_time_s`` (per joint, s), ``tracking_worst_error_rad`` (per joint: the
    largest |q - mean|), ``tracking_n_sigma`` and ``tracking_min_tolerance_rad``.

    Notes
    -----
    The share of time weighs each sample by the interval up to the next one (the last sample by
    the one before), so uneven sampling does not bias it.
    """
    times = time_axis(t)
    position = finite_array(q, "q")
    n_joints = band.mean.shape[1]
    if position.shape != (times.size, n_joints):
        raise InvalidInputError(f"q: expected shape ({times.size}, {n_joints}), got "
                                f"{position.shape}")
    duration = band.duration_s if duration_s is None else duration_s
    if not (np.isfinite(duration) and duration > 0):
        raise InvalidInputError(f"duration_s: must be positive, got {duration_s!r}")
    phase = np.clip((times - times[0]) / duration, 0.0, 1.0)
    mean = np.column_stack([np.interp(phase, band.phase, band.mean[:, j])
                            for j in range(n_joints)])
    tolerance = np.column_stack([np.interp(phase, band.phase, band.tolerance[:, j])
                                 for j in range(n_joints)])
    error = np.abs(position - mean)
    excess = error / tolerance
    weight = np.diff(times, append=times[-1] + (times[-1] - times[-2]))
    weight = weight / weight.sum()
    outside = excess > 1.0
    worst = excess.argmax(axis=0)
    return {
        "tracking_outside_fraction": (weight @ outside).tolist(),
        "tracking_outside_fraction_any": float(weight @ outside.any(axis=1)),
        "tracking_worst_excess": excess.max(axis=0).tolist(),
        "tracking_worst_excess_time_s": times[worst].tolist(),
        "tracking_worst_error_rad": error.max(axis=0).tolist(),
        "tracking_n_sigma": band.n_sigma,
        "tracking_min_tolerance_rad": band.min_tolerance,
    }
