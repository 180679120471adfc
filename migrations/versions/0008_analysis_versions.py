"""analysis versions, figure records, withdrawals, pins

A run gets one row per analysis version (``runs.analysis``, ``runs.is_current``); the
unique key of a run becomes (apparatus, key, analysis), with at most one current row
per (apparatus, key). Existing runs become their first, unnamed and current version.
Every stored figure becomes its first immutable record. ``run_files`` is filled from the
ingest log (which files wrote which runs; shot ranges unknown before this revision).
The shot-level tables are not touched, so PostgreSQL's month partitions stay as they are.

Revision ID: 0008
Revises: 0004
Create Date: 2026-12-02
"""
from typing import Sequence, Union

from alembic import op
import sqlalchemy as sa
import runlog.store.schema


revision: str = '0008'
down_revision: Union[str, None] = '0004'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    op.create_table('pins',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('where_text', sa.Text(), nullable=False),
    sa.Column('created_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('author', sa.String(length=200), nullable=True),
    sa.Column('runlog_version', sa.String(length=40), nullable=False),
    sa.Column('shots', sa.BigInteger(), nullable=False),
    sa.Column('runs', sa.Integer(), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_pins')),
    sa.UniqueConstraint('name', name=op.f('uq_pins_name'))
    )
    op.create_table('withdrawals',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('target', sa.String(length=10), nullable=False),
    sa.Column('name', sa.Text(), nullable=False),
    sa.Column('sha256', sa.String(length=64), nullable=True),
    sa.Column('runs', sa.Text(), nullable=False),
    sa.Column('current', sa.Text(), nullable=False),
    sa.Column('reason', sa.Text(), nullable=False),
    sa.Column('author', sa.String(length=200), nullable=True),
    sa.Column('withdrawn_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('restored_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=True),
    sa.Column('restored_by', sa.String(length=200), nullable=True),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_withdrawals'))
    )
    op.create_table('figure_records',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=100), nullable=False),
    sa.Column('kind', sa.String(length=40), nullable=False),
    sa.Column('value', sa.Float(), nullable=False),
    sa.Column('stderr', sa.Float(), nullable=True),
    sa.Column('ci_low', sa.Float(), nullable=True),
    sa.Column('ci_high', sa.Float(), nullable=True),
    sa.Column('unit', sa.String(length=60), nullable=False),
    sa.Column('method', sa.String(length=100), nullable=False),
    sa.Column('method_version', sa.String(length=20), nullable=False),
    sa.Column('successes', sa.BigInteger(), nullable=True),
    sa.Column('trials', sa.BigInteger(), nullable=True),
    sa.Column('model', sa.String(length=100), nullable=True),
    sa.Column('options', sa.Text(), nullable=True),
    sa.Column('analysis', sa.String(length=200), nullable=True),
    sa.Column('shots', sa.Integer(), nullable=True),
    sa.Column('runlog_version', sa.String(length=40), nullable=True),
    sa.Column('computed_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_figure_records_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_figure_records'))
    )
    with op.batch_alter_table('figure_records', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_figure_records_run_id_name'), ['run_id', 'name'], unique=False)

    op.create_table('pin_runs',
    sa.Column('pin_id', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('analysis', sa.String(length=200), nullable=False),
    sa.Column('shot_count', sa.Integer(), nullable=False),
    sa.Column('shots', sa.Integer(), nullable=False),
    sa.Column('shot_ids', sa.LargeBinary(), nullable=False),
    sa.Column('figure_records', sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(['pin_id'], ['pins.id'], name=op.f('fk_pin_runs_pin_id_pins'), ondelete='CASCADE'),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_pin_runs_run_id_runs')),
    sa.PrimaryKeyConstraint('pin_id', 'run_id', name=op.f('pk_pin_runs'))
    )
    with op.batch_alter_table('pin_runs', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_pin_runs_run_id'), ['run_id'], unique=False)

    op.create_table('run_files',
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('ingest_id', sa.Integer(), nullable=False),
    sa.Column('shots', sa.Integer(), nullable=True),
    sa.Column('first_shot_id', sa.BigInteger(), nullable=True),
    sa.Column('last_shot_id', sa.BigInteger(), nullable=True),
    sa.ForeignKeyConstraint(['ingest_id'], ['ingest_log.id'], name=op.f('fk_run_files_ingest_id_ingest_log')),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_run_files_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('run_id', 'ingest_id', name=op.f('pk_run_files'))
    )
    with op.batch_alter_table('run_files', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_run_files_ingest_id'), ['ingest_id'], unique=False)

    with op.batch_alter_table('figures', schema=None) as batch_op:
        batch_op.add_column(sa.Column('model', sa.String(length=100), nullable=True))
        batch_op.add_column(sa.Column('options', sa.Text(), nullable=True))
        batch_op.add_column(sa.Column('analysis', sa.String(length=200), nullable=True))
        batch_op.add_column(sa.Column('runlog_version', sa.String(length=40), nullable=True))
        batch_op.add_column(sa.Column('record_id', sa.Integer(), nullable=True))
        batch_op.create_foreign_key(batch_op.f('fk_figures_record_id_figure_records'), 'figure_records', ['record_id'], ['id'])

    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.add_column(sa.Column('analysis', sa.String(length=200), server_default='', nullable=False))
        batch_op.add_column(sa.Column('is_current', sa.Boolean(), server_default=sa.true(), nullable=False))
        batch_op.add_column(sa.Column('withdrawn', sa.Boolean(), server_default=sa.false(), nullable=False))
        batch_op.drop_constraint(batch_op.f('uq_runs_apparatus_id_key'), type_='unique')
        batch_op.create_unique_constraint(batch_op.f('uq_runs_apparatus_id_key_analysis'), ['apparatus_id', 'key', 'analysis'])
        batch_op.create_index('uq_runs_current_version', ['apparatus_id', 'key'], unique=True, sqlite_where=sa.text('is_current'), postgresql_where=sa.text('is_current'))

    _fill()


def _fill() -> None:
    """Existing data as the first analysis version: figures become their first records,
    the ingest log says which files wrote which runs."""
    connection = op.get_bind()
    connection.exec_driver_sql(
        "INSERT INTO figure_records (run_id, name, kind, value, stderr, ci_low, ci_high, unit, method, method_version, "
        "successes, trials, analysis, shots, computed_at) "
        "SELECT f.run_id, f.name, f.kind, f.value, f.stderr, f.ci_low, f.ci_high, f.unit, f.method, f.method_version, "
        "f.successes, f.trials, '', r.shot_count, f.computed_at FROM figures f JOIN runs r ON r.id = f.run_id ORDER BY f.id"
    )
    connection.exec_driver_sql(
        "UPDATE figures SET analysis = '', record_id = (SELECT MAX(fr.id) FROM figure_records fr "
        "WHERE fr.run_id = figures.run_id AND fr.name = figures.name)"
    )
    runs: dict[str, list[int]] = {}
    for run_id, key in connection.exec_driver_sql("SELECT id, key FROM runs"):
        runs.setdefault(key, []).append(int(run_id))
    rows = []
    seen = set()
    for log_id, keys in connection.exec_driver_sql("SELECT id, runs FROM ingest_log WHERE status = 'ingested' AND runs IS NOT NULL ORDER BY id"):
        for key in str(keys).split(","):
            for run_id in runs.get(key, []):
                if (run_id, int(log_id)) not in seen:
                    seen.add((run_id, int(log_id)))
                    rows.append({"r": run_id, "i": int(log_id)})
    if rows:
        connection.execute(sa.text("INSERT INTO run_files (run_id, ingest_id) VALUES (:r, :i)"), rows)
    # A run written by one file: that file gave all its shots.
    connection.exec_driver_sql(
        "UPDATE run_files SET shots = (SELECT r.shot_count FROM runs r WHERE r.id = run_files.run_id) "
        "WHERE run_id IN (SELECT run_id FROM run_files GROUP BY run_id HAVING count(*) = 1)"
    )


def downgrade() -> None:
    connection = op.get_bind()
    kept = connection.exec_driver_sql("SELECT count(*) FROM runs WHERE NOT is_current OR withdrawn").scalar_one()
    if kept:
        raise RuntimeError(
            f"the catalogue holds {kept} run version(s) that are not current (older analyses or withdrawn runs); "
            "below revision 0008 a run has one version only, so downgrading would lose them"
        )
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.drop_index('uq_runs_current_version', sqlite_where=sa.text('is_current'), postgresql_where=sa.text('is_current'))
        batch_op.drop_constraint(batch_op.f('uq_runs_apparatus_id_key_analysis'), type_='unique')
        batch_op.create_unique_constraint(batch_op.f('uq_runs_apparatus_id_key'), ['apparatus_id', 'key'])
        batch_op.drop_column('withdrawn')
        batch_op.drop_column('is_current')
        batch_op.drop_column('analysis')

    with op.batch_alter_table('figures', schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f('fk_figures_record_id_figure_records'), type_='foreignkey')
        batch_op.drop_column('record_id')
        batch_op.drop_column('runlog_version')
        batch_op.drop_column('analysis')
        batch_op.drop_column('options')
        batch_op.drop_column('model')

    with op.batch_alter_table('run_files', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_run_files_ingest_id'))

    op.drop_table('run_files')
    with op.batch_alter_table('pin_runs', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_pin_runs_run_id'))

    op.drop_table('pin_runs')
    with op.batch_alter_table('figure_records', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_figure_records_run_id_name'))

    op.drop_table('figure_records')
    op.drop_table('withdrawals')
    op.drop_table('pins')
