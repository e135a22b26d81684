"""Serving a line-oriented simulated device on loopback TCP and on a pseudo-terminal.

A *line engine* is any object with ``banner_lines() -> list[str]``, ``count_bytes(n)`` and
``handle(line, emit)``; :class:`LineEngine` gives the first two and the "silent controller" fault
gate. The simulated stage (G-code) and the simulated mast and turntable are line engines.
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

__all__ = ["LineEngine", "TcpLineServer", "PtyLineServer"]


class LineEngine:
    """Shared server-side behaviour of the simulated line devices.

    Subclasses set ``banner`` (str or None), ``received`` (list of lines), ``bytes_received``,
    ``faults`` (with ``silent_after_commands``) and ``_lock``.
    """

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
        engine = server.engine
        conn: socket.socket = self.request
        # reply lines go out as separate small writes ("BUSY 1", then "ok"): without this,
        # Nagle's algorithm holds the second one until the client's delayed ACK (~40 ms)
        conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        server.track(conn, True)

        def emit(text: str) -> None:
            conn.sendall((text + "\n").encode("ascii"))

        buffer = bytearray()
        try:
            # Boot time before the banner: pyserial's socket:// drains the input once right
            # after connecting, which would eat a banner sent at once; a board that resets when
            # the port opens also prints its banner only after booting (reference sheet §10).
            time.sleep(server.boot_delay_s)
            for line in engine.banner_lines():
                emit(line)
            while True:
                chunk = conn.recv(4096)
                if not chunk:
                    return
                engine.count_bytes(len(chunk))
                buffer.extend(chunk)
                for line in _split_lines(buffer):
                    engine.handle(line, emit)
        except OSError:
            return  # the client went away
        finally:
            server.track(conn, False)


class _TcpServer(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True

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
    """Serve a line device (anything with ``banner_lines``, ``handle``, ``count_bytes``) on TCP.

    Parameters
    ----------
    engine : object
        The simulated device.
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


class PtyLineServer:
    """Serve a line device on a pseudo-terminal; clients open :attr:`path` as a serial port.

    The master side runs in packet mode (``TIOCPKT``) so the server learns when the client
    flushes its input queue, which pyserial does on open; the banner is then sent again.
    """

    def __init__(self, engine) -> None:
        self.engine = engine
        self.path: str | None = None
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
        self._send_banner()
        self._thread = threading.Thread(target=self._serve, name="sim-pty", daemon=True)
        self._thread.start()
        return self.path

    def _emit(self, text: str) -> None:
        with self._write_lock:
            os.write(self._master, (text + "\n").encode("ascii"))

    def _send_banner(self) -> None:
        for line in self.engine.banner_lines():
            self._emit(line)

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
                self.engine.count_bytes(len(packet) - 1)
                buffer.extend(packet[1:])
                for line in _split_lines(buffer):
                    self.engine.handle(line, self._emit)
            elif packet[0] & termios.TIOCPKT_FLUSHREAD:
                buffer.clear()
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
