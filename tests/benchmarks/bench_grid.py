"""Near-field grid throughput of ``bench run --sim`` (move, sweep, fetch, store) and peak memory.

Each case is one ``grid`` step of the 10 mm H-loop probe over the demo board (100 mm x 80 mm) at
a 2 mm x 1.6 mm pitch, in two orientations (0 and 90 deg), with 2,001-point traces (30-300 MHz,
RBW 1 MHz, peak). The grid grows from 10 x 10 to 50 x 50 positions (the full board), i.e. from
200 to 5,000 points. Every point is a G-code move of the simulated stage over loopback TCP
(lift to the travel height, travel, lower, wait for the position report), a sweep of the
simulated analyzer over SCPI (the near field of every emitter at that probe pose), a
``REAL,32`` trace fetch and one committed SQLite row.

Figures per case: points per second from the first to the last stored trace (steady state,
compare with the target of 100 points/s), points per second over the whole command, and the
child's peak resident set. Run: ``python tests/benchmarks/bench_grid.py [--quick]``.
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import dataclass
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_sweeps import (  # noqa: E402 - the shared helpers live beside this script
    machine_lines,
    read_run,
    run_child,
    run_folder_from_stdout,
    work_folder,
    write_sequence,
)

#: Points per trace of the grid benchmark.
GRID_POINTS = 2001
#: Grid pitch along board x and y, mm: 50 x 50 positions span 98 mm x 78.4 mm of the board.
PITCH_X_MM, PITCH_Y_MM = 2.0, 1.6
#: Target of the issue: grid points per second.
TARGET_POINTS_PER_S = 100.0


def grid_sequence(folder: Path, n: int) -> Path:
    """An ``n`` x ``n`` grid in two orientations at the fixed pitch, from the board corner."""
    name = f"bm-grid-{n}x{n}"
    sweep = {"start": "30 MHz", "stop": "300 MHz", "rbw": "1 MHz", "points": GRID_POINTS,
             "detector": "peak"}
    step = {"kind": "grid", "label": "hloop", "sweep": "nf", "probe": "hloop-10mm",
            "orientations": ["0 deg", "90 deg"],
            "area": {"x": ["0 mm", f"{(n - 1) * PITCH_X_MM:g} mm"],
                     "y": ["0 mm", f"{(n - 1) * PITCH_Y_MM:g} mm"]},
            "step_x": f"{PITCH_X_MM:g} mm", "step_y": f"{PITCH_Y_MM:g} mm",
            "height": "3 mm", "path": "serpentine"}
    return write_sequence(folder / f"{name}.toml", name, {"nf": sweep}, [step])


@dataclass
class GridFigures:
    """Figures of one grid run."""

    grid: str
    points: int
    wall_s: float
    loop_s: float
    points_per_s: float
    e2e_points_per_s: float
    peak_rss_mb: float


def measure_grid(folder: Path, n: int) -> GridFigures:
    """Run one grid case in a child process and read its figures back from the store."""
    seq = grid_sequence(folder, n)
    child = run_child(["run", str(seq), "--sim", "--no-plots", "--out", str(folder / "runs")], folder)
    if child.returncode != 0:
        raise RuntimeError(f"bench run failed ({child.returncode}):\n{child.stderr[-3000:]}")
    stored = read_run(folder / run_folder_from_stdout(child.stdout))
    expected = 2 * n * n
    if stored.traces != expected or stored.duplicate_actions:
        raise RuntimeError(f"expected {expected} traces, found {stored.traces} "
                           f"({stored.duplicate_actions} duplicated)")
    return GridFigures(f"{n} x {n} x 2", stored.traces, child.wall_s, stored.loop_s,
                       stored.rate_per_s(stored.traces), stored.traces / child.wall_s, child.peak_rss_mb)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes only (a smoke run)")
    parser.add_argument("--keep", type=Path, help="keep the run folders under this folder")
    args = parser.parse_args(argv)
    sizes = (5, 10) if args.quick else (10, 20, 35, 50)
    for line in machine_lines():
        print(line)
    print(f"case: H-loop 10 mm, {PITCH_X_MM:g} mm x {PITCH_Y_MM:g} mm pitch, 0 and 90 deg, "
          f"{GRID_POINTS}-point traces 30-300 MHz RBW 1 MHz; target {TARGET_POINTS_PER_S:g} points/s\n")
    head = f"{'grid':14s} {'points':>7s} {'wall s':>7s} {'loop s':>7s} {'points/s':>9s} {'e2e pt/s':>9s} {'peak RSS MB':>12s}"
    print(head)
    print("-" * len(head))
    rows = []
    with work_folder("bench-grid-", args.keep) as folder:
        for n in sizes:
            r = measure_grid(folder, n)
            rows.append(r)
            print(f"{r.grid:14s} {r.points:7d} {r.wall_s:7.1f} {r.loop_s:7.1f} {r.points_per_s:9.1f} "
                  f"{r.e2e_points_per_s:9.1f} {r.peak_rss_mb:12.1f}", flush=True)
    print()
    last = rows[-1]
    verdict = "met" if last.points_per_s >= TARGET_POINTS_PER_S else "missed"
    print(f"largest grid ({last.points} points): {last.points_per_s:.1f} points/s "
          f"(target {TARGET_POINTS_PER_S:g}: {verdict})")
    print(f"peak RSS {rows[0].points} -> {rows[-1].points} points: {rows[0].peak_rss_mb:.1f} -> "
          f"{rows[-1].peak_rss_mb:.1f} MB ({rows[-1].peak_rss_mb - rows[0].peak_rss_mb:+.1f} MB)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
