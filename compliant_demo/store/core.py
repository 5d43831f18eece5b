"""The demonstration store: one SQLite file (WAL mode) holding demonstrations as chunks of
little-endian float64 columns with per-demonstration summary columns, learned skills with
provenance, and replay results with their traces. Built on sqlite-utils (``store.db``)."""

from __future__ import annotations

import inspect
import json
import math
import os
import sqlite3
import threading
import time
import uuid
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from datetime import datetime
from functools import partial
from pathlib import Path
from types import TracebackType
from typing import TYPE_CHECKING, Any, TypeVar

import numpy as np
import sqlite_utils

from compliant_demo.exceptions import (
    InvalidInputError,
    NotFoundError,
    StoreCorruptError,
    StoreError,
    StoreReadOnlyError,
)
from compliant_demo.store import _codec, _schema, _sql
from compliant_demo.store._lease import ABANDONED_TOKENS, Lease, lease_alive, own_lease
from compliant_demo.store.records import (
    DEMO_SOURCES,
    DEMO_STATUSES,
    CampaignInfo,
    Demonstration,
    DemonstrationInfo,
    MergeReport,
    ReplayResult,
    ReplayResultInfo,
    SkillRecord,
)

if TYPE_CHECKING:
    import pandas

__all__ = ["DemoStore", "CHUNK_SAMPLES"]

_T = TypeVar("_T")

# add_demonstration splits long recordings into chunks of this many samples: rows stay a few
# MiB, loading stays one SELECT.
CHUNK_SAMPLES = 8192

# Scalar columns, then the seven JSON columns joined into one JSON array in SQL, so that a
# query result is decoded by a single json.loads (7 per row were most of the time of a find).
_INFO_COLUMNS = (
    "id, skill, operator, notes, source, nominal_rate_hz, start_time, status, status_reason, "
    "has_stiffness, n_samples, duration_s, mean_rate_hz, created_at, updated_at, "
    "'[' || tags || ',' || joints || ',' || range_of_motion_json || ',' || peak_abs_torque_json "
    "|| ',' || stiffness_min_json || ',' || stiffness_max_json || ',' || flags || ']'"
)
_FINAL_STATUSES = ("complete", "incomplete", "rejected")
_FILTER_KEYWORDS = frozenset(
    ("skill", "operator", "tag", "status", "source", "started_after", "started_before",
     "min_duration_s", "where", "where_args")
)  # fmt: skip
_RESULT_COLUMNS = (
    "r.id, r.skill_id, r.campaign_id, r.scenario_index, r.status, r.reason, r.metrics, "
    "r.parameters, r.created, (SELECT json_group_array(channel) FROM "
    "(SELECT channel FROM replay_traces WHERE result_id = r.id ORDER BY channel))"
)


def _writer_alive(
    token: str, pid: int, hostname: str, process_start: float | None, heartbeat: float
) -> bool:
    """Whether the writer holding lease ``token`` may still be recording."""
    if token in ABANDONED_TOKENS:
        return False
    return lease_alive(Lease(pid, hostname, process_start), heartbeat)


def _decoded(label: str, what: str, build: Callable[[], _T]) -> _T:
    """``build()``, with damaged stored JSON (or arrays) reported as StoreCorruptError."""
    try:
        return build()
    except (ValueError, TypeError, KeyError) as exc:  # JSONDecodeError is a ValueError
        raise StoreCorruptError(f"{label}: {what} has damaged stored data: {exc}") from None


def _infos_from_rows(rows: Sequence[Sequence[Any]], label: str) -> list[DemonstrationInfo]:
    try:
        documents = json.loads("[" + ",".join(row[15] for row in rows) + "]")
    except (ValueError, TypeError):
        for row in rows:  # find the damaged row to name it
            _decoded(label, f"demonstration {row[0]!r}", partial(json.loads, row[15]))
        raise
    return [
        DemonstrationInfo(
            id=row[0],
            skill=row[1],
            operator=row[2],
            notes=row[3],
            source=row[4],
            nominal_rate_hz=row[5],
            start_time=row[6],
            status=row[7],
            status_reason=row[8],
            has_stiffness=bool(row[9]),
            n_samples=row[10],
            duration_s=row[11],
            mean_rate_hz=row[12],
            created_at=row[13],
            updated_at=row[14],
            tags=tuple(tags),
            joints=tuple(joints),
            range_of_motion=rom,
            peak_abs_torque=peak,
            stiffness_min=k_min,
            stiffness_max=k_max,
            flags=flags,
        )
        for row, (tags, joints, rom, peak, k_min, k_max, flags) in zip(rows, documents, strict=True)
    ]


def _checked_infos(rows: Sequence[Sequence[Any]], label: str) -> list[DemonstrationInfo]:
    return _decoded(label, "a demonstration row", lambda: _infos_from_rows(rows, label))


def _build_skill(row: Sequence[Any]) -> SkillRecord:
    return SkillRecord(
        id=row[0],
        name=row[1],
        version=row[2],
        payload=_codec.loads(row[3]),
        parameters=_codec.loads(row[4]),
        created=row[5],
        demonstration_ids=tuple(json.loads(row[6])),
    )


def _result_from_row(row: Sequence[Any], label: str) -> ReplayResultInfo:
    return _decoded(label, f"replay result {row[0]!r}", lambda: _build_result(row))


def _build_result(row: Sequence[Any]) -> ReplayResultInfo:
    return ReplayResultInfo(
        id=row[0],
        skill_id=row[1],
        campaign_id=row[2],
        scenario_index=row[3],
        status=row[4],
        reason=row[5],
        metrics=_codec.loads(row[6]),
        parameters=_codec.loads(row[7]),
        created=row[8],
        trace_channels=tuple(json.loads(row[9])),
    )


def _finite(name: str, value: object, *, positive: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)):
        raise InvalidInputError(f"{name} must be a number, got {value!r}")
    number = float(value)
    if not math.isfinite(number) or (positive and number <= 0):
        raise InvalidInputError(
            f"{name} must be a finite{' positive' if positive else ''} number, got {value!r}"
        )
    return number


def _timestamp(name: str, value: float | datetime) -> float:
    return value.timestamp() if isinstance(value, datetime) else _finite(name, value)


def _texts(name: str, value: object) -> list[str]:
    """One string or a sequence of strings, as a list."""
    if isinstance(value, str):
        return [value]
    if not isinstance(value, (list, tuple)):
        raise InvalidInputError(f"{name} must be a string or a list of strings, got {value!r}")
    return [_codec.validate_text(name, one) for one in value]


def _choice(name: str, value: object, allowed: Sequence[str]) -> str:
    if value not in allowed:
        raise InvalidInputError(f"{name} must be one of {', '.join(allowed)}; got {value!r}")
    return str(value)


def _uuid(name: str, value: object) -> str:
    try:
        return str(uuid.UUID(str(value)))
    except ValueError:
        raise InvalidInputError(f"{name} must be a UUID string, got {value!r}") from None


def _mapping(name: str, value: object) -> dict[str, Any]:
    if not isinstance(value, Mapping):
        raise InvalidInputError(f"{name} must be a mapping, got {type(value).__name__}")
    return dict(value)


class DemoStore:
    """A demonstration store in one SQLite file, or in memory.

    Parameters
    ----------
    path : str or path-like, default ":memory:"
        Store file. A missing file is created (mode 0o640) unless ``read_only`` or not ``create``.
    read_only : bool
        Open without write access; writes raise StoreReadOnlyError.
    busy_timeout_s : float, s
        How long a write waits for another writer before raising StoreBusyError.
    create : bool
        Create the file when missing (otherwise NotFoundError).
    durable : bool
        Sync every commit to disk (SQLite ``synchronous=FULL``), so a committed chunk survives a
        power cut. ``False`` (``NORMAL``) still survives a crash of the writing process and is
        faster for bulk work.
    query_timeout_s : float, s
        How long a query with a caller's raw SQL ``where`` may run before it is stopped and
        refused with InvalidInputError (such a condition can otherwise run for hours inside
        SQLite, where no signal reaches it).

    Notes
    -----
    Opening writable creates or migrates the schema and turns every demonstration still
    "recording" whose writer process is gone into "incomplete" (see ``_lease``). One object may
    be shared between threads; its calls are serialised.
    """

    def __init__(
        self,
        path: str | os.PathLike[str] = ":memory:",
        *,
        read_only: bool = False,
        busy_timeout_s: float = 5.0,
        create: bool = True,
        durable: bool = True,
        query_timeout_s: float = 10.0,
    ) -> None:
        self.read_only = bool(read_only)
        self.query_timeout_s = _finite("query_timeout_s", query_timeout_s, positive=True)
        self._label = f"store {str(path)!r}"
        self._lock = threading.RLock()
        self._lease_token: str | None = None
        self._meta_cache: dict[str, tuple[int, bool]] = {}
        self._conn, self.path = _sql.connect(
            path,
            read_only=self.read_only,
            busy_timeout_s=busy_timeout_s,
            create=create,
            durable=durable,
        )
        self.db = sqlite_utils.Database(self._conn)
        try:
            with _sql.translated(self._label):
                self.schema_version = _schema.ensure_schema(
                    self._conn, writable=not self.read_only, label=self._label
                )
            if not self.read_only:
                self.recover_dead_writers()
        except BaseException:
            self._conn.close()
            raise

    # -- life cycle -------------------------------------------------------------------------

    def __enter__(self) -> DemoStore:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"DemoStore({str(self.path) if self.path else ':memory:'!r})"

    def close(self) -> None:
        """Close the store; demonstrations this object was still recording become "incomplete"."""
        with self._lock:
            if self._conn is None:
                return
            try:
                if self._lease_token is not None:
                    self._release_lease_on_close()
            finally:
                self._conn.close()
                self._conn = None  # type: ignore[assignment]

    def _release_lease_on_close(self) -> None:
        """Release the writer lease; on a full disk, a read-only or busy file only warn, since a
        close must always close (the recordings are recovered as "incomplete" on a later open)."""
        token = self._lease_token
        try:
            with self._transaction() as conn:
                self._release_lease(conn, "store closed while recording")
        except StoreError as exc:
            ABANDONED_TOKENS.add(str(token))
            self._lease_token = None
            warnings.warn(
                f"{self._label}: closed without ending this writer's recordings ({exc}); the "
                f"next writable open marks them incomplete",
                stacklevel=3,
            )

    @contextmanager
    def _transaction(self) -> Iterator[Any]:
        if self.read_only:
            raise StoreReadOnlyError(f"{self._label} is open read-only")
        with self._lock, _sql.translated(self._label):
            self._check_open()
            self._conn.execute("BEGIN IMMEDIATE")
            try:
                yield self._conn
                self._conn.execute("COMMIT")
            except BaseException:
                # SQLITE_FULL, IOERR, NOMEM and BUSY may already have rolled the transaction back;
                # a second ROLLBACK would replace the real error with "no transaction is active"
                if self._conn.in_transaction:
                    self._conn.execute("ROLLBACK")
                raise

    @contextmanager
    def _snapshot(self) -> Iterator[Any]:
        """A read transaction: every statement inside sees the same state of the file."""
        with self._lock, _sql.translated(self._label):
            self._check_open()
            self._conn.execute("BEGIN")
            try:
                yield self._conn
            finally:
                self._conn.execute("COMMIT")

    def _check_open(self) -> None:
        if self._conn is None:
            raise StoreError(f"{self._label} is closed")

    def integrity_check(self) -> list[str]:
        """``PRAGMA integrity_check`` and ``foreign_key_check``; ``["ok"]`` for a sound file."""
        with self._snapshot() as conn:
            result = [row[0] for row in conn.execute("PRAGMA integrity_check")]
            dangling = conn.execute("PRAGMA foreign_key_check").fetchall()
        return result + [f"dangling reference: {row}" for row in dangling]

    # -- writer leases ----------------------------------------------------------------------

    def _lease(self, conn: Any) -> str:
        now = time.time()
        if self._lease_token is not None:
            updated = conn.execute(
                "UPDATE writers SET heartbeat_at = ? WHERE token = ?", (now, self._lease_token)
            ).rowcount
            if updated:
                return self._lease_token
        # no lease yet, or the transaction that registered it was rolled back (e.g. disk full)
        me = own_lease()
        token = self._lease_token or str(uuid.uuid4())
        conn.execute(
            "INSERT INTO writers (token, pid, hostname, process_start, started_at, "
            "heartbeat_at) VALUES (?, ?, ?, ?, ?, ?)",
            (token, me.pid, me.hostname, me.process_start, now, now),
        )
        self._lease_token = token
        return token

    def _release_lease(self, conn: Any, reason: str) -> None:
        for (demo_id,) in conn.execute(
            "SELECT id FROM demonstrations WHERE status = 'recording' AND writer_token = ?",
            (self._lease_token,),
        ).fetchall():
            self._end_recording(conn, demo_id, "incomplete", reason)
        conn.execute("DELETE FROM writers WHERE token = ?", (self._lease_token,))
        self._lease_token = None

    def recover_dead_writers(self) -> list[str]:
        """Mark "incomplete" every recording demonstration whose writer process is gone.

        Returns
        -------
        list of str
            Ids of the demonstrations that were recovered.
        """
        recovered = []
        with self._transaction() as conn:
            rows = conn.execute(
                "SELECT d.id, w.token, w.pid, w.hostname, w.process_start, w.heartbeat_at "
                "FROM demonstrations d LEFT JOIN writers w ON w.token = d.writer_token "
                "WHERE d.status = 'recording'"
            ).fetchall()
            for demo_id, token, pid, hostname, process_start, heartbeat in rows:
                if token == self._lease_token and token is not None:
                    continue
                if token is not None and _writer_alive(
                    token, pid, hostname, process_start, heartbeat
                ):
                    continue
                who = f"pid {pid} on {hostname}" if token is not None else "an unknown process"
                self._end_recording(conn, demo_id, "incomplete", f"writer {who} is gone")
                recovered.append(demo_id)
            for token, pid, hostname, process_start, heartbeat in conn.execute(
                "SELECT token, pid, hostname, process_start, heartbeat_at FROM writers"
            ).fetchall():
                if token != self._lease_token and not _writer_alive(
                    token, pid, hostname, process_start, heartbeat
                ):
                    conn.execute("DELETE FROM writers WHERE token = ?", (token,))
                    ABANDONED_TOKENS.discard(token)
        if recovered:
            warnings.warn(
                f"{self._label}: {len(recovered)} demonstration(s) left recording by a writer "
                f"that is gone were marked incomplete: {', '.join(recovered)}",
                stacklevel=2,
            )
        return recovered

    # -- recording --------------------------------------------------------------------------

    def begin_demonstration(
        self,
        *,
        skill: str,
        joints: Sequence[str],
        operator: str = "",
        tags: Sequence[str] = (),
        notes: str = "",
        source: str = "recorded",
        nominal_rate_hz: float = 1000.0,
        start_time: float | datetime | None = None,
        with_stiffness: bool = True,
        demo_id: str | None = None,
    ) -> str:
        """Start a demonstration in status "recording"; returns its UUID.

        Parameters
        ----------
        skill : str
            Name of the skill demonstrated (non-empty).
        joints : sequence of str
            Joint names, the column order of every sample array.
        operator, notes : str
        tags : sequence of str
        source : {"recorded", "imported", "simulated"}
        nominal_rate_hz : float, Hz
        start_time : float (Unix time, s) or datetime, optional
            Absolute time of ``t = 0``; now when omitted.
        with_stiffness : bool
            Whether chunks carry the stiffness channel.
        demo_id : str, optional
            UUID to use (imports keep ids); a fresh UUID4 when omitted.
        """
        fields = {k: v for k, v in locals().items() if k != "self"}
        with self._transaction() as conn:
            return self._begin(conn, fields)

    def _begin(self, conn: Any, fields: Mapping[str, Any]) -> str:
        """Insert a demonstration from the complete keyword set of :meth:`begin_demonstration`."""
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
        tag_list = list(
            dict.fromkeys(_codec.validate_text("tag", t, allow_empty=False) for t in tags)
        )
        _choice("source", source, DEMO_SOURCES)
        rate = _finite("nominal_rate_hz", nominal_rate_hz, positive=True)
        start = time.time() if start_time is None else _timestamp("start_time", start_time)
        if not isinstance(with_stiffness, (bool, np.bool_)):
            raise InvalidInputError(f"with_stiffness must be True or False, got {with_stiffness!r}")
        new_id = str(uuid.uuid4()) if demo_id is None else _uuid("demo_id", demo_id)
        if conn.execute("SELECT 1 FROM demonstrations WHERE id = ?", (new_id,)).fetchone():
            raise InvalidInputError(f"demo_id {new_id!r} already exists in {self._label}")
        now = time.time()
        conn.execute(
            "INSERT INTO demonstrations (id, skill, operator, tags, notes, source, joints, "
            "n_joints, nominal_rate_hz, start_time, status, has_stiffness, writer_token, "
            "created_at, updated_at) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, 'recording', ?, ?, ?, ?)",
            (new_id, skill, operator, json.dumps(tag_list), notes, source, json.dumps(names),
             len(names), rate, start, int(bool(with_stiffness)), self._lease(conn), now, now),
        )  # fmt: skip
        conn.executemany(
            "INSERT INTO demonstration_tags (demo_id, tag) VALUES (?, ?)",
            [(new_id, tag) for tag in tag_list],
        )
        return new_id

    def _layout(self, conn: Any, demo_id: str) -> tuple[int, bool]:
        """(n_joints, has_stiffness) of a demonstration; both never change, so they are cached."""
        layout = self._meta_cache.get(demo_id)
        if layout is None:
            row = conn.execute(
                "SELECT n_joints, has_stiffness FROM demonstrations WHERE id = ?", (demo_id,)
            ).fetchone()
            if row is None:
                raise NotFoundError(f"demonstration {demo_id!r} not found in {self._label}")
            layout = (int(row[0]), bool(row[1]))
            self._meta_cache[demo_id] = layout
        return layout

    def append_chunk(
        self,
        demo_id: str,
        t: np.ndarray,
        position: np.ndarray,
        velocity: np.ndarray,
        torque: np.ndarray,
        stiffness: np.ndarray | None = None,
    ) -> int:
        """Append samples to a recording demonstration in one atomic transaction.

        Parameters
        ----------
        demo_id : str
        t : (n,) array, s
            Relative to the demonstration start; strictly increasing and after every stored time.
        position : (n, n_joints) array, rad
        velocity : (n, n_joints) array, rad/s
        torque : (n, n_joints) array, N*m
        stiffness : (n, n_joints) array, N*m/rad, optional
            Required exactly when the demonstration was begun ``with_stiffness``.

        Returns
        -------
        int
            Sample count of the demonstration after the append.
        """
        with self._lock, _sql.translated(self._label):
            self._check_open()
            n_joints, has_stiffness = self._layout(self._conn, demo_id)
        times, arrays = _codec.validate_chunk(
            t,
            {"position": position, "velocity": velocity, "torque": torque, "stiffness": stiffness},
            n_joints=n_joints,
            with_stiffness=has_stiffness,
        )
        with self._transaction() as conn:
            return self._append(conn, demo_id, times, arrays)

    def _append(
        self, conn: Any, demo_id: str, times: np.ndarray, arrays: Mapping[str, np.ndarray]
    ) -> int:
        row = conn.execute(
            "SELECT status, t_first, n_samples FROM demonstrations WHERE id = ?", (demo_id,)
        ).fetchone()
        if row is None:  # deleted by another store object since its layout was cached
            raise NotFoundError(f"demonstration {demo_id!r} not found in {self._label}")
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
            "stiffness, checksum) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (demo_id, seq, times.size, float(times[0]), float(times[-1]), *blobs,
             _codec.chunk_checksum(blobs)),
        )  # fmt: skip
        first = float(times[0]) if t_first is None else t_first
        total = n_samples + times.size
        conn.execute(
            "UPDATE demonstrations SET n_samples = ?, t_first = ?, t_last = ?, duration_s = ?, "
            "updated_at = ? WHERE id = ?",
            (total, first, float(times[-1]), float(times[-1]) - first, time.time(), demo_id),
        )
        if self._lease_token is not None:
            conn.execute(
                "UPDATE writers SET heartbeat_at = ? WHERE token = ?",
                (time.time(), self._lease_token),
            )
        return int(total)

    def finish_demonstration(
        self, demo_id: str, status: str = "complete", flags: Mapping[str, Any] | None = None
    ) -> DemonstrationInfo:
        """End a recording: set its final status, merge ``flags``, compute the summary columns.

        Parameters
        ----------
        demo_id : str
        status : {"complete", "incomplete", "rejected"}
        flags : mapping of str to int, optional
            Counters such as ``{"drops": 3}``; each replaces an earlier value of the same key.
        """
        _choice("status", status, _FINAL_STATUSES)
        checked = None if flags is None else _codec.validate_flags(flags)
        with self._transaction() as conn:
            current = self._status(conn, demo_id)
            if current != "recording":
                raise StoreError(
                    f"demonstration {demo_id!r} is {current!r}, not 'recording': already finished"
                )
            self._finish(conn, demo_id, status, checked)
        return self.get_info(demo_id)

    def _finish(self, conn: Any, demo_id: str, status: str, flags: dict[str, Any] | None) -> None:
        if flags:
            self._merge_flags(conn, demo_id, flags)
        (n_samples,) = conn.execute(
            "SELECT n_samples FROM demonstrations WHERE id = ?", (demo_id,)
        ).fetchone()
        if status == "complete" and n_samples == 0:
            raise InvalidInputError(
                f"demonstration {demo_id!r} has no samples: status 'complete' refused "
                "(finish it as 'incomplete' or delete it)"
            )
        self._end_recording(conn, demo_id, status, None)

    def _end_recording(self, conn: Any, demo_id: str, status: str, reason: str | None) -> None:
        _schema.refresh_summary(conn, demo_id, label=self._label)
        conn.execute(
            "UPDATE demonstrations SET status = ?, status_reason = ?, writer_token = NULL "
            "WHERE id = ?",
            (status, reason, demo_id),
        )

    def _status(self, conn: Any, demo_id: str) -> str:
        row = conn.execute("SELECT status FROM demonstrations WHERE id = ?", (demo_id,)).fetchone()
        if row is None:
            raise NotFoundError(f"demonstration {demo_id!r} not found in {self._label}")
        return str(row[0])

    def _merge_flags(self, conn: Any, demo_id: str, flags: dict[str, Any]) -> None:
        (text,) = conn.execute(
            "SELECT flags FROM demonstrations WHERE id = ?", (demo_id,)
        ).fetchone()
        stored = _decoded(self._label, f"demonstration {demo_id!r}", lambda: json.loads(text))
        merged = {**stored, **flags}
        conn.execute(
            "UPDATE demonstrations SET flags = ?, updated_at = ? WHERE id = ?",
            (json.dumps(merged, sort_keys=True), time.time(), demo_id),
        )

    def update_flags(self, demo_id: str, flags: Mapping[str, Any]) -> dict[str, Any]:
        """Merge counters into a demonstration's flags (a key's new value replaces the old one,
        so send cumulative counts); returns the merged flags."""
        checked = _codec.validate_flags(flags)
        with self._transaction() as conn:
            self._status(conn, demo_id)
            self._merge_flags(conn, demo_id, checked)
        return dict(self.get_info(demo_id).flags)

    def add_demonstration(
        self,
        *,
        t: np.ndarray,
        position: np.ndarray,
        velocity: np.ndarray,
        torque: np.ndarray,
        stiffness: np.ndarray | None = None,
        status: str = "complete",
        flags: Mapping[str, Any] | None = None,
        **begin_kwargs: Any,
    ) -> str:
        """Store a whole demonstration in one transaction; returns its UUID.

        Takes the samples of :meth:`append_chunk`, ``status`` and ``flags`` of
        :meth:`finish_demonstration` and the keywords of :meth:`begin_demonstration`
        (``with_stiffness`` defaults to whether ``stiffness`` is given).
        """
        begin_kwargs.setdefault("with_stiffness", stiffness is not None)
        # the keywords of begin_demonstration with its defaults; unknown ones raise TypeError
        bound = inspect.signature(self.begin_demonstration).bind(**begin_kwargs)
        bound.apply_defaults()
        fields = dict(bound.arguments)
        _choice("status", status, _FINAL_STATUSES)
        checked = None if flags is None else _codec.validate_flags(flags)
        joints = _codec.validate_joints(fields["joints"])
        times, arrays = _codec.validate_chunk(
            t,
            {"position": position, "velocity": velocity, "torque": torque, "stiffness": stiffness},
            n_joints=len(joints),
            with_stiffness=bool(fields["with_stiffness"]),
        )
        with self._transaction() as conn:
            demo_id = self._begin(conn, fields)
            for start in range(0, times.size, CHUNK_SAMPLES):
                part = slice(start, start + CHUNK_SAMPLES)
                self._append(conn, demo_id, times[part], {k: v[part] for k, v in arrays.items()})
            self._finish(conn, demo_id, status, checked)
        return demo_id

    # -- queries ----------------------------------------------------------------------------

    def _filters(self, filters: Mapping[str, Any]) -> _sql.QueryBuilder:
        """WHERE conditions for the filters of :meth:`find_demonstrations` (given by name)."""
        unknown = set(filters) - _FILTER_KEYWORDS
        if unknown:
            raise TypeError(f"unknown demonstration filter(s): {sorted(unknown)}")
        skill, operator, tag, status, source, started_after, started_before, min_duration_s = (
            filters.get(key)
            for key in ("skill", "operator", "tag", "status", "source", "started_after",
                        "started_before", "min_duration_s")
        )  # fmt: skip
        where, where_args = filters.get("where"), filters.get("where_args")
        if where_args is not None and where is None:
            raise InvalidInputError("where_args given without where")
        if where is not None and not isinstance(where, str):
            raise InvalidInputError(f"where must be an SQL string, got {where!r}")
        query = _sql.QueryBuilder(named=isinstance(where_args, Mapping))
        for column, value in (("skill", skill), ("operator", operator), ("source", source)):
            if value is not None:
                query.add(f"{column} = {{}}", _codec.validate_text(column, value))
        if tag is not None:
            for one in _texts("tag", tag):
                # correlated EXISTS: a point lookup in the (tag, demo_id) key per candidate row,
                # faster than materialising every demonstration carrying a common tag
                query.add(
                    "EXISTS (SELECT 1 FROM demonstration_tags g WHERE g.tag = {} "
                    "AND g.demo_id = demonstrations.id)",
                    one,
                )
        if status is not None:
            statuses = _texts("status", status)
            for one in statuses:
                _choice("status", one, DEMO_STATUSES)
            query.add(f"status IN ({', '.join('{}' for _ in statuses)})", *statuses)
        if started_after is not None:
            query.add("start_time >= {}", _timestamp("started_after", started_after))
        if started_before is not None:
            query.add("start_time < {}", _timestamp("started_before", started_before))
        if min_duration_s is not None:
            query.add("duration_s >= {}", _finite("min_duration_s", min_duration_s))
        if where is not None:
            query.add_raw(where, () if where_args is None else where_args)
        return query

    def find_demonstrations(
        self,
        *,
        skill: str | None = None,
        operator: str | None = None,
        tag: str | Sequence[str] | None = None,
        status: str | Sequence[str] | None = None,
        source: str | None = None,
        started_after: float | datetime | None = None,
        started_before: float | datetime | None = None,
        min_duration_s: float | None = None,
        where: str | None = None,
        where_args: Sequence[object] | Mapping[str, object] | None = None,
        order_by: str | None = None,
        limit: int | None = None,
    ) -> Iterator[DemonstrationInfo]:
        """Metadata of the demonstrations matching every given filter.

        Parameters
        ----------
        skill, operator, source : str, optional
            Exact match.
        tag : str or sequence of str, optional
            Demonstrations carrying every one of these tags.
        status : str or sequence of str, optional
            Any of these statuses.
        started_after, started_before : float (Unix time, s) or datetime, optional
            ``started_after <= start_time < started_before``.
        min_duration_s : float, s, optional
        where : str, optional
            Extra SQL condition over the columns of ``demonstrations`` (read-only: a condition
            that would write, attach or set pragmas is refused).
        where_args : sequence or mapping, optional
            Parameters of ``where`` (``?`` or ``:name`` placeholders).
        order_by : str, optional
            ``"column [asc|desc], ..."`` or ``"-column"``; default ``"start_time, id"``.
        limit : int, optional

        Returns
        -------
        iterator of DemonstrationInfo
            The query runs (and bad filters raise) when this is called, not when iterated.
        """
        # every keyword of this signature but order_by and limit is a filter
        query = self._filters({k: v for k, v in locals().items() if k in _FILTER_KEYWORDS})
        order = _sql.parse_order_by(
            order_by, _schema.DEMONSTRATION_COLUMNS, "start_time ASC, id ASC"
        )
        sql = f"SELECT {_INFO_COLUMNS} FROM demonstrations{query.sql()} ORDER BY {order}"
        if limit is not None:
            if isinstance(limit, bool) or not isinstance(limit, int) or limit < 0:
                raise InvalidInputError(f"limit must be a non-negative integer, got {limit!r}")
            sql += f" LIMIT {int(limit)}"
        rows = self._guarded_query(sql, query.params(), where)
        with _sql.translated(self._label):
            return iter(_checked_infos(rows, self._label))

    def _guarded_query(
        self, sql: str, params: Sequence[object] | Mapping[str, object], where: str | None
    ) -> list[Any]:
        with self._lock:
            self._check_open()
            self._conn.set_authorizer(_sql.read_only_authorizer)
            deadline = time.monotonic() + self.query_timeout_s
            if where is not None:
                # SQLite interrupts the statement once this returns true (checked every 10000
                # virtual-machine steps): a runaway join or recursive CTE cannot hang the caller
                self._conn.set_progress_handler(lambda: time.monotonic() > deadline, 10000)
            try:
                return self._conn.execute(sql, params).fetchall()
            except (sqlite3.Warning, sqlite3.ProgrammingError, sqlite3.DatabaseError) as exc:
                if where is None:
                    with _sql.translated(self._label):
                        raise
                reason = str(exc)
                if time.monotonic() > deadline and "interrupt" in reason:
                    reason = f"ran longer than query_timeout_s = {self.query_timeout_s:g} s"
                raise InvalidInputError(f"where = {where!r} was refused: {reason}") from None
            finally:
                self._conn.set_authorizer(None)
                self._conn.set_progress_handler(None, 0)

    def count_demonstrations(self, **filters: Any) -> int:
        """Number of demonstrations matching the filters of :meth:`find_demonstrations`."""
        query = self._filters(filters)
        rows = self._guarded_query(
            f"SELECT count(*) FROM demonstrations{query.sql()}",
            query.params(),
            filters.get("where"),
        )
        return int(rows[0][0])

    def get_info(self, demo_id: str) -> DemonstrationInfo:
        """Metadata and summary of one demonstration."""
        with self._snapshot() as conn:
            return self._info(conn, demo_id)

    def _info(self, conn: Any, demo_id: str) -> DemonstrationInfo:
        row = conn.execute(
            f"SELECT {_INFO_COLUMNS} FROM demonstrations WHERE id = ?", (demo_id,)
        ).fetchone()
        if row is None:
            raise NotFoundError(f"demonstration {demo_id!r} not found in {self._label}")
        return _checked_infos([row], self._label)[0]

    def load_demonstration(
        self, demo_id: str, *, joints: Sequence[str] | None = None
    ) -> Demonstration:
        """Samples of one demonstration as numpy arrays (see :class:`Demonstration`).

        Parameters
        ----------
        demo_id : str
        joints : sequence of str, optional
            Load only these joints, in this order.

        Notes
        -----
        One SELECT over the chunks, one ``np.frombuffer`` per channel; the returned arrays are
        read-only views (copy them to modify). Metadata and samples come from one snapshot, so a
        demonstration still recording loads consistently.
        """
        with self._snapshot() as conn:
            info = self._info(conn, demo_id)
            t, arrays = _schema.read_samples(
                conn, demo_id, len(info.joints), info.has_stiffness, label=self._label
            )
        names = info.joints
        if joints is not None:
            wanted = _codec.validate_joints(joints)
            missing = [name for name in wanted if name not in info.joints]
            if missing:
                raise InvalidInputError(
                    f"joint {missing[0]!r} is not in demonstration {demo_id!r} "
                    f"(joints: {', '.join(info.joints)})"
                )
            columns = [info.joints.index(name) for name in wanted]
            arrays = {k: (None if v is None else v[:, columns]) for k, v in arrays.items()}
            names = wanted
        position, velocity, torque = arrays["position"], arrays["velocity"], arrays["torque"]
        assert position is not None and velocity is not None and torque is not None
        return Demonstration(
            info=info, t=t, position=position, velocity=velocity, torque=torque,
            stiffness=arrays["stiffness"], joints=tuple(names),
        )  # fmt: skip

    def load_dataframe(self, demo_id: str) -> pandas.DataFrame:
        """One demonstration as a pandas DataFrame indexed by ``t`` (s), with columns
        ``position.<joint>``, ``velocity.<joint>``, ``torque.<joint>`` and, when stored,
        ``stiffness.<joint>``; metadata in ``frame.attrs["info"]``. Needs pandas."""
        import pandas

        from compliant_demo.store.io import sample_columns

        demo = self.load_demonstration(demo_id)
        names, table = sample_columns(demo)
        frame = pandas.DataFrame(
            table[:, 1:], columns=names[1:], index=pandas.Index(demo.t, name="t")
        )
        frame.attrs["info"] = demo.info.to_dict()
        return frame

    def iter_demonstrations(self, **filters: Any) -> Iterator[Demonstration]:
        """Demonstrations matching the filters of :meth:`find_demonstrations`, loaded one at a
        time as the iterator advances (``joints=`` selects columns as in
        :meth:`load_demonstration`)."""
        joints = filters.pop("joints", None)
        infos = list(self.find_demonstrations(**filters))
        return (self.load_demonstration(info.id, joints=joints) for info in infos)

    # -- curation ---------------------------------------------------------------------------

    def mark_status(
        self, demo_id: str, status: str, reason: str | None = None
    ) -> DemonstrationInfo:
        """Set a finished demonstration's status ("complete", "incomplete" or "rejected").

        A demonstration still recording is refused: its writer ends it with
        :meth:`finish_demonstration` (or recovery does, when the writer is gone).
        """
        _choice("status", status, _FINAL_STATUSES)
        if reason is not None:
            _codec.validate_text("reason", reason)
        with self._transaction() as conn:
            current = self._status(conn, demo_id)
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
                "UPDATE demonstrations SET status = ?, status_reason = ?, updated_at = ? "
                "WHERE id = ?",
                (status, reason, time.time(), demo_id),
            )
        return self.get_info(demo_id)

    def delete_demonstration(self, demo_id: str, *, force: bool = False) -> None:
        """Delete a demonstration and its samples.

        Refused while it is recording, and (unless ``force``) while a saved skill names it in
        its provenance.
        """
        with self._transaction() as conn:
            current = self._status(conn, demo_id)
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
        self._meta_cache.pop(demo_id, None)

    def discard_recording(self, demo_id: str) -> None:
        """Delete a demonstration that this store object began and that is still recording
        (an import or recording that failed half-way); any other demonstration is refused."""
        with self._transaction() as conn:
            row = conn.execute(
                "SELECT status, writer_token FROM demonstrations WHERE id = ?", (demo_id,)
            ).fetchone()
            if row is None:
                raise NotFoundError(f"demonstration {demo_id!r} not found in {self._label}")
            if row[0] != "recording" or row[1] is None or row[1] != self._lease_token:
                raise StoreError(
                    f"demonstration {demo_id!r} ({row[0]!r}) is not being recorded by this store "
                    "object: refusing to discard it"
                )
            conn.execute("DELETE FROM demonstrations WHERE id = ?", (demo_id,))
        self._meta_cache.pop(demo_id, None)

    def merge_from(self, other_path: str | os.PathLike[str]) -> MergeReport:
        """Copy into this store every finished demonstration of another store file.

        Ids are kept. A demonstration already here with identical metadata and samples is
        skipped; one with different content, or still recording in the other store, is reported
        as a conflict and left alone. Each copied demonstration is one transaction.
        """
        from compliant_demo.store.merge import merge_into

        if self.path is not None and Path(other_path).resolve() == self.path.resolve():
            raise InvalidInputError(f"cannot merge store {str(other_path)!r} into itself")
        with DemoStore(other_path, read_only=True) as other:
            return merge_into(self, other)

    # -- skills, campaigns, replay results ----------------------------------------------------

    def save_skill(
        self,
        name: str,
        payload: Mapping[str, Any],
        *,
        demonstration_ids: Sequence[str],
        parameters: Mapping[str, Any],
    ) -> SkillRecord:
        """Save a new version of skill ``name`` (1, 2, ... per name) with its provenance.

        Parameters
        ----------
        name : str
        payload : mapping
            The learned skill; JSON values and numpy arrays (stored exactly).
        demonstration_ids : sequence of str
            Demonstrations it was learned from; each must exist here.
        parameters : mapping
            Learning parameters used.
        """
        _codec.validate_text("name", name, allow_empty=False)
        payload_text = _codec.dumps(_mapping("payload", payload))
        parameters_text = _codec.dumps(_mapping("parameters", parameters))
        if isinstance(demonstration_ids, str) or not isinstance(demonstration_ids, Sequence):
            raise InvalidInputError(
                f"demonstration_ids must be a sequence of ids, got {demonstration_ids!r}"
            )
        ids = [str(x) for x in demonstration_ids]
        skill_id = str(uuid.uuid4())
        created = time.time()
        with self._transaction() as conn:
            for demo_id in ids:
                self._status(conn, demo_id)
            (version,) = conn.execute(
                "SELECT coalesce(max(version), 0) + 1 FROM skills WHERE name = ?", (name,)
            ).fetchone()
            conn.execute(
                "INSERT INTO skills (id, name, version, payload, parameters, created) "
                "VALUES (?, ?, ?, ?, ?, ?)",
                (skill_id, name, version, payload_text, parameters_text, created),
            )
            conn.executemany(
                "INSERT INTO skill_demonstrations (skill_id, position, demo_id) VALUES (?, ?, ?)",
                [(skill_id, i, demo_id) for i, demo_id in enumerate(ids)],
            )
        return self.get_skill_record(skill_id)

    def _skill_rows(self, where: str, params: Sequence[object]) -> list[SkillRecord]:
        with self._snapshot() as conn:
            rows = conn.execute(
                "SELECT s.id, s.name, s.version, s.payload, s.parameters, s.created, "
                "(SELECT json_group_array(demo_id) FROM (SELECT demo_id FROM skill_demonstrations "
                f"WHERE skill_id = s.id ORDER BY position)) FROM skills s {where} "
                "ORDER BY s.name, s.version",
                params,
            ).fetchall()
        return [
            _decoded(self._label, f"skill {row[1]!r} version {row[2]}", partial(_build_skill, row))
            for row in rows
        ]

    def get_skill_record(self, skill_id: str) -> SkillRecord:
        """One skill version by its id."""
        found = self._skill_rows("WHERE s.id = ?", (skill_id,))
        if not found:
            raise NotFoundError(f"skill id {skill_id!r} not found in {self._label}")
        return found[0]

    def load_skill_record(self, name: str, version: int | None = None) -> SkillRecord:
        """Skill ``name`` at ``version`` (the latest when omitted)."""
        _codec.validate_text("name", name, allow_empty=False)
        versions = self._skill_rows("WHERE s.name = ?", (name,))
        if not versions:
            raise NotFoundError(f"skill {name!r} not found in {self._label}")
        if version is None:
            return versions[-1]
        for record in versions:
            if record.version == version:
                return record
        raise NotFoundError(
            f"skill {name!r} has no version {version!r} (versions: "
            f"{', '.join(str(r.version) for r in versions)})"
        )

    def list_skills(self) -> list[SkillRecord]:
        """Every saved skill version, by name then version."""
        return self._skill_rows("", ())

    def create_campaign(
        self, skill_id: str, config: Mapping[str, Any], campaign_id: str | None = None
    ) -> str:
        """Register a replay campaign of one skill version; returns its id.

        Calling again with an existing ``campaign_id`` and the same skill and config returns it
        unchanged (so an interrupted campaign resumes); a different config is refused.
        """
        config_text = _codec.dumps(_mapping("config", config))
        new_id = str(uuid.uuid4()) if campaign_id is None else _uuid("campaign_id", campaign_id)
        with self._transaction() as conn:
            if not conn.execute("SELECT 1 FROM skills WHERE id = ?", (skill_id,)).fetchone():
                raise NotFoundError(f"skill id {skill_id!r} not found in {self._label}")
            existing = conn.execute(
                "SELECT skill_id, config FROM campaigns WHERE id = ?", (new_id,)
            ).fetchone()
            if existing is not None:
                if existing != (skill_id, config_text):
                    raise InvalidInputError(
                        f"campaign_id {new_id!r} exists with another skill or config"
                    )
                return new_id
            conn.execute(
                "INSERT INTO campaigns (id, skill_id, config, created) VALUES (?, ?, ?, ?)",
                (new_id, skill_id, config_text, time.time()),
            )
        return new_id

    def get_campaign(self, campaign_id: str) -> CampaignInfo:
        """One campaign's skill and configuration."""
        with self._snapshot() as conn:
            row = conn.execute(
                "SELECT id, skill_id, config, created FROM campaigns WHERE id = ?", (campaign_id,)
            ).fetchone()
        if row is None:
            raise NotFoundError(f"campaign {campaign_id!r} not found in {self._label}")
        config = _decoded(self._label, f"campaign {campaign_id!r}", lambda: _codec.loads(row[2]))
        return CampaignInfo(id=row[0], skill_id=row[1], config=config, created=row[3])

    def save_replay_result(
        self,
        *,
        skill_id: str,
        metrics: Mapping[str, Any],
        parameters: Mapping[str, Any],
        status: str = "ok",
        reason: str | None = None,
        trace: Mapping[str, np.ndarray] | None = None,
        campaign_id: str | None = None,
        scenario_index: int | None = None,
    ) -> str:
        """Store the outcome of one replay; returns its id.

        Parameters
        ----------
        skill_id : str
            Id of the replayed skill version.
        metrics, parameters : mapping
            Outcome metrics and the replay's parameters (perturbation, mechanism, seed ...).
        status : str
            "ok" or a short word for what went wrong; ``reason`` explains it.
        trace : mapping of str to array, optional
            Time series of the replay, stored as float64 with their shapes.
        campaign_id : str, optional
        scenario_index : int, optional
            Index of the scenario within the campaign (needs ``campaign_id``); one result each.
        """
        _codec.validate_text("status", status, allow_empty=False)
        if reason is not None:
            _codec.validate_text("reason", reason)
        metrics_text = _codec.dumps(_mapping("metrics", metrics))
        parameters_text = _codec.dumps(_mapping("parameters", parameters))
        if scenario_index is not None:
            if campaign_id is None:
                raise InvalidInputError("scenario_index given without campaign_id")
            if isinstance(scenario_index, bool) or not isinstance(
                scenario_index, (int, np.integer)
            ):
                raise InvalidInputError(
                    f"scenario_index must be an integer, got {scenario_index!r}"
                )
            scenario_index = int(scenario_index)
        traces = []
        for channel, values in _mapping("trace", trace or {}).items():
            _codec.validate_text("trace channel", channel, allow_empty=False)
            try:
                array = np.asarray(values, dtype=np.float64)
            except (TypeError, ValueError) as exc:
                raise InvalidInputError(f"trace {channel!r} is not numeric: {exc}") from None
            traces.append((channel, json.dumps(list(array.shape)), _codec.to_blob(array)))
        result_id = str(uuid.uuid4())
        with self._transaction() as conn:
            if not conn.execute("SELECT 1 FROM skills WHERE id = ?", (skill_id,)).fetchone():
                raise NotFoundError(f"skill id {skill_id!r} not found in {self._label}")
            if campaign_id is not None:
                if not conn.execute(
                    "SELECT 1 FROM campaigns WHERE id = ?", (campaign_id,)
                ).fetchone():
                    raise NotFoundError(f"campaign {campaign_id!r} not found in {self._label}")
                if (
                    scenario_index is not None
                    and conn.execute(
                        "SELECT 1 FROM replay_results WHERE campaign_id = ? AND scenario_index = ?",
                        (campaign_id, scenario_index),
                    ).fetchone()
                ):
                    raise InvalidInputError(
                        f"scenario_index {scenario_index} of campaign {campaign_id!r} already has "
                        "a result"
                    )
            conn.execute(
                "INSERT INTO replay_results (id, skill_id, campaign_id, scenario_index, status, "
                "reason, metrics, parameters, created) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (result_id, skill_id, campaign_id, scenario_index, status, reason, metrics_text,
                 parameters_text, time.time()),
            )  # fmt: skip
            conn.executemany(
                "INSERT INTO replay_traces (result_id, channel, shape, data) VALUES (?, ?, ?, ?)",
                [(result_id, *row) for row in traces],
            )
        return result_id

    def find_replay_results(
        self,
        *,
        skill_id: str | None = None,
        campaign_id: str | None = None,
        status: str | None = None,
    ) -> Iterator[ReplayResultInfo]:
        """Replay results (without traces) by skill version, campaign and status."""
        query = _sql.QueryBuilder(named=False)
        for column, value in (("skill_id", skill_id), ("campaign_id", campaign_id),
                              ("status", status)):  # fmt: skip
            if value is not None:
                query.add(f"r.{column} = {{}}", _codec.validate_text(column, value))
        with self._snapshot() as conn:
            rows = conn.execute(
                f"SELECT {_RESULT_COLUMNS} FROM replay_results r{query.sql()} "
                "ORDER BY r.campaign_id, r.scenario_index, r.created, r.id",
                query.params(),
            ).fetchall()
        return iter([_result_from_row(row, self._label) for row in rows])

    def load_replay_result(self, result_id: str) -> ReplayResult:
        """One replay result with its trace arrays."""
        with self._snapshot() as conn:
            row = conn.execute(
                f"SELECT {_RESULT_COLUMNS} FROM replay_results r WHERE r.id = ?", (result_id,)
            ).fetchone()
            if row is None:
                raise NotFoundError(f"replay result {result_id!r} not found in {self._label}")
            traces = conn.execute(
                "SELECT channel, shape, data FROM replay_traces WHERE result_id = ?", (result_id,)
            ).fetchall()
        return ReplayResult(
            info=_result_from_row(row, self._label),
            trace=_decoded(
                self._label,
                f"replay result {result_id!r}",
                lambda: {
                    channel: _codec.from_blobs([data], None).reshape(json.loads(shape))
                    for channel, shape, data in traces
                },
            ),
        )

    def completed_scenarios(self, campaign_id: str) -> set[int]:
        """Scenario indices of a campaign that already have a result (to resume a campaign)."""
        with self._snapshot() as conn:
            rows = conn.execute(
                "SELECT scenario_index FROM replay_results WHERE campaign_id = ? "
                "AND scenario_index IS NOT NULL",
                (campaign_id,),
            ).fetchall()
        return {int(row[0]) for row in rows}
