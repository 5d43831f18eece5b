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
from compliant_demo.store import SCHEMA_VERSION, DemoStore, ReplayParameters
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

VERSION_TABLE = "store_schema_history"
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
    assert SCHEMA_VERSION == 7 and set(MIGRATIONS) == {1, 2, 3, 4, 5, 6}
    with DemoStore(path) as store:
        assert store.schema_version == SCHEMA_VERSION
        versions = store.db.execute(f"SELECT version FROM {VERSION_TABLE} ORDER BY version")
        assert [row[0] for row in versions] == list(range(1, SCHEMA_VERSION + 1))
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
    older = f"schema version 1 is older than {SCHEMA_VERSION}; open it"
    with pytest.raises(SchemaVersionError, match=older):
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


def _migrate_to(path, version: int) -> None:
    """Bring a version-1 store to ``version`` with the registered migrations (as older code did)."""
    _migrate_to_from(path, 1, version)


SKILL_ID = "7d1e4a3b-2c5f-4e6a-9b8c-0d1e2f3a4b5c"
CAMPAIGN_ID = "3a2b1c0d-9e8f-4a7b-8c6d-5e4f3a2b1c0d"
SCHEDULE = {"name": "wall_and_impulse", "perturbations": [{"kind": "wall", "onset_s": 0.4}]}
# Version-3 replay parameters in the three shapes older code wrote (result id -> parameters).
OLD_PARAMETERS = {
    "campaign": dict(SCHEDULE, kind="wall"),
    "command": {"skill_version": 1, "schedule": None, "plant": {"joints": ["shoulder"]},
                "duration_s": 1.5, "settle_s": 0.5, "dt": 0.001, "seed": 4, "kind": "none"},
    "node": {"skill": "cork_seat", "plant_file": "", "schedule_file": "/tmp/wall.yaml",
             "control_rate_hz": 500.0, "duration_s": 0.0, "settle_s": 0.25, "seed": 2,
             "method": "rk4", "max_stiffness_rate": float("inf"), "real_time": True,
             "skill_version": 1, "goal": []},
    "node_limited": {"skill": "cork_seat", "plant_file": "plant.yaml", "schedule_file": "",
                     "control_rate_hz": 1000.0, "duration_s": 2.0, "settle_s": 0.5, "seed": 0,
                     "method": "rk4", "max_stiffness_rate": 5000.0, "real_time": False,
                     "skill_version": 1, "goal": [0.3]},
}  # fmt: skip
RESULT_IDS = {
    name: f"00000000-0000-4000-8000-00000000000{i}" for i, name in enumerate(OLD_PARAMETERS)
}


def write_v3_store(path, parameters=OLD_PARAMETERS) -> None:
    """A version-3 store (version 1 migrated as version-3 code did) with one skill, one campaign
    and one replay result per shape of ``parameters``."""
    write_v1_store(path)
    _migrate_to(path, 3)
    conn = sqlite3.connect(path)
    conn.execute(
        "INSERT INTO skills VALUES (?, 'cork_seat', 1, '{}', '{}', 1700000300.0)", (SKILL_ID,)
    )
    conn.execute(
        "INSERT INTO campaigns VALUES (?, ?, '{}', 1700000400.0)", (CAMPAIGN_ID, SKILL_ID)
    )
    for index, (name, document) in enumerate(parameters.items()):
        in_campaign = name == "campaign"
        conn.execute(
            "INSERT INTO replay_results VALUES (?, ?, ?, ?, 'ok', NULL, '{}', ?, 1700000500.0)",
            (RESULT_IDS[name], SKILL_ID, CAMPAIGN_ID if in_campaign else None,
             index if in_campaign else None, json.dumps(document)),
        )  # fmt: skip
    conn.commit()
    conn.close()


def test_replay_parameters_of_every_old_shape_are_migrated(tmp_path):
    path = tmp_path / "v3.sqlite"
    write_v3_store(path)
    with DemoStore(path) as store:
        found = {r.id: r.parameters for r in store.find_replay_results()}
    by_name = {name: found[result_id] for name, result_id in RESULT_IDS.items()}
    assert by_name["campaign"] == ReplayParameters(
        source="campaign", kind="wall", schedule=SCHEDULE, scenario_index=0
    )
    assert by_name["command"] == ReplayParameters(source="command", **OLD_PARAMETERS["command"])
    assert by_name["node"] == ReplayParameters(
        source="node", kind="unrecorded", skill_version=1, schedule_file="/tmp/wall.yaml",
        dt=1 / 500.0, settle_s=0.25, seed=2, method="rk4", real_time=True,
    )  # fmt: skip
    assert by_name["node_limited"] == ReplayParameters(
        source="node", skill_version=1, plant_file="plant.yaml", dt=1e-3, duration_s=2.0,
        settle_s=0.5, goal=[0.3], seed=0, method="rk4", max_stiffness_rate=5000.0,
        real_time=False,
    )  # fmt: skip


def test_replay_parameters_of_an_unknown_shape_stop_the_migration(tmp_path):
    path = tmp_path / "v3.sqlite"
    write_v3_store(path, {"command": {"dt": 0.001, "mass_kg": 0.2}})
    with pytest.raises(StoreCorruptError, match=r"parameters cannot be migrated.*'mass_kg'"):
        DemoStore(path)
    conn = sqlite3.connect(path)
    assert conn.execute("SELECT max(version) FROM schema_migrations").fetchone() == (3,)
    (text,) = conn.execute("SELECT parameters FROM replay_results").fetchone()
    conn.close()
    assert json.loads(text) == {"dt": 0.001, "mass_kg": 0.2}


def test_version_four_store_gets_a_version_table_of_our_own(tmp_path):
    path = tmp_path / "v4.sqlite"
    write_v1_store(path)
    _migrate_to(path, 4)
    with DemoStore(path) as store:
        assert store.schema_version == SCHEMA_VERSION
        tables = store.db.table_names()
        assert VERSION_TABLE in tables and "schema_migrations" not in tables
        history = store.db.execute(f"SELECT version, description FROM {VERSION_TABLE}").fetchall()
        assert history[4] == (5, "version table renamed store_schema_history")
        assert [row[0] for row in history] == list(range(1, SCHEMA_VERSION + 1))
        assert len(list(store.find_demonstrations())) == 2


def test_a_web_application_database_is_not_taken_for_an_old_store(tmp_path):
    path = tmp_path / "app.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE schema_migrations (version VARCHAR NOT NULL PRIMARY KEY)")
    conn.execute("INSERT INTO schema_migrations VALUES ('20240101120000')")
    conn.commit()
    conn.close()
    with pytest.raises(StoreCorruptError, match="no store_schema_history table"):
        DemoStore(path)
    conn = sqlite3.connect(path)
    assert conn.execute("SELECT version FROM schema_migrations").fetchall() == [("20240101120000",)]
    conn.close()


def test_checksums_become_digests_and_damaged_chunks_are_flagged(tmp_path):
    path = tmp_path / "v5.sqlite"
    data = write_v1_store(path)
    _migrate_to(path, 5)
    conn = sqlite3.connect(path)
    (blob,) = conn.execute(
        "SELECT torque FROM chunks WHERE demo_id = ? AND seq = 1", (IDS[0],)
    ).fetchone()
    damaged = bytearray(blob)
    damaged[21] ^= 0x04  # bit rot that the version-5 checksum still sees
    conn.execute(
        "UPDATE chunks SET torque = ? WHERE demo_id = ? AND seq = 1", (bytes(damaged), IDS[0])
    )
    conn.commit()
    conn.close()
    with pytest.warns(UserWarning, match=rf"demonstration '{IDS[0]}' chunk\(s\) \[1\]"):
        store = DemoStore(path)
    with store:
        sound = store.load_demonstration(IDS[1])
        assert np.array_equal(sound.position, data["position"])
        with pytest.raises(StoreCorruptError, match="chunk 1 was found damaged when the store"):
            store.load_demonstration(IDS[0])
        assert store.get_info(IDS[0]).flags == {"damaged_chunks": 1}
        assert store.verify() == [
            f"demonstration {IDS[0]}: chunk 1 was found damaged when the store was migrated "
            "(no digest)"
        ]
        digests = store.db.execute("SELECT length(digest) FROM chunks ORDER BY demo_id, seq")
        assert [row[0] for row in digests] == [32, 0, 32, 32]


def test_version_six_store_gets_a_verdict_table(tmp_path):
    path = tmp_path / "v6.sqlite"
    write_v3_store(path)
    _migrate_to_from(path, 3, 6)
    conn = sqlite3.connect(path)
    assert "verdicts" not in {row[0] for row in conn.execute(
        "SELECT name FROM sqlite_master WHERE type = 'table'")}
    conn.close()
    with DemoStore(path) as store:
        assert store.schema_version == 7
        history = store.db.execute(f"SELECT version, description FROM {VERSION_TABLE}").fetchall()
        assert history[-1] == (7, "readiness verdicts")
        assert len(list(store.find_replay_results())) == len(OLD_PARAMETERS)
        assert store.db.execute("SELECT count(*) FROM verdicts").fetchone() == (0,)
    fresh = tmp_path / "fresh.sqlite"
    DemoStore(fresh).close()
    assert _schema_of(path) == _schema_of(fresh)


def _migrate_to_from(path, start: int, version: int) -> None:
    """Bring a store at ``start`` to ``version`` with the registered migrations."""
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA foreign_keys = OFF")
    for step in range(start, version):
        conn.execute("BEGIN")
        MIGRATIONS[step][1](conn)
        table = VERSION_TABLE if step + 1 >= 5 else "schema_migrations"  # renamed at 5
        conn.execute(f"INSERT INTO {table} VALUES (?, 1700000000.0, 'older')", (step + 1,))
        conn.execute("COMMIT")
    conn.close()
