"""The simulated analyzer and bench supply as SCPI instruments on a loopback socket."""

from __future__ import annotations

import socket
import struct

import numpy as np
import pytest

from bench.sim.clock import VirtualClock
from bench.sim.scpi import (
    OVERLOAD_CODE,
    Faults,
    ScpiServer,
    SimAnalyzer,
    SimSupply,
    compile_header,
)
from bench.sim.state import Line, SimState

DBUV_MINUS_DBM = 106.99  # 50 ohm: dBuV = dBm + 106.99 (50 ohm: 20*log10(1e6 * sqrt(50 * 1e-3)), common practice)


class FakeWorld:
    """Two lines at the input; records the poses it was asked about."""

    def __init__(self, level_dbm: float = -40.0) -> None:
        self.level_dbm = level_dbm
        self.calls: list[tuple[bool, float, float]] = []

    def lines(self, state: SimState, f_lo_hz: float, f_hi_hz: float) -> list[Line]:
        self.calls.append((state.board_powered, f_lo_hz, f_hi_hz))
        candidates = [Line(100e6, self.level_dbm, "clock"), Line(125e6, -60.0, "spur")]
        return [line for line in candidates if f_lo_hz <= line.freq_hz <= f_hi_hz]


class Client:
    """Plain-socket SCPI client: one line out, one line (or block) back."""

    def __init__(self, port: int) -> None:
        # the timeout only guards against a broken test; no assertion relies on it
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=10.0)
        self.file = self.sock.makefile("rb")

    def write(self, line: str) -> None:
        self.sock.sendall(line.encode("ascii") + b"\n")

    def query(self, line: str) -> str:
        self.write(line)
        return self.file.readline().decode("ascii").rstrip("\n")

    def read_block(self) -> bytes:
        # IEEE 488.2 definite-length block: '#', n digits count, then the length (IEEE 488.2 §8.7.9)
        assert self.file.read(1) == b"#"
        digits = int(self.file.read(1))
        length = int(self.file.read(digits))
        payload = self.file.read(length)
        assert self.file.read(1) == b"\n"
        return payload

    def errors(self) -> list[str]:
        out = []
        while True:
            reply = self.query("SYST:ERR?")
            if reply.startswith("0,"):
                return out
            out.append(reply)

    def close(self) -> None:
        self.file.close()
        self.sock.close()


@pytest.fixture()
def bench():
    state = SimState()
    clock = VirtualClock(state=state)
    world = FakeWorld()
    analyzer = SimAnalyzer(world, state, clock, seed=11)
    server = ScpiServer(analyzer.open_session)
    server.start()
    client = Client(server.port)
    yield analyzer, client, clock, server
    client.close()
    server.stop()


def _single_sweep_setup(client: Client, points: int = 1001) -> None:
    assert client.query(f"*RST;:INIT:CONT OFF;:FREQ:STAR 90 MHz;STOP 130 MHZ;:BAND 100 kHz;"
                        f":SWE:POIN {points};*OPC?") == "1"


# ---------------------------------------------------------------- parser


def test_identity_has_the_four_488_2_fields(bench):
    _, client, _, server = bench
    # *IDN? -> manufacturer,model,serial,firmware (IEEE 488.2 *IDN? response, from memory)
    assert client.query("*IDN?").split(",") == ["EmissionBench", "SimAnalyzer-1", "SN0001", "0.1"]
    assert server.resource == f"TCPIP::127.0.0.1::{server.port}::SOCKET"
    client.sock.sendall(b"*OPC?\r\n")  # CR LF accepted as a line end too
    assert client.file.readline() == b"1\n"


def test_short_long_and_mixed_case_forms_and_optional_nodes(bench):
    _, client, _, _ = bench
    client.write("sense:frequency:start 30 mhz")
    client.write(":SENS:FREQ:STOP 1GHZ")
    client.write("Freq:Cent 500 MHz")  # keeps the 970 MHz span
    assert client.query(":FREQuency:STARt?;:SENSe:FREQ:STOP?;:freq:span?") == \
        "15000000;985000000;970000000"
    client.write("DISPlay:WINDow:TRACe:Y:SCALe:RLEVel -20 DBM")
    assert client.query("DISP:TRAC:Y:RLEV?") == "-20"
    client.write("det:func positive")
    assert client.query("DETector?") == "POS"
    client.write("BWID 9 KHZ")
    assert client.query("BANDwidth:RESolution?;:BAND:RES:AUTO?") == "9000;0"
    client.write("POW:RF:ATT 20")
    assert client.query("INP:ATT?;:POW:ATT:AUTO?") == "20;0"
    # a keyword is its short or long form, nothing in between (SCPI-1999 Vol. 1 program headers)
    client.write("FREQU:STAR 1 MHZ")
    assert client.errors() == ['-113,"Undefined header;FREQU:STAR"']


def test_several_commands_per_line_relative_path_and_opc(bench):
    _, client, _, _ = bench
    assert client.query("FREQ:STAR 50 MHZ;STOP 60 MHZ;*OPC?") == "1"  # STOP under FREQ:
    assert client.query("FREQ:STAR?;STOP?") == "50000000;60000000"
    client.write("*OPC")
    assert client.query("*ESR?") == "1"  # operation complete bit (IEEE 488.2 ESR bit 0)


def test_numeric_suffixes_and_min_max(bench):
    _, client, _, _ = bench
    client.write("SWE:TIME 20 MS;:SWE:POIN MAX;:BAND:VID 300 KHZ")
    assert client.query("SWE:TIME?;POIN?;:BAND:VID?;:SWE:TIME:AUTO?") == "0.02;40001;300000;0"
    assert client.query("FREQ:STAR? MIN;:FREQ:STOP? MAX") == "9000;7000000000"
    client.write("FREQ:CENT 100 MHZ;SPAN 20 MHZ")
    assert client.query("FREQ:STAR?;STOP?") == "90000000;110000000"
    client.write("INP:ATT 13")  # 2 dB attenuator steps: rounds to the nearest
    assert client.query("INP:ATT?") in ("12", "14")


def test_error_queue_codes_fifo_order_and_status(bench):
    _, client, _, _ = bench
    client.write("FREQ:STAR 8 GHZ")        # -222 Data out of range
    client.write("DET BOGUS")              # -224 Illegal parameter value
    client.write("FREQ:STAR")              # -109 Missing parameter
    client.write("FOO:BAR")                # -113 Undefined header
    client.write("FREQ:STAR 1 MS")         # -131 Invalid suffix
    client.write("FREQ:STAR $1")           # -104 Data type error
    client.write("FREQ;STAR 1")            # -113: FREQ alone is no command
    # SCPI-1999 standard error numbers, FIFO (SCPI-1999 Vol. 2 SYSTem:ERRor)
    codes = [int(e.split(",")[0]) for e in client.errors()]
    assert codes == [-222, -224, -109, -113, -131, -104, -113]
    assert client.query("SYST:ERR?") == '0,"No error"'
    # ESR: command error bit 5 (32) + execution error bit 4 (16); read clears (IEEE 488.2)
    assert client.query("*ESR?") == "48"
    assert client.query("*ESR?") == "0"


def test_command_error_discards_the_rest_of_the_line(bench):
    _, client, _, _ = bench
    client.write("BOGUS;*OPC?")  # nothing after a command error is executed (IEEE 488.2)
    assert client.query("*OPC?") == "1"
    assert client.query("SYST:ERR?").startswith("-113,")
    assert client.query("SYST:ERR?") == '0,"No error"'


def test_error_queue_overflow_and_clear(bench):
    _, client, _, _ = bench
    for _ in range(12):
        client.write("FOO")
    assert client.query("*STB?") == "4"  # error queue not empty: STB bit 2 (SCPI)
    errors = client.errors()
    assert len(errors) == 10 and errors[-1].startswith("-350,")  # queue overflow (SCPI)
    client.write("FOO")
    client.write("*CLS")
    assert client.query("SYST:ERR?") == '0,"No error"'


def test_header_pattern_compilation():
    rx = compile_header("CALCulate:MARKer[1]:X")
    assert rx.match("CALC:MARK:X") and rx.match("CALCULATE:MARKER1:X")
    assert not rx.match("CALC:MARK2:X") and not rx.match("CALCU:MARK:X")


# ---------------------------------------------------------------- sweeps and traces


def test_trace_before_any_sweep_is_stale(bench):
    _, client, _, _ = bench
    _single_sweep_setup(client)
    client.write("TRAC? TRACE1")
    assert client.errors() == ['-230,"Data corrupt or stale;no sweep since *RST, send INIT:IMM '
                               'first"']


def test_init_advances_the_clock_by_the_sweep_time(bench):
    _, client, clock, _ = bench
    _single_sweep_setup(client)
    sweep_time_s = float(client.query("SWE:TIME?"))
    assert sweep_time_s == pytest.approx(2.5 * 40e6 / 100e3**2)  # k*span/RBW^2, k = 2.5 (common practice)
    before = clock.now_s()
    assert client.query("INIT:IMM;*OPC?") == "1"
    assert clock.now_s() - before == pytest.approx(sweep_time_s)


def test_binary_block_in_both_byte_orders_matches_ascii(bench):
    _, client, _, _ = bench
    _single_sweep_setup(client)
    assert client.query("INIT;*OPC?") == "1"
    ascii_values = np.array([float(v) for v in client.query("FORM ASC;:TRAC? TRACE1").split(",")])
    client.write("FORM REAL,32;:FORM:BORD NORM;:TRAC:DATA? TRACE1")
    normal = client.read_block()
    client.write("FORM:BORD SWAP;:TRAC? TRACE1")
    swapped = client.read_block()
    assert len(normal) == len(swapped) == 4 * 1001
    big = np.array(struct.unpack(">1001f", normal))      # NORMal = big-endian (SCPI-1999 FORMat:BORDer)
    little = np.frombuffer(swapped, dtype="<f4")          # SWAPped = little-endian (SCPI-1999 FORMat:BORDer)
    np.testing.assert_array_equal(big, little)
    np.testing.assert_allclose(big, ascii_values, atol=1e-4)
    assert ascii_values.size == 1001
    # the 100 MHz line (-40 dBm, CW) sits on a trace point: 90 + 250 * 40 kHz
    assert ascii_values[250] == pytest.approx(-40.0, abs=0.2)


def test_trace_read_twice_is_identical_and_unit_dbuv(bench):
    _, client, _, _ = bench
    _single_sweep_setup(client)
    client.query("INIT;*OPC?")
    client.write("FORM REAL,32")
    client.write("TRAC? TRACE1")
    first = client.read_block()
    client.write("TRAC? TRACE1")
    assert client.read_block() == first
    client.write("UNIT:POW DBUV;:TRAC? TRACE1")
    in_dbuv = np.frombuffer(client.read_block(), ">f4")
    np.testing.assert_allclose(in_dbuv, np.frombuffer(first, ">f4") + DBUV_MINUS_DBM, atol=0.01)


def test_continuous_mode_sweeps_on_every_read(bench):
    _, client, clock, _ = bench
    client.write("*RST;:FREQ:STAR 90 MHZ;STOP 130 MHZ;:BAND 100 KHZ;:FORM REAL,32")
    assert client.query("INIT:CONT?") == "1"  # *RST state: continuous
    client.write("TRAC? TRACE1")
    first = client.read_block()
    t_first = clock.now_s()
    client.write("TRAC? TRACE1")
    assert client.read_block() != first and clock.now_s() > t_first


def test_marker_peak_search(bench):
    _, client, _, _ = bench
    _single_sweep_setup(client)
    client.query("INIT;*OPC?")
    client.write("CALC:MARK:MAX")
    assert float(client.query("CALC:MARK:X?")) == 100e6
    assert float(client.query("CALC:MARK1:Y?")) == pytest.approx(-40.0, abs=0.2)
    client.write("UNIT:POW DBUV")
    assert float(client.query("CALC:MARK:Y?")) == pytest.approx(-40.0 + DBUV_MINUS_DBM, abs=0.2)
    client.write("CALC:MARK:X 125 MHZ")
    assert float(client.query("CALC:MARK:X?")) == 125e6


def test_overload_goes_into_the_queue_and_questionable_status(bench):
    analyzer, client, _, _ = bench
    analyzer.world.level_dbm = 5.0  # +5 dBm at the input
    _single_sweep_setup(client)
    client.write("INP:ATT 0;:INIT;*WAI")
    assert client.query("STAT:QUES:COND?") == "8"  # POWer bit (SCPI questionable register)
    assert [int(e.split(",")[0]) for e in client.errors()] == [OVERLOAD_CODE]
    client.write("INP:ATT 30;:INIT")  # mixer at -25 dBm: linear again
    assert client.query("STAT:QUES:COND?") == "0"
    assert client.errors() == []


def test_sweeps_read_the_shared_pose(bench):
    analyzer, client, _, _ = bench
    _single_sweep_setup(client)
    analyzer.state.board_powered = False
    client.query("INIT;*OPC?")
    assert analyzer.world.calls[-1][0] is False
    f_lo, f_hi = analyzer.world.calls[-1][1:]
    assert f_lo <= 90e6 and f_hi >= 130e6


def test_same_seed_gives_the_same_trace_on_a_fresh_bench():
    traces = []
    for _ in range(2):
        state = SimState()
        analyzer = SimAnalyzer(FakeWorld(), state, VirtualClock(state=state), seed=5)
        with ScpiServer(analyzer.open_session) as server:
            client = Client(server.port)
            _single_sweep_setup(client)
            client.write("FORM REAL,32;:INIT")
            client.write("TRAC? TRACE1")
            traces.append(client.read_block())
            client.close()
    assert traces[0] == traces[1]


# ---------------------------------------------------------------- bench supply


def test_supply_switches_the_board():
    state = SimState()
    supply = SimSupply(state)
    with ScpiServer(supply.open_session) as server:
        client = Client(server.port)
        assert client.query("*IDN?").split(",")[1] == "SimSupply-1"
        assert client.query("OUTP OFF;*OPC?") == "1"
        assert state.board_powered is False and client.query("OUTP?") == "0"
        assert client.query("outp:stat 1;*OPC?") == "1"
        assert state.board_powered is True and client.query("OUTPut:STATe?") == "1"
        client.write("OUTP MAYBE")
        assert client.errors() == ["-224,\"Illegal parameter value;expected ON|OFF|1|0, "
                                   "found 'MAYBE'\""]
        client.close()


# ---------------------------------------------------------------- faults


def _closed(client: Client, line: str = "*IDN?") -> bool:
    """True when the peer closed or reset the connection instead of answering ``line``."""
    try:
        client.write(line)
        return client.file.readline() == b""
    except (ConnectionResetError, BrokenPipeError):
        return True


def _refused(port: int) -> bool:
    """True when the server resets a new connection instead of serving it.

    The server accepts and resets at once, so the reset can reach the client while its
    ``connect()`` is still returning: a ``ConnectionResetError`` from connecting counts as a
    refusal too, as does one from the first exchange.
    """
    try:
        client = Client(port)
    except (ConnectionResetError, ConnectionRefusedError):
        return True
    try:
        return _closed(client)
    finally:
        client.close()


def _faulty_bench(faults: Faults):
    state = SimState()
    analyzer = SimAnalyzer(FakeWorld(), state, VirtualClock(state=state), seed=1, faults=faults)
    server = ScpiServer(analyzer.open_session)
    server.start()
    return analyzer, server


def test_drop_after_n_sweeps_then_refuse_then_recover():
    analyzer, server = _faulty_bench(Faults(drop_after_sweeps=2, refuse_after_drop=2))
    try:
        client = Client(server.port)
        _single_sweep_setup(client)
        assert client.query("INIT;*OPC?") == "1"
        assert _closed(client, "INIT;*OPC?")  # second sweep: computed, then the line is dropped
        client.close()
        for _ in range(2):  # refused twice
            assert _refused(server.port)
        client = Client(server.port)
        assert client.query("*IDN?").startswith("EmissionBench")
        assert client.query("FREQ:STAR?") == "90000000"  # the instrument kept its settings
        assert client.query("INIT;*OPC?") == "1" and analyzer.sweep_count == 3
        client.close()
    finally:
        server.stop()


def test_hang_after_n_sweeps_stops_answering_on_that_connection():
    analyzer, server = _faulty_bench(Faults(hang_after_sweeps=1))
    try:
        client = Client(server.port)
        _single_sweep_setup(client)
        client.write("INIT;*OPC?")
        client.write("*IDN?")
        client.sock.shutdown(socket.SHUT_WR)
        assert client.file.read() == b""  # no byte came back before the server closed
        client.close()
        client = Client(server.port)
        assert client.query("*OPC?") == "1" and analyzer.sweep_count == 1
        client.close()
    finally:
        server.stop()


def test_error_after_n_sweeps():
    _, server = _faulty_bench(Faults(error_after_sweeps=1))
    try:
        client = Client(server.port)
        _single_sweep_setup(client)
        assert client.query("INIT;*OPC?") == "1"
        assert client.errors() == ['-240,"Hardware error"']
        assert client.query("INIT;*OPC?") == "1"
        assert client.errors() == []  # fires once
        client.close()
    finally:
        server.stop()


def test_two_connections_share_one_instrument(bench):
    _, client, _, server = bench
    other = Client(server.port)
    assert client.query("FREQ:STAR 77 MHZ;*OPC?") == "1"
    assert other.query("FREQ:STAR?") == "77000000"
    other.close()


# ---------------------------------------------------------------- trace formats and completion


def test_every_trace_format_and_byte_order_carries_the_same_trace(bench):
    _, client, _, _ = bench
    _single_sweep_setup(client)
    assert client.query("INIT;*OPC?") == "1"
    reference = np.array([float(v) for v in client.query("FORM ASC;:TRAC? TRACE1").split(",")])
    decoded = {}
    # FORMat[:DATA] and FORMat:BORDer (SCPI-1999 Vol. 2): NORMal = big-endian, SWAPped = little
    for fmt, dtype in (("REAL,32", "f4"), ("REAL,64", "f8"), ("INT,32", "i4")):
        for order, prefix in (("NORM", ">"), ("SWAP", "<")):
            client.write(f"FORM:DATA {fmt};:FORM:BORD {order};:TRAC:DATA? TRACE1")
            values = np.frombuffer(client.read_block(), prefix + dtype).astype(float)
            decoded[fmt, order] = values / 1000.0 if fmt == "INT,32" else values  # INT,32: 1/1000 dB
    for (fmt, order), values in decoded.items():
        assert values.size == 1001, (fmt, order)
        np.testing.assert_allclose(values, reference, atol=1e-3, err_msg=f"{fmt} {order}")
    assert client.query("FORM?") == "INT,32" and client.query("FORM:BORD?") == "SWAP"
    client.write("FORM INT,16")
    assert client.errors() == ["-224,\"Illegal parameter value;expected ASCii, REAL,32, REAL,64 or "
                               "INTeger,32, found 'INT,16'\""]


def _long_sweep_setup(client: Client) -> float:
    # 30 MHz-1 GHz at 30 kHz RBW: ST = 2.5 * 970e6 / 30e3**2 = 2.69 s (k*span/RBW^2, common practice)
    assert client.query("*RST;:INIT:CONT OFF;:FREQ:STAR 30 MHZ;STOP 1 GHZ;:BAND 30 KHZ;*OPC?") == "1"
    return float(client.query("SWE:TIME?"))


def test_the_sweeping_bit_of_the_operation_status_clears_when_the_sweep_ends(bench):
    analyzer, client, clock, _ = bench
    sweep_time_s = _long_sweep_setup(client)
    before = clock.now_s()
    client.write("INIT")
    polls = [client.query("STAT:OPER:COND?") for _ in range(60)]
    # SWEeping is bit 3 (value 8) of the SCPI operation status register; one poll stands for
    # POLL_QUANTUM_S of the sweep, so the bit shows for ceil(ST / 50 ms) - 1 polls
    running = int(np.ceil(sweep_time_s / 0.05)) - 1
    assert polls == ["8"] * running + ["0"] * (60 - running)
    assert clock.now_s() - before == pytest.approx(sweep_time_s)  # the polls add no time
    assert analyzer.sweep_count == 1


def test_opc_then_esr_polling_sets_operation_complete_when_the_sweep_ends(bench):
    _, client, _, _ = bench
    sweep_time_s = _long_sweep_setup(client)
    client.write("INIT;*OPC")
    polls = [client.query("*ESR?") for _ in range(60)]
    # IEEE 488.2 §11.5.1 (from memory): ESR bit 0 (OPC) is set once the pending operation completes; *ESR? clears it
    done = polls.index("1")
    assert done == int(np.ceil(sweep_time_s / 0.05)) - 1
    assert set(polls[:done]) == {"0"} and set(polls[done + 1:]) == {"0"}


def test_a_query_that_needs_the_sweep_ends_it(bench):
    _, client, _, _ = bench
    _long_sweep_setup(client)
    client.write("FORM REAL,32;:INIT;*OPC")
    client.write("TRAC? TRACE1")
    assert len(client.read_block()) == 4 * 1001   # the trace query waits for the sweep
    assert client.query("STAT:OPER:COND?;*ESR?") == "0;1"
    client.write("INIT;*OPC;*CLS")                  # *CLS forgets the pending *OPC
    assert client.query("*OPC?;*ESR?") == "1;0"


def test_mode_selection_and_display_switch(bench):
    _, client, _, _ = bench
    client.write("INSTrument:SELect SANalyzer;:DISPlay:ENABle OFF")
    assert client.query("INST?;:DISP:ENAB?") == "SAN;0"
    client.write("INST:SEL RECEIVER")
    assert client.errors() == ["-224,\"Illegal parameter value;expected SANalyzer, found 'RECEIVER'\""]


# ---------------------------------------------------------------- noise keyed by settings and pose


def _trace(client: Client) -> bytes:
    client.write("FORM REAL,32;:INIT;*WAI;:TRAC? TRACE1")
    return client.read_block()


def test_a_trace_repeats_bit_for_bit_when_its_settings_and_pose_come_back(bench):
    analyzer, client, _, _ = bench
    _single_sweep_setup(client)
    first, second = _trace(client), _trace(client)
    assert first != second  # the next sweep at the same key is a new noise draw
    client.write("FREQ:STAR 95 MHZ")  # other settings
    other_settings = _trace(client)
    client.write("FREQ:STAR 90 MHZ")
    with analyzer.state.lock:
        analyzer.state.probe_m = [0.01, 0.02, 0.03]  # another pose, same settings
    other_pose = _trace(client)
    assert other_pose != first and len(other_settings) == len(first)
    with analyzer.state.lock:
        analyzer.state.probe_m = [0.0, 0.0, 0.05]  # back to the first pose
    assert _trace(client) == first
    assert _trace(client) == second


def test_each_pose_field_and_setting_changes_the_noise(bench):
    analyzer, client, _, _ = bench
    _single_sweep_setup(client, points=201)
    reference = _trace(client)
    changes = [("probe_rotation_deg", 90.0), ("tool", 2), ("board_powered", False),
               ("mast_height_m", 2.0), ("polarization", "vertical"), ("azimuth_deg", 45.0)]
    for name, value in changes:
        with analyzer.state.lock:
            before = getattr(analyzer.state, name)
            setattr(analyzer.state, name, value)
        assert _trace(client) != reference, name
        with analyzer.state.lock:
            setattr(analyzer.state, name, before)
        assert _trace(client) == reference, name
    for command, undo in [("DET RMS", "DET POS"), ("BAND:VID 10 KHZ", "BAND:VID:AUTO ON"),
                          ("INP:ATT 40", "INP:ATT:AUTO ON"), ("SWE:TIME 1 S", "SWE:TIME:AUTO ON")]:
        client.write(command)
        assert _trace(client) != reference, command
        client.write(undo)
        assert _trace(client) == reference, undo
