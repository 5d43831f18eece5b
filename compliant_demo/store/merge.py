"""Merging one store file into another: demonstrations, skill versions, campaigns and replay
results keep their UUIDs, identical ones are skipped, differing or clashing ones are reported as
conflicts and left as they are."""

from __future__ import annotations

import hashlib
import sqlite3
import uuid
from typing import Any

from compliant_demo.exceptions import StoreError
from compliant_demo.store import _codec
from compliant_demo.store._rows import INFO_COLUMNS, checked_infos, decoded
from compliant_demo.store._samples import read_samples
from compliant_demo.store._session import StoreSession
from compliant_demo.store.records import MergeConflict, MergeReport, ReplayParameters

__all__ = ["merge_into", "content_digest"]

# Columns that define a demonstration's identity; summaries follow from the samples and
# timestamps of bookkeeping (created_at, updated_at, writer_token) may differ between copies.
_IDENTITY_COLUMNS = (
    "skill", "operator", "tags", "notes", "source", "joints", "nominal_rate_hz", "start_time",
    "status", "has_stiffness", "n_samples",
)  # fmt: skip
_COPY_COLUMNS = (
    "id", "skill", "operator", "tags", "notes", "source", "joints", "n_joints", "nominal_rate_hz",
    "start_time", "status", "status_reason", "has_stiffness", "n_samples", "t_first", "t_last",
    "duration_s", "mean_rate_hz", "range_of_motion", "peak_abs_torque", "stiffness_min",
    "stiffness_max", "range_of_motion_json", "peak_abs_torque_json", "stiffness_min_json",
    "stiffness_max_json", "flags", "created_at", "updated_at",
)  # fmt: skip
_CHUNK_COLUMNS = (
    "demo_id", "seq", "n", "t_first", "t_last", "t", "position", "velocity", "torque", "stiffness",
    "digest",
)  # fmt: skip


def content_digest(conn: Any, demo_id: str) -> str:
    """SHA-256 over a demonstration's sample bytes, channel by channel in time order."""
    digest = hashlib.sha256()
    for channel in ("t", "position", "velocity", "torque", "stiffness"):
        digest.update(channel.encode())
        for (blob,) in conn.execute(
            f"SELECT {channel} FROM chunks WHERE demo_id = ? ORDER BY seq", (demo_id,)
        ):
            digest.update(b"" if blob is None else blob)
    return digest.hexdigest()


def _is_uuid(value: str) -> bool:
    try:
        return str(uuid.UUID(value)) == value
    except (ValueError, TypeError, AttributeError):
        return False


def _identity(conn: Any, demo_id: str) -> dict[str, Any] | None:
    row = conn.execute(
        f"SELECT {', '.join(_IDENTITY_COLUMNS)} FROM demonstrations WHERE id = ?", (demo_id,)
    ).fetchone()
    return None if row is None else dict(zip(_IDENTITY_COLUMNS, row, strict=True))


# Records merged after the demonstrations, parents first: table, columns, child table with the
# column that points to the record and its columns, and the report list of added ids.
_RECORDS = (
    ("skill", "skills", ("id", "name", "version", "payload", "parameters", "created"),
     ("skill_demonstrations", "skill_id", ("skill_id", "position", "demo_id")), "skills_added"),
    ("campaign", "campaigns", ("id", "skill_id", "config", "created"), None, "campaigns_added"),
    ("replay result", "replay_results",
     ("id", "skill_id", "campaign_id", "scenario_index", "status", "reason", "metrics",
      "parameters", "created"),
     ("replay_traces", "result_id", ("result_id", "channel", "shape", "data")), "results_added"),
    ("verdict", "verdicts",
     ("id", "skill_id", "campaign_id", "plant_digest", "criteria_digest", "verdict", "reasons",
      "criteria", "created"), None, "verdicts_added"),
)  # fmt: skip


def _record(conn: Any, table: str, columns: tuple[str, ...], child: Any, key: str) -> Any:
    """A record's row and its children's rows, comparable between two stores."""
    row = conn.execute(f"SELECT {', '.join(columns)} FROM {table} WHERE id = ?", (key,)).fetchone()
    if row is None or child is None:
        return row, []
    child_table, parent_column, child_columns = child
    rows = conn.execute(
        f"SELECT {', '.join(child_columns)} FROM {child_table} WHERE {parent_column} = ? "
        f"ORDER BY {', '.join(child_columns[:2])}",
        (key,),
    ).fetchall()
    return row, rows


# JSON columns of each record's row, decoded in the source before a copy: damage is reported
# against the store that holds it, never copied into the target.
_JSON_COLUMNS = {
    "skills": ("payload", "parameters"),
    "campaigns": ("config",),
    "replay_results": ("metrics", "parameters"),
    "verdicts": ("reasons", "criteria"),
}


def _check_record(source: StoreSession, kind: str, table: str, columns: tuple, row: Any) -> None:
    def decode() -> None:
        for name in _JSON_COLUMNS[table]:
            document = _codec.loads(row[columns.index(name)])
            if table == "replay_results" and name == "parameters":
                ReplayParameters.model_validate(document)

    decoded(source.label, f"{kind} {row[0]!r}", decode)


def _merge_records(target: StoreSession, source: StoreSession, report: MergeReport) -> None:
    for kind, table, columns, child, added in _RECORDS:
        with source.snapshot() as src:
            keys = [row[0] for row in src.execute(f"SELECT id FROM {table} ORDER BY created, id")]
        for key in keys:
            with source.snapshot() as src:
                theirs = _record(src, table, columns, child, key)
            try:
                with target.transaction() as dst:
                    ours = _record(dst, table, columns, child, key)
                    if ours[0] is not None:
                        if ours == theirs:
                            report.records_skipped += 1
                        else:
                            report.conflicts.append(MergeConflict(key, f"{kind} differs here"))
                        continue
                    if theirs[0] is None:  # deleted in the source since we listed it
                        continue
                    _check_record(source, kind, table, columns, theirs[0])
                    _insert(dst, table, columns, [theirs[0]])
                    if child is not None:
                        _insert(dst, child[0], child[2], theirs[1])
                    getattr(report, added).append(key)
            except StoreError as exc:
                if not isinstance(exc.__cause__, sqlite3.IntegrityError):
                    raise
                # the constraint names the clash: (name, version) taken, parent missing ...
                report.conflicts.append(MergeConflict(key, f"{kind} not copied: {exc.__cause__}"))


def _insert(conn: Any, table: str, columns: tuple[str, ...], rows: Any) -> None:
    conn.executemany(
        f"INSERT INTO {table} ({', '.join(columns)}) VALUES ({', '.join('?' for _ in columns)})",
        rows,
    )


def merge_into(target: StoreSession, source: StoreSession) -> MergeReport:
    """Copy every finished demonstration, then every skill version, campaign and replay result
    of ``source`` missing from ``target``."""
    report = MergeReport()
    with source.snapshot() as src:
        ids = [
            row[0] for row in src.execute("SELECT id FROM demonstrations ORDER BY created_at, id")
        ]
    for demo_id in ids:
        with source.snapshot() as src, target.transaction() as dst:
            theirs = _identity(src, demo_id)
            if theirs is None:  # deleted in the source since we listed it
                continue
            if not _is_uuid(demo_id):
                report.conflicts.append(MergeConflict(demo_id, "id is not a UUID: not copied"))
                continue
            if theirs["status"] == "recording":
                report.conflicts.append(MergeConflict(demo_id, "still recording in the source"))
                continue
            ours = _identity(dst, demo_id)
            if ours is not None:
                differing = [k for k in _IDENTITY_COLUMNS if ours[k] != theirs[k]]
                if not differing and content_digest(src, demo_id) != content_digest(dst, demo_id):
                    differing = ["samples"]
                if differing:
                    report.conflicts.append(
                        MergeConflict(demo_id, f"differs in {', '.join(differing)}")
                    )
                else:
                    report.skipped_duplicates.append(demo_id)
                continue
            # damaged metadata or samples are never copied: the error names the source
            checked_infos(
                [src.execute(f"SELECT {INFO_COLUMNS} FROM demonstrations WHERE id = ?",
                             (demo_id,)).fetchone()],
                source.label,
            )  # fmt: skip
            read_samples(src, demo_id, label=source.label)
            row = src.execute(
                f"SELECT {', '.join(_COPY_COLUMNS)} FROM demonstrations WHERE id = ?", (demo_id,)
            ).fetchone()
            _insert(dst, "demonstrations", _COPY_COLUMNS, [row])
            _insert(
                dst, "demonstration_tags", ("demo_id", "tag"),
                src.execute("SELECT demo_id, tag FROM demonstration_tags WHERE demo_id = ?",
                            (demo_id,)),
            )  # fmt: skip
            _insert(
                dst, "chunks", _CHUNK_COLUMNS,
                src.execute(f"SELECT {', '.join(_CHUNK_COLUMNS)} FROM chunks WHERE demo_id = ? "
                            "ORDER BY seq", (demo_id,)),
            )  # fmt: skip
            report.added.append(demo_id)
    _merge_records(target, source, report)
    return report
