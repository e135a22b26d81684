"""A whole run: manifest, tables copied for provenance, executor, step analysis, plots, report.

``execute_new_run`` is what ``bench run`` does after the checks passed; ``resume_run`` is
``bench resume``: it reloads the sequence and bench as they were (refusing if either file has
changed since), rebuilds the same plan and carries on from the first action not done.
"""

from __future__ import annotations

import hashlib
import logging
import shutil
import sys
import time
from contextlib import ExitStack
from pathlib import Path

from bench import __version__
from bench.errors import BenchError, ConfigError
from bench.progress import Progress
from bench.run import Executor, RetryPolicy, RunInterrupted
from bench.store import RunStore, create_run, open_run

__all__ = ["execute_new_run", "resume_run", "build_manifest"]

log = logging.getLogger("bench.run")


def _sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def build_manifest(prep, *, simulated: bool) -> tuple[dict, list[tuple[Path, str]]]:
    """Manifest dict and the (source, name in tables/) files to copy into the run folder."""
    from bench.station import resolve_limit, step_chain

    copies: dict[Path, str] = {}
    steps = []
    seq_dir = Path(prep.sequence_path).parent

    def limit_entry(name: str) -> str:
        resolved = resolve_limit(name, seq_dir)
        if resolved == name and not Path(name).suffix:
            return name  # built-in limit
        src = Path(resolved)
        return "tables/" + copies.setdefault(src, f"{len(copies):02d}-{src.name}")

    for step in prep.sequence.steps:
        files, unit, extra = step_chain(prep.bench, step)
        chain = []
        for role, src in files:
            name = copies.setdefault(src, f"{len(copies):02d}-{src.name}")
            chain.append({"role": role, "file": f"tables/{name}"})
        entry = {"label": step.label, "kind": step.kind, "unit": unit, "chain": chain, **extra}
        for key in ("sweep", "ambient", "of"):
            value = getattr(step, key, None)
            if value is not None:
                entry[key] = value
        if getattr(step, "limit", None) is not None:
            entry["limit"] = limit_entry(step.limit)
        if step.kind == "prescan":
            entry["margin_db"] = step.margin_db
        if step.kind == "final":
            prescan = prep.sequence.step(step.of)
            entry["limit"] = limit_entry(prescan.limit)
            entry["sweep"] = prescan.sweep
        steps.append(entry)
    manifest = {
        "name": prep.sequence.name,
        "software": f"emission-bench {__version__}",
        "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "state": "running",
        "simulated": simulated,
        "sequence": {"path": str(Path(prep.sequence_path).resolve()), "sha256": _sha256(prep.sequence_path),
                     "text": Path(prep.sequence_path).read_text(encoding="utf-8")},
        "bench": {"path": str(Path(prep.bench_path).resolve()), "sha256": _sha256(prep.bench_path),
                  "text": Path(prep.bench_path).read_text(encoding="utf-8")},
        "plan": prep.plan.summary_lines(),
        "steps": steps,
    }
    board = getattr(prep.bench, "board", None)
    if board is not None and board.outline_m:
        manifest["board"] = {"outline_m": [list(p) for p in board.outline_m]}
        if board.photo is not None:
            name = f"board-photo{Path(board.photo).suffix}"
            copies[Path(board.photo)] = f"../{name}"
            manifest["board"]["photo"] = name
            manifest["board"]["photo_points"] = [{"pixel": list(p.pixel), "board_m": list(p.board_m)}
                                                 for p in board.photo_points]
    return manifest, list(copies.items())


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


def _needs(plan) -> set[str]:
    needs = {"analyzer"}
    for a in plan.actions:
        if not a.board_powered:
            needs.add("supply")
        pose = a.pose
        if pose is not None and hasattr(pose, "tool"):
            needs.add("stage")
        if pose is not None and (getattr(pose, "height_m", None) is not None
                                 or getattr(pose, "polarization", None) is not None):
            needs.add("mast")
        if pose is not None and getattr(pose, "azimuth_deg", None) is not None:
            needs.add("turntable")
        if a.dynamic:
            needs.update({"mast", "turntable"})
    return needs


def _step_hook(prep, folder: Path, plots: bool):
    """After each step: far-field analysis of a prescan."""
    seq = prep.sequence

    def hook(executor, action) -> None:
        step = seq.step(action.step_label)
        if step.kind == "prescan":
            from bench.farfield import analyze_prescan  # scipy.signal only when a prescan needs it

            ctx = _farfield_context(prep, executor.store, step.limit)
            table = analyze_prescan(executor.store, step, ctx)
            counts = table["status"].value_counts().to_dict() if len(table) else {}
            log.info("prescan %s: %s", step.label, ", ".join(f"{v} {k}" for k, v in counts.items()) or "no peaks")

    return hook


def _farfield_context(prep, store, limit_name):
    from bench.farfield import FarFieldContext, limit_for_site
    from bench.station import resolve_limit

    distance = prep.bench.site.distance_m if prep.bench.site is not None else 3.0
    limit, notes = limit_for_site(resolve_limit(limit_name, Path(prep.sequence_path).parent), distance)
    for n in notes:
        store.log_event("info", n)
        log.info(n)
    chain = _far_chain(store)
    eut = prep.bench.site.eut_size_m if prep.bench.site is not None else None
    return FarFieldContext(chain=chain, limit=limit, distance_m=distance, eut_size_m=eut)


def _far_chain(store):
    """The far-field chain from the tables copied into the run folder."""
    from bench.analysis.transducers import TransducerChain, load_table

    for step in store.manifest().get("steps", []):
        if step.get("kind") in ("prescan", "sweep", "ambient", "final") and step.get("chain"):
            tables = tuple(load_table(store.folder / c["file"], role=c["role"]) for c in step["chain"])
            return TransducerChain(tables)
    return None


def _dynamic_handler(prep):
    from bench.farfield import run_finals

    def handler(executor, action) -> None:
        step = prep.sequence.step(action.step_label)
        prescan = prep.sequence.step(step.of)
        sweep = prep.sequence.sweeps[prescan.sweep]
        ctx = _farfield_context(prep, executor.store, prescan.limit)
        mast = prep.bench.mast.height_limits_m if prep.bench.mast is not None else (1.0, 4.0)
        table = prep.bench.turntable.azimuth_limits_deg if prep.bench.turntable is not None else (0.0, 360.0)
        run_finals(executor, action, step, prescan, sweep, ctx, mast, table)

    return handler


def _log_console():
    """The console the log records go to, so a live progress bar and log lines do not tear."""
    for handler in logging.getLogger("bench").handlers:
        console = getattr(handler, "console", None)
        if console is not None:
            return console
    return None


def _connector(prep):
    """``connect() -> Station`` for the instruments the plan needs."""
    from bench.station import connect_station

    needs = _needs(prep.plan)
    wait = prep.sim.wait if prep.sim is not None else time.sleep
    poll_sleep = (lambda s: None) if prep.sim is not None else None
    return lambda: connect_station(prep.bench, needs=needs, wait=wait, poll_sleep=poll_sleep)


def _execute(prep, store: RunStore, plots: bool, station=None) -> None:
    plan = prep.plan
    live = sys.stderr.isatty()
    progress = Progress(len(plan.actions), plan.total_time_s, live=live, console=_log_console())
    retry = RetryPolicy(first_delay_s=0.05, attempts=5) if prep.sim is not None else RetryPolicy()
    executor = Executor(plan, store, _connector(prep), progress=progress, retry=retry,
                        on_step_done=_step_hook(prep, store.folder, plots), dynamic=_dynamic_handler(prep))
    if station is not None:
        executor.station = station
        executor.identities.update(station.identities)
    runlog = _RunLog(store.folder)
    hint = f"'bench resume {store.folder}{' --sim' if prep.sim is not None else ''}'"
    try:
        executor.run()
    except KeyboardInterrupt:
        store.update_manifest(state="interrupted", interrupted_reason="stopped by the operator")
        from bench.app import OperatorStop

        raise OperatorStop(f"stopped by the operator; the run is kept: continue it with {hint}") from None
    except BenchError as exc:
        if not isinstance(exc, RunInterrupted):
            # the run cannot go on (e.g. the instrument refused a setting): keep what was measured
            store.update_manifest(state="interrupted", interrupted_reason=str(exc))
            raise
        store.update_manifest(state="interrupted", interrupted_reason=str(exc))
        from bench.app import RunInterruptedExit

        raise RunInterruptedExit(f"{exc}; the run is kept: continue it with {hint}") from exc
    finally:
        progress.close()
        runlog.close()
    store.update_manifest(state="complete", instruments=executor.identities, faults_recovered=executor.faults)
    results = store.results()
    if not results.empty:
        results.to_csv(store.folder / "results.csv", index=False)
    store.checkpoint()
    if plots:
        from bench.report import write_report

        path = write_report(store)
        log.info("report: %s", path)


def execute_new_run(prep, *, out_root: Path, plots: bool = True) -> Path:
    """Create the run folder and carry out the plan. Returns the run folder."""
    manifest, copies = build_manifest(prep, simulated=prep.sim is not None)
    # connect before creating the run folder: an unreachable bench leaves nothing behind
    station = _connector(prep)()
    try:
        store = create_run(Path(out_root), prep.sequence.name, manifest)
    except BaseException:
        station.close()
        raise
    try:
        store.lock()
        _copy_tables(store.folder, copies)
        _execute(prep, store, plots, station=station)
    finally:
        store.close()
    return store.folder


def resume_run(folder: Path, *, bench_path: Path | None, sim: bool, board=None, seed: int = 1,
               realtime: bool = False, plots: bool = True, stack: ExitStack | None = None) -> Path:
    """Continue an interrupted run from the first action not done."""
    from bench.app import prepare

    ro = open_run(folder)
    manifest = ro.manifest()
    ro.close()
    if manifest.get("state") == "complete":
        raise ConfigError(f"{folder}: this run is already complete; nothing to resume")
    seq_path = Path(manifest["sequence"]["path"])
    if not seq_path.is_file() or _sha256(seq_path) != manifest["sequence"]["sha256"]:
        raise ConfigError(f"{seq_path}: the sequence file changed or is missing since the run started; "
                          "resume needs the same sequence")
    bench_file = bench_path or Path(manifest["bench"]["path"])
    if bench_path is None and (not bench_file.is_file() or _sha256(bench_file) != manifest["bench"]["sha256"]):
        raise ConfigError(f"{bench_file}: the bench file changed or is missing since the run started; "
                          "pass --bench to resume on purpose with another one")
    prep = prepare(seq_path, bench_path=bench_file, sim=sim or bool(manifest.get("simulated") and bench_path is None),
                   board=board, seed=seed, realtime=realtime, stack=stack)
    store = RunStore(Path(folder))
    try:
        store.lock()
        store.update_manifest(state="running", resumed=int(manifest.get("resumed", 0)) + 1)
        store.log_event("info", "resumed")
        _execute(prep, store, plots)
    finally:
        store.close()
    return Path(folder)
