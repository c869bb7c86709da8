"""A plant: part types on inspections and model events, what each part type serves (`served`, replacing the one
`serving` row), bundles, heatmaps and kept images in the database (so every instance reads them), and each
inspection's features for the drift window. Rows from before part types belong to part type 'default'.

Revision ID: 0002
"""

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None
DEFAULT = "default"


def upgrade() -> None:
    with op.batch_alter_table("inspections") as batch:
        batch.add_column(sa.Column("part_type", sa.String(64), nullable=False, server_default=DEFAULT))
        batch.add_column(sa.Column("image_kept", sa.Boolean, nullable=False, server_default="0"))
        batch.add_column(sa.Column("embedding", sa.LargeBinary))
    op.create_index("inspections_part_type", "inspections", ["part_type", "seq"])
    op.create_index("inspections_window", "inspections", ["part_type", "model_sha256", "seq"])
    with op.batch_alter_table("model_events") as batch:
        batch.add_column(sa.Column("part_type", sa.String(64), nullable=False, server_default=DEFAULT))
    op.create_index("model_events_part_type", "model_events", ["part_type", "seq"])
    served = op.create_table(
        "served",
        sa.Column("part_type", sa.String(64), primary_key=True),
        sa.Column("current_sha256", sa.String(64), nullable=False),
        sa.Column("previous_sha256", sa.String(64)),
        sa.Column("startup_sha256", sa.String(64)),
        sa.Column("event_seq", sa.BigInteger, nullable=False),
    )
    conn = op.get_bind()
    old = conn.execute(sa.text("SELECT current_sha256, previous_sha256, startup_sha256 FROM serving")).first()
    if old is not None:
        last = conn.execute(sa.text("SELECT COALESCE(MAX(seq), 0) FROM model_events")).scalar_one()
        op.bulk_insert(
            served,
            [
                {
                    "part_type": DEFAULT,
                    "current_sha256": old[0],
                    "previous_sha256": old[1],
                    "startup_sha256": old[2],
                    "event_seq": last,
                }
            ],
        )
    op.drop_table("serving")
    op.create_table(
        "bundles",
        sa.Column("sha256", sa.String(64), primary_key=True),
        sa.Column("stored_at", sa.String(40), nullable=False),
        sa.Column("data", sa.LargeBinary, nullable=False),
    )
    op.create_table(
        "inspection_files",
        sa.Column("inspection_id", sa.String(32), primary_key=True),
        sa.Column("heatmap", sa.LargeBinary, nullable=False),
        sa.Column("image", sa.LargeBinary),
    )


def downgrade() -> None:
    raise NotImplementedError("the audit store is migrated forwards only")
