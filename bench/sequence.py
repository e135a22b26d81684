"""Sequence files: the portable description of a pre-scan, validated into frozen models.

A sequence file (TOML, ``schema = 1``, see ``docs/sequence-format.md``) holds named sweep
settings (``[sweeps.<name>]``) and an ordered list of steps (``[[steps]]``) told apart by
``kind``. Each kind's model lives in its own module under :mod:`bench.steps`; this module joins
them into one tagged union. :func:`load_sequence` is the only way in from a file; every
problem comes out as a one-line :class:`~bench.errors.ConfigError`.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Literal, Optional, Union

import pydantic
from pydantic import Field, StrictStr

from bench.steps import KINDS, kind_of, step_models
from bench.steps.ambient import AmbientStep
from bench.steps.fields import DETECTORS, POLARIZATIONS, Label, StrictModel, SweepSettings
from bench.steps.final import AngleSearch, FinalStep, HeightSearch
from bench.steps.grid import GridStep, Rect
from bench.steps.prescan import AzimuthRange, HeightRange, PrescanStep
from bench.steps.sweep import SweepStep
from bench.tomlsource import (
    check_schema,
    cross_check_error,
    format_value,
    read_toml,
    suggest,
    validation_to_config_error,
)

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
    "Eut",
    "Sequence",
    "load_sequence",
]

STEP_KINDS = tuple(KINDS)

Step = Annotated[Union[step_models()], Field(discriminator="kind")]


class Eut(StrictModel):
    """``[eut]``: the equipment under test, as people name it (shown in the banner and report)."""

    name: Annotated[StrictStr, Field(min_length=1, max_length=120)]
    revision: Optional[Annotated[StrictStr, Field(max_length=120)]] = None
    serial: Optional[Annotated[StrictStr, Field(max_length=120)]] = None
    notes: Optional[Annotated[StrictStr, Field(max_length=2000)]] = None

    def describe(self) -> str:
        """``sensor board rev C, serial 0042``."""
        text = self.name
        if self.revision:
            text += f" rev {self.revision}"
        if self.serial:
            text += f", serial {self.serial}"
        return text


class Sequence(StrictModel):
    """A whole sequence file.

    Attributes
    ----------
    schema_version : int
        Always 1.
    name : str
    description : str or None
    eut : Eut or None
        The equipment under test (optional ``[eut]`` table).
    sweeps : dict of str to SweepSettings
    steps : tuple of Step
    warnings : tuple of str
        Advice that does not stop a run (property).
    """

    schema_version: Literal[1] = Field(alias="schema")
    name: Label
    description: Optional[StrictStr] = None
    eut: Optional[Eut] = None
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
        """Sweep settings a step uses (a final step uses its prescan's)."""
        return self.sweeps[kind_of(step).sweep_name(self, step)]

    @property
    def warnings(self) -> tuple[str, ...]:
        """Advice that does not stop a run (e.g. a prescan with one polarization)."""
        out = []
        for index, step in enumerate(self.steps):
            out += kind_of(step).warnings(f"steps[{index}] '{step.label}'", step)
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
        sweep = kind_of(step).own_sweep(step)
        if sweep is not None and sweep not in sequence.sweeps:
            names = sorted(sequence.sweeps)
            problems.append((("steps", index, "sweep"),
                             f"expected the name of a [sweeps.*] table ({', '.join(names)}), "
                             f"found {format_value(sweep)}{suggest(sweep, names)}"))
        for key, wanted in kind_of(step).references:
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

