"""Generic SCPI bench power supply: switches the board under test on and off.

An unattended ambient capture needs the board off; a supply on the bench (``[supply]`` in the
bench file) does it through the SCPI ``OUTPut`` subsystem. Command spellings come from the
profile (``drivers/profiles/scpi-supply.toml``).
"""

from __future__ import annotations

from pathlib import Path

from bench import units
from bench.drivers.profile import load_profile_data
from bench.errors import ConfigError, InstrumentError
from bench.transports import TransportSettings

__all__ = ["Supply", "SupplyProfile", "load_supply_profile"]

_COMMANDS = ("identify", "clear_status", "error_query", "output_on", "output_off", "output_query", "settle")


class SupplyProfile:
    """Validated supply profile: transport settings, commands, settle time in seconds."""

    def __init__(self, name: str, origin: str, io: TransportSettings, commands: dict, settle_s: float) -> None:
        self.name = name
        self.origin = origin
        self.io = io
        self.commands = commands
        self.settle_s = settle_s


def load_supply_profile(name_or_path: str | Path, *, base_dir: Path | None = None) -> SupplyProfile:
    data, origin = load_profile_data(name_or_path, base_dir=base_dir)
    if data.get("kind") != "supply":
        raise ConfigError(f"expected kind = \"supply\", found {data.get('kind')!r}", file=origin, key="kind")
    commands = data.get("commands", {})
    for key in _COMMANDS:
        if key not in commands:
            raise ConfigError(f"missing command {key!r}", file=origin, key=f"commands.{key}")
    io = data.get("io", {})
    try:
        settings = TransportSettings(timeout_s=units.parse(io.get("timeout", "5 s"), "time"),
                                     open_timeout_s=units.parse(io.get("open_timeout", "5 s"), "time"),
                                     read_termination=io.get("read_termination", "\n"),
                                     write_termination=io.get("write_termination", "\n"))
        settle_s = units.parse(commands["settle"], "time")
    except ConfigError as exc:
        raise ConfigError(exc.message, file=origin, key="io / commands.settle") from None
    return SupplyProfile(str(data.get("name", "")), origin, settings, dict(commands), settle_s)


class Supply:
    """A bench supply reached through an open transport. The constructor does no I/O.

    Parameters
    ----------
    transport : Transport
    profile : SupplyProfile
    wait : callable
        ``wait(seconds)`` used for the settle time (the simulator's clock, or time.sleep).
    """

    def __init__(self, transport, profile: SupplyProfile, wait=None) -> None:
        self.transport = transport
        self.profile = profile
        self._wait = wait

    def initialize(self) -> str:
        self.transport.write(self.profile.commands["clear_status"])
        return self.transport.query(self.profile.commands["identify"])

    def set_output(self, on: bool) -> None:
        """Switch the output, confirm it with the query, let the board settle."""
        c = self.profile.commands
        self.transport.write(c["output_on"] if on else c["output_off"])
        state = self.transport.query(c["output_query"]).strip().upper()
        if state not in (("1", "ON") if on else ("0", "OFF")):
            raise InstrumentError(self.transport.address, c["output_query"],
                                  text=f"output should be {'on' if on else 'off'}, supply says {state!r}")
        if self._wait is not None and self.profile.settle_s > 0:
            self._wait(self.profile.settle_s)

    def close(self) -> None:
        self.transport.close()
