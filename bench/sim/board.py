"""The simulated board file: emitters, ambient carriers and the physical truth of the bench.

A board file is TOML (``schema = 1``), parsed once with :mod:`tomllib` and validated into frozen
pydantic models; unknown keys are refused. Quantities are strings with units (``"25 MHz"``,
``"1.2 cm2"``, ``"3.3 V"``); plain numbers are used only for dimensionless values (duty cycle,
quality factor, turns, direction vectors, tolerance in ppm). Every error is a one-line
:class:`~bench.errors.ConfigError` naming the file, the line and the key path.

Layout of a board file::

    schema = 1
    name = "..."
    [board]                 outline polygon (pairs of lengths), board coordinates: corner (0, 0)
                            on the top surface, x along the length, y across, z up
    [[emitters]]            kind = "clock" | "switcher" | "spur" | "burst" | "cable"
    [[ambient]]             carriers present with the board off
    [[probes]]              what each tool number of the stage really is
    [site]                  far-field geometry and receive chain
    [stage]                 where the board lies on the probe stage
    [receiver]              analyzer noise figure

Each non-cable emitter is a small dipole at ``position`` (x, y) and ``depth`` below the top
surface. ``dipole = "magnetic"`` takes ``loop_area`` and ``axis`` (the loop normal);
``dipole = "electric"`` takes ``length`` and ``axis`` (the current direction). Its moment per
harmonic is the harmonic current times the area or length. For ``clock`` and ``switcher`` the
harmonic current is the trapezoid voltage harmonic divided by ``impedance`` (the impedance of the
current path), i.e. the moment per volt is area/impedance. ``cable`` is a common-mode current on
an attached cable, driven by a named clock or switcher (see :mod:`bench.sim.world`).
"""

from __future__ import annotations

import math
import re
import tomllib
from importlib import resources
from pathlib import Path
from typing import Annotated, Any, Literal, Union

import numpy as np
from pydantic import (BaseModel, BeforeValidator, ConfigDict, Field, ValidationError,
                      field_validator, model_validator)
from pydantic_core import PydanticCustomError

from bench.errors import ConfigError, UnitError
from bench.units import parse

__all__ = [
    "Ambient",
    "Board",
    "BoardOutline",
    "BurstEmitter",
    "CableEmitter",
    "ClockEmitter",
    "Emitter",
    "EProbe",
    "HLoopProbe",
    "Probe",
    "Receiver",
    "Site",
    "SpurEmitter",
    "Stage",
    "SwitcherEmitter",
    "demo_board",
    "load_board",
    "parse_board",
]

SCHEMA_VERSION = 1
DEMO_BOARD_FILE = "demo-board.toml"


# ---------------------------------------------------------------------------------------------
# Quantity fields: text with units -> SI float, errors reported with their key path
# ---------------------------------------------------------------------------------------------

def _quantity(dimension: str):
    def convert(value: Any) -> float:
        try:
            return parse(value, dimension)
        except UnitError as exc:
            raise PydanticCustomError("unit", "{msg}", {"msg": exc.message}) from None
    return BeforeValidator(convert)


def _gain_db(value: Any) -> float:
    """A gain relative to an isotropic radiator: "5 dBi" (or "5 dB")."""
    text = value.strip() if isinstance(value, str) else value
    if isinstance(text, str) and text.lower().endswith("dbi"):
        text = text[:-1]
    try:
        return parse(text, "db")
    except UnitError:
        raise PydanticCustomError("unit", "{msg}", {
            "msg": f'expected a gain like "5 dBi" (units: dBi, dB), found {value!r}'}) from None


def _gain_spec(value: Any):
    """One gain ("2 dBi") or a table of (frequency, gain) rows, rows checked one by one."""
    if not isinstance(value, (tuple, list)):
        return _gain_db(value)
    rows = []
    for index, row in enumerate(value):
        if not isinstance(row, (tuple, list)) or len(row) != 2:
            raise PydanticCustomError("value_error", "row {i}: expected [frequency, gain] like "
                                      '["100 MHz", "1.5 dBi"], found {row}', {"i": index, "row": repr(row)})
        try:
            rows.append((parse(row[0], "frequency"), _gain_db(row[1])))
        except UnitError as exc:
            raise PydanticCustomError("unit", "row {i}: {msg}", {"i": index, "msg": exc.message}) from None
        except PydanticCustomError as exc:
            raise PydanticCustomError("unit", "row {i}: {msg}", {"i": index, "msg": exc.context["msg"]}) from None
    return tuple(rows)


Hz = Annotated[float, _quantity("frequency")]
Metre = Annotated[float, _quantity("length")]
Second = Annotated[float, _quantity("time")]
Volt = Annotated[float, _quantity("voltage")]
Ampere = Annotated[float, _quantity("current")]
Ohm = Annotated[float, _quantity("resistance")]
Henry = Annotated[float, _quantity("inductance")]
Farad = Annotated[float, _quantity("capacitance")]
SquareMetre = Annotated[float, _quantity("area")]
Decibel = Annotated[float, _quantity("db")]
DbuvPerM = Annotated[float, _quantity("dbuv_per_m")]
GainDbi = Annotated[float, BeforeValidator(_gain_db)]
GainSpec = Annotated[Union[float, tuple[tuple[float, float], ...]], BeforeValidator(_gain_spec)]
Direction = tuple[float, float, float]


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", strict=True)


def _positive(name: str, value: float) -> float:
    if not value > 0.0:
        raise ValueError(f"{name} must be positive, found {value!r}")
    return value


def _unit_vector(value: Direction) -> Direction:
    norm = math.sqrt(sum(c * c for c in value))
    if not norm > 0.0 or not math.isfinite(norm):
        raise ValueError(f"expected a non-zero direction [x, y, z], found {list(value)!r}")
    return tuple(c / norm for c in value)


# ---------------------------------------------------------------------------------------------
# Board outline
# ---------------------------------------------------------------------------------------------

class BoardOutline(_Model):
    """Board outline and stack-up.

    Attributes
    ----------
    outline_m : tuple of (x, y)
        Polygon of the board edge in board coordinates, metres (at least 3 corners).
    thickness_m : float
        Board thickness, metres (for drawings; the emitters carry their own depth).
    """

    outline_m: tuple[tuple[Metre, Metre], ...] = Field(alias="outline")
    thickness_m: Metre = Field(default=1.6e-3, alias="thickness")

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, populate_by_name=True)

    @field_validator("outline_m")
    @classmethod
    def _polygon(cls, value):
        if len(value) < 3:
            raise ValueError(f"outline needs at least 3 corners, found {len(value)}")
        return value

    @property
    def centre_m(self) -> tuple[float, float]:
        """Centre of the outline's bounding box, metres: the point over the turntable axis."""
        xy = np.asarray(self.outline_m)
        lo, hi = xy.min(axis=0), xy.max(axis=0)
        return float((lo[0] + hi[0]) / 2.0), float((lo[1] + hi[1]) / 2.0)


# ---------------------------------------------------------------------------------------------
# Emitters
# ---------------------------------------------------------------------------------------------

class _Placed(_Model):
    name: str = Field(min_length=1)
    position_m: tuple[Metre, Metre] = Field(alias="position")
    depth_m: Metre = Field(default=0.0, alias="depth")
    tolerance_ppm: float = Field(default=0.0, ge=0.0, le=1e4)

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, populate_by_name=True)

    @field_validator("depth_m")
    @classmethod
    def _depth(cls, value):
        if value < 0.0:
            raise ValueError(f"depth is measured below the top surface and must be >= 0, found {value!r} m")
        return value


class _Dipole(_Placed):
    dipole: Literal["magnetic", "electric"]
    axis: Direction
    loop_area_m2: SquareMetre | None = Field(default=None, alias="loop_area")
    length_m: Metre | None = Field(default=None, alias="length")

    @field_validator("axis")
    @classmethod
    def _axis(cls, value):
        return _unit_vector(value)

    @model_validator(mode="after")
    def _coupling(self):
        if self.dipole == "magnetic":
            if self.loop_area_m2 is None or self.length_m is not None:
                raise ValueError("a magnetic emitter takes loop_area (and no length)")
            _positive("loop_area", self.loop_area_m2)
        else:
            if self.length_m is None or self.loop_area_m2 is not None:
                raise ValueError("an electric emitter takes length (and no loop_area)")
            _positive("length", self.length_m)
        return self

    @property
    def coupling_m_or_m2(self) -> float:
        """Area (magnetic, m^2) or length (electric, m) that turns current into a moment."""
        return self.loop_area_m2 if self.dipole == "magnetic" else self.length_m


class _Trapezoid(_Dipole):
    frequency_hz: Hz = Field(alias="frequency")
    amplitude_v: Volt = Field(alias="amplitude")
    duty: float = Field(gt=0.0, lt=1.0)
    rise_time_s: Second = Field(alias="rise_time")
    impedance_ohm: Ohm = Field(alias="impedance")

    @model_validator(mode="after")
    def _positive_values(self):
        for key in ("frequency_hz", "amplitude_v", "rise_time_s", "impedance_ohm"):
            _positive(key.rsplit("_", 1)[0], getattr(self, key))
        period_s = 1.0 / self.frequency_hz
        if self.rise_time_s >= min(self.duty, 1.0 - self.duty) * period_s:
            raise ValueError(
                f"rise_time {self.rise_time_s:g} s must be shorter than the pulse and the gap "
                f"({min(self.duty, 1.0 - self.duty) * period_s:g} s)")
        return self


class ClockEmitter(_Trapezoid):
    """A clock net: trapezoidal harmonics (Paul ch. 3) driving a current loop or a trace."""

    kind: Literal["clock"]


class SwitcherEmitter(_Trapezoid):
    """A switching converter's switch node; optional ringing of the parasitic LC.

    ``ring_frequency`` and ``ring_q`` multiply the harmonics by a second-order resonance
    (gain ``ring_q`` at ``ring_frequency``), the switch-node ringing that lifts harmonics in the
    hundreds of MHz.
    """

    kind: Literal["switcher"]
    ring_frequency_hz: Hz | None = Field(default=None, alias="ring_frequency")
    ring_q: float | None = Field(default=None, gt=0.0)

    @model_validator(mode="after")
    def _ring(self):
        if (self.ring_frequency_hz is None) != (self.ring_q is None):
            raise ValueError("ring_frequency and ring_q go together")
        return self


class SpurEmitter(_Dipole):
    """A single CW line (e.g. a PLL spur) of peak current ``current``."""

    kind: Literal["spur"]
    frequency_hz: Hz = Field(alias="frequency")
    current_a: Ampere = Field(alias="current")


class BurstEmitter(_Dipole):
    """A burst-modulated carrier (a radio sending packets): peak current while on.

    ``repetition`` is the burst repetition frequency, ``duty`` the on fraction of each period.
    """

    kind: Literal["burst"]
    frequency_hz: Hz = Field(alias="frequency")
    current_a: Ampere = Field(alias="current")
    repetition_hz: Hz = Field(alias="repetition")
    duty: float = Field(gt=0.0, le=1.0)


class CableEmitter(_Placed):
    """An attached cable carrying common-mode current, radiating as a short electric dipole.

    The common-mode voltage is ``coupling`` (dB, usually negative) times the harmonic voltage
    of the emitter ``driven_by``; the cable's common-mode impedance is a series resonance at the
    quarter-wave frequency c/(4*length) with quality factor ``resonance_q`` and radiation
    resistance ``resistance``. ``axis`` is the direction in which the cable leaves the board.
    """

    kind: Literal["cable"]
    axis: Direction
    length_m: Metre = Field(alias="length")
    driven_by: str = Field(min_length=1)
    coupling_db: Decibel = Field(alias="coupling")
    resonance_q: float = Field(default=3.0, gt=0.0)
    resistance_ohm: Ohm = Field(default=36.5, alias="resistance")

    @field_validator("axis")
    @classmethod
    def _axis(cls, value):
        return _unit_vector(value)

    @model_validator(mode="after")
    def _positive_values(self):
        _positive("length", self.length_m)
        _positive("resistance", self.resistance_ohm)
        return self


Emitter = Annotated[
    Union[ClockEmitter, SwitcherEmitter, SpurEmitter, BurstEmitter, CableEmitter],
    Field(discriminator="kind"),
]


# ---------------------------------------------------------------------------------------------
# Ambient, probes, site, stage, receiver
# ---------------------------------------------------------------------------------------------

class Ambient(_Model):
    """A carrier present with the board off, as field strength at the receive antenna.

    ``polarization = "both"`` means the carrier is seen equally in both polarizations;
    otherwise the other polarization sees it reduced by the site's cross-polar rejection.
    """

    name: str = Field(min_length=1)
    frequency_hz: Hz = Field(alias="frequency")
    field_dbuv_per_m: DbuvPerM = Field(alias="field")
    polarization: Literal["horizontal", "vertical", "both"] = "both"

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, populate_by_name=True)


class HLoopProbe(_Model):
    """A shielded H-field loop probe.

    ``axis = "horizontal"``: the loop stands upright and its axis turns with the stage's A axis
    (0 deg along +x); the tip is the bottom of the loop. ``axis = "vertical"``: the loop lies
    flat, axis along z, the tip is the loop centre. Give ``inductance`` or ``wire_radius``
    (then L = mu0*a*(ln(8a/b) - 2)*N^2).
    """

    tool: int = Field(ge=1)
    kind: Literal["h_loop"]
    radius_m: Metre = Field(alias="radius")
    turns: int = Field(default=1, ge=1)
    axis: Literal["horizontal", "vertical"] = "horizontal"
    inductance_h: Henry | None = Field(default=None, alias="inductance")
    wire_radius_m: Metre | None = Field(default=None, alias="wire_radius")

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, populate_by_name=True)

    @model_validator(mode="after")
    def _geometry(self):
        _positive("radius", self.radius_m)
        if self.wire_radius_m is not None and not 0.0 < self.wire_radius_m < self.radius_m / 4.0:
            raise ValueError("wire_radius must be positive and well below radius/4 for the loop formula")
        if self.inductance_h is not None and self.wire_radius_m is not None:
            raise ValueError("give inductance or wire_radius, not both")
        return self


class EProbe(_Model):
    """A short E-field stub probe: effective height and source capacitance, reads E_z."""

    tool: int = Field(ge=1)
    kind: Literal["e_stub"]
    effective_height_m: Metre = Field(alias="effective_height")
    capacitance_f: Farad | None = Field(default=None, alias="capacitance")

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, populate_by_name=True)

    @model_validator(mode="after")
    def _positive_values(self):
        _positive("effective_height", self.effective_height_m)
        return self


Probe = Annotated[Union[HLoopProbe, EProbe], Field(discriminator="kind")]


class Site(_Model):
    """Far-field site and receive chain.

    ``antenna_gain`` is one gain (``"2 dBi"``) or a table ``[["30 MHz", "-9 dBi"], ...]`` with
    strictly increasing frequencies; between points the gain is interpolated in dB against
    log10(f), outside the table it is held at the end values.
    """

    distance_m: Metre = Field(alias="distance")
    table_height_m: Metre = Field(default=0.8, alias="table_height")
    ground_plane: bool = True
    antenna_gain: GainSpec
    cable_loss_db: Decibel = Field(default=0.0, alias="cable_loss")
    preamp_gain_db: Decibel = Field(default=0.0, alias="preamp_gain")
    cross_polar_rejection_db: Decibel = Field(default=20.0, alias="cross_polar_rejection")

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, populate_by_name=True)

    @model_validator(mode="after")
    def _checks(self):
        _positive("distance", self.distance_m)
        _positive("table_height", self.table_height_m)
        if isinstance(self.antenna_gain, tuple):
            freqs = [f for f, _ in self.antenna_gain]
            if len(freqs) < 2 or any(b <= a for a, b in zip(freqs, freqs[1:])):
                raise ValueError("antenna_gain table needs >= 2 rows with strictly increasing frequency")
        return self

    def antenna_gain_dbi(self, freq_hz) -> np.ndarray:
        """Receive-antenna gain at ``freq_hz`` (array), dBi."""
        f = np.asarray(freq_hz, dtype=float)
        if not isinstance(self.antenna_gain, tuple):
            return np.full(f.shape, float(self.antenna_gain))
        table = np.asarray(self.antenna_gain, dtype=float)
        return np.interp(np.log10(f), np.log10(table[:, 0]), table[:, 1])


class Stage(_Model):
    """Placement of the board on the probe stage: stage coordinates of the board origin, m."""

    board_origin_m: tuple[Metre, Metre, Metre] = Field(alias="board_origin")

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, populate_by_name=True)


class Receiver(_Model):
    """The analyzer's own noise figure, dB (sets the displayed noise level, sheet §8)."""

    noise_figure_db: Decibel = Field(alias="noise_figure")

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, populate_by_name=True)


class Board(_Model):
    """A whole board file, validated."""

    schema_version: Literal[1] = Field(alias="schema")
    name: str = Field(min_length=1)
    description: str = ""
    board: BoardOutline
    emitters: tuple[Emitter, ...] = ()
    ambient: tuple[Ambient, ...] = ()
    probes: tuple[Probe, ...] = ()
    site: Site
    stage: Stage
    receiver: Receiver

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, populate_by_name=True)

    @model_validator(mode="after")
    def _cross_checks(self):
        names = [e.name for e in self.emitters] + [a.name for a in self.ambient]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ValueError(f"emitter and ambient names must be unique, repeated: {', '.join(dup)}")
        tools = [p.tool for p in self.probes]
        dup_tools = sorted({t for t in tools if tools.count(t) > 1})
        if dup_tools:
            raise ValueError(f"probe tool numbers must be unique, repeated: {dup_tools}")
        drivers = {e.name: e.kind for e in self.emitters}
        for e in self.emitters:
            if e.kind == "cable" and drivers.get(e.driven_by) not in ("clock", "switcher"):
                raise ValueError(f"cable {e.name!r}: driven_by must name a clock or switcher emitter, "
                                 f"found {e.driven_by!r}")
        return self

    def probe(self, tool: int):
        """The probe mounted as ``tool``, or None when the board file does not define it."""
        return next((p for p in self.probes if p.tool == tool), None)

    def emitter(self, name: str):
        """The emitter called ``name``; KeyError when there is none."""
        for e in self.emitters:
            if e.name == name:
                return e
        raise KeyError(name)


# ---------------------------------------------------------------------------------------------
# Loading and error reporting
# ---------------------------------------------------------------------------------------------

def parse_board(text: str, origin: str = "<board>") -> Board:
    """Parse and validate board-file text.

    Parameters
    ----------
    text : str
        TOML text.
    origin : str
        File name used in error messages.

    Raises
    ------
    ConfigError
        One line with file, line, key path, what was expected and found (UnitError for a
        quantity that cannot be read).
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        found = re.search(r"line (\d+)", str(exc))
        raise ConfigError(f"TOML syntax error: {exc}", file=origin,
                          line=int(found.group(1)) if found else None) from exc
    if "schema" not in data:
        raise ConfigError(f"missing key 'schema' (expected schema = {SCHEMA_VERSION})", file=origin)
    if data["schema"] != SCHEMA_VERSION:
        raise ConfigError(f"unsupported board schema {data['schema']!r} (this version reads {SCHEMA_VERSION})",
                          file=origin, line=_find_line(text, ("schema",)), key="schema")
    try:
        return Board.model_validate(_tuples(data))
    except ValidationError as exc:
        raise _config_error(exc, text, origin) from None


def load_board(path) -> Board:
    """Read a board file from ``path`` (str or Path); see :func:`parse_board`."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot read board file: {exc.strerror or exc}", file=str(path)) from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(f"expected a UTF-8 TOML board file, found bytes that are not UTF-8 at byte {exc.start}",
                          file=str(path)) from None
    return parse_board(text, origin=str(path))


def demo_board() -> Board:
    """The shipped demo board (``sequences/demo-board.toml`` in package ``bench.demo``)."""
    resource = resources.files("bench.demo").joinpath(DEMO_BOARD_FILE)
    return parse_board(resource.read_text(encoding="utf-8"), origin=DEMO_BOARD_FILE)


def _tuples(value):
    """TOML arrays as tuples: strict validation then accepts them for tuple fields only."""
    if isinstance(value, dict):
        return {k: _tuples(v) for k, v in value.items()}
    if isinstance(value, list):
        return tuple(_tuples(v) for v in value)
    return value


def _config_error(exc: ValidationError, text: str, origin: str) -> ConfigError:
    err = exc.errors(include_url=False)[0]
    loc = _clean_loc(err["loc"])
    key = _format_key(loc)
    message = err["msg"]
    if err["type"] == "missing":
        message = "missing required key"
    elif err["type"] == "extra_forbidden":
        message = f"unknown key (found {err['input']!r})" if not isinstance(err["input"], dict) else "unknown key"
    elif message.startswith("Value error, "):
        message = message[len("Value error, "):]
    more = len(exc.errors()) - 1
    if more:
        message += f" (and {more} more error{'s' if more > 1 else ''})"
    cls = UnitError if err["type"] == "unit" else ConfigError
    return cls(message, file=origin, line=_find_line(text, loc), key=key or None)


_KIND_TAGS = {"clock", "switcher", "spur", "burst", "cable", "h_loop", "e_stub"}


def _clean_loc(loc: tuple) -> tuple:
    """Drop pydantic's union bookkeeping (variant tags and type names) from an error path."""
    out: list = []
    for part in loc:
        if isinstance(part, str) and ("[" in part or "(" in part):
            continue
        if isinstance(part, str) and part in _KIND_TAGS and out and isinstance(out[-1], int):
            continue
        out.append(part)
    return tuple(out)


def _format_key(loc: tuple) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


_HEADER = re.compile(r"^\s*\[\[?\s*([A-Za-z0-9_.\-]+)\s*\]?\]\s*(#.*)?$")


def _has_header(lines: list[str], table: str) -> bool:
    return any((m := _HEADER.match(line)) and m.group(1) == table for line in lines)


def _find_line(text: str, loc: tuple) -> int | None:
    """Best-effort line of a key path in the raw TOML (tomllib keeps no positions)."""
    lines = text.splitlines()
    table, index, keys = "", None, [p for p in loc if isinstance(p, str)]
    if loc and isinstance(loc[0], str) and len(loc) > 1 and isinstance(loc[1], int):
        table, index = loc[0], loc[1]
        keys = [p for p in loc[2:] if isinstance(p, str)]
    elif loc and isinstance(loc[0], str) and (len(loc) > 1 or _has_header(lines, loc[0])):
        table, keys = loc[0], [p for p in loc[1:] if isinstance(p, str)]
    start, count = 0, -1
    if table:
        for i, line in enumerate(lines):
            m = _HEADER.match(line)
            if m and m.group(1) == table:
                count += 1
                if index is None or count == index:
                    start = i
                    break
        else:
            return None
        if not keys:
            return start + 1
    key = keys[0] if keys else ""
    for i in range(start, len(lines)):
        if i > start and table and _HEADER.match(lines[i]):
            break
        if re.match(rf"^\s*{re.escape(key)}\s*=", lines[i]):
            return i + 1
    return start + 1 if table else None
