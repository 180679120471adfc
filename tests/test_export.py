"""Exports as Frictionless Data Packages: validity (checked with the frictionless library,
the reference implementation of the open standard), deterministic data files, provenance,
re-running a saved spec, and never leaving half a package behind. SQLite and PostgreSQL.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import stat

import numpy as np
import pyarrow.parquet as pq
import pytest
from sqlalchemy.engine import make_url

import runlog
from conftest import T0, shot_table, write_table
from runlog.errors import ConfigError, FilterError
from runlog.export import export, export_spec
from runlog.store.schema import SCHEMA_REVISION

PASSWORD = "s3cret-pw"


@pytest.fixture
def filled(db_url, tmp_path):
    """A catalogue with two files (three runs); on PostgreSQL opened with a password in
    its URL (the test server trusts local users, so any password is accepted)."""
    url = db_url if db_url.startswith("sqlite") else make_url(db_url).set(password=PASSWORD).render_as_string(hide_password=False)
    with runlog.open(url) as catalogue:
        first = write_table(tmp_path / "day1.parquet", shot_table({"r1": 12, "r2": 8}, seed=1))
        second = write_table(tmp_path / "day2.parquet", shot_table({"r3": 10}, seed=2, start=T0 + dt.timedelta(days=1), apparatus="bench-b"))
        assert [r.status for r in catalogue.ingest([first, second])] == ["ingested", "ingested"]
        yield catalogue


def _sha256(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _validate(folder, format: str):
    import frictionless

    # frictionless reads Parquet through pyarrow, not through its byte stream, so it
    # cannot count the bytes or hash a Parquet file; those are checked below instead.
    skip = ["byte-count", "hash-count"] if format == "parquet" else []
    return frictionless.validate(str(folder / "datapackage.json"), skip_errors=skip)


@pytest.mark.parametrize("format", ["parquet", "csv"])
def test_the_package_is_a_valid_data_package(filled, tmp_path, format):
    out = tmp_path / f"package-{format}"
    result = export(filled, "wait >= 30 and apparatus = 'bench-a'", out, format=format, with_occupancy=True, title="Waits of 30 us and more")
    assert (result.shots, result.runs) == (14, 2)  # wait = 10 * shot: r1 shots 3..11, r2 shots 3..7
    report = _validate(out, format)
    assert report.valid, report.flatten(["rowNumber", "fieldName", "type", "note"])
    manifest = json.loads((out / "datapackage.json").read_text())
    assert [r["name"] for r in manifest["resources"]] == ["shots", "runs", "figures", "images"]
    for resource in manifest["resources"]:
        path = out / resource["path"]
        assert resource["bytes"] == path.stat().st_size
        assert resource["hash"] == f"sha256:{_sha256(path)}" == result.data[resource["path"]]
    fields = {f["name"]: f for f in manifest["resources"][0]["schema"]["fields"]}
    assert [f for f in fields if not f.startswith("occ.")] == ["run", "apparatus", "sequence", "shot", "time", "p.beam", "p.depth", "p.wait", "m.atom_number"]
    assert (fields["p.wait"]["type"], fields["p.wait"]["unit"]) == ("number", "us")
    assert (fields["p.depth"]["unit"], fields["time"]["type"], fields["shot"]["type"]) == ("uK", "datetime", "integer")
    assert "unit" not in fields["m.atom_number"]


@pytest.mark.parametrize("mask", [0o022, 0o002, 0o077])
def test_the_package_folder_and_files_follow_the_umask(filled, tmp_path, mask):
    # A private temporary folder (700) was renamed into place: the group could not read it.
    previous = os.umask(mask)
    try:
        out = tmp_path / "shared" / "package"
        export(filled, "apparatus = 'bench-a'", out)
    finally:
        os.umask(previous)
    assert stat.S_IMODE(out.stat().st_mode) == 0o777 & ~mask
    for path in out.iterdir():
        assert stat.S_IMODE(path.stat().st_mode) == 0o666 & ~mask, path.name


def test_csv_hashes_are_checked_by_the_validator(filled, tmp_path):
    out = tmp_path / "package"
    export(filled, "run = 'r2'", out, format="csv")
    shots = out / "shots.csv"
    shots.write_bytes(shots.read_bytes().replace(b"bench-a", b"bench-A", 1))
    report = _validate(out, "csv")
    assert not report.valid
    assert "hash-count" in {error.type for task in report.tasks for error in task.errors}


@pytest.mark.parametrize("format", ["parquet", "csv"])
def test_data_files_are_byte_identical_for_the_same_filter(filled, tmp_path, format):
    first = export(filled, "shot < 9", tmp_path / "first", format=format)
    second = export(filled, "shot < 9", tmp_path / "second", format=format)
    assert first.data == second.data
    for name in first.data:
        assert (tmp_path / "first" / name).read_bytes() == (tmp_path / "second" / name).read_bytes()
    assert (tmp_path / "first" / "README.md").read_text() == (tmp_path / "second" / "README.md").read_text()
    manifests = [json.loads((tmp_path / folder / "datapackage.json").read_text()) for folder in ("first", "second")]
    for manifest in manifests:
        manifest.pop("created")
    assert manifests[0] == manifests[1]


def test_provenance(filled, tmp_path):
    out = tmp_path / "package"
    export(filled, "wait < 50", out)
    manifest = json.loads((out / "datapackage.json").read_text())
    created = dt.datetime.fromisoformat(manifest["created"])
    assert abs(dt.datetime.now(dt.timezone.utc) - created) < dt.timedelta(minutes=5)
    provenance = manifest["provenance"]
    assert provenance["filter"] == "wait < 50"
    assert provenance["runlog_version"] == runlog.__version__
    assert provenance["schema_revision"] == SCHEMA_REVISION
    assert provenance["catalogue"] == filled.url
    assert PASSWORD not in (out / "datapackage.json").read_text()
    if filled.engine.dialect.name == "postgresql":
        assert ":***@" in provenance["catalogue"]
    assert provenance["counts"] == {"shots": 15, "runs": 3, "figures": 9}
    files = {entry["file"].rsplit("/", 1)[-1]: entry for entry in provenance["source_files"]}
    assert set(files) == {"day1.parquet", "day2.parquet"}
    assert files["day1.parquet"]["sha256"] == _sha256(tmp_path / "day1.parquet")
    assert files["day2.parquet"]["sha256"] == _sha256(tmp_path / "day2.parquet")
    assert files["day1.parquet"]["runs"] == ["r1", "r2"]
    only_second = export(filled, "apparatus = 'bench-b'", tmp_path / "other")
    assert only_second.runs == 1
    provenance = json.loads((tmp_path / "other" / "datapackage.json").read_text())["provenance"]
    assert [entry["sha256"] for entry in provenance["source_files"]] == [_sha256(tmp_path / "day2.parquet")]


def test_tables_match_the_catalogue(filled, tmp_path):
    out = tmp_path / "package"
    export(filled, "run in ('r1', 'r3') and shot >= 2", out, with_occupancy=True)
    shots = pq.read_table(out / "shots.parquet").to_pandas()
    assert list(zip(shots["apparatus"], shots["run"]))[:1] == [("bench-a", "r1")]
    assert len(shots) == 10 + 8
    for (apparatus, run), rows in shots.groupby(["apparatus", "run"]):
        expected = filled.shots(run, apparatus=apparatus).query("shot >= 2").reset_index(drop=True)
        assert list(rows["shot"]) == list(expected["shot"])
        assert np.array_equal(rows["p.wait"].to_numpy(), expected["p.wait"].to_numpy())
        assert np.array_equal(rows["m.atom_number"].to_numpy(), expected["m.atom_number"].to_numpy())
        # Occupancy hex decodes to the catalogue's site occupancy.
        loading = filled.occupancy(run, apparatus=apparatus)[2:]
        decoded = np.array([np.unpackbits(np.frombuffer(bytes.fromhex(h), np.uint8), count=loading.shape[1]) for h in rows["occ.load"]], dtype=bool)
        assert np.array_equal(decoded, loading)
    runs = pq.read_table(out / "runs.parquet").to_pandas()
    assert list(runs["run"]) == ["r1", "r3"]
    assert list(runs["shots"]) == [12, 10] and list(runs["shots_exported"]) == [10, 8]
    figures = pq.read_table(out / "figures.parquet").to_pandas()
    stored = filled.figures(runs=["r1"]).set_index("name")
    mine = figures[figures["run"] == "r1"].set_index("figure")
    assert list(mine.index) == ["fill_fraction", "loss", "survival"]
    for name in mine.index:
        assert mine.loc[name, "value"] == stored.loc[name, "value"]
        assert (mine.loc[name, "ci_low"], mine.loc[name, "ci_high"], mine.loc[name, "method"]) == (stored.loc[name, "ci_low"], stored.loc[name, "ci_high"], stored.loc[name, "method"])
    images = pq.read_table(out / "images.parquet").to_pandas()
    assert list(images["image"]) == ["load", "survive", "load", "survive"]
    assert set(images["sites"]) == {16}
    readme = (out / "README.md").read_text()
    assert "- 18 shots in 2 runs on 2 apparatus (bench-a, bench-b)" in readme
    assert "- from 2026-03-02T09:00:04+00:00 to 2026-03-03T09:00:18+00:00 (lab days 2026-03-02 to 2026-03-03, UTC)" in readme
    fill = filled.figures(runs=["r1", "r3"], names=["fill_fraction"])
    assert f"| fill_fraction |  | 2 | {np.median(fill['value']):.4g} |" in readme


def test_spec_re_run_reports_same_then_changed(filled, tmp_path):
    out = tmp_path / "package"
    export(filled, "apparatus = 'bench-a' and wait >= 50", out, format="csv")
    again = export_spec(filled, out / "export.toml")
    assert again.same is True and again.changed == ()
    assert again.out == out and again.previous == again.data
    # More shots of run r2 arrive: the data differ and the spec says which files.
    filled.ingest([write_table(tmp_path / "day1b.parquet", shot_table({"r2": 4}, seed=5, first_shot=8, start=T0 + dt.timedelta(hours=1)))])
    changed = export_spec(filled, out / "export.toml")
    assert changed.same is False
    assert changed.changed == ("figures.csv", "runs.csv", "shots.csv")
    assert changed.shots == again.shots + 4
    assert export_spec(filled, out / "export.toml").same is True


def test_spec_errors(filled, tmp_path):
    spec = tmp_path / "export.toml"
    spec.write_text('where = "shot >= 0"\nformat = "parquet"\ncolour = "blue"\n')
    with pytest.raises(ConfigError) as caught:
        export_spec(filled, spec)
    assert str(caught.value) == f"{spec}: unknown key(s) colour in the export spec"
    spec.write_text('format = "parquet"\n')
    with pytest.raises(ConfigError) as caught:
        export_spec(filled, spec)
    assert str(caught.value) == f"{spec}: the export spec needs 'where' (text)"


def test_refuses_to_overwrite_and_never_leaves_half_a_package(filled, tmp_path, monkeypatch):
    out = tmp_path / "package"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    with pytest.raises(FileExistsError):
        export(filled, "shot >= 0", out)
    assert [p.name for p in out.iterdir()] == ["notes.txt"]
    with pytest.raises(FilterError):
        export(filled, "shot >= ", tmp_path / "never")
    assert not (tmp_path / "never").exists()
    with pytest.raises(FilterError):
        export(filled, "no_such_name > 1", tmp_path / "new" / "deeper" / "never")
    assert not (tmp_path / "new").exists()  # no folder made for a refused export is left

    import runlog.export as module

    real_write = module._write
    calls = []

    def failing(table, path, format):
        calls.append(path.name)
        if len(calls) == 2:
            raise OSError("disk full")
        real_write(table, path, format)

    (out / "notes.txt").unlink()
    export(filled, "shot >= 1", out)
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    monkeypatch.setattr(module, "_write", failing)
    with pytest.raises(OSError):
        export(filled, "shot >= 0", out, overwrite=True)
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before  # the old package, untouched
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".package")]
    monkeypatch.setattr(module, "_write", real_write)
    result = export(filled, "shot >= 0", out, overwrite=True)
    assert sorted(p.name for p in out.iterdir()) == ["README.md", "datapackage.json", "export.toml", "figures.parquet", "runs.parquet", "shots.parquet"]
    assert result.shots == 30
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".package")]


def _tree(folder):
    return {str(p.relative_to(folder)): (p.read_bytes() if p.is_file() else None) for p in sorted(folder.rglob("*"))}


def test_overwrite_refuses_a_folder_that_is_not_an_export(filled, tmp_path):
    thesis = tmp_path / "thesis"
    (thesis / "figures").mkdir(parents=True)
    (thesis / "chapter3.tex").write_text("\\chapter{Loading}")
    (thesis / "figures" / "fill.pdf").write_bytes(b"%PDF-1.7")
    before = _tree(thesis)
    with pytest.raises(FileExistsError) as caught:
        export(filled, "shot >= 0", thesis, overwrite=True)
    assert str(caught.value) == f"{thesis}: holds files that are not a runlog export (no runlog datapackage.json): nothing was replaced; choose another folder"
    assert _tree(thesis) == before
    # A hand-written manifest of another tool is not a runlog export either.
    (thesis / "datapackage.json").write_text(json.dumps({"name": "chapter-data", "resources": []}))
    with pytest.raises(FileExistsError):
        export(filled, "shot >= 0", thesis, overwrite=True)
    assert (thesis / "chapter3.tex").exists() and (thesis / "figures" / "fill.pdf").exists()
    a_file = tmp_path / "single.txt"
    a_file.write_text("keep")
    with pytest.raises(FileExistsError) as caught:
        export(filled, "shot >= 0", a_file, overwrite=True)
    assert str(caught.value) == f"{a_file}: is a file, not an export folder: nothing was replaced"
    assert a_file.read_text() == "keep"
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]


def test_overwrite_refuses_an_export_folder_holding_other_files(filled, tmp_path):
    out = tmp_path / "package"
    export(filled, "shot >= 0", out)
    (out / "analysis.ipynb").write_text("{}")
    before = _tree(out)
    with pytest.raises(FileExistsError) as caught:
        export(filled, "shot >= 1", out, overwrite=True)
    assert str(caught.value) == f"{out}: holds 'analysis.ipynb', which the runlog export there did not write: nothing was replaced; move it or choose another folder"
    assert _tree(out) == before
    with pytest.raises(FileExistsError):
        export_spec(filled, out / "export.toml")
    assert _tree(out) == before
    (out / "analysis.ipynb").unlink()
    assert export(filled, "shot >= 1", out, overwrite=True).shots == 27


def test_overwrite_never_replaces_the_catalogue_folder(filled, tmp_path, db_url):
    from runlog.store.engine import sqlite_path

    path = sqlite_path(filled.engine.url)
    if path is None:  # PostgreSQL: the catalogue is no file; the folder is still not an export
        with pytest.raises(FileExistsError):
            export(filled, "shot >= 0", tmp_path, overwrite=True)
        assert (tmp_path / "day1.parquet").exists()
        return
    for folder in (path.parent, path.parent.parent):
        with pytest.raises(FileExistsError) as caught:
            export(filled, "shot >= 0", folder, overwrite=True)
        assert str(caught.value) == f"{folder}: holds the catalogue catalogue.sqlite: an export never replaces it; choose another folder"
        assert path.exists()
    assert len(filled.runs()) == 3 and (tmp_path / "day1.parquet").exists()


def test_cli_overwrite_refusal_is_one_line(filled, tmp_path, capsys):
    from conftest import run_main

    thesis = tmp_path / "thesis"
    thesis.mkdir()
    (thesis / "chapter3.tex").write_text("text")
    url = filled.engine.url.render_as_string(hide_password=False)
    code, out, err = run_main(capsys, "export", "--where", "shot >= 0", "--out", str(thesis), "--overwrite", "--db", url)
    assert code != 0 and out == ""
    assert err.strip().count("\n") == 0 and "not a runlog export" in err and "Traceback" not in err
    assert (thesis / "chapter3.tex").read_text() == "text"


def test_bad_arguments(filled, tmp_path):
    with pytest.raises(ValueError) as caught:
        export(filled, "shot >= 0", tmp_path / "x", format="xlsx")
    assert str(caught.value) == "unknown export format 'xlsx': use parquet or csv"
    with pytest.raises(ValueError) as caught:
        export(filled, " ", tmp_path / "x")
    assert str(caught.value) == "an export needs a filter; 'shot >= 0' selects every shot"


def test_cli_shots_export_and_plot(db_url, tmp_path, make_file):
    from click.testing import CliRunner

    from conftest import shot_table
    from runlog.cli import cli

    runner = CliRunner()
    assert runner.invoke(cli, ["--db", db_url, "ingest", str(make_file(table=shot_table({"r1": 6, "r2": 4})))]).exit_code == 0
    listed = runner.invoke(cli, ["--db", db_url, "shots", "--where", "run = 'r2' and wait >= 10 us", "--csv"])
    assert listed.exit_code == 0, listed.output
    assert listed.output.splitlines()[0].startswith("run,") and len(listed.output.splitlines()) == 1 + 3
    out = tmp_path / "package"
    done = runner.invoke(cli, ["--db", db_url, "export", "--where", "run = 'r1'", "--out", str(out), "--json"])
    assert done.exit_code == 0, done.output
    assert (out / "datapackage.json").exists()
    again = runner.invoke(cli, ["--db", db_url, "export", "--spec", str(out / "export.toml")])
    assert again.exit_code == 0 and "data hash the same as before" in again.output
    refused = runner.invoke(cli, ["--db", db_url, "export", "--where", "run = 'r1'", "--out", str(out)])
    assert refused.exit_code == 1 and "already holds files" in (refused.output + str(refused.exception))
    hostile = runner.invoke(cli, ["--db", db_url, "shots", "--where", "run = 'r1'; drop table shots"])
    assert hostile.exit_code == 1
    figure = tmp_path / "run.svg"
    assert runner.invoke(cli, ["--db", db_url, "plot", "run", "r1", "--out", str(figure)]).exit_code == 0
    assert figure.read_text().lstrip().startswith("<svg")
