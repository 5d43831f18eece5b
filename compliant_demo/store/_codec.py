"""Encoding of samples and JSON documents for the store, and validation of incoming samples.

Sample blobs are contiguous little-endian float64 (``<f8``) in row-major order. JSON documents
may carry numpy arrays, which are tagged so that they come back bit for bit.
"""

from __future__ import annotations

import base64
import json
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "SAMPLE_DTYPE",
    "CHANNELS",
    "MAX_JOINTS",
    "to_blob",
    "from_blobs",
    "dumps",
    "loads",
    "validate_chunk",
    "validate_joints",
    "validate_text",
    "validate_flags",
]

SAMPLE_DTYPE = np.dtype("<f8")
CHANNELS: tuple[str, ...] = ("position", "velocity", "torque", "stiffness")
_ARRAY_TAG = "__ndarray__"
# Joints of one demonstration: far above any arm (7) or hand (about 20), small enough that every
# per-joint JSON summary and sample row stays small.
MAX_JOINTS = 64


def to_blob(array: np.ndarray) -> bytes:
    """Bytes of ``array`` as contiguous little-endian float64, row-major."""
    return np.ascontiguousarray(array, dtype=SAMPLE_DTYPE).tobytes()


def from_blobs(blobs: Sequence[bytes], n_columns: int | None) -> np.ndarray:
    """Join chunk blobs of one channel into one array, ``(n,)`` or ``(n, n_columns)``."""
    data = blobs[0] if len(blobs) == 1 else b"".join(blobs)
    flat = np.frombuffer(data, dtype=SAMPLE_DTYPE)
    return flat if n_columns is None else flat.reshape(-1, n_columns)


def _default(value: Any) -> Any:
    if isinstance(value, np.ndarray):
        if value.dtype.kind not in "biuf":
            raise InvalidInputError(
                f"array of dtype {value.dtype} cannot be stored; use bool, int or float arrays"
            )
        contiguous = np.ascontiguousarray(value)
        dtype = contiguous.dtype.newbyteorder("<") if contiguous.dtype.kind != "b" else "|b1"
        return {
            _ARRAY_TAG: base64.b64encode(contiguous.astype(dtype).tobytes()).decode("ascii"),
            "dtype": np.dtype(dtype).str,
            "shape": list(contiguous.shape),
        }
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, (set, frozenset, tuple)):
        return list(value)
    raise InvalidInputError(f"value {value!r} of type {type(value).__name__} is not storable")


def _object_hook(obj: dict[str, Any]) -> Any:
    if _ARRAY_TAG in obj:
        raw = base64.b64decode(obj[_ARRAY_TAG])
        return np.frombuffer(raw, dtype=np.dtype(obj["dtype"])).reshape(obj["shape"]).copy()
    return obj


def dumps(value: Any) -> str:
    """JSON text of ``value``; numpy arrays and scalars are encoded for :func:`loads`."""
    return json.dumps(value, default=_default, separators=(",", ":"), sort_keys=True)


def loads(text: str | None) -> Any:
    """Inverse of :func:`dumps`; ``None`` gives ``None``."""
    return None if text is None else json.loads(text, object_hook=_object_hook)


def validate_text(name: str, value: object, *, allow_empty: bool = True) -> str:
    """Check that ``value`` is a string (non-empty unless allowed)."""
    if not isinstance(value, str):
        raise InvalidInputError(f"{name} must be a string, got {value!r}")
    if not allow_empty and not value.strip():
        raise InvalidInputError(f"{name} must not be empty, got {value!r}")
    return value


def validate_joints(joints: object) -> tuple[str, ...]:
    """Joint names: a sequence of 1 to :data:`MAX_JOINTS` distinct non-empty strings."""
    if isinstance(joints, str) or not isinstance(joints, Sequence):
        raise InvalidInputError(f"joints must be a sequence of names, got {joints!r}")
    if len(joints) > MAX_JOINTS:
        raise InvalidInputError(f"joints must name at most {MAX_JOINTS} joints, got {len(joints)}")
    names = tuple(joints)
    if not names:
        raise InvalidInputError("joints must name at least one joint, got []")
    seen: set[str] = set()
    for name in names:
        validate_text("joint name", name, allow_empty=False)
        if name in seen:
            raise InvalidInputError(f"joints must be distinct, got {name!r} twice")
        seen.add(name)
    return names


def validate_flags(flags: object) -> dict[str, int | float | str | bool]:
    """Flags: a mapping of names to counts (non-negative int) or short notes (str, bool, float)."""
    if not isinstance(flags, Mapping):
        raise InvalidInputError(f"flags must be a mapping of name to count, got {flags!r}")
    checked: dict[str, int | float | str | bool] = {}
    for key, value in flags.items():
        validate_text("flag name", key, allow_empty=False)
        if isinstance(value, (bool, np.bool_, str)):
            checked[key] = value if isinstance(value, str) else bool(value)
        elif isinstance(value, (int, np.integer)) and value >= 0:
            checked[key] = int(value)
        elif isinstance(value, (float, np.floating)) and np.isfinite(value):
            checked[key] = float(value)
        else:
            raise InvalidInputError(
                f"flag {key!r} must be a non-negative count, a finite number, a string or a bool, "
                f"got {value!r}"
            )
    return checked


def _real_array(name: str, value: object) -> np.ndarray:
    """``value`` as float64, refusing what does not convert exactly: complex numbers (the
    imaginary part would be dropped), datetime64/timedelta64, strings and Python objects."""
    try:
        raw = np.asarray(value)
    except (TypeError, ValueError) as exc:
        raise InvalidInputError(f"{name} is not numeric: {exc}") from None
    if raw.dtype.kind not in "fiub":  # float, signed/unsigned integer, bool
        raise InvalidInputError(
            f"{name} must hold real numbers (float, integer or bool), got dtype {raw.dtype}"
        )
    return raw.astype(np.float64, copy=False)


def _channel(name: str, value: object, n: int, n_joints: int, *, allow_nan: bool) -> np.ndarray:
    array = _real_array(name, value)
    if array.ndim == 1 and n_joints == 1:
        array = array.reshape(-1, 1)
    if array.shape != (n, n_joints):
        raise InvalidInputError(
            f"{name} has shape {array.shape}, expected ({n}, {n_joints}) "
            f"(n_samples from t, n_joints from the demonstration)"
        )
    _check_finite(name, array, allow_nan=allow_nan)
    return array


def _check_finite(name: str, array: np.ndarray, *, allow_nan: bool = False) -> None:
    bad = np.isinf(array) if allow_nan else ~np.isfinite(array)
    if bad.any():
        index = tuple(int(i) for i in np.argwhere(bad)[0])
        raise InvalidInputError(
            f"{name}[{', '.join(map(str, index))}] = {float(array[index])!r} is not finite"
        )


def validate_chunk(
    t: object,
    channels: Mapping[str, object | None],
    *,
    n_joints: int,
    with_stiffness: bool,
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Check one chunk of samples and return it as float64 arrays.

    Parameters
    ----------
    t : (n,) array, s
        Strictly increasing.
    channels : mapping of channel name to (n, n_joints) array or None
        Finite values; stiffness may also be NaN ("no estimate"), never infinite.
    n_joints : int
    with_stiffness : bool
        Whether the demonstration stores stiffness: then it is required, otherwise refused.

    Returns
    -------
    t : (n,) float64 array
    arrays : dict of channel name to (n, n_joints) float64 array
    """
    times = _real_array("t", t)
    if times.ndim != 1:
        raise InvalidInputError(f"t must be one-dimensional, got shape {times.shape}")
    if times.size == 0:
        raise InvalidInputError("t is empty: a chunk needs at least one sample")
    _check_finite("t", times)
    steps = np.diff(times)
    if steps.size and not (steps > 0).all():
        i = int(np.argmax(steps <= 0))
        word = "repeats" if steps[i] == 0 else "goes backwards"
        raise InvalidInputError(
            f"t {word} at index {i + 1}: t[{i}] = {float(times[i])!r}, "
            f"t[{i + 1}] = {float(times[i + 1])!r}"
        )
    arrays: dict[str, np.ndarray] = {}
    for name in CHANNELS:
        value = channels.get(name)
        if name == "stiffness" and not with_stiffness:
            if value is not None:
                raise InvalidInputError(
                    "stiffness given for a demonstration begun with with_stiffness=False"
                )
            continue
        if value is None:
            raise InvalidInputError(f"{name} is missing (None) but the demonstration stores it")
        # NaN stiffness means "no estimate for this sample" (an estimator not yet excited)
        arrays[name] = _channel(name, value, times.size, n_joints, allow_nan=name == "stiffness")
    return times, arrays
