"""Aerosol mechanics of small particles in a gas: viscosity, slip, drag, settling.

Pure functions of floats and numpy arrays (broadcasting), SI units. Defaults
are air at 20 degC (293.15 K) and 1 atm (101325 Pa), the reference state of
the handbook values (Hinds, *Aerosol Technology*).

Relations
---------
* gas viscosity: Sutherland's law, mu = mu_r (T/T_r)^{3/2} (T_r + S)/(T + S),
  mu_r = 1.81e-5 Pa s at T_r = 293.15 K, S = 110.4 K (Hinds; Sutherland 1893);
* mean free path: lambda = lambda_r (p_r/p)(T/T_r)(1 + S/T_r)/(1 + S/T),
  lambda_r = 0.0665 um at 20 degC and 1 atm (Hinds);
* Cunningham slip correction Cc = 1 + Kn (1.142 + 0.558 exp(-0.999/Kn)),
  Kn = 2 lambda/d (Allen & Raabe 1985, as given in Hinds);
* Stokes drag with slip: F = -3 pi mu d (v - u)/Cc; mechanical mobility
  B = Cc/(3 pi mu d); relaxation time tau = rho d^2 Cc/(18 mu);
  settling velocity tau g; electrical migration velocity q E B;
  particle diffusivity D = k T B (Stokes-Einstein with slip).

Buoyancy is neglected (particle density >> gas density), as in the handbook
values these functions are checked against.
"""
import numpy as np

from .._validate import all_finite
from .constants import BOLTZMANN, ROOM_TEMPERATURE, STANDARD_GRAVITY, STANDARD_PRESSURE

#: Viscosity of air at 20 degC, Pa s (Hinds, Aerosol Technology).
AIR_VISCOSITY_REF = 1.81e-5
#: Sutherland constant of air, K (Hinds, Aerosol Technology).
SUTHERLAND_CONSTANT_AIR = 110.4
#: Mean free path of air at 20 degC and 1 atm, m (Hinds, Aerosol Technology).
MEAN_FREE_PATH_REF = 0.0665e-6
#: Molar mass of dry air, kg/mol (common practice).
AIR_MOLAR_MASS = 0.028965
#: Cunningham slip constants (Allen & Raabe 1985, as given in Hinds).
SLIP_A, SLIP_B, SLIP_C = 1.142, 0.558, 0.999

_T0 = ROOM_TEMPERATURE
_P0 = STANDARD_PRESSURE


def _array(value, name, *, positive=True, nonnegative=False, allow_inf=False):
    """Check ``value`` (scalar or array) and return it as a float64 array.

    Raises ValueError naming the argument and the first bad (flat) index.
    """
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name} must be numeric: {exc}") from None
    flat = arr.reshape(-1)
    if flat.size > 1 and not allow_inf and all_finite(flat):
        # fast path, one sum and one minimum (the run loop checks its particle
        # arrays every step); anything else goes to the element search
        if flat.min() > 0 if positive else (flat.min() >= 0 if nonnegative else True):
            return arr
    bad = np.isnan(flat) if allow_inf else ~np.isfinite(flat)
    if positive:
        bad = bad | ~(flat > 0)
    elif nonnegative:
        bad = bad | ~(flat >= 0)
    idx = np.flatnonzero(bad)
    if idx.size:
        i = int(idx[0])
        need = "finite and > 0" if positive else ("finite and >= 0" if nonnegative else "finite")
        if allow_inf:
            need = need.replace("finite and ", "not NaN, ")
        where = f" at index {i}" if arr.ndim else ""
        raise ValueError(f"{name} must be {need}; got {flat[i]!r}{where}")
    return arr


def _finite(value, name):
    return _array(value, name, positive=False)


def _out(x):
    """A 0-d result as a Python float, otherwise the array."""
    return float(x) if np.ndim(x) == 0 else x


def air_viscosity(temperature=_T0):
    """Dynamic viscosity of air by Sutherland's law.

    Parameters
    ----------
    temperature : float or array_like
        Gas temperature, K (> 0).

    Returns
    -------
    float or ndarray
        Viscosity, Pa s (1.81e-5 at 293.15 K; Hinds; Sutherland 1893).
    """
    t = _array(temperature, "temperature")
    s = SUTHERLAND_CONSTANT_AIR
    return _out(AIR_VISCOSITY_REF * (t / _T0) ** 1.5 * (_T0 + s) / (t + s))


def mean_free_path(temperature=_T0, pressure=_P0):
    """Mean free path of air molecules, scaled from 0.0665 um at 20 degC, 1 atm.

    Parameters
    ----------
    temperature : float or array_like
        Gas temperature, K (> 0).
    pressure : float or array_like
        Gas pressure, Pa (> 0).

    Returns
    -------
    float or ndarray
        Mean free path, m (Hinds: lambda ~ (T/p)(1 + S/T_r)/(1 + S/T)).
    """
    t = _array(temperature, "temperature")
    p = _array(pressure, "pressure")
    s = SUTHERLAND_CONSTANT_AIR
    return _out(MEAN_FREE_PATH_REF * (_P0 / p) * (t / _T0) * (1.0 + s / _T0) / (1.0 + s / t))


def air_density(temperature=_T0, pressure=_P0):
    """Density of dry air from the ideal-gas law.

    Parameters
    ----------
    temperature : float or array_like
        Gas temperature, K (> 0).
    pressure : float or array_like
        Gas pressure, Pa (> 0).

    Returns
    -------
    float or ndarray
        Density, kg/m^3 (1.204 at 20 degC, 1 atm).
    """
    t = _array(temperature, "temperature")
    p = _array(pressure, "pressure")
    r_gas = BOLTZMANN * 6.02214076e23  # J/(mol K), exact since the 2019 SI
    return _out(p * AIR_MOLAR_MASS / (r_gas * t))


def knudsen_number(diameter, temperature=_T0, pressure=_P0):
    """Particle Knudsen number Kn = 2 lambda/d.

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    temperature : float or array_like
        Gas temperature, K.
    pressure : float or array_like
        Gas pressure, Pa.

    Returns
    -------
    float or ndarray
        Kn, 1.
    """
    d = _array(diameter, "diameter")
    return _out(2.0 * np.asarray(mean_free_path(temperature, pressure)) / d)


def slip_correction(diameter, temperature=_T0, pressure=_P0):
    """Cunningham slip correction factor.

    Cc = 1 + Kn (1.142 + 0.558 exp(-0.999/Kn)), Kn = 2 lambda/d
    (Allen & Raabe 1985, as given in Hinds, Aerosol Technology).

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    temperature : float or array_like
        Gas temperature, K (> 0).
    pressure : float or array_like
        Gas pressure, Pa (> 0).

    Returns
    -------
    float or ndarray
        Cc, 1 (>= 1; about 2.9 at 0.1 um, 1.15 at 1 um in air at 20 degC).
    """
    return _out(slip_from_knudsen(np.asarray(knudsen_number(diameter, temperature, pressure))))


def slip_from_knudsen(kn):
    """Cc = 1 + Kn (1.142 + 0.558 exp(-0.999/Kn)) for a checked Knudsen number (array or float)."""
    return 1.0 + kn * (SLIP_A + SLIP_B * np.exp(-SLIP_C / kn))


def relaxation_time_from(diameter, density, slip, viscosity):
    """tau = rho d^2 Cc/(18 mu), s, from checked arrays or floats (no checks:
    the run loop's particle arrays were checked when the particles were added)."""
    return density * diameter * diameter * slip / (18.0 * viscosity)


def _viscosity(viscosity, temperature):
    if viscosity is None:
        return np.asarray(air_viscosity(temperature))
    return _array(viscosity, "viscosity")


def mobility(diameter, temperature=_T0, pressure=_P0, viscosity=None):
    """Mechanical mobility B = Cc/(3 pi mu d): velocity per unit force.

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    temperature : float or array_like
        Gas temperature, K (> 0).
    pressure : float or array_like
        Gas pressure, Pa (> 0).
    viscosity : float or array_like, optional
        Gas viscosity, Pa s; None: air by :func:`air_viscosity`.

    Returns
    -------
    float or ndarray
        B, m/(N s) = s/kg.
    """
    d = _array(diameter, "diameter")
    mu = _viscosity(viscosity, temperature)
    cc = np.asarray(slip_correction(d, temperature, pressure))
    return _out(cc / (3.0 * np.pi * mu * d))


def stokes_drag_coefficient(diameter, temperature=_T0, pressure=_P0, viscosity=None):
    """Linear drag coefficient c = 3 pi mu d/Cc, so the drag force is -c (v - u).

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    temperature : float or array_like
        Gas temperature, K (> 0).
    pressure : float or array_like
        Gas pressure, Pa (> 0).
    viscosity : float or array_like, optional
        Gas viscosity, Pa s; None: air by :func:`air_viscosity`.

    Returns
    -------
    float or ndarray
        c, kg/s (N per m/s of slip velocity); the reciprocal of :func:`mobility`.
    """
    return _out(1.0 / np.asarray(mobility(diameter, temperature, pressure, viscosity)))


def electrical_mobility(diameter, charge, temperature=_T0, pressure=_P0, viscosity=None):
    """Electrical mobility Z = q B = q Cc/(3 pi mu d) (signed with the charge).

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    charge : float or array_like
        Particle charge, C.
    temperature, pressure, viscosity
        As in :func:`mobility` (K, Pa, Pa s).

    Returns
    -------
    float or ndarray
        Z, m^2/(V s).
    """
    q = _finite(charge, "charge")
    return _out(q * np.asarray(mobility(diameter, temperature, pressure, viscosity)))


def migration_velocity(diameter, charge, field, temperature=_T0, pressure=_P0, viscosity=None):
    """Terminal electrical drift velocity w = q E Cc/(3 pi mu d).

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    charge : float or array_like
        Particle charge, C (signed).
    field : float or array_like
        Electric field strength (a component or the magnitude), V/m.
    temperature, pressure, viscosity
        As in :func:`mobility` (K, Pa, Pa s).

    Returns
    -------
    float or ndarray
        w, m/s (along the field for positive q E).
    """
    e = _finite(field, "field")
    return _out(e * np.asarray(electrical_mobility(diameter, charge, temperature, pressure, viscosity)))


def relaxation_time(diameter, density, temperature=_T0, pressure=_P0, viscosity=None):
    """Particle relaxation time tau = rho d^2 Cc/(18 mu) = m B.

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    density : float or array_like
        Particle material density, kg/m^3 (> 0).
    temperature, pressure, viscosity
        As in :func:`mobility` (K, Pa, Pa s).

    Returns
    -------
    float or ndarray
        tau, s (about 3.6e-6 s for 1 um, 1000 kg/m^3 in air at 20 degC).
    """
    d = _array(diameter, "diameter")
    rho = _array(density, "density")
    mu = _viscosity(viscosity, temperature)
    cc = np.asarray(slip_correction(d, temperature, pressure))
    return _out(relaxation_time_from(d, rho, cc, mu))


def settling_velocity(diameter, density, temperature=_T0, pressure=_P0, viscosity=None, gravity=STANDARD_GRAVITY):
    """Terminal settling velocity in still gas, V_TS = tau g (Stokes regime).

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    density : float or array_like
        Particle material density, kg/m^3 (> 0).
    temperature, pressure, viscosity
        As in :func:`mobility` (K, Pa, Pa s).
    gravity : float
        Acceleration of gravity, m/s^2 (> 0).

    Returns
    -------
    float or ndarray
        Settling speed, m/s (about 3.5e-5 m/s for 1 um, 1000 kg/m^3).
    """
    g = _array(gravity, "gravity")
    return _out(g * np.asarray(relaxation_time(diameter, density, temperature, pressure, viscosity)))


def particle_diffusivity(diameter, temperature=_T0, pressure=_P0, viscosity=None):
    """Brownian diffusion coefficient D = k T Cc/(3 pi mu d) (Stokes-Einstein).

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    temperature, pressure, viscosity
        As in :func:`mobility` (K, Pa, Pa s).

    Returns
    -------
    float or ndarray
        D, m^2/s.
    """
    t = _array(temperature, "temperature")
    return _out(BOLTZMANN * t * np.asarray(mobility(diameter, t, pressure, viscosity)))


def reynolds_number(diameter, speed, temperature=_T0, pressure=_P0, viscosity=None, gas_density=None):
    """Particle Reynolds number Re = rho_g |v - u| d / mu.

    Stokes drag holds for Re below about 1 (Hinds); callers may warn above.

    Parameters
    ----------
    diameter : float or array_like
        Particle diameter, m (> 0).
    speed : float or array_like
        Slip speed |v - u| of the particle relative to the gas, m/s (>= 0).
    temperature, pressure, viscosity
        As in :func:`mobility` (K, Pa, Pa s).
    gas_density : float or array_like, optional
        Gas density, kg/m^3; None: air by :func:`air_density`.

    Returns
    -------
    float or ndarray
        Re, 1.
    """
    d = _array(diameter, "diameter")
    v = _array(speed, "speed", positive=False, nonnegative=True)
    mu = _viscosity(viscosity, temperature)
    rho = np.asarray(air_density(temperature, pressure)) if gas_density is None else _array(gas_density, "gas_density")
    return _out(rho * v * d / mu)
