"""Web console: users, the farms given to an agent, and the audit trail of changes made there.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-03 11:29:41.783662
"""

import sqlalchemy as sa
from alembic import op

import advisory.store.schema

revision = '0004'
down_revision = '0003'
branch_labels = None
depends_on = None


def upgrade() -> None:

    op.create_table('web_users',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('username', sa.String(length=80), nullable=False),
    sa.Column('password_hash', sa.String(length=200), nullable=False),
    sa.Column('role', sa.String(length=10), nullable=False),
    sa.Column('all_farms', sa.Boolean(), nullable=False),
    sa.Column('farm_id', sa.Integer(), nullable=True),
    sa.Column('created_at', advisory.store.schema.UTCDateTime(), nullable=False),
    sa.ForeignKeyConstraint(['farm_id'], ['farms.id'], name=op.f('fk_web_users_farm_id_farms'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_web_users')),
    sa.UniqueConstraint('username', name=op.f('uq_web_users_username'))
    )
    op.create_table('web_user_farms',
    sa.Column('user_id', sa.Integer(), nullable=False),
    sa.Column('farm_id', sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(['farm_id'], ['farms.id'], name=op.f('fk_web_user_farms_farm_id_farms'), ondelete='CASCADE'),
    sa.ForeignKeyConstraint(['user_id'], ['web_users.id'], name=op.f('fk_web_user_farms_user_id_web_users'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('user_id', 'farm_id', name=op.f('pk_web_user_farms'))
    )
    op.create_table('audit_log',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('at', advisory.store.schema.UTCDateTime(), nullable=False),
    sa.Column('username', sa.String(length=80), nullable=False),
    sa.Column('farm_id', sa.Integer(), nullable=False),
    sa.Column('block_id', sa.Integer(), nullable=True),
    sa.Column('action', sa.String(length=20), nullable=False),
    sa.Column('summary', sa.Text(), nullable=False),
    sa.Column('detail', sa.JSON(), nullable=False),
    sa.ForeignKeyConstraint(['block_id'], ['blocks.id'], name=op.f('fk_audit_log_block_id_blocks'), ondelete='CASCADE'),
    sa.ForeignKeyConstraint(['farm_id'], ['farms.id'], name=op.f('fk_audit_log_farm_id_farms'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_audit_log'))
    )
    with op.batch_alter_table('audit_log', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_audit_log_block_id'), ['block_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_audit_log_farm_id'), ['farm_id'], unique=False)




def downgrade() -> None:

    with op.batch_alter_table('audit_log', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_audit_log_farm_id'))
        batch_op.drop_index(batch_op.f('ix_audit_log_block_id'))

    op.drop_table('audit_log')
    op.drop_table('web_user_farms')
    op.drop_table('web_users')

