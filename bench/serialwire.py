"""pyserial ports and URLs as byte wires (``serial_for_url``).

Device paths (``/dev/ttyUSB0``, ``COM3``) are serial ports; URLs pick one of pyserial's handlers:
``socket://host:port`` is a raw TCP connection (an instrument's SCPI socket works as well as a
serial-to-LAN bridge), ``rfc2217://host:port`` a remote serial port, ``loop://`` an echo.

* pyserial's timeout is per read call and ``readline`` returns partial lines: this wire keeps its
  own buffer and enforces one overall deadline per read, reporting what arrived on a timeout.
* A port with a file descriptor (device paths, ``socket://``) is read without blocking once
  ``select`` says data are there, so a long reply arrives in large chunks; other handlers are
  read with a short per-call timeout.
* Device paths open with ``exclusive=True``: two processes on one port both read garbage.
* pyserial and OS errors become :mod:`bench.errors` exceptions here.
"""

from __future__ import annotations

import select
import threading
import time
from typing import Any

from bench.errors import TransportError
from bench.wire import TransportSettings, reply_timeout

__all__ = ["SerialByteTransport", "is_url"]

_POLL_S = 0.05  # longest single wait inside a read; the overall deadline is the caller's
_CHUNK_BYTES = 1 << 16
_URL_SCHEMES = ("socket://", "rfc2217://", "loop://", "spy://", "hwgrep://", "alt://")


def is_url(address: str) -> bool:
    """True for a pyserial URL (``socket://``, ``rfc2217://``, ...), False for a device path."""
    return address.strip().lower().startswith(_URL_SCHEMES)


class SerialByteTransport:
    """A pyserial port as a :class:`~bench.wire.ByteTransport`.

    Parameters
    ----------
    address : str
        Device path or pyserial URL.
    port : serial.SerialBase
        The open port. The constructor does no I/O: use :meth:`open`.
    """

    def __init__(self, address: str, port: Any, fd: int | None = None) -> None:
        self.address = address
        self._port = port
        self._fd = fd  # waited on with select; None: the port's own per-call timeout
        self._buffer = bytearray()
        self._lock = threading.RLock()

    @classmethod
    def open(cls, address: str, settings: TransportSettings) -> SerialByteTransport:
        """Open ``address`` (8N1, no flow control, ``settings.baudrate``)."""
        import serial

        kwargs: dict[str, Any] = dict(baudrate=settings.baudrate, timeout=_POLL_S,
                                      write_timeout=settings.timeout_s)
        if not is_url(address):
            kwargs["exclusive"] = True  # two processes on one port read garbage
        try:
            port = serial.serial_for_url(address, **kwargs)
        except (serial.SerialException, OSError, ValueError) as exc:
            raise TransportError(f"{address}: cannot open: {exc}") from exc
        fd = _descriptor(port)
        if fd is not None:
            port.timeout = 0  # reads take what is there; select does the waiting
        return cls(address, port, fd)

    # ------------------------------------------------------------------ the byte interface
    def write(self, data: bytes, timeout_s: float) -> None:
        """Send all of ``data`` and wait until it has left the buffer."""
        import serial

        with self._lock:
            try:
                if self._port.write_timeout != timeout_s:
                    self._port.write_timeout = timeout_s  # some handlers renegotiate on a change
                self._port.write(data)
                self._port.flush()
            except serial.SerialTimeoutException as exc:
                raise TransportError(f"{self.address}: write not accepted within {timeout_s:g} s") from exc
            except (serial.SerialException, OSError, ValueError) as exc:
                raise TransportError(f"{self.address}: write: connection lost ({exc})") from exc

    def read_until(self, terminator: bytes, timeout_s: float) -> bytes:
        """Bytes up to and including ``terminator`` (which must not be empty)."""
        if not terminator:
            raise TransportError(f"{self.address}: a serial line needs a read terminator")
        deadline = time.monotonic() + timeout_s
        with self._lock:
            while True:
                index = self._buffer.find(terminator)
                if index >= 0:
                    return self._take(index + len(terminator))
                self._receive(deadline, f"no {terminator!r}", timeout_s)

    def read_exact(self, count: int, timeout_s: float) -> bytes:
        """Exactly ``count`` bytes."""
        deadline = time.monotonic() + timeout_s
        with self._lock:
            while len(self._buffer) < count:
                self._receive(deadline, f"not {count} bytes", timeout_s, want=count - len(self._buffer))
            return self._take(count)

    def clear(self) -> None:
        """Forget the buffer and whatever the port holds (best effort)."""
        with self._lock:
            self._buffer.clear()
            try:
                self._port.reset_input_buffer()
            except Exception:  # noqa: BLE001 - best effort; a reconnect handles the rest
                pass

    def close(self) -> None:
        """Close the port (never raises)."""
        # pyserial's socket:// handler skips closing its socket when shutdown() fails, which it
        # does on a connection the peer reset: close that socket ourselves
        sock = getattr(self._port, "_socket", None)
        with self._lock:
            try:
                self._port.close()
            except Exception:  # noqa: BLE001 - closing a dead port must not raise
                pass
            if sock is not None:
                sock.close()

    # ------------------------------------------------------------------ helpers
    def _take(self, count: int) -> bytes:
        out = bytes(self._buffer[:count])
        del self._buffer[:count]
        return out

    def _receive(self, deadline: float, what: str, timeout_s: float, want: int | None = None) -> None:
        """Add what arrives within one poll (at most until ``deadline``) to the buffer.

        ``want`` is how many bytes the caller still needs, when it knows.
        """
        import serial

        remaining_s = deadline - time.monotonic()
        if remaining_s <= 0:
            raise reply_timeout(self.address, what, timeout_s, bytes(self._buffer))
        try:
            if self._fd is None:
                chunk = self._port.read(want if want else max(1, self._port.in_waiting))
            elif select.select([self._fd], [], [], min(remaining_s, _POLL_S))[0]:
                chunk = self._port.read(want if want else _CHUNK_BYTES)
            else:
                chunk = b""
        except (serial.SerialException, OSError, ValueError) as exc:
            raise TransportError(f"{self.address}: read: connection lost ({exc})") from exc
        self._buffer.extend(chunk)


def _descriptor(port: Any) -> int | None:
    """The port's file descriptor for ``select`` (pyserial offers one for ports and sockets)."""
    try:
        fd = port.fileno()
    except (AttributeError, NotImplementedError, OSError, ValueError):
        return None
    return fd if isinstance(fd, int) and fd >= 0 else None
