"""Quantities with units at the boundaries, SI floats inside.

Text such as ``"120 kHz"``, ``"2.5 mm"``, ``"-20 dBm"`` or ``"200 ms"`` enters through
:func:`parse`; everything past that point is a plain float in SI units (Hz, m, s, deg) or in a
named dB reference (dBm, dB, dBuV, dBuV/m, dBuA/m), with the unit in the variable name.

Unit spellings are exact: SI prefix and unit symbols are case-sensitive (SI Brochure, BIPM,
9th edition 2019, section 3), so ``"30 mHz"`` is 30 millihertz, and a frequency that must be a
radio frequency refuses it with the ``"30 MHz"`` probably meant.

The dB conversions follow from the definitions of the dB units, the exact c and CODATA 2018
mu0 (derived in docs/physics.md, section 1):

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
    "RADIO_MIN_HZ",
    "case_suggestion",
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

# unit spelling -> factor to SI (or, for dB units, factor 1: the same reference). Spellings are
# exact: SI prefix symbols and unit symbols are case-sensitive (SI Brochure, BIPM, 9th edition
# 2019, section 3: m = milli but M = mega, k = kilo while K is no prefix; Hz, not hz). The order
# in each table is the order of preference when a wrong case could mean two spellings ("mhz":
# "MHz" before "mHz"). "u" for the micro sign is the usual plain-keyboard spelling (common
# practice).
_UNITS: dict[str, dict[str, float]] = {
    "frequency": {"Hz": 1.0, "kHz": 1e3, "MHz": 1e6, "GHz": 1e9, "mHz": 1e-3},
    "length": {"m": 1.0, "mm": 1e-3, "cm": 1e-2, "um": 1e-6, "µm": 1e-6, "km": 1e3, "in": 0.0254},
    "time": {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "ns": 1e-9, "min": 60.0, "h": 3600.0},
    "angle": {"deg": 1.0, "°": 1.0},
    "speed": {"mm/s": 1e-3, "m/s": 1.0, "mm/min": 1e-3 / 60.0, "cm/s": 1e-2},
    "angular_speed": {"deg/s": 1.0},
    "acceleration": {"mm/s2": 1e-3, "mm/s^2": 1e-3, "m/s2": 1.0, "m/s^2": 1.0},
    "dbm": {"dBm": 1.0},
    "db": {"dB": 1.0},
    "dbuv": {"dBuV": 1.0, "dBµV": 1.0},
    "dbuv_per_m": {"dBuV/m": 1.0, "dBµV/m": 1.0},
    "dbua_per_m": {"dBuA/m": 1.0, "dBµA/m": 1.0},
    "inductance": {"H": 1.0, "uH": 1e-6, "µH": 1e-6, "nH": 1e-9},
    "capacitance": {"F": 1.0, "pF": 1e-12, "nF": 1e-9, "uF": 1e-6, "µF": 1e-6},
    "resistance": {"ohm": 1.0, "Ω": 1.0, "kohm": 1e3, "kΩ": 1e3},
    "current": {"A": 1.0, "mA": 1e-3, "uA": 1e-6, "µA": 1e-6},
    "voltage": {"V": 1.0, "mV": 1e-3, "uV": 1e-6, "µV": 1e-6},
    "area": {"m2": 1.0, "cm2": 1e-4, "mm2": 1e-6},
    "data_rate": {"B/s": 1.0, "kB/s": 1e3, "MB/s": 1e6},
}

# Valid spellings that are a slip where they cannot be meant: spelling -> (its name, the
# spelling probably meant). A radio frequency in millihertz is a megahertz with the wrong case.
_PREFIX_SLIPS = {"mHz": ("millihertz", "MHz")}

#: Lowest frequency a sweep, an RBW, a span or a limit line can mean: below this a value is a
#: wrong prefix (a millihertz written for a megahertz), never a radio frequency.
RADIO_MIN_HZ = 1.0

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
_QUANTITY = re.compile(rf"^\s*({_NUMBER})(\s*)([^\s\d].*?)?\s*$")
# The Greek small letter mu typed for the micro sign: the same symbol to a reader.
_GREEK_MU = "\u03bc"


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


def parse(value: object, dimension: str, *, radio: bool = False) -> float:
    """Parse a quantity string into SI units (or the dB reference of ``dimension``).

    Unit spellings are exact: SI prefix symbols and unit symbols are case-sensitive (SI
    Brochure, BIPM, 9th edition 2019, section 3), so ``"30 mHz"`` is 30 millihertz and
    ``"30 MHz"`` 30 megahertz. A spelling that differs from a known one only in case
    (``"10 KHz"``, ``"1 ghz"``) is refused with the spelling meant.

    Parameters
    ----------
    value : object
        The text from a file, e.g. ``"120 kHz"``. A bare number is refused: where a unit
        matters, the file must say it.
    dimension : str
        One of :data:`DIMENSIONS` (``"frequency"``, ``"length"``, ``"time"``, ``"dbm"``, ...).
    radio : bool
        Only with ``"frequency"``: the value is a radio frequency (a sweep limit, RBW, VBW,
        step, span, limit-line edge, table row), so a non-zero value below
        :data:`RADIO_MIN_HZ` (1 Hz) is refused as a wrong prefix.

    Returns
    -------
    float
        The value in SI units: Hz, m, s, deg, m/s, deg/s, m/s^2, or dBm / dB / dBuV ...

    Raises
    ------
    UnitError
        One line naming the text, the dimension expected and an example or the spelling meant.
    """
    if radio and dimension != "frequency":
        raise ValueError(f"radio=True applies to frequencies, not to {dimension!r}")
    number, space, unit = _split(value, dimension)
    result = float(number) * _factor(value, number, space, unit, dimension)
    if not math.isfinite(result):
        raise UnitError(f"expected a finite {dimension_word(dimension)}, found {value!r}")
    if radio and 0.0 < abs(result) < RADIO_MIN_HZ:
        raise UnitError(_sub_hertz_message(value, number, space, unit))
    return result


def _split(value: object, dimension: str) -> tuple[str, str, str]:
    """(number text, the space after it, unit text) of a quantity string; refuses the rest."""
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
    number, space, unit = match.group(1), match.group(2), (match.group(3) or "")
    if not unit:
        raise UnitError(
            f"expected {_a(dimension)} like {example}, found {value!r} with no unit"
        )
    return number, space, unit


def _factor(value: str, number: str, space: str, unit: str, dimension: str) -> float:
    """The factor of an exactly spelt unit, or a UnitError naming the spelling meant."""
    table = _UNITS[dimension]
    spelt = unit.strip().replace(" ", "").replace(_GREEK_MU, "µ")
    if spelt in table:
        return table[spelt]
    meant = case_suggestion(spelt, table)
    if meant is not None:
        raise UnitError(
            f"expected {_a(dimension)} like {DIMENSIONS[dimension]}, found {value.strip()}; "
            f"did you mean {number}{space}{meant}? (unit symbols and SI prefixes are "
            "case-sensitive)"
        )
    known = ", ".join(table)
    raise UnitError(
        f"expected {_a(dimension)} like {DIMENSIONS[dimension]}, found unit {unit!r} in "
        f"{value!r} (known: {known})"
    )


def case_suggestion(spelt: str, spellings) -> str | None:
    """The first of ``spellings`` equal to ``spelt`` but for case, or None.

    ``case_suggestion("KHz", ["Hz", "kHz", "MHz"]) == "kHz"``; the order of ``spellings`` is the
    order of preference (``"mhz"`` suggests ``"MHz"`` when it comes before ``"mHz"``).
    """
    folded = spelt.casefold()
    return next((s for s in spellings if s.casefold() == folded and s != spelt), None)


def _sub_hertz_message(value: str, number: str, space: str, unit: str) -> str:
    """Why a radio frequency below 1 Hz is refused, with the megahertz meant for millihertz."""
    text = value.strip()
    slip = _PREFIX_SLIPS.get(unit.strip())
    if slip is None:
        return f"expected a radio frequency of at least {RADIO_MIN_HZ:g} Hz, found {text}"
    name, meant = slip
    return (f"expected a radio frequency of at least {RADIO_MIN_HZ:g} Hz, found {text} ({name}); "
            f"did you mean {number}{space}{meant}?")


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
