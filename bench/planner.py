"""Turn a validated sequence into a plan of actions, checked against the bench before anything runs.

The planner is pure computation: no instrument is touched. It answers, before the stage moves,
how long a sequence takes, how much data it makes, whether every stage/mast/turntable position
lies inside the limits the bench file gives (:class:`~bench.errors.SafetyLimitError` names the
first one that does not), and whether the frequency step suits the RBW.

Estimates used (all stated in the plan text):

* sweep points: ``ceil(span / step) + 1`` with ``step = rbw / 2`` by default (common CISPR 16
  practice, reference sheet §1.7), split into equal contiguous segments when the analyzer has
  fewer points than that;
* sweep time per segment: ``max(k * span / RBW^2, min_sweep_time)`` (``RBW * VBW`` in the
  denominator when VBW < RBW), reference sheet §8; ``points * dwell`` when a dwell is given;
* transfer: ``points * 4 bytes / rate + command overhead`` per segment (REAL,32 traces);
* stage moves: trapezoidal velocity profile (feed, acceleration) per axis move, and every XY
  move is lift to ``safe_z``, travel, lower;
* mast and turntable: constant speed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, Optional

import numpy as np

from bench.errors import PlanError, SafetyLimitError
from bench.sequence import (
    AmbientStep,
    FinalStep,
    GridStep,
    PrescanStep,
    Sequence,
    SweepSettings,
    SweepStep,
)
from bench.units import format_hz

__all__ = [
    "AnalyzerCaps",
    "StageCaps",
    "MastCaps",
    "TurntableCaps",
    "ProbeCaps",
    "BenchCaps",
    "bench_caps",
    "Segment",
    "StagePose",
    "FarFieldPose",
    "Action",
    "StepSummary",
    "Plan",
    "make_plan",
    "segment_sweep",
    "sweep_time_s",
    "transfer_time_s",
    "trapezoid_move_time_s",
    "stage_move_time_s",
    "grid_positions",
    "inside_polygon",
    "scalloping_db",
    "ASSUMED_SUSPECTS",
    "BYTES_PER_POINT",
    "TRACE_OVERHEAD_BYTES",
]

#: Suspects assumed for the estimate of a final step (the prescan decides the real number).
ASSUMED_SUSPECTS = 10
#: Trace values are float32 (REAL,32 transfer, float32 BLOB in the store).
BYTES_PER_POINT = 4
#: Per-trace bookkeeping in the store (row, settings, pose), an estimate.
TRACE_OVERHEAD_BYTES = 512
_QP_DETECTORS = ("quasi-peak", "cispr-average")
_EPS = 1e-9


# --------------------------------------------------------------------------- capabilities


@dataclass(frozen=True)
class AnalyzerCaps:
    """What the planner needs to know of the analyzer (from its profile).

    Attributes
    ----------
    max_points, min_points : int
        Trace length limits.
    sweep_time_k : float
        k of ST = k * span / RBW^2 (2-3 for analog filters, reference sheet §8).
    min_sweep_time_s : float
        Shortest sweep, s.
    transfer_bytes_per_s : float
        Trace transfer rate, bytes/s.
    command_overhead_s : float
        Per configuration + fetch round trip, s.
    rbw_steps_hz : tuple of float
        RBWs the analyzer offers, Hz; empty means any RBW is accepted.
    """

    max_points: int = 10001
    min_points: int = 101
    sweep_time_k: float = 2.5
    min_sweep_time_s: float = 1e-3
    transfer_bytes_per_s: float = 1e6
    command_overhead_s: float = 0.01
    rbw_steps_hz: tuple[float, ...] = ()


@dataclass(frozen=True)
class StageCaps:
    """The XYZ stage: limits and origin in stage metres, speeds in m/s, m/s^2, deg/s.

    ``limits_m`` is ``((x_min, x_max), (y_min, y_max), (z_min, z_max))``; ``board_origin_m``
    the stage position of board corner (0, 0) on the board's top surface. ``tool_change_s``
    estimates a probe change (the operator swaps the probe).
    """

    limits_m: tuple[tuple[float, float], tuple[float, float], tuple[float, float]]
    safe_z_m: float
    max_feed_m_per_s: float
    accel_m_per_s2: float = 0.5
    board_origin_m: tuple[float, float, float] = (0.0, 0.0, 0.0)
    position_tolerance_m: float = 5e-5
    rotary_axis: bool = False
    rotary_speed_deg_per_s: float = 90.0
    tool_change_s: float = 30.0


@dataclass(frozen=True)
class MastCaps:
    """Antenna mast: height limits (m), speed (m/s), time to change polarization (s)."""

    height_limits_m: tuple[float, float]
    speed_m_per_s: float = 0.2
    polarization_change_s: float = 5.0


@dataclass(frozen=True)
class TurntableCaps:
    """Turntable: azimuth limits (deg) and speed (deg/s)."""

    limits_deg: tuple[float, float]
    speed_deg_per_s: float = 10.0


@dataclass(frozen=True)
class ProbeCaps:
    """A near-field probe: ``kind`` ('h-loop' or 'e-probe') and G-code tool number."""

    kind: str
    tool: int


@dataclass(frozen=True)
class BenchCaps:
    """Everything the planner knows of the bench."""

    analyzer: AnalyzerCaps = AnalyzerCaps()
    stage: Optional[StageCaps] = None
    mast: Optional[MastCaps] = None
    turntable: Optional[TurntableCaps] = None
    probes: Mapping[str, ProbeCaps] = field(default_factory=dict)


def bench_caps(bench, *, analyzer: AnalyzerCaps = AnalyzerCaps(),
               stage_accel_m_per_s2: float = 0.5, mast_speed_m_per_s: float = 0.2,
               turntable_speed_deg_per_s: float = 10.0) -> BenchCaps:
    """Capabilities from a :class:`bench.benchfile.Bench`; profile values come as arguments.

    Parameters
    ----------
    bench : bench.benchfile.Bench
        The validated bench file.
    analyzer : AnalyzerCaps
        From the analyzer profile.
    stage_accel_m_per_s2, mast_speed_m_per_s, turntable_speed_deg_per_s : float
        From the stage / positioner profiles (not in the bench file).
    """
    stage = None
    if bench.stage is not None:
        section = bench.stage
        stage = StageCaps(
            limits_m=(section.limits.x_m, section.limits.y_m, section.limits.z_m),
            safe_z_m=section.safe_z_m, max_feed_m_per_s=section.max_feed_m_per_s,
            accel_m_per_s2=stage_accel_m_per_s2, board_origin_m=section.board_origin_m,
            position_tolerance_m=section.position_tolerance_m, rotary_axis=section.rotary_axis)
    mast = None if bench.mast is None else MastCaps(bench.mast.height_limits_m,
                                                    speed_m_per_s=mast_speed_m_per_s)
    turntable = None if bench.turntable is None else TurntableCaps(
        bench.turntable.azimuth_limits_deg, speed_deg_per_s=turntable_speed_deg_per_s)
    probes = {name: ProbeCaps(p.kind, p.tool) for name, p in bench.probes.items()}
    return BenchCaps(analyzer=analyzer, stage=stage, mast=mast, turntable=turntable,
                     probes=probes)


# --------------------------------------------------------------------------- plan objects


@dataclass(frozen=True)
class Segment:
    """One analyzer configuration and trace: Hz, dBm, dB, s."""

    start_hz: float
    stop_hz: float
    points: int
    rbw_hz: float
    vbw_hz: float
    detector: str
    ref_level_dbm: Optional[float]
    attenuation_db: Optional[float]
    trace_mode: str
    count: int
    est_sweep_time_s: float
    sweep_time_s: Optional[float] = None

    @property
    def step_hz(self) -> float:
        """Spacing of the trace points, Hz."""
        return (self.stop_hz - self.start_hz) / (self.points - 1)


@dataclass(frozen=True)
class StagePose:
    """Probe pose: stage coordinates (m), probe rotation (deg), tool; board x/y/z for maps.

    ``board_z_m`` is the probe tip height above the board surface; ``probe`` the probe's name.
    """

    x_m: float
    y_m: float
    z_m: float
    rotation_deg: float
    tool: int
    board_x_m: float
    board_y_m: float
    board_z_m: float = 0.0
    probe: str = ""


@dataclass(frozen=True)
class FarFieldPose:
    """Antenna height (m), polarization, turntable azimuth (deg); None where not set."""

    height_m: Optional[float]
    polarization: Optional[str]
    azimuth_deg: Optional[float]


@dataclass(frozen=True)
class Action:
    """One thing the run does: move (if needed), sweep every segment, fetch the traces.

    ``est_time_s`` = motion from the previous action + sweeps + transfers. A ``dynamic``
    action (final step) stands for work the prescan result decides; its estimate assumes
    :data:`ASSUMED_SUSPECTS` suspects and it has no segments.
    """

    index: int
    step_index: int
    step_label: str
    step_kind: str
    segments: tuple[Segment, ...]
    pose: StagePose | FarFieldPose | None
    board_powered: bool
    est_time_s: float
    motion_time_s: float = 0.0
    dynamic: bool = False

    @property
    def points(self) -> int:
        """Trace points of all segments."""
        return sum(s.points for s in self.segments)


@dataclass(frozen=True)
class StepSummary:
    """Per-step totals for the plan text."""

    step_index: int
    label: str
    kind: str
    actions: int
    segments_per_action: int
    points_per_action: int
    sweeps_per_action: int
    est_time_s: float
    traces: int
    data_bytes: int
    dynamic: bool = False
    note: str = ""


@dataclass(frozen=True)
class Plan:
    """The planned run: actions in order, per-step totals, warnings."""

    sequence_name: str
    actions: tuple[Action, ...]
    steps: tuple[StepSummary, ...]
    warnings: tuple[str, ...]
    assumed_suspects: int = ASSUMED_SUSPECTS

    @property
    def total_time_s(self) -> float:
        """Estimated duration, s."""
        return sum(step.est_time_s for step in self.steps)

    @property
    def n_traces(self) -> int:
        """Traces stored (a final reading counts as a one-point trace)."""
        return sum(step.traces for step in self.steps)

    @property
    def data_bytes(self) -> int:
        """Estimated stored data: points * 4 bytes + per-trace overhead."""
        return sum(step.data_bytes for step in self.steps)

    def summary_lines(self) -> list[str]:
        """Short lines for a person: per step, totals, warnings."""
        lines = [f"plan '{self.sequence_name}': {len(self.steps)} steps, "
                 f"{len(self.actions)} actions"]
        for step in self.steps:
            lines.append(_step_line(step))
        lines.append(f"total: {format_duration(self.total_time_s)}, {self.n_traces} traces, "
                     f"{format_bytes(self.data_bytes)}")
        lines.extend(f"warning: {text}" for text in self.warnings)
        return lines


def _step_line(step: StepSummary) -> str:
    head = f"[{step.step_index}] {step.kind} '{step.label}': "
    if step.dynamic:
        return head + f"{step.note}, ~{format_duration(step.est_time_s)}"
    where = f"{step.actions} positions x " if step.actions > 1 else ""
    return head + (f"{where}{step.segments_per_action} segment"
                   f"{'s' if step.segments_per_action != 1 else ''}, "
                   f"{step.points_per_action} points, {step.sweeps_per_action} sweep"
                   f"{'s' if step.sweeps_per_action != 1 else ''} per position, "
                   f"{format_duration(step.est_time_s)}")


def format_duration(seconds: float) -> str:
    """``H:MM:SS`` (rounded up to the second)."""
    total = int(math.ceil(seconds - 1e-9))
    return f"{total // 3600}:{total % 3600 // 60:02d}:{total % 60:02d}"


def format_bytes(count: float) -> str:
    """Decimal units: ``8.4 MB``."""
    for unit, scale in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if count >= scale:
            return f"{count / scale:.1f} {unit}"
    return f"{int(count)} B"


# --------------------------------------------------------------------------- frequency axis


def scalloping_db(step_hz: float, b6_hz: float) -> float:
    """Worst-case amplitude error of a Gaussian RBW between trace points, dB.

    A tone at offset df is attenuated by ``6 * (2 df / B6)^2`` dB; the worst offset is half
    the step (reference sheet §1.7): step = B6/2 -> 1.50 dB.
    """
    offset_hz = step_hz / 2.0
    return 6.0 * (2.0 * offset_hz / b6_hz) ** 2


def sweep_time_s(span_hz: float, rbw_hz: float, vbw_hz: float, caps: AnalyzerCaps) -> float:
    """One sweep, s: ``max(k * span / RBW^2, min)``; ``RBW * VBW`` when VBW < RBW (sheet §8)."""
    bandwidth_sq = rbw_hz * min(rbw_hz, vbw_hz)
    return max(caps.sweep_time_k * span_hz / bandwidth_sq, caps.min_sweep_time_s)


def transfer_time_s(points: int, caps: AnalyzerCaps) -> float:
    """Fetching one trace of float32 values plus the command round trip, s."""
    return points * BYTES_PER_POINT / caps.transfer_bytes_per_s + caps.command_overhead_s


def segment_sweep(sweep: SweepSettings, caps: AnalyzerCaps) -> tuple[Segment, ...]:
    """Split a sweep into equal contiguous segments that keep the step <= the requested one.

    One segment needs ``ceil(span / step) + 1`` points (at least ``min_points``); when that
    exceeds ``max_points`` the span is cut into the fewest equal parts that fit.
    """
    span_hz = sweep.span_hz
    step_hz = sweep.freq_step_hz
    count = 1
    while _points_needed(span_hz / count, step_hz) > caps.max_points:
        count = max(count + 1, math.ceil(span_hz / (step_hz * (caps.max_points - 1))))
    points = max(_points_needed(span_hz / count, step_hz), caps.min_points)
    if sweep.points is not None and count == 1:
        points = max(sweep.points, caps.min_points)
    edges = sweep.start_hz + span_hz * np.arange(count + 1) / count
    return tuple(_segment(sweep, float(lo), float(hi), points, caps)
                 for lo, hi in zip(edges[:-1], edges[1:]))


def _points_needed(span_hz: float, step_hz: float) -> int:
    # the small tolerance keeps an exact multiple (970 MHz / 60 kHz ...) from rounding up
    return int(math.ceil(span_hz / step_hz - _EPS)) + 1


def _segment(sweep: SweepSettings, start_hz: float, stop_hz: float, points: int,
             caps: AnalyzerCaps) -> Segment:
    one_sweep_s = sweep_time_s(stop_hz - start_hz, sweep.rbw_hz, sweep.vbw_hz, caps)
    if sweep.dwell_s is not None:
        one_sweep_s = max(one_sweep_s, points * sweep.dwell_s)  # dwell per point, sheet §1.8
    return Segment(start_hz=start_hz, stop_hz=stop_hz, points=points, rbw_hz=sweep.rbw_hz,
                   vbw_hz=sweep.vbw_hz, detector=sweep.detector,
                   ref_level_dbm=sweep.ref_level_dbm, attenuation_db=sweep.attenuation_db,
                   trace_mode=sweep.trace, count=sweep.count,
                   est_sweep_time_s=one_sweep_s * sweep.count)


def _segments_time_s(segments: tuple[Segment, ...], caps: AnalyzerCaps) -> float:
    return sum(s.est_sweep_time_s + transfer_time_s(s.points, caps) for s in segments)


# --------------------------------------------------------------------------- motion


def trapezoid_move_time_s(distance_m: float, max_speed_m_per_s: float,
                          accel_m_per_s2: float) -> float:
    """Time of a point-to-point move that starts and ends at rest, s.

    Trapezoidal velocity profile: if the move is long enough to reach ``v`` (d >= v^2/a)
    t = d/v + v/a, else the profile is triangular and t = 2 sqrt(d/a).
    """
    distance_m = abs(distance_m)
    if distance_m == 0.0:
        return 0.0
    if distance_m >= max_speed_m_per_s ** 2 / accel_m_per_s2:
        return distance_m / max_speed_m_per_s + max_speed_m_per_s / accel_m_per_s2
    return 2.0 * math.sqrt(distance_m / accel_m_per_s2)


def stage_move_time_s(start: StagePose | None, end: StagePose, stage: StageCaps) -> float:
    """Time to go from ``start`` to ``end``: lift to safe z, XY travel, lower; rotation; tool.

    With no start pose the stage is taken to be parked at safe z above the board origin.
    """
    def move(distance_m: float) -> float:
        return trapezoid_move_time_s(distance_m, stage.max_feed_m_per_s, stage.accel_m_per_s2)

    if start is None:
        start = StagePose(stage.board_origin_m[0], stage.board_origin_m[1], stage.safe_z_m,
                          end.rotation_deg, end.tool, 0.0, 0.0)
    xy_m = math.hypot(end.x_m - start.x_m, end.y_m - start.y_m)
    if xy_m > stage.position_tolerance_m:
        seconds = (move(stage.safe_z_m - start.z_m) + move(xy_m)
                   + move(stage.safe_z_m - end.z_m))
    else:
        seconds = move(end.z_m - start.z_m)
    seconds += abs(end.rotation_deg - start.rotation_deg) / stage.rotary_speed_deg_per_s
    if end.tool != start.tool:
        seconds += stage.tool_change_s
    return seconds


# --------------------------------------------------------------------------- grid


def inside_polygon(points: np.ndarray, polygon: np.ndarray, tol: float = 1e-9) -> np.ndarray:
    """Which points lie inside the polygon or on its edges (even-odd ray casting).

    Parameters
    ----------
    points : (N, 2) array
    polygon : (M, 2) array, corners in order (closing edge implied)
    tol : float
        Distance within which a point counts as on an edge (same unit as the points).
    """
    points = np.asarray(points, dtype=float).reshape(-1, 2)
    polygon = np.asarray(polygon, dtype=float)
    px, py = points[:, 0:1], points[:, 1:2]
    x1, y1 = polygon[:, 0], polygon[:, 1]
    x2, y2 = np.roll(x1, -1), np.roll(y1, -1)
    crosses = (y1 > py) != (y2 > py)
    with np.errstate(divide="ignore", invalid="ignore"):
        x_at = x1 + (py - y1) * (x2 - x1) / (y2 - y1)
    inside = np.count_nonzero(crosses & (px < x_at), axis=1) % 2 == 1
    return inside | _on_edge(px, py, x1, y1, x2, y2, tol)


def _on_edge(px, py, x1, y1, x2, y2, tol: float) -> np.ndarray:
    dx, dy = x2 - x1, y2 - y1
    length_sq = np.where(dx * dx + dy * dy == 0.0, 1.0, dx * dx + dy * dy)
    t = np.clip(((px - x1) * dx + (py - y1) * dy) / length_sq, 0.0, 1.0)
    distance = np.hypot(px - (x1 + t * dx), py - (y1 + t * dy))
    return np.any(distance <= tol, axis=1)


def grid_positions(step: GridStep) -> tuple[tuple[float, float], ...]:
    """Board positions (x_m, y_m) of one pass over the area, in scan order.

    Rows run along x at increasing y; ``serpentine`` reverses every other row, ``raster``
    starts every row at the low x. Polygons keep the positions inside or on the outline.
    """
    if step.area is not None:
        (x0, x1), (y0, y1) = step.area.x_m, step.area.y_m
    else:
        corners = np.asarray(step.polygon)
        (x0, y0), (x1, y1) = corners.min(axis=0), corners.max(axis=0)
    xs = _axis_values(x0, x1, step.pitch_x_m)
    ys = _axis_values(y0, y1, step.pitch_y_m)
    rows = []
    for row_index, y in enumerate(ys):
        row = [(x, y) for x in xs]
        if step.polygon is not None:
            keep = inside_polygon(np.array(row), np.asarray(step.polygon))
            row = [p for p, k in zip(row, keep) if k]
        if step.path == "serpentine" and row_index % 2 == 1:
            row.reverse()
        rows.extend(row)
    return tuple(rows)


def _axis_values(lo: float, hi: float, pitch: float) -> list[float]:
    count = int(math.floor((hi - lo) / pitch + _EPS)) + 1
    return [float(lo + k * pitch) for k in range(count)]


# --------------------------------------------------------------------------- planning


@dataclass
class _State:
    """What the planner tracks while laying actions out."""

    caps: BenchCaps
    actions: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    stage_pose: Optional[StagePose] = None
    far_pose: Optional[FarFieldPose] = None


def make_plan(sequence: Sequence, caps: BenchCaps) -> Plan:
    """Plan a sequence on a bench.

    Raises
    ------
    PlanError
        A step needs something the bench lacks (stage, mast, probe, RBW).
    SafetyLimitError
        A position lies outside the stage, mast or turntable limits (the first one found).
    """
    state = _State(caps=caps, warnings=list(sequence.warnings))
    state.warnings.extend(_sweep_warnings(sequence, caps.analyzer))
    summaries = []
    for index, step in enumerate(sequence.steps):
        first = len(state.actions)
        planner = _PLANNERS[type(step)]
        note = planner(state, sequence, index, step)
        summaries.append(_summarize(index, step, state.actions[first:], sequence, note))
    return Plan(sequence_name=sequence.name, actions=tuple(state.actions),
                steps=tuple(summaries), warnings=tuple(state.warnings))


def _where(index: int, step) -> str:
    return f"steps[{index}] '{step.label}'"


def _segments_for(state: _State, sequence: Sequence, index: int, step) -> tuple[Segment, ...]:
    sweep = sequence.sweep_of(step)
    steps_hz = state.caps.analyzer.rbw_steps_hz
    if steps_hz and not any(abs(sweep.rbw_hz - r) <= 1e-6 * r for r in steps_hz):
        nearest = sorted(steps_hz, key=lambda r: abs(r - sweep.rbw_hz))[:2]
        raise PlanError(f"{_where(index, step)}: expected an RBW the analyzer offers "
                        f"(nearest: {', '.join(format_hz(r) for r in sorted(nearest))}), "
                        f"found {format_hz(sweep.rbw_hz)}")
    return segment_sweep(sweep, state.caps.analyzer)


def _add(state: _State, index: int, step, segments, pose, motion_s: float,
         powered: bool = True) -> None:
    est = motion_s + _segments_time_s(segments, state.caps.analyzer)
    state.actions.append(Action(index=len(state.actions), step_index=index,
                                step_label=step.label, step_kind=step.kind,
                                segments=segments, pose=pose, board_powered=powered,
                                est_time_s=est, motion_time_s=motion_s))


def _plan_single(state: _State, sequence: Sequence, index: int, step) -> str:
    segments = _segments_for(state, sequence, index, step)
    pose, motion_s = None, 0.0
    if step.has_pose:
        pose = FarFieldPose(step.height_m, step.polarization, step.azimuth_deg)
        _check_far_pose(state.caps, index, step, pose)
        motion_s = _far_move_time_s(state.far_pose, pose, state.caps)
        state.far_pose = _merge_pose(state.far_pose, pose)
    _add(state, index, step, segments, pose, motion_s,
         powered=not isinstance(step, AmbientStep))
    return ""


def _plan_grid(state: _State, sequence: Sequence, index: int, step: GridStep) -> str:
    stage, probe = _grid_needs(state.caps, index, step)
    orientations = step.orientations_deg
    if orientations is None:
        orientations = (0.0, 90.0) if probe.kind == "h-loop" else (0.0,)
    _grid_warnings(state, index, step, probe, orientations, stage)
    segments = _segments_for(state, sequence, index, step)
    poses = _grid_poses(step, stage, probe, orientations)
    _check_stage_limits(stage, index, step, poses)
    for pose in poses:
        motion_s = stage_move_time_s(state.stage_pose, pose, stage)
        _add(state, index, step, segments, pose, motion_s)
        state.stage_pose = pose
    return ""


def _grid_needs(caps: BenchCaps, index: int, step: GridStep) -> tuple[StageCaps, ProbeCaps]:
    if caps.stage is None:
        raise PlanError(f"{_where(index, step)}: expected a [stage] in the bench file for a "
                        f"grid step, found none")
    probe = caps.probes.get(step.probe)
    if probe is None:
        known = ", ".join(sorted(caps.probes)) or "none"
        raise PlanError(f"{_where(index, step)}: expected a probe of the bench file "
                        f"({known}), found '{step.probe}'")
    scan_z_m = caps.stage.board_origin_m[2] + step.height_m
    if caps.stage.safe_z_m < scan_z_m:
        raise SafetyLimitError(f"{_where(index, step)}: expected safe_z above the scan height "
                               f"(stage z = {scan_z_m * 1e3:g} mm), found "
                               f"{caps.stage.safe_z_m * 1e3:g} mm")
    return caps.stage, probe


def _grid_warnings(state: _State, index: int, step: GridStep, probe: ProbeCaps,
                   orientations: tuple[float, ...], stage: StageCaps) -> None:
    if probe.kind == "h-loop" and len(orientations) == 1:
        state.warnings.append(f"{_where(index, step)}: H-loop scanned in one orientation "
                              f"({orientations[0]:g} deg); a loop only sees the field through "
                              f"it, so scan 0 and 90 deg (common practice)")
    if len(orientations) > 1 and not stage.rotary_axis:
        raise PlanError(f"{_where(index, step)}: {len(orientations)} probe orientations, but the stage "
                        "has no rotary axis (bench [stage] rotary_axis = false): give the step one "
                        "orientation and run the other as a second sequence after turning the probe by hand")


def _grid_poses(step: GridStep, stage: StageCaps, probe: ProbeCaps,
                orientations: tuple[float, ...]) -> list[StagePose]:
    ox, oy, oz = stage.board_origin_m
    one_pass = grid_positions(step)
    poses = []
    for k, rotation in enumerate(orientations):
        # serpentine: the next orientation starts where the last one ended
        order = one_pass[::-1] if step.path == "serpentine" and k % 2 == 1 else one_pass
        poses.extend(StagePose(ox + bx, oy + by, oz + step.height_m, rotation, probe.tool,
                               bx, by, step.height_m, step.probe) for bx, by in order)
    return poses


def _check_stage_limits(stage: StageCaps, index: int, step: GridStep,
                        poses: list[StagePose]) -> None:
    for number, pose in enumerate(poses, start=1):
        for axis, value, (lo, hi) in zip("xyz", (pose.x_m, pose.y_m, pose.z_m), stage.limits_m):
            if value < lo - _EPS or value > hi + _EPS:
                raise SafetyLimitError(
                    f"{_where(index, step)}: position {number} of {len(poses)} (board x = "
                    f"{pose.board_x_m * 1e3:g} mm, y = {pose.board_y_m * 1e3:g} mm): expected "
                    f"stage {axis} within [{lo * 1e3:g} mm, {hi * 1e3:g} mm], found "
                    f"{value * 1e3:g} mm")


def _plan_prescan(state: _State, sequence: Sequence, index: int, step: PrescanStep) -> str:
    segments = _segments_for(state, sequence, index, step)
    poses = _prescan_poses(step)
    for pose in poses:
        _check_far_pose(state.caps, index, step, pose)
    for pose in poses:
        motion_s = _far_move_time_s(state.far_pose, pose, state.caps)
        _add(state, index, step, segments, pose, motion_s)
        state.far_pose = pose
    return ""


def _prescan_poses(step: PrescanStep) -> list[FarFieldPose]:
    """Polarization outer, azimuth next, heights inner; heights go up then down alternately
    and every other polarization walks the azimuths back, so no axis returns empty."""
    heights = step.heights.values()
    azimuths = step.azimuths.values()
    poses, upward = [], True
    for p, polarization in enumerate(step.polarizations):
        for azimuth in (azimuths if p % 2 == 0 else azimuths[::-1]):
            for height in (heights if upward else heights[::-1]):
                poses.append(FarFieldPose(height, polarization, azimuth))
            upward = not upward
    return poses


def _check_far_pose(caps: BenchCaps, index: int, step, pose: FarFieldPose) -> None:
    where = _where(index, step)
    if (pose.height_m is not None or pose.polarization is not None) and caps.mast is None:
        raise PlanError(f"{where}: expected a [mast] in the bench file for antenna height and "
                        f"polarization, found none")
    if pose.azimuth_deg is not None and caps.turntable is None:
        raise PlanError(f"{where}: expected a [turntable] in the bench file for azimuths, "
                        f"found none")
    checks = []
    if pose.height_m is not None:
        checks.append(("antenna height", pose.height_m, caps.mast.height_limits_m, "m"))
    if pose.azimuth_deg is not None:
        checks.append(("azimuth", pose.azimuth_deg, caps.turntable.limits_deg, "deg"))
    for name, value, (lo, hi), unit in checks:
        if value < lo - _EPS or value > hi + _EPS:
            raise SafetyLimitError(f"{where}: expected {name} within [{lo:g} {unit}, "
                                   f"{hi:g} {unit}], found {value:g} {unit}")


def _far_move_time_s(start: Optional[FarFieldPose], end: FarFieldPose,
                     caps: BenchCaps) -> float:
    """Mast and turntable at constant speed, one after the other; from the lower limits."""
    seconds = 0.0
    if end.height_m is not None:
        h0 = start.height_m if start and start.height_m is not None else (
            caps.mast.height_limits_m[0])
        seconds += abs(end.height_m - h0) / caps.mast.speed_m_per_s
    if end.azimuth_deg is not None:
        a0 = start.azimuth_deg if start and start.azimuth_deg is not None else (
            caps.turntable.limits_deg[0])
        seconds += abs(end.azimuth_deg - a0) / caps.turntable.speed_deg_per_s
    if (end.polarization is not None and start is not None and start.polarization is not None
            and end.polarization != start.polarization):
        seconds += caps.mast.polarization_change_s
    return seconds


def _merge_pose(old: Optional[FarFieldPose], new: FarFieldPose) -> FarFieldPose:
    if old is None:
        return new
    return FarFieldPose(*(n if n is not None else o for n, o in zip(
        (new.height_m, new.polarization, new.azimuth_deg),
        (old.height_m, old.polarization, old.azimuth_deg))))


def _plan_final(state: _State, sequence: Sequence, index: int, step: FinalStep) -> str:
    prescan = sequence.step(step.of)
    sweep = sequence.sweep_of(prescan)
    analyzer = state.caps.analyzer
    reading_s = sweep_time_s(max(step.span_hz, sweep.rbw_hz), sweep.rbw_hz, sweep.vbw_hz,
                             analyzer) + analyzer.command_overhead_s
    searches = 0
    motion_s = 0.0
    if step.azimuth_search is not None and state.caps.turntable is not None:
        searches += len(step.azimuth_search.offsets())
        # out to -half, across to +half, back to the best: about 4 half widths
        turntable = state.caps.turntable
        motion_s += 4 * step.azimuth_search.half_width_deg / turntable.speed_deg_per_s
    if step.height_search is not None and state.caps.mast is not None:
        searches += len(step.height_search.offsets())
        motion_s += 4 * step.height_search.half_width_m / state.caps.mast.speed_m_per_s
    detectors_s = len(step.detectors) * (step.dwell_s + analyzer.command_overhead_s)
    per_suspect_s = searches * reading_s + motion_s + detectors_s
    est = ASSUMED_SUSPECTS * per_suspect_s
    state.actions.append(Action(index=len(state.actions), step_index=index,
                                step_label=step.label, step_kind=step.kind, segments=(),
                                pose=None, board_powered=True, est_time_s=est,
                                motion_time_s=ASSUMED_SUSPECTS * motion_s, dynamic=True))
    return (f"dynamic: assumed {ASSUMED_SUSPECTS} suspects x {len(step.detectors)} detectors "
            f"({', '.join(step.detectors)}), {searches} search readings each; the prescan "
            f"decides the real number")


_PLANNERS = {
    AmbientStep: _plan_single,
    SweepStep: _plan_single,
    GridStep: _plan_grid,
    PrescanStep: _plan_prescan,
    FinalStep: _plan_final,
}


def _summarize(index: int, step, actions: list[Action], sequence: Sequence,
               note: str) -> StepSummary:
    est = sum(a.est_time_s for a in actions)
    if isinstance(step, FinalStep):
        traces = ASSUMED_SUSPECTS * len(step.detectors)
        return StepSummary(index, step.label, step.kind, len(actions), 0, 0, 0, est, traces,
                           traces * (BYTES_PER_POINT + TRACE_OVERHEAD_BYTES), True, note)
    segments = actions[0].segments if actions else ()
    traces = len(actions) * len(segments)
    points = sum(s.points for s in segments)
    data = len(actions) * (points * BYTES_PER_POINT + len(segments) * TRACE_OVERHEAD_BYTES)
    return StepSummary(index, step.label, step.kind, len(actions), len(segments), points,
                       sequence.sweep_of(step).count, est, traces, data, False, note)


def _sweep_warnings(sequence: Sequence, caps: AnalyzerCaps) -> list[str]:
    out = []
    for name, sweep in sequence.sweeps.items():
        segments = segment_sweep(sweep, caps)
        step_hz = max(s.step_hz for s in segments)
        if step_hz > sweep.rbw_hz / 2.0 * (1 + 1e-9):
            out.append(f"sweep '{name}': frequency step {format_hz(step_hz)} > rbw/2 "
                       f"({format_hz(sweep.rbw_hz / 2)}): worst-case scalloping "
                       f"{scalloping_db(step_hz, sweep.rbw_hz):.2f} dB (6*(2*df/B6)^2 at "
                       f"df = step/2, reference sheet §1.7)")
        if sweep.detector in _QP_DETECTORS and sweep.dwell_s is None:
            out.append(f"sweep '{name}': {sweep.detector} detector without dwell: the "
                       f"estimate uses the swept formula; unknown signals need a dwell of "
                       f"1 s per frequency (reference sheet §1.8)")
    return out
