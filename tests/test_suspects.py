"""Suspects of a change: notes of the day and the day before first, then the ranked
candidates, then a plain verdict; on the 14-day scenario of tests/test_drift.py."""

from __future__ import annotations

import datetime as dt
import json

from click.testing import CliRunner
from test_drift import COHERENCE_STEP_DAY, START, scenario  # noqa: F401  (the fixture)

from runlog.cli import cli


def test_notes_come_before_causes_and_a_run_note_is_shown(scenario):  # noqa: F811
    step = START + dt.timedelta(days=COHERENCE_STEP_DAY)
    scenario.annotate("repump fibre replaced this morning", apparatus="bench-north", at=f"{step.isoformat()}T08:00:00+00:00")
    url = scenario.engine.url.render_as_string(hide_password=False)
    result = CliRunner().invoke(cli, ["--db", url, "drift", "t2_star", "--apparatus", "bench-north", "--causes", "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    (excursion,) = [e for e in data["excursions"] if abs((dt.date.fromisoformat(e["date"]) - step).days) <= 1]
    assert list(excursion)[-3:] == ["notes", "causes", "verdict"]
    assert excursion["notes"][0]["text"] == "repump fibre replaced this morning" and excursion["notes"][0]["kind"] == "note"
    assert excursion["verdict"].startswith("1 note on")
    for change in data["changes"]:
        keys = list(change)
        assert keys.index("notes") < keys.index("causes")
        assert all({"name", "kind", "standardised_change", "q_value"} <= set(c) for c in change["causes"])


def test_nothing_explains_a_change_says_so_plainly(scenario):  # noqa: F811
    # Survival did not change; on a day with no note and nothing that moved, the verdict is plain.
    quiet = START + dt.timedelta(days=3)
    found = scenario.suspects("survival", quiet, apparatus="bench-north")
    assert found["notes"] == []
    moved = [c for c in found["causes"] if c["significant"] or c["setting_changed"]]
    assert moved == [] and found["verdict"].startswith("nothing explains this change")
    # On the fill step the setting change (lattice depth 65 -> 55 uK) is listed as such.
    fill = scenario.suspects("fill_fraction", START + dt.timedelta(days=6), apparatus="bench-north")
    assert fill["causes"][0]["setting_changed"] and fill["causes"][0]["name"] == "lattice_depth"
    assert fill["verdict"].startswith("no note; setting lattice_depth changed from 65 to 55 µK")
