"""What each command-line verb does, as plain functions that return data (only the CLI prints).

Loading and checking happen before anything is written or moved: a bad file stops the command
with one line and exit code 2, and no run folder is created.
"""

from __future__ import annotations

import logging
from contextlib import ExitStack
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

from bench.errors import ConfigError, PlanError

__all__ = ["BenchOptions", "demo_bench_path", "prepare", "run_sequence", "resume", "report", "serve_simulator",
           "export", "compare", "identify", "info", "run_results", "analyzer_caution"]

log = logging.getLogger("bench.app")


def demo_bench_path() -> Path:
    """The demo bench file shipped with the package (used by ``--sim`` without ``--bench``)."""
    return Path(str(resources.files("bench.demo") / "demo-bench.toml"))


@dataclass(frozen=True)
class BenchOptions:
    """Which bench to use: a bench file, the simulated bench, and the simulator's settings."""

    bench_path: Path | None = None
    sim: bool = False
    board: Path | None = None
    seed: int | None = None
    realtime: bool = False
    faults: tuple[str, ...] = ()


def _load_bench(options: BenchOptions, stack: ExitStack | None):
    """The bench file (or the demo bench) and, with ``sim``, the simulator serving it."""
    from bench.benchfile import load_bench

    if options.faults and not options.sim:
        raise ConfigError("--fault injects faults into the simulated bench: use it with --sim")
    if options.board is not None and not options.sim:
        raise ConfigError("--board chooses the simulated board: use it with --sim")
    bench_path = options.bench_path
    if bench_path is None:
        if not options.sim:
            raise ConfigError("no bench file: give --bench FILE for a real bench, or --sim for the simulated one")
        bench_path = demo_bench_path()
    bench = load_bench(bench_path)
    simulator = None
    if options.sim:
        bench_path = Path(bench_path)
        from bench.simbench import start_simulated_bench

        simulator, bench = start_simulated_bench(bench, board=options.board, seed=_seed(options),
                                                 realtime=options.realtime, faults=list(options.faults))
        if stack is not None:
            stack.callback(simulator.stop)
    return bench, Path(bench_path), simulator


def _seed(options: BenchOptions) -> int:
    return 1 if options.seed is None else int(options.seed)


def prepare(sequence_path: Path, options: BenchOptions, *, stack: ExitStack | None = None):
    """Load and validate everything, start the simulator if asked, and plan. Writes nothing.

    Returns
    -------
    bench.session.Session
        With its plan made and checked.
    """
    from bench.sequence import load_sequence
    from bench.session import Session

    sequence = load_sequence(sequence_path)
    bench, bench_path, simulator = _load_bench(options, stack)
    sim_settings = None
    if simulator is not None:
        sim_settings = {"board": str(Path(options.board).resolve()) if options.board else "demo",
                        "seed": _seed(options), "realtime": options.realtime}
    session = Session(sequence, Path(sequence_path), bench, bench_path, simulator,
                      sim_settings=sim_settings)
    try:
        session.make_plan()
    except PlanError as exc:
        # name the file (and line) the problem is in: the sequence, checked against this bench
        where = str(sequence_path)
        key_path = getattr(exc, "key_path", None)
        if key_path:
            from bench.tomlsource import read_toml

            where += f":{read_toml(sequence_path).line_of(key_path)}"
        raise type(exc)(f"{where} (on bench {bench_path}): {exc}") from None
    return session


def analyzer_caution(session) -> str:
    """The analyzer input caution, with the damage level its profile assumes."""
    ap = session.profiles["analyzer"]
    return (f"analyzer input: profile {ap.name} assumes damage above {ap.damage_level_dbm:+g} dBm or any DC; "
            "use an attenuator, a DC block and a limiter")


def run_sequence(session, *, out_root: Path, plots: bool = True) -> Path:
    """Carry out a prepared session in a new run folder (and write its report). Returns the folder."""
    from bench.runner import execute_new_run

    folder = execute_new_run(session, out_root=out_root)
    if plots:
        report(folder)
    return folder


def resume(folder: Path, options: BenchOptions, *, accept_changes: bool = False, plots: bool = True,
           stack: ExitStack | None = None) -> Path:
    """Continue an interrupted run from the first action not done (and write its report).

    On the simulated bench the run's own board and seed are used. A file the run read that
    changed since (limits, tables, profiles, board), or another board or seed, is refused
    with the list of what changed unless ``accept_changes``; accepted changes are recorded.
    """
    from bench.provenance import changed_files
    from bench.runner import resumable_files, resume_run

    seq_path, bench_file, manifest = resumable_files(folder, bench_path=options.bench_path)
    sim = options.sim or bool(manifest.get("simulated") and options.bench_path is None)
    board, seed = _resume_simulator(manifest, options, sim, accept_changes)
    session = prepare(seq_path, BenchOptions(bench_file, sim, board, seed, options.realtime), stack=stack)
    changes = changed_files(manifest.get("files", {}), session.used_files()) if "files" in manifest else []
    if changes and not accept_changes:
        raise ConfigError(f"{folder}: files the run read changed since it started: {'; '.join(changes)}. "
                          "Restore them, or resume with --accept-changes to continue with the new ones")
    resume_run(session, folder, resumed=int(manifest.get("resumed", 0)), accepted=changes)
    if plots:
        report(folder)
    return Path(folder)


def _resume_simulator(manifest: dict, options: BenchOptions, sim: bool, accept_changes: bool):
    """The board and seed a simulated run resumes with: its own, unless told otherwise."""
    recorded = manifest.get("simulator") or {}
    if not sim or not recorded:
        return options.board, options.seed if options.seed is not None else 1
    board_text = recorded.get("board", "demo")
    board = None if board_text == "demo" else Path(board_text)
    seed = int(recorded.get("seed", 1))
    asked_board = None if options.board is None else Path(options.board).resolve()
    differs = [f"{what} {new} instead of {old}" for what, new, old in (
        ("--board", asked_board, board), ("--seed", options.seed, seed))
        if new is not None and new != old]
    if differs and not accept_changes:
        raise ConfigError(f"the run was simulated with board {board_text} and seed {seed}; resume asked for "
                          f"{', '.join(map(str, differs))}: leave them out, or add --accept-changes")
    if differs:
        return asked_board or board, options.seed if options.seed is not None else seed
    return board, seed


def report(folder: Path, *, map_peaks: int = 3, map_freqs_hz: tuple = (), map_bands_hz: tuple = ()) -> Path:
    """Write the HTML report and plots of a run folder; returns the HTML file.

    Near-field maps are drawn at the ``map_peaks`` strongest hot spots, at each frequency of
    ``map_freqs_hz`` and over each (low, high) band of ``map_bands_hz`` (Hz).
    """
    from bench.report import MapViews, write_report
    from bench.store import open_run

    views = MapViews(peaks=map_peaks, freqs_hz=tuple(map_freqs_hz), bands_hz=tuple(map_bands_hz))
    run = open_run(folder)
    try:
        return write_report(run, views)
    finally:
        run.close()


def serve_simulator(*, port: int = 0, board: Path | None = None, seed: int = 1, realtime: bool = False,
                    announce=None) -> int:
    """Serve the simulated bench until stopped; ``announce(addresses)`` once it listens."""
    from bench.simbench import serve_forever

    return serve_forever(port=port, board=board, seed=seed, realtime=realtime, announce=announce)


def run_results(folder: Path):
    """(results to show, warnings) of a run: suspects, ambient signals and every final reading."""
    from bench.steps import KINDS
    from bench.store import open_run

    run = open_run(folder)
    try:
        results = run.results()
        events = run.events()
        shown = {s["label"] for s in run.manifest().get("steps", [])
                 if s.get("kind") in KINDS and KINDS[s["kind"]].shows_all_results}
    finally:
        run.close()
    warnings = list(events.loc[events["level"] == "warning", "text"])
    return results[(results.status != "pass") | (results.step_label.isin(shown))], warnings


def export(folder: Path, csv_dir: Path, *, parquet: bool = False) -> list[Path]:
    """CSV (and Parquet) files of a run for other tools; returns the files written."""
    from bench.store import open_run

    run = open_run(folder)
    try:
        files = run.export_csv(csv_dir)
        if parquet:
            try:
                import pyarrow  # noqa: F401
            except ImportError as exc:
                raise ConfigError("--parquet needs pyarrow: pip install 'emission-bench[parquet]'") from exc
            path = Path(csv_dir) / "traces.parquet"
            run.traces().to_parquet(path, index=False)
            files.append(path)
        return files
    finally:
        run.close()


def compare(before: Path, after: Path, *, out: Path | None = None):
    """Before/after comparison of two runs; returns a :class:`bench.compare.Comparison`.

    Its ``path`` is the HTML file and its ``lines()`` the per-step summary written at the top
    of that page, computed once for both.
    """
    from bench.compare import compare_runs

    return compare_runs(before, after, out=out)


def identify(options: BenchOptions) -> list[tuple[str, str, str]]:
    """(role, address, identity or 'ERROR: ...') of every instrument of the bench."""
    from bench.instruments import identify_all

    if options.bench_path is None and not options.sim:
        raise ConfigError("instruments: give --bench FILE or --sim")
    with ExitStack() as stack:
        bench, _, _ = _load_bench(options, stack)
        return identify_all(bench)


def info() -> dict:
    """Versions, built-in profiles, limit lines and transports, and what is unavailable."""
    import importlib.metadata as md
    import sys

    from bench import __version__
    from bench.drivers.profile import builtin_profiles

    versions = {}
    for dist in ("numpy", "scipy", "pandas", "matplotlib", "pydantic", "pyvisa", "pyvisa-py",
                 "pyserial", "rich", "tomli-w", "pyarrow"):
        try:
            versions[dist] = md.version(dist)
        except md.PackageNotFoundError:
            versions[dist] = None
    return {"software": f"emission-bench {__version__}", "python": sys.version.split()[0],
            "versions": versions, "profiles": builtin_profiles(), "limits": _limit_names(),
            "transports": _transports()}


def _limit_names() -> list[str] | str:
    from bench.errors import BenchError

    try:
        from bench.analysis.limits import list_limits

        return list(list_limits())
    except BenchError as exc:  # pragma: no cover - a broken built-in file
        return f"unavailable ({exc})"


def _transports() -> list[str]:
    out = []
    try:
        import pyvisa

        rm = pyvisa.ResourceManager("@py")
        out.append(f"VISA (pyvisa-py): available, backend {rm.visalib}")
        rm.close()
    except Exception as exc:  # noqa: BLE001 - info must report, not crash
        out.append(f"VISA (pyvisa-py): unavailable ({exc})")
    try:
        import serial

        out.append(f"serial (pyserial {serial.VERSION}): available (device paths, socket://, loop://)")
    except ImportError as exc:
        out.append(f"serial: unavailable ({exc})")
    return out
