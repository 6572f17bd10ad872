"""evidence streams, their cursor and resets; baselines

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def _model_fk(table: str) -> sa.ForeignKeyConstraint:
    return sa.ForeignKeyConstraint(
        ["model_id"], ["monitored_models.id"], name=op.f(f"fk_{table}_model_id_monitored_models")
    )


def upgrade() -> None:
    op.create_table(
        "baselines",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("version", sa.String(length=64), nullable=False),
        sa.Column("first_day", sa.Integer(), nullable=False),
        sa.Column("end_day", sa.Integer(), nullable=False),
        sa.Column("fixed_at_us", sa.BigInteger(), nullable=False),
        _model_fk("baselines"),
        sa.PrimaryKeyConstraint("model_id", "version", name=op.f("pk_baselines")),
    )
    op.create_table(
        "evidence_cursors",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("as_of_us", sa.BigInteger(), nullable=False),
        sa.Column("frontier_us", sa.BigInteger(), nullable=False),
        sa.Column("prediction_seq", sa.BigInteger(), nullable=False),
        sa.Column("outcome_seq", sa.BigInteger(), nullable=False),
        sa.Column("revision_seq", sa.BigInteger(), nullable=False),
        sa.Column("updated_at_us", sa.BigInteger(), nullable=False),
        _model_fk("evidence_cursors"),
        sa.PrimaryKeyConstraint("model_id", name=op.f("pk_evidence_cursors")),
    )
    op.create_table(
        "evidence_resets",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("reset_at_us", sa.BigInteger(), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("actor", sa.String(length=200), nullable=False),
        _model_fk("evidence_resets"),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_evidence_resets")),
    )
    with op.batch_alter_table("evidence_resets", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_evidence_resets_model_id_id"), ["model_id", "id"], unique=False
        )
    op.create_table(
        "evidence_streams",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("version", sa.String(length=64), nullable=False),
        sa.Column("slice", sa.String(length=600), nullable=False),
        sa.Column("started_at_us", sa.BigInteger(), nullable=False),
        sa.Column("since_frontier_us", sa.BigInteger(), nullable=False),
        sa.Column("since_prediction_seq", sa.BigInteger(), nullable=False),
        sa.Column("state", sa.LargeBinary(), nullable=False),
        sa.Column("cusum", sa.Text(), nullable=True),
        sa.Column("corrections", sa.BigInteger(), nullable=False),
        sa.Column("late_labels", sa.BigInteger(), nullable=False),
        sa.Column("last_predicted_at_us", sa.BigInteger(), nullable=False),
        sa.Column("updated_at_us", sa.BigInteger(), nullable=False),
        _model_fk("evidence_streams"),
        sa.PrimaryKeyConstraint("model_id", "version", "slice", name=op.f("pk_evidence_streams")),
    )


def downgrade() -> None:
    op.drop_table("evidence_streams")
    with op.batch_alter_table("evidence_resets", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_evidence_resets_model_id_id"))
    op.drop_table("evidence_resets")
    op.drop_table("evidence_cursors")
    op.drop_table("baselines")
