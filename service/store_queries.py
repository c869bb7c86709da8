"""The audit store's queries, in SQLAlchemy Core: one text for SQLite and PostgreSQL. Each takes its connection
first and keyword-only arguments; the caller owns the transaction (`store.Store` opens them). One statement, the
upsert of what a part type serves, takes each dialect's own form of the same SQL."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import fields

from knowngood.service.store_records import (
    EVERY,
    InspectionFilter,
    InspectionRecord,
    ModelEvent,
    Review,
    Serving,
    StoredFiles,
)
from knowngood.service.store_tables import bundles, inspection_files, inspections, model_events, reviews, served
from sqlalchemy import Connection, delete, exists, func, insert, not_, select, update
from sqlalchemy.dialects import postgresql, sqlite

_CURRENT_REVIEW = ("review_label", "review_operator", "review_time", "review_defect_class", "review_note")
_ROW = [f.name for f in fields(InspectionRecord) if not f.name.startswith("review_")]  # stored on the row
_REVIEW = [f.name for f in fields(Review)]
_EVENT = [f.name for f in fields(ModelEvent) if f.name != "seq"]

# each row with its latest review: the one place that says which review is current
_i, _r, _m, _c = inspections.alias("i"), reviews.alias("r"), reviews.alias("m"), reviews.alias("c")
_latest = select(func.max(_m.c.seq)).where(_m.c.inspection_id == _i.c.id).scalar_subquery()
_count = select(func.count()).select_from(_c).where(_c.c.inspection_id == _i.c.id).scalar_subquery()
_SELECT = select(
    _i.c.seq,
    *(_i.c[name] for name in _ROW),
    *(_r.c[name.removeprefix("review_")].label(name) for name in _CURRENT_REVIEW),
    _count.label("review_count"),
).select_from(_i.outerjoin(_r, _r.c.seq == _latest))


def _record(row) -> InspectionRecord:
    values = {f.name: getattr(row, f.name) for f in fields(InspectionRecord)}
    values["files_kept"], values["image_kept"] = bool(values["files_kept"]), bool(values["image_kept"])
    return InspectionRecord(**values)


def insert_inspections(
    conn: Connection, *, records: Sequence[InspectionRecord], files: Sequence[StoredFiles] | None = None
) -> None:
    """Rows and their files (one per record, or none): the caller commits them in one transaction."""
    rows = [{c: getattr(r, c) for c in _ROW} for r in records]
    if files is not None:
        for row, f in zip(rows, files, strict=True):
            row["embedding"] = f.embedding
    conn.execute(insert(inspections), rows)
    if files:
        conn.execute(
            insert(inspection_files),
            [{"inspection_id": r.id, "heatmap": f.heatmap, "image": f.image} for r, f in zip(records, files)],
        )


def select_inspection(conn: Connection, *, inspection_id: str) -> InspectionRecord | None:
    row = conn.execute(_SELECT.where(_i.c.id == inspection_id)).first()
    return _record(row) if row else None


def _where(f: InspectionFilter) -> list:
    clauses = [
        column == value
        for column, value in (
            (_i.c.verdict, f.verdict),
            (_i.c.station, f.station),
            (_i.c.part_id, f.part_id),
            (_i.c.part_type, f.part_type),
        )
        if value is not None
    ]
    if f.since is not None:
        clauses.append(_i.c.time >= f.since)
    if f.until is not None:
        clauses.append(_i.c.time < f.until)
    if f.reviewed is not None:
        has = exists().where(reviews.c.inspection_id == _i.c.id)
        clauses.append(has if f.reviewed else not_(has))
    return clauses


def select_inspections(
    conn: Connection, *, where: InspectionFilter = EVERY, limit: int = 100, offset: int = 0
) -> list[InspectionRecord]:
    """Newest first, `offset` rows skipped."""
    query = _SELECT.where(*_where(where)).order_by(_i.c.seq.desc()).limit(limit).offset(offset)
    return [_record(r) for r in conn.execute(query)]


def count_selected(conn: Connection, *, where: InspectionFilter = EVERY) -> int:
    return conn.execute(select(func.count()).select_from(_i).where(*_where(where))).scalar_one()


def select_page(
    conn: Connection, *, where: InspectionFilter, after_seq: int, limit: int
) -> list[tuple[int, InspectionRecord]]:
    """(seq, record) pairs after `after_seq`, oldest first: keyset pagination for exports of any length."""
    query = _SELECT.where(_i.c.seq > after_seq, *_where(where)).order_by(_i.c.seq).limit(limit)
    return [(r.seq, _record(r)) for r in conn.execute(query)]


def insert_review(conn: Connection, *, review: Review) -> bool:
    """Adds a review to the inspection's history. False when there is no such inspection."""
    found = conn.execute(select(inspections.c.seq).where(inspections.c.id == review.inspection_id)).first()
    if found is None:
        return False
    conn.execute(insert(reviews).values(**{c: getattr(review, c) for c in _REVIEW}))
    return True


def select_reviews(conn: Connection, *, inspection_id: str) -> list[Review]:
    """Oldest first: the last one is the inspection's current label."""
    query = select(*(reviews.c[c] for c in _REVIEW)).where(reviews.c.inspection_id == inspection_id)
    return [Review(**r._mapping) for r in conn.execute(query.order_by(reviews.c.seq))]


def insert_model_event(conn: Connection, *, event: ModelEvent, serving: Serving | None = None) -> int:
    """The event and, in the caller's transaction, what its part type serves from now on; returns its seq."""
    seq = conn.execute(insert(model_events).values(**{c: getattr(event, c) for c in _EVENT})).inserted_primary_key[0]
    if serving is not None:
        values = {
            "current_sha256": serving.current_sha256,
            "previous_sha256": serving.previous_sha256,
            "startup_sha256": serving.startup_sha256,
            "event_seq": seq,
        }
        conn.execute(_upsert_served(conn, event.part_type, values))
    return int(seq)


def _upsert_served(conn: Connection, part_type: str, values: dict):
    """INSERT ... ON CONFLICT (part_type) DO UPDATE, in the dialect's own syntax (both PostgreSQL and SQLite have
    it): two instances starting a new part type at once both succeed, where an update-then-insert let the second
    fail on the primary key. The row only moves forward: a transaction that commits after a newer event's (its seq
    taken first) leaves the newer one served, so every instance's follower converges on one model."""
    dialect = postgresql if conn.dialect.name == "postgresql" else sqlite
    stmt = dialect.insert(served).values(part_type=part_type, **values)
    return stmt.on_conflict_do_update(
        index_elements=[served.c.part_type],
        set_={name: stmt.excluded[name] for name in values},
        where=served.c.event_seq < stmt.excluded.event_seq,
    )


def select_served(conn: Connection, *, part_type: str | None = None) -> list[Serving]:
    query = select(served).order_by(served.c.part_type)
    if part_type is not None:
        query = query.where(served.c.part_type == part_type)
    return [
        Serving(r.current_sha256, r.previous_sha256, r.startup_sha256, r.part_type, int(r.event_seq))
        for r in conn.execute(query)
    ]


def select_model_events(
    conn: Connection,
    *,
    limit: int = 50,
    part_type: str | None = None,
    model_sha256: str | None = None,
    kind: str | None = None,
    seq: int | None = None,
) -> list[ModelEvent]:
    """Newest first."""
    clauses = [
        column == value
        for column, value in (
            (model_events.c.part_type, part_type),
            (model_events.c.model_sha256, model_sha256),
            (model_events.c.kind, kind),
            (model_events.c.seq, seq),
        )
        if value is not None
    ]
    query = select(model_events).where(*clauses).order_by(model_events.c.seq.desc()).limit(limit)
    return [ModelEvent(**{c: getattr(r, c) for c in _EVENT}, seq=int(r.seq)) for r in conn.execute(query)]


def select_expired_files(conn: Connection, *, keep: int, before: str, limit: int = 500) -> list[str]:
    """Ids whose files retention says to delete: beyond the newest `keep` inspections, or older than `before`."""
    newest = conn.execute(select(func.coalesce(func.max(inspections.c.seq), 0))).scalar_one()
    query = (
        select(inspections.c.id)
        .where(inspections.c.files_kept.is_(True), (inspections.c.seq <= newest - keep) | (inspections.c.time < before))
        .order_by(inspections.c.seq)
        .limit(limit)
    )
    return list(conn.execute(query).scalars())


def delete_files(conn: Connection, *, inspection_ids: Sequence[str]) -> None:
    ids = list(inspection_ids)
    conn.execute(delete(inspection_files).where(inspection_files.c.inspection_id.in_(ids)))
    conn.execute(update(inspections).where(inspections.c.id.in_(ids)).values(files_kept=False, image_kept=False))


def select_file(conn: Connection, *, inspection_id: str, kind: str) -> bytes | None:
    """kind: 'heatmap' or 'image'."""
    column = inspection_files.c[kind]
    row = conn.execute(select(column).where(inspection_files.c.inspection_id == inspection_id)).first()
    return None if row is None or row[0] is None else bytes(row[0])


def select_embeddings(conn: Connection, *, part_type: str, model_sha256: str, limit: int) -> list[bytes]:
    """The newest `limit` inspections' features for one part type and model, oldest first."""
    query = (
        select(inspections.c.embedding)
        .where(
            inspections.c.part_type == part_type,
            inspections.c.model_sha256 == model_sha256,
            inspections.c.embedding.is_not(None),
        )
        .order_by(inspections.c.seq.desc())
        .limit(limit)
    )
    return [bytes(e) for e in conn.execute(query).scalars()][::-1]


def upsert_bundle(conn: Connection, *, sha256: str, data: bytes, now: str) -> None:
    """Keeps a bundle by its sha256; storing it again marks it as recently used (retention keeps the newest)."""
    if conn.execute(update(bundles).where(bundles.c.sha256 == sha256).values(stored_at=now)).rowcount:
        return
    conn.execute(insert(bundles).values(sha256=sha256, data=data, stored_at=now))


def select_bundle(conn: Connection, *, sha256: str) -> bytes | None:
    row = conn.execute(select(bundles.c.data).where(bundles.c.sha256 == sha256)).first()
    return None if row is None else bytes(row[0])


def delete_old_bundles(conn: Connection, *, keep: int, protect: set[str]) -> list[str]:
    """Deletes kept bundles beyond the `keep` most recently stored, never one in `protect`."""
    shas = conn.execute(select(bundles.c.sha256).order_by(bundles.c.stored_at.desc(), bundles.c.sha256)).scalars()
    doomed = [s for s in shas if s not in protect][keep:]
    if doomed:
        conn.execute(delete(bundles).where(bundles.c.sha256.in_(doomed)))
    return doomed
