"""Progress bars of the workflow steps, with a rate that means what it says.

The steps the bars follow are few and slow (a demonstration takes seconds), so the rate shown is
the average over the whole step (``smoothing=0``), in seconds per item when below one item per
second, and the bar only moves forward: tqdm's smoothed rate, fed updates by zero between two
demonstrations, divided one demonstration by the last 0.2 s polling interval.
"""

from __future__ import annotations

import sys

from tqdm import tqdm

__all__ = ["progress_bar", "advance_to"]


def progress_bar(desc: str, total: int, unit: str, enabled: bool) -> tqdm:
    """A bar on stderr for ``total`` items of ``unit``; hidden when not ``enabled``; gone when
    done (use it as a context manager)."""
    return tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, disable=not enabled,
                leave=False, smoothing=0)


def advance_to(bar: tqdm, done: int) -> None:
    """Move ``bar`` forward to ``done`` items (never back, never by zero)."""
    if done > bar.n:
        bar.update(done - bar.n)
