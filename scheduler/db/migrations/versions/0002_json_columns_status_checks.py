"""plan summary and diff as JSON columns; request status and outcome result held to their values

Revision ID: 0002
Revises: 0001
Create Date: 2027-01-10

The plan's ``summary_json``/``diff_json`` text columns become ``summary``/``diff`` JSON columns.
The text is parsed here, row by row, rather than cast by the database: older plans may hold
``NaN`` (Python's json writes it; PostgreSQL's JSON refuses it), which becomes null. The status
and result columns keep their VARCHAR(16) and gain CHECK constraints (no database enum type,
so SQLite and PostgreSQL are alike). SQLite cannot alter a table in place: the batch operations
copy it; the migration runner switches foreign-key enforcement off around them.
"""
import json
import math

from alembic import op
import sqlalchemy as sa


revision = '0002'
down_revision = '0001'
branch_labels = None
depends_on = None

# The enums' values as they are at this revision (scheduler.model.request.RequestStatus and
# OutcomeResult); a migration states them itself so that later edits to the code cannot change it.
STATUSES = ('queued', 'planned', 'done', 'failed', 'withdrawn', 'expired')
RESULTS = ('done', 'failed', 'partial')


def _in(column: str, values: tuple[str, ...]) -> str:
    return f"{column} IN ({', '.join(repr(v) for v in values)})"


def _finite(o):
    """Parsed JSON with NaN and infinities as null."""
    if isinstance(o, dict):
        return {k: _finite(v) for k, v in o.items()}
    if isinstance(o, list):
        return [_finite(v) for v in o]
    if isinstance(o, float) and not math.isfinite(o):
        return None
    return o


def _parse(text):
    if not text:
        return {}
    try:
        value = json.loads(text)
    except ValueError:
        return {"unreadable": text}  # kept, not lost: the old text under one key
    return _finite(value) if isinstance(value, dict) else {"value": _finite(value)}


def _refuse_unknown(table: str, column: str, values: tuple[str, ...]) -> None:
    conn = op.get_bind()
    t = sa.table(table, sa.column('id', sa.Integer), sa.column(column, sa.String))
    bad = conn.execute(sa.select(t.c.id, t.c[column]).where(t.c[column].not_in(values)).limit(5)).all()
    if bad:
        shown = ', '.join(f'{table} {i}: {v!r}' for i, v in bad)
        raise RuntimeError(f"{table}.{column} holds values outside {', '.join(values)} ({shown}); "
                           "correct them before upgrading")


def upgrade() -> None:
    conn = op.get_bind()
    with op.batch_alter_table('plan', schema=None) as batch_op:
        batch_op.add_column(sa.Column('summary', sa.JSON(), nullable=True))
        batch_op.add_column(sa.Column('diff', sa.JSON(), nullable=True))

    plan = sa.table('plan', sa.column('id', sa.Integer), sa.column('summary_json', sa.Text),
                    sa.column('diff_json', sa.Text), sa.column('summary', sa.JSON), sa.column('diff', sa.JSON))
    for pid, summary_text, diff_text in conn.execute(sa.select(plan.c.id, plan.c.summary_json, plan.c.diff_json)).all():
        conn.execute(plan.update().where(plan.c.id == pid)
                     .values(summary=_parse(summary_text), diff=_parse(diff_text)))

    with op.batch_alter_table('plan', schema=None) as batch_op:
        batch_op.alter_column('summary', existing_type=sa.JSON(), nullable=False)
        batch_op.alter_column('diff', existing_type=sa.JSON(), nullable=False)
        batch_op.drop_column('summary_json')
        batch_op.drop_column('diff_json')

    _refuse_unknown('request', 'status', STATUSES)
    with op.batch_alter_table('request', schema=None) as batch_op:
        batch_op.create_check_constraint(op.f('ck_request_status'), _in('status', STATUSES))
    _refuse_unknown('outcome', 'result', RESULTS)
    with op.batch_alter_table('outcome', schema=None) as batch_op:
        batch_op.create_check_constraint(op.f('ck_outcome_result'), _in('result', RESULTS))


def downgrade() -> None:
    conn = op.get_bind()
    with op.batch_alter_table('outcome', schema=None) as batch_op:
        batch_op.drop_constraint(op.f('ck_outcome_result'), type_='check')
    with op.batch_alter_table('request', schema=None) as batch_op:
        batch_op.drop_constraint(op.f('ck_request_status'), type_='check')

    with op.batch_alter_table('plan', schema=None) as batch_op:
        batch_op.add_column(sa.Column('summary_json', sa.Text(), nullable=True))
        batch_op.add_column(sa.Column('diff_json', sa.Text(), nullable=True))
    plan = sa.table('plan', sa.column('id', sa.Integer), sa.column('summary_json', sa.Text),
                    sa.column('diff_json', sa.Text), sa.column('summary', sa.JSON), sa.column('diff', sa.JSON))
    for pid, summary, diff in conn.execute(sa.select(plan.c.id, plan.c.summary, plan.c.diff)).all():
        conn.execute(plan.update().where(plan.c.id == pid)
                     .values(summary_json=json.dumps(summary or {}), diff_json=json.dumps(diff or {})))
    with op.batch_alter_table('plan', schema=None) as batch_op:
        batch_op.alter_column('summary_json', existing_type=sa.Text(), nullable=False)
        batch_op.alter_column('diff_json', existing_type=sa.Text(), nullable=False)
        batch_op.drop_column('summary')
        batch_op.drop_column('diff')
