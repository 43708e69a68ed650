"""flags

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02
"""
from alembic import op
import sqlalchemy as sa


revision = '0002'
down_revision = '0001'
branch_labels = None
depends_on = None


def upgrade() -> None:
    
    op.create_table('flag',
    sa.Column('id', sa.String(), nullable=False),
    sa.Column('patient_key', sa.String(), nullable=False),
    sa.Column('rule', sa.String(), nullable=False),
    sa.Column('episode', sa.String(), nullable=False),
    sa.Column('status', sa.String(), nullable=False),
    sa.Column('priority', sa.String(), nullable=False),
    sa.Column('period_start', sa.DateTime(timezone=True), nullable=False),
    sa.Column('period_end', sa.DateTime(timezone=True), nullable=True),
    sa.Column('evidence', sa.String(), nullable=False),
    sa.Column('numbers', sa.String(), nullable=False),
    sa.Column('sentence', sa.String(), nullable=False),
    sa.Column('encounter', sa.String(), nullable=True),
    sa.Column('policy_hash', sa.String(), nullable=False),
    sa.Column('version_id', sa.Integer(), nullable=False),
    sa.Column('last_updated', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('patient_key', 'rule', 'episode', name='uq_flag_episode')
    )
    with op.batch_alter_table('flag', schema=None) as batch_op:
        batch_op.create_index('ix_flag_last_updated', ['last_updated'], unique=False)
        batch_op.create_index('ix_flag_patient_status', ['patient_key', 'status'], unique=False)

    


def downgrade() -> None:
    
    with op.batch_alter_table('flag', schema=None) as batch_op:
        batch_op.drop_index('ix_flag_patient_status')
        batch_op.drop_index('ix_flag_last_updated')

    op.drop_table('flag')
    
