"""measurement columns made ahead of their names, in blocks on PostgreSQL

A measurement's values stay the column ``m_<id>`` of ``shot_measurements``; from this
revision on a column may exist before the name that will use it (runlog.store.measurement_columns).
On PostgreSQL, where ``shot_measurements`` is partitioned by month and each new column
changes every month, columns come in blocks of 64: this revision makes the rest of the
catalogue's current block (``m_1`` .. ``m_64`` when it has no measurement yet), so that its
next new names are rows of ``measurements`` only. No row changes. SQLite keeps one column a
name; nothing changes there.

Runlog before this revision makes a name's column when it makes the name, and would fail on
a column made ahead: the revision keeps it away from such a catalogue. The downgrade drops
the columns no name uses.

Revision ID: 0015
Revises: 0016
Create Date: 2026-12-02
"""
import re
from typing import Sequence, Union

from alembic import op


revision: str = '0015'
down_revision: Union[str, None] = '0016'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None

_BLOCK = 64
_MOST = 1500  # runlog.contract.MAX_MEASUREMENTS at this revision
_COLUMN = re.compile(r"m_(\d+)")


def _present(bind) -> set[int]:
    names = bind.exec_driver_sql(
        "SELECT attname FROM pg_attribute WHERE attrelid = to_regclass('shot_measurements') AND attnum > 0 AND NOT attisdropped"
    ).scalars().all()
    return {int(found.group(1)) for name in names if (found := _COLUMN.fullmatch(name))}


def upgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name != "postgresql":
        return
    present = _present(bind)
    named = bind.exec_driver_sql("SELECT COALESCE(MAX(id), 0) FROM measurements").scalar_one()
    highest = max([int(named), *present])
    end = max(_BLOCK, -(-highest // _BLOCK) * _BLOCK)
    made = [k for k in range(1, min(end, _MOST) + 1) if k not in present]
    if made:
        bind.exec_driver_sql("ALTER TABLE shot_measurements " + ", ".join(f"ADD COLUMN m_{k} DOUBLE PRECISION" for k in made))


def downgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name != "postgresql":
        return
    named = set(bind.exec_driver_sql("SELECT id FROM measurements").scalars().all())
    unused = sorted(k for k in _present(bind) if k not in named)
    if unused:
        bind.exec_driver_sql("ALTER TABLE shot_measurements " + ", ".join(f"DROP COLUMN m_{k}" for k in unused))
