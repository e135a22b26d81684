"""Antenna mast and turntable over a plain line protocol.

The driver is generic; the profile (``line-positioner`` by default) holds the command templates,
the reply patterns, the unit of the numbers on the wire, the speeds used for deadlines and the
polarization codes. Moves are refused before anything is sent when the target lies outside the
bench file's limits; after a move the driver polls the busy query until the controller is idle
(bounded by a deadline computed from distance and speed, and by a poll count), then reads the
position back and checks it against the target.
"""

from __future__ import annotations

import math
import re
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Annotated, Literal, Optional

import pydantic
from pydantic import Field, StrictFloat, StrictInt, StrictStr

from bench.drivers.lineproto import LineConversation, LineDeviceProfile
from bench.drivers.profile import AsciiWord, ProfileTable, duration, pattern_with, template_with
from bench.errors import ConfigError, InstrumentError, PlanError, ReplyTimeoutError, SafetyLimitError
from bench.tomlsource import cross_check_error, format_value, quantity
from bench.transports import open_transport

__all__ = ["AxisDialect", "BusyDialect", "Mast", "MastDialect", "MastLimits", "PolarizationCodes",
           "PositionerProfile", "Turntable", "TurntableDialect", "TurntableLimits"]

# numbers on the wire per SI unit (metres or degrees)
_WIRE_PER_SI = {"m": 1.0, "cm": 1e2, "mm": 1e3, "deg": 1.0}


# ---------------------------------------------------------------------------------- limits


@dataclass(frozen=True)
class MastLimits:
    """Height range the bench allows, metres (bench file ``[mast] height_limits``)."""

    height_m: tuple[float, float]

    def __post_init__(self) -> None:
        if not self.height_m[0] < self.height_m[1]:
            raise ConfigError(f"mast height_limits: expected min < max, found {list(self.height_m)} m")


@dataclass(frozen=True)
class TurntableLimits:
    """Azimuth range the bench allows, degrees (bench file ``[turntable] azimuth_limits``)."""

    azimuth_deg: tuple[float, float]

    def __post_init__(self) -> None:
        if not self.azimuth_deg[0] < self.azimuth_deg[1]:
            raise ConfigError(f"turntable azimuth_limits: expected min < max, found {list(self.azimuth_deg)} deg")


# --------------------------------------------------------------------------------- profile


class BusyDialect(ProfileTable):
    """``[busy]``: the busy poll, its deadline, and the identify and stop commands.

    Attributes
    ----------
    query : str
        Busy query; its answer must match ``reply``.
    reply : re.Pattern
        Group ``busy`` holds the state; equal to ``busy_value`` means moving.
    busy_value : str
        Value of ``busy`` while anything moves.
    poll_interval_s : float
        Time between polls, seconds (key ``poll_interval``).
    time_factor, time_margin_s : float
        Wait deadline = ``time_factor`` x expected time + ``time_margin_s`` (s).
    identify, stop : str
        Identification query; stop any motion.
    """

    query: template_with() = "BUSY?"
    reply: pattern_with("busy") = re.compile(r"^BUSY\s+(?P<busy>[01])$")
    busy_value: AsciiWord = "1"
    poll_interval_s: duration() = Field(0.25, alias="poll_interval")
    time_factor: Annotated[StrictFloat, Field(ge=1.0, le=100.0)] = 2.0  # more would wait for ever
    time_margin_s: duration(positive=False) = Field(10.0, alias="time_margin")
    identify: template_with() = "ID?"
    stop: template_with() = "STOP"


class AxisDialect(ProfileTable):
    """Commands of one axis (mast height or turntable azimuth); see the subclasses for units.

    Attributes
    ----------
    move, query : str
        Move template (``{value}`` in the wire unit) and position query.
    reply : re.Pattern
        Parses the query's answer; group ``value`` in the wire unit.
    unit : str
        Unit of the numbers on the wire.
    decimals : int
        Decimals of the value in the move command.
    speed_per_s : float
        Slowest speed expected, SI units per second (deadline and planner estimate only).
    tolerance : float
        Accepted difference between target and read-back, SI units.
    """

    move: template_with("value")
    query: template_with()
    reply: pattern_with("value")
    decimals: Annotated[StrictInt, Field(ge=0, le=6)] = 1

    @property
    def wire_per_si(self) -> float:
        """Numbers on the wire per SI unit (1000 for mm against metres)."""
        return _WIRE_PER_SI[self.unit]


class PolarizationCodes(ProfileTable):
    """``polarization_codes``: the wire code of each polarization."""

    horizontal: AsciiWord = "H"
    vertical: AsciiWord = "V"

    @pydantic.model_validator(mode="after")
    def _distinct(self) -> "PolarizationCodes":
        if self.horizontal == self.vertical:
            raise cross_check_error([(("vertical",), f"expected a code other than horizontal's, found "
                                                     f"{format_value(self.vertical)} for both")])
        return self

    def as_dict(self) -> dict[str, str]:
        """``{"horizontal": code, "vertical": code}``."""
        return {"horizontal": self.horizontal, "vertical": self.vertical}


class MastDialect(AxisDialect):
    """``[mast]``: height in metres (``unit`` m, cm or mm on the wire, speed in m/s) and polarization.

    Attributes
    ----------
    polarization, polarization_query : str
        ``{code}`` template and query.
    polarization_reply : re.Pattern
        Group ``code`` holds the current code.
    polarization_codes : PolarizationCodes
        Codes of ``horizontal`` and ``vertical``.
    polarization_time_s : float
        Longest polarization switch expected, seconds.
    """

    unit: Literal["m", "cm", "mm"]
    speed_per_s: quantity("speed", positive=True) = Field(alias="speed")
    # a mast 10 cm off is at another height (common practice: height scans step 0.25-1 m)
    tolerance: quantity("length", positive=True, at_most="10 cm")
    polarization: template_with("code") = "POL {code}"
    polarization_query: template_with() = "POL?"
    polarization_reply: pattern_with("code") = re.compile(r"^POL\s+(?P<code>\w+)$")
    polarization_codes: PolarizationCodes = PolarizationCodes()
    polarization_time_s: duration() = Field(10.0, alias="polarization_time")


class TurntableDialect(AxisDialect):
    """``[turntable]``: azimuth in degrees (``unit`` deg, speed in deg/s)."""

    unit: Literal["deg"]
    speed_per_s: quantity("angular_speed", positive=True) = Field(alias="speed")
    tolerance: quantity("angle", positive=True, at_most="360 deg")  # within one turn


class PositionerProfile(LineDeviceProfile):
    """A line-positioner dialect (``kind = "line-positioner"``), read by :meth:`load`.

    Attributes
    ----------
    connection, handshake : LineConnection, Handshake
        Port settings and reply patterns.
    busy : BusyDialect
        Busy poll, identify and stop.
    mast : MastDialect or None
        Height and polarization commands (None: the profile serves no mast).
    turntable : TurntableDialect or None
        Azimuth commands (None: the profile serves no turntable).
    """

    kind: Literal["line-positioner"]
    busy: BusyDialect = BusyDialect()
    mast: Optional[MastDialect] = None
    turntable: Optional[TurntableDialect] = None


# -------------------------------------------------------------------------------- drivers


class _LinePositioner:
    """Conversation, busy polling and one-axis moves shared by the mast and the turntable."""

    _axis_name = ""

    def __init__(self, transport, profile: PositionerProfile, *,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        self.profile = profile
        self._conv = LineConversation(transport, profile.handshake)
        self._sleep = sleep
        axis = getattr(profile, self._axis_name)
        if axis is None:
            raise ConfigError(f"profile has no [{self._axis_name}] table", file=profile.name, key=self._axis_name)
        self._axis = axis

    @classmethod
    def open(cls, address: str, profile: PositionerProfile, limits, *, baudrate: int | None = None,
             sleep: Callable[[float], None] = time.sleep):
        """Open the transport ``address`` names and wrap it (nothing sent yet)."""
        return cls(open_transport(address, profile.transport_settings(baudrate)), profile, limits, sleep=sleep)

    @property
    def address(self) -> str:
        """Address of the controller."""
        return self._conv.address

    def connect(self) -> str:
        """Read the start-up banner; returns it ('' when the dialect has none)."""
        return self._conv.read_banner()

    def identify(self) -> str:
        """The controller's identification line."""
        reply = self._conv.command(self.profile.busy.identify)
        return "; ".join(reply.lines) or reply.ok_text

    def stop(self) -> None:
        """Stop any motion where it is."""
        self._conv.command(self.profile.busy.stop)

    def close(self) -> None:
        """Close the transport."""
        self._conv.transport.close()

    def is_busy(self) -> bool:
        """True while the controller reports motion."""
        reply = self._conv.command(self.profile.busy.query)
        match = reply.find(self.profile.busy.reply)
        if match is None:
            raise InstrumentError(self.address, self.profile.busy.query, None,
                                  f"expected a busy report, found {' | '.join(reply.lines) or '(no lines)'!r}")
        return match.group("busy") == self.profile.busy.busy_value

    def _wait_idle(self, command: str, expected_s: float) -> None:
        """Poll until idle; deadline = factor x expected time + margin, also as a poll count."""
        deadline_s = self.profile.busy.time_factor * expected_s + self.profile.busy.time_margin_s
        max_polls = math.ceil(deadline_s / self.profile.busy.poll_interval_s) + 1
        end = time.monotonic() + deadline_s
        for _ in range(max_polls):
            if not self.is_busy():
                return
            if time.monotonic() > end:
                break
            self._sleep(self.profile.busy.poll_interval_s)
        raise ReplyTimeoutError(f"{self.address}: {command!r} still moving after the {deadline_s:g} s deadline")

    def _read_axis(self) -> float:
        reply = self._conv.command(self._axis.query)
        match = reply.find(self._axis.reply)
        if match is None:
            raise InstrumentError(self.address, self._axis.query, None,
                                  f"expected a position report, found {' | '.join(reply.lines) or '(no lines)'!r}")
        return float(match.group("value")) / self._axis.wire_per_si

    def _move_axis(self, target: float) -> float:
        start = self._read_axis()
        wire = f"{target * self._axis.wire_per_si:.{self._axis.decimals}f}"
        command = self._axis.move.format(value=wire)
        self._conv.command(command)
        self._wait_idle(command, abs(target - start) / self._axis.speed_per_s)
        reached = self._read_axis()
        if abs(reached - target) > self._axis.tolerance:
            raise InstrumentError(self.address, self._axis.query, None,
                                  f"expected {target:g}, read back {reached:g} "
                                  f"(tolerance {self._axis.tolerance:g}; SI units)")
        return reached


class Mast(_LinePositioner):
    """Antenna mast: height and polarization.

    Parameters
    ----------
    transport : Transport
        Open line transport.
    profile : PositionerProfile
        Dialect (needs a ``[mast]`` table).
    limits : MastLimits
        Height range the bench allows.
    sleep : callable, optional
        Wait between busy polls, ``sleep(seconds)`` (a simulated bench advances its own clock on
        every poll and needs no real waiting).
    """

    _axis_name = "mast"

    def __init__(self, transport, profile: PositionerProfile, limits: MastLimits, *,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        super().__init__(transport, profile, sleep=sleep)
        self.limits = limits

    def set_height(self, height_m: float) -> float:
        """Move the antenna to ``height_m`` (metres), wait, and return the height read back.

        Raises
        ------
        SafetyLimitError
            Height outside the bench's limits (nothing sent).
        """
        low, high = self.limits.height_m
        if not (math.isfinite(height_m) and low <= height_m <= high):
            raise SafetyLimitError(f"mast height {height_m:g} m outside the limits [{low:g}, {high:g}] m "
                                   "(bench file [mast] height_limits)")
        return self._move_axis(height_m)

    def height(self) -> float:
        """Current antenna height, metres."""
        return self._read_axis()

    def set_polarization(self, polarization: str) -> str:
        """Turn the antenna to ``"horizontal"`` or ``"vertical"``, wait, and check it."""
        codes = self._axis.polarization_codes.as_dict()
        if polarization not in codes:
            raise PlanError(f"polarization must be 'horizontal' or 'vertical', found {polarization!r}")
        command = self._axis.polarization.format(code=codes[polarization])
        self._conv.command(command)
        self._wait_idle(command, self._axis.polarization_time_s)
        reached = self.polarization()
        if reached != polarization:
            raise InstrumentError(self.address, self._axis.polarization_query, None,
                                  f"expected {polarization}, read back {reached}")
        return reached

    def polarization(self) -> str:
        """Current polarization, ``"horizontal"`` or ``"vertical"``."""
        reply = self._conv.command(self._axis.polarization_query)
        match = reply.find(self._axis.polarization_reply)
        by_code = {code: name for name, code in self._axis.polarization_codes.as_dict().items()}
        if match is None or match.group("code") not in by_code:
            raise InstrumentError(self.address, self._axis.polarization_query, None,
                                  f"expected one of {sorted(by_code)}, found {' | '.join(reply.lines)!r}")
        return by_code[match.group("code")]


class Turntable(_LinePositioner):
    """Turntable: azimuth in degrees.

    Parameters
    ----------
    transport : Transport
        Open line transport.
    profile : PositionerProfile
        Dialect (needs a ``[turntable]`` table).
    limits : TurntableLimits
        Azimuth range the bench allows.
    sleep : callable, optional
        Wait between busy polls, ``sleep(seconds)``.
    """

    _axis_name = "turntable"

    def __init__(self, transport, profile: PositionerProfile, limits: TurntableLimits, *,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        super().__init__(transport, profile, sleep=sleep)
        self.limits = limits

    def set_azimuth(self, azimuth_deg: float) -> float:
        """Turn to ``azimuth_deg`` (degrees, no wrap-around: cables), wait, return the read-back.

        Raises
        ------
        SafetyLimitError
            Azimuth outside the bench's limits (nothing sent).
        """
        low, high = self.limits.azimuth_deg
        if not (math.isfinite(azimuth_deg) and low <= azimuth_deg <= high):
            raise SafetyLimitError(f"turntable azimuth {azimuth_deg:g} deg outside the limits "
                                   f"[{low:g}, {high:g}] deg (bench file [turntable] azimuth_limits)")
        return self._move_axis(azimuth_deg)

    def azimuth(self) -> float:
        """Current azimuth, degrees."""
        return self._read_axis()
