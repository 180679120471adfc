"""A fitted contrast of a fraction signal outside [0, 1] is kept as fitted, flagged
``out_of_range`` (show --json, the run page's figures, exports) and left out of the daily
rollups, drift points and alarms."""

from __future__ import annotations

import datetime as dt
import json
import math

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlalchemy import select

from runlog.derive import derive
from runlog.drift.series import daily_points
from runlog.figures.coherence import fit_envelope
from runlog.figures.fringe import fit_fringe
from runlog.store import schema as s
from conftest import run_main

T0 = dt.datetime(2026, 3, 2, 9, 0, tzinfo=dt.timezone.utc)
ATOMS = 200
PHASES = np.tile(np.arange(16) * 22.5, 4)


def fringe_table(run: str, contrast: float, seed: int, start: dt.datetime) -> pa.Table:
    """A phase scan (deg) of a bright fraction k/200, k binomial with p = 0.5 (1 + C cos(phase + 30 deg))."""
    p = 0.5 * (1.0 + contrast * np.cos(np.deg2rad(PHASES + 30.0)))
    bright = np.random.default_rng(seed).binomial(ATOMS, p) / ATOMS
    n = PHASES.size
    return pa.table({
        "run": [run] * n, "apparatus": ["bench-a"] * n, "sequence": ["phase-scan"] * n,
        "shot": pa.array(np.arange(n), pa.int64()),
        "time": pa.array([start + dt.timedelta(seconds=2 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
        "p.phase[deg]": PHASES, "m.bright_fraction": bright,
    })


# Seed 0 at a true contrast of 1: the unbounded least-squares contrast is 1.0033 (above 1).
OVER, OVER_SEED = 1.0, 0


def test_the_fit_is_not_bounded_and_a_contrast_above_1_is_flagged():
    table = fringe_table("x", OVER, OVER_SEED, T0)
    figures = {f.name: f for f in fit_fringe(PHASES, table.column("m.bright_fraction").to_numpy(), phase_unit="deg")}
    contrast = figures["contrast"]
    assert contrast.value > 1 and contrast.out_of_range and contrast.as_dict()["out_of_range"] is True
    assert not figures["offset"].out_of_range and not figures["fringe_phase"].out_of_range
    # The same signal scaled to photon counts is not a fraction: nothing bounds it.
    counts = {f.name: f for f in fit_fringe(PHASES, 50.0 * table.column("m.bright_fraction").to_numpy(), phase_unit="deg")}
    assert counts["contrast"].value == pytest.approx(contrast.value, rel=1e-9) and not counts["contrast"].out_of_range
    # A contrast series (fractions per wait) whose fit extrapolates above 1 at zero wait:
    # C(t) = 1.3 exp(-t / 80 us), measured from 40 us on, where it is below 1.
    wait = np.array([40.0, 60.0, 80.0, 100.0, 130.0, 160.0, 200.0])
    envelope = {f.name: f for f in fit_envelope(wait, 1.3 * np.exp(-wait / 80.0) * (1 + 0.01 * np.sin(wait)), envelope="exponential")}
    assert envelope["envelope_contrast"].value == pytest.approx(1.3, rel=0.02) and envelope["envelope_contrast"].out_of_range
    assert not envelope["envelope_time"].out_of_range
    # A Rabi oscillation moving the whole population (C = 1; seed 1 fits 1.022).
    from runlog.figures.rabi import fit_rabi

    duration = np.tile(np.linspace(0.0, 4.0, 33), 3)
    moved = np.random.default_rng(1).binomial(ATOMS, 0.5 * (1 - np.exp(-duration / 20) * np.cos(math.pi * duration))) / ATOMS
    rabi = {f.name: f for f in fit_rabi(duration, moved)}
    assert rabi["contrast"].value > 1 and rabi["contrast"].out_of_range and not rabi["rabi_frequency"].out_of_range


def test_a_flagged_contrast_is_shown_exported_and_left_out_of_drift(catalogue, make_file, db_url, capsys, tmp_path):
    # Day 1: one run at C = 0.7. Day 2: a run at C = 0.7 and the run whose fit gives 1.0033.
    # Day 3: only an out-of-range run. Day 4: C = 0.7 again.
    plan = [("a1", 0.7, 11, 0), ("b1", 0.7, 12, 1), ("b2", OVER, OVER_SEED, 1), ("c1", OVER, OVER_SEED, 2), ("d1", 0.7, 14, 3)]
    for run, contrast, seed, day in plan:
        catalogue.ingest(make_file(table=fringe_table(run, contrast, seed, T0 + dt.timedelta(days=day))))
        derive(catalogue, run, "fringe", y="bright_fraction")
    stored = {run: catalogue.run(run).figures["contrast"] for run, *_ in plan}
    assert stored["b2"]["value"] > 1 and stored["b2"]["out_of_range"] is True
    assert "out_of_range" not in stored["b1"]
    code, out, _ = run_main(capsys, "--db", db_url, "show", "b2", "--json")
    assert code == 0 and json.loads(out)["figures"]["contrast"]["out_of_range"] is True
    code, out, _ = run_main(capsys, "--db", db_url, "show", "b2")
    assert "out of range: outside its physical range, not in drift" in out
    frame = catalogue.figures(names=["contrast"]).set_index("run")
    assert bool(frame.loc["b2", "out_of_range"]) and not bool(frame.loc["b1", "out_of_range"])

    catalogue.export("run = 'b2' or run = 'b1'", tmp_path / "out")
    exported = pq.read_table(tmp_path / "out" / "figures.parquet").to_pandas()
    contrast = exported[exported["figure"] == "contrast"].set_index("run")
    assert bool(contrast.loc["b2", "out_of_range"]) and not bool(contrast.loc["b1", "out_of_range"])
    package = json.loads((tmp_path / "out" / "datapackage.json").read_text())
    fields = {f["name"]: f for r in package["resources"] if r["name"] == "figures" for f in r["schema"]["fields"]}
    assert fields["out_of_range"]["type"] == "boolean"

    drift = catalogue.drift("contrast", apparatus="bench-a", pooled=True)
    days = {p.date: p for p in drift.points}
    first = T0.date()
    assert sorted(days) == [first, first + dt.timedelta(days=1), first + dt.timedelta(days=3)]  # day 3 had only the flagged run
    assert days[first + dt.timedelta(days=1)].runs == 1
    assert days[first + dt.timedelta(days=1)].value == pytest.approx(stored["b1"]["value"], rel=1e-12)
    assert all(p.value < 1 for p in drift.points)
    assert not [a for a in catalogue.alarms() if a["quantity"] == "contrast" and a["date"] == (first + dt.timedelta(days=2)).isoformat()]
    with catalogue.engine.connect() as connection:
        apparatus_id = connection.execute(select(s.Apparatus.id)).scalar_one()
        rolled, _, _ = daily_points(connection, "contrast", apparatus_id)
        runs = dict(connection.execute(select(s.DailyRollup.day, s.DailyRollup.runs).where(s.DailyRollup.name == "contrast")).all())
    assert [(p.date, p.runs, p.value) for p in rolled] == [(p.date, p.runs, pytest.approx(p.value, rel=1e-12)) for p in drift.points]
    assert sum(runs.values()) == 3  # a1, b1, d1
