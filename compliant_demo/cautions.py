"""The one safety caution every summary, the tour, the report page and the README carry.

Kept apart from the report so a command that prints a summary does not import the plotting
stack to say it.
"""

from __future__ import annotations

__all__ = ["SAFETY_CAUTION"]

SAFETY_CAUTION = (
    "Simulation does not certify a robot as safe: a risk assessment under the applicable "
    "standards (ISO 10218, ISO/TS 15066), local regulations and licensed practice decide."
)
