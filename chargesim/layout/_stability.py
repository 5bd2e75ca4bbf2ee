"""Hessian of a layout's energy on its constraint, and its eigenvalues.

The Hessian lives in the reduced coordinates of the free particles (the kept
axes of each particle's tangent frame, see :mod:`.constraints`):

    H_red = B^T (H_pair + H_field) B + diag(curvature),

with H_pair the analytic Coulomb pair Hessian (numba, :mod:`._kernels`) for
open systems, or central differences of the front door's forces in a periodic
box; H_field = -q dE/dx of the applied field (central differences of the
field callable, zero for a uniform field); and the curvature term of the
sphere, (n . F)/R per tangent axis.

Trivial modes -- the rigid motions that keep constraint, fixed particles and
applied field unchanged (rotations on a sphere, translations and rotations in
free space, in-plane motions on a plane) -- are found from the linear
conditions on v(x) = omega x x + t, then deflated (shifted above the
spectrum) so the eigenvalues reported are those of the other modes.

Size limit: the dense Hessian is used up to :data:`DENSE_LIMIT` reduced
coordinates (3000: 72 MB of float64, about 1000 particles on a sphere);
above it only the ``n_lowest`` smallest eigenvalues are computed by Lanczos
iteration (``scipy.sparse.linalg.eigsh``) on matrix-free Hessian-vector
products, memory O(N).
"""
import math
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg
import scipy.sparse.linalg as spla

from ._kernels import hessian_vector, reduced_hessian

#: Largest number of reduced coordinates for the dense Hessian (72 MB).
DENSE_LIMIT = 3000
#: Periodic boxes build a dense Hessian from force differences (2 force
#: evaluations per column) only up to this many reduced coordinates.
DENSE_FD_LIMIT = 600


@dataclass
class Stability:
    """Eigenvalues of the constrained Hessian at a layout.

    Attributes
    ----------
    eigenvalues : ndarray
        Eigenvalues of the non-trivial modes, ascending, J/m^2 (all of them
        when ``complete``, else the lowest few).
    trivial_eigenvalues : ndarray
        Curvature along each trivial mode (Rayleigh quotient), J/m^2: zero up
        to round-off and the residual force.
    n_trivial, n_unstable, n_soft : int
        Trivial modes; modes with eigenvalue below ``-zero_tolerance *
        stiffness_scale``; modes from there up to ``soft_tolerance *
        stiffness_scale``.
    unstable_eigenvalues, soft_eigenvalues : ndarray
        Those eigenvalues, J/m^2.
    modes : ndarray (k, N, 3)
        Unit displacement pattern of the k lowest non-trivial modes ("1";
        zero rows for fixed particles).
    stiffness_scale : float
        k q_rms^2 / (eps_r d^3) at the median neighbour distance d, J/m^2.
    dimension : int
        Number of reduced coordinates (degrees of freedom).
    complete : bool
        Whether every eigenvalue was computed (dense Hessian).
    method : str
        "dense", "lanczos" or "none" (no degrees of freedom).
    """

    eigenvalues: np.ndarray
    trivial_eigenvalues: np.ndarray
    n_trivial: int
    n_unstable: int
    n_soft: int
    unstable_eigenvalues: np.ndarray
    soft_eigenvalues: np.ndarray
    modes: np.ndarray
    stiffness_scale: float
    zero_tolerance: float
    soft_tolerance: float
    dimension: int
    complete: bool
    method: str
    notes: list = field(default_factory=list)

    @property
    def stable(self):
        """No unstable mode among those computed (soft modes allowed)."""
        return self.n_unstable == 0


class HessianModel:
    """The constrained Hessian of a layout at one configuration.

    Parameters
    ----------
    system : LayoutSystem
    x_all : ndarray (N, 3)
        Configuration, m.
    forces : ndarray (N, 3)
        Total forces there, N.
    length : float
        Length scale, m (finite-difference steps).
    """

    def __init__(self, system, x_all, forces, length):
        self.system = system
        self.x = np.ascontiguousarray(x_all)
        self.length = length
        self.basis, self.keep, self.index = system.frames(x_all, forces)
        self.m = int(self.keep.sum())
        free = system.free
        xf = x_all[free]
        curv = system.constraint.curvature(xf, forces[free])
        self.curv = np.broadcast_to(curv[:, None], self.keep.shape)[self.keep].copy()
        self.analytic = system.box is None
        self.field_blocks = None
        if self.analytic and system.applied.kind == "callable":
            jac = system.applied.jacobian(xf, 1e-5 * length)
            hb = -system.q[free][:, None, None] * jac
            self.field_blocks = np.einsum("fka,fkl,flb->fab", self.basis, hb, self.basis)

    # -- products -----------------------------------------------------------
    def _pair_product(self, w):
        sysm = self.system
        v = np.zeros((sysm.n, 3))
        v[sysm.free] = sysm.expand(w, self.basis, self.keep)
        if self.analytic:
            out = np.empty((sysm.n, 3))
            hessian_vector(self.x, sysm.q, v, out)
            hv = sysm.k * out[sysm.free]
        else:
            # central difference of the total force (pair and applied field)
            scale = float(np.max(np.abs(v))) or 1.0
            h = 1e-4 * self.length / scale
            fp = sysm.forces_only(self.x + h * v)
            fm = sysm.forces_only(self.x - h * v)
            hv = -(fp - fm)[sysm.free] / (2.0 * h)
        return sysm.reduce(hv, self.basis, self.keep)

    def matvec(self, w):
        """H_red @ w (J/m^2 times m), matrix-free, memory O(N)."""
        out = self._pair_product(w) + self.curv * w
        if self.field_blocks is not None:
            comps = np.zeros(self.keep.shape)
            comps[self.keep] = w
            out += np.einsum("fab,fb->fa", self.field_blocks, comps)[self.keep]
        return out

    def dense(self):
        """The dense H_red, (m, m), J/m^2 (see :data:`DENSE_LIMIT`)."""
        m = self.m
        sysm = self.system
        if self.analytic:
            h = np.zeros((m, m))
            reduced_hessian(self.x, sysm.q, sysm.free, self.basis, self.index, h)
            h *= sysm.k
            if self.field_blocks is not None:
                ir = self.index[:, :, None]
                ic = self.index[:, None, :]
                ok = (ir >= 0) & (ic >= 0)
                rows = np.broadcast_to(ir, ok.shape)[ok]
                cols = np.broadcast_to(ic, ok.shape)[ok]
                h[rows, cols] += self.field_blocks[ok]
            h[np.arange(m), np.arange(m)] += self.curv
        else:
            h = np.empty((m, m))
            e = np.zeros(m)
            for c in range(m):
                e[c] = 1.0
                h[:, c] = self.matvec(e)
                e[c] = 0.0
        h += h.T  # symmetrize in place (round-off of the two triangles)
        h *= 0.5
        return h

    def dense_allowed(self):
        return self.m <= (DENSE_LIMIT if self.analytic else DENSE_FD_LIMIT)


def trivial_modes(system, x_all, model, length):
    """Orthonormal reduced vectors (m, d) of the trivial modes at x_all."""
    if model.m == 0:
        return np.zeros((0, 0))
    rows = [system.constraint.rigid_conditions(length)]
    cross = _cross_matrix
    if system.box is not None:
        rows.append(np.hstack((np.eye(3), np.zeros((3, 3)))))  # no rotation of a lattice
    ap = system.applied
    if ap.kind == "uniform":
        e = ap.uniform / np.linalg.norm(ap.uniform)
        rows.append(np.hstack((cross(e), np.zeros((3, 3)))))  # rotations about the field axis only
    elif ap.kind == "callable":
        rows.append(np.eye(6))  # no symmetry assumed of an arbitrary field
    fixed = np.flatnonzero(system.fixed)
    if fixed.size:
        xf = x_all[fixed] / length
        blocks = np.concatenate([np.hstack((cross(p), np.eye(3))) for p in xf], axis=0)
        rows.append(blocks)
    cond = np.vstack(rows)
    if cond.shape[0]:
        _, s, vt = np.linalg.svd(cond)
        s_full = np.zeros(6)
        s_full[: s.size] = s
        null = vt[s_full <= 1e-9 * max(1.0, s_full.max())]
    else:
        null = np.eye(6)
    if null.shape[0] == 0:
        return np.zeros((model.m, 0))
    xs = x_all[system.free] / length
    vecs = []
    for g in null:
        v = np.cross(g[:3], xs) + g[3:]
        vecs.append(system.reduce(v, model.basis, model.keep))
    mat = np.stack(vecs, axis=1)
    u, s, _ = np.linalg.svd(mat, full_matrices=False)
    # absolute threshold in units of the length scale: a generator that moves
    # no free particle by more than 1e-6 d per radian is no mode (a spin
    # about an axis the free particles sit on)
    return u[:, s > 1e-6]


def _cross_matrix(a):
    # M @ omega = omega x a
    return -np.array([[0.0, -a[2], a[1]], [a[2], 0.0, -a[0]], [-a[1], a[0], 0.0]])


def _deflated_dense(h, q):
    """H with the trivial subspace Q projected out and shifted above the spectrum.

    (I - QQ^T) H (I - QQ^T) + sigma QQ^T, formed in place as
    H - Q B^T - B Q^T with B = HQ - Q (Q^T H Q)/2 - sigma Q/2, so that only
    one m x m temporary exists at a time. ``h`` is overwritten.
    """
    if q.shape[1] == 0:
        return h, 0.0
    hq = h @ q
    qhq = q.T @ hq
    # Gershgorin bound of the spectrum: the shift puts trivial modes above it
    sigma = 2.0 * float(np.max(np.sum(np.abs(h), axis=1))) + 1.0
    b = hq - 0.5 * (q @ qhq) - 0.5 * sigma * q
    h -= q @ b.T
    h -= b @ q.T
    return h, sigma


def analyse(system, x_all, forces, length, stiffness, *, method="auto", n_lowest=6,
            zero_tolerance=1e-6, soft_tolerance=1e-3):
    """Stability of a layout at ``x_all``: a :class:`Stability`.

    Parameters
    ----------
    system : LayoutSystem
    x_all : ndarray (N, 3)
        Configuration, m.
    forces : ndarray (N, 3)
        Forces there, N.
    length : float
        Length scale, m.
    stiffness : float
        Stiffness scale, J/m^2 (soft and unstable thresholds are relative to it).
    method : str
        "auto" (dense up to the size limit, else Lanczos), "dense" or "lanczos".
    n_lowest : int
        Eigenvalues computed by Lanczos, and modes returned.
    zero_tolerance, soft_tolerance : float
        Relative thresholds for unstable and soft modes.
    """
    model = HessianModel(system, x_all, forces, length)
    m = model.m
    n = system.n
    if m == 0:
        empty = np.zeros(0)
        return Stability(empty, empty, 0, 0, 0, empty, empty, np.zeros((0, n, 3)), stiffness,
                         zero_tolerance, soft_tolerance, 0, True, "none")
    q = trivial_modes(system, x_all, model, length)
    d = q.shape[1]
    if method == "auto":
        method = "dense" if model.dense_allowed() else "lanczos"
    if method not in ("dense", "lanczos"):
        raise ValueError(f"stability method must be 'auto', 'dense' or 'lanczos', got {method!r}")
    notes = []
    k_modes = min(n_lowest, m - d)
    if method == "dense":
        h = model.dense()
        triv = np.einsum("ij,ik,kj->j", q, h, q) if d else np.zeros(0)
        hp, _ = _deflated_dense(h, q)
        del h
        # all eigenvalues by divide and conquer (the fastest LAPACK driver for
        # values only), then the few lowest modes by shift-invert Lanczos
        # from just below the spectrum: one LU instead of a second full
        # decomposition (measured: 2.5x less time at m = 2000)
        values = scipy.linalg.eigh(hp, eigvals_only=True, driver="evd")[: m - d]
        if k_modes > 0 and m - d > k_modes + 1:
            spread = float(values[-1] - values[0]) or 1.0
            _, vecs = spla.eigsh(hp, k=k_modes, sigma=float(values[0]) - 1e-3 * spread, which="LM")
            vecs = vecs[:, np.argsort(np.einsum("ij,ik,kj->j", vecs, hp, vecs))]
        elif k_modes > 0:
            _, vecs = scipy.linalg.eigh(hp, subset_by_index=[0, k_modes - 1])
        else:
            vecs = np.zeros((m, 0))
        complete = True
    else:
        triv = np.array([q[:, j] @ model.matvec(q[:, j]) for j in range(d)])

        def proj(w):
            return w - q @ (q.T @ w) if d else w

        top = spla.eigsh(spla.LinearOperator((m, m), matvec=lambda w: model.matvec(proj(w)), dtype=float),
                         k=1, which="LA", tol=1e-3, return_eigenvectors=False)
        sigma = 2.0 * abs(float(top[0])) + stiffness

        def op(w):
            pw = proj(w)
            out = proj(model.matvec(pw))
            return out + sigma * (w - pw) if d else out

        k = max(1, min(n_lowest, m - d - 1)) if m - d > 1 else 1
        # Lanczos (one vector per step) can miss a copy of a degenerate
        # eigenvalue: ask for twice as many (at least 4 more) than are kept,
        # from a fixed start vector, so the result is the same on any machine
        k_ask = min(max(2 * k, k + 4), m - 1)
        lin = spla.LinearOperator((m, m), matvec=op, dtype=float)
        v0 = np.random.default_rng(0).standard_normal(m)
        try:
            values, vecs = spla.eigsh(lin, k=k_ask, which="SA", tol=1e-9, maxiter=max(1000, 20 * m), v0=v0)
        except spla.ArpackNoConvergence as exc:
            values, vecs = exc.eigenvalues, exc.eigenvectors
            notes.append(f"Lanczos iteration converged {values.size} of {k} eigenvalues")
        order = np.argsort(values)[:k]
        values, vecs = values[order], vecs[:, order]
        k_modes = min(k_modes, values.size)
        vecs = vecs[:, :k_modes]
        complete = False
    unstable = values[values < -zero_tolerance * stiffness]
    soft = values[(values >= -zero_tolerance * stiffness) & (values < soft_tolerance * stiffness)]
    modes = np.zeros((vecs.shape[1], n, 3))
    for j in range(vecs.shape[1]):
        modes[j, system.free] = system.expand(vecs[:, j], model.basis, model.keep)
    return Stability(
        eigenvalues=np.asarray(values, dtype=float),
        trivial_eigenvalues=np.asarray(triv, dtype=float),
        n_trivial=d,
        n_unstable=int(unstable.size),
        n_soft=int(soft.size),
        unstable_eigenvalues=unstable,
        soft_eigenvalues=soft,
        modes=modes,
        stiffness_scale=float(stiffness),
        zero_tolerance=float(zero_tolerance),
        soft_tolerance=float(soft_tolerance),
        dimension=m,
        complete=complete,
        method=method,
        notes=notes,
    )


def newton_step(model, gradient, trivial, stiffness):
    """Newton step w solving H w = -g off the trivial modes (reduced, m)."""
    m = model.m
    d = trivial.shape[1]
    if model.dense_allowed():
        h = model.dense()
        if d:
            h += stiffness * (trivial @ trivial.T)  # lifts the trivial modes off zero
        try:
            return np.linalg.solve(h, -gradient)
        except np.linalg.LinAlgError:
            return np.linalg.lstsq(h, -gradient, rcond=None)[0]

    def op(w):
        out = model.matvec(w)
        return out + stiffness * (trivial @ (trivial.T @ w)) if d else out

    lin = spla.LinearOperator((m, m), matvec=op, dtype=float)
    w, _ = spla.minres(lin, -gradient, rtol=1e-10, maxiter=max(200, int(4 * math.sqrt(m)) * 10))
    return w
