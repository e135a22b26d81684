"""The simulated board file: emitters, ambient carriers and the physical truth of the bench.

A board file is TOML (``schema = 1``) read through :mod:`bench.tomlsource` and validated into
frozen pydantic models; unknown keys are refused with a "did you mean" hint. Quantities are
strings with units (``"25 MHz"``, ``"1.2 cm2"``, ``"3.3 V"``); plain numbers are used only for
dimensionless values (duty cycle, quality factor, turns, direction vectors, tolerance in ppm).
Every error is one line ``FILE:LINE: key.path: expected ..., found ...``
(:class:`~bench.errors.ConfigError`, exit code 2). The format is described for users in
``docs/board-format.md``.

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
from importlib import resources
from pathlib import Path
from typing import Annotated, Any, Literal, Optional, Union

import numpy as np
import pydantic
from pydantic import BaseModel, ConfigDict, Field, StrictBool, StrictFloat, StrictInt, StrictStr

from bench.errors import ConfigError
from bench.tomlsource import (
    TomlSource,
    bench_error,
    check_schema,
    cross_check_error,
    format_value,
    parse_toml,
    quantity,
    quantity_list,
    read_toml,
    suggest,
    validation_to_config_error,
)
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

DEMO_BOARD_FILE = "demo-board.toml"

# ---------------------------------------------------------------------------------------------
# Field types: quantity strings -> SI floats (bench.tomlsource), plain numbers where unitless
# ---------------------------------------------------------------------------------------------

Name = Annotated[StrictStr, Field(min_length=1)]
PositiveHz = quantity("frequency", positive=True)
#: A radio frequency: "30 mHz" (millihertz) there is a case slip for "30 MHz" and is refused.
RadioHz = quantity("frequency", positive=True, radio=True)
PositiveMetre = quantity("length", positive=True)
NonNegativeMetre = quantity("length", non_negative=True)
PositiveSecond = quantity("time", positive=True)
PositiveVolt = quantity("voltage", positive=True)
PositiveAmpere = quantity("current", positive=True)
PositiveOhm = quantity("resistance", positive=True)
PositiveHenry = quantity("inductance", positive=True)
PositiveFarad = quantity("capacitance", positive=True)
PositiveSquareMetre = quantity("area", positive=True)
Decibel = quantity("db")
NonNegativeDecibel = quantity("db", non_negative=True)
DbuvPerM = quantity("dbuv_per_m")
LengthPair = quantity_list("length", 2)
LengthTriple = quantity_list("length", 3)
Fraction = Annotated[StrictFloat, Field(gt=0.0, lt=1.0)]
PositiveNumber = Annotated[StrictFloat, Field(gt=0.0)]


def _number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _direction(value: Any) -> tuple[float, float, float]:
    """``[x, y, z]`` (plain numbers, not all zero) -> unit vector."""
    if not (isinstance(value, (list, tuple)) and len(value) == 3 and all(map(_number, value))):
        raise bench_error(f"expected a direction [x, y, z] of three plain numbers like "
                          f"[0, 0, 1], found {format_value(value)}")
    floats = [float(c) for c in value]
    norm = math.sqrt(sum(c * c for c in floats))
    if not norm > 0.0 or not math.isfinite(norm):
        raise bench_error(f"expected a non-zero finite direction [x, y, z], found "
                          f"{format_value(value)}")
    return tuple(c / norm for c in floats)


def _parse_gain(value: Any) -> float:
    """A gain relative to an isotropic radiator, ``"5 dBi"`` (or ``"5 dB"``) -> dBi.

    Raises
    ------
    ConfigError
        The text is not a gain.
    """
    text = value.strip() if isinstance(value, str) else value
    if isinstance(text, str) and text.lower().endswith("dbi"):
        text = text[:-1]
    try:
        return parse(text, "db")
    except ConfigError:
        raise ConfigError(f'expected a gain like "5 dBi" (units: dBi, dB), found '
                          f"{format_value(value)}") from None


def _gain_row(rows: Any, index: int, previous_hz: float | None) -> tuple[float, float]:
    """Row ``index`` of a gain table as (frequency in Hz, gain in dBi), checked alone."""
    row = rows[index]
    if not (isinstance(row, (list, tuple)) and len(row) == 2):
        raise cross_check_error([((index,), 'expected a row [frequency, gain] like '
                                            f'["100 MHz", "1.5 dBi"], found {format_value(row)}')])
    try:
        freq_hz = parse(row[0], "frequency", radio=True)
    except ConfigError as exc:
        raise cross_check_error([((index, 0), exc.message)]) from None
    if not freq_hz > 0.0:
        raise cross_check_error([((index, 0), f"expected a positive frequency, found "
                                              f"{format_value(row[0])}")])
    if previous_hz is not None and not freq_hz > previous_hz:
        raise cross_check_error([((index, 0), f"expected a frequency above the row before "
                                              f"({format_value(rows[index - 1][0])}), found "
                                              f"{format_value(row[0])}")])
    try:
        return freq_hz, _parse_gain(row[1])
    except ConfigError as exc:
        raise cross_check_error([((index, 1), exc.message)]) from None


def _gain_spec(value: Any) -> Union[float, tuple[tuple[float, float], ...]]:
    """One gain (``"2 dBi"``) or a table of at least two (frequency, gain) rows."""
    if not isinstance(value, (list, tuple)):
        try:
            return _parse_gain(value)
        except ConfigError as exc:
            raise bench_error(exc.message) from None
    if len(value) < 2:
        raise bench_error(f'expected one gain like "2 dBi" or a table of at least 2 rows '
                          f"[frequency, gain], found {format_value(value)}")
    rows: list[tuple[float, float]] = []
    for index in range(len(value)):
        rows.append(_gain_row(value, index, rows[-1][0] if rows else None))
    return tuple(rows)


Direction = Annotated[tuple[float, float, float], pydantic.BeforeValidator(_direction)]
GainSpec = Annotated[Union[float, tuple[tuple[float, float], ...]],
                     pydantic.BeforeValidator(_gain_spec)]


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


def _refuse(problems: list) -> None:
    """Raise the (relative key path, message) problems of a cross-check, if any."""
    if problems:
        raise cross_check_error(problems)


# ---------------------------------------------------------------------------------------------
# Board outline
# ---------------------------------------------------------------------------------------------

class BoardOutline(_Model):
    """``[board]``: outline and stack-up.

    Attributes
    ----------
    outline_m : tuple of (x, y)
        Polygon of the board edge in board coordinates, metres (at least 3 corners).
    thickness_m : float
        Board thickness, metres (for drawings; the emitters carry their own depth).
    """

    outline_m: Annotated[tuple[LengthPair, ...], Field(min_length=3)] = Field(alias="outline")
    thickness_m: PositiveMetre = Field(default=1.6e-3, alias="thickness")

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
    """Name, position (x, y) on the board in m, depth below the top surface in m."""

    name: Name
    position_m: LengthPair = Field(alias="position")
    depth_m: NonNegativeMetre = Field(default=0.0, alias="depth")
    tolerance_ppm: Annotated[StrictFloat, Field(ge=0.0, le=1e4)] = 0.0


class _Dipole(_Placed):
    """A small dipole: magnetic (``loop_area`` in m^2) or electric (``length`` in m)."""

    dipole: Literal["magnetic", "electric"]
    axis: Direction
    loop_area_m2: Optional[PositiveSquareMetre] = Field(default=None, alias="loop_area")
    length_m: Optional[PositiveMetre] = Field(default=None, alias="length")

    @pydantic.model_validator(mode="after")
    def _coupling(self) -> "_Dipole":
        wanted, other = ("loop_area", "length") if self.dipole == "magnetic" else (
            "length", "loop_area")
        values = {"loop_area": self.loop_area_m2, "length": self.length_m}
        problems = []
        if values[wanted] is None:
            problems.append(((wanted,), f"expected {wanted} with dipole = \"{self.dipole}\", "
                                        f"found no {wanted} key"))
        if values[other] is not None:
            problems.append(((other,), f"expected no {other} with dipole = \"{self.dipole}\" "
                                       f"(it takes {wanted}), found {other} = {values[other]:g} "
                                       f"{'m2' if other == 'loop_area' else 'm'}"))
        _refuse(problems)
        return self

    @property
    def coupling_m_or_m2(self) -> float:
        """Area (magnetic, m^2) or length (electric, m) that turns current into a moment."""
        return self.loop_area_m2 if self.dipole == "magnetic" else self.length_m


class _Trapezoid(_Dipole):
    """A trapezoidal waveform: frequency in Hz, amplitude in V, rise time in s, impedance in ohm."""

    frequency_hz: RadioHz = Field(alias="frequency")
    amplitude_v: PositiveVolt = Field(alias="amplitude")
    duty: Fraction
    rise_time_s: PositiveSecond = Field(alias="rise_time")
    impedance_ohm: PositiveOhm = Field(alias="impedance")

    @pydantic.model_validator(mode="after")
    def _edges_fit(self) -> "_Trapezoid":
        shortest_s = min(self.duty, 1.0 - self.duty) / self.frequency_hz
        if self.rise_time_s >= shortest_s:
            _refuse([(("rise_time",), f"expected a rise time shorter than the pulse and the gap "
                                      f"({shortest_s * 1e9:g} ns at duty {self.duty:g}), found "
                                      f"{self.rise_time_s * 1e9:g} ns")])
        return self


class ClockEmitter(_Trapezoid):
    """A clock net: trapezoidal harmonics (Paul ch. 3) driving a current loop or a trace."""

    kind: Literal["clock"]


class SwitcherEmitter(_Trapezoid):
    """A switching converter's switch node; optional ringing of the parasitic LC.

    ``ring_frequency`` (Hz) and ``ring_q`` multiply the harmonics by a second-order resonance
    (gain ``ring_q`` at ``ring_frequency``), the switch-node ringing that lifts harmonics in the
    hundreds of MHz.
    """

    kind: Literal["switcher"]
    ring_frequency_hz: Optional[RadioHz] = Field(default=None, alias="ring_frequency")
    ring_q: Optional[PositiveNumber] = None

    @pydantic.model_validator(mode="after")
    def _ring(self) -> "SwitcherEmitter":
        if self.ring_frequency_hz is None and self.ring_q is not None:
            _refuse([(("ring_frequency",), "expected ring_frequency with ring_q (they go "
                                           "together), found no ring_frequency key")])
        if self.ring_frequency_hz is not None and self.ring_q is None:
            _refuse([(("ring_q",), "expected ring_q with ring_frequency (they go together), "
                                   "found no ring_q key")])
        return self


class SpurEmitter(_Dipole):
    """A single CW line (e.g. a PLL spur): ``frequency`` in Hz, peak ``current`` in A."""

    kind: Literal["spur"]
    frequency_hz: RadioHz = Field(alias="frequency")
    current_a: PositiveAmpere = Field(alias="current")


class BurstEmitter(_Dipole):
    """A burst-modulated carrier (a radio sending packets): peak current in A while on.

    ``repetition`` is the burst repetition frequency (Hz), ``duty`` the on fraction of each
    period.
    """

    kind: Literal["burst"]
    frequency_hz: RadioHz = Field(alias="frequency")
    current_a: PositiveAmpere = Field(alias="current")
    repetition_hz: PositiveHz = Field(alias="repetition")
    duty: Annotated[StrictFloat, Field(gt=0.0, le=1.0)]


class CableEmitter(_Placed):
    """An attached cable carrying common-mode current, radiating as a short electric dipole.

    The common-mode voltage is ``coupling`` (dB, usually negative) times the harmonic voltage
    of the emitter ``driven_by``; the cable's common-mode impedance is a series resonance at the
    quarter-wave frequency c/(4*length) with quality factor ``resonance_q`` and radiation
    resistance ``resistance`` (ohm). ``axis`` is the direction in which the cable leaves the
    board; ``length`` is in m.
    """

    kind: Literal["cable"]
    axis: Direction
    length_m: PositiveMetre = Field(alias="length")
    driven_by: Name
    coupling_db: Decibel = Field(alias="coupling")
    resonance_q: PositiveNumber = 3.0
    resistance_ohm: PositiveOhm = Field(default=36.5, alias="resistance")


Emitter = Annotated[
    Union[ClockEmitter, SwitcherEmitter, SpurEmitter, BurstEmitter, CableEmitter],
    Field(discriminator="kind"),
]


# ---------------------------------------------------------------------------------------------
# Ambient, probes, site, stage, receiver
# ---------------------------------------------------------------------------------------------

class Ambient(_Model):
    """A carrier present with the board off: frequency in Hz, field at the antenna in dBuV/m.

    ``polarization = "both"`` means the carrier is seen equally in both polarizations;
    otherwise the other polarization sees it reduced by the site's cross-polar rejection.
    """

    name: Name
    frequency_hz: RadioHz = Field(alias="frequency")
    field_dbuv_per_m: DbuvPerM = Field(alias="field")
    polarization: Literal["horizontal", "vertical", "both"] = "both"


class HLoopProbe(_Model):
    """A shielded H-field loop probe: loop ``radius`` in m, ``turns``, inductance in H.

    ``axis = "horizontal"``: the loop stands upright and its axis turns with the stage's A axis
    (0 deg along +x); the tip is the bottom of the loop. ``axis = "vertical"``: the loop lies
    flat, axis along z, the tip is the loop centre. Give ``inductance`` or ``wire_radius`` (m;
    then L = mu0*a*(ln(8a/b) - 2)*N^2), or neither (an ideal loop into 50 ohm).
    """

    tool: Annotated[StrictInt, Field(ge=1)]
    kind: Literal["h_loop"]
    radius_m: PositiveMetre = Field(alias="radius")
    turns: Annotated[StrictInt, Field(ge=1)] = 1
    axis: Literal["horizontal", "vertical"] = "horizontal"
    inductance_h: Optional[PositiveHenry] = Field(default=None, alias="inductance")
    wire_radius_m: Optional[PositiveMetre] = Field(default=None, alias="wire_radius")

    @pydantic.model_validator(mode="after")
    def _geometry(self) -> "HLoopProbe":
        if self.inductance_h is not None and self.wire_radius_m is not None:
            _refuse([(("wire_radius",), "expected inductance or wire_radius, found both")])
        if self.wire_radius_m is not None and not self.wire_radius_m < self.radius_m / 4.0:
            _refuse([(("wire_radius",), f"expected a wire radius below radius/4 "
                                        f"({self.radius_m / 4.0 * 1e3:g} mm) for the loop "
                                        f"inductance formula, found {self.wire_radius_m * 1e3:g} mm")])
        return self


class EProbe(_Model):
    """A short E-field stub probe reading E_z: effective height in m, capacitance in F."""

    tool: Annotated[StrictInt, Field(ge=1)]
    kind: Literal["e_stub"]
    effective_height_m: PositiveMetre = Field(alias="effective_height")
    capacitance_f: Optional[PositiveFarad] = Field(default=None, alias="capacitance")


Probe = Annotated[Union[HLoopProbe, EProbe], Field(discriminator="kind")]


class Site(_Model):
    """``[site]``: far-field site (distances in m) and receive chain (dB).

    ``antenna_gain`` is one gain (``"2 dBi"``) or a table ``[["30 MHz", "-9 dBi"], ...]`` with
    strictly increasing frequencies, stored as (Hz, dBi) rows; between points the gain is
    interpolated in dB against log10(f), outside the table it is held at the end values.
    """

    distance_m: PositiveMetre = Field(alias="distance")
    table_height_m: PositiveMetre = Field(default=0.8, alias="table_height")
    ground_plane: StrictBool = True
    antenna_gain: GainSpec
    cable_loss_db: Decibel = Field(default=0.0, alias="cable_loss")
    preamp_gain_db: Decibel = Field(default=0.0, alias="preamp_gain")
    cross_polar_rejection_db: Decibel = Field(default=20.0, alias="cross_polar_rejection")

    def antenna_gain_dbi(self, freq_hz) -> np.ndarray:
        """Receive-antenna gain, dBi, at ``freq_hz`` (array, Hz)."""
        f = np.asarray(freq_hz, dtype=float)
        if not isinstance(self.antenna_gain, tuple):
            return np.full(f.shape, float(self.antenna_gain))
        table = np.asarray(self.antenna_gain, dtype=float)
        return np.interp(np.log10(f), np.log10(table[:, 0]), table[:, 1])


class Stage(_Model):
    """``[stage]``: stage coordinates of the board origin, m."""

    board_origin_m: LengthTriple = Field(alias="board_origin")


class Receiver(_Model):
    """``[receiver]``: the analyzer's own noise figure, dB (sets the displayed noise level)."""

    noise_figure_db: NonNegativeDecibel = Field(alias="noise_figure")


# ---------------------------------------------------------------------------------------------
# The whole file
# ---------------------------------------------------------------------------------------------

class Board(_Model):
    """A whole board file, validated (see the module docstring for the layout)."""

    schema_version: Literal[1] = Field(alias="schema")
    name: Name
    description: StrictStr = ""
    board: BoardOutline
    emitters: tuple[Emitter, ...] = ()
    ambient: tuple[Ambient, ...] = ()
    probes: tuple[Probe, ...] = ()
    site: Site
    stage: Stage
    receiver: Receiver

    @pydantic.model_validator(mode="after")
    def _cross_checks(self) -> "Board":
        _refuse(_name_problems(self) + _tool_problems(self) + _driver_problems(self))
        return self

    def probe(self, tool: int) -> Optional[Probe]:
        """The probe mounted as ``tool``, or None when the board file does not define it."""
        return next((p for p in self.probes if p.tool == tool), None)

    def emitter(self, name: str) -> Emitter:
        """The emitter called ``name``; KeyError when there is none."""
        for e in self.emitters:
            if e.name == name:
                return e
        raise KeyError(name)


def _name_problems(board: Board) -> list:
    """Emitter and ambient names share one name space (lines are tagged by name)."""
    seen: dict[str, str] = {}
    problems = []
    named = [("emitters", i, e.name) for i, e in enumerate(board.emitters)]
    named += [("ambient", i, a.name) for i, a in enumerate(board.ambient)]
    for table, index, name in named:
        if name in seen:
            problems.append(((table, index, "name"), f"expected a name not used by another "
                                                     f"emitter or ambient carrier, found "
                                                     f"{format_value(name)} (also {seen[name]})"))
        seen.setdefault(name, f"{table}[{index}]")
    return problems


def _tool_problems(board: Board) -> list:
    seen: dict[int, int] = {}
    problems = []
    for index, probe in enumerate(board.probes):
        if probe.tool in seen:
            problems.append((("probes", index, "tool"), f"expected a tool number not used by "
                                                        f"another probe, found {probe.tool} "
                                                        f"(also probes[{seen[probe.tool]}])"))
        seen.setdefault(probe.tool, index)
    return problems


def _driver_problems(board: Board) -> list:
    drivers = [e.name for e in board.emitters if e.kind in ("clock", "switcher")]
    problems = []
    for index, e in enumerate(board.emitters):
        if e.kind == "cable" and e.driven_by not in drivers:
            problems.append((("emitters", index, "driven_by"),
                             f"expected the name of a clock or switcher emitter "
                             f"({', '.join(drivers) or 'none in this file'}), found "
                             f"{format_value(e.driven_by)}{suggest(e.driven_by, drivers)}"))
    return problems


# ---------------------------------------------------------------------------------------------
# Loading
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
        One line ``FILE:LINE: key.path: expected ..., found ...`` for the first problem in file
        order; ``.all_errors`` holds every problem found.
    """
    return _validate(parse_toml(text, origin))


def load_board(path: str | Path) -> Board:
    """Read and validate a board file (UTF-8); see :func:`parse_board`."""
    return _validate(read_toml(path))


def demo_board() -> Board:
    """The shipped demo board (``sequences/demo-board.toml`` in package ``bench.demo``)."""
    resource = resources.files("bench.demo").joinpath(DEMO_BOARD_FILE)
    return parse_board(resource.read_text(encoding="utf-8"), origin=DEMO_BOARD_FILE)


def _validate(source: TomlSource) -> Board:
    check_schema(source)
    try:
        return Board.model_validate(source.data)
    except pydantic.ValidationError as exc:
        raise validation_to_config_error(source, exc, Board) from None
