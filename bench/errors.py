"""One exception tree for the whole tool.

::

    BenchError                      anything this tool raises on purpose
    ├── ConfigError                 a file a person wrote is wrong (exit code 2, nothing written)
    │   ├── UnitError               a quantity string could not be read ("12 parsecs")
    │   └── ProfileMismatchError    an instrument's replies contradict its profile (trace format,
    │                               byte order): found at run time, a retry cannot cure it
    ├── PlanError                   the sequence is valid but cannot run on this bench
    │   └── SafetyLimitError        a target lies outside soft limits / travel, refused before moving
    ├── InstrumentError             an instrument said no (SCPI error queue, G-code ``error:``)
    ├── TransportError              the wire failed: cannot open, closed by the peer
    │   ├── ReplyTimeoutError       no (complete) reply before the deadline
    │   └── ReplyFormatError        a reply that cannot be read: not ASCII text, not the framing
    │       └── BlockFormatError    an IEEE 488.2 block was truncated or malformed
    ├── StoreError                  the run folder cannot be read or written
    ├── AnalysisError               data cannot be analysed as asked (table does not cover a sweep)
    └── RunInterrupted              a run stopped before its end and is kept (exit code 3)
        └── OperatorStop            Ctrl-C or SIGTERM stopped the run (exit code 130)

pyvisa, pyserial and OS exceptions are translated where they enter (the byte wires of
``bench.visawire`` and ``bench.serialwire``, the framing of ``bench.framing``) with
``raise ... from exc``; nothing above the transports sees a foreign exception.

Every message is a single line meant for a person: which file, key, address or command, what was
expected and what was found.
"""

from __future__ import annotations

__all__ = [
    "AnalysisError",
    "BenchError",
    "BlockFormatError",
    "ConfigError",
    "InstrumentError",
    "PlanError",
    "OperatorStop",
    "ProfileMismatchError",
    "ReplyFormatError",
    "ReplyTimeoutError",
    "RunInterrupted",
    "SafetyLimitError",
    "StoreError",
    "TransportError",
    "UnitError",
]


class BenchError(Exception):
    """Base of every error this tool raises on purpose."""

    exit_code = 1


class ConfigError(BenchError):
    """A sequence, bench, profile, table or limit file is wrong.

    Parameters
    ----------
    message : str
        What was expected and what was found.
    file : str, optional
        Path of the file, as the user gave it.
    line : int, optional
        1-based line where the offending key or table can be found.
    key : str, optional
        Dotted key path, e.g. ``steps[2].rbw``.
    """

    exit_code = 2

    def __init__(self, message: str, *, file: str | None = None, line: int | None = None,
                 key: str | None = None) -> None:
        self.message = message
        self.file = file
        self.line = line
        self.key = key
        super().__init__(self.one_line())

    def one_line(self) -> str:
        where = ""
        if self.file:
            where = self.file if self.line is None else f"{self.file}:{self.line}"
            where += ": "
        key = f"{self.key}: " if self.key else ""
        return f"{where}{key}{self.message}"


class UnitError(ConfigError):
    """A quantity string could not be parsed or has the wrong dimension."""


class ProfileMismatchError(ConfigError):
    """What an instrument sends contradicts its profile (e.g. the trace format or byte order).

    Raised while talking to the instrument, located like any :class:`ConfigError` at the profile
    key to change (``FILE:LINE: trace.use: ...``). The run engine does not retry it: the same
    profile gets the same answer.
    """


class PlanError(BenchError):
    """A valid sequence that cannot run on the given bench (profile limits, tables, travel)."""

    exit_code = 2


class SafetyLimitError(PlanError):
    """A move or setting outside the limits the bench file allows. Raised before anything moves."""


class InstrumentError(BenchError):
    """An instrument reported an error.

    Parameters
    ----------
    address : str
        Address of the instrument (VISA resource or serial URL).
    command : str
        The command that was sent (or the configuration batch).
    code : int, optional
        SCPI error code (e.g. -222) or G-code error number.
    text : str, optional
        The instrument's own error text.
    """

    def __init__(self, address: str, command: str, code: int | None = None,
                 text: str | None = None) -> None:
        self.address = address
        self.command = command
        self.code = code
        self.text = text
        detail = f"{code},{text!r}" if code is not None else (text or "error")
        super().__init__(f"{address}: {command!r} -> {detail}")


class TransportError(BenchError):
    """The connection to an instrument failed (open, write, closed by the peer)."""


class ReplyTimeoutError(TransportError):
    """No complete reply arrived before the deadline."""


class ReplyFormatError(TransportError):
    """A reply could not be read: bytes that are not ASCII text, or not the expected framing."""


class BlockFormatError(ReplyFormatError):
    """An IEEE 488.2 arbitrary block was truncated, corrupted or of an unexpected size."""


class StoreError(BenchError):
    """A run folder or its database cannot be read or written."""


class AnalysisError(BenchError):
    """Data cannot be analysed as asked (e.g. a transducer table does not cover the sweep)."""

    exit_code = 2


class RunInterrupted(BenchError):
    """The run stopped before its end (faults exhausted the retries); it is kept and resumable.

    The message says how to continue it once the engine knows the run folder.
    """

    exit_code = 3


class OperatorStop(RunInterrupted):
    """Ctrl-C or SIGTERM during a run: the run is kept and can be resumed."""

    exit_code = 130
