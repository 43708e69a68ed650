"""flag paging state: when the paged priority began, what the responder topic last carried

Revision ID: 0003_flag_paging_state
Revises: 0002_result_quality
Create Date: 2026-12-03
"""
import sqlalchemy as sa
from alembic import op

revision = '0003_flag_paging_state'
down_revision = '0002_result_quality'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('flag', schema=None) as batch_op:
        batch_op.add_column(sa.Column('priority_since', sa.DateTime(timezone=True), nullable=True))
        batch_op.add_column(sa.Column('alerted_priority', sa.String(), nullable=True))
        batch_op.add_column(sa.Column('alerted_measure', sa.Float(), nullable=True))
    # A Flag raised before this revision: its priority is taken to have begun when it was raised, so
    # acknowledgements already made keep covering it. Nothing is recorded as paged on the responder
    # topic, so its next version pages there.
    op.execute("UPDATE flag SET priority_since = raised_at")
    with op.batch_alter_table('flag', schema=None) as batch_op:
        batch_op.alter_column('priority_since', existing_type=sa.DateTime(timezone=True), nullable=False)


def downgrade() -> None:
    with op.batch_alter_table('flag', schema=None) as batch_op:
        batch_op.drop_column('alerted_measure')
        batch_op.drop_column('alerted_priority')
        batch_op.drop_column('priority_since')
