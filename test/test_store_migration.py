"""Schema versions: a version-1 store written by a small script here (the layout the first
release used) is migrated through every registered migration to the current schema; failed
migrations leave the file as it was."""

from __future__ import annotations

import json
import re
import sqlite3

import numpy as np
import pytest
from store_support import integrity

from compliant_demo.exceptions import SchemaVersionError, StoreCorruptError
from compliant_demo.store import SCHEMA_VERSION, DemoStore
from compliant_demo.store._schema import MIGRATIONS

_V1_SCHEMA = """
CREATE TABLE schema_migrations (
    version INTEGER PRIMARY KEY, applied_at REAL NOT NULL, description TEXT NOT NULL);
CREATE TABLE demonstrations (
    id TEXT PRIMARY KEY, skill TEXT NOT NULL, operator TEXT, tags TEXT, notes TEXT, source TEXT,
    joints TEXT NOT NULL, nominal_rate_hz REAL, start_time REAL, status TEXT NOT NULL,
    has_stiffness INTEGER NOT NULL, n_samples INTEGER, duration_s REAL, created_at REAL);
CREATE TABLE chunks (
    demo_id TEXT NOT NULL REFERENCES demonstrations(id), seq INTEGER NOT NULL, n INTEGER NOT NULL,
    t BLOB NOT NULL, position BLOB NOT NULL, velocity BLOB NOT NULL, torque BLOB NOT NULL,
    stiffness BLOB, PRIMARY KEY (demo_id, seq));
INSERT INTO schema_migrations VALUES (1, 1700000000.0, 'created');
"""

IDS = ("0b9c3a4e-7a51-4c49-9d43-8b2f5a9e0c11", "5f0e2d6c-1b8a-4f3e-a7c9-2d4b6e8f0a12")


def _blob(array) -> bytes:
    return np.ascontiguousarray(array, dtype="<f8").tobytes()


def write_v1_store(path, *, dangling_chunk: bool = False) -> dict:
    """Create a version-1 store with two demonstrations, one without stiffness; return samples."""
    conn = sqlite3.connect(path)
    conn.executescript(_V1_SCHEMA)
    t = np.arange(100) / 100.0
    position = np.column_stack([np.linspace(-0.5, 0.7, 100), np.linspace(0.1, 0.2, 100)])
    torque = np.column_stack([np.full(100, 1.5), -np.linspace(0.0, 4.0, 100)])
    stiffness = np.column_stack([np.full(100, 30.0), np.linspace(40.0, 90.0, 100)])
    data = {"t": t, "position": position, "velocity": 2 * position, "torque": torque,
            "stiffness": stiffness}  # fmt: skip
    for demo_id, with_stiffness, tags in ((IDS[0], 1, ["press", "soft"]), (IDS[1], 0, None)):
        conn.execute(
            "INSERT INTO demonstrations VALUES (?, 'cork_seat', 'operator_a', ?, NULL, "
            "'recorded', ?, 100.0, 1700000100.0, 'complete', ?, 100, 0.99, 1700000200.0)",
            [demo_id, None if tags is None else json.dumps(tags), json.dumps(["shoulder", "elbow"]),
             with_stiffness],
        )  # fmt: skip
        for seq, part in enumerate((slice(0, 60), slice(60, 100))):
            conn.execute(
                "INSERT INTO chunks VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                [demo_id, seq, part.stop - part.start, _blob(t[part]), _blob(position[part]),
                 _blob(2 * position[part]), _blob(torque[part]),
                 _blob(stiffness[part]) if with_stiffness else None],
            )  # fmt: skip
    if dangling_chunk:
        conn.execute(
            "INSERT INTO chunks VALUES ('no-such-demo', 0, 1, ?, ?, ?, ?, NULL)",
            [_blob([0.0]), _blob([[0, 0]]), _blob([[0, 0]]), _blob([[0, 0]])],
        )
    conn.commit()
    conn.close()
    return data


def _normalised(sql: str | None) -> str | None:
    """SQL text without layout whitespace, so equal definitions compare equal."""
    return None if sql is None else re.sub(r"\s*([(),])\s*", r"\1", re.sub(r"\s+", " ", sql))


def _schema_of(path):
    conn = sqlite3.connect(path)
    try:
        rows = conn.execute(
            "SELECT type, name, tbl_name, sql FROM sqlite_master WHERE name NOT LIKE 'sqlite_%'"
        ).fetchall()
        return sorted((kind, name, table, _normalised(sql)) for kind, name, table, sql in rows)
    finally:
        conn.close()


def test_version_one_store_is_migrated(tmp_path):
    path = tmp_path / "v1.sqlite"
    data = write_v1_store(path)
    assert SCHEMA_VERSION == 3 and set(MIGRATIONS) == {1, 2}
    with DemoStore(path) as store:
        assert store.schema_version == SCHEMA_VERSION
        versions = store.db.execute("SELECT version FROM schema_migrations ORDER BY version")
        assert [row[0] for row in versions] == [1, 2, 3]
        with_k = store.load_demonstration(IDS[0])
        without_k = store.load_demonstration(IDS[1])
        for name in ("t", "position", "velocity", "torque", "stiffness"):
            assert np.array_equal(getattr(with_k, name), data[name])
        assert without_k.stiffness is None
        info = with_k.info
        # closed forms of the fixture's ramps: range = span, peak |tau| = largest end value
        assert info.range_of_motion == pytest.approx({"shoulder": 1.2, "elbow": 0.1}, abs=1e-12)
        assert info.peak_abs_torque == pytest.approx({"shoulder": 1.5, "elbow": 4.0}, abs=1e-12)
        assert info.stiffness_min == {"shoulder": 30.0, "elbow": 40.0}
        assert info.stiffness_max == {"shoulder": 30.0, "elbow": 90.0}
        assert (info.operator, info.notes, info.tags) == ("operator_a", "", ("press", "soft"))
        assert without_k.info.tags == ()
        assert [i.id for i in store.find_demonstrations(tag="soft")] == [IDS[0]]
        assert store.integrity_check() == ["ok"]
        new_id = store.add_demonstration(**data, skill="cork_seat", joints=["shoulder", "elbow"])
        assert store.get_info(new_id).status == "complete"
    fresh = tmp_path / "fresh.sqlite"
    DemoStore(fresh).close()
    assert _schema_of(path) == _schema_of(fresh)


def test_old_store_opened_read_only_asks_for_a_migration(tmp_path):
    path = tmp_path / "v1.sqlite"
    write_v1_store(path)
    with pytest.raises(SchemaVersionError, match="schema version 1 is older than 3; open it"):
        DemoStore(path, read_only=True)
    assert _schema_of(path) == _schema_of_v1(tmp_path)


def _schema_of_v1(tmp_path):
    reference = tmp_path / "reference_v1.sqlite"
    write_v1_store(reference)
    return _schema_of(reference)


def test_failed_migration_leaves_version_one_intact(tmp_path):
    path = tmp_path / "v1.sqlite"
    write_v1_store(path, dangling_chunk=True)
    with pytest.raises(StoreCorruptError, match="migration to version 2 leaves dangling"):
        DemoStore(path)
    assert integrity(path) == "ok"
    conn = sqlite3.connect(path)
    assert conn.execute("SELECT max(version) FROM schema_migrations").fetchone() == (1,)
    assert conn.execute("SELECT count(*) FROM chunks").fetchone() == (5,)
    conn.close()
