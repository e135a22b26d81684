"""A plain sweep with the board powered, at one (optional) far-field pose.

Sequence file::

    [[steps]]
    kind = "sweep"
    label = "overview"
    sweep = "band"               # a [sweeps.*] table
    ambient = "ambient"          # optional: an earlier ambient step, overlaid in the report
    limit = "cispr32-class-b-3m" # optional: a limit line drawn and compared in the report
    polarization = "vertical"    # optional far-field pose: height, polarization, azimuth
"""

from __future__ import annotations

from typing import Literal, Optional

from pydantic import StrictStr

from bench.steps.base import StepKind
from bench.steps.fields import FarPoseFields, Label

__all__ = ["SweepStep", "SweepKind"]


class SweepStep(FarPoseFields):
    """A plain sweep with the board powered."""

    kind: Literal["sweep"]
    label: Label
    sweep: StrictStr
    ambient: Optional[StrictStr] = None
    limit: Optional[StrictStr] = None


class SweepKind(StepKind):
    """A sweep at one pose: the defaults of :class:`~bench.steps.base.StepKind`."""

    name = "sweep"
    model = SweepStep
    references = (("ambient", "ambient"),)
