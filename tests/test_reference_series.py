"""Reference series: like compared with like, on SQLite and PostgreSQL.

A scenario of our own: every lab day an apparatus runs constant loading runs, load-time
scans, rearrangement runs and Ramsey runs at three lattice depths, all stable. The truth
is the only reference: nothing changes, so nothing may be flagged, while pooling the
unlike runs would mix three coherence times into one daily value.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from runlog import Figure

START = dt.date(2026, 5, 4)
DAYS = 20
DEPTHS = {20.0: 800.0, 40.0: 1000.0, 60.0: 1200.0}  # lattice depth (uK) -> true coherence time (us)


def _table(key: str, sequence: str, start: dt.datetime, shots: int, parameters: dict[str, object], load: np.ndarray, survive: np.ndarray | None) -> pa.Table:
    columns: dict[str, object] = {
        "run": [key] * shots,
        "apparatus": ["bench-mixed"] * shots,
        "sequence": [sequence] * shots,
        "shot": pa.array(range(shots), pa.int64()),
        "time": pa.array([start + dt.timedelta(seconds=4 * i) for i in range(shots)], pa.timestamp("us", tz="UTC")),
        **parameters,
        "occ.load": pa.array(list(load), pa.list_(pa.bool_())),
    }
    if survive is not None:
        columns["occ.survive"] = pa.array(list(survive), pa.list_(pa.bool_()))
    return pa.table(columns)


def _write_day(folder, day: int, rng: np.random.Generator) -> list:
    date = START + dt.timedelta(days=day)
    at = dt.datetime(date.year, date.month, date.day, 8, tzinfo=dt.timezone.utc)
    files = []
    shots, sites = 60, 36
    for number in range(2):  # constant loading runs: fill 0.55, survival 0.95
        load = rng.random((shots, sites)) < 0.55
        table = _table(f"{date:%Y%m%d}-load-{number}", "loading", at + dt.timedelta(hours=number), shots, {"p.load_time[ms]": np.full(shots, 200.0)}, load, load & (rng.random((shots, sites)) < 0.95))
        files.append(table)
    # A load-time scan: fill from 0.2 to 0.8 across the scan.
    times = np.repeat(np.linspace(50, 400, 6), shots // 6)
    load = rng.random((shots, sites)) < (0.2 + 0.6 * (times - 50) / 350)[:, None]
    files.append(_table(f"{date:%Y%m%d}-scan", "loading", at + dt.timedelta(hours=3), shots, {"p.load_time[ms]": times}, load, load & (rng.random((shots, sites)) < 0.95)))
    # Rearrangement runs: survival 0.80 (moves lose atoms), fill 0.55.
    load = rng.random((shots, sites)) < 0.55
    files.append(_table(f"{date:%Y%m%d}-rearrange", "rearrange", at + dt.timedelta(hours=4), shots, {"p.load_time[ms]": np.full(shots, 200.0)}, load, load & (rng.random((shots, sites)) < 0.80)))
    for depth in DEPTHS:  # Ramsey runs at three lattice depths
        load = rng.random((10, sites)) < 0.55
        files.append(_table(f"{date:%Y%m%d}-ramsey-{depth:.0f}", "ramsey", at + dt.timedelta(hours=5 + depth / 20), 10, {"p.lattice_depth[uK]": np.full(10, depth), "p.wait[us]": np.linspace(0, 2000, 10)}, load, None))
    paths = []
    for index, table in enumerate(files):
        path = folder / f"day{day:02d}-{index}.parquet"
        pq.write_table(table, path)
        paths.append(path)
    return paths


@pytest.fixture
def mixed(catalogue, tmp_path):
    rng = np.random.default_rng(515)
    truth = np.random.default_rng(516)
    paths = [p for day in range(DAYS) for p in _write_day(tmp_path, day, rng)]
    assert {r.status for r in catalogue.ingest(paths)} == {"ingested"}
    for day in range(DAYS):
        date = START + dt.timedelta(days=day)
        for depth, true_t in DEPTHS.items():
            catalogue.save_figures(f"{date:%Y%m%d}-ramsey-{depth:.0f}", "coherence", [Figure("t2_star", true_t + truth.normal(0, 20.0), "us", stderr=20.0, method="least-squares")])
    return catalogue


def test_a_mixed_day_gives_separate_series_and_no_alarm_from_the_mixing(mixed):
    coherence = mixed.series("t2_star", apparatus="bench-mixed")
    assert sorted(s["constants"]["lattice_depth"] for s in coherence) == ["20 µK", "40 µK", "60 µK"]
    assert all(s["days"] == DAYS and s["runs"] == DAYS for s in coherence)
    fill = mixed.series("fill_fraction", apparatus="bench-mixed")
    scans = [s for s in fill if s["scanned"] == ["load_time"]]
    assert len(scans) == 1 and scans[0]["sequence"] == "loading" and "load_time" not in scans[0]["constants"]
    assert {s["sequence"] for s in fill} == {"loading", "rearrange", "ramsey"}

    # The reference series of survival is the constant loading runs, not the rearrangement runs.
    survival = mixed.drift("survival", apparatus="bench-mixed")
    assert survival.series["sequence"] in ("loading", "rearrange")
    for entry in mixed.series("survival", apparatus="bench-mixed"):
        judged = mixed.drift("survival", apparatus="bench-mixed", series=entry["key"], record_alarms=False)
        truth = 0.80 if entry["sequence"] == "rearrange" else 0.95
        assert all(abs(p.value - truth) < 4 * p.stderr for p in judged.points)

    # Pooled, the three depths make one daily T2* with a scatter far beyond its errors;
    # per series each day sits within its own errors of its depth's value.
    pooled = mixed.drift("t2_star", apparatus="bench-mixed", pooled=True, record_alarms=False)
    assert all(p.spread > 150 for p in pooled.points)
    reference = mixed.drift("t2_star", apparatus="bench-mixed")
    depth = float(reference.series["constants"]["lattice_depth"].split()[0])
    assert all(abs(p.value - DEPTHS[depth]) < 4 * 20.0 for p in reference.points)
    assert reference.series["label"].startswith("ramsey (lattice_depth=")

    assert mixed.check_drift() == []  # nothing changed, nothing flagged


def test_a_setting_change_is_one_series_and_reported_without_a_note(catalogue, make_file):
    # Depth 60 uK for six days, then 50 uK: the series goes on; the change is named.
    for day in range(10):
        start = dt.datetime(2026, 3, 2 + day, 9, tzinfo=dt.timezone.utc)
        depth = 60.0 if day < 6 else 50.0
        catalogue.ingest(make_file(runs={f"d{day}-a": 20, f"d{day}-b": 20}, start=start, seed=day, extra={"p.depth[uK]": np.full(40, depth)}))
    (series,) = catalogue.series("fill_fraction")
    assert [s["label"] for s in series["settings"]] == ["loading (beam=vertical; depth=60 µK; scan of wait)", "loading (beam=vertical; depth=50 µK; scan of wait)"]
    drift = catalogue.drift("fill_fraction")
    assert len(drift.points) == 10
    (change,) = drift.settings
    assert change["day"] == "2026-03-08" and not change["noted"]
    assert change["words"] == "setting changed without a note: depth 60 -> 50"
    assert [(a["reason"], a["date"]) for a in catalogue.alarms() if a["reason"] == "setting"] == [("setting", "2026-03-08")]
    catalogue.annotate("lattice depth lowered for the new loading scheme", apparatus="bench-a", at="2026-03-08T10:00:00+00:00")
    assert catalogue.drift("fill_fraction", record_alarms=False).settings[0]["noted"]


def test_a_declared_reference_sequence_and_varying_parameters(catalogue, make_file):
    for day in range(4):
        start = dt.datetime(2026, 3, 2 + day, 9, tzinfo=dt.timezone.utc)
        catalogue.ingest(make_file(runs={f"l{day}": 10}, start=start, seed=day, extra={"p.depth[uK]": np.full(10, 60.0 + day)}))
        catalogue.ingest(make_file(runs={f"o{day}": 10}, sequence="other", start=start + dt.timedelta(hours=2), seed=10 + day))
        catalogue.ingest(make_file(runs={f"o{day}b": 10}, sequence="other", start=start + dt.timedelta(hours=3), seed=20 + day))
    assert catalogue.drift("fill_fraction", record_alarms=False).series["sequence"] == "other"  # more runs
    catalogue.declare_reference("bench-a", sequence="loading", vary=["depth"])
    drift = catalogue.drift("fill_fraction", record_alarms=False)
    assert drift.series["sequence"] == "loading" and "depth" not in drift.series["constants"]
    assert len(drift.points) == 4 and drift.settings == []
