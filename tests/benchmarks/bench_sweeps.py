"""End-to-end sweep throughput of ``bench run --sim`` and its peak memory as the run grows.

Each case writes a sequence file into a temporary folder, runs ``python -m bench run SEQ --sim
--no-plots`` in a child process (accelerated simulated bench: real loopback SCPI through
pyvisa-py, the receiver model computing every 10,001-point sweep, every trace committed to the
run's SQLite store) and reads:

* the wall time of the whole command (interpreter start, imports, plan, simulator start, run);
* the steady-state rate from the stored traces' commit times (first to last trace), which is the
  figure to compare with the target of 200 sweeps/s;
* the child's peak resident set (``ru_maxrss`` from ``os.wait4`` for that one child).

Two families: clear-write (one sweep per stored trace, one ``sweep`` step per trace) and
max-hold (``count`` sweeps combined into each stored trace). Report generation (``bench report
RUN``: PNG plots and HTML) is timed separately on one run.

Run: ``python tests/benchmarks/bench_sweeps.py [--quick]``. Prints figures, asserts nothing.
The helpers at the top are shared with the other benchmark scripts of this folder.
"""

from __future__ import annotations

import argparse
import contextlib
import datetime
import os
import platform
import sqlite3
import subprocess
import sys
import tempfile
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path

#: Points per trace of the sweep benchmark (30 MHz - 1 GHz at 97 kHz steps).
SWEEP_POINTS = 10001
#: Target of the issue: sweeps per second on a 2-core machine.
TARGET_SWEEPS_PER_S = 200.0


# ------------------------------------------------------------------ shared helpers

def machine_lines() -> list[str]:
    """nproc, CPU model, Python version and date, one fact per line."""
    model = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return [f"date     {datetime.datetime.now().isoformat(timespec='seconds')}",
            f"nproc    {os.cpu_count()}",
            f"cpu      {model}",
            f"python   {platform.python_version()} ({sys.executable})",
            f"platform {platform.platform()}"]


@dataclass
class ChildResult:
    """Outcome of one ``bench`` child process."""

    returncode: int
    wall_s: float
    peak_rss_mb: float
    stdout: str
    stderr: str


def bench_command(args: list[str]) -> list[str]:
    """``python -m bench ARGS`` with this interpreter (the venv the repository is installed in)."""
    return [sys.executable, "-m", "bench", *args]


def run_child(args: list[str], cwd: Path, *, timeout_s: float = 600.0) -> ChildResult:
    """Run ``bench ARGS`` in a child process; wall time and that child's peak RSS (MB)."""
    out_path, err_path = cwd / "child.out", cwd / "child.err"
    with open(out_path, "wb") as out, open(err_path, "wb") as err:
        t0 = time.perf_counter()
        proc = subprocess.Popen(bench_command(args), cwd=cwd, stdout=out, stderr=err,
                                stdin=subprocess.DEVNULL)
        deadline = t0 + timeout_s
        while True:
            pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
            if pid:
                break
            if time.perf_counter() > deadline:
                proc.kill()
                pid, status, usage = os.wait4(proc.pid, 0)
                break
            time.sleep(0.02)
        wall_s = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    # ru_maxrss is in kilobytes on Linux
    return ChildResult(proc.returncode, wall_s, usage.ru_maxrss / 1024.0,
                       out_path.read_text(errors="replace"), err_path.read_text(errors="replace"))


def run_folder_from_stdout(stdout: str) -> Path:
    """The folder named by the ``run folder ...`` line that ends a run or a resume."""
    for line in stdout.splitlines()[::-1]:
        for head in ("run folder ",):
            if line.startswith(head):
                return Path(line[len(head):].strip())
    raise RuntimeError(f"no run folder in the output:\n{stdout[-2000:]}")


@dataclass
class StoredRun:
    """What a run folder holds, read back from its store."""

    traces: int
    sweeps: int
    first_t: float
    last_t: float
    actions_done: int
    distinct_actions: int
    duplicate_actions: int
    events: list
    manifest: dict

    @property
    def loop_s(self) -> float:
        """Seconds from the first stored trace to the last."""
        return self.last_t - self.first_t

    def rate_per_s(self, count: int) -> float:
        """``count`` items spread over the first-to-last-trace interval (count - 1 gaps)."""
        return (count - 1) / self.loop_s if self.loop_s > 0 else float("nan")


def read_run(folder: Path) -> StoredRun:
    """Trace counts, commit times, done actions, events and manifest of a run folder."""
    db = sqlite3.connect(f"file:{folder / 'data.sqlite'}?mode=ro", uri=True)
    try:
        n, sweeps, t0, t1 = db.execute(
            "SELECT COUNT(*), COALESCE(SUM(sweeps), 0), MIN(t_wall), MAX(t_wall) FROM traces").fetchone()
        done = db.execute("SELECT COUNT(*) FROM actions_done").fetchone()[0]
        distinct, dup = db.execute(
            "SELECT COUNT(*), COALESCE(SUM(c > 1), 0) FROM "
            "(SELECT COUNT(*) AS c FROM traces GROUP BY action_index, segment)").fetchone()
        events = db.execute("SELECT level, text FROM events ORDER BY id").fetchall()
    finally:
        db.close()
    manifest = tomllib.loads((folder / "manifest.toml").read_text(encoding="utf-8"))
    return StoredRun(n, sweeps, t0 or 0.0, t1 or 0.0, done, distinct, dup, events, manifest)


def count_traces(folder: Path) -> int:
    """Traces committed so far (readable while the run writes: WAL mode)."""
    db = sqlite3.connect(f"file:{folder / 'data.sqlite'}?mode=ro", uri=True, timeout=5.0)
    try:
        return db.execute("SELECT COUNT(*) FROM traces").fetchone()[0]
    finally:
        db.close()


def planned_plan(sequence_path: Path):
    """The plan of a sequence on the simulated demo bench (the simulator starts, nothing is measured)."""
    from bench.app import BenchOptions, prepare

    with contextlib.ExitStack() as stack:  # the demo bench's addresses are placeholders for --sim
        return prepare(sequence_path, BenchOptions(sim=True), stack=stack).plan


def planned_traces(sequence_path: Path) -> int:
    """Traces the planner expects for a sequence on the demo bench (touches no instrument)."""
    return planned_plan(sequence_path).n_traces


@contextlib.contextmanager
def work_folder(prefix: str, keep: Path | None):
    """A temporary folder, removed at the end unless ``keep`` names a parent to keep it in."""
    if keep is not None:
        keep.mkdir(parents=True, exist_ok=True)
        yield Path(tempfile.mkdtemp(prefix=prefix, dir=keep)).resolve()
        return
    with tempfile.TemporaryDirectory(prefix=prefix) as tmp:
        yield Path(tmp)


def write_sequence(path: Path, name: str, sweeps: dict[str, dict], steps: list[dict]) -> Path:
    """Write a sequence file (``schema = 1``) from plain dicts."""
    import tomli_w

    doc = {"schema": 1, "name": name, "sweeps": sweeps, "steps": steps}
    path.write_bytes(tomli_w.dumps(doc).encode("utf-8"))
    return path


# ------------------------------------------------------------------ sweep cases

def band_sweep(trace: str = "clear-write", count: int = 1) -> dict:
    """30 MHz - 1 GHz, 10,001 points, RBW 120 kHz, peak detector."""
    sweep = {"start": "30 MHz", "stop": "1 GHz", "rbw": "120 kHz", "points": SWEEP_POINTS,
             "detector": "peak", "trace": trace}
    if count != 1:
        sweep["count"] = count
    return sweep


def sweep_sequence(folder: Path, traces: int, count: int) -> Path:
    """``traces`` sweep steps; clear-write when ``count`` is 1, else max-hold of ``count``."""
    trace = "clear-write" if count == 1 else "max-hold"
    name = f"bm-{trace}-{traces}x{count}"
    steps = [{"kind": "sweep", "label": f"s{i:05d}", "sweep": "band"} for i in range(traces)]
    return write_sequence(folder / f"{name}.toml", name, {"band": band_sweep(trace, count)}, steps)


@dataclass
class SweepFigures:
    """Figures of one sweep run."""

    label: str
    traces: int
    sweeps: int
    wall_s: float
    loop_s: float
    sweeps_per_s: float
    traces_per_s: float
    e2e_sweeps_per_s: float
    peak_rss_mb: float
    folder: Path


def measure_sweep_run(folder: Path, traces: int, count: int) -> SweepFigures:
    """Run one sweep case in a child process and read its figures back from the store."""
    seq = sweep_sequence(folder, traces, count)
    child = run_child(["run", str(seq), "--sim", "--no-plots", "--out", str(folder / "runs")], folder)
    if child.returncode != 0:
        raise RuntimeError(f"bench run failed ({child.returncode}):\n{child.stderr[-3000:]}")
    run_dir = folder / run_folder_from_stdout(child.stdout)
    stored = read_run(run_dir)
    if stored.traces != traces or stored.sweeps != traces * count:
        raise RuntimeError(f"{run_dir}: expected {traces} traces / {traces * count} sweeps, "
                           f"found {stored.traces} / {stored.sweeps}")
    # the first trace's sweeps happened before its commit: count sweeps after it
    sweeps_after_first = stored.sweeps - count
    sweeps_per_s = sweeps_after_first / stored.loop_s if stored.loop_s > 0 else float("nan")
    label = "clear-write" if count == 1 else f"max-hold x{count}"
    return SweepFigures(label, stored.traces, stored.sweeps, child.wall_s, stored.loop_s, sweeps_per_s,
                        stored.rate_per_s(stored.traces), stored.sweeps / child.wall_s,
                        child.peak_rss_mb, run_dir)


def time_report(folder: Path, run_dir: Path) -> ChildResult:
    """``bench report RUN`` in a child process (PNG plots and the HTML report)."""
    child = run_child(["report", str(run_dir)], folder)
    if child.returncode != 0:
        raise RuntimeError(f"bench report failed ({child.returncode}):\n{child.stderr[-3000:]}")
    return child


def print_header() -> None:
    head = (f"{'case':14s} {'traces':>7s} {'sweeps':>7s} {'wall s':>7s} {'loop s':>7s} "
            f"{'sweeps/s':>9s} {'traces/s':>9s} {'e2e sw/s':>9s} {'peak RSS MB':>12s}")
    print(head)
    print("-" * len(head))


def print_row(r: SweepFigures) -> None:
    print(f"{r.label:14s} {r.traces:7d} {r.sweeps:7d} {r.wall_s:7.1f} {r.loop_s:7.1f} "
              f"{r.sweeps_per_s:9.1f} {r.traces_per_s:9.1f} {r.e2e_sweeps_per_s:9.1f} {r.peak_rss_mb:12.1f}",
              flush=True)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes only (a smoke run)")
    parser.add_argument("--keep", type=Path, help="keep the run folders under this folder")
    args = parser.parse_args(argv)
    sizes = (50, 200) if args.quick else (200, 1000, 3000)
    hold_count = 10
    for line in machine_lines():
        print(line)
    print(f"case: {SWEEP_POINTS}-point traces, 30 MHz - 1 GHz, RBW 120 kHz, peak; "
          f"target {TARGET_SWEEPS_PER_S:g} sweeps/s")
    print("sweeps/s and traces/s: first to last stored trace (steady state); "
          "e2e sw/s: sweeps / whole command wall time\n")
    with work_folder("bench-sweeps-", args.keep) as folder:
        rows = []
        print_header()
        for n in sizes:
            rows.append(measure_sweep_run(folder, n, 1))
            print_row(rows[-1])
        for n in sizes:
            rows.append(measure_sweep_run(folder, max(1, n // hold_count), hold_count))
            print_row(rows[-1])
        print()
        for r in (rows[len(sizes) - 1], rows[-1]):
            verdict = "met" if r.sweeps_per_s >= TARGET_SWEEPS_PER_S else "missed"
            print(f"largest {r.label} run ({r.sweeps} sweeps): {r.sweeps_per_s:.1f} sweeps/s, "
                  f"{r.traces_per_s:.1f} stored traces/s (target {TARGET_SWEEPS_PER_S:g} sweeps/s: {verdict})")
        rss = [r.peak_rss_mb for r in rows[:len(sizes)]]
        print(f"peak RSS clear-write {sizes[0]} -> {sizes[-1]} sweeps: {rss[0]:.1f} -> {rss[-1]:.1f} MB "
              f"({rss[-1] - rss[0]:+.1f} MB)")
        for r in (rows[0], rows[len(sizes)]):
            rep = time_report(folder, r.folder)
            print(f"bench report on the {r.label} run of {r.traces} traces in {r.traces} steps: "
                  f"{rep.wall_s:.1f} s wall, peak RSS {rep.peak_rss_mb:.1f} MB "
                  f"({rep.wall_s / r.traces:.3f} s per step)", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
