"""What a step kind is: one class per kind, holding every behaviour that depends on the kind.

A step kind ties together, in one file under ``bench/steps/``:

* its TOML model (``model``: a frozen pydantic class whose ``kind`` literal is the tag);
* its planning (:meth:`StepKind.plan` lays actions out, :meth:`StepKind.summarize` totals them);
* its pre-run checks (:meth:`StepKind.preflight`) and transducer chain (:meth:`StepKind.chain`);
* its execution hooks (:meth:`StepKind.after_step` once its last action is done,
  :meth:`StepKind.run_dynamic` for work a plan cannot lay out in advance);
* its analysis and report section (:meth:`StepKind.report_section`,
  :meth:`StepKind.compare_parts`).

The engine (planner, runner, report, compare) looks a kind up in :data:`bench.steps.KINDS`
and calls these hooks; it never tests a kind's name. The contexts the hooks receive are
described here as protocols; the engine builds the concrete objects.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, ClassVar, Protocol

from bench.planning import (
    BYTES_PER_POINT,
    TRACE_OVERHEAD_BYTES,
    Action,
    FarFieldPose,
    PlanState,
    Segment,
    StepSummary,
    check_far_pose,
    far_move_time_s,
    merge_pose,
)

__all__ = ["StepKind", "Measurer", "StepContext", "PreflightContext", "antenna_chain", "optional_float",
           "where"]


class Measurer(Protocol):
    """The narrow measuring interface a step kind's dynamic work uses (finals, searches).

    Every trace it measures is stored with the action, exactly like a planned sweep.
    """

    def move_to(self, pose: FarFieldPose) -> None:
        """Put the mast and turntable in ``pose`` (axes set to None are left where they are)."""

    def measure(self, segment: Segment) -> tuple[Any, Any]:
        """Configure, sweep and store one segment; returns (freq_hz, level_dbuv) as stored."""


class StepContext(Protocol):
    """What the run gives a step kind's hooks: the store, the session's files, logging.

    Attributes
    ----------
    store : bench.store.RunStore
        The open run folder.
    sequence : bench.sequence.Sequence
    bench : bench.benchfile.Bench
    """

    store: Any
    sequence: Any
    bench: Any

    def limit(self, name: str) -> Any:
        """The limit set ``name`` (built-in or file), loaded once per run."""

    def note(self, level: str, text: str) -> None:
        """Record an event in the run (and its log)."""


class PreflightContext(Protocol):
    """What pre-run checks see: the plan, the files and the instrument profiles (no I/O)."""

    plan: Any
    sequence: Any
    bench: Any
    profiles: dict

    def step_span_hz(self, label: str) -> tuple[float, float] | None:
        """Lowest start and highest stop of a step's planned segments, or None."""


def optional_float(value) -> float | None:
    """A stored number as float, or None where it is missing (None or NaN)."""
    return None if value is None or (isinstance(value, float) and value != value) else float(value)


def where(index: int, step) -> str:
    """``steps[2] 'label'``: how messages name a step."""
    return f"steps[{index}] '{step.label}'"


def antenna_chain(bench) -> tuple[list[tuple[str, Path]], str, dict]:
    """The far-field chain of a bench: antenna factor, cables, preamp (see :meth:`StepKind.chain`)."""
    if bench.transducers is None:
        return [], "dbuv", {}
    files = [("antenna_factor", Path(bench.transducers.antenna))]
    files += [("cable_loss", Path(c)) for c in bench.transducers.cables]
    if bench.transducers.preamp is not None:
        files.append(("preamp_gain", Path(bench.transducers.preamp)))
    extra = {"distance_m": bench.site.distance_m} if bench.site is not None else {}
    return files, "dbuv_per_m", extra


class StepKind:
    """Base of the step kinds: defaults that fit a step measuring sweeps at one pose.

    Class attributes
    ----------------
    name : str
        The ``kind`` tag in the sequence file.
    model : type
        The step's TOML model.
    far_field : bool
        Readings go through the bench's antenna chain (mast, turntable, site distance).
    references : tuple of (key, kind)
        Keys naming an earlier step of a given kind (``("ambient", "ambient")``).
    shows_all_results : bool
        Every result row is worth showing on the terminal (not only suspects).
    analyses : bool
        The step is analysed once measured (:meth:`StepKind.after_step`); the plan holds an
        analysis action for it.
    """

    name: ClassVar[str] = ""
    model: ClassVar[type] = object
    far_field: ClassVar[bool] = True
    references: ClassVar[tuple[tuple[str, str], ...]] = ()
    shows_all_results: ClassVar[bool] = False
    analyses: ClassVar[bool] = False

    # ----------------------------------------------------------------- sequence
    def sweep_name(self, sequence, step) -> str:
        """Name of the ``[sweeps.*]`` table the step measures with."""
        return step.sweep

    def own_sweep(self, step) -> str | None:
        """The sweep name the step itself gives (checked against ``[sweeps.*]``), or None."""
        return step.sweep

    def warnings(self, where_text: str, step) -> list[str]:
        """Advice about a valid step that does not stop a run."""
        return []

    def limit_name(self, sequence, step) -> str | None:
        """The limit the step's readings are compared with, or None."""
        return getattr(step, "limit", None)

    # ----------------------------------------------------------------- planning
    def plan(self, state: PlanState, sequence, index: int, step) -> str:
        """Append the step's actions to ``state``; returns a note for the plan text."""
        segments = state.segments(where(index, step), sequence.sweep_of(step))
        pose, motion_s = self.fixed_pose(step), 0.0
        if pose is not None:
            check_far_pose(state.caps, where(index, step), pose)
            motion_s = far_move_time_s(state.far_pose, pose, state.caps)
            state.far_pose = merge_pose(state.far_pose, pose)
        state.add(index, step, segments, pose, motion_s, powered=self.board_powered)
        return ""

    board_powered: ClassVar[bool] = True

    def fixed_pose(self, step) -> FarFieldPose | None:
        """The far-field pose a single-pose step asks for, or None."""
        if not any(v is not None for v in (step.height_m, step.polarization, step.azimuth_deg)):
            return None
        return FarFieldPose(step.height_m, step.polarization, step.azimuth_deg)

    def summarize(self, index: int, step, actions: list[Action], sequence,
                  note: str) -> StepSummary:
        """Totals of the step's actions for the plan text."""
        est = sum(a.est_time_s for a in actions)
        segments = actions[0].segments if actions else ()
        traces = len(actions) * len(segments)
        points = sum(s.points for s in segments)
        data = len(actions) * (points * BYTES_PER_POINT + len(segments) * TRACE_OVERHEAD_BYTES)
        return StepSummary(index, step.label, step.kind, len(actions), len(segments), points,
                           sequence.sweep_of(step).count, est, traces, data, False, note)

    # ----------------------------------------------------------------- checks, manifest
    def chain(self, bench, step) -> tuple[list[tuple[str, Path]], str, dict]:
        """Transducer tables (role, path), the unit readings end in, manifest extras."""
        return antenna_chain(bench)

    def manifest_entry(self, sequence, step) -> dict:
        """Keys of the step's manifest entry besides label, kind, unit, chain and limit."""
        out = {}
        for key in ("sweep", "ambient", "of"):
            value = getattr(step, key, None)
            if value is not None:
                out[key] = value
        return out

    def preflight(self, check: PreflightContext, index: int, step) -> None:
        """Refuse, before anything runs, what would fail mid-run (kind-specific checks)."""

    def instruments(self, step) -> set[str]:
        """Instrument roles the step needs besides those its planned poses imply."""
        return set()

    # ----------------------------------------------------------------- running
    def after_step(self, ctx: StepContext, step) -> list[dict]:
        """Analyse the measured step (only when :attr:`analyses`); returns its result rows.

        The engine stores the rows in the same transaction as the analysis action's done mark.
        """
        return []

    def run_dynamic(self, ctx: StepContext, step, measurer: Measurer) -> list[dict]:
        """Carry out a dynamic action (work the plan could not lay out in advance).

        Returns the step's result rows, stored with the action's done mark.
        """
        raise NotImplementedError(f"step kind {self.name!r} plans no dynamic action")

    # ----------------------------------------------------------------- output
    def report_section(self, writer) -> None:
        """Add the step's pictures and tables to the report (``writer``: bench.report.StepWriter)."""
        spectrum = writer.spectrum()
        results = writer.results()
        if spectrum is not None:
            marks = results[["freq_hz", "level", "status", "margin_db"]].dropna(subset=["level"]) \
                if not results.empty else None
            writer.spectrum_picture(spectrum, marks)
        if not results.empty:
            writer.results_table(results, spectrum.unit if spectrum else "")
        if spectrum is not None:
            writer.chain_block(spectrum)

    def rejudge(self, run, info: dict, sequence, rows):
        """Result rows of the step judged against ``info['limit']`` (the run's stored data
        unchanged), or None to keep ``rows`` as stored. ``run`` is a read-only view."""
        return None

    def compare_parts(self, run_b, run_a, label: str, out: Path, outline) -> Any:
        """What the kind adds to a before/after comparison beyond the spectra and matched results.

        Returns a :class:`bench.analysis.changes.KindComparison`: the kind's change figures,
        which join the step's summary line, and its HTML, rendered from those same figures so
        the page cannot contradict its summary. Default: nothing.
        """
        from bench.analysis.changes import KindComparison

        return KindComparison()
