"""Refusals of bad shot-table files, on SQLite and PostgreSQL.

Each bad file must end as ``refused`` with a one-line reason naming the file, the column
and the first bad row (the exact text of ``ContractError.__str__``), leave the catalogue
exactly as it was (every table, not only the counts), be written to the ingest log, and
not stop a good file given in the same call. The rules checked here are those of the
shot-table contract, version 1 (runlog/contract.py); they are runlog's own rules, so the
expected messages come from the contract, not from an outside source.
"""

from __future__ import annotations

import datetime as dt
import tomllib
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import shot_table
from sqlalchemy import func, select

import runlog.ingest
from runlog.config import load_config
from runlog.errors import ConfigError, ContractError
from runlog.store import schema

GOOD_SHOTS = 4


# --- helpers -----------------------------------------------------------------------------


def snapshot(catalogue) -> tuple:
    """Counts, the runs table and the row count of every catalogue table but the ingest log."""
    with catalogue.engine.connect() as connection:
        sizes = {
            table.name: connection.execute(select(func.count()).select_from(table)).scalar_one()
            for table in schema.Base.metadata.sorted_tables
            if table.name != "ingest_log"
        }
    return catalogue.counts(), catalogue.runs().to_dict("records"), sizes


def replace(table: pa.Table, name: str, values: pa.Array | list) -> pa.Table:
    """``table`` with column ``name`` replaced by ``values`` (same position)."""
    array = values if isinstance(values, pa.Array) else pa.array(values)
    return table.set_column(table.schema.get_field_index(name), name, array)


def renamed(table: pa.Table, old: str, new: str) -> pa.Table:
    return table.rename_columns([new if c == old else c for c in table.column_names])


def assert_refused(catalogue, make_file, path: Path, expected: str) -> None:
    """The whole refusal contract for one bad file (see the module docstring)."""
    before = snapshot(catalogue)
    [result] = catalogue.ingest(path)
    assert (result.status, result.reason, result.runs, result.shots) == ("refused", expected, (), 0)
    assert "\n" not in result.reason
    assert snapshot(catalogue) == before
    latest = catalogue.ingest_log(status="refused").iloc[0]
    assert (latest["file"], latest["status"], latest["reason"]) == (str(path), "refused", expected)

    good = make_file(table=shot_table({"good-run": GOOD_SHOTS}, apparatus="bench-good", seed=99))
    results = catalogue.ingest([path, good])
    assert [(r.status, r.reason) for r in results] == [("refused", expected), ("ingested", None)]
    counts_before = before[0]
    assert catalogue.counts() == {
        "apparatus": counts_before["apparatus"] + 1,
        "runs": counts_before["runs"] + 1,
        "shots": counts_before["shots"] + GOOD_SHOTS,
    }
    assert list(catalogue.shots("good-run")["shot"]) == list(range(GOOD_SHOTS))


# --- the kinds of bad file ---------------------------------------------------------------
# Each builder writes its bad file (ingesting good files first when the refusal depends on
# what is stored) and returns the file and the exact reason expected.

Case = Callable[..., tuple[Path, str]]


def truncated(catalogue, make_file, tmp_path, monkeypatch):
    path = make_file("truncated.parquet", runs={"r1": 10})
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    # The reason quotes pyarrow's own first line about the file.
    with pytest.raises(pa.ArrowInvalid) as raised:
        pq.ParquetFile(path)
    return path, f"{path}: not a readable Parquet file ({str(raised.value).strip().splitlines()[0]})"


def not_parquet(catalogue, make_file, tmp_path, monkeypatch):
    path = tmp_path / "notes.parquet"
    path.write_text("run,shot,time\nr1,0,2026-03-02T09:00:00Z\nthis is a text file, not Parquet\n", encoding="utf-8")
    with pytest.raises(pa.ArrowInvalid) as raised:
        pq.ParquetFile(path)
    assert "magic bytes" in str(raised.value)  # the text file got as far as the footer check
    return path, f"{path}: not a readable Parquet file ({str(raised.value).strip().splitlines()[0]})"


def missing(name: str) -> Case:
    def case(catalogue, make_file, tmp_path, monkeypatch):
        path = make_file(f"no-{name}.parquet", shot_table({"r1": 5}).drop_columns([name]))
        return path, f"{path} (column '{name}'): required column is missing"

    case.__name__ = f"missing_{name}"
    return case


def duplicate_shot(catalogue, make_file, tmp_path, monkeypatch):
    table = replace(shot_table({"r1": 10}), "shot", pa.array([0, 1, 2, 3, 4, 5, 6, 2, 8, 9], pa.int64()))
    path = make_file("duplicate.parquet", table)
    return path, f"{path} (column 'shot', row 7): duplicate shot index 2 in run 'r1'"


def duplicate_shot_across_batches(catalogue, make_file, tmp_path, monkeypatch):
    monkeypatch.setattr(runlog.ingest, "BATCH_ROWS", 3)
    # Shot 1 at row 1 (first batch) and again at row 9 (fourth batch); shot 0 again at
    # row 10, so the reason must name the earlier of the two later copies.
    shots = pa.array([0, 1, 2, 3, 4, 5, 6, 7, 8, 1, 0, 11], pa.int64())
    path = make_file("duplicate-batches.parquet", replace(shot_table({"r1": 12}), "shot", shots))
    return path, f"{path} (column 'shot', row 9): duplicate shot index 1 in run 'r1'"


def negative_shot(catalogue, make_file, tmp_path, monkeypatch):
    table = replace(shot_table({"r1": 6}), "shot", pa.array([0, 1, 2, 3, -4, 5], pa.int64()))
    path = make_file("negative.parquet", table)
    return path, f"{path} (column 'shot', row 4): negative shot index -4"


def null_time(catalogue, make_file, tmp_path, monkeypatch):
    table = shot_table({"r1": 8})
    times = table["time"].to_pylist()
    times[6] = None
    path = make_file("null-time.parquet", replace(table, "time", pa.array(times, pa.timestamp("us", tz="UTC"))))
    return path, f"{path} (column 'time', row 6): empty time"


def naive_time(catalogue, make_file, tmp_path, monkeypatch):
    table = shot_table({"r1": 5})
    path = make_file("naive-time.parquet", replace(table, "time", table["time"].cast(pa.timestamp("us"))))
    return path, f"{path} (column 'time', row 0): timestamp has no time zone (write it as UTC or with an offset)"


def text_in_numeric_column(catalogue, make_file, tmp_path, monkeypatch):
    values = ["12.5", "13", "11.25", "n/a", "14"]
    path = make_file("text.parquet", shot_table({"r1": 5}, extra={"m.x": pa.array(values, pa.string())}))
    return path, f"{path} (column 'm.x', row 3): text 'n/a' in a numeric column"


def unequal_occupancy(catalogue, make_file, tmp_path, monkeypatch):
    table = shot_table({"r1": 8}, sites=16)
    lists = table["occ.load"].to_pylist()
    lists[5] = lists[5][:-1]
    path = make_file("occupancy.parquet", replace(table, "occ.load", pa.array(lists, pa.list_(pa.bool_()))))
    return path, f"{path} (column 'occ.load', row 5): occupancy list has 15 sites, earlier shots of run 'r1' have 16"


def zero_rows(catalogue, make_file, tmp_path, monkeypatch):
    path = make_file("empty.parquet", shot_table({"r1": 5}).slice(0, 0))
    return path, f"{path}: file has no rows"


def shots_already_stored(catalogue, make_file, tmp_path, monkeypatch):
    assert catalogue.ingest(make_file("stored.parquet", runs={"r1": 10}))[0].status == "ingested"
    # A new run first, so that the write has already created it when the clash is found.
    path = make_file("overlap.parquet", shot_table({"r2": 3, "r1": 5}, first_shot=7, seed=2))
    return path, f"{path} (column 'shot', row 3): shot index 7 of run 'r1' is already in the catalogue"


def infinite_measurement(catalogue, make_file, tmp_path, monkeypatch):
    table = shot_table({"r1": 9})
    values = table["m.atom_number"].to_pylist()
    values[7] = float("inf")
    path = make_file("infinite.parquet", replace(table, "m.atom_number", pa.array(values, pa.float64())))
    return path, f"{path} (column 'm.atom_number', row 7): infinite value"


def unknown_unit(catalogue, make_file, tmp_path, monkeypatch):
    path = make_file("unit.parquet", renamed(shot_table({"r1": 5}), "p.wait[us]", "p.wait[furlongs_per_blorp]"))
    return path, f"{path} (column 'p.wait[furlongs_per_blorp]'): unknown unit 'furlongs_per_blorp'"


def not_a_contract_column(catalogue, make_file, tmp_path, monkeypatch):
    path = make_file("foo.parquet", shot_table({"r1": 5}, extra={"foo": np.arange(5)}))
    return path, (
        f"{path} (column 'foo'): not a shot-table column: name it p.<name>[unit], m.<name>[unit], "
        "occ.<image> or counts.<image>, or map or ignore it in runlog.toml"
    )


def unit_changes_dimension(catalogue, make_file, tmp_path, monkeypatch):
    assert catalogue.ingest(make_file("micro.parquet", runs={"r1": 5}))[0].status == "ingested"
    path = make_file("volt.parquet", renamed(shot_table({"r2": 5}, seed=3), "p.wait[us]", "p.wait[V]"))
    return path, f"{path} (column 'p.wait[V]'): unit 'V' cannot be converted to the stored unit 'us' of parameter 'wait'"


def sequence_changes_within_run(catalogue, make_file, tmp_path, monkeypatch):
    sequences = ["loading"] * 10
    sequences[8] = "imaging"
    path = make_file("sequence.parquet", replace(shot_table({"r1": 10}), "sequence", sequences))
    return path, f"{path} (column 'sequence', row 8): run 'r1' changes sequence from 'loading' to 'imaging'"


def sequence_differs_from_stored_run(catalogue, make_file, tmp_path, monkeypatch):
    assert catalogue.ingest(make_file("first.parquet", runs={"r1": 5}))[0].status == "ingested"
    path = make_file("second.parquet", shot_table({"r1": 5}, first_shot=5, sequence="imaging"))
    return path, f"{path} (column 'sequence', row 0): run 'r1' is stored with sequence 'loading', this file says 'imaging'"


def occupancy_differs_from_stored_run(catalogue, make_file, tmp_path, monkeypatch):
    # Found in the write transaction after the run row was already updated.
    assert catalogue.ingest(make_file("first.parquet", runs={"r1": 5}, sites=16))[0].status == "ingested"
    path = make_file("second.parquet", shot_table({"r1": 5}, first_shot=5, sites=15))
    return path, f"{path} (column 'occ.load', row 0): occupancy list has 15 sites, stored shots of run 'r1' have 16"


def corrupt_data_page(catalogue, make_file, tmp_path, monkeypatch):
    # The footer is intact, the shot column of the third row group is overwritten: the
    # damage is found while reading, and the reason names where reading stopped.
    monkeypatch.setattr(runlog.ingest, "BATCH_ROWS", 5)
    path = tmp_path / "corrupt.parquet"
    pq.write_table(shot_table({"r1": 40}), path, row_group_size=10)
    column = pq.ParquetFile(path).metadata.row_group(2).column(3)
    assert column.path_in_schema == "shot"
    start = column.dictionary_page_offset or column.data_page_offset
    data = bytearray(path.read_bytes())
    data[start : start + column.total_compressed_size] = b"\xff" * column.total_compressed_size
    path.write_bytes(bytes(data))
    return path, f"{path}: unreadable or truncated Parquet data near row 20"


CASES: list[Case] = [
    truncated,
    not_parquet,
    *(missing(name) for name in ("run", "apparatus", "sequence", "shot", "time")),
    duplicate_shot,
    duplicate_shot_across_batches,
    negative_shot,
    null_time,
    naive_time,
    text_in_numeric_column,
    unequal_occupancy,
    zero_rows,
    shots_already_stored,
    infinite_measurement,
    unknown_unit,
    not_a_contract_column,
    unit_changes_dimension,
    sequence_changes_within_run,
    sequence_differs_from_stored_run,
    occupancy_differs_from_stored_run,
]


@pytest.mark.parametrize("case", CASES, ids=[case.__name__ for case in CASES])
def test_bad_file_is_refused_whole_and_a_good_file_still_goes_in(case, catalogue, make_file, tmp_path, monkeypatch):
    path, expected = case(catalogue, make_file, tmp_path, monkeypatch)
    assert_refused(catalogue, make_file, path, expected)


def test_corrupt_data_page_is_refused_where_reading_stopped(catalogue, make_file, tmp_path, monkeypatch):
    # pyarrow's own words about the damage follow the place; only the place is ours.
    path, prefix = corrupt_data_page(catalogue, make_file, tmp_path, monkeypatch)
    before = snapshot(catalogue)
    [result] = catalogue.ingest(path)
    assert result.status == "refused"
    assert result.reason.startswith(prefix + " (") and result.reason.endswith(")") and "\n" not in result.reason
    assert snapshot(catalogue) == before
    assert catalogue.ingest_log(status="refused").iloc[0]["reason"] == result.reason


# --- refusals found late leave nothing behind --------------------------------------------


def test_duplicate_in_the_last_batch_of_a_long_file_leaves_no_rows(catalogue, make_file, monkeypatch):
    monkeypatch.setattr(runlog.ingest, "BATCH_ROWS", 4)
    assert catalogue.ingest(make_file("earlier.parquet", runs={"r0": 3}))[0].status == "ingested"
    table = shot_table({"r1": 30, "r2": 10}, seed=5)
    shots = table["shot"].to_pylist()
    shots[-1] = 0  # r2's last shot repeats r2's first, in the tenth and last batch
    path = make_file("late.parquet", replace(table, "shot", pa.array(shots, pa.int64())))
    assert_refused(catalogue, make_file, path, f"{path} (column 'shot', row 39): duplicate shot index 0 in run 'r2'")


def test_refusal_during_the_shot_writes_rolls_back_rows_already_appended(catalogue, make_file, monkeypatch):
    # Nothing in a file found good by the first pass can fail while its shots are being
    # appended, so the failure is injected: the third batch's measurement write refuses.
    monkeypatch.setattr(runlog.ingest, "BATCH_ROWS", 5)
    assert catalogue.ingest(make_file("earlier.parquet", runs={"r1": 5}))[0].status == "ingested"
    original = runlog.ingest._append_measurements
    calls = []

    def failing(writer, batch, *args):
        calls.append(batch.first_row)
        if len(calls) == 3:
            raise ContractError("injected.parquet", "injected failure", column="m.atom_number", row=batch.first_row)
        original(writer, batch, *args)

    monkeypatch.setattr(runlog.ingest, "_append_measurements", failing)
    path = make_file("continued.parquet", shot_table({"r2": 12, "r1": 8}, first_shot=5, seed=6))
    before = snapshot(catalogue)
    [result] = catalogue.ingest(path)
    assert calls == [0, 5, 10]  # two batches of shots were appended before the failure
    assert (result.status, result.reason) == ("refused", "injected.parquet (column 'm.atom_number', row 10): injected failure")
    assert snapshot(catalogue) == before
    monkeypatch.setattr(runlog.ingest, "_append_measurements", original)
    assert catalogue.ingest(path)[0].status == "ingested"
    assert catalogue.counts()["shots"] == 5 + 20


# --- Text that Python reads as a number but Arrow does not: refused at its row ---------------


@pytest.mark.parametrize("text", [" 1.5", "1_000"])
def test_text_that_float_accepts_but_arrow_does_not_names_column_and_row(text, catalogue, make_file):
    values = ["12.5", "13", "11.25", text, "14"]
    path = make_file("spaces.parquet", shot_table({"r1": 5}, extra={"m.x": pa.array(values, pa.string())}))
    [result] = catalogue.ingest(path)
    # Either reading is acceptable: the value taken as a number, or a refusal at its place.
    if result.status == "ingested":
        assert catalogue.shots("r1")["m.x"].tolist()[3] == float(text)
    else:
        assert result.reason.startswith(f"{path} (column 'm.x', row 3): ")


# --- runlog.toml ----------------------------------------------------------------------------


def lab_table(rows: int = 6) -> pa.Table:
    """A table in a lab's own column names, with no apparatus column."""
    start = dt.datetime(2026, 3, 2, 9, 0, tzinfo=dt.timezone.utc)
    return pa.table(
        {
            "seq_id": ["scan-7"] * rows,
            "sequence": ["release-recapture"] * rows,
            "shot_number": pa.array(range(rows), pa.int64()),
            "time": pa.array([start + dt.timedelta(seconds=3 * i) for i in range(rows)], pa.timestamp("us", tz="UTC")),
            "n_atoms": np.arange(rows, dtype=float) + 40.0,
            "p.release[us]": np.arange(rows, dtype=float) * 5.0,
            "comment": ["ok"] * rows,
        }
    )


LAB_TOML = """\
[columns]
seq_id = "run"
shot_number = "shot"
n_atoms = "m.atom_number"
ignore = ["comment"]

[defaults]
apparatus = "lattice-east"
"""


def test_runlog_toml_maps_the_labs_own_names_and_ignores_a_column(catalogue, make_file, tmp_path):
    config = tmp_path / "runlog.toml"
    config.write_text(LAB_TOML, encoding="utf-8")
    mapping = load_config(config)
    assert mapping.rename == {"seq_id": "run", "shot_number": "shot", "n_atoms": "m.atom_number"}
    assert mapping.ignore == frozenset({"comment"}) and mapping.apparatus == "lattice-east"

    path = make_file("lab.parquet", lab_table())
    # Without the mapping, the first column not in the contract is named.
    before = snapshot(catalogue)
    [refused] = catalogue.ingest(path)
    assert refused.reason == (
        f"{path} (column 'seq_id'): not a shot-table column: name it p.<name>[unit], m.<name>[unit], "
        "occ.<image> or counts.<image>, or map or ignore it in runlog.toml"
    )
    assert snapshot(catalogue) == before

    [result] = catalogue.ingest(path, config=config)
    assert (result.status, result.runs, result.shots, result.reason) == ("ingested", ("scan-7",), 6, None)
    info = catalogue.run("scan-7")
    assert (info.apparatus, info.sequence, info.shots) == ("lattice-east", "release-recapture", 6)
    assert info.measurements == ["atom_number"]
    assert set(info.parameters) == {"release"}  # 'comment' was left out
    shots = catalogue.shots("scan-7")
    assert list(shots["shot"]) == list(range(6))
    assert list(shots["m.atom_number"]) == [40.0, 41.0, 42.0, 43.0, 44.0, 45.0]


def test_runlog_toml_that_is_not_toml_raises_config_error_with_its_message(catalogue, make_file, tmp_path):
    text = '[columns\nseq_id = "run"\n'
    config = tmp_path / "runlog.toml"
    config.write_text(text, encoding="utf-8")
    with pytest.raises(tomllib.TOMLDecodeError) as parse:
        tomllib.loads(text)
    expected = f"{config}: not valid TOML: {parse.value}"
    with pytest.raises(ConfigError) as raised:
        load_config(config)
    assert str(raised.value) == expected
    assert isinstance(raised.value, ValueError)
    before = snapshot(catalogue)
    with pytest.raises(ConfigError) as raised:
        catalogue.ingest(make_file("good.parquet", runs={"r1": 3}), config=config)
    assert str(raised.value) == expected
    assert snapshot(catalogue) == before


@pytest.mark.parametrize(
    ("text", "reason"),
    [
        ('[colums]\nseq_id = "run"\n', "unknown section [colums] (known: apparatus, columns, defaults, figures, image_roles, monitors, occupancy, reference, rules, time_window, units)"),
        ('[columns]\nignore = "comment"\n', "[columns] ignore must be a list of column names"),
        ("[columns]\nseq_id = 3\n", "[columns] 'seq_id' must map to a contract column name"),
        ("[occupancy]\nshape = [10, 0]\n", "[occupancy] shape must be a list of positive integers"),
    ],
    ids=["unknown-section", "ignore-not-a-list", "target-not-text", "bad-shape"],
)
def test_runlog_toml_that_cannot_be_used_names_the_problem(text, reason, tmp_path):
    config = tmp_path / "runlog.toml"
    config.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as raised:
        load_config(config)
    assert str(raised.value) == f"{config}: {reason}"


def test_missing_runlog_toml_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError) as raised:
        load_config(tmp_path / "absent.toml")
    assert str(raised.value) == f"{tmp_path / 'absent.toml'}: file not found"


def test_a_run_key_longer_than_the_catalogue_keeps_is_refused_on_both_backends(catalogue, make_file):
    # Found by the hostile-input property test: PostgreSQL refused the row mid-write while
    # SQLite would have kept it; now the contract refuses it before anything is written.
    from conftest import shot_table

    long_key = "k" * 201
    path = make_file("long.parquet", shot_table({"ok": 2, long_key: 2}))
    before = catalogue.counts()
    [result] = catalogue.ingest(path)
    assert result.status == "refused"
    assert result.reason == f"{path} (column 'run', row 2): text longer than 200 characters"
    assert catalogue.counts() == before


def test_an_older_catalogues_rejected_entries_read_as_refused(catalogue, make_file, tmp_path):
    """Catalogues written before the status was called ``refused`` hold ``rejected`` in
    their ingest log; they are read, selected and counted as ``refused`` (no migration)."""
    bad = tmp_path / "bad.parquet"
    bad.write_bytes(b"not parquet")
    [new] = catalogue.ingest(bad)
    assert new.status == "refused"
    catalogue.ingest(make_file(runs={"r1": 3}))
    with catalogue.engine.begin() as connection:  # what an older runlog wrote for a refusal
        connection.execute(schema.IngestLogEntry.__table__.update().where(schema.IngestLogEntry.file == str(bad)).values(status="rejected"))
        assert connection.execute(select(func.count()).where(schema.IngestLogEntry.status == "rejected")).scalar_one() == 1
    log = catalogue.ingest_log()
    assert sorted(log["status"]) == ["ingested", "refused"]
    for asked in ("refused", "rejected"):
        picked = catalogue.ingest_log(status=asked)
        assert list(picked["file"]) == [str(bad)] and list(picked["status"]) == ["refused"]
    assert list(catalogue.ingest_log(status="ingested")["status"]) == ["ingested"]
