"""Physics of the simulated analyzer's receiver model, against published and derived values."""

from __future__ import annotations

import math
import sys
import types

import numpy as np
import pytest
from scipy.integrate import trapezoid

from bench.sim import receiver
from bench.sim.clock import VirtualClock
from bench.sim.receiver import ReceiverSettings, sweep, synthesize_trace
from bench.sim.state import Line, SimState

KT_DBM_PER_HZ = -173.98  # kT at 290 K: derived from Boltzmann's constant (docs/physics.md)


def _power_mean_db(level_dbm: np.ndarray) -> float:
    """Average in power (the unbiased estimate of a noise floor), dB."""
    return float(10.0 * np.log10(np.mean(10.0 ** (level_dbm / 10.0))))


def _rng(seed: int = 7) -> np.random.Generator:
    return np.random.default_rng(seed)


def _noise_only(rbw_hz: float, detector: str = "RMS", att_db: float = 10.0,
                points: int = 40001, sweep_time_s: float | None = None) -> np.ndarray:
    settings = ReceiverSettings(start_hz=100e6, stop_hz=200e6, points=points, rbw_hz=rbw_hz,
                                detector=detector, attenuation_db=att_db, noise_figure_db=24.0,
                                sweep_time_s=sweep_time_s)
    return synthesize_trace([], settings, _rng())


# ---------------------------------------------------------------- noise floor


def test_noise_floor_matches_kTB_plus_nf_in_the_gaussian_noise_bandwidth():
    # ENBW of the CISPR 120 kHz filter = 90.33 kHz: Gaussian RBW filter, derived.
    # Floor = kT + NF + 10 log10(ENBW) + attenuation: DANL derived
    # (docs/physics.md); kT = -173.98 dBm/Hz from Boltzmann's constant.
    expected_dbm = KT_DBM_PER_HZ + 24.0 + 10.0 * math.log10(90.33e3) + 10.0
    measured_dbm = _power_mean_db(_noise_only(120e3))
    assert measured_dbm == pytest.approx(expected_dbm, abs=0.1)


@pytest.mark.parametrize("rbw_hz, enbw_hz", [(200.0, 150.5), (9e3, 6.774e3), (120e3, 90.33e3)])
def test_enbw_matches_the_cispr_bandwidth_table(rbw_hz, enbw_hz):
    # Gaussian RBW filter, derived (docs/physics.md): B6 -> ENBW for the three CISPR bandwidths
    assert receiver.enbw_hz(rbw_hz) == pytest.approx(enbw_hz, rel=1e-3)


def test_noise_floor_rises_10_db_per_decade_of_rbw():
    # DANL = -174 + NF + 10 log10(RBW): 10 dB per decade (derived)
    floors = [_power_mean_db(_noise_only(rbw)) for rbw in (1e3, 10e3, 100e3, 1e6)]
    assert np.diff(floors) == pytest.approx([10.0, 10.0, 10.0], abs=0.1)


def test_attenuation_raises_the_floor_db_for_db_while_a_cw_line_stays():
    # attenuator before the mixer: floor rises dB for dB, display corrected (common practice)
    line = Line(freq_hz=150e6, level_dbm=-30.0)
    floors, readings = [], []
    for att_db in (0.0, 10.0, 20.0, 30.0):
        settings = ReceiverSettings(100e6, 200e6, 20001, 100e3, detector="RMS",
                                    attenuation_db=att_db)
        trace = synthesize_trace([line], settings, _rng())
        freq_hz = receiver.frequency_axis_hz(settings)
        readings.append(trace[np.argmin(abs(freq_hz - 150e6))])
        floors.append(_power_mean_db(trace[abs(freq_hz - 150e6) > 2e6]))
    assert np.diff(floors) == pytest.approx([10.0, 10.0, 10.0], abs=0.15)
    assert readings == pytest.approx([-30.0] * 4, abs=0.05)


def test_log_average_of_noise_reads_2_51_db_below_rms():
    # log-average = RMS - 2.51 dB on a Rayleigh envelope (derived)
    rms_dbm = _power_mean_db(_noise_only(100e3, "RMS"))
    log_avg_dbm = float(np.mean(_noise_only(100e3, "AVER")))
    assert rms_dbm - log_avg_dbm == pytest.approx(2.51, abs=0.1)


def test_cispr_average_of_noise_reads_1_05_db_below_rms():
    # linear envelope average = RMS - 1.05 dB on a Rayleigh envelope (derived)
    settings = ReceiverSettings(100e6, 200e6, 40001, 100e3, detector="CAV")
    cav = synthesize_trace([], settings, _rng())
    assert receiver.samples_per_bucket(settings) == 1  # one envelope sample per point
    envelope_mean_db = 20.0 * np.log10(np.mean(10.0 ** (cav / 20.0)))  # average the amplitude
    assert receiver.noise_floor_dbm(settings) - envelope_mean_db == pytest.approx(1.05, abs=0.1)


def test_peak_detector_on_noise_follows_order_statistics_of_the_envelope():
    # Slow sweep: 32 independent envelope samples per point. The power of a Rayleigh envelope is
    # exponential, and the mean of the maximum of n exponentials is the harmonic number H_n times
    # the mean (order statistics of the exponential distribution, textbook result).
    settings = ReceiverSettings(100e6, 200e6, 20001, 100e3, detector="POS", sweep_time_s=10.0)
    assert receiver.samples_per_bucket(settings) == 32  # dwell 0.5 ms x 100 kHz, capped
    trace = synthesize_trace([], settings, _rng())
    harmonic_32 = sum(1.0 / k for k in range(1, 33))
    rms_mw = 10.0 ** (receiver.noise_floor_dbm(settings) / 10.0)
    assert np.mean(10.0 ** (trace / 10.0)) / rms_mw == pytest.approx(harmonic_32, rel=0.02)
    # peak above RMS, negative peak below (detector ordering; common practice)
    neg = synthesize_trace([], ReceiverSettings(100e6, 200e6, 20001, 100e3, detector="NEG",
                                                sweep_time_s=10.0), _rng())
    assert _power_mean_db(neg) < receiver.noise_floor_dbm(settings) < float(np.mean(trace))


# ---------------------------------------------------------------- CW lines and the RBW filter


@pytest.mark.parametrize("detector", ["POS", "NEG", "SAMP", "AVER", "RMS", "QPE", "CAV"])
@pytest.mark.parametrize("rbw_hz", [10e3, 100e3, 1e6])
def test_cw_line_reads_its_level_whatever_the_rbw_and_detector(rbw_hz, detector):
    # a CW sine reads the same with every detector and averaging type (CISPR 16-1-1
    # detector definitions; common practice);
    # the displayed level of a line centred on a bin does not depend on the RBW (Gaussian
    # RBW filter at df = 0)
    settings = ReceiverSettings(140e6, 160e6, 2001, rbw_hz, detector=detector)
    trace = synthesize_trace([Line(150e6, -30.0)], settings, _rng())
    assert trace[1000] == pytest.approx(-30.0, abs=0.2)


@pytest.mark.parametrize("step_fraction, worst_db", [(1 / 2, 1.50), (1 / 3, 0.67), (1 / 4, 0.38)])
def test_scalloping_worst_case_for_a_step_of_a_fraction_of_b6(step_fraction, worst_db):
    # Gaussian RBW filter, derived (docs/physics.md): worst-case error 1.50 / 0.67 / 0.38 dB for
    # step B6/2, B6/3, B6/4
    rbw_hz = 120e3
    step_hz = rbw_hz * step_fraction
    settings = ReceiverSettings(100e6, 100e6 + 1000 * step_hz, 1001, rbw_hz, detector="SAMP")
    line_hz = 100e6 + 500.5 * step_hz  # half-way between two trace points
    trace = synthesize_trace([Line(line_hz, -20.0)], settings, _rng())
    assert -20.0 - trace.max() == pytest.approx(worst_db, abs=0.02)


def test_line_half_the_6db_bandwidth_off_a_point_reads_6_db_down():
    # definition of the 6 dB bandwidth B6 (CISPR 16-1-1; Gaussian RBW filter,
    # derived): -6.02 dB (half amplitude)
    settings = ReceiverSettings(99e6, 101e6, 201, 100e3, detector="SAMP")  # 10 kHz step
    trace = synthesize_trace([Line(100e6 + 50e3, -20.0)], settings, _rng())
    assert trace[100] == pytest.approx(-20.0 - 20.0 * math.log10(2.0), abs=0.01)


def test_integrated_filter_response_equals_the_noise_bandwidth():
    # ENBW = integral of the power response: 90.33 kHz for B6 = 120 kHz (derived)
    settings = ReceiverSettings(99e6, 101e6, 4001, 120e3, detector="SAMP")
    trace = synthesize_trace([Line(100e6, -20.0)], settings, _rng())
    gain = 10.0 ** ((trace + 20.0) / 10.0)
    assert trapezoid(gain, receiver.frequency_axis_hz(settings)) == pytest.approx(90.33e3, rel=2e-3)


def test_lines_far_outside_the_span_do_not_show():
    settings = ReceiverSettings(100e6, 110e6, 1001, 100e3, detector="RMS")
    quiet = synthesize_trace([], settings, _rng())
    with_far_line = synthesize_trace([Line(150e6, -30.0)], settings, _rng())
    np.testing.assert_array_equal(quiet, with_far_line)


# ---------------------------------------------------------------- sweep time, determinism


@pytest.mark.parametrize("start_hz, stop_hz, rbw_hz, expected_s", [
    (30e6, 1e9, 120e3, 0.168),   # k span/RBW^2, k = 2.5 (Witte; Engelson)
    (1e9, 2e9, 1e6, 2.5e-3),
])
def test_sweep_time_examples(start_hz, stop_hz, rbw_hz, expected_s):
    settings = ReceiverSettings(start_hz, stop_hz, 1001, rbw_hz)
    assert receiver.sweep_time_s(settings) == pytest.approx(expected_s, rel=0.01)


def test_sweep_time_with_vbw_below_rbw_and_the_floor():
    # ST = k span/(RBW VBW) when VBW < RBW (Witte; Engelson; from memory)
    settings = ReceiverSettings(30e6, 1e9, 1001, 120e3, vbw_hz=12e3)
    assert receiver.sweep_time_s(settings) == pytest.approx(2.5 * 970e6 / (120e3 * 12e3))
    narrow = ReceiverSettings(100e6, 100.1e6, 101, 1e6)
    assert receiver.sweep_time_s(narrow, min_s=1e-3) == 1e-3


def test_same_seed_same_trace_and_other_seed_other_trace():
    settings = ReceiverSettings(100e6, 200e6, 1001, 100e3)
    lines = [Line(150e6, -50.0), Line(170e6, -60.0, prf_hz=100.0, duty=0.1)]
    first = synthesize_trace(lines, settings, np.random.default_rng(3))
    again = synthesize_trace(lines, settings, np.random.default_rng(3))
    other = synthesize_trace(lines, settings, np.random.default_rng(4))
    np.testing.assert_array_equal(first, again)
    assert not np.array_equal(first, other)
    assert first.dtype == np.float64 and first.shape == (1001,)


# ---------------------------------------------------------------- mixer overload


def _reading(level_dbm: float, att_db: float) -> tuple[float, bool]:
    settings = ReceiverSettings(100e6, 200e6, 1001, 100e3, detector="POS", attenuation_db=att_db)
    result = sweep([Line(150e6, level_dbm)], settings, _rng())
    return float(result.level_dbm[500]), result.overloaded


def test_overload_check_10_db_more_attenuation_changes_reading():
    # overload check: a 10 dB attenuation step must change the corrected reading by < 1 dB,
    # more means compression (common practice)
    strong_0, flag_0 = _reading(0.0, 0.0)
    strong_10, _ = _reading(0.0, 10.0)
    weak_10, flag_weak = _reading(-40.0, 10.0)
    weak_20, _ = _reading(-40.0, 20.0)
    assert flag_0 and not flag_weak
    assert abs(strong_10 - strong_0) > 1.0
    assert abs(weak_20 - weak_10) < 1.0


def test_compression_is_1_db_at_the_1db_point():
    # definition of the 1 dB compression point
    assert receiver.compression_db(receiver.MIXER_1DB_COMPRESSION_DBM) == pytest.approx(-1.0)
    assert receiver.compression_db(receiver.MIXER_1DB_COMPRESSION_DBM - 20.0) > -0.001


# ---------------------------------------------------------------- burst-modulated lines


def _zero_span(detector: str, line: Line, sweep_time_s: float, points: int = 4001) -> np.ndarray:
    settings = ReceiverSettings(line.freq_hz, line.freq_hz, points, 120e3, detector=detector,
                                sweep_time_s=sweep_time_s)
    return synthesize_trace([line], settings, _rng())


def test_burst_line_long_dwell_peak_and_average():
    line = Line(200e6, -40.0, prf_hz=1e3, duty=0.1)
    slow_s = 4001 * 2e-3  # dwell 2 ms per point covers two burst periods
    # peak holds the on level; linear average reads level + 20 log10(duty)
    # (derived; CISPR 16-1-1 average detector)
    assert np.median(_zero_span("POS", line, slow_s)) == pytest.approx(-40.0, abs=0.2)
    assert np.median(_zero_span("AVER", line, slow_s)) == pytest.approx(-60.0, abs=0.3)
    # power average: on level + 10 log10(duty) (derived: mean power of an on/off carrier)
    assert np.median(_zero_span("RMS", line, slow_s)) == pytest.approx(-50.0, abs=0.3)


def test_burst_line_short_dwell_peak_catches_a_burst_with_geometric_probability():
    # dwell 0.1 ms, period 1 ms, duty 0.1: a window at random phase overlaps an on-interval with
    # probability duty + dwell*PRF = 0.2 (derived: geometric probability over one period)
    line = Line(200e6, -40.0, prf_hz=1e3, duty=0.1)
    trace = _zero_span("POS", line, sweep_time_s=4001 * 1e-4)
    fraction_on = float(np.mean(trace > -50.0))
    assert fraction_on == pytest.approx(0.2, abs=0.02)


def test_quasi_peak_and_cispr_average_use_the_detector_model(monkeypatch):
    # the receiver applies bench.sim.detectors.reading_offsets_db to burst lines only
    calls = []

    def offsets(prf_hz, duty, freq_hz):
        calls.append((prf_hz, duty, freq_hz))
        return {"peak": 0.0, "quasi_peak": -7.0, "cispr_average": -20.0}

    monkeypatch.setitem(sys.modules, "bench.sim.detectors",
                        types.SimpleNamespace(reading_offsets_db=offsets))
    lines = [Line(150e6, -40.0, prf_hz=100.0, duty=0.1), Line(170e6, -40.0)]
    for detector, expected in (("QPE", -47.0), ("CAV", -60.0)):
        settings = ReceiverSettings(140e6, 180e6, 401, 120e3, detector=detector)
        trace = synthesize_trace(lines, settings, _rng())
        assert trace[100] == pytest.approx(expected, abs=0.2)
        assert trace[300] == pytest.approx(-40.0, abs=0.2)  # CW: every detector alike
    assert calls[0] == (100.0, 0.1, 150e6)


def test_detector_ordering_for_a_burst_line_with_the_real_detector_model():
    # Peak >= QP >= Average for any signal (CISPR 16-1-1 detector definitions;
    # common practice)
    pytest.importorskip("bench.sim.detectors", reason="detector model not installed")
    line = Line(150e6, -40.0, prf_hz=100.0, duty=0.05)
    readings = {}
    for detector in ("POS", "QPE", "CAV"):
        settings = ReceiverSettings(149e6, 151e6, 201, 120e3, detector=detector,
                                    sweep_time_s=1.0)
        readings[detector] = float(synthesize_trace([line], settings, _rng())[100])
    assert readings["POS"] >= readings["QPE"] >= readings["CAV"]
    assert readings["POS"] - readings["CAV"] > 6.0  # a 5 % duty burst averages well below peak


# ---------------------------------------------------------------- clock


def test_virtual_clock_accelerated_and_realtime():
    state = SimState()
    slept = []
    fast = VirtualClock(state=state)
    assert fast.advance(2.5) == 2.5 and state.virtual_time_s == 2.5
    slow = VirtualClock(realtime=True, state=state, sleep=slept.append)
    slow.advance(0.25)
    assert fast.now_s() == pytest.approx(2.75) and slept == [0.25]
    with pytest.raises(ValueError):
        fast.advance(-1.0)
