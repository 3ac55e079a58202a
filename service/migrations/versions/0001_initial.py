"""The schema when migrations were introduced: trains, journal, estimates, alerts, keys.

Revision ID: 0001
Revises: (none)

A database made before migrations existed has exactly these tables (the store
created them from the same definition) and is stamped with this revision.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Create every table and index of the first schema."""
    op.create_table(
        "api_keys",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=128), nullable=False),
        sa.Column("role", sa.String(length=32), nullable=False),
        sa.Column("key_hash", sa.String(length=128), nullable=False),
        sa.Column("created_at", sa.Double(), nullable=False),
        sa.Column("revoked_at", sa.Double(), nullable=True),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("key_hash"),
    )
    op.create_table(
        "trains",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("title", sa.Text(), nullable=False),
        sa.Column("created_at", sa.Double(), nullable=False),
        sa.Column("retired_at", sa.Double(), nullable=True),
        sa.Column("current_version", sa.Integer(), nullable=False),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("name"),
    )
    op.create_table(
        "alert_events",
        sa.Column("train_id", sa.Integer(), nullable=False),
        sa.Column("seq", sa.BigInteger(), autoincrement=False, nullable=False),
        sa.Column("alert_id", sa.String(length=400), nullable=False),
        sa.Column("rule", sa.String(length=64), nullable=False),
        sa.Column("subject", sa.String(length=256), nullable=False),
        sa.Column("priority", sa.String(length=16), nullable=False),
        sa.Column("time", sa.Double(), nullable=False),
        sa.Column("from_state", sa.String(length=32), nullable=False),
        sa.Column("to_state", sa.String(length=32), nullable=False),
        sa.Column("who", sa.String(length=128), nullable=False),
        sa.Column("why", sa.Text(), nullable=False),
        sa.Column("figure", sa.Double(), nullable=True),
        sa.Column("threshold", sa.Double(), nullable=True),
        sa.Column("unit", sa.String(length=64), nullable=False),
        sa.Column("message", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(
            ["train_id"],
            ["trains.id"],
        ),
        sa.PrimaryKeyConstraint("train_id", "seq"),
    )
    with op.batch_alter_table("alert_events", schema=None) as batch_op:
        batch_op.create_index(
            "ix_alert_events_train_alert", ["train_id", "alert_id", "seq"], unique=False
        )
        batch_op.create_index("ix_alert_events_train_time", ["train_id", "time"], unique=False)

    op.create_table(
        "checkpoints",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("train_id", sa.Integer(), nullable=False),
        sa.Column("journal_seq", sa.BigInteger(), nullable=False),
        sa.Column("created_at", sa.Double(), nullable=False),
        sa.Column("data", sa.LargeBinary(), nullable=False),
        sa.ForeignKeyConstraint(
            ["train_id"],
            ["trains.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("checkpoints", schema=None) as batch_op:
        batch_op.create_index("ix_checkpoints_train_seq", ["train_id", "journal_seq"], unique=False)

    op.create_table(
        "estimates",
        sa.Column("train_id", sa.Integer(), nullable=False),
        sa.Column("time", sa.Double(), nullable=False),
        sa.Column("payload", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(
            ["train_id"],
            ["trains.id"],
        ),
        sa.PrimaryKeyConstraint("train_id", "time"),
    )
    op.create_table(
        "gated_readings",
        sa.Column(
            "id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("train_id", sa.Integer(), nullable=False),
        sa.Column("tag", sa.String(length=256), nullable=False),
        sa.Column("time", sa.Double(), nullable=False),
        sa.Column("sample_time", sa.Double(), nullable=False),
        sa.Column("value", sa.Double(), nullable=False),
        sa.Column("predicted", sa.Double(), nullable=False),
        sa.Column("unit", sa.String(length=64), nullable=False),
        sa.Column("nis", sa.Double(), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("decision", sa.String(length=8), nullable=False),
        sa.CheckConstraint("decision IN ('gated', 'step')", name="ck_gated_decision"),
        sa.ForeignKeyConstraint(
            ["train_id"],
            ["trains.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint(
            "train_id", "tag", "sample_time", "value", name="uq_gated_train_tag_sample_value"
        ),
    )
    with op.batch_alter_table("gated_readings", schema=None) as batch_op:
        batch_op.create_index(
            "ix_gated_train_sample_time", ["train_id", "sample_time"], unique=False
        )

    op.create_table(
        "readings",
        sa.Column(
            "id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("train_id", sa.Integer(), nullable=False),
        sa.Column("tag", sa.String(length=256), nullable=False),
        sa.Column("time", sa.Double(), nullable=False),
        sa.Column("value", sa.Double(), nullable=False),
        sa.Column("quality", sa.SmallInteger(), nullable=True),
        sa.Column("received_at", sa.Double(), nullable=False),
        sa.ForeignKeyConstraint(
            ["train_id"],
            ["trains.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("train_id", "tag", "time", name="uq_readings_train_tag_time"),
        sqlite_autoincrement=True,
    )
    with op.batch_alter_table("readings", schema=None) as batch_op:
        batch_op.create_index("ix_readings_train_journal", ["train_id", "id"], unique=False)

    op.create_table(
        "train_versions",
        sa.Column("train_id", sa.Integer(), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("config_json", sa.Text(), nullable=False),
        sa.Column("source_text", sa.Text(), nullable=False),
        sa.Column("created_at", sa.Double(), nullable=False),
        sa.ForeignKeyConstraint(
            ["train_id"],
            ["trains.id"],
        ),
        sa.PrimaryKeyConstraint("train_id", "version"),
    )


def downgrade() -> None:
    """Drop every table: an empty database."""
    op.drop_table("train_versions")
    with op.batch_alter_table("readings", schema=None) as batch_op:
        batch_op.drop_index("ix_readings_train_journal")

    op.drop_table("readings")
    with op.batch_alter_table("gated_readings", schema=None) as batch_op:
        batch_op.drop_index("ix_gated_train_sample_time")

    op.drop_table("gated_readings")
    op.drop_table("estimates")
    with op.batch_alter_table("checkpoints", schema=None) as batch_op:
        batch_op.drop_index("ix_checkpoints_train_seq")

    op.drop_table("checkpoints")
    with op.batch_alter_table("alert_events", schema=None) as batch_op:
        batch_op.drop_index("ix_alert_events_train_time")
        batch_op.drop_index("ix_alert_events_train_alert")

    op.drop_table("alert_events")
    op.drop_table("trains")
    op.drop_table("api_keys")
