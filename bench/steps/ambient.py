"""Ambient capture: sweeps with the board switched off, kept as the reference of what the site
shows without the board (broadcast, radio, other equipment).

Sequence file::

    [[steps]]
    kind = "ambient"
    label = "ambient"
    sweep = "band"          # a [sweeps.*] table
    height = "1 m"          # optional far-field pose: height, polarization, azimuth

The bench needs a ``[supply]`` to switch the board off unattended; a prescan or sweep step
names this step in its ``ambient`` key to mark the signals the ambient also shows.
"""

from __future__ import annotations

from typing import Literal

from pydantic import StrictStr

from bench.errors import PlanError
from bench.steps.base import StepKind, where
from bench.steps.fields import FarPoseFields, Label

__all__ = ["AmbientStep", "AmbientKind"]


class AmbientStep(FarPoseFields):
    """Sweeps with the board unpowered, kept as a named reference."""

    kind: Literal["ambient"]
    label: Label
    sweep: StrictStr


class AmbientKind(StepKind):
    """The ambient capture: one pose, the board's supply switched off."""

    name = "ambient"
    model = AmbientStep
    board_powered = False

    def preflight(self, check, index: int, step) -> None:
        if getattr(check.bench, "supply", None) is None:
            raise PlanError(f"{where(index, step)}: an ambient capture needs the board switched off, "
                            "and the bench file has no [supply] to do it unattended")
