"""Particle populations and the inlets that emit them over time.

A :class:`Population` says what a particle is (size distribution, material
density and permittivity, initial charge, weight); an :class:`Inlet` emits a
population over an inlet area at a rate. All random draws come from the
``numpy.random.Generator`` handed in, in a fixed order (positions, sizes,
charges), so a run is reproducible from its seed.
"""
import math

import numpy as np
from .._validate import finite as _finite, positive as _positive, vector as _vector


# -- size distributions -------------------------------------------------------
class FixedSize:
    """Every particle has one diameter.

    Parameters
    ----------
    diameter : float
        Particle diameter, m (> 0).
    """

    def __init__(self, diameter):
        self.diameter = _positive(diameter, "diameter")

    def sample(self, rng, k):
        """``k`` diameters, m."""
        return np.full(k, self.diameter)

    def describe(self):
        return {"kind": "fixed", "diameter": self.diameter}


class LognormalSize:
    """Lognormal count distribution of diameters.

    Parameters
    ----------
    median : float
        Count median diameter, m (> 0).
    gsd : float
        Geometric standard deviation, 1 (>= 1; 1 gives a fixed size).
    """

    def __init__(self, median, gsd):
        self.median = _positive(median, "median")
        self.gsd = _positive(gsd, "gsd")
        if self.gsd < 1.0:
            raise ValueError(f"gsd must be >= 1 (geometric standard deviation), got {gsd!r}")

    def sample(self, rng, k):
        """``k`` diameters, m: exp(N(ln median, ln gsd))."""
        return self.median * np.exp(math.log(self.gsd) * rng.standard_normal(k))

    def describe(self):
        return {"kind": "lognormal", "median": self.median, "gsd": self.gsd}


class TableSize:
    """Diameters drawn from a table of sizes and count fractions.

    Parameters
    ----------
    diameters : array_like (K,)
        Diameters, m (> 0).
    fractions : array_like (K,)
        Count fraction of each diameter, 1 (>= 0, not all zero; normalised here).
    """

    def __init__(self, diameters, fractions):
        d = np.asarray(diameters, dtype=np.float64).reshape(-1)
        f = np.asarray(fractions, dtype=np.float64).reshape(-1)
        if d.size == 0 or d.shape != f.shape:
            raise ValueError(f"diameters and fractions must be non-empty and of equal length, got {d.shape}, {f.shape}")
        bad = np.flatnonzero(~(np.isfinite(d) & (d > 0)))
        if bad.size:
            raise ValueError(f"diameters must be finite and > 0; index {int(bad[0])} is {d[bad[0]]!r}")
        bad = np.flatnonzero(~(np.isfinite(f) & (f >= 0)))
        if bad.size:
            raise ValueError(f"fractions must be finite and >= 0; index {int(bad[0])} is {f[bad[0]]!r}")
        if f.sum() <= 0:
            raise ValueError("fractions must not all be zero")
        self.diameters = d
        self.fractions = f / f.sum()
        self._cdf = np.cumsum(self.fractions)
        self._cdf[-1] = 1.0

    def sample(self, rng, k):
        """``k`` diameters, m, by inverting the cumulative count fraction."""
        idx = np.searchsorted(self._cdf, rng.random(k), side="right")
        return self.diameters[np.minimum(idx, self.diameters.size - 1)]

    def describe(self):
        return {"kind": "table", "diameters": self.diameters.copy(), "fractions": self.fractions.copy()}


# -- initial charge -----------------------------------------------------------
class NoCharge:
    """Particles start neutral."""

    def assign(self, diameter, density, eps_p):
        """Charge of each real particle, C."""
        return np.zeros(np.shape(diameter))

    def describe(self):
        return {"kind": "zero"}


class FixedCharge:
    """Every particle carries one charge.

    Parameters
    ----------
    charge : float
        Charge of one real particle, C (signed).
    """

    def __init__(self, charge):
        self.charge = _finite(charge, "charge")

    def assign(self, diameter, density, eps_p):
        return np.full(np.shape(diameter), self.charge)

    def describe(self):
        return {"kind": "fixed", "charge": self.charge}


class ChargeToMass:
    """Charge proportional to particle mass.

    Parameters
    ----------
    ratio : float
        Charge-to-mass ratio, C/kg (signed; powder coating about 1e-3).
    """

    def __init__(self, ratio):
        self.ratio = _finite(ratio, "ratio")

    def assign(self, diameter, density, eps_p):
        d = np.asarray(diameter, dtype=np.float64)
        return self.ratio * (math.pi / 6.0) * d ** 3 * np.asarray(density, dtype=np.float64)

    def describe(self):
        return {"kind": "charge_to_mass", "ratio": self.ratio}


class SaturationCharge:
    """Field-charging saturation (Pauthenier limit) in a given field.

    q = fraction * 3 pi eps0 d^2 E eps_p/(eps_p + 2) (Pauthenier &
    Moreau-Hanot 1932), by :func:`chargesim.physics.charging.saturation_charge`.

    Parameters
    ----------
    field : float
        Charging field strength, V/m (signed: the sign of the charge).
    fraction : float
        Share of the saturation charge reached, 1 (0 < fraction <= 1).
    """

    def __init__(self, field, fraction=1.0):
        self.field = _finite(field, "field")
        self.fraction = _positive(fraction, "fraction")
        if self.fraction > 1.0:
            raise ValueError(f"fraction must be in (0, 1], got {fraction!r}")

    def assign(self, diameter, density, eps_p):
        from ..physics import charging  # imported on use: the physics module is optional until needed

        sign = 1.0 if self.field >= 0 else -1.0
        q = charging.saturation_charge(diameter, abs(self.field), eps_p)
        return sign * self.fraction * np.asarray(q, dtype=np.float64) * np.ones(np.shape(diameter))

    def describe(self):
        return {"kind": "saturation", "field": self.field, "fraction": self.fraction}


class Population:
    """A kind of particle.

    Parameters
    ----------
    name : str
        Population name (non-empty).
    size : FixedSize, LognormalSize or TableSize
        Diameter distribution (or a float: a fixed diameter, m).
    density : float
        Material density, kg/m^3 (> 0).
    eps_p : float
        Particle relative permittivity, 1 (>= 1; inf for a conductor).
    charge : NoCharge, FixedCharge, ChargeToMass or SaturationCharge
        Initial charge of each real particle.
    weight : float
        Real particles per simulated particle, 1 (> 0).
    surface_tension : float, optional
        Surface tension of a liquid droplet, N/m: its charge is capped at the
        Rayleigh limit; None for solids.
    """

    def __init__(self, name, size, density, eps_p=np.inf, charge=None, weight=1.0, surface_tension=None):
        if not isinstance(name, str) or not name:
            raise ValueError(f"name must be a non-empty string, got {name!r}")
        self.name = name
        if isinstance(size, (int, float)):
            size = FixedSize(size)
        if not hasattr(size, "sample"):
            raise ValueError("size must be FixedSize, LognormalSize, TableSize or a diameter in m")
        self.size = size
        self.density = _positive(density, "density")
        self.eps_p = _positive(eps_p, "eps_p", allow_inf=True)
        if self.eps_p < 1.0:
            raise ValueError(f"eps_p must be >= 1 (inf for a conductor), got {eps_p!r}")
        charge = NoCharge() if charge is None else charge
        if not hasattr(charge, "assign"):
            raise ValueError("charge must be NoCharge, FixedCharge, ChargeToMass or SaturationCharge")
        self.charge = charge
        self.weight = _positive(weight, "weight")
        self.surface_tension = None if surface_tension is None else _positive(surface_tension, "surface_tension")

    def draw(self, rng, k):
        """Diameters (m) and charges (C) of ``k`` new particles."""
        d = self.size.sample(rng, k)
        q = self.charge.assign(d, self.density, self.eps_p)
        return d, q

    def describe(self):
        return {"name": self.name, "size": self.size.describe(), "density": self.density, "eps_p": self.eps_p,
                "charge": self.charge.describe(), "weight": self.weight,
                "surface_tension": -1.0 if self.surface_tension is None else self.surface_tension}


# -- inlet areas --------------------------------------------------------------
class RectangleArea:
    """A parallelogram (usually a rectangle) spanned by two edge vectors.

    Parameters
    ----------
    center : array_like of 3 floats
        Centre of the area, m.
    edge_u, edge_v : array_like of 3 floats
        Full edge vectors, m (not parallel); points are ``center + a edge_u +
        b edge_v`` with a, b uniform in [-1/2, 1/2].
    """

    def __init__(self, center, edge_u, edge_v):
        self.center = _vector(center, "center")
        self.edge_u = _vector(edge_u, "edge_u")
        self.edge_v = _vector(edge_v, "edge_v")
        n = np.cross(self.edge_u, self.edge_v)
        self.area = float(np.linalg.norm(n))
        if not self.area > 0:
            raise ValueError("edge_u and edge_v must be non-zero and not parallel")
        self.normal = n / self.area

    def sample(self, rng, k):
        """``k`` uniform points on the area, m, shape (k, 3)."""
        ab = rng.random((k, 2)) - 0.5
        return self.center + ab[:, :1] * self.edge_u + ab[:, 1:] * self.edge_v

    def describe(self):
        return {"kind": "rectangle", "center": self.center.copy(), "edge_u": self.edge_u.copy(),
                "edge_v": self.edge_v.copy()}


class DiscArea:
    """A disc on a plane.

    Parameters
    ----------
    center : array_like of 3 floats
        Disc centre, m.
    normal : array_like of 3 floats
        Normal of the disc (any length > 0).
    radius : float
        Disc radius, m (> 0).
    """

    def __init__(self, center, normal, radius):
        self.center = _vector(center, "center")
        n = _vector(normal, "normal")
        norm = float(np.linalg.norm(n))
        if not norm > 0:
            raise ValueError("normal must be non-zero")
        self.normal = n / norm
        self.radius = _positive(radius, "radius")
        self.area = math.pi * self.radius ** 2
        # an orthonormal pair in the disc's plane
        helper = np.eye(3)[int(np.argmin(np.abs(self.normal)))]
        self._e1 = np.cross(self.normal, helper)
        self._e1 /= np.linalg.norm(self._e1)
        self._e2 = np.cross(self.normal, self._e1)

    def sample(self, rng, k):
        """``k`` uniform points on the disc, m, shape (k, 3)."""
        u = rng.random((k, 2))
        r = self.radius * np.sqrt(u[:, 0])
        phi = 2.0 * math.pi * u[:, 1]
        return self.center + (r * np.cos(phi))[:, None] * self._e1 + (r * np.sin(phi))[:, None] * self._e2

    def describe(self):
        return {"kind": "disc", "center": self.center.copy(), "normal": self.normal.copy(), "radius": self.radius}


class Inlet:
    """Emits particles of one population over an area at a rate.

    Parameters
    ----------
    population : Population
        What is emitted.
    area : RectangleArea or DiscArea
        Where new particles appear.
    rate : float
        Simulated particles per second, 1/s (> 0); each stands for
        ``population.weight`` real particles.
    velocity : "gas" or array_like of 3 floats
        Initial velocity, m/s; "gas": the local gas velocity.
    start, stop : float
        Emission window, s (0 <= start < stop; stop may be inf).
    name : str, optional
        Inlet name; default the population name.

    Notes
    -----
    The expected count ``rate * dt`` of a step is emitted as its whole part;
    the fraction is carried to the next step (``carry``, part of the
    checkpoint), so the long-run count is exact and not random.
    """

    def __init__(self, population, area, rate, velocity="gas", start=0.0, stop=math.inf, name=None):
        if not isinstance(population, Population):
            raise ValueError("population must be a Population")
        if not (hasattr(area, "sample") and hasattr(area, "area")):
            raise ValueError("area must be a RectangleArea or DiscArea")
        self.population = population
        self.area = area
        self.rate = _positive(rate, "rate")
        if isinstance(velocity, str):
            if velocity != "gas":
                raise ValueError(f"velocity must be 'gas' or three numbers in m/s, got {velocity!r}")
            self.velocity = "gas"
        else:
            self.velocity = _vector(velocity, "velocity")
        self.start = _finite(start, "start")
        try:
            self.stop = float(stop)
        except (TypeError, ValueError):
            raise ValueError(f"stop must be a number, got {stop!r}") from None
        if self.start < 0 or not self.stop > self.start:
            raise ValueError(f"need 0 <= start < stop, got start={start!r}, stop={stop!r}")
        self.name = population.name if name is None else str(name)
        self.carry = 0.0
        self.emitted = 0

    def count(self, t0, dt):
        """Number to emit in [t0, t0 + dt) and update the carry."""
        overlap = min(t0 + dt, self.stop) - max(t0, self.start)
        if overlap <= 0:
            return 0
        expected = self.rate * overlap + self.carry
        k = int(math.floor(expected))
        self.carry = expected - k
        return k

    def emit(self, rng, t0, dt, medium):
        """New particles for the step [t0, t0 + dt), or None.

        Returns
        -------
        dict or None
            ``position`` (k, 3) m, ``velocity`` (k, 3) m/s, ``diameter`` m,
            ``density`` kg/m^3, ``eps_p``, ``charge`` C, ``weight``.
        """
        k = self.count(t0, dt)
        if k == 0:
            return None
        pos = self.area.sample(rng, k)
        d, q = self.population.draw(rng, k)
        vel = medium.gas_velocity(pos) if isinstance(self.velocity, str) else np.tile(self.velocity, (k, 1))
        self.emitted += k
        return {"position": pos, "velocity": vel, "diameter": d, "density": self.population.density,
                "eps_p": self.population.eps_p, "charge": q, "weight": self.population.weight}

    def get_state(self):
        return {"carry": float(self.carry), "emitted": int(self.emitted)}

    def set_state(self, d):
        self.carry = float(d["carry"])
        self.emitted = int(d["emitted"])
