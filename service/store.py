"""The audit store: one row per accepted inspection, reviews, and model events (loads, swaps, rollbacks, threshold
changes). SQLite with WAL is the embedded default; `AuditStore` is the interface a server database would implement.

The data functions take their connection explicitly and keyword-only arguments; `SqliteStore` hands each thread its
own connection (FastAPI runs plain `def` routes in a thread pool) and calls them.
"""

from __future__ import annotations

import datetime as dt
import sqlite3
import threading
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Protocol

SCHEMA_VERSION = 2  # 2: the serving table (what a restart serves)
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
    model_sha256 TEXT NOT NULL,
    score REAL NOT NULL,
    threshold REAL NOT NULL,
    verdict TEXT NOT NULL CHECK (verdict IN ('pass', 'flag')),
    elapsed_ms REAL NOT NULL,
    files_kept INTEGER NOT NULL DEFAULT 1,
    review_label TEXT CHECK (review_label IN ('good', 'defective')),
    review_operator TEXT,
    review_time TEXT
);
CREATE INDEX IF NOT EXISTS inspections_time ON inspections (time);
CREATE INDEX IF NOT EXISTS inspections_queue ON inspections (verdict, review_label);
CREATE TABLE IF NOT EXISTS reviews (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    inspection_id TEXT NOT NULL REFERENCES inspections (id),
    time TEXT NOT NULL,
    label TEXT NOT NULL,
    operator TEXT NOT NULL,
    caller TEXT NOT NULL
);
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
    reason TEXT
);
CREATE TABLE IF NOT EXISTS serving (
    id INTEGER PRIMARY KEY CHECK (id = 1),
    current_sha256 TEXT NOT NULL,
    previous_sha256 TEXT,
    startup_sha256 TEXT
);
"""


def utc_now() -> str:
    """UTC ISO 8601 with microseconds: one fixed width, so text order is time order."""
    return to_iso(dt.datetime.now(dt.timezone.utc))


def to_iso(t: dt.datetime) -> str:
    """A naive time is taken as UTC."""
    t = t.replace(tzinfo=dt.timezone.utc) if t.tzinfo is None else t.astimezone(dt.timezone.utc)
    return t.isoformat(timespec="microseconds")


@dataclass(frozen=True)
class InspectionRecord:
    id: str
    time: str
    station: str | None
    part_id: str | None
    caller: str
    image_sha256: str
    image_width: int
    image_height: int
    model_id: str
    model_sha256: str
    score: float
    threshold: float
    verdict: str
    elapsed_ms: float
    files_kept: bool = True
    review_label: str | None = None
    review_operator: str | None = None
    review_time: str | None = None


@dataclass(frozen=True)
class ModelEvent:
    time: str
    kind: str  # load, swap, rollback, threshold
    model_id: str
    model_sha256: str
    threshold: float
    caller: str
    previous_threshold: float | None = None
    operator: str | None = None
    reason: str | None = None


@dataclass(frozen=True)
class Serving:
    """What the service serves, kept with the model event that made it so: a restart serves the same."""

    current_sha256: str
    previous_sha256: str | None  # the rollback target
    startup_sha256: str | None  # the command-line bundle at the last start: a different one there replaces current


_COLUMNS = [f.name for f in fields(InspectionRecord)]
_EVENT_COLUMNS = [f.name for f in fields(ModelEvent)]


class AuditStore(Protocol):
    """What the service needs from an audit database."""

    def add_inspections(self, *, records: Sequence[InspectionRecord]) -> None: ...
    def get_inspection(self, *, inspection_id: str) -> InspectionRecord | None: ...
    def list_inspections(
        self,
        *,
        verdict: str | None = None,
        since: str | None = None,
        until: str | None = None,
        reviewed: bool | None = None,
        limit: int = 100,
    ) -> list[InspectionRecord]: ...
    def iter_inspections(self, *, since: str | None, until: str | None) -> Iterator[InspectionRecord]: ...
    def add_review(self, *, inspection_id: str, label: str, operator: str, caller: str) -> InspectionRecord | None: ...
    def add_model_event(self, *, event: ModelEvent, serving: Serving | None = None) -> None: ...
    def serving(self) -> Serving | None: ...
    def model_events(self, *, limit: int = 50) -> list[ModelEvent]: ...
    def latest_event(self, *, model_sha256: str, kind: str | None = None) -> ModelEvent | None: ...
    def expired_files(self, *, keep: int, before: str, limit: int = 500) -> list[str]: ...
    def mark_files_deleted(self, *, inspection_ids: Sequence[str]) -> None: ...
    def count_inspections(self) -> int: ...
    def close(self) -> None: ...


# ---- data functions: connection first, everything else keyword-only -------------------------------------------


def connect(path: Path) -> sqlite3.Connection:
    """Opens (and on first use creates) the database: WAL journal, full fsync on commit, autocommit mode so each
    write states its own transaction."""
    path.parent.mkdir(parents=True, exist_ok=True)
    conn = sqlite3.connect(path, timeout=30, isolation_level=None, check_same_thread=False)
    conn.row_factory = sqlite3.Row
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=FULL")  # an audit row that got a 200 survives a power cut, not only a crash
    conn.execute("PRAGMA foreign_keys=ON")
    return conn


def create_schema(conn: sqlite3.Connection) -> None:
    version = conn.execute("PRAGMA user_version").fetchone()[0]
    if version > SCHEMA_VERSION:
        raise RuntimeError(f"the audit database has schema {version}, newer than this software ({SCHEMA_VERSION})")
    conn.executescript(SCHEMA)
    conn.execute(f"PRAGMA user_version={SCHEMA_VERSION}")


def insert_inspections(conn: sqlite3.Connection, *, records: Sequence[InspectionRecord]) -> None:
    """All rows in one transaction: a batch is stored whole or not at all."""
    sql = f"INSERT INTO inspections ({', '.join(_COLUMNS)}) VALUES ({', '.join('?' * len(_COLUMNS))})"
    conn.execute("BEGIN IMMEDIATE")
    try:
        conn.executemany(sql, [tuple(getattr(r, c) for c in _COLUMNS) for r in records])
        conn.execute("COMMIT")
    except BaseException:
        conn.execute("ROLLBACK")
        raise


def _record(row: sqlite3.Row) -> InspectionRecord:
    values = {c: row[c] for c in _COLUMNS}
    values["files_kept"] = bool(values["files_kept"])
    return InspectionRecord(**values)


def select_inspection(conn: sqlite3.Connection, *, inspection_id: str) -> InspectionRecord | None:
    row = conn.execute("SELECT * FROM inspections WHERE id = ?", (inspection_id,)).fetchone()
    return _record(row) if row else None


def select_inspections(
    conn: sqlite3.Connection,
    *,
    verdict: str | None = None,
    since: str | None = None,
    until: str | None = None,
    reviewed: bool | None = None,
    limit: int = 100,
) -> list[InspectionRecord]:
    """Newest first; `reviewed` False = awaiting review, True = reviewed, None = either."""
    where, params = [], []
    for clause, value in (("verdict = ?", verdict), ("time >= ?", since), ("time < ?", until)):
        if value is not None:
            where.append(clause)
            params.append(value)
    if reviewed is not None:
        where.append(f"review_label IS {'NOT ' if reviewed else ''}NULL")
    sql = "SELECT * FROM inspections" + (f" WHERE {' AND '.join(where)}" if where else "")
    sql += " ORDER BY seq DESC LIMIT ?"
    return [_record(r) for r in conn.execute(sql, (*params, limit))]


def select_page(
    conn: sqlite3.Connection, *, since: str | None, until: str | None, after_seq: int, limit: int
) -> list[tuple[int, InspectionRecord]]:
    """(seq, record) pairs after `after_seq`, oldest first: keyset pagination for exports of any length."""
    sql = (
        "SELECT * FROM inspections WHERE seq > ? AND (? IS NULL OR time >= ?) AND (? IS NULL OR time < ?) "
        "ORDER BY seq LIMIT ?"
    )
    rows = conn.execute(sql, (after_seq, since, since, until, until, limit))
    return [(r["seq"], _record(r)) for r in rows]


def insert_review(
    conn: sqlite3.Connection, *, inspection_id: str, label: str, operator: str, caller: str, time: str
) -> bool:
    """Keeps every review in `reviews`; the inspection row holds the latest. False when there is no such row."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        cur = conn.execute(
            "UPDATE inspections SET review_label = ?, review_operator = ?, review_time = ? WHERE id = ?",
            (label, operator, time, inspection_id),
        )
        if cur.rowcount:
            conn.execute(
                "INSERT INTO reviews (inspection_id, time, label, operator, caller) VALUES (?, ?, ?, ?, ?)",
                (inspection_id, time, label, operator, caller),
            )
        conn.execute("COMMIT")
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    return bool(cur.rowcount)


def insert_model_event(conn: sqlite3.Connection, *, event: ModelEvent, serving: Serving | None = None) -> None:
    """The event and, with it in one transaction, what is served from now on."""
    sql = f"INSERT INTO model_events ({', '.join(_EVENT_COLUMNS)}) VALUES ({', '.join('?' * len(_EVENT_COLUMNS))})"
    conn.execute("BEGIN IMMEDIATE")
    try:
        conn.execute(sql, tuple(getattr(event, c) for c in _EVENT_COLUMNS))
        if serving is not None:
            conn.execute(
                "INSERT OR REPLACE INTO serving (id, current_sha256, previous_sha256, startup_sha256) "
                "VALUES (1, ?, ?, ?)",
                (serving.current_sha256, serving.previous_sha256, serving.startup_sha256),
            )
        conn.execute("COMMIT")
    except BaseException:
        conn.execute("ROLLBACK")
        raise


def select_serving(conn: sqlite3.Connection) -> Serving | None:
    row = conn.execute("SELECT current_sha256, previous_sha256, startup_sha256 FROM serving WHERE id = 1").fetchone()
    return Serving(*row) if row else None


def select_model_events(
    conn: sqlite3.Connection, *, limit: int = 50, model_sha256: str | None = None, kind: str | None = None
) -> list[ModelEvent]:
    where, params = [], []
    for clause, value in (("model_sha256 = ?", model_sha256), ("kind = ?", kind)):
        if value is not None:
            where.append(clause)
            params.append(value)
    sql = (
        "SELECT * FROM model_events" + (f" WHERE {' AND '.join(where)}" if where else "") + " ORDER BY seq DESC LIMIT ?"
    )
    return [ModelEvent(**{c: r[c] for c in _EVENT_COLUMNS}) for r in conn.execute(sql, (*params, limit))]


def select_expired_files(conn: sqlite3.Connection, *, keep: int, before: str, limit: int = 500) -> list[str]:
    """Ids whose files retention says to delete: beyond the newest `keep` inspections, or older than `before`."""
    newest = conn.execute("SELECT COALESCE(MAX(seq), 0) FROM inspections").fetchone()[0]
    rows = conn.execute(
        "SELECT id FROM inspections WHERE files_kept = 1 AND (seq <= ? OR time < ?) ORDER BY seq LIMIT ?",
        (newest - keep, before, limit),
    )
    return [r[0] for r in rows]


def update_files_deleted(conn: sqlite3.Connection, *, inspection_ids: Sequence[str]) -> None:
    conn.executemany("UPDATE inspections SET files_kept = 0 WHERE id = ?", [(i,) for i in inspection_ids])


# ---- the embedded default --------------------------------------------------------------------------------------


class SqliteStore:
    """`AuditStore` on one SQLite file; one connection per thread, all closed by `close()`."""

    def __init__(self, path: Path):
        self.path = Path(path)
        self._local = threading.local()
        self._all: list[sqlite3.Connection] = []
        self._lock = threading.Lock()
        create_schema(self._conn())

    def _conn(self) -> sqlite3.Connection:
        conn = getattr(self._local, "conn", None)
        if conn is None:
            conn = self._local.conn = connect(self.path)
            with self._lock:
                self._all.append(conn)
        return conn

    def add_inspections(self, *, records: Sequence[InspectionRecord]) -> None:
        insert_inspections(self._conn(), records=records)

    def get_inspection(self, *, inspection_id: str) -> InspectionRecord | None:
        return select_inspection(self._conn(), inspection_id=inspection_id)

    def list_inspections(
        self,
        *,
        verdict: str | None = None,
        since: str | None = None,
        until: str | None = None,
        reviewed: bool | None = None,
        limit: int = 100,
    ) -> list[InspectionRecord]:
        return select_inspections(
            self._conn(), verdict=verdict, since=since, until=until, reviewed=reviewed, limit=limit
        )

    def iter_inspections(self, *, since: str | None, until: str | None, page: int = 1000) -> Iterator[InspectionRecord]:
        """Oldest first, a page at a time, each page on the calling thread's own connection (a streamed response
        may resume on another thread)."""
        after = 0
        while True:
            rows = select_page(self._conn(), since=since, until=until, after_seq=after, limit=page)
            yield from (record for _, record in rows)
            if len(rows) < page:
                return
            after = rows[-1][0]

    def add_review(self, *, inspection_id: str, label: str, operator: str, caller: str) -> InspectionRecord | None:
        conn = self._conn()
        if not insert_review(
            conn, inspection_id=inspection_id, label=label, operator=operator, caller=caller, time=utc_now()
        ):
            return None
        return select_inspection(conn, inspection_id=inspection_id)

    def add_model_event(self, *, event: ModelEvent, serving: Serving | None = None) -> None:
        insert_model_event(self._conn(), event=event, serving=serving)

    def serving(self) -> Serving | None:
        return select_serving(self._conn())

    def model_events(self, *, limit: int = 50) -> list[ModelEvent]:
        return select_model_events(self._conn(), limit=limit)

    def latest_event(self, *, model_sha256: str, kind: str | None = None) -> ModelEvent | None:
        events = select_model_events(self._conn(), limit=1, model_sha256=model_sha256, kind=kind)
        return events[0] if events else None

    def expired_files(self, *, keep: int, before: str, limit: int = 500) -> list[str]:
        return select_expired_files(self._conn(), keep=keep, before=before, limit=limit)

    def mark_files_deleted(self, *, inspection_ids: Sequence[str]) -> None:
        update_files_deleted(self._conn(), inspection_ids=inspection_ids)

    def count_inspections(self) -> int:
        return self._conn().execute("SELECT COUNT(*) FROM inspections").fetchone()[0]

    def close(self) -> None:
        with self._lock:
            for conn in self._all:
                conn.close()
            self._all.clear()
        self._local = threading.local()
