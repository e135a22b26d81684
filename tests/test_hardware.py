"""Contract tests against real instruments: skipped unless an environment variable gives an address.

    BENCH_ANALYZER=TCPIP::192.168.1.20::5025::SOCKET [BENCH_ANALYZER_PROFILE=path.toml]
    BENCH_STAGE=/dev/ttyUSB0 [BENCH_STAGE_PROFILE=gcode-cnc]
    pytest -m hardware -rs

The same driver code runs here as against the simulated bench (tests/test_end_to_end.py). Only
read-only or small, safe actions: identification, one sweep, a position report. Nothing moves.
"""

import os

import numpy as np
import pytest

pytestmark = pytest.mark.hardware

ANALYZER = os.environ.get("BENCH_ANALYZER")
STAGE = os.environ.get("BENCH_STAGE")


@pytest.mark.skipif(not ANALYZER, reason="set BENCH_ANALYZER to a VISA resource to test a real analyzer")
def test_real_analyzer_identifies_and_sweeps():
    from bench.drivers.analyzer import Analyzer, SweepSettings, load_analyzer_profile
    from bench.transports import open_transport

    profile = load_analyzer_profile(os.environ.get("BENCH_ANALYZER_PROFILE", "scpi-analyzer"))
    transport = open_transport(ANALYZER, profile.io)
    try:
        an = Analyzer(transport, profile)
        ident = an.initialize()
        assert len(ident.split(",")) == 4  # IEEE 488.2 *IDN? has four fields
        an.configure(SweepSettings(start_hz=88e6, stop_hz=108e6, rbw_hz=120e3, vbw_hz=300e3,
                                   points=max(profile.min_points, 401)))
        an.sweep()
        trace = an.fetch_trace(max(profile.min_points, 401))
        # a trace of finite levels in a plausible range for an analyzer input, dBm
        assert np.all(np.isfinite(trace)) and -200 < float(np.median(trace)) < 30
    finally:
        transport.close()


@pytest.mark.skipif(not STAGE, reason="set BENCH_STAGE to a serial port or socket:// URL to test a real stage")
def test_real_stage_banner_and_position_without_moving():
    from bench.drivers.stage import Stage, StageLimits, StageProfile

    profile = StageProfile.load(os.environ.get("BENCH_STAGE_PROFILE", "gcode-cartesian"))
    limits = StageLimits(x_m=(0.0, 0.3), y_m=(0.0, 0.2), z_m=(0.0, 0.06), safe_z_m=0.04,
                         max_feed_m_per_s=0.02, position_tolerance_m=1e-4)
    stage = Stage.open(STAGE, profile, limits)
    try:
        stage.connect()
        position = stage.position()
        assert len(position) >= 3
    finally:
        stage.close()
