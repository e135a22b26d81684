"""Kill-and-resume campaign: SIGKILL ``bench run SEQ --sim`` at random times, resume, compare.

Two small sequences on the demo bench and board (``campaign_common``): a near-field grid and a
far-field ambient + prescan + finals. Each is first run once without interruption (twice: the
second run checks that an uninterrupted run is reproducible), and its timeline is read from the
store: when the measuring actions, the prescan analysis, the finals and the report happen,
counted from the first stored trace.

Then, ``--kills`` times: start ``bench run SEQ --sim`` (seed 1), wait for its first stored trace,
pick a phase at random (seeded) and a random moment inside that phase's window of the clean
run, and at that moment dump the child's Python stacks (SIGUSR1, ``faulthandler``) and kill it
(SIGKILL). The dump tells the phase the child was really in (sweep, stage move, mast/turntable
move, analysis, finals, report ...). Moves last milliseconds on the accelerated simulator, so
one drawn phase, "move", samples the stacks every 2-15 ms (random) from its moment on and kills
the child as soon as a sample shows a stage, mast or turntable move. Then ``bench resume RUN`` until it completes; a resume is
itself killed at a random moment with probability ``--rekill``. Every run ends exported
(``bench export RUN --csv DIR``) and compared with the clean run's export, ignoring ids and
wall-clock columns.

Known limitation, reported and not hidden: the simulator draws its receiver noise from a
counter of sweeps that restarts with the simulator, so traces measured again after a resume see
other noise. Such differences are counted as "noise" (file, values, largest dB change) when
they are confined to traces measured after the resume and to results computed from them.
Anything else - a missing or duplicated trace or result, a changed pose or setting, different
suspects from identical traces, a run not complete, a traceback - is a defect.

Kill moments are seeded, but what the child is doing at a moment depends on the machine, so a
campaign is repeatable in its draws, not bit for bit. Prints figures; asserts nothing.
Run: ``python tests/benchmarks/campaign_kill.py [--kills 50] [--seed 7] [--keep DIR]``.
"""

from __future__ import annotations

import argparse
import random
import sqlite3
import subprocess
import sys
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_sweeps import count_traces, machine_lines, work_folder  # noqa: E402
from campaign_common import (  # noqa: E402
    PlanFacts,
    RunDiff,
    classify_stack,
    compare_exports,
    dump_stacks,
    export_run,
    first_not_done,
    kill_child,
    plan_facts,
    stack_dump_kill,
    start_child,
    store_defects,
    write_sequences,
)

__all__ = ["Reference", "Cycle", "reference_run", "kill_cycle", "main"]

#: Upper bound on ``bench resume`` attempts after one kill.
MAX_RESUMES = 6
#: Upper bound on kills of the resumes that follow one kill.
MAX_REKILLS = 2
#: Wall-clock bound on one child, s.
CHILD_TIMEOUT_S = 300.0


@dataclass
class Reference:
    """A clean run of one sequence: its folder, export, plan and phase windows."""

    name: str
    sequence: Path
    run_dir: Path
    export_dir: Path
    facts: PlanFacts
    windows: dict  # phase -> list of (from_s, to_s) after the first stored trace
    wall_s: float


@dataclass
class Cycle:
    """One kill of a run and everything that followed it."""

    name: str
    index: int
    target: str
    delay_s: float
    phase: str
    remeasured_from: int | None
    resume_phases: list = field(default_factory=list)
    resumes: int = 0
    resume_codes: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    diff: RunDiff | None = None
    store_problems: list = field(default_factory=list)
    folder: Path | None = None


def _wait_exit(proc: subprocess.Popen, timeout_s: float = CHILD_TIMEOUT_S) -> int:
    """The child's exit code; -999 (after killing it) when it outlives ``timeout_s``."""
    try:
        return proc.wait(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
        return -999


def _run_dir(out: Path, proc: subprocess.Popen, deadline: float) -> Path | None:
    """The run folder a starting ``bench run`` creates under ``out``, once its database exists."""
    while time.monotonic() < deadline and proc.poll() is None:
        found = sorted(out.glob("*/data.sqlite"))
        if found:
            return found[-1].parent
        time.sleep(0.005)
    found = sorted(out.glob("*/data.sqlite"))
    return found[-1].parent if found else None


def _wait_first_trace(run_dir: Path, proc: subprocess.Popen, deadline: float) -> float | None:
    """Monotonic time at which the first trace was seen in the store (None: the child ended)."""
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            if count_traces(run_dir) >= 1:
                return time.monotonic()
        except sqlite3.Error:
            pass
        time.sleep(0.005)
    return None


def _windows(run_dir: Path, facts: PlanFacts, exit_wall: float) -> dict:
    """Phase windows (s after the first stored trace) from a clean run's store."""
    db = sqlite3.connect(f"file:{run_dir / 'data.sqlite'}?mode=ro", uri=True)
    try:
        first = db.execute("SELECT MIN(t_wall) FROM traces").fetchone()[0]
        done = dict(db.execute("SELECT action_index, t_wall FROM actions_done").fetchall())
    finally:
        db.close()
    windows: dict = {}
    previous = first
    for index in facts.actions:
        cat = facts.category(index)
        lo, hi = max(0.0, previous - first), done[index] - first
        spans = windows.setdefault(cat, [])
        if spans and abs(spans[-1][1] - lo) < 1e-9:
            spans[-1] = (spans[-1][0], hi)
        else:
            spans.append((lo, hi))
        previous = done[index]
    windows["report"] = [(previous - first, max(previous - first, exit_wall - first - 0.5))]
    return windows


def reference_run(folder: Path, name: str, sequence: Path, tag: str = "ref") -> Reference:
    """Run ``sequence`` once without interruption (with its report); export it."""
    out = folder / f"{tag}-{name}"
    t0 = time.time()
    proc = start_child(["run", str(sequence), "--sim", "--out", str(out)], folder,
                       folder / f"{tag}-{name}.log", folder / f"{tag}-{name}.dump")
    code = _wait_exit(proc)
    exit_wall = time.time()
    run_dir = sorted(out.glob("*/data.sqlite"))[-1].parent
    if code != 0:
        raise RuntimeError(f"the clean run of {name} failed ({code}): see {folder / f'{tag}-{name}.log'}")
    facts = plan_facts(sequence)
    export_dir = folder / f"{tag}-{name}-export"
    export_run(run_dir, export_dir, folder)
    return Reference(name, sequence, run_dir, export_dir, facts, _windows(run_dir, facts, exit_wall),
                     exit_wall - t0)


#: Phases a "move" kill hunts for (moves last milliseconds on the accelerated simulator).
MOVES = ("stage move", "mast/turntable move", "final: mast/turntable move")


def _draw(rng: random.Random, ref: Reference) -> tuple[str, float, float]:
    """A phase of the clean run, a moment inside one of its windows and the window's end (s after
    the first trace). The phase "move" hunts for a stage, mast or turntable move from that moment
    on (see :func:`_hunt`), in the measuring and finals windows."""
    target = rng.choice(sorted(ref.windows) + ["move"])
    spans = (ref.windows.get("measure", []) + ref.windows.get("final", [])) if target == "move" \
        else ref.windows[target]
    lo, hi = rng.choice(spans)
    return target, rng.uniform(lo, hi), hi


def _hunt(proc: subprocess.Popen, dump: Path, until: float, rng: random.Random) -> str | None:
    """Sample the child's stacks at random intervals of 2-15 ms until it is in a move, then kill
    it (a few milliseconds after that sample); at ``until`` (monotonic) kill it anyway."""
    offset = 0
    while time.monotonic() < until:
        text, offset = dump_stacks(proc, dump, offset)
        if text is None:
            return None
        if classify_stack(text) in MOVES:
            return text if kill_child(proc) else None
        time.sleep(rng.uniform(0.002, 0.015))
    return stack_dump_kill(proc, dump, offset)


def kill_cycle(folder: Path, ref: Reference, index: int, rng: random.Random, rekill: float) -> Cycle:
    """Start a run, kill it at a drawn moment, resume it to completion, compare with ``ref``.

    A run that ended before its drawn moment was not killed: it is drawn again (three times
    at most), so the kills counted are real kills.
    """
    for attempt in range(3):
        cycle = _kill_once(folder / f"cycle-{index:03d}-{ref.name}-{attempt}", ref, index, rng, rekill)
        if cycle.phase != "exited":
            break
    return cycle


def _kill_once(work: Path, ref: Reference, index: int, rng: random.Random, rekill: float) -> Cycle:
    """One attempt of :func:`kill_cycle` in ``work`` (phase 'exited' when the run ended first)."""
    work.mkdir()
    target, delay, until = _draw(rng, ref)
    proc = start_child(["run", str(ref.sequence), "--sim", "--out", str(work / "runs")], work,
                       work / "run.log", work / "run.dump")
    deadline = time.monotonic() + CHILD_TIMEOUT_S
    run_dir = _run_dir(work / "runs", proc, deadline)
    seen = _wait_first_trace(run_dir, proc, deadline) if run_dir is not None else None
    if seen is not None:
        time.sleep(max(0.0, seen + delay - time.monotonic()))
    if target == "move" and seen is not None:
        phase = classify_stack(_hunt(proc, work / "run.dump", seen + until + 0.5, rng))
    else:
        phase = classify_stack(stack_dump_kill(proc, work / "run.dump"))
    _wait_exit(proc)
    cycle = Cycle(ref.name, index, target, delay, phase, None, folder=work)
    if phase == "exited":
        return cycle
    if run_dir is None:
        cycle.notes.append("no run folder was created")
        return cycle
    cycle.remeasured_from = first_not_done(run_dir, ref.facts)
    _resume_until_complete(cycle, run_dir, work, rng, rekill)
    _check(cycle, ref, run_dir, work)
    return cycle


def _resume_until_complete(cycle: Cycle, run_dir: Path, work: Path, rng: random.Random, rekill: float) -> None:
    """``bench resume RUN`` until it completes; some resumes are killed again at random."""
    for attempt in range(MAX_RESUMES):
        log, dump = work / f"resume-{attempt}.log", work / f"resume-{attempt}.dump"
        proc = start_child(["resume", str(run_dir)], work, log, dump)
        cycle.resumes += 1
        if len(cycle.resume_phases) < MAX_REKILLS and rng.random() < rekill:
            try:
                proc.wait(timeout=rng.uniform(0.3, 3.0))
            except subprocess.TimeoutExpired:
                cycle.resume_phases.append(classify_stack(stack_dump_kill(proc, dump)))
                _wait_exit(proc)
                cycle.resume_codes.append("killed")
                continue
        code = _wait_exit(proc)
        text = log.read_text(errors="replace")
        cycle.resume_codes.append(code)
        if code == 0:
            return
        if code == 2 and "already complete" in text:
            cycle.notes.append("resume refused: " + text.strip().splitlines()[-1][:160])
            return
        cycle.notes.append(f"resume exit {code}: " + (text.strip().splitlines() or [""])[-1][:160])
    cycle.notes.append(f"not complete after {MAX_RESUMES} resumes")


def _check(cycle: Cycle, ref: Reference, run_dir: Path, work: Path) -> None:
    """Report, tracebacks, store invariants and the export compared with the clean run."""
    if not (run_dir / "report.html").exists():
        rep = subprocess.run([sys.executable, "-m", "bench", "report", str(run_dir)], cwd=work,
                             capture_output=True, text=True, timeout=CHILD_TIMEOUT_S)
        cycle.notes.append(f"report.html missing after resume; 'bench report' exit {rep.returncode}")
    for log in work.glob("*.log"):
        if "Traceback" in log.read_text(errors="replace"):
            cycle.notes.append(f"traceback in {log.name}")
    cycle.store_problems = store_defects(run_dir, ref.facts)
    exported = export_run(run_dir, work / "export", work)
    if exported.returncode != 0:
        cycle.notes.append(f"export exit {exported.returncode}: {exported.stderr.strip()[:160]}")
        return
    cycle.diff = compare_exports(ref.export_dir, work / "export", ref.facts, cycle.remeasured_from)


def _verdict(c: Cycle) -> str:
    """'identical', 'noise' (differences explained by the noise limitation) or 'DEFECT'."""
    bad_notes = [n for n in c.notes if not n.startswith(("resume refused", "report.html missing"))]
    if c.diff is None or c.store_problems or bad_notes or c.diff.defects:
        return "DEFECT"
    return "identical" if c.diff.identical else "noise"


def print_phases(cycles: list[Cycle]) -> None:
    """Kills by the phase the child was really in (from its stack), runs and resumes."""
    runs = Counter(c.phase for c in cycles)
    resumes = Counter(p for c in cycles for p in c.resume_phases)
    targets = Counter(c.target for c in cycles)
    print(f"{'phase at the kill (from the stack)':36s} {'bench run':>9s} {'bench resume':>12s}")
    for phase in sorted(set(runs) | set(resumes)):
        print(f"{phase:36s} {runs[phase]:9d} {resumes[phase]:12d}")
    print(f"{'total':36s} {sum(runs.values()):9d} {sum(resumes.values()):12d}")
    print("drawn windows: " + ", ".join(f"{k} {v}" for k, v in sorted(targets.items())))


def print_outcomes(cycles: list[Cycle]) -> None:
    """Per sequence: kills, resumes, and how the exported data compares with the clean run."""
    head = (f"{'sequence':11s} {'kills':>5s} {'rekills':>7s} {'resumes':>7s} {'refused':>7s} "
            f"{'identical':>9s} {'noise only':>10s} {'DEFECT':>6s}")
    print(head)
    print("-" * len(head))
    for name in sorted({c.name for c in cycles}):
        cs = [c for c in cycles if c.name == name]
        verdicts = Counter(_verdict(c) for c in cs)
        refused = sum(any(n.startswith("resume refused") for n in c.notes) for c in cs)
        print(f"{name:11s} {len(cs):5d} {sum(len(c.resume_phases) for c in cs):7d} "
              f"{sum(c.resumes for c in cs):7d} {refused:7d} {verdicts['identical']:9d} "
              f"{verdicts['noise']:10d} {verdicts['DEFECT']:6d}")


def print_differences(cycles: list[Cycle]) -> None:
    """Differing files over all runs: runs, values, rows (traces or result rows), largest dB."""
    table: dict = {}
    for c in cycles:
        for f in (c.diff.files if c.diff else []):
            key = (c.name, f.file.split(" [")[0] if f.file.startswith("results") else f.file, f.file, f.noise)
            row = table.setdefault(key, [0, 0, 0, 0.0])
            row[0] += 1
            row[1] += f.values
            row[2] += f.rows
            row[3] = max(row[3], f.max_abs_db if f.max_abs_db == f.max_abs_db else 0.0)
    if not table:
        print("no exported file differs from the clean run")
        return
    print(f"{'sequence':11s} {'file':26s} {'kind':6s} {'runs':>4s} {'values':>8s} {'rows':>6s} {'max |dB|':>8s}")
    for (name, _, fname, noise), (runs, values, rows, worst) in sorted(table.items()):
        print(f"{name:11s} {fname:26s} {'noise' if noise else 'DEFECT':6s} {runs:4d} {values:8d} {rows:6d} "
              f"{worst:8.3f}")


def print_defects(cycles: list[Cycle], seed: int) -> None:
    """Every run with a defect, with what to run to see it again."""
    bad = [c for c in cycles if _verdict(c) == "DEFECT"]
    print(f"defects: {len(bad)}")
    for c in bad:
        what = "; ".join(c.store_problems + [n for n in c.notes if not n.startswith("resume refused")]
                         + [f"{f.file}: {f.detail}" for f in (c.diff.defects if c.diff else [])])
        print(f"  cycle {c.index} ({c.name}): killed in {c.phase} at {c.delay_s:.2f} s after the first "
              f"trace, resumes {c.resume_codes}: {what}")
        print(f"    reproduce: bench run kc-{c.name}.toml --sim; kill -9 it {c.delay_s:.2f} s after its first "
              f"trace; bench resume RUN; bench export RUN --csv DIR; compare with a clean run (seed {seed})")
    refused = [c for c in cycles if any(n.startswith("resume refused") for n in c.notes)]
    if refused:
        lost = [c for c in refused if any(n.startswith("report.html missing") for n in c.notes)]
        codes = Counter(n.rsplit(" ", 1)[-1] for c in lost for n in c.notes if n.startswith("report.html"))
        phases = Counter(c.phase for c in refused)
        print(f"  {len(refused)} runs were already complete when a 'bench resume' came (killed in their report, "
              f"or a resume killed in its report; first kill in {dict(phases)}): 'bench resume' refused "
              f"them (exit codes {dict(Counter(c.resume_codes[-1] for c in refused))}); {len(lost)} of them had no "
              f"report.html, which 'bench report RUN' then wrote (exit codes {dict(codes)})")
        first = next(n for n in refused[0].notes if n.startswith("resume refused"))
        print(f"    e.g. {first}")


def _control(folder: Path, refs: dict) -> None:
    """A second clean run of each sequence: is an uninterrupted run reproducible?"""
    for name, ref in refs.items():
        again = reference_run(folder, name, ref.sequence, tag="control")
        diff = compare_exports(ref.export_dir, again.export_dir, ref.facts, None)
        said = "identical" if diff.identical else "; ".join(f"{f.file}: {f.detail}" for f in diff.files)
        print(f"control: two clean runs of {name}: {said} ({ref.wall_s:.1f} s and {again.wall_s:.1f} s)")


def main(argv: list[str] | None = None) -> int:
    """Clean and control runs, then ``--kills`` kill cycles; print the tables and the defects."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--kills", type=int, default=50, help="kills of a running 'bench run' (default 50)")
    parser.add_argument("--seed", type=int, default=7, help="seed of the kill draws (default 7)")
    parser.add_argument("--rekill", type=float, default=0.25, help="chance that a resume is killed too")
    parser.add_argument("--keep", type=Path, help="keep the run folders under this folder")
    args = parser.parse_args(argv)
    for line in machine_lines():
        print(line)
    rng = random.Random(args.seed)
    t0 = time.monotonic()
    with work_folder("campaign-kill-", args.keep) as folder:
        refs = {name: reference_run(folder, name, seq) for name, seq in write_sequences(folder).items()}
        _control(folder, refs)
        for name, ref in refs.items():
            print(f"{name}: windows after the first trace (s): "
                  + ", ".join(f"{k} " + " ".join(f"{a:.2f}-{b:.2f}" for a, b in v) for k, v in ref.windows.items()))
        cycles = []
        for i in range(args.kills):
            ref = refs[sorted(refs)[i % len(refs)]]
            cycles.append(kill_cycle(folder, ref, i, rng, args.rekill))
            c = cycles[-1]
            print(f"  cycle {i:3d} {c.name:10s} target {c.target:8s} +{c.delay_s:5.2f} s -> {c.phase:28s} "
                  f"resumes {c.resume_codes} {_verdict(c)}", flush=True)
        print(f"\n{args.kills} kills in {time.monotonic() - t0:.0f} s (seed {args.seed}, rekill {args.rekill})\n")
        print_phases(cycles)
        print()
        print_outcomes(cycles)
        print()
        print_differences(cycles)
        print()
        print_defects(cycles, args.seed)
    return 0


if __name__ == "__main__":
    sys.exit(main())
