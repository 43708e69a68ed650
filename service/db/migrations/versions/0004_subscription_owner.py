"""subscription owner: the client that created each subscription

Revision ID: 0004_subscription_owner
Revises: 0003_flag_paging_state
Create Date: 2026-12-03

Existing rows keep a NULL owner: nobody knows who made them, so only a caller with lytestream/admin may
act on them (the owner may re-create theirs).
"""
import sqlalchemy as sa
from alembic import op

revision = '0004_subscription_owner'
down_revision = '0003_flag_paging_state'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('subscription', schema=None) as batch_op:
        batch_op.add_column(sa.Column('owner_client', sa.String(), nullable=True))
        batch_op.create_index(batch_op.f('ix_subscription_owner_client'), ['owner_client'], unique=False)


def downgrade() -> None:
    with op.batch_alter_table('subscription', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_subscription_owner_client'))
        batch_op.drop_column('owner_client')
