"""Curation of stored demonstrations: marking a status, deleting, discarding a failed recording,
merging another store file in (see ``merge``), and verifying every stored sample."""

from __future__ import annotations

import os
import time

from compliant_demo.exceptions import InvalidInputError, NotFoundError, StoreError
from compliant_demo.store import _codec, _samples, _verdicts
from compliant_demo.store._recording import FINAL_STATUSES, status_of
from compliant_demo.store._rows import choice
from compliant_demo.store._session import StoreSession
from compliant_demo.store.merge import merge_into
from compliant_demo.store.records import MergeReport

__all__ = ["mark_status", "delete", "discard", "merge_from", "integrity_problems", "verify"]


def mark_status(session: StoreSession, demo_id: str, status: str, reason: str | None) -> None:
    """Set a finished demonstration's status; a recording one or an empty "complete" is refused."""
    choice("status", status, FINAL_STATUSES)
    if reason is not None:
        _codec.validate_text("reason", reason)
    with session.transaction() as conn:
        current = status_of(session, conn, demo_id)
        if current == "recording":
            raise StoreError(
                f"demonstration {demo_id!r} is still 'recording': finish it before marking it"
            )
        if status == "complete":
            (n_samples,) = conn.execute(
                "SELECT n_samples FROM demonstrations WHERE id = ?", (demo_id,)
            ).fetchone()
            if n_samples == 0:
                raise InvalidInputError(
                    f"demonstration {demo_id!r} has no samples: status 'complete' refused"
                )
        conn.execute(
            "UPDATE demonstrations SET status = ?, status_reason = ?, updated_at = ? WHERE id = ?",
            (status, reason, time.time(), demo_id),
        )


def delete(session: StoreSession, demo_id: str, *, force: bool) -> None:
    """Delete a finished demonstration (one that skills name only with ``force``)."""
    with session.transaction() as conn:
        current = status_of(session, conn, demo_id)
        if current == "recording":
            raise StoreError(
                f"demonstration {demo_id!r} is still 'recording': refusing to delete it"
            )
        users = conn.execute(
            "SELECT DISTINCT s.name, s.version FROM skill_demonstrations p JOIN skills s "
            "ON s.id = p.skill_id WHERE p.demo_id = ? ORDER BY s.name, s.version",
            (demo_id,),
        ).fetchall()
        if users and not force:
            used = ", ".join(f"{name} v{version}" for name, version in users)
            raise StoreError(
                f"demonstration {demo_id!r} is provenance of skill(s) {used}; "
                "pass force=True to delete it anyway"
            )
        conn.execute("DELETE FROM demonstrations WHERE id = ?", (demo_id,))
    session.layouts.pop(demo_id, None)


def discard(session: StoreSession, demo_id: str) -> None:
    """Delete a demonstration this session is still recording; any other one is refused."""
    with session.transaction() as conn:
        row = conn.execute(
            "SELECT status, writer_token FROM demonstrations WHERE id = ?", (demo_id,)
        ).fetchone()
        if row is None:
            raise NotFoundError(f"demonstration {demo_id!r} not found in {session.label}")
        if row[0] != "recording" or row[1] is None or row[1] != session.lease_token:
            raise StoreError(
                f"demonstration {demo_id!r} ({row[0]!r}) is not being recorded by this store "
                "object: refusing to discard it"
            )
        conn.execute("DELETE FROM demonstrations WHERE id = ?", (demo_id,))
    session.layouts.pop(demo_id, None)


def merge_from(session: StoreSession, other_path: str | os.PathLike[str]) -> MergeReport:
    """Merge the store file ``other_path`` (opened read-only) into this session's store."""
    if session.same_file(other_path):
        raise InvalidInputError(f"cannot merge store {str(other_path)!r} into itself")
    source = StoreSession(other_path, read_only=True, busy_timeout_s=5.0, create=False,
                          durable=True)  # fmt: skip
    try:
        return merge_into(session, source)
    finally:
        source.close()


def integrity_problems(session: StoreSession) -> list[str]:
    """``PRAGMA integrity_check`` and ``foreign_key_check``; ``["ok"]`` for a sound file."""
    with session.snapshot() as conn:
        result = [row[0] for row in conn.execute("PRAGMA integrity_check")]
        dangling = conn.execute("PRAGMA foreign_key_check").fetchall()
    return result + [f"dangling reference: {row}" for row in dangling]


def verify(session: StoreSession) -> list[str]:
    """Every finding in the store: SQLite's own checks, then every chunk of every demonstration
    read and checked against its metadata, then every verdict read back (one line each, ``[]``
    for a sound store)."""
    problems = integrity_problems(session)
    findings = [] if problems == ["ok"] else [f"file: {problem}" for problem in problems]
    with session.snapshot() as conn:
        ids = [row[0] for row in conn.execute("SELECT id FROM demonstrations ORDER BY id")]
    for demo_id in ids:
        with session.snapshot() as conn:
            rows = _samples.chunk_rows(conn, demo_id)
            try:
                meta = _samples.demonstration_layout(conn, demo_id)
            except StoreError:  # deleted since it was listed
                continue
        found = _samples.sample_findings(rows, meta)
        findings += [f"demonstration {demo_id}: {finding}" for finding in found]
    return findings + _verdicts.damaged_verdicts(session)
