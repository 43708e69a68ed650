"""observation.quality: the sample-quality remark a lab sent (haemolysed, ...)

Revision ID: 0002_result_quality
Revises: 0001
Create Date: 2026-12-02
"""
import sqlalchemy as sa
from alembic import op

revision = '0002_result_quality'
down_revision = '0001'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.add_column(sa.Column('quality', sa.String(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.drop_column('quality')
