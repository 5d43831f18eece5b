"""Progress bars on stderr for the long steps of the workflow (campaigns, replays, the tour).

The core reports progress through plain callbacks (for example ``run_campaign``'s ``on_start`` and
``on_batch``); this module turns them into bars, so the core never draws on a terminal.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

from tqdm import tqdm

__all__ = ["CampaignProgress", "campaign_progress"]


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
        self._bar = tqdm(total=to_run, desc="campaign", unit="scenario", file=sys.stderr,
                         disable=not self.enabled, leave=False)

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
