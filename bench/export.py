"""Export a run for other tools: CSV with human column names and units, Parquet for analysis.

CSV (a spreadsheet, a colleague):

* ``traces.csv``: one row per stored trace, its settings and pose;
* ``spectra-<step>.csv``: every trace point, the analyzer reading (dBµV at its input) and beside
  it the level corrected through the step's transducer chain, in the step's unit;
* ``results.csv``: suspects and final readings with limits and margins.

Parquet (with ``pyarrow``): ``traces.parquet``, ``spectra.parquet`` (all steps, long format,
machine column names with units: ``freq_hz``, ``reading_dbuv``, ``level``, ``unit``) and
``results.parquet``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from bench.analysis import runview
from bench.analysis.verdict import UNIT_TEXT
from bench.errors import BenchError, ConfigError, StoreError
from bench.htmlkit import safe_name

__all__ = ["export_run"]

_TRACE_HEADINGS = {
    "id": "Trace", "step_label": "Step", "step_kind": "Kind", "segment": "Segment",
    "start_hz": "Start (Hz)", "stop_hz": "Stop (Hz)", "points": "Points", "rbw_hz": "RBW (Hz)",
    "vbw_hz": "VBW (Hz)", "detector": "Detector", "trace_mode": "Trace mode", "sweeps": "Sweeps",
    "board_powered": "Board powered", "x_m": "Probe x on board (m)", "y_m": "Probe y on board (m)",
    "z_m": "Probe height above board (m)", "rotation_deg": "Probe rotation (°)", "probe": "Probe",
    "height_m": "Antenna height (m)", "polarization": "Polarization", "azimuth_deg": "Azimuth (°)",
}


def export_run(run, out_dir: Path, *, parquet: bool = False) -> list[Path]:
    """Write the CSV (and Parquet) files of an open run; returns the files written.

    Raises
    ------
    StoreError
        The export folder cannot be created or written.
    ConfigError
        Parquet asked for without pyarrow installed.
    """
    out_dir = Path(out_dir)
    if parquet:
        _need_pyarrow()
    meta = run.traces()  # a damaged database fails here, before anything is written
    if out_dir.exists() and not out_dir.is_dir():
        raise ConfigError(f"{out_dir}: expected a folder for the export, found a file")
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
        return _write_all(run, meta, out_dir, parquet)
    except OSError as exc:
        raise StoreError(f"{out_dir}: cannot write the export: {exc.strerror or exc}") from None


def _need_pyarrow() -> None:
    try:
        import pyarrow  # noqa: F401
    except ImportError as exc:
        raise ConfigError("--parquet needs pyarrow: pip install 'emission-bench[parquet]'") from exc


def _write_all(run, meta: pd.DataFrame, out_dir: Path, parquet: bool) -> list[Path]:
    written = [_csv(_trace_table(meta), out_dir / "traces.csv")]
    spectra = []
    for label, group in meta.groupby("step_label", sort=False):
        table = _spectra(run, label, group)
        spectra.append(table)
        written.append(_csv(_human_spectra(table), out_dir / f"spectra-{safe_name(label)}.csv"))
    results = run.results()
    if not results.empty:
        written.append(_csv(_human_results(results), out_dir / "results.csv"))
    if parquet:
        written += _parquet(meta, spectra, results, out_dir)
    return written


def _csv(table: pd.DataFrame, path: Path) -> Path:
    table.to_csv(path, index=False)
    return path


def _trace_table(meta: pd.DataFrame) -> pd.DataFrame:
    table = meta.drop(columns=[c for c in ("unit", "t_wall", "action_index") if c in meta.columns])
    table.insert(len(table.columns), "Time (UTC)",
                 pd.to_datetime(meta["t_wall"], unit="s").dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ"))
    return table.rename(columns=_TRACE_HEADINGS)


def _spectra(run, label: str, group: pd.DataFrame) -> pd.DataFrame:
    """Long table of a step: trace id, frequency, reading (dBµV) and corrected level."""
    try:
        chain = runview.step_chain(run, label)
        unit = runview.step_info(run, label).get("unit", "dbuv")
    except BenchError:
        chain, unit = None, "dbuv"
    parts = []
    for tid in group["id"]:
        f, v = run.trace(int(tid))
        level = v if chain is None else chain.correct(f, v)
        parts.append(pd.DataFrame({"trace_id": int(tid), "step": label, "freq_hz": f,
                                   "reading_dbuv": v.astype(float), "level": np.asarray(level, float),
                                   "unit": unit}))
    return pd.concat(parts, ignore_index=True)


def _human_spectra(table: pd.DataFrame) -> pd.DataFrame:
    unit = UNIT_TEXT.get(str(table["unit"].iloc[0]), str(table["unit"].iloc[0]))
    out = pd.DataFrame({"Trace": table["trace_id"], "Frequency (Hz)": table["freq_hz"].round(1),
                        "Reading (dBµV)": table["reading_dbuv"].round(3),
                        f"Level ({unit})": table["level"].round(3)})
    return out


def _human_results(results: pd.DataFrame) -> pd.DataFrame:
    units = set(results["unit"].dropna())
    unit = UNIT_TEXT.get(units.pop(), "") if len(units) == 1 else ""
    suffix = f" ({unit})" if unit else ""
    out = pd.DataFrame({
        "Step": results["step_label"], "Frequency (Hz)": results["freq_hz"].round(1),
        f"Level{suffix}": results["level"].round(2), f"Limit{suffix}": results["limit_level"].round(2),
        "Margin (dB)": results["margin_db"].round(2), "Detector": results["detector"],
        "Status": results["status"], "Polarization": results["polarization"],
        "Antenna height (m)": results["height_m"], "Azimuth (°)": results["azimuth_deg"],
        "Note": results["note"], "Transducer chain": results["chain"]})
    if not unit:
        out.insert(3, "Unit", results["unit"].map(lambda u: UNIT_TEXT.get(u, u)))
    return out


def _parquet(meta, spectra, results, out_dir: Path) -> list[Path]:
    paths = [out_dir / "traces.parquet", out_dir / "spectra.parquet"]
    meta.to_parquet(paths[0], index=False)
    spectra_all = pd.concat(spectra, ignore_index=True) if spectra else pd.DataFrame()
    spectra_all.to_parquet(paths[1], index=False)
    if not results.empty:
        paths.append(out_dir / "results.parquet")
        results.to_parquet(paths[-1], index=False)
    return paths
