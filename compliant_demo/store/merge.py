"""Merging one store file into another: demonstrations keep their UUIDs, identical ones are
skipped, differing ones are reported as conflicts and left as they are."""

from __future__ import annotations

import hashlib
import json
import uuid
from typing import TYPE_CHECKING, Any

from compliant_demo.store._schema import read_samples
from compliant_demo.store.records import MergeConflict, MergeReport

if TYPE_CHECKING:
    from compliant_demo.store.core import DemoStore

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
    "checksum",
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


def merge_into(target: DemoStore, source: DemoStore) -> MergeReport:
    """Copy every finished demonstration of ``source`` missing from ``target``."""
    report = MergeReport()
    with source._snapshot() as src:
        ids = [
            row[0] for row in src.execute("SELECT id FROM demonstrations ORDER BY created_at, id")
        ]
    for demo_id in ids:
        with source._snapshot() as src, target._transaction() as dst:
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
            # verifies the checksums: damaged samples are never copied
            read_samples(src, demo_id, len(json.loads(theirs["joints"])),
                         bool(theirs["has_stiffness"]), label=source._label)  # fmt: skip
            row = src.execute(
                f"SELECT {', '.join(_COPY_COLUMNS)} FROM demonstrations WHERE id = ?", (demo_id,)
            ).fetchone()
            dst.execute(
                f"INSERT INTO demonstrations ({', '.join(_COPY_COLUMNS)}) "
                f"VALUES ({', '.join('?' for _ in _COPY_COLUMNS)})",
                row,
            )
            dst.executemany(
                "INSERT INTO demonstration_tags (demo_id, tag) VALUES (?, ?)",
                src.execute(
                    "SELECT demo_id, tag FROM demonstration_tags WHERE demo_id = ?", (demo_id,)
                ),
            )
            for chunk in src.execute(
                f"SELECT {', '.join(_CHUNK_COLUMNS)} FROM chunks WHERE demo_id = ? ORDER BY seq",
                (demo_id,),
            ):
                dst.execute(
                    f"INSERT INTO chunks ({', '.join(_CHUNK_COLUMNS)}) "
                    f"VALUES ({', '.join('?' for _ in _CHUNK_COLUMNS)})",
                    chunk,
                )
            report.added.append(demo_id)
    return report
