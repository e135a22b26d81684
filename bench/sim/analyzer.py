"""The simulated swept spectrum analyzer: its settings, couplings, sweeps and trace replies.

Served as an SCPI instrument by :mod:`bench.sim.scpiserver`; every trace is computed from the
world (:mod:`bench.sim.receiver`) at the pose in the shared state, and sent in the format and
byte order selected (:mod:`bench.sim.traceformat`). The command table is :data:`ANALYZER_ROWS`.

Sweep completion can be awaited in the three usual ways: ``INIT;*OPC?`` (the reply comes when the
sweep is done), ``INIT;*OPC`` then polling ``*ESR?`` for bit 0 (IEEE 488.2 operation complete),
or ``INIT`` then polling ``STAT:OPER:COND?`` until bit 3 (SWEeping, value 8) clears (SCPI-1999
operation status register, from memory).
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from bench import units
from bench.sim import receiver
from bench.sim.clock import VirtualClock
from bench.sim.faults import FaultInjector, Faults
from bench.sim.scpiinstrument import COMMON_ROWS, ScpiInstrument
from bench.sim.scpisyntax import (
    OVERLOAD_CODE,
    Boolean,
    Choice,
    DataFormat,
    Number,
    Row,
    ScpiError,
    event_row,
    format_number,
    no_args,
    number_row,
    query_row,
    setting_row,
)
from bench.sim.state import SimState
from bench.sim.tracerng import TraceRng, pose_fields
from bench.sim.traceformat import encode_trace

__all__ = [
    "ANALYZER_IDN",
    "ANALYZER_ROWS",
    "ATT_MAX_DB",
    "ATT_STEP_DB",
    "AnalyzerSetup",
    "FREQ_MAX_HZ",
    "FREQ_MIN_HZ",
    "OPER_SWEEPING_BIT",
    "POLL_QUANTUM_S",
    "POINTS_MAX",
    "POINTS_MIN",
    "QUES_POWER_BIT",
    "RBW_MAX_HZ",
    "RBW_MIN_HZ",
    "SimAnalyzer",
]

ANALYZER_IDN = "EmissionBench,SimAnalyzer-1,SN0001,0.1"

FREQ_MIN_HZ = 9e3
FREQ_MAX_HZ = 7e9
POINTS_MIN, POINTS_MAX = 101, 40001
RBW_MIN_HZ, RBW_MAX_HZ = 10.0, 10e6
VBW_MIN_HZ, VBW_MAX_HZ = 1.0, 10e6
ATT_MAX_DB, ATT_STEP_DB = 70.0, 2.0
RLEV_MIN_DBM, RLEV_MAX_DBM = -130.0, 30.0
SWEEP_TIME_MIN_S, SWEEP_TIME_MAX_S = 1e-3, 16000.0
#: Questionable status register bit 3 (POWer summary), set while the last sweep was overloaded.
QUES_POWER_BIT = 8
#: Operation status register bit 3 (SWEeping), set while a sweep runs.
OPER_SWEEPING_BIT = 8
#: Sweep time one status poll stands for (a host polls every few tens of milliseconds).
POLL_QUANTUM_S = 0.05


@dataclass
class AnalyzerSetup:
    """Settings of the simulated analyzer; the defaults are its ``*RST`` state."""

    start_hz: float = FREQ_MIN_HZ
    stop_hz: float = FREQ_MAX_HZ
    points: int = 1001
    rbw_hz: float = 1e6
    rbw_auto: bool = True
    vbw_hz: float = 1e6
    vbw_auto: bool = True
    detector: str = "POS"
    attenuation_db: float = 10.0
    attenuation_auto: bool = True
    ref_level_dbm: float = 0.0
    sweep_time_s: float = SWEEP_TIME_MIN_S
    sweep_time_auto: bool = True
    continuous: bool = True
    data_format: str = "ASC"
    byte_order: str = "NORM"
    unit: str = "DBM"
    marker_on: bool = False
    mode: str = "SAN"
    display_on: bool = True


def _rbw_for_span(span_hz: float) -> float:
    """Auto-coupled RBW: the largest 1-3-10 value not above span/100 (common practice)."""
    target = max(span_hz / 100.0, RBW_MIN_HZ)
    decade = 10.0 ** math.floor(math.log10(target))
    value = 3.0 * decade if target >= 3.0 * decade else decade
    return min(value, RBW_MAX_HZ)


def _auto_attenuation_db(ref_level_dbm: float) -> float:
    """Auto attenuation: keep the mixer at or below -10 dBm for a signal at the reference level,
    never below 10 dB (common practice), on the 2 dB grid."""
    wanted = max(10.0, ref_level_dbm + 10.0)
    return min(ATT_MAX_DB, ATT_STEP_DB * math.ceil(wanted / ATT_STEP_DB))


class SimAnalyzer(ScpiInstrument):
    """Simulated swept spectrum analyzer over SCPI; every trace is computed from the world.

    Limits: frequency 9 kHz..7 GHz (span 0 allowed: zero span); 101..40001 points; RBW
    10 Hz..10 MHz (any value, the 6 dB bandwidth of a Gaussian filter); VBW 1 Hz..10 MHz;
    attenuation 0..70 dB rounded to 2 dB steps; reference level -130..+30 dBm (display only,
    always in dBm); sweep time 1 ms..16000 s. Couplings when AUTO: RBW = the 1-3-10 value at or
    below span/100; VBW = RBW; attenuation = max(10 dB, ref level + 10 dB); sweep time =
    2.5*span/(RBW*min(RBW, VBW)), at least 1 ms. ``*RST``: 9 kHz..7 GHz, 1001 points, all AUTO,
    detector POS, continuous sweep ON, ``FORM ASC``, ``BORD NORM``, ``UNIT:POW DBM``.

    ``INIT[:IMM]`` computes a sweep from ``world.lines`` over the span plus 5 RBW each side, at
    the pose in ``state``, and advances the clock by the sweep time. In continuous mode every
    ``TRAC?`` (and ``CALC:MARK:MAX``) sweeps first; in single mode it returns the last sweep, in
    the current format and unit. The mixer level counts only the lines of that range (no
    out-of-span overload).

    A sweep started by ``INIT`` stays pending for ceil(sweep time / :data:`POLL_QUANTUM_S`)
    status polls (``*ESR?``, ``*STB?``, ``STAT:OPER:COND?``): its time has already passed on
    the clock, the polls only show it running. ``*OPC?``, ``*WAI``, ``ABORt``, a new ``INIT``
    and every query that needs the result (``TRAC?``, the markers) end it at once.

    Parameters
    ----------
    world : object
        Has ``lines(state, f_lo_hz, f_hi_hz) -> list[Line]`` (dBm at the analyzer input).
    state : SimState
        Shared bench pose, read under ``state.lock``.
    clock : VirtualClock
        Advanced by the sweep time of every sweep.
    seed : int
        Noise seed. Each sweep draws from a generator keyed by the seed, the settings, the
        pose and the repeat number (:class:`~bench.sim.tracerng.TraceRng`), so a trace is the
        same whenever it is measured.
    noise_figure_db : float
        Receiver noise figure with 0 dB attenuation, dB.
    faults : Faults, optional
        Injected faults.
    identity : str
        ``*IDN?`` reply.
    """

    def __init__(self, world: Any, state: SimState, clock: VirtualClock, *, seed: int = 0,
                 noise_figure_db: float = 24.0, faults: Faults | None = None,
                 identity: str = ANALYZER_IDN) -> None:
        super().__init__(ANALYZER_ROWS, identity)
        self.world = world
        self.state = state
        self.clock = clock
        self.seed = seed
        self.noise_figure_db = noise_figure_db
        self.faults = faults or Faults()
        self.setup = AnalyzerSetup()
        self.last_sweep: receiver.Sweep | None = None
        self.sweep_count = 0
        self.trace_rng = TraceRng(seed)
        self.marker_index = 0
        self.ques_event = 0
        self._polls_left = 0  # status polls before the pending sweep shows as done
        self._opc_armed = False  # *OPC received while a sweep was pending
        self._injector = FaultInjector(self.faults)

    def open_session(self) -> SimAnalyzer:
        """Handler factory: resets the connection while refusals after a drop remain."""
        with self.lock:
            self._injector.admit()
        return self

    def reset(self) -> None:
        """``*RST``: the settings of :class:`AnalyzerSetup`, no sweep, nothing pending."""
        self.setup = AnalyzerSetup()
        self.last_sweep = None
        self._polls_left, self._opc_armed = 0, False

    def clear_status(self) -> None:
        """``*CLS``: also forgets a pending ``*OPC`` (IEEE 488.2 operation complete idle state)."""
        super().clear_status()
        self.ques_event = 0
        self._opc_armed = False

    # -- the pending sweep (overlapped INIT)
    def start_sweep(self) -> None:
        """``INIT[:IMM]``: end the pending sweep, take a new one and leave it pending."""
        self.complete_operations()
        result = self.run_sweep()
        self._polls_left = max(1, math.ceil(result.sweep_time_s / POLL_QUANTUM_S))

    def poll_status(self) -> None:
        """One status poll: the pending sweep is one poll closer to its end."""
        if self._polls_left > 0:
            self._polls_left -= 1
            if self._polls_left == 0:
                self._operation_done()

    def complete_operations(self) -> None:
        """End the pending sweep now."""
        if self._polls_left > 0:
            self._polls_left = 0
            self._operation_done()

    def request_opc(self) -> None:
        """``*OPC``: ESR bit 0 now, or when the pending sweep ends."""
        if self._polls_left > 0:
            self._opc_armed = True
        else:
            self.esr |= 1

    def _operation_done(self) -> None:
        if self._opc_armed:
            self.esr |= 1
            self._opc_armed = False

    def operation_condition(self) -> str:
        """``STAT:OPER:COND?``: SWEeping (bit 3) while a sweep is pending; a status poll."""
        self.poll_status()
        return str(OPER_SWEEPING_BIT if self._polls_left > 0 else 0)

    def receiver_settings(self) -> receiver.ReceiverSettings:
        """The receiver model's settings for the current setup, with couplings resolved."""
        s = self.setup
        span_hz = s.stop_hz - s.start_hz
        rbw_hz = _rbw_for_span(span_hz) if s.rbw_auto and span_hz > 0 else s.rbw_hz
        return receiver.ReceiverSettings(
            start_hz=s.start_hz, stop_hz=s.stop_hz, points=s.points, rbw_hz=rbw_hz,
            vbw_hz=rbw_hz if s.vbw_auto else s.vbw_hz, detector=s.detector,
            attenuation_db=(_auto_attenuation_db(s.ref_level_dbm) if s.attenuation_auto
                            else s.attenuation_db),
            ref_level_dbm=s.ref_level_dbm, noise_figure_db=self.noise_figure_db,
            sweep_time_s=None if s.sweep_time_auto else s.sweep_time_s)

    def run_sweep(self) -> receiver.Sweep:
        """Compute one sweep at the current pose, advance the clock, then apply faults.

        Raises :class:`DropConnection` or :class:`HangConnection` when a fault fires.
        """
        with self.lock:
            return self._sweep_locked()

    def _sweep_locked(self) -> receiver.Sweep:
        settings = self.receiver_settings()
        margin_hz = 5.0 * settings.rbw_hz
        with self.state.lock:
            lines = self.world.lines(self.state, max(0.0, settings.start_hz - margin_hz),
                                     settings.stop_hz + margin_hz)
            pose = pose_fields(self.state)
        rng = self.trace_rng.generator(settings, pose)
        result = receiver.sweep(lines, settings, rng)
        self.clock.advance(result.sweep_time_s)
        self.last_sweep = result
        self.sweep_count += 1
        if result.overloaded:
            self.ques_event |= QUES_POWER_BIT
            self.push_error(OVERLOAD_CODE, f"Input overload;mixer at {result.mixer_level_dbm:.1f} "
                            f"dBm, above {receiver.MIXER_1DB_COMPRESSION_DBM:g} dBm")
        self._injector.after_sweep(self.sweep_count, self.push_error)
        return result

    # -- values in the current unit
    def to_unit(self, level_dbm: np.ndarray) -> np.ndarray:
        """Levels in the current ``UNIT:POWer`` (dBm, or dBuV = dBm + 106.99 in 50 ohm, common practice)."""
        return units.dbm_to_dbuv(level_dbm) if self.setup.unit == "DBUV" else level_dbm

    def trace_reply(self, args: list[str]) -> bytes:
        """``TRACe[:DATA]? [TRACE1]``: the last sweep in the current format, unit and byte order."""
        if len(args) > 1:
            raise ScpiError(-108, f"{len(args)} parameters")
        if args and not re.fullmatch(r"TRAC(E)?1", args[0].upper()):
            raise ScpiError(-224, f"expected TRACE1, found {args[0]!r}")
        values = self.to_unit(self._current_sweep().level_dbm)
        return encode_trace(values, self.setup.data_format, self.setup.byte_order)

    def _current_sweep(self) -> receiver.Sweep:
        """The sweep to report: a fresh one in continuous mode, else the last one (ended now)."""
        self.complete_operations()
        if self.setup.continuous:
            return self.run_sweep()
        if self.last_sweep is None:
            raise ScpiError(-230, "no sweep since *RST, send INIT:IMM first")
        return self.last_sweep

    def marker_peak(self) -> None:
        """``CALC:MARK:MAX``: the marker to the highest point of the current sweep."""
        sweep = self._current_sweep()
        self.marker_index = int(np.argmax(sweep.level_dbm))
        self.setup.marker_on = True

    def marker_to(self, freq_hz: float) -> None:
        """``CALC:MARK:X <f>``: the marker to the trace point nearest ``freq_hz``."""
        sweep = self._marked_sweep()
        self.marker_index = int(np.argmin(np.abs(sweep.freq_hz - freq_hz)))

    def _marked_sweep(self) -> receiver.Sweep:
        self.complete_operations()
        if not self.setup.marker_on:
            raise ScpiError(-221, "marker is off, send CALC:MARK:MAX or CALC:MARK:STAT ON")
        if self.last_sweep is None:
            raise ScpiError(-230, "no sweep for the marker")
        return self.last_sweep

    def marker_x(self) -> str:
        """``CALC:MARK:X?``: the marker frequency, Hz."""
        return format_number(float(self._marked_sweep().freq_hz[self.marker_index]))

    def marker_y(self) -> str:
        """``CALC:MARK:Y?``: the marker level in the current unit (dBm or dBuV)."""
        level = float(self._marked_sweep().level_dbm[self.marker_index])
        return format_number(round(float(self.to_unit(np.array([level]))[0]), 4))

    # -- frequency axis, kept consistent (start <= stop within FREQ_MIN..FREQ_MAX)
    def set_start(self, hz: float) -> None:
        """``FREQ:STAR``: the stop frequency follows when it would fall below."""
        self.setup.start_hz = hz
        self.setup.stop_hz = max(self.setup.stop_hz, hz)

    def set_stop(self, hz: float) -> None:
        """``FREQ:STOP``: the start frequency follows when it would rise above."""
        self.setup.stop_hz = hz
        self.setup.start_hz = min(self.setup.start_hz, hz)

    def set_center(self, hz: float) -> None:
        """``FREQ:CENT``: keeps the span, narrowed to stay inside the frequency range."""
        half = min(self.span_hz / 2.0, hz - FREQ_MIN_HZ, FREQ_MAX_HZ - hz)
        self.setup.start_hz, self.setup.stop_hz = hz - half, hz + half

    def set_span(self, hz: float) -> None:
        """``FREQ:SPAN``: keeps the centre, narrowed to stay inside the frequency range."""
        center = self.center_hz
        half = min(hz / 2.0, center - FREQ_MIN_HZ, FREQ_MAX_HZ - center)
        self.setup.start_hz, self.setup.stop_hz = center - half, center + half

    @property
    def center_hz(self) -> float:
        """Centre frequency, Hz."""
        return (self.setup.start_hz + self.setup.stop_hz) / 2.0

    @property
    def span_hz(self) -> float:
        """Span, Hz (0: zero span)."""
        return self.setup.stop_hz - self.setup.start_hz


_FREQ = Number("HZ", FREQ_MIN_HZ, FREQ_MAX_HZ, FREQ_MIN_HZ)
_DETECTOR = Choice((("POSitive", "POS"), ("NEGative", "NEG"), ("SAMPle", "SAMP"),
                    ("AVERage", "AVER"), ("RMS", "RMS"), ("QPEak", "QPE"), ("CAVerage", "CAV")))


def _manual(attr: str, auto_attr: str) -> Callable[[SimAnalyzer, float], None]:
    """Setter that stores a value and switches its coupling off."""
    def set_(inst: SimAnalyzer, value: float) -> None:
        setattr(inst.setup, attr, value)
        setattr(inst.setup, auto_attr, False)
    return set_


def _effective(name: str) -> Callable[[SimAnalyzer], float]:
    """Getter of the value the receiver really uses (after auto coupling)."""
    return lambda inst: getattr(inst.receiver_settings(), name)


_RBW = Number("HZ", RBW_MIN_HZ, RBW_MAX_HZ, 1e6)
_VBW = Number("HZ", VBW_MIN_HZ, VBW_MAX_HZ, 1e6)
_ATT = Number("DB", 0.0, ATT_MAX_DB, 10.0, step=ATT_STEP_DB)
_SWT = Number("S", SWEEP_TIME_MIN_S, SWEEP_TIME_MAX_S, SWEEP_TIME_MIN_S)


def _sweep_time_s(inst: SimAnalyzer) -> float:
    return receiver.effective_sweep_time_s(inst.receiver_settings())


def _ques_event(inst: SimAnalyzer) -> str:
    value, inst.ques_event = inst.ques_event, 0
    return str(value)


def _ques_condition(inst: SimAnalyzer) -> str:
    overloaded = inst.last_sweep is not None and inst.last_sweep.overloaded
    return str(QUES_POWER_BIT if overloaded else 0)


def _init_immediate(inst: SimAnalyzer) -> None:
    inst.start_sweep()


ANALYZER_ROWS: tuple[Row, ...] = COMMON_ROWS + (
    number_row("[SENSe:]FREQuency:STARt", _FREQ, SimAnalyzer.set_start,
               lambda i: i.setup.start_hz),
    number_row("[SENSe:]FREQuency:STOP", _FREQ, SimAnalyzer.set_stop, lambda i: i.setup.stop_hz),
    number_row("[SENSe:]FREQuency:CENTer", _FREQ, SimAnalyzer.set_center, lambda i: i.center_hz),
    number_row("[SENSe:]FREQuency:SPAN",
               Number("HZ", 0.0, FREQ_MAX_HZ - FREQ_MIN_HZ, FREQ_MAX_HZ - FREQ_MIN_HZ),
               SimAnalyzer.set_span, lambda i: i.span_hz),
    number_row(("[SENSe:]BANDwidth[:RESolution]", "[SENSe:]BWIDth[:RESolution]"), _RBW,
               _manual("rbw_hz", "rbw_auto"), _effective("rbw_hz")),
    setting_row(("[SENSe:]BANDwidth[:RESolution]:AUTO", "[SENSe:]BWIDth[:RESolution]:AUTO"),
                "rbw_auto", Boolean()),
    number_row(("[SENSe:]BANDwidth:VIDeo", "[SENSe:]BWIDth:VIDeo"), _VBW,
               _manual("vbw_hz", "vbw_auto"), _effective("vbw_hz")),
    setting_row(("[SENSe:]BANDwidth:VIDeo:AUTO", "[SENSe:]BWIDth:VIDeo:AUTO"), "vbw_auto",
                Boolean()),
    setting_row("[SENSe:]SWEep:POINts", "points",
                Number("", POINTS_MIN, POINTS_MAX, 1001, integer=True)),
    number_row("[SENSe:]SWEep:TIME", _SWT, _manual("sweep_time_s", "sweep_time_auto"),
               _sweep_time_s),
    setting_row("[SENSe:]SWEep:TIME:AUTO", "sweep_time_auto", Boolean()),
    setting_row("[SENSe:]DETector[:FUNCtion]", "detector", _DETECTOR),
    setting_row("DISPlay[:WINDow[1]]:TRACe[1]:Y[:SCALe]:RLEVel", "ref_level_dbm",
                Number("DBM", RLEV_MIN_DBM, RLEV_MAX_DBM, 0.0)),
    number_row(("INPut:ATTenuation", "[SENSe:]POWer[:RF]:ATTenuation"), _ATT,
               _manual("attenuation_db", "attenuation_auto"), _effective("attenuation_db")),
    setting_row(("INPut:ATTenuation:AUTO", "[SENSe:]POWer[:RF]:ATTenuation:AUTO"),
                "attenuation_auto", Boolean()),
    setting_row("INITiate:CONTinuous", "continuous", Boolean()),
    event_row("INITiate[:IMMediate]", _init_immediate),
    event_row("ABORt", SimAnalyzer.complete_operations),  # the sweep's data are already there
    setting_row("FORMat[:DATA]", "data_format", DataFormat()),
    setting_row("FORMat:BORDer", "byte_order", Choice((("NORMal", "NORM"), ("SWAPped", "SWAP")))),
    setting_row("UNIT:POWer", "unit", Choice((("DBM", "DBM"), ("DBUV", "DBUV")))),
    Row(("TRACe[1][:DATA]",), None, None, lambda inst, args: inst.trace_reply(args)),
    event_row("CALCulate:MARKer[1]:MAXimum[:PEAK]", SimAnalyzer.marker_peak),
    setting_row("CALCulate:MARKer[1][:STATe]", "marker_on", Boolean()),
    Row(("CALCulate:MARKer[1]:X",), _FREQ, SimAnalyzer.marker_to,
        lambda inst, args: (no_args(args), inst.marker_x())[1]),
    query_row("CALCulate:MARKer[1]:Y", SimAnalyzer.marker_y),
    query_row("STATus:QUEStionable[:EVENt]", _ques_event),
    query_row("STATus:QUEStionable:CONDition", _ques_condition),
    event_row("STATus:PRESet", lambda inst: setattr(inst, "ques_event", 0)),
    query_row("STATus:OPERation:CONDition", SimAnalyzer.operation_condition),
    setting_row("INSTrument[:SELect]", "mode", Choice((("SANalyzer", "SAN"),))),
    setting_row("DISPlay:ENABle", "display_on", Boolean()),
)

