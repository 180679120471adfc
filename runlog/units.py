"""Units: reading the bracketed unit of a column or a filter value, and converting values.

The one place ingest, filters, figures and plots turn unit texts into conversions.

- A unit text is read by a small grammar (names joined by ``*``, ``/`` and small integer
  powers, brackets; at most :data:`MAX_LENGTH` characters), never by pint's expression
  parser, which evaluates arithmetic (``9**9**9`` would run for ever). Each name alone is
  looked up in pint's registry.
- Logarithmic units (``dBm``, ``dB``) convert through pint's logarithmic support
  (20 dBm = 100 mW), never by a straight line; they must stand alone in a unit text.
- pint takes the radian as dimensionless, so ``rad/s`` and ``Hz`` would be equal. Here an
  angular frequency and a cyclic one convert with the 2π (ω = 2π f: 2π rad/s = 1 Hz); any
  other pair whose radian powers differ (``rad`` and a plain number) is refused.
- ``G`` is the gauss as magnetic flux density, 1 G = 1e-4 T (NIST SP 811, B.8); pint's own
  gauss is the CGS-Gaussian unit that does not convert to tesla. ``Torr`` is the torr.
- Names a lab writes for two different things are refused with the choices (:data:`AMBIGUOUS`).
- Lab-defined units (``[units]`` of runlog.toml, e.g. ``E_rec = "3.47 kHz * planck_constant"``)
  are passed as ``lab``: a tuple of ``(name, definition)`` pairs, stored in the catalogue
  when a file that uses them is ingested so that filters know them too.

pint is imported on first use only: most ingests of a known catalogue need no conversion.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from runlog.errors import RunlogError

__all__ = [
    "AMBIGUOUS",
    "MAX_LENGTH",
    "MAX_POWER",
    "Conversion",
    "LabUnits",
    "UnitError",
    "check_lab_units",
    "check_unit",
    "conversion",
    "convert",
    "converter",
    "parse_unit",
    "quantity",
    "registry",
    "unit_text",
]

#: Longest unit text accepted (a unit a lab writes is a few names long).
MAX_LENGTH = 60
#: Largest power of one name, in absolute value (``m**2``, ``s^-1``, ``Hz**-4``).
MAX_POWER = 4

#: Names that mean two different things in a lab, refused with what to write instead.
AMBIGUOUS = {
    "Gs": "gauss or gigasecond: write 'G' for gauss or 'gigasecond'",
    "C": "coulomb or degree Celsius: write 'coulomb' or 'degC'",
    "h": "hour or the Planck constant: write 'hour' or 'planck_constant'",
    "a": "year or are: write 'year'",
    "ct": "carat or count: write 'count'",
}

#: Lab-defined units: ``(name, definition)`` pairs, sorted by name.
LabUnits = tuple[tuple[str, str], ...]

# The lab's own and runlog's redefinitions, on top of pint's defaults.
_DEFINITIONS = (
    # Flux density, NIST SP 811 (2008) B.8: gauss (Gs, G) = 1.0 E-04 T.
    "gauss = 1e-4 * tesla = G",
    # NIST SP 811 B.8: torr (Torr) = 1.333 224 E+02 Pa; pint knows only the lower-case name.
    "Torr = torr",
)

_LAB_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]{0,30}")
_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_QUANTITY = re.compile(rf"\s*(?P<number>{_NUMBER})?\s*(?P<unit>.*?)\s*")


class UnitError(RunlogError, ValueError):
    """A unit text that cannot be read, or a pair of units that cannot be converted."""

    def __init__(self, unit: str, reason: str, kind: str = "unit"):
        self.unit = unit
        self.reason = reason
        #: ``unit`` (cannot be read), ``dimension`` or ``angle`` (a pair that does not convert).
        self.kind = kind
        super().__init__(str(self))

    def __str__(self) -> str:
        return self.reason


def _base_registry(lab: LabUnits):
    import pint

    try:
        # Parsing pint's definitions takes ~0.6 s; its on-disk cache brings that to ~0.05 s.
        ureg = pint.UnitRegistry(cache_folder=":auto:", on_redefinition="ignore")
    except Exception:  # noqa: BLE001 - the cache only saves time: unwritable, stale (it names a removed environment's files) or corrupt
        ureg = pint.UnitRegistry(on_redefinition="ignore")
    for definition in _DEFINITIONS:
        ureg.define(definition)
    # define() replaces a unit's definition but not what the registry derived from it when it
    # was built (root units, dimensions): without this rebuild the gauss stays pint's
    # CGS-Gaussian unit whenever pint's on-disk cache is cold or unusable (~0.07 s).
    ureg._build_cache()
    for name, text in lab:
        number, root = _quantity_parts(text, ureg)
        # Defined in root units, written by pint itself: the text holds no lab input but the number.
        ureg.define(f"{name} = {number * root.magnitude!r} * {format(root.units, 'D') or 'dimensionless'}")
    return ureg


def registry(lab: LabUnits = ()):
    """The pint registry runlog uses, with ``lab``'s units defined in it."""
    # One key per set of lab units: registry() and registry(()) must be the same object,
    # pint refuses to combine quantities of two registries.
    return _registry(tuple(sorted(lab)))


@lru_cache(maxsize=8)
def _registry(lab: LabUnits):
    return _base_registry(lab)


# --- the grammar ----------------------------------------------------------------------

_GRAMMAR = r"""
?start: expr
?expr: term
     | expr "*" term   -> mul
     | expr "·" term   -> mul
     | expr "/" term   -> div
?term: atom
     | atom POWER INT  -> power
?atom: NAME
     | ONE
     | "(" expr ")"
POWER: "**" | "^"
INT: /[+-]?[0-9]+/
ONE: "1"
NAME: /[A-Za-z_%°µμΩÅ][A-Za-z0-9_µμΩ]*/
%ignore " "
"""


@lru_cache(maxsize=1)
def _parser():
    from lark import Lark

    return Lark(_GRAMMAR, parser="lalr")


def _tree_unit(tree, ureg, text: str):
    """The pint unit of a parsed tree; each name is looked up alone, with no arithmetic."""
    from lark import Token

    if isinstance(tree, Token):
        if tree.type == "ONE":
            return ureg.Unit("dimensionless")
        name = str(tree)
        if name in AMBIGUOUS:
            raise UnitError(text, f"unit '{name}' is ambiguous ({AMBIGUOUS[name]})")
        try:
            return ureg.Unit(name)
        except Exception:  # pint raises several unrelated types for a name it does not know
            raise UnitError(text, f"unknown unit '{name}'" + (f" in '{text}'" if name != text else "")) from None
    if tree.data == "power":
        base, _, exponent = tree.children
        power = int(exponent)
        if abs(power) > MAX_POWER:
            raise UnitError(text, f"unit '{text}': power {power} is larger than {MAX_POWER} in absolute value")
        return _multiplicative(_tree_unit(base, ureg, text), ureg, text) ** power
    left, right = (_multiplicative(_tree_unit(child, ureg, text), ureg, text) for child in tree.children)
    return left * right if tree.data == "mul" else left / right


def _multiplicative(unit, ureg, text: str):
    if not ureg.Quantity(1.0, unit)._is_multiplicative:
        raise UnitError(text, f"unit '{text}': a logarithmic or offset unit ({unit}) must stand alone, not in a product, quotient or power")
    return unit


@lru_cache(maxsize=1024)
def parse_unit(text: str, lab: LabUnits = ()):
    """The pint unit of ``text`` ("" is dimensionless); raises :class:`UnitError`."""
    from lark.exceptions import LarkError

    text = text.strip()
    ureg = registry(lab)
    if not text:
        return ureg.Unit("dimensionless")
    if len(text) > MAX_LENGTH:
        raise UnitError(text[:MAX_LENGTH], f"unit longer than {MAX_LENGTH} characters")
    try:
        tree = _parser().parse(text)
    except LarkError:
        raise UnitError(text, f"'{text}' is not a unit: write names joined by '*' or '/', with small integer powers ('m/s**2', 'kHz/mG', '1/s')") from None
    return _tree_unit(tree, ureg, text)


def check_unit(text: str, lab: LabUnits = ()) -> str:
    """``text`` stripped, if it is a unit; raises :class:`UnitError` (a ``ValueError``)."""
    parse_unit(text, lab)
    return text.strip()


def _quantity_parts(text: str, ureg) -> tuple[float, object]:
    match = _QUANTITY.fullmatch(text)
    if match is None or not match["unit"]:
        raise UnitError(text, f"'{text}' is not a number with a unit such as '3.47 kHz * planck_constant'")
    # Lab definitions are read with the grammar of the base registry (no lab names inside).
    unit = parse_unit(match["unit"])
    number = float(match["number"]) if match["number"] else 1.0
    root = ureg.Quantity(1.0, unit).to_root_units()
    return number, root


def check_lab_units(table: object, source: str = "[units]") -> LabUnits:
    """The ``[units]`` table of runlog.toml checked: new names, each a number with a unit."""
    if not isinstance(table, dict):
        raise UnitError(source, f"{source} must be a table of name = \"number unit\"")
    ureg = registry()
    checked = []
    for name, text in sorted(table.items()):
        if not isinstance(name, str) or not _LAB_NAME.fullmatch(name):
            raise UnitError(str(name), f"{source}: '{name}' is not a unit name (letters, digits, _)")
        if name in AMBIGUOUS or name in ureg:
            raise UnitError(name, f"{source}: '{name}' is already a unit; choose another name")
        if not isinstance(text, str):
            raise UnitError(name, f"{source}: {name} must be a text such as \"3.47 kHz * planck_constant\"")
        number, _ = _quantity_parts(text, ureg)
        if not math.isfinite(number) or number <= 0:
            raise UnitError(name, f"{source}: {name} = {text!r} must be a positive finite quantity")
        checked.append((name, text.strip()))
    return tuple(checked)


# --- conversions ----------------------------------------------------------------------


@dataclass(frozen=True)
class Conversion:
    """How values in ``source`` become values in ``target``.

    ``scale`` and ``offset`` for a linear (or affine: degC to K) conversion; ``log`` when a
    logarithmic unit is involved, and the values go through pint's logarithmic conversion.
    ``cycles`` is the radian power bridged with 2π (1: angular to cyclic, -1: the reverse).
    """

    source: str
    target: str
    scale: float = 1.0
    offset: float = 0.0
    log: bool = False
    cycles: int = 0
    lab: LabUnits = ()

    @property
    def identity(self) -> bool:
        return not self.log and self.scale == 1.0 and self.offset == 0.0

    def __call__(self, values):
        """``values`` (a number or an array) in ``target``, to 15 significant digits."""
        if self.identity:
            return values
        array = np.asarray(values, dtype=float)
        if self.log:
            ureg = registry(self.lab)
            with np.errstate(divide="ignore", invalid="ignore"):
                out = ureg.Quantity(array, parse_unit(self.source, self.lab)).to(parse_unit(self.target, self.lab)).magnitude
        else:
            out = array * self.scale + self.offset
        # A conversion leaves ~1e-16 of noise (3 G -> 0.30000000000000004 mT, 20 dBm ->
        # 100.00000000000004 mW); keep the 15 significant digits one would type, so that a
        # value converted at ingest equals the same value converted in a filter.
        out = significant(np.asarray(out, dtype=float), 15)
        return out if np.ndim(values) else float(out)


def significant(values: np.ndarray, digits: int) -> np.ndarray:
    """``values`` rounded to ``digits`` significant digits (non-finite and zero unchanged)."""
    out = np.array(values, dtype=float, copy=True)
    finite = np.isfinite(out) & (out != 0)
    if not finite.any():
        return out
    exponents = np.floor(np.log10(np.abs(out[finite]))).astype(int)
    rounded = out[finite]
    # One np.round per distinct decimal exponent: a column holds few of them.
    for exponent in np.unique(exponents):
        where = exponents == exponent
        rounded[where] = np.round(rounded[where], digits - 1 - int(exponent))
    out[finite] = rounded
    return out


def _radians(unit, ureg) -> int:
    root = ureg.get_root_units(unit)[1]
    return int(dict(root._units).get("radian", 0))


@lru_cache(maxsize=1024)
def converter(source: str, target: str, lab: LabUnits = ()) -> Conversion:
    """The conversion from ``source`` to ``target``; raises :class:`UnitError` with the reason
    when there is none (different dimensions, an angle against a plain number, a unit that
    cannot be read). Equal texts give the identity without touching pint."""
    source, target = source.strip(), target.strip()
    if source == target:
        return Conversion(source, target)
    ureg = registry(lab)
    a, b = parse_unit(source, lab), parse_unit(target, lab)
    shown_a, shown_b = source or "no unit", target or "no unit"
    if a.dimensionality != b.dimensionality:
        raise UnitError(source, f"'{shown_a}' and '{shown_b}' are not units of the same dimension", "dimension")
    cycles = _radians(a, ureg) - _radians(b, ureg)
    if cycles and not (abs(cycles) == 1 and a.dimensionality == ureg.Unit("Hz").dimensionality):
        raise UnitError(source, f"'{shown_a}' and '{shown_b}' differ by an angle (radian power {cycles:+d}): an angle and a plain number are not converted into each other", "angle")
    log = not (ureg.Quantity(1.0, a)._is_multiplicative and ureg.Quantity(1.0, b)._is_multiplicative)
    if log and any(not isinstance(ureg._units[str(u)].converter, _offset_type()) for u in (a, b) if not ureg.Quantity(1.0, u)._is_multiplicative):
        return Conversion(source, target, log=True, lab=lab)
    try:
        zero = ureg.Quantity(0.0, a).to(b).magnitude
        one = ureg.Quantity(1.0, a).to(b).magnitude
    except Exception:  # pint raises several unrelated types
        raise UnitError(source, f"'{shown_a}' cannot be converted to '{shown_b}'") from None
    # ω = 2π f: a value per radian of angle is 1/(2π) of a value per cycle.
    bridge = (2.0 * math.pi) ** -cycles
    return Conversion(source, target, scale=float(one - zero) * bridge, offset=float(zero) * bridge, cycles=cycles, lab=lab)


def _offset_type():
    from pint.facets.nonmultiplicative.definitions import OffsetConverter

    return OffsetConverter


def quantity(text: str, lab: LabUnits = ()):
    """A pint quantity from a text such as ``'2.0 kHz/mG'`` (number, then a unit read by the
    grammar, never by pint's expression parser); raises :class:`UnitError`."""
    if not isinstance(text, str):
        raise UnitError(str(text), f"{text!r} is not a number with a unit")
    match = _QUANTITY.fullmatch(text)
    if match is None or match["number"] is None:
        raise UnitError(text, f"'{text}' is not a number with a unit such as '2.0 kHz/mG'")
    return registry(lab).Quantity(float(match["number"]), parse_unit(match["unit"], lab))


def conversion(source: str, target: str, lab: LabUnits = ()) -> tuple[float, float] | None:
    """``(scale, offset)`` with ``target_value = source_value * scale + offset``, for units
    that convert on a straight line; ``None`` when they do not convert or only through a
    logarithm (use :func:`converter` for those)."""
    try:
        found = converter(source, target, lab)
    except UnitError:
        return None
    return None if found.log else (found.scale, found.offset)


def convert(values: np.ndarray, source: str, target: str, lab: LabUnits = ()) -> np.ndarray:
    """``values`` in ``source`` expressed in ``target``; raises :class:`UnitError`."""
    return converter(source, target, lab)(values)


@lru_cache(maxsize=512)
def unit_text(unit: str | None) -> str:
    """A stored unit as people read it (``us`` -> ``µs``, ``uK`` -> ``µK``); others unchanged.

    Stored units, filters and ``--json`` keep the ASCII ``u`` that files are written with;
    every text for people (CLI, dashboard, figures, plots) goes through here, so that one
    thing has one spelling.
    """
    unit = unit or ""
    if re.fullmatch(r"u[A-Za-z]+", unit):
        try:
            if format(parse_unit(unit), "~P") == "µ" + unit[1:]:
                return "µ" + unit[1:]
        except Exception:  # pint raises several types for text it does not know
            pass
    return unit
