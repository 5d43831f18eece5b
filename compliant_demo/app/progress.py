"""Progress bars of the workflow steps, with a rate that means what it says.

The steps the bars follow are few and slow (a demonstration takes seconds), so the rate shown is
the average over the whole step (``smoothing=0``), in seconds per item when below one item per
second, and the bar only moves forward: tqdm's smoothed rate, fed updates by zero between two
demonstrations, divided one demonstration by the last 0.2 s polling interval. The core reports
progress through plain callbacks (for example ``run_campaign``'s ``on_start`` and ``on_batch``);
:class:`CampaignProgress` turns them into a bar, so the core never draws on a terminal.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

from tqdm import tqdm

__all__ = ["progress_bar", "advance_to", "CampaignProgress", "campaign_progress", "ReadProgress"]


def progress_bar(desc: str, total: int, unit: str, enabled: bool) -> tqdm:
    """A bar on stderr for ``total`` items of ``unit``; hidden when not ``enabled``; gone when
    done (use it as a context manager)."""
    return tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, disable=not enabled,
                leave=False, smoothing=0)


def advance_to(bar: tqdm, done: int) -> None:
    """Move ``bar`` forward to ``done`` items (never back, never by zero)."""
    if done > bar.n:
        bar.update(done - bar.n)


@dataclass
class CampaignProgress:
    """Callbacks for :func:`compliant_demo.campaign.run_campaign` that drive one bar.

    ``announce`` (optional) is called with the campaign id once it is known, e.g. to print it.
    """

    enabled: bool
    announce: Callable[[str], None] | None = None
    _bar: Any = field(default=None, init=False, repr=False)

    def on_start(self, campaign_id: str, to_run: int) -> None:
        """Open the bar once the campaign and the number of scenarios to run are known."""
        if self.announce is not None:
            self.announce(campaign_id)
        self._bar = progress_bar("campaign", to_run, "scenario", self.enabled)

    def on_batch(self, outcomes: Sequence[Any]) -> None:
        """Advance the bar by one batch's stored scenarios."""
        if self._bar is not None:
            self._bar.update(len(outcomes))

    def close(self) -> None:
        """Close the bar (also after an interrupted campaign)."""
        if self._bar is not None:
            self._bar.close()
            self._bar = None


@contextmanager
def campaign_progress(
    enabled: bool, announce: Callable[[str], None] | None = None
) -> Iterator[CampaignProgress]:
    """A :class:`CampaignProgress` that is closed however the campaign ends."""
    progress = CampaignProgress(enabled, announce)
    try:
        yield progress
    finally:
        progress.close()


class ReadProgress:
    """A ``(done, total)`` callback for the store's file readers: a bar on stderr, drawn once the
    total is known to reach ``min_total`` (small files are read before a bar would help).

    Parameters
    ----------
    desc : the bar's label (the file's name)
    unit : what is counted ("B" for bytes of a file, "msg" for messages of a bag)
    enabled : draw at all (e.g. stderr is a terminal)
    min_total : the smallest total worth a bar
    """

    def __init__(self, desc: str, unit: str, enabled: bool, min_total: int = 0) -> None:
        self.desc, self.unit, self.enabled, self.min_total = desc, unit, enabled, min_total
        self._bar: tqdm | None = None

    def __call__(self, done: int, total: int) -> None:
        if self._bar is None:
            if not self.enabled or total < self.min_total:
                return
            self._bar = progress_bar(self.desc, total, self.unit, True)
            self._bar.unit_scale = self.unit == "B"
        advance_to(self._bar, done)

    def close(self) -> None:
        """Close the bar, if one was drawn."""
        if self._bar is not None:
            self._bar.close()
            self._bar = None
