"""A fault-injecting TCP proxy for the simulated bench (loopback only, bounded, threads).

One :class:`DeviceProxy` per instrument listens on ``127.0.0.1`` and relays each client
connection to the instrument's upstream port (a running ``bench sim``). Client bytes go up
unchanged. Upstream bytes are cut into replies - SCPI (an IEEE 488.2 definite-length block
``#<n><length><bytes>`` or a line) or plain lines - and counted per device over all its
connections. When the count reaches the fault's reply number, the fault fires once:

=============  ===========================================================================
drop           both sockets are closed instead of relaying the reply
stall          nothing more is relayed for ``stall_s`` (longer than the client's timeout);
               what arrived meanwhile is then delivered late, if the client is still there
truncate       only the first part of the reply goes out (a line keeps its terminator)
corrupt        one byte is replaced by 0xB5, a non-ASCII byte (in a block: a header byte)
duplicate      a stale copy of the previous reply goes out before the reply
extra          an unsolicited reply goes out before it ("1" from an analyzer, "ok" otherwise)
stage-error    the first ``ok`` line at or after the count becomes an error line
=============  ===========================================================================

Besides relaying, the analyzer proxy keeps every block the simulator really sent (arrival
time, payload), the line proxies every line their instrument sent, and every proxy every
command line the client sent (time, text), so a
campaign can check each stored trace against the simulator's true replies and each stored
pose against the moves the instruments were really told to make.
"""

from __future__ import annotations

import select
import socket
import threading
import time
from dataclasses import dataclass, field

__all__ = ["FAULT_KINDS", "ROLES", "Fault", "ReplyFramer", "DeviceProxy", "FaultProxy", "is_block", "block_payload"]

FAULT_KINDS = ("drop", "stall", "truncate", "corrupt", "duplicate", "extra", "stage-error")

#: The only host the proxy listens on or connects to.
LOOPBACK = "127.0.0.1"
#: Connections one device proxy accepts before refusing more (a bound on threads).
MAX_CONNECTIONS = 64
#: Replies kept back or copied are bounded too (bytes).
MAX_HELD_BYTES = 1 << 24

_NON_ASCII = 0xB5


@dataclass(frozen=True)
class Fault:
    """One fault: its kind, the device whose replies it hits, when, and where in the reply.

    ``at_reply`` counts that device's replies from 1 over all its connections; ``position``
    (0-1) says where a truncation cuts or which byte a corruption replaces.
    """

    kind: str
    device: str
    at_reply: int
    position: float = 0.5
    stall_s: float = 6.0
    error_line: bytes = b"error: injected fault\n"


class ReplyFramer:
    """Cuts a byte stream into complete replies (each with its terminator).

    ``scpi`` mode understands definite-length blocks (``#<n><length><data>`` then ``\\n``);
    ``line`` mode splits on ``\\n`` only.
    """

    def __init__(self, mode: str) -> None:
        self.mode = mode
        self.buffer = bytearray()

    def feed(self, data: bytes) -> list[bytes]:
        """Add bytes; return the replies now complete."""
        self.buffer.extend(data)
        out = []
        while True:
            n = self._complete_length()
            if n is None:
                return out
            out.append(bytes(self.buffer[:n]))
            del self.buffer[:n]

    def _complete_length(self) -> int | None:
        buf = self.buffer
        if self.mode == "scpi" and buf[:1] == b"#":
            if len(buf) < 2 or not chr(buf[1]).isdigit():
                return None if len(buf) < 2 else self._line_length()
            digits = int(chr(buf[1]))
            if digits == 0 or len(buf) < 2 + digits:
                return None if digits else self._line_length()
            size = 2 + digits + int(buf[2:2 + digits])
            if len(buf) < size + 1:
                return None
            return size + 1 if buf[size:size + 1] == b"\n" else size
        return self._line_length()

    def _line_length(self) -> int | None:
        end = self.buffer.find(b"\n")
        return None if end < 0 else end + 1


def is_block(reply: bytes) -> bool:
    """True for an IEEE 488.2 definite-length block reply."""
    return reply[:1] == b"#" and len(reply) > 1 and chr(reply[1]).isdigit() and reply[1:2] != b"0"


def block_payload(reply: bytes) -> bytes:
    """The data bytes of a definite-length block reply."""
    digits = int(chr(reply[1]))
    size = int(reply[2:2 + digits])
    return reply[2 + digits:2 + digits + size]


class DeviceProxy:
    """Relays one instrument's connections and injects at most one fault into its replies.

    Parameters
    ----------
    name : str
        Device name (a fault whose ``device`` differs is ignored).
    upstream_port : int
        The instrument's port on 127.0.0.1.
    mode : str
        'scpi' or 'line' (see :class:`ReplyFramer`).
    fault : Fault, optional
    """

    def __init__(self, name: str, upstream_port: int, mode: str, fault: Fault | None = None) -> None:
        self.name, self.upstream_port, self.mode = name, int(upstream_port), mode
        self.fault = fault if fault is not None and fault.device == name else None
        self.replies = 0
        self.fired_at: float | None = None
        self.blocks: list[tuple[float, bytes]] = []   # (arrival time, payload) as the instrument sent them
        self.commands: list[tuple[float, str]] = []   # (time, line) as the client sent them
        self.lines: list[tuple[float, str]] = []      # (arrival time, line) as a line instrument sent them
        self.connections = 0
        self._lock = threading.Lock()
        self._links: list[_Link] = []
        self._stop = threading.Event()
        self._server: socket.socket | None = None
        self.port: int | None = None

    def start(self) -> int:
        """Listen on 127.0.0.1 (ephemeral port) and accept in a daemon thread; returns the port."""
        self._server = socket.create_server((LOOPBACK, 0))
        self._server.settimeout(0.2)
        self.port = self._server.getsockname()[1]
        threading.Thread(target=self._accept_loop, name=f"proxy-{self.name}", daemon=True).start()
        return self.port

    def stop(self) -> None:
        """Stop accepting and close every relayed connection."""
        self._stop.set()
        if self._server is not None:
            self._server.close()
        with self._lock:
            links = list(self._links)
        for link in links:
            link.close()

    def _accept_loop(self) -> None:
        while not self._stop.is_set():
            try:
                client, _ = self._server.accept()
            except (socket.timeout, OSError):
                continue
            with self._lock:
                self.connections += 1
                full = self.connections > MAX_CONNECTIONS
            if full:
                client.close()
                continue
            try:
                link = _Link(self, client)
            except OSError:
                client.close()  # the instrument is not there: the client sees a closed connection
                continue
            with self._lock:
                self._links.append(link)
            link.start()

    def decide(self, reply: bytes) -> Fault | None:
        """Count a reply from the instrument; the fault to apply to it now, if any (once)."""
        with self._lock:
            self.replies += 1
            if self.mode == "scpi" and is_block(reply):
                self.blocks.append((time.time(), block_payload(reply)))
            elif self.mode == "line":
                self.lines.append((time.time(), reply.decode("ascii", "replace").strip()))
            f = self.fault
            if f is None or self.fired_at is not None or self.replies < f.at_reply:
                return None
            if f.kind == "stage-error" and not reply.lstrip().startswith(b"ok"):
                return None
            if f.kind != "stage-error" and self.replies != f.at_reply:
                return None
            self.fired_at = time.time()
            return f

    def record_command(self, line: str) -> None:
        """Keep a command line the client sent (with the time it was relayed)."""
        with self._lock:
            self.commands.append((time.time(), line))


class _Link:
    """One client connection relayed to one upstream connection (two daemon threads)."""

    def __init__(self, proxy: DeviceProxy, client: socket.socket) -> None:
        self.proxy = proxy
        self.client = client
        self.upstream = socket.create_connection((LOOPBACK, proxy.upstream_port), timeout=5.0)
        for s in (self.client, self.upstream):
            s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.upstream.settimeout(None)
        self.framer = ReplyFramer(proxy.mode)
        self.previous: bytes | None = None
        self.held = bytearray()
        self.stall_until: float | None = None
        self.closed = threading.Event()

    def start(self) -> None:
        threading.Thread(target=self._up, daemon=True, name=f"{self.proxy.name}-up").start()
        threading.Thread(target=self._down, daemon=True, name=f"{self.proxy.name}-down").start()

    def close(self) -> None:
        if self.closed.is_set():
            return
        self.closed.set()
        for s in (self.client, self.upstream):
            try:
                s.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
            s.close()

    def _up(self) -> None:
        """Client -> instrument, unchanged; every client line is recorded."""
        pending = b""
        try:
            while not self.closed.is_set():
                data = self.client.recv(65536)
                if not data:
                    break
                self.upstream.sendall(data)
                pending += data  # recorded once the instrument has been sent the line
                *lines, pending = pending.split(b"\n")
                for line in lines:
                    self.proxy.record_command(line.decode("ascii", "replace").strip())
        except OSError:
            pass
        self.close()

    def _down(self) -> None:
        """Instrument -> client, reply by reply, through the fault (and a stall's release)."""
        try:
            while not self.closed.is_set():
                self._release_if_due()
                if not select.select([self.upstream], [], [], 0.05)[0]:
                    continue
                data = self.upstream.recv(65536)
                if not data:
                    break
                for reply in self.framer.feed(data):
                    if not self._relay(reply):
                        return
        except OSError:
            pass
        self.close()

    def _release_if_due(self) -> None:
        if self.stall_until is not None and time.monotonic() >= self.stall_until:
            self.stall_until = None
            held, self.held = bytes(self.held), bytearray()
            if held:
                self.client.sendall(held)

    def _relay(self, reply: bytes) -> bool:
        """Relay one reply, applying the fault if it fires now; False once the link is closed."""
        fault = self.proxy.decide(reply)
        if self.stall_until is not None:
            if len(self.held) + len(reply) <= MAX_HELD_BYTES:
                self.held.extend(reply)
            return True
        if fault is None:
            out = reply
        elif fault.kind == "drop":
            self.close()
            return False
        elif fault.kind == "stall":
            self.stall_until = time.monotonic() + fault.stall_s
            self.held.extend(reply)
            return True
        else:
            out = _faulty(fault, reply, self.previous, self.proxy.mode)
        self.client.sendall(out)
        self.previous = reply
        return True


def _faulty(fault: Fault, reply: bytes, previous: bytes | None, mode: str) -> bytes:
    """The bytes sent instead of ``reply`` for a truncate, corrupt, duplicate, extra or error fault."""
    if fault.kind == "truncate":
        if is_block(reply):
            head = 2 + int(chr(reply[1]))
            return reply[:head + int((len(reply) - head - 1) * fault.position)]
        text = reply.rstrip(b"\r\n")
        return text[:min(max(1, int(len(text) * fault.position)), max(0, len(text) - 1))] + b"\n"
    if fault.kind == "corrupt":
        span = 2 + int(chr(reply[1])) if is_block(reply) else len(reply.rstrip(b"\r\n"))
        i = min(int(span * fault.position), max(0, span - 1))
        return reply[:i] + bytes([_NON_ASCII]) + reply[i + 1:]
    if fault.kind == "duplicate":
        return (previous if previous is not None else reply) + reply
    if fault.kind == "extra":
        return (b"1\n" if mode == "scpi" else b"ok\n") + reply
    if fault.kind == "stage-error":
        return fault.error_line
    raise ValueError(f"unknown fault kind {fault.kind!r}")


#: Role -> (device proxy name, reply framing); the mast and the turntable share one port.
ROLES = {"analyzer": ("analyzer", "scpi"), "supply": ("supply", "scpi"), "stage": ("stage", "line"),
         "mast": ("positioner", "line"), "turntable": ("positioner", "line")}


def _port_of(address: str) -> int:
    """The port of a loopback address printed by ``bench sim`` (refuses any other host)."""
    if address.startswith("TCPIP::"):
        _, host, port, _ = address.split("::")
    elif address.startswith("socket://"):
        host, _, port = address[len("socket://"):].partition(":")
    else:
        raise ValueError(f"not a TCP address: {address!r}")
    if host != LOOPBACK:
        raise ValueError(f"the proxy relays loopback only, found {host!r}")
    return int(port)


@dataclass
class FaultProxy:
    """Proxies for every TCP instrument of a ``bench sim``; at most one of them injects the fault.

    ``sim_addresses`` is role -> address as ``bench sim`` prints them.
    """

    sim_addresses: dict
    fault: Fault | None = None
    devices: dict = field(default_factory=dict)

    def start(self) -> dict:
        """Start the device proxies; role -> address for a bench file."""
        out = {}
        for role, (name, mode) in ROLES.items():
            if name not in self.devices:
                self.devices[name] = DeviceProxy(name, _port_of(self.sim_addresses[role]), mode, self.fault)
                self.devices[name].start()
            port = self.devices[name].port
            out[role] = (f"TCPIP::{LOOPBACK}::{port}::SOCKET" if mode == "scpi" else f"socket://{LOOPBACK}:{port}")
        return out

    def stop(self) -> None:
        """Stop every device proxy and close their connections."""
        for device in self.devices.values():
            device.stop()

    @property
    def fired_at(self) -> float | None:
        """Wall-clock time the fault fired (None: not yet, or no fault)."""
        times = [d.fired_at for d in self.devices.values() if d.fired_at is not None]
        return min(times) if times else None

    def replies(self) -> dict:
        """Replies relayed so far, per device."""
        return {name: d.replies for name, d in self.devices.items()}
