"""Small pieces the scenario vocabulary needs beyond the motion layer's own.

Each fills a duck-typed contract of :mod:`chargesim.motion` or
:mod:`chargesim.sources`: a truncated lognormal size (``sample``), charging
at injection (``assign``), a spray nozzle inlet (an ``Inlet``), fixed charges
as a field source (``field``/``potential``), and the image of a dielectric
half-space (``images``).
"""
import math

import numpy as np

from .. import coulomb
from ..motion.inlets import Inlet
from ..physics import charging


class TruncatedLognormalSize:
    """Lognormal count distribution cut to [dmin, dmax] (redrawn, not clipped).

    Parameters
    ----------
    median : float
        Count median diameter, m.
    gsd : float
        Geometric standard deviation, 1 (> 1).
    dmin, dmax : float
        Smallest and largest diameter, m.
    """

    def __init__(self, median, gsd, dmin, dmax):
        self.median, self.gsd, self.dmin, self.dmax = float(median), float(gsd), float(dmin), float(dmax)
        self._s = math.log(self.gsd)
        self._a = (math.log(self.dmin / self.median)) / self._s
        self._b = (math.log(self.dmax / self.median)) / self._s

    def sample(self, rng, k):
        """``k`` diameters, m: inverse CDF of the truncated normal in log d (one uniform draw each)."""
        from scipy.special import ndtr, ndtri

        u = rng.random(k)
        fa, fb = ndtr(self._a), ndtr(self._b)
        z = ndtri(fa + u * (fb - fa))
        return self.median * np.exp(self._s * z)

    def mean_cube(self):
        """E[d^3], m^3, by quadrature (for the mass of the mean particle)."""
        z = np.linspace(self._a, self._b, 4001)
        w = np.exp(-0.5 * z**2)
        d3 = (self.median * np.exp(self._s * z)) ** 3
        return float(np.trapezoid(w * d3, z) / np.trapezoid(w, z))

    def describe(self):
        return {"kind": "lognormal", "median": self.median, "gsd": self.gsd, "min": self.dmin, "max": self.dmax}


class IonCharge:
    """Charge reached by ion charging over an exposure time, given at injection.

    Field charging (q_s t/(t + tau)), diffusion charging (White) or both
    (their sum), by :mod:`chargesim.physics.charging`; the sign is that of the
    ions. ``time=None`` means the saturation charge (field charging only).
    """

    def __init__(self, mode, field, ion_density, ion_mobility, ion_mass, temperature, sign, time=None):
        self.mode, self.field, self.ion_density = mode, float(field), float(ion_density)
        self.ion_mobility, self.ion_mass, self.temperature = float(ion_mobility), float(ion_mass), float(temperature)
        self.sign, self.time = float(sign), time

    def assign(self, diameter, density, eps_p):
        d = np.asarray(diameter, dtype=np.float64)
        if self.mode == "field":
            if self.time is None:
                q = charging.saturation_charge(d, self.field, eps_p)
            else:
                q = charging.field_charge(self.time, d, self.field, eps_p, self.ion_density, self.ion_mobility)
        elif self.mode == "diffusion":
            q = charging.diffusion_charge(1.0 if self.time is None else self.time, d, self.ion_density,
                                          self.temperature, self.ion_mass)
        else:
            t = 1.0 if self.time is None else self.time
            q = charging.combined_charge(t, d, self.field, eps_p, self.ion_density, self.ion_mobility,
                                         self.temperature, self.ion_mass)
        return self.sign * np.asarray(q, dtype=np.float64) * np.ones(d.shape)

    def describe(self):
        return {"kind": f"ion_{self.mode}", "field": self.field, "ion_density": self.ion_density,
                "time": self.time, "sign": self.sign}


class NozzleInlet(Inlet):
    """An inlet whose particles leave at ``speed`` in directions spread evenly
    (uniform in solid angle) over a cone of full angle ``cone_angle`` about
    ``direction``; positions on the orifice disc."""

    def __init__(self, population, area, rate, direction, speed, cone_angle, start=0.0, stop=math.inf, name=None):
        super().__init__(population, area, rate, velocity="gas", start=start, stop=stop, name=name)
        n = np.asarray(direction, dtype=np.float64)
        self.direction = n / np.linalg.norm(n)
        self.speed = float(speed)
        self.cone_angle = float(cone_angle)
        # two unit vectors across the axis
        helper = np.array([1.0, 0.0, 0.0]) if abs(self.direction[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
        self._u = np.cross(self.direction, helper)
        self._u /= np.linalg.norm(self._u)
        self._v = np.cross(self.direction, self._u)

    def emit(self, rng, t0, dt, medium):
        out = super().emit(rng, t0, dt, medium)
        if out is None:
            return None
        k = out["position"].shape[0]
        cos_max = math.cos(0.5 * self.cone_angle)
        c = 1.0 - rng.random(k) * (1.0 - cos_max)  # uniform in solid angle inside the cone
        phi = 2.0 * math.pi * rng.random(k)
        s = np.sqrt(np.maximum(0.0, 1.0 - c * c))
        dirs = (c[:, None] * self.direction + (s * np.cos(phi))[:, None] * self._u
                + (s * np.sin(phi))[:, None] * self._v)
        out["velocity"] = self.speed * dirs
        return out


class FixedCharges:
    """Charges that do not move (beads, a lattice) as a field source.

    Their field is that of free charges in the medium (divided by eps_r), with
    finite radii so a particle touching a bead sees a finite field.
    """

    def __init__(self, name, positions, charges, radii=None, eps_r=1.0, method="auto", options=None):
        self.name = name
        self.positions = np.ascontiguousarray(positions, dtype=np.float64).reshape(-1, 3)
        self.charges = np.ascontiguousarray(charges, dtype=np.float64).reshape(-1)
        self.radii = None if radii is None else np.ascontiguousarray(radii, dtype=np.float64).reshape(-1)
        self.eps_r, self.method, self.options = float(eps_r), method, dict(options or {})

    def field(self, points):
        pts = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        return coulomb.field(self.positions, self.charges, pts, eps_r=self.eps_r, method=self.method,
                             radii=self.radii, **self.options)

    def potential(self, points):
        pts = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        return coulomb.potential(self.positions, self.charges, pts, eps_r=self.eps_r, method=self.method,
                                 radii=self.radii, **self.options)

    def describe(self):
        return {"kind": "FixedCharges", "name": self.name, "parameters": {"count": int(self.charges.size)},
                "outlines": []}


class DielectricPlane:
    """Image charges of a dielectric half-space in a medium.

    A charge q at distance h above the flat surface of a dielectric eps_d, in
    a medium eps_m, sees the field of an image q' = -q (eps_d - eps_m)/(eps_d
    + eps_m) at the mirror point (method of images for dielectrics; Griffiths,
    Introduction to Electrodynamics; Jackson, Classical Electrodynamics 4.4).
    """

    def __init__(self, name, point, normal, eps_d, eps_m=1.0):
        self.name = name
        self.point = np.asarray(point, dtype=np.float64)
        n = np.asarray(normal, dtype=np.float64)
        self.normal = n / np.linalg.norm(n)
        self.factor = -(float(eps_d) - float(eps_m)) / (float(eps_d) + float(eps_m))

    def images(self, positions, charges):
        pos = np.asarray(positions, dtype=np.float64).reshape(-1, 3)
        h = (pos - self.point) @ self.normal
        return pos - 2.0 * h[:, None] * self.normal, self.factor * np.asarray(charges, dtype=np.float64)

    def describe(self):
        return {"kind": "DielectricPlane", "name": self.name, "parameters": {"image_factor": self.factor},
                "outlines": [{"shape": "plane", "point": self.point.tolist(), "normal": self.normal.tolist()}]}
