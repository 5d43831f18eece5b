"""Reading a demonstration's samples back from its chunks (with every check of the stored bytes)
and recomputing its summary columns from them; used by the store and by the migrations."""

from __future__ import annotations

import json
import sqlite3
import time

import numpy as np

from compliant_demo.exceptions import StoreCorruptError
from compliant_demo.store._codec import CHANNELS, chunk_checksum, from_blobs

__all__ = ["read_samples", "refresh_summary"]


def read_samples(
    conn: sqlite3.Connection,
    demo_id: str,
    n_joints: int,
    has_stiffness: bool,
    *,
    label: str = "store",
    verify: bool = True,
) -> tuple[np.ndarray, dict[str, np.ndarray | None]]:
    """All samples of one demonstration: ``t`` (n,) and channel arrays (n, n_joints).

    One SELECT over the demonstration's chunks; each channel is one join of blobs and one
    ``np.frombuffer``, so the arrays are read-only views of fresh memory. Every chunk's blob
    sizes and checksum are verified (unless ``verify`` is off, for layouts without checksums).

    Raises
    ------
    StoreCorruptError
        A chunk's bytes do not match its sample count or checksum.
    """
    rows = conn.execute(
        "SELECT seq, n, t, position, velocity, torque, stiffness"
        f"{', checksum' if verify else ''} FROM chunks WHERE demo_id = ? ORDER BY seq",
        (demo_id,),
    ).fetchall()
    if not rows:
        empty = np.empty((0, n_joints))
        return np.empty(0), {
            name: (empty if name != "stiffness" or has_stiffness else None) for name in CHANNELS
        }
    if verify:
        for row in rows:
            _verify_chunk(row, n_joints, has_stiffness, demo_id, label)
    columns = list(zip(*rows, strict=True))
    t = from_blobs(columns[2], None)
    arrays: dict[str, np.ndarray | None] = {}
    for name, blobs in zip(CHANNELS, columns[3:7], strict=True):
        arrays[name] = (
            from_blobs(blobs, n_joints) if (name != "stiffness" or has_stiffness) else None
        )
    return t, arrays


def _verify_chunk(row: tuple, n_joints: int, has_stiffness: bool, demo_id: str, label: str) -> None:
    seq, n, t, *channels, checksum = row
    sizes = [len(t) if isinstance(t, bytes) else -1] + [
        len(b) if isinstance(b, bytes) else (0 if b is None else -1) for b in channels
    ]
    expected = [8 * n] + [8 * n * n_joints] * 3 + [8 * n * n_joints if has_stiffness else 0]
    if sizes != expected:
        raise StoreCorruptError(
            f"{label}: chunk {seq} of demonstration {demo_id!r} has blobs of {sizes} bytes, "
            f"expected {expected}"
        )
    if chunk_checksum([t, *channels]) != checksum:
        raise StoreCorruptError(
            f"{label}: chunk {seq} of demonstration {demo_id!r} fails its checksum (damaged file)"
        )


def _finite_or_none(value: float) -> float | None:
    # A range can overflow for finite samples near the float64 limits; SQL and JSON get NULL.
    return float(value) if np.isfinite(value) else None


def _per_joint(joints: list[str], values: np.ndarray) -> str:
    return json.dumps({name: _finite_or_none(v) for name, v in zip(joints, values, strict=True)})


def refresh_summary(
    conn: sqlite3.Connection, demo_id: str, *, label: str = "store", verify: bool = True
) -> None:
    """Recompute the summary columns of one demonstration from its stored samples.

    Stiffness extremes ignore NaN ("no estimate") samples; a joint without any estimate gets
    None.
    """
    row = conn.execute(
        "SELECT joints, n_joints, has_stiffness FROM demonstrations WHERE id = ?", (demo_id,)
    ).fetchone()
    joints_json, n_joints, has_stiffness = row
    joints = json.loads(joints_json)
    t, arrays = read_samples(
        conn, demo_id, n_joints, bool(has_stiffness), label=label, verify=verify
    )
    summary: dict[str, object] = {
        "n_samples": int(t.size),
        "t_first": float(t[0]) if t.size else None,
        "t_last": float(t[-1]) if t.size else None,
        "duration_s": float(t[-1] - t[0]) if t.size else 0.0,
        "mean_rate_hz": _finite_or_none((t.size - 1) / (t[-1] - t[0])) if t.size > 1 else None,
        "range_of_motion": None,
        "peak_abs_torque": None,
        "stiffness_min": None,
        "stiffness_max": None,
        "range_of_motion_json": "{}",
        "peak_abs_torque_json": "{}",
        "stiffness_min_json": "{}",
        "stiffness_max_json": "{}",
    }
    if t.size:
        position, torque = arrays["position"], arrays["torque"]
        assert position is not None and torque is not None
        with np.errstate(over="ignore"):
            rom = position.max(axis=0) - position.min(axis=0)
        peak = np.abs(torque).max(axis=0)
        summary.update(
            range_of_motion=_finite_or_none(rom.max()),
            peak_abs_torque=float(peak.max()),
            range_of_motion_json=_per_joint(joints, rom),
            peak_abs_torque_json=_per_joint(joints, peak),
        )
        stiffness = arrays["stiffness"]
        if stiffness is not None:
            estimated = ~np.isnan(stiffness)
            low = np.where(estimated, stiffness, np.inf).min(axis=0)
            high = np.where(estimated, stiffness, -np.inf).max(axis=0)
            summary.update(
                stiffness_min=_finite_or_none(low.min()),
                stiffness_max=_finite_or_none(high.max()),
                stiffness_min_json=_per_joint(joints, low),
                stiffness_max_json=_per_joint(joints, high),
            )
    assignments = ", ".join(f"{name} = ?" for name in summary)
    conn.execute(
        f"UPDATE demonstrations SET {assignments}, updated_at = ? WHERE id = ?",
        (*summary.values(), time.time(), demo_id),
    )
