"""Readiness verdicts: one row per verdict reached on a skill version, a plant (by digest) and a
set of criteria (by digest), with its reasons, the criteria and the campaign it counts."""

from __future__ import annotations

import hashlib
import re
import time
import uuid
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.store import _codec
from compliant_demo.store._rows import decoded, mapping
from compliant_demo.store._session import StoreSession
from compliant_demo.store.records import VerdictRecord

if TYPE_CHECKING:
    from compliant_demo.readiness import Verdict

__all__ = ["save_verdict", "latest_verdict"]

_DIGEST = re.compile(r"[0-9a-f]{64}")
_COLUMNS = (
    "v.id, v.verdict, v.reasons, v.skill_id, s.version, v.plant_digest, v.criteria_digest, "
    "v.campaign_id, v.criteria, v.created"
)


def _digest(name: str, value: object) -> str:
    if not isinstance(value, str) or not _DIGEST.fullmatch(value):
        raise InvalidInputError(f"{name} must be a SHA-256 hex digest (64 of 0-9a-f), got "
                                f"{value!r}")
    return value


def _verdict_document(verdict: Verdict) -> tuple[str, list[dict[str, Any]]]:
    document = verdict.to_dict()
    if document.get("verdict") not in ("ready", "not_ready"):
        raise InvalidInputError(f"verdict must be 'ready' or 'not_ready', got "
                                f"{document.get('verdict')!r}")
    reasons = document.get("reasons")
    if not isinstance(reasons, list) or not all(isinstance(r, Mapping) for r in reasons):
        raise InvalidInputError(f"verdict reasons must be a list of mappings, got {reasons!r}")
    return document["verdict"], [dict(r) for r in reasons]


def save_verdict(
    session: StoreSession,
    verdict: Verdict,
    *,
    skill_id: str,
    plant_digest: str,
    criteria_digest: str,
    campaign_id: str | None,
    criteria: Mapping[str, Any],
) -> str:
    """Insert one verdict; its id. ``criteria_digest`` must be the SHA-256 of ``criteria``'s
    canonical JSON (what :attr:`compliant_demo.readiness.Criteria.digest` gives)."""
    label, reasons = _verdict_document(verdict)
    _digest("plant_digest", plant_digest)
    _digest("criteria_digest", criteria_digest)
    criteria_text = _codec.dumps(mapping("criteria", criteria))
    actual = hashlib.sha256(criteria_text.encode("utf-8")).hexdigest()
    if actual != criteria_digest:
        raise InvalidInputError(
            f"criteria_digest {criteria_digest!r} is not the digest of the criteria given "
            f"({actual!r})"
        )
    reasons_text = _codec.dumps(reasons)
    verdict_id = str(uuid.uuid4())
    with session.transaction() as conn:
        if not conn.execute("SELECT 1 FROM skills WHERE id = ?", (skill_id,)).fetchone():
            raise NotFoundError(f"skill id {skill_id!r} not found in {session.label}")
        if campaign_id is not None:
            row = conn.execute(
                "SELECT skill_id FROM campaigns WHERE id = ?", (campaign_id,)
            ).fetchone()
            if row is None:
                raise NotFoundError(f"campaign {campaign_id!r} not found in {session.label}")
            if row[0] != skill_id:
                raise InvalidInputError(
                    f"campaign_id {campaign_id!r} replays skill {row[0]!r}, not skill_id "
                    f"{skill_id!r}"
                )
        conn.execute(
            "INSERT INTO verdicts (id, skill_id, campaign_id, plant_digest, criteria_digest, "
            "verdict, reasons, criteria, created) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (verdict_id, skill_id, campaign_id, plant_digest, criteria_digest, label,
             reasons_text, criteria_text, time.time()),
        )  # fmt: skip
    return verdict_id


def _record(row: tuple[Any, ...]) -> VerdictRecord:
    return VerdictRecord(
        id=row[0], verdict=row[1], reasons=_codec.loads(row[2]), skill_id=row[3],
        skill_version=int(row[4]), plant_digest=row[5], criteria_digest=row[6],
        campaign_id=row[7], criteria=_codec.loads(row[8]), created_at=float(row[9]),
    )  # fmt: skip


def latest_verdict(
    session: StoreSession, skill_id: str, *, plant_digest: str, criteria_digest: str
) -> VerdictRecord | None:
    """The newest verdict of ``skill_id`` on that plant under those criteria, or None."""
    _codec.validate_text("skill_id", skill_id, allow_empty=False)
    _digest("plant_digest", plant_digest)
    _digest("criteria_digest", criteria_digest)
    with session.snapshot() as conn:
        row = conn.execute(
            f"SELECT {_COLUMNS} FROM verdicts v JOIN skills s ON s.id = v.skill_id "
            "WHERE v.skill_id = ? AND v.plant_digest = ? AND v.criteria_digest = ? "
            "ORDER BY v.created DESC, v.rowid DESC LIMIT 1",
            (skill_id, plant_digest, criteria_digest),
        ).fetchone()
    if row is None:
        return None
    return decoded(session.label, f"verdict {row[0]!r}", lambda: _record(row))
