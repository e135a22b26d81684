"""Physics the analysis and the simulated bench rely on: pure functions, SI units.

Conventions (docs/physics.md): phasors use e^{+jwt}; a complex field or voltage is the
**peak** phasor; dB(uV) = 20*log10(V / 1 uV); a line shown by an analyzer is the RMS value
(peak / sqrt(2)).

Contents, with the source each follows (derivations in docs/physics.md):

* wavelength, field-region boundaries (Balanis, *Antenna Theory* 3rd ed., ch. 2, field
  regions; Ott for lambda/2pi), free-space path loss (Friis transmission equation) and antenna
  factor from gain (derived from the effective aperture lambda^2*G/(4*pi));
* exact wave impedance of ideal electric and magnetic dipoles (derived from the dipole fields);
* full fields (near and far terms) of a Hertzian electric dipole (Balanis eq. 4-8, 4-10) and of
  a small loop / magnetic dipole (Balanis eq. 5-18) for any position and moment direction, and
  their images in a perfectly conducting plane (image method);
* near-field probe transfer: H loop (Faraday's law) and short E stub (derived);
* Biot-Savart closed forms used as oracles (textbook magnetostatics);
* trapezoidal clock spectrum and its envelope (Paul, *Introduction to Electromagnetic
  Compatibility* 2nd ed., ch. 3);
* Gaussian RBW filter relations (derived) and displayed average noise level (kT0 + NF + 10
  log10 RBW, derived).
"""

from __future__ import annotations

import math

import numpy as np

from bench.units import C0_M_PER_S, ETA0_OHM, MU0_H_PER_M

__all__ = [
    "BOLTZMANN_J_PER_K",
    "KT0_DBM_PER_HZ",
    "wavelength_m",
    "reactive_near_field_m",
    "fraunhofer_distance_m",
    "small_source_boundary_m",
    "free_space_path_loss_db",
    "antenna_factor_db_from_gain",
    "antenna_factor_constant_db",
    "wave_impedance_electric_ohm",
    "wave_impedance_magnetic_ohm",
    "electric_dipole_field",
    "magnetic_dipole_field",
    "dipole_field",
    "image_source",
    "dipole_field_over_ground",
    "loop_probe_voltage",
    "loop_inductance_h",
    "e_probe_voltage",
    "loop_axis_h_a_per_m",
    "straight_wire_h_a_per_m",
    "trace_over_plane_h_a_per_m",
    "trapezoid_harmonics",
    "trapezoid_corner_frequencies_hz",
    "trapezoid_envelope_v",
    "gaussian_rbw_attenuation_db",
    "b6_from_b3",
    "b3_from_b6",
    "enbw_hz",
    "impulse_bandwidth_hz",
    "danl_dbm",
    "peak_to_dbm",
]

#: Boltzmann constant, exact since the 2019 SI redefinition.
BOLTZMANN_J_PER_K = 1.380649e-23
#: kT at the reference temperature 290 K in dBm/Hz: -173.98 (derived from the exact k).
KT0_DBM_PER_HZ = 10.0 * math.log10(BOLTZMANN_J_PER_K * 290.0 / 1e-3)


# ---------------------------------------------------------------------------------------------
# Wavelength, regions, path loss, antenna factor (Balanis ch. 2; Friis; docs/physics.md 1, 2, 6)
# ---------------------------------------------------------------------------------------------

def wavelength_m(freq_hz):
    """Free-space wavelength lambda = c / f, metres (freq_hz > 0)."""
    return _scalar_or_array(C0_M_PER_S / np.asarray(freq_hz, dtype=float))


def reactive_near_field_m(d_m, freq_hz):
    """Outer edge of the reactive near field, 0.62*sqrt(D^3/lambda), metres.

    Balanis, *Antenna Theory* 3rd ed., ch. 2, field regions.

    Parameters
    ----------
    d_m : float or array
        Largest dimension D of the antenna, metres.
    freq_hz : float or array
        Frequency, Hz.
    """
    return _scalar_or_array(0.62 * np.sqrt(np.asarray(d_m, dtype=float) ** 3 / wavelength_m(freq_hz)))


def fraunhofer_distance_m(d_m, freq_hz):
    """Far-field (Fraunhofer) distance 2*D^2/lambda, metres (Balanis ch. 2, field regions)."""
    return _scalar_or_array(2.0 * np.asarray(d_m, dtype=float) ** 2 / wavelength_m(freq_hz))


def small_source_boundary_m(freq_hz):
    """Near/far transition of a small source, lambda / (2*pi) (kr = 1), metres (Ott)."""
    return _scalar_or_array(np.asarray(wavelength_m(freq_hz)) / (2.0 * np.pi))


def free_space_path_loss_db(distance_m, freq_hz):
    """Free-space path loss 20*log10(4*pi*d*f/c), dB (Friis equation, isotropic antennas)."""
    d = np.asarray(distance_m, dtype=float)
    return _scalar_or_array(20.0 * np.log10(4.0 * np.pi * d * np.asarray(freq_hz, dtype=float) / C0_M_PER_S))


def antenna_factor_constant_db(load_ohm: float = 50.0) -> float:
    """Constant K in AF(dB/m) = 20*log10(f/MHz) - G(dBi) - K; 29.774 dB for 50 ohm.

    From AF = sqrt(4*pi*eta0/R) / (lambda*sqrt(G)) (derived in docs/physics.md, section 6:
    9.73 = sqrt(4*pi*eta0/50)):
    K = 20*log10(c / 1 MHz) - 20*log10(sqrt(4*pi*eta0/R)).
    """
    return 20.0 * math.log10(C0_M_PER_S / 1e6) - 10.0 * math.log10(4.0 * math.pi * ETA0_OHM / load_ohm)


def antenna_factor_db_from_gain(freq_hz, gain_dbi, load_ohm: float = 50.0):
    """Antenna factor of a matched, co-polarized antenna in its far field, dB(1/m).

    Derived in docs/physics.md, section 6.

    AF = E / V = sqrt(4*pi*eta0/R) / (lambda*sqrt(G)).

    Parameters
    ----------
    freq_hz : float or array
        Frequency, Hz.
    gain_dbi : float or array
        Realized gain, dBi.
    load_ohm : float
        Receiver input impedance, ohm.

    Returns
    -------
    float or ndarray
        AF in dB(1/m): E(dBuV/m) = V(dBuV) + AF.
    """
    f_mhz = np.asarray(freq_hz, dtype=float) / 1e6
    return _scalar_or_array(20.0 * np.log10(f_mhz) - np.asarray(gain_dbi, dtype=float)
                            - antenna_factor_constant_db(load_ohm))


# ---------------------------------------------------------------------------------------------
# Wave impedance (derived from Balanis eq. 4-8, 4-10 and 5-18; docs/physics.md, section 3)
# ---------------------------------------------------------------------------------------------

def wave_impedance_electric_ohm(kr):
    """|E_theta / H_phi| of a Hertzian dipole at theta = 90 deg, ohm (derived; docs/physics.md 3).

    eta0*sqrt(1 - x^2 + x^4) / (x*sqrt(1 + x^2)) with x = kr; tends to eta0/(kr) close in.
    """
    x = np.asarray(kr, dtype=float)
    return ETA0_OHM * np.sqrt(1.0 - x**2 + x**4) / (x * np.sqrt(1.0 + x**2))


def wave_impedance_magnetic_ohm(kr):
    """|E_phi / H_theta| of a small loop at theta = 90 deg, ohm (derived); eta0^2 / Z_E."""
    x = np.asarray(kr, dtype=float)
    return ETA0_OHM * x * np.sqrt(1.0 + x**2) / np.sqrt(1.0 - x**2 + x**4)


# ---------------------------------------------------------------------------------------------
# Dipole fields (Balanis eq. 4-8, 4-10 and 5-18), general position and orientation
# ---------------------------------------------------------------------------------------------

def _geometry(source_m, direction, points_m):
    """Unit vectors and distance from a source to field points.

    Returns r (N,), r_hat (N,3), u (3,), cos_theta (N,), u x r_hat (N,3).
    """
    points = np.atleast_2d(np.asarray(points_m, dtype=float))
    u = np.asarray(direction, dtype=float)
    u = u / np.linalg.norm(u)
    rel = points - np.asarray(source_m, dtype=float)
    r = np.linalg.norm(rel, axis=-1)
    r_hat = rel / r[:, None]
    cos_t = r_hat @ u
    return r, r_hat, u, cos_t, np.cross(u, r_hat)


def _radial_terms(freq_hz, moment, r):
    """k, kr and the propagation factor e^{-jkr}, broadcast as (F, N)."""
    f = np.asarray(freq_hz, dtype=float)[..., None]
    k = 2.0 * np.pi * f / C0_M_PER_S
    kr = k * r
    mom = np.asarray(moment, dtype=complex)[..., None]
    return k, kr, np.exp(-1j * kr), mom


def electric_dipole_field(source_m, direction, moment_a_m, freq_hz, points_m, far_only=False):
    """Complex E and H of a Hertzian (infinitesimal) electric dipole, Cartesian components.

    Balanis eq. 4-8a..c and 4-10a..c (numbers from memory), with the local spherical frame of the moment
    rotated into Cartesian by theta_hat = (cos(theta)*r_hat - u)/sin(theta) and
    phi_hat = (u x r_hat)/sin(theta); the sin(theta) cancels against the field's own
    sin(theta), so the result is regular on the dipole axis.

    Parameters
    ----------
    source_m : array (3,)
        Dipole position, metres.
    direction : array (3,)
        Moment direction (normalised here).
    moment_a_m : complex or array (F,)
        Current moment I*l, A*m (peak phasor).
    freq_hz : float or array (F,)
        Frequency or frequencies, Hz; broadcast with ``moment_a_m``.
    points_m : array (N, 3)
        Field points, metres (not at the source).
    far_only : bool
        Keep only the 1/r terms (radiation field), e.g. to compare with ray formulas.

    Returns
    -------
    e_v_per_m, h_a_per_m : complex ndarray (..., N, 3)
        Leading axes follow ``np.broadcast(freq_hz, moment_a_m)``.
    """
    r, r_hat, u, cos_t, u_x_r = _geometry(source_m, direction, points_m)
    k, kr, prop, mom = _radial_terms(freq_hz, moment_a_m, r)
    inv = 1.0 / (1j * kr)
    near1 = 0.0 if far_only else inv
    near2 = 0.0 if far_only else inv - 1.0 / kr**2
    e_r = 0.0 if far_only else ETA0_OHM * mom * cos_t / (2.0 * np.pi * r**2) * (1.0 + inv) * prop
    # E_theta / sin(theta) and H_phi / sin(theta) (Balanis 4-10b, 4-10c)
    a_t = 1j * ETA0_OHM * k * mom / (4.0 * np.pi * r) * (1.0 + near2) * prop
    a_p = 1j * k * mom / (4.0 * np.pi * r) * (1.0 + near1) * prop
    e = (e_r + a_t * cos_t)[..., None] * r_hat - a_t[..., None] * u
    h = a_p[..., None] * u_x_r
    return e, h


def magnetic_dipole_field(source_m, direction, moment_a_m2, freq_hz, points_m, far_only=False):
    """Complex E and H of a small loop (magnetic dipole), Cartesian components.

    Balanis eq. 5-18a..c with m = N*I*pi*a^2 (equation number from memory); same frame rotation as
    :func:`electric_dipole_field`. The loop current circulates right-handed about
    ``direction`` (the loop axis).

    Parameters
    ----------
    source_m : array (3,)
        Loop centre, metres.
    direction : array (3,)
        Loop axis (normalised here).
    moment_a_m2 : complex or array (F,)
        Magnetic moment m = N*I*A, A*m^2 (peak phasor).
    freq_hz : float or array (F,)
        Frequency or frequencies, Hz.
    points_m : array (N, 3)
        Field points, metres.
    far_only : bool
        Keep only the 1/r terms.

    Returns
    -------
    e_v_per_m, h_a_per_m : complex ndarray (..., N, 3)
    """
    r, r_hat, u, cos_t, u_x_r = _geometry(source_m, direction, points_m)
    k, kr, prop, mom = _radial_terms(freq_hz, moment_a_m2, r)
    inv = 1.0 / (1j * kr)
    near1 = 0.0 if far_only else inv
    near2 = 0.0 if far_only else inv - 1.0 / kr**2
    h_r = 0.0 if far_only else 1j * k * mom * cos_t / (2.0 * np.pi * r**2) * (1.0 + inv) * prop
    # H_theta / sin(theta) and E_phi / sin(theta) (Balanis 5-18b, 5-18c)
    a_t = -(k**2) * mom / (4.0 * np.pi * r) * (1.0 + near2) * prop
    a_p = ETA0_OHM * k**2 * mom / (4.0 * np.pi * r) * (1.0 + near1) * prop
    h = (h_r + a_t * cos_t)[..., None] * r_hat - a_t[..., None] * u
    e = a_p[..., None] * u_x_r
    return e, h


def dipole_field(kind, source_m, direction, moment, freq_hz, points_m, far_only=False):
    """Dispatch to :func:`electric_dipole_field` (``kind="electric"``) or the magnetic one."""
    if kind == "electric":
        return electric_dipole_field(source_m, direction, moment, freq_hz, points_m, far_only)
    if kind == "magnetic":
        return magnetic_dipole_field(source_m, direction, moment, freq_hz, points_m, far_only)
    raise ValueError(f"dipole kind must be 'electric' or 'magnetic', found {kind!r}")


def image_source(kind, source_m, direction, plane_z_m: float = 0.0):
    """Image of a dipole in a perfectly conducting plane z = plane_z_m (image method).

    An electric current's horizontal part is reversed and its vertical part kept (Gamma_h = -1,
    Gamma_v = +1). A magnetic dipole (an axial vector) images the other way round: horizontal
    part kept, vertical part reversed (a loop parallel to a conductor sees an opposing image
    current).

    Returns
    -------
    position_m, direction : ndarray (3,)
    """
    if kind not in ("electric", "magnetic"):
        raise ValueError(f"dipole kind must be 'electric' or 'magnetic', found {kind!r}")
    pos = np.asarray(source_m, dtype=float).copy()
    pos[2] = 2.0 * plane_z_m - pos[2]
    flip = np.array([-1.0, -1.0, 1.0]) if kind == "electric" else np.array([1.0, 1.0, -1.0])
    return pos, np.asarray(direction, dtype=float) * flip


def dipole_field_over_ground(kind, source_m, direction, moment, freq_hz, points_m,
                             plane_z_m: float = 0.0, far_only=False):
    """Field of a dipole above a perfectly conducting plane: direct plus image (image method).

    Arguments as :func:`dipole_field`; the source and the points must lie above the plane.
    """
    e1, h1 = dipole_field(kind, source_m, direction, moment, freq_hz, points_m, far_only)
    pos_i, dir_i = image_source(kind, source_m, direction, plane_z_m)
    e2, h2 = dipole_field(kind, pos_i, dir_i, moment, freq_hz, points_m, far_only)
    return e1 + e2, h1 + h2


# ---------------------------------------------------------------------------------------------
# Probes (Faraday's law; docs/physics.md, section 4)
# ---------------------------------------------------------------------------------------------

def loop_inductance_h(radius_m, wire_radius_m, turns: int = 1):
    """Inductance of a circular loop of round wire, henry.

    L = N^2 * mu0 * a * (ln(8a/b) - 2) (Grover, *Inductance Calculations*, circular ring,
    high-frequency form with the current on the wire surface; Ramo, Whinnery & Van Duzer give
    the same). N^2 assumes tightly coupled turns. Valid for b << a.
    """
    a = np.asarray(radius_m, dtype=float)
    return turns**2 * MU0_H_PER_M * a * (np.log(8.0 * a / np.asarray(wire_radius_m, dtype=float)) - 2.0)


def loop_probe_voltage(h_component_a_per_m, freq_hz, radius_m, turns: int = 1,
                       inductance_h=None, load_ohm: float = 50.0):
    """Voltage of an H-field loop probe, V (complex peak phasor; Faraday's law).

    Open circuit (Faraday): V = j*w*mu0*N*A*H for a uniform field H along the loop axis.
    With the loop inductance L given, the loaded voltage is V*R/(R + j*w*L): rising at
    20 dB/decade up to R/(2*pi*L), then flat.

    Parameters
    ----------
    h_component_a_per_m : complex or array
        H component along the loop axis (averaged over the loop area), A/m.
    freq_hz : float or array
        Frequency, Hz.
    radius_m : float
        Loop radius, m.
    turns : int
        Number of turns N.
    inductance_h : float, optional
        Loop inductance; None returns the open-circuit voltage.
    load_ohm : float
        Load (analyzer input) resistance, ohm.
    """
    w = 2.0 * np.pi * np.asarray(freq_hz, dtype=float)
    area = np.pi * radius_m**2
    v = 1j * w * MU0_H_PER_M * turns * area * np.asarray(h_component_a_per_m, dtype=complex)
    if inductance_h is not None:
        v = v * load_ohm / (load_ohm + 1j * w * inductance_h)
    return v


def e_probe_voltage(e_component_v_per_m, freq_hz, effective_height_m, capacitance_f=None,
                    load_ohm: float = 50.0):
    """Voltage of a short E-field stub probe into ``load_ohm``, V (complex; docs/physics.md 4).

    Open circuit V = E*h_e; a source capacitance C into R gives the high-pass
    V*j*w*C*R/(1 + j*w*C*R) (+20 dB/decade below 1/(2*pi*C*R)).
    """
    v = np.asarray(e_component_v_per_m, dtype=complex) * effective_height_m
    if capacitance_f is not None:
        jwcr = 1j * 2.0 * np.pi * np.asarray(freq_hz, dtype=float) * capacitance_f * load_ohm
        v = v * jwcr / (1.0 + jwcr)
    return v


def peak_to_dbm(voltage_peak, load_ohm: float = 50.0):
    """Power in dBm of a sine of peak amplitude |V| across ``load_ohm``: |V|^2/(2R)."""
    v = np.abs(np.asarray(voltage_peak))
    with np.errstate(divide="ignore"):
        return 10.0 * np.log10(v**2 / (2.0 * load_ohm) / 1e-3)


# ---------------------------------------------------------------------------------------------
# Biot-Savart closed forms (textbook magnetostatics; a trace over ground by the image method)
# ---------------------------------------------------------------------------------------------

def loop_axis_h_a_per_m(current_a, radius_m, z_m):
    """H on the axis of a circular loop: I*a^2 / (2*(a^2 + z^2)^(3/2)), A/m (static)."""
    a = np.asarray(radius_m, dtype=float)
    return current_a * a**2 / (2.0 * (a**2 + np.asarray(z_m, dtype=float) ** 2) ** 1.5)


def straight_wire_h_a_per_m(current_a, rho_m):
    """H around a long straight wire: I / (2*pi*rho), A/m (static)."""
    return current_a / (2.0 * np.pi * np.asarray(rho_m, dtype=float))


def trace_over_plane_h_a_per_m(current_a, trace_height_m, probe_height_m):
    """H_x above a trace at height s over a ground plane, probe at height z above the trace.

    (I/2pi)*(1/z - 1/(z + 2s)): the return current is the image at depth s below the plane.
    """
    z = np.asarray(probe_height_m, dtype=float)
    return current_a / (2.0 * np.pi) * (1.0 / z - 1.0 / (z + 2.0 * trace_height_m))


# ---------------------------------------------------------------------------------------------
# Trapezoidal clock spectrum (Paul, Introduction to EMC, ch. 3)
# ---------------------------------------------------------------------------------------------

def trapezoid_harmonics(amplitude_v, freq_hz, duty, rise_s, n_max, n_min: int = 1):
    """One-sided peak amplitudes of a trapezoidal pulse train (rise = fall time).

    |V_n| = 2*A*d*|sinc(n*d)|*|sinc(n*tr/T)| with NumPy's normalised sinc (Paul ch. 3).

    Parameters
    ----------
    amplitude_v : float
        Pulse amplitude A, volts.
    freq_hz : float
        Repetition frequency 1/T, Hz.
    duty : float
        Duty cycle d = tau/T, tau between the 50 % points.
    rise_s : float
        Rise (= fall) time, s.
    n_max, n_min : int
        Harmonic numbers to return, inclusive.

    Returns
    -------
    freqs_hz, amplitudes_v : ndarray
        Harmonic frequencies n*f and peak amplitudes |V_n|.
    """
    n = np.arange(max(int(n_min), 1), int(n_max) + 1, dtype=float)
    amp = 2.0 * amplitude_v * duty * np.abs(np.sinc(n * duty)) * np.abs(np.sinc(n * rise_s * freq_hz))
    return n * freq_hz, amp


def trapezoid_corner_frequencies_hz(freq_hz, duty, rise_s):
    """Envelope corners f1 = 1/(pi*tau), f2 = 1/(pi*tr) with tau = d/f (Paul ch. 3)."""
    tau_s = duty / freq_hz
    return 1.0 / (np.pi * tau_s), 1.0 / (np.pi * rise_s)


def trapezoid_envelope_v(amplitude_v, freq_hz, duty, rise_s, at_freq_hz):
    """Bode envelope of the trapezoid spectrum at ``at_freq_hz``, volts (Paul ch. 3).

    Flat at 2*A*d to f1, -20 dB/decade to f2, -40 dB/decade above.
    """
    f1, f2 = trapezoid_corner_frequencies_hz(freq_hz, duty, rise_s)
    f = np.asarray(at_freq_hz, dtype=float)
    level = 2.0 * amplitude_v * duty
    return level * np.minimum(1.0, f1 / f) * np.minimum(1.0, f2 / f)


# ---------------------------------------------------------------------------------------------
# Gaussian RBW filter and noise (derived; docs/physics.md, section 8)
# ---------------------------------------------------------------------------------------------

_GAUSS_RATIO = math.sqrt(math.pi / (4.0 * math.log(2.0)))  # 1.0645 (derived for a Gaussian)


def gaussian_rbw_attenuation_db(offset_hz, b6_hz):
    """Attenuation of a Gaussian RBW filter at ``offset_hz`` from its centre, dB (positive).

    6*(2*df/B6)^2 (derived): the dB attenuation of a Gaussian grows with the square of the
    offset and is 6 dB at df = B6/2. Taking "6 dB" literally (not 20*log10(2) = 6.02 dB) gives
    the usual worst-case scalloping of 1.50 dB at a step of B6/2 (docs/physics.md, section 8).
    """
    return 6.0 * (2.0 * np.asarray(offset_hz, dtype=float) / b6_hz) ** 2


def b6_from_b3(b3_hz):
    """6 dB bandwidth of a Gaussian filter from its 3 dB bandwidth: sqrt(2)*B3 (derived)."""
    return _scalar_or_array(math.sqrt(2.0) * np.asarray(b3_hz, dtype=float))


def b3_from_b6(b6_hz):
    """3 dB bandwidth of a Gaussian filter from its 6 dB bandwidth: B6/sqrt(2) (derived)."""
    return _scalar_or_array(np.asarray(b6_hz, dtype=float) / math.sqrt(2.0))


def enbw_hz(b3_hz):
    """Equivalent noise bandwidth of a Gaussian filter: sqrt(pi/(4 ln 2))*B3 = 1.0645*B3."""
    return _scalar_or_array(_GAUSS_RATIO * np.asarray(b3_hz, dtype=float))


def impulse_bandwidth_hz(b6_hz):
    """Impulse bandwidth of a Gaussian filter: sqrt(pi/(4 ln 2))*B6 = 1.0645*B6 (derived)."""
    return _scalar_or_array(_GAUSS_RATIO * np.asarray(b6_hz, dtype=float))


def danl_dbm(noise_figure_db, rbw_hz):
    """Displayed average noise level, power average: kT0 + NF + 10*log10(RBW), dBm (derived).

    kT0 = -173.98 dBm/Hz at 290 K. For a log-average display subtract 2.51 dB.
    """
    return _scalar_or_array(KT0_DBM_PER_HZ + np.asarray(noise_figure_db, dtype=float)
                            + 10.0 * np.log10(np.asarray(rbw_hz, dtype=float)))



def _scalar_or_array(value):
    """Return a Python float for 0-d results, the array otherwise."""
    arr = np.asarray(value)
    return arr if arr.ndim else float(arr)
