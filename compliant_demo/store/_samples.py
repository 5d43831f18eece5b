"""Reading a demonstration's samples back from its chunks (with every check of the stored bytes)
and recomputing its summary columns from them; used by the store and by the migrations."""

from __future__ import annotations

import hashlib
import json
import sqlite3
import time
from collections.abc import Sequence

import numpy as np

from compliant_demo.exceptions import StoreCorruptError
from compliant_demo.store._codec import CHANNELS, from_blobs

__all__ = [
    "chunk_digest",
    "chunk_rows",
    "demonstration_layout",
    "sample_findings",
    "read_samples",
    "refresh_summary",
]

_LENGTH = 8  # bytes of each little-endian length and index in the digested text


def chunk_digest(seq: int, n: int, blobs: Sequence[bytes | None]) -> bytes:
    """SHA-256 (FIPS 180-4) of one chunk: ``seq`` and ``n`` as little-endian 64-bit integers,
    then for each blob ``(t, position, velocity, torque, stiffness)`` its length in bytes
    (little-endian 64-bit, 0 for an absent blob) followed by its bytes.

    Order-sensitive, so moved words, cut or swapped blobs and a chunk stored under another
    ``seq`` all change it.
    """
    digest = hashlib.sha256()
    digest.update(seq.to_bytes(_LENGTH, "little", signed=True))
    digest.update(n.to_bytes(_LENGTH, "little", signed=True))
    for blob in blobs:
        data = blob or b""
        digest.update(len(data).to_bytes(_LENGTH, "little"))
        digest.update(data)
    return digest.digest()


def _sizes(row: tuple) -> list[int]:
    return [len(b) if isinstance(b, bytes) else (0 if b is None else -1) for b in row[4:9]]


def _chunk_findings(row: tuple, n_joints: int, has_stiffness: bool) -> list[str]:
    """What is wrong with one chunk row ``(seq, n, t_first, t_last, t, position, velocity,
    torque, stiffness, digest)`` on its own."""
    seq, n, t_first, t_last, t, *channels, digest = row
    sizes = _sizes(row)
    expected = [8 * n] + [8 * n * n_joints] * 3 + [8 * n * n_joints if has_stiffness else 0]
    if sizes != expected:
        return [f"chunk {seq} has blobs of {sizes} bytes, expected {expected} for {n} samples"]
    if not digest:
        return [f"chunk {seq} was found damaged when the store was migrated (no digest)"]
    if chunk_digest(seq, n, [t, *channels]) != digest:
        return [f"chunk {seq} fails its SHA-256 digest (damaged or moved bytes)"]
    times = from_blobs([t], None)
    if (float(times[0]), float(times[-1])) != (t_first, t_last):
        return [f"chunk {seq} time bounds {t_first!r}..{t_last!r} do not match its samples"]
    return []


def sample_findings(
    rows: Sequence[tuple], meta: tuple[int, bool, int, float | None, float | None]
) -> list[str]:
    """Every disagreement between a demonstration's chunk rows (in ``seq`` order, as selected
    by :func:`read_samples`) and its metadata ``(n_joints, has_stiffness, n_samples, t_first,
    t_last)``: missing or extra chunks, sample counts, blob sizes, digests, time order."""
    n_joints, has_stiffness, n_samples, t_first, t_last = meta
    findings = []
    seqs = [row[0] for row in rows]
    if seqs != list(range(len(rows))):
        missing = sorted(set(range(max(seqs, default=-1) + 1)) - set(seqs))
        findings.append(
            f"chunk sequence is {_span(seqs)}, expected 0..{len(rows) - 1}"
            + (f" (missing {', '.join(map(str, missing))})" if missing else "")
        )
    stored = sum(row[1] for row in rows)
    if stored != n_samples:
        findings.append(f"chunks hold {stored} samples, the demonstration says {n_samples}")
    for row in rows:
        findings += _chunk_findings(row, n_joints, has_stiffness)
    for before, after in zip(rows, rows[1:], strict=False):
        if not after[2] > before[3]:
            findings.append(
                f"time goes backwards from chunk {before[0]} (t = {before[3]!r}) to chunk "
                f"{after[0]} (t = {after[2]!r})"
            )
    if rows and (rows[0][2], rows[-1][3]) != (t_first, t_last):
        findings.append(
            f"chunks span t = {rows[0][2]!r}..{rows[-1][3]!r}, the demonstration says "
            f"{t_first!r}..{t_last!r}"
        )
    return findings


def _span(seqs: list[int]) -> str:
    return "empty" if not seqs else ", ".join(map(str, seqs[:8])) + (", ..." if seqs[8:] else "")


def demonstration_layout(
    conn: sqlite3.Connection, demo_id: str
) -> tuple[int, bool, int, float | None, float | None]:
    """``(n_joints, has_stiffness, n_samples, t_first, t_last)`` of a stored demonstration."""
    row = conn.execute(
        "SELECT n_joints, has_stiffness, n_samples, t_first, t_last FROM demonstrations "
        "WHERE id = ?",
        (demo_id,),
    ).fetchone()
    if row is None:
        raise StoreCorruptError(f"demonstration {demo_id!r} has no metadata row")
    return int(row[0]), bool(row[1]), int(row[2]), row[3], row[4]


def chunk_rows(conn: sqlite3.Connection, demo_id: str, *, verify: bool = True) -> list[tuple]:
    """The chunk rows of a demonstration in ``seq`` order, as :func:`sample_findings` takes them
    (without the digest column when ``verify`` is off, for layouts older than version 6)."""
    return conn.execute(
        "SELECT seq, n, t_first, t_last, t, position, velocity, torque, stiffness"
        f"{', digest' if verify else ''} FROM chunks WHERE demo_id = ? ORDER BY seq",
        (demo_id,),
    ).fetchall()


def read_samples(
    conn: sqlite3.Connection,
    demo_id: str,
    *,
    label: str = "store",
    verify: bool = True,
) -> tuple[np.ndarray, dict[str, np.ndarray | None]]:
    """All samples of one demonstration: ``t`` (n,) and channel arrays (n, n_joints).

    One SELECT over the demonstration's chunks; each channel is one join of blobs and one
    ``np.frombuffer``, so the arrays are read-only views of fresh memory. Unless ``verify`` is
    off (for layouts older than version 6), everything :func:`sample_findings` checks is checked.

    Raises
    ------
    StoreCorruptError
        The chunks disagree with each other or with the demonstration's metadata; the message
        names the first finding.
    """
    meta = demonstration_layout(conn, demo_id)
    n_joints, has_stiffness = meta[0], meta[1]
    rows = chunk_rows(conn, demo_id, verify=verify)
    if verify:
        findings = sample_findings(rows, meta)
        if findings:
            more = f" (and {len(findings) - 1} more finding(s))" if len(findings) > 1 else ""
            raise StoreCorruptError(
                f"{label}: demonstration {demo_id!r}: {findings[0]}{more}; damaged file, "
                "nothing loaded"
            )
    if not rows:
        empty = np.empty((0, n_joints))
        return np.empty(0), {
            name: (empty if name != "stiffness" or has_stiffness else None) for name in CHANNELS
        }
    columns = list(zip(*rows, strict=True))
    t = from_blobs(columns[4], None)
    arrays: dict[str, np.ndarray | None] = {}
    for name, blobs in zip(CHANNELS, columns[5:9], strict=True):
        arrays[name] = (
            from_blobs(blobs, n_joints) if (name != "stiffness" or has_stiffness) else None
        )
    return t, arrays


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
    (joints_json,) = conn.execute(
        "SELECT joints FROM demonstrations WHERE id = ?", (demo_id,)
    ).fetchone()
    joints = json.loads(joints_json)
    t, arrays = read_samples(conn, demo_id, label=label, verify=verify)
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
