"""Units: parsing the bracketed unit of a column and converting values between units (pint).

pint is imported on first use only: most ingests of a known catalogue need no conversion.
"""

from __future__ import annotations

import re
from functools import lru_cache

import numpy as np

__all__ = ["registry", "check_unit", "conversion", "convert", "unit_text"]


@lru_cache(maxsize=1)
def registry():
    """The one pint registry runlog uses."""
    import pint

    try:
        # Parsing pint's definitions takes ~0.6 s; its on-disk cache brings that to ~0.05 s.
        return pint.UnitRegistry(cache_folder=":auto:")
    except OSError:  # no writable cache folder
        return pint.UnitRegistry()


@lru_cache(maxsize=512)
def check_unit(text: str) -> str:
    """``text`` stripped, if pint understands it as a unit; raises ``ValueError`` otherwise."""
    text = text.strip()
    if not text:
        return ""
    try:
        registry().Unit(text)
    except Exception as error:  # pint raises several unrelated types for bad input
        raise ValueError(f"unknown unit '{text}'") from error
    return text


@lru_cache(maxsize=512)
def conversion(source: str, target: str) -> tuple[float, float] | None:
    """``(scale, offset)`` with ``target_value = source_value * scale + offset``.

    ``None`` when the units have different dimensions. Equal units give ``(1, 0)`` without
    touching pint.
    """
    if source == target:
        return (1.0, 0.0)
    ureg = registry()
    try:
        zero = ureg.Quantity(0.0, source or "dimensionless").to(target or "dimensionless").magnitude
        one = ureg.Quantity(1.0, source or "dimensionless").to(target or "dimensionless").magnitude
    except Exception:
        return None
    return (float(one - zero), float(zero))


def convert(values: np.ndarray, source: str, target: str) -> np.ndarray:
    """``values`` in ``source`` expressed in ``target`` (same dimension; checked by the caller)."""
    factors = conversion(source, target)
    if factors is None:
        raise ValueError(f"cannot convert '{source}' to '{target}'")
    scale, offset = factors
    if scale == 1.0 and offset == 0.0:
        return values
    return values * scale + offset


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
            if format(registry().Unit(unit), "~P") == "µ" + unit[1:]:
                return "µ" + unit[1:]
        except Exception:  # pint raises several types for text it does not know
            pass
    return unit
