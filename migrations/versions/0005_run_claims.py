"""Run claims: each planned run claimed by one of the hosts serving one database

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-03 12:11:58.419711
"""

import sqlalchemy as sa
from alembic import op

import advisory.store.schema

revision = '0005'
down_revision = '0004'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('run_claims',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('key', sa.String(length=300), nullable=False),
    sa.Column('kind', sa.String(length=20), nullable=False),
    sa.Column('night', sa.Date(), nullable=False),
    sa.Column('run_at', advisory.store.schema.UTCDateTime(), nullable=False),
    sa.Column('due_at', advisory.store.schema.UTCDateTime(), nullable=False),
    sa.Column('block_ids', sa.JSON(), nullable=False),
    sa.Column('state', sa.String(length=12), nullable=False),
    sa.Column('host', sa.String(length=200), nullable=True),
    sa.Column('heartbeat_at', advisory.store.schema.UTCDateTime(), nullable=True),
    sa.Column('attempts', sa.Integer(), nullable=False),
    sa.Column('finished_at', advisory.store.schema.UTCDateTime(), nullable=True),
    sa.Column('error', sa.Text(), nullable=True),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_run_claims')),
    sa.UniqueConstraint('key', name=op.f('uq_run_claims_key'))
    )
    with op.batch_alter_table('run_claims', schema=None) as batch_op:
        batch_op.create_index('ix_run_claims_state_due', ['state', 'due_at'], unique=False)



def downgrade() -> None:
    with op.batch_alter_table('run_claims', schema=None) as batch_op:
        batch_op.drop_index('ix_run_claims_state_due')

    op.drop_table('run_claims')
