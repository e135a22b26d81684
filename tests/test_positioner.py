"""Mast and turntable drivers against the simulated positioner over loopback wires."""

from __future__ import annotations

import copy

import pytest

from bench.drivers.lineproto import LineConversation
from bench.drivers.positioner import Mast, MastLimits, PositionerProfile, Turntable, TurntableLimits
from bench.drivers.profile import load_profile_source
from bench.errors import ConfigError, InstrumentError, PlanError, ReplyTimeoutError, SafetyLimitError
from bench.sim.clock import VirtualClock
from bench.sim.positioner import SimPositioner
from bench.sim.state import SimState
from bench.transports import open_transport

# The demo bench file (sequences/demo-bench.toml): [mast] 1-4 m, [turntable] 0-360 deg.
MAST_LIMITS = MastLimits((1.0, 4.0))
TABLE_LIMITS = TurntableLimits((0.0, 360.0))


def _profile(**overrides) -> PositionerProfile:
    """The built-in profile with some keys replaced (``{"busy.time_margin": "1 s"}``), validated."""
    data = copy.deepcopy(load_profile_source("line-positioner").data)
    for dotted, value in overrides.items():
        table, key = dotted.split(".")
        data[table][key] = value
    return PositionerProfile.model_validate(data)


@pytest.fixture
def world():
    state = SimState()
    return state, VirtualClock(state=state)


@pytest.fixture
def rig(world):
    """Factory: (sim, driver, sleeps) for "mast" or "turntable" over "tcp" or "pty"."""
    state, clock = world
    opened = []

    def make(kind="mast", wire="tcp", profile=None, limits=None, **sim_kw):
        sim = SimPositioner(state, clock, **sim_kw)
        server = sim.serve_tcp() if wire == "tcp" else sim.serve_pty()
        opened.append(server.stop)
        profile = profile or _profile()
        transport = open_transport(server.url if wire == "tcp" else server.path, profile.transport_settings())
        opened.append(transport.close)
        sleeps: list[float] = []  # the simulator advances its clock per poll: no real waiting
        cls, default = (Mast, MAST_LIMITS) if kind == "mast" else (Turntable, TABLE_LIMITS)
        driver = cls(transport, profile, limits or default, sleep=sleeps.append)
        driver.connect()
        return sim, driver, sleeps, transport

    yield make
    for close in reversed(opened):
        close()


def test_limits_from_the_bench_file_example():
    assert MAST_LIMITS.height_m == pytest.approx((1.0, 4.0))
    assert TABLE_LIMITS.azimuth_deg == pytest.approx((0.0, 360.0))
    with pytest.raises(ConfigError, match="min < max"):
        MastLimits((4.0, 1.0))


@pytest.mark.parametrize("height_m", [0.99, 4.01, float("nan")])
def test_mast_height_outside_limits_is_refused_before_sending(rig, height_m):
    sim, mast, *_ = rig("mast")
    before = (len(sim.received), sim.bytes_received)
    with pytest.raises(SafetyLimitError, match="outside the limits \\[1, 4\\] m"):
        mast.set_height(height_m)
    assert (len(sim.received), sim.bytes_received) == before


@pytest.mark.parametrize("azimuth_deg", [-0.5, 360.5])
def test_turntable_azimuth_outside_limits_is_refused_before_sending(rig, azimuth_deg):
    sim, table, *_ = rig("turntable")
    before = sim.bytes_received
    with pytest.raises(SafetyLimitError, match="outside the limits \\[0, 360\\] deg"):
        table.set_azimuth(azimuth_deg)
    assert sim.bytes_received == before


@pytest.mark.parametrize("wire", ["tcp", "pty"])
def test_mast_reaches_height_in_distance_over_speed(rig, world, wire):
    state, clock = world
    sim, mast, sleeps, _ = rig("mast", wire, mast_speed_m_per_s=0.1, poll_advance_s=0.25)
    before_s = clock.now_s()
    assert mast.set_height(4.0) == pytest.approx(4.0)
    # 3 m at 0.1 m/s = 30 s of travel (hand computed)
    assert clock.now_s() - before_s == pytest.approx(30.0)
    name, motion = sim.motions[-1]
    assert (name, motion.t1_s - motion.t0_s) == ("mast", pytest.approx(30.0))
    assert state.mast_height_m == pytest.approx(4.0)
    assert mast.height() == pytest.approx(4.0)
    # each poll stands for 0.25 s: 30 s / 0.25 s = 120 polls, the last answers idle, so the
    # driver waited its poll interval 119 times (hand computed)
    assert sleeps == [0.25] * 119


def test_turntable_reaches_azimuth_in_angle_over_speed(rig, world):
    state, clock = world
    sim, table, *_ = rig("turntable", turntable_speed_deg_per_s=6.0)
    before_s = clock.now_s()
    assert table.set_azimuth(90.0) == pytest.approx(90.0)
    # 90 deg at 6 deg/s = 15 s (hand computed)
    assert clock.now_s() - before_s == pytest.approx(15.0)
    assert state.azimuth_deg == pytest.approx(90.0)
    assert table.azimuth() == pytest.approx(90.0)


def test_polarization_switch(rig, world):
    state, clock = world
    sim, mast, *_ = rig("mast", polarization_time_s=4.0)
    assert mast.polarization() == "horizontal"
    before_s = clock.now_s()
    assert mast.set_polarization("vertical") == "vertical"
    assert state.polarization == "vertical"
    assert clock.now_s() - before_s == pytest.approx(4.0)
    # 4 s switch, 0.25 s per poll: 16 polls, the last one idle (hand computed)
    assert sim.received[-18:] == ["POL V"] + ["BUSY?"] * 16 + ["POL?"]
    sent = len(sim.received)
    with pytest.raises(PlanError, match="'horizontal' or 'vertical'"):
        mast.set_polarization("diagonal")
    assert len(sim.received) == sent


def test_controller_refusal_is_an_instrument_error_naming_the_command(rig):
    # the bench allows more than the simulated mast can do: the controller says no
    sim, mast, *_ = rig("mast", limits=MastLimits((1.0, 5.0)), mast_travel_m=(1.0, 4.0))
    with pytest.raises(InstrumentError) as caught:
        mast.set_height(4.5)
    assert caught.value.command == "HEIGHT 4500.0"
    assert caught.value.text == "height 4500 mm outside travel [1000, 4000] mm"


def test_silent_controller_gives_reply_timeout_naming_the_command(rig):
    sim, table, *_ = rig("turntable", profile=_profile(**{"handshake.timeout": "0.3 s"}))
    sim.faults.silent_after_commands = len(sim.received)
    with pytest.raises(ReplyTimeoutError, match=r"no acknowledgement to 'AZIM\?' within 0.3 s"):
        table.azimuth()


def test_motion_that_never_ends_hits_the_bounded_deadline(rig, world):
    # the profile expects at least 50 mm/s, the simulated mast crawls at 1 mm/s
    profile = _profile(**{"busy.time_margin": "1 s", "busy.time_factor": 1.0})
    sim, mast, sleeps, _ = rig("mast", profile=profile, mast_speed_m_per_s=0.001, poll_advance_s=0.25)
    with pytest.raises(ReplyTimeoutError, match="'HEIGHT 2000.0' still moving after the 21 s deadline"):
        mast.set_height(2.0)
    # deadline 1 x (1 m / 0.05 m/s) + 1 s = 21 s; 21 s / 0.25 s + 1 = 85 polls at most
    assert len(sleeps) == 85


def test_stop_halts_where_it_is(rig, world):
    state, clock = world
    sim, mast, _, transport = rig("mast", mast_speed_m_per_s=0.1)
    conv = LineConversation(transport, mast.profile.handshake)  # raw commands on the same wire
    conv.command("HEIGHT 2000")
    clock.advance(5.0)  # 5 s at 0.1 m/s: 0.5 m up from 1 m (hand computed)
    conv.command("STOP")
    assert mast.height() == pytest.approx(1.5)
    assert not mast.is_busy()
    assert state.mast_height_m == pytest.approx(1.5)
