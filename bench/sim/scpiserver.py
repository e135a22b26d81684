"""Serving a simulated SCPI instrument on loopback TCP (and on a pseudo-terminal).

The instrument is a line engine of :mod:`bench.sim.lineserver`, the helper that serves every
line dialect of the simulated bench: one program message per line (``\\n``, ``\\r\\n``
accepted), the reply written as the instrument produced it (text ending in ``\\n``, or an
IEEE 488.2 block followed by ``\\n``). A driver reaches it as a VISA resource
(``TCPIP::127.0.0.1::<port>::SOCKET``) or as a pyserial URL (``socket://127.0.0.1:<port>``).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from bench.sim.lineserver import PtyLineServer, TcpLineServer

__all__ = ["ScpiLineEngine", "ScpiServer", "serve_scpi_pty"]


class _ScpiSession:
    """One connection to an SCPI instrument: lines in, the instrument's replies out."""

    def __init__(self, handler: Any) -> None:
        self._handler = handler

    def banner_lines(self) -> list[str]:
        """None: an SCPI instrument speaks only when asked."""
        return []  # an SCPI instrument speaks only when asked

    def count_bytes(self, n: int) -> None:
        """Not counted for SCPI instruments."""

    def handle(self, line: str, emit: Callable[[str | bytes], None]) -> None:
        """Execute one program message and send the reply, if any."""
        reply = self._handler.handle_line(line)
        if reply:
            emit(reply)


class ScpiLineEngine:
    """A line engine over an SCPI handler factory.

    Parameters
    ----------
    handler_factory : callable
        Called once per connection; returns an object with ``handle_line(str) -> bytes | None``
        (for a shared instrument: ``instrument.open_session``). May raise
        :class:`~bench.sim.lineserver.RefuseConnection`.
    """

    def __init__(self, handler_factory: Callable[[], Any]) -> None:
        self._factory = handler_factory

    def open_session(self) -> _ScpiSession:
        """The session of one new connection."""
        return _ScpiSession(self._factory())


class ScpiServer(TcpLineServer):
    """Serve an instrument on a loopback TCP port, one command line at a time.

    Parameters
    ----------
    handler_factory : callable
        See :class:`ScpiLineEngine`.
    host : str
        Address to bind.
    port : int
        0 picks a free port.
    """

    def __init__(self, handler_factory: Callable[[], Any], host: str = "127.0.0.1",
                 port: int = 0) -> None:
        super().__init__(ScpiLineEngine(handler_factory), host=host, port=port, boot_delay_s=0.0)

    @property
    def resource(self) -> str:
        """VISA resource string, ``TCPIP::<host>::<port>::SOCKET``."""
        return f"TCPIP::{self.host}::{self.port}::SOCKET"


def serve_scpi_pty(handler_factory: Callable[[], Any]) -> PtyLineServer:
    """Serve an instrument on a pseudo-terminal (a serial SCPI instrument); started.

    Returns
    -------
    PtyLineServer
        Its ``path`` is the device path a client opens as a serial port.
    """
    server = PtyLineServer(ScpiLineEngine(handler_factory))
    server.start()
    return server
