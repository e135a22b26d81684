"""Near-field maps of a grid step, the hot spots of each map, and the step's emission peaks.

A grid step stores one trace per (position, probe rotation, segment). A map reduces each trace
to one number (the level at a frequency, or the maximum over a band) and places it on the
regular grid spanned by the stored board coordinates of the probe tip. Levels are corrected
with the step's probe factor chain (:mod:`bench.analysis.runview`).

Hot spots belong to one map: the 2-D local maxima of that map that stand out by their
topographic prominence, so a weaker second source is listed beside a stronger one (rule and
thresholds in docs/physics.md, section 4). A hot spot on the border of the measured area is
flagged: its maximum may lie outside. :func:`emission_peaks` is the frequency view: peaks of
the maximum-over-grid spectrum, the frequencies worth a map.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import pandas as pd

from bench.analysis.peaks import find_peaks_hz
from bench.analysis.runview import _raw_unit_offset_db, _step_unit, step_chain, step_info
from bench.errors import AnalysisError
from bench.units import format_hz

__all__ = ["EDGE_NOTE", "EMISSION_COLUMNS", "GridMaps", "HOT_SPOT_ABOVE_MEDIAN_DB",
           "HOT_SPOT_COLUMNS", "HOT_SPOT_PROMINENCE_DB", "MapChange", "compare_maps",
           "emission_peaks", "grid_maps", "hot_spots", "peak_prominences", "power_sum_db"]

#: Columns of the table returned by :func:`emission_peaks`.
EMISSION_COLUMNS = ("freq_hz", "level", "x_m", "y_m", "rotation_deg", "prominence_db")
#: Columns of the table returned by :func:`hot_spots` and :meth:`GridMaps.hot_spots`.
HOT_SPOT_COLUMNS = ("map", "rank", "x_m", "y_m", "level", "prominence_db", "at_edge")
#: A hot spot rises at least this much above the col that joins it to a higher one, dB (our
#: choice, as for spectral peaks: a 6 dB dip separates two sources clearly).
HOT_SPOT_PROMINENCE_DB = 6.0
#: ... and at least this much above the map's median level, dB: a noise bump of a single
#: Rayleigh-distributed reading exceeds its median by 12 dB with probability
#: 2**-(10**1.2) = 1.7e-5 per position (derived in docs/physics.md, section 4).
HOT_SPOT_ABOVE_MEDIAN_DB = 12.0
#: What a hot spot on the border of the measured area is flagged with.
EDGE_NOTE = "may continue outside the scanned area"
# Positions closer than this are the same grid node (stage resolution is far coarser).
_POSITION_RESOLUTION_M = 1e-6


def power_sum_db(a_db, b_db) -> np.ndarray:
    """10*log10(10^(a/10) + 10^(b/10)): the magnitude of two orthogonal components, in dB.

    |H_t|^2 = |H_x|^2 + |H_y|^2, so in dB the components add as powers; two equal levels give
    +10*log10(2) = +3.01 dB. NaN when either input is NaN.
    """
    scale = 10.0 / math.log(10.0)
    with np.errstate(invalid="ignore"):  # NaN in, NaN out: not measured stays not measured
        return scale * np.logaddexp(np.asarray(a_db, float) / scale,
                                    np.asarray(b_db, float) / scale)


@dataclass(frozen=True)
class GridMaps:
    """Levels of a grid step on a regular grid.

    Attributes
    ----------
    x_m, y_m : numpy.ndarray
        Grid axes in board coordinates, metres (sorted).
    by_orientation : dict of float to numpy.ndarray
        Probe rotation in degrees -> 2-D array of shape ``(len(y_m), len(x_m))`` (row = y),
        NaN where not measured.
    combined : numpy.ndarray
        Orientation-independent map, same shape (see :func:`grid_maps`).
    unit : str
        Level unit (``"dbua_per_m"`` for an H loop with its factor, ``"dbuv_per_m"`` for an E
        probe, ``"dbuv"`` without a chain).
    what : str
        What each value is, e.g. ``"max over 30 MHz to 300 MHz"``.
    """

    x_m: np.ndarray
    y_m: np.ndarray
    by_orientation: dict[float, np.ndarray]
    combined: np.ndarray
    unit: str
    what: str

    def peak(self) -> tuple[float, float, float]:
        """(x_m, y_m, level) of the highest value of the combined map."""
        if not np.any(np.isfinite(self.combined)):
            raise AnalysisError("the combined map has no measured point")
        iy, ix = np.unravel_index(int(np.nanargmax(self.combined)), self.combined.shape)
        return float(self.x_m[ix]), float(self.y_m[iy]), float(self.combined[iy, ix])

    def panels(self) -> list[tuple[str, float | None, np.ndarray]]:
        """The maps a report draws: ``(name, rotation in deg or None, 2-D map)``.

        One per probe rotation (``"rotation 90 deg"``), then ``"combined"`` when there is
        more than one rotation (with one, the combined map is that rotation's map).
        """
        out = [(f"rotation {rot:g} deg", rot, self.by_orientation[rot])
               for rot in sorted(self.by_orientation)]
        if len(out) > 1:
            out.append(("combined", None, self.combined))
        return out

    def hot_spots(self, map_name: str | None = None, **kwargs) -> pd.DataFrame:
        """Hot spots of each map on its own (:func:`hot_spots`), panel after panel.

        Parameters
        ----------
        map_name : str, optional
            Only this panel of :meth:`panels` (e.g. ``"combined"``); default every panel.
        **kwargs
            ``prominence_db``, ``above_median_db``, ``top`` of :func:`hot_spots`.
        """
        parts = [hot_spots(self.x_m, self.y_m, z, map_name=name, **kwargs)
                 for name, _, z in self.panels() if map_name in (None, name)]
        parts = [p for p in parts if len(p)]
        if not parts:
            return pd.DataFrame(columns=list(HOT_SPOT_COLUMNS))
        return pd.concat(parts, ignore_index=True)


# --------------------------------------------------------------------------- hot spots of a map

_NEIGHBOURS = ((-1, -1), (-1, 0), (-1, 1), (0, -1), (0, 1), (1, -1), (1, 0), (1, 1))


def _neighbours(cell: int, ny: int, nx: int) -> list[int | None]:
    """Flat indices of the 8 neighbours of ``cell``; None where one lies outside the grid."""
    cy, cx = divmod(cell, nx)
    return [(cy + dy) * nx + cx + dx if 0 <= cy + dy < ny and 0 <= cx + dx < nx else None
            for dy, dx in _NEIGHBOURS]


def _root(parent: list[int], cell: int) -> int:
    """Union-find root of ``cell``, compressing the path on the way."""
    root = cell
    while parent[root] != root:
        root = parent[root]
    while parent[cell] != root:
        parent[cell], cell = root, parent[cell]
    return root


def peak_prominences(level) -> dict[int, float]:
    """Every regional maximum of a 2-D map with its topographic prominence, dB.

    Positions are visited from the highest level down; a position joins the measured
    neighbours (8-connected) already visited. When it joins two or more groups it is the col
    between them: every group but the one with the highest peak ends there, and its peak's
    prominence is the peak level minus the col level. The highest peak of each connected
    measured region gets its height above the lowest level of that region. Unmeasured
    positions (NaN) are never crossed. Equal levels are visited in row-major order, so a flat
    top counts once.

    Parameters
    ----------
    level : array_like, shape (ny, nx)
        The map in dB (any dB reference), NaN where not measured.

    Returns
    -------
    dict of int to float
        Flat (row-major) index of each peak -> prominence in dB.
    """
    z = np.asarray(level, float)
    ny, nx = z.shape
    flat = z.ravel()
    valid = np.flatnonzero(np.isfinite(flat))
    parent = [-1] * flat.size
    peak: dict[int, int] = {}       # group root -> its highest position (the first visited)
    born: dict[int, int] = {}       # group root -> rank of its peak in the visiting order
    lowest: dict[int, float] = {}   # group root -> the lowest level it has reached
    out: dict[int, float] = {}
    for cell in valid[np.argsort(-flat[valid], kind="stable")].tolist():
        roots = {_root(parent, n) for n in _neighbours(cell, ny, nx)
                 if n is not None and parent[n] >= 0}
        group = cell
        if roots:
            # the group whose peak was visited first has the highest peak (ties: row-major)
            group = min(roots, key=lambda r: born[r])
            for other in roots - {group}:
                out[peak[other]] = float(flat[peak[other]] - flat[cell])  # this cell is the col
                parent[other] = group
        else:
            peak[cell], born[cell] = cell, len(born)
        parent[cell] = group
        lowest[group] = float(flat[cell])  # visited from the top down: the newest is the lowest
    for root, top in peak.items():
        if parent[root] == root:
            out[top] = float(flat[top] - lowest[root])
    return out


def _at_edge(z: np.ndarray, cell: int) -> bool:
    """True when a neighbour of ``cell`` lies outside the grid or was not measured."""
    ny, nx = z.shape
    return any(n is None or not np.isfinite(z.flat[n]) for n in _neighbours(cell, ny, nx))


def hot_spots(x_m, y_m, level, *, map_name: str = "combined",
              prominence_db: float = HOT_SPOT_PROMINENCE_DB,
              above_median_db: float = HOT_SPOT_ABOVE_MEDIAN_DB, top: int = 10) -> pd.DataFrame:
    """The hot spots of one map: distinct sources told apart by their prominence.

    A hot spot is a regional maximum of the map (:func:`peak_prominences`) whose prominence is
    at least ``prominence_db`` and whose level is at least ``above_median_db`` above the
    map's median level. A weaker source beside a stronger one is listed as long as the dip
    between them is deep enough. A hot spot next to the border of the measured area (a
    neighbour outside the grid or not measured) is flagged ``at_edge``: its true maximum may
    lie outside the scanned area.

    Parameters
    ----------
    x_m, y_m : array_like
        Grid axes in board coordinates, m.
    level : array_like, shape (len(y_m), len(x_m))
        The map in dB (row = y), NaN where not measured.
    map_name : str
        Name of the map, copied to the ``map`` column.
    prominence_db, above_median_db : float
        Thresholds in dB (defaults :data:`HOT_SPOT_PROMINENCE_DB`,
        :data:`HOT_SPOT_ABOVE_MEDIAN_DB`).
    top : int
        Number of hot spots kept, the strongest.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`HOT_SPOT_COLUMNS`: map name, rank (1 = strongest), position in m,
        level in the map's unit, prominence in dB, ``at_edge`` flag; highest level first.
    """
    z = np.asarray(level, float)
    rows = []
    if np.any(np.isfinite(z)):
        floor = float(np.nanmedian(z))
        for cell, prominence in peak_prominences(z).items():
            iy, ix = divmod(cell, z.shape[1])
            if prominence >= prominence_db and z[iy, ix] >= floor + above_median_db:
                rows.append((float(x_m[ix]), float(y_m[iy]), float(z[iy, ix]), prominence,
                             _at_edge(z, cell)))
    rows.sort(key=lambda r: (-r[2], r[1], r[0]))
    table = pd.DataFrame([(map_name, rank, *row) for rank, row in enumerate(rows[:top], 1)],
                         columns=list(HOT_SPOT_COLUMNS))
    return table.astype({"rank": int, "x_m": float, "y_m": float, "level": float,
                         "prominence_db": float, "at_edge": bool})


class _GridTraces:
    """The corrected traces of a grid step, read one at a time (a scan can hold thousands)."""

    def __init__(self, run, label: str) -> None:
        info = step_info(run, label)
        self.run = run
        self.label = label
        self.probe_kind = str(info.get("probe_kind", ""))
        self.chain = step_chain(run, label)
        self.unit = _step_unit(info, self.chain, label)
        self.meta = run.traces(label)
        if self.meta.empty:
            raise AnalysisError(f"{run.folder}: step {label!r} has no traces")
        if self.meta["x_m"].isna().any() or self.meta["y_m"].isna().any():
            raise AnalysisError(f"step {label!r}: expected probe positions (x_m, y_m) on every "
                                "trace of a grid step, found traces without")
        self.offset_db = _raw_unit_offset_db(run, label)
        self._correction: dict[tuple, np.ndarray] = {}

    def correction_db(self, freq_hz: np.ndarray) -> np.ndarray:
        key = (float(freq_hz[0]), float(freq_hz[-1]), freq_hz.size)
        if key not in self._correction:  # segments share axes: one chain evaluation each
            total = self.chain.total_db(freq_hz) if self.chain is not None else 0.0
            self._correction[key] = np.zeros(freq_hz.size) + total + self.offset_db
        return self._correction[key]

    def __iter__(self) -> Iterator[tuple[pd.Series, np.ndarray, np.ndarray]]:
        for _, row in self.meta.iterrows():
            freq_hz, raw = self.run.trace(int(row["id"]))
            yield row, freq_hz, raw + self.correction_db(freq_hz)


def _rotation(value) -> float:
    return 0.0 if value is None or not np.isfinite(value) else round(float(value), 6)


def _axis(values: np.ndarray) -> np.ndarray:
    return np.unique(np.round(values / _POSITION_RESOLUTION_M)) * _POSITION_RESOLUTION_M


def _trace_value(freq_hz, level, freq_sel, band_hz) -> float:
    """One number per trace: nearest bin to ``freq_sel``, max over ``band_hz``, or max overall."""
    if freq_sel is not None:
        if not freq_hz[0] <= freq_sel <= freq_hz[-1]:
            return np.nan  # another segment holds that frequency
        return float(level[int(np.argmin(np.abs(freq_hz - freq_sel)))])
    inside = np.ones(freq_hz.size, bool) if band_hz is None else \
        (freq_hz >= band_hz[0]) & (freq_hz <= band_hz[1])
    return float(np.fmax.reduce(level[inside])) if inside.any() else np.nan


def _what(freq_hz, band_hz, meta) -> str:
    if freq_hz is not None:
        return f"at {format_hz(freq_hz)}"
    lo, hi = band_hz if band_hz is not None else (meta["start_hz"].min(), meta["stop_hz"].max())
    return f"max over {format_hz(lo)} to {format_hz(hi)}"


def _check_selection(meta, freq_hz, band_hz) -> None:
    lo, hi = float(meta["start_hz"].min()), float(meta["stop_hz"].max())
    if freq_hz is not None and band_hz is not None:
        raise AnalysisError("give either freq_hz or band_hz, not both")
    if freq_hz is not None and not lo <= freq_hz <= hi:
        raise AnalysisError(f"expected a frequency within the scan {lo:.9g} Hz to {hi:.9g} Hz, "
                            f"found {freq_hz:.9g} Hz")
    if band_hz is not None and not (band_hz[0] < band_hz[1] and band_hz[0] <= hi
                                    and band_hz[1] >= lo):
        raise AnalysisError(f"expected a band (lo < hi) overlapping the scan {lo:.9g} Hz to "
                            f"{hi:.9g} Hz, found {band_hz!r}")


def _combine(probe_kind: str, maps: dict[float, np.ndarray]) -> np.ndarray:
    keys = sorted(maps)
    if len(keys) == 1:
        return maps[keys[0]].copy()
    stack = np.stack([maps[k] for k in keys])
    orthogonal = len(keys) == 2 and math.isclose((keys[1] - keys[0]) % 180.0, 90.0)
    if probe_kind == "h-loop" and orthogonal:
        return power_sum_db(stack[0], stack[1])
    # No component decomposition applies (E probe, or non-orthogonal loop angles): the
    # strongest reading at each point. NaN only where nothing was measured.
    with np.errstate(invalid="ignore"):
        return np.fmax.reduce(stack, axis=0)


def grid_maps(run, label: str, *, freq_hz: float | None = None,
              band_hz: tuple[float, float] | None = None) -> GridMaps:
    """Maps of a grid step: one per probe rotation and one combined.

    Parameters
    ----------
    run : bench.store.RunStore
        Open run folder.
    label : str
        Label of a grid step.
    freq_hz : float, optional
        Map the level at the bin nearest to this frequency (Hz).
    band_hz : (float, float), optional
        Map the maximum over this band (Hz). Default (neither given): maximum over the span.

    Returns
    -------
    GridMaps
        ``combined``: for an H loop measured at two orthogonal rotations the two readings are
        the two tangential H components (the loop senses the field along its axis), so the
        combined map is their power sum 10*log10(10^(a/10) + 10^(b/10)), the magnitude of the
        tangential field; NaN where either rotation is missing (a partial sum would understate
        the field). With a band or the whole span each rotation's maximum may lie at a
        different frequency, so the sum is then an upper estimate. For one rotation the
        combined map is that map; otherwise (E probe, other angles) the point-wise maximum.
        Repeated readings at one node keep the highest.
    """
    traces = _GridTraces(run, label)
    _check_selection(traces.meta, freq_hz, band_hz)
    x_axis, y_axis = _axis(traces.meta["x_m"].to_numpy()), _axis(traces.meta["y_m"].to_numpy())
    maps: dict[float, np.ndarray] = {}
    for row, freq, level in traces:
        value = _trace_value(freq, level, freq_hz, band_hz)
        grid = maps.setdefault(_rotation(row["rotation_deg"]),
                               np.full((y_axis.size, x_axis.size), np.nan))
        ix = int(np.argmin(np.abs(x_axis - row["x_m"])))
        iy = int(np.argmin(np.abs(y_axis - row["y_m"])))
        grid[iy, ix] = np.fmax(grid[iy, ix], value)  # fmax: NaN (not measured) loses
    return GridMaps(x_axis, y_axis, maps, _combine(traces.probe_kind, maps), traces.unit,
                    _what(freq_hz, band_hz, traces.meta))


def _max_over_grid(traces: _GridTraces):
    """Per segment: frequency axis, max over poses, and the trace row holding that max."""
    best: dict[int, list] = {}
    for i, (row, freq, level) in enumerate(traces):
        seg = int(row["segment"])
        if seg not in best:
            best[seg] = [freq, np.full(freq.size, -np.inf), np.full(freq.size, -1)]
        louder = level > best[seg][1]
        best[seg][1][louder] = level[louder]
        best[seg][2][louder] = i
    parts = [best[s] for s in sorted(best)]
    return (np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts]),
            np.concatenate([p[2] for p in parts]))


def emission_peaks(run, label: str, *, top: int = 10, prominence_db: float = 6.0,
                   min_separation_hz: float | None = None) -> pd.DataFrame:
    """The strongest emissions of a grid step: the frequencies worth a map.

    Peaks are searched (:func:`bench.analysis.peaks.find_peaks_hz`) in the maximum-over-grid
    corrected spectrum; for each peak the table gives the position and probe rotation of the
    single strongest reading. Where the sources of a frequency are, one or several, is the
    business of the map at that frequency and its :func:`hot_spots`.

    Parameters
    ----------
    run : bench.store.RunStore
        Open run folder.
    label : str
        Label of a grid step.
    top : int
        Number of rows kept (the strongest).
    prominence_db : float
        Minimum prominence of a peak, dB.
    min_separation_hz : float, optional
        Minimum distance between two peaks, Hz. Default: the widest RBW of the step (two
        lines closer than one RBW are not resolved; common practice).

    Returns
    -------
    pandas.DataFrame
        Columns :data:`EMISSION_COLUMNS` (frequency in Hz, level in the step's unit,
        positions in m, rotation in degrees, prominence in dB), sorted by level, highest first.
    """
    traces = _GridTraces(run, label)
    if min_separation_hz is None:
        min_separation_hz = float(traces.meta["rbw_hz"].max())
    freq, level, owner = _max_over_grid(traces)
    level = np.where(np.isfinite(level), level, np.nan)
    # shared edge bins of adjacent segments: keep the louder (as join_segments does)
    order = np.lexsort((-np.nan_to_num(level, nan=-np.inf), freq))
    freq, level, owner = freq[order], level[order], owner[order]
    keep = np.r_[True, np.diff(freq) > 0]
    freq, level, owner = freq[keep], level[keep], owner[keep]
    peaks = find_peaks_hz(freq, level, prominence_db=prominence_db,
                          min_separation_hz=min_separation_hz)
    rows = traces.meta.iloc[owner[peaks["index"].to_numpy(dtype=int)]]
    table = pd.DataFrame({
        "freq_hz": peaks["freq_hz"].to_numpy(),
        "level": peaks["level"].to_numpy(),
        "x_m": rows["x_m"].to_numpy(dtype=float),
        "y_m": rows["y_m"].to_numpy(dtype=float),
        "rotation_deg": [_rotation(r) for r in rows["rotation_deg"]],
        "prominence_db": peaks["prominence_db"].to_numpy(),
    }, columns=list(EMISSION_COLUMNS))
    table = table.sort_values("level", ascending=False, kind="stable")
    return table.head(top).reset_index(drop=True)


@dataclass
class MapChange:
    """Change of the combined map on the grid nodes both runs measured.

    Attributes
    ----------
    x_m, y_m : numpy.ndarray
        Common grid axes in m.
    delta_db : numpy.ndarray
        After minus before, shape ``(len(y_m), len(x_m))``, NaN where either is missing.
    """

    x_m: np.ndarray
    y_m: np.ndarray
    delta_db: np.ndarray


def _common(axis_a: np.ndarray, axis_b: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    ia, ib = [], []
    for i, v in enumerate(axis_a):
        j = np.flatnonzero(np.abs(axis_b - v) <= 1e-6)
        if j.size:
            ia.append(i)
            ib.append(int(j[0]))
    return axis_a[ia], np.array(ia, int), np.array(ib, int)


def compare_maps(before, after) -> MapChange:
    """Combined-map change (after minus before, dB) on the grid nodes common to both.

    Raises
    ------
    AnalysisError
        Different units, or no common grid node.
    """
    if before.unit != after.unit:
        raise AnalysisError(f"maps in different units: before {before.unit}, after {after.unit}")
    x, xb, xa = _common(before.x_m, after.x_m)
    y, yb, ya = _common(before.y_m, after.y_m)
    if x.size == 0 or y.size == 0:
        raise AnalysisError("the two grids share no position (compare scans of the same area)")
    delta = after.combined[np.ix_(ya, xa)] - before.combined[np.ix_(yb, xb)]
    return MapChange(x, y, delta)
