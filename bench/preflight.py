"""Pre-run checks: refuse, before anything moves, what would otherwise fail half-way.

Generic checks here (addresses, every planned segment against the analyzer profile, limit
lines that load and fit the step's unit and span, transducer tables that cover each sweep);
kind-specific ones in each step kind's :meth:`~bench.steps.base.StepKind.preflight`.
Nothing here does I/O with an instrument.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from bench.errors import BenchError, ConfigError, PlanError
from bench.steps import kind_of

__all__ = ["Checks", "preflight", "resolve_limit", "step_span_hz"]

def resolve_limit(name: str, sequence_dir: Path | None) -> str:
    """A built-in limit name as is; a limit file path made absolute against the sequence's folder."""
    if name.endswith(".toml") or "/" in name or "\\" in name:
        path = Path(name)
        if not path.is_absolute() and sequence_dir is not None:
            path = sequence_dir / path
        return str(path.resolve())
    return name


def step_span_hz(plan, label: str) -> tuple[float, float] | None:
    """Lowest start and highest stop of a step's planned segments (Hz), or None."""
    segs = [seg for a in plan.actions if a.step_label == label for seg in a.segments]
    if not segs:
        return None
    return min(s.start_hz for s in segs), max(s.stop_hz for s in segs)


@dataclass
class Checks:
    """What the checks see (:class:`bench.steps.base.PreflightContext`): plan, files, profiles."""

    plan: object
    sequence: object
    bench: object
    profiles: dict
    sequence_dir: Path | None = None

    def step_span_hz(self, label: str) -> tuple[float, float] | None:
        return step_span_hz(self.plan, label)


def _at(exc: PlanError, *key_path) -> PlanError:
    """Attach the sequence key path an error is about (the CLI turns it into a line number)."""
    exc.key_path = tuple(key_path)
    return exc


def _index(sequence, label: str) -> int:
    return next(i for i, st in enumerate(sequence.steps) if st.label == label)


def preflight(checks: Checks) -> None:
    """Refuse, before anything runs, what would fail mid-run.

    Raises
    ------
    PlanError
        With ``key_path`` naming the sequence key the problem is about, when there is one.
    """
    _check_addresses(checks.bench)
    _check_segments(checks)
    for i, step in enumerate(checks.sequence.steps):
        kind = kind_of(step)
        if getattr(step, "limit", None) is not None:
            _check_limit(checks, i, step, step.limit)
        try:
            kind.preflight(checks, i, step)
        except PlanError as exc:
            extra = getattr(exc, "step_key", None)
            raise _at(exc, "steps", i, *((extra,) if extra else ())) from None
    for step in checks.sequence.steps:
        _check_tables(checks, step)


def _check_segments(checks: Checks) -> None:
    from bench.drivers.analyzer import Analyzer

    probe = Analyzer(transport=_NoTransport(checks.bench.analyzer.address),
                     profile=checks.profiles["analyzer"])
    for action in checks.plan.actions:
        for seg in action.segments:
            try:
                probe.validate(seg)
            except PlanError as exc:
                raise _at(PlanError(f"step '{action.step_label}': {exc}"),
                          "steps", _index(checks.sequence, action.step_label)) from None


def _check_limit(checks: Checks, i: int, step, name: str) -> None:
    """A limit that loads, in the step's unit, with a line somewhere in its sweep."""
    import numpy as np

    from bench.analysis.limits import load_limit

    try:
        limit_set = load_limit(resolve_limit(name, checks.sequence_dir))
    except (ConfigError, BenchError) as exc:
        raise _at(PlanError(f"steps[{i}] '{step.label}': limit {name!r} cannot be used: {exc}"),
                  "steps", i, "limit") from None
    unit = kind_of(step).chain(checks.bench, step)[1]
    if limit_set.quantity != unit:
        raise _at(PlanError(f"steps[{i}] '{step.label}': limit {limit_set.name!r} is in {limit_set.quantity}, "
                            f"but the step's readings are in {unit} after its transducer chain"),
                  "steps", i, "limit")
    span = checks.step_span_hz(step.label)
    if span is not None:
        freqs = np.linspace(span[0], span[1], 2001)
        if not np.any(np.isfinite(limit_set.screening_level(freqs))):
            raise _at(PlanError(f"steps[{i}] '{step.label}': limit {limit_set.name!r} has no line anywhere "
                                f"in the sweep {span[0] / 1e6:g}-{span[1] / 1e6:g} MHz"), "steps", i, "limit")


def _check_tables(checks: Checks, step) -> None:
    """Every transducer table of the step's chain loads and covers its planned span."""
    from bench.analysis.transducers import load_table

    span = checks.step_span_hz(step.label)
    if span is None:
        return
    for role, path in kind_of(step).chain(checks.bench, step)[0]:
        try:
            load_table(path, role=role).check_covers(list(span))
        except (ConfigError, BenchError) as exc:
            raise _at(PlanError(f"step '{step.label}': {exc}"),
                      "steps", _index(checks.sequence, step.label)) from None


def _check_addresses(bench) -> None:
    """Every address must name a transport of the registry (VISA resource, serial URL, device path)."""
    from bench.errors import TransportError
    from bench.transports import find_scheme

    for role in ("analyzer", "stage", "mast", "turntable", "supply"):
        section = getattr(bench, role, None)
        if section is None:
            continue
        address = section.address.strip()
        if address.startswith("sim://"):
            raise PlanError(f"[{role}] address {address!r} is a placeholder for the simulated bench: "
                            "run with --sim, or put the instrument's real address in the bench file")
        try:
            find_scheme(address)
        except TransportError as exc:
            raise PlanError(f"[{role}] address: {exc}") from None


class _NoTransport:
    """Stands in for a connection where only :meth:`Analyzer.validate` is used (no I/O)."""

    def __init__(self, address: str) -> None:
        self.address = address
