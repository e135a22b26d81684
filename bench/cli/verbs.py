"""The verbs of the command line: call a use case of :mod:`bench.app` and print what it returns.

This is the only layer that prints.
"""

from __future__ import annotations

import sys
from contextlib import ExitStack
from pathlib import Path

from bench import app
from bench.errors import ConfigError

__all__ = ["VERBS"]

def _options(args) -> app.BenchOptions:
    return app.BenchOptions(bench_path=args.bench, sim=args.sim, board=args.board, seed=args.seed,
                            realtime=args.realtime, faults=tuple(getattr(args, "fault", ()) or ()))


def _print_banner(session, *, what: str) -> None:
    """Sequence, board, bench and plan; the cautions that apply; warnings once."""
    print(f"emission-bench {what}")
    for line in app.banner(session):
        print(f"  {line}")
    print("  cautions:")
    for text in app.cautions(session):
        print(f"   - {text}")
    for w in dict.fromkeys(session.bench.warnings):  # the plan's warnings are in its lines above
        print(f"  warning: {w}")


def _confirm(session, args) -> None:
    """On a real bench, the operator confirms before the first motion or power switch."""
    items = app.to_confirm(session)
    if not items or args.unattended:
        return
    if not sys.stdin.isatty():
        raise ConfigError("this run moves instruments or switches power and there is no terminal to "
                          "confirm it: run it from a terminal, or add --unattended once the bench is safe")
    print("Before anything moves:")
    for text in items:
        print(f"  - {text}")
    answer = input("Type 'yes' when the bench is safe to start: ").strip().lower()
    if answer != "yes":
        raise ConfigError(f"not started: the operator answered {answer!r}, not 'yes'")


def cmd_check(args) -> int:
    with ExitStack() as stack:
        session = app.prepare(args.sequence, _options(args), stack=stack)
        _print_banner(session, what="check")
        print("check: OK (no instrument was touched)")
    return 0


def cmd_run(args) -> int:
    with ExitStack() as stack:
        session = app.prepare(args.sequence, _options(args), stack=stack)
        _print_banner(session, what="run")
        _confirm(session, args)
        folder = app.run_sequence(session, out_root=args.out, plots=not args.no_plots,
                                  unattended=args.unattended)
    _print_outcome(folder)
    return 0


def _print_outcome(folder: Path) -> None:
    """The verdict line, the worst findings, the distinct warnings and where the report is."""
    from rich.console import Console
    from rich.table import Table

    result = app.outcome(folder)
    console = Console(width=None if sys.stdout.isatty() else 132)
    print(result.verdict.line())
    findings = result.verdict.findings
    if not findings.empty:
        table = Table(title=f"worst findings ({min(len(findings), 10)} of {len(findings)} frequencies)")
        for col in ("step", "f (MHz)", "level", "limit", "margin (dB)", "detector",
                    "polarization", "height (m)", "azimuth (°)", "status"):
            table.add_column(col, justify="left" if col in ("step", "detector", "polarization", "status")
                             else "right")
        for _, r in findings.head(10).iterrows():
            unit = app.unit_text(r.unit)
            table.add_row(r.step_label, f"{r.freq_hz / 1e6:.3f}", f"{_num(r.level, 1)} {unit}",
                          f"{_num(r.limit_level, 1)} {unit}", _num(r.margin_db, 1), r.detector,
                          str(r.polarization or ""), _num(r.height_m, 2), _num(r.azimuth_deg, 0), r.status)
        console.print(table)
    for w in result.warnings[:10]:
        console.print(f"warning: {w}", markup=False)
    if len(result.warnings) > 10:
        console.print(f"... {len(result.warnings) - 10} more warnings in run.log and the report")
    print(f"run folder {result.folder}")
    if result.report is not None:
        print(f"report     {result.report}")
    print(app.ESTIMATE)


def _num(value, digits: int) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return ""
    return "" if v != v else f"{v:.{digits}f}"


def cmd_resume(args) -> int:
    with ExitStack() as stack:
        session, point = app.prepare_resume(args.run, _options(args), accept_changes=args.accept_changes,
                                            stack=stack)
        _print_banner(session, what="resume")
        print(f"  resuming  {args.run}: {point}")
        _confirm(session, args)
        folder = app.resume(args.run, session, plots=not args.no_plots, unattended=args.unattended,
                            accept_changes=args.accept_changes)
    _print_outcome(folder)
    return 0


def _announce(addresses: dict) -> None:
    for role in ("analyzer", "stage", "stage_pty", "mast", "turntable", "supply"):
        also = f"  (or {addresses[role + '_socket']})" if role + "_socket" in addresses else ""
        print(f"{role.replace('_', '-'):10s} {addresses[role]}{also}", flush=True)
    print("simulated bench running; Ctrl-C stops it", flush=True)


def cmd_sim(args) -> int:
    return app.serve_simulator(port=args.port, board=args.board, seed=args.seed, realtime=args.realtime,
                               announce=_announce)


def cmd_export(args) -> int:
    files = app.export(args.run, args.csv, parquet=args.parquet)
    print(f"exported {args.run} to {args.csv}:")
    for f in files:
        print(f"  {f.name:28s} {f.stat().st_size / 1e3:10.1f} kB")
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
    margin = None
    if args.margin is not None:
        if args.limit is None:
            raise ConfigError("--margin is used with --limit (judging the run again)", key="--margin")
        try:
            margin = units.parse(args.margin, "db")
        except ConfigError as exc:
            raise ConfigError(exc.message, key="--margin") from None
    print(app.report(args.run, map_peaks=args.map_peaks,
                     map_freqs_hz=tuple(freq(f, "--map-at") for f in args.map_at), map_bands_hz=bands,
                     limit=args.limit, margin_db=margin))
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


def cmd_limit(name: str) -> int:
    """``info --limit NAME``: every segment of a limit set, its clause and its source."""
    limit = app.limit_lines(name)
    unit = app.unit_text(limit["quantity"])
    print(f"{limit['title']} ({limit['name']})")
    print(f"  source: {limit['source']}")
    if limit["distance_m"] is not None:
        print(f"  test distance: {limit['distance_m']:g} m")
    for line in limit["lines"]:
        print(f"  {line['detector']} ({line['clause'] or 'no clause given'}):")
        for lo, hi, start, stop in line["segments"]:
            level = f"{start:.1f} {unit}" if start == stop else f"{start:.1f} to {stop:.1f} {unit} (linear in log f)"
            print(f"    {lo / 1e6:10.3f} MHz to {hi / 1e6:10.3f} MHz   {level}")
    if limit["notes"]:
        print(f"  notes: {limit['notes']}")
    return 0


def cmd_info(args) -> int:
    if getattr(args, "limit", None):
        return cmd_limit(args.limit)
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
