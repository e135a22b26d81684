"""Generic SCPI swept spectrum analyzer.

The code is the same for every analyzer; the profile (``drivers/profiles/*.toml``, read by
:mod:`bench.drivers.analyzer_profile`) holds the command spellings, detector names, limits,
the commands sent on connect, the trace format and byte order, and how the end of a sweep is
awaited. The driver is a table of settings plus a few verbs: :meth:`Analyzer.initialize`,
:meth:`Analyzer.configure`, :meth:`Analyzer.sweep`, :meth:`Analyzer.fetch_trace`.

No fixed sleeps except the one a ``fixed-wait`` profile asks for: a sweep's deadline is the
instrument's own sweep time (``SWE:TIME?``) times a factor plus the reply timeout, enforced as a
reply deadline (``opc-query``) or as a count of polls (``status-poll``). Traces are decoded in the
format and byte order the profile selects; a reply that contradicts the profile (a block where
ASCII was expected, 8-byte values where 4 were, levels that only make sense in the other byte
order) is a :class:`~bench.errors.ProfileMismatchError` naming the profile key to change.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable

import numpy as np

from bench import units
from bench.sweepsettings import SweepSettings
from bench.drivers.analyzer_profile import (
    BINARY_WIDTHS,
    AnalyzerProfile,
    Completion,
    TraceFormat,
    load_analyzer_profile,
)
from bench.errors import BlockFormatError, InstrumentError, PlanError, ReplyFormatError, ReplyTimeoutError
from bench.ieee488 import decode_ascii, decode_binary

__all__ = ["AnalyzerProfile", "Analyzer", "SweepSettings", "load_analyzer_profile", "points_for_step",
           "DETECTORS", "MAX_LEVEL_DB", "FLOOR_DBM", "DAMAGE_HEADROOM_DB"]

#: Detector names used in sequence files (trade terms); profiles map them to SCPI spellings.
DETECTORS = ("peak", "negative", "sample", "average", "rms", "quasi-peak", "cispr-average")

#: Largest magnitude a trace level (dBm or dBuV) can have; beyond it the bytes were misread.
MAX_LEVEL_DB = 1000.0
#: Readings below this are no reading: kTB at 1 Hz is -174 dBm (derived), no analyzer sees
#: 70 dB under that.
FLOOR_DBM = -250.0
#: A reading this far above the input's damage level means a destroyed input or misread data.
DAMAGE_HEADROOM_DB = 20.0
_TINY = 1e-30  # a level this close to zero but not zero: bytes read in the wrong order


def _fmt(value) -> str:
    """A plain SCPI number: integers without a decimal point, no suffix, no exponent surprises."""
    if isinstance(value, str):
        return value
    if float(value).is_integer() and abs(value) < 1e15:
        return str(int(value))
    return repr(float(value))


class Analyzer:
    """A swept spectrum analyzer reached through an open transport.

    Parameters
    ----------
    transport : Transport
        Open connection (see :func:`bench.transports.open_transport`). The constructor does no I/O.
    profile : AnalyzerProfile
        Command dialect and limits.
    sleep : callable, optional
        ``sleep(seconds)`` between status polls and for a ``fixed-wait`` (default
        :func:`time.sleep`; the simulated bench passes one that does not wait).
    """

    def __init__(self, transport, profile: AnalyzerProfile, *,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        self.transport = transport
        self.profile = profile
        self.identity: str | None = None
        self._applied: dict[str, object] = {}
        self._sweep_time_s: float | None = None
        self._sleep = sleep
        self.warnings: list[str] = []

    @property
    def address(self) -> str:
        """The instrument's address."""
        return self.transport.address

    # ------------------------------------------------------------------ verbs
    def identify(self) -> str:
        """``*IDN?``: manufacturer, model, serial, firmware (IEEE 488.2)."""
        self.identity = self.transport.query(self.profile.commands["identify"])
        return self.identity

    def initialize(self) -> str:
        """Reset to a known state: clear status, identify, the profile's connect commands, single
        sweep, trace format, byte order (binary formats), dBm.

        Also used to resynchronise after a reconnect (the instrument may have rebooted).
        """
        c, trace = self.profile.commands, self.profile.trace
        self.transport.write(c["clear_status"])
        ident = self.identify()
        order = [trace.byte_order_command] if trace.binary and trace.byte_order_command else []
        for cmd in (*self.profile.connect_commands, c["single_sweep_mode"], trace.command, *order,
                    c["power_unit"]):
            self.transport.write(cmd)
        self.check_errors("initialization")
        self._applied.clear()
        self._sweep_time_s = None
        return ident

    def validate(self, s: SweepSettings) -> None:
        """Refuse settings outside the profile's capabilities before sending anything."""
        p = self.profile
        problems = []
        if not (p.freq_min_hz <= s.start_hz <= s.stop_hz <= p.freq_max_hz):
            problems.append(f"frequency {units.format_hz(s.start_hz)}-{units.format_hz(s.stop_hz)} "
                            f"outside {units.format_hz(p.freq_min_hz)}-{units.format_hz(p.freq_max_hz)}")
        if not (p.min_points <= s.points <= p.max_points):
            problems.append(f"{s.points} points outside {p.min_points}-{p.max_points}")
        if not (p.rbw_min_hz <= s.rbw_hz <= p.rbw_max_hz):
            problems.append(f"RBW {units.format_hz(s.rbw_hz)} outside "
                            f"{units.format_hz(p.rbw_min_hz)}-{units.format_hz(p.rbw_max_hz)}")
        if s.detector not in p.detectors:
            problems.append(f"detector {s.detector!r} unknown to profile {p.name}")
        if s.attenuation_db is not None and not (0 <= s.attenuation_db <= p.max_attenuation_db):
            problems.append(f"attenuation {s.attenuation_db:g} dB outside 0-{p.max_attenuation_db:g} dB")
        if problems:
            raise PlanError(f"{self.address}: profile {p.name}: " + "; ".join(problems))

    def configure(self, s: SweepSettings) -> float:
        """Send the settings that changed since the last call, check the error queue.

        Returns
        -------
        float
            The instrument's own sweep time for these settings, seconds (``SWE:TIME?``).
        """
        self.validate(s)
        wanted = {
            # start/stop order matters: move stop first when going up so start < stop always holds
            "stop_hz": s.stop_hz, "start_hz": s.start_hz,
            "rbw_hz": s.rbw_hz, "vbw_hz": s.vbw_hz, "points": s.points,
            "detector": self.profile.detectors[s.detector],
            "ref_level_dbm": s.ref_level_dbm, "attenuation_db": s.attenuation_db,
            "sweep_time_s": s.sweep_time_s,
        }
        if self._applied.get("stop_hz") is not None and s.stop_hz < float(self._applied.get("start_hz", 0.0)):
            wanted = {"start_hz": wanted.pop("start_hz"), **wanted}
        sent = []
        if s.sweep_time_s is None and self._applied.get("sweep_time_s") is not None:
            cmd = self.profile.commands["sweep_time_auto"]  # back to the coupled sweep time
            self.transport.write(cmd)
            sent.append(cmd)
            self._applied["sweep_time_s"] = None
        for key, value in wanted.items():
            if value is None or self._applied.get(key) == value:
                continue
            template = self.profile.settings[key][0]
            cmd = template.format(value=_fmt(value))
            self.transport.write(cmd)
            sent.append(cmd)
            self._applied[key] = value
        if sent or self._sweep_time_s is None:
            try:
                self.check_errors("; ".join(sent) or "configuration")
            except InstrumentError:
                self._applied.clear()
                raise
            self._sweep_time_s = float(self.transport.query(self.profile.commands["sweep_time_query"]))
        return self._sweep_time_s

    def sweep(self) -> None:
        """Take one single sweep and wait for its end as the profile's ``[completion]`` says.

        Then read the error queue: an overload or a hardware fault must never pass silently.
        """
        completion = self.profile.completion
        expected_s = self._sweep_time_s or 0.0
        _AWAIT[completion.method](self, completion, expected_s)
        self.check_errors("sweep")

    def _await_opc_query(self, c: Completion, expected_s: float) -> None:
        reply = self.transport.query(c.start, timeout_s=c.deadline_s(expected_s, self.profile.io.timeout_s))
        if reply.strip() != c.reply:
            raise InstrumentError(self.address, c.start,
                                  text=f"expected {c.reply!r} when the sweep is done, found {reply!r}")

    def _await_status_poll(self, c: Completion, expected_s: float) -> None:
        self.transport.write(c.start)
        polls = c.max_polls(expected_s, self.profile.io.timeout_s)
        for n in range(1, polls + 1):
            if c.done(self._status(c.poll)):
                return
            if n < polls:
                self._sleep(c.poll_interval_s)
        raise ReplyTimeoutError(f"{self.address}: sweep not done after {polls} polls of {c.poll!r} "
                                f"every {c.poll_interval_s:g} s "
                                f"({c.deadline_s(expected_s, self.profile.io.timeout_s):g} s)")

    def _await_fixed_wait(self, c: Completion, expected_s: float) -> None:
        self.transport.write(c.start)
        self._sleep(c.wait_s(expected_s))

    def _status(self, query: str) -> int:
        """One status register read, as an integer (IEEE 488.2 NR1)."""
        reply = self.transport.query(query)
        try:
            return int(reply.strip())
        except ValueError:
            raise InstrumentError(self.address, query, text=f"expected an integer status, found {reply!r}") from None

    def fetch_trace(self, points: int) -> np.ndarray:
        """Read the last sweep as little-endian float32 levels, dBm (the unit set at initialization).

        Raises
        ------
        ProfileMismatchError
            The reply contradicts the profile's ``trace.use`` or ``trace.byte_order``.
        BlockFormatError, ReplyFormatError
            The reply is malformed, or holds another number of points.
        """
        trace = self.profile.trace
        reply = self.transport.query_response(trace.fetch)
        try:
            values = self._decode(trace, reply, points)
        except ReplyFormatError as exc:
            raise type(exc)(f"{self.address}: reply to {trace.fetch!r}: {exc}") from exc
        if values.size != points:
            raise BlockFormatError(f"{self.address}: expected {points} trace points, found {values.size}")
        self._check_levels(trace, reply.data, values)
        self._check_range(values)
        return values.astype("<f4")

    def _check_range(self, values_dbm: np.ndarray) -> None:
        """Refuse readings no working input can show: a measurement fault, never stored as data.

        Plausible readings lie between :data:`FLOOR_DBM` (far below any analyzer's noise floor at
        its narrowest RBW) and the profile's input damage level plus :data:`DAMAGE_HEADROOM_DB`
        (an input that reads more is destroyed or the value was misread).
        """
        high = self.profile.damage_level_dbm + DAMAGE_HEADROOM_DB
        worst = float(np.max(values_dbm)) if values_dbm.size else 0.0
        lowest = float(np.min(values_dbm)) if values_dbm.size else 0.0
        if worst > high or lowest < FLOOR_DBM:
            bad = worst if worst > high else lowest
            raise BlockFormatError(f"{self.address}: trace holds {bad:.4g} dBm, outside what this input can read "
                                   f"({FLOOR_DBM:g} dBm to {high:g} dBm: the profile's damage level "
                                   f"{self.profile.damage_level_dbm:+g} dBm + {DAMAGE_HEADROOM_DB:g} dB): "
                                   "a measurement fault, not stored")

    def _decode(self, trace: TraceFormat, reply, points: int) -> np.ndarray:
        if not trace.binary:
            if reply.is_block:
                raise self.profile.mismatch(("trace", "use"), (
                    f"{self.address} answered {trace.fetch!r} with an IEEE 488.2 block of {len(reply.data)} bytes; "
                    "trace.use = 'ascii' expects comma-separated numbers"))
            return decode_ascii(reply.data, separator=trace.separator)
        if not reply.is_block:
            raise self.profile.mismatch(("trace", "use"), (
                f"{self.address} answered {trace.fetch!r} with text {reply.data[:24]!r}; "
                f"trace.use = {trace.kind!r} expects an IEEE 488.2 block"))
        self._check_width(trace, len(reply.data), points)
        return decode_binary(reply.data, trace.kind, big_endian=trace.big_endian) * trace.scale

    def _check_width(self, trace: TraceFormat, n_bytes: int, points: int) -> None:
        """8-byte values where 4 were declared (or the reverse) is the profile's mistake."""
        width = BINARY_WIDTHS[trace.kind]
        sent = n_bytes // points if points and n_bytes % points == 0 else None
        if sent is not None and sent != width and sent in BINARY_WIDTHS.values():
            raise self.profile.mismatch(("trace", "use"), (
                f"{self.address} sent {n_bytes} bytes for {points} points of {trace.fetch!r}: {sent} bytes per "
                f"point, but trace.use = {trace.kind!r} has {width}-byte values"))

    def _check_levels(self, trace: TraceFormat, payload: bytes, values: np.ndarray) -> None:
        """Refuse NaN, Inf and levels no analyzer reads; name the byte order when it is the cause."""
        if _plausible(values):
            return
        if trace.binary:
            other = decode_binary(payload, trace.kind, big_endian=not trace.big_endian) * trace.scale
            if _plausible(other):
                declared, actual = ("big", "little") if trace.big_endian else ("little", "big")
                raise self.profile.mismatch(("trace", "byte_order"), (
                    f"{self.address} sends {actual}-endian {trace.kind} values: read {declared}-endian the "
                    f"trace holds impossible levels, read {actual}-endian it does not "
                    f"(check trace.byte_order and trace.byte_order_{declared})"))
        raise BlockFormatError(f"{self.address}: trace holds non-finite or impossible levels (NaN, Inf or beyond "
                               f"+-{MAX_LEVEL_DB:g} dB): wrong format or corrupt data")

    def check_errors(self, context: str, max_reads: int = 32) -> None:
        """Drain ``SYST:ERR?``; raise the first error with the instrument's code and text.

        Codes the profile lists in ``warning_codes`` (e.g. an input overload) are kept in
        :attr:`warnings` instead of raised; the caller decides what to do with them.
        """
        first = None
        for _ in range(max_reads):
            reply = self.transport.query(self.profile.commands["error_query"])
            code, text = _parse_error(reply)
            if code == 0:
                break
            if code in self.profile.warning_codes:
                self.warnings.append(f"{code},{text!r} after {context}")
                continue
            first = first or (code, text)
        if first:
            raise InstrumentError(self.address, context, code=first[0], text=first[1])

    def take_warnings(self) -> list[str]:
        """Warnings collected since the last call (and forget them)."""
        out, self.warnings = self.warnings, []
        return out

    def close(self) -> None:
        """Close the connection."""
        self.transport.close()

    def forget_state(self) -> None:
        """Forget what was applied (after a reconnect everything is sent again)."""
        self._applied.clear()
        self._sweep_time_s = None


_AWAIT = {
    "opc-query": Analyzer._await_opc_query,
    "status-poll": Analyzer._await_status_poll,
    "fixed-wait": Analyzer._await_fixed_wait,
}


def _plausible(values: np.ndarray) -> bool:
    """True when every value can be a level in dB: finite, within +-MAX_LEVEL_DB, not denormal."""
    magnitude = np.abs(values)
    return bool(np.all(np.isfinite(values) & (magnitude <= MAX_LEVEL_DB) & ((magnitude == 0) | (magnitude > _TINY))))


def _parse_error(reply: str) -> tuple[int, str]:
    """``-222,"Data out of range"`` -> (-222, 'Data out of range') (SCPI-1999 error queue)."""
    head, _, tail = reply.strip().partition(",")
    try:
        code = int(head)
    except ValueError:
        return -1, f"unreadable error reply {reply!r}"
    return code, tail.strip().strip('"')


def points_for_step(span_hz: float, step_hz: float) -> int:
    """Points needed so that the spacing does not exceed ``step_hz``."""
    return int(math.ceil(span_hz / step_hz - 1e-9)) + 1
