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

#: Said at the end of every run: what a pre-scan is and is not.
ESTIMATE = ("This pre-scan is an estimate, not a compliance verdict: defer to the applicable standard, "
            "an accredited test house and local regulations.")

__all__ = ["ESTIMATE", "unit_text", "limit_lines", "prepare_resume", "BenchOptions", "demo_bench_path", "prepare", "run_sequence", "resume", "report", "serve_simulator",
           "export", "compare", "identify", "info", "outcome", "Outcome", "banner", "cautions",
           "to_confirm"]

log = logging.getLogger("bench.app")


def unit_text(unit: str) -> str:
    """How people write a level unit: ``dbuv_per_m`` -> ``dBµV/m``."""
    from bench.analysis.verdict import UNIT_TEXT

    return UNIT_TEXT.get(unit, unit)


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
    if options.seed is not None and not options.sim:
        raise ConfigError("--seed seeds the simulated bench: use it with --sim")
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

        original = {role: getattr(bench, role).address for role in ("analyzer", "stage", "mast", "turntable", "supply")
                    if getattr(bench, role, None) is not None}
        simulator, bench = start_simulated_bench(bench, board=options.board, seed=_seed(options),
                                                 realtime=options.realtime, faults=list(options.faults))
        simulator.in_place_of = original
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
                        "seed": _seed(options), "realtime": options.realtime,
                        "in_place_of": {role: f"simulated in place of {address}"
                                        for role, address in getattr(simulator, "in_place_of", {}).items()}}
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


def _roles(session) -> set[str]:
    from bench.instruments import needs_of
    from bench.steps import kind_of

    return needs_of(session.plan, [(kind_of(s), s) for s in session.sequence.steps])


def cautions(session) -> list[str]:
    """The cautions that apply to the instruments this run uses (analyzer damage level first)."""
    from bench.cautions import analyzer_caution, cautions_for

    ap = session.profiles["analyzer"]
    return cautions_for(_roles(session), analyzer_caution(ap.name, ap.damage_level_dbm))


def to_confirm(session) -> list[str]:
    """What will move or switch on a real bench (empty on the simulated bench)."""
    from bench.cautions import MOTION, POWER

    if session.sim is not None:
        return []
    roles = _roles(session)
    return [MOTION[r] for r in ("stage", "mast", "turntable") if r in roles] + (
        [POWER] if "supply" in roles else [])


def banner(session) -> list[str]:
    """What a run is about to do, for people: sequence, board under test, bench, plan."""
    seq = session.sequence
    lines = [f"sequence   {seq.name} ({session.sequence_path})"]
    lines.append(f"board      {seq.eut.describe()}" if seq.eut is not None
                 else "board      not named (an [eut] table in the sequence names it in the report)")
    if session.sim is not None:
        settings = session.sim_settings or {}
        board = settings.get("board", "demo")
        lines.append(f"bench      simulated: {session.bench_path.name}, board "
                     f"{'demo board' if board == 'demo' else Path(board).name}, seed {settings.get('seed', 1)}")
        if not settings.get("realtime"):
            lines.append("           the simulator's clock is accelerated: the run takes seconds; the plan's "
                         "times are what a real bench would take")
    else:
        lines.append(f"bench      {session.bench_path}")
    return lines + ["plan       " + line if i == 0 else "           " + line
                    for i, line in enumerate(session.plan.summary_lines())]


def run_sequence(session, *, out_root: Path, plots: bool = True, unattended: bool = False) -> Path:
    """Carry out a prepared session in a new run folder (and write its report). Returns the folder.

    ``unattended``: the operator skipped the confirmation before motion; recorded in the manifest.
    """
    from bench.runner import execute_new_run

    if Path(out_root).exists() and not Path(out_root).is_dir():
        raise ConfigError(f"expected a folder for the run folders, found a file: {out_root}", key="--out")
    folder = execute_new_run(session, out_root=out_root, unattended=unattended)
    if plots:
        report(folder)
    return folder


def prepare_resume(folder: Path, options: BenchOptions, *, accept_changes: bool = False,
                   stack: ExitStack | None = None):
    """Check that an interrupted run can go on, and prepare its session; writes nothing.

    On the simulated bench the run's own board and seed are used. A file the run read that
    changed since (limits, tables, profiles, board), or another board or seed, is refused
    with the list of what changed unless ``accept_changes``.

    Returns
    -------
    (bench.session.Session, str)
        The session and a line saying where the run resumes and how much is left.
    """
    from bench.provenance import changed_files
    from bench.runner import resumable_files, resume_point

    seq_path, bench_file, manifest = resumable_files(folder, bench_path=options.bench_path)
    sim = options.sim or bool(manifest.get("simulated") and options.bench_path is None)
    board, seed = _resume_simulator(manifest, options, sim, accept_changes)
    session = prepare(seq_path, BenchOptions(bench_file, sim, board, seed, options.realtime), stack=stack)
    changes = changed_files(manifest.get("files", {}), session.used_files()) if "files" in manifest else []
    if changes and not accept_changes:
        raise ConfigError(f"{folder}: files the run read changed since it started: {'; '.join(changes)}. "
                          "Restore them, or resume with --accept-changes to continue with the new ones")
    session.accepted_changes = changes
    session.resumed = int(manifest.get("resumed", 0))
    return session, resume_point(folder, session.plan)


def resume(folder: Path, session, *, plots: bool = True, unattended: bool = False,
           accept_changes: bool = False) -> Path:
    """Continue a run prepared by :func:`prepare_resume` (and write its report)."""
    from bench.runner import resume_run

    resume_run(session, folder, resumed=session.resumed, accepted=session.accepted_changes,
               unattended=unattended)
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


def report(folder: Path, *, map_peaks: int = 3, map_freqs_hz: tuple = (), map_bands_hz: tuple = (),
           limit: str | None = None, margin_db: float | None = None) -> Path:
    """Write the HTML report and plots of a run folder; returns the HTML file.

    Near-field maps are drawn at the ``map_peaks`` strongest hot spots, at each frequency of
    ``map_freqs_hz`` and over each (low, high) band of ``map_bands_hz`` (Hz). With ``limit``
    (a built-in name or a limit file) the stored data are judged again against it, with
    ``margin_db`` if given, into ``report-<limit>.html`` beside the first report.
    """
    from bench.report import MapViews, write_report
    from bench.store import open_run

    views = MapViews(peaks=map_peaks, freqs_hz=tuple(map_freqs_hz), bands_hz=tuple(map_bands_hz))
    run = open_run(folder)
    try:
        _check_map_views(run, views)
        if limit is None:
            return write_report(run, views)
        from bench.rejudge import rejudge

        return write_report(rejudge(run, limit, margin_db=margin_db), views,
                            name=f"report-{Path(limit).stem}")
    finally:
        run.close()


def _check_map_views(run, views) -> None:
    """Maps asked for must lie inside a near-field grid sweep of the run (else one line, exit 2)."""
    from bench.analysis.runview import step_span_hz
    from bench.steps import KINDS
    from bench.units import format_hz

    if not views.freqs_hz and not views.bands_hz:
        return
    option = "--map-at" if views.freqs_hz else "--map-band"
    grids = [s["label"] for s in run.manifest().get("steps", [])
             if s.get("kind") in KINDS and not KINDS[s["kind"]].far_field and not run.traces(s["label"]).empty]
    if not grids:
        raise ConfigError(f"{run.folder}: expected a run with a measured near-field grid step to map, "
                          "found none (maps are drawn from grid scans only)", key=option)
    spans = [step_span_hz(run, label) for label in grids]
    text = ", ".join(dict.fromkeys(f"{format_hz(lo)} to {format_hz(hi)}" for lo, hi in spans))
    wanted = [("--map-at", f, f) for f in views.freqs_hz] + [("--map-band", lo, hi) for lo, hi in views.bands_hz]
    for key, lo, hi in wanted:
        if not any(a <= hi and lo <= b for a, b in spans):
            found = format_hz(lo) if lo == hi else f"{format_hz(lo)} to {format_hz(hi)}"
            raise ConfigError(f"expected a frequency inside a grid sweep of this run ({text}), found {found}",
                              key=key)


def serve_simulator(*, port: int = 0, board: Path | None = None, seed: int = 1, realtime: bool = False,
                    announce=None) -> int:
    """Serve the simulated bench until stopped; ``announce(addresses)`` once it listens."""
    from bench.simbench import serve_forever

    return serve_forever(port=port, board=board, seed=seed, realtime=realtime, announce=announce)


@dataclass(frozen=True)
class Outcome:
    """How a run ended, for people: its verdict, distinct warnings and where the report is."""

    folder: Path
    state: str
    verdict: object
    warnings: tuple[str, ...]
    report: Path | None


def outcome(folder: Path) -> Outcome:
    """The verdict, the distinct warnings and the report of a run folder."""
    from bench.analysis.verdict import verdict_of
    from bench.store import open_run

    run = open_run(folder)
    try:
        results, events, manifest = run.results(), run.events(), run.manifest()
    finally:
        run.close()
    remeasured = {s["of"]: s["label"] for s in manifest.get("steps", []) if s.get("of")}
    warnings = tuple(dict.fromkeys(events.loc[events["level"] == "warning", "text"]))
    report = Path(folder) / "report.html"
    return Outcome(Path(folder), str(manifest.get("state", "")), verdict_of(results, remeasured),
                   warnings, report if report.is_file() else None)


def export(folder: Path, csv_dir: Path, *, parquet: bool = False) -> list[Path]:
    """CSV (and Parquet) files of a run for other tools; returns the files written."""
    from bench.export import export_run
    from bench.store import open_run

    run = open_run(folder)
    try:
        return export_run(run, csv_dir, parquet=parquet)
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


def limit_lines(name_or_path: str) -> dict:
    """A limit set as plain data: name, title, source, quantity, distance, lines and segments (Hz)."""
    from bench.analysis.limits import load_limit

    limit = load_limit(name_or_path)
    lines = [{"detector": line.detector, "clause": line.clause,
              "segments": [(seg.start_hz, seg.stop_hz, seg.start_level, seg.stop_level) for seg in line.segments]}
             for line in limit.lines]
    return {"name": limit.name, "title": limit.title, "source": limit.source, "quantity": limit.quantity,
            "distance_m": limit.distance_m, "lines": lines, "notes": limit.notes}


def _limit_names() -> list[str] | str:
    from bench.errors import BenchError

    try:
        from bench.analysis.limits import list_limits

        return list(list_limits())
    except BenchError as exc:  # pragma: no cover - a broken built-in file
        return f"unavailable ({exc})"


def _transports() -> list[str]:
    from bench.transports import describe_transports

    return list(describe_transports())
