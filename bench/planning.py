"""Planning primitives shared by every step kind: capabilities, segments, poses, actions, estimates.

Pure computation: nothing here touches an instrument. Each step kind (``bench.steps``) lays its
actions out with these pieces; :mod:`bench.planner` walks the steps and adds the totals.

Estimates used (all stated in the plan text):

* sweep points: ``ceil(span / step) + 1`` with ``step = rbw / 2`` by default (common CISPR 16
  practice: the worst-case scalloping of a Gaussian RBW is then 1.5 dB), split into equal
  contiguous segments when the analyzer has fewer points than that;
* sweep time per segment: ``max(k * span / RBW^2, min_sweep_time)`` (``RBW * VBW`` in the
  denominator when VBW < RBW; the swept-analyzer relation, k = 2-3 for analog filters, common
  practice); ``points * dwell`` when a dwell is given;
* transfer: ``points * bytes per point / rate + command overhead`` per segment (the bytes per
  point of the profile's trace format: 4 for REAL,32, 8 for REAL,64, about 12 for ASCII);
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
from bench.stagelimits import StageLimits
from bench.sweepsettings import SweepSettings
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
    "PlanState",
    "format_duration",
    "format_bytes",
    "segment_sweep",
    "segments_time_s",
    "sweep_time_s",
    "transfer_time_s",
    "trapezoid_move_time_s",
    "stage_move_time_s",
    "check_far_pose",
    "far_move_time_s",
    "merge_pose",
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
        k of ST = k * span / RBW^2 (2-3 for analog filters, common practice).
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
    wire_bytes_per_point: float = BYTES_PER_POINT


@dataclass(frozen=True)
class StageCaps:
    """The XYZ stage: its safety limits, origin in stage metres, speeds in m/s^2 and deg/s.

    ``limits`` is the one stage-limits type the bench file produces and the driver enforces
    (soft limits, travel height, feed ceiling, position tolerance, rotary axis and its limits);
    ``board_origin_m`` the stage position of board corner (0, 0) on the board's top surface.
    ``tool_change_s`` estimates a probe change (the operator swaps the probe).
    """

    limits: StageLimits
    accel_m_per_s2: float = 0.5
    board_origin_m: tuple[float, float, float] = (0.0, 0.0, 0.0)
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
        stage = StageCaps(limits=section.safety_limits, accel_m_per_s2=stage_accel_m_per_s2,
                          board_origin_m=section.board_origin_m)
    mast = None if bench.mast is None else MastCaps(bench.mast.height_limits_m,
                                                    speed_m_per_s=mast_speed_m_per_s)
    turntable = None if bench.turntable is None else TurntableCaps(
        bench.turntable.azimuth_limits_deg, speed_deg_per_s=turntable_speed_deg_per_s)
    probes = {name: ProbeCaps(p.kind, p.tool) for name, p in bench.probes.items()}
    return BenchCaps(analyzer=analyzer, stage=stage, mast=mast, turntable=turntable,
                     probes=probes)


# --------------------------------------------------------------------------- plan objects


@dataclass(frozen=True)
class Segment(SweepSettings):
    """One planned trace: the analyzer's sweep settings (Hz, dBm, dB, s), how many sweeps are
    combined and how (``trace_mode``: clear-write, max-hold, average), and the estimated time of
    all of them, s. It is the analyzer's settings type, so it is sent to the driver as it is.
    """

    trace_mode: str = "clear-write"
    count: int = 1
    est_sweep_time_s: float = 0.0

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
    :data:`ASSUMED_SUSPECTS` suspects and it has no segments. An ``analysis`` action analyses
    its step once the step's measurements are stored; its results are stored in the same
    transaction as its done mark, so a resumed run redoes a missing analysis.
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
    analysis: bool = False

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
        lines = [f"'{self.sequence_name}': {len(self.steps)} steps, {len(self.actions)} actions"]
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
    the step (Gaussian filter shape, derived in docs/physics.md): step = B6/2 -> 1.50 dB.
    """
    offset_hz = step_hz / 2.0
    return 6.0 * (2.0 * offset_hz / b6_hz) ** 2


def sweep_time_s(span_hz: float, rbw_hz: float, vbw_hz: float, caps: AnalyzerCaps) -> float:
    """One sweep, s: ``max(k * span / RBW^2, min)``; ``RBW * VBW`` when VBW < RBW (common practice)."""
    bandwidth_sq = rbw_hz * min(rbw_hz, vbw_hz)
    return max(caps.sweep_time_k * span_hz / bandwidth_sq, caps.min_sweep_time_s)


def transfer_time_s(points: int, caps: AnalyzerCaps) -> float:
    """Fetching one trace of float32 values plus the command round trip, s."""
    return points * caps.wire_bytes_per_point / caps.transfer_bytes_per_s + caps.command_overhead_s


def segment_sweep(sweep, caps: AnalyzerCaps) -> tuple[Segment, ...]:
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


def _segment(sweep, start_hz: float, stop_hz: float, points: int,
             caps: AnalyzerCaps) -> Segment:
    one_sweep_s = sweep_time_s(stop_hz - start_hz, sweep.rbw_hz, sweep.vbw_hz, caps)
    if sweep.dwell_s is not None:
        one_sweep_s = max(one_sweep_s, points * sweep.dwell_s)  # dwell per point (common practice)
    return Segment(start_hz=start_hz, stop_hz=stop_hz, points=points, rbw_hz=sweep.rbw_hz,
                   vbw_hz=sweep.vbw_hz, detector=sweep.detector,
                   ref_level_dbm=sweep.ref_level_dbm, attenuation_db=sweep.attenuation_db,
                   trace_mode=sweep.trace, count=sweep.count,
                   est_sweep_time_s=one_sweep_s * sweep.count)


def segments_time_s(segments: tuple[Segment, ...], caps: AnalyzerCaps) -> float:
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
    limits = stage.limits

    def move(distance_m: float) -> float:
        return trapezoid_move_time_s(distance_m, limits.max_feed_m_per_s, stage.accel_m_per_s2)

    if start is None:
        start = StagePose(stage.board_origin_m[0], stage.board_origin_m[1], limits.safe_z_m,
                          end.rotation_deg, end.tool, 0.0, 0.0)
    xy_m = math.hypot(end.x_m - start.x_m, end.y_m - start.y_m)
    if xy_m > limits.position_tolerance_m:
        seconds = (move(limits.safe_z_m - start.z_m) + move(xy_m)
                   + move(limits.safe_z_m - end.z_m))
    else:
        seconds = move(end.z_m - start.z_m)
    seconds += abs(end.rotation_deg - start.rotation_deg) / stage.rotary_speed_deg_per_s
    if end.tool != start.tool:
        seconds += stage.tool_change_s
    return seconds



# --------------------------------------------------------------------------- far-field poses


def check_far_pose(caps: BenchCaps, where: str, pose: FarFieldPose) -> None:
    """Refuse a far-field pose the bench cannot take (no mast/turntable, or outside the limits)."""
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


def far_move_time_s(start: Optional[FarFieldPose], end: FarFieldPose, caps: BenchCaps) -> float:
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


def merge_pose(old: Optional[FarFieldPose], new: FarFieldPose) -> FarFieldPose:
    """``new`` with the axes it leaves unset (None) taken from ``old``."""
    if old is None:
        return new
    return FarFieldPose(*(n if n is not None else o for n, o in zip(
        (new.height_m, new.polarization, new.azimuth_deg),
        (old.height_m, old.polarization, old.azimuth_deg))))


# --------------------------------------------------------------------------- plan state


@dataclass
class PlanState:
    """What the planner tracks while the step kinds lay their actions out.

    Attributes
    ----------
    caps : BenchCaps
        The bench's capabilities.
    actions : list of Action
        Actions so far, in run order.
    warnings : list of str
        Advice collected so far.
    stage_pose, far_pose : pose or None
        Where the stage and the mast/turntable are after the last action (for motion times).
    """

    caps: BenchCaps
    actions: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    stage_pose: Optional[StagePose] = None
    far_pose: Optional[FarFieldPose] = None

    def segments(self, where: str, sweep) -> tuple[Segment, ...]:
        """The segments of a sweep on this analyzer; refuses an RBW the analyzer lacks."""
        steps_hz = self.caps.analyzer.rbw_steps_hz
        if steps_hz and not any(abs(sweep.rbw_hz - r) <= 1e-6 * r for r in steps_hz):
            nearest = sorted(steps_hz, key=lambda r: abs(r - sweep.rbw_hz))[:2]
            raise PlanError(f"{where}: expected an RBW the analyzer offers "
                            f"(nearest: {', '.join(format_hz(r) for r in sorted(nearest))}), "
                            f"found {format_hz(sweep.rbw_hz)}")
        return segment_sweep(sweep, self.caps.analyzer)

    def add(self, index: int, step, segments, pose, motion_s: float, *, powered: bool = True,
            est_time_s: float | None = None, dynamic: bool = False) -> Action:
        """Append one action; its estimate is motion + sweeps + transfers unless given."""
        est = motion_s + segments_time_s(segments, self.caps.analyzer) if est_time_s is None \
            else est_time_s
        action = Action(index=len(self.actions), step_index=index, step_label=step.label,
                        step_kind=step.kind, segments=tuple(segments), pose=pose,
                        board_powered=powered, est_time_s=est, motion_time_s=motion_s,
                        dynamic=dynamic)
        self.actions.append(action)
        return action

    def add_analysis(self, index: int, step) -> Action:
        """Append the analysis of a step (no instrument is used; the board's supply is left as is)."""
        previous = self.actions[-1].board_powered if self.actions else True
        action = Action(index=len(self.actions), step_index=index, step_label=step.label,
                        step_kind=step.kind, segments=(), pose=None, board_powered=previous,
                        est_time_s=0.0, analysis=True)
        self.actions.append(action)
        return action
