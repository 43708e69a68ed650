"""initial schema

Revision ID: 0001
Revises: 
Create Date: 2026-12-02
"""
from alembic import op
import sqlalchemy as sa


revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    
    op.create_table('fhir_version',
    sa.Column('resource_type', sa.String(), nullable=False),
    sa.Column('id', sa.String(), nullable=False),
    sa.Column('version_id', sa.Integer(), nullable=False),
    sa.Column('last_updated', sa.DateTime(timezone=True), nullable=False),
    sa.Column('request_id', sa.Integer(), nullable=True),
    sa.Column('resource', sa.LargeBinary(), nullable=False),
    sa.PrimaryKeyConstraint('resource_type', 'id', 'version_id')
    )
    op.create_table('insulin_administration',
    sa.Column('id', sa.String(), nullable=False),
    sa.Column('identifier_system', sa.String(), nullable=False),
    sa.Column('identifier_value', sa.String(), nullable=False),
    sa.Column('patient_key', sa.String(), nullable=False),
    sa.Column('subject_reference', sa.String(), nullable=False),
    sa.Column('status', sa.String(), nullable=False),
    sa.Column('medication', sa.String(), nullable=False),
    sa.Column('route', sa.String(), nullable=True),
    sa.Column('start', sa.DateTime(timezone=True), nullable=False),
    sa.Column('end', sa.DateTime(timezone=True), nullable=True),
    sa.Column('version_id', sa.Integer(), nullable=False),
    sa.Column('last_updated', sa.DateTime(timezone=True), nullable=False),
    sa.Column('content_hash', sa.String(), nullable=False),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('identifier_system', 'identifier_value', name='uq_insulin_identifier')
    )
    with op.batch_alter_table('insulin_administration', schema=None) as batch_op:
        batch_op.create_index('ix_insulin_patient_start', ['patient_key', 'start'], unique=False)

    op.create_table('observation',
    sa.Column('id', sa.String(), nullable=False),
    sa.Column('identifier_system', sa.String(), nullable=False),
    sa.Column('identifier_value', sa.String(), nullable=False),
    sa.Column('patient_key', sa.String(), nullable=False),
    sa.Column('subject_reference', sa.String(), nullable=False),
    sa.Column('loinc', sa.String(), nullable=False),
    sa.Column('analyte', sa.String(), nullable=False),
    sa.Column('specimen', sa.String(), nullable=False),
    sa.Column('calculated', sa.Boolean(), nullable=False),
    sa.Column('status', sa.String(), nullable=False),
    sa.Column('value', sa.Float(), nullable=True),
    sa.Column('comparator', sa.String(), nullable=True),
    sa.Column('effective', sa.DateTime(timezone=True), nullable=False),
    sa.Column('issued', sa.DateTime(timezone=True), nullable=True),
    sa.Column('encounter', sa.String(), nullable=True),
    sa.Column('replaces', sa.String(), nullable=True),
    sa.Column('version_id', sa.Integer(), nullable=False),
    sa.Column('last_updated', sa.DateTime(timezone=True), nullable=False),
    sa.Column('content_hash', sa.String(), nullable=False),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('identifier_system', 'identifier_value', name='uq_observation_identifier')
    )
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_observation_loinc'), ['loinc'], unique=False)
        batch_op.create_index('ix_observation_patient_effective', ['patient_key', 'effective'], unique=False)

    op.create_table('patient_alias',
    sa.Column('alias', sa.String(), nullable=False),
    sa.Column('patient_key', sa.String(), nullable=False),
    sa.PrimaryKeyConstraint('alias')
    )
    with op.batch_alter_table('patient_alias', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_patient_alias_patient_key'), ['patient_key'], unique=False)

    op.create_table('received_request',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('received_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('interaction', sa.String(), nullable=False),
    sa.Column('body', sa.LargeBinary(), nullable=False),
    sa.PrimaryKeyConstraint('id')
    )
    


def downgrade() -> None:
    
    op.drop_table('received_request')
    with op.batch_alter_table('patient_alias', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_patient_alias_patient_key'))

    op.drop_table('patient_alias')
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.drop_index('ix_observation_patient_effective')
        batch_op.drop_index(batch_op.f('ix_observation_loinc'))

    op.drop_table('observation')
    with op.batch_alter_table('insulin_administration', schema=None) as batch_op:
        batch_op.drop_index('ix_insulin_patient_start')

    op.drop_table('insulin_administration')
    op.drop_table('fhir_version')
    
