"""The audit store: one row per accepted inspection with its heatmap (and image, when kept), every review, model
events, what each part type serves, and the bundles. `KNOWNGOOD_DATABASE_URL` chooses the database: an SQLite file
(the embedded default, WAL) or PostgreSQL, which several service instances share. The tables are in
`store_tables.py`, the queries in `store_queries.py`, migrations in `migrations/` (run on open).

Heatmaps, kept images and bundles live in the database rather than in a folder, so every instance on one
PostgreSQL reads what any of them wrote, each written in the transaction of its row, and retention is one DELETE.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Protocol

from knowngood.service import store_queries as q
from knowngood.service.store_migrate import migrate
from knowngood.service.store_records import (  # noqa: F401 (re-exported: the store's vocabulary)
    EVERY,
    InspectionFilter,
    InspectionRecord,
    ModelEvent,
    Review,
    Serving,
    StoredFiles,
    to_iso,
    utc_now,
)
from knowngood.service.store_schema import SCHEMA_VERSION, create_schema  # noqa: F401 (SQLite before Alembic)
from knowngood.service.store_tables import DEFAULT_PART_TYPE
from knowngood.service.store_tables import inspections as _inspections
from sqlalchemy import Connection, create_engine, event, func, select
from sqlalchemy.engine import make_url

POSTGRES_SCHEMES = ("postgresql", "postgres")


class AuditStore(Protocol):
    """What the service needs from an audit database."""

    def add_inspections(self, *, records: Sequence[InspectionRecord], files: Sequence[StoredFiles] | None) -> None: ...
    def get_inspection(self, *, inspection_id: str) -> InspectionRecord | None: ...
    def find_inspections(
        self, *, where: InspectionFilter, limit: int, offset: int
    ) -> tuple[list[InspectionRecord], int]: ...
    def iter_inspections(self, *, since: str | None, until: str | None) -> Iterator[InspectionRecord]: ...
    def add_review(self, *, inspection_id: str, label: str, operator: str, caller: str) -> InspectionRecord | None: ...
    def reviews(self, *, inspection_id: str) -> list[Review]: ...
    def add_model_event(self, *, event: ModelEvent, serving: Serving | None = None) -> int: ...
    def served(self, *, part_type: str | None = None) -> list[Serving]: ...
    def model_events(self, *, limit: int = 50, part_type: str | None = None) -> list[ModelEvent]: ...
    def latest_event(self, *, model_sha256: str, part_type: str, kind: str | None = None) -> ModelEvent | None: ...
    def expired_files(self, *, keep: int, before: str, limit: int = 500) -> list[str]: ...
    def mark_files_deleted(self, *, inspection_ids: Sequence[str]) -> None: ...
    def file(self, *, inspection_id: str, kind: str) -> bytes | None: ...
    def embeddings(self, *, part_type: str, model_sha256: str, limit: int) -> list[bytes]: ...
    def put_bundle(self, *, sha256: str, data: bytes) -> None: ...
    def get_bundle(self, *, sha256: str) -> bytes | None: ...
    def prune_bundles(self, *, keep: int, protect: set[str]) -> list[str]: ...
    def count_inspections(self) -> int: ...
    def close(self) -> None: ...


def database_url(value: str | Path) -> str:
    """An SQLite path or a `postgresql://` URL, as SQLAlchemy takes it (psycopg 3 for PostgreSQL)."""
    text = str(value)
    scheme = text.split("://", 1)[0].split("+", 1)[0] if "://" in text else ""
    if scheme in POSTGRES_SCHEMES:
        return "postgresql+psycopg://" + text.split("://", 1)[1]
    if scheme == "sqlite":
        return text
    return f"sqlite:///{Path(text)}"


def describe(url: str) -> str:
    """The URL without its password, for logs."""
    return make_url(database_url(url)).render_as_string(hide_password=True)


class Store:
    """`AuditStore` on SQLite or PostgreSQL through one SQLAlchemy engine (a connection pool; each call takes a
    connection for one transaction)."""

    def __init__(self, url: str | Path):
        self.url = make_url(database_url(url))
        self.path = Path(self.url.database) if self.url.get_backend_name() == "sqlite" else None
        if self.path is not None:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self.engine = create_engine(self.url, connect_args={"timeout": 30, "check_same_thread": False})
            _sqlite_pragmas(self.engine)
        else:
            self.engine = create_engine(self.url, pool_size=8, max_overflow=8, pool_pre_ping=True)
        try:
            self.revision = migrate(self.engine, sqlite_path=self.path)
        except BaseException:
            self.engine.dispose()  # a refused database leaves no open connection behind
            raise

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name

    def _write(self):
        return self.engine.execution_options(write=True).begin()

    def _read(self) -> Connection:
        return self.engine.connect()

    def add_inspections(
        self, *, records: Sequence[InspectionRecord], files: Sequence[StoredFiles] | None = None
    ) -> None:
        """All rows and their files in one transaction: a batch is stored whole or not at all."""
        with self._write() as conn:
            q.insert_inspections(conn, records=records, files=files)

    def get_inspection(self, *, inspection_id: str) -> InspectionRecord | None:
        with self._read() as conn:
            return q.select_inspection(conn, inspection_id=inspection_id)

    def list_inspections(
        self, *, where: InspectionFilter = EVERY, limit: int = 100, offset: int = 0
    ) -> list[InspectionRecord]:
        with self._read() as conn:
            return q.select_inspections(conn, where=where, limit=limit, offset=offset)

    def find_inspections(
        self, *, where: InspectionFilter, limit: int, offset: int
    ) -> tuple[list[InspectionRecord], int]:
        """A page (newest first) and the number of all matching rows, both from one snapshot of the store."""
        with self._snapshot() as conn:
            return q.select_inspections(conn, where=where, limit=limit, offset=offset), q.count_selected(
                conn, where=where
            )

    def _snapshot(self):
        if self.dialect == "postgresql":
            return self.engine.connect().execution_options(isolation_level="REPEATABLE READ")
        return self.engine.connect()  # SQLite: the read transaction the two queries share is one snapshot

    def iter_inspections(
        self, *, since: str | None, until: str | None, part_type: str | None = None, page: int = 1000
    ) -> Iterator[InspectionRecord]:
        """Oldest first, a page at a time, each page on a connection of its own (a streamed response may take
        long: no connection is held between pages)."""
        where, after = InspectionFilter(since=since, until=until, part_type=part_type), 0
        while True:
            with self._read() as conn:
                rows = q.select_page(conn, where=where, after_seq=after, limit=page)
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
        review = Review(inspection_id, utc_now(), label, operator, caller, defect_class, note)
        with self._write() as conn:
            if not q.insert_review(conn, review=review):
                return None
            return q.select_inspection(conn, inspection_id=inspection_id)

    def reviews(self, *, inspection_id: str) -> list[Review]:
        with self._read() as conn:
            return q.select_reviews(conn, inspection_id=inspection_id)

    def add_model_event(self, *, event: ModelEvent, serving: Serving | None = None) -> int:
        with self._write() as conn:
            return q.insert_model_event(conn, event=event, serving=serving)

    def served(self, *, part_type: str | None = None) -> list[Serving]:
        with self._read() as conn:
            return q.select_served(conn, part_type=part_type)

    def serving(self, part_type: str = DEFAULT_PART_TYPE) -> Serving | None:
        found = self.served(part_type=part_type)
        return found[0] if found else None

    def model_events(self, *, limit: int = 50, part_type: str | None = None) -> list[ModelEvent]:
        with self._read() as conn:
            return q.select_model_events(conn, limit=limit, part_type=part_type)

    def event(self, *, seq: int) -> ModelEvent | None:
        with self._read() as conn:
            found = q.select_model_events(conn, limit=1, seq=seq)
        return found[0] if found else None

    def latest_event(
        self, *, model_sha256: str, part_type: str = DEFAULT_PART_TYPE, kind: str | None = None
    ) -> ModelEvent | None:
        with self._read() as conn:
            found = q.select_model_events(conn, limit=1, part_type=part_type, model_sha256=model_sha256, kind=kind)
        return found[0] if found else None

    def expired_files(self, *, keep: int, before: str, limit: int = 500) -> list[str]:
        with self._read() as conn:
            return q.select_expired_files(conn, keep=keep, before=before, limit=limit)

    def mark_files_deleted(self, *, inspection_ids: Sequence[str]) -> None:
        """Deletes the files of these inspections (the rows stay) in one transaction."""
        with self._write() as conn:
            q.delete_files(conn, inspection_ids=inspection_ids)

    def file(self, *, inspection_id: str, kind: str) -> bytes | None:
        with self._read() as conn:
            return q.select_file(conn, inspection_id=inspection_id, kind=kind)

    def embeddings(self, *, part_type: str, model_sha256: str, limit: int) -> list[bytes]:
        with self._read() as conn:
            return q.select_embeddings(conn, part_type=part_type, model_sha256=model_sha256, limit=limit)

    def put_bundle(self, *, sha256: str, data: bytes) -> None:
        with self._write() as conn:
            q.upsert_bundle(conn, sha256=sha256, data=data, now=utc_now())

    def get_bundle(self, *, sha256: str) -> bytes | None:
        with self._read() as conn:
            return q.select_bundle(conn, sha256=sha256)

    def prune_bundles(self, *, keep: int, protect: set[str]) -> list[str]:
        with self._write() as conn:
            return q.delete_old_bundles(conn, keep=keep, protect=protect)

    def count_inspections(self) -> int:
        with self._read() as conn:
            return conn.execute(select(func.count()).select_from(_inspections)).scalar_one()

    def close(self) -> None:
        self.engine.dispose()


class SqliteStore(Store):
    """The embedded default: `Store` on one SQLite file."""

    def __init__(self, path: Path):
        super().__init__(f"sqlite:///{Path(path)}")


def _sqlite_pragmas(engine) -> None:
    """WAL (readers never wait for the writer), full fsync on commit (an audit row that got a 200 survives a power
    cut), foreign keys on; and writes begin with BEGIN IMMEDIATE, so two writers queue on the lock instead of one
    failing half-way with 'database is locked'."""

    @event.listens_for(engine, "connect")
    def _connect(dbapi_conn, _record):
        dbapi_conn.isolation_level = None  # SQLAlchemy emits BEGIN itself (below)
        for pragma in ("journal_mode=WAL", "synchronous=FULL", "foreign_keys=ON"):
            dbapi_conn.execute(f"PRAGMA {pragma}")

    @event.listens_for(engine, "begin")
    def _begin(conn):
        conn.exec_driver_sql("BEGIN IMMEDIATE" if conn.get_execution_options().get("write") else "BEGIN")
