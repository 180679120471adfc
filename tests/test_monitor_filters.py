"""Filters by a monitor's name: the as-of value of the monitor of the shot's apparatus at
the shot's time, checked against a pandas ``merge_asof`` reference on the same data, on
SQLite and PostgreSQL; units; name clashes."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from runlog.errors import FilterError
from runlog.filters import known_names
from runlog.selection import select_shots

from conftest import shot_table

UTC = dt.timezone.utc
T0 = dt.datetime(2026, 3, 2, 9, 0, tzinfo=UTC)
GAP = pd.Timedelta(seconds=600)  # runlog.monitors.align.MAX_GAP_SECONDS


def _us(seconds: np.ndarray) -> pa.Array:
    base = int(T0.timestamp()) * 1_000_000
    return pa.array(base + (np.asarray(seconds, dtype=np.int64) * 1_000_000), pa.int64()).cast(pa.timestamp("us", tz="UTC"))


def _data(tmp_path, seed=3):
    """Shots of two apparatus every 37 s over 8 h; on each apparatus a room_temp monitor
    logged irregularly, out of order, with a silent hour (longer than the gap), in degC on
    one apparatus and in K on the other; plus shots exactly at a logged time and exactly
    the gap after one."""
    rng = np.random.default_rng(seed)
    files, logs = [], {}
    for apparatus, unit, offset in (("bench-a", "degC", 0.0), ("bench-b", "K", 273.15)):
        logged = np.sort(rng.choice(np.arange(0, 8 * 3600 // 5), 2500, replace=False)).astype(np.int64) * 5
        logged = logged[(logged < 10_000) | (logged > 13_600)]
        values = 23.0 + np.cumsum(0.05 * rng.standard_normal(logged.size))
        order = rng.permutation(logged.size)
        monitor = pa.table({"time": _us(logged[order]), "apparatus": [apparatus] * logged.size, f"room_temp[{unit}]": (values + offset)[order]})
        files.append(pq.write_table(monitor, tmp_path / f"{apparatus}.slow.parquet") or tmp_path / f"{apparatus}.slow.parquet")
        logs[apparatus] = pd.DataFrame({"time": pd.to_datetime(_us(logged).to_numpy(zero_copy_only=False)), "room_temp": values})
        shots = np.arange(0, 8 * 3600, 37, dtype=np.int64)
        shots = np.concatenate([shots, [logged[100], logged[200] + 600, logged[300] + 601]])
        shots = np.unique(shots)
        runs = {f"{apparatus}-r{i}": 0 for i in range(8)}
        keys = [f"{apparatus}-r{min(7, int(t // 3600))}" for t in shots]
        for key in keys:
            runs[key] += 1
        table = shot_table({k: v for k, v in runs.items() if v}, apparatus=apparatus, occupancy=False, seed=int(offset))
        table = table.set_column(table.schema.get_field_index("time"), "time", _us(shots))
        files.append(tmp_path / f"{apparatus}.parquet")
        pq.write_table(table, files[-1])
    return files, logs


def _reference(frame: pd.DataFrame, logs) -> pd.Series:
    """Each selected shot's room_temp (degC) by pandas merge_asof, backward, tolerance 600 s."""
    parts = []
    for apparatus, log in logs.items():
        mine = frame[frame["apparatus"] == apparatus][["run", "shot", "time"]].copy()
        mine["time"] = pd.to_datetime(mine["time"], utc=True)
        right = log.assign(time=pd.to_datetime(log["time"], utc=True))
        parts.append(pd.merge_asof(mine.sort_values("time"), right, on="time", direction="backward", tolerance=GAP))
    joined = pd.concat(parts)
    return joined.set_index(["run", "shot"])["room_temp"]


def _keys(frame: pd.DataFrame) -> set[tuple[str, int]]:
    return set(zip(frame["run"], frame["shot"].astype(int)))


def test_monitor_filters_equal_a_merge_asof_reference(catalogue, tmp_path):
    files, logs = _data(tmp_path)
    results = catalogue.ingest(files)
    assert [r.status for r in results] == ["ingested"] * 4, [r.reason for r in results]
    everything = select_shots(catalogue)
    reference = _reference(everything, logs)
    assert reference.isna().sum() > 50  # the silent hour and the first minutes are exercised
    assert reference.notna().sum() > 500
    cases = {
        "room_temp > 23 degC": reference > 23.0,
        "room_temp > 296.15 K": reference > 23.0,
        "room_temp <= 23.1 degC": reference <= 23.1,
        "room_temp between 22.9 degC and 23.2 degC": (reference >= 22.9) & (reference <= 23.2),
        "room_temp != 23 degC": reference.notna() & (reference != 23.0),
        "not room_temp > 23 degC": ~(reference > 23.0),  # shots without a value too
        "monitor.room_temp < 73.4 degF and apparatus = 'bench-b'": (reference < 23.0) & (reference.index.get_level_values(0).str.startswith("bench-b")),
        "room_temp > 23 degC or shot = 0": (reference > 23.0) | (reference.index.get_level_values(1) == 0),
    }
    for text, expected in cases.items():
        found = select_shots(catalogue, text)
        wanted = {(run, int(shot)) for (run, shot), keep in expected.items() if keep}
        # Unit conversion rounds to 15 digits: compare away from the thresholds' last digit.
        assert _keys(found) == wanted, text
    with pytest.raises(FilterError) as error:
        select_shots(catalogue, "room_temp <= 23.1")
    assert str(error.value) == "filter, at position 13: 'room_temp' is logged in 'K' and 'degC' on different apparatus: write the number with its unit"
    # The shot exactly at a logged time takes that value; exactly the gap after one, still
    # that value; a microsecond later than the gap, none (see docs/filters.md).
    missing = select_shots(catalogue, "not room_temp > -1000 degC")
    assert _keys(missing) == {(run, int(shot)) for (run, shot), value in reference.items() if np.isnan(value)}


def test_monitor_names_clash_with_parameters_and_are_listed(catalogue, tmp_path, make_file):
    files, _ = _data(tmp_path)
    catalogue.ingest(files)
    clash = shot_table({"c1": 3}, extra={"p.room_temp[degC]": np.full(3, 30.0)}, occupancy=False)
    assert catalogue.ingest(make_file("clash.parquet", clash))[0].status == "ingested"
    with pytest.raises(FilterError) as error:
        select_shots(catalogue, "room_temp > 23 degC")
    assert str(error.value) == "filter, at position 0: 'room_temp' is both a parameter and a monitor: write 'p.room_temp' or 'monitor.room_temp'"
    assert _keys(select_shots(catalogue, "p.room_temp > 29 degC")) == {("c1", 0), ("c1", 1), ("c1", 2)}
    assert len(select_shots(catalogue, "monitor.room_temp > 0 degC")) > 500
    with pytest.raises(FilterError) as error:
        select_shots(catalogue, "monitor.room_temp > 3 mW")
    assert str(error.value) == "filter, at position 20: 'monitor.room_temp' is stored in 'degC'; 'mW' is not a unit of the same dimension"
    assert known_names(catalogue)["monitors"] == ["room_temp"]
    with pytest.raises(FilterError, match="did you mean 'monitor.room_temp'"):
        select_shots(catalogue, "monitor.room_tmp > 1")


def test_shots_and_exports_carry_each_monitor_as_of_the_shot_time(catalogue, tmp_path):
    import json

    from click.testing import CliRunner

    from runlog.cli import cli
    from runlog.errors import NotFoundError

    files, logs = _data(tmp_path)
    catalogue.ingest(files)
    frame = catalogue.select("shot >= 0", monitors=["room_temp"])
    # One column in bench-a's unit (the first apparatus by name); bench-b's K converted.
    assert frame.attrs["units"]["monitor.room_temp"] == "degC"
    reference = _reference(frame, logs).reindex(list(zip(frame["run"], frame["shot"])))
    ours = frame["monitor.room_temp"].to_numpy()
    np.testing.assert_array_equal(np.isnan(ours), reference.isna().to_numpy())
    np.testing.assert_allclose(ours[~np.isnan(ours)], reference.dropna().to_numpy(), rtol=0, atol=1e-9)
    # With a filter and a limit, and one apparatus only: the same values.
    some = catalogue.select("apparatus = 'bench-b' and room_temp > 23 degC", monitors=["monitor.room_temp"], limit=20)
    # Only bench-b runs: the column is in its unit, K.
    assert len(some) == 20 and some.attrs["units"]["monitor.room_temp"] == "K" and (some["monitor.room_temp"] > 296.15).all()
    with pytest.raises(NotFoundError) as error:
        catalogue.select("shot >= 0", monitors=["room_tmp"])
    assert str(error.value) == "no monitor 'room_tmp' (did you mean 'room_temp'?)"

    url = catalogue.engine.url.render_as_string(hide_password=False)
    shown = CliRunner().invoke(cli, ["--db", url, "shots", "--where", "run = 'bench-a-r3'", "--monitor", "room_temp", "--csv"])
    assert shown.exit_code == 0, shown.output
    assert shown.output.splitlines()[0].endswith(",monitor.room_temp")

    out = tmp_path / "package"
    done = CliRunner().invoke(cli, ["--db", url, "export", "--where", "shot >= 0", "--out", str(out), "--monitor", "room_temp", "--json"])
    assert done.exit_code == 0, done.output
    manifest = json.loads((out / "datapackage.json").read_text())
    shots = next(r for r in manifest["resources"] if r["name"] == "shots")
    column = next(f for f in shots["schema"]["fields"] if f["name"] == "monitor.room_temp")
    assert column["unit"] == "degC" and column["type"] == "number"
    assert "at most 600 s before" in column["description"]
    provenance = manifest["provenance"]["monitors"]
    assert provenance["max_gap_seconds"] == 600 and provenance["columns"] == [{"column": "monitor.room_temp", "monitor": "room_temp", "unit": "degC", "apparatus": ["bench-a", "bench-b"]}]
    exported = pq.read_table(out / "shots.parquet").to_pandas()
    np.testing.assert_array_equal(exported["monitor.room_temp"].to_numpy(), frame["monitor.room_temp"].to_numpy())
    again = catalogue.export_again(out / "export.toml")
    assert again.same
