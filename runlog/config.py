"""The lab's ``runlog.toml``: how its own column names map onto the shot-table contract.

Example::

    [columns]                 # your column name = contract name
    seq_id = "run"
    shot_number = "shot"
    "detuning (MHz)" = "p.detuning[MHz]"
    n_atoms = "m.atom_number"
    ignore = ["comment"]      # columns to leave out on purpose

    [occupancy]
    loading = "first"         # image names (after renaming, without 'occ.')
    survival = "second"
    shape = [10, 10]          # lattice shape when the file does not carry one
    threshold = 12            # optional: occupied when counts.<image> >= 12 (one number, or
                              # a table per image); default: from the run's count histogram

    [defaults]
    apparatus = "lattice-east"  # when the file has no apparatus column

    [monitors]                # optional: which files are monitor tables (docs/monitor-table.md)
    files = ["slow-control/*", "*.temps.parquet"]   # globs; default: told by the columns

    [figures]
    interval = "wilson"       # or "clopper-pearson", for fill fraction and survival
    counting_status = ["ok"]  # shot statuses that count in figures (default: only "ok");
                              # other shots are kept and filterable, and counted as left out

    [image_roles]             # per sequence (a pattern): what the second image shows.
    "sort*" = "rearrangement" # after moving atoms: no survival or loss for these runs
    "hold*" = "survival"      # (default; a sequence with a sorting rule is "rearrangement")

    [[rules]]                 # fitted figures computed automatically (see docs/figures.md)
    sequence = "ramsey*"
    kind = "coherence"
    x = "wait"
    y = "bright_fraction"

    [reference."lattice-east"]  # optional: the runs drift is judged on (docs/drift.md)
    sequence = "ramsey"         # the reference sequence
    vary = ["repetition"]       # parameters that may change within one series
    tolerance = 0.001           # relative rounding of constant settings

    [time_window]             # shots stamped outside it are refused (an unset clock, a
    earliest = 2000-01-01     # corrupted page); these are the defaults, in UTC. The
    latest = 2100-01-01       # window must lie within 1900-01-01 and 2262-01-01.

    [apparatus."lattice-east"]  # constants of one apparatus the figures need
    field_sensitivity = "2.0 kHz/mG"          # transition frequency per magnetic field
    zero_field_frequency = "6834.682611 MHz"  # optional: the transition at zero field
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from runlog.errors import ConfigError
from runlog.times import DEFAULT_TIME_WINDOW, TimeWindow

__all__ = ["APPARATUS_KEYS", "Mapping", "check_apparatus_settings", "check_rules", "load_config"]


@dataclass(frozen=True)
class Mapping:
    """Column renames and roles that turn a lab's table into a contract-v1 shot table."""

    rename: dict[str, str] = field(default_factory=dict)
    ignore: frozenset[str] = frozenset()
    loading: str | None = None
    survival: str | None = None
    shape: tuple[int, ...] | None = None
    apparatus: str | None = None
    interval: str = "wilson"
    rules: tuple[dict, ...] = ()
    source: str = "<defaults>"
    #: ``[apparatus."NAME"]`` tables: per apparatus, its constants as quantity texts.
    apparatus_settings: dict[str, dict[str, str]] = field(default_factory=dict)
    #: ``[occupancy] threshold``: per image name, ``"*"`` for every image.
    thresholds: dict[str, float] = field(default_factory=dict)
    #: ``[monitors] files``: glob patterns of the files that are monitor tables.
    monitor_files: tuple[str, ...] = ()
    #: ``[reference."NAME"]`` tables: per apparatus, sequence / vary / tolerance.
    references: dict[str, dict[str, object]] = field(default_factory=dict)
    #: ``[time_window]``: shot times outside it are refused.
    time_window: TimeWindow = DEFAULT_TIME_WINDOW
    #: ``[units]``: lab-defined units, ``(name, definition)`` pairs (runlog.units).
    units: tuple[tuple[str, str], ...] = ()
    #: ``[figures] counting_status``: the shot statuses that count in figures.
    counting_status: tuple[str, ...] = ("ok",)
    #: ``[image_roles]``: sequence pattern -> ``survival`` or ``rearrangement``.
    image_roles: dict[str, str] = field(default_factory=dict)

    def second_image_role(self, sequence: str) -> str:
        """What the second image of a run of ``sequence`` shows: ``survival`` (the same
        atoms after a hold, so survival and loss mean something) or ``rearrangement``
        (atoms moved in between, from a declared role or a ``sorting`` rule)."""
        from fnmatch import fnmatchcase

        for pattern, role in self.image_roles.items():
            if fnmatchcase(sequence, pattern):
                return role
        for rule in self.rules:
            if rule.get("kind") == "sorting" and fnmatchcase(sequence, str(rule.get("sequence", "*"))):
                return "rearrangement"
        return "survival"


def _time_window(table: object, source: str) -> TimeWindow:
    if not isinstance(table, dict):
        raise ConfigError(source, "[time_window] must be a table with earliest and latest")
    unknown = sorted(set(table) - {"earliest", "latest"})
    if unknown:
        raise ConfigError(source, f"[time_window]: unknown key '{unknown[0]}' (known: earliest, latest)")
    try:
        return TimeWindow(table.get("earliest", DEFAULT_TIME_WINDOW.earliest), table.get("latest", DEFAULT_TIME_WINDOW.latest))
    except ValueError as error:
        raise ConfigError(source, f"[time_window]: {error}") from None


def load_config(path: str | Path | None) -> Mapping:
    """Read ``runlog.toml``; no path gives the plain contract with no renames."""
    if path is None:
        return Mapping()
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(str(path), "file not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
        raise ConfigError(str(path), f"not valid TOML: {error}") from None
    known = {"columns", "occupancy", "defaults", "rules", "figures", "apparatus", "reference", "time_window", "units", "monitors", "image_roles"}
    unknown = sorted(set(data) - known)
    if unknown:
        raise ConfigError(str(path), f"unknown section [{unknown[0]}] (known: {', '.join(sorted(known))})")
    columns = dict(data.get("columns", {}))
    ignore = columns.pop("ignore", [])
    if not isinstance(ignore, list) or not all(isinstance(name, str) for name in ignore):
        raise ConfigError(str(path), "[columns] ignore must be a list of column names")
    for source, target in columns.items():
        if not isinstance(target, str):
            raise ConfigError(str(path), f"[columns] '{source}' must map to a contract column name")
    occupancy = data.get("occupancy", {})
    shape = occupancy.get("shape")
    if shape is not None:
        if not (isinstance(shape, list) and shape and all(isinstance(n, int) and n > 0 for n in shape)):
            raise ConfigError(str(path), "[occupancy] shape must be a list of positive integers")
        shape = tuple(shape)
    thresholds = occupancy.get("threshold", {})
    if isinstance(thresholds, (int, float)) and not isinstance(thresholds, bool):
        thresholds = {"*": float(thresholds)}
    if not isinstance(thresholds, dict) or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in thresholds.values()):
        raise ConfigError(str(path), "[occupancy] threshold must be a number, or a table of numbers per image")
    defaults = data.get("defaults", {})
    figures = data.get("figures", {})
    from runlog.figures.intervals import INTERVAL_METHODS  # the methods docs/figures.md lists

    interval = figures.get("interval", "wilson")
    if interval not in INTERVAL_METHODS:
        raise ConfigError(str(path), f"[figures] interval must be one of {', '.join(repr(m) for m in INTERVAL_METHODS)}, not {interval!r}")
    counting = figures.get("counting_status", ["ok"])
    if isinstance(counting, str):
        counting = [counting]
    if not isinstance(counting, list) or not counting or not all(isinstance(v, str) and v for v in counting):
        raise ConfigError(str(path), "[figures] counting_status must be a non-empty list of shot statuses, e.g. [\"ok\"]")
    roles = data.get("image_roles", {})
    if not isinstance(roles, dict) or not all(isinstance(v, str) for v in roles.values()):
        raise ConfigError(str(path), "[image_roles] must map sequence patterns to 'survival' or 'rearrangement'")
    for pattern, role in roles.items():
        if role not in ("survival", "rearrangement"):
            raise ConfigError(str(path), f"[image_roles] '{pattern}' must be 'survival' or 'rearrangement', not {role!r}")
    rules = check_rules(data.get("rules", []), str(path))
    settings = check_apparatus_settings(data.get("apparatus", {}), str(path))
    monitor_files = data.get("monitors", {}).get("files", [])
    if not isinstance(monitor_files, list) or not all(isinstance(p, str) and p for p in monitor_files):
        raise ConfigError(str(path), "[monitors] files must be a list of glob patterns")
    return Mapping(
        rename=columns,
        ignore=frozenset(ignore),
        loading=occupancy.get("loading"),
        survival=occupancy.get("survival"),
        shape=shape,
        apparatus=defaults.get("apparatus"),
        interval=interval,
        rules=rules,
        source=str(path),
        apparatus_settings=settings,
        thresholds={str(k): float(v) for k, v in thresholds.items()},
        monitor_files=tuple(monitor_files),
        references=check_references(data.get("reference", {}), str(path)),
        time_window=_time_window(data.get("time_window", {}), str(path)),
        counting_status=tuple(counting),
        image_roles={str(k): v for k, v in roles.items()},
        units=_lab_units(data.get("units", {}), str(path)),
    )


def _lab_units(table: object, source: str) -> tuple[tuple[str, str], ...]:
    from runlog.units import UnitError, check_lab_units

    try:
        return check_lab_units(table)
    except UnitError as error:
        raise ConfigError(source, str(error)) from None


def check_references(tables: object, source: str = "<reference>") -> dict[str, dict[str, object]]:
    """``[reference."NAME"]`` tables checked: a sequence text, a list of names, a tolerance in (0, 1)."""
    if not isinstance(tables, dict) or not all(isinstance(t, dict) for t in tables.values()):
        raise ConfigError(source, '[reference."NAME"] must be tables, one per apparatus')
    for name, table in tables.items():
        unknown = sorted(set(table) - {"sequence", "vary", "tolerance"})
        if unknown:
            raise ConfigError(source, f"[reference.\"{name}\"]: unknown key '{unknown[0]}' (known: sequence, tolerance, vary)")
        if "sequence" in table and not isinstance(table["sequence"], str):
            raise ConfigError(source, f"[reference.\"{name}\"] sequence must be a sequence name")
        vary = table.get("vary", [])
        if not isinstance(vary, list) or not all(isinstance(v, str) for v in vary):
            raise ConfigError(source, f"[reference.\"{name}\"] vary must be a list of parameter names")
        tolerance = table.get("tolerance", 1e-3)
        if isinstance(tolerance, bool) or not isinstance(tolerance, (int, float)) or not 0 < tolerance < 1:
            raise ConfigError(source, f"[reference.\"{name}\"] tolerance must be a number between 0 and 1")
    return {str(k): dict(v) for k, v in tables.items()}


#: The keys of an ``[apparatus."NAME"]`` table, each a quantity text.
APPARATUS_KEYS = ("field_sensitivity", "zero_field_frequency")


def check_apparatus_settings(tables: object, source: str = "<apparatus>") -> dict[str, dict[str, str]]:
    """``[apparatus."NAME"]`` tables checked: known keys, texts that pint reads as quantities."""
    from runlog.units import quantity

    if not isinstance(tables, dict) or not all(isinstance(t, dict) for t in tables.values()):
        raise ConfigError(source, '[apparatus."NAME"] must be tables, one per apparatus')
    checked: dict[str, dict[str, str]] = {}
    for name, table in tables.items():
        unknown = sorted(set(table) - set(APPARATUS_KEYS))
        if unknown:
            raise ConfigError(source, f"[apparatus.\"{name}\"]: unknown key '{unknown[0]}' (known: {', '.join(APPARATUS_KEYS)})")
        for key, text in table.items():
            try:
                quantity(text)
            except Exception:
                raise ConfigError(source, f"[apparatus.\"{name}\"] {key} = {text!r} is not a quantity with a unit such as '2.0 kHz/mG'") from None
        checked[name] = dict(table)
    return checked


# The figure kinds a rule may name: those of runlog.derive.KINDS, which sits above this
# module and so cannot be imported here; tests/test_derive.py keeps the two equal.
_RULE_KINDS = ("coherence", "correlator", "counting", "detection", "echo", "fringe", "lifetime", "rabi", "release_recapture", "sorting", "spectroscopy", "spreading", "t1", "two_atom")
_RULE_ENVELOPES = ("gaussian", "exponential", "thermal")
_RULE_TEXT_KEYS = ("sequence", "kind", "x", "y", "envelope", "apparatus", "image", "model", "pulse", "reference")
# Kind-specific settings (docs/figures.md): numbers, or texts naming a parameter or a quantity.
_RULE_SETTING_KEYS = ("stretch", "threshold", "depth", "waist", "mass", "wavelength", "gravity")
_RULE_KEYS = (*_RULE_TEXT_KEYS, *_RULE_SETTING_KEYS, "target")


def check_rules(rules: object, source: str = "<rules>") -> tuple[dict, ...]:
    """``rules`` (the ``[[rules]]`` tables) checked, as a tuple of plain dicts.

    A rule needs ``sequence`` (a glob of sequence names) and ``kind``; it may give ``x``,
    ``y``, ``envelope``, ``apparatus`` (a glob), ``image`` and ``target`` (site indices as
    text or as a list of integers, or the name of a parameter holding them). ``source``
    names the file in the error.
    """
    if not isinstance(rules, (list, tuple)) or not all(isinstance(rule, dict) for rule in rules):
        raise ConfigError(source, "[[rules]] must be a list of tables")
    for number, rule in enumerate(rules, start=1):
        unknown = sorted(set(rule) - set(_RULE_KEYS))
        if unknown:
            raise ConfigError(source, f"rule {number}: unknown key '{unknown[0]}' (known: {', '.join(_RULE_KEYS)})")
        for key in ("sequence", "kind"):
            if key not in rule:
                raise ConfigError(source, f"rule {number}: '{key}' is missing (a rule needs sequence and kind)")
        for key in _RULE_TEXT_KEYS:
            if key in rule and not (isinstance(rule[key], str) and rule[key].strip()):
                raise ConfigError(source, f"rule {number}: '{key}' must be non-empty text")
        if rule["kind"] not in _RULE_KINDS:
            raise ConfigError(source, f"rule {number}: unknown kind '{rule['kind']}' (known: {', '.join(_RULE_KINDS)})")
        if rule.get("envelope", "gaussian") not in _RULE_ENVELOPES:
            raise ConfigError(source, f"rule {number}: envelope must be 'gaussian' or 'exponential', not {rule['envelope']!r}")
        for key in _RULE_SETTING_KEYS:
            if key in rule and (isinstance(rule[key], bool) or not isinstance(rule[key], (int, float, str))):
                raise ConfigError(source, f"rule {number}: '{key}' must be a number or text")
        target = rule.get("target")
        if target is not None and not (
            (isinstance(target, str) and target.strip())
            or (isinstance(target, list) and target and all(isinstance(n, int) and not isinstance(n, bool) and n >= 0 for n in target))
        ):
            raise ConfigError(source, f"rule {number}: 'target' must be site indices ('0,1,2' or [0, 1, 2]) or a parameter name")
    return tuple(dict(rule) for rule in rules)
