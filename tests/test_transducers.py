"""Transducer tables and chains: AF from gain, signs, log-f interpolation, coverage, CSV format.

Expected values name their source beside them: the definition of the antenna factor along
the receive chain, values derived from the effective aperture (AF from gain) and from Faraday's
law (probes), derivations in docs/physics.md sections 4 and 6; or they are computed by hand next
to the assertion.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pytest

import bench.demo
from bench.analysis.transducers import (
    TransducerChain,
    TransducerTable,
    antenna_factor_from_gain_db,
    load_table,
    table_from_mapping,
)
from bench.errors import AnalysisError, ConfigError

MHZ = 1e6
TABLES = Path(bench.demo.__file__).parent / "tables"


# --------------------------------------------------------------------------- AF from gain

@pytest.mark.parametrize(("freq_hz", "gain_dbi", "af_db_per_m"), [
    # AF test vectors (derived from AF = 9.73/(lambda sqrt(G)), 50 ohm; docs/physics.md 6).
    (30e6, 0.0, -0.23), (100e6, 0.0, 10.23), (100e6, 2.15, 8.08), (300e6, 6.0, 13.77),
    (1e9, 10.0, 20.23),
])
def test_antenna_factor_from_gain_derived_vectors(freq_hz, gain_dbi, af_db_per_m):
    assert antenna_factor_from_gain_db(freq_hz, gain_dbi) == pytest.approx(af_db_per_m,
                                                                           abs=0.006)


def test_antenna_factor_915mhz_8dbi_calculator_page():
    # An online antenna-factor calculator shows 21.50 dB/m at 915 MHz, 8 dBi. The exact constant
    # (29.774) gives 21.455 and the rounded 29.77 gives 21.458, so the page's figure is read as
    # 21.5 to 0.1 dB: we check agreement to 0.05 dB, not the 0.03 dB first asked for.
    af = antenna_factor_from_gain_db(915e6, 8.0)
    assert af == pytest.approx(21.50, abs=0.05)
    # Same point by the linear form AF = 9.73/(lambda sqrt(G)) (Wikipedia "Antenna factor").
    lam = 299_792_458.0 / 915e6
    assert af == pytest.approx(20 * math.log10(9.73 / (lam * math.sqrt(10 ** 0.8))), abs=0.002)


def test_antenna_factor_is_vectorised():
    out = antenna_factor_from_gain_db(np.array([30e6, 1e9]), np.array([0.0, 10.0]))
    np.testing.assert_allclose(out, [-0.23, 20.23], atol=0.006)  # derived vectors


# --------------------------------------------------------------------------- interpolation

def two_point(role="cable_loss", unit="db", values=(10.0, 30.0), name="t"):
    return TransducerTable(name, role, unit, [100 * MHZ, 1000 * MHZ], list(values))


def test_interpolation_is_linear_in_log_frequency():
    table = two_point()
    # Hand computation: 10 dB at 100 MHz, 30 dB at 1 GHz, linear in log10 f:
    # 200 MHz -> 10 + 20*log10(2) = 16.0206; sqrt(1e17) Hz -> 20.0. (Linear in f would give
    # 12.22 at 200 MHz.)
    np.testing.assert_allclose(table.at([200 * MHZ, math.sqrt(1e17), 100 * MHZ, 1000 * MHZ]),
                               [10 + 20 * math.log10(2), 20.0, 10.0, 30.0], atol=1e-9)


def test_outside_the_table_is_nan_not_clamped():
    out = two_point().at([50 * MHZ, 2000 * MHZ, 0.0])
    assert np.all(np.isnan(out))


def test_chain_refuses_a_sweep_the_table_does_not_cover():
    chain = TransducerChain([two_point(name="coax-7m")])
    with pytest.raises(AnalysisError) as info:
        chain.total_db([30 * MHZ, 500 * MHZ, 2000 * MHZ])
    text = str(info.value)
    assert "'coax-7m'" in text and "covers 100 MHz to 1 GHz" in text
    assert "uncovered: 30 MHz to 100 MHz; 1 GHz to 2 GHz" in text


def test_end_points_within_rounding_are_covered():
    # 1 GHz computed as 1e9 * (1 + 1e-15) from a linspace is still inside the table.
    table = two_point()
    table.check_covers([1e9 * (1 + 1e-15)])
    assert table.at(1e9 * (1 + 1e-15)) == pytest.approx(30.0)


# --------------------------------------------------------------------------- chain and signs

def test_chain_sum_with_preamp_subtracting():
    freq = np.array([100 * MHZ, 1000 * MHZ])
    af = TransducerTable("af", "antenna_factor", "db_per_m", freq, [10.23, 20.23])
    cable = TransducerTable("coax", "cable_loss", "db", freq, [1.0, 3.0])
    pad = TransducerTable("pad", "attenuator", "db", freq, [6.0, 6.0])
    preamp = TransducerTable("lna", "preamp_gain", "db", freq, [30.0, 28.0])
    chain = TransducerChain([af, cable, pad, preamp])
    # AF = E/V along the chain (common practice): E(dBuV/m) = V(dBuV) + AF + L_cable -
    # G_preamp (+ attenuation, a loss).
    # By hand: 100 MHz 10.23 + 1 + 6 - 30 = -12.77; 1 GHz 20.23 + 3 + 6 - 28 = 1.23.
    np.testing.assert_allclose(chain.total_db(freq), [-12.77, 1.23], atol=1e-9)
    np.testing.assert_allclose(chain.correct(freq, [50.0, 40.0]), [37.23, 41.23], atol=1e-9)
    assert chain.result_quantity == "dbuv_per_m"
    assert [t.sign for t in chain.tables] == [1, 1, 1, -1]


def test_describe_names_every_table_and_sign():
    freq = [100 * MHZ, 1000 * MHZ]
    chain = TransducerChain([
        TransducerTable("af", "antenna_factor", "db_per_m", freq, [10, 20]),
        TransducerTable("lna", "preamp_gain", "db", freq, [30, 30])])
    text = chain.describe()
    first = text.splitlines()[0]
    assert first == "dBuV/m = reading dBuV + af - lna"
    assert "antenna_factor in dB/m" in text and "- 'lna': preamp_gain in dB" in text


def test_result_quantity_by_probe_kind():
    freq = [1 * MHZ, 100 * MHZ]
    h = TransducerTable("loop", "probe_factor", "db_s_per_m", freq, [64.15, 24.42])
    e = TransducerTable("stub", "probe_factor", "db_per_m", freq, [116, 76])
    cable = TransducerTable("coax", "cable_loss", "db", freq, [0.1, 0.8])
    # Loop-antenna factor AF_H = H/V (common practice): H(dBuA/m) = V(dBuV) + AF_H(dB(S/m)).
    assert TransducerChain([h, cable]).result_quantity == "dbua_per_m"
    assert TransducerChain([e]).result_quantity == "dbuv_per_m"
    assert TransducerChain([cable]).result_quantity == "dbuv"
    assert TransducerChain().result_quantity == "dbuv"
    np.testing.assert_allclose(TransducerChain([h, cable]).correct(freq, [0.0, 0.0]),
                               [64.25, 25.22])  # hand sum


def test_chain_refuses_two_field_factors():
    freq = [1 * MHZ, 100 * MHZ]
    af = TransducerTable("af", "antenna_factor", "db_per_m", freq, [10, 20])
    probe = TransducerTable("loop", "probe_factor", "db_s_per_m", freq, [60, 20])
    with pytest.raises(ConfigError, match="at most one antenna or probe factor"):
        TransducerChain([af, probe])


def test_negative_loss_or_gain_is_a_sign_error():
    with pytest.raises(ConfigError, match="cable_loss is >= 0 dB.*-1 dB at 1 GHz"):
        two_point(values=(1.0, -1.0))
    with pytest.raises(ConfigError, match="preamp_gain is >= 0 dB"):
        two_point(role="preamp_gain", values=(-30.0, -30.0))


def test_unit_must_suit_role():
    with pytest.raises(ConfigError, match="antenna_factor table is in dB/m, found values in dB"):
        two_point(role="antenna_factor", unit="db")
    with pytest.raises(ConfigError, match="unknown role 'gain'"):
        two_point(role="gain")


def test_frequencies_must_increase_strictly():
    with pytest.raises(ConfigError, match="increase strictly"):
        TransducerTable("t", "attenuator", "db", [1e8, 1e8, 2e8], [1, 1, 1])
    with pytest.raises(ConfigError, match="at least two"):
        TransducerTable("t", "attenuator", "db", [1e8], [1])


# --------------------------------------------------------------------------- CSV and inline

def test_csv_errors_name_file_and_line(tmp_path):
    path = tmp_path / "loss.csv"
    path.write_text("# role: cable_loss\nfreq_mhz,loss_db\n30,0.4\n100,0.7\n100,0.8\n")
    with pytest.raises(ConfigError) as info:
        load_table(path)
    assert info.value.line == 5 and info.value.file == str(path)
    path.write_text("# role: cable_loss\nfreq_mhz,loss_db\n30,0.4\n100,-0.7\n")
    with pytest.raises(ConfigError, match="cable_loss is >= 0 dB") as info:
        load_table(path)
    assert info.value.line == 4
    path.write_text("# role: cable_loss\nfrequency,loss\n30,0.4\n100,0.7\n")
    with pytest.raises(ConfigError, match="expected a header") as info:
        load_table(path)
    assert info.value.line == 2
    path.write_text("# role: cable_loss\nfreq_mhz,loss_db\n30,0.4\n100,abc\n")
    with pytest.raises(ConfigError, match="two numbers") as info:
        load_table(path)
    assert info.value.line == 4


def test_csv_role_from_file_or_caller(tmp_path):
    path = tmp_path / "pad.csv"
    path.write_text("freq_ghz,att_db\n0.03,10\n6,10.5\n")
    with pytest.raises(ConfigError, match="expected a role.*found none"):
        load_table(path)
    table = load_table(path, role="attenuator")
    assert table.name == "pad" and table.freq_range_hz == (30e6, 6e9)
    path.write_text("# role: cable_loss\nfreq_ghz,att_db\n0.03,10\n6,10.5\n")
    with pytest.raises(ConfigError, match="expected role 'attenuator', the file says"):
        load_table(path, role="attenuator")


def test_inline_tables():
    table = table_from_mapping({"name": "pad", "role": "attenuator",
                                "freq": ["30 MHz", "6 GHz"], "loss_db": [10.0, 10.0]})
    assert table.freq_range_hz == (30e6, 6e9) and table.at(1e9) == pytest.approx(10.0)
    table = table_from_mapping({"name": "lna", "role": "preamp_gain",
                                "freq_mhz": [30, 1000], "gain_db": [30.0, 29.0]})
    # Hand computation: log-f halfway (sqrt(30*1000) MHz) is halfway in dB.
    assert table.at(math.sqrt(30 * 1000) * MHZ) == pytest.approx(29.5)
    with pytest.raises(ConfigError, match="expected a frequency") as info:
        table_from_mapping({"name": "x", "role": "attenuator", "freq": [30, 100],
                            "loss_db": [1, 1]}, file="bench.toml", key="transducers[0]")
    assert info.value.key == "transducers[0].freq"
    with pytest.raises(ConfigError, match="one value array"):
        table_from_mapping({"name": "x", "role": "attenuator", "freq_mhz": [30, 100],
                            "loss_db": [1, 1], "gain_db": [1, 1]})


def test_mapping_with_file_and_base_dir():
    table = table_from_mapping({"file": "cable-5m.csv", "role": "cable_loss"},
                               base_dir=TABLES)
    assert table.name == "cable-5m" and table.role == "cable_loss"


# --------------------------------------------------------------------------- demo tables

def test_demo_tables_load_with_their_roles():
    roles = {p.stem: load_table(p).role for p in TABLES.glob("*.csv")}
    assert roles == {"bilog-af": "antenna_factor", "cable-5m": "cable_loss",
                     "preamp-30db": "preamp_gain", "hloop-10mm": "probe_factor",
                     "hloop-3mm": "probe_factor", "eprobe": "probe_factor"}


def test_demo_antenna_factor_matches_its_stated_gain_curve():
    # The file header states the invented gain curve (MHz:dBi knots); at each knot the table
    # must equal AF = 20 log10(f/MHz) - G - 29.77 (derived, docs/physics.md section 6).
    path = TABLES / "bilog-af.csv"
    knots = re.findall(r"(\d+):(-?[\d.]+)", path.read_text().splitlines()[2].split("):")[1])
    assert len(knots) == 7
    table = load_table(path)
    assert table.freq_range_hz == (30e6, 6e9)
    for f_mhz, gain in knots:
        expected = 20 * math.log10(float(f_mhz)) - float(gain) - 29.77
        assert table.at(float(f_mhz) * MHZ) == pytest.approx(expected, abs=0.006)


def loop_inductance_h(radius_m, wire_radius_m, turns):
    # Circular ring of round wire, L = N^2 mu0 a (ln(8a/b) - 2) (Grover, high-frequency form).
    return turns**2 * 4e-7 * math.pi * radius_m * (math.log(8 * radius_m / wire_radius_m) - 2)


def loop_factor_db(freq_hz, radius_m, turns, inductance_h):
    # Faraday's law: V_oc = 2 pi f mu0 N A H, loaded by 50 ohm through j w L (derived).
    w = 2 * math.pi * freq_hz
    v_oc_per_h = w * 4e-7 * math.pi * turns * math.pi * radius_m**2
    return -20 * math.log10(v_oc_per_h * 50 / abs(50 + 1j * w * inductance_h))


def test_demo_h_loop_10mm_matches_derived_vector():
    # Faraday's law (derived): r = 5 mm, N = 1, H = 1 A/m gives V_oc = 0.620 mV at 1 MHz and
    # 6.20 mV at 10 MHz, so AF_H = H/V = 20 log10(1/V) dB(S/m); the loop inductance changes these by
    # < 0.003 dB. At 100 MHz the load adds 20 log10(|50 + j w L| / 50).
    table = load_table(TABLES / "hloop-10mm.csv")
    assert table.value_unit == "db_s_per_m"
    assert table.at(1 * MHZ) == pytest.approx(-20 * math.log10(0.620e-3), abs=0.02)
    assert table.at(10 * MHZ) == pytest.approx(-20 * math.log10(6.20e-3), abs=0.02)
    inductance = loop_inductance_h(5e-3, 0.25e-3, 1)
    load_db = 20 * math.log10(abs(50 + 2j * math.pi * 1e8 * inductance) / 50)
    assert table.at(100 * MHZ) == pytest.approx(-20 * math.log10(62.0e-3) + load_db, abs=0.02)


@pytest.mark.parametrize("freq_hz", [1e6, 30e6, 100e6, 300e6, 1e9])
def test_demo_h_loops_follow_faraday_with_their_stated_geometry(freq_hz):
    # Header geometry: 10 mm loop of 0.5 mm wire, 1 turn; 3 mm loop of 0.2 mm wire, 2 turns.
    # Between table points the interpolation (linear in log f) may deviate a little from the
    # curved loaded response: 0.05 dB allowed.
    for name, radius, turns, wire in (("hloop-10mm", 5e-3, 1, 0.25e-3),
                                      ("hloop-3mm", 1.5e-3, 2, 0.1e-3)):
        table = load_table(TABLES / f"{name}.csv")
        expected = loop_factor_db(freq_hz, radius, turns, loop_inductance_h(radius, wire, turns))
        assert table.at(freq_hz) == pytest.approx(expected, abs=0.05), name


def test_demo_e_probe_rises_20db_per_decade_below_corner():
    # Derived: a capacitive probe into R is a high-pass, +20 dB/decade in response (so the
    # factor falls 20 dB/decade) well below 1/(2 pi C R); open circuit V = E h_e, h_e = 3 mm,
    # C = 1 pF: at 1 MHz factor = -20 log10(h_e w C R).
    table = load_table(TABLES / "eprobe.csv")
    assert table.at(1 * MHZ) - table.at(10 * MHZ) == pytest.approx(20.0, abs=0.01)
    expected = -20 * math.log10(3e-3 * 2 * math.pi * 1e6 * 1e-12 * 50)
    assert table.at(1 * MHZ) == pytest.approx(expected, abs=0.01)


def test_demo_receive_chain_covers_30mhz_to_6ghz():
    chain = TransducerChain([load_table(TABLES / f"{n}.csv") for n in
                             ("bilog-af", "cable-5m", "preamp-30db")])
    freq = np.geomspace(30e6, 6e9, 1001)
    total = chain.total_db(freq)
    # The receive-chain sum (AF = E/V along the chain) at the table points, by the three
    # tables' own values.
    af, coax, lna = chain.tables
    np.testing.assert_allclose(total, af.at(freq) + coax.at(freq) - lna.at(freq))
    assert np.all(np.isfinite(total))
    with pytest.raises(AnalysisError, match="bilog-af"):
        chain.total_db([25e6])
