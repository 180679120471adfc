"""Ingest of good files, on SQLite and PostgreSQL: exact content, idempotency, multi-file runs."""

from __future__ import annotations

import numpy as np
import pytest
import pyarrow as pa
import pyarrow.parquet as pq
from conftest import shot_table


def test_ingest_stores_runs_shots_parameters_and_occupancy(catalogue, make_file):
    table = shot_table({"r1": 12, "r2": 7}, seed=3)
    path = make_file("day.parquet", table)
    [result] = catalogue.ingest(path)
    assert (result.status, result.runs, result.shots, result.reason) == ("ingested", ("r1", "r2"), 19, None)
    runs = catalogue.runs()
    assert sorted(runs["run"]) == ["r1", "r2"]
    assert dict(zip(runs["run"], runs["shots"])) == {"r1": 12, "r2": 7}
    info = catalogue.run("r1")
    assert info.parameters["depth"] == {"unit": "uK", "scanned": False, "value": 60.0}
    assert info.parameters["beam"] == {"unit": "", "scanned": False, "value": "vertical"}
    assert info.parameters["wait"] == {"unit": "us", "scanned": True, "min": 0.0, "max": 110.0}
    assert info.measurements == ["atom_number"]
    assert info.images["load"]["role"] == "loading" and info.images["survive"]["role"] == "survival"
    shots = catalogue.shots("r1")
    assert list(shots["shot"]) == list(range(12))
    assert list(shots["p.wait"]) == [10.0 * i for i in range(12)]
    assert shots.attrs["units"]["p.wait"] == "us"
    expected = table.filter(pa.compute.equal(table["run"], "r1"))
    assert np.array_equal(shots["m.atom_number"].to_numpy(), expected["m.atom_number"].to_numpy())
    assert list(shots["time"]) == list(expected["time"].to_pandas())
    occupancy = catalogue.occupancy("r1")
    assert np.array_equal(occupancy, np.array(expected["occ.load"].to_pylist(), dtype=bool))
    assert np.array_equal(catalogue.occupancy("r1", "survive"), np.array(expected["occ.survive"].to_pylist(), dtype=bool))


def test_same_file_again_is_already_present_and_writes_nothing(catalogue, make_file):
    path = make_file("day.parquet", runs={"r1": 5})
    assert catalogue.ingest(path)[0].status == "ingested"
    before = (catalogue.counts(), len(catalogue.ingest_log()))
    again = catalogue.ingest(path)[0]
    assert again.status == "already-present"
    assert (catalogue.counts(), len(catalogue.ingest_log())) == before


def test_a_run_over_two_files_becomes_one_run_and_a_differing_constant_becomes_scanned(catalogue, make_file):
    first = make_file("a.parquet", runs={"r1": 5})
    second = make_file("b.parquet", shot_table({"r1": 4}, first_shot=5, seed=2, extra={"p.depth[uK]": np.full(4, 70.0)}))
    assert [r.status for r in catalogue.ingest([first, second])] == ["ingested", "ingested"]
    info = catalogue.run("r1")
    assert info.shots == 9
    assert info.parameters["depth"] == {"unit": "uK", "scanned": True, "min": 60.0, "max": 70.0}
    assert info.parameters["beam"]["value"] == "vertical"  # still constant: every shot agrees
    shots = catalogue.shots("r1")
    assert list(shots["p.depth"]) == [60.0] * 5 + [70.0] * 4
    assert list(shots["shot"]) == list(range(9))


def test_units_of_a_later_file_are_converted_to_the_stored_unit(catalogue, make_file):
    first = make_file("a.parquet", runs={"r1": 3})
    table = shot_table({"r2": 3}, seed=5)
    table = table.rename_columns([("p.wait[ms]" if c == "p.wait[us]" else c) for c in table.column_names])
    second = make_file("b.parquet", table)
    catalogue.ingest([first, second])
    assert list(catalogue.shots("r2")["p.wait"]) == [0.0, 10_000.0, 20_000.0]  # 0, 10, 20 ms in us
    assert catalogue.run("r2").parameters["wait"]["unit"] == "us"


def test_a_shot_lacking_a_parameter_has_no_value_for_it(catalogue, make_file):
    wait = pa.array([1.0, None, 3.0], pa.float64())
    path = make_file("a.parquet", shot_table({"r1": 3}, extra={"p.wait[us]": wait}))
    catalogue.ingest(path)
    values = catalogue.shots("r1")["p.wait"].tolist()
    assert values[0] == 1.0 and np.isnan(values[1]) and values[2] == 3.0
    assert catalogue.run("r1").parameters["wait"]["scanned"] is True


def test_runs_without_images_and_folders_of_files(catalogue, make_file, tmp_path):
    make_file("a.parquet", runs={"r1": 3}, occupancy=False)
    make_file("b.parquet", runs={"r2": 3}, seed=9)
    results = catalogue.ingest(tmp_path)
    assert [r.status for r in results] == ["ingested", "ingested"]
    assert catalogue.run("r1").images == {}


def test_large_file_is_read_in_batches(catalogue, make_file, monkeypatch):
    import runlog.ingest

    monkeypatch.setattr(runlog.ingest, "BATCH_ROWS", 7)
    table = shot_table({"r1": 20, "r2": 13}, seed=4)
    # Interleave the runs so that every batch holds both.
    order = np.argsort(np.array([i % 2 for i in range(33)]) * 0 + np.arange(33) % 5, kind="stable")
    path = make_file("a.parquet", table.take(pa.array(order)))
    pq.write_table(table.take(pa.array(order)), path, row_group_size=5)
    [result] = catalogue.ingest(path)
    assert (result.status, result.reason, result.shots) == ("ingested", None, 33)
    assert sorted(catalogue.shots("r1")["shot"]) == list(range(20))
    original = table.filter(pa.compute.equal(table["run"], "r2"))
    assert np.array_equal(catalogue.occupancy("r2"), np.array(original["occ.load"].to_pylist(), dtype=bool))


def test_counting_figures_are_computed_at_ingest_and_pooled_over_files(catalogue, make_file):
    from statsmodels.stats.proportion import proportion_confint  # reference library, tests only

    first = shot_table({"r1": 6}, seed=11)
    second = shot_table({"r1": 5}, first_shot=6, seed=12)
    catalogue.ingest([make_file("a.parquet", first), make_file("b.parquet", second)])
    load = np.array(first["occ.load"].to_pylist() + second["occ.load"].to_pylist(), dtype=bool)
    kept = np.array(first["occ.survive"].to_pylist() + second["occ.survive"].to_pylist(), dtype=bool)
    figures = catalogue.run("r1").figures
    # Exact counts over both files.
    assert figures["fill_fraction"]["value"] == load.sum() / load.size
    assert figures["survival"]["value"] == (load & kept).sum() / load.sum()
    assert figures["loss"]["value"] == pytest.approx(1 - figures["survival"]["value"], abs=1e-15)
    # The pooled interval equal to statsmodels' Wilson interval for the same counts; the
    # shot-level one is that of all shots of both files (tests/test_shot_level.py checks it).
    low, high = proportion_confint(int(load.sum()), load.size, alpha=0.05, method="wilson")
    assert (figures["fill_fraction"]["binomial_ci_low"], figures["fill_fraction"]["binomial_ci_high"]) == pytest.approx((low, high), abs=1e-12)
    assert figures["fill_fraction"]["binomial_method"] == "wilson"
    assert figures["fill_fraction"]["method"] == "shot-ratio"
    from runlog.figures.counting import fill_fraction

    assert figures["fill_fraction"]["ci_low"] == pytest.approx(fill_fraction(load).ci_low, rel=1e-12)
    successes, trials, shape = catalogue.site_counts("r1", "fill")
    assert np.array_equal(successes, load.sum(axis=0)) and np.array_equal(trials, np.full(16, 11))
    assert shape == (16,)
    successes, trials, _ = catalogue.site_counts("r1", "survival")
    assert np.array_equal(successes, (load & kept).sum(axis=0)) and np.array_equal(trials, load.sum(axis=0))
