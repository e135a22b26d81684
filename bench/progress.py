"""Progress for people: a live bar on a terminal, heartbeat log lines otherwise.

Under ``nohup`` or in CI, rich draws no live display, so an overnight run would be silent for
hours; a heartbeat line (step i/N, elapsed, ETA, last trace time) is logged at a fixed interval
instead (pitfalls: terminal output). Both go to one stderr console so they do not tear.
"""

from __future__ import annotations

import logging
import time

__all__ = ["Progress", "format_duration"]

log = logging.getLogger("bench.progress")


def format_duration(seconds: float) -> str:
    """``3725 -> '1 h 02 min'``, ``75 -> '1 min 15 s'``, ``4.2 -> '4.2 s'``."""
    if seconds != seconds or seconds < 0:  # NaN or negative
        return "?"
    if seconds < 60:
        return f"{seconds:.1f} s"
    minutes, sec = divmod(int(round(seconds)), 60)
    if minutes < 60:
        return f"{minutes} min {sec:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


class Progress:
    """Tracks actions done against the plan's estimate and reports it.

    Parameters
    ----------
    total : int
        Number of actions in the plan.
    estimated_s : float
        Planner's estimate of the whole run (sweep + transfer + motion), seconds.
    live : bool
        Draw a rich progress bar (stderr is a terminal).
    heartbeat_s : float
        Interval between heartbeat log lines when not live.
    clock : callable
        Monotonic clock in seconds (injected in tests).
    """

    def __init__(self, total: int, estimated_s: float, *, live: bool, heartbeat_s: float = 30.0,
                 clock=time.monotonic, console=None) -> None:
        self.total = total
        self.estimated_s = estimated_s
        self.done = 0
        self.clock = clock
        self.heartbeat_s = heartbeat_s
        self._start = clock()
        self._last_beat = self._start
        self._last_trace_s = float("nan")
        self._bar = None
        if live:
            from rich.progress import BarColumn, Progress as RichProgress, TextColumn, TimeElapsedColumn, \
                TimeRemainingColumn

            self._bar = RichProgress(TextColumn("{task.description}"), BarColumn(),
                                     TextColumn("{task.completed}/{task.total}"),
                                     TimeElapsedColumn(), TimeRemainingColumn(), console=console,
                                     transient=False)
            self._task = self._bar.add_task("run", total=total)
            self._bar.start()

    def eta_s(self) -> float:
        """Remaining time, from the measured rate once there is one, else the estimate."""
        elapsed = self.clock() - self._start
        if self.done == 0:
            return self.estimated_s
        return elapsed / self.done * (self.total - self.done)

    def advance(self, label: str, trace_time_s: float | None = None, n: int = 1) -> None:
        self.done += n
        if trace_time_s is not None:
            self._last_trace_s = trace_time_s
        if self._bar is not None:
            self._bar.update(self._task, completed=self.done, description=label)
            return
        now = self.clock()
        if now - self._last_beat >= self.heartbeat_s or self.done == self.total:
            self._last_beat = now
            log.info("heartbeat: action %d/%d (%s), elapsed %s, ETA %s, last trace %.3f s",
                     self.done, self.total, label, format_duration(now - self._start),
                     format_duration(self.eta_s()), self._last_trace_s)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.stop()
