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
  outcomes ``"a,b"`` and a pair-selector parameter ``x`` holding ``12``, ``23`` or ``13``.

Every shot of the run counts; a shot lacking ``x`` or ``y`` (NaN) is left out of a fit.
"""

from __future__ import annotations

import dataclasses
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
from runlog.figures.coherence import ENVELOPES, fit_envelope, fit_ramsey
from runlog.figures.correlator import PAIR_LABELS, correlators, correlators_from_pairs
from runlog.figures.counting import counts_fill, counts_survival, proportion_figure
from runlog.figures.fringe import fit_fringe
from runlog.figures.intervals import INTERVAL_METHODS
from runlog.figures.sorting import sorting_figures
from runlog.figures.spreading import fit_spreading, position_spread
from runlog.units import conversion, convert, registry

if TYPE_CHECKING:
    from runlog.catalogue import Catalogue, RunInfo

__all__ = ["KINDS", "DeriveResult", "DeriveSummary", "FitCurve", "apply_rules", "derive", "derive_all", "fit_curve"]

#: The figure kinds :func:`derive` can apply to a run.
KINDS = frozenset({"counting", "fringe", "coherence", "spreading", "sorting", "correlator"})

_SAME_CORRELATOR_OUTCOMES = ("q1", "q2", "q3")
_RULE_OPTIONS = ("x", "y", "envelope", "target", "image")


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


class _Source:
    """One stored run as the kinds see it: its description, and its shots read once."""

    def __init__(self, catalogue: Catalogue, info: RunInfo, kind: str):
        self.catalogue = catalogue
        self.info = info
        self.kind = kind
        self._shots: pd.DataFrame | None = None

    @property
    def shots(self) -> pd.DataFrame:
        if self._shots is None:
            self._shots = self.catalogue.shots(self.info.run, apparatus=self.info.apparatus)
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
        return occupancy


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

    Raises :class:`FitError` (with the run named) when the figures cannot be computed, and
    :class:`NotFoundError` for an unknown run, kind, parameter, measurement or image, or when
    a default is ambiguous (the message names the candidates). Nothing is stored then.
    """
    deriver = _DERIVERS.get(kind)
    if deriver is None:
        raise NotFoundError("figure kind", kind, "known: " + ", ".join(sorted(KINDS)))
    if envelope not in ENVELOPES:
        raise NotFoundError("envelope", envelope, "known: " + ", ".join(ENVELOPES))
    info = catalogue.run(run, apparatus=apparatus)
    source = _Source(catalogue, info, kind)
    options = _Options(x, y, envelope, target, image, interval)
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
        catalogue.save_figures(info.run, kind, figures, apparatus=info.apparatus, options=recorded)
    return DeriveResult(info.run, kind, figures, info.apparatus)


def apply_rules(
    catalogue: Catalogue,
    rules: Iterable[dict],
    runs: Iterable[str] | None = None,
) -> list[DeriveResult | FitError]:
    """Apply every rule to the runs it matches; one outcome per (run, rule), oldest run first.

    A rule (a ``[[rules]]`` table of ``runlog.toml``) matches a run whose sequence matches
    its ``sequence`` glob and, when given, whose apparatus matches its ``apparatus`` glob
    (``fnmatch`` patterns, case-sensitive). ``runs`` limits the runs to those keys. A run the
    rule cannot be applied to gives a :class:`FitError` in the list and stores nothing.
    """
    checked = check_rules(list(rules))
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
            options = {key: rule[key] for key in _RULE_OPTIONS if key in rule}
            outcomes.append(_attempt(catalogue, row.run, rule["kind"], row.apparatus, options))
    return outcomes


def derive_all(catalogue: Catalogue, rules: Iterable[dict] = (), *, interval: str | None = None) -> DeriveSummary:
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
    outcomes.extend(apply_rules(catalogue, rules))
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
        return registry().get_root_units(unit or "dimensionless")
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
    figures = [_counted("fill_fraction", *counts_fill(loaded), interval)]
    if survival is not None and images[survival]["sites"] == images[loading]["sites"]:
        kept, tries = counts_survival(loaded, source.occupancy(survival))
        if tries:
            figures.append(_counted("survival", kept, tries, interval))
            figures.append(_counted("loss", tries - kept, tries, interval))
    return figures


def _stored_interval(info: RunInfo) -> str:
    method = info.figures.get("fill_fraction", {}).get("method")
    return method if method in INTERVAL_METHODS else "wilson"


def _counted(name: str, successes: int, trials: int, interval: str) -> Figure:
    figure = proportion_figure(name, successes, trials, interval)
    return dataclasses.replace(figure, successes=successes, trials=trials)


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
    return fit_ramsey(wait, signal, envelope=options.envelope, wait_unit=unit)


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
    values = np.unique(steps[np.isfinite(steps)])
    spreads = [position_spread(occupancy[steps == value]) for value in values]
    return fit_spreading(values, spreads)


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


_DERIVERS: dict[str, Callable[[_Source, _Options], list[Figure]]] = {
    "counting": _counting,
    "fringe": _fringe,
    "coherence": _coherence,
    "spreading": _spreading,
    "sorting": _sorting,
    "correlator": _correlator,
}


# --- the fitted curve of a stored run ---------------------------------------------------

#: Figure names that mark a run's stored fit, and the curve each gives.
_CURVE_FIGURES = {
    "fringe": ("contrast", "phase", "offset"),
    "coherence": ("coherence_time", "contrast_at_zero", "detuning", "phase"),
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
    envelope: str = "gaussian",
    points: int = 400,
) -> FitCurve:
    """The stored fringe or Ramsey fit of ``run`` evaluated over its scan, with its shots.

    The kind follows from the stored figures: ``contrast``/``phase``/``offset`` draw the
    fringe ``y = a (1 + C cos(x + phi))``; ``coherence_time``/``contrast_at_zero``/
    ``detuning``/``phase`` the Ramsey fringe ``y = a (1 + C0 E(t) cos(2 pi delta t + phi))``.
    ``x`` and ``y`` default as in :func:`derive`. The envelope shape of a Ramsey fit is not
    stored, so ``envelope`` names it (the rules' default is ``"gaussian"``).

    The Ramsey offset ``a`` is not stored either. The model is linear in ``a``, so for the
    stored ``C0, T, delta, phi`` the least-squares ``a`` has the closed form
    ``sum(y g) / sum(g^2)`` with ``g = 1 + C0 E(t) cos(...)``; at the joint least-squares
    optimum of the (unweighted) fit that is the fitted ``a`` itself.

    Raises :class:`FitError` when the run has neither fit stored.
    """
    if envelope not in ENVELOPES:
        raise NotFoundError("envelope", envelope, "known: " + ", ".join(ENVELOPES))
    info = catalogue.run(run, apparatus=apparatus)
    figures = info.figures
    kind = next((k for k, names in _CURVE_FIGURES.items() if all(n in figures for n in names)), None)
    if kind is None:
        raise FitError("curve", "the run has no stored fringe or Ramsey fit (derive --kind fringe or coherence first)", info.run)
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
        phase_unit = str(figures["phase"]["unit"] or "rad")
        phi = value("phase")

        def model(v: np.ndarray) -> np.ndarray:
            radians = convert(in_unit(v, phase_unit), phase_unit, "rad") + convert(np.asarray([phi]), phase_unit, "rad")[0]
            return value("offset") * (1.0 + value("contrast") * np.cos(radians))

        return FitCurve(info.run, kind, "y = a (1 + C cos(x + φ))", x_name, x_unit, y_name, y_unit, shots_x, shots_y, grid, model(grid), value("offset"), False)

    wait_unit = str(figures["coherence_time"]["unit"] or x_unit)
    shape = ENVELOPES[envelope]

    def shape_only(v: np.ndarray) -> np.ndarray:
        t = in_unit(v, wait_unit)
        # detuning is stored in cycles per wait unit (MHz for us): 2 pi delta t is in radians.
        fringe = np.cos(2.0 * np.pi * value("detuning") * t + value("phase"))
        return 1.0 + value("contrast_at_zero") * shape(t, value("coherence_time")) * fringe

    g = shape_only(shots_x)
    offset = float(np.dot(shots_y, g) / np.dot(g, g))
    decay = "exp(-(t/T)²)" if envelope == "gaussian" else "exp(-t/T)"
    formula = f"y = a (1 + C0 E(t) cos(2π δ t + φ)), E(t) = {decay}"
    return FitCurve(info.run, kind, formula, x_name, x_unit, y_name, y_unit, shots_x, shots_y, grid, offset * shape_only(grid), offset, True)
