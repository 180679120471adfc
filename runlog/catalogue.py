"""The catalogue: runlog's Python API over one store, used by the CLI, the dashboard and tests.

``runlog.open(url)`` returns a :class:`Catalogue`. It opens (and on first use creates) the
store, ingests files, and answers questions about runs, shots and annotations as plain
Python values and pandas DataFrames.

Modules only some callers need (ingest and its file readers, derive, export, drift) are
imported inside the methods that use them, so that a reader such as the dashboard does
not pay for them at start-up.
"""

from __future__ import annotations

import datetime as dt
import getpass
from collections.abc import Iterable
from typing import TYPE_CHECKING
from dataclasses import dataclass, field, replace
from pathlib import Path

from sqlalchemy import and_, bindparam, case, func, select, text
from sqlalchemy.engine import Engine

from runlog.errors import ConfigError, NotFoundError, SchemaVersionError, StoreError
from runlog.store import schema as s
from runlog.store.engine import current_revision, make_engine, redact, resolve_url
from runlog.times import day_start_utc

if TYPE_CHECKING:
    import numpy as np
    import pandas as pd

    import runlog.derive
    from runlog.config import Mapping
    from runlog.ingest import IngestResult, Progress

__all__ = ["Catalogue", "RunInfo", "open_catalogue"]

#: The ingest log's word for a refused file before it was ``refused`` (mapped on read).
_OLD_REFUSED = "rejected"

_RUN_COLUMNS = ("run", "apparatus", "sequence", "shots", "started", "finished", "operator")


@dataclass(frozen=True)
class RunInfo:
    """One run as ``runlog show`` presents it."""

    run: str
    apparatus: str
    sequence: str
    shots: int
    started: dt.datetime
    finished: dt.datetime
    operator: str | None
    notes: str | None
    tags: list[str]
    parameters: dict[str, dict[str, object]]
    measurements: list[str]
    images: dict[str, dict[str, object]]
    figures: dict[str, dict[str, object]] = field(default_factory=dict)
    #: The analysis version shown (the current one unless another was asked for).
    analysis: str = ""
    #: Every version of the run, oldest first (``runlog.store.versions.Version.as_dict``).
    analyses: list[dict[str, object]] = field(default_factory=list)
    #: Every figure record of the shown version, newest first (only when asked for).
    figure_history: list[dict[str, object]] | None = None
    #: Shots left out of every figure because their status does not count ([figures]
    #: counting_status, default ``ok``); they stay in the run and in filters.
    excluded_shots: int = 0
    #: Each monitor of the apparatus over the run's span, first to last shot: count,
    #: mean, minimum, maximum, and the as-of value at the start
    #: (:func:`runlog.monitors.align.over_span`).
    monitors: list[dict[str, object]] = field(default_factory=list)

    def as_dict(self) -> dict[str, object]:
        out = {
            "run": self.run,
            "apparatus": self.apparatus,
            "sequence": self.sequence,
            "shots": self.shots,
            "excluded_shots": self.excluded_shots,
            "started": self.started.isoformat(),
            "finished": self.finished.isoformat(),
            "operator": self.operator,
            "notes": self.notes,
            "tags": self.tags,
            "parameters": self.parameters,
            "measurements": self.measurements,
            "images": self.images,
            "figures": self.figures,
            "analysis": self.analysis,
            "analyses": self.analyses,
            "monitors": self.monitors,
        }
        if self.figure_history is not None:
            out["figure_history"] = self.figure_history
        return out


def _times_us(column) -> "np.ndarray":
    """Integer microseconds since the epoch of a column of aware times."""
    import pandas as pd

    return pd.to_datetime(column, utc=True).dt.as_unit("us").astype("int64").to_numpy()


def _as_utc(value: dt.datetime | dt.date | str | None) -> dt.datetime | None:
    if value is None:
        return None
    if isinstance(value, str):
        value = dt.datetime.fromisoformat(value)
    if isinstance(value, dt.date) and not isinstance(value, dt.datetime):
        value = dt.datetime(value.year, value.month, value.day)
    if value.tzinfo is None:
        value = value.replace(tzinfo=dt.timezone.utc)
    return value.astimezone(dt.timezone.utc)


class Catalogue:
    """A runlog catalogue on SQLite or PostgreSQL."""

    def __init__(self, url: str | None = None, *, create: bool = True):
        self._url = resolve_url(url)
        self.engine: Engine = make_engine(self._url)
        try:
            found = current_revision(self.engine)
        except Exception as error:  # driver errors differ per backend; say which store failed
            self.engine.dispose()
            raise StoreError(f"cannot open catalogue {self.url}: {str(error).splitlines()[0]}") from None
        if found is None and create:
            self.init()
        elif found != s.SCHEMA_REVISION:
            self.engine.dispose()
            from runlog.store.migrate import UNKNOWN_REVISION, known_revisions

            if found is not None and found not in known_revisions():
                raise SchemaVersionError(self.url, found, s.SCHEMA_REVISION, UNKNOWN_REVISION)
            raise SchemaVersionError(self.url, found, s.SCHEMA_REVISION)

    @property
    def url(self) -> str:
        """The catalogue URL with any password hidden."""
        return redact(self._url)

    def init(self) -> str:
        """Create the schema or upgrade it to this runlog's revision; idempotent."""
        from runlog.store.migrate import create_or_upgrade

        before = current_revision(self.engine)
        create_or_upgrade(self.engine)
        if before is not None and before != s.SCHEMA_REVISION:
            self.rebuild_rollups()  # new rollup definitions apply to the runs already stored
        return s.SCHEMA_REVISION

    def close(self) -> None:
        self.engine.dispose()

    def __enter__(self) -> Catalogue:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # --- writing -------------------------------------------------------------------

    def ingest(self, paths: Iterable[str | Path] | str | Path, *, config: str | Path | Mapping | None = None, progress: Progress | None = None, apparatus: str | None = None) -> list[IngestResult]:
        """Ingest shot-table and monitor-table files (folders give their ``*.parquet`` and
        ``*.csv``); one result per file. ``apparatus`` names the apparatus of monitor tables
        that have no apparatus column (docs/monitor-table.md).

        With ``[[rules]]`` in the configuration, each ingested file's runs get those figures
        (``IngestResult.derived``).
        """
        from runlog.config import Mapping, load_config
        from runlog.ingest import ingest_files

        if isinstance(paths, (str, Path)):
            paths = [paths]
        mapping = config if isinstance(config, Mapping) else load_config(config)
        results = ingest_files(self.engine, paths, mapping, progress, apparatus=apparatus)
        for name, declared in mapping.references.items():
            if name in self.apparatus_names():
                self.declare_reference(name, sequence=declared.get("sequence"), vary=declared.get("vary", ()), tolerance=declared.get("tolerance"))
        if not mapping.rules:
            return results
        # The configuration's rules give the newly ingested runs their fitted figures.
        return [replace(r, derived=tuple(self.apply_rules(mapping, runs=r.runs))) if r.status == "ingested" else r for r in results]

    def annotate(self, text: str, *, run: str | None = None, apparatus: str | None = None, at: dt.datetime | str | None = None, author: str | None = None) -> int:
        """Add a note tied to a run, or to an apparatus at a time; returns its id."""
        if not text.strip():
            raise ValueError("a note needs text")
        now = dt.datetime.now(dt.timezone.utc)
        with self.engine.begin() as connection:
            run_id = None
            if run is not None:
                found = self._find_run(connection, run, apparatus)
                run_id, apparatus_id = found.id, found.apparatus_id
                when = _as_utc(at) or found.started
            else:
                if apparatus is None:
                    raise ValueError("a note needs a run, or an apparatus and a time")
                apparatus_id = self._apparatus_id(connection, apparatus)
                when = _as_utc(at) or now
            row = {"apparatus_id": apparatus_id, "run_id": run_id, "at": when, "text": text.strip(), "author": author or _user(), "created_at": now}
            return int(connection.execute(s.Annotation.__table__.insert().returning(s.Annotation.id), row).scalar_one())

    # --- reading -------------------------------------------------------------------

    def runs(self, *, apparatus: str | None = None, sequence: str | None = None, since: dt.datetime | dt.date | str | None = None, until: dt.datetime | dt.date | str | None = None) -> "pd.DataFrame":
        """Runs, newest first: run, apparatus, sequence, shots, started, finished, operator."""
        rows = self.run_records(apparatus=apparatus, sequence=sequence, since=since, until=until)
        return _frame([tuple(r.values()) for r in rows], list(_RUN_COLUMNS))

    def run_records(self, *, apparatus: str | None = None, sequence: str | None = None, since: dt.datetime | dt.date | str | None = None, until: dt.datetime | dt.date | str | None = None) -> list[dict[str, object]]:
        """The rows of :meth:`runs` as plain dicts, without pandas (for quick commands)."""
        query = (
            select(
                s.Run.key.label("run"),
                s.Apparatus.name.label("apparatus"),
                s.Run.sequence,
                s.Run.shot_count.label("shots"),
                s.Run.started,
                s.Run.finished,
                s.Run.operator,
            )
            .join(s.Apparatus, s.Apparatus.id == s.Run.apparatus_id)
            .where(s.Run.is_current)
            .order_by(s.Run.started.desc(), s.Run.id.desc())
        )
        if apparatus is not None:
            query = query.where(s.Apparatus.name == apparatus)
        if sequence is not None:
            query = query.where(s.Run.sequence == sequence)
        if since is not None:
            query = query.where(s.Run.finished >= _as_utc(since))
        if until is not None:
            query = query.where(s.Run.started < _as_utc(until))
        with self.engine.connect() as connection:
            rows = connection.execute(query).all()
        return [dict(zip(_RUN_COLUMNS, row)) for row in rows]

    # --- what the catalogue holds, for pickers and menus ---------------------------------
    # Each asks the database for distinct values only, never for the rows they come from:
    # on a catalogue of 50 000 runs, reading the runs takes a second, these milliseconds.

    def apparatus_names(self) -> list[str]:
        """The apparatus that have runs, sorted by name."""
        has_runs = select(s.Run.id).where(and_(s.Run.apparatus_id == s.Apparatus.id, s.Run.is_current)).exists()
        with self.engine.connect() as connection:
            return sorted(connection.execute(select(s.Apparatus.name).where(has_runs)).scalars())

    def lab_days(self, *, apparatus: str | None = None) -> list[dt.date]:
        """The lab days with runs (of ``apparatus``, else of any apparatus), newest first.

        A run's lab day is the day it started on in the catalogue's lab time zone
        (:attr:`lab_timezone`). Raises :class:`NotFoundError` for an unknown apparatus.
        """
        query = select(s.Run.day).where(and_(s.Run.day.is_not(None), s.Run.is_current)).distinct()
        with self.engine.connect() as connection:
            if apparatus is not None:
                query = query.where(s.Run.apparatus_id == self._apparatus_id(connection, apparatus))
            days = connection.execute(query).scalars().all()
        return sorted(days, reverse=True)

    def sequences(self, *, apparatus: str | None = None) -> list[str]:
        """The sequences with runs (of ``apparatus``, else of any apparatus), sorted.

        Raises :class:`NotFoundError` for an unknown apparatus.
        """
        query = select(s.Run.sequence).where(s.Run.is_current).distinct()
        with self.engine.connect() as connection:
            if apparatus is not None:
                query = query.where(s.Run.apparatus_id == self._apparatus_id(connection, apparatus))
            return sorted(connection.execute(query).scalars())

    def figure_names(self, *, apparatus: str | None = None) -> list[str]:
        """The names of the stored figures (of runs of ``apparatus``, else of any), sorted.

        The names are found by walking the index on the figures' names, one probe per
        name, so this stays fast however many runs have figures. Raises
        :class:`NotFoundError` for an unknown apparatus.
        """
        from runlog.filters import FigureNames

        with self.engine.connect() as connection:
            names = list(FigureNames(connection))
            if apparatus is not None:
                apparatus_id = self._apparatus_id(connection, apparatus)
                held = (
                    select(s.FigureRow.id)
                    .join(s.Run, s.Run.id == s.FigureRow.run_id)
                    .where(and_(s.Run.apparatus_id == apparatus_id, s.Run.is_current, s.FigureRow.name == bindparam("name")))
                    .exists()
                )
                names = [name for name in names if connection.execute(select(held), {"name": name}).scalar()]
        return sorted(names)

    def figure_units(self, *, apparatus: str | None = None) -> "pd.DataFrame":
        """Which figures are stored in which units by which sequences: one row per distinct
        (name, unit, sequence) of the runs of ``apparatus`` (else of any apparatus), sorted.

        A name with more than one unit (``phase``: deg from fringe fits, rad from Ramsey
        fits) has a row per unit; values in different units must not be pooled. Raises
        :class:`NotFoundError` for an unknown apparatus.
        """
        query = select(s.FigureRow.name, s.FigureRow.unit, s.Run.sequence).join(s.Run, s.Run.id == s.FigureRow.run_id).where(s.Run.is_current).distinct()
        with self.engine.connect() as connection:
            if apparatus is not None:
                query = query.where(s.Run.apparatus_id == self._apparatus_id(connection, apparatus))
            rows = connection.execute(query).all()
        # Sorted here, not in SQL: a PostgreSQL collation may order text differently.
        return _frame(sorted(tuple(row) for row in rows), ["name", "unit", "sequence"])

    def run(self, key: str, *, apparatus: str | None = None, analysis: str | None = None, history: bool = False) -> RunInfo:
        """Everything stored about one run (parameters, measurements, images, figures) in
        its current analysis version, or in version ``analysis``; with its versions, and
        (``history=True``) every figure record of that version, newest first."""
        from runlog.store.versions import versions

        with self.engine.connect() as connection:
            found = self._find_run(connection, key, apparatus, analysis)
            apparatus_name = connection.execute(select(s.Apparatus.name).where(s.Apparatus.id == found.apparatus_id)).scalar_one()
            parameters: dict[str, dict[str, object]] = {}
            for name, unit, kind, scanned, number, text_value, low, high in connection.execute(
                select(s.Parameter.name, s.Parameter.unit, s.Parameter.kind, s.RunParameter.scanned, s.RunParameter.number_value, s.RunParameter.text_value, s.RunParameter.minimum, s.RunParameter.maximum)
                .join(s.Parameter, s.Parameter.id == s.RunParameter.parameter_id)
                .where(s.RunParameter.run_id == found.id)
                .order_by(s.Parameter.name)
            ):
                entry: dict[str, object] = {"unit": unit, "scanned": bool(scanned)}
                if scanned:
                    if kind != "text":
                        entry["min"], entry["max"] = low, high
                elif kind == "text":
                    entry["value"] = text_value
                elif kind == "boolean":
                    entry["value"] = bool(number)
                else:
                    entry["value"] = number
                parameters[name] = entry
            measurements = [
                name
                for (name,) in connection.execute(
                    select(s.Measurement.name)
                    .join(s.RunMeasurement, s.RunMeasurement.measurement_id == s.Measurement.id)
                    .where(s.RunMeasurement.run_id == found.id)
                    .order_by(s.Measurement.name)
                )
            ]
            images = {
                name: {"role": role, "sites": sites, "shape": [int(n) for n in shape.split(",")]}
                for name, role, sites, shape in connection.execute(select(s.Image.name, s.Image.role, s.Image.sites, s.Image.shape).where(s.Image.run_id == found.id).order_by(s.Image.id))
            }
            figures = {}
            for row in connection.execute(select(*s.FigureRow.__table__.columns).where(s.FigureRow.run_id == found.id).order_by(s.FigureRow.name)):
                entry = {"value": row.value, "unit": row.unit}
                if row.stderr is not None:
                    entry["stderr"] = row.stderr
                if row.ci_low is not None:
                    entry["ci_low"], entry["ci_high"] = row.ci_low, row.ci_high
                entry["method"] = row.method
                if row.binomial_method is not None:
                    entry.update(binomial_ci_low=row.binomial_ci_low, binomial_ci_high=row.binomial_ci_high, binomial_method=row.binomial_method)
                if row.out_of_range:
                    entry["out_of_range"] = True
                figures[row.name] = entry
            tags = [t for (t,) in connection.execute(select(s.RunTag.tag).where(s.RunTag.run_id == found.id).order_by(s.RunTag.tag))]
            listed = [v.as_dict() for v in versions(_rows_of(connection), found.apparatus_id, found.key)]
            records = _figure_records(connection, found.id) if history else None
            from runlog.monitors.align import over_span

            monitors = over_span(connection, found.apparatus_id, found.started, found.finished)
        return RunInfo(found.key, apparatus_name, found.sequence, found.shot_count, found.started, found.finished, found.operator, found.notes, tags, parameters, measurements, images, figures, found.analysis, listed, records, int(found.excluded_shots or 0), monitors)

    def shots(self, run: str, *, apparatus: str | None = None) -> "pd.DataFrame":
        """The shots of one run, one row each: shot, time, status, ``p.<name>``, ``m.<name>``.

        Units are in ``DataFrame.attrs["units"]``; a shot lacking a parameter or a
        measurement has NaN (numbers) or None (text) there.
        """
        with self.engine.connect() as connection:
            found = self._find_run(connection, run, apparatus)
            shots = _frame(
                connection.execute(select(s.Shot.id, s.Shot.shot, s.Shot.time, s.Shot.status).where(s.Shot.run_id == found.id).order_by(s.Shot.shot)).all(),
                ["id", "shot", "time", "status"],
            )
            units: dict[str, str] = {}
            for pid, name, unit, kind, scanned, number, text_value in connection.execute(
                select(s.Parameter.id, s.Parameter.name, s.Parameter.unit, s.Parameter.kind, s.RunParameter.scanned, s.RunParameter.number_value, s.RunParameter.text_value)
                .join(s.Parameter, s.Parameter.id == s.RunParameter.parameter_id)
                .where(s.RunParameter.run_id == found.id)
                .order_by(s.Parameter.name)
            ):
                column = f"p.{name}"
                units[column] = unit
                if not scanned:
                    value = text_value if kind == "text" else (bool(number) if kind == "boolean" else number)
                    shots[column] = [value] * len(shots)
                    continue
                values = dict(
                    connection.execute(
                        select(s.ShotParameter.shot_id, s.ShotParameter.text_value if kind == "text" else s.ShotParameter.number_value)
                        .join(s.Shot, s.Shot.id == s.ShotParameter.shot_id)
                        .where(and_(s.Shot.run_id == found.id, s.ShotParameter.parameter_id == pid))
                    ).all()
                )
                shots[column] = shots["id"].map(values)
            measured = connection.execute(
                select(s.Measurement.id, s.Measurement.name, s.Measurement.unit)
                .join(s.RunMeasurement, s.RunMeasurement.measurement_id == s.Measurement.id)
                .where(s.RunMeasurement.run_id == found.id)
                .order_by(s.Measurement.name)
            ).all()
            if measured:
                # Column names come from integer ids, never from user text.
                columns = ", ".join(f"sm.{s.measurement_column(mid)}" for mid, _, _ in measured)
                values = connection.execute(
                    text(f"SELECT sm.shot_id, {columns} FROM shot_measurements sm JOIN shots ON shots.id = sm.shot_id WHERE shots.run_id = :r"),
                    {"r": found.id},
                ).all()
                wide = _frame(values, ["id", *[f"m.{name}" for _, name, _ in measured]]).set_index("id").astype(float)
                shots = shots.join(wide, on="id")
                for _, name, unit in measured:
                    units[f"m.{name}"] = unit
        shots.insert(0, "run", found.key)
        shots = shots.drop(columns=["id"])
        shots.attrs["units"] = units
        return shots

    def occupancy(self, run: str, image: str | None = None, *, apparatus: str | None = None) -> np.ndarray:
        """Site occupancy of one image of a run as a (shots, sites) boolean array, by shot index.

        ``image`` defaults to the run's loading image.
        """
        import numpy as np

        with self.engine.connect() as connection:
            found = self._find_run(connection, run, apparatus)
            query = select(s.Image.id, s.Image.sites, s.Image.name).where(s.Image.run_id == found.id)
            query = query.where(s.Image.name == image) if image else query.where(s.Image.role == "loading")
            row = connection.execute(query).first()
            if row is None:
                raise NotFoundError("occupancy image", image or "(loading)", f"run '{run}'")
            image_id, sites, _ = row
            blobs = connection.execute(
                select(s.Occupancy.bits).join(s.Shot, s.Shot.id == s.Occupancy.shot_id).where(and_(s.Shot.run_id == found.id, s.Occupancy.image_id == image_id)).order_by(s.Shot.shot)
            ).scalars().all()
        if not blobs:
            return np.zeros((0, sites), dtype=bool)
        packed = np.frombuffer(b"".join(bytes(b) for b in blobs), dtype=np.uint8).reshape(len(blobs), -1)
        return np.unpackbits(packed, axis=1, count=sites).astype(bool)

    def photon_counts(self, run: str, image: str | None = None, *, apparatus: str | None = None) -> tuple[np.ndarray, float | None]:
        """Per-site photon counts of one image of a run as a (shots, sites) float array, by
        shot index, and the threshold ingest derived the occupancy with (``None``: the file
        carried the occupancy). ``image`` defaults to the run's loading image.
        """
        import numpy as np

        with self.engine.connect() as connection:
            found = self._find_run(connection, run, apparatus)
            query = select(s.Image.id, s.Image.name).where(s.Image.run_id == found.id)
            query = query.where(s.Image.name == image) if image else query.where(s.Image.role == "loading")
            picked = connection.execute(query).first()
            rows = [] if picked is None else connection.execute(select(s.PhotonCounts.shots, s.PhotonCounts.counts, s.PhotonCounts.sites, s.PhotonCounts.threshold).where(s.PhotonCounts.image_id == picked.id).order_by(s.PhotonCounts.id)).all()
        if not rows:
            raise NotFoundError("photon counts of image", image or "(loading)", f"run '{run}' has none (the files carried no counts.<image> column)")
        shots = np.concatenate([np.frombuffer(bytes(r.shots), dtype="<i8") for r in rows])
        counts = np.concatenate([np.frombuffer(bytes(r.counts), dtype="<f8").reshape(-1, r.sites) for r in rows])
        return counts[np.argsort(shots, kind="stable")], rows[-1].threshold

    def annotations(self, *, apparatus: str | None = None, since: dt.datetime | dt.date | str | None = None) -> "pd.DataFrame":
        """Annotations, oldest first: apparatus, run, at, text, author."""
        query = (
            select(s.Apparatus.name.label("apparatus"), s.Run.key.label("run"), s.Annotation.at, s.Annotation.text, s.Annotation.author)
            .join(s.Apparatus, s.Apparatus.id == s.Annotation.apparatus_id)
            .outerjoin(s.Run, s.Run.id == s.Annotation.run_id)
            .order_by(s.Annotation.at, s.Annotation.id)
        )
        if apparatus is not None:
            query = query.where(s.Apparatus.name == apparatus)
        if since is not None:
            query = query.where(s.Annotation.at >= _as_utc(since))
        with self.engine.connect() as connection:
            frame = _frame(connection.execute(query).all(), ["apparatus", "run", "at", "text", "author"], dtype=object)
        return frame.astype({"at": "datetime64[us, UTC]"}) if len(frame) else frame

    def ingest_log(self, *, limit: int = 100, status: str | None = None) -> "pd.DataFrame":
        """The latest ingest attempts, newest first; ``status`` is ``ingested``,
        ``already-present`` or ``refused``.

        Catalogues written before the status of a refusal was called ``refused`` hold
        ``rejected``: it is read, and selected by ``status="refused"``, as ``refused``.
        """
        log = s.IngestLogEntry
        said = case((log.status == _OLD_REFUSED, "refused"), else_=log.status).label("status")
        query = select(log.file, said, log.reason, log.runs, log.shots, log.sha256, log.finished_at).order_by(log.id.desc()).limit(limit)
        if status is not None:
            wanted = "refused" if status == _OLD_REFUSED else status
            query = query.where(log.status.in_(("refused", _OLD_REFUSED)) if wanted == "refused" else log.status == wanted)
        with self.engine.connect() as connection:
            return _frame(connection.execute(query).all(), ["file", "status", "reason", "runs", "shots", "sha256", "finished_at"])

    def counts(self) -> dict[str, int]:
        """How many apparatus, runs and shots the catalogue holds."""
        with self.engine.connect() as connection:
            return {
                "apparatus": connection.execute(select(func.count()).select_from(s.Apparatus)).scalar_one(),
                "runs": connection.execute(select(func.count()).select_from(s.Run).where(s.Run.is_current)).scalar_one(),
                "shots": int(connection.execute(select(func.coalesce(func.sum(s.Run.shot_count), 0)).where(s.Run.is_current)).scalar_one()),
            }

    def site_counts(self, run: str, name: str = "fill", *, apparatus: str | None = None) -> tuple[np.ndarray, np.ndarray, tuple[int, ...]]:
        """Per-site ``(successes, trials, lattice shape)`` of a run: ``fill`` (loaded shots /
        shots) or ``survival`` (survived / loaded). Divide for the map; 0 trials means never loaded.
        """
        import numpy as np

        with self.engine.connect() as connection:
            found = self._find_run(connection, run, apparatus)
            row = connection.execute(select(s.SiteCounts.successes, s.SiteCounts.trials).where(and_(s.SiteCounts.run_id == found.id, s.SiteCounts.name == name))).first()
            if row is None:
                raise NotFoundError("per-site counts", name, f"run '{run}' has none; known: fill, survival")
            shape = connection.execute(select(s.Image.shape).where(and_(s.Image.run_id == found.id, s.Image.role == "loading"))).scalar()
        successes = np.frombuffer(bytes(row[0]), dtype="<i8").copy()
        trials = np.frombuffer(bytes(row[1]), dtype="<i8").copy()
        dims = tuple(int(n) for n in shape.split(",")) if shape else (len(successes),)
        return successes, trials, dims

    def save_figures(self, run: str, kind: str, figures, *, apparatus: str | None = None, options: dict[str, object] | None = None) -> list[int]:
        """Record ``figures`` (``runlog.Figure``) for the run's current version, computed with
        ``options``; they replace those of the same names in force (the old records stay).
        Returns the new record ids."""
        from runlog.store.bulk import open_writer
        from runlog.store.figures import store_figures

        from runlog.store.rollups import as_date, refresh_rollups

        with self.engine.connect() as connection:
            found = self._find_run(connection, run, apparatus)
        writer = open_writer(self.engine)
        try:
            records = store_figures(writer, found.id, kind, list(figures), options=options)
            if found.day is not None:
                refresh_rollups(writer, [(found.apparatus_id, as_date(found.day), found.sequence)])
            writer.commit()
        finally:
            writer.close()
        return records

    def derive(self, run: str, kind: str, **options) -> "runlog.derive.DeriveResult":
        """Compute and store the figures of ``kind`` for one run (see :func:`runlog.derive.derive`).

        Raises ``FitError`` when they cannot be computed; nothing is stored then.
        """
        from runlog.derive import derive

        return derive(self, run, kind, **options)

    def apply_rules(self, rules: str | Path | Mapping | Iterable[dict], runs: Iterable[str] | None = None) -> list:
        """Apply the ``[[rules]]`` of a runlog.toml (a path, a ``Mapping`` or the rule tables)
        to the matching runs, all of them or those keyed in ``runs``.

        One outcome per (run, rule): a ``DeriveResult``, or the ``FitError`` of a run the
        rule could not be applied to (nothing stored for it).
        """
        from runlog.config import Mapping, load_config
        from runlog.derive import apply_rules

        settings = None
        if isinstance(rules, (str, Path)):
            rules = load_config(rules)
        if isinstance(rules, Mapping):
            rules, settings = rules.rules, rules.apparatus_settings
        return apply_rules(self, rules, runs, apparatus_settings=settings)

    # --- analysis versions, withdrawals ---------------------------------------------

    def derive_series(self, name: str, figure: str, parameter: str, *, model: str = "exponential", where: str | None = None) -> dict[str, object]:
        """Fit ``figure`` of many runs against their constant ``parameter`` with ``model``
        (``exponential``, ``power_law``, ``linear``: :mod:`runlog.figures.across_runs`), over
        the current runs holding shots ``where`` selects (default: all), and store it as the
        series ``name`` with its member runs (``runlog.run_series``). Returns the series."""
        from runlog.run_series import derive_series

        return derive_series(self.engine, name, figure, parameter, model=model, where=where)

    def series_fits(self, name: str | None = None, *, history: bool = False) -> list[dict[str, object]]:
        """The series across runs in force (newest fit of each name), or every fit of ``name`` with
        ``history``: fitted values with standard errors, χ², member runs (x, y, stderr)."""
        from runlog.run_series import series

        with self.engine.connect() as connection:
            return series(connection, name, history=history)

    def analyses(self, run: str, *, apparatus: str | None = None) -> list[dict[str, object]]:
        """Every analysis version of ``run``, oldest first: name, current, withdrawn, shots,
        when it came and from which files."""
        from runlog.store.versions import versions

        with self.engine.connect() as connection:
            found = self._any_version(connection, run, apparatus)
            return [v.as_dict() for v in versions(_rows_of(connection), found.apparatus_id, found.key)]

    def use_analysis(self, run: str, analysis: str, *, apparatus: str | None = None) -> dict[str, object]:
        """Make version ``analysis`` of ``run`` the current one; figures, rollups, drift,
        selections and exports follow it (the rollups change in the same transaction)."""
        from runlog.store.bulk import open_writer
        from runlog.store.versions import use_version

        with self.engine.connect() as connection:
            found = self._any_version(connection, run, apparatus)
        writer = open_writer(self.engine)
        try:
            before, now = use_version(writer, found.apparatus_id, found.key, analysis)
            writer.commit()
        finally:
            writer.close()
        return {"run": found.key, "before": before, "current": now}

    def withdraw(self, *, file: str | Path | None = None, run: str | None = None, reason: str, apparatus: str | None = None, author: str | None = None) -> dict[str, object]:
        """Take a file's run versions, or a whole run, out of the catalogue with a reason.

        Withdrawn data leaves figures, rollups, drift, selections and exports; it is kept
        (and listed by :meth:`withdrawals`) and :meth:`restore` brings it back exactly. A
        file can be withdrawn when the run versions it wrote hold no other file's shots.
        """
        from runlog.store.bulk import open_writer
        from runlog.store.versions import withdraw

        if (file is None) == (run is None):
            raise ValueError("withdraw needs a file or a run, not both")
        if not reason or not reason.strip():
            raise ValueError("a withdrawal needs a reason (--reason)")
        with self.engine.connect() as connection:
            if run is not None:
                found = self._any_version(connection, run, apparatus)
                ids = {int(r) for (r,) in connection.execute(select(s.Run.id).where(and_(s.Run.apparatus_id == found.apparatus_id, s.Run.key == found.key)))}
                targets, name, sha = [(found.apparatus_id, found.key, ids)], found.key, None
            else:
                targets, name, sha = self._file_runs(connection, file)
        writer = open_writer(self.engine)
        try:
            withdrawal = withdraw(writer, target="run" if run is not None else "file", name=name, runs=targets, reason=reason, author=author or _user(), sha256=sha)
            writer.commit()
        finally:
            writer.close()
        return next(w for w in self.withdrawals() if w["id"] == withdrawal)

    def restore(self, *, file: str | Path | None = None, run: str | None = None, apparatus: str | None = None, author: str | None = None) -> list[dict[str, object]]:
        """Undo the withdrawals of a file, or every withdrawal touching a run; returns them."""
        from runlog.store.bulk import open_writer
        from runlog.store.versions import restore

        if (file is None) == (run is None):
            raise ValueError("restore needs a file or a run, not both")
        with self.engine.connect() as connection:
            open_ones = connection.execute(select(*s.Withdrawal.__table__.columns).where(s.Withdrawal.restored_at.is_(None)).order_by(s.Withdrawal.id.desc())).all()
            if run is not None:
                found = self._any_version(connection, run, apparatus)
                ids = {int(r) for (r,) in connection.execute(select(s.Run.id).where(and_(s.Run.apparatus_id == found.apparatus_id, s.Run.key == found.key)))}
                chosen = [w.id for w in open_ones if ids & {int(i) for i in w.runs.split(",") if i}]
                label = f"run '{run}'"
            else:
                sha = _sha_of(file)
                chosen = [w.id for w in open_ones if w.target == "file" and (w.name in _file_names(file) or (sha is not None and w.sha256 == sha))]
                label = f"file {file}"
        if not chosen:
            raise NotFoundError("withdrawal of", label, "nothing of it is withdrawn")
        writer = open_writer(self.engine)
        try:
            for withdrawal in chosen:
                restore(writer, withdrawal, author or _user())
            writer.commit()
        finally:
            writer.close()
        return [w for w in self.withdrawals() if w["id"] in chosen]

    def withdrawals(self) -> list[dict[str, object]]:
        """Every withdrawal, newest first: what, why, who, when, and when it was restored."""
        from runlog.store.versions import withdrawals

        with self.engine.connect() as connection:
            return withdrawals(_rows_of(connection))

    def figure_history(self, run: str, *, apparatus: str | None = None, analysis: str | None = None) -> list[dict[str, object]]:
        """Every figure record of the run's current version (or of ``analysis``), newest
        first, with kind, model, options, analysis version, runlog version and time."""
        with self.engine.connect() as connection:
            found = self._find_run(connection, run, apparatus, analysis)
            return _figure_records(connection, found.id)

    def sequence_fit(self, apparatus: str, sequence: str) -> dict[str, str] | None:
        """What the newest stored fit of a run of ``sequence`` on ``apparatus`` was made
        with: ``kind``, ``x`` (the scanned parameter; ``None`` when derive chose the only
        one), ``y`` (the measurement) and ``run`` (that run's key); ``None`` when no current
        run of the sequence has a fit of a named measurement. Used to draw a run that has no
        fit of its own."""
        import json

        fr = s.FigureRecord
        query = (
            select(fr.kind, fr.options, s.Run.key)
            .join(s.Run, s.Run.id == fr.run_id)
            .join(s.Apparatus, s.Apparatus.id == s.Run.apparatus_id)
            .where(and_(s.Apparatus.name == apparatus, s.Run.sequence == sequence, s.Run.is_current, fr.options.is_not(None)))
            .order_by(fr.id.desc())
        )
        with self.engine.connect() as connection:
            for kind, options, key in connection.execute(query):
                made_with = json.loads(options) if options else {}
                if isinstance(made_with.get("y"), str):
                    x = made_with.get("x")
                    return {"kind": kind, "x": x if isinstance(x, str) else None, "y": made_with["y"], "run": key}
        return None

    def impact(self, run: str, *, apparatus: str | None = None, from_analysis: str | None = None, to_analysis: str | None = None) -> list[dict[str, object]]:
        """What moved between two analysis versions of ``run`` (default: the current one and
        the one before; with one version, its figure records in force and the ones before):
        per figure, old and new value ± stderr, the difference in combined standard errors,
        the drift point it moves and the pins holding the old version (``runlog.impact``)."""
        from runlog.impact import impact

        with self.engine.connect() as connection:
            found = self._any_version(connection, run, apparatus)
            return impact(_rows_of(connection), found.apparatus_id, found.key, from_analysis, to_analysis)

    def _any_version(self, connection, key: str, apparatus: str | None):
        """The run's current version, else (a withdrawn run) its newest version."""
        try:
            return self._find_run(connection, key, apparatus)
        except NotFoundError:
            query = select(*s.Run.__table__.columns).where(s.Run.key == key).order_by(s.Run.id.desc())
            if apparatus is not None:
                query = query.join(s.Apparatus, s.Apparatus.id == s.Run.apparatus_id).where(s.Apparatus.name == apparatus)
            found = connection.execute(query).first()
            if found is None:
                raise
            return found

    def _file_runs(self, connection, file: str | Path):
        """The run versions an ingested file wrote: ([(apparatus id, key, {run ids})], name, sha)."""
        sha = _sha_of(file)
        log = s.IngestLogEntry
        entries = connection.execute(
            select(log.id, log.file, log.sha256).where(and_(log.status == "ingested", (log.file.in_(_file_names(file))) | (log.sha256 == (sha or "")))).order_by(log.id)
        ).all()
        if not entries:
            raise NotFoundError("ingested file", str(file), "the ingest log holds no file of that name or content: give the path it was ingested from")
        ingest_ids = {int(e.id) for e in entries}
        rows = connection.execute(
            select(s.Run.id, s.Run.apparatus_id, s.Run.key, s.Run.analysis).join(s.RunFile, s.RunFile.run_id == s.Run.id).where(s.RunFile.ingest_id.in_(ingest_ids))
        ).all()
        targets: dict[tuple[int, str], set[int]] = {}
        for run_id, apparatus_id, key, analysis in rows:
            others = connection.execute(select(s.RunFile.ingest_id).where(and_(s.RunFile.run_id == run_id, s.RunFile.ingest_id.not_in(ingest_ids)))).first()
            if others is not None:
                raise StoreError(
                    f"run '{key}' (analysis '{analysis}') also holds shots of other files: a file can be withdrawn when the run "
                    f"versions it wrote came from it alone; withdraw the run instead (--run {key})"
                )
            targets.setdefault((int(apparatus_id), key), set()).add(int(run_id))
        return [(a, k, ids) for (a, k), ids in sorted(targets.items())], str(entries[-1].file), sha or entries[-1].sha256

    # --- selections and exports ---------------------------------------------------

    def select(self, where: str | None = None, *, columns: Iterable[str] | None = None, limit: int | None = None, monitors: Iterable[str] = ()) -> "pd.DataFrame":
        """Shots chosen by a filter expression (docs/filters.md), one row each; units in attrs.
        ``monitors``: a column ``monitor.<name>`` each, the monitor's as-of value at the
        shot's time (last value at or before it, at most 600 s before; docs/filters.md)."""
        from runlog.selection import select_shots

        return select_shots(self, where, columns=columns, limit=limit, monitors=tuple(monitors))

    def pin(self, name: str, where: str, *, author: str | None = None) -> dict[str, object]:
        """Freeze the shots ``where`` selects now, with their analysis versions and the
        figure records in force, under ``name`` (``runlog.pins``); ``export(None, out,
        pin=name)`` writes them again byte for byte later. Returns the pin as :meth:`pins` lists it."""
        from runlog.pins import make_pin

        made = make_pin(self.engine, name, where, author=author or _user())
        return next(p for p in self.pins() if p["name"] == made.name)

    def pins(self) -> list[dict[str, object]]:
        """Every pin: filter, when, by whom, shots, runs, the analysis versions it holds, and
        ``changes``: what the catalogue as it stands would change in it (newer analysis
        versions, figures derived again), in the form of the impact report."""
        from runlog.pins import pins

        with self.engine.connect() as connection:
            return pins(connection)

    def export(self, where: str | None, out: str | Path, **options):
        """Write the shots chosen by ``where`` (or ``pin=NAME``: a pinned selection) as a
        Frictionless Data Package (docs/export.md)."""
        from runlog.export import export

        return export(self, where, Path(out), **options)

    def export_again(self, spec: str | Path, *, out: str | Path | None = None):
        """Re-run a saved export (its ``export.toml``) and say whether the data still hash the same."""
        from runlog.export import export_spec

        return export_spec(self, Path(spec), out=None if out is None else Path(out))

    # --- drift -----------------------------------------------------------------------

    @property
    def lab_timezone(self) -> str:
        """The IANA time zone that defines lab days (default UTC)."""
        with self.engine.connect() as connection:
            found = connection.execute(select(s.Setting.value).where(s.Setting.key == "lab_timezone")).scalar()
        return found or "UTC"

    def set_lab_timezone(self, name: str) -> int:
        """Set the lab's time zone; recomputes every run's lab day and every rollup."""
        from runlog.store.bulk import open_writer
        from runlog.store.rollups import check_timezone, rebuild_rollups

        check_timezone(name)
        writer = open_writer(self.engine)
        try:
            writer.execute("DELETE FROM settings WHERE key = 'lab_timezone'")
            writer.execute("INSERT INTO settings (key, value) VALUES ('lab_timezone', :v)", {"v": name})
            groups = rebuild_rollups(writer)
            writer.commit()
        finally:
            writer.close()
        return groups

    def rebuild_rollups(self) -> int:
        """Recompute all lab days and daily rollups (after an upgrade); returns the groups."""
        from runlog.store.bulk import open_writer
        from runlog.store.rollups import rebuild_rollups

        writer = open_writer(self.engine)
        try:
            groups = rebuild_rollups(writer)
            writer.commit()
        finally:
            writer.close()
        return groups

    def drift(self, quantity: str, *, apparatus: str | None = None, sequence: str | None = None, series: str | None = None, pooled: bool = False, since: dt.date | str | None = None, until: dt.date | str | None = None, baseline_days: int | None = None, baseline: tuple[dt.date | str, dt.date | str] | None = None, parameters: dict[str, tuple[float, float]] | None = None, record_alarms: bool = True):
        """Daily points, control limits, changes and alarms of one quantity.

        By default for the apparatus' reference series of ``quantity`` (within ``sequence``
        if given); ``series`` names another by its key (``sequence@fingerprint``),
        ``pooled`` takes every run (of ``sequence``). ``baseline_days``: in-control lab days
        in the rolling baseline (default 28); ``baseline``: a fixed range of days instead.
        ``parameters`` restricts to runs whose parameter values (in their stored units) lie
        in the given ``(low, high)`` ranges; alarms are recorded only for unfiltered drift.
        """
        from dataclasses import replace as replaced
        from zoneinfo import ZoneInfo

        from runlog.drift import alarms as alarm_store
        from runlog.drift.detect import THRESHOLDS
        from runlog.drift.series import drift_of

        since, until = _as_day(since), _as_day(until)
        if baseline is not None:
            baseline = (_as_day(baseline[0]), _as_day(baseline[1]))
        thresholds = THRESHOLDS if baseline_days is None else replaced(THRESHOLDS, window=int(baseline_days))
        zone = ZoneInfo(self.lab_timezone)
        # One snapshot for the several reads of a drift (the series' runs, then their
        # figures): a new analysis version committed between them would leave no points.
        options = {"isolation_level": "REPEATABLE READ"} if self.engine.dialect.name == "postgresql" else {}
        with self.engine.connect().execution_options(**options) as connection:
            result = drift_of(connection, quantity, apparatus=apparatus, sequence=sequence, series=series, pooled=pooled, since=since, until=until, baseline=baseline, parameters=parameters, thresholds=thresholds, zone=zone)
        if record_alarms and result.points and not parameters and baseline is None and since is None and until is None:
            # A writer from the start on SQLite: a deferred transaction that read first
            # could not become a writer once another process had recorded alarms.
            with self.engine.connect().execution_options(sqlite_begin="IMMEDIATE") as connection, connection.begin():
                result.alarms = alarm_store.record(connection, result)
        if result.points:
            notes = self.annotations(apparatus=result.apparatus, since=day_start_utc(result.points[0].date, days=-1))
            last = day_start_utc(result.points[-1].date, days=2)
            result.annotations = [
                {"at": row.at.to_pydatetime(), "run": None if row.run is None or row.run != row.run else row.run, "text": row.text}
                for row in notes.itertuples(index=False)
                if row.at <= last
            ]
        return result

    def series(self, quantity: str, *, apparatus: str | None = None) -> list[dict[str, object]]:
        """The series of runs holding ``quantity`` on an apparatus (sequence + constant
        settings), most days first; the reference series is marked."""
        from runlog.drift import reference
        from runlog.drift.series import _apparatus_id

        with self.engine.connect() as connection:
            apparatus_id, _ = _apparatus_id(connection, quantity, apparatus)
            found = reference.series_of(connection, apparatus_id, quantity)
            chosen = reference.pick_reference(connection, apparatus_id, found)
            return [
                {**reference.describe(e), "days": e["days"], "runs": e["runs"], "first": e["first"].isoformat(), "last": e["last"].isoformat(), "reference": chosen is not None and e["key"] == chosen["key"]}
                for e in found
            ]

    def stability(self, quantity: str, *, apparatus: str | None = None, series: str | None = None) -> dict[str, object]:
        """The Allan deviation of ``quantity`` over the runs of its reference series (or
        ``series``) and what it means for the lab (:mod:`runlog.drift.steadiness`)."""
        from runlog.drift import reference
        from runlog.drift.series import _apparatus_id
        from runlog.drift.steadiness import steadiness

        with self.engine.connect() as connection:
            apparatus_id, _ = _apparatus_id(connection, quantity, apparatus)
            found = reference.series_of(connection, apparatus_id, quantity)
            chosen = next((e for e in found if series in (e["key"], *[m["series"].key for m in e["members"]])), None) if series else reference.pick_reference(connection, apparatus_id, found)
            if chosen is None:
                raise NotFoundError("series", series or quantity)
            runs = reference.chain_runs(connection, apparatus_id, quantity, chosen)
            unit = connection.execute(select(s.FigureRow.unit).where(s.FigureRow.run_id.in_(runs), s.FigureRow.name == quantity).limit(1)).scalar() or ""
            result = steadiness(connection, quantity, runs, unit)
        return {"quantity": quantity, "series": reference.describe(chosen), "unit": unit, **result}

    def declare_reference(self, apparatus: str, *, sequence: str | None = None, vary: Iterable[str] = (), tolerance: float | None = None) -> None:
        """Declare an apparatus' reference sequence, the parameters that may vary without
        starting a new series, and the relative rounding of constant values
        (``[reference."NAME"]`` in runlog.toml does the same at ingest)."""
        from runlog.drift.reference import DEFAULT_TOLERANCE, Declaration, declare

        if tolerance is not None and not (0 < tolerance < 1):
            raise ConfigError("reference", f"tolerance must lie between 0 and 1, got {tolerance}")
        with self.engine.begin() as connection:
            declare(connection, self._apparatus_id(connection, apparatus), Declaration(sequence, frozenset(vary), DEFAULT_TOLERANCE if tolerance is None else float(tolerance)))

    def compare(self, run_a: str, run_b: str, figure: str = "survival", *, apparatus: str | None = None):
        """``figure`` of run A minus run B, with Newcombe's hybrid score interval (95 %).

        Only for counting figures, whose counts are stored.
        """
        from runlog.figures.counting import compare_proportions

        counts = []
        with self.engine.connect() as connection:
            for key in (run_a, run_b):
                found = self._find_run(connection, key, apparatus)
                row = connection.execute(select(s.FigureRow.successes, s.FigureRow.trials).where(and_(s.FigureRow.run_id == found.id, s.FigureRow.name == figure))).first()
                if row is None or row.trials is None:
                    raise NotFoundError("counted figure", figure, f"run '{key}' has no counts for it")
                counts += [int(row.successes), int(row.trials)]
        return compare_proportions(*counts)

    def figures(self, *, apparatus: str | None = None, since: dt.date | str | None = None, until: dt.date | str | None = None, names: Iterable[str] | None = None, runs: Iterable[str] | None = None) -> "pd.DataFrame":
        """Stored figures, one row per run and figure, by lab day: run, apparatus, sequence,
        day, started, name, value, stderr, ci_low, ci_high, unit, method; for counting
        figures also binomial_ci_low, binomial_ci_high (the pooled interval) and
        binomial_method (ci_low/ci_high are shot-level); out_of_range (a fitted value
        outside its physical range, left out of drift)."""
        query = (
            select(s.Run.key.label("run"), s.Apparatus.name.label("apparatus"), s.Run.sequence, s.Run.day, s.Run.started, s.FigureRow.name, s.FigureRow.value, s.FigureRow.stderr, s.FigureRow.ci_low, s.FigureRow.ci_high, s.FigureRow.unit, s.FigureRow.method, s.FigureRow.binomial_ci_low, s.FigureRow.binomial_ci_high, s.FigureRow.binomial_method, s.FigureRow.out_of_range)
            .join(s.Run, s.Run.id == s.FigureRow.run_id)
            .join(s.Apparatus, s.Apparatus.id == s.Run.apparatus_id)
            .where(s.Run.is_current)
            .order_by(s.Run.started, s.Run.id, s.FigureRow.name)
        )
        if apparatus is not None:
            query = query.where(s.Apparatus.name == apparatus)
        if since is not None:
            query = query.where(s.Run.day >= _as_day(since))
        if until is not None:
            query = query.where(s.Run.day <= _as_day(until))
        if names is not None:
            query = query.where(s.FigureRow.name.in_(list(names)))
        if runs is not None:
            query = query.where(s.Run.key.in_(list(runs)))
        with self.engine.connect() as connection:
            rows = connection.execute(query).all()
        return _frame(rows, ["run", "apparatus", "sequence", "day", "started", "name", "value", "stderr", "ci_low", "ci_high", "unit", "method", "binomial_ci_low", "binomial_ci_high", "binomial_method", "out_of_range"])

    def calibrations(self, *, apparatus: str | None = None, names: Iterable[str] | None = None) -> list:
        """The calibration register: per apparatus, the latest stored value of each
        calibration figure, its run and when (:func:`runlog.calibrations.current_calibrations`)."""
        from runlog.calibrations import current_calibrations

        return current_calibrations(self, apparatus=apparatus, names=names)

    def parameters(self, *, apparatus: str | None = None) -> "pd.DataFrame":
        """Every parameter with its stored unit, kind, value range over runs and run count."""
        rp = s.RunParameter
        query = (
            select(
                s.Parameter.name,
                s.Parameter.unit,
                s.Parameter.kind,
                func.min(func.coalesce(rp.number_value, rp.minimum)),
                func.max(func.coalesce(rp.number_value, rp.maximum)),
                func.count(rp.run_id),
            )
            .join(rp, rp.parameter_id == s.Parameter.id)
            .group_by(s.Parameter.id, s.Parameter.name, s.Parameter.unit, s.Parameter.kind)
            .order_by(s.Parameter.name)
        )
        if apparatus is not None:
            query = query.join(s.Run, s.Run.id == rp.run_id).join(s.Apparatus, s.Apparatus.id == s.Run.apparatus_id).where(s.Apparatus.name == apparatus)
        query = query.where(rp.run_id.in_(select(s.Run.id).where(s.Run.is_current)))
        with self.engine.connect() as connection:
            rows = connection.execute(query).all()
        return _frame(rows, ["name", "unit", "kind", "min", "max", "runs"])

    def new_alarms(self, *, apparatus: str | None = None) -> list[dict[str, object]]:
        """Judge drift (:meth:`check_drift`) and return only the alarms it recorded now:
        what ``runlog watch`` reports after each ingest (an alarm is recorded once)."""
        before = {a["id"] for a in self.alarms(status=None, apparatus=apparatus)}
        self.check_drift(apparatus=apparatus)
        return [a for a in self.alarms(status=None, apparatus=apparatus) if a["id"] not in before]

    def check_drift(self, *, apparatus: str | None = None) -> list[dict[str, object]]:
        """Judge the reference series of every quantity of every apparatus and record
        alarms (each once); returns the open ones."""
        with self.engine.connect() as connection:
            query = select(s.Apparatus.name, s.DailyRollup.name).join(s.Apparatus, s.Apparatus.id == s.DailyRollup.apparatus_id).distinct()
            if apparatus is not None:
                query = query.where(s.Apparatus.name == apparatus)
            names = connection.execute(query).all()
        for apparatus_name, quantity in sorted(names):
            try:
                self.drift(quantity, apparatus=apparatus_name)
            except NotFoundError:
                continue  # a name stored in several units within one series: not judged
        return self.alarms(apparatus=apparatus)

    def alarms(self, *, status: str | None = "open", apparatus: str | None = None) -> list[dict[str, object]]:
        """Recorded alarms (open ones by default), oldest first."""
        from runlog.drift.alarms import list_alarms

        with self.engine.connect() as connection:
            return list_alarms(connection, status=status, apparatus=apparatus)

    def acknowledge(self, alarm_id: int, note: str = "", *, author: str | None = None, accept: bool = False) -> int:
        """Acknowledge an alarm; the note becomes an annotation on its day. With ``accept``
        the level since the alarm's day becomes the new reference (a new baseline from that
        day). Returns the annotation id."""
        from zoneinfo import ZoneInfo

        from runlog.drift.alarms import acknowledge

        zone = ZoneInfo(self.lab_timezone)
        with self.engine.begin() as connection:
            return acknowledge(connection, alarm_id, note, zone, author, accept=accept)

    def what_else_changed(self, quantity: str, day: dt.date | str, *, apparatus: str | None = None, window: int = 3, top: int = 10) -> list[dict[str, object]]:
        """Suspects of a change on ``day``: setting changes, then every registered candidate
        (parameters, measurements, figures, ...) ranked by its standardised change
        (:mod:`runlog.drift.candidates`)."""
        from runlog.drift.causes import what_else_changed
        from runlog.drift.series import _apparatus_id

        with self.engine.connect() as connection:
            apparatus_id, _ = _apparatus_id(connection, quantity, apparatus)
            return what_else_changed(connection, apparatus_id, _as_day(day), quantity, window=window, top=top)

    def suspects(self, quantity: str, day: dt.date | str, *, apparatus: str | None = None, window: int = 3, top: int = 10) -> dict[str, object]:
        """What may explain a change of ``quantity`` on ``day``: ``notes`` of that day and
        the day before first, then ranked ``causes`` (:meth:`what_else_changed`), then a
        plain ``verdict`` (saying so when nothing explains it)."""
        from zoneinfo import ZoneInfo

        from runlog.drift.causes import suspects
        from runlog.drift.series import _apparatus_id

        zone = ZoneInfo(self.lab_timezone)
        with self.engine.connect() as connection:
            apparatus_id, _ = _apparatus_id(connection, quantity, apparatus)
            return suspects(connection, apparatus_id, _as_day(day), quantity, zone, window=window, top=top)

    # --- monitors --------------------------------------------------------------------

    def monitors(self, *, now: dt.datetime | None = None, silent_after: dt.timedelta = dt.timedelta(hours=1)) -> list[dict[str, object]]:
        """Every monitor with its latest value at or before ``now``, its usual interval, and
        whether it stopped reporting: silent for more than 10 usual intervals and more than
        ``silent_after`` (:func:`runlog.monitors.overlay.monitor_list`)."""
        from runlog.monitors.overlay import monitor_list

        with self.engine.connect() as connection:
            return monitor_list(connection, now=now, silent_after=silent_after)

    def monitor_series(self, name: str, *, apparatus: str | None = None, since: dt.datetime | str | None = None, until: dt.datetime | str | None = None, max_points: int = 2_000) -> "pd.DataFrame":
        """One monitor over a span, from its rollups (at most ``max_points`` periods):
        ``start``, ``mean``, ``minimum``, ``maximum``, ``count``; for charts."""
        from runlog.monitors.overlay import monitor_series

        with self.engine.connect() as connection:
            return monitor_series(connection, name, apparatus=apparatus, since=_as_utc(since), until=_as_utc(until), max_points=max_points)

    def shots_with_monitors(self, run: str, monitors: Iterable[str], *, apparatus: str | None = None, max_gap_seconds: float | None = None) -> "pd.DataFrame":
        """:meth:`shots` of one run with a column per monitor: its as-of value at each
        shot's time (last value at or before it, within ``max_gap_seconds``, default 600 s;
        docs/monitor-table.md), in the monitor's unit (``attrs["units"]``)."""
        import numpy as np

        from runlog.monitors.align import MAX_GAP_SECONDS, value_at, values_between
        from runlog.monitors.overlay import _monitor_id

        frame = self.shots(run, apparatus=apparatus)
        gap = MAX_GAP_SECONDS if max_gap_seconds is None else max_gap_seconds
        times = _times_us(frame["time"])
        with self.engine.connect() as connection:
            for name in monitors:
                monitor_id, unit = _monitor_id(connection, name, apparatus)
                logged_us, logged = values_between(connection, monitor_id, int(times.min() - gap * 1e6), int(times.max())) if len(times) else (np.array([], dtype=np.int64), np.array([]))
                frame[name] = value_at(times, logged_us, logged, gap)
                frame.attrs.setdefault("units", {})[name] = unit
        return frame

    # --- access ----------------------------------------------------------------------

    def grant_reader(self, role: str, *, password: str | None = None) -> None:
        """Create (if needed) a PostgreSQL login role that can read the catalogue and nothing
        more, for the dashboard and for analysis accounts. SQLite has no roles."""
        import re

        if self.engine.dialect.name != "postgresql":
            raise StoreError("read-only roles need PostgreSQL; on SQLite give readers a copy or file permissions")
        if not re.fullmatch(r"[a-z_][a-z0-9_]{0,62}", role):
            raise ValueError(f"role name {role!r}: use lower-case letters, digits and _ (at most 63)")
        from psycopg import sql

        with self.engine.begin() as connection:
            raw = connection.connection.driver_connection
            name = sql.Identifier(role)
            with raw.cursor() as cursor:
                cursor.execute("SELECT 1 FROM pg_roles WHERE rolname = %s", (role,))
                if cursor.fetchone() is None:
                    cursor.execute(sql.SQL("CREATE ROLE {} LOGIN").format(name))
                if password is not None:
                    cursor.execute(sql.SQL("ALTER ROLE {} PASSWORD {}").format(name, sql.Literal(password)))
                cursor.execute("SELECT current_database(), current_schema()")
                database, schema = cursor.fetchone()
                for statement in (
                    "GRANT CONNECT ON DATABASE {database} TO {role}",
                    "GRANT USAGE ON SCHEMA {schema} TO {role}",
                    "GRANT SELECT ON ALL TABLES IN SCHEMA {schema} TO {role}",
                    "ALTER DEFAULT PRIVILEGES IN SCHEMA {schema} GRANT SELECT ON TABLES TO {role}",
                ):
                    cursor.execute(sql.SQL(statement).format(database=sql.Identifier(database), schema=sql.Identifier(schema), role=name))

    # --- helpers -------------------------------------------------------------------

    def _find_run(self, connection, key: str, apparatus: str | None, analysis: str | None = None):
        """The run's current version, or its version ``analysis`` when named."""
        query = select(*s.Run.__table__.columns).where(s.Run.key == key)
        if apparatus is not None:
            query = query.join(s.Apparatus, s.Apparatus.id == s.Run.apparatus_id).where(s.Apparatus.name == apparatus)
        versions = connection.execute(query).all()
        found = [v for v in versions if (v.is_current if analysis is None else v.analysis == analysis)]
        if not found:
            if not versions:
                if apparatus is not None:
                    elsewhere = self._apparatus_of(connection, key)
                    if elsewhere:
                        # The key is right and the apparatus is not: suggest apparatus, not the key typed.
                        close = self._suggest(connection, s.Apparatus.name, apparatus)
                        raise NotFoundError(f"run on apparatus '{apparatus}' named", key, f"it is on {_listed(elsewhere)}" + (f"; {close}" if close else ""))
                raise NotFoundError("run", key, self._suggest(connection, s.Run.key, key))
            if analysis is not None:
                known = ", ".join(repr(v.analysis) for v in sorted(versions, key=lambda v: v.id))
                raise NotFoundError("analysis version", analysis, f"run '{key}' has {known}")
            raise NotFoundError("current version of run", key, f"the run is withdrawn: 'runlog restore --run {key}' brings it back")
        if len(found) > 1:
            names = self._apparatus_of(connection, key)
            raise NotFoundError("single run", key, f"it is on {_listed(names)}: give the apparatus (--apparatus)")
        return found[0]

    @staticmethod
    def _apparatus_of(connection, key: str) -> list[str]:
        """The apparatus with a current run named ``key``, in name order."""
        query = select(s.Apparatus.name).join(s.Run, s.Run.apparatus_id == s.Apparatus.id).where(s.Run.key == key, s.Run.is_current).distinct().order_by(s.Apparatus.name)
        return [name for (name,) in connection.execute(query)]

    def _apparatus_id(self, connection, name: str) -> int:
        found = connection.execute(select(s.Apparatus.id).where(s.Apparatus.name == name)).scalar()
        if found is None:
            raise NotFoundError("apparatus", name, self._suggest(connection, s.Apparatus.name, name))
        return int(found)

    @staticmethod
    def _suggest(connection, column, name: str) -> str:
        import difflib

        known = [v for (v,) in connection.execute(select(column).distinct().limit(5000)) if v != name]
        close = difflib.get_close_matches(name, known, n=3)  # never the name that was typed
        return f"did you mean {', '.join(repr(c) for c in close)}?" if close else ""


def _listed(names: list[str]) -> str:
    """``'a'``, ``'a' and 'b'``, ``'a', 'b' and 'c'``."""
    quoted = [f"'{n}'" for n in names]
    return quoted[0] if len(quoted) == 1 else f"{', '.join(quoted[:-1])} and {quoted[-1]}"


def _rows_of(connection):
    """``rows(sql, params)`` on a connection, as the store's version functions take it."""

    def rows(sql: str, params: dict | None = None) -> list[tuple]:
        return [tuple(row) for row in connection.execute(text(sql), params or {})]

    return rows


def _figure_records(connection, run_id: int) -> list[dict[str, object]]:
    """Every figure record of a run version, newest first, with what it was made with."""
    import json

    fr = s.FigureRecord
    in_force = {int(r) for (r,) in connection.execute(select(s.FigureRow.record_id).where(s.FigureRow.run_id == run_id)) if r is not None}
    out = []
    for row in connection.execute(select(*fr.__table__.columns).where(fr.run_id == run_id).order_by(fr.id.desc())):
        entry: dict[str, object] = {"record": int(row.id), "figure": row.name, "kind": row.kind, "value": row.value, "unit": row.unit}
        if row.stderr is not None:
            entry["stderr"] = row.stderr
        if row.ci_low is not None:
            entry["ci_low"], entry["ci_high"] = row.ci_low, row.ci_high
        if row.binomial_method is not None:
            entry.update(binomial_ci_low=row.binomial_ci_low, binomial_ci_high=row.binomial_ci_high, binomial_method=row.binomial_method)
        if row.out_of_range:
            entry["out_of_range"] = True
        entry.update(
            {
                "method": row.method,
                "method_version": row.method_version,
                "model": row.model,
                "options": json.loads(row.options) if row.options else {},
                "analysis": row.analysis,
                "shots": row.shots,
                "runlog_version": row.runlog_version,
                "computed_at": row.computed_at.isoformat(),
                "in_force": int(row.id) in in_force,
            }
        )
        out.append(entry)
    return out


def _frame(rows, columns: list[str], **options) -> "pd.DataFrame":
    """A DataFrame of result rows, built from plain tuples.

    pandas probes every row object it is handed for array attributes, and each probe makes
    a SQLAlchemy row raise and catch an AttributeError: 149 000 figure rows took 1.2 s that
    way and 0.3 s as tuples.
    """
    import pandas as pd

    return pd.DataFrame([tuple(row) for row in rows], columns=columns, **options)


def _file_names(file: str | Path) -> list[str]:
    """The ways the ingest log may name a file: as given, and its absolute path."""
    return sorted({str(file), str(Path(file).absolute())})


def _sha_of(file: str | Path) -> str | None:
    path = Path(file)
    if not path.is_file():
        return None
    from runlog.ingest import file_sha256

    return file_sha256(path)[0]


def _as_day(value: dt.date | str | None) -> dt.date | None:
    if value is None or (isinstance(value, dt.date) and not isinstance(value, dt.datetime)):
        return value
    if isinstance(value, dt.datetime):
        return value.date()
    try:
        return dt.date.fromisoformat(str(value)[:10])
    except ValueError:
        raise ValueError(f"'{value}' is not an ISO date (e.g. 2026-03-01)") from None


def _user() -> str | None:
    try:
        return getpass.getuser()
    except Exception:  # no login name in some containers; the author is optional
        return None


def open_catalogue(url: str | None = None, *, create: bool = True) -> Catalogue:
    """Open the catalogue at ``url`` (else ``RUNLOG_DB``, else the default SQLite file)."""
    return Catalogue(url, create=create)
