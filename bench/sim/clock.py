"""The simulated bench's clock: accelerated by default, real time on request.

Every simulated instrument advances the same clock by the time its action takes on a real bench
(a sweep advances it by the sweep time, a stage move by the move time). In accelerated mode the
advance is instant, so an overnight sequence replays in seconds with the same virtual timeline;
in real-time mode the clock also waits that long, for demonstrations.
"""

from __future__ import annotations

import time
from collections.abc import Callable

from bench.sim.state import SimState

__all__ = ["VirtualClock"]


class VirtualClock:
    """Thread-safe virtual time in seconds since the simulator started.

    Parameters
    ----------
    realtime : bool, default False
        False: :meth:`advance` adds to the virtual time at once. True: it also waits the same
        wall-clock duration.
    state : SimState, optional
        When given, the time lives in ``state.virtual_time_s`` (read and written under
        ``state.lock``) so every simulated instrument sharing the state sees one clock.
    sleep : callable, optional
        Wall-clock wait used in real-time mode, ``sleep(seconds)``; injectable for tests.
    """

    def __init__(self, realtime: bool = False, state: SimState | None = None,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        self.realtime = realtime
        self._state = state if state is not None else SimState()
        self._sleep = sleep

    def now_s(self) -> float:
        """Current virtual time, seconds."""
        with self._state.lock:
            return self._state.virtual_time_s

    def advance(self, seconds: float) -> float:
        """Move the clock forward by ``seconds`` (>= 0) and return the new virtual time, seconds.

        In real-time mode the call also waits ``seconds`` of wall time, outside the lock so other
        instruments keep answering meanwhile.
        """
        if not seconds >= 0.0:  # also rejects NaN
            raise ValueError(f"clock advance must be a duration >= 0 s, found {seconds!r}")
        with self._state.lock:
            self._state.virtual_time_s += seconds
            now_s = self._state.virtual_time_s
        if self.realtime and seconds > 0.0:
            self._sleep(seconds)
        return now_s
