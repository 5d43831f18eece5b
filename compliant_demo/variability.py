"""Stiffness from the spread of aligned demonstrations: stiff where the operator varied least.

One law, from per-sample variance across demonstrations to a stiffness schedule, with levels
anchored at a stated reference spread and stiffness rather than stretched over the range.
"""

from __future__ import annotations

import math

import numpy as np

from compliant_demo.exceptions import InvalidInputError

__all__ = ["VARIABILITY_REFERENCE_STD", "stiffness_from_variability"]

VARIABILITY_REFERENCE_STD = 0.02
"""Default spread, rad, at which :func:`stiffness_from_variability` gives its reference stiffness.

Our own choice: about the spread of a relaxed operator's repeated guiding motions on a bench arm.
"""


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
) -> np.ndarray:
    """Stiffness schedule from the spread of aligned demonstrations: stiff where they agree.

    Parameters
    ----------
    variance : (n_samples, n_joints) array, rad^2
        Per-sample sample variance (ddof=1) across aligned demonstrations
        (``AlignedSet.variance``).
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

    Returns
    -------
    (n_samples, n_joints) array, N*m/rad
        ``clip(K_ref * (c * reference_std^2 / variance)^p, k_min, k_max)`` per joint, with
        ``c = (n - 3) / (n - 1)`` for n > 3 demonstrations and 1 otherwise.

    Notes
    -----
    Anchored levels instead of stretching the precision over the whole range: twice the spread
    gives a quarter of the stiffness (p = 1) wherever it occurs, so a profile learned from
    other demonstrations of the same task lands at the same level. The law is our own choice,
    after the inverse-variance weighting of Calinon, Sardellitti and Caldwell (IROS 2010) and
    the minimum-intervention principle of optimal feedback control (Todorov and Jordan, Nature
    Neuroscience 5(11), 1226-1235, 2002): an operator corrects deviations, so varies least,
    where the task needs stiffness. ``c`` makes ``c / s^2`` an unbiased estimate of
    ``1 / sigma^2`` for normal deviations, since ``(n - 1) s^2 / sigma^2`` is chi-square with
    n - 1 degrees of freedom and ``E[1 / chi^2_k] = 1 / (k - 2)`` (common practice).
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
    unbiased = (n_demos - 3) / (n_demos - 1) if n_demos > 3 else 1.0
    with np.errstate(divide="ignore"):
        ratio = unbiased * reference_std**2 / var
    return np.clip(reference * ratio**exponent, low, high)
