"""Writer leases and recording: beginning a demonstration, appending chunks of samples, finishing
it, and recovering the recordings of writers that are gone (see ``_lease``)."""

from __future__ import annotations

import json
import time
import uuid
import warnings
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from compliant_demo.exceptions import InvalidInputError, NotFoundError, StoreError
from compliant_demo.store import _codec, _samples, _sql
from compliant_demo.store._lease import ABANDONED_TOKENS, Lease, lease_alive, own_lease
from compliant_demo.store._rows import choice, decoded, finite, timestamp, uuid_text
from compliant_demo.store._session import StoreSession
from compliant_demo.store.records import DEMO_SOURCES

__all__ = [
    "CHUNK_SAMPLES",
    "FINAL_STATUSES",
    "recover_dead_writers",
    "release_on_close",
    "begin",
    "layout",
    "validated_chunk",
    "append",
    "finish",
    "end_recording",
    "status_of",
    "merge_flags",
]

# add_demonstration splits long recordings into chunks of this many samples: rows stay a few
# MiB, loading stays one SELECT.
CHUNK_SAMPLES = 8192
FINAL_STATUSES = ("complete", "incomplete", "rejected")


def _writer_alive(
    token: str, pid: int, hostname: str, process_start: float | None, heartbeat: float
) -> bool:
    """Whether the writer holding lease ``token`` may still be recording."""
    if token in ABANDONED_TOKENS:
        return False
    return lease_alive(Lease(pid, hostname, process_start), heartbeat)


def _lease(session: StoreSession, conn: Any) -> str:
    now = time.time()
    if session.lease_token is not None:
        updated = conn.execute(
            "UPDATE writers SET heartbeat_at = ? WHERE token = ?", (now, session.lease_token)
        ).rowcount
        if updated:
            return session.lease_token
    # no lease yet, or the transaction that registered it was rolled back (e.g. disk full)
    me = own_lease()
    token = session.lease_token or str(uuid.uuid4())
    conn.execute(
        "INSERT INTO writers (token, pid, hostname, process_start, started_at, "
        "heartbeat_at) VALUES (?, ?, ?, ?, ?, ?)",
        (token, me.pid, me.hostname, me.process_start, now, now),
    )
    session.lease_token = token
    return token


def _release_lease(session: StoreSession, conn: Any, reason: str) -> None:
    for (demo_id,) in conn.execute(
        "SELECT id FROM demonstrations WHERE status = 'recording' AND writer_token = ?",
        (session.lease_token,),
    ).fetchall():
        end_recording(session, conn, demo_id, "incomplete", reason)
    conn.execute("DELETE FROM writers WHERE token = ?", (session.lease_token,))
    session.lease_token = None


def release_on_close(session: StoreSession) -> None:
    """End this session's recordings as "incomplete" and release its lease; on a full disk, a
    read-only or busy file only warn, since a close must always close (the recordings are
    recovered as "incomplete" on a later open)."""
    token = session.lease_token
    if token is None:
        return
    try:
        with session.transaction() as conn:
            _release_lease(session, conn, "store closed while recording")
    except StoreError as exc:
        ABANDONED_TOKENS.add(token)
        session.lease_token = None
        warnings.warn(
            f"{session.label}: closed without ending this writer's recordings ({exc}); the "
            f"next writable open marks them incomplete",
            stacklevel=3,
        )


def recover_dead_writers(session: StoreSession) -> list[str]:
    """Mark "incomplete" every recording demonstration whose writer process is gone; their ids."""
    recovered = []
    with session.transaction() as conn:
        rows = conn.execute(
            "SELECT d.id, w.token, w.pid, w.hostname, w.process_start, w.heartbeat_at "
            "FROM demonstrations d LEFT JOIN writers w ON w.token = d.writer_token "
            "WHERE d.status = 'recording'"
        ).fetchall()
        for demo_id, token, pid, hostname, process_start, heartbeat in rows:
            if token == session.lease_token and token is not None:
                continue
            if token is not None and _writer_alive(token, pid, hostname, process_start, heartbeat):
                continue
            who = f"pid {pid} on {hostname}" if token is not None else "an unknown process"
            end_recording(session, conn, demo_id, "incomplete", f"writer {who} is gone")
            recovered.append(demo_id)
        for token, pid, hostname, process_start, heartbeat in conn.execute(
            "SELECT token, pid, hostname, process_start, heartbeat_at FROM writers"
        ).fetchall():
            if token != session.lease_token and not _writer_alive(
                token, pid, hostname, process_start, heartbeat
            ):
                conn.execute("DELETE FROM writers WHERE token = ?", (token,))
                ABANDONED_TOKENS.discard(token)
    if recovered:
        warnings.warn(
            f"{session.label}: {len(recovered)} demonstration(s) left recording by a writer "
            f"that is gone were marked incomplete: {', '.join(recovered)}",
            stacklevel=3,
        )
    return recovered


def begin(session: StoreSession, conn: Any, fields: Mapping[str, Any]) -> str:
    """Insert a demonstration from the complete keyword set of ``begin_demonstration``."""
    skill, joints, operator, tags, notes, source = (
        fields[k] for k in ("skill", "joints", "operator", "tags", "notes", "source")
    )
    nominal_rate_hz, start_time, with_stiffness, demo_id = (
        fields[k] for k in ("nominal_rate_hz", "start_time", "with_stiffness", "demo_id")
    )
    _codec.validate_text("skill", skill, allow_empty=False)
    names = _codec.validate_joints(joints)
    _codec.validate_text("operator", operator)
    _codec.validate_text("notes", notes)
    if isinstance(tags, str) or not isinstance(tags, Sequence):
        raise InvalidInputError(f"tags must be a sequence of strings, got {tags!r}")
    tag_list = list(dict.fromkeys(_codec.validate_text("tag", t, allow_empty=False) for t in tags))
    choice("source", source, DEMO_SOURCES)
    rate = finite("nominal_rate_hz", nominal_rate_hz, positive=True)
    start = time.time() if start_time is None else timestamp("start_time", start_time)
    if not isinstance(with_stiffness, (bool, np.bool_)):
        raise InvalidInputError(f"with_stiffness must be True or False, got {with_stiffness!r}")
    new_id = str(uuid.uuid4()) if demo_id is None else uuid_text("demo_id", demo_id)
    if conn.execute("SELECT 1 FROM demonstrations WHERE id = ?", (new_id,)).fetchone():
        raise InvalidInputError(f"demo_id {new_id!r} already exists in {session.label}")
    now = time.time()
    conn.execute(
        "INSERT INTO demonstrations (id, skill, operator, tags, notes, source, joints, "
        "n_joints, nominal_rate_hz, start_time, status, has_stiffness, writer_token, "
        "created_at, updated_at) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, 'recording', ?, ?, ?, ?)",
        (new_id, skill, operator, json.dumps(tag_list), notes, source, json.dumps(names),
         len(names), rate, start, int(bool(with_stiffness)), _lease(session, conn), now, now),
    )  # fmt: skip
    conn.executemany(
        "INSERT INTO demonstration_tags (demo_id, tag) VALUES (?, ?)",
        [(new_id, tag) for tag in tag_list],
    )
    return new_id


def layout(session: StoreSession, conn: Any, demo_id: str) -> tuple[int, bool]:
    """(n_joints, has_stiffness) of a demonstration; both never change, so they are cached."""
    known = session.layouts.get(demo_id)
    if known is None:
        row = conn.execute(
            "SELECT n_joints, has_stiffness FROM demonstrations WHERE id = ?", (demo_id,)
        ).fetchone()
        if row is None:
            raise NotFoundError(f"demonstration {demo_id!r} not found in {session.label}")
        known = (int(row[0]), bool(row[1]))
        session.layouts[demo_id] = known
    return known


def validated_chunk(
    session: StoreSession, demo_id: str, t: object, channels: Mapping[str, object | None]
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Samples for ``append_chunk`` checked against the demonstration's layout."""
    with session.lock, _sql.translated(session.label):
        n_joints, has_stiffness = layout(session, session.open_connection(), demo_id)
    return _codec.validate_chunk(t, channels, n_joints=n_joints, with_stiffness=has_stiffness)


def append(
    session: StoreSession,
    conn: Any,
    demo_id: str,
    times: np.ndarray,
    arrays: Mapping[str, np.ndarray],
) -> int:
    """Insert one validated chunk after the stored ones; the new sample count."""
    row = conn.execute(
        "SELECT status, t_first, n_samples FROM demonstrations WHERE id = ?", (demo_id,)
    ).fetchone()
    if row is None:  # deleted by another store object since its layout was cached
        raise NotFoundError(f"demonstration {demo_id!r} not found in {session.label}")
    status, t_first, n_samples = row
    if status != "recording":
        raise StoreError(
            f"demonstration {demo_id!r} is {status!r}, not 'recording': cannot append samples"
        )
    last = conn.execute(
        "SELECT seq, t_last FROM chunks WHERE demo_id = ? ORDER BY seq DESC LIMIT 1",
        (demo_id,),
    ).fetchone()
    seq = 0 if last is None else last[0] + 1
    if last is not None and not times[0] > last[1]:
        raise InvalidInputError(
            f"t[0] = {float(times[0])!r} is not after the last stored time stamp "
            f"{last[1]!r} of demonstration {demo_id!r}"
        )
    stiffness = arrays.get("stiffness")
    blobs = [
        _codec.to_blob(times),
        *(_codec.to_blob(arrays[name]) for name in ("position", "velocity", "torque")),
        None if stiffness is None else _codec.to_blob(stiffness),
    ]
    conn.execute(
        "INSERT INTO chunks (demo_id, seq, n, t_first, t_last, t, position, velocity, torque, "
        "stiffness, digest) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        (demo_id, seq, times.size, float(times[0]), float(times[-1]), *blobs,
         _samples.chunk_digest(seq, times.size, blobs)),
    )  # fmt: skip
    first = float(times[0]) if t_first is None else t_first
    total = n_samples + times.size
    conn.execute(
        "UPDATE demonstrations SET n_samples = ?, t_first = ?, t_last = ?, duration_s = ?, "
        "updated_at = ? WHERE id = ?",
        (total, first, float(times[-1]), float(times[-1]) - first, time.time(), demo_id),
    )
    if session.lease_token is not None:
        conn.execute(
            "UPDATE writers SET heartbeat_at = ? WHERE token = ?",
            (time.time(), session.lease_token),
        )
    return int(total)


def finish(
    session: StoreSession, conn: Any, demo_id: str, status: str, flags: dict[str, Any] | None
) -> None:
    """End a recording with a final status and merged flags (inside ``conn``'s transaction)."""
    if flags:
        merge_flags(session, conn, demo_id, flags)
    (n_samples,) = conn.execute(
        "SELECT n_samples FROM demonstrations WHERE id = ?", (demo_id,)
    ).fetchone()
    if status == "complete" and n_samples == 0:
        raise InvalidInputError(
            f"demonstration {demo_id!r} has no samples: status 'complete' refused "
            "(finish it as 'incomplete' or delete it)"
        )
    end_recording(session, conn, demo_id, status, None)


def end_recording(
    session: StoreSession, conn: Any, demo_id: str, status: str, reason: str | None
) -> None:
    """Compute the summary columns, set the final status and drop the writer."""
    _samples.refresh_summary(conn, demo_id, label=session.label)
    conn.execute(
        "UPDATE demonstrations SET status = ?, status_reason = ?, writer_token = NULL WHERE id = ?",
        (status, reason, demo_id),
    )


def status_of(session: StoreSession, conn: Any, demo_id: str) -> str:
    """A demonstration's status, or NotFoundError."""
    row = conn.execute("SELECT status FROM demonstrations WHERE id = ?", (demo_id,)).fetchone()
    if row is None:
        raise NotFoundError(f"demonstration {demo_id!r} not found in {session.label}")
    return str(row[0])


def merge_flags(session: StoreSession, conn: Any, demo_id: str, flags: dict[str, Any]) -> None:
    """Merge checked ``flags`` into the stored ones (a key's new value replaces the old one)."""
    (text,) = conn.execute("SELECT flags FROM demonstrations WHERE id = ?", (demo_id,)).fetchone()
    stored = decoded(session.label, f"demonstration {demo_id!r}", lambda: json.loads(text))
    conn.execute(
        "UPDATE demonstrations SET flags = ?, updated_at = ? WHERE id = ?",
        (json.dumps({**stored, **flags}, sort_keys=True), time.time(), demo_id),
    )
