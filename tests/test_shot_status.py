"""Shot status and image roles: shots whose status does not count are left out of every
figure, rollup and drift point (and counted as left out); a run whose second image is
taken after rearranging atoms gets no survival or loss."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import run_main, shot_table
from runlog.config import Mapping, load_config
from runlog.figures.counting import fill_fraction, survival

T0 = dt.datetime(2026, 3, 2, 9, 0, tzinfo=dt.timezone.utc)


def _with_status(table: pa.Table, bad: np.ndarray, label: str = "laser-unlocked") -> pa.Table:
    status = np.where(bad, label, "ok")
    return table.append_column("status", pa.array(status.tolist(), pa.string()))


def _occupancy(table: pa.Table, column: str) -> np.ndarray:
    return np.array(table.column(column).to_pylist(), dtype=bool)


def test_bad_status_shots_are_left_out_of_figures_and_counted(catalogue, make_file, tmp_path):
    table = shot_table({"r1": 60}, seed=5)
    bad = np.zeros(60, dtype=bool)
    bad[::3] = True
    # The unlocked shots load nothing: counted, they would pull the fill fraction down.
    load = _occupancy(table, "occ.load")
    load[bad] = False
    table = table.set_column(table.schema.get_field_index("occ.load"), "occ.load", pa.array(list(load), pa.list_(pa.bool_())))
    path = make_file(table=_with_status(table, bad))
    catalogue.ingest(path)
    info = catalogue.run("r1")
    good = ~bad
    expected = fill_fraction(load[good])
    assert info.figures["fill_fraction"]["value"] == pytest.approx(expected.value, rel=1e-15)
    assert info.figures["fill_fraction"]["ci_low"] == pytest.approx(expected.ci_low, rel=1e-12)
    kept, _ = survival(load[good], _occupancy(table, "occ.survive")[good] & load[good])
    assert info.figures["survival"]["value"] == pytest.approx(kept.value, rel=1e-15)
    assert info.shots == 60 and info.excluded_shots == 20
    assert info.as_dict()["excluded_shots"] == 20
    # Per-site maps count the same shots.
    successes, trials, _ = catalogue.site_counts("r1", "fill")
    assert int(trials[0]) == 40 and int(successes.sum()) == int(load[good].sum())
    # The day's drift point is the run's figure, and derive recomputes the same.
    point = catalogue.drift("fill_fraction", apparatus="bench-a").points[0]
    assert point.value == pytest.approx(expected.value, rel=1e-15)
    derived = {f.name: f for f in catalogue.derive("r1", kind="counting").figures}
    assert derived["fill_fraction"].value == pytest.approx(expected.value, rel=1e-15)
    # Filters still find the left-out shots.
    selected = catalogue.select("status = 'laser-unlocked'")
    assert len(selected) == 20


def test_counting_status_is_configurable(catalogue, make_file, tmp_path):
    table = _with_status(shot_table({"r1": 30}, seed=6), np.arange(30) % 2 == 0, "marginal")
    config = tmp_path / "runlog.toml"
    config.write_text('[figures]\ncounting_status = ["ok", "marginal"]\n')
    mapping = load_config(config)
    assert mapping.counting_status == ("ok", "marginal")
    catalogue.ingest(make_file(table=table), config=mapping)
    info = catalogue.run("r1")
    assert info.excluded_shots == 0
    assert info.figures["fill_fraction"]["value"] == pytest.approx(fill_fraction(_occupancy(table, "occ.load")).value, rel=1e-15)
    # derive uses the statuses ingest recorded
    derived = {f.name: f for f in catalogue.derive("r1", kind="counting").figures}
    assert derived["fill_fraction"].value == pytest.approx(info.figures["fill_fraction"]["value"], rel=1e-15)


def test_show_and_export_report_left_out_shots(catalogue, make_file, capsys, tmp_path):
    import json

    table = _with_status(shot_table({"r1": 10}, seed=7), np.arange(10) < 4)
    catalogue.ingest(make_file(table=table))
    code, out, _ = run_main(capsys, "--db", catalogue.url, "show", "r1")
    assert code == 0 and "4 of them left out of the figures by their status" in out
    code, out, _ = run_main(capsys, "--db", catalogue.url, "show", "r1", "--json")
    assert json.loads(out)["excluded_shots"] == 4
    result = catalogue.export("shot >= 0", tmp_path / "package")
    runs = pq.read_table(tmp_path / "package" / "runs.parquet") if (tmp_path / "package" / "runs.parquet").exists() else None
    if runs is None:
        import pyarrow.csv as pcsv

        runs = pcsv.read_csv(tmp_path / "package" / "runs.csv")
    assert runs.column("excluded_shots").to_pylist() == [4]
    assert result.shots == 10  # the shots themselves are exported, status and all


def test_rearrangement_run_has_no_survival(catalogue, make_file, tmp_path):
    config = tmp_path / "runlog.toml"
    config.write_text('[image_roles]\n"sort*" = "rearrangement"\n')
    mapping = load_config(config)
    catalogue.ingest([make_file(runs={"s1": 20}, sequence="sort-line", seed=8), make_file(runs={"h1": 20}, sequence="hold", seed=9, start=T0 + dt.timedelta(hours=1))], config=mapping)
    sorted_run, held = catalogue.run("s1"), catalogue.run("h1")
    assert "survival" not in sorted_run.figures and "loss" not in sorted_run.figures
    assert "fill_fraction" in sorted_run.figures
    assert sorted_run.images["survive"]["role"] == "rearranged"
    assert "survival" in held.figures and held.images["survive"]["role"] == "survival"
    # The survival series holds the hold run only, and derive makes no survival either.
    drift = catalogue.drift("survival", apparatus="bench-a")
    assert sum(p.runs for p in drift.points) == 1
    derived = {f.name for f in catalogue.derive("s1", kind="counting").figures}
    assert "survival" not in derived


def test_a_sorting_rule_makes_the_second_image_a_rearrangement():
    mapping = Mapping(rules=({"sequence": "load-sort*", "kind": "sorting", "target": [0, 1]},))
    assert mapping.second_image_role("load-sort-4x4") == "rearrangement"
    assert mapping.second_image_role("hold") == "survival"
    declared = Mapping(rules=mapping.rules, image_roles={"load-sort-keep": "survival"})
    assert declared.second_image_role("load-sort-keep") == "survival"


def test_bad_image_role_is_refused(tmp_path):
    from runlog.errors import ConfigError

    config = tmp_path / "runlog.toml"
    config.write_text('[image_roles]\n"sort*" = "sorted"\n')
    with pytest.raises(ConfigError, match=r"\[image_roles\] 'sort\*' must be 'survival' or 'rearrangement', not 'sorted'"):
        load_config(config)
