"""audit events

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02
"""
from alembic import op
import sqlalchemy as sa


revision = '0003'
down_revision = '0002'
branch_labels = None
depends_on = None


def upgrade() -> None:
    
    op.create_table('audit_event',
    sa.Column('id', sa.String(), nullable=False),
    sa.Column('recorded', sa.DateTime(timezone=True), nullable=False),
    sa.Column('subtype', sa.String(), nullable=False),
    sa.Column('client', sa.String(), nullable=False),
    sa.Column('patient_key', sa.String(), nullable=True),
    sa.Column('outcome', sa.String(), nullable=False),
    sa.Column('resource', sa.LargeBinary(), nullable=False),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('audit_event', schema=None) as batch_op:
        batch_op.create_index('ix_audit_client', ['client', 'recorded'], unique=False)
        batch_op.create_index('ix_audit_patient', ['patient_key', 'recorded'], unique=False)
        batch_op.create_index('ix_audit_recorded', ['recorded'], unique=False)

    


def downgrade() -> None:
    
    with op.batch_alter_table('audit_event', schema=None) as batch_op:
        batch_op.drop_index('ix_audit_recorded')
        batch_op.drop_index('ix_audit_patient')
        batch_op.drop_index('ix_audit_client')

    op.drop_table('audit_event')
    
