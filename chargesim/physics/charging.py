"""Charging of particles by unipolar ions: field charging, diffusion charging, limits.

Pure functions of floats and numpy arrays (broadcasting), SI units. Charges
are in coulombs. The closed-form charges (:func:`field_charge`,
:func:`diffusion_charge`, :func:`combined_charge`) are magnitudes (>= 0): the
particle takes the sign of the ions. :func:`charge_step` works with signed
charges and an ion polarity.

Relations
---------
* Pauthenier limit (Pauthenier & Moreau-Hanot 1932; Hinds, *Aerosol
  Technology*): q_s = 3 pi eps0 d^2 E eps_p/(eps_p + 2); eps_p -> inf for a
  conductor gives the factor 3 pi eps0 d^2 E.
* Field-charging rate: dq/dt = (q_s/tau)(1 - q/q_s)^2, tau = 4 eps0/(N_i e Z_i),
  so q(t) = q_s t/(t + tau) from q = 0 (Hinds).
* Diffusion charging, White's equation (White 1951; Hinds):
  n(t) = (d k T/(2 K_E e^2)) ln(1 + pi K_E d c_i e^2 N_i t/(2 k T)), with the
  mean thermal ion speed c_i = sqrt(8 k T/(pi m_i)) and K_E = 1/(4 pi eps0).
* Rayleigh limit of a droplet (Rayleigh 1882): q_R = 8 pi (eps0 gamma r^3)^{1/2}.
"""
import math
import warnings

import numba
import numpy as np

from .aerosol import _array, _finite, _out
from .constants import BOLTZMANN, COULOMB_K, ELEMENTARY_CHARGE, EPSILON_0, ROOM_TEMPERATURE

#: Mobility of air ions, m^2/(V s): 1.5e-4 is the value Hinds, Aerosol
#: Technology, uses in its charging examples (from memory). Negative ions in
#: dry air are somewhat faster (about 2e-4), positive ones slower (about 1.4e-4).
DEFAULT_ION_MOBILITY = 1.5e-4
#: Mean thermal speed of air ions at 20 degC used by Hinds (from memory), m/s.
DEFAULT_ION_SPEED = 240.0
#: Ion mass, kg, chosen so that sqrt(8 k T/(pi m)) = 240 m/s at 293.15 K
#: (about 108 atomic mass units).
DEFAULT_ION_MASS = 8.0 * BOLTZMANN * ROOM_TEMPERATURE / (np.pi * DEFAULT_ION_SPEED**2)

_E = ELEMENTARY_CHARGE


def _eps_factor(particle_eps_r):
    """eps_p/(eps_p + 2), written so that eps_p = inf (a conductor) gives 1."""
    eps = _array(particle_eps_r, "particle_eps_r", allow_inf=True)
    low = np.flatnonzero(eps.reshape(-1) < 1.0)
    if low.size:
        i = int(low[0])
        where = f" at index {i}" if eps.ndim else ""
        raise ValueError(f"particle_eps_r must be >= 1 (relative permittivity); got {eps.reshape(-1)[i]!r}{where}")
    return 1.0 / (1.0 + 2.0 / eps)


def saturation_charge(diameter, field, particle_eps_r):
    """Pauthenier field-charging limit q_s = 3 pi eps0 d^2 |E| eps_p/(eps_p + 2).

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    field : float or array_like
        Electric field strength at the particle, V/m (its magnitude is used).
    particle_eps_r : float or array_like
        Relative permittivity of the particle material, 1 (>= 1; ``inf`` or a
        large value for a conductor).

    Returns
    -------
    float or ndarray
        Saturation charge magnitude, C.
    """
    d = _array(diameter, "diameter")
    e = np.abs(_finite(field, "field"))
    return _out(3.0 * np.pi * EPSILON_0 * d * d * e * _eps_factor(particle_eps_r))


def rayleigh_limit(diameter, surface_tension):
    """Rayleigh limit of a charged droplet, q_R = 8 pi (eps0 gamma r^3)^{1/2}.

    Parameters
    ----------
    diameter : float or array_like
        Droplet diameter, m (> 0).
    surface_tension : float or array_like
        Surface tension of the liquid, N/m (>= 0; ``inf`` for a solid: no limit).

    Returns
    -------
    float or ndarray
        Largest charge magnitude the droplet can hold, C.
    """
    d = _array(diameter, "diameter")
    g = _array(surface_tension, "surface_tension", positive=False, nonnegative=True, allow_inf=True)
    r = 0.5 * d
    return _out(8.0 * np.pi * np.sqrt(EPSILON_0 * g * r**3))


def field_charging_time_constant(ion_density, ion_mobility=DEFAULT_ION_MOBILITY):
    """Field-charging time constant tau = 4 eps0/(N_i e Z_i).

    Parameters
    ----------
    ion_density : float or array_like
        Ion number density N_i, 1/m^3 (> 0).
    ion_mobility : float or array_like
        Ion electrical mobility Z_i, m^2/(V s) (> 0).

    Returns
    -------
    float or ndarray
        tau, s.
    """
    n = _array(ion_density, "ion_density")
    z = _array(ion_mobility, "ion_mobility")
    return _out(4.0 * EPSILON_0 / (n * _E * z))


def field_charge(time, diameter, field, particle_eps_r, ion_density, ion_mobility=DEFAULT_ION_MOBILITY):
    """Field charge after an exposure time from zero charge, q_s t/(t + tau).

    Parameters
    ----------
    time : float or array_like
        Exposure time, s (>= 0).
    diameter : float or array_like
        Particle diameter, m (> 0).
    field : float or array_like
        Field strength at the particle, V/m (magnitude used).
    particle_eps_r : float or array_like
        Particle relative permittivity, 1 (>= 1, ``inf`` for a conductor).
    ion_density : float or array_like
        Ion number density, 1/m^3 (> 0).
    ion_mobility : float or array_like
        Ion mobility, m^2/(V s) (> 0).

    Returns
    -------
    float or ndarray
        Charge magnitude, C (the particle takes the ions' sign).
    """
    t = _array(time, "time", positive=False, nonnegative=True)
    qs = np.asarray(saturation_charge(diameter, field, particle_eps_r))
    tau = np.asarray(field_charging_time_constant(ion_density, ion_mobility))
    return _out(qs * t / (t + tau))


def mean_ion_speed(temperature=ROOM_TEMPERATURE, ion_mass=DEFAULT_ION_MASS):
    """Mean thermal speed of the ions, c_i = sqrt(8 k T/(pi m_i)).

    Parameters
    ----------
    temperature : float or array_like
        Gas temperature, K (> 0).
    ion_mass : float or array_like
        Ion mass, kg (> 0).

    Returns
    -------
    float or ndarray
        c_i, m/s.
    """
    t = _array(temperature, "temperature")
    m = _array(ion_mass, "ion_mass")
    return _out(np.sqrt(8.0 * BOLTZMANN * t / (np.pi * m)))


def _diffusion_scales(diameter, ion_density, temperature, ion_mass):
    """White's charge scale (C) and the ion arrival rate on a neutral particle (C/s).

    Writing White's equation as q = Q ln(1 + R t/Q) with
    Q = e d k T/(2 K_E e^2) and R = e pi d^2 c_i N_i/4 shows its rate law
    dq/dt = R exp(-q/Q): the kinetic ion flux onto the particle times the
    Boltzmann factor of the ion's energy at the charged surface.
    """
    d = _array(diameter, "diameter")
    n = _array(ion_density, "ion_density", positive=False, nonnegative=True)
    t = _array(temperature, "temperature")
    c = np.asarray(mean_ion_speed(t, ion_mass))
    scale = d * BOLTZMANN * t / (2.0 * COULOMB_K * _E)
    rate = _E * np.pi * d * d * c * n / 4.0
    return scale, rate


def diffusion_charge(time, diameter, ion_density, temperature=ROOM_TEMPERATURE, ion_mass=DEFAULT_ION_MASS):
    """Diffusion charge after an exposure time from zero charge (White's equation).

    q(t) = e (d k T/(2 K_E e^2)) ln(1 + pi K_E d c_i e^2 N_i t/(2 k T)).

    Parameters
    ----------
    time : float or array_like
        Exposure time, s (>= 0).
    diameter : float or array_like
        Particle diameter, m (> 0).
    ion_density : float or array_like
        Ion number density, 1/m^3 (>= 0).
    temperature : float or array_like
        Gas temperature, K (> 0).
    ion_mass : float or array_like
        Ion mass, kg (> 0); the default gives Hinds's 240 m/s at 20 degC.

    Returns
    -------
    float or ndarray
        Charge magnitude, C (the particle takes the ions' sign).
    """
    t = _array(time, "time", positive=False, nonnegative=True)
    scale, rate = _diffusion_scales(diameter, ion_density, temperature, ion_mass)
    return _out(scale * np.log1p(rate * t / scale))


def combined_charge(
    time,
    diameter,
    field,
    particle_eps_r,
    ion_density,
    ion_mobility=DEFAULT_ION_MOBILITY,
    temperature=ROOM_TEMPERATURE,
    ion_mass=DEFAULT_ION_MASS,
):
    """Field plus diffusion charge after an exposure time from zero charge.

    The sum of :func:`field_charge` and :func:`diffusion_charge`, the usual
    engineering approximation for particles near 0.1-1 um where both matter
    (Hinds, Aerosol Technology). Parameters and units as in those functions.

    Returns
    -------
    float or ndarray
        Charge magnitude, C.
    """
    qf = np.asarray(field_charge(time, diameter, field, particle_eps_r, ion_density, ion_mobility))
    qd = np.asarray(diffusion_charge(time, diameter, ion_density, temperature, ion_mass))
    return _out(qf + qd)


@numba.njit(cache=True)
def _field_update(qn, qs, r):
    """Exact field charging over a step of r = dt/tau, charge in the ions' sign.

    For -q_s <= q < q_s, dq/dt = (q_s/tau)(1 - q/q_s)^2, which integrates to
    q_s - q_1 = (q_s - q_0)/(1 + (q_s - q_0) r/q_s). A particle of the opposite
    sign beyond -q_s draws ions over its whole surface, dq/dt = -4 q/tau (Gauss's
    law on the ion current; it meets the first law with equal rate at q = -q_s),
    so it decays exponentially to -q_s and then follows the first law for the
    rest of the step. At and above q_s the particle takes no more ions.
    """
    if r <= 0.0:
        return qn
    if qn < -qs:
        r1 = 0.25 * math.log(-qn / qs) if qs > 0.0 else math.inf
        if r <= r1:
            return qn * math.exp(-4.0 * r)
        qn = -qs
        r -= r1
    if qs > 0.0 and qn < qs:
        gap = qs - qn
        qn = qs - gap * qs / (qs + gap * r)
    return qn


@numba.njit(cache=True)
def _diffusion_update(qn, scale, rate, dt):
    """Exact White-law step q_1 = Q ln(exp(q_0/Q) + R dt/Q), charge in the ions' sign."""
    add = rate * dt / scale
    if add <= 0.0:
        return qn
    a = qn / scale
    if a < 700.0:  # exp(a) stays finite: the direct form is the quickest
        return scale * math.log(math.exp(a) + add)
    return qn + scale * math.log1p(add * math.exp(-a))


@numba.njit(cache=True)
def _charge_one(q, d, eps, e, n_i, z_i, temp, m_i, dt, sign, do_field, do_diffusion):
    """charge_step for one particle."""
    qn = sign * q
    scale = 1.0
    rate = 0.0
    if do_diffusion:
        # White's rate law dq/dt = R exp(-q/Q), see _diffusion_scales
        kt = BOLTZMANN * temp
        scale = d * kt / (2.0 * COULOMB_K * _E)
        speed = math.sqrt(8.0 * kt / (math.pi * m_i))
        rate = _E * math.pi * d * d * speed * n_i / 4.0
        qn = _diffusion_update(qn, scale, rate, 0.5 * dt)
    if do_field:
        qs = 3.0 * math.pi * EPSILON_0 * d * d * abs(e) / (1.0 + 2.0 / eps)
        r = dt * n_i * _E * z_i / (4.0 * EPSILON_0)  # dt/tau, finite when N_i = 0
        qn = _field_update(qn, qs, r)
    if do_diffusion:
        qn = _diffusion_update(qn, scale, rate, 0.5 * dt)
    return sign * qn


@numba.njit(cache=True)
def _charge_serial(q, d, eps, e, n_i, z_i, temp, m_i, dt, sign, do_field, do_diffusion, out):
    for i in range(q.shape[0]):
        out[i] = _charge_one(q[i], d[i], eps[i], e[i], n_i[i], z_i[i], temp[i], m_i[i], dt[i], sign,
                             do_field, do_diffusion)


@numba.njit(cache=True, parallel=True)
def _charge_parallel(q, d, eps, e, n_i, z_i, temp, m_i, dt, sign, do_field, do_diffusion, out):
    for i in numba.prange(q.shape[0]):
        out[i] = _charge_one(q[i], d[i], eps[i], e[i], n_i[i], z_i[i], temp[i], m_i[i], dt[i], sign,
                             do_field, do_diffusion)


#: Below this many particles the serial loop wins (starting threads costs more).
PARALLEL_THRESHOLD = 20000


def charge_step(
    charge,
    diameter,
    particle_eps_r,
    field_magnitude,
    ion_density,
    ion_mobility,
    temperature,
    ion_mass,
    dt,
    ion_sign=-1,
    *,
    field_charging=True,
    diffusion=True,
):
    """Advance particle charges by one step in a region of unipolar ions.

    Field charging is integrated exactly over the step from the current charge
    (the Pauthenier rate law, see :func:`_field_update`), so many small steps
    give the same charge as one large step. Diffusion charging follows White's
    rate law, also exactly; with both on they are combined by symmetric
    (Strang) splitting, half a diffusion step, a field step, half a diffusion
    step, which is second-order accurate in dt.

    Parameters
    ----------
    charge : float or array_like
        Current particle charges, C (signed).
    diameter : float or array_like
        Particle diameters, m (> 0).
    particle_eps_r : float or array_like
        Particle relative permittivity, 1 (>= 1; ``inf`` for conductors).
    field_magnitude : float or array_like
        Local field strength, V/m (magnitude used).
    ion_density : float or array_like
        Local ion number density, 1/m^3 (>= 0; 0 outside the charging zone).
    ion_mobility : float or array_like
        Ion mobility, m^2/(V s) (> 0).
    temperature : float or array_like
        Gas temperature, K (> 0).
    ion_mass : float or array_like
        Ion mass, kg (> 0); see :data:`DEFAULT_ION_MASS`.
    dt : float or array_like
        Step, s (>= 0).
    ion_sign : {-1, +1}
        Polarity of the ions (-1 for negative corona, the usual precipitator case).
    field_charging, diffusion : bool
        Switch either mechanism off.

    Returns
    -------
    ndarray
        New charges, C, in the broadcast shape of the inputs.
    """
    if ion_sign not in (-1, 1):
        raise ValueError(f"ion_sign must be -1 or +1, got {ion_sign!r}")
    args = [
        _finite(charge, "charge"),
        _array(diameter, "diameter"),
        _array(particle_eps_r, "particle_eps_r", allow_inf=True),
        _finite(field_magnitude, "field_magnitude"),
        _array(ion_density, "ion_density", positive=False, nonnegative=True),
        _array(ion_mobility, "ion_mobility"),
        _array(temperature, "temperature"),
        _array(ion_mass, "ion_mass"),
        _array(dt, "dt", positive=False, nonnegative=True),
    ]
    _eps_factor(args[2])  # the >= 1 check
    shape = np.broadcast_shapes(*(a.shape for a in args))
    # writeable C-contiguous float64 copies or views: one kernel signature, one compilation
    flat = [np.require(a.reshape(-1), np.float64, ["C", "W"]) if a.shape == shape
            else np.array(np.broadcast_to(a, shape), dtype=np.float64).reshape(-1) for a in args]
    out = np.empty(flat[0].shape[0])
    kernel = _charge_parallel if out.shape[0] >= PARALLEL_THRESHOLD else _charge_serial
    kernel(*flat, float(ion_sign), bool(field_charging), bool(diffusion), out)
    return out.reshape(shape)


def cap_rayleigh(charge, diameter, surface_tension):
    """Cap droplet charges at the Rayleigh limit, with a warning when any is capped.

    A droplet charged beyond q_R breaks up (Rayleigh 1882); the simulation
    keeps it at the limit and counts it, so no droplet silently holds a charge
    it could not hold.

    Parameters
    ----------
    charge : float or array_like
        Droplet charges, C (signed).
    diameter : float or array_like
        Droplet diameters, m (> 0).
    surface_tension : float or array_like
        Surface tension, N/m (>= 0; ``inf`` for solid particles: no cap).

    Returns
    -------
    capped : ndarray
        Charges with magnitudes at most q_R, C (sign kept).
    n_capped : int
        How many were capped.
    """
    q = _finite(charge, "charge")
    limit = np.asarray(rayleigh_limit(diameter, surface_tension))
    over = np.abs(q) > limit
    n_capped = int(np.count_nonzero(over))
    capped = np.where(over, np.sign(q) * limit, q)
    if n_capped:
        warnings.warn(
            f"{n_capped} droplet charge(s) exceeded the Rayleigh limit and were capped there "
            "(such droplets would break up)",
            RuntimeWarning,
            stacklevel=2,
        )
    return np.asarray(capped, dtype=np.float64), n_capped
