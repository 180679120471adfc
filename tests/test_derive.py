"""Figure kinds applied to stored runs: ``runlog.derive``, the ``[[rules]]`` and ``runlog derive``.

The physics of each kind is tested in its own module's tests; here the runs are written as
Parquet files, ingested, and the figures are derived through the catalogue, so the checks
are that the right shots, units and images reach the figure functions and that what is
stored is what they returned. Where the truth is a simulated one it is said so beside the
check; the outside sources are named where they are used (scipy's ``curve_fit`` as a plain
reference fit, the binomial variance of a random walk, Leggett & Garg 1985).
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import math
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner
from conftest import T0, run_main, shot_table
from scipy.optimize import curve_fit
from sqlalchemy import select

import runlog
from runlog.cli import cli
from runlog.config import check_rules, load_config
from runlog.demo import SCENARIO, write_demo_files
from runlog.derive import KINDS, DeriveResult, apply_rules, derive, derive_all, fit_curve
from runlog.errors import ConfigError, FitError, NotFoundError
from runlog.figures.fringe import fit_fringe
from runlog.store import schema as s

ATOMS = 100  # atoms per shot in the simulated scans: a shot's signal is k / 100, k binomial


def scan_table(run: str, sequence: str, parameters: dict, measurements: dict, occupancy: dict | None = None, *, apparatus: str = "bench-a", start: dt.datetime = T0) -> pa.Table:
    """A contract-v1 table of one run: ``p.``/``m.`` columns given as name -> values."""
    n = len(next(iter(measurements.values()))) if measurements else len(next(iter(occupancy.values())))
    columns: dict[str, object] = {
        "run": [run] * n,
        "apparatus": [apparatus] * n,
        "sequence": [sequence] * n,
        "shot": pa.array(np.arange(n), pa.int64()),
        "time": pa.array([start + dt.timedelta(seconds=2 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
    }
    columns.update({f"p.{name}": values for name, values in parameters.items()})
    columns.update({f"m.{name}": np.asarray(values, dtype=float) for name, values in measurements.items()})
    for name, array in (occupancy or {}).items():
        columns[f"occ.{name}"] = pa.array(list(np.asarray(array, dtype=bool)), pa.list_(pa.bool_()))
    return pa.table(columns)


def phase_scan(rng, run="fringe1", contrast=0.7, phase_deg=30.0, sweeps=4, **kwargs) -> pa.Table:
    """16 phases (deg) x ``sweeps``: bright probability 0.5 (1 + C cos(phase + phi))."""
    phase = np.tile(np.arange(16) * 22.5, sweeps)
    p = 0.5 * (1.0 + contrast * np.cos(np.deg2rad(phase + phase_deg)))
    bright = rng.binomial(ATOMS, p) / ATOMS
    return scan_table(run, "phase-scan", {"phase[deg]": phase}, {"bright_fraction": bright, "atom_number": np.full(phase.size, ATOMS)}, **kwargs)


def ramsey_scan(rng, run="ramsey1", unit="us", **kwargs) -> pa.Table:
    """Waits 0..3000 us x 3 sweeps; truth T = 1000 us, C0 = 0.9, detuning 2 kHz, phase 0.3 rad."""
    wait_us = np.tile(np.linspace(0.0, 3000.0, 31), 3)
    p = 0.5 * (1.0 + 0.9 * np.exp(-((wait_us / 1000.0) ** 2)) * np.cos(2.0 * math.pi * 0.002 * wait_us + 0.3))
    bright = rng.binomial(ATOMS, p) / ATOMS
    wait = wait_us / 1000.0 if unit == "ms" else wait_us
    return scan_table(run, "ramsey", {f"wait[{unit}]": wait}, {"bright_fraction": bright}, **kwargs)


def by_name(result: DeriveResult) -> dict:
    return {figure.name: figure for figure in result.figures}


def near(figure, truth: float, relative: float = 0.15) -> bool:
    """Within 3 standard errors of the truth, or within ``relative`` of it."""
    return abs(figure.value - truth) <= max(3.0 * figure.stderr, relative * abs(truth))


def invoke(*args: str):
    return CliRunner().invoke(cli, list(args))


def stored_rows(catalogue, run: str) -> dict:
    """The figures rows of a run as stored (method version, counts, computed time)."""
    with catalogue.engine.connect() as connection:
        rows = connection.execute(
            select(s.FigureRow.name, s.FigureRow.kind, s.FigureRow.method_version, s.FigureRow.successes, s.FigureRow.trials, s.FigureRow.computed_at)
            .join(s.Run, s.Run.id == s.FigureRow.run_id)
            .where(s.Run.key == run)
        ).all()
    return {row.name: row for row in rows}


# --- fringe ------------------------------------------------------------------------------


def test_fringe_of_a_phase_scan_in_degrees(catalogue, make_file, db_url):
    # Truth is our simulation's: contrast 0.7, phase 30 deg, offset 0.5.
    rng = np.random.default_rng(11)
    table = phase_scan(rng)
    catalogue.ingest(make_file(table=table))
    result = derive(catalogue, "fringe1", "fringe", y="bright_fraction")
    figures = by_name(result)
    assert list(figures) == ["contrast", "fringe_phase", "offset"]
    assert figures["fringe_phase"].unit == "deg"
    assert near(figures["contrast"], 0.7) and near(figures["fringe_phase"], 30.0) and near(figures["offset"], 0.5)
    print(f"\nfringe: contrast {figures['contrast'].value:.4f} ± {figures['contrast'].stderr:.4f} (truth 0.7), "
          f"phase {figures['fringe_phase'].value:.2f} ± {figures['fringe_phase'].stderr:.2f} deg (truth 30)")

    # Reference: scipy.optimize.curve_fit (absolute_sigma=False) on the same shots. Ours is
    # the HC3 sandwich estimate, so the errors agree within a factor 3, not exactly.
    def model(x, a, c, phi):
        return a * (1.0 + c * np.cos(np.deg2rad(x + phi)))

    x = table.column("p.phase[deg]").to_numpy()
    y = table.column("m.bright_fraction").to_numpy()
    reference, covariance = curve_fit(model, x, y, p0=(0.5, 0.7, 30.0))
    reference_errors = np.sqrt(np.diag(covariance))
    assert figures["contrast"].value == pytest.approx(reference[1], rel=1e-5)
    for name, index in (("offset", 0), ("contrast", 1), ("fringe_phase", 2)):
        assert 0.3 <= figures[name].stderr / reference_errors[index] <= 3.0, name

    shown = json.loads(invoke("--db", db_url, "show", "fringe1", "--json").stdout)["figures"]
    assert set(shown) == {"contrast", "fringe_phase", "offset"}
    assert shown["contrast"] == figures["contrast"].as_dict()
    assert {f["method"] for f in shown.values()} == {"least-squares"}
    assert {row.method_version for row in stored_rows(catalogue, "fringe1").values()} == {"1"}


def test_fringe_needs_y_when_the_run_has_several_measurements(catalogue, make_file):
    catalogue.ingest(make_file(table=phase_scan(np.random.default_rng(12))))
    with pytest.raises(NotFoundError) as caught:
        derive(catalogue, "fringe1", "fringe")
    assert str(caught.value) == (
        "no single measurement in run 'fringe1' (it has atom_number, bright_fraction; choose one with --y or y=)"
    )
    assert catalogue.run("fringe1").figures == {}


def test_fringe_in_turns_is_fitted_in_radians(catalogue, make_file):
    # The same scan with its phase in turns (pint's 'turn' = 2 pi rad): the figures come
    # out in rad and equal the degree fit converted.
    table = phase_scan(np.random.default_rng(13))
    turns = table.column("p.phase[deg]").to_numpy() / 360.0
    table = table.drop_columns(["p.phase[deg]"]).append_column("p.phase[turn]", pa.array(turns))
    catalogue.ingest(make_file(table=table))
    figures = by_name(derive(catalogue, "fringe1", "fringe", y="bright_fraction", store=False))
    assert figures["fringe_phase"].unit == "rad"
    reference = {f.name: f for f in fit_fringe(turns * 360.0, table.column("m.bright_fraction").to_numpy(), phase_unit="deg")}
    assert figures["fringe_phase"].value == pytest.approx(math.radians(reference["fringe_phase"].value), rel=1e-6)
    assert figures["contrast"].value == pytest.approx(reference["contrast"].value, rel=1e-9)


FLAT_REASON = (
    "the model explains no more than a constant would by chance "
    "(residual sum of squares 0 against 0 for a constant, F-test p = 1)"
)


def test_a_flat_run_is_refused_and_nothing_is_stored(catalogue, make_file, db_url, capsys):
    flat = scan_table("flat", "phase-scan", {"phase[deg]": np.tile(np.arange(16) * 22.5, 2)}, {"bright_fraction": np.full(32, 0.5)})
    catalogue.ingest(make_file(table=flat))
    with pytest.raises(FitError) as caught:
        derive(catalogue, "flat", "fringe")
    assert caught.value.run == "flat" and caught.value.kind == "fringe"
    assert str(caught.value) == f"run 'flat': fringe fit failed: {FLAT_REASON}"
    code, out, err = run_main(capsys, "--db", db_url, "derive", "flat", "--kind", "fringe")
    assert code == 1 and out == ""
    assert err == f"runlog: error: {caught.value}\n"  # one line
    assert catalogue.run("flat").figures == {}


# --- coherence ---------------------------------------------------------------------------


@pytest.mark.parametrize(("unit", "truth", "detuning_unit", "detuning"), [("us", 1000.0, "MHz", 0.002), ("ms", 1.0, "kHz", 2.0)])
def test_coherence_time_comes_out_in_the_wait_unit(catalogue, make_file, unit, truth, detuning_unit, detuning):
    # Truth is our simulation's: T = 1000 us = 1 ms, detuning 2 kHz.
    catalogue.ingest(make_file(table=ramsey_scan(np.random.default_rng(21), unit=unit)))
    figures = by_name(derive(catalogue, "ramsey1", "coherence"))
    time = figures["t2_star"]
    assert time.unit == unit and near(time, truth)
    assert figures["ramsey_frequency"].unit == detuning_unit and near(figures["ramsey_frequency"], detuning)
    assert near(figures["ramsey_contrast"], 0.9)
    print(f"\ncoherence time {time.value:.4g} ± {time.stderr:.2g} {unit} (truth {truth:g} {unit})")
    assert catalogue.run("ramsey1").figures["t2_star"]["unit"] == unit


@pytest.mark.parametrize(("programmed", "unit", "expected"), [(-2.0, "kHz", -2.0), (2.0, "kHz", 2.0), (-2 * math.pi * 2.0, "rad/ms", -2 * math.pi * 2.0)])
def test_ramsey_frequency_takes_the_programmed_detunings_unit_and_sign(catalogue, make_file, programmed, unit, expected):
    # The simulation's fringe is 2 kHz (cos(2 pi 0.002 MHz t + 0.3)); a detuning programmed
    # at -2 kHz gives the same fringe as (+2 kHz, +0.3 rad) read as (-2 kHz, -0.3 rad).
    # rad/ms is the angular unit: 2 kHz = 4 pi rad/ms (omega = 2 pi f).
    table = ramsey_scan(np.random.default_rng(21))
    table = table.append_column(f"p.detuning[{unit}]", pa.array(np.full(table.num_rows, programmed)))
    catalogue.ingest(make_file(table=table))
    figures = by_name(derive(catalogue, "ramsey1", "coherence"))
    frequency, phase = figures["ramsey_frequency"], figures["ramsey_phase"]
    assert frequency.unit == unit
    assert abs(frequency.value - expected) <= 3 * frequency.stderr
    assert abs(math.remainder(phase.value - math.copysign(0.3, programmed), 2 * math.pi)) <= 3 * phase.stderr
    assert catalogue.run("ramsey1").figures["ramsey_frequency"]["unit"] == unit
    curve = fit_curve(catalogue, "ramsey1")  # the curve converts the stored unit back
    assert np.sqrt(np.mean((curve.y - np.interp(curve.x, curve.curve_x, curve.curve_y)) ** 2)) < 0.05


def test_coherence_from_contrast_per_wait(catalogue, make_file):
    # A measurement called 'contrast' holds the contrast already found per wait: fit_envelope.
    rng = np.random.default_rng(22)
    wait = np.linspace(0.0, 3000.0, 16)
    contrast = 0.9 * np.exp(-((wait / 1000.0) ** 2)) + rng.normal(0.0, 0.02, wait.size)
    catalogue.ingest(make_file(table=scan_table("envelope1", "ramsey-contrast", {"wait[us]": wait}, {"contrast": contrast})))
    figures = by_name(derive(catalogue, "envelope1", "coherence", envelope="gaussian"))
    assert list(figures) == ["envelope_time", "envelope_contrast"]
    assert near(figures["envelope_time"], 1000.0) and figures["envelope_time"].unit == "us"


def test_an_unknown_parameter_names_what_the_run_has(catalogue, make_file):
    catalogue.ingest(make_file(table=ramsey_scan(np.random.default_rng(23))))
    with pytest.raises(NotFoundError) as caught:
        derive(catalogue, "ramsey1", "coherence", x="depth")
    assert str(caught.value) == "no parameter 'depth' (run 'ramsey1' has wait)"
    with pytest.raises(FitError) as caught:
        derive(catalogue, "ramsey1", "fringe", x="wait")
    assert str(caught.value) == "run 'ramsey1': fringe fit failed: parameter 'wait' has unit 'us', not an angle such as deg or rad"
    with pytest.raises(NotFoundError) as caught:
        derive(catalogue, "ramsey1", "fringe")
    assert str(caught.value) == (
        "no single scanned angle parameter in run 'ramsey1' (its scanned number parameters: wait [us]; choose one with --x or x=)"
    )


# --- the demo ----------------------------------------------------------------------------


def test_demo_scans_against_the_generators_truth(catalogue, tmp_path):
    # Checked against the demo generator's own invented truth (SCENARIO), not an outside source.
    start = dt.date(2026, 9, 1)
    results = catalogue.ingest(write_demo_files(tmp_path / "demo", days=3, start=start))
    assert {r.status for r in results} == {"ingested"}
    runs = catalogue.runs()
    checked = {"fringe": 0, "coherence": 0}
    for row in runs[runs.sequence != "loading"].itertuples(index=False):
        day = (dt.date.fromisoformat(f"{row.run[:4]}-{row.run[4:6]}-{row.run[6:8]}") - start).days
        truth = SCENARIO.on_day(row.apparatus, day)
        if row.sequence == "phase-scan":
            figures = by_name(catalogue.derive(row.run, "fringe", apparatus=row.apparatus, y="bright_fraction"))
            assert near(figures["contrast"], truth.phase_contrast), (row.run, figures["contrast"])
            assert abs(figures["fringe_phase"].value - truth.phase_offset_deg) <= 3 * figures["fringe_phase"].stderr, (row.run, figures["fringe_phase"])
            assert near(figures["offset"], 0.5)
            checked["fringe"] += 1
        else:
            figures = by_name(catalogue.derive(row.run, "coherence", apparatus=row.apparatus, y="bright_fraction"))
            assert figures["t2_star"].unit == "us"
            assert near(figures["t2_star"], truth.coherence_time_us), (row.run, figures["t2_star"])
            assert near(figures["ramsey_contrast"], truth.ramsey_contrast), (row.run, figures["ramsey_contrast"])
            assert figures["ramsey_frequency"].unit == "kHz" and near(figures["ramsey_frequency"], truth.ramsey_detuning_khz), (row.run, figures["ramsey_frequency"])
            checked["coherence"] += 1
    assert checked["fringe"] >= 3 and checked["coherence"] >= 3, checked


# --- counting ----------------------------------------------------------------------------


def test_counting_recomputed_equals_the_ingest_figures_exactly(catalogue, make_file):
    catalogue.ingest(make_file(table=shot_table({"r1": 30}, seed=4)))
    at_ingest = catalogue.run("r1").figures
    rows_at_ingest = stored_rows(catalogue, "r1")
    assert set(at_ingest) == {"fill_fraction", "survival", "loss"}
    result = derive(catalogue, "r1", "counting", store=False)
    assert {f.name: f.as_dict() for f in result.figures} == at_ingest  # == on floats: bit for bit
    derive(catalogue, "r1", "counting")
    assert catalogue.run("r1").figures == at_ingest
    rows = stored_rows(catalogue, "r1")
    for name, row in rows.items():
        before = rows_at_ingest[name]
        assert (row.kind, row.method_version, row.successes, row.trials) == (before.kind, before.method_version, before.successes, before.trials)


def test_counting_keeps_the_stored_interval_unless_told(catalogue, make_file, tmp_path):
    config = tmp_path / "runlog.toml"
    config.write_text('[figures]\ninterval = "clopper-pearson"\n')
    catalogue.ingest(make_file(table=shot_table({"r1": 12}, seed=5)), config=config)
    assert catalogue.run("r1").figures["fill_fraction"]["binomial_method"] == "clopper-pearson"
    assert {f.binomial_method for f in derive(catalogue, "r1", "counting").figures} == {"clopper-pearson"}
    assert {f.binomial_method for f in derive(catalogue, "r1", "counting", interval="wilson").figures} == {"wilson"}


def test_every_interval_docs_figures_md_offers_is_accepted_in_runlog_toml(catalogue, make_file, tmp_path):
    from runlog.config import load_config
    from runlog.errors import ConfigError
    from runlog.figures.intervals import INTERVAL_METHODS

    documented = Path(__file__).resolve().parent.parent.joinpath("docs", "figures.md").read_text(encoding="utf-8")
    config = tmp_path / "runlog.toml"
    for method in INTERVAL_METHODS:
        assert f"`{method}`" in documented
        config.write_text(f'[figures]\ninterval = "{method}"\n')
        assert load_config(config).interval == method
    catalogue.ingest(make_file(table=shot_table({"r1": 12}, seed=5)), config=config)
    assert catalogue.run("r1").figures["fill_fraction"]["binomial_method"] == "wilson-cc"  # the pooled interval; ci_low/ci_high are shot-level
    config.write_text('[figures]\ninterval = "wald"\n')
    with pytest.raises(ConfigError, match="interval must be one of 'wilson', 'clopper-pearson', 'wilson-cc', not 'wald'"):
        load_config(config)


# --- spreading, sorting, correlator ------------------------------------------------------


def test_spreading_of_a_classical_random_walk(catalogue, make_file):
    # Outside fact: an unbiased +-1 random walk has the binomial position distribution with
    # standard deviation sqrt(n) after n steps (binomial variance n p (1 - p) times the step
    # length 2 squared, p = 1/2): exponent 0.5, prefactor 1 site.
    rng = np.random.default_rng(31)
    sites, shots_per_step = 41, 60
    steps = np.repeat(np.arange(1, 9), shots_per_step)
    position = 20 + 2 * rng.binomial(steps, 0.5) - steps
    occupancy = np.zeros((steps.size, sites), dtype=bool)
    occupancy[np.arange(steps.size), position] = True
    catalogue.ingest(make_file(table=scan_table("walk1", "walk", {"steps": steps.astype(float)}, {}, {"after": occupancy})))
    # Every walk started on site 20: the spread is the displacement from it.
    figures = by_name(derive(catalogue, "walk1", "spreading", settings={"start_site": 20}))
    assert near(figures["spreading_exponent"], 0.5, relative=0.0)
    assert near(figures["spreading_prefactor"], 1.0, relative=0.0)
    print(f"\nspreading exponent {figures['spreading_exponent'].value:.3f} ± {figures['spreading_exponent'].stderr:.3f} (0.5)")
    assert set(catalogue.run("walk1").figures) >= {"spreading_exponent", "spreading_prefactor"}


def test_sorting_with_the_target_from_a_text_parameter(catalogue, make_file):
    # Truth is our simulation's; the figures are checked against a direct count of the same array.
    rng = np.random.default_rng(32)
    shots, sites, target = 300, 20, [2, 3, 4, 5, 6, 7]
    loaded = rng.random((shots, sites)) < 0.5
    sorted_ = rng.random((shots, sites)) < 0.1
    sorted_[:, target] = rng.random((shots, len(target))) < 0.95
    table = scan_table("sort1", "sorting", {"target": ["2,3,4,5,6,7"] * shots}, {}, {"load": loaded, "sorted": sorted_})
    catalogue.ingest(make_file(table=table))
    figures = by_name(derive(catalogue, "sort1", "sorting"))
    defect_free = figures["defect_free_probability"]
    assert defect_free.value == np.count_nonzero(sorted_[:, target].all(axis=1)) / shots
    assert figures["target_fill_fraction"].value == np.count_nonzero(sorted_[:, target]) / (shots * len(target))
    assert defect_free.ci_low <= 0.95**6 <= defect_free.ci_high and defect_free.method == "wilson"
    given = by_name(derive(catalogue, "sort1", "sorting", target="7,6,5,4,3,2", store=False))
    assert given["defect_free_probability"] == defect_free
    with pytest.raises(FitError) as caught:
        derive(catalogue, "sort1", "sorting", target=[2, 25])
    assert str(caught.value) == "run 'sort1': sorting fit failed: target site index 25 at position 1 is outside 0..19"


def test_correlators_in_the_same_shots(catalogue, make_file):
    # Truth is our simulation's: each step keeps Q with probability (1 + 0.5) / 2, so C12 =
    # C23 = 0.5 and C13 = 0.25, K = 1 - (1 - C12)(1 - C23) = 0.75 (Leggett & Garg 1985 for K).
    rng = np.random.default_rng(33)
    n = 400
    q1 = rng.choice([-1.0, 1.0], n)
    q2 = np.where(rng.random(n) < 0.75, q1, -q1)
    q3 = np.where(rng.random(n) < 0.75, q2, -q2)
    catalogue.ingest(make_file(table=scan_table("lg1", "leggett-garg", {}, {"q1": q1, "q2": q2, "q3": q3})))
    figures = by_name(derive(catalogue, "lg1", "correlator"))
    assert list(figures) == ["C12", "C23", "C13", "K"]
    assert figures["C12"].value == pytest.approx(np.mean(q1 * q2), abs=1e-15)
    assert near(figures["K"], 0.75, relative=0.0) and figures["K"].method == "leggett-garg-same-shots"


def test_correlators_from_pairs_reach_past_the_macrorealist_bound(catalogue, make_file):
    # C(tau) = cos(omega tau) at omega tau = pi/3: C12 = C23 = 0.5, C13 = -0.5, K = 3/2, the
    # quantum bound (Leggett & Garg 1985 [memory for the journal reference]). Simulated truth.
    rng = np.random.default_rng(34)
    pairs = np.tile(["12", "23", "13"], 200)
    correlation = np.where(pairs == "13", -0.5, 0.5)
    a = rng.choice([-1.0, 1.0], pairs.size)
    b = np.where(rng.random(pairs.size) < (1 + correlation) / 2, a, -a)
    catalogue.ingest(make_file(table=scan_table("lg2", "leggett-garg", {"pair": list(pairs)}, {"a": a, "b": b})))
    figures = by_name(derive(catalogue, "lg2", "correlator"))
    assert near(figures["K"], 1.5, relative=0.0) and figures["K"].method == "leggett-garg-disjoint-shots"
    assert figures["K"].value > 1.0 + 2 * figures["K"].stderr
    assert by_name(derive(catalogue, "lg2", "correlator", y="b,a", x="pair", store=False))["K"] == figures["K"]


# --- rules -------------------------------------------------------------------------------

RULES = """\
[[rules]]
sequence = "phase*"
kind = "fringe"
y = "bright_fraction"

[[rules]]
sequence = "ramsey"
apparatus = "bench-*"
kind = "coherence"
"""


def rule_files(make_file) -> list:
    rng = np.random.default_rng(41)
    flat = scan_table("flat", "phase-scan", {"phase[deg]": np.tile(np.arange(16) * 22.5, 2)}, {"bright_fraction": np.full(32, 0.5)}, start=T0 + dt.timedelta(hours=3))
    return [
        make_file(table=shot_table({"load1": 8})),
        make_file(table=phase_scan(rng, start=T0 + dt.timedelta(hours=1))),
        make_file(table=ramsey_scan(rng, start=T0 + dt.timedelta(hours=2))),
        make_file(table=flat),
    ]


def test_rules_apply_to_matching_runs(catalogue, make_file, tmp_path):
    config = tmp_path / "runlog.toml"
    config.write_text(RULES)
    catalogue.ingest(rule_files(make_file))
    outcomes = catalogue.apply_rules(config)
    done = {(o.run, o.kind) for o in outcomes if isinstance(o, DeriveResult)}
    failed = [o for o in outcomes if isinstance(o, FitError)]
    assert done == {("fringe1", "fringe"), ("ramsey1", "coherence")}
    assert [(f.run, f.kind) for f in failed] == [("flat", "fringe")]
    assert "t2_star" in catalogue.run("ramsey1").figures
    assert "contrast" not in catalogue.run("flat").figures
    assert set(catalogue.run("load1").figures) == {"fill_fraction", "survival", "loss"}
    # Only the named runs; a rule for another apparatus matches nothing.
    assert [o.run for o in apply_rules(catalogue, load_config(config).rules, runs=["ramsey1"])] == ["ramsey1"]
    assert apply_rules(catalogue, [{"sequence": "ramsey", "kind": "coherence", "apparatus": "tweezer-*"}]) == []


def test_ingest_with_rules_derives_and_says_so(db_url, make_file, tmp_path):
    config = tmp_path / "runlog.toml"
    config.write_text(RULES)
    files = rule_files(make_file)
    result = invoke("--db", db_url, "ingest", "--config", str(config), "--json", *map(str, files))
    assert result.exit_code == 0, result.output
    objects = json.loads(result.stdout)
    assert objects[0]["derived"] == []  # a loading run: no rule matches
    assert objects[1]["derived"][0]["kind"] == "fringe" and set(objects[1]["derived"][0]["figures"]) == {"contrast", "fringe_phase", "offset"}
    assert objects[2]["derived"][0]["figures"]["t2_star"]["unit"] == "us"
    assert objects[3]["derived"] == [{"run": "flat", "kind": "fringe", "error": FLAT_REASON}]
    # Without rules the ingest objects keep their plain shape.
    plain = json.loads(invoke("--db", db_url, "ingest", "--json", str(make_file(table=shot_table({"load2": 4})))).stdout)
    assert "derived" not in plain[0]
    text = invoke("--db", db_url, "ingest", "--config", str(config), str(make_file(table=phase_scan(np.random.default_rng(42), run="fringe2"))))
    assert "derived: run fringe2, fringe, 3 figures" in text.stdout


def test_watch_with_rules_logs_what_it_derived(db_url, tmp_path):
    folder = tmp_path / "export"
    folder.mkdir()
    config = tmp_path / "runlog.toml"
    config.write_text(RULES)
    pq.write_table(phase_scan(np.random.default_rng(43)), folder / "scan.parquet")
    logger = logging.getLogger("runlog.watch")
    try:
        result = invoke("--db", db_url, "watch", str(folder), "--config", str(config), "--interval", "0.2", "--stop-after", "1.0")
    finally:
        for handler in logger.handlers[:]:  # the command adds a file handler to a global logger
            logger.removeHandler(handler)
            handler.close()
    assert result.exit_code == 0, result.output
    log = (folder / "runlog-watch.log").read_text()
    assert "ingested scan.parquet" in log and "derived: run fringe1, fringe, 3 figures" in log


def test_rule_checks_name_the_rule_and_know_every_kind(tmp_path):
    for kind in sorted(KINDS):  # config's list of kinds and derive's registry agree
        assert check_rules([{"sequence": "*", "kind": kind}])[0]["kind"] == kind
    config = tmp_path / "runlog.toml"
    cases = [
        ('[[rules]]\nsequence = "a"\nkind = "fit"\n', f"rule 1: unknown kind 'fit' (known: {', '.join(sorted(KINDS))})"),
        ('[[rules]]\nkind = "fringe"\n', "rule 1: 'sequence' is missing (a rule needs sequence and kind)"),
        ('[[rules]]\nsequence = "a"\nkind = "fringe"\n[[rules]]\nsequence = "b"\nkind = "coherence"\nenvelope = "lorentz"\n', "rule 2: envelope must be 'gaussian' or 'exponential', not 'lorentz'"),
        ('[[rules]]\nsequence = "a"\nkind = "fringe"\nwhen = "now"\n', "rule 1: unknown key 'when' (known: sequence, kind, x, y, envelope, apparatus, image, model, pulse, reference, stretch, threshold, depth, waist, mass, wavelength, gravity, target)"),
        ('[[rules]]\nsequence = "a"\nkind = "sorting"\ntarget = [1, -2]\n', "rule 1: 'target' must be site indices ('0,1,2' or [0, 1, 2]) or a parameter name"),
    ]
    for text, reason in cases:
        config.write_text(text)
        with pytest.raises(ConfigError) as caught:
            load_config(config)
        assert str(caught.value) == f"{config}: {reason}"


# --- runlog derive -----------------------------------------------------------------------


def test_derive_command_prints_figures_within_80_columns(catalogue, make_file, db_url):
    catalogue.ingest(make_file(table=phase_scan(np.random.default_rng(51))))
    result = invoke("--db", db_url, "derive", "fringe1", "--kind", "fringe", "--y", "bright_fraction")
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert lines[0] == "run fringe1: fringe, 3 figures stored"
    assert lines[1].split()[0] == "contrast" and lines[1].endswith("(least-squares)")
    assert max(map(len, lines)) <= 80
    as_json = json.loads(invoke("--db", db_url, "derive", "fringe1", "--kind", "fringe", "--y", "bright_fraction", "--json").stdout)
    assert as_json["run"] == "fringe1" and as_json["kind"] == "fringe"
    assert set(as_json["figures"]["fringe_phase"]) == {"value", "unit", "stderr", "ci_low", "ci_high", "method"}
    help_text = invoke("derive", "--help").stdout
    assert all(kind in help_text for kind in KINDS)
    assert invoke("--db", db_url, "derive", "fringe1").exit_code == 2  # no --kind: usage error
    assert invoke("--db", db_url, "derive", "--all", "--kind", "fringe").exit_code == 2


def test_derive_all_recomputes_and_keeps_method_versions(catalogue, make_file, db_url, tmp_path):
    config = tmp_path / "runlog.toml"
    config.write_text(RULES)
    catalogue.ingest(rule_files(make_file))
    before = stored_rows(catalogue, "load1")
    result = invoke("--db", db_url, "derive", "--all", "--config", str(config), "--json")
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    assert summary["kinds"] == {"counting": 1, "fringe": 1, "coherence": 1}
    assert (summary["runs"], summary["figures"]) == (3, 3 + 3 + 4)
    assert [(f["run"], f["kind"]) for f in summary["failures"]] == [("flat", "fringe")]
    after = stored_rows(catalogue, "load1")
    for name, row in after.items():
        # counting figures are at version 2 (shot-level intervals), the fits at 1
        assert row.method_version == before[name].method_version == ("2" if name in ("fill_fraction", "survival", "loss") else "1")
        assert row.computed_at >= before[name].computed_at
    assert {row.method_version for row in stored_rows(catalogue, "fringe1").values()} == {"1"}
    text = invoke("--db", db_url, "derive", "--all", "--config", str(config))
    lines = text.stdout.splitlines()
    assert lines[0] == "3 runs, 10 figures stored, 1 failed"
    assert lines[1].startswith("  failed: run 'flat': fringe fit failed: ") and max(map(len, lines)) <= 80
    # The library call the command makes, without rules: counting of every run with images.
    assert derive_all(catalogue).as_dict()["kinds"] == {"counting": 1}
