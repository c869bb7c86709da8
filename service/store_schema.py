"""The audit store's SQLite schema and the one path that brings an older store up to it. A store written by an
older version is migrated in place, in one transaction, the first time this version opens it: the review a schema 1
or 2 store kept on the inspection row becomes that inspection's first review in `reviews` (unless the history
already holds it) and the row's review columns go."""

from __future__ import annotations

import sqlite3

SCHEMA_VERSION = 3  # 2: the serving table (what a restart serves); 3: review history only, model revisions
SCHEMA = """
CREATE TABLE IF NOT EXISTS inspections (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    id TEXT NOT NULL UNIQUE,
    time TEXT NOT NULL,
    station TEXT,
    part_id TEXT,
    caller TEXT NOT NULL,
    image_sha256 TEXT NOT NULL,
    image_width INTEGER NOT NULL,
    image_height INTEGER NOT NULL,
    model_id TEXT NOT NULL,
    model_revision TEXT,
    model_sha256 TEXT NOT NULL,
    score REAL NOT NULL,
    threshold REAL NOT NULL,
    verdict TEXT NOT NULL CHECK (verdict IN ('pass', 'flag')),
    elapsed_ms REAL NOT NULL,
    files_kept INTEGER NOT NULL DEFAULT 1
);
CREATE INDEX IF NOT EXISTS inspections_time ON inspections (time);
CREATE INDEX IF NOT EXISTS inspections_verdict ON inspections (verdict);
CREATE INDEX IF NOT EXISTS inspections_station ON inspections (station);
CREATE INDEX IF NOT EXISTS inspections_part ON inspections (part_id);
CREATE TABLE IF NOT EXISTS reviews (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    inspection_id TEXT NOT NULL REFERENCES inspections (id),
    time TEXT NOT NULL,
    label TEXT NOT NULL,
    operator TEXT NOT NULL,
    caller TEXT NOT NULL,
    defect_class TEXT,
    note TEXT
);
CREATE INDEX IF NOT EXISTS reviews_inspection ON reviews (inspection_id, seq);
CREATE TABLE IF NOT EXISTS model_events (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    time TEXT NOT NULL,
    kind TEXT NOT NULL CHECK (kind IN ('load', 'swap', 'rollback', 'threshold')),
    model_id TEXT NOT NULL,
    model_sha256 TEXT NOT NULL,
    threshold REAL NOT NULL,
    previous_threshold REAL,
    caller TEXT NOT NULL,
    operator TEXT,
    reason TEXT,
    revision TEXT,
    threshold_section TEXT
);
CREATE TABLE IF NOT EXISTS serving (
    id INTEGER PRIMARY KEY CHECK (id = 1),
    current_sha256 TEXT NOT NULL,
    previous_sha256 TEXT,
    startup_sha256 TEXT
);
"""
# columns later schemas added to tables an older store already has (schema 3: revisions, review details)
ADDED_COLUMNS = {
    "inspections": ("model_revision TEXT",),
    "reviews": ("defect_class TEXT", "note TEXT"),
    "model_events": ("revision TEXT", "threshold_section TEXT"),
}
OLD_REVIEW_COLUMNS = ("review_label", "review_operator", "review_time")  # schemas 1-2: the latest review on the row
MIGRATED_CALLER = "unknown (kept on the inspection row before schema 3)"


def create_schema(conn: sqlite3.Connection) -> None:
    """Creates the tables, or migrates an older store; refuses a newer one. Several processes may open one store
    at once: the migration runs under the write lock and checks the version again there."""
    if _version(conn) == SCHEMA_VERSION:
        return
    conn.execute("BEGIN IMMEDIATE")
    try:
        if _version(conn) < SCHEMA_VERSION:
            _add_columns(conn)
            for statement in SCHEMA.split(";"):
                if statement.strip():
                    conn.execute(statement)
            _move_old_reviews(conn)
            conn.execute(f"PRAGMA user_version={SCHEMA_VERSION}")
        conn.execute("COMMIT")
    except BaseException:
        conn.execute("ROLLBACK")
        raise


def _version(conn: sqlite3.Connection) -> int:
    version = conn.execute("PRAGMA user_version").fetchone()[0]
    if version > SCHEMA_VERSION:
        raise RuntimeError(f"the audit database has schema {version}, newer than this software ({SCHEMA_VERSION})")
    return version


def _columns(conn: sqlite3.Connection, table: str) -> set[str]:
    return {row[1] for row in conn.execute(f"PRAGMA table_info({table})")}


def _add_columns(conn: sqlite3.Connection) -> None:
    for table, columns in ADDED_COLUMNS.items():
        have = _columns(conn, table)
        for column in columns:
            if have and column.split()[0] not in have:  # a table not there yet is created whole
                conn.execute(f"ALTER TABLE {table} ADD COLUMN {column}")


def _move_old_reviews(conn: sqlite3.Connection) -> None:
    if "review_label" not in _columns(conn, "inspections"):
        return
    conn.execute(
        "INSERT INTO reviews (inspection_id, time, label, operator, caller) "
        "SELECT id, COALESCE(review_time, time), review_label, COALESCE(review_operator, ''), ? FROM inspections i "
        "WHERE review_label IS NOT NULL AND NOT EXISTS (SELECT 1 FROM reviews r WHERE r.inspection_id = i.id) "
        "ORDER BY COALESCE(review_time, time), seq",
        (MIGRATED_CALLER,),
    )
    conn.execute("DROP INDEX IF EXISTS inspections_queue")
    for column in OLD_REVIEW_COLUMNS:
        try:
            conn.execute(f"ALTER TABLE inspections DROP COLUMN {column}")
        except sqlite3.OperationalError:  # SQLite before 3.35 cannot drop a column: emptied, and never read
            conn.execute(f"UPDATE inspections SET {column} = NULL")
