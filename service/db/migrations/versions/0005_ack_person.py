"""ack person: the named person behind an acknowledgement, beside the token's client; and the value
and unit each result was sent in, so a Flag can say it as the lab did

Revision ID: 0005_ack_person
Revises: 0004_subscription_owner
Create Date: 2026-12-02

Existing acknowledgements keep a NULL person: they were made in the client's name only. Existing
results keep a NULL unit as sent: their Flags show the canonical value only.
"""
import sqlalchemy as sa
from alembic import op

revision = '0005_ack_person'
down_revision = '0004_subscription_owner'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('flag_ack', schema=None) as batch_op:
        batch_op.add_column(sa.Column('person', sa.String(), nullable=True))
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.add_column(sa.Column('sent_value', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('sent_unit', sa.String(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.drop_column('sent_unit')
        batch_op.drop_column('sent_value')
    with op.batch_alter_table('flag_ack', schema=None) as batch_op:
        batch_op.drop_column('person')
