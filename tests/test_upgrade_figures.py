"""An old catalogue upgrades with its figures recomputed where needed (migration 0016):
a Ramsey frequency stored as an older runlog stored it (``detuning``, the fringe frequency
>= 0 in MHz for waits in us) takes the programmed detuning's unit and sign, with its phase;
a stored contrast above 1 is flagged out of range; nothing is lost."""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa
import pytest
from sqlalchemy import select

import runlog
from runlog import Figure
from runlog.store import migrate
from runlog.store import schema as s
from conftest import shot_table


def _ramsey_run(key: str, detuning: tuple[float, str] | None, seed: int) -> pa.Table:
    table = shot_table({key: 4}, sequence="ramsey", seed=seed)
    if detuning is not None:
        value, unit = detuning
        table = table.append_column(f"p.detuning[{unit}]", pa.array(np.full(table.num_rows, value)))
    return table


# 0.002 MHz = 2 kHz (SI prefixes) = 4 pi rad/ms (omega = 2 pi f): the catalogue's unit of
# the detuning parameter is the unit of the first file that had it.
@pytest.mark.parametrize(("unit", "size"), [("kHz", 2.0), ("rad/ms", 4 * math.pi)])
def test_old_ramsey_figures_take_the_programmed_unit_and_sign_on_upgrade(db_url, make_file, unit, size):
    runs = {"minus": (-size, unit), "plus": (size, unit), "none": None}
    with runlog.open(db_url) as catalogue:
        for seed, (key, detuning) in enumerate(runs.items()):
            catalogue.ingest(make_file(table=_ramsey_run(key, detuning, seed)))
            # What a runlog before 0007 stored for a Ramsey fit: the fringe frequency >= 0 in
            # MHz (waits in us), the phase in rad, coherence_time and contrast_at_zero.
            catalogue.save_figures(key, "coherence", [
                Figure("coherence_time", 900.0, "us", stderr=50.0, method="least-squares"),
                Figure("contrast_at_zero", 1.2 if key == "none" else 0.9, "", stderr=0.05, method="least-squares"),
                Figure("detuning", 0.002, "MHz", stderr=0.0001, ci_low=0.0018, ci_high=0.0022, method="least-squares"),
                Figure("phase", 0.3, "rad", stderr=0.02, ci_low=0.26, ci_high=0.34, method="least-squares"),
            ])
        engine = catalogue.engine
        migrate.downgrade(engine, "0013")  # the revision before 0007: old names, old values
        with engine.connect() as connection:
            old = dict(connection.execute(select(s.FigureRow.name, s.FigureRow.unit).join(s.Run).where(s.Run.key == "minus")).all())
        assert old["detuning"] == "MHz" and "ramsey_frequency" not in old
        migrate.upgrade(engine)
        figures = {key: catalogue.run(key).figures for key in runs}
        with engine.connect() as connection:
            records = {(key, name): (value, unit) for key, name, value, unit in connection.execute(
                select(s.Run.key, s.FigureRecord.name, s.FigureRecord.value, s.FigureRecord.unit).join(s.Run, s.Run.id == s.FigureRecord.run_id))}
            rollup = dict(connection.execute(select(s.DailyRollup.name, s.DailyRollup.runs).where(s.DailyRollup.name == "ramsey_contrast")).all())

    minus = figures["minus"]
    assert (minus["ramsey_frequency"]["value"], minus["ramsey_frequency"]["unit"]) == (pytest.approx(-size, rel=1e-12), unit)
    assert minus["ramsey_frequency"]["stderr"] == pytest.approx(0.05 * size, rel=1e-12)
    assert (minus["ramsey_frequency"]["ci_low"], minus["ramsey_frequency"]["ci_high"]) == (pytest.approx(-1.1 * size, rel=1e-12), pytest.approx(-0.9 * size, rel=1e-12))
    # (delta, phi) and (-delta, -phi) are the same fringe: the phase changes sign with it.
    assert minus["ramsey_phase"]["value"] == pytest.approx(-0.3) and (minus["ramsey_phase"]["ci_low"], minus["ramsey_phase"]["ci_high"]) == (pytest.approx(-0.34), pytest.approx(-0.26))
    plus = figures["plus"]
    assert (plus["ramsey_frequency"]["value"], plus["ramsey_frequency"]["unit"]) == (pytest.approx(size, rel=1e-12), unit)
    assert plus["ramsey_phase"]["value"] == pytest.approx(0.3)
    # Without a programmed detuning the frequency stays >= 0 per unit of wait, as a new fit gives it.
    none = figures["none"]
    assert (none["ramsey_frequency"]["value"], none["ramsey_frequency"]["unit"]) == (0.002, "MHz")
    # The records changed with the figures in force; nothing was lost.
    assert records[("minus", "ramsey_frequency")] == (pytest.approx(-size, rel=1e-12), unit)
    assert records[("minus", "ramsey_phase")][0] == pytest.approx(-0.3)
    assert all(figures[key]["t2_star"]["value"] == 900.0 for key in runs)
    # A stored contrast above 1 is flagged and left out of the rollups.
    assert none["ramsey_contrast"]["out_of_range"] is True and "out_of_range" not in minus["ramsey_contrast"]
    assert rollup == {"ramsey_contrast": 2}

    # Running the step again changes nothing (a figure in that unit and sign stays).
    migrate.downgrade(engine, "0009")
    migrate.upgrade(engine)
    with runlog.open(db_url) as catalogue:
        again = {key: catalogue.run(key).figures for key in runs}
    assert again["minus"]["ramsey_frequency"]["value"] == pytest.approx(-size, rel=1e-12)
    assert again["minus"]["ramsey_phase"]["value"] == pytest.approx(-0.3)
    assert again["plus"]["ramsey_frequency"]["value"] == pytest.approx(size, rel=1e-12)
