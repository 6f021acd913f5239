"""moving targets, adaptive optics and dish physics: new request, conditions and plan-entry columns

Revision ID: 0003
Revises: 0002
Create Date: 2027-01-20

request: guide_star_sep_arcsec (AO guide-star distance), body (a planet or Pluto by name),
ephemeris_csv (the PI's ephemeris table, canonical CSV). conditions_sample: coherence_time_ms
(tau0 at 500 nm). plan_entry: ra_deg/dec_deg (position at the entry's start), strehl and
surface_efficiency (predicted at the start). All nullable: existing rows keep their meaning
(fixed targets, no coherence time, plans stored before these were predicted).
"""
from alembic import op
import sqlalchemy as sa


revision = '0003'
down_revision = '0002'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('request', schema=None) as batch_op:
        batch_op.add_column(sa.Column('guide_star_sep_arcsec', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('body', sa.String(length=16), nullable=True))
        batch_op.add_column(sa.Column('ephemeris_csv', sa.Text(), nullable=True))
    with op.batch_alter_table('conditions_sample', schema=None) as batch_op:
        batch_op.add_column(sa.Column('coherence_time_ms', sa.Float(), nullable=True))
    with op.batch_alter_table('plan_entry', schema=None) as batch_op:
        batch_op.add_column(sa.Column('ra_deg', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('dec_deg', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('strehl', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('surface_efficiency', sa.Float(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table('plan_entry', schema=None) as batch_op:
        batch_op.drop_column('surface_efficiency')
        batch_op.drop_column('strehl')
        batch_op.drop_column('dec_deg')
        batch_op.drop_column('ra_deg')
    with op.batch_alter_table('conditions_sample', schema=None) as batch_op:
        batch_op.drop_column('coherence_time_ms')
    with op.batch_alter_table('request', schema=None) as batch_op:
        batch_op.drop_column('ephemeris_csv')
        batch_op.drop_column('body')
        batch_op.drop_column('guide_star_sep_arcsec')
