"""initial schema

Revision ID: 0001
Revises: 
Create Date: 2026-12-01
"""
from alembic import op
import sqlalchemy as sa


revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('conditions_report',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('issued_at', sa.DateTime(), nullable=False),
    sa.Column('received_at', sa.DateTime(), nullable=False),
    sa.Column('source', sa.String(length=200), nullable=False),
    sa.Column('n_samples', sa.Integer(), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_conditions_report'))
    )
    op.create_table('program',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('code', sa.String(length=64), nullable=False),
    sa.Column('pi', sa.String(length=200), nullable=False),
    sa.Column('hours_allocated', sa.Float(), nullable=False),
    sa.Column('weight', sa.Float(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_program')),
    sa.UniqueConstraint('code', name=op.f('uq_program_code'))
    )
    op.create_table('service_lock',
    sa.Column('name', sa.String(length=32), nullable=False),
    sa.Column('holder', sa.String(length=200), nullable=False),
    sa.Column('pid', sa.Integer(), nullable=False),
    sa.Column('host', sa.String(length=200), nullable=False),
    sa.Column('started_at', sa.DateTime(), nullable=False),
    sa.Column('heartbeat_at', sa.DateTime(), nullable=False),
    sa.PrimaryKeyConstraint('name', name=op.f('pk_service_lock'))
    )
    op.create_table('conditions_sample',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('report_id', sa.Integer(), nullable=False),
    sa.Column('time', sa.DateTime(), nullable=False),
    sa.Column('seeing_arcsec', sa.Float(), nullable=True),
    sa.Column('pwv_mm', sa.Float(), nullable=True),
    sa.Column('cloud_mag', sa.Float(), nullable=True),
    sa.Column('wind_ms', sa.Float(), nullable=True),
    sa.Column('humidity_pct', sa.Float(), nullable=True),
    sa.Column('dome_open', sa.Boolean(), nullable=True),
    sa.ForeignKeyConstraint(['report_id'], ['conditions_report.id'], name=op.f('fk_conditions_sample_report_id_conditions_report')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_conditions_sample')),
    sa.UniqueConstraint('report_id', 'time', name='uq_conditions_sample_report_time')
    )
    op.create_table('plan',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('night', sa.Date(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('reason', sa.Text(), nullable=False),
    sa.Column('planned_from', sa.DateTime(), nullable=False),
    sa.Column('conditions_report_id', sa.Integer(), nullable=True),
    sa.Column('solver_status', sa.String(length=32), nullable=False),
    sa.Column('objective', sa.Float(), nullable=False),
    sa.Column('bound', sa.Float(), nullable=False),
    sa.Column('gap', sa.Float(), nullable=False),
    sa.Column('runtime_s', sa.Float(), nullable=False),
    sa.Column('greedy_objective', sa.Float(), nullable=True),
    sa.Column('active', sa.Boolean(), nullable=False),
    sa.Column('superseded_at', sa.DateTime(), nullable=True),
    sa.Column('previous_id', sa.Integer(), nullable=True),
    sa.Column('summary_json', sa.Text(), nullable=False),
    sa.Column('diff_json', sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(['conditions_report_id'], ['conditions_report.id'], name=op.f('fk_plan_conditions_report_id_conditions_report')),
    sa.ForeignKeyConstraint(['previous_id'], ['plan.id'], name=op.f('fk_plan_previous_id_plan')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_plan'))
    )
    with op.batch_alter_table('plan', schema=None) as batch_op:
        batch_op.create_index('ix_plan_night_active', ['night', 'active'], unique=False)

    op.create_table('request',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('program_id', sa.Integer(), nullable=False),
    sa.Column('target', sa.String(length=200), nullable=False),
    sa.Column('ra_deg', sa.Float(), nullable=False),
    sa.Column('dec_deg', sa.Float(), nullable=False),
    sa.Column('band', sa.String(length=16), nullable=False),
    sa.Column('instrument', sa.String(length=64), nullable=True),
    sa.Column('exposure_s', sa.Float(), nullable=False),
    sa.Column('repeats', sa.Integer(), nullable=False),
    sa.Column('min_spacing_s', sa.Float(), nullable=True),
    sa.Column('resolution_arcsec', sa.Float(), nullable=True),
    sa.Column('max_seeing_arcsec', sa.Float(), nullable=True),
    sa.Column('max_pwv_mm', sa.Float(), nullable=True),
    sa.Column('max_airmass', sa.Float(), nullable=True),
    sa.Column('min_moon_sep_deg', sa.Float(), nullable=True),
    sa.Column('max_moon_illum', sa.Float(), nullable=True),
    sa.Column('min_sky_mag', sa.Float(), nullable=True),
    sa.Column('max_cloud_mag', sa.Float(), nullable=True),
    sa.Column('not_before', sa.DateTime(), nullable=True),
    sa.Column('not_after', sa.DateTime(), nullable=True),
    sa.Column('period_epoch', sa.DateTime(), nullable=True),
    sa.Column('period_days', sa.Float(), nullable=True),
    sa.Column('phase_min', sa.Float(), nullable=True),
    sa.Column('phase_max', sa.Float(), nullable=True),
    sa.Column('priority', sa.Integer(), nullable=False),
    sa.Column('too', sa.Boolean(), nullable=False),
    sa.Column('status', sa.String(length=16), nullable=False),
    sa.Column('completed_repeats', sa.Integer(), nullable=False),
    sa.Column('partial_exposure_s', sa.Float(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('updated_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['program_id'], ['program.id'], name=op.f('fk_request_program_id_program')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_request'))
    )
    with op.batch_alter_table('request', schema=None) as batch_op:
        batch_op.create_index('ix_request_status', ['status'], unique=False)

    op.create_table('plan_entry',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('plan_id', sa.Integer(), nullable=False),
    sa.Column('request_id', sa.Integer(), nullable=False),
    sa.Column('execution', sa.Integer(), nullable=False),
    sa.Column('start', sa.DateTime(), nullable=False),
    sa.Column('end', sa.DateTime(), nullable=False),
    sa.Column('slew_s', sa.Float(), nullable=False),
    sa.Column('transition_s', sa.Float(), nullable=False),
    sa.Column('setup_s', sa.Float(), nullable=False),
    sa.Column('exposure_s', sa.Float(), nullable=False),
    sa.Column('airmass_start', sa.Float(), nullable=False),
    sa.Column('airmass_end', sa.Float(), nullable=False),
    sa.Column('fwhm_arcsec', sa.Float(), nullable=False),
    sa.Column('pwv_mm', sa.Float(), nullable=False),
    sa.Column('transmission', sa.Float(), nullable=False),
    sa.Column('merit', sa.Float(), nullable=False),
    sa.Column('moon_sep_deg', sa.Float(), nullable=True),
    sa.Column('value', sa.Float(), nullable=False),
    sa.Column('fixed', sa.Boolean(), nullable=False),
    sa.ForeignKeyConstraint(['plan_id'], ['plan.id'], name=op.f('fk_plan_entry_plan_id_plan')),
    sa.ForeignKeyConstraint(['request_id'], ['request.id'], name=op.f('fk_plan_entry_request_id_request')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_plan_entry'))
    )
    with op.batch_alter_table('plan_entry', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_plan_entry_plan_id'), ['plan_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_plan_entry_request_id'), ['request_id'], unique=False)

    op.create_table('replan_order',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('requested_by', sa.String(length=200), nullable=False),
    sa.Column('reason', sa.Text(), nullable=False),
    sa.Column('requested_at', sa.DateTime(), nullable=False),
    sa.Column('taken_at', sa.DateTime(), nullable=True),
    sa.Column('done_at', sa.DateTime(), nullable=True),
    sa.Column('result', sa.Text(), nullable=True),
    sa.Column('plan_id', sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(['plan_id'], ['plan.id'], name=op.f('fk_replan_order_plan_id_plan')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_replan_order'))
    )
    op.create_table('outcome',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('request_id', sa.Integer(), nullable=False),
    sa.Column('plan_entry_id', sa.Integer(), nullable=True),
    sa.Column('result', sa.String(length=16), nullable=False),
    sa.Column('exposure_s', sa.Float(), nullable=True),
    sa.Column('note', sa.Text(), nullable=True),
    sa.Column('recorded_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['plan_entry_id'], ['plan_entry.id'], name=op.f('fk_outcome_plan_entry_id_plan_entry')),
    sa.ForeignKeyConstraint(['request_id'], ['request.id'], name=op.f('fk_outcome_request_id_request')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_outcome'))
    )
    with op.batch_alter_table('outcome', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_outcome_request_id'), ['request_id'], unique=False)



def downgrade() -> None:
    with op.batch_alter_table('outcome', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_outcome_request_id'))

    op.drop_table('outcome')
    op.drop_table('replan_order')
    with op.batch_alter_table('plan_entry', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_plan_entry_request_id'))
        batch_op.drop_index(batch_op.f('ix_plan_entry_plan_id'))

    op.drop_table('plan_entry')
    with op.batch_alter_table('request', schema=None) as batch_op:
        batch_op.drop_index('ix_request_status')

    op.drop_table('request')
    with op.batch_alter_table('plan', schema=None) as batch_op:
        batch_op.drop_index('ix_plan_night_active')

    op.drop_table('plan')
    op.drop_table('conditions_sample')
    op.drop_table('service_lock')
    op.drop_table('program')
    op.drop_table('conditions_report')
