"""VISA resources as byte wires: pyvisa with the pure-Python pyvisa-py backend, named explicitly.

* One ``ResourceManager("@py")`` per process: without the name pyvisa may pick a vendor library.
* The resource opens with the profile's terminators, ``timeout`` and ``open_timeout``: a raw
  ``SOCKET`` resource has no read terminator by default and every read would time out.
* Seconds everywhere; pyvisa's milliseconds appear only where its attributes are set.
* A watchdog bounds every call: a peer that accepted and then went away can keep a socket read
  spinning; the watchdog closes the session, and the call ends as a :class:`ReplyTimeoutError`.
* pyvisa-py hands back what it has when a socket pauses for a while, as if the message had
  ended; :meth:`VisaByteTransport.read_until` keeps reading until the terminator arrives.
* ``VisaIOError``, ``OSError`` and friends become :mod:`bench.errors` exceptions here.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from typing import Any

from bench.errors import ReplyTimeoutError, TransportError
from bench.wire import TransportSettings, reply_timeout

__all__ = ["VisaByteTransport", "resource_manager"]

_RM_LOCK = threading.Lock()
_RM: Any = None
_WATCHDOG_GRACE_S = 2.0  # beyond the deadline before a stuck VISA call is cut off
_CHUNK_BYTES = 1 << 16


def _ms(seconds: float) -> int:
    """pyvisa's timeouts are integer milliseconds (the only place they appear)."""
    return max(1, int(round(seconds * 1000.0)))


def resource_manager() -> Any:
    """The process's pyvisa ResourceManager, pure-Python backend named explicitly (``"@py"``)."""
    global _RM
    with _RM_LOCK:
        if _RM is None:
            try:
                import pyvisa
            except ImportError as exc:
                raise TransportError(f"pyvisa is not installed ({exc}); pip install pyvisa pyvisa-py") from exc
            try:
                _RM = pyvisa.ResourceManager("@py")
            except (OSError, ValueError) as exc:
                raise TransportError(f"cannot start the pyvisa-py backend: {exc}; pip install pyvisa-py") from exc
        return _RM


class _Watchdog:
    """One thread per session that runs ``expire()`` when a call overruns its deadline.

    Cheaper than a timer thread per call: :meth:`arm` and :meth:`disarm` only move a deadline.
    """

    def __init__(self, expire: Callable[[], None]) -> None:
        self._expire = expire
        self._cond = threading.Condition()
        self._deadline: float | None = None
        self._thread: threading.Thread | None = None
        self._stopped = False
        self.fired = False

    def arm(self, seconds: float) -> None:
        """Expire ``seconds`` from now unless disarmed first."""
        with self._cond:
            self._deadline = time.monotonic() + seconds
            self.fired = False
            if self._thread is None:
                self._thread = threading.Thread(target=self._run, name="visa-watchdog", daemon=True)
                self._thread.start()
            self._cond.notify()

    def disarm(self) -> None:
        """The call ended in time."""
        with self._cond:
            self._deadline = None

    def stop(self) -> None:
        """End the thread (the session is closed)."""
        with self._cond:
            self._stopped = True
            self._cond.notify()

    def _run(self) -> None:
        while self._wait_for_expiry():
            self._expire()

    def _wait_for_expiry(self) -> bool:
        with self._cond:
            while not self._stopped:
                if self._deadline is None:
                    self._cond.wait()
                    continue
                remaining_s = self._deadline - time.monotonic()
                if remaining_s > 0:
                    self._cond.wait(remaining_s)
                    continue
                self._deadline, self.fired = None, True
                return True
            return False


class VisaByteTransport:
    """A message-based VISA session as a :class:`~bench.wire.ByteTransport`.

    Parameters
    ----------
    address : str
        The VISA resource name.
    resource : pyvisa.resources.MessageBasedResource
        The open session. The constructor does no I/O: use :meth:`open`.
    settings : TransportSettings
        Terminators and deadlines it was opened with.
    """

    def __init__(self, address: str, resource: Any, settings: TransportSettings) -> None:
        self.address = address
        self._res = resource
        self._settings = settings
        self._timeout_ms: int | None = None
        self._lock = threading.RLock()  # one call at a time (pyvisa #726)
        self._watchdog = _Watchdog(self._abort)

    @classmethod
    def open(cls, address: str, settings: TransportSettings) -> VisaByteTransport:
        """Open ``address`` with the terminators and deadlines of ``settings``."""
        import pyvisa

        rm = resource_manager()
        try:
            res = rm.open_resource(address, read_termination=settings.read_termination,
                                   write_termination=settings.write_termination,
                                   open_timeout=_ms(settings.open_timeout_s))
            res.timeout = _ms(settings.timeout_s)
        except pyvisa.errors.VisaIOError as exc:
            raise TransportError(f"{address}: cannot open: {exc.description}") from exc
        except (OSError, ValueError) as exc:
            raise TransportError(f"{address}: cannot open: {exc}") from exc
        return cls(address, res, settings)

    # ------------------------------------------------------------------ the byte interface
    def write(self, data: bytes, timeout_s: float) -> None:
        """Send all of ``data`` (``write_raw``: no terminator is added)."""
        self._call("write", lambda: self._res.write_raw(data), timeout_s)

    def read_until(self, terminator: bytes, timeout_s: float) -> bytes:
        """Bytes up to and including ``terminator``; with an empty terminator, one message (END)."""
        deadline = time.monotonic() + timeout_s
        self._use_termination(terminator)
        data = bytearray()
        while True:
            remaining_s = deadline - time.monotonic()
            if remaining_s <= 0:
                raise reply_timeout(self.address, f"no {terminator!r}", timeout_s, bytes(data))
            data.extend(self._read("read", self._res.read_raw, remaining_s, data))
            if not terminator or data.endswith(terminator):
                return bytes(data)

    def read_exact(self, count: int, timeout_s: float) -> bytes:
        """Exactly ``count`` bytes, terminator characters included (they may be data)."""
        if count <= 0:
            return b""
        return self._read(f"{count} bytes", lambda: self._res.read_bytes(
            count, chunk_size=_CHUNK_BYTES, break_on_termchar=False), timeout_s, b"")

    def clear(self) -> None:
        """VISA device clear (pyvisa-py drops what is buffered and drains the socket)."""
        with self._lock:
            try:
                self._res.clear()
            except Exception:  # noqa: BLE001 - best effort; a reconnect handles the rest
                pass

    def close(self) -> None:
        """Close the session (never raises)."""
        with self._lock:
            self._watchdog.stop()
            try:
                self._res.close()
            except Exception:  # noqa: BLE001 - closing a dead session must not raise
                pass

    # ------------------------------------------------------------------ helpers
    def _use_termination(self, terminator: bytes) -> None:
        wanted = terminator.decode("ascii")
        if wanted != self._res.read_termination:
            self._call("set terminator", lambda: setattr(self._res, "read_termination", wanted or None),
                       self._settings.timeout_s)

    def _read(self, what: str, fn: Callable[[], bytes], timeout_s: float, so_far: bytes) -> bytes:
        try:
            return bytes(self._call(what, fn, timeout_s))
        except ReplyTimeoutError as exc:
            raise reply_timeout(self.address, f"no {what}", timeout_s, bytes(so_far)) from exc

    def _call(self, what: str, fn: Callable[[], Any], timeout_s: float) -> Any:
        """Run one pyvisa call under the lock, a deadline and the watchdog; translate its errors."""
        import pyvisa

        with self._lock:
            try:
                self._set_timeout(timeout_s)
                self._watchdog.arm(timeout_s + _WATCHDOG_GRACE_S)
                return fn()
            except pyvisa.errors.VisaIOError as exc:
                raise self._translate(what, timeout_s, exc) from exc
            except (OSError, EOFError, pyvisa.errors.InvalidSession) as exc:
                raise self._translate(what, timeout_s, exc) from exc
            except (ValueError, AttributeError) as exc:
                if not self._watchdog.fired:
                    raise  # a programming error, not a wire fault
                raise self._translate(what, timeout_s, exc) from exc
            finally:
                self._watchdog.disarm()

    def _set_timeout(self, timeout_s: float) -> None:
        ms = _ms(timeout_s)
        if ms != self._timeout_ms:
            self._res.timeout = ms  # pyvisa wants ms
            self._timeout_ms = ms

    def _translate(self, what: str, timeout_s: float, exc: Exception) -> TransportError:
        from pyvisa import constants

        if self._watchdog.fired:
            return ReplyTimeoutError(f"{self.address}: {what}: no answer within {timeout_s:g} s "
                                     "(connection closed)")
        code = getattr(exc, "error_code", None)
        if code == constants.StatusCode.error_timeout:
            return ReplyTimeoutError(f"{self.address}: {what}: no answer within {timeout_s:g} s")
        detail = getattr(exc, "description", None) or f"connection lost ({exc})"
        return TransportError(f"{self.address}: {what}: {detail}")

    def _abort(self) -> None:
        """The watchdog's action: close the session, which ends the stuck call."""
        try:
            self._res.close()
        except Exception:  # noqa: BLE001 - the session is being torn down on purpose
            pass
