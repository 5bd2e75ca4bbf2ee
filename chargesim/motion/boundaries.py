"""The domain (per-axis open, periodic, reflecting) and absorbing collectors.

Every step moves each particle along a straight segment x0 -> x1. A collector
reports, for each particle, the fraction s in [0, 1] of the segment at which
the particle's surface first touches it (inf: no contact), and the contact
point on the collector. An open face of the domain is an outlet: crossing it is
an escape. The earliest event of each particle wins; survivors are then
reflected or wrapped on the reflecting and periodic axes.

A particle touching a collector at the start of a step (s = 0) deposits at once.
"""
import math

import numba
import numpy as np
from .._numba import serial_and_parallel
from .._validate import positive as _positive, unit as _unit, vector as _vector
from .integrators import PARALLEL_MIN

_KINDS = ("open", "periodic", "reflecting")


def _name(value):
    if not isinstance(value, str) or not value:
        raise ValueError(f"name must be a non-empty string, got {value!r}")
    return value


def _area(value, default):
    if value is None:
        return default
    return _positive(value, "area")


class Collector:
    """Base of the absorbing surfaces: the contract the run loop uses.

    Subclasses set ``name`` (str) and ``area`` (m^2; inf when unbounded) and
    fill :meth:`contact` and :meth:`signed_distance`.
    """

    name = ""
    area = math.inf

    def contact(self, x0, x1, radius):
        """First contact along the segments x0 -> x1.

        Parameters
        ----------
        x0, x1 : ndarray, shape (n, 3)
            Segment ends, m.
        radius : ndarray, shape (n,)
            Particle radii, m.

        Returns
        -------
        s : ndarray (n,)
            Segment fraction of the first contact in [0, 1], inf for none.
        point : ndarray (n, 3)
            Contact point on the surface (meaningful where s is finite), m.
        """
        raise NotImplementedError

    def signed_distance(self, x, radius):
        """Gap between each particle's surface and the collector, m
        (negative: overlapping or behind it)."""
        raise NotImplementedError

    def normal(self, x):
        """Unit normal of the surface nearest each point, into the gas, (n, 3)."""
        raise NotImplementedError

    def mirror(self, x, radius):
        """Points moved back across the contact surface (d -> -d) where the
        particle overlaps the collector; unchanged elsewhere.

        Used for random walks that must not deposit (turbulent mixing): the
        mirror image keeps a uniform density uniform near the wall.
        """
        d = self.signed_distance(x, radius)
        over = d < 0
        if not over.any():
            return x
        y = x.copy()
        y[over] -= 2.0 * d[over, None] * self.normal(x[over])
        return y

    def describe(self):
        raise NotImplementedError


class PlaneCollector(Collector):
    """An absorbing plane or plate.

    Parameters
    ----------
    name : str
        Surface name used in deposit records.
    point : array_like of 3 floats
        A point on the plane, m.
    normal : array_like of 3 floats
        Normal pointing into the gas (any length > 0).
    lo, hi : array_like of 3 floats, optional
        Corners of an axis-aligned box bounding the plate, m: contacts outside
        it pass by (a plate of finite size). None: unbounded plane.
    area : float, optional
        Collecting area, m^2, for deposition densities; by default the box's
        in-plane extent for an axis-aligned normal, else inf.
    """

    def __init__(self, name, point, normal, lo=None, hi=None, area=None):
        self.name = _name(name)
        self.point = _vector(point, "point")
        self.unit_normal = _unit(normal, "normal")
        self.lo = np.full(3, -np.inf) if lo is None else np.asarray(lo, dtype=np.float64).reshape(3)
        self.hi = np.full(3, np.inf) if hi is None else np.asarray(hi, dtype=np.float64).reshape(3)
        if np.any(np.isnan(self.lo)) or np.any(np.isnan(self.hi)) or np.any(self.lo > self.hi):
            raise ValueError(f"lo must be <= hi on every axis, got lo={lo!r}, hi={hi!r}")
        self._bounded = bool(np.any(np.isfinite(self.lo)) or np.any(np.isfinite(self.hi)))
        default = math.inf
        axis = np.flatnonzero(np.abs(self.unit_normal) == 1.0)
        if axis.size == 1:
            others = [a for a in range(3) if a != axis[0]]
            ext = self.hi[others] - self.lo[others]
            if np.all(np.isfinite(ext)):
                default = float(ext[0] * ext[1])
        self.area = _area(area, default)

    def signed_distance(self, x, radius):
        d = (x - self.point) @ self.unit_normal
        if self._bounded:
            proj = x - d[:, None] * self.unit_normal
            d = np.where(np.all((proj >= self.lo) & (proj <= self.hi), axis=1), d, np.inf)
        return d - radius

    def normal(self, x):
        return np.broadcast_to(self.unit_normal, x.shape)

    def contact(self, x0, x1, radius):
        # one compiled pass: the numpy expression of the same steps made ~15
        # passes over (N, 3) arrays, 0.17 ms a call at N = 1000
        m = x0.shape[0]
        s = np.empty(m)
        point = np.empty((m, 3))
        _plane_contact(np.ascontiguousarray(x0, dtype=np.float64), np.ascontiguousarray(x1, dtype=np.float64),
                       np.broadcast_to(np.asarray(radius, dtype=np.float64), (m,)), self.point, self.unit_normal,
                       self.lo, self.hi, s, point)
        return s, point

    def describe(self):
        return {"kind": "plane", "name": self.name, "point": self.point.copy(), "normal": self.unit_normal.copy(),
                "lo": self.lo.copy(), "hi": self.hi.copy(), "area": self.area}


@numba.njit(inline="always")
def _plane_touch(x0, x1, i, r, p, n, lo, hi):
    """Segment fraction s where the sphere of radius r moving x0[i] -> x1[i]
    first touches the plane through p with unit normal n (0 if it starts
    touching, inf if it never does or touches outside the box [lo, hi]), and
    the touching point projected on the plane (for a miss, the start point's
    projection)."""
    d0 = (x0[i, 0] - p[0]) * n[0] + (x0[i, 1] - p[1]) * n[1] + (x0[i, 2] - p[2]) * n[2] - r
    d1 = (x1[i, 0] - p[0]) * n[0] + (x1[i, 1] - p[1]) * n[1] + (x1[i, 2] - p[2]) * n[2] - r
    if d0 <= 0.0:
        f = 0.0
    elif d1 <= 0.0:
        f = d0 / (d0 - d1)
    else:
        f = np.inf
    hit = f < np.inf
    t = f if hit else 0.0
    xs0 = x0[i, 0] + t * (x1[i, 0] - x0[i, 0])
    xs1 = x0[i, 1] + t * (x1[i, 1] - x0[i, 1])
    xs2 = x0[i, 2] + t * (x1[i, 2] - x0[i, 2])
    h = (xs0 - p[0]) * n[0] + (xs1 - p[1]) * n[1] + (xs2 - p[2]) * n[2]
    q0 = xs0 - h * n[0]
    q1 = xs1 - h * n[1]
    q2 = xs2 - h * n[2]
    # & rather than chained comparisons with `and`: the branches of the
    # latter made the loop 2.5x slower (measured on the 2-core reference machine)
    inside = (lo[0] <= q0) & (q0 <= hi[0]) & (lo[1] <= q1) & (q1 <= hi[1]) & (lo[2] <= q2) & (q2 <= hi[2])
    return (f if (hit and inside) else np.inf), q0, q1, q2


@numba.njit(inline="always")
def _face_fraction(a0, a1, bound, upper):
    """Fraction of the segment a0 -> a1 (one coordinate) where it passes
    ``bound`` (an upper face when ``upper``), clipped to [0, 1]; inf where it
    ends inside."""
    # without branches on the data (the branching form took 1.7x the time,
    # measured on the 2-core reference machine)
    beyond = (a1 > bound) if upper else (a1 < bound)
    den = a1 - a0
    t = (bound - a0) / den if den != 0.0 else 0.0
    return min(max(t, 0.0), 1.0) if beyond else np.inf


@numba.njit(cache=True)
def _plane_contact(x0, x1, radius, p, n, lo, hi, s, point):
    """:func:`_plane_touch` of each particle (the contact of one plane)."""
    for i in range(x0.shape[0]):
        s[i], point[i, 0], point[i, 1], point[i, 2] = _plane_touch(x0, x1, i, radius[i], p, n, lo, hi)


@numba.njit(cache=True)
def _face_crossing(a0, a1, bound, upper, s):
    """:func:`_face_fraction` of each segment. (One compiled pass: the numpy
    form took 0.08 ms at N = 1000.)"""
    for i in range(a0.size):
        s[i] = _face_fraction(a0[i], a1[i], bound, upper)


# The earliest event of each particle is the smallest (s, surface index): the
# first of equal fractions in surface order wins, as when the surfaces are
# taken one after the other, whatever order they are evaluated in.

def _earliest_py(x0, x1, radius, plane_index, p, n, lo, hi, face_index, face_axis, face_bound, face_upper,
                 box_lo, box_hi, best, which, point):
    """Earliest contact of each particle with the planes (rows of p, n, lo,
    hi; surface indices ``plane_index``) and the open faces (``face_*``):
    written to best (inf: none), which (-1: none), point. Returns the number
    of segments ending outside [box_lo, box_hi) (to be folded back)."""
    outside = 0
    for i in numba.prange(x0.shape[0]):
        for a in range(3):
            outside += (x1[i, a] < box_lo[a]) | (x1[i, a] >= box_hi[a])
        b = np.inf
        w = -1
        c0 = c1 = c2 = 0.0
        for k in range(plane_index.size):
            sk, q0, q1, q2 = _plane_touch(x0, x1, i, radius[i], p[k], n[k], lo[k], hi[k])
            j = plane_index[k]
            if (sk < b) | ((sk == b) & (j < w)):
                b, w, c0, c1, c2 = sk, j, q0, q1, q2
        for k in range(face_index.size):
            a = face_axis[k]
            sk = _face_fraction(x0[i, a], x1[i, a], face_bound[k], face_upper[k])
            j = face_index[k]
            if (sk < b) | ((sk == b) & (j < w)):
                b, w = sk, j
                c0 = x0[i, 0] + sk * (x1[i, 0] - x0[i, 0])
                c1 = x0[i, 1] + sk * (x1[i, 1] - x0[i, 1])
                c2 = x0[i, 2] + sk * (x1[i, 2] - x0[i, 2])
        best[i] = b
        which[i] = w
        point[i, 0] = c0
        point[i, 1] = c1
        point[i, 2] = c2
    return outside


def _merge_py(s, pt, j, best, which, point):
    """Take surface j's contacts (s, pt) where they are earlier."""
    for i in numba.prange(s.size):
        if s[i] < best[i] or (s[i] == best[i] and j < which[i]):
            best[i] = s[i]
            which[i] = j
            point[i, 0] = pt[i, 0]
            point[i, 1] = pt[i, 1]
            point[i, 2] = pt[i, 2]


_EARLIEST = serial_and_parallel(_earliest_py)
_MERGE = serial_and_parallel(_merge_py)


def earliest_events(collectors, domain, x0, x1, radius):
    """Earliest contact of each particle along x0 -> x1 with the collectors
    or the domain's outlets.

    Parameters
    ----------
    collectors : sequence of Collector
        Surfaces 0 .. K-1.
    domain : Domain
        Its outlets are surfaces K, K+1, ... in ``domain.outlets`` order.
    x0, x1 : ndarray (n, 3)
        C-contiguous float64 segment ends, m.
    radius : ndarray (n,)
        Particle radii, m.

    Returns
    -------
    s : ndarray (n,)
        Segment fraction of the earliest contact, inf for none.
    which : ndarray of int64 (n,)
        Its surface index, -1 for none (the lower index wins a tie).
    point : ndarray (n, 3)
        Its point (meaningful where ``which >= 0``), m.
    fold : bool
        Whether an end point x1 lies outside the box on a periodic or
        reflecting axis (else :meth:`Domain.fold` has nothing to do: its
        numpy masks took 0.6 ms an axis at N = 1e5).

    Plane collectors and outlets are found in one compiled pass over the
    particles (in parallel threads from ``integrators.PARALLEL_MIN``
    particles); other collectors by their ``contact`` and a compiled merge.
    Measured on the 2-core reference machine (the other core busy) at N =
    1e5, two plates and two outlets: 4.0 ms against 10.9 ms for a
    ``contact`` call per surface, numpy merging and the fold's masks.
    """
    m = x0.shape[0]
    parallel = m >= PARALLEL_MIN
    planes = [(k, c) for k, c in enumerate(collectors) if type(c) is PlaneCollector]
    faces = domain.outlets
    k0 = len(collectors)
    best = np.empty(m)
    which = np.empty(m, dtype=np.int64)
    point = np.empty((m, 3))
    folded = np.array([k != "open" for k in domain.kinds])
    outside = _EARLIEST[parallel](
        x0, x1, radius, np.array([k for k, _ in planes], dtype=np.int64),
        np.array([c.point for _, c in planes]).reshape(-1, 3), np.array([c.unit_normal for _, c in planes]).reshape(-1, 3),
        np.array([c.lo for _, c in planes]).reshape(-1, 3), np.array([c.hi for _, c in planes]).reshape(-1, 3),
        np.arange(k0, k0 + len(faces), dtype=np.int64), np.array([f[0] for f in faces], dtype=np.int64),
        np.array([domain.hi[a] if side > 0 else domain.lo[a] for a, side, _ in faces], dtype=np.float64),
        np.array([side > 0 for _, side, _ in faces], dtype=np.bool_),
        np.where(folded, domain.lo, -np.inf), np.where(folded, domain.hi, np.inf), best, which, point)
    for k, c in enumerate(collectors):
        if type(c) is not PlaneCollector:
            s, pt = c.contact(x0, x1, radius)
            _MERGE[parallel](np.ascontiguousarray(s, dtype=np.float64), np.ascontiguousarray(pt, dtype=np.float64),
                             k, best, which, point)
    return best, which, point, outside > 0


def _enter_sphere(w0, dw, reff, inside):
    """Segment fraction where |w0 + s dw| first reaches reff.

    inside=True: the gas is inside (|w| < reff), contact on leaving;
    inside=False: the gas is outside, contact on entering.
    """
    a = np.einsum("ij,ij->i", dw, dw)
    b = np.einsum("ij,ij->i", w0, dw)
    c = np.einsum("ij,ij->i", w0, w0) - reff * reff
    s = np.full(c.shape, np.inf)
    disc = b * b - a * c
    safe_a = np.where(a > 0, a, 1.0)
    root = np.sqrt(np.maximum(disc, 0.0))
    if inside:
        start = c >= 0
        t = (-b + root) / safe_a
        ok = (~start) & (a > 0) & (t <= 1.0)
    else:
        start = c <= 0
        t = (-b - root) / safe_a
        ok = (~start) & (a > 0) & (disc >= 0) & (t >= 0.0) & (t <= 1.0)
    s[start] = 0.0
    s[ok] = np.maximum(t[ok], 0.0)
    return s


class CylinderCollector(Collector):
    """An absorbing circular cylinder: a tube wall (gas inside) or a wire.

    Parameters
    ----------
    name : str
        Surface name used in deposit records.
    point : array_like of 3 floats
        A point on the axis, m.
    axis : array_like of 3 floats
        Axis direction (any length > 0).
    radius : float
        Cylinder radius, m (> 0).
    inside : bool
        True: the gas is inside (tube wall); False: outside (wire, rod).
    extent : (float, float), optional
        Axial range (along ``axis`` from ``point``), m, of the collecting
        part; None: infinite.
    area : float, optional
        Collecting area, m^2; default 2 pi R L for a finite extent, else inf.
    """

    def __init__(self, name, point, axis, radius, inside=True, extent=None, area=None):
        self.name = _name(name)
        self.point = _vector(point, "point")
        self.axis = _unit(axis, "axis")
        self.radius = _positive(radius, "radius")
        self.inside = bool(inside)
        if extent is None:
            self.extent = (-math.inf, math.inf)
        else:
            lo, hi = (float(e) for e in extent)
            if not lo < hi:
                raise ValueError(f"extent must be (lo, hi) with lo < hi, got {extent!r}")
            self.extent = (lo, hi)
        length = self.extent[1] - self.extent[0]
        self.area = _area(area, 2.0 * math.pi * self.radius * length if math.isfinite(length) else math.inf)

    def _radial(self, x):
        rel = x - self.point
        z = rel @ self.axis
        return rel - z[:, None] * self.axis, z

    def signed_distance(self, x, radius):
        w, _ = self._radial(x)
        rho = np.sqrt(np.einsum("ij,ij->i", w, w))
        return (self.radius - rho - radius) if self.inside else (rho - self.radius - radius)

    def normal(self, x):
        w, _ = self._radial(x)
        rho = np.sqrt(np.einsum("ij,ij->i", w, w))
        unit = w / np.where(rho > 0, rho, 1.0)[:, None]
        return -unit if self.inside else unit

    def contact(self, x0, x1, radius):
        w0, _ = self._radial(x0)
        w1, _ = self._radial(x1)
        reff = self.radius - radius if self.inside else self.radius + radius
        s = _enter_sphere(w0, w1 - w0, reff, self.inside)
        hit = np.isfinite(s)
        xs = x0 + np.where(hit, s, 0.0)[:, None] * (x1 - x0)
        w, z = self._radial(xs)
        rho = np.sqrt(np.einsum("ij,ij->i", w, w))
        unit = w / np.where(rho > 0, rho, 1.0)[:, None]
        point = self.point + z[:, None] * self.axis + self.radius * unit
        s[hit & ((z < self.extent[0]) | (z > self.extent[1]))] = np.inf
        return s, point

    def describe(self):
        return {"kind": "cylinder", "name": self.name, "point": self.point.copy(), "axis": self.axis.copy(),
                "radius": self.radius, "inside": int(self.inside), "extent": np.array(self.extent),
                "area": self.area}


class SphereCollector(Collector):
    """An absorbing sphere (a grounded ball, a spherical workpiece).

    Parameters
    ----------
    name : str
        Surface name used in deposit records.
    center : array_like of 3 floats
        Centre, m.
    radius : float
        Radius, m (> 0).
    inside : bool
        False (default): the gas is outside; True: inside a spherical vessel.
    """

    def __init__(self, name, center, radius, inside=False):
        self.name = _name(name)
        self.center = _vector(center, "center")
        self.radius = _positive(radius, "radius")
        self.inside = bool(inside)
        self.area = 4.0 * math.pi * self.radius ** 2

    def signed_distance(self, x, radius):
        rho = np.linalg.norm(x - self.center, axis=1)
        return (self.radius - rho - radius) if self.inside else (rho - self.radius - radius)

    def normal(self, x):
        w = x - self.center
        rho = np.linalg.norm(w, axis=1)
        unit = w / np.where(rho > 0, rho, 1.0)[:, None]
        return -unit if self.inside else unit

    def contact(self, x0, x1, radius):
        w0 = x0 - self.center
        reff = self.radius - radius if self.inside else self.radius + radius
        s = _enter_sphere(w0, x1 - x0, reff, self.inside)
        xs = x0 + np.where(np.isfinite(s), s, 0.0)[:, None] * (x1 - x0) - self.center
        rho = np.linalg.norm(xs, axis=1)
        point = self.center + self.radius * xs / np.where(rho > 0, rho, 1.0)[:, None]
        return s, point

    def describe(self):
        return {"kind": "sphere", "name": self.name, "center": self.center.copy(), "radius": self.radius,
                "inside": int(self.inside), "area": self.area}


class Domain:
    """The box the particles live in, with a boundary kind per axis.

    Parameters
    ----------
    lo, hi : array_like of 3 floats
        Box corners, m (lo < hi; +-inf allowed on open axes).
    kinds : sequence of 3 str
        Per axis "open" (crossing a finite face is an escape through an
        outlet), "periodic" (wrap) or "reflecting" (mirror the position, flip
        the velocity component). Periodic and reflecting axes need finite
        bounds.
    outlet_names : dict, optional
        Names of the open faces, keys "x-", "x+", "y-", ... (the defaults).
    """

    def __init__(self, lo=(-math.inf,) * 3, hi=(math.inf,) * 3, kinds=("open",) * 3, outlet_names=None):
        self.lo = np.asarray(lo, dtype=np.float64).reshape(-1)
        self.hi = np.asarray(hi, dtype=np.float64).reshape(-1)
        if self.lo.shape != (3,) or self.hi.shape != (3,):
            raise ValueError("lo and hi must be three numbers each")
        if np.any(np.isnan(self.lo)) or np.any(np.isnan(self.hi)) or np.any(~(self.lo < self.hi)):
            raise ValueError(f"lo must be < hi on every axis, got lo={lo!r}, hi={hi!r}")
        if isinstance(kinds, str):
            kinds = (kinds,) * 3
        kinds = tuple(kinds)
        if len(kinds) != 3 or any(k not in _KINDS for k in kinds):
            raise ValueError(f"kinds must be three of {_KINDS}, got {kinds!r}")
        self.kinds = kinds
        for a, k in enumerate(kinds):
            if k != "open" and not (math.isfinite(self.lo[a]) and math.isfinite(self.hi[a])):
                raise ValueError(f"kinds[{a}] = {k!r} needs finite lo and hi on axis {a}")
        names = {f"{c}{s}": f"{c}{s}" for c in "xyz" for s in "-+"}
        if outlet_names:
            unknown = set(outlet_names) - set(names)
            if unknown:
                raise ValueError(f"outlet_names keys must be among {sorted(names)}, got {sorted(unknown)}")
            names.update({k: str(v) for k, v in outlet_names.items()})
        # the outlets: (axis, side, name) for finite open faces
        self.outlets = []
        for a, k in enumerate(kinds):
            if k != "open":
                continue
            if math.isfinite(self.lo[a]):
                self.outlets.append((a, -1, names[f"{'xyz'[a]}-"]))
            if math.isfinite(self.hi[a]):
                self.outlets.append((a, +1, names[f"{'xyz'[a]}+"]))

    @property
    def box(self):
        """Edge lengths, m (inf on unbounded axes)."""
        return self.hi - self.lo

    def crossing(self, x0, x1, axis, side):
        """Segment fraction where the centre crosses an open face (inf: none)."""
        bound = float(self.hi[axis] if side > 0 else self.lo[axis])
        s = np.empty(x0.shape[0])
        _face_crossing(x0[:, axis], x1[:, axis], bound, side > 0, s)
        return s

    def fold(self, x, v):
        """Reflect and wrap positions (and flip velocities) in place."""
        for a, k in enumerate(self.kinds):
            if k == "open":
                continue
            lo, hi = self.lo[a], self.hi[a]
            length = hi - lo
            col = x[:, a]
            if k == "periodic":
                out = (col < lo) | (col >= hi)
                if out.any():
                    col[out] = lo + np.mod(col[out] - lo, length)
                    # mod can round up to the length itself
                    col[col >= hi] = lo
            else:
                out = (col < lo) | (col > hi)
                if out.any():
                    # fold onto [lo, hi] with the period 2 L of the mirror images
                    u = np.mod(col[out] - lo, 2.0 * length)
                    flip = u > length
                    col[out] = lo + np.where(flip, 2.0 * length - u, u)
                    # an odd number of mirror images (u > L) flips the velocity
                    idx = np.flatnonzero(out)[flip]
                    v[idx, a] = -v[idx, a]
        return x, v

    def describe(self):
        return {"lo": self.lo.copy(), "hi": self.hi.copy(), "kinds": ",".join(self.kinds),
                "outlets": ",".join(o[2] for o in self.outlets)}
