"""The audit store: one row per accepted inspection, every review, and model events (loads, swaps, rollbacks,
threshold changes). SQLite with WAL is the embedded default; `AuditStore` is the interface a server database would
implement. The schema and its migrations are in `store_schema.py`.

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

from knowngood.service.store_schema import SCHEMA_VERSION, create_schema  # noqa: F401 (the store's schema, re-exported)


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
    model_revision: str | None  # None on rows stored before revisions were recorded
    model_sha256: str
    score: float
    threshold: float
    verdict: str
    elapsed_ms: float
    files_kept: bool = True
    # the current label: the latest of the inspection's reviews (read from `reviews`, never stored on the row)
    review_label: str | None = None
    review_operator: str | None = None
    review_time: str | None = None
    review_defect_class: str | None = None
    review_note: str | None = None
    review_count: int = 0


@dataclass(frozen=True)
class Review:
    """One operator's confirmation of a verdict; an inspection keeps all of them, the latest is its label."""

    inspection_id: str
    time: str
    label: str  # good, defective
    operator: str
    caller: str
    defect_class: str | None = None
    note: str | None = None


@dataclass(frozen=True)
class InspectionFilter:
    """Which inspections a list takes: a None field matches every row. since <= time < until (UTC ISO text);
    reviewed False = awaiting review."""

    verdict: str | None = None
    station: str | None = None
    part_id: str | None = None
    reviewed: bool | None = None
    since: str | None = None
    until: str | None = None


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
    revision: str | None = None  # the model's revision once the event took effect (None: recorded before schema 3)
    threshold_section: str | None = None  # the manifest's threshold section (JSON) the revision is taken from


@dataclass(frozen=True)
class Serving:
    """What the service serves, kept with the model event that made it so: a restart serves the same."""

    current_sha256: str
    previous_sha256: str | None  # the rollback target
    startup_sha256: str | None  # the command-line bundle at the last start: a different one there replaces current


_CURRENT_REVIEW = {
    "review_label": "r.label",
    "review_operator": "r.operator",
    "review_time": "r.time",
    "review_defect_class": "r.defect_class",
    "review_note": "r.note",
    "review_count": "(SELECT COUNT(*) FROM reviews c WHERE c.inspection_id = i.id)",
}
_COLUMNS = [f.name for f in fields(InspectionRecord) if f.name not in _CURRENT_REVIEW]  # stored on the row
_REVIEW_COLUMNS = [f.name for f in fields(Review)]
_EVENT_COLUMNS = [f.name for f in fields(ModelEvent)]
# each row with its latest review: the one place that says which review is current
_SELECT = (
    f"SELECT i.seq, {', '.join(f'i.{c}' for c in _COLUMNS)}, "
    f"{', '.join(f'{expr} AS {name}' for name, expr in _CURRENT_REVIEW.items())} FROM inspections i "
    "LEFT JOIN reviews r ON r.seq = (SELECT MAX(m.seq) FROM reviews m WHERE m.inspection_id = i.id)"
)
EVERY = InspectionFilter()


class AuditStore(Protocol):
    """What the service needs from an audit database."""

    def add_inspections(self, *, records: Sequence[InspectionRecord]) -> None: ...
    def get_inspection(self, *, inspection_id: str) -> InspectionRecord | None: ...
    def list_inspections(
        self, *, where: InspectionFilter = EVERY, limit: int = 100, offset: int = 0
    ) -> list[InspectionRecord]: ...
    def find_inspections(
        self, *, where: InspectionFilter, limit: int, offset: int
    ) -> tuple[list[InspectionRecord], int]: ...
    def iter_inspections(self, *, since: str | None, until: str | None) -> Iterator[InspectionRecord]: ...
    def add_review(
        self,
        *,
        inspection_id: str,
        label: str,
        operator: str,
        caller: str,
        defect_class: str | None = None,
        note: str | None = None,
    ) -> InspectionRecord | None: ...
    def reviews(self, *, inspection_id: str) -> list[Review]: ...
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
    values = {f.name: row[f.name] for f in fields(InspectionRecord)}
    values["files_kept"] = bool(values["files_kept"])
    return InspectionRecord(**values)


def select_inspection(conn: sqlite3.Connection, *, inspection_id: str) -> InspectionRecord | None:
    row = conn.execute(f"{_SELECT} WHERE i.id = ?", (inspection_id,)).fetchone()
    return _record(row) if row else None


def _where(f: InspectionFilter) -> tuple[str, list]:
    clauses, params = [], []
    for clause, value in (
        ("i.verdict = ?", f.verdict),
        ("i.station = ?", f.station),
        ("i.part_id = ?", f.part_id),
        ("i.time >= ?", f.since),
        ("i.time < ?", f.until),
    ):
        if value is not None:
            clauses.append(clause)
            params.append(value)
    if f.reviewed is not None:
        clauses.append(f"{'' if f.reviewed else 'NOT '}EXISTS (SELECT 1 FROM reviews x WHERE x.inspection_id = i.id)")
    return (f" WHERE {' AND '.join(clauses)}" if clauses else ""), params


def select_inspections(
    conn: sqlite3.Connection, *, where: InspectionFilter = EVERY, limit: int = 100, offset: int = 0
) -> list[InspectionRecord]:
    """Newest first, `offset` rows skipped."""
    sql, params = _where(where)
    rows = conn.execute(f"{_SELECT}{sql} ORDER BY i.seq DESC LIMIT ? OFFSET ?", (*params, limit, offset))
    return [_record(r) for r in rows]


def count_selected(conn: sqlite3.Connection, *, where: InspectionFilter = EVERY) -> int:
    sql, params = _where(where)
    return conn.execute(f"SELECT COUNT(*) FROM inspections i{sql}", params).fetchone()[0]


def select_page(
    conn: sqlite3.Connection, *, since: str | None, until: str | None, after_seq: int, limit: int
) -> list[tuple[int, InspectionRecord]]:
    """(seq, record) pairs after `after_seq`, oldest first: keyset pagination for exports of any length."""
    window = "(? IS NULL OR i.time >= ?) AND (? IS NULL OR i.time < ?)"
    sql = f"{_SELECT} WHERE i.seq > ? AND {window} ORDER BY i.seq LIMIT ?"
    rows = conn.execute(sql, (after_seq, since, since, until, until, limit))
    return [(r["seq"], _record(r)) for r in rows]


def insert_review(conn: sqlite3.Connection, *, review: Review) -> bool:
    """Adds a review to the inspection's history (one statement: atomic). False when there is no such inspection."""
    sql = (
        f"INSERT INTO reviews ({', '.join(_REVIEW_COLUMNS)}) SELECT {', '.join('?' * len(_REVIEW_COLUMNS))} "
        "WHERE EXISTS (SELECT 1 FROM inspections WHERE id = ?)"
    )
    cur = conn.execute(sql, (*(getattr(review, c) for c in _REVIEW_COLUMNS), review.inspection_id))
    return bool(cur.rowcount)


def select_reviews(conn: sqlite3.Connection, *, inspection_id: str) -> list[Review]:
    """Oldest first: the last one is the inspection's current label."""
    rows = conn.execute(
        f"SELECT {', '.join(_REVIEW_COLUMNS)} FROM reviews WHERE inspection_id = ? ORDER BY seq", (inspection_id,)
    )
    return [Review(**{c: r[c] for c in _REVIEW_COLUMNS}) for r in rows]


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
        self, *, where: InspectionFilter = EVERY, limit: int = 100, offset: int = 0
    ) -> list[InspectionRecord]:
        return select_inspections(self._conn(), where=where, limit=limit, offset=offset)

    def find_inspections(
        self, *, where: InspectionFilter, limit: int, offset: int
    ) -> tuple[list[InspectionRecord], int]:
        """A page (newest first) and the number of all matching rows, both from one snapshot of the store."""
        conn = self._conn()
        conn.execute("BEGIN")  # a read transaction: a row committed between the two reads is in neither
        try:
            return select_inspections(conn, where=where, limit=limit, offset=offset), count_selected(conn, where=where)
        finally:
            conn.execute("COMMIT")

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

    def add_review(
        self,
        *,
        inspection_id: str,
        label: str,
        operator: str,
        caller: str,
        defect_class: str | None = None,
        note: str | None = None,
    ) -> InspectionRecord | None:
        """Adds to the history; the inspection as it reads now (this review its label), or None if there is none."""
        conn = self._conn()
        review = Review(inspection_id, utc_now(), label, operator, caller, defect_class, note)
        if not insert_review(conn, review=review):
            return None
        return select_inspection(conn, inspection_id=inspection_id)

    def reviews(self, *, inspection_id: str) -> list[Review]:
        return select_reviews(self._conn(), inspection_id=inspection_id)

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
