"""CISPR 16-1-1 detectors of the simulated receiver: peak, quasi-peak, CISPR average, rms-average.

The receiver model works on the envelope of the IF signal. Everything is expressed in
**RMS-equivalent volts**: an envelope of peak amplitude ``E`` is stored as ``E / sqrt(2)``, so a
CW sine of RMS level ``V`` has the constant envelope ``V`` and every detector, calibrated the
CISPR way ("an unmodulated sine reads its RMS value": CISPR 16-1-1 average / rms-average
detectors), reads ``V``.

Signal chain (CISPR 16-1-1 quasi-peak time constants, charge time constant definition from
memory; CISPR 16-1-1 average / rms-average detectors, rms corner PRFs from memory)::

    envelope e(t) of the Gaussian IF filter (B6 of the band)
      peak          : max e(t) over the dwell
      quasi-peak    : diode charge/discharge circuit (charge resistance R_c, discharge R_d, C)
                        dV/dt = (e/tau_R) g(V/e) - V/tau_d,   tau_R = R_c C, tau_d = R_d C
                      with the cycle-averaged conduction of a half-wave diode fed the IF carrier
                        g(x) = (sqrt(1 - x^2) - x arccos x)/pi  for x < 1, 0 otherwise
                      (``model="envelope"``: g(x) = 1 - x, the ideal envelope detector); tau_R
                      is set so that a switched-on sine reaches 63 % of its final value after
                      the band's charge time constant (CISPR 16-1-1 quasi-peak
                      time constants; charge time constant definition: from memory);
                      then a critically damped meter  y'' + 2 w0 y' + w0^2 y = w0^2 V, w0 = 1/tau_M
                      reading = max y over the dwell / (CW gain of the diode circuit)
      CISPR average : the same critically damped meter driven by e(t) itself, max held
      rms-average   : exponential power average of e^2 (time constant from the corner PRF),
                      square root, then the meter, max held

Numerics: one period of a periodic envelope is described by knots; between knots the envelope
is either constant (exact exponential solution of the detector ODE) or sampled finely (about 24
samples per 1/B_imp) where the IF filter shapes an edge or an impulse. The detector recurrence
is solved per period with numpy (no loop over samples); many short periods are followed with an
ODE over the period index (stroboscopic averaging). The meter is a linear filter applied with
``scipy.signal.lfilter`` to the bin means of the detector output (exact integrals of the
exponential pieces), using the exact zero-order-hold discretisation.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
from scipy import signal
from scipy.integrate import solve_ivp
from scipy.optimize import brentq
from scipy.special import erfc

from bench.errors import AnalysisError

__all__ = [
    "BANDS",
    "DIODE_MODELS",
    "Band",
    "Envelope",
    "burst_envelope",
    "cispr_average",
    "cispr_band",
    "cw_envelope",
    "impulse_train_envelope",
    "peak",
    "peak_offset_db",
    "quasi_peak",
    "reading_offsets_db",
    "rms_average",
    "to_dbuv",
]

# Gaussian filter: B_imp / B6 = sqrt(pi / (4 ln 2)) (derived: docs/physics.md).
IMPULSE_TO_6DB = math.sqrt(math.pi / (4.0 * math.log(2.0)))

_EDGE_HALF_WIDTH = 3.5  # in units of 1/B_imp: exp(-pi * 3.5**2) = 2e-17, the Gaussian is gone
_FINE_PER_IMPULSE_WIDTH = 24  # samples per 1/B_imp in the finely sampled regions
_METER_BINS_PER_TAU = 400  # meter input bins per meter time constant: ZOH error ~ (1/400)^2
_EXACT_PERIODS = 1500  # periods integrated one by one before switching to the ODE over n


@dataclass(frozen=True)
class Band:
    """One CISPR 16-1-1 frequency band and its detector constants.

    Attributes
    ----------
    name : str
        ``"A"``, ``"B"``, ``"C/D"`` or ``"E"``.
    low_hz, high_hz : float
        Frequency range.
    b6_hz : float
        6 dB bandwidth of the (Gaussian) IF filter.
    tau_charge_s, tau_discharge_s : float
        Quasi-peak electrical charge and discharge time constants (NaN for band E: no QP).
    tau_meter_qp_s : float
        Mechanical time constant of the critically damped QP meter (NaN for band E).
    tau_meter_avg_s : float
        Meter time constant of the CISPR average and rms-average detectors.
    rms_corner_prf_hz : float
        Corner PRF of the rms-average detector (CISPR 16-1-1 average /
        rms-average detectors; rms corner PRFs from memory).
    """

    name: str
    low_hz: float
    high_hz: float
    b6_hz: float
    tau_charge_s: float
    tau_discharge_s: float
    tau_meter_qp_s: float
    tau_meter_avg_s: float
    rms_corner_prf_hz: float

    @property
    def b_imp_hz(self) -> float:
        """Impulse bandwidth of the Gaussian filter, B_imp = 1.0645 * B6 (derived)."""
        return self.b6_hz * IMPULSE_TO_6DB

    @property
    def b3_hz(self) -> float:
        """3 dB bandwidth of the Gaussian filter, B6 / sqrt(2) (derived: docs/physics.md)."""
        return self.b6_hz / math.sqrt(2.0)


# Bands and B6: CISPR 16-1-1 band/bandwidth table (band E as an impulse bandwidth: from memory).
# QP constants: CISPR 16-1-1 quasi-peak time constants (charge time constant definition: from
# memory). Average meter and rms corners: CISPR 16-1-1 average / rms-average detectors (rms
# corner PRFs from memory).
# Band E is specified by B_imp = 1 MHz (CISPR 16-1-1, from memory), so B6 = 1 MHz / 1.0645.
BANDS: dict[str, Band] = {
    "A": Band("A", 9e3, 150e3, 200.0, 45e-3, 500e-3, 160e-3, 160e-3, 10.0),
    "B": Band("B", 150e3, 30e6, 9e3, 1e-3, 160e-3, 160e-3, 160e-3, 10.0),
    "C/D": Band("C/D", 30e6, 1e9, 120e3, 1e-3, 550e-3, 100e-3, 100e-3, 100.0),
    "E": Band("E", 1e9, 18e9, 1e6 / IMPULSE_TO_6DB, math.nan, math.nan, math.nan, 100e-3,
              1000.0),
}


def cispr_band(freq_hz: float) -> Band:
    """CISPR 16-1-1 band of a frequency.

    Parameters
    ----------
    freq_hz : float
        Receiver frequency in Hz. Ranges are closed at the bottom: 150 kHz is band B, 30 MHz
        band C/D; 1 GHz belongs to C/D (the 120 kHz limits of CISPR 32 run up to 1 GHz) and
        18 GHz to band E.

    Returns
    -------
    Band
    """
    f = float(freq_hz)
    if BANDS["A"].low_hz <= f < BANDS["B"].low_hz:
        return BANDS["A"]
    if BANDS["B"].low_hz <= f < BANDS["C/D"].low_hz:
        return BANDS["B"]
    if BANDS["C/D"].low_hz <= f <= BANDS["C/D"].high_hz:
        return BANDS["C/D"]
    if BANDS["E"].low_hz < f <= BANDS["E"].high_hz:
        return BANDS["E"]
    raise AnalysisError(f"no CISPR 16-1-1 band for {f:g} Hz: expected 9 kHz to 18 GHz")


# ----------------------------------------------------------------------------------------------
# Envelopes
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Envelope:
    """IF envelope (RMS-equivalent volts) as knots over one period.

    Between two knots with equal values the envelope is constant; elsewhere it is sampled
    finely enough to be treated as linear between knots.

    Attributes
    ----------
    t_s : numpy.ndarray
        Knot times from 0 (start of the period), increasing.
    e_v : numpy.ndarray
        Envelope at the knots, RMS-equivalent volts (envelope peak / sqrt 2).
    period_s : float or None
        Repetition period; None for a single event (isolated pulse, CW): the last knot value
        then holds until the end of the dwell.
    peak_v : float
        Maximum of the envelope (what the peak detector reads), RMS-equivalent volts.
    """

    t_s: np.ndarray
    e_v: np.ndarray
    period_s: float | None
    peak_v: float


def cw_envelope(level_v: float) -> Envelope:
    """Envelope of an unmodulated carrier of RMS level ``level_v`` (volts), tuned on it."""
    level = float(level_v)
    return Envelope(np.array([0.0]), np.array([level]), None, level)


def impulse_train_envelope(area_vs: float, prf_hz: float | None, band: Band) -> Envelope:
    """IF envelope of ideal impulses of area ``area_vs`` (V*s) through the band's Gaussian filter.

    A single impulse gives the envelope 2 A B_imp exp(-pi (B_imp t)^2) (volts peak;
    Gaussian RBW filter, derived: docs/physics.md),
    i.e. sqrt(2) A B_imp exp(...) RMS-equivalent. Overlapping responses of a fast train are
    added coherently (receiver tuned to a line of the train).

    Parameters
    ----------
    area_vs : float
        Impulse area in volt-seconds.
    prf_hz : float or None
        Pulse repetition frequency; None or 0 for an isolated pulse.
    band : Band
    """
    b = band.b_imp_hz
    amp = math.sqrt(2.0) * float(area_vs) * b

    def single(t: np.ndarray) -> np.ndarray:
        return amp * np.exp(-math.pi * (b * t) ** 2)

    return _pulse_like_envelope(single, 0.0, prf_hz, band)


def burst_envelope(level_v: float, prf_hz: float | None, duty: float, band: Band) -> Envelope:
    """IF envelope of a carrier keyed on and off, at the tuned frequency.

    A rectangle of length tau_on = duty / prf through the Gaussian filter gives
    V [Phi(t) - Phi(t - tau_on)] with the filter's step response Phi(t) = erfc(-sqrt(pi) B_imp t)/2.

    Parameters
    ----------
    level_v : float
        RMS level of the carrier while on, volts.
    prf_hz : float or None
        Burst repetition frequency in Hz; None means CW.
    duty : float
        On fraction of each period, 0 < duty <= 1 (1 means CW).
    band : Band
    """
    if prf_hz is None or duty >= 1.0:
        return cw_envelope(level_v)
    if not (0.0 < duty < 1.0) or prf_hz <= 0.0:
        raise AnalysisError(f"burst needs 0 < duty <= 1 and prf > 0 Hz, found duty={duty}, "
                            f"prf={prf_hz} Hz")
    b, level = band.b_imp_hz, float(level_v)
    on_s = duty / prf_hz
    root_pi = math.sqrt(math.pi)

    def single(t: np.ndarray) -> np.ndarray:
        # Phi(t) - Phi(t - on) written with erfc of both tails so the plateau keeps precision
        return level * 0.5 * (erfc(-root_pi * b * t) - erfc(-root_pi * b * (t - on_s)))

    return _pulse_like_envelope(single, on_s, prf_hz, band)


def _pulse_like_envelope(single, on_s: float, prf_hz: float | None, band: Band) -> Envelope:
    """Knots for a pulse whose response ``single`` changes only near t=0 and t=on_s."""
    margin = _EDGE_HALF_WIDTH / band.b_imp_hz
    step = 1.0 / (_FINE_PER_IMPULSE_WIDTH * band.b_imp_hz)
    plateau = on_s - 2.0 * margin
    if not prf_hz:  # isolated: [-m, on+m] (edges, maybe plateau), then zero forever
        fine = _fine_regions(-margin, on_s + margin, margin, step, plateau)
        t = fine - fine[0]
        e = single(fine)
        e[-1] = 0.0
        peak_v = float(max(e.max(), single(np.array([on_s / 2.0]))[0]))
        return Envelope(t, e, None, peak_v)
    period = 1.0 / prf_hz
    gap = period - on_s - 2.0 * margin
    if gap > 0.0:
        # start at -margin: rising edge, [plateau, falling edge], then a zero gap
        t_abs = _fine_regions(-margin, on_s + margin, margin, step, plateau)
        t_abs = np.append(t_abs, period - margin)
    elif plateau > 0.0:
        # start at +margin: plateau, then the dip (falling edge, short gap, next rising edge)
        n = max(2, math.ceil((period - on_s + 2.0 * margin) / step) + 1)
        dip = np.linspace(on_s - margin, period + margin, n)
        t_abs = np.concatenate(([margin], dip))
    else:
        n = max(8, math.ceil(period / step) + 1)
        t_abs = np.linspace(0.0, period, n)
    e = _periodic_sum(single, t_abs, period, margin + on_s)
    if e.max() - e.min() <= 1e-9 * e.max():
        # PRF far above B_imp: the filter passes only the carrier line, of level duty * V
        return cw_envelope(float(e.mean()))
    if gap > 0.0:
        e[-2:] = 0.0  # end of the falling edge and start of the gap: exactly zero
    elif plateau > 0.0:
        e[0] = e[1] = float(np.median(e[:2]))  # plateau start: constant level
    centre = _periodic_sum(single, np.array([on_s / 2.0]), period, margin + on_s)[0]
    peak_v = float(max(e.max(), centre))
    return Envelope(t_abs - t_abs[0], e, period, peak_v)


def _fine_regions(start: float, stop: float, margin: float, step: float,
                  plateau: float) -> np.ndarray:
    """Knot times: fine over the edges, and two knots bracketing a plateau if there is one."""
    if plateau <= 0.0:
        return np.linspace(start, stop, max(8, math.ceil((stop - start) / step) + 1))
    n = max(8, math.ceil(2.0 * margin / step) + 1)
    rise = np.linspace(start, start + 2.0 * margin, n)
    fall = np.linspace(stop - 2.0 * margin, stop, n)
    return np.concatenate((rise, fall))


def _periodic_sum(single, t: np.ndarray, period: float, reach_s: float) -> np.ndarray:
    """Sum of the responses to every pulse of a train that reach the times ``t``."""
    images = math.ceil(reach_s / period) + 1
    shifts = period * np.arange(-images, images + 1)
    return single(t[:, None] - shifts[None, :]).sum(axis=1)


# ----------------------------------------------------------------------------------------------
# Detector numerics
# ----------------------------------------------------------------------------------------------


def _refine(env: Envelope, length_s: float, max_step_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Knots over ``length_s`` with constant stretches cut into steps <= ``max_step_s``."""
    keep = env.t_s <= length_s
    t, e = env.t_s[keep], env.e_v[keep]
    if t[-1] < length_s:
        t, e = np.append(t, length_s), np.append(e, np.interp(length_s, env.t_s, env.e_v))
    pieces_t, pieces_e = [t[:1]], [e[:1]]
    for k in range(len(t) - 1):
        h = t[k + 1] - t[k]
        n = math.ceil(h / max_step_s) if (e[k] == e[k + 1] and h > max_step_s) else 1
        pieces_t.append(np.linspace(t[k], t[k + 1], n + 1)[1:])
        pieces_e.append(np.linspace(e[k], e[k + 1], n + 1)[1:])
    return np.concatenate(pieces_t), np.concatenate(pieces_e)


def _conduction_carrier(x: float) -> float:
    """Cycle-averaged charge current of a half-wave diode fed a carrier, in units of E/R_c.

    With carrier E cos(wt) and capacitor voltage V = x E the diode conducts while
    E cos(wt) > V; the mean of (E cos(wt) - V)/R_c over a cycle is
    E/R_c * (sqrt(1 - x^2) - x arccos x) / pi (classical peak-rectifier analysis; its CW
    steady state x = cos(theta) with tan(theta) - theta = pi R_c/R_d, derived).
    """
    if x >= 1.0:
        return 0.0
    x = max(x, 0.0)
    return (math.sqrt(1.0 - x * x) - x * math.acos(x)) / math.pi


def _conduction_envelope(x: float) -> float:
    """Charge current of an ideal linear detector driven by the envelope, units of E/R_c."""
    return max(0.0, 1.0 - x)


_CONDUCTION = {"carrier": _conduction_carrier, "envelope": _conduction_envelope}
DIODE_MODELS = tuple(_CONDUCTION)


class _Diode:
    """Charge/discharge circuit dV/dt = (e/tau_R) g(V/e) - V/tau_d, with tables for plateaus.

    ``tau_R`` = R_c C is chosen so that a sine switched on brings V to 63 % of its final value
    after the band's electrical charge time constant (CISPR 16-1-1 quasi-peak
    time constants; charge time constant definition: from memory).
    """

    def __init__(self, model: str, tau_charge_s: float, tau_discharge_s: float) -> None:
        self.g = _CONDUCTION[model]
        self.tau_d = tau_discharge_s
        ratio = brentq(lambda r: r * tau_discharge_s * self._rise_time_units(r)
                       - tau_charge_s, 1e-7, 0.5, xtol=1e-15, rtol=1e-13)
        self.r = ratio
        self.tau_r = ratio * tau_discharge_s
        self.cw_gain = self._final_ratio(ratio)
        self._build_tables()

    def _final_ratio(self, r: float) -> float:
        return brentq(lambda x: self.g(x) - r * x, 1e-12, 1.0, xtol=1e-16, rtol=1e-15)

    def _rise_time_units(self, r: float) -> float:
        """Time, in units of R_c C, for a switched-on sine to reach 63.2 % of the final V."""
        target = (1.0 - math.exp(-1.0)) * self._final_ratio(r)

        def reached(_u: float, x: np.ndarray) -> float:
            return x[0] - target

        reached.terminal = True
        sol = solve_ivp(lambda _u, x: [self.g(x[0]) - r * x[0]], (0.0, 1e4), [0.0],
                        events=reached, rtol=1e-11, atol=1e-15)
        return float(sol.t_events[0][0])

    def _build_tables(self) -> None:
        """x(u) from 0 for a constant envelope (u = t/tau_R), and its running integral."""
        x_f, r = self.cw_gain, self.r
        decay = math.acos(min(x_f, 1.0)) / math.pi + r  # -d(g - r x)/dx at x_f (carrier)
        decay = max(decay, r) if self.g is _conduction_carrier else 1.0 + r
        u_end = 40.0 / decay
        u = np.linspace(0.0, u_end, 200_001)
        sol = solve_ivp(lambda _u, x: [self.g(x[0]) - r * x[0]], (0.0, u_end), [0.0],
                        t_eval=u, rtol=1e-12, atol=1e-15, method="DOP853")
        x = np.minimum(np.maximum.accumulate(sol.y[0]), x_f)
        self.u_table, self.x_table = u, x
        self.ix_table = np.concatenate(([0.0], np.cumsum(0.5 * (x[1:] + x[:-1]) * np.diff(u))))

    def rate(self, e: float, v: float) -> float:
        """dV/dt in V/s."""
        charge = e * self.g(v / e) / self.tau_r if e > v else 0.0
        return charge - v / self.tau_d

    def plateau(self, e: float, v: float, h: float) -> tuple[float, float]:
        """V after ``h`` seconds of constant envelope ``e`` > 0, and the integral of V."""
        x0 = v / e
        if x0 > self.cw_gain or x0 < 0.0:
            return self._substeps(e, v, h)
        u0 = float(np.interp(x0, self.x_table, self.u_table))
        u1 = u0 + h / self.tau_r
        if u1 >= self.u_table[-1]:  # settled: x stays at x_f
            ix_end = self.ix_table[-1] + (u1 - self.u_table[-1]) * self.cw_gain
            x1 = self.cw_gain
        else:
            ix_end = float(np.interp(u1, self.u_table, self.ix_table))
            x1 = float(np.interp(u1, self.u_table, self.x_table))
        ix0 = float(np.interp(u0, self.u_table, self.ix_table))
        return e * x1, e * self.tau_r * (ix_end - ix0)

    def _substeps(self, e: float, v: float, h: float) -> tuple[float, float]:
        """Heun steps of at most tau_R/50 (V above the CW level of a plateau: rare)."""
        n = max(1, math.ceil(50.0 * h / self.tau_r))
        dt, integral = h / n, 0.0
        for _ in range(n):
            v_new = self.heun(e, e, v, dt)
            integral += 0.5 * dt * (v + v_new)
            v = v_new
        return v, integral

    def heun(self, e0: float, e1: float, v: float, h: float) -> float:
        """One Heun (trapezoidal predictor-corrector) step with the envelope linear in the step."""
        k1 = self.rate(e0, v)
        k2 = self.rate(e1, v + h * k1)
        return v + 0.5 * h * (k1 + k2)


@functools.lru_cache(maxsize=16)
def _diode(model: str, band_name: str) -> _Diode:
    band = BANDS[band_name]
    return _Diode(model, band.tau_charge_s, band.tau_discharge_s)


@dataclass(frozen=True)
class _Grid:
    """Knot grid of one period with the per-step constants the detector loop needs."""

    t: np.ndarray
    e: np.ndarray
    h: np.ndarray
    constant: np.ndarray
    decay: np.ndarray

    @classmethod
    def build(cls, t: np.ndarray, e: np.ndarray, tau_d: float) -> "_Grid":
        h = np.diff(t)
        return cls(t, e, h, e[1:] == e[:-1], np.exp(-h / tau_d))


def _run_period(diode: _Diode, grid: _Grid, v0: float) -> tuple[float, np.ndarray]:
    """Detector output over one pass of the grid: final V and the integral of V per step.

    Stretches where the diode cannot conduct (e below the decaying V) are done in one numpy
    step (exact exponential discharge); conducting steps are integrated one by one (Heun on
    sampled edges, tables on constant plateaus).
    """
    e, n = grid.e, len(grid.h)
    integral = np.empty(n)
    k, v = 0, v0
    while k < n:
        k_next = _next_conducting(grid, k, v, diode.tau_d)
        if k_next > k:  # discharge only, exactly
            v_end = v * math.exp(-(grid.t[k_next] - grid.t[k]) / diode.tau_d)
            v_steps = v * np.exp(-(grid.t[k:k_next + 1] - grid.t[k]) / diode.tau_d)
            integral[k:k_next] = diode.tau_d * (v_steps[:-1] - v_steps[1:])
            k, v = k_next, v_end
            if k >= n:
                break
        # conducting: step by step until the envelope is below V at both ends of a step
        # (the same test as _next_conducting: start or end of the step above the decaying V)
        while k < n and (e[k] > v or e[k + 1] > v * grid.decay[k]):
            if grid.constant[k]:
                v_new, integral[k] = diode.plateau(float(e[k]), v, float(grid.h[k]))
            else:
                v_new = diode.heun(float(e[k]), float(e[k + 1]), v, float(grid.h[k]))
                integral[k] = 0.5 * float(grid.h[k]) * (v + v_new)
            v, k = v_new, k + 1
    return v, integral


def _next_conducting(grid: _Grid, k: int, v: float, tau_d: float) -> int:
    """First knot index >= k from which the diode conducts, given V(t_k) = v (len if none)."""
    v_decay = v * np.exp(-(grid.t[k:] - grid.t[k]) / tau_d)
    above = np.flatnonzero(grid.e[k:] > v_decay)
    if above.size == 0:
        return len(grid.h)
    return k + max(int(above[0]) - 1, 0)


def _meter_max(t_s: np.ndarray, cum_vs: np.ndarray, tau_m_s: float, dwell_s: float) -> float:
    """Maximum over the dwell of a critically damped meter driven by x(t), given its integral.

    The meter y'' + 2 w0 y' + w0^2 y = w0^2 x (CISPR 16-1-1 QP time constants) is discretised
    exactly for a piecewise-constant input (zero-order hold) on bins of tau_m/400 and fed the bin
    means of x.
    """
    n_bins = max(16, math.ceil(_METER_BINS_PER_TAU * dwell_s / tau_m_s))
    dt = dwell_s / n_bins
    grid = np.linspace(0.0, dwell_s, n_bins + 1)
    x = np.diff(np.interp(grid, t_s, cum_vs)) / dt
    num, den = _meter_coefficients(tau_m_s, dt)
    # the ZOH filter has no direct term: output k is the meter at grid[k], driven by bins < k;
    # one extra input makes the last output the meter at the end of the dwell
    return float(max(0.0, signal.lfilter(num, den, np.append(x, 0.0)).max()))


@functools.lru_cache(maxsize=64)
def _meter_coefficients(tau_m_s: float, dt_s: float) -> tuple[np.ndarray, np.ndarray]:
    w0 = 1.0 / tau_m_s
    num, den, _ = signal.cont2discrete(([w0 * w0], [1.0, 2.0 * w0, w0 * w0]), dt_s,
                                       method="zoh")
    return np.ravel(num), np.ravel(den)


def _qp_detector_output(env: Envelope, band: Band, dwell_s: float, max_step_s: float,
                        model: str) -> tuple[np.ndarray, np.ndarray, float]:
    """Times and running integral of the QP diode output V(t) over the dwell, and the CW gain."""
    diode = _diode(model, band.name)
    if env.period_s is None:
        t, e = _refine(env, dwell_s, max_step_s)
        _, integral = _run_period(diode, _Grid.build(t, e, diode.tau_d), 0.0)
        return t, np.concatenate(([0.0], np.cumsum(integral))), diode.cw_gain
    period = env.period_s
    t, e = _refine(env, period, max_step_s)
    grid = _Grid.build(t, e, diode.tau_d)
    n_periods = dwell_s / period
    n_exact = min(math.ceil(n_periods), _EXACT_PERIODS)
    times, cums, v, c = [np.array([0.0])], [np.array([0.0])], 0.0, 0.0
    for n in range(n_exact):
        v, integral = _run_period(diode, grid, v)
        times.append(n * period + t[1:])
        cums.append(c + np.cumsum(integral))
        c = float(cums[-1][-1])
    if n_periods > n_exact:
        times_tail, cums_tail = _strobe(diode, grid, v, c, n_exact, n_periods, period)
        times.append(times_tail)
        cums.append(cums_tail)
    return np.concatenate(times), np.concatenate(cums), diode.cw_gain


def _strobe(diode: _Diode, grid: _Grid, v0: float, c0: float, n0: int, n_end: float,
            period: float) -> tuple[np.ndarray, np.ndarray]:
    """Follow many short periods as an ODE over the period index n (stroboscopic averaging).

    dV/dn = F(V) - V and dC/dn = G(V), with F and G one exact period of the detector: the
    fixed point, hence the steady state, is that of the exact map.
    """
    def rate(_n: float, state: np.ndarray) -> list[float]:
        v_end, integral = _run_period(diode, grid, float(state[0]))
        return [v_end - float(state[0]), float(integral.sum())]

    sol = solve_ivp(rate, (n0, n_end), [v0, c0], rtol=1e-8,
                    atol=[1e-14 + 1e-10 * v0, 1e-18 + 1e-12 * c0], dense_output=True)
    n = np.arange(n0 + 1, math.floor(n_end) + 1, dtype=float)
    n = np.append(n, n_end) if n.size == 0 or n[-1] < n_end else n
    return n * period, sol.sol(n)[1]


def _avg_input(env: Envelope, dwell_s: float, max_step_s: float,
               transform=None) -> tuple[np.ndarray, np.ndarray]:
    """Times and running integral of the envelope (or of ``transform(envelope)``)."""
    length = dwell_s if env.period_s is None else env.period_s
    t, e = _refine(env, length, max_step_s)
    if transform is not None:
        e = transform(e)
    # trapezoid: exact on constant stretches, spectrally accurate on the sampled Gaussian edges
    cum = np.concatenate(([0.0], np.cumsum(0.5 * (e[1:] + e[:-1]) * np.diff(t))))
    grid = np.linspace(0.0, dwell_s, max(16, math.ceil(2.0 * dwell_s / max_step_s)) + 1)
    if env.period_s is None:
        return grid, np.interp(grid, t, cum)
    whole, frac = np.divmod(grid, env.period_s)
    return grid, whole * cum[-1] + np.interp(frac, t, cum)


# ----------------------------------------------------------------------------------------------
# Public readings
# ----------------------------------------------------------------------------------------------


def _check_dwell(dwell_s: float) -> None:
    if not dwell_s > 0.0:
        raise AnalysisError(f"dwell must be > 0 s, found {dwell_s} s")


def peak(env: Envelope) -> float:
    """Peak detector reading, volts RMS-equivalent (max of the envelope).

    FCC 47 CFR 15.35(a) and CISPR 16-1-1 detector definitions.
    """
    return env.peak_v


def quasi_peak(env: Envelope, band: Band, dwell_s: float = 1.0, model: str = "carrier",
               normalise: bool = True) -> float:
    """Quasi-peak reading, volts RMS-equivalent.

    Parameters
    ----------
    env : Envelope
        IF envelope from one of the envelope generators (built with the same band).
    band : Band
        Band A, B or C/D (band E has no quasi-peak detector).
    dwell_s : float
        Measurement time; detector and meter start discharged at t = 0.
    model : {"carrier", "envelope"}
        ``"carrier"`` (default): half-wave diode driven by the IF carrier, charge current
        averaged over a carrier cycle (conduction-angle model). ``"envelope"``: ideal linear
        detector on the envelope, charge current (e - V)/R_c (the simpler textbook chain).
        Both set R_c C from the 63 % definition of the charge time constant.
    normalise : bool
        True: divide by the CW gain of the diode circuit so that a settled CW sine reads its
        RMS value. False: the raw maximum meter deflection.

    Returns
    -------
    float
        Reading in volts RMS-equivalent.
    """
    _check_dwell(dwell_s)
    if math.isnan(band.tau_charge_s):
        raise AnalysisError(f"band {band.name} has no quasi-peak detector: expected A, B or C/D")
    if model not in _CONDUCTION:
        raise AnalysisError(f"quasi-peak diode model must be one of {sorted(_CONDUCTION)}, "
                            f"found {model!r}")
    step = band.tau_meter_qp_s / _METER_BINS_PER_TAU
    t, cum, cw_gain = _qp_detector_output(env, band, dwell_s, step, model)
    deflection = _meter_max(t, cum, band.tau_meter_qp_s, dwell_s)
    return deflection / cw_gain if normalise else deflection


def cispr_average(env: Envelope, band: Band, dwell_s: float = 1.0) -> float:
    """CISPR average reading, volts RMS-equivalent (CISPR 16-1-1 average detector).

    Linear average of the envelope by the critically damped meter of time constant
    ``band.tau_meter_avg_s``, maximum held over ``dwell_s``; a CW sine reads its RMS value.
    """
    _check_dwell(dwell_s)
    step = band.tau_meter_avg_s / _METER_BINS_PER_TAU
    t, cum = _avg_input(env, dwell_s, step)
    return _meter_max(t, cum, band.tau_meter_avg_s, dwell_s)


def rms_average(env: Envelope, band: Band, dwell_s: float = 1.0) -> float:
    """RMS-average reading, volts RMS-equivalent (CISPR 16-1-1 rms-average detector).

    Corner PRFs from memory.

    Power average of the envelope with a one-pole time constant tau_rms, square root, then the
    meter of the average detector, maximum held. For a pulse train of energy integral W per
    pulse the reading tends to sqrt(W f) above the corner and to 2 f sqrt(W tau_rms) below it
    (the average weighting); the asymptotes meet at f = 1/(4 tau_rms), so
    tau_rms = 1/(4 f_corner) with the band's corner PRF (derived).
    """
    _check_dwell(dwell_s)
    tau_rms = 1.0 / (4.0 * band.rms_corner_prf_hz)
    step = min(band.tau_meter_avg_s, tau_rms) / _METER_BINS_PER_TAU
    t, cum_power = _avg_input(env, dwell_s, step, transform=np.square)
    # one-pole power average on the same bins (exact ZOH), then the square root, then the meter
    power = np.diff(cum_power) / np.diff(t)
    a = math.exp(-(t[1] - t[0]) / tau_rms)
    smoothed = signal.lfilter([1.0 - a], [1.0, -a], power)
    amplitude = np.sqrt(np.maximum(smoothed, 0.0))
    cum = np.concatenate(([0.0], np.cumsum(amplitude * np.diff(t))))
    return _meter_max(t, cum, band.tau_meter_avg_s, dwell_s)


def to_dbuv(volts: float) -> float:
    """RMS-equivalent volts to dB(uV): 20 log10(V / 1 uV)."""
    return 20.0 * math.log10(volts / 1e-6)


# ----------------------------------------------------------------------------------------------
# Cached offsets for the simulated analyzer
# ----------------------------------------------------------------------------------------------


def _round_sig(x: float, digits: int = 6) -> float:
    return float(f"{x:.{digits}g}")


def reading_offsets_db(prf_hz: float | None, duty: float, freq_hz: float,
                       dwell_s: float = 1.0) -> dict[str, float]:
    """Detector readings of a burst-modulated line relative to its peak reading, dB.

    Parameters
    ----------
    prf_hz : float or None
        Burst repetition frequency in Hz; None (or ``duty >= 1``) means CW.
    duty : float
        On fraction of each burst period.
    freq_hz : float
        Line frequency; only its CISPR band matters.
    dwell_s : float
        Measurement time per frequency.

    Returns
    -------
    dict
        ``peak`` (0.0), ``quasi_peak`` (absent in band E), ``cispr_average``, ``rms_average``,
        all in dB relative to the peak reading of the same signal. Cached per band and rounded
        arguments.
    """
    band = cispr_band(freq_hz)
    if prf_hz is None or duty >= 1.0:
        return dict(_offsets(None, 1.0, band.name, _round_sig(dwell_s)))
    return dict(_offsets(_round_sig(prf_hz), _round_sig(duty), band.name, _round_sig(dwell_s)))


def peak_offset_db(prf_hz: float | None, duty: float, freq_hz: float) -> float:
    """Peak reading of a burst-modulated line relative to its on-level RMS, dB (<= 0).

    Short bursts (on time below about 1/B_imp) and PRFs above the bandwidth (the receiver
    resolves the single carrier line of level duty * V) read below the on level.
    """
    band = cispr_band(freq_hz)
    if prf_hz is None or duty >= 1.0:
        return 0.0
    return _peak_offset(_round_sig(prf_hz), _round_sig(duty), band.name)


@functools.lru_cache(maxsize=4096)
def _peak_offset(prf_hz: float, duty: float, band_name: str) -> float:
    env = burst_envelope(1.0, prf_hz, duty, BANDS[band_name])
    return to_dbuv(peak(env)) - to_dbuv(1.0)


@functools.lru_cache(maxsize=4096)
def _offsets(prf_hz: float | None, duty: float, band_name: str,
             dwell_s: float) -> dict[str, float]:
    band = BANDS[band_name]
    env = burst_envelope(1.0, prf_hz, duty, band)
    ref = to_dbuv(peak(env))
    out = {"peak": 0.0}
    if not math.isnan(band.tau_charge_s):
        out["quasi_peak"] = to_dbuv(quasi_peak(env, band, dwell_s)) - ref
    out["cispr_average"] = to_dbuv(cispr_average(env, band, dwell_s)) - ref
    out["rms_average"] = to_dbuv(rms_average(env, band, dwell_s)) - ref
    return out
