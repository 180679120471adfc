"""The filter language: which shots, in a line of text, compiled to SQL with bound values.

A filter reads like ``apparatus = 'lattice-east' and wait between 100 us and 0.5 ms and
fill_fraction > 0.45``. This module owns its grammar (parsed with lark into a small,
pure syntax tree, :func:`parse`) and its meaning (:func:`compile_filter`: a SQLAlchemy
condition over the ``shots`` table). Values are always bound parameters; names are looked
up in the catalogue and never reach the SQL text; measurement columns are named from
integer ids. The full language is in ``docs/filters.md``.

Meaning, in short:

* names are run fields (``run``, ``apparatus``, ``sequence``, ``operator``, ``tag``),
  shot fields (``shot``, ``status``, ``time``, ``date`` = the lab day of the shot in the
  catalogue's lab time zone), parameters, measurements, the stored figures of the run and
  monitors (the as-of value of the monitor of the shot's apparatus at the shot's time,
  :mod:`runlog.monitors.align`); ``p.``, ``m.``, ``f.`` and ``monitor.`` pick a parameter,
  measurement, figure or monitor when names collide;
* a number may carry a unit; it is converted with pint to the unit the catalogue stores
  (without one, it is taken to be in the stored unit);
* a shot lacking a value (a parameter it does not have, a measurement not made, a run
  without that figure or operator) never matches a comparison on it, ``!=`` and ``not in``
  included; ``not`` negates the whole comparison, so ``not wait > 5`` does match it;
* parameters are checked in two steps, as they are stored: runs are pruned on
  ``run_parameters`` (a constant value, or a scanned range that can hold a match), then
  single shots are checked on ``shot_parameters`` only inside runs where it is scanned.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import difflib
import re
import unicodedata
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field, replace
from functools import lru_cache
from typing import Union
from zoneinfo import ZoneInfo

from sqlalchemy import (
    BigInteger,
    Column,
    DateTime,
    Interval,
    ColumnElement,
    Float,
    MetaData,
    Table,
    and_,
    bindparam,
    literal_column,
    exists,
    false,
    func,
    not_,
    literal,
    or_,
    select,
    true,
    type_coerce,
)
from sqlalchemy import text as sql_text
from sqlalchemy.engine import Connection, Engine

from runlog.errors import FilterError
from runlog.monitors.align import MAX_GAP_SECONDS
from runlog.store import schema as s
from runlog.store.partitions import SHOT_PARAMETERS_WITH_TIME
from runlog.times import day_start_utc
from runlog.units import UnitError, check_unit, converter

__all__ = [
    "MAX_LENGTH",
    "MAX_DEPTH",
    "RUN_FIELDS",
    "SHOT_FIELDS",
    "Value",
    "Comparison",
    "And",
    "Or",
    "Not",
    "Filter",
    "CompiledFilter",
    "parse",
    "compile_filter",
    "compile_selection",
    "known_names",
    "as_of_value",
    "FigureNames",
]

#: Longest filter text accepted, in characters.
MAX_LENGTH = 2000
#: Deepest nesting accepted, of parentheses and of ``and``/``or``/``not`` each.
MAX_DEPTH = 32

#: Fields of the run a shot belongs to.
RUN_FIELDS = ("run", "apparatus", "sequence", "operator", "tag")
#: Fields of the shot itself.
SHOT_FIELDS = ("shot", "status", "time", "date")

_BARE_NAME_PATTERN = re.compile(r"[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)?")
_KEYWORDS = frozenset({"and", "or", "not", "in", "between", "true", "false"})
_TEXT_OPERATORS = frozenset({"=", "!=", "in", "not in"})
_ORDER_OPERATORS = frozenset({"=", "!=", "<", "<=", ">", ">=", "between", "in", "not in"})

# --- the syntax tree ----------------------------------------------------------------


@dataclass(frozen=True)
class Value:
    """A literal: a number (with its unit, if written), a quoted text or true/false."""

    value: float | str | bool
    unit: str | None
    position: int

    @property
    def kind(self) -> str:
        if isinstance(self.value, bool):
            return "boolean"
        return "text" if isinstance(self.value, str) else "number"

    def __str__(self) -> str:
        if self.kind == "text":
            return "'" + str(self.value).replace("'", "''") + "'"
        if self.kind == "boolean":
            return "true" if self.value else "false"
        return f"{self.value!r} {self.unit}" if self.unit else repr(self.value)


@dataclass(frozen=True)
class Comparison:
    """``name operator values``; ``operator`` is one of ``= != < <= > >= between in``
    and ``not in``; ``between`` has two values, ``in``/``not in`` one or more."""

    name: str
    operator: str
    values: tuple[Value, ...]
    position: int

    def __str__(self) -> str:
        name = self.name if _bare_name(self.name) else '"' + self.name + '"'
        if self.operator == "between":
            return f"{name} between {self.values[0]} and {self.values[1]}"
        if self.operator in ("in", "not in"):
            return f"{name} {self.operator} ({', '.join(str(v) for v in self.values)})"
        return f"{name} {self.operator} {self.values[0]}"


@dataclass(frozen=True)
class And:
    parts: tuple[Filter, ...]

    def __str__(self) -> str:
        return " and ".join(f"({p})" if isinstance(p, Or) else str(p) for p in self.parts)


@dataclass(frozen=True)
class Or:
    parts: tuple[Filter, ...]

    def __str__(self) -> str:
        return " or ".join(str(p) for p in self.parts)


@dataclass(frozen=True)
class Not:
    part: Filter

    def __str__(self) -> str:
        return f"not ({self.part})"


Filter = Union[Comparison, And, Or, Not]


def _bare_name(name: str) -> bool:
    return _BARE_NAME_PATTERN.fullmatch(name) is not None and name.lower() not in _KEYWORDS


# --- parsing ------------------------------------------------------------------------

_GRAMMAR = r"""
?start: disjunction
?disjunction: conjunction (_OR conjunction)*
?conjunction: negation (_AND negation)*
?negation: _NOT negation -> negation
         | atom
?atom: comparison
     | _LPAR disjunction _RPAR
comparison: name OPERATOR value                          -> compare
          | name _BETWEEN value _AND value               -> between
          | name _IN _LPAR value (_COMMA value)* _RPAR       -> member
          | name _NOT _IN _LPAR value (_COMMA value)* _RPAR  -> not_member
name: NAME | QUOTED_NAME
value: NUMBER UNIT?   -> number
     | STRING         -> text
     | _TRUE          -> true
     | _FALSE         -> false
_AND: "and"i
_OR: "or"i
_NOT: "not"i
_IN: "in"i
_BETWEEN: "between"i
_TRUE: "true"i
_FALSE: "false"i
_LPAR: "("
_RPAR: ")"
_COMMA: ","
OPERATOR: "<=" | ">=" | "!=" | "<>" | "=" | "<" | ">"
NAME: /[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)?/
QUOTED_NAME: /"[^"\n]{1,200}"/
STRING: /'(?:[^']|'')*'/
NUMBER: /[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?/
UNIT: /[A-Za-z_µμΩ°][A-Za-z0-9_µμΩ]*(?:(?:\^|\*\*)[+-]?\d+)?(?:[\/*][A-Za-z_µμΩ°][A-Za-z0-9_µμΩ]*(?:(?:\^|\*\*)[+-]?\d+)?)*/
%ignore /[ \t\r\n]+/
"""

# What each terminal means, for "expected ..." messages.
_EXPECTED_WORDS = {
    "NAME": "a name",
    "QUOTED_NAME": "a name",
    "OPERATOR": "a comparison (= != < <= > >=)",
    "_BETWEEN": "'between'",
    "_IN": "'in'",
    "_NOT": "'not'",
    "NUMBER": "a number",
    "STRING": "a 'quoted text'",
    "_TRUE": "true",
    "_FALSE": "false",
    "UNIT": "a unit",
    "_AND": "'and'",
    "_OR": "'or'",
    "_LPAR": "'('",
    "_RPAR": "')'",
    "_COMMA": "','",
    "$END": "the end of the filter",
}
_EXPECTED_ORDER = list(_EXPECTED_WORDS)


@lru_cache(maxsize=1)
def _parser():
    from lark import Lark

    return Lark(_GRAMMAR, parser="lalr", propagate_positions=True, maybe_placeholders=False)


def _expected(names: set[str] | frozenset[str]) -> str:
    words: list[str] = []
    for terminal in _EXPECTED_ORDER:
        if terminal in names and _EXPECTED_WORDS[terminal] not in words:
            words.append(_EXPECTED_WORDS[terminal])
    if not words:
        return "something else"
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " or " + words[-1]



def _after_number(text: str, position: int) -> bool:
    """Whether ``text[position]`` starts a unit: a number, then optional spaces, before it."""
    return re.search(r"(?:^|[^A-Za-z0-9_.])[0-9.]+(?:[eE][-+]?[0-9]+)?\s*$", text[:position]) is not None

def _check_characters(text: str) -> None:
    """Refuse control characters anywhere and non-ASCII outside quoted text."""
    quoted: str | None = None
    for position, char in enumerate(text):
        if unicodedata.category(char) in ("Cc", "Cf", "Cs", "Co", "Cn") and char not in "\t\r\n":
            raise FilterError(text, f"control character U+{ord(char):04X} is not allowed", position)
        if quoted is not None:
            if char == quoted:
                quoted = None
            continue
        if char in "'\"":
            quoted = char
        elif ord(char) > 127 and not (char in "\u00b5\u03bc" and _after_number(text, position)):
            # Lookalikes (a Cyrillic 'а', a full-width '＝') must not pass for names or
            # operators; text values in quotes may hold any letter. The micro sign is
            # allowed where a unit starts, right after a number ('5 µs').
            hint = " (write micro as 'u', e.g. 'us')" if char in "\u00b5\u03bc" else ""
            raise FilterError(text, f"character '{char}' (U+{ord(char):04X}, {unicodedata.name(char, 'unnamed')}) is only allowed inside quotes{hint}", position)


def _check_parenthesis_depth(text: str) -> None:
    depth, quoted = 0, None
    for position, char in enumerate(text):
        if quoted is not None:
            quoted = None if char == quoted else quoted
        elif char in "'\"":
            quoted = char
        elif char == "(":
            depth += 1
            if depth > MAX_DEPTH:
                raise FilterError(text, f"nested deeper than {MAX_DEPTH} levels", position)
        elif char == ")":
            depth = max(0, depth - 1)


_LOGICAL = frozenset({"conjunction", "disjunction", "negation"})


def _logical_depth(tree) -> int:
    """How many and/or/not enclose the deepest comparison, counted without recursion
    (everything after this check recurses over the tree, SQL compilation included)."""
    from lark import Tree

    deepest, stack = 0, [(tree, 0)]
    while stack:
        node, depth = stack.pop()
        depth += node.data in _LOGICAL
        deepest = max(deepest, depth)
        stack.extend((child, depth) for child in node.children if isinstance(child, Tree))
    return deepest


def parse(text: str) -> Filter:
    """The syntax tree of a filter; pure (no catalogue needed).

    Raises :class:`FilterError` (with the position in ``text`` and what was expected) for
    text that is not a filter, longer than :data:`MAX_LENGTH` or nested deeper than
    :data:`MAX_DEPTH`.
    """
    from lark.exceptions import UnexpectedCharacters, UnexpectedEOF, UnexpectedToken

    if not isinstance(text, str):
        raise FilterError(str(text), "a filter is text")
    if len(text) > MAX_LENGTH:
        raise FilterError(text[:80] + "...", f"filter is {len(text)} characters long; at most {MAX_LENGTH} are accepted", MAX_LENGTH)
    if not text.strip():
        raise FilterError(text, "empty filter", 0)
    _check_characters(text)
    _check_parenthesis_depth(text)
    try:
        tree = _parser().parse(text)
    except UnexpectedCharacters as error:
        char = text[error.pos_in_stream]
        found = "an unclosed quote" if char in "'\"" else f"'{char}'"
        raise FilterError(text, f"expected {_expected(error.allowed or set())}, found {found}", error.pos_in_stream) from None
    except UnexpectedToken as error:
        token = error.token
        if token.type == "$END":
            found, position = "the end of the filter", len(text)
        else:
            found, position = f"'{token.value}'", token.start_pos
        raise FilterError(text, f"expected {_expected(error.expected)}, found {found}", position) from None
    except UnexpectedEOF as error:
        raise FilterError(text, f"expected {_expected(set(error.expected))}, found the end of the filter", len(text)) from None
    if _logical_depth(tree) > MAX_DEPTH:
        raise FilterError(text, f"nested deeper than {MAX_DEPTH} levels", 0)
    return _to_filter(tree, text)


def _name_of(tree) -> tuple[str, int]:
    token = tree.children[0]
    name = token.value[1:-1] if token.type == "QUOTED_NAME" else token.value
    return name, token.start_pos


def _value_of(tree, text: str) -> Value:
    kind = tree.data
    position = tree.meta.start_pos if not tree.meta.empty else 0
    if kind == "number":
        number = tree.children[0]
        unit = tree.children[1].value if len(tree.children) > 1 else None
        value = float(number.value)
        if value != value or value in (float("inf"), float("-inf")):
            raise FilterError(text, f"number '{number.value}' is out of range", number.start_pos)
        return Value(value, unit, number.start_pos)
    if kind == "text":
        token = tree.children[0]
        return Value(token.value[1:-1].replace("''", "'"), None, token.start_pos)
    return Value(kind == "true", None, position)


def _to_filter(tree, text: str) -> Filter:
    kind = tree.data
    if kind == "conjunction":
        return And(tuple(_to_filter(child, text) for child in tree.children))
    if kind == "disjunction":
        return Or(tuple(_to_filter(child, text) for child in tree.children))
    if kind == "negation":
        return Not(_to_filter(tree.children[0], text))
    name, position = _name_of(tree.children[0])
    if kind == "compare":
        operator = tree.children[1].value
        operator = "!=" if operator == "<>" else operator
        return Comparison(name, operator, (_value_of(tree.children[2], text),), position)
    values = tuple(_value_of(child, text) for child in tree.children[1:])
    if kind == "between":
        return Comparison(name, "between", values, position)
    return Comparison(name, "in" if kind == "member" else "not in", values, position)


# --- names in the catalogue ---------------------------------------------------------


@dataclass(frozen=True)
class _Parameter:
    id: int
    name: str
    unit: str
    kind: str


@dataclass(frozen=True)
class _Measurement:
    id: int
    name: str
    unit: str


@dataclass(frozen=True)
class _Monitor:
    """A monitor of one apparatus (monitors are named per apparatus)."""

    id: int
    apparatus_id: int
    name: str
    unit: str


class FigureNames(Mapping[str, tuple[str, ...]]):
    """The stored figures' names, each with the units its rows are stored in.

    Names come from a walk down the index on ``figures.name`` (one probe per distinct
    name, not a scan of every run's figures); the units of a name are read when a
    filter compares that figure. Valid while ``connection`` is open. Filters look their
    figures up here, and ``Catalogue.figure_names`` lists them from here.
    """

    _NAMES = sql_text(
        "WITH RECURSIVE names(name) AS ("
        " SELECT min(name) FROM figures"
        " UNION ALL SELECT (SELECT min(f.name) FROM figures f WHERE f.name > names.name) FROM names WHERE names.name IS NOT NULL"
        ") SELECT name FROM names WHERE name IS NOT NULL"
    )

    def __init__(self, connection: Connection):
        self._connection = connection
        self._names = [str(name) for (name,) in connection.execute(self._NAMES)]
        self._units: dict[str, tuple[str, ...]] = {}

    def __getitem__(self, name: str) -> tuple[str, ...]:
        if name not in self._names:
            raise KeyError(name)
        if name not in self._units:
            rows = self._connection.execute(select(s.FigureRow.unit).where(s.FigureRow.name == name).distinct())
            self._units[name] = tuple(sorted(unit or "" for (unit,) in rows))
        return self._units[name]

    def __contains__(self, name: object) -> bool:
        return name in self._names

    def __iter__(self) -> Iterator[str]:
        return iter(self._names)

    def __len__(self) -> int:
        return len(self._names)


@dataclass(frozen=True)
class _Names:
    parameters: dict[str, _Parameter]
    measurements: dict[str, _Measurement]
    figures: Mapping[str, tuple[str, ...]]  # name -> the units its rows are stored in
    zone: ZoneInfo
    # PostgreSQL: the shot-level tables are partitioned by month and the children carry
    # their shot's time (runlog.store.partitions).
    partitioned: bool = False
    #: The lab-defined units recorded at ingest (runlog.units), so filters read them too.
    lab_units: tuple[tuple[str, str], ...] = ()
    #: Monitor name -> that monitor on each apparatus that logs it.
    monitors: dict[str, tuple[_Monitor, ...]] = field(default_factory=dict)
    #: Whether the catalogue knows a single apparatus (every shot is that apparatus's).
    one_apparatus: bool = False

    @classmethod
    def load(cls, connection: Connection) -> _Names:
        parameters = {
            name: _Parameter(int(pid), name, unit or "", kind)
            for pid, name, unit, kind in connection.execute(select(s.Parameter.id, s.Parameter.name, s.Parameter.unit, s.Parameter.kind))
        }
        measurements = {
            name: _Measurement(int(mid), name, unit or "")
            for mid, name, unit in connection.execute(select(s.Measurement.id, s.Measurement.name, s.Measurement.unit))
        }
        zone_name = connection.execute(select(s.Setting.value).where(s.Setting.key == "lab_timezone")).scalar() or "UTC"
        lab_units = tuple(sorted((str(key)[5:], str(value)) for key, value in connection.execute(select(s.Setting.key, s.Setting.value).where(s.Setting.key.like("unit:%")))))
        monitors: dict[str, list[_Monitor]] = {}
        for mid, apparatus_id, name, unit in connection.execute(select(s.Monitor.id, s.Monitor.apparatus_id, s.Monitor.name, s.Monitor.unit).order_by(s.Monitor.id)):
            monitors.setdefault(name, []).append(_Monitor(int(mid), int(apparatus_id), name, unit or ""))
        frozen = {name: tuple(found) for name, found in monitors.items()}
        one = connection.execute(select(func.count()).select_from(s.Apparatus.__table__)).scalar_one() <= 1
        return cls(parameters, measurements, FigureNames(connection), ZoneInfo(zone_name), connection.dialect.name == "postgresql", lab_units, frozen, one)

    def all(self) -> list[str]:
        return [*RUN_FIELDS, *SHOT_FIELDS, *self.parameters, *self.measurements, *self.figures, *self.monitors]


@contextlib.contextmanager
def _connected(source) -> Iterator[Connection]:
    if isinstance(source, Connection):
        yield source
        return
    engine = source if isinstance(source, Engine) else getattr(source, "engine", None)
    if not isinstance(engine, Engine):
        raise TypeError("expected a Catalogue, an Engine or a Connection")
    with engine.connect() as connection:
        yield connection


def known_names(source) -> dict[str, list[str]]:
    """Every name a filter can use on this catalogue, by group: ``fields``,
    ``parameters``, ``measurements``, ``figures`` and ``monitors`` (sorted)."""
    with _connected(source) as connection:
        names = _Names.load(connection)
    return {
        "fields": [*RUN_FIELDS, *SHOT_FIELDS],
        "parameters": sorted(names.parameters),
        "measurements": sorted(names.measurements),
        "figures": sorted(names.figures),
        "monitors": sorted(names.monitors),
    }


# --- compiling ----------------------------------------------------------------------

_runs = s.Run.__table__
_shots = s.Shot.__table__
_run_parameters = s.RunParameter.__table__
_shot_parameters = s.ShotParameter.__table__
_figures = s.FigureRow.__table__


@dataclass(frozen=True)
class CompiledFilter:
    """A filter as SQL: ``runs`` is a condition on the ``runs`` table that every run
    holding a matching shot meets (``None``: no run can be ruled out beforehand), and
    ``shots`` the condition on the ``shots`` table that, inside those runs, picks exactly
    the matching shots (``None``: ``runs`` alone is exact). :attr:`condition` joins them.
    """

    runs: ColumnElement[bool] | None
    shots: ColumnElement[bool] | None
    #: Ids of the parameters the filter compares.
    parameters: frozenset[int] = field(default=frozenset(), compare=False)
    #: Run version ids to select from instead of the current versions (a pinned
    #: selection, :mod:`runlog.pins`, names the versions it was made on).
    versions: tuple[int, ...] | None = None

    def run_ids(self):
        """The ids of the runs that may hold matching shots, as a subquery: current
        analysis versions only (older versions and withdrawn runs are never selected),
        unless :attr:`versions` names the run versions."""
        if self.versions is not None:
            query = select(_runs.c.id).where(_runs.c.id.in_(bindparam(None, list(self.versions), expanding=True, literal_execute=True)))
        else:
            query = select(_runs.c.id).where(_runs.c.is_current)
        return query.where(self.runs) if self.runs is not None else query

    @property
    def condition(self) -> ColumnElement[bool]:
        """The exact condition on ``shots``, with the run pruning in front."""
        in_runs = _shots.c.run_id.in_(self.run_ids())
        return in_runs if self.shots is None else and_(in_runs, self.shots)


def _in_runs(condition: ColumnElement[bool]) -> ColumnElement[bool]:
    return _shots.c.run_id.in_(select(_runs.c.id).where(condition))


def _test(column, operator: str, values: list) -> ColumnElement[bool]:
    """``column operator values`` as SQL has it (NULL when the column is NULL)."""
    # Lists are IN (...) of one bound value each, not expanding parameters, so the statement
    # has a fixed set of plain bound values and can be handed to the driver as it is; not a
    # chain of = terms either, which SQLite parses one level deeper per value and refuses
    # past 1000 ("Expression tree is too large").
    if operator == "between":
        return column.between(values[0], values[1])
    if operator in ("in", "not in"):
        # Each value bound with the column's type (times are stored as numbers on SQLite),
        # a fraction as a float: 'shot in (0.5)' matches no shot rather than shot 0.
        bound = [literal(v, Float() if isinstance(v, float) else column.type) for v in values]
        return column.in_(bound) if operator == "in" else column.not_in(bound)
    return {"=": column.__eq__, "!=": column.__ne__, "<": column.__lt__, "<=": column.__le__, ">": column.__gt__, ">=": column.__ge__}[operator](values[0])


def _compare(column, operator: str, values: list) -> ColumnElement[bool]:
    """``column operator values``, never NULL: a missing value compares false."""
    return and_(column.is_not(None), _test(column, operator, values))


def _range_may_hold(low, high, operator: str, values: list[float]) -> ColumnElement[bool]:
    """Whether a scanned range [low, high] can hold a value meeting the comparison."""
    if operator == "=":
        return and_(low <= values[0], high >= values[0])
    if operator == "in":
        # Any range meeting the span of the values may hold one (a prune may keep too much;
        # one term per value would nest too deep for SQLite with many values).
        return and_(high >= min(values), low <= max(values))
    if operator == "between":
        return and_(high >= values[0], low <= values[1])
    if operator in ("<", "<="):
        return low < values[0] if operator == "<" else low <= values[0]
    if operator in (">", ">="):
        return high > values[0] if operator == ">" else high >= values[0]
    return true()  # != and not in: any range wider than one point may hold one


_PREFIX_OF_KIND = {"parameter": "p", "measurement": "m", "figure": "f", "monitor": "monitor"}
_KIND_OF_PREFIX = {prefix: kind for kind, prefix in _PREFIX_OF_KIND.items()}


def _interval(microseconds: int):
    """A PostgreSQL interval constant (an integer of ours, never user text)."""
    return literal_column(f"interval '{int(microseconds)} microseconds'", type_=Interval())


def as_of_value(monitor_id: int, time, *, sqlite: bool, max_gap_seconds: float = MAX_GAP_SECONDS):
    """The as-of value of one monitor at ``time`` (a column or expression of the outer
    query) as a correlated scalar subquery: its last value logged at or before ``time`` and
    at most ``max_gap_seconds`` before it, else NULL (runlog.monitors.align, docs/filters.md).

    One probe of the (monitor, time) primary key per outer row, read backwards from
    ``time``; on PostgreSQL the bounds on ``time`` let each probe read only the month
    partitions they overlap.
    """
    values = s.MonitorValue.__table__.alias("monitor_value")
    if sqlite:  # times are integer microseconds
        logged, at = type_coerce(values.c.time, BigInteger), type_coerce(time, BigInteger)
        earliest = at - int(round(max_gap_seconds * 1e6))
    else:
        logged, at = values.c.time, type_coerce(time, DateTime(timezone=True))
        earliest = at - _interval(int(round(max_gap_seconds * 1e6)))
    return (
        select(values.c.value)
        .where(values.c.monitor_id == literal(int(monitor_id)), logged <= at, logged >= earliest)
        .order_by(values.c.time.desc())
        .limit(1)
        .correlate_except(values)
        .scalar_subquery()
    )


class _Compiler:
    def __init__(self, text: str, names: _Names, whole_run: frozenset[int] = frozenset()):
        self.text = text
        self.names = names
        self.whole_run = whole_run
        self.used: set[int] = set()

    def error(self, reason: str, position: int | None) -> FilterError:
        return FilterError(self.text, reason, position)

    def compile(self, node: Filter, *, top: bool = False) -> CompiledFilter:
        """``top``: the root, whose run condition is applied in front of its shot
        condition (so a top-level ``and`` need not repeat its whole-run parts)."""
        if isinstance(node, Comparison):
            return self.comparison(node)
        if isinstance(node, Not):
            part = self.compile(node.part)
            if part.shots is None:
                return CompiledFilter(not_(part.runs), None)
            return CompiledFilter(None, not_(part.shots))
        parts = [self.compile(p) for p in node.parts]
        whole_runs = [p for p in parts if p.shots is None]
        mixed = [p for p in parts if p.shots is not None]
        if isinstance(node, And):
            prunes = [p.runs for p in parts if p.runs is not None]
            runs = and_(*prunes) if prunes else None
            if not mixed:
                return CompiledFilter(runs, None)
            exact = [p.shots for p in mixed]
            if whole_runs and not top:
                exact.append(_in_runs(and_(*[p.runs for p in whole_runs])))
            return CompiledFilter(runs, and_(*exact))
        runs = or_(*[p.runs for p in parts]) if all(p.runs is not None for p in parts) else None
        if not mixed:
            return CompiledFilter(runs, None)
        exact = [p.shots for p in mixed]
        if whole_runs:
            exact.append(_in_runs(or_(*[p.runs for p in whole_runs])))
        return CompiledFilter(runs, or_(*exact))

    # -- one comparison --

    def resolve(self, node: Comparison) -> tuple[str, object]:
        name = node.name
        prefix, _, rest = name.partition(".")
        groups = {"p": self.names.parameters, "m": self.names.measurements, "f": self.names.figures, "monitor": self.names.monitors}
        if rest and prefix in groups:
            found = groups[prefix].get(rest)
            if found is not None:
                return _KIND_OF_PREFIX[prefix], (found if prefix != "f" else rest)
        if name in RUN_FIELDS or name in SHOT_FIELDS:
            return "field", name
        matches = [(kind, group[name]) for kind, group in (("parameter", self.names.parameters), ("measurement", self.names.measurements)) if name in group]
        if name in self.names.figures:
            matches.append(("figure", name))
        if name in self.names.monitors:
            matches.append(("monitor", self.names.monitors[name]))
        if len(matches) == 1:
            return matches[0]
        if len(matches) > 1:
            choices = " or ".join(f"'{_PREFIX_OF_KIND[kind]}.{name}'" for kind, _ in matches)
            raise self.error(f"'{name}' is both a {' and a '.join(kind for kind, _ in matches)}: write {choices}", node.position)
        known = self.names.all() + [f"{prefix}.{n}" for prefix, group in groups.items() for n in group]
        close = difflib.get_close_matches(name, known, n=3, cutoff=0.6)
        hint = f"; did you mean {', '.join(repr(c) for c in close)}?" if close else "; see known_names() or docs/filters.md"
        raise self.error(f"unknown name '{name}'{hint}", node.position)

    def comparison(self, node: Comparison) -> CompiledFilter:
        kind, target = self.resolve(node)
        if kind == "field":
            return self.field(node, str(target))
        if kind == "parameter":
            return self.parameter(node, target)  # type: ignore[arg-type]
        if kind == "measurement":
            return self.measurement(node, target)  # type: ignore[arg-type]
        if kind == "monitor":
            return self.monitor(node, target)  # type: ignore[arg-type]
        return self.figure(node, str(target))

    def check_operator(self, node: Comparison, allowed: frozenset[str], what: str) -> None:
        if node.operator not in allowed:
            raise self.error(f"'{node.name}' is {what}: use =, !=, in or not in, not '{node.operator}'", node.position)

    def texts(self, node: Comparison) -> list[str]:
        for value in node.values:
            if value.kind != "text":
                raise self.error(f"'{node.name}' holds text: write the value in single quotes, e.g. '{value.value}'", value.position)
        return [str(v.value) for v in node.values]

    def numbers(self, node: Comparison, unit: str | None, what: str) -> list[float]:
        """The values as numbers in ``unit`` (``None``: no unit may be written)."""
        out = []
        for value in node.values:
            if value.kind != "number":
                raise self.error(f"'{node.name}' is a number{what}: expected a number, found {value}", value.position)
            if value.unit is None:
                out.append(float(value.value))
                continue
            if unit is None:
                raise self.error(f"'{node.name}' has no unit: write the number alone, without '{value.unit}'", value.position)
            try:
                check_unit(value.unit, self.names.lab_units)
            except UnitError as error:
                raise self.error(str(error), value.position) from None
            try:
                found = converter(value.unit, unit, self.names.lab_units)
            except UnitError as error:
                reason = f"'{value.unit}' is not a unit of the same dimension" if error.kind == "dimension" else str(error)
                raise self.error(f"'{node.name}' is stored in '{unit or 'no unit'}'; {reason}", value.position) from None
            # 0.07 ms is 70.00000000000001 us in binary: the conversion keeps what one would
            # type in the stored unit (15 significant digits), so that it equals 70 us.
            out.append(float(found(float(value.value))))
        return out

    def field(self, node: Comparison, name: str) -> CompiledFilter:
        if name in ("run", "sequence", "operator"):
            self.check_operator(node, _TEXT_OPERATORS, "text")
            column = {"run": _runs.c.key, "sequence": _runs.c.sequence, "operator": _runs.c.operator}[name]
            return CompiledFilter(_compare(column, node.operator, self.texts(node)), None)
        if name == "apparatus":
            self.check_operator(node, _TEXT_OPERATORS, "text")
            apparatus = s.Apparatus.__table__
            matching = select(apparatus.c.id).where(_compare(apparatus.c.name, node.operator, self.texts(node)))
            return CompiledFilter(_runs.c.apparatus_id.in_(matching), None)
        if name == "tag":
            self.check_operator(node, _TEXT_OPERATORS, "text")
            tags = s.RunTag.__table__
            return CompiledFilter(exists().where(and_(tags.c.run_id == _runs.c.id, _compare(tags.c.tag, node.operator, self.texts(node)))).correlate(_runs), None)
        if name == "status":
            self.check_operator(node, _TEXT_OPERATORS, "text")
            return CompiledFilter(None, _compare(_shots.c.status, node.operator, self.texts(node)))
        if name == "shot":
            return CompiledFilter(None, _compare(_shots.c.shot, node.operator, self.numbers(node, None, " (the shot index)")))
        if name == "time":
            return self.times(node, [self.moment(v) for v in self.check_texts(node, "an ISO time such as '2026-03-02T09:00' (UTC unless it names a zone)")])
        return self.dates(node)

    def check_texts(self, node: Comparison, what: str) -> list[Value]:
        for value in node.values:
            if value.kind != "text":
                raise self.error(f"'{node.name}' takes {what} in single quotes, found {value}", value.position)
        return list(node.values)

    def moment(self, value: Value) -> dt.datetime:
        try:
            moment = dt.datetime.fromisoformat(str(value.value))
        except ValueError:
            raise self.error(f"'{value.value}' is not an ISO time such as '2026-03-02T09:00'", value.position) from None
        if moment.tzinfo is None:
            moment = moment.replace(tzinfo=dt.timezone.utc)
        return moment.astimezone(dt.timezone.utc)

    def day_start(self, value: Value, later: int = 0) -> dt.datetime:
        try:
            day = dt.date.fromisoformat(str(value.value))
        except ValueError:
            raise self.error(f"'{value.value}' is not an ISO date such as '2026-03-02'", value.position) from None
        # The lab day starts at local midnight; in UTC that moves with daylight saving. At
        # the calendar's ends (9999-12-31) the bound is the last moment there is.
        return day_start_utc(day, self.names.zone, later)

    def times(self, node: Comparison, moments: list[dt.datetime]) -> CompiledFilter:
        column = _shots.c.time
        exact = _compare(column, node.operator, moments)
        prune: ColumnElement[bool] | None
        if node.operator in ("<", "<="):
            prune = _runs.c.started < moments[0] if node.operator == "<" else _runs.c.started <= moments[0]
        elif node.operator in (">", ">="):
            prune = _runs.c.finished > moments[0] if node.operator == ">" else _runs.c.finished >= moments[0]
        elif node.operator == "=":
            prune = and_(_runs.c.started <= moments[0], _runs.c.finished >= moments[0])
        elif node.operator == "in":
            prune = or_(*[and_(_runs.c.started <= m, _runs.c.finished >= m) for m in moments])
        elif node.operator == "between":
            prune = and_(_runs.c.finished >= moments[0], _runs.c.started <= moments[1])
        else:
            prune = None
        return CompiledFilter(prune, exact)

    def dates(self, node: Comparison) -> CompiledFilter:
        values = self.check_texts(node, "an ISO date such as '2026-03-02' (a lab day)")
        time = _shots.c.time

        def on(value: Value) -> tuple[dt.datetime, dt.datetime]:
            return self.day_start(value), self.day_start(value, 1)

        def runs_overlap(low: dt.datetime | None, high: dt.datetime | None) -> ColumnElement[bool]:
            parts = []
            if low is not None:
                parts.append(_runs.c.finished >= low)
            if high is not None:
                parts.append(_runs.c.started < high)
            return and_(*parts)

        operator = node.operator
        if operator in ("=", "in", "not in", "!="):
            days = [on(v) for v in values]
            within = or_(*[and_(time >= low, time < high) for low, high in days])
            if operator in ("=", "in"):
                return CompiledFilter(or_(*[runs_overlap(low, high) for low, high in days]), within)
            return CompiledFilter(None, not_(within))
        if operator == "between":
            low, high = self.day_start(values[0]), self.day_start(values[1], 1)
            return CompiledFilter(runs_overlap(low, high), and_(time >= low, time < high))
        if operator == "<":
            bound = self.day_start(values[0])
            return CompiledFilter(runs_overlap(None, bound), time < bound)
        if operator == "<=":
            bound = self.day_start(values[0], 1)
            return CompiledFilter(runs_overlap(None, bound), time < bound)
        if operator == ">":
            bound = self.day_start(values[0], 1)
            return CompiledFilter(runs_overlap(bound, None), time >= bound)
        bound = self.day_start(values[0])
        return CompiledFilter(runs_overlap(bound, None), time >= bound)

    def same_shot(self, child: Table) -> ColumnElement[bool]:
        """``child``'s row belongs to the outer query's shot. On PostgreSQL the time is
        matched too, so each probe reads the one month partition holding the shot."""
        on = child.c.shot_id == _shots.c.id
        return and_(on, child.c.time == _shots.c.time) if self.names.partitioned else on

    def parameter(self, node: Comparison, parameter: _Parameter) -> CompiledFilter:
        rp = _run_parameters
        sp = SHOT_PARAMETERS_WITH_TIME if self.names.partitioned else _shot_parameters
        if parameter.kind == "text":
            self.check_operator(node, _TEXT_OPERATORS, "a text parameter")
            values: list = self.texts(node)
            run_column, shot_column = rp.c.text_value, sp.c.text_value
            may_hold = true()
        elif parameter.kind == "boolean":
            self.check_operator(node, _TEXT_OPERATORS, "a true/false parameter")
            values = []
            for value in node.values:
                if value.kind != "boolean" and not (value.kind == "number" and value.value in (0.0, 1.0) and value.unit is None):
                    raise self.error(f"'{node.name}' is true or false, found {value}", value.position)
                values.append(1.0 if value.value else 0.0)
            run_column, shot_column = rp.c.number_value, sp.c.number_value
            may_hold = _range_may_hold(rp.c.minimum, rp.c.maximum, node.operator, values)
        else:
            values = self.numbers(node, parameter.unit, f" (stored in '{parameter.unit}')" if parameter.unit else "")
            run_column, shot_column = rp.c.number_value, sp.c.number_value
            may_hold = _range_may_hold(rp.c.minimum, rp.c.maximum, node.operator, values)
        self.used.add(parameter.id)
        this = rp.c.parameter_id == parameter.id
        constant_match = select(rp.c.run_id).where(and_(this, rp.c.scanned.is_(False), _compare(run_column, node.operator, values)))
        if parameter.id in self.whole_run:
            # The caller knows no run it will look at scans this parameter: the run's
            # constant value decides for all its shots.
            return CompiledFilter(_runs.c.id.in_(constant_match), None)
        scanned_may_match = select(rp.c.run_id).where(and_(this, rp.c.scanned.is_(True), may_hold))
        prune = _runs.c.id.in_(select(rp.c.run_id).where(and_(this, or_(and_(rp.c.scanned.is_(False), _compare(run_column, node.operator, values)), and_(rp.c.scanned.is_(True), may_hold)))))
        shot_value = exists().where(and_(self.same_shot(sp), sp.c.parameter_id == parameter.id, _compare(shot_column, node.operator, values))).correlate(_shots)
        exact = or_(_shots.c.run_id.in_(constant_match), and_(_shots.c.run_id.in_(scanned_may_match), shot_value))
        return CompiledFilter(prune, exact)

    def measurement(self, node: Comparison, measurement: _Measurement) -> CompiledFilter:
        values = self.numbers(node, measurement.unit, f" (stored in '{measurement.unit}')" if measurement.unit else "")
        # The wide table's columns are data, not schema: describe just the one we need,
        # named from the measurement's integer id.
        # One plain table keyed by shot id on both backends (revision 0017): a probe by id.
        wide = Table("shot_measurements", MetaData(), Column("shot_id", s.BigId), Column(s.measurement_column(measurement.id), Float))
        column = wide.c[s.measurement_column(measurement.id)]
        carried = s.RunMeasurement.__table__
        prune = _runs.c.id.in_(select(carried.c.run_id).where(carried.c.measurement_id == measurement.id))
        exact = exists().where(and_(wide.c.shot_id == _shots.c.id, _compare(column, node.operator, values))).correlate(_shots)
        return CompiledFilter(prune, exact)

    def figure(self, node: Comparison, name: str) -> CompiledFilter:
        units = self.names.figures[name]
        per_unit = []
        for unit in units:
            values = self.numbers(node, unit, f" (stored in '{unit}')" if unit else "")
            per_unit.append(and_(_figures.c.unit == unit, _compare(_figures.c.value, node.operator, values)) if len(units) > 1 else _compare(_figures.c.value, node.operator, values))
        return CompiledFilter(exists().where(and_(_figures.c.run_id == _runs.c.id, _figures.c.name == name, or_(*per_unit))).correlate(_runs), None)

    def monitor(self, node: Comparison, monitors: tuple[_Monitor, ...]) -> CompiledFilter:
        """The monitor of the shot's apparatus, as of the shot's time. Runs are pruned on
        the minute rollups: a run can hold a match only if some minute from ``max_gap``
        before its start to its end logged a value range that can meet the comparison."""
        sqlite = not self.names.partitioned
        units = sorted({m.unit for m in monitors})
        if len(units) > 1:
            for value in node.values:
                if value.kind == "number" and value.unit is None:
                    raise self.error(f"'{node.name}' is logged in {' and '.join(repr(u or 'no unit') for u in units)} on different apparatus: write the number with its unit", value.position)
        prunes, exacts = [], []
        gap_us = int(round(MAX_GAP_SECONDS * 1e6))
        rollups = s.MonitorRollup.__table__
        for monitor in monitors:
            values = self.numbers(node, monitor.unit, f" (logged in '{monitor.unit}')" if monitor.unit else "")
            on_apparatus = _runs.c.apparatus_id == monitor.apparatus_id
            # The as-of value of a shot was logged in [start - gap, end] of its run, inside a
            # minute period that starts at most a minute before that.
            if sqlite:
                start, low, high = type_coerce(rollups.c.start, BigInteger), type_coerce(_runs.c.started, BigInteger) - gap_us - 60_000_000, type_coerce(_runs.c.finished, BigInteger)
            else:
                start, low, high = rollups.c.start, type_coerce(_runs.c.started, DateTime(timezone=True)) - _interval(gap_us + 60_000_000), _runs.c.finished
            may_hold = exists().where(
                and_(
                    rollups.c.monitor_id == literal(monitor.id),
                    rollups.c.resolution == literal("minute"),
                    start >= low,
                    start <= high,
                    _range_may_hold(rollups.c.minimum, rollups.c.maximum, node.operator, values),
                )
            ).correlate(_runs)
            prunes.append(and_(on_apparatus, may_hold))
            value = as_of_value(monitor.id, _shots.c.time, sqlite=sqlite)
            # Missing compares false, as in _compare, but the probe is written (and run)
            # once per shot rather than twice.
            exact = func.coalesce(_test(value, node.operator, values), false())
            # The apparatus is checked per shot too (inside an 'or' the prune does not hold
            # the shots of other apparatus away from this monitor), unless there is one.
            exacts.append(exact if self.names.one_apparatus else and_(_in_runs(on_apparatus), exact))
        return CompiledFilter(or_(*prunes), or_(*exacts))


def compile_selection(source, filter: Filter | str, *, whole_run: frozenset[int] = frozenset()) -> CompiledFilter:
    """The filter as SQL in two steps: a run condition to prune on, and the exact shot
    condition (see :class:`CompiledFilter`). ``source`` is a Catalogue, Engine or
    Connection; it resolves names, units and the lab time zone.

    ``whole_run``: ids of parameters that no run the result will be applied to scans; a
    comparison on one of them is decided by each run's constant value alone (simpler SQL).
    The caller must then restrict the result to such runs itself.
    """
    text = filter if isinstance(filter, str) else str(filter)
    tree = parse(filter) if isinstance(filter, str) else filter
    with _connected(source) as connection:
        compiler = _Compiler(text, _Names.load(connection), whole_run)
        compiled = compiler.compile(tree, top=True)
    return replace(compiled, parameters=frozenset(compiler.used))


def compile_filter(source, filter: Filter | str) -> ColumnElement[bool]:
    """The filter as one SQLAlchemy condition over the ``shots`` table (values bound).

    Use it as ``select(shots).where(compile_filter(catalogue, "wait > 100 us"))``.
    """
    return compile_selection(source, filter).condition

