"""Publication figures: the drift chart and the run charts carry the catalogue's numbers,
units on the axes, and render offline to SVG, PNG and PDF. SQLite and PostgreSQL.

The data inside each chart specification is compared with what the catalogue returns
(``Catalogue.drift``, ``Catalogue.site_counts``, ``runlog.derive.fit_curve``); what a
figure should show is our own design, no outside source.
"""

from __future__ import annotations

import datetime as dt
import math
import struct
import xml.etree.ElementTree as ElementTree

import numpy as np
import pyarrow as pa
import pytest

from conftest import T0, shot_table
from runlog.derive import fit_curve
from runlog.errors import NotFoundError
from runlog.plots import _with_error, drift_chart, plot_drift, plot_run, run_chart, save_chart

SITES = 36


def _records(spec: dict) -> list[list[dict]]:
    """Every inline data set of a chart specification."""
    return list(spec.get("datasets", {}).values())


def _with_keys(spec: dict, *keys: str) -> list[dict]:
    found = [rows for rows in _records(spec) if rows and set(keys) <= set(rows[0])]
    assert len(found) == 1, (keys, [list(rows[0]) for rows in _records(spec) if rows])
    return found[0]


@pytest.fixture
def stepped(catalogue, make_file):
    """14 lab days of one loading run each (6x6 lattice, 60 shots); the fill fraction
    drops from 0.55 to 0.35 on day 7 (our simulation's truth)."""
    rng = np.random.default_rng(5)
    files = []
    for day in range(14):
        load = rng.random((60, SITES)) < (0.55 if day < 7 else 0.35)
        keep = load & (rng.random((60, SITES)) < 0.9)
        occupancy = {
            "occ.load": pa.array(list(load), pa.list_(pa.bool_())),
            "occ.survive": pa.array(list(keep), pa.list_(pa.bool_())),
        }
        table = shot_table({f"d{day:02d}": 60}, start=T0 + dt.timedelta(days=day), sites=SITES, extra=occupancy)
        table = table.drop_columns(["p.wait[us]"])  # no scan: a plain loading run
        files.append(make_file(table=table))
    catalogue.ingest(files)
    return catalogue


def _ramsey(catalogue, make_file) -> None:
    """Waits 0..3000 us x 3 sweeps; bright fraction of 100 atoms with T = 1000 us,
    C0 = 0.9, detuning 2 kHz, phase 0.3 rad (our simulation's truth)."""
    rng = np.random.default_rng(21)
    wait = np.tile(np.linspace(0.0, 3000.0, 31), 3)
    p = 0.5 * (1.0 + 0.9 * np.exp(-((wait / 1000.0) ** 2)) * np.cos(2.0 * math.pi * 0.002 * wait + 0.3))
    n = wait.size
    table = pa.table(
        {
            "run": ["ramsey1"] * n,
            "apparatus": ["bench-a"] * n,
            "sequence": ["ramsey"] * n,
            "shot": pa.array(np.arange(n), pa.int64()),
            "time": pa.array([T0 + dt.timedelta(days=20, seconds=2 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
            "p.wait[us]": wait,
            "m.bright_fraction": rng.binomial(100, p) / 100.0,
        }
    )
    catalogue.ingest([make_file(table=table)])
    catalogue.derive("ramsey1", "coherence")


def test_drift_chart_carries_points_intervals_limits_and_changes(stepped):
    drift = stepped.drift("fill_fraction", record_alarms=False)
    assert drift.changes and drift.changes[0].date == (T0 + dt.timedelta(days=7)).date()
    spec = drift_chart(drift).to_dict()
    points = _with_keys(spec, "day", "value", "low", "high")
    assert [p["day"] for p in points] == [p.date.isoformat() for p in drift.points]
    assert [(p["value"], p["low"], p["high"]) for p in points] == [(p.value, p.ci_low, p.ci_high) for p in drift.points]
    limits = _with_keys(spec, "day", "limit", "side")
    assert [row["limit"] for row in limits] == [v for v in drift.limits["lower"] + drift.limits["upper"] if v is not None]
    smooth = _with_keys(spec, "day", "ewma", "ewma_low", "ewma_high")
    judged = [i for i, v in enumerate(drift.limits["ewma"]) if v is not None]
    assert [row["ewma"] for row in smooth] == [drift.limits["ewma"][i] for i in judged]
    assert [(row["ewma_low"], row["ewma_high"]) for row in smooth] == [(drift.limits["ewma_lower"][i], drift.limits["ewma_upper"][i]) for i in judged]
    levels = _with_keys(spec, "day", "level", "segment")
    assert [row["level"] for row in levels] == [drift.changes[0].before] * 2 + [drift.changes[0].after] * 2
    rules = [rows for rows in _records(spec) if rows and set(rows[0]) == {"day"}]
    assert rules == [[{"day": "2026-03-09"}]]
    layers = spec["layer"]
    assert layers[0]["encoding"]["y"]["title"] == "fill_fraction"
    assert layers[0]["encoding"]["x"]["title"] == "lab day"
    assert spec["title"]["text"] == "fill_fraction on bench-a"
    assert any("2026-03-09" in line for line in spec["title"]["subtitle"])
    assert spec["title"]["subtitle"][0] == f"series {drift.series['label']}"


def test_plot_drift_writes_svg_png_and_pdf(stepped, tmp_path):
    drift = stepped.drift("fill_fraction", record_alarms=False)
    svg = plot_drift(drift, tmp_path / "drift.svg")
    texts = {node.text for node in ElementTree.parse(svg).iter() if node.text}
    assert {"fill_fraction", "lab day", "fill_fraction on bench-a"} <= texts
    if stepped.engine.dialect.name != "sqlite":
        return  # rendering does not depend on the backend; once is enough
    png = plot_drift(drift, tmp_path / "drift.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    width, height = struct.unpack(">II", png[16:24])
    assert width > 2 * 560 and height > 2 * 300  # chart size times the default scale 2
    assert plot_drift(drift, tmp_path / "drift.pdf").read_bytes()[:5] == b"%PDF-"


def test_run_chart_of_a_fitted_scan_draws_the_stored_fit(catalogue, make_file, tmp_path):
    _ramsey(catalogue, make_file)
    spec = run_chart(catalogue, "ramsey1").to_dict()
    curve = fit_curve(catalogue, "ramsey1")
    fitted = _with_keys(spec, "x", "fit")
    assert np.allclose([row["fit"] for row in fitted], curve.curve_y)
    means = _with_keys(spec, "x", "mean", "count")
    assert [row["count"] for row in means] == [3] * 31
    shots = catalogue.shots("ramsey1")
    first = shots[shots["p.wait"] == 0.0]["m.bright_fraction"]
    assert math.isclose(means[0]["mean"], first.mean()) and math.isclose(means[0]["high"] - means[0]["mean"], first.std(ddof=1) / math.sqrt(3))
    assert spec["layer"][0]["encoding"]["x"]["title"] == "wait (µs)"
    assert spec["layer"][0]["encoding"]["y"]["title"] == "bright_fraction"
    time = catalogue.run("ramsey1").figures["t2_star"]
    assert f"t2_star = {_with_error(time['value'], time['stderr'])} µs" in " ".join(spec["title"]["subtitle"])
    svg = plot_run(catalogue, "ramsey1", tmp_path / "ramsey.svg")
    assert "wait (µs)" in svg.read_text()


def test_run_chart_of_a_loading_run_is_the_site_fill_map(stepped, tmp_path):
    spec = run_chart(stepped, "d03").to_dict()
    sites = _with_keys(spec, "row", "column", "fill")
    successes, trials, shape = stepped.site_counts("d03")
    assert shape == (SITES,) and len(sites) == SITES  # no lattice shape given: one row
    assert [row["fill"] for row in sites] == list(successes / trials)
    fill = stepped.run("d03").figures["fill_fraction"]
    assert spec["title"]["subtitle"][0].startswith(f"fill_fraction = {_with_error(fill['value'], fill['stderr'])}")


def test_run_chart_of_a_plain_scan_without_a_fit(catalogue, make_file):
    catalogue.ingest([make_file(runs={"scan": 10})])  # wait = 10 * shot us, atom_number per shot
    spec = run_chart(catalogue, "scan").to_dict()
    means = _with_keys(spec, "x", "mean", "count")
    shots = catalogue.shots("scan")
    assert [row["x"] for row in means] == list(shots["p.wait"])
    assert [row["mean"] for row in means] == list(shots["m.atom_number"])
    assert spec["layer"][0]["encoding"]["x"]["title"] == "wait (µs)"


def test_unknown_suffix_is_refused(stepped, tmp_path):
    drift = stepped.drift("fill_fraction", record_alarms=False)
    with pytest.raises(ValueError) as caught:
        save_chart(drift_chart(drift), tmp_path / "drift.jpeg")
    assert str(caught.value) == "cannot save a figure as '.jpeg': use .svg, .png, .pdf"


@pytest.mark.parametrize(
    "value, error, text",
    [(982.1, 49.99, "982 ± 50"), (0.9125, 0.02594, "0.912 ± 0.026"), (0.001997, 1.507e-05, "0.001997 ± 0.000015"), (12345.6, 150.0, "12350 ± 150")],
)
def test_values_are_shown_to_the_precision_of_their_error(value, error, text):
    # Two significant digits of the error, value to the same place: common practice, no published source.
    assert _with_error(value, error) == text


def _two_signal_scan(catalogue, make_file, run: str, seed: int, day: int) -> None:
    """A Ramsey-like scan with two measurements, atom number first by name and the bright
    fraction the fits are made on (our simulation's truth: a decaying fringe)."""
    rng = np.random.default_rng(seed)
    wait = np.tile(np.linspace(0.0, 3000.0, 31), 3)
    p = 0.5 * (1.0 + 0.9 * np.exp(-((wait / 1000.0) ** 2)) * np.cos(2.0 * math.pi * 0.002 * wait + 0.3))
    n = wait.size
    table = pa.table(
        {
            "run": [run] * n,
            "apparatus": ["bench-a"] * n,
            "sequence": ["ramsey"] * n,
            "shot": pa.array(np.arange(n), pa.int64()),
            "time": pa.array([T0 + dt.timedelta(days=day, seconds=2 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
            "p.wait[us]": wait,
            "m.atom_number": rng.normal(100.0, 5.0, n),
            "m.bright_fraction": rng.binomial(100, p) / 100.0,
        }
    )
    catalogue.ingest([make_file(table=table)])


def test_run_chart_without_a_fit_draws_the_signal_its_sequence_is_fitted_on(catalogue, make_file):
    _two_signal_scan(catalogue, make_file, "fitted", seed=3, day=20)
    _two_signal_scan(catalogue, make_file, "unfitted", seed=4, day=21)
    # Nothing fitted yet, two measurements: the chart does not guess, it says why in one line.
    with pytest.raises(NotFoundError) as caught:
        run_chart(catalogue, "unfitted")
    assert str(caught.value) == (
        "no fitted signal in run 'unfitted' (no fit is stored for it or for another run of sequence 'ramsey' on bench-a; "
        "its measurements: atom_number, bright_fraction; choose one with --y, or fit the run first (runlog derive))"
    )
    assert "\n" not in str(caught.value)
    catalogue.derive("fitted", "coherence", y="bright_fraction")
    # The fitted run: its signal and the fit line.
    spec = run_chart(catalogue, "fitted").to_dict()
    assert spec["layer"][0]["encoding"]["y"]["title"] == "bright_fraction"
    assert _with_keys(spec, "x", "fit")
    # The unfitted run of the same sequence: the signal its sequence was fitted on, no line.
    spec = run_chart(catalogue, "unfitted").to_dict()
    assert spec["layer"][0]["encoding"]["y"]["title"] == "bright_fraction"
    assert not [rows for rows in _records(spec) if rows and "fit" in rows[0]]
    means = _with_keys(spec, "x", "mean", "count")
    shots = catalogue.shots("unfitted")
    assert math.isclose(means[0]["mean"], shots[shots["p.wait"] == 0.0]["m.bright_fraction"].mean())
    assert "no fit stored for this run; signal: bright_fraction (as the coherence fit of run fitted (ramsey))" in " ".join(spec["title"]["subtitle"])
    # --y still chooses.
    spec = run_chart(catalogue, "unfitted", y="atom_number").to_dict()
    assert spec["layer"][0]["encoding"]["y"]["title"] == "atom_number"
