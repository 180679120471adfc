"""contrast out of range; Ramsey frequency in the programmed detuning's unit; day sums by arithmetic

- ``figures.out_of_range`` / ``figure_records.out_of_range``: a fitted value outside its
  physical range, kept as fitted and left out of rollups and drift. Stored contrasts
  (``ramsey_contrast``, ``envelope_contrast``, ``echo_contrast``, the fringe and Rabi
  ``contrast``)
  outside [0, 1] are flagged: the relative contrast of a non-negative signal cannot exceed
  1, and the shots are not read again here.
- A Ramsey frequency stored before 0007 (``detuning``, renamed ``ramsey_frequency`` by 0007
  with value and unit kept) is the fringe frequency >= 0 per unit of wait (MHz for waits
  in us). Where the run's programmed ``detuning`` is stored (a constant number), it is
  recomputed as a new fit gives it: in that parameter's unit (angular units with the 2π,
  through runlog.units) and with its sign; ``ramsey_phase`` changes sign with it, and the
  interval ends and stderr are carried along. In the figures in force and their records;
  a figure already in that unit with that sign is left as it is (so the step can run
  again); a unit that does not convert leaves the figure as it was.
- ``daily_rollups`` gets the sums a day's point is made of in every arithmetic
  (runlog.drift.pooling): the number of runs with a stderr, the sums of cos and sin of a
  phase, of ln T of a time; all rollups are made again, without flagged figures.

Revision ID: 0016
Revises: 0009
Create Date: 2026-12-02
"""
import math
from typing import Sequence, Union

from alembic import op
import sqlalchemy as sa


revision: str = '0016'
down_revision: Union[str, None] = '0009'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None

_CONTRASTS = "(name IN ('ramsey_contrast', 'envelope_contrast', 'echo_contrast') OR (kind IN ('fringe', 'rabi') AND name = 'contrast'))"
_ROLLUP_COLUMNS = (
    ("weighted_count", sa.Integer()), ("cosine_sum", sa.Float()), ("sine_sum", sa.Float()),
    ("weighted_cosine_sum", sa.Float()), ("weighted_sine_sum", sa.Float()), ("positive_count", sa.Integer()),
    ("log_sum", sa.Float()), ("log_square_sum", sa.Float()), ("log_weight_sum", sa.Float()),
    ("weighted_log_sum", sa.Float()), ("weighted_log_square_sum", sa.Float()),
)


def upgrade() -> None:
    for table in ('figure_records', 'figures'):
        with op.batch_alter_table(table, schema=None) as batch_op:
            batch_op.add_column(sa.Column('out_of_range', sa.Boolean(), server_default=sa.false(), nullable=False))
    with op.batch_alter_table('daily_rollups', schema=None) as batch_op:
        for name, kind in _ROLLUP_COLUMNS:
            batch_op.add_column(sa.Column(name, kind, nullable=True))
    bind = op.get_bind()
    for table in ('figure_records', 'figures'):
        bind.execute(sa.text(f"UPDATE {table} SET out_of_range = :t WHERE {_CONTRASTS} AND (value > 1 OR value < 0)"), {"t": True})
    _ramsey_frequencies(bind)
    _rebuild_rollups(bind)


def _ramsey_frequencies(bind) -> None:
    from runlog.units import UnitError, converter

    programmed = {
        int(run_id): (float(value), unit or "")
        for run_id, value, unit in bind.execute(sa.text(
            "SELECT rp.run_id, rp.number_value, p.unit FROM run_parameters rp JOIN parameters p ON p.id = rp.parameter_id "
            "WHERE p.name = 'detuning' AND p.kind = 'number' AND rp.number_value IS NOT NULL AND NOT rp.scanned"
        ))
    }
    for table, pair in (("figures", "run_id = :r"), ("figure_records", "run_id = :r AND computed_at = :at")):
        rows = bind.execute(sa.text(f"SELECT id, run_id, value, stderr, ci_low, ci_high, unit, computed_at FROM {table} WHERE kind = 'coherence' AND name = 'ramsey_frequency'")).all()
        for row_id, run_id, value, stderr, low, high, unit, at in rows:
            if int(run_id) not in programmed:
                continue
            detuning, target = programmed[int(run_id)]
            try:
                found = converter(unit or "", target)
            except UnitError:
                continue
            if found.log or found.offset or not found.scale > 0:
                continue
            sign = -1.0 if detuning < 0 else 1.0
            # Signed as the programmed detuning: flip a value of the other sign (an old,
            # unsigned one); a value already signed so stays.
            flip = value != 0 and (value < 0) != (sign < 0)
            factor = found.scale * (-1.0 if flip else 1.0)
            if factor == 1.0 and (unit or "") == target:
                continue
            ends = None if low is None else sorted((low * factor, high * factor))
            bind.execute(sa.text(f"UPDATE {table} SET value = :v, stderr = :e, ci_low = :lo, ci_high = :hi, unit = :u WHERE id = :i"), {
                "v": float(found(value * (-1.0 if flip else 1.0))), "e": None if stderr is None else abs(found.scale) * stderr,
                "lo": None if ends is None else ends[0], "hi": None if ends is None else ends[1], "u": target, "i": row_id,
            })
            if flip:
                # The phase changes sign with the frequency ((delta, phi) and (-delta, -phi) are one curve).
                bind.execute(sa.text(
                    f"UPDATE {table} SET value = CASE WHEN value = :pi THEN value ELSE -value END, ci_low = -ci_high, ci_high = -ci_low "
                    f"WHERE kind = 'coherence' AND name = 'ramsey_phase' AND {pair}"
                ), {"r": run_id, "at": at, "pi": math.pi})


# The day sums of runlog.drift.pooling at this revision, written out here so that a later
# change there cannot change this step.
_SUMS = (
    "runs", "shots", "successes", "trials", "counted_shots", "successes_squares", "trials_squares", "successes_trials",
    "value_count", "value_sum", "value_square_sum", "weighted_count", "weight_sum", "weighted_value_sum", "weighted_square_sum",
    "cosine_sum", "sine_sum", "weighted_cosine_sum", "weighted_sine_sum",
    "positive_count", "log_sum", "log_square_sum", "log_weight_sum", "weighted_log_sum", "weighted_log_square_sum",
)


def _arithmetic(unit: str) -> tuple[str, float]:
    from runlog.units import registry

    if not unit:
        return "linear", 1.0
    try:
        factor, root = registry().get_root_units(unit)
    except Exception:  # pint raises several unrelated types for a unit it does not know
        return "linear", 1.0
    if str(root) == "radian":
        return "circular", float(factor)
    if str(root) == "second":
        return "logarithmic", 1.0
    return "linear", 1.0


def _run_sums(row, arithmetic: str, to_rad: float) -> dict:
    _, _, value, stderr, shots, *counts = row
    weighted = stderr is not None and math.isfinite(stderr) and stderr > 0
    weight = 1.0 / stderr**2 if weighted else 0.0
    out = dict.fromkeys(_SUMS)
    out.update(zip(_SUMS[2:8], counts))
    out.update(runs=1, shots=int(shots or 0), value_count=1, value_sum=value, value_square_sum=value * value,
               weighted_count=int(weighted), weight_sum=weight, weighted_value_sum=weight * value, weighted_square_sum=weight * value * value)
    if arithmetic == "circular":
        angle = value * to_rad
        out.update(cosine_sum=math.cos(angle), sine_sum=math.sin(angle), weighted_cosine_sum=weight * math.cos(angle), weighted_sine_sum=weight * math.sin(angle))
    elif arithmetic == "logarithmic":
        positive = value > 0
        log = math.log(value) if positive else 0.0
        log_weight = (value / stderr) ** 2 if weighted and positive else 0.0
        out.update(positive_count=int(positive), log_sum=log, log_square_sum=log * log, log_weight_sum=log_weight,
                   weighted_log_sum=log_weight * log, weighted_log_square_sum=log_weight * log * log)
    return out


def _rebuild_rollups(bind) -> None:
    bind.execute(sa.text("DELETE FROM daily_rollups"))
    rows = bind.execute(sa.text(
        "SELECT r.apparatus_id, r.day, r.sequence, f.name, f.unit, f.value, f.stderr, r.shot_count, f.successes, f.trials, "
        "f.counted_shots, f.successes_squares, f.trials_squares, f.successes_trials "
        "FROM figures f JOIN runs r ON r.id = f.run_id WHERE r.is_current AND r.day IS NOT NULL AND NOT f.out_of_range ORDER BY r.id"
    )).all()
    groups: dict = {}
    for row in rows:
        groups.setdefault(tuple(row[:4]), []).append(row[4:])
    columns = ("apparatus_id", "day", "sequence", "name", "unit", *_SUMS)
    insert = sa.text(f"INSERT INTO daily_rollups ({', '.join(columns)}) VALUES ({', '.join(':' + c for c in columns)})")
    for (apparatus_id, day, sequence, name), found in groups.items():
        unit = max((r[0] or "") for r in found)
        arithmetic, to_rad = _arithmetic(unit)
        total = None
        for part in (_run_sums(r, arithmetic, to_rad) for r in found):
            if total is None:
                total = part
                continue
            total = {k: None if total[k] is None or part[k] is None else total[k] + part[k] for k in _SUMS}
        bind.execute(insert, {"apparatus_id": apparatus_id, "day": day, "sequence": sequence, "name": name, "unit": unit, **total})


# The rollups as 0009 made them.
_ROLLUP_0009 = """
INSERT INTO daily_rollups (apparatus_id, day, sequence, name, unit, runs, shots, successes, trials,
                           counted_shots, successes_squares, trials_squares, successes_trials,
                           value_count, value_sum, value_square_sum, weight_sum, weighted_value_sum,
                           weighted_square_sum)
SELECT r.apparatus_id, r.day, r.sequence, f.name, MAX(f.unit), COUNT(*), SUM(r.shot_count),
       SUM(f.successes), SUM(f.trials),
       SUM(f.counted_shots), SUM(f.successes_squares), SUM(f.trials_squares), SUM(f.successes_trials),
       COUNT(f.value), SUM(f.value), SUM(f.value * f.value),
       SUM(CASE WHEN f.stderr > 0 THEN 1.0 / (f.stderr * f.stderr) END),
       SUM(CASE WHEN f.stderr > 0 THEN f.value / (f.stderr * f.stderr) END),
       SUM(CASE WHEN f.stderr > 0 THEN f.value * f.value / (f.stderr * f.stderr) END)
FROM figures f JOIN runs r ON r.id = f.run_id
WHERE r.is_current AND r.day IS NOT NULL
GROUP BY r.apparatus_id, r.day, r.sequence, f.name
"""


def downgrade() -> None:
    # Recomputed Ramsey frequencies stay in the programmed detuning's unit and sign: that
    # is a Ramsey frequency at 0009 too (a new fit there gives it so).
    with op.batch_alter_table('daily_rollups', schema=None) as batch_op:
        for name, _ in reversed(_ROLLUP_COLUMNS):
            batch_op.drop_column(name)
    for table in ('figures', 'figure_records'):
        with op.batch_alter_table(table, schema=None) as batch_op:
            batch_op.drop_column('out_of_range')
    op.execute(sa.text("DELETE FROM daily_rollups"))
    op.execute(sa.text(_ROLLUP_0009))
