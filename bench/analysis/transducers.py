"""Transducer tables (frequency -> dB) and the receive chain that turns readings into fields.

A table has a **role** that fixes its sign in the chain and the unit of its values:

=================  ====  =========================  ==================================
role               sign  value unit (column suffix)  what it does
=================  ====  =========================  ==================================
``antenna_factor``  +    dB/m (``_db_per_m``)        dBuV -> dBuV/m
``probe_factor``    +    dB/m or dB(S/m)             dBuV -> dBuV/m (E probe) or dBuA/m
                         (``_db_s_per_m``)           (H loop probe)
``cable_loss``      +    dB (``_db``)                loss before the receiver
``attenuator``      +    dB (``_db``)                loss before the receiver
``preamp_gain``     -    dB (``_db``)                gain before the receiver
=================  ====  =========================  ==================================

so that E(dBuV/m) = V(dBuV) + AF(dB/m) + L_cable(dB) - G_preamp(dB) (the definition of the
antenna factor AF = E/V followed along the chain; docs/physics.md, section 6) and
H(dBuA/m) = V(dBuV) + AF_H(dB(S/m)). Loss and gain tables must be >= 0 dB: a negative loss is
almost always a sign mistake, so it is refused rather than silently added.

CSV format (one table per file)::

    # name: demo-coax-5m            optional, default: the file stem
    # role: cable_loss              optional if the caller names the role
    # source: how the values were obtained (free text)
    freq_mhz,loss_db
    30,0.42
    100,0.76

The header's first column is ``freq_hz``, ``freq_khz``, ``freq_mhz`` or ``freq_ghz``; the second
column is any name ending in its unit: ``_db``, ``_db_per_m`` or ``_db_s_per_m``. Frequencies
must increase strictly. Inline tables (in a bench file) use the same names as keys, e.g.
``{ name = "pad", role = "attenuator", freq_mhz = [30, 6000], loss_db = [10, 10] }``, or
``freq = ["30 MHz", "6 GHz"]`` with units in the strings.

Interpolation is linear in dB against log10(frequency), with NaN outside the table; a table
that does not cover a sweep raises :class:`~bench.errors.AnalysisError` naming the gap (no
silent clamping, see pitfalls: ``np.interp``).
"""

from __future__ import annotations

import csv
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from bench import physics, units
from bench.errors import AnalysisError, ConfigError, UnitError

__all__ = [
    "ROLES",
    "TransducerChain",
    "TransducerTable",
    "antenna_factor_from_gain_db",
    "load_table",
    "table_from_mapping",
]

#: role -> (sign in the chain, allowed value units)
ROLES: dict[str, tuple[int, tuple[str, ...]]] = {
    "antenna_factor": (+1, ("db_per_m",)),
    "probe_factor": (+1, ("db_per_m", "db_s_per_m")),
    "cable_loss": (+1, ("db",)),
    "attenuator": (+1, ("db",)),
    "preamp_gain": (-1, ("db",)),
}
_UNIT_TEXT = {"db": "dB", "db_per_m": "dB/m", "db_s_per_m": "dB(S/m)"}
# Unit of the value column -> quantity of the chain result when the reading is in dBuV.
_RESULT_QUANTITY = {"db_per_m": "dbuv_per_m", "db_s_per_m": "dbua_per_m"}
_RESULT_TEXT = {"dbuv": "dBuV", "dbuv_per_m": "dBuV/m", "dbua_per_m": "dBuA/m"}
_FREQ_COLUMNS = {"freq_hz": 1.0, "freq_khz": 1e3, "freq_mhz": 1e6, "freq_ghz": 1e9}
_FIELD_ROLES = ("antenna_factor", "probe_factor")
_NONNEGATIVE_ROLES = ("cable_loss", "attenuator", "preamp_gain")
# Relative slack at the table ends: a sweep point computed as 6e9*(1+1e-16) is still covered.
_END_SLACK = 1e-9
#: Largest correction a table may hold, dB (common practice: antenna and probe factors, cable
#: losses and preamp gains stay well inside it; 1e308 is a typo, not a transducer).
MAX_ABS_VALUE_DB = 200.0


def antenna_factor_from_gain_db(freq_hz, gain_dbi, impedance_ohm: float = 50.0):
    """Antenna factor from realised gain (far field, matched, co-polarised).

    AF = sqrt(4 pi eta0 / Z) / (lambda sqrt(G)), i.e. 9.73/(lambda sqrt(G)) for 50 ohm, or
    AF(dB/m) = 20 log10(f/MHz) - G(dBi) - 29.77 (derived in docs/physics.md, section 6). Computed by
    :func:`bench.physics.antenna_factor_db_from_gain`; named here for table work.

    Parameters
    ----------
    freq_hz : float or array_like
        Frequency in Hz.
    gain_dbi : float or array_like
        Gain in dBi.
    impedance_ohm : float
        Receiver input impedance in ohm.

    Returns
    -------
    float or numpy.ndarray
        Antenna factor in dB(1/m).
    """
    return physics.antenna_factor_db_from_gain(freq_hz, gain_dbi, load_ohm=impedance_ohm)


def _readonly(values: Iterable[float]) -> np.ndarray:
    arr = np.array(values, dtype=float)
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, eq=False)
class TransducerTable:
    """Frequency -> dB table with a role.

    Parameters
    ----------
    name : str
        Name used in messages and in the chain description.
    role : str
        One of :data:`ROLES`.
    value_unit : str
        ``"db"``, ``"db_per_m"`` or ``"db_s_per_m"``; must suit the role.
    freq_hz : array_like
        Strictly increasing frequencies in Hz (at least two).
    value_db : array_like
        Values in ``value_unit`` at each frequency.
    origin : str
        File the table came from, or ``"inline"``.
    note : str
        Free text (``# source:`` line of a CSV file).
    """

    name: str
    role: str
    value_unit: str
    freq_hz: np.ndarray
    value_db: np.ndarray
    origin: str = "inline"
    note: str = ""
    _log_freq: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "freq_hz", _readonly(self.freq_hz))
        object.__setattr__(self, "value_db", _readonly(self.value_db))
        _check_table(self)
        object.__setattr__(self, "_log_freq", np.log10(self.freq_hz))

    @property
    def sign(self) -> int:
        """+1 or -1: how the table enters the chain sum."""
        return ROLES[self.role][0]

    @property
    def freq_range_hz(self) -> tuple[float, float]:
        """First and last frequency of the table in Hz."""
        return float(self.freq_hz[0]), float(self.freq_hz[-1])

    def at(self, freq_hz) -> np.ndarray:
        """Table value at each frequency: linear in dB against log10(f), NaN outside."""
        freq = self._snap_ends(np.asarray(freq_hz, dtype=float))
        with np.errstate(divide="ignore", invalid="ignore"):
            log_f = np.log10(freq)
        return np.interp(log_f, self._log_freq, self.value_db, left=np.nan, right=np.nan)

    def check_covers(self, freq_hz) -> None:
        """Raise AnalysisError when any finite frequency lies outside the table."""
        freq = np.asarray(freq_hz, dtype=float)
        freq = self._snap_ends(freq[np.isfinite(freq)])
        if freq.size == 0:
            return
        low, high = self.freq_range_hz
        need_low, need_high = float(freq.min()), float(freq.max())
        gaps = []
        if need_low < low:
            gaps.append(f"{units.format_hz(need_low)} to {units.format_hz(low)}")
        if need_high > high:
            gaps.append(f"{units.format_hz(high)} to {units.format_hz(need_high)}")
        if gaps:
            raise AnalysisError(
                f"transducer table {self.name!r} ({self.role}, {self.origin}) covers "
                f"{units.format_hz(low)} to {units.format_hz(high)}; the sweep needs "
                f"{units.format_hz(need_low)} to {units.format_hz(need_high)} "
                f"(uncovered: {'; '.join(gaps)})"
            )

    def describe(self) -> str:
        """One line: name, role, sign, unit, range and origin."""
        low, high = self.freq_range_hz
        sign = "+" if self.sign > 0 else "-"
        text = (f"{sign} {self.name!r}: {self.role} in {_UNIT_TEXT[self.value_unit]}, "
                f"{self.freq_hz.size} points {units.format_hz(low)} to {units.format_hz(high)}, "
                f"from {self.origin}")
        return f"{text} ({self.note})" if self.note else text

    def _snap_ends(self, freq: np.ndarray) -> np.ndarray:
        low, high = self.freq_range_hz
        freq = np.where(np.abs(freq - low) <= _END_SLACK * low, low, freq)
        return np.where(np.abs(freq - high) <= _END_SLACK * high, high, freq)


def _check_table(table: TransducerTable) -> None:
    where = f"transducer table {table.name!r} ({table.origin})"
    if table.role not in ROLES:
        raise ConfigError(f"{where}: unknown role {table.role!r}, expected one of "
                          f"{', '.join(ROLES)}")
    allowed = ROLES[table.role][1]
    if table.value_unit not in allowed:
        raise ConfigError(f"{where}: {'an' if table.role[0] in 'aeiou' else 'a'} {table.role} table is in "
                          f"{' or '.join(_UNIT_TEXT[u] for u in allowed)}, found values in "
                          f"{_UNIT_TEXT.get(table.value_unit, table.value_unit)}")
    freq, value = table.freq_hz, table.value_db
    if freq.ndim != 1 or freq.shape != value.shape or freq.size < 2:
        raise ConfigError(f"{where}: expected at least two (frequency, value) pairs of equal "
                          f"length, found {freq.size} frequencies and {value.size} values")
    if not (np.all(np.isfinite(freq)) and np.all(np.isfinite(value)) and freq[0] > 0):
        raise ConfigError(f"{where}: expected finite values and frequencies > 0 Hz")
    steps = np.diff(freq)
    if np.any(steps <= 0):
        i = int(np.argmax(steps <= 0)) + 1
        raise ConfigError(f"{where}: frequencies must increase strictly, found "
                          f"{freq[i]:.9g} Hz after {freq[i - 1]:.9g} Hz (point {i + 1})")
    if np.any(np.abs(value) > MAX_ABS_VALUE_DB):
        i = int(np.argmax(np.abs(value) > MAX_ABS_VALUE_DB))
        raise ConfigError(f"{where}: expected values within +-{MAX_ABS_VALUE_DB:g} dB, found {value[i]:g} dB at "
                          f"{units.format_hz(freq[i])} (point {i + 1})")
    if table.role in _NONNEGATIVE_ROLES and np.any(value < 0):
        i = int(np.argmax(value < 0))
        raise ConfigError(f"{where}: a {table.role} is >= 0 dB (its sign is applied by the "
                          f"chain), found {value[i]:g} dB at {units.format_hz(freq[i])} "
                          f"(point {i + 1})")


def _value_unit(column: str) -> str | None:
    for suffix in ("_db_s_per_m", "_db_per_m", "_db"):
        if column.endswith(suffix) or column == suffix[1:]:
            return suffix[1:]
    return None


def _header_error(file: str, line: int, header: Sequence[str]) -> ConfigError:
    return ConfigError(
        f"expected a header 'freq_<hz|khz|mhz|ghz>,<name>_<db|db_per_m|db_s_per_m>', "
        f"found {','.join(header)!r}", file=file, line=line)


def _read_csv(path: Path) -> tuple[dict[str, str], int, list[str], list[tuple[int, list[str]]]]:
    """Comment metadata, header line number, header cells, (line number, cells) rows."""
    meta: dict[str, str] = {}
    header: list[str] | None = None
    header_line = 0
    rows: list[tuple[int, list[str]]] = []
    try:
        text = path.read_text(encoding="utf-8-sig")  # a byte-order mark (spreadsheet export) is fine
    except OSError as exc:
        raise ConfigError(f"cannot read transducer table: {exc.strerror}", file=str(path)) from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(f"expected a UTF-8 text table, found bytes that are not UTF-8 at byte {exc.start}",
                          file=str(path)) from None
    for number, raw in enumerate(text.splitlines(), start=1):
        stripped = raw.strip()
        if stripped.startswith("#"):
            key, sep, value = stripped[1:].partition(":")
            if sep and key.strip().lower() in ("name", "role", "source"):
                meta[key.strip().lower()] = value.strip()
            continue
        if not stripped:
            continue
        cells = [c.strip() for c in next(csv.reader([stripped]))]
        if header is None:
            header, header_line = cells, number
        else:
            rows.append((number, cells))
    if header is None:
        raise ConfigError("expected a header line and data rows, found none", file=str(path))
    return meta, header_line, header, rows


def load_table(path: str | Path, *, role: str | None = None, name: str | None = None
               ) -> TransducerTable:
    """Read a transducer table from a CSV file (format in the module docstring).

    Parameters
    ----------
    path : str or pathlib.Path
        CSV file.
    role : str, optional
        Role the caller expects; must agree with a ``# role:`` line if the file has one.
    name : str, optional
        Name overriding ``# name:`` and the file stem.

    Raises
    ------
    ConfigError
        One line with file and line: bad header, unreadable number, non-increasing frequency,
        unknown or conflicting role, unit that does not suit the role.
    """
    path = Path(path)
    file = str(path)
    meta, header_line, header, rows = _read_csv(path)
    if len(header) != 2 or header[0].lower() not in _FREQ_COLUMNS:
        raise _header_error(file, header_line, header)
    value_unit = _value_unit(header[1].lower())
    if value_unit is None:
        raise _header_error(file, header_line, header)
    file_role = meta.get("role")
    if role and file_role and role != file_role:
        raise ConfigError(f"expected role {role!r}, the file says {file_role!r}", file=file)
    role = role or file_role
    if role is None:
        raise ConfigError(f"expected a role (one of {', '.join(ROLES)}) in a '# role:' line or "
                          "where the table is used, found none", file=file)
    scale = _FREQ_COLUMNS[header[0].lower()]
    freq, value = [], []
    for number, cells in rows:
        if len(cells) != 2:
            raise ConfigError(f"expected 2 values, found {len(cells)}", file=file, line=number)
        try:
            freq.append(float(cells[0]) * scale)
            value.append(float(cells[1]))
        except ValueError:
            raise ConfigError(f"expected two numbers, found {','.join(cells)!r}", file=file,
                              line=number) from None
    try:
        return TransducerTable(name or meta.get("name") or path.stem, role, value_unit, freq,
                               value, origin=file, note=meta.get("source", ""))
    except ConfigError as exc:
        line = _offending_line(exc.message, rows)
        raise ConfigError(exc.message, file=file, line=line) from None


def _offending_line(message: str, rows: list[tuple[int, list[str]]]) -> int | None:
    # "(point N)" in the message names the data row; map it back to the file line.
    marker = "(point "
    if marker in message:
        index = int(message.split(marker)[1].split(")")[0]) - 1
        if 0 <= index < len(rows):
            return rows[index][0]
    return None


def table_from_mapping(mapping: Mapping, *, base_dir: str | Path | None = None,
                       file: str | None = None, key: str | None = None) -> TransducerTable:
    """Build a table from a TOML mapping: ``file = "x.csv"`` or inline arrays.

    Parameters
    ----------
    mapping : Mapping
        Keys ``role`` (required), ``name``, and either ``file`` (CSV path, relative to
        ``base_dir``) or a frequency array (``freq = ["30 MHz", ...]`` or ``freq_mhz = [...]``)
        and one value array whose key ends in its unit (``loss_db``, ``af_db_per_m``, ...).
    base_dir : str or pathlib.Path, optional
        Directory relative CSV paths are resolved against.
    file, key : str, optional
        File and key path of the mapping, for error messages.
    """
    data = dict(mapping)
    role = data.pop("role", None)
    name = data.pop("name", None)
    if "file" in data:
        csv_path = Path(data.pop("file"))
        if data:
            raise ConfigError(f"unknown keys {sorted(data)} next to 'file'", file=file, key=key)
        if base_dir is not None and not csv_path.is_absolute():
            csv_path = Path(base_dir) / csv_path
        return load_table(csv_path, role=role, name=name)
    if role is None or name is None:
        raise ConfigError("an inline transducer table needs 'name' and 'role'", file=file,
                          key=key)
    freq_hz = _inline_freq(data, file, key)
    value_keys = [k for k in data if _value_unit(k)]
    if len(value_keys) != 1 or len(data) != 1:
        raise ConfigError(f"expected one frequency array and one value array such as 'loss_db',"
                          f" found keys {sorted(mapping)}", file=file, key=key)
    values = data[value_keys[0]]
    if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values):
        raise ConfigError(f"expected numbers in {value_keys[0]!r}", file=file, key=key)
    try:
        return TransducerTable(name, role, _value_unit(value_keys[0]), freq_hz, values,
                               origin=file or "inline")
    except ConfigError as exc:
        raise ConfigError(exc.message, file=file, key=key) from None


def _inline_freq(data: dict, file: str | None, key: str | None) -> list[float]:
    if "freq" in data:
        try:
            return [units.parse(v, "frequency", radio=True) for v in data.pop("freq")]
        except UnitError as exc:
            raise ConfigError(exc.message, file=file, key=f"{key}.freq" if key else "freq") \
                from None
    for column, scale in _FREQ_COLUMNS.items():
        if column in data:
            return [float(v) * scale for v in data.pop(column)]
    raise ConfigError("expected a frequency array 'freq' (with units) or 'freq_mhz' etc.",
                      file=file, key=key)


@dataclass(frozen=True, eq=False)
class TransducerChain:
    """Signed sum of transducer tables from the receiver input back to the field.

    Parameters
    ----------
    tables : sequence of TransducerTable
        At most one ``antenna_factor`` or ``probe_factor`` table, any number of the others.
    """

    tables: tuple[TransducerTable, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "tables", tuple(self.tables))
        field_tables = [t for t in self.tables if t.role in _FIELD_ROLES]
        if len(field_tables) > 1:
            raise ConfigError("a transducer chain holds at most one antenna or probe factor, "
                              f"found {', '.join(repr(t.name) for t in field_tables)}")

    @property
    def result_quantity(self) -> str:
        """Unit of corrected readings: ``"dbuv_per_m"``, ``"dbua_per_m"`` or ``"dbuv"``."""
        for table in self.tables:
            if table.role in _FIELD_ROLES:
                return _RESULT_QUANTITY[table.value_unit]
        return "dbuv"

    def check_covers(self, freq_hz) -> None:
        """Raise AnalysisError naming the first table that does not cover ``freq_hz``."""
        for table in self.tables:
            table.check_covers(freq_hz)

    def total_db(self, freq_hz) -> np.ndarray:
        """Signed sum of all tables at each frequency (Hz), in dB.

        Raises
        ------
        AnalysisError
            A table does not cover every finite frequency asked for.
        """
        freq = np.asarray(freq_hz, dtype=float)
        self.check_covers(freq)
        total = np.zeros(freq.shape)
        for table in self.tables:
            # E = V + AF + L_cable - G_preamp (AF = E/V along the chain): the role carries the sign.
            total = total + table.sign * table.at(freq)
        return total

    def correct(self, freq_hz, reading_dbuv) -> np.ndarray:
        """Receiver readings in dBuV to :attr:`result_quantity` at each frequency (Hz)."""
        reading = np.asarray(reading_dbuv, dtype=float)
        freq = np.asarray(freq_hz, dtype=float)
        if reading.shape != freq.shape:
            raise AnalysisError(f"expected one reading per frequency, found {reading.shape} "
                                f"readings for {freq.shape} frequencies")
        return reading + self.total_db(freq)

    def describe(self) -> str:
        """Text naming the result unit, every table, its role, unit, sign and origin."""
        result = _RESULT_TEXT[self.result_quantity]
        terms = "".join(f" {'+' if t.sign > 0 else '-'} {t.name}" for t in self.tables)
        lines = [f"{result} = reading dBuV{terms}"]
        lines += [f"  {t.describe()}" for t in self.tables]
        return "\n".join(lines)
