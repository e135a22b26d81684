"""The verbs of the command line: call a use case of :mod:`bench.app` and print what it returns.

This is the only layer that prints.
"""

from __future__ import annotations

import sys
from contextlib import ExitStack
from pathlib import Path

from bench import app
from bench.errors import ConfigError

__all__ = ["VERBS", "SAFETY_LINE", "ESTIMATE_LINE"]

SAFETY_LINE = ("Safety: analyzer inputs are damaged by more than about +30 dBm or any DC (use an "
               "attenuator, DC block, limiter); boards may carry mains or high voltage; a moving "
               "stage can pinch and crash a probe. A pre-scan is an estimate, not a compliance verdict.")
ESTIMATE_LINE = ("This pre-scan is an estimate, not a compliance verdict: defer to the applicable standard, "
                 "an accredited test house and local regulations.")


def _options(args) -> app.BenchOptions:
    return app.BenchOptions(bench_path=args.bench, sim=args.sim, board=args.board, seed=args.seed,
                            realtime=args.realtime, faults=tuple(getattr(args, "fault", ()) or ()))


def _print_plan(session) -> None:
    for line in session.plan.summary_lines():
        print(line)
    print(app.analyzer_caution(session))
    for w in tuple(session.sequence.warnings) + tuple(session.bench.warnings):
        print(f"warning: {w}")


def cmd_check(args) -> int:
    with ExitStack() as stack:
        session = app.prepare(args.sequence, _options(args), stack=stack)
        _print_plan(session)
        print("check: OK (no instrument was touched)")
    return 0


def cmd_run(args) -> int:
    with ExitStack() as stack:
        session = app.prepare(args.sequence, _options(args), stack=stack)
        print(SAFETY_LINE, file=sys.stderr)
        if session.sim is not None:
            a = session.sim.addresses
            print(f"simulated bench: analyzer {a['analyzer']}, stage {a['stage']} (also {a['stage_pty']}), "
                  f"mast and turntable {a['mast']}, supply {a['supply']}", file=sys.stderr)
        _print_plan(session)
        folder = app.run_sequence(session, out_root=args.out, plots=not args.no_plots)
    _print_results(folder)
    print(f"run stored in {folder}")
    return 0


def _print_results(folder: Path) -> None:
    """The suspects and final readings of a run, as a table on the terminal (and a note)."""
    from rich.console import Console
    from rich.table import Table

    results, warnings = app.run_results(folder)
    console = Console(width=None if sys.stdout.isatty() else 132)
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
    with ExitStack() as stack:
        folder = app.resume(args.run, _options(args), accept_changes=args.accept_changes,
                            plots=not args.no_plots, stack=stack)
    print(f"run completed in {folder}")
    return 0


def _announce(addresses: dict) -> None:
    for role in ("analyzer", "stage", "stage_pty", "mast", "turntable", "supply"):
        print(f"{role.replace('_', '-'):10s} {addresses[role]}", flush=True)
    print("simulated bench running; Ctrl-C stops it", flush=True)


def cmd_sim(args) -> int:
    return app.serve_simulator(port=args.port, board=args.board, seed=args.seed, realtime=args.realtime,
                               announce=_announce)


def cmd_export(args) -> int:
    for f in app.export(args.run, args.csv, parquet=args.parquet):
        print(f)
    return 0


def cmd_report(args) -> int:
    from bench import units

    def freq(text: str, option: str) -> float:
        try:
            return units.parse(text, "frequency", radio=True)
        except ConfigError as exc:
            raise ConfigError(exc.message, key=option) from None

    if args.map_peaks < 0:
        raise ConfigError(f"expected a count >= 0, found {args.map_peaks}", key="--map-peaks")
    bands = tuple((freq(lo, "--map-band"), freq(hi, "--map-band")) for lo, hi in args.map_band)
    if any(lo >= hi for lo, hi in bands):
        raise ConfigError("expected LOW < HIGH", key="--map-band")
    print(app.report(args.run, map_peaks=args.map_peaks,
                     map_freqs_hz=tuple(freq(f, "--map-at") for f in args.map_at), map_bands_hz=bands))
    return 0


def cmd_compare(args) -> int:
    result = app.compare(args.before, args.after, out=args.out)
    for line in result.lines():  # the summary at the top of the page, the same text
        print(line)
    print(result.path)
    return 0


def cmd_instruments(args) -> int:
    failures = 0
    for role, address, reply in app.identify(_options(args)):
        print(f"{role:10s} {address}  {reply}")
        failures += reply.startswith("ERROR")
    return 1 if failures else 0


def cmd_info(args) -> int:
    facts = app.info()
    print(f"{facts['software']}, Python {facts['python']}")
    for dist, version in facts["versions"].items():
        note = "  (optional: Parquet export)" if dist == "pyarrow" else ""
        print(f"  {dist:12s} {version}" if version else f"  {dist:12s} unavailable{note}")
    print("instrument profiles:")
    for name, desc in facts["profiles"].items():
        print(f"  {name:20s} {desc}")
    limits = facts["limits"]
    if isinstance(limits, str):
        print(f"limit lines: {limits}")
    else:
        print("limit lines:")
        for name in limits:
            print(f"  {name}")
    print("transports:")
    for line in facts["transports"]:
        print(f"  {line}")
    return 0


VERBS = {"run": cmd_run, "check": cmd_check, "resume": cmd_resume, "sim": cmd_sim,
         "export": cmd_export, "report": cmd_report, "compare": cmd_compare,
         "instruments": cmd_instruments, "info": cmd_info}
