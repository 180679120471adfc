"""Series across runs in the catalogue: choose the member runs, fit, store, list.

A series takes the current runs that hold shots ``where`` selects (every current run
without a filter), keeps those with the figure ``figure`` in force and the parameter
``parameter`` constant over the run, and fits the figure against the parameter
(:mod:`runlog.figures.across_runs`). Each fit is stored as an immutable record
(``series``), with its fitted figures (``series_values``) and its member runs, their x,
y, standard error and the figure record used (``series_members``); deriving a series of
the same name again adds a record, and the newest is the one in force.
"""

from __future__ import annotations

import datetime as dt
import json
from collections import Counter

import numpy as np
from sqlalchemy import text
from sqlalchemy.engine import Engine

from runlog.errors import FitError, NotFoundError
from runlog.figures.across_runs import SERIES_MODELS, fit_series
from runlog.selection import select_on
from runlog.units import conversion

__all__ = ["derive_series", "series", "series_points"]


def _rows(connection, sql: str, params: dict | None = None) -> list[tuple]:
    return [tuple(row) for row in connection.execute(text(sql), params or {})]


def series_points(connection, figure: str, parameter: str, where: str | None = None) -> dict[str, object]:
    """The member runs of a series and the runs left out (with why), read on ``connection``.

    Returns ``{"members": [...], "left_out": [...], "x_unit", "y_unit"}``; each member is
    ``{"run_id", "run", "apparatus", "analysis", "x", "y", "stderr", "record"}`` with y
    and its error converted to the members' most common figure unit.
    """
    found = _rows(connection, "SELECT id, unit FROM parameters WHERE name = :n", {"n": parameter})
    if not found:
        raise NotFoundError("parameter", parameter)
    parameter_id, x_unit = int(found[0][0]), found[0][1] or ""
    if where is not None and where.strip():
        chosen = sorted({int(r) for r in np.unique(select_on(connection, where, columns=[]).run_ids)})
    else:
        chosen = [int(r) for (r,) in _rows(connection, "SELECT id FROM runs WHERE is_current ORDER BY id")]
    members, left_out = [], []
    for start in range(0, len(chosen), 5000):
        chunk = ",".join(str(r) for r in chosen[start : start + 5000])
        figures = {int(r[0]): r[1:] for r in _rows(connection, f"SELECT run_id, value, stderr, unit, record_id FROM figures WHERE name = :f AND run_id IN ({chunk})", {"f": figure})}
        values = {int(r[0]): r[1:] for r in _rows(connection, f"SELECT run_id, scanned, number_value FROM run_parameters WHERE parameter_id = :p AND run_id IN ({chunk})", {"p": parameter_id})}
        names = {int(r[0]): r[1:] for r in _rows(connection, f"SELECT r.id, r.key, a.name, r.analysis FROM runs r JOIN apparatus a ON a.id = r.apparatus_id WHERE r.id IN ({chunk})")}
        for run_id in chosen[start : start + 5000]:
            key, apparatus, analysis = names[run_id]
            about = {"run": key, "apparatus": apparatus}
            if run_id not in figures:
                left_out.append(about | {"why": f"no figure '{figure}'"})
            elif run_id not in values or values[run_id][1] is None:
                left_out.append(about | {"why": f"no number for parameter '{parameter}'"})
            elif values[run_id][0]:
                left_out.append(about | {"why": f"scans '{parameter}'"})
            else:
                value, stderr, unit, record = figures[run_id]
                members.append({"run_id": run_id, "run": key, "apparatus": apparatus, "analysis": analysis, "x": float(values[run_id][1]), "y": float(value), "stderr": stderr, "unit": unit or "", "record": record})
    y_unit = Counter(m["unit"] for m in members).most_common(1)[0][0] if members else ""
    for member in members:
        factors = conversion(member.pop("unit"), y_unit)
        if factors is None:
            raise FitError("series", f"run '{member['run']}' has '{figure}' in a unit that does not convert to '{y_unit}'")
        member["y"] = member["y"] * factors[0] + factors[1]
        member["stderr"] = None if member["stderr"] is None else member["stderr"] * abs(factors[0])
    members.sort(key=lambda m: (m["x"], m["apparatus"], m["run"]))
    return {"members": members, "left_out": left_out, "x_unit": x_unit, "y_unit": y_unit}


def derive_series(engine: Engine, name: str, figure: str, parameter: str, *, model: str = SERIES_MODELS[0], where: str | None = None) -> dict[str, object]:
    """Fit and store a series (see the module docstring); returns it as :func:`series` lists it.

    The members are read and the record written in one transaction (SQLite takes the
    write lock first), so the members are those of one state of the catalogue.
    """
    from runlog import __version__

    if model not in SERIES_MODELS:
        raise NotFoundError("series model", model, f"known: {', '.join(SERIES_MODELS)}")
    if not name or not name.strip():
        raise ValueError("a series needs a name")
    options = {"isolation_level": "REPEATABLE READ"} if engine.dialect.name == "postgresql" else {"sqlite_begin": "IMMEDIATE"}
    with engine.connect().execution_options(**options) as connection:
        with connection.begin():
            points = series_points(connection, figure, parameter, where)
            members = points["members"]
            if len(members) < 3:
                raise FitError("series", f"{len(members)} runs with '{figure}' and a constant '{parameter}'; a series needs at least 3")
            fit = fit_series(
                [m["x"] for m in members], [m["y"] for m in members], [m["stderr"] for m in members], model=model, x_unit=points["x_unit"], y_unit=points["y_unit"]
            )
            now = dt.datetime.now(dt.timezone.utc)
            stamp = now if engine.dialect.name != "sqlite" else _epoch_us(now)
            recorded = {"params": list(fit.params), "weighted": fit.weighted, "left_out": points["left_out"]}
            series_id = int(
                _rows(
                    connection,
                    "INSERT INTO series (name, figure, parameter, parameter_unit, figure_unit, model, where_text, points, chi_square, degrees_of_freedom, options, method, method_version, runlog_version, computed_at) "
                    "VALUES (:n, :f, :p, :pu, :fu, :m, :w, :k, :chi, :dof, :o, :method, :mv, :v, :at) RETURNING id",
                    {
                        "n": name.strip(), "f": figure, "p": parameter, "pu": points["x_unit"], "fu": points["y_unit"], "m": model, "w": where, "k": len(members),
                        "chi": fit.chi_square, "dof": fit.degrees_of_freedom, "o": json.dumps(recorded, sort_keys=True), "method": fit.figures[0].method,
                        "mv": fit.figures[0].method_version, "v": __version__, "at": stamp,
                    },
                )[0][0]
            )
            for value in fit.figures:
                connection.execute(
                    text("INSERT INTO series_values (series_id, name, value, stderr, unit) VALUES (:s, :n, :v, :e, :u)"),
                    {"s": series_id, "n": value.name, "v": value.value, "e": value.stderr, "u": value.unit},
                )
            for member in members:
                connection.execute(
                    text("INSERT INTO series_members (series_id, run_id, record_id, x, y, stderr) VALUES (:s, :r, :rec, :x, :y, :e)"),
                    {"s": series_id, "r": member["run_id"], "rec": member["record"], "x": member["x"], "y": member["y"], "e": member["stderr"]},
                )
        return _series_of(connection, series_id)


def _epoch_us(value: dt.datetime) -> int:
    from runlog.store.schema import to_epoch_us

    return to_epoch_us(value)


def _series_of(connection, series_id: int) -> dict[str, object]:
    from runlog.store.rollups import as_datetime

    (row,) = _rows(
        connection,
        "SELECT id, name, figure, parameter, parameter_unit, figure_unit, model, where_text, points, chi_square, degrees_of_freedom, options, method, method_version, runlog_version, computed_at FROM series WHERE id = :i",
        {"i": series_id},
    )
    options = json.loads(row[11]) if row[11] else {}
    values = {
        n: {"value": v, "stderr": e, "unit": u or "", "method": row[12]}
        for n, v, e, u in _rows(connection, "SELECT name, value, stderr, unit FROM series_values WHERE series_id = :i ORDER BY name", {"i": series_id})
    }
    members = [
        {"run": key, "apparatus": apparatus, "analysis": analysis, "x": x, "y": y, "stderr": e, "record": None if record is None else int(record)}
        for key, apparatus, analysis, x, y, e, record in _rows(
            connection,
            "SELECT r.key, a.name, r.analysis, m.x, m.y, m.stderr, m.record_id FROM series_members m JOIN runs r ON r.id = m.run_id "
            "JOIN apparatus a ON a.id = r.apparatus_id WHERE m.series_id = :i ORDER BY m.x, a.name, r.key",
            {"i": series_id},
        )
    ]
    return {
        "id": int(row[0]),
        "name": row[1],
        "figure": row[2],
        "parameter": row[3],
        "x_unit": row[4] or "",
        "y_unit": row[5] or "",
        "model": row[6],
        "where": row[7],
        "points": int(row[8]),
        "chi_square": row[9],
        "degrees_of_freedom": int(row[10]),
        "params": options.get("params", []),
        "left_out": options.get("left_out", []),
        "method": row[12],
        "method_version": row[13],
        "runlog_version": row[14],
        "computed_at": as_datetime(row[15]).isoformat(),
        "values": values,
        "members": members,
    }


def series(connection, name: str | None = None, *, history: bool = False) -> list[dict[str, object]]:
    """The series in force (the newest record of each name), or every record of ``name``
    newest first with ``history``; each with its fitted values and member runs."""
    if name is not None:
        ids = [int(i) for (i,) in _rows(connection, "SELECT id FROM series WHERE name = :n ORDER BY id DESC", {"n": name})]
        if not ids:
            known = [n for (n,) in _rows(connection, "SELECT DISTINCT name FROM series ORDER BY name")]
            raise NotFoundError("series", name, f"series: {', '.join(known)}" if known else "none derived yet (runlog derive --series NAME ...)")
        ids = ids if history else ids[:1]
    else:
        ids = [int(i) for (i,) in _rows(connection, "SELECT MAX(id) FROM series GROUP BY name ORDER BY name")]
    return [_series_of(connection, i) for i in ids]
