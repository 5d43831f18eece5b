"""How numbers and stored text appear to people, on the terminal and in the report page.

Numbers show 4 significant digits and per-joint lists are labelled by joint name; stored text
(an operator name, notes, a tag from an imported file) has its control characters escaped, so it
can neither drive a terminal nor forge a table row. The command line's tables and the report's
tables both go through :func:`format_value`.
"""

from __future__ import annotations

import math
import numbers
import unicodedata
from collections.abc import Mapping, Sequence
from typing import Any

__all__ = ["SIGNIFICANT_DIGITS", "printable", "format_value"]

#: Significant digits of every number a table shows.
SIGNIFICANT_DIGITS = 4

_NAMED_ESCAPES = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def printable(text: object) -> str:
    """``text`` with every control or format character escaped (``\\x1b``, ``\\n``, ``\\u202e``).

    Stored text reaches the terminal only through this function, so it can neither send escape
    sequences nor forge table rows.
    """
    out = []
    for char in str(text):
        if unicodedata.category(char) in ("Cc", "Cf", "Cs", "Zl", "Zp"):
            code = ord(char)
            named = _NAMED_ESCAPES.get(char)
            out.append(named or (f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"))
        else:
            out.append(char)
    return "".join(out)


def format_value(value: Any, joints: Sequence[str] | None = None) -> str:
    """A number or per-joint list as a table shows it: 4 significant digits, joints by name.

    ``[0.29669, 0.34688]`` with ``joints=("shoulder", "elbow")`` gives
    ``shoulder 0.2967, elbow 0.3469``; a list of another length is shown unlabelled.
    """
    if value is None:
        return "-"
    if isinstance(value, bool):
        return str(value)
    if isinstance(value, numbers.Integral):
        return str(int(value))
    if isinstance(value, numbers.Real):
        number = float(value)
        return f"{number:.{SIGNIFICANT_DIGITS}g}" if math.isfinite(number) else str(number)
    if isinstance(value, Mapping):
        return ", ".join(f"{printable(k)} {format_value(v)}" for k, v in value.items())
    if isinstance(value, list | tuple):
        items = [format_value(v) for v in value]
        if joints is not None and len(joints) == len(items) and len(items) > 0:
            pairs = zip(joints, items, strict=True)
            return ", ".join(f"{printable(joint)} {item}" for joint, item in pairs)
        return ",".join(items)
    return printable(value)
