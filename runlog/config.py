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

    [defaults]
    apparatus = "lattice-east"  # when the file has no apparatus column

    [figures]
    interval = "wilson"       # or "clopper-pearson", for fill fraction and survival

    [[rules]]                 # fitted figures computed automatically (see docs/figures.md)
    sequence = "ramsey*"
    kind = "coherence"
    x = "wait"
    y = "bright_fraction"
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from runlog.errors import ConfigError

__all__ = ["Mapping", "load_config"]


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
    known = {"columns", "occupancy", "defaults", "rules", "figures"}
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
    defaults = data.get("defaults", {})
    figures = data.get("figures", {})
    interval = figures.get("interval", "wilson")
    if interval not in ("wilson", "clopper-pearson"):
        raise ConfigError(str(path), f"[figures] interval must be 'wilson' or 'clopper-pearson', not {interval!r}")
    rules = data.get("rules", [])
    if not isinstance(rules, list) or not all(isinstance(rule, dict) for rule in rules):
        raise ConfigError(str(path), "[[rules]] must be a list of tables")
    return Mapping(
        rename=columns,
        ignore=frozenset(ignore),
        loading=occupancy.get("loading"),
        survival=occupancy.get("survival"),
        shape=shape,
        apparatus=defaults.get("apparatus"),
        interval=interval,
        rules=tuple(rules),
        source=str(path),
    )
