"""Turn a validated bench file into capabilities (for the planner) and open instruments (to run).

Everything instrument-specific comes from the profiles the bench file names; the address string
alone picks the transport.
"""

from __future__ import annotations

import logging
import re
from pathlib import Path

from bench.drivers.analyzer import Analyzer, load_analyzer_profile
from bench.errors import BenchError, ConfigError, PlanError
from bench.planner import AnalyzerCaps, bench_caps, make_plan
from bench.run import Station
from bench.transports import is_visa_address, open_transport

__all__ = ["capabilities", "build_plan", "connect_station", "identify_all", "profiles_for"]

log = logging.getLogger("bench.station")


def _base(bench) -> Path | None:
    path = getattr(bench, "source_path", None)
    return Path(path).parent if path else None


def profiles_for(bench) -> dict:
    """Load every profile the bench file names (errors name the bench section)."""
    from bench.drivers.positioner import PositionerProfile
    from bench.drivers.stage import StageProfile
    from bench.drivers.supply import load_supply_profile

    base = _base(bench)
    out = {"analyzer": _load(lambda: load_analyzer_profile(bench.analyzer.profile, base_dir=base), "analyzer")}
    if bench.stage is not None:
        out["stage"] = _load(lambda: StageProfile.load(bench.stage.profile, base_dir=base), "stage")
    if bench.mast is not None:
        out["mast"] = _load(lambda: PositionerProfile.load(bench.mast.profile, base_dir=base), "mast")
    if bench.turntable is not None:
        out["turntable"] = _load(lambda: PositionerProfile.load(bench.turntable.profile, base_dir=base), "turntable")
    if getattr(bench, "supply", None) is not None:
        out["supply"] = _load(lambda: load_supply_profile(bench.supply.profile, base_dir=base), "supply")
    return out


def _load(fn, section: str):
    try:
        return fn()
    except ConfigError as exc:
        if exc.key is None:
            exc.key = f"[{section}] profile"
            exc.args = (exc.one_line(),)
        raise


def capabilities(bench, profiles: dict | None = None):
    """Planner capabilities from the bench file and its profiles."""
    profiles = profiles or profiles_for(bench)
    ap = profiles["analyzer"]
    analyzer = AnalyzerCaps(max_points=ap.max_points, min_points=ap.min_points, sweep_time_k=ap.sweep_time_k,
                            min_sweep_time_s=ap.min_sweep_time_s, transfer_bytes_per_s=ap.transfer_bytes_per_s,
                            command_overhead_s=ap.command_overhead_s)
    kwargs = {}
    if "stage" in profiles:
        kwargs["stage_accel_m_per_s2"] = profiles["stage"].accel_m_per_s2
    if "mast" in profiles and profiles["mast"].mast is not None:
        kwargs["mast_speed_m_per_s"] = profiles["mast"].mast.speed_per_s
    if "turntable" in profiles and profiles["turntable"].turntable is not None:
        kwargs["turntable_speed_deg_per_s"] = profiles["turntable"].turntable.speed_per_s
    return bench_caps(bench, analyzer=analyzer, **kwargs)


def build_plan(sequence, bench, *, sequence_dir: Path | None = None):
    """Check a sequence against a bench and expand it into actions (no I/O).

    Besides the planner's own checks (stage travel, mast and turntable limits, probes), every
    problem that would otherwise stop a run half-way is caught here, before anything moves:
    sweep settings the analyzer cannot do, limit lines that cannot be loaded, transducer tables
    that do not cover a sweep, an ambient capture with no way to switch the board off.
    """
    profiles = profiles_for(bench)
    plan = make_plan(sequence, capabilities(bench, profiles))
    preflight(plan, sequence, bench, profiles, sequence_dir=sequence_dir)
    return plan


def resolve_limit(name: str, sequence_dir: Path | None) -> str:
    """A built-in limit name as is; a limit file path made absolute against the sequence's folder."""
    if name.endswith(".toml") or "/" in name or "\\" in name:
        path = Path(name)
        if not path.is_absolute() and sequence_dir is not None:
            path = sequence_dir / path
        return str(path.resolve())
    return name


def _at(exc: PlanError, *key_path) -> PlanError:
    """Attach the sequence key path an error is about (the CLI turns it into a line number)."""
    exc.key_path = tuple(key_path)
    return exc


def _index(sequence, label: str) -> int:
    return next(i for i, st in enumerate(sequence.steps) if st.label == label)


def preflight(plan, sequence, bench, profiles: dict, *, sequence_dir: Path | None = None) -> None:
    """Refuse, before anything runs, what would fail mid-run (see :func:`build_plan`)."""
    from bench.analysis.limits import load_limit
    from bench.analysis.transducers import load_table
    from bench.drivers.analyzer import Analyzer, SweepSettings

    _check_addresses(bench)
    probe = Analyzer(transport=_NoTransport(bench.analyzer.address), profile=profiles["analyzer"])
    for action in plan.actions:
        for seg in action.segments:
            try:
                probe.validate(SweepSettings(start_hz=seg.start_hz, stop_hz=seg.stop_hz, rbw_hz=seg.rbw_hz,
                                             vbw_hz=seg.vbw_hz, points=seg.points, detector=seg.detector,
                                             attenuation_db=seg.attenuation_db))
            except PlanError as exc:
                raise _at(PlanError(f"step '{action.step_label}': {exc}"),
                          "steps", _index(sequence, action.step_label)) from None
    for i, step in enumerate(sequence.steps):
        limit = getattr(step, "limit", None)
        if limit is not None:
            try:
                limit_set = load_limit(resolve_limit(limit, sequence_dir))
            except (ConfigError, BenchError) as exc:
                raise _at(PlanError(f"steps[{i}] '{step.label}': limit {limit!r} cannot be used: {exc}"),
                          "steps", i, "limit") from None
            _check_limit_fits(i, step, limit_set, plan, bench)
        if step.kind == "final":
            _check_final(i, step, sequence, profiles["analyzer"])
        if step.kind == "ambient" and getattr(bench, "supply", None) is None:
            raise _at(PlanError(f"steps[{i}] '{step.label}': an ambient capture needs the board switched off, and "
                            "the bench file has no [supply] to do it unattended"), "steps", i)
    for step in sequence.steps:
        label, files = step.label, step_chain(bench, step)[0]
        span = _step_span(plan, label)
        if span is None:
            continue
        for role, path in files:
            try:
                table = load_table(path, role=role)
                table.check_covers(list(span))
            except (ConfigError, BenchError) as exc:
                raise _at(PlanError(f"step '{label}': {exc}"), "steps", _index(sequence, label)) from None
            if role == "probe_factor":
                _check_probe_unit(label, sequence, bench, table)


def _check_probe_unit(label: str, sequence, bench, table) -> None:
    """An H loop's factor converts to dBuA/m (dB(S/m)), an E probe's to dBuV/m (dB/m)."""
    probe = bench.probes[sequence.step(label).probe]
    wanted = "db_s_per_m" if probe.kind == "h-loop" else "db_per_m"
    if table.value_unit != wanted:
        raise PlanError(f"step '{label}': probe table {table.name!r} is in {table.value_unit}, but a {probe.kind} "
                        f"factor must be in {wanted} (column name ending in _{wanted})")


_SERIAL_SCHEMES = ("socket://", "rfc2217://", "loop://", "spy://", "hwgrep://", "alt://")


def _check_addresses(bench) -> None:
    """Every address must name a transport: a VISA resource, a pyserial URL or a device path."""
    for role in ("analyzer", "stage", "mast", "turntable", "supply"):
        section = getattr(bench, role, None)
        if section is None:
            continue
        address = section.address.strip()
        if address.startswith("sim://"):
            raise PlanError(f"[{role}] address {address!r} is a placeholder for the simulated bench: "
                            "run with --sim, or put the instrument's real address in the bench file")
        if not (is_visa_address(address) or address.startswith(_SERIAL_SCHEMES) or address.startswith("/")
                or re.fullmatch(r"COM\d+", address, re.IGNORECASE)):
            raise PlanError(f"[{role}] address: expected a VISA resource (TCPIP::host::port::SOCKET, "
                            f"GPIB0::n::INSTR, ...), a serial device path or a socket:// URL, found {address!r}")


def step_chain(bench, step) -> tuple[list[tuple[str, Path]], str, dict]:
    """The transducer tables a step's readings go through, the unit they end in, and extras.

    Returns
    -------
    files : list of (role, path)
        Probe factor for a grid step; antenna factor, cables and preamp otherwise (when the
        bench file has ``[transducers]``).
    unit : str
        ``dbua_per_m`` (H loop), ``dbuv_per_m`` (E probe, antenna chain) or ``dbuv`` (no chain).
    extra : dict
        Manifest extras: probe name and kind, or the site distance.
    """
    if step.kind == "grid":
        probe = bench.probes[step.probe]
        unit = "dbua_per_m" if probe.kind == "h-loop" else "dbuv_per_m"
        return [("probe_factor", Path(probe.factor))], unit, {"probe": step.probe, "probe_kind": probe.kind}
    if bench.transducers is None:
        return [], "dbuv", {}
    files = [("antenna_factor", Path(bench.transducers.antenna))]
    files += [("cable_loss", Path(c)) for c in bench.transducers.cables]
    if bench.transducers.preamp is not None:
        files.append(("preamp_gain", Path(bench.transducers.preamp)))
    extra = {"distance_m": bench.site.distance_m} if bench.site is not None else {}
    return files, "dbuv_per_m", extra


def _check_limit_fits(i: int, step, limit_set, plan, bench) -> None:
    """A limit in the step's unit that covers at least part of its sweep (else a silent pass)."""
    import numpy as np

    unit = step_chain(bench, step)[1]
    if limit_set.quantity != unit:
        raise _at(PlanError(f"steps[{i}] '{step.label}': limit {limit_set.name!r} is in {limit_set.quantity}, but the "
                        f"step's readings are in {unit} after its transducer chain"), "steps", i, "limit")
    span = _step_span(plan, step.label)
    if span is not None:
        freqs = np.linspace(span[0], span[1], 2001)
        if not np.any(np.isfinite(limit_set.screening_level(freqs))):
            raise _at(PlanError(f"steps[{i}] '{step.label}': limit {limit_set.name!r} has no line anywhere in the "
                            f"sweep {span[0] / 1e6:g}-{span[1] / 1e6:g} MHz"), "steps", i, "limit")


def _check_final(i: int, step, sequence, profile) -> None:
    """A final step's narrow span and dwell must be settings the analyzer can do."""
    sweep = sequence.sweeps[sequence.step(step.of).sweep]
    half = max(step.span_hz, 10.0 * sweep.rbw_hz) / 2.0
    if sweep.start_hz - half < profile.freq_min_hz or sweep.stop_hz + half > profile.freq_max_hz:
        raise _at(PlanError(f"steps[{i}] '{step.label}': span {step.span_hz / 1e6:g} MHz around the suspects goes "
                        f"outside the analyzer's {profile.freq_min_hz / 1e3:g} kHz-{profile.freq_max_hz / 1e9:g} GHz"),
                  "steps", i, "span")
    if not profile.min_sweep_time_s <= step.dwell_s <= profile.max_sweep_time_s:
        raise _at(PlanError(f"steps[{i}] '{step.label}': dwell {step.dwell_s:g} s outside the analyzer's sweep times "
                        f"{profile.min_sweep_time_s:g}-{profile.max_sweep_time_s:g} s"), "steps", i, "dwell")


def _step_span(plan, label: str):
    segs = [seg for a in plan.actions if a.step_label == label for seg in a.segments]
    if not segs:
        return None
    return min(s.start_hz for s in segs), max(s.stop_hz for s in segs)


class _NoTransport:
    """Stands in for a connection where only :meth:`Analyzer.validate` is used (no I/O)."""

    def __init__(self, address: str) -> None:
        self.address = address


def stage_limits(section):
    from bench.drivers.stage import StageLimits

    return StageLimits(x_m=tuple(section.limits.x_m), y_m=tuple(section.limits.y_m), z_m=tuple(section.limits.z_m),
                       safe_z_m=section.safe_z_m, max_feed_m_per_s=section.max_feed_m_per_s,
                       position_tolerance_m=section.position_tolerance_m, rotary_axis=section.rotary_axis)


def connect_station(bench, *, needs: set[str], wait=None, poll_sleep=None) -> Station:
    """Open and initialise the instruments a plan needs; close what was opened on failure.

    Parameters
    ----------
    bench : bench.benchfile.Bench
    needs : set of str
        Roles the plan uses: ``analyzer`` always; ``stage``, ``mast``, ``turntable``, ``supply``.
    wait : callable, optional
        ``wait(seconds)`` for settle times (the simulated bench passes its virtual clock).
    poll_sleep : callable, optional
        Sleep between busy polls of the mast and turntable (default ``time.sleep``; the
        simulated bench advances its own clock on every poll and passes a no-op).
    """
    profiles = profiles_for(bench)
    station = Station(analyzer=None)
    try:
        for role in ("analyzer", "stage", "mast", "turntable", "supply"):
            if role != "analyzer" and (role not in needs or getattr(bench, role, None) is None):
                continue
            device, identity = open_role(bench, role, profiles, wait=wait, poll_sleep=poll_sleep)
            setattr(station, role, device)
            station.identities[role] = identity
        return station
    except BaseException:
        station.close()
        raise


def open_role(bench, role: str, profiles: dict, *, wait=None, poll_sleep=None, home: bool = True):
    """Open one instrument of the bench and initialise it; returns (driver, identity text).

    The stage is homed (``home=True``) because no move is allowed before homing.
    """
    import time

    from bench.drivers.positioner import Mast, MastLimits, Turntable, TurntableLimits
    from bench.drivers.stage import Stage
    from bench.drivers.supply import Supply

    section = getattr(bench, role)
    profile = profiles[role]
    device = None
    try:
        if role == "analyzer":
            device = Analyzer(open_transport(section.address, _with_timeout(profile.io, section.timeout_s)), profile)
            return device, device.initialize()
        if role == "stage":
            device = Stage.open(section.address, profile, stage_limits(section), baudrate=section.baudrate)
            identity = device.connect() or section.address
            if home:
                device.home()
            return device, identity
        if role in ("mast", "turntable"):
            if role == "mast":
                device = Mast.open(section.address, profile, MastLimits(tuple(section.height_limits_m)),
                                   sleep=poll_sleep or time.sleep)
            else:
                device = Turntable.open(section.address, profile, TurntableLimits(tuple(section.azimuth_limits_deg)),
                                        sleep=poll_sleep or time.sleep)
            return device, device.connect() or section.address
        if role == "supply":
            device = Supply(open_transport(section.address, profile.io), profile, wait=wait)
            return device, device.initialize()
        raise ConfigError(f"unknown instrument role {role!r}")
    except BaseException:
        if device is not None:
            try:
                device.close() if hasattr(device, "close") else device.transport.close()
            except Exception:  # noqa: BLE001 - closing after a failed open
                pass
        raise


def _with_timeout(io, timeout_s: float):
    from dataclasses import replace

    return replace(io, timeout_s=timeout_s)


def identify_all(bench):
    """(role, address, identity or 'ERROR: ...') for every instrument of a bench file.

    Each instrument is opened on its own (one failing does not hide the others); nothing moves:
    the stage is not homed.
    """
    rows = []
    profiles = profiles_for(bench)
    for role in ("analyzer", "stage", "mast", "turntable", "supply"):
        section = getattr(bench, role, None)
        if section is None:
            continue
        try:
            device, identity = open_role(bench, role, profiles, home=False)
            try:
                rows.append((role, section.address, identity))
            finally:
                device.close() if hasattr(device, "close") else device.transport.close()
        except BenchError as exc:
            rows.append((role, section.address, f"ERROR: {exc}"))
    return rows
