"""Generic SCPI analyzer driver: the exact bytes each setting sends (recording transport).

Expected spellings are the SCPI-1999 (Vol. 2 command reference) and IEEE 488.2 common-command forms.
"""


import numpy as np
import pytest

from bench.drivers.analyzer import Analyzer, SweepSettings, load_analyzer_profile, points_for_step
from bench.errors import ConfigError, InstrumentError, PlanError
from bench.ieee488 import encode_block
from bench.transports import ScriptedTransport


class FakeInstrument:
    """Answers like an instrument would: queries get replies, errors can be queued."""

    def __init__(self, trace=None, big_endian=False):
        self.errors = []
        self.trace = np.asarray(trace if trace is not None else [-50.0, -40.0, -60.0], dtype=np.float32)
        self.big_endian = big_endian

    def __call__(self, cmd):
        if cmd == "*IDN?":
            return "Maker,Model,SN1,1.0"
        if cmd == "SYST:ERR?":
            return self.errors.pop(0) if self.errors else '0,"No error"'
        if cmd == "SWE:TIME?":
            return "0.125"
        if cmd == "INIT:IMM;*OPC?":
            return "1"
        if cmd == "TRAC:DATA? TRACE1":
            return encode_block(self.trace.astype(">f4" if self.big_endian else "<f4").tobytes()) + b"\n"
        return None


@pytest.fixture
def profile():
    return load_analyzer_profile("scpi-analyzer")


def make(profile, **kw):
    inst = FakeInstrument(**kw)
    tr = ScriptedTransport(inst, address="TCPIP::10.0.0.1::5025::SOCKET")
    return Analyzer(tr, profile), tr, inst


def test_constructor_does_no_io(profile):
    _, tr, _ = make(profile)
    assert tr.sent == []


def test_initialize_sequence(profile):
    an, tr, _ = make(profile)
    ident = an.initialize()
    # IEEE 488.2 *CLS, *IDN?; SCPI INIT:CONT OFF, FORM REAL,32, FORM:BORD SWAP (little-endian), UNIT:POW
    assert ident == "Maker,Model,SN1,1.0"
    assert tr.sent == ["*CLS", "*IDN?", "INIT:CONT OFF", "FORM REAL,32", "FORM:BORD SWAP", "UNIT:POW DBM", "SYST:ERR?"]


def test_each_setting_row_sends_exact_bytes(profile):
    an, tr, _ = make(profile)
    s = SweepSettings(start_hz=30e6, stop_hz=1e9, rbw_hz=120e3, vbw_hz=300e3, points=10001,
                      detector="peak", ref_level_dbm=-10.5, attenuation_db=10)
    assert an.configure(s) == pytest.approx(0.125)
    # SCPI-1999 SENSe short forms, values in plain Hz (no suffix multipliers: SCPI 'M' means milli)
    assert tr.sent == [
        "FREQ:STOP 1000000000", "FREQ:STAR 30000000", "BAND 120000", "BAND:VID 300000",
        "SWE:POIN 10001", "DET POS", "DISP:WIND:TRAC:Y:RLEV -10.5", "INP:ATT 10",
        "SYST:ERR?", "SWE:TIME?",
    ]


def test_only_changed_settings_are_sent(profile):
    an, tr, _ = make(profile)
    s = SweepSettings(start_hz=30e6, stop_hz=1e9, rbw_hz=120e3, vbw_hz=300e3, points=10001)
    an.configure(s)
    tr.sent.clear()
    an.configure(SweepSettings(start_hz=30e6, stop_hz=1e9, rbw_hz=120e3, vbw_hz=300e3, points=10001,
                               detector="quasi-peak"))
    assert tr.sent == ["DET QPE", "SYST:ERR?", "SWE:TIME?"]


def test_start_sent_first_when_moving_down(profile):
    an, tr, _ = make(profile)
    an.configure(SweepSettings(start_hz=1e9, stop_hz=2e9, rbw_hz=1e6, vbw_hz=3e6, points=1001))
    tr.sent.clear()
    an.configure(SweepSettings(start_hz=30e6, stop_hz=300e6, rbw_hz=1e6, vbw_hz=3e6, points=1001))
    # new stop (300 MHz) is below the old start (1 GHz): start must move first so start < stop holds
    assert tr.sent[:2] == ["FREQ:STAR 30000000", "FREQ:STOP 300000000"]


def test_instrument_error_carries_code_and_text(profile):
    an, tr, inst = make(profile)
    inst.errors = ['-222,"Data out of range"']
    with pytest.raises(InstrumentError) as info:
        an.configure(SweepSettings(start_hz=30e6, stop_hz=1e9, rbw_hz=120e3, vbw_hz=300e3, points=1001))
    # SCPI-1999 error queue format <code>,"<text>"
    assert info.value.code == -222
    assert info.value.text == "Data out of range"
    assert "TCPIP::10.0.0.1::5025::SOCKET" in str(info.value)


def test_limits_refused_before_sending(profile):
    an, tr, _ = make(profile)
    with pytest.raises(PlanError, match="points"):
        an.configure(SweepSettings(start_hz=30e6, stop_hz=1e9, rbw_hz=120e3, vbw_hz=300e3, points=10))
    with pytest.raises(PlanError, match="frequency"):
        an.configure(SweepSettings(start_hz=30e6, stop_hz=9e9, rbw_hz=120e3, vbw_hz=300e3, points=1001))
    assert tr.sent == []


@pytest.mark.parametrize("big", [False, True])
def test_fetch_decodes_both_byte_orders(profile, big):
    import dataclasses

    prof = dataclasses.replace(profile, trace=dataclasses.replace(profile.trace, big_endian=big))
    ramp = np.linspace(-100, -20, 101, dtype=np.float32)
    an, tr, _ = make(prof, trace=ramp, big_endian=big)
    an.sweep()
    np.testing.assert_array_equal(an.fetch_trace(101), ramp)


def test_wrong_point_count_is_an_error(profile):
    an, _, _ = make(profile, trace=[1.0, 2.0])
    from bench.errors import BlockFormatError

    with pytest.raises(BlockFormatError, match="expected 5 trace points"):
        an.fetch_trace(5)


def test_sweep_time_estimate(profile):
    # ST = k*span/RBW^2 with k = 2.5 (common practice): 30-1000 MHz @ 120 kHz -> 0.168 s
    assert profile.estimate_sweep_time_s(970e6, 120e3) == pytest.approx(0.168, abs=0.001)
    # 0.15-30 MHz @ 9 kHz -> 0.92 s (same formula)
    assert profile.estimate_sweep_time_s(29.85e6, 9e3) == pytest.approx(0.92, abs=0.01)


def test_points_for_step():
    # 30 MHz-1 GHz at 60 kHz (B6/2 for 120 kHz, common CISPR 16 practice): 970e6/60e3 = 16166.7 -> 16168
    assert points_for_step(970e6, 60e3) == 16168
    assert points_for_step(100.0, 10.0) == 11


def test_unknown_profile_is_a_one_line_error():
    with pytest.raises(ConfigError) as info:
        load_analyzer_profile("no-such-profile")
    assert "unknown instrument profile 'no-such-profile'" in str(info.value)
    assert "\n" not in str(info.value)


def test_profile_errors_are_one_line_with_file_line_and_key(tmp_path):
    text = (tmp_path / "p.toml")
    base = load_analyzer_profile("scpi-analyzer").origin  # builtin:scpi-analyzer
    assert base == "builtin:scpi-analyzer"
    from importlib import resources

    original = (resources.files("bench.drivers") / "profiles" / "scpi-analyzer.toml").read_text(encoding="utf-8")
    text.write_text(original.replace("max_points = 40001", "max_points = 40001\nmax_pionts = 3"), encoding="utf-8")
    with pytest.raises(ConfigError) as info:
        load_analyzer_profile(text)
    message = str(info.value)
    assert message.startswith(f"{text}:")
    assert "capabilities.max_pionts" in message and "max_points" in message  # close-match suggestion
    assert "\n" not in message
    with pytest.raises(ConfigError, match='expected kind = "analyzer"'):
        load_analyzer_profile("gcode-cartesian")  # a stage profile named as an analyzer's
