"""Line-protocol conversation for serial positioners (G-code stages, masts, turntables).

Controllers of this kind take one command per line and acknowledge each with a line starting
with ``ok`` (possibly followed by extra text, e.g. ``ok T:21.2``). Before the acknowledgement
they may send information lines (a position report), keep-alive lines while a long move runs
(``busy``), or, instead of ``ok``, an error line (``error:N``, ``!! text``, ``Error:text``).
The host must wait for the acknowledgement before sending the next line (reference sheet §10,
"One line per command ... Wait for ok").

What the lines look like is data: a :class:`Handshake` built from a profile's ``[handshake]``
table. This module only runs the conversation:

* :meth:`LineConversation.read_banner` waits for the start-up banner after the port opens
  (boards that reset when the port opens print one; reference sheet §10);
* :meth:`LineConversation.command` sends a line and collects the reply under one overall
  deadline (pyserial's timeout is per read call; pitfalls: pyserial);
* optional line numbers and checksums ``N<n> <command>*<cs>`` with a bounded number of
  resends when the controller asks ``Resend: <n>``.
"""

from __future__ import annotations

import re
import time
from dataclasses import dataclass, field
from typing import Any

from bench.errors import ConfigError, InstrumentError, ReplyTimeoutError
from bench.units import parse

__all__ = [
    "Handshake",
    "LineConversation",
    "Reply",
    "checksum",
    "numbered_line",
    "compile_pattern",
]

_MAX_RESENDS = 3


def checksum(text: str) -> int:
    """XOR of all bytes of ``text`` (the part of a numbered line before ``*``).

    Reference sheet §10: ``cs = XOR of all bytes before '*'``; ``N0 M110 N0`` gives 125.
    """
    value = 0
    for byte in text.encode("ascii"):
        value ^= byte
    return value


def numbered_line(line_number: int, command: str) -> str:
    """``N<line_number> <command>*<checksum>`` (reference sheet §10)."""
    body = f"N{line_number} {command}"
    return f"{body}*{checksum(body)}"


def compile_pattern(text: Any, *, origin: str, key: str) -> re.Pattern[str]:
    """Compile a regular expression taken from a profile, as a ConfigError when it is wrong."""
    if not isinstance(text, str):
        raise ConfigError(f"expected a regular expression string, found {text!r}", file=origin, key=key)
    try:
        return re.compile(text)
    except re.error as exc:
        raise ConfigError(f"bad regular expression {text!r}: {exc}", file=origin, key=key) from exc


def _patterns(table: dict, name: str, origin: str) -> tuple[re.Pattern[str], ...]:
    value = table.get(name, [])
    if isinstance(value, str):
        value = [value]
    return tuple(compile_pattern(p, origin=origin, key=f"handshake.{name}[{i}]") for i, p in enumerate(value))


@dataclass(frozen=True)
class Handshake:
    """How a controller's reply lines look and how long to wait for them.

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
        Overall deadline for the reply to an ordinary command, seconds.
    banner_timeout_s : float
        Deadline for the banner after opening the port, seconds.
    line_numbers : bool
        Send ``N<n> <command>*<cs>`` lines (counter reset with ``M110 N0`` by the caller).
    error_codes : dict
        Meaning of numeric error codes, for messages (``{3: "not homed"}``).
    """

    ok: re.Pattern[str]
    busy: tuple[re.Pattern[str], ...] = ()
    errors: tuple[re.Pattern[str], ...] = ()
    resend: re.Pattern[str] | None = None
    banner: re.Pattern[str] | None = None
    timeout_s: float = 5.0
    banner_timeout_s: float = 5.0
    line_numbers: bool = False
    error_codes: dict[int, str] = field(default_factory=dict)

    @classmethod
    def from_table(cls, table: dict, *, origin: str) -> "Handshake":
        """Build from a profile's ``[handshake]`` table (timeouts as text with units)."""
        if "ok" not in table:
            raise ConfigError("missing the acknowledgement pattern", file=origin, key="handshake.ok")
        codes_raw = table.get("error_codes", {})
        try:
            codes = {int(k): str(v) for k, v in codes_raw.items()}
        except (ValueError, AttributeError) as exc:
            raise ConfigError(f"expected a table of code = \"meaning\", found {codes_raw!r}",
                              file=origin, key="handshake.error_codes") from exc
        return cls(
            ok=compile_pattern(table["ok"], origin=origin, key="handshake.ok"),
            busy=_patterns(table, "busy", origin),
            errors=_patterns(table, "errors", origin),
            resend=(compile_pattern(table["resend"], origin=origin, key="handshake.resend")
                    if "resend" in table else None),
            banner=(compile_pattern(table["banner"], origin=origin, key="handshake.banner")
                    if "banner" in table else None),
            timeout_s=parse(table.get("timeout", "5 s"), "time"),
            banner_timeout_s=parse(table.get("banner_timeout", "5 s"), "time"),
            line_numbers=bool(table.get("line_numbers", False)),
            error_codes=codes,
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
        """Reset the controller's line counter (reference sheet §10: ``M110 N0``)."""
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
            Information lines and the acknowledgement's extra text.

        Raises
        ------
        InstrumentError
            The controller answered with an error line (address, command, code, text).
        ReplyTimeoutError
            No acknowledgement before the deadline (the message names the command).
        """
        budget_s = self.handshake.timeout_s if timeout_s is None else timeout_s
        deadline = time.monotonic() + budget_s
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


class LineDeviceProfile:
    """What every line-protocol profile (stage, mast, turntable) shares: loading and port settings.

    Subclasses are frozen dataclasses with ``handshake``, ``open_timeout_s``, ``read_termination``,
    ``write_termination`` and ``baudrate`` fields and a ``from_data(data, origin)`` classmethod.
    """

    @classmethod
    def load(cls, name_or_path, *, base_dir=None):
        """Read a built-in profile by name or a profile file by path."""
        from bench.drivers.profile import load_profile_data

        data, origin = load_profile_data(name_or_path, base_dir=base_dir)
        return cls.from_data(data, origin)

    def transport_settings(self, baudrate: int | None = None):
        """Settings to open the device's port (``baudrate`` from the bench file wins)."""
        from bench.transports import TransportSettings

        return TransportSettings(
            timeout_s=self.handshake.timeout_s, open_timeout_s=self.open_timeout_s,
            read_termination=self.read_termination, write_termination=self.write_termination,
            baudrate=baudrate or self.baudrate,
        )
