"""The step kinds, one file each, registered in one table.

:data:`KINDS` maps the ``kind`` tag of a sequence step to the object that knows everything
about that kind (its model, planning, checks, execution hooks, analysis and report section;
see :class:`bench.steps.base.StepKind`). Adding a kind means adding a module here with a
:class:`~bench.steps.base.StepKind` subclass and listing it below.
"""

from __future__ import annotations

from bench.steps.ambient import AmbientKind
from bench.steps.base import StepKind
from bench.steps.final import FinalKind
from bench.steps.grid import GridKind
from bench.steps.prescan import PrescanKind
from bench.steps.sweep import SweepKind

__all__ = ["KINDS", "StepKind", "kind_of", "step_models"]

#: Step kinds by their ``kind`` tag, in the order the sequence-file reference lists them.
KINDS: dict[str, StepKind] = {k.name: k for k in (AmbientKind(), SweepKind(), GridKind(),
                                                  PrescanKind(), FinalKind())}


def kind_of(step) -> StepKind:
    """The kind object of a step model (or of a manifest entry's ``kind`` string)."""
    return KINDS[step if isinstance(step, str) else step.kind]


def step_models() -> tuple[type, ...]:
    """The TOML model of every kind, for the sequence file's tagged union."""
    return tuple(k.model for k in KINDS.values())
