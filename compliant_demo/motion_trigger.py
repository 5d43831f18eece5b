"""Start and stop a demonstration on motion: the recorder's ``auto_start`` trigger."""

from __future__ import annotations

from collections.abc import Sequence

from compliant_demo.exceptions import InvalidInputError

__all__ = ["MotionTrigger"]


class MotionTrigger:
    """Start a demonstration when any joint moves, stop it when all have been still for a while.

    Parameters
    ----------
    start_speed : float, rad/s
        A sample with any joint faster than this starts a demonstration.
    stop_speed : float, rad/s
        All joints slower than this count as still (must not exceed ``start_speed``).
    stop_hold_s : float, s
        How long the joints must stay still before the demonstration stops.
    """

    def __init__(self, start_speed: float, stop_speed: float, stop_hold_s: float):
        if not 0 < stop_speed <= start_speed:
            raise InvalidInputError(
                f"stop_speed: must be in (0, start_speed={start_speed}], got {stop_speed}"
            )
        if not stop_hold_s > 0:
            raise InvalidInputError(f"stop_hold_s: must be positive, got {stop_hold_s}")
        self.start_speed = start_speed
        self.stop_speed = stop_speed
        self.stop_hold_s = stop_hold_s
        self._still_since: float | None = None

    def should_start(self, velocity: Sequence[float]) -> bool:
        """True when this sample's motion (rad/s per joint) should start a demonstration."""
        self._still_since = None
        return max(map(abs, velocity)) > self.start_speed

    def should_stop(self, stamp: float, velocity: Sequence[float]) -> bool:
        """True once every joint has stayed below ``stop_speed`` for ``stop_hold_s``."""
        if max(map(abs, velocity)) >= self.stop_speed:
            self._still_since = None
            return False
        if self._still_since is None:
            self._still_since = stamp
        return stamp - self._still_since >= self.stop_hold_s
