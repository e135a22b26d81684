"""Pieces of the self-contained HTML pages (report, comparison): escaping, tables, pictures.

Pages hold everything inline: CSS in a ``<style>`` element, pictures as
``data:image/png;base64`` URIs, no scripts and no external links. Every piece of text from a
run (labels, instrument replies, notes, events) is HTML-escaped.
"""

from __future__ import annotations

import base64
import html
import re
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["DISCLAIMER", "PAGE_CSS", "embed_png", "esc", "html_table", "mhz", "mm", "page",
           "safe_name"]

DISCLAIMER = (
    "A pre-scan is an estimate, not a compliance verdict. Bench set-ups, probes, cables and "
    "sites differ from an accredited test site; levels and margins here indicate risk only. "
    "Defer to the applicable standard, an accredited test house and local regulations."
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
tr.fail td { background: #fbe3e4; } tr.marginal td { background: #fff1dc; }
tr.ambient td { color: #777; }
img { max-width: 100%; border: 1px solid #ddd; }
pre { background: #f6f6f6; padding: .5em; overflow-x: auto; font-size: .85em; }
pre.wrap { white-space: pre-wrap; overflow-wrap: anywhere; }
.verdict { font-size: 1.25em; font-weight: 700; padding: .6em 1em; margin: 1em 0; border: 3px solid #555;
           font-family: ui-monospace, monospace; white-space: pre-wrap; }
.verdict.fail { border-color: #b2182b; background: #fbe3e4; }
.verdict.marginal { border-color: #e08214; background: #fff1dc; }
.verdict.pass { border-color: #1b7837; background: #e6f4ea; }
.subtitle { color: #555; }
.settings { color: #333; }
table { max-width: 100%; overflow-x: auto; display: block; }
summary { cursor: pointer; margin: .4em 0; }
"""

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


def mhz(value):
    """Format spec for a frequency in Hz shown in MHz (blank when missing)."""
    return (None if value is None or not np.isfinite(value) else value / 1e6), ".4f"


def mm(value):
    """Format spec for a length in m shown in mm (blank when missing)."""
    return (None if value is None else value * 1e3), ".1f"


def page(title: str, body: str) -> str:
    """A complete offline HTML page (inline CSS, no scripts)."""
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{esc(title)}</title><style>{PAGE_CSS}</style></head>"
            f"<body>{body}</body></html>\n")
