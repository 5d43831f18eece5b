"""Where the store lives when nobody says: ``$COMPLIANT_DEMO_STORE``, else under the user's XDG
data folder. The command line and the nodes share this one default."""

from __future__ import annotations

import os
from pathlib import Path

__all__ = ["STORE_ENV", "default_store_path"]

STORE_ENV = "COMPLIANT_DEMO_STORE"


def default_store_path() -> Path:
    """The embedded default store: $COMPLIANT_DEMO_STORE, else $XDG_DATA_HOME/compliant_demo."""
    if os.environ.get(STORE_ENV):
        return Path(os.environ[STORE_ENV])
    data_home = Path(os.environ.get("XDG_DATA_HOME") or Path.home() / ".local" / "share")
    return data_home / "compliant_demo" / "store.sqlite"
