"""Model pieces every step kind shares: strict frozen models, quantity types, sweep settings.

Quantities are parsed once into SI floats (Hz, m, s, deg; dB and dBm keep their reference) in
fields whose name carries the unit. Step kinds (``bench.steps.<kind>``) build their TOML models
from these; :mod:`bench.sequence` joins them into a sequence file.
"""

from __future__ import annotations

from typing import Annotated, Literal, Optional

import pydantic
from pydantic import BaseModel, ConfigDict, Field, StrictInt, StrictStr

from bench.tomlsource import cross_check_error, quantity, quantity_list
from bench.units import format_hz

__all__ = [
    "DETECTORS",
    "POLARIZATIONS",
    "Detector",
    "Polarization",
    "Label",
    "StrictModel",
    "SweepSettings",
    "FarPoseFields",
    "MAX_FREQ_HZ",
    "MAX_RANGE_VALUES",
    "MAX_GRID_POSITIONS",
    "Frequency", "PositiveFrequency", "Length", "NonNegativeLength", "PositiveLength", "Angle",
    "PositiveAngle", "NonNegativeAngle", "PositiveTime", "Decibel", "NonNegativeDecibel",
    "PositiveDecibel", "Dbm", "LengthPair",
]

DETECTORS = ("peak", "negative", "sample", "average", "rms", "quasi-peak", "cispr-average")
POLARIZATIONS = ("horizontal", "vertical")

Detector = Literal["peak", "negative", "sample", "average", "rms", "quasi-peak", "cispr-average"]
Polarization = Literal["horizontal", "vertical"]
Label = Annotated[StrictStr, Field(pattern=r"^[a-z0-9_-]{1,64}$")]

# Every frequency of a sequence is a radio frequency (sweep limits, RBW, VBW, step, span,
# separations): "30 mHz" there is a megahertz with the wrong case, refused with a hint.
Frequency = quantity("frequency", non_negative=True, radio=True)
PositiveFrequency = quantity("frequency", positive=True, radio=True)
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


class StrictModel(BaseModel):
    """Frozen, unknown keys refused: the base of every sequence model."""

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


class SweepSettings(StrictModel):
    """One ``[sweeps.<name>]`` table: analyzer settings shared by steps.

    Frequencies in Hz, times in s, levels in dBm / dB. ``vbw_hz`` defaults to 3 x RBW
    (VBW >= 3 RBW keeps peak readings of pulses, common practice).
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

        RBW/2 is the common practice ``step <= B6/2`` (worst-case scalloping 1.5 dB).
        """
        if self.points is not None:
            return self.span_hz / (self.points - 1)
        if self.step_hz is not None:
            return self.step_hz
        return self.rbw_hz / 2.0


class FarPoseFields(StrictModel):
    """Optional far-field pose of ambient and sweep steps (mast height, polarization, azimuth)."""

    height_m: Optional[PositiveLength] = Field(None, alias="height")
    polarization: Optional[Polarization] = None
    azimuth_deg: Optional[Angle] = Field(None, alias="azimuth")

    @property
    def has_pose(self) -> bool:
        """True when any far-field pose key is given."""
        return any(v is not None for v in (self.height_m, self.polarization, self.azimuth_deg))


