"""SCPI program syntax of the simulated instruments: headers, parameters, command rows.

Parsing (IEEE 488.2 clause 7 program message syntax; SCPI-1999 Vol. 1 headers and parameters)
    * keywords match in their short form (the upper-case part of the pattern) or their long form,
      case-insensitively, nothing in between; bracketed nodes (``[SENSe:]``, ``[:DATA]``) and a
      numeric suffix ``1`` (``MARKer[1]``) are optional; a leading ``:`` is optional;
    * numbers take the suffixes of their quantity (HZ, KHZ, MHZ, MAHZ, GHZ; S, MS, US, NS; DB;
      DBM) and ``MIN``/``MAX``/``DEF``; queries of numeric settings take ``MIN``/``MAX`` too.

An instrument's commands are declared as a table of :class:`Row` (header pattern, parameter
parser with its range, setter, query); the helpers below build the usual kinds of rows.

Error codes (SCPI-1999 standard codes; text as written by the instrument): -102 Syntax error,
-104 Data type error, -108 Parameter not allowed, -109 Missing parameter, -113 Undefined header,
-131 Invalid suffix, -221 Settings conflict, -222 Data out of range, -224 Illegal parameter
value, -230 Data corrupt or stale, -240 Hardware error, -350 Queue overflow. Device-specific:
:data:`OVERLOAD_CODE` (mixer overload after a sweep).
"""

from __future__ import annotations

import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

__all__ = [
    "Boolean",
    "Choice",
    "DataFormat",
    "Number",
    "OVERLOAD_CODE",
    "Row",
    "STANDARD_TEXT",
    "ScpiError",
    "compile_header",
    "event_row",
    "exactly_one",
    "format_number",
    "keyword_matches",
    "no_args",
    "number_row",
    "query_row",
    "setting_row",
    "split_unit",
]

#: Device-specific error code pushed when a sweep drove the mixer into compression.
OVERLOAD_CODE = 201

STANDARD_TEXT = {
    -102: "Syntax error", -104: "Data type error", -108: "Parameter not allowed",
    -109: "Missing parameter", -113: "Undefined header", -131: "Invalid suffix",
    -221: "Settings conflict", -222: "Data out of range", -224: "Illegal parameter value",
    -230: "Data corrupt or stale", -240: "Hardware error", -350: "Queue overflow",
    OVERLOAD_CODE: "Input overload",
}


class ScpiError(Exception):
    """An error the instrument puts into its queue (not raised to the client).

    Parameters
    ----------
    code : int
        SCPI error number (negative: standard; positive: device-specific).
    detail : str, optional
        Appended to the standard text after ``;``.
    """

    def __init__(self, code: int, detail: str = "") -> None:
        self.code = code
        text = STANDARD_TEXT.get(code, "Device-specific error")
        self.text = f"{text};{detail}" if detail else text
        super().__init__(f"{code},{self.text!r}")



# ---------------------------------------------------------------- header patterns

_PATTERN_TOKEN = re.compile(r"\[\d\]|\[|\]|:|\*?[A-Za-z][A-Za-z0-9]*")


def compile_header(pattern: str) -> re.Pattern[str]:
    """Regular expression for a header pattern such as ``[SENSe:]FREQuency:STARt``.

    Each keyword matches its short form (leading upper-case letters and digits) or its long
    form, nothing else; ``[...]`` is optional; ``[1]`` after a keyword is an optional suffix.
    The expression matches the upper-cased header without its leading ``:`` and ``?``.
    """
    parts: list[str] = []
    pos = 0
    for match in _PATTERN_TOKEN.finditer(pattern):
        if match.start() != pos:
            raise ValueError(f"bad header pattern {pattern!r} at {pos}")
        pos = match.end()
        token = match.group()
        if token.startswith("[") and token[1:-1].isdigit():
            parts.append(f"(?:{token[1:-1]})?")
        elif token == "[":
            parts.append("(?:")
        elif token == "]":
            parts.append(")?")
        elif token == ":":
            parts.append(":")
        else:
            short = re.match(r"\*?[A-Z0-9]*", token).group()
            parts.append(f"(?:{re.escape(short)}|{re.escape(token.upper())})")
    if pos != len(pattern):
        raise ValueError(f"bad header pattern {pattern!r} at {pos}")
    return re.compile("^" + "".join(parts) + "$")


def keyword_matches(arg: str, keyword: str) -> bool:
    """True when ``arg`` is the short or long form of character-data ``keyword``."""
    short = re.match(r"[A-Z0-9]*", keyword).group()
    return arg.upper() in (short, keyword.upper())


# ---------------------------------------------------------------- parameters

_NUMBER = re.compile(r"^([-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?)\s*([A-Za-z]*)$")
_SUFFIXES: dict[str, dict[str, float]] = {
    # SCPI: "M" is milli and "MA" mega; MHZ is the documented exception meaning mega
    # (SCPI-1999 Vol. 1 suffix multipliers, from memory).
    "HZ": {"HZ": 1.0, "KHZ": 1e3, "MHZ": 1e6, "MAHZ": 1e6, "GHZ": 1e9},
    "S": {"S": 1.0, "MS": 1e-3, "US": 1e-6, "NS": 1e-9, "KS": 1e3},
    "DB": {"DB": 1.0},
    "DBM": {"DBM": 1.0},
    "": {},
}


@dataclass(frozen=True)
class Number:
    """Numeric parameter: unit family, range [lo, hi], *RST default, optional rounding step."""

    unit: str
    lo: float
    hi: float
    default: float
    integer: bool = False
    step: float | None = None

    def parse(self, args: Sequence[str]) -> float:
        """The number in SI (suffix applied), checked against the range and rounded."""
        (arg,) = exactly_one(args)
        named = self.limit(arg)
        if named is not None:
            return self._rounded(named)
        match = _NUMBER.match(arg)
        if not match:
            raise ScpiError(-104, f"expected a number, found {arg!r}")
        suffix = match.group(2).upper()
        factor = 1.0 if not suffix else _SUFFIXES[self.unit].get(suffix)
        if factor is None:
            raise ScpiError(-131, f"{suffix!r} (expected {self.unit or 'no suffix'})")
        value = float(match.group(1)) * factor
        if not self.lo <= value <= self.hi:
            raise ScpiError(-222, f"{arg} outside {self.lo:g}..{self.hi:g} {self.unit}".rstrip())
        return self._rounded(value)

    def limit(self, arg: str) -> float | None:
        """MIN/MAX/DEF value, or None when ``arg`` is none of them."""
        for keyword, value in (("MINimum", self.lo), ("MAXimum", self.hi),
                               ("DEFault", self.default)):
            if keyword_matches(arg, keyword):
                return value
        return None

    def _rounded(self, value: float) -> float:
        if self.integer:
            return int(round(value))
        if self.step:
            return self.step * round(value / self.step)
        return value


@dataclass(frozen=True)
class Boolean:
    """ON|OFF|1|0 (any number: non-zero is ON, IEEE 488.2)."""

    def parse(self, args: Sequence[str]) -> bool:
        """``ON``/``1`` -> True, ``OFF``/``0`` -> False."""
        (arg,) = exactly_one(args)
        if arg.upper() in ("ON", "OFF"):
            return arg.upper() == "ON"
        match = _NUMBER.match(arg)
        if match and not match.group(2):
            return round(float(match.group(1))) != 0
        raise ScpiError(-224, f"expected ON|OFF|1|0, found {arg!r}")


@dataclass(frozen=True)
class Choice:
    """Character data: (keyword pattern, value) pairs, e.g. ("POSitive", "POS")."""

    options: tuple[tuple[str, str], ...]

    def parse(self, args: Sequence[str]) -> str:
        """The value of the option whose keyword the parameter spells."""
        (arg,) = exactly_one(args)
        for keyword, value in self.options:
            if keyword_matches(arg, keyword):
                return value
        names = "|".join(k for k, _ in self.options)
        raise ScpiError(-224, f"expected {names}, found {arg!r}")


@dataclass(frozen=True)
class DataFormat:
    """FORMat[:DATA] ASCii | REAL[,32|64] | INTeger[,32]."""

    def parse(self, args: Sequence[str]) -> str:
        """``"ASC"``, ``"REAL,32"``, ``"REAL,64"`` or ``"INT,32"``."""
        if not args:
            raise ScpiError(-109, "expected ASCii, REAL,32, REAL,64 or INTeger,32")
        if len(args) > 2:
            raise ScpiError(-108, f"{len(args)} parameters")
        if keyword_matches(args[0], "ASCii") and len(args) == 1:
            return "ASC"
        if keyword_matches(args[0], "REAL"):
            width = args[1] if len(args) == 2 else "32"
            if width in ("32", "64"):
                return f"REAL,{width}"
        if keyword_matches(args[0], "INTeger") and (len(args) == 1 or args[1] == "32"):
            return "INT,32"
        raise ScpiError(-224, f"expected ASCii, REAL,32, REAL,64 or INTeger,32, found {','.join(args)!r}")


def exactly_one(args: Sequence[str]) -> tuple[str]:
    """The one parameter of ``args`` (-109 when missing, -108 when more)."""
    if not args:
        raise ScpiError(-109)
    if len(args) > 1:
        raise ScpiError(-108, f"{len(args)} parameters, expected 1")
    return (args[0],)


# ---------------------------------------------------------------- command table


@dataclass(frozen=True)
class Row:
    """One command of an instrument's table.

    Attributes
    ----------
    headers : tuple of str
        Header patterns (aliases), e.g. ``("[SENSe:]BANDwidth[:RESolution]",)``.
    param : object or None
        Parser/validator of the set form (:class:`Number`, :class:`Boolean`, :class:`Choice`,
        :class:`DataFormat`); None for an event command without parameter.
    set : callable or None
        ``set(instrument, value)``; None: the header is query-only.
    get : callable or None
        ``get(instrument, args) -> str | bytes`` for the query form; None: no query form.
    """

    headers: tuple[str, ...]
    param: Any = None
    set: Callable[[Any, Any], None] | None = None
    get: Callable[[Any, list[str]], str | bytes] | None = None
    regexes: tuple[re.Pattern[str], ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "regexes", tuple(compile_header(h) for h in self.headers))

    def matches(self, header: str) -> bool:
        """True when the upper-cased ``header`` is one of this row's headers."""
        return any(rx.match(header) for rx in self.regexes)


def format_number(value: float) -> str:
    """Numeric reply: shortest exact-enough decimal (12 significant digits)."""
    return format(value, ".12g")


def setting_row(headers: str | tuple[str, ...], attr: str, param: Any,
                on_set: Callable[[Any], None] | None = None) -> Row:
    """Row for a plain setting stored as ``instrument.setup.<attr>``."""
    def set_(inst: Any, value: Any) -> None:
        setattr(inst.setup, attr, value)
        if on_set is not None:
            on_set(inst)

    def get(inst: Any, args: list[str]) -> str:
        if isinstance(param, Number) and args:
            (arg,) = exactly_one(args)
            limit = param.limit(arg)
            if limit is None:
                raise ScpiError(-224, f"expected MIN|MAX, found {arg!r}")
            return format_number(limit)
        no_args(args)
        return _reply(getattr(inst.setup, attr))

    return Row(headers if isinstance(headers, tuple) else (headers,), param, set_, get)


def _reply(value: Any) -> str:
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, (int, float)):
        return format_number(float(value)) if not float(value).is_integer() else str(int(value))
    return str(value)


def no_args(args: Sequence[str]) -> None:
    """Refuse parameters (-108)."""
    if args:
        raise ScpiError(-108, f"{len(args)} unexpected parameters")


def event_row(headers: str | tuple[str, ...], action: Callable[[Any], None]) -> Row:
    """Row for a command without parameter and without query form (``*CLS``, ``INIT``)."""
    def set_(inst: Any, _value: None) -> None:
        action(inst)
    return Row(headers if isinstance(headers, tuple) else (headers,), None, set_, None)


def query_row(headers: str | tuple[str, ...], getter: Callable[[Any], str | bytes]) -> Row:
    """Row for a query without parameter and without set form (``*IDN?``)."""
    def get(inst: Any, args: list[str]) -> str | bytes:
        no_args(args)
        return getter(inst)
    return Row(headers if isinstance(headers, tuple) else (headers,), None, None, get)


_HEADER = re.compile(r"^(?:\*[A-Za-z]+|:?[A-Za-z][A-Za-z0-9]*(?::[A-Za-z][A-Za-z0-9]*)*)\??$")


def split_unit(unit: str) -> tuple[str, list[str]]:
    """Split ``HEADER param,param`` into the header and stripped parameters (-102 if bad)."""
    header, rest = (re.split(r"\s+", unit, maxsplit=1) + [""])[:2]
    if not _HEADER.match(header):
        raise ScpiError(-102, header)
    if not rest.strip():
        return header, []
    args = [a.strip() for a in rest.split(",")]
    if any(not a for a in args):
        raise ScpiError(-102, f"empty parameter in {unit!r}")
    return header, args


def number_row(headers: str | tuple[str, ...], param: Number,
               setter: Callable[[Any, float], None], getter: Callable[[Any], float]) -> Row:
    """Row for a numeric setting whose query also answers ``MIN``/``MAX``/``DEF``."""
    def get(inst: Any, args: list[str]) -> str:
        if args:
            limit = param.limit(exactly_one(args)[0])
            if limit is None:
                raise ScpiError(-224, f"expected MIN|MAX|DEF, found {args[0]!r}")
            return format_number(limit)
        return format_number(getter(inst))
    return Row(headers if isinstance(headers, tuple) else (headers,), param, setter, get)

