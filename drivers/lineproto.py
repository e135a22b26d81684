"""Line-protocol conversation for serial positioners (G-code stages, masts, turntables).

Controllers of this kind take one command per line and acknowledge each with a line starting
with ``ok`` (possibly followed by extra text, e.g. ``ok T:21.2``). Before the acknowledgement
they may send information lines (a position report), keep-alive lines while a long move runs
(``busy``), or, instead of ``ok``, an error line (``error:N``, ``!! text``, ``Error:text``).
The host must wait for the acknowledgement before sending the next line (the serial streaming
rule of G-code firmware: one line per command, wait for ``ok``; common practice, from memory).

Some controllers answer a few commands with one line and no ``ok`` at all, typically a status
query they take as a real-time character (``?`` answered by ``<Idle|MPos:...>`` only). A
profile lists those in ``[handshake] no_ok``; the conversation then waits for that one line.

What the lines look like is data: a :class:`Handshake` validated from a profile's
``[handshake]`` table, and :class:`LineConnection` from its ``[connection]`` table (both read by
:func:`bench.drivers.profile.load_profile`). This module only runs the conversation:

* :meth:`LineConversation.read_banner` waits for the start-up banner after the port opens
  (boards that reset when the port opens print one; common practice, from memory);
* :meth:`LineConversation.command` sends a line and collects the reply under one overall
  deadline (pyserial's timeout is per read call; pitfalls: pyserial);
* optional line numbers and checksums ``N<n> <command>*<cs>`` with a bounded number of
  resends when the controller asks ``Resend: <n>``.
"""

from __future__ import annotations

import re
import time
from dataclasses import dataclass
from typing import Annotated, Any, Optional

import pydantic
from pydantic import Field, StrictBool, StrictInt, StrictStr

from bench.drivers.profile import Pattern, ProfileModel, ProfileTable, Terminator, duration, pattern_with
from bench.errors import InstrumentError, ReplyTimeoutError

__all__ = [
    "Handshake",
    "LineConnection",
    "LineDeviceProfile",
    "LineConversation",
    "Reply",
    "checksum",
    "numbered_line",
]

_MAX_RESENDS = 3
#: Highest baud rate a profile may give (from memory: the fastest common USB-serial bridges
#: run at 12 Mbaud); a typo such as 1152000000 is refused.
MAX_BAUDRATE = 12_000_000


def checksum(text: str) -> int:
    """XOR of all bytes of ``text`` (the part of a numbered line before ``*``).

    ``cs = XOR of all bytes before '*'`` (line checksums of printer-style G-code firmware, from
    memory); ``N0 M110 N0`` gives 125 (derived: the XOR of its bytes).
    """
    value = 0
    for byte in text.encode("ascii"):
        value ^= byte
    return value


def numbered_line(line_number: int, command: str) -> str:
    """``N<line_number> <command>*<checksum>`` (numbered lines of G-code firmware, from memory)."""
    body = f"N{line_number} {command}"
    return f"{body}*{checksum(body)}"


def _as_list(value: Any) -> Any:
    """A single pattern may be written without the list brackets."""
    return [value] if isinstance(value, str) else value


PatternList = Annotated[tuple[Pattern, ...], pydantic.BeforeValidator(_as_list)]


class Handshake(ProfileTable):
    """How a controller's reply lines look and how long to wait for them (``[handshake]``).

    Attributes
    ----------
    ok : re.Pattern
        Acknowledgement; a group named ``extra`` (optional) captures text after ``ok``.
    busy : tuple of re.Pattern
        Keep-alive lines to skip while waiting.
    errors : tuple of re.Pattern
        Error replies; optional groups ``code`` (an integer) and ``text``.
    resend : re.Pattern or None
        Request to send a numbered line again; group ``line`` holds its number.
    banner : re.Pattern or None
        Start-up banner; None when the controller prints none.
    timeout_s : float
        Overall deadline for the reply to an ordinary command, seconds (key ``timeout``).
    banner_timeout_s : float
        Deadline for the banner after opening the port, seconds (key ``banner_timeout``).
    line_numbers : bool
        Send ``N<n> <command>*<cs>`` lines (counter reset with ``M110 N0`` by the caller).
    error_codes : dict
        Meaning of numeric error codes, for messages (``{3: "not homed"}``).
    no_ok : tuple of str
        Commands (exact text) answered by one reply line and no acknowledgement, such as a
        status query the controller treats as a real-time character. They are sent without a
        line number.
    """

    ok: Pattern
    busy: PatternList = ()
    errors: PatternList = ()
    resend: Optional[pattern_with("line")] = None
    banner: Optional[Pattern] = None
    timeout_s: duration() = Field(5.0, alias="timeout")
    banner_timeout_s: duration() = Field(5.0, alias="banner_timeout")
    line_numbers: StrictBool = False
    error_codes: dict[int, StrictStr] = {}
    no_ok: tuple[Annotated[StrictStr, Field(min_length=1)], ...] = ()


class LineConnection(ProfileTable):
    """Port settings of a line device (``[connection]``).

    Attributes
    ----------
    baudrate : int
        Serial speed, 8N1 (the bench file may replace it).
    read_termination, write_termination : str
        Line terminators.
    open_timeout_s : float
        Deadline for opening the port, seconds (key ``open_timeout``).
    """

    # from memory: the fastest common USB-serial bridges run at 12 Mbaud
    baudrate: Annotated[StrictInt, Field(gt=0, le=MAX_BAUDRATE)]
    read_termination: Terminator = "\n"
    write_termination: Terminator = "\n"
    open_timeout_s: duration() = Field(5.0, alias="open_timeout")


class LineDeviceProfile(ProfileModel):
    """What every line-protocol profile (stage, mast, turntable) shares: ``[connection]``, ``[handshake]``."""

    connection: LineConnection
    handshake: Handshake

    def transport_settings(self, baudrate: int | None = None):
        """Settings to open the device's port (``baudrate`` from the bench file wins)."""
        from bench.transports import TransportSettings

        conn = self.connection
        return TransportSettings(
            timeout_s=self.handshake.timeout_s, open_timeout_s=conn.open_timeout_s,
            read_termination=conn.read_termination, write_termination=conn.write_termination,
            baudrate=baudrate or conn.baudrate,
        )


@dataclass(frozen=True)
class Reply:
    """What a controller answered to one command.

    Attributes
    ----------
    command : str
        The command as given (without line number or checksum).
    lines : tuple of str
        Information lines received before the acknowledgement (keep-alives removed).
    ok_text : str
        Text that followed ``ok`` on the acknowledgement line.
    """

    command: str
    lines: tuple[str, ...]
    ok_text: str = ""

    def find(self, pattern: re.Pattern[str]) -> re.Match[str] | None:
        """First match of ``pattern`` among the information lines and the ``ok`` text."""
        for line in (*self.lines, self.ok_text):
            match = pattern.search(line)
            if match:
                return match
        return None


class LineConversation:
    """One line-protocol conversation over an open transport.

    Parameters
    ----------
    transport : Transport
        Open line transport (``write``, ``read_line``, ``clear``); see ``bench.transports``.
    handshake : Handshake
        Reply patterns and deadlines.

    Notes
    -----
    The constructor does no I/O. Not thread-safe by itself: one owner per controller.
    """

    def __init__(self, transport, handshake: Handshake) -> None:
        self.transport = transport
        self.handshake = handshake
        self._next_line_number = 0

    @property
    def address(self) -> str:
        """Address of the controller, for messages."""
        return getattr(self.transport, "address", "?")

    # ------------------------------------------------------------------------------ banner

    def read_banner(self) -> str:
        """Wait for the start-up banner and return its line ('' when the profile has none).

        Raises
        ------
        ReplyTimeoutError
            No line matching the banner pattern within ``banner_timeout_s``.
        """
        pattern = self.handshake.banner
        if pattern is None:
            return ""
        deadline = time.monotonic() + self.handshake.banner_timeout_s
        seen: list[str] = []
        while True:
            line = self._read(deadline, "start-up banner", self.handshake.banner_timeout_s, seen)
            if pattern.search(line):
                return line
            seen.append(line)

    # ----------------------------------------------------------------------------- command

    def reset_line_numbers(self, reset_command: str = "M110 N0") -> None:
        """Reset the controller's line counter (``M110 N0`` in printer firmware, from memory)."""
        self._next_line_number = 0
        self.command(reset_command)

    def command(self, text: str, *, timeout_s: float | None = None) -> Reply:
        """Send one command line and wait for its acknowledgement.

        Parameters
        ----------
        text : str
            The command, without terminator.
        timeout_s : float, optional
            Overall deadline for the whole reply, seconds (default: the handshake's).

        Returns
        -------
        Reply
            Information lines and the acknowledgement's extra text. For a command the handshake
            lists in ``no_ok``, the one reply line (and no acknowledgement text).

        Raises
        ------
        InstrumentError
            The controller answered with an error line (address, command, code, text).
        ReplyTimeoutError
            No acknowledgement (or, for a ``no_ok`` command, no reply line) before the deadline;
            the message names the command.
        """
        budget_s = self.handshake.timeout_s if timeout_s is None else timeout_s
        deadline = time.monotonic() + budget_s
        if text in self.handshake.no_ok:
            return self._answer_line(text, deadline, budget_s)
        wire = self._wire_text(text)
        self.transport.write(wire)
        lines: list[str] = []
        resends = 0
        resend_pending = False
        while True:
            line = self._read(deadline, text, budget_s, lines)
            kind, match = self._classify(line)
            if kind == "ok" and resend_pending:
                # the 'ok' closes the corrupted line; send it again and wait for its own 'ok'
                resend_pending = False
                self.transport.write(wire)
            elif kind == "ok":
                return Reply(text, tuple(lines), (match.groupdict().get("extra") or "").strip())
            elif kind == "error":
                raise self._error(text, match)
            elif kind == "resend":
                resends += 1
                if resends > _MAX_RESENDS:
                    raise InstrumentError(self.address, text, None,
                                          f"asked to resend the line more than {_MAX_RESENDS} times")
                resend_pending = True
            elif kind == "line":
                lines.append(line)

    def _answer_line(self, text: str, deadline: float, budget_s: float) -> Reply:
        """Send a command answered by one line and no ``ok``; return that line.

        The command goes out without a line number (controllers take such commands outside the
        numbered stream). Keep-alive, blank and banner lines are skipped; an ``ok`` line is left
        over from something else and skipped too (it shows in a timeout message).
        """
        self.transport.write(text)
        seen: list[str] = []
        while True:
            line = self._read(deadline, text, budget_s, seen)
            kind, match = self._classify(line)
            if kind == "error":
                raise self._error(text, match)
            if kind == "line":
                return Reply(text, (line,))
            seen.append(line)

    def send_without_reply(self, text: str) -> None:
        """Write a line and wait for nothing (emergency stop: the controller may never answer)."""
        self.transport.write(text)

    # ----------------------------------------------------------------------------- helpers

    def _wire_text(self, text: str) -> str:
        if not self.handshake.line_numbers:
            return text
        number = self._next_line_number
        self._next_line_number += 1
        return numbered_line(number, text)

    def _read(self, deadline: float, what: str, budget_s: float, seen: list[str]) -> str:
        remaining_s = deadline - time.monotonic()
        try:
            if remaining_s <= 0:
                raise ReplyTimeoutError("deadline passed")
            return self.transport.read_line(remaining_s)
        except ReplyTimeoutError as exc:
            # A late 'ok' must not be taken as the answer to the next command (pitfalls).
            self.transport.clear()
            tail = f" (received: {' | '.join(seen[-3:])})" if seen else ""
            raise ReplyTimeoutError(
                f"{self.address}: no acknowledgement to {what!r} within {budget_s:g} s{tail}"
            ) from exc

    def _classify(self, line: str) -> tuple[str, re.Match[str] | None]:
        hs = self.handshake
        for pattern in hs.errors:
            match = pattern.search(line)
            if match:
                return "error", match
        if hs.resend is not None:
            match = hs.resend.search(line)
            if match:
                return "resend", match
        match = hs.ok.search(line)
        if match:
            return "ok", match
        if not line.strip() or any(p.search(line) for p in hs.busy):
            return "skip", None
        if hs.banner is not None and hs.banner.search(line):
            return "skip", None  # a controller that reset re-prints its banner
        return "line", None

    def _error(self, command: str, match: re.Match[str]) -> InstrumentError:
        groups = match.groupdict()
        code = int(groups["code"]) if groups.get("code") else None
        text = (groups.get("text") or "").strip() or None
        if code is not None and code in self.handshake.error_codes:
            meaning = self.handshake.error_codes[code]
            text = f"{text}: {meaning}" if text else meaning
        return InstrumentError(self.address, command, code, text or match.group(0))
