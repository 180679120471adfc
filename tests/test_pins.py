"""Pinned selections: a pin made before a re-analysis exports the old data byte for byte
after newer versions landed and became current; a fresh export by filter differs and
says so; the pin lists what the newer analyses would change."""

from __future__ import annotations

import datetime as dt
import json
import math

import numpy as np
import pyarrow.parquet as pq
import pytest
from conftest import T0, run_main
from test_analyses import counted, thresholded

from runlog.errors import NotFoundError, StoreError
from runlog.pins import pack_ids, unpack_ids

WHERE = "sequence = 'loading' and shot < 50"


def data_hashes(result) -> dict[str, str]:
    return dict(result.data)


@pytest.fixture
def pinned_before_v2(catalogue, make_file, tmp_path):
    runs = {"r1": 60, "r2": 40}
    v1 = make_file("v1.parquet", thresholded(runs, 0.65))
    v2 = make_file("v2.parquet", thresholded(runs, 0.8, analysis="thr-0.8"))
    catalogue.ingest(v1)
    catalogue.derive("r1", "counting")  # a second record of the counting figures of r1
    made = catalogue.pin("fig3", WHERE, author="ada")
    first = catalogue.export(None, tmp_path / "fig3-then", pin="fig3")
    by_filter = catalogue.export(WHERE, tmp_path / "filter-then")
    return catalogue, v1, v2, made, first, by_filter


def test_shot_ids_pack_and_unpack_exactly():
    ids = [5, 6, 7, 8, 100, 101, 3, 2_000_000_000_000]
    assert unpack_ids(pack_ids(ids)).tolist() == sorted(ids)
    assert unpack_ids(pack_ids([])).tolist() == []


def test_a_pin_freezes_shots_versions_and_figure_records(pinned_before_v2):
    catalogue, _, _, made, first, by_filter = pinned_before_v2
    assert (made["name"], made["where"], made["author"], made["shots"], made["runs"]) == ("fig3", WHERE, "ada", 90, 2)
    assert [(v["run"], v["analysis"], v["shots"]) for v in made["versions"]] == [("r1", "", 50), ("r2", "", 40)]
    assert made["changes"] == []
    records = {e["record"] for e in catalogue.figure_history("r1") if e["in_force"]}
    assert set(made["versions"][0]["figure_records"]) == records
    # Before anything moved, the pin and the filter export the same data files.
    assert first.data == by_filter.data
    assert (first.shots, first.runs) == (90, 2)


def test_the_pin_exports_byte_identical_data_after_a_new_version_became_current(pinned_before_v2, tmp_path):
    catalogue, v1, v2, _, first, by_filter = pinned_before_v2
    catalogue.ingest(v2)
    assert catalogue.run("r1").analysis == "thr-0.8"
    catalogue.annotate("tagged later", run="r1")
    again = catalogue.export(None, tmp_path / "fig3-now", pin="fig3")
    assert again.data == first.data
    for name in first.data:
        assert (tmp_path / "fig3-then" / name).read_bytes() == (tmp_path / "fig3-now" / name).read_bytes()
    # The runs table names the pinned versions, and the manifest records them.
    runs = pq.read_table(tmp_path / "fig3-now" / "runs.parquet").to_pylist()
    assert [(r["run"], r["analysis"]) for r in runs] == [("r1", ""), ("r2", "")]
    manifest = json.loads((tmp_path / "fig3-now" / "datapackage.json").read_text())
    provenance = manifest["provenance"]
    assert provenance["pin"]["name"] == "fig3" and provenance["pin"]["filter"] == WHERE
    assert provenance["analysis_versions"] == [{"run": "r1", "apparatus": "bench-a", "analysis": ""}, {"run": "r2", "apparatus": "bench-a", "analysis": ""}]
    assert [f["file"] for f in provenance["source_files"]] == [str(v1)]
    # What the newer analysis would change, with numbers agreeing with numpy on the files.
    moved = {(c["run"], c["figure"]): c for c in provenance["pin"]["changes"]}
    old, new = counted(v1, "r1"), counted(v2, "r1")
    entry = moved[("r1", "survival")]
    assert (entry["old"]["analysis"], entry["new"]["analysis"]) == ("", "thr-0.8")
    assert entry["old"]["value"] == pytest.approx(old["survival"][0], rel=1e-12)
    assert entry["new"]["value"] == pytest.approx(new["survival"][0], rel=1e-12)
    assert entry["sigma"] == pytest.approx((new["survival"][0] - old["survival"][0]) / math.hypot(old["survival"][1], new["survival"][1]), rel=1e-9)
    assert catalogue.pins()[0]["changes"] == provenance["pin"]["changes"]
    assert "Newer analyses in the catalogue would change" in (tmp_path / "fig3-now" / "README.md").read_text()
    # The impact report names the pin holding the old version.
    assert {e["figure"]: e["pins"] for e in catalogue.impact("r1")}["survival"] == ["fig3"]


def test_a_fresh_export_by_filter_after_v2_differs_and_says_so(pinned_before_v2, tmp_path):
    catalogue, _, v2, _, first, by_filter = pinned_before_v2
    catalogue.ingest(v2)
    rerun = catalogue.export_again(tmp_path / "filter-then" / "export.toml")
    assert rerun.same is False
    assert set(rerun.changed) >= {"runs.parquet", "figures.parquet"}
    runs = pq.read_table(tmp_path / "filter-then" / "runs.parquet").to_pylist()
    assert {r["analysis"] for r in runs} == {"thr-0.8"}
    # ... and says which pins hold the versions it no longer exports.
    held = [{"pin": "fig3", "run": r, "apparatus": "bench-a", "pinned_analysis": "", "exported_analysis": "thr-0.8"} for r in ("r1", "r2")]
    assert list(rerun.other_versions_pinned) == held
    assert json.loads((tmp_path / "filter-then" / "datapackage.json").read_text())["provenance"]["other_versions_pinned"] == held
    assert "the pin(s) fig3 hold other versions of 2 of them" in (tmp_path / "filter-then" / "README.md").read_text()
    assert not by_filter.other_versions_pinned  # before v2 the filter exported the pinned versions
    # The pin's own spec re-runs the pin and hashes the same.
    pinned = catalogue.export_again(tmp_path / "fig3-then" / "export.toml")
    assert pinned.same is True and pinned.pin == "fig3"


def test_pins_survive_withdrawal_and_switching_back(pinned_before_v2, tmp_path):
    catalogue, v1, v2, _, first, _ = pinned_before_v2
    catalogue.ingest(v2)
    catalogue.withdraw(run="r2", reason="broken export", author="ada")
    entries = [c for c in catalogue.pins()[0]["changes"] if c["run"] == "r2"]
    assert entries and all(c["withdrawn"] and c["new"] is None for c in entries)
    assert catalogue.pins()[0]["withdrawn_since"] == [{"run": "r2", "apparatus": "bench-a", "analysis": ""}]
    again = catalogue.export(None, tmp_path / "after-withdrawal", pin="fig3")
    assert again.data == first.data
    manifest = json.loads((tmp_path / "after-withdrawal" / "datapackage.json").read_text())
    assert manifest["provenance"]["pin"]["withdrawn_since"] == [{"run": "r2", "apparatus": "bench-a", "analysis": ""}]
    assert "withdrawn since the pin: bench-a/r2" in (tmp_path / "after-withdrawal" / "README.md").read_text()
    catalogue.restore(run="r2")
    catalogue.use_analysis("r1", "")
    catalogue.use_analysis("r2", "")
    assert catalogue.pins()[0]["changes"] == []


def test_pin_refusals(pinned_before_v2, tmp_path):
    catalogue = pinned_before_v2[0]
    with pytest.raises(StoreError, match="a pin named 'fig3' exists already"):
        catalogue.pin("fig3", "shot >= 0")
    with pytest.raises(StoreError, match="the filter selects no shots"):
        catalogue.pin("empty", "shot > 100000")
    with pytest.raises(NotFoundError, match="fig4"):
        catalogue.export(None, tmp_path / "x", pin="fig4")
    with pytest.raises(ValueError, match="not both"):
        catalogue.export("shot >= 0", tmp_path / "y", pin="fig3")


def test_pin_commands(catalogue, make_file, tmp_path, capsys):
    catalogue.ingest(make_file("v1.parquet", thresholded({"r1": 20}, 0.65)))
    url = catalogue.url
    code, out, err = run_main(capsys, "--db", url, "pin", "thesis-4", "--where", "shot < 10", "--json")
    assert code == 0, err
    assert json.loads(out)["shots"] == 10
    code, out, err = run_main(capsys, "--db", url, "pins")
    assert code == 0 and "thesis-4: 10 shots of 1 runs" in out
    catalogue.ingest(make_file("v2.parquet", thresholded({"r1": 20}, 0.8, analysis="b")))
    code, out, err = run_main(capsys, "--db", url, "pins", "--json")
    assert {c["figure"] for c in json.loads(out)[0]["changes"]} >= {"fill_fraction", "survival"}
    code, out, err = run_main(capsys, "--db", url, "export", "--pin", "thesis-4", "--out", str(tmp_path / "pkg"))
    assert code == 0, err
    assert "10 shots of 1 runs" in out and "newer analyses would change" in out
    code, out, err = run_main(capsys, "--db", url, "export", "--pin", "nope", "--out", str(tmp_path / "pkg2"))
    assert code != 0 and "nope" in err and "Traceback" not in err


def _pooled_survival(paths_and_runs) -> tuple[int, int]:
    """Survived / loaded sites over the given (file, run) pairs, by numpy on the files."""
    kept = loaded = 0
    for path, run in paths_and_runs:
        rows = pq.read_table(path).to_pandas()
        rows = rows[rows["run"] == run]
        load = np.array([np.asarray(v, bool) for v in rows["occ.load"]])
        survive = np.array([np.asarray(v, bool) for v in rows["occ.survive"]])
        kept += int((load & survive).sum())
        loaded += int(load.sum())
    return kept, loaded


def test_a_day_re_analysed_with_one_file_retracted_and_a_pin_from_before(catalogue, make_file, tmp_path):
    early = make_file("early.parquet", thresholded({"a1": 50, "a2": 40}, 0.65))
    late = make_file("late.parquet", thresholded({"a3": 30}, 0.65, seed=5, start=T0 + dt.timedelta(hours=3)))
    catalogue.ingest([early, late])
    catalogue.pin("chapter-2", "shot >= 0")
    before = catalogue.export(None, tmp_path / "before", pin="chapter-2")
    rethreshold = make_file("early-thr.parquet", thresholded({"a1": 50, "a2": 40}, 0.8, analysis="thr-0.8"))
    catalogue.ingest(rethreshold)
    catalogue.withdraw(file=late, reason="wrong apparatus", author="ada")
    # Every version is held; the current ones drive figures and drift.
    assert [(a["analysis"], a["current"]) for a in catalogue.analyses("a1")] == [("", False), ("thr-0.8", True)]
    assert [(a["analysis"], a["withdrawn"]) for a in catalogue.analyses("a3")] == [("", True)]
    kept, loaded = _pooled_survival([(rethreshold, "a1"), (rethreshold, "a2")])
    [point] = catalogue.drift("survival", record_alarms=False).points
    assert (point.successes, point.trials, point.runs) == (kept, loaded, 2)
    assert point.value == pytest.approx(kept / loaded, rel=1e-12)
    # The pin re-exports the old data byte for byte.
    after = catalogue.export(None, tmp_path / "after", pin="chapter-2")
    assert after.data == before.data and (after.shots, after.runs) == (120, 3)
    # The impact numbers against numpy on the two files.
    old, new = counted(early, "a2"), counted(rethreshold, "a2")
    entry = {e["figure"]: e for e in catalogue.impact("a2")}["fill_fraction"]
    assert (entry["old"]["value"], entry["new"]["value"]) == (pytest.approx(old["fill_fraction"][0], rel=1e-12), pytest.approx(new["fill_fraction"][0], rel=1e-12))
    assert entry["sigma"] == pytest.approx((new["fill_fraction"][0] - old["fill_fraction"][0]) / math.hypot(old["fill_fraction"][1], new["fill_fraction"][1]), rel=1e-9)
    assert entry["pins"] == ["chapter-2"]


@pytest.mark.parametrize("file_format", ["parquet", "csv"])
def test_a_pinned_export_with_occupancy_is_byte_identical_in_either_format(pinned_before_v2, tmp_path, file_format):
    catalogue, v1, v2, _, _, _ = pinned_before_v2
    first = catalogue.export(None, tmp_path / "then", pin="fig3", with_occupancy=True, format=file_format)
    catalogue.ingest(v2)
    again = catalogue.export(None, tmp_path / "now", pin="fig3", with_occupancy=True, format=file_format)
    assert again.data == first.data and f"images.{file_format}" in again.data
    # The occupancy is the pinned version's, not the current one's.
    if file_format == "parquet":
        shots = pq.read_table(tmp_path / "now" / "shots.parquet").to_pandas()
        r1 = shots[shots["run"] == "r1"].sort_values("shot")
        source = pq.read_table(v1).to_pandas()
        source = source[(source["run"] == "r1") & (source["shot"] < 50)].sort_values("shot")
        assert list(r1["occ.load"]) == [np.packbits(np.asarray(v, bool)).tobytes().hex() for v in source["occ.load"]]
