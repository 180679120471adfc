"""One seeded scenario of our own that walks issue 13's "Done when": parameters in dBm,
angular frequency, gauss and Torr across files; shots with a bad status; a rearrangement
run; runs whose loading varies from shot to shot; a coherent walk. Every stored value and
filter result is checked against a number computed here from the stated source, refused
pairs are refused with their reason, and the fill-fraction interval covers the truth at
its stated rate (seeded simulation, CI-sized).

Sources: NIST SP 811 (2008) B.8 (1 G = 1e-4 T, 1 Torr = 133.3224 Pa); IEC 60027-3 (a power
level in dBm is 10 log10(P / 1 mW)); omega = 2 pi f; the ratio estimator of Cochran 1977
section 6.3 and the design-effect Wilson interval with t on n - 1 dof (runlog.figures.
shot_level's documented method), recomputed here with scipy's t quantile; the Hadamard walk
from its unitary (coin H, start (|0> + i|1>)/sqrt 2).
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pyarrow as pa
import pytest
from scipy import stats

from runlog.config import Mapping
from runlog.errors import FilterError
from runlog.figures.counting import fill_fraction
from conftest import write_table

T0 = dt.datetime(2026, 5, 4, 8, 0, tzinfo=dt.timezone.utc)
SITES = 100
TORR = 133.3224  # Pa, NIST SP 811 B.8 (to the 7 digits given there)


def _beta(rng, mean: float, spread: float, size: int) -> np.ndarray:
    k = mean * (1 - mean) / spread**2 - 1
    return rng.beta(mean * k, (1 - mean) * k, size)


def _table(run: str, sequence: str, start: dt.datetime, parameters: dict, images: dict, status=None) -> pa.Table:
    n = len(next(iter(images.values())))
    columns = {
        "run": [run] * n, "apparatus": ["rig-7"] * n, "sequence": [sequence] * n,
        "shot": pa.array(np.arange(n), pa.int64()),
        "time": pa.array([start + dt.timedelta(seconds=3 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
    }
    if status is not None:
        columns["status"] = pa.array(list(status), pa.string())
    columns.update({f"p.{name}": np.full(n, value, dtype=float) if np.ndim(value) == 0 else np.asarray(value, dtype=float) for name, value in parameters.items()})
    columns.update({f"occ.{name}": pa.array(list(np.asarray(bits, dtype=bool)), pa.list_(pa.bool_())) for name, bits in images.items()})
    return pa.table(columns)


def _shot_ratio(y: np.ndarray, x: np.ndarray) -> tuple[float, float, float]:
    """R = sum y / sum x and its design-effect Wilson interval, t on n - 1 dof (recomputed)."""
    n, total = len(y), float(x.sum())
    ratio = float(y.sum()) / total
    variance = float(((y - ratio * x) ** 2).sum()) * n / ((n - 1) * total**2)
    effect = max(1.0, variance / (ratio * (1 - ratio) / total))
    z = stats.norm.ppf(0.975)
    effective = total / effect * (z / stats.t.ppf(0.975, n - 1)) ** 2
    centre = (ratio + z * z / (2 * effective)) / (1 + z * z / effective)
    half = z * math.sqrt(ratio * (1 - ratio) / effective + z * z / (4 * effective**2)) / (1 + z * z / effective)
    return ratio, centre - half, centre + half


def _hadamard(steps: int) -> list[np.ndarray]:
    """Position probabilities after 1..steps steps of the Hadamard walk, from its unitary."""
    amplitude = np.zeros((2 * steps + 1, 2), dtype=complex)
    amplitude[steps] = [1 / math.sqrt(2), 1j / math.sqrt(2)]
    coin = np.array([[1, 1], [1, -1]]) / math.sqrt(2)
    out = []
    for _ in range(steps):
        amplitude = amplitude @ coin.T
        moved = np.zeros_like(amplitude)
        moved[:-1, 0], moved[1:, 1] = amplitude[1:, 0], amplitude[:-1, 1]
        amplitude = moved
        out.append((np.abs(amplitude) ** 2).sum(axis=1))
    return out


@pytest.fixture
def scenario(catalogue, tmp_path):
    rng = np.random.default_rng(13_2026)
    truth = {}
    files = []
    # Overdispersed loading: per-shot probability from a beta of mean 0.55, spread 0.08.
    # L1 (file a): 40 shots, 10 of them 'laser-unlocked' with nothing loaded.
    # L2 (file b): 30 shots, the same settings written in other units.
    for key, shots, bad, start, parameters in (
        ("L1", 40, 10, T0, {"mw_power[dBm]": 10.0, "rabi[rad/us]": 2 * math.pi * 0.25, "field[G]": 3.0, "pressure[Torr]": 1e-9}),
        ("L2", 30, 0, T0 + dt.timedelta(hours=2), {"mw_power[mW]": 100.0, "rabi[MHz]": 0.5, "field[mT]": 0.2, "pressure[Pa]": 2e-9 * TORR}),
    ):
        p = _beta(rng, 0.55, 0.08, shots)
        load = rng.random((shots, SITES)) < p[:, None]
        kept = load & (rng.random((shots, SITES)) < 0.93)
        status = np.array(["ok"] * shots, dtype=object)
        status[:bad] = "laser-unlocked"
        load[:bad] = kept[:bad] = False
        truth[key] = (load[bad:], kept[bad:])
        files.append(write_table(tmp_path / f"{key}.parquet", _table(key, "load-hold", start, parameters, {"load": load, "hold": kept}, status)))
    # A load-then-rearrange run: its second image is after sorting, no atom lost.
    load = rng.random((20, SITES)) < 0.55
    arranged = np.zeros_like(load)
    for i, row in enumerate(load):
        arranged[i, : row.sum()] = True
    files.append(write_table(tmp_path / "S1.parquet", _table("S1", "sort-line", T0 + dt.timedelta(hours=3), {"field[G]": 3.0}, {"load": load, "sorted": arranged})))
    # A coherent walk: one atom from site 30 of 61, steps 1..12, 200 shots a step placed at
    # the quantiles of the exact distribution (so the data hold the exact widths to
    # within the quantisation of 200 shots).
    steps, per_step, start_site = 12, 200, 30
    rows_steps, rows_end = [], []
    for n, probability in enumerate(_hadamard(steps), start=1):
        cdf = np.cumsum(probability)
        where = np.searchsorted(cdf, (np.arange(per_step) + 0.5) / per_step)
        rows_steps += [n] * per_step
        rows_end += list(start_site - steps + where)
    walk = np.zeros((len(rows_end), 61), dtype=bool)
    walk[np.arange(len(rows_end)), rows_end] = True
    files.append(write_table(tmp_path / "W1.parquet", _table("W1", "walk", T0 + dt.timedelta(hours=4), {"steps": rows_steps}, {"after": walk})))
    # A file that writes the field in seconds: refused, with its reason.
    files.append(write_table(tmp_path / "bad.parquet", _table("X1", "load-hold", T0 + dt.timedelta(hours=5), {"field[s]": 1.0}, {"load": load[:2]})))
    config = Mapping(image_roles={"sort*": "rearrangement"})
    results = catalogue.ingest(files, config=config)
    return catalogue, results, truth, (steps, per_step, start_site)


def test_trust_scenario(scenario):
    catalogue, results, truth, (steps, per_step, start_site) = scenario
    assert [r.status for r in results] == ["ingested"] * 4 + ["refused"]
    # Refused with its reason: the file, the column and the two units.
    assert "bad.parquet" in results[4].reason and "p.field[s]" in results[4].reason and "'G'" in results[4].reason

    # --- units: stored in the unit the catalogue first saw, converted from the others ---
    l1, l2 = catalogue.run("L1").parameters, catalogue.run("L2").parameters
    assert {n: l1[n]["unit"] for n in ("mw_power", "rabi", "field", "pressure")} == {"mw_power": "dBm", "rabi": "rad/us", "field": "G", "pressure": "Torr"}
    assert {n: l1[n]["value"] for n in ("mw_power", "rabi", "field", "pressure")} == {"mw_power": 10.0, "rabi": pytest.approx(2 * math.pi * 0.25, rel=1e-15), "field": 3.0, "pressure": 1e-9}
    assert catalogue.run("S1").parameters["field"]["value"] == 3.0
    assert l2["mw_power"]["value"] == pytest.approx(10 * math.log10(100.0 / 1.0), rel=1e-12)  # 100 mW = 20 dBm (IEC 60027-3)
    assert l2["rabi"]["value"] == pytest.approx(2 * math.pi * 0.5, rel=1e-12)  # omega = 2 pi f
    assert l2["field"]["value"] == pytest.approx(0.2e-3 / 1e-4, rel=1e-12)  # 0.2 mT = 2 G (NIST SP 811)
    assert l2["pressure"]["value"] == pytest.approx(2e-9, rel=1e-12)
    # Filters in any unit of the dimension, the logarithmic one through its definition.
    def runs(where: str) -> set[str]:
        return set(catalogue.select(where)["run"])

    assert runs("mw_power > 15 dBm") == {"L2"} and runs("mw_power > 50 mW") == {"L2"} and runs("mw_power < 11 mW") == {"L1"}  # 10 dBm = 10 mW
    assert runs("rabi > 2 rad/us") == {"L2"} and runs("rabi < 0.3 MHz") == {"L1"}  # 0.25 MHz = 1.571 rad/us
    assert runs("field = 0.3 mT") == {"L1", "S1"} and runs("field < 2500 mG") == {"L2"}
    assert len(catalogue.select("field = 0.3 mT")) == 40 + 20  # every shot of L1 (bad ones too) and S1
    assert runs("pressure > 1.5e-9 Torr") == {"L2"} and runs(f"pressure < {1.5e-9 * TORR} Pa") == {"L1"}
    # Refused pairs, with their reason.
    for where, reason in (("rabi > 1 rad", "'rad' is not a unit of the same dimension"), ("field > 1 Gs", "'Gs' is ambiguous"), ("mw_power > 1 s", "'s' is not a unit of the same dimension")):
        with pytest.raises(FilterError, match=reason):
            catalogue.select(where)
    # Bad-status shots are still selectable.
    assert len(catalogue.select("status = 'laser-unlocked'")) == 10

    # --- counting figures: ok shots only, the shot-level interval recomputed here ---
    for key in ("L1", "L2"):
        info = catalogue.run(key)
        load, kept = truth[key]
        value, low, high = _shot_ratio(load.sum(axis=1).astype(float), np.full(len(load), float(SITES)))
        fill = info.figures["fill_fraction"]
        assert fill["value"] == load.sum() / load.size
        assert (fill["ci_low"], fill["ci_high"]) == (pytest.approx(low, rel=1e-12), pytest.approx(high, rel=1e-12))
        kept_value, kept_low, kept_high = _shot_ratio(kept.sum(axis=1).astype(float), load.sum(axis=1).astype(float))
        assert info.figures["survival"]["value"] == pytest.approx(kept_value, rel=1e-15)
        assert (info.figures["survival"]["ci_low"], info.figures["survival"]["ci_high"]) == (pytest.approx(kept_low, rel=1e-12), pytest.approx(kept_high, rel=1e-12))
        # The pooled binomial interval is kept beside it, and is narrower here.
        assert fill["binomial_ci_high"] - fill["binomial_ci_low"] < high - low
    assert catalogue.run("L1").excluded_shots == 10 and catalogue.run("L2").excluded_shots == 0
    # The rearrangement run has a fill fraction but no survival or loss.
    sorted_run = catalogue.run("S1")
    assert "fill_fraction" in sorted_run.figures and not {"survival", "loss"} & set(sorted_run.figures)
    # The day's drift points pool the ok shots of L1 and L2, and S1 stays out of survival.
    loads = np.vstack([truth["L1"][0], truth["L2"][0]])
    kept_all = np.vstack([truth["L1"][1], truth["L2"][1]])
    survival = catalogue.drift("survival", apparatus="rig-7", pooled=True).points
    assert [(p.runs, p.successes, p.trials) for p in survival] == [(2, int(kept_all.sum()), int(loads.sum()))]
    fill_day = catalogue.drift("fill_fraction", apparatus="rig-7", sequence="load-hold", pooled=True).points
    value, low, high = _shot_ratio(loads.sum(axis=1).astype(float), np.full(len(loads), float(SITES)))
    assert [(p.runs, p.shots) for p in fill_day] == [(2, 70)] and fill_day[0].value == pytest.approx(value, rel=1e-15)
    assert (fill_day[0].ci_low, fill_day[0].ci_high) == (pytest.approx(low, rel=1e-12), pytest.approx(high, rel=1e-12))

    # --- the coherent walk reads as ballistic ---
    derived = {f.name: f for f in catalogue.derive("W1", "spreading", x="steps", image="after", settings={"start_site": start_site}).figures}
    alpha = derived["spreading_exponent"]
    assert abs(alpha.value - 1.0) <= 2 * alpha.stderr, (alpha.value, alpha.stderr)
    print(f"\nscenario: coherent walk alpha = {alpha.value:.4f} ± {alpha.stderr:.4f}")


def test_fill_fraction_interval_covers_at_the_stated_rate():
    # 1000 seeded runs of 20 shots x 100 sites with a per-shot spread of 0.08 (the issue's):
    # the coverage's own standard error is 0.69 %, so 93-97 % is about +-2.9 sigma.
    rng = np.random.default_rng(13_0508)
    honest = pooled = 0
    runs, truth = 1000, 0.55
    for _ in range(runs):
        p = _beta(rng, truth, 0.08, 20)
        figure = fill_fraction(rng.random((20, SITES)) < p[:, None])
        honest += figure.ci_low <= truth <= figure.ci_high
        pooled += figure.binomial_ci_low <= truth <= figure.binomial_ci_high
    print(f"\nfill-fraction coverage: shot-level {honest / runs:.3f}, pooled binomial {pooled / runs:.3f}")
    assert 0.93 <= honest / runs <= 0.97
    assert pooled / runs < 0.80  # the pooled interval fails here
