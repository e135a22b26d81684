"""Lines and IEEE 488.2 blocks on top of any byte wire: what drivers talk through.

:class:`MessageTransport` turns a :class:`~bench.wire.ByteTransport` into the text-level
interface the drivers use: ``write(text)``, ``read_line``, ``query``, ``query_block``,
``clear``, ``close`` (and ``query_response`` for a reply that may be either). It is the same
code whatever the wire, so an analyzer at ``socket://127.0.0.1:5025`` behaves exactly like one
at ``TCPIP::127.0.0.1::5025::SOCKET``.

Framing rules
    * A message written is the text plus the write terminator, ASCII.
    * A text reply ends at the read terminator; a trailing ``\\r`` is dropped, and bytes that are
      not ASCII are refused (:class:`~bench.errors.ReplyFormatError`).
    * A reply starting with ``#`` is an arbitrary block. Definite form (IEEE 488.2 §8.7.9):
      ``#``, one digit n (1-9), n digits giving the byte count L, L data bytes, then the read
      terminator, checked. The data may hold terminator bytes: the block is read by its header.
      Indefinite form ``#0`` (§8.7.10) runs to the terminator; only safe on wires with END.
    * A block cut short (fewer bytes than its header announces before the deadline), a header
      that is not digits, or anything but the terminator after the data is a
      :class:`~bench.errors.BlockFormatError`; the wire is then cleared, since the next reply
      would start in the middle of this one.
    * One deadline (seconds) bounds a whole reply, however many wire reads it takes.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import NamedTuple

from bench.errors import BlockFormatError, ReplyFormatError, ReplyTimeoutError, TransportError
from bench.wire import ByteTransport, TransportSettings, reply_timeout

__all__ = ["MessageTransport", "Response"]


class Response(NamedTuple):
    """One response message.

    Attributes
    ----------
    is_block : bool
        True for an IEEE 488.2 arbitrary block, False for a text line.
    data : bytes
        The block's data bytes, or the line's bytes without its terminator.
    """

    is_block: bool
    data: bytes


class MessageTransport:
    """Text lines and IEEE 488.2 blocks over a byte wire (see the module docstring).

    Parameters
    ----------
    wire : ByteTransport
        An open byte wire. The constructor does no I/O.
    settings : TransportSettings
        Terminators and the default reply deadline, seconds.
    """

    def __init__(self, wire: ByteTransport, settings: TransportSettings) -> None:
        self.wire = wire
        self.settings = settings
        self._term = settings.read_termination.encode("ascii")
        self._last = "read"
        self._lock = threading.RLock()  # one conversation at a time

    @property
    def address(self) -> str:
        """The instrument's address (VISA resource, URL or device path)."""
        return self.wire.address

    # ------------------------------------------------------------------ text
    def write(self, text: str) -> None:
        """Send one message: ``text`` and the write terminator."""
        try:
            data = (text + self.settings.write_termination).encode("ascii")
        except UnicodeEncodeError as exc:
            raise TransportError(f"{self.address}: cannot send {text!r}: not ASCII") from exc
        with self._lock, self._about(text, self.settings.timeout_s, reading=False):
            self.wire.write(data, self.settings.timeout_s)
            self._last = text

    def read_line(self, timeout_s: float | None = None) -> str:
        """One text reply, without its terminator (and without a trailing ``\\r``)."""
        budget_s = self._budget(timeout_s)
        with self._lock, self._about(self._last, budget_s):
            data = self.wire.read_until(self._term, budget_s)
        return self._text(self._strip(data))

    def query(self, text: str, timeout_s: float | None = None) -> str:
        """Send ``text`` and return the reply line, stripped of blanks."""
        with self._lock:
            self.write(text)
            return self.read_line(timeout_s).strip()

    # ------------------------------------------------------------------ blocks
    def query_block(self, text: str, timeout_s: float | None = None) -> bytes:
        """Send ``text`` and return the data of the IEEE 488.2 block that answers it."""
        reply = self.query_response(text, timeout_s)
        if not reply.is_block:
            raise BlockFormatError(f"{self.address}: reply to {text!r}: expected an IEEE 488.2 block "
                                   f"('#' and a length), found {reply.data[:40]!r}")
        return reply.data

    def query_response(self, text: str, timeout_s: float | None = None) -> Response:
        """Send ``text`` and read one reply, a block or a text line, whichever arrives."""
        with self._lock:
            self.write(text)
            return self.read_response(timeout_s)

    def read_response(self, timeout_s: float | None = None) -> Response:
        """Read one reply: an IEEE 488.2 block (by its header) or a text line."""
        budget_s = self._budget(timeout_s)
        deadline = time.monotonic() + budget_s
        with self._lock, self._about(self._last, budget_s):
            first = self.wire.read_until(self._term, budget_s)
            if first[:1] != b"#":
                return Response(False, self._strip(first))
            try:
                return Response(True, self._finish_block(bytearray(first), deadline, budget_s))
            except BlockFormatError:
                self.wire.clear()  # the rest of this reply would poison the next one
                raise

    def _finish_block(self, buf: bytearray, deadline: float, budget_s: float) -> bytes:
        """Complete a block whose first bytes (up to a terminator byte) are in ``buf``."""
        self._need(buf, 2, deadline, budget_s, "the block header")
        if not buf[1:2].isdigit():
            raise self._block_error(f"expected a digit after '#', found {bytes(buf[:8])!r}")
        n_digits = int(buf[1:2])
        if n_digits == 0:  # indefinite block: everything up to the terminator (IEEE 488.2 §8.7.10)
            return self._strip(bytes(buf[2:]))
        self._need(buf, 2 + n_digits, deadline, budget_s, "the block header")
        digits = bytes(buf[2:2 + n_digits])
        if not digits.isdigit():
            raise self._block_error(f"expected {n_digits} length digits after '#{n_digits}', found {digits!r}")
        end = 2 + n_digits + int(digits)
        self._need(buf, end + len(self._term), deadline, budget_s, f"{int(digits)} data bytes")
        tail = bytes(buf[end:])
        if tail != self._term:
            raise self._block_error(f"expected {self._term!r} after the {int(digits)}-byte block, "
                                    f"found {tail[:20]!r}" + (" and more" if len(tail) > 20 else ""))
        return bytes(buf[2 + n_digits:end])

    def _need(self, buf: bytearray, size: int, deadline: float, budget_s: float, what: str) -> None:
        """Read until ``buf`` holds ``size`` bytes; a timeout here means a truncated block."""
        missing = size - len(buf)
        if missing <= 0:
            return
        try:
            buf.extend(self.wire.read_exact(missing, max(deadline - time.monotonic(), 0.0)))
        except ReplyTimeoutError as exc:
            got = len(buf) + len(getattr(exc, "partial", b""))
            raise self._block_error(f"block truncated: waiting for {what}, {size - got} of {size} bytes "
                                    f"still missing after {budget_s:g} s") from exc

    def _block_error(self, message: str) -> BlockFormatError:
        return BlockFormatError(f"{self.address}: reply to {self._last!r}: {message}")

    # ------------------------------------------------------------------ housekeeping
    def clear(self) -> None:
        """Discard whatever is in flight from the instrument (after a timeout, say)."""
        with self._lock:
            self.wire.clear()

    def close(self) -> None:
        """Close the connection."""
        with self._lock:
            self.wire.close()

    def _budget(self, timeout_s: float | None) -> float:
        return self.settings.timeout_s if timeout_s is None else timeout_s

    def _strip(self, data: bytes) -> bytes:
        if self._term and data.endswith(self._term):
            data = data[:-len(self._term)]
        return data[:-1] if data.endswith(b"\r") else data

    def _text(self, data: bytes) -> str:
        try:
            return data.decode("ascii")
        except UnicodeDecodeError as exc:
            raise ReplyFormatError(f"{self.address}: reply to {self._last!r} is not ASCII text: "
                                   f"{data[:40]!r}") from exc

    @contextmanager
    def _about(self, command: str, budget_s: float, reading: bool = True) -> Iterator[None]:
        """Name the command in errors that come up from the wire."""
        try:
            yield
        except ReplyTimeoutError as exc:
            what = f"no complete reply to {command!r}" if reading else f"{command!r} not sent"
            raise reply_timeout(self.address, what, budget_s, getattr(exc, "partial", b"")) from exc
        except TransportError as exc:
            if type(exc) is not TransportError:
                raise  # framing's own, already worded
            doing = f"reading the reply to {command!r}" if reading else f"sending {command!r}"
            raise TransportError(f"{exc} ({doing})") from exc
