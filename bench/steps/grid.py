"""Near-field grid scan: a probe on the XYZ stage walks a grid over the board.

Sequence file::

    [[steps]]
    kind = "grid"
    label = "h-loop-scan"
    sweep = "nf"                       # a [sweeps.*] table
    probe = "h-loop-10mm"              # a probe of the bench file
    area = { x = ["0 mm", "80 mm"], y = ["0 mm", "60 mm"] }   # or polygon = [[x, y], ...]
    step_size = "5 mm"                 # or step_x and step_y
    height = "2 mm"                    # probe tip above the board
    orientations = ["0 deg", "90 deg"] # default: both for an H loop, 0 for an E probe
    path = "serpentine"                # or "raster"

Planning checks every position against the stage's soft limits before anything moves; the
readings go through the probe's factor (dBuA/m for an H loop, dBuV/m for an E probe); the
report lists the emission peaks of the scan and draws maps per orientation and combined, each
map with its own hot spots (distinct sources by 2-D prominence, those on the edge of the
scanned area flagged) and their table.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Annotated, Literal, Optional

import numpy as np
import pydantic
from pydantic import Field, StrictStr

from bench.errors import PlanError, SafetyLimitError
from bench.planning import PlanState, ProbeCaps, StageCaps, StagePose, stage_move_time_s
from bench.steps.base import StepKind, where
from bench.steps.fields import (
    MAX_GRID_POSITIONS,
    Angle,
    Label,
    LengthPair,
    NonNegativeLength,
    PositiveLength,
    StrictModel,
)
from bench.tomlsource import cross_check_error

__all__ = ["Rect", "GridStep", "GridKind", "grid_positions", "inside_polygon"]

_EPS = 1e-9
_EMISSION_COLUMNS = (("rank", "#"), ("freq_hz", "frequency (MHz)"), ("level", "level"),
                     ("prominence_db", "prominence (dB)"))
_HOT_SPOT_COLUMNS = (("map", "map"), ("rank", "#"), ("x_m", "x (mm)"), ("y_m", "y (mm)"),
                     ("level", "level"), ("prominence_db", "prominence (dB)"), ("note", "note"))


class Rect(StrictModel):
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


class GridStep(StrictModel):
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



# --------------------------------------------------------------------------- positions


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



# --------------------------------------------------------------------------- the kind


class GridKind(StepKind):
    """Probe positions x orientations on the stage; maps and hot spots in the report."""

    name = "grid"
    model = GridStep
    far_field = False

    # ----------------------------------------------------------------- planning
    def plan(self, state: PlanState, sequence, index: int, step: GridStep) -> str:
        stage, probe = _grid_needs(state.caps, index, step)
        orientations = step.orientations_deg
        if orientations is None:
            orientations = (0.0, 90.0) if probe.kind == "h-loop" else (0.0,)
        _grid_warnings(state, index, step, probe, orientations, stage)
        segments = state.segments(where(index, step), sequence.sweep_of(step))
        poses = _grid_poses(step, stage, probe, orientations)
        _check_stage_limits(stage, index, step, poses)
        for pose in poses:
            motion_s = stage_move_time_s(state.stage_pose, pose, stage)
            state.add(index, step, segments, pose, motion_s)
            state.stage_pose = pose
        return ""

    # ----------------------------------------------------------------- checks, manifest
    def chain(self, bench, step):
        probe = bench.probes[step.probe]
        unit = "dbua_per_m" if probe.kind == "h-loop" else "dbuv_per_m"
        return [("probe_factor", Path(probe.factor))], unit, {"probe": step.probe,
                                                                "probe_kind": probe.kind}

    def preflight(self, check, index: int, step) -> None:
        """An H loop's factor converts to dBuA/m (dB(S/m)), an E probe's to dBuV/m (dB/m)."""
        from bench.analysis.transducers import load_table

        probe = check.bench.probes[step.probe]
        table = load_table(Path(probe.factor), role="probe_factor")
        wanted = "db_s_per_m" if probe.kind == "h-loop" else "db_per_m"
        if table.value_unit != wanted:
            raise PlanError(f"step '{step.label}': probe table {table.name!r} is in {table.value_unit}, "
                            f"but a {probe.kind} factor must be in {wanted} (column name ending in "
                            f"_{wanted})")

    # ----------------------------------------------------------------- output
    def report_section(self, writer) -> None:
        from bench.analysis import maps as maps_mod

        spectrum = writer.spectrum()
        peaks = writer.attempt("emission peaks",
                               lambda: maps_mod.emission_peaks(writer.run, writer.label))
        if spectrum is not None:
            marks = peaks[["freq_hz", "level"]].assign(status="emission") \
                if peaks is not None and len(peaks) else None
            writer.spectrum_picture(spectrum, marks)
        if peaks is not None:
            _emission_table(writer, peaks)
        _draw_maps(writer, peaks)
        if spectrum is not None:
            writer.chain_block(spectrum)

    def compare_parts(self, run_b, run_a, label: str, out: Path, outline):
        return _compare_maps(run_b, run_a, label, out, outline)


# --------------------------------------------------------------------------- planning helpers


def _grid_needs(caps, index: int, step: GridStep) -> tuple[StageCaps, ProbeCaps]:
    if caps.stage is None:
        raise PlanError(f"{where(index, step)}: expected a [stage] in the bench file for a "
                        f"grid step, found none")
    probe = caps.probes.get(step.probe)
    if probe is None:
        known = ", ".join(sorted(caps.probes)) or "none"
        raise PlanError(f"{where(index, step)}: expected a probe of the bench file "
                        f"({known}), found '{step.probe}'")
    scan_z_m = caps.stage.board_origin_m[2] + step.height_m
    if caps.stage.limits.safe_z_m < scan_z_m:
        raise SafetyLimitError(f"{where(index, step)}: expected safe_z above the scan height "
                               f"(stage z = {scan_z_m * 1e3:g} mm), found "
                               f"{caps.stage.limits.safe_z_m * 1e3:g} mm")
    return caps.stage, probe


def _grid_warnings(state: PlanState, index: int, step: GridStep, probe: ProbeCaps,
                   orientations: tuple[float, ...], stage: StageCaps) -> None:
    if probe.kind == "h-loop" and len(orientations) == 1:
        state.warnings.append(f"{where(index, step)}: H-loop scanned in one orientation "
                              f"({orientations[0]:g} deg); a loop only sees the field through "
                              f"it, so scan 0 and 90 deg (common practice)")
    if len(orientations) > 1 and not stage.limits.rotary_axis:
        raise PlanError(f"{where(index, step)}: {len(orientations)} probe orientations, but the stage "
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
    limits = stage.limits
    if limits.rotary_axis:
        lo, hi = limits.a_deg
        for angle in sorted({p.rotation_deg for p in poses}):
            if angle < lo - _EPS or angle > hi + _EPS:
                raise SafetyLimitError(f"{where(index, step)}: expected probe orientations within the "
                                       f"stage's A limits [{lo:g} deg, {hi:g} deg], found {angle:g} deg")
    for number, pose in enumerate(poses, start=1):
        for axis, value, (lo, hi) in zip("xyz", (pose.x_m, pose.y_m, pose.z_m), limits.as_dict().values()):
            if value < lo - _EPS or value > hi + _EPS:
                raise SafetyLimitError(
                    f"{where(index, step)}: position {number} of {len(poses)} (board x = "
                    f"{pose.board_x_m * 1e3:g} mm, y = {pose.board_y_m * 1e3:g} mm): expected "
                    f"stage {axis} within [{lo * 1e3:g} mm, {hi * 1e3:g} mm], found "
                    f"{value * 1e3:g} mm")


# --------------------------------------------------------------------------- report helpers


def _board_photo(writer, board: dict):
    photo = board.get("photo")
    photo_path = Path(writer.run.folder) / photo if photo else None
    if photo_path is not None and not photo_path.is_file():
        writer.warnings.append(f"board photo {photo} not found in the run folder")
        return None
    return photo_path


def _map_views(writer, peaks) -> list[tuple[str, dict]]:
    views = [("map", {})]  # maximum over the whole span
    if peaks is not None and len(peaks):
        # one map per emission peak, strongest first (as many as asked for)
        for rank, freq in enumerate(peaks["freq_hz"].head(writer.views.peaks), start=1):
            views.append((f"map-peak{rank}", {"freq_hz": float(freq)}))
    for freq in writer.views.freqs_hz:
        views.append((f"map-{freq / 1e6:.6g}MHz", {"freq_hz": float(freq)}))
    for lo, hi in writer.views.bands_hz:
        views.append((f"map-{lo / 1e6:.6g}-{hi / 1e6:.6g}MHz", {"band_hz": (float(lo), float(hi))}))
    return views


def _map_png(writer, gm, suffix: str, board: dict, photo_path, spots) -> Path:
    from bench import plots
    from bench.errors import BenchError

    common = {"outline_m": board.get("outline_m"), "title": f"{writer.label}: {gm.what}",
              "unit": gm.unit, "hot_spots": spots}
    if photo_path is not None:
        try:
            return plots.map_png(writer.png(suffix), gm, photo=photo_path,
                                 photo_points=board.get("photo_points"), **common)
        except (BenchError, OSError, ValueError, KeyError, TypeError) as exc:
            writer.warnings.append(f"board photo not drawn: {exc}")
    return plots.map_png(writer.png(suffix), gm, **common)


def _draw_maps(writer, peaks) -> None:
    from bench.analysis import maps as maps_mod
    from bench.analysis import runview
    from bench.htmlkit import embed_png, esc

    board = writer.run.manifest().get("board", {})
    photo_path = _board_photo(writer, board)
    for suffix, kwargs in _map_views(writer, peaks):
        gm = writer.attempt("map", lambda kw=kwargs: maps_mod.grid_maps(writer.run, writer.label, **kw))
        if gm is None:
            continue
        spots = gm.hot_spots()  # each map its own, computed once for the picture and the table
        path = _map_png(writer, gm, suffix, board, photo_path, spots)
        writer.parts.append(f"<h3>Map: {esc(gm.what)}</h3>")
        writer.parts.append(embed_png(path, f"map of {writer.label} {gm.what}"))
        peak = writer.attempt("combined map", gm.peak)
        if peak is not None:
            x, y, level = peak
            writer.parts.append(f"<p>Combined-map maximum {level:.1f} "
                                f"{esc(runview.UNIT_TEXT.get(gm.unit, gm.unit))} at x = "
                                f"{x * 1e3:.1f} mm, y = {y * 1e3:.1f} mm ({esc(gm.what)}).</p>")
        writer.parts.append(_hot_spot_table(spots, runview.UNIT_TEXT.get(gm.unit, gm.unit)))


def _hot_spot_table(spots, unit_text: str) -> str:
    """HTML table of map hot spots (numbered as on the maps), edge spots noted."""
    from bench.analysis.maps import EDGE_NOTE
    from bench.htmlkit import esc, html_table, mm

    if not len(spots):
        return "<p>No hot spot: no position stands out of its map (docs/physics.md, section 4).</p>"
    shown = spots.assign(note=[EDGE_NOTE if edge else "" for edge in spots["at_edge"]])
    heads = tuple((c, f"level ({unit_text})" if c == "level" else h) for c, h in _HOT_SPOT_COLUMNS)
    return (f"<p>Hot spots of each map ({esc(unit_text)}), numbered as on the map:</p>"
            + html_table(shown, heads, formats={"level": ".2f", "x_m": mm, "y_m": mm,
                                                "prominence_db": ".1f"}))


def _emission_table(writer, peaks) -> None:
    from bench.htmlkit import html_table, mhz

    writer.parts.append("<h3>Emission peaks of the scan (maximum over all positions; a map of "
                        "each of the strongest follows)</h3>")
    numbered = peaks.reset_index(drop=True)
    numbered.insert(0, "rank", np.arange(1, len(numbered) + 1))
    writer.parts.append(html_table(numbered, _EMISSION_COLUMNS,
                                   formats={"freq_hz": mhz, "level": ".2f",
                                            "prominence_db": ".1f"}))


def _compare_maps(run_b, run_a, label: str, out: Path, outline):
    """Combined-map change after minus before (its extremes join the summary), hot-spot tables."""
    from bench import plots
    from bench.analysis import maps as maps_mod
    from bench.analysis import runview
    from bench.analysis.changes import ChangeExtremes, KindComparison
    from bench.htmlkit import embed_png, esc, safe_name

    maps_b, maps_a = maps_mod.grid_maps(run_b, label), maps_mod.grid_maps(run_a, label)
    change = maps_mod.compare_maps(maps_b, maps_a)
    path = plots.delta_map_png(out / f"{safe_name(label)}-map-change.png", change.x_m,
                               change.y_m, change.delta_db,
                               title=f"{label}: combined map change ({maps_a.what})",
                               outline_m=outline)
    yy, xx = np.meshgrid(change.y_m, change.x_m, indexing="ij")
    places = [f"x = {x * 1e3:.1f} mm, y = {y * 1e3:.1f} mm" for x, y in zip(xx.ravel(), yy.ravel())]
    extremes = ChangeExtremes.of("combined map", "position", change.delta_db, places)
    html = [embed_png(path, f"map change of {label}")]
    if extremes is not None:
        html.append(f"<p>Map change, {esc(maps_a.what)}: {esc(extremes.text())}.</p>")
    unit_text = runview.UNIT_TEXT.get(maps_a.unit, maps_a.unit)
    for name, gm in (("before", maps_b), ("after", maps_a)):
        main = gm.panels()[-1][0]  # the combined map (the only map with one rotation)
        html.append(f"<h4>Hot spots {name} ({esc(main)} map, {esc(gm.what)})</h4>"
                    + _hot_spot_table(gm.hot_spots(main), unit_text))
    return KindComparison(() if extremes is None else (extremes,), tuple(html))
