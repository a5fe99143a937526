"""Method comparisons: one row per comparison job on a readout (numbered per experiment)

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-03
"""

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "comparisons",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("experiment_id", sa.Integer(), nullable=False),
        sa.Column("number", sa.Integer(), nullable=False),
        sa.Column("readout_id", sa.Integer(), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=True),
        sa.Column("spec", sa.JSON(), nullable=False),
        sa.Column("status", sa.String(length=20), nullable=False),
        sa.Column("job_id", sa.String(length=36), nullable=False),
        sa.Column("result", sa.JSON(), nullable=True),
        sa.Column("created_at", sa.String(length=40), nullable=False),
        sa.Column("created_by", sa.String(length=100), nullable=False),
        sa.ForeignKeyConstraint(
            ["experiment_id"],
            ["experiments.id"],
            name=op.f("fk_comparisons_experiment_id_experiments"),
        ),
        sa.ForeignKeyConstraint(["job_id"], ["jobs.id"], name=op.f("fk_comparisons_job_id_jobs")),
        sa.ForeignKeyConstraint(
            ["model_id"], ["cohort_models.id"], name=op.f("fk_comparisons_model_id_cohort_models")
        ),
        sa.ForeignKeyConstraint(
            ["readout_id"], ["readouts.id"], name=op.f("fk_comparisons_readout_id_readouts")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_comparisons")),
        sa.UniqueConstraint("experiment_id", "number", name="uq_comparisons_experiment_number"),
    )
    with op.batch_alter_table("comparisons", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_comparisons_experiment_id"), ["experiment_id"], unique=False
        )


def downgrade() -> None:
    with op.batch_alter_table("comparisons", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_comparisons_experiment_id"))
    op.drop_table("comparisons")
