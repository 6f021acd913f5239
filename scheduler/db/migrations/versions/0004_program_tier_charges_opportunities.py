"""program tier, hours charged per outcome, value factors per plan entry, opportunities cache

Revision ID: 0004
Revises: 0003
Create Date: 2027-01-12

A program gets a tier (1 = most important; existing programs: 2, the default). An outcome
records how it was charged (``none`` or ``program``) and the hours charged; existing outcomes
are charged here by the rule as it is at this revision (scheduler/model/charging.py): done =
the plan entry's start to end plus its transition (the request's exposure without an entry),
partial = the exposure achieved, failed = nothing. A plan entry keeps the factors of its value
(tier, urgency, remaining opportunities, balance); older entries read as tier 2, urgency 1,
balance 1, opportunities unknown. The ``opportunity`` table caches the multi-night count.
"""
from alembic import op
import sqlalchemy as sa


revision = '0004'
down_revision = '0003'
branch_labels = None
depends_on = None


def _backfill_charges() -> None:
    conn = op.get_bind()
    outcome = sa.table('outcome', sa.column('id', sa.Integer), sa.column('request_id', sa.Integer),
                       sa.column('plan_entry_id', sa.Integer), sa.column('result', sa.String),
                       sa.column('exposure_s', sa.Float), sa.column('charge', sa.String),
                       sa.column('charged_h', sa.Float))
    request = sa.table('request', sa.column('id', sa.Integer), sa.column('exposure_s', sa.Float))
    entry = sa.table('plan_entry', sa.column('id', sa.Integer), sa.column('start', sa.DateTime),
                     sa.column('end', sa.DateTime), sa.column('transition_s', sa.Float))
    q = (sa.select(outcome.c.id, outcome.c.result, outcome.c.exposure_s, request.c.exposure_s,
                   entry.c.start, entry.c.end, entry.c.transition_s)
         .join(request, request.c.id == outcome.c.request_id)
         .outerjoin(entry, entry.c.id == outcome.c.plan_entry_id))
    for oid, result, achieved, req_exposure, start, end, transition in conn.execute(q).all():
        if result == 'done':
            seconds = ((end - start).total_seconds() + (transition or 0.0)) if start is not None else (req_exposure or 0.0)
            charge = 'program'
        elif result == 'partial':
            seconds, charge = achieved or 0.0, 'program'
        else:
            seconds, charge = 0.0, 'none'
        conn.execute(outcome.update().where(outcome.c.id == oid)
                     .values(charge=charge, charged_h=max(0.0, seconds) / 3600.0))


def upgrade() -> None:
    with op.batch_alter_table('program', schema=None) as batch_op:
        batch_op.add_column(sa.Column('tier', sa.Integer(), server_default='2', nullable=False))
    with op.batch_alter_table('outcome', schema=None) as batch_op:
        batch_op.add_column(sa.Column('charge', sa.String(length=16), server_default='program', nullable=False))
        batch_op.add_column(sa.Column('charged_h', sa.Float(), server_default='0', nullable=False))
    with op.batch_alter_table('plan_entry', schema=None) as batch_op:
        batch_op.add_column(sa.Column('tier', sa.Integer(), server_default='2', nullable=False))
        batch_op.add_column(sa.Column('urgency', sa.Float(), server_default='1', nullable=False))
        batch_op.add_column(sa.Column('opportunities_left', sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column('balance', sa.Float(), server_default='1', nullable=False))
    op.create_table(
        'opportunity',
        sa.Column('config_key', sa.String(length=16), nullable=False),
        sa.Column('request_key', sa.String(length=16), nullable=False),
        sa.Column('night', sa.Date(), nullable=False),
        sa.Column('feasible', sa.Boolean(), nullable=False),
        sa.PrimaryKeyConstraint('config_key', 'request_key', 'night', name=op.f('pk_opportunity')),
    )
    _backfill_charges()


def downgrade() -> None:
    op.drop_table('opportunity')
    with op.batch_alter_table('plan_entry', schema=None) as batch_op:
        batch_op.drop_column('balance')
        batch_op.drop_column('opportunities_left')
        batch_op.drop_column('urgency')
        batch_op.drop_column('tier')
    with op.batch_alter_table('outcome', schema=None) as batch_op:
        batch_op.drop_column('charged_h')
        batch_op.drop_column('charge')
    with op.batch_alter_table('program', schema=None) as batch_op:
        batch_op.drop_column('tier')
