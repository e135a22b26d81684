"""Transports: the address string picks the wire, drivers only see this narrow interface.

* VISA resource names (``TCPIP::...::SOCKET``, ``TCPIP::...::INSTR``, ``GPIB0::...``, ``USB...``,
  ``ASRL...``) go through pyvisa with the pure-Python backend, named explicitly (``"@py"``).
* Serial URLs and device paths (``socket://host:port``, ``loop://``, ``rfc2217://``,
  ``/dev/ttyUSB0``, ``COM3``) go through pyserial's ``serial_for_url``.

pyvisa and pyserial errors are translated here into :mod:`bench.errors` with ``raise ... from``.
Timeouts are seconds everywhere; pyvisa's milliseconds appear only on the line that sets them.
"""

from __future__ import annotations

import re
import threading
import time
from dataclasses import dataclass
from typing import Callable, Protocol

from bench.errors import BlockFormatError, ReplyTimeoutError, TransportError
from bench.ieee488 import parse_block

__all__ = [
    "Transport",
    "TransportSettings",
    "VisaTransport",
    "SerialTransport",
    "ScriptedTransport",
    "open_transport",
    "is_visa_address",
]

_VISA_PREFIX = re.compile(r"^(TCPIP\d*|GPIB\d*|USB\d*|ASRL\d*|VXI\d*|PXI\d*)::", re.IGNORECASE)


class Transport(Protocol):
    """What a driver may do with a connection."""

    address: str

    def write(self, text: str) -> None: ...

    def read_line(self, timeout_s: float | None = None) -> str: ...

    def query(self, text: str, timeout_s: float | None = None) -> str: ...

    def query_block(self, text: str, timeout_s: float | None = None) -> bytes: ...

    def clear(self) -> None: ...

    def close(self) -> None: ...


@dataclass(frozen=True)
class TransportSettings:
    """How to open a connection (from the instrument profile and the bench file).

    Attributes
    ----------
    timeout_s : float
        Default deadline for one reply.
    open_timeout_s : float
        Deadline for opening the connection.
    read_termination, write_termination : str
        Line terminators.
    baudrate : int
        Serial only.
    """

    timeout_s: float = 5.0
    open_timeout_s: float = 5.0
    read_termination: str = "\n"
    write_termination: str = "\n"
    baudrate: int = 115200


def is_visa_address(address: str) -> bool:
    """True when ``address`` is a VISA resource name."""
    return bool(_VISA_PREFIX.match(address.strip()))


def open_transport(address: str, settings: TransportSettings | None = None) -> "VisaTransport | SerialTransport":
    """Open the transport the address names (VISA resource or serial URL / device path)."""
    settings = settings or TransportSettings()
    if is_visa_address(address):
        return VisaTransport.open(address, settings)
    return SerialTransport.open(address, settings)


# --------------------------------------------------------------------------------------- VISA

_RM_LOCK = threading.Lock()
_WATCHDOG_GRACE_S = 2.0  # beyond the reply deadline before a stuck VISA call is cut off
_RM = None


def _resource_manager():
    """One pyvisa ResourceManager per process, pure-Python backend named explicitly."""
    global _RM
    with _RM_LOCK:
        if _RM is None:
            try:
                import pyvisa
            except ImportError as exc:  # pragma: no cover - dependency of the package
                raise TransportError(f"pyvisa is not installed ({exc}); pip install pyvisa pyvisa-py") from exc
            try:
                _RM = pyvisa.ResourceManager("@py")
            except (OSError, ValueError) as exc:
                raise TransportError(f"cannot start the pyvisa-py backend: {exc}") from exc
        return _RM


class VisaTransport:
    """A message-based VISA session (pyvisa + pyvisa-py)."""

    def __init__(self, address: str, resource, settings: TransportSettings) -> None:
        self.address = address
        self._res = resource
        self._settings = settings
        self._lock = threading.RLock()  # one conversation at a time (pyvisa #726)

    @classmethod
    def open(cls, address: str, settings: TransportSettings) -> "VisaTransport":
        import pyvisa

        rm = _resource_manager()
        try:
            res = rm.open_resource(
                address,
                read_termination=settings.read_termination,
                write_termination=settings.write_termination,
                open_timeout=int(settings.open_timeout_s * 1000),  # pyvisa wants ms
            )
            res.timeout = int(settings.timeout_s * 1000)  # pyvisa wants ms
        except pyvisa.errors.VisaIOError as exc:
            raise TransportError(f"{address}: cannot open: {exc.description}") from exc
        except (OSError, ValueError) as exc:
            raise TransportError(f"{address}: cannot open: {exc}") from exc
        return cls(address, res, settings)

    def _call(self, what: str, fn: Callable, timeout_s: float | None):
        import pyvisa
        from pyvisa import constants

        deadline_s = timeout_s if timeout_s is not None else self._settings.timeout_s
        with self._lock:
            old = None
            if timeout_s is not None:
                old = self._res.timeout
                self._res.timeout = int(timeout_s * 1000)  # pyvisa wants ms
            # A watchdog bounds every call: a peer that accepted and then closed the connection
            # can keep a socket read spinning; closing the session ends it.
            aborted = threading.Event()
            watchdog = threading.Timer(deadline_s + _WATCHDOG_GRACE_S, self._abort, args=(aborted,))
            watchdog.daemon = True
            watchdog.start()
            try:
                return fn()
            except pyvisa.errors.VisaIOError as exc:
                if aborted.is_set():
                    raise ReplyTimeoutError(f"{self.address}: no reply to {what!r} within {deadline_s:g} s "
                                            "(connection closed)") from exc
                if exc.error_code == constants.StatusCode.error_timeout:
                    # a late reply must not reach the next query (pyvisa-py #376): the caller
                    # reconnects after a timeout, which drops whatever is still in flight
                    raise ReplyTimeoutError(f"{self.address}: no reply to {what!r} within {deadline_s:g} s") from exc
                raise TransportError(f"{self.address}: {what!r}: {exc.description}") from exc
            except (OSError, EOFError, ValueError, AttributeError, pyvisa.errors.InvalidSession) as exc:
                if aborted.is_set():
                    raise ReplyTimeoutError(f"{self.address}: no reply to {what!r} within {deadline_s:g} s "
                                            "(connection closed)") from exc
                if isinstance(exc, (ValueError, AttributeError)):
                    raise
                raise TransportError(f"{self.address}: {what!r}: connection lost ({exc})") from exc
            finally:
                watchdog.cancel()
                if old is not None and not aborted.is_set():
                    try:
                        self._res.timeout = old
                    except Exception:  # noqa: BLE001 - resource already broken; keep the first error
                        pass

    def _abort(self, flag: threading.Event) -> None:
        flag.set()
        try:
            self._res.close()
        except Exception:  # noqa: BLE001 - the session is being torn down on purpose
            pass

    def _clear_quietly(self) -> None:
        try:
            self._res.clear()
        except Exception:  # noqa: BLE001 - best effort after a timeout; reconnect handles the rest
            pass

    def write(self, text: str) -> None:
        self._call(text, lambda: self._res.write(text), None)

    def read_line(self, timeout_s: float | None = None) -> str:
        return self._call("read", lambda: self._res.read(), timeout_s)

    def query(self, text: str, timeout_s: float | None = None) -> str:
        def run():
            self._res.write(text)
            return self._res.read()

        return self._call(text, run, timeout_s).strip()

    def query_block(self, text: str, timeout_s: float | None = None) -> bytes:
        def run():
            self._res.write(text)
            head = self._res.read_bytes(2, break_on_termchar=False)
            if head[:1] != b"#" or not head[1:2].isdigit():
                rest = self._res.read_raw()
                raise BlockFormatError(f"{self.address}: {text!r}: expected a block, found {(head + rest)[:40]!r}")
            n = int(head[1:2])
            if n == 0:
                raw = head + self._res.read_raw()
                if not raw.endswith(b"\n"):
                    raw += b"\n"
                return parse_block(raw)[0]
            digits = self._res.read_bytes(n, break_on_termchar=False)
            length = int(digits) if digits.isdigit() else -1
            if length < 0:
                raise BlockFormatError(f"{self.address}: {text!r}: bad block length {digits!r}")
            payload = self._res.read_bytes(length, break_on_termchar=False) if length else b""
            payload_block = parse_block(head + digits + payload)[0]
            self._drain_terminator()
            return payload_block

        return self._call(text, run, timeout_s)

    def _drain_terminator(self) -> None:
        """Read the newline most instruments send after a definite block."""
        term = self._settings.read_termination.encode()
        if not term:
            return
        tail = self._res.read_bytes(len(term), break_on_termchar=False)
        if tail != term:
            raise BlockFormatError(f"{self.address}: expected {term!r} after the block, found {tail!r}")

    def clear(self) -> None:
        with self._lock:
            self._clear_quietly()

    def close(self) -> None:
        with self._lock:
            try:
                self._res.close()
            except Exception:  # noqa: BLE001 - closing a dead session must not raise
                pass


# ------------------------------------------------------------------------------------- serial


class SerialTransport:
    """A line-oriented serial connection (pyserial ``serial_for_url``)."""

    def __init__(self, address: str, port, settings: TransportSettings) -> None:
        self.address = address
        self._port = port
        self._settings = settings
        self._lock = threading.RLock()
        self._buffer = bytearray()

    @classmethod
    def open(cls, address: str, settings: TransportSettings) -> "SerialTransport":
        import serial

        kwargs = dict(baudrate=settings.baudrate, timeout=min(settings.timeout_s, 0.1),
                      write_timeout=settings.timeout_s)
        if not address.startswith(("socket://", "loop://", "rfc2217://", "spy://")):
            kwargs["exclusive"] = True  # two processes on one port read garbage (pitfalls: pyserial)
        try:
            port = serial.serial_for_url(address, **kwargs)
        except (serial.SerialException, OSError, ValueError) as exc:
            raise TransportError(f"{address}: cannot open: {exc}") from exc
        return cls(address, port, settings)

    def write(self, text: str) -> None:
        import serial

        data = (text + self._settings.write_termination).encode("ascii")
        with self._lock:
            try:
                self._port.write(data)
                self._port.flush()
            except (serial.SerialException, OSError) as exc:
                raise TransportError(f"{self.address}: writing {text!r}: {exc}") from exc

    def read_line(self, timeout_s: float | None = None, *, what: str = "read") -> str:
        """Read one line, enforcing an overall deadline (pyserial's timeout is per call)."""
        import serial

        term = self._settings.read_termination.encode()
        deadline = time.monotonic() + (timeout_s if timeout_s is not None else self._settings.timeout_s)
        with self._lock:
            while True:
                idx = self._buffer.find(term)
                if idx >= 0:
                    line = bytes(self._buffer[:idx])
                    del self._buffer[: idx + len(term)]
                    return line.decode("ascii", errors="replace").strip("\r")
                if time.monotonic() >= deadline:
                    partial = bytes(self._buffer).decode("ascii", errors="replace")
                    raise ReplyTimeoutError(
                        f"{self.address}: no complete reply to {what!r} within "
                        f"{(timeout_s if timeout_s is not None else self._settings.timeout_s):g} s"
                        + (f" (partial: {partial!r})" if partial else "")
                    )
                try:
                    chunk = self._port.read(max(1, self._port.in_waiting))
                except (serial.SerialException, OSError) as exc:
                    raise TransportError(f"{self.address}: reading reply to {what!r}: {exc}") from exc
                if chunk:
                    self._buffer.extend(chunk)

    def query(self, text: str, timeout_s: float | None = None) -> str:
        with self._lock:
            self.write(text)
            return self.read_line(timeout_s, what=text)

    def query_block(self, text: str, timeout_s: float | None = None) -> bytes:
        raise TransportError(f"{self.address}: binary blocks are not supported on serial line transports")

    def clear(self) -> None:
        with self._lock:
            self._buffer.clear()
            try:
                self._port.reset_input_buffer()
            except Exception:  # noqa: BLE001 - best effort
                pass

    def close(self) -> None:
        with self._lock:
            try:
                self._port.close()
            except Exception:  # noqa: BLE001 - closing a dead port must not raise
                pass


# ------------------------------------------------------------------------------------- tests


class ScriptedTransport:
    """An in-memory transport for tests of command bytes: records writes, answers from a script.

    Parameters
    ----------
    answer : callable
        ``answer(command) -> str | bytes | None``; called for every write. A str is queued as
        a reply line, bytes as a block payload, None queues nothing.
    """

    def __init__(self, answer: Callable[[str], str | bytes | None], address: str = "scripted") -> None:
        self.address = address
        self.sent: list[str] = []
        self._answer = answer
        self._lines: list[str] = []
        self._blocks: list[bytes] = []

    def write(self, text: str) -> None:
        self.sent.append(text)
        reply = self._answer(text)
        if isinstance(reply, bytes):
            self._blocks.append(reply)
        elif reply is not None:
            self._lines.append(reply)

    def read_line(self, timeout_s: float | None = None) -> str:
        if not self._lines:
            raise ReplyTimeoutError(f"{self.address}: no reply queued")
        return self._lines.pop(0)

    def query(self, text: str, timeout_s: float | None = None) -> str:
        self.write(text)
        return self.read_line(timeout_s)

    def query_block(self, text: str, timeout_s: float | None = None) -> bytes:
        self.write(text)
        if not self._blocks:
            raise ReplyTimeoutError(f"{self.address}: no block queued for {text!r}")
        return parse_block(self._blocks.pop(0))[0]

    def clear(self) -> None:
        self._lines.clear()
        self._blocks.clear()

    def close(self) -> None:
        pass
