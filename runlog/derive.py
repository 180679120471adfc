"""Applying a figure kind to a stored run: read its shots, compute the figures, store them.

This module owns the step from a run in the catalogue to its figures of merit. For one run
and one kind, :func:`derive` reads the shots and the site occupancy through the catalogue
API (never SQL), chooses the scanned parameter ``x`` and the measurement ``y`` the kind
needs, converts units where the figure function needs them, calls the figure function of
:mod:`runlog.figures` and stores what comes back with ``Catalogue.save_figures``. A figure
function that refuses (``FitError``) leaves the catalogue as it was.

It also owns the rules of ``runlog.toml`` (``[[rules]]``: which kind to apply to which
runs, :func:`apply_rules`), the recomputation of every figure (:func:`derive_all`), and the
way back from stored fit figures to the model curve over a run's shots (:func:`fit_curve`,
which the dashboard draws).

What each kind reads (``docs/figures.md`` has the definitions):

* ``counting``: the loading image, and the survival image when there is one;
* ``fringe``: ``x`` a scanned parameter whose unit is an angle, ``y`` the signal per shot;
* ``coherence``: ``x`` the scanned wait (a time), ``y`` the signal per shot, or a
  measurement called like ``contrast`` holding the contrast already found per wait;
* ``spreading``: ``x`` the scanned step number, the occupancy of the last image;
* ``sorting``: the target sites (a text parameter such as ``"0,1,2,5"``, or ``target``),
  the occupancy of the last image;
* ``correlator``: ``y`` three ±1 outcomes ``"q1,q2,q3"`` measured in the same shots, or two
  outcomes ``"a,b"`` and a pair-selector parameter ``x`` holding ``12``, ``23`` or ``13``;
* ``rabi``: ``x`` the scanned pulse duration (a time), or a scanned frequency for the Rabi
  lineshape (with the pulse duration ``pulse``), and the signal per shot;
* ``spectroscopy``: ``x`` the scanned frequency, the signal per shot; ``model`` the
  lineshape; the apparatus' ``field_sensitivity`` adds the ``field``;
* ``echo``, ``t1``, ``lifetime``: ``x`` the scanned wait or hold time and the signal per
  shot (``echo`` also a contrast per wait; ``t1`` a ``reference`` parameter marking shots
  without state selection);
* ``release_recapture``: ``x`` the scanned release time, the recaptured fraction per shot,
  and the trap's ``depth``, ``waist``, ``mass`` (and ``wavelength``) from parameters or
  settings;
* ``two_atom``: the coincidences of site pairs (0, 1), (2, 3), ... loaded in the loading
  image and both occupied in the last image, against ``x`` the scanned delay or overlap (or
  at one setting), or ``y`` a coincidence fraction per shot;
* ``detection``: the stored photon counts of an image (the loading image by default), and
  of the survival image for the corrected survival.

The signal per shot of the last four kinds is ``y`` when given (or the run's only
measurement); a run without measurements gives each shot's surviving fraction (sites
occupied in both images / sites occupied in the loading image), or the occupied fraction
of its only image.

Every shot of the run counts; a shot lacking ``x`` or ``y`` (NaN) is left out of a fit.
"""

from __future__ import annotations

import dataclasses
import math
import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from fnmatch import fnmatchcase
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from runlog.config import check_rules
from runlog.errors import FitError, NotFoundError, RunlogError
from runlog.figures.base import Figure
from runlog.figures.coherence import ENVELOPES, fit_envelope, fit_ramsey, frequency_unit
from runlog.figures.correlator import PAIR_LABELS, correlators, correlators_from_pairs
from runlog.figures.counting import counted_figure, shot_sums_fill, shot_sums_survival, survival_figures
from runlog.figures.detection import COUNT_MODELS, corrected_fill, corrected_survival, detection_figures, fit_counts
from runlog.figures.fringe import fit_fringe
from runlog.figures.interference import coincidences, dip_model, fit_visibility, visibility_at_one_setting
from runlog.figures.intervals import INTERVAL_METHODS
from runlog.figures.lifetime import fit_lifetime, lifetime_model
from runlog.figures.recapture import Trap, atom_mass, critical_temperatures, depth_in_joules, fit_release_recapture, recapture_probability
from runlog.figures.rabi import fit_rabi, rabi_model
from runlog.figures.relaxation import echo_model, fit_echo, fit_t1, relaxation_model
from runlog.figures.spectroscopy import LINESHAPES, field_from_resonance, fit_lineshape, lorentzian, rabi_lineshape
from runlog.figures.sorting import sorting_figures
from runlog.figures.spreading import fit_spreading, start_sites, walk_spread
from runlog.units import UnitError, conversion, convert, converter, parse_unit, quantity, registry

if TYPE_CHECKING:
    from runlog.catalogue import Catalogue, RunInfo

__all__ = ["KINDS", "DeriveResult", "DeriveSummary", "FitCurve", "apply_rules", "derive", "derive_all", "fit_curve", "fitted_signal"]

#: The figure kinds :func:`derive` can apply to a run.
KINDS = frozenset({"counting", "fringe", "coherence", "spreading", "sorting", "correlator", "rabi", "spectroscopy", "echo", "t1", "lifetime", "detection", "release_recapture", "two_atom"})

_SAME_CORRELATOR_OUTCOMES = ("q1", "q2", "q3")
_RULE_OPTIONS = ("x", "y", "envelope", "target", "image", "model")
#: Kind-specific settings a rule or ``derive(settings=...)`` may give, by kind.
SETTINGS = {
    "coherence": ("oscillator", "side"),
    "spreading": ("start_site",),
    "rabi": ("pulse",),
    "spectroscopy": ("pulse",),
    "echo": ("stretch",),
    "t1": ("reference",),
    "detection": ("threshold",),
    "release_recapture": ("depth", "waist", "mass", "wavelength", "gravity"),
}
#: The models a kind offers (``model=``); the first is the default.
MODELS = {
    "spectroscopy": LINESHAPES,
    "rabi": ("oscillation", "lineshape"),
    "lifetime": ("single", "two-body"),
    "echo": ("stretched",),
    "detection": COUNT_MODELS,
}


@dataclass(frozen=True)
class DeriveResult:
    """The figures one kind gave for one run (stored unless asked otherwise)."""

    run: str
    kind: str
    figures: list[Figure]
    apparatus: str | None = None

    def as_dict(self) -> dict[str, object]:
        """The JSON shape of ``runlog derive --json``."""
        return {
            "run": self.run,
            "kind": self.kind,
            "figures": {figure.name: figure.as_dict() for figure in self.figures},
        }


@dataclass(frozen=True)
class DeriveSummary:
    """What a recomputation did: one outcome per (run, kind), a result or the refusal."""

    outcomes: tuple[DeriveResult | FitError, ...]

    @property
    def results(self) -> list[DeriveResult]:
        return [o for o in self.outcomes if isinstance(o, DeriveResult)]

    @property
    def failures(self) -> list[FitError]:
        return [o for o in self.outcomes if isinstance(o, FitError)]

    @property
    def runs(self) -> int:
        """How many runs got at least one kind of figure."""
        return len({(r.apparatus, r.run) for r in self.results})

    @property
    def figures(self) -> int:
        """How many figures were stored."""
        return sum(len(r.figures) for r in self.results)

    def as_dict(self) -> dict[str, object]:
        kinds: dict[str, int] = {}
        for result in self.results:
            kinds[result.kind] = kinds.get(result.kind, 0) + 1
        return {
            "runs": self.runs,
            "figures": self.figures,
            "kinds": dict(sorted(kinds.items())),
            "failures": [{"run": f.run, "kind": f.kind, "reason": f.reason} for f in self.failures],
        }


@dataclass(frozen=True)
class _Options:
    x: str | None
    y: str | None
    envelope: str
    target: str | Sequence[int] | None
    image: str | None
    interval: str | None
    model: str | None = None
    settings: dict = dataclasses.field(default_factory=dict)
    #: The apparatus' constants from runlog.toml (``field_sensitivity`` ...).
    constants: dict = dataclasses.field(default_factory=dict)


class _Source:
    """One stored run as the kinds see it: its description, and its shots read once."""

    def __init__(self, catalogue: Catalogue, info: RunInfo, kind: str):
        self.catalogue = catalogue
        self.info = info
        self.kind = kind
        self._shots: pd.DataFrame | None = None

    @property
    def shots(self) -> pd.DataFrame:
        """The run's shots whose status counts in figures (the catalogue's
        ``counting_status`` setting, default ``ok``); the others are left out."""
        if self._shots is None:
            shots = self.catalogue.shots(self.info.run, apparatus=self.info.apparatus)
            self._counting = shots["status"].isin(counting_statuses(self.catalogue)).to_numpy()
            self._shots = shots[self._counting].reset_index(drop=True)
            self._shots.attrs = shots.attrs
        return self._shots

    def unit(self, column: str) -> str:
        return self.shots.attrs["units"].get(column, "")

    def numbers(self, column: str) -> np.ndarray:
        try:
            return pd.to_numeric(self.shots[column], errors="raise").to_numpy(dtype=float)
        except (TypeError, ValueError):
            raise FitError(self.kind, f"'{column[2:]}' holds text, not numbers") from None

    def pairs(self, x_column: str, y_column: str) -> tuple[np.ndarray, np.ndarray]:
        """``x`` and ``y`` of the shots that have both."""
        x, y = self.numbers(x_column), self.numbers(y_column)
        keep = np.isfinite(x) & np.isfinite(y)
        return x[keep], y[keep]

    def occupancy(self, image: str) -> np.ndarray:
        occupancy = self.catalogue.occupancy(self.info.run, image, apparatus=self.info.apparatus)
        # The contract gives a run each image in all of its shots or in none, so the rows
        # line up with the shots; a mismatch means the store is not what we think it is.
        if occupancy.shape[0] != self.info.shots:
            raise FitError(self.kind, f"image '{image}' has {occupancy.shape[0]} shots of the run's {self.info.shots}")
        self.shots  # noqa: B018 (sets the counting mask)
        occupancy = occupancy[self._counting]
        if occupancy.shape[0] == 0:
            raise FitError(self.kind, "no shot of the run has a status that counts")
        return occupancy


def counting_statuses(catalogue: Catalogue) -> list[str]:
    """The shot statuses that count in figures, as the catalogue's ingest recorded them."""
    import json

    from sqlalchemy import text

    with catalogue.engine.connect() as connection:
        stored = connection.execute(text("SELECT value FROM settings WHERE key = 'counting_status'")).scalar()
    return json.loads(stored) if stored else ["ok"]


def derive(
    catalogue: Catalogue,
    run: str,
    kind: str,
    *,
    x: str | None = None,
    y: str | None = None,
    envelope: str = "gaussian",
    apparatus: str | None = None,
    target: str | Sequence[int] | None = None,
    image: str | None = None,
    interval: str | None = None,
    model: str | None = None,
    settings: dict | None = None,
    constants: dict | None = None,
    store: bool = True,
) -> DeriveResult:
    """Compute the figures of ``kind`` for ``run`` and (``store=True``) store them.

    * ``x``: the scanned parameter (fringe: an angle; coherence: the wait; spreading: the
      step number; correlator: the pair selector). Default: the only suitable one.
    * ``y``: the measurement (correlator: ``"q1,q2,q3"`` or ``"a,b"``). Default: the only one.
    * ``envelope``: ``"gaussian"`` or ``"exponential"`` (coherence).
    * ``target``: sorting target sites, ``"0,1,2,5"``, a list of indices, or the name of a
      text parameter holding them. Default: the only text parameter that holds site indices.
    * ``image``: the occupancy image of spreading and sorting. Default: the run's last image.
    * ``interval``: ``wilson``, ``clopper-pearson`` or ``wilson-cc`` for counted figures.
      Default: counting keeps the method of the stored fill fraction; sorting uses Wilson.
    * ``model``: the model of kinds that offer several (:data:`MODELS`): spectroscopy
      ``lorentzian`` or ``rabi``; rabi ``oscillation`` (a duration scan) or ``lineshape``
      (a frequency scan; default from ``x``'s unit); lifetime ``single`` or ``two-body``.
    * ``settings``: kind-specific settings (:data:`SETTINGS`): ``pulse`` (the pulse
      duration of a Rabi lineshape: a parameter name or a quantity such as ``"20 us"``),
      ``stretch`` (a fixed echo exponent), ``reference`` (t1: the parameter that is true on
      shots imaged without state selection).
    * ``constants``: the apparatus' ``[apparatus."NAME"]`` table of runlog.toml
      (``field_sensitivity``, ``zero_field_frequency``).

    Raises :class:`FitError` (with the run named) when the figures cannot be computed, and
    :class:`NotFoundError` for an unknown run, kind, parameter, measurement or image, or when
    a default is ambiguous (the message names the candidates). Nothing is stored then.
    """
    deriver = _DERIVERS.get(kind)
    if deriver is None:
        raise NotFoundError("figure kind", kind, "known: " + ", ".join(sorted(KINDS)))
    if envelope not in ENVELOPES:
        raise NotFoundError("envelope", envelope, "known: " + ", ".join(ENVELOPES))
    allowed = MODELS.get(kind, ())
    if model is not None and model not in allowed:
        raise NotFoundError(f"model of kind {kind}", model, "known: " + (", ".join(allowed) or "none (the kind has one model)"))
    settings = dict(settings or {})
    unknown = sorted(set(settings) - set(SETTINGS.get(kind, ())))
    if unknown:
        raise NotFoundError(f"setting of kind {kind}", unknown[0], "known: " + (", ".join(SETTINGS.get(kind, ())) or "none"))
    info = catalogue.run(run, apparatus=apparatus)
    source = _Source(catalogue, info, kind)
    options = _Options(x, y, envelope, target, image, interval, model, settings, dict(constants or {}))
    try:
        figures = list(deriver(source, options))
    except FitError as error:
        # The figure functions name their own fit ("ramsey"); the caller asked for a kind.
        raise FitError(kind, error.reason, info.run) from None
    except RunlogError:
        raise
    except ValueError as error:
        # A figure function's ValueError is about the data it was handed (an outcome that is
        # not ±1, a target site beyond the lattice): for a stored run, a refusal of that run.
        raise FitError(kind, str(error), info.run) from None
    for figure in figures:
        if not (figure.method and figure.method_version):
            raise ValueError(f"figure '{figure.name}' of kind {kind} has no method or method version")
    if store:
        recorded = {"x": x, "y": y, "envelope": envelope if kind == "coherence" else None, "target": target, "image": image, "interval": interval}
        if model is not None:
            recorded["model"] = model
        recorded.update({f"setting.{k}": str(v) for k, v in settings.items()})
        catalogue.save_figures(info.run, kind, figures, apparatus=info.apparatus, options=recorded)
    return DeriveResult(info.run, kind, figures, info.apparatus)


def apply_rules(
    catalogue: Catalogue,
    rules: Iterable[dict],
    runs: Iterable[str] | None = None,
    *,
    apparatus_settings: dict[str, dict] | None = None,
) -> list[DeriveResult | FitError]:
    """Apply every rule to the runs it matches; one outcome per (run, rule), oldest run first.

    A rule (a ``[[rules]]`` table of ``runlog.toml``) matches a run whose sequence matches
    its ``sequence`` glob and, when given, whose apparatus matches its ``apparatus`` glob
    (``fnmatch`` patterns, case-sensitive). ``runs`` limits the runs to those keys. A run the
    rule cannot be applied to gives a :class:`FitError` in the list and stores nothing.
    ``apparatus_settings`` are the ``[apparatus."NAME"]`` tables of runlog.toml.
    """
    checked = check_rules(list(rules))
    apparatus_settings = apparatus_settings or {}
    if not checked:
        return []
    wanted = None if runs is None else set(runs)
    table = catalogue.runs()
    outcomes: list[DeriveResult | FitError] = []
    for row in table.iloc[::-1].itertuples(index=False):
        if wanted is not None and row.run not in wanted:
            continue
        for rule in checked:
            if not fnmatchcase(row.sequence, rule["sequence"]):
                continue
            if "apparatus" in rule and not fnmatchcase(row.apparatus, rule["apparatus"]):
                continue
            options: dict[str, object] = {key: rule[key] for key in _RULE_OPTIONS if key in rule}
            settings = {key: rule[key] for key in SETTINGS.get(rule["kind"], ()) if key in rule}
            if settings:
                options["settings"] = settings
            if row.apparatus in apparatus_settings:
                options["constants"] = apparatus_settings[row.apparatus]
            outcomes.append(_attempt(catalogue, row.run, rule["kind"], row.apparatus, options))
    return outcomes


def derive_all(catalogue: Catalogue, rules: Iterable[dict] = (), *, interval: str | None = None, apparatus_settings: dict[str, dict] | None = None) -> DeriveSummary:
    """Recompute the counting figures of every run with images, then apply every rule.

    ``interval`` overrides the interval method of counted figures; by default each run keeps
    the method its stored fill fraction has. Method and method version are those of the
    figure functions, so a recomputation with the same code gives the same versions.
    """
    outcomes: list[DeriveResult | FitError] = []
    table = catalogue.runs()
    for row in table.iloc[::-1].itertuples(index=False):
        info = catalogue.run(row.run, apparatus=row.apparatus)
        if any(image["role"] == "loading" for image in info.images.values()):
            outcomes.append(_attempt(catalogue, row.run, "counting", row.apparatus, {"interval": interval}))
    outcomes.extend(apply_rules(catalogue, rules, apparatus_settings=apparatus_settings))
    return DeriveSummary(tuple(outcomes))


def _attempt(catalogue: Catalogue, run: str, kind: str, apparatus: str, options: dict) -> DeriveResult | FitError:
    """:func:`derive`, with a refusal returned instead of raised."""
    try:
        return derive(catalogue, run, kind, apparatus=apparatus, **options)
    except FitError as error:
        return error
    except NotFoundError as error:
        # A rule names a measurement or parameter this run lacks: the rule does not fit the run.
        return FitError(kind, str(error), run)


# --- choosing x, y and the image -------------------------------------------------------


def _measurement(source: _Source, name: str | None) -> str:
    known = source.info.measurements
    if name is not None:
        if name not in known:
            raise NotFoundError("measurement", name, f"run '{source.info.run}' has {_listed(known)}")
        return name
    if len(known) == 1:
        return known[0]
    raise NotFoundError(
        "single measurement in run", source.info.run, f"it has {_listed(known)}; choose one with --y or y="
    )


def _scanned(source: _Source, name: str | None, suits: Callable[[str], bool], what: str) -> str:
    """The parameter ``name``, or else the only scanned number parameter whose unit ``suits``."""
    parameters = source.info.parameters
    if name is not None:
        if name not in parameters:
            raise NotFoundError("parameter", name, f"run '{source.info.run}' has {_listed(list(parameters))}")
        return name
    scanned = {n: e for n, e in parameters.items() if e["scanned"] and "min" in e}
    fitting = [n for n, e in scanned.items() if suits(str(e["unit"] or ""))]
    if len(fitting) == 1:
        return fitting[0]
    shown = [f"{n} [{e['unit']}]" if e["unit"] else n for n, e in scanned.items()]
    raise NotFoundError(
        f"single scanned {what} in run",
        source.info.run,
        f"its scanned number parameters: {_listed(shown)}; choose one with --x or x=",
    )


def _image(source: _Source, name: str | None) -> str:
    images = source.info.images
    if name is not None:
        if name not in images:
            raise NotFoundError("image", name, f"run '{source.info.run}' has {_listed(list(images))}")
        return name
    if not images:
        raise FitError(source.kind, "the run has no occupancy image")
    # The last image of a shot is the one taken after the walk or the rearrangement.
    return list(images)[-1]


def _listed(names: Sequence[str]) -> str:
    return ", ".join(names) if names else "none"


def _root(unit: str):
    try:
        return registry().get_root_units(parse_unit(unit))
    except Exception:  # pint raises several unrelated types for a unit it does not know
        return None


def _is_angle(unit: str) -> bool:
    # pint treats angles as dimensionless; an angle is a unit whose root unit is the radian.
    root = _root(unit)
    return bool(unit) and root is not None and str(root[1]) == "radian"


def _is_time(unit: str) -> bool:
    root = _root(unit)
    return bool(unit) and root is not None and str(root[1]) == "second"


def _same_unit(source: str, target: str) -> bool:
    factors = conversion(source, target)
    return factors is not None and abs(factors[0] - 1.0) < 1e-12 and factors[1] == 0.0


# --- the kinds -------------------------------------------------------------------------


def _counting(source: _Source, options: _Options) -> list[Figure]:
    images = source.info.images
    loading = next((name for name, image in images.items() if image["role"] == "loading"), None)
    survival = next((name for name, image in images.items() if image["role"] == "survival"), None)
    if loading is None:
        raise FitError("counting", "the run has no loading image")
    interval = options.interval or _stored_interval(source.info)
    # The same counts and the same arithmetic as ingest, so a recomputation from the stored
    # occupancy gives the stored figures to the last bit.
    loaded = source.occupancy(loading)
    figures = [counted_figure("fill_fraction", shot_sums_fill(loaded), interval)]
    if survival is not None and images[survival]["sites"] == images[loading]["sites"]:
        sums = shot_sums_survival(loaded, source.occupancy(survival))
        if sums.trials:
            figures.extend(survival_figures(sums, interval))
    return figures


def _stored_interval(info: RunInfo) -> str:
    stored = info.figures.get("fill_fraction", {})
    method = stored.get("binomial_method") or stored.get("method")
    return method if method in INTERVAL_METHODS else "wilson"


def _fringe(source: _Source, options: _Options) -> list[Figure]:
    x = _scanned(source, options.x, _is_angle, "angle parameter")
    y = _measurement(source, options.y)
    unit = source.unit(f"p.{x}")
    if not _is_angle(unit):
        raise FitError("fringe", f"parameter '{x}' has unit '{unit or 'none'}', not an angle such as deg or rad")
    phase, signal = source.pairs(f"p.{x}", f"m.{y}")
    if _same_unit(unit, "deg"):
        phase_unit = "deg"
    elif _same_unit(unit, "rad"):
        phase_unit = "rad"
    else:  # turn, mrad, grad ...: the fit works in radians
        phase, phase_unit = convert(phase, unit, "rad"), "rad"
    return fit_fringe(phase, signal, phase_unit=phase_unit, y_unit=source.unit(f"m.{y}"))


def _coherence(source: _Source, options: _Options) -> list[Figure]:
    x = _scanned(source, options.x, _is_time, "time parameter")
    y = _measurement(source, options.y)
    unit = source.unit(f"p.{x}")
    if not _is_time(unit):
        raise FitError("coherence", f"parameter '{x}' has unit '{unit or 'none'}', not a time such as us or ms")
    wait, signal = source.pairs(f"p.{x}", f"m.{y}")
    # The wait goes in in its own unit, so the coherence time comes out in it.
    if "contrast" in y.lower():
        return fit_envelope(wait, signal, envelope=options.envelope, wait_unit=unit)
    figures = _programmed_detuning(source, fit_ramsey(wait, signal, envelope=options.envelope, wait_unit=unit))
    sensitivity = options.constants.get("field_sensitivity")
    if sensitivity is not None:
        figures.append(_ramsey_field(source, options, figures, sensitivity))
    return figures


#: Names the Ramsey fringe frequency has had (renamed by migration 0007).
_RAMSEY_FREQUENCY = ("ramsey_frequency", "detuning")


def _programmed_detuning(source: _Source, figures: list[Figure]) -> list[Figure]:
    """The Ramsey frequency in the unit of the run's programmed ``detuning`` parameter (one
    value for the run), with its sign; the phase changes sign with it.

    One scan cannot tell ``(delta, phi)`` from ``(-delta, -phi)``: the programmed detuning
    says which it is. Without such a parameter the frequency stays >= 0 in cycles per unit
    of wait. Angular units convert with the 2π (runlog.units).
    """
    entry = source.info.parameters.get("detuning")
    if entry is None or entry["scanned"] or isinstance(entry.get("value"), bool) or not isinstance(entry.get("value"), (int, float)):
        return figures
    frequency = next(f for f in figures if f.name == "ramsey_frequency")
    target = str(entry["unit"] or "")
    try:
        found = converter(frequency.unit, target)
    except UnitError:
        return figures
    if found.log or found.offset:
        return figures
    sign = -1.0 if float(entry["value"]) < 0 else 1.0
    out = []
    for figure in figures:
        if figure.name == "ramsey_frequency":
            stderr = None if figure.stderr is None else abs(found.scale) * figure.stderr
            figure = dataclasses.replace(figure, value=sign * float(found(figure.value)), unit=target, stderr=stderr)
        elif figure.name == "ramsey_phase" and sign < 0:
            figure = dataclasses.replace(figure, value=float(-figure.value) if figure.value != math.pi else math.pi)
        out.append(figure)
    return out


def _ramsey_field(source: _Source, options: _Options, figures: list[Figure], sensitivity: str) -> Figure:
    """The field at the atoms from a Ramsey fringe, as spectroscopy's from a resonance.

    The fringe frequency δ is |f_atoms − f_oscillator| (a fringe cannot tell the sign:
    ``side`` says whether the atoms' transition lies ``above`` the oscillator, the default,
    or ``below``). ``oscillator`` is the oscillator's frequency (a parameter or a quantity):
    its detuning from the zero-field transition, or its absolute frequency when the
    apparatus gives ``zero_field_frequency``; without it the oscillator sits on the zero-field
    transition. The transition is then at ``oscillator ± δ`` and
    :func:`~runlog.figures.spectroscopy.field_from_resonance` turns it into the field.
    """
    frequency = next(f for f in figures if f.name in _RAMSEY_FREQUENCY)
    side = str(options.settings.get("side", "above"))
    if side not in ("above", "below"):
        raise FitError("coherence", f"side '{side}' must be 'above' or 'below' (the atoms' transition against the oscillator)")
    zero_field = options.constants.get("zero_field_frequency")
    given = options.settings.get("oscillator")
    if given is None and zero_field is not None:
        raise FitError("coherence", "the apparatus gives zero_field_frequency: give oscillator= (the oscillator's frequency) to place the Ramsey fringe")
    oscillator = 0.0 if given is None else _quantity_setting(source, given, frequency.unit, "oscillator")
    transition = oscillator + (frequency.value if side == "above" else -frequency.value)
    placed = Figure("resonance", transition, frequency.unit, stderr=frequency.stderr, method=frequency.method, method_version=frequency.method_version)
    try:
        return field_from_resonance(placed, sensitivity, zero_field, method="ramsey frequency/sensitivity")
    except ValueError as error:
        raise FitError("coherence", str(error)) from None


def _spreading(source: _Source, options: _Options) -> list[Figure]:
    x = _scanned(source, options.x, lambda unit: True, "parameter")
    image = _image(source, options.image)
    shape = source.info.images[image]["shape"]
    if sum(1 for n in shape if n > 1) > 1:
        raise FitError(
            "spreading",
            f"image '{image}' is a {'x'.join(map(str, shape))} lattice; the spread is taken along one line of sites",
        )
    occupancy = source.occupancy(image)
    steps = source.numbers(f"p.{x}")
    start = _walk_start(source, image, options)
    values, spreads = [], []
    for value in np.unique(steps[np.isfinite(steps)]):
        chosen = steps == value
        try:
            spread, _ = walk_spread(occupancy[chosen], start if np.ndim(start) == 0 else start[chosen])
        except FitError:
            continue  # every shot of this step reached the edge or lost its atoms: no width
        values.append(value)
        spreads.append(spread)
    return fit_spreading(values, spreads)


def _walk_start(source: _Source, image: str, options: _Options):
    """Where each shot's walk started: the ``start_site`` setting (a site index), else the
    one occupied site of each shot's loading image when the walk is imaged apart from it."""
    given = options.settings.get("start_site")
    sites = source.info.images[image]["sites"]
    if given is not None:
        if isinstance(given, bool) or not isinstance(given, (int, float)) or not 0 <= given < sites:
            raise FitError("spreading", f"start_site must be a site index 0..{sites - 1}, got {given!r}")
        return float(given)
    loading = next((name for name, entry in source.info.images.items() if entry["role"] == "loading" and name != image and entry["sites"] == sites), None)
    if loading is None:
        raise FitError("spreading", "no start site: give the start_site setting, or a loading image of the same sites showing where each atom started")
    return start_sites(source.occupancy(loading))


def _sorting(source: _Source, options: _Options) -> list[Figure]:
    image = _image(source, options.image)
    target = _target(source, options.target)
    return sorting_figures(source.occupancy(image), target, method=options.interval or "wilson")


def _target(source: _Source, target: str | Sequence[int] | None) -> np.ndarray:
    parameters = source.info.parameters
    if target is None:
        found = [
            name
            for name, entry in parameters.items()
            if not entry["scanned"] and isinstance(entry.get("value"), str) and _site_indices(entry["value"]) is not None
        ]
        if len(found) != 1:
            raise NotFoundError(
                "single target parameter in run",
                source.info.run,
                f"text parameters holding site indices: {_listed(found)}; give --target or target=",
            )
        target = found[0]
    if not isinstance(target, str):
        return np.asarray(list(target), dtype=np.int64)
    if target in parameters:
        entry = parameters[target]
        if entry["scanned"]:
            raise FitError("sorting", f"target parameter '{target}' changes from shot to shot; one target per run is needed")
        indices = _site_indices(entry["value"]) if isinstance(entry.get("value"), str) else None
        if indices is None:
            raise FitError("sorting", f"parameter '{target}' = {entry.get('value')!r} is not a list of site indices such as '0,1,2,5'")
        return indices
    indices = _site_indices(target)
    if indices is None:
        raise NotFoundError("target parameter", target, "neither a parameter of the run nor site indices such as '0,1,2,5'")
    return indices


def _site_indices(text: str) -> np.ndarray | None:
    """``"0,1,2,5"`` (or ``"[0 1 2 5]"``) as integers; ``None`` when it is not such a list."""
    tokens = [t for t in re.split(r"[\s,;]+", text.strip().strip("[]()")) if t]
    if not tokens or not all(t.isdigit() for t in tokens):
        return None
    return np.asarray([int(t) for t in tokens], dtype=np.int64)


def _correlator(source: _Source, options: _Options) -> list[Figure]:
    known = source.info.measurements
    if options.y is not None:
        names = [name.strip() for name in options.y.split(",") if name.strip()]
    elif set(_SAME_CORRELATOR_OUTCOMES) <= set(known):
        names = list(_SAME_CORRELATOR_OUTCOMES)
    elif len(known) == 2:
        names = list(known)  # <a b> does not depend on which is first
    else:
        raise NotFoundError(
            "correlator outcomes in run",
            source.info.run,
            f"it has {_listed(known)}; give three (--y q1,q2,q3) or two with a pair parameter (--y a,b)",
        )
    for name in names:
        if name not in known:
            raise NotFoundError("measurement", name, f"run '{source.info.run}' has {_listed(known)}")
    if len(names) == 3:
        outcomes = np.column_stack([source.numbers(f"m.{name}") for name in names])
        outcomes = outcomes[np.all(np.isfinite(outcomes), axis=1)]
        return correlators(outcomes[:, 0], outcomes[:, 1], outcomes[:, 2])
    if len(names) == 2:
        pair = _pair_parameter(source, options.x)
        labels = np.asarray([_pair_label(v) for v in source.shots[f"p.{pair}"]], dtype=object)
        earlier, later = source.numbers(f"m.{names[0]}"), source.numbers(f"m.{names[1]}")
        keep = np.isfinite(earlier) & np.isfinite(later) & (labels != None)  # noqa: E711
        return correlators_from_pairs(earlier[keep], later[keep], labels[keep].astype(str))
    raise FitError(
        "correlator",
        f"y names {len(names)} measurement(s); three (same shots) or two (with a pair parameter) are needed",
    )


def _pair_parameter(source: _Source, name: str | None) -> str:
    parameters = source.info.parameters
    if name is not None:
        if name not in parameters:
            raise NotFoundError("parameter", name, f"run '{source.info.run}' has {_listed(list(parameters))}")
        return name
    found = []
    for candidate, entry in parameters.items():
        if entry["scanned"]:
            labels = {_pair_label(v) for v in source.shots[f"p.{candidate}"]} - {None}
            if labels and labels <= set(PAIR_LABELS):
                found.append(candidate)
    if len(found) != 1:
        raise NotFoundError(
            "single pair parameter in run",
            source.info.run,
            f"scanned parameters holding {', '.join(PAIR_LABELS)}: {_listed(found)}; choose one with --x or x=",
        )
    return found[0]


def _pair_label(value: object) -> str | None:
    """A shot's pair label as text: ``"12"`` from ``"12"``, ``12`` or ``12.0``; None if absent."""
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return None
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


# --- the health-figure kinds: a signal per shot against a scanned time or frequency -----


def _is_frequency(unit: str) -> bool:
    root = _root(unit)
    return bool(unit) and root is not None and str(root[1]) == "1 / second"


def _signal(source: _Source, options: _Options) -> tuple[np.ndarray, np.ndarray, str, str]:
    """``(keep, y, name, unit)``: the signal of the shots that have one, by the rule of the module docstring."""
    known = source.info.measurements
    if options.y is not None or known:
        name = _measurement(source, options.y)
        values = source.numbers(f"m.{name}")
        return np.isfinite(values), values, name, source.unit(f"m.{name}")
    images = source.info.images
    if not images:
        raise FitError(source.kind, "the run has neither a measurement nor an occupancy image to give a signal per shot")
    loading = next((n for n, e in images.items() if e["role"] == "loading"), None)
    survival = next((n for n, e in images.items() if e["role"] == "survival"), None)
    if loading is not None and survival is not None and images[loading]["sites"] == images[survival]["sites"]:
        loaded = source.occupancy(loading)
        kept = np.count_nonzero(loaded & source.occupancy(survival), axis=1)
        tries = np.count_nonzero(loaded, axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            values = kept / tries
        return tries > 0, values, "surviving fraction", ""
    image = _image(source, options.image)
    occupancy = source.occupancy(image)
    return np.ones(occupancy.shape[0], dtype=bool), occupancy.mean(axis=1), f"occupied fraction of {image}", ""


def _scan(source: _Source, options: _Options, suits: Callable[[str], bool], what: str) -> tuple[str, str, np.ndarray, np.ndarray, np.ndarray]:
    """``(x name, x unit, x, y, keep)`` of the shots with both a scanned value and a signal."""
    x = _scanned(source, options.x, suits, what)
    unit = source.unit(f"p.{x}")
    if not suits(unit):
        raise FitError(source.kind, f"parameter '{x}' has unit '{unit or 'none'}', not a {what.replace(' parameter', '')}")
    keep, values, _, _ = _signal(source, options)
    scanned = source.numbers(f"p.{x}")
    keep = keep & np.isfinite(scanned) & np.isfinite(values)
    return x, unit, scanned[keep], values[keep], keep


def _quantity_setting(source: _Source, value: object, unit: str, what: str) -> float:
    """A setting that is a parameter name (its run value) or a quantity text, in ``unit``."""
    parameters = source.info.parameters
    if isinstance(value, str) and value in parameters:
        entry = parameters[value]
        if entry["scanned"] or not isinstance(entry.get("value"), (int, float)):
            raise FitError(source.kind, f"{what} parameter '{value}' must hold one number for the whole run")
        text_unit = str(entry["unit"] or "")
        factors = conversion(text_unit, unit)
        if factors is None:
            raise FitError(source.kind, f"{what} parameter '{value}' is in '{text_unit or 'no unit'}', not convertible to '{unit}'")
        return float(entry["value"]) * factors[0] + factors[1]
    try:
        return float(quantity(str(value)).to(parse_unit(unit)).magnitude)
    except Exception:
        raise FitError(source.kind, f"{what} {value!r} is neither a parameter of the run nor a quantity in a unit convertible to '{unit}'") from None


def _pulse(source: _Source, options: _Options, frequency_unit: str) -> float:
    """The pulse duration of a Rabi lineshape in 1/``frequency_unit``."""
    reciprocal = f"1/({frequency_unit})"
    given = options.settings.get("pulse")
    if given is None:
        found = [n for n, e in source.info.parameters.items() if not e["scanned"] and isinstance(e.get("value"), (int, float)) and not isinstance(e.get("value"), bool) and _is_time(str(e["unit"] or ""))]
        if len(found) != 1:
            raise NotFoundError("single pulse-duration parameter in run", source.info.run, f"fixed time parameters: {_listed(found)}; give pulse=")
        given = found[0]
    return _quantity_setting(source, given, reciprocal, "pulse")


def _rabi(source: _Source, options: _Options) -> list[Figure]:
    mode = options.model
    if mode is None:
        scanned = [e for n, e in source.info.parameters.items() if e["scanned"] and "min" in e and (options.x is None or n == options.x)]
        times = [e for e in scanned if _is_time(str(e["unit"] or ""))]
        mode = "oscillation" if times or not any(_is_frequency(str(e["unit"] or "")) for e in scanned) else "lineshape"
    if mode == "lineshape":
        figures = _lineshape(source, options, "rabi")
        return [f for f in figures if f.name in ("resonance", "rabi_frequency")]
    _, unit, duration, signal, _ = _scan(source, options, _is_time, "time parameter")
    return fit_rabi(duration, signal, duration_unit=unit)


def _lineshape(source: _Source, options: _Options, lineshape: str) -> list[Figure]:
    _, unit, frequency, signal, _ = _scan(source, options, _is_frequency, "frequency parameter")
    pulse = _pulse(source, options, unit) if lineshape == "rabi" else None
    return fit_lineshape(frequency, signal, lineshape=lineshape, pulse=pulse, frequency_unit=unit)


def _spectroscopy(source: _Source, options: _Options) -> list[Figure]:
    figures = _lineshape(source, options, options.model or LINESHAPES[0])
    sensitivity = options.constants.get("field_sensitivity")
    if sensitivity is not None:
        resonance = next(f for f in figures if f.name == "resonance")
        figures.append(field_from_resonance(resonance, sensitivity, options.constants.get("zero_field_frequency")))
    return figures


def _echo(source: _Source, options: _Options) -> list[Figure]:
    _, unit, wait, signal, _ = _scan(source, options, _is_time, "time parameter")
    named = options.y if options.y is not None else (source.info.measurements[0] if len(source.info.measurements) == 1 else "")
    stretch = options.settings.get("stretch")
    try:
        stretch = None if stretch is None else float(stretch)
    except (TypeError, ValueError):
        raise FitError("echo", f"stretch {stretch!r} is not a number") from None
    return fit_echo(wait, signal, wait_unit=unit, contrast_series="contrast" in named.lower(), stretch=stretch)


def _t1(source: _Source, options: _Options) -> list[Figure]:
    _, unit, wait, signal, keep = _scan(source, options, _is_time, "time parameter")
    name = options.settings.get("reference")
    if name is None:
        return fit_t1(wait, signal, wait_unit=unit)
    if name not in source.info.parameters:
        raise NotFoundError("parameter", str(name), f"run '{source.info.run}' has {_listed(list(source.info.parameters))}")
    flags = source.numbers(f"p.{name}")[keep]
    if not np.all(np.isfinite(flags)):
        raise FitError("t1", f"reference parameter '{name}' is missing on some shots")
    return fit_t1(wait, signal, reference=flags != 0, wait_unit=unit)


def _lifetime(source: _Source, options: _Options) -> list[Figure]:
    _, unit, hold, signal, _ = _scan(source, options, _is_time, "time parameter")
    return fit_lifetime(hold, signal, hold_unit=unit, two_body=options.model == "two-body")


def _detection(source: _Source, options: _Options) -> list[Figure]:
    images = source.info.images
    loading = next((n for n, e in images.items() if e["role"] == "loading"), None)
    survival = next((n for n, e in images.items() if e["role"] == "survival"), None)
    image = _image(source, options.image) if options.image is not None else (loading or _image(source, None))
    given = options.settings.get("threshold")
    try:
        threshold = None if given is None else float(given)
    except (TypeError, ValueError):
        raise FitError("detection", f"threshold {given!r} is not a number") from None

    def counts_of(name: str) -> np.ndarray:
        counts, _ = source.catalogue.photon_counts(source.info.run, name, apparatus=source.info.apparatus)
        return counts

    fits = {image: fit_counts(counts_of(image), model=options.model)}
    if threshold is not None:
        fits[image] = dataclasses.replace(fits[image], threshold=threshold)
    figures = detection_figures(fits[image])
    if image != loading or loading is None:
        return figures
    # Fill and survival corrected for the detection errors, from the counts thresholded here.
    first = counts_of(loading) >= fits[loading].threshold
    figures.append(corrected_fill(int(first.sum()), int(first.size), fits[loading]))
    if survival is not None and images[survival]["sites"] == images[loading]["sites"]:
        try:
            later = counts_of(survival)
            fits[survival] = fit_counts(later, model=options.model)
            second = later >= fits[survival].threshold
        except NotFoundError:
            # No counts for the survival image: its stored occupancy, with the loading image's errors.
            second = source.occupancy(survival)
        figures.extend(corrected_survival(int(first.sum()), int((first & second).sum()), int(first.size), fits[loading], fits.get(survival)))
    return figures


def _trap_setting(source: _Source, options: _Options, name: str) -> tuple[float, str]:
    """``(value, unit)`` of a trap setting: ``settings[name]``, else the run's only fixed
    parameter whose name contains ``name``."""
    given = options.settings.get(name)
    if given is None:
        given = _trap_setting_name(source, name)
    parameters = source.info.parameters
    if isinstance(given, str) and given in parameters:
        entry = parameters[given]
        if entry["scanned"] or not isinstance(entry.get("value"), (int, float)):
            raise FitError(source.kind, f"{name} parameter '{given}' must hold one number for the whole run")
        return float(entry["value"]), str(entry["unit"] or "")
    try:
        given_quantity = quantity(str(given))
    except Exception:
        raise FitError(source.kind, f"{name} {given!r} is neither a parameter of the run nor a quantity with a unit") from None
    return float(given_quantity.magnitude), str(given_quantity.units)


def _release_recapture(source: _Source, options: _Options, trap_only: bool = False):
    _, unit, release, signal, _ = _scan(source, options, _is_time, "time parameter")
    depth_value, depth_unit = _trap_setting(source, options, "depth")
    try:
        depth = depth_in_joules(depth_value, depth_unit)
    except ValueError as error:
        raise FitError("release_recapture", str(error)) from None
    waist = _quantity_setting(source, options.settings.get("waist") or _trap_setting_name(source, "waist"), "m", "waist")
    wavelength = None  # without one the trap has no axial dependence (module docstring)
    if options.settings.get("wavelength") is not None or any("wavelength" in n.lower() for n in source.info.parameters):
        wavelength = _quantity_setting(source, options.settings.get("wavelength") or _trap_setting_name(source, "wavelength"), "m", "wavelength")
    gravity = 9.80665 if options.settings.get("gravity") is None else _quantity_setting(source, options.settings["gravity"], "m/s^2", "gravity")
    mass_text = options.settings.get("mass")
    if mass_text is None:
        found = [e["value"] for n, e in source.info.parameters.items() if n.lower() in ("atom", "species", "isotope", "mass") and not e["scanned"] and e.get("value") is not None]
        if len(found) != 1:
            raise NotFoundError("atom of run", source.info.run, "give mass= (an atom such as 87Rb, or a mass such as '86.909 u'), or a text parameter 'atom'")
        mass_text = found[0]
    try:
        mass = atom_mass(str(mass_text))
    except KeyError:
        mass = _quantity_setting(source, mass_text, "kg", "mass")
    try:
        trap = Trap(depth=depth, waist=waist, mass=mass, wavelength=wavelength, gravity=gravity)
    except ValueError as error:
        raise FitError("release_recapture", str(error)) from None
    if trap_only:
        return trap
    return fit_release_recapture(release, signal, trap, release_unit=unit)


def _trap_setting_name(source: _Source, name: str) -> str:
    found = [n for n, e in source.info.parameters.items() if name in n.lower() and not e["scanned"]]
    if len(found) != 1:
        raise NotFoundError(f"single {name} parameter in run", source.info.run, f"parameters named like '{name}': {_listed(found)}; give {name}=")
    return found[0]


def _two_atom(source: _Source, options: _Options) -> list[Figure]:
    if options.y is not None:
        name = _measurement(source, options.y)
        keep = np.isfinite(source.numbers(f"m.{name}"))
        coincidence = source.numbers(f"m.{name}")[keep]
        coincident = pairs = None
    else:
        images = source.info.images
        loading = next((n for n, e in images.items() if e["role"] == "loading"), None)
        final = _image(source, options.image)
        if loading is None or final == loading:
            raise FitError("two_atom", "two images are needed: the loading image and one after the beam-splitter step")
        coincident, pairs = coincidences(source.occupancy(loading), source.occupancy(final))
        keep = pairs > 0
        coincidence = coincident[keep] / pairs[keep]
    scanned = [n for n, e in source.info.parameters.items() if e["scanned"] and "min" in e]
    if options.x is None and not scanned:
        if coincident is None:
            raise FitError("two_atom", "a coincidence measurement at one setting has no pair counts for an interval; give the images instead")
        return visibility_at_one_setting(int(coincident.sum()), int(pairs.sum()), interval=options.interval or "wilson")
    x = _scanned(source, options.x, lambda unit: True, "parameter")
    values = source.numbers(f"p.{x}")[keep]
    good = np.isfinite(values)
    return fit_visibility(values[good], coincidence[good], x_unit=source.unit(f"p.{x}"))


_DERIVERS: dict[str, Callable[[_Source, _Options], list[Figure]]] = {
    "counting": _counting,
    "fringe": _fringe,
    "coherence": _coherence,
    "spreading": _spreading,
    "sorting": _sorting,
    "correlator": _correlator,
    "rabi": _rabi,
    "spectroscopy": _spectroscopy,
    "echo": _echo,
    "t1": _t1,
    "lifetime": _lifetime,
    "detection": _detection,
    "release_recapture": _release_recapture,
    "two_atom": _two_atom,
}


# --- the fitted curve of a stored run ---------------------------------------------------

#: Figure names that mark a run's stored fit, and the curve each gives.
_CURVE_FIGURES = {
    "fringe": ("contrast", "fringe_phase", "offset"),
    "coherence": ("t2_star", "ramsey_contrast", "ramsey_frequency", "ramsey_phase"),
}


@dataclass(frozen=True)
class FitCurve:
    """A run's fitted model beside its shots, for drawing one over the other.

    ``x``/``y`` are the shots that have both values (in the parameter's and measurement's
    units); ``curve_x``/``curve_y`` the model evaluated from the stored figures over the
    scanned range. ``formula`` is the model in words; ``offset`` is ``a`` of the model and
    ``offset_estimated`` says whether it came from the shots (Ramsey figures do not store it).
    """

    run: str
    kind: str
    formula: str
    x_name: str
    x_unit: str
    y_name: str
    y_unit: str
    x: np.ndarray
    y: np.ndarray
    curve_x: np.ndarray
    curve_y: np.ndarray
    offset: float
    offset_estimated: bool


def fit_curve(
    catalogue: Catalogue,
    run: str,
    *,
    apparatus: str | None = None,
    x: str | None = None,
    y: str | None = None,
    envelope: str | None = None,
    points: int = 400,
) -> FitCurve:
    """The stored fringe or Ramsey fit of ``run`` evaluated over its scan, with its shots.

    The kind follows from the stored figures: ``contrast``/``phase``/``offset`` draw the
    fringe ``y = a (1 + C cos(x + phi))``; ``t2_star``/``ramsey_contrast``/
    ``ramsey_frequency``/``ramsey_phase`` the Ramsey fringe ``y = a (1 + C0 E(t) cos(2 pi delta t + phi))``.
    ``x``, ``y`` and the Ramsey ``envelope`` default to those the stored fit was made with
    (its figure record's options), else as in :func:`derive` (envelope ``"gaussian"``).

    The Ramsey offset ``a`` is not stored either. The model is linear in ``a``, so for the
    stored ``C0, T, delta, phi`` the least-squares ``a`` has the closed form
    ``sum(y g) / sum(g^2)`` with ``g = 1 + C0 E(t) cos(...)``; at the joint least-squares
    optimum of the (unweighted) fit that is the fitted ``a`` itself.

    Raises :class:`FitError` when the run has neither fit stored.
    """
    info = catalogue.run(run, apparatus=apparatus)
    figures = info.figures
    made_with = _stored_options(catalogue, info)
    x = x or made_with.get("x")
    y = y or made_with.get("y")
    envelope = envelope or made_with.get("envelope") or "gaussian"
    if envelope not in ENVELOPES:
        raise NotFoundError("envelope", envelope, "known: " + ", ".join(ENVELOPES))
    kind = next((k for k, names in _CURVE_FIGURES.items() if all(n in figures for n in names)), None)
    if kind is None:
        health = next((k for k, marker in _HEALTH_CURVES.items() if marker in figures), None)
        if health is not None:
            return _health_curve(catalogue, info, health, x, y, points)
    if kind is None:
        raise FitError("curve", "the run has no stored fit to draw (derive --kind fringe, coherence, rabi, spectroscopy, echo, t1 or lifetime first)", info.run)
    source = _Source(catalogue, info, kind)
    x_name = _scanned(source, x, _is_angle if kind == "fringe" else _is_time, "angle parameter" if kind == "fringe" else "time parameter")
    y_name = _measurement(source, y)
    x_unit, y_unit = source.unit(f"p.{x_name}"), source.unit(f"m.{y_name}")
    shots_x, shots_y = source.pairs(f"p.{x_name}", f"m.{y_name}")
    if shots_x.size == 0:
        raise FitError(kind, f"no shot has both '{x_name}' and '{y_name}'", info.run)
    grid = np.linspace(float(shots_x.min()), float(shots_x.max()), points)

    def value(name: str) -> float:
        return float(figures[name]["value"])

    def in_unit(values: np.ndarray, unit: str) -> np.ndarray:
        if conversion(x_unit, unit) is None:
            raise FitError(kind, f"parameter '{x_name}' is in '{x_unit}', the stored fit in '{unit}'", info.run)
        return convert(values, x_unit, unit)

    if kind == "fringe":
        phase_unit = str(figures["fringe_phase"]["unit"] or "rad")
        phi = value("fringe_phase")

        def model(v: np.ndarray) -> np.ndarray:
            radians = convert(in_unit(v, phase_unit), phase_unit, "rad") + convert(np.asarray([phi]), phase_unit, "rad")[0]
            return value("offset") * (1.0 + value("contrast") * np.cos(radians))

        return FitCurve(info.run, kind, "y = a (1 + C cos(x + φ))", x_name, x_unit, y_name, y_unit, shots_x, shots_y, grid, model(grid), value("offset"), False)

    wait_unit = str(figures["t2_star"]["unit"] or x_unit)
    # The frequency is stored in the programmed detuning's unit (cyclic or angular): back to
    # cycles per wait unit, where 2 pi delta t is in radians.
    frequency = float(convert(np.asarray([value("ramsey_frequency")]), str(figures["ramsey_frequency"]["unit"] or ""), frequency_unit(wait_unit))[0])
    shape = ENVELOPES[envelope]

    def shape_only(v: np.ndarray) -> np.ndarray:
        t = in_unit(v, wait_unit)
        fringe = np.cos(2.0 * np.pi * frequency * t + value("ramsey_phase"))
        return 1.0 + value("ramsey_contrast") * shape(t, value("t2_star")) * fringe

    g = shape_only(shots_x)
    offset = float(np.dot(shots_y, g) / np.dot(g, g))
    decay = {"gaussian": "exp(-(t/T)²)", "exponential": "exp(-t/T)", "thermal": "(1 + 0.95 (t/T)²)^(-3/2)"}[envelope]
    formula = f"y = a (1 + C0 E(t) cos(2π δ t + φ)), E(t) = {decay}"
    return FitCurve(info.run, kind, formula, x_name, x_unit, y_name, y_unit, shots_x, shots_y, grid, offset * shape_only(grid), offset, True)


def fitted_signal(catalogue: Catalogue, info: RunInfo) -> tuple[str, str, str] | None:
    """``(x, y, why)`` of the signal a run without a stored fit of its own is drawn with:
    the parameter and measurement the newest fit of its sequence (same apparatus) was made
    on, when this run has both; else its only measurement against its only scanned number
    parameter, as :func:`derive` would fit it. ``None`` when neither tells.
    """
    scanned = [name for name, entry in info.parameters.items() if entry.get("scanned") and "min" in entry]
    made = catalogue.sequence_fit(info.apparatus, info.sequence)
    if made is not None and made["y"] in info.measurements:
        x = made["x"] or (scanned[0] if len(scanned) == 1 else None)  # None: derive took the only one
        if x in scanned:
            return x, made["y"], f"as the {made['kind']} fit of run {made['run']} ({info.sequence})"
    if len(scanned) == 1 and len(info.measurements) == 1:
        return scanned[0], info.measurements[0], "the run's only measurement"
    return None


def _stored_options(catalogue: Catalogue, info: RunInfo) -> dict[str, object]:
    """The options (x, y, envelope ...) the run's stored fringe or Ramsey fit was made with."""
    for record in catalogue.figure_history(info.run, apparatus=info.apparatus):
        if record.get("in_force") and record.get("figure") in ("t2_star", "fringe_phase", "envelope_time"):
            return {k: v for k, v in dict(record.get("options") or {}).items() if isinstance(v, str)}
    return {}


#: The figure that marks each health kind's stored fit.
_HEALTH_CURVES = {"rabi": "pi_time", "spectroscopy": "linewidth", "echo": "t2", "t1": "t1", "lifetime": "lifetime", "detection": "fidelity", "release_recapture": "temperature", "two_atom": "overlap_width"}


def _health_curve(catalogue: Catalogue, info: RunInfo, kind: str, x: str | None, y: str | None, points: int) -> FitCurve:
    """The stored fit of a health kind over its shots.

    Every model of these kinds is linear in its level and amplitude once its times, rates
    and frequencies are fixed; the stored figures fix those, and the linear coefficients are
    the least-squares values over the shots (``offset_estimated``), as for the Ramsey offset.
    """
    figures = info.figures
    source = _Source(catalogue, info, kind)
    if kind == "detection":
        return _histogram_curve(source)
    options = _Options(x, y, "gaussian", None, None, None)
    if kind == "two_atom":
        x_name = _scanned(source, x, lambda unit: True, "parameter")
        x_unit, y_name, y_unit = source.unit(f"p.{x_name}"), "coincidence fraction", ""
        loading = next(n for n, e in info.images.items() if e["role"] == "loading")
        coincident, pairs = coincidences(source.occupancy(loading), source.occupancy(_image(source, None)))
        keep = pairs > 0
        shots_x, shots_y = source.numbers(f"p.{x_name}")[keep], coincident[keep] / pairs[keep]
    else:
        suits, what = (_is_frequency, "frequency parameter") if kind == "spectroscopy" else (_is_time, "time parameter")
        x_name, x_unit, shots_x, shots_y, keep = _scan(source, options, suits, what)
        _, _, y_name, y_unit = _signal(source, options)
    if shots_x.size == 0:
        raise FitError(kind, "no shot has both a scanned value and a signal", info.run)

    def value(name: str) -> float:
        return float(figures[name]["value"])

    def in_unit(name: str, values: np.ndarray) -> np.ndarray:
        unit = str(figures[name]["unit"] or x_unit)
        if conversion(x_unit, unit) is None:
            raise FitError(kind, f"parameter '{x_name}' is in '{x_unit}', the stored fit in '{unit}'", info.run)
        return convert(values, x_unit, unit)

    if kind == "rabi":
        t_of = lambda v: in_unit("pi_time", v)  # noqa: E731
        rate = 1.0 / value("damping_time") if "damping_time" in figures else 0.0
        frequency = 0.5 / value("pi_time")

        def basis(v: np.ndarray) -> np.ndarray:
            t = t_of(v)
            return np.column_stack([np.ones_like(t), rabi_model(t, 0.0, 2.0, frequency, rate)])

        formula = "y = a + (C/2)(1 − e^(−t/τ) cos(2π f t))"
    elif kind == "spectroscopy":
        x0, width = value("resonance"), value("linewidth")
        f_of = lambda v: in_unit("resonance", v)  # noqa: E731
        if "rabi_frequency" in figures:
            pulse = _pulse(source, options, str(figures["resonance"]["unit"] or x_unit))

            def basis(v: np.ndarray) -> np.ndarray:
                f = f_of(v)
                return np.column_stack([np.ones_like(f), rabi_lineshape(f, 0.0, 1.0, x0, value("rabi_frequency"), pulse)])

            formula = "y = a + A Ω²/(Ω² + Δ²) sin²(√(Ω² + Δ²) T/2)"
        else:

            def basis(v: np.ndarray) -> np.ndarray:
                f = f_of(v)
                return np.column_stack([np.ones_like(f), lorentzian(f, 0.0, 1.0, x0, width)])

            formula = "y = a + A / (1 + (2 (x − x0)/Γ)²)"
    elif kind == "echo":
        stretch = value("stretch") if "stretch" in figures else 1.0
        series = "contrast" in y_name.lower()

        def basis(v: np.ndarray) -> np.ndarray:
            decay = echo_model(in_unit("t2", v), 0.0, 1.0, value("t2"), stretch)
            return decay[:, None] if series else np.column_stack([np.ones_like(decay), decay])

        formula = "C(t) = C0 exp(−(t/T2)ⁿ)" if series else "y = a + C0 exp(−(t/T2)ⁿ)"
    elif kind == "t1":
        loss = 1.0 / value("loss_lifetime") if "loss_lifetime" in figures else 0.0

        def basis(v: np.ndarray) -> np.ndarray:
            t = in_unit("t1", v)
            kept = np.exp(-loss * t)
            return np.column_stack([kept * relaxation_model(t, 0.0, 1.0, 1.0 / value("t1")), kept * relaxation_model(t, 1.0, 0.0, 1.0 / value("t1"))])

        formula = "P(t) = P∞ + (P0 − P∞) e^(−t/T1)"
    elif kind == "two_atom":

        def basis(v: np.ndarray) -> np.ndarray:
            return dip_model(v, 1.0, value("visibility"), value("overlap_centre"), value("overlap_width"))[:, None]

        formula = "P_c = B (1 − V exp(−(x − x0)²/(2s²)))"
    elif kind == "release_recapture":
        trap = _release_recapture(source, options, trap_only=True)
        grid_seconds = convert(np.linspace(0.0, float(shots_x.max()), points), x_unit, "s")
        critical = critical_temperatures(trap, grid_seconds)
        curve_p = recapture_probability(critical, value("temperature") * 1e-6)
        release_grid = np.linspace(0.0, float(shots_x.max()), points)

        def basis(v: np.ndarray) -> np.ndarray:
            return np.interp(v, release_grid, curve_p)[:, None]

        formula = f"y = A P(t; T), T = {value('temperature'):.3g} uK (classical trajectories)"
    else:
        two_body = value("two_body_fraction") if "two_body_fraction" in figures else 0.0

        def basis(v: np.ndarray) -> np.ndarray:
            return lifetime_model(in_unit("lifetime", v), 1.0, 1.0 / value("lifetime"), two_body)[:, None]

        formula = "S(t) = S0 e^(−t/τ)" + (" / (1 + b (1 − e^(−t/τ)))" if two_body else "")
    matrix = basis(shots_x)
    coefficients, *_ = np.linalg.lstsq(matrix, shots_y, rcond=None)
    grid = np.linspace(float(shots_x.min()), float(shots_x.max()), points)
    return FitCurve(info.run, kind, formula, x_name, x_unit, y_name, y_unit, shots_x, shots_y, grid, basis(grid) @ coefficients, float(coefficients[0]), True)


def _histogram_curve(source: _Source) -> FitCurve:
    """The count histogram of the loading image (fraction of site observations per bin)
    with the refitted two-component model over it; the threshold is the stored one."""
    info = source.info
    image = next((n for n, e in info.images.items() if e["role"] == "loading"), None) or _image(source, None)
    counts, _ = source.catalogue.photon_counts(info.run, image, apparatus=info.apparatus)
    method = str(info.figures["fidelity"]["method"])
    model = "gaussian" if "gaussian" in method else "poisson"
    fit = fit_counts(counts, model=model)
    values = counts.ravel()
    if model == "poisson":
        edges = np.arange(np.floor(values.min()), np.ceil(values.max()) + 2) - 0.5
    else:
        edges = np.histogram_bin_edges(values, bins=60)
    frequency, edges = np.histogram(values, bins=edges)
    centres = 0.5 * (edges[1:] + edges[:-1])
    width = float(edges[1] - edges[0])
    grid = centres if model == "poisson" else np.linspace(edges[0], edges[-1], 400)
    from scipy import stats

    w = fit.bright_fraction
    if model == "poisson":
        density = (1 - w) * stats.poisson.pmf(grid, fit.dark_mean) + w * stats.poisson.pmf(grid, fit.bright_mean)
        formula = "(1 − w) Pois(k; d) + w Pois(k; b)"
    else:
        density = width * ((1 - w) * stats.norm.pdf(grid, fit.dark_mean, fit.dark_sd) + w * stats.norm.pdf(grid, fit.bright_mean, fit.bright_sd))
        formula = "(1 − w) N(d, s_d) + w N(b, s_b)"
    formula += f", threshold {info.figures['threshold']['value']:.4g}"
    return FitCurve(info.run, "detection", formula, f"counts of {image}", "", "fraction of sites", "", centres, frequency / values.size, grid, density, w, True)
