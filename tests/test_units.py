"""Quantity parsing and dB conversions.

Prefix and unit symbols are case-sensitive: SI Brochure (BIPM, 9th edition 2019), section 3,
"Decimal multiples and submultiples of SI units": m = milli (1e-3) but M = mega (1e6),
k = kilo (1e3) and K is no prefix, G = giga, u/µ = micro, n = nano, p = pico. The dB
conversions follow from CODATA 2018 mu0, the exact c and the definitions of the dB units
(derived in docs/physics.md, section 1).
"""

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

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
    # eta0 = sqrt(mu0/eps0) = 376.730 ohm, 20*log10(eta0) = 51.52 dB (derived from CODATA 2018
    # mu0 and the exact c)
    assert units.ETA0_OHM == pytest.approx(376.730, abs=0.001)
    assert 20 * math.log10(units.ETA0_OHM) == pytest.approx(51.52, abs=0.005)


def test_dbm_to_dbuv_50_ohm():
    # dBuV = dBm + 10*log10(50) + 90 = dBm + 106.99 at 50 ohm (derived from P = V^2/R)
    assert units.dbm_to_dbuv(0.0) == pytest.approx(106.99, abs=0.005)
    assert units.dbuv_to_dbm(106.99) == pytest.approx(0.0, abs=0.005)
    # general form dBuV = dBm + 10 log10(Z) + 90: 75 ohm -> +108.75
    assert units.dbm_to_dbuv(0.0, impedance_ohm=75.0) == pytest.approx(108.75, abs=0.005)


def test_e_to_h_plane_wave():
    # plane wave H = E/eta0: dBuA/m = dBuV/m - 20*log10(eta0) = dBuV/m - 51.52 (derived)
    assert units.dbuv_per_m_to_dbua_per_m(40.0) == pytest.approx(40.0 - 51.52, abs=0.005)
    assert units.dbua_per_m_to_dbuv_per_m(-11.52) == pytest.approx(40.0, abs=0.005)
    # B = mu0*H: dBpT = dBuA/m + 20*log10(mu0*1e6) = dBuA/m + 1.98 (derived, CODATA 2018 mu0)
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


# ----------------------------------------------------------------------------- case of prefixes
# SI Brochure (BIPM, 9th edition 2019), section 3: prefix symbols are case-sensitive.
SI_FACTORS = {"p": 1e-12, "n": 1e-9, "u": 1e-6, "µ": 1e-6, "m": 1e-3, "k": 1e3, "M": 1e6,
              "G": 1e9}

# Every spelling of the demo files, the built-in profiles and limits, and the tests, with its
# factor to SI (SI Brochure section 3; "u" for the micro sign is common practice).
EXACT = [
    ("Hz", "frequency", 1.0), ("kHz", "frequency", 1e3), ("MHz", "frequency", 1e6),
    ("GHz", "frequency", 1e9), ("mHz", "frequency", 1e-3),
    ("m", "length", 1.0), ("mm", "length", 1e-3), ("cm", "length", 1e-2), ("um", "length", 1e-6),
    ("µm", "length", 1e-6), ("km", "length", 1e3),
    ("s", "time", 1.0), ("ms", "time", 1e-3), ("us", "time", 1e-6), ("µs", "time", 1e-6),
    ("ns", "time", 1e-9),
    ("nH", "inductance", 1e-9), ("uH", "inductance", 1e-6), ("pF", "capacitance", 1e-12),
    ("nF", "capacitance", 1e-9), ("mA", "current", 1e-3), ("uA", "current", 1e-6),
    ("mV", "voltage", 1e-3), ("V", "voltage", 1.0), ("kohm", "resistance", 1e3),
    ("cm2", "area", 1e-4), ("mm/s", "speed", 1e-3), ("mm/s2", "acceleration", 1e-3),
    ("MB/s", "data_rate", 1e6), ("deg", "angle", 1.0), ("deg/s", "angular_speed", 1.0),
    ("dBuV/m", "dbuv_per_m", 1.0), ("dBuA/m", "dbua_per_m", 1.0), ("dBuV", "dbuv", 1.0),
    ("dBm", "dbm", 1.0), ("dB", "db", 1.0),
]

finite_numbers = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False,
                           allow_infinity=False).map(lambda v: float(f"{v:.6g}"))


@settings(max_examples=200, derandomize=True, database=None, deadline=None)
@given(number=finite_numbers, case=st.sampled_from(EXACT), space=st.sampled_from(["", " "]))
def test_every_exact_spelling_parses_to_its_si_factor(number, case, space):
    unit, dimension, factor = case
    text = f"{number!r}{space}{unit}"
    assert units.parse(text, dimension) == pytest.approx(number * factor, rel=1e-12, abs=1e-300)


def _case_variants(unit: str) -> set[str]:
    variants = {unit.upper(), unit.lower(), unit.swapcase(), unit.capitalize()}
    return {v for v in variants if v != unit}


@settings(max_examples=200, derandomize=True, database=None, deadline=None)
@given(number=st.integers(min_value=1, max_value=999), case=st.sampled_from(EXACT),
       pick=st.integers(min_value=0, max_value=3))
def test_a_wrong_case_is_refused_with_the_spelling_meant(number, case, pick):
    unit, dimension, _ = case
    known = set(units._UNITS[dimension])
    variants = sorted(v for v in _case_variants(unit) if v not in known)
    if not variants:
        return  # e.g. "m": its other case "M" is no length unit, covered below
    wrong = variants[pick % len(variants)]
    with pytest.raises(UnitError) as info:
        units.parse(f"{number} {wrong}", dimension)
    message = str(info.value)
    meant = units.case_suggestion(wrong, units._UNITS[dimension])
    assert meant is not None and meant.casefold() == wrong.casefold() and meant in known
    assert f"found {number} {wrong}; did you mean {number} {meant}?" in message
    assert "\n" not in message


@pytest.mark.parametrize(("text", "dimension", "meant"), [
    ("10 KHz", "frequency", "10 kHz"),    # K is not a prefix: kilo is k
    ("1 ghz", "frequency", "1 GHz"),      # G = giga; Hz, not hz
    ("30 mhz", "frequency", "30 MHz"),    # no frequency is written in millihertz by mistake
    ("30 MHZ", "frequency", "30 MHz"),
    ("2 MM", "length", "2 mm"),
    ("2 Mm", "length", "2 mm"),           # megametre: nothing on a bench
    ("20 MS", "time", "20 ms"),
    ("3 dbm", "dbm", "3 dBm"),
    ("40 dbuv/m", "dbuv_per_m", "40 dBuV/m"),
    ("10 Ma", "current", "10 mA"),
    ("4 mb/s", "data_rate", "4 MB/s"),
])
def test_wrong_case_examples_name_the_spelling_meant(text, dimension, meant):
    # SI Brochure, 9th edition 2019, section 3: prefix symbols are case-sensitive
    with pytest.raises(UnitError, match=f"did you mean {meant}\\?"):
        units.parse(text, dimension)


@settings(max_examples=100, derandomize=True, database=None, deadline=None)
@given(number=st.integers(min_value=1, max_value=999))
def test_millihertz_is_millihertz_but_never_a_radio_frequency(number):
    # SI Brochure, 9th edition 2019, section 3: m = 1e-3 (milli), M = 1e6 (mega)
    assert units.parse(f"{number} mHz", "frequency") == pytest.approx(number * 1e-3)
    assert units.parse(f"{number} MHz", "frequency", radio=True) == pytest.approx(number * 1e6)
    with pytest.raises(UnitError) as info:
        units.parse(f"{number} mHz", "frequency", radio=True)
    assert str(info.value) == (f"expected a radio frequency of at least 1 Hz, found {number} mHz "
                               f"(millihertz); did you mean {number} MHz?")


@settings(max_examples=100, derandomize=True, database=None, deadline=None)
@given(hz=st.floats(min_value=1e-9, max_value=0.999, allow_nan=False))
def test_any_radio_frequency_below_one_hertz_is_refused(hz):
    text = f"{hz!r} Hz"
    assert units.parse(text, "frequency") == pytest.approx(hz)
    with pytest.raises(UnitError, match="at least 1 Hz"):
        units.parse(text, "frequency", radio=True)
    # zero (a sweep starting at 0 Hz) and 1 Hz and above stay valid (common practice: the
    # lowest analyzer start frequency is 0 Hz)
    assert units.parse("0 Hz", "frequency", radio=True) == 0.0
    assert units.parse("1 Hz", "frequency", radio=True) == 1.0


@settings(max_examples=100, derandomize=True, database=None, deadline=None)
@given(number=st.integers(min_value=1, max_value=999), prefix=st.sampled_from(sorted(SI_FACTORS)))
def test_k_upper_case_is_never_a_prefix(number, prefix):
    # SI Brochure, 9th edition 2019, section 3: k (kilo) is lower case; K is the kelvin
    with pytest.raises(UnitError, match="did you mean"):
        units.parse(f"{number} KHz", "frequency")
    # every prefix the frequency table knows scales by its SI factor
    unit = f"{prefix}Hz"
    if unit in units._UNITS["frequency"]:
        assert units.parse(f"{number} {unit}", "frequency") == pytest.approx(
            number * SI_FACTORS[prefix])


def test_greek_mu_reads_as_the_micro_sign():
    # U+03BC (Greek mu) and U+00B5 (micro sign) look alike; SI Brochure section 3 uses mu
    assert units.parse("5 \u03bcs", "time") == pytest.approx(5e-6)
    assert units.parse("5 \u00b5s", "time") == pytest.approx(5e-6)


def test_radio_applies_to_frequencies_only():
    with pytest.raises(ValueError):
        units.parse("3 mm", "length", radio=True)
