"""SCPI network instruments of the simulated bench: a spectrum analyzer and a bench supply.

Both are real instruments on a loopback TCP socket (VISA resource
``TCPIP::127.0.0.1::<port>::SOCKET``, or pyserial URL ``socket://127.0.0.1:<port>``), one
command line per ``\\n`` (``\\r\\n`` accepted), so a driver talks to them exactly as to a bench
analyzer. This module gathers the public names of the rooms they are built from:

* :mod:`bench.sim.scpisyntax`: headers, parameters, command rows, error codes;
* :mod:`bench.sim.scpiinstrument`: message dispatch, error queue, IEEE 488.2 status, common
  commands;
* :mod:`bench.sim.analyzer`: the analyzer's settings, sweeps and traces;
* :mod:`bench.sim.supply`: the supply;
* :mod:`bench.sim.faults`: injected faults;
* :mod:`bench.sim.scpiserver`: serving them (over :mod:`bench.sim.lineserver`).
"""

from __future__ import annotations

from bench.sim.analyzer import (
    ANALYZER_IDN,
    ANALYZER_ROWS,
    ATT_MAX_DB,
    ATT_STEP_DB,
    FREQ_MAX_HZ,
    FREQ_MIN_HZ,
    POINTS_MAX,
    POINTS_MIN,
    RBW_MAX_HZ,
    RBW_MIN_HZ,
    AnalyzerSetup,
    SimAnalyzer,
)
from bench.sim.faults import Faults
from bench.sim.lineserver import DropConnection, HangConnection, RefuseConnection
from bench.sim.scpiinstrument import COMMON_ROWS, ScpiInstrument
from bench.sim.scpiserver import ScpiServer
from bench.sim.scpisyntax import OVERLOAD_CODE, Row, ScpiError, compile_header
from bench.sim.supply import SUPPLY_IDN, SUPPLY_ROWS, SimSupply

__all__ = [
    "ANALYZER_IDN",
    "ANALYZER_ROWS",
    "ATT_MAX_DB",
    "ATT_STEP_DB",
    "AnalyzerSetup",
    "COMMON_ROWS",
    "DropConnection",
    "FREQ_MAX_HZ",
    "FREQ_MIN_HZ",
    "Faults",
    "HangConnection",
    "OVERLOAD_CODE",
    "POINTS_MAX",
    "POINTS_MIN",
    "RBW_MAX_HZ",
    "RBW_MIN_HZ",
    "RefuseConnection",
    "Row",
    "SUPPLY_IDN",
    "SUPPLY_ROWS",
    "ScpiError",
    "ScpiInstrument",
    "ScpiServer",
    "SimAnalyzer",
    "SimSupply",
    "compile_header",
]
