"""night outlooks: the hourly sky cover, wind and temperature forecast for a station's night

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-03 11:09:48
"""

import sqlalchemy as sa
from alembic import op

import advisory.store.schema

revision = '0003'
down_revision = '0002'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('night_outlooks',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('station_id', sa.Integer(), nullable=False),
    sa.Column('valid_time', advisory.store.schema.UTCDateTime(), nullable=False),
    sa.Column('sky_cover_pct', sa.Float(), nullable=True),
    sa.Column('wind_speed_ms', sa.Float(), nullable=True),
    sa.Column('air_temp_c', sa.Float(), nullable=True),
    sa.Column('imported_at', advisory.store.schema.UTCDateTime(), nullable=False),
    sa.ForeignKeyConstraint(['station_id'], ['stations.id'], name=op.f('fk_night_outlooks_station_id_stations'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_night_outlooks')),
    sa.UniqueConstraint('station_id', 'valid_time', name=op.f('uq_night_outlooks_station_id'))
    )
    with op.batch_alter_table('night_outlooks', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_night_outlooks_station_id'), ['station_id'], unique=False)



def downgrade() -> None:
    with op.batch_alter_table('night_outlooks', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_night_outlooks_station_id'))

    op.drop_table('night_outlooks')
