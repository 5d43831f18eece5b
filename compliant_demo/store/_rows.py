"""Row builders and validators of the store: stored rows into records (damaged stored data reported
as StoreCorruptError), and the checks of arguments that every part of the store shares."""

from __future__ import annotations

import json
import math
import uuid
from collections.abc import Callable, Mapping, Sequence
from datetime import datetime
from functools import partial
from typing import Any, TypeVar

import numpy as np

from compliant_demo.exceptions import InvalidInputError, StoreCorruptError
from compliant_demo.store import _codec
from compliant_demo.store.records import (
    DemonstrationInfo,
    ReplayParameters,
    ReplayResultInfo,
    SkillRecord,
)

__all__ = [
    "INFO_COLUMNS",
    "RESULT_COLUMNS",
    "SKILL_COLUMNS",
    "decoded",
    "checked_infos",
    "skill_from_row",
    "result_from_row",
    "finite",
    "timestamp",
    "texts",
    "choice",
    "uuid_text",
    "mapping",
    "parameters_document",
]

_T = TypeVar("_T")

# Scalar columns, then the seven JSON columns joined into one JSON array in SQL, so that a
# query result is decoded by a single json.loads (7 per row were most of the time of a find).
INFO_COLUMNS = (
    "id, skill, operator, notes, source, nominal_rate_hz, start_time, status, status_reason, "
    "has_stiffness, n_samples, duration_s, mean_rate_hz, created_at, updated_at, "
    "'[' || tags || ',' || joints || ',' || range_of_motion_json || ',' || peak_abs_torque_json "
    "|| ',' || stiffness_min_json || ',' || stiffness_max_json || ',' || flags || ']'"
)
RESULT_COLUMNS = (
    "r.id, r.skill_id, r.campaign_id, r.scenario_index, r.status, r.reason, r.metrics, "
    "r.parameters, r.created, (SELECT json_group_array(channel) FROM "
    "(SELECT channel FROM replay_traces WHERE result_id = r.id ORDER BY channel))"
)
SKILL_COLUMNS = (
    "s.id, s.name, s.version, s.payload, s.parameters, s.created, "
    "(SELECT json_group_array(demo_id) FROM (SELECT demo_id FROM skill_demonstrations "
    "WHERE skill_id = s.id ORDER BY position))"
)


def decoded(label: str, what: str, build: Callable[[], _T]) -> _T:
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
            decoded(label, f"demonstration {row[0]!r}", partial(json.loads, row[15]))
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


def checked_infos(rows: Sequence[Sequence[Any]], label: str) -> list[DemonstrationInfo]:
    """Records of rows selected with :data:`INFO_COLUMNS`."""
    return decoded(label, "a demonstration row", lambda: _infos_from_rows(rows, label))


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


def skill_from_row(row: Sequence[Any], label: str) -> SkillRecord:
    """The record of a row selected with :data:`SKILL_COLUMNS`."""
    return decoded(label, f"skill {row[1]!r} version {row[2]}", partial(_build_skill, row))


def _build_result(row: Sequence[Any]) -> ReplayResultInfo:
    return ReplayResultInfo(
        id=row[0],
        skill_id=row[1],
        campaign_id=row[2],
        scenario_index=row[3],
        status=row[4],
        reason=row[5],
        metrics=_codec.loads(row[6]),
        parameters=ReplayParameters.model_validate(_codec.loads(row[7])),
        created=row[8],
        trace_channels=tuple(json.loads(row[9])),
    )


def result_from_row(row: Sequence[Any], label: str) -> ReplayResultInfo:
    """The record of a row selected with :data:`RESULT_COLUMNS`."""
    return decoded(label, f"replay result {row[0]!r}", lambda: _build_result(row))


def finite(name: str, value: object, *, positive: bool = False) -> float:
    """``value`` as a finite (optionally positive) float, else InvalidInputError naming it."""
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)):
        raise InvalidInputError(f"{name} must be a number, got {value!r}")
    number = float(value)
    if not math.isfinite(number) or (positive and number <= 0):
        raise InvalidInputError(
            f"{name} must be a finite{' positive' if positive else ''} number, got {value!r}"
        )
    return number


def timestamp(name: str, value: float | datetime) -> float:
    """Unix time in s of a number or a datetime."""
    return value.timestamp() if isinstance(value, datetime) else finite(name, value)


def texts(name: str, value: object) -> list[str]:
    """One string or a sequence of strings, as a list."""
    if isinstance(value, str):
        return [value]
    if not isinstance(value, (list, tuple)):
        raise InvalidInputError(f"{name} must be a string or a list of strings, got {value!r}")
    return [_codec.validate_text(name, one) for one in value]


def choice(name: str, value: object, allowed: Sequence[str]) -> str:
    """``value`` when it is one of ``allowed``."""
    if value not in allowed:
        raise InvalidInputError(f"{name} must be one of {', '.join(allowed)}; got {value!r}")
    return str(value)


def uuid_text(name: str, value: object) -> str:
    """``value`` as a canonical UUID string."""
    try:
        return str(uuid.UUID(str(value)))
    except ValueError:
        raise InvalidInputError(f"{name} must be a UUID string, got {value!r}") from None


def mapping(name: str, value: object) -> dict[str, Any]:
    """``value`` as a dict, when it is a mapping."""
    if not isinstance(value, Mapping):
        raise InvalidInputError(f"{name} must be a mapping, got {type(value).__name__}")
    return dict(value)


def parameters_document(parameters: object) -> dict[str, Any]:
    """The JSON document stored for a replay's ``parameters`` (a ReplayParameters)."""
    if not isinstance(parameters, ReplayParameters):
        raise InvalidInputError(
            f"parameters must be a ReplayParameters, got {type(parameters).__name__}"
        )
    return parameters.model_dump(mode="json")
