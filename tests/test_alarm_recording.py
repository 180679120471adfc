"""Recording alarms is idempotent under concurrency, on SQLite and PostgreSQL.

Two processes that find the same drift at once used to both see "no alarm yet" and both
insert; the second failed on the alarms' unique key (1 in 16 concurrent `runlog alarms`
on PostgreSQL). The race is reproduced deterministically: one connection records inside
an open transaction while a second records the same findings.
"""

from __future__ import annotations

import datetime as dt
import threading

from runlog.drift import alarms
from runlog.drift.series import Drift, DriftChange, DriftPoint


def _drift() -> Drift:
    day = dt.date(2026, 3, 2)
    points = [DriftPoint(day + dt.timedelta(days=i), 0.5 if i < 3 else 0.4, 0.45, 0.55, 2, 20, 0.01) for i in range(6)]
    return Drift(
        quantity="fill_fraction", apparatus="bench-a", unit="", sequence=None, points=points,
        limits={"center": 0.5, "method": "ewma"}, changes=[DriftChange(points[3].date, 3, 0.5, 0.4, "cusum")],
        counting=True, out_of_limits=[3, 4, 5],
        series={"key": "loading@0a1b2c3d", "label": "loading (lattice_depth=65 uK)"},
        settings=[{"day": points[3].date.isoformat(), "noted": False, "words": "setting changed without a note: lattice_depth 65 -> 55"}],
    )


def test_the_same_findings_recorded_at_once_by_two_writers_give_one_alarm_each(catalogue, make_file):
    catalogue.ingest(make_file(runs={"r1": 4}))  # the apparatus
    drift = _drift()
    engine = catalogue.engine
    first = engine.connect().execution_options(sqlite_begin="IMMEDIATE")
    transaction = first.begin()
    mine = alarms.record(first, drift)
    outcome: dict[str, object] = {}

    def second_writer() -> None:
        try:
            with engine.connect().execution_options(sqlite_begin="IMMEDIATE") as connection, connection.begin():
                outcome["alarms"] = alarms.record(connection, drift)
        except Exception as error:  # the failure this test exists for
            outcome["error"] = error

    thread = threading.Thread(target=second_writer)
    thread.start()
    thread.join(timeout=1.0)  # the second writer now waits on the first one's rows
    transaction.commit()
    first.close()
    thread.join(timeout=60)
    assert "error" not in outcome, outcome.get("error")
    assert [(a["date"], a["reason"]) for a in outcome["alarms"]] == [(a["date"], a["reason"]) for a in mine]
    assert [a["id"] for a in outcome["alarms"]] == [a["id"] for a in mine]
    assert len(catalogue.alarms(status=None)) == len(mine) == 2  # the first day of the excursion and the unnoted setting change


def test_an_acknowledged_alarm_stays_acknowledged_when_found_again(catalogue, make_file):
    catalogue.ingest(make_file(runs={"r1": 4}))
    with catalogue.engine.begin() as connection:
        [limit, change] = alarms.record(connection, _drift())
    assert (limit["reason"], change["reason"]) == ("limit", "setting")
    assert limit["series"] == {"key": "loading@0a1b2c3d", "sequence": "loading", "fingerprint": "0a1b2c3d", "label": "loading (lattice_depth=65 uK)"}
    catalogue.acknowledge(change["id"], "lattice realigned")
    with catalogue.engine.begin() as connection:
        again = alarms.record(connection, _drift())
    assert [(a["id"], a["status"]) for a in again] == [(limit["id"], "open"), (change["id"], "acknowledged")]


def test_a_mirrored_quantity_raises_no_alarm_of_its_own(catalogue, make_file):
    """loss is 1 - survival of the same shots: its excursion is survival's, one event, so
    only survival's findings become alarms (a second alarm would spend the budget twice)."""
    from dataclasses import replace

    catalogue.ingest(make_file(runs={"r1": 4}))
    survival = replace(_drift(), quantity="survival")
    loss = replace(survival, quantity="loss", points=[replace(p, value=1 - p.value, ci_low=1 - p.ci_high, ci_high=1 - p.ci_low) for p in survival.points])
    with catalogue.engine.begin() as connection:
        days = [(f["day"], f["reason"]) for f in alarms.findings(survival)]
        assert [(f["day"], f["reason"]) for f in alarms.findings(loss)] == days  # one event seen twice
        assert alarms.record(connection, loss) == []
        recorded = alarms.record(connection, survival)
    assert {a["quantity"] for a in catalogue.alarms(status=None)} == {"survival"}
    assert len(recorded) == 2
