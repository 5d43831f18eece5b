"""Time alignment of demonstrations: banded dynamic time warping, resampling and averaging.

Demonstrations of one skill differ in timing; before their mean and spread can be taken they are
warped onto one reference time axis with multi-joint dynamic time warping restricted to a
Sakoe-Chiba band, and every other recorded channel (stiffness, torque) follows the same warping.
The DTW kernel is compiled with numba so that two 5,000-sample demonstrations align in a few tens
of milliseconds with the band-limited cost matrix kept in memory for path recovery.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numba
import numpy as np

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "DemoArrays",
    "AlignedSet",
    "band_radius",
    "dtw",
    "resample",
    "align_demonstrations",
]


@dataclass(frozen=True)
class DemoArrays:
    """One demonstration as plain arrays, the input of :func:`align_demonstrations`.

    Parameters
    ----------
    t : (n_samples,) array, s
        Strictly increasing sample times.
    position : (n_samples, n_joints) array, rad
        Joint angles; the channels DTW aligns on.
    channels : mapping of name to (n_samples,) or (n_samples, k) array
        Further channels warped along with the position (stiffness in N*m/rad, torque in N*m).
    joint_names : sequence of str, optional
        Joint names in column order; when given on several demonstrations they must agree.
    """

    t: np.ndarray
    position: np.ndarray
    channels: Mapping[str, np.ndarray] = field(default_factory=dict)
    joint_names: tuple[str, ...] | None = None


@dataclass(frozen=True)
class AlignedSet:
    """Demonstrations warped onto the reference's time axis and resampled to ``n_out`` points.

    Attributes
    ----------
    phase : (n_out,) array, dimensionless
        Normalised time in [0, 1] along the reference demonstration.
    time : (n_out,) array, s
        Phase times the mean duration of the demonstrations.
    durations : (n_demos,) array, s
        Duration of each input demonstration.
    mean : (n_out, n_joints) array, rad
        Mean of the warped positions across demonstrations.
    variance : (n_out, n_joints) array, rad^2
        Sample variance (ddof=1) of the warped positions; NaN when there is one demonstration.
    warped_position : (n_demos, n_out, n_joints) array, rad
    warped_channels : dict of name to (n_demos, n_out, ...) array
        Every extra channel warped the same way as the position.
    paths : list of (path_length, 2) int arrays
        Warping path of each demonstration against the reference: columns are (reference sample
        index, demonstration sample index) in the original sampling.
    dtw_costs : (n_demos,) array, rad
        DTW cost of each demonstration against the reference (convention of :func:`dtw`).
    reference_index : int
        Which input demonstration served as the time reference.
    joint_names : tuple of str or None
    """

    phase: np.ndarray
    time: np.ndarray
    durations: np.ndarray
    mean: np.ndarray
    variance: np.ndarray
    warped_position: np.ndarray
    warped_channels: dict[str, np.ndarray]
    paths: list[np.ndarray]
    dtw_costs: np.ndarray
    reference_index: int
    joint_names: tuple[str, ...] | None

    @property
    def n_demos(self) -> int:
        """Number of aligned demonstrations."""
        return int(self.warped_position.shape[0])


def _as_series(x: object, name: str) -> np.ndarray:
    """Convert to a finite float (n, d) array; a 1-D input becomes one column."""
    try:
        arr = np.asarray(x, dtype=float)
    except (TypeError, ValueError):
        raise InvalidInputError(
            f"{name}: cannot convert {type(x).__name__} to a float array"
        ) from None
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[0] == 0 or arr.shape[1] == 0:
        raise InvalidInputError(
            f"{name}: expected a non-empty (n_samples, n_dims) array, got shape {arr.shape}"
        )
    bad = np.flatnonzero(~np.isfinite(arr).all(axis=1))
    if bad.size:
        raise InvalidInputError(
            f"{name}: sample {bad[0]} is not finite (value {arr[bad[0]].tolist()})"
        )
    return np.ascontiguousarray(arr)


def _check_time(t: object, n_samples: int, name: str) -> np.ndarray:
    """Validate sample times: finite, strictly increasing, positive duration, one per sample."""
    times = np.asarray(t, dtype=float)
    if times.ndim != 1 or times.shape[0] != n_samples:
        raise InvalidInputError(
            f"{name}: expected {n_samples} sample times, got shape {times.shape}"
        )
    if not np.isfinite(times).all():
        index = int(np.flatnonzero(~np.isfinite(times))[0])
        raise InvalidInputError(f"{name}[{index}] = {times[index]} is not finite")
    steps = np.diff(times)
    if steps.size and not (steps > 0).all():
        index = int(np.flatnonzero(steps <= 0)[0]) + 1
        raise InvalidInputError(
            f"{name} is not increasing: {name}[{index}] = {times[index]} follows {times[index - 1]}"
        )
    if n_samples < 2 or times[-1] - times[0] <= 0:
        raise InvalidInputError(
            f"{name}: duration must be positive, got {times[-1] - times[0]} s over "
            f"{n_samples} samples"
        )
    return times


def band_radius(n: int, m: int, band: float | None) -> int:
    """Half-width in samples of the Sakoe-Chiba band for sequences of ``n`` and ``m`` samples.

    Parameters
    ----------
    n, m : int
        Sequence lengths.
    band : float in (0, 1] or None
        Band half-width as a fraction of the longer sequence; None means no band.

    Returns
    -------
    int
        ``ceil(band * max(n, m))``, raised where needed so that a warping path exists along the
        scaled diagonal (at least ``ceil(max(n, m) / min(n, m))``).
    """
    longest, shortest = max(n, m), min(n, m)
    if band is None:
        return longest
    if not (isinstance(band, int | float) and math.isfinite(band) and 0 < band <= 1):
        raise InvalidInputError(f"band must be a fraction in (0, 1] or None, got {band!r}")
    needed = math.ceil(longest / shortest)
    return max(math.ceil(band * longest), needed)


def _band_limits(n: int, m: int, radius: int) -> tuple[np.ndarray, np.ndarray]:
    """First and last allowed column of each row: |j - round(i*(m-1)/(n-1))| <= radius."""
    rows = np.arange(n)
    slope = (m - 1) / (n - 1) if n > 1 else 0.0
    centre = np.rint(rows * slope).astype(np.int64)
    lower = np.clip(centre - radius, 0, m - 1)
    upper = np.clip(centre + radius, 0, m - 1)
    return lower, upper


@numba.njit(cache=True, nogil=True)
def _dtw_kernel(a, b, lower, upper):  # pragma: no cover - compiled; tested through dtw()
    n = a.shape[0]
    m = b.shape[0]
    dims = a.shape[1]
    width = 0
    for i in range(n):
        width = max(width, upper[i] - lower[i] + 1)
    # Two rolling rows indexed by column + 1 (slot 0 is column -1) and one step code per band
    # cell (0 diagonal, 1 from (i-1, j), 2 from (i, j-1)) for path recovery.
    steps = np.empty((n, width), dtype=np.int8)
    prev = np.full(m + 2, np.inf)
    cur = np.full(m + 2, np.inf)
    for i in range(n):
        lo = lower[i]
        hi = upper[i]
        cur[lo] = np.inf
        for j in range(lo, hi + 1):
            local = 0.0
            for d in range(dims):
                diff = a[i, d] - b[j, d]
                local += diff * diff
            diag = prev[j]
            up = prev[j + 1]
            left = cur[j]
            if i == 0 and j == 0:
                best = 0.0
                code = 0
            elif diag <= up and diag <= left:
                best = diag
                code = 0
            elif up <= left:
                best = up
                code = 1
            else:
                best = left
                code = 2
            cur[j + 1] = local + best
            steps[i, j - lo] = code
        # Cells the next row may read beyond this row's band must look unreachable.
        reach = upper[i + 1] if i + 1 < n else hi
        for j in range(hi + 1, reach + 1):
            cur[j + 1] = np.inf
        prev, cur = cur, prev
    total = prev[m]
    path = np.empty((n + m, 2), dtype=np.int64)
    i = n - 1
    j = m - 1
    k = 0
    path[0, 0] = i
    path[0, 1] = j
    while i > 0 or j > 0:
        code = steps[i, j - lower[i]]
        if code == 0:
            i -= 1
            j -= 1
        elif code == 1:
            i -= 1
        else:
            j -= 1
        k += 1
        path[k, 0] = i
        path[k, 1] = j
    return total, path[: k + 1][::-1].copy()


def dtw(a: object, b: object, band: float | None = 0.1) -> tuple[float, np.ndarray]:
    """Multi-joint dynamic time warping with a Sakoe-Chiba band.

    Parameters
    ----------
    a : (n, d) or (n,) array
        First sequence (joint angles in rad, or any channels in common units).
    b : (m, d) or (m,) array
        Second sequence with the same number of channels.
    band : float in (0, 1] or None
        Band half-width as a fraction of the longer sequence (see :func:`band_radius`); None
        allows every cell.

    Returns
    -------
    cost : float, units of the input
        ``sqrt(min over warping paths of sum over path cells of ||a_i - b_j||^2)``.
    path : (path_length, 2) int array
        Optimal warping path from (0, 0) to (n - 1, m - 1), columns (index into a, index into b).

    Notes
    -----
    Steps (i-1, j-1), (i-1, j) and (i, j-1), no slope weights (Sakoe and Chiba, IEEE Trans.
    ASSP 26(1), 1978, symmetric form without weights). The band keeps cells with
    ``|j - round(i*(m-1)/(n-1))| <= r``; for equal lengths this is ``|i - j| <= r``, the same set
    of cells as ``dtaidistance.dtw_ndim`` with ``window=r+1``. The local cost is the squared
    Euclidean distance across channels and the returned cost is the square root of the path sum,
    the convention of ``dtaidistance.dtw_ndim.distance``; it is not normalised by path length.
    Ties in path recovery prefer the diagonal step, then (i-1, j), then (i, j-1).
    """
    first = _as_series(a, "a")
    second = _as_series(b, "b")
    if first.shape[1] != second.shape[1]:
        raise InvalidInputError(f"b: has {second.shape[1]} channels, a has {first.shape[1]}")
    n, m = first.shape[0], second.shape[0]
    lower, upper = _band_limits(n, m, band_radius(n, m, band))
    total, path = _dtw_kernel(first, second, lower, upper)
    return math.sqrt(total), path


def resample(t: object, x: object, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Linear interpolation of ``x`` onto ``n`` equally spaced times from ``t[0]`` to ``t[-1]``.

    Parameters
    ----------
    t : (n_samples,) array, s
        Strictly increasing sample times.
    x : (n_samples,) or (n_samples, k) array
        Values at those times (any unit; kept).
    n : int
        Number of output samples, at least 2.

    Returns
    -------
    t_new : (n,) array, s
    x_new : (n,) or (n, k) array, same shape convention as ``x``
    """
    values = np.asarray(x, dtype=float)
    flat = values.ndim == 1
    series = _as_series(values, "x")
    times = _check_time(t, series.shape[0], "t")
    if not isinstance(n, int | np.integer) or n < 2:
        raise InvalidInputError(f"n must be an integer of at least 2, got {n!r}")
    t_new = np.linspace(times[0], times[-1], int(n))
    x_new = np.empty((int(n), series.shape[1]))
    for column in range(series.shape[1]):
        x_new[:, column] = np.interp(t_new, times, series[:, column])
    return t_new, (x_new[:, 0] if flat else x_new)


def _warp_onto_reference(values: np.ndarray, path: np.ndarray, n_ref: int) -> np.ndarray:
    """Mean of the demonstration samples matched to each reference sample, (n_ref, ...)."""
    flat = values.reshape(values.shape[0], -1)
    sums = np.zeros((n_ref, flat.shape[1]))
    np.add.at(sums, path[:, 0], flat[path[:, 1]])
    counts = np.bincount(path[:, 0], minlength=n_ref).astype(float)
    return (sums / counts[:, None]).reshape((n_ref, *values.shape[1:]))


def _to_demo(item: object, index: int) -> DemoArrays:
    """Normalise one input (array, tuple or DemoArrays) and validate it."""
    name = f"demonstrations[{index}]"
    if isinstance(item, DemoArrays):
        demo = item
    elif isinstance(item, tuple) and len(item) in (2, 3):
        demo = DemoArrays(item[0], item[1], item[2] if len(item) == 3 else {})
    elif isinstance(item, tuple):
        raise InvalidInputError(
            f"{name}: expected (t, position) or (t, position, channels), got a tuple of "
            f"{len(item)} items"
        )
    else:
        position = _as_series(item, f"{name}.position")
        demo = DemoArrays(np.arange(position.shape[0], dtype=float), position)
    position = _as_series(demo.position, f"{name}.position")
    times = _check_time(demo.t, position.shape[0], f"{name}.t")
    channels: dict[str, np.ndarray] = {}
    for key, value in dict(demo.channels).items():
        arr = np.asarray(value, dtype=float)
        if arr.ndim == 0 or arr.shape[0] != position.shape[0]:
            raise InvalidInputError(
                f"{name}.channels[{key!r}]: expected {position.shape[0]} samples, got shape "
                f"{arr.shape}"
            )
        if not np.isfinite(arr).all():
            raise InvalidInputError(f"{name}.channels[{key!r}] contains NaN or infinite values")
        channels[key] = arr
    names = tuple(demo.joint_names) if demo.joint_names is not None else None
    if names is not None and len(names) != position.shape[1]:
        raise InvalidInputError(
            f"{name}.joint_names = {list(names)} has {len(names)} names for "
            f"{position.shape[1]} position columns"
        )
    return DemoArrays(times, position, channels, names)


def _check_consistent(demos: list[DemoArrays]) -> tuple[str, ...] | None:
    """All demonstrations must share the joint count, joint names and channel set."""
    first = demos[0]
    names = next((d.joint_names for d in demos if d.joint_names is not None), None)
    for index, demo in enumerate(demos):
        label = f"demonstrations[{index}]"
        if demo.position.shape[1] != first.position.shape[1]:
            raise InvalidInputError(
                f"{label}.position has {demo.position.shape[1]} joints, "
                f"demonstrations[0] has {first.position.shape[1]}"
            )
        if demo.joint_names is not None and demo.joint_names != names:
            raise InvalidInputError(
                f"{label}.joint_names = {list(demo.joint_names)} differs from {list(names or ())}"
            )
        if set(demo.channels) != set(first.channels):
            raise InvalidInputError(
                f"{label}.channels = {sorted(demo.channels)} differs from "
                f"demonstrations[0].channels = {sorted(first.channels)}"
            )
    return names


def align_demonstrations(
    demonstrations: Sequence[object],
    band: float | None = 0.1,
    reference: int | None = None,
    n_out: int | None = None,
) -> AlignedSet:
    """Warp several demonstrations onto one reference time axis and average them.

    Parameters
    ----------
    demonstrations : sequence of DemoArrays, (t, position[, channels]) tuples or (n_i, n_joints)
        arrays
        Plain arrays are taken as sampled at unit spacing.
    band : float in (0, 1] or None
        Sakoe-Chiba band of :func:`dtw`.
    reference : int, optional
        Index of the demonstration that defines the time axis; default: the one with the median
        duration (the lower median for an even count).
    n_out : int, optional
        Number of output samples (default: the reference's sample count).

    Returns
    -------
    AlignedSet

    Notes
    -----
    Each demonstration is aligned to the reference with :func:`dtw` on joint angles. Where the
    path maps several demonstration samples to one reference sample their mean is taken. The
    warped arrays are then resampled linearly from the reference's sampling to ``n_out`` points
    equally spaced in phase. DTW explains what it can as timing: variation along the direction of
    motion (an offset on a joint that moves monotonically) largely turns into warping, so the
    variance afterwards mostly reflects variation across the path and at its still parts.
    """
    if len(demonstrations) == 0:
        raise InvalidInputError("demonstrations: need at least one, got 0")
    demos = [_to_demo(item, index) for index, item in enumerate(demonstrations)]
    names = _check_consistent(demos)
    durations = np.array([d.t[-1] - d.t[0] for d in demos])
    if reference is None:
        reference = int(np.argsort(durations, kind="stable")[(len(demos) - 1) // 2])
    if not isinstance(reference, int | np.integer) or not 0 <= reference < len(demos):
        raise InvalidInputError(
            f"reference must index one of {len(demos)} demonstrations, got {reference!r}"
        )
    ref = demos[reference]
    n_ref = ref.position.shape[0]
    n_out = n_ref if n_out is None else n_out
    if not isinstance(n_out, int | np.integer) or n_out < 2:
        raise InvalidInputError(f"n_out must be an integer of at least 2, got {n_out!r}")
    ref_phase = (ref.t - ref.t[0]) / (ref.t[-1] - ref.t[0])
    phase = np.linspace(0.0, 1.0, int(n_out))

    def to_grid(values: np.ndarray) -> np.ndarray:
        flat = values.reshape(n_ref, -1)
        out = np.column_stack([np.interp(phase, ref_phase, col) for col in flat.T])
        return out.reshape((int(n_out), *values.shape[1:]))

    paths, costs, positions = [], [], []
    channels: dict[str, list[np.ndarray]] = {key: [] for key in ref.channels}
    for demo in demos:
        cost, path = dtw(ref.position, demo.position, band=band)
        paths.append(path)
        costs.append(cost)
        positions.append(to_grid(_warp_onto_reference(demo.position, path, n_ref)))
        for key in channels:
            channels[key].append(to_grid(_warp_onto_reference(demo.channels[key], path, n_ref)))
    warped = np.stack(positions)
    variance = warped.var(axis=0, ddof=1) if len(demos) > 1 else np.full(warped.shape[1:], np.nan)
    return AlignedSet(
        phase=phase,
        time=phase * float(durations.mean()),
        durations=durations,
        mean=warped.mean(axis=0),
        variance=variance,
        warped_position=warped,
        warped_channels={key: np.stack(value) for key, value in channels.items()},
        paths=paths,
        dtw_costs=np.asarray(costs),
        reference_index=int(reference),
        joint_names=names,
    )
