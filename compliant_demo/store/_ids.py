"""Ids for people: any unique prefix of a demonstration, skill, campaign or replay result id
names it, and campaigns are listed with their progress."""

from __future__ import annotations

import json
from functools import partial

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.store import _codec
from compliant_demo.store._rows import decoded
from compliant_demo.store._session import StoreSession
from compliant_demo.store.records import CampaignProgress

__all__ = ["ID_KINDS", "resolve_prefix", "list_campaigns"]

# kind of record -> its table
ID_KINDS = {
    "demonstration": "demonstrations",
    "skill": "skills",
    "campaign": "campaigns",
    "result": "replay_results",
}
_SHOWN_CANDIDATES = 5


def resolve_prefix(session: StoreSession, kind: str, prefix: str) -> str:
    """The full id of the one ``kind`` record whose id is or starts with ``prefix``.

    Raises
    ------
    NotFoundError
        No id starts with ``prefix``.
    InvalidInputError
        Several do (the message lists some), ``prefix`` is empty or ``kind`` unknown.
    """
    if kind not in ID_KINDS:
        raise InvalidInputError(f"kind must be one of {', '.join(ID_KINDS)}; got {kind!r}")
    _codec.validate_text(f"{kind} id", prefix, allow_empty=False)
    wanted = prefix.strip().lower()  # ids are lowercase UUID text
    with session.snapshot() as conn:
        # a range over the primary key: no scan, and no LIKE wildcards in the prefix to escape
        rows = conn.execute(
            f"SELECT id FROM {ID_KINDS[kind]} WHERE id >= ? AND id < ? ORDER BY id LIMIT ?",
            (wanted, wanted + "\U0010ffff", _SHOWN_CANDIDATES + 1),
        ).fetchall()
    matches = [row[0] for row in rows]
    if wanted in matches:
        return wanted
    if not matches:
        raise NotFoundError(f"no {kind} id starts with {prefix!r} in {session.label}")
    if len(matches) > 1:
        shown = ", ".join(matches[:_SHOWN_CANDIDATES])
        more = ", ..." if len(matches) > _SHOWN_CANDIDATES else ""
        raise InvalidInputError(
            f"{kind} id prefix {prefix!r} is ambiguous: it starts {shown}{more}"
        )
    return str(matches[0])


def _planned(config: str) -> int | None:
    planned = json.loads(config).get("n_scenarios")
    return None if planned is None else int(planned)


def list_campaigns(session: StoreSession) -> list[CampaignProgress]:
    """Every campaign with its skill and how many of its scenarios are stored, oldest first."""
    with session.snapshot() as conn:
        rows = conn.execute(
            "SELECT c.id, c.skill_id, s.name, s.version, c.created, c.config, "
            "(SELECT count(*) FROM replay_results r WHERE r.campaign_id = c.id) "
            "FROM campaigns c JOIN skills s ON s.id = c.skill_id ORDER BY c.created, c.id"
        ).fetchall()
    campaigns = []
    for campaign_id, skill_id, name, version, created, config, stored in rows:
        what = f"campaign {campaign_id!r}"
        planned = decoded(session.label, what, partial(_planned, config))
        campaigns.append(
            CampaignProgress(
                id=campaign_id,
                skill_id=skill_id,
                skill_name=name,
                skill_version=version,
                created=created,
                scenarios_stored=stored,
                scenarios_planned=planned,
            )  # fmt: skip
        )
    return campaigns
