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
from bench.analysis.verdict import UNIT_TEXT, verdict_of
from bench.cautions import analyzer_caution, cautions_for
from bench.htmlkit import DISCLAIMER, embed_png, esc, html_table, mhz, page, safe_name
from bench.steps import KINDS

__all__ = ["DISCLAIMER", "MapViews", "StepWriter", "write_report"]

_RESULT_COLUMNS = (("freq_hz", "Frequency (MHz)"), ("level", "Level ({unit})"), ("detector", "Detector"),
                   ("limit_level", "Limit ({unit})"), ("margin_db", "Margin (dB)"),
                   ("polarization", "Polarization"), ("height_m", "Height (m)"),
                   ("azimuth_deg", "Azimuth (°)"), ("status", "Status"), ("note", "Note"))
_FINDING_COLUMNS = (("step_label", "Step"),) + _RESULT_COLUMNS[:-1]
_MAX_EVENTS = 500


def _file_text(entry: dict) -> str:
    name = Path(str(entry.get("path", ""))).name
    return f"{name} (SHA-256 {entry['sha256'][:16]}…)" if entry.get("sha256") else name


def _run_details(manifest: dict) -> str:
    """Identity of the run, instruments, plan and the files as run (collapsed)."""
    seq, bench = manifest.get("sequence", {}), manifest.get("bench", {})
    rows = [("Sequence", manifest.get("name")), ("Started (UTC)", manifest.get("created")),
            ("State", manifest.get("state")), ("Software", manifest.get("software")),
            ("Simulated bench", "yes" if manifest.get("simulated") else "no"),
            ("Sequence file", _file_text(seq)), ("Bench file", _file_text(bench)),
            ("Confirmation before motion", "skipped (--unattended)" if manifest.get("unattended") else "asked")]
    rows += [(f"Instrument: {k}", v) for k, v in manifest.get("instruments", {}).items()]
    body = "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in rows)
    plan = "".join(f"<li>{esc(line)}</li>" for line in manifest.get("plan") or [])
    files = "".join(f"<details><summary>{esc(name)} as run</summary><pre>{esc(e['text'])}</pre>"
                    "</details>" for name, e in (("Sequence file", seq), ("Bench file", bench))
                    if e.get("text"))
    return (f"<h2>Run details</h2><details><summary>Identity, instruments and plan</summary>"
            f"<table>{body}</table><h3>Plan</h3><ul>{plan}</ul></details>{files}")


def _safety(manifest: dict) -> str:
    roles = {role for role in ("stage", "mast", "turntable", "supply") if role in manifest.get("instruments", {})}
    items = cautions_for(roles, analyzer_caution(manifest.get("analyzer_profile", "of this bench"),
                                                 float(manifest.get("analyzer_damage_dbm", 30.0))))
    return '<h2>Safety</h2><div class="safety"><ul>' + "".join(f"<li>{esc(c)}</li>" for c in items) + "</ul></div>"


def _warnings_html(warnings: list[str]) -> str:
    return "".join(f'<p class="warn">{esc(w)}</p>' for w in warnings)


class StepWriter:
    """Collects one step's section: pictures in ``plots/``, HTML parts, warnings.

    Step kinds call its helpers from their ``report_section``; the writer knows nothing of
    any kind. ``shared`` collects what the page shows once for all steps: the transducer
    chains and the pictures drawn (older pictures are removed).
    """

    def __init__(self, run, info: dict, views: "MapViews | None" = None, shared: dict | None = None) -> None:
        self.run = run
        self.info = info
        self.views = views or MapViews()
        self.label = str(info.get("label"))
        self.kind = str(info.get("kind", ""))
        self.shared = shared if shared is not None else {"chains": {}, "drawn": set()}
        self.plots_dir = self.shared.get("plots_dir", Path(run.folder) / "plots")
        self.warnings: list[str] = []
        self.parts: list[str] = []
        self.key_parts: list[str] = []
        self._spectrum = None

    def png(self, suffix: str) -> Path:
        """Path of one of the step's pictures (remembered as drawn by this report)."""
        path = self.plots_dir / f"{safe_name(self.label)}-{suffix}.png"
        self.shared["drawn"].add(path.name)
        return path

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
        kind = KINDS.get(self.kind)
        title = f"Step {self.label} ({self.kind})"
        if not self.has_traces() and self.results().empty:
            return f"<h2>{esc(title)}</h2><p>No data: the run did not reach this step.</p>"
        if kind is None:
            self.warnings.append(f"unknown step kind {self.kind!r}: drawn as a plain sweep")
            kind = KINDS["sweep"]
        kind.report_section(self)
        self._pick_key_picture(kind)
        return (f'<h2 id="step-{esc(safe_name(self.label))}">{esc(title)}</h2>{self._settings()}'
                f"{_warnings_html(self.warnings)}" + "".join(self.parts))

    def _pick_key_picture(self, kind) -> None:
        """A step compared with a limit, or a near-field map: its first picture goes to the top."""
        if not (self.info.get("limit") or not kind.far_field):
            return
        images = [i for i, part in enumerate(self.parts) if part.startswith("<img")]
        maps = [i for i in images if self.parts[i].startswith('<img alt="map of')]
        first = (maps or images or [None])[0]  # a near-field step's map says more than its spectrum
        if first is not None:
            self.key_parts.append(self.parts[first])
            self.parts[first] = (f'<p><a href="#key-{esc(safe_name(self.label))}">The picture of this step '
                                 "is at the top of the report.</a></p>")

    def _settings(self) -> str:
        return f'<p class="settings">{esc(settings_text(self.info))}</p>'

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
        """The step's result rows (suspects, readings) with their margins, collapsed."""
        table = results.sort_values("freq_hz")
        counts = table["status"].value_counts()
        said = ", ".join(f"{n} {k}" for k, n in counts.items())
        self.parts.append(f"<details><summary>All readings of this step ({len(table)}: {esc(said)})"
                          "</summary>" + html_table(table, _columns(_RESULT_COLUMNS, unit), row_class="status",
                                                    formats=_FORMATS) + "</details>")

    def chain_block(self, spectrum) -> None:
        """The transducer chain the levels went through: listed once for the whole report."""
        labels = self.shared["chains"].setdefault(spectrum.chain_text, [])
        labels.append(self.label)
        number = list(self.shared["chains"]).index(spectrum.chain_text) + 1
        self.parts.append(f'<p>Levels in {esc(UNIT_TEXT.get(spectrum.unit, spectrum.unit))}, corrected '
                          f'through <a href="#chains">transducer chain {number}</a>.</p>')


_FORMATS = {"freq_hz": mhz, "level": ".1f", "limit_level": ".1f", "margin_db": "+.1f",
            "height_m": ".2f", "azimuth_deg": ".0f"}


def _columns(columns, unit: str):
    text = UNIT_TEXT.get(unit, unit) or "dB"
    return tuple((c, h.format(unit=text)) for c, h in columns)


def _hz(value: float) -> str:
    from bench.units import format_hz

    return format_hz(float(value))


def settings_text(info: dict) -> str:
    """A step's settings in plain words: span, RBW, detector, trace, positions, limit."""
    st = info.get("settings") or {}
    words = []
    if st:
        words.append(f"{_hz(st['start_hz'])} to {_hz(st['stop_hz'])}, RBW {_hz(st['rbw_hz'])}"
                     + (f", VBW {_hz(st['vbw_hz'])}" if st.get("vbw_hz") else "")
                     + f", {st.get('detector', 'peak')} detector")
        trace = st.get("trace", "clear-write")
        words.append(trace if trace == "clear-write" else f"{trace} of {st.get('count', 1)} sweeps")
        if st.get("dwell_s"):
            words.append(f"dwell {st['dwell_s']:g} s")
    if info.get("positions"):
        words.append(f"{info['positions']} position{'s' if info['positions'] != 1 else ''} × "
                     f"{info.get('points_per_position', '?')} points")
    if info.get("limit"):
        words.append(f"limit {Path(str(info['limit'])).stem}")
    if info.get("distance_m") is not None:
        words.append(f"antenna at {float(info['distance_m']):g} m")
    if info.get("probe"):
        words.append(f"probe {info['probe']} ({info.get('probe_kind', '')})")
    if info.get("margin_db") is not None:
        words.append(f"suspects within {float(info['margin_db']):g} dB of the limit")
    if info.get("ambient"):
        words.append(f"ambient reference: step {info['ambient']}")
    if info.get("of"):
        words.append(f"remeasures the suspects of step {info['of']}")
    return "; ".join(words)


def _events(run) -> str:
    events = run.events()
    if events.empty:
        return "<h2>Events</h2><p>No faults, reconnects or other events were recorded.</p>"
    shown = events.tail(_MAX_EVENTS).copy()
    shown["time"] = [time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(t)) + "Z"
                     for t in shown["t_wall"]]
    note = (f"<p>Showing the last {_MAX_EVENTS} of {len(events)} events.</p>"
            if len(events) > _MAX_EVENTS else "")
    table = html_table(shown, (("time", "Time (UTC)"), ("level", "Level"), ("text", "Event")))
    return f"<h2>Events</h2><details><summary>{len(events)} events</summary>{note}{table}</details>"


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


def write_report(run, views: MapViews | None = None, *, name: str = "report") -> Path:
    """Write ``report.html`` (self-contained) and the PNGs in ``plots/`` of a run folder.

    Parameters
    ----------
    run : bench.store.RunStore
        Open run folder (read-only is enough).
    views : MapViews, optional
        Extra near-field maps (default: the three strongest flagged peaks).
    name : str
        ``<name>.html``; pictures of a report other than ``report`` go to ``plots-<name>/``.

    Returns
    -------
    pathlib.Path
        The HTML file.
    """
    try:
        return _write_report(run, views, name)
    except OSError as exc:
        raise StoreError(f"{run.folder}: cannot write the report: {exc.strerror or exc}") from None


def _write_report(run, views: MapViews | None, name: str) -> Path:
    manifest = run.manifest()
    plots_dir = Path(run.folder) / ("plots" if name == "report" else f"plots-{name}")
    plots_dir.mkdir(exist_ok=True)
    shared = {"chains": {}, "drawn": set(), "plots_dir": plots_dir}
    writers = [StepWriter(run, info, views, shared) for info in manifest.get("steps", [])]
    sections = [w.render() for w in writers]
    title = _title(manifest)
    parts = [f"<h1>{esc(title)}</h1>", _subtitle(manifest), _verdict(run, manifest),
             f'<div class="notice">{esc(DISCLAIMER)}</div>', _key_pictures(writers), _safety(manifest),
             *sections, _chains(shared["chains"]), _run_details(manifest), _events(run),
             f'<div class="notice">{esc(DISCLAIMER)}</div>']
    out = Path(run.folder) / f"{name}.html"
    out.write_text(page(title, "".join(parts)), encoding="utf-8")
    for old in plots_dir.glob("*.png"):  # pictures an earlier report drew and this one did not
        if old.name not in shared["drawn"]:
            old.unlink()
    return out


def _title(manifest: dict) -> str:
    eut = manifest.get("eut") or {}
    if not eut:
        return f"Pre-scan report: {manifest.get('name', '')}"
    text = eut["name"] + (f" rev {eut['revision']}" if eut.get("revision") else "")
    return f"Pre-scan report: {text}" + (f", serial {eut['serial']}" if eut.get("serial") else "")


def _subtitle(manifest: dict) -> str:
    bits = [f"sequence {manifest.get('name', '')}", f"started {manifest.get('created', '')} UTC",
            f"state {manifest.get('state', '')}"]
    sim = manifest.get("simulator")
    if manifest.get("simulated"):
        bits.append("simulated bench" + ("" if sim and sim.get("realtime") else
                                         " (accelerated clock: the run took seconds; the plan's times are a real "
                                         "bench's)"))
    notes = (manifest.get("eut") or {}).get("notes")
    if manifest.get("rejudged"):
        bits.append(f"judged again against {Path(str(manifest['rejudged']['limit'])).stem} from the stored data "
                    "(the report of the run as measured is report.html)")
    text = f'<p class="subtitle">{esc(" · ".join(bits))}</p>'
    if manifest.get("state") != "complete":
        text += (f'<p class="warn">This run is {esc(manifest.get("state", "unknown"))}: steps after '
                 "the interruption have no data.</p>")
    return text + (f"<p>Board notes: {esc(notes)}</p>" if notes else "")


def _verdict(run, manifest: dict) -> str:
    remeasured = {s["of"]: s["label"] for s in manifest.get("steps", []) if s.get("of")}
    verdict = verdict_of(run.results(), remeasured)
    box = f'<div class="verdict {esc(verdict.status.lower().replace(" ", "-"))}">{esc(verdict.line())}</div>'
    if verdict.findings.empty:
        return box
    shown = verdict.findings.head(10)
    units = set(shown["unit"])
    columns = _columns(_FINDING_COLUMNS, units.pop() if len(units) == 1 else "")
    return (box + f"<h2>Worst findings ({len(shown)} of {len(verdict.findings)} frequencies)</h2>"
            + html_table(shown, columns, row_class="status", formats=_FORMATS))


def _key_pictures(writers) -> str:
    parts = []
    for w in writers:
        for picture in w.key_parts:
            parts.append(f'<h3 id="key-{esc(safe_name(w.label))}">{esc(w.label)}</h3>{picture}')
    return "<h2>Pictures that matter</h2>" + "".join(parts) if parts else ""


def _chains(chains: dict) -> str:
    if not chains:
        return ""
    items = "".join(f"<h3>Chain {n} (steps {esc(', '.join(labels))})</h3><pre class=\"wrap\">{esc(text)}</pre>"
                    for n, (text, labels) in enumerate(chains.items(), start=1))
    return f'<h2 id="chains">Transducer chains</h2>{items}'
