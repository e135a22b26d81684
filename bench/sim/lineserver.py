"""Serving a line-oriented simulated device on loopback TCP and on a pseudo-terminal.

One helper serves every line dialect of the simulated bench: the stage's G-code, the mast and
turntable's line protocol and the analyzer's and supply's SCPI all go through
:class:`TcpLineServer` and :class:`PtyLineServer`.

A *line engine* has ``open_session()``, called once per connection (it may raise
:class:`RefuseConnection`; a shared device returns itself), and the session it returns has
``banner_lines() -> list[str]``, ``count_bytes(n)`` and ``handle(line, emit)``. ``emit`` sends a
text line (``str``, the server adds ``\\n``) or raw bytes (``bytes``, sent as they are: an SCPI
reply with its own terminator, perhaps an IEEE 488.2 block). ``handle`` may raise
:class:`DropConnection` (the server resets the connection) or :class:`HangConnection` (the
server stops answering on it). :class:`LineEngine` gives ``open_session``, ``banner_lines``,
``count_bytes`` and the "silent controller" fault gate to the stage and the positioners.

Lines end at LF or CR; empty lines are ignored and surrounding blanks stripped.
"""

from __future__ import annotations

import os
import re
import select
import socket
import socketserver
import struct
import threading
import time
import tty

__all__ = ["DropConnection", "HangConnection", "LineEngine", "PtyLineServer", "RefuseConnection",
           "TcpLineServer"]


class DropConnection(Exception):
    """Raised by a session's ``handle`` to make the server reset the connection without a reply."""


class HangConnection(Exception):
    """Raised by a session's ``handle`` to make the server stop answering on this connection."""


class RefuseConnection(Exception):
    """Raised by ``open_session`` to make the server reset a new connection at once."""


class LineEngine:
    """Shared server-side behaviour of the simulated line devices.

    Subclasses set ``banner`` (str or None), ``received`` (list of lines), ``bytes_received``,
    ``faults`` (with ``silent_after_commands``) and ``_lock``.
    """

    def open_session(self) -> LineEngine:
        """The session serving one connection: the device itself, shared by every client."""
        return self

    def banner_lines(self) -> list[str]:
        """Lines sent when a client connects."""
        return [self.banner] if self.banner else []

    def count_bytes(self, n: int) -> None:
        """Account for ``n`` bytes received from a client."""
        with self._lock:
            self.bytes_received += n

    def _record(self, line: str) -> bool:
        """Log a received line (caller holds the lock); False when the device plays dead."""
        self.received.append(line)
        limit = self.faults.silent_after_commands
        return not (limit is not None and len(self.received) > limit)


# ---------------------------------------------------------------------------------- servers


def _split_lines(buffer: bytearray) -> list[str]:
    """Remove complete lines (ended by LF or CR) from ``buffer`` and return them, non-empty."""
    lines = []
    while True:
        match = re.search(rb"[\r\n]", buffer)
        if not match:
            return lines
        raw = bytes(buffer[: match.start()])
        del buffer[: match.end()]
        text = raw.decode("ascii", errors="replace").strip()
        if text:
            lines.append(text)


class _Handler(socketserver.BaseRequestHandler):
    def handle(self) -> None:
        server: _TcpServer = self.server  # type: ignore[assignment]
        conn: socket.socket = self.request
        server.track(conn, True)
        try:
            try:
                session = server.engine.open_session()
            except RefuseConnection:
                _reset(conn)
                return
            # reply lines go out as separate small writes ("BUSY 1", then "ok"): without this,
            # Nagle's algorithm holds the second one until the client's delayed ACK (~40 ms)
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            self._serve(session, conn, server.boot_delay_s)
        except OSError:
            return  # the client went away
        finally:
            server.track(conn, False)

    @staticmethod
    def _serve(session, conn: socket.socket, boot_delay_s: float) -> None:
        emit = _emitter(conn.sendall)
        # Boot time before the banner: pyserial's socket:// drains the input once right
        # after connecting, which would eat a banner sent at once; a board that resets when
        # the port opens also prints its banner only after booting (common practice).
        time.sleep(boot_delay_s)
        for line in session.banner_lines():
            emit(line)
        buffer = bytearray()
        while True:
            chunk = conn.recv(4096)
            if not chunk:
                return
            session.count_bytes(len(chunk))
            buffer.extend(chunk)
            for line in _split_lines(buffer):
                try:
                    session.handle(line, emit)
                except DropConnection:
                    _reset(conn)
                    return
                except HangConnection:
                    while conn.recv(4096):
                        pass  # read and ignore until the client closes
                    return


def _emitter(send):
    """``emit(str | bytes)``: a text line gets ``\\n`` appended, bytes go out as they are."""
    def emit(reply: str | bytes) -> None:
        send(reply if isinstance(reply, bytes) else (reply + "\n").encode("ascii"))
    return emit


def _reset(conn: socket.socket) -> None:
    """Close with RST (linger 0), as an instrument that dropped off the network would look."""
    try:
        conn.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    except OSError:
        pass
    conn.close()


class _TcpServer(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True
    block_on_close = False

    def __init__(self, address, engine, boot_delay_s: float) -> None:
        self.engine = engine
        self.boot_delay_s = boot_delay_s
        self._connections: set[socket.socket] = set()
        self._conn_lock = threading.Lock()
        super().__init__(address, _Handler)

    def track(self, conn: socket.socket, alive: bool) -> None:
        with self._conn_lock:
            (self._connections.add if alive else self._connections.discard)(conn)

    def drop_connections(self) -> None:
        with self._conn_lock:
            for conn in list(self._connections):
                try:
                    conn.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass


class TcpLineServer:
    """Serve a line engine on TCP: one session per connection (see the module docstring).

    Parameters
    ----------
    engine : object
        The simulated device (``open_session()``).
    host : str
        Loopback address to bind.
    port : int
        0 picks a free port.
    boot_delay_s : float
        Wall-clock wait between accepting a connection and sending the banner, seconds.
    """

    def __init__(self, engine, host: str = "127.0.0.1", port: int = 0, boot_delay_s: float = 0.25) -> None:
        self.engine = engine
        self.boot_delay_s = boot_delay_s
        self.host = host
        self.port = port
        self._server: _TcpServer | None = None
        self._thread: threading.Thread | None = None

    @property
    def url(self) -> str:
        """pyserial URL of the server, ``socket://127.0.0.1:<port>``."""
        return f"socket://{self.host}:{self.port}"

    def start(self) -> int:
        """Bind, serve in a daemon thread, and return the port."""
        self._server = _TcpServer((self.host, self.port), self.engine, self.boot_delay_s)
        self.port = self._server.server_address[1]
        self._thread = threading.Thread(target=self._server.serve_forever, kwargs={"poll_interval": 0.05},
                                        name=f"sim-tcp-{self.port}", daemon=True)
        self._thread.start()
        return self.port

    def stop(self) -> None:
        """Stop serving and drop open connections."""
        if self._server is None:
            return
        self._server.shutdown()
        self._server.drop_connections()
        self._server.server_close()
        self._thread.join()
        self._server = None

    def __enter__(self) -> TcpLineServer:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()


class PtyLineServer:
    """Serve a line device on a pseudo-terminal; clients open :attr:`path` as a serial port.

    The master side runs in packet mode (``TIOCPKT``) so the server learns when the client
    flushes its input queue, which pyserial does on open; the banner is then sent again. One
    session serves the port. After :class:`DropConnection` or :class:`HangConnection` (a line
    cannot be reset) the device stays silent until the client opens the port again.
    """

    def __init__(self, engine) -> None:
        self.engine = engine
        self.path: str | None = None
        self._session = None
        self._silent = False
        self._master = self._slave = -1
        self._stop_r = self._stop_w = -1
        self._thread: threading.Thread | None = None
        self._write_lock = threading.Lock()

    def start(self) -> str:
        """Create the pty, send the banner, serve in a daemon thread; return the device path."""
        import fcntl
        import termios

        self._master, self._slave = os.openpty()
        tty.setraw(self._slave)
        fcntl.ioctl(self._master, termios.TIOCPKT, struct.pack("i", 1))
        self.path = os.ttyname(self._slave)
        self._stop_r, self._stop_w = os.pipe()
        self._session = self.engine.open_session()
        self._send_banner()
        self._thread = threading.Thread(target=self._serve, name="sim-pty", daemon=True)
        self._thread.start()
        return self.path

    def _emit(self, reply: str | bytes) -> None:
        data = reply if isinstance(reply, bytes) else (reply + "\n").encode("ascii")
        with self._write_lock:
            while data:
                data = data[os.write(self._master, data):]

    def _send_banner(self) -> None:
        for line in self._session.banner_lines():
            self._emit(line)

    def _lines(self, lines: list[str]) -> None:
        for line in lines:
            if self._silent:
                return
            try:
                self._session.handle(line, self._emit)
            except (DropConnection, HangConnection):
                self._silent = True

    def _serve(self) -> None:
        import termios

        buffer = bytearray()
        while True:
            ready, _, _ = select.select([self._master, self._stop_r], [], [])
            if self._stop_r in ready:
                return
            try:
                packet = os.read(self._master, 4096)
            except OSError:
                return
            if not packet:
                continue
            if packet[0] == termios.TIOCPKT_DATA:
                self._session.count_bytes(len(packet) - 1)
                buffer.extend(packet[1:])
                self._lines(_split_lines(buffer))
            elif packet[0] & termios.TIOCPKT_FLUSHREAD:
                buffer.clear()
                self._silent = False
                self._send_banner()  # the client opened (or cleared) the port

    def stop(self) -> None:
        """Stop the thread and close the pty."""
        if self._thread is None:
            return
        os.write(self._stop_w, b"x")
        self._thread.join()
        for fd in (self._master, self._slave, self._stop_r, self._stop_w):
            os.close(fd)
        self._thread = None
