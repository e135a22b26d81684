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
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from bench.drivers.lineproto import Handshake, LineConversation, LineDeviceProfile, compile_pattern
from bench.errors import ConfigError, InstrumentError, PlanError, ReplyTimeoutError, SafetyLimitError
from bench.transports import open_transport
from bench.units import parse

__all__ = ["AxisDialect", "Mast", "MastLimits", "PositionerProfile", "Turntable", "TurntableLimits"]

# wire unit -> (numbers per SI unit, dimension of a value, dimension of a speed)
_WIRE_UNITS = {
    "m": (1.0, "length", "speed"),
    "cm": (1e2, "length", "speed"),
    "mm": (1e3, "length", "speed"),
    "deg": (1.0, "angle", "angular_speed"),
}
POLARIZATIONS = ("horizontal", "vertical")


# ---------------------------------------------------------------------------------- limits


@dataclass(frozen=True)
class MastLimits:
    """Height range the bench allows, metres (bench file ``[mast] height_limits``)."""

    height_m: tuple[float, float]

    def __post_init__(self) -> None:
        if not self.height_m[0] < self.height_m[1]:
            raise ConfigError(f"mast height_limits: expected min < max, found {list(self.height_m)} m")

    @classmethod
    def from_bench(cls, table: dict[str, Any]) -> "MastLimits":
        """Build from the bench file's ``[mast]`` table."""
        if "height_limits" not in table:
            raise ConfigError("missing key 'height_limits'", key="mast.height_limits")
        return cls(tuple(parse(v, "length") for v in table["height_limits"]))


@dataclass(frozen=True)
class TurntableLimits:
    """Azimuth range the bench allows, degrees (bench file ``[turntable] azimuth_limits``)."""

    azimuth_deg: tuple[float, float]

    def __post_init__(self) -> None:
        if not self.azimuth_deg[0] < self.azimuth_deg[1]:
            raise ConfigError(f"turntable azimuth_limits: expected min < max, found {list(self.azimuth_deg)} deg")

    @classmethod
    def from_bench(cls, table: dict[str, Any]) -> "TurntableLimits":
        """Build from the bench file's ``[turntable]`` table."""
        if "azimuth_limits" not in table:
            raise ConfigError("missing key 'azimuth_limits'", key="turntable.azimuth_limits")
        return cls(tuple(parse(v, "angle") for v in table["azimuth_limits"]))


# --------------------------------------------------------------------------------- profile


@dataclass(frozen=True)
class AxisDialect:
    """Commands of one axis (mast height or turntable azimuth).

    Attributes
    ----------
    move, query : str
        Move template (``{value}`` in the wire unit) and position query.
    reply : re.Pattern
        Parses the query's answer; group ``value`` in the wire unit.
    wire_per_si : float
        Numbers on the wire per SI unit (1000 for mm against metres).
    decimals : int
        Decimals of the value in the move command.
    speed_per_s : float
        Slowest speed expected, SI units per second (deadline only).
    tolerance : float
        Accepted difference between target and read-back, SI units.
    """

    move: str
    query: str
    reply: Any
    wire_per_si: float
    decimals: int
    speed_per_s: float
    tolerance: float

    @classmethod
    def from_table(cls, table: dict[str, Any], *, origin: str, key: str) -> "AxisDialect":
        """Build from a profile's ``[mast]`` or ``[turntable]`` table."""
        unit = table.get("unit")
        if unit not in _WIRE_UNITS:
            raise ConfigError(f"expected one of {', '.join(_WIRE_UNITS)}, found {unit!r}", file=origin,
                              key=f"{key}.unit")
        scale, value_dim, speed_dim = _WIRE_UNITS[unit]
        try:
            return cls(
                move=str(table["move"]), query=str(table["query"]),
                reply=compile_pattern(table["reply"], origin=origin, key=f"{key}.reply"),
                wire_per_si=scale, decimals=int(table.get("decimals", 1)),
                speed_per_s=parse(table["speed"], speed_dim),
                tolerance=parse(table["tolerance"], value_dim),
            )
        except KeyError as exc:
            raise ConfigError(f"missing key {exc.args[0]!r}", file=origin, key=f"{key}.{exc.args[0]}") from exc


@dataclass(frozen=True)
class PositionerProfile(LineDeviceProfile):
    """A line-positioner dialect (``kind = "line-positioner"``)."""

    name: str
    description: str
    handshake: Handshake
    busy_query: str
    busy_reply: Any
    busy_value: str
    poll_interval_s: float
    time_factor: float
    time_margin_s: float
    stop: str
    identify: str
    mast: AxisDialect | None
    turntable: AxisDialect | None
    polarization: str
    polarization_query: str
    polarization_reply: Any
    polarization_codes: dict[str, str]
    polarization_time_s: float
    baudrate: int = 9600
    read_termination: str = "\n"
    write_termination: str = "\n"
    open_timeout_s: float = 5.0


    @classmethod
    def from_data(cls, data: dict[str, Any], origin: str) -> "PositionerProfile":
        """Build from parsed TOML; ConfigError names the file and key of any mistake."""
        if data.get("schema") != 1 or data.get("kind") != "line-positioner":
            raise ConfigError(f"expected schema = 1 and kind = \"line-positioner\", found schema = "
                              f"{data.get('schema')!r}, kind = {data.get('kind')!r}", file=origin)
        busy, mast, conn = data.get("busy", {}), data.get("mast", {}), data.get("connection", {})
        codes = dict(mast.get("polarization_codes", {"horizontal": "H", "vertical": "V"}))
        if sorted(codes) != sorted(POLARIZATIONS):
            raise ConfigError(f"expected codes for horizontal and vertical, found {codes!r}", file=origin,
                              key="mast.polarization_codes")
        return cls(
            name=origin, description=str(data.get("description", "")),
            handshake=Handshake.from_table(data.get("handshake", {}), origin=origin),
            busy_query=str(busy.get("query", "BUSY?")),
            busy_reply=compile_pattern(busy.get("reply", r"^BUSY\s+(?P<busy>[01])$"), origin=origin,
                                       key="busy.reply"),
            busy_value=str(busy.get("busy_value", "1")),
            poll_interval_s=parse(busy.get("poll_interval", "250 ms"), "time"),
            time_factor=float(busy.get("time_factor", 2.0)),
            time_margin_s=parse(busy.get("time_margin", "10 s"), "time"),
            stop=str(busy.get("stop", "STOP")), identify=str(busy.get("identify", "ID?")),
            mast=AxisDialect.from_table(mast, origin=origin, key="mast") if mast else None,
            turntable=(AxisDialect.from_table(data["turntable"], origin=origin, key="turntable")
                       if "turntable" in data else None),
            polarization=str(mast.get("polarization", "POL {code}")),
            polarization_query=str(mast.get("polarization_query", "POL?")),
            polarization_reply=compile_pattern(mast.get("polarization_reply", r"^POL\s+(?P<code>\w+)$"),
                                               origin=origin, key="mast.polarization_reply"),
            polarization_codes={k: str(v) for k, v in codes.items()},
            polarization_time_s=parse(mast.get("polarization_time", "10 s"), "time"),
            baudrate=int(conn.get("baudrate", 9600)),
            read_termination=str(conn.get("read_termination", "\n")),
            write_termination=str(conn.get("write_termination", "\n")),
            open_timeout_s=parse(conn.get("open_timeout", "5 s"), "time"),
        )



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
        self._axis: AxisDialect = axis

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
        reply = self._conv.command(self.profile.identify)
        return "; ".join(reply.lines) or reply.ok_text

    def stop(self) -> None:
        """Stop any motion where it is."""
        self._conv.command(self.profile.stop)

    def close(self) -> None:
        """Close the transport."""
        self._conv.transport.close()

    def is_busy(self) -> bool:
        """True while the controller reports motion."""
        reply = self._conv.command(self.profile.busy_query)
        match = reply.find(self.profile.busy_reply)
        if match is None:
            raise InstrumentError(self.address, self.profile.busy_query, None,
                                  f"expected a busy report, found {' | '.join(reply.lines) or '(no lines)'!r}")
        return match.group("busy") == self.profile.busy_value

    def _wait_idle(self, command: str, expected_s: float) -> None:
        """Poll until idle; deadline = factor x expected time + margin, also as a poll count."""
        deadline_s = self.profile.time_factor * expected_s + self.profile.time_margin_s
        max_polls = math.ceil(deadline_s / self.profile.poll_interval_s) + 1
        end = time.monotonic() + deadline_s
        for _ in range(max_polls):
            if not self.is_busy():
                return
            if time.monotonic() > end:
                break
            self._sleep(self.profile.poll_interval_s)
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
        codes = self.profile.polarization_codes
        if polarization not in codes:
            raise PlanError(f"polarization must be 'horizontal' or 'vertical', found {polarization!r}")
        command = self.profile.polarization.format(code=codes[polarization])
        self._conv.command(command)
        self._wait_idle(command, self.profile.polarization_time_s)
        reached = self.polarization()
        if reached != polarization:
            raise InstrumentError(self.address, self.profile.polarization_query, None,
                                  f"expected {polarization}, read back {reached}")
        return reached

    def polarization(self) -> str:
        """Current polarization, ``"horizontal"`` or ``"vertical"``."""
        reply = self._conv.command(self.profile.polarization_query)
        match = reply.find(self.profile.polarization_reply)
        by_code = {code: name for name, code in self.profile.polarization_codes.items()}
        if match is None or match.group("code") not in by_code:
            raise InstrumentError(self.address, self.profile.polarization_query, None,
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
