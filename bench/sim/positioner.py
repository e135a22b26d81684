"""Simulated antenna mast and turntable speaking our plain line dialect.

Dialect (the ``line-positioner`` profile describes the same thing from the host side): one
command per line, answered by ``ok`` (queries send their answer line first) or by
``error: <text>``::

    HEIGHT <mm>    HEIGHT?  -> HEIGHT <mm>        mast height above the ground plane
    POL H|V        POL?     -> POL H|V            antenna polarization
    AZIM <deg>     AZIM?    -> AZIM <deg>         turntable angle
    BUSY?          -> BUSY 0|1                    any motion running
    STOP           stop where it is
    ID?            -> ID <text>

Moves start at once and run at constant speed on the virtual clock; the shared state
(``mast_height_m``, ``polarization``, ``azimuth_deg``) follows the motion under ``state.lock``.
A ``BUSY?`` poll stands for the time between two polls on a real bench: while something moves,
each poll advances the virtual clock by ``poll_advance_s`` (at most to the end of the motion),
so a host that polls without sleeping still sees the motion take its full virtual time.
"""

from __future__ import annotations

import re
import threading
from collections.abc import Callable
from dataclasses import dataclass

from bench.sim.clock import VirtualClock
from bench.sim.lineserver import LineEngine, PtyLineServer, TcpLineServer
from bench.sim.state import SimState

__all__ = ["AxisMotion", "PositionerFaults", "SimPositioner"]

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_SET = re.compile(rf"^(HEIGHT|AZIM)\s+({_NUMBER})$")
_POL_CODES = {"H": "horizontal", "V": "vertical"}


@dataclass(frozen=True)
class AxisMotion:
    """A constant-speed move on the virtual timeline (value in m or deg)."""

    t0_s: float
    t1_s: float
    start: float
    end: float

    def value_at(self, t_s: float) -> float:
        """Position at virtual time ``t_s``."""
        if t_s >= self.t1_s or self.t1_s <= self.t0_s:
            return self.end
        if t_s <= self.t0_s:
            return self.start
        return self.start + (self.end - self.start) * (t_s - self.t0_s) / (self.t1_s - self.t0_s)


@dataclass
class PositionerFaults:
    """Faults to inject: stop answering once ``silent_after_commands`` commands were received."""

    silent_after_commands: int | None = None


class _Refused(Exception):
    pass


class SimPositioner(LineEngine):
    """Mast and/or turntable controller on the shared simulated bench.

    Parameters
    ----------
    state : SimState
        Shared bench pose.
    clock : VirtualClock
        Shared virtual clock.
    roles : tuple of str
        ``("mast",)``, ``("turntable",)`` or both: which commands this controller knows.
    mast_travel_m : tuple of float
        Mechanical travel of the mast, metres.
    mast_speed_m_per_s : float
        Mast speed, m/s.
    turntable_travel_deg : tuple of float
        Mechanical travel of the turntable, degrees.
    turntable_speed_deg_per_s : float
        Turntable speed, deg/s.
    polarization_time_s : float
        Time to turn the antenna between horizontal and vertical, s.
    poll_advance_s : float
        Virtual time one ``BUSY?`` poll stands for while something moves, s.
    banner : str
        Start-up banner.
    """

    def __init__(self, state: SimState, clock: VirtualClock, *,
                 roles: tuple[str, ...] = ("mast", "turntable"),
                 mast_travel_m: tuple[float, float] = (1.0, 4.0), mast_speed_m_per_s: float = 0.1,
                 turntable_travel_deg: tuple[float, float] = (0.0, 360.0),
                 turntable_speed_deg_per_s: float = 6.0, polarization_time_s: float = 4.0,
                 poll_advance_s: float = 0.25, banner: str = "positioner 1.0 (simulated) ready") -> None:
        unknown = set(roles) - {"mast", "turntable"}
        if unknown or not roles:
            raise ValueError(f"roles must be 'mast' and/or 'turntable', found {roles!r}")
        self.state = state
        self.clock = clock
        self.roles = tuple(roles)
        self.mast_travel_m = mast_travel_m
        self.mast_speed_m_per_s = mast_speed_m_per_s
        self.turntable_travel_deg = turntable_travel_deg
        self.turntable_speed_deg_per_s = turntable_speed_deg_per_s
        self.polarization_time_s = polarization_time_s
        self.poll_advance_s = poll_advance_s
        self.banner = banner
        self.faults = PositionerFaults()
        self.received: list[str] = []
        self.bytes_received = 0
        self.motions: list[tuple[str, AxisMotion]] = []  # every move, for tests and logs
        self._lock = threading.RLock()
        with state.lock:
            now_s = clock.now_s()
            self._height = AxisMotion(now_s, now_s, state.mast_height_m, state.mast_height_m)
            self._azimuth = AxisMotion(now_s, now_s, state.azimuth_deg, state.azimuth_deg)
            self._polarization = state.polarization
        self._pol_target = self._polarization
        self._pol_done_s = now_s

    # ------------------------------------------------------------------------- server side

    def handle(self, line: str, emit: Callable[[str], None]) -> None:
        """Act on one received line; reply lines go to ``emit``."""
        with self._lock:
            if not self._record(line):
                return  # hung controller: no action, no reply
            self._catch_up()
            try:
                for reply in self._dispatch(line.strip().upper()):
                    emit(reply)
                emit("ok")
            except _Refused as exc:
                emit(f"error: {exc}")
            self._catch_up()

    def serve_tcp(self, port: int = 0) -> TcpLineServer:
        """Start a loopback TCP server for this controller and return it (``.url``)."""
        server = TcpLineServer(self, port=port)
        server.start()
        return server

    def serve_pty(self) -> PtyLineServer:
        """Start a pseudo-terminal server for this controller and return it (``.path``)."""
        server = PtyLineServer(self)
        server.start()
        return server

    # ---------------------------------------------------------------------------- commands

    def _dispatch(self, text: str) -> list[str]:
        now_s = self.clock.now_s()
        match = _SET.match(text)
        if match:
            self._set(match.group(1), float(match.group(2)), now_s)
            return []
        if text == "HEIGHT?" and "mast" in self.roles:
            return [f"HEIGHT {self._height.value_at(now_s) * 1e3:.1f}"]
        if text == "AZIM?" and "turntable" in self.roles:
            return [f"AZIM {self._azimuth.value_at(now_s):.1f}"]
        if text == "POL?" and "mast" in self.roles:
            return [f"POL {self._polarization[0].upper()}"]
        if text.startswith("POL ") and "mast" in self.roles:
            self._set_polarization(text[4:].strip(), now_s)
            return []
        if text == "BUSY?":
            return [f"BUSY {int(self._poll(now_s))}"]
        if text == "STOP":
            self._stop(now_s)
            return []
        if text == "ID?":
            return [f"ID simulated positioner 1.0 {'+'.join(self.roles)}"]
        raise _Refused(f"unknown command {text!r}")

    def _set(self, word: str, value: float, now_s: float) -> None:
        if word == "HEIGHT" and "mast" in self.roles:
            target, (low, high) = value * 1e-3, self.mast_travel_m
            if not low <= target <= high:
                raise _Refused(f"height {value:g} mm outside travel [{low * 1e3:g}, {high * 1e3:g}] mm")
            self._height = self._motion("mast", self._height, target, self.mast_speed_m_per_s, now_s)
        elif word == "AZIM" and "turntable" in self.roles:
            low, high = self.turntable_travel_deg
            if not low <= value <= high:
                raise _Refused(f"azimuth {value:g} deg outside travel [{low:g}, {high:g}] deg")
            self._azimuth = self._motion("turntable", self._azimuth, value, self.turntable_speed_deg_per_s, now_s)
        else:
            raise _Refused(f"unknown command {word!r}")

    def _motion(self, name: str, current: AxisMotion, target: float, speed: float, now_s: float) -> AxisMotion:
        start = current.value_at(now_s)
        motion = AxisMotion(now_s, now_s + abs(target - start) / speed, start, target)
        self.motions.append((name, motion))
        return motion

    def _set_polarization(self, code: str, now_s: float) -> None:
        if code not in _POL_CODES:
            raise _Refused(f"polarization must be H or V, found {code!r}")
        if _POL_CODES[code] != self._pol_target:
            self._pol_target = _POL_CODES[code]
            self._pol_done_s = now_s + self.polarization_time_s
            self.motions.append(("polarization", AxisMotion(now_s, self._pol_done_s, 0.0, 1.0)))

    def _busy_until_s(self) -> float:
        return max(self._height.t1_s, self._azimuth.t1_s, self._pol_done_s)

    def _poll(self, now_s: float) -> bool:
        end_s = self._busy_until_s()
        if end_s > now_s:
            self.clock.advance(min(self.poll_advance_s, end_s - now_s))
            self._catch_up()
        return end_s > self.clock.now_s()

    def _stop(self, now_s: float) -> None:
        h, a = self._height.value_at(now_s), self._azimuth.value_at(now_s)
        self._height = AxisMotion(now_s, now_s, h, h)
        self._azimuth = AxisMotion(now_s, now_s, a, a)

    def _catch_up(self) -> None:
        """Put the physical pose into the shared state."""
        now_s = self.clock.now_s()
        if now_s >= self._pol_done_s:
            self._polarization = self._pol_target
        with self.state.lock:
            if "mast" in self.roles:
                self.state.mast_height_m = self._height.value_at(now_s)
                self.state.polarization = self._polarization
            if "turntable" in self.roles:
                self.state.azimuth_deg = self._azimuth.value_at(now_s)
