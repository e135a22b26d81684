"""Simulated G-code probe stage (served on a wire by :mod:`bench.sim.lineserver`).

:class:`SimStage` parses G-code lines and answers as a stage controller does (NIST
RS274NGC v3, NISTIR 6556, for G-code; firmware line protocol and banner: from memory): ``ok``
after each line, an error line instead when it refuses. It keeps a planned
position (where buffered moves will end) and a motion queue on the shared virtual clock: a move
takes the time a trapezoidal velocity profile needs, the clock advances when something waits
(``M400``, ``G4``, homing) or when another simulated instrument advances it, and the probe
position in :class:`~bench.sim.state.SimState` follows the motion (under ``state.lock``), so the
simulated analyzer sees the probe where it physically is.

Two dialects, described by what they do (:data:`DIALECTS`):

``cartesian``
    ``G28`` runs the homing cycle; ``G4 P`` in ms (``S`` in s); ``M400`` waits; ``M114``
    reports ``X:.. Y:.. Z:.. A:.. Count X:.. Y:.. Z:..`` (the planned position); ``M115``
    identifies; ``echo:busy: processing`` every 2 s of a long wait; errors ``Error:<text>``,
    and ``!! <text>`` once halted.
``cnc``
    ``$H`` homes (``G28`` goes to the stored home position, homed only); ``G4 P`` in s and
    ``G4 P0`` waits; ``?`` reports ``<Idle|MPos:x,y,z,a|FS:feed,0>`` (the actual position),
    then ``ok``; ``$I`` identifies; errors ``error:<code>`` with the codes of
    :data:`ERROR_CODES`.
``cnc-realtime``
    As ``cnc``, but ``?`` is a real-time status query: it is answered by the status line alone,
    with no ``ok`` (a profile marks it in ``[handshake] no_ok``).

Homing: Z rises to the top of its travel first, then X and Y go to their minimum; the home
position is (x_min, y_min, z_max), angle 0.

Serving: :class:`TcpLineServer` (``socket://127.0.0.1:<port>``, banner on every connection) and
:class:`PtyLineServer` (a pseudo-terminal; pyserial opens its ``path`` as a serial device path,
e.g. ``/dev/pts/7``). pyserial flushes the input queue when it opens a port, which would eat a
banner written earlier; the pty runs in packet mode and takes that flush as "a client opened the
port" and prints the banner again, like a board that resets when the port opens.
"""

from __future__ import annotations

import dataclasses
import math
import re
import threading
from collections.abc import Callable
from dataclasses import dataclass

from bench.sim.clock import VirtualClock
from bench.sim.lineserver import LineEngine, PtyLineServer, TcpLineServer
from bench.sim.state import SimState

__all__ = [
    "DIALECTS",
    "ERROR_CODES",
    "MoveSegment",
    "PtyLineServer",
    "SimDialect",
    "SimStage",
    "StageFaults",
    "TcpLineServer",
    "trapezoid_distance_m",
    "trapezoid_time_s",
]

#: Error numbers of the simulated controller (the cnc dialect sends only the number).
ERROR_CODES = {
    "unknown": 1,        # unknown or unsupported command
    "number": 2,         # bad number format
    "not_homed": 3,      # move before homing
    "travel": 4,         # target outside travel
    "halted": 5,         # emergency stop was received
    "line": 6,           # line number or checksum mismatch
}

_WORD = re.compile(r"([A-Z])\s*([-+]?(?:\d+\.?\d*|\.\d+))")
_WORDS_ONLY = re.compile(r"^(?:\s*[A-Z]\s*[-+]?(?:\d+\.?\d*|\.\d+))*\s*$")
_NUMBERED = re.compile(r"^N(?P<n>\d+)\s+(?P<body>.*?)(?:\*(?P<cs>\d+))?$")
_EPS_M = 1e-9


# ------------------------------------------------------------------------------- kinematics


def trapezoid_time_s(distance: float, v_max: float, accel: float) -> float:
    """Time of a rest-to-rest move with a trapezoidal (or triangular) velocity profile.

    With ramp distance ``v_max**2 / accel`` (accelerate and decelerate): if the move is longer,
    ``t = d / v_max + v_max / accel`` (trapezoid); otherwise the peak speed ``sqrt(d * accel)``
    is never reached and ``t = 2 * sqrt(d / accel)`` (triangle). Constant-acceleration
    kinematics, s = a t^2 / 2 on each ramp. Any consistent units (m or deg).
    """
    if distance <= 0:
        return 0.0
    if distance >= v_max * v_max / accel:
        return distance / v_max + v_max / accel
    return 2.0 * math.sqrt(distance / accel)


def trapezoid_distance_m(t_s: float, distance: float, v_max: float, accel: float) -> float:
    """Distance covered ``t_s`` after the start of the move :func:`trapezoid_time_s` describes."""
    total_s = trapezoid_time_s(distance, v_max, accel)
    if t_s <= 0:
        return 0.0
    if t_s >= total_s:
        return distance
    v_peak = min(v_max, math.sqrt(distance * accel))
    ramp_s = v_peak / accel
    if t_s <= ramp_s:
        return 0.5 * accel * t_s * t_s
    cruise_end_s = total_s - ramp_s
    if t_s <= cruise_end_s:
        return 0.5 * v_peak * ramp_s + v_peak * (t_s - ramp_s)
    left_s = total_s - t_s
    return distance - 0.5 * accel * left_s * left_s


# ---------------------------------------------------------------------------------- dialects


@dataclass(frozen=True)
class SimDialect:
    """How one family of controllers spells things (see the module docstring)."""

    name: str
    banner: str
    home_word: str            # "G28" or "$H"
    dwell_p_unit_s: float     # seconds per unit of G4 P
    wait_m400: bool           # M400 is understood
    report: str               # "m114" or "status"
    identify_word: str        # "M115" or "$I"
    busy_interval_s: float | None  # keep-alive period during long waits (virtual s)
    numbered_errors: bool     # "error:<code>" instead of "Error:<text>"
    status_ok: bool = True    # the "?" status report is followed by "ok" (False: the line alone)


_CNC = SimDialect("cnc", "motion controller 1.0 (simulated) ready", "$H", 1.0, False, "status", "$I", None, True)

DIALECTS = {
    "cartesian": SimDialect("cartesian", "start", "G28", 1e-3, True, "m114", "M115", 2.0, False),
    "cnc": _CNC,
    "cnc-realtime": dataclasses.replace(_CNC, name="cnc-realtime", status_ok=False),
}


@dataclass
class StageFaults:
    """Faults to inject into :class:`SimStage` (change them at any time).

    Attributes
    ----------
    silent_after_commands : int or None
        Once this many commands were received, the controller stops answering (no ``ok``).
    reported_offset_m : tuple of float
        Added to the reported X, Y, Z (a slipping or mis-calibrated axis).
    """

    silent_after_commands: int | None = None
    reported_offset_m: tuple[float, float, float] = (0.0, 0.0, 0.0)


@dataclass(frozen=True)
class MoveSegment:
    """One move on the virtual timeline, machine coordinates (x, y, z in m, a in deg)."""

    t0_s: float
    t1_s: float
    start: tuple[float, float, float, float]
    end: tuple[float, float, float, float]
    speed: float
    accel: float
    rotary_only: bool = False

    def position_at(self, t_s: float) -> tuple[float, ...]:
        """Interpolated position at virtual time ``t_s`` along the trapezoidal profile."""
        if t_s >= self.t1_s:
            return self.end
        if t_s <= self.t0_s:
            return self.start
        axes = slice(3, 4) if self.rotary_only else slice(0, 3)
        length = math.dist(self.start[axes], self.end[axes])
        moved = trapezoid_distance_m(t_s - self.t0_s, length, self.speed, self.accel)
        frac = moved / length if length > 0 else (t_s - self.t0_s) / (self.t1_s - self.t0_s)
        return tuple(s + frac * (e - s) for s, e in zip(self.start, self.end))


class _Refused(Exception):
    def __init__(self, kind: str, text: str) -> None:
        super().__init__(text)
        self.kind = kind
        self.text = text


# ------------------------------------------------------------------------------- the stage


class SimStage(LineEngine):
    """A G-code stage controller acting on the shared simulated bench.

    Parameters
    ----------
    state : SimState
        Shared pose of the bench; ``probe_m``, ``probe_rotation_deg``, ``tool`` and ``homed``
        are written under ``state.lock``.
    clock : VirtualClock
        Shared virtual clock.
    limits_m : dict, optional
        Travel of each axis, ``{"x": (min, max), "y": ..., "z": ...}``, metres.
    accel_m_per_s2 : float
        Acceleration of the linear axes, m/s^2.
    max_feed_m_per_s : float
        Highest speed (``G0`` moves at this speed), m/s.
    banner : str, optional
        Start-up banner (default: the dialect's).
    dialect : str or SimDialect
        ``"cartesian"``, ``"cnc"`` or ``"cnc-realtime"`` (see :data:`DIALECTS`).
    rotary_axis : bool
        The stage has an A axis.
    max_rotary_deg_per_s, rotary_accel_deg_per_s2 : float
        Rotary rate limit and acceleration.
    homing_feed_m_per_s : float
        Speed of the homing cycle, m/s.
    tool_change_s : float
        Time a tool change takes, s.
    planner_slots : int
        Moves the controller buffers before it holds back its ``ok``.
    """

    def __init__(self, state: SimState, clock: VirtualClock, *,
                 limits_m: dict[str, tuple[float, float]] | None = None,
                 accel_m_per_s2: float = 0.5, max_feed_m_per_s: float = 0.05,
                 banner: str | None = None, dialect: str | SimDialect = "cartesian",
                 rotary_axis: bool = True, max_rotary_deg_per_s: float = 180.0,
                 rotary_accel_deg_per_s2: float = 720.0, homing_feed_m_per_s: float = 0.02,
                 tool_change_s: float = 5.0, planner_slots: int = 16) -> None:
        self.state = state
        self.clock = clock
        self.dialect = DIALECTS[dialect] if isinstance(dialect, str) else dialect
        self.limits_m = dict(limits_m or {"x": (0.0, 0.3), "y": (0.0, 0.2), "z": (0.0, 0.06)})
        self.accel_m_per_s2 = accel_m_per_s2
        self.max_feed_m_per_s = max_feed_m_per_s
        self.banner = banner if banner is not None else self.dialect.banner
        self.rotary_axis = rotary_axis
        self.max_rotary_deg_per_s = max_rotary_deg_per_s
        self.rotary_accel_deg_per_s2 = rotary_accel_deg_per_s2
        self.homing_feed_m_per_s = homing_feed_m_per_s
        self.tool_change_s = tool_change_s
        self.planner_slots = planner_slots
        self.faults = StageFaults()
        self.received: list[str] = []
        self.replies: list[str] = []
        self.bytes_received = 0
        self.trajectory: list[MoveSegment] = []
        self._lock = threading.RLock()
        self._queue: list[MoveSegment] = []
        with state.lock:
            x, y, z = state.probe_m
            self._planned = (x, y, z, state.probe_rotation_deg)
        self._offset = (0.0, 0.0, 0.0, 0.0)
        self._homed_axes: set[str] = set()
        self._absolute = True
        self._unit_m = 1e-3
        self._feed_m_per_s = max_feed_m_per_s
        self._motion = "G1"
        self._selected_tool = 0
        self._halted = False
        self._next_line = 0

    # ----------------------------------------------------------------------- server side

    def handle(self, line: str, emit: Callable[[str], None]) -> None:
        """Act on one received line; reply lines go to ``emit`` (without terminator) and ``replies``."""
        with self._lock:
            if not self._record(line):
                return  # hung controller: no action, no reply

            def send(text: str) -> None:
                self.replies.append(text)
                emit(text)

            self._handle(line, send)

    def _handle(self, line: str, emit: Callable[[str], None]) -> None:
        """One line, under the lock: numbering, halt state, dispatch; a refusal becomes an error line."""
        try:
            body = self._check_numbering(line, emit)
            if body is None:
                return
            if self._halted:
                raise _Refused("halted", "halted by emergency stop, reset required")
            self._dispatch(body, emit)
        except _Refused as refusal:
            emit(self._error_line(refusal))

    # ------------------------------------------------------------------------- parsing

    def _error_line(self, refusal: _Refused) -> str:
        if self.dialect.numbered_errors:
            return f"error:{ERROR_CODES[refusal.kind]}"
        return f"!! {refusal.text}" if self._halted else f"Error:{refusal.text}"

    def _check_numbering(self, line: str, emit) -> str | None:
        text = line.split(";", 1)[0].strip()
        match = _NUMBERED.match(text)
        if not match:
            return text
        body = match.group("body").strip()
        if match.group("cs") is not None:
            head = text[: text.rindex("*")]
            cs = 0
            for byte in head.encode("ascii", errors="replace"):
                cs ^= byte
            if cs != int(match.group("cs")):
                emit(f"Resend: {self._next_line}")
                emit("ok")
                return None
        number = int(match.group("n"))
        if body.upper().startswith("M110"):
            self._next_line = number + 1
            return body
        if number != self._next_line:
            raise _Refused("line", f"line number {number}, expected {self._next_line}")
        self._next_line = number + 1
        return body

    def _dispatch(self, body: str, emit) -> None:
        text = re.sub(r"\([^)]*\)", "", body).strip().upper()
        if not text:
            emit("ok")
            return
        if text.startswith("$") or text == "?":
            self._dollar(text, emit)
            return
        if not _WORDS_ONLY.match(text):
            raise _Refused("number", f"cannot read {body!r}")
        words = [(letter, float(value)) for letter, value in _WORD.findall(text)]
        self._execute(words, emit)

    def _dollar(self, text: str, emit) -> None:
        d = self.dialect
        if d.home_word == "$H" and text == "$H":
            self._home({"x", "y", "z"}, emit)
        elif d.identify_word == "$I" and text == "$I":
            emit("[VER:simulated-stage 1.0]")
        elif d.report == "status" and text == "?":
            emit(self._status_line())
            if not d.status_ok:
                return  # a real-time query: the status line is the whole answer
        else:
            raise _Refused("unknown", f"unknown command {text!r}")
        emit("ok")

    def _execute(self, words: list[tuple[str, float]], emit) -> None:
        letters = {letter for letter, _ in words}
        g_codes = [v for letter, v in words if letter == "G"]
        m_codes = [v for letter, v in words if letter == "M"]
        values = {letter: v for letter, v in words if letter not in "GM"}
        if "T" in values:
            self._selected_tool = int(values["T"])
        for m in m_codes:
            self._m_code(m, values, emit)
        motion = None
        for g in g_codes:
            motion = self._g_code(g, values, letters, emit) or motion
        if "F" in values:
            self._feed_m_per_s = values["F"] * self._unit_m / 60.0  # F: units/min (RS274NGC)
        axes = letters & {"X", "Y", "Z", "A"}
        if axes and (motion or not g_codes and not m_codes):
            self._move(motion or self._motion, values, emit)
        emit("ok")

    def _m_code(self, m: float, values: dict, emit) -> None:
        d = self.dialect
        if m == 400 and d.wait_m400:
            self._drain(emit)
        elif m == 114 and d.report == "m114":
            emit(self._m114_line())
        elif m == 115 and d.identify_word == "M115":
            emit("FIRMWARE:simulated-stage 1.0 DIALECT:cartesian AXES:XYZ" + ("A" if self.rotary_axis else ""))
        elif m in (18, 84):
            self._drain(emit)
            self._homed_axes.clear()
            with self.state.lock:
                self.state.homed = False
        elif m == 112:
            self._halted = True
            self._queue.clear()
            raise _Refused("halted", "emergency stop")
        elif m == 6:
            self._drain(emit)
            self._wait_s(self.tool_change_s, emit)
            with self.state.lock:
                self.state.tool = self._selected_tool
        elif m in (110, 2, 30):
            pass
        else:
            raise _Refused("unknown", f"unsupported M{m:g}")

    def _g_code(self, g: float, values: dict, letters: set, emit) -> str | None:
        d = self.dialect
        if g in (0, 1):
            self._motion = f"G{g:g}"
            return self._motion
        if g == 4:
            self._drain(emit)
            seconds = values.get("P", 0.0) * d.dwell_p_unit_s + values.get("S", 0.0)
            self._wait_s(seconds, emit)
        elif g in (20, 21):
            self._unit_m = 25.4e-3 if g == 20 else 1e-3
        elif g in (90, 91):
            self._absolute = g == 90
        elif g == 92:
            self._set_position(values, letters)
        elif g == 28 and d.home_word == "G28":
            axes = {a.lower() for a in letters & {"X", "Y", "Z"}} or {"x", "y", "z"}
            self._home(axes, emit)
        elif g == 28:
            self._require_homed()
            hx, hy, hz = self._home_position()
            self._enqueue((hx, hy, hz, self._planned[3]), self.max_feed_m_per_s)
        else:
            raise _Refused("unknown", f"unsupported G{g:g}")
        return None

    # -------------------------------------------------------------------------- motion

    def _home_position(self) -> tuple[float, float, float]:
        return self.limits_m["x"][0], self.limits_m["y"][0], self.limits_m["z"][1]

    def _require_homed(self) -> None:
        if self._homed_axes != {"x", "y", "z"}:
            raise _Refused("not_homed", "not homed, home first")

    def _home(self, axes: set[str], emit) -> None:
        self._drain(emit)
        hx, hy, hz = self._home_position()
        x, y, z, a = self._planned
        if "z" in axes:
            self._enqueue((x, y, hz, a), self.homing_feed_m_per_s)
            z = hz
        nx = hx if "x" in axes else x
        ny = hy if "y" in axes else y
        self._enqueue((nx, ny, z, 0.0 if axes == {"x", "y", "z"} else a), self.homing_feed_m_per_s)
        self._drain(emit)
        self._homed_axes |= axes
        self._offset = (0.0, 0.0, 0.0, 0.0)
        with self.state.lock:
            self.state.homed = self._homed_axes == {"x", "y", "z"}

    def _target(self, values: dict) -> tuple[float, float, float, float]:
        target = list(self._planned)
        for i, letter in enumerate("XYZA"):
            if letter not in values:
                continue
            scale = 1.0 if letter == "A" else self._unit_m
            delta = values[letter] * scale
            target[i] = (target[i] + delta) if not self._absolute else (delta + self._offset[i])
        return tuple(target)

    def _move(self, motion: str, values: dict, emit) -> None:
        self._require_homed()
        if "A" in values and not self.rotary_axis:
            raise _Refused("unknown", "no A axis on this stage")
        target = self._target(values)
        for i, axis in enumerate("xyz"):
            low, high = self.limits_m[axis]
            if not low - _EPS_M <= target[i] <= high + _EPS_M:
                raise _Refused("travel", f"{axis.upper()}{target[i] * 1e3:.3f} mm outside travel "
                                         f"[{low * 1e3:g}, {high * 1e3:g}] mm")
        speed = self.max_feed_m_per_s if motion == "G0" else min(self._feed_m_per_s, self.max_feed_m_per_s)
        if "F" in values and motion != "G0":
            speed = min(values["F"] * self._unit_m / 60.0, self.max_feed_m_per_s)
        self._make_room(emit)
        self._enqueue(target, speed, rotary_rate=(values.get("F", 0.0) / 60.0) or None)

    def _enqueue(self, target, speed_m_per_s: float, *, rotary_rate: float | None = None) -> None:
        start = self._planned
        now_s = self.clock.now_s()
        t0 = max([now_s] + [s.t1_s for s in self._queue])
        linear_m = math.dist(start[:3], target[:3])
        turn_deg = abs(target[3] - start[3])
        rate = min(rotary_rate or self.max_rotary_deg_per_s, self.max_rotary_deg_per_s)
        if linear_m > 0:
            # a rotary component follows the linear move, at most at its own limits
            duration = max(trapezoid_time_s(linear_m, speed_m_per_s, self.accel_m_per_s2),
                           trapezoid_time_s(turn_deg, self.max_rotary_deg_per_s, self.rotary_accel_deg_per_s2))
            seg = MoveSegment(t0, t0 + duration, start, tuple(target), speed_m_per_s, self.accel_m_per_s2)
        else:
            # rotary-only move: F means degrees per minute (RS274NGC)
            duration = trapezoid_time_s(turn_deg, rate, self.rotary_accel_deg_per_s2)
            seg = MoveSegment(t0, t0 + duration, start, tuple(target), rate, self.rotary_accel_deg_per_s2, True)
        self._planned = tuple(target)
        if duration > 0:
            self._queue.append(seg)
            self.trajectory.append(seg)

    def _make_room(self, emit) -> None:
        """A full planner holds back the ``ok`` until the oldest move ends."""
        self._catch_up()
        while len(self._queue) >= self.planner_slots:
            self._wait_until(self._queue[0].t1_s, emit)

    def _drain(self, emit) -> None:
        """Wait until every buffered move has ended (``M400``, ``G4``)."""
        if self._queue:
            self._wait_until(self._queue[-1].t1_s, emit)
        self._catch_up()

    def _wait_until(self, t_end_s: float, emit) -> None:
        self._wait_s(t_end_s - self.clock.now_s(), emit)

    def _wait_s(self, seconds: float, emit) -> None:
        """Advance the clock by ``seconds``, with keep-alive lines in the dialects that send them."""
        interval = self.dialect.busy_interval_s
        left = max(0.0, seconds)
        while interval is not None and left > interval:
            self.clock.advance(interval)
            left -= interval
            self._catch_up()
            emit("echo:busy: processing")
        if left > 0:
            self.clock.advance(left)
        self._catch_up()

    def _catch_up(self) -> None:
        """Drop ended moves and put the physical probe position into the shared state."""
        now_s = self.clock.now_s()
        position = self._actual(now_s)
        self._queue = [s for s in self._queue if s.t1_s > now_s]
        with self.state.lock:
            self.state.probe_m = list(position[:3])
            self.state.probe_rotation_deg = position[3]

    def _actual(self, now_s: float) -> tuple[float, ...]:
        for seg in self._queue:
            if seg.t1_s > now_s:
                return seg.position_at(now_s)
        return self._planned

    def _set_position(self, values: dict, letters: set) -> None:
        offset = list(self._offset)
        given = letters & {"X", "Y", "Z", "A"} or {"X", "Y", "Z", "A"}
        for i, letter in enumerate("XYZA"):
            if letter in given:
                scale = 1.0 if letter == "A" else self._unit_m
                offset[i] = self._planned[i] - values.get(letter, 0.0) * scale
        self._offset = tuple(offset)

    # ------------------------------------------------------------------------- reports

    def _reported(self, machine) -> tuple[float, float, float, float]:
        off = self.faults.reported_offset_m
        return tuple(machine[i] - self._offset[i] + (off[i] if i < 3 else 0.0) for i in range(4))

    def _m114_line(self) -> str:
        x, y, z, a = self._reported(self._planned)
        counts = [round(v * 1e3 * s) for v, s in zip(self._planned[:3], (80, 80, 400))]  # steps/mm
        a_text = f" A:{a:.2f}" if self.rotary_axis else ""
        return (f"X:{x * 1e3:.2f} Y:{y * 1e3:.2f} Z:{z * 1e3:.2f}{a_text} "
                f"Count X:{counts[0]} Y:{counts[1]} Z:{counts[2]}")

    def _status_line(self) -> str:
        self._catch_up()
        now_s = self.clock.now_s()
        x, y, z, a = self._reported(self._actual(now_s))
        word = "Alarm" if self._homed_axes != {"x", "y", "z"} else ("Run" if self._queue else "Idle")
        a_text = f",{a:.3f}" if self.rotary_axis else ""
        feed = self._feed_m_per_s * 60e3
        return f"<{word}|MPos:{x * 1e3:.3f},{y * 1e3:.3f},{z * 1e3:.3f}{a_text}|FS:{feed:.0f},0>"

    # ----------------------------------------------------------------------- serving

    def serve_tcp(self, port: int = 0) -> "TcpLineServer":
        """Start a loopback TCP server for this stage and return it (``.port``, ``.url``)."""
        server = TcpLineServer(self, port=port)
        server.start()
        return server

    def serve_pty(self) -> "PtyLineServer":
        """Start a pseudo-terminal server for this stage and return it (``.path``)."""
        server = PtyLineServer(self)
        server.start()
        return server
