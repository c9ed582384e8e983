"""Unit conversion factors checked against published definitions.

Sources named beside each check:
- NIST SP 811 (2008 edition), Appendix B.8/B.9 (conversion factors);
- SI Brochure, 9th edition (2019), section 2.3.1 (degree Celsius) and Table 4.
"""
import math

import numpy as np
import polars as pl
import pytest

from fleetwatch.errors import InputError
from fleetwatch.units import CANONICAL_UNITS, UNITS, accepted_units, convert, normalize_unit


def test_rad_per_s_to_rpm_nist_sp811():
    # NIST SP 811 B.8: revolution per minute (rpm) = 1.047 198 E-01 rad/s (= 2*pi/60 rad/s)
    assert convert(2 * math.pi / 60, "rad/s", "speed") == pytest.approx(1.0, rel=1e-12)
    assert convert(1.047198e-01, "rad/s", "speed") == pytest.approx(1.0, rel=1e-6)
    assert convert(100.0, "rad/s", "speed") == pytest.approx(954.92966, rel=1e-7)


def test_rev_per_s_and_hz_to_rpm():
    # NIST SP 811 B.8: 1 r/s = 60 r/min (revolutions per second; Hz read as rev/s here)
    assert convert(1.0, "Hz", "speed") == 60.0
    assert convert(2.5, "rev/s", "speed") == 150.0
    assert convert(1500.0, "rev/min", "speed") == 1500.0
    assert convert(1500.0, "r/min", "speed") == 1500.0


def test_power_voltage_current_prefixes_si_brochure():
    # SI Brochure 9th ed. Table 7 (prefixes): k = 1e3, m = 1e-3
    assert convert(1.5, "kW", "power") == 1500.0
    assert convert(2.0, "kV", "voltage") == 2000.0
    assert convert(250.0, "mA", "current") == pytest.approx(0.25)
    assert convert(48.0, "V", "voltage") == 48.0


def test_torque_aliases():
    # NIST SP 811 section 9.5 (newton metre written N*m or N m); all spellings map to N*m
    for unit in ("N*m", "N·m", "Nm", "N m", "N.m"):
        assert convert(3.25, unit, "torque") == 3.25, unit
    assert convert(0.5, "kN*m", "torque") == 500.0


def test_kelvin_to_celsius_si_brochure():
    # SI Brochure 9th ed. 2.3.1: t/degC = T/K - 273.15
    assert convert(273.15, "K", "temperature") == pytest.approx(0.0, abs=1e-12)
    assert convert(373.15, "K", "temperature") == pytest.approx(100.0, abs=1e-12)
    assert convert(0.0, "K", "temperature") == pytest.approx(-273.15)


def test_fahrenheit_to_celsius_nist_sp811():
    # NIST SP 811 B.8 footnote: t/degC = (t/degF - 32)/1.8
    assert convert(32.0, "degF", "temperature") == pytest.approx(0.0, abs=1e-12)
    assert convert(212.0, "degF", "temperature") == pytest.approx(100.0, abs=1e-12)
    assert convert(-40.0, "°F", "temperature") == pytest.approx(-40.0, abs=1e-12)
    assert convert(98.6, "F", "temperature") == pytest.approx(37.0, abs=1e-9)


def test_convert_keeps_the_container_kind():
    s = pl.Series([0.0, 32.0, 212.0])
    out = convert(s, "degF", "temperature")
    assert isinstance(out, pl.Series)
    assert out.to_list() == pytest.approx([-17.7777778, 0.0, 100.0])
    arr = convert(np.array([1.0, 2.0]), "kW", "power")
    assert isinstance(arr, np.ndarray) and arr.tolist() == [1000.0, 2000.0]
    df = pl.DataFrame({"w": [1.0, 2.0]}).select(convert(pl.col("w"), "Hz", "speed"))
    assert df["w"].to_list() == [60.0, 120.0]


def test_canonical_units_are_identity():
    for quantity, unit in CANONICAL_UNITS.items():
        assert UNITS[quantity][unit] == (1.0, 0.0)


def test_unknown_unit_lists_accepted_units():
    with pytest.raises(InputError) as err:
        convert(1.0, "furlong/fortnight", "speed")
    msg = err.value.message
    assert "furlong/fortnight" in msg
    for u in ("rpm", "rad/s", "Hz"):
        assert u in msg
    with pytest.raises(InputError):
        convert(1.0, "kW", "temperature")   # a real unit, wrong quantity


def test_case_insensitive_only_when_unambiguous():
    assert normalize_unit("KW", "power") == "kW"
    assert normalize_unit("hz", "speed") == "Hz"
    with pytest.raises(InputError):
        normalize_unit("mw", "power")       # milliwatt or megawatt: refuse to guess
    assert "rad/s" in accepted_units("speed")
