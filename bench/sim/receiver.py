"""Receiver model of the simulated swept spectrum analyzer: computes every trace, never replays.

Given the spectral lines at the analyzer input (dBm RMS, from the world model) and the receiver
settings, :func:`sweep` returns what the analyzer displays:

* the trace axis is ``f_i = start + i*(stop - start)/(N - 1)`` (common practice);
* each line passes the resolution filter, a Gaussian whose 6 dB bandwidth is the RBW (the CISPR
  filter type). Its amplitude is halved at ``df = B6/2``, so a tone at offset ``df`` is
  attenuated by ``20*log10(2)*(2*df/B6)**2`` = ``6.02*(2*df/B6)**2`` dB
  (Gaussian RBW filter, derived: docs/physics.md);
* the noise floor is thermal noise at 290 K times the noise figure in the filter's equivalent
  noise bandwidth, ENBW = 1.0645*B3 with B3 = B6/sqrt(2) (derived: docs/physics.md), raised dB for
  dB by the input attenuator, which sits before the mixer while the display is corrected for it
  (common practice);
* noise is a complex Gaussian process added to the lines' voltage; the detectors see the
  envelope of the sum, sampled ``M`` times per trace point (M independent samples: the envelope
  decorrelates in about 1/RBW, so M = dwell*RBW, capped);
* burst-modulated lines (``Line.prf_hz`` set) depend on the detector and on the dwell per point;
* the mixer compresses softly when the total input power minus the attenuation exceeds about
  -10 dBm, and the sweep is flagged as overloaded (the "10 dB more attenuation changes the reading
  by less than 1 dB" check (common practice) then fails, as on a real analyzer).

Several lines inside one resolution bandwidth add in power (random relative phase averaged over
the dwell), not as a coherent beat.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.constants

from bench.sim.state import Line

__all__ = [
    "DETECTORS",
    "IMPULSE_PER_B6",
    "burst_peak_factor",
    "KT_DBM_PER_HZ",
    "MIXER_1DB_COMPRESSION_DBM",
    "ReceiverSettings",
    "Sweep",
    "compression_db",
    "effective_sweep_time_s",
    "enbw_hz",
    "frequency_axis_hz",
    "mixer_level_dbm",
    "noise_floor_dbm",
    "samples_per_bucket",
    "sweep",
    "sweep_time_s",
    "synthesize_trace",
]

#: Detector codes: positive peak, negative peak, sample, average (log/video average), RMS
#: (power average), CISPR quasi-peak, CISPR average.
DETECTORS = ("POS", "NEG", "SAMP", "AVER", "RMS", "QPE", "CAV")

#: Thermal noise power density kT at 290 K, dBm/Hz (derived:
#: docs/physics.md; from Boltzmann's constant).
KT_DBM_PER_HZ = 10.0 * math.log10(scipy.constants.k * 290.0 / 1e-3)

#: Mixer level (input minus attenuation) where the gain is 1 dB compressed, dBm.
MIXER_1DB_COMPRESSION_DBM = -10.0

# Gaussian amplitude response H(df) = 2**(-(2*df/B6)**2): exactly -6.02 dB at df = B6/2.
# Power response 4**(-(2*df/B6)**2); ENBW = sqrt(pi/(8 ln 2))*B6 = 1.0645*B3 (derived).
_ENBW_PER_B6 = math.sqrt(math.pi / (4.0 * math.log(2.0))) / math.sqrt(2.0)
_GAUSS_DB_AT_HALF_B6 = 20.0 * math.log10(2.0)
# Lines weaker than this below the noise floor after the filter are left out (no visible effect).
_NEGLIGIBLE_BELOW_FLOOR_DB = 30.0
# Soft-compression knee (Rapp-type, smoothness 2, power domain):
# gain = (1 + (P_mix/P_sat)**2)**-0.5, 1 dB down at MIXER_1DB_COMPRESSION_DBM.
_P_SAT_DBM = MIXER_1DB_COMPRESSION_DBM - 5.0 * math.log10(10.0**0.2 - 1.0)
_MAX_SAMPLES_PER_BUCKET = 32


@dataclass(frozen=True)
class ReceiverSettings:
    """Settings of one sweep.

    Attributes
    ----------
    start_hz, stop_hz : float
        First and last trace frequency, Hz (equal for zero span).
    points : int
        Number of trace points N.
    rbw_hz : float
        Resolution bandwidth, Hz, taken as the 6 dB bandwidth B6 of a Gaussian filter.
    vbw_hz : float or None
        Video bandwidth, Hz; None means equal to the RBW. Only lengthens the sweep time.
    detector : str
        One of :data:`DETECTORS`.
    attenuation_db : float
        Input attenuation, dB.
    ref_level_dbm : float
        Reference level, dBm (display only; the model does not clip at it).
    noise_figure_db : float
        Noise figure of the receiver with 0 dB attenuation, dB.
    sweep_time_s : float or None
        Manual sweep time, s; None means automatic (:func:`sweep_time_s`).
    """

    start_hz: float
    stop_hz: float
    points: int = 1001
    rbw_hz: float = 120e3
    vbw_hz: float | None = None
    detector: str = "POS"
    attenuation_db: float = 10.0
    ref_level_dbm: float = 0.0
    noise_figure_db: float = 24.0
    sweep_time_s: float | None = None

    def __post_init__(self) -> None:
        if not 0.0 <= self.start_hz <= self.stop_hz:
            raise ValueError(f"expected 0 <= start_hz <= stop_hz, found {self.start_hz!r}, "
                             f"{self.stop_hz!r}")
        if int(self.points) != self.points or self.points < 1:
            raise ValueError(f"expected a whole number of points >= 1, found {self.points!r}")
        if not self.rbw_hz > 0.0 or (self.vbw_hz is not None and not self.vbw_hz > 0.0):
            raise ValueError(f"expected rbw_hz, vbw_hz > 0, found {self.rbw_hz!r}, {self.vbw_hz!r}")
        if self.detector not in DETECTORS:
            raise ValueError(f"expected a detector in {DETECTORS}, found {self.detector!r}")
        if self.sweep_time_s is not None and not self.sweep_time_s > 0.0:
            raise ValueError(f"expected sweep_time_s > 0 or None, found {self.sweep_time_s!r}")


@dataclass(frozen=True)
class Sweep:
    """Result of one computed sweep.

    Attributes
    ----------
    freq_hz : numpy.ndarray
        Trace axis, Hz.
    level_dbm : numpy.ndarray
        Displayed level per point, dBm (float64).
    overloaded : bool
        True when the mixer was driven beyond its 1 dB compression point.
    mixer_level_dbm : float
        Total power of all input lines at the mixer (input minus attenuation), dBm.
    sweep_time_s : float
        Time the sweep takes, s.
    """

    freq_hz: np.ndarray
    level_dbm: np.ndarray
    overloaded: bool
    mixer_level_dbm: float
    sweep_time_s: float


def frequency_axis_hz(settings: ReceiverSettings) -> np.ndarray:
    """Trace frequencies ``f_i = start + i*(stop - start)/(N - 1)``, Hz (common practice)."""
    return np.linspace(settings.start_hz, settings.stop_hz, settings.points)


def enbw_hz(rbw_hz: float) -> float:
    """Equivalent noise bandwidth, Hz, of a Gaussian filter with 6 dB bandwidth ``rbw_hz``.

    ENBW = 1.0645*B3 and B3 = B6/sqrt(2) (derived: docs/physics.md): 90.33 kHz for B6 = 120 kHz.
    """
    return _ENBW_PER_B6 * rbw_hz


def noise_floor_dbm(settings: ReceiverSettings) -> float:
    """Mean noise power the RMS detector displays, dBm.

    kT(290 K) + NF + 10*log10(ENBW/Hz) + attenuation (DANL, derived: docs/physics.md;
    kT = -173.98 dBm/Hz from Boltzmann's constant; ENBW of the Gaussian RBW filter, derived).
    """
    return (KT_DBM_PER_HZ + settings.noise_figure_db + 10.0 * math.log10(enbw_hz(settings.rbw_hz))
            + settings.attenuation_db)


def sweep_time_s(settings: ReceiverSettings, k: float = 2.5, min_s: float = 1e-3) -> float:
    """Automatic (shortest accurate) sweep time, s.

    ``k*span/(RBW*min(RBW, VBW))`` with ``k`` about 2-3 for near-Gaussian filters (Witte, *Spectrum
    and Network Measurements*; Engelson; the VBW < RBW form from memory), never shorter than
    ``min_s``.
    """
    span_hz = settings.stop_hz - settings.start_hz
    vbw_hz = settings.rbw_hz if settings.vbw_hz is None else settings.vbw_hz
    return max(min_s, k * span_hz / (settings.rbw_hz * min(settings.rbw_hz, vbw_hz)))


def effective_sweep_time_s(settings: ReceiverSettings) -> float:
    """The manual sweep time when one is set, else :func:`sweep_time_s`, s."""
    return settings.sweep_time_s if settings.sweep_time_s is not None else sweep_time_s(settings)


def samples_per_bucket(settings: ReceiverSettings) -> int:
    """Independent envelope samples M per trace point: ``dwell*RBW``, between 1 and 32.

    The envelope at the filter output decorrelates in about 1/RBW, so a dwell of
    ``sweep_time/N`` holds about ``dwell*RBW`` independent samples (cap for speed).
    """
    dwell_s = effective_sweep_time_s(settings) / settings.points
    return int(min(_MAX_SAMPLES_PER_BUCKET, max(1, round(dwell_s * settings.rbw_hz))))


def mixer_level_dbm(lines: Sequence[Line], attenuation_db: float) -> float:
    """Total on-level power of ``lines`` at the mixer, dBm (input minus attenuation).

    There is no preselector: every line at the input reaches the mixer. -inf with no lines.
    """
    total_mw = sum(10.0 ** (line.level_dbm / 10.0) for line in lines)
    return 10.0 * math.log10(total_mw) - attenuation_db if total_mw > 0.0 else -math.inf


def compression_db(mixer_dbm: float) -> float:
    """Gain change of the mixer, dB (<= 0), at total mixer level ``mixer_dbm``.

    Soft saturation ``G = (1 + (P/P_sat)**2)**-0.5`` (power gain), scaled so that G = -1 dB at
    :data:`MIXER_1DB_COMPRESSION_DBM`: -0.013 dB 10 dB below it, -0.0001 dB 20 dB below.
    """
    if mixer_dbm == -math.inf:
        return 0.0
    return -5.0 * math.log10(1.0 + 10.0 ** ((mixer_dbm - _P_SAT_DBM) / 5.0))


def synthesize_trace(lines: Sequence[Line], settings: ReceiverSettings,
                     rng: np.random.Generator) -> np.ndarray:
    """Displayed trace, dBm per point (float64); see :func:`sweep`."""
    return sweep(lines, settings, rng).level_dbm


def sweep(lines: Sequence[Line], settings: ReceiverSettings, rng: np.random.Generator) -> Sweep:
    """Compute one sweep of the analyzer over ``lines``.

    Parameters
    ----------
    lines : sequence of Line
        Every line at the analyzer input, dBm RMS (on-level for burst lines). Lines outside the
        span only count toward the mixer level.
    settings : ReceiverSettings
        Span, RBW, detector, attenuation, noise figure, sweep time.
    rng : numpy.random.Generator
        Source of the noise and of the burst timing; the same generator state gives the same
        trace.

    Returns
    -------
    Sweep
        Levels in dBm, the overload flag, the mixer level and the sweep time.
    """
    freq_hz = frequency_axis_hz(settings)
    duration_s = effective_sweep_time_s(settings)
    mixer_dbm = mixer_level_dbm(lines, settings.attenuation_db)
    gain_db = compression_db(mixer_dbm)
    floor_dbm = noise_floor_dbm(settings)
    signal_mw = _signal_power_mw(lines, settings, freq_hz, gain_db, floor_dbm,
                                 duration_s / settings.points, rng)
    noise_mw = 10.0 ** (floor_dbm / 10.0)
    level_dbm = _detect(signal_mw, noise_mw, settings.detector, samples_per_bucket(settings), rng)
    return Sweep(freq_hz=freq_hz, level_dbm=level_dbm,
                 overloaded=mixer_dbm > MIXER_1DB_COMPRESSION_DBM,
                 mixer_level_dbm=mixer_dbm, sweep_time_s=duration_s)


def _signal_power_mw(lines: Sequence[Line], settings: ReceiverSettings, freq_hz: np.ndarray,
                     gain_db: float, floor_dbm: float, dwell_s: float,
                     rng: np.random.Generator) -> np.ndarray:
    """Power of all lines after the RBW filter and detector weighting, mW per trace point."""
    out_mw = np.zeros(freq_hz.size)
    if not lines:
        return out_mw
    line_freq_hz = np.fromiter((line.freq_hz for line in lines), float, len(lines))
    line_dbm = np.fromiter((line.level_dbm for line in lines), float, len(lines)) + gain_db
    # Half-width where the Gaussian skirt has pushed the line below floor - 30 dB.
    reach_db = np.maximum(line_dbm - floor_dbm + _NEGLIGIBLE_BELOW_FLOOR_DB, 0.0)
    half_width_hz = 0.5 * settings.rbw_hz * np.sqrt(reach_db / _GAUSS_DB_AT_HALF_B6)
    first = np.searchsorted(freq_hz, line_freq_hz - half_width_hz, side="left")
    last = np.searchsorted(freq_hz, line_freq_hz + half_width_hz, side="right")
    counts = np.maximum(last - first, 0)
    total = int(counts.sum())
    if total == 0:
        return out_mw
    line_idx = np.repeat(np.arange(len(lines)), counts)
    offsets = np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts)
    bin_idx = np.repeat(first, counts) + offsets
    x = 2.0 * (freq_hz[bin_idx] - line_freq_hz[line_idx]) / settings.rbw_hz
    weight = 10.0 ** (line_dbm[line_idx] / 10.0) * np.power(4.0, -x * x)
    weight *= _burst_factor(lines, line_idx, settings.detector, dwell_s, rng)
    weight *= _rise_factor(lines, settings.rbw_hz, settings.detector)[line_idx]
    return np.bincount(bin_idx, weights=weight, minlength=freq_hz.size)


#: Impulse bandwidth of a Gaussian filter over its 6 dB bandwidth: sqrt(pi / (4 ln 2)) = 1.0645
#: (derived in docs/physics.md; CISPR 16-1-1 relates B_imp and B6 the same way for its filters).
IMPULSE_PER_B6 = math.sqrt(math.pi / (4.0 * math.log(2.0)))


def burst_peak_factor(on_time_s: float, rbw_hz: float) -> float:
    """Peak of the IF envelope of a rectangular RF burst over that of a CW line of the same level.

    A Gaussian IF filter of 6 dB bandwidth ``rbw_hz`` has the impulse response
    h(t) = B_imp exp(-pi B_imp^2 t^2) (unit DC gain, peak B_imp), so a burst of length tau
    reaches at most erf(sqrt(pi) B_imp tau / 2) of the CW envelope, tending to B_imp * tau for
    short bursts: 20 log10(tau B_imp) dB (derived; the same limit as CISPR 16-1-1 states for
    impulses).
    """
    b_imp = IMPULSE_PER_B6 * rbw_hz
    return math.erf(math.sqrt(math.pi) * b_imp * on_time_s / 2.0)


def _rise_factor(lines: Sequence[Line], rbw_hz: float, detector: str) -> np.ndarray:
    """Power factor per line for envelope-peak detectors: bursts shorter than the filter's rise.

    Peak, sample and negative peak read the envelope's value; the linear and power averages
    keep the burst's area (a filter with a positive impulse response preserves it), and the
    CISPR detectors are modelled from the envelope at their own bandwidth.
    """
    out = np.ones(len(lines))
    if detector not in ("POS", "SAMP", "NEG"):
        return out
    for i, line in enumerate(lines):
        if line.prf_hz is not None and line.duty < 1.0:
            out[i] = burst_peak_factor(line.duty / line.prf_hz, rbw_hz) ** 2
    return out


def _burst_factor(lines: Sequence[Line], line_idx: np.ndarray, detector: str, dwell_s: float,
                  rng: np.random.Generator) -> np.ndarray:
    """Power factor per (line, point) pair for the detector; 1 for CW lines."""
    prf_hz = np.array([line.prf_hz if line.prf_hz is not None else np.nan for line in lines])
    if np.all(np.isnan(prf_hz)):
        return np.ones(line_idx.size)
    duty = np.array([line.duty for line in lines])
    if detector in ("QPE", "CAV"):
        per_line_db = _cispr_offsets_db(lines, detector)
        return 10.0 ** (per_line_db[line_idx] / 10.0)
    prf_p, duty_p = prf_hz[line_idx], duty[line_idx]
    burst = ~np.isnan(prf_p)
    covered = dwell_s * np.where(burst, prf_p, 0.0) >= 1.0  # the dwell holds a whole period
    draw = rng.random(line_idx.size)
    factor = _burst_detector_factor(detector, duty_p, dwell_s * np.nan_to_num(prf_p), covered, draw)
    return np.where(burst, factor, 1.0)


def _burst_detector_factor(detector: str, duty: np.ndarray, periods: np.ndarray,
                           covered: np.ndarray, draw: np.ndarray) -> np.ndarray:
    """Detector reading of a burst line relative to its on-level, linear power.

    ``periods`` is dwell*PRF. A window of length dwell at a random phase overlaps an on-interval
    with probability min(1, duty + dwell*PRF) and lies wholly inside one with probability
    max(0, duty - dwell*PRF) (derived: geometric probability over one period).
    """
    on_somewhere = draw < np.minimum(1.0, duty + periods)
    on_throughout = draw < np.maximum(0.0, duty - periods)
    sampled_on = (draw < duty).astype(float)
    if detector == "POS":
        return np.where(covered, 1.0, on_somewhere.astype(float))
    if detector == "NEG":
        return on_throughout.astype(float)
    if detector == "SAMP":
        return sampled_on
    if detector == "RMS":  # power average: duty * P_on over a long dwell
        return np.where(covered, duty, sampled_on)
    # AVER: linear envelope average, level + 20*log10(duty) over a long dwell
    # (AVG = peak + 20 log10(duty): derived; CISPR 16-1-1 average detector)
    return np.where(covered, duty * duty, sampled_on)


def _cispr_offsets_db(lines: Sequence[Line], detector: str) -> np.ndarray:
    """Quasi-peak or CISPR-average reading of each line relative to its peak, dB (0 for CW).

    Above 1 GHz CISPR defines no quasi-peak (CISPR 16-1-1, band E); the peak reading stands in.
    """
    # imported here: the detector models load scipy's ODE solvers, needed only by QP/CAV sweeps
    from bench.sim.detectors import reading_offsets_db

    key = "quasi_peak" if detector == "QPE" else "cispr_average"
    out = np.zeros(len(lines))
    for i, line in enumerate(lines):
        if line.prf_hz is not None and line.duty < 1.0:
            out[i] = reading_offsets_db(line.prf_hz, line.duty, line.freq_hz).get(key, 0.0)
    return out


def _detect(signal_mw: np.ndarray, noise_mw: float, detector: str, m: int,
            rng: np.random.Generator) -> np.ndarray:
    """Apply the detector to M envelope samples of (signal + complex Gaussian noise), dBm."""
    n = signal_mw.size
    scale = math.sqrt(noise_mw / 2.0)  # per quadrature, so E|noise|^2 = noise_mw
    noise = rng.standard_normal((2, n, m)) * scale
    # The noise is circular, so the signal can sit on the real axis without loss of generality.
    power = (np.sqrt(signal_mw)[:, None] + noise[0]) ** 2 + noise[1] ** 2
    tiny = np.finfo(float).tiny
    if detector == "POS":
        reading = power.max(axis=1)
    elif detector == "NEG":
        reading = power.min(axis=1)
    elif detector == "SAMP":
        reading = power[:, 0]
    elif detector in ("RMS", "QPE"):
        # QPE on noise: power mean, between the envelope average and the peak (model choice;
        # only the ordering Peak >= QP >= Average is relied on: CISPR 16-1-1 detector
        # definitions; common practice).
        reading = power.mean(axis=1)
    elif detector == "AVER":  # log (video) average: noise reads 2.51 dB below RMS (derived)
        return 10.0 * np.log10(np.maximum(power, tiny)).mean(axis=1)
    else:  # CAV: linear envelope average; noise reads 1.05 dB below RMS (derived)
        reading = np.sqrt(power).mean(axis=1) ** 2
    return 10.0 * np.log10(np.maximum(reading, tiny))
