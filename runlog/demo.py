"""The demo scenario: invented shot-table files for two apparatus over a few weeks.

This module owns the truth of the demo (:data:`SCENARIO`) and the writer that turns it
into Parquet files following shot-table contract version 1 (:func:`write_demo_files`).
It knows nothing of the store or of ingest: ``runlog demo`` writes the files into a
temporary folder and loads them through the ordinary ingest path, so the demo exercises
the same code a lab's own files do.

The scenario is our own invention. Two apparatus, ``lattice-east`` (10x10 lattice) and
``tweezer-west`` (8x8 tweezer array), take three kinds of run every day:

* ``loading``: load, image (``occ.load``), hold, image again (``occ.survive``);
* ``phase-scan``: a microwave pulse pair with the second pulse's phase scanned 0..360 deg;
* ``ramsey``: the wait between two pi/2 pulses scanned 0..2500 us.

Two lab events are planted: ``tweezer-west`` loads worse from day 9 and
``lattice-east`` loses coherence from day 14. Everything else is stable. The output is
a pure function of ``(days, start, seed)`` and the numpy/pyarrow versions: every random
draw comes from a generator seeded by ``(seed, apparatus, day)``, rows are written in
time order and no wall-clock time is read.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from runlog.errors import NotFoundError
from runlog.units import unit_text

__all__ = ["DemoApparatus", "LabEvent", "Scenario", "SCENARIO", "DEMO_RULES", "write_demo_files"]

_DAY_US = 86_400_000_000
_HOUR_US = 3_600_000_000
_MINUTE_US = 60_000_000


@dataclass(frozen=True)
class DemoApparatus:
    """One invented apparatus: its fixed settings and the true values behind its shots.

    The true values are those before any :class:`LabEvent`; use
    :meth:`Scenario.on_day` for the values in force on a given day.

    Models the generator draws from (``t`` in us, angles in degrees):

    * loading probability per site and shot ``fill_fraction * (1 - exp(-load_time /
      load_time_constant_ms))``; each loaded atom survives to the second image with
      probability ``survival``; sites and shots independent;
    * phase scan: bright probability ``0.5 * (1 + phase_contrast * cos(phase +
      phase_offset_deg))``;
    * Ramsey: bright probability ``0.5 * (1 + ramsey_contrast * exp(-(t /
      coherence_time_us)**2) * cos(2 pi * ramsey_detuning_khz * 1e-3 * t +
      ramsey_phase_deg))``;
    * in both scans the atom number per shot is ``Binomial(sites, fill fraction)`` and the
      bright count ``Binomial(atom number, bright probability)``;
      ``m.bright_fraction`` is their ratio.
    """

    name: str
    lattice_shape: tuple[int, int]
    operators: tuple[str, ...]
    first_run_hour_utc: float
    shot_period_s: float
    lattice_depths_uk: tuple[float, ...]
    load_time_ms: float
    imaging_exposure_ms: float
    imaging_beam: str
    camera_gain: int
    mw_power_mw: float
    pulse_time_us: float
    fill_fraction: float
    load_time_constant_ms: float
    survival: float
    background_counts: float
    phase_contrast: float
    phase_offset_deg: float
    ramsey_contrast: float
    coherence_time_us: float
    ramsey_detuning_khz: float
    ramsey_phase_deg: float

    @property
    def sites(self) -> int:
        return self.lattice_shape[0] * self.lattice_shape[1]


@dataclass(frozen=True)
class LabEvent:
    """A step change of one true value on one apparatus, from ``day`` (0 = start) on.

    ``quantity`` names the :class:`DemoApparatus` field that changes. ``note`` is what
    the operator wrote on the first run of that day; it names the work done, not the result.
    """

    apparatus: str
    quantity: str
    day: int
    before: float
    after: float
    unit: str
    note: str

    def date(self, start: dt.date) -> dt.date:
        return start + dt.timedelta(days=self.day)


@dataclass(frozen=True)
class Scenario:
    """The whole invented truth of the demo: apparatus, events and the run plan."""

    apparatus: tuple[DemoApparatus, ...]
    events: tuple[LabEvent, ...]
    # The late last run of this apparatus on these days runs past midnight UTC, so its
    # later shots land in the next day's file: the demo's multi-file runs.
    split_run_apparatus: str
    split_run_every_days: int
    split_run_first_day: int
    loading_runs_per_day: tuple[int, int]
    phase_scans_per_day: tuple[int, int]
    ramsey_scans_per_day: tuple[int, int]
    loading_shots: tuple[int, int]
    scanned_load_time_share: float
    scanned_load_times_ms: tuple[float, ...]
    phase_points_deg: tuple[float, ...]
    phase_sweeps: tuple[int, int]
    ramsey_waits_us: tuple[float, ...]
    ramsey_sweeps: int

    def get(self, name: str) -> DemoApparatus:
        for apparatus in self.apparatus:
            if apparatus.name == name:
                return apparatus
        known = ", ".join(a.name for a in self.apparatus)
        raise NotFoundError("demo apparatus", name, f"the demo has {known}")

    def on_day(self, name: str, day: int) -> DemoApparatus:
        """The apparatus with every event up to and including ``day`` applied."""
        apparatus = self.get(name)
        for event in self.events:
            if event.apparatus == name and day >= event.day:
                apparatus = dataclasses.replace(apparatus, **{event.quantity: event.after})
        return apparatus

    def split_days(self, days: int) -> tuple[int, ...]:
        """Days whose last run continues in the next day's file (never the last day)."""
        return tuple(
            range(self.split_run_first_day, days - 1, self.split_run_every_days)
        )

    def describe(self, start: dt.date = dt.date(2026, 9, 1), days: int = 21) -> list[str]:
        """Plain lines saying what the demo holds, for the CLI to print."""
        lines = []
        for a in self.apparatus:
            rows, cols = a.lattice_shape
            lines.append(
                f"{a.name}: {rows}x{cols} sites, fill fraction {a.fill_fraction:.2f}, "
                f"survival {a.survival:.2f}, phase-scan contrast {a.phase_contrast:.2f} "
                f"(offset {a.phase_offset_deg:g} deg), Ramsey contrast "
                f"{a.ramsey_contrast:.2f}, coherence time {a.coherence_time_us:g} {unit_text('us')}, "
                f"detuning {a.ramsey_detuning_khz:g} kHz"
            )
        for e in self.events:
            when = e.date(start).isoformat()
            seen = "" if e.day < days else " (after the last day: not in these files)"
            unit = f" {unit_text(e.unit)}" if e.unit else ""
            lines.append(
                f"event: {e.apparatus} {e.quantity} {e.before:g} -> {e.after:g}{unit} "
                f"from {when} (day {e.day}){seen}"
            )
        split = ", ".join(
            (start + dt.timedelta(days=d)).isoformat() for d in self.split_days(days)
        )
        if split:
            lines.append(
                f"runs split across two files: last {self.split_run_apparatus} run of {split}"
            )
        return lines


SCENARIO = Scenario(
    apparatus=(
        DemoApparatus(
            name="lattice-east",
            lattice_shape=(10, 10),
            operators=("a.quist", "n.ferreira"),
            first_run_hour_utc=7.0,
            shot_period_s=3.0,
            lattice_depths_uk=(60.0, 70.0, 80.0),
            load_time_ms=300.0,
            imaging_exposure_ms=20.0,
            imaging_beam="vertical",
            camera_gain=200,
            mw_power_mw=8.0,
            pulse_time_us=18.0,
            fill_fraction=0.50,
            load_time_constant_ms=40.0,
            survival=0.93,
            background_counts=212.0,
            phase_contrast=0.90,
            phase_offset_deg=25.0,
            ramsey_contrast=0.92,
            coherence_time_us=1000.0,
            ramsey_detuning_khz=4.0,
            ramsey_phase_deg=0.0,
        ),
        DemoApparatus(
            name="tweezer-west",
            lattice_shape=(8, 8),
            operators=("j.oduya", "k.varga"),
            first_run_hour_utc=13.5,
            shot_period_s=1.6,
            lattice_depths_uk=(65.0, 75.0),
            load_time_ms=200.0,
            imaging_exposure_ms=12.0,
            imaging_beam="side",
            camera_gain=300,
            mw_power_mw=5.0,
            pulse_time_us=24.0,
            fill_fraction=0.50,
            load_time_constant_ms=25.0,
            survival=0.94,
            background_counts=148.0,
            phase_contrast=0.88,
            phase_offset_deg=-40.0,
            ramsey_contrast=0.90,
            coherence_time_us=1100.0,
            ramsey_detuning_khz=4.0,
            ramsey_phase_deg=0.0,
        ),
    ),
    events=(
        LabEvent(
            apparatus="tweezer-west",
            quantity="fill_fraction",
            day=9,
            before=0.50,
            after=0.40,
            unit="",
            note="repump fibre replaced this morning",
        ),
        LabEvent(
            apparatus="lattice-east",
            quantity="coherence_time_us",
            day=14,
            before=1000.0,
            after=600.0,
            unit="us",
            note="new current supply on the bias coils",
        ),
    ),
    split_run_apparatus="tweezer-west",
    split_run_every_days=7,
    split_run_first_day=4,
    loading_runs_per_day=(6, 10),
    phase_scans_per_day=(1, 2),
    ramsey_scans_per_day=(1, 2),
    loading_shots=(100, 200),
    scanned_load_time_share=0.2,
    scanned_load_times_ms=tuple(float(t) for t in range(10, 301, 10)),
    phase_points_deg=tuple(float(p) for p in range(0, 361, 15)),
    phase_sweeps=(3, 4),
    ramsey_waits_us=tuple(float(t) for t in range(0, 2501, 50)),
    ramsey_sweeps=2,
)

_OCCUPANCY = ("occ.load", "occ.survive")

# Column order of every file; the type is the Arrow type written.
_COLUMNS: tuple[tuple[str, pa.DataType], ...] = (
    ("run", pa.string()),
    ("apparatus", pa.string()),
    ("sequence", pa.string()),
    ("shot", pa.int64()),
    ("time", pa.timestamp("us", tz="UTC")),
    ("operator", pa.string()),
    ("notes", pa.string()),
    ("p.lattice_depth[uK]", pa.float64()),
    ("p.load_time[ms]", pa.float64()),
    ("p.imaging_exposure[ms]", pa.float64()),
    ("p.imaging_beam", pa.string()),
    ("p.camera_gain", pa.int64()),
    ("p.push_out", pa.bool_()),
    ("p.phase[deg]", pa.float64()),
    ("p.wait[us]", pa.float64()),
    ("p.detuning[kHz]", pa.float64()),
    ("p.mw_power[mW]", pa.float64()),
    ("p.pulse_time[us]", pa.float64()),
    ("m.atom_number", pa.float64()),
    ("m.background[counts]", pa.float64()),
    ("m.bright_fraction", pa.float64()),
)

_ASIDES = (
    "re-peaked the imaging beam",
    "camera cooled down again after a warm start",
    "short pause, door opened",
)


@dataclass
class _Run:
    """One generated run before it is laid out into files."""

    key: str
    sequence: str
    operator: str
    notes: str | None
    time_us: np.ndarray
    values: dict[str, Any]  # column name -> scalar or per-shot array
    occupancy: dict[str, np.ndarray]  # occ column -> (shots, sites) bool

    @property
    def shots(self) -> int:
        return len(self.time_us)


#: The rules a lab would put in its runlog.toml for these sequences: fitted figures of
#: every phase scan and Ramsey scan, computed as the runs come in.
DEMO_RULES: tuple[dict[str, str], ...] = (
    {"sequence": "phase-scan", "kind": "fringe", "x": "phase", "y": "bright_fraction"},
    {"sequence": "ramsey", "kind": "coherence", "x": "wait", "y": "bright_fraction"},
)


def write_demo_files(
    out_dir: Path,
    *,
    days: int = 21,
    start: dt.date = dt.date(2026, 9, 1),
    seed: int = 7,
) -> list[Path]:
    """Write the demo shot tables into ``out_dir`` and return their paths in time order.

    One file per apparatus per day, named ``<apparatus>_<YYYY-MM-DD>.parquet``; existing
    files of those names are overwritten. The same arguments and library versions give
    byte-identical files.
    """
    if days < 1:
        raise ValueError(f"days must be at least 1, got {days}")
    if seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed}")
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    start_us = _midnight_us(start)

    written: dict[tuple[int, int], Path] = {}
    for index, apparatus in enumerate(SCENARIO.apparatus):
        runs: list[_Run] = []
        for day in range(days):
            runs.extend(_day_runs(SCENARIO, index, day, start, seed, days))
        table = _apparatus_table(apparatus, runs)
        day_of_row = (
            table.column("time").cast(pa.int64()).to_numpy() - start_us
        ) // _DAY_US
        bounds = np.searchsorted(day_of_row, np.arange(days + 1), side="left")
        for day in range(days):
            date = start + dt.timedelta(days=day)
            path = out_dir / f"{apparatus.name}_{date.isoformat()}.parquet"
            lo, hi = int(bounds[day]), int(bounds[day + 1])
            pq.write_table(table.slice(lo, hi - lo), path)
            written[(day, index)] = path
    return [written[k] for k in sorted(written)]


def _midnight_us(date: dt.date) -> int:
    midnight = dt.datetime(date.year, date.month, date.day, tzinfo=dt.timezone.utc)
    return int(midnight.timestamp()) * 1_000_000


def _day_runs(
    scenario: Scenario, index: int, day: int, start: dt.date, seed: int, days: int
) -> list[_Run]:
    """All runs one apparatus takes on one day, in time order."""
    apparatus = scenario.on_day(scenario.apparatus[index].name, day)
    # One generator per (apparatus, day): a day's shots do not depend on how many
    # apparatus or days come before it (only the last day never gets a split run).
    rng = np.random.Generator(
        np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(index, day)))
    )
    n_loading = _between(rng, scenario.loading_runs_per_day)
    n_phase = _between(rng, scenario.phase_scans_per_day)
    n_ramsey = _between(rng, scenario.ramsey_scans_per_day)
    split = apparatus.name == scenario.split_run_apparatus and day in scenario.split_days(days)

    # The day opens with a loading check; the late run of a split day is a loading run.
    middle = (
        ["loading"] * (n_loading - 1 - int(split))
        + ["phase-scan"] * n_phase
        + ["ramsey"] * n_ramsey
    )
    plan = ["loading"] + [middle[i] for i in rng.permutation(len(middle))]
    if split:
        plan.append("loading")

    date = start + dt.timedelta(days=day)
    midnight = _midnight_us(date)
    clock = midnight + int(apparatus.first_run_hour_utc * _HOUR_US)
    clock += int(rng.integers(0, 45 * _MINUTE_US))
    period_us = int(apparatus.shot_period_s * 1_000_000)
    notes_today = {
        e.note for e in scenario.events if e.apparatus == apparatus.name and e.day == day
    }

    runs = []
    for number, sequence in enumerate(plan, start=1):
        late = split and number == len(plan)
        if sequence == "loading":
            values, occupancy, shots = _loading_run(
                scenario, apparatus, rng, scanned_allowed=not late
            )
        elif sequence == "phase-scan":
            values, occupancy, shots = _phase_scan(scenario, apparatus, rng)
        else:
            values, occupancy, shots = _ramsey_scan(scenario, apparatus, rng)
        if late:
            # Start so that between a third and two thirds of the shots fall after midnight.
            clock = midnight + _DAY_US - int(shots * period_us * rng.uniform(0.35, 0.65))
        # Shots tick at the apparatus period with up to 40 ms of control-system jitter.
        time_us = clock + np.arange(shots, dtype=np.int64) * period_us
        time_us += rng.integers(0, 40_000, shots)
        clock = int(time_us[-1]) + period_us + int(rng.integers(4 * _MINUTE_US, 25 * _MINUTE_US))

        if number == 1 and notes_today:
            notes: str | None = "; ".join(sorted(notes_today))
        elif rng.random() < 0.04:
            notes = _ASIDES[int(rng.integers(0, len(_ASIDES)))]
        else:
            notes = None
        runs.append(
            _Run(
                key=f"{date:%Y%m%d}-{number:02d}",
                sequence=sequence,
                operator=apparatus.operators[int(rng.integers(0, len(apparatus.operators)))],
                notes=notes,
                time_us=time_us,
                values=values,
                occupancy=occupancy,
            )
        )
    return runs


def _between(rng: np.random.Generator, bounds: tuple[int, int]) -> int:
    """A whole number drawn uniformly from ``bounds``, both ends included."""
    return int(rng.integers(bounds[0], bounds[1] + 1))


def _common_values(
    apparatus: DemoApparatus, rng: np.random.Generator, shots: int
) -> dict[str, Any]:
    return {
        "p.lattice_depth[uK]": float(rng.choice(apparatus.lattice_depths_uk)),
        "p.load_time[ms]": apparatus.load_time_ms,
        "p.imaging_exposure[ms]": apparatus.imaging_exposure_ms,
        "p.imaging_beam": apparatus.imaging_beam,
        "p.camera_gain": apparatus.camera_gain,
        "m.background[counts]": rng.normal(apparatus.background_counts, 4.0, shots),
    }


def _loading_run(
    scenario: Scenario, apparatus: DemoApparatus, rng: np.random.Generator, *, scanned_allowed: bool
) -> tuple[dict[str, Any], dict[str, np.ndarray], int]:
    scanned = scanned_allowed and rng.random() < scenario.scanned_load_time_share
    if scanned:
        points = np.asarray(scenario.scanned_load_times_ms)
        shots = len(points) * int(rng.integers(4, 7))
        load_time: float | np.ndarray = np.tile(points, shots // len(points))
    else:
        shots = _between(rng, scenario.loading_shots)
        load_time = apparatus.load_time_ms
    load_probability = apparatus.fill_fraction * (
        1.0 - np.exp(-np.broadcast_to(load_time, (shots,)) / apparatus.load_time_constant_ms)
    )
    loaded = rng.random((shots, apparatus.sites)) < load_probability[:, None]
    survived = loaded & (rng.random((shots, apparatus.sites)) < apparatus.survival)
    count = loaded.sum(axis=1)
    values = _common_values(apparatus, rng, shots)
    values["p.load_time[ms]"] = load_time
    values["p.push_out"] = False
    # Atom number from summed fluorescence: the site count blurred by photon noise.
    values["m.atom_number"] = count + rng.normal(0.0, 0.5 + 0.02 * count)
    return values, {"occ.load": loaded, "occ.survive": survived}, shots


def _bright_fraction(
    apparatus: DemoApparatus, rng: np.random.Generator, probability: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    atoms = np.maximum(rng.binomial(apparatus.sites, apparatus.fill_fraction, len(probability)), 1)
    bright = rng.binomial(atoms, probability)
    return atoms.astype(np.float64), bright / atoms


def _scan_values(apparatus: DemoApparatus, rng: np.random.Generator, shots: int) -> dict[str, Any]:
    values = _common_values(apparatus, rng, shots)
    values["p.push_out"] = True
    values["p.mw_power[mW]"] = apparatus.mw_power_mw
    values["p.pulse_time[us]"] = apparatus.pulse_time_us
    return values


def _phase_scan(
    scenario: Scenario, apparatus: DemoApparatus, rng: np.random.Generator
) -> tuple[dict[str, Any], dict[str, np.ndarray], int]:
    sweeps = _between(rng, scenario.phase_sweeps)
    phase = np.tile(np.asarray(scenario.phase_points_deg), sweeps)
    probability = 0.5 * (
        1.0 + apparatus.phase_contrast * np.cos(np.deg2rad(phase + apparatus.phase_offset_deg))
    )
    values = _scan_values(apparatus, rng, len(phase))
    values["p.phase[deg]"] = phase
    values["p.detuning[kHz]"] = 0.0
    atoms, bright_fraction = _bright_fraction(apparatus, rng, probability)
    values["m.atom_number"], values["m.bright_fraction"] = atoms, bright_fraction
    return values, {}, len(phase)


def _ramsey_scan(
    scenario: Scenario, apparatus: DemoApparatus, rng: np.random.Generator
) -> tuple[dict[str, Any], dict[str, np.ndarray], int]:
    wait = np.tile(np.asarray(scenario.ramsey_waits_us), scenario.ramsey_sweeps)
    detuning_per_us = apparatus.ramsey_detuning_khz * 1e-3
    probability = 0.5 * (
        1.0
        + apparatus.ramsey_contrast
        * np.exp(-((wait / apparatus.coherence_time_us) ** 2))
        * np.cos(2.0 * math.pi * detuning_per_us * wait + np.deg2rad(apparatus.ramsey_phase_deg))
    )
    values = _scan_values(apparatus, rng, len(wait))
    values["p.wait[us]"] = wait
    values["p.detuning[kHz]"] = apparatus.ramsey_detuning_khz
    atoms, bright_fraction = _bright_fraction(apparatus, rng, probability)
    values["m.atom_number"], values["m.bright_fraction"] = atoms, bright_fraction
    return values, {}, len(wait)


def _apparatus_table(apparatus: DemoApparatus, runs: list[_Run]) -> pa.Table:
    """All runs of one apparatus as one time-ordered table (files are day slices of it)."""
    order = np.argsort([int(r.time_us[0]) for r in runs], kind="stable")
    runs = [runs[i] for i in order]
    reserved = {
        "run": lambda r: r.key,
        "apparatus": lambda r: apparatus.name,
        "sequence": lambda r: r.sequence,
        "shot": lambda r: np.arange(r.shots, dtype=np.int64),
        "time": lambda r: r.time_us,
        "operator": lambda r: r.operator,
        "notes": lambda r: r.notes,
    }
    fields, arrays = [], []
    for name, kind in _COLUMNS:
        pieces = []
        for run in runs:
            value = reserved[name](run) if name in reserved else run.values.get(name)
            if value is None:
                pieces.append(pa.nulls(run.shots, kind))
            elif np.ndim(value) == 0:
                pieces.append(pa.repeat(pa.scalar(value, kind), run.shots))
            else:
                pieces.append(pa.array(value, kind))
        fields.append(pa.field(name, kind))
        arrays.append(pa.concat_arrays(pieces))

    rows, cols = apparatus.lattice_shape
    shape = f"{rows},{cols}".encode()
    lengths = np.concatenate(
        [np.full(r.shots, apparatus.sites if r.occupancy else 0, dtype=np.int32) for r in runs]
    )
    offsets = pa.array(np.concatenate([[0], np.cumsum(lengths)]).astype(np.int32))
    absent = pa.array(lengths == 0)
    for name in _OCCUPANCY:
        flat = np.concatenate([r.occupancy[name].ravel() for r in runs if r.occupancy])
        fields.append(pa.field(name, pa.list_(pa.bool_()), metadata={b"shape": shape}))
        arrays.append(pa.ListArray.from_arrays(offsets, pa.array(flat), mask=absent))
    table = pa.Table.from_arrays(arrays, schema=pa.schema(fields))
    time = table.column("time").cast(pa.int64()).to_numpy()
    if np.any(np.diff(time) <= 0):
        raise RuntimeError(f"demo shots of {apparatus.name} are not in time order")
    return table
