"""distinct figure names: one name, one meaning

Renames what is stored under names that stood for different physics (docs/figures.md):

- Ramsey fits (kind ``coherence`` with a fringe frequency): ``coherence_time`` -> ``t2_star``,
  ``contrast_at_zero`` -> ``ramsey_contrast``, ``detuning`` -> ``ramsey_frequency``,
  ``phase`` -> ``ramsey_phase``;
- contrast-envelope fits (kind ``coherence`` without one): ``coherence_time`` ->
  ``envelope_time``, ``contrast_at_zero`` -> ``envelope_contrast``;
- spin echo (kind ``echo``): ``contrast_at_zero`` -> ``echo_contrast`` (``t2`` and
  ``stretch`` keep their names);
- fringe fits (kind ``fringe``): ``phase`` -> ``fringe_phase``.

Figures in force and their records, daily rollups (made again from the renamed figures),
alarms (by the figures of their apparatus and sequence), series across runs, and the filters of pins and series
(``coherence_time`` and ``contrast_at_zero`` only: ``detuning`` and ``phase`` are also
parameter names) are renamed; nothing is deleted. A stored ``ramsey_frequency`` keeps its
value and unit (the fringe frequency, >= 0, per unit of wait); a new fit gives it in the
programmed detuning's unit and sign.

Revision ID: 0007
Revises: 0013
Create Date: 2026-12-02
"""
import re
from typing import Sequence, Union

from alembic import op
import sqlalchemy as sa


revision: str = '0007'
down_revision: Union[str, None] = '0013'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None

# (kind, old, new, whether the run must have a Ramsey fringe frequency: True, False, None = either)
_FIGURES = (
    ("coherence", "coherence_time", "t2_star", True),
    ("coherence", "contrast_at_zero", "ramsey_contrast", True),
    ("coherence", "phase", "ramsey_phase", True),
    ("coherence", "coherence_time", "envelope_time", False),
    ("coherence", "contrast_at_zero", "envelope_contrast", False),
    ("echo", "contrast_at_zero", "echo_contrast", None),
    ("fringe", "phase", "fringe_phase", None),
    ("coherence", "detuning", "ramsey_frequency", None),
)
# Texts of filters: only names that are never a parameter's.
_TEXTS = (("coherence_time", "t2_star"), ("contrast_at_zero", "ramsey_contrast"))


def _rename_figures(table: str, figures: tuple) -> None:
    for kind, old, new, ramsey in figures:
        where = "kind = :kind AND name = :old"
        frequency = f"SELECT run_id FROM {table} WHERE kind = 'coherence' AND name IN ('detuning', 'ramsey_frequency')"
        if ramsey is True:
            where += f" AND run_id IN ({frequency})"
        elif ramsey is False:
            where += f" AND run_id NOT IN ({frequency})"
        op.execute(sa.text(f"UPDATE {table} SET name = :new WHERE {where}").bindparams(kind=kind, old=old, new=new))


# The daily rollup of a name, as runlog.store.rollups makes it at this revision (copied:
# a released revision must not change when that module does).
_AGGREGATE = """
INSERT INTO daily_rollups (apparatus_id, day, sequence, name, unit, runs, shots, successes, trials,
                           value_count, value_sum, value_square_sum, weight_sum, weighted_value_sum,
                           weighted_square_sum)
SELECT r.apparatus_id, r.day, r.sequence, f.name, MAX(f.unit), COUNT(*), SUM(r.shot_count),
       SUM(f.successes), SUM(f.trials), COUNT(f.value), SUM(f.value), SUM(f.value * f.value),
       SUM(CASE WHEN f.stderr > 0 THEN 1.0 / (f.stderr * f.stderr) END),
       SUM(CASE WHEN f.stderr > 0 THEN f.value / (f.stderr * f.stderr) END),
       SUM(CASE WHEN f.stderr > 0 THEN f.value * f.value / (f.stderr * f.stderr) END)
FROM figures f JOIN runs r ON r.id = f.run_id
WHERE r.is_current AND r.day IS NOT NULL AND f.name IN ({names})
GROUP BY r.apparatus_id, r.day, r.sequence, f.name
"""


def _rename_by_group(pairs: tuple) -> None:
    """Rollups of the old and new names are made again from the renamed figures (a day's
    group may pool a fringe and a Ramsey ``phase``: the two now have rollups of their own).
    Alarms and series carry a name but no kind: each takes the new name that the figures of
    its apparatus and sequence hold."""
    names = sorted({name for pair in pairs for name in pair})
    listed = ", ".join(f"'{name}'" for name in names)  # constants of this file, not input
    op.execute(sa.text(f"DELETE FROM daily_rollups WHERE name IN ({listed})"))
    op.execute(sa.text(_AGGREGATE.format(names=listed)))
    for old, new in pairs:
        op.execute(sa.text(
            "UPDATE alarms SET quantity = :new WHERE quantity = :old AND EXISTS ("
            " SELECT 1 FROM figures f JOIN runs r ON r.id = f.run_id WHERE f.name = :new"
            " AND r.apparatus_id = alarms.apparatus_id AND (alarms.sequence = '' OR r.sequence = alarms.sequence))"
        ).bindparams(old=old, new=new))
        op.execute(sa.text(
            "UPDATE series SET figure = :new WHERE figure = :old AND EXISTS (SELECT 1 FROM figures f WHERE f.name = :new)"
        ).bindparams(old=old, new=new))


def _rewrite_texts(pairs: tuple) -> None:
    connection = op.get_bind()
    for table in ("pins", "series"):
        rows = connection.execute(sa.text(f"SELECT id, where_text FROM {table} WHERE where_text IS NOT NULL")).fetchall()
        for row_id, text in rows:
            new_text = text
            for old, new in pairs:
                new_text = re.sub(rf"(?<![A-Za-z0-9_.]){old}(?![A-Za-z0-9_])", new, new_text)
                new_text = new_text.replace(f"f.{old}", f"f.{new}")
            if new_text != text:
                connection.execute(sa.text(f"UPDATE {table} SET where_text = :t WHERE id = :i"), {"t": new_text, "i": row_id})


def upgrade() -> None:
    for table in ("figure_records", "figures"):
        _rename_figures(table, _FIGURES)
    _rename_by_group(tuple((old, new) for _, old, new, _ in _FIGURES))
    _rewrite_texts(_TEXTS)


def downgrade() -> None:
    back = tuple((kind, new, old, None) for kind, old, new, _ in _FIGURES)
    for table in ("figure_records", "figures"):
        _rename_figures(table, back)
    pairs = tuple((new, old) for _, old, new, _ in _FIGURES)
    names = ", ".join(f"'{name}'" for name in sorted({name for pair in pairs for name in pair}))
    op.execute(sa.text(f"DELETE FROM daily_rollups WHERE name IN ({names})"))
    op.execute(sa.text(_AGGREGATE.format(names=names)))
    for old, new in pairs:
        op.execute(sa.text("UPDATE alarms SET quantity = :new WHERE quantity = :old").bindparams(old=old, new=new))
        op.execute(sa.text("UPDATE series SET figure = :new WHERE figure = :old").bindparams(old=old, new=new))
    _rewrite_texts(tuple((new, old) for old, new in _TEXTS))
