"""Helpers shared by the store tests: invented demonstration samples for the cork-seating bench
arm (two joints) and a check that a store file is intact."""

from __future__ import annotations

import json
import os
import sqlite3
import sys
from pathlib import Path

import numpy as np

from compliant_demo.store import DemoStore

JOINTS = ("shoulder", "elbow")
REPO = Path(__file__).resolve().parents[1]


def samples(
    n: int = 200,
    *,
    seed: int = 0,
    n_joints: int = 2,
    rate_hz: float = 1000.0,
    t0: float = 0.0,
    with_stiffness: bool = True,
) -> dict[str, np.ndarray | None]:
    """Invented samples: soft approach, stiff press, soft retreat (demo data, not a reference)."""
    rng = np.random.default_rng(seed)
    t = t0 + np.arange(n) / rate_hz
    phase = np.linspace(0.0, 1.0, n)[:, None]
    position = 0.4 * np.sin(np.pi * phase) + rng.normal(0, 1e-3, (n, n_joints))
    stiffness = 20.0 + 180.0 * np.exp(-(((phase - 0.5) / 0.15) ** 2)) * np.ones((1, n_joints))
    return {
        "t": t,
        "position": position,
        "velocity": np.gradient(position, t, axis=0) if n > 1 else np.zeros_like(position),
        "torque": stiffness * (0.05 - position),
        "stiffness": stiffness if with_stiffness else None,
    }


def add_demo(store: DemoStore, *, seed: int = 0, n: int = 200, **meta: object) -> str:
    """Add one complete demonstration of the cork-seating skill; returns its id."""
    data = samples(
        n,
        seed=seed,
        n_joints=len(meta.get("joints", JOINTS)),  # type: ignore[arg-type]
        with_stiffness=bool(meta.pop("with_stiffness", True)),
    )
    meta.setdefault("skill", "cork_seat")
    meta.setdefault("joints", JOINTS)
    meta.setdefault("operator", "operator_a")
    return store.add_demonstration(**data, **meta)  # type: ignore[arg-type]


def integrity(path: Path) -> str:
    """``PRAGMA integrity_check`` of a store file through a plain sqlite3 connection."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        return conn.execute("PRAGMA integrity_check").fetchone()[0]
    finally:
        conn.close()


def subprocess_env() -> dict[str, str]:
    """Environment for child Python processes that import compliant_demo from this checkout."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), env.get("PYTHONPATH")) if p)
    return env


PYTHON = sys.executable


def assert_same_demonstration(original, copy) -> None:
    """Every sample bit for bit (NaN included) and every metadata field but the row's creation
    and update times; ``original`` and ``copy`` are loaded demonstrations."""
    for name in ("t", "position", "velocity", "torque", "stiffness"):
        left, right = getattr(original, name), getattr(copy, name)
        assert (left is None) == (right is None), name
        if left is not None:
            assert left.dtype == right.dtype and left.shape == right.shape, name
            assert left.tobytes() == right.tobytes(), name
    assert original.joints == copy.joints
    ignored = ("created_at", "updated_at")
    fields = [{k: v for k, v in d.info.to_dict().items() if k not in ignored}
              for d in (original, copy)]  # fmt: skip
    # NaN summaries compare equal as JSON text ("NaN"), unlike NaN == NaN
    assert json.dumps(fields[0], sort_keys=True) == json.dumps(fields[1], sort_keys=True)
