"""XYZ(A) probe stage driven over G-code, with the bench's safety rules enforced in code.

The driver is generic; the dialect (command spellings, homing command, dwell unit, position
report format, reply patterns, deadlines) comes from a TOML profile such as
``gcode-cartesian`` or ``gcode-cnc``. Millimetres and mm/min appear only in the G-code text;
everything else is metres, seconds and degrees.

The profile is a frozen model (:class:`StageProfile`) read by
:func:`bench.drivers.profile.load_profile`: a misspelt key is refused with file, line and a
suggestion.

Safety rules (from the bench file's ``[stage]`` table, given as :class:`StageLimits`, the one
type :mod:`bench.benchfile` produces, ``bench.stage.safety_limits``):

* a target outside the soft limits, the rotary (A) limits included, is refused with
  :class:`~bench.errors.SafetyLimitError` before a single byte is sent;
* no move before the stage has been homed in this session;
* an XY move happens at the travel height: Z goes up to ``safe_z`` first (never down to it
  when already higher), then XY, then Z down to the target;
* the feed never exceeds ``max_feed``; ``G0`` (firmware maximum speed) is never sent;
* after every move the driver waits for the motion to end and checks the reported position
  against the target within ``position_tolerance``.
"""

from __future__ import annotations

import math
from typing import Annotated, Literal

import pydantic
from pydantic import Field, StrictFloat, StrictInt

from bench.drivers.lineproto import LineConversation, LineDeviceProfile
from bench.drivers.profile import ProfileTable, duration, pattern_with, template_with
from bench.errors import InstrumentError, PlanError, SafetyLimitError
from bench.stagelimits import StageLimits
from bench.tomlsource import cross_check_error, format_value, quantity
from bench.transports import open_transport

__all__ = ["StageCommands", "StageLimits", "StagePosition", "StageProfile", "StageRotary", "StageTiming",
           "Stage", "plan_path"]

_AXES = ("x", "y", "z")


# --------------------------------------------------------------------------------- profile


class StageCommands(ProfileTable):
    """``[commands]``: G-code spellings; templates hold exactly the ``{fields}`` named.

    Attributes
    ----------
    units_mm, absolute : str
        Select millimetres and absolute coordinates (sent after the banner).
    home : str
        Homing command (awaited up to ``[timing] home_timeout``).
    move : str
        ``{axes}`` (only the axes that change) and ``{feed}`` (mm/min, or deg/min for a rotation).
    wait : str
        Waits until buffered moves end; its ``ok`` means the motion is over.
    position : str
        Position report.
    identify : str
        Identification (optional).
    dwell : str
        Pause, ``{dwell}`` in ``dwell_unit`` (``"s"`` or ``"ms"``).
    tool_change : str
        Mount probe ``{tool}``.
    motors_off, emergency_stop : str
        Switch the motors off; stop at once (both clear the homed state).
    line_number_reset : str
        Resets the line counter when ``[handshake] line_numbers`` is true (optional).
    """

    units_mm: template_with()
    absolute: template_with()
    home: template_with()
    move: template_with("axes", "feed")
    wait: template_with()
    position: template_with()
    identify: template_with() = "M115"
    dwell: template_with("dwell")
    dwell_unit: Literal["s", "ms"]
    tool_change: template_with("tool")
    motors_off: template_with()
    emergency_stop: template_with()
    line_number_reset: template_with() = "M110 N0"

    def __getitem__(self, key: str) -> str:
        """Mapping-style access by key name (``commands["home"]``)."""
        return getattr(self, key)


class StagePosition(ProfileTable):
    """``[position]``: the report pattern (groups ``x``, ``y``, ``z`` in mm, optional ``a`` in deg)."""

    reply: pattern_with("x", "y", "z")
    decimals: Annotated[StrictInt, Field(ge=0, le=6)] = 3


class StageRotary(ProfileTable):
    """``[rotary]``: letter of the rotary axis, rotation rate (deg/s), accepted angle error (deg)."""

    axis: Literal["A", "B", "C"] = "A"
    feed_deg_per_s: quantity("angular_speed", positive=True) = Field(90.0, alias="feed")
    tolerance_deg: quantity("angle", positive=True, at_most="360 deg") = Field(0.1, alias="tolerance")


class StageTiming(ProfileTable):
    """``[timing]``: reply deadlines (s), lowest acceleration expected (m/s^2), move deadline terms.

    The deadline of a move is ``move_time_factor * (d/v + v/a) + move_time_margin``.
    """

    home_timeout_s: duration() = Field(180.0, alias="home_timeout")
    tool_change_timeout_s: duration() = Field(60.0, alias="tool_change_timeout")
    accel_m_per_s2: quantity("acceleration", positive=True) = Field(0.1, alias="accel")
    move_time_factor: Annotated[StrictFloat, Field(ge=1.0, le=100.0)] = 1.5  # more would wait for ever
    move_time_margin_s: duration(positive=False) = Field(10.0, alias="move_time_margin")


class StageProfile(LineDeviceProfile):
    """A G-code dialect, read from a ``kind = "gcode-stage"`` profile by :meth:`load`.

    Attributes
    ----------
    connection : LineConnection
        Port settings (``[connection]``).
    handshake : Handshake
        Reply patterns and deadlines (``[handshake]``).
    commands : StageCommands
        Command spellings (``[commands]``).
    position : StagePosition
        Position report pattern and decimals of millimetre values in G-code words.
    rotary : StageRotary
        Rotary axis letter, rate and tolerance.
    timing : StageTiming
        Deadlines and the acceleration used for them and for the planner's estimate.
    """

    kind: Literal["gcode-stage"]
    commands: StageCommands
    position: StagePosition
    rotary: StageRotary = StageRotary()
    timing: StageTiming = StageTiming()

    @property
    def accel_m_per_s2(self) -> float:
        """Lowest acceleration expected, m/s^2 (``[timing] accel``)."""
        return self.timing.accel_m_per_s2

    @pydantic.model_validator(mode="after")
    def _no_ok_only_for_queries(self) -> "StageProfile":
        queries = (self.commands.position, self.commands.identify)
        problems = [(("handshake", "no_ok", i), f"expected the position or identify command (the only "
                                               f"ones without an ok), found {format_value(text)}")
                    for i, text in enumerate(self.handshake.no_ok) if text not in queries]
        if problems:
            raise cross_check_error(problems)
        return self


# ------------------------------------------------------------------------------ path plan


def plan_path(start_m: tuple[float, float, float], target_m: tuple[float, float, float],
              safe_z_m: float, tolerance_m: float) -> list[tuple[float, float, float]]:
    """Waypoints from ``start_m`` to ``target_m`` that keep XY travel at the safe height.

    Parameters
    ----------
    start_m, target_m : tuple of float
        (x, y, z) in stage coordinates, metres.
    safe_z_m : float
        Travel height; XY travel happens at ``max(start z, safe_z_m)``.
    tolerance_m : float
        XY changes no larger than this count as "no XY move".

    Returns
    -------
    list of tuple
        Waypoints after the start, the last one being ``target_m``.
    """
    sx, sy, sz = start_m
    tx, ty, tz = target_m
    if math.hypot(tx - sx, ty - sy) <= tolerance_m:
        return [target_m]
    travel_z_m = max(sz, safe_z_m)
    points = []
    if travel_z_m != sz:
        points.append((sx, sy, travel_z_m))
    points.append((tx, ty, travel_z_m))
    if tz != travel_z_m:
        points.append(target_m)
    return points


# ----------------------------------------------------------------------------------- stage


class Stage:
    """A G-code XYZ(A) stage.

    Parameters
    ----------
    transport : Transport
        Open line transport (``bench.transports.open_transport``).
    profile : StageProfile
        The controller's dialect.
    limits : StageLimits
        This bench's soft limits, travel height, maximum feed and tolerance.

    Notes
    -----
    The constructor does no I/O; call :meth:`connect` first. One owner per stage.
    """

    def __init__(self, transport, profile: StageProfile, limits: StageLimits) -> None:
        self.profile = profile
        self.limits = limits
        self._conv = LineConversation(transport, profile.handshake)
        self._homed = False
        self._position: tuple[float, float, float, float | None] | None = None

    @classmethod
    def open(cls, address: str, profile: StageProfile, limits: StageLimits, *,
             baudrate: int | None = None) -> "Stage":
        """Open the transport ``address`` names and wrap it (no G-code sent yet)."""
        return cls(open_transport(address, profile.transport_settings(baudrate)), profile, limits)

    @property
    def address(self) -> str:
        """Address of the controller."""
        return self._conv.address

    @property
    def homed(self) -> bool:
        """True once :meth:`home` succeeded (and motors were not switched off since)."""
        return self._homed

    # ---------------------------------------------------------------------------- set-up

    def connect(self) -> str:
        """Read the start-up banner, then select millimetres and absolute coordinates.

        Returns
        -------
        str
            The banner line ('' when the dialect has none).
        """
        banner = self._conv.read_banner()
        if self.profile.handshake.line_numbers:
            self._conv.reset_line_numbers(self.profile.commands.line_number_reset)
        self._send("units_mm")
        self._send("absolute")
        return banner

    initialize = connect

    def identify(self) -> str:
        """The controller's identification lines, joined with ``'; '``."""
        reply = self._conv.command(self.profile.commands.identify)
        return "; ".join(reply.lines) or reply.ok_text

    def home(self) -> tuple[float, ...]:
        """Run the homing command, then read the position.

        Returns
        -------
        tuple of float
            Position after homing, as :meth:`position` returns it.
        """
        self._position = None
        self._conv.command(self.profile.commands.home, timeout_s=self.profile.timing.home_timeout_s)
        self._homed = True
        return self.position()

    # ----------------------------------------------------------------------------- moves

    def move_to(self, x_m: float, y_m: float, z_m: float, *,
                feed_m_per_s: float | None = None) -> tuple[float, ...]:
        """Move the probe to (x, y, z), XY travel at the safe height; verify the position.

        Parameters
        ----------
        x_m, y_m, z_m : float
            Target in stage coordinates, metres.
        feed_m_per_s : float, optional
            Feed, m/s; default and ceiling: the bench's ``max_feed``.

        Returns
        -------
        tuple of float
            Reported position after the move (see :meth:`position`).

        Raises
        ------
        SafetyLimitError
            Target outside the soft limits or feed above ``max_feed`` (nothing sent).
        PlanError
            The stage is not homed (nothing sent).
        InstrumentError
            The controller refused, or the reported position misses the target.
        """
        target_m = (float(x_m), float(y_m), float(z_m))
        for axis, value in zip(_AXES, target_m):
            self._check_axis(axis, value)
        feed = self._feed(feed_m_per_s)
        self._require_homed("move")
        start = self._known_position()
        waypoints = plan_path(start[:3], target_m, self.limits.safe_z_m, self.limits.position_tolerance_m)
        self._run_linear(start[:3], waypoints, feed)
        return self._verify(target_m, None)

    def rotate_to(self, angle_deg: float, *, rate_deg_per_s: float | None = None) -> tuple[float, ...]:
        """Turn the probe with the rotary axis; below the safe height, lift first and come back.

        Parameters
        ----------
        angle_deg : float
            Target angle, degrees.
        rate_deg_per_s : float, optional
            Rotation rate, deg/s (default: the profile's).

        Raises
        ------
        PlanError
            The bench has no rotary axis, or the stage is not homed.
        SafetyLimitError
            Angle outside the rotary limits.
        """
        if not self.limits.rotary_axis:
            raise PlanError(f"{self.address}: the stage has no rotary axis (bench file: rotary_axis = false); "
                            f"cannot turn the probe to {angle_deg:g} deg")
        low, high = self.limits.a_deg
        if not low <= angle_deg <= high:
            raise SafetyLimitError(f"stage {self.profile.rotary.axis} target {angle_deg:g} deg outside "
                                   f"the rotary limits [{low:g}, {high:g}] deg")
        rate = rate_deg_per_s or self.profile.rotary.feed_deg_per_s
        self._require_homed("rotate")
        start = self._known_position()
        x, y, z = start[:3]
        lift = z < self.limits.safe_z_m
        feed = self.limits.max_feed_m_per_s
        if lift:
            self._run_linear((x, y, z), [(x, y, self.limits.safe_z_m)], feed)
        self._rotate(start[3] or 0.0, angle_deg, rate)
        if lift:
            self._run_linear((x, y, self.limits.safe_z_m), [(x, y, z)], feed)
        return self._verify((x, y, z), angle_deg)

    def select_tool(self, tool: int) -> None:
        """Mount probe ``tool`` (``T<n> M6``), lifting to the safe height first when homed."""
        if not isinstance(tool, int) or isinstance(tool, bool) or tool < 0:
            raise PlanError(f"tool number must be an integer >= 0, found {tool!r}")
        if self._homed:
            start = self._known_position()
            if start[2] < self.limits.safe_z_m:
                x, y, _ = start[:3]
                self._run_linear(start[:3], [(x, y, self.limits.safe_z_m)], self.limits.max_feed_m_per_s)
        self._position = None
        self._conv.command(self.profile.commands.tool_change.format(tool=tool),
                           timeout_s=self.profile.timing.tool_change_timeout_s)

    def dwell(self, seconds: float) -> None:
        """Let the controller pause (after buffered moves end) for ``seconds``."""
        if seconds < 0:
            raise PlanError(f"dwell must be >= 0 s, found {seconds:g} s")
        value = seconds * 1e3 if self.profile.commands.dwell_unit == "ms" else seconds
        text = self.profile.commands.dwell.format(dwell=f"{value:.6g}")
        self._conv.command(text, timeout_s=seconds + self.profile.handshake.timeout_s)

    def position(self) -> tuple[float, ...]:
        """Wait for the motion to end, then read the position.

        Returns
        -------
        tuple of float
            (x_m, y_m, z_m), plus the angle in degrees when the bench has a rotary axis.
        """
        self._wait(self.profile.handshake.timeout_s)
        pos = self._report()
        self._position = pos
        return pos[:3] + ((pos[3] or 0.0,) if self.limits.rotary_axis else ())

    def motors_off(self) -> None:
        """Switch the motors off; the stage must be homed again before moving."""
        self._homed = False
        self._position = None
        self._send("motors_off")

    def emergency_stop(self) -> None:
        """Send the emergency stop and wait for nothing; the controller needs a reset after."""
        self._homed = False
        self._position = None
        self._conv.send_without_reply(self.profile.commands.emergency_stop)

    def close(self) -> None:
        """Close the transport (the stage stays where it is)."""
        self._conv.transport.close()

    # --------------------------------------------------------------------------- helpers

    def _send(self, key: str, timeout_s: float | None = None):
        return self._conv.command(self.profile.commands[key], timeout_s=timeout_s)

    def _check_axis(self, axis: str, value_m: float) -> None:
        low, high = self.limits.axis_limits_m(axis)
        if not (math.isfinite(value_m) and low <= value_m <= high):
            raise SafetyLimitError(f"stage {axis.upper()} target {value_m * 1e3:.3f} mm outside the soft limits "
                                   f"[{low * 1e3:g}, {high * 1e3:g}] mm (bench file [stage] limits)")

    def _feed(self, feed_m_per_s: float | None) -> float:
        limit = self.limits.max_feed_m_per_s
        if feed_m_per_s is None:
            return limit
        if not 0 < feed_m_per_s <= limit:
            raise SafetyLimitError(f"stage feed {feed_m_per_s * 1e3:g} mm/s outside (0, {limit * 1e3:g}] mm/s "
                                   "(bench file [stage] max_feed)")
        return feed_m_per_s

    def _require_homed(self, what: str) -> None:
        if not self._homed:
            raise PlanError(f"{self.address}: refusing to {what} an unhomed stage; home it first")

    def _known_position(self) -> tuple[float, float, float, float | None]:
        if self._position is None:
            self.position()
        return self._position

    def _mm(self, value_m: float) -> str:
        return f"{value_m * 1e3:.{self.profile.position.decimals}f}"

    def _run_linear(self, start_m, waypoints, feed_m_per_s: float) -> None:
        """Send linear moves through ``waypoints`` (only the axes that change), then wait."""
        self._position = None  # unknown until verified
        feed_text = f"{feed_m_per_s * 60e3:.0f}"  # mm/min (NIST RS274NGC v3: F in units per minute under G94)
        total_s = 0.0
        previous = start_m
        for point in waypoints:
            words = [f"{axis.upper()}{self._mm(new)}" for axis, old, new in zip(_AXES, previous, point)
                     if self._mm(new) != self._mm(old)]
            if words:
                length_m = math.dist(previous, point)
                deadline_s = self._move_deadline_s(length_m, feed_m_per_s)
                total_s += deadline_s
                self._conv.command(self.profile.commands.move.format(axes=" ".join(words), feed=feed_text),
                                   timeout_s=deadline_s)
            previous = point
        self._wait(total_s)

    def _rotate(self, start_deg: float, angle_deg: float, rate_deg_per_s: float) -> None:
        self._position = None
        words = f"{self.profile.rotary.axis}{angle_deg:.3f}"
        feed_text = f"{rate_deg_per_s * 60:.0f}"  # deg/min for a rotary-only move (RS274NGC)
        # deg treated like mm in the deadline estimate: rate in deg/s, accel in deg/s^2 (x1e3)
        deadline_s = self._move_deadline_s(abs(angle_deg - start_deg) * 1e-3, rate_deg_per_s * 1e-3)
        self._conv.command(self.profile.commands.move.format(axes=words, feed=feed_text), timeout_s=deadline_s)
        self._wait(deadline_s)

    def _move_deadline_s(self, length_m: float, feed_m_per_s: float) -> float:
        # d/v + v/a bounds the trapezoidal and the triangular move time from above
        estimate_s = length_m / feed_m_per_s + feed_m_per_s / self.profile.timing.accel_m_per_s2
        return self.profile.timing.move_time_factor * estimate_s + self.profile.timing.move_time_margin_s

    def _wait(self, timeout_s: float) -> None:
        self._conv.command(self.profile.commands.wait,
                           timeout_s=max(timeout_s, self.profile.handshake.timeout_s))

    def _report(self) -> tuple[float, float, float, float | None]:
        command = self.profile.commands.position
        reply = self._conv.command(command)
        match = reply.find(self.profile.position.reply)
        if match is None:
            found = " | ".join(reply.lines) or "(no lines)"
            raise InstrumentError(self.address, command, None,
                                  f"expected a position report matching the profile, found {found!r}")
        values = match.groupdict()
        xyz = tuple(float(values[a]) * 1e-3 for a in _AXES)
        a_deg = float(values["a"]) if values.get("a") is not None else None
        return (*xyz, a_deg)

    def _verify(self, target_m: tuple[float, float, float], angle_deg: float | None) -> tuple[float, ...]:
        # the moves just waited for the motion to end, so the report needs no second wait
        self._position = self._report()
        pos = self._position
        reported = pos[:3] + ((pos[3] or 0.0,) if self.limits.rotary_axis else ())
        tol = self.limits.position_tolerance_m
        misses = [axis for axis, want, got in zip(_AXES, target_m, reported) if abs(want - got) > tol]
        if angle_deg is not None and abs(angle_deg - (self._position[3] or 0.0)) > self.profile.rotary.tolerance_deg:
            misses.append(self.profile.rotary.axis.lower())
        if misses:
            want = " ".join(f"{a.upper()}{v * 1e3:.3f}" for a, v in zip(_AXES, target_m))
            got = " ".join(f"{a.upper()}{v * 1e3:.3f}" for a, v in zip(_AXES, reported))
            if angle_deg is not None:
                want += f" {self.profile.rotary.axis}{angle_deg:.3f}"
                got += f" {self.profile.rotary.axis}{self._position[3] or 0.0:.3f}"
            raise InstrumentError(self.address, self.profile.commands.position, None,
                                  f"position check failed on {','.join(misses)}: expected {want} mm, "
                                  f"reported {got} mm (tolerance {tol * 1e3:g} mm)")
        return reported
