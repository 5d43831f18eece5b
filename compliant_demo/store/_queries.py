"""Queries over demonstrations: filters (with a caller's guarded raw SQL condition), metadata
rows, and loading a demonstration's samples from one snapshot."""

from __future__ import annotations

import sqlite3
import time
from collections.abc import Mapping, Sequence
from typing import Any

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.store import _codec, _filters, _samples, _schema, _sql
from compliant_demo.store._rows import INFO_COLUMNS, checked_infos, choice, finite, texts, timestamp
from compliant_demo.store._session import StoreSession
from compliant_demo.store.records import DEMO_STATUSES, Demonstration, DemonstrationInfo

__all__ = [
    "FILTER_KEYWORDS",
    "filters_query",
    "find",
    "count",
    "info",
    "load",
]

FILTER_KEYWORDS = frozenset(
    ("skill", "operator", "tag", "status", "source", "started_after", "started_before",
     "min_duration_s", "where", "where_args")
)  # fmt: skip


def _where_args(filters: Mapping[str, Any]) -> Sequence[object] | Mapping[str, object]:
    args = filters.get("where_args")
    return () if args is None else args


def filters_query(filters: Mapping[str, Any]) -> _filters.QueryBuilder:
    """WHERE conditions for the filters of ``find_demonstrations`` (given by name)."""
    unknown = set(filters) - FILTER_KEYWORDS
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
    query = _filters.QueryBuilder(named=isinstance(where_args, Mapping))
    for column, value in (("skill", skill), ("operator", operator), ("source", source)):
        if value is not None:
            query.add(f"{column} = {{}}", _codec.validate_text(column, value))
    if tag is not None:
        for one in texts("tag", tag):
            # correlated EXISTS: a point lookup in the (tag, demo_id) key per candidate row,
            # faster than materialising every demonstration carrying a common tag
            query.add(
                "EXISTS (SELECT 1 FROM demonstration_tags g WHERE g.tag = {} "
                "AND g.demo_id = demonstrations.id)",
                one,
            )
    if status is not None:
        statuses = texts("status", status)
        for one in statuses:
            choice("status", one, DEMO_STATUSES)
        query.add(f"status IN ({', '.join('{}' for _ in statuses)})", *statuses)
    if started_after is not None:
        query.add("start_time >= {}", timestamp("started_after", started_after))
    if started_before is not None:
        query.add("start_time < {}", timestamp("started_before", started_before))
    if min_duration_s is not None:
        query.add("duration_s >= {}", finite("min_duration_s", min_duration_s))
    if where is not None:
        query.add_raw(where, () if where_args is None else where_args)
    return query


def _probe_where(
    conn: sqlite3.Connection, where: str, where_args: Sequence[object] | Mapping[str, object]
) -> None:
    """Compile (never run) the caller's condition alone, allowed only to read the columns of
    ``demonstrations`` and call plain functions; InvalidInputError naming ``where`` otherwise."""
    authorizer = _filters.RawWhereAuthorizer("demonstrations", _schema.DEMONSTRATION_COLUMNS)
    conn.set_authorizer(authorizer)
    try:
        condition = _filters.check_raw_where(where)
        conn.execute(f"EXPLAIN SELECT 1 FROM demonstrations WHERE {condition}", where_args)
    except (sqlite3.Warning, sqlite3.ProgrammingError, sqlite3.DatabaseError) as exc:
        reason = str(exc)
        if authorizer.refused is not None:
            reason = (
                f"{authorizer.refused} is not allowed (a raw filter may only read the columns "
                "of demonstrations and call plain functions)"
            )
        raise InvalidInputError(f"where = {where!r} was refused: {reason}") from None
    finally:
        conn.set_authorizer(None)


def _guarded_query(
    session: StoreSession,
    sql: str,
    params: Sequence[object] | Mapping[str, object],
    where: str | None,
    timeout_s: float,
    where_args: Sequence[object] | Mapping[str, object] = (),
) -> list[Any]:
    with session.lock:
        conn = session.open_connection()
        if where is not None:
            _probe_where(conn, where, where_args)
        conn.set_authorizer(_filters.read_only_authorizer)
        deadline = time.monotonic() + timeout_s
        if where is not None:
            # SQLite interrupts the statement once this returns true (checked every 10000
            # virtual-machine steps): a runaway join or recursive CTE cannot hang the caller
            conn.set_progress_handler(lambda: time.monotonic() > deadline, 10000)
        try:
            return conn.execute(sql, params).fetchall()
        except (sqlite3.Warning, sqlite3.ProgrammingError, sqlite3.DatabaseError) as exc:
            if where is None or _sql.damaged_text(exc):
                with _sql.translated(session.label):
                    raise
            reason = str(exc)
            if time.monotonic() > deadline and "interrupt" in reason:
                reason = f"ran longer than query_timeout_s = {timeout_s:g} s"
            raise InvalidInputError(f"where = {where!r} was refused: {reason}") from None
        finally:
            conn.set_authorizer(None)
            conn.set_progress_handler(None, 0)


def find(
    session: StoreSession,
    filters: Mapping[str, Any],
    order_by: str | None,
    limit: int | None,
    timeout_s: float,
) -> list[DemonstrationInfo]:
    """Metadata of the demonstrations matching ``filters``, sorted and limited."""
    query = filters_query(filters)
    columns = _schema.DEMONSTRATION_COLUMNS
    order = _filters.parse_order_by(order_by, columns, "start_time ASC, id ASC")
    sql = f"SELECT {INFO_COLUMNS} FROM demonstrations{query.sql()} ORDER BY {order}"
    if limit is not None:
        if isinstance(limit, bool) or not isinstance(limit, int) or limit < 0:
            raise InvalidInputError(f"limit must be a non-negative integer, got {limit!r}")
        sql += f" LIMIT {int(limit)}"
    rows = _guarded_query(
        session, sql, query.params(), filters.get("where"), timeout_s, _where_args(filters)
    )
    with _sql.translated(session.label):
        return checked_infos(rows, session.label)


def count(session: StoreSession, filters: Mapping[str, Any], timeout_s: float) -> int:
    """Number of demonstrations matching ``filters``."""
    query = filters_query(filters)
    rows = _guarded_query(
        session,
        f"SELECT count(*) FROM demonstrations{query.sql()}",
        query.params(),
        filters.get("where"),
        timeout_s,
        _where_args(filters),
    )
    return int(rows[0][0])


def info(session: StoreSession, conn: Any, demo_id: str) -> DemonstrationInfo:
    """Metadata and summary of one demonstration (inside ``conn``'s transaction)."""
    row = conn.execute(
        f"SELECT {INFO_COLUMNS} FROM demonstrations WHERE id = ?", (demo_id,)
    ).fetchone()
    if row is None:
        raise NotFoundError(f"demonstration {demo_id!r} not found in {session.label}")
    return checked_infos([row], session.label)[0]


def load(session: StoreSession, demo_id: str, joints: Sequence[str] | None) -> Demonstration:
    """Samples of one demonstration, optionally only some joints, from one snapshot."""
    with session.snapshot() as conn:
        meta = info(session, conn, demo_id)
        t, arrays = _samples.read_samples(conn, demo_id, label=session.label)
    names = meta.joints
    if joints is not None:
        wanted = _codec.validate_joints(joints)
        missing = [name for name in wanted if name not in meta.joints]
        if missing:
            raise InvalidInputError(
                f"joint {missing[0]!r} is not in demonstration {demo_id!r} "
                f"(joints: {', '.join(meta.joints)})"
            )
        columns = [meta.joints.index(name) for name in wanted]
        arrays = {k: (None if v is None else v[:, columns]) for k, v in arrays.items()}
        names = wanted
    position, velocity, torque = arrays["position"], arrays["velocity"], arrays["torque"]
    assert position is not None and velocity is not None and torque is not None
    return Demonstration(
        info=meta, t=t, position=position, velocity=velocity, torque=torque,
        stiffness=arrays["stiffness"], joints=tuple(names),
    )  # fmt: skip
