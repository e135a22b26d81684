"""The simulated bench's physical world: which spectral lines reach the analyzer input.

A :class:`World` is built from a validated :class:`~bench.sim.board.Board`. For the current
:class:`~bench.sim.state.SimState` it returns every line in a band as it arrives at the analyzer,
in dBm (RMS), computed from the physics in :mod:`bench.physics`:

* **Sources.** Each emitter is a small dipole (electric or magnetic) whose moment per harmonic is
  a harmonic current times a length or a loop area. Clocks and switchers follow the trapezoid
  spectrum (Paul ch. 3); a switcher may add switch-node ringing (second-order resonance);
  a cable carries a common-mode current, a fraction of a clock's or switcher's harmonic voltage
  driven through a series resonance at the cable's quarter-wave frequency, and radiates as a
  short electric dipole of effective length min(L/2, lambda/2pi) (a short monopole's effective
  height is half its length; a resonant one's is about lambda/2pi, Balanis ch. 4).
* **Near field** (a probe tool is mounted). The full dipole fields (near and far terms) are
  evaluated over the probe: an H loop integrates H along its axis over its area with a 7-point
  degree-5 disc rule (centre weight 1/4, six points at r*sqrt(2/3) weight 1/8; Stroud,
  *Approximate Calculation of Multiple Integrals*, S2:5-1), so a large loop blurs a hot spot as
  a real one does; an E stub reads E_z at its tip. No image in the board's own ground plane is
  added: an emitter's loop area already describes the loop formed by a trace and its return
  current in the plane by the image method (trace over plane = trace + image; Balanis ch. 4;
  Smith, IEEE Trans. EMC 1982), so an image would count the return current twice.
* **Far field** (tool 0). The board lies on the table, its outline centre on the turntable axis,
  rotated by the turntable angle. The receive antenna stands at the site distance from that
  axis and at the mast height. Direct and ground-reflected rays come from the dipole and its
  image in the site's ground plane (image method over a
  conducting ground plane: Balanis ch. 4; Smith, IEEE Trans. EMC 1982), so any source orientation
  works. The component
  along the receive element (y for horizontal, z for vertical polarization) becomes a voltage
  through the antenna factor from the antenna gain (derived:
  docs/physics.md), then the cable loss and preamp.
* **Ambient** carriers have a given field strength at the antenna, do not depend on the board,
  the turntable or the mast, and are present with the board off. In near-field mode they reach
  the probe as a plane wave (H = E/eta0), fully aligned with the probe: a worst case, and far
  below the board's near fields.

Crystal tolerance: each emitter may carry ``tolerance_ppm``; the :class:`World` draws a fixed
frequency offset within it per emitter from its integer seed, so a world is deterministic.
Lines from different emitters at the same frequency are returned separately; the receiver adds
their powers.
"""

from __future__ import annotations

import threading

import math
from dataclasses import dataclass

import numpy as np

from bench import physics
from bench.errors import PlanError
from bench.sim.board import Board, CableEmitter, EProbe, HLoopProbe
from bench.sim.state import Line, SimState
from bench.units import C0_M_PER_S, ETA0_OHM, dbuv_to_dbm

__all__ = ["World", "FLOOR_DBM"]

#: Lines weaker than this at the analyzer input are dropped.
FLOOR_DBM = -200.0

# 7-point degree-5 rule for the unit disc (Stroud S2:5-1): (radius fraction, angle, weight)
_DISC_RADIUS = math.sqrt(2.0 / 3.0)
_DISC_ANGLES = np.arange(6) * np.pi / 3.0
_DISC_WEIGHTS = np.array([0.25] + [0.125] * 6)
_TRACE_SEGMENTS = 8
# receive element direction per polarization: broadside to the x-directed line of sight
_ELEMENT = {"horizontal": np.array([0.0, 1.0, 0.0]), "vertical": np.array([0.0, 0.0, 1.0])}
_RESOLVE_FACTOR = 6.0
_CABLE_SEGMENTS = 16


@dataclass(frozen=True)
class _Spectrum:
    """Lines of one emitter in a band: frequencies and dipole moments (A*m or A*m^2, peak)."""

    name: str
    kind: str  # "electric" | "magnetic"
    position_m: np.ndarray  # board coordinates (3,)
    direction: np.ndarray  # board coordinates (3,)
    freqs_hz: np.ndarray
    moments: np.ndarray
    parts: tuple = ((np.zeros(3), 1.0),)  # (offset from position_m, share of the moment)
    prf_hz: float | None = None
    duty: float = 1.0


class World:
    """The physical truth behind the simulated instruments.

    Parameters
    ----------
    board : Board
        The validated board file.
    seed : int
        Seed for the per-emitter frequency offsets (within each emitter's ``tolerance_ppm``).
    """

    def __init__(self, board: Board, seed: int = 0) -> None:
        self._board = board
        self._scale = {}
        # The lines depend only on the pose and the band: repeated sweeps at one pose (max-hold,
        # several segments, final readings) reuse them. The receiver draws new noise every sweep.
        self._last_key = None
        self._last_lines: list[Line] = []
        self._cache_lock = threading.Lock()
        for index, emitter in enumerate(board.emitters):
            rng = np.random.default_rng([int(seed), index])
            offset_ppm = rng.uniform(-1.0, 1.0) * emitter.tolerance_ppm
            self._scale[emitter.name] = 1.0 + offset_ppm * 1e-6

    # -- public helpers ------------------------------------------------------------------------

    @property
    def board(self) -> Board:
        """The board this world was built from."""
        return self._board

    @property
    def noise_figure_db(self) -> float:
        """Analyzer noise figure from the board file, dB."""
        return self._board.receiver.noise_figure_db

    @property
    def board_origin_m(self) -> tuple[float, float, float]:
        """Stage coordinates of the board origin (corner (0, 0) on the top surface), m."""
        return self._board.stage.board_origin_m

    def emitter_positions_m(self) -> dict[str, tuple[float, float, float]]:
        """Board coordinates (x, y, z = -depth) of every emitter, metres."""
        return {e.name: (e.position_m[0], e.position_m[1], -e.depth_m) for e in self._board.emitters}

    def emitter_frequency_hz(self, name: str) -> float:
        """Actual fundamental (or carrier) frequency of an emitter, tolerance offset applied."""
        emitter = self._board.emitter(name)
        if isinstance(emitter, CableEmitter):
            return self.emitter_frequency_hz(emitter.driven_by)
        return emitter.frequency_hz * self._scale[name]

    def lines(self, state: SimState, f_lo_hz: float, f_hi_hz: float) -> list[Line]:
        """Every spectral line in [f_lo_hz, f_hi_hz] at the analyzer input, dBm RMS.

        Parameters
        ----------
        state : SimState
            Pose of the bench (read under its lock).
        f_lo_hz, f_hi_hz : float
            Band, Hz.

        Returns
        -------
        list of Line
            Sorted by frequency; lines below :data:`FLOOR_DBM` dropped. An undefined probe tool
            number gives no lines (an unconnected input).
        """
        with state.lock:
            tool = state.tool
            powered = state.board_powered
            probe_m = tuple(state.probe_m)
            rotation_deg = state.probe_rotation_deg
            mast_m, pol, az_deg = state.mast_height_m, state.polarization, state.azimuth_deg
        key = (tool, powered, probe_m, rotation_deg, mast_m, pol, az_deg, f_lo_hz, f_hi_hz)
        with self._cache_lock:
            if key == self._last_key:
                return list(self._last_lines)
        out = self._compute_lines(key)
        with self._cache_lock:
            self._last_key, self._last_lines = key, out
        return list(out)

    def _compute_lines(self, key) -> list[Line]:
        tool, powered, probe_m, rotation_deg, mast_m, pol, az_deg, f_lo_hz, f_hi_hz = key
        if tool == 0:
            spectra = self._spectra(f_lo_hz, f_hi_hz) if powered else []
            out = self._far_field_lines(spectra, mast_m, pol, az_deg)
            out += self._ambient_far(pol, f_lo_hz, f_hi_hz)
        else:
            probe = self._board.probe(tool)
            if probe is None:
                return []
            spectra = self._spectra(f_lo_hz, f_hi_hz) if powered else []
            tip_m = np.asarray(probe_m) - np.asarray(self.board_origin_m)
            out = self._near_field_lines(spectra, probe, tip_m, rotation_deg)
            out += self._ambient_near(probe, f_lo_hz, f_hi_hz)
        return sorted(out, key=lambda line: line.freq_hz)

    # -- sources -------------------------------------------------------------------------------

    def _spectra(self, f_lo_hz: float, f_hi_hz: float) -> list[_Spectrum]:
        out = []
        for e in self._board.emitters:
            spec = self._emitter_spectrum(e, f_lo_hz, f_hi_hz)
            if spec is not None and spec.freqs_hz.size:
                out.append(spec)
        return out

    def _emitter_spectrum(self, e, f_lo_hz: float, f_hi_hz: float) -> _Spectrum | None:
        position = np.array([e.position_m[0], e.position_m[1], -e.depth_m])
        if e.kind == "cable":
            return self._cable_spectrum(e, position, f_lo_hz, f_hi_hz)
        f0 = e.frequency_hz * self._scale[e.name]
        common = dict(name=e.name, kind=e.dipole, position_m=position, direction=np.asarray(e.axis),
                      parts=_extent(e))
        if e.kind in ("spur", "burst"):
            inside = f_lo_hz <= f0 <= f_hi_hz
            freqs = np.array([f0] if inside else [])
            moments = np.full(freqs.shape, e.current_a * e.coupling_m_or_m2)
            if e.kind == "burst":
                return _Spectrum(**common, freqs_hz=freqs, moments=moments,
                                 prf_hz=e.repetition_hz, duty=e.duty)
            return _Spectrum(**common, freqs_hz=freqs, moments=moments)
        freqs, volts = self._trapezoid_volts(e, f0, f_lo_hz, f_hi_hz)
        return _Spectrum(**common, freqs_hz=freqs,
                         moments=volts / e.impedance_ohm * e.coupling_m_or_m2)

    def _trapezoid_volts(self, e, f0_hz: float, f_lo_hz: float, f_hi_hz: float):
        """Harmonic voltages (peak) of a clock or switcher in the band, ringing included."""
        n_min, n_max = max(1, math.ceil(f_lo_hz / f0_hz)), math.floor(f_hi_hz / f0_hz)
        if n_max < n_min:
            return np.empty(0), np.empty(0)
        freqs, volts = physics.trapezoid_harmonics(e.amplitude_v, f0_hz, e.duty, e.rise_time_s,
                                                   n_max, n_min)
        if e.kind == "switcher" and e.ring_frequency_hz is not None:
            x = freqs / e.ring_frequency_hz
            volts = volts * np.abs(1.0 / (1.0 - x**2 + 1j * x / e.ring_q))
        return freqs, volts

    def _cable_spectrum(self, e: CableEmitter, position, f_lo_hz, f_hi_hz) -> _Spectrum:
        driver = self._board.emitter(e.driven_by)
        f0 = driver.frequency_hz * self._scale[driver.name]
        freqs, volts = self._trapezoid_volts(driver, f0, f_lo_hz, f_hi_hz)
        # Common-mode impedance: series resonance at the quarter-wave frequency (a monopole's
        # input impedance near its first resonance), radiation resistance at resonance.
        f_q = C0_M_PER_S / (4.0 * e.length_m)
        z_ohm = e.resistance_ohm * (1.0 + 1j * e.resonance_q * (freqs / f_q - f_q / freqs))
        current_a = np.abs(volts * 10.0 ** (e.coupling_db / 20.0) / z_ohm)
        effective_m = np.minimum(e.length_m / 2.0, physics.wavelength_m(freqs) / (2.0 * np.pi))
        return _Spectrum(name=e.name, kind="electric", position_m=position,
                         direction=np.asarray(e.axis), freqs_hz=freqs, moments=current_a * effective_m,
                         parts=_cable_extent(e))

    # -- near field ----------------------------------------------------------------------------

    def _near_field_lines(self, spectra, probe, tip_m, rotation_deg) -> list[Line]:
        out = []
        for s in spectra:
            if isinstance(probe, HLoopProbe):
                volts = self._loop_volts(s, probe, tip_m, rotation_deg)
            else:
                volts = self._stub_volts(s, probe, tip_m)
            out += _make_lines(s, physics.peak_to_dbm(volts))
        return out

    def _loop_volts(self, s: _Spectrum, probe: HLoopProbe, tip_m, rotation_deg):
        axis, points = _loop_points(probe, tip_m, rotation_deg)
        _, h = _near_fields(s, points, _DISC_WEIGHTS)
        h_axial = h @ axis  # area average of H along the loop axis
        return physics.loop_probe_voltage(h_axial, s.freqs_hz, probe.radius_m, probe.turns,
                                          _loop_inductance(probe))

    def _stub_volts(self, s: _Spectrum, probe: EProbe, tip_m):
        e, _ = _near_fields(s, tip_m[None, :])
        return physics.e_probe_voltage(e[:, 2], s.freqs_hz, probe.effective_height_m,
                                       probe.capacitance_f)

    def _ambient_near(self, probe, f_lo_hz, f_hi_hz) -> list[Line]:
        out = []
        for a in self._ambient_in(f_lo_hz, f_hi_hz):
            e_peak = 1e-6 * 10.0 ** (a.field_dbuv_per_m / 20.0) * math.sqrt(2.0)
            if isinstance(probe, HLoopProbe):
                v = physics.loop_probe_voltage(e_peak / ETA0_OHM, a.frequency_hz, probe.radius_m,
                                               probe.turns, _loop_inductance(probe))
            else:
                v = physics.e_probe_voltage(e_peak, a.frequency_hz, probe.effective_height_m,
                                            probe.capacitance_f)
            out += _ambient_line(a, float(physics.peak_to_dbm(v)))
        return out

    # -- far field -----------------------------------------------------------------------------

    def _far_field_lines(self, spectra, mast_m, polarization, az_deg) -> list[Line]:
        site = self._board.site
        antenna = np.array([[site.distance_m, 0.0, mast_m]])
        if polarization not in _ELEMENT:
            raise PlanError(f"polarization must be 'horizontal' or 'vertical', found {polarization!r}")
        element = _ELEMENT[polarization]
        rot = _rotation_z(az_deg)
        cx, cy = self._board.board.centre_m
        out = []
        for s in spectra:
            source = rot @ (s.position_m - np.array([cx, cy, 0.0])) + np.array([0.0, 0.0, site.table_height_m])
            direction = rot @ s.direction
            if site.ground_plane:
                e, _ = physics.dipole_field_over_ground(s.kind, source, direction, s.moments,
                                                        s.freqs_hz, antenna)
            else:
                e, _ = physics.dipole_field(s.kind, source, direction, s.moments, s.freqs_hz, antenna)
            e_co = e[:, 0, :] @ element
            out += _make_lines(s, physics.peak_to_dbm(e_co) + self._chain_db(s.freqs_hz))
        return out

    def _chain_db(self, freqs_hz) -> np.ndarray:
        """dB from field (V/m) to analyzer input: minus AF, minus cable loss, plus preamp."""
        site = self._board.site
        af_db = physics.antenna_factor_db_from_gain(freqs_hz, site.antenna_gain_dbi(freqs_hz))
        return -np.asarray(af_db) - site.cable_loss_db + site.preamp_gain_db

    def _ambient_far(self, polarization, f_lo_hz, f_hi_hz) -> list[Line]:
        site = self._board.site
        out = []
        for a in self._ambient_in(f_lo_hz, f_hi_hz):
            # dBuV/m (RMS) -> dBuV at the analyzer -> dBm in 50 ohm (derived, docs/physics.md:
            # 106.99 = 10 log10(50) + 90)
            level = dbuv_to_dbm(a.field_dbuv_per_m + float(self._chain_db(np.array([a.frequency_hz]))[0]))
            if a.polarization not in ("both", polarization):
                level -= site.cross_polar_rejection_db
            out += _ambient_line(a, level)
        return out

    def _ambient_in(self, f_lo_hz, f_hi_hz):
        return [a for a in self._board.ambient if f_lo_hz <= a.frequency_hz <= f_hi_hz]


# ---------------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------------

def _near_fields(s: _Spectrum, points_m, weights=None):
    """Fields of a source spread over its parts, averaged over probe points with ``weights``.

    The field of a part at offset o seen at point x equals the base dipole's field at x - o,
    so all parts go through one vectorised evaluation. Parts and probe points are only
    resolved where they matter: beyond 6 times their size the next multipole term is below
    about 3 % (0.25 dB), so a distant source is one dipole and a distant probe one point.

    Returns
    -------
    e, h : complex ndarray (F, 3)
    """
    weights = np.ones(1) if weights is None else weights
    centre = points_m[0]
    offsets = np.array([o for o, _ in s.parts])
    shares = np.array([w for _, w in s.parts])
    distance_m = np.linalg.norm(centre - s.position_m)
    if distance_m > _RESOLVE_FACTOR * np.max(np.linalg.norm(offsets, axis=1)):
        offsets, shares = np.zeros((1, 3)), np.ones(1)
    if distance_m > _RESOLVE_FACTOR * np.max(np.linalg.norm(points_m - centre, axis=1)):
        points_m, weights = points_m[:1], np.ones(1)
    shifted = (points_m[None, :, :] - offsets[:, None, :]).reshape(-1, 3)
    # a probe point exactly on a source part gives inf/nan; such lines are dropped later
    with np.errstate(divide="ignore", invalid="ignore"):
        e, h = physics.dipole_field(s.kind, s.position_m, s.direction, s.moments, s.freqs_hz, shifted)
    mix = (shares[:, None] * weights[None, :]).reshape(-1)
    return np.einsum("fkc,k->fc", e, mix), np.einsum("fkc,k->fc", h, mix)


def _perpendicular_pair(axis: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors completing ``axis`` to a right-handed orthonormal frame."""
    helper = np.array([0.0, 0.0, 1.0]) if abs(axis[2]) < 0.9 else np.array([1.0, 0.0, 0.0])
    u = np.cross(axis, helper)
    u /= np.linalg.norm(u)
    return u, np.cross(axis, u)


def _extent(e) -> tuple:
    """Parts of an emitter for near-field sums.

    A point dipole 3 mm from a probe overstates the field of a 30 mm trace or a 1 cm^2 loop,
    so in near-field mode a trace is split into 8 equal collinear Hertzian segments (uniform
    current) and a loop into 7 small loops over a disc of the same area (the loop is the sum
    of the small loops tiling it; disc rule as for the probe).
    """
    axis = np.asarray(e.axis)
    if e.dipole == "electric":
        k = _TRACE_SEGMENTS
        centres = (np.arange(k) + 0.5) / k - 0.5
        return tuple((c * e.length_m * axis, 1.0 / k) for c in centres)
    radius_m = math.sqrt(e.loop_area_m2 / math.pi)
    u, v = _perpendicular_pair(axis)
    ring = radius_m * _DISC_RADIUS * (np.cos(_DISC_ANGLES)[:, None] * u + np.sin(_DISC_ANGLES)[:, None] * v)
    offsets = np.vstack([np.zeros(3), ring])
    return tuple((o, w) for o, w in zip(offsets, _DISC_WEIGHTS))


def _cable_extent(e: CableEmitter) -> tuple:
    """Parts of a cable: current tapering linearly from the connector to the far end.

    Segment edges are spaced geometrically from 1 mm so a probe at the connector sees the
    local current as from a wire; each share is the segment's part of the integral of the
    taper (1 - s/L).
    """
    edges = np.concatenate([[0.0], np.geomspace(1e-3, e.length_m, _CABLE_SEGMENTS)])
    taper = edges - edges**2 / (2.0 * e.length_m)  # integral of (1 - s/L) from 0 to s
    shares = np.diff(taper) / taper[-1]
    mids = (edges[:-1] + edges[1:]) / 2.0
    axis = np.asarray(e.axis)
    return tuple((m * axis, w) for m, w in zip(mids, shares))


def _loop_inductance(probe: HLoopProbe) -> float | None:
    if probe.inductance_h is not None:
        return probe.inductance_h
    if probe.wire_radius_m is not None:
        return float(physics.loop_inductance_h(probe.radius_m, probe.wire_radius_m, probe.turns))
    return None


def _loop_points(probe: HLoopProbe, tip_m, rotation_deg):
    """Loop axis and the 7 quadrature points over the loop disc (board coordinates)."""
    a = probe.radius_m
    if probe.axis == "vertical":
        axis, u, v, centre = np.array([0.0, 0.0, 1.0]), np.array([1.0, 0.0, 0.0]), np.array([0.0, 1.0, 0.0]), tip_m
    else:
        rad = math.radians(rotation_deg)
        axis = np.array([math.cos(rad), math.sin(rad), 0.0])
        u, v = np.array([-math.sin(rad), math.cos(rad), 0.0]), np.array([0.0, 0.0, 1.0])
        centre = tip_m + np.array([0.0, 0.0, a])  # the tip is the bottom of an upright loop
    ring = a * _DISC_RADIUS * (np.cos(_DISC_ANGLES)[:, None] * u + np.sin(_DISC_ANGLES)[:, None] * v)
    return axis, np.vstack([centre, centre + ring])


def _rotation_z(angle_deg: float) -> np.ndarray:
    c, s = math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


def _make_lines(s: _Spectrum, levels_dbm) -> list[Line]:
    levels = np.asarray(levels_dbm, dtype=float)
    keep = np.isfinite(levels) & (levels >= FLOOR_DBM)
    return [Line(freq_hz=float(f), level_dbm=float(p), source=s.name, prf_hz=s.prf_hz, duty=s.duty)
            for f, p in zip(s.freqs_hz[keep], levels[keep])]


def _ambient_line(a, level_dbm: float) -> list[Line]:
    if not math.isfinite(level_dbm) or level_dbm < FLOOR_DBM:
        return []
    return [Line(freq_hz=a.frequency_hz, level_dbm=level_dbm, source=a.name, ambient=True)]
