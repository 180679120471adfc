"""Temperature of trapped atoms by release and recapture: a classical-trajectory model.

This module owns the ``temperature`` figure. A run scans the release time ``t`` for which
the trap is switched off; every shot gives the recaptured fraction (sites occupied in both
images / occupied in the first). The model is the classical-trajectory Monte-Carlo of
release and recapture of a single atom in a tweezer (Tuchendler C. et al. 2008, Phys. Rev.
A 78, 033425 [memory]):

1. Thermal initial conditions in the harmonic approximation of the trap: positions normal
   with ``sigma_i = sqrt(k T / (m w_i^2))`` and velocities normal with ``sqrt(k T / m)``,
   where ``w_r = sqrt(4 U0 / (m w0^2))`` and ``w_z = sqrt(2 U0 / (m zR^2))``;
2. free flight for ``t`` (straight lines, and a fall under gravity along a transverse axis);
3. recapture when the energy in the Gaussian beam switched on again is negative:
   ``m v^2 / 2 + U(r) < 0`` with ``U = -U0 (w0/w(z))^2 exp(-2 rho^2 / w(z)^2)``,
   ``w(z) = w0 sqrt(1 + (z/zR)^2)`` and ``zR = pi w0^2 / lambda`` (no axial dependence when
   the wavelength is not given).

The trap depth ``U0`` (a temperature, an energy or a frequency times h), the waist ``w0``,
the wavelength and the atom's mass are stated, not fitted. The fitted model is
``y = A P(t; T)``: ``A`` absorbs losses and detection errors independent of the release.

Smooth in ``T``: the positions and velocities are ``sqrt(T)`` times fixed standard normal
draws (a fixed seed), so for each drawn trajectory and release time there is a critical
temperature ``T_c`` below which it is recaptured (found by bisection in ``ln T``; without
gravity the energy rises with ``T``, so the condition is exactly ``T < T_c``, and with
gravity it is taken so). ``P(t; T)`` is the fraction of trajectories with ``T_c > T``,
smoothed by a normal kernel of width 0.02 in ``ln T`` so that the fit engine's derivatives
exist; 20 000 trajectories leave a Monte-Carlo error on P below 0.004. One point per shot:
HC3 sandwich covariance. The temperature is reported in uK with its standard error.

The free flight is checked against the limit that follows from it (``tests``): an atom at
temperature T in a harmonic trap of frequency w spreads as
``sigma_x(t)^2 = (k T / (m w^2)) (1 + w^2 t^2)``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy.special import ndtr

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.fitting import least_squares_fit, scan_points

__all__ = ["ATOM_MASSES", "Trap", "atom_mass", "fit_release_recapture", "recapture_probability"]

_KIND = "release_recapture"
_METHOD = "least-squares/trajectory-monte-carlo"
_METHOD_VERSION = "1"
_BOLTZMANN = 1.380649e-23  # J/K, exact (SI 2019)
_PLANCK = 6.62607015e-34  # J s, exact (SI 2019)
_ATOMIC_MASS = 1.66053906660e-27  # kg (CODATA 2018)
_GRAVITY = 9.80665  # m/s^2, standard gravity (exact by definition)
_TRAJECTORIES = 10_000
_SEED = 20_080_433
_BANDWIDTH = 0.02  # of the smoothing kernel in ln T
_BISECTIONS = 18  # ln T to 20.7 / 2^18 ~ 1e-4, far below the kernel width

#: Atomic masses in u (CODATA / AME values [memory]), for ``mass = "87Rb"`` and the like.
ATOM_MASSES = {
    "6Li": 6.0151228874, "7Li": 7.0160034366, "23Na": 22.98976928, "39K": 38.96370668,
    "40K": 39.96399848, "41K": 40.96182576, "85Rb": 84.911789738, "87Rb": 86.909180527,
    "88Sr": 87.9056125, "133Cs": 132.905451961, "168Er": 167.932370, "174Yb": 173.9388664,
}


def atom_mass(name: str) -> float:
    """The mass in kg of an atom named like ``87Rb`` or ``Rb87``; ``KeyError`` when unknown."""
    text = name.strip()
    digits = "".join(c for c in text if c.isdigit())
    letters = "".join(c for c in text if c.isalpha())
    key = f"{digits}{letters[:1].upper()}{letters[1:].lower()}"
    if key not in ATOM_MASSES:
        raise KeyError(name)
    return ATOM_MASSES[key] * _ATOMIC_MASS


@dataclass(frozen=True)
class Trap:
    """A Gaussian tweezer: depth ``U0`` in J, waist in m, wavelength in m (None: no axial
    dependence), the atom's mass in kg and the gravity along a transverse axis in m/s^2."""

    depth: float
    waist: float
    mass: float
    wavelength: float | None = None
    gravity: float = _GRAVITY

    def __post_init__(self) -> None:
        for name in ("depth", "waist", "mass"):
            if not (math.isfinite(getattr(self, name)) and getattr(self, name) > 0):
                raise ValueError(f"the trap's {name} must be positive, got {getattr(self, name)!r}")

    @property
    def rayleigh(self) -> float | None:
        return None if self.wavelength is None else math.pi * self.waist**2 / self.wavelength

    def frequencies(self) -> tuple[float, float | None]:
        """Angular trap frequencies ``(w_r, w_z)`` of the harmonic approximation."""
        radial = math.sqrt(4.0 * self.depth / (self.mass * self.waist**2))
        rayleigh = self.rayleigh
        return radial, (None if rayleigh is None else math.sqrt(2.0 * self.depth / (self.mass * rayleigh**2)))

    def potential(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
        rayleigh = self.rayleigh
        grow = 1.0 if rayleigh is None else 1.0 + (z / rayleigh) ** 2
        return -self.depth / grow * np.exp(-2.0 * (x**2 + y**2) / (self.waist**2 * grow))


def _draws(count: int = _TRAJECTORIES, seed: int = _SEED) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return rng.standard_normal((3, count)), rng.standard_normal((3, count))


def thermal_sample(trap: Trap, temperature: float, count: int = _TRAJECTORIES, seed: int = _SEED) -> tuple[np.ndarray, np.ndarray]:
    """Positions (m) and velocities (m/s), each ``(3, count)``, of atoms at ``temperature`` (K)."""
    unit_positions, unit_velocities = _draws(count, seed)
    return _scaled(trap, unit_positions, math.sqrt(temperature)), unit_velocities * math.sqrt(_BOLTZMANN * temperature / trap.mass)


def _scaled(trap: Trap, unit_positions: np.ndarray, root_t: float) -> np.ndarray:
    radial, axial = trap.frequencies()
    scale = np.array([1.0 / radial, 1.0 / radial, 0.0 if axial is None else 1.0 / axial])[:, None]
    return unit_positions * scale * root_t * math.sqrt(_BOLTZMANN / trap.mass)


def _energy(trap: Trap, unit_positions: np.ndarray, unit_velocities: np.ndarray, release: np.ndarray, temperature: np.ndarray) -> np.ndarray:
    """Energy after release for every (release time, trajectory); ``temperature`` broadcasts."""
    root = np.sqrt(temperature)
    speed = math.sqrt(_BOLTZMANN / trap.mass)
    radial, axial = trap.frequencies()
    inverse = np.array([1.0 / radial, 1.0 / radial, 0.0 if axial is None else 1.0 / axial])
    t = release[:, None]
    fall = 0.5 * trap.gravity * t**2
    x = (unit_positions[0] * inverse[0] + unit_velocities[0] * t) * speed * root + fall
    y = (unit_positions[1] * inverse[1] + unit_velocities[1] * t) * speed * root
    z = (unit_positions[2] * inverse[2] + unit_velocities[2] * t) * speed * root
    vx = unit_velocities[0] * speed * root + trap.gravity * t
    vy, vz = unit_velocities[1] * speed * root, unit_velocities[2] * speed * root
    kinetic = 0.5 * trap.mass * (vx**2 + vy**2 + vz**2)
    return kinetic + trap.potential(x, y, z)


def critical_temperatures(trap: Trap, release: np.ndarray, count: int = _TRAJECTORIES) -> np.ndarray:
    """``ln T_c`` per (release time, trajectory), each row sorted: recaptured when ``ln T < ln T_c``."""
    unit_positions, unit_velocities = _draws(count)
    release = np.asarray(release, dtype=float)
    scale = trap.depth / _BOLTZMANN
    low = np.full((release.size, count), math.log(1e-6 * scale))
    high = np.full((release.size, count), math.log(1e3 * scale))
    kept_low = _energy(trap, unit_positions, unit_velocities, release, np.exp(low)) < 0
    kept_high = _energy(trap, unit_positions, unit_velocities, release, np.exp(high)) < 0
    for _ in range(_BISECTIONS):
        middle = 0.5 * (low + high)
        kept = _energy(trap, unit_positions, unit_velocities, release, np.exp(middle)) < 0
        low = np.where(kept, middle, low)
        high = np.where(kept, high, middle)
    critical = 0.5 * (low + high)
    critical = np.where(kept_low, critical, -np.inf)  # lost even when cold (fell out)
    return np.sort(np.where(kept_high, np.inf, critical), axis=1)


@lru_cache(maxsize=16)
def _cached_critical(trap: Trap, seconds: tuple[float, ...]) -> np.ndarray:
    # The same trap and release times give the same trajectories: rules over a day's runs
    # of one sequence compute them once.
    return critical_temperatures(trap, np.asarray(seconds))


def recapture_probability(critical: np.ndarray, temperature: float) -> np.ndarray:
    """``P(t; T)`` per release time from :func:`critical_temperatures`, kernel-smoothed.

    Each row of ``critical`` is sorted, so only the trajectories within 8 kernel widths of
    ``ln T`` need the kernel; those above count 1 and those below 0.
    """
    log_t = math.log(temperature)
    reach = 8.0 * _BANDWIDTH
    out = np.empty(critical.shape[0])
    for i, row in enumerate(critical):
        low, high = np.searchsorted(row, [log_t - reach, log_t + reach])
        out[i] = (row.size - high + float(np.sum(ndtr((row[low:high] - log_t) / _BANDWIDTH)))) / row.size
    return out


def fit_release_recapture(
    release: np.ndarray | Sequence[float],
    y: np.ndarray | Sequence[float],
    trap: Trap,
    *,
    release_unit: str = "us",
) -> list[Figure]:
    """Fit ``y = A P(t; T)`` to one recaptured fraction per shot; returns ``temperature`` (uK)."""
    from runlog.units import convert

    t, values = scan_points(release, y, kind=_KIND, x_name="release time", y_name="signal")
    if np.any(t < 0):
        raise FitError(_KIND, "negative release times")
    times = np.unique(t)
    if times.size < 3:
        raise FitError(_KIND, f"{times.size} distinct release times; at least 3 are needed for 2 parameters")
    seconds = convert(times, release_unit, "s")
    critical = _cached_critical(trap, tuple(float(v) for v in seconds))
    where = np.searchsorted(times, t)
    scale = trap.depth / _BOLTZMANN

    def model(_: np.ndarray, amplitude: float, log_temperature: float) -> np.ndarray:
        return amplitude * recapture_probability(critical, scale * math.exp(log_temperature))[where]

    # Start: the temperature on a coarse grid whose curve, scaled, fits best.
    best = None
    for fraction in np.geomspace(1e-3, 0.5, 25):
        curve = recapture_probability(critical, scale * fraction)[where]
        if not np.any(curve > 0):
            continue
        amplitude = float(curve @ values / (curve @ curve))
        rss = float(np.sum((amplitude * curve - values) ** 2))
        if best is None or rss < best[0]:
            best = (rss, amplitude, math.log(fraction))
    if best is None:
        raise FitError(_KIND, "no temperature below the trap depth recaptures any atom at these release times")
    fit = least_squares_fit(
        model, t, values, [best[1], best[2]], names=("recapture_scale", "log_temperature"), kind=_KIND,
        restarts=0, typical=[1.0, 1.0], covariance="sandwich",
    )
    log_t, log_err = fit.value("log_temperature"), fit.error("log_temperature")
    kelvin = scale * math.exp(log_t)
    micro = kelvin * 1e6
    return [Figure("temperature", micro, "uK", stderr=micro * log_err, ci_low=micro * math.exp(-1.96 * log_err), ci_high=micro * math.exp(1.96 * log_err), method=_METHOD, method_version=_METHOD_VERSION)]


def depth_in_joules(text_or_value: float, unit: str) -> float:
    """A trap depth given as a temperature (times k_B), an energy, or a frequency (times h)."""
    from runlog.units import parse_unit, registry

    quantity = registry().Quantity(text_or_value, parse_unit(unit))
    for target, factor in (("K", _BOLTZMANN), ("J", 1.0), ("Hz", _PLANCK)):
        try:
            return float(quantity.to(target).magnitude) * factor
        except Exception:
            continue
    raise ValueError(f"a trap depth in '{unit}' is neither a temperature, an energy nor a frequency")
