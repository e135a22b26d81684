"""Peak search on spectra, suspects against a limit, and ambient flagging.

Peaks are found with :func:`scipy.signal.find_peaks`, with three things scipy leaves to the
caller (pitfalls: ``find_peaks``):

* ``distance`` and ``wlen`` are in samples. ``wlen`` is converted from Hz with the median point
  spacing. The minimum separation is applied in Hz, exactly, to the peaks that passed the
  prominence test, with scipy's rule (the higher peak wins). scipy's own ``distance`` is not
  used because scipy applies it *before* the prominence test: a non-prominent noise maximum on
  the skirt of a strong line could then suppress a real, prominent peak next to it, and a
  sample count cannot express a distance in Hz on unevenly spaced points;
* prominence is made local by ``wlen`` (``floor_window_hz``), so a peak is judged against the
  noise floor around it, not against the deepest point of the whole sweep;
* NaN (unmeasured points) splits the trace into runs searched separately, and a strict maximum
  at either end of a run counts as a peak, its prominence measured on its inner side only (same
  window): an emission at the edge of the sweep, or next to a gap, must not go unseen.

All tables are pandas DataFrames sorted by frequency. Levels are in the trace's own unit
(dBuV/m after a transducer chain, dBuV, dBm ...); the limit and ambient traces must be in the
same unit.
"""

from __future__ import annotations

import bisect
import math
from collections.abc import Callable

import numpy as np
import pandas as pd
from scipy.signal import find_peaks

from bench.errors import AnalysisError

__all__ = ["PEAK_COLUMNS", "find_peaks_hz", "flag_ambient", "select_suspects"]

#: Columns of the table returned by :func:`find_peaks_hz`.
PEAK_COLUMNS = ("freq_hz", "level", "prominence_db", "index")
# Default local window = this many minimum separations (a choice of ours, documented).
_FLOOR_WINDOW_PER_SEPARATION = 10.0


def _check_trace(freq_hz, level_db) -> tuple[np.ndarray, np.ndarray]:
    freq = np.asarray(freq_hz, dtype=float)
    level = np.asarray(level_db, dtype=float)
    if freq.ndim != 1 or freq.shape != level.shape:
        raise AnalysisError(f"expected 1-D frequency and level arrays of equal length, found "
                            f"shapes {freq.shape} and {level.shape}")
    if freq.size > 1 and not np.all(np.diff(freq) > 0):
        raise AnalysisError("expected strictly increasing frequencies in Hz")
    return freq, level


def _finite_runs(level: np.ndarray) -> list[tuple[int, int]]:
    """(start, stop) index pairs of the runs of finite values."""
    finite = np.concatenate(([False], np.isfinite(level), [False]))
    edges = np.flatnonzero(np.diff(finite.astype(np.int8)))
    return list(zip(edges[::2], edges[1::2]))


def _samples(span_hz: float, step_hz: float) -> int:
    # Round before ceil so 1.0000000001 steps is 1 step, not 2.
    return max(1, math.ceil(round(span_hz / step_hz, 9)))


def _run_peaks(freq: np.ndarray, level: np.ndarray, prominence_db: float,
               floor_window_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """Peak indices and prominences within one finite run."""
    if level.size == 1:  # an isolated point has no floor to stand out from
        return np.array([], dtype=int), np.array([])
    # wlen (samples) spans floor_window_hz centred on the peak: prominence stays local.
    half = _samples(floor_window_hz / 2.0, float(np.median(np.diff(freq))))
    idx, props = find_peaks(level, prominence=prominence_db, wlen=2 * half + 1)
    prominence = props["prominences"]
    first, last = _end_prominence(level, half), _end_prominence(level[::-1], half)
    if first >= prominence_db:
        idx, prominence = np.r_[0, idx], np.r_[first, prominence]
    if last >= prominence_db:
        idx, prominence = np.r_[idx, level.size - 1], np.r_[prominence, last]
    return idx, prominence


def _end_prominence(level: np.ndarray, half: int) -> float:
    """Prominence of ``level[0]`` seen from its only (inner) side, as scipy measures a base.

    The base is the lowest point between the end and the first higher point, searched at most
    ``half`` samples inwards; 0 when the end is not a strict local maximum.
    """
    inner = level[1:half + 1]
    if inner.size == 0 or inner[0] >= level[0]:
        return 0.0
    higher = np.flatnonzero(inner > level[0])
    stop = higher[0] if higher.size else inner.size
    return float(level[0] - inner[:stop].min())


def _thin_by_hz(table: pd.DataFrame, min_separation_hz: float) -> pd.DataFrame:
    """Keep the highest peak within any ``min_separation_hz`` (scipy's rule, but in Hz)."""
    if min_separation_hz <= 0 or len(table) < 2:
        return table
    order = np.lexsort((table["freq_hz"].to_numpy(), -table["level"].to_numpy()))
    freq = table["freq_hz"].to_numpy()
    kept_freq: list[float] = []  # sorted
    kept_rows: list[int] = []
    for row in order:
        pos = bisect.bisect_left(kept_freq, freq[row])
        neighbours = kept_freq[max(pos - 1, 0):pos + 1]
        if all(abs(freq[row] - f) >= min_separation_hz for f in neighbours):
            kept_freq.insert(pos, freq[row])
            kept_rows.append(row)
    return table.iloc[sorted(kept_rows)]


def find_peaks_hz(freq_hz, level_db, *, prominence_db: float, min_separation_hz: float,
                  floor_window_hz: float | None = None) -> pd.DataFrame:
    """Find the peaks of a spectrum with limits stated in Hz and dB.

    Parameters
    ----------
    freq_hz : array_like
        Strictly increasing frequencies in Hz.
    level_db : array_like
        Levels in any dB unit; NaN marks points that were not measured.
    prominence_db : float
        Minimum height of a peak above the higher of its two local bases, in dB.
    min_separation_hz : float
        Minimum distance between two reported peaks in Hz; the lower of two closer peaks is
        dropped.
    floor_window_hz : float, optional
        Width of the window, centred on each peak, in which its bases (the local floor) are
        searched. Default: 10 * ``min_separation_hz`` (our choice).

    Returns
    -------
    pandas.DataFrame
        Columns ``freq_hz``, ``level`` (trace unit), ``prominence_db``, ``index`` (into the
        input arrays), one row per peak, sorted by frequency.
    """
    freq, level = _check_trace(freq_hz, level_db)
    if not prominence_db > 0 or not min_separation_hz >= 0:
        raise AnalysisError(f"expected prominence_db > 0 and min_separation_hz >= 0, found "
                            f"{prominence_db!r} and {min_separation_hz!r}")
    if floor_window_hz is None:
        floor_window_hz = _FLOOR_WINDOW_PER_SEPARATION * min_separation_hz
    if not floor_window_hz > 0:
        raise AnalysisError(f"expected floor_window_hz > 0 (needed when min_separation_hz is "
                            f"0), found {floor_window_hz!r}")
    index_parts, prominence_parts = [], []
    for start, stop in _finite_runs(level):
        idx, prom = _run_peaks(freq[start:stop], level[start:stop], prominence_db,
                               floor_window_hz)
        index_parts.append(idx + start)
        prominence_parts.append(prom)
    index = np.concatenate(index_parts).astype(int) if index_parts else np.array([], int)
    prominence = np.concatenate(prominence_parts) if prominence_parts else np.array([])
    table = pd.DataFrame({"freq_hz": freq[index], "level": level[index],
                          "prominence_db": prominence, "index": index})
    return _thin_by_hz(table, min_separation_hz).reset_index(drop=True)


def select_suspects(peaks: pd.DataFrame, limit_at_freq: Callable | np.ndarray,
                    margin_db: float) -> pd.DataFrame:
    """Peaks over the limit or within ``margin_db`` below it.

    Parameters
    ----------
    peaks : pandas.DataFrame
        Table from :func:`find_peaks_hz`.
    limit_at_freq : callable or array_like
        ``f(freq_hz) -> limit`` (e.g. ``lambda f: limits.level("quasi-peak", f)``), or the
        limit at each peak's frequency. Peaks where the limit is NaN are not judged.
    margin_db : float
        How close below the limit (dB) a peak must be to become a suspect.

    Returns
    -------
    pandas.DataFrame
        The selected rows with added ``limit``, ``margin_db`` (= limit - level; negative means
        over the limit) and ``status``: ``"fail"`` when over the limit, ``"marginal"`` otherwise (within the margin below the limit).
    """
    freq = peaks["freq_hz"].to_numpy(dtype=float)
    limit = np.asarray(limit_at_freq(freq) if callable(limit_at_freq) else limit_at_freq,
                       dtype=float)
    if limit.shape != freq.shape:
        raise AnalysisError(f"expected one limit per peak, found {limit.shape} for "
                            f"{freq.shape} peaks")
    table = peaks.copy()
    table["limit"] = limit
    table["margin_db"] = limit - table["level"].to_numpy(dtype=float)
    chosen = table[np.isfinite(limit) & (table["margin_db"].to_numpy() <= margin_db)].copy()
    chosen["status"] = np.where(chosen["margin_db"] < 0.0, "fail", "marginal")
    return chosen.reset_index(drop=True)


def flag_ambient(suspects: pd.DataFrame, ambient_freq_hz, ambient_level, freq_tol_hz: float,
                 level_tol_db: float, *, ambient_prominence_db: float = 6.0,
                 ambient_floor_window_hz: float | None = None) -> pd.DataFrame:
    """Mark suspects that an ambient capture (EUT off) also shows.

    A suspect is ambient when the ambient trace has a peak (found with
    ``ambient_prominence_db``) within ``freq_tol_hz`` of it whose level is at least
    ``suspect level - level_tol_db``.

    Parameters
    ----------
    suspects : pandas.DataFrame
        Table with ``freq_hz`` and ``level`` columns (from :func:`select_suspects`).
    ambient_freq_hz, ambient_level : array_like
        Ambient trace, same unit and corrections as the suspects.
    freq_tol_hz : float
        Frequency tolerance in Hz.
    level_tol_db : float
        Level tolerance in dB.
    ambient_prominence_db : float
        Prominence (dB) an ambient point needs to count as a signal rather than noise floor.
    ambient_floor_window_hz : float, optional
        Local window for that prominence in Hz; default 20 * ``freq_tol_hz``.

    Returns
    -------
    pandas.DataFrame
        Copy of ``suspects`` with ``ambient`` (bool), ``ambient_freq_hz`` and
        ``ambient_level`` (the matching ambient peak, NaN when none).
    """
    ambient = find_peaks_hz(ambient_freq_hz, ambient_level, prominence_db=ambient_prominence_db,
                            min_separation_hz=0.0,
                            floor_window_hz=ambient_floor_window_hz or 20.0 * freq_tol_hz)
    a_freq = ambient["freq_hz"].to_numpy()
    a_level = ambient["level"].to_numpy()
    table = suspects.copy()
    match_freq = np.full(len(table), np.nan)
    match_level = np.full(len(table), np.nan)
    for row, (freq, level) in enumerate(zip(table["freq_hz"], table["level"])):
        close = (np.abs(a_freq - freq) <= freq_tol_hz) & (a_level >= level - level_tol_db)
        if close.any():
            best = int(np.argmax(np.where(close, a_level, -np.inf)))
            match_freq[row], match_level[row] = a_freq[best], a_level[best]
    table["ambient"] = np.isfinite(match_freq)
    table["ambient_freq_hz"] = match_freq
    table["ambient_level"] = match_level
    return table
