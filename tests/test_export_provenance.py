"""Export provenance names exactly the files that brought the exported shots, per
apparatus (run keys coincide across apparatus), and the package carries run notes."""

from __future__ import annotations

import json

import pyarrow as pa
import pyarrow.parquet as pq

from conftest import shot_table


def _provenance(out):
    return json.loads((out / "datapackage.json").read_text())["provenance"]


def test_coinciding_run_keys_on_two_apparatus(catalogue, make_file, tmp_path):
    east = make_file("east.parquet", runs={"20260302-01": 5}, apparatus="bench-a", seed=1)
    west = make_file("west.parquet", runs={"20260302-01": 5}, apparatus="bench-b", seed=2)
    catalogue.ingest([east, west])
    catalogue.export("apparatus = 'bench-a'", tmp_path / "a")
    sources = _provenance(tmp_path / "a")["source_files"]
    assert [entry["file"] for entry in sources] == [str(east)]
    assert sources[0]["apparatus"] == {"bench-a": ["20260302-01"]}
    catalogue.export("shot >= 0", tmp_path / "both")
    sources = {entry["file"]: entry["apparatus"] for entry in _provenance(tmp_path / "both")["source_files"]}
    assert sources == {str(east): {"bench-a": ["20260302-01"]}, str(west): {"bench-b": ["20260302-01"]}}


def test_one_file_of_two_apparatus_and_a_key_with_a_comma(catalogue, make_file, tmp_path):
    table = pa.concat_tables([shot_table({"run,1": 4}, apparatus="bench-a", seed=3), shot_table({"run,1": 4}, apparatus="bench-b", seed=4)])
    path = make_file("mixed.parquet", table)
    catalogue.ingest(path)
    catalogue.export("apparatus = 'bench-b'", tmp_path / "b")
    [entry] = _provenance(tmp_path / "b")["source_files"]
    assert entry["file"] == str(path) and entry["apparatus"] == {"bench-b": ["run,1"]} and entry["runs"] == ["run,1"]


def test_only_the_files_whose_shots_are_exported(catalogue, make_file, tmp_path):
    first = make_file("first.parquet", runs={"r1": 5}, seed=5)
    second = make_file("second.parquet", runs={"r1": 5}, first_shot=5, seed=6)
    catalogue.ingest([first, second])
    catalogue.export("shot < 5", tmp_path / "early")
    assert [e["file"] for e in _provenance(tmp_path / "early")["source_files"]] == [str(first)]
    catalogue.export("shot >= 3", tmp_path / "late")
    assert [e["file"] for e in _provenance(tmp_path / "late")["source_files"]] == sorted([str(first), str(second)])


def test_run_notes_go_into_the_package(catalogue, make_file, tmp_path):
    table = shot_table({"r1": 3}, seed=7)
    table = table.append_column("notes", pa.array(["realigned the lattice beam, depth checked"] * 3))
    catalogue.ingest(make_file("noted.parquet", table))
    catalogue.export("shot >= 0", tmp_path / "package")
    runs = pq.read_table(tmp_path / "package" / "runs.parquet")
    assert runs.column("notes").to_pylist() == ["realigned the lattice beam, depth checked"]
    manifest = json.loads((tmp_path / "package" / "datapackage.json").read_text())
    runs_resource = next(r for r in manifest["resources"] if r["name"] == "runs")
    assert any(f["name"] == "notes" for f in runs_resource["schema"]["fields"])
