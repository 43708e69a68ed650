"""initial schema

Revision ID: 0001
Revises: 
Create Date: 2026-12-02
"""
import sqlalchemy as sa
from alembic import op

revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    
    op.create_table('api_token',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('client', sa.String(length=64), nullable=False),
    sa.Column('scope', sa.String(), nullable=False),
    sa.Column('token_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('revoked_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('last_used_at', sa.DateTime(timezone=True), nullable=True),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('token_hash', name='uq_api_token_hash')
    )
    with op.batch_alter_table('api_token', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_api_token_client'), ['client'], unique=False)

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

    op.create_table('delivery_attempt',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('event_id', sa.Integer(), nullable=False),
    sa.Column('subscription_id', sa.String(), nullable=False),
    sa.Column('at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('ok', sa.Boolean(), nullable=False),
    sa.Column('status_code', sa.Integer(), nullable=True),
    sa.Column('error', sa.String(), nullable=True),
    sa.Column('elapsed_ms', sa.Integer(), nullable=False),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('delivery_attempt', schema=None) as batch_op:
        batch_op.create_index('ix_delivery_attempt_event', ['event_id'], unique=False)

    op.create_table('fhir_version',
    sa.Column('resource_type', sa.String(), nullable=False),
    sa.Column('id', sa.String(), nullable=False),
    sa.Column('version_id', sa.Integer(), nullable=False),
    sa.Column('last_updated', sa.DateTime(timezone=True), nullable=False),
    sa.Column('request_id', sa.Integer(), nullable=True),
    sa.Column('resource', sa.LargeBinary(), nullable=False),
    sa.PrimaryKeyConstraint('resource_type', 'id', 'version_id')
    )
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
    sa.Column('raised_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('version_id', sa.Integer(), nullable=False),
    sa.Column('last_updated', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('patient_key', 'rule', 'episode', name='uq_flag_episode')
    )
    with op.batch_alter_table('flag', schema=None) as batch_op:
        batch_op.create_index('ix_flag_last_updated', ['last_updated'], unique=False)
        batch_op.create_index('ix_flag_patient_status', ['patient_key', 'status'], unique=False)

    op.create_table('flag_ack',
    sa.Column('id', sa.String(), nullable=False),
    sa.Column('flag_id', sa.String(), nullable=False),
    sa.Column('flag_version', sa.Integer(), nullable=False),
    sa.Column('acknowledged_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('client', sa.String(), nullable=False),
    sa.Column('note', sa.String(), nullable=True),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('flag_ack', schema=None) as batch_op:
        batch_op.create_index('ix_flag_ack_flag', ['flag_id', 'acknowledged_at'], unique=False)

    op.create_table('flag_escalation',
    sa.Column('id', sa.String(), nullable=False),
    sa.Column('flag_id', sa.String(), nullable=False),
    sa.Column('round', sa.Integer(), nullable=False),
    sa.Column('escalated_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('flag_id', 'round', name='uq_escalation_round')
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
    op.create_table('subscription',
    sa.Column('id', sa.String(), nullable=False),
    sa.Column('status', sa.String(), nullable=False),
    sa.Column('topic', sa.String(), nullable=False),
    sa.Column('resource', sa.LargeBinary(), nullable=False),
    sa.Column('events_since_start', sa.Integer(), nullable=False),
    sa.Column('error', sa.String(), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('last_sent_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('version_id', sa.Integer(), nullable=False),
    sa.Column('last_updated', sa.DateTime(timezone=True), nullable=False),
    sa.Column('lease_owner', sa.String(), nullable=True),
    sa.Column('lease_until', sa.DateTime(timezone=True), nullable=True),
    sa.PrimaryKeyConstraint('id')
    )
    op.create_table('subscription_event',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('subscription_id', sa.String(), nullable=False),
    sa.Column('number', sa.Integer(), nullable=True),
    sa.Column('kind', sa.String(), nullable=False),
    sa.Column('focus_id', sa.String(), nullable=True),
    sa.Column('focus_version', sa.Integer(), nullable=True),
    sa.Column('interaction', sa.String(), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('status', sa.String(), nullable=False),
    sa.Column('attempts', sa.Integer(), nullable=False),
    sa.Column('next_attempt_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('sent_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('last_error', sa.String(), nullable=True),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('subscription_id', 'number', name='uq_subscription_event_number')
    )
    with op.batch_alter_table('subscription_event', schema=None) as batch_op:
        batch_op.create_index('ix_subscription_event_pending', ['status', 'subscription_id', 'id'], unique=False)

    


def downgrade() -> None:
    
    with op.batch_alter_table('subscription_event', schema=None) as batch_op:
        batch_op.drop_index('ix_subscription_event_pending')

    op.drop_table('subscription_event')
    op.drop_table('subscription')
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
    op.drop_table('flag_escalation')
    with op.batch_alter_table('flag_ack', schema=None) as batch_op:
        batch_op.drop_index('ix_flag_ack_flag')

    op.drop_table('flag_ack')
    with op.batch_alter_table('flag', schema=None) as batch_op:
        batch_op.drop_index('ix_flag_patient_status')
        batch_op.drop_index('ix_flag_last_updated')

    op.drop_table('flag')
    op.drop_table('fhir_version')
    with op.batch_alter_table('delivery_attempt', schema=None) as batch_op:
        batch_op.drop_index('ix_delivery_attempt_event')

    op.drop_table('delivery_attempt')
    with op.batch_alter_table('audit_event', schema=None) as batch_op:
        batch_op.drop_index('ix_audit_recorded')
        batch_op.drop_index('ix_audit_patient')
        batch_op.drop_index('ix_audit_client')

    op.drop_table('audit_event')
    with op.batch_alter_table('api_token', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_api_token_client'))

    op.drop_table('api_token')
    
