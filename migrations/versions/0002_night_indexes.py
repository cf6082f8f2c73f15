"""indexes for a night's notices and forecasts, and a block's notices

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02 01:05:00

A season of nights for thousands of blocks makes these tables large; the runs
read a night's notices of a farm (delivery) and a night's forecasts (farm
summaries, the morning check), and deleting a block looks up its notices.
"""

from alembic import op

revision = '0002'
down_revision = '0001'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_index('ix_notices_night_farm_kind', 'notices', ['night', 'farm_id', 'kind'], unique=False)
    op.create_index('ix_notices_block_id', 'notices', ['block_id'], unique=False)
    op.create_index('ix_forecasts_night_kind_revision', 'forecasts', ['night', 'kind', 'revision'], unique=False)


def downgrade() -> None:
    op.drop_index('ix_forecasts_night_kind_revision', table_name='forecasts')
    op.drop_index('ix_notices_block_id', table_name='notices')
    op.drop_index('ix_notices_night_farm_kind', table_name='notices')
