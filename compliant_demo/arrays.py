"""Checks and conversions of the arrays that time series come in: finite values, a strictly
increasing time axis, per-joint values and ranges, stacks of demonstrations, and smoothed
derivatives on a uniform grid. Every check raises InvalidInputError naming the argument.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.signal import savgol_filter

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "finite_array",
    "time_axis",
    "uniform_step",
    "derivatives",
    "per_joint",
    "ranges",
    "as_demo_stack",
    "channel_stack",
]


def finite_array(value: ArrayLike, name: str) -> NDArray[np.float64]:
    try:
        array = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InvalidInputError(f"{name}: cannot convert {value!r} to a float array") from None
    if not np.all(np.isfinite(array)):
        bad = tuple(int(i) for i in np.argwhere(~np.isfinite(array))[0])
        raise InvalidInputError(f"{name}: non-finite value {float(array[bad])!r} at index {bad}")
    return array


def time_axis(t: ArrayLike, name: str = "t") -> NDArray[np.float64]:
    """Validate a strictly increasing time vector with a positive duration, s."""
    times = finite_array(t, name)
    if times.ndim != 1 or times.size < 2:
        raise InvalidInputError(f"{name}: expected a 1-D array of at least 2 samples, got shape "
                                f"{times.shape}")
    steps = np.diff(times)
    if np.any(steps <= 0):
        k = int(np.argmax(steps <= 0))
        raise InvalidInputError(
            f"{name}: time must be strictly increasing; {name}[{k + 1}] = {times[k + 1]!r} "
            f"follows {name}[{k}] = {times[k]!r}"
        )
    return times


def uniform_step(times: NDArray[np.float64]) -> float | None:
    """The common step of a uniformly sampled time vector, s, or None if it is not uniform."""
    steps = np.diff(times)
    mean_step = (times[-1] - times[0]) / steps.size
    return float(mean_step) if np.ptp(steps) <= 1e-9 * mean_step else None


def derivatives(
    times: NDArray[np.float64], demos: NDArray[np.float64], smoothing_window: int | None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Velocity and acceleration of (d, n, j) positions along axis 1, rad/s and rad/s^2.

    Central differences by default; with ``smoothing_window`` a cubic Savitzky-Golay filter
    (Savitzky and Golay, Analytical Chemistry 36(8), 1964), which keeps the plateaus and steps
    of a warped time axis out of the acceleration the forcing term is fitted to.
    """
    step = uniform_step(times)
    if smoothing_window is None:
        velocity = np.gradient(demos, times if step is None else step, axis=1)
        return velocity, np.gradient(velocity, times if step is None else step, axis=1)
    if (isinstance(smoothing_window, bool) or not isinstance(smoothing_window, int | np.integer)
            or smoothing_window < 5 or smoothing_window % 2 == 0
            or smoothing_window > times.size):
        raise InvalidInputError(
            f"smoothing_window: need an odd sample count from 5 to {times.size}, got "
            f"{smoothing_window!r}"
        )
    if step is None:
        raise InvalidInputError("smoothing_window: needs uniformly sampled t, got uneven steps")
    window = int(smoothing_window)
    velocity = savgol_filter(demos, window, 3, deriv=1, delta=step, axis=1)
    return velocity, savgol_filter(demos, window, 3, deriv=2, delta=step, axis=1)


def per_joint(value: ArrayLike | None, n_joints: int, name: str) -> NDArray[np.float64] | None:
    if value is None:
        return None
    array = finite_array(value, name)
    if array.ndim == 0:
        array = np.full(n_joints, float(array))
    if array.shape != (n_joints,):
        raise InvalidInputError(f"{name}: expected shape ({n_joints},), got {array.shape}")
    return array


def ranges(
    value: ArrayLike, n_joints: int, name: str, *, positive: bool = False
) -> NDArray[np.float64]:
    """Broadcast a (low, high) pair or a (n_joints, 2) table and check low <= high (and, with
    ``positive``, low > 0)."""
    array = finite_array(value, name)
    if array.shape == (2,):
        array = np.tile(array, (n_joints, 1))
    if array.shape != (n_joints, 2):
        raise InvalidInputError(f"{name}: expected (low, high) or shape ({n_joints}, 2), got "
                                f"{array.shape}")
    if np.any(array[:, 0] > array[:, 1]):
        j = int(np.argmax(array[:, 0] > array[:, 1]))
        raise InvalidInputError(
            f"{name}: low {float(array[j, 0])!r} above high {float(array[j, 1])!r} for joint {j}"
        )
    if positive and np.any(array[:, 0] <= 0):
        j = int(np.argmax(array[:, 0] <= 0))
        raise InvalidInputError(f"{name}: low {float(array[j, 0])!r} for joint {j} must be "
                                "positive")
    return array


def as_demo_stack(value: ArrayLike, n_samples: int, name: str) -> NDArray[np.float64]:
    """Return (n_demos, n_samples, n_joints) from (n, j) or (d, n, j)."""
    array = finite_array(value, name)
    if array.ndim == 2:
        array = array[np.newaxis]
    if array.ndim != 3 or array.shape[1] != n_samples:
        raise InvalidInputError(
            f"{name}: expected shape ({n_samples}, n_joints) or (n_demos, {n_samples}, n_joints), "
            f"got {array.shape}"
        )
    return array


def channel_stack(value: ArrayLike, demos: NDArray[np.float64], name: str) -> NDArray:
    """A per-sample channel as (n_demos, n_samples, n_joints) like ``demos``; one (n, j) profile
    is shared by all demonstrations."""
    array = as_demo_stack(value, demos.shape[1], name)
    if array.shape[0] == 1 and array.shape[2] == demos.shape[2]:
        return np.broadcast_to(array, demos.shape)
    if array.shape != demos.shape:
        raise InvalidInputError(f"{name}: shape {array.shape} does not match position "
                                f"{demos.shape}")
    return array
