"""Final measurement: each suspect of a prescan remeasured with the detectors the standard asks for.

Sequence file::

    [[steps]]
    kind = "final"
    label = "final"
    of = "prescan"                   # an earlier prescan step
    detectors = ["quasi-peak", "cispr-average"]
    dwell = "1 s"                    # measurement time per reading
    span = "1 MHz"                   # narrow span that re-centres on the suspect
    azimuth_search = { half_width = "30 deg", step = "15 deg" }   # optional
    height_search = { half_width = "0.5 m", step = "0.25 m" }     # optional

For each suspect that is not ambient: re-centre on it (a zoom around it, max-hold over the
dwell, then the peak refined by interpolation), search azimuth then
height around the prescan maximum in zero span with the dwell (a swept peak detector can miss
a bursty signal), then read the peak and every asked detector at the best pose and compare each
reading with the limit line of its detector. How many suspects there are is decided by the
prescan, so the plan holds one dynamic action whose estimate assumes a number of suspects.
"""

from __future__ import annotations

import logging
import math
from typing import Annotated, Literal, Optional

import numpy as np
import pydantic
from pydantic import Field, StrictStr

from bench.errors import PlanError
from bench.planning import (
    ASSUMED_SUSPECTS,
    BYTES_PER_POINT,
    TRACE_OVERHEAD_BYTES,
    FarFieldPose,
    PlanState,
    Segment,
    StepSummary,
    sweep_time_s,
)
from bench.steps.base import StepKind, optional_float, where
from bench.tomlsource import cross_check_error
from bench.steps.fields import (
    Detector,
    Frequency,
    Label,
    NonNegativeAngle,
    NonNegativeLength,
    PositiveAngle,
    PositiveLength,
    PositiveTime,
    StrictModel,
)

__all__ = ["AngleSearch", "HeightSearch", "FinalStep", "FinalKind", "LIMIT_DETECTOR", "run_finals",
           "peak_frequency_hz", "ZOOM_SWEEPS"]

log = logging.getLogger("bench.steps.final")

#: Which limit line a detector reading is compared with.
LIMIT_DETECTOR = {"peak": "peak", "quasi-peak": "quasi-peak", "cispr-average": "average",
                  "average": "average", "rms": "average"}


#: Most search positions either side of a suspect: a typo ("1e300 deg") must not plan millions.
MAX_SEARCH_OFFSETS = 1000


def _search_size_problem(half_width: float, step: float, show) -> list:
    if half_width / step > MAX_SEARCH_OFFSETS:
        return [(("step",), f"expected at most {MAX_SEARCH_OFFSETS} positions either side, found "
                            f"{show(half_width)} by {show(step)} (is the unit right?)")]
    return []


def _offsets(half_width: float, step: float) -> tuple[float, ...]:
    count = int(math.floor(half_width / step + 1e-9))
    return tuple(float(k * step) for k in range(-count, count + 1))


class _Search(StrictModel):
    """A search around a suspect: +- a half width by a step, both ends and the centre kept."""

    def _span(self) -> tuple[float, float, str]:
        raise NotImplementedError

    @pydantic.model_validator(mode="after")
    def _bounded(self) -> "_Search":
        half, step, unit = self._span()
        problems = _search_size_problem(half, step, lambda v: f"{v:g} {unit}")
        if problems:
            raise cross_check_error(problems)
        return self

    def offsets(self) -> tuple[float, ...]:
        """Offsets from the centre (deg or m), symmetric, including 0."""
        half, step, _ = self._span()
        return _offsets(half, step)


class AngleSearch(_Search):
    """Search around a suspect's azimuth: +- ``half_width_deg`` by ``step_deg``."""

    half_width_deg: NonNegativeAngle = Field(alias="half_width")
    step_deg: PositiveAngle = Field(alias="step")

    def _span(self) -> tuple[float, float, str]:
        return self.half_width_deg, self.step_deg, "deg"


class HeightSearch(_Search):
    """Search around a suspect's antenna height: +- ``half_width_m`` by ``step_m``."""

    half_width_m: NonNegativeLength = Field(alias="half_width")
    step_m: PositiveLength = Field(alias="step")

    def _span(self) -> tuple[float, float, str]:
        return self.half_width_m, self.step_m, "m"


class FinalStep(StrictModel):
    """Remeasure the suspects of a prescan with the given detectors (dwell in s)."""

    kind: Literal["final"]
    label: Label
    of: StrictStr
    detectors: Annotated[tuple[Detector, ...], Field(min_length=1)]
    dwell_s: PositiveTime = Field(1.0, alias="dwell")
    span_hz: Frequency = Field(1e6, alias="span")
    azimuth_search: Optional[AngleSearch] = None
    height_search: Optional[HeightSearch] = None




# --------------------------------------------------------------------------- the kind


class FinalKind(StepKind):
    """One dynamic action: the prescan decides how many suspects are remeasured."""

    name = "final"
    model = FinalStep
    references = (("of", "prescan"),)
    shows_all_results = True

    def sweep_name(self, sequence, step: FinalStep) -> str:
        return sequence.step(step.of).sweep

    def own_sweep(self, step: FinalStep) -> None:
        return None

    def limit_name(self, sequence, step: FinalStep) -> str:
        return sequence.step(step.of).limit

    def plan(self, state: PlanState, sequence, index: int, step: FinalStep) -> str:
        sweep = sequence.sweep_of(step)
        analyzer = state.caps.analyzer
        reading_s = sweep_time_s(max(step.span_hz, sweep.rbw_hz), sweep.rbw_hz, sweep.vbw_hz,
                                 analyzer) + analyzer.command_overhead_s
        searches, motion_s = _search_cost(state.caps, step)
        detectors_s = len(step.detectors) * (step.dwell_s + analyzer.command_overhead_s)
        per_suspect_s = searches * reading_s + motion_s + detectors_s
        state.add(index, step, (), None, ASSUMED_SUSPECTS * motion_s,
                  est_time_s=ASSUMED_SUSPECTS * per_suspect_s, dynamic=True)
        return (f"dynamic: assumed {ASSUMED_SUSPECTS} suspects x {len(step.detectors)} detectors "
                f"({', '.join(step.detectors)}), {searches} search readings each; the prescan "
                f"decides the real number")

    def summarize(self, index: int, step: FinalStep, actions, sequence, note: str) -> StepSummary:
        est = sum(a.est_time_s for a in actions)
        traces = ASSUMED_SUSPECTS * len(step.detectors)
        return StepSummary(index, step.label, step.kind, len(actions), 0, 0, 0, est, traces,
                           traces * (BYTES_PER_POINT + TRACE_OVERHEAD_BYTES), True, note)

    def manifest_entry(self, sequence, step: FinalStep) -> dict:
        return {"of": step.of, "sweep": sequence.step(step.of).sweep}

    def preflight(self, check, index: int, step: FinalStep) -> None:
        """The narrow span and the dwell must be settings the analyzer can do."""
        profile = check.profiles["analyzer"]
        sweep = check.sequence.sweep_of(step)
        half = max(step.span_hz, 10.0 * sweep.rbw_hz) / 2.0
        if sweep.start_hz - half < profile.freq_min_hz or sweep.stop_hz + half > profile.freq_max_hz:
            raise _at(PlanError(f"{where(index, step)}: span {step.span_hz / 1e6:g} MHz around the suspects "
                                f"goes outside the analyzer's {profile.freq_min_hz / 1e3:g} kHz-"
                                f"{profile.freq_max_hz / 1e9:g} GHz"), "span")
        if not profile.min_sweep_time_s <= step.dwell_s <= profile.max_sweep_time_s:
            raise _at(PlanError(f"{where(index, step)}: dwell {step.dwell_s:g} s outside the analyzer's "
                                f"sweep times {profile.min_sweep_time_s:g}-{profile.max_sweep_time_s:g} s"),
                      "dwell")

    def instruments(self, step: FinalStep) -> set[str]:
        return {"mast", "turntable"}

    def report_section(self, writer) -> None:
        _report_section(writer)

    def rejudge(self, run, info: dict, sequence, rows) -> list[dict]:
        """The stored readings compared with the new limit's line of their detector."""
        from bench.steps.prescan import stored_context

        prescan = sequence.step(info["of"])
        ctx = stored_context(run, info)
        of = next((s for s in run.manifest().get("steps", []) if s.get("label") == info["of"]), {})
        margin = float(of.get("margin_db", prescan.margin_db))
        out = []
        for r in rows.itertuples():
            raw = float(r.level) if ctx.chain is None else float(
                r.level - (ctx.chain.correct(np.array([r.freq_hz]), np.array([0.0]))[0]))
            pose = (optional_float(r.height_m), r.polarization if isinstance(r.polarization, str) else None,
                    optional_float(r.azimuth_deg))
            out.append(_final_row(sequence.step(info["label"]), ctx, float(r.freq_hz), r.detector, raw, pose,
                                  margin))
        return out

    def run_dynamic(self, ctx, step: FinalStep, measurer) -> list[dict]:
        from bench.steps.prescan import far_context

        prescan = ctx.sequence.step(step.of)
        bench = ctx.bench
        mast = bench.mast.height_limits_m if bench.mast is not None else (1.0, 4.0)
        table = bench.turntable.azimuth_limits_deg if bench.turntable is not None else (0.0, 360.0)
        return run_finals(ctx.store, measurer, step, prescan, ctx.sequence.sweep_of(step),
                          far_context(ctx, prescan), mast, table)


def _at(exc: PlanError, key: str) -> PlanError:
    """Name the step key an error is about (the CLI turns it into a line number)."""
    exc.step_key = key
    return exc


def _search_cost(caps, step: FinalStep) -> tuple[int, float]:
    """Search readings per suspect and the motion they take (out, across, back: 4 half widths)."""
    searches, motion_s = 0, 0.0
    if step.azimuth_search is not None and caps.turntable is not None:
        searches += len(step.azimuth_search.offsets())
        motion_s += 4 * step.azimuth_search.half_width_deg / caps.turntable.speed_deg_per_s
    if step.height_search is not None and caps.mast is not None:
        searches += len(step.height_search.offsets())
        motion_s += 4 * step.height_search.half_width_m / caps.mast.speed_m_per_s
    return searches, motion_s


# --------------------------------------------------------------------------- measuring



#: Sweeps of the zoom around a suspect, sharing its dwell: max-hold of many short sweeps catches
#: an intermittent emission at more trace points than one slow sweep (each sweep draws anew
#: whether a point falls inside a burst; common practice for bursty signals).
ZOOM_SWEEPS = 20


def _zoom_segment(freq_hz: float, span_hz: float, rbw_hz: float, points: int, dwell_s: float) -> Segment:
    """The zoom around a suspect: max-hold of :data:`ZOOM_SWEEPS` sweeps sharing ``dwell_s``.

    The span is at least 10 RBW so the whole filter response and some floor are seen.
    """
    span = max(span_hz, 10.0 * rbw_hz)
    sweep_s = dwell_s / ZOOM_SWEEPS
    return Segment(start_hz=freq_hz - span / 2, stop_hz=freq_hz + span / 2, points=points, rbw_hz=rbw_hz,
                   vbw_hz=3.0 * rbw_hz, detector="peak", ref_level_dbm=None, attenuation_db=None,
                   trace_mode="max-hold", count=ZOOM_SWEEPS, est_sweep_time_s=dwell_s, sweep_time_s=sweep_s)


def peak_frequency_hz(freq_hz, level_db, near_hz: float, rbw_hz: float) -> float:
    """Frequency of the strongest point within +-RBW of ``near_hz``, refined by a parabola.

    A Gaussian RBW filter's response in dB is a parabola in frequency (its power response is
    exp(-a f^2)), so the vertex of the parabola through the maximum and its two neighbours is
    the line's frequency, to a fraction of the trace step; the offset is kept within half a step
    (derived in docs/physics.md).
    """
    f = np.asarray(freq_hz, float)
    v = np.asarray(level_db, float)
    near = np.flatnonzero(np.abs(f - near_hz) <= rbw_hz)
    if near.size == 0:
        return float(near_hz)
    i = int(near[np.argmax(v[near])])
    if i == 0 or i == f.size - 1:
        return float(f[i])
    left, mid, right = v[i - 1], v[i], v[i + 1]
    curvature = left - 2.0 * mid + right
    offset = 0.0 if curvature >= 0 else float(np.clip(0.5 * (left - right) / curvature, -0.5, 0.5))
    return float(f[i] + offset * (f[i + 1] - f[i - 1]) / 2.0)


def _zero_span_segment(freq_hz: float, rbw_hz: float, detector: str, points: int, dwell_s: float) -> Segment:
    """Zero span at one frequency for ``dwell_s``: the detector reading is the trace maximum.

    A dwell of 1 s lets the quasi-peak detector weight pulses down to about 5 Hz, and a peak
    reading must dwell at least one period of the slowest repetition (CISPR 16-2-3 measurement
    time; common practice).
    """
    return Segment(start_hz=freq_hz, stop_hz=freq_hz, points=points, rbw_hz=rbw_hz, vbw_hz=3.0 * rbw_hz,
                   detector=detector, ref_level_dbm=None, attenuation_db=None, trace_mode="clear-write",
                   count=1, est_sweep_time_s=dwell_s, sweep_time_s=dwell_s)


def _near(measurer, seg: Segment, freq_hz: float, rbw_hz: float):
    f, v = measurer.measure(seg)
    return f, v, np.abs(f - freq_hz) <= rbw_hz


def _locate(measurer, seg: Segment, freq_hz: float, rbw_hz: float) -> float:
    """The suspect's frequency from its zoom trace (stored with the action, shown in the report)."""
    f, v = measurer.measure(seg)
    return peak_frequency_hz(f, v, freq_hz, rbw_hz)


def _read_at(measurer, seg: Segment, freq_hz: float, rbw_hz: float) -> float:
    """Measure a narrow span and return the highest raw dBuV within +-RBW of ``freq_hz``."""
    f, v, near = _near(measurer, seg, freq_hz, rbw_hz)
    return float(np.max(v[near] if near.any() else v))


def run_finals(store, measurer, step: FinalStep, prescan_step, sweep, ctx, mast_limits_m,
               turntable_limits_deg, *, points: int = 101) -> list[dict]:
    """Remeasure every non-ambient suspect of ``prescan_step``; returns the result rows."""
    suspects = store.results(prescan_step.label)
    suspects = suspects[suspects["status"].isin(["fail", "marginal"])]
    rows = []
    for _, s in suspects.iterrows():
        pose = (optional_float(s["height_m"]), s["polarization"] if isinstance(s["polarization"], str) else None,
                optional_float(s["azimuth_deg"]))
        rows += _final_rows(measurer, step, sweep, ctx, float(s["freq_hz"]), pose,
                            (mast_limits_m, turntable_limits_deg), points, prescan_step.margin_db)
    return rows


def _final_rows(measurer, step: FinalStep, sweep, ctx, f0: float, pose, limits, points: int,
                margin_db: float) -> list[dict]:
    """Re-centre, search, then read every detector at the best pose."""
    height, pol, azimuth = pose
    peak_seg = _zoom_segment(f0, step.span_hz, sweep.rbw_hz, points, step.dwell_s)
    measurer.move_to(FarFieldPose(height, pol, azimuth))
    f_exact = _locate(measurer, peak_seg, f0, sweep.rbw_hz)
    # search in zero span with the dwell: a swept peak detector can miss a bursty signal
    search_seg = _zero_span_segment(f_exact, sweep.rbw_hz, "peak", points, step.dwell_s)
    best = _search(measurer, search_seg, f_exact, sweep.rbw_hz, pose, step, *limits)
    measurer.move_to(FarFieldPose(*best))
    # the peak reading at the final pose first: peak >= quasi-peak >= average on one signal
    detectors = ("peak",) + tuple(d for d in step.detectors if d != "peak")
    rows = []
    for det in detectors:
        seg = _zero_span_segment(f_exact, sweep.rbw_hz, det, points, step.dwell_s)
        raw = _read_at(measurer, seg, f_exact, sweep.rbw_hz)
        rows.append(_final_row(step, ctx, f_exact, det, raw, best, margin_db))
    return rows


def _final_row(step: FinalStep, ctx, f0: float, det: str, raw_dbuv: float, pose, margin_db: float) -> dict:
    """One final reading compared with the limit line of its detector.

    ``marginal``: it passes by less than ``margin_db`` (the prescan's margin).
    """
    level = float(ctx.correct(np.array([f0]), np.array([raw_dbuv]))[0])
    lim_det = LIMIT_DETECTOR.get(det, "peak")
    limit = float(ctx.limit.level(lim_det, np.array([f0]))[0])
    if np.isfinite(limit):
        margin = limit - level
        status = "fail" if margin < 0 else "marginal" if margin < margin_db else "pass"
        note = ""
    else:
        # e.g. CISPR 32 has no average (or peak) line below 1 GHz: the reading is information
        margin, status = None, "info"
        note = f"no {lim_det} limit line at this frequency in {ctx.limit.name}"
    log.info("final %s: %.3f MHz %s %.1f %s (limit %s)", step.label, f0 / 1e6, det, level,
             ctx.limit.quantity, f"{limit:.1f}" if np.isfinite(limit) else "none")
    return dict(step_label=step.label, freq_hz=f0, level=level, unit=ctx.limit.quantity, detector=det,
                limit_level=limit if np.isfinite(limit) else None, margin_db=margin, status=status,
                polarization=pose[1], height_m=pose[0], azimuth_deg=pose[2], chain=ctx.chain_text, note=note)


def _search(measurer, seg, f0, rbw_hz, pose, step: FinalStep, mast_limits_m, turntable_limits_deg):
    """Azimuth search, then height search, around the prescan maximum (peak detector)."""
    height, pol, azimuth = pose
    best_h, best_az = height, azimuth
    if step.azimuth_search is not None and azimuth is not None:
        lo, hi = turntable_limits_deg
        candidates = sorted({min(max(azimuth + d, lo), hi) for d in step.azimuth_search.offsets()})
        best_az = _best_of(measurer, seg, f0, rbw_hz,
                           [FarFieldPose(height, pol, az) for az in candidates], lambda p: p.azimuth_deg)
    if step.height_search is not None and height is not None:
        lo, hi = mast_limits_m
        candidates = sorted({min(max(height + d, lo), hi) for d in step.height_search.offsets()})
        best_h = _best_of(measurer, seg, f0, rbw_hz,
                          [FarFieldPose(h, pol, best_az) for h in candidates], lambda p: p.height_m)
    return best_h, pol, best_az


def _best_of(measurer, seg, f0, rbw_hz, poses, key):
    best, best_level = key(poses[0]), -np.inf
    for pose in poses:
        measurer.move_to(pose)
        level = _read_at(measurer, seg, f0, rbw_hz)
        if level > best_level:
            best, best_level = key(pose), level
    return best


# --------------------------------------------------------------------------- report


#: Zoom pictures drawn per final step (the worst suspects first); the table lists the rest.
MAX_ZOOM_PICTURES = 12


def _report_section(writer) -> None:
    """One picture per suspect: its zoom trace, its readings and the limit; then the readings."""
    from bench.analysis import runview

    results = writer.results()
    if results.empty:
        return
    chain = writer.attempt("transducer chain", lambda: runview.step_chain(writer.run, writer.label))
    limit = writer.attempt("limit", lambda: runview.step_limit(writer.run, writer.label))
    zooms = _zoom_traces(writer.run, writer.label)
    decided = results.dropna(subset=["margin_db"]).sort_values("margin_db", kind="stable")
    order = list(dict.fromkeys(decided["freq_hz"])) + [f for f in dict.fromkeys(results["freq_hz"])
                                                        if f not in set(decided["freq_hz"])]
    for rank, freq in enumerate(order[:MAX_ZOOM_PICTURES], start=1):
        trace = next(((f, v) for f, v in zooms if f[0] <= freq <= f[-1]), None)
        if trace is not None:
            _zoom_picture(writer, rank, freq, trace, chain, limit, results[results["freq_hz"] == freq])
    if len(order) > MAX_ZOOM_PICTURES:
        writer.parts.append(f"<p>{len(order) - MAX_ZOOM_PICTURES} more suspects are in the table below.</p>")
    unit = str(results["unit"].iloc[0])
    writer.results_table(results, unit)


def _zoom_traces(run, label: str) -> list:
    """The narrow-span traces of a final step (one per suspect, in measuring order)."""
    meta = run.traces(label)
    zoom = meta[meta["stop_hz"] > meta["start_hz"]]
    return [run.trace(int(tid)) for tid in zoom["id"]]


def _zoom_picture(writer, rank: int, freq: float, trace, chain, limit, rows) -> None:
    from bench import plots
    from bench.htmlkit import embed_png

    f, raw = trace
    level = raw if chain is None else chain.correct(f, raw)
    worst = rows.dropna(subset=["margin_db"]).sort_values("margin_db").head(1)
    said = (f", worst margin {float(worst['margin_db'].iloc[0]):+.1f} dB ({worst['detector'].iloc[0]})"
            if len(worst) else "")
    marks = rows[["freq_hz", "level", "status", "margin_db"]].assign(status=rows["detector"] + ": " + rows["status"])
    path = plots.spectrum_png(writer.png(f"zoom-{rank}"), f, level, unit=str(rows["unit"].iloc[0]),
                              title=f"{writer.label}: {freq / 1e6:.3f} MHz{said}", limits=limit,
                              suspects=marks, log_freq=False, label_worst=1)
    writer.parts.append(embed_png(path, f"zoom on {freq / 1e6:.3f} MHz"))
