"""The IEEE 488.2 side of a simulated SCPI instrument: message dispatch, error queue, status.

:class:`ScpiInstrument` executes one program message (a line) against its command table:
several commands on a line are separated by ``;``; a header that does not resolve from the root
is tried relative to the previous command's path (``FREQ:STAR 1 MHZ;STOP 2 MHZ``, SCPI-1999
Vol. 1 header compounding); replies to several queries on one line are joined with ``;`` and
end in ``\\n``; a command error (-1xx) discards the rest of the line (IEEE 488.2 command error
handling, from memory); other errors do not. The error queue holds :data:`ERROR_QUEUE_LENGTH` entries, the
last replaced by -350 when it overflows (SCPI-1999 Vol. 2 SYSTem:ERRor).

:data:`COMMON_ROWS` are the IEEE 488.2 common commands and the SCPI ``SYSTem:ERRor`` queries
every simulated instrument answers.
"""

from __future__ import annotations

import collections
import threading
from collections.abc import Sequence

from bench.sim.scpisyntax import (
    STANDARD_TEXT,
    Number,
    Row,
    ScpiError,
    event_row,
    no_args,
    query_row,
    split_unit,
)

__all__ = ["COMMON_ROWS", "ERROR_QUEUE_LENGTH", "ScpiInstrument", "esr_bit"]

ERROR_QUEUE_LENGTH = 10


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
                self._errors[-1] = (-350, STANDARD_TEXT[-350])
            else:
                self._errors.append((code, text or STANDARD_TEXT.get(code, "Error")))
            self.esr |= esr_bit(code)

    def next_error(self) -> str:
        """Pop the oldest error as ``<code>,"<text>"``; ``0,"No error"`` when empty."""
        code, text = self._errors.popleft() if self._errors else (0, "No error")
        return f'{code},"{text}"'

    def status_byte(self) -> int:
        """IEEE 488.2 status byte: bit 2 error queue not empty, bit 5 ESB, bit 6 MSS."""
        stb = (4 if self._errors else 0) | (32 if self.esr & self.ese else 0)
        return stb | (64 if stb & self.sre else 0)

    def reset(self) -> None:
        """``*RST``: subclasses restore their settings."""

    # -- pending operations (IEEE 488.2 *OPC, *OPC?, *WAI; overlapped commands)
    def poll_status(self) -> None:
        """A status register is being read (``*ESR?``, ``*STB?``, ...): one poll's time passes.

        Nothing runs in the background here; an instrument with overlapped operations
        (:class:`~bench.sim.analyzer.SimAnalyzer`) moves them on.
        """

    def complete_operations(self) -> None:
        """Finish every pending operation (``*OPC?``, ``*WAI`` and queries that need a result)."""

    def request_opc(self) -> None:
        """``*OPC``: set ESR bit 0 (operation complete) once nothing is pending; at once here."""
        self.esr |= 1

    def clear_status(self) -> None:
        """``*CLS``: empty the error queue and the standard event status register."""
        self._errors.clear()
        self.esr = 0

    # -- parsing
    def _execute(self, unit: str, prefix: str) -> tuple[str | bytes | None, str]:
        header, args = split_unit(unit)
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
            no_args(args)
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



def esr_bit(code: int) -> int:
    """ESR bit of an error class: CME 32 (-1xx), EXE 16 (-2xx), QYE 4 (-4xx), DDE 8 (others)."""
    if -199 <= code <= -100:
        return 32
    if -299 <= code <= -200:
        return 16
    if -499 <= code <= -400:
        return 4
    return 8


def _read_and_clear_esr(inst: ScpiInstrument) -> str:
    inst.poll_status()
    value, inst.esr = inst.esr, 0
    return str(value)


def _status_byte(inst: ScpiInstrument) -> str:
    inst.poll_status()
    return str(inst.status_byte())


def _opc_query(inst: ScpiInstrument, _args: list[str]) -> str:
    inst.complete_operations()  # *OPC? answers once every pending operation is done
    return "1"


COMMON_ROWS: tuple[Row, ...] = (
    query_row("*IDN", lambda inst: inst.identity),
    event_row("*RST", lambda inst: inst.reset()),
    event_row("*CLS", lambda inst: inst.clear_status()),
    Row(("*OPC",), None, lambda inst, _v: inst.request_opc(), _opc_query),
    event_row("*WAI", lambda inst: inst.complete_operations()),
    query_row("*ESR", _read_and_clear_esr),
    Row(("*ESE",), Number("", 0, 255, 0, integer=True),
        lambda inst, v: setattr(inst, "ese", int(v)), lambda inst, a: str(inst.ese)),
    Row(("*SRE",), Number("", 0, 255, 0, integer=True),
        lambda inst, v: setattr(inst, "sre", int(v)), lambda inst, a: str(inst.sre)),
    query_row("*STB", _status_byte),
    query_row("*TST", lambda inst: "0"),
    query_row("SYSTem:ERRor[:NEXT]", lambda inst: inst.next_error()),
    query_row("SYSTem:ERRor:COUNt", lambda inst: str(len(inst._errors))),
    query_row("SYSTem:VERSion", lambda inst: "1999.0"),
)

