"""shot-level intervals of counting figures; shots left out by status

Counting figures (fill fraction, survival, loss) get the pooled binomial interval as
``binomial_ci_low``/``binomial_ci_high``/``binomial_method`` and the sums over shots of the
shot-level interval (``counted_shots``, ``successes_squares``, ``trials_squares``,
``successes_trials``; runlog.figures.shot_level); daily rollups get the same sums. The data
step recomputes, from the stored occupancy, the sums of every counting figure in force and
replaces its ``ci_low``/``ci_high``/``stderr`` by the shot-level ones (the figure's value and
counts do not change: every stored shot counted before this revision, so ``runs.excluded_shots``
starts at 0); the figure's record is given the same columns, and the rollups are rebuilt.

Revision ID: 0009
Revises: 0007
Create Date: 2026-12-02
"""
from typing import Sequence, Union

import numpy as np
from alembic import op
import sqlalchemy as sa


revision: str = '0009'
down_revision: Union[str, None] = '0007'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    with op.batch_alter_table('daily_rollups', schema=None) as batch_op:
        batch_op.add_column(sa.Column('counted_shots', sa.BigInteger(), nullable=True))
        batch_op.add_column(sa.Column('successes_squares', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('trials_squares', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('successes_trials', sa.Float(), nullable=True))

    with op.batch_alter_table('figure_records', schema=None) as batch_op:
        batch_op.add_column(sa.Column('binomial_ci_low', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('binomial_ci_high', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('binomial_method', sa.String(length=100), nullable=True))
        batch_op.add_column(sa.Column('counted_shots', sa.BigInteger(), nullable=True))
        batch_op.add_column(sa.Column('successes_squares', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('trials_squares', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('successes_trials', sa.Float(), nullable=True))

    with op.batch_alter_table('figures', schema=None) as batch_op:
        batch_op.add_column(sa.Column('binomial_ci_low', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('binomial_ci_high', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('binomial_method', sa.String(length=100), nullable=True))
        batch_op.add_column(sa.Column('counted_shots', sa.BigInteger(), nullable=True))
        batch_op.add_column(sa.Column('successes_squares', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('trials_squares', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('successes_trials', sa.Float(), nullable=True))

    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.add_column(sa.Column('excluded_shots', sa.Integer(), server_default='0', nullable=False))

    _recompute(op.get_bind())


_ROLLUP = """
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


def _matrix(bind, run_id: int, image_id: int, sites: int) -> np.ndarray:
    rows = bind.execute(
        sa.text("SELECT o.bits FROM occupancy o JOIN shots s ON s.id = o.shot_id WHERE s.run_id = :r AND o.image_id = :i ORDER BY s.id"),
        {"r": run_id, "i": image_id},
    ).all()
    if not rows:
        return np.zeros((0, sites), dtype=bool)
    packed = np.stack([np.frombuffer(bytes(bits), dtype=np.uint8) for (bits,) in rows])
    return np.unpackbits(packed, axis=1, count=sites).astype(bool)


def _recompute(bind) -> None:
    # The arithmetic is the shot-level interval of runlog.figures.shot_level at this
    # revision, written out here so that a later change there cannot change this step.
    from statistics import NormalDist
    from scipy.special import stdtrit

    z = NormalDist().inv_cdf(0.975)
    bind.execute(sa.text(
        "UPDATE figures SET binomial_ci_low = ci_low, binomial_ci_high = ci_high, binomial_method = method WHERE kind = 'counting' AND name IN ('fill_fraction', 'survival', 'loss')"
    ))
    bind.execute(sa.text(
        "UPDATE figure_records SET binomial_ci_low = ci_low, binomial_ci_high = ci_high, binomial_method = method WHERE kind = 'counting' AND name IN ('fill_fraction', 'survival', 'loss')"
    ))
    runs = bind.execute(sa.text("SELECT DISTINCT run_id FROM figures WHERE kind = 'counting' AND name IN ('fill_fraction', 'survival', 'loss')")).all()
    for (run_id,) in runs:
        images = {role: (int(i), int(n)) for i, role, n in bind.execute(sa.text("SELECT id, role, sites FROM images WHERE run_id = :r AND role IN ('loading', 'survival')"), {"r": run_id})}
        if "loading" not in images:
            continue
        loaded = _matrix(bind, run_id, *images["loading"])
        per_shot = {"fill_fraction": (loaded.sum(axis=1), np.full(len(loaded), loaded.shape[1]))}
        if "survival" in images and images["survival"][1] == images["loading"][1]:
            kept = _matrix(bind, run_id, *images["survival"])
            if kept.shape == loaded.shape:
                y, x = (loaded & kept).sum(axis=1), loaded.sum(axis=1)
                per_shot["survival"] = (y, x)
                per_shot["loss"] = (x - y, x)
        for name, (y, x) in per_shot.items():
            y, x = y.astype(np.float64), x.astype(np.float64)
            n, total = len(y), float(x.sum())
            row = {"r": run_id, "n": name, "shots": n, "y2": float(y @ y), "x2": float(x @ x), "xy": float(x @ y), "stderr": None, "low": None, "high": None}
            if n >= 2 and total > 0:
                ratio = float(y.sum()) / total
                variance = max(float(((y - ratio * x) ** 2).sum()), 0.0) * n / ((n - 1) * total * total)
                binomial = ratio * (1 - ratio) / total
                effect = max(1.0, variance / binomial) if binomial > 0 else 1.0
                effective = total / effect * (z / float(stdtrit(n - 1, 0.975))) ** 2
                centre = (ratio + z * z / (2 * effective)) / (1 + z * z / effective)
                half = z * np.sqrt(ratio * (1 - ratio) / effective + z * z / (4 * effective * effective)) / (1 + z * z / effective)
                row["low"] = 0.0 if y.sum() == 0 else max(0.0, centre - half)
                row["high"] = 1.0 if y.sum() == total else min(1.0, centre + half)
                row["stderr"] = float(np.sqrt(max(variance, binomial)))
            for table, key in (("figures", "run_id = :r AND name = :n"), ("figure_records", "id = (SELECT record_id FROM figures WHERE run_id = :r AND name = :n)")):
                bind.execute(sa.text(
                    f"UPDATE {table} SET counted_shots = :shots, successes_squares = :y2, trials_squares = :x2, successes_trials = :xy, "
                    f"stderr = :stderr, ci_low = :low, ci_high = :high, method = 'shot-ratio', method_version = '2' "
                    f"WHERE kind = 'counting' AND {key}"
                ), row)
    bind.execute(sa.text("DELETE FROM daily_rollups"))
    bind.execute(sa.text(_ROLLUP))


def downgrade() -> None:
    # Before this revision ci_low/ci_high of a counting figure were the pooled binomial ones.
    for table in ("figures", "figure_records"):
        op.execute(f"UPDATE {table} SET ci_low = binomial_ci_low, ci_high = binomial_ci_high, method = binomial_method, method_version = '1' WHERE binomial_method IS NOT NULL")
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.drop_column('excluded_shots')

    with op.batch_alter_table('figures', schema=None) as batch_op:
        batch_op.drop_column('successes_trials')
        batch_op.drop_column('trials_squares')
        batch_op.drop_column('successes_squares')
        batch_op.drop_column('counted_shots')
        batch_op.drop_column('binomial_method')
        batch_op.drop_column('binomial_ci_high')
        batch_op.drop_column('binomial_ci_low')

    with op.batch_alter_table('figure_records', schema=None) as batch_op:
        batch_op.drop_column('successes_trials')
        batch_op.drop_column('trials_squares')
        batch_op.drop_column('successes_squares')
        batch_op.drop_column('counted_shots')
        batch_op.drop_column('binomial_method')
        batch_op.drop_column('binomial_ci_high')
        batch_op.drop_column('binomial_ci_low')

    with op.batch_alter_table('daily_rollups', schema=None) as batch_op:
        batch_op.drop_column('successes_trials')
        batch_op.drop_column('trials_squares')
        batch_op.drop_column('successes_squares')
        batch_op.drop_column('counted_shots')
