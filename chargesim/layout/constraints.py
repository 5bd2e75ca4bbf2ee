"""Where the free particles of a layout may go: free space, a sphere, a plane, a box.

Each constraint is handled exactly, never by a penalty:

* :class:`Sphere` -- the minimizer works on unconstrained points y that are
  mapped radially onto the surface, x = c + R (y - c)/|y - c|, so every
  energy it sees belongs to a point on the sphere; the gradient is pulled
  back through the map (it has no radial part).
* :class:`Plane` -- two in-plane coordinates per particle, x = p + u e1 + v e2.
* :class:`Bounds` -- an axis-aligned box the particles stay inside: the
  coordinate bounds of L-BFGS-B; at the result a coordinate held against a
  wall by the force is a constraint, not a degree of freedom.
* :class:`Free` -- no constraint.

Besides the parametrization for the minimizer each constraint gives, at a
point, an orthonormal frame per particle whose kept axes span the tangent
space (the reduced coordinates of the Hessian), the curvature term of the
constrained Hessian, and the linear conditions on a rigid motion
v(x) = omega x x + t that keep it on the constraint (to find trivial modes).
"""
import math

import numpy as np
from .._validate import vector as _vector


def _cross_rows(a):
    """Matrix M with M @ omega = omega x a (for the rigid-motion conditions)."""
    return -np.array([[0.0, -a[2], a[1]], [a[2], 0.0, -a[0]], [-a[1], a[0], 0.0]])


class Free:
    """No constraint: particles move in all three directions."""

    kind = "none"
    #: axes of the frame kept as degrees of freedom
    _keep = (True, True, True)

    def describe(self):
        """Constraint parameters (SI) for files and reports."""
        return {"kind": self.kind}

    def prepare(self, x):
        """Initial positions of the free particles on the constraint (checked)."""
        return np.array(x, dtype=np.float64)

    def project(self, x):
        """The nearest point of the constraint (for steps taken off it), m."""
        return x

    def to_vars(self, x):
        """Minimizer variables (flat) of positions x (F, 3), m."""
        return x.reshape(-1).copy()

    def from_vars(self, y):
        """Positions (F, 3) of minimizer variables y, m."""
        return y.reshape(-1, 3).copy()

    def pullback(self, y, grad):
        """Gradient with respect to the variables from the gradient in space."""
        return grad.reshape(-1).copy()

    def var_bounds(self, nfree):
        """Bounds on the variables for L-BFGS-B (None: unbounded)."""
        return None

    def frames(self, x, force):
        """Orthonormal frames (F, 3, 3), axes as columns, and the kept axes (F, 3)."""
        nf = x.shape[0]
        basis = np.broadcast_to(np.eye(3), (nf, 3, 3)).copy()
        keep = np.tile(np.array(self._keep), (nf, 1))
        return basis, keep

    def curvature(self, x, force):
        """Term added to the tangent diagonal of the Hessian, J/m^2, shape (F,)."""
        return np.zeros(x.shape[0])

    def random(self, nfree, rng, x0):
        """Random starting positions on the constraint, uniform over the
        bounding box of the given starts ``x0`` (a unit cube about them if
        they all coincide), so restarts explore the region the user chose."""
        lo, hi = x0.min(axis=0), x0.max(axis=0)
        span = np.where(hi > lo, hi - lo, max(float(np.max(hi - lo)), 1.0))
        mid = 0.5 * (lo + hi)
        return self.prepare(mid + span * (rng.random((nfree, 3)) - 0.5))

    def rigid_conditions(self, length=1.0):
        """Rows C (k, 6) with C @ (omega, t/length) = 0 for the rigid motions
        v(x) = omega x x + t that keep the constraint (lengths scaled by
        ``length``, m, for conditioning)."""
        return np.zeros((0, 6))


class Sphere(Free):
    """The surface of a sphere.

    Parameters
    ----------
    radius : float
        Radius, m (> 0).
    centre : array_like of 3 floats
        Centre, m (default the origin).
    """

    kind = "sphere"
    _keep = (True, True, False)

    def __init__(self, radius, centre=(0.0, 0.0, 0.0)):
        try:
            r = float(radius)
        except (TypeError, ValueError):
            raise ValueError(f"radius must be a positive number in m, got {radius!r}") from None
        if not math.isfinite(r) or r <= 0:
            raise ValueError(f"radius must be a finite positive number in m, got {radius!r}")
        self.radius = r
        self.centre = _vector(centre, "centre")

    def describe(self):
        return {"kind": self.kind, "radius": self.radius, "centre": self.centre.copy()}

    def prepare(self, x):
        d = np.asarray(x, dtype=np.float64) - self.centre
        norm = np.linalg.norm(d, axis=1)
        bad = np.flatnonzero(norm <= 1e-12 * self.radius)
        if bad.size:
            raise ValueError(
                f"positions: free particle {int(bad[0])} sits at the centre of the sphere, "
                "so it has no nearest point on the surface"
            )
        return self.centre + d * (self.radius / norm)[:, None]

    def project(self, x):
        d = x - self.centre
        return self.centre + d * (self.radius / np.linalg.norm(d, axis=1))[:, None]

    def from_vars(self, y):
        return self.project(y.reshape(-1, 3))

    def pullback(self, y, grad):
        d = y.reshape(-1, 3) - self.centre
        norm = np.linalg.norm(d, axis=1)
        n = d / norm[:, None]
        g = grad - n * np.sum(n * grad, axis=1)[:, None]
        return (g * (self.radius / norm)[:, None]).reshape(-1)

    def frames(self, x, force):
        n = (x - self.centre) / self.radius
        # first tangent: n x (the coordinate axis least aligned with n)
        axis = np.argmin(np.abs(n), axis=1)
        e = np.zeros_like(n)
        e[np.arange(n.shape[0]), axis] = 1.0
        t1 = np.cross(n, e)
        t1 /= np.linalg.norm(t1, axis=1)[:, None]
        t2 = np.cross(n, t1)
        basis = np.stack((t1, t2, n), axis=2)
        keep = np.tile(np.array(self._keep), (x.shape[0], 1))
        return basis, keep

    def curvature(self, x, force):
        # Hessian on the sphere = P H P - (n . grad U)/R P = P H P + (n . F)/R P:
        # a force pressing outward stiffens the surface motion
        n = (x - self.centre) / self.radius
        return np.sum(n * force, axis=1) / self.radius

    def random(self, nfree, rng, x0):
        return self.prepare(self.centre + rng.standard_normal((nfree, 3)))

    def rigid_conditions(self, length=1.0):
        # the centre stays put: omega x c + t = 0
        return np.hstack((_cross_rows(self.centre / length), np.eye(3)))


class Plane(Free):
    """A plane through ``point`` with normal ``normal``.

    Parameters
    ----------
    point : array_like of 3 floats
        A point of the plane, m.
    normal : array_like of 3 floats
        Normal direction (any length but zero).
    """

    kind = "plane"
    _keep = (True, True, False)

    def __init__(self, point=(0.0, 0.0, 0.0), normal=(0.0, 0.0, 1.0)):
        self.point = _vector(point, "point")
        n = _vector(normal, "normal", nonzero=True)
        self.normal = n / np.linalg.norm(n)
        e = np.zeros(3)
        e[np.argmin(np.abs(self.normal))] = 1.0
        e1 = np.cross(self.normal, e)
        self.e1 = e1 / np.linalg.norm(e1)
        self.e2 = np.cross(self.normal, self.e1)

    def describe(self):
        return {"kind": self.kind, "point": self.point.copy(), "normal": self.normal.copy()}

    def prepare(self, x):
        return self.project(np.asarray(x, dtype=np.float64))

    def project(self, x):
        return x - np.outer((x - self.point) @ self.normal, self.normal)

    def to_vars(self, x):
        d = x - self.point
        return np.stack((d @ self.e1, d @ self.e2), axis=1).reshape(-1)

    def from_vars(self, y):
        uv = y.reshape(-1, 2)
        return self.point + np.outer(uv[:, 0], self.e1) + np.outer(uv[:, 1], self.e2)

    def pullback(self, y, grad):
        return np.stack((grad @ self.e1, grad @ self.e2), axis=1).reshape(-1)

    def frames(self, x, force):
        nf = x.shape[0]
        basis = np.broadcast_to(np.stack((self.e1, self.e2, self.normal), axis=1), (nf, 3, 3)).copy()
        keep = np.tile(np.array(self._keep), (nf, 1))
        return basis, keep

    def random(self, nfree, rng, x0):
        # uniform over the in-plane bounding box of the given starts
        uv = self.to_vars(x0).reshape(-1, 2)
        lo, hi = uv.min(axis=0), uv.max(axis=0)
        span = np.where(hi > lo, hi - lo, max(float(np.max(hi - lo)), 1.0))
        r = (0.5 * (lo + hi) + span * (rng.random((nfree, 2)) - 0.5)).reshape(-1)
        return self.from_vars(r)

    def rigid_conditions(self, length=1.0):
        # rotations only about the normal (omega x n = 0), translations in the plane
        rows = np.hstack((-_cross_rows(self.normal), np.zeros((3, 3))))
        return np.vstack((rows, np.concatenate((np.zeros(3), self.normal))[None, :]))


class Bounds(Free):
    """An axis-aligned box the particles stay inside (walls, not periodic).

    Parameters
    ----------
    lower, upper : array_like of 3 floats
        Opposite corners, m (lower < upper on every axis).
    """

    kind = "box"

    def __init__(self, lower, upper):
        self.lower = _vector(lower, "lower")
        self.upper = _vector(upper, "upper")
        if np.any(self.upper <= self.lower):
            axis = int(np.flatnonzero(self.upper <= self.lower)[0])
            raise ValueError(
                f"bounds: upper must exceed lower on every axis; axis {axis} has "
                f"lower {self.lower[axis]!r} m and upper {self.upper[axis]!r} m"
            )

    def describe(self):
        return {"kind": self.kind, "lower": self.lower.copy(), "upper": self.upper.copy()}

    def prepare(self, x):
        x = np.asarray(x, dtype=np.float64)
        out = np.flatnonzero(np.any((x < self.lower) | (x > self.upper), axis=1))
        if out.size:
            raise ValueError(
                f"positions: free particle {int(out[0])} at {x[out[0]].tolist()} m lies outside the bounds "
                f"{self.lower.tolist()} .. {self.upper.tolist()} m"
            )
        return x.copy()

    def project(self, x):
        return np.clip(x, self.lower, self.upper)

    def var_bounds(self, nfree):
        lo = np.tile(self.lower, nfree)
        hi = np.tile(self.upper, nfree)
        return lo, hi

    def active(self, x, force):
        """Coordinates held against a wall by the force, (F, 3) bool."""
        tol = 1e-9 * (self.upper - self.lower)
        at_lo = (x - self.lower <= tol) & (force < 0)
        at_hi = (self.upper - x <= tol) & (force > 0)
        return at_lo | at_hi

    def frames(self, x, force):
        basis, _ = Free.frames(self, x, force)
        return basis, ~self.active(x, force)

    def random(self, nfree, rng, x0):
        return self.lower + (self.upper - self.lower) * rng.random((nfree, 3))

    def rigid_conditions(self, length=1.0):
        return np.eye(6)


def make(constraint=None, *, radius=None, centre=None, point=None, normal=None, bounds=None):
    """The constraint object for :func:`chargesim.layout.relax`'s arguments.

    ``constraint`` is a constraint object, None, or one of "none", "sphere",
    "plane", "box"; a radius with no constraint named means a sphere.
    """
    if isinstance(constraint, Free):
        extra = [n for n, v in (("radius", radius), ("centre", centre), ("point", point),
                                ("normal", normal), ("bounds", bounds)) if v is not None]
        if extra:
            raise ValueError(f"constraint is given as an object; do not also pass {', '.join(extra)}")
        return constraint
    if constraint is None:
        constraint = "sphere" if radius is not None else ("box" if bounds is not None else "none")
    if not isinstance(constraint, str):
        raise ValueError(f"constraint must be None, 'sphere', 'plane', 'box' or a constraint object, got {constraint!r}")
    kind = constraint.lower()
    allowed = {"none": (), "sphere": ("radius", "centre"), "plane": ("point", "normal"), "box": ("bounds",)}
    if kind not in allowed:
        raise ValueError(f"constraint {constraint!r} is not known; allowed: 'none', 'sphere', 'plane', 'box'")
    given = {"radius": radius, "centre": centre, "point": point, "normal": normal, "bounds": bounds}
    stray = [n for n, v in given.items() if v is not None and n not in allowed[kind]]
    if stray:
        raise ValueError(f"constraint {kind!r} does not take {', '.join(stray)}")
    if kind == "none":
        return Free()
    if kind == "sphere":
        if radius is None:
            raise ValueError("constraint 'sphere' needs radius= (m)")
        return Sphere(radius, (0.0, 0.0, 0.0) if centre is None else centre)
    if kind == "plane":
        return Plane((0.0, 0.0, 0.0) if point is None else point, (0.0, 0.0, 1.0) if normal is None else normal)
    if bounds is None:
        raise ValueError("constraint 'box' needs bounds=(lower, upper), two corners in m")
    try:
        lower, upper = bounds
    except (TypeError, ValueError):
        raise ValueError(f"bounds must be (lower, upper), two corners of three numbers in m, got {bounds!r}") from None
    return Bounds(lower, upper)
