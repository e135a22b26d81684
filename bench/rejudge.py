"""Judge a stored run again against another limit set, without measuring again.

Class A instead of class B, another test distance, a customer's own limit file: the stored
traces and readings do not change, only the lines they are compared with. Each step kind that
compares with a limit recomputes its result rows (:meth:`bench.steps.base.StepKind.rejudge`);
the report is then written from a view of the run whose manifest names the new limit and whose
results are the recomputed rows, into ``report-<limit>.html`` beside the first report.
"""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path

import pandas as pd

from bench.analysis.limits import load_limit
from bench.errors import ConfigError
from bench.steps import KINDS

__all__ = ["RejudgedRun", "rejudge"]


class RejudgedRun:
    """A read-only view of a run judged against ``limit`` (every other method is the run's)."""

    def __init__(self, run, limit_ref: str, margin_db: float | None) -> None:
        self._run = run
        self.limit_ref = limit_ref
        self.margin_db = margin_db
        self._manifest = self._rewritten_manifest()
        self._results = self._rejudged_results()

    def __getattr__(self, name):
        return getattr(self._run, name)

    def manifest(self) -> dict:
        return copy.deepcopy(self._manifest)

    def log_event(self, level: str, text: str) -> None:
        """Judging again writes nothing into the run."""

    def results(self, step_label: str | None = None) -> pd.DataFrame:
        if step_label is None:
            return self._results.copy()
        return self._results[self._results["step_label"] == step_label].reset_index(drop=True)

    def _rewritten_manifest(self) -> dict:
        manifest = self._run.manifest()
        for step in manifest.get("steps", []):
            if step.get("limit"):
                step["limit"] = self.limit_ref
                if self.margin_db is not None and "margin_db" in step:
                    step["margin_db"] = self.margin_db
        manifest["rejudged"] = {"limit": self.limit_ref, "original_results": "report.html"}
        return manifest

    def _rejudged_results(self) -> pd.DataFrame:
        stored = self._run.results()
        sequence = _sequence(self._manifest)
        parts = []
        for info in self._manifest.get("steps", []):
            kind = KINDS.get(info.get("kind"))
            mine = stored[stored["step_label"] == info.get("label")]
            rows = kind.rejudge(self, info, sequence, mine) if kind is not None and info.get("limit") else None
            parts.append(mine if rows is None else pd.DataFrame(rows, columns=stored.columns.drop("id", errors="ignore")))
        frames = [p for p in parts if len(p)]
        return pd.concat(frames, ignore_index=True) if frames else stored.iloc[0:0]


def _sequence(manifest: dict):
    from bench.sequence import Sequence

    text = (manifest.get("sequence") or {}).get("text")
    if not text:
        raise ConfigError("the run's manifest holds no sequence text: it cannot be judged again")
    return Sequence.model_validate(tomllib.loads(text))


def rejudge(run, limit_name_or_file: str, *, margin_db: float | None = None):
    """A view of ``run`` judged against another limit set (checked to load first).

    Raises
    ------
    ConfigError
        The limit cannot be loaded, or is in another unit than the run's readings.
    """
    path = Path(limit_name_or_file)
    ref = str(path.resolve()) if path.suffix == ".toml" else limit_name_or_file
    limit = load_limit(ref)
    units = {s.get("unit") for s in run.manifest().get("steps", []) if s.get("limit")}
    if units and limit.quantity not in units:
        raise ConfigError(f"expected a limit in {', '.join(sorted(u for u in units if u))} like the run's "
                          f"readings, found {limit.name!r} in {limit.quantity}", key="--limit")
    return RejudgedRun(run, ref, margin_db)
