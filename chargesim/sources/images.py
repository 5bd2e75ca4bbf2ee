"""Image charges of grounded conductors: a plane, two parallel plates, a sphere.

Method of images (any electromagnetism text): the field of the free charges
plus their images makes the conductor's surface an equipotential at 0 V, so
a charged particle near a grounded collector or workpiece feels the image
attraction. The caller divides the images' field by the medium's eps_r, as
for the free charges.
"""
import math

import numpy as np

from .. import _validate
from .base import ImageSystem
from .simple import as_axis

#: Error constant of the corrected image series of two plates, measured
#: against a converged sum (relative field error <= C/M^3.5 with M pairs of
#: image periods on each side); see GroundedPlates.
_PLATES_ERROR = 0.02


class GroundedPlane(ImageSystem):
    """An infinite grounded plane: image -q at the mirror point.

    Parameters
    ----------
    point : array_like of 3 floats
        A point of the plane, m.
    normal : array_like of 3 floats
        Its normal (toward the free charges), normalized here.
    name : str
        Name.
    """

    def __init__(self, point, normal, name="grounded plane"):
        self.name = str(name)
        self.point = _validate.vector(point, "point")
        self.normal = _validate.unit(normal, "normal")

    def _images(self, pos, q):
        h = (pos - self.point) @ self.normal
        return pos - 2.0 * np.outer(h, self.normal), -q

    def _geometry(self):
        return ({"point": self.point.tolist(), "normal": self.normal.tolist()},
                [{"shape": "plane", "point": self.point.tolist(), "normal": self.normal.tolist()}])


class GroundedPlates(ImageSystem):
    """Two parallel grounded plates: the alternating image series, truncated by a tolerance.

    For a charge q at u between plates at u = a and u = b (gap L), the images
    are +q at u + 2 m L (m != 0) and -q at 2 a - u + 2 m L. Grouped in pairs
    (+q at u + 2 m L, -q at 2 a - u + 2 m L) they are dipoles 2 q (u - a) at
    a + 2 m L; the series is kept for |m| <= M, and the dipoles beyond are
    replaced by what a continuous line of them is, one charge at each end
    (-q (u - a)/L at a + (2M + 1) L, +q (u - a)/L at a - (2M + 1) L). That lifts
    the truncation error from order 1/M^2 to about 1/M^4, so a few periods
    suffice: M is the smallest with 0.02/M^3.5 <= tol (checked against a
    converged sum and the analytic image force in the tests).

    Parameters
    ----------
    axis : int or str
        Plate normal, 0/1/2 or "x"/"y"/"z".
    positions : pair of floats
        Plate coordinates a < b along the axis, m.
    tol : float
        Error of the image field anywhere in the gap, relative to k q/L^2.
    name : str
        Name.
    """

    def __init__(self, axis, positions, tol=1e-5, name="grounded plates"):
        self.name = str(name)
        self.axis = as_axis(axis)
        try:
            a, b = (_validate.finite(p, "positions") for p in positions)
        except (TypeError, ValueError) as exc:
            raise ValueError(f"positions must be two plate coordinates in m: {exc}") from None
        if not a < b:
            a, b = min(a, b), max(a, b)
            if a == b:
                raise ValueError(f"positions must be two distinct plate coordinates, got {positions!r}")
        self.positions = (a, b)
        self.gap = b - a
        self.tol = _validate.positive(tol, "tol")
        self.periods = max(1, int(math.ceil((_PLATES_ERROR / self.tol) ** (1.0 / 3.5))))

    @property
    def terms(self):
        """Image charges per free charge."""
        return 4 * self.periods + 3  # 2M of +q, 2M + 1 of -q, two tail ends

    def _images(self, pos, q):
        ax = self.axis
        a, b = self.positions
        u = pos[:, ax]
        out = np.flatnonzero((u < a) | (u > b))
        if out.size:
            i = int(out[0])
            raise ValueError(f"positions[{i}] lies outside the gap between the plates ({a} m to {b} m along "
                             f"axis {ax}): {pos[i].tolist()}")
        big_m = self.periods
        L = self.gap
        m = np.arange(-big_m, big_m + 1, dtype=np.float64)
        m_pos = m[m != 0]
        n = pos.shape[0]
        k = self.terms
        ipos = np.repeat(pos[:, None, :], k, axis=1)
        iq = np.empty((n, k))
        npos = m_pos.size
        ipos[:, :npos, ax] = u[:, None] + 2.0 * L * m_pos[None, :]
        iq[:, :npos] = q[:, None]
        ipos[:, npos:npos + m.size, ax] = (2.0 * a - u)[:, None] + 2.0 * L * m[None, :]
        iq[:, npos:npos + m.size] = -q[:, None]
        # ends of the dipole line that stands for the truncated tail
        tail = q * (u - a) / L
        ipos[:, -2, ax] = a + (2 * big_m + 1) * L
        iq[:, -2] = -tail
        ipos[:, -1, ax] = a - (2 * big_m + 1) * L
        iq[:, -1] = tail
        return ipos.reshape(-1, 3), iq.reshape(-1)

    def _geometry(self):
        outlines = []
        for p in self.positions:
            point = np.zeros(3)
            point[self.axis] = p
            normal = np.zeros(3)
            normal[self.axis] = 1.0
            outlines.append({"shape": "plane", "point": point.tolist(), "normal": normal.tolist()})
        return {"axis": self.axis, "positions": list(self.positions), "tol": self.tol,
                "terms": self.terms}, outlines


class GroundedSphere(ImageSystem):
    """A grounded sphere: Kelvin image q' = -q R/d at R^2/d from the centre.

    Holds for charges outside the sphere and for charges inside a grounded
    spherical shell alike. A charge exactly at the centre gets a zero image
    (its field inside the shell is unchanged by the shell).

    Parameters
    ----------
    centre : array_like of 3 floats
        m.
    radius : float
        R, m (> 0).
    name : str
        Name.
    """

    def __init__(self, centre, radius, name="grounded sphere"):
        self.name = str(name)
        self.centre = _validate.vector(centre, "centre")
        self.radius = _validate.positive(radius, "radius")

    def _images(self, pos, q):
        rel = pos - self.centre
        d2 = np.einsum("ij,ij->i", rel, rel)
        r = self.radius
        with np.errstate(divide="ignore", invalid="ignore"):
            factor = np.where(d2 > 0, r * r / d2, 0.0)
            iq = np.where(d2 > 0, -q * r / np.sqrt(d2), 0.0)
        return self.centre + rel * factor[:, None], iq

    def _geometry(self):
        return ({"centre": self.centre.tolist(), "radius": self.radius},
                [{"shape": "sphere", "centre": self.centre.tolist(), "radius": self.radius}])
