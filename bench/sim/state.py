"""Shared state of the simulated bench: what the wire-level simulators agree on.

The simulated analyzer (SCPI), the simulated stage (G-code) and the simulated mast and
turntable are separate servers, as on a real bench, but they act on one physical world. This
module holds the small mutable record they share and the spectral-line type the world hands to
the receiver model. It imports nothing from ``bench.drivers`` or ``bench.run``.

Coordinates: the stage frame, in metres. The board's origin (its corner (0, 0) on the top
surface) sits at ``board_origin_m`` in stage coordinates; board coordinates are stage minus
origin. Z is up; probe height above the board surface is ``z_m - board_origin_m[2]``.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field

__all__ = ["Line", "SimState"]


@dataclass(frozen=True)
class Line:
    """One spectral line as it arrives at the analyzer input.

    Attributes
    ----------
    freq_hz : float
        Frequency of the line.
    level_dbm : float
        RMS level of the line at the analyzer input while the emitter is on (what a peak
        detector reads for a CW line), after the probe or antenna and the cable/preamp chain.
    source : str
        Name of the emitter or ambient carrier, for debugging and tests.
    prf_hz : float or None
        For a burst-modulated emitter: repetition frequency of the bursts. None means CW.
    duty : float
        On fraction of each burst period (1.0 for CW).
    ambient : bool
        True for carriers that exist with the board off (broadcast, mobile, ...).
    """

    freq_hz: float
    level_dbm: float
    source: str = ""
    prf_hz: float | None = None
    duty: float = 1.0
    ambient: bool = False


@dataclass
class SimState:
    """Mutable pose of the bench, shared by all simulated instruments.

    Every access from a server thread goes through ``lock``.

    Attributes
    ----------
    probe_m : list of float
        Probe tip position (x, y, z) in stage coordinates, metres.
    probe_rotation_deg : float
        Rotation of the probe about the vertical axis (stage A axis). 0 deg: an H loop's axis
        points along +x; 90 deg: along +y. Meaningless for an E probe.
    tool : int
        Tool number of the mounted probe (G-code ``T<n> M6``); 0 = none mounted.
    board_powered : bool
        False during an ambient capture on the simulator (the runner cannot switch a real
        board; the simulator exposes a switch for demos and tests).
    mast_height_m : float
        Receive-antenna height above the ground plane.
    polarization : str
        ``"horizontal"`` or ``"vertical"``.
    azimuth_deg : float
        Turntable angle, degrees, counter-clockwise seen from above.
    homed : bool
        Stage has been homed since power-up.
    virtual_time_s : float
        The simulated clock (seconds since the simulator started).
    """

    probe_m: list[float] = field(default_factory=lambda: [0.0, 0.0, 0.05])
    probe_rotation_deg: float = 0.0
    tool: int = 0
    board_powered: bool = True
    mast_height_m: float = 1.0
    polarization: str = "horizontal"
    azimuth_deg: float = 0.0
    homed: bool = False
    virtual_time_s: float = 0.0
    lock: threading.RLock = field(default_factory=threading.RLock, repr=False, compare=False)
