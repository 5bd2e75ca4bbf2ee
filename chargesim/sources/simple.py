"""Uniform fields, parallel plates, and sums of sources."""
import numba
import numpy as np

from .. import _validate
from .base import FieldSource

_AXES = {"x": 0, "y": 1, "z": 2, 0: 0, 1: 1, 2: 2}


def as_axis(axis):
    """Axis index 0, 1, 2 from 0/1/2 or "x"/"y"/"z"."""
    try:
        return _AXES[axis.lower() if isinstance(axis, str) else int(axis)]
    except (KeyError, TypeError, ValueError):
        raise ValueError(f"axis must be 0, 1, 2 or 'x', 'y', 'z', got {axis!r}") from None


@numba.njit(cache=True)
def _affine_potential(pts, e0, e1, e2, c, out):
    """out_i = c - e . x_i, term by term in the order x, y, z: the rounding of
    the numpy form it replaced (which skipped zero components; subtracting
    0 x from a finite value changes nothing)."""
    for i in range(pts.shape[0]):
        v = c - e0 * pts[i, 0]
        v -= e1 * pts[i, 1]
        out[i] = v - e2 * pts[i, 2]


class UniformField(FieldSource):
    """A uniform applied field E, with potential -E . (x - x0).

    Parameters
    ----------
    field : array_like of 3 floats
        Field vector, V/m.
    reference_point : array_like of 3 floats
        Where the potential is zero, m.
    name : str
        Name.
    """

    def __init__(self, field, reference_point=(0.0, 0.0, 0.0), name="uniform field"):
        self.name = str(name)
        self.vector = _validate.vector(field, "field")
        self.reference_point = _validate.vector(reference_point, "reference_point")

    def _field(self, pts):
        # filled by columns: 0.22 ms for 1e5 points against 1.0 ms for a copy
        # of the broadcast vector (measured on the 2-core reference machine)
        out = np.empty(pts.shape)
        for k in range(3):
            out[:, k] = self.vector[k]
        return out

    def _potential(self, pts):
        # -E . (x - x0) in one compiled pass (a diagnostics row evaluates it
        # at every particle): 0.09 ms for 1e5 points, where numpy took 0.84 ms
        # by columns and 0.27 ms as a matrix-vector product (second reference
        # machine; on the first the product was the slower, 1.5 ms)
        out = np.empty(pts.shape[0])
        e = self.vector
        _affine_potential(pts, e[0], e[1], e[2], float(np.dot(self.reference_point, e)), out)
        return out

    def peak_field(self):
        return float(np.linalg.norm(self.vector))

    def _geometry(self):
        return {"field": self.vector.tolist(), "reference_point": self.reference_point.tolist()}, []


class ParallelPlates(FieldSource):
    """Two infinite parallel plate electrodes at fixed potentials.

    Between the plates the field is uniform, E = -(V_b - V_a)/(u_b - u_a) along
    the axis; outside them it is zero and the potential is that of the nearer
    plate (ideal plates: the field stays in the gap).

    Parameters
    ----------
    axis : int or str
        Plate normal, 0/1/2 or "x"/"y"/"z".
    positions : pair of floats
        Plate coordinates u_a, u_b along the axis, m (distinct).
    potentials : pair of floats
        Plate potentials V_a, V_b, V.
    extent : pair of (low, high) pairs, optional
        Extent of the plates along the two other axes (in axis order), m; for
        outlines in plots only.
    name : str
        Name.
    """

    def __init__(self, axis, positions, potentials, extent=None, name="parallel plates"):
        self.name = str(name)
        self.axis = as_axis(axis)
        ua, ub = (_validate.finite(p, "positions") for p in _pair(positions, "positions"))
        va, vb = (_validate.finite(v, "potentials") for v in _pair(potentials, "potentials"))
        if ua == ub:
            raise ValueError(f"positions must be two distinct plate coordinates, got {positions!r}")
        if ua > ub:
            ua, ub, va, vb = ub, ua, vb, va
        self.positions = (ua, ub)
        self.potentials = (va, vb)
        self.gap = ub - ua
        self.extent = None if extent is None else np.asarray(extent, dtype=np.float64).reshape(2, 2)
        self._e = -(vb - va) / self.gap

    def _field(self, pts):
        u = pts[:, self.axis]
        out = np.zeros_like(pts)
        inside = (u >= self.positions[0]) & (u <= self.positions[1])
        out[:, self.axis] = np.where(inside, self._e, 0.0)
        return out

    def _potential(self, pts):
        u = np.clip(pts[:, self.axis], *self.positions)
        return self.potentials[0] - self._e * (u - self.positions[0])

    def peak_field(self):
        return abs(self._e)

    def _geometry(self):
        outlines = []
        for u in self.positions:
            point = np.zeros(3)
            point[self.axis] = u
            normal = np.zeros(3)
            normal[self.axis] = 1.0
            shape = {"shape": "plane", "point": point.tolist(), "normal": normal.tolist()}
            if self.extent is not None:
                low, high = np.full(3, u), np.full(3, u)
                others = [a for a in range(3) if a != self.axis]
                low[others], high[others] = self.extent[:, 0], self.extent[:, 1]
                shape = {"shape": "box", "low": low.tolist(), "high": high.tolist()}
            outlines.append(shape)
        params = {"axis": self.axis, "positions": list(self.positions), "potentials": list(self.potentials),
                  "gap": self.gap}
        return params, outlines


class Superposition(FieldSource):
    """The sum of several applied sources (fields and potentials add).

    Parameters
    ----------
    sources : sequence of FieldSource
        The parts.
    name : str
        Name.
    """

    def __init__(self, sources, name="superposition"):
        self.name = str(name)
        self.sources = list(sources)
        if not self.sources:
            raise ValueError("sources must hold at least one field source")
        for i, s in enumerate(self.sources):
            if not isinstance(s, FieldSource):
                raise ValueError(f"sources[{i}] is not a field source: {s!r}")

    def _field(self, pts):
        return sum(s._field(pts) for s in self.sources)

    def _potential(self, pts):
        return sum(s._potential(pts) for s in self.sources)

    def peak_field(self):
        """Sum of the parts' peak fields: an upper bound of the peak of the sum, V/m."""
        return float(sum(s.peak_field() for s in self.sources))

    def _geometry(self):
        parts = [s.describe() for s in self.sources]
        return {"parts": parts}, [o for p in parts for o in p["outlines"]]


def _pair(value, name):
    try:
        a, b = value
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a pair of numbers, got {value!r}") from None
    return a, b
