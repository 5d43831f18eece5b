"""The one check of a message stamp (``sec``, ``nanosec``) that every node applies before it
trusts the time a message carries."""

from __future__ import annotations

__all__ = ["invalid_stamp"]

_NS_PER_S = 1_000_000_000


def invalid_stamp(sec: int, nanosec: int) -> tuple[str, str] | None:
    """``("invalid_stamp", detail)`` for a stamp no time can be read from (negative seconds,
    nanoseconds outside [0, 1e9), or unset: both zero), else None."""
    if sec < 0 or not 0 <= nanosec < _NS_PER_S or sec == nanosec == 0:
        return "invalid_stamp", f"sec={sec}, nanosec={nanosec}"
    return None
