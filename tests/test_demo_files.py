"""The demo scenario generator writes contract-shaped, deterministic shot tables.

The statistical checks at the end compare the files with the generator's own invented
truth (``SCENARIO``): there is no outside source for an invented lab, so they are marked
"generator's own invented truth" and only show that the files carry what the scenario
says they carry.
"""

from __future__ import annotations

import datetime as dt
import re
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pint
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest
from scipy.optimize import curve_fit

from runlog.demo import SCENARIO, write_demo_files

START = dt.date(2026, 9, 1)
DAYS = 21
RESERVED = {
    "run": pa.string(),
    "apparatus": pa.string(),
    "sequence": pa.string(),
    "shot": pa.int64(),
    "time": pa.timestamp("us", tz="UTC"),
    "operator": pa.string(),
    "notes": pa.string(),
}
PARAMETER = re.compile(r"^p\.([a-z][a-z0-9_]*)(\[([^\]]+)\])?$")
MEASUREMENT = re.compile(r"^m\.([a-z][a-z0-9_]*)(\[([^\]]+)\])?$")
OCCUPANCY = re.compile(r"^occ\.([a-z][a-z0-9_]*)$")


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    out = tmp_path_factory.mktemp("demo")
    began = time.perf_counter()
    paths = write_demo_files(out, days=DAYS, start=START, seed=7)
    took = time.perf_counter() - began
    shots = sum(pq.read_metadata(p).num_rows for p in paths)
    size = sum(p.stat().st_size for p in paths)
    print(
        f"\ndemo generation: {len(paths)} files, {shots} shots, "
        f"{size / 1e6:.2f} MB in {took:.2f} s"
    )
    return paths


@pytest.fixture(scope="module")
def shots(demo: list[Path]) -> pd.DataFrame:
    """Every shot of the demo as one frame, occupancy reduced to per-shot counts."""
    frames = []
    for path in demo:
        table = pq.read_table(path)
        frame = table.drop_columns(["occ.load", "occ.survive"]).to_pandas()
        for column, count in (("occ.load", "loaded"), ("occ.survive", "survived")):
            lists = table.column(column).combine_chunks()
            values = pc.list_flatten(lists).to_numpy(zero_copy_only=False)
            parents = pc.list_parent_indices(lists).to_numpy()
            frame[count] = np.bincount(parents, weights=values, minlength=len(frame))
        frame["sites"] = pc.list_value_length(table.column("occ.load")).to_numpy(
            zero_copy_only=False
        )
        frame["file"] = path.name
        frames.append(frame)
    frame = pd.concat(frames, ignore_index=True)
    first = frame.groupby(["apparatus", "run"])["time"].transform("min")
    frame["day"] = (first.dt.floor("D") - pd.Timestamp(START, tz="UTC")).dt.days
    return frame


def test_one_file_per_apparatus_per_day_in_time_order(demo: list[Path]) -> None:
    names = [p.name for p in demo]
    expected = {
        f"{a.name}_{START + dt.timedelta(days=d)}.parquet"
        for a in SCENARIO.apparatus
        for d in range(DAYS)
    }
    assert set(names) == expected and len(names) == len(expected)
    dates = [name.split("_")[1] for name in names]
    assert dates == sorted(dates)
    assert all(p.is_file() and p.stat().st_size > 0 for p in demo)


def test_columns_follow_the_contract(demo: list[Path]) -> None:
    units = pint.UnitRegistry()
    for path in demo:
        schema = pq.read_schema(path)
        for name, kind in RESERVED.items():
            assert schema.field(name).type == kind, (path.name, name)
        for field in schema:
            if field.name in RESERVED:
                continue
            if match := PARAMETER.match(field.name):
                assert field.type in (pa.float64(), pa.int64(), pa.bool_(), pa.string())
            elif match := MEASUREMENT.match(field.name):
                assert field.type == pa.float64(), field.name
            elif OCCUPANCY.match(field.name):
                assert field.type == pa.list_(pa.bool_())
                rows, cols = field.metadata[b"shape"].decode().split(",")
                assert int(rows) > 0 and int(cols) > 0
                continue
            else:
                pytest.fail(f"{path.name}: column {field.name!r} is not a contract name")
            if match.group(3):
                units.parse_units(match.group(3))  # raises on a unit pint cannot read
        assert [f.name for f in schema if f.name.startswith("occ.")] == ["occ.load", "occ.survive"]


def test_shot_indices_unique_per_run_across_files(shots: pd.DataFrame) -> None:
    for (apparatus, run), group in shots.groupby(["apparatus", "run"]):
        indices = group["shot"].to_numpy()
        assert np.array_equal(np.sort(indices), np.arange(len(indices))), (apparatus, run)
        assert group["sequence"].nunique() == 1 and group["operator"].nunique() == 1
        assert group.sort_values("shot")["time"].is_monotonic_increasing


def test_some_runs_continue_in_the_next_days_file(shots: pd.DataFrame) -> None:
    spread = shots.groupby(["apparatus", "run"])["file"].nunique()
    split = spread[spread > 1]
    expected_days = SCENARIO.split_days(DAYS)
    assert len(split) == len(expected_days) == 3
    for apparatus, run in split.index:
        group = shots[(shots["apparatus"] == apparatus) & (shots["run"] == run)]
        first_file, second_file = sorted(group["file"].unique())
        head = group[group["file"] == first_file]["shot"]
        tail = group[group["file"] == second_file]["shot"]
        # The second file continues the shot indices where the first stopped.
        assert tail.min() == head.max() + 1
        assert apparatus == SCENARIO.split_run_apparatus


def test_occupancy_lists_match_the_shape_within_each_run(demo: list[Path]) -> None:
    for path in demo:
        table = pq.read_table(path)
        for name in ("occ.load", "occ.survive"):
            rows, cols = map(int, table.schema.field(name).metadata[b"shape"].split(b","))
            lengths = pc.list_value_length(table.column(name)).to_numpy(zero_copy_only=False)
            sequence = table.column("sequence").to_numpy(zero_copy_only=False)
            loading = sequence == "loading"
            assert np.all(lengths[loading] == rows * cols), (path.name, name)
            # Scans carry no images: their occupancy is null, not an empty list.
            assert np.all(np.isnan(lengths[~loading].astype(float))), (path.name, name)


def test_survival_image_only_holds_loaded_atoms(demo: list[Path]) -> None:
    # Generator's own invented truth: an atom can be lost between images, never gained.
    table = pq.read_table(demo[0])
    loaded = pc.list_flatten(table.column("occ.load")).to_numpy(zero_copy_only=False)
    survived = pc.list_flatten(table.column("occ.survive")).to_numpy(zero_copy_only=False)
    assert not np.any(survived & ~loaded)


def test_same_seed_gives_byte_identical_files(demo: list[Path], tmp_path: Path) -> None:
    again = write_demo_files(tmp_path / "again", days=DAYS, start=START, seed=7)
    assert [p.name for p in again] == [p.name for p in demo]
    for first, second in zip(demo, again):
        assert first.read_bytes() == second.read_bytes(), first.name
    other = write_demo_files(tmp_path / "other", days=2, start=START, seed=8)
    assert other[0].read_bytes() != demo[0].read_bytes()


def test_days_and_start_are_honoured(tmp_path: Path) -> None:
    paths = write_demo_files(tmp_path, days=2, start=dt.date(2027, 1, 30))
    assert sorted(p.name for p in paths) == [
        "lattice-east_2027-01-30.parquet",
        "lattice-east_2027-01-31.parquet",
        "tweezer-west_2027-01-30.parquet",
        "tweezer-west_2027-01-31.parquet",
    ]
    times = pq.read_table(paths[0]).column("time").to_pandas()
    assert (times.dt.date == dt.date(2027, 1, 30)).all()
    with pytest.raises(ValueError, match="days must be at least 1"):
        write_demo_files(tmp_path, days=0)


def test_describe_names_both_events() -> None:
    lines = SCENARIO.describe(START, DAYS)
    assert "event: tweezer-west fill_fraction 0.5 -> 0.4 from 2026-09-10 (day 9)" in lines
    assert "event: lattice-east coherence_time_us 1000 -> 600 µs from 2026-09-15 (day 14)" in lines
    assert any("not in these files" in line for line in SCENARIO.describe(START, 5))


def _loading_fill(shots: pd.DataFrame, apparatus: str, days: range) -> tuple[float, float, float]:
    """Fill fraction of constant-load-time loading runs, its standard error and the truth."""
    truth = SCENARIO.get(apparatus)
    runs = shots[
        (shots["apparatus"] == apparatus)
        & (shots["sequence"] == "loading")
        & (shots["day"].isin(days))
    ]
    constant = runs.groupby("run")["p.load_time[ms]"].transform("nunique") == 1
    runs = runs[constant]
    assert (runs["p.load_time[ms]"] == truth.load_time_ms).all()
    sites = runs["sites"].sum()
    fill = runs["loaded"].sum() / sites
    expected = SCENARIO.on_day(apparatus, days.start).fill_fraction * (
        1 - np.exp(-truth.load_time_ms / truth.load_time_constant_ms)
    )
    return fill, float(np.sqrt(fill * (1 - fill) / sites)), expected


def test_fill_fraction_drops_on_the_event_day(shots: pd.DataFrame) -> None:
    # Generator's own invented truth (SCENARIO): tweezer-west loads ~0.50 until day 9 and
    # ~0.40 from then on; lattice-east stays at ~0.50 throughout.
    event = next(e for e in SCENARIO.events if e.quantity == "fill_fraction")
    assert (event.apparatus, event.day, event.before, event.after) == ("tweezer-west", 9, 0.5, 0.4)
    before = _loading_fill(shots, "tweezer-west", range(0, event.day))
    after = _loading_fill(shots, "tweezer-west", range(event.day, DAYS))
    steady = _loading_fill(shots, "lattice-east", range(event.day, DAYS))
    for fill, stderr, expected in (before, after, steady):
        assert abs(fill - expected) < 4 * stderr, (fill, stderr, expected)
    assert before[0] == pytest.approx(0.50, abs=0.005)
    assert after[0] == pytest.approx(0.40, abs=0.005)
    assert steady[0] == pytest.approx(0.50, abs=0.005)


def test_survival_matches_the_scenario(shots: pd.DataFrame) -> None:
    # Generator's own invented truth (SCENARIO.survival per apparatus).
    for apparatus in SCENARIO.apparatus:
        runs = shots[shots["apparatus"] == apparatus.name]
        loaded, survived = runs["loaded"].sum(), runs["survived"].sum()
        stderr = np.sqrt(apparatus.survival * (1 - apparatus.survival) / loaded)
        assert abs(survived / loaded - apparatus.survival) < 4 * stderr, apparatus.name


def test_phase_scans_carry_the_scenario_fringe(shots: pd.DataFrame) -> None:
    # Generator's own invented truth: bright = 0.5 (1 + C cos(phase + offset)), which is
    # linear in (1, cos phase, sin phase), so plain least squares recovers C and offset.
    for apparatus in SCENARIO.apparatus:
        scans = shots[
            (shots["apparatus"] == apparatus.name) & (shots["sequence"] == "phase-scan")
        ]
        phase = np.deg2rad(scans["p.phase[deg]"].to_numpy())
        design = np.column_stack([np.ones_like(phase), np.cos(phase), np.sin(phase)])
        bright = scans["m.bright_fraction"].to_numpy()
        (mean, a, b), *_ = np.linalg.lstsq(design, bright, rcond=None)
        assert mean == pytest.approx(0.5, abs=0.01)
        assert 2 * np.hypot(a, b) == pytest.approx(apparatus.phase_contrast, abs=0.02)
        assert np.rad2deg(np.arctan2(-b, a)) == pytest.approx(apparatus.phase_offset_deg, abs=2.0)


def _ramsey(t, contrast, coherence_time, detuning, phase):
    envelope = np.exp(-((t / coherence_time) ** 2))
    return 0.5 * (1 + contrast * envelope * np.cos(2 * np.pi * detuning * t + phase))


def test_coherence_time_drops_on_the_event_day(shots: pd.DataFrame) -> None:
    # Generator's own invented truth: lattice-east T = 1000 us before day 14, 600 us after.
    # scipy's curve_fit is used here only as an outside reference fitter.
    event = next(e for e in SCENARIO.events if e.quantity == "coherence_time_us")
    detuning = SCENARIO.get(event.apparatus).ramsey_detuning_khz * 1e-3
    periods = ((range(0, event.day), event.before), (range(event.day, DAYS), event.after))
    for days, expected in periods:
        scans = shots[
            (shots["apparatus"] == event.apparatus)
            & (shots["sequence"] == "ramsey")
            & (shots["day"].isin(days))
        ]
        start = (0.9, 800.0, 0.004, 0.0)
        found, _ = curve_fit(_ramsey, scans["p.wait[us]"], scans["m.bright_fraction"], p0=start)
        assert abs(found[1]) == pytest.approx(expected, rel=0.06), days
        assert found[2] == pytest.approx(detuning, rel=0.01)
