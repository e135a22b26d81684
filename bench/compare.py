"""Before/after comparison of two runs: did the fix help, where and by how much.

For every step label present in both runs: the corrected spectra overlaid with their
difference (after minus before, dB: negative is an improvement), the suspects matched by
frequency with their change in level and margin, and for grid steps the change of the combined
near-field map and both hot-spot tables. Output: ``compare.html`` (self-contained, like the
report) and PNGs, by default in ``<after run>/compare-<before run folder name>/``.

Each step is summarised once, in a :class:`bench.analysis.changes.StepChange`: the line the
terminal prints, the line at the top of the page and the figures of the step's section are all
rendered from it (:class:`Comparison` carries them to the caller).
"""

from __future__ import annotations

import shutil

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from bench import plots
from bench.analysis.changes import ChangeExtremes, KindComparison, StepChange
from bench.analysis.maps import MapChange, compare_maps
from bench.analysis import runview
from bench.analysis.peaks import find_peaks_hz
from bench.units import format_hz
from bench.errors import AnalysisError, BenchError
from bench.htmlkit import DISCLAIMER, embed_png, esc, html_table, mhz, page, safe_name
from bench.steps import KINDS
from bench.store import open_run

__all__ = ["MATCH_COLUMNS", "Comparison", "MapChange", "StepChange", "compare_maps", "compare_runs",
           "compare_spectra", "match_suspects", "match_tolerance_hz"]

#: Columns of the table returned by :func:`match_suspects`.
MATCH_COLUMNS = ("change", "detector", "freq_before_hz", "freq_after_hz", "level_before",
                 "level_after", "delta_db", "margin_before_db", "margin_after_db",
                 "delta_margin_db", "status_before", "status_after")
# Relative part of the matching tolerance: 0.1 % of the frequency (a drifting clock stays
# matched; common practice).
_MATCH_REL = 1e-3
# Peaks used for the summary: prominent enough to be an emission, not a noise wiggle.
_SUMMARY_PROMINENCE_DB = 15.0  # an emission stands 15 dB clear of the local floor: peak-detected noise
#                                rarely does (Rayleigh tail), so noise spikes stay out of the summary (our choice)


def _axis(freq_hz, level, name: str) -> tuple[np.ndarray, np.ndarray]:
    f = np.asarray(freq_hz, float)
    v = np.asarray(level, float)
    if f.ndim != 1 or f.shape != v.shape or f.size < 2:
        raise AnalysisError(f"{name}: expected 1-D frequency and level arrays of equal length "
                            f"(>= 2 points), found {f.shape} and {v.shape}")
    if not np.all(np.diff(f) > 0) or f[0] <= 0:
        raise AnalysisError(f"{name}: expected strictly increasing frequencies > 0 Hz")
    return f, v


def compare_spectra(f1, l1, f2, l2) -> tuple[np.ndarray, np.ndarray]:
    """Level difference after minus before on common frequency bins.

    Parameters
    ----------
    f1, l1 : array_like
        Before: frequencies in Hz (strictly increasing) and levels in dB.
    f2, l2 : array_like
        After, same unit.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Frequencies in Hz and ``l2 - l1`` in dB. On identical axes, bin by bin. Otherwise the
        bins of whichever spectrum has fewer points inside the overlap (no resolution is
        invented), the other spectrum interpolated linearly in dB against log10(f).

    Raises
    ------
    AnalysisError
        The two spans do not overlap.
    """
    f1, l1 = _axis(f1, l1, "before")
    f2, l2 = _axis(f2, l2, "after")
    if f1.shape == f2.shape and np.allclose(f1, f2, rtol=1e-12, atol=0.0):
        return f1.copy(), l2 - l1
    lo, hi = max(f1[0], f2[0]), min(f1[-1], f2[-1])
    if lo >= hi:
        raise AnalysisError(f"spans do not overlap: before {format_hz(f1[0])} to {format_hz(f1[-1])}, "
                            f"after {format_hz(f2[0])} to {format_hz(f2[-1])}")
    in1 = (f1 >= lo) & (f1 <= hi)
    in2 = (f2 >= lo) & (f2 <= hi)
    if in1.sum() <= in2.sum():
        f = f1[in1]
        return f, _interp_log_f(f, f2, l2) - l1[in1]
    f = f2[in2]
    return f, l2[in2] - _interp_log_f(f, f1, l1)


def _interp_log_f(f_new, f, level) -> np.ndarray:
    # dB linear in log10(f), NaN outside (pitfalls: np.interp clamps silently)
    return np.interp(np.log10(f_new), np.log10(f), level, left=np.nan, right=np.nan)


def match_tolerance_hz(freq_hz, rbw_hz: float) -> np.ndarray:
    """Matching tolerance max(RBW, 0.1 % of f) in Hz, at each frequency."""
    return np.maximum(float(rbw_hz), _MATCH_REL * np.asarray(freq_hz, float))


def _pairs(fb: np.ndarray, fa: np.ndarray, rbw_hz: float) -> list[tuple[int, int]]:
    """One-to-one pairs (before, after) within tolerance, closest first."""
    candidates = []
    for i, f in enumerate(fb):
        tol = float(match_tolerance_hz(f, rbw_hz))
        for j in np.flatnonzero(np.abs(fa - f) <= tol):
            candidates.append((abs(fa[j] - f), i, int(j)))
    used_b, used_a, pairs = set(), set(), []
    for _, i, j in sorted(candidates):
        if i not in used_b and j not in used_a:
            used_b.add(i)
            used_a.add(j)
            pairs.append((i, j))
    return pairs


def _row(change, det, b=None, a=None) -> dict:
    def get(r, key):
        return np.nan if r is None or r.get(key) is None else r.get(key)

    row = {"change": change, "detector": det,
           "freq_before_hz": get(b, "freq_hz"), "freq_after_hz": get(a, "freq_hz"),
           "level_before": get(b, "level"), "level_after": get(a, "level"),
           "margin_before_db": get(b, "margin_db"), "margin_after_db": get(a, "margin_db"),
           "status_before": None if b is None else b.get("status"),
           "status_after": None if a is None else a.get("status")}
    row["delta_db"] = row["level_after"] - row["level_before"]
    row["delta_margin_db"] = row["margin_after_db"] - row["margin_before_db"]
    return row


def match_suspects(before: pd.DataFrame, after: pd.DataFrame, rbw_hz: float) -> pd.DataFrame:
    """Match result rows of two runs by detector and frequency.

    Parameters
    ----------
    before, after : pandas.DataFrame
        Result rows (``freq_hz``, ``level``, ``detector``, ``margin_db``, ``status``).
    rbw_hz : float
        Resolution bandwidth in Hz; two rows match within max(RBW, 0.1 % of f), closest pairs
        first, each row used once.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`MATCH_COLUMNS`; ``change`` is ``"matched"``, ``"new"`` (only after) or
        ``"vanished"`` (only before); ``delta_db`` = level after - level before and
        ``delta_margin_db`` = margin after - margin before (positive: more margin). Sorted by
        frequency.
    """
    rows = []
    detectors = sorted(set(before.get("detector", [])) | set(after.get("detector", [])))
    for det in detectors:
        b = before[before["detector"] == det].reset_index(drop=True)
        a = after[after["detector"] == det].reset_index(drop=True)
        pairs = _pairs(b["freq_hz"].to_numpy(float), a["freq_hz"].to_numpy(float), rbw_hz)
        rows += [_row("matched", det, b.iloc[i].to_dict(), a.iloc[j].to_dict()) for i, j in pairs]
        rows += [_row("vanished", det, b=b.iloc[i].to_dict())
                 for i in sorted(set(range(len(b))) - {i for i, _ in pairs})]
        rows += [_row("new", det, a=a.iloc[j].to_dict())
                 for j in sorted(set(range(len(a))) - {j for _, j in pairs})]
    table = pd.DataFrame(rows, columns=list(MATCH_COLUMNS))
    order = table["freq_before_hz"].fillna(table["freq_after_hz"])
    return table.iloc[np.argsort(order.to_numpy(float), kind="stable")].reset_index(drop=True)


# ----------------------------------------------------------------------------- run comparison


@dataclass(frozen=True)
class Comparison:
    """What a comparison produced: the page and the per-step summaries at its top.

    Attributes
    ----------
    path : pathlib.Path
        ``compare.html``.
    steps : tuple of StepChange
        One per compared step, in page order.
    """

    path: Path
    steps: tuple[StepChange, ...]

    def lines(self) -> list[str]:
        """The summary lines, exactly as written at the top of the page."""
        return [step.line() for step in self.steps]


def _check_units(label: str, before, after) -> None:
    if before.unit != after.unit:
        raise AnalysisError(f"step {label!r}: cannot compare {before.unit} (before) with "
                            f"{after.unit} (after)")


def _peak_deltas(before, after, f, delta, rbw_hz: float) -> pd.DataFrame:
    """Change of each emission (a peak of either spectrum standing clear of the floor), for the summary.

    The change is the strongest reading within +-RBW after, minus the same before: comparing
    single bins would compare noise with noise beside a line that moved by a fraction of a bin.
    A line that vanished into the floor shows an improvement down to the floor (at least that much).
    """
    found = []
    for spec in (before, after):
        p = find_peaks_hz(spec.freq_hz, spec.level, prominence_db=_SUMMARY_PROMINENCE_DB,
                          min_separation_hz=rbw_hz)
        floor = _floor(spec.level)[p["index"].to_numpy(dtype=int)]
        found.append(p["freq_hz"].to_numpy()[p["level"].to_numpy() - floor >= _SUMMARY_PROMINENCE_DB])
    freqs = np.unique(np.concatenate(found))
    if freqs.size == 0 or f.size == 0:
        return pd.DataFrame({"freq_hz": [], "delta_db": []})
    rows = []
    for fc in freqs:
        b = _window_max(before, fc, rbw_hz)
        a = _window_max(after, fc, rbw_hz)
        if np.isfinite(a) and np.isfinite(b):
            rows.append((fc, a - b))
    table = pd.DataFrame(rows, columns=["freq_hz", "delta_db"])
    return table.drop_duplicates("freq_hz")


def _floor(level: np.ndarray) -> np.ndarray:
    """Local noise floor: running median over 2 % of the trace (at least 51 points)."""
    from scipy.ndimage import median_filter

    size = max(51, int(level.size * 0.02) | 1)
    filled = np.where(np.isfinite(level), level, np.nanmedian(level))
    return median_filter(filled, size=size, mode="nearest")


def _window_max(spec, freq_hz: float, half_width_hz: float) -> float:
    near = np.abs(spec.freq_hz - freq_hz) <= half_width_hz
    values = spec.level[near]
    values = values[np.isfinite(values)]
    return float(values.max()) if values.size else float("nan")


def _mhz_text(freq_hz) -> list[str]:
    return [f"{f / 1e6:.1f} MHz" for f in np.asarray(freq_hz, float)]


def _spectral_changes(matches: pd.DataFrame, peaks: pd.DataFrame) -> tuple[ChangeExtremes, ...]:
    """Extremes over the matched suspects and over the spectrum peaks (those that exist)."""
    matched = matches[matches["change"] == "matched"]
    found = (ChangeExtremes.of("matched suspects", "suspect", matched["delta_db"],
                               _mhz_text(matched["freq_after_hz"])),
             ChangeExtremes.of("spectrum peaks", "peak", peaks["delta_db"],
                               _mhz_text(peaks["freq_hz"])))
    return tuple(c for c in found if c is not None)


def _counts(matches: pd.DataFrame) -> tuple[int, int, int] | None:
    if not len(matches):
        return None
    counts = matches["change"].value_counts()
    return (int(counts.get("matched", 0)), int(counts.get("new", 0)),
            int(counts.get("vanished", 0)))


def _compare_step(run_b, run_a, label: str, out: Path) -> tuple[StepChange, list[str]]:
    """The step's summary and its section's HTML, the section's figures taken from the summary."""
    spec_b = runview.corrected_spectrum(run_b, label)
    spec_a = runview.corrected_spectrum(run_a, label)
    _check_units(label, spec_b, spec_a)
    f, delta = compare_spectra(spec_b.freq_hz, spec_b.level, spec_a.freq_hz, spec_a.level)
    rbw_hz = float(np.nanmax([runview.step_rbw_hz(run_b, label),
                              runview.step_rbw_hz(run_a, label)]))
    matches = match_suspects(run_b.results(label), run_a.results(label), rbw_hz)
    path = plots.comparison_png(out / f"{safe_name(label)}-spectra.png",
                                (spec_b.freq_hz, spec_b.level), (spec_a.freq_hz, spec_a.level),
                                (f, delta), unit=spec_a.unit, title=f"{label}: before / after",
                                limits=_quiet_limit(run_a, label))
    html = [embed_png(path, f"spectra of {label} before and after")]
    if len(matches):
        html.append("<h3>Results matched by frequency</h3>" + html_table(
            matches, _MATCH_HEADINGS, formats=_MATCH_FORMATS))
    kind = str(runview.step_info(run_a, label).get("kind", ""))
    own = KINDS[kind].compare_parts(run_b, run_a, label, out, _outline(run_a)) \
        if kind in KINDS else KindComparison()
    html += list(own.html)
    changes = _spectral_changes(matches, _peak_deltas(spec_b, spec_a, f, delta, rbw_hz))
    return StepChange(label, kind, changes + tuple(own.changes), _counts(matches)), html


def _outline(run):
    return run.manifest().get("board", {}).get("outline_m")


def _quiet_limit(run, label):
    try:
        return runview.step_limit(run, label)
    except BenchError:
        return None


_MATCH_HEADINGS = (("change", "change"), ("detector", "detector"),
                   ("freq_before_hz", "before (MHz)"), ("freq_after_hz", "after (MHz)"),
                   ("level_before", "level before"), ("level_after", "level after"),
                   ("delta_db", "change (dB)"), ("margin_before_db", "margin before (dB)"),
                   ("margin_after_db", "margin after (dB)"),
                   ("delta_margin_db", "margin change (dB)"), ("status_before", "status before"),
                   ("status_after", "status after"))
_MATCH_FORMATS = {"freq_before_hz": mhz, "freq_after_hz": mhz,
                  "level_before": ".2f", "level_after": ".2f", "delta_db": "+.2f",
                  "margin_before_db": ".2f", "margin_after_db": ".2f", "delta_margin_db": "+.2f"}


def _common_labels(run_b, run_a) -> list[str]:
    before = set(runview.step_labels(run_b))
    return [lb for lb in runview.step_labels(run_a) if lb in before
            and not run_b.traces(lb).empty and not run_a.traces(lb).empty]


def compare_runs(before_folder, after_folder, *, out=None) -> Comparison:
    """Compare two runs step by step and write ``compare.html`` with its PNGs.

    Parameters
    ----------
    before_folder, after_folder : str or pathlib.Path
        Run folders (before and after the change).
    out : str or pathlib.Path, optional
        Output folder; default ``<after>/compare-<before folder name>/``.

    Returns
    -------
    Comparison
        The HTML file (``path``) and the per-step summaries at its top (``steps``; their
        :meth:`Comparison.lines` are what ``bench compare`` prints).

    Raises
    ------
    AnalysisError
        No step label with data in both runs, a step in different units, or spans that do not
        overlap.
    """
    run_b, run_a = open_run(before_folder), open_run(after_folder)
    try:
        return _compare_open_runs(run_b, run_a, out)
    finally:
        run_b.close()
        run_a.close()


def _compare_open_runs(run_b, run_a, out) -> Comparison:
    out = Path(out) if out is not None else \
        Path(run_a.folder) / f"compare-{Path(run_b.folder).name}"
    labels = _common_labels(run_b, run_a)
    if not labels:
        raise AnalysisError(f"no step label has data in both {run_b.folder} and {run_a.folder}")
    created = not out.exists()
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise AnalysisError(f"{out}: cannot create the comparison folder: {exc.strerror or exc}") from None
    try:
        return _write_comparison(run_b, run_a, labels, out)
    except BaseException:
        if created:  # nothing half-written: a refused comparison leaves no folder behind
            shutil.rmtree(out, ignore_errors=True)
        raise


def _write_comparison(run_b, run_a, labels, out: Path) -> Comparison:
    steps, sections = [], []
    for label in labels:
        step, html = _compare_step(run_b, run_a, label, out)
        steps.append(step)
        sections.append(f"<h2>Step {esc(label)} ({esc(step.kind)})</h2>" + "".join(html))
    result = Comparison(out / "compare.html", tuple(steps))
    result.path.write_text(_page(run_b, run_a, result.lines(), sections), encoding="utf-8")
    (out / "summary.txt").write_text("\n".join(result.lines()) + "\n", encoding="utf-8")
    return result


def _page(run_b, run_a, summary: list[str], sections: list[str]) -> str:
    mb, ma = run_b.manifest(), run_a.manifest()
    ident = "".join(f"<tr><th>{esc(k)}</th><td>{esc(m.get('name'))}</td><td>{esc(m.get('created'))}"
                    f"</td><td>{esc(Path(r.folder).name)}</td></tr>"
                    for k, m, r in (("before", mb, run_b), ("after", ma, run_a)))
    items = "".join(f"<li>{esc(line)}</li>" for line in summary)
    body = (f"<h1>Before / after: {esc(ma.get('name', ''))}</h1>"
            f'<div class="notice">{esc(DISCLAIMER)}</div>'
            f"<table><tr><th></th><th>sequence</th><th>created</th><th>run folder</th></tr>"
            f"{ident}</table><h2>Summary</h2><p>Changes are after minus before: negative is "
            f'lower emission.</p><ul class="summary">{items}</ul>' + "".join(sections))
    return page("Before / after comparison", body)
