"""Reliability of ``bench run --sim``: injected analyzer faults, and a killed run resumed.

Part 1 injects one fault into the simulated analyzer (``--fault KIND=N``, counted in completed
sweeps) during a run of 100 clear-write 10,001-point sweeps and reads back whether the run
recovered by itself: exit code, manifest state and ``faults_recovered``, warning events in
``data.sqlite``, stored traces against the plan, no duplicated action, and the time the fault
cost against a fault-free run.

Part 2 kills (SIGKILL) a running ``bench run`` child once it has stored a given number of traces,
then runs ``bench resume RUN --sim`` and checks that the final trace count equals the plan's and
that no action was stored twice. It prints traces before the kill, traces after the resume, the
resume's wall time and the delay from the resume command to its first new trace. Done for a
sweep run and for a near-field grid run (the stage is homed again on resume).

Run: ``python tests/benchmarks/bench_resume.py [--quick]``. Prints figures, asserts nothing.
"""

from __future__ import annotations

import argparse
import os
import signal
import sqlite3
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_grid import grid_sequence  # noqa: E402 - benchmark helpers beside this script
from bench_sweeps import (  # noqa: E402
    bench_command,
    count_traces,
    machine_lines,
    planned_plan,
    planned_traces,
    read_run,
    run_child,
    run_folder_from_stdout,
    sweep_sequence,
    work_folder,
)

#: Faults injected in part 1 (``--fault`` values; counted in completed sweeps).
FAULT_CASES = (
    (),
    ("drop-after-sweeps=50",),
    ("drop-after-sweeps=50", "refuse-after-drop=3"),
    ("error-after-sweeps=50",),
    ("hang-after-sweeps=50",),
)


def fault_case(folder: Path, seq: Path, faults: tuple[str, ...], planned: int) -> dict:
    """One run with ``faults``; what the store says about its recovery."""
    out = folder / ("runs-" + ("-".join(faults) or "none").replace("=", ""))
    args = ["run", str(seq), "--sim", "--no-plots", "--out", str(out)]
    for f in faults:
        args += ["--fault", f]
    child = run_child(args, folder)
    try:
        run_dir = folder / run_folder_from_stdout(child.stdout)
    except RuntimeError:
        found = sorted(out.glob("*"))
        run_dir = found[-1] if found else None
    stored = read_run(run_dir) if run_dir is not None else None
    warnings = [text for level, text in stored.events if level == "warning"] if stored else []
    return {
        "faults": " ".join(faults) or "(none)",
        "exit": child.returncode,
        "state": stored.manifest.get("state") if stored else "-",
        "recovered": stored.manifest.get("faults_recovered", 0) if stored else "-",
        "traces": stored.traces if stored else 0,
        "planned": planned,
        "duplicates": stored.duplicate_actions if stored else 0,
        "wall_s": child.wall_s,
        "first_warning": warnings[0] if warnings else "",
    }


def print_fault_table(rows: list[dict]) -> None:
    base = rows[0]["wall_s"]
    head = (f"{'fault':42s} {'exit':>4s} {'state':>9s} {'recov':>5s} {'traces':>11s} {'dup':>3s} "
            f"{'wall s':>6s} {'cost s':>6s}")
    print(head)
    print("-" * len(head))
    for r in rows:
        print(f"{r['faults']:42s} {r['exit']:4d} {r['state']:>9s} {r['recovered']!s:>5s} "
              f"{r['traces']:5d}/{r['planned']:<5d} {r['duplicates']:3d} {r['wall_s']:6.1f} "
              f"{r['wall_s'] - base:6.1f}", flush=True)
    for r in rows:
        if r["first_warning"]:
            print(f"  {r['faults']}: event: {r['first_warning'][:150]}")


@dataclass
class KillFigures:
    """Figures of one kill-and-resume case."""

    case: str
    planned: int
    before_kill: int
    done_before_kill: int
    after_resume: int
    duplicates: int
    distinct_actions: int
    state: str
    resume_wall_s: float
    first_new_trace_s: float
    resume_exit: int
    resume_peak_rss_mb: float
    same_actions: bool


def _run_dir_of(out: Path, deadline: float) -> Path:
    """The run folder a starting ``bench run`` creates under ``out`` (waits for its database)."""
    while time.monotonic() < deadline:
        found = sorted(out.glob("*/data.sqlite"))
        if found:
            return found[-1].parent
        time.sleep(0.02)
    raise RuntimeError(f"no run folder appeared under {out}")


def _wait_for_traces(proc: subprocess.Popen, run_dir: Path, target: int, deadline: float) -> None:
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            if count_traces(run_dir) >= target:
                return
        except sqlite3.Error:
            pass
        time.sleep(0.01)
    raise RuntimeError(f"the run ended or stalled before {target} traces")


def kill_and_resume(folder: Path, case: str, seq: Path, kill_at: int) -> KillFigures:
    """Start ``bench run SEQ``, SIGKILL it after ``kill_at`` traces, resume it, read the store."""
    planned = planned_traces(seq)
    planned_actions = planned_action_indices(seq)
    out = folder / f"runs-kill-{case}"
    log = open(folder / f"kill-{case}.log", "wb")
    proc = subprocess.Popen(bench_command(["run", str(seq), "--sim", "--no-plots", "--out", str(out)]),
                            cwd=folder, stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL)
    deadline = time.monotonic() + 300.0
    try:
        run_dir = _run_dir_of(out, deadline)
        _wait_for_traces(proc, run_dir, kill_at, deadline)
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        log.close()
    before = read_run(run_dir)
    t_start = time.time()
    child = run_child(["resume", str(run_dir), "--sim", "--no-plots"], folder)
    after = read_run(run_dir)
    db = sqlite3.connect(f"file:{run_dir / 'data.sqlite'}?mode=ro", uri=True)
    first_new = db.execute("SELECT MIN(t_wall) FROM traces WHERE t_wall > ?", (t_start,)).fetchone()[0]
    stored_actions = {r[0] for r in db.execute("SELECT DISTINCT action_index FROM traces")}
    db.close()
    return KillFigures(case, planned, before.traces, before.actions_done, after.traces,
                       after.duplicate_actions, after.distinct_actions, after.manifest.get("state", "-"),
                       child.wall_s, (first_new - t_start) if first_new else float("nan"),
                       child.returncode, child.peak_rss_mb, stored_actions == planned_actions)


def planned_action_indices(seq: Path) -> set[int]:
    """Indices of the plan's actions (each stores one trace per segment)."""
    return {a.index for a in planned_plan(seq).actions}


def print_kill_table(rows: list[KillFigures]) -> None:
    head = (f"{'case':22s} {'planned':>7s} {'at kill':>7s} {'done':>5s} {'final':>6s} {'dup':>3s} "
            f"{'state':>9s} {'resume s':>8s} {'1st new s':>9s} {'match':>5s}")
    print(head)
    print("-" * len(head))
    for r in rows:
        match = (r.after_resume == r.planned and r.duplicates == 0 and r.distinct_actions == r.planned
                 and r.same_actions and r.resume_exit == 0)
        print(f"{r.case:22s} {r.planned:7d} {r.before_kill:7d} {r.done_before_kill:5d} {r.after_resume:6d} "
              f"{r.duplicates:3d} {r.state:>9s} {r.resume_wall_s:8.1f} {r.first_new_trace_s:9.2f} "
              f"{'yes' if match else 'NO':>5s}", flush=True)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer cases (a smoke run)")
    parser.add_argument("--keep", type=Path, help="keep the run folders under this folder")
    args = parser.parse_args(argv)
    for line in machine_lines():
        print(line)
    with work_folder("bench-resume-", args.keep) as folder:
        print("\npart 1: one injected analyzer fault in 100 sweeps of 10,001 points "
              "(recov = faults_recovered in manifest.toml; cost = wall time minus the fault-free run)\n")
        seq = sweep_sequence(folder, 100, 1)
        planned = planned_traces(seq)
        cases = FAULT_CASES[:2] if args.quick else FAULT_CASES
        print_fault_table([fault_case(folder, seq, faults, planned) for faults in cases])
        print("\npart 2: SIGKILL of a running 'bench run', then 'bench resume RUN --sim' "
              "(at kill = traces stored when killed; done = actions marked done;\n"
              "match = final count equals the plan, every planned action stored once, resume exit code 0)\n")
        kills = [kill_and_resume(folder, "sweeps 600", sweep_sequence(folder, 600, 1), 250)]
        if not args.quick:
            kills.append(kill_and_resume(folder, "max-hold 60 x 10", sweep_sequence(folder, 60, 10), 25))
            kills.append(kill_and_resume(folder, "grid 20 x 20 x 2", grid_sequence(folder, 20), 300))
        print_kill_table(kills)
    return 0


if __name__ == "__main__":
    sys.exit(main())
