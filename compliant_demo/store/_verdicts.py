"""Readiness verdicts: one row per verdict reached on a skill version, a plant (by digest) and a
set of criteria (by digest), with its reasons, the criteria and the campaign it counts."""

from __future__ import annotations

import hashlib
import json
import re
import time
import uuid
from collections.abc import Mapping
from typing import Any, Protocol

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.store import _codec
from compliant_demo.store._rows import decoded, mapping
from compliant_demo.store._session import StoreSession
from compliant_demo.store.records import VerdictRecord

__all__ = ["VerdictDocument", "save_verdict", "latest_verdict", "damaged_verdicts"]


class VerdictDocument(Protocol):
    """What the store needs of a verdict (:class:`compliant_demo.readiness.Verdict`, which the
    store does not import: readiness builds on the store)."""

    def to_dict(self) -> dict[str, Any]:
        """``{"verdict": "ready" | "not_ready", "reasons": [{...}, ...]}``."""
        ...

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


def _document_problem(label: object, reasons: object) -> str | None:
    """What makes a verdict and its reasons inconsistent (the gate trusts a stored 'ready'),
    or None."""
    if label not in ("ready", "not_ready"):
        return f"verdict must be 'ready' or 'not_ready', got {label!r}"
    if not isinstance(reasons, list) or not all(isinstance(r, Mapping) for r in reasons):
        return f"verdict reasons must be a list of mappings, got {reasons!r:.80}"
    if (label == "ready") == bool(reasons):
        return (f"verdict {label!r} with {len(reasons)} reason(s): 'ready' has none, "
                "'not_ready' at least one")
    for number, reason in enumerate(reasons):
        check = reason.get("check")
        if not isinstance(check, str) or not check:
            return f"verdict reason {number}: 'check' must name a check, got {check!r}"
    try:
        json.dumps(reasons, allow_nan=False, default=str)
    except ValueError:
        return "verdict reasons: every number must be finite (NaN or inf given)"
    return None


def _verdict_document(verdict: VerdictDocument) -> tuple[str, list[dict[str, Any]]]:
    document = verdict.to_dict()
    label, reasons = document.get("verdict"), document.get("reasons")
    problem = _document_problem(label, reasons)
    if problem is not None or not isinstance(reasons, list):
        raise InvalidInputError(problem)
    return str(label), [dict(r) for r in reasons]


def save_verdict(
    session: StoreSession,
    verdict: VerdictDocument,
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
    reasons, criteria = _codec.loads(row[2]), _codec.loads(row[8])
    problem = _document_problem(row[1], reasons)
    if problem is not None:
        raise ValueError(problem)
    if not isinstance(criteria, dict):
        raise ValueError(f"criteria must be a mapping, got {type(criteria).__name__}")
    return VerdictRecord(
        id=row[0], verdict=row[1], reasons=reasons, skill_id=row[3],
        skill_version=int(row[4]), plant_digest=row[5], criteria_digest=row[6],
        campaign_id=row[7], criteria=criteria, created_at=float(row[9]),
    )  # fmt: skip


def damaged_verdicts(session: StoreSession) -> list[str]:
    """One line per stored verdict whose reasons or criteria cannot be read back (for verify)."""
    with session.snapshot() as conn:
        rows = conn.execute(
            f"SELECT {_COLUMNS} FROM verdicts v LEFT JOIN skills s ON s.id = v.skill_id "
            "ORDER BY v.id").fetchall()
    findings = []
    for row in rows:
        try:
            _record(row)
        except (ValueError, TypeError) as exc:
            findings.append(f"verdict {row[0]}: damaged stored data: {exc}")
    return findings


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
