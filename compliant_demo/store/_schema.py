"""Schema of the demonstration store: table definitions, the version table and the registered
migrations.

A store records every schema version it went through in ``store_schema_history`` (named
``schema_migrations`` up to version 4); its version is the largest one. Migrations run in one
transaction each, so a failed migration leaves the file at its old version.
"""

from __future__ import annotations

import json
import sqlite3
import time
import warnings
from collections.abc import Callable

from compliant_demo.exceptions import SchemaVersionError, StoreCorruptError, StoreReadOnlyError
from compliant_demo.store._codec import from_blobs
from compliant_demo.store._legacy import chunk_checksum, legacy_replay_parameters
from compliant_demo.store._samples import chunk_digest, refresh_summary

__all__ = [
    "SCHEMA_VERSION",
    "MIGRATIONS",
    "DEMONSTRATION_COLUMNS",
    "ensure_schema",
    "VERSION_TABLE",
    "schema_version",
]

SCHEMA_VERSION = 7
VERSION_TABLE = "store_schema_history"
# The version table's name up to version 4, a name web frameworks use for their own tables.
_OLD_VERSION_TABLE = "schema_migrations"
_VERSION_COLUMNS = ["version", "applied_at", "description"]

# Current (version 7) layout. A migration creates a table from these statements only when its
# layout is the current one; older layouts a migration still needs are kept beside it
# (``_CHUNKS_V2``).
_TABLES: dict[str, str] = {
    VERSION_TABLE: """
        CREATE TABLE store_schema_history (
            version INTEGER PRIMARY KEY,
            applied_at REAL NOT NULL,
            description TEXT NOT NULL
        )""",
    "writers": """
        CREATE TABLE writers (
            token TEXT PRIMARY KEY,
            pid INTEGER NOT NULL,
            hostname TEXT NOT NULL,
            process_start REAL,
            started_at REAL NOT NULL,
            heartbeat_at REAL NOT NULL
        )""",
    "demonstrations": """
        CREATE TABLE demonstrations (
            id TEXT PRIMARY KEY,
            skill TEXT NOT NULL,
            operator TEXT NOT NULL DEFAULT '',
            tags TEXT NOT NULL DEFAULT '[]',
            notes TEXT NOT NULL DEFAULT '',
            source TEXT NOT NULL CHECK (source IN ('recorded', 'imported', 'simulated')),
            joints TEXT NOT NULL,
            n_joints INTEGER NOT NULL CHECK (n_joints > 0),
            nominal_rate_hz REAL NOT NULL CHECK (nominal_rate_hz > 0),
            start_time REAL NOT NULL,
            status TEXT NOT NULL
                CHECK (status IN ('recording', 'complete', 'incomplete', 'rejected')),
            status_reason TEXT,
            has_stiffness INTEGER NOT NULL,
            n_samples INTEGER NOT NULL DEFAULT 0,
            t_first REAL,
            t_last REAL,
            duration_s REAL NOT NULL DEFAULT 0,
            mean_rate_hz REAL,
            range_of_motion REAL,
            peak_abs_torque REAL,
            stiffness_min REAL,
            stiffness_max REAL,
            range_of_motion_json TEXT NOT NULL DEFAULT '{}',
            peak_abs_torque_json TEXT NOT NULL DEFAULT '{}',
            stiffness_min_json TEXT NOT NULL DEFAULT '{}',
            stiffness_max_json TEXT NOT NULL DEFAULT '{}',
            flags TEXT NOT NULL DEFAULT '{}',
            writer_token TEXT,
            created_at REAL NOT NULL,
            updated_at REAL NOT NULL
        )""",
    "demonstration_tags": """
        CREATE TABLE demonstration_tags (
            demo_id TEXT NOT NULL REFERENCES demonstrations(id) ON DELETE CASCADE,
            tag TEXT NOT NULL,
            PRIMARY KEY (tag, demo_id)
        ) WITHOUT ROWID""",
    "chunks": """
        CREATE TABLE chunks (
            demo_id TEXT NOT NULL REFERENCES demonstrations(id) ON DELETE CASCADE,
            seq INTEGER NOT NULL,
            n INTEGER NOT NULL CHECK (n > 0),
            t_first REAL NOT NULL,
            t_last REAL NOT NULL,
            t BLOB NOT NULL,
            position BLOB NOT NULL,
            velocity BLOB NOT NULL,
            torque BLOB NOT NULL,
            stiffness BLOB,
            digest BLOB NOT NULL,
            UNIQUE (demo_id, seq)
        )""",
    "skills": """
        CREATE TABLE skills (
            id TEXT PRIMARY KEY,
            name TEXT NOT NULL,
            version INTEGER NOT NULL CHECK (version > 0),
            payload TEXT NOT NULL,
            parameters TEXT NOT NULL,
            created REAL NOT NULL,
            UNIQUE (name, version)
        )""",
    "skill_demonstrations": """
        CREATE TABLE skill_demonstrations (
            skill_id TEXT NOT NULL REFERENCES skills(id) ON DELETE CASCADE,
            position INTEGER NOT NULL,
            demo_id TEXT NOT NULL,
            PRIMARY KEY (skill_id, position)
        )""",
    "campaigns": """
        CREATE TABLE campaigns (
            id TEXT PRIMARY KEY,
            skill_id TEXT NOT NULL REFERENCES skills(id),
            config TEXT NOT NULL,
            created REAL NOT NULL
        )""",
    "replay_results": """
        CREATE TABLE replay_results (
            id TEXT PRIMARY KEY,
            skill_id TEXT NOT NULL REFERENCES skills(id),
            campaign_id TEXT REFERENCES campaigns(id),
            scenario_index INTEGER,
            status TEXT NOT NULL,
            reason TEXT,
            metrics TEXT NOT NULL,
            parameters TEXT NOT NULL,
            created REAL NOT NULL,
            UNIQUE (campaign_id, scenario_index)
        )""",
    "replay_traces": """
        CREATE TABLE replay_traces (
            result_id TEXT NOT NULL REFERENCES replay_results(id) ON DELETE CASCADE,
            channel TEXT NOT NULL,
            shape TEXT NOT NULL,
            data BLOB NOT NULL,
            PRIMARY KEY (result_id, channel)
        )""",
    "verdicts": """
        CREATE TABLE verdicts (
            id TEXT PRIMARY KEY,
            skill_id TEXT NOT NULL REFERENCES skills(id),
            campaign_id TEXT REFERENCES campaigns(id),
            plant_digest TEXT NOT NULL,
            criteria_digest TEXT NOT NULL,
            verdict TEXT NOT NULL CHECK (verdict IN ('ready', 'not_ready')),
            reasons TEXT NOT NULL,
            criteria TEXT NOT NULL,
            created REAL NOT NULL
        )""",
}

# Tables later versions added (their migrations create them).
_TABLES_SINCE_7 = ("verdicts",)

# Older chunk layouts: version 2 without any check column, versions 3 to 5 with an additive
# checksum in its place.
_DIGEST_COLUMN = "            digest BLOB NOT NULL,\n"
_CHUNKS_V2 = _TABLES["chunks"].replace(_DIGEST_COLUMN, "")
_CHUNKS_V3 = _TABLES["chunks"].replace(_DIGEST_COLUMN, "            checksum INTEGER NOT NULL,\n")

# Every column a caller may filter or sort on with ``where`` / ``order_by``.
DEMONSTRATION_COLUMNS: tuple[str, ...] = (
    "id", "skill", "operator", "tags", "notes", "source", "joints", "n_joints",
    "nominal_rate_hz", "start_time", "status", "status_reason", "has_stiffness", "n_samples",
    "t_first", "t_last", "duration_s", "mean_rate_hz", "range_of_motion", "peak_abs_torque",
    "stiffness_min", "stiffness_max", "range_of_motion_json", "peak_abs_torque_json",
    "stiffness_min_json", "stiffness_max_json", "flags", "writer_token", "created_at",
    "updated_at",
)  # fmt: skip

_INDEXES: tuple[str, ...] = (
    "CREATE INDEX idx_demonstrations_skill ON demonstrations (skill, start_time)",
    # skill and operator together is the most common query; one index keeps it off the scan
    "CREATE INDEX idx_demonstrations_skill_operator ON demonstrations "
    "(skill, operator, start_time)",
    "CREATE INDEX idx_demonstrations_operator ON demonstrations (operator, start_time)",
    "CREATE INDEX idx_demonstrations_status ON demonstrations (status, start_time)",
    "CREATE INDEX idx_demonstrations_start ON demonstrations (start_time)",
    "CREATE INDEX idx_demonstrations_duration ON demonstrations (duration_s)",
    "CREATE INDEX idx_demonstration_tags_demo ON demonstration_tags (demo_id)",
    "CREATE INDEX idx_skill_demonstrations_demo ON skill_demonstrations (demo_id)",
    "CREATE INDEX idx_replay_results_skill ON replay_results (skill_id, created)",
    "CREATE INDEX idx_replay_results_campaign ON replay_results (campaign_id, scenario_index)",
)
# Indexes of version 7's verdict table, created by its migration too.
_VERDICT_INDEXES: tuple[str, ...] = (
    "CREATE INDEX idx_verdicts_lookup ON verdicts "
    "(skill_id, plant_digest, criteria_digest, created)",
)


def _record_version(conn: sqlite3.Connection, version: int, description: str) -> None:
    conn.execute(
        f"INSERT INTO {_version_table(conn, _tables(conn))} (version, applied_at, description) "
        "VALUES (?, ?, ?)",
        (version, time.time(), description),
    )


def _create_latest(conn: sqlite3.Connection) -> None:
    for ddl in _TABLES.values():
        conn.execute(ddl)
    for ddl in _INDEXES + _VERDICT_INDEXES:
        conn.execute(ddl)
    _record_version(conn, SCHEMA_VERSION, "created")


def _migrate_1_to_2(conn: sqlite3.Connection) -> None:
    """Version 1 kept tags only as JSON, had no summaries, chunk time bounds, writer leases,
    status reasons, skills or replay results, and no CHECK constraints; rebuild both tables."""
    conn.execute("ALTER TABLE demonstrations RENAME TO demonstrations_v1")
    conn.execute("ALTER TABLE chunks RENAME TO chunks_v1")
    for name, ddl in _TABLES.items():
        if name not in (VERSION_TABLE, *_TABLES_SINCE_7):
            conn.execute(_CHUNKS_V2 if name == "chunks" else ddl)
    conn.execute(
        """INSERT INTO demonstrations (
               id, skill, operator, tags, notes, source, joints, n_joints, nominal_rate_hz,
               start_time, status, has_stiffness, n_samples, duration_s, created_at, updated_at)
           SELECT id, skill, coalesce(operator, ''), coalesce(tags, '[]'), coalesce(notes, ''),
               coalesce(source, 'recorded'), joints, json_array_length(joints),
               coalesce(nominal_rate_hz, 1000.0), coalesce(start_time, created_at), status,
               has_stiffness, coalesce(n_samples, 0), coalesce(duration_s, 0), created_at,
               created_at
           FROM demonstrations_v1"""
    )
    conn.execute(
        """INSERT INTO demonstration_tags (demo_id, tag)
           SELECT DISTINCT d.id, j.value FROM demonstrations d, json_each(d.tags) j"""
    )
    chunk_rows = conn.execute(
        "SELECT demo_id, seq, n, t, position, velocity, torque, stiffness FROM chunks_v1"
    )
    for demo_id, seq, n, t, *channels in chunk_rows:
        times = from_blobs([t], None)
        conn.execute(
            """INSERT INTO chunks (demo_id, seq, n, t_first, t_last, t, position, velocity,
                   torque, stiffness) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""",
            (demo_id, seq, n, float(times[0]), float(times[-1]), t, *channels),
        )
    conn.execute("DROP TABLE chunks_v1")
    conn.execute("DROP TABLE demonstrations_v1")
    for ddl in _INDEXES:
        conn.execute(ddl)
    for (demo_id,) in conn.execute("SELECT id FROM demonstrations").fetchall():
        refresh_summary(conn, demo_id, verify=False)  # version 2 chunks carry no checksum


def _migrate_2_to_3(conn: sqlite3.Connection) -> None:
    """Version 3 adds a checksum to every chunk, verified whenever samples are read."""
    conn.execute("ALTER TABLE chunks RENAME TO chunks_v2")
    conn.execute(_CHUNKS_V3)
    rows = conn.execute(
        "SELECT demo_id, seq, n, t_first, t_last, t, position, velocity, torque, stiffness "
        "FROM chunks_v2"
    )
    for row in rows:
        conn.execute(
            "INSERT INTO chunks (demo_id, seq, n, t_first, t_last, t, position, velocity, torque, "
            "stiffness, checksum) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (*row, chunk_checksum(row[5:])),
        )
    conn.execute("DROP TABLE chunks_v2")


def _migrate_3_to_4(conn: sqlite3.Connection) -> None:
    """Version 4 stores every replay's parameters as one ReplayParameters document; version 3
    held three shapes (campaign scenarios, ``compliant-demo replay``, the replay node)."""
    rows = conn.execute("SELECT id, campaign_id, scenario_index, parameters FROM replay_results")
    for result_id, campaign_id, scenario_index, text in rows.fetchall():
        try:
            old = json.loads(text)
            new = legacy_replay_parameters(old, campaign_id is not None, scenario_index)
        except (ValueError, TypeError, AttributeError) as exc:
            raise StoreCorruptError(
                f"replay result {result_id!r}: parameters cannot be migrated ({exc}); nothing "
                "was changed"
            ) from None
        conn.execute(
            "UPDATE replay_results SET parameters = ? WHERE id = ?",
            (json.dumps(new, sort_keys=True, separators=(",", ":")), result_id),
        )


def _migrate_4_to_5(conn: sqlite3.Connection) -> None:
    """Version 5 names the version table ``store_schema_history``, a name of our own."""
    # a copy rather than ALTER TABLE ... RENAME, which would quote the name in the stored
    # definition: a migrated file keeps the schema text of a fresh one
    conn.execute(_TABLES[VERSION_TABLE])
    conn.execute(f"INSERT INTO {VERSION_TABLE} SELECT * FROM {_OLD_VERSION_TABLE}")
    conn.execute(f"DROP TABLE {_OLD_VERSION_TABLE}")


def _migrate_5_to_6(conn: sqlite3.Connection) -> None:
    """Version 6 replaces the additive chunk checksum, blind to reordered words, by a SHA-256
    digest. Only chunks whose checksum still holds get one; the others keep an empty digest (they
    never load) and their demonstration the flag ``damaged_chunks``, and a warning names them."""
    conn.execute("ALTER TABLE chunks RENAME TO chunks_v5")
    conn.execute(_TABLES["chunks"])
    damaged: dict[str, list[int]] = {}
    rows = conn.execute(
        "SELECT demo_id, seq, n, t_first, t_last, t, position, velocity, torque, stiffness, "
        "checksum FROM chunks_v5 ORDER BY demo_id, seq"
    )
    for *row, checksum in rows:
        demo_id, seq, n, blobs = row[0], row[1], row[2], row[5:]
        if chunk_checksum(blobs) == checksum:
            digest = chunk_digest(seq, n, blobs)
        else:
            digest = b""
            damaged.setdefault(demo_id, []).append(seq)
        conn.execute(
            "INSERT INTO chunks (demo_id, seq, n, t_first, t_last, t, position, velocity, torque, "
            "stiffness, digest) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (*row, digest),
        )
    conn.execute("DROP TABLE chunks_v5")
    for demo_id, seqs in damaged.items():
        conn.execute(
            "UPDATE demonstrations SET flags = json_set(flags, '$.damaged_chunks', ?) "
            "WHERE id = ?",
            (len(seqs), demo_id),
        )
    if damaged:
        warnings.warn(
            "chunks failing their checksum while migrating to SHA-256 digests were kept "
            "unverifiable (they never load; 'compliant-demo verify' lists them): "
            + "; ".join(f"demonstration {d!r} chunk(s) {seqs}" for d, seqs in damaged.items()),
            stacklevel=2,
        )


def _migrate_6_to_7(conn: sqlite3.Connection) -> None:
    """Version 7 keeps readiness verdicts: a skill on a plant (by digest) under criteria (by
    digest), with the reasons, the criteria themselves and the campaign it came from."""
    conn.execute(_TABLES["verdicts"])
    for ddl in _VERDICT_INDEXES:
        conn.execute(ddl)


# from-version -> (description, migration to from-version + 1)
MIGRATIONS: dict[int, tuple[str, Callable[[sqlite3.Connection], None]]] = {
    1: ("summaries, tag index, writer leases, skills and replay results", _migrate_1_to_2),
    2: ("chunk checksums", _migrate_2_to_3),
    3: ("one typed record for replay parameters", _migrate_3_to_4),
    4: ("version table renamed store_schema_history", _migrate_4_to_5),
    5: ("SHA-256 chunk digests", _migrate_5_to_6),
    6: ("readiness verdicts", _migrate_6_to_7),
}


def _tables(conn: sqlite3.Connection) -> set[str]:
    return {row[0] for row in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}


def _version_table(conn: sqlite3.Connection, tables: set[str]) -> str | None:
    """The version table among ``tables`` (one read of the schema, so a store another process is
    creating right now is seen whole or not at all): the current one, else the one up to version
    4 when it has our columns; None when there is neither."""
    if VERSION_TABLE in tables:
        return VERSION_TABLE
    if _OLD_VERSION_TABLE in tables:
        columns = [row[1] for row in conn.execute(f"PRAGMA table_info({_OLD_VERSION_TABLE})")]
        if columns == _VERSION_COLUMNS:
            return _OLD_VERSION_TABLE
    return None


def schema_version(conn: sqlite3.Connection) -> int | None:
    """The store's schema version, or None for an empty database."""
    tables = _tables(conn)
    table = _version_table(conn, tables)
    if table is None:
        if tables:
            raise StoreCorruptError(
                f"not a demonstration store: no {VERSION_TABLE} table (tables: "
                f"{', '.join(sorted(tables))})"
            )
        return None
    (version,) = conn.execute(f"SELECT max(version) FROM {table}").fetchone()
    if version is None:
        raise StoreCorruptError(f"{table} table is empty")
    if table == _OLD_VERSION_TABLE and not (isinstance(version, int) and 1 <= version <= 4):
        raise StoreCorruptError(
            f"not a demonstration store: its {table} table holds version {version!r}, not one "
            "of ours (1 to 4)"
        )
    return int(version)


def ensure_schema(conn: sqlite3.Connection, *, writable: bool, label: str) -> int:
    """Create the schema in an empty store or migrate an older one; return the final version.

    Raises
    ------
    SchemaVersionError
        The store is newer than this code, or older and opened read-only.
    """
    version = schema_version(conn)
    if version is not None and version > SCHEMA_VERSION:
        raise SchemaVersionError(
            f"{label}: schema version {version} is newer than this compliant_demo supports "
            f"({SCHEMA_VERSION}); upgrade compliant_demo to open it"
        )
    if version == SCHEMA_VERSION:
        return version
    if not writable:
        if version is None:
            raise StoreReadOnlyError(f"{label}: empty file opened read-only, cannot create schema")
        raise SchemaVersionError(
            f"{label}: schema version {version} is older than {SCHEMA_VERSION}; open it writable "
            f"once to migrate"
        )
    if version is None:
        conn.execute("BEGIN IMMEDIATE")
        try:
            if schema_version(conn) is None:  # another process may have created it meanwhile
                _create_latest(conn)
            conn.execute("COMMIT")
        except BaseException:
            conn.execute("ROLLBACK")
            raise
        return SCHEMA_VERSION
    return _migrate(conn, version, label)


def _migrate(conn: sqlite3.Connection, version: int, label: str) -> int:
    # Rebuilding tables needs foreign keys off; the pragma is ignored inside a transaction.
    conn.execute("PRAGMA foreign_keys = OFF")
    try:
        while version < SCHEMA_VERSION:
            if version not in MIGRATIONS:
                raise SchemaVersionError(f"{label}: no migration registered from version {version}")
            description, migration = MIGRATIONS[version]
            conn.execute("BEGIN IMMEDIATE")
            try:
                if schema_version(conn) == version:
                    migration(conn)
                    _record_version(conn, version + 1, description)
                    problems = conn.execute("PRAGMA foreign_key_check").fetchall()
                    if problems:
                        raise StoreCorruptError(
                            f"{label}: migration to version {version + 1} leaves dangling "
                            f"references: {problems[:3]}"
                        )
                conn.execute("COMMIT")
            except BaseException:
                conn.execute("ROLLBACK")
                raise
            version = schema_version(conn) or version
    finally:
        conn.execute("PRAGMA foreign_keys = ON")
    return version
