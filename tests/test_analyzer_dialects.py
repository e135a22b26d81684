"""Analyzer dialects as profile data: connect commands, trace formats, completion methods.

Every expectation is the exact command text (and the exact bytes) the driver writes through the
recording transport, for each profile row. Spellings are SCPI-1999 (Vol. 2: SENSe, FORMat,
STATus, INSTrument, DISPlay subsystems) and IEEE 488.2 common commands; FORMat:BORDer NORMal is
big-endian and SWAPped little-endian; the SWEeping bit of the operation status register is bit 3
(value 8) and the OPC bit of the standard event status register bit 0 (value 1) (from memory).
"""

from __future__ import annotations

import re
import tomllib
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bench.drivers.analyzer import Analyzer, SweepSettings, load_analyzer_profile
from bench.errors import (
    BlockFormatError,
    ConfigError,
    InstrumentError,
    ProfileMismatchError,
    ReplyFormatError,
    ReplyTimeoutError,
    TransportError,
)
from bench.ieee488 import encode_block
from bench.transports import ScriptedTransport

MALFORMED = Path(__file__).parent / "malformed"
EXPECTED = tomllib.loads((MALFORMED / "expected.toml").read_text(encoding="utf-8"))
PROFILE_CASES = sorted(name for name in EXPECTED if name.startswith("analyzer-"))
RAMP = np.arange(-100.0, -49.5, 0.5)  # 101 levels, dBm, exact in every format used here


def _builtin_text(name: str) -> str:
    return (resources.files("bench.drivers") / "profiles" / f"{name}.toml").read_text(encoding="utf-8")


def _variant(tmp_path: Path, *changes: tuple[str, str], base: str = "scpi-analyzer") -> Path:
    """A copy of a built-in profile with text replaced (each change must apply)."""
    text = _builtin_text(base)
    for old, new in changes:
        assert old in text, old
        text = text.replace(old, new, 1)
    path = tmp_path / "variant.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _completion(tmp_path: Path, table: str) -> Path:
    text = _builtin_text("scpi-analyzer")
    return _variant(tmp_path, (text[text.index("[completion]"):], table))


def block(values, dtype: str) -> bytes:
    """An IEEE 488.2 definite block (§8.7.9) of ``values`` as ``dtype``, then the terminator."""
    return encode_block(np.asarray(values).astype(dtype).tobytes()) + b"\n"


class Instrument:
    """Answers the spellings of a profile; the trace reply and the status polls are given."""

    def __init__(self, profile, trace_reply: bytes = b"", status=("0",), sweep_time: str = "0.125"):
        self.profile = profile
        self.trace_reply = trace_reply
        self.status = list(status)
        self.sweep_time = sweep_time

    def __call__(self, cmd: str):
        p = self.profile
        replies = {p.commands["identify"]: "Maker,Model,SN1,1.0", p.commands["error_query"]: '0,"No error"',
                   p.commands["sweep_time_query"]: self.sweep_time, p.trace.fetch: self.trace_reply}
        if p.completion.method == "opc-query":
            replies[p.completion.start] = "1"
        if cmd == p.completion.poll:
            return self.status.pop(0) if len(self.status) > 1 else self.status[0]
        return replies.get(cmd)


def rig(profile, **kw):
    sleeps: list[float] = []
    inst = Instrument(profile, **kw)
    transport = ScriptedTransport(inst, address="TCPIP::192.0.2.10::5025::SOCKET")
    return Analyzer(transport, profile, sleep=sleeps.append), transport, sleeps


SETTINGS = SweepSettings(start_hz=30e6, stop_hz=1e9, rbw_hz=120e3, vbw_hz=300e3, points=101,
                         detector="quasi-peak", ref_level_dbm=-10.5, attenuation_db=10, sweep_time_s=0.5)


# ------------------------------------------------------------------ the second built-in dialect


def test_polled_profile_initializes_with_its_connect_commands_in_order():
    an, tr, _ = rig(load_analyzer_profile("scpi-analyzer-polled"))
    an.initialize()
    expected = ["*CLS", "*IDN?", "INSTrument:SELect SANalyzer", "DISPlay:ENABle OFF", "STATus:PRESet",
                "INITiate:CONTinuous OFF", "FORMat:DATA REAL,64", "FORMat:BORDer NORMal", "UNIT:POWer DBM",
                "SYSTem:ERRor:NEXT?"]
    assert tr.sent == expected
    assert bytes(tr.wire.written) == "".join(f"{c}\n" for c in expected).encode("ascii")


@pytest.mark.parametrize(("name", "expected"), [
    ("scpi-analyzer", ["FREQ:STOP 1000000000", "FREQ:STAR 30000000", "BAND 120000", "BAND:VID 300000",
                       "SWE:POIN 101", "DET QPE", "DISP:WIND:TRAC:Y:RLEV -10.5", "INP:ATT 10", "SWE:TIME 0.5",
                       "SYST:ERR?", "SWE:TIME?"]),
    ("scpi-analyzer-polled", [
        "SENSe:FREQuency:STOP 1000000000", "SENSe:FREQuency:STARt 30000000", "SENSe:BWIDth:RESolution 120000",
        "SENSe:BWIDth:VIDeo 300000", "SENSe:SWEep:POINts 101", "SENSe:DETector:FUNCtion QPEak",
        "DISPlay:WINDow1:TRACe1:Y:SCALe:RLEVel -10.5", "SENSe:POWer:RF:ATTenuation 10", "SENSe:SWEep:TIME 0.5",
        "SYSTem:ERRor:NEXT?", "SENSe:SWEep:TIME?"]),
])
def test_every_setting_row_of_both_profiles_sends_its_exact_bytes(name, expected):
    an, tr, _ = rig(load_analyzer_profile(name))
    an.configure(SETTINGS)
    assert tr.sent == expected
    assert bytes(tr.wire.written) == "".join(f"{c}\n" for c in expected).encode("ascii")


@pytest.mark.parametrize(("detector", "short", "long"), [
    ("negative", "NEG", "NEGative"), ("sample", "SAMP", "SAMPle"), ("average", "AVER", "AVERage"),
    ("rms", "RMS", "RMS"), ("quasi-peak", "QPE", "QPEak"), ("cispr-average", "CAV", "CAVerage"),
])
def test_every_detector_row_of_both_profiles(detector, short, long):
    for name, header, spelling, tail in (("scpi-analyzer", "DET", short, ["SYST:ERR?", "SWE:TIME?"]),
                                         ("scpi-analyzer-polled", "SENSe:DETector:FUNCtion", long,
                                          ["SYSTem:ERRor:NEXT?", "SENSe:SWEep:TIME?"])):
        an, tr, _ = rig(load_analyzer_profile(name))
        an.configure(SweepSettings(30e6, 1e9, 120e3, 300e3, 101))  # peak first
        assert tr.sent[5] == f"{header} {'POS' if name == 'scpi-analyzer' else 'POSitive'}"
        tr.sent.clear()
        an.configure(SweepSettings(30e6, 1e9, 120e3, 300e3, 101, detector=detector))
        assert tr.sent == [f"{header} {spelling}", *tail]


def test_polled_profile_sweeps_by_polling_the_sweeping_bit_and_reads_real64_big_endian():
    profile = load_analyzer_profile("scpi-analyzer-polled")
    an, tr, sleeps = rig(profile, trace_reply=block(RAMP, ">f8"), status=("8", "8", "0"))
    an.configure(SweepSettings(30e6, 1e9, 120e3, 300e3, 101))
    tr.sent.clear()
    an.sweep()
    trace = an.fetch_trace(101)
    assert tr.sent == ["INITiate:IMMediate"] + ["STATus:OPERation:CONDition?"] * 3 + [
        "SYSTem:ERRor:NEXT?", "TRACe:DATA? TRACE1"]
    assert sleeps == [0.05, 0.05]  # poll_interval between polls, none after the last
    assert trace.dtype == np.dtype("<f4")
    np.testing.assert_array_equal(trace, RAMP.astype("<f4"))


def test_a_sweep_that_never_ends_is_a_timeout_counted_in_polls():
    an, _, sleeps = rig(load_analyzer_profile("scpi-analyzer-polled"), status=("8",))
    an.configure(SweepSettings(30e6, 1e9, 120e3, 300e3, 101))  # sweep time 0.125 s
    # deadline 2 x 0.125 s + 10 s = 10.25 s = 205 intervals of 50 ms: 206 polls
    with pytest.raises(ReplyTimeoutError, match=r"sweep not done after 206 polls of "
                                                r"'STATus:OPERation:CONDition\?' every 0.05 s \(10.25 s\)"):
        an.sweep()
    assert len(sleeps) == 205


# ------------------------------------------------------------------ completion methods


def test_opc_query_waits_in_one_reply_with_a_deadline_from_the_sweep_time(tmp_path):
    profile = load_analyzer_profile("scpi-analyzer")
    an, tr, sleeps = rig(profile)
    an.configure(SweepSettings(30e6, 1e9, 120e3, 300e3, 101))
    tr.sent.clear()
    an.sweep()
    assert tr.sent == ["INIT:IMM;*OPC?", "SYST:ERR?"] and sleeps == []
    assert profile.completion.deadline_s(0.125, profile.io.timeout_s) == pytest.approx(10.25)


def test_opc_query_with_another_answer_is_an_instrument_error(tmp_path):
    an, _, _ = rig(load_analyzer_profile(_completion(tmp_path, '[completion]\nmethod = "opc-query"\n'
                                                               'start = "INIT:IMM;*OPC?"\nreply = "+1"\n')))
    with pytest.raises(InstrumentError, match=r"expected '\+1' when the sweep is done, found '1'"):
        an.sweep()


def test_opc_then_event_status_polling(tmp_path):
    profile = load_analyzer_profile(_completion(tmp_path, (
        '[completion]\nmethod = "status-poll"\nstart = "INIT:IMM;*OPC"\npoll = "*ESR?"\nmask = 1\n'
        'done_when = "set"\npoll_interval = "20 ms"\n')))
    an, tr, sleeps = rig(profile, status=("0", "32", "33"))  # 32: a command error bit, not OPC
    an.sweep()
    assert tr.sent == ["INIT:IMM;*OPC", "*ESR?", "*ESR?", "*ESR?", "SYST:ERR?"]
    assert sleeps == [0.02, 0.02]


def test_fixed_wait_waits_the_sweep_time_times_a_factor_plus_a_margin(tmp_path):
    profile = load_analyzer_profile(_completion(tmp_path, (
        '[completion]\nmethod = "fixed-wait"\nstart = "INIT:IMM"\nwait_factor = 1.5\nwait_margin = "100 ms"\n')))
    an, tr, sleeps = rig(profile)
    an.configure(SweepSettings(30e6, 1e9, 120e3, 300e3, 101))  # sweep time 0.125 s
    tr.sent.clear()
    an.sweep()
    assert tr.sent == ["INIT:IMM", "SYST:ERR?"]
    assert sleeps == [pytest.approx(1.5 * 0.125 + 0.1)]


def test_a_status_that_is_not_an_integer_is_an_instrument_error():
    an, _, _ = rig(load_analyzer_profile("scpi-analyzer-polled"), status=("SWEEPING",))
    with pytest.raises(InstrumentError, match=r"expected an integer status, found 'SWEEPING'"):
        an.sweep()


# ------------------------------------------------------------------ trace formats


@pytest.mark.parametrize("order", ["little", "big"])
@pytest.mark.parametrize(("kind", "format_command", "encode"), [
    ("real32", "FORM REAL,32", lambda v, o: block(v, o + "f4")),
    ("real64", "FORM REAL,64", lambda v, o: block(v, o + "f8")),
    ("int32", "FORM INT,32", lambda v, o: block(np.round(v * 1000), o + "i4")),  # scale = 0.001 dB
    ("ascii", "FORM ASC", lambda v, o: ",".join(f"{x:.8g}" for x in v).encode() + b"\n"),
])
def test_every_trace_format_and_byte_order(tmp_path, kind, format_command, encode, order):
    profile = load_analyzer_profile(_variant(tmp_path, ('use = "real32"', f'use = "{kind}"'),
                                             ('byte_order = "little"', f'byte_order = "{order}"')))
    an, tr, _ = rig(profile, trace_reply=encode(RAMP, ">" if order == "big" else "<"))
    an.initialize()
    order_command = [] if kind == "ascii" else ["FORM:BORD NORM" if order == "big" else "FORM:BORD SWAP"]
    assert tr.sent[2:] == ["INIT:CONT OFF", format_command, *order_command, "UNIT:POW DBM", "SYST:ERR?"]
    np.testing.assert_allclose(an.fetch_trace(101), RAMP, atol=1e-6)


def test_a_fixed_byte_order_sends_no_order_command(tmp_path):
    profile = load_analyzer_profile(_variant(tmp_path, ('byte_order_little = "FORM:BORD SWAP"\n', "")))
    an, tr, _ = rig(profile, trace_reply=block(RAMP, "<f4"))
    an.initialize()
    assert tr.sent[2:] == ["INIT:CONT OFF", "FORM REAL,32", "UNIT:POW DBM", "SYST:ERR?"]
    np.testing.assert_array_equal(an.fetch_trace(101), RAMP.astype("<f4"))


# ------------------------------------------------------------------ a profile the instrument contradicts


def _line_of(profile_name: str, key: str) -> int:
    text = _builtin_text(profile_name)
    section, _, name = key.rpartition(".")
    start = text.index(f"[{section}]")
    return text[:start].count("\n") + 1 + next(
        i for i, line in enumerate(text[start:].splitlines()) if re.match(rf"{name}\s*=", line))


@pytest.mark.parametrize(("profile_name", "reply", "key", "fragment"), [
    ("scpi-analyzer", block(RAMP, "<f8"), "trace.use",
     r"sent 808 bytes for 101 points of 'TRAC:DATA\? TRACE1': 8 bytes per point, but trace.use = 'real32' "
     r"has 4-byte values"),
    ("scpi-analyzer", block(RAMP, ">f4"), "trace.byte_order",
     r"sends big-endian real32 values: read little-endian the trace holds impossible levels"),
    ("scpi-analyzer", b"-100,-99.5\n", "trace.use",
     r"answered 'TRAC:DATA\? TRACE1' with text b'-100,-99.5'; trace.use = 'real32' expects an IEEE 488.2 block"),
    ("scpi-analyzer-polled", block(RAMP, ">f4"), "trace.use",
     r"sent 404 bytes for 101 points of 'TRACe:DATA\? TRACE1': 4 bytes per point, but trace.use = 'real64'"),
    ("scpi-analyzer-polled", block(RAMP, "<f8"), "trace.byte_order",
     r"sends little-endian real64 values: read big-endian"),
])
def test_a_trace_that_contradicts_the_profile_names_the_key_to_change(profile_name, reply, key, fragment):
    an, _, _ = rig(load_analyzer_profile(profile_name), trace_reply=reply)
    with pytest.raises(ProfileMismatchError, match=fragment) as info:
        an.fetch_trace(101)
    error = info.value
    message = str(error)
    assert message.startswith(f"builtin:{profile_name}:{_line_of(profile_name, key)}: {key}: "
                              "TCPIP::192.0.2.10::5025::SOCKET ")
    assert "\n" not in message
    # a profile error, not a wire fault: the run engine does not retry it, and it exits with 2
    assert isinstance(error, ConfigError) and not isinstance(error, TransportError)
    assert error.exit_code == 2


def test_a_block_where_ascii_was_declared_names_trace_use(tmp_path):
    profile = load_analyzer_profile(_variant(tmp_path, ('use = "real32"', 'use = "ascii"')))
    an, _, _ = rig(profile, trace_reply=block(RAMP, "<f4"))
    with pytest.raises(ProfileMismatchError, match=r"variant.toml:\d+: trace.use: .* with an IEEE 488.2 block of "
                                                   r"404 bytes; trace.use = 'ascii' expects comma-separated numbers"):
        an.fetch_trace(101)


def test_a_block_of_odd_size_names_the_address_and_the_query():
    an, _, _ = rig(load_analyzer_profile("scpi-analyzer"), trace_reply=encode_block(b"\x00" * 403) + b"\n")
    with pytest.raises(BlockFormatError, match=r"^TCPIP::192.0.2.10::5025::SOCKET: reply to 'TRAC:DATA\? TRACE1': "
                                               r"real32 block of 403 bytes is not a multiple of 4$"):
        an.fetch_trace(101)


def test_ascii_that_is_not_numbers_is_a_reply_format_error(tmp_path):
    profile = load_analyzer_profile(_variant(tmp_path, ('use = "real32"', 'use = "ascii"')))
    an, _, _ = rig(profile, trace_reply=b"-50.5,OVER,-49\n")
    with pytest.raises(ReplyFormatError, match=r"expected numbers separated by ',', found 'OVER'"):
        an.fetch_trace(3)


def test_garbage_that_no_byte_order_explains_is_a_block_format_error():
    an, _, _ = rig(load_analyzer_profile("scpi-analyzer"), trace_reply=block([np.nan] * 101, "<f4"))
    with pytest.raises(BlockFormatError, match="non-finite or impossible levels"):
        an.fetch_trace(101)


def test_a_finite_but_absurd_level_is_a_measurement_fault_not_data():
    # 3e38 dBm fits a float32 but is no level at all
    an, _, _ = rig(load_analyzer_profile("scpi-analyzer"), trace_reply=block([-80.0] * 100 + [3e38], "<f4"))
    with pytest.raises(BlockFormatError, match="non-finite or impossible levels"):
        an.fetch_trace(101)
    # +200 dBm is a number, but the profile's input is destroyed above +30 dBm (typical analyzer
    # input rating, common practice): anything over +50 dBm is a fault, never data
    an, _, _ = rig(load_analyzer_profile("scpi-analyzer"), trace_reply=block([-80.0] * 100 + [200.0], "<f4"))
    with pytest.raises(BlockFormatError, match=r"trace holds 200 dBm, outside what this input can read "
                                               r"\(-250 dBm to 50 dBm"):
        an.fetch_trace(101)
    an, _, _ = rig(load_analyzer_profile("scpi-analyzer"), trace_reply=block([-300.0] * 101, "<f4"))
    with pytest.raises(BlockFormatError, match="-300 dBm, outside what this input can read"):
        an.fetch_trace(101)


# ------------------------------------------------------------------ profile files


def test_every_builtin_analyzer_profile_loads_and_differs_in_each_dialect_table():
    base, polled = load_analyzer_profile("scpi-analyzer"), load_analyzer_profile("scpi-analyzer-polled")
    assert base.connect_commands == () and polled.connect_commands != ()
    assert (base.trace.kind, base.trace.big_endian) != (polled.trace.kind, polled.trace.big_endian)
    assert base.completion.method != polled.completion.method


@pytest.mark.parametrize("name", PROFILE_CASES)
def test_malformed_analyzer_profile_gives_exactly_its_line(name, monkeypatch):
    monkeypatch.chdir(MALFORMED)  # messages name the file as given: the bare file name
    with pytest.raises(ConfigError) as info:
        load_analyzer_profile(name)
    assert str(info.value) == EXPECTED[name]
    assert "\n" not in str(info.value) and "pydantic" not in str(info.value)


@settings(max_examples=60, deadline=None)
@given(levels=st.lists(st.floats(min_value=-200.0, max_value=30.0), min_size=101, max_size=101),
       kind=st.sampled_from(["real32", "real64", "int32", "ascii"]), big=st.booleans())
def test_any_trace_survives_its_format(tmp_path_factory, levels, kind, big):
    tmp_path = tmp_path_factory.mktemp("profile")
    profile = load_analyzer_profile(_variant(tmp_path, ('use = "real32"', f'use = "{kind}"'),
                                             ('byte_order = "little"', f'byte_order = "{"big" if big else "little"}"')))
    order = ">" if big else "<"
    values = np.round(np.asarray(levels), 3)  # int32 counts 0.001 dB
    reply = {"real32": lambda: block(values, order + "f4"), "real64": lambda: block(values, order + "f8"),
             "int32": lambda: block(np.round(values * 1000), order + "i4"),
             "ascii": lambda: ",".join(repr(float(v)) for v in values).encode() + b"\n"}[kind]()
    an, _, _ = rig(profile, trace_reply=reply)
    # stored as float32: equal to the float32 rounding of the level (IEEE 754 binary32)
    np.testing.assert_allclose(an.fetch_trace(101), values.astype("<f4"), rtol=0, atol=1e-4)
