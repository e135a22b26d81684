"""Random generators for simulated traces, keyed by what defines the trace.

Every random draw of one sweep (receiver noise, burst on/off draws) comes from a generator
seeded by

* the simulator seed,
* a stable digest (SHA-256, never Python's salted ``hash()``) of the analyzer settings that
  define the trace (start, stop, points, RBW, VBW, detector, attenuation, effective sweep
  time) and of the pose in the shared state (probe position, probe rotation, tool, mast
  height, polarization, turntable azimuth, board power),
* the number of the sweep since that settings+pose key last changed (0 for the first sweep
  after a change, 1 for the next one with the same key, ...).

So a trace is the same whenever it is measured: re-measured after a resume, or after other
measurements in between, the first sweep at given settings and pose repeats bit for bit.
Positions enter the key rounded to 1 nm and angles to 1 micro-degree, so the last bits of a
computed move do not change the noise.
"""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np

from bench.sim import receiver
from bench.sim.state import SimState

__all__ = ["TraceRng", "pose_fields", "settings_fields", "trace_digest_words"]

_POSITION_DECIMALS = 9  # metres -> 1 nm
_ANGLE_DECIMALS = 6  # degrees -> 1 micro-degree
_DIGEST_WORDS = 4  # 32-bit words of the digest passed to the seed sequence


def settings_fields(settings: receiver.ReceiverSettings) -> tuple[Any, ...]:
    """The analyzer settings that define a trace, couplings resolved.

    Parameters
    ----------
    settings : receiver.ReceiverSettings
        Resolved receiver settings of the sweep.

    Returns
    -------
    tuple
        ``(start_hz, stop_hz, points, rbw_hz, vbw_hz, detector, attenuation_db, sweep_time_s)``;
        VBW and sweep time are the effective values.
    """
    vbw_hz = settings.rbw_hz if settings.vbw_hz is None else settings.vbw_hz
    return (float(settings.start_hz), float(settings.stop_hz), int(settings.points),
            float(settings.rbw_hz), float(vbw_hz), str(settings.detector),
            float(settings.attenuation_db), float(receiver.effective_sweep_time_s(settings)))


def pose_fields(state: SimState) -> tuple[Any, ...]:
    """The pose of the bench that defines a trace; read it under ``state.lock``.

    Parameters
    ----------
    state : SimState
        Shared state of the simulated bench.

    Returns
    -------
    tuple
        Probe x, y, z (rounded to 1 nm), probe rotation, tool, mast height, polarization,
        turntable azimuth (angles rounded to 1 micro-degree) and board power.
    """
    position = tuple(round(float(v), _POSITION_DECIMALS) for v in state.probe_m)
    return (*position, round(float(state.probe_rotation_deg), _ANGLE_DECIMALS), int(state.tool),
            round(float(state.mast_height_m), _POSITION_DECIMALS), str(state.polarization),
            round(float(state.azimuth_deg), _ANGLE_DECIMALS), bool(state.board_powered))


def _canonical(value: Any) -> str:
    """Exact, platform-independent text of one key field (floats as hex, -0.0 as 0.0)."""
    if isinstance(value, float):
        return (value + 0.0).hex()
    return f"{type(value).__name__}:{value}"


def trace_digest_words(fields: tuple[Any, ...]) -> list[int]:
    """Stable 32-bit words of the SHA-256 digest of ``fields``.

    Parameters
    ----------
    fields : tuple
        Settings and pose fields (floats, ints, strings, booleans).

    Returns
    -------
    list of int
        :data:`_DIGEST_WORDS` unsigned 32-bit integers, the same on every run and platform.
    """
    text = "|".join(_canonical(v) for v in fields)
    digest = hashlib.sha256(text.encode("utf-8")).digest()
    return [int.from_bytes(digest[4 * i:4 * i + 4], "big") for i in range(_DIGEST_WORDS)]


class TraceRng:
    """Hands out one generator per sweep, keyed by seed, settings, pose and repeat number.

    Parameters
    ----------
    seed : int
        Simulator seed (>= 0).
    """

    def __init__(self, seed: int) -> None:
        self.seed = int(seed)
        self._last_words: list[int] | None = None
        self.repeat = 0  # number of the current sweep since the key last changed

    def generator(self, settings: receiver.ReceiverSettings,
                  pose: tuple[Any, ...]) -> np.random.Generator:
        """The generator for the next sweep at ``settings`` and ``pose``.

        Parameters
        ----------
        settings : receiver.ReceiverSettings
            Resolved settings of the sweep about to be computed.
        pose : tuple
            :func:`pose_fields` of the shared state, read with the world's lines.

        Returns
        -------
        numpy.random.Generator
            ``numpy.random.default_rng([seed, *digest words, repeat])``.
        """
        words = trace_digest_words(settings_fields(settings) + tuple(pose))
        if words == self._last_words:
            self.repeat += 1
        else:
            self._last_words, self.repeat = words, 0
        return np.random.default_rng([self.seed, *words, self.repeat])
