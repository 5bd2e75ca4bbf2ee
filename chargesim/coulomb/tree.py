"""Tree evaluator: Barnes–Hut with octupole expansions for large open systems.

Sources are sorted along a Morton (Z-order) curve and cut into an octree whose
leaves hold at most ``LEAF_SIZE`` particles. Each node carries its monopole,
dipole, traceless quadrupole and traceless octupole moments about its
*geometric* centre (the centre of the bounding box of its particles; a
charge-weighted centre can lie anywhere when mixed-sign charges cancel) and
its extent b (largest distance of one of its particles from that centre).

Targets are sorted by Morton code too and evaluated in groups of neighbouring
targets (the largest nodes of the targets' own octree holding at most
``GROUP_SIZE`` of them, consecutive small siblings merged up to that size):
one walk of the source tree per group gives its
interaction lists (its near particles gathered into one contiguous run),
which every target of the group then sums in vectorised loops, in the same
fixed order whatever the thread count.

Opening criterion. A node is used as a multipole for a group when every
point of the group's bounding box (so every target of the group) is at
distance d >= b / theta from the node's centre
(and no target sphere can overlap a source sphere of the node). For one
source at distance <= b from the centre the remainder of the Legendre series
after order p = 3 is bounded by (b/d)^(p+1) / (d - b); summed over the node
the truncation error of the field is of order

    |dE| <~ A / d^2 * theta^(p+1) / (1 - theta)^2,   A = sum_j |q_j|,

(Salmon & Warren 1994 give the precise constant; from memory). So the error
falls as theta^4, and theta is set from the asked rms relative accuracy as
``theta = THETA_REF * (accuracy / 1e-3) ** THETA_EXPONENT`` (1/4.5: the
measured error falls somewhat faster than the bound). The worst-case bound is
far above the typical error (contributions of many nodes add with random
signs), so ``THETA_REF`` is calibrated: the tests check the measured rms
relative field error against the direct sum, for uniform and clustered
mixed-sign and one-sign charges, at 1e-2, 1e-3 and 1e-4. Nodes with at most
``DIRECT_MAX`` particles and all leaves that fail the criterion are summed
exactly (finite radii: the uniformly-charged-sphere kernel of the direct
sum, a = max(R_i, R_j)).

Memory: about 200 bytes per particle (sorted copies, permutations, nodes,
sorted results); no N x N array, per-thread interaction buffers only.
"""
import numba
import numpy as np

from ..physics.constants import COULOMB_K
from . import _checks
from . import _multipoles as _mp
from . import _tree_kernels as _k

_PARENT, _AXIS = _mp.monomial_table(_mp.LOCAL_ORDER)
_SHIFT_IDX, _SHIFT_COEF = _mp.shift_table(_mp.LOCAL_ORDER)
_RAW_TO_STORED_T = np.ascontiguousarray(_mp.raw_to_stored().T)
_DIDX, _DCOEF = _mp.derivative_table()
_M2L_ROWS, _MOMENT_SCALE, _LOCAL_SCALE = _mp.m2l_table()
_GRAD_ROWS = _mp.gradient_table()

#: Options of this method and their defaults: ``accuracy`` is the asked rms
#: relative error of the field, sqrt(sum|E - E_exact|^2 / sum|E_exact|^2).
OPTIONS = {"accuracy": 1e-3}

#: Particles above which the tree beats the direct sum on the reference
#: machine (2-core AMD EPYC, shared), field + potential at every particle,
#: accuracy 1e-3, uniform mixed-sign charges; measured by
#: ``benchmarks/bench_tree.py --crossover-only``: direct/tree time 0.74 at
#: N = 500, 1.07 at 700, 1.28 at 1000 (1.0 ms vs 0.79 ms; 1.04-1.37 over
#: three runs), 1.8 at 2000, 3.0 at 5000, 7 at 20000. Put at 1000, where the
#: tree is faster in every run.
CROSSOVER = 1000

#: Most particles in a leaf of the source tree.
LEAF_SIZE = 64
#: Most targets in a group that shares one walk of the tree (the largest
#: tree nodes below this size, runs of small siblings merged up to it: in a
#: uniform cloud one octree level often holds only ~25 points, and 4x fewer
#: walks pay more than the slightly larger group boxes cost).
GROUP_SIZE = 128
#: Nodes with at most this many particles are summed exactly even when far:
#: a few direct pairs cost less than one multipole evaluation.
DIRECT_MAX = 4
#: Opening angle at accuracy 1e-3 (calibrated, see the module docstring:
#: with leaves of 64 and merged groups of 128, measured rms errors on 1e5
#: mixed-sign charges, 1000 sampled particles, seeds 1-3 of
#: benchmarks/bench_tree.py's sets: uniform 1.4-3.4e-4, clustered 0.9-4.7e-4
#: at 1e-3; at 1e-4 at most 0.29 x accuracy, at 1e-2 (theta clipped to 0.75)
#: at most 0.43 x. At 0.44 the worst clustered set reached 0.56 x: the
#: error grows faster than theta^4 there, so 0.42 keeps a 2x margin.)
THETA_REF = 0.42
#: theta = THETA_REF * (accuracy / 1e-3) ** THETA_EXPONENT: the measured
#: error falls faster than the theta^(ORDER+1) of the bound (at 1e-4 with
#: 1/4 it sat at <= 0.29 x accuracy), so the step is 1/4.5: same sets as
#: THETA_REF, at 1e-4 (theta 0.252) uniform 0.16-0.37 x, clustered
#: 0.08-0.45 x; at 1e-2 (theta 0.70) at most 0.25 x.
THETA_EXPONENT = 1.0 / 4.5
#: Expansion order, 2 (quadrupole) or 3 (octupole): the error falls as
#: theta ** (ORDER + 1); at equal error the octupole is the faster.
ORDER = 3
#: Range of the opening angle: below 0.1 the tree degenerates into the direct
#: sum, above 0.75 the expansion converges too slowly to be controlled.
THETA_RANGE = (0.1, 0.75)


def theta_for(accuracy):
    """Opening angle for an asked rms relative field error.

    Parameters
    ----------
    accuracy : float
        Asked rms relative error of the field (dimensionless, > 0).

    Returns
    -------
    float
        theta (dimensionless), ``THETA_REF * (accuracy / 1e-3) ** THETA_EXPONENT``
        clipped to ``THETA_RANGE``.
    """
    acc = _checks.positive(accuracy, "accuracy")
    th = THETA_REF * (acc / 1e-3) ** THETA_EXPONENT
    return float(min(max(th, THETA_RANGE[0]), THETA_RANGE[1]))


def _soa(points):
    t = np.ascontiguousarray(points.T)
    return t[0], t[1], t[2]


def _morton_order(x, y, z):
    """Permutation sorting points by Morton code over their bounding cube."""
    lo = np.array([x.min(), y.min(), z.min()])
    edge = max(x.max() - lo[0], y.max() - lo[1], z.max() - lo[2])
    scale = (_k._MORTON_MAX / edge) if edge > 0 else 0.0
    codes = np.empty(x.size, np.int64)
    _k.morton_codes(x, y, z, lo, scale, codes)
    perm = np.argsort(codes, kind="stable")
    return perm, codes[perm]


def _n_blocks(n_groups):
    # many more blocks than threads, handed out one at a time, so clustered
    # targets (groups of very different cost) still share the work evenly
    return max(1, min(n_groups, 64 * numba.get_num_threads()))


class Tree:
    """An octree over charged particles, built once, evaluated at many target sets.

    Parameters
    ----------
    sources : array_like, shape (N, 3)
        Source positions, m.
    charges : array_like, shape (N,)
        Source charges, C.
    radii : array_like, shape (N,), optional
        Particle radii, m (>= 0): overlapping pairs interact as uniformly
        charged spheres (a = max(R_i, R_j)). None: point charges.
    leaf_size : int
        Most particles in a leaf (>= 1).

    Notes
    -----
    :meth:`evaluate` returns the sums without k/eps_r (the method contract of
    :mod:`chargesim.coulomb`); :meth:`field` and :meth:`potential` return
    V/m and V.
    """

    def __init__(self, sources, charges, radii=None, *, leaf_size=LEAF_SIZE):
        pos = _checks.as_points(sources, "sources")
        n = pos.shape[0]
        if n == 0:
            raise ValueError("sources must hold at least one particle")
        q = _checks.as_values(charges, "charges", n)
        rad = None if radii is None else _checks.as_values(radii, "radii", n, nonnegative=True)
        if int(leaf_size) < 1:
            raise ValueError(f"leaf_size must be an integer >= 1, got {leaf_size!r}")
        self.leaf_size = int(leaf_size)
        self.n = n
        self._pos = pos
        self._radii = rad
        x, y, z = _soa(pos)
        perm, codes = _morton_order(x, y, z)
        self._perm = perm
        self._x = np.ascontiguousarray(x[perm])
        self._y = np.ascontiguousarray(y[perm])
        self._z = np.ascontiguousarray(z[perm])
        self._q = np.ascontiguousarray(q[perm])
        self._r = np.ascontiguousarray(rad[perm]) if rad is not None else np.zeros(0)
        self._start, self._end, self._first, self._nchild = _k.build_topology(codes, self.leaf_size)
        del codes
        self._nd = np.empty((self._start.size, _k.NODE_COLS))
        _k.node_data(self._start, self._end, self._x, self._y, self._z, self._r, rad is not None, self._nd)
        raw = np.empty((self._start.size, _PARENT.size))
        _k.leaf_moments(self._start, self._end, self._nchild, self._nd, self._x, self._y, self._z, self._q,
                        _PARENT, _AXIS, raw)
        _k.upward_moments(self._first, self._nchild, self._nd, raw, _PARENT, _AXIS, _SHIFT_IDX, _SHIFT_COEF)
        self._mom = raw[:, : _mp.NCOMP] @ _RAW_TO_STORED_T
        self._mm = raw * _MOMENT_SCALE
        del raw
        self._leaf_start, self._leaf_end = _k.groups(self._start, self._end, self._first, self._nchild,
                                                     GROUP_SIZE)
        self._leaf_geom = np.empty((self._leaf_start.size, 7))
        _k.group_geometry(self._leaf_start, self._leaf_end, self._x, self._y, self._z, self._r,
                          rad is not None, self._leaf_geom)

    @property
    def n_nodes(self):
        """Number of tree nodes."""
        return int(self._start.size)

    @property
    def nbytes(self):
        """Bytes held by the tree's arrays (sorted sources, nodes, permutation)."""
        arrs = (self._perm, self._x, self._y, self._z, self._q, self._r, self._start, self._end,
                self._first, self._nchild, self._nd, self._mom, self._mm, self._leaf_start, self._leaf_end, self._leaf_geom)
        return int(sum(a.nbytes for a in arrs))

    def evaluate(self, targets=None, *, need_field=True, need_potential=True, accuracy=OPTIONS["accuracy"]):
        """Field and potential sums at targets, without the factor k/eps_r.

        Parameters
        ----------
        targets : array_like, shape (M, 3), optional
            Target points, m. None: at each source, excluding itself.
        need_field, need_potential : bool
            Which results to return.
        accuracy : float
            Asked rms relative error of the field (dimensionless).

        Returns
        -------
        field : ndarray (M, 3) or None
            sum_j q_j (x_i - x_j)/r^3, C/m^2.
        potential : ndarray (M,) or None
            sum_j q_j / r, C/m.
        """
        theta = theta_for(accuracy)
        self_targets = targets is None
        use_radii = self._radii is not None
        if self_targets:
            tx, ty, tz, tr = self._x, self._y, self._z, self._r
            tperm = self._perm
            gstart, gend, gc = self._leaf_start, self._leaf_end, self._leaf_geom
        else:
            tgt = _checks.as_points(targets, "targets")
            m = tgt.shape[0]
            if m == 0:
                return (np.zeros((0, 3)) if need_field else None), (np.zeros(0) if need_potential else None)
            x, y, z = _soa(tgt)
            tperm, tcodes = _morton_order(x, y, z)
            tx = np.ascontiguousarray(x[tperm])
            ty = np.ascontiguousarray(y[tperm])
            tz = np.ascontiguousarray(z[tperm])
            del x, y, z
            tr = np.zeros(m) if use_radii else np.zeros(0)
            s, e, fc, nch = _k.build_topology(tcodes, self.leaf_size)
            del tcodes
            gstart, gend = _k.groups(s, e, fc, nch, GROUP_SIZE)
            gc = np.empty((gstart.size, 7))
            _k.group_geometry(gstart, gend, tx, ty, tz, tr, False, gc)
        m = tx.size
        ex = np.empty(m)
        ey = np.empty(m)
        ez = np.empty(m)
        phi = np.empty(m)
        nzero = np.empty(m, np.int64)
        nb = _n_blocks(gstart.size)
        old = numba.get_parallel_chunksize()
        numba.set_parallel_chunksize(1)
        try:
            _k.evaluate_groups(self._start, self._end, self._first, self._nchild, self._nd, self._mom, self._mm,
                               self._x, self._y, self._z, self._q, self._r, use_radii,
                               tx, ty, tz, tr, self_targets, gstart, gend, gc, theta, int(DIRECT_MAX),
                               _DIDX, _DCOEF, _M2L_ROWS, _LOCAL_SCALE, _GRAD_ROWS, _PARENT, _AXIS,
                               nb, ex, ey, ez, phi, nzero)
        finally:
            numba.set_parallel_chunksize(old)
        allowed = 1 if (self_targets and not use_radii) else 0
        if nzero.max() > allowed:
            self._raise_coincident(nzero > allowed, tperm, None if self_targets else targets)
        field = np.empty((m, 3)) if need_field else np.empty((0, 3))
        pot = np.empty(m) if need_potential else np.empty(0)
        _k.scatter(tperm, ex, ey, ez, phi, field, pot, need_field, need_potential)
        return (field if need_field else None), (pot if need_potential else None)

    def _raise_coincident(self, bad_sorted, tperm, targets):
        """Raise the front door's error for the first (lowest-index) coincident target."""
        i = int(tperm[bad_sorted].min())
        if targets is None:
            p = self._pos[i]
            same = np.all(self._pos == p, axis=1)
            same[i] = False
            if self._radii is not None:
                same &= np.maximum(self._radii, self._radii[i]) == 0.0
            j = int(np.flatnonzero(same)[0])
            raise _checks.coincident(i, j, True)
        p = np.asarray(targets, dtype=np.float64)[i]
        same = np.all(self._pos == p, axis=1)
        if self._radii is not None:
            same &= self._radii == 0.0
        raise _checks.coincident(i, int(np.flatnonzero(same)[0]), False)

    def field(self, targets=None, *, eps_r=1.0, accuracy=OPTIONS["accuracy"]):
        """Electric field at targets, V/m, shape (M, 3).

        Parameters
        ----------
        targets : array_like, shape (M, 3), optional
            Target points, m; None: at each source from all the others.
        eps_r : float
            Relative permittivity of the medium (>= 1).
        accuracy : float
            Asked rms relative error of the field (dimensionless).
        """
        eps = _checks.as_eps_r(eps_r)
        f, _ = self.evaluate(targets, need_field=True, need_potential=False, accuracy=accuracy)
        return f * (COULOMB_K / eps)

    def potential(self, targets=None, *, eps_r=1.0, accuracy=OPTIONS["accuracy"]):
        """Electric potential at targets, V, shape (M,); parameters as :meth:`field`."""
        eps = _checks.as_eps_r(eps_r)
        _, p = self.evaluate(targets, need_field=False, need_potential=True, accuracy=accuracy)
        return p * (COULOMB_K / eps)


def evaluate(sources, charges, targets, radii, *, need_field=True, need_potential=True,
             accuracy=OPTIONS["accuracy"]):
    """Tree sums of field and potential, without the factor k/eps_r (method contract).

    Parameters
    ----------
    sources : ndarray, shape (N, 3)
        Source positions, m (checked by the front door).
    charges : ndarray, shape (N,)
        Source charges, C.
    targets : ndarray, shape (M, 3), or None
        Target points, m; None means at each source, excluding itself.
    radii : ndarray, shape (N,), or None
        Particle radii, m; None for point charges.
    need_field, need_potential : bool
        Which results to return.
    accuracy : float
        Asked rms relative error of the field,
        sqrt(sum_i |E_i - E_exact,i|^2 / sum_i |E_exact,i|^2) (dimensionless).

    Returns
    -------
    field : ndarray (M, 3) or None
        sum_j q_j (x_i - x_j)/r^3, C/m^2.
    potential : ndarray (M,) or None
        sum_j q_j / r, C/m.
    """
    tree = Tree(sources, charges, radii)
    return tree.evaluate(targets, need_field=need_field, need_potential=need_potential, accuracy=accuracy)
