"""PNG plots: spectra with limit lines, near-field heat maps over the board, before/after views.

Figures are built with :class:`matplotlib.figure.Figure` and rendered by the Agg canvas
directly, so no GUI backend is chosen or needed and the global pyplot state is never touched.

Board photos are registered to board coordinates from reference points (pixel <-> metres):
a similarity transform (scale, rotation, translation) from two points, a least-squares affine
transform from three or more.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator
from matplotlib.transforms import Affine2D

from bench.analysis.maps import EDGE_NOTE
from bench.errors import AnalysisError

__all__ = [
    "DELTA_SCALE_MIN_DB",
    "comparison_png",
    "delta_map_png",
    "delta_scale_db",
    "map_png",
    "photo_transform",
    "spectrum_png",
]

#: Smallest half-range of the colour scale of a change map, dB (our choice): a change of a
#: few tenths of a dB, inside the repeatability of a re-homed probe (about 1 dB, from memory),
#: stays pale instead of filling the colour range.
DELTA_SCALE_MIN_DB = 3.0
UNIT_TEXT = {"dbuv": "dBuV", "dbuv_per_m": "dBuV/m", "dbua_per_m": "dBuA/m", "dbm": "dBm",
             "db": "dB"}
# Points kept per trace when drawing: a min/max envelope of this many buckets looks the same
# as the full 40k-point trace at report size and draws far faster.
_MAX_BUCKETS = 3000
_LIMIT_STYLE = {"quasi-peak": ("-", "#b2182b"), "peak": ("--", "#d6604d"),
                "average": (":", "#762a83")}
_STATUS_MARKER = {"fail": ("v", "#b2182b"), "marginal": ("^", "#e08214"), "pass": ("o", "#1b7837"),
                  "ambient": ("s", "#7f7f7f"), "inconclusive": ("D", "#5e3c99"),
                  "emission": ("*", "#b35806")}


def _unit_text(unit: str) -> str:
    return UNIT_TEXT.get(unit, unit)


def _save(fig: Figure, path) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    FigureCanvasAgg(fig)
    fig.savefig(path, format="png", dpi=fig.dpi)
    return path


def _envelope(freq_hz, level, buckets: int = _MAX_BUCKETS) -> tuple[np.ndarray, np.ndarray]:
    """Min/max envelope keeping every bucket's extremes at their own frequencies."""
    freq = np.asarray(freq_hz, float)
    level = np.asarray(level, float)
    n = level.size
    if n <= 2 * buckets:
        return freq, level
    k = math.ceil(n / buckets)
    pad = (-n) % k
    hi = np.pad(np.where(np.isnan(level), -np.inf, level), (0, pad), constant_values=-np.inf)
    lo = np.pad(np.where(np.isnan(level), np.inf, level), (0, pad), constant_values=np.inf)
    base = np.arange(0, n + pad, k)
    i_hi = base + hi.reshape(-1, k).argmax(axis=1)
    i_lo = base + lo.reshape(-1, k).argmin(axis=1)
    idx = np.sort(np.unique(np.minimum(np.concatenate([i_hi, i_lo]), n - 1)))
    return freq[idx], level[idx]


def _limit_polyline(line, lo_hz: float, hi_hz: float) -> tuple[np.ndarray, np.ndarray]:
    xs, ys = [], []
    for seg in line.segments:
        start, stop = max(seg.start_hz, lo_hz), min(seg.stop_hz, hi_hz)
        if start >= stop:
            continue
        f = np.array([start, stop]) if seg.start_level == seg.stop_level else \
            np.geomspace(start, stop, 32)
        xs += [f, [np.nan]]
        ys += [seg.level_at(f), [np.nan]]
    if not xs:
        return np.array([]), np.array([])
    return np.concatenate(xs), np.concatenate(ys)


def _draw_limits(ax, limits, lo_hz: float, hi_hz: float) -> None:
    for line in limits.lines:
        x, y = _limit_polyline(line, lo_hz, hi_hz)
        if x.size:
            style, colour = _LIMIT_STYLE.get(line.detector, ("-", "k"))
            ax.plot(x / 1e6, y, style, color=colour, lw=1.6,
                    label=f"limit {limits.name} ({line.detector})")


def _draw_suspects(ax, suspects) -> None:
    for status, group in suspects.groupby("status", sort=True):
        marker, colour = _STATUS_MARKER.get(status, ("x", "k"))
        ax.plot(group["freq_hz"].to_numpy(float) / 1e6, group["level"].to_numpy(float), marker,
                color=colour, ms=7, mfc="none", mew=1.6, ls="none",
                label=f"{status} ({len(group)})")


def _log_freq_axes(ax, lo_hz: float, hi_hz: float, unit: str) -> None:
    ax.set_xscale("log")
    ax.set_xlim(lo_hz / 1e6, hi_hz / 1e6)
    # plain MHz numbers (30, 50, 100, 200 ...) read better than powers of ten
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax.xaxis.set_minor_locator(LogLocator(base=10.0, subs=(2.0, 3.0, 5.0)))
    ax.xaxis.set_minor_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax.set_xlabel("frequency (MHz)")
    ax.set_ylabel(f"level ({_unit_text(unit)})")
    ax.grid(True, which="major", alpha=0.5)
    ax.grid(True, which="minor", alpha=0.15)


def spectrum_png(path, freq_hz, level, *, unit: str, title: str, ambient=None, limits=None,
                 suspects=None, extra_traces=None, log_freq: bool = True, label_worst: int = 3) -> Path:
    """Spectrum on a log-frequency axis (MHz) with limit lines, ambient and suspects.

    Parameters
    ----------
    path : str or pathlib.Path
        PNG file to write.
    freq_hz, level : array_like
        Spectrum: frequencies in Hz and levels in ``unit``.
    unit : str
        Level unit (``"dbuv_per_m"``, ``"dbua_per_m"``, ``"dbuv"``).
    title : str
        Figure title.
    ambient : (array_like, array_like), optional
        Ambient reference (Hz, level in ``unit``), drawn beneath.
    limits : bench.analysis.limits.LimitSet, optional
        One line per detector, drawn over the spectrum's range.
    suspects : pandas.DataFrame, optional
        Rows with ``freq_hz``, ``level``, ``status``; one marker shape per status.
    extra_traces : list of (freq_hz, level, label), optional
        More traces to overlay.
    log_freq : bool
        Log-frequency axis (a wide sweep); False for a narrow zoom around one emission.
    label_worst : int
        Write the margin beside this many suspects with the lowest margin (``margin_db``).

    Returns
    -------
    pathlib.Path
        The written file.
    """
    freq = np.asarray(freq_hz, float)
    if freq.size < 2:
        raise AnalysisError(f"expected a spectrum of at least 2 points, found {freq.size}")
    lo_hz, hi_hz = float(np.nanmin(freq)), float(np.nanmax(freq))
    fig = Figure(figsize=(10, 5), dpi=100)
    ax = fig.add_subplot()
    if ambient is not None:
        fa, la = _envelope(*ambient)
        ax.plot(fa / 1e6, la, color="#9e9e9e", lw=0.7, label="ambient (EUT off)")
    f, v = _envelope(freq, level)
    ax.plot(f / 1e6, v, color="#21618c", lw=0.8, label="measured")
    for i, (fx, lx, name) in enumerate(extra_traces or []):
        fe, le = _envelope(fx, lx)
        ax.plot(fe / 1e6, le, lw=0.8, color=("#35b779", "#fde725", "#440154")[i % 3], label=name)
    if limits is not None:
        _draw_limits(ax, limits, lo_hz, hi_hz)
    if suspects is not None and len(suspects):
        _draw_suspects(ax, suspects)
        _label_margins(ax, suspects, label_worst)
    if log_freq:
        _log_freq_axes(ax, lo_hz, hi_hz, unit)
    else:
        _linear_freq_axes(ax, lo_hz, hi_hz, unit)
    ax.set_title(title)
    # below the axes: a legend inside would hide the spectrum it explains
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.13), ncol=4, fontsize=8, frameon=False)
    fig.tight_layout()
    return _save(fig, path)


def _label_margins(ax, suspects, count: int) -> None:
    """The margin in dB beside the ``count`` markers with the lowest margin."""
    if "margin_db" not in suspects or count <= 0:
        return
    rows = suspects.dropna(subset=["margin_db"])
    rows = rows[~rows["status"].astype(str).str.contains("ambient")]  # ambient margins mean nothing
    worst = rows.nsmallest(count, "margin_db")
    for _, row in worst.iterrows():
        ax.annotate(f"{row['margin_db']:+.1f} dB", (row["freq_hz"] / 1e6, row["level"]),
                    textcoords="offset points", xytext=(4, 6), fontsize=8, color="#b2182b")


def _linear_freq_axes(ax, lo_hz: float, hi_hz: float, unit: str) -> None:
    ax.set_xlim(lo_hz / 1e6, hi_hz / 1e6)
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.3f}"))
    ax.set_xlabel("frequency (MHz)")
    ax.set_ylabel(f"level ({_unit_text(unit)})")
    ax.grid(True, alpha=0.4)


def comparison_png(path, before, after, delta, *, unit: str, title: str, limits=None) -> Path:
    """Two panels: before and after spectra overlaid, and after-minus-before in dB.

    Parameters
    ----------
    path : str or pathlib.Path
        PNG file to write.
    before, after, delta : (array_like, array_like)
        (freq_hz, level) pairs; ``delta`` in dB.
    unit : str
        Unit of ``before`` and ``after``.
    title : str
        Figure title.
    limits : LimitSet, optional
        Limit lines for the upper panel.
    """
    lo_hz = float(min(np.nanmin(before[0]), np.nanmin(after[0])))
    hi_hz = float(max(np.nanmax(before[0]), np.nanmax(after[0])))
    fig = Figure(figsize=(10, 7), dpi=100)
    top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=(3, 2))
    for (f, v), name, colour in ((before, "before", "#9e9e9e"), (after, "after", "#21618c")):
        fe, ve = _envelope(f, v)
        top.plot(fe / 1e6, ve, lw=0.8, color=colour, label=name)
    if limits is not None:
        _draw_limits(top, limits, lo_hz, hi_hz)
    _log_freq_axes(top, lo_hz, hi_hz, unit)
    top.set_xlabel("")
    top.legend(loc="best", fontsize=8)
    top.set_title(title)
    fd, vd = _envelope(*delta)
    bottom.plot(fd / 1e6, vd, lw=0.8, color="#5e3c99")
    bottom.axhline(0.0, color="k", lw=0.8)
    _log_freq_axes(bottom, lo_hz, hi_hz, "db")
    bottom.set_ylabel("after - before (dB)")
    fig.tight_layout()
    return _save(fig, path)


# ----------------------------------------------------------------------------- photo registration


def photo_transform(pixel_xy, board_m, *, image_y_down: bool = True) -> np.ndarray:
    """Affine map from photo pixels to board metres, from reference points.

    Parameters
    ----------
    pixel_xy : array_like, shape (n, 2)
        Reference points in the photo: (column, row) in pixels.
    board_m : array_like, shape (n, 2)
        The same points in board coordinates, metres.
    image_y_down : bool
        Pixel rows grow downwards while board y grows upwards, so with two points the
        similarity is fitted to (column, -row); set False for pixel axes already right-handed.
        Three or more points fit a general affine map, which absorbs the flip itself.

    Returns
    -------
    numpy.ndarray, shape (2, 3)
        ``M`` with ``board = M[:, :2] @ pixel + M[:, 2]``.

    Notes
    -----
    Two points fix a similarity exactly: with points as complex numbers, board = a*p + b,
    a = (w2 - w1)/(z2 - z1) (a = s*exp(j*theta)), b = w1 - a*z1. Three or more points: the
    affine map minimising the squared residuals (``numpy.linalg.lstsq``).
    """
    pix = np.asarray(pixel_xy, float)
    brd = np.asarray(board_m, float)
    if pix.ndim != 2 or pix.shape[1] != 2 or pix.shape != brd.shape or len(pix) < 2:
        raise AnalysisError(f"expected two or more (pixel, board) point pairs, found shapes "
                            f"{pix.shape} and {brd.shape}")
    if len(pix) == 2:
        return _similarity(pix, brd, flip=-1.0 if image_y_down else 1.0)
    design = np.column_stack([pix, np.ones(len(pix))])
    solution, _, rank, _ = np.linalg.lstsq(design, brd, rcond=None)
    if rank < 3:
        raise AnalysisError("photo reference points are collinear: an affine fit needs three "
                            "points not on one line")
    return solution.T


def _similarity(pix: np.ndarray, brd: np.ndarray, flip: float) -> np.ndarray:
    z = pix[:, 0] + 1j * flip * pix[:, 1]
    w = brd[:, 0] + 1j * brd[:, 1]
    if abs(z[1] - z[0]) == 0.0:
        raise AnalysisError("photo reference points coincide in pixels: need two distinct points")
    a = (w[1] - w[0]) / (z[1] - z[0])
    b = w[0] - a * z[0]
    # [Re a, -Im a; Im a, Re a] acting on (col, flip*row)
    return np.array([[a.real, -a.imag * flip, b.real], [a.imag, a.real * flip, b.imag]])


def _draw_photo(ax, photo, photo_points) -> None:
    from matplotlib.image import imread

    image = imread(str(photo))
    pixel = [p["pixel"] for p in photo_points]
    board = [p["board_m"] for p in photo_points]
    m = photo_transform(pixel, board)
    height, width = image.shape[:2]
    to_board = Affine2D(np.vstack([m, [0.0, 0.0, 1.0]]))
    # Pixel (col, row) centres at integer coordinates; origin="upper" puts row 0 at the top.
    ax.imshow(image, extent=(-0.5, width - 0.5, height - 0.5, -0.5), origin="upper",
              transform=to_board + ax.transData, zorder=0, interpolation="bilinear")


# ----------------------------------------------------------------------------- maps


def _edges(centres: np.ndarray) -> np.ndarray:
    if centres.size == 1:
        return centres[0] + np.array([-0.5e-3, 0.5e-3])
    mid = (centres[1:] + centres[:-1]) / 2.0
    return np.concatenate([[2 * centres[0] - mid[0]], mid, [2 * centres[-1] - mid[-1]]])


def _map_panel(ax, x_m, y_m, z, *, cmap, vmin, vmax, outline_m, alpha, title):
    mesh = ax.pcolormesh(_edges(x_m) * 1e3, _edges(y_m) * 1e3, np.ma.masked_invalid(z),
                         cmap=cmap, vmin=vmin, vmax=vmax, alpha=alpha, shading="flat", zorder=1)
    if outline_m is not None and len(outline_m):
        pts = np.asarray(outline_m, float) * 1e3
        closed = np.vstack([pts, pts[:1]])
        ax.plot(closed[:, 0], closed[:, 1], color="#00bcd4", lw=1.5, zorder=3)
    ax.set_aspect("equal")
    ax.set_xlabel("x (mm)")
    ax.set_ylabel("y (mm)")
    ax.set_title(title, fontsize=10)
    return mesh


def _panel_limits(ax, x_m, y_m, outline_m) -> None:
    xs, ys = [_edges(x_m) * 1e3], [_edges(y_m) * 1e3]
    if outline_m is not None and len(outline_m):
        pts = np.asarray(outline_m, float) * 1e3
        xs.append(pts[:, 0])
        ys.append(pts[:, 1])
    x, y = np.concatenate(xs), np.concatenate(ys)
    pad = 0.03 * max(np.ptp(x), np.ptp(y), 1.0)
    ax.set_xlim(x.min() - pad, x.max() + pad)
    ax.set_ylim(y.min() - pad, y.max() + pad)


def _mark_spots(ax, spots) -> bool:
    """Mark and number one map's own hot spots; True when one lies on the scan's edge."""
    if spots is None or not len(spots):
        return False
    for row in spots.itertuples(index=False):
        x, y = row.x_m * 1e3, row.y_m * 1e3
        ax.plot(x, y, "+", color="white", ms=11, mew=2, zorder=4)
        ax.plot(x, y, "+", color="black", ms=9, mew=1, zorder=5)
        if row.at_edge:  # a dashed ring: the maximum may lie beyond the scanned area
            ax.plot(x, y, "o", ms=16, mfc="none", mec="white", mew=1.2, ls="none", zorder=5)
            ax.plot(x, y, "o", ms=16, mfc="none", mec="black", mew=1.0, ls="none",
                    zorder=5, dashes=(2, 2))
        text = f"{row.rank} (edge)" if row.at_edge else str(row.rank)
        ax.annotate(text, (x, y), xytext=(4, 4), textcoords="offset points", fontsize=8,
                    color="white", zorder=6,
                    bbox={"boxstyle": "round,pad=0.1", "fc": "black", "alpha": 0.6, "lw": 0})
    return bool(spots["at_edge"].any())


def _finite_range(arrays) -> tuple[float, float]:
    values = np.concatenate([np.ravel(a) for a in arrays])
    values = values[np.isfinite(values)]
    if values.size == 0:
        return 0.0, 1.0
    lo, hi = float(values.min()), float(values.max())
    return (lo, hi) if hi > lo else (lo - 0.5, hi + 0.5)


def map_png(path, maps, *, outline_m=None, photo=None, photo_points=None, title: str,
            unit: str, hot_spots=None) -> Path:
    """Heat maps of a grid step, one panel per probe rotation plus the combined map.

    Parameters
    ----------
    path : str or pathlib.Path
        PNG file to write.
    maps : bench.analysis.maps.GridMaps
        The maps (positions in m; drawn in mm).
    outline_m : array_like, shape (n, 2), optional
        Board outline polygon in board metres.
    photo : str or pathlib.Path, optional
        Board photo (PNG; JPEG with Pillow) drawn underneath.
    photo_points : list of dict, optional
        ``{"pixel": [col, row], "board_m": [x, y]}`` reference points (two or more) that
        register the photo (:func:`photo_transform`).
    title : str
        Figure title.
    unit : str
        Level unit of the maps.
    hot_spots : pandas.DataFrame, optional
        Hot spots of each panel (:meth:`bench.analysis.maps.GridMaps.hot_spots`): every panel
        marks and numbers only the rows of its own map (column ``map``), and rings those on
        the edge of the scanned area.
    """
    panels = maps.panels()
    vmin, vmax = _finite_range([p[2] for p in panels])
    fig = Figure(figsize=(4.2 * len(panels) + 1.0, 3.9), dpi=100, layout="constrained")
    axes = np.atleast_1d(fig.subplots(1, len(panels)))
    use_photo = photo is not None and photo_points
    mesh, edge = None, False
    for ax, (name, _, z) in zip(axes, panels):
        if use_photo:
            _draw_photo(ax, photo, photo_points)
        mesh = _map_panel(ax, maps.x_m, maps.y_m, z, cmap="magma", vmin=vmin, vmax=vmax,
                          outline_m=outline_m, alpha=0.7 if use_photo else 1.0, title=name)
        own = None if hot_spots is None else hot_spots[hot_spots["map"] == name]
        edge = _mark_spots(ax, own) or edge
        _panel_limits(ax, maps.x_m, maps.y_m, outline_m)
    fig.colorbar(mesh, ax=list(axes), label=f"{_unit_text(unit)} ({maps.what})", shrink=0.9)
    fig.suptitle(title)
    if edge:
        fig.supxlabel(f"(edge): {EDGE_NOTE}", fontsize=9)
    return _save(fig, path)


def delta_scale_db(delta_db) -> float:
    """Half-range of a change map's colour scale, dB: the largest finite |change|, at least
    :data:`DELTA_SCALE_MIN_DB`."""
    finite = np.abs(np.asarray(delta_db, float))
    finite = finite[np.isfinite(finite)]
    return max(DELTA_SCALE_MIN_DB, float(finite.max()) if finite.size else 0.0)


def delta_map_png(path, x_m, y_m, delta_db, *, title: str, outline_m=None) -> Path:
    """Map of a level change in dB (after minus before) on a symmetric diverging scale.

    The scale spans at least +-:data:`DELTA_SCALE_MIN_DB` (3 dB), more when the change is
    larger, so a change of a few tenths of a dB shows as the small change it is instead of
    filling the whole colour range.
    """
    span = delta_scale_db(delta_db)
    fig = Figure(figsize=(6.2, 4.8), dpi=100, layout="constrained")
    ax = fig.add_subplot()
    mesh = _map_panel(ax, np.asarray(x_m), np.asarray(y_m), delta_db, cmap="RdBu_r", vmin=-span,
                      vmax=span, outline_m=outline_m, alpha=1.0, title=title)
    _panel_limits(ax, np.asarray(x_m), np.asarray(y_m), outline_m)
    fig.colorbar(mesh, ax=ax, label="after - before (dB)")
    return _save(fig, path)
