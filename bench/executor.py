"""The run executor: carries out a plan on a station, stores every trace, survives faults.

For each planned action: put the bench in its pose (power, probe position and orientation, mast
height and polarization, turntable azimuth), configure the analyzer, take the sweeps the trace
mode asks for, fetch, store (committed per trace), mark the action done. A transport fault
(connection lost, reply timeout) closes everything, backs off (bounded), reconnects,
resynchronises (``*CLS``, ``*IDN?``, the whole setup again, stage homed again) and redoes the
action. When retries run out the run is marked ``interrupted`` and ``bench resume`` continues
from the first action not done.

Dynamic work (the final measurement of suspects found by a prescan) is delegated to a
handler that reaches the instruments only through :meth:`Executor.measurer`: a narrow
interface that moves the mast and turntable and measures (and stores) one segment.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from bench import units
from bench.errors import InstrumentError, PlanError, RunInterrupted, TransportError
from bench.store import RunStore, TraceMeta

__all__ = ["Executor", "RetryPolicy", "combine_sweeps"]

log = logging.getLogger("bench.executor")


@dataclass(frozen=True)
class RetryPolicy:
    """Bounded reconnect policy: delays in seconds between attempts (exponential, capped)."""

    attempts: int = 5
    first_delay_s: float = 1.0
    max_delay_s: float = 30.0

    def delays(self):
        delay = self.first_delay_s
        for _ in range(self.attempts):
            yield delay
            delay = min(delay * 2.0, self.max_delay_s)


def combine_sweeps(sweeps: list[np.ndarray], mode: str) -> np.ndarray:
    """Combine repeated sweeps the way an analyzer's trace mode does.

    ``clear-write`` keeps the last, ``max-hold`` the point-wise maximum, ``average`` the mean of
    the dB values (log averaging, as a log-scaled trace average does: noise reads about 2.51 dB
    below its RMS value, a CW line is unchanged; common practice).
    """
    if mode == "clear-write" or len(sweeps) == 1:
        return sweeps[-1]
    stack = np.vstack(sweeps)
    if mode == "max-hold":
        return stack.max(axis=0)
    if mode == "average":
        return stack.mean(axis=0)
    raise PlanError(f"unknown trace mode {mode!r}")


class Executor:
    """Carries out a plan.

    Parameters
    ----------
    plan : bench.planner.Plan
        Actions to carry out, in order.
    store : RunStore
        Open run folder.
    connect : callable
        ``connect() -> bench.instruments.Station``: opens and initialises every instrument the
        plan needs.
    progress : bench.progress.Progress or None
    retry : RetryPolicy
    sleep : callable
        Used for back-off (injected in tests so they never sleep).
    analyze : callable, optional
        ``f(action) -> rows`` for an analysis action: the step's result rows, stored with the
        action's done mark in one transaction.
    dynamic : callable, optional
        ``f(action, measurer) -> rows`` carries out a dynamic action (final measurement of
        suspects) through :meth:`measurer`; its rows are stored like an analysis's.
    """

    def __init__(self, plan, store: RunStore, connect: Callable[[], object], *, progress=None,
                 retry: RetryPolicy = RetryPolicy(), sleep: Callable[[float], None] = time.sleep,
                 analyze: Callable | None = None, dynamic: Callable | None = None) -> None:
        self.plan = plan
        self.store = store
        self._connect = connect
        self.progress = progress
        self.retry = retry
        self.sleep = sleep
        self.analyze = analyze
        self.dynamic = dynamic
        self.identities: dict = {}
        self.current_pose = None
        self.station = None
        self.faults = 0
        self._powered: bool | None = None
        self._tool: int | None = None
        self._rotation: float | None = None
        self._far: dict = {}

    # ------------------------------------------------------------------ lifecycle
    def run(self) -> None:
        done = self.store.done_actions()
        actions = list(self.plan.actions)
        if self.progress is not None and done:
            self.progress.advance("resumed", n=len([a for a in actions if a.index in done]))
        first = next((a for a in actions if a.index not in done), None)
        if first is not None:
            self.store.discard_partial(first.index)  # the action in flight when a run was killed
        try:
            for action in actions:
                if action.index in done:
                    continue
                t0 = time.monotonic()
                self._with_retries(action)
                if self.progress is not None:
                    self.progress.advance(f"{action.step_kind} {action.step_label}", time.monotonic() - t0)
        finally:
            if self.station is not None:
                self._restore_power()
                self.station.close()
                self.station = None

    def _ensure_station(self):
        if self.station is None:
            self.station = self._connect()
            self.identities.update(self.station.identities)
            self._powered = None
            self._tool = None
            self._rotation = None
            self._far = {}
            self.current_pose = None
        return self.station

    def _with_retries(self, action) -> None:
        self._with_retries_call(lambda: self.do_action(action), f"action {action.index} ({action.step_label})",
                                cleanup=lambda: self.store.discard_partial(action.index))

    def _with_retries_call(self, fn: Callable[[], None], what: str, cleanup: Callable | None = None) -> None:
        delays = self.retry.delays()
        while True:
            try:
                self._ensure_station()
                fn()
                return
            except (TransportError, InstrumentError) as exc:
                if _is_refusal(exc):
                    # the instrument refused a command or a value (SCPI -1xx command, -2xx
                    # execution error): doing it again gives the same answer
                    self.store.log_event("error", f"{what}: {exc}")
                    if cleanup is not None:
                        cleanup()
                    raise
                self.faults += 1
                self.store.log_event("warning", f"{what}: {exc}")
                log.warning("%s failed: %s", what, exc)
                if cleanup is not None:
                    cleanup()
                if self.station is not None:
                    self.station.close()
                    self.station = None
                delay = next(delays, None)
                if delay is None:
                    raise RunInterrupted(f"{what}: giving up after {self.retry.attempts} reconnect attempts: {exc}") from exc
                log.info("reconnecting in %.1f s", delay)
                self.sleep(delay)

    # ------------------------------------------------------------------ one action
    def do_action(self, action) -> None:
        self._ensure_station()
        if action.analysis:
            self._store_results(action, self.analyze)
            return
        self._set_power(bool(action.board_powered))
        if action.dynamic:
            self.park_probe()
            self._store_results(action, self.dynamic and (lambda a: self.dynamic(a, self.measurer(a))))
            return
        self.set_pose(action.pose)
        last = len(action.segments) - 1
        for i, seg in enumerate(action.segments):
            self.measure_segment(action, i, seg, completes_action=(i == last))
        if not action.segments:
            self.store.mark_done(action.index)

    def _store_results(self, action, handler) -> None:
        """Run an analysis or dynamic handler and store its rows with the action's done mark."""
        if not handler:
            raise PlanError(f"action {action.index} ({action.step_label}) needs a handler and none is set")
        rows = handler(action)
        self.store.replace_results(action.step_label, rows, done_action=action.index)

    def measure_segment(self, action, seg_index: int, seg, *, completes_action: bool) -> int:
        """Configure, sweep ``count`` times, combine, store. Returns the trace id."""
        analyzer = self.station.analyzer
        analyzer.configure(seg)  # a planned segment is the analyzer's settings type
        sweeps = []
        for _ in range(max(1, seg.count)):
            analyzer.sweep()
            sweeps.append(analyzer.fetch_trace(seg.points))
        level_dbm = combine_sweeps(sweeps, seg.trace_mode)
        for warning in analyzer.take_warnings():
            text = (f"{action.step_label} action {action.index}: analyzer warning {warning}: the input "
                    "may be overloaded; add attenuation and compare (a 10 dB step should move the "
                    "reading by < 1 dB)")
            log.warning(text)
            self.store.log_event("warning", text)
        meta = TraceMeta(
            action_index=action.index, step_label=action.step_label, step_kind=action.step_kind,
            segment=seg_index, start_hz=seg.start_hz, stop_hz=seg.stop_hz, points=seg.points,
            rbw_hz=seg.rbw_hz, vbw_hz=seg.vbw_hz, detector=seg.detector, trace_mode=seg.trace_mode,
            sweeps=len(sweeps), unit="dbuv", board_powered=bool(action.board_powered),
            **_pose_columns(self.current_pose),
        )
        return self.store.add_trace(meta, units.dbm_to_dbuv(level_dbm), completes_action=completes_action)

    def measurer(self, action) -> "_ActionMeasurer":
        """The narrow measuring interface for the dynamic work of ``action``."""
        return _ActionMeasurer(self, action)

    # ------------------------------------------------------------------ bench pose
    def _set_power(self, powered: bool) -> None:
        if self._powered == powered:
            return
        supply = self.station.supply
        if supply is None:
            if not powered:
                raise PlanError("an ambient capture needs the board switched off, and the bench file has no [supply]")
            self._powered = powered
            return
        supply.set_output(powered)
        self._powered = powered

    def _restore_power(self) -> None:
        """Leave the board powered as found at the end (ambient steps switch it off)."""
        try:
            if self.station is not None and self.station.supply is not None and self._powered is False:
                self.station.supply.set_output(True)
        except (TransportError, InstrumentError):
            pass

    def park_probe(self) -> None:
        """Before a far-field reading: no near-field probe stays mounted on the stage (tool 0).

        A probe left over the board after a grid step would otherwise be what the analyzer
        measures; the stage lifts to its safe height before the tool change.
        """
        stage = self.station.stage if self.station is not None else None
        if stage is not None and self._tool != 0:
            stage.select_tool(0)
            self._tool = 0

    def set_pose(self, pose) -> None:
        self.current_pose = pose
        if pose is None:
            return
        st = self.station
        if hasattr(pose, "tool"):  # a probe pose on the XYZ stage
            if st.stage is None:
                raise PlanError("a grid step needs a [stage] in the bench file")
            if pose.tool != self._tool:
                st.stage.select_tool(int(pose.tool))
                self._tool = pose.tool
            if pose.rotation_deg != self._rotation and st.stage.limits.rotary_axis:
                # turn the probe only at the travel height: never rotate it close to the board
                st.stage.move_to(float(pose.x_m), float(pose.y_m), float(st.stage.limits.safe_z_m))
                st.stage.rotate_to(float(pose.rotation_deg))
                self._rotation = pose.rotation_deg
            st.stage.move_to(float(pose.x_m), float(pose.y_m), float(pose.z_m))
            return
        self.park_probe()
        height = getattr(pose, "height_m", None)
        polarization = getattr(pose, "polarization", None)
        if height is not None or polarization is not None:
            if st.mast is None:
                raise PlanError("a far-field pose needs a [mast] in the bench file")
            if polarization is not None and self._far.get("pol") != polarization:
                st.mast.set_polarization(polarization)
                self._far["pol"] = polarization
            if height is not None and self._far.get("height") != height:
                st.mast.set_height(float(height))
                self._far["height"] = height
        azimuth = getattr(pose, "azimuth_deg", None)
        if azimuth is not None:
            if st.turntable is None:
                raise PlanError("a far-field pose needs a [turntable] in the bench file")
            if self._far.get("azimuth") != azimuth:
                st.turntable.set_azimuth(float(azimuth))
                self._far["azimuth"] = azimuth


def _is_refusal(exc: Exception) -> bool:
    """True for an instrument error that a retry cannot cure (SCPI-1999 codes -100 to -299)."""
    code = getattr(exc, "code", None)
    return isinstance(exc, InstrumentError) and code is not None and -299 <= code <= -100


def _pose_columns(pose) -> dict:
    """Store columns for a pose (board coordinates for the probe position)."""
    if pose is None:
        return {}
    out = {}
    if hasattr(pose, "board_x_m"):
        out.update(x_m=float(pose.board_x_m), y_m=float(pose.board_y_m))
        board_z = getattr(pose, "board_z_m", None)
        out["z_m"] = float(board_z) if board_z is not None else None
    for name in ("rotation_deg", "height_m", "azimuth_deg"):
        value = getattr(pose, name, None)
        if value is not None:
            out[name] = float(value)
    for name in ("probe", "polarization"):
        value = getattr(pose, name, None)
        if value is not None:
            out[name] = str(value)
    return out


class _ActionMeasurer:
    """Moves and measurements of one dynamic action; every trace is stored with the action."""

    def __init__(self, executor: Executor, action) -> None:
        self._executor = executor
        self._action = action

    def move_to(self, pose) -> None:
        """Put the mast and turntable in ``pose`` (see :meth:`Executor.set_pose`)."""
        self._executor.set_pose(pose)

    def measure(self, segment) -> tuple[np.ndarray, np.ndarray]:
        """Measure and store one segment; returns (freq_hz, level_dbuv) as stored (float32)."""
        trace_id = self._executor.measure_segment(self._action, 0, segment, completes_action=False)
        return self._executor.store.trace(trace_id)
