"""The shot-table contract, version 1: which columns a file must have and what they mean.

Owns: naming (reserved columns, ``p.<name>[<unit>]``, ``m.<name>[<unit>]``, ``occ.<image>``,
``counts.<image>``),
the mapping of a lab's own column names onto those roles, the checks that can be made
from the schema alone, and turning one record batch into plain numpy arrays with every
per-row check done (null keys, negative shots, non-finite numbers, text in numeric
columns). Checks that span batches (duplicate shots, equal occupancy lengths within a
run) belong to ingest, which sees the whole file. See docs/shot-table.md.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from runlog.config import Mapping
from runlog.errors import CONTROL_CHARACTERS, ContractError
from runlog.times import DEFAULT_TIME_WINDOW, TimeWindow
from runlog.units import check_unit

__all__ = [
    "CONTRACT_VERSION",
    "ANALYSIS_METADATA_KEY",
    "RESERVED",
    "OPTIONAL",
    "Column",
    "Layout",
    "Batch",
    "read_layout",
    "normalise_batch",
    "threshold_counts",
    "FROM_COUNTS",
    "MAX_SHOT",
    "MAX_TEXT_BYTES",
    "MAX_MEASUREMENTS_PER_FILE",
    "MAX_MEASUREMENTS",
]

#: 2 added the optional ``analysis`` (a column, or the file's key-value metadata): files of
#: version 1 are version-2 files of the unnamed analysis.
CONTRACT_VERSION = 2
#: The Parquet key-value metadata key that names a whole file's analysis version.
ANALYSIS_METADATA_KEY = "analysis"
RESERVED = ("run", "apparatus", "sequence", "shot", "time")
OPTIONAL = ("operator", "notes", "tags", "status", "analysis")

#: Longest text the catalogue keeps for each named thing (the schema's column sizes).
MAX_LENGTH = {"analysis": 200, "run": 200, "apparatus": 200, "sequence": 200, "operator": 200, "tags": 2000, "status": 40, "name": 200, "unit": 60}

# Limits of what both backends can store, checked here so that SQLite and PostgreSQL
# refuse the same files (a file the contract passes must never fail in the store).
#: Largest shot index: ``shots.shot`` is a 32-bit integer on PostgreSQL.
MAX_SHOT = 2**31 - 1
#: Longest text parameter value in UTF-8 bytes: run and shot parameter texts are indexed,
#: and a PostgreSQL btree entry holds at most 2704 bytes.
MAX_TEXT_BYTES = 2000
#: Most measurement columns in one file: one shot's row of ``shot_measurements`` (8 bytes a
#: value) must fit in a PostgreSQL page (8160 bytes with its header and null bitmap).
MAX_MEASUREMENTS_PER_FILE = 900
#: Most measurement names in a catalogue: each is a column of ``shot_measurements``, and a
#: PostgreSQL table has at most 1600 (SQLite 2000). Checked by ingest against the store.
MAX_MEASUREMENTS = 1500
# Control characters: never in a name (they rewrite terminal lines and logs); NUL never in
# any text (PostgreSQL cannot store it). The same set as errors.CONTROL_CHARACTERS, in the
# RE2 syntax of Arrow's compute functions.
_CONTROL = r"[\x00-\x1f\x7f-\x9f\x{2028}\x{2029}]"
_NUL = "\x00"

_NAMED = re.compile(r"^(?P<prefix>p|m)\.(?P<name>[^\[\]]+?)\s*(?:\[(?P<unit>[^\[\]]*)\])?$")
_IMAGE = re.compile(r"^occ\.(?P<name>[^\[\]]+)$")
_COUNTS = re.compile(r"^counts\.(?P<name>[^\[\]]+)$")
#: ``Column.kind`` of an occupancy image the file does not carry, to be derived from its counts.
FROM_COUNTS = "from-counts"


@dataclass(frozen=True)
class Column:
    """One column of the file in its contract role.

    ``role`` is one of 'reserved', 'optional', 'parameter', 'measurement', 'occupancy',
    'counts'; ``source`` is the column's name in the file, ``name`` its name in the
    catalogue. ``kind`` is 'number', 'boolean' or 'text' for parameters, and
    ``FROM_COUNTS`` for an occupancy image the file lacks and ingest derives from the image's
    ``counts.<image>`` column (its ``source``) with a threshold; ``shape`` is the lattice
    shape of an image when the file or the mapping gives one.
    """

    source: str
    role: str
    name: str
    unit: str = ""
    kind: str = "number"
    shape: tuple[int, ...] | None = None


@dataclass(frozen=True)
class Layout:
    """Every column of one file, checked against the contract from the schema alone."""

    file: str
    columns: tuple[Column, ...]
    loading: str | None
    survival: str | None
    default_apparatus: str | None
    #: Thresholds from runlog.toml, per image name (``"*"``: every image).
    thresholds: dict[str, float] = field(default_factory=dict)

    def threshold(self, image: str) -> float | None:
        return self.thresholds.get(image, self.thresholds.get("*"))

    def sources(self) -> list[str]:
        """The file's columns to read, each once (a counts column also feeds its image)."""
        return list(dict.fromkeys(column.source for column in self.columns))
    #: The analysis version the file's key-value metadata names (a column overrides it).
    analysis: str | None = None
    #: Shot times outside it are refused.
    time_window: TimeWindow = DEFAULT_TIME_WINDOW

    def by_role(self, role: str) -> list[Column]:
        return [column for column in self.columns if column.role == role]

    def source(self, name: str) -> str | None:
        for column in self.columns:
            if column.role in ("reserved", "optional") and column.name == name:
                return column.source
        return None


@dataclass
class Batch:
    """One record batch as numpy arrays, every per-row check passed.

    ``parameters`` maps name to a float64 array (NaN = the shot lacks it) or, for text
    parameters, an object array (``None`` = lacks it). ``occupancy`` maps image name to
    the list array as read (checked: no nulls, boolean values).
    """

    first_row: int
    length: int
    run: np.ndarray  # object: run key per row
    apparatus: np.ndarray  # object
    sequence: np.ndarray  # object
    shot: np.ndarray  # int64
    time_us: np.ndarray  # int64 microseconds since the epoch, UTC
    status: np.ndarray | None
    operator: np.ndarray | None
    notes: np.ndarray | None
    tags: np.ndarray | None
    parameters: dict[str, np.ndarray]
    measurements: dict[str, np.ndarray]
    occupancy: dict[str, pa.ListArray]
    #: ``counts.<image>`` lists as read (checked: no empty sites, finite numbers).
    counts: dict[str, pa.ListArray] = field(default_factory=dict)
    analysis: np.ndarray | None = None

    def nbytes(self) -> int:
        """Memory held by the batch (object arrays counted by their pointers only)."""
        arrays = [self.run, self.apparatus, self.sequence, self.shot, self.time_us, *self.parameters.values(), *self.measurements.values()]
        return sum(a.nbytes for a in arrays) + sum(a.nbytes for a in self.occupancy.values()) + sum(a.nbytes for a in self.counts.values())


def _shape_of(field: pa.Field) -> tuple[int, ...] | None:
    meta = field.metadata or {}
    raw = meta.get(b"shape")
    if raw is None:
        return None
    try:
        shape = tuple(int(part) for part in raw.decode().split(","))
    except ValueError:
        return None
    return shape if shape and all(n > 0 for n in shape) else None


def _kind_of(file: str, name: str, arrow_type: pa.DataType) -> str:
    if pa.types.is_boolean(arrow_type):
        return "boolean"
    if pa.types.is_integer(arrow_type) or pa.types.is_floating(arrow_type) or pa.types.is_decimal(arrow_type):
        return "number"
    if pa.types.is_string(arrow_type) or pa.types.is_large_string(arrow_type):
        return "text"
    if pa.types.is_dictionary(arrow_type):
        return _kind_of(file, name, arrow_type.value_type)
    if pa.types.is_null(arrow_type):
        return "number"
    raise ContractError(file, f"type {arrow_type} is not a number, boolean or text", column=name)


def read_layout(file: str, schema: pa.Schema, mapping: Mapping) -> Layout:
    """Map every column of ``schema`` to its contract role, or refuse the file."""
    columns: list[Column] = []
    seen: dict[str, str] = {}
    for field in schema:
        source = field.name
        if source in mapping.ignore:
            continue
        if not source.strip():
            raise ContractError(file, "a column has an empty name", column=source)
        if CONTROL_CHARACTERS.search(source):
            # The message escapes it (errors.one_line); the name is refused all the same,
            # since it would break every line that prints it.
            raise ContractError(file, "column name holds a control character", column=source[:80])
        target = mapping.rename.get(source, source)
        if target in RESERVED or target in OPTIONAL:
            column = Column(source, "reserved" if target in RESERVED else "optional", target)
        elif (match := _NAMED.match(target)) is not None:
            name = match["name"].strip()
            try:
                unit = check_unit(match["unit"] or "", mapping.units)
            except ValueError as error:
                raise ContractError(file, str(error), column=source) from None
            if match["prefix"] == "p":
                column = Column(source, "parameter", name, unit, _kind_of(file, source, field.type))
            else:
                column = Column(source, "measurement", name, unit)
        elif (match := _IMAGE.match(target)) is not None:
            column = Column(source, "occupancy", match["name"].strip(), shape=_shape_of(field) or mapping.shape)
        elif (match := _COUNTS.match(target)) is not None:
            column = Column(source, "counts", match["name"].strip(), shape=_shape_of(field) or mapping.shape)
        else:
            raise ContractError(
                file,
                "not a shot-table column: name it p.<name>[unit], m.<name>[unit], occ.<image> or counts.<image>, "
                "or map or ignore it in runlog.toml",
                column=source,
            )
        if not column.name:
            raise ContractError(file, "empty name after the prefix", column=source)
        if len(column.name) > MAX_LENGTH["name"]:
            raise ContractError(file, f"name longer than {MAX_LENGTH['name']} characters", column=source[:80])
        if len(column.unit) > MAX_LENGTH["unit"]:
            raise ContractError(file, f"unit longer than {MAX_LENGTH['unit']} characters", column=source[:80])
        key = f"{column.role}:{column.name}"
        if column.role in ("reserved", "optional"):
            key = column.name
        if key in seen:
            raise ContractError(file, f"maps to the same {column.role} '{column.name}' as column '{seen[key]}'", column=source)
        seen[key] = source
        columns.append(column)

    measurements = sum(1 for c in columns if c.role == "measurement")
    if measurements > MAX_MEASUREMENTS_PER_FILE:
        raise ContractError(file, f"{measurements} measurement columns, more than the {MAX_MEASUREMENTS_PER_FILE} one file may have (a shot's measurements are one row of the store)")
    present = {c.name for c in columns if c.role == "reserved"}
    for name in RESERVED:
        if name == "apparatus" and mapping.apparatus:
            continue
        if name not in present:
            raise ContractError(file, "required column is missing", column=name)

    types = {field.name: field.type for field in schema}
    for column in columns:
        arrow_type = types[column.source]
        if pa.types.is_dictionary(arrow_type):
            arrow_type = arrow_type.value_type
        if column.name == "time" and column.role == "reserved":
            if not pa.types.is_timestamp(arrow_type):
                raise ContractError(file, f"must be a timestamp with time zone, found {arrow_type}", column=column.source, row=0)
            if arrow_type.tz is None:
                raise ContractError(file, "timestamp has no time zone (write it as UTC or with an offset)", column=column.source, row=0)
        if column.role == "occupancy":
            if not (pa.types.is_list(arrow_type) or pa.types.is_large_list(arrow_type) or pa.types.is_fixed_size_list(arrow_type)):
                raise ContractError(file, f"occupancy must be a list of booleans, found {arrow_type}", column=column.source, row=0)
            if not (pa.types.is_boolean(arrow_type.value_type) or pa.types.is_integer(arrow_type.value_type)):
                raise ContractError(file, f"occupancy must be a list of booleans, found {arrow_type}", column=column.source, row=0)

        if column.role == "counts":
            if not (pa.types.is_list(arrow_type) or pa.types.is_large_list(arrow_type) or pa.types.is_fixed_size_list(arrow_type)):
                raise ContractError(file, f"counts must be a list of numbers, one per site, found {arrow_type}", column=column.source, row=0)
            if not (pa.types.is_integer(arrow_type.value_type) or pa.types.is_floating(arrow_type.value_type)):
                raise ContractError(file, f"counts must be a list of numbers, one per site, found {arrow_type}", column=column.source, row=0)

    # An image with counts but no occupancy column gets its occupancy from the counts.
    carried = {c.name for c in columns if c.role == "occupancy"}
    for column in [c for c in columns if c.role == "counts" and c.name not in carried]:
        columns.append(Column(column.source, "occupancy", column.name, kind=FROM_COUNTS, shape=column.shape))
    images = [c.name for c in columns if c.role == "occupancy"]
    loading, survival = mapping.loading, mapping.survival
    for role, name in (("loading", loading), ("survival", survival)):
        if name is not None and name not in images:
            raise ContractError(file, f"runlog.toml names '{name}' as the {role} image but the file has no column occ.{name}", column=f"occ.{name}")
    if loading is None and images:
        loading = images[0]
    if survival is None and len(images) == 2:
        survival = images[-1]
    analysis = None
    raw = (schema.metadata or {}).get(ANALYSIS_METADATA_KEY.encode())
    if raw is not None:
        analysis = raw.decode("utf-8", errors="replace").strip()
        if CONTROL_CHARACTERS.search(analysis):
            raise ContractError(file, "analysis name in the file's metadata holds a control character")
        if len(analysis) > MAX_LENGTH["analysis"]:
            raise ContractError(file, f"analysis name in the file's metadata is longer than {MAX_LENGTH['analysis']} characters")
    return Layout(file, tuple(columns), loading, survival, mapping.apparatus, thresholds=dict(mapping.thresholds), analysis=analysis, time_window=mapping.time_window)


def _first(mask: np.ndarray) -> int:
    return int(np.flatnonzero(mask)[0])


def _strings(file: str, array: pa.Array, column: str, first_row: int, required: bool, name_of_field: str | None = None, free_text: bool = False) -> np.ndarray:
    """Text values as an object array (``None`` for missing), via the dictionary.

    Run, apparatus and sequence repeat over thousands of rows; checking and converting
    the few distinct values instead of every row is what keeps this cheap. Names refuse
    control characters; ``free_text`` (notes, text parameters) refuses only NUL, and a text
    parameter (no ``name_of_field``) is held to :data:`MAX_TEXT_BYTES`.
    """
    if not pa.types.is_dictionary(array.type):
        if pa.types.is_integer(array.type):
            array = array.cast(pa.string())
        elif pa.types.is_null(array.type):
            array = array.cast(pa.string())
        elif not (pa.types.is_string(array.type) or pa.types.is_large_string(array.type)):
            raise ContractError(file, f"must be text, found {array.type}", column=column, row=first_row)
        array = pc.dictionary_encode(array)
    elif not (pa.types.is_string(array.type.value_type) or pa.types.is_large_string(array.type.value_type)):
        raise ContractError(file, f"must be text, found {array.type.value_type}", column=column, row=first_row)
    codes = array.indices
    if required and array.null_count:
        raise ContractError(file, "empty value", column=column, row=first_row + _first(array.is_null().to_numpy(zero_copy_only=False)))
    dictionary = array.dictionary
    if required and len(dictionary):
        empty_codes = np.flatnonzero(pc.equal(pc.utf8_trim_whitespace(dictionary), "").to_numpy(zero_copy_only=False))
        if len(empty_codes):
            rows = np.isin(codes.to_numpy(zero_copy_only=False), empty_codes)
            if rows.any():
                raise ContractError(file, "empty value", column=column, row=first_row + _first(rows))
    def first_row_of(bad_codes: np.ndarray) -> int | None:
        rows = np.isin(codes.to_numpy(zero_copy_only=False), bad_codes)
        return first_row + _first(rows) if rows.any() else None

    if len(dictionary):
        if free_text:
            bad = pc.match_substring(dictionary, _NUL).to_numpy(zero_copy_only=False)
            what = "text holds a NUL character"
        else:
            bad = pc.match_substring_regex(dictionary, _CONTROL).to_numpy(zero_copy_only=False)
            what = "text holds a control character (such as NUL, a newline or a terminal escape)"
        row = first_row_of(np.flatnonzero(bad))
        if row is not None:
            raise ContractError(file, what, column=column, row=row)
        if name_of_field is None:
            bad = pc.greater(pc.binary_length(dictionary), MAX_TEXT_BYTES)
            row = first_row_of(np.flatnonzero(bad.to_numpy(zero_copy_only=False)))
            if row is not None:
                raise ContractError(file, f"text longer than {MAX_TEXT_BYTES} bytes", column=column, row=row)
    limit = MAX_LENGTH.get(name_of_field) if name_of_field else None
    if limit is not None and len(dictionary):
        long_codes = np.flatnonzero(pc.greater(pc.utf8_length(dictionary), limit).to_numpy(zero_copy_only=False))
        if len(long_codes):
            rows = np.isin(codes.to_numpy(zero_copy_only=False), long_codes)
            if rows.any():
                raise ContractError(file, f"text longer than {limit} characters", column=column, row=first_row + _first(rows))
    words = np.append(dictionary.to_numpy(zero_copy_only=False).astype(object), None)
    positions = pc.fill_null(codes, len(dictionary)).to_numpy(zero_copy_only=False)
    return words[positions]


def _numbers(file: str, array: pa.Array, column: str, first_row: int) -> np.ndarray:
    """Float64 with NaN for missing; refuses text that is not a number and ±inf."""
    if pa.types.is_dictionary(array.type):
        array = array.cast(array.type.value_type)
    if pa.types.is_string(array.type) or pa.types.is_large_string(array.type):
        try:
            array = pc.cast(array, pa.float64())
        except pa.ArrowInvalid:
            # Text in a numeric column: name the first value Arrow cannot read as a number.
            for index, value in enumerate(array.to_pylist()):
                if value is None:
                    continue
                try:
                    pc.cast(pa.array([value]), pa.float64())
                except pa.ArrowInvalid:
                    raise ContractError(file, f"text {value[:40]!r} in a numeric column", column=column, row=first_row + index) from None
            raise
    elif pa.types.is_boolean(array.type) or pa.types.is_integer(array.type) or pa.types.is_decimal(array.type):
        array = pc.cast(array, pa.float64())
    elif pa.types.is_null(array.type):
        array = pa.nulls(len(array), pa.float64())
    elif not pa.types.is_floating(array.type):
        raise ContractError(file, f"must be numeric, found {array.type}", column=column, row=first_row)
    values = array.to_numpy(zero_copy_only=False).astype(np.float64, copy=False)
    infinite = np.isinf(values)
    if infinite.any():
        raise ContractError(file, "infinite value", column=column, row=first_row + _first(infinite))
    return values


def _microseconds(file: str, times: pa.Array, column: str, first_row: int) -> np.ndarray:
    """Integer microseconds since 1970 UTC; a time no 64-bit count of microseconds holds
    (nanoseconds cannot overflow, seconds can) is refused with its row."""
    unit = times.type.unit if pa.types.is_timestamp(times.type) else "us"
    raw = times.cast(pa.int64()).to_numpy(zero_copy_only=False)
    per = {"s": 1_000_000, "ms": 1_000}.get(unit)
    if per is not None:
        limit = np.iinfo(np.int64).max // per
        bad = np.abs(raw) > limit
        if bad.any():
            row = _first(bad)
            raise ContractError(file, f"time {int(raw[row])} {unit} since 1970 is outside the plausible window", column=column, row=first_row + row)
        return raw * per
    if unit == "ns":
        return raw // 1_000
    return raw


def normalise_batch(layout: Layout, batch: pa.RecordBatch, first_row: int) -> Batch:
    """Check every row of ``batch`` and return it as numpy arrays."""
    file = layout.file
    n = batch.num_rows
    get = batch.column

    def reserved(name: str) -> pa.Array | None:
        source = layout.source(name)
        return None if source is None else get(source)

    run = _strings(file, reserved("run"), layout.source("run"), first_row, required=True, name_of_field="run")
    apparatus_array = reserved("apparatus")
    if apparatus_array is None:
        apparatus = np.full(n, layout.default_apparatus, dtype=object)
    else:
        apparatus = _strings(file, apparatus_array, layout.source("apparatus"), first_row, required=True, name_of_field="apparatus")
    sequence = _strings(file, reserved("sequence"), layout.source("sequence"), first_row, required=True, name_of_field="sequence")

    shot_source = layout.source("shot")
    shot_array = reserved("shot")
    if pa.types.is_floating(shot_array.type):
        floats = shot_array.to_numpy(zero_copy_only=False)
        bad = np.isnan(floats) | (floats != np.round(floats))
        if bad.any():
            raise ContractError(file, "shot index must be a whole number", column=shot_source, row=first_row + _first(bad))
        shot_array = pc.cast(shot_array, pa.int64())
    if not pa.types.is_integer(shot_array.type):
        if pa.types.is_string(shot_array.type) or pa.types.is_large_string(shot_array.type):
            _numbers(file, shot_array, shot_source, first_row)  # names the first text row
        raise ContractError(file, f"shot index must be an integer, found {shot_array.type}", column=shot_source, row=first_row)
    if shot_array.null_count:
        raise ContractError(file, "empty shot index", column=shot_source, row=first_row + _first(shot_array.is_null().to_numpy(zero_copy_only=False)))
    shot = shot_array.to_numpy(zero_copy_only=False).astype(np.int64, copy=False)
    negative = shot < 0
    if negative.any():
        raise ContractError(file, f"negative shot index {int(shot[negative][0])}", column=shot_source, row=first_row + _first(negative))
    too_large = shot > MAX_SHOT
    if too_large.any():
        raise ContractError(file, f"shot index {int(shot[too_large][0])} is larger than {MAX_SHOT}", column=shot_source, row=first_row + _first(too_large))

    time_source = layout.source("time")
    time_array = reserved("time")
    if time_array.null_count:
        raise ContractError(file, "empty time", column=time_source, row=first_row + _first(time_array.is_null().to_numpy(zero_copy_only=False)))
    time_us = _microseconds(file, time_array, time_source, first_row)
    outside = layout.time_window.outside(time_us)
    if outside.any():
        row = _first(outside)
        raise ContractError(file, layout.time_window.why_outside(int(time_us[row])), column=time_source, row=first_row + row)

    def optional(name: str) -> np.ndarray | None:
        array = reserved(name)
        return None if array is None else _strings(file, array, layout.source(name), first_row, required=False, name_of_field=name, free_text=name == "notes")

    parameters: dict[str, np.ndarray] = {}
    for column in layout.by_role("parameter"):
        array = get(column.source)
        if column.kind == "text":
            parameters[column.name] = _strings(file, array, column.source, first_row, required=False, free_text=True)
        else:
            parameters[column.name] = _numbers(file, array, column.source, first_row)

    measurements = {column.name: _numbers(file, get(column.source), column.source, first_row) for column in layout.by_role("measurement")}

    counts: dict[str, pa.ListArray] = {}
    for column in layout.by_role("counts"):
        array = get(column.source)
        values = array.flatten()
        bad = values.is_null().to_numpy(zero_copy_only=False)
        if pa.types.is_floating(values.type):
            bad = bad | ~np.isfinite(values.to_numpy(zero_copy_only=False))
        if bad.any():
            lengths = pc.fill_null(pc.list_value_length(array), 0).to_numpy(zero_copy_only=False)
            row = int(np.searchsorted(np.cumsum(lengths), _first(bad), side="right"))
            raise ContractError(file, "empty or non-finite site in counts list", column=column.source, row=first_row + row)
        counts[column.name] = array

    occupancy: dict[str, pa.ListArray] = {}
    for column in layout.by_role("occupancy"):
        array = get(column.source)
        if column.kind == FROM_COUNTS:
            # A placeholder with the counts' shape: ingest sets it from the threshold once
            # the whole run's counts are known.
            occupancy[column.name] = _placeholder(counts[column.name])
            continue
        # A null list means the shot has no such image; ingest checks that a run has
        # the image in all of its shots or in none.
        values = array.flatten()
        if values.null_count:
            lengths = pc.fill_null(pc.list_value_length(array), 0).to_numpy(zero_copy_only=False)
            bad_value = _first(values.is_null().to_numpy(zero_copy_only=False))
            row = int(np.searchsorted(np.cumsum(lengths), bad_value, side="right"))
            raise ContractError(file, "empty site in occupancy list", column=column.source, row=first_row + row)
        if pa.types.is_integer(values.type):
            not_bit = pc.invert(pc.is_in(values, pa.array([0, 1], values.type))).to_numpy(zero_copy_only=False)
            if not_bit.any():
                lengths = pc.fill_null(pc.list_value_length(array), 0).to_numpy(zero_copy_only=False)
                row = int(np.searchsorted(np.cumsum(lengths), _first(not_bit), side="right"))
                raise ContractError(file, "occupancy values must be true/false or 0/1", column=column.source, row=first_row + row)
        occupancy[column.name] = array

    return Batch(
        first_row=first_row,
        length=n,
        run=run,
        apparatus=apparatus,
        sequence=sequence,
        shot=shot,
        time_us=time_us,
        status=optional("status"),
        operator=optional("operator"),
        notes=optional("notes"),
        tags=optional("tags"),
        analysis=optional("analysis"),
        parameters=parameters,
        measurements=measurements,
        occupancy=occupancy,
        counts=counts,
    )


def _placeholder(counts: pa.ListArray) -> pa.ListArray:
    """A list of ``False`` per site, null where ``counts`` is null (the shot lacks the image)."""
    lengths = pc.fill_null(pc.list_value_length(counts), 0).to_numpy(zero_copy_only=False)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int32)
    mask = counts.is_null()
    return pa.ListArray.from_arrays(pa.array(offsets, pa.int32()), pa.array(np.zeros(int(offsets[-1]), dtype=bool)), mask=mask if mask.true_count else None)


def threshold_counts(counts: pa.ListArray, thresholds: np.ndarray) -> pa.ListArray:
    """Occupancy lists from counts: a site is occupied when its counts reach its row's threshold."""
    lengths = pc.fill_null(pc.list_value_length(counts), 0).to_numpy(zero_copy_only=False)
    values = counts.flatten().to_numpy(zero_copy_only=False).astype(np.float64, copy=False)
    occupied = values >= np.repeat(np.asarray(thresholds, dtype=np.float64), lengths)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int32)
    mask = counts.is_null()
    return pa.ListArray.from_arrays(pa.array(offsets, pa.int32()), pa.array(occupied), mask=mask if mask.true_count else None)
