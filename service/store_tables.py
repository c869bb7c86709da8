"""The audit store's tables as SQLAlchemy Core metadata: the one description of the schema that the queries
(`store.py`) are written against, for SQLite and PostgreSQL alike. Alembic migrations (`migrations/`) bring a
database to it; this file is what the newest migration produces.

Times are UTC ISO 8601 text of one fixed width (`store.to_iso`), so text order is time order on every database.
"""

from __future__ import annotations

from sqlalchemy import (
    BigInteger,
    Boolean,
    CheckConstraint,
    Column,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
)

# SQLite only hands out increasing row ids to an INTEGER PRIMARY KEY; PostgreSQL gets a 64-bit identity
SEQ = BigInteger().with_variant(Integer(), "sqlite")
DEFAULT_PART_TYPE = "default"  # rows written before part types existed, and the name a lone model gets
metadata = MetaData()

inspections = Table(
    "inspections",
    metadata,
    Column("seq", SEQ, primary_key=True, autoincrement=True),
    Column("id", String(32), nullable=False, unique=True),
    Column("time", String(40), nullable=False),
    Column("part_type", String(64), nullable=False, server_default=DEFAULT_PART_TYPE),
    Column("station", Text),
    Column("part_id", Text),
    Column("caller", Text, nullable=False),
    Column("image_sha256", String(64), nullable=False),
    Column("image_width", Integer, nullable=False),
    Column("image_height", Integer, nullable=False),
    Column("model_id", Text, nullable=False),
    Column("model_revision", Text),
    Column("model_sha256", String(64), nullable=False),
    Column("score", Float, nullable=False),
    Column("threshold", Float, nullable=False),
    Column("verdict", String(8), CheckConstraint("verdict IN ('pass', 'flag')"), nullable=False),
    Column("elapsed_ms", Float, nullable=False),
    Column("files_kept", Boolean, nullable=False, server_default="1"),
    Column("image_kept", Boolean, nullable=False, server_default="0"),
    Column("embedding", LargeBinary),  # float32 critic features: the drift window is read from these
    sqlite_autoincrement=True,
)
Index("inspections_time", inspections.c.time)
Index("inspections_verdict", inspections.c.verdict)
Index("inspections_station", inspections.c.station)
Index("inspections_part", inspections.c.part_id)
Index("inspections_part_type", inspections.c.part_type, inspections.c.seq)
Index("inspections_window", inspections.c.part_type, inspections.c.model_sha256, inspections.c.seq)

reviews = Table(
    "reviews",
    metadata,
    Column("seq", SEQ, primary_key=True, autoincrement=True),
    Column("inspection_id", String(32), ForeignKey("inspections.id"), nullable=False),
    Column("time", String(40), nullable=False),
    Column("label", Text, nullable=False),
    Column("operator", Text, nullable=False),
    Column("caller", Text, nullable=False),
    Column("defect_class", Text),
    Column("note", Text),
    sqlite_autoincrement=True,
)
Index("reviews_inspection", reviews.c.inspection_id, reviews.c.seq)

model_events = Table(
    "model_events",
    metadata,
    Column("seq", SEQ, primary_key=True, autoincrement=True),
    Column("time", String(40), nullable=False),
    Column("part_type", String(64), nullable=False, server_default=DEFAULT_PART_TYPE),
    Column("kind", String(16), CheckConstraint("kind IN ('load', 'swap', 'rollback', 'threshold')"), nullable=False),
    Column("model_id", Text, nullable=False),
    Column("model_sha256", String(64), nullable=False),
    Column("threshold", Float, nullable=False),
    Column("previous_threshold", Float),
    Column("caller", Text, nullable=False),
    Column("operator", Text),
    Column("reason", Text),
    Column("revision", Text),
    Column("threshold_section", Text),
    sqlite_autoincrement=True,
)
Index("model_events_part_type", model_events.c.part_type, model_events.c.seq)

# what each part type serves: every instance on the database polls this and follows `event_seq`
served = Table(
    "served",
    metadata,
    Column("part_type", String(64), primary_key=True),
    Column("current_sha256", String(64), nullable=False),
    Column("previous_sha256", String(64)),
    Column("startup_sha256", String(64)),
    Column("event_seq", BigInteger, nullable=False),  # the model event that made it so
)

bundles = Table(  # every instance loads a swapped-in model from here
    "bundles",
    metadata,
    Column("sha256", String(64), primary_key=True),
    Column("stored_at", String(40), nullable=False),
    Column("data", LargeBinary, nullable=False),
)

inspection_files = Table(  # heatmap record and kept upload, written with the row; retention deletes them
    "inspection_files",
    metadata,
    Column("inspection_id", String(32), primary_key=True),
    Column("heatmap", LargeBinary, nullable=False),
    Column("image", LargeBinary),
)
