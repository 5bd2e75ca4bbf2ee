"""A field given on a regular 3-D grid (from another solver or a measurement)."""
import numba
import numpy as np

from .. import _validate
from .base import FieldSource

#: Points this far outside the grid (in cells) still count as on its edge.
_EDGE = 1e-9


@numba.njit(cache=True)
def _locate(pts, origin, spacing, shape, cell, frac):
    """Cell index and fractional position of each point; returns the first outside, or -1."""
    for i in range(pts.shape[0]):
        bad = False
        for k in range(3):
            u = (pts[i, k] - origin[k]) / spacing[k]
            n = shape[k]
            if u < -_EDGE or u > (n - 1) + _EDGE:
                bad = True
                u = 0.0
            c = int(np.floor(u))
            if c < 0:
                c = 0
            if c > n - 2:
                c = n - 2
            cell[i, k] = c
            f = u - c
            frac[i, k] = min(max(f, 0.0), 1.0)
        if bad:
            return i  # the first point outside: the caller raises
    return -1


@numba.njit(cache=True)
def _trilinear(values, cell, frac, out):
    """Trilinear interpolation of values (nx, ny, nz, c) at located points into out (m, c).

    Serial: a few multiply-adds per point, memory-bound; threads do not pay here.
    """
    m = cell.shape[0]
    nc = values.shape[3]
    for i in range(m):
        ix, iy, iz = cell[i, 0], cell[i, 1], cell[i, 2]
        fx, fy, fz = frac[i, 0], frac[i, 1], frac[i, 2]
        for c in range(nc):
            acc = 0.0
            for dx in range(2):
                wx = fx if dx else 1.0 - fx
                for dy in range(2):
                    wy = fy if dy else 1.0 - fy
                    for dz in range(2):
                        wz = fz if dz else 1.0 - fz
                        acc += wx * wy * wz * values[ix + dx, iy + dy, iz + dz, c]
            out[i, c] = acc


class GriddedField(FieldSource):
    """A field (and optionally its potential) on a regular grid, trilinearly interpolated.

    Points outside the grid raise ValueError naming the first one: a field
    is not guessed where it was not given.

    Parameters
    ----------
    origin : array_like of 3 floats
        Position of node (0, 0, 0), m.
    spacing : array_like of 3 floats (or one float)
        Node spacing along x, y, z, m (> 0).
    field : array_like, shape (nx, ny, nz, 3)
        Field at the nodes, V/m (each n >= 2).
    potential : array_like, shape (nx, ny, nz), optional
        Potential at the nodes, V.
    name : str
        Name.
    """

    def __init__(self, origin, spacing, field, potential=None, name="gridded field"):
        self.name = str(name)
        self.origin = _validate.vector(origin, "origin")
        sp = np.asarray(spacing, dtype=np.float64)
        sp = np.full(3, float(sp)) if sp.ndim == 0 else sp.reshape(-1)
        if sp.shape != (3,) or not np.all(np.isfinite(sp)) or np.any(sp <= 0):
            raise ValueError(f"spacing must be one or three finite positive lengths in m, got {spacing!r}")
        self.spacing = sp
        f = np.ascontiguousarray(field, dtype=np.float64)
        if f.ndim != 4 or f.shape[3] != 3 or min(f.shape[:3]) < 2:
            raise ValueError(f"field must have shape (nx, ny, nz, 3) with each n >= 2, got {f.shape}")
        if not np.all(np.isfinite(f)):
            idx = np.argwhere(~np.isfinite(f))[0]
            raise ValueError(f"field holds a non-finite value at node {tuple(int(i) for i in idx[:3])}")
        self.values = f
        self.shape = np.array(f.shape[:3], dtype=np.int64)
        if potential is None:
            self.potential_values = None
        else:
            p = np.ascontiguousarray(potential, dtype=np.float64)
            if p.shape != f.shape[:3]:
                raise ValueError(f"potential must have shape {f.shape[:3]} to match field, got {p.shape}")
            if not np.all(np.isfinite(p)):
                raise ValueError("potential holds a non-finite value")
            self.potential_values = p[..., None]
        self._peak = float(np.sqrt(np.einsum("...i,...i->...", f, f)).max())

    @property
    def high(self):
        """Position of the last node, m."""
        return self.origin + self.spacing * (self.shape - 1)

    def _interp(self, pts, values):
        m = pts.shape[0]
        cell = np.empty((m, 3), dtype=np.int64)
        frac = np.empty((m, 3))
        first = _locate(pts, self.origin, self.spacing, self.shape, cell, frac)
        if first >= 0:
            raise ValueError(
                f"points[{first}] = {pts[first].tolist()} m lies outside the grid of {self.name!r} "
                f"(x, y, z from {self.origin.tolist()} to {self.high.tolist()} m)"
            )
        out = np.empty((m, values.shape[3]))
        _trilinear(values, cell, frac, out)
        return out

    def _field(self, pts):
        return self._interp(pts, self.values)

    def _potential(self, pts):
        if self.potential_values is None:
            raise ValueError(f"gridded field {self.name!r} was given without a potential")
        return self._interp(pts, self.potential_values)[:, 0]

    def peak_field(self):
        """Largest field magnitude at a grid node, V/m."""
        return self._peak

    def _geometry(self):
        params = {"origin": self.origin.tolist(), "spacing": self.spacing.tolist(),
                  "shape": self.shape.tolist(), "has_potential": self.potential_values is not None}
        return params, [{"shape": "box", "low": self.origin.tolist(), "high": self.high.tolist()}]
