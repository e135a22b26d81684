"""G-code stage driver against the simulated stage over real loopback wires (TCP and a pty)."""

from __future__ import annotations

import copy
import math
from importlib import resources

import pytest

from bench.drivers.lineproto import Handshake, LineConversation, checksum, numbered_line
from bench.benchfile import StageSection, load_bench
from bench.drivers.profile import load_profile_source
from bench.drivers.stage import Stage, StageLimits, StageProfile, plan_path
from bench.errors import ConfigError, InstrumentError, PlanError, ReplyTimeoutError, SafetyLimitError
from bench.sim.clock import VirtualClock
from bench.sim.gcode import SimStage, trapezoid_distance_m, trapezoid_time_s
from bench.sim.state import SimState
from bench.transports import ScriptedTransport, open_transport

PROFILES = {"cartesian": "gcode-cartesian", "cnc": "gcode-cnc"}

# The [stage] table of the demo bench file (sequences/demo-bench.toml), with a board origin.
BENCH_STAGE = {
    "address": "socket://127.0.0.1:1",
    "limits": {"x": ["0 mm", "300 mm"], "y": ["0 mm", "200 mm"], "z": ["0 mm", "60 mm"]},
    "safe_z": "40 mm",
    "max_feed": "50 mm/s",
    "position_tolerance": "0.05 mm",
    "board_origin": ["60 mm", "40 mm", "15 mm"],
    "rotary_axis": True,
}
LIMITS = StageSection.model_validate(BENCH_STAGE).safety_limits


class RecordingTransport:
    """Wraps a real transport and records every line written (what left the host)."""

    def __init__(self, inner) -> None:
        self.inner = inner
        self.address = inner.address
        self.sent: list[str] = []

    def write(self, text: str) -> None:
        self.sent.append(text)
        self.inner.write(text)

    def read_line(self, timeout_s=None):
        return self.inner.read_line(timeout_s)

    def query(self, text, timeout_s=None):
        self.write(text)
        return self.read_line(timeout_s)

    def clear(self) -> None:
        self.inner.clear()

    def close(self) -> None:
        self.inner.close()


class CorruptFirstNumberedLine(RecordingTransport):
    """Flips one character of the first numbered G1 line on its way out (a noisy cable)."""

    corrupted = False

    def write(self, text: str) -> None:
        if not self.corrupted and text.startswith("N") and " G1 " in text:
            self.corrupted = True
            text = text.replace("G1", "G7", 1)
        super().write(text)


@pytest.fixture
def world():
    state = SimState()
    state.probe_m = [0.05, 0.05, 0.02]
    return state, VirtualClock(state=state)


def _profile(dialect: str, **overrides) -> StageProfile:
    """A built-in profile with some keys replaced (``{"handshake.timeout": "0.3 s"}``), validated."""
    data = copy.deepcopy(load_profile_source(PROFILES[dialect]).data)
    for dotted, value in overrides.items():
        table, key = dotted.split(".")
        data[table][key] = value
    return StageProfile.model_validate(data)


@pytest.fixture
def rig(world, request):
    """Factory: (sim, stage, recorder) for a dialect and a wire; closes everything after."""
    state, clock = world
    opened = []

    def make(dialect="cartesian", wire="tcp", profile=None, transport_cls=RecordingTransport, limits=LIMITS,
             **sim_kw):
        sim = SimStage(state, clock, dialect=dialect, **sim_kw)
        server = sim.serve_tcp() if wire == "tcp" else sim.serve_pty()
        opened.append(server)
        profile = profile or _profile(dialect)
        address = server.url if wire == "tcp" else server.path
        recorder = transport_cls(open_transport(address, profile.transport_settings()))
        opened.append(recorder)
        return sim, Stage(recorder, profile, limits), recorder

    yield make
    for thing in reversed(opened):
        thing.close() if hasattr(thing, "close") else thing.stop()


# ------------------------------------------------------------------------- pure helpers


def test_checksum_matches_logged_lines():
    # XOR of the bytes before '*' (derived) on lines logged from printer firmware (from memory):
    # "N0 M110 N0*125" and "N7045 G1 X69.974 Y73.400 Z23.078 E873.6106*6"
    assert checksum("N0 M110 N0") == 125
    assert numbered_line(0, "M110 N0") == "N0 M110 N0*125"
    assert numbered_line(7045, "G1 X69.974 Y73.400 Z23.078 E873.6106").endswith("*6")


@pytest.mark.parametrize(
    ("distance_m", "expected_s"),
    [
        # trapezoid: ramps cover v^2/a = 5 mm < 100 mm, t = d/v + v/a = 2 s + 0.1 s (kinematics, hand computed)
        (0.100, 2.1),
        # triangle: 1 mm < 5 mm, t = 2 sqrt(d/a) = 2 sqrt(0.001/0.5) s (kinematics, hand computed)
        (0.001, 2 * math.sqrt(0.002)),
        # boundary d = v^2/a: both formulas give 0.2 s (hand computed)
        (0.005, 0.2),
    ],
)
def test_trapezoid_time_matches_hand_computation(distance_m, expected_s):
    assert trapezoid_time_s(distance_m, 0.05, 0.5) == pytest.approx(expected_s, rel=1e-12)
    # halfway in time is halfway in distance for a symmetric profile (kinematics)
    assert trapezoid_distance_m(expected_s / 2, distance_m, 0.05, 0.5) == pytest.approx(distance_m / 2)


def test_plan_path_lifts_travels_and_lowers():
    # safety rule of the bench file (notes/formats.md: safe_z = travel height for XY moves)
    assert plan_path((0.0, 0.0, 0.003), (0.1, 0.05, 0.005), 0.04, 5e-5) == [
        (0.0, 0.0, 0.04), (0.1, 0.05, 0.04), (0.1, 0.05, 0.005)]
    # already above the travel height: never descend to it before the XY move
    assert plan_path((0.0, 0.0, 0.06), (0.1, 0.0, 0.003), 0.04, 5e-5) == [(0.1, 0.0, 0.06), (0.1, 0.0, 0.003)]
    # Z only
    assert plan_path((0.1, 0.1, 0.003), (0.1, 0.1, 0.010), 0.04, 5e-5) == [(0.1, 0.1, 0.010)]


def test_limits_from_the_bench_file_example():
    # notes/formats.md bench example: 300 x 200 x 60 mm, safe_z 40 mm, 50 mm/s, 0.05 mm
    assert LIMITS.x_m == pytest.approx((0.0, 0.3))
    assert LIMITS.z_m == pytest.approx((0.0, 0.06))
    assert (LIMITS.safe_z_m, LIMITS.max_feed_m_per_s) == pytest.approx((0.04, 0.05))
    assert LIMITS.position_tolerance_m == pytest.approx(5e-5)
    assert LIMITS.rotary_axis and LIMITS.a_deg == (-360.0, 360.0)  # no `a` in the table: one turn either way
    with pytest.raises(ConfigError, match=r"stage.safe_z: expected a height inside the z limits \[0 mm, 60 mm\], "
                                          r"found 80 mm"):
        StageLimits(x_m=LIMITS.x_m, y_m=LIMITS.y_m, z_m=LIMITS.z_m, safe_z_m=0.08, max_feed_m_per_s=0.05)


# -------------------------------------------------------------------------------- safety


@pytest.mark.parametrize(
    ("target_m", "axis", "shown"),
    [((0.301, 0.1, 0.01), "X", "301.000 mm"), ((-0.001, 0.1, 0.01), "X", "-1.000 mm"),
     ((0.1, 0.25, 0.01), "Y", "250.000 mm"), ((0.1, 0.1, 0.061), "Z", "61.000 mm"),
     ((0.1, 0.1, -0.0005), "Z", "-0.500 mm")],
)
def test_out_of_limit_target_is_refused_before_any_byte(rig, target_m, axis, shown):
    sim, stage, recorder = rig()
    stage.connect()
    stage.home()
    sent, received = len(recorder.sent), sim.bytes_received
    with pytest.raises(SafetyLimitError, match=rf"{axis} target {shown} outside the soft limits"):
        stage.move_to(*target_m)
    assert len(recorder.sent) == sent
    assert sim.bytes_received == received


def test_feed_above_max_feed_is_refused_before_any_byte(rig):
    sim, stage, recorder = rig()
    stage.connect()
    stage.home()
    sent = len(recorder.sent)
    with pytest.raises(SafetyLimitError, match="60 mm/s outside"):
        stage.move_to(0.1, 0.1, 0.01, feed_m_per_s=0.06)
    assert len(recorder.sent) == sent


BENCH_WITH_A_LIMITS = """schema = 1
name = "rotary limits"

[analyzer]
address = "TCPIP::127.0.0.1::5025::SOCKET"

[stage]
address = "socket://127.0.0.1:1"
safe_z = "40 mm"
max_feed = "50 mm/s"
board_origin = ["60 mm", "40 mm", "15 mm"]
rotary_axis = true

[stage.limits]
x = ["0 mm", "300 mm"]
y = ["0 mm", "200 mm"]
z = ["0 mm", "60 mm"]
a = ["-90 deg", "90 deg"]
"""


def test_bench_file_rotary_limit_refuses_a_rotation_before_any_byte(rig, tmp_path, world):
    state, _ = world
    path = tmp_path / "bench.toml"
    path.write_text(BENCH_WITH_A_LIMITS, encoding="utf-8")
    limits = load_bench(path, check_files=False).stage.safety_limits
    assert limits.a_deg == (-90.0, 90.0)
    sim, stage, recorder = rig(limits=limits)
    stage.connect()
    stage.home()
    sent, received = len(recorder.sent), sim.bytes_received
    with pytest.raises(SafetyLimitError, match=r"stage A target 120 deg outside the rotary limits \[-90, 90\] deg"):
        stage.rotate_to(120.0)
    assert len(recorder.sent) == sent and sim.bytes_received == received
    assert state.probe_rotation_deg == 0.0
    assert stage.rotate_to(-90.0)[3] == pytest.approx(-90.0)  # the limit itself is allowed
    assert "G1 A-90.000 F5400" in recorder.sent[sent:]


def test_unhomed_stage_refuses_to_move(rig):
    sim, stage, recorder = rig()
    stage.connect()
    sent = len(recorder.sent)
    with pytest.raises(PlanError, match="unhomed"):
        stage.move_to(0.1, 0.1, 0.01)
    assert len(recorder.sent) == sent


@pytest.mark.parametrize(("dialect", "code"), [("cartesian", None), ("cnc", 3)])
def test_simulated_controller_itself_refuses_moves_before_homing(rig, dialect, code):
    sim, stage, recorder = rig(dialect)
    conv = LineConversation(recorder, stage.profile.handshake)
    conv.read_banner()
    with pytest.raises(InstrumentError, match="not homed") as caught:
        conv.command("G1 X10 F600")
    assert caught.value.code == code
    assert caught.value.command == "G1 X10 F600"


def test_xy_travel_happens_at_safe_z(rig, world):
    state, _ = world
    sim, stage, recorder = rig()
    stage.connect()
    stage.home()
    stage.move_to(0.100, 0.050, 0.003)
    mark = len(sim.received)
    stage.move_to(0.200, 0.100, 0.003, feed_m_per_s=0.01)
    # F in units per minute (NIST RS274NGC v3, G94): 10 mm/s = 600 mm/min
    assert sim.received[mark:] == ["G1 Z40.000 F600", "G1 X200.000 Y100.000 F600", "G1 Z3.000 F600",
                                   "M400", "M114"]
    for seg in sim.trajectory:
        if math.dist(seg.start[:2], seg.end[:2]) > 0:  # every XY motion, homing included
            assert min(seg.start[2], seg.end[2]) >= LIMITS.safe_z_m - 1e-9
    assert state.probe_m == pytest.approx([0.2, 0.1, 0.003])


def test_missing_ok_gives_reply_timeout_naming_the_command(rig):
    profile = _profile("cartesian", **{"handshake.timeout": "0.3 s"})
    sim, stage, recorder = rig(profile=profile)
    stage.connect()
    stage.home()
    sim.faults.silent_after_commands = len(sim.received)
    with pytest.raises(ReplyTimeoutError, match=r"no acknowledgement to 'M400' within 0.3 s"):
        stage.position()


def test_error_reply_names_address_and_command(rig):
    sim, stage, recorder = rig("cnc")
    conv = LineConversation(recorder, stage.profile.handshake)
    conv.read_banner()
    conv.command("$H")
    with pytest.raises(InstrumentError) as caught:
        conv.command("G1 X400 F600")
    # error 4 = outside travel, from the profile's [handshake.error_codes]
    assert caught.value.code == 4
    assert str(caught.value) == f"{recorder.address}: 'G1 X400 F600' -> 4,'target outside travel'"


def test_emergency_stop_refuses_everything_after(rig):
    sim, stage, recorder = rig()
    stage.connect()
    stage.home()
    stage.emergency_stop()
    with pytest.raises(InstrumentError, match="emergency stop"):
        stage.identify()
    assert not stage.homed


# ------------------------------------------------------------------------ verification


def test_position_within_tolerance_is_accepted(rig, world):
    sim, stage, recorder = rig()
    stage.connect()
    stage.home()
    sim.faults.reported_offset_m = (0.00002, 0.0, 0.0)  # 0.02 mm < 0.05 mm tolerance
    reported = stage.move_to(0.1, 0.05, 0.01)
    assert reported[0] == pytest.approx(0.10002)


def test_position_outside_tolerance_is_an_instrument_error(rig):
    sim, stage, recorder = rig()
    stage.connect()
    stage.home()
    sim.faults.reported_offset_m = (0.0, -0.0002, 0.0)  # 0.2 mm > 0.05 mm tolerance
    with pytest.raises(InstrumentError, match=r"expected X100.000 Y50.000 Z10.000 mm, reported X100.000 "
                                              r"Y49.800 Z10.000 mm \(tolerance 0.05 mm\)"):
        stage.move_to(0.1, 0.05, 0.01)


# ------------------------------------------------------------------------ move timing


@pytest.mark.parametrize(
    ("z_to_m", "expected_s"),
    [
        # from home z = 60 mm down 10 mm at 50 mm/s, 0.5 m/s^2: trapezoid 0.2 s + 0.1 s (hand computed)
        (0.050, 0.3),
        # down 2 mm: never reaches 50 mm/s, triangle 2 sqrt(0.002 m / 0.5 m/s^2) (hand computed)
        (0.058, 2 * math.sqrt(0.004)),
    ],
)
def test_move_takes_trapezoidal_time_on_the_virtual_clock(rig, world, z_to_m, expected_s):
    _, clock = world
    sim, stage, recorder = rig(accel_m_per_s2=0.5, max_feed_m_per_s=0.05)
    stage.connect()
    stage.home()
    before_s = clock.now_s()
    stage.move_to(0.0, 0.0, z_to_m)
    assert clock.now_s() - before_s == pytest.approx(expected_s, rel=1e-9)
    assert sim.trajectory[-1].t1_s - sim.trajectory[-1].t0_s == pytest.approx(expected_s, rel=1e-9)


def test_rotation_time_and_angle(rig, world):
    state, clock = world
    sim, stage, recorder = rig(max_rotary_deg_per_s=180.0, rotary_accel_deg_per_s2=720.0)
    stage.connect()
    stage.home()
    before_s = clock.now_s()
    assert stage.rotate_to(90.0)[3] == pytest.approx(90.0)
    # profile rate 90 deg/s, 720 deg/s^2: ramps 11.25 deg < 90 deg, t = 1 s + 0.125 s (hand computed)
    assert clock.now_s() - before_s == pytest.approx(1.125)
    assert sim.received[-3] == "G1 A90.000 F5400"  # deg/min for a rotary-only move (RS274NGC)
    assert state.probe_rotation_deg == pytest.approx(90.0)


@pytest.mark.parametrize(("dialect", "text"), [("cartesian", "G4 P1500"), ("cnc", "G4 P1.5")])
def test_dwell_unit_follows_the_dialect(rig, world, dialect, text):
    # G4 P in seconds (NIST RS274NGC v3, CNC firmware); printer firmware takes P in ms (from
    # memory)
    _, clock = world
    sim, stage, recorder = rig(dialect)
    stage.connect()
    before_s = clock.now_s()
    stage.dwell(1.5)
    assert sim.received[-1] == text
    assert clock.now_s() - before_s == pytest.approx(1.5)


def test_keep_alive_lines_are_skipped(rig):
    sim, stage, recorder = rig()
    conv = LineConversation(recorder, stage.profile.handshake)
    conv.read_banner()
    conv.command("G28")
    conv.command("G1 X250 F3000")  # 250 mm at 50 mm/s: about 5 s, keep-alive every 2 s
    recorder.write("M400")
    raw = [recorder.read_line(5.0) for _ in range(3)]
    assert raw == ["echo:busy: processing", "echo:busy: processing", "ok"]
    conv.command("G1 X0 F3000")
    assert conv.command("M400").lines == ()


def test_resend_request_repeats_the_line(rig, world):
    state, _ = world
    profile = _profile("cartesian", **{"handshake.line_numbers": True})
    sim, stage, recorder = rig(profile=profile, transport_cls=CorruptFirstNumberedLine)
    stage.connect()
    assert sim.received[0] == "N0 M110 N0*125"  # XOR checksum (derived)
    stage.home()
    stage.move_to(0.1, 0.05, 0.01)
    bad = [line for line in sim.received if " G7 " in line]
    assert len(bad) == 1
    number = bad[0].split()[0]
    good = [line for line in sim.received if line.startswith(number + " ")]
    assert good[1] == numbered_line(int(number[1:]), "G1 X100.000 Y50.000 F3000")
    assert state.probe_m == pytest.approx([0.1, 0.05, 0.01])


# ---------------------------------------------------------------- contract (both wires)


@pytest.mark.parametrize("wire", ["tcp", "pty"])
@pytest.mark.parametrize("dialect", ["cartesian", "cnc"])
def test_same_driver_over_socket_and_pty_in_both_dialects(rig, world, wire, dialect):
    state, clock = world
    sim, stage, recorder = rig(dialect, wire)
    assert stage.connect() == sim.banner
    assert "simulated-stage" in stage.identify()
    # homing: Z to the top of travel, then X, Y to their minimum (the simulator's home)
    assert stage.home() == pytest.approx((0.0, 0.0, 0.06, 0.0))
    assert state.homed
    assert stage.move_to(0.120, 0.080, 0.004) == pytest.approx((0.12, 0.08, 0.004, 0.0), abs=1e-5)
    assert stage.rotate_to(90.0)[3] == pytest.approx(90.0)
    stage.select_tool(1)
    assert state.tool == 1
    assert stage.position() == pytest.approx((0.12, 0.08, 0.04, 90.0), abs=1e-5)  # tool change lifted
    assert state.probe_m == pytest.approx([0.12, 0.08, 0.04])
    stage.motors_off()
    assert not state.homed
    with pytest.raises(PlanError):
        stage.move_to(0.1, 0.1, 0.01)


# --------------------------------------------------------------- simulator G-code details


def test_sim_relative_mode_inches_and_set_position(rig, world):
    state, _ = world
    sim, stage, recorder = rig()
    conv = LineConversation(recorder, stage.profile.handshake)
    conv.read_banner()
    conv.command("G28")  # home: (0, 0, 60) mm
    conv.command("G92 X0 Y0 Z0")  # G92 sets the current position (NIST RS274NGC v3)
    conv.command("G1 Z-10 F600")
    conv.command("G91")  # relative distances (NIST RS274NGC v3)
    conv.command("G1 X5 Y2")
    conv.command("G20")  # inches: 1 in = 25.4 mm exactly (international inch)
    conv.command("G1 X1")
    conv.command("M400")
    report = conv.command("M114").lines[0]
    assert report.startswith("X:30.40 Y:2.00 Z:-10.00")
    assert state.probe_m == pytest.approx([0.0304, 0.002, 0.050])  # machine frame: 60 - 10 mm


def test_sim_status_report_follows_the_move_in_time(rig, world):
    state, clock = world
    sim, stage, recorder = rig("cnc", accel_m_per_s2=0.5, max_feed_m_per_s=0.05)
    conv = LineConversation(recorder, stage.profile.handshake)
    conv.read_banner()
    conv.command("$H")
    conv.command("G1 Z0 F3000")
    conv.command("G4 P0")
    conv.command("G1 X100 F3000")  # 100 mm at 50 mm/s, 0.5 m/s^2: 2.1 s (hand computed above)
    clock.advance(1.05)  # half the move time: half the distance, by symmetry of the profile
    status = conv.command("?").lines[0]
    assert status.startswith("<Run|MPos:50.000,0.000,0.000")
    assert state.probe_m == pytest.approx([0.05, 0.0, 0.0])
    clock.advance(0.1)
    # cruise ends at 2.0 s; at 1.15 s still cruising: 2.5 mm ramp + 50 mm/s * (1.15 - 0.1) s = 55 mm
    assert conv.command("?").lines[0].startswith("<Run|MPos:55.000,")
    conv.command("G4 P0")
    assert conv.command("?").lines[0].startswith("<Idle|MPos:100.000,0.000,0.000")


def test_ok_with_extra_text_is_an_acknowledgement():
    profile = StageProfile.load("gcode-cartesian")
    conv = LineConversation(ScriptedTransport(lambda cmd: "ok T:21.2 /0.0"), profile.handshake)
    # printer firmware may append text to "ok", e.g. "ok T:21.2 /0.0" (from memory)
    assert conv.command("M105").ok_text == "T:21.2 /0.0"


# --------------------------------------------------------- commands answered without an ok


def _realtime_profile(tmp_path) -> StageProfile:
    """gcode-cnc with its status query marked as answered by the status line alone."""
    text = (resources.files("bench.drivers") / "profiles" / "gcode-cnc.toml").read_text(encoding="utf-8")
    path = tmp_path / "cnc-realtime.toml"
    path.write_text(text.replace("line_numbers = false", 'line_numbers = false\nno_ok = ["?"]', 1), encoding="utf-8")
    return StageProfile.load(path)


def test_status_query_without_ok_over_the_loopback_socket(rig, world, tmp_path):
    state, _ = world
    profile = _realtime_profile(tmp_path)
    assert profile.handshake.no_ok == ("?",)
    sim, stage, recorder = rig("cnc-realtime", profile=profile)
    stage.connect()
    assert stage.home() == pytest.approx((0.0, 0.0, 0.06, 0.0))
    assert sim.received == ["G21", "G90", "$H", "G4 P0", "?"]
    assert sim.replies[-1].startswith("<Idle|MPos:0.000,0.000,60.000")  # the status line, no ok after it
    assert stage.move_to(0.120, 0.080, 0.004) == pytest.approx((0.12, 0.08, 0.004, 0.0), abs=1e-5)
    assert stage.rotate_to(45.0)[3] == pytest.approx(45.0)
    assert state.probe_m == pytest.approx([0.12, 0.08, 0.004])
    # every command but the status query got exactly one ok, and each status line was the whole answer
    assert sim.replies.count("ok") == sum(1 for line in sim.received if line != "?")
    assert sum(1 for line in sim.replies if line.startswith("<")) == sim.received.count("?")


def test_unmarked_status_query_waits_for_an_ok_that_never_comes(rig, tmp_path):
    profile = _profile("cnc", **{"handshake.timeout": "0.3 s"})
    sim, stage, recorder = rig("cnc-realtime", profile=profile)
    stage.connect()
    with pytest.raises(ReplyTimeoutError, match=r"no acknowledgement to '\?' within 0.3 s \(received: <Alarm\|"):
        stage.position()


def test_no_ok_command_is_sent_without_a_line_number():
    handshake = Handshake.model_validate({"ok": r"^ok\b", "errors": [r"^error:(?P<code>\d+)"],
                                          "line_numbers": True, "no_ok": ["?"]})
    replies = {"?": "<Idle|MPos:1.000,2.000,3.000|FS:0,0>"}
    transport = ScriptedTransport(lambda cmd: replies.get(cmd, "ok"))
    conv = LineConversation(transport, handshake)
    assert conv.command("G4 P0").lines == ()
    assert conv.command("?").lines == ("<Idle|MPos:1.000,2.000,3.000|FS:0,0>",)
    assert conv.command("G4 P0").ok_text == ""
    assert transport.sent == [numbered_line(0, "G4 P0"), "?", numbered_line(1, "G4 P0")]
    replies["?"] = "error:3"
    with pytest.raises(InstrumentError) as caught:
        conv.command("?")
    assert caught.value.code == 3 and caught.value.command == "?"
