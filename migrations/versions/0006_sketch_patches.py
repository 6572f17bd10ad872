"""sketch patches: the changed bins of stored sketches

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "sketch_patches",
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
            name=op.f("fk_sketch_patches_model_id_monitored_models"),
        ),
        sa.PrimaryKeyConstraint(
            "model_id", "version", "day", "slice", name=op.f("pk_sketch_patches")
        ),
    )


def downgrade() -> None:
    op.drop_table("sketch_patches")
