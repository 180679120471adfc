"""Analysis versions: a re-analysed run lands beside the old one, the current one drives
figures, rollups and drift, switching back restores them exactly, withdrawals come back
exactly, figures are immutable records, and the impact report agrees with numpy."""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import T0, run_main, shot_table, write_table
from sqlalchemy import select

import runlog
from runlog.errors import ContractError, NotFoundError
from runlog.store.schema import DailyRollup

SITES = 25


def thresholded(runs: dict[str, int], threshold: float, *, analysis: str | None = None, as_column: bool = False, seed: int = 3, start: dt.datetime = T0) -> pa.Table:
    """The same shots analysed with another detection threshold: a per-site camera signal
    (simulated once per seed) is thresholded into the loading and survival images."""
    table = shot_table(runs, sites=SITES, seed=seed, start=start, occupancy=False)
    rng = np.random.default_rng(seed)
    n = table.num_rows
    atoms = rng.random((n, SITES)) < 0.55
    kept = atoms & (rng.random((n, SITES)) < 0.85)
    # Counts of photons: an atom gives ~1.0, an empty site ~0.3, with scatter.
    first = np.where(atoms, 1.0, 0.3) + rng.normal(0, 0.25, (n, SITES))
    second = np.where(kept, 1.0, 0.3) + rng.normal(0, 0.25, (n, SITES))
    table = table.append_column("occ.load", pa.array(list(first > threshold), pa.list_(pa.bool_())))
    table = table.append_column("occ.survive", pa.array(list(second > threshold), pa.list_(pa.bool_())))
    if analysis is not None and as_column:
        table = table.append_column("analysis", pa.array([analysis] * n))
    elif analysis is not None:
        table = table.replace_schema_metadata({**(table.schema.metadata or {}), b"analysis": analysis.encode()})
    return table


def counted(path, run: str) -> dict[str, tuple[float, float]]:
    """Fill fraction and survival of one run of a file, with shot-level standard errors
    (ratio estimate over shots, Cochran 1977 section 6.3, never below the binomial one), by numpy."""
    table = pq.read_table(path).to_pandas()
    rows = table[table["run"] == run]
    load = np.array([np.asarray(v, bool) for v in rows["occ.load"]])
    survive = np.array([np.asarray(v, bool) for v in rows["occ.survive"]])
    out = {}
    for name, y, x in (("fill_fraction", load.sum(axis=1), np.full(len(load), load.shape[1])), ("survival", (load & survive).sum(axis=1), load.sum(axis=1))):
        p, shots = y.sum() / x.sum(), len(y)
        between = shots / (shots - 1) * ((y - p * x) ** 2).sum() / x.sum() ** 2
        out[name] = (p, math.sqrt(max(between, p * (1 - p) / x.sum())))
    return out


def rollups(catalogue) -> list[tuple]:
    with catalogue.engine.connect() as connection:
        rows = connection.execute(select(*DailyRollup.__table__.columns).order_by(DailyRollup.sequence, DailyRollup.name)).all()
    return [tuple(row) for row in rows]


def drift_points(catalogue, quantity="survival"):
    return [(p.date, p.value, p.stderr, p.runs, p.shots) for p in catalogue.drift(quantity, record_alarms=False).points]


@pytest.fixture
def two_versions(catalogue, make_file):
    runs = {"r1": 60, "r2": 40}
    v1 = make_file("v1.parquet", thresholded(runs, 0.65))
    v2 = make_file("v2.parquet", thresholded(runs, 0.8, analysis="thr-0.8"))
    return catalogue, v1, v2


def test_a_new_version_lands_beside_the_old_one_and_becomes_current(two_versions, make_file):
    catalogue, v1, v2 = two_versions
    assert catalogue.ingest(v1)[0].status == "ingested"
    old = catalogue.run("r1").figures
    [result] = catalogue.ingest(v2)
    assert (result.status, result.shots) == ("ingested", 100)
    info = catalogue.run("r1").as_dict()
    assert info["analysis"] == "thr-0.8"
    assert [(a["analysis"], a["current"], a["shots"], [f["file"] for f in a["files"]]) for a in info["analyses"]] == [("", False, 60, [str(v1)]), ("thr-0.8", True, 60, [str(v2)])]
    # Both versions are kept; the catalogue counts the current one.
    assert catalogue.counts()["shots"] == 100
    assert len(catalogue.select("shot >= 0")) == 100
    expected = counted(v2, "r1")
    for name, (value, stderr) in expected.items():
        assert info["figures"][name]["value"] == pytest.approx(value, rel=1e-12)
        assert info["figures"][name]["stderr"] == pytest.approx(stderr, rel=1e-12)
    # The old version's figures are still there, as they were.
    assert catalogue.run("r1", analysis="").figures == old
    # The same shots again under the same version: refused, as before versions existed.
    again = make_file("v2-again.parquet", thresholded({"r1": 60}, 0.81, analysis="thr-0.8"))
    [refused] = catalogue.ingest(again)
    assert refused.status == "refused"
    assert refused.reason == f"{again} (column 'shot', row 0): shot index 0 of run 'r1' is already in the catalogue"


def test_the_analysis_can_come_as_a_column_and_must_not_change_within_a_run(catalogue, make_file):
    table = thresholded({"r1": 10}, 0.7, analysis="roi-b", as_column=True)
    assert catalogue.ingest(make_file("a.parquet", table))[0].status == "ingested"
    assert catalogue.run("r1").analysis == "roi-b"
    mixed = thresholded({"r2": 10}, 0.7, analysis="roi-b", as_column=True)
    mixed = mixed.set_column(mixed.schema.get_field_index("analysis"), "analysis", pa.array(["roi-b"] * 7 + ["roi-c"] * 3))
    bad = make_file("b.parquet", mixed)
    [refused] = catalogue.ingest(bad)
    assert refused.status == "refused"
    assert refused.reason == f"{bad} (column 'analysis', row 7): run 'r2' changes analysis from 'roi-b' to 'roi-c': a file gives each run's shots one analysis version"


def test_impact_report_agrees_with_numpy_on_the_two_files(two_versions):
    catalogue, v1, v2 = two_versions
    catalogue.ingest([v1, v2])
    report = {entry["figure"]: entry for entry in catalogue.impact("r1")}
    old, new = counted(v1, "r1"), counted(v2, "r1")
    for name in ("fill_fraction", "survival"):
        entry = report[name]
        assert entry["old"]["analysis"] == "" and entry["new"]["analysis"] == "thr-0.8"
        assert entry["old"]["value"] == pytest.approx(old[name][0], rel=1e-12)
        assert entry["new"]["value"] == pytest.approx(new[name][0], rel=1e-12)
        assert entry["old"]["stderr"] == pytest.approx(old[name][1], rel=1e-12)
        assert entry["new"]["stderr"] == pytest.approx(new[name][1], rel=1e-12)
        combined = math.hypot(old[name][1], new[name][1])
        assert entry["sigma"] == pytest.approx((new[name][0] - old[name][0]) / combined, rel=1e-9)
        assert entry["drift"] == [{"apparatus": "bench-a", "day": "2026-03-02", "sequence": "loading"}]
    # Explicit versions, the other way round, flip the sign.
    back = {e["figure"]: e for e in catalogue.impact("r1", from_analysis="thr-0.8", to_analysis="")}
    assert back["survival"]["sigma"] == pytest.approx(-report["survival"]["sigma"], rel=1e-12)


def test_switching_back_gives_the_rollups_and_drift_of_before_exactly(two_versions):
    catalogue, v1, v2 = two_versions
    catalogue.ingest(v1)
    before_rollups, before_drift = rollups(catalogue), drift_points(catalogue)
    catalogue.ingest(v2)
    assert rollups(catalogue) != before_rollups
    assert drift_points(catalogue) != before_drift
    assert catalogue.use_analysis("r1", "") == {"run": "r1", "before": "thr-0.8", "current": ""}
    catalogue.use_analysis("r2", "")
    assert rollups(catalogue) == before_rollups
    assert drift_points(catalogue) == before_drift
    assert catalogue.run("r1").analysis == ""


def test_withdrawing_and_restoring_a_file_returns_counts_figures_and_drift_exactly(catalogue, make_file):
    good = make_file("good.parquet", thresholded({"r1": 30}, 0.7))
    wrong = make_file("wrong.parquet", thresholded({"r9": 30}, 0.7, seed=9, start=T0 + dt.timedelta(hours=2)))
    catalogue.ingest([good, wrong])
    before = (catalogue.counts(), catalogue.figures().to_dict("list"), drift_points(catalogue), rollups(catalogue))
    taken = catalogue.withdraw(file=wrong, reason="wrong apparatus in the export", author="ada")
    assert (taken["reason"], taken["author"], taken["runs"]) == ("wrong apparatus in the export", "ada", [{"run": "r9", "apparatus": "bench-a", "analysis": ""}])
    assert catalogue.counts()["shots"] == 30
    assert set(catalogue.select("shot >= 0")["run"]) == {"r1"}
    assert set(catalogue.figures()["run"]) == {"r1"}
    assert drift_points(catalogue)[0][3:] == (1, 30)
    # Visible in the history, never deleted.
    assert [a["withdrawn"] for a in catalogue.analyses("r9")] == [True]
    [restored] = catalogue.restore(file=wrong, author="ada")
    assert restored["restored_by"] == "ada" and restored["restored_at"] is not None
    after = (catalogue.counts(), catalogue.figures().to_dict("list"), drift_points(catalogue), rollups(catalogue))
    assert after == before


def test_withdrawing_a_run_takes_every_version_out_and_restore_brings_the_current_back(two_versions):
    catalogue, v1, v2 = two_versions
    catalogue.ingest([v1, v2])
    catalogue.use_analysis("r2", "")
    before = rollups(catalogue)
    catalogue.withdraw(run="r2", reason="lattice beam was misaligned")
    assert catalogue.runs()["run"].tolist() == ["r1"]
    with pytest.raises(runlog.NotFoundError, match="withdrawn"):
        catalogue.run("r2")
    catalogue.restore(run="r2")
    assert catalogue.run("r2").analysis == ""
    assert rollups(catalogue) == before


def test_a_file_sharing_a_run_version_with_another_file_is_not_withdrawn_alone(catalogue, make_file):
    first = make_file("a.parquet", thresholded({"r1": 10}, 0.7))
    second = make_file("b.parquet", shot_table({"r1": 10}, first_shot=10, sites=SITES))
    catalogue.ingest([first, second])
    with pytest.raises(runlog.StoreError, match="also holds shots of other files"):
        catalogue.withdraw(file=second, reason="broken")
    assert catalogue.counts()["shots"] == 20


def test_every_derive_adds_an_immutable_record_and_the_newest_is_in_force(catalogue, make_file):
    catalogue.ingest(make_file("a.parquet", thresholded({"r1": 50}, 0.7)))
    catalogue.derive("r1", "counting", interval="clopper-pearson")
    history = catalogue.figure_history("r1")
    survival = [h for h in history if h["figure"] == "survival"]
    assert [h["options"] for h in survival] == [{"interval": "clopper-pearson"}, {"interval": "wilson"}]
    assert [h["in_force"] for h in survival] == [True, False]
    assert [h["binomial_method"] for h in survival] == ["clopper-pearson", "wilson"]
    assert [h["method"] for h in survival] == ["shot-ratio", "shot-ratio"]
    assert survival[0]["runlog_version"] == runlog.__version__ and survival[0]["analysis"] == ""
    assert survival[0]["shots"] == 50 and survival[0]["kind"] == "counting"
    assert catalogue.run("r1").figures["survival"]["binomial_method"] == "clopper-pearson"
    # One version: the impact report sets the figure in force against the record before it.
    entry = next(e for e in catalogue.impact("r1") if e["figure"] == "survival")
    assert entry["old"]["record"] == survival[1]["record"] and entry["new"]["record"] == survival[0]["record"]
    assert entry["sigma"] == 0.0  # same counts, same stderr: only the pooled interval moved


def test_show_json_gives_analysis_analyses_and_figure_history(two_versions, capsys):
    import json

    catalogue, v1, v2 = two_versions
    catalogue.ingest([v1, v2])
    code, out, _ = run_main(capsys, "--db", catalogue.url, "show", "r1", "--history", "--json")
    assert code == 0
    shown = json.loads(out)
    assert shown["analysis"] == "thr-0.8"
    assert [a["analysis"] for a in shown["analyses"]] == ["", "thr-0.8"]
    assert {h["analysis"] for h in shown["figure_history"]} == {"thr-0.8"}
    code, out, _ = run_main(capsys, "--db", catalogue.url, "impact", "r1", "--json")
    assert code == 0 and {e["figure"] for e in json.loads(out)} >= {"fill_fraction", "survival", "loss"}
    code, out, _ = run_main(capsys, "--db", catalogue.url, "use-analysis", "r1", "")
    assert code == 0 and catalogue.run("r1").analysis == ""
    code, _, err = run_main(capsys, "--db", catalogue.url, "use-analysis", "r1", "nope")
    assert code == 1 and err.startswith("runlog: error: ") and "nope" in err


def test_an_existing_catalogue_upgrades_with_its_data_as_the_first_version(db_url, make_file):
    from sqlalchemy import func

    from runlog.store import migrate
    from runlog.store.engine import current_revision
    from runlog.store.partitions import is_partitioned
    from runlog.store.schema import FigureRecord, FigureRow

    v1 = make_file("v1.parquet", thresholded({"r1": 20, "r2": 20}, 0.7))
    with runlog.open(db_url) as catalogue:
        catalogue.ingest(v1)
        before = catalogue.run("r1").as_dict()
        engine = catalogue.engine
        migrate.downgrade(engine, "0004")  # a catalogue of the revision before analysis versions
        assert current_revision(engine) == "0004"
        migrate.upgrade(engine)
        after = catalogue.run("r1").as_dict()
        assert after["figures"] == before["figures"]
        assert {k: v for k, v in after.items() if k != "analyses"} == {k: v for k, v in before.items() if k != "analyses"}
        [version] = after["analyses"]
        assert (version["analysis"], version["current"], version["withdrawn"], version["shots"]) == ("", True, False, 20)
        assert [f["file"] for f in version["files"]] == [str(v1)]
        with engine.connect() as connection:
            assert connection.execute(select(func.count()).select_from(FigureRecord)).scalar_one() == connection.execute(select(func.count()).select_from(FigureRow)).scalar_one() > 0
            assert is_partitioned(connection) == (engine.dialect.name == "postgresql")
        # And the upgraded catalogue takes a new version.
        assert catalogue.ingest(make_file("v2.parquet", thresholded({"r1": 20, "r2": 20}, 0.8, analysis="b")))[0].status == "ingested"
        assert [a["analysis"] for a in catalogue.analyses("r1")] == ["", "b"]


def test_withdrawing_a_file_never_ingested_says_so_in_one_line(catalogue, tmp_path):
    with pytest.raises(NotFoundError) as caught:
        catalogue.withdraw(file=tmp_path / "never.parquet", reason="typo")
    assert str(caught.value) == f"no ingested file '{tmp_path / 'never.parquet'}' (the ingest log holds no file of that name or content: give the path it was ingested from)"
