"""Sequence files: the portable description of a pre-scan, validated into frozen models.

A sequence file (TOML, ``schema = 1``, see ``docs`` and the contract in the file-format notes)
holds named sweep settings (``[sweeps.<name>]``) and an ordered list of steps (``[[steps]]``)
told apart by ``kind``: ``ambient``, ``sweep``, ``grid``, ``prescan`` and ``final``.
Quantities are parsed once into SI floats (Hz, m, s, deg; dB and dBm keep their reference) in
fields whose name carries the unit. :func:`load_sequence` is the only way in from a file; every
problem comes out as a one-line :class:`~bench.errors.ConfigError`.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Annotated, Literal, Optional, Union

import numpy as np
import pydantic
from pydantic import BaseModel, ConfigDict, Field, StrictInt, StrictStr

from bench.tomlsource import (
    check_schema,
    cross_check_error,
    format_value,
    quantity,
    quantity_list,
    read_toml,
    suggest,
    validation_to_config_error,
)
from bench.units import format_hz

__all__ = [
    "DETECTORS",
    "POLARIZATIONS",
    "STEP_KINDS",
    "SweepSettings",
    "AmbientStep",
    "SweepStep",
    "GridStep",
    "PrescanStep",
    "FinalStep",
    "Step",
    "Rect",
    "HeightRange",
    "AzimuthRange",
    "AngleSearch",
    "HeightSearch",
    "Sequence",
    "load_sequence",
]

DETECTORS = ("peak", "negative", "sample", "average", "rms", "quasi-peak", "cispr-average")
POLARIZATIONS = ("horizontal", "vertical")
STEP_KINDS = ("ambient", "sweep", "grid", "prescan", "final")

Detector = Literal["peak", "negative", "sample", "average", "rms", "quasi-peak", "cispr-average"]
Polarization = Literal["horizontal", "vertical"]
Label = Annotated[StrictStr, Field(pattern=r"^[a-z0-9_-]{1,64}$")]

Frequency = quantity("frequency", non_negative=True)
PositiveFrequency = quantity("frequency", positive=True)
Length = quantity("length")
NonNegativeLength = quantity("length", non_negative=True)
PositiveLength = quantity("length", positive=True)
Angle = quantity("angle")
PositiveAngle = quantity("angle", positive=True)
PositiveTime = quantity("time", positive=True)
Decibel = quantity("db")
NonNegativeDecibel = quantity("db", non_negative=True)
PositiveDecibel = quantity("db", positive=True)
NonNegativeAngle = quantity("angle", non_negative=True)
Dbm = quantity("dbm")
LengthPair = quantity_list("length", 2)


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


#: Sanity caps: far beyond any bench, they stop a typo (a "um" for a "mm") from planning a
#: run of years or millions of positions; each message says which cap and why.
MAX_FREQ_HZ = 1e12
MIN_RBW_HZ = 1.0
MAX_POINTS = 10_000_000
MAX_COUNT = 10_000
MAX_DWELL_S = 86_400.0
MAX_RANGE_VALUES = 10_000
MAX_GRID_POSITIONS = 250_000


class SweepSettings(_Model):
    """One ``[sweeps.<name>]`` table: analyzer settings shared by steps.

    Frequencies in Hz, times in s, levels in dBm / dB. ``vbw_hz`` defaults to 3 x RBW
    (VBW >= 3 RBW keeps peak readings of pulses, reference sheet §8).
    """

    start_hz: Frequency = Field(alias="start")
    stop_hz: PositiveFrequency = Field(alias="stop")
    rbw_hz: PositiveFrequency = Field(alias="rbw")
    vbw_hz: Optional[PositiveFrequency] = Field(None, alias="vbw")
    detector: Detector = "peak"
    step_hz: Optional[PositiveFrequency] = Field(None, alias="step")
    points: Optional[Annotated[StrictInt, Field(ge=2)]] = None
    ref_level_dbm: Optional[Dbm] = Field(None, alias="ref_level")
    attenuation_db: Optional[NonNegativeDecibel] = Field(None, alias="attenuation")
    trace: Literal["clear-write", "max-hold", "average"] = "clear-write"
    count: Annotated[StrictInt, Field(ge=1)] = 1
    dwell_s: Optional[PositiveTime] = Field(None, alias="dwell")

    @pydantic.model_validator(mode="after")
    def _cross_checks(self) -> "SweepSettings":
        problems = []
        if self.stop_hz <= self.start_hz:
            problems.append((("stop",), f"expected a stop frequency above start "
                                        f"({format_hz(self.start_hz)}), found "
                                        f"{format_hz(self.stop_hz)}"))
        if self.step_hz is not None and self.points is not None:
            problems.append((("points",), "expected either step or points, found both"))
        if self.stop_hz > MAX_FREQ_HZ:
            problems.append((("stop",), f"expected a stop frequency up to {format_hz(MAX_FREQ_HZ)}, found "
                                        f"{format_hz(self.stop_hz)}"))
        if self.rbw_hz < MIN_RBW_HZ:
            problems.append((("rbw",), f"expected an RBW of at least {MIN_RBW_HZ:g} Hz, found {self.rbw_hz:g} Hz"))
        if self.points is not None and self.points > MAX_POINTS:
            problems.append((("points",), f"expected at most {MAX_POINTS} points, found {self.points}"))
        if self.step_hz is not None and self.stop_hz > self.start_hz and \
                (self.stop_hz - self.start_hz) / self.step_hz > MAX_POINTS:
            problems.append((("step",), f"expected a step giving at most {MAX_POINTS} points, found "
                                        f"{format_hz(self.step_hz)} over {format_hz(self.stop_hz - self.start_hz)}"))
        if self.count > MAX_COUNT:
            problems.append((("count",), f"expected count <= {MAX_COUNT}, found {self.count}"))
        if self.dwell_s is not None and self.dwell_s > MAX_DWELL_S:
            problems.append((("dwell",), f"expected a dwell of at most one day, found {self.dwell_s:g} s"))
        if self.trace == "clear-write" and self.count != 1:
            problems.append((("count",), f"expected count = 1 with trace \"clear-write\" "
                                         f"(use max-hold or average to combine sweeps), found "
                                         f"{self.count}"))
        if problems:
            raise cross_check_error(problems)
        if self.vbw_hz is None:
            object.__setattr__(self, "vbw_hz", 3.0 * self.rbw_hz)
        return self

    @property
    def span_hz(self) -> float:
        """Stop minus start, Hz."""
        return self.stop_hz - self.start_hz

    @property
    def freq_step_hz(self) -> float:
        """Requested frequency step, Hz: from ``points``, ``step``, or RBW/2 by default.

        RBW/2 is the common CISPR 16 practice ``step <= B6/2`` (reference sheet §1.7).
        """
        if self.points is not None:
            return self.span_hz / (self.points - 1)
        if self.step_hz is not None:
            return self.step_hz
        return self.rbw_hz / 2.0


class _Pose(_Model):
    """Optional far-field pose of ambient and sweep steps (mast height, polarization, azimuth)."""

    height_m: Optional[PositiveLength] = Field(None, alias="height")
    polarization: Optional[Polarization] = None
    azimuth_deg: Optional[Angle] = Field(None, alias="azimuth")

    @property
    def has_pose(self) -> bool:
        """True when any far-field pose key is given."""
        return any(v is not None for v in (self.height_m, self.polarization, self.azimuth_deg))


class AmbientStep(_Pose):
    """Sweeps with the board unpowered, kept as a named reference."""

    kind: Literal["ambient"]
    label: Label
    sweep: StrictStr


class SweepStep(_Pose):
    """A plain sweep with the board powered."""

    kind: Literal["sweep"]
    label: Label
    sweep: StrictStr
    ambient: Optional[StrictStr] = None
    limit: Optional[StrictStr] = None


class Rect(_Model):
    """Rectangle in board coordinates, metres: ``x_m = (min, max)``, ``y_m = (min, max)``."""

    x_m: LengthPair = Field(alias="x")
    y_m: LengthPair = Field(alias="y")

    @pydantic.model_validator(mode="after")
    def _ordered(self) -> "Rect":
        problems = [((axis,), f"expected [min, max] with min < max, found "
                              f"[{lo * 1e3:g} mm, {hi * 1e3:g} mm]")
                    for axis, (lo, hi) in (("x", self.x_m), ("y", self.y_m)) if lo >= hi]
        if problems:
            raise cross_check_error(problems)
        return self


class GridStep(_Model):
    """Near-field probe scan over the board on the XYZ stage.

    Positions in board coordinates (m) from ``area`` or ``polygon`` at the pitch
    ``pitch_x_m`` x ``pitch_y_m``; ``height_m`` is the probe tip height above the board.
    ``orientations_deg`` is None when not given: the planner then uses 0 and 90 deg for an
    H-loop probe and 0 deg for an E probe.
    """

    kind: Literal["grid"]
    label: Label
    sweep: StrictStr
    probe: StrictStr
    orientations_deg: Optional[Annotated[tuple[Angle, ...], Field(min_length=1)]] = Field(
        None, alias="orientations")
    area: Optional[Rect] = None
    polygon: Optional[Annotated[tuple[LengthPair, ...], Field(min_length=3)]] = None
    step_size_m: Optional[PositiveLength] = Field(None, alias="step_size")
    step_x_m: Optional[PositiveLength] = Field(None, alias="step_x")
    step_y_m: Optional[PositiveLength] = Field(None, alias="step_y")
    height_m: NonNegativeLength = Field(alias="height")
    path: Literal["serpentine", "raster"] = "serpentine"

    @pydantic.model_validator(mode="after")
    def _cross_checks(self) -> "GridStep":
        problems = []
        if (self.area is None) == (self.polygon is None):
            found = "both" if self.area is not None else "neither"
            problems.append(((), f"expected either area or polygon, found {found}"))
        has_xy = (self.step_x_m is not None, self.step_y_m is not None)
        if self.step_size_m is not None and any(has_xy):
            problems.append((("step_size",), "expected either step_size or step_x/step_y, "
                                             "found both"))
        elif self.step_size_m is None and not all(has_xy):
            found = "only one of step_x/step_y" if any(has_xy) else "none"
            problems.append(((), f"expected step_size (or both step_x and step_y), "
                                 f"found {found}"))
        if self.orientations_deg is not None and len(set(self.orientations_deg)) != len(
                self.orientations_deg):
            problems.append((("orientations",), "expected distinct orientations, found a "
                                                "repeated angle"))
        if not problems and self._estimated_positions() > MAX_GRID_POSITIONS:
            problems.append((("step_size" if self.step_size_m is not None else "step_x",),
                             f"expected at most {MAX_GRID_POSITIONS} positions per orientation, found about "
                             f"{self._estimated_positions():.0f} (is the pitch in the right unit?)"))
        if problems:
            raise cross_check_error(problems)
        return self

    def _estimated_positions(self) -> float:
        """Grid points of the bounding box, without building them."""
        if self.area is not None:
            (x0, x1), (y0, y1) = self.area.x_m, self.area.y_m
        else:
            xs = [p[0] for p in self.polygon]
            ys = [p[1] for p in self.polygon]
            x0, x1, y0, y1 = min(xs), max(xs), min(ys), max(ys)
        return ((x1 - x0) / self.pitch_x_m + 1) * ((y1 - y0) / self.pitch_y_m + 1)

    @property
    def pitch_x_m(self) -> float:
        """Grid pitch along board x, m."""
        return self.step_size_m if self.step_size_m is not None else self.step_x_m

    @property
    def pitch_y_m(self) -> float:
        """Grid pitch along board y, m."""
        return self.step_size_m if self.step_size_m is not None else self.step_y_m


class _Range(_Model):
    """``{ from = ..., to = ..., step = ... }`` with from <= to and step > 0; both ends kept."""

    @pydantic.model_validator(mode="after")
    def _ordered(self) -> "_Range":
        start, stop, step = self._triple()
        if start > stop:
            raise cross_check_error([(("to",), f"expected to >= from "
                                               f"({self._show(start)}), found "
                                               f"{self._show(stop)}")])
        if (stop - start) / step + 1 > MAX_RANGE_VALUES:
            raise cross_check_error([(("step",), f"expected a step giving at most {MAX_RANGE_VALUES} "
                                                 f"values, found {self._show(step)} over "
                                                 f"{self._show(start)} to {self._show(stop)}")])
        return self

    def _triple(self) -> tuple[float, float, float]:
        raise NotImplementedError

    def _show(self, value: float) -> str:
        raise NotImplementedError

    def values(self) -> tuple[float, ...]:
        """Every value from ``from`` to ``to`` (inclusive, within 1e-9 of a step) by ``step``."""
        start, stop, step = self._triple()
        count = int(math.floor((stop - start) / step + 1e-9)) + 1
        return tuple(float(v) for v in start + step * np.arange(count))


class HeightRange(_Range):
    """Antenna heights, m."""

    from_m: PositiveLength = Field(alias="from")
    to_m: PositiveLength = Field(alias="to")
    step_m: PositiveLength = Field(alias="step")

    def _triple(self) -> tuple[float, float, float]:
        return self.from_m, self.to_m, self.step_m

    def _show(self, value: float) -> str:
        return f"{value:g} m"


class AzimuthRange(_Range):
    """Turntable azimuths, deg."""

    from_deg: Angle = Field(alias="from")
    to_deg: Angle = Field(alias="to")
    step_deg: PositiveAngle = Field(alias="step")

    def _triple(self) -> tuple[float, float, float]:
        return self.from_deg, self.to_deg, self.step_deg

    def _show(self, value: float) -> str:
        return f"{value:g} deg"


class PrescanStep(_Model):
    """Far-field maximum search over heights x polarizations x azimuths.

    Peak search settings: ``margin_db`` (suspects within this of the limit or over it),
    ``prominence_db``, ``min_separation_hz``, ``ambient_tolerance_hz``.
    """

    kind: Literal["prescan"]
    label: Label
    sweep: StrictStr
    heights: HeightRange
    polarizations: Annotated[tuple[Polarization, ...], Field(min_length=1)]
    azimuths: AzimuthRange
    limit: StrictStr
    ambient: Optional[StrictStr] = None
    margin_db: Decibel = Field(6.0, alias="margin")
    prominence_db: PositiveDecibel = Field(6.0, alias="prominence")
    min_separation_hz: Frequency = Field(1e6, alias="min_separation")
    ambient_tolerance_hz: Frequency = Field(200e3, alias="ambient_tolerance")

    @pydantic.model_validator(mode="after")
    def _distinct(self) -> "PrescanStep":
        if len(set(self.polarizations)) != len(self.polarizations):
            raise cross_check_error([(("polarizations",), "expected distinct polarizations, "
                                                          "found a repeated one")])
        return self


class AngleSearch(_Model):
    """Search around a suspect's azimuth: +- ``half_width_deg`` by ``step_deg``."""

    half_width_deg: NonNegativeAngle = Field(alias="half_width")
    step_deg: PositiveAngle = Field(alias="step")

    def offsets(self) -> tuple[float, ...]:
        """Offsets from the centre, deg, symmetric, including 0."""
        return _offsets(self.half_width_deg, self.step_deg)


class HeightSearch(_Model):
    """Search around a suspect's antenna height: +- ``half_width_m`` by ``step_m``."""

    half_width_m: NonNegativeLength = Field(alias="half_width")
    step_m: PositiveLength = Field(alias="step")

    def offsets(self) -> tuple[float, ...]:
        """Offsets from the centre, m, symmetric, including 0."""
        return _offsets(self.half_width_m, self.step_m)


def _offsets(half_width: float, step: float) -> tuple[float, ...]:
    count = int(math.floor(half_width / step + 1e-9))
    return tuple(float(k * step) for k in range(-count, count + 1))


class FinalStep(_Model):
    """Remeasure the suspects of a prescan with the given detectors (dwell in s)."""

    kind: Literal["final"]
    label: Label
    of: StrictStr
    detectors: Annotated[tuple[Detector, ...], Field(min_length=1)]
    dwell_s: PositiveTime = Field(1.0, alias="dwell")
    span_hz: Frequency = Field(1e6, alias="span")
    azimuth_search: Optional[AngleSearch] = None
    height_search: Optional[HeightSearch] = None


Step = Annotated[Union[AmbientStep, SweepStep, GridStep, PrescanStep, FinalStep],
                 Field(discriminator="kind")]


class Sequence(_Model):
    """A whole sequence file.

    Attributes
    ----------
    schema_version : int
        Always 1.
    name : str
    description : str or None
    sweeps : dict of str to SweepSettings
    steps : tuple of Step
    warnings : tuple of str
        Advice that does not stop a run (property).
    """

    schema_version: Literal[1] = Field(alias="schema")
    name: Label
    description: Optional[StrictStr] = None
    sweeps: Annotated[dict[Label, SweepSettings], Field(min_length=1)]
    steps: Annotated[tuple[Step, ...], Field(min_length=1)]

    @pydantic.model_validator(mode="after")
    def _references(self) -> "Sequence":
        problems = _label_problems(self.steps) + _reference_problems(self)
        if problems:
            problems.sort(key=lambda entry: entry[0])
            raise cross_check_error(problems)
        return self

    def step(self, label: str) -> Step:
        """The step with this label (KeyError if none)."""
        for step in self.steps:
            if step.label == label:
                return step
        raise KeyError(label)

    def sweep_of(self, step: Step) -> SweepSettings:
        """Sweep settings a step uses; a final step uses its prescan's."""
        if isinstance(step, FinalStep):
            return self.sweep_of(self.step(step.of))
        return self.sweeps[step.sweep]

    @property
    def warnings(self) -> tuple[str, ...]:
        """Advice that does not stop a run (e.g. a prescan with one polarization)."""
        out = []
        for index, step in enumerate(self.steps):
            if isinstance(step, PrescanStep) and len(step.polarizations) == 1:
                out.append(f"steps[{index}] '{step.label}': prescan with one polarization "
                           f"({step.polarizations[0]}); the maximum is searched in horizontal "
                           f"and vertical (CISPR 16-2-3)")
        return tuple(out)


def _label_problems(steps: tuple) -> list:
    first: dict[str, int] = {}
    problems = []
    for index, step in enumerate(steps):
        if step.label in first:
            problems.append((("steps", index, "label"),
                             f"expected a unique label, found {format_value(step.label)} "
                             f"again (first used by steps[{first[step.label]}])"))
        first.setdefault(step.label, index)
    return problems


def _reference_problems(sequence: Sequence) -> list:
    problems = []
    earlier: dict[str, str] = {}
    all_labels = {step.label: step.kind for step in sequence.steps}
    for index, step in enumerate(sequence.steps):
        if not isinstance(step, FinalStep) and step.sweep not in sequence.sweeps:
            names = sorted(sequence.sweeps)
            problems.append((("steps", index, "sweep"),
                             f"expected the name of a [sweeps.*] table ({', '.join(names)}), "
                             f"found {format_value(step.sweep)}{suggest(step.sweep, names)}"))
        for key, wanted in (("ambient", "ambient"), ("of", "prescan")):
            target = getattr(step, key, None)
            if target is not None:
                problem = _reference_problem(target, wanted, earlier, all_labels)
                if problem:
                    problems.append((("steps", index, key), problem))
        earlier.setdefault(step.label, step.kind)
    return problems


def _reference_problem(target: str, wanted: str, earlier: dict[str, str],
                       all_labels: dict[str, str]) -> str | None:
    expected = f"expected the label of an earlier {wanted} step"
    if target in earlier:
        if earlier[target] == wanted:
            return None
        article = "an" if earlier[target][0] in "aeiou" else "a"
        return f"{expected}, found {format_value(target)}, {article} {earlier[target]} step"
    if target in all_labels:
        return f"{expected}, found {format_value(target)}, which comes later"
    candidates = [label for label, kind in earlier.items() if kind == wanted]
    return f"{expected}, found {format_value(target)}{suggest(target, candidates)}"


def load_sequence(path: str | Path) -> Sequence:
    """Read and validate a sequence file.

    Parameters
    ----------
    path : str or Path
        The TOML file. Its path appears as written in error messages.

    Returns
    -------
    Sequence
        Frozen, SI units; ``.warnings`` holds advice.

    Raises
    ------
    ConfigError
        One line ``FILE:LINE: KEY.PATH: expected ..., found ...`` for the first problem in
        file order; ``.all_errors`` holds every problem found, in file order.
    """
    source = read_toml(path)
    check_schema(source)
    try:
        return Sequence.model_validate(source.data)
    except pydantic.ValidationError as exc:
        raise validation_to_config_error(source, exc, Sequence) from None

