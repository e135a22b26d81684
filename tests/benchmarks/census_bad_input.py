"""Bad-input census: many malformed files and command lines, and what ``bench`` does with each.

The shipped demo files are copied into a base folder (a bench file with loopback addresses and
its profiles, tables, a limit file, sequences and the board) and checked to pass. Then each case
copies the base, mutates one thing and runs one command:

* files, mutated key by key from the parsed TOML (misspelt or missing key, unknown key, bare
  number, unit of another dimension, unknown or lower-case unit, negative, zero, huge, NaN or
  infinite value, wrong type, empty or long string, ``../`` in a string) and byte by byte
  (empty, comment only, truncated, binary garbage, byte-order mark, a non-UTF-8 byte, a NUL
  byte, a huge file, a folder in its place, the file missing);
* the CSV tables (header only, non-numeric, NaN, negative or decreasing frequency, ...);
* run folders (manifest or database missing or garbage) for resume, report and export;
* command lines (unknown options, missing files, folders where files are expected, bad
  numbers, paths with ``../``).

Each case runs :func:`bench.cli.main` in this process (the same code as the ``bench`` command;
an exception escaping it is what the command would print as a traceback), in the case's folder,
and counts: one line on stderr and exit 2 (good); a traceback; exit 0 (listed for judgement:
some mutations give a valid file); another exit code; more than one line; any file written or
changed in the case folder. A sample of cases is also run as real ``bench`` processes to check
that both ways agree. Prints counts and every suspected defect with a one-line reproducer.

Run: ``python tests/benchmarks/census_bad_input.py [--per-file 60] [--seed 5] [--keep DIR]``.
"""

from __future__ import annotations

import argparse
import contextlib
import copy
import io
import json
import math
import os
import random
import re
import select
import shutil
import subprocess
import sys
import time
import tomllib
import traceback
from collections import Counter
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Callable

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_sweeps import machine_lines, work_folder  # noqa: E402

__all__ = ["Case", "Outcome", "build_base", "file_cases", "table_cases", "cli_cases", "run_folder_cases",
           "run_case", "main"]

#: Loopback addresses to closed ports: ``bench check`` never connects, so nothing is sent.
ADDRESSES = {"analyzer": "TCPIP::127.0.0.1::9::SOCKET", "stage": "socket://127.0.0.1:9",
             "mast": "socket://127.0.0.1:9", "turntable": "socket://127.0.0.1:9",
             "supply": "TCPIP::127.0.0.1::9::SOCKET"}

#: A sequence that uses every instrument, probe and table of the demo bench.
SEQ_ALL = """\
schema = 1
name = "census-all"
description = "every step kind on the demo bench"

[sweeps.band]
start = "30 MHz"
stop = "300 MHz"
rbw = "120 kHz"
detector = "peak"
trace = "max-hold"
count = 2

[sweeps.nf]
start = "30 MHz"
stop = "300 MHz"
rbw = "1 MHz"
points = 1001

[[steps]]
kind = "ambient"
label = "ambient"
sweep = "band"
height = "1 m"
polarization = "horizontal"
azimuth = "0 deg"

[[steps]]
kind = "sweep"
label = "board-on"
sweep = "band"
ambient = "ambient"
limit = "limit.toml"

[[steps]]
kind = "prescan"
label = "prescan"
sweep = "band"
heights = { from = "1 m", to = "2 m", step = "1 m" }
polarizations = ["horizontal", "vertical"]
azimuths = { from = "0 deg", to = "90 deg", step = "90 deg" }
limit = "limit.toml"
ambient = "ambient"
margin = "6 dB"

[[steps]]
kind = "final"
label = "final"
of = "prescan"
detectors = ["quasi-peak", "cispr-average"]
dwell = "0.5 s"
azimuth_search = { half_width = "30 deg", step = "15 deg" }

[[steps]]
kind = "grid"
label = "hloop"
sweep = "nf"
probe = "hloop-10mm"
orientations = ["0 deg", "90 deg"]
area = { x = ["0 mm", "40 mm"], y = ["0 mm", "30 mm"] }
step_size = "10 mm"
height = "3 mm"

[[steps]]
kind = "grid"
label = "eprobe"
sweep = "nf"
probe = "eprobe"
orientations = ["0 deg"]
polygon = [["10 mm", "10 mm"], ["50 mm", "10 mm"], ["30 mm", "40 mm"]]
step_size = "10 mm"
height = "3 mm"
"""


@dataclass
class Case:
    """One bad input: what was changed and the command that reads it."""

    group: str            # sequence, bench, profile, limit, table, board, run folder, command line
    what: str             # the mutation, e.g. "seq-all.toml: steps.0.height: bare number"
    argv: list[str]
    prepare: Callable[[Path], None] | None = None
    valid_reason: str = ""  # set when the mutation is known to give a valid input


@dataclass
class Outcome:
    """What one case did."""

    case: Case
    code: int | None
    stderr_lines: list[str]
    stdout_lines: int
    traceback: str = ""
    written: list[str] = field(default_factory=list)
    seconds: float = 0.0

    @property
    def kind(self) -> str:
        """good / traceback / wrote files / exit 0 / one line, exit 1 / multi-line / exit N.

        Files written by a command that succeeded (an export, a report) are its output; files
        left by a command that failed are counted.
        """
        if self.traceback.startswith(("Hang:", "Crash:")):
            return "hang or crash"
        if self.traceback:
            return "traceback"
        if self.code == 0:
            return "exit 0"
        if self.written:
            return "wrote files"
        if len(self.stderr_lines) != 1:
            return "multi-line"
        return {2: "good", 1: "one line, exit 1"}.get(self.code, f"exit {self.code}")


# ------------------------------------------------------------------ the base folder

#: Base files that mutations start from, and the command that reads each.
def _targets() -> dict[str, list[str]]:
    check_all = ["check", "seq-all.toml", "--bench", "bench.toml"]
    return {
        "seq-all.toml": check_all,
        "seq-quick.toml": ["check", "seq-quick.toml", "--bench", "bench.toml"],
        "bench.toml": check_all,
        "analyzer.toml": check_all,
        "stage.toml": check_all,
        "positioner.toml": check_all,
        "supply.toml": check_all,
        "limit.toml": check_all,
        "board.toml": ["check", "seq-all.toml", "--sim", "--board", "board.toml"],
    }


def _group(name: str) -> str:
    return {"seq-all.toml": "sequence", "seq-quick.toml": "sequence", "bench.toml": "bench",
            "limit.toml": "limit", "board.toml": "board"}.get(name, "profile")


def build_base(folder: Path) -> Path:
    """Copy the demo files into ``folder/base``: bench with its profiles and tables, a limit
    file, two sequences and the board. Returns the base folder."""
    demo, drivers = resources.files("bench.demo"), resources.files("bench.drivers")
    base = folder / "base"
    base.mkdir()
    shutil.copytree(Path(str(demo / "tables")), base / "tables")
    bench = (demo / "demo-bench.toml").read_text(encoding="utf-8")
    for role, address in ADDRESSES.items():
        bench = bench.replace(f'"sim://{role}"', f'"{address}"')
    for name, profile in (("analyzer", "scpi-analyzer"), ("stage", "gcode-cartesian"),
                          ("positioner", "line-positioner"), ("supply", "scpi-supply")):
        (base / f"{name}.toml").write_text((drivers / "profiles" / f"{profile}.toml").read_text(encoding="utf-8"),
                                           encoding="utf-8")
        bench = bench.replace(f'profile = "{profile}"', f'profile = "{name}.toml"')
    (base / "bench.toml").write_text(bench, encoding="utf-8")
    limits = resources.files("bench") / "data" / "limits" / "cispr32-class-b-3m.toml"
    (base / "limit.toml").write_text(limits.read_text(encoding="utf-8"), encoding="utf-8")
    (base / "seq-all.toml").write_text(SEQ_ALL, encoding="utf-8")
    quick = (demo / "demo-quick.toml").read_text(encoding="utf-8")
    (base / "seq-quick.toml").write_text(quick.replace('"cispr32-class-b-3m"', '"limit.toml"'), encoding="utf-8")
    (base / "board.toml").write_text((demo / "demo-board.toml").read_text(encoding="utf-8"), encoding="utf-8")
    return base


# ------------------------------------------------------------------ TOML mutations

_QUANTITY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([^\d\s].*)$")
#: A unit of another dimension for each unit's dimension (by the unit text's look).
_OTHER_UNIT = (("Hz", "mm"), ("dB", "s"), ("deg", "mm"), ("mm/s", "deg/s"), ("m", "MHz"), ("s", "dB"))


def _wrong_unit(unit: str) -> str:
    for needle, other in _OTHER_UNIT:
        if needle in unit:
            return other
    return "Hz"


def _value_mutations(value) -> list[tuple[str, object]]:
    """(name, new value) pairs that should make ``value`` invalid (a few may stay valid)."""
    if isinstance(value, bool):
        return [("bool as string", "yes"), ("bool as number", 1)]
    if isinstance(value, str):
        m = _QUANTITY.match(value)
        if m:
            num, unit = m.groups()
            return [("bare number", float(num)), ("number without unit", num),
                    ("unit of another dimension", f"{num} {_wrong_unit(unit)}"),
                    ("unknown unit", f"{num} furlongs"), ("lower-case unit", f"{num} {unit.lower()}"),
                    ("negative", f"-{num} {unit}"), ("zero", f"0 {unit}"), ("huge", f"1e300 {unit}"),
                    ("NaN", f"nan {unit}"), ("infinite", f"inf {unit}"), ("comma decimal", f"{num},5 {unit}"),
                    ("empty string", "")]
        return [("empty string", ""), ("long string", "x" * 20000), ("non-ASCII string", "µΩ∑ 測"),
                ("path with ../", "../../outside"), ("number for a string", 5)]
    if isinstance(value, int):
        return [("negative", -1), ("zero", 0), ("huge integer", 10 ** 30), ("float for an integer", 1.5),
                ("string for a number", str(value)), ("bool for a number", True)]
    if isinstance(value, float):
        return [("negative", -value or -1.0), ("zero", 0.0), ("huge", 1e308), ("NaN", math.nan),
                ("infinite", math.inf), ("string for a number", str(value))]
    if isinstance(value, list):
        return [("empty list", []), ("scalar for a list", value[0] if value else "x"),
                ("extra element", value + value[-1:] if value else ["x"]), ("nested list", [value])]
    return []


def _leaves(doc, path=()):
    """(key path, value) of every scalar and every list of scalars; tables are walked."""
    if isinstance(doc, dict):
        for k, v in doc.items():
            yield from _leaves(v, path + (k,))
    elif isinstance(doc, list) and doc and all(isinstance(v, dict) for v in doc):
        for i, v in enumerate(doc):
            yield from _leaves(v, path + (i,))
    else:
        yield path, doc


def _parent(doc, path):
    for k in path[:-1]:
        doc = doc[k]
    return doc


def _misspelt(key: str) -> str:
    """A plausible typo: two middle letters swapped (or one letter doubled for short keys)."""
    if len(key) >= 4:
        i = len(key) // 2
        swapped = key[:i - 1] + key[i] + key[i - 1] + key[i + 1:]
        if swapped != key:
            return swapped
    return key + key[-1]


def _rewrite(name: str, change: Callable[[dict], None]) -> Callable[[Path], None]:
    """A ``prepare`` that parses ``name`` in the case folder, applies ``change`` and rewrites it."""
    def prepare(folder: Path) -> None:
        import tomli_w

        doc = tomllib.loads((folder / name).read_text(encoding="utf-8"))
        change(doc)
        (folder / name).write_text(tomli_w.dumps(doc), encoding="utf-8")
    return prepare


def _set(path, value):
    def change(doc):
        _parent(doc, path)[path[-1]] = copy.deepcopy(value)
    return change


def _delete(path):
    def change(doc):
        del _parent(doc, path)[path[-1]]
    return change


def _rename(path, new_key):
    def change(doc):
        parent = _parent(doc, path)
        items = [(new_key if k == path[-1] else k, v) for k, v in parent.items()]
        parent.clear()
        parent.update(items)
    return change


def _add_unknown(path):
    def change(doc):
        (_parent(doc, path + ("x",)) if path else doc)["colour"] = "blue"
    return change


def _dotted(path) -> str:
    return ".".join(str(p) for p in path) or "(top)"


def key_cases(name: str, argv: list[str], text: str) -> list[Case]:
    """Every value and key mutation of one TOML file."""
    doc, group, cases = tomllib.loads(text), _group(name), []
    tables = {()}
    for path, value in _leaves(doc):
        where = f"{name}: {_dotted(path)}"
        for what, new in _value_mutations(value):
            if new == value and type(new) is type(value):
                continue  # no change (a unit already in lower case)
            cases.append(Case(group, f"{where}: {what} ({_short(new)})", argv, _rewrite(name, _set(path, new))))
        if isinstance(path[-1], str):
            cases.append(Case(group, f"{where}: misspelt key {_misspelt(path[-1])!r}", argv,
                              _rewrite(name, _rename(path, _misspelt(path[-1])))))
            cases.append(Case(group, f"{where}: key missing", argv, _rewrite(name, _delete(path))))
        tables.add(path[:-1])
    for path in sorted(tables, key=_dotted):
        cases.append(Case(group, f"{name}: {_dotted(path)}: unknown key 'colour'", argv,
                          _rewrite(name, _add_unknown(path))))
    return cases


def _short(value) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _write_bytes(name: str, data: bytes | Callable[[bytes], bytes]) -> Callable[[Path], None]:
    def prepare(folder: Path) -> None:
        path = folder / name
        path.write_bytes(data(path.read_bytes()) if callable(data) else data)
    return prepare


def _folder_instead(name: str) -> Callable[[Path], None]:
    def prepare(folder: Path) -> None:
        (folder / name).unlink()
        (folder / name).mkdir()
    return prepare


def _missing(name: str) -> Callable[[Path], None]:
    return lambda folder: (folder / name).unlink()


def byte_cases(name: str, argv: list[str], rng: random.Random) -> list[Case]:
    """Whole-file mutations of one file: empty, truncated, garbage, BOM, bad bytes, huge ..."""
    garbage = bytes(rng.randrange(256) for _ in range(4096))
    g = _group(name)
    muts = [("empty file", b""), ("comment only", b"# nothing here\n"),
            ("truncated at 30 %", lambda b: b[:len(b) * 3 // 10]),
            ("truncated at 70 %", lambda b: b[:len(b) * 7 // 10]),
            ("binary garbage", garbage), ("byte-order mark", lambda b: b"\xef\xbb\xbf" + b),
            ("UTF-16 encoded", lambda b: b.decode("utf-8").encode("utf-16")),
            ("non-UTF-8 byte in a string", lambda b: b.replace(b'"', b'"\xe9', 1)),
            ("NUL byte", lambda b: b.replace(b"\n", b"\n\x00", 1)),
            ("huge file (4 MB of comments)", lambda b: b + (b"#" * 79 + b"\n") * 52000),
            ("CRLF line ends", lambda b: b.replace(b"\n", b"\r\n"))]
    cases = [Case(g, f"{name}: {what}", argv, _write_bytes(name, data),
                  valid_reason="CRLF line ends are valid TOML" if what == "CRLF line ends" else "")
             for what, data in muts]
    cases.append(Case(g, f"{name}: a folder in its place", argv, _folder_instead(name)))
    cases.append(Case(g, f"{name}: file missing", argv, _missing(name)))
    return cases


def file_cases(base: Path, per_file: int, rng: random.Random) -> list[Case]:
    """Key and byte mutations of every base file; at most ``per_file`` key mutations each (seeded)."""
    cases = []
    for name, argv in _targets().items():
        keyed = key_cases(name, argv, (base / name).read_text(encoding="utf-8"))
        if per_file:
            rng.shuffle(keyed)
            keyed = keyed[:per_file]
        cases += keyed + byte_cases(name, argv, rng)
    return cases


# ------------------------------------------------------------------ tables

def _csv_rows(text: str) -> tuple[list[str], str, list[str]]:
    """(comment lines, column header, data rows) of a table file."""
    lines = text.splitlines()
    comments = [line for line in lines if line.startswith("#")]
    rest = [line for line in lines if line.strip() and not line.startswith("#")]
    return comments, rest[0], rest[1:]


def _csv_change(name: str, change: Callable[[list[str], str, list[str]], str]) -> Callable[[Path], None]:
    def prepare(folder: Path) -> None:
        path = folder / "tables" / name
        comments, header, rows = _csv_rows(path.read_text(encoding="utf-8"))
        path.write_text(change(comments, header, rows), encoding="utf-8")
    return prepare


def _join(*parts) -> str:
    out = []
    for part in parts:
        out += part if isinstance(part, list) else [part]
    return "\n".join(out) + "\n"


def _cell(rows: list[str], row: int, col: int, value: str) -> list[str]:
    cells = rows[row].split(",")
    cells[col] = value
    return rows[:row] + [",".join(cells)] + rows[row + 1:]


def table_cases(names=("hloop-10mm.csv", "bilog-af.csv", "preamp-30db.csv")) -> list[Case]:
    """Bad transducer tables (read through the bench file by ``bench check``)."""
    argv = ["check", "seq-all.toml", "--bench", "bench.toml"]
    muts = {
        "header only": lambda c, h, r: _join(c, h),
        "no column header": lambda c, h, r: _join(c, r),
        "no comment lines": lambda c, h, r: _join(h, r),
        "non-numeric value": lambda c, h, r: _join(c, h, _cell(r, 2, 1, "abc")),
        "NaN value": lambda c, h, r: _join(c, h, _cell(r, 2, 1, "nan")),
        "infinite value": lambda c, h, r: _join(c, h, _cell(r, 2, 1, "inf")),
        "huge value": lambda c, h, r: _join(c, h, _cell(r, 2, 1, "1e308")),
        "negative frequency": lambda c, h, r: _join(c, h, _cell(r, 0, 0, "-1")),
        "decreasing frequencies": lambda c, h, r: _join(c, h, [r[1], r[0]] + r[2:]),
        "repeated frequency": lambda c, h, r: _join(c, h, r[:2] + [r[1]] + r[2:]),
        "extra column": lambda c, h, r: _join(c, h, _cell(r, 2, 1, "1,2")),
        "missing cell": lambda c, h, r: _join(c, h, _cell(r, 2, 1, "")),
        "semicolon separator": lambda c, h, r: _join(c, h.replace(",", ";"), [x.replace(",", ";") for x in r]),
        "decimal comma": lambda c, h, r: _join(c, h.replace(",", ";"),
                                               [x.replace(",", ";").replace(".", ",") for x in r]),
        "truncated mid-row": lambda c, h, r: _join(c, h, r[:-1]) + r[-1][:3],
        "one row": lambda c, h, r: _join(c, h, r[:1]),
        "wrong column name": lambda c, h, r: _join(c, h.replace("freq_mhz", "frequency"), r),
        "frequency in Hz column name": lambda c, h, r: _join(c, h.replace("freq_mhz", "freq_hz"), r),
        "wrong role line": lambda c, h, r: _join([x.replace("# role:", "# role: colour;") for x in c], h, r),
    }
    cases = []
    for name in names:
        for what, change in muts.items():
            cases.append(Case("table", f"tables/{name}: {what}", argv, _csv_change(name, change)))
        for what, data in (("empty file", b""), ("binary garbage", bytes(range(256)) * 8),
                           ("byte-order mark", lambda b: b"\xef\xbb\xbf" + b)):
            cases.append(Case("table", f"tables/{name}: {what}", argv, _write_bytes(f"tables/{name}", data)))
        cases.append(Case("table", f"tables/{name}: a folder in its place", argv, _folder_instead(f"tables/{name}")))
        cases.append(Case("table", f"tables/{name}: file missing", argv, _missing(f"tables/{name}")))
    return cases


# ------------------------------------------------------------------ run folders

#: A one-sweep sequence whose run folder the run-folder cases damage.
SEQ_TINY = """\
schema = 1
name = "census-tiny"

[sweeps.band]
start = "30 MHz"
stop = "300 MHz"
rbw = "1 MHz"
points = 1001

[[steps]]
kind = "sweep"
label = "one"
sweep = "band"
"""


def make_run(base: Path) -> None:
    """A finished run in ``base/run`` (simulated bench, no plots), for the run-folder cases."""
    from bench.cli import main

    (base / "seq-tiny.toml").write_text(SEQ_TINY, encoding="utf-8")
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        code = main(["run", str(base / "seq-tiny.toml"), "--sim", "--no-plots", "--out", str(base / "runs")])
    if code != 0:
        raise RuntimeError("the tiny run failed")
    (folder,) = (base / "runs").iterdir()
    folder.rename(base / "run")
    (base / "runs").rmdir()


def run_folder_cases() -> list[Case]:
    """Damaged run folders given to resume, report, export and compare."""
    damage = {
        "manifest missing": _missing("run/manifest.toml"),
        "manifest garbage": _write_bytes("run/manifest.toml", b"\x00\xff garbage = = =\n"),
        "manifest truncated": _write_bytes("run/manifest.toml", lambda b: b[:len(b) // 2]),
        "manifest empty": _write_bytes("run/manifest.toml", b""),
        "database missing": _missing("run/data.sqlite"),
        "database garbage": _write_bytes("run/data.sqlite", bytes(range(256)) * 64),
        "database truncated": _write_bytes("run/data.sqlite", lambda b: b[:len(b) // 3]),
        "database empty": _write_bytes("run/data.sqlite", b""),
        "tables folder missing": lambda f: shutil.rmtree(f / "run" / "tables"),
        "state 'running', sequence moved": _manifest_edit({"state": "running"}, move_sequence=True),
    }
    verbs = {"resume": ["resume", "run"], "report": ["report", "run"], "export": ["export", "run", "--csv", "out"],
             "compare": ["compare", "run", "run", "--out", "cmp"]}
    return [Case("run folder", f"run folder, {what}: bench {verb}", argv, prepare)
            for what, prepare in damage.items() for verb, argv in verbs.items()]


def _manifest_edit(changes: dict, *, move_sequence: bool) -> Callable[[Path], None]:
    def prepare(folder: Path) -> None:
        import tomli_w

        path = folder / "run" / "manifest.toml"
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
        doc.update(changes)
        if move_sequence:
            doc["sequence"]["path"] = str(folder / "moved-away.toml")
        path.write_text(tomli_w.dumps(doc), encoding="utf-8")
    return prepare


# ------------------------------------------------------------------ command lines

def cli_cases() -> list[Case]:
    """Bad command lines: options, numbers, missing files, folders for files, ``../`` paths."""
    seq, bench = "seq-quick.toml", "bench.toml"
    lines = [
        [], ["frobnicate"], ["run"], ["run", seq, "--sim", "--frobnicate"], ["check", seq, "--sim", "extra"],
        ["run", "missing.toml", "--sim"], ["check", "missing.toml", "--bench", bench],
        ["check", "tables", "--sim"], ["check", seq, "--bench", "tables"], ["check", seq, "--bench", "missing.toml"],
        ["check", seq], ["check", seq, "--sim", "--bench", bench], ["check", seq, "--sim", "--seed", "-1"],
        ["check", seq, "--sim", "--seed", "abc"], ["check", seq, "--sim", "--seed", "1e3"],
        ["check", seq, "--sim", "--seed", str(2 ** 70)], ["check", seq, "--bench", bench, "--seed", "3"],
        ["check", seq, "--sim", "--board", "missing.toml"], ["check", seq, "--sim", "--board", "tables"],
        ["check", seq, "--bench", bench, "--board", "board.toml"], ["check", "../../../etc/passwd", "--sim"],
        ["check", "../base/../missing/seq.toml", "--sim"], ["check", "bench.toml", "--sim"],
        ["check", "tables/hloop-10mm.csv", "--sim"], ["run", seq, "--sim", "--out", "bench.toml", "--no-plots"],
        ["run", seq, "--sim", "--fault", "drop-after-sweeps"], ["run", seq, "--sim", "--fault", "melt=3"],
        ["run", seq, "--bench", bench, "--fault", "drop-after-sweeps=3"],
        ["run", seq, "--sim", "--fault", "drop-after-sweeps=1e2"], ["resume", "missing-run"], ["resume", "tables"],
        ["resume", seq], ["report", "missing-run"], ["report", "tables"], ["export", "tables", "--csv", "out"],
        ["export", "missing-run"], ["compare", "missing-a", "missing-b"], ["sim", "--port", "-1"],
        ["sim", "--port", "99999"], ["sim", "--port", "abc"], ["sim", "--board", "missing.toml"],
        ["sim", "--board", "tables"], ["sim", "--seed", "-5"], ["info", "extra"], ["instruments"],
        ["instruments", "--bench", "missing.toml"], ["check", seq, "--sim", "--realtime", "--seed"],
        ["check", "", "--sim"], ["check", "-", "--sim"], ["check", "seq-quick.toml/", "--sim"],
        ["check", "x" * 300 + ".toml", "--sim"], ["report", "y" * 300], ["export", "z" * 300, "--csv", "out"],
        ["check", seq, "--sim", "--board", "b" * 300 + ".toml"], ["check", seq, "--bench", "c" * 300 + ".toml"],
    ]
    return [Case("command line", "bench " + " ".join(a or ["(no arguments)"]), a) for a in lines]


# ------------------------------------------------------------------ running a case

_LOG = re.compile(r"^\d{4}-\d\d-\d\d \d\d:\d\d:\d\d,\d+ (DEBUG|INFO|WARNING|ERROR|CRITICAL) ")
#: Bound on a ``bench sim`` case (a valid one serves until stopped).
SIM_CASE_S = 8.0
#: Address space of the worker that runs the cases, bytes: a bad input must not need more.
MEMORY_LIMIT_BYTES = 3 << 30
#: Bound on one case in the worker, s.
CASE_TIMEOUT_S = 60.0


def _snapshot(folder: Path) -> dict:
    out = {}
    for root, dirs, files in os.walk(folder):
        dirs[:] = [d for d in dirs if d != "__pycache__"]
        for name in files + [d for d in dirs]:
            p = Path(root) / name
            try:
                st = p.lstat()
            except OSError:
                continue
            out[str(p.relative_to(folder))] = (st.st_size, st.st_mtime_ns)
    return out


def _in_process(argv: list[str], cwd: Path) -> tuple[int, str, str, str]:
    """``bench.cli.main(argv)`` in ``cwd``; (exit code, stdout, stderr, traceback or '')."""
    from bench.cli import main

    out, err, tb, old = io.StringIO(), io.StringIO(), "", os.getcwd()
    os.chdir(cwd)
    try:
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                code = main(list(argv))
            except SystemExit as exc:  # argparse
                code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
            except BaseException:  # noqa: BLE001 - what the command would print as a traceback
                tb, code = traceback.format_exc(), 1
    finally:
        os.chdir(old)
    return code, out.getvalue(), err.getvalue(), tb


def _as_process(argv: list[str], cwd: Path, timeout_s: float = 120.0) -> tuple[int, str, str, str]:
    """``python -m bench ARGV`` in ``cwd``; a process still running after ``timeout_s`` is
    stopped and reported with exit code 0 (it was serving: the input was accepted)."""
    try:
        done = subprocess.run([sys.executable, "-m", "bench", *argv], cwd=cwd, capture_output=True, text=True,
                              timeout=timeout_s, errors="replace")
        code, out, err = done.returncode, done.stdout, done.stderr
    except subprocess.TimeoutExpired as exc:
        code, out, err = 0, str(exc.stdout or ""), str(exc.stderr or "")
    tb = err[err.index("Traceback"):] if "Traceback" in err else ""
    return code, out, err, tb


class Worker:
    """A child process that runs cases with :func:`bench.cli.main` one after another.

    It imports the package once (cases take milliseconds, not the 1-2 s of a new interpreter),
    lives under a memory limit (``RLIMIT_AS``), and is replaced when a case kills it or takes
    longer than ``timeout_s``: that case is then reported as a crash or a hang.
    """

    def __init__(self, memory_bytes: int = MEMORY_LIMIT_BYTES, timeout_s: float = CASE_TIMEOUT_S) -> None:
        self.memory_bytes, self.timeout_s, self.proc = memory_bytes, timeout_s, None

    def _start(self) -> None:
        self.proc = subprocess.Popen([sys.executable, __file__, "--worker", str(self.memory_bytes)],
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                                     text=True, bufsize=1)

    def run(self, argv: list[str], cwd: Path) -> tuple[int, str, str, str]:
        """(exit code, stdout, stderr, traceback) of one case; a dead or stuck worker is replaced."""
        if self.proc is None or self.proc.poll() is not None:
            self._start()
        self.proc.stdin.write(json.dumps({"argv": argv, "cwd": str(cwd)}) + "\n")
        self.proc.stdin.flush()
        ready = select.select([self.proc.stdout], [], [], self.timeout_s)[0]
        line = self.proc.stdout.readline() if ready else ""
        if line.startswith(_RESULT):
            r = json.loads(line[len(_RESULT):])
            return r["code"], r["out"], r["err"], r["tb"]
        self.stop()
        if not ready:
            return -1, "", "", f"Hang: no answer within {self.timeout_s:g} s"
        return -1, "", "", f"Crash: the process died (memory limit {self.memory_bytes >> 30} GB?)"

    def stop(self) -> None:
        """Kill the worker process (a new one starts with the next case)."""
        if self.proc is not None:
            self.proc.kill()
            self.proc.wait()
            self.proc = None


_RESULT = "@@census-result "


def worker_loop(memory_bytes: int) -> None:
    """The worker side: read a case per line, run it in this process, print its result."""
    import resource

    resource.setrlimit(resource.RLIMIT_AS, (memory_bytes, memory_bytes))
    out = sys.stdout
    for line in sys.stdin:
        case = json.loads(line)
        code, stdout, stderr, tb = _in_process(case["argv"], Path(case["cwd"]))
        out.write(_RESULT + json.dumps({"code": code, "out": stdout[-20000:], "err": stderr[-20000:],
                                        "tb": tb[-5000:]}) + "\n")
        out.flush()


def run_case(case: Case, base: Path, folder: Path, index: int, worker: Worker | None = None) -> Outcome:
    """Copy the base, apply the case's change, run its command, look at what it did.

    With a ``worker`` the command runs there; without, as a real ``bench`` process.
    """
    work = folder / f"case-{index:04d}"
    shutil.copytree(base, work, symlinks=True)
    if case.prepare is not None:
        case.prepare(work)
    before = _snapshot(work)
    t0 = time.perf_counter()
    if worker is None or case.argv[:1] == ["sim"]:
        code, out, err, tb = _as_process(case.argv, work, SIM_CASE_S if case.argv[:1] == ["sim"] else 120.0)
    else:
        code, out, err, tb = worker.run(case.argv, work)
    seconds = time.perf_counter() - t0
    after = _snapshot(work)
    written = sorted(k for k in after if before.get(k) != after[k]) + sorted(f"{k} (deleted)" for k in before
                                                                              if k not in after)
    lines = [x for x in err.splitlines() if x.strip() and not _LOG.match(x)
             and not x.startswith(("Safety:", "simulated bench:"))]
    return Outcome(case, code, lines, len(out.splitlines()), tb.strip().splitlines()[-1] if tb else "",
                   written, seconds)


# ------------------------------------------------------------------ judging and printing

#: Mutations that give a valid input (exit 0 is right), by a pattern of the case text, and why.
VALID = (
    (r": lower-case unit", "units are case-insensitive (docs/sequence-format.md)"),
    (r": key missing$", "an optional key: its documented default applies"),
    (r"\b(description|name|title|notes|source|clause)(\.\d+)?: (empty|non-ASCII|long) string",
     "free text for people"),
    (r"\.name: path with \.\./|\b(description|title|notes|source|clause): path with \.\./", "free text for people"),
    (r": path with \.\./", "not a path here (a command, a pattern or a code): no file is opened"),
    (r": long string", "no length limit on commands and patterns: harmless"),
    (r": huge file \(4 MB of comments\)", "comments only: a valid file"),
    (r"tables/.*: byte-order mark", "a spreadsheet's byte-order mark is accepted on purpose (transducers.py)"),
    (r"tables/.*: no comment lines", "the comment lines are optional: the bench file gives the role"),
    (r"handshake\.(busy|errors): (scalar for a list|empty list|extra element)",
     "one pattern without brackets (documented), none, or one twice"),
    (r"transducers\.cables: (empty list|extra element)", "no cable, or the same cable twice in series"),
    (r"(outline|polygon): extra element", "a repeated corner"),
    (r"detectors: extra element", "a detector read twice"),
    (r": negative \('-0 ", "-0 is 0"),
    (r"azimuths\.to: zero", "a single azimuth, 0 deg"),
    (r"decimals: zero", "whole numbers on the wire"),
    (r"(settle|time_margin|move_time_margin): zero", "no extra wait"),
    (r"azimuth_search\.half_width: zero", "no azimuth search"),
    (r"margin: (zero|negative)", "suspects only above the limit by that much (docs: 'within this margin')"),
    (r"limit\.toml: lines\..*level: (zero|negative)", "limit levels of -100 to 200 dB are accepted by design"),
    (r"analyzer\.noise_figure: zero", "an ideal receiver"),
    (r"(stage|positioner)\.toml: .*\b(speed|feed|accel)\b.*: huge", "sets a reply deadline only (it shrinks to the margin)"),
    (r"\b(ok|banner|reply|polarization_reply)\b.*: non-ASCII string",
     "a pattern that never matches shows at the first command (a reply timeout)"),
    (r"seq-all\.toml: truncated at 70 %", "the cut falls between two steps: a shorter, complete sequence"),
    (r"run folder, (manifest (empty|garbage|truncated)|tables folder missing|state 'running', sequence moved): "
     r"bench (export|report|compare)", "export, report and compare read the data only (salvage)"),
    (r"bench check seq-quick\.toml/ --sim", "pathlib reads 'seq-quick.toml/' as the file"),
    (r"--seed 1180591620717411303424", "any whole number >= 0 is a seed"),
)


def judged_valid(case: Case) -> str:
    """Why an accepted case is valid ('' when it is not known to be)."""
    if case.valid_reason:
        return case.valid_reason
    for pattern, reason in VALID:
        if re.search(pattern, case.what):
            return reason
    return ""


def is_defect(o: Outcome) -> bool:
    """Anything but one line and exit 2, unless the input was valid and accepted; a damaged run
    folder may also give one line and exit 1 (a storage failure, by design)."""
    if o.kind == "good" or (o.kind == "one line, exit 1" and o.case.group == "run folder"):
        return False
    return not (o.kind == "exit 0" and judged_valid(o.case))


def print_counts(outcomes: list[Outcome]) -> None:
    """Outcomes per input group: one row per group and one for all."""
    kinds = ["good", "exit 0 (valid)", "exit 0", "one line, exit 1", "traceback", "hang or crash", "multi-line",
             "wrote files", "other exit"]
    print(f"{'input':14s} {'cases':>5s} " + " ".join(f"{k:>16s}" for k in kinds))
    for group in sorted({o.case.group for o in outcomes}) + ["all"]:
        os_ = [o for o in outcomes if group in ("all", o.case.group)]
        c = Counter(_bucket(o) for o in os_)
        print(f"{group:14s} {len(os_):5d} " + " ".join(f"{c[k]:16d}" for k in kinds))


def _bucket(o: Outcome) -> str:
    if o.kind == "exit 0":
        return "exit 0 (valid)" if judged_valid(o.case) else "exit 0"
    known = ("good", "traceback", "hang or crash", "multi-line", "wrote files", "one line, exit 1")
    return o.kind if o.kind in known else "other exit"


def print_defects(outcomes: list[Outcome], verbose: bool = False) -> None:
    """Tracebacks, hangs, stray files and odd exits one by one; accepted bad values by group."""
    bad = [o for o in outcomes if is_defect(o)]
    print(f"suspected defects: {len(bad)} (reproduce in a copy of the census base folder: "
          "change the file as said, then run the command)")
    for o in sorted(bad, key=lambda o: (o.kind, o.case.group, o.case.what)):
        if o.kind == "exit 0" and not verbose:
            continue
        said = o.traceback or (" | ".join(o.stderr_lines)[:220] if o.stderr_lines else f"stdout {o.stdout_lines} lines")
        extra = f"; wrote {', '.join(o.written[:4])}" if o.written else ""
        print(f"  [{o.kind}] {o.case.what}  ->  bench {' '.join(o.case.argv)}  (exit {o.code}: {said}{extra})")
    groups: dict = {}
    for o in bad:
        if o.kind == "exit 0" and o.case.group == "command line":
            groups.setdefault(("command line", "accepted"), []).append(o.case.what)
        elif o.kind == "exit 0":
            file, _, rest = o.case.what.partition(": ")
            key, _, what = rest.rpartition(": ")
            groups.setdefault((file, re.sub(r" \(.*", "", what) or rest), []).append(key or rest)
    print(f"  [exit 0] bad values accepted, by file and kind of change ({sum(map(len, groups.values()))}):")
    for (file, what), keys in sorted(groups.items(), key=lambda kv: (kv[0][0], -len(kv[1]))):
        print(f"    {file}: {what}: {len(keys)} ({', '.join(keys[:4])}{', ...' if len(keys) > 4 else ''})")
    valid = Counter(judged_valid(o.case) for o in outcomes if o.kind == "exit 0" and judged_valid(o.case))
    print(f"accepted and judged valid: {sum(valid.values())}")
    for reason, n in valid.most_common():
        print(f"  {n:4d}  {reason}")


def check_base(base: Path, folder: Path, worker: Worker) -> list[str]:
    """The base passes every target command (else the census would measure nothing)."""
    problems = []
    for name, argv in _targets().items():
        o = run_case(Case("base", f"base for {name}", argv), base, folder, 9999, worker)
        shutil.rmtree(folder / "case-9999")
        if o.code != 0:
            problems.append(f"{name}: bench {' '.join(argv)} -> exit {o.code}: {o.stderr_lines or o.traceback}")
    return problems


def agreement(cases: list[Case], outcomes: list[Outcome], base: Path, folder: Path, n: int,
              rng: random.Random) -> str:
    """Run ``n`` sampled cases as real ``bench`` processes: do both ways give the same kind?"""
    picks = rng.sample(range(len(cases)), min(n, len(cases)))
    same = 0
    for j, i in enumerate(picks):
        o = run_case(cases[i], base, folder, 90000 + j)
        shutil.rmtree(folder / f"case-{90000 + j:04d}")
        same += o.kind == outcomes[i].kind and o.code == outcomes[i].code
    return f"{same}/{len(picks)} sampled cases gave the same exit code and kind as real processes"


def main(argv: list[str] | None = None) -> int:
    """Build the base, run every case, print the counts, the agreement and the defects."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--per-file", type=int, default=0,
                        help="key mutations per file, sampled (default 0: all of them)")
    parser.add_argument("--seed", type=int, default=5, help="seed of the sampling (default 5)")
    parser.add_argument("--processes", type=int, default=12, help="cases also run as real processes")
    parser.add_argument("--keep", type=Path, help="keep the case folders under this folder")
    parser.add_argument("--verbose", action="store_true", help="list every accepted bad value")
    args = parser.parse_args(argv)
    for line in machine_lines():
        print(line)
    rng = random.Random(args.seed)
    t0 = time.monotonic()
    with work_folder("census-", args.keep) as folder:
        base = build_base(folder)
        make_run(base)
        worker = Worker()
        try:
            problems = check_base(base, folder, worker)
            if problems:
                print("the base does not pass:\n  " + "\n  ".join(problems))
                return 1
            cases = file_cases(base, args.per_file, rng) + table_cases() + run_folder_cases() + cli_cases()
            outcomes = []
            for i, case in enumerate(cases):
                outcomes.append(run_case(case, base, folder, i, worker))
                if args.keep is None or outcomes[-1].kind == "good":
                    shutil.rmtree(folder / f"case-{i:04d}", ignore_errors=True)
        finally:
            worker.stop()
        print(f"\n{len(cases)} bad inputs in {time.monotonic() - t0:.0f} s (seed {args.seed}, "
              f"{args.per_file or 'all'} key mutations per file)\n")
        print_counts(outcomes)
        print()
        print(agreement(cases, outcomes, base, folder, args.processes, rng))
        print()
        print_defects(outcomes, args.verbose)
    return 0


if __name__ == "__main__":
    if sys.argv[1:2] == ["--worker"]:
        worker_loop(int(sys.argv[2]))
        sys.exit(0)
    sys.exit(main())
