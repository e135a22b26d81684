"""The instruments of a bench: profiles loaded once, capabilities for the planner, opened drivers.

Everything instrument-specific comes from the profiles the bench file names; the address string
alone picks the transport.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path

from bench.drivers.analyzer import Analyzer, load_analyzer_profile
from bench.errors import BenchError, ConfigError
from bench.planning import AnalyzerCaps, bench_caps
from bench.transports import open_transport

__all__ = ["ROLES", "Station", "capabilities", "connect_station", "identify_all", "needs_of",
           "open_role", "profiles_for", "stage_limits"]

log = logging.getLogger("bench.instruments")

#: Instrument roles of a bench file, in the order they are opened.
ROLES = ("analyzer", "stage", "mast", "turntable", "supply")


@dataclass
class Station:
    """The opened instruments of a bench. Built by a connector; closed and rebuilt on faults.

    Attributes
    ----------
    analyzer : bench.drivers.analyzer.Analyzer
    stage, mast, turntable, supply : drivers or None
    identities : dict
        ``*IDN?`` / banner of each instrument, for the manifest.
    """

    analyzer: object
    stage: object | None = None
    mast: object | None = None
    turntable: object | None = None
    supply: object | None = None
    identities: dict = field(default_factory=dict)

    def close(self) -> None:
        """Close every opened instrument; a failure to close never hides the fault being handled."""
        for dev in (self.analyzer, self.stage, self.mast, self.turntable, self.supply):
            if dev is not None:
                _close_quietly(dev)


def _close_quietly(device) -> None:
    try:
        device.close() if hasattr(device, "close") else device.transport.close()
    except Exception:  # noqa: BLE001 - closing after a fault must not hide the fault
        pass


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
                            command_overhead_s=ap.command_overhead_s,
                            wire_bytes_per_point=ap.trace.bytes_per_point)
    kwargs = {}
    if "stage" in profiles:
        kwargs["stage_accel_m_per_s2"] = profiles["stage"].accel_m_per_s2
    if "mast" in profiles and profiles["mast"].mast is not None:
        kwargs["mast_speed_m_per_s"] = profiles["mast"].mast.speed_per_s
    if "turntable" in profiles and profiles["turntable"].turntable is not None:
        kwargs["turntable_speed_deg_per_s"] = profiles["turntable"].turntable.speed_per_s
    return bench_caps(bench, analyzer=analyzer, **kwargs)


def stage_limits(section):
    """The stage's safety limits as the bench file produced them (x/y/z/A, safe z, feed, tolerance)."""
    return section.safety_limits


def connect_station(bench, profiles: dict, *, needs: set[str], wait=None, poll_sleep=None) -> Station:
    """Open and initialise the instruments a plan needs; close what was opened on failure.

    Parameters
    ----------
    bench : bench.benchfile.Bench
    profiles : dict
        The bench's profiles by role, loaded once (:func:`profiles_for`).
    needs : set of str
        Roles the plan uses: ``analyzer`` always; ``stage``, ``mast``, ``turntable``, ``supply``.
    wait : callable, optional
        ``wait(seconds)`` for settle times (the simulated bench passes its virtual clock).
    poll_sleep : callable, optional
        Sleep between busy polls of the mast and turntable (default ``time.sleep``; the
        simulated bench advances its own clock on every poll and passes a no-op).
    """
    station = Station(analyzer=None)
    try:
        for role in ROLES:
            if role != "analyzer" and (role not in needs or getattr(bench, role, None) is None):
                continue
            device, identity = open_role(bench, role, profiles, wait=wait, poll_sleep=poll_sleep)
            setattr(station, role, device)
            station.identities[role] = identity
        return station
    except BaseException:
        station.close()
        raise


def needs_of(plan, kinds) -> set[str]:
    """Instrument roles a plan uses: from the poses of its actions and its steps' kinds."""
    needs = {"analyzer"}
    for a in plan.actions:
        if not a.board_powered:
            needs.add("supply")
        pose = a.pose
        if pose is not None and hasattr(pose, "tool"):
            needs.add("stage")
        if pose is not None and (getattr(pose, "height_m", None) is not None
                                 or getattr(pose, "polarization", None) is not None):
            needs.add("mast")
        if pose is not None and getattr(pose, "azimuth_deg", None) is not None:
            needs.add("turntable")
    for kind, step in kinds:
        needs.update(kind.instruments(step))
    return needs


def _open_analyzer(section, profile, options: dict):
    device = Analyzer(open_transport(section.address, _with_timeout(profile.io, section.timeout_s)), profile,
                      sleep=options["poll_sleep"])
    return device, device.initialize


def _open_stage(section, profile, options: dict):
    from bench.drivers.stage import Stage

    device = Stage.open(section.address, profile, stage_limits(section), baudrate=section.baudrate)

    def start() -> str:
        identity = device.connect() or section.address
        if options["home"]:
            device.home()  # no move is allowed before homing
        return identity

    return device, start


def _open_mast(section, profile, options: dict):
    from bench.drivers.positioner import Mast, MastLimits

    device = Mast.open(section.address, profile, MastLimits(tuple(section.height_limits_m)),
                       sleep=options["poll_sleep"])
    return device, lambda: device.connect() or section.address


def _open_turntable(section, profile, options: dict):
    from bench.drivers.positioner import Turntable, TurntableLimits

    device = Turntable.open(section.address, profile, TurntableLimits(tuple(section.azimuth_limits_deg)),
                            sleep=options["poll_sleep"])
    return device, lambda: device.connect() or section.address


def _open_supply(section, profile, options: dict):
    from bench.drivers.supply import Supply

    device = Supply(open_transport(section.address, profile.io), profile, wait=options["wait"])
    return device, device.initialize


_OPENERS = {"analyzer": _open_analyzer, "stage": _open_stage, "mast": _open_mast,
            "turntable": _open_turntable, "supply": _open_supply}


def open_role(bench, role: str, profiles: dict, *, wait=None, poll_sleep=None, home: bool = True):
    """Open one instrument of the bench and initialise it; returns (driver, identity text).

    The stage is homed (``home=True``) because no move is allowed before homing.
    """
    import time

    opener = _OPENERS.get(role)
    if opener is None:
        raise ConfigError(f"unknown instrument role {role!r}")
    options = {"wait": wait, "poll_sleep": poll_sleep or time.sleep, "home": home}
    device, start = opener(getattr(bench, role), profiles[role], options)
    try:
        return device, start()
    except BaseException:
        _close_quietly(device)
        raise


def _with_timeout(io, timeout_s: float):
    from dataclasses import replace

    return replace(io, timeout_s=timeout_s)


def identify_all(bench, profiles: dict | None = None):
    """(role, address, identity or 'ERROR: ...') for every instrument of a bench file.

    Each instrument is opened on its own (one failing does not hide the others); nothing moves:
    the stage is not homed.
    """
    rows = []
    profiles = profiles or profiles_for(bench)
    for role in ROLES:
        section = getattr(bench, role, None)
        if section is None:
            continue
        try:
            device, identity = open_role(bench, role, profiles, home=False)
            _close_quietly(device)
            rows.append((role, section.address, identity))
        except BenchError as exc:
            rows.append((role, section.address, f"ERROR: {exc}"))
    return rows
