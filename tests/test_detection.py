"""Detection fidelity from photon counts: the histogram fit, its threshold and error
probabilities, the corrected fill and survival, and counts through the contract and store.

Outside references, named beside each check: the exact false-positive and false-negative
probabilities of the two simulated Poisson (or normal) count distributions from
``scipy.stats.poisson`` (``scipy.stats.norm``) at the threshold the fit chose; seeded
simulations with a known truth for coverage.
"""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pyarrow as pa
import pytest
from click.testing import CliRunner
from conftest import T0, run_main
from scipy import stats

from runlog.cli import cli
from runlog.derive import fit_curve
from runlog.errors import FitError, NotFoundError
from runlog.figures.detection import corrected_fill, corrected_survival, detection_figures, fit_counts

DARK, BRIGHT, FILL, SURVIVAL = 1.0, 12.0, 0.6, 0.9


def simulated(rng, shots=120, sites=25, dark=DARK, bright=BRIGHT):
    """Counts of two images: loaded with FILL, kept with SURVIVAL; Poisson dark and bright."""
    loaded = rng.random((shots, sites)) < FILL
    kept = loaded & (rng.random((shots, sites)) < SURVIVAL)
    first = np.where(loaded, rng.poisson(bright, loaded.shape), rng.poisson(dark, loaded.shape))
    second = np.where(kept, rng.poisson(bright, kept.shape), rng.poisson(dark, kept.shape))
    return first, second


def exact(threshold: float, dark=DARK, bright=BRIGHT) -> dict[str, float]:
    # scipy.stats.poisson: occupied when counts >= t, FP = P(N_d >= t), FN = P(N_b < t).
    fp = float(stats.poisson.sf(threshold - 1, dark))
    fn = float(stats.poisson.cdf(threshold - 1, bright))
    return {"false_positive": fp, "false_negative": fn, "fidelity": 1 - (fp + fn) / 2}


def test_threshold_and_errors_against_the_exact_poisson_computation():
    first, _ = simulated(np.random.default_rng(1), shots=400)
    fit = fit_counts(first)
    figures = {f.name: f for f in detection_figures(fit)}
    # The optimal threshold of the true distributions, by scipy.stats.poisson over all t.
    candidates = np.arange(1, 30)
    totals = stats.poisson.sf(candidates - 1, DARK) + stats.poisson.cdf(candidates - 1, BRIGHT)
    assert figures["threshold"].value == candidates[np.argmin(totals)] == 5
    truth = exact(figures["threshold"].value)
    for name, value in truth.items():
        assert abs(figures[name].value - value) < 3 * figures[name].stderr, name
        assert figures[name].ci_low < figures[name].value < figures[name].ci_high
    # At the fitted means the figures are the exact Poisson tails themselves.
    at_fit = exact(figures["threshold"].value, fit.dark_mean, fit.bright_mean)
    assert figures["false_positive"].value == pytest.approx(at_fit["false_positive"], rel=1e-12)
    assert figures["fidelity"].method == "maximum-likelihood/poisson-mixture"


def test_detection_coverage_and_corrected_figures_on_simulated_runs():
    rng = np.random.default_rng(2)
    z: dict[str, list[float]] = {}
    for _ in range(40):
        first, second = simulated(rng)
        fit, later = fit_counts(first), fit_counts(second)
        figures = {f.name: f for f in detection_figures(fit)}
        for name, value in exact(figures["threshold"].value).items():
            z.setdefault(name, []).append((figures[name].value - value) / figures[name].stderr)
        a, b = first >= fit.threshold, second >= later.threshold
        fill = corrected_fill(int(a.sum()), a.size, fit)
        survival = corrected_survival(int(a.sum()), int((a & b).sum()), a.size, fit, later)[0]
        z.setdefault("fill", []).append((fill.value - FILL) / fill.stderr)
        z.setdefault("survival", []).append((survival.value - SURVIVAL) / survival.stderr)
    for name, values in z.items():
        values = np.abs(values)
        assert 0.48 <= np.mean(values < 1) <= 0.88, (name, np.mean(values < 1))
        assert np.mean(values < 3) >= 0.97, name


def test_apparent_fill_is_biased_and_the_correction_removes_it():
    # Dark 3, bright 9: errors of several per cent, so the apparent fill is off by more than its error.
    first, _ = simulated(np.random.default_rng(3), shots=300, dark=3.0, bright=9.0)
    fit = fit_counts(first)
    a = first >= fit.threshold
    apparent = a.mean()
    corrected = corrected_fill(int(a.sum()), a.size, fit)
    assert abs(apparent - FILL) > 4 * np.sqrt(apparent * (1 - apparent) / a.size)
    assert abs(corrected.value - FILL) < 3 * corrected.stderr


def test_gaussian_mixture_for_camera_counts():
    rng = np.random.default_rng(4)
    occupied = rng.random(6000) < 0.5
    counts = np.where(occupied, rng.normal(300.0, 40.0, occupied.size), rng.normal(100.0, 25.0, occupied.size))
    fit = fit_counts(counts)
    assert fit.model == "gaussian"
    figures = {f.name: f for f in detection_figures(fit)}
    t = figures["threshold"].value
    # scipy.stats.norm at the chosen threshold, with the true components.
    fp, fn = stats.norm.sf(t, 100.0, 25.0), stats.norm.cdf(t, 300.0, 40.0)
    assert abs(figures["false_positive"].value - fp) < 3 * figures["false_positive"].stderr
    assert abs(figures["false_negative"].value - fn) < 3 * figures["false_negative"].stderr
    # The threshold where the two fitted densities cross, which minimises FP + FN.
    assert stats.norm.pdf(t, fit.dark_mean, fit.dark_sd) == pytest.approx(stats.norm.pdf(t, fit.bright_mean, fit.bright_sd), rel=1e-6)


def test_one_component_is_refused():
    with pytest.raises(FitError, match="one component|spread|fewer than 5"):
        fit_counts(np.random.default_rng(5).poisson(1.0, 2000))
    with pytest.raises(FitError, match="whole, non-negative"):
        fit_counts(np.linspace(-1, 1, 100), model="poisson")


# --- counts through the contract and the store ------------------------------------------


def counts_table(first, second=None, *, run="det1", with_occupancy=False, start=T0) -> pa.Table:
    n = first.shape[0]
    columns = {
        "run": [run] * n,
        "apparatus": ["bench-a"] * n,
        "sequence": ["detection"] * n,
        "shot": pa.array(np.arange(n), pa.int64()),
        "time": pa.array([start + dt.timedelta(seconds=2 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
        "counts.first": pa.array(list(first), pa.list_(pa.int64())),
    }
    if second is not None:
        columns["counts.second"] = pa.array(list(second), pa.list_(pa.int64()))
    if with_occupancy:
        columns["occ.first"] = pa.array(list(first >= 6), pa.list_(pa.bool_()))
    return pa.table(columns)


def test_counts_give_the_occupancy_and_the_detection_figures(catalogue, make_file):
    first, second = simulated(np.random.default_rng(6))
    result = catalogue.ingest(make_file(table=counts_table(first, second)))[0]
    assert result.status == "ingested", result.reason
    counts, threshold = catalogue.photon_counts("det1")
    np.testing.assert_array_equal(counts, first)
    assert threshold == fit_counts(first).threshold == 5
    # The occupancy the file did not carry: counts >= threshold; counting figures from it.
    np.testing.assert_array_equal(catalogue.occupancy("det1"), first >= 5)
    info = catalogue.run("det1")
    assert info.images["first"]["role"] == "loading" and info.images["second"]["role"] == "survival"
    assert info.figures["fill_fraction"]["value"] == pytest.approx((first >= 5).mean())

    derived = {f.name: f for f in catalogue.derive("det1", "detection").figures}
    stored = catalogue.run("det1").figures
    assert set(derived) == {"threshold", "fidelity", "false_positive", "false_negative", "corrected_fill_fraction", "corrected_survival", "corrected_loss"}
    assert stored["fidelity"]["value"] == derived["fidelity"].value and "ci_low" in stored["fidelity"]
    # Simulated truth: fill 0.6, survival 0.9, beside the apparent counting figures.
    assert abs(derived["corrected_fill_fraction"].value - FILL) < 3 * derived["corrected_fill_fraction"].stderr
    assert abs(derived["corrected_survival"].value - SURVIVAL) < 3 * derived["corrected_survival"].stderr
    assert "survival" in stored and "corrected_survival" in stored
    fixed = {f.name: f.value for f in catalogue.derive("det1", "detection", settings={"threshold": 7}, store=False).figures}
    assert fixed["threshold"] == 7 and fixed["false_negative"] > derived["false_negative"].value

    curve = fit_curve(catalogue, "det1")
    assert curve.kind == "detection" and curve.x_name == "counts of first"
    assert curve.y.sum() == pytest.approx(1.0)
    assert np.abs(curve.curve_y - curve.y).max() < 0.02  # the model over the histogram


def test_counts_beside_the_files_own_occupancy_and_a_configured_threshold(catalogue, make_file, tmp_path):
    first, _ = simulated(np.random.default_rng(7))
    catalogue.ingest(make_file(table=counts_table(first, with_occupancy=True)))
    counts, threshold = catalogue.photon_counts("det1")
    assert threshold is None  # the file carried the occupancy, thresholded at 6 by the lab
    np.testing.assert_array_equal(catalogue.occupancy("det1"), first >= 6)
    config = tmp_path / "runlog.toml"
    config.write_text("[occupancy]\nthreshold = 8\n")
    catalogue.ingest(make_file(table=counts_table(first, run="det2")), config=config)
    assert catalogue.photon_counts("det2")[1] == 8
    np.testing.assert_array_equal(catalogue.occupancy("det2"), first >= 8)
    with pytest.raises(NotFoundError, match="photon counts"):
        catalogue.photon_counts("det1", "second")


def test_bad_counts_are_refused_naming_file_column_and_row(catalogue, make_file):
    first, _ = simulated(np.random.default_rng(8), shots=30)
    table = counts_table(first).set_column(5, "counts.first", pa.array([list(map(float, r)) for r in first[:3]] + [[1.0, float("nan")] + [0.0] * 23] + [list(map(float, r)) for r in first[4:]], pa.list_(pa.float64())))
    path = make_file(table=table)
    result = catalogue.ingest(path)[0]
    assert result.status == "refused"
    assert result.reason == f"{path} (column 'counts.first', row 3): empty or non-finite site in counts list"
    flat = np.random.default_rng(9).poisson(1.0, (40, 25))
    path = make_file(table=counts_table(flat, run="flat"))
    reason = catalogue.ingest(path)[0].reason
    assert reason.startswith(f"{path} (column 'counts.first', row 0): run 'flat': no occupancy threshold from the counts (")
    assert reason.endswith("set [occupancy] threshold in runlog.toml")
    assert catalogue.runs().empty


def test_detection_through_rules_drift_and_the_command(catalogue, make_file, db_url, tmp_path, capsys):
    rng = np.random.default_rng(10)
    for day in range(8):
        # Simulated truth: the bright mean falls from 12 to 7 on the last day (focus lost).
        first, second = simulated(rng, shots=60, bright=12.0 if day < 7 else 7.0)
        catalogue.ingest(make_file(table=counts_table(first, second, run=f"det-{day}", start=T0 + dt.timedelta(days=day))))
    config = tmp_path / "runlog.toml"
    config.write_text('[[rules]]\nsequence = "detection"\nkind = "detection"\nmodel = "poisson"\n')
    outcomes = catalogue.apply_rules(config)
    assert len(outcomes) == 8 and all(not isinstance(o, FitError) for o in outcomes)
    fidelity = catalogue.drift("fidelity", apparatus="bench-a")
    assert len(fidelity.points) == 8 and 7 in fidelity.out_of_limits
    threshold = catalogue.drift("threshold", apparatus="bench-a")
    assert threshold.points[-1].value < threshold.points[0].value
    result = CliRunner().invoke(cli, ["--db", db_url, "derive", "det-0", "--kind", "detection", "--json"])
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout)["figures"]["threshold"]["value"] == 5
    code, _, err = run_main(capsys, "--db", db_url, "derive", "det-0", "--kind", "detection", "--model", "binomial")
    assert code == 1 and "model of kind detection" in err
