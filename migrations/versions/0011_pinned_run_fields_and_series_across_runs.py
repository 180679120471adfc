"""pinned run fields and series across runs

A pin freezes the exported fields of each run it holds (``pin_runs.run_fields``, JSON),
so that its export stays byte-identical after a later file or tag changes the run; pins
made before this revision have none and export the run's fields as they stand. Series
across runs (``series``, ``series_values``, ``series_members``) are new and start empty.

Revision ID: 0011
Revises: 0010
Create Date: 2026-12-02
"""
from typing import Sequence, Union

from alembic import op
import sqlalchemy as sa
import runlog.store.schema


revision: str = '0011'
down_revision: Union[str, None] = '0010'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    op.create_table('series',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('figure', sa.String(length=100), nullable=False),
    sa.Column('parameter', sa.String(length=200), nullable=False),
    sa.Column('parameter_unit', sa.String(length=60), nullable=False),
    sa.Column('figure_unit', sa.String(length=60), nullable=False),
    sa.Column('model', sa.String(length=40), nullable=False),
    sa.Column('where_text', sa.Text(), nullable=True),
    sa.Column('points', sa.Integer(), nullable=False),
    sa.Column('chi_square', sa.Float(), nullable=True),
    sa.Column('degrees_of_freedom', sa.Integer(), nullable=False),
    sa.Column('options', sa.Text(), nullable=True),
    sa.Column('method', sa.String(length=100), nullable=False),
    sa.Column('method_version', sa.String(length=20), nullable=False),
    sa.Column('runlog_version', sa.String(length=40), nullable=False),
    sa.Column('computed_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_series'))
    )
    with op.batch_alter_table('series', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_series_name'), ['name'], unique=False)

    op.create_table('series_values',
    sa.Column('series_id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=100), nullable=False),
    sa.Column('value', sa.Float(), nullable=False),
    sa.Column('stderr', sa.Float(), nullable=True),
    sa.Column('unit', sa.String(length=60), nullable=False),
    sa.ForeignKeyConstraint(['series_id'], ['series.id'], name=op.f('fk_series_values_series_id_series'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('series_id', 'name', name=op.f('pk_series_values'))
    )
    op.create_table('series_members',
    sa.Column('series_id', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('record_id', sa.Integer(), nullable=True),
    sa.Column('x', sa.Float(), nullable=False),
    sa.Column('y', sa.Float(), nullable=False),
    sa.Column('stderr', sa.Float(), nullable=True),
    sa.ForeignKeyConstraint(['record_id'], ['figure_records.id'], name=op.f('fk_series_members_record_id_figure_records')),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_series_members_run_id_runs')),
    sa.ForeignKeyConstraint(['series_id'], ['series.id'], name=op.f('fk_series_members_series_id_series'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('series_id', 'run_id', name=op.f('pk_series_members'))
    )
    with op.batch_alter_table('series_members', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_series_members_run_id'), ['run_id'], unique=False)

    with op.batch_alter_table('pin_runs', schema=None) as batch_op:
        batch_op.add_column(sa.Column('run_fields', sa.Text(), nullable=True))



def downgrade() -> None:
    with op.batch_alter_table('pin_runs', schema=None) as batch_op:
        batch_op.drop_column('run_fields')

    with op.batch_alter_table('series_members', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_series_members_run_id'))

    op.drop_table('series_members')
    op.drop_table('series_values')
    with op.batch_alter_table('series', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_series_name'))

    op.drop_table('series')
