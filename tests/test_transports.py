"""Transports in layers: the scheme registry, the framing over a scripted byte wire (exact bytes),
and one contract run against every wire the simulated analyzer can be reached by.

Block framing follows IEEE 488.2 §8.7.9 (definite length: '#', one digit n, n length digits, the
data) and §8.7.10 (indefinite '#0'); SCPI-1999 Vol. 2 FORMat:BORDer NORMal is big-endian.
"""

from __future__ import annotations

import struct

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bench.errors import BlockFormatError, ReplyFormatError, ReplyTimeoutError, TransportError
from bench.framing import MessageTransport
from bench.ieee488 import encode_block
from bench.sim.clock import VirtualClock
from bench.sim.scpi import Faults, ScpiServer, SimAnalyzer
from bench.sim.scpiserver import serve_scpi_pty
from bench.sim.state import Line, SimState
from bench.transports import (
    SCHEMES,
    Scheme,
    ScriptedTransport,
    TransportSettings,
    describe_transports,
    find_scheme,
    open_transport,
)
from bench.wire import ScriptedByteTransport

# ------------------------------------------------------------------------------ registry


@pytest.mark.parametrize(("address", "scheme"), [
    ("TCPIP::192.0.2.10::5025::SOCKET", "visa"),
    ("TCPIP0::192.0.2.10::inst0::INSTR", "visa"),
    ("GPIB0::18::INSTR", "visa"),
    ("socket://192.0.2.10:5025", "socket"),
    ("rfc2217://192.0.2.10:4001", "serial-url"),
    ("loop://", "serial-url"),
    ("/dev/ttyUSB0", "serial-port"),
    ("COM3", "serial-port"),
])
def test_the_address_picks_the_scheme(address, scheme):
    assert find_scheme(address).name == scheme


def test_an_unknown_address_names_the_known_schemes():
    with pytest.raises(TransportError) as info:
        find_scheme("http://192.0.2.10/")
    message = str(info.value)
    assert "no transport for this address" in message and "socket://host:port" in message
    assert "\n" not in message


def test_the_registry_explains_itself_and_a_missing_library_is_unavailable_with_a_hint():
    lines = describe_transports()
    assert [line.split()[0] for line in lines] == [s.name for s in SCHEMES]
    assert all(line.endswith("available") for line in lines)  # pyvisa-py and pyserial are installed
    absent = Scheme("demo", lambda a: a.startswith("demo://"), "demo://x", "a library that is absent",
                    lambda a, s: None, ("bench_no_such_module_for_tests",), "pip install absent-lib")
    assert absent.missing == ("bench_no_such_module_for_tests",)
    assert absent.explain().endswith("unavailable: bench_no_such_module_for_tests not installed "
                                     "(pip install absent-lib)")
    with pytest.raises(TransportError, match=r"the demo transport is unavailable: .*pip install absent-lib"):
        find_scheme("demo://x", schemes=(absent,))


# ------------------------------------------------------------------- framing, exact bytes


def _framed(replies: dict[str, bytes], settings: TransportSettings | None = None):
    settings = settings or TransportSettings(timeout_s=0.5)
    wire = ScriptedByteTransport(replies.get, "scripted", settings.write_termination.encode())
    return MessageTransport(wire, settings), wire


def test_a_query_writes_the_command_and_its_terminator_and_strips_the_reply():
    transport, wire = _framed({"*IDN?": b"Maker,Model,SN1,1.0\r\n"})
    assert transport.query("*IDN?") == "Maker,Model,SN1,1.0"
    assert bytes(wire.written) == b"*IDN?\n"


def test_a_block_whose_data_holds_newlines_is_read_by_its_header():
    payload = b"\n\x00\n\n" + struct.pack("<f", -20.5)
    transport, wire = _framed({"TRAC?": b"#18" + payload + b"\n"})
    assert transport.query_block("TRAC?") == payload
    assert bytes(wire.written) == b"TRAC?\n"
    assert transport.query_block("TRAC?") == payload  # nothing was left behind


def test_a_block_with_a_crlf_terminator():
    settings = TransportSettings(timeout_s=0.5, read_termination="\r\n", write_termination="\r\n")
    transport, wire = _framed({"TRAC?": b"#15a\r\nbc\r\n"}, settings)
    assert transport.query_block("TRAC?") == b"a\r\nbc"
    assert bytes(wire.written) == b"TRAC?\r\n"


def test_an_indefinite_block_runs_to_the_terminator():
    transport, _ = _framed({"TRAC?": b"#0abc\n"})
    assert transport.query_block("TRAC?") == b"abc"


@pytest.mark.parametrize(("reply", "fragment"), [
    (b"#14ab\n", "block truncated"),                                   # 2 of 4 data bytes came
    (b"#19abcd\nef\n", "block truncated"),                             # header announces 9, 7 came
    (b"#14abcdXY\n", r"expected b'\\n' after the 4-byte block, found b'XY\\n'"),  # extra bytes
    (b"#2x4abcd\n", "expected 2 length digits"),
    (b"#xabcd\n", "expected a digit after '#'"),
    (b"-50.5,-40.25\n", "expected an IEEE 488.2 block"),
])
def test_malformed_blocks_are_refused_exactly(reply, fragment):
    transport, _ = _framed({"TRAC?": reply, "*OPC?": b"1\n"})
    with pytest.raises(BlockFormatError, match=fragment) as info:
        transport.query_block("TRAC?")
    message = str(info.value)
    assert message.startswith("scripted: reply to 'TRAC?'") and "\n" not in message
    # what is left of a broken reply is dropped: it must not answer the next query
    assert transport.query("*OPC?") == "1"


def test_a_reply_that_is_not_ascii_is_a_reply_format_error():
    transport, _ = _framed({"*IDN?": b"Maker\xff\n"})
    with pytest.raises(ReplyFormatError, match=r"reply to '\*IDN\?' is not ASCII text"):
        transport.query("*IDN?")


def test_a_missing_reply_times_out_naming_the_command_and_what_arrived():
    transport, wire = _framed({})
    transport.write("SWE:TIME?")
    wire.feed(b"0.12")  # no terminator yet
    with pytest.raises(ReplyTimeoutError) as info:
        transport.read_line()
    assert str(info.value) == "scripted: no complete reply to 'SWE:TIME?' within 0.5 s (received so far: b'0.12')"


def test_query_response_tells_a_block_from_a_line():
    transport, _ = _framed({"A?": b"#13xyz\n", "B?": b"1,2,3\n"})
    assert transport.query_response("A?") == (True, b"xyz")
    assert transport.query_response("B?") == (False, b"1,2,3")


def test_the_scripted_transport_is_the_real_framing():
    transport = ScriptedTransport(lambda c: {"*IDN?": "a,b,c,d", "TRAC?": encode_block(b"1234") + b"\n"}.get(c))
    assert transport.query("*IDN?") == "a,b,c,d"
    assert transport.query_block("TRAC?") == b"1234"
    transport.write("*CLS")
    assert transport.sent == ["*IDN?", "TRAC?", "*CLS"]


@settings(max_examples=200, deadline=None)
@given(payload=st.binary(max_size=600), crlf=st.booleans())
def test_any_payload_comes_back_unchanged(payload, crlf):
    term = "\r\n" if crlf else "\n"
    settings_ = TransportSettings(timeout_s=0.5, read_termination=term, write_termination=term)
    transport, _ = _framed({"TRAC?": encode_block(payload) + term.encode()}, settings_)
    assert transport.query_block("TRAC?") == payload


@settings(max_examples=200, deadline=None)
@given(payload=st.binary(max_size=300), data=st.data())
def test_a_cut_block_is_never_returned_as_data(payload, data):
    whole = encode_block(payload) + b"\n"
    cut = data.draw(st.integers(min_value=1, max_value=len(whole) - 1))
    transport, _ = _framed({"TRAC?": whole[:cut]})
    with pytest.raises((BlockFormatError, ReplyTimeoutError)):
        transport.query_block("TRAC?")


@settings(max_examples=200, deadline=None)
@given(payload=st.binary(max_size=300),
       extra=st.binary(min_size=1, max_size=8).filter(lambda e: not e.startswith(b"\n")))
def test_extra_bytes_after_a_block_are_refused(payload, extra):
    # (extra bytes that start with the terminator are a second, separate reply)
    transport, _ = _framed({"TRAC?": encode_block(payload) + extra + b"\n"})
    with pytest.raises(BlockFormatError):
        transport.query_block("TRAC?")


# --------------------------------------------------------- one contract, every wire


class OneLine:
    """A world with one CW line at 100 MHz, -40 dBm at the analyzer input."""

    def lines(self, state, f_lo_hz, f_hi_hz):
        return [ln for ln in (Line(100e6, -40.0, "clock"),) if f_lo_hz <= ln.freq_hz <= f_hi_hz]


@pytest.fixture(scope="module")
def analyzer_wires():
    state = SimState()
    analyzer = SimAnalyzer(OneLine(), state, VirtualClock(state=state), seed=4)
    tcp = ScpiServer(analyzer.open_session)
    tcp.start()
    pty = serve_scpi_pty(analyzer.open_session)
    yield {"visa": tcp.resource, "socket": tcp.url, "serial-port": pty.path}
    pty.stop()
    tcp.stop()


@pytest.mark.parametrize("scheme", ["visa", "socket", "serial-port"])
def test_the_same_analyzer_over_every_wire(analyzer_wires, scheme):
    address = analyzer_wires[scheme]
    assert find_scheme(address).name == scheme
    transport = open_transport(address, TransportSettings(timeout_s=5.0))
    try:
        # IEEE 488.2 *IDN?: four comma-separated fields
        assert transport.query("*IDN?").count(",") == 3
        assert transport.query("*RST;:INIT:CONT OFF;:FREQ:STAR 90 MHZ;STOP 110 MHZ;:SWE:POIN 401;"
                               ":BAND 100 KHZ;:INIT;*OPC?") == "1"
        transport.write("FORM REAL,32;:FORM:BORD NORM")
        payload = transport.query_block("TRAC:DATA? TRACE1")
        assert len(payload) == 4 * 401
        trace = np.frombuffer(payload, ">f4")  # NORMal = big-endian
        transport.write("FORM ASC")
        ascii_values = [float(v) for v in transport.query("TRAC:DATA? TRACE1").split(",")]
        np.testing.assert_allclose(trace, ascii_values, atol=1e-4)
        assert trace[200] == pytest.approx(-40.0, abs=0.2)  # the line sits on point 200 (100 MHz)
    finally:
        transport.close()


def _foreign_cause(error: BaseException) -> BaseException | None:
    """The first exception in the ``__cause__`` chain that is not one of ours."""
    cause = error.__cause__
    while isinstance(cause, TransportError):
        cause = cause.__cause__
    return cause


@pytest.mark.parametrize("scheme", ["visa", "socket"])
def test_a_closed_port_is_a_transport_error_with_its_cause(scheme):
    server = ScpiServer(lambda: None)
    server.start()
    server.stop()  # nothing listens there any more
    address = server.resource if scheme == "visa" else server.url
    transport = None
    with pytest.raises(TransportError, match="refused") as info:
        # pyserial connects when it opens; a VISA SOCKET session finds out at the first write
        transport = open_transport(address, TransportSettings(timeout_s=1.0, open_timeout_s=1.0))
        transport.query("*IDN?")
    if transport is not None:
        transport.close()
    assert _foreign_cause(info.value) is not None  # translated with raise ... from


@pytest.mark.parametrize("wire", ["visa", "socket"])
def test_a_dropped_connection_is_a_transport_error_naming_the_command(wire):
    state = SimState()
    analyzer = SimAnalyzer(OneLine(), state, VirtualClock(state=state), seed=1,
                           faults=Faults(drop_after_sweeps=1))
    with ScpiServer(analyzer.open_session) as server:
        address = server.resource if wire == "visa" else server.url
        transport = open_transport(address, TransportSettings(timeout_s=2.0))
        try:
            transport.write("*RST;:INIT:CONT OFF;:FREQ:STAR 90 MHZ;STOP 110 MHZ")
            with pytest.raises(TransportError) as info:
                transport.query("INIT;*OPC?")
        finally:
            transport.close()
    assert "INIT;*OPC?" in str(info.value) and _foreign_cause(info.value) is not None
