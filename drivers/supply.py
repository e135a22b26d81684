"""Generic SCPI bench power supply: switches the board under test on and off.

An unattended ambient capture needs the board off; a supply on the bench (``[supply]`` in the
bench file) does it through the SCPI ``OUTPut`` subsystem. Command spellings come from the
profile (``drivers/profiles/scpi-supply.toml``), a frozen model (:class:`SupplyProfile`) read by
:func:`bench.drivers.profile.load_profile`.

Switching sends the output command, reads one error-queue entry (a refused command becomes an
:class:`~bench.errors.InstrumentError` with the supply's code and text), confirms the state with
the output query, then lets the board settle.
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import Field

from bench.drivers.profile import ProfileModel, ProfileTable, Terminator, duration, load_profile, template_with
from bench.errors import InstrumentError
from bench.transports import TransportSettings

__all__ = ["Supply", "SupplyCommands", "SupplyIo", "SupplyProfile", "load_supply_profile"]

class SupplyIo(ProfileTable):
    """``[io]``: line terminators and deadlines (s) of the connection."""

    read_termination: Terminator = "\n"
    write_termination: Terminator = "\n"
    timeout_s: duration() = Field(5.0, alias="timeout")
    open_timeout_s: duration() = Field(5.0, alias="open_timeout")


class SupplyCommands(ProfileTable):
    """``[commands]``: SCPI spellings, and the settle time after switching (s, key ``settle``).

    Attributes
    ----------
    identify, clear_status : str
        Sent when the supply is opened.
    error_query : str
        Reads one error-queue entry ``<code>,"<text>"`` (``0`` when empty); read after switching.
    output_on, output_off, output_query : str
        Switch the output; the query answers ``1``/``ON`` or ``0``/``OFF``.
    settle_s : float
        Wait after switching, before measuring, seconds.
    """

    identify: template_with()
    clear_status: template_with()
    error_query: template_with()
    output_on: template_with()
    output_off: template_with()
    output_query: template_with()
    settle_s: duration(positive=False) = Field(alias="settle")

    def __getitem__(self, key: str) -> str:
        """Mapping-style access by key name (``commands["output_on"]``)."""
        return getattr(self, key)


class SupplyProfile(ProfileModel):
    """A supply profile (``kind = "supply"``), read by :meth:`load` or :func:`load_supply_profile`.

    Attributes
    ----------
    io_table : SupplyIo
        The ``[io]`` table; :attr:`io` gives the transport settings built from it.
    commands : SupplyCommands
        Command spellings and settle time.
    """

    kind: Literal["supply"]
    io_table: SupplyIo = Field(SupplyIo(), alias="io")
    commands: SupplyCommands

    @property
    def io(self) -> TransportSettings:
        """Settings to open the supply's connection."""
        t = self.io_table
        return TransportSettings(timeout_s=t.timeout_s, open_timeout_s=t.open_timeout_s,
                                 read_termination=t.read_termination, write_termination=t.write_termination)

    @property
    def settle_s(self) -> float:
        """Wait after switching, seconds (``[commands] settle``)."""
        return self.commands.settle_s


def load_supply_profile(name_or_path: str | Path, *, base_dir: Path | None = None) -> SupplyProfile:
    """Read a supply profile: built-in name or path (relative to ``base_dir``).

    Raises
    ------
    ConfigError
        One line ``FILE:LINE: key.path: expected ..., found ...``.
    """
    return load_profile(SupplyProfile, name_or_path, base_dir=base_dir)


class Supply:
    """A bench supply reached through an open transport. The constructor does no I/O.

    Parameters
    ----------
    transport : Transport
        Open connection (``bench.transports.open_transport``).
    profile : SupplyProfile
        Command spellings and settle time.
    wait : callable, optional
        ``wait(seconds)`` used for the settle time (the simulator's clock, or time.sleep);
        None waits not at all.
    """

    def __init__(self, transport, profile: SupplyProfile, wait=None) -> None:
        self.transport = transport
        self.profile = profile
        self._wait = wait

    def initialize(self) -> str:
        """Clear the status and return the identification."""
        self.transport.write(self.profile.commands.clear_status)
        return self.transport.query(self.profile.commands.identify)

    def set_output(self, on: bool) -> None:
        """Switch the output, check the error queue, confirm the state, let the board settle."""
        c = self.profile.commands
        command = c.output_on if on else c.output_off
        self.transport.write(command)
        self.check_errors(command)
        state = self.transport.query(c.output_query).strip().upper()
        if state not in (("1", "ON") if on else ("0", "OFF")):
            raise InstrumentError(self.transport.address, c.output_query,
                                  text=f"output should be {'on' if on else 'off'}, supply says {state!r}")
        if self._wait is not None and self.profile.settle_s > 0:
            self._wait(self.profile.settle_s)

    def check_errors(self, command: str) -> None:
        """Read one error-queue entry after ``command``; anything but ``0`` is an InstrumentError.

        The queue was cleared when the supply was opened, so an entry belongs to ``command``.
        """
        code, text = _parse_error(self.transport.query(self.profile.commands.error_query))
        if code != 0:
            raise InstrumentError(self.transport.address, command, code=code, text=text)

    def close(self) -> None:
        """Close the connection (the output stays as it is)."""
        self.transport.close()


def _parse_error(reply: str) -> tuple[int, str]:
    """``-113,"Undefined header"`` -> (-113, 'Undefined header') (SCPI-1999 error queue)."""
    head, _, tail = reply.strip().partition(",")
    try:
        return int(head), tail.strip().strip('"')
    except ValueError:
        return -1, f"unreadable error reply {reply!r}"
