"""Fault campaign: ``bench run`` through a fault-injecting proxy to an external ``bench sim``.

For every run a fresh ``bench sim --seed 1`` is started (its noise counter starts at zero, so a
run and the clean run see the same noise up to the fault), :mod:`faultproxy` relays each of its
instruments on another loopback port, and a copy of the demo bench file points at the proxy
(analyzer ``TCPIP::127.0.0.1::PORT::SOCKET`` with a 2 s timeout, stage, mast and turntable
``socket://127.0.0.1:PORT``, supply). Two small sequences: a near-field grid (the stage and the
analyzer) and a far-field ambient + prescan + finals at one antenna pose (the mast, turntable,
supply and analyzer; the stage parks the probe). One pose only, because the external
simulator's mast and turntable move in real time for an outside client.

Each fault kind of :data:`faultproxy.FAULT_KINDS` is injected once per run, into one device, at a
seeded random reply number drawn within the clean run's reply count of that device. A run that
stops must say so in one line naming ``bench resume``; it is then resumed (the fault does not
fire again) until complete. Then:

* tracebacks anywhere (must be 0);
* the store: every planned action done once, no duplicated trace, state complete;
* every stored trace against the simulator's true replies, kept by the proxy: the max-hold (or
  last) of the last ``sweeps`` blocks the analyzer sent before the trace was committed, in dBuV
  (a trace from a stale or misplaced reply does not match);
* every stored pose against the instruments' commands: the stage position and the mast/turntable
  settings last sent before the commit must be those the clean run had for the same stored pose;
* the export against the clean run's export, allowing for the noise limitation (traces measured
  after the fault see other noise: the retried sweeps move the simulator's noise counter).

Prints a table per fault kind. Asserts nothing.
Run: ``python tests/benchmarks/campaign_faults.py [--runs-per-kind 4] [--seed 11] [--keep DIR]``.
"""

from __future__ import annotations

import argparse
import random
import re
import shutil
import sqlite3
import subprocess
import sys
import time
import tomllib
from collections import Counter
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from types import SimpleNamespace

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_sweeps import machine_lines, work_folder  # noqa: E402
from campaign_common import (  # noqa: E402
    NEAR_FIELD,
    PlanFacts,
    RunDiff,
    bench_argv,
    compare_exports,
    export_run,
    plan_facts,
    store_defects,
)
from faultproxy import FAULT_KINDS, Fault, FaultProxy  # noqa: E402

__all__ = ["FAR_ONE_POSE", "Case", "start_sim", "write_bench", "run_case", "trace_oracle",
           "pose_oracle", "main"]

#: Far-field at one antenna pose (1 m, horizontal, 0 deg): no real-time mast or turntable travel.
FAR_ONE_POSE = """\
schema = 1
name = "fc-far-field"
description = "fault campaign: ambient, prescan and finals at one antenna pose"

[sweeps.band]
start = "30 MHz"
stop = "300 MHz"
rbw = "120 kHz"
detector = "peak"
trace = "max-hold"
count = 2

[[steps]]
kind = "ambient"
label = "ambient"
sweep = "band"
height = "1 m"
polarization = "horizontal"
azimuth = "0 deg"

[[steps]]
kind = "prescan"
label = "prescan"
sweep = "band"
heights = { from = "1 m", to = "1 m", step = "1 m" }
polarizations = ["horizontal"]
azimuths = { from = "0 deg", to = "0 deg", step = "90 deg" }
limit = "cispr32-class-b-3m"
ambient = "ambient"
margin = "6 dB"

[[steps]]
kind = "final"
label = "final"
of = "prescan"
detectors = ["quasi-peak"]
dwell = "0.2 s"
"""

#: Wall-clock bound on one child, s.
CHILD_TIMEOUT_S = 240.0
#: ``bench resume`` attempts after a stop.
MAX_RESUMES = 3
#: The analyzer's reply timeout in the bench copy (a stall lasts longer).
ANALYZER_TIMEOUT = "2 s"
#: Line instruments' reply timeout in their profiles, s (a stall lasts longer).
LINE_TIMEOUT_S = 5.0
#: Error lines in each line dialect (G-code firmware; our positioner dialect).
ERROR_LINES = {"stage": b"Error:injected fault\n", "positioner": b"error: injected fault\n"}
_LOG_LINE = re.compile(r"^\d{4}-\d\d-\d\d \d\d:\d\d:\d\d,\d+ (DEBUG|INFO|WARNING|ERROR|CRITICAL) ")


@dataclass
class Case:
    """One run through the proxy and what came of it."""

    sequence: str
    fault: Fault | None
    fired: bool = False
    exit_codes: list = field(default_factory=list)
    outcome: str = ""
    stop_lines: list = field(default_factory=list)
    tracebacks: int = 0
    store_problems: list = field(default_factory=list)
    wrong_traces: int = 0
    wrong_poses: int = 0
    diff: RunDiff | None = None
    replies: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)
    folder: Path | None = None
    run_dir: Path | None = None
    poses: dict = field(default_factory=dict)
    recovered: int = 0


def start_sim(folder: Path, seed: int = 1) -> tuple[subprocess.Popen, dict]:
    """Start ``bench sim --seed SEED``; (process, role -> address) once it serves."""
    proc = subprocess.Popen(bench_argv(["sim", "--seed", str(seed)]), cwd=folder, stdout=subprocess.PIPE,
                            stderr=subprocess.DEVNULL, stdin=subprocess.DEVNULL, text=True)
    addresses, deadline = {}, time.monotonic() + 60.0
    while time.monotonic() < deadline:
        line = proc.stdout.readline()
        if not line or line.startswith("simulated bench running"):
            break
        role, _, address = line.strip().partition(" ")
        addresses[role] = address.strip()
    if "analyzer" not in addresses:
        stop_sim(proc)
        raise RuntimeError("bench sim did not print its addresses")
    return proc, addresses


def stop_sim(proc: subprocess.Popen) -> None:
    """Stop a ``bench sim`` child (SIGTERM, then SIGKILL after 10 s)."""
    proc.terminate()
    try:
        proc.wait(timeout=10.0)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
    if proc.stdout is not None:
        proc.stdout.close()


def write_bench(folder: Path, addresses: dict) -> Path:
    """A copy of the demo bench file pointing at ``addresses``, its tables beside it."""
    demo = resources.files("bench.demo")
    text = (demo / "demo-bench.toml").read_text(encoding="utf-8")
    for role, address in addresses.items():
        text = text.replace(f'"sim://{role}"', f'"{address}"')
    text = re.sub(r'(?m)^timeout = "10 s"', f'timeout = "{ANALYZER_TIMEOUT}"', text)
    if not (folder / "tables").exists():
        shutil.copytree(Path(str(demo / "tables")), folder / "tables")
    path = folder / "bench.toml"
    path.write_text(text, encoding="utf-8")
    return path


def write_sequences(folder: Path) -> dict[str, Path]:
    """The near-field grid and the one-pose far-field sequence; name -> path."""
    out = {}
    for name, text in (("near-field", NEAR_FIELD.replace("kc-near-field", "fc-near-field")),
                       ("far-field", FAR_ONE_POSE)):
        out[name] = folder / f"fc-{name}.toml"
        out[name].write_text(text, encoding="utf-8")
    return out


def _child(args: list[str], cwd: Path, tag: str) -> tuple[int, str, str]:
    """Run ``bench ARGS``; (exit code, stdout, stderr), -999 when it outlived the bound."""
    try:
        done = subprocess.run(bench_argv(args), cwd=cwd, capture_output=True, text=True,
                              timeout=CHILD_TIMEOUT_S, errors="replace")
        code, out, err = done.returncode, done.stdout, done.stderr
    except subprocess.TimeoutExpired as exc:
        code, out, err = -999, _text(exc.stdout), _text(exc.stderr)
    (cwd / f"{tag}.out").write_text(out, encoding="utf-8")
    (cwd / f"{tag}.err").write_text(err, encoding="utf-8")
    return code, out, err


def _text(data) -> str:
    if data is None:
        return ""
    return data if isinstance(data, str) else data.decode("utf-8", "replace")


def _message_lines(stderr: str) -> list[str]:
    """The lines of stderr that are not log records nor the safety note printed at start."""
    return [line for line in stderr.splitlines()
            if line.strip() and not _LOG_LINE.match(line) and not line.startswith("Safety:")]


# ------------------------------------------------------------------ oracles

def _stored_traces(run_dir: Path) -> list[tuple]:
    """(id, t_wall, sweeps, trace_mode, data, pose columns...) of every stored trace."""
    db = sqlite3.connect(f"file:{run_dir / 'data.sqlite'}?mode=ro", uri=True)
    try:
        return db.execute("SELECT id, t_wall, sweeps, trace_mode, data, x_m, y_m, z_m, rotation_deg, probe, "
                          "height_m, polarization, azimuth_deg FROM traces ORDER BY id").fetchall()
    finally:
        db.close()


def trace_oracle(run_dir: Path, blocks: list[tuple[float, bytes]]) -> tuple[int, list[str]]:
    """Stored traces that are not what the simulator sent: (traces checked, problems).

    A trace of ``sweeps`` sweeps must equal, within 1e-3 dB, the combination (max-hold: point-wise
    maximum; clear-write: the last; average: the mean) of the last ``sweeps`` trace blocks the
    analyzer sent before the trace was committed, converted from dBm to dBuV.
    """
    from bench.units import dbm_to_dbuv

    times = np.array([t for t, _ in blocks])
    problems, rows = [], _stored_traces(run_dir)
    for tid, t_wall, sweeps, mode, data, *_ in rows:
        k = int(np.searchsorted(times, t_wall))
        stored = np.frombuffer(data, dtype="<f4").astype(float)
        if k < sweeps:
            problems.append(f"trace {tid}: fewer blocks than sweeps before its commit")
            continue
        stack = np.vstack([np.frombuffer(p, dtype="<f4").astype(float) for _, p in blocks[k - sweeps:k]]) \
            if len({len(p) for _, p in blocks[k - sweeps:k]}) == 1 else None
        if stack is None or stack.shape[1] != stored.size:
            problems.append(f"trace {tid}: {stored.size} points, the last block(s) sent had another length")
            continue
        combined = {"max-hold": stack.max(axis=0), "average": stack.mean(axis=0)}.get(mode, stack[-1])
        worst = float(np.max(np.abs(dbm_to_dbuv(combined) - stored)))
        if not worst <= 1e-3:
            problems.append(f"trace {tid} ({mode}, {sweeps} sweeps): differs from the simulator's reply "
                            f"by up to {worst:.2f} dB")
    return len(rows), problems


_AXIS = re.compile(r"([XYZA]):\s*([-+]?[0-9.]+)")


def _last_before(events: list[tuple[float, str]], t: float, keep) -> str | None:
    """The last event text before ``t`` that ``keep(text)`` accepts."""
    found = None
    for when, text in events:
        if when >= t:
            break
        if keep(text):
            found = text
    return found


def _machine_state(row, stage, positioner) -> tuple:
    """What the instruments were really set to when a trace was committed."""
    t = row[1]
    tool = _last_before(stage.commands if stage else [], t, lambda s: re.match(r"^T\d+", s) is not None)
    tool = tool.split()[0] if tool else None
    if row[5] is not None:  # a probe pose: the stage's own last position report
        report = _last_before(stage.lines, t, lambda s: s.startswith("X:")) if stage else None
        axes = tuple(round(float(v), 2) for _, v in _AXIS.findall(report or ""))
        return ("stage", axes, tool)
    cmds = positioner.commands if positioner else []
    last = [(_last_before(cmds, t, lambda s, w=w: s.startswith(w + " ")) or "").split(" ", 1)[-1]
            for w in ("HEIGHT", "POL", "AZIM")]
    return ("positioner", tuple(last), tool)


def _pose_key(row) -> tuple:
    return tuple(None if v is None else (round(v, 6) if isinstance(v, float) else v) for v in row[5:])


def pose_oracle(run_dir: Path, proxy: FaultProxy, clean: dict | None) -> tuple[dict, list[str]]:
    """Each stored pose against the instruments' real state at its commit.

    Returns the map stored pose -> machine state (the clean run's is the reference) and the
    problems: a pose whose machine state differs from the clean run's for the same pose, or a
    far-field reading taken with a probe not parked (tool other than T0).
    """
    stage, positioner = proxy.devices.get("stage"), proxy.devices.get("positioner")
    states, problems = {}, []
    for row in _stored_traces(run_dir):
        state = _machine_state(row, stage, positioner)
        key = _pose_key(row)
        states.setdefault(key, state)
        if state[0] == "positioner" and state[2] not in (None, "T0"):
            problems.append(f"trace {row[0]}: far-field reading with tool {state[2]} on the stage")
        if clean is not None and key in clean and clean[key] != state:
            problems.append(f"trace {row[0]}: pose {key} taken at {state}, the clean run at {clean[key]}")
    return states, problems


# ------------------------------------------------------------------ one run

def _run_folder(work: Path) -> Path | None:
    found = sorted(work.glob("runs/*/manifest.toml"))
    return found[-1].parent if found else None


def _run_and_resume(case: Case, seq: Path, bench: Path, work: Path) -> None:
    """``bench run`` (again once if it stopped before creating a run); resume a stopped run."""
    args = ["run", str(seq), "--bench", str(bench), "--no-plots", "--out", str(work / "runs")]
    code, out, err = _child(args, work, "run")
    case.exit_codes.append(code)
    case.stop_lines = _message_lines(err) if code else []
    if code and _run_folder(work) is None and code != -999:
        case.notes.append("stopped before creating a run folder; run again")
        code, out, err = _child(args, work, "run-again")
        case.exit_codes.append(code)
    case.run_dir = _run_folder(work)
    if code == 0 or case.run_dir is None or code == -999:
        return
    for attempt in range(MAX_RESUMES):
        code, out, err = _child(["resume", str(case.run_dir), "--no-plots"], work, f"resume-{attempt}")
        case.exit_codes.append(code)
        if code in (0, -999):
            return


def _outcome(case: Case) -> str:
    """completed / stopped (one line) + resumed / unclear stop / hang / not complete."""
    first = case.exit_codes[0]
    if first == -999 or -999 in case.exit_codes:
        return "hang"
    if first == 0:
        return "completed"
    one = len(case.stop_lines) == 1 and case.stop_lines[0].startswith("bench: ")
    resumable = bool(case.stop_lines) and "bench resume" in case.stop_lines[-1]
    if case.exit_codes[-1] != 0:
        return "not complete"
    if one and resumable:
        return "stopped, resumed"
    if one and len(case.exit_codes) == 2 and "before creating" in " ".join(case.notes):
        return "refused to start, rerun"
    return f"stopped unclearly ({len(case.stop_lines)} lines), resumed"


def run_case(folder: Path, index: int, name: str, seq: Path, fault: Fault | None) -> tuple[Case, FaultProxy]:
    """A fresh simulator, the proxy with ``fault``, ``bench run`` (and resumes); the case and proxy."""
    work = folder / f"case-{index:03d}-{name}-{fault.kind if fault else 'clean'}"
    work.mkdir()
    sim, addresses = start_sim(work)
    proxy = FaultProxy(addresses, fault)
    case = Case(name, fault, folder=work)
    try:
        bench = write_bench(work, proxy.start())
        _run_and_resume(case, seq, bench, work)
    finally:
        proxy.stop()
        stop_sim(sim)
    case.fired = proxy.fired_at is not None
    case.replies = proxy.replies()
    case.outcome = _outcome(case)
    case.tracebacks = sum("Traceback" in p.read_text(errors="replace") for p in work.glob("*.err"))
    case.tracebacks += sum("Traceback" in p.read_text(errors="replace") for p in work.glob("*.out"))
    return case, proxy


def _remeasured_from(run_dir: Path, fired_at: float | None) -> int | None:
    """The first action with a trace committed after the fault fired (None: none)."""
    if fired_at is None:
        return None
    db = sqlite3.connect(f"file:{run_dir / 'data.sqlite'}?mode=ro", uri=True)
    try:
        return db.execute("SELECT MIN(action_index) FROM traces WHERE t_wall > ?", (fired_at,)).fetchone()[0]
    finally:
        db.close()


def check_case(case: Case, proxy: FaultProxy, facts: PlanFacts, clean: Case | None) -> None:
    """Store, trace and pose oracles, and the export against the clean run's."""
    if case.run_dir is None:
        case.notes.append("no run folder")
        return
    case.store_problems = store_defects(case.run_dir, facts)
    manifest = tomllib.loads((case.run_dir / "manifest.toml").read_text(encoding="utf-8"))
    case.recovered = int(manifest.get("faults_recovered", 0))
    _, problems = trace_oracle(case.run_dir, proxy.devices["analyzer"].blocks)
    case.wrong_traces = len(problems)
    case.notes += problems[:3]
    case.poses, pose_problems = pose_oracle(case.run_dir, proxy, clean.poses if clean else None)
    case.wrong_poses = len(pose_problems)
    case.notes += pose_problems[:3]
    done = export_run(case.run_dir, case.folder / "export", case.folder)
    if done.returncode != 0:
        case.notes.append(f"export exit {done.returncode}: {done.stderr.strip()[:200]}")
        return
    if clean is not None:
        case.diff = compare_exports(clean.folder / "export", case.folder / "export", facts,
                                    _remeasured_from(case.run_dir, proxy.fired_at))


# ------------------------------------------------------------------ the campaign

#: Reply timeout of each device, s (the bench copy's analyzer timeout; the profiles' others).
TIMEOUTS_S = {"analyzer": 2.0, "supply": 5.0, "stage": LINE_TIMEOUT_S, "positioner": LINE_TIMEOUT_S}


def draw_fault(seed: int, kind: str, r: int, replies: dict) -> Fault:
    """The r-th fault of kind ``kind``: a device in rotation, a seeded reply number and position.

    Each (seed, kind, r) has its own generator, so one kind can be run alone with the same draws.
    """
    rng, k = random.Random(f"{seed}-{kind}-{r}"), FAULT_KINDS.index(kind)
    devices = [d for d in ("analyzer", "stage", "positioner", "supply") if replies.get(d, 0) > 0
               and (kind != "stage-error" or d in ERROR_LINES)]
    device = devices[(r // 2 + k) % len(devices)]
    return Fault(kind, device, rng.randint(1, replies[device]), position=rng.random(),
                 stall_s=TIMEOUTS_S[device] + 1.5, error_line=ERROR_LINES.get(device, b"error\n"))


def _wrong(case: Case) -> int:
    """Wrong data stored: bad traces, bad poses, store problems, differences beyond noise."""
    beyond = len(case.diff.defects) if case.diff is not None else 0
    return case.wrong_traces + case.wrong_poses + len(case.store_problems) + beyond


def print_table(cases: list[Case]) -> None:
    """Per fault kind: runs, fired, outcomes, tracebacks, wrong data, differences from noise."""
    head = (f"{'fault':12s} {'runs':>4s} {'fired':>5s} {'completed':>9s} {'stopped 1 line':>14s} "
            f"{'resumed':>7s} {'other':>5s} {'tracebacks':>10s} {'wrong data':>10s} {'noise diff':>10s}")
    print(head)
    print("-" * len(head))
    for kind in FAULT_KINDS:
        cs = [c for c in cases if c.fault is not None and c.fault.kind == kind]
        if not cs:
            continue
        out = Counter(c.outcome for c in cs)
        one_line = out["stopped, resumed"] + out["refused to start, rerun"]
        other = len(cs) - out["completed"] - one_line
        resumed = sum(c.outcome.endswith(("resumed", "rerun")) and c.exit_codes[-1] == 0 for c in cs)
        noise = sum(c.diff is not None and not c.diff.identical and not c.diff.defects for c in cs)
        print(f"{kind:12s} {len(cs):4d} {sum(c.fired for c in cs):5d} {out['completed']:9d} {one_line:14d} "
              f"{resumed:7d} {other:5d} {sum(c.tracebacks for c in cs):10d} "
              f"{sum(_wrong(c) > 0 for c in cs):10d} {noise:10d}")


def print_case(i: int, c: Case) -> None:
    """One line per run: the fault, the outcome, what was checked."""
    f = c.fault
    what = f"{f.kind:11s} {f.device:10s} reply {f.at_reply:4d} pos {f.position:.2f}" if f else "clean"
    diff = "-" if c.diff is None else ("identical" if c.diff.identical else
                                       ("noise" if not c.diff.defects else "DEFECT"))
    print(f"  {i:3d} {c.sequence:10s} {what:48s} {'fired' if c.fired else 'not fired':9s} "
          f"exit {c.exit_codes} {c.outcome}, recovered {c.recovered}; traces wrong {c.wrong_traces}, "
          f"poses wrong {c.wrong_poses}, "
          f"export {diff}", flush=True)
    if c.stop_lines and c.outcome != "completed":
        print(f"        stop message: {' | '.join(c.stop_lines)[:300]}")


def print_defects(cases: list[Case], seed: int) -> None:
    """Every run with a traceback, a hang, an unclear stop or wrong data, with its reproducer."""
    bad = [c for c in cases if c.tracebacks or _wrong(c) or c.outcome not in
           ("completed", "stopped, resumed", "refused to start, rerun")]
    print(f"defects: {len(bad)}")
    for c in bad:
        f = c.fault
        details = c.store_problems + c.notes + [f"{d.file}: {d.detail}" for d in (c.diff.defects if c.diff else [])]
        print(f"  {c.sequence} with Fault({f.kind!r}, {f.device!r}, at_reply={f.at_reply}, "
              f"position={f.position:.3f}): {c.outcome}, tracebacks {c.tracebacks}; {'; '.join(details)[:600]}")
        print(f"    reproduce: python tests/benchmarks/campaign_faults.py --seed {seed} --kinds {f.kind} "
              f"--keep DIR (run folder {c.folder.name})")


def oracle_self_check(case: Case, proxy: FaultProxy) -> str:
    """Do the oracles see wrong data? Feed them the clean run with every block replaced by the
    one before (stale replies) and every stage report by the one before (a pose off by one)."""
    blocks = proxy.devices["analyzer"].blocks
    stale = [(t, blocks[i - 1][1] if i else p) for i, (t, p) in enumerate(blocks)]
    checked, flagged = trace_oracle(case.run_dir, stale)
    text = f"{len(flagged)}/{checked} traces flagged with stale blocks"
    stage = proxy.devices.get("stage")
    if stage is not None and stage.lines:
        reports = [i for i, (_, line) in enumerate(stage.lines) if line.startswith("X:")]
        lines = list(stage.lines)
        for a, b in zip(reports[1:], reports[:-1]):
            lines[a] = (stage.lines[a][0], stage.lines[b][1])
        fake = SimpleNamespace(devices={"stage": SimpleNamespace(lines=lines, commands=stage.commands)})
        _, wrong = pose_oracle(case.run_dir, fake, case.poses)
        text += f", {len(wrong)}/{checked} poses flagged with stage reports one move late"
    return text


def main(argv: list[str] | None = None) -> int:
    """Clean runs, then ``--runs-per-kind`` runs per fault kind; print the table and the defects."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs-per-kind", type=int, default=6, help="runs per fault kind (default 6)")
    parser.add_argument("--seed", type=int, default=11, help="seed of the fault draws (default 11)")
    parser.add_argument("--kinds", nargs="*", choices=FAULT_KINDS, default=list(FAULT_KINDS))
    parser.add_argument("--keep", type=Path, help="keep the run folders under this folder")
    args = parser.parse_args(argv)
    for line in machine_lines():
        print(line)
    t0 = time.monotonic()
    with work_folder("campaign-faults-", args.keep) as folder:
        seqs = write_sequences(folder)
        clean, facts, cases = {}, {}, []
        for name, seq in seqs.items():
            clean[name], proxy = run_case(folder, len(clean), name, seq, None)
            facts[name] = plan_facts(seq, clean[name].folder / "bench.toml")
            check_case(clean[name], proxy, facts[name], None)
            print_case(len(clean) - 1, clean[name])
            print(f"        replies in the clean run: {clean[name].replies}")
            print(f"        oracle self-check: {oracle_self_check(clean[name], proxy)}")
        names = sorted(seqs)
        for kind in args.kinds:
            for r in range(args.runs_per_kind):
                name = names[r % len(names)]
                fault = draw_fault(args.seed, kind, r, clean[name].replies)
                case, proxy = run_case(folder, len(cases) + 2, name, seqs[name], fault)
                check_case(case, proxy, facts[name], clean[name])
                cases.append(case)
                print_case(len(cases) + 1, case)
        print(f"\n{len(cases)} runs with a fault in {time.monotonic() - t0:.0f} s (seed {args.seed})\n")
        print_table(cases)
        print()
        print_defects(cases, args.seed)
    return 0


if __name__ == "__main__":
    sys.exit(main())
