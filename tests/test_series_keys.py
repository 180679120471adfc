"""Stored series keys (runlog.store.series_keys) equal the series computed from the runs'
parameters (runlog.drift.reference.run_series, the definition), after every change that
moves them: ingest, a re-analysis, a switch of the current analysis, withdraw and
restore, a new declaration, and the upgrade of a catalogue made before they were kept.
On SQLite and PostgreSQL."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow as pa
import pytest
from sqlalchemy import select

import runlog
from runlog.drift import reference
from runlog.store import schema as s
from conftest import shot_table

QUANTITIES = ("fill_fraction", "survival")


def _stored(catalogue) -> dict[int, dict[int, str]]:
    with catalogue.engine.connect() as connection:
        rows = connection.execute(select(s.Run.apparatus_id, s.Run.id, s.Run.series_fingerprint).where(s.Run.is_current)).all()
    out: dict[int, dict[int, str]] = {}
    for apparatus_id, run_id, fp in rows:
        out.setdefault(int(apparatus_id), {})[int(run_id)] = fp
    return out


def _without_runs(entries):
    return [{k: v for k, v in e.items() if k != "run_ids"} for e in entries]


def check(catalogue) -> int:
    """Stored keys == computed ones, and the series, run lists and drift read from them ==
    those from the computed keys. Returns the number of distinct series seen."""
    stored = _stored(catalogue)
    seen = set()
    with catalogue.engine.connect() as connection:
        for apparatus_id, fingerprints in stored.items():
            table = reference.run_series(connection, apparatus_id)
            assert fingerprints == {run_id: series.fingerprint for run_id, series in table.series.items()}
            seen |= {series.key for series in table.series.values()}
            for quantity in QUANTITIES:
                from_store = reference.series_of(connection, apparatus_id, quantity)
                computed = reference.series_of(connection, apparatus_id, quantity, table)
                assert "run_ids" not in from_store[0] and "run_ids" in computed[0]
                assert _without_runs(from_store) == _without_runs(computed)
                for entry, twin in zip(from_store, computed):
                    assert reference.chain_runs(connection, apparatus_id, quantity, entry) == twin["run_ids"]
                    assert entry["runs"] == len(twin["run_ids"])
    return len(seen)


def same_drift_as_computed(catalogue, monkeypatch, quantity: str = "fill_fraction") -> None:
    """The drift from the stored keys == the drift when they are ignored (computed in memory)."""
    for entry in catalogue.series(quantity, apparatus="bench-a"):
        stored = catalogue.drift(quantity, apparatus="bench-a", series=entry["key"], record_alarms=False).as_dict()
        with monkeypatch.context() as patch:
            patch.setattr(reference, "stored_series", lambda *args, **kwargs: None)
            computed = catalogue.drift(quantity, apparatus="bench-a", series=entry["key"], record_alarms=False).as_dict()
        assert stored == computed


def _day(catalogue, make_file, day: int, *, depth: float = 60.0, analysis: str | None = None, runs: int = 3, name: str | None = None):
    start = dt.datetime(2026, 3, 2 + day, 9, tzinfo=dt.timezone.utc)
    table = shot_table({f"d{day}-{i}": 12 for i in range(runs)}, start=start, seed=day + (100 if analysis else 0))
    n = table.num_rows
    # A counter that takes a new value in every run: not a setting once it has more than
    # ten values in more than a fifth of the runs.
    counter = np.repeat(np.arange(runs) + 10 * day, 12).astype(float)
    table = table.set_column(table.schema.get_field_index("p.depth[uK]"), "p.depth[uK]", pa.array(np.full(n, depth)))
    table = table.append_column("p.counter", pa.array(counter))
    if analysis is not None:
        table = table.replace_schema_metadata({**(table.schema.metadata or {}), b"analysis": analysis.encode()})
    path = make_file(name, table)
    assert [r.status for r in catalogue.ingest(path)] == ["ingested"]
    return path


def test_stored_keys_follow_every_change(catalogue, make_file, monkeypatch):
    # Three runs: the counter takes 3 values, a setting: three series.
    _day(catalogue, make_file, 0)
    assert check(catalogue) == 3
    # Four more days: 15 values in 15 runs, no longer a setting; every stored key moves.
    for day in range(1, 5):
        _day(catalogue, make_file, day, depth=60.0 if day < 3 else 61.0)
    assert check(catalogue) == 2  # depth 60 and 61 uK
    same_drift_as_computed(catalogue, monkeypatch)

    # A re-analysis of day 4 at another depth becomes current, then the first version again.
    _day(catalogue, make_file, 4, depth=65.0, analysis="v2")
    assert check(catalogue) == 3
    catalogue.use_analysis("d4-0", "")
    assert check(catalogue) == 3
    for i in (1, 2):
        catalogue.use_analysis(f"d4-{i}", "")
    assert check(catalogue) == 2
    same_drift_as_computed(catalogue, monkeypatch)

    # Withdraw a whole day's file, then a run; restore both.
    day2 = _day(catalogue, make_file, 5, depth=70.0, name="day5.parquet")
    assert check(catalogue) == 3
    catalogue.withdraw(file=day2, reason="wrong apparatus")
    assert check(catalogue) == 2
    catalogue.withdraw(run="d0-0", reason="broken export")
    assert check(catalogue) == 2
    catalogue.restore(file=day2)
    catalogue.restore(run="d0-0")
    assert check(catalogue) == 3
    same_drift_as_computed(catalogue, monkeypatch)

    # A new declaration: a coarse tolerance makes 60 and 61 uK one setting; then the
    # depth declared as free to vary. The keys are recomputed with it.
    catalogue.declare_reference("bench-a", tolerance=0.2)
    assert check(catalogue) == 2  # 60 and 61 -> 60 uK (steps of 2 uK); 70 uK
    catalogue.declare_reference("bench-a", vary=["depth"], tolerance=0.2)
    assert check(catalogue) == 1
    same_drift_as_computed(catalogue, monkeypatch)
    catalogue.declare_reference("bench-a", sequence="loading", vary=["depth"], tolerance=0.2)  # the sequence alone moves no key
    assert check(catalogue) == 1
    # Ingest after the declaration uses it.
    _day(catalogue, make_file, 6, depth=90.0)
    assert check(catalogue) == 1


def test_a_declaration_written_behind_the_keys_back_is_not_trusted(catalogue, make_file, monkeypatch):
    for day in range(4):
        _day(catalogue, make_file, day, depth=60.0 + 0.01 * day)
    assert check(catalogue) == 4
    # The declaration changed without the keys being recomputed (an older writer, a copy).
    with catalogue.engine.begin() as connection:
        connection.execute(s.Setting.__table__.insert().values(key="reference.1", value='{"sequence": null, "tolerance": 0.01, "vary": []}'))
        assert reference.stored_series(connection, 1, "fill_fraction") is None
    (entry,) = catalogue.series("fill_fraction", apparatus="bench-a")  # computed: steps of 0.1 uK, one setting
    assert entry["constants"]["depth"] == "60 µK" and entry["runs"] == 12
    catalogue.declare_reference("bench-a", tolerance=0.01)  # the same declaration, written properly
    assert check(catalogue) == 1


def test_an_old_catalogue_gets_its_keys_on_upgrade(db_url, tmp_path):
    from runlog.store.engine import make_engine
    from runlog.store.migrate import downgrade

    with runlog.open(db_url) as catalogue:
        for day in range(4):
            start = dt.datetime(2026, 3, 2 + day, 9, tzinfo=dt.timezone.utc)
            table = shot_table({f"u{day}-{i}": 10 for i in range(2)}, start=start, seed=day)
            path = tmp_path / f"u{day}.parquet"
            import pyarrow.parquet as pq

            depth = 60.0 if day < 2 else 55.0
            pq.write_table(table.set_column(table.schema.get_field_index("p.depth[uK]"), "p.depth[uK]", pa.array(np.full(table.num_rows, depth))), path)
            assert [r.status for r in catalogue.ingest(path)] == ["ingested"]
        before = check(catalogue)
        expected = _stored(catalogue)
    engine = make_engine(db_url)
    downgrade(engine, "0015")  # the catalogue as the previous runlog left it
    engine.dispose()
    with pytest.raises(runlog.SchemaVersionError):
        runlog.open(db_url)
    from runlog.store.migrate import upgrade

    engine = make_engine(db_url)
    upgrade(engine)
    engine.dispose()
    with runlog.open(db_url) as catalogue:
        assert _stored(catalogue) == expected
        assert check(catalogue) == before == 2


def test_daily_counts_are_the_sums_of_the_runs_figures(catalogue, make_file):
    # The drift point of a counting figure pools the day's counts (a numpy sum of the
    # stored figures here, the SQL aggregate in the drift query).
    for day in range(4):
        _day(catalogue, make_file, day)
    with catalogue.engine.connect() as connection:
        rows = connection.execute(select(s.Run.day, s.FigureRow.successes, s.FigureRow.trials).join(s.Run, s.Run.id == s.FigureRow.run_id).where(s.Run.is_current, s.FigureRow.name == "fill_fraction")).all()
    days = np.array([str(r[0]) for r in rows])
    counts = np.array([(r[1], r[2]) for r in rows], dtype=np.int64)
    drift = catalogue.drift("fill_fraction", record_alarms=False)
    assert len(drift.points) == 4
    for point in drift.points:
        mine = days == point.date.isoformat()
        assert (point.successes, point.trials) == tuple(int(v) for v in counts[mine].sum(axis=0))
        assert point.runs == int(mine.sum()) == 3
