"""Key owners: api_keys.owner and plan_versions.author_owner (separation of duties by owner)

Existing keys get their name as owner and existing versions their author, which is what the
author rule compared before; give the people behind old keys real owners by issuing new keys.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-03
"""

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("api_keys", schema=None) as batch_op:
        batch_op.add_column(sa.Column("owner", sa.String(length=100), nullable=True))
    op.execute("UPDATE api_keys SET owner = name")
    with op.batch_alter_table("api_keys", schema=None) as batch_op:
        batch_op.alter_column("owner", existing_type=sa.String(length=100), nullable=False)
        batch_op.create_index(batch_op.f("ix_api_keys_owner"), ["owner"], unique=False)

    with op.batch_alter_table("plan_versions", schema=None) as batch_op:
        batch_op.add_column(sa.Column("author_owner", sa.String(length=100), nullable=True))
    op.execute("UPDATE plan_versions SET author_owner = author")
    with op.batch_alter_table("plan_versions", schema=None) as batch_op:
        batch_op.alter_column("author_owner", existing_type=sa.String(length=100), nullable=False)


def downgrade() -> None:
    with op.batch_alter_table("plan_versions", schema=None) as batch_op:
        batch_op.drop_column("author_owner")
    with op.batch_alter_table("api_keys", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_api_keys_owner"))
        batch_op.drop_column("owner")
