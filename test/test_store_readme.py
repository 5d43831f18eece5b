"""The README's "Demonstration store" example runs as written, and its sample layout text is
what the store does: a reader that follows only the README gets the same arrays."""

from __future__ import annotations

import hashlib
import os
import re
import sqlite3
import subprocess
import sys

import numpy as np
from store_support import JOINTS, REPO, add_demo

from compliant_demo.store import DemoStore

SECTION = "## Demonstration store"


def _section() -> str:
    text = (REPO / "README.md").read_text(encoding="utf-8")
    return text.split(SECTION, 1)[1].split("\n## ", 1)[0]


def test_readme_store_example_runs(tmp_path):
    with DemoStore(tmp_path / "bench_b.sqlite") as other:
        merged = add_demo(other, operator="operator_b")
    (block,) = re.findall(r"```python\n(.*?)```", _section(), re.S)
    env = dict(
        os.environ, PYTHONPATH=os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")])
    )
    result = subprocess.run([sys.executable, "-c", block], cwd=tmp_path, env=env,
                            capture_output=True, text=True, timeout=120)  # fmt: skip
    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    assert "complete {'shoulder': 0.1497, 'elbow': 0.0499} {'drops': 0}" in lines[0]
    assert lines[1] == f"['{merged}'] [] []"
    assert (tmp_path / "cork_seat.csv").read_text().startswith("# compliant_demo demonstration")


def _readme_reader(path, demo_id):
    """Reads samples with plain sqlite3 and numpy, following only the README's layout text."""
    conn = sqlite3.connect(path)
    joints_json, n_joints = conn.execute(
        "SELECT joints, n_joints FROM demonstrations WHERE id = ?", [demo_id]
    ).fetchone()
    rows = conn.execute(
        "SELECT seq, n, t, position, velocity, torque, stiffness, digest FROM chunks "
        "WHERE demo_id = ? ORDER BY seq",
        [demo_id],
    ).fetchall()
    conn.close()
    channels = {name: [] for name in ("t", "position", "velocity", "torque", "stiffness")}
    for seq, n, *blobs, digest in rows:
        text = seq.to_bytes(8, "little") + n.to_bytes(8, "little")
        for blob in blobs:
            text += len(blob or b"").to_bytes(8, "little") + (blob or b"")
        assert hashlib.sha256(text).digest() == digest  # FIPS 180-4 SHA-256, from hashlib
        for name, blob in zip(channels, blobs, strict=True):
            channels[name].append(np.frombuffer(blob, dtype="<f8"))
        assert channels["t"][-1].size == n
    arrays = {name: np.concatenate(parts) for name, parts in channels.items()}
    for name in ("position", "velocity", "torque", "stiffness"):
        arrays[name] = arrays[name].reshape(-1, n_joints)
    return joints_json, arrays


def test_readme_layout_reader_matches_the_store(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS)
        rng = np.random.default_rng(4)
        for i in range(3):
            t = i + np.arange(7) / 10.0
            store.append_chunk(demo_id, t, *(rng.normal(size=(7, 2)) for _ in range(4)))
        store.finish_demonstration(demo_id)
        demo = store.load_demonstration(demo_id)
    joints_json, arrays = _readme_reader(path, demo_id)
    assert joints_json == '["shoulder", "elbow"]'
    for name, values in arrays.items():
        assert values.tobytes() == getattr(demo, name).tobytes(), name
