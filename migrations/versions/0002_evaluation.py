"""evaluation state

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "leases",
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("holder", sa.String(length=200), nullable=False),
        sa.Column("expires_at_us", sa.BigInteger(), nullable=False),
        sa.PrimaryKeyConstraint("name", name=op.f("pk_leases")),
    )
    op.create_table(
        "evaluation_cursors",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("as_of_us", sa.BigInteger(), nullable=False),
        sa.Column("prediction_seq", sa.BigInteger(), nullable=False),
        sa.Column("outcome_seq", sa.BigInteger(), nullable=False),
        sa.Column("revision_seq", sa.BigInteger(), nullable=False),
        sa.Column("updated_at_us", sa.BigInteger(), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["monitored_models.id"],
            name=op.f("fk_evaluation_cursors_model_id_monitored_models"),
        ),
        sa.PrimaryKeyConstraint("model_id", name=op.f("pk_evaluation_cursors")),
    )
    op.create_table(
        "evaluations",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("as_of_us", sa.BigInteger(), nullable=False),
        sa.Column("evaluated_at_us", sa.BigInteger(), nullable=False),
        sa.Column("health", sa.String(length=32), nullable=False),
        sa.Column("record", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["monitored_models.id"],
            name=op.f("fk_evaluations_model_id_monitored_models"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_evaluations")),
    )
    with op.batch_alter_table("evaluations", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_evaluations_model_id_as_of_us"), ["model_id", "as_of_us"], unique=False
        )

    op.create_table(
        "sketches",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("version", sa.String(length=64), nullable=False),
        sa.Column("day", sa.Integer(), nullable=False),
        sa.Column("slice", sa.String(length=600), nullable=False),
        sa.Column("matured", sa.BigInteger(), nullable=False),
        sa.Column("late", sa.BigInteger(), nullable=False),
        sa.Column("unlabelled", sa.BigInteger(), nullable=False),
        sa.Column("data", sa.LargeBinary(), nullable=False),
        sa.Column("updated_at_us", sa.BigInteger(), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["monitored_models.id"],
            name=op.f("fk_sketches_model_id_monitored_models"),
        ),
        sa.PrimaryKeyConstraint("model_id", "version", "day", "slice", name=op.f("pk_sketches")),
    )
    op.create_table(
        "slice_values",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("key", sa.String(length=64), nullable=False),
        sa.Column("value", sa.String(length=200), nullable=False),
        sa.Column("position", sa.Integer(), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["monitored_models.id"],
            name=op.f("fk_slice_values_model_id_monitored_models"),
        ),
        sa.PrimaryKeyConstraint("model_id", "key", "value", name=op.f("pk_slice_values")),
    )
    with op.batch_alter_table("outcomes", schema=None) as batch_op:
        batch_op.create_index("ix_outcomes_prediction_id", ["prediction_id"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("outcomes", schema=None) as batch_op:
        batch_op.drop_index("ix_outcomes_prediction_id")

    op.drop_table("slice_values")
    op.drop_table("sketches")
    with op.batch_alter_table("evaluations", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_evaluations_model_id_as_of_us"))

    op.drop_table("evaluations")
    op.drop_table("evaluation_cursors")
    op.drop_table("leases")
