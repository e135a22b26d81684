"""Transports: the address string picks the wire; drivers only see the text-level interface.

Three layers, each with a narrow interface::

    drivers ─> MessageTransport (bench.framing: lines, IEEE 488.2 blocks, one deadline per reply)
                 └─> ByteTransport (bench.wire: write bytes, read until / read exactly, close)
                       ├─ VisaByteTransport    (bench.visawire: pyvisa, backend "@py")
                       └─ SerialByteTransport  (bench.serialwire: pyserial serial_for_url)

:data:`SCHEMES` is the explicit registry of address schemes; :func:`open_transport` asks it which
wire an address needs, opens that wire and puts the framing on top. :func:`describe_transports`
explains the registry (``bench info``); a scheme whose library is missing is registered as
unavailable, with the command that installs it.

* ``visa``: VISA resource names (``TCPIP::host::port::SOCKET``, ``TCPIP::host::INSTR``,
  ``GPIB0::18::INSTR``, ``USB::...::INSTR``, ``ASRL1::INSTR``) through pyvisa with pyvisa-py;
* ``socket``: ``socket://host:port`` (raw TCP) through pyserial's ``serial_for_url``;
* ``serial-url``: other pyserial URLs (``rfc2217://host:port``, ``loop://``, ...);
* ``serial-port``: device paths (``/dev/ttyUSB0``, ``COM3``), opened with ``exclusive=True``.

Foreign errors are translated into :mod:`bench.errors` inside the wires and the framing, with
``raise ... from exc``. Timeouts are seconds everywhere; pyvisa's milliseconds appear only where
its attributes are set.
"""

from __future__ import annotations

import importlib.util
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Protocol

from bench.errors import TransportError
from bench.framing import MessageTransport, Response
from bench.wire import ByteTransport, ScriptedByteTransport, TransportSettings

__all__ = [
    "ByteTransport",
    "MessageTransport",
    "Response",
    "SCHEMES",
    "Scheme",
    "ScriptedTransport",
    "Transport",
    "TransportSettings",
    "describe_transports",
    "find_scheme",
    "is_visa_address",
    "open_byte_transport",
    "open_transport",
]

_VISA_PREFIX = re.compile(r"^(TCPIP\d*|GPIB\d*|USB\d*|ASRL\d*|VXI\d*|PXI\d*)::", re.IGNORECASE)
_SERIAL_URL = re.compile(r"^(rfc2217|loop|spy|hwgrep|alt)://", re.IGNORECASE)
_SERIAL_PORT = re.compile(r"^(/\S+|COM\d+|\\\\\.\\COM\d+)$", re.IGNORECASE)


class Transport(Protocol):
    """What a driver may do with a connection (:class:`~bench.framing.MessageTransport`)."""

    address: str

    def write(self, text: str) -> None:
        """Send one message (the write terminator is added)."""

    def read_line(self, timeout_s: float | None = None) -> str:
        """One text reply; ``timeout_s`` seconds at most (None: the default deadline)."""

    def query(self, text: str, timeout_s: float | None = None) -> str:
        """Send ``text``, return the reply line."""

    def query_block(self, text: str, timeout_s: float | None = None) -> bytes:
        """Send ``text``, return the data of the IEEE 488.2 block that answers it."""

    def query_response(self, text: str, timeout_s: float | None = None) -> Response:
        """Send ``text``, return the reply whether a block or a line."""

    def clear(self) -> None:
        """Discard whatever is in flight from the instrument."""

    def close(self) -> None:
        """Close the connection."""


def is_visa_address(address: str) -> bool:
    """True when ``address`` is a VISA resource name (``TCPIP::...``, ``GPIB0::...``, ...)."""
    return bool(_VISA_PREFIX.match(address.strip()))


# ------------------------------------------------------------------------------- registry


def _open_visa(address: str, settings: TransportSettings) -> ByteTransport:
    from bench.visawire import VisaByteTransport

    return VisaByteTransport.open(address, settings)


def _open_serial(address: str, settings: TransportSettings) -> ByteTransport:
    from bench.serialwire import SerialByteTransport

    return SerialByteTransport.open(address, settings)


@dataclass(frozen=True)
class Scheme:
    """One kind of address the tool can open.

    Attributes
    ----------
    name : str
        Short name (``visa``, ``socket``, ``serial-url``, ``serial-port``).
    matches : callable
        ``matches(address) -> bool``.
    examples : str
        Addresses of this kind, for messages.
    library : str
        What carries it.
    opener : callable
        ``opener(address, settings) -> ByteTransport``.
    modules : tuple of str
        Python modules it needs.
    install : str
        How to install them.
    """

    name: str
    matches: Callable[[str], bool]
    examples: str
    library: str
    opener: Callable[[str, TransportSettings], ByteTransport]
    modules: tuple[str, ...]
    install: str

    @property
    def missing(self) -> tuple[str, ...]:
        """Modules that are not installed (empty: the scheme is available)."""
        return tuple(m for m in self.modules if importlib.util.find_spec(m) is None)

    def explain(self) -> str:
        """One line: the scheme, its examples, its library and whether it can be used."""
        missing = self.missing
        state = ("available" if not missing
                 else f"unavailable: {', '.join(missing)} not installed ({self.install})")
        return f"{self.name:12s} {self.examples} -> {self.library}: {state}"


SCHEMES: tuple[Scheme, ...] = (
    Scheme("visa", is_visa_address,
           "TCPIP::host::5025::SOCKET, TCPIP::host::INSTR, GPIB0::18::INSTR, USB::..::INSTR, ASRL1::INSTR",
           "pyvisa with the pyvisa-py backend ('@py')", _open_visa, ("pyvisa", "pyvisa_py"),
           "pip install pyvisa pyvisa-py"),
    Scheme("socket", lambda a: a.strip().lower().startswith("socket://"), "socket://host:port",
           "pyserial serial_for_url (raw TCP)", _open_serial, ("serial",), "pip install pyserial"),
    Scheme("serial-url", lambda a: bool(_SERIAL_URL.match(a.strip())),
           "rfc2217://host:port, loop://, spy://, hwgrep://, alt://", "pyserial serial_for_url",
           _open_serial, ("serial",), "pip install pyserial"),
    Scheme("serial-port", lambda a: bool(_SERIAL_PORT.match(a.strip())), "/dev/ttyUSB0, /dev/pts/7, COM3",
           "pyserial serial_for_url (exclusive)", _open_serial, ("serial",), "pip install pyserial"),
)


def find_scheme(address: str, schemes: Sequence[Scheme] = ()) -> Scheme:
    """The registered scheme that serves ``address``.

    Parameters
    ----------
    address : str
        VISA resource name, pyserial URL or device path.
    schemes : sequence of Scheme, optional
        Where to look instead of :data:`SCHEMES`.

    Raises
    ------
    TransportError
        When no scheme serves it, or when the library it needs is not installed.
    """
    schemes = schemes or SCHEMES
    for scheme in schemes:
        if scheme.matches(address):
            missing = scheme.missing
            if missing:
                raise TransportError(f"{address}: the {scheme.name} transport is unavailable: "
                                     f"{', '.join(missing)} not installed ({scheme.install})")
            return scheme
    kinds = "; ".join(f"{s.name}: {s.examples}" for s in schemes)
    raise TransportError(f"{address!r}: no transport for this address (expected one of {kinds})")


def describe_transports() -> list[str]:
    """One line per registered scheme, for ``bench info``."""
    return [scheme.explain() for scheme in SCHEMES]


def open_byte_transport(address: str, settings: TransportSettings | None = None) -> ByteTransport:
    """Open the byte wire ``address`` names (no framing)."""
    settings = settings or TransportSettings()
    return find_scheme(address).opener(address.strip(), settings)


def open_transport(address: str, settings: TransportSettings | None = None) -> MessageTransport:
    """Open ``address`` and return its text-level interface (lines and IEEE 488.2 blocks).

    Parameters
    ----------
    address : str
        VISA resource name, pyserial URL or serial device path (see :data:`SCHEMES`).
    settings : TransportSettings, optional
        Terminators, deadlines (seconds) and baud rate.
    """
    settings = settings or TransportSettings()
    return MessageTransport(open_byte_transport(address, settings), settings)


# ------------------------------------------------------------------------------------- tests


class ScriptedTransport(MessageTransport):
    """The real framing over a scripted wire, for tests of the exact commands a driver sends.

    Parameters
    ----------
    answer : callable
        ``answer(command) -> str | bytes | None``, called for every command written. A str is
        sent back as a line (the read terminator appended), bytes as they are (an IEEE 488.2
        block with its terminator, say), None sends nothing.
    address : str
        Name used in messages.
    settings : TransportSettings, optional
        Terminators and deadlines.

    Attributes
    ----------
    sent : list of str
        Every command written, without its terminator.
    """

    def __init__(self, answer: Callable[[str], str | bytes | None], address: str = "scripted",
                 settings: TransportSettings | None = None) -> None:
        settings = settings or TransportSettings()
        term = settings.read_termination.encode("ascii")

        def raw(command: str) -> bytes | None:
            reply = answer(command)
            return reply.encode("ascii") + term if isinstance(reply, str) else reply

        super().__init__(ScriptedByteTransport(raw, address, settings.write_termination.encode("ascii")),
                         settings)

    @property
    def sent(self) -> list[str]:
        """Every command written, without its terminator."""
        return self.wire.messages
