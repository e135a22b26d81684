"""SCPI network instruments of the simulated bench: a spectrum analyzer and a bench supply.

Both are real instruments on a loopback TCP socket (VISA resource
``TCPIP::127.0.0.1::<port>::SOCKET``), one command line per ``\\n`` (``\\r\\n`` accepted), so a
driver talks to them exactly as to a bench analyzer.

Parsing (IEEE 488.2 / SCPI-1999 program syntax, reference sheet §9)
    * keywords match in their short form (the upper-case part of the pattern) or their long form,
      case-insensitively, nothing in between; bracketed nodes (``[SENSe:]``, ``[:DATA]``) and a
      numeric suffix ``1`` (``MARKer[1]``) are optional; a leading ``:`` is optional;
    * several commands on a line are separated by ``;``. A header that does not resolve from the
      root is tried relative to the previous command's path (``FREQ:STAR 1 MHZ;STOP 2 MHZ``);
    * numbers take the suffixes of their quantity (HZ, KHZ, MHZ, MAHZ, GHZ; S, MS, US, NS; DB;
      DBM) and ``MIN``/``MAX``/``DEF``; queries of numeric settings take ``MIN``/``MAX`` too;
    * replies to several queries on one line are joined with ``;`` and end in ``\\n``;
    * a command error (-1xx) discards the rest of the line (IEEE 488.2); other errors do not.

The commands are declared as a table of :class:`Row` (header pattern, parameter parser with its
range, setter, query), one table per instrument; see :data:`ANALYZER_ROWS` and
:data:`SUPPLY_ROWS`.

Error codes (SCPI-1999 standard codes; text as written by the instrument): -102 Syntax error,
-104 Data type error, -108 Parameter not allowed, -109 Missing parameter, -113 Undefined header,
-131 Invalid suffix, -221 Settings conflict, -222 Data out of range, -224 Illegal parameter
value, -230 Data corrupt or stale, -350 Queue overflow. Device-specific: :data:`OVERLOAD_CODE`
(mixer overload after a sweep). The error queue holds 10 entries.
"""

from __future__ import annotations

import collections
import math
import re
import socket
import socketserver
import struct
import threading
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from bench import units
from bench.sim import receiver
from bench.sim.clock import VirtualClock
from bench.sim.state import SimState

__all__ = [
    "ANALYZER_IDN",
    "ANALYZER_ROWS",
    "AnalyzerSetup",
    "COMMON_ROWS",
    "compile_header",
    "ATT_MAX_DB",
    "ATT_STEP_DB",
    "DropConnection",
    "FREQ_MAX_HZ",
    "FREQ_MIN_HZ",
    "Faults",
    "HangConnection",
    "OVERLOAD_CODE",
    "POINTS_MAX",
    "POINTS_MIN",
    "RBW_MAX_HZ",
    "RBW_MIN_HZ",
    "RefuseConnection",
    "Row",
    "SUPPLY_IDN",
    "SUPPLY_ROWS",
    "ScpiError",
    "ScpiInstrument",
    "ScpiServer",
    "SimAnalyzer",
    "SimSupply",
]

ANALYZER_IDN = "EmissionBench,SimAnalyzer-1,SN0001,0.1"
SUPPLY_IDN = "EmissionBench,SimSupply-1,SN0002,0.1"

FREQ_MIN_HZ = 9e3
FREQ_MAX_HZ = 7e9
POINTS_MIN, POINTS_MAX = 101, 40001
RBW_MIN_HZ, RBW_MAX_HZ = 10.0, 10e6
VBW_MIN_HZ, VBW_MAX_HZ = 1.0, 10e6
ATT_MAX_DB, ATT_STEP_DB = 70.0, 2.0
RLEV_MIN_DBM, RLEV_MAX_DBM = -130.0, 30.0
SWEEP_TIME_MIN_S, SWEEP_TIME_MAX_S = 1e-3, 16000.0
#: Device-specific error code pushed when a sweep drove the mixer into compression.
OVERLOAD_CODE = 201
#: Questionable status register bit 3 (POWer summary), set while the last sweep was overloaded.
QUES_POWER_BIT = 8
ERROR_QUEUE_LENGTH = 10

_STANDARD_TEXT = {
    -102: "Syntax error", -104: "Data type error", -108: "Parameter not allowed",
    -109: "Missing parameter", -113: "Undefined header", -131: "Invalid suffix",
    -221: "Settings conflict", -222: "Data out of range", -224: "Illegal parameter value",
    -230: "Data corrupt or stale", -240: "Hardware error", -350: "Queue overflow",
    OVERLOAD_CODE: "Input overload",
}


class ScpiError(Exception):
    """An error the instrument puts into its queue (not raised to the client).

    Parameters
    ----------
    code : int
        SCPI error number (negative: standard; positive: device-specific).
    detail : str, optional
        Appended to the standard text after ``;``.
    """

    def __init__(self, code: int, detail: str = "") -> None:
        self.code = code
        text = _STANDARD_TEXT.get(code, "Device-specific error")
        self.text = f"{text};{detail}" if detail else text
        super().__init__(f"{code},{self.text!r}")


class DropConnection(Exception):
    """Raised by an instrument to make the server close the connection without a reply."""


class HangConnection(Exception):
    """Raised by an instrument to make the server stop answering on this connection."""


class RefuseConnection(Exception):
    """Raised by a handler factory to make the server reset a new connection at once."""


# ---------------------------------------------------------------- header patterns

_PATTERN_TOKEN = re.compile(r"\[\d\]|\[|\]|:|\*?[A-Za-z][A-Za-z0-9]*")


def compile_header(pattern: str) -> re.Pattern[str]:
    """Regular expression for a header pattern such as ``[SENSe:]FREQuency:STARt``.

    Each keyword matches its short form (leading upper-case letters and digits) or its long
    form, nothing else; ``[...]`` is optional; ``[1]`` after a keyword is an optional suffix.
    The expression matches the upper-cased header without its leading ``:`` and ``?``.
    """
    parts: list[str] = []
    pos = 0
    for match in _PATTERN_TOKEN.finditer(pattern):
        if match.start() != pos:
            raise ValueError(f"bad header pattern {pattern!r} at {pos}")
        pos = match.end()
        token = match.group()
        if token.startswith("[") and token[1:-1].isdigit():
            parts.append(f"(?:{token[1:-1]})?")
        elif token == "[":
            parts.append("(?:")
        elif token == "]":
            parts.append(")?")
        elif token == ":":
            parts.append(":")
        else:
            short = re.match(r"\*?[A-Z0-9]*", token).group()
            parts.append(f"(?:{re.escape(short)}|{re.escape(token.upper())})")
    if pos != len(pattern):
        raise ValueError(f"bad header pattern {pattern!r} at {pos}")
    return re.compile("^" + "".join(parts) + "$")


def _keyword_matches(arg: str, keyword: str) -> bool:
    """True when ``arg`` is the short or long form of character-data ``keyword``."""
    short = re.match(r"[A-Z0-9]*", keyword).group()
    return arg.upper() in (short, keyword.upper())


# ---------------------------------------------------------------- parameters

_NUMBER = re.compile(r"^([-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?)\s*([A-Za-z]*)$")
_SUFFIXES: dict[str, dict[str, float]] = {
    # SCPI: "M" is milli and "MA" mega; MHZ is the documented exception meaning mega (sheet §9).
    "HZ": {"HZ": 1.0, "KHZ": 1e3, "MHZ": 1e6, "MAHZ": 1e6, "GHZ": 1e9},
    "S": {"S": 1.0, "MS": 1e-3, "US": 1e-6, "NS": 1e-9, "KS": 1e3},
    "DB": {"DB": 1.0},
    "DBM": {"DBM": 1.0},
    "": {},
}


@dataclass(frozen=True)
class Number:
    """Numeric parameter: unit family, range [lo, hi], *RST default, optional rounding step."""

    unit: str
    lo: float
    hi: float
    default: float
    integer: bool = False
    step: float | None = None

    def parse(self, args: Sequence[str]) -> float:
        (arg,) = _exactly_one(args)
        named = self.limit(arg)
        if named is not None:
            return self._rounded(named)
        match = _NUMBER.match(arg)
        if not match:
            raise ScpiError(-104, f"expected a number, found {arg!r}")
        suffix = match.group(2).upper()
        factor = 1.0 if not suffix else _SUFFIXES[self.unit].get(suffix)
        if factor is None:
            raise ScpiError(-131, f"{suffix!r} (expected {self.unit or 'no suffix'})")
        value = float(match.group(1)) * factor
        if not self.lo <= value <= self.hi:
            raise ScpiError(-222, f"{arg} outside {self.lo:g}..{self.hi:g} {self.unit}".rstrip())
        return self._rounded(value)

    def limit(self, arg: str) -> float | None:
        """MIN/MAX/DEF value, or None when ``arg`` is none of them."""
        for keyword, value in (("MINimum", self.lo), ("MAXimum", self.hi),
                               ("DEFault", self.default)):
            if _keyword_matches(arg, keyword):
                return value
        return None

    def _rounded(self, value: float) -> float:
        if self.integer:
            return int(round(value))
        if self.step:
            return self.step * round(value / self.step)
        return value


@dataclass(frozen=True)
class Boolean:
    """ON|OFF|1|0 (any number: non-zero is ON, IEEE 488.2)."""

    def parse(self, args: Sequence[str]) -> bool:
        (arg,) = _exactly_one(args)
        if arg.upper() in ("ON", "OFF"):
            return arg.upper() == "ON"
        match = _NUMBER.match(arg)
        if match and not match.group(2):
            return round(float(match.group(1))) != 0
        raise ScpiError(-224, f"expected ON|OFF|1|0, found {arg!r}")


@dataclass(frozen=True)
class Choice:
    """Character data: (keyword pattern, value) pairs, e.g. ("POSitive", "POS")."""

    options: tuple[tuple[str, str], ...]

    def parse(self, args: Sequence[str]) -> str:
        (arg,) = _exactly_one(args)
        for keyword, value in self.options:
            if _keyword_matches(arg, keyword):
                return value
        names = "|".join(k for k, _ in self.options)
        raise ScpiError(-224, f"expected {names}, found {arg!r}")


@dataclass(frozen=True)
class DataFormat:
    """FORMat[:DATA] ASCii | REAL[,32|64]."""

    def parse(self, args: Sequence[str]) -> str:
        if not args:
            raise ScpiError(-109, "expected ASCii or REAL,32")
        if len(args) > 2:
            raise ScpiError(-108, f"{len(args)} parameters")
        if _keyword_matches(args[0], "ASCii") and len(args) == 1:
            return "ASC"
        if _keyword_matches(args[0], "REAL"):
            width = args[1] if len(args) == 2 else "32"
            if width in ("32", "64"):
                return f"REAL,{width}"
        raise ScpiError(-224, f"expected ASCii or REAL,32 or REAL,64, found {','.join(args)!r}")


def _exactly_one(args: Sequence[str]) -> tuple[str]:
    if not args:
        raise ScpiError(-109)
    if len(args) > 1:
        raise ScpiError(-108, f"{len(args)} parameters, expected 1")
    return (args[0],)


# ---------------------------------------------------------------- command table


@dataclass(frozen=True)
class Row:
    """One command of an instrument's table.

    Attributes
    ----------
    headers : tuple of str
        Header patterns (aliases), e.g. ``("[SENSe:]BANDwidth[:RESolution]",)``.
    param : object or None
        Parser/validator of the set form (:class:`Number`, :class:`Boolean`, :class:`Choice`,
        :class:`DataFormat`); None for an event command without parameter.
    set : callable or None
        ``set(instrument, value)``; None: the header is query-only.
    get : callable or None
        ``get(instrument, args) -> str | bytes`` for the query form; None: no query form.
    """

    headers: tuple[str, ...]
    param: Any = None
    set: Callable[[Any, Any], None] | None = None
    get: Callable[[Any, list[str]], str | bytes] | None = None
    regexes: tuple[re.Pattern[str], ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "regexes", tuple(compile_header(h) for h in self.headers))

    def matches(self, header: str) -> bool:
        return any(rx.match(header) for rx in self.regexes)


def _fmt(value: float) -> str:
    """Numeric reply: shortest exact-enough decimal (12 significant digits)."""
    return format(value, ".12g")


def _setting(headers: str | tuple[str, ...], attr: str, param: Any,
             on_set: Callable[[Any], None] | None = None) -> Row:
    """Row for a plain setting stored as ``instrument.setup.<attr>``."""
    def set_(inst: Any, value: Any) -> None:
        setattr(inst.setup, attr, value)
        if on_set is not None:
            on_set(inst)

    def get(inst: Any, args: list[str]) -> str:
        if isinstance(param, Number) and args:
            (arg,) = _exactly_one(args)
            limit = param.limit(arg)
            if limit is None:
                raise ScpiError(-224, f"expected MIN|MAX, found {arg!r}")
            return _fmt(limit)
        _no_args(args)
        return _reply(getattr(inst.setup, attr))

    return Row(headers if isinstance(headers, tuple) else (headers,), param, set_, get)


def _reply(value: Any) -> str:
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, (int, float)):
        return _fmt(float(value)) if not float(value).is_integer() else str(int(value))
    return str(value)


def _no_args(args: Sequence[str]) -> None:
    if args:
        raise ScpiError(-108, f"{len(args)} unexpected parameters")


def _event(headers: str | tuple[str, ...], action: Callable[[Any], None]) -> Row:
    def set_(inst: Any, _value: None) -> None:
        action(inst)
    return Row(headers if isinstance(headers, tuple) else (headers,), None, set_, None)


def _query(headers: str | tuple[str, ...], getter: Callable[[Any], str | bytes]) -> Row:
    def get(inst: Any, args: list[str]) -> str | bytes:
        _no_args(args)
        return getter(inst)
    return Row(headers if isinstance(headers, tuple) else (headers,), None, None, get)


# ---------------------------------------------------------------- instrument base


class ScpiInstrument:
    """Parser, error queue and IEEE 488.2 status of one instrument; subclasses add a table.

    Parameters
    ----------
    rows : sequence of Row
        The command table.
    identity : str
        ``*IDN?`` reply: manufacturer, model, serial, firmware.
    """

    def __init__(self, rows: Sequence[Row], identity: str) -> None:
        self.rows = tuple(rows)
        self.identity = identity
        self.lock = threading.RLock()
        self._errors: collections.deque[tuple[int, str]] = collections.deque()
        self.esr = 0  # standard event status register
        self.ese = 0
        self.sre = 0

    # -- connection hooks used by ScpiServer
    def open_session(self) -> ScpiInstrument:
        """Handler factory for :class:`ScpiServer`: every connection talks to this instrument."""
        return self

    def handle_line(self, line: str) -> bytes | None:
        """Execute one program message; return the reply with its ``\\n``, or None."""
        replies: list[bytes] = []
        prefix = ""
        with self.lock:
            for unit in line.split(";"):
                if not unit.strip():
                    continue
                try:
                    reply, prefix = self._execute(unit.strip(), prefix)
                except ScpiError as err:
                    self.push_error(err.code, err.text)
                    if -199 <= err.code <= -100:
                        break  # command error: the rest of the message is discarded
                    continue
                if reply is not None:
                    replies.append(reply if isinstance(reply, bytes) else reply.encode("ascii"))
        return b";".join(replies) + b"\n" if replies else None

    # -- error queue and status
    def push_error(self, code: int, text: str | None = None) -> None:
        """Append ``code,"text"`` to the FIFO error queue and set the matching ESR bit."""
        with self.lock:
            if len(self._errors) >= ERROR_QUEUE_LENGTH:
                self._errors[-1] = (-350, _STANDARD_TEXT[-350])
            else:
                self._errors.append((code, text or _STANDARD_TEXT.get(code, "Error")))
            self.esr |= _esr_bit(code)

    def next_error(self) -> str:
        """Pop the oldest error as ``<code>,"<text>"``; ``0,"No error"`` when empty."""
        code, text = self._errors.popleft() if self._errors else (0, "No error")
        return f'{code},"{text}"'

    def status_byte(self) -> int:
        stb = (4 if self._errors else 0) | (32 if self.esr & self.ese else 0)
        return stb | (64 if stb & self.sre else 0)

    def reset(self) -> None:
        """``*RST``: subclasses restore their settings."""

    def clear_status(self) -> None:
        self._errors.clear()
        self.esr = 0

    # -- parsing
    def _execute(self, unit: str, prefix: str) -> tuple[str | bytes | None, str]:
        header, args = _split_unit(unit)
        is_query = header.endswith("?")
        name = header[:-1] if is_query else header
        row, path = self._lookup(name, prefix)
        new_prefix = prefix if path.startswith("*") else path.rpartition(":")[0]
        if is_query:
            if row.get is None:
                raise ScpiError(-113, header)
            return row.get(self, args), new_prefix
        if row.set is None:
            raise ScpiError(-113, header)
        if row.param is None:
            _no_args(args)
            row.set(self, None)
        else:
            row.set(self, row.param.parse(args))
        return None, new_prefix

    def _lookup(self, name: str, prefix: str) -> tuple[Row, str]:
        path = name[1:] if name.startswith(":") else name
        candidates = [path]
        if prefix and not name.startswith((":", "*")):
            candidates.append(f"{prefix}:{path}")
        for candidate in candidates:
            upper = candidate.upper()
            for row in self.rows:
                if row.matches(upper):
                    return row, candidate
        raise ScpiError(-113, name)


_HEADER = re.compile(r"^(?:\*[A-Za-z]+|:?[A-Za-z][A-Za-z0-9]*(?::[A-Za-z][A-Za-z0-9]*)*)\??$")


def _split_unit(unit: str) -> tuple[str, list[str]]:
    """Split ``HEADER param,param`` into the header and stripped parameters (-102 if bad)."""
    header, rest = (re.split(r"\s+", unit, maxsplit=1) + [""])[:2]
    if not _HEADER.match(header):
        raise ScpiError(-102, header)
    if not rest.strip():
        return header, []
    args = [a.strip() for a in rest.split(",")]
    if any(not a for a in args):
        raise ScpiError(-102, f"empty parameter in {unit!r}")
    return header, args


def _esr_bit(code: int) -> int:
    """ESR bit of an error class: CME 32 (-1xx), EXE 16 (-2xx), QYE 4 (-4xx), DDE 8 (others)."""
    if -199 <= code <= -100:
        return 32
    if -299 <= code <= -200:
        return 16
    if -499 <= code <= -400:
        return 4
    return 8


def _read_and_clear_esr(inst: ScpiInstrument) -> str:
    value, inst.esr = inst.esr, 0
    return str(value)


def _set_opc(inst: ScpiInstrument) -> None:
    inst.esr |= 1  # every operation completes before the next command is read


COMMON_ROWS: tuple[Row, ...] = (
    _query("*IDN", lambda inst: inst.identity),
    _event("*RST", lambda inst: inst.reset()),
    _event("*CLS", lambda inst: inst.clear_status()),
    # every operation completes before the next command is read: *OPC? answers 1 at once
    Row(("*OPC",), None, lambda inst, _v: _set_opc(inst), lambda inst, args: "1"),
    _event("*WAI", lambda inst: None),
    _query("*ESR", _read_and_clear_esr),
    Row(("*ESE",), Number("", 0, 255, 0, integer=True),
        lambda inst, v: setattr(inst, "ese", int(v)), lambda inst, a: str(inst.ese)),
    Row(("*SRE",), Number("", 0, 255, 0, integer=True),
        lambda inst, v: setattr(inst, "sre", int(v)), lambda inst, a: str(inst.sre)),
    _query("*STB", lambda inst: str(inst.status_byte())),
    _query("*TST", lambda inst: "0"),
    _query("SYSTem:ERRor[:NEXT]", lambda inst: inst.next_error()),
    _query("SYSTem:ERRor:COUNt", lambda inst: str(len(inst._errors))),
    _query("SYSTem:VERSion", lambda inst: "1999.0"),
)


# ---------------------------------------------------------------- faults


@dataclass(frozen=True)
class Faults:
    """Deterministic faults of the simulated analyzer, counted in completed sweeps.

    Each fault fires once, right after the sweep with that number (1-based) completes; the reply
    to the line that started the sweep is then lost.

    Attributes
    ----------
    drop_after_sweeps : int or None
        Close the connection after this sweep.
    hang_after_sweeps : int or None
        Stop answering on this connection after this sweep (until the client closes it).
    refuse_after_drop : int
        After a drop or a hang, reset this many new connection attempts.
    error_after_sweeps : int or None
        Push ``error_code`` into the error queue after this sweep.
    error_code, error_text : int, str
        The pushed error (default -240 "Hardware error").
    """

    drop_after_sweeps: int | None = None
    hang_after_sweeps: int | None = None
    refuse_after_drop: int = 0
    error_after_sweeps: int | None = None
    error_code: int = -240
    error_text: str = "Hardware error"


# ---------------------------------------------------------------- analyzer


@dataclass
class AnalyzerSetup:
    """Settings of the simulated analyzer; the defaults are its ``*RST`` state."""

    start_hz: float = FREQ_MIN_HZ
    stop_hz: float = FREQ_MAX_HZ
    points: int = 1001
    rbw_hz: float = 1e6
    rbw_auto: bool = True
    vbw_hz: float = 1e6
    vbw_auto: bool = True
    detector: str = "POS"
    attenuation_db: float = 10.0
    attenuation_auto: bool = True
    ref_level_dbm: float = 0.0
    sweep_time_s: float = SWEEP_TIME_MIN_S
    sweep_time_auto: bool = True
    continuous: bool = True
    data_format: str = "ASC"
    byte_order: str = "NORM"
    unit: str = "DBM"
    marker_on: bool = False


def _rbw_for_span(span_hz: float) -> float:
    """Auto-coupled RBW: the largest 1-3-10 value not above span/100 (common practice)."""
    target = max(span_hz / 100.0, RBW_MIN_HZ)
    decade = 10.0 ** math.floor(math.log10(target))
    value = 3.0 * decade if target >= 3.0 * decade else decade
    return min(value, RBW_MAX_HZ)


def _auto_attenuation_db(ref_level_dbm: float) -> float:
    """Auto attenuation: keep the mixer at or below -10 dBm for a signal at the reference level,
    never below 10 dB (common practice), on the 2 dB grid."""
    wanted = max(10.0, ref_level_dbm + 10.0)
    return min(ATT_MAX_DB, ATT_STEP_DB * math.ceil(wanted / ATT_STEP_DB))


class SimAnalyzer(ScpiInstrument):
    """Simulated swept spectrum analyzer over SCPI; every trace is computed from the world.

    Limits: frequency 9 kHz..7 GHz (span 0 allowed: zero span); 101..40001 points; RBW
    10 Hz..10 MHz (any value, the 6 dB bandwidth of a Gaussian filter); VBW 1 Hz..10 MHz;
    attenuation 0..70 dB rounded to 2 dB steps; reference level -130..+30 dBm (display only,
    always in dBm); sweep time 1 ms..16000 s. Couplings when AUTO: RBW = the 1-3-10 value at or
    below span/100; VBW = RBW; attenuation = max(10 dB, ref level + 10 dB); sweep time =
    2.5*span/(RBW*min(RBW, VBW)), at least 1 ms. ``*RST``: 9 kHz..7 GHz, 1001 points, all AUTO,
    detector POS, continuous sweep ON, ``FORM ASC``, ``BORD NORM``, ``UNIT:POW DBM``.

    ``INIT[:IMM]`` computes a sweep from ``world.lines`` over the span plus 5 RBW each side, at
    the pose in ``state``, and advances the clock by the sweep time. In continuous mode every
    ``TRAC?`` (and ``CALC:MARK:MAX``) sweeps first; in single mode it returns the last sweep, in
    the current format and unit. The mixer level counts only the lines of that range (no
    out-of-span overload).

    Parameters
    ----------
    world : object
        Has ``lines(state, f_lo_hz, f_hi_hz) -> list[Line]`` (dBm at the analyzer input).
    state : SimState
        Shared bench pose, read under ``state.lock``.
    clock : VirtualClock
        Advanced by the sweep time of every sweep.
    seed : int
        Noise seed; sweep ``n`` uses ``numpy.random.default_rng([seed, n])``.
    noise_figure_db : float
        Receiver noise figure with 0 dB attenuation, dB.
    faults : Faults, optional
        Injected faults.
    identity : str
        ``*IDN?`` reply.
    """

    def __init__(self, world: Any, state: SimState, clock: VirtualClock, *, seed: int = 0,
                 noise_figure_db: float = 24.0, faults: Faults | None = None,
                 identity: str = ANALYZER_IDN) -> None:
        super().__init__(ANALYZER_ROWS, identity)
        self.world = world
        self.state = state
        self.clock = clock
        self.seed = seed
        self.noise_figure_db = noise_figure_db
        self.faults = faults or Faults()
        self.setup = AnalyzerSetup()
        self.last_sweep: receiver.Sweep | None = None
        self.sweep_count = 0
        self.marker_index = 0
        self.ques_event = 0
        self._fired: set[str] = set()
        self._refusals_left = 0

    def open_session(self) -> SimAnalyzer:
        """Handler factory: resets the connection while refusals after a drop remain."""
        with self.lock:
            if self._refusals_left > 0:
                self._refusals_left -= 1
                raise RefuseConnection()
        return self

    def reset(self) -> None:
        self.setup = AnalyzerSetup()
        self.last_sweep = None

    def clear_status(self) -> None:
        super().clear_status()
        self.ques_event = 0

    def receiver_settings(self) -> receiver.ReceiverSettings:
        """The receiver model's settings for the current setup, with couplings resolved."""
        s = self.setup
        span_hz = s.stop_hz - s.start_hz
        rbw_hz = _rbw_for_span(span_hz) if s.rbw_auto and span_hz > 0 else s.rbw_hz
        return receiver.ReceiverSettings(
            start_hz=s.start_hz, stop_hz=s.stop_hz, points=s.points, rbw_hz=rbw_hz,
            vbw_hz=rbw_hz if s.vbw_auto else s.vbw_hz, detector=s.detector,
            attenuation_db=(_auto_attenuation_db(s.ref_level_dbm) if s.attenuation_auto
                            else s.attenuation_db),
            ref_level_dbm=s.ref_level_dbm, noise_figure_db=self.noise_figure_db,
            sweep_time_s=None if s.sweep_time_auto else s.sweep_time_s)

    def run_sweep(self) -> receiver.Sweep:
        """Compute one sweep at the current pose, advance the clock, then apply faults.

        Raises :class:`DropConnection` or :class:`HangConnection` when a fault fires.
        """
        with self.lock:
            return self._sweep_locked()

    def _sweep_locked(self) -> receiver.Sweep:
        settings = self.receiver_settings()
        margin_hz = 5.0 * settings.rbw_hz
        with self.state.lock:
            lines = self.world.lines(self.state, max(0.0, settings.start_hz - margin_hz),
                                     settings.stop_hz + margin_hz)
        rng = np.random.default_rng([self.seed, self.sweep_count])
        result = receiver.sweep(lines, settings, rng)
        self.clock.advance(result.sweep_time_s)
        self.last_sweep = result
        self.sweep_count += 1
        if result.overloaded:
            self.ques_event |= QUES_POWER_BIT
            self.push_error(OVERLOAD_CODE, f"Input overload;mixer at {result.mixer_level_dbm:.1f} "
                            f"dBm, above {receiver.MIXER_1DB_COMPRESSION_DBM:g} dBm")
        self._apply_faults()
        return result

    def _apply_faults(self) -> None:
        f, n = self.faults, self.sweep_count
        if f.error_after_sweeps == n and self._fire("error"):
            self.push_error(f.error_code, f.error_text)
        if f.drop_after_sweeps == n and self._fire("drop"):
            self._refusals_left = f.refuse_after_drop
            raise DropConnection()
        if f.hang_after_sweeps == n and self._fire("hang"):
            self._refusals_left = f.refuse_after_drop
            raise HangConnection()

    def _fire(self, name: str) -> bool:
        if name in self._fired:
            return False
        self._fired.add(name)
        return True

    # -- values in the current unit
    def to_unit(self, level_dbm: np.ndarray) -> np.ndarray:
        """Levels in the current ``UNIT:POWer`` (dBm, or dBuV = dBm + 106.99, sheet §4)."""
        return units.dbm_to_dbuv(level_dbm) if self.setup.unit == "DBUV" else level_dbm

    def trace_reply(self, args: list[str]) -> bytes:
        """``TRACe[:DATA]? [TRACE1]``: the last sweep as a 488.2 block or ASCII list."""
        if len(args) > 1:
            raise ScpiError(-108, f"{len(args)} parameters")
        if args and not re.fullmatch(r"TRAC(E)?1", args[0].upper()):
            raise ScpiError(-224, f"expected TRACE1, found {args[0]!r}")
        values = self.to_unit(self._current_sweep().level_dbm)
        fmt = self.setup.data_format
        if fmt == "ASC":
            return ",".join(format(v, ".8g") for v in values.tolist()).encode("ascii")
        order = ">" if self.setup.byte_order == "NORM" else "<"
        payload = values.astype(f"{order}f{4 if fmt == 'REAL,32' else 8}").tobytes()
        length = str(len(payload))
        return f"#{len(length)}{length}".encode("ascii") + payload

    def _current_sweep(self) -> receiver.Sweep:
        """The sweep to report: a fresh one in continuous mode, else the last one."""
        if self.setup.continuous:
            return self.run_sweep()
        if self.last_sweep is None:
            raise ScpiError(-230, "no sweep since *RST, send INIT:IMM first")
        return self.last_sweep

    def marker_peak(self) -> None:
        sweep = self._current_sweep()
        self.marker_index = int(np.argmax(sweep.level_dbm))
        self.setup.marker_on = True

    def marker_to(self, freq_hz: float) -> None:
        sweep = self._marked_sweep()
        self.marker_index = int(np.argmin(np.abs(sweep.freq_hz - freq_hz)))

    def _marked_sweep(self) -> receiver.Sweep:
        if not self.setup.marker_on:
            raise ScpiError(-221, "marker is off, send CALC:MARK:MAX or CALC:MARK:STAT ON")
        if self.last_sweep is None:
            raise ScpiError(-230, "no sweep for the marker")
        return self.last_sweep

    def marker_x(self) -> str:
        return _fmt(float(self._marked_sweep().freq_hz[self.marker_index]))

    def marker_y(self) -> str:
        level = float(self._marked_sweep().level_dbm[self.marker_index])
        return _fmt(round(float(self.to_unit(np.array([level]))[0]), 4))

    # -- frequency axis, kept consistent (start <= stop within FREQ_MIN..FREQ_MAX)
    def set_start(self, hz: float) -> None:
        self.setup.start_hz = hz
        self.setup.stop_hz = max(self.setup.stop_hz, hz)

    def set_stop(self, hz: float) -> None:
        self.setup.stop_hz = hz
        self.setup.start_hz = min(self.setup.start_hz, hz)

    def set_center(self, hz: float) -> None:
        half = min(self.span_hz / 2.0, hz - FREQ_MIN_HZ, FREQ_MAX_HZ - hz)
        self.setup.start_hz, self.setup.stop_hz = hz - half, hz + half

    def set_span(self, hz: float) -> None:
        center = self.center_hz
        half = min(hz / 2.0, center - FREQ_MIN_HZ, FREQ_MAX_HZ - center)
        self.setup.start_hz, self.setup.stop_hz = center - half, center + half

    @property
    def center_hz(self) -> float:
        return (self.setup.start_hz + self.setup.stop_hz) / 2.0

    @property
    def span_hz(self) -> float:
        return self.setup.stop_hz - self.setup.start_hz


_FREQ = Number("HZ", FREQ_MIN_HZ, FREQ_MAX_HZ, FREQ_MIN_HZ)
_DETECTOR = Choice((("POSitive", "POS"), ("NEGative", "NEG"), ("SAMPle", "SAMP"),
                    ("AVERage", "AVER"), ("RMS", "RMS"), ("QPEak", "QPE"), ("CAVerage", "CAV")))


def _number_row(headers: str | tuple[str, ...], param: Number,
                setter: Callable[[SimAnalyzer, float], None],
                getter: Callable[[SimAnalyzer], float]) -> Row:
    """Row for a numeric setting whose query also answers ``MIN``/``MAX``/``DEF``."""
    def get(inst: SimAnalyzer, args: list[str]) -> str:
        if args:
            limit = param.limit(_exactly_one(args)[0])
            if limit is None:
                raise ScpiError(-224, f"expected MIN|MAX|DEF, found {args[0]!r}")
            return _fmt(limit)
        return _fmt(getter(inst))
    return Row(headers if isinstance(headers, tuple) else (headers,), param, setter, get)


def _manual(attr: str, auto_attr: str) -> Callable[[SimAnalyzer, float], None]:
    """Setter that stores a value and switches its coupling off."""
    def set_(inst: SimAnalyzer, value: float) -> None:
        setattr(inst.setup, attr, value)
        setattr(inst.setup, auto_attr, False)
    return set_


def _effective(name: str) -> Callable[[SimAnalyzer], float]:
    """Getter of the value the receiver really uses (after auto coupling)."""
    return lambda inst: getattr(inst.receiver_settings(), name)


_RBW = Number("HZ", RBW_MIN_HZ, RBW_MAX_HZ, 1e6)
_VBW = Number("HZ", VBW_MIN_HZ, VBW_MAX_HZ, 1e6)
_ATT = Number("DB", 0.0, ATT_MAX_DB, 10.0, step=ATT_STEP_DB)
_SWT = Number("S", SWEEP_TIME_MIN_S, SWEEP_TIME_MAX_S, SWEEP_TIME_MIN_S)


def _sweep_time_s(inst: SimAnalyzer) -> float:
    return receiver.effective_sweep_time_s(inst.receiver_settings())


def _ques_event(inst: SimAnalyzer) -> str:
    value, inst.ques_event = inst.ques_event, 0
    return str(value)


def _ques_condition(inst: SimAnalyzer) -> str:
    overloaded = inst.last_sweep is not None and inst.last_sweep.overloaded
    return str(QUES_POWER_BIT if overloaded else 0)


def _init_immediate(inst: SimAnalyzer) -> None:
    inst.run_sweep()


ANALYZER_ROWS: tuple[Row, ...] = COMMON_ROWS + (
    _number_row("[SENSe:]FREQuency:STARt", _FREQ, SimAnalyzer.set_start,
                lambda i: i.setup.start_hz),
    _number_row("[SENSe:]FREQuency:STOP", _FREQ, SimAnalyzer.set_stop, lambda i: i.setup.stop_hz),
    _number_row("[SENSe:]FREQuency:CENTer", _FREQ, SimAnalyzer.set_center, lambda i: i.center_hz),
    _number_row("[SENSe:]FREQuency:SPAN",
                Number("HZ", 0.0, FREQ_MAX_HZ - FREQ_MIN_HZ, FREQ_MAX_HZ - FREQ_MIN_HZ),
                SimAnalyzer.set_span, lambda i: i.span_hz),
    _number_row(("[SENSe:]BANDwidth[:RESolution]", "[SENSe:]BWIDth[:RESolution]"), _RBW,
                _manual("rbw_hz", "rbw_auto"), _effective("rbw_hz")),
    _setting(("[SENSe:]BANDwidth[:RESolution]:AUTO", "[SENSe:]BWIDth[:RESolution]:AUTO"),
             "rbw_auto", Boolean()),
    _number_row(("[SENSe:]BANDwidth:VIDeo", "[SENSe:]BWIDth:VIDeo"), _VBW,
                _manual("vbw_hz", "vbw_auto"), _effective("vbw_hz")),
    _setting(("[SENSe:]BANDwidth:VIDeo:AUTO", "[SENSe:]BWIDth:VIDeo:AUTO"), "vbw_auto",
             Boolean()),
    _setting("[SENSe:]SWEep:POINts", "points",
             Number("", POINTS_MIN, POINTS_MAX, 1001, integer=True)),
    _number_row("[SENSe:]SWEep:TIME", _SWT, _manual("sweep_time_s", "sweep_time_auto"),
                _sweep_time_s),
    _setting("[SENSe:]SWEep:TIME:AUTO", "sweep_time_auto", Boolean()),
    _setting("[SENSe:]DETector[:FUNCtion]", "detector", _DETECTOR),
    _setting("DISPlay[:WINDow[1]]:TRACe[1]:Y[:SCALe]:RLEVel", "ref_level_dbm",
             Number("DBM", RLEV_MIN_DBM, RLEV_MAX_DBM, 0.0)),
    _number_row(("INPut:ATTenuation", "[SENSe:]POWer[:RF]:ATTenuation"), _ATT,
                _manual("attenuation_db", "attenuation_auto"), _effective("attenuation_db")),
    _setting(("INPut:ATTenuation:AUTO", "[SENSe:]POWer[:RF]:ATTenuation:AUTO"),
             "attenuation_auto", Boolean()),
    _setting("INITiate:CONTinuous", "continuous", Boolean()),
    _event("INITiate[:IMMediate]", _init_immediate),
    _event("ABORt", lambda inst: None),  # sweeps complete atomically in the simulator
    _setting("FORMat[:DATA]", "data_format", DataFormat()),
    _setting("FORMat:BORDer", "byte_order", Choice((("NORMal", "NORM"), ("SWAPped", "SWAP")))),
    _setting("UNIT:POWer", "unit", Choice((("DBM", "DBM"), ("DBUV", "DBUV")))),
    Row(("TRACe[1][:DATA]",), None, None, lambda inst, args: inst.trace_reply(args)),
    _event("CALCulate:MARKer[1]:MAXimum[:PEAK]", SimAnalyzer.marker_peak),
    _setting("CALCulate:MARKer[1][:STATe]", "marker_on", Boolean()),
    Row(("CALCulate:MARKer[1]:X",), _FREQ, SimAnalyzer.marker_to,
        lambda inst, args: (_no_args(args), inst.marker_x())[1]),
    _query("CALCulate:MARKer[1]:Y", SimAnalyzer.marker_y),
    _query("STATus:QUEStionable[:EVENt]", _ques_event),
    _query("STATus:QUEStionable:CONDition", _ques_condition),
    _event("STATus:PRESet", lambda inst: setattr(inst, "ques_event", 0)),
)


# ---------------------------------------------------------------- bench supply


class SimSupply(ScpiInstrument):
    """Bench power supply of the board: its output switches ``SimState.board_powered``.

    Parameters
    ----------
    state : SimState
        Shared bench state.
    identity : str
        ``*IDN?`` reply.
    """

    def __init__(self, state: SimState, identity: str = SUPPLY_IDN) -> None:
        super().__init__(SUPPLY_ROWS, identity)
        self.state = state

    def reset(self) -> None:
        self.set_output(False)  # a supply's *RST state is output off

    def set_output(self, on: bool) -> None:
        with self.state.lock:
            self.state.board_powered = bool(on)

    def output(self) -> str:
        with self.state.lock:
            return "1" if self.state.board_powered else "0"


SUPPLY_ROWS: tuple[Row, ...] = COMMON_ROWS + (
    Row(("OUTPut[:STATe]",), Boolean(), SimSupply.set_output,
        lambda inst, args: (_no_args(args), inst.output())[1]),
)


# ---------------------------------------------------------------- server

_MAX_LINE_BYTES = 1 << 20


class ScpiServer:
    """Serve an instrument on a loopback TCP port, one ``\\n``-terminated command line at a time.

    Parameters
    ----------
    handler_factory : callable
        Called once per connection; returns an object with ``handle_line(str) -> bytes | None``
        (for a shared instrument: ``instrument.open_session``). May raise
        :class:`RefuseConnection`.
    host : str
        Address to bind.
    port : int
        0 picks a free port.
    """

    def __init__(self, handler_factory: Callable[[], Any], host: str = "127.0.0.1",
                 port: int = 0) -> None:
        self._factory = handler_factory
        self._host = host
        self._port = port
        self._server: socketserver.ThreadingTCPServer | None = None
        self._thread: threading.Thread | None = None
        self._connections: set[socket.socket] = set()
        self._lock = threading.Lock()

    @property
    def port(self) -> int:
        """Bound port (after :meth:`start`)."""
        return self._port

    @property
    def resource(self) -> str:
        """VISA resource string, ``TCPIP::<host>::<port>::SOCKET``."""
        return f"TCPIP::{self._host}::{self._port}::SOCKET"

    def start(self) -> int:
        """Bind, serve in a daemon thread and return the bound port."""
        server = _TcpServer((self._host, self._port), _Handler)
        server.owner = self
        self._server = server
        self._port = server.server_address[1]
        self._thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05},
                                        name=f"scpi-{self._port}", daemon=True)
        self._thread.start()
        return self._port

    def stop(self) -> None:
        """Stop accepting, close every open connection and release the port."""
        if self._server is None:
            return
        self._server.shutdown()
        self._server.server_close()
        with self._lock:
            connections = list(self._connections)
        for conn in connections:
            _close_quietly(conn)
        if self._thread is not None:
            self._thread.join()
        self._server = None

    def __enter__(self) -> ScpiServer:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def _track(self, conn: socket.socket, add: bool) -> None:
        with self._lock:
            (self._connections.add if add else self._connections.discard)(conn)


class _TcpServer(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True
    block_on_close = False
    owner: ScpiServer


class _Handler(socketserver.StreamRequestHandler):
    def handle(self) -> None:
        owner = self.server.owner
        conn = self.request
        owner._track(conn, True)
        try:
            try:
                session = owner._factory()
            except RefuseConnection:
                _reset(conn)
                return
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            self._serve(session, conn)
        except OSError:
            return  # the client went away
        finally:
            owner._track(conn, False)

    def _serve(self, session: Any, conn: socket.socket) -> None:
        while True:
            raw = self.rfile.readline(_MAX_LINE_BYTES)
            if not raw:
                return
            try:
                reply = session.handle_line(raw.decode("ascii", "replace").rstrip("\r\n"))
            except DropConnection:
                _reset(conn)
                return
            except HangConnection:
                while self.rfile.readline(_MAX_LINE_BYTES):
                    pass  # read and ignore until the client closes
                return
            if reply:
                self.wfile.write(reply)


def _reset(conn: socket.socket) -> None:
    """Close with RST (linger 0), as an instrument that dropped off the network would look."""
    try:
        conn.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    except OSError:
        pass
    conn.close()


def _close_quietly(conn: socket.socket) -> None:
    try:
        conn.shutdown(socket.SHUT_RDWR)
    except OSError:
        pass
