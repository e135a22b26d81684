"""Quantity parsing and dB conversions (reference sheet §4)."""

import math

import pytest

from bench import units
from bench.errors import UnitError


@pytest.mark.parametrize(
    ("text", "dimension", "expected"),
    [
        ("120 kHz", "frequency", 120e3),
        ("1.5 GHz", "frequency", 1.5e9),
        ("30MHz", "frequency", 30e6),
        ("2.5 mm", "length", 2.5e-3),
        ("3 m", "length", 3.0),
        ("-20 dBm", "dbm", -20.0),
        ("10 dB", "db", 10.0),
        ("200 ms", "time", 0.2),
        ("45 deg", "angle", 45.0),
        ("50 mm/s", "speed", 0.05),
        ("1e3 Hz", "frequency", 1000.0),
    ],
)
def test_parse_quantities(text, dimension, expected):
    assert units.parse(text, dimension) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    ("value", "dimension", "fragment"),
    [
        (120000, "frequency", "bare number 120000"),
        ("120", "frequency", "with no unit"),
        ("120 kHz", "length", "unit 'kHz'"),
        ("twelve MHz", "frequency", "found 'twelve MHz'"),
        (True, "frequency", "found True"),
        ("1e999 Hz", "frequency", "finite"),
    ],
)
def test_parse_errors_name_the_text(value, dimension, fragment):
    with pytest.raises(UnitError) as info:
        units.parse(value, dimension)
    assert fragment in str(info.value)
    assert "\n" not in str(info.value)


def test_eta0_and_its_db_value():
    # reference sheet §4: eta0 = 376.730 ohm, 20*log10(eta0) = 51.52 dB (CODATA 2018 mu0)
    assert units.ETA0_OHM == pytest.approx(376.730, abs=0.001)
    assert 20 * math.log10(units.ETA0_OHM) == pytest.approx(51.52, abs=0.005)


def test_dbm_to_dbuv_50_ohm():
    # reference sheet §4: dBuV = dBm + 106.99 (50 ohm)
    assert units.dbm_to_dbuv(0.0) == pytest.approx(106.99, abs=0.005)
    assert units.dbuv_to_dbm(106.99) == pytest.approx(0.0, abs=0.005)
    # general form dBuV = dBm + 10 log10(Z) + 90: 75 ohm -> +108.75
    assert units.dbm_to_dbuv(0.0, impedance_ohm=75.0) == pytest.approx(108.75, abs=0.005)


def test_e_to_h_plane_wave():
    # reference sheet §4: dBuA/m = dBuV/m - 51.52
    assert units.dbuv_per_m_to_dbua_per_m(40.0) == pytest.approx(40.0 - 51.52, abs=0.005)
    assert units.dbua_per_m_to_dbuv_per_m(-11.52) == pytest.approx(40.0, abs=0.005)
    # reference sheet §4: dBpT = dBuA/m + 1.98
    assert units.dbua_per_m_to_dbpt(0.0) == pytest.approx(1.98, abs=0.005)


def test_uv_per_m_round_trip():
    # FCC 15.109 table: 100 uV/m = 40.00 dBuV/m, 150 uV/m = 43.52, 500 uV/m = 53.98
    assert units.uv_per_m_to_dbuv_per_m(100.0) == pytest.approx(40.0, abs=0.005)
    assert units.uv_per_m_to_dbuv_per_m(150.0) == pytest.approx(43.52, abs=0.005)
    assert units.uv_per_m_to_dbuv_per_m(500.0) == pytest.approx(53.98, abs=0.005)
    assert units.dbuv_per_m_to_uv_per_m(46.02) == pytest.approx(200.0, rel=1e-3)


def test_array_inputs_stay_arrays():
    out = units.dbm_to_dbuv([0.0, -10.0])
    assert out.shape == (2,)
    assert out[1] == pytest.approx(96.99, abs=0.005)


def test_format_hz():
    assert units.format_hz(120e6) == "120 MHz"
    assert units.format_hz(9e3) == "9 kHz"
