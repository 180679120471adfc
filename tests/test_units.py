"""Units: the grammar, the conversion table, logarithmic and angular units, gauss, lab units,
at ingest and in filters on SQLite and PostgreSQL.

Sources of the conversion table, named per row:
- NIST SP 811 (2008), "Guide for the Use of the International System of Units", Appendix
  B.8 (factors in alphabetical order) and B.9 (by kind of quantity); section 4.2.1.1 for
  the Celsius temperature.
- CODATA 2018 / SI 2019 exact defining constants: h = 6.626 070 15e-34 J s,
  k = 1.380 649e-23 J/K, e = 1.602 176 634e-19 C.
- The level of a power in dBm, L = 10 log10(P / 1 mW): IEC 60027-3 (logarithmic
  quantities and units) [memory]; pint implements the same definition.
- Angular frequency ω = 2π f, and Hz used for cyclic frequency only: NIST SP 811 section 4.1
  (table 3 note) and the SI Brochure (9th ed.) section 2.3.4 [memory].
"""

from __future__ import annotations

import math
import os
import subprocess
import sys

import numpy as np
import pytest

from conftest import shot_table, write_table
from runlog.config import Mapping, load_config
from runlog.errors import ConfigError, FilterError
from runlog.units import MAX_LENGTH, UnitError, check_lab_units, check_unit, conversion, convert, converter, parse_unit

H = 6.62607015e-34  # J s, exact (SI 2019)
K_B = 1.380649e-23  # J/K, exact (SI 2019)
E = 1.602176634e-19  # C, exact (SI 2019)

# (value, from, to, expected, source)
TABLE = [
    (1.0, "Torr", "Pa", 133.322368, "NIST SP 811 B.8: torr (Torr) = 1.333 224 E+02 Pa"),
    (1.0, "torr", "Pa", 133.322368, "NIST SP 811 B.8"),
    (1e-9, "Torr", "mbar", 1.33322368e-9, "NIST SP 811 B.8 (torr; bar = 1.0 E+05 Pa)"),
    (1.0, "atm", "Pa", 101325.0, "NIST SP 811 B.8: atmosphere, standard = 1.013 25 E+05 Pa"),
    (3.0, "G", "mT", 0.3, "NIST SP 811 B.8: gauss (Gs, G) = 1.0 E-04 T"),
    (1.0, "gauss", "T", 1e-4, "NIST SP 811 B.8"),
    (250.0, "mG", "uT", 25.0, "NIST SP 811 B.8 (gauss)"),
    (1.0, "T", "G", 1e4, "NIST SP 811 B.8 (gauss)"),
    (2.0, "kHz/mG", "MHz/T", 2e4, "NIST SP 811 B.8 (gauss)"),
    (1.0, "eV", "J", E, "CODATA 2018 exact: e"),
    (1.0, "uK", "K", 1e-6, "SI prefix micro = 1e-6 (NIST SP 811 table 5)"),
    (70.0, "µs", "ms", 0.07, "SI prefix micro (micro sign U+00B5)"),
    (70.0, "μs", "us", 70.0, "SI prefix micro (Greek mu U+03BC)"),
    (25.0, "degC", "K", 298.15, "NIST SP 811 4.2.1.1: T/K = t/°C + 273.15"),
    (1.0, "kHz*planck_constant", "uK*boltzmann_constant", 1e3 * H / K_B * 1e6, "CODATA 2018 exact h, k"),
    (20.0, "dBm", "mW", 100.0, "IEC 60027-3: L = 10 log10(P/1 mW) [memory]"),
    (0.0, "dBm", "mW", 1.0, "IEC 60027-3 [memory]"),
    (30.0, "dBm", "W", 1.0, "IEC 60027-3 [memory]"),
    (-10.0, "dBm", "mW", 0.1, "IEC 60027-3 [memory]"),
    (3.0, "dBm", "mW", 10 ** 0.3, "IEC 60027-3 [memory]"),
    (100.0, "mW", "dBm", 20.0, "IEC 60027-3 [memory]"),
    (20.0, "dB", "", 100.0, "IEC 60027-3: power ratio 10 log10 [memory]"),
    (2 * math.pi, "rad/s", "Hz", 1.0, "ω = 2π f (SI Brochure 2.3.4) [memory]"),
    (1.0, "MHz", "rad/us", 2 * math.pi, "ω = 2π f"),
    (2 * math.pi * 5.0, "rad/ms", "kHz", 5.0, "ω = 2π f"),
    (1.0, "turn/s", "Hz", 1.0, "one turn is 2π rad; ω = 2π f"),
    (180.0, "deg", "rad", math.pi, "NIST SP 811 B.9: degree = π/180 rad"),
]


@pytest.mark.parametrize(("value", "source", "target", "expected", "reference"), TABLE, ids=[f"{r[1]}->{r[2] or '1'}" for r in TABLE])
def test_conversion_table(value, source, target, expected, reference):
    assert convert(np.asarray([value]), source, target)[0] == pytest.approx(expected, rel=2e-7), reference
    assert float(converter(source, target)(value)) == pytest.approx(expected, rel=2e-7), reference


PROBE = "from runlog.units import convert; print(*(convert([v], a, b)[0] for v, a, b in ((3, 'G', 'mT'), (3, 'mG', 'uT'), (1, 'kG', 'T'))))"


@pytest.mark.parametrize("cache", ["cold", "corrupt"])
def test_gauss_is_the_si_flux_density_whatever_the_state_of_pints_disk_cache(cache, tmp_path):
    # The defects: on a fresh machine (pint's cache folder empty) pint kept the gauss's
    # dimension derived before runlog's definition, and 'G' stopped converting to tesla; a
    # corrupt cache file made every unit fail. Each case runs in a process of its own, with
    # pint's cache under a folder of the test's.
    home = tmp_path / "cache"
    env = {**os.environ, "XDG_CACHE_HOME": str(home)}
    if cache == "corrupt":
        subprocess.run([sys.executable, "-c", PROBE], env=env, check=True, capture_output=True)
        for pickled in (home / "pint").glob("*.pickle"):
            pickled.write_bytes(b"not a pickle")
    done = subprocess.run([sys.executable, "-c", PROBE], env=env, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    # NIST SP 811 (2008) B.8: gauss = 1.0 E-04 T.
    assert [float(x) for x in done.stdout.split()] == pytest.approx([0.3, 0.3, 0.1], rel=1e-12)


def test_logarithmic_units_are_not_a_straight_line():
    # The defect: two-point evaluation made dBm affine (10 dBm stored as 3.59 mW).
    assert conversion("dBm", "mW") is None
    found = converter("dBm", "mW")
    assert found.log
    np.testing.assert_allclose(found(np.array([0.0, 10.0, 20.0, 30.0])), [1.0, 10.0, 100.0, 1000.0], rtol=1e-12)
    assert found(20.0) == 100.0  # kept at 15 significant digits: 20 dBm equals 100 mW


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("9**9**9", "'9**9**9' is not a unit"),
        ("m**9", "power 9 is larger than 4"),
        ("s^-5", "power -5 is larger than 4"),
        ("Gs", "unit 'Gs' is ambiguous (gauss or gigasecond"),
        ("C", "unit 'C' is ambiguous (coulomb or degree Celsius"),
        ("h", "unit 'h' is ambiguous (hour or the Planck constant"),
        ("kHz/Gs", "unit 'Gs' is ambiguous"),
        ("dBm/Hz", "a logarithmic or offset unit (decibelmilliwatt) must stand alone"),
        ("m" * (MAX_LENGTH + 1), f"unit longer than {MAX_LENGTH} characters"),
        ("furlongs_per_blorp", "unknown unit 'furlongs_per_blorp'"),
        ("2*m", "is not a unit"),
        ("m+s", "is not a unit"),
        ("__import__", "unknown unit"),
        ("kHz mG", "is not a unit"),
    ],
)
def test_grammar_refuses_what_is_not_a_unit(text, message):
    with pytest.raises(UnitError) as refused:
        check_unit(text)
    assert message in str(refused.value)


@pytest.mark.parametrize("text", ["Torr", "G", "uK", "µs", "us", "kHz/mG", "m/s**2", "m/s^2", "1/s", "(m/s)**2", "Hz*s", "dBm", "dB", "mW", "rad/us", "counts", "%", "u"])
def test_grammar_accepts_what_a_lab_writes(text):
    assert check_unit(f" {text} ") == text
    parse_unit(text)


@pytest.mark.parametrize(
    ("source", "target", "message"),
    [
        ("rad", "", "an angle and a plain number are not converted"),
        ("rad/s**2", "Hz/s", "an angle and a plain number"),
        ("dB", "mW", "not units of the same dimension"),
        ("G", "kg", "not units of the same dimension"),
        ("Hz", "s", "not units of the same dimension"),
    ],
)
def test_pairs_that_are_refused(source, target, message):
    with pytest.raises(UnitError) as refused:
        converter(source, target)
    assert message in str(refused.value)
    assert conversion(source, target) is None


def test_lab_units():
    lab = check_lab_units({"E_rec": "3.47 kHz * planck_constant"})
    assert lab == (("E_rec", "3.47 kHz * planck_constant"),)
    # E_rec = h * 3.47 kHz: in µK (k_B = 1), 3.47e3 h / k_B (CODATA 2018 exact constants).
    assert converter("E_rec", "uK*boltzmann_constant", lab)(20.0) == pytest.approx(20 * 3.47e3 * H / K_B * 1e6, rel=1e-12)
    assert converter("kHz*planck_constant", "E_rec", lab).scale == pytest.approx(1 / 3.47, rel=1e-12)
    with pytest.raises(UnitError, match="unknown unit 'E_rec'"):
        check_unit("E_rec")
    for table, message in [
        ({"Hz": "1 kHz"}, "'Hz' is already a unit"),
        ({"E_rec": "3.47 kHz**9"}, "power 9"),
        ({"E_rec": "-1 kHz"}, "positive finite"),
        ({"E_rec": "kilo"}, "unknown unit"),
        ({"1x": "1 kHz"}, "not a unit name"),
    ]:
        with pytest.raises(UnitError, match=message):
            check_lab_units(table)


def test_lab_units_in_runlog_toml(tmp_path):
    path = tmp_path / "runlog.toml"
    path.write_text('[units]\nE_rec = "3.47 kHz * planck_constant"\n', encoding="utf-8")
    assert load_config(path).units == (("E_rec", "3.47 kHz * planck_constant"),)
    path.write_text('[units]\nE_rec = "3 Gs"\n', encoding="utf-8")
    with pytest.raises(ConfigError, match="'Gs' is ambiguous"):
        load_config(path)


# --- at ingest and in filters, both backends ------------------------------------------


def _file(tmp_path, name, runs, columns):
    return write_table(tmp_path / name, shot_table(runs, occupancy=False, extra={k: np.asarray(v, dtype=float) for k, v in columns.items()}))


def _values(catalogue, where, column):
    frame = catalogue.select(where)
    return sorted(frame[f"p.{column}"].tolist()), frame.attrs["units"][f"p.{column}"]


def test_dbm_at_ingest_and_in_filters(catalogue, tmp_path):
    a = _file(tmp_path, "a.parquet", {"a1": 3}, {"p.mw_power[mW]": [1.0, 10.0, 100.0]})
    b = _file(tmp_path, "b.parquet", {"b1": 3}, {"p.mw_power[dBm]": [10.0, 20.0, 30.0]})
    assert [r.status for r in catalogue.ingest([a, b])] == ["ingested", "ingested"]
    values, unit = _values(catalogue, "run = 'b1'", "mw_power")
    assert unit == "mW"
    assert values == pytest.approx([10.0, 100.0, 1000.0], rel=1e-12)  # 10, 20, 30 dBm (IEC 60027-3)
    # 20 dBm is 100 mW: '>' leaves both 100 mW shots out, '>=' takes them.
    assert sorted(catalogue.select("mw_power > 20 dBm")["p.mw_power"]) == pytest.approx([1000.0])
    assert len(catalogue.select("mw_power >= 20 dBm")) == 3
    assert len(catalogue.select("mw_power < 10 dBm")) == 1  # 1 mW


def test_dbm_stored_and_filtered_in_mw(catalogue, tmp_path):
    a = _file(tmp_path, "a.parquet", {"a1": 2}, {"p.mw_power[dBm]": [-3.0, 27.0]})
    b = _file(tmp_path, "b.parquet", {"b1": 1}, {"p.mw_power[W]": [0.001]})
    assert [r.status for r in catalogue.ingest([a, b])] == ["ingested", "ingested"]
    values, unit = _values(catalogue, "run = 'b1'", "mw_power")
    assert unit == "dBm" and values == pytest.approx([0.0], abs=1e-12)  # 1 mW = 0 dBm
    assert len(catalogue.select("mw_power > 100 mW")) == 1  # 27 dBm = 501 mW


def test_angular_and_cyclic_frequency(catalogue, tmp_path):
    a = _file(tmp_path, "a.parquet", {"a1": 2}, {"p.detuning[kHz]": [1.0, -2.0]})
    b = _file(tmp_path, "b.parquet", {"b1": 2}, {"p.detuning[rad/ms]": [2 * math.pi, -4 * math.pi]})
    assert [r.status for r in catalogue.ingest([a, b])] == ["ingested", "ingested"]
    values, unit = _values(catalogue, "run = 'b1'", "detuning")
    assert unit == "kHz" and values == pytest.approx([-2.0, 1.0], rel=1e-12)  # ω = 2π f
    assert len(catalogue.select("detuning = 6.283185307179586 rad/ms")) == 2
    assert len(catalogue.select("detuning < -10 rad/ms")) == 2
    assert len(catalogue.select("detuning > 1 MHz")) == 0


def test_angle_against_plain_number_is_refused(catalogue, tmp_path):
    a = _file(tmp_path, "a.parquet", {"a1": 2}, {"p.phase[rad]": [0.1, 0.2]})
    b = _file(tmp_path, "b.parquet", {"b1": 2}, {"p.phase": [0.1, 0.2]})
    results = catalogue.ingest([a, b])
    assert results[0].status == "ingested"
    assert results[1].status == "refused"
    assert "unit '' cannot be converted to the stored unit 'rad' of parameter 'phase'" in results[1].reason
    assert "an angle and a plain number" in results[1].reason
    with pytest.raises(FilterError, match="an angle and a plain number"):
        catalogue.select("phase > 1 Hz*s")


def test_gauss_torr_micro_at_ingest_and_in_filters(catalogue, tmp_path):
    a = _file(tmp_path, "a.parquet", {"a1": 2}, {"p.field[mT]": [0.3, 0.5], "p.pressure[Pa]": [1e-7, 2e-7], "p.hold[us]": [1.0, 2.0]})
    b = _file(tmp_path, "b.parquet", {"b1": 2}, {"p.field[G]": [3.0, 4.0], "p.pressure[Torr]": [1e-9, 2e-9], "p.hold[µs]": [5.0, 6.0]})
    assert [r.status for r in catalogue.ingest([a, b])] == ["ingested", "ingested"]
    frame = catalogue.select("run = 'b1'")
    assert sorted(frame["p.field"]) == pytest.approx([0.3, 0.4], rel=1e-12)  # NIST SP 811: 1 G = 1e-4 T
    assert sorted(frame["p.pressure"]) == pytest.approx([1.33322368e-7, 2.66644737e-7], rel=1e-8)  # NIST SP 811: 1 Torr = 133.3224 Pa
    assert sorted(frame["p.hold"]) == pytest.approx([5.0, 6.0])  # µs = us
    assert set(catalogue.select("field = 3 G")["run"]) == {"a1", "b1"}
    assert len(catalogue.select("pressure < 1.5e-9 Torr")) == 2
    assert len(catalogue.select("hold = 5 µs")) == 1
    assert len(catalogue.select("hold < 0.0015 ms")) == 1


@pytest.mark.parametrize(("column", "message"), [("p.x[9**9**9]", "'9**9**9' is not a unit"), ("p.x[Gs]", "unit 'Gs' is ambiguous"), ("m.y[C]", "unit 'C' is ambiguous")])
def test_refused_units_at_ingest(catalogue, tmp_path, column, message):
    path = _file(tmp_path, "bad.parquet", {"a1": 2}, {column: [1.0, 2.0]})
    (result,) = catalogue.ingest(path)
    assert result.status == "refused"
    assert f"(column '{column}')" in result.reason and message in result.reason


def test_refused_units_in_filters(catalogue, tmp_path):
    catalogue.ingest(_file(tmp_path, "a.parquet", {"a1": 2}, {"p.field[G]": [1.0, 2.0]}))
    with pytest.raises(FilterError, match="unit 'Gs' is ambiguous"):
        catalogue.select("field > 1 Gs")
    with pytest.raises(FilterError, match="not a unit of the same dimension"):
        catalogue.select("field > 1 kg")


def test_lab_units_at_ingest_and_in_filters(db_url, tmp_path):
    import runlog

    config = Mapping(units=(("E_rec", "3.47 kHz * planck_constant"),))
    a = _file(tmp_path, "a.parquet", {"a1": 2}, {"p.lattice_depth[E_rec]": [10.0, 20.0]})
    b = _file(tmp_path, "b.parquet", {"b1": 2}, {"p.lattice_depth[kHz*planck_constant]": [34.7, 104.1]})
    with runlog.open(db_url) as catalogue:
        refused = catalogue.ingest(a)
        assert refused[0].status == "refused" and "unknown unit 'E_rec'" in refused[0].reason
        assert [r.status for r in catalogue.ingest([a, b], config=config)] == ["ingested", "ingested"]
    # A new session, without the configuration: the definition was stored with the values.
    with runlog.open(db_url) as catalogue:
        values, unit = _values(catalogue, "run = 'b1'", "lattice_depth")
        assert unit == "E_rec" and values == pytest.approx([10.0, 30.0], rel=1e-12)
        assert set(catalogue.select("lattice_depth > 15 E_rec")["run"]) == {"a1", "b1"}
        assert len(catalogue.select("lattice_depth > 60 kHz*planck_constant")) == 2
        changed = Mapping(units=(("E_rec", "4.0 kHz * planck_constant"),))
        c = _file(tmp_path, "c.parquet", {"c1": 1}, {"p.lattice_depth[E_rec]": [1.0]})
        (result,) = catalogue.ingest(c, config=changed)
        assert result.status == "refused" and "give the new definition a new name" in result.reason
