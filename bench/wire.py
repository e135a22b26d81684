"""The byte level of a connection: what every wire (VISA session, serial port, TCP socket) offers.

A :class:`ByteTransport` moves bytes and nothing else: write bytes, read until a terminator,
read exactly n bytes, discard what is in flight, close. Every call takes its deadline in seconds.
Line and IEEE 488.2 block framing sit on top of it (:mod:`bench.framing`), and the address
scheme picks the wire (:mod:`bench.transports`). Foreign errors never leave a wire: they become
:class:`~bench.errors.TransportError` (or :class:`~bench.errors.ReplyTimeoutError`) with
``raise ... from exc``.

:class:`ScriptedByteTransport` is a wire for tests: it records every byte written and answers
from a script, so framing and drivers can be tested byte for byte without a socket.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Protocol

from bench.errors import ReplyTimeoutError, TransportError

__all__ = ["ByteTransport", "ScriptedByteTransport", "TransportSettings", "reply_timeout"]


@dataclass(frozen=True)
class TransportSettings:
    """How to open a connection (from the instrument profile and the bench file).

    Attributes
    ----------
    timeout_s : float
        Default deadline for one reply, seconds.
    open_timeout_s : float
        Deadline for opening the connection, seconds.
    read_termination, write_termination : str
        Line terminators.
    baudrate : int
        Serial ports only, bit/s.
    """

    timeout_s: float = 5.0
    open_timeout_s: float = 5.0
    read_termination: str = "\n"
    write_termination: str = "\n"
    baudrate: int = 115200


class ByteTransport(Protocol):
    """A byte wire to one instrument (see the module docstring). Timeouts are seconds."""

    address: str

    def write(self, data: bytes, timeout_s: float) -> None:
        """Send all of ``data``."""

    def read_until(self, terminator: bytes, timeout_s: float) -> bytes:
        """Bytes up to and including ``terminator`` (or up to the end of a VISA message)."""

    def read_exact(self, count: int, timeout_s: float) -> bytes:
        """Exactly ``count`` bytes."""

    def clear(self) -> None:
        """Discard whatever is in flight from the instrument (best effort, never raises)."""

    def close(self) -> None:
        """Close the connection (never raises)."""


def reply_timeout(address: str, what: str, timeout_s: float, partial: bytes) -> ReplyTimeoutError:
    """A :class:`ReplyTimeoutError` that keeps the bytes that did arrive as ``.partial``."""
    tail = f" (received so far: {partial[:40]!r})" if partial else ""
    error = ReplyTimeoutError(f"{address}: {what} within {timeout_s:g} s{tail}")
    error.partial = partial
    return error


class ScriptedByteTransport:
    """An in-memory wire for tests: records what is written, answers from a script.

    Parameters
    ----------
    answer : callable
        ``answer(message) -> bytes | None``, called for every complete message written (the
        bytes before ``write_termination``, decoded as ASCII). The returned bytes are queued as
        they are, terminator and all; None queues nothing.
    address : str
        Name used in messages.
    write_termination : bytes
        Ends one written message.

    Attributes
    ----------
    written : bytearray
        Every byte written, in order.
    messages : list of str
        Every message written, without its terminator.

    Notes
    -----
    A read that asks for more than is queued fails at once with :class:`ReplyTimeoutError` (what
    a real wire does when the deadline passes), keeping the queued bytes for the next read.
    """

    def __init__(self, answer: Callable[[str], bytes | None], address: str = "scripted",
                 write_termination: bytes = b"\n") -> None:
        self.address = address
        self.written = bytearray()
        self.messages: list[str] = []
        self.closed = False
        self._answer = answer
        self._term = write_termination
        self._pending = bytearray()
        self._incoming = bytearray()

    def write(self, data: bytes, timeout_s: float) -> None:
        """Record ``data``; answer every complete message in it."""
        if self.closed:
            raise TransportError(f"{self.address}: write on a closed connection")
        self.written.extend(data)
        self._pending.extend(data)
        while self._term and self._term in self._pending:
            message, _, rest = bytes(self._pending).partition(self._term)
            self._pending = bytearray(rest)
            self.messages.append(message.decode("ascii"))
            reply = self._answer(self.messages[-1])
            if reply is not None:
                self._incoming.extend(reply)

    def feed(self, data: bytes) -> None:
        """Queue bytes as if the instrument had sent them unasked."""
        self._incoming.extend(data)

    def read_until(self, terminator: bytes, timeout_s: float) -> bytes:
        """Queued bytes up to and including ``terminator``."""
        index = self._incoming.find(terminator) if terminator else len(self._incoming) - 1
        if index < 0 or not self._incoming:
            raise reply_timeout(self.address, f"no {terminator!r}", timeout_s, bytes(self._incoming))
        return self._take(index + max(len(terminator), 1))

    def read_exact(self, count: int, timeout_s: float) -> bytes:
        """Exactly ``count`` queued bytes."""
        if len(self._incoming) < count:
            raise reply_timeout(self.address, f"not {count} bytes", timeout_s, bytes(self._incoming))
        return self._take(count)

    def _take(self, count: int) -> bytes:
        out = bytes(self._incoming[:count])
        del self._incoming[:count]
        return out

    def clear(self) -> None:
        """Forget every queued byte."""
        self._incoming.clear()

    def close(self) -> None:
        """Mark the wire closed."""
        self.closed = True
