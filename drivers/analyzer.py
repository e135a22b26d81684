"""Generic SCPI swept spectrum analyzer.

The code is the same for every analyzer; the profile (``drivers/profiles/*.toml``) holds the
command spellings, detector names, limits, sweep-time constant and byte order. The driver is a
table of settings plus a few verbs: :meth:`Analyzer.initialize`, :meth:`Analyzer.configure`,
:meth:`Analyzer.sweep`, :meth:`Analyzer.fetch_trace`.

Synchronisation is by ``*OPC?`` after ``INIT:IMM`` (no fixed sleeps); the reply deadline is the
instrument's own sweep time (``SWE:TIME?``) plus the profile's timeout. Traces travel as
``FORM REAL,32`` in an IEEE 488.2 definite block and are decoded with the byte order the profile
declares (and sends).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from bench import units
from bench.drivers.profile import load_profile_source
from bench.errors import ConfigError, InstrumentError, PlanError
from bench.ieee488 import decode_float32
from bench.transports import TransportSettings

__all__ = ["AnalyzerProfile", "Analyzer", "SweepSettings", "load_analyzer_profile", "DETECTORS"]

#: Detector names used in sequence files (trade terms); profiles map them to SCPI spellings.
DETECTORS = ("peak", "negative", "sample", "average", "rms", "quasi-peak", "cispr-average")

_SETTING_KEYS = ("start_hz", "stop_hz", "rbw_hz", "vbw_hz", "points", "detector",
                 "ref_level_dbm", "attenuation_db", "sweep_time_s")
_COMMAND_KEYS = ("identify", "reset", "clear_status", "error_query", "single_sweep_mode",
                 "trace_format", "byte_order_little", "byte_order_big", "power_unit",
                 "sweep_and_wait", "sweep_time_query", "sweep_time_auto", "fetch_trace")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class _Io(_Strict):
    read_termination: str = "\n"
    write_termination: str = "\n"
    timeout: str = "10 s"
    open_timeout: str = "5 s"
    byte_order: str = "little"

    @field_validator("byte_order")
    @classmethod
    def _order(cls, v: str) -> str:
        if v not in ("little", "big"):
            raise ValueError(f"expected 'little' or 'big', found {v!r}")
        return v


class _Caps(_Strict):
    max_points: int = Field(gt=1)
    min_points: int = Field(gt=1)
    freq_min: str
    freq_max: str
    rbw_min: str
    rbw_max: str
    sweep_time_k: float = Field(gt=0)
    min_sweep_time: str
    max_sweep_time: str = "4000 s"
    transfer_rate: str
    command_overhead: str
    max_attenuation: str
    damage_level: str


class _Setting(_Strict):
    set: str
    query: str | None = None


class _ProfileModel(_Strict):
    schema_: int = Field(alias="schema")
    name: str
    kind: str
    description: str = ""
    io: _Io
    capabilities: _Caps
    detectors: dict[str, str]
    settings: dict[str, _Setting]
    commands: dict[str, str]
    warning_codes: list[int] = []


@dataclass(frozen=True)
class AnalyzerProfile:
    """A validated analyzer profile, with SI values.

    Attributes mirror the TOML: see ``drivers/profiles/scpi-analyzer.toml``.
    """

    name: str
    origin: str
    description: str
    io: TransportSettings
    big_endian: bool
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
    warning_codes: tuple = ()

    def estimate_sweep_time_s(self, span_hz: float, rbw_hz: float) -> float:
        """Swept-analyzer minimum sweep time ST = k*span/RBW^2, floored (reference sheet §8)."""
        return max(self.sweep_time_k * span_hz / rbw_hz**2, self.min_sweep_time_s)


def load_analyzer_profile(name_or_path: str | Path, *, base_dir: Path | None = None) -> AnalyzerProfile:
    """Load and validate an analyzer profile (built-in name or path)."""
    from bench.tomlsource import validation_to_config_error

    source = load_profile_source(name_or_path, base_dir=base_dir)
    data, origin = source.data, source.file
    if data.get("kind") != "analyzer":
        raise source.error(("kind",), f"expected kind = \"analyzer\" (an analyzer profile), found {data.get('kind')!r}")
    try:
        model = _ProfileModel.model_validate(data)
    except ValidationError as exc:
        raise validation_to_config_error(source, exc, _ProfileModel) from None
    if model.schema_ != 1:
        raise ConfigError(f"expected schema = 1, found {model.schema_}", file=origin, key="schema")
    if model.kind != "analyzer":
        raise ConfigError(f"expected kind = \"analyzer\", found {model.kind!r}", file=origin, key="kind")
    for key in _SETTING_KEYS:
        if key not in model.settings:
            raise ConfigError(f"missing setting row [settings.{key}]", file=origin, key=f"settings.{key}")
    for key in _COMMAND_KEYS:
        if key not in model.commands:
            raise ConfigError(f"missing command {key!r}", file=origin, key=f"commands.{key}")
    for det in DETECTORS:
        if det not in model.detectors:
            raise ConfigError(f"missing detector name for {det!r}", file=origin, key=f"detectors.{det}")
    caps = model.capabilities

    def q(text: str, dim: str, key: str) -> float:
        try:
            return units.parse(text, dim)
        except ConfigError as exc:
            raise ConfigError(exc.message, file=origin, key=key) from None

    io = TransportSettings(
        timeout_s=q(model.io.timeout, "time", "io.timeout"),
        open_timeout_s=q(model.io.open_timeout, "time", "io.open_timeout"),
        read_termination=model.io.read_termination,
        write_termination=model.io.write_termination,
    )
    return AnalyzerProfile(
        name=model.name, origin=origin, description=model.description, io=io,
        big_endian=model.io.byte_order == "big",
        max_points=caps.max_points, min_points=caps.min_points,
        freq_min_hz=q(caps.freq_min, "frequency", "capabilities.freq_min"),
        freq_max_hz=q(caps.freq_max, "frequency", "capabilities.freq_max"),
        rbw_min_hz=q(caps.rbw_min, "frequency", "capabilities.rbw_min"),
        rbw_max_hz=q(caps.rbw_max, "frequency", "capabilities.rbw_max"),
        sweep_time_k=caps.sweep_time_k,
        min_sweep_time_s=q(caps.min_sweep_time, "time", "capabilities.min_sweep_time"),
        max_sweep_time_s=q(caps.max_sweep_time, "time", "capabilities.max_sweep_time"),
        transfer_bytes_per_s=q(caps.transfer_rate, "data_rate", "capabilities.transfer_rate"),
        command_overhead_s=q(caps.command_overhead, "time", "capabilities.command_overhead"),
        max_attenuation_db=q(caps.max_attenuation, "db", "capabilities.max_attenuation"),
        damage_level_dbm=q(caps.damage_level, "dbm", "capabilities.damage_level"),
        detectors=dict(model.detectors),
        settings={k: (v.set, v.query) for k, v in model.settings.items()},
        commands=dict(model.commands),
        warning_codes=tuple(model.warning_codes),
    )


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


def _fmt(value) -> str:
    """A plain SCPI number: integers without a decimal point, no suffix, no exponent surprises."""
    if isinstance(value, str):
        return value
    if float(value).is_integer() and abs(value) < 1e15:
        return str(int(value))
    return repr(float(value))


class Analyzer:
    """A swept spectrum analyzer reached through an open transport.

    Parameters
    ----------
    transport : Transport
        Open connection (see :func:`bench.transports.open_transport`). The constructor does no I/O.
    profile : AnalyzerProfile
        Command dialect and limits.
    """

    def __init__(self, transport, profile: AnalyzerProfile) -> None:
        self.transport = transport
        self.profile = profile
        self.identity: str | None = None
        self._applied: dict[str, object] = {}
        self._sweep_time_s: float | None = None
        self.warnings: list[str] = []

    @property
    def address(self) -> str:
        return self.transport.address

    # ------------------------------------------------------------------ verbs
    def identify(self) -> str:
        """``*IDN?``: manufacturer, model, serial, firmware (IEEE 488.2)."""
        self.identity = self.transport.query(self.profile.commands["identify"])
        return self.identity

    def initialize(self) -> str:
        """Reset to a known state: clear status, single sweep, binary format, byte order, dBm.

        Also used to resynchronise after a reconnect (the instrument may have rebooted).
        """
        c = self.profile.commands
        self.transport.write(c["clear_status"])
        ident = self.identify()
        order = c["byte_order_big"] if self.profile.big_endian else c["byte_order_little"]
        for cmd in (c["single_sweep_mode"], c["trace_format"], order, c["power_unit"]):
            self.transport.write(cmd)
        self.check_errors("initialization")
        self._applied.clear()
        self._sweep_time_s = None
        return ident

    def validate(self, s: SweepSettings) -> None:
        """Refuse settings outside the profile's capabilities before sending anything."""
        p = self.profile
        problems = []
        if not (p.freq_min_hz <= s.start_hz <= s.stop_hz <= p.freq_max_hz):
            problems.append(f"frequency {units.format_hz(s.start_hz)}-{units.format_hz(s.stop_hz)} "
                            f"outside {units.format_hz(p.freq_min_hz)}-{units.format_hz(p.freq_max_hz)}")
        if not (p.min_points <= s.points <= p.max_points):
            problems.append(f"{s.points} points outside {p.min_points}-{p.max_points}")
        if not (p.rbw_min_hz <= s.rbw_hz <= p.rbw_max_hz):
            problems.append(f"RBW {units.format_hz(s.rbw_hz)} outside "
                            f"{units.format_hz(p.rbw_min_hz)}-{units.format_hz(p.rbw_max_hz)}")
        if s.detector not in p.detectors:
            problems.append(f"detector {s.detector!r} unknown to profile {p.name}")
        if s.attenuation_db is not None and not (0 <= s.attenuation_db <= p.max_attenuation_db):
            problems.append(f"attenuation {s.attenuation_db:g} dB outside 0-{p.max_attenuation_db:g} dB")
        if problems:
            raise PlanError(f"{self.address}: profile {p.name}: " + "; ".join(problems))

    def configure(self, s: SweepSettings) -> float:
        """Send the settings that changed since the last call, check the error queue.

        Returns
        -------
        float
            The instrument's own sweep time for these settings, seconds (``SWE:TIME?``).
        """
        self.validate(s)
        wanted = {
            # start/stop order matters: move stop first when going up so start < stop always holds
            "stop_hz": s.stop_hz, "start_hz": s.start_hz,
            "rbw_hz": s.rbw_hz, "vbw_hz": s.vbw_hz, "points": s.points,
            "detector": self.profile.detectors[s.detector],
            "ref_level_dbm": s.ref_level_dbm, "attenuation_db": s.attenuation_db,
            "sweep_time_s": s.sweep_time_s,
        }
        if self._applied.get("stop_hz") is not None and s.stop_hz < float(self._applied.get("start_hz", 0.0)):
            wanted = {"start_hz": wanted.pop("start_hz"), **wanted}
        sent = []
        if s.sweep_time_s is None and self._applied.get("sweep_time_s") is not None:
            cmd = self.profile.commands["sweep_time_auto"]  # back to the coupled sweep time
            self.transport.write(cmd)
            sent.append(cmd)
            self._applied["sweep_time_s"] = None
        for key, value in wanted.items():
            if value is None or self._applied.get(key) == value:
                continue
            template = self.profile.settings[key][0]
            cmd = template.format(value=_fmt(value))
            self.transport.write(cmd)
            sent.append(cmd)
            self._applied[key] = value
        if sent or self._sweep_time_s is None:
            try:
                self.check_errors("; ".join(sent) or "configuration")
            except InstrumentError:
                self._applied.clear()
                raise
            self._sweep_time_s = float(self.transport.query(self.profile.commands["sweep_time_query"]))
        return self._sweep_time_s

    def sweep(self) -> None:
        """Take one single sweep and wait for it with ``*OPC?`` (deadline: sweep time + timeout)."""
        expected = self._sweep_time_s or 0.0
        reply = self.transport.query(self.profile.commands["sweep_and_wait"],
                                     timeout_s=expected * 2.0 + self.profile.io.timeout_s)
        if reply.strip() != "1":
            raise InstrumentError(self.address, self.profile.commands["sweep_and_wait"],
                                  text=f"expected '1' from *OPC?, found {reply!r}")
        # an overload or a hardware fault shows in the error queue: never store such a trace silently
        self.check_errors("sweep")

    def fetch_trace(self, points: int) -> np.ndarray:
        """Read the last sweep as little-endian float32 dBm values."""
        cmd = self.profile.commands["fetch_trace"]
        payload = self.transport.query_block(cmd)
        return decode_float32(payload, big_endian=self.profile.big_endian, expected_points=points)

    def check_errors(self, context: str, max_reads: int = 32) -> None:
        """Drain ``SYST:ERR?``; raise the first error with the instrument's code and text.

        Codes the profile lists in ``warning_codes`` (e.g. an input overload) are kept in
        :attr:`warnings` instead of raised; the caller decides what to do with them.
        """
        first = None
        for _ in range(max_reads):
            reply = self.transport.query(self.profile.commands["error_query"])
            code, text = _parse_error(reply)
            if code == 0:
                break
            if code in self.profile.warning_codes:
                self.warnings.append(f"{code},{text!r} after {context}")
                continue
            first = first or (code, text)
        if first:
            raise InstrumentError(self.address, context, code=first[0], text=first[1])

    def take_warnings(self) -> list[str]:
        """Warnings collected since the last call (and forget them)."""
        out, self.warnings = self.warnings, []
        return out

    def close(self) -> None:
        """Close the connection."""
        self.transport.close()

    def forget_state(self) -> None:
        """Forget what was applied (after a reconnect everything is sent again)."""
        self._applied.clear()
        self._sweep_time_s = None


def _parse_error(reply: str) -> tuple[int, str]:
    """``-222,"Data out of range"`` -> (-222, 'Data out of range') (SCPI-1999 error queue)."""
    head, _, tail = reply.strip().partition(",")
    try:
        code = int(head)
    except ValueError:
        return -1, f"unreadable error reply {reply!r}"
    return code, tail.strip().strip('"')


def points_for_step(span_hz: float, step_hz: float) -> int:
    """Points needed so that the spacing does not exceed ``step_hz``."""
    return int(math.ceil(span_hz / step_hz - 1e-9)) + 1
