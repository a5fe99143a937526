"""Cohort models, plan versions and pointers, activations, watch uploads

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01
"""

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "plan_activations",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("plan", sa.String(length=100), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("revision", sa.Integer(), nullable=False),
        sa.Column("kind", sa.String(length=20), nullable=False),
        sa.Column("actor", sa.String(length=100), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("at", sa.String(length=40), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_plan_activations")),
    )
    with op.batch_alter_table("plan_activations", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_plan_activations_plan"), ["plan"], unique=False)

    op.create_table(
        "plan_pointers",
        sa.Column("plan", sa.String(length=100), nullable=False),
        sa.Column("active_version", sa.Integer(), nullable=True),
        sa.Column("revision", sa.Integer(), nullable=False),
        sa.Column("updated_at", sa.String(length=40), nullable=False),
        sa.Column("auto_rollback", sa.JSON(), nullable=False),
        sa.PrimaryKeyConstraint("plan", name=op.f("pk_plan_pointers")),
    )
    op.create_table(
        "watch_uploads",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("plan", sa.String(length=100), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("seq", sa.Integer(), nullable=False),
        sa.Column("blob_sha256", sa.String(length=64), nullable=False),
        sa.Column("n_rows", sa.Integer(), nullable=False),
        sa.Column("result", sa.JSON(), nullable=False),
        sa.Column("created_at", sa.String(length=40), nullable=False),
        sa.Column("created_by", sa.String(length=100), nullable=False),
        sa.ForeignKeyConstraint(
            ["blob_sha256"], ["blobs.sha256"], name=op.f("fk_watch_uploads_blob_sha256_blobs")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_watch_uploads")),
        sa.UniqueConstraint("plan", "version", "seq", name="uq_watch_uploads_plan_version_seq"),
    )
    with op.batch_alter_table("watch_uploads", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_watch_uploads_plan"), ["plan"], unique=False)

    op.create_table(
        "cohort_models",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("experiment_id", sa.Integer(), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("readout_id", sa.Integer(), nullable=False),
        sa.Column("method", sa.String(length=40), nullable=False),
        sa.Column("params", sa.JSON(), nullable=False),
        sa.Column("status", sa.String(length=20), nullable=False),
        sa.Column("job_id", sa.String(length=36), nullable=False),
        sa.Column("result", sa.JSON(), nullable=True),
        sa.Column("created_at", sa.String(length=40), nullable=False),
        sa.Column("created_by", sa.String(length=100), nullable=False),
        sa.ForeignKeyConstraint(
            ["experiment_id"],
            ["experiments.id"],
            name=op.f("fk_cohort_models_experiment_id_experiments"),
        ),
        sa.ForeignKeyConstraint(["job_id"], ["jobs.id"], name=op.f("fk_cohort_models_job_id_jobs")),
        sa.ForeignKeyConstraint(
            ["readout_id"], ["readouts.id"], name=op.f("fk_cohort_models_readout_id_readouts")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_cohort_models")),
        sa.UniqueConstraint("experiment_id", "version", name="uq_cohort_models_experiment_version"),
    )
    with op.batch_alter_table("cohort_models", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_cohort_models_experiment_id"), ["experiment_id"], unique=False
        )

    op.create_table(
        "plan_versions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("plan", sa.String(length=100), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("status", sa.String(length=20), nullable=False),
        sa.Column("spec", sa.JSON(), nullable=False),
        sa.Column("allocation", sa.JSON(), nullable=False),
        sa.Column("report", sa.JSON(), nullable=False),
        sa.Column("salt", sa.String(length=64), nullable=False),
        sa.Column("content_hash", sa.String(length=64), nullable=False),
        sa.Column("author", sa.String(length=100), nullable=False),
        sa.Column("created_at", sa.String(length=40), nullable=False),
        sa.Column("decided_by", sa.String(length=100), nullable=True),
        sa.Column("decided_at", sa.String(length=40), nullable=True),
        sa.Column("decision_reason", sa.Text(), nullable=True),
        sa.ForeignKeyConstraint(
            ["model_id"], ["cohort_models.id"], name=op.f("fk_plan_versions_model_id_cohort_models")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_plan_versions")),
        sa.UniqueConstraint("plan", "version", name="uq_plan_versions_plan_version"),
    )
    with op.batch_alter_table("plan_versions", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_plan_versions_plan"), ["plan"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("plan_versions", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_plan_versions_plan"))
    op.drop_table("plan_versions")
    with op.batch_alter_table("cohort_models", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_cohort_models_experiment_id"))
    op.drop_table("cohort_models")
    with op.batch_alter_table("watch_uploads", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_watch_uploads_plan"))
    op.drop_table("watch_uploads")
    op.drop_table("plan_pointers")
    with op.batch_alter_table("plan_activations", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_plan_activations_plan"))
    op.drop_table("plan_activations")
