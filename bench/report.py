"""The HTML report of a run: one self-contained file that opens offline.

``report.html`` in the run folder holds everything inline: CSS in a ``<style>`` element, plots as
``data:image/png;base64`` URIs, no scripts and no external links. The same PNGs are also written
to the run's ``plots/`` folder. Every piece of text from the run (labels, instrument replies,
notes, events) is HTML-escaped.
"""

from __future__ import annotations

from dataclasses import dataclass

import base64
import html
import re
import time
from pathlib import Path

import numpy as np
import pandas as pd

from bench import plots
from bench.analysis import maps as maps_mod
from bench.analysis import runview
from bench.errors import BenchError

__all__ = ["DISCLAIMER", "PAGE_CSS", "SAFETY_CAUTIONS", "embed_png", "esc", "html_table", "page",
           "safe_name", "write_report"]

DISCLAIMER = (
    "A pre-scan is an estimate, not a compliance verdict. Bench set-ups, probes, cables and "
    "sites differ from an accredited test site; levels and margins here indicate risk only. "
    "Defer to the applicable standard, an accredited test house and local regulations."
)

SAFETY_CAUTIONS = (
    "Analyzer inputs are easily damaged, typically above +30 dBm or by any DC voltage (0 V DC "
    "rating): use an attenuator, a DC block and a limiter, especially with line impedance "
    "stabilisation networks and probes near switching nodes.",
    "Boards under test may carry mains or high voltage; probes and stages come close to them.",
    "A moving stage can pinch fingers and crash a probe into a board: soft limits, a safe "
    "travel height and an emergency stop are the operator's responsibility; the tool enforces "
    "only the limits it is given.",
    "Intentional radiators near people: follow the applicable RF exposure rules.",
)

PAGE_CSS = """
body { font-family: system-ui, sans-serif; margin: 1.5em auto; max-width: 1200px; color: #222;
       padding: 0 1em; line-height: 1.4; }
h1 { border-bottom: 3px solid #21618c; padding-bottom: .2em; }
h2 { border-bottom: 1px solid #ccc; margin-top: 2em; }
.notice { border: 3px solid #b2182b; background: #fdecea; padding: .8em 1em; font-weight: 600; }
.safety { border: 2px solid #e08214; background: #fff4e5; padding: .5em 1em; }
.warn { color: #8a4b00; background: #fff4e5; padding: .2em .5em; }
table { border-collapse: collapse; margin: .6em 0; font-size: .9em; }
th, td { border: 1px solid #bbb; padding: .2em .5em; text-align: left; }
th { background: #eef3f7; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
tr.fail td { background: #fbe3e4; } tr.near td { background: #fff1dc; }
tr.ambient td { color: #777; }
img { max-width: 100%; border: 1px solid #ddd; }
pre { background: #f6f6f6; padding: .5em; overflow-x: auto; font-size: .85em; }
"""

_RESULT_COLUMNS = (("freq_hz", "frequency (MHz)"), ("level", "level"), ("detector", "detector"),
                   ("limit_level", "limit"), ("margin_db", "margin (dB)"),
                   ("polarization", "polarization"), ("height_m", "height (m)"),
                   ("azimuth_deg", "azimuth (deg)"), ("status", "status"), ("note", "note"))
_HOT_SPOT_COLUMNS = (("freq_hz", "frequency (MHz)"), ("level", "level"), ("x_m", "x (mm)"),
                     ("y_m", "y (mm)"), ("rotation_deg", "probe rotation (deg)"),
                     ("prominence_db", "prominence (dB)"))
_MAX_EVENTS = 500


def esc(value) -> str:
    """HTML-escaped text of any value (quotes too)."""
    return html.escape("" if value is None else str(value), quote=True)


def safe_name(label: str) -> str:
    """A file-name-safe form of a step label."""
    return re.sub(r"[^A-Za-z0-9._-]+", "_", str(label)).strip("._") or "step"


def embed_png(path: Path, alt: str) -> str:
    """An ``<img>`` element holding the PNG as a base64 data URI."""
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    return f'<img alt="{esc(alt)}" src="data:image/png;base64,{data}">'


def _cell(value, fmt: str | None) -> tuple[str, bool]:
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "", False
    if fmt and isinstance(value, (int, float, np.number)) and not isinstance(value, bool):
        return esc(format(value, fmt)), True
    return esc(value), False


def html_table(df: pd.DataFrame, columns, *, formats=None, row_class=None) -> str:
    """An HTML table of selected DataFrame columns.

    Parameters
    ----------
    df : pandas.DataFrame
        Rows to show.
    columns : sequence of (column, heading)
        Columns in order and their headings; missing columns are skipped.
    formats : dict, optional
        column -> format spec (numbers only), or a callable value -> value before formatting.
    row_class : str, optional
        Column whose value becomes the row's CSS class (e.g. status).
    """
    formats = formats or {}
    cols = [(c, h) for c, h in columns if c in df.columns]
    head = "".join(f"<th>{esc(h)}</th>" for _, h in cols)
    rows = []
    for i in range(len(df)):
        # column by column keeps each column's dtype (a row Series would cast ints to float)
        row = {c: df[c].iat[i] for c in df.columns}
        cells = []
        for c, _ in cols:
            spec = formats.get(c)
            value = row[c]
            if callable(spec):
                value, spec = spec(value)
            text, numeric = _cell(value, spec)
            cells.append(f'<td class="num">{text}</td>' if numeric else f"<td>{text}</td>")
        cls = f' class="{esc(row[row_class])}"' if row_class and row_class in df.columns else ""
        rows.append(f"<tr{cls}>{''.join(cells)}</tr>")
    return f"<table><tr>{head}</tr>{''.join(rows)}</table>"


def _mhz(value):
    return (None if value is None else value / 1e6), ".4f"


def _mm(value):
    return (None if value is None else value * 1e3), ".1f"


def _file_text(entry: dict) -> str:
    text = str(entry.get("path", ""))
    return f"{text} (sha256 {entry['sha256']})" if entry.get("sha256") else text


def _identity(manifest: dict) -> str:
    seq, bench = manifest.get("sequence", {}), manifest.get("bench", {})
    rows = [("sequence name", manifest.get("name")), ("created", manifest.get("created")),
            ("state", manifest.get("state")), ("software", manifest.get("software")),
            ("simulated bench", "yes" if manifest.get("simulated") else "no"),
            ("sequence file", _file_text(seq)), ("bench file", _file_text(bench))]
    rows += [(f"instrument: {k}", v) for k, v in manifest.get("instruments", {}).items()]
    body = "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in rows)
    files = "".join(f"<details><summary>{esc(name)} as run</summary><pre>{esc(e['text'])}</pre>"
                    "</details>" for name, e in (("sequence", seq), ("bench file", bench))
                    if e.get("text"))
    return f"<table>{body}</table>{files}"


def _safety() -> str:
    items = "".join(f"<li>{esc(c)}</li>" for c in SAFETY_CAUTIONS)
    return f'<h2>Safety</h2><div class="safety"><ul>{items}</ul></div>'


def _plan(manifest: dict) -> str:
    plan = manifest.get("plan") or []
    if not plan:
        return "<h2>Plan</h2><p>No plan recorded.</p>"
    return "<h2>Plan</h2><ul>" + "".join(f"<li>{esc(p)}</li>" for p in plan) + "</ul>"


def _warnings_html(warnings: list[str]) -> str:
    return "".join(f'<p class="warn">{esc(w)}</p>' for w in warnings)


class _StepWriter:
    """Renders one step's section, collecting PNGs in ``plots/``."""

    def __init__(self, run, info: dict, views: "MapViews | None" = None) -> None:
        self.run = run
        self.info = info
        self.views = views or MapViews()
        self.label = str(info.get("label"))
        self.kind = str(info.get("kind", ""))
        self.plots_dir = Path(run.folder) / "plots"
        self.warnings: list[str] = []
        self.parts: list[str] = []

    def png(self, suffix: str) -> Path:
        return self.plots_dir / f"{safe_name(self.label)}-{suffix}.png"

    def _try(self, what: str, fn):
        try:
            return fn()
        except BenchError as exc:
            self.warnings.append(f"{what}: {exc}")
            return None

    def render(self) -> str:
        title = f"Step {self.label} ({self.kind})"
        has_traces = not self.run.traces(self.label).empty
        results = self.run.results(self.label)
        if not has_traces and results.empty:
            return f"<h2>{esc(title)}</h2><p>No data: the run did not reach this step.</p>"
        spectrum = self._try("corrected spectrum", lambda: runview.corrected_spectrum(
            self.run, self.label)) if has_traces else None
        spots = None
        if self.kind == "grid" and has_traces:
            spots = self._try("hot spots", lambda: maps_mod.hot_spots(self.run, self.label))
        if spectrum is not None:
            marks = results[["freq_hz", "level", "status"]].dropna(subset=["level"]) \
                if not results.empty else None
            if spots is not None and len(spots):
                marks = spots[["freq_hz", "level"]].assign(status="hot spot")
            self._spectrum(spectrum, marks)
        if self.kind == "grid" and has_traces:
            self._grid(spots)
        elif not results.empty:
            self._results(results, spectrum.unit if spectrum else "")
        if spectrum is not None:
            self.parts.append(f"<h3>Transducer chain</h3><pre>{esc(spectrum.chain_text)}</pre>")
        return (f"<h2>{esc(title)}</h2>{self._settings()}{_warnings_html(self.warnings)}"
                + "".join(self.parts))

    def _settings(self) -> str:
        keys = ("sweep", "limit", "distance_m", "unit", "ambient", "probe", "probe_kind",
                "margin_db")
        items = [f"{k} = {self.info[k]}" for k in keys if k in self.info]
        return f"<p>{esc('; '.join(items))}</p>" if items else ""

    def _spectrum(self, spectrum, marks) -> None:
        limit = self._try("limit", lambda: runview.step_limit(self.run, self.label,
                                                              warnings=self.warnings))
        ambient = self._ambient(spectrum.unit)
        path = plots.spectrum_png(self.png("spectrum"), spectrum.freq_hz, spectrum.level,
                                  unit=spectrum.unit, title=f"{self.label} (max over poses)",
                                  ambient=ambient, limits=limit, suspects=marks)
        self.parts.append(embed_png(path, f"spectrum of {self.label}"))
        if limit is not None:
            self.parts.append(f"<p>Limit: {esc(limit.title)}. Source: {esc(limit.source)}</p>")

    def _ambient(self, unit: str):
        label = self.info.get("ambient")
        if not label or self.run.traces(label).empty:
            return None
        amb = self._try(f"ambient {label!r}", lambda: runview.corrected_spectrum(self.run, label))
        if amb is not None and amb.unit != unit:
            self.warnings.append(f"ambient step {label!r} is in {amb.unit}, this step in {unit}: "
                                 "not overlaid")
            return None
        return None if amb is None else (amb.freq_hz, amb.level)

    def _results(self, results: pd.DataFrame, unit: str) -> None:
        unit_text = runview.UNIT_TEXT.get(unit, unit)
        table = results.sort_values("freq_hz")
        self.parts.append(f"<h3>Results ({len(table)} frequencies, levels in "
                          f"{esc(unit_text)})</h3>")
        self.parts.append(html_table(table, _RESULT_COLUMNS, row_class="status", formats={
            "freq_hz": _mhz, "level": ".2f", "limit_level": ".2f", "margin_db": ".2f",
            "height_m": ".2f", "azimuth_deg": ".0f"}))

    def _map(self, gm, suffix: str, board: dict, photo_path, spots) -> Path:
        common = {"outline_m": board.get("outline_m"), "title": f"{self.label}: {gm.what}",
                  "unit": gm.unit, "hot_spots": spots}
        if photo_path is not None:
            try:
                return plots.map_png(self.png(suffix), gm, photo=photo_path,
                                     photo_points=board.get("photo_points"), **common)
            except (BenchError, OSError, ValueError, KeyError, TypeError) as exc:
                self.warnings.append(f"board photo not drawn: {exc}")
        return plots.map_png(self.png(suffix), gm, **common)

    def _grid(self, spots) -> None:
        board = self.run.manifest().get("board", {})
        photo = board.get("photo")
        photo_path = Path(self.run.folder) / photo if photo else None
        if photo_path is not None and not photo_path.is_file():
            self.warnings.append(f"board photo {photo} not found in the run folder")
            photo_path = None
        views = [("map", {})]  # maximum over the whole span
        if spots is not None and len(spots):
            # one map per flagged peak, strongest first (as many as asked for)
            for rank, freq in enumerate(spots["freq_hz"].head(self.views.peaks), start=1):
                views.append((f"map-peak{rank}", {"freq_hz": float(freq)}))
        for freq in self.views.freqs_hz:
            views.append((f"map-{freq / 1e6:.6g}MHz", {"freq_hz": float(freq)}))
        for lo, hi in self.views.bands_hz:
            views.append((f"map-{lo / 1e6:.6g}-{hi / 1e6:.6g}MHz", {"band_hz": (float(lo), float(hi))}))
        for suffix, kwargs in views:
            gm = self._try("map", lambda kw=kwargs: maps_mod.grid_maps(self.run, self.label, **kw))
            if gm is None:
                continue
            path = self._map(gm, suffix, board, photo_path, spots)
            self.parts.append(embed_png(path, f"map of {self.label} {gm.what}"))
            peak = self._try("combined map", gm.peak)
            if peak is None:
                continue
            x, y, level = peak
            self.parts.append(f"<p>Combined-map maximum {level:.1f} "
                              f"{esc(runview.UNIT_TEXT.get(gm.unit, gm.unit))} at x = "
                              f"{x * 1e3:.1f} mm, y = {y * 1e3:.1f} mm ({esc(gm.what)}).</p>")
        if spots is not None:
            self.parts.append("<h3>Hot spots (numbered on the maps)</h3>")
            numbered = spots.reset_index(drop=True)
            numbered.insert(0, "rank", np.arange(1, len(numbered) + 1))
            self.parts.append(html_table(numbered, (("rank", "#"),) + _HOT_SPOT_COLUMNS,
                                         formats={"freq_hz": _mhz, "level": ".2f", "x_m": _mm,
                                                  "y_m": _mm, "rotation_deg": ".0f",
                                                  "prominence_db": ".1f"}))


def _events(run) -> str:
    events = run.events()
    if events.empty:
        return "<h2>Events</h2><p>No faults, reconnects or other events were recorded.</p>"
    shown = events.tail(_MAX_EVENTS).copy()
    shown["time"] = [time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(t)) + "Z"
                     for t in shown["t_wall"]]
    note = (f"<p>Showing the last {_MAX_EVENTS} of {len(events)} events.</p>"
            if len(events) > _MAX_EVENTS else "")
    table = html_table(shown, (("time", "time (UTC)"), ("level", "level"), ("text", "event")))
    return f"<h2>Events</h2>{note}{table}"


def page(title: str, body: str) -> str:
    """A complete offline HTML page (inline CSS, no scripts)."""
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{esc(title)}</title><style>{PAGE_CSS}</style></head>"
            f"<body>{body}</body></html>\n")


@dataclass(frozen=True)
class MapViews:
    """Which near-field maps a report draws besides the maximum over the whole span.

    Attributes
    ----------
    peaks : int
        One map at each of the strongest flagged peaks (hot-spot frequencies), up to this many.
    freqs_hz : tuple of float
        Maps at these frequencies (nearest trace bin).
    bands_hz : tuple of (float, float)
        Maps of the maximum over these bands.
    """

    peaks: int = 3
    freqs_hz: tuple = ()
    bands_hz: tuple = ()


def write_report(run, views: MapViews | None = None) -> Path:
    """Write ``report.html`` (self-contained) and the PNGs in ``plots/`` of a run folder.

    Parameters
    ----------
    run : bench.store.RunStore
        Open run folder (read-only is enough).
    views : MapViews, optional
        Extra near-field maps (default: the three strongest flagged peaks).

    Returns
    -------
    pathlib.Path
        The HTML file.
    """
    manifest = run.manifest()
    (Path(run.folder) / "plots").mkdir(exist_ok=True)
    name = manifest.get("name", Path(run.folder).name)
    parts = [f"<h1>Pre-scan report: {esc(name)}</h1>",
             f'<div class="notice">{esc(DISCLAIMER)}</div>',
             "<h2>Run</h2>", _identity(manifest)]
    if manifest.get("state") != "complete":
        parts.append(f'<p class="warn">This run is {esc(manifest.get("state", "unknown"))}: '
                     "steps after the interruption have no data.</p>")
    parts += [_safety(), _plan(manifest)]
    for info in manifest.get("steps", []):
        parts.append(_StepWriter(run, info, views).render())
    parts.append(_events(run))
    parts.append(f'<div class="notice">{esc(DISCLAIMER)}</div>')
    out = Path(run.folder) / "report.html"
    out.write_text(page(f"Pre-scan report: {name}", "".join(parts)), encoding="utf-8")
    return out
