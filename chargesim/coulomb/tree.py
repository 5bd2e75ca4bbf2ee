"""Tree evaluator for large open systems: a fast multipole method on a Morton octree.

Sources are sorted along a Morton (Z-order) curve and cut into an octree whose
leaves hold at most ``LEAF_SIZE`` particles. Each node carries its raw
Cartesian moments to order 7 about its *geometric* centre (the centre of the
bounding box of its particles; a charge-weighted centre can lie anywhere
when mixed-sign charges cancel) and its extent b (largest distance of one of
its particles from that centre). Moments come from the particles at the
leaves and are shifted up the tree (P2M, M2M); the expansion formulas are in
:mod:`chargesim.coulomb._multipoles`.

Targets are sorted by Morton code too (the sources themselves, or an octree
of their own: field grids and probe points) and handled in groups of
neighbouring targets (the largest target nodes holding at most
``GROUP_SIZE`` of them, consecutive small siblings merged), one group at a
time per thread, in a fixed order whatever the thread count. First one walk
over the target nodes above the groups (the upper nodes) takes the far
field they share: a source node far from an upper node is translated to it
once and shifted down to the groups' top nodes (L2L), instead of once per
group (1e6 uniform: a quarter of all translations were at the groups' top
nodes, each group repeating its neighbours'). The pairs it leaves at a top
node start that group's walk. For each group a dual walk pairs its target
nodes A with source nodes B:

- **local expansion** (M2L) when (r_A + b_B) < theta d, d the distance of
  the two centres and r_A, b_B their radii: the Taylor series of
  1/|R + t - s| about both centres converges with ratio below theta. It is
  kept to total order 7, so the field error of a pair falls as theta^7.
  Local expansions are shifted down to the group's leaves (L2L) and
  evaluated at each target (L2P);
- **near**, when both are leaves (or B holds at most ``DIRECT_MAX``
  particles): B's particles summed exactly at each target of the leaf
  (finite radii: the uniformly-charged-sphere kernel of the direct sum,
  a = max(R_i, R_j));
- otherwise the larger of A and B is opened.

No pair is expanded where a target sphere could overlap a source sphere.
From an asked accuracy of ``SINGLE_MIN_ACCURACY`` up, the near sums of point
charges run in single precision, twice as fast: coordinates relative to the
target leaf's centre and charges, both scaled to order 1, summed in single
precision over runs of 128 pairs and in double precision over the runs.
Each pair then carries a relative rounding of ~1e-7; a target with a pair
too close for that (``SINGLE_CLOSE``), or with an unexpected zero distance,
is summed again in double precision. Spheres are summed in single precision
too, by the sphere kernel, or by the point kernel when their radii are small
against their spacing (a pair closer than max(R_i, R_j) then counts as
close, and its target is summed again with the spheres in double).
From the same accuracy up the translations (M2L) run in single precision
too, in units of the distance of the target node's nearest source node and
of the largest charge (``SINGLE_M2L_RANGE``): 1.4x the translation rate
(1e5 uniform, single thread), with a relative rounding of the local
expansions of ~3e-7 (measured).
(An order-5 multipole evaluated per target for pairs between the two cases
was tried and dropped: at equal measured error it was no faster. So were
M2L orders chosen per pair, lower where (r_A + b_B)/d is well below theta:
at 1e5 the error they add cost as much as a larger theta would, and at equal
error they saved ~5 %. With the single-precision near sums, orders 6 and 8
at theta giving the same error as order 7 were again no faster.)

Accuracy. The worst-case bound of the truncation lies far above the typical
error, since the contributions of many pairs add with random signs, so
theta is set from the asked rms relative field error as
``theta = THETA_REF * (accuracy / 1e-3) ** THETA_EXPONENT`` with constants
calibrated on measured errors: the tests check the measured rms relative
field error against the direct sum, for uniform and clustered mixed-sign and
one-sign charges, at 1e-2, 1e-3 and 1e-4.

Memory: about 100-200 bytes per particle (sorted copies, permutation, node
geometry and moments, results); no N x N array, per-thread interaction
buffers only.
"""
import math

import numba
import numpy as np

from ..physics.constants import COULOMB_K
from . import _checks
from . import _multipoles as _mp
from . import _tree_kernels as _k

_PARENT, _AXIS = _mp.monomial_table()
_EXPO = _mp.exponent_table()
_BINOM = _mp.binomial_table()
_DIDX, _DCOEF = _mp.derivative_table()
_M2L_TERMS, _FOLD, _UNFOLD, _DERIV, _MOMENT_SCALE, _LOCAL_SCALE = _mp.m2l_table()
_M2L_ROWS = _mp.block_rows(_M2L_TERMS, _LOCAL_SCALE.size)
# the fold (raw moments -> reduced, scaled moments) is sparse: its nonzeros
_FOLD_ROWS, _FOLD_COLS = (np.ascontiguousarray(a, dtype=np.int64) for a in np.nonzero((_FOLD * _MOMENT_SCALE).T))
_FOLD_VALS = np.ascontiguousarray((_FOLD * _MOMENT_SCALE).T[_FOLD_ROWS, _FOLD_COLS])
_GRAD_ROWS = _mp.gradient_table()
_COMP_ORDER, _RED_ORDER = _mp.orders()
# the reduced moments of order o are _RED_PTR[o] .. _RED_PTR[o + 1] - 1
_RED_PTR = np.searchsorted(_RED_ORDER, np.arange(_RED_ORDER.max() + 2)).astype(np.int64)
_DCOEF32 = _DCOEF.astype(np.float32)

#: Options of this method and their defaults: ``accuracy`` is the asked rms
#: relative error of the field, sqrt(sum|E - E_exact|^2 / sum|E_exact|^2).
OPTIONS = {"accuracy": 1e-3}

#: Particles above which the tree beats the direct sum on the reference
#: machine (2-core AMD EPYC, shared), field + potential at every particle,
#: accuracy 1e-3, uniform mixed-sign charges; measured by
#: ``benchmarks/bench_tree.py --crossover-only``: direct/tree time 0.50 at
#: N = 1000, 0.89 at 1500, 1.40 at 2000, 2.13 at 3000, 4.2 at 1e4 (single-
#: precision near sums; before them 1.18 at 2000 and 1.73 at 3000); again
#: with the cheaper walks: 0.44 at 1000, 1.20 at 1500, 2.41 at 2000, 7.5 at
#: 1e4. Put at 2000, the first size measured where the tree wins clearly.
#: On the second reference machine (2-core AMD EPYC, Zen 4, AVX-512; from
#: 2026-12-02), three runs: direct/tree 0.85 / 0.96 / 1.04 at 2000, 1.47 /
#: 1.56 / 1.65 at 3000, 2.5-2.9 at 5000: a tie at 2000 (0.3 ms either way),
#: so the constant stays.
CROSSOVER = 2000

#: Most particles in a leaf of the source tree. A uniform cloud's leaves then
#: hold between 1/8 of that and all of it, depending on N. Leaves of ~10 are
#: slow (many translations per target) and less accurate: single thread,
#: uniform mixed-sign, theta 0.58, leaves of at most 64 vs 128: N = 5000
#: (leaves ~10 vs ~78) 0.10 s / err 3.1e-4 vs 0.043 s / 4.5e-5; N = 4e4
#: (~10 vs ~78) 0.47 s / 5.2e-4 vs 0.58 s / 1.2e-4; at 1e5 and 1e6 both
#: give the same leaves (~24-30). At equal error (1e5, leaves ~24) 16 took
#: 3.5x, 32 1.1x the time of 64. Again with the translations in single
#: precision and the upper walk (1e6 clustered, accuracy 1e-3, 500 sampled
#: targets): 128 / 96 / 64 took 3.90 / 3.89 / 4.40 s at errors 6.8e-4 /
#: 7.3e-4 / 7.8e-4.
LEAF_SIZE = 128
#: Most targets in a group that shares one dual walk. Within a group the walk
#: descends the target nodes, so a group can be large; 1024 keeps the walks
#: from the root few (1e5 uniform: 128 took 1.9 s, 512 1.9 s, 1024 1.7 s).
GROUP_SIZE = 1024
#: Nodes with at most this many particles are summed exactly even when far:
#: a few direct pairs cost less than one expansion.
DIRECT_MAX = 8
#: Opening angle at accuracy 1e-3, calibrated: measured rms field errors on
#: 1e5 mixed-sign charges (benchmarks/bench_tree.py's sets, 500 sampled
#: particles, leaves of up to 128, order 7) at theta 0.45 / 0.5 / 0.55 / 0.6
#: / 0.65 / 0.75: uniform 1.6e-5 / 3.9e-5 / 6.6e-5 / 1.6e-4 / 3.1e-4 /
#: 7.8e-4, clustered 1.4e-5 / 2.8e-5 / 5.9e-5 / 1.6e-4 / 3.1e-4 / 9.0e-4.
#: At 0.68 the worse set sits near 0.4 x the asked 1e-3.
THETA_REF = 0.68
#: theta = THETA_REF * (accuracy / 1e-3) ** THETA_EXPONENT: the measured
#: error falls as theta^7.6 - theta^8.1 over that range (the bound's
#: theta^ORDER, plus the random signs of many pairs).
THETA_EXPONENT = 1.0 / 8.0
#: Asked accuracies from which the near sums of point charges run in single
#: precision (float32 coordinates relative to the target leaf's centre:
#: 2.2x the pair rate of double precision on the reference machine). Their
#: rounding adds a relative error of ~1e-6 (measured), 100x below this.
SINGLE_MIN_ACCURACY = 1e-4
#: A target is summed again in double precision when one of its near pairs
#: is closer than SINGLE_CLOSE / accuracy x the target's distance |x| from
#: the leaf's centre: there the rounding of the coordinates (2^-24 of each,
#: the source's at most |x| + r from the centre, doubled again in the
#: field's 1/r^2) could reach a tenth of the asked accuracy for that pair:
#: 4 x 2^-24 |x| / r <= accuracy / 10.
SINGLE_CLOSE = 40.0 * 2.0**-24
#: From an asked accuracy of SINGLE_MIN_ACCURACY up, the translations
#: (M2L) of a target node run in single precision too (twice the lanes),
#: in units of the distance rho of its nearest source node (and charges of
#: order 1), when its farthest source node is at most SINGLE_M2L_RANGE x rho
#: away: the moments of order n, at most of order (theta x range)^n, and the
#: derivatives of 1/r, of order (1/range)^(n + 1), then stay well inside
#: single precision's range (1e+-38 against at most 1e28 and 1e-32 at order
#: 7). Otherwise the node's translations run in double precision.
SINGLE_M2L_RANGE = 1e4
#: Range of the opening angle: below 0.1 the tree degenerates into the direct
#: sum, above 0.75 the expansions converge too slowly to be controlled.
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


def _morton_sorted(points):
    """Points (N, 3) sorted by Morton code over their bounding cube.

    Returns the permutation (sorted row i is ``points[perm[i]]``), the sorted
    codes and the sorted coordinates as the rows of a (3, N) array.
    """
    x, y, z = points[:, 0], points[:, 1], points[:, 2]
    lo, edge = _k.bounds(points)
    scale = (_k._MORTON_MAX / edge) if edge > 0 else 0.0
    codes = np.empty(points.shape[0], np.int64)
    _k.morton_codes(x, y, z, lo, scale, codes)
    perm, codes = _k.sort_codes(codes)
    xyz = np.empty((3, points.shape[0]))
    _k.gather(perm, x, y, z, xyz)
    return perm, codes, xyz


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
        perm, codes, xyz = _morton_sorted(pos)
        self._perm = perm
        self._x, self._y, self._z = xyz
        self._q = q[perm]
        # charges over it are of order 1 in single precision; a power of two,
        # so that the scaling itself rounds nothing
        qmax = float(np.abs(q).max())
        self._qscale = math.ldexp(1.0, math.frexp(qmax)[1]) if qmax > 0.0 else 1.0
        self._r = np.ascontiguousarray(rad[perm]) if rad is not None else np.zeros(0)
        self._start, self._end, self._first, self._nchild = _k.build_topology(codes, self.leaf_size)
        del codes
        self._nd = np.empty((self._start.size, _k.NODE_COLS))
        _k.node_data(self._start, self._end, self._x, self._y, self._z, self._r, rad is not None, self._nd)
        raw = np.empty((self._start.size, _PARENT.size))
        _k.leaf_moments(self._start, self._end, self._nchild, self._nd, self._x, self._y, self._z, self._q, _EXPO,
                        raw)
        _k.upward_moments(self._first, self._nchild, self._nd, raw, _EXPO, _BINOM)
        self._mm = np.empty((raw.shape[0], _FOLD.shape[0]))
        _k.fold_moments(raw, _FOLD_ROWS, _FOLD_COLS, _FOLD_VALS, self._mm)
        del raw
        self._g0, self._g1 = _k.groups(self._start, self._end, self._first, self._nchild, GROUP_SIZE)

    @property
    def n_nodes(self):
        """Number of tree nodes."""
        return int(self._start.size)

    @property
    def nbytes(self):
        """Bytes held by the tree's arrays (sorted sources, nodes, permutation)."""
        arrs = (self._perm, self._x, self._y, self._z, self._q, self._r, self._start, self._end,
                self._first, self._nchild, self._nd, self._mm, self._g0, self._g1)
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
            tstart, tend, tfirst, tnchild, tnd = self._start, self._end, self._first, self._nchild, self._nd
            g0, g1 = self._g0, self._g1
        else:
            tgt = _checks.as_points(targets, "targets")
            m = tgt.shape[0]
            if m == 0:
                return (np.zeros((0, 3)) if need_field else None), (np.zeros(0) if need_potential else None)
            tperm, tcodes, (tx, ty, tz) = _morton_sorted(tgt)
            tr = np.zeros(m) if use_radii else np.zeros(0)
            tstart, tend, tfirst, tnchild = _k.build_topology(tcodes, self.leaf_size)
            del tcodes
            tnd = np.empty((tstart.size, _k.NODE_COLS))
            _k.node_data(tstart, tend, tx, ty, tz, tr, False, tnd)
            g0, g1 = _k.groups(tstart, tend, tfirst, tnchild, GROUP_SIZE)
        m = tx.size
        ex = np.empty(m)
        ey = np.empty(m)
        ez = np.empty(m)
        phi = np.empty(m)
        nzero = np.empty(m, np.int64)
        nb = _n_blocks(g0.size)
        acc = float(accuracy)
        single_rel = SINGLE_CLOSE / acc if acc >= SINGLE_MIN_ACCURACY else 0.0
        single_range = SINGLE_M2L_RANGE if acc >= SINGLE_MIN_ACCURACY else 0.0
        up_nodes, par_up, m2l_off, m2l_src, pend_off, pend_src = _k.upper_walk(
            self._nd, self._first, self._nchild, tnd, tfirst, tnchild, g0, g1, theta, int(DIRECT_MAX))
        uloc = np.empty((up_nodes.size, _LOCAL_SCALE.size))
        uhas = np.empty(up_nodes.size, np.bool_)
        old = numba.get_parallel_chunksize()
        numba.set_parallel_chunksize(1)
        try:
            _k.upper_locals(up_nodes, par_up, m2l_off, m2l_src, self._nd, self._mm, tnd, _DIDX, _DCOEF, _DCOEF32,
                            _DERIV, _M2L_ROWS, _UNFOLD, _LOCAL_SCALE, _RED_PTR, _COMP_ORDER, _EXPO, _BINOM,
                            single_range, self._qscale, uloc, uhas)
            _k.evaluate_fmm(self._start, self._end, self._first, self._nchild, self._nd, self._mm,
                            self._x, self._y, self._z, self._q, self._r, use_radii,
                            tstart, tend, tfirst, tnchild, tnd, tx, ty, tz, tr, self_targets, g0, g1,
                            theta, int(DIRECT_MAX), _DIDX, _DCOEF, _DCOEF32, _M2L_ROWS, _UNFOLD, _DERIV,
                            _LOCAL_SCALE, _RED_PTR, _COMP_ORDER, _GRAD_ROWS,
                            _EXPO, _BINOM, _PARENT, _AXIS, nb, single_rel, single_range,
                            self._qscale, up_nodes, par_up, uloc, uhas, pend_off, pend_src,
                            bool(need_potential), ex, ey, ez, phi, nzero)
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
