"""A whole run: manifest, tables copied for provenance, executor, step analysis.

``execute_new_run`` is what ``bench run`` does after the checks passed; ``resume_run`` is
``bench resume``: :func:`resumable_files` refuses a sequence or bench file that changed since,
the caller rebuilds the same plan, and the run carries on from the first action not done.
After the last action of each step the step's kind analyses it; a dynamic action (the finals)
is carried out by its kind through the executor's narrow measuring interface.
"""

from __future__ import annotations

import logging
import shutil
import sys
import time
from pathlib import Path

from bench import __version__
from bench.errors import BenchError, ConfigError, OperatorStop, RunInterrupted
from bench.executor import Executor, RetryPolicy
from bench.instruments import connect_station, needs_of
from bench.preflight import resolve_limit
from bench.provenance import digest
from bench.progress import Progress
from bench.steps import kind_of
from bench.store import RunStore, create_run, open_run

__all__ = ["execute_new_run", "resume_run", "resumable_files", "build_manifest"]

log = logging.getLogger("bench.run")


def build_manifest(session, *, simulated: bool) -> tuple[dict, list[tuple[Path, str]]]:
    """Manifest dict and the (source, name in tables/) files to copy into the run folder."""
    copies: dict[Path, str] = {}
    steps = []

    def limit_entry(name: str) -> str:
        resolved = resolve_limit(name, session.sequence_dir)
        if resolved == name and not Path(name).suffix:
            return name  # built-in limit
        src = Path(resolved)
        return "tables/" + copies.setdefault(src, f"{len(copies):02d}-{src.name}")

    for step in session.sequence.steps:
        steps.append(_manifest_step(session, step, copies, limit_entry))
    manifest = {
        "name": session.sequence.name,
        "software": f"emission-bench {__version__}",
        "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "state": "running",
        "simulated": simulated,
        "sequence": _file_entry(session.sequence_path),
        "bench": _file_entry(session.bench_path),
        "plan": session.plan.summary_lines(),
        "steps": steps,
        "files": session.used_files(),
    }
    analyzer = session.profiles.get("analyzer")
    if analyzer is not None:
        manifest["analyzer_profile"] = analyzer.name
        manifest["analyzer_damage_dbm"] = float(analyzer.damage_level_dbm)
    if session.sequence.eut is not None:
        manifest["eut"] = session.sequence.eut.model_dump(exclude_none=True)
    if session.sim_settings is not None:
        manifest["simulator"] = dict(session.sim_settings)
    _board_entry(session.bench, manifest, copies)
    return manifest, list(copies.items())


def _file_entry(path: Path) -> dict:
    return {"path": str(Path(path).resolve()), "sha256": digest(path),
            "text": Path(path).read_text(encoding="utf-8")}


def _manifest_step(session, step, copies: dict, limit_entry) -> dict:
    kind = kind_of(step)
    files, unit, extra = kind.chain(session.bench, step)
    chain = []
    for role, src in files:
        name = copies.setdefault(src, f"{len(copies):02d}-{src.name}")
        chain.append({"role": role, "file": f"tables/{name}"})
    entry = {"label": step.label, "kind": step.kind, "unit": unit, "chain": chain, **extra,
             **kind.manifest_entry(session.sequence, step),
             "settings": session.sequence.sweep_of(step).model_dump(exclude_none=True)}
    summary = next((st for st in session.plan.steps if st.label == step.label), None)
    if summary is not None and not summary.dynamic:
        entry["positions"] = summary.actions
        entry["points_per_position"] = summary.points_per_action
    limit = kind.limit_name(session.sequence, step)
    if limit is not None:
        entry["limit"] = limit_entry(limit)
    return entry


def _board_entry(bench, manifest: dict, copies: dict) -> None:
    board = getattr(bench, "board", None)
    if board is None or not board.outline_m:
        return
    manifest["board"] = {"outline_m": [list(p) for p in board.outline_m]}
    if board.photo is not None:
        name = f"board-photo{Path(board.photo).suffix}"
        copies[Path(board.photo)] = f"../{name}"
        manifest["board"]["photo"] = name
        manifest["board"]["photo_points"] = [{"pixel": list(p.pixel), "board_m": list(p.board_m)}
                                             for p in board.photo_points]


def _copy_tables(folder: Path, copies) -> None:
    (folder / "tables").mkdir(exist_ok=True)
    for src, name in copies:
        shutil.copyfile(src, (folder / "tables" / name).resolve())


class _RunLog:
    """A log file per run (run.log), attached to the 'bench' logger for the run's duration."""

    def __init__(self, folder: Path) -> None:
        self.handler = logging.FileHandler(folder / "run.log", encoding="utf-8")
        self.handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
        logging.getLogger("bench").addHandler(self.handler)

    def close(self) -> None:
        logging.getLogger("bench").removeHandler(self.handler)
        self.handler.close()


class _StepRun:
    """What step kinds' hooks see during a run (:class:`bench.steps.base.StepContext`)."""

    def __init__(self, session, store: RunStore) -> None:
        self.session = session
        self.store = store
        self.sequence = session.sequence
        self.bench = session.bench

    def limit(self, name: str):
        return self.session.limit(name)

    def note(self, level: str, text: str) -> None:
        self.store.log_event(level, text)
        log.log(logging.WARNING if level == "warning" else logging.INFO, text)


def _hooks(session, store: RunStore):
    """(analysis, dynamic action) callbacks that dispatch to the step kinds; both return rows."""
    ctx = _StepRun(session, store)

    def analyze(action) -> list[dict]:
        step = session.sequence.step(action.step_label)
        rows = kind_of(step).after_step(ctx, step)
        counts: dict[str, int] = {}
        for row in rows:
            counts[row["status"]] = counts.get(row["status"], 0) + 1
        log.info("%s %s: %s", step.kind, step.label,
                 ", ".join(f"{v} {k}" for k, v in counts.items()) or "no peaks")
        return rows

    def dynamic(action, measurer) -> list[dict]:
        step = session.sequence.step(action.step_label)
        return kind_of(step).run_dynamic(ctx, step, measurer)

    return analyze, dynamic


def _log_console():
    """The console the log records go to, so a live progress bar and log lines do not tear."""
    for handler in logging.getLogger("bench").handlers:
        console = getattr(handler, "console", None)
        if console is not None:
            return console
    return None


def _connector(session):
    """``connect() -> Station`` for the instruments the plan needs."""
    steps = [(kind_of(step), step) for step in session.sequence.steps]
    needs = needs_of(session.plan, steps)
    wait = session.sim.wait if session.sim is not None else time.sleep
    poll_sleep = (lambda s: None) if session.sim is not None else None
    return lambda: connect_station(session.bench, session.profiles, needs=needs, wait=wait,
                                   poll_sleep=poll_sleep)


def _execute(session, store: RunStore, station=None) -> None:
    plan = session.plan
    progress = Progress(len(plan.actions), plan.total_time_s, live=sys.stderr.isatty(),
                        console=_log_console())
    retry = RetryPolicy(first_delay_s=0.05, attempts=5) if session.sim is not None else RetryPolicy()
    analyze, dynamic = _hooks(session, store)
    executor = Executor(plan, store, _connector(session), progress=progress, retry=retry,
                        analyze=analyze, dynamic=dynamic)
    if station is not None:
        executor.station = station
        executor.identities.update(station.identities)
    runlog = _RunLog(store.folder)
    hint = f"'emission-bench resume {store.folder}'"  # the manifest holds the bench, board and seed
    try:
        executor.run()
    except KeyboardInterrupt:
        store.update_manifest(state="interrupted", interrupted_reason="stopped by the operator")
        raise OperatorStop(f"stopped by the operator; the run is kept: continue it with {hint}") from None
    except RunInterrupted as exc:
        store.update_manifest(state="interrupted", interrupted_reason=str(exc))
        raise RunInterrupted(f"{exc}; the run is kept: continue it with {hint}") from exc
    except BenchError as exc:
        # the run cannot go on (e.g. the instrument refused a setting or an analysis failed):
        # keep what was measured and say how to continue once the cause is fixed
        store.update_manifest(state="interrupted", interrupted_reason=str(exc))
        stop = RunInterrupted(f"{exc}; the run is kept: fix the cause, then continue it with {hint}")
        stop.exit_code = exc.exit_code  # an instrument refusal stays exit 1, a file mistake exit 2
        raise stop from exc
    finally:
        progress.close()
        runlog.close()
    _finish(store, executor)


def _finish(store: RunStore, executor: Executor) -> None:
    store.update_manifest(state="complete", instruments=executor.identities, faults_recovered=executor.faults)
    results = store.results()
    if not results.empty:
        results.to_csv(store.folder / "results.csv", index=False)
    store.checkpoint()


def execute_new_run(session, *, out_root: Path, unattended: bool = False) -> Path:
    """Create the run folder and carry out the plan. Returns the run folder.

    ``unattended`` (the operator skipped the confirmation before motion) is recorded.
    """
    manifest, copies = build_manifest(session, simulated=session.sim is not None)
    manifest["unattended"] = bool(unattended)
    # connect before creating the run folder: an unreachable bench leaves nothing behind
    station = _connector(session)()
    try:
        store = create_run(Path(out_root), session.sequence.name, manifest)
    except BaseException:
        station.close()
        raise
    try:
        store.lock()
        _copy_tables(store.folder, copies)
        _execute(session, store, station=station)
    finally:
        store.close()
    return store.folder


def resumable_files(folder: Path, *, bench_path: Path | None) -> tuple[Path, Path, dict]:
    """The sequence and bench files a run may resume with, after checking they did not change.

    Returns (sequence path, bench path, manifest). ``bench_path`` given means resuming on
    purpose with another bench file.
    """
    ro = open_run(folder)
    manifest = ro.manifest()
    ro.close()
    if manifest.get("state") == "complete":
        raise ConfigError(f"{folder}: this run is already complete; nothing to resume (to write its "
                          f"report again: emission-bench report {folder})")
    if not isinstance(manifest.get("sequence"), dict) or "path" not in manifest["sequence"]:
        raise ConfigError(f"{folder}: the manifest names no sequence file: this folder cannot be resumed")
    seq_path = Path(manifest["sequence"]["path"])
    if not seq_path.is_file() or digest(seq_path) != manifest["sequence"]["sha256"]:
        raise ConfigError(f"{seq_path}: the sequence file changed or is missing since the run started; "
                          "resume needs the same sequence")
    bench_file = bench_path or Path(manifest["bench"]["path"])
    if bench_path is None and (not bench_file.is_file() or digest(bench_file) != manifest["bench"]["sha256"]):
        raise ConfigError(f"{bench_file}: the bench file changed or is missing since the run started; "
                          "pass --bench to resume on purpose with another one")
    return seq_path, bench_file, manifest


def resume_point(folder: Path, plan) -> str:
    """Where a run resumes: the first action not done and how much is left."""
    ro = open_run(folder)
    try:
        done = ro.done_actions()
    finally:
        ro.close()
    left = [a for a in plan.actions if a.index not in done]
    if not left:
        return "every action is done; the run will be closed and reported"
    first = left[0]
    from bench.planning import format_duration

    return (f"{len(done)} of {len(plan.actions)} actions done; continuing at action {first.index + 1} "
            f"(step '{first.step_label}'), {len(left)} left, about "
            f"{format_duration(sum(a.est_time_s for a in left))} of instrument time")


def resume_run(session, folder: Path, *, resumed: int, accepted: list[str] = (),
               unattended: bool = False) -> Path:
    """Continue an interrupted run from the first action not done.

    ``accepted`` lists input files that changed since the run started and that the operator
    accepted (``--accept-changes``); they are recorded in the manifest and the events.
    """
    store = RunStore(Path(folder))
    try:
        store.lock()
        changes = {"state": "running", "resumed": resumed + 1, "unattended": bool(unattended)}
        if accepted:
            changes["files"] = session.used_files()
            changes["accepted_changes"] = list(store.manifest().get("accepted_changes", [])) + list(accepted)
            store.log_event("warning", "resumed with changed inputs: " + "; ".join(accepted))
        store.update_manifest(**changes)
        store.log_event("info", "resumed")
        _execute(session, store)
    finally:
        store.close()
    return Path(folder)
