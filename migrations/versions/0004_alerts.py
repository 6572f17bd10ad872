"""alerts: lifecycle, events, hysteresis counters and the delivery outbox

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "alerts",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("rule", sa.String(length=100), nullable=False),
        sa.Column("slice", sa.String(length=600), nullable=False),
        sa.Column("version", sa.String(length=64), nullable=True),
        sa.Column("window_name", sa.String(length=32), nullable=True),
        sa.Column("severity", sa.String(length=16), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("open_key", sa.String(length=800), nullable=True),
        sa.Column("raised_at_us", sa.BigInteger(), nullable=False),
        sa.Column("since_us", sa.BigInteger(), nullable=False),
        sa.Column("acknowledged_by", sa.String(length=200), nullable=True),
        sa.Column("shelved_until_us", sa.BigInteger(), nullable=True),
        sa.Column("cleared_at_us", sa.BigInteger(), nullable=True),
        sa.Column("detail", sa.Text(), nullable=False),
        sa.Column("sinks", sa.JSON(), nullable=False),
        sa.Column("link", sa.String(length=1000), nullable=False),
        sa.CheckConstraint(
            "state IN ('active', 'acknowledged', 'shelved', 'cleared')",
            name=op.f("ck_alerts_state"),
        ),
        sa.ForeignKeyConstraint(
            ["model_id"], ["monitored_models.id"], name=op.f("fk_alerts_model_id_monitored_models")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_alerts")),
        sa.UniqueConstraint("open_key", name=op.f("uq_alerts_open_key")),
    )
    with op.batch_alter_table("alerts", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_alerts_model_id_state"), ["model_id", "state"], unique=False
        )
        batch_op.create_index(batch_op.f("ix_alerts_state"), ["state"], unique=False)

    op.create_table(
        "alert_events",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("alert_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("event_id", sa.String(length=64), nullable=False),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column("from_state", sa.String(length=16), nullable=True),
        sa.Column("to_state", sa.String(length=16), nullable=False),
        sa.Column(
            "evaluation_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=True
        ),
        sa.Column("actor", sa.String(length=200), nullable=True),
        sa.Column("at_us", sa.BigInteger(), nullable=False),
        sa.Column("payload", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(
            ["alert_id"], ["alerts.id"], name=op.f("fk_alert_events_alert_id_alerts")
        ),
        sa.ForeignKeyConstraint(
            ["evaluation_id"],
            ["evaluations.id"],
            name=op.f("fk_alert_events_evaluation_id_evaluations"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_alert_events")),
        sa.UniqueConstraint("event_id", name=op.f("uq_alert_events_event_id")),
    )
    with op.batch_alter_table("alert_events", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_alert_events_alert_id"), ["alert_id"], unique=False)

    op.create_table(
        "alert_tracks",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("rule", sa.String(length=100), nullable=False),
        sa.Column("slice", sa.String(length=600), nullable=False),
        sa.Column("hold", sa.Integer(), nullable=False),
        sa.Column("calm", sa.Integer(), nullable=False),
        sa.Column("holding", sa.Boolean(), nullable=False),
        sa.Column(
            "evaluation_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=True
        ),
        sa.Column("as_of_us", sa.BigInteger(), nullable=False),
        sa.ForeignKeyConstraint(
            ["evaluation_id"],
            ["evaluations.id"],
            name=op.f("fk_alert_tracks_evaluation_id_evaluations"),
        ),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["monitored_models.id"],
            name=op.f("fk_alert_tracks_model_id_monitored_models"),
        ),
        sa.PrimaryKeyConstraint("model_id", "rule", "slice", name=op.f("pk_alert_tracks")),
    )
    op.create_table(
        "deliveries",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column(
            "alert_event_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False
        ),
        sa.Column("sink", sa.String(length=100), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("next_attempt_us", sa.BigInteger(), nullable=False),
        sa.Column("created_at_us", sa.BigInteger(), nullable=False),
        sa.Column("first_attempt_us", sa.BigInteger(), nullable=True),
        sa.Column("last_attempt_us", sa.BigInteger(), nullable=True),
        sa.Column("finished_at_us", sa.BigInteger(), nullable=True),
        sa.Column("last_error", sa.String(length=1000), nullable=True),
        sa.Column("claimed_by", sa.String(length=200), nullable=True),
        sa.Column("claimed_until_us", sa.BigInteger(), nullable=True),
        sa.CheckConstraint(
            "state IN ('pending', 'delivered', 'failed')", name=op.f("ck_deliveries_state")
        ),
        sa.ForeignKeyConstraint(
            ["alert_event_id"],
            ["alert_events.id"],
            name=op.f("fk_deliveries_alert_event_id_alert_events"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_deliveries")),
        sa.UniqueConstraint(
            "alert_event_id", "sink", name=op.f("uq_deliveries_alert_event_id_sink")
        ),
    )
    with op.batch_alter_table("deliveries", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_deliveries_state_next_attempt_us"),
            ["state", "next_attempt_us"],
            unique=False,
        )


def downgrade() -> None:
    with op.batch_alter_table("deliveries", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_deliveries_state_next_attempt_us"))

    op.drop_table("deliveries")
    op.drop_table("alert_tracks")
    with op.batch_alter_table("alert_events", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_alert_events_alert_id"))

    op.drop_table("alert_events")
    with op.batch_alter_table("alerts", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_alerts_state"))
        batch_op.drop_index(batch_op.f("ix_alerts_model_id_state"))

    op.drop_table("alerts")
