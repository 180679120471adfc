"""Exporting the shots a filter selects as a Frictionless Data Package (an open standard).

Owns the package layout and its guarantees. A package is a folder holding:

* ``shots.parquet`` (or ``.csv``): one row per shot, as :mod:`runlog.selection` gives it,
  plus ``occ.<image>`` columns (packed bits as hex) and ``monitor.<name>`` columns (a
  monitor's as-of value at the shot's time) when asked for;
* ``runs``: one row per run with shots in the export; ``figures``: the stored figures
  of those runs (value, standard error, interval, unit, method); ``images`` (with
  occupancy only): each run's images, their role, site count and lattice shape;
* ``datapackage.json``: the Data Package manifest (https://datapackage.org): one
  resource per data file with its format, size, SHA-256 and Table Schema (field types,
  units in the field property ``unit``), and the provenance: filter, runlog version,
  schema revision, catalogue (credentials redacted), lab time zone and the SHA-256 of
  the ingested files the exported runs came from;
* ``README.md`` for people, and ``export.toml``, the spec that re-runs the export.

Data files are deterministic: the same filter on the same catalogue gives byte-identical
files (rows sorted, fixed writer options, no time of writing inside); only the
manifest's ``created`` differs. A package is written into a temporary folder beside
``out`` and renamed into place at the end, so ``out`` never holds half a package.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import shutil
import tempfile
import tomllib
import uuid
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
from sqlalchemy import select

from runlog.errors import ExportError, ConfigError
from runlog.monitors.align import MAX_GAP_SECONDS
from runlog.selection import PARALLEL_READS, Selection, id_in, select_on
from runlog.store import schema as s
from runlog.store.arrow_reader import arrow_read
from runlog.store.engine import redact, sqlite_path

__all__ = ["FORMATS", "ExportResult", "export", "export_spec", "check_replaceable"]

#: Data file formats an export can write.
FORMATS = ("parquet", "csv")

MANIFEST = "datapackage.json"
SPEC = "export.toml"
README = "README.md"

# Fixed Parquet writer options: byte-identical files for identical tables.
_PARQUET_OPTIONS = {
    "compression": "zstd",
    "compression_level": 3,
    "use_dictionary": True,
    "write_statistics": True,
    "version": "2.6",
    "data_page_version": "1.0",
    "row_group_size": 1 << 20,
    "data_page_size": 1 << 20,
}
_MEDIATYPES = {"parquet": "application/vnd.apache.parquet", "csv": "text/csv"}


@dataclass(frozen=True)
class ExportResult:
    """What an export wrote. ``data`` maps each data file to ``"sha256:<hex>"``.

    For a re-run from a spec, ``previous`` holds the spec's earlier hashes and ``same``
    says whether every data file hashes as before (``None`` for a first export).
    """

    out: Path
    shots: int
    runs: int
    data: dict[str, str]
    created: str
    previous: dict[str, str] | None = None
    changed: tuple[str, ...] = field(default=())
    #: The pin exported (None: a filter), and what newer analyses would change in it.
    pin: str | None = None
    pin_changes: tuple[dict[str, object], ...] = field(default=())
    #: For an export by filter: pins holding another analysis version of exported runs.
    other_versions_pinned: tuple[dict[str, object], ...] = field(default=())

    @property
    def same(self) -> bool | None:
        return None if self.previous is None else not self.changed

    def as_dict(self) -> dict[str, object]:
        out: dict[str, object] = {"out": str(self.out), "shots": self.shots, "runs": self.runs, "data": self.data, "created": self.created}
        if self.previous is not None:
            out["same"] = self.same
            out["changed"] = list(self.changed)
        if self.pin is not None:
            out["pin"] = self.pin
            out["pin_changes"] = list(self.pin_changes)
        elif self.other_versions_pinned:
            out["other_versions_pinned"] = list(self.other_versions_pinned)
        return out


# --- tables ----------------------------------------------------------------------------


def _runs_table(connection, per_run_shots: dict[int, int], zone: ZoneInfo, frozen: dict[int, dict[str, object]] | None = None) -> tuple[pa.Table, list[int]]:
    """One row per run version with shots in the export; a pin's ``frozen`` fields (by
    run id) stand in for the catalogue's, so that a pin exports its runs as they were."""
    from runlog.pins import run_fields

    wanted = sorted(per_run_shots)
    fields = run_fields(connection, wanted)
    for run_id, kept in (frozen or {}).items():
        if kept is not None and run_id in fields:
            fields[run_id] = kept
    rows = [fields[run_id] | {"id": run_id} for run_id in wanted]
    rows.sort(key=lambda r: (r["apparatus"], r["run"]))
    order = [int(r["id"]) for r in rows]
    table = pa.table(
        {
            "run": pa.array([r["run"] for r in rows], pa.string()),
            "apparatus": pa.array([r["apparatus"] for r in rows], pa.string()),
            "analysis": pa.array([r["analysis"] for r in rows], pa.string()),
            "sequence": pa.array([r["sequence"] for r in rows], pa.string()),
            "started": pa.array([r["started"] for r in rows], pa.timestamp("us", tz="UTC")),
            "finished": pa.array([r["finished"] for r in rows], pa.timestamp("us", tz="UTC")),
            "day": pa.array([_as_date(r["day"]) if r["day"] is not None else r["started"].astimezone(zone).date() for r in rows], pa.date32()),
            "operator": pa.array([r["operator"] for r in rows], pa.string()),
            "notes": pa.array([r.get("notes") for r in rows], pa.string()),
            "tags": pa.array([r["tags"] for r in rows], pa.string()),
            "shots": pa.array([int(r["shots"]) for r in rows], pa.int64()),
            "excluded_shots": pa.array([int(r.get("excluded_shots") or 0) for r in rows], pa.int64()),
            "shots_exported": pa.array([per_run_shots[int(r["id"])] for r in rows], pa.int64()),
        }
    )
    return table, order


def _figures_table(connection, run_order: list[int], runs_table: pa.Table, records: list[int] | None = None) -> pa.Table:
    """The figures in force of the exported run versions, or (a pin) exactly the figure
    records ``records``, which never change."""
    figures = s.FigureRow.__table__ if records is None else s.FigureRecord.__table__
    position = {rid: i for i, rid in enumerate(run_order)}
    names = ("run_id", "figure", "kind", "value", "stderr", "ci_low", "ci_high", "unit", "method", "method_version", "successes", "trials", "binomial_ci_low", "binomial_ci_high", "binomial_method", "out_of_range")
    types = (None, pa.string(), pa.string(), pa.float64(), pa.float64(), pa.float64(), pa.float64(), pa.string(), pa.string(), pa.string(), pa.int64(), pa.int64(), pa.float64(), pa.float64(), pa.string(), pa.bool_())
    rows: list[tuple] = []
    columns = (figures.c.run_id, figures.c.name, figures.c.kind, figures.c.value, figures.c.stderr, figures.c.ci_low, figures.c.ci_high, figures.c.unit, figures.c.method, figures.c.method_version, figures.c.successes, figures.c.trials, figures.c.binomial_ci_low, figures.c.binomial_ci_high, figures.c.binomial_method, figures.c.out_of_range)
    for chunk in _chunks(run_order if records is None else sorted(records)):
        rows += connection.execute(select(*columns).where(id_in(figures.c.run_id if records is None else figures.c.id, chunk))).all()
    rows.sort(key=lambda r: (position[int(r[0])], r[1]))
    columns = list(zip(*rows)) if rows else [()] * len(names)
    at = pa.array([position[int(r)] for r in columns[0]], pa.int64())
    out = {"run": runs_table.column("run").take(at), "apparatus": runs_table.column("apparatus").take(at)}
    for name, kind, values in zip(names[1:], types[1:], columns[1:]):
        out[name] = pa.array(values, kind)
    out["unit"] = pc.fill_null(out["unit"], "")
    return pa.table(out)


def _occupancy(connection, selection: Selection, run_order: list[int], runs_table: pa.Table) -> tuple[dict[str, pa.Array], pa.Table]:
    """``occ.<image>`` columns (hex of the packed bits, row order of the selection) and
    the images table of the exported runs."""
    images, occupancy = s.Image.__table__, s.Occupancy.__table__
    position = {rid: i for i, rid in enumerate(run_order)}
    image_rows = []
    for chunk in _chunks(run_order):
        image_rows += connection.execute(select(images.c.id, images.c.run_id, images.c.name, images.c.role, images.c.sites, images.c.shape).where(id_in(images.c.run_id, chunk))).all()
    image_rows.sort(key=lambda r: (position[int(r.run_id)], r.name))
    keys, apparatus = runs_table.column("run").to_pylist(), runs_table.column("apparatus").to_pylist()
    images_table = pa.table(
        {
            "run": pa.array([keys[position[int(r.run_id)]] for r in image_rows], pa.string()),
            "apparatus": pa.array([apparatus[position[int(r.run_id)]] for r in image_rows], pa.string()),
            "image": pa.array([r.name for r in image_rows], pa.string()),
            "role": pa.array([r.role for r in image_rows], pa.string()),
            "sites": pa.array([int(r.sites) for r in image_rows], pa.int64()),
            "shape": pa.array([r.shape for r in image_rows], pa.string()),
        }
    )
    image_name = {int(r.id): r.name for r in image_rows}
    names = sorted(set(image_name.values()))
    columns: dict[str, list[str | None]] = {name: [None] * len(selection.shot_ids) for name in names}
    # Rows of the selection by shot id, to place each blob.
    by_id = np.argsort(selection.shot_ids)
    sorted_ids = selection.shot_ids[by_id]
    image_ids = list(image_name)
    for chunk in _chunks(image_ids):
        result = connection.execution_options(stream_results=True).execute(select(occupancy.c.shot_id, occupancy.c.image_id, occupancy.c.bits).where(id_in(occupancy.c.image_id, chunk)))
        while rows := result.fetchmany(100_000):
            shot_ids = np.fromiter((r[0] for r in rows), np.int64, len(rows))
            where = np.searchsorted(sorted_ids, shot_ids)
            where = np.minimum(where, len(sorted_ids) - 1) if len(sorted_ids) else where
            for (shot_id, image_id, bits), place in zip(rows, where):
                if len(sorted_ids) and sorted_ids[place] == shot_id:
                    columns[image_name[int(image_id)]][int(by_id[place])] = bytes(bits).hex()
    return {f"occ.{name}": pa.array(values, pa.string()) for name, values in columns.items()}, images_table


def _chunks(values: list[int], size: int = 10_000):
    # SQLite allows 32 766 bound values per statement; stay well below.
    for start in range(0, len(values), size):
        yield values[start : start + size]


def _as_date(value) -> dt.date:
    return value if isinstance(value, dt.date) else dt.date.fromisoformat(str(value))


# --- writing ---------------------------------------------------------------------------


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while block := handle.read(1 << 20):
            digest.update(block)
    return digest.hexdigest()


def _write(table: pa.Table, path: Path, format: str) -> None:
    if format == "parquet":
        # Only the per-field units go into the file's metadata; nothing that changes.
        pq.write_table(table, path, **_PARQUET_OPTIONS)
        return
    columns = []
    for column in table.columns:
        if pa.types.is_timestamp(column.type):
            column = pc.strftime(column, format="%Y-%m-%dT%H:%M:%SZ")
        columns.append(column)
    plain = pa.Table.from_arrays(columns, names=table.column_names)
    pacsv.write_csv(plain, path, pacsv.WriteOptions(include_header=True, batch_size=65536, quoting_style="needed"))


def _field_type(data_type: pa.DataType) -> str:
    if pa.types.is_integer(data_type):
        return "integer"
    if pa.types.is_floating(data_type):
        return "number"
    if pa.types.is_boolean(data_type):
        return "boolean"
    if pa.types.is_timestamp(data_type):
        return "datetime"
    if pa.types.is_date(data_type):
        return "date"
    return "string"


#: The as-of rule of monitor columns, as the package states it (runlog.monitors.align).
AS_OF_RULE = f"the last value the monitor of the shot's apparatus logged at or before the shot's time, if logged at most {MAX_GAP_SECONDS:g} s before it; else empty (no interpolation)"

_DESCRIPTIONS = {
    "run": "the run's key (unique per apparatus)",
    "apparatus": "the machine the shot ran on",
    "analysis": "the analysis version of the run's shots ('' = the unnamed one)",
    "sequence": "the sequence's name",
    "shot": "the shot's index within its run",
    "time": "when the shot ran (UTC)",
    "started": "time of the run's first shot (UTC)",
    "finished": "time of the run's last shot (UTC)",
    "day": "the lab day the run started on (catalogue's lab time zone)",
    "operator": "who ran it",
    "tags": "the run's labels, comma-separated",
    "shots": "shots of the run in the catalogue",
    "notes": "the run's notes, as the shot table gave them",
    "excluded_shots": "shots of the run left out of its figures because their status does not count (they are in the shots table)",
    "shots_exported": "shots of the run in this export",
    "figure": "the figure of merit's name",
    "kind": "the family of figures it belongs to",
    "value": "the figure's value (in 'unit')",
    "stderr": "its standard error",
    "ci_low": "lower end of its confidence interval (counting figures: shot-level, from the spread between shots)",
    "ci_high": "upper end of its confidence interval (counting figures: shot-level, from the spread between shots)",
    "binomial_ci_low": "counting figures: lower end of the pooled binomial interval (every site an independent try; too narrow when loading varies between shots)",
    "binomial_ci_high": "counting figures: upper end of the pooled binomial interval",
    "binomial_method": "counting figures: the method of the pooled binomial interval",
    "out_of_range": "true when the fitted value lies outside its physical range (a contrast of a fraction signal above 1): kept as fitted, left out of daily rollups, drift and alarms",
    "unit": "the unit of value, stderr and interval",
    "method": "how it was computed",
    "method_version": "version of that method",
    "successes": "counted successes (counting figures)",
    "trials": "counted trials (counting figures)",
    "image": "the image's name",
    "role": "loading, survival or other",
    "sites": "lattice sites in the image",
    "shape": "lattice shape, rows,columns",
}


def _schema(table: pa.Table, units: dict[str, str], primary_key: list[str], foreign_key: bool) -> dict[str, object]:
    fields = []
    for item in table.schema:
        entry: dict[str, object] = {"name": item.name, "type": _field_type(item.type)}
        unit = units.get(item.name, "")
        if item.name.startswith("p."):
            entry["description"] = f"parameter '{item.name[2:]}'" + (f", in {unit}" if unit else "")
        elif item.name.startswith("m."):
            entry["description"] = f"measurement '{item.name[2:]}'" + (f", in {unit}" if unit else "")
        elif item.name.startswith("monitor."):
            entry["description"] = f"monitor '{item.name[8:]}' at the shot's time: {AS_OF_RULE}" + (f"; in {unit}" if unit else "")
        elif item.name.startswith("occ."):
            entry["description"] = (
                f"site occupancy of image '{item.name[4:]}': numpy.packbits (big-endian) of one boolean per site, "
                "as hex; the run's site count and lattice shape are in the images resource"
            )
        elif item.name in _DESCRIPTIONS:
            entry["description"] = _DESCRIPTIONS[item.name]
        if unit:
            entry["unit"] = unit  # runlog's extension property: the unit values are stored in
        if item.name in primary_key:
            entry["constraints"] = {"required": True}
        fields.append(entry)
    out: dict[str, object] = {"fields": fields, "missingValues": [""]}
    if primary_key:
        out["primaryKey"] = primary_key
    if foreign_key:
        out["foreignKeys"] = [{"fields": ["run", "apparatus"], "reference": {"resource": "runs", "fields": ["run", "apparatus"]}}]
    return out


def _write_and_hash(table: pa.Table, path: Path, format: str) -> str:
    """Write ``table`` to ``path``; its SHA-256 (hex)."""
    _write(table, path, format)
    return _sha256(path)


def _resource(name: str, path: Path, format: str, schema: dict[str, object], description: str, digest: str) -> dict[str, object]:
    entry: dict[str, object] = {
        "name": name,
        "type": "table",
        "path": path.name,
        "format": format,
        "mediatype": _MEDIATYPES[format],
    }
    if format == "csv":
        entry["encoding"] = "utf-8"
        entry["dialect"] = {"header": True, "delimiter": ","}
    entry.update({"bytes": path.stat().st_size, "hash": f"sha256:{digest}", "description": description, "schema": schema})
    return entry


def _source_files(connection, run_order: list[int], runs_table: pa.Table, shot_ids: np.ndarray | None = None) -> list[dict[str, object]]:
    """The ingested files that brought the exported shots (``run_files``), with the runs of
    the export each wrote into, per apparatus: run keys coincide across apparatus (a date
    is the usual key), so a key alone does not say whose run it is.

    With the exported ``shot_ids``, a file is named only when one of its shots is exported
    (its shots are the id range ``first_shot_id``..``last_shot_id`` of each run version it
    wrote into); catalogues from before that range was kept name every file of the run.
    """
    position = {rid: i for i, rid in enumerate(run_order)}
    keys = runs_table.column("run").to_pylist()
    apparatus = runs_table.column("apparatus").to_pylist()
    exported = np.sort(np.asarray(shot_ids, dtype=np.int64)) if shot_ids is not None else None
    files, log = s.RunFile.__table__, s.IngestLogEntry.__table__
    found: dict[tuple[str, str], dict[str, object]] = {}
    for chunk in _chunks(run_order):
        for run_id, file, sha256, shots, first, last in connection.execute(
            select(files.c.run_id, log.c.file, log.c.sha256, log.c.shots, files.c.first_shot_id, files.c.last_shot_id).join(log, log.c.id == files.c.ingest_id).where(id_in(files.c.run_id, chunk))
        ):
            if exported is not None and first is not None and last is not None:
                low, high = np.searchsorted(exported, int(first), side="left"), np.searchsorted(exported, int(last), side="right")
                if high <= low:
                    continue  # the file wrote into the run, but none of its shots is exported
            entry = found.setdefault((file, sha256), {"file": file, "sha256": sha256, "shots": int(shots or 0), "runs": [], "apparatus": {}})
            at = position[int(run_id)]
            entry["runs"].append(keys[at])
            entry["apparatus"].setdefault(apparatus[at], []).append(keys[at])
    for entry in found.values():
        entry["runs"] = sorted(set(entry["runs"]))
        entry["apparatus"] = {name: sorted(set(runs)) for name, runs in sorted(entry["apparatus"].items())}
    return [found[k] for k in sorted(found)]


def _headline(figures: pa.Table) -> list[dict[str, object]]:
    out = []
    if figures.num_rows == 0:
        return out
    names = figures.column("figure").to_pylist()
    values = figures.column("value").to_numpy(zero_copy_only=False)
    units = figures.column("unit").to_pylist()
    successes = figures.column("successes").to_pylist()
    trials = figures.column("trials").to_pylist()
    for name in sorted(set(names)):
        rows = [i for i, n in enumerate(names) if n == name]
        picked = values[rows]
        entry: dict[str, object] = {
            "figure": name,
            "unit": sorted({units[i] for i in rows})[0] if len({units[i] for i in rows}) == 1 else "mixed",
            "runs": len(rows),
            "median": float(np.median(picked)),
            "min": float(picked.min()),
            "max": float(picked.max()),
        }
        counted = [(successes[i], trials[i]) for i in rows if successes[i] is not None and trials[i]]
        if len(counted) == len(rows):
            entry["pooled"] = sum(c for c, _ in counted) / sum(t for _, t in counted)
        out.append(entry)
    return out


def _readme(title: str, where: str, shots: pa.Table, runs: pa.Table, headline: list[dict[str, object]], zone: ZoneInfo, files: list[tuple[str, str]], pinned: dict[str, object] | None = None) -> str:
    lines = [f"# {title}", "", "Shots selected from a runlog catalogue with the filter", "", f"    {where}", ""]
    if pinned is not None and pinned.get("other_versions_pinned"):
        held = pinned["other_versions_pinned"]
        names = sorted({e["pin"] for e in held})
        lines += [
            f"These runs follow their current analysis versions; the pin(s) {', '.join(names)} hold other versions of "
            f"{len({(e['apparatus'], e['run']) for e in held})} of them (`runlog export --pin NAME` exports those as pinned).",
            "",
        ]
    if pinned is not None and "name" in pinned:
        lines += [
            f"as pinned under '{pinned['name']}' on {pinned['created_at']}: the same shots, analysis versions and figure "
            "records as then, whatever the catalogue holds now.",
            "",
        ]
        for gone in pinned["withdrawn_since"]:
            lines += [f"- withdrawn since the pin: {gone['apparatus']}/{gone['run']} (analysis '{gone['analysis']}'); exported as pinned", ""]
        moved = pinned["changes"]
        if moved:
            lines += ["Newer analyses in the catalogue would change (value ± standard error, pinned -> now):", ""]
            for c in moved:
                old, new = c["old"], c["new"]
                before = "none" if old is None else f"{old['value']:.6g} ± {old['stderr'] if old['stderr'] is not None else 'n/a'} ({old['analysis'] or 'unnamed'})"
                after = "none" if new is None else f"{new['value']:.6g} ± {new['stderr'] if new['stderr'] is not None else 'n/a'} ({new['analysis'] or 'unnamed'})"
                shift = f", {c['sigma']:+.2f} combined stderr" if c.get("sigma") is not None else ""
                lines.append(f"- {c['apparatus']}/{c['run']} {c['figure']}: {before} -> {after}{shift}")
            lines.append("")
    apparatus = sorted(set(runs.column("apparatus").to_pylist()))
    lines.append(f"- {shots.num_rows} shots in {runs.num_rows} runs on {len(apparatus)} apparatus ({', '.join(apparatus) or 'none'})")
    if shots.num_rows:
        first = pc.min(shots.column("time")).as_py()
        last = pc.max(shots.column("time")).as_py()
        lines.append(f"- from {first.isoformat()} to {last.isoformat()} (lab days {first.astimezone(zone).date()} to {last.astimezone(zone).date()}, {zone.key})")
    sequences = sorted(set(runs.column("sequence").to_pylist()))
    lines.append(f"- sequences: {', '.join(sequences) or 'none'}")
    parameters = [n[2:] for n in shots.column_names if n.startswith("p.")]
    measurements = [n[2:] for n in shots.column_names if n.startswith("m.")]
    lines.append(f"- parameters: {', '.join(parameters) or 'none'}")
    lines.append(f"- measurements: {', '.join(measurements) or 'none'}")
    lines.append("")
    if headline:
        lines += ["## Figures of the exported runs", "", "| figure | unit | runs | median | min | max | pooled counts |", "|---|---|---|---|---|---|---|"]
        for h in headline:
            pooled = f"{h['pooled']:.4g}" if "pooled" in h else ""
            lines.append(f"| {h['figure']} | {h['unit']} | {h['runs']} | {h['median']:.4g} | {h['min']:.4g} | {h['max']:.4g} | {pooled} |")
        lines += ["", "Medians and ranges are over runs; pooled counts divide the summed successes by the summed trials.", ""]
    lines += ["## Files", ""]
    lines += [f"- `{name}`: {text}" for name, text in files]
    lines += [
        f"- `{MANIFEST}`: the Frictionless Data Package manifest (https://datapackage.org): field types, units, "
        "SHA-256 of every data file and the provenance of this export",
        f"- `{SPEC}`: re-runs this export (`runlog export --spec {SPEC}`) and says whether the data still hash the same",
        "",
        "Units of parameters and measurements are in each field's `unit` in the manifest.",
        "",
    ]
    return "\n".join(lines)


def _toml_string(value: str) -> str:
    # JSON's string escapes (with ensure_ascii) are valid TOML basic strings.
    return json.dumps(value, ensure_ascii=True)


def _spec_text(where: str, format: str, with_occupancy: bool, title: str, out: Path, data: dict[str, str], pin: str | None = None, monitors: tuple[str, ...] = ()) -> str:
    lines = [
        "# A runlog export: `runlog export --spec export.toml` writes it again and says",
        "# whether the data files still hash as listed under [data].",
        *([f"pin = {_toml_string(pin)}"] if pin is not None else []),
        f"where = {_toml_string(where)}",
        f"format = {_toml_string(format)}",
        f"with_occupancy = {'true' if with_occupancy else 'false'}",
        *([f"monitors = [{', '.join(_toml_string(m) for m in monitors)}]"] if monitors else []),
        f"title = {_toml_string(title)}",
        f"out = {_toml_string(str(out))}",
        "",
        "[data]",
    ]
    lines += [f"{_toml_string(name)} = {_toml_string(digest)}" for name, digest in sorted(data.items())]
    return "\n".join(lines) + "\n"


def _umask() -> int:
    """The process's umask (read by setting it and putting it back at once)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _holds_files(path: Path) -> bool:
    return path.is_symlink() or path.exists() and (not path.is_dir() or any(path.iterdir()))


def _catalogue_files(catalogue) -> list[Path]:
    """The SQLite catalogue file (and its WAL companions) of ``catalogue``, resolved."""
    url = getattr(getattr(catalogue, "engine", None), "url", None)
    path = sqlite_path(url) if url is not None else None
    if path is None:
        return []
    path = path.resolve()
    return [path, path.with_name(path.name + "-wal"), path.with_name(path.name + "-shm")]


def _package_files(folder: Path) -> set[str] | None:
    """The names a runlog export wrote in ``folder`` (from its manifest), ``None`` when
    the folder holds no manifest written by runlog."""
    try:
        manifest = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError):
        return None
    if not isinstance(manifest, dict) or manifest.get("name") != "runlog-export":
        return None
    provenance = manifest.get("provenance")
    if not isinstance(provenance, dict) or "runlog_version" not in provenance or not isinstance(manifest.get("resources"), list):
        return None
    names = {MANIFEST, README, SPEC}
    for resource in manifest["resources"]:
        path = resource.get("path") if isinstance(resource, dict) else None
        if not isinstance(path, str) or "/" in path or "\\" in path:
            return None
        names.add(path)
    return names


def check_replaceable(out: str | Path, catalogue=None) -> None:
    """Refuse (``ExportError``) unless ``out`` is absent, an empty folder, or a folder
    holding one runlog export and nothing else, and holds no catalogue file.

    Replacing deletes the folder, so it has to be one an export wrote: recognised by
    its manifest, every entry a file the manifest names. A folder that is, or lies
    above, the catalogue's own file is never replaced.
    """
    out = Path(out).absolute()
    if out.is_symlink():
        raise ExportError(str(out), "is a symbolic link: give the export folder itself")
    if not out.exists():
        return
    if not out.is_dir():
        raise ExportError(str(out), "is a file, not an export folder: nothing was replaced")
    resolved = out.resolve()
    for file in _catalogue_files(catalogue):
        if file.exists() and resolved in file.parents:
            raise ExportError(str(out), f"holds the catalogue {file.name}: an export never replaces it; choose another folder")
    entries = sorted(out.iterdir())
    if not entries:
        return
    names = _package_files(out)
    if names is None:
        raise ExportError(str(out), f"holds files that are not a runlog export (no runlog {MANIFEST}): nothing was replaced; choose another folder")
    for entry in entries:
        if entry.name not in names or entry.is_symlink() or not entry.is_file():
            raise ExportError(str(out), f"holds '{entry.name}', which the runlog export there did not write: nothing was replaced; move it or choose another folder")


def _catalogue_url(catalogue) -> str:
    url = getattr(catalogue, "url", None)
    return redact(url) if isinstance(url, str) else redact(catalogue.engine.url)


def export(catalogue, where: str | None, out: str | Path, *, format: str = "parquet", with_occupancy: bool = False, title: str | None = None, overwrite: bool = False, pin: str | None = None, monitors=()) -> ExportResult:
    """Write the shots ``where`` selects as a Data Package in the folder ``out``.

    ``format`` is ``"parquet"`` or ``"csv"``; ``with_occupancy`` adds the ``occ.<image>``
    columns and the images resource. An ``out`` that exists and holds files is refused
    (``FileExistsError``) unless ``overwrite``; it is then replaced as a whole, and only
    when it holds an earlier runlog export and nothing else (:func:`check_replaceable`).

    ``pin`` (instead of ``where``) exports a pinned selection (:mod:`runlog.pins`): its
    shots under the analysis versions, figure records and run fields it froze, so the
    data files come out byte-identical to the pin's first export; the provenance names the
    pin and what newer analyses would change in it.

    ``monitors`` adds a shots column ``monitor.<name>`` per monitor, its as-of value at
    each shot's time (:data:`AS_OF_RULE`); the schema gives its unit and the provenance
    the rule.
    """
    from runlog import __version__

    if format not in FORMATS:
        raise ValueError(f"unknown export format '{format}': use {' or '.join(FORMATS)}")
    monitors = tuple(dict.fromkeys(monitors))
    if pin is not None:
        if where:
            raise ValueError("export a pin or a filter, not both (the pin holds its filter)")
        from runlog.pins import load_pin

        with catalogue.engine.connect() as connection:
            where = load_pin(connection, pin).where
    elif not where or not where.strip():
        raise ValueError("an export needs a filter; 'shot >= 0' selects every shot")
    out = Path(out).absolute()
    if _holds_files(out) and not overwrite:
        raise ExportError(str(out), "already holds files: choose another folder or allow overwriting")
    check_replaceable(out, catalogue)
    title = title or (f"runlog export of pin '{pin}': {where}" if pin is not None else f"runlog export: {where}")
    engine = catalogue.engine
    # One read transaction for everything, so shots, runs and figures agree even while
    # an ingest is writing (SQLite's read transaction is a snapshot; PostgreSQL needs
    # repeatable read for one).
    options = {"isolation_level": "REPEATABLE READ"} if engine.dialect.name == "postgresql" else {}
    new_parents = [folder for folder in (out.parent, *out.parent.parents) if not folder.exists()]
    out.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".partial", dir=out.parent))
    # mkdtemp makes a private folder (700); the package is shared like any folder the user
    # makes: the modes their umask gives (group-readable under the usual 022 or 002).
    staging.chmod(0o777 & ~_umask())
    suffix = "parquet" if format == "parquet" else "csv"
    # The shots file is written (and hashed) on a second thread while the runs and
    # figures are read: Arrow's writer and the reads both leave the interpreter lock.
    background = ThreadPoolExecutor(max_workers=1)
    written: dict[str, Future[str]] = {}

    def write_shots_early(table: pa.Table) -> None:
        written["shots"] = background.submit(_write_and_hash, table, staging / f"shots.{suffix}", format)

    early = None if with_occupancy else write_shots_early
    try:
        with arrow_read(engine, parallel=PARALLEL_READS) as fast:
            if fast is not None:
                tables = _read(fast, where, with_occupancy, early, pin, monitors)
        if fast is None:
            with engine.connect().execution_options(**options) as connection:
                tables = _read(connection, where, with_occupancy, early, pin, monitors)
        selection, shots_table, runs_table, figures_table, images_table, sources, zone, pinned = tables

        tables = [
            ("shots", shots_table, selection.units, ["run", "apparatus", "shot"], True, "one row per shot: run fields, time, parameters (p.), measurements (m.)" + (", monitors at the shot's time (monitor.)" if monitors else "") + (", occupancy (occ.)" if with_occupancy else "")),
            ("runs", runs_table, {}, ["run", "apparatus"], False, "one row per run with shots in this export"),
            ("figures", figures_table, {}, ["run", "apparatus", "figure"], True, "the stored figures of merit of those runs, one row per run and figure"),
        ]
        if images_table is not None:
            tables.append(("images", images_table, {}, ["run", "apparatus", "image"], True, "each run's occupancy images: role, site count, lattice shape"))
        resources, data = [], {}
        for name, table, units, key, linked, description in tables:
            path = staging / f"{name}.{suffix}"
            digest = written[name].result() if name in written else _write_and_hash(table, path, format)
            resource = _resource(name, path, format, _schema(table, units, key, linked), description, digest)
            resources.append(resource)
            data[path.name] = str(resource["hash"])
        created = dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")
        manifest = {
            "$schema": "https://datapackage.org/profiles/2.0/datapackage.json",
            "name": "runlog-export",
            "title": title,
            "description": f"Shots selected from a runlog catalogue with the filter: {where}",
            "created": created,
            "resources": resources,
            "provenance": {
                "filter": where,
                "runlog_version": __version__,
                "schema_revision": s.SCHEMA_REVISION,
                "catalogue": _catalogue_url(catalogue),
                "lab_timezone": zone.key,
                "format": format,
                "with_occupancy": with_occupancy,
                "counts": {"shots": shots_table.num_rows, "runs": runs_table.num_rows, "figures": figures_table.num_rows},
                "analysis_versions": [
                    {"run": run, "apparatus": apparatus, "analysis": analysis}
                    for run, apparatus, analysis in zip(runs_table.column("run").to_pylist(), runs_table.column("apparatus").to_pylist(), runs_table.column("analysis").to_pylist())
                ],
                "source_files": sources,
            },
        }
        if monitors:
            manifest["provenance"]["monitors"] = {
                "rule": AS_OF_RULE,
                "max_gap_seconds": MAX_GAP_SECONDS,
                "columns": [{"column": f"monitor.{m.name}", "monitor": m.name, "unit": m.unit, "apparatus": [a for a, _, _ in m.apparatus]} for m in selection.monitors],
            }
        if "name" in pinned:
            manifest["provenance"]["pin"] = pinned
        elif pinned["other_versions_pinned"]:
            manifest["provenance"]["other_versions_pinned"] = pinned["other_versions_pinned"]
        (staging / MANIFEST).write_text(json.dumps(manifest, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
        headline = _headline(figures_table)
        files = [(f"{name}.{suffix}", description) for name, _, _, _, _, description in tables]
        (staging / README).write_text(_readme(title, where, shots_table, runs_table, headline, zone, files, pinned), encoding="utf-8")
        (staging / SPEC).write_text(_spec_text(where, format, with_occupancy, title, out, data, pin, monitors), encoding="utf-8")
        _move_into_place(staging, out, overwrite, catalogue)
    except BaseException:
        background.shutdown(wait=True, cancel_futures=True)
        shutil.rmtree(staging, ignore_errors=True)
        for folder in new_parents:  # deepest first: folders made for this export only
            try:
                folder.rmdir()
            except OSError:
                break
        raise
    background.shutdown(wait=True)
    return ExportResult(
        out, shots_table.num_rows, runs_table.num_rows, data, created, pin=pin, pin_changes=tuple(pinned.get("changes", ())), other_versions_pinned=tuple(pinned.get("other_versions_pinned", ()))
    )


def _read(connection, where: str | None, with_occupancy: bool, selected: Callable[[pa.Table], None] | None = None, pin: str | None = None, monitors: tuple[str, ...] = ()):
    """Everything an export writes, read in the connection's one transaction;
    ``selected`` is given the shots table as soon as it is read. With ``pin``, the pin's
    shots, frozen run fields and figure records instead of the filter's."""
    pinned = None
    if pin is not None:
        from runlog.pins import changes, load_pin, pinned_selection, withdrawn_since

        found = load_pin(connection, pin)
        selection = pinned_selection(connection, found, monitors)
        frozen = {run.run_id: run.fields for run in found.runs}
        records: list[int] | None = [r for run in found.runs for r in run.records]
        pinned = {
            "name": found.name,
            "filter": found.where,
            "created_at": found.created_at.isoformat(),
            "author": found.author,
            "runlog_version": found.runlog_version,
            # What the catalogue as it stands would change (not in the data files).
            "changes": changes(connection, found),
            "withdrawn_since": withdrawn_since(connection, found),
        }
    else:
        # The shot ids name the files that brought exactly these shots (provenance).
        selection = select_on(connection, where, shot_ids=True, monitors=monitors)
        frozen, records = None, None
    if selected is not None:
        selected(selection.table)
    zone = ZoneInfo(connection.execute(select(s.Setting.value).where(s.Setting.key == "lab_timezone")).scalar() or "UTC")
    unique, counts = np.unique(selection.run_ids, return_counts=True)
    runs_table, run_order = _runs_table(connection, {int(r): int(c) for r, c in zip(unique, counts)}, zone, frozen)
    figures_table = _figures_table(connection, run_order, runs_table, records)
    shots_table = selection.table
    images_table = None
    if with_occupancy:
        occupancy_columns, images_table = _occupancy(connection, selection, run_order, runs_table)
        for name, values in occupancy_columns.items():
            shots_table = shots_table.append_column(name, values)
    sources = _source_files(connection, run_order, runs_table, selection.shot_ids)
    if pinned is None:
        from runlog.pins import other_versions_pinned

        # Not in the data files: a fresh export names the pins it now differs from.
        pinned = {"other_versions_pinned": other_versions_pinned(connection, run_order)}
    return selection, shots_table, runs_table, figures_table, images_table, sources, zone, pinned


def _move_into_place(staging: Path, out: Path, overwrite: bool, catalogue) -> None:
    if out.exists() or out.is_symlink():
        if _holds_files(out) and not overwrite:
            raise ExportError(str(out), "already holds files: choose another folder or allow overwriting")
        # Checked again: the folder may have changed while the package was written.
        check_replaceable(out, catalogue)
        retired = out.parent / f".{out.name}.old-{uuid.uuid4().hex[:8]}"
        os.replace(out, retired)
        os.replace(staging, out)
        if retired.is_dir():
            shutil.rmtree(retired, ignore_errors=True)
        else:
            retired.unlink(missing_ok=True)
        return
    os.replace(staging, out)


def export_spec(catalogue, spec_path: str | Path, *, out: str | Path | None = None) -> ExportResult:
    """Run a saved export again from its ``export.toml`` and compare the data hashes.

    ``out`` defaults to the folder holding the spec when that folder is the package the
    spec came with (it holds ``datapackage.json``), else to the spec's ``out``. That
    package is replaced; any other folder holding files is refused.
    """
    spec_path = Path(spec_path)
    try:
        spec = tomllib.loads(spec_path.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError) as error:
        raise ConfigError(str(spec_path), f"cannot read the export spec: {error}") from None
    for key in ("where", "format"):
        if not isinstance(spec.get(key), str):
            raise ConfigError(str(spec_path), f"the export spec needs '{key}' (text)")
    unknown = sorted(set(spec) - {"pin", "where", "format", "with_occupancy", "monitors", "title", "out", "data"})
    if unknown:
        raise ConfigError(str(spec_path), f"unknown key(s) {', '.join(unknown)} in the export spec")
    previous = {str(k): str(v) for k, v in (spec.get("data") or {}).items()}
    if out is None:
        folder = spec_path.absolute().parent
        if (folder / MANIFEST).exists():
            out = folder
        elif isinstance(spec.get("out"), str):
            out = Path(spec["out"])
        else:
            raise ConfigError(str(spec_path), "the export spec names no 'out' folder")
    out = Path(out).absolute()
    check_replaceable(out, catalogue)
    pin = spec.get("pin")
    result = export(
        catalogue,
        None if isinstance(pin, str) else spec["where"],
        out,
        pin=pin if isinstance(pin, str) else None,
        format=spec["format"],
        with_occupancy=bool(spec.get("with_occupancy", False)),
        monitors=tuple(str(m) for m in spec.get("monitors", [])),
        title=spec.get("title"),
        overwrite=True,
    )
    changed = tuple(sorted(name for name in set(previous) | set(result.data) if previous.get(name) != result.data.get(name)))
    return ExportResult(result.out, result.shots, result.runs, result.data, result.created, previous, changed, result.pin, result.pin_changes, result.other_versions_pinned)
