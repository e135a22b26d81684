"""Deterministic faults of the simulated analyzer, for resilience work (``--fault NAME=N``).

A fault fires once, right after the sweep with that number (1-based) completes; the reply to the
line that started the sweep is then lost. After a dropped or hung connection the instrument can
refuse a number of new connections (reset at once), as an instrument that is rebooting would.
The server side of these faults (reset, silence) is :mod:`bench.sim.lineserver`'s.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from bench.sim.lineserver import DropConnection, HangConnection, RefuseConnection

__all__ = ["FaultInjector", "Faults"]


@dataclass(frozen=True)
class Faults:
    """Deterministic faults of the simulated analyzer, counted in completed sweeps.

    Each fault fires once, right after the sweep with that number (1-based) completes; the reply
    to the line that started the sweep is then lost.

    Attributes
    ----------
    drop_after_sweeps : int or None
        Close the connection after this sweep.
    hang_after_sweeps : int or None
        Stop answering on this connection after this sweep (until the client closes it).
    refuse_after_drop : int
        After a drop or a hang, reset this many new connection attempts.
    error_after_sweeps : int or None
        Push ``error_code`` into the error queue after this sweep.
    error_code, error_text : int, str
        The pushed error (default -240 "Hardware error").
    """

    drop_after_sweeps: int | None = None
    hang_after_sweeps: int | None = None
    refuse_after_drop: int = 0
    error_after_sweeps: int | None = None
    error_code: int = -240
    error_text: str = "Hardware error"


class FaultInjector:
    """Fires the faults of a :class:`Faults` set, each once; the caller holds the instrument lock.

    Parameters
    ----------
    faults : Faults
        What to inject.
    """

    def __init__(self, faults: Faults) -> None:
        self.faults = faults
        self._fired: set[str] = set()
        self._refusals_left = 0

    def admit(self) -> None:
        """Called for every new connection; raises :class:`RefuseConnection` while refusing."""
        if self._refusals_left > 0:
            self._refusals_left -= 1
            raise RefuseConnection()

    def after_sweep(self, sweep_count: int, push_error: Callable[[int, str], None]) -> None:
        """Apply the faults due after sweep number ``sweep_count`` (1-based).

        Raises
        ------
        DropConnection, HangConnection
            When the drop or the hang fault fires.
        """
        f, n = self.faults, sweep_count
        if f.error_after_sweeps == n and self._fire("error"):
            push_error(f.error_code, f.error_text)
        if f.drop_after_sweeps == n and self._fire("drop"):
            self._refusals_left = f.refuse_after_drop
            raise DropConnection()
        if f.hang_after_sweeps == n and self._fire("hang"):
            self._refusals_left = f.refuse_after_drop
            raise HangConnection()

    def _fire(self, name: str) -> bool:
        if name in self._fired:
            return False
        self._fired.add(name)
        return True
