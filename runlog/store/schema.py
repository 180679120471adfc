"""The catalogue's tables, as SQLAlchemy 2 typed models (one history for SQLite and PostgreSQL).

Parameters are stored in two layers (see docs/architecture.md): ``run_parameters`` holds
one row per run and parameter — the value itself when it is constant over the run, else
the scanned range — and ``shot_parameters`` holds per-shot values only for parameters
that vary within a run. A filter first prunes runs on ``run_parameters`` (indexed by
value), then checks single shots only inside the runs that survive.

The per-shot tables (``shot_parameters``, ``measurement_values``, ``occupancy``) are keyed
by ``(shot_id, ...)`` and on SQLite stored WITHOUT ROWID, so a bulk append in shot order
writes the B-tree sequentially.

These models are the SQLite layout. On PostgreSQL the four shot-level tables are then
partitioned by month, with the shot's time in every child and in every key
(:mod:`runlog.store.partitions`).
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import (
    DDL,
    BigInteger,
    Boolean,
    Column,
    Date,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
    event,
    false,
    text,
    true,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column
from sqlalchemy.types import TypeDecorator

__all__ = [
    "SCHEMA_REVISION",
    "Base",
    "UTCDateTime",
    "to_epoch_us",
    "Apparatus",
    "Run",
    "RunTag",
    "Shot",
    "Parameter",
    "RunParameter",
    "ShotParameter",
    "Measurement",
    "RunMeasurement",
    "ShotMeasurements",
    "measurement_column",
    "Image",
    "Occupancy",
    "FigureRow",
    "SiteCounts",
    "PhotonCounts",
    "Setting",
    "RunSetting",
    "SequenceSeries",
    "DailyRollup",
    "SeriesRollup",
    "Alarm",
    "IngestLogEntry",
    "Annotation",
    "RunFile",
    "FigureRecord",
    "Withdrawal",
    "Pin",
    "PinRun",
    "Series",
    "SeriesValue",
    "SeriesMember",
    "Monitor",
    "MonitorValue",
    "MonitorRollup",
    "MonitorFile",
]

#: The Alembic revision this code expects; a test keeps it equal to the migrations' head.
SCHEMA_REVISION = "0017"

NAMING_CONVENTION = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

# Shot ids are 64-bit on PostgreSQL; on SQLite an INTEGER PRIMARY KEY is the rowid.
BigId = BigInteger().with_variant(Integer(), "sqlite")


_EPOCH = dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc)
_MICROSECOND = dt.timedelta(microseconds=1)


def to_epoch_us(value: dt.datetime) -> int:
    """Integer microseconds since 1970-01-01 UTC (exact, no float rounding)."""
    return (value - _EPOCH) // _MICROSECOND


class UTCDateTime(TypeDecorator[dt.datetime]):
    """A point in time, always UTC: ``timestamptz`` on PostgreSQL, integer microseconds
    since the Unix epoch on SQLite (exact, compact, and ordered like the times).

    Naive datetimes are refused on the way in; values come back timezone-aware (UTC).
    """

    impl = DateTime(timezone=True)
    cache_ok = True

    def load_dialect_impl(self, dialect):  # type: ignore[override]
        if dialect.name == "sqlite":
            return dialect.type_descriptor(BigInteger())
        return dialect.type_descriptor(DateTime(timezone=True))

    def process_bind_param(self, value: dt.datetime | None, dialect):  # type: ignore[override]
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError(f"naive datetime {value!r}: times must carry a time zone")
        if dialect.name == "sqlite":
            return to_epoch_us(value)
        return value.astimezone(dt.timezone.utc)

    def process_result_value(self, value, dialect):  # type: ignore[override]
        if value is None:
            return None
        if dialect.name == "sqlite":
            return _EPOCH + int(value) * _MICROSECOND
        if value.tzinfo is None:
            return value.replace(tzinfo=dt.timezone.utc)
        return value.astimezone(dt.timezone.utc)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)


class Apparatus(Base):
    """One experimental machine; runs are keyed per apparatus."""

    __tablename__ = "apparatus"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200), unique=True)


class Run(Base):
    """One analysis version of a run: a set of shots of one sequence, most parameters
    fixed, one or two scanned.

    A run (apparatus, key) has one row per analysis version (``analysis``, '' for the
    unnamed one); the shots, parameters, measurements, images, per-site counts and figures
    of a version hang off its row. Exactly one row of a run is current (``is_current``; none
    while the run is withdrawn): every query of runs, shots or figures that means "the
    catalogue as it stands" restricts to ``runs.is_current`` (docs/architecture.md, "Analysis versions").
    """

    __tablename__ = "runs"
    __table_args__ = (
        UniqueConstraint("apparatus_id", "key", "analysis"),
        Index(None, "started"),
        Index(None, "apparatus_id", "day"),
        Index(None, "apparatus_id", "sequence", "series_fingerprint"),
        # At most one current version per run: a partial unique index. On PostgreSQL the
        # DDL after this class makes it, because a postgresql_where argument here would
        # make SQLAlchemy import its whole PostgreSQL dialect whenever this module loads
        # (~60 ms of every command, on SQLite too; benchmarks/startup.py).
        Index("uq_runs_current_version", "apparatus_id", "key", unique=True, sqlite_where=text("is_current")).ddl_if(dialect="sqlite"),
    )
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    apparatus_id: Mapped[int] = mapped_column(ForeignKey("apparatus.id"))
    key: Mapped[str] = mapped_column(String(200))
    # The analysis version's name ('' = the unnamed default version).
    analysis: Mapped[str] = mapped_column(String(200), default="", server_default="")
    is_current: Mapped[bool] = mapped_column(Boolean, default=True, server_default=true())
    withdrawn: Mapped[bool] = mapped_column(Boolean, default=False, server_default=false())
    sequence: Mapped[str] = mapped_column(String(200), index=True)
    started: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    finished: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    shot_count: Mapped[int] = mapped_column(Integer, default=0)
    # Shots left out of every figure, rollup and drift point because their status is not
    # one that counts ([figures] counting_status in runlog.toml; default 'ok').
    excluded_shots: Mapped[int] = mapped_column(Integer, default=0, server_default="0")
    # The lab day the run started on, in the catalogue's lab time zone (settings).
    day: Mapped[dt.date | None] = mapped_column(Date)
    operator: Mapped[str | None] = mapped_column(String(200))
    notes: Mapped[str | None] = mapped_column(Text)
    # The fingerprint of the run's constant settings (runlog.store.series_keys); with the
    # sequence it names the run's reference series. Kept for current versions only.
    series_fingerprint: Mapped[str | None] = mapped_column(String(16))


event.listen(
    Run.__table__,
    "after_create",
    DDL("CREATE UNIQUE INDEX uq_runs_current_version ON runs (apparatus_id, key) WHERE is_current").execute_if(dialect="postgresql"),
)


class RunTag(Base):
    """Free labels on a run (e.g. 'calibration'); filterable by ``tag``."""

    __tablename__ = "run_tags"
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), primary_key=True)
    tag: Mapped[str] = mapped_column(String(200), primary_key=True, index=True)


class Shot(Base):
    """One experimental sequence executed once; ``shot`` is its index within the run."""

    __tablename__ = "shots"
    __table_args__ = (UniqueConstraint("run_id", "shot"),)
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=False)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"))
    shot: Mapped[int] = mapped_column(Integer)
    time: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    status: Mapped[str] = mapped_column(String(40), default="ok")


class Parameter(Base):
    """A sequence parameter known to the catalogue, with the unit its values are stored in.

    ``kind`` is 'number', 'boolean' or 'text'. Values arriving in another unit of the
    same dimension are converted to ``unit`` at ingest.
    """

    __tablename__ = "parameters"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200), unique=True)
    unit: Mapped[str] = mapped_column(String(60), default="")
    kind: Mapped[str] = mapped_column(String(10))


class RunParameter(Base):
    """A parameter of a run: its value when constant over all shots, else its scanned range."""

    __tablename__ = "run_parameters"
    __table_args__ = (
        Index(None, "parameter_id", "number_value"),
        Index(None, "parameter_id", "text_value"),
    )
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), primary_key=True)
    parameter_id: Mapped[int] = mapped_column(ForeignKey("parameters.id"), primary_key=True)
    scanned: Mapped[bool] = mapped_column(Boolean, default=False)
    # Constant parameter: the value. Scanned parameter: NULL here, range below.
    number_value: Mapped[float | None] = mapped_column(Float)
    text_value: Mapped[str | None] = mapped_column(Text)
    minimum: Mapped[float | None] = mapped_column(Float)
    maximum: Mapped[float | None] = mapped_column(Float)


class ShotParameter(Base):
    """Per-shot value of a parameter that is not constant over its run."""

    __tablename__ = "shot_parameters"
    __table_args__ = {"sqlite_with_rowid": False}
    shot_id: Mapped[int] = mapped_column(
        BigId, ForeignKey("shots.id", ondelete="CASCADE"), primary_key=True
    )
    parameter_id: Mapped[int] = mapped_column(ForeignKey("parameters.id"), primary_key=True)
    number_value: Mapped[float | None] = mapped_column(Float)
    text_value: Mapped[str | None] = mapped_column(Text)


class Measurement(Base):
    """A per-shot measured quantity known to the catalogue, with its stored unit."""

    __tablename__ = "measurements"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200), unique=True)
    unit: Mapped[str] = mapped_column(String(60), default="")


class RunMeasurement(Base):
    """Which measurements the shots of a run carry, and how many shots have a value."""

    __tablename__ = "run_measurements"
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), primary_key=True)
    measurement_id: Mapped[int] = mapped_column(ForeignKey("measurements.id"), primary_key=True)
    shots: Mapped[int] = mapped_column(Integer, default=0)


#: Per-shot measured values live in ``shot_measurements``: one row per shot, one column
#: ``m_<measurement id>`` per measurement, made by ingest (ALTER TABLE ... ADD COLUMN) when
#: a measurement first appears — on PostgreSQL ahead of it, in blocks of 64
#: (:mod:`runlog.store.measurement_columns`). A lab has dozens of measurement names, not
#: thousands, and a wide row appends ~4x faster than one row per value; a missing value is
#: NULL. These columns are data, not schema: migrations and the model check leave them be.
MEASUREMENT_COLUMN_PREFIX = "m_"


def measurement_column(measurement_id: int) -> str:
    """The ``shot_measurements`` column of a measurement (a safe identifier by construction)."""
    return f"{MEASUREMENT_COLUMN_PREFIX}{int(measurement_id)}"


class ShotMeasurements(Base):
    """Per-shot measured values: one row per shot, one ``m_<id>`` column per measurement."""

    __tablename__ = "shot_measurements"
    shot_id: Mapped[int] = mapped_column(
        BigId, ForeignKey("shots.id", ondelete="CASCADE"), primary_key=True, autoincrement=False
    )


class Image(Base):
    """An occupancy image of a run: its name, role and lattice shape.

    ``role`` is 'loading', 'survival' or 'other'; ``shape`` is e.g. '10,10' (rows, columns)
    or '64' for a one-dimensional array; ``sites`` is the product.
    """

    __tablename__ = "images"
    __table_args__ = (UniqueConstraint("run_id", "name"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"))
    name: Mapped[str] = mapped_column(String(200))
    role: Mapped[str] = mapped_column(String(20))
    sites: Mapped[int] = mapped_column(Integer)
    shape: Mapped[str] = mapped_column(String(60))


class Occupancy(Base):
    """Site occupancy of one shot in one image, as packed bits (numpy.packbits, big-endian)."""

    __tablename__ = "occupancy"
    __table_args__ = {"sqlite_with_rowid": False}
    shot_id: Mapped[int] = mapped_column(
        BigId, ForeignKey("shots.id", ondelete="CASCADE"), primary_key=True
    )
    image_id: Mapped[int] = mapped_column(
        ForeignKey("images.id", ondelete="CASCADE"), primary_key=True
    )
    bits: Mapped[bytes] = mapped_column(LargeBinary)


class _FigureColumns:
    """What a figure is and how it was made: shared by the records and the figures in force."""

    name: Mapped[str] = mapped_column(String(100))
    kind: Mapped[str] = mapped_column(String(40))
    value: Mapped[float] = mapped_column(Float)
    stderr: Mapped[float | None] = mapped_column(Float)
    ci_low: Mapped[float | None] = mapped_column(Float)
    ci_high: Mapped[float | None] = mapped_column(Float)
    unit: Mapped[str] = mapped_column(String(60), default="")
    method: Mapped[str] = mapped_column(String(100))
    method_version: Mapped[str] = mapped_column(String(20))
    computed_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    # Counting figures keep their counts, so days and filters can pool them exactly.
    successes: Mapped[int | None] = mapped_column(BigInteger)
    trials: Mapped[int | None] = mapped_column(BigInteger)
    # Counting figures: ci_low/ci_high are shot-level (runlog.figures.shot_level); the
    # pooled binomial interval and its method stay beside them, and the sums over shots
    # the shot-level interval is made of are kept so that days can pool them too.
    binomial_ci_low: Mapped[float | None] = mapped_column(Float)
    binomial_ci_high: Mapped[float | None] = mapped_column(Float)
    binomial_method: Mapped[str | None] = mapped_column(String(100))
    counted_shots: Mapped[int | None] = mapped_column(BigInteger)
    successes_squares: Mapped[float | None] = mapped_column(Float)
    trials_squares: Mapped[float | None] = mapped_column(Float)
    successes_trials: Mapped[float | None] = mapped_column(Float)
    # A fitted value outside its physical range (a contrast of a fraction signal above 1):
    # kept as fitted, shown with the flag, and left out of rollups, drift and alarms.
    out_of_range: Mapped[bool] = mapped_column(Boolean, default=False, server_default=false())
    # The model and options (a JSON object: envelope, x, y, image, interval ...) it was
    # computed with, the analysis version of its run version, and runlog's version.
    model: Mapped[str | None] = mapped_column(String(100))
    options: Mapped[str | None] = mapped_column(Text)
    analysis: Mapped[str | None] = mapped_column(String(200))
    runlog_version: Mapped[str | None] = mapped_column(String(40))


class FigureRow(_FigureColumns, Base):
    """A figure of merit in force for a run version: the newest of its records
    (``record_id``, :class:`FigureRecord`), copied here so that readers need no history."""

    __tablename__ = "figures"
    __table_args__ = (UniqueConstraint("run_id", "name"), Index(None, "name"))
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"))
    record_id: Mapped[int | None] = mapped_column(ForeignKey("figure_records.id"))


class SiteCounts(Base):
    """Per-site counts of a run (e.g. ``fill``: loaded shots / shots per site), for maps.

    ``successes`` and ``trials`` are little-endian int64 arrays with one entry per site.
    """

    __tablename__ = "site_counts"
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), primary_key=True)
    name: Mapped[str] = mapped_column(String(100), primary_key=True)
    sites: Mapped[int] = mapped_column(Integer)
    successes: Mapped[bytes] = mapped_column(LargeBinary)
    trials: Mapped[bytes] = mapped_column(LargeBinary)


class PhotonCounts(Base):
    """Per-site photon counts of one image of a run, as one file brought them.

    ``shots`` holds the shot indices (little-endian int64) and ``counts`` the shots x sites
    matrix (little-endian float64, row by row); ``threshold`` is the one ingest used to
    derive the image's occupancy from them (``None`` when the file carried the occupancy).
    """

    __tablename__ = "photon_counts"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), index=True)
    image_id: Mapped[int] = mapped_column(ForeignKey("images.id", ondelete="CASCADE"))
    sites: Mapped[int] = mapped_column(Integer)
    threshold: Mapped[float | None] = mapped_column(Float, nullable=True)
    shots: Mapped[bytes] = mapped_column(LargeBinary)
    counts: Mapped[bytes] = mapped_column(LargeBinary)


class RunSetting(Base):
    """A run's parameter as its reference series sees it (runlog.store.series_keys): a
    constant rounded at the declared tolerance (``value``; ``with_unit`` when it is a
    number shown with its unit), or only the name of a scanned one; parameters the lab
    declared may vary are left out. Rewritten when the declaration changes."""

    __tablename__ = "run_settings"
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), primary_key=True)
    parameter_id: Mapped[int] = mapped_column(ForeignKey("parameters.id"), primary_key=True)
    scanned: Mapped[bool] = mapped_column(Boolean, default=False)
    with_unit: Mapped[bool] = mapped_column(Boolean, default=False)
    value: Mapped[str | None] = mapped_column(Text)


class SequenceSeries(Base):
    """Per apparatus and sequence, what its runs' series fingerprints were computed with:
    ``basis`` (a hash of the declared ``vary`` and ``tolerance``) and ``varying`` (JSON list
    of the parameters left out because they take a new value in most runs)."""

    __tablename__ = "sequence_series"
    apparatus_id: Mapped[int] = mapped_column(ForeignKey("apparatus.id"), primary_key=True)
    sequence: Mapped[str] = mapped_column(String(200), primary_key=True)
    basis: Mapped[str] = mapped_column(String(64))
    varying: Mapped[str] = mapped_column(Text, default="[]")


class Setting(Base):
    """Catalogue-wide settings, e.g. ``lab_timezone`` (IANA name) that defines lab days."""

    __tablename__ = "settings"
    key: Mapped[str] = mapped_column(String(100), primary_key=True)
    value: Mapped[str] = mapped_column(Text)


class DailyRollup(Base):
    """One figure pooled over the runs of one apparatus, lab day and sequence.

    Counting figures pool their counts (``successes``/``trials``); fitted figures keep the
    additive sums of :data:`runlog.drift.pooling.SUMS` - linear ones for every figure, the
    sums of cos and sin for a phase, of ln T for a time - so that a day's point made from
    its rollup rows equals the one made from its runs' figures. Figures flagged
    ``out_of_range`` are left out. Maintained at ingest and derive time for the groups
    they touch.
    """

    __tablename__ = "daily_rollups"
    apparatus_id: Mapped[int] = mapped_column(ForeignKey("apparatus.id"), primary_key=True)
    day: Mapped[dt.date] = mapped_column(Date, primary_key=True)
    sequence: Mapped[str] = mapped_column(String(200), primary_key=True)
    name: Mapped[str] = mapped_column(String(100), primary_key=True)
    unit: Mapped[str] = mapped_column(String(60), default="")
    runs: Mapped[int] = mapped_column(Integer)
    shots: Mapped[int] = mapped_column(BigInteger)
    successes: Mapped[int | None] = mapped_column(BigInteger)
    trials: Mapped[int | None] = mapped_column(BigInteger)
    # The day's sums over shots of counting figures (runlog.figures.shot_level.ShotSums).
    counted_shots: Mapped[int | None] = mapped_column(BigInteger)
    successes_squares: Mapped[float | None] = mapped_column(Float)
    trials_squares: Mapped[float | None] = mapped_column(Float)
    successes_trials: Mapped[float | None] = mapped_column(Float)
    value_count: Mapped[int] = mapped_column(Integer)
    value_sum: Mapped[float] = mapped_column(Float)
    value_square_sum: Mapped[float] = mapped_column(Float)
    weight_sum: Mapped[float | None] = mapped_column(Float)
    weighted_value_sum: Mapped[float | None] = mapped_column(Float)
    weighted_square_sum: Mapped[float | None] = mapped_column(Float)
    # Runs with a stderr (the Birge ratio's k); a phase's sums of cos and sin; a time's ln T.
    weighted_count: Mapped[int | None] = mapped_column(Integer)
    cosine_sum: Mapped[float | None] = mapped_column(Float)
    sine_sum: Mapped[float | None] = mapped_column(Float)
    weighted_cosine_sum: Mapped[float | None] = mapped_column(Float)
    weighted_sine_sum: Mapped[float | None] = mapped_column(Float)
    positive_count: Mapped[int | None] = mapped_column(Integer)
    log_sum: Mapped[float | None] = mapped_column(Float)
    log_square_sum: Mapped[float | None] = mapped_column(Float)
    log_weight_sum: Mapped[float | None] = mapped_column(Float)
    weighted_log_sum: Mapped[float | None] = mapped_column(Float)
    weighted_log_square_sum: Mapped[float | None] = mapped_column(Float)


class SeriesRollup(Base):
    """One figure pooled over the current runs of one apparatus, lab day, sequence and
    series fingerprint (runlog.store.series_keys; '' for a run without one): the sums of
    :class:`DailyRollup` over the unflagged figures (``runs`` 0 when all are flagged),
    ``held`` the runs that have the figure at all, ``units`` how many units their figures
    came in. A series' drift point is read from here. Refreshed with the daily rollups and
    for the days whose runs changed series."""

    __table__ = Table(
        "series_rollups",
        Base.metadata,
        Column("apparatus_id", Integer, ForeignKey("apparatus.id"), primary_key=True),
        Column("day", Date, primary_key=True),
        Column("sequence", String(200), primary_key=True),
        Column("fingerprint", String(16), primary_key=True),
        Column("name", String(100), primary_key=True),
        Column("held", Integer, nullable=False),
        Column("units", Integer, nullable=False),
        *(column._copy() for column in DailyRollup.__table__.columns if not column.primary_key),
    )


class Alarm(Base):
    """A drift finding to look at: a point outside control limits or a change in level."""

    __tablename__ = "alarms"
    __table_args__ = (UniqueConstraint("apparatus_id", "quantity", "sequence", "series_key", "day", "reason"), Index(None, "status"))
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    apparatus_id: Mapped[int] = mapped_column(ForeignKey("apparatus.id"))
    quantity: Mapped[str] = mapped_column(String(100))
    sequence: Mapped[str] = mapped_column(String(200), default="")  # '' = all sequences
    # The reference series (sequence@fingerprint of its constant parameters); '' = pooled.
    series_key: Mapped[str] = mapped_column(String(300), default="", server_default="")
    day: Mapped[dt.date] = mapped_column(Date)
    reason: Mapped[str] = mapped_column(String(20))  # 'limit' | 'change'
    method: Mapped[str] = mapped_column(String(100))
    value: Mapped[float | None] = mapped_column(Float)
    size: Mapped[float | None] = mapped_column(Float)
    detail: Mapped[str] = mapped_column(Text, default="")
    status: Mapped[str] = mapped_column(String(20), default="open")  # 'open' | 'acknowledged'
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    acknowledged_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime())
    annotation_id: Mapped[int | None] = mapped_column(ForeignKey("annotations.id"))


class IngestLogEntry(Base):
    """One attempt to ingest one file: what, its content hash, and how it ended."""

    __tablename__ = "ingest_log"
    __table_args__ = (Index(None, "sha256"), Index(None, "finished_at"))
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    file: Mapped[str] = mapped_column(Text)
    sha256: Mapped[str] = mapped_column(String(64))
    size: Mapped[int] = mapped_column(BigInteger)
    status: Mapped[str] = mapped_column(String(20))  # ingested | already-present | refused (older catalogues hold "rejected": read as refused)
    reason: Mapped[str | None] = mapped_column(Text)
    runs: Mapped[str | None] = mapped_column(Text)  # comma-separated run keys
    shots: Mapped[int] = mapped_column(Integer, default=0)
    started_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    finished_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    read_seconds: Mapped[float] = mapped_column(Float, default=0.0)
    write_seconds: Mapped[float] = mapped_column(Float, default=0.0)


class Annotation(Base):
    """Free text tied to an apparatus and a time, or to a run ("realigned lattice beam")."""

    __tablename__ = "annotations"
    __table_args__ = (Index(None, "apparatus_id", "at"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    apparatus_id: Mapped[int] = mapped_column(ForeignKey("apparatus.id"))
    run_id: Mapped[int | None] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"))
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    text: Mapped[str] = mapped_column(Text)
    author: Mapped[str | None] = mapped_column(String(200))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())


class RunFile(Base):
    """Which ingested file wrote shots into which run version, and which shot ids.

    A file's shots get consecutive ids, so ``first_shot_id``..``last_shot_id`` with the run
    version name them exactly (NULL for catalogues ingested before revision 0008).
    """

    __tablename__ = "run_files"
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), primary_key=True)
    ingest_id: Mapped[int] = mapped_column(ForeignKey("ingest_log.id"), primary_key=True, index=True)
    shots: Mapped[int | None] = mapped_column(Integer)
    first_shot_id: Mapped[int | None] = mapped_column(BigInteger)
    last_shot_id: Mapped[int | None] = mapped_column(BigInteger)


class FigureRecord(_FigureColumns, Base):
    """One computation of a figure, never changed once written.

    Records its kind, the model and options it was computed with (JSON), the analysis
    version of the shots it used (its run version), how many shots that version had,
    runlog's version and when. Deriving again adds a record; the newest one of a run
    version is in force (copied into ``figures``).
    """

    __tablename__ = "figure_records"
    __table_args__ = (Index(None, "run_id", "name"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"))
    shots: Mapped[int | None] = mapped_column(Integer)


class Withdrawal(Base):
    """A file or a run taken out of the catalogue, with why and by whom; kept after a restore.

    ``runs`` lists the run versions (ids) taken out, ``current`` those of them that were
    current, so a restore puts back exactly what was there.
    """

    __tablename__ = "withdrawals"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    target: Mapped[str] = mapped_column(String(10))  # 'file' | 'run'
    name: Mapped[str] = mapped_column(Text)  # the file's path or the run's key
    sha256: Mapped[str | None] = mapped_column(String(64))
    runs: Mapped[str] = mapped_column(Text)
    current: Mapped[str] = mapped_column(Text, default="")
    reason: Mapped[str] = mapped_column(Text)
    author: Mapped[str | None] = mapped_column(String(200))
    withdrawn_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    restored_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime())
    restored_by: Mapped[str | None] = mapped_column(String(200))


class Pin(Base):
    """A frozen selection: the filter text and when; its shots are in ``pin_runs``."""

    __tablename__ = "pins"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200), unique=True)
    where_text: Mapped[str] = mapped_column(Text)  # the filter
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    author: Mapped[str | None] = mapped_column(String(200))
    runlog_version: Mapped[str] = mapped_column(String(40))
    shots: Mapped[int] = mapped_column(BigInteger)
    runs: Mapped[int] = mapped_column(Integer)


class PinRun(Base):
    """The shots of one run version in a pin, and the figure records then in force.

    ``shot_ids`` are the pinned shots' ids, sorted, as zlib-compressed little-endian int64
    differences; ``figure_records`` the record ids, comma-separated; ``shot_count`` the
    run version's shots at pin time (the exported runs table gives it). ``run_fields``
    (JSON) freezes the run's other exported fields (times, lab day, operator, tags), which
    a later file of the same version or a new tag would otherwise change.
    """

    __tablename__ = "pin_runs"
    pin_id: Mapped[int] = mapped_column(ForeignKey("pins.id", ondelete="CASCADE"), primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id"), primary_key=True, index=True)
    analysis: Mapped[str] = mapped_column(String(200))
    shot_count: Mapped[int] = mapped_column(Integer)
    shots: Mapped[int] = mapped_column(Integer)
    shot_ids: Mapped[bytes] = mapped_column(LargeBinary)
    figure_records: Mapped[str] = mapped_column(Text, default="")
    run_fields: Mapped[str | None] = mapped_column(Text)


class Series(Base):
    """One fit of a figure of many runs against a parameter they differ in (e.g. fringe
    contrast vs walk steps), never changed once written; the newest of a name is in force.

    ``figure`` is the runs' figure (y), ``parameter`` the run parameter (x, constant within
    each run), ``model`` the fitted model; ``where_text`` the filter that chose the runs.
    The fitted parameters are in ``series_values``, the member runs in ``series_members``.
    """

    __tablename__ = "series"
    __table_args__ = (Index(None, "name"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200))
    figure: Mapped[str] = mapped_column(String(100))
    parameter: Mapped[str] = mapped_column(String(200))
    parameter_unit: Mapped[str] = mapped_column(String(60), default="")
    figure_unit: Mapped[str] = mapped_column(String(60), default="")
    model: Mapped[str] = mapped_column(String(40))
    where_text: Mapped[str | None] = mapped_column(Text)
    points: Mapped[int] = mapped_column(Integer)
    chi_square: Mapped[float | None] = mapped_column(Float)
    degrees_of_freedom: Mapped[int] = mapped_column(Integer)
    options: Mapped[str | None] = mapped_column(Text)
    method: Mapped[str] = mapped_column(String(100))
    method_version: Mapped[str] = mapped_column(String(20))
    runlog_version: Mapped[str] = mapped_column(String(40))
    computed_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())


class SeriesValue(Base):
    """A fitted parameter of a series (e.g. ``decay_per_step``) with its standard error."""

    __tablename__ = "series_values"
    series_id: Mapped[int] = mapped_column(ForeignKey("series.id", ondelete="CASCADE"), primary_key=True)
    name: Mapped[str] = mapped_column(String(100), primary_key=True)
    value: Mapped[float] = mapped_column(Float)
    stderr: Mapped[float | None] = mapped_column(Float)
    unit: Mapped[str] = mapped_column(String(60), default="")


class SeriesMember(Base):
    """A run version in a series: its parameter value, figure value and the record used."""

    __tablename__ = "series_members"
    series_id: Mapped[int] = mapped_column(ForeignKey("series.id", ondelete="CASCADE"), primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id"), primary_key=True, index=True)
    record_id: Mapped[int | None] = mapped_column(ForeignKey("figure_records.id"))
    x: Mapped[float] = mapped_column(Float)
    y: Mapped[float] = mapped_column(Float)
    stderr: Mapped[float | None] = mapped_column(Float)


class Monitor(Base):
    """A time series of the lab around the atoms (room temperature, a laser power, ...),
    logged independently of the shots; ``name`` as written in its file, ``unit`` the one
    its values are stored in (docs/monitor-table.md)."""

    __tablename__ = "monitors"
    __table_args__ = (UniqueConstraint("apparatus_id", "name"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    apparatus_id: Mapped[int] = mapped_column(ForeignKey("apparatus.id"))
    name: Mapped[str] = mapped_column(String(200))
    unit: Mapped[str] = mapped_column(String(60), default="")
    value_count: Mapped[int] = mapped_column(BigInteger, default=0)
    first_time: Mapped[dt.datetime | None] = mapped_column(UTCDateTime())
    last_time: Mapped[dt.datetime | None] = mapped_column(UTCDateTime())


class MonitorValue(Base):
    """One logged value of a monitor. On PostgreSQL partitioned by month of ``time``
    (:mod:`runlog.store.partitions`). No foreign key to ``monitors``: rows are written by
    monitor ingest alone, with the id it has just read or made under the writer lock, and a
    per-row check would cost more than the row (as for the shot-level children)."""

    __tablename__ = "monitor_values"
    __table_args__ = {"sqlite_with_rowid": False}
    monitor_id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    time: Mapped[dt.datetime] = mapped_column(UTCDateTime(), primary_key=True)
    value: Mapped[float] = mapped_column(Float)


class MonitorRollup(Base):
    """A monitor downsampled to one ``resolution`` ('minute', 'hour' or 'day' = lab day):
    count, sum, sum of squares, minimum and maximum of its values from ``start`` (the
    period's first instant, UTC) on, maintained at ingest; the mean is sum / count."""

    __tablename__ = "monitor_rollups"
    __table_args__ = {"sqlite_with_rowid": False}
    monitor_id: Mapped[int] = mapped_column(ForeignKey("monitors.id", ondelete="CASCADE"), primary_key=True)
    resolution: Mapped[str] = mapped_column(String(10), primary_key=True)
    start: Mapped[dt.datetime] = mapped_column(UTCDateTime(), primary_key=True)
    value_count: Mapped[int] = mapped_column(BigInteger)
    value_sum: Mapped[float] = mapped_column(Float)
    value_square_sum: Mapped[float] = mapped_column(Float)
    minimum: Mapped[float] = mapped_column(Float)
    maximum: Mapped[float] = mapped_column(Float)


class MonitorFile(Base):
    """Which ingested monitor file brought how many values of which monitor."""

    __tablename__ = "monitor_files"
    ingest_id: Mapped[int] = mapped_column(ForeignKey("ingest_log.id"), primary_key=True)
    monitor_id: Mapped[int] = mapped_column(ForeignKey("monitors.id", ondelete="CASCADE"), primary_key=True, index=True)
    value_count: Mapped[int] = mapped_column(BigInteger)
