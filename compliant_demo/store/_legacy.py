"""Shapes of stored data that older versions of the store wrote, their conversion to the current
records, and the additive chunk checksum of versions 3 to 5 (used by the schema migrations
only)."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, Literal

import numpy as np

from compliant_demo.store.records import ReplayParameters

__all__ = ["legacy_replay_parameters", "chunk_checksum"]

# Keys of the three shapes a version-3 store held in ``replay_results.parameters``.
_CAMPAIGN_KEYS = frozenset(("name", "perturbations", "kind"))
_COMMAND_KEYS = frozenset(
    ("skill_version", "schedule", "plant", "duration_s", "settle_s", "dt", "seed", "kind")
)
_NODE_KEYS = frozenset(
    ("skill", "plant_file", "schedule_file", "control_rate_hz", "duration_s", "settle_s", "seed",
     "method", "max_stiffness_rate", "real_time", "skill_version", "goal")
)  # fmt: skip
# The replay node's own upper bound of max_stiffness_rate, N*m/rad/s: a larger stored value
# (or infinity) meant "no limit".
_NODE_MAX_STIFFNESS_RATE = 1e9


_Source = Literal["campaign", "command", "node"]


def _shape(old: dict[str, Any], in_campaign: bool) -> tuple[_Source, frozenset[str]]:
    if "control_rate_hz" in old or "plant_file" in old:
        return "node", _NODE_KEYS
    if "perturbations" in old or "name" in old or (in_campaign and not old.keys() - _CAMPAIGN_KEYS):
        return "campaign", _CAMPAIGN_KEYS
    return "command", _COMMAND_KEYS


def _node_fields(old: dict[str, Any]) -> dict[str, Any]:
    rate = old.get("control_rate_hz")
    limit = old.get("max_stiffness_rate")
    max_stiffness_rate = None
    if limit is not None and math.isfinite(limit) and limit <= _NODE_MAX_STIFFNESS_RATE:
        max_stiffness_rate = float(limit)
    return {
        "skill_version": old.get("skill_version"),
        "plant_file": old.get("plant_file") or None,  # "" meant: the teaching scenario's plant
        "schedule_file": old.get("schedule_file") or None,
        # the node did not record the schedule's kinds; only "no schedule" is known for sure
        "kind": "unrecorded" if old.get("schedule_file") else "none",
        "dt": None if not rate else 1.0 / float(rate),
        "duration_s": old.get("duration_s") or None,  # 0 meant: the demonstrated duration
        "settle_s": old.get("settle_s"),
        "goal": old.get("goal") or None,  # [] meant: the demonstrated goal
        "seed": old.get("seed"),
        "method": old.get("method"),
        "max_stiffness_rate": max_stiffness_rate,
        "real_time": old.get("real_time"),
    }


def legacy_replay_parameters(
    old: object, in_campaign: bool, scenario_index: int | None
) -> dict[str, Any]:
    """The ReplayParameters document (JSON-ready) of a version-3 ``parameters`` document.

    Raises
    ------
    ValueError
        ``old`` is not one of the three version-3 shapes (names the keys it cannot place).
    """
    if not isinstance(old, dict):
        raise ValueError(f"parameters must be a JSON object, got {type(old).__name__}")
    source, allowed = _shape(old, in_campaign)
    unknown = sorted(old.keys() - allowed)
    if unknown:
        raise ValueError(f"keys {unknown} are not part of the {source} shape")
    fields: dict[str, Any]
    if source == "campaign":
        fields = {
            "kind": old.get("kind", "none"),
            "schedule": {key: old[key] for key in ("name", "perturbations") if key in old},
            "scenario_index": scenario_index,
        }
    elif source == "command":
        fields = dict(old)
    else:
        fields = _node_fields(old)
    return ReplayParameters(source=source, **fields).model_dump(mode="json")


_MASK64 = (1 << 64) - 1


def chunk_checksum(blobs: Sequence[bytes | None]) -> int:
    """Checksum of one chunk's blobs ``(t, position, velocity, torque, stiffness)``.

    The sum, modulo 2**64, over channels c = 0..4 of ``(2c + 1) * S_c``, where ``S_c`` is the sum
    modulo 2**64 of the blob read as little-endian unsigned 64-bit words (0 for an absent blob),
    returned as a signed 64-bit integer (two's complement) for SQLite. The odd weights make every
    single-bit flip change the sum; one pass of additions keeps loading fast.
    """
    total = 0
    for index, blob in enumerate(blobs):
        if blob:
            words = np.frombuffer(blob, dtype="<u8")
            total += (2 * index + 1) * int(np.add.reduce(words, dtype=np.uint64))
    total &= _MASK64
    return total - (1 << 64) if total >= 1 << 63 else total
