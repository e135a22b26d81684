"""Helpers shared by the reliability campaigns (kill-and-resume, fault proxy).

* Two small sequences on the demo bench and board: a near-field grid (H loop over the board)
  and a far-field prescan with its final (ambient, prescan, analysis, finals).
* The plan of a sequence (which actions are analyses or dynamic), read without any instrument.
* A child ``bench`` process that dumps the Python stack of every thread on SIGUSR1
  (``faulthandler``), so a campaign can say what the child was doing when it killed it.
* ``bench export RUN --csv DIR`` and a comparison of two exports that says, file by file, how
  many values differ and by how much, and whether the difference is explained by the known
  noise limitation of the simulator (its receiver noise is drawn from a counter of sweeps that
  restarts with the simulator, so every trace measured after a resume sees other noise).
* Checks of a run's store that hold whatever the noise: every planned action done once, no
  duplicated trace, state ``complete``.

These are benchmark helpers: they print nothing and assert nothing.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["NEAR_FIELD", "FAR_FIELD", "PlanFacts", "plan_facts", "write_sequences", "start_child",
           "dump_stacks", "kill_child", "stack_dump_kill", "classify_stack", "export_run", "FileDiff", "RunDiff",
           "compare_exports", "store_defects", "first_not_done", "bench_argv"]

#: Near-field grid on the demo board: 10 mm H loop, 11 x 9 positions x 2 orientations.
NEAR_FIELD = """\
schema = 1
name = "kc-near-field"
description = "campaign: H-loop grid over the demo board"

[sweeps.nf]
start = "30 MHz"
stop = "300 MHz"
rbw = "1 MHz"
points = 1001
detector = "peak"

[[steps]]
kind = "grid"
label = "hloop"
sweep = "nf"
probe = "hloop-10mm"
orientations = ["0 deg", "90 deg"]
area = { x = ["0 mm", "100 mm"], y = ["0 mm", "80 mm"] }
step_size = "10 mm"
height = "3 mm"
path = "serpentine"
"""

#: Far-field: ambient, prescan over 2 heights x 2 polarizations x 4 azimuths, finals (QP).
FAR_FIELD = """\
schema = 1
name = "kc-far-field"
description = "campaign: ambient, small prescan, finals"

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
heights = { from = "1 m", to = "2 m", step = "1 m" }
polarizations = ["horizontal", "vertical"]
azimuths = { from = "0 deg", to = "270 deg", step = "90 deg" }
limit = "cispr32-class-b-3m"
ambient = "ambient"
margin = "3 dB"
prominence = "6 dB"
min_separation = "1 MHz"
ambient_tolerance = "200 kHz"

[[steps]]
kind = "final"
label = "final"
of = "prescan"
detectors = ["quasi-peak"]
dwell = "0.2 s"
span = "1 MHz"
azimuth_search = { half_width = "30 deg", step = "30 deg" }
"""


def write_sequences(folder: Path) -> dict[str, Path]:
    """Write the two campaign sequences into ``folder``; name -> path."""
    out = {}
    for name, text in (("near-field", NEAR_FIELD), ("far-field", FAR_FIELD)):
        path = folder / f"kc-{name}.toml"
        path.write_text(text, encoding="utf-8")
        out[name] = path
    return out


@dataclass(frozen=True)
class PlanFacts:
    """What a campaign needs to know of a plan: action kinds by index."""

    actions: tuple[int, ...]
    analysis: frozenset[int]
    dynamic: frozenset[int]
    step_of: dict

    def category(self, index: int) -> str:
        """'analysis', 'final' (dynamic) or 'measure' for an action index."""
        if index in self.analysis:
            return "analysis"
        return "final" if index in self.dynamic else "measure"


def plan_facts(sequence: Path, bench_path: Path | None = None) -> PlanFacts:
    """The plan of ``sequence`` on a bench file (default: the simulated demo bench); measures nothing."""
    from contextlib import ExitStack

    from bench.app import BenchOptions, prepare

    options = BenchOptions(bench_path=bench_path) if bench_path else BenchOptions(sim=True)
    with ExitStack() as stack:  # the demo bench's placeholders need the simulator started
        acts = prepare(sequence, options, stack=stack).plan.actions
    return PlanFacts(tuple(a.index for a in acts), frozenset(a.index for a in acts if a.analysis),
                     frozenset(a.index for a in acts if a.dynamic),
                     {a.index: a.step_label for a in acts})


# ------------------------------------------------------------------ child processes

#: A ``bench`` child that dumps every thread's Python stack on SIGUSR1 and then carries on.
_CHILD = ("import faulthandler, signal, sys\n"
          "dump = open(sys.argv.pop(1), 'w')\n"
          "faulthandler.register(signal.SIGUSR1, file=dump, all_threads=True)\n"
          "from bench.cli import main\n"
          "sys.exit(main())\n")


def bench_argv(args: list[str]) -> list[str]:
    """``python -m bench ARGS`` with this interpreter."""
    return [sys.executable, "-m", "bench", *args]


def start_child(args: list[str], cwd: Path, log: Path, dump: Path) -> subprocess.Popen:
    """Start ``bench ARGS`` (stdout and stderr to ``log``) able to dump its stacks to ``dump``.

    The child runs :func:`bench.cli.main` with the same arguments as the ``bench`` command; the
    only addition is a ``faulthandler`` registration for SIGUSR1, which changes nothing else.
    """
    with open(log, "ab") as out:
        return subprocess.Popen([sys.executable, "-c", _CHILD, str(dump), *args], cwd=cwd, stdout=out,
                                stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL)


def dump_stacks(proc: subprocess.Popen, dump: Path, offset: int = 0, *,
                wait_s: float = 0.3) -> tuple[str | None, int]:
    """Ask the child for its stacks (SIGUSR1); (the text written after ``offset``, new end).

    The text is None when the child has already exited. faulthandler writes the whole dump from
    the signal handler, so the file stops growing within a millisecond.
    """
    if proc.poll() is not None:
        return None, offset
    try:
        os.kill(proc.pid, signal.SIGUSR1)
    except ProcessLookupError:
        return None, offset
    deadline, last = time.monotonic() + wait_s, -1
    while time.monotonic() < deadline:
        size = dump.stat().st_size if dump.exists() else 0
        if size > offset and size == last:
            break
        last = size
        time.sleep(0.001)
    with open(dump, "rb") as fh:
        fh.seek(offset)
        data = fh.read()
    return data.decode(errors="replace"), offset + len(data)


def kill_child(proc: subprocess.Popen) -> bool:
    """SIGKILL the child; True when it died of it (False: it had exited on its own)."""
    try:
        os.kill(proc.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    proc.wait()
    return proc.returncode == -signal.SIGKILL


def stack_dump_kill(proc: subprocess.Popen, dump: Path, offset: int = 0) -> str | None:
    """Dump the child's stacks, then SIGKILL it; the dump text, None if it had exited."""
    text, _ = dump_stacks(proc, dump, offset)
    return text if kill_child(proc) and text is not None else None


def _main_stack(text: str) -> list[str]:
    """The frames ('path:function') of the main thread in a faulthandler dump, innermost first.

    The main thread's stack ends in the ``<module>`` frame of the child's ``-c`` code; a stack
    deeper than faulthandler prints (100 frames) is cut, so the signalled thread ("Current
    thread") stands in for it then.
    """
    blocks, current, signalled = [], [], []
    for line in text.splitlines():
        if line.startswith(("Thread 0x", "Current thread 0x")):
            current = []
            blocks.append(current)
            if line.startswith("Current"):
                signalled = current
        elif line.strip().startswith("File "):
            path, _, func = line.strip()[5:].partition(" in ")
            current.append(f"{path.split(',')[0].strip(chr(34))}:{func}")
    mains = [b for b in blocks if b and b[-1].endswith(":<module>")]
    return mains[-1] if mains else signalled


#: (phase, path fragments, all needed): the first phase whose fragments are on the main stack.
_PHASES = (
    ("report", ("bench/report.py", "bench/plots.py", "bench/app.py:report", "matplotlib"), False),
    ("results printout", ("bench/cli/verbs.py:_print_results",), False),
    ("closing instruments", ("bench/instruments.py:close", "bench/instruments.py:_close_quietly"), False),
    ("connect/home", ("bench/instruments.py",), False),
    ("final: mast/turntable move", ("bench/steps/final.py", "drivers/positioner.py"), True),
    ("final: sweep", ("bench/steps/final.py", "drivers/analyzer.py"), True),
    ("final: store", ("bench/steps/final.py", "bench/store.py"), True),
    ("final: other", ("bench/steps/final.py",), False),
    ("analysis", ("bench/steps/prescan.py",), False),
    ("stage move", ("drivers/stage.py",), False),
    ("mast/turntable move", ("drivers/positioner.py",), False),
    ("supply", ("drivers/supply.py",), False),
    ("sweep", ("drivers/analyzer.py",), False),
    ("store", ("bench/store.py",), False),
    ("executor", ("bench/executor.py",), False),
    ("finishing the run", ("bench/runner.py",), False),
)


def classify_stack(text: str | None) -> str:
    """What the child's main thread was doing, from a faulthandler dump ('exited' if none)."""
    if text is None:
        return "exited"
    joined = "\n".join(_main_stack(text))
    for phase, needles, every in _PHASES:
        if (all if every else any)(n in joined for n in needles):
            return phase
    return "start-up" if "importlib" in joined or "session.py" in joined or not joined else "other"


def export_run(run_dir: Path, out_dir: Path, cwd: Path) -> subprocess.CompletedProcess:
    """The run's stored data in machine form (``RunStore.export_csv``: every column, the raw
    readings), written by a child process: what the comparison needs, not the people's export."""
    code = ("import sys; from bench.store import open_run; "
            "run = open_run(sys.argv[1]); run.export_csv(sys.argv[2]); run.close()")
    return subprocess.run([sys.executable, "-c", code, str(run_dir), str(out_dir)], cwd=cwd,
                          capture_output=True, text=True, timeout=300)


def first_not_done(run_dir: Path, facts: PlanFacts) -> int | None:
    """The first planned action not marked done (None: all done) in a run's store."""
    db = sqlite3.connect(f"file:{run_dir / 'data.sqlite'}?mode=ro", uri=True, timeout=10.0)
    try:
        done = {r[0] for r in db.execute("SELECT action_index FROM actions_done")}
    finally:
        db.close()
    return next((i for i in facts.actions if i not in done), None)


# ------------------------------------------------------------------ comparing two exports

#: Columns that legitimately differ between two runs (wall clock, row ids).
_VOLATILE = ("id", "t_wall")


@dataclass
class FileDiff:
    """How one exported file of a run differs from the same file of the clean run.

    ``values`` counts differing cells (traces.csv, results.csv) or spectrum points; ``rows``
    differing, missing or extra rows (traces or result rows); ``max_abs_db`` the largest level
    difference, dB; ``noise`` whether the known noise limitation explains it.
    """

    file: str
    values: int
    rows: int
    max_abs_db: float
    noise: bool
    detail: str = ""


@dataclass
class RunDiff:
    """Every difference of one run's export from the clean run's export."""

    files: list[FileDiff] = field(default_factory=list)

    @property
    def identical(self) -> bool:
        """No file differs."""
        return not self.files

    @property
    def defects(self) -> list[FileDiff]:
        """Differences the noise limitation does not explain."""
        return [f for f in self.files if not f.noise]


def _traces(path: Path) -> pd.DataFrame:
    """traces.csv with a key per row: (action_index, segment, k-th trace of that pair)."""
    t = pd.read_csv(path).sort_values(["action_index", "id"], kind="stable")
    t["k"] = t.groupby(["action_index", "segment"]).cumcount()
    return t.set_index(["action_index", "segment", "k"])


def _cells_differ(a: pd.DataFrame, b: pd.DataFrame) -> pd.DataFrame:
    """Boolean frame: cell differs (NaN equals NaN; floats compared exactly as exported)."""
    both_nan = a.isna() & b.isna()
    return ~((a == b) | both_nan)


@dataclass(frozen=True)
class _Context:
    """What decides whether a difference is explained by the noise limitation."""

    facts: PlanFacts
    remeasured_from: int | None
    last_action_of: dict  # step label -> last action index holding its traces (clean run)
    results_changed: frozenset = frozenset()

    def remeasured(self, action: int) -> bool:
        """True when ``action`` was measured again after a resume (so with other noise)."""
        return self.remeasured_from is not None and action >= self.remeasured_from

    def inputs_changed(self, action: int) -> bool:
        """True when results of a step before ``action`` differ (the finals read them)."""
        return any(self.last_action_of.get(label, -1) < action for label in self.results_changed)


def _compare_traces(ref: pd.DataFrame, got: pd.DataFrame, ctx: _Context) -> FileDiff | None:
    """traces.csv: missing, extra and changed rows (wall clock and ids left out).

    Static actions must be identical whatever the noise. A dynamic action (finals) re-measured
    after a resume chooses its poses from noisy readings, so its rows may change; its row count
    may change only when the results it reads (an earlier step's) changed.
    """
    cols = [c for c in ref.columns if c not in _VOLATILE]
    missing, extra = ref.index.difference(got.index), got.index.difference(ref.index)
    common = ref.index.intersection(got.index)
    diff = _cells_differ(ref.loc[common, cols], got.loc[common, cols])
    changed = common[diff.any(axis=1).to_numpy()]
    if not (len(missing) or len(extra) or len(changed)):
        return None
    counted = {i[0] for i in missing.union(extra)}
    noise = (all(a in ctx.facts.dynamic and ctx.remeasured(a) for a in {i[0] for i in changed})
             and all(a in ctx.facts.dynamic and ctx.inputs_changed(a) for a in counted))
    touched = {i[0] for i in missing.union(extra).union(changed)}
    detail = (f"{len(missing)} missing, {len(extra)} extra, {len(changed)} changed rows "
              f"in actions {_span(touched)}")
    return FileDiff("traces.csv", int(diff.to_numpy().sum()), len(missing) + len(extra) + len(changed),
                    float("nan"), noise, detail)


def _span(indices) -> str:
    s = sorted(indices)
    return f"{s[0]}" if len(s) == 1 else f"{s[0]}..{s[-1]} ({len(s)} actions)"


def _spectra(path: Path, traces: pd.DataFrame) -> dict:
    """key -> (freq_hz, level) arrays of one spectra-<step>.csv, keyed like :func:`_traces`."""
    data = pd.read_csv(path)
    key_of = {int(tid): key for key, tid in zip(traces.index, traces["id"])}
    out = {}
    for tid, group in data.groupby("trace_id", sort=False):
        out[key_of.get(int(tid), ("?", int(tid)))] = (group["freq_hz"].to_numpy(), group["level"].to_numpy())
    return out


def _compare_spectra(name: str, ref: dict, got: dict, ctx: _Context) -> FileDiff | None:
    """One spectra file: points whose level (or frequency) differs, and the largest level change."""
    values, rows, worst, noise, actions = 0, 0, 0.0, True, set()
    for key in set(ref) | set(got):
        if key not in ref or key not in got:
            rows += 1
            noise = noise and key[0] in ctx.facts.dynamic and ctx.inputs_changed(key[0])
            actions.add(key[0])
            continue
        (fa, la), (fb, lb) = ref[key], got[key]
        if fa.shape != fb.shape or not np.array_equal(fa, fb):
            rows, values = rows + 1, values + max(fa.size, fb.size)
            noise = noise and key[0] in ctx.facts.dynamic and ctx.remeasured(key[0])
            actions.add(key[0])
            continue
        n = int(np.sum(la != lb))
        if n:
            rows, values, worst = rows + 1, values + n, max(worst, float(np.max(np.abs(la - lb))))
            noise = noise and ctx.remeasured(key[0])
            actions.add(key[0])
    if not rows:
        return None
    return FileDiff(name, values, rows, worst, noise, f"{rows} traces in actions {_span(actions)}")


def _results(path: Path) -> pd.DataFrame:
    """results.csv without ids; the run folder named in the chain text replaced by ``<run>``."""
    if not path.exists():
        return pd.DataFrame(columns=["step_label", "status", "freq_hz", "level"])
    res = pd.read_csv(path)
    res = res.drop(columns=[c for c in _VOLATILE if c in res.columns])
    if "chain" in res.columns:  # the tables are named by their copy inside the run folder
        res["chain"] = res["chain"].str.replace(r"from \S+?/tables/", "from <run>/tables/", regex=True)
    return res


def _compare_results(ref: pd.DataFrame, got: pd.DataFrame, ctx: _Context) -> tuple[list[FileDiff], set]:
    """results.csv step by step: rows and values that differ, suspects gained or lost."""
    diffs, changed = [], set()
    for label in sorted(set(ref["step_label"]) | set(got["step_label"])):
        a = ref[ref["step_label"] == label].reset_index(drop=True)
        b = got[got["step_label"] == label].reset_index(drop=True)
        n = min(len(a), len(b))
        cells = _cells_differ(a.iloc[:n], b.iloc[:n])
        values, rows = int(cells.to_numpy().sum()), int(cells.any(axis=1).sum()) + abs(len(a) - len(b))
        if not rows:
            continue
        changed.add(label)
        level = np.abs(a["level"].iloc[:n].to_numpy(float) - b["level"].iloc[:n].to_numpy(float))
        worst = float(np.nanmax(level)) if n and np.isfinite(level).any() else float("nan")
        noise = ctx.remeasured(ctx.last_action_of.get(label, -1))
        diffs.append(FileDiff(f"results.csv [{label}]", values, rows, worst, noise,
                              f"{len(a)} -> {len(b)} rows; {_suspect_change(a, b)}"))
    return diffs, changed


def _suspect_change(a: pd.DataFrame, b: pd.DataFrame) -> str:
    """Suspects (fail/near rows, by frequency to 10 kHz) gained and lost."""
    def keyset(df):
        rows = df[df["status"].isin(["fail", "near"])]
        return {(round(f / 1e4), s) for f, s in zip(rows["freq_hz"], rows["status"])}

    ka, kb = keyset(a), keyset(b)
    return f"suspects: {len(kb - ka)} gained, {len(ka - kb)} lost" if ka != kb else "same suspects"


def compare_exports(ref_dir: Path, got_dir: Path, facts: PlanFacts, remeasured_from: int | None) -> RunDiff:
    """Compare a run's export with the clean run's export, file by file.

    Parameters
    ----------
    ref_dir, got_dir : Path
        Folders written by ``bench export RUN --csv DIR`` for the clean run and the run checked.
    facts : PlanFacts
        The plan (dynamic actions).
    remeasured_from : int or None
        First action measured again after a resume (None: nothing was re-measured).
    """
    ref_t, got_t = _traces(ref_dir / "traces.csv"), _traces(got_dir / "traces.csv")
    last = ref_t.reset_index().groupby("step_label")["action_index"].max().to_dict()
    ctx = _Context(facts, remeasured_from, last)
    out = RunDiff()
    res_diffs, changed = _compare_results(_results(ref_dir / "results.csv"), _results(got_dir / "results.csv"), ctx)
    ctx = _Context(facts, remeasured_from, last, frozenset(changed))
    trace_diff = _compare_traces(ref_t, got_t, ctx)
    out.files += [trace_diff] if trace_diff else []
    names = sorted({p.name for p in ref_dir.glob("spectra-*.csv")} | {p.name for p in got_dir.glob("spectra-*.csv")})
    for name in names:
        ra = _spectra(ref_dir / name, ref_t) if (ref_dir / name).exists() else {}
        rb = _spectra(got_dir / name, got_t) if (got_dir / name).exists() else {}
        d = _compare_spectra(name, ra, rb, ctx)
        out.files += [d] if d else []
    out.files += res_diffs
    return out


# ------------------------------------------------------------------ store checks

def store_defects(run_dir: Path, facts: PlanFacts) -> list[str]:
    """What must hold whatever the noise: state complete, every planned action done, one trace
    per (action, segment) for the static actions, no trace of an action not in the plan."""
    problems = []
    manifest = tomllib.loads((run_dir / "manifest.toml").read_text(encoding="utf-8"))
    if manifest.get("state") != "complete":
        problems.append(f"state {manifest.get('state')!r}")
    db = sqlite3.connect(f"file:{run_dir / 'data.sqlite'}?mode=ro", uri=True, timeout=10.0)
    try:
        done = {r[0] for r in db.execute("SELECT action_index FROM actions_done")}
        dup = db.execute("SELECT action_index, segment, COUNT(*) FROM traces GROUP BY action_index, segment "
                         "HAVING COUNT(*) > 1").fetchall()
        stored = {r[0] for r in db.execute("SELECT DISTINCT action_index FROM traces")}
    finally:
        db.close()
    missing = [i for i in facts.actions if i not in done]
    if missing:
        problems.append(f"{len(missing)} planned actions not done (first {missing[0]})")
    dup = [d for d in dup if d[0] not in facts.dynamic]
    if dup:
        problems.append(f"{len(dup)} (action, segment) stored more than once (first {dup[0]})")
    unknown = stored - set(facts.actions)
    if unknown:
        problems.append(f"traces of {len(unknown)} actions not in the plan")
    empty = [i for i in facts.actions if i not in stored and i not in facts.analysis | facts.dynamic]
    if empty:
        problems.append(f"{len(empty)} measuring actions without a trace (first {empty[0]})")
    return problems
