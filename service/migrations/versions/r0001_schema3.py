"""Schema 3, the last schema written by hand (`store_schema.py`): inspections, review history, model events and
what a restart serves. An SQLite store at schema 1-3 is brought here by `store_schema.create_schema` and stamped.

Revision ID: 0001
"""

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None
SEQ = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def upgrade() -> None:
    op.create_table(
        "inspections",
        sa.Column("seq", SEQ, primary_key=True, autoincrement=True),
        sa.Column("id", sa.String(32), nullable=False, unique=True),
        sa.Column("time", sa.String(40), nullable=False),
        sa.Column("station", sa.Text),
        sa.Column("part_id", sa.Text),
        sa.Column("caller", sa.Text, nullable=False),
        sa.Column("image_sha256", sa.String(64), nullable=False),
        sa.Column("image_width", sa.Integer, nullable=False),
        sa.Column("image_height", sa.Integer, nullable=False),
        sa.Column("model_id", sa.Text, nullable=False),
        sa.Column("model_revision", sa.Text),
        sa.Column("model_sha256", sa.String(64), nullable=False),
        sa.Column("score", sa.Float, nullable=False),
        sa.Column("threshold", sa.Float, nullable=False),
        sa.Column("verdict", sa.String(8), sa.CheckConstraint("verdict IN ('pass', 'flag')"), nullable=False),
        sa.Column("elapsed_ms", sa.Float, nullable=False),
        sa.Column("files_kept", sa.Boolean, nullable=False, server_default="1"),
        sqlite_autoincrement=True,
    )
    for name, column in (
        ("inspections_time", "time"),
        ("inspections_verdict", "verdict"),
        ("inspections_station", "station"),
        ("inspections_part", "part_id"),
    ):
        op.create_index(name, "inspections", [column])
    op.create_table(
        "reviews",
        sa.Column("seq", SEQ, primary_key=True, autoincrement=True),
        sa.Column("inspection_id", sa.String(32), sa.ForeignKey("inspections.id"), nullable=False),
        sa.Column("time", sa.String(40), nullable=False),
        sa.Column("label", sa.Text, nullable=False),
        sa.Column("operator", sa.Text, nullable=False),
        sa.Column("caller", sa.Text, nullable=False),
        sa.Column("defect_class", sa.Text),
        sa.Column("note", sa.Text),
        sqlite_autoincrement=True,
    )
    op.create_index("reviews_inspection", "reviews", ["inspection_id", "seq"])
    op.create_table(
        "model_events",
        sa.Column("seq", SEQ, primary_key=True, autoincrement=True),
        sa.Column("time", sa.String(40), nullable=False),
        sa.Column(
            "kind",
            sa.String(16),
            sa.CheckConstraint("kind IN ('load', 'swap', 'rollback', 'threshold')"),
            nullable=False,
        ),
        sa.Column("model_id", sa.Text, nullable=False),
        sa.Column("model_sha256", sa.String(64), nullable=False),
        sa.Column("threshold", sa.Float, nullable=False),
        sa.Column("previous_threshold", sa.Float),
        sa.Column("caller", sa.Text, nullable=False),
        sa.Column("operator", sa.Text),
        sa.Column("reason", sa.Text),
        sa.Column("revision", sa.Text),
        sa.Column("threshold_section", sa.Text),
        sqlite_autoincrement=True,
    )
    op.create_table(
        "serving",
        sa.Column("id", sa.Integer, sa.CheckConstraint("id = 1"), primary_key=True),
        sa.Column("current_sha256", sa.Text, nullable=False),
        sa.Column("previous_sha256", sa.Text),
        sa.Column("startup_sha256", sa.Text),
    )


def downgrade() -> None:
    for table in ("serving", "model_events", "reviews", "inspections"):
        op.drop_table(table)
