"""initial schema: models, predictions, outcomes, keys, tokens

Revision ID: 0001
Revises:
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "monitored_models",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column("classes", sa.JSON(), nullable=True),
        sa.Column("label_horizon", sa.String(length=32), nullable=False),
        sa.Column("label_horizon_s", sa.BigInteger(), nullable=False),
        sa.Column("missing_outcome", sa.String(length=16), nullable=False),
        sa.Column("segment_keys", sa.JSON(), nullable=False),
        sa.Column("crosses", sa.JSON(), nullable=False),
        sa.Column("windows", sa.JSON(), nullable=False),
        sa.Column("baseline", sa.JSON(), nullable=True),
        sa.Column("rules", sa.JSON(), nullable=True),
        sa.Column("description", sa.Text(), server_default="", nullable=False),
        sa.Column("created_at_us", sa.BigInteger(), nullable=False),
        sa.Column("updated_at_us", sa.BigInteger(), nullable=False),
        sa.Column("archived_at_us", sa.BigInteger(), nullable=True),
        sa.CheckConstraint(
            "kind IN ('binary', 'multiclass')", name=op.f("ck_monitored_models_kind")
        ),
        sa.CheckConstraint(
            "missing_outcome IN ('wait', 'negative')",
            name=op.f("ck_monitored_models_missing_outcome"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_monitored_models")),
        sa.UniqueConstraint("name", name=op.f("uq_monitored_models_name")),
    )
    op.create_table(
        "row_keys",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("kind", sa.String(length=1), nullable=False),
        sa.Column("id_hash", sa.BigInteger(), nullable=False),
        sa.Column("row_id", sa.BigInteger(), nullable=False),
        sa.PrimaryKeyConstraint("model_id", "kind", "id_hash", "row_id", name=op.f("pk_row_keys")),
        sqlite_with_rowid=False,
    )
    op.create_table(
        "row_keys_recent",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("kind", sa.String(length=1), nullable=False),
        sa.Column("id_hash", sa.BigInteger(), nullable=False),
        sa.Column("row_id", sa.BigInteger(), nullable=False),
        sa.PrimaryKeyConstraint(
            "model_id", "kind", "id_hash", "row_id", name=op.f("pk_row_keys_recent")
        ),
        sqlite_with_rowid=False,
    )
    op.create_table(
        "api_tokens",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("scope", sa.String(length=16), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=True),
        sa.Column("token_hash", sa.String(length=64), nullable=False),
        sa.Column("created_at_us", sa.BigInteger(), nullable=False),
        sa.Column("expires_at_us", sa.BigInteger(), nullable=True),
        sa.Column("revoked_at_us", sa.BigInteger(), nullable=True),
        sa.CheckConstraint(
            "scope IN ('admin', 'ingest', 'read')", name=op.f("ck_api_tokens_scope")
        ),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["monitored_models.id"],
            name=op.f("fk_api_tokens_model_id_monitored_models"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_api_tokens")),
        sa.UniqueConstraint("name", name=op.f("uq_api_tokens_name")),
        sa.UniqueConstraint("token_hash", name=op.f("uq_api_tokens_token_hash")),
    )
    op.create_table(
        "predictions",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("client_id", sa.String(length=200), nullable=False),
        sa.Column("predicted_at_us", sa.BigInteger(), nullable=False),
        sa.Column("probability", sa.Float(), nullable=True),
        sa.Column("probabilities", sa.Text(), nullable=True),
        sa.Column("version", sa.String(length=64), nullable=False),
        sa.Column("segments", sa.Text(), nullable=True),
        sa.Column("received_at_us", sa.BigInteger(), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["monitored_models.id"],
            name=op.f("fk_predictions_model_id_monitored_models"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_predictions")),
    )
    with op.batch_alter_table("predictions", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_predictions_model_id_predicted_at_us"),
            ["model_id", "predicted_at_us"],
            unique=False,
        )

    op.create_table(
        "outcomes",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("client_id", sa.String(length=200), nullable=False),
        sa.Column(
            "prediction_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=True
        ),
        sa.Column("outcome", sa.Integer(), nullable=False),
        sa.Column("observed_at_us", sa.BigInteger(), nullable=False),
        sa.Column("received_at_us", sa.BigInteger(), nullable=False),
        sa.Column("revision", sa.Integer(), server_default="0", nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["monitored_models.id"],
            name=op.f("fk_outcomes_model_id_monitored_models"),
        ),
        sa.ForeignKeyConstraint(
            ["prediction_id"],
            ["predictions.id"],
            name=op.f("fk_outcomes_prediction_id_predictions"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_outcomes")),
    )
    op.create_table(
        "outcome_revisions",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column(
            "outcome_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False
        ),
        sa.Column("outcome", sa.Integer(), nullable=False),
        sa.Column("observed_at_us", sa.BigInteger(), nullable=False),
        sa.Column("received_at_us", sa.BigInteger(), nullable=False),
        sa.Column("superseded_at_us", sa.BigInteger(), nullable=False),
        sa.ForeignKeyConstraint(
            ["outcome_id"], ["outcomes.id"], name=op.f("fk_outcome_revisions_outcome_id_outcomes")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_outcome_revisions")),
    )
    with op.batch_alter_table("outcome_revisions", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_outcome_revisions_outcome_id"), ["outcome_id"], unique=False
        )


def downgrade() -> None:
    with op.batch_alter_table("outcome_revisions", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_outcome_revisions_outcome_id"))

    op.drop_table("outcome_revisions")
    op.drop_table("outcomes")
    with op.batch_alter_table("predictions", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_predictions_model_id_predicted_at_us"))

    op.drop_table("predictions")
    op.drop_table("api_tokens")
    op.drop_table("row_keys_recent")
    op.drop_table("row_keys")
    op.drop_table("monitored_models")
