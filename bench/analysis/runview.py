"""A run folder through its manifest: step settings, transducer chains, corrected spectra, limits.

The store keeps what the analyzer read (dBuV at its 50 ohm input); the manifest says, per step,
which transducer tables turn that into a field (``chain``, files relative to the run folder),
the unit after correction (``unit``), the limit to compare with (``limit``) and the site distance
(``distance_m``). This module joins the two so the report, the maps and the comparison all apply
corrections the same way.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from bench import units
from bench.analysis.limits import LimitSet, load_limit, near_field_warnings
from bench.analysis.transducers import TransducerChain, load_table
from bench.errors import AnalysisError

__all__ = [
    "CorrectedSpectrum",
    "UNIT_TEXT",
    "board_size_m",
    "corrected_spectrum",
    "join_segments",
    "step_chain",
    "step_info",
    "step_labels",
    "step_limit",
    "step_rbw_hz",
    "step_span_hz",
]

#: Display text of each level unit.
UNIT_TEXT = {"dbuv": "dBuV", "dbuv_per_m": "dBuV/m", "dbua_per_m": "dBuA/m", "dbm": "dBm"}
_NO_CHAIN_TEXT = "dBuV = reading dBuV (no transducer chain)"


@dataclass(frozen=True)
class CorrectedSpectrum:
    """A step's spectrum after the transducer chain.

    Attributes
    ----------
    freq_hz : numpy.ndarray
        Frequencies in Hz (all segments joined).
    level : numpy.ndarray
        Levels in ``unit`` (reduced over the step's poses).
    unit : str
        ``"dbuv"``, ``"dbuv_per_m"`` or ``"dbua_per_m"``.
    chain_text : str
        Description of the chain applied (one line per table).
    """

    freq_hz: np.ndarray
    level: np.ndarray
    unit: str
    chain_text: str


def join_segments(freq_hz, level) -> tuple[np.ndarray, np.ndarray]:
    """Sort joined segments by frequency; where two segments share a frequency keep the higher.

    Adjacent sweep segments may both measure their common edge frequency; peak search and
    comparisons need strictly increasing frequencies.
    """
    freq = np.asarray(freq_hz, dtype=float)
    level = np.asarray(level, dtype=float)
    order = np.lexsort((-np.nan_to_num(level, nan=-np.inf), freq))
    freq, level = freq[order], level[order]
    keep = np.r_[True, np.diff(freq) > 0]
    return freq[keep], level[keep]


def step_labels(run) -> list[str]:
    """Labels of the manifest's steps, in plan order."""
    return [str(s.get("label")) for s in run.manifest().get("steps", [])]


def step_info(run, label: str) -> dict:
    """The manifest's ``[[steps]]`` entry for ``label``.

    Raises
    ------
    AnalysisError
        The manifest has no step with that label.
    """
    steps = run.manifest().get("steps", [])
    for step in steps:
        if step.get("label") == label:
            return dict(step)
    known = ", ".join(repr(s.get("label")) for s in steps) or "none"
    raise AnalysisError(f"{run.folder}: no step {label!r} in the manifest (steps: {known})")


def step_chain(run, label: str) -> TransducerChain | None:
    """The transducer chain of a step (tables relative to the run folder), or None without one."""
    entries = step_info(run, label).get("chain") or []
    if not entries:
        return None
    tables = []
    for entry in entries:
        path = Path(entry["file"])
        if not path.is_absolute():
            path = Path(run.folder) / path
        # named as the run folder names it (tables/...), not by where the folder lies today
        tables.append(replace(load_table(path, role=entry.get("role")), origin=str(entry["file"])))
    return TransducerChain(tuple(tables))


def _step_unit(info: dict, chain: TransducerChain | None, label: str) -> str:
    produced = chain.result_quantity if chain is not None else "dbuv"
    unit = info.get("unit", produced)
    if unit != produced:
        raise AnalysisError(f"step {label!r}: the manifest says unit {unit!r} but its chain "
                            f"produces {produced!r}")
    return unit


def _raw_unit_offset_db(run, label: str) -> float:
    """dB to add to stored readings to get dBuV (stored traces are dBuV; dBm is accepted)."""
    stored = set(run.traces(label)["unit"])
    if stored == {"dbuv"}:
        return 0.0
    if stored == {"dbm"}:
        return float(units.dbm_to_dbuv(0.0))  # dBuV = dBm + 106.99 at 50 ohm (derived, docs/physics.md 1)
    raise AnalysisError(f"step {label!r}: expected traces stored in dbuv, found {sorted(stored)}")


def corrected_spectrum(run, label: str, reduce: str = "max") -> CorrectedSpectrum:
    """Spectrum of a step (segments joined, max or mean over poses) after its transducer chain.

    Parameters
    ----------
    run : bench.store.RunStore
        Open run folder.
    label : str
        Step label.
    reduce : str
        ``"max"`` or ``"mean"`` over the step's poses, point by point.

    Raises
    ------
    AnalysisError
        Unknown step, a chain table that does not cover the sweep, or a unit that disagrees
        with the chain.
    """
    info = step_info(run, label)
    chain = step_chain(run, label)
    unit = _step_unit(info, chain, label)
    freq_hz, raw = join_segments(*run.step_spectrum(label, reduce=reduce))
    raw = raw + _raw_unit_offset_db(run, label)
    if chain is None:
        return CorrectedSpectrum(freq_hz, raw, unit, _NO_CHAIN_TEXT)
    return CorrectedSpectrum(freq_hz, chain.correct(freq_hz, raw), unit, chain.describe())


def step_span_hz(run, label: str) -> tuple[float, float]:
    """Lowest start and highest stop frequency of a step's traces, in Hz."""
    meta = run.traces(label)
    if meta.empty:
        raise AnalysisError(f"{run.folder}: step {label!r} has no traces")
    return float(meta["start_hz"].min()), float(meta["stop_hz"].max())


def step_rbw_hz(run, label: str) -> float:
    """Widest resolution bandwidth used by a step, in Hz (NaN when it has no traces)."""
    meta = run.traces(label)
    return float(meta["rbw_hz"].max()) if not meta.empty else float("nan")


def board_size_m(run) -> float | None:
    """Diagonal of the board outline's bounding box in m (the product size D), or None."""
    outline = run.manifest().get("board", {}).get("outline_m")
    if not outline:
        return None
    pts = np.asarray(outline, dtype=float)
    return float(np.hypot(*(pts.max(axis=0) - pts.min(axis=0))))


def _load_step_limit(run, name: str) -> LimitSet:
    if name.endswith(".toml") or "/" in name:
        path = Path(name)
        return load_limit(path if path.is_absolute() else Path(run.folder) / path)
    return load_limit(name)


def step_limit(run, label: str, *, warnings: list[str] | None = None) -> LimitSet | None:
    """The limit set of a step, moved to the step's distance, or None when it names none.

    Parameters
    ----------
    run : bench.store.RunStore
        Open run folder.
    label : str
        Step label.
    warnings : list of str, optional
        When given, near-field warnings for the step's distance over its frequency span
        (:func:`bench.analysis.limits.near_field_warnings`, product size from the board
        outline) are appended to it.

    Returns
    -------
    LimitSet or None
        Converted at 20 dB/decade (far-field rule, FCC 47 CFR 15.31(f)(1)) when the limit's
        distance differs from the step's ``distance_m``.

    Raises
    ------
    AnalysisError
        The limit's quantity differs from the step's unit.
    """
    info = step_info(run, label)
    name = info.get("limit")
    if not name:
        return None
    limit = _load_step_limit(run, str(name))
    unit = _step_unit(info, step_chain(run, label), label)
    if limit.quantity != unit:
        raise AnalysisError(f"step {label!r}: limit {limit.name!r} is in {limit.quantity}, the "
                            f"step's corrected level is in {unit}")
    distance_m = info.get("distance_m")
    if distance_m is None or limit.distance_m is None:
        return limit
    distance_m = float(distance_m)
    if not np.isclose(distance_m, limit.distance_m, rtol=1e-9, atol=0.0):
        limit = limit.at_distance(distance_m, db_per_decade=20.0)
    if warnings is not None and not run.traces(label).empty:
        warnings.extend(near_field_warnings(distance_m, step_span_hz(run, label),
                                            board_size_m(run)))
    return limit
