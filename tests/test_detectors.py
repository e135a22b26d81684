"""CISPR 16-1-1 detectors of the simulated receiver against published and derived values.

Sources: CISPR 16-1-1 (band/bandwidth table, quasi-peak time constants, the QP pulse-response
table and calibration pulses; the last two from memory), textbook
step response of a critically damped second-order system, Fourier series of a pulse train.
"""

from __future__ import annotations

import math

import pytest
from scipy.integrate import solve_ivp

from bench.errors import AnalysisError
from bench.sim import detectors as det

B = det.BANDS["B"]
CD = det.BANDS["C/D"]
A_BAND = det.BANDS["A"]
SETTLED_DWELL_S = 5.0  # long enough for every meter and discharge transient (tau <= 0.55 s)


def _db(volts: float) -> float:
    return det.to_dbuv(volts)


# ------------------------------------------------------------------------------- bands


@pytest.mark.parametrize("freq_hz, name, b6_hz", [
    (9e3, "A", 200.0), (100e3, "A", 200.0),          # CISPR 16-1-1 band table (confirmed)
    (150e3, "B", 9e3), (29.9e6, "B", 9e3),           # CISPR 16-1-1 band table (confirmed)
    (30e6, "C/D", 120e3), (999e6, "C/D", 120e3),     # CISPR 16-1-1 band table (confirmed)
])
def test_band_of_frequency_and_b6(freq_hz, name, b6_hz):
    band = det.cispr_band(freq_hz)
    assert band.name == name
    assert band.b6_hz == b6_hz


@pytest.mark.parametrize("name, tc, td, tm", [
    ("A", 45e-3, 500e-3, 160e-3),  # CISPR 16-1-1 QP constants (confirmed)
    ("B", 1e-3, 160e-3, 160e-3),   # CISPR 16-1-1 QP constants (confirmed)
    ("C/D", 1e-3, 550e-3, 100e-3), # CISPR 16-1-1 QP constants (confirmed)
])
def test_quasi_peak_time_constants(name, tc, td, tm):
    band = det.BANDS[name]
    assert (band.tau_charge_s, band.tau_discharge_s, band.tau_meter_qp_s) == (tc, td, tm)


@pytest.mark.parametrize("name, b_imp_hz", [
    ("A", 212.9), ("B", 9.58e3), ("C/D", 127.7e3),  # Gaussian RBW filter (derived)
    ("E", 1e6),                                     # CISPR 16-1-1: band E B_imp (memory)
])
def test_impulse_bandwidth_of_gaussian_filter(name, b_imp_hz):
    assert det.BANDS[name].b_imp_hz == pytest.approx(b_imp_hz, rel=1e-3)


def test_band_e_b6_is_939_khz():
    # Gaussian RBW filter (docs/physics.md): B_imp = 1 MHz corresponds to B6 ~ 939 kHz and
    # B3 ~ 664 kHz (derived)
    assert det.cispr_band(2e9).b6_hz == pytest.approx(939e3, rel=1e-3)
    assert det.cispr_band(2e9).b3_hz == pytest.approx(664e3, rel=1e-3)


@pytest.mark.parametrize("freq_hz", [8e3, 18.1e9, -1.0])
def test_frequency_outside_cispr_range_is_refused(freq_hz):
    with pytest.raises(AnalysisError, match="9 kHz to 18 GHz"):
        det.cispr_band(freq_hz)


# ------------------------------------------------------------------------------- envelopes


@pytest.mark.parametrize("band", [A_BAND, B, CD])
def test_impulse_peak_envelope_is_2_a_bimp(band):
    area_vs = 0.316e-6
    env = det.impulse_train_envelope(area_vs, None, band)
    # Gaussian RBW filter, derived (docs/physics.md): peak IF envelope 2 A B_imp volts peak,
    # i.e. /sqrt(2) RMS-equivalent
    assert det.peak(env) == pytest.approx(2 * area_vs * band.b_imp_hz / math.sqrt(2), rel=1e-9)


def test_long_burst_peak_reads_on_level_and_fast_keying_reads_carrier_line():
    # a burst much longer than 1/B_imp passes the filter whole: peak = RMS level while on
    assert det.peak_offset_db(10.0, 0.25, 100e6) == pytest.approx(0.0, abs=1e-6)
    # keying far faster than the bandwidth: only the carrier line passes, amplitude duty * V
    # (Fourier series of a pulse train: DC term A*d, Paul, Introduction to EMC, ch. 3)
    assert det.peak_offset_db(1e6, 0.25, 1e6) == pytest.approx(20 * math.log10(0.25), abs=1e-6)


def test_burst_arguments_are_checked():
    with pytest.raises(AnalysisError, match="duty"):
        det.burst_envelope(1.0, 100.0, 0.0, B)


# ------------------------------------------------------------------------------- CW


@pytest.mark.parametrize("band", [A_BAND, B, CD])
def test_cw_reads_its_rms_value_on_every_detector(band):
    level_v = 2e-3
    env = det.cw_envelope(level_v)
    # every CISPR detector reads the RMS of a CW sine (CISPR 16-1-1 detector definitions;
    # common practice)
    assert det.peak(env) == pytest.approx(level_v, rel=1e-12)
    assert det.quasi_peak(env, band, SETTLED_DWELL_S) == pytest.approx(level_v, rel=1e-4)
    assert det.cispr_average(env, band, SETTLED_DWELL_S) == pytest.approx(level_v, rel=1e-4)
    assert det.rms_average(env, band, SETTLED_DWELL_S) == pytest.approx(level_v, rel=1e-4)


@pytest.mark.parametrize("band, expected_db", [
    (B, -0.05), (CD, -0.016),  # CISPR 16-1-1 QP constants (derived): tau_d/(tau_c + tau_d)
])
def test_cw_deflection_of_envelope_detector_before_normalisation(band, expected_db):
    env = det.cw_envelope(1.0)
    raw = det.quasi_peak(env, band, SETTLED_DWELL_S, model="envelope", normalise=False)
    ratio = band.tau_discharge_s / (band.tau_charge_s + band.tau_discharge_s)  # CISPR 16-1-1
    # R_c C is set from the 63 % definition, which moves the ratio by < 0.001 dB here
    assert 20 * math.log10(raw) == pytest.approx(20 * math.log10(ratio), abs=1e-3)
    assert 20 * math.log10(raw) == pytest.approx(expected_db, abs=6e-3)


@pytest.mark.parametrize("band", [A_BAND, B, CD])
def test_cw_deflection_of_envelope_detector_follows_charge_time_definition(band):
    # 63 % rise after tau_c (CISPR 16-1-1 charge time constant definition, from memory) with
    # dV/dt = (e - V)/tau_R - V/tau_d gives
    # tau_R tau_d/(tau_R + tau_d) = tau_c, so V/e = tau_d/(tau_R + tau_d) = 1 - tau_c/tau_d
    # (derived). Band A: -0.82 dB; the commonly quoted "-0.08 dB" for band A disagrees with
    # its own formula tau_d/(tau_c + tau_d) = -0.75 dB.
    raw = det.quasi_peak(det.cw_envelope(1.0), band, SETTLED_DWELL_S, model="envelope",
                         normalise=False)
    assert raw == pytest.approx(1 - band.tau_charge_s / band.tau_discharge_s, rel=1e-5)


@pytest.mark.parametrize("model", det.DIODE_MODELS)
@pytest.mark.parametrize("name", ["A", "B", "C/D"])
def test_charge_time_constant_meets_its_definition(model, name):
    # CISPR 16-1-1 quasi-peak time constants (charge time constant definition: from memory):
    # a sine switched on brings the detector output to
    # 63 % of its final value after tau_c. Integrated here independently with scipy.
    band = det.BANDS[name]
    diode = det._diode(model, name)
    sol = solve_ivp(lambda _t, v: [diode.rate(1.0, v[0])], (0.0, 400 * band.tau_charge_s), [0.0],
                    rtol=1e-10, atol=1e-13, dense_output=True)
    final = diode.cw_gain
    assert sol.sol(band.tau_charge_s)[0] / final == pytest.approx(1 - math.exp(-1), abs=1e-5)
    assert sol.y[0][-1] == pytest.approx(final, rel=1e-6)


def test_carrier_diode_cw_level_follows_conduction_angle():
    # half-wave peak rectifier with series R_c and load R_d: V/E = cos(theta) with
    # tan(theta) - theta = pi R_c / R_d (classical rectifier analysis, derived)
    diode = det._diode("carrier", "B")
    theta = math.acos(diode.cw_gain)
    assert math.tan(theta) - theta == pytest.approx(math.pi * diode.r, rel=1e-6)


@pytest.mark.parametrize("band, dwell_s", [(B, 1.0), (CD, 0.3), (A_BAND, 0.5)])
def test_average_meter_settling_is_critically_damped_step_response(band, dwell_s):
    # step response of w0^2/(s + w0)^2: 1 - (1 + t/tau) exp(-t/tau) (textbook, any
    # control-systems text); max held = value at the end of the dwell
    tau = band.tau_meter_avg_s
    expected = 1 - (1 + dwell_s / tau) * math.exp(-dwell_s / tau)
    assert det.cispr_average(det.cw_envelope(1.0), band, dwell_s) == pytest.approx(expected,
                                                                                   rel=2e-5)


# ------------------------------------------------------------------------------- QP pulse table

# CISPR 16-1-1 QP pulse-response table (Table 2 in recent editions; all values from memory):
# (band, PRF or None for isolated, relative equivalent level dB, tolerance dB)
PULSE_TABLE = [
    ("A", 100.0, -4.0, 1.0), ("A", 60.0, -3.0, 1.0), ("A", 10.0, 4.0, 1.0),
    ("A", 5.0, 7.5, 1.5), ("A", 2.0, 13.0, 2.0), ("A", 1.0, 17.0, 2.0), ("A", None, 19.0, 2.0),
    ("B", 1000.0, -4.5, 1.0), ("B", 20.0, 6.5, 1.0), ("B", 10.0, 10.0, 1.5),
    ("B", 2.0, 20.5, 2.0), ("B", 1.0, 22.5, 2.0), ("B", None, 23.5, 2.0),
    ("C/D", 1000.0, -8.0, 1.0), ("C/D", 20.0, 9.0, 1.0), ("C/D", 10.0, 14.0, 1.5),
    ("C/D", 2.0, 26.0, 2.0), ("C/D", 1.0, 28.5, 2.0), ("C/D", None, 31.5, 2.0),
]
REFERENCE_PRF_HZ = {"A": 25.0, "B": 100.0, "C/D": 100.0}  # CISPR 16-1-1 (from memory)


def _equivalent_level_db(name: str, prf_hz, model: str = "carrier") -> float:
    """Pulse level, relative to the reference PRF, that gives the same QP indication."""
    band = det.BANDS[name]
    # the QP deflection is proportional to the pulse area in this model, so the equivalent
    # level is the difference of the readings for equal areas
    ref = det.quasi_peak(det.impulse_train_envelope(1e-6, REFERENCE_PRF_HZ[name], band), band,
                         SETTLED_DWELL_S, model)
    qp = det.quasi_peak(det.impulse_train_envelope(1e-6, prf_hz, band), band, SETTLED_DWELL_S,
                        model)
    return _db(ref) - _db(qp)


@pytest.mark.parametrize("name, prf_hz, expected_db, tol_db", PULSE_TABLE)
def test_quasi_peak_pulse_response_table(name, prf_hz, expected_db, tol_db):
    assert _equivalent_level_db(name, prf_hz) == pytest.approx(expected_db, abs=tol_db)


def test_qp_deflection_is_linear_in_pulse_area():
    # the detector is homogeneous: doubling every voltage doubles the reading (used above)
    one = det.quasi_peak(det.impulse_train_envelope(1e-6, 20.0, B), B, 2.0)
    two = det.quasi_peak(det.impulse_train_envelope(2e-6, 20.0, B), B, 2.0)
    assert two == pytest.approx(2 * one, rel=1e-9)


@pytest.mark.parametrize("name, prf_hz, expected_db, tol_db", [
    ("B", 1.0, 22.5, 2.0), ("C/D", 1.0, 28.5, 2.0), ("C/D", 2.0, 26.0, 2.0),  # CISPR 16-1-1
])
def test_linear_envelope_detector_misses_low_prf_points(name, prf_hz, expected_db, tol_db):
    # CISPR 16-1-1 QP pulse-response table (from memory), note: the straightforward chain reads
    # the low-PRF equivalent levels 1-4 dB
    # high. The linear envelope detector charges (e - V)/R_c; a real diode fed the carrier
    # conducts only near the crests, so its R_c (from the 63 % definition) is 4x smaller and
    # it charges faster from V << e (isolated and slow pulses). Keep the finding checked.
    assert _equivalent_level_db(name, prf_hz, "envelope") > expected_db + tol_db


# ------------------------------------------------------------------------------- calibration


@pytest.mark.parametrize("name, area_vs, prf_hz", [
    ("A", 13.5e-6, 25.0), ("B", 0.316e-6, 100.0), ("C/D", 0.044e-6, 100.0),  # CISPR 16-1-1
])
def test_calibration_pulse_reads_like_66_dbuv_sine(name, area_vs, prf_hz):
    # CISPR 16-1-1 calibration pulses 13.5 / 0.316 / 0.044 µVs for 66 dBµV (from memory):
    # the calibration pulse gives the QP indication of a 66 dB(uV)
    # sine. Tolerance 1.0 dB: the table's tolerance at the PRFs next to the reference, since
    # the calibration itself is remembered, not confirmed.
    band = det.BANDS[name]
    env = det.impulse_train_envelope(area_vs, prf_hz, band)
    assert _db(det.quasi_peak(env, band, SETTLED_DWELL_S)) == pytest.approx(66.0, abs=1.0)


@pytest.mark.parametrize("name, area_vs, expected_db", [
    ("B", 0.316e-6, 6.6), ("C/D", 0.044e-6, 12.0),  # CISPR 16-1-1 pulses (derived)
])
def test_peak_minus_qp_of_reference_pulse(name, area_vs, expected_db):
    band = det.BANDS[name]
    env = det.impulse_train_envelope(area_vs, 100.0, band)
    # the commonly quoted value is peak minus exactly 66 dB(uV); 0.5 dB allows the model's own
    # calibration offset (test above) and nothing more
    peak_minus_qp = _db(det.peak(env)) - _db(det.quasi_peak(env, band, SETTLED_DWELL_S))
    assert peak_minus_qp == pytest.approx(expected_db, abs=0.5)


# ------------------------------------------------------------------------------- ordering


ORDER_CASES = [
    ("impulse", B, 1000.0, None), ("impulse", B, 10.0, None), ("impulse", B, None, None),
    ("impulse", CD, 100.0, None), ("impulse", CD, 2.0, None), ("impulse", A_BAND, 25.0, None),
    ("burst", B, 217.0, 0.125), ("burst", CD, 1000.0, 0.01), ("burst", CD, 5.0, 0.5),
    ("burst", A_BAND, 50.0, 0.3),
]


@pytest.mark.parametrize("kind, band, prf_hz, duty", ORDER_CASES)
def test_peak_ge_quasi_peak_ge_average(kind, band, prf_hz, duty):
    if kind == "impulse":
        env = det.impulse_train_envelope(1e-6, prf_hz, band)
    else:
        env = det.burst_envelope(1e-3, prf_hz, duty, band)
    pk = det.peak(env)
    qp = det.quasi_peak(env, band, 2.0)
    avg = det.cispr_average(env, band, 2.0)
    rms = det.rms_average(env, band, 2.0)
    # Peak >= QP >= Average for any signal (CISPR 16-1-1 detector definitions; common
    # practice); rms >= mean of |e|
    assert pk >= qp >= avg
    assert rms >= avg


@pytest.mark.parametrize("band, prf_hz, duty", [
    (B, 217.0, 0.125), (B, 1000.0, 0.5), (CD, 100.0, 0.1), (CD, 1000.0, 0.02),
])
def test_burst_average_is_peak_plus_duty_correction(band, prf_hz, duty):
    env = det.burst_envelope(1e-3, prf_hz, duty, band)
    avg_db = _db(det.cispr_average(env, band, 3.0))
    # AVG = peak + 20 log10(duty) for a long averaging time (derived; CISPR 16-1-1 average
    # detector); 0.05 dB
    # covers the meter ripple at the PRF (w0 / 2 pi f <= 0.007) and the Gaussian edges
    assert avg_db == pytest.approx(_db(det.peak(env)) + 20 * math.log10(duty), abs=0.05)


def test_impulse_train_average_is_area_times_prf():
    # integral of 2 A B_imp exp(-pi (B_imp t)^2) over t is 2 A (derived): the mean
    # envelope is 2 A PRF volts peak, sqrt(2) A PRF RMS-equivalent
    area_vs, prf_hz = 0.316e-6, 1000.0
    env = det.impulse_train_envelope(area_vs, prf_hz, B)
    assert det.cispr_average(env, B, 3.0) == pytest.approx(math.sqrt(2) * area_vs * prf_hz,
                                                           rel=2e-4)


def test_rms_average_weighting_is_10_db_per_decade_above_corner():
    # CISPR 16-1-1 average / rms-average detectors (rms corner PRFs from memory):
    # rms-average weighting proportional to PRF^(-1/2) above the corner
    # (confirmed), corner 100 Hz in band C/D (from memory)
    low = det.rms_average(det.impulse_train_envelope(1e-7, 1e3, CD), CD, 2.0)
    high = det.rms_average(det.impulse_train_envelope(1e-7, 1e4, CD), CD, 2.0)
    assert _db(high) - _db(low) == pytest.approx(10.0, abs=0.2)


# ------------------------------------------------------------------------------- offsets API


def test_reading_offsets_match_direct_readings():
    offsets = det.reading_offsets_db(217.0, 0.125, 100e6)
    env = det.burst_envelope(1.0, 217.0, 0.125, CD)
    ref = _db(det.peak(env))
    assert offsets["peak"] == 0.0
    assert offsets["quasi_peak"] == pytest.approx(_db(det.quasi_peak(env, CD, 1.0)) - ref,
                                                  abs=1e-9)
    assert offsets["cispr_average"] == pytest.approx(
        _db(det.cispr_average(env, CD, 1.0)) - ref, abs=1e-9)
    # long averaging gives AVG = peak + 20 log10(duty) (derived; CISPR 16-1-1 average detector)
    assert offsets["cispr_average"] == pytest.approx(20 * math.log10(0.125), abs=0.05)


def test_reading_offsets_cw_are_meter_settling_only():
    offsets = det.reading_offsets_db(None, 1.0, 1e6)
    # 1 s dwell, tau_M = 160 ms: 1 - (1 + 6.25) exp(-6.25) of the settled value (textbook
    # critically damped step response)
    settle_db = 20 * math.log10(1 - (1 + 1 / 0.16) * math.exp(-1 / 0.16))
    assert offsets["cispr_average"] == pytest.approx(settle_db, abs=1e-3)
    assert settle_db - 0.05 < offsets["quasi_peak"] <= 0.0


def test_reading_offsets_returns_a_copy_and_band_e_has_no_quasi_peak():
    first = det.reading_offsets_db(1000.0, 0.5, 2e9)
    first["cispr_average"] = 99.0
    again = det.reading_offsets_db(1000.0, 0.5, 2e9)
    assert again["cispr_average"] == pytest.approx(20 * math.log10(0.5), abs=0.05)  # derived
    assert "quasi_peak" not in again


def test_quasi_peak_is_refused_in_band_e_and_for_unknown_model():
    env = det.cw_envelope(1.0)
    with pytest.raises(AnalysisError, match="no quasi-peak"):
        det.quasi_peak(env, det.BANDS["E"])
    with pytest.raises(AnalysisError, match="diode model"):
        det.quasi_peak(env, B, model="square-law")
