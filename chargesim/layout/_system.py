"""The layout being relaxed: charges, constraint, fixed particles, applied field.

:class:`LayoutSystem` holds what does not change during a relaxation and
evaluates energy and forces of a configuration through the Coulomb front door
(``chargesim.coulomb.field_and_potential``: one pass gives both), plus the
applied field. It also gives the reduced (tangent-space) coordinates used by
the Newton polish and the stability analysis.
"""
import math
import warnings

import numpy as np
from scipy.spatial import cKDTree

from .. import coulomb
from ..coulomb import _checks
from ..physics.constants import COULOMB_K


#: A free particle farther than this many layout sizes from the start has run away.
ESCAPE_FACTOR = 100.0


class AppliedField:
    """An applied (external) field: none, uniform, or a callable.

    Parameters
    ----------
    field : None, array_like of 3 floats, callable, or object
        Uniform field vector, V/m; or ``field(points) -> (M, 3)`` in V/m; or an
        object with a ``field(points)`` method (and optionally
        ``potential(points)``).
    potential : callable, optional
        ``potential(points) -> (M,)`` in V, the potential of a callable field
        (needed for its energy; a uniform field's potential is -E.x).
    """

    def __init__(self, field=None, potential=None):
        self.uniform = None
        self._field = None
        self._potential = None
        if field is None:
            if potential is not None:
                raise ValueError("potential is given without a field")
            self.kind = "none"
            return
        if callable(field) or hasattr(field, "field"):
            self.kind = "callable"
            self._field = field if callable(field) else field.field
            pot = potential
            if pot is None and hasattr(field, "potential") and callable(getattr(field, "potential")):
                pot = field.potential
            self._potential = pot
            return
        try:
            e = np.asarray(field, dtype=np.float64).reshape(-1)
        except (TypeError, ValueError):
            raise ValueError(f"field must be a uniform vector in V/m or a callable, got {field!r}") from None
        if e.shape != (3,) or not np.all(np.isfinite(e)):
            raise ValueError(f"field must be three finite numbers in V/m (or a callable), got {field!r}")
        if potential is not None:
            raise ValueError("potential is only taken with a callable field (a uniform field's is -E.x)")
        self.kind = "uniform" if np.any(e) else "none"
        self.uniform = e

    @property
    def has_energy(self):
        """Whether the applied field's energy is known (a potential exists)."""
        return self.kind != "callable" or self._potential is not None

    def field(self, x):
        """Field at points x (M, 3), V/m."""
        if self.kind == "none":
            return np.zeros_like(x)
        if self.kind == "uniform":
            return np.broadcast_to(self.uniform, x.shape).copy()
        e = np.asarray(self._field(x), dtype=np.float64)
        if e.shape != x.shape:
            raise ValueError(f"field callable returned shape {e.shape} for {x.shape[0]} points; (M, 3) in V/m is required")
        bad = np.flatnonzero(~np.all(np.isfinite(e), axis=1))
        if bad.size:
            raise ValueError(f"field callable returned a non-finite value at point {int(bad[0])}: {x[bad[0]].tolist()} m")
        return e

    def potential(self, x):
        """Potential at points x (M,), V (NaN when not known)."""
        if self.kind == "none":
            return np.zeros(x.shape[0])
        if self.kind == "uniform":
            return -(x @ self.uniform)
        if self._potential is None:
            return np.full(x.shape[0], np.nan)
        p = np.asarray(self._potential(x), dtype=np.float64).reshape(-1)
        if p.shape != (x.shape[0],):
            raise ValueError(f"potential callable returned shape {p.shape} for {x.shape[0]} points; (M,) in V is required")
        return p

    def jacobian(self, x, h):
        """dE_a/dx_b at points x, (M, 3, 3) in V/m^2, by central differences of step h (m)."""
        if self.kind != "callable":
            return np.zeros((x.shape[0], 3, 3))
        jac = np.empty((x.shape[0], 3, 3))
        for b in range(3):
            dx = np.zeros(3)
            dx[b] = h
            jac[:, :, b] = (self.field(x + dx) - self.field(x - dx)) / (2.0 * h)
        # a static field is curl-free: keep the symmetric part (drops round-off)
        return 0.5 * (jac + np.transpose(jac, (0, 2, 1)))

    def describe(self):
        """A dict for files and reports."""
        out = {"kind": self.kind}
        if self.uniform is not None:
            out["uniform"] = self.uniform.copy()
        return out


def nearest_neighbours(x, box=None):
    """Distance (m) and index of each point's nearest other point (O(N log N))."""
    n = x.shape[0]
    if n < 2:
        return np.full(n, np.inf), np.full(n, -1, dtype=np.int64)
    if box is not None:
        tree = cKDTree(np.mod(x, box), boxsize=box)
        d, idx = tree.query(np.mod(x, box), k=2)
    else:
        tree = cKDTree(x)
        d, idx = tree.query(x, k=2)
    return d[:, 1], idx[:, 1].astype(np.int64)


class LayoutSystem:
    """Charges, constraint, fixed set and field of one relaxation.

    Parameters
    ----------
    positions : ndarray (N, 3)
        Starting positions, m (checked by the caller).
    charges : ndarray (N,)
        Charges, C.
    constraint : constraints.Free
        Where free particles may go.
    fixed : ndarray (N,) of bool
        Particles that do not move.
    box : ndarray (3,) or None
        Periodic box edges, m (periodic Coulomb sums).
    eps_r : float
        Relative permittivity of the medium.
    applied : AppliedField
        The applied field.
    method : str
        Coulomb method for the front door ("auto", "direct", ...).
    coulomb_options : dict
        Extra options passed to the front door.
    """

    def __init__(self, positions, charges, constraint, fixed, box, eps_r, applied, method, coulomb_options):
        self.x_start = positions
        self.q = charges
        self.n = charges.size
        self.constraint = constraint
        self.fixed = fixed
        self.free = np.flatnonzero(~fixed).astype(np.int64)
        self.box = box
        self.eps_r = eps_r
        self.k = COULOMB_K / eps_r
        self.applied = applied
        self.method, self.options = self._coulomb_call(method, dict(coulomb_options))
        self.evaluations = 0
        # a free particle this far from where the layout started has run away:
        # like charges with nothing to hold them have no equilibrium
        self.origin = positions.mean(axis=0)
        if constraint.kind in ("sphere", "box") or box is not None:
            self.escape_radius = math.inf
        else:
            d, _ = nearest_neighbours(positions)
            spread = float(np.max(np.linalg.norm(positions - self.origin, axis=1)))
            near = float(np.median(d[np.isfinite(d)])) if np.isfinite(d).any() else 1.0
            self.escape_radius = ESCAPE_FACTOR * (spread + near)

    def _coulomb_call(self, method, options):
        if self.box is not None:
            options["box"] = self.box
        if method != "auto":
            return method, options
        # the fast evaluators are measured against direct by their own
        # benchmarks; when one is not installed, fall back to what exists
        try:
            chosen = coulomb.method_for(self.n, **{k: v for k, v in options.items() if k != "accuracy"})
            coulomb._module(chosen)
        except ModuleNotFoundError:
            chosen = "ewald" if self.box is not None else "direct"
        if chosen == "direct":
            options.pop("accuracy", None)
            return "direct", options
        return chosen, options

    def escaped(self, x_free):
        """Indices (into the free set) of particles that ran away."""
        if not math.isfinite(self.escape_radius):
            return np.zeros(0, dtype=np.int64)
        r = np.linalg.norm(x_free - self.origin, axis=1)
        return np.flatnonzero(r > self.escape_radius)

    # -- configurations ---------------------------------------------------
    def full(self, x_free):
        """All positions (N, 3) with the free ones replaced by ``x_free``."""
        x = self.x_start.copy()
        x[self.free] = x_free
        return x

    def evaluate(self, x_all, need_energy=True):
        """Energy parts (J) and forces (N, 3 in N) of a configuration.

        Returns
        -------
        pair_energy, field_energy : float
            Coulomb pair energy and applied-field energy (NaN if unknown), J.
        forces : ndarray (N, 3)
            Total force on each particle, N.
        """
        self.evaluations += 1
        f, p = coulomb.field_and_potential(x_all, self.q, eps_r=self.eps_r, method=self.method, **self.options)
        forces = f * self.q[:, None]
        pair = 0.5 * float(np.dot(self.q, p))
        field_energy = 0.0
        if self.applied.kind != "none":
            forces = forces + self.q[:, None] * self.applied.field(x_all)
            field_energy = float(np.dot(self.q, self.applied.potential(x_all))) if need_energy else 0.0
        return pair, field_energy, forces

    def forces_only(self, x_all):
        """Total forces (N, 3), N."""
        return self.evaluate(x_all, need_energy=False)[2]

    # -- scales -------------------------------------------------------------
    def scales(self, x_all):
        """Length (m), force (N) and stiffness (J/m^2) scales of a configuration.

        The force scale is the Coulomb force between two neighbours of rms
        charge at the median nearest-neighbour distance d:
        F0 = k q_rms^2 / (eps_r d^2), or the rms applied-field force if that
        is larger; the stiffness scale is F0 / d.
        """
        d, _ = nearest_neighbours(x_all, self.box)
        finite = d[np.isfinite(d) & (d > 0)]
        if finite.size:
            length = float(np.median(finite))
        elif isinstance(getattr(self.constraint, "radius", None), float):
            length = self.constraint.radius
        else:
            length = 1.0
        qrms = math.sqrt(float(np.mean(self.q**2))) if self.n else 0.0
        f_pair = self.k * qrms**2 / length**2 if finite.size else 0.0
        f_app = 0.0
        if self.applied.kind != "none":
            fa = self.q[:, None] * self.applied.field(x_all)
            f_app = math.sqrt(float(np.mean(np.sum(fa**2, axis=1))))
        force = max(f_pair, f_app)
        if force == 0.0:
            force = 1.0
        return length, force, force / length

    # -- tangent space --------------------------------------------------------
    def frames(self, x_all, forces):
        """Frames, kept axes and reduced index of the free particles.

        Returns
        -------
        basis : ndarray (F, 3, 3)
        keep : ndarray (F, 3) bool
        index : ndarray (F, 3) int64, -1 where not kept
        """
        xf = x_all[self.free]
        basis, keep = self.constraint.frames(xf, forces[self.free])
        index = np.full(keep.shape, -1, dtype=np.int64)
        index[keep] = np.arange(int(keep.sum()))
        return basis, keep, index

    @staticmethod
    def reduce(vectors, basis, keep):
        """Reduced coordinates (m,) of per-free-particle vectors (F, 3)."""
        comps = np.einsum("fkc,fk->fc", basis, vectors)
        return comps[keep]

    @staticmethod
    def expand(w, basis, keep):
        """Per-free-particle vectors (F, 3) of reduced coordinates w (m,)."""
        comps = np.zeros(keep.shape)
        comps[keep] = w
        return np.einsum("fkc,fc->fk", basis, comps)

    def tangential(self, x_all, forces, frames=None):
        """Force components the constraint does not hold: (F, 3), N."""
        basis, keep, _ = self.frames(x_all, forces) if frames is None else frames
        return self.expand(self.reduce(forces[self.free], basis, keep), basis, keep)

    def residual(self, x_all, forces, force_scale):
        """Max tangential force over the free particles / force scale."""
        if self.free.size == 0:
            return 0.0
        t = self.tangential(x_all, forces)
        return float(np.sqrt(np.max(np.sum(t**2, axis=1)))) / force_scale


def warn_not_converged(message):
    """One warning for a relaxation that stopped short of its tolerance."""
    warnings.warn(message, RuntimeWarning, stacklevel=3)


def check_inputs(positions, charges, fixed, box, eps_r):
    """Validate relax's array arguments once; return them normalised."""
    pos = _checks.as_points(positions, "positions")
    n = pos.shape[0]
    if n == 0:
        raise ValueError("positions must hold at least one particle")
    q = _checks.as_values(charges, "charges", n)
    eps = _checks.as_eps_r(eps_r)
    bx = None if box is None else _checks.as_box(box)
    mask = np.zeros(n, dtype=bool)
    if fixed is not None:
        arr = np.asarray(fixed)
        if arr.dtype == bool:
            if arr.shape != (n,):
                raise ValueError(f"fixed as a boolean mask must have shape ({n},), got {arr.shape}")
            mask = arr.copy()
        else:
            if arr.size and not np.issubdtype(arr.dtype, np.integer):
                raise ValueError(f"fixed must be particle indices (integers) or a boolean mask, got dtype {arr.dtype}")
            idx = arr.reshape(-1).astype(np.int64)
            bad = np.flatnonzero((idx < 0) | (idx >= n))
            if bad.size:
                raise ValueError(f"fixed: index {int(idx[bad[0]])} (entry {int(bad[0])}) is out of range for {n} particles")
            mask[idx] = True
    return pos, q, mask, bx, eps
