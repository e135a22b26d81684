"""Command line: ``bench <verb> ...`` (also ``python -m bench``).

Verbs: ``run``, ``check``, ``resume``, ``sim``, ``export``, ``report``, ``compare``,
``instruments``, ``info``. A mistake in a file a person wrote is one line on stderr and exit code
2, with nothing written; an instrument or transport failure is one line and exit code 1; an
interrupted run says how to resume it (exit code 3).
"""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path

from bench.errors import BenchError

__all__ = ["main", "build_parser"]

def _seed(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 0, found {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 0, found {value}")
    return value


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="emission-bench",
                                description="Radiated-emission pre-scans on a bench or a simulated bench "
                                            "(the short alias 'bench' runs the same program).")
    p.add_argument("-v", "--verbose", action="store_true", help="more detail (all validation errors, debug log)")
    sub = p.add_subparsers(dest="verb", required=True, metavar="VERB")

    def bench_args(sp):
        sp.add_argument("--bench", type=Path, help="bench file (instruments, addresses, tables, site)")
        sp.add_argument("--sim", action="store_true",
                        help="use the simulated bench over loopback: the demo bench, or with --bench that "
                             "bench file with its instruments simulated (socket:// addresses stay socket://)")
        sp.add_argument("--board", type=Path, help="with --sim: simulated board file (default: the demo board)")
        sp.add_argument("--seed", type=_seed, default=None, help="with --sim: random seed >= 0 (default 1)")
        sp.add_argument("--realtime", action="store_true", help="with --sim: sweeps and moves take their physical time")

    sp = sub.add_parser("run", help="check a sequence, then run it and store the results")
    sp.add_argument("sequence", type=Path)
    bench_args(sp)
    sp.add_argument("--out", type=Path, default=Path("runs"), help="folder for run folders (default ./runs)")
    sp.add_argument("--no-plots", action="store_true", help="skip PNG plots and the report")
    sp.add_argument("--unattended", action="store_true",
                    help="skip the confirmation before the first motion or power switch (overnight runs; recorded)")
    sp.add_argument("--fault", action="append", default=[], metavar="KIND=N",
                    help="with --sim: inject a fault, e.g. drop-after-sweeps=20 (repeatable)")

    sp = sub.add_parser("check", help="validate a sequence and print its plan; touches no instrument")
    sp.add_argument("sequence", type=Path)
    bench_args(sp)

    sp = sub.add_parser("resume", help="continue an interrupted run from the first action not done")
    sp.add_argument("run", type=Path)
    bench_args(sp)
    sp.add_argument("--unattended", action="store_true",
                    help="skip the confirmation before the first motion or power switch (recorded)")
    sp.add_argument("--accept-changes", action="store_true",
                    help="continue although limit, table, profile or board files changed since the run started")
    sp.add_argument("--no-plots", action="store_true")

    sp = sub.add_parser("sim", help="serve the simulated bench on loopback and print its addresses")
    sp.add_argument("--port", type=int, default=0, help="analyzer SCPI port (default: an ephemeral one)")
    sp.add_argument("--board", type=Path)
    sp.add_argument("--seed", type=_seed, default=1)
    sp.add_argument("--realtime", action="store_true")

    sp = sub.add_parser("export", help="export a run to CSV (and Parquet)")
    sp.add_argument("run", type=Path)
    sp.add_argument("--csv", type=Path, required=True, metavar="DIR")
    sp.add_argument("--parquet", action="store_true", help="also write traces.parquet (needs pyarrow)")

    sp = sub.add_parser("report", help="write the HTML report and plots of a run")
    sp.add_argument("run", type=Path)
    sp.add_argument("--map-at", action="append", default=[], metavar="FREQ",
                    help='near-field map at a frequency, e.g. "48 MHz" (repeatable)')
    sp.add_argument("--map-band", action="append", nargs=2, default=[], metavar=("LOW", "HIGH"),
                    help='near-field map of the maximum over a band, e.g. "100 MHz" "200 MHz" (repeatable)')
    sp.add_argument("--limit", metavar="NAME_OR_FILE",
                    help="judge the stored data again against another limit set, into report-<limit>.html")
    sp.add_argument("--margin", metavar="DB", help='with --limit: the margin for "marginal", e.g. "3 dB"')
    sp.add_argument("--map-peaks", type=int, default=3, metavar="N",
                    help="near-field maps at the N strongest flagged peaks (default 3)")

    sp = sub.add_parser("compare", help="compare two runs (before and after a fix)")
    sp.add_argument("before", type=Path)
    sp.add_argument("after", type=Path)
    sp.add_argument("--out", type=Path, help="folder for the comparison (default: inside the 'after' run)")

    sp = sub.add_parser("instruments", help="ask every instrument of a bench file for its identity")
    bench_args(sp)

    sp = sub.add_parser("info", help="versions, profiles, limit lines, transports and what is unavailable")
    sp.add_argument("--limit", metavar="NAME_OR_FILE", help="print one limit line set with its source")
    return p


def _setup_logging(verbose: bool) -> None:
    from rich.console import Console
    from rich.logging import RichHandler

    console = Console(stderr=True)
    handler: logging.Handler
    if console.is_terminal:
        handler = RichHandler(console=console, show_path=False, show_time=False)
        handler.setFormatter(logging.Formatter("%(message)s"))
    else:
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
    if not verbose:
        handler.addFilter(_quiet)
    root = logging.getLogger("bench")
    root.handlers[:] = [handler]
    root.setLevel(logging.DEBUG if verbose else logging.INFO)
    root.propagate = False


def _quiet(record: logging.LogRecord) -> bool:
    """Without -v the terminal shows errors and the heartbeat only; run.log keeps everything,
    and the warnings are listed once when the run ends."""
    return record.levelno >= logging.ERROR or record.name == "bench.progress"


def _sigterm_as_interrupt():
    """SIGTERM (a service manager, ``timeout``) stops a run like Ctrl-C: kept and resumable."""
    import signal
    import threading

    def handler(signum, frame):
        raise KeyboardInterrupt

    if threading.current_thread() is not threading.main_thread():
        return None
    return signal.signal(signal.SIGTERM, handler)


def _restore_sigterm(previous) -> None:
    import signal

    if previous is not None:
        signal.signal(signal.SIGTERM, previous)


def _silence_stdout() -> None:
    """Point stdout at /dev/null so the interpreter's final flush does not fail again."""
    import os

    try:
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
    except (OSError, ValueError):
        pass


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    _setup_logging(args.verbose)
    from bench.cli.verbs import VERBS

    previous = _sigterm_as_interrupt()
    try:
        return int(VERBS[args.verb](args) or 0)
    except BenchError as exc:
        print(f"emission-bench: {exc}", file=sys.stderr)
        if args.verbose:
            for extra in getattr(exc, "all_errors", ())[1:]:
                print(f"  also: {extra}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("emission-bench: stopped by the operator", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader went away (`bench info | head`): stop quietly, as a pipe-aware tool does
        _silence_stdout()
        return 141
    finally:
        _restore_sigterm(previous)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
