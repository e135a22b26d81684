"""Bursts shorter than the IF filter's rise time read low, as a Gaussian filter makes them.

Measured over SCPI through the simulated analyzer, as a user would: a board with one radio
emitter sending 1 us bursts, against the same emitter sending long bursts.
"""

from __future__ import annotations

import math
import tomllib
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
import tomli_w
from scipy.integrate import quad
from scipy.special import erf

from bench.drivers.analyzer import Analyzer, load_analyzer_profile
from bench.simbench import SimulatedBench
from bench.sim.board import parse_board
from bench.sim.receiver import IMPULSE_PER_B6, burst_peak_factor
from bench.sweepsettings import SweepSettings
from bench.transports import TransportSettings, open_transport

DEMO = Path(str(resources.files("bench.demo")))
F_HZ = 867.84e6  # the demo board's radio harmonic


def _board(on_time_s: float):
    """The demo board with only its radio harmonic, bursting at 1 kHz for ``on_time_s``."""
    data = tomllib.loads((DEMO / "demo-board.toml").read_text(encoding="utf-8"))
    radio = next(e for e in data["emitters"] if e["kind"] == "burst")
    # 10 x the demo current: the short burst then stands 35 dB above the noise, which would
    # otherwise lift its peak reading
    radio.update(repetition="1 kHz", duty=on_time_s / 1e-3, tolerance_ppm=0, current="2.5 mA")
    data["emitters"], data["ambient"] = [radio], []
    return parse_board(tomli_w.dumps(data), "burst-board")


def _peak_dbm(on_time_s: float, rbw_hz: float) -> float:
    """Peak reading in zero span at the line, 10 ms per point (ten burst periods)."""
    sim = SimulatedBench(_board(on_time_s), seed=5)
    sim.start()
    try:
        sim.state.mast_height_m, sim.state.polarization = 2.5, "vertical"
        an = Analyzer(open_transport(sim.addresses["analyzer"], TransportSettings(timeout_s=5.0)),
                      load_analyzer_profile("scpi-analyzer"))
        try:
            an.initialize()
            an.configure(SweepSettings(start_hz=F_HZ, stop_hz=F_HZ, rbw_hz=rbw_hz, vbw_hz=3 * rbw_hz,
                                       points=101, sweep_time_s=1.0))
            an.sweep()
            return float(np.max(an.fetch_trace(101)))
        finally:
            an.transport.close()
    finally:
        sim.stop()


def test_the_envelope_peak_follows_the_gaussian_filter():
    # numerical check of the closed form: the peak of a rectangular pulse through a Gaussian
    # filter, integrated with SciPy, against erf(sqrt(pi) B_imp tau / 2)
    b6, tau = 120e3, 1e-6
    b_imp = IMPULSE_PER_B6 * b6
    peak, _ = quad(lambda t: b_imp * math.exp(-math.pi * (b_imp * t) ** 2), -tau / 2, tau / 2)
    assert burst_peak_factor(tau, b6) == pytest.approx(peak, rel=1e-9)
    assert burst_peak_factor(tau, b6) == pytest.approx(erf(math.sqrt(math.pi) * b_imp * tau / 2))


@pytest.mark.parametrize(("rbw_hz", "expected_db"), [(120e3, -17.9), (1e6, -1.75)])
def test_a_1_us_burst_reads_below_a_long_one_as_the_filter_says(rbw_hz, expected_db):
    # 20 log10(tau B_imp) for short bursts: about -18 dB at 120 kHz, about -2 dB at 1 MHz
    # (Gaussian filter, B_imp = 1.0645 B6; derived in docs/physics.md)
    short, long = _peak_dbm(1e-6, rbw_hz), _peak_dbm(0.5e-3, rbw_hz)
    assert short - long == pytest.approx(expected_db, abs=0.5)
