"""initial catalogue

Revision ID: 0001
Revises: 
Create Date: 2026-12-01
"""
from typing import Sequence, Union

from alembic import op
import sqlalchemy as sa
import runlog.store.schema


revision: str = '0001'
down_revision: Union[str, None] = None
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    op.create_table('apparatus',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_apparatus')),
    sa.UniqueConstraint('name', name=op.f('uq_apparatus_name'))
    )
    op.create_table('ingest_log',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('file', sa.Text(), nullable=False),
    sa.Column('sha256', sa.String(length=64), nullable=False),
    sa.Column('size', sa.BigInteger(), nullable=False),
    sa.Column('status', sa.String(length=20), nullable=False),
    sa.Column('reason', sa.Text(), nullable=True),
    sa.Column('runs', sa.Text(), nullable=True),
    sa.Column('shots', sa.Integer(), nullable=False),
    sa.Column('started_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('finished_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('read_seconds', sa.Float(), nullable=False),
    sa.Column('write_seconds', sa.Float(), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_ingest_log'))
    )
    with op.batch_alter_table('ingest_log', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_ingest_log_finished_at'), ['finished_at'], unique=False)
        batch_op.create_index(batch_op.f('ix_ingest_log_sha256'), ['sha256'], unique=False)

    op.create_table('measurements',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('unit', sa.String(length=60), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_measurements')),
    sa.UniqueConstraint('name', name=op.f('uq_measurements_name'))
    )
    op.create_table('parameters',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('unit', sa.String(length=60), nullable=False),
    sa.Column('kind', sa.String(length=10), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_parameters')),
    sa.UniqueConstraint('name', name=op.f('uq_parameters_name'))
    )
    op.create_table('runs',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('apparatus_id', sa.Integer(), nullable=False),
    sa.Column('key', sa.String(length=200), nullable=False),
    sa.Column('sequence', sa.String(length=200), nullable=False),
    sa.Column('started', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('finished', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('shot_count', sa.Integer(), nullable=False),
    sa.Column('operator', sa.String(length=200), nullable=True),
    sa.Column('notes', sa.Text(), nullable=True),
    sa.ForeignKeyConstraint(['apparatus_id'], ['apparatus.id'], name=op.f('fk_runs_apparatus_id_apparatus')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_runs')),
    sa.UniqueConstraint('apparatus_id', 'key', name=op.f('uq_runs_apparatus_id_key'))
    )
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_runs_sequence'), ['sequence'], unique=False)
        batch_op.create_index(batch_op.f('ix_runs_started'), ['started'], unique=False)

    op.create_table('annotations',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('apparatus_id', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=True),
    sa.Column('at', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('text', sa.Text(), nullable=False),
    sa.Column('author', sa.String(length=200), nullable=True),
    sa.Column('created_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['apparatus_id'], ['apparatus.id'], name=op.f('fk_annotations_apparatus_id_apparatus')),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_annotations_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_annotations'))
    )
    with op.batch_alter_table('annotations', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_annotations_apparatus_id_at'), ['apparatus_id', 'at'], unique=False)

    op.create_table('figures',
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
    sa.Column('computed_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_figures_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_figures')),
    sa.UniqueConstraint('run_id', 'name', name=op.f('uq_figures_run_id_name'))
    )
    with op.batch_alter_table('figures', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_figures_name'), ['name'], unique=False)

    op.create_table('images',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('role', sa.String(length=20), nullable=False),
    sa.Column('sites', sa.Integer(), nullable=False),
    sa.Column('shape', sa.String(length=60), nullable=False),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_images_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_images')),
    sa.UniqueConstraint('run_id', 'name', name=op.f('uq_images_run_id_name'))
    )
    op.create_table('run_parameters',
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('parameter_id', sa.Integer(), nullable=False),
    sa.Column('scanned', sa.Boolean(), nullable=False),
    sa.Column('number_value', sa.Float(), nullable=True),
    sa.Column('text_value', sa.Text(), nullable=True),
    sa.Column('minimum', sa.Float(), nullable=True),
    sa.Column('maximum', sa.Float(), nullable=True),
    sa.ForeignKeyConstraint(['parameter_id'], ['parameters.id'], name=op.f('fk_run_parameters_parameter_id_parameters')),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_run_parameters_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('run_id', 'parameter_id', name=op.f('pk_run_parameters'))
    )
    with op.batch_alter_table('run_parameters', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_run_parameters_parameter_id_number_value'), ['parameter_id', 'number_value'], unique=False)
        batch_op.create_index(batch_op.f('ix_run_parameters_parameter_id_text_value'), ['parameter_id', 'text_value'], unique=False)

    op.create_table('run_tags',
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('tag', sa.String(length=200), nullable=False),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_run_tags_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('run_id', 'tag', name=op.f('pk_run_tags'))
    )
    with op.batch_alter_table('run_tags', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_run_tags_tag'), ['tag'], unique=False)

    op.create_table('shots',
    sa.Column('id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), autoincrement=False, nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('shot', sa.Integer(), nullable=False),
    sa.Column('time', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('status', sa.String(length=40), nullable=False),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_shots_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_shots')),
    sa.UniqueConstraint('run_id', 'shot', name=op.f('uq_shots_run_id_shot'))
    )
    op.create_table('run_measurements',
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('measurement_id', sa.Integer(), nullable=False),
    sa.Column('shots', sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(['measurement_id'], ['measurements.id'], name=op.f('fk_run_measurements_measurement_id_measurements')),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_run_measurements_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('run_id', 'measurement_id', name=op.f('pk_run_measurements'))
    )
    op.create_table('shot_measurements',
    sa.Column('shot_id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), autoincrement=False, nullable=False),
    sa.ForeignKeyConstraint(['shot_id'], ['shots.id'], name=op.f('fk_shot_measurements_shot_id_shots'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('shot_id', name=op.f('pk_shot_measurements'))
    )
    op.create_table('occupancy',
    sa.Column('shot_id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), nullable=False),
    sa.Column('image_id', sa.Integer(), nullable=False),
    sa.Column('bits', sa.LargeBinary(), nullable=False),
    sa.ForeignKeyConstraint(['image_id'], ['images.id'], name=op.f('fk_occupancy_image_id_images'), ondelete='CASCADE'),
    sa.ForeignKeyConstraint(['shot_id'], ['shots.id'], name=op.f('fk_occupancy_shot_id_shots'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('shot_id', 'image_id', name=op.f('pk_occupancy')),
    sqlite_with_rowid=False
    )
    op.create_table('shot_parameters',
    sa.Column('shot_id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), nullable=False),
    sa.Column('parameter_id', sa.Integer(), nullable=False),
    sa.Column('number_value', sa.Float(), nullable=True),
    sa.Column('text_value', sa.Text(), nullable=True),
    sa.ForeignKeyConstraint(['parameter_id'], ['parameters.id'], name=op.f('fk_shot_parameters_parameter_id_parameters')),
    sa.ForeignKeyConstraint(['shot_id'], ['shots.id'], name=op.f('fk_shot_parameters_shot_id_shots'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('shot_id', 'parameter_id', name=op.f('pk_shot_parameters')),
    sqlite_with_rowid=False
    )


def downgrade() -> None:
    op.drop_table('shot_parameters')
    op.drop_table('occupancy')
    op.drop_table('shot_measurements')
    op.drop_table('run_measurements')
    op.drop_table('shots')
    with op.batch_alter_table('run_tags', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_run_tags_tag'))

    op.drop_table('run_tags')
    with op.batch_alter_table('run_parameters', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_run_parameters_parameter_id_text_value'))
        batch_op.drop_index(batch_op.f('ix_run_parameters_parameter_id_number_value'))

    op.drop_table('run_parameters')
    op.drop_table('images')
    with op.batch_alter_table('figures', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_figures_name'))

    op.drop_table('figures')
    with op.batch_alter_table('annotations', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_annotations_apparatus_id_at'))

    op.drop_table('annotations')
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_runs_started'))
        batch_op.drop_index(batch_op.f('ix_runs_sequence'))

    op.drop_table('runs')
    op.drop_table('parameters')
    op.drop_table('measurements')
    with op.batch_alter_table('ingest_log', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_ingest_log_sha256'))
        batch_op.drop_index(batch_op.f('ix_ingest_log_finished_at'))

    op.drop_table('ingest_log')
    op.drop_table('apparatus')
