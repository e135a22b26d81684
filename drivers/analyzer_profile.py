"""Analyzer profiles: one SCPI dialect described as data (``drivers/profiles/*.toml``).

A profile says what differs between two swept analyzers, each by what it does, never by who
made it:

``[settings.*]``, ``[detectors]``, ``[commands]``
    command spellings and detector names;
``[connect]``
    commands sent once the instrument has identified itself (mode selection, display off,
    status preset), at the start of a run and after every reconnect;
``[trace]``
    the trace formats the instrument offers (IEEE 754 binary32 or binary64, 32-bit integers with
    a scale, comma-separated ASCII), which one to use, the byte order and the fetch query;
``[completion]``
    how the end of a sweep is awaited: a query that answers when the sweep is done
    (``opc-query``, ``*OPC?``), polling a status register (``status-poll``, e.g. ``*ESR?`` after
    ``*OPC``, or the SWEeping bit of ``STAT:OPER:COND?``), or waiting a stated time
    (``fixed-wait``: the sweep time plus a margin);
``[capabilities]``
    the limits the planner and the driver check, and the figures of the time estimate.

The file is read with :mod:`bench.tomlsource`: unknown keys are refused, and every error is one
line ``FILE:LINE: key.path: expected ..., found ...``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from bench import units
from bench.drivers.profile import load_profile_source
from bench.errors import ConfigError, ProfileMismatchError
from bench.tomlsource import cross_check_error, quantity, validation_to_config_error
from bench.transports import TransportSettings

__all__ = [
    "AnalyzerProfile",
    "BINARY_WIDTHS",
    "COMPLETION_METHODS",
    "Completion",
    "TRACE_FORMATS",
    "TraceFormat",
    "load_analyzer_profile",
]

#: Trace formats a profile can list: IEEE 754 binary32/binary64, two's-complement 32-bit
#: integers, and comma-separated ASCII numbers (SCPI-1999 FORMat[:DATA] REAL,32|REAL,64|INT,32|ASCii).
TRACE_FORMATS = ("real32", "real64", "int32", "ascii")
#: Bytes per value of the binary formats.
BINARY_WIDTHS = {"real32": 4, "real64": 8, "int32": 4}
#: How the end of a sweep is awaited.
COMPLETION_METHODS = ("opc-query", "status-poll", "fixed-wait")

_ASCII_BYTES_PER_POINT = 16  # "-1.23456789E+01," : a planning figure (common practice)

# keys of older profiles and where they went: a one-line hint instead of "unknown key"
_MOVED = {
    ("io", "byte_order"): "trace.byte_order",
    ("commands", "trace_format"): "[trace.formats] (and choose one with trace.use)",
    ("commands", "byte_order_little"): "trace.byte_order_little",
    ("commands", "byte_order_big"): "trace.byte_order_big",
    ("commands", "fetch_trace"): "trace.fetch",
    ("commands", "sweep_and_wait"): '[completion] (method = "opc-query", start = ...)',
}


# ------------------------------------------------------------------------------ file model


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


class _Io(_Strict):
    read_termination: str = "\n"
    write_termination: str = "\n"
    timeout: str = "10 s"
    open_timeout: str = "5 s"


class _Caps(_Strict):
    max_points: int = Field(gt=1)
    min_points: int = Field(gt=1)
    freq_min: str
    freq_max: str
    rbw_min: str
    rbw_max: str
    sweep_time_k: float = Field(gt=0, le=100, allow_inf_nan=False)  # 2-3 for analog filters
    min_sweep_time: str
    max_sweep_time: str = "4000 s"
    transfer_rate: str
    command_overhead: str
    max_attenuation: str
    damage_level: str


class _Detectors(_Strict):
    peak: str
    negative: str
    sample: str
    average: str
    rms: str
    quasi_peak: str = Field(alias="quasi-peak")
    cispr_average: str = Field(alias="cispr-average")


class _Setting(_Strict):
    set: str
    query: str | None = None


class _Settings(_Strict):
    start_hz: _Setting
    stop_hz: _Setting
    rbw_hz: _Setting
    vbw_hz: _Setting
    points: _Setting
    detector: _Setting
    ref_level_dbm: _Setting
    attenuation_db: _Setting
    sweep_time_s: _Setting


class _Commands(_Strict):
    identify: str
    reset: str
    clear_status: str
    error_query: str
    single_sweep_mode: str
    power_unit: str
    sweep_time_query: str
    sweep_time_auto: str


class _Connect(_Strict):
    commands: list[str] = []


class _Format(_Strict):
    command: str
    scale: float | None = Field(default=None, gt=0)
    separator: str | None = Field(default=None, min_length=1)


class _Trace(_Strict):
    use: Literal["real32", "real64", "int32", "ascii"]
    byte_order: Literal["little", "big"] = "little"
    byte_order_little: str | None = None
    byte_order_big: str | None = None
    fetch: str
    formats: dict[Literal["real32", "real64", "int32", "ascii"], _Format]

    @model_validator(mode="after")
    def _consistent(self) -> _Trace:
        problems = []
        if self.use not in self.formats:
            listed = ", ".join(self.formats) or "none"
            problems.append((("use",), f"expected one of the formats listed in [trace.formats] "
                                       f"({listed}), found \"{self.use}\""))
        for name, fmt in self.formats.items():
            if fmt.scale is not None and name != "int32":
                problems.append((("formats", name, "scale"), "only int32 values are scaled; remove it"))
            if fmt.separator is not None and name != "ascii":
                problems.append((("formats", name, "separator"), "only ascii values are separated; remove it"))
        if problems:
            raise cross_check_error(problems)
        return self


_USES = {
    "opc-query": ({"start", "reply", "deadline_factor"}, set()),
    "status-poll": ({"start", "poll", "mask", "done_when", "poll_interval", "deadline_factor"},
                    {"poll", "mask", "done_when", "poll_interval"}),
    "fixed-wait": ({"start", "wait_factor", "wait_margin"}, {"wait_margin"}),
}


class _Completion(_Strict):
    method: Literal["opc-query", "status-poll", "fixed-wait"]
    start: str
    reply: str | None = None
    poll: str | None = None
    mask: int | None = Field(default=None, ge=1)
    done_when: Literal["set", "clear"] | None = None
    poll_interval: quantity("time", positive=True) | None = None
    deadline_factor: float | None = Field(default=None, gt=0)
    wait_factor: float | None = Field(default=None, gt=0)
    wait_margin: quantity("time", non_negative=True) | None = None

    @model_validator(mode="after")
    def _keys_of_the_method(self) -> _Completion:
        allowed, required = _USES[self.method]
        given = self.model_fields_set - {"method"}
        method = f'method = "{self.method}"'
        problems = [((key,), f"not used with {method} (used by "
                             f"{', '.join(m for m, (a, _) in _USES.items() if key in a)}); remove it")
                    for key in sorted(given - allowed)]
        problems += [((key,), f"expected a value: {method} needs it, found nothing")
                     for key in sorted(required - given)]
        if problems:
            raise cross_check_error(problems)
        return self


class _ProfileModel(_Strict):
    schema_: int = Field(alias="schema")
    name: str
    kind: str
    description: str = ""
    io: _Io
    capabilities: _Caps
    detectors: _Detectors
    settings: _Settings
    commands: _Commands
    connect: _Connect = _Connect()
    trace: _Trace
    completion: _Completion
    warning_codes: list[int] = []


# ------------------------------------------------------------------------------ the profile


@dataclass(frozen=True)
class TraceFormat:
    """The trace format the driver selects, and how to read it.

    Attributes
    ----------
    kind : str
        One of :data:`TRACE_FORMATS`.
    command : str
        Selects the format on the instrument.
    big_endian : bool
        Binary formats: the byte order the driver selects and decodes.
    byte_order_command : str or None
        Selects that byte order (None: the instrument has a fixed order; nothing is sent).
    fetch : str
        Query that returns the last trace.
    scale : float
        ``int32``: dB per count (value = count × scale).
    separator : str
        ``ascii``: between two values.
    """

    kind: str
    command: str
    big_endian: bool
    byte_order_command: str | None
    fetch: str
    scale: float = 1.0
    separator: str = ","

    @property
    def binary(self) -> bool:
        """True for the block formats (``real32``, ``real64``, ``int32``)."""
        return self.kind in BINARY_WIDTHS

    @property
    def bytes_per_point(self) -> int:
        """Bytes one trace point takes on the wire (for ASCII a planning figure)."""
        return BINARY_WIDTHS.get(self.kind, _ASCII_BYTES_PER_POINT)


@dataclass(frozen=True)
class Completion:
    """How the end of a sweep is awaited (see the module docstring). Times in seconds.

    Attributes
    ----------
    method : str
        One of :data:`COMPLETION_METHODS`.
    start : str
        Starts one sweep (``opc-query``: and answers when it is done).
    reply : str
        ``opc-query``: the answer that means done.
    poll : str or None
        ``status-poll``: the status query.
    mask : int
        ``status-poll``: the bits of the status that matter.
    done_when : str
        ``status-poll``: ``"set"`` (all bits of ``mask`` set) or ``"clear"`` (all clear).
    poll_interval_s : float
        ``status-poll``: wait between two polls.
    deadline_factor : float
        ``opc-query``, ``status-poll``: deadline = factor × sweep time + the reply timeout.
    wait_factor, wait_margin_s : float
        ``fixed-wait``: wait = factor × sweep time + margin.
    """

    method: str
    start: str
    reply: str = "1"
    poll: str | None = None
    mask: int = 0
    done_when: str = "set"
    poll_interval_s: float = 0.0
    deadline_factor: float = 2.0
    wait_factor: float = 1.0
    wait_margin_s: float = 0.0

    def deadline_s(self, sweep_time_s: float, timeout_s: float) -> float:
        """Longest time to wait for one sweep, seconds."""
        return self.deadline_factor * sweep_time_s + timeout_s

    def max_polls(self, sweep_time_s: float, timeout_s: float) -> int:
        """Polls that fit in the deadline (the deadline is enforced as a count of polls)."""
        return math.ceil(self.deadline_s(sweep_time_s, timeout_s) / self.poll_interval_s) + 1

    def wait_s(self, sweep_time_s: float) -> float:
        """``fixed-wait``: how long to wait after starting a sweep, seconds."""
        return self.wait_factor * sweep_time_s + self.wait_margin_s

    def done(self, status: int) -> bool:
        """True when ``status`` (the polled register) says the sweep has ended."""
        bits = status & self.mask
        return bits == self.mask if self.done_when == "set" else bits == 0


@dataclass(frozen=True)
class AnalyzerProfile:
    """A validated analyzer profile, with SI values (see ``drivers/profiles/scpi-analyzer.toml``).

    Attributes
    ----------
    name, origin, description : str
        ``origin`` is the file (``builtin:<name>`` for a built-in profile).
    io : TransportSettings
        Terminators and deadlines, seconds.
    max_points, min_points : int
        Trace length limits.
    freq_min_hz, freq_max_hz, rbw_min_hz, rbw_max_hz : float
        Frequency and RBW ranges, Hz.
    sweep_time_k : float
        k in ST = k·span/RBW².
    min_sweep_time_s, max_sweep_time_s : float
        Sweep time range, seconds.
    transfer_bytes_per_s : float
        Trace transfer rate, bytes per second.
    command_overhead_s : float
        Time per round trip, seconds.
    max_attenuation_db, damage_level_dbm : float
        Input attenuation limit (dB) and the damage level assumed (dBm).
    detectors : dict
        Trade name -> the instrument's spelling.
    settings : dict
        Setting key -> (set template, query or None).
    commands : dict
        Command key -> spelling.
    connect_commands : tuple of str
        Sent once after identification.
    trace : TraceFormat
        The trace format in use.
    completion : Completion
        How a sweep is awaited.
    warning_codes : tuple of int
        Error-queue codes that are warnings about the measurement.
    key_lines : dict
        Key path -> line in the file, for errors found later (:meth:`mismatch`).
    """

    name: str
    origin: str
    description: str
    io: TransportSettings
    max_points: int
    min_points: int
    freq_min_hz: float
    freq_max_hz: float
    rbw_min_hz: float
    rbw_max_hz: float
    sweep_time_k: float
    min_sweep_time_s: float
    max_sweep_time_s: float
    transfer_bytes_per_s: float
    command_overhead_s: float
    max_attenuation_db: float
    damage_level_dbm: float
    detectors: dict
    settings: dict
    commands: dict
    trace: TraceFormat
    completion: Completion
    connect_commands: tuple[str, ...] = ()
    warning_codes: tuple[int, ...] = ()
    key_lines: dict = field(default_factory=dict, repr=False, compare=False)

    def estimate_sweep_time_s(self, span_hz: float, rbw_hz: float) -> float:
        """Swept-analyzer sweep time ST = k·span/RBW², floored at the shortest sweep, seconds.

        (Common practice for swept analog RBW filters: k of 2 to 3.)
        """
        return max(self.sweep_time_k * span_hz / rbw_hz**2, self.min_sweep_time_s)

    def mismatch(self, key_path: tuple[str, ...], message: str) -> ProfileMismatchError:
        """An error located at ``key_path`` of this profile, for what an instrument contradicts."""
        line = next((self.key_lines[key_path[:end]] for end in range(len(key_path), 0, -1)
                     if key_path[:end] in self.key_lines), None)
        return ProfileMismatchError(message, file=self.origin, line=line, key=".".join(key_path))


# ------------------------------------------------------------------------------ loading


def load_analyzer_profile(name_or_path: str | Path, *, base_dir: Path | None = None) -> AnalyzerProfile:
    """Load and validate an analyzer profile (built-in name or path).

    Raises
    ------
    ConfigError
        One line naming the file, the line, the key, what was expected and what was found.
    """
    source = load_profile_source(name_or_path, base_dir=base_dir)
    data = source.data
    if data.get("kind") != "analyzer":
        raise source.error(("kind",), f"expected kind = \"analyzer\" (an analyzer profile), found {data.get('kind')!r}")
    for path, where in _MOVED.items():
        if isinstance(data.get(path[0]), dict) and path[1] in data[path[0]]:
            raise source.error(path, f"this key moved to {where} (see docs/instruments.md, analyzer profiles)")
    try:
        model = _ProfileModel.model_validate(data)
    except ValidationError as exc:
        raise validation_to_config_error(source, exc, _ProfileModel) from None
    if model.schema_ != 1:
        raise source.error(("schema",), f"expected schema = 1, found {model.schema_}")
    return _profile(model, source.file, dict(source.lines))


def _profile(model: _ProfileModel, origin: str, key_lines: dict) -> AnalyzerProfile:
    caps = model.capabilities

    def q(text: str, dim: str, key: str) -> float:
        try:
            return units.parse(text, dim)
        except ConfigError as exc:
            raise ConfigError(exc.message, file=origin, line=key_lines.get(tuple(key.split("."))),
                              key=key) from None

    io = TransportSettings(
        timeout_s=_positive(q(model.io.timeout, "time", "io.timeout"), origin, key_lines, "io.timeout", "s"),
        open_timeout_s=q(model.io.open_timeout, "time", "io.open_timeout"),
        read_termination=model.io.read_termination,
        write_termination=model.io.write_termination,
    )
    return AnalyzerProfile(
        name=model.name, origin=origin, description=model.description, io=io,
        max_points=caps.max_points, min_points=caps.min_points,
        freq_min_hz=q(caps.freq_min, "frequency", "capabilities.freq_min"),
        freq_max_hz=q(caps.freq_max, "frequency", "capabilities.freq_max"),
        rbw_min_hz=q(caps.rbw_min, "frequency", "capabilities.rbw_min"),
        rbw_max_hz=q(caps.rbw_max, "frequency", "capabilities.rbw_max"),
        sweep_time_k=caps.sweep_time_k,
        min_sweep_time_s=q(caps.min_sweep_time, "time", "capabilities.min_sweep_time"),
        max_sweep_time_s=q(caps.max_sweep_time, "time", "capabilities.max_sweep_time"),
        transfer_bytes_per_s=_positive(q(caps.transfer_rate, "data_rate", "capabilities.transfer_rate"),
                                       origin, key_lines, "capabilities.transfer_rate", "B/s"),
        command_overhead_s=q(caps.command_overhead, "time", "capabilities.command_overhead"),
        max_attenuation_db=q(caps.max_attenuation, "db", "capabilities.max_attenuation"),
        damage_level_dbm=q(caps.damage_level, "dbm", "capabilities.damage_level"),
        detectors=model.detectors.model_dump(by_alias=True),
        settings={k: (v.set, v.query) for k, v in model.settings},
        commands=model.commands.model_dump(),
        trace=_trace(model.trace),
        completion=_completion(model.completion),
        connect_commands=tuple(model.connect.commands),
        warning_codes=tuple(model.warning_codes),
        key_lines=key_lines,
    )


def _trace(t: _Trace) -> TraceFormat:
    fmt = t.formats[t.use]
    big = t.byte_order == "big"
    return TraceFormat(kind=t.use, command=fmt.command, big_endian=big,
                       byte_order_command=t.byte_order_big if big else t.byte_order_little,
                       fetch=t.fetch, scale=fmt.scale if fmt.scale is not None else 1.0,
                       separator=fmt.separator or ",")


def _completion(c: _Completion) -> Completion:
    given = {k: v for k, v in {
        "reply": c.reply, "poll": c.poll, "mask": c.mask, "done_when": c.done_when,
        "poll_interval_s": c.poll_interval, "deadline_factor": c.deadline_factor,
        "wait_factor": c.wait_factor, "wait_margin_s": c.wait_margin,
    }.items() if v is not None}
    return Completion(method=c.method, start=c.start, **given)


def _positive(value: float, origin: str, key_lines: dict, key: str, unit: str) -> float:
    """A rate or time that must be above zero (a zero transfer rate would divide by zero)."""
    if not value > 0:
        raise ConfigError(f"expected a value above 0 {unit}, found {value:g} {unit}", file=origin,
                          line=key_lines.get(tuple(key.split("."))), key=key)
    return value
