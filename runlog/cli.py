"""The ``runlog`` command: a thin view over the Python API.

Each command opens the catalogue, calls one library method and prints the result, as
text for people or as JSON (``--json``, the stable machine interface). Errors are one
line on stderr and a non-zero exit code; ``--debug`` shows the traceback instead.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import functools
import json
import logging
import os
import shlex
import sys
import tempfile
import textwrap
import time
from pathlib import Path
from typing import Any

import click

from runlog import __version__
from runlog.errors import RunlogError, StoreError
from runlog.redaction import ScrubbingFilter, remember, scrub

__all__ = ["main", "cli"]


class _State:
    def __init__(self) -> None:
        self.db: str | None = None
        self.debug = False


def _common(function):
    """``--db`` and ``--debug`` on every command, as well as before the command name."""

    @click.option("--db", "db", metavar="URL", default=None, help="Catalogue URL (SQLAlchemy); else $RUNLOG_DB; else the default SQLite file.")
    @click.option("--debug", is_flag=True, default=False, help="Show tracebacks.")
    @click.pass_context
    @functools.wraps(function)
    def wrapper(ctx: click.Context, db: str | None, debug: bool, **kwargs: Any):
        state = ctx.ensure_object(_State)
        state.db = db or state.db
        state.debug = debug or state.debug
        return function(state, **kwargs)

    return wrapper


def _open(state: _State, *, create: bool = True):
    import runlog

    return runlog.open(state.db, create=create)


def _echo(message: Any = "", **kwargs: Any) -> None:
    """Every line runlog prints: credentials scrubbed from it (a URL that does not parse
    keeps its password otherwise), and control characters from the catalogue's texts (a
    run key holding a terminal escape, written by an older runlog) shown, not obeyed."""
    click.echo(_printable(scrub(message)), **kwargs)


def _printable(text: str) -> str:
    if text.replace("\n", "").replace("\t", "").isprintable():
        return text  # the common case, checked in C: a long --json answer costs no loop over its characters
    return "".join(c if c.isprintable() or c in "\n\t" else repr(c)[1:-1] for c in text)


def _unit_text(unit: str | None) -> str:
    # Imported here: runlog.units brings numpy, which --version and --help do without.
    from runlog.units import unit_text

    return unit_text(unit)


def _json(value: Any) -> None:
    _echo(json.dumps(value, indent=2, default=_json_default, ensure_ascii=False))


def _json_default(value: Any) -> Any:
    if isinstance(value, (dt.datetime, dt.date)):
        return value.isoformat()
    if hasattr(value, "item"):
        return value.item()
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


def _when(value: Any) -> str:
    if value is None:
        return "-"
    return value.strftime("%Y-%m-%d %H:%M")


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 80})
@click.option("--db", "db", metavar="URL", default=None, help="Catalogue URL (SQLAlchemy); else $RUNLOG_DB; else the default SQLite file.")
@click.option("--debug", is_flag=True, default=False, help="Show tracebacks.")
@click.version_option(version=__version__, prog_name="runlog")
@click.pass_context
def cli(ctx: click.Context, db: str | None, debug: bool) -> None:
    """runlog: the run catalogue and shot statistics of a neutral-atom lab."""
    state = ctx.ensure_object(_State)
    state.db, state.debug = db, debug


@cli.command()
@click.option("--timezone", "zone", default=None, metavar="ZONE", help="The lab's time zone (IANA name, e.g. Europe/Berlin): it decides which lab day a run belongs to.")
@_common
def init(state: _State, zone: str | None) -> None:
    """Create the catalogue, or upgrade it to this runlog's schema."""
    from runlog.store.engine import make_engine, redact, resolve_url
    from runlog.store.migrate import create_or_upgrade
    from runlog.store.rollups import check_timezone
    from runlog.store.schema import SCHEMA_REVISION

    if zone is not None:
        check_timezone(zone)  # before anything is made

    # Not runlog.open(): opening refuses a catalogue at an older revision, and init is
    # the one command that upgrades it.
    url = resolve_url(state.db)
    engine = make_engine(url)
    try:
        create_or_upgrade(engine)
    except RunlogError:
        raise
    except Exception as error:  # driver errors differ per backend; say which store failed
        raise StoreError(f"cannot initialise catalogue {redact(url)}: {str(error).strip().splitlines()[0] if str(error).strip() else type(error).__name__}") from None
    finally:
        engine.dispose()
    _echo(f"catalogue {redact(url)} is at schema revision {SCHEMA_REVISION}")
    if zone is not None:
        _set_timezone(state, zone)


def _set_timezone(state: _State, zone: str) -> None:
    with _open(state) as catalogue:
        groups = catalogue.set_lab_timezone(zone)
    _echo(f"lab time zone {zone}; lab days and daily rollups rebuilt ({groups} groups)")


@cli.command()
@click.argument("zone", required=False)
@_common
def timezone(state: _State, zone: str | None) -> None:
    """Show the lab's time zone, or change it to ZONE (lab days and rollups are rebuilt)."""
    if zone is not None:
        _set_timezone(state, zone)
        return
    with _open(state) as catalogue:
        _echo(catalogue.lab_timezone)


@cli.command()
@click.argument("paths", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object per file.")
@click.option("--config", type=click.Path(path_type=Path, dir_okay=False), default=None, help="runlog.toml mapping your column names onto the contract.")
@click.option("--apparatus", default=None, help="Apparatus of monitor tables that have no apparatus column.")
@_common
def ingest(state: _State, paths: tuple[Path, ...], as_json: bool, config: Path | None, apparatus: str | None) -> None:
    """Ingest shot-table and monitor-table files, or folders of *.parquet and *.csv files.

    Monitor tables (docs/monitor-table.md) are told apart by their columns. With [[rules]]
    in --config, the runs a file brought in get those figures too.
    """
    from runlog.config import load_config

    mapping = load_config(config)
    with _open(state) as catalogue:
        progress = None if as_json or not sys.stderr.isatty() else _progress_bar()
        try:
            results = catalogue.ingest(paths, config=mapping, progress=progress and progress.update, apparatus=apparatus)
        finally:
            if progress:
                progress.close()
    if as_json:
        _json([r.as_dict() | ({"derived": [_outcome_json(o) for o in r.derived]} if mapping.rules else {}) for r in results])
    else:
        for r in results:
            if r.status == "refused":
                _echo(f"refused          {r.reason}")
            elif r.monitors:
                names = ", ".join(r.monitors[:3]) + (f" (+{len(r.monitors) - 3} more)" if len(r.monitors) > 3 else "")
                _echo(f"{r.status:<16} {r.file}: {r.values} monitor values, {names}")
            else:
                runs = ", ".join(r.runs[:3]) + (f" (+{len(r.runs) - 3} more)" if len(r.runs) > 3 else "")
                _echo(f"{r.status:<16} {r.file}: {r.shots} shots, run {runs}")
            for outcome in r.derived:
                _wrapped(_outcome_line(outcome))
    if any(r.status == "refused" for r in results):
        sys.exit(1)


class _progress_bar:
    """A rich progress bar for files large enough to wait for."""

    def __init__(self) -> None:
        self._progress = None
        self._task = None
        self._file = None

    def update(self, file: str, done: int, total: int) -> None:
        if total < 200_000:
            return
        from rich.progress import Progress

        if self._progress is None:
            self._progress = Progress(transient=True)
            self._progress.start()
        if self._file != file:
            self._file = file
            self._task = self._progress.add_task(Path(file).name[:30], total=total)
        self._progress.update(self._task, completed=done)

    def close(self) -> None:
        if self._progress is not None:
            self._progress.stop()


@cli.command()
@click.option("--apparatus", default=None, help="Only this apparatus.")
@click.option("--since", default=None, metavar="DATE", help="Only runs finished on or after DATE (ISO).")
@click.option("--json", "as_json", is_flag=True)
@_common
def runs(state: _State, apparatus: str | None, since: str | None, as_json: bool) -> None:
    """List runs, newest first."""
    with _open(state) as catalogue:
        # Plain records, not the DataFrame of catalogue.runs(): this command stays free of pandas.
        rows = catalogue.run_records(apparatus=apparatus, since=_date_option(since, "--since"))
    if as_json:
        _json([{"run": r["run"], "apparatus": r["apparatus"], "sequence": r["sequence"], "shots": int(r["shots"]), "started": r["started"].isoformat(), "finished": r["finished"].isoformat()} for r in rows])
        return
    if not rows:
        _echo("no runs")
        return
    _echo(f"{'run':<22} {'apparatus':<14} {'sequence':<12} {'shots':>6}  started (UTC)")
    for r in rows:
        _echo(f"{str(r['run'])[:22]:<22} {str(r['apparatus'])[:14]:<14} {str(r['sequence'])[:12]:<12} {int(r['shots']):>6}  {_when(r['started'])}")


def _date_option(value: str | None, option: str) -> dt.datetime | None:
    if value is None:
        return None
    try:
        parsed = dt.datetime.fromisoformat(value)
    except ValueError:
        raise click.BadParameter(f"'{value}' is not an ISO date or time (e.g. 2026-03-01)", param_hint=option) from None
    return parsed


@cli.command()
@click.argument("run")
@click.option("--apparatus", default=None, help="Needed when several apparatus have a run of that name.")
@click.option("--analysis", default=None, metavar="VERSION", help="Show this analysis version (default: the current one).")
@click.option("--history", is_flag=True, help="Also every figure record of the version, newest first.")
@click.option("--json", "as_json", is_flag=True)
@_common
def show(state: _State, run: str, apparatus: str | None, analysis: str | None, history: bool, as_json: bool) -> None:
    """Show one run: parameters, measurements, images and figures."""
    with _open(state) as catalogue:
        info = catalogue.run(run, apparatus=apparatus, analysis=analysis, history=history)
    if as_json:
        _json(info.as_dict())
        return
    _wrapped(f"run {info.run}  ({info.apparatus}, {info.sequence})", indent="")
    if len(info.analyses) > 1 or info.analysis:
        listed = ", ".join(f"'{a['analysis']}'" + (" (current)" if a["current"] else " (withdrawn)" if a["withdrawn"] else "") for a in info.analyses)
        _wrapped(f"analysis '{info.analysis}'; versions: {listed}")
    _wrapped(f"{info.shots} shots, {_when(info.started)} to {_when(info.finished)} UTC" + (f", operator {info.operator}" if info.operator else ""))
    if info.excluded_shots:
        _wrapped(f"{info.excluded_shots} of them left out of the figures by their status (see [figures] counting_status)")
    if info.notes:
        _wrapped(f"notes: {info.notes}")
    if info.tags:
        _wrapped(f"tags: {', '.join(info.tags)}")
    _echo("parameters")
    for name, entry in info.parameters.items():
        unit = f" {_unit_text(entry['unit'])}" if entry["unit"] else ""
        if entry["scanned"]:
            span = f"{entry['min']:g} .. {entry['max']:g}{unit}" if "min" in entry else "(varies)"
            _echo(f"  {name:<24} scanned  {span}")
        else:
            value = entry["value"]
            shown = f"{value:g}" if isinstance(value, float) else str(value)
            _echo(f"  {name:<24} {shown}{unit}")
    if info.measurements:
        _echo("measurements")
        _wrapped(", ".join(info.measurements))
    if info.images:
        _echo("images")
        for name, image in info.images.items():
            _echo(f"  {name:<24} {image['role']:<9} {'x'.join(map(str, image['shape']))} sites")
    if info.figures:
        _echo("figures")
        for name, figure in info.figures.items():
            _echo("  " + _figure_line(name, figure))
    if info.monitors:
        _echo("monitors over the run (first to last shot)")
        for entry in info.monitors:
            unit = f" {_unit_text(entry['unit'])}" if entry["unit"] else ""
            if entry["count"]:
                _echo(f"  {entry['name']:<24} mean {entry['mean']:.6g}{unit}, {entry['minimum']:.6g} .. {entry['maximum']:.6g}, {entry['count']} values")
            else:
                start = f"; {entry['at_start']:.6g}{unit} at the start" if entry["at_start"] is not None else "; none within 600 s before the start"
                _echo(f"  {entry['name']:<24} no value logged during the run{start}")
    if info.figure_history is not None:
        _echo("figure records, newest first")
        for record in info.figure_history:
            options = ", ".join(f"{k}={v}" for k, v in record["options"].items())
            mark = "*" if record["in_force"] else " "
            _echo(f" {mark}{_figure_line(record['figure'], record)}  {record['computed_at'][:19]}" + (f"  [{options}]" if options else ""))


@cli.command("use-analysis")
@click.argument("run")
@click.argument("version")
@click.option("--apparatus", default=None, help="Needed when several apparatus have a run of that name.")
@_common
def use_analysis(state: _State, run: str, version: str, apparatus: str | None) -> None:
    """Make analysis VERSION of RUN the current one ('' is the unnamed version)."""
    with _open(state) as catalogue:
        switched = catalogue.use_analysis(run, version, apparatus=apparatus)
    _echo(f"run {switched['run']}: analysis '{switched['current']}' is current (was '{switched['before']}')")


@cli.command()
@click.argument("run")
@click.option("--apparatus", default=None, help="Needed when several apparatus have a run of that name.")
@click.option("--from", "from_analysis", default=None, metavar="VERSION", help="The old version (default: the one before --to).")
@click.option("--to", "to_analysis", default=None, metavar="VERSION", help="The new version (default: the current one).")
@click.option("--json", "as_json", is_flag=True)
@_common
def impact(state: _State, run: str, apparatus: str | None, from_analysis: str | None, to_analysis: str | None, as_json: bool) -> None:
    """What a new analysis version of RUN moved: old and new figures, in combined errors."""
    with _open(state) as catalogue:
        report = catalogue.impact(run, apparatus=apparatus, from_analysis=from_analysis, to_analysis=to_analysis)
    if as_json:
        _json(report)
        return
    for entry in report:
        old, new = entry["old"], entry["new"]

        _echo(_moved_line(entry["figure"], old, new, entry["sigma"]))
        if entry["pins"]:
            _wrapped(f"pins holding the old version: {', '.join(entry['pins'])}")


def _side(value: dict[str, Any] | None) -> str:
    if value is None:
        return "-"
    error = f" ± {value['stderr']:.2g}" if value.get("stderr") is not None else ""
    return f"{value['value']:.5g}{error} ('{value['analysis']}')"


def _moved_line(figure: str, old: dict[str, Any] | None, new: dict[str, Any] | None, sigma: float | None) -> str:
    moved = f"{sigma:+.2f} sigma" if sigma is not None else ""
    return f"{figure:<20} {_side(old):>30} -> {_side(new):<30} {moved}"


@cli.command()
@click.argument("name")
@click.option("--where", "where", required=True, metavar="EXPR", help="Filter expression choosing the shots to freeze.")
@click.option("--json", "as_json", is_flag=True)
@_common
def pin(state: _State, name: str, where: str, as_json: bool) -> None:
    """Freeze the shots EXPR selects now, their analysis versions and figures, as NAME."""
    with _open(state) as catalogue:
        made = catalogue.pin(name, where)
    if as_json:
        _json(made)
        return
    _echo(f"pinned '{made['name']}': {made['shots']} shots of {made['runs']} runs; runlog export --pin {made['name']} --out DIR writes them")


@cli.command()
@click.option("--json", "as_json", is_flag=True)
@_common
def pins(state: _State, as_json: bool) -> None:
    """The pinned selections, and what newer analyses would change in each."""
    with _open(state) as catalogue:
        listed = catalogue.pins()
    if as_json:
        _json(listed)
        return
    for entry in listed:
        _echo(f"{entry['name']}: {entry['shots']} shots of {entry['runs']} runs, pinned {entry['created_at'][:16].replace('T', ' ')} by {entry['author'] or '?'}")
        _wrapped(f"filter: {entry['where']}")
        if not entry["changes"]:
            _wrapped("the catalogue still holds these versions and figures as current")
        for change in entry["changes"]:
            _wrapped(f"{change['run']}: " + _moved_line(change["figure"], change["old"], change["new"], change["sigma"]))


@cli.command()
@click.option("--file", "file", type=click.Path(path_type=Path, dir_okay=False), default=None, help="An ingested file whose run versions go out.")
@click.option("--run", default=None, help="A run, every analysis version of it.")
@click.option("--apparatus", default=None, help="Needed when several apparatus have a run of that name.")
@click.option("--reason", required=True, help="Why (kept with the withdrawal).")
@click.option("--json", "as_json", is_flag=True)
@_common
def withdraw(state: _State, file: Path | None, run: str | None, apparatus: str | None, reason: str, as_json: bool) -> None:
    """Take a file's shots or a run out of figures, rollups, drift and exports (kept, restorable)."""
    if (file is None) == (run is None):
        raise click.UsageError("give --file PATH or --run RUN")
    with _open(state) as catalogue:
        done = catalogue.withdraw(file=file, run=run, apparatus=apparatus, reason=reason)
    if as_json:
        _json(done)
        return
    versions = ", ".join(f"{r['run']} '{r['analysis']}'" for r in done["runs"])
    _echo(f"withdrawn ({done['id']}): {versions}")


@cli.command()
@click.option("--file", "file", type=click.Path(path_type=Path, dir_okay=False), default=None, help="A withdrawn file.")
@click.option("--run", default=None, help="A run with withdrawn versions.")
@click.option("--apparatus", default=None, help="Needed when several apparatus have a run of that name.")
@click.option("--json", "as_json", is_flag=True)
@_common
def restore(state: _State, file: Path | None, run: str | None, apparatus: str | None, as_json: bool) -> None:
    """Bring back what ``withdraw`` took out, exactly as it was."""
    if (file is None) == (run is None):
        raise click.UsageError("give --file PATH or --run RUN")
    with _open(state) as catalogue:
        done = catalogue.restore(file=file, run=run, apparatus=apparatus)
    if as_json:
        _json(done)
        return
    for withdrawal in done:
        versions = ", ".join(f"{r['run']} '{r['analysis']}'" for r in withdrawal["runs"])
        _echo(f"restored ({withdrawal['id']}): {versions}")


def _wrapped(text: str, indent: str = "  ") -> None:
    """Print ``text`` within 80 columns, continuation lines indented."""
    for line in textwrap.wrap(text, width=80, initial_indent=indent, subsequent_indent=indent + "  ", break_long_words=True) or [indent]:
        _echo(line)


def _figure_line(name: str, figure: dict[str, Any]) -> str:
    unit = f" {_unit_text(figure['unit'])}" if figure.get("unit") else ""
    text = f"{name:<24} {figure['value']:.4g}"
    if "stderr" in figure and figure["stderr"] is not None:
        text += f" ± {figure['stderr']:.2g}"
    text += unit
    if "ci_low" in figure:
        text += f"  [{figure['ci_low']:.4g}, {figure['ci_high']:.4g}]"
    text += f"  ({figure['method']})"
    return text + ("  out of range: outside its physical range, not in drift" if figure.get("out_of_range") else "")


@cli.command("note")
@click.argument("text")
@click.option("--run", default=None, help="Tie the note to this run.")
@click.option("--apparatus", default=None, help="Tie the note to this apparatus (with --at), or name the run's apparatus.")
@click.option("--at", default=None, metavar="TIME", help="When (ISO; default now, or the run's start).")
@_common
def note(state: _State, text: str, run: str | None, apparatus: str | None, at: str | None) -> None:
    """Add a note to a run, or to an apparatus at a time."""
    if run is None and apparatus is None:
        raise click.UsageError("give --run RUN, or --apparatus A (with --at TIME)")
    with _open(state) as catalogue:
        number = catalogue.annotate(text, run=run, apparatus=apparatus, at=_date_option(at, "--at"))
    _echo(f"note {number} added")


# The command's first name, kept for scripts written before it was called 'note'.
cli.add_command(click.Command("annotate", params=note.params, callback=note.callback, help=note.help, hidden=True))


@cli.command()
@click.argument("folder", type=click.Path(path_type=Path, file_okay=False))
@click.option("--interval", default=5.0, show_default=True, help="Seconds between looks at the folder.")
@click.option("--config", type=click.Path(path_type=Path, dir_okay=False), default=None, help="runlog.toml for the files.")
@click.option("--quarantine", type=click.Path(path_type=Path, file_okay=False), default=None, help="Where refused files go (default FOLDER/quarantine).")
@click.option("--log", "log_file", type=click.Path(path_type=Path, dir_okay=False), default=None, help="Log file (default FOLDER/runlog-watch.log).")
@click.option("--digest-hour", type=click.IntRange(0, 23), default=None, metavar="H", help="Send yesterday's digest once a day at this lab hour (e-mail and/or webhook from the environment).")
@click.option("--stop-after", type=float, default=None, hidden=True)
@_common
def watch(state: _State, folder: Path, interval: float, config: Path | None, quarantine: Path | None, log_file: Path | None, digest_hour: int | None, stop_after: float | None) -> None:
    """Ingest new files in FOLDER as they appear, once each has stopped changing."""
    from runlog.config import load_config
    from runlog.watch import Watcher

    if not folder.is_dir():
        raise click.BadParameter(f"{folder} is not a folder", param_hint="FOLDER")
    mapping = load_config(config)
    logger = logging.getLogger("runlog.watch")
    logger.setLevel(logging.INFO)
    handler = logging.FileHandler(log_file or folder / "runlog-watch.log", encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
    handler.addFilter(ScrubbingFilter())
    # The same lines on the terminal: one for each file taken or refused, as it happens.
    terminal = logging.StreamHandler(sys.stdout)
    terminal.setFormatter(logging.Formatter("%(asctime)s %(message)s", datefmt="%H:%M:%S"))
    terminal.addFilter(ScrubbingFilter())
    logger.addHandler(handler)
    logger.addHandler(terminal)
    with contextlib.ExitStack() as cleanup, _open(state) as catalogue:
        cleanup.callback(lambda: (logger.removeHandler(handler), logger.removeHandler(terminal), handler.close()))
        logger.info("catalogue %s", catalogue.url)

        def ingest_and_derive(paths: list[Path]) -> list:
            results = catalogue.ingest(paths, config=mapping)
            for result in results:
                for outcome in result.derived:
                    logger.info("%s", _outcome_line(outcome))
            return results

        # After each ingest: judge the reference series, log each new alarm once.
        sent_for: set[str] = set()

        def judge_drift(results: list) -> None:
            _judge(results)

        def _judge(results: list) -> None:
            for alarm in catalogue.new_alarms():
                where = f" [{alarm['series']['label']}]" if alarm.get("series") else ""
                logger.warning("alarm #%s %s %s%s: %s on %s (%s)", alarm["id"], alarm["apparatus"], alarm["quantity"], where, alarm["reason"], alarm["date"], alarm["method"])

        def send_digest_when_due() -> None:
            from runlog.digest import due_day, send_due

            day = due_day(catalogue.lab_timezone, digest_hour, sent_for)
            if day is not None:
                sent_for.add(day.isoformat())
                for line in send_due(catalogue, day):
                    logger.info("%s", line)

        watcher = Watcher(folder, ingest_and_derive, quarantine, after_ingest=judge_drift, log=logger, after_poll=send_digest_when_due if digest_hour is not None else None)
        _echo(f"watching {folder} every {interval:g} s (Ctrl-C to stop)", err=True)
        try:
            watcher.run(interval, stop_after=stop_after)
        except KeyboardInterrupt:
            logger.info("stopped")


@cli.command()
@click.option("--days", default=21, show_default=True, help="How many days of invented runs.")
@click.option("--seed", default=7, show_default=True)
@click.option("--no-dashboard", is_flag=True, help="Do not open the dashboard on the demo catalogue afterwards.")
@click.option("--port", default=8501, show_default=True, help="Port of the dashboard.")
@_common
def demo(state: _State, days: int, seed: int, no_dashboard: bool, port: int) -> None:
    """Build the demo catalogue (an invented lab) and print what it holds."""
    import platformdirs

    from runlog.demo import DEMO_RULES, SCENARIO, write_demo_files

    if state.db is None and not os.environ.get("RUNLOG_DB"):
        # The demo never mixes invented runs into the lab's own default catalogue.
        folder = Path(platformdirs.user_data_dir("runlog", appauthor=False))
        state.db = f"sqlite:///{folder / 'demo.sqlite'}"
    start = dt.date(2026, 9, 1)
    tick = time.perf_counter()

    def step(text: str) -> None:
        # Progress on stderr, so that the summary on stdout stays what a script reads.
        _echo(f"demo: {text} ({time.perf_counter() - tick:.0f} s)", err=True)

    with tempfile.TemporaryDirectory(prefix="runlog-demo-") as temporary:
        step(f"writing {days} days of invented shot tables")
        files = write_demo_files(Path(temporary), days=days, start=start, seed=seed)
        with _open(state) as catalogue:
            results = []
            for number, file in enumerate(files, 1):
                results += catalogue.ingest([file])
                if number == 1 or number % 10 == 0 or number == len(files):
                    step(f"ingested {number} of {len(files)} files")
            new_runs = sorted({run for r in results if r.status == "ingested" for run in r.runs})
            if new_runs:
                step(f"fitting the scans of the new runs")
            outcomes = catalogue.apply_rules(DEMO_RULES, runs=new_runs) if new_runs else []
            step("checking every quantity for drift")
            alarms = catalogue.check_drift()
            counts = catalogue.counts()
            url = catalogue.url
    took = time.perf_counter() - tick
    made = sum(r.shots for r in results if r.status == "ingested")
    _echo(f"demo catalogue: {url}")
    _echo(f"{len(files)} files: {made} shots ingested now, {sum(r.status == 'already-present' for r in results)} files already present ({took:.1f} s)")
    _echo(f"catalogue holds {counts['apparatus']} apparatus, {counts['runs']} runs, {counts['shots']} shots")
    fitted = sum(1 for o in outcomes if not isinstance(o, Exception))
    if outcomes:
        _echo(f"fitted figures: {fitted} scans fitted, {len(outcomes) - fitted} refused")
    _echo("what the invented lab did (the truth behind the files):")
    for line in SCENARIO.describe(start, days):
        _wrapped(line)
    # The same alarms, in the same words, as 'runlog alarms' lists right after.
    _echo(f"what runlog found: {len(alarms)} open alarms (runlog alarms lists them)")
    for alarm in alarms:
        _wrapped(_alarm_line(alarm))
    _echo("to use the demo catalogue with every other command, in this shell:")
    _echo(f"  export RUNLOG_DB={shlex.quote(url)}")
    if any(r.status == "refused" for r in results):
        for r in results:
            if r.status == "refused":
                _echo(f"refused: {r.reason}", err=True)
        sys.exit(1)
    if not no_dashboard and sys.stdin.isatty() and sys.stdout.isatty():
        # Only in a terminal, where Ctrl-C stops it; scripts and pipes get the catalogue alone.
        from runlog.dashboard import serve

        serve(state.db, port=port, say=click.echo)


@cli.command()
@click.argument("run", required=False)
@click.option("--kind", default=None, metavar="KIND", help="counting, fringe, coherence, spreading, sorting, correlator, rabi, spectroscopy, echo, t1, lifetime, detection, release_recapture or two_atom.")
@click.option("--x", "x", default=None, metavar="PARAMETER", help="The scanned parameter (default: the only suitable one).")
@click.option("--y", "y", default=None, metavar="MEASUREMENT", help="The measurement; correlator: q1,q2,q3 or a,b (default: the only one).")
@click.option("--envelope", type=click.Choice(["gaussian", "exponential", "thermal"]), default="gaussian", show_default=True, help="Coherence decay shape (thermal: trapped atoms, docs/figures.md).")
@click.option("--target", default=None, metavar="SITES", help="Sorting target: site indices like 0,1,2,5, or a parameter holding them.")
@click.option("--image", default=None, help="Occupancy image for spreading and sorting (default: the last).")
@click.option("--model", default=None, help="The model of a kind that has several: spectroscopy lorentzian|rabi, rabi oscillation|lineshape, lifetime single|two-body, detection poisson|gaussian.")
@click.option("--set", "settings", multiple=True, metavar="NAME=VALUE", help="A kind's setting, e.g. pulse=20us, stretch=2, reference=no_pushout, threshold=7, depth=1mK, mass=87Rb; repeatable.")
@click.option("--apparatus", default=None, help="Needed when several apparatus have a run of that name.")
@click.option("--all", "everything", is_flag=True, help="Recompute counting figures of every run and apply every rule.")
@click.option("--config", type=click.Path(path_type=Path, dir_okay=False), default=None, help="runlog.toml: the [[rules]] --all applies, and the [apparatus] constants (field_sensitivity).")
@click.option("--series", "series_name", default=None, metavar="NAME", help="Fit a series across runs instead: figure --y of the runs against their parameter --x, with --model exponential|power_law|linear.")
@click.option("--where", "where", default=None, metavar="EXPR", help="With --series: the runs holding shots EXPR selects (default: every run).")
@click.option("--json", "as_json", is_flag=True)
@_common
def derive(state: _State, run: str | None, kind: str | None, x: str | None, y: str | None, envelope: str, target: str | None, image: str | None, model: str | None, settings: tuple[str, ...], apparatus: str | None, everything: bool, config: Path | None, series_name: str | None, where: str | None, as_json: bool) -> None:
    """Compute and store the figures of one KIND for RUN, recompute all (--all), or fit a
    series across runs (--series NAME --y FIGURE --x PARAMETER --model MODEL)."""
    from runlog.config import load_config
    from runlog.derive import derive_all

    if series_name is not None:
        if run is not None or kind is not None or everything or x is None or y is None:
            raise click.UsageError("--series NAME needs --y FIGURE and --x PARAMETER (and no RUN, --kind or --all)")
        with _open(state) as catalogue:
            made = catalogue.derive_series(series_name, y, x, model=model or "exponential", where=where)
        if as_json:
            _json(made)
            return
        _series_lines(made)
        return
    if where is not None:
        raise click.UsageError("--where chooses the runs of a --series")
    if everything:
        if run is not None or kind is not None or settings or model is not None or any(v is not None for v in (x, y, target, image, apparatus)):
            raise click.UsageError("--all recomputes every run as the rules say: give no RUN, --kind or other choices")
        mapping = load_config(config)
        with _open(state) as catalogue:
            summary = derive_all(catalogue, mapping.rules, interval=mapping.interval if config else None, apparatus_settings=mapping.apparatus_settings)
        if as_json:
            _json(summary.as_dict())
            return
        _echo(f"{summary.runs} runs, {summary.figures} figures stored, {len(summary.failures)} failed")
        for failure in summary.failures:
            _wrapped(_outcome_line(failure))
        return
    if run is None or kind is None:
        raise click.UsageError("give RUN and --kind KIND, or --all")
    chosen: dict[str, str] = {}
    for text in settings:
        name, sep, value = text.partition("=")
        if not sep or not name.strip() or not value.strip():
            raise click.UsageError(f"--set {text!r}: give NAME=VALUE")
        chosen[name.strip()] = value.strip()
    mapping = load_config(config)
    with _open(state) as catalogue:
        info = catalogue.run(run, apparatus=apparatus)
        result = catalogue.derive(run, kind, x=x, y=y, envelope=envelope, target=target, image=image, apparatus=info.apparatus, model=model, settings=chosen or None, constants=mapping.apparatus_settings.get(info.apparatus))
    if as_json:
        _json(result.as_dict())
        return
    _wrapped(f"run {result.run}: {result.kind}, {len(result.figures)} figures stored", indent="")
    for name, figure in result.as_dict()["figures"].items():
        _echo("  " + _figure_line(name, figure))


def _series_lines(made: dict[str, Any]) -> None:
    chi = f", chi2/dof {made['chi_square']:.3g}/{made['degrees_of_freedom']}" if made["chi_square"] is not None else ""
    _echo(f"series {made['name']}: {made['figure']} vs {made['parameter']}, {made['model']}, {made['points']} runs{chi}")
    for name, value in made["values"].items():
        _echo("  " + _figure_line(name, value))
    for left in made["left_out"]:
        _wrapped(f"left out {left['run']} ({left['apparatus']}): {left['why']}")


@cli.command("series-fits")
@click.argument("name", required=False)
@click.option("--history", is_flag=True, help="Every fit of NAME, newest first.")
@click.option("--json", "as_json", is_flag=True)
@_common
def series_fits_command(state: _State, name: str | None, history: bool, as_json: bool) -> None:
    """The series across runs (runlog derive --series), with their fits and member runs."""
    with _open(state) as catalogue:
        found = catalogue.series_fits(name, history=history)
    if as_json:
        _json(found)
        return
    for made in found:
        _series_lines(made)
        if name is not None:
            for member in made["members"]:
                error = "" if member["stderr"] is None else f" ± {member['stderr']:.2g}"
                _wrapped(f"{member['run']} ({member['apparatus']}): x = {member['x']:g}, y = {member['y']:.5g}{error}")


def _outcome_line(outcome) -> str:
    from runlog.errors import FitError

    if isinstance(outcome, FitError):
        return f"failed: {outcome}"
    return f"derived: run {outcome.run}, {outcome.kind}, {len(outcome.figures)} figures"


def _outcome_json(outcome) -> dict[str, Any]:
    from runlog.errors import FitError

    if isinstance(outcome, FitError):
        return {"run": outcome.run, "kind": outcome.kind, "error": outcome.reason}
    return outcome.as_dict()


@cli.command()
@click.argument("quantity")
@click.option("--apparatus", default=None, help="The apparatus (needed when several measure QUANTITY).")
@click.option("--sequence", default=None, help="The reference series within this sequence (with --pooled: all its runs).")
@click.option("--series", "series_key", default=None, metavar="KEY", help="Another series than the reference one (SEQUENCE@FINGERPRINT, see --list-series).")
@click.option("--pooled", is_flag=True, help="Every run (of --sequence) pooled, unlike runs mixed.")
@click.option("--list-series", is_flag=True, help="List the series holding QUANTITY and stop.")
@click.option("--since", default=None, metavar="DATE", help="First lab day (ISO).")
@click.option("--until", default=None, metavar="DATE", help="Last lab day (ISO).")
@click.option("--baseline-days", default=28, show_default=True, help="In-control lab days in the rolling baseline.")
@click.option("--baseline", "baseline_range", default=None, metavar="FROM:TO", help="Lab days that set the limits instead (ISO dates).")
@click.option("--param", "ranges", multiple=True, metavar="NAME=LOW:HIGH", help="Only runs with this parameter in range (stored unit); repeatable.")
@click.option("--causes", is_flag=True, help="Notes, then suspects, at each change and each alarm day.")
@click.option("--stability", is_flag=True, help="The Allan deviation over the series' runs, and what it means.")
@click.option("--json", "as_json", is_flag=True)
@_common
def drift(state: _State, quantity: str, apparatus: str | None, sequence: str | None, series_key: str | None, pooled: bool, list_series: bool, since: str | None, until: str | None, baseline_days: int, baseline_range: str | None, ranges: tuple[str, ...], causes: bool, stability: bool, as_json: bool) -> None:
    """Daily values of a figure for one reference series, control limits, changes in level and alarms."""
    parameters = dict(_range_option(text) for text in ranges)
    baseline = None
    if baseline_range is not None:
        first, _, last = baseline_range.partition(":")
        baseline = (_day_option(first, "--baseline"), _day_option(last, "--baseline"))
    with _open(state) as catalogue:
        if list_series:
            found = catalogue.series(quantity, apparatus=apparatus)
            if as_json:
                _json(found)
            for entry in [] if as_json else found:
                _wrapped(f"{'*' if entry['reference'] else ' '} {entry['key']}: {entry['label']}, {entry['days']} days, {entry['runs']} runs, {entry['first']} to {entry['last']}", indent="")
            return
        result = catalogue.drift(quantity, apparatus=apparatus, sequence=sequence, series=series_key, pooled=pooled, since=_day_option(since, "--since"), until=_day_option(until, "--until"), baseline_days=baseline_days, baseline=baseline, parameters=parameters or None)
        days = sorted({c.date for c in result.changes} | {dt.date.fromisoformat(e["date"]) for e in result.excursions}) if causes else []
        found_suspects = {day: catalogue.suspects(quantity, day, apparatus=result.apparatus, top=5) for day in days}
        steadiness = catalogue.stability(quantity, apparatus=result.apparatus, series=result.series["key"]) if stability and result.series else None
    if as_json:
        data = result.as_dict()
        if stability:
            data["stability"] = steadiness
        if causes:
            for entry in data["changes"] + data["excursions"]:
                found = found_suspects[dt.date.fromisoformat(entry["date"])]
                entry["notes"] = found["notes"]
                entry["causes"] = found["causes"]
                entry["verdict"] = found["verdict"]
        _json(data)
        return
    unit = f" [{_unit_text(result.unit)}]" if result.unit else ""
    _wrapped(f"{result.quantity}{unit} on {result.apparatus}" + (f", series {result.series['label']} ({result.series['key']})" if result.series else (f", sequence {result.sequence}" if result.sequence else ", all runs pooled")), indent="")
    outside = set(result.out_of_limits)
    _echo(f"  {'day':<10}  {'value':>10}  {'95% interval':<23} {'runs':>5} {'shots':>7}")
    for index, point in enumerate(result.points):
        flag = "  *" if index in outside else ""
        _echo(f"  {point.date.isoformat():<10}  {point.value:>10.4g}  [{point.ci_low:>9.4g}, {point.ci_high:>9.4g}] {point.runs:>5} {point.shots:>7}{flag}")
    if outside:
        _echo("  * outside the control limits")
    for excursion in result.excursions:
        _wrapped(f"out of control from {excursion['date']}: {excursion['size']:+.4g}{unit}, {excursion['z']:+.1f} standard errors ({', '.join(excursion['signals'])})")
        _print_suspects(found_suspects.get(dt.date.fromisoformat(excursion["date"])))
    for change in result.changes:
        _wrapped(f"change on {change.date.isoformat()}: {change.before:.4g} -> {change.after:.4g}{unit} ({change.method})")
        _print_suspects(found_suspects.get(change.date))
    for setting in result.settings:
        _wrapped(f"{setting['day']}: {setting['words']}")
    if steadiness is not None:
        _wrapped(f"stability: {steadiness['words']}")
    if not result.changes and len(result.points) >= 3:
        _echo("  no change in level found")
    _echo("advisory only: not a replacement for the lab's interlocks or rules")


@cli.command()
@click.option("--day", default=None, metavar="DATE", help="The lab day (ISO; default yesterday in the lab's time zone).")
@click.option("--apparatus", default=None, help="Only this apparatus.")
@click.option("--out", type=click.Path(path_type=Path, dir_okay=False), default=None, help="Write the self-contained HTML page here.")
@click.option("--mail", is_flag=True, help="Send by e-mail (RUNLOG_SMTP_HOST, RUNLOG_DIGEST_TO, ... in the environment).")
@click.option("--webhook", "webhook", is_flag=True, help="Post the text to the chat webhook in RUNLOG_DIGEST_WEBHOOK.")
@click.option("--json", "as_json", is_flag=True)
@_common
def digest(state: _State, day: str | None, apparatus: str | None, out: Path | None, mail: bool, webhook: bool, as_json: bool) -> None:
    """One lab day per apparatus against its reference: headline figures, open alarms with
    their notes and suspects, the day's notes, ingest health; as text, HTML, e-mail or chat."""
    from runlog.digest import build_digest, digest_html, digest_text, send_mail, send_webhook

    with _open(state) as catalogue:
        found = build_digest(catalogue, day=_day_option(day, "--day"), apparatus=apparatus)
    if out is not None:
        temporary = out.with_name(out.name + ".partial")
        temporary.write_text(digest_html(found), encoding="utf-8")
        temporary.replace(out)  # nothing half-written
    if mail:
        recipients = send_mail(found)
        _echo(f"digest sent to {len(recipients)} recipient{'s' if len(recipients) != 1 else ''}", err=True)
    if webhook:
        status = send_webhook(found)
        _echo(f"digest posted to the chat webhook (HTTP {status})", err=True)
    if as_json:
        _json(found)
    elif out is None or mail or webhook:
        _echo(digest_text(found), nl=False)
    else:
        _echo(f"wrote {out}")


def _print_suspects(found: dict[str, object] | None) -> None:
    if found is None:
        return
    for note in found["notes"]:
        _wrapped(f"  {note['kind']} {note['day']}" + (f" ({note['run']})" if note.get("run") else "") + f": {note['text']}")
    for cause in found["causes"]:
        _wrapped(f"  suspect: {cause['words']}")
    _wrapped(f"  {found['verdict']}")


@cli.command()
@click.option("--apparatus", default=None, help="Only this apparatus.")
@click.option("--all", "show_all", is_flag=True, help="Acknowledged alarms too.")
@click.option("--ack", "acknowledge", type=int, default=None, metavar="ID", help="Acknowledge alarm ID.")
@click.option("--note", default="", help="With --ack: what it was (becomes a note on that day).")
@click.option("--accept", is_flag=True, help="With --ack: the new level is the reference from the alarm's day on (a new baseline).")
@click.option("--json", "as_json", is_flag=True)
@_common
def alarms(state: _State, apparatus: str | None, show_all: bool, acknowledge: int | None, note: str, accept: bool, as_json: bool) -> None:
    """Check the reference series of every quantity for drift and list the open alarms (or acknowledge one)."""
    if accept and acknowledge is None:
        raise click.UsageError("--accept needs --ack ID")
    with _open(state) as catalogue:
        if acknowledge is not None:
            annotation = catalogue.acknowledge(acknowledge, note, accept=accept)
            _echo(f"alarm {acknowledge} {'acknowledged, new level accepted' if accept else 'acknowledged'} (note {annotation})")
            return
        catalogue.check_drift(apparatus=apparatus)
        found = catalogue.alarms(status=None if show_all else "open", apparatus=apparatus)
    if as_json:
        _json(found)
        return
    if not found:
        _echo("no open alarms")
        return
    for alarm in found:
        _wrapped(_alarm_line(alarm), indent="")
    _echo("advisory only: not a replacement for the lab's interlocks or rules")


def _alarm_line(alarm: dict[str, Any]) -> str:
    """One alarm as ``runlog alarms`` and the demo's summary print it."""
    size = "" if alarm["size"] is None else f" ({alarm['size']:+.3g})"
    value = "" if alarm["value"] is None else f" to {alarm['value']:.4g}"
    where = f" [{alarm['series']['label']}]" if alarm.get("series") else ""
    return f"#{alarm['id']} {alarm['date']} {alarm['apparatus']} {alarm['quantity']}{where}: {alarm['reason']}{value}{size} ({alarm['method']}), {alarm['status']}"


@cli.command()
@click.argument("names", nargs=-1)
@click.option("--apparatus", default=None, help="Only this apparatus.")
@click.option("--json", "as_json", is_flag=True)
@_common
def calibrations(state: _State, names: tuple[str, ...], apparatus: str | None, as_json: bool) -> None:
    """The current value of each calibration figure per apparatus (pi time, resonance,
    threshold ...): the latest run's, with the run and when. NAMES limits the figures."""
    with _open(state) as catalogue:
        found = catalogue.calibrations(apparatus=apparatus, names=list(names) or None)
    if as_json:
        _json([c.as_dict() for c in found])
        return
    if not found:
        _echo("no calibration figures stored")
        return
    for c in found:
        error = f" ± {c.stderr:.2g}" if c.stderr is not None else ""
        unit = f" {_unit_text(c.unit)}" if c.unit else ""
        _wrapped(f"{c.apparatus} {c.name} = {c.value:.6g}{error}{unit}  (run {c.run}, {c.started:%Y-%m-%d %H:%M} UTC, {c.age_days:.1f} days ago)", indent="")


def _range_option(text: str) -> tuple[str, tuple[float, float]]:
    name, _, span = text.partition("=")
    low, _, high = span.partition(":")
    try:
        return name.strip(), (float(low), float(high))
    except ValueError:
        raise click.BadParameter(f"'{text}' is not NAME=LOW:HIGH (e.g. lattice_depth=60:80)", param_hint="--param") from None


def _day_option(value: str | None, option: str) -> dt.date | None:
    if value is None:
        return None
    try:
        return dt.date.fromisoformat(value)
    except ValueError:
        raise click.BadParameter(f"'{value}' is not an ISO date (e.g. 2026-03-01)", param_hint=option) from None


@cli.command()
@click.option("--port", default=8501, show_default=True, help="Port of the dashboard server.")
@click.option("--host", default="127.0.0.1", show_default=True, help="Address to listen on (keep it local unless an authenticating proxy is in front: docs/scaling.md).")
@click.option("--author-header", default=None, metavar="NAME", help="Request header in which a trusted reverse proxy passes the logged-in user (e.g. X-Forwarded-User): notes are written under that name only.")
@click.option("--login", is_flag=True, help="Authors from Streamlit's own OIDC login (st.login; provider in .streamlit/secrets.toml).")
@click.option("--read-only", "read_only", is_flag=True, help="No writing from the dashboard: no note or acknowledgement forms.")
@_common
def dashboard(state: _State, port: int, host: str, author_header: str | None, login: bool, read_only: bool) -> None:
    """Serve the dashboard (a Streamlit app) on this catalogue until Ctrl-C."""
    from runlog.dashboard import serve

    if author_header and login:
        raise click.UsageError("choose one of --author-header and --login")
    with _open(state) as catalogue:  # fail here, in one line, when the catalogue cannot be opened
        catalogue.counts()
    sys.exit(serve(state.db, host=host, port=port, say=_echo, author_header=author_header, login=login, writes=not read_only))


@cli.command()
@click.option("--where", "where", default=None, metavar="EXPR", help="Filter expression (docs/filters.md), e.g. \"sequence = 'ramsey' and wait > 100 us\".")
@click.option("--columns", default=None, metavar="A,B", help="Only these parameter/measurement columns.")
@click.option("--limit", type=int, default=None, help="At most N shots.")
@click.option("--json", "as_json", is_flag=True, help="One JSON object per shot.")
@click.option("--csv", "as_csv", is_flag=True, help="CSV on standard output.")
@click.option("--monitor", "monitor_names", multiple=True, metavar="NAME", help="A column monitor.NAME: the monitor's value at each shot's time (repeatable).")
@_common
def shots(state: _State, where: str | None, columns: str | None, limit: int | None, as_json: bool, as_csv: bool, monitor_names: tuple[str, ...]) -> None:
    """Shots chosen by a filter, for quick looks."""
    if as_json and as_csv:
        raise click.UsageError("choose one of --json and --csv")
    with _open(state) as catalogue:
        frame = catalogue.select(where, columns=[c.strip() for c in columns.split(",")] if columns else None, limit=limit, monitors=monitor_names)
    if as_csv:
        _echo(frame.to_csv(index=False), nl=False)
    elif as_json:
        _echo(frame.to_json(orient="records", date_format="iso", indent=2))
    elif frame.empty:
        _echo("no shots")
    else:
        import pandas as pd

        with pd.option_context("display.width", 80, "display.max_columns", 8, "display.max_colwidth", 16):
            _echo(frame.to_string(index=False, max_rows=40))
        _echo(f"{len(frame)} shots")


@cli.command()
@click.option("--where", "where", default=None, metavar="EXPR", help="Filter expression choosing the shots.")
@click.option("--out", "out", type=click.Path(path_type=Path, file_okay=False), default=None, help="Folder of the data package.")
@click.option("--format", "file_format", type=click.Choice(["parquet", "csv"]), default="parquet", show_default=True)
@click.option("--with-occupancy", is_flag=True, help="Include the site occupancy images.")
@click.option("--title", default=None, help="Title of the package.")
@click.option("--overwrite", is_flag=True, help="Replace an earlier export in --out.")
@click.option("--spec", type=click.Path(path_type=Path, dir_okay=False, exists=True), default=None, help="Re-run a saved export (its export.toml).")
@click.option("--pin", "pin_name", default=None, metavar="NAME", help="Export a pinned selection (runlog pin) as it was pinned.")
@click.option("--monitor", "monitor_names", multiple=True, metavar="NAME", help="A shots column monitor.NAME: the monitor's value at each shot's time (repeatable).")
@click.option("--json", "as_json", is_flag=True)
@_common
def export(state: _State, where: str | None, out: Path | None, file_format: str, with_occupancy: bool, title: str | None, overwrite: bool, spec: Path | None, pin_name: str | None, monitor_names: tuple[str, ...], as_json: bool) -> None:
    """Write the chosen shots, their runs and provenance as a Frictionless Data Package."""
    if spec is None and ((where is None) == (pin_name is None) or out is None):
        raise click.UsageError("give --where EXPR (or --pin NAME) and --out DIR, or --spec FILE")
    with _open(state) as catalogue:
        if spec is not None:
            result = catalogue.export_again(spec, out=out)
        else:
            result = catalogue.export(where, out, format=file_format, with_occupancy=with_occupancy, title=title, overwrite=overwrite, pin=pin_name, monitors=monitor_names)
    if as_json:
        _json(result.as_dict())
        return
    _echo(f"{result.out}: {result.shots} shots of {result.runs} runs, {len(result.data)} data files")
    if result.other_versions_pinned:
        named = sorted({e["pin"] for e in result.other_versions_pinned})
        click.echo(f"current analysis versions exported; pin(s) {', '.join(named)} hold other versions of {len({(e['apparatus'], e['run']) for e in result.other_versions_pinned})} of these runs")
    if result.pin is not None and result.pin_changes:
        _echo(f"pin '{result.pin}' exported as pinned; newer analyses would change {len(result.pin_changes)} figures (runlog pins)")
    if result.same is not None:
        _echo("data hash the same as before" if result.same else f"data changed: {', '.join(result.changed)}")


@cli.group()
def plot() -> None:
    """Publication figures (SVG, PNG or PDF by the file's suffix)."""


@plot.command("drift")
@click.argument("quantity")
@click.option("--out", "out", type=click.Path(path_type=Path, dir_okay=False), required=True)
@click.option("--apparatus", default=None)
@click.option("--sequence", default=None)
@click.option("--since", default=None, metavar="DATE")
@click.option("--until", default=None, metavar="DATE")
@click.option("--monitor", "monitor_names", multiple=True, metavar="NAME", help="Monitor drawn on a second axis (repeatable).")
@_common
def plot_drift_command(state: _State, quantity: str, out: Path, apparatus: str | None, sequence: str | None, since: str | None, until: str | None, monitor_names: tuple[str, ...]) -> None:
    """Daily values of a figure with intervals and changes; monitors on a second axis."""
    from runlog.plots import plot_drift

    with _open(state) as catalogue:
        result = catalogue.drift(quantity, apparatus=apparatus, sequence=sequence, since=_day_option(since, "--since"), until=_day_option(until, "--until"), record_alarms=False)
        span = (result.points[0].date, result.points[-1].date + dt.timedelta(days=1)) if result.points else (None, None)
        monitors = [catalogue.monitor_series(name, apparatus=result.apparatus, since=span[0], until=span[1], max_points=2000) for name in monitor_names]
        _echo(f"wrote {plot_drift(result, out, monitors=monitors, zone=catalogue.lab_timezone)}")


@plot.command("run")
@click.argument("run")
@click.option("--out", "out", type=click.Path(path_type=Path, dir_okay=False), required=True)
@click.option("--apparatus", default=None)
@click.option("--x", default=None, help="Parameter on the horizontal axis (default: the one the run's fit was made on).")
@click.option("--y", default=None, help="Measurement on the vertical axis (default: the one the run's fit, or its sequence's, was made on).")
@_common
def plot_run_command(state: _State, run: str, out: Path, apparatus: str | None, x: str | None, y: str | None) -> None:
    """One run: its scan with the fit drawn, or its per-site fill map."""
    from runlog.plots import plot_run

    with _open(state) as catalogue:
        _echo(f"wrote {plot_run(catalogue, run, out, apparatus=apparatus, x=x, y=y)}")


@cli.group("db")
def db_group() -> None:
    """Catalogue administration: read-only roles, copying to another store."""


@db_group.command("grant-reader")
@click.argument("role")
@click.option("--password-env", metavar="VAR", default=None, help="Set the role's password from this environment variable (never on the command line).")
@_common
def grant_reader(state: _State, role: str, password_env: str | None) -> None:
    """Create a read-only login ROLE for the dashboard and analysis accounts."""
    password = None
    if password_env is not None:
        password = os.environ.get(password_env)
        if password is None:
            raise click.UsageError(f"environment variable {password_env} is not set")
    with _open(state) as catalogue:
        catalogue.grant_reader(role, password=password)
        _echo(f"role {role} can read {catalogue.url}")


@db_group.command("copy")
@click.option("--to", "target", required=True, metavar="URL", help="Where to copy: an empty PostgreSQL database or SQLite file, or a catalogue with no rows yet.")
@click.option("--json", "as_json", is_flag=True, help="Print the rows copied per table as JSON.")
@_common
def copy_command(state: _State, target: str, as_json: bool) -> None:
    """Copy the whole catalogue into another, empty store.

    The source is --db (else $RUNLOG_DB); --to is typically a shared PostgreSQL server
    for a group that outgrew one SQLite file. Every table is copied with its ids, in one
    transaction on the target: a failure or Ctrl-C leaves the target as it was. The row
    counts of both sides are compared and printed.
    """
    from runlog.store.copy import copy_catalogue
    from runlog.store.engine import redact, resolve_url

    source = resolve_url(state.db)
    progress = None if as_json or not sys.stderr.isatty() else _progress_bar()
    try:
        rows = copy_catalogue(source, target, progress=progress and progress.update)
    finally:
        if progress:
            progress.close()
    if as_json:
        _json({"source": redact(source), "target": redact(target), "rows": rows})
        return
    _echo(f"copied {redact(source)} to {redact(target)}: {rows['runs']} runs, {rows['shots']} shots")
    for table, count in rows.items():
        _echo(f"  {table:<20} {count:>12}")


def _remember_urls(args: list[str]) -> None:
    # The URLs given to this process, so their passwords are scrubbed from every line
    # printed even when the URL is too malformed for a pattern to recognise.
    for name in ("--db", "--to"):
        for position, arg in enumerate(args):
            if arg == name and position + 1 < len(args):
                remember(args[position + 1])
            elif arg.startswith(name + "="):
                remember(arg.split("=", 1)[1])
    if os.environ.get("RUNLOG_DB"):
        remember(os.environ["RUNLOG_DB"])


def main(argv: list[str] | None = None) -> None:
    """Entry point: run the CLI, turning runlog's errors into one line and an exit code."""
    args = argv if argv is not None else sys.argv[1:]
    debug = "--debug" in args
    _remember_urls(args)
    try:
        cli.main(args=argv, prog_name="runlog", standalone_mode=False)
    except click.exceptions.Exit as done:
        sys.exit(done.exit_code)
    except click.Abort:
        _echo("runlog: aborted", err=True)
        sys.exit(1)
    except click.ClickException as error:
        error.message = scrub(error.message)
        error.show()
        sys.exit(error.exit_code)
    except RunlogError as error:
        if debug:
            raise
        _echo(f"runlog: error: {error}", err=True)
        sys.exit(1)
    except Exception as error:  # anything unexpected: one line unless --debug
        if debug:
            raise
        if type(error).__module__.startswith("sqlalchemy") or isinstance(error, PermissionError):
            # A database error: its cause in one line (read-only, busy, ...), never the SQL.
            from runlog.store.failures import describe

            _echo(f"runlog: error: {describe(error, doing='using the catalogue').message}", err=True)
            sys.exit(1)
        _echo(f"runlog: error: {type(error).__name__}: {str(error).splitlines()[0] if str(error) else ''} (run with --debug for details)", err=True)
        sys.exit(1)
