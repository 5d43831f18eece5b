"""Damage to stored samples never loads as plausible numbers: a deleted chunk row, reordered 8-byte
words inside a blob, a blob cut short (with its count adjusted) and a wrong sample count are each
refused by a load, by a merge (naming the source store) and by ``compliant-demo verify`` (exit 1,
one line per finding)."""

from __future__ import annotations

import re
import sqlite3

import numpy as np
import pytest
from store_support import JOINTS

from compliant_demo.cli import main
from compliant_demo.exceptions import StoreCorruptError
from compliant_demo.store import DemoStore

N_SAMPLES = 20_000  # three chunks: 8192, 8192 and 3616 samples


def _data() -> dict[str, np.ndarray]:
    """Invented samples whose first sample is all zeros (so dropping it leaves any sum of the
    stored words unchanged)."""
    rng = np.random.default_rng(11)
    t = np.arange(N_SAMPLES) / 1000.0
    arrays = {
        name: rng.normal(0.0, 1.0, (N_SAMPLES, 2))
        for name in ("position", "velocity", "torque", "stiffness")
    }
    for values in arrays.values():
        values[0] = 0.0
    return {"t": t, **arrays}


def _cut_first_sample(conn: sqlite3.Connection, demo_id: str) -> None:
    blobs = conn.execute(
        "SELECT t, position, velocity, torque, stiffness FROM chunks WHERE demo_id = ? AND seq = 0",
        (demo_id,),
    ).fetchone()
    width = [8] + [16] * 4
    cut = [blob[size:] for blob, size in zip(blobs, width, strict=True)]
    conn.execute(
        "UPDATE chunks SET t = ?, position = ?, velocity = ?, torque = ?, stiffness = ?, "
        "n = n - 1 WHERE demo_id = ? AND seq = 0",
        (*cut, demo_id),
    )


def _swap_words(conn: sqlite3.Connection, demo_id: str) -> None:
    (blob,) = conn.execute(
        "SELECT position FROM chunks WHERE demo_id = ? AND seq = 1", (demo_id,)
    ).fetchone()
    words = bytearray(blob)
    words[8:16], words[16:24] = words[16:24], words[8:16]
    conn.execute(
        "UPDATE chunks SET position = ? WHERE demo_id = ? AND seq = 1", (bytes(words), demo_id)
    )


DAMAGE = {
    "deleted_chunk_row": (
        lambda conn, demo_id: conn.execute(
            "DELETE FROM chunks WHERE demo_id = ? AND seq = 1", (demo_id,)
        ),
        r"chunk sequence is 0, 2, expected 0\.\.1 \(missing 1\)",
    ),
    "swapped_words": (_swap_words, r"chunk 1 fails its SHA-256 digest"),
    "truncated_blob": (
        _cut_first_sample,
        r"chunks hold 19999 samples, the demonstration says 20000",
    ),
    "wrong_sample_count": (
        lambda conn, demo_id: conn.execute(
            "UPDATE demonstrations SET n_samples = 19000 WHERE id = ?", (demo_id,)
        ),
        r"chunks hold 20000 samples, the demonstration says 19000",
    ),
}


@pytest.fixture(params=sorted(DAMAGE))
def damaged(request, tmp_path):
    """A store with one sound and one damaged demonstration: (path, damaged id, message)."""
    path = tmp_path / "damaged.sqlite"
    with DemoStore(path) as store:
        sound = store.add_demonstration(**_data(), skill="cork_seat", joints=JOINTS)
        demo_id = store.add_demonstration(**_data(), skill="cork_seat", joints=JOINTS)
    damage, message = DAMAGE[request.param]
    conn = sqlite3.connect(path)
    damage(conn, demo_id)
    conn.commit()
    conn.close()
    return path, sound, demo_id, message


def test_load_refuses_damaged_samples(damaged):
    path, sound, demo_id, message = damaged
    with DemoStore(path, read_only=True) as store:
        with pytest.raises(StoreCorruptError, match=f"demonstration '{demo_id}': {message}"):
            store.load_demonstration(demo_id)
        assert store.load_demonstration(sound).t.size == N_SAMPLES


def test_merge_refuses_damaged_samples_naming_the_source(damaged, tmp_path):
    path, sound, demo_id, message = damaged
    target = tmp_path / "target.sqlite"
    with DemoStore(target) as store:
        with pytest.raises(StoreCorruptError, match=f"damaged.sqlite'.*{message}"):
            store.merge_from(path)
        assert {info.id for info in store.find_demonstrations()} <= {sound}
        assert store.verify() == []


def test_verify_reads_every_chunk_and_exits_non_zero(damaged, capsys):
    path, _sound, demo_id, message = damaged
    status = main(["verify", "--store", str(path)])
    lines = capsys.readouterr().out.splitlines()
    assert status == 1
    findings = lines[1:]
    assert lines[0].endswith(f"{len(findings)} finding(s)") and findings
    assert all(line.startswith(f"demonstration {demo_id}: ") for line in findings)
    assert any(re.search(message, line) for line in findings)


def test_verify_of_a_sound_store_is_ok(tmp_path, capsys):
    path = tmp_path / "sound.sqlite"
    with DemoStore(path) as store:
        store.add_demonstration(**_data(), skill="cork_seat", joints=JOINTS)
        assert store.verify() == []
    assert main(["verify", "--store", str(path)]) == 0
    assert capsys.readouterr().out.strip().endswith(": ok")
