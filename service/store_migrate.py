"""Brings an audit database to the schema this software writes, on start, with Alembic (`migrations/`). Several
instances may start at once on one database: PostgreSQL serialises them with an advisory lock, SQLite with a lock
file beside the database. A database at a revision this software does not know (written by a newer version) is
refused, so instances of two versions never write one store with two ideas of its schema."""

from __future__ import annotations

import contextlib
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from knowngood.service.store_schema import create_schema
from sqlalchemy import Connection, Engine, inspect, text

MIGRATIONS = Path(__file__).resolve().parent / "migrations"
HAND_WRITTEN = "0001"  # the revision of schema 3, the last one `store_schema.py` migrates to by hand
LOCK_KEY = 0x6B6E6F776E  # PostgreSQL advisory lock: one instance migrates at a time


def _config(conn: Connection) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    cfg.attributes["connection"] = conn
    return cfg


def head() -> str:
    return ScriptDirectory.from_config(_config(None)).get_current_head()


def current(conn: Connection) -> str | None:
    return MigrationContext.configure(conn).get_current_revision()


def migrate(engine: Engine, *, sqlite_path: Path | None) -> str:
    """Upgrades to the newest revision (nothing when already there); returns it. Raises RuntimeError on a
    database newer than this software."""
    with _exclusive(engine, sqlite_path), engine.connect() as conn:
        cfg = _config(conn)
        known = {s.revision for s in ScriptDirectory.from_config(cfg).walk_revisions()}
        tables = set(inspect(conn).get_table_names())
        conn.commit()
        if conn.dialect.name == "sqlite" and "inspections" in tables and "alembic_version" not in tables:
            create_schema(conn.connection.driver_connection)  # schema 1-3, migrated by hand as before
            command.stamp(cfg, HAND_WRITTEN)
            conn.commit()
        found = current(conn)
        if found is not None and found not in known:
            raise RuntimeError(
                f"the audit database is at schema revision {found}, which this software ({head()}) does not know: "
                "it was written by a newer version; upgrade this instance"
            )
        command.upgrade(cfg, "head")
        conn.commit()
        return current(conn)


@contextlib.contextmanager
def _exclusive(engine: Engine, sqlite_path: Path | None):
    if engine.dialect.name == "postgresql":
        with engine.connect() as lock:
            lock.execute(text("SELECT pg_advisory_lock(:k)"), {"k": LOCK_KEY})
            try:
                yield
            finally:
                lock.execute(text("SELECT pg_advisory_unlock(:k)"), {"k": LOCK_KEY})
                lock.commit()
        return
    if sqlite_path is None:
        yield
        return
    import fcntl  # the service runs on Linux (and in its container); SQLite is its single-machine store

    with open(sqlite_path.with_name(sqlite_path.name + ".migrate-lock"), "a") as f:
        fcntl.flock(f, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(f, fcntl.LOCK_UN)
