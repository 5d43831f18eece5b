"""Skills, campaigns and replay results: versioned skills with their provenance, replay campaigns
of one skill version, and the outcome of each replay with its trace arrays."""

from __future__ import annotations

import json
import time
import uuid
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.store import _codec, _filters
from compliant_demo.store._recording import status_of
from compliant_demo.store._rows import (
    RESULT_COLUMNS,
    SKILL_COLUMNS,
    decoded,
    mapping,
    result_from_row,
    skill_from_row,
    uuid_text,
)
from compliant_demo.store._session import StoreSession
from compliant_demo.store.records import CampaignInfo, ReplayResult, ReplayResultInfo, SkillRecord

__all__ = [
    "save_skill",
    "skill_rows",
    "create_campaign",
    "get_campaign",
    "save_replay_result",
    "find_replay_results",
    "load_replay_result",
    "completed_scenarios",
]


def save_skill(
    session: StoreSession,
    name: str,
    payload: Mapping[str, Any],
    demonstration_ids: Sequence[str],
    parameters: Mapping[str, Any],
) -> str:
    """Insert the next version of skill ``name``; its id."""
    _codec.validate_text("name", name, allow_empty=False)
    payload_text = _codec.dumps(mapping("payload", payload))
    parameters_text = _codec.dumps(mapping("parameters", parameters))
    if isinstance(demonstration_ids, str) or not isinstance(demonstration_ids, Sequence):
        raise InvalidInputError(
            f"demonstration_ids must be a sequence of ids, got {demonstration_ids!r}"
        )
    ids = [str(x) for x in demonstration_ids]
    skill_id = str(uuid.uuid4())
    with session.transaction() as conn:
        for demo_id in ids:
            status_of(session, conn, demo_id)
        (version,) = conn.execute(
            "SELECT coalesce(max(version), 0) + 1 FROM skills WHERE name = ?", (name,)
        ).fetchone()
        conn.execute(
            "INSERT INTO skills (id, name, version, payload, parameters, created) "
            "VALUES (?, ?, ?, ?, ?, ?)",
            (skill_id, name, version, payload_text, parameters_text, time.time()),
        )
        conn.executemany(
            "INSERT INTO skill_demonstrations (skill_id, position, demo_id) VALUES (?, ?, ?)",
            [(skill_id, i, demo_id) for i, demo_id in enumerate(ids)],
        )
    return skill_id


def skill_rows(session: StoreSession, where: str, params: Sequence[object]) -> list[SkillRecord]:
    """Skill versions matching ``where`` (over alias ``s``), by name then version."""
    with session.snapshot() as conn:
        rows = conn.execute(
            f"SELECT {SKILL_COLUMNS} FROM skills s {where} ORDER BY s.name, s.version", params
        ).fetchall()
    return [skill_from_row(row, session.label) for row in rows]


def create_campaign(
    session: StoreSession, skill_id: str, config: Mapping[str, Any], campaign_id: str | None
) -> str:
    """Register (or find again, with the same skill and config) a campaign; its id."""
    config_text = _codec.dumps(mapping("config", config))
    new_id = str(uuid.uuid4()) if campaign_id is None else uuid_text("campaign_id", campaign_id)
    with session.transaction() as conn:
        if not conn.execute("SELECT 1 FROM skills WHERE id = ?", (skill_id,)).fetchone():
            raise NotFoundError(f"skill id {skill_id!r} not found in {session.label}")
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


def get_campaign(session: StoreSession, campaign_id: str) -> CampaignInfo:
    """One campaign's skill and configuration."""
    with session.snapshot() as conn:
        row = conn.execute(
            "SELECT id, skill_id, config, created FROM campaigns WHERE id = ?", (campaign_id,)
        ).fetchone()
    if row is None:
        raise NotFoundError(f"campaign {campaign_id!r} not found in {session.label}")
    config = decoded(session.label, f"campaign {campaign_id!r}", lambda: _codec.loads(row[2]))
    return CampaignInfo(id=row[0], skill_id=row[1], config=config, created=row[3])


def _scenario_index(scenario_index: object, campaign_id: str | None) -> int:
    if campaign_id is None:
        raise InvalidInputError("scenario_index given without campaign_id")
    if isinstance(scenario_index, bool) or not isinstance(scenario_index, (int, np.integer)):
        raise InvalidInputError(f"scenario_index must be an integer, got {scenario_index!r}")
    return int(scenario_index)


def _trace_rows(trace: Mapping[str, Any] | None) -> list[tuple[str, str, bytes]]:
    rows = []
    for channel, values in mapping("trace", trace or {}).items():
        _codec.validate_text("trace channel", channel, allow_empty=False)
        try:
            array = np.asarray(values, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise InvalidInputError(f"trace {channel!r} is not numeric: {exc}") from None
        rows.append((channel, json.dumps(list(array.shape)), _codec.to_blob(array)))
    return rows


def save_replay_result(
    session: StoreSession,
    *,
    skill_id: str,
    metrics: Mapping[str, Any],
    parameters_text: str,
    status: str,
    reason: str | None,
    trace: Mapping[str, Any] | None,
    campaign_id: str | None,
    scenario_index: int | None,
) -> str:
    """Insert one replay result with its traces; its id."""
    _codec.validate_text("status", status, allow_empty=False)
    if reason is not None:
        _codec.validate_text("reason", reason)
    metrics_text = _codec.dumps(mapping("metrics", metrics))
    if scenario_index is not None:
        scenario_index = _scenario_index(scenario_index, campaign_id)
    traces = _trace_rows(trace)
    result_id = str(uuid.uuid4())
    with session.transaction() as conn:
        if not conn.execute("SELECT 1 FROM skills WHERE id = ?", (skill_id,)).fetchone():
            raise NotFoundError(f"skill id {skill_id!r} not found in {session.label}")
        if campaign_id is not None:
            if not conn.execute("SELECT 1 FROM campaigns WHERE id = ?", (campaign_id,)).fetchone():
                raise NotFoundError(f"campaign {campaign_id!r} not found in {session.label}")
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
    session: StoreSession, filters: Mapping[str, str | None]
) -> list[ReplayResultInfo]:
    """Replay results whose columns equal the given non-None ``filters``."""
    query = _filters.QueryBuilder(named=False)
    for column, value in filters.items():
        if value is not None:
            query.add(f"r.{column} = {{}}", _codec.validate_text(column, value))
    with session.snapshot() as conn:
        rows = conn.execute(
            f"SELECT {RESULT_COLUMNS} FROM replay_results r{query.sql()} "
            "ORDER BY r.campaign_id, r.scenario_index, r.created, r.id",
            query.params(),
        ).fetchall()
    return [result_from_row(row, session.label) for row in rows]


def load_replay_result(session: StoreSession, result_id: str) -> ReplayResult:
    """One replay result with its trace arrays."""
    with session.snapshot() as conn:
        row = conn.execute(
            f"SELECT {RESULT_COLUMNS} FROM replay_results r WHERE r.id = ?", (result_id,)
        ).fetchone()
        if row is None:
            raise NotFoundError(f"replay result {result_id!r} not found in {session.label}")
        traces = conn.execute(
            "SELECT channel, shape, data FROM replay_traces WHERE result_id = ?", (result_id,)
        ).fetchall()
    return ReplayResult(
        info=result_from_row(row, session.label),
        trace=decoded(
            session.label,
            f"replay result {result_id!r}",
            lambda: {
                channel: _codec.from_blobs([data], None).reshape(json.loads(shape))
                for channel, shape, data in traces
            },
        ),
    )


def completed_scenarios(session: StoreSession, campaign_id: str) -> set[int]:
    """Scenario indices of a campaign that already have a result."""
    with session.snapshot() as conn:
        rows = conn.execute(
            "SELECT scenario_index FROM replay_results WHERE campaign_id = ? "
            "AND scenario_index IS NOT NULL",
            (campaign_id,),
        ).fetchall()
    return {int(row[0]) for row in rows}
