"""Bench files: which instruments, addresses, tables, limits and site this station has.

A bench file (TOML, ``schema = 1``) is separate from the portable sequence. Paths of tables and
photos are resolved relative to the bench file and must exist (unless the loader is told not to
check). Quantities are SI floats in fields whose name carries the unit.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any, Literal, Optional

import pydantic
from pydantic import BaseModel, ConfigDict, Field, StrictBool, StrictInt, StrictStr

from bench.stagelimits import DEFAULT_A_DEG, StageLimits, limit_problems
from bench.tomlsource import (
    bench_error,
    check_schema,
    cross_check_error,
    format_value,
    is_file,
    quantity,
    quantity_list,
    read_toml,
    validation_to_config_error,
)

__all__ = [
    "AnalyzerSection",
    "StageSection",
    "StageTravel",
    "SupplySection",
    "MastSection",
    "TurntableSection",
    "SiteSection",
    "Probe",
    "Transducers",
    "PhotoPoint",
    "Board",
    "Bench",
    "load_bench",
]

Address = Annotated[StrictStr, Field(min_length=1)]
#: Longest reply deadline an instrument section may ask for (one day): no bench means more,
#: and a typo such as "1e12 s" would otherwise hang a run for ever.
MAX_TIMEOUT_S = 86_400.0
# Typo guards on values no bench has (a census of bad inputs found "1e300" accepted in each):
#: an analyzer with all its attenuation in stays below this noise figure (from memory)
MAX_NOISE_FIGURE = "100 dB"
#: bench XYZ probe stages move at a few hundred mm/s at most (from memory)
MAX_FEED = "1 m/s"
#: a larger tolerance would accept a probe in the next grid cell (common practice: 1-10 mm pitch)
MAX_POSITION_TOLERANCE = "5 mm"
#: measurement distances and products stay within this (limits are given at up to 300 m)
MAX_SITE = "1000 m"
LengthPair = quantity_list("length", 2)
AnglePair = quantity_list("angle", 2)


def _resolve_path(value: Any, info: pydantic.ValidationInfo) -> Path:
    """A path relative to the bench file; must exist when the loader checks files."""
    if not isinstance(value, str) or not value:
        raise bench_error(f"expected a file path in quotes, found {format_value(value)}")
    context = info.context or {}
    base = Path(context.get("base_dir", "."))
    path = Path(value) if Path(value).is_absolute() else base / value
    if context.get("check_files", False) and not is_file(path):
        raise bench_error(f"expected an existing file (relative to the bench file), found no "
                          f"file at {format_value(value)}")
    return path


FilePath = Annotated[Path, pydantic.BeforeValidator(_resolve_path)]


def _pixel(value: Any) -> tuple[float, float]:
    ok = isinstance(value, (list, tuple)) and len(value) == 2 and all(
        isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)
    if not ok:
        raise bench_error(f"expected a pixel position [column, row] like [12, 30], found "
                          f"{format_value(value)}")
    return float(value[0]), float(value[1])


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


def _ordered_pairs(pairs: dict[str, tuple[float, float]], unit: str, scale: float) -> None:
    problems = [((key,), f"expected [min, max] with min < max, found "
                         f"[{lo * scale:g} {unit}, {hi * scale:g} {unit}]")
                for key, (lo, hi) in pairs.items() if lo >= hi]
    if problems:
        raise cross_check_error(problems)


class AnalyzerSection(_Model):
    """``[analyzer]``: address (VISA resource or serial URL), profile, timeout in s."""

    address: Address
    profile: StrictStr = "scpi-analyzer"
    timeout_s: Annotated[quantity("time", positive=True), Field(le=MAX_TIMEOUT_S)] = Field(10.0, alias="timeout")
    noise_figure_db: Optional[quantity("db", non_negative=True, at_most=MAX_NOISE_FIGURE)] = Field(
        None, alias="noise_figure")


class SupplySection(_Model):
    """``[supply]``: a SCPI bench supply that powers the board (ambient captures switch it off)."""

    address: Address
    profile: StrictStr = "scpi-supply"


class StageTravel(_Model):
    """``[stage] limits``: soft limits per axis, ``(min, max)`` in stage metres (A in degrees)."""

    x_m: LengthPair = Field(alias="x")
    y_m: LengthPair = Field(alias="y")
    z_m: LengthPair = Field(alias="z")
    a_deg: AnglePair = Field(DEFAULT_A_DEG, alias="a")

    def as_dict(self) -> dict[str, tuple[float, float]]:
        """``{"x": (min_m, max_m), "y": ..., "z": ...}`` (linear axes)."""
        return {"x": self.x_m, "y": self.y_m, "z": self.z_m}


class StageSection(_Model):
    """``[stage]``: the XYZ probe stage (G-code over a serial port or socket).

    ``board_origin_m`` is the stage position of board corner (0, 0) on the board's top
    surface; ``safe_z_m`` the stage z used for XY travel. ``baudrate`` None means the stage
    profile's ``[connection] baudrate``. :attr:`safety_limits` is what the stage driver and the
    planner enforce.
    """

    address: Address
    profile: StrictStr = "gcode-cartesian"
    # from memory: the fastest common USB-serial bridges run at 12 Mbaud
    baudrate: Optional[Annotated[StrictInt, Field(gt=0, le=12_000_000)]] = None
    limits: StageTravel
    safe_z_m: quantity("length") = Field(alias="safe_z")
    max_feed_m_per_s: quantity("speed", positive=True, at_most=MAX_FEED) = Field(alias="max_feed")
    position_tolerance_m: quantity("length", positive=True, at_most=MAX_POSITION_TOLERANCE) = Field(
        5e-5, alias="position_tolerance")
    board_origin_m: quantity_list("length", 3) = Field(alias="board_origin")
    rotary_axis: StrictBool = False

    @pydantic.model_validator(mode="after")
    def _inside(self) -> "StageSection":
        problems = limit_problems(
            x_m=self.limits.x_m, y_m=self.limits.y_m, z_m=self.limits.z_m, a_deg=self.limits.a_deg,
            safe_z_m=self.safe_z_m, max_feed_m_per_s=self.max_feed_m_per_s,
            position_tolerance_m=self.position_tolerance_m)
        if not problems and self.safe_z_m <= self.board_origin_m[2]:
            problems.append((("safe_z",), f"expected a travel height above the board surface "
                                          f"(z = {self.board_origin_m[2] * 1e3:g} mm), found "
                                          f"{self.safe_z_m * 1e3:g} mm"))
        if problems:
            raise cross_check_error(problems)
        return self

    @property
    def safety_limits(self) -> StageLimits:
        """The limits the stage driver and the planner enforce (one type for both)."""
        return StageLimits(x_m=self.limits.x_m, y_m=self.limits.y_m, z_m=self.limits.z_m,
                           safe_z_m=self.safe_z_m, max_feed_m_per_s=self.max_feed_m_per_s,
                           position_tolerance_m=self.position_tolerance_m,
                           rotary_axis=self.rotary_axis, a_deg=self.limits.a_deg)


class MastSection(_Model):
    """``[mast]``: antenna mast; height limits in m."""

    address: Address
    profile: StrictStr = "line-positioner"
    height_limits_m: quantity_list("length", 2, non_negative=True) = Field(
        alias="height_limits")

    @pydantic.model_validator(mode="after")
    def _ordered(self) -> "MastSection":
        _ordered_pairs({"height_limits": self.height_limits_m}, "m", 1.0)
        return self


class TurntableSection(_Model):
    """``[turntable]``: azimuth limits in deg."""

    address: Address
    profile: StrictStr = "line-positioner"
    azimuth_limits_deg: AnglePair = Field(alias="azimuth_limits")

    @pydantic.model_validator(mode="after")
    def _ordered(self) -> "TurntableSection":
        _ordered_pairs({"azimuth_limits": self.azimuth_limits_deg}, "deg", 1.0)
        return self


class SiteSection(_Model):
    """``[site]``: measurement distance and the largest dimension of the product, m."""

    distance_m: quantity("length", positive=True, at_most=MAX_SITE) = Field(alias="distance")
    eut_size_m: Optional[quantity("length", positive=True, at_most=MAX_SITE)] = Field(None, alias="eut_size")


class Probe(_Model):
    """``[probes.<name>]``: near-field probe kind, tool number and factor table path."""

    kind: Literal["h-loop", "e-probe"]
    # tool 0 is no probe: far-field steps park the stage there (T0), so no probe may use it;
    # a T word has at most four digits on the controllers we know (common practice)
    tool: Annotated[StrictInt, Field(ge=1, le=9999)]
    factor: FilePath


class Transducers(_Model):
    """``[transducers]``: far-field receive chain tables (preamp gain subtracts)."""

    antenna: FilePath
    cables: tuple[FilePath, ...] = ()
    preamp: Optional[FilePath] = None


class PhotoPoint(_Model):
    """A point of the board photo: pixel (column, row) and board position in m."""

    pixel: Annotated[tuple[float, float], pydantic.BeforeValidator(_pixel)]
    board_m: LengthPair = Field(alias="board")


class Board(_Model):
    """``[board]``: outline in board metres, optional photo with reference points."""

    outline_m: Optional[Annotated[tuple[LengthPair, ...], Field(min_length=3)]] = Field(
        None, alias="outline")
    photo: Optional[FilePath] = None
    photo_points: tuple[PhotoPoint, ...] = ()


class Bench(_Model):
    """A whole bench file (see the module docstring)."""

    schema_version: Literal[1] = Field(alias="schema")
    name: StrictStr
    analyzer: AnalyzerSection
    stage: Optional[StageSection] = None
    mast: Optional[MastSection] = None
    turntable: Optional[TurntableSection] = None
    site: Optional[SiteSection] = None
    probes: dict[str, Probe] = {}
    transducers: Optional[Transducers] = None
    board: Optional[Board] = None
    supply: Optional[SupplySection] = None
    _source_path: Optional[Path] = pydantic.PrivateAttr(None)

    @property
    def source_path(self) -> Optional[Path]:
        """The bench file this was read from (relative profile paths resolve against its folder)."""
        return self._source_path

    @pydantic.model_validator(mode="after")
    def _tools(self) -> "Bench":
        seen: dict[int, str] = {}
        problems = []
        for name, probe in self.probes.items():
            if probe.tool in seen:
                problems.append((("probes", name, "tool"),
                                 f"expected a tool number not used by another probe, found "
                                 f"{probe.tool} (also probe '{seen[probe.tool]}')"))
            seen.setdefault(probe.tool, name)
        if problems:
            raise cross_check_error(problems)
        return self

    @property
    def warnings(self) -> tuple[str, ...]:
        """Advice that does not stop a run."""
        out = []
        if self.mast is not None and self.transducers is None:
            out.append("[mast] is set but [transducers] is not: far-field readings stay in "
                       "dBuV, not field strength")
        if self.board is not None and self.board.photo is not None and len(
                self.board.photo_points) < 2:
            out.append("[board] photo needs at least 2 photo_points to be placed on the map")
        return tuple(out)


def load_bench(path: str | Path, *, check_files: bool = True) -> Bench:
    """Read and validate a bench file.

    Parameters
    ----------
    path : str or Path
        The TOML file; table and photo paths inside are relative to its folder.
    check_files : bool
        Require every referred table and photo to exist.

    Raises
    ------
    ConfigError
        One line ``FILE:LINE: KEY.PATH: expected ..., found ...``; ``.all_errors`` holds all.
    """
    source = read_toml(path)
    check_schema(source)
    context = {"base_dir": Path(path).parent, "check_files": check_files}
    try:
        bench = Bench.model_validate(source.data, context=context)
    except pydantic.ValidationError as exc:
        raise validation_to_config_error(source, exc, Bench) from None
    bench._source_path = Path(path)
    return bench
