"""The health kinds through the store on both backends: derive, rules, drift, CLI, run page.

The physics is tested in ``test_health_fits.py``; here simulated runs (truth known, said
beside each check) are written as Parquet files and ingested, and the checks are that the
right shots, units, settings and apparatus constants reach the fits, that what is stored
is what they returned, and that the stored figures feed drift and the run page.
"""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pyarrow as pa
import pytest
from click.testing import CliRunner
from conftest import T0, run_main

import runlog
from runlog.cli import cli
from runlog.derive import DeriveResult, fit_curve
from runlog.errors import FitError, NotFoundError
from runlog.figures.lifetime import lifetime_model
from runlog.figures.rabi import rabi_model
from runlog.figures.relaxation import echo_model
from runlog.figures.spectroscopy import lorentzian, rabi_lineshape

ATOMS = 100
SITES = 25


def table(run: str, sequence: str, parameters: dict, measurements: dict | None = None, occupancy: dict | None = None, *, start: dt.datetime = T0, apparatus: str = "bench-a") -> pa.Table:
    n = len(next(iter(parameters.values())))
    columns: dict[str, object] = {
        "run": [run] * n,
        "apparatus": [apparatus] * n,
        "sequence": [sequence] * n,
        "shot": pa.array(np.arange(n), pa.int64()),
        "time": pa.array([start + dt.timedelta(seconds=2 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
    }
    columns.update({f"p.{name}": values for name, values in parameters.items()})
    columns.update({f"m.{name}": np.asarray(values, dtype=float) for name, values in (measurements or {}).items()})
    for name, array in (occupancy or {}).items():
        columns[f"occ.{name}"] = pa.array(list(np.asarray(array, dtype=bool)), pa.list_(pa.bool_()))
    return pa.table(columns)


def rabi_run(rng, run="rabi1", frequency=0.25, **kwargs) -> pa.Table:
    """Pulse durations in us; truth f = 0.25 MHz (pi time 2 us), contrast 0.9, damping 20 us."""
    t = np.repeat(np.linspace(0.0, 10.0, 21), 4)
    p = rabi_model(t, 0.03, 0.9, frequency, 1.0 / 20.0)
    return table(run, "rabi", {"pulse[us]": t}, {"population": rng.binomial(ATOMS, p) / ATOMS}, **kwargs)


def spectrum_run(rng, run="spec1", resonance=101.0, **kwargs) -> pa.Table:
    """Detuning from the zero-field line in kHz; truth resonance 101 kHz, FWHM 10 kHz."""
    x = np.repeat(np.linspace(70.0, 130.0, 25), 4)
    p = lorentzian(x, 0.05, 0.8, resonance, 10.0)
    return table(run, "spectrum", {"detuning[kHz]": x}, {"population": rng.binomial(ATOMS, p) / ATOMS}, **kwargs)


def survival_images(rng, hold: np.ndarray, survival: np.ndarray) -> dict:
    loaded = rng.random((hold.size, SITES)) < 0.6
    kept = loaded & (rng.random((hold.size, SITES)) < survival[:, None])
    return {"first": loaded, "second": kept}


def lifetime_run(rng, run="life1") -> pa.Table:
    """Hold times in s; truth lifetime 12 s, survival at zero 0.95; survival from two images."""
    hold = np.repeat(np.linspace(0.0, 20.0, 9), 12)
    return table(run, "lifetime", {"hold[s]": hold}, occupancy=survival_images(rng, hold, lifetime_model(hold, 0.95, 1.0 / 12.0)))


@pytest.fixture
def health(catalogue, make_file):
    rng = np.random.default_rng(16)
    t = np.repeat(np.linspace(0.0, 30.0, 13), 2)
    # Truth T2 = 12 ms, stretch 1.8, contrast 0.9; a contrast per wait with noise 0.02.
    echo = table("echo1", "echo", {"wait[ms]": t}, {"contrast": 0.9 * np.exp(-((t / 12.0) ** 1.8)) + rng.normal(0, 0.02, t.size)})
    x = np.repeat(np.linspace(-3.0, 3.0, 31), 4)
    line = table("line1", "rabi-line", {"detuning[kHz]": x, "pulse_length[ms]": np.full(x.size, 1.0)}, {"population": rng.binomial(ATOMS, rabi_lineshape(x, 0.02, 0.9, 0.3, 0.45, 1.0)) / ATOMS})
    wait = np.repeat(np.linspace(0.0, 400.0, 11), 10)
    reference = np.tile([True, False, False, False, False], wait.size // 5)
    kept = 0.97 * np.exp(-wait / 800.0)
    p = np.where(reference, kept, kept * (0.5 + 0.48 * np.exp(-wait / 120.0)))
    t1 = table("t1run", "t1", {"wait[ms]": wait, "no_pushout": reference}, {"bright": rng.binomial(ATOMS, p) / ATOMS})
    for item in (rabi_run(rng), spectrum_run(rng), echo, line, t1, lifetime_run(rng)):
        catalogue.ingest(make_file(table=item))
    return catalogue


def stored(catalogue, run: str) -> dict:
    return catalogue.run(run).figures


def test_each_health_kind_through_derive_is_stored_as_returned(health):
    catalogue = health
    found = catalogue.derive("rabi1", "rabi").figures
    by_name = {f.name: f for f in found}
    # Simulated truth: f = 0.25 MHz, pi time 2 us, contrast 0.9, damping 20 us.
    for name, truth, unit in (("rabi_frequency", 0.25, "MHz"), ("pi_time", 2.0, "us"), ("contrast", 0.9, ""), ("damping_time", 20.0, "us")):
        assert abs(by_name[name].value - truth) < 3 * by_name[name].stderr and by_name[name].unit == unit
    figures = stored(catalogue, "rabi1")
    assert {n: figures[n]["value"] for n in by_name} == {n: f.value for n, f in by_name.items()}

    spectrum = {f.name: f for f in catalogue.derive("spec1", "spectroscopy", constants={"field_sensitivity": "2.0 kHz/mG"}).figures}
    assert abs(spectrum["resonance"].value - 101.0) < 3 * spectrum["resonance"].stderr
    # The field: resonance / sensitivity, 101 kHz / (2 kHz/mG) = 50.5 mG at the simulated truth.
    assert spectrum["field"].unit == "mG" and abs(spectrum["field"].value - 50.5) < 3 * spectrum["field"].stderr
    assert spectrum["field"].stderr == pytest.approx(spectrum["resonance"].stderr / 2.0)
    assert stored(catalogue, "spec1")["field"]["value"] == spectrum["field"].value

    line = {f.name: f for f in catalogue.derive("line1", "spectroscopy", model="rabi").figures}
    assert abs(line["resonance"].value - 0.3) < 3 * line["resonance"].stderr  # simulated truth 0.3 kHz
    assert abs(line["rabi_frequency"].value - 0.45) < 3 * line["rabi_frequency"].stderr
    # The pulse is the run's only fixed time parameter (1 ms); given as text it is the same.
    again = {f.name: f.value for f in catalogue.derive("line1", "spectroscopy", model="rabi", settings={"pulse": "1000 us"}, store=False).figures}
    assert again["rabi_frequency"] == pytest.approx(line["rabi_frequency"].value, rel=1e-9)
    as_rabi = {f.name for f in catalogue.derive("line1", "rabi", store=False).figures}
    assert as_rabi == {"resonance", "rabi_frequency"}  # a frequency scan: the Rabi lineshape

    echo = {f.name: f for f in catalogue.derive("echo1", "echo").figures}
    assert abs(echo["t2"].value - 12.0) < 3 * echo["t2"].stderr and echo["t2"].unit == "ms"
    assert abs(echo["stretch"].value - 1.8) < 3 * echo["stretch"].stderr

    t1 = {f.name: f for f in catalogue.derive("t1run", "t1", settings={"reference": "no_pushout"}).figures}
    assert abs(t1["t1"].value - 120.0) < 3 * t1["t1"].stderr and t1["t1"].method == "least-squares/loss-corrected"

    life = {f.name: f for f in catalogue.derive("life1", "lifetime").figures}
    assert abs(life["lifetime"].value - 12.0) < 3 * life["lifetime"].stderr and life["lifetime"].unit == "s"
    assert stored(catalogue, "life1")["lifetime"]["ci_low"] == life["lifetime"].ci_low


def test_health_kinds_refuse_with_reasons_and_store_nothing(health):
    catalogue = health
    with pytest.raises(NotFoundError, match="model of kind lifetime"):
        catalogue.derive("life1", "lifetime", model="cubic")
    with pytest.raises(NotFoundError, match="setting of kind rabi"):
        catalogue.derive("rabi1", "rabi", settings={"stretch": 2})
    with pytest.raises(FitError, match="not a frequency"):
        catalogue.derive("rabi1", "spectroscopy", x="pulse")
    with pytest.raises(FitError, match="pulse .* neither a parameter"):
        catalogue.derive("line1", "spectroscopy", model="rabi", settings={"pulse": "fast"})
    assert "resonance" not in stored(catalogue, "rabi1")


def test_rules_with_apparatus_constants_and_the_cli(health, db_url, tmp_path, capsys):
    catalogue = health
    config = tmp_path / "runlog.toml"
    config.write_text(
        '[[rules]]\nsequence = "spectrum"\nkind = "spectroscopy"\n\n'
        '[[rules]]\nsequence = "t1"\nkind = "t1"\nreference = "no_pushout"\n\n'
        '[[rules]]\nsequence = "lifetime"\nkind = "lifetime"\nmodel = "single"\n\n'
        '[apparatus."bench-a"]\nfield_sensitivity = "2.0 kHz/mG"\n'
    )
    outcomes = catalogue.apply_rules(config)
    assert sorted((o.run, o.kind) for o in outcomes if isinstance(o, DeriveResult)) == [("life1", "lifetime"), ("spec1", "spectroscopy"), ("t1run", "t1")]
    assert stored(catalogue, "spec1")["field"]["unit"] == "mG"
    assert stored(catalogue, "t1run")["t1"]["method"] == "least-squares/loss-corrected"

    runner = CliRunner()
    result = runner.invoke(cli, ["--db", db_url, "derive", "spec1", "--kind", "spectroscopy", "--config", str(config), "--json"])
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout)["figures"]["field"]["unit"] == "mG"
    result = runner.invoke(cli, ["--db", db_url, "derive", "line1", "--kind", "spectroscopy", "--model", "rabi", "--set", "pulse=pulse_length"])
    assert result.exit_code == 0, result.output
    assert "rabi_frequency" in result.stdout
    result = runner.invoke(cli, ["--db", db_url, "derive", "life1", "--kind", "lifetime", "--set", "pulse"])
    assert result.exit_code == 2 and "NAME=VALUE" in result.output
    bad = tmp_path / "bad.toml"
    bad.write_text('[apparatus."bench-a"]\nfield_sensitivity = "fast"\n')
    code, out, err = run_main(capsys, "--db", db_url, "derive", "spec1", "--kind", "spectroscopy", "--config", str(bad))
    assert code == 1 and out == ""
    assert err.strip() == f"""runlog: error: {bad}: [apparatus."bench-a"] field_sensitivity = 'fast' is not a quantity with a unit such as '2.0 kHz/mG'"""
    summary = runner.invoke(cli, ["--db", db_url, "derive", "--all", "--config", str(config), "--json"])
    assert summary.exit_code == 0, summary.output
    assert json.loads(summary.stdout)["kinds"]["spectroscopy"] == 1


def test_pi_time_and_field_feed_daily_drift(catalogue, make_file):
    rng = np.random.default_rng(17)
    for day in range(9):
        start = T0 + dt.timedelta(days=day)
        # Simulated truth: the Rabi frequency drops by 20 % and the line moves on day 8.
        frequency = 0.25 if day < 8 else 0.20
        catalogue.ingest(make_file(table=rabi_run(rng, run=f"rabi-{day}", frequency=frequency, start=start)))
        catalogue.ingest(make_file(table=spectrum_run(rng, run=f"spec-{day}", resonance=101.0 if day < 8 else 110.0, start=start + dt.timedelta(hours=1))))
    rules = [{"sequence": "rabi", "kind": "rabi"}, {"sequence": "spectrum", "kind": "spectroscopy"}]
    outcomes = catalogue.apply_rules(runlog.config.Mapping(rules=tuple(rules), apparatus_settings={"bench-a": {"field_sensitivity": "2.0 kHz/mG"}}))
    assert all(isinstance(o, DeriveResult) for o in outcomes), [str(o) for o in outcomes if not isinstance(o, DeriveResult)]
    pi_time = catalogue.drift("pi_time", apparatus="bench-a")
    assert pi_time.unit == "us" and len(pi_time.points) == 9
    # The last day (pi time 2.5 us instead of 2 us) is outside the limits the first days set.
    assert 8 in pi_time.out_of_limits and pi_time.alarms
    field = catalogue.drift("field", apparatus="bench-a")
    assert field.unit == "mG" and 8 in field.out_of_limits
    assert field.points[0].value == pytest.approx(50.5, abs=3 * field.points[0].stderr)


def test_fit_curve_of_each_health_kind_goes_through_the_shots(health):
    catalogue = health
    catalogue.derive("rabi1", "rabi")
    catalogue.derive("spec1", "spectroscopy")
    catalogue.derive("line1", "spectroscopy", model="rabi")
    catalogue.derive("echo1", "echo")
    catalogue.derive("t1run", "t1", settings={"reference": "no_pushout"})
    catalogue.derive("life1", "lifetime")
    rabi = fit_curve(catalogue, "rabi1")
    info = stored(catalogue, "rabi1")
    # The model written out again from the stored figures, with the curve's own offset.
    f, tau, c = 0.5 / info["pi_time"]["value"], info["damping_time"]["value"], info["contrast"]["value"]
    expected = rabi_model(rabi.curve_x, rabi.offset, c, f, 1.0 / tau)
    np.testing.assert_allclose(rabi.curve_y, expected, rtol=1e-6, atol=1e-9)
    assert rabi.x_name == "pulse" and rabi.x_unit == "us" and rabi.y_name == "population"
    echo = fit_curve(catalogue, "echo1")
    e = stored(catalogue, "echo1")
    np.testing.assert_allclose(echo.curve_y, echo_model(echo.curve_x, 0.0, e["echo_contrast"]["value"], e["t2"]["value"], e["stretch"]["value"]), rtol=1e-5)
    # The loss-corrected T1 curve is drawn over all shots, reference shots included (the
    # stored figures do not name the reference parameter), so it is checked for its kind only.
    assert fit_curve(catalogue, "t1run").kind == "t1"
    for run, kind in (("spec1", "spectroscopy"), ("line1", "spectroscopy"), ("life1", "lifetime")):
        curve = fit_curve(catalogue, run)
        assert curve.kind == kind
        # The curve passes through the shots: its residual spread is at the shot-noise level.
        at_shots = np.interp(curve.x, curve.curve_x, curve.curve_y)
        assert np.sqrt(np.mean((curve.y - at_shots) ** 2)) < 0.12, run
    life = fit_curve(catalogue, "life1")
    assert life.y_name == "surviving fraction" and life.x_unit == "s"


def test_run_page_draws_the_stored_health_fit_over_the_shots(health, db_url, monkeypatch):
    import streamlit as st
    from streamlit.testing.v1 import AppTest

    from runlog.dashboard import APP, URL_VARIABLE

    catalogue = health
    catalogue.derive("rabi1", "rabi")
    catalogue.derive("life1", "lifetime")
    monkeypatch.setenv(URL_VARIABLE, db_url)
    st.cache_resource.clear()
    st.cache_data.clear()
    try:
        at = AppTest.from_file(str(APP), default_timeout=60).run()
        at.switch_page("views/run_detail.py").run()
        assert not at.exception, at.exception
        day = T0.date()
        for run, x_title in (("rabi1", "pulse [µs]"), ("life1", "hold [s]")):
            at.selectbox(key="run-apparatus").set_value("bench-a").run()
            at.selectbox(key="run-day-bench-a").set_value(day).run()
            at.selectbox(key=f"run-run-bench-a-{day}").set_value(run).run()
            assert not at.exception, at.exception
            (chart,) = [json.loads(e.proto.spec) for e in at.get("vega_lite_chart") if "fit" in e.proto.spec]
            assert chart["layer"][0]["encoding"]["x"]["title"] == x_title
            curve = fit_curve(catalogue, run)
            datasets = {d.name: pa.ipc.open_stream(d.data.data).read_all().to_pandas() for e in at.get("vega_lite_chart") for d in e.proto.datasets}
            drawn = [frame for frame in datasets.values() if len(frame) == curve.curve_x.size]
            assert drawn and np.allclose(drawn[0]["y"], curve.curve_y)
    finally:
        from runlog.dashboard_app import common

        common.catalogue(db_url).close()
        st.cache_resource.clear()
        st.cache_data.clear()


def test_calibration_register_lists_the_latest_value_per_apparatus(catalogue, make_file, db_url, capsys):
    rng = np.random.default_rng(18)
    for day, apparatus in ((0, "bench-a"), (1, "bench-a"), (2, "bench-b")):
        run = f"rabi-{apparatus}-{day}"
        catalogue.ingest(make_file(table=rabi_run(rng, run=run, start=T0 + dt.timedelta(days=day), apparatus=apparatus)))
        catalogue.derive(run, "rabi", apparatus=apparatus)
    found = {(c.apparatus, c.name): c for c in catalogue.calibrations(names=["pi_time", "contrast"])}
    assert set(found) == {("bench-a", "pi_time"), ("bench-a", "contrast"), ("bench-b", "pi_time"), ("bench-b", "contrast")}
    current = found[("bench-a", "pi_time")]
    # The latest run of bench-a (day 1), not the earlier one.
    assert current.run == "rabi-bench-a-1" and current.started == T0 + dt.timedelta(days=1)
    assert current.value == catalogue.run("rabi-bench-a-1", apparatus="bench-a").figures["pi_time"]["value"] and current.unit == "us"
    default = catalogue.calibrations(apparatus="bench-b")
    assert {c.name for c in default} == {"pi_time", "rabi_frequency"}  # contrast is no calibration figure by default
    code, out, _ = run_main(capsys, "--db", db_url, "calibrations", "pi_time", "--apparatus", "bench-a", "--json")
    assert code == 0
    (entry,) = json.loads(out)
    assert entry["run"] == "rabi-bench-a-1" and entry["value"] == current.value and entry["started"].startswith("2026-03-03")
    code, out, _ = run_main(capsys, "--db", db_url, "calibrations", "--apparatus", "bench-b")
    assert code == 0 and out.startswith("bench-b pi_time = ") and "run rabi-bench-b-2" in out


def ramsey_run(rng, run="ramsey-field", delta=0.04, oscillator=6834.6 , **kwargs) -> pa.Table:
    """Waits in us; truth fringe frequency 0.04 MHz = 40 kHz (the atoms' transition 40 kHz
    above the oscillator), T2* 60 us (gaussian), C0 0.9; the oscillator at ``oscillator`` MHz."""
    t = np.repeat(np.linspace(0.0, 100.0, 41), 4)
    p = 0.5 * (1.0 + 0.9 * np.exp(-((t / 60.0) ** 2)) * np.cos(2 * np.pi * delta * t + 0.3))
    return table(run, "ramsey", {"wait[us]": t, "mw_frequency[MHz]": np.full(t.size, oscillator)}, {"bright_fraction": rng.binomial(ATOMS, p) / ATOMS}, **kwargs)


def test_the_ramsey_fringe_frequency_gives_the_field_as_spectroscopy_does(catalogue, make_file, tmp_path):
    rng = np.random.default_rng(16)
    catalogue.ingest(make_file("ramsey.parquet", ramsey_run(rng)))
    # Oscillator on the zero-field transition: field = 40 kHz / (2 kHz/mG) = 20 mG at the truth.
    found = {f.name: f for f in catalogue.derive("ramsey-field", "coherence", constants={"field_sensitivity": "2.0 kHz/mG"}).figures}
    frequency = next(found[n] for n in ("ramsey_frequency", "detuning") if n in found)
    field = found["field"]
    assert field.unit == "mG" and field.method == "ramsey frequency/sensitivity"
    assert field.value == pytest.approx(frequency.value * 1000 / 2.0, rel=1e-12)
    assert field.stderr == pytest.approx(frequency.stderr * 1000 / 2.0, rel=1e-12)
    assert abs(field.value - 20.0) < 3 * field.stderr
    assert stored(catalogue, "ramsey-field")["field"]["value"] == field.value
    # The oscillator as an absolute frequency, 6834.6 MHz, with the zero-field transition at
    # 6834.55 MHz: the atoms sit at 6834.6 + 0.04 MHz, 90 kHz above it -> 45 mG; below: 5 mG.
    constants = {"field_sensitivity": "2.0 kHz/mG", "zero_field_frequency": "6834.55 MHz"}
    above = {f.name: f for f in catalogue.derive("ramsey-field", "coherence", constants=constants, settings={"oscillator": "mw_frequency"}, store=False).figures}["field"]
    below = {f.name: f for f in catalogue.derive("ramsey-field", "coherence", constants=constants, settings={"oscillator": "mw_frequency", "side": "below"}, store=False).figures}["field"]
    assert above.value == pytest.approx((50.0 + frequency.value * 1000) / 2.0, rel=1e-9)
    assert below.value == pytest.approx((50.0 - frequency.value * 1000) / 2.0, rel=1e-9)
    # Through [[rules]] with the apparatus table of runlog.toml, and into the daily rollups.
    config = tmp_path / "runlog.toml"
    config.write_text('[[rules]]\nsequence = "ramsey"\nkind = "coherence"\n\n[apparatus."bench-a"]\nfield_sensitivity = "2.0 kHz/mG"\n')
    outcomes = catalogue.apply_rules(config)
    assert [o.kind for o in outcomes if isinstance(o, DeriveResult)] == ["coherence"]
    assert stored(catalogue, "ramsey-field")["field"]["value"] == pytest.approx(field.value, rel=1e-12)
    point = catalogue.drift("field", record_alarms=False).points[0]
    assert point.value == pytest.approx(field.value, rel=1e-12)
    with pytest.raises(FitError, match="give oscillator="):
        catalogue.derive("ramsey-field", "coherence", constants=constants, store=False)
    with pytest.raises(FitError, match="side 'left'"):
        catalogue.derive("ramsey-field", "coherence", constants=constants, settings={"oscillator": "6834.6 MHz", "side": "left"}, store=False)
