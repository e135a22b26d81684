"""Safety limits of the XYZ(A) probe stage: one type for the bench file, the planner and the driver.

The bench file's ``[stage]`` table (``limits`` with ``x``, ``y``, ``z`` and the rotary ``a``,
``safe_z``, ``max_feed``, ``position_tolerance``, ``rotary_axis``) is validated with file and
line by :mod:`bench.benchfile`, which produces a :class:`StageLimits`; the stage driver
(``bench.drivers.stage``) consumes it as given and refuses any target outside it before a byte
is sent. The consistency rules live here once (:func:`limit_problems`), so the bench file and a
directly built :class:`StageLimits` refuse the same things with the same words.

This module is a leaf: it imports only :mod:`bench.errors`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from bench.errors import ConfigError

__all__ = ["StageLimits", "limit_problems", "DEFAULT_A_DEG"]

#: Rotary (A axis) limits when the bench file gives none, degrees: one turn either way.
DEFAULT_A_DEG = (-360.0, 360.0)


@dataclass(frozen=True)
class StageLimits:
    """Safety values of one stage (bench file ``[stage]``), SI units.

    Attributes
    ----------
    x_m, y_m, z_m : tuple of float
        Soft limits (min, max) of each linear axis in stage coordinates, metres.
    safe_z_m : float
        Travel height for XY moves (stage z), metres.
    max_feed_m_per_s : float
        Highest feed the driver may command, m/s.
    position_tolerance_m : float
        Largest accepted difference between target and reported position, metres.
    rotary_axis : bool
        The stage has an A axis that turns the probe.
    a_deg : tuple of float
        Soft limits (min, max) of the A axis, degrees.

    Raises
    ------
    ConfigError
        On construction, when :func:`limit_problems` finds a problem (the first one is named).
    """

    x_m: tuple[float, float]
    y_m: tuple[float, float]
    z_m: tuple[float, float]
    safe_z_m: float
    max_feed_m_per_s: float
    position_tolerance_m: float = 5e-5
    rotary_axis: bool = False
    a_deg: tuple[float, float] = DEFAULT_A_DEG

    def __post_init__(self) -> None:
        problems = limit_problems(x_m=self.x_m, y_m=self.y_m, z_m=self.z_m, a_deg=self.a_deg,
                                  safe_z_m=self.safe_z_m, max_feed_m_per_s=self.max_feed_m_per_s,
                                  position_tolerance_m=self.position_tolerance_m)
        if problems:
            path, message = problems[0]
            raise ConfigError(message, key="stage." + ".".join(path))

    def axis_limits_m(self, axis: str) -> tuple[float, float]:
        """(min, max) of linear ``axis`` ('x', 'y' or 'z'), metres."""
        return self.as_dict()[axis]

    def as_dict(self) -> dict[str, tuple[float, float]]:
        """``{"x": (min_m, max_m), "y": ..., "z": ...}`` (linear axes, metres)."""
        return {"x": self.x_m, "y": self.y_m, "z": self.z_m}


def limit_problems(*, x_m: tuple[float, float], y_m: tuple[float, float], z_m: tuple[float, float],
                   a_deg: tuple[float, float], safe_z_m: float, max_feed_m_per_s: float,
                   position_tolerance_m: float) -> list[tuple[tuple[str, ...], str]]:
    """Every inconsistency of a set of stage limits, as (key path in ``[stage]``, message).

    Parameters
    ----------
    x_m, y_m, z_m : tuple of float
        Linear soft limits, metres.
    a_deg : tuple of float
        Rotary soft limits, degrees.
    safe_z_m, max_feed_m_per_s, position_tolerance_m : float
        Travel height (m), feed ceiling (m/s) and position tolerance (m).

    Returns
    -------
    list of (tuple of str, str)
        Key path relative to the bench file's ``[stage]`` table (``("limits", "x")``) and a
        message ``expected ..., found ...``; empty when everything is consistent.
    """
    problems = []
    pairs = {"x": (x_m, 1e3, "mm"), "y": (y_m, 1e3, "mm"), "z": (z_m, 1e3, "mm"), "a": (a_deg, 1.0, "deg")}
    for key, ((low, high), scale, unit) in pairs.items():
        if not (math.isfinite(low) and math.isfinite(high) and low < high):
            problems.append((("limits", key), f"expected [min, max] with min < max, found "
                                              f"[{low * scale:g} {unit}, {high * scale:g} {unit}]"))
    z_low, z_high = z_m
    if z_low < z_high and not z_low <= safe_z_m <= z_high:
        problems.append((("safe_z",), f"expected a height inside the z limits [{z_low * 1e3:g} mm, "
                                      f"{z_high * 1e3:g} mm], found {safe_z_m * 1e3:g} mm"))
    if not max_feed_m_per_s > 0:
        problems.append((("max_feed",), f"expected a positive speed, found {max_feed_m_per_s * 1e3:g} mm/s"))
    if not position_tolerance_m > 0:
        problems.append((("position_tolerance",),
                         f"expected a positive length, found {position_tolerance_m * 1e3:g} mm"))
    return problems
