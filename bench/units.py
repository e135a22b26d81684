"""Quantities with units at the boundaries, SI floats inside.

Text such as ``"120 kHz"``, ``"2.5 mm"``, ``"-20 dBm"`` or ``"200 ms"`` enters through
:func:`parse`; everything past that point is a plain float in SI units (Hz, m, s, deg) or in a
named dB reference (dBm, dB, dBuV, dBuV/m, dBuA/m), with the unit in the variable name.

The dB conversions follow the usual definitions (reference sheet §4):

* dBuV = dBm + 10*log10(Z/ohm) + 90, i.e. dBm + 106.99 for 50 ohm;
* dBuA/m = dBuV/m - 20*log10(eta0), eta0 = 376.73 ohm (plane wave), i.e. minus 51.52 dB;
* dBpT = dBuA/m + 20*log10(mu0 * 1e6) = dBuA/m + 1.98.
"""

from __future__ import annotations

import math
import re

import numpy as np

from bench.errors import UnitError

__all__ = [
    "C0_M_PER_S",
    "ETA0_OHM",
    "MU0_H_PER_M",
    "EPS0_F_PER_M",
    "DIMENSIONS",
    "dimension_word",
    "parse",
    "format_hz",
    "dbm_to_dbuv",
    "dbuv_to_dbm",
    "dbuv_per_m_to_dbua_per_m",
    "dbua_per_m_to_dbuv_per_m",
    "dbua_per_m_to_dbpt",
    "uv_per_m_to_dbuv_per_m",
    "dbuv_per_m_to_uv_per_m",
    "db_to_linear_amplitude",
    "linear_amplitude_to_db",
]

C0_M_PER_S = 299_792_458.0
MU0_H_PER_M = 1.25663706212e-6  # CODATA 2018
EPS0_F_PER_M = 1.0 / (MU0_H_PER_M * C0_M_PER_S**2)
ETA0_OHM = math.sqrt(MU0_H_PER_M / EPS0_F_PER_M)  # 376.730 ohm

# unit spelling -> factor to SI (or offset for dB units: factor 1, same reference)
_UNITS: dict[str, dict[str, float]] = {
    "frequency": {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9},
    "length": {"m": 1.0, "cm": 1e-2, "mm": 1e-3, "um": 1e-6, "µm": 1e-6, "km": 1e3, "in": 0.0254},
    "time": {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "ns": 1e-9, "min": 60.0, "h": 3600.0},
    "angle": {"deg": 1.0, "°": 1.0},
    "speed": {"mm/s": 1e-3, "m/s": 1.0, "mm/min": 1e-3 / 60.0, "cm/s": 1e-2},
    "angular_speed": {"deg/s": 1.0},
    "acceleration": {"mm/s2": 1e-3, "mm/s^2": 1e-3, "m/s2": 1.0, "m/s^2": 1.0},
    "dbm": {"dbm": 1.0},
    "db": {"db": 1.0},
    "dbuv": {"dbuv": 1.0, "dbµv": 1.0},
    "dbuv_per_m": {"dbuv/m": 1.0, "dbµv/m": 1.0},
    "dbua_per_m": {"dbua/m": 1.0, "dbµa/m": 1.0},
    "inductance": {"h": 1.0, "uh": 1e-6, "µh": 1e-6, "nh": 1e-9},
    "capacitance": {"f": 1.0, "pf": 1e-12, "nf": 1e-9, "uf": 1e-6, "µf": 1e-6},
    "resistance": {"ohm": 1.0, "Ω": 1.0, "kohm": 1e3},
    "current": {"a": 1.0, "ma": 1e-3, "ua": 1e-6, "µa": 1e-6},
    "voltage": {"v": 1.0, "mv": 1e-3, "uv": 1e-6, "µv": 1e-6},
    "area": {"m2": 1.0, "cm2": 1e-4, "mm2": 1e-6},
    "data_rate": {"b/s": 1.0, "kb/s": 1e3, "mb/s": 1e6},
}

#: Example text for each dimension, used in error hints.
DIMENSIONS: dict[str, str] = {
    "frequency": '"120 kHz"',
    "length": '"2.5 mm"',
    "time": '"200 ms"',
    "angle": '"45 deg"',
    "speed": '"50 mm/s"',
    "angular_speed": '"20 deg/s"',
    "acceleration": '"500 mm/s2"',
    "dbm": '"-20 dBm"',
    "db": '"10 dB"',
    "dbuv": '"40 dBuV"',
    "dbuv_per_m": '"40 dBuV/m"',
    "dbua_per_m": '"-11.5 dBuA/m"',
    "inductance": '"20 nH"',
    "capacitance": '"2 pF"',
    "resistance": '"50 ohm"',
    "current": '"10 mA"',
    "voltage": '"3.3 V"',
    "area": '"1 cm2"',
    "data_rate": '"1 MB/s"',
}

_NUMBER = r"[-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?"
_QUANTITY = re.compile(rf"^\s*({_NUMBER})\s*([^\s\d].*?)?\s*$")


#: How a dimension is named in messages, where its key is not an English word.
_WORDS = {
    "db": "level in dB",
    "dbm": "power in dBm",
    "dbuv": "voltage in dBuV",
    "dbuv_per_m": "field strength in dBuV/m",
    "dbua_per_m": "field strength in dBuA/m",
}


def dimension_word(dimension: str) -> str:
    """The words for a key of :data:`DIMENSIONS` in messages: ``"db"`` -> ``"level in dB"``."""
    return _WORDS.get(dimension, dimension.replace("_", " "))


def _a(dimension: str) -> str:
    """The dimension's words with an English indefinite article: 'an angle', 'a frequency'."""
    word = dimension_word(dimension)
    return f"an {word}" if word[:1] in "aeiou" else f"a {word}"


def parse(value: object, dimension: str) -> float:
    """Parse a quantity string into SI units (or the dB reference of ``dimension``).

    Parameters
    ----------
    value : object
        The text from a file, e.g. ``"120 kHz"``. A bare number is refused: where a unit
        matters, the file must say it.
    dimension : str
        One of :data:`DIMENSIONS` (``"frequency"``, ``"length"``, ``"time"``, ``"dbm"``, ...).

    Returns
    -------
    float
        The value in SI units: Hz, m, s, deg, m/s, deg/s, m/s^2, or dBm / dB / dBuV ...

    Raises
    ------
    UnitError
        One line naming the text, the dimension expected and an example.
    """
    example = DIMENSIONS[dimension]
    if isinstance(value, bool) or not isinstance(value, (str, int, float)):
        raise UnitError(f"expected {_a(dimension)} like {example}, found {value!r}")
    if isinstance(value, (int, float)):
        raise UnitError(
            f"expected {_a(dimension)} like {example}, found the bare number {value!r} "
            "(write the unit, in quotes)"
        )
    match = _QUANTITY.match(value)
    if not match:
        raise UnitError(f"expected {_a(dimension)} like {example}, found {value!r}")
    number, unit = match.group(1), (match.group(2) or "")
    if not unit:
        raise UnitError(
            f"expected {_a(dimension)} like {example}, found {value!r} with no unit"
        )
    table = _UNITS[dimension]
    factor = table.get(unit.strip().lower().replace(" ", ""))
    if factor is None:
        known = ", ".join(sorted({u for u in table}))
        raise UnitError(
            f"expected {_a(dimension)} like {example}, found unit {unit!r} in {value!r} "
            f"(known: {known})"
        )
    result = float(number) * factor
    if not math.isfinite(result):
        raise UnitError(f"expected a finite {dimension_word(dimension)}, found {value!r}")
    return result


def format_hz(freq_hz: float) -> str:
    """Human text for a frequency, e.g. ``format_hz(1.2e8) == '120 MHz'``."""
    for unit, scale in (("GHz", 1e9), ("MHz", 1e6), ("kHz", 1e3)):
        if abs(freq_hz) >= scale:
            return f"{freq_hz / scale:.6g} {unit}"
    return f"{freq_hz:.6g} Hz"


def dbm_to_dbuv(dbm, impedance_ohm: float = 50.0):
    """Power in dBm across ``impedance_ohm`` to voltage in dBuV (50 ohm: +106.99 dB)."""
    return _shift(dbm, 10.0 * math.log10(impedance_ohm) + 90.0)


def dbuv_to_dbm(dbuv, impedance_ohm: float = 50.0):
    """Voltage in dBuV across ``impedance_ohm`` to power in dBm (50 ohm: -106.99 dB)."""
    return _shift(dbuv, -(10.0 * math.log10(impedance_ohm) + 90.0))


_ETA0_DB = 20.0 * math.log10(ETA0_OHM)  # 51.52 dB
_MU0_UT_DB = 20.0 * math.log10(MU0_H_PER_M * 1e6)  # 1.98 dB


def dbuv_per_m_to_dbua_per_m(dbuv_per_m):
    """Plane-wave E field in dBuV/m to H field in dBuA/m (minus 51.52 dB)."""
    return _shift(dbuv_per_m, -_ETA0_DB)


def dbua_per_m_to_dbuv_per_m(dbua_per_m):
    """Plane-wave H field in dBuA/m to E field in dBuV/m (plus 51.52 dB)."""
    return _shift(dbua_per_m, _ETA0_DB)


def dbua_per_m_to_dbpt(dbua_per_m):
    """H in dBuA/m to flux density B in dBpT in free space (plus 1.98 dB)."""
    return _shift(dbua_per_m, _MU0_UT_DB)


def uv_per_m_to_dbuv_per_m(uv_per_m):
    """Field strength in uV/m to dBuV/m (20*log10)."""
    return linear_amplitude_to_db(uv_per_m)


def dbuv_per_m_to_uv_per_m(dbuv_per_m):
    """Field strength in dBuV/m to uV/m."""
    return db_to_linear_amplitude(dbuv_per_m)


def db_to_linear_amplitude(db):
    """20*log10 inverse: 10**(db/20)."""
    out = np.power(10.0, np.asarray(db, dtype=float) / 20.0)
    return out if np.ndim(db) else float(out)


def linear_amplitude_to_db(amplitude):
    """20*log10(amplitude); amplitude must be positive."""
    arr = np.asarray(amplitude, dtype=float)
    out = 20.0 * np.log10(arr)
    return out if np.ndim(amplitude) else float(out)


def _shift(value, offset_db: float):
    return np.asarray(value, dtype=float) + offset_db if np.ndim(value) else float(value) + offset_db
