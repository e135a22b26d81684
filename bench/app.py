"""What each command-line verb does, as plain functions (the CLI only parses and prints).

Loading and checking happen before anything is written or moved: a bad file stops the command
with one line and exit code 2, and no run folder is created.
"""

from __future__ import annotations

import hashlib
import logging
import sys
from contextlib import ExitStack
from importlib import resources
from pathlib import Path

from bench import __version__
from bench.errors import BenchError, ConfigError, PlanError

__all__ = ["dispatch", "RunInterruptedExit", "demo_bench_path", "prepare", "Prepared"]

log = logging.getLogger("bench.app")


class RunInterruptedExit(BenchError):
    """The run stopped early; the message says how to resume."""

    exit_code = 3


class OperatorStop(RunInterruptedExit):
    """Ctrl-C or SIGTERM during a run: the run is kept and can be resumed."""

    exit_code = 130


def demo_bench_path() -> Path:
    """The demo bench file shipped with the package (used by ``--sim`` without ``--bench``)."""
    return Path(str(resources.files("bench.demo") / "demo-bench.toml"))


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


class Prepared:
    """A loaded sequence and bench, a plan, and (with ``--sim``) the running simulated bench."""

    def __init__(self, sequence, sequence_path: Path, bench, bench_path: Path, plan, sim=None) -> None:
        self.sequence = sequence
        self.sequence_path = sequence_path
        self.bench = bench
        self.bench_path = bench_path
        self.plan = plan
        self.sim = sim


def prepare(sequence_path: Path, *, bench_path: Path | None, sim: bool, board: Path | None = None,
            seed: int = 1, realtime: bool = False, faults: list[str] | None = None,
            stack: ExitStack | None = None) -> Prepared:
    """Load and validate everything, start the simulator if asked, and plan. Writes nothing."""
    from bench.benchfile import load_bench
    from bench.station import build_plan
    from bench.sequence import load_sequence

    if faults and not sim:
        raise ConfigError("--fault injects faults into the simulated bench: use it with --sim")
    if board is not None and not sim:
        raise ConfigError("--board chooses the simulated board: use it with --sim")
    sequence = load_sequence(sequence_path)
    if bench_path is None:
        if not sim:
            raise ConfigError("no bench file: give --bench FILE for a real bench, or --sim for the simulated one")
        bench_path = demo_bench_path()
    bench = load_bench(bench_path)
    simulator = None
    if sim:
        from bench.simbench import start_simulated_bench

        simulator, bench = start_simulated_bench(bench, board=board, seed=seed, realtime=realtime,
                                                 faults=faults or [])
        if stack is not None:
            stack.callback(simulator.stop)
    try:
        plan = build_plan(sequence, bench, sequence_dir=Path(sequence_path).parent)
    except PlanError as exc:
        # name the file (and line) the problem is in: the sequence, checked against this bench
        where = str(sequence_path)
        key_path = getattr(exc, "key_path", None)
        if key_path:
            from bench.tomlsource import read_toml

            where += f":{read_toml(sequence_path).line_of(key_path)}"
        raise type(exc)(f"{where} (on bench {bench_path}): {exc}") from None
    return Prepared(sequence, Path(sequence_path), bench, Path(bench_path), plan, simulator)


# --------------------------------------------------------------------------------- verbs

def dispatch(args) -> int:
    verbs = {
        "run": cmd_run, "check": cmd_check, "resume": cmd_resume, "sim": cmd_sim,
        "export": cmd_export, "report": cmd_report, "compare": cmd_compare,
        "instruments": cmd_instruments, "info": cmd_info,
    }
    return verbs[args.verb](args)


def _print_plan(prep: Prepared) -> None:
    from bench.station import profiles_for

    for line in prep.plan.summary_lines():
        print(line)
    ap = profiles_for(prep.bench)["analyzer"]
    print(f"analyzer input: profile {ap.name} assumes damage above {ap.damage_level_dbm:+g} dBm or any DC; "
          "use an attenuator, a DC block and a limiter")
    for w in tuple(prep.sequence.warnings) + tuple(prep.bench.warnings):
        print(f"warning: {w}")


def cmd_check(args) -> int:
    with ExitStack() as stack:
        prep = prepare(args.sequence, bench_path=args.bench, sim=args.sim, board=args.board,
                       seed=args.seed, realtime=args.realtime, stack=stack)
        _print_plan(prep)
        print("check: OK (no instrument was touched)")
    return 0


def cmd_run(args) -> int:
    from bench.cli import SAFETY_LINE
    from bench.runner import execute_new_run

    with ExitStack() as stack:
        prep = prepare(args.sequence, bench_path=args.bench, sim=args.sim, board=args.board,
                       seed=args.seed, realtime=args.realtime, faults=args.fault, stack=stack)
        print(SAFETY_LINE, file=sys.stderr)
        if prep.sim is not None:
            a = prep.sim.addresses
            print(f"simulated bench: analyzer {a['analyzer']}, stage {a['stage']} (also {a['stage_pty']}), "
                  f"mast and turntable {a['mast']}, supply {a['supply']}", file=sys.stderr)
        _print_plan(prep)
        folder = execute_new_run(prep, out_root=args.out, plots=not args.no_plots)
    _print_results(folder)
    print(f"run stored in {folder}")
    return 0


ESTIMATE_LINE = ("This pre-scan is an estimate, not a compliance verdict: defer to the applicable standard, "
                 "an accredited test house and local regulations.")


def _print_results(folder: Path) -> None:
    """The suspects and final readings of a run, as a table on the terminal (and a note)."""
    from rich.console import Console
    from rich.table import Table

    from bench.store import open_run

    run = open_run(folder)
    try:
        results = run.results()
        events = run.events()
        finals = {s["label"] for s in run.manifest().get("steps", []) if s.get("kind") == "final"}
    finally:
        run.close()
    warnings = list(events.loc[events["level"] == "warning", "text"])
    console = Console(width=None if sys.stdout.isatty() else 132)
    # the screen shows what needs attention: suspects, ambient signals and the final readings
    results = results[(results.status != "pass") | (results.step_label.isin(finals))]
    if not results.empty:
        table = Table(title="results (levels corrected through the transducer chain)")
        for col in ("step", "MHz", "level", "detector", "limit", "margin dB", "pol", "height m", "az deg", "status"):
            table.add_column(col, justify="right" if col not in ("step", "detector", "pol", "status") else "left")
        for _, r in results.iterrows():
            table.add_row(r.step_label, f"{r.freq_hz / 1e6:.3f}", _num(r.level, 1), r.detector,
                          _num(r.limit_level, 1), _num(r.margin_db, 1), str(r.polarization or ""),
                          _num(r.height_m, 2), _num(r.azimuth_deg, 0), r.status)
        console.print(table)
    for w in warnings[:10]:
        console.print(f"warning: {w}", markup=False)
    if len(warnings) > 10:
        console.print(f"... {len(warnings) - 10} more warnings in the run's events (report.html)")
    print(ESTIMATE_LINE)


def _num(value, digits: int) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return ""
    return "" if v != v else f"{v:.{digits}f}"


def cmd_resume(args) -> int:
    from bench.runner import resume_run

    with ExitStack() as stack:
        folder = resume_run(args.run, bench_path=args.bench, sim=args.sim, board=args.board,
                            seed=args.seed, realtime=args.realtime, plots=not args.no_plots, stack=stack)
    print(f"run completed in {folder}")
    return 0


def cmd_sim(args) -> int:
    from bench.simbench import serve_forever

    return serve_forever(port=args.port, board=args.board, seed=args.seed, realtime=args.realtime)


def cmd_export(args) -> int:
    from bench.store import open_run

    run = open_run(args.run)
    files = run.export_csv(args.csv)
    if args.parquet:
        try:
            import pyarrow  # noqa: F401
        except ImportError as exc:
            raise ConfigError("--parquet needs pyarrow: pip install 'emission-bench[parquet]'") from exc
        meta = run.traces()
        path = Path(args.csv) / "traces.parquet"
        meta.to_parquet(path, index=False)
        files.append(path)
    for f in files:
        print(f)
    return 0


def cmd_report(args) -> int:
    from bench import units
    from bench.report import MapViews, write_report
    from bench.store import open_run

    def freq(text: str, option: str) -> float:
        try:
            return units.parse(text, "frequency")
        except ConfigError as exc:
            raise ConfigError(exc.message, key=option) from None

    if args.map_peaks < 0:
        raise ConfigError(f"expected a count >= 0, found {args.map_peaks}", key="--map-peaks")
    bands = tuple((freq(lo, "--map-band"), freq(hi, "--map-band")) for lo, hi in args.map_band)
    if any(lo >= hi for lo, hi in bands):
        raise ConfigError("expected LOW < HIGH", key="--map-band")
    views = MapViews(peaks=args.map_peaks, freqs_hz=tuple(freq(f, "--map-at") for f in args.map_at),
                     bands_hz=bands)
    path = write_report(open_run(args.run), views)
    print(path)
    return 0


def cmd_compare(args) -> int:
    from bench.compare import compare_runs

    path = compare_runs(args.before, args.after, out=args.out)
    print(path)
    return 0


def cmd_instruments(args) -> int:
    from bench.benchfile import load_bench
    from bench.station import identify_all

    with ExitStack() as stack:
        if args.sim:
            from bench.simbench import start_simulated_bench

            bench = load_bench(args.bench or demo_bench_path())
            sim, bench = start_simulated_bench(bench, board=args.board, seed=args.seed, realtime=args.realtime)
            stack.callback(sim.stop)
        elif args.bench:
            bench = load_bench(args.bench)
        else:
            raise ConfigError("instruments: give --bench FILE or --sim")
        failures = 0
        for role, address, reply in identify_all(bench):
            print(f"{role:10s} {address}  {reply}")
            failures += reply.startswith("ERROR")
    return 1 if failures else 0


def cmd_info(args) -> int:
    import importlib.metadata as md

    from bench.drivers.profile import builtin_profiles

    print(f"emission-bench {__version__}, Python {sys.version.split()[0]}")
    for dist in ("numpy", "scipy", "pandas", "matplotlib", "pydantic", "pyvisa", "pyvisa-py", "pyserial",
                 "rich", "tomli-w", "pyarrow"):
        try:
            print(f"  {dist:12s} {md.version(dist)}")
        except md.PackageNotFoundError:
            print(f"  {dist:12s} unavailable" + ("  (optional: Parquet export)" if dist == "pyarrow" else ""))
    print("instrument profiles:")
    for name, desc in builtin_profiles().items():
        print(f"  {name:20s} {desc}")
    try:
        from bench.analysis.limits import list_limits

        print("limit lines:")
        for name in list_limits():
            print(f"  {name}")
    except BenchError as exc:  # pragma: no cover - a broken built-in file
        print(f"limit lines: unavailable ({exc})")
    print("transports:")
    try:
        import pyvisa

        rm = pyvisa.ResourceManager("@py")
        print(f"  VISA (pyvisa-py): available, backend {rm.visalib}")
        rm.close()
    except Exception as exc:  # noqa: BLE001 - info must report, not crash
        print(f"  VISA (pyvisa-py): unavailable ({exc})")
    try:
        import serial

        print(f"  serial (pyserial {serial.VERSION}): available (device paths, socket://, loop://)")
    except ImportError as exc:
        print(f"  serial: unavailable ({exc})")
    return 0
