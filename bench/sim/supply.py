"""The simulated bench supply of the board: SCPI ``OUTPut`` switches the board's power."""

from __future__ import annotations

from bench.sim.scpiinstrument import COMMON_ROWS, ScpiInstrument
from bench.sim.scpisyntax import Boolean, Row, no_args
from bench.sim.state import SimState

__all__ = ["SUPPLY_IDN", "SUPPLY_ROWS", "SimSupply"]

SUPPLY_IDN = "EmissionBench,SimSupply-1,SN0002,0.1"


class SimSupply(ScpiInstrument):
    """Bench power supply of the board: its output switches ``SimState.board_powered``.

    Parameters
    ----------
    state : SimState
        Shared bench state.
    identity : str
        ``*IDN?`` reply.
    """

    def __init__(self, state: SimState, identity: str = SUPPLY_IDN) -> None:
        super().__init__(SUPPLY_ROWS, identity)
        self.state = state

    def reset(self) -> None:
        """``*RST``: a supply's reset state is output off."""
        self.set_output(False)

    def set_output(self, on: bool) -> None:
        """Switch the board on or off."""
        with self.state.lock:
            self.state.board_powered = bool(on)

    def output(self) -> str:
        """``OUTPut?``: ``1`` when the board is powered, else ``0``."""
        with self.state.lock:
            return "1" if self.state.board_powered else "0"


SUPPLY_ROWS: tuple[Row, ...] = COMMON_ROWS + (
    Row(("OUTPut[:STATe]",), Boolean(), SimSupply.set_output,
        lambda inst, args: (no_args(args), inst.output())[1]),
)
