"""The audit store on its own: WAL, atomic batches, constraints, review history, retention, threads."""

from __future__ import annotations

import sqlite3
import threading
from dataclasses import replace

import pytest
from knowngood.service import pipeline, store_migrate
from knowngood.service.store import (
    SCHEMA_VERSION,
    AuditStore,
    InspectionFilter,
    InspectionRecord,
    ModelEvent,
    Serving,
    SqliteStore,
    Store,
    StoredFiles,
    create_schema,
    database_url,
    utc_now,
)
from knowngood.service.store_queries import (
    _upsert_served,
    count_selected,
    insert_inspections,
    insert_model_event,
    select_inspections,
)
from knowngood.service.store_schema import MIGRATED_CALLER
from service_testkit import STATION_AUTH, png_bytes, post_image
from sqlalchemy import create_engine, text
from sqlalchemy.exc import IntegrityError

RECORD = InspectionRecord(
    id="0" * 32,
    time="2025-01-01T00:00:00.000000+00:00",
    station="s",
    part_id="p",
    caller="station:1",
    image_sha256="a" * 64,
    image_width=10,
    image_height=20,
    model_id="m",
    model_revision="0123abcd",
    model_sha256="b" * 64,
    score=1.5,
    threshold=1.0,
    verdict="flag",
    elapsed_ms=3.0,
)


def _rec(i: int, **kw) -> InspectionRecord:
    return replace(RECORD, id=f"{i:032x}", time=f"2025-01-01T00:00:{i:02d}.000000+00:00", **kw)


@pytest.fixture
def store(store_url):
    """The same store tests on SQLite and on a real PostgreSQL server (`store_url` in conftest.py)."""
    s = Store(store_url)
    yield s
    s.close()


def test_the_store_implements_the_interface():
    members = [n for n in vars(AuditStore) if not n.startswith("_")]
    assert members and all(callable(getattr(Store, n, None)) for n in members)


def test_wal_and_schema_revision(tmp_path):
    store = SqliteStore(tmp_path / "audit.db")
    conn = sqlite3.connect(store.path)
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert (
        store.revision == store_migrate.head() == conn.execute("SELECT version_num FROM alembic_version").fetchone()[0]
    )
    store.close()


def test_newer_schema_is_refused(tmp_path):
    conn = sqlite3.connect(tmp_path / "new.db")
    conn.execute(f"PRAGMA user_version={SCHEMA_VERSION + 1}")
    with pytest.raises(RuntimeError, match="newer"):
        create_schema(conn)


def test_a_database_from_a_newer_version_is_refused(store_url):
    Store(store_url).close()
    engine = create_engine(database_url(store_url))
    with engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = '9999'"))
    engine.dispose()
    with pytest.raises(RuntimeError, match="newer version"):
        Store(store_url)


def test_a_batch_is_stored_whole_or_not_at_all(store):
    with pytest.raises(IntegrityError):
        store.add_inspections(records=[_rec(1), _rec(1)])  # duplicate id in the second row
    assert store.count_inspections() == 0
    store.add_inspections(records=[_rec(1), _rec(2)])
    assert store.count_inspections() == 2
    assert store.get_inspection(inspection_id=_rec(2).id) == _rec(2)


def test_verdict_is_constrained(store):
    with pytest.raises(IntegrityError):
        store.add_inspections(records=[_rec(1, verdict="maybe")])


def test_data_functions_take_the_connection(store):
    with store.engine.begin() as conn:
        insert_inspections(conn, records=[_rec(1), _rec(2, verdict="pass"), _rec(3, station="t", part_id="q")])
        ids = [_rec(i).id for i in range(4)]
        assert [r.id for r in select_inspections(conn, where=InspectionFilter(verdict="pass"))] == [ids[2]]
        assert [r.id for r in select_inspections(conn, where=InspectionFilter(since=_rec(2).time))] == [ids[3], ids[2]]
        assert [r.id for r in select_inspections(conn, where=InspectionFilter(until=_rec(2).time))] == [ids[1]]
        assert [r.id for r in select_inspections(conn, where=InspectionFilter(station="s"))] == [ids[2], ids[1]]
        assert [r.id for r in select_inspections(conn, where=InspectionFilter(part_id="q"))] == [ids[3]]
        assert [r.id for r in select_inspections(conn, limit=1, offset=1)] == [ids[2]]
        assert count_selected(conn, where=InspectionFilter(station="s", verdict="flag")) == 1


def test_reviews_keep_history_and_the_latest_is_the_label(store):
    store.add_inspections(records=[_rec(1), _rec(2)])
    assert store.add_review(inspection_id=_rec(1).id, label="good", operator="Kim", caller="c") is not None
    latest = store.add_review(
        inspection_id=_rec(1).id, label="defective", operator="Lee", caller="c", defect_class="pore", note="n"
    )
    assert (latest.review_label, latest.review_operator, latest.review_defect_class) == ("defective", "Lee", "pore")
    assert (latest.review_note, latest.review_count) == ("n", 2)
    assert store.add_review(inspection_id="f" * 32, label="good", operator="x", caller="c") is None
    history = store.reviews(inspection_id=_rec(1).id)
    assert [(r.label, r.operator, r.defect_class) for r in history] == [
        ("good", "Kim", None),
        ("defective", "Lee", "pore"),
    ]
    assert [r.id for r in store.list_inspections(where=InspectionFilter(reviewed=False))] == [_rec(2).id]
    assert [r.id for r in store.list_inspections(where=InspectionFilter(reviewed=True))] == [_rec(1).id]
    assert [r.review_label for r in store.iter_inspections(since=None, until=None)] == ["defective", None]


# the audit database as schema 2 wrote it: the latest review on the inspection row, the history beside it
SCHEMA_2 = """
CREATE TABLE inspections (
    seq INTEGER PRIMARY KEY AUTOINCREMENT, id TEXT NOT NULL UNIQUE, time TEXT NOT NULL, station TEXT, part_id TEXT,
    caller TEXT NOT NULL, image_sha256 TEXT NOT NULL, image_width INTEGER NOT NULL, image_height INTEGER NOT NULL,
    model_id TEXT NOT NULL, model_sha256 TEXT NOT NULL, score REAL NOT NULL, threshold REAL NOT NULL,
    verdict TEXT NOT NULL CHECK (verdict IN ('pass', 'flag')), elapsed_ms REAL NOT NULL,
    files_kept INTEGER NOT NULL DEFAULT 1, review_label TEXT CHECK (review_label IN ('good', 'defective')),
    review_operator TEXT, review_time TEXT
);
CREATE INDEX inspections_time ON inspections (time);
CREATE INDEX inspections_queue ON inspections (verdict, review_label);
CREATE TABLE reviews (
    seq INTEGER PRIMARY KEY AUTOINCREMENT, inspection_id TEXT NOT NULL REFERENCES inspections (id),
    time TEXT NOT NULL, label TEXT NOT NULL, operator TEXT NOT NULL, caller TEXT NOT NULL
);
CREATE TABLE model_events (
    seq INTEGER PRIMARY KEY AUTOINCREMENT, time TEXT NOT NULL,
    kind TEXT NOT NULL CHECK (kind IN ('load', 'swap', 'rollback', 'threshold')), model_id TEXT NOT NULL,
    model_sha256 TEXT NOT NULL, threshold REAL NOT NULL, previous_threshold REAL, caller TEXT NOT NULL,
    operator TEXT, reason TEXT
);
CREATE TABLE serving (
    id INTEGER PRIMARY KEY CHECK (id = 1), current_sha256 TEXT NOT NULL, previous_sha256 TEXT, startup_sha256 TEXT
);
PRAGMA user_version = 2;
"""


def test_a_schema_2_store_is_migrated_and_its_row_reviews_become_history(tmp_path):
    path = tmp_path / "old.db"
    with sqlite3.connect(path) as old:
        old.executescript(SCHEMA_2)
        columns = "id, time, caller, image_sha256, image_width, image_height, model_id, model_sha256, score, threshold"
        row = "?, ?, 'c', 'a', 1, 1, 'm', 'b', 1.0, 2.0, 'pass', 1.0"
        add = f"INSERT INTO inspections ({columns}, verdict, elapsed_ms, review_label, review_operator, review_time) "
        old.execute(add + f"VALUES ({row}, 'defective', 'Kim', 't3')", ("only-on-the-row", "t1"))
        old.execute(add + f"VALUES ({row}, 'good', 'Lee', 't5')", ("with-history", "t2"))
        old.execute(add + f"VALUES ({row}, NULL, NULL, NULL)", ("unreviewed", "t3"))
        for time, label, operator in (("t4", "defective", "Kim"), ("t5", "good", "Lee")):
            old.execute(
                "INSERT INTO reviews (inspection_id, time, label, operator, caller) VALUES (?, ?, ?, ?, 's')",
                ("with-history", time, label, operator),
            )
        old.execute(
            "INSERT INTO model_events (time, kind, model_id, model_sha256, threshold, caller) "
            "VALUES ('t0', 'load', 'm', 'b', 2.0, 'startup')"
        )
    store = SqliteStore(path)
    try:
        assert sqlite3.connect(path).execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
        [moved] = store.reviews(inspection_id="only-on-the-row")  # the row's review is its first history row
        assert (moved.label, moved.operator, moved.time, moved.caller) == ("defective", "Kim", "t3", MIGRATED_CALLER)
        kept = store.reviews(inspection_id="with-history")  # a history already there is not doubled
        assert [(r.label, r.operator) for r in kept] == [("defective", "Kim"), ("good", "Lee")]
        records = {r.id: r for r in store.list_inspections()}
        assert (records["only-on-the-row"].review_label, records["only-on-the-row"].review_count) == ("defective", 1)
        assert (records["with-history"].review_label, records["with-history"].review_count) == ("good", 2)
        assert records["unreviewed"].review_label is None and records["unreviewed"].model_revision is None
        assert [r.id for r in store.list_inspections(where=InspectionFilter(reviewed=False))] == ["unreviewed"]
        assert store.model_events()[0].revision is None
        store.add_review(inspection_id="only-on-the-row", label="good", operator="Ana", caller="s")
        assert store.get_inspection(inspection_id="only-on-the-row").review_label == "good"
        columns = {r[1] for r in sqlite3.connect(path).execute("PRAGMA table_info(inspections)")}
        assert "model_revision" in columns and not columns & {"review_label", "review_operator", "review_time"}
    finally:
        store.close()
    reopened = SqliteStore(path)  # a second open changes nothing
    assert len(reopened.reviews(inspection_id="only-on-the-row")) == 2
    reopened.close()


def test_model_events_and_latest_event(store):
    event = ModelEvent(
        time=utc_now(),
        kind="threshold",
        model_id="m",
        model_sha256="b" * 64,
        threshold=2.0,
        caller="admin:1",
        previous_threshold=1.0,
        operator="Dana",
        reason="retune",
    )
    store.add_model_event(event=event)
    store.add_model_event(event=replace(event, threshold=2.5))
    store.add_model_event(event=replace(event, kind="swap", threshold=3.0))
    assert store.latest_event(model_sha256="b" * 64, kind="threshold").threshold == 2.5
    assert store.latest_event(model_sha256="b" * 64).kind == "swap"
    assert store.latest_event(model_sha256="c" * 64) is None
    assert [e.threshold for e in store.model_events()] == [3.0, 2.5, 2.0]
    with pytest.raises(IntegrityError):
        store.add_model_event(event=replace(event, kind="guess"))


def test_expired_files_by_count_and_by_age(store):
    store.add_inspections(records=[_rec(i) for i in range(1, 6)])
    assert store.expired_files(keep=3, before="2000-01-01") == [_rec(1).id, _rec(2).id]
    assert store.expired_files(keep=100, before=_rec(3).time) == [_rec(1).id, _rec(2).id]
    store.mark_files_deleted(inspection_ids=[_rec(1).id])
    assert store.expired_files(keep=3, before="2000-01-01") == [_rec(2).id]
    assert store.get_inspection(inspection_id=_rec(1).id).files_kept is False


def test_concurrent_writers_on_their_own_connections(store):
    def write(start: int) -> None:
        for i in range(start, start + 25):
            store.add_inspections(records=[_rec(i)])

    threads = [threading.Thread(target=write, args=(k * 25,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert store.count_inspections() == 100


def test_retention_deletes_files_and_keeps_rows(make_client, tiny_good_images, monkeypatch):
    monkeypatch.setattr(pipeline, "PRUNE_EVERY", 2)
    client = make_client(retention_count=2)
    bodies = [post_image(client, png_bytes(img)).json() for img in tiny_good_images[:4]]
    # the sweep ran after the 2nd and 4th responses: only the newest two keep their heatmaps
    listed = {i["id"]: i for i in client.get("/v1/inspections", headers=STATION_AUTH).json()["items"]}
    assert [listed[b["id"]]["heatmap_url"] is None for b in bodies] == [True, True, False, False]
    r = client.get(bodies[0]["heatmap_url"], headers=STATION_AUTH)
    assert r.status_code == 404 and "retention" in r.json()["detail"]
    assert client.get(bodies[3]["heatmap_url"], headers=STATION_AUTH).status_code == 200
    files = client.app.state.service.files
    assert [files.get_heatmap(b["id"]) is None for b in bodies] == [True, True, False, False]  # deleted, not hidden
    assert client.app.state.service.store.count_inspections() == 4  # audit rows stay


def test_retention_by_age(make_client, good_png):
    client = make_client(retention_days=1e-9)  # about 0.1 ms: everything already stored is too old
    body = post_image(client, good_png).json()
    assert pipeline.prune(client.app.state.service) == 1
    assert client.get(f"/v1/inspections/{body['id']}", headers=STATION_AUTH).json()["heatmap_url"] is None


def test_file_names_come_only_from_generated_ids(client):
    files = client.app.state.service.files
    for bad in ("../../etc/passwd", "0" * 31 + "/", "A" * 32):
        with pytest.raises(ValueError):
            files.get_heatmap(bad)


def test_files_embeddings_and_part_types_are_stored_with_the_row(store):
    a, b = _rec(1, part_type="bracket"), _rec(2, part_type="casting", verdict="pass")
    files = [StoredFiles(b"heat-1", b"image-1", b"\x01" * 8), StoredFiles(b"heat-2", None, b"\x02" * 8)]
    store.add_inspections(records=[a, b], files=files)
    assert store.file(inspection_id=a.id, kind="heatmap") == b"heat-1"
    assert store.file(inspection_id=a.id, kind="image") == b"image-1"
    assert store.file(inspection_id=b.id, kind="image") is None
    assert store.embeddings(part_type="bracket", model_sha256=a.model_sha256, limit=10) == [b"\x01" * 8]
    assert store.embeddings(part_type="bracket", model_sha256="c" * 64, limit=10) == []  # another model: none
    found, total = store.find_inspections(where=InspectionFilter(part_type="casting"), limit=10, offset=0)
    assert [r.id for r in found] == [b.id] and total == 1
    store.mark_files_deleted(inspection_ids=[a.id])
    assert (
        store.file(inspection_id=a.id, kind="heatmap") is None and store.file(inspection_id=a.id, kind="image") is None
    )
    assert store.get_inspection(inspection_id=a.id).files_kept is False


def test_a_failed_batch_stores_no_file_either(store):
    with pytest.raises(IntegrityError):
        store.add_inspections(records=[_rec(1), _rec(1)], files=[StoredFiles(b"h"), StoredFiles(b"h")])
    assert store.count_inspections() == 0 and store.file(inspection_id=_rec(1).id, kind="heatmap") is None


def test_each_part_type_serves_its_own_model_and_events_say_which(store):
    event = ModelEvent(time=utc_now(), kind="load", model_id="m", model_sha256="b" * 64, threshold=1.0, caller="c")
    first = store.add_model_event(event=replace(event, part_type="bracket"), serving=Serving("b" * 64, None, None))
    second = store.add_model_event(
        event=replace(event, part_type="casting", model_sha256="c" * 64), serving=Serving("c" * 64, None, None)
    )
    third = store.add_model_event(
        event=replace(event, kind="swap", part_type="bracket", model_sha256="d" * 64),
        serving=Serving("d" * 64, "b" * 64, None),
    )
    assert first < second < third
    served = {s.part_type: s for s in store.served()}
    assert (served["bracket"].current_sha256, served["bracket"].previous_sha256) == ("d" * 64, "b" * 64)
    assert (served["bracket"].event_seq, served["casting"].event_seq) == (third, second)
    assert [e.part_type for e in store.model_events(part_type="casting")] == ["casting"]
    assert store.event(seq=third).kind == "swap"
    assert store.latest_event(model_sha256="b" * 64, part_type="casting") is None


def test_bundles_are_kept_in_the_store_with_retention(store):
    for i, sha in enumerate(("a", "b", "c", "d")):
        store.put_bundle(sha256=sha * 64, data=bytes([i]) * 10)
    assert store.get_bundle(sha256="b" * 64) == b"\x01" * 10
    deleted = store.prune_bundles(keep=1, protect={"a" * 64})
    assert sorted(deleted) == ["b" * 64, "c" * 64]  # the newest (d) and the protected (a) stay
    assert store.get_bundle(sha256="a" * 64) is not None and store.get_bundle(sha256="c" * 64) is None


def test_two_stores_on_one_database_see_each_others_writes(store_url):
    one, two = Store(store_url), Store(store_url)  # two instances: each migrates (a no-op the second time)
    try:
        one.add_inspections(records=[_rec(1)], files=[StoredFiles(b"h1")])
        assert two.get_inspection(inspection_id=_rec(1).id) == _rec(1)
        assert two.add_review(inspection_id=_rec(1).id, label="good", operator="Kim", caller="c").review_count == 1
        assert [r.operator for r in one.reviews(inspection_id=_rec(1).id)] == ["Kim"]
        assert two.file(inspection_id=_rec(1).id, kind="heatmap") == b"h1"
    finally:
        one.close()
        two.close()


def test_a_schema_3_sqlite_store_is_taken_over_by_the_migrations(tmp_path):
    path = tmp_path / "v3.db"
    with sqlite3.connect(path, isolation_level=None) as old:
        create_schema(old)
        old.execute(
            "INSERT INTO serving (id, current_sha256, previous_sha256, startup_sha256) VALUES (1, ?, NULL, ?)",
            ("b" * 64, "b" * 64),
        )
    store = SqliteStore(path)
    try:
        [served] = store.served()
        assert (served.part_type, served.current_sha256, served.startup_sha256) == ("default", "b" * 64, "b" * 64)
        store.add_inspections(records=[_rec(1)])
        assert store.get_inspection(inspection_id=_rec(1).id).part_type == "default"
    finally:
        store.close()


def _load_event(part_type: str, sha: str) -> ModelEvent:
    return ModelEvent(
        time=utc_now(), kind="load", model_id="m", model_sha256=sha * 64, threshold=1.0, caller="c", part_type=part_type
    )


def test_what_a_part_type_serves_only_moves_forward(store):
    newer = store.add_model_event(event=_load_event("gear", "e"), serving=Serving("e" * 64, None, None))
    # a write that carries an older event's seq (its transaction committed after the newer one's) is ignored
    with store.engine.begin() as conn:
        conn.execute(
            _upsert_served(
                conn,
                "gear",
                {"current_sha256": "f" * 64, "previous_sha256": None, "startup_sha256": None, "event_seq": newer - 1},
            )
        )
    assert (store.serving("gear").current_sha256, store.serving("gear").event_seq) == ("e" * 64, newer)


def test_two_instances_starting_a_new_part_type_at_once_both_succeed(postgres):
    # the race, made deterministic: the other instance has inserted the part type's row but not yet committed; this
    # instance's write must wait for it and then succeed, not fail on the primary key (it did before the upsert)
    url = postgres.new_database()
    one, two = Store(url), Store(url)
    try:
        other = two.engine.connect()
        tx = other.begin()
        theirs = insert_model_event(other, event=_load_event("gear", "a"), serving=Serving("a" * 64, None, None))
        outcome = {}

        def ours():
            try:
                outcome["seq"] = one.add_model_event(
                    event=_load_event("gear", "b"), serving=Serving("b" * 64, None, None)
                )
            except Exception as exc:  # noqa: BLE001 - the test reports whatever the write raised
                outcome["error"] = exc

        writer = threading.Thread(target=ours)
        writer.start()
        writer.join(1.0)
        assert writer.is_alive()  # waiting on the other transaction's row
        tx.commit()
        other.close()
        writer.join(30)
        assert "error" not in outcome, outcome.get("error")
        assert outcome["seq"] > theirs
        served = one.serving("gear")
        assert (served.current_sha256, served.event_seq) == ("b" * 64, outcome["seq"])  # the newer event is served
        assert two.serving("gear") == served
        assert [e.model_sha256[0] for e in one.model_events(part_type="gear")] == ["b", "a"]  # both events recorded
    finally:
        one.close()
        two.close()
