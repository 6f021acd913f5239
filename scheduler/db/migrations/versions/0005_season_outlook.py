"""season outlook: the stored result of `season simulate --store`

Revision ID: season_outlook
Revises: 0004
Create Date: 2026-12-02
"""
from alembic import op
import sqlalchemy as sa


revision = 'season_outlook'
down_revision = '0004'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('season_outlook',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('computed_at', sa.DateTime(), nullable=False),
    sa.Column('season_from', sa.Date(), nullable=False),
    sa.Column('season_to', sa.Date(), nullable=False),
    sa.Column('realizations', sa.Integer(), nullable=False),
    sa.Column('seed', sa.Integer(), nullable=False),
    sa.Column('effort', sa.Integer(), nullable=False),
    sa.Column('weather', sa.String(length=200), nullable=False),
    sa.Column('request_id', sa.Integer(), nullable=True),
    sa.Column('program_id', sa.Integer(), nullable=True),
    sa.Column('p_complete', sa.Float(), nullable=True),
    sa.Column('completion_mean', sa.Float(), nullable=True),
    sa.Column('completion_p10', sa.Float(), nullable=True),
    sa.Column('completion_p90', sa.Float(), nullable=True),
    sa.Column('charged_h_mean', sa.Float(), nullable=True),
    sa.ForeignKeyConstraint(['program_id'], ['program.id'], name=op.f('fk_season_outlook_program_id_program')),
    sa.ForeignKeyConstraint(['request_id'], ['request.id'], name=op.f('fk_season_outlook_request_id_request')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_season_outlook'))
    )
    op.create_index('ix_season_outlook_program', 'season_outlook', ['program_id', 'computed_at'], unique=False)
    op.create_index('ix_season_outlook_request', 'season_outlook', ['request_id', 'computed_at'], unique=False)


def downgrade() -> None:
    op.drop_index('ix_season_outlook_request', table_name='season_outlook')
    op.drop_index('ix_season_outlook_program', table_name='season_outlook')
    op.drop_table('season_outlook')
