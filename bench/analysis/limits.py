"""Emission limit lines: a small TOML file format, built-in tables and vectorised evaluation.

A limit file (``schema = 1``) names the standard it comes from and holds one line per detector
(``quasi-peak``, ``peak``, ``average``), each a list of frequency segments::

    schema = 1
    name = "cispr32-class-b-3m"
    title = "CISPR 32 class B radiated, 3 m"
    source = "CISPR 32:2015 Table A.4 clause A4.2; Table A.5 clauses A5.1, A5.2"
    quantity = "dbuv_per_m"          # or "dbuv" (conducted), "dbua_per_m"
    distance = "3 m"                 # required for field quantities, absent for "dbuv"

    [lines.quasi-peak]
    bandwidth = "120 kHz"            # optional, informative
    clause = "Table A.4 clause A4.2" # optional
    segments = [
      { from = "30 MHz", to = "230 MHz", level = "40 dBuV/m" },
      { from = "230 MHz", to = "1 GHz", level = "47 dBuV/m" },
    ]

    [lines.average]
    start_exclusive = true           # exactly 1 GHz belongs to the quasi-peak line
    segments = [{ from = "1 GHz", to = "3 GHz", level = "50 dBuV/m" }, ...]

A level is one string (flat segment) or two strings ``["66 dBuV", "56 dBuV"]`` for a segment that
changes linearly with log10(frequency) between its ends (CISPR 32 conducted class B, 0.15-0.5
MHz). Field levels may also be written linearly (``"100 uV/m"``) as FCC rules state them.

Rules implemented (docs/physics.md, section 7):

* At a frequency shared by two segments the **lower** value applies (CISPR 32 table notes, "the
  lower limit shall apply at the transition frequency", from memory; FCC 47 CFR 15.109(c)
  "the tighter limit applies at the band edges").
* Outside every segment of a line the level is NaN.
* Exactly 1 GHz belongs to the quasi-peak table in the built-in files; the lines above 1 GHz
  start just above it (``start_exclusive = true``, FCC §15.35(b) "above 1000 MHz").
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, replace
from importlib import resources
from pathlib import Path
from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, StrictBool, StrictStr, ValidationError

from bench import physics, units
from bench.errors import AnalysisError, ConfigError, UnitError
from bench.tomlsource import (
    TomlSource,
    check_schema,
    format_value,
    quantity,
    read_toml,
    suggest,
    validation_to_config_error,
)

__all__ = [
    "DETECTORS",
    "LimitLine",
    "LimitSegment",
    "LimitSet",
    "distance_correction_db",
    "list_limits",
    "load_limit",
    "near_field_warnings",
]

DETECTORS = ("quasi-peak", "peak", "average")
_FIELD_QUANTITIES = ("dbuv_per_m", "dbua_per_m")
# Linear spellings accepted for a level, per quantity: unit -> factor to the dB reference unit.
# Exact spellings: SI prefixes and unit symbols are case-sensitive (SI Brochure, BIPM, 9th
# edition 2019, section 3), "u" standing for the micro sign (common practice).
_LINEAR_UNITS = {
    "dbuv_per_m": {"uV/m": 1.0, "µV/m": 1.0, "mV/m": 1e3, "V/m": 1e6},
    "dbuv": {"uV": 1.0, "µV": 1.0, "mV": 1e3, "V": 1e6},
    "dbua_per_m": {"uA/m": 1.0, "µA/m": 1.0, "mA/m": 1e3, "A/m": 1e6},
}
_LINEAR = re.compile(r"^\s*([-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?)\s*(\S+)\s*$")
_NAME = r"^[a-z0-9][a-z0-9._-]*$"


# ----------------------------------------------------------------------------- evaluated form


@dataclass(frozen=True)
class LimitSegment:
    """One frequency segment of a limit line.

    Parameters
    ----------
    start_hz, stop_hz : float
        Frequency range in Hz, ``start_hz < stop_hz``.
    start_level, stop_level : float
        Level at each end, in the unit of the limit set. Equal for a flat segment; otherwise
        the level changes linearly with log10(frequency) (CISPR 32 conducted limits, "decreasing
        linearly with the logarithm of the frequency").
    """

    start_hz: float
    stop_hz: float
    start_level: float
    stop_level: float

    def level_at(self, freq_hz: np.ndarray) -> np.ndarray:
        """Level at frequencies inside the segment (no range check), linear in log10(f)."""
        if self.start_level == self.stop_level:
            return np.full(np.shape(freq_hz), self.start_level)
        # L(f) = L1 - (L1 - L2) * log10(f/f1) / log10(f2/f1): linear in log f (CISPR 32, 0.15-0.5 MHz)
        fraction = np.log10(freq_hz / self.start_hz) / math.log10(self.stop_hz / self.start_hz)
        return self.start_level + (self.stop_level - self.start_level) * fraction

    def shifted(self, offset_db: float) -> LimitSegment:
        """The same segment with both levels moved by ``offset_db``."""
        return replace(self, start_level=self.start_level + offset_db,
                       stop_level=self.stop_level + offset_db)


@dataclass(frozen=True)
class LimitLine:
    """The limit for one detector: segments in increasing frequency.

    Parameters
    ----------
    detector : str
        ``"quasi-peak"``, ``"peak"`` or ``"average"``.
    segments : tuple of LimitSegment
        Sorted, non-overlapping (touching ends allowed, gaps allowed and NaN).
    bandwidth_hz : float or None
        Measurement bandwidth the standard states for this line, in Hz.
    clause : str
        Table / clause of the standard for this line.
    start_exclusive : bool
        The line starts just above its first frequency (that frequency belongs to another line).
    """

    detector: str
    segments: tuple[LimitSegment, ...]
    bandwidth_hz: float | None = None
    clause: str = ""
    start_exclusive: bool = False

    @property
    def start_hz(self) -> float:
        """Lowest frequency of the line in Hz."""
        return self.segments[0].start_hz

    @property
    def stop_hz(self) -> float:
        """Highest frequency of the line in Hz."""
        return self.segments[-1].stop_hz

    def level(self, freq_hz) -> np.ndarray:
        """Limit level at each frequency (Hz); NaN outside the line; lower value at a joint."""
        freq = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        out = np.full(freq.shape, np.nan)
        for i, seg in enumerate(self.segments):
            above_start = freq > seg.start_hz if (i == 0 and self.start_exclusive) \
                else freq >= seg.start_hz
            inside = above_start & (freq <= seg.stop_hz)
            # fmin ignores NaN: where two segments share a frequency the lower one wins
            # (CISPR 32 table notes, from memory; FCC 47 CFR 15.109(c)).
            out[inside] = np.fmin(out[inside], seg.level_at(freq[inside]))
        return out.reshape(np.shape(freq_hz))

    def shifted(self, offset_db: float) -> LimitLine:
        """The same line with every level moved by ``offset_db``."""
        return replace(self, segments=tuple(s.shifted(offset_db) for s in self.segments))


@dataclass(frozen=True)
class LimitSet:
    """A set of limit lines from one standard, class and distance.

    Parameters
    ----------
    name : str
        Short identifier, e.g. ``"cispr32-class-b-3m"``.
    title : str
        Human title.
    source : str
        Standard, table and clause the values come from.
    quantity : str
        Unit of every level: ``"dbuv_per_m"``, ``"dbuv"`` or ``"dbua_per_m"``.
    distance_m : float or None
        Measurement distance in m (None for conducted limits).
    lines : tuple of LimitLine
        One line per detector.
    path : str or None
        File the set was read from.
    notes : str
        Free text from the file.
    extrapolated_from_m : float or None
        Original distance when :meth:`at_distance` produced this set.
    """

    name: str
    title: str
    source: str
    quantity: str
    distance_m: float | None
    lines: tuple[LimitLine, ...]
    path: str | None = None
    notes: str = ""
    extrapolated_from_m: float | None = None

    @property
    def detectors(self) -> tuple[str, ...]:
        """Detectors that have a line in this set."""
        return tuple(line.detector for line in self.lines)

    def line(self, detector: str) -> LimitLine | None:
        """The line for ``detector``, or None when the set has none (e.g. no conducted peak)."""
        if detector not in DETECTORS:
            raise AnalysisError(
                f"limit {self.name!r}: unknown detector {detector!r}, expected one of "
                f"{', '.join(DETECTORS)}"
            )
        return next((ln for ln in self.lines if ln.detector == detector), None)

    def level(self, detector: str, freq_hz) -> np.ndarray:
        """Limit for ``detector`` at each frequency.

        Parameters
        ----------
        detector : str
            ``"quasi-peak"``, ``"peak"`` or ``"average"``.
        freq_hz : array_like
            Frequencies in Hz.

        Returns
        -------
        numpy.ndarray
            Levels in :attr:`quantity` units, same shape as ``freq_hz``; NaN outside the
            line's range or when the set has no line for ``detector``.
        """
        line = self.line(detector)
        if line is None:
            return np.full(np.shape(freq_hz), np.nan)
        return line.level(freq_hz)

    def screening_level(self, freq_hz) -> np.ndarray:
        """Lowest limit of any detector at each frequency (NaN where no line applies).

        A peak-detector trace below this level meets every line, since peak >= quasi-peak >=
        average for any signal measured with the same bandwidth (CISPR 16-1-1 detector
        definitions; common practice in pre-scans).
        """
        levels = [line.level(freq_hz) for line in self.lines]
        return np.fmin.reduce(np.stack(levels), axis=0)

    def at_distance(self, distance_m: float, *, db_per_decade: float = 20.0) -> LimitSet:
        """The same limits moved to another measurement distance.

        Parameters
        ----------
        distance_m : float
            New distance in m.
        db_per_decade : float
            Fall-off rate; 20 dB/decade (1/r) is the far-field rule (FCC 47 CFR 15.31(f)(1)).
            (FCC 15.31(f)(2) uses 40 dB/decade below 30 MHz.)

        Returns
        -------
        LimitSet
            Levels shifted by ``db_per_decade * log10(d_old / d_new)``: 10 m -> 3 m is
            +10.46 dB at 20 dB/decade. Check :func:`near_field_warnings` for the new distance.
        """
        if self.distance_m is None:
            raise AnalysisError(
                f"limit {self.name!r} is a {self.quantity} limit with no distance; "
                "only field-strength limits can be moved to another distance"
            )
        offset_db = distance_correction_db(self.distance_m, distance_m, db_per_decade)
        return replace(
            self,
            name=f"{self.name}-at-{distance_m:g}m",
            title=f"{self.title}, extrapolated to {distance_m:g} m",
            source=f"{self.source}; extrapolated from {self.distance_m:g} m to {distance_m:g} m "
                   f"at {db_per_decade:g} dB/decade ({offset_db:+.2f} dB)",
            distance_m=float(distance_m),
            lines=tuple(line.shifted(offset_db) for line in self.lines),
            extrapolated_from_m=self.extrapolated_from_m or self.distance_m,
        )


def distance_correction_db(from_m: float, to_m: float, db_per_decade: float = 20.0) -> float:
    """dB to add to a level at ``from_m`` to get the level at ``to_m``.

    ``db_per_decade * log10(from_m / to_m)``; 20 dB/decade is the far-field (1/r) rule, so
    10 m -> 3 m gives +10.46 dB (FCC 47 CFR 15.31(f)(1): inverse linear distance).
    """
    if not (from_m > 0 and to_m > 0):
        raise AnalysisError(f"distances must be > 0 m, found {from_m!r} m and {to_m!r} m")
    return db_per_decade * math.log10(from_m / to_m)


# ----------------------------------------------------------------------------- near field


def near_field_warnings(distance_m: float, freq_hz, product_size_m: float | None = None
                        ) -> list[str]:
    """Warnings when a measurement distance is not in the far field.

    Parameters
    ----------
    distance_m : float
        Measurement distance in m.
    freq_hz : float or array_like
        Frequency or the frequencies of the sweep, in Hz (only the extremes matter).
    product_size_m : float, optional
        Largest dimension D of the product (the radiating structure) in m.

    Returns
    -------
    list of str
        Empty when the far-field assumptions hold. Checks (Ott; Balanis ch. 2, field regions):
        r < lambda/(2 pi) at the lowest frequency (a small source's near field, kr < 1) and
        r < 2 D^2 / lambda at the highest frequency (Fraunhofer distance of a product of size D).
    """
    freq = np.asarray(freq_hz, dtype=float).ravel()
    freq = freq[np.isfinite(freq) & (freq > 0)]
    if freq.size == 0:
        raise AnalysisError("near-field check needs at least one positive frequency in Hz")
    warnings: list[str] = []
    f_low, f_high = float(freq.min()), float(freq.max())
    kr1_m = physics.small_source_boundary_m(f_low)
    if distance_m < kr1_m:
        f_edge = units.C0_M_PER_S / (2.0 * math.pi * distance_m)
        warnings.append(
            f"{distance_m:g} m is inside lambda/2pi = {kr1_m:.3g} m at {units.format_hz(f_low)}: "
            f"a small source is in its near field below {units.format_hz(f_edge)}, so far-field "
            "limits and 20 dB/decade extrapolation do not hold there"
        )
    if product_size_m:
        fraunhofer_m = physics.fraunhofer_distance_m(product_size_m, f_high)
        if distance_m < fraunhofer_m:
            f_edge = units.C0_M_PER_S * distance_m / (2.0 * product_size_m**2)
            warnings.append(
                f"{distance_m:g} m is inside 2D^2/lambda = {fraunhofer_m:.3g} m for a "
                f"{product_size_m:g} m product at {units.format_hz(f_high)}: radiating near "
                f"field above {units.format_hz(f_edge)}, the pattern is not yet formed"
            )
    return warnings


# ----------------------------------------------------------------------------- file format


_Frequency = quantity("frequency", positive=True, radio=True)


class _SegmentModel(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)
    start_hz: _Frequency = Field(alias="from")
    stop_hz: _Frequency = Field(alias="to")
    level: Any  # unit depends on the file's quantity: parsed in _segment


class _LineModel(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)
    segments: list[_SegmentModel] = Field(min_length=1)
    # typo guard: measurement bandwidths are 200 Hz to 1 MHz (CISPR 16-1-1 bands A to E)
    bandwidth: quantity("frequency", positive=True, at_most="100 MHz") | None = None
    clause: StrictStr = ""
    start_exclusive: StrictBool = False


class _LimitFileModel(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)
    schema_version: Literal[1] = Field(alias="schema")
    name: StrictStr = Field(pattern=_NAME)
    title: StrictStr
    source: StrictStr = Field(min_length=1)
    quantity: Literal["dbuv_per_m", "dbuv", "dbua_per_m"]
    # typo guard: limits are specified at 3 m to 300 m (the longest: FCC 15.209 below 490 kHz)
    distance: quantity("length", positive=True, at_most="1000 m") | None = None
    notes: StrictStr = ""
    lines: dict[Literal["quasi-peak", "peak", "average"], _LineModel] = Field(min_length=1)


def _parse_level(text: Any, quantity_name: str) -> float:
    """A level string in the quantity's dB unit or, for FCC-style text, a linear unit."""
    try:
        return units.parse(text, quantity_name)
    except UnitError:
        match = _LINEAR.match(text) if isinstance(text, str) else None
        if not match:
            raise
        number, unit = match.group(1), match.group(2)
        factor = _LINEAR_UNITS[quantity_name].get(unit)
        meant = units.case_suggestion(unit, _LINEAR_UNITS[quantity_name])
        if factor is None and meant is not None:
            raise UnitError(f"expected a level like {units.DIMENSIONS[quantity_name]}, found "
                            f"{text.strip()}; did you mean {number} {meant}? (unit symbols and "
                            "SI prefixes are case-sensitive)") from None
        if not factor or float(number) <= 0:
            raise
        return 20.0 * math.log10(float(number) * factor)


#: Plausible limit levels, dB above the quantity's reference: every radiated and conducted
#: emission limit of the product standards lies well inside (common practice; a guard against
#: a typo such as a missing unit prefix, not a physical bound).
LEVEL_RANGE_DB = (-100.0, 200.0)


def _level(source: TomlSource, text: Any, quantity_name: str, path: tuple) -> float:
    try:
        value = _parse_level(text, quantity_name)
    except UnitError as exc:
        raise source.error(path, exc.message) from exc
    lo, hi = LEVEL_RANGE_DB
    if not lo <= value <= hi:
        raise source.error(path, f"expected a limit level from {lo:g} to {hi:g} dB above the "
                                 f"{quantity_name} reference, found {format_value(text)} ({value:.3g} dB)")
    return value


def _segment(source: TomlSource, model: _SegmentModel, quantity_name: str, path: tuple
             ) -> LimitSegment:
    if not model.start_hz < model.stop_hz:
        raise source.error(path, f"expected from < to, found from = "
                                 f"{units.format_hz(model.start_hz)}, to = "
                                 f"{units.format_hz(model.stop_hz)}")
    level, key = model.level, path + ("level",)
    if not isinstance(level, list):
        # units.parse explains bare numbers and wrong units.
        first = last = _level(source, level, quantity_name, key)
    elif len(level) == 2:
        first = _level(source, level[0], quantity_name, key)
        last = _level(source, level[1], quantity_name, key)
    else:
        raise source.error(key, f"expected a level like {units.DIMENSIONS[quantity_name]} or "
                                f"two levels [start, stop], found {format_value(level)}")
    return LimitSegment(model.start_hz, model.stop_hz, first, last)


def _line(source: TomlSource, detector: str, model: _LineModel, quantity_name: str
          ) -> LimitLine:
    path = ("lines", detector)
    segments = tuple(_segment(source, seg, quantity_name, path + ("segments", i))
                     for i, seg in enumerate(model.segments))
    for i in range(1, len(segments)):
        if segments[i].start_hz < segments[i - 1].stop_hz:
            raise source.error(path + ("segments", i, "from"),
                               "expected segments in increasing frequency without overlap, "
                               f"found {units.format_hz(segments[i].start_hz)} after a segment "
                               f"ending at {units.format_hz(segments[i - 1].stop_hz)}")
    return LimitLine(detector, segments, model.bandwidth, model.clause, model.start_exclusive)


def _limit_from_source(source: TomlSource) -> LimitSet:
    """Validate a parsed limit file; every error is one line with file, line and key path."""
    check_schema(source, 1)
    try:
        model = _LimitFileModel.model_validate(source.data)
    except ValidationError as exc:
        raise validation_to_config_error(source, exc, _LimitFileModel) from None
    is_field = model.quantity in _FIELD_QUANTITIES
    if is_field and model.distance is None:
        raise source.error(("distance",), 'expected a distance like "3 m" for a '
                                          f"{model.quantity} limit, found none")
    if not is_field and model.distance is not None:
        raise source.error(("distance",), f"expected no distance for a {model.quantity} "
                                          f"(conducted) limit, found {model.distance:g} m")
    lines = tuple(_line(source, det, model.lines[det], model.quantity)
                  for det in DETECTORS if det in model.lines)
    return LimitSet(model.name, model.title, model.source, model.quantity, model.distance,
                    lines, path=source.file, notes=model.notes)


# ----------------------------------------------------------------------------- loading


def _builtin_dir():
    return resources.files("bench").joinpath("data", "limits")


def _builtin_names() -> list[str]:
    return sorted(p.name[:-5] for p in _builtin_dir().iterdir() if p.name.endswith(".toml"))


def list_limits() -> dict[str, str]:
    """Built-in limit sets: name -> title, sorted by name."""
    return {name: load_limit(name).title for name in _builtin_names()}


def load_limit(name_or_path: str | Path) -> LimitSet:
    """Load a built-in limit set by name, or a user's limit file by path.

    Parameters
    ----------
    name_or_path : str or pathlib.Path
        A built-in name such as ``"cispr32-class-b-3m"`` (see :func:`list_limits`), or a path
        to a ``.toml`` file.

    Raises
    ------
    ConfigError
        Unknown name, unreadable file, or a file that does not validate: one line with the
        file, line and key path.
    """
    text_name = str(name_or_path)
    if isinstance(name_or_path, Path) or text_name.endswith(".toml") or "/" in text_name:
        return _limit_from_source(read_toml(name_or_path))
    names = _builtin_names()
    if text_name not in names:
        raise ConfigError(f"expected a limit file path or one of {', '.join(names)}, found "
                          f"{text_name!r}{suggest(text_name, names)}")
    with resources.as_file(_builtin_dir().joinpath(f"{text_name}.toml")) as path:
        limit = _limit_from_source(read_toml(path))
    if limit.name != text_name:
        raise ConfigError(f"expected name {text_name!r} in the built-in file, found "
                          f"{limit.name!r}", file=limit.path, key="name")
    return limit
