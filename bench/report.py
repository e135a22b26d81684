"""The HTML report of a run: one self-contained file that opens offline.

``report.html`` in the run folder holds everything inline (see :mod:`bench.htmlkit`). The same
PNGs are also written to the run's ``plots/`` folder. Each step's section is drawn by its kind
(:meth:`bench.steps.base.StepKind.report_section`) with the help of a :class:`StepWriter`.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from bench import plots
from bench.analysis import runview
from bench.errors import BenchError, StoreError
from bench.htmlkit import DISCLAIMER, embed_png, esc, html_table, mhz, page, safe_name
from bench.steps import KINDS

__all__ = ["DISCLAIMER", "SAFETY_CAUTIONS", "MapViews", "StepWriter", "write_report"]

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

_RESULT_COLUMNS = (("freq_hz", "frequency (MHz)"), ("level", "level"), ("detector", "detector"),
                   ("limit_level", "limit"), ("margin_db", "margin (dB)"),
                   ("polarization", "polarization"), ("height_m", "height (m)"),
                   ("azimuth_deg", "azimuth (deg)"), ("status", "status"), ("note", "note"))
_MAX_EVENTS = 500


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


class StepWriter:
    """Collects one step's section: pictures in ``plots/``, HTML parts, warnings.

    Step kinds call its helpers from their ``report_section``; the writer knows nothing of
    any kind.
    """

    def __init__(self, run, info: dict, views: "MapViews | None" = None) -> None:
        self.run = run
        self.info = info
        self.views = views or MapViews()
        self.label = str(info.get("label"))
        self.kind = str(info.get("kind", ""))
        self.plots_dir = Path(run.folder) / "plots"
        self.warnings: list[str] = []
        self.parts: list[str] = []
        self._spectrum = None

    def png(self, suffix: str) -> Path:
        """Path of one of the step's pictures."""
        return self.plots_dir / f"{safe_name(self.label)}-{suffix}.png"

    def attempt(self, what: str, fn):
        """``fn()``, or None with a warning on the page when it raises a BenchError."""
        try:
            return fn()
        except BenchError as exc:
            self.warnings.append(f"{what}: {exc}")
            return None

    def has_traces(self) -> bool:
        return not self.run.traces(self.label).empty

    def results(self) -> pd.DataFrame:
        return self.run.results(self.label)

    def spectrum(self):
        """The step's corrected spectrum (max over poses), or None without traces."""
        if self._spectrum is None and self.has_traces():
            self._spectrum = self.attempt("corrected spectrum", lambda: runview.corrected_spectrum(
                self.run, self.label))
        return self._spectrum

    def render(self) -> str:
        title = f"Step {self.label} ({self.kind})"
        if not self.has_traces() and self.results().empty:
            return f"<h2>{esc(title)}</h2><p>No data: the run did not reach this step.</p>"
        kind = KINDS.get(self.kind)
        if kind is None:
            self.warnings.append(f"unknown step kind {self.kind!r}: drawn as a plain sweep")
            kind = KINDS["sweep"]
        kind.report_section(self)
        return (f"<h2>{esc(title)}</h2>{self._settings()}{_warnings_html(self.warnings)}"
                + "".join(self.parts))

    def _settings(self) -> str:
        keys = ("sweep", "limit", "distance_m", "unit", "ambient", "probe", "probe_kind",
                "margin_db")
        items = [f"{k} = {self.info[k]}" for k in keys if k in self.info]
        return f"<p>{esc('; '.join(items))}</p>" if items else ""

    def spectrum_picture(self, spectrum, marks) -> None:
        """The spectrum with its limit line, the ambient overlay and the marked frequencies."""
        limit = self.attempt("limit", lambda: runview.step_limit(self.run, self.label,
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
        amb = self.attempt(f"ambient {label!r}", lambda: runview.corrected_spectrum(self.run, label))
        if amb is not None and amb.unit != unit:
            self.warnings.append(f"ambient step {label!r} is in {amb.unit}, this step in {unit}: "
                                 "not overlaid")
            return None
        return None if amb is None else (amb.freq_hz, amb.level)

    def results_table(self, results: pd.DataFrame, unit: str) -> None:
        """The step's result rows (suspects, readings) with their margins."""
        unit_text = runview.UNIT_TEXT.get(unit, unit)
        table = results.sort_values("freq_hz")
        self.parts.append(f"<h3>Results ({len(table)} frequencies, levels in "
                          f"{esc(unit_text)})</h3>")
        self.parts.append(html_table(table, _RESULT_COLUMNS, row_class="status", formats={
            "freq_hz": mhz, "level": ".2f", "limit_level": ".2f", "margin_db": ".2f",
            "height_m": ".2f", "azimuth_deg": ".0f"}))

    def chain_block(self, spectrum) -> None:
        """The transducer chain the levels went through."""
        self.parts.append(f"<h3>Transducer chain</h3><pre>{esc(spectrum.chain_text)}</pre>")


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


@dataclass(frozen=True)
class MapViews:
    """Which near-field maps a report draws besides the maximum over the whole span.

    Attributes
    ----------
    peaks : int
        One map at each of the strongest emission peaks of a grid step, up to this many.
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
    try:
        return _write_report(run, views)
    except OSError as exc:
        raise StoreError(f"{run.folder}: cannot write the report: {exc.strerror or exc}") from None


def _write_report(run, views: MapViews | None) -> Path:
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
        parts.append(StepWriter(run, info, views).render())
    parts.append(_events(run))
    parts.append(f'<div class="notice">{esc(DISCLAIMER)}</div>')
    out = Path(run.folder) / "report.html"
    out.write_text(page(f"Pre-scan report: {name}", "".join(parts)), encoding="utf-8")
    return out
