"""Turn a validated sequence into a plan of actions, checked against the bench before anything runs.

The planner is pure computation: no instrument is touched. It walks the steps and lets each
step kind (:data:`bench.steps.KINDS`) lay its actions out with the primitives of
:mod:`bench.planning`, which answer, before the stage moves, how long a sequence takes, how
much data it makes, whether every stage/mast/turntable position lies inside the limits the
bench file gives (:class:`~bench.errors.SafetyLimitError` names the first one that does not),
and whether the frequency step suits the RBW.
"""

from __future__ import annotations

from bench.planning import (AnalyzerCaps, BenchCaps, FarFieldPose, Plan, PlanState, StagePose,
                            scalloping_db, segment_sweep)
from bench.errors import PlanError
from bench.steps import kind_of
from bench.units import format_hz

__all__ = ["make_plan"]

_QP_DETECTORS = ("quasi-peak", "cispr-average")


def make_plan(sequence, caps: BenchCaps) -> Plan:
    """Plan a sequence on a bench.

    Raises
    ------
    PlanError
        A step needs something the bench lacks (stage, mast, probe, RBW).
    SafetyLimitError
        A position lies outside the stage, mast or turntable limits (the first one found).
    """
    state = PlanState(caps=caps, warnings=list(sequence.warnings))
    state.warnings.extend(_sweep_warnings(sequence, caps.analyzer))
    summaries = []
    for index, step in enumerate(sequence.steps):
        first = len(state.actions)
        kind = kind_of(step)
        try:
            note = kind.plan(state, sequence, index, step)
        except PlanError as exc:
            # name the step's line in the sequence file (the CLI turns the key path into a line)
            if getattr(exc, "key_path", None) is None:
                exc.key_path = ("steps", index)
            raise
        measured = state.actions[first:]
        if kind.analyses:
            state.add_analysis(index, step)
        summaries.append(kind.summarize(index, step, measured, sequence, note))
    state.warnings.extend(_mixing_warnings(state.actions))
    return Plan(sequence_name=sequence.name, actions=tuple(state.actions),
                steps=tuple(summaries), warnings=tuple(state.warnings))


def _mixing_warnings(actions) -> list[str]:
    """Near-field (probe on the stage) and far-field (antenna) readings in one sequence."""
    near = next((a for a in actions if isinstance(a.pose, StagePose)), None)
    far = next((a for a in actions if isinstance(a.pose, FarFieldPose) or a.dynamic), None)
    if near is None or far is None:
        return []
    return [f"this sequence mixes near-field steps ('{near.step_label}', probe on the stage) and "
            f"far-field steps ('{far.step_label}', antenna): the analyzer input must be moved from "
            "the probe to the antenna cable between them; before each far-field reading the run "
            "parks the probe (tool 0). Consider two sequences"]


def _sweep_warnings(sequence, caps: AnalyzerCaps) -> list[str]:
    out = []
    for name, sweep in sequence.sweeps.items():
        segments = segment_sweep(sweep, caps)
        step_hz = max(s.step_hz for s in segments)
        if step_hz > sweep.rbw_hz / 2.0 * (1 + 1e-9):
            out.append(f"sweep '{name}': frequency step {format_hz(step_hz)} > rbw/2 "
                       f"({format_hz(sweep.rbw_hz / 2)}): worst-case scalloping "
                       f"{scalloping_db(step_hz, sweep.rbw_hz):.2f} dB (6*(2*df/B6)^2 at "
                       f"df = step/2, Gaussian RBW, common practice)")
        if sweep.detector in _QP_DETECTORS and sweep.dwell_s is None:
            out.append(f"sweep '{name}': {sweep.detector} detector without dwell: the "
                       f"estimate uses the swept formula; unknown signals need a dwell of "
                       f"1 s per frequency (common practice)")
    return out
