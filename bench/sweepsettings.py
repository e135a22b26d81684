"""The settings of one analyzer sweep: the one type the planner, the executor and the driver share.

A leaf module (it imports nothing of the project) so that :mod:`bench.planning` (whose
``Segment`` extends it with the trace mode and the estimate) and the analyzer driver
(:mod:`bench.drivers.analyzer`, which sends it) both use this definition. SI units inside.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["SweepSettings"]


@dataclass(frozen=True)
class SweepSettings:
    """One sweep's settings, SI inside.

    Attributes
    ----------
    start_hz, stop_hz : float
        Frequency axis; points are spread linearly from start to stop inclusive.
    rbw_hz, vbw_hz : float
        Resolution and video bandwidths.
    points : int
        Trace points.
    detector : str
        Trade name, one of :data:`DETECTORS`.
    ref_level_dbm, attenuation_db : float or None
        None leaves the instrument's value unchanged.
    sweep_time_s : float or None
        Manual sweep time (with ``start_hz == stop_hz``, zero span: the dwell at one frequency);
        None lets the instrument couple it to span and RBW.
    """

    start_hz: float
    stop_hz: float
    rbw_hz: float
    vbw_hz: float
    points: int
    detector: str = "peak"
    ref_level_dbm: float | None = None
    attenuation_db: float | None = None
    sweep_time_s: float | None = None

    def freq_axis_hz(self) -> np.ndarray:
        """f_i = start + i*(stop-start)/(N-1) (common practice for swept traces)."""
        return np.linspace(self.start_hz, self.stop_hz, self.points)
