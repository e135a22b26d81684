"""Far-field pre-scan analysis and the final measurement of suspects.

After a prescan step: join its traces (maximum over heights x polarizations x azimuths), correct
them through the antenna chain to dBuV/m, search peaks (prominence above the local floor,
minimum separation in Hz), keep the suspects (over the limit or within the margin, against the
lowest limit of any detector: a peak reading below it meets every line, since
peak >= quasi-peak >= average, reference sheet §1.6), mark those the ambient capture also shows,
and note for each suspect the pose where it was strongest.

A final step then takes each suspect that is not ambient, searches azimuth and height around its
prescan maximum with the peak detector in a narrow span, and reads it with the detectors the
standard asks for (quasi-peak, CISPR average) with the dwell of the sequence, comparing each
reading with the matching limit line.

A pre-scan is an estimate, not a compliance verdict.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
import pandas as pd

from bench.analysis.limits import LimitSet, load_limit, near_field_warnings
from bench.analysis.peaks import find_peaks_hz, flag_ambient, select_suspects
from bench.analysis.transducers import TransducerChain
from bench.planner import FarFieldPose, Segment

__all__ = ["LIMIT_DETECTOR", "analyze_prescan", "run_finals", "FarFieldContext"]

log = logging.getLogger("bench.farfield")

#: Which limit line a detector reading is compared with.
LIMIT_DETECTOR = {"peak": "peak", "quasi-peak": "quasi-peak", "cispr-average": "average",
                  "average": "average", "rms": "average"}

#: Level tolerance for calling a suspect ambient: the ambient capture shows a peak no more than
#: this far below it (common practice: a few dB, the repeatability of a swept pre-scan).
AMBIENT_LEVEL_TOL_DB = 6.0


@dataclass(frozen=True)
class FarFieldContext:
    """What the analysis needs besides the store: the chain, the limit at the site distance."""

    chain: TransducerChain | None
    limit: LimitSet
    distance_m: float
    eut_size_m: float | None = None

    def correct(self, freq_hz, level_dbuv):
        return level_dbuv if self.chain is None else self.chain.correct(freq_hz, level_dbuv)

    @property
    def chain_text(self) -> str:
        return "none (raw dBuV)" if self.chain is None else self.chain.describe()


def limit_for_site(limit_name: str, distance_m: float) -> tuple[LimitSet, list[str]]:
    """Load a limit and move it to the site distance at 20 dB/decade (reference sheet §3.1)."""
    limit = load_limit(limit_name)
    notes = []
    if limit.distance_m is not None and abs(limit.distance_m - distance_m) > 1e-9:
        notes.append(f"limit {limit.name} is specified at {limit.distance_m:g} m; converted to the "
                     f"site distance {distance_m:g} m at 20 dB/decade (far-field assumption)")
        limit = limit.at_distance(distance_m)
    return limit, notes


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
    return {"polarization": best["polarization"], "height_m": _num(best["height_m"]),
            "azimuth_deg": _num(best["azimuth_deg"])}


def _num(value):
    return None if value is None or (isinstance(value, float) and np.isnan(value)) else float(value)


def analyze_prescan(store, step, ctx: FarFieldContext, *, max_pass_rows: int = 10) -> pd.DataFrame:
    """Find suspects in a finished prescan step and store them as results.

    Returns the suspects table (also written to the store's ``results`` for the step).
    """
    freq, raw = store.step_spectrum(step.label, reduce="max")
    level = ctx.correct(freq, raw)
    peaks = find_peaks_hz(freq, level, prominence_db=step.prominence_db,
                          min_separation_hz=step.min_separation_hz)
    screening = ctx.limit.screening_level
    suspects = select_suspects(peaks, screening, step.margin_db)
    if step.ambient:
        a_freq, a_raw = store.step_spectrum(step.ambient, reduce="max")
        suspects = flag_ambient(suspects, a_freq, ctx.correct(a_freq, a_raw), step.ambient_tolerance_hz,
                                AMBIENT_LEVEL_TOL_DB)
    else:
        suspects["ambient"] = False
    suspects.loc[suspects["ambient"].astype(bool), "status"] = "ambient"
    # the strongest peaks that passed with margin are kept too, for the report
    limit_at_peaks = screening(peaks["freq_hz"].to_numpy()) if len(peaks) else np.array([])
    passed = peaks.assign(limit=limit_at_peaks, margin_db=limit_at_peaks - peaks["level"].to_numpy())
    passed = passed[np.isfinite(passed["limit"]) & (passed["margin_db"] > step.margin_db)]
    passed = passed.sort_values("margin_db").head(max_pass_rows).assign(status="pass")
    rows = []
    for _, r in pd.concat([suspects, passed], ignore_index=True).iterrows():
        pose = _pose_of_max(store, step.label, float(r["freq_hz"]))
        note = ""
        if r["status"] == "ambient":
            note = f"ambient capture shows {r['ambient_level']:.1f} at {r['ambient_freq_hz'] / 1e6:.3f} MHz"
        rows.append(dict(step_label=step.label, freq_hz=float(r["freq_hz"]), level=float(r["level"]),
                         unit=ctx.limit.quantity, detector="peak", limit_level=float(r["limit"]),
                         margin_db=float(r["margin_db"]), status=str(r["status"]), chain=ctx.chain_text,
                         note=note, **pose))
    store.clear_results(step.label)
    store.add_results(rows)
    for w in near_field_warnings(ctx.distance_m, freq, ctx.eut_size_m):
        store.log_event("warning", w)
    return pd.DataFrame(rows)


def _narrow_segment(freq_hz: float, span_hz: float, rbw_hz: float, detector: str, points: int,
                    sweep_time_s: float) -> Segment:
    """A narrow span around a suspect to find its exact frequency.

    The sweep is slowed to ``sweep_time_s`` so that every trace point dwells long enough to
    catch an intermittent (burst) signal; a fast sweep would see a burst only by chance.
    """
    span = max(span_hz, 10.0 * rbw_hz)
    return Segment(start_hz=freq_hz - span / 2, stop_hz=freq_hz + span / 2, points=points, rbw_hz=rbw_hz,
                   vbw_hz=3.0 * rbw_hz, detector=detector, ref_level_dbm=None, attenuation_db=None,
                   trace_mode="clear-write", count=1, est_sweep_time_s=sweep_time_s, sweep_time_s=sweep_time_s)


def _zero_span_segment(freq_hz: float, rbw_hz: float, detector: str, points: int, dwell_s: float) -> Segment:
    """Zero span at one frequency for ``dwell_s``: the detector reading is the trace maximum.

    A dwell of 1 s lets the quasi-peak detector weight pulses down to about 5 Hz, and a peak
    reading must dwell at least one period of the slowest repetition (reference sheet §1.8).
    """
    return Segment(start_hz=freq_hz, stop_hz=freq_hz, points=points, rbw_hz=rbw_hz, vbw_hz=3.0 * rbw_hz,
                   detector=detector, ref_level_dbm=None, attenuation_db=None, trace_mode="clear-write",
                   count=1, est_sweep_time_s=dwell_s, sweep_time_s=dwell_s)


def _locate(executor, action, seg: Segment, freq_hz: float, rbw_hz: float) -> float:
    """Frequency of the strongest point within +-RBW of ``freq_hz`` in a narrow-span sweep."""
    tid = executor.measure_segment(action, 0, seg, completes_action=False)
    f, v = executor.store.trace(tid)
    near = np.abs(f - freq_hz) <= rbw_hz
    return float(f[near][np.argmax(v[near])]) if near.any() else freq_hz


def _read_at(executor, action, seg: Segment, freq_hz: float, rbw_hz: float) -> float:
    """Measure a narrow span and return the highest raw dBuV within +-RBW of ``freq_hz``."""
    tid = executor.measure_segment(action, 0, seg, completes_action=False)
    f, v = executor.store.trace(tid)
    near = np.abs(f - freq_hz) <= rbw_hz
    return float(np.max(v[near] if near.any() else v))


def run_finals(executor, action, step, prescan_step, sweep, ctx: FarFieldContext, mast_limits_m,
               turntable_limits_deg, *, points: int = 101) -> pd.DataFrame:
    """Remeasure every non-ambient suspect of ``prescan_step``; store and return the results."""
    store = executor.store
    suspects = store.results(prescan_step.label)
    suspects = suspects[suspects["status"].isin(["fail", "near"])]
    rows = []
    for _, s in suspects.iterrows():
        f0 = float(s["freq_hz"])
        pol = s["polarization"] if isinstance(s["polarization"], str) else None
        height = _num(s["height_m"])
        azimuth = _num(s["azimuth_deg"])
        peak_seg = _narrow_segment(f0, step.span_hz, sweep.rbw_hz, "peak", points, step.dwell_s)
        executor.set_pose(FarFieldPose(height, pol, azimuth))
        f_exact = _locate(executor, action, peak_seg, f0, sweep.rbw_hz)
        # search in zero span with the dwell: a swept peak detector can miss a bursty signal
        search_seg = _zero_span_segment(f_exact, sweep.rbw_hz, "peak", points, step.dwell_s)
        best = _search(executor, action, search_seg, f_exact, sweep.rbw_hz, pol, height, azimuth, step,
                       mast_limits_m, turntable_limits_deg)
        executor.set_pose(FarFieldPose(*best))
        # the peak reading at the final pose first: peak >= quasi-peak >= average on one signal
        detectors = ("peak",) + tuple(d for d in step.detectors if d != "peak")
        for det in detectors:
            seg = _zero_span_segment(f_exact, sweep.rbw_hz, det, points, step.dwell_s)
            raw = _read_at(executor, action, seg, f_exact, sweep.rbw_hz)
            rows.append(_final_row(step, ctx, f_exact, det, raw, best))
    store.clear_results(step.label)
    store.add_results(rows)
    return pd.DataFrame(rows)


def _final_row(step, ctx: FarFieldContext, f0: float, det: str, raw_dbuv: float, pose) -> dict:
    """One final reading compared with the limit line of its detector."""
    level = float(ctx.correct(np.array([f0]), np.array([raw_dbuv]))[0])
    lim_det = LIMIT_DETECTOR.get(det, "peak")
    limit = float(ctx.limit.level(lim_det, np.array([f0]))[0])
    if np.isfinite(limit):
        margin = limit - level
        status, note = ("pass" if margin >= 0 else "fail"), ""
    else:
        # e.g. CISPR 32 has no average (or peak) line below 1 GHz: the reading is information
        margin, status = None, "info"
        note = f"no {lim_det} limit line at this frequency in {ctx.limit.name}"
    log.info("final %s: %.3f MHz %s %.1f %s (limit %s)", step.label, f0 / 1e6, det, level,
             ctx.limit.quantity, f"{limit:.1f}" if np.isfinite(limit) else "none")
    return dict(step_label=step.label, freq_hz=f0, level=level, unit=ctx.limit.quantity, detector=det,
                limit_level=limit if np.isfinite(limit) else None, margin_db=margin, status=status,
                polarization=pose[1], height_m=pose[0], azimuth_deg=pose[2], chain=ctx.chain_text, note=note)


def _search(executor, action, seg, f0, rbw_hz, pol, height, azimuth, step, mast_limits_m, turntable_limits_deg):
    """Azimuth search, then height search, around the prescan maximum (peak detector)."""
    best_h, best_az = height, azimuth
    if step.azimuth_search is not None and azimuth is not None:
        lo, hi = turntable_limits_deg
        candidates = sorted({min(max(azimuth + d, lo), hi) for d in step.azimuth_search.offsets()})
        best_az = _best_of(executor, action, seg, f0, rbw_hz,
                           [FarFieldPose(height, pol, az) for az in candidates], lambda p: p.azimuth_deg)
    if step.height_search is not None and height is not None:
        lo, hi = mast_limits_m
        candidates = sorted({min(max(height + d, lo), hi) for d in step.height_search.offsets()})
        best_h = _best_of(executor, action, seg, f0, rbw_hz,
                          [FarFieldPose(h, pol, best_az) for h in candidates], lambda p: p.height_m)
    return best_h, pol, best_az


def _best_of(executor, action, seg, f0, rbw_hz, poses, key):
    best, best_level = key(poses[0]), -np.inf
    for pose in poses:
        executor.set_pose(pose)
        level = _read_at(executor, action, seg, f0, rbw_hz)
        if level > best_level:
            best, best_level = key(pose), level
    return best
