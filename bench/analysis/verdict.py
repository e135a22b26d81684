"""The verdict of a run: did it pass, by how much, where, and what to look at next.

One value computed from the stored results, shown the same way on the terminal and at the top
of the report. Which readings decide: for a prescan whose suspects a final step remeasured, the
final readings that have a limit line (quasi-peak, average: the detectors the standard names);
for any other step with a limit, its own readings. Ambient signals and readings with no limit
line (``info``) never decide. Readings are counted per frequency, each frequency by its worst
reading:

* ``fail``: over the limit (margin < 0 dB);
* ``marginal``: within the step's margin below the limit (the trade's word for a reading that
  passes by too little to trust a pre-scan: site, cable layout and detector differences move
  results by several dB, common practice);
* ``pass``: below the limit by more than the margin.

A pre-scan is an estimate, not a compliance verdict.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

__all__ = ["Verdict", "verdict_of", "deciding_rows", "finding_text", "UNIT_TEXT"]

#: Display text of each level unit.
UNIT_TEXT = {"dbuv": "dBµV", "dbuv_per_m": "dBµV/m", "dbua_per_m": "dBµA/m", "dbm": "dBm"}
_ORDER = {"fail": 0, "marginal": 1, "pass": 2}


@dataclass(frozen=True)
class Verdict:
    """The outcome of a run.

    Attributes
    ----------
    status : str
        ``"FAIL"``, ``"MARGINAL"``, ``"PASS"`` or ``"NO LIMIT"`` (nothing compared with a line).
    worst : dict or None
        The deciding reading with the lowest margin (a results row).
    counts : dict
        Frequencies per status: ``fail``, ``marginal``, ``pass``.
    findings : pandas.DataFrame
        The deciding readings, worst margin first, one row per frequency.
    """

    status: str
    worst: dict | None
    counts: dict = field(default_factory=dict)
    findings: pd.DataFrame = field(default_factory=pd.DataFrame)

    def line(self) -> str:
        """One line: ``FAIL  worst margin -3.5 dB at 200.000 MHz (...); 2 fail, 5 marginal, 31 pass``."""
        if self.worst is None:
            return ("NO LIMIT  no reading of this run is compared with a limit line "
                    "(near-field scans and plain sweeps give levels, not a verdict)")
        counts = ", ".join(f"{self.counts.get(k, 0)} {k}" for k in ("fail", "marginal", "pass"))
        return (f"{self.status:<8s} worst margin {self.worst['margin_db']:+.1f} dB at "
                f"{finding_text(self.worst)}; {counts}")


def finding_text(row: dict) -> str:
    """``200.000 MHz (quasi-peak, horizontal, 1.50 m, 90°)``: a reading's frequency and pose."""
    parts = [str(row.get("detector") or "")]
    if isinstance(row.get("polarization"), str) and row["polarization"]:
        parts.append(row["polarization"])
    for key, fmt in (("height_m", "{:.2f} m"), ("azimuth_deg", "{:.0f}°")):
        value = row.get(key)
        if value is not None and np.isfinite(float(value)):
            parts.append(fmt.format(float(value)))
    return f"{float(row['freq_hz']) / 1e6:.3f} MHz ({', '.join(p for p in parts if p)})"


def deciding_rows(results: pd.DataFrame, remeasured: dict[str, str]) -> pd.DataFrame:
    """The readings that decide the verdict (see the module text).

    Parameters
    ----------
    results : pandas.DataFrame
        Every result row of the run.
    remeasured : dict
        Label of a step whose suspects a final step remeasured -> label of that final step.
    """
    if results.empty:
        return results
    rows = results[results["status"].isin(tuple(_ORDER)) & results["margin_db"].notna()]
    # a remeasured step's suspects are decided by the final readings; its peaks that passed with
    # margin stay: a peak reading below the lowest line meets every line (peak >= quasi-peak >=
    # average for one signal, CISPR 16-1-1 detector definitions)
    superseded = rows["step_label"].isin(tuple(remeasured)) & (rows["status"] != "pass")
    return rows[~superseded]


def verdict_of(results: pd.DataFrame, remeasured: dict[str, str]) -> Verdict:
    """The verdict of a run from its results (see :func:`deciding_rows`)."""
    rows = deciding_rows(results, remeasured)
    if not rows.empty:
        rows = rows[~_covered_by_finals(rows, remeasured)]
    if rows.empty:
        return Verdict("NO LIMIT", None, {}, rows)
    rows = rows.assign(_rank=rows["status"].map(_ORDER)).sort_values(["_rank", "margin_db"], kind="stable")
    per_freq = rows.drop_duplicates(subset=["step_label", "freq_hz"], keep="first")
    counts = per_freq["status"].value_counts().to_dict()
    worst = per_freq.sort_values("margin_db", kind="stable").iloc[0].to_dict()
    status = "FAIL" if counts.get("fail") else "MARGINAL" if counts.get("marginal") else "PASS"
    findings = per_freq.sort_values("margin_db", kind="stable").drop(columns="_rank").reset_index(drop=True)
    worst.pop("_rank", None)
    return Verdict(status, worst, {k: int(v) for k, v in counts.items()}, findings)


def _covered_by_finals(rows: pd.DataFrame, remeasured: dict[str, str]) -> pd.Series:
    """Passing prescan peaks at a frequency a final step also read (counted once, by the final)."""
    covered = pd.Series(False, index=rows.index)
    for prescan, final in remeasured.items():
        finals = rows.loc[rows["step_label"] == final, "freq_hz"].to_numpy(float)
        if finals.size == 0:
            continue
        mine = rows["step_label"] == prescan
        near = np.abs(rows.loc[mine, "freq_hz"].to_numpy(float)[:, None] - finals[None, :]).min(axis=1) < 1e6
        covered.loc[mine] = near
    return covered
