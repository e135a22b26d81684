"""Far-field prescan: the maximum over antenna heights x polarizations x turntable azimuths.

Sequence file::

    [[steps]]
    kind = "prescan"
    label = "prescan"
    sweep = "band"
    heights = { from = "1 m", to = "4 m", step = "0.5 m" }
    polarizations = ["horizontal", "vertical"]
    azimuths = { from = "0 deg", to = "315 deg", step = "45 deg" }
    limit = "cispr32-class-b-3m"
    ambient = "ambient"          # optional: an earlier ambient step
    margin = "6 dB"              # suspects: over the limit or within this below it

After its last pose the step is analysed: its traces are joined (maximum over the poses),
corrected through the antenna chain to dBuV/m, peaks are searched (prominence above the local
floor, minimum separation in Hz), suspects kept (over the limit or within the margin, against
the lowest limit of any detector: a peak reading below it meets every line, since
peak >= quasi-peak >= average for one signal, CISPR 16-1-1 detector definitions), the signals
the ambient capture also shows are marked, and for each suspect the pose where it was
strongest is noted. A final step then remeasures the suspects.

A pre-scan is an estimate, not a compliance verdict.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Literal, Optional

import numpy as np
import pydantic
from pydantic import Field, StrictStr

from bench.planning import FarFieldPose, PlanState, check_far_pose, far_move_time_s
from bench.steps.base import StepKind, optional_float, where
from bench.steps.fields import (
    MAX_RANGE_VALUES,
    Angle,
    Decibel,
    Frequency,
    Label,
    Polarization,
    PositiveAngle,
    PositiveDecibel,
    PositiveLength,
    StrictModel,
)
from bench.tomlsource import cross_check_error

__all__ = ["HeightRange", "AzimuthRange", "PrescanStep", "PrescanKind", "FarFieldContext",
           "far_context", "stored_context", "limit_for_site", "analyze_prescan", "prescan_poses"]

log = logging.getLogger("bench.steps.prescan")

#: Level tolerance for calling a suspect ambient: the ambient capture shows a peak no more than
#: this far below it (common practice: a few dB, the repeatability of a swept pre-scan).
AMBIENT_LEVEL_TOL_DB = 6.0


class _Range(StrictModel):
    """``{ from = ..., to = ..., step = ... }`` with from <= to and step > 0; both ends kept."""

    @pydantic.model_validator(mode="after")
    def _ordered(self) -> "_Range":
        start, stop, step = self._triple()
        if start > stop:
            raise cross_check_error([(("to",), f"expected to >= from "
                                               f"({self._show(start)}), found "
                                               f"{self._show(stop)}")])
        if (stop - start) / step + 1 > MAX_RANGE_VALUES:
            raise cross_check_error([(("step",), f"expected a step giving at most {MAX_RANGE_VALUES} "
                                                 f"values, found {self._show(step)} over "
                                                 f"{self._show(start)} to {self._show(stop)}")])
        return self

    def _triple(self) -> tuple[float, float, float]:
        raise NotImplementedError

    def _show(self, value: float) -> str:
        raise NotImplementedError

    def values(self) -> tuple[float, ...]:
        """Every value from ``from`` to ``to`` (inclusive, within 1e-9 of a step) by ``step``."""
        start, stop, step = self._triple()
        count = int(math.floor((stop - start) / step + 1e-9)) + 1
        return tuple(float(v) for v in start + step * np.arange(count))


class HeightRange(_Range):
    """Antenna heights, m."""

    from_m: PositiveLength = Field(alias="from")
    to_m: PositiveLength = Field(alias="to")
    step_m: PositiveLength = Field(alias="step")

    def _triple(self) -> tuple[float, float, float]:
        return self.from_m, self.to_m, self.step_m

    def _show(self, value: float) -> str:
        return f"{value:g} m"


class AzimuthRange(_Range):
    """Turntable azimuths, deg."""

    from_deg: Angle = Field(alias="from")
    to_deg: Angle = Field(alias="to")
    step_deg: PositiveAngle = Field(alias="step")

    def _triple(self) -> tuple[float, float, float]:
        return self.from_deg, self.to_deg, self.step_deg

    def _show(self, value: float) -> str:
        return f"{value:g} deg"


class PrescanStep(StrictModel):
    """Far-field maximum search over heights x polarizations x azimuths.

    Peak search settings: ``margin_db`` (suspects within this of the limit or over it),
    ``prominence_db``, ``min_separation_hz``, ``ambient_tolerance_hz``.
    """

    kind: Literal["prescan"]
    label: Label
    sweep: StrictStr
    heights: HeightRange
    polarizations: Annotated[tuple[Polarization, ...], Field(min_length=1)]
    azimuths: AzimuthRange
    limit: StrictStr
    ambient: Optional[StrictStr] = None
    margin_db: Decibel = Field(6.0, alias="margin")
    prominence_db: PositiveDecibel = Field(6.0, alias="prominence")
    min_separation_hz: Frequency = Field(1e6, alias="min_separation")
    ambient_tolerance_hz: Frequency = Field(200e3, alias="ambient_tolerance")

    @pydantic.model_validator(mode="after")
    def _distinct(self) -> "PrescanStep":
        if len(set(self.polarizations)) != len(self.polarizations):
            raise cross_check_error([(("polarizations",), "expected distinct polarizations, "
                                                          "found a repeated one")])
        return self




# --------------------------------------------------------------------------- the kind


class PrescanKind(StepKind):
    """Heights x polarizations x azimuths; suspects found once the last pose is measured."""

    name = "prescan"
    model = PrescanStep
    references = (("ambient", "ambient"),)
    analyses = True

    def warnings(self, where_text: str, step: PrescanStep) -> list[str]:
        if len(step.polarizations) == 1:
            return [f"{where_text}: prescan with one polarization ({step.polarizations[0]}); the "
                    f"maximum is searched in horizontal and vertical (CISPR 16-2-3)"]
        return []

    def plan(self, state: PlanState, sequence, index: int, step: PrescanStep) -> str:
        segments = state.segments(where(index, step), sequence.sweep_of(step))
        poses = prescan_poses(step)
        for pose in poses:
            check_far_pose(state.caps, where(index, step), pose)
        for pose in poses:
            motion_s = far_move_time_s(state.far_pose, pose, state.caps)
            state.add(index, step, segments, pose, motion_s)
            state.far_pose = pose
        return ""

    def manifest_entry(self, sequence, step: PrescanStep) -> dict:
        return {**super().manifest_entry(sequence, step), "margin_db": step.margin_db}

    def after_step(self, ctx, step: PrescanStep) -> list[dict]:
        return analyze_prescan(ctx.store, step, far_context(ctx, step))

    def rejudge(self, run, info: dict, sequence, rows) -> list[dict]:
        """The peaks of the stored spectrum searched again against the new limit and margin."""
        step = sequence.step(info["label"])
        if info.get("margin_db") is not None:
            step = step.model_copy(update={"margin_db": float(info["margin_db"])})
        return analyze_prescan(run, step, stored_context(run, info))


def prescan_poses(step: PrescanStep) -> list[FarFieldPose]:
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


# --------------------------------------------------------------------------- far-field context


@dataclass(frozen=True)
class FarFieldContext:
    """What far-field analysis needs besides the store: the chain, the limit at the site distance."""

    chain: object | None
    limit: object
    distance_m: float
    eut_size_m: float | None = None

    def correct(self, freq_hz, level_dbuv):
        """Reading (dBuV) -> field strength through the chain (unchanged without one)."""
        return level_dbuv if self.chain is None else self.chain.correct(freq_hz, level_dbuv)

    @property
    def chain_text(self) -> str:
        """The chain, described for people (one line per table)."""
        return "none (raw dBuV)" if self.chain is None else self.chain.describe()


def limit_for_site(limit, distance_m: float):
    """A limit moved to the site distance at 20 dB/decade, and the notes saying so.

    The inverse-distance rule (field strength proportional to 1/d in the far field) gives
    20 dB per decade of distance; CISPR 32 and FCC 15.31(f) use it to move limits between
    test distances.
    """
    notes = []
    if limit.distance_m is not None and abs(limit.distance_m - distance_m) > 1e-9:
        notes.append(f"limit {limit.name} is specified at {limit.distance_m:g} m; converted to the "
                     f"site distance {distance_m:g} m at 20 dB/decade (far-field assumption)")
        limit = limit.at_distance(distance_m)
    return limit, notes


def far_context(ctx, step: PrescanStep) -> FarFieldContext:
    """The far-field context of a prescan: its limit at the site distance and its antenna chain.

    The chain is read from the tables copied into the run folder, as the manifest lists them
    for the step, so a later report corrects the stored readings the same way.
    """
    from bench.analysis.runview import step_chain

    bench = ctx.bench
    distance = bench.site.distance_m if bench.site is not None else 3.0
    limit, notes = limit_for_site(ctx.limit(step.limit), distance)
    for n in notes:
        ctx.note("info", n)
    eut = bench.site.eut_size_m if bench.site is not None else None
    return FarFieldContext(chain=step_chain(ctx.store, step.label), limit=limit, distance_m=distance,
                           eut_size_m=eut)


def stored_context(run, info: dict) -> FarFieldContext:
    """The far-field context of a stored step: the limit its manifest entry names, its chain."""
    from bench.analysis.limits import load_limit
    from bench.analysis.runview import step_chain

    distance = float(info.get("distance_m", 3.0))
    ref = str(info["limit"])
    path = Path(ref)
    if path.is_absolute():
        limit = load_limit(path)
    elif ref.endswith(".toml") or "/" in ref:
        limit = load_limit(Path(run.folder) / path)  # a limit file copied into the run folder
    else:
        limit = load_limit(ref)  # built-in
    limit, _ = limit_for_site(limit, distance)
    return FarFieldContext(chain=step_chain(run, info["label"]), limit=limit, distance_m=distance)


# --------------------------------------------------------------------------- analysis



def _pose_of_max(store, label: str, freq_hz: float) -> dict:
    """Pose (polarization, height, azimuth) of the trace with the highest level at ``freq_hz``."""
    meta = store.traces(label)
    seg = meta[(meta["start_hz"] <= freq_hz) & (meta["stop_hz"] >= freq_hz)]
    best, best_level = None, -np.inf
    for _, row in seg.iterrows():
        f, v = store.trace(int(row["id"]))
        i = int(np.clip(np.searchsorted(f, freq_hz), 0, f.size - 1))
        lo, hi = max(0, i - 1), min(f.size, i + 2)
        level = float(np.max(v[lo:hi]))
        if level > best_level:
            best, best_level = row, level
    if best is None:
        return {}
    return {"polarization": best["polarization"], "height_m": optional_float(best["height_m"]),
            "azimuth_deg": optional_float(best["azimuth_deg"])}


def _suspects(store, step: PrescanStep, ctx: FarFieldContext, peaks):
    from bench.analysis.peaks import flag_ambient, select_suspects

    suspects = select_suspects(peaks, ctx.limit.screening_level, step.margin_db)
    if step.ambient:
        a_freq, a_raw = store.step_spectrum(step.ambient, reduce="max")
        suspects = flag_ambient(suspects, a_freq, ctx.correct(a_freq, a_raw), step.ambient_tolerance_hz,
                                AMBIENT_LEVEL_TOL_DB)
    else:
        suspects["ambient"] = False
    suspects.loc[suspects["ambient"].astype(bool), "status"] = "ambient"
    return suspects


def _passed(step: PrescanStep, ctx: FarFieldContext, peaks, max_rows: int):
    """The strongest peaks that passed with margin (kept for the report)."""
    limit_at_peaks = ctx.limit.screening_level(peaks["freq_hz"].to_numpy()) if len(peaks) else np.array([])
    passed = peaks.assign(limit=limit_at_peaks, margin_db=limit_at_peaks - peaks["level"].to_numpy())
    passed = passed[np.isfinite(passed["limit"]) & (passed["margin_db"] > step.margin_db)]
    return passed.sort_values("margin_db").head(max_rows).assign(status="pass")


def analyze_prescan(store, step: PrescanStep, ctx: FarFieldContext, *, max_pass_rows: int = 10) -> list[dict]:
    """Find the suspects of a measured prescan step; returns its result rows (peak readings).

    Suspects (``fail``, ``near``), ambient signals (``ambient``) and up to ``max_pass_rows`` of
    the strongest peaks that passed with margin (``pass``).
    """
    import pandas as pd

    from bench.analysis.limits import near_field_warnings
    from bench.analysis.peaks import find_peaks_hz

    freq, raw = store.step_spectrum(step.label, reduce="max")
    level = ctx.correct(freq, raw)
    peaks = find_peaks_hz(freq, level, prominence_db=step.prominence_db,
                          min_separation_hz=step.min_separation_hz)
    suspects = _suspects(store, step, ctx, peaks)
    rows = []
    for _, r in pd.concat([suspects, _passed(step, ctx, peaks, max_pass_rows)], ignore_index=True).iterrows():
        pose = _pose_of_max(store, step.label, float(r["freq_hz"]))
        note = ""
        if r["status"] == "ambient":
            note = f"ambient capture shows {r['ambient_level']:.1f} at {r['ambient_freq_hz'] / 1e6:.3f} MHz"
        rows.append(dict(step_label=step.label, freq_hz=float(r["freq_hz"]), level=float(r["level"]),
                         unit=ctx.limit.quantity, detector="peak", limit_level=float(r["limit"]),
                         margin_db=float(r["margin_db"]), status=str(r["status"]), chain=ctx.chain_text,
                         note=note, **pose))
    for w in near_field_warnings(ctx.distance_m, freq, ctx.eut_size_m):
        store.log_event("warning", w)
    return rows
