"""The tree evaluator against the direct sum, fmm3dpy and exact results.

The error measure throughout is the rms relative error of the field over the
checked targets,

    err = sqrt(sum_i |E_i - E_ref,i|^2 / sum_i |E_ref,i|^2),

the quantity the ``accuracy`` option asks for. References: the direct sum
(Coulomb's law and superposition, chargesim.coulomb.direct, itself checked
against textbook results and fmm3dpy in test_direct.py), fmm3dpy (general-
purpose reference library for Laplace sums), and exact results named beside
each check. Sources are named beside each check (see REFERENCES.md).
"""
import math

import numba
import numpy as np
import pytest

import chargesim
from chargesim.coulomb import direct, tree
from chargesim.physics.constants import COULOMB_K as K  # CODATA 2018, derived

SEED = 20261207


def _rng(k=0):
    return np.random.default_rng(SEED + k)


def _uniform(rng, n):
    return rng.random((n, 3))


def _clustered(rng, n):
    # Gaussian clumps of widths over a decade, and a thin uniform background:
    # deep, unbalanced trees as in a spray plume
    k = 12
    centres = rng.random((k, 3))
    widths = 10.0 ** rng.uniform(-2.5, -1.0, k)
    which = rng.integers(0, k, n)
    pos = centres[which] + rng.normal(size=(n, 3)) * widths[which, None]
    back = rng.random(n) < 0.05
    pos[back] = rng.random((int(back.sum()), 3))
    return pos


def _mixed(rng, n, positive_fraction=0.5):
    sign = np.where(rng.random(n) < positive_fraction, 1.0, -1.0)
    return sign * (0.5 + rng.random(n)) * 1e-12


def _self_reference(pos, q, idx, block=8):
    """Direct field and potential at particles ``idx`` from all others (numpy)."""
    e = np.empty((idx.size, 3))
    p = np.empty(idx.size)
    for lo in range(0, idx.size, block):
        ii = idx[lo : lo + block]
        d = pos[ii, None, :] - pos[None, :, :]
        r2 = np.einsum("ijk,ijk->ij", d, d)
        r2[np.arange(ii.size), ii] = np.inf  # no self term
        inv = 1.0 / np.sqrt(r2)
        e[lo : lo + block] = np.einsum("ij,ijk->ik", q * inv**3, d)
        p[lo : lo + block] = (q * inv).sum(axis=1)
    return e, p


def _err(a, ref):
    return float(np.sqrt(np.sum((a - ref) ** 2) / np.sum(ref**2)))


_CASES = {}


def _case(kind, n):
    """Positions, charges, sampled indices and their direct reference (cached)."""
    key = (kind, n)
    if key not in _CASES:
        rng = _rng({"uniform": 20, "clustered": 21, "one-sign": 22}[kind] + n)
        if kind == "uniform":
            pos, q = _uniform(rng, n), None
        elif kind == "clustered":
            pos, q = _clustered(rng, n), None
        else:  # one-sign cloud (space charge of a unipolar spray): hardest for cancellation-free sums
            pos, q = _clustered(rng, n), np.abs(_mixed(rng, n))
        if q is None:
            q = _mixed(rng, n)
        idx = np.sort(rng.choice(n, 300, replace=False))
        e, p = _self_reference(pos, q, idx)
        _CASES[key] = (pos, q, idx, e, p)
    return _CASES[key]


@pytest.mark.parametrize("accuracy", [1e-2, 1e-3, 1e-4])
@pytest.mark.parametrize("kind", ["uniform", "clustered"])
def test_rms_error_within_accuracy_mixed_sign(kind, accuracy):
    # reference: direct sum (Coulomb's law + superposition) on 300 sampled particles
    pos, q, idx, e_ref, p_ref = _case(kind, 30_000)
    e, p = tree.evaluate(pos, q, None, None, accuracy=accuracy)
    assert _err(e[idx], e_ref) <= accuracy
    # the potential is a smoother sum; its rms relative error is checked at
    # twice the asked field accuracy
    assert _err(p[idx], p_ref) <= 2 * accuracy


def test_rms_error_1e5_clustered():
    # reference: direct sum on 300 sampled particles of 1e5 clustered mixed-sign charges
    pos, q, idx, e_ref, _ = _case("clustered", 100_000)
    e, _ = tree.evaluate(pos, q, None, None, need_potential=False, accuracy=1e-3)
    assert _err(e[idx], e_ref) <= 1e-3


@pytest.mark.parametrize("accuracy", [1e-2, 1e-3])
def test_rms_error_one_sign_cloud(accuracy):
    # reference: direct sum; all charges of one sign (no cancellation in the far field)
    pos, q, idx, e_ref, p_ref = _case("one-sign", 30_000)
    e, p = tree.evaluate(pos, q, None, None, accuracy=accuracy)
    assert _err(e[idx], e_ref) <= accuracy
    assert _err(p[idx], p_ref) <= accuracy


def test_separate_targets_against_direct():
    # reference: direct sum (numba kernel) at probe points that are not particles
    rng = _rng(1)
    pos = _clustered(rng, 20_000)
    q = _mixed(rng, 20_000)
    tgt = rng.random((3000, 3)) * 1.2 - 0.1
    e_ref, p_ref = direct.evaluate(pos, q, tgt, None)
    for acc in (1e-2, 1e-3, 1e-4):
        e, p = tree.evaluate(pos, q, tgt, None, accuracy=acc)
        assert _err(e, e_ref) <= acc
        assert _err(p, p_ref) <= acc


def test_against_fmm3dpy_clustered():
    # fmm3dpy (general-purpose reference library): Laplace sums at eps = 1e-7;
    # fmm3dpy's pot is sum q / (4 pi r) and grad its gradient, so field = -4 pi grad.
    # (n kept small: fmm3dpy is slow on deep clustered trees)
    fmm3dpy = pytest.importorskip("fmm3dpy")
    rng = _rng(2)
    n = 5000
    pos = _clustered(rng, n)
    q = _mixed(rng, n) * 1e12
    out = fmm3dpy.lfmm3d(eps=1e-7, sources=np.ascontiguousarray(pos.T), charges=q, pg=2)
    e_ref = -4 * np.pi * out.grad.T
    p_ref = 4 * np.pi * out.pot
    for acc in (1e-2, 1e-3, 1e-4):
        e, p = tree.evaluate(pos, q, None, None, accuracy=acc)
        assert _err(e, e_ref) <= acc
        assert _err(p, p_ref) <= 2 * acc


def test_total_force_vanishes():
    # Newton's third law: internal forces sum to zero; with the tree the
    # balance holds to the asked accuracy relative to sum |F_i|
    rng = _rng(3)
    pos = _clustered(rng, 20_000)
    q = _mixed(rng, 20_000)
    for acc in (1e-2, 1e-3):
        f = chargesim.forces(pos, q, method="tree", accuracy=acc)
        assert np.linalg.norm(f.sum(axis=0)) <= acc * np.linalg.norm(f, axis=1).sum()


def test_zero_charges():
    # exact: no charge, no field
    rng = _rng(4)
    pos = rng.random((5000, 3))
    e, p = tree.evaluate(pos, np.zeros(5000), None, None)
    assert np.all(e == 0) and np.all(p == 0)


def test_one_particle():
    # Coulomb's law: one charge has no self field; at a probe E = q r / r^3
    e, p = tree.evaluate(np.array([[0.1, 0.2, 0.3]]), np.array([2.0]), None, None)
    assert np.all(e == 0) and np.all(p == 0)
    tgt = np.array([[1.1, 0.2, 0.3], [0.1, -0.3, 0.3]])
    e, p = tree.evaluate(np.array([[0.1, 0.2, 0.3]]), np.array([2.0]), tgt, None)
    np.testing.assert_allclose(e, [[2.0, 0, 0], [0, -8.0, 0]], rtol=1e-14, atol=1e-14)
    np.testing.assert_allclose(p, [2.0, 4.0], rtol=1e-14)


def test_tiny_cloud():
    # reference: direct sum; 3000 particles within 1e-12 m, 1 m from the origin
    rng = _rng(5)
    pos = np.array([1.0, -0.5, 0.25]) + rng.random((3000, 3)) * 1e-12
    q = _mixed(rng, 3000)
    e_ref, p_ref = direct.evaluate(pos, q, None, None)
    e, p = tree.evaluate(pos, q, None, None, accuracy=1e-3)
    assert _err(e, e_ref) <= 1e-3
    assert _err(p, p_ref) <= 1e-3
    # far probes see the cloud as one point charge. Their sums are near sums:
    # exact to round-off in double precision (asked accuracy below
    # tree.SINGLE_MIN_ACCURACY); in single precision each pair carries its
    # coordinates' rounding, 6e-8 relative (2^-24), here all alike, and the
    # net charge is ~1/50 of sum|q|: 1e-5 bounds it, 100x below the asked 1e-3
    tgt = np.array([[3.0, -0.5, 0.25], [1.0, 2.5, 0.25]])
    d = tgt - pos[0]
    exact = q.sum() * d / np.linalg.norm(d, axis=1)[:, None] ** 3
    e, _ = tree.evaluate(pos, q, tgt, None, accuracy=0.1 * tree.SINGLE_MIN_ACCURACY)
    np.testing.assert_allclose(e, exact, rtol=1e-9, atol=1e-9 * np.abs(exact).max())
    e, _ = tree.evaluate(pos, q, tgt, None, accuracy=1e-3)
    np.testing.assert_allclose(e, exact, rtol=1e-5, atol=1e-5 * np.abs(exact).max())


def test_points_on_a_plane():
    # reference: direct sum; a flat layer (zero extent in z), probes off the plane
    rng = _rng(6)
    n = 8000
    pos = np.column_stack([rng.random(n), rng.random(n), np.full(n, 0.3)])
    q = _mixed(rng, n)
    e_ref, p_ref = direct.evaluate(pos, q, None, None)
    e, p = tree.evaluate(pos, q, None, None, accuracy=1e-3)
    assert np.all(e[:, 2] == 0)  # by symmetry, exactly: every term has dz = 0
    assert _err(e, e_ref) <= 1e-3 and _err(p, p_ref) <= 1e-3
    tgt = rng.random((500, 3))
    e_ref, _ = direct.evaluate(pos, q, tgt, None)
    e, _ = tree.evaluate(pos, q, tgt, None, accuracy=1e-3)
    assert _err(e, e_ref) <= 1e-3


def test_finite_radii_against_direct():
    # reference: direct sum with the uniformly-charged-sphere kernel (contract in
    # DEVELOPERS.md); a dense clump where many spheres overlap
    rng = _rng(7)
    n = 6000
    pos = _clustered(rng, n)
    q = _mixed(rng, n)
    radii = rng.uniform(0.0, 5e-3, n)
    pos[1] = pos[0]  # coincident finite spheres are legitimate
    e_ref, p_ref = direct.evaluate(pos, q, None, radii)
    e, p = tree.evaluate(pos, q, None, radii, accuracy=1e-3)
    assert _err(e, e_ref) <= 1e-3 and _err(p, p_ref) <= 1e-3
    tgt = np.vstack([pos[:50] + 1e-4, rng.random((500, 3))])
    e_ref, p_ref = direct.evaluate(pos, q, tgt, radii)
    e, p = tree.evaluate(pos, q, tgt, radii, accuracy=1e-3)
    assert _err(e, e_ref) <= 1e-3 and _err(p, p_ref) <= 1e-3


def test_small_radii_take_the_point_kernel_yet_overlapping_pairs_stay_spheres():
    # reference: direct sum with the uniformly-charged-sphere kernel (contract in
    # DEVELOPERS.md). Dust-like spheres, radii 1/30 of their spacing: the near
    # sums may use the point kernel, which equals the sphere kernel outside
    # a = max(R_i, R_j). Twenty pairs overlap, 0.6 a apart (inside, the field
    # of a uniformly charged sphere is q r / a^3, 0.6^3 = 0.22 of the point
    # charge's q / r^2; and farther apart than single precision's close pairs),
    # and probe points sit inside spheres: those must keep the sphere kernel.
    rng = _rng(31)
    n = 4000
    r = 2e-3
    pos = rng.random((n, 3))
    q = _mixed(rng, n)
    radii = np.full(n, r)
    pair = np.arange(0, 400, 20)
    d = rng.normal(size=(pair.size, 3))
    pos[pair + 1] = pos[pair] + 0.6 * r * d / np.linalg.norm(d, axis=1)[:, None]
    e_ref, p_ref = direct.evaluate(pos, q, None, radii)
    e, p = tree.evaluate(pos, q, None, radii, accuracy=1e-3)
    assert _err(e, e_ref) <= 1e-3 and _err(p, p_ref) <= 1e-3
    both = np.concatenate([pair, pair + 1])
    assert _err(e[both], e_ref[both]) <= 1e-3 and _err(p[both], p_ref[both]) <= 1e-3
    tgt = np.vstack([pos[pair] + 0.6 * r * np.array([0.6, 0.0, 0.8]), rng.random((300, 3))])
    e_ref, p_ref = direct.evaluate(pos, q, tgt, radii)
    e, p = tree.evaluate(pos, q, tgt, radii, accuracy=1e-3)
    assert _err(e[:pair.size], e_ref[:pair.size]) <= 1e-3 and _err(p, p_ref) <= 1e-3


def test_coincident_points_raise():
    # contract (DEVELOPERS.md): a target exactly on a point source is an error naming both
    rng = _rng(8)
    pos = rng.random((3000, 3))
    pos[2000] = pos[17]
    with pytest.raises(ValueError, match="particle 17 coincides with source particle 2000"):
        tree.evaluate(pos, np.ones(3000), None, None)
    with pytest.raises(ValueError, match="target 1 coincides with source particle 5"):
        tree.evaluate(pos, np.ones(3000), np.array([[2.0, 2.0, 2.0], pos[5]]), None)


@pytest.mark.parametrize("with_radii", [False, True])
def test_single_precision_near_sums_keep_close_pairs_and_any_units(with_radii):
    # reference: direct sum. Near sums of point charges run in single
    # precision from tree.SINGLE_MIN_ACCURACY up; pairs closer than the
    # rounding of their coordinates allows are summed again in double
    # precision. Dimers 1e-9 of the box apart (each member's field dominated
    # by its partner, lost entirely if rounded), and the same cloud in units
    # far outside single precision's range (1e-30 m, 1e20 C; 1e25 m, 1e-25 C)
    rng = _rng(9)
    n = 3000
    centres = rng.random((n // 2, 3))
    offs = rng.normal(size=(n // 2, 3)) * 1e-9
    pos = np.concatenate([centres, centres + offs])
    q = _mixed(rng, n)
    idx = np.sort(rng.choice(n, 200, replace=False))
    e_ref, p_ref = _self_reference(pos, q, idx)
    # spheres of 1e-12 (the sphere kernel; every pair still outside): the
    # same sums, less each sphere's own potential, which the tree leaves out
    radii = np.full(n, 1e-12) if with_radii else None
    e, p = tree.evaluate(pos, q, None, radii, accuracy=1e-3)
    assert _err(e[idx], e_ref) <= 1e-3
    assert _err(p[idx], p_ref) <= 1e-3
    # the dimer field is the partner's to 1e-6: single precision would give ~100 % error
    assert _err(e[idx], e_ref) <= 1e-6
    for length, charge in ((1e-30, 1e20), (1e25, 1e-25)):
        # (the rounding differs with the scale: results agree to single precision)
        e2, p2 = tree.evaluate(pos * length, q * charge, None, None if radii is None else radii * length,
                               accuracy=1e-3)
        assert np.all(np.isfinite(e2)) and np.all(np.isfinite(p2))
        assert _err(e2[idx], e_ref * (charge / length**2)) <= 1e-6
        assert _err(p2[idx], p_ref * (charge / length)) <= 1e-6


def test_front_door_potential_energy():
    # reference: direct sum through the same front door (k/eps_r, 1/2 sum q phi)
    rng = _rng(9)
    n = 12_000
    pos = _clustered(rng, n)
    q = _mixed(rng, n)
    acc = 1e-3
    e_t = chargesim.field(pos, q, method="tree", accuracy=acc, eps_r=2.0)
    e_d = chargesim.field(pos, q, method="direct", eps_r=2.0)
    assert _err(e_t, e_d) <= acc
    p_t = chargesim.potential(pos, q, method="tree", accuracy=acc)
    p_d = chargesim.potential(pos, q, method="direct")
    assert _err(p_t, p_d) <= acc
    w_t = chargesim.energy(pos, q, method="tree", accuracy=acc)
    w_d = chargesim.energy(pos, q, method="direct")
    # mixed signs cancel in 1/2 sum q_i phi_i: the error is measured against
    # the sum of the absolute terms, 1/2 sum |q_i phi_i|
    assert abs(w_t - w_d) <= acc * 0.5 * np.sum(np.abs(q * p_d))


def test_tree_reuse_order_and_reproducibility():
    # reuse: one tree, several target sets, equal to fresh evaluations; the
    # result does not depend on the target order (Morton sort inside) nor on
    # the thread count (each target summed in one fixed order)
    rng = _rng(10)
    pos = _clustered(rng, 20_000)
    q = _mixed(rng, 20_000)
    t = tree.Tree(pos, q)
    g1 = rng.random((2000, 3))
    g2 = rng.random((700, 3)) * 0.1 + 0.45
    e1, p1 = t.evaluate(g1)
    e2, _ = t.evaluate(g2)
    np.testing.assert_array_equal(e1, tree.evaluate(pos, q, g1, None)[0])
    np.testing.assert_array_equal(e2, tree.evaluate(pos, q, g2, None)[0])
    perm = rng.permutation(2000)
    e1p, p1p = t.evaluate(g1[perm])
    np.testing.assert_array_equal(e1p, e1[perm])
    np.testing.assert_array_equal(p1p, p1[perm])
    es, _ = t.evaluate()
    old = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        es1, _ = t.evaluate()
    finally:
        numba.set_num_threads(old)
    np.testing.assert_array_equal(es, es1)
    # the convenience methods apply k/eps_r
    np.testing.assert_allclose(t.field(g2, eps_r=3.0), e2 * K / 3.0, rtol=1e-15)


def test_accuracy_option_checked_and_auto_uses_crossover():
    # front door: a bad accuracy names the argument; auto picks the tree at the crossover
    with pytest.raises(ValueError, match="accuracy"):
        tree.evaluate(np.zeros((2, 3)) + [[0, 0, 0], [1, 0, 0]], np.ones(2), None, None, accuracy=-1.0)
    assert isinstance(tree.CROSSOVER, int) and tree.CROSSOVER > 0
    assert chargesim.coulomb.method_for(tree.CROSSOVER) == "tree"
    assert chargesim.coulomb.method_for(tree.CROSSOVER - 1) == "direct"


def test_memory_per_particle():
    # issue goal: at most 500 bytes per particle held by the tree
    rng = _rng(11)
    pos = _clustered(rng, 50_000)
    t = tree.Tree(pos, _mixed(rng, 50_000))
    assert t.nbytes / 50_000 < 500


def test_morton_sort_is_the_stable_argsort():
    # reference: numpy's stable argsort of the same codes (the packed-key
    # sort must give exactly that order: ties in the high bits fixed by the
    # full codes, exact ties in index order)
    from chargesim.coulomb import _tree_kernels as kern

    rng = _rng(30)
    for n in (1, 2, 3, 1000, 70_000):
        full = rng.integers(0, 2**63 - 1, n)
        for codes in (full,                                             # all distinct
                      (full >> 50 << 50) | rng.integers(0, 1000, n),    # high bits tie, low bits differ
                      rng.integers(0, 5, n)):                           # exact ties
            perm, out = kern.sort_codes(codes)
            ref = np.argsort(codes, kind="stable")
            np.testing.assert_array_equal(perm, ref)
            np.testing.assert_array_equal(out, codes[ref])


def test_target_groups_partition_in_morton_order():
    # structure: groups are runs of sibling nodes whose points are consecutive
    # runs covering every sorted target once, each within GROUP_SIZE unless it
    # is a single leaf (identical codes)
    rng = _rng(12)
    for kind, pos in (("uniform", _uniform(rng, 20_000)), ("clustered", _clustered(rng, 20_000))):
        t = tree.Tree(pos, _mixed(rng, 20_000))
        gs, ge = t._start[t._g0], t._end[t._g1 - 1]
        parent = np.full(t.n_nodes, -1)
        for k in range(t.n_nodes):
            for c in range(t._first[k], t._first[k] + t._nchild[k]):
                parent[c] = k
        for a, b in zip(t._g0, t._g1):
            assert b > a and len(set(parent[a:b])) == 1
        assert gs[0] == 0 and ge[-1] == 20_000
        np.testing.assert_array_equal(gs[1:], ge[:-1])
        assert np.all(ge - gs <= tree.GROUP_SIZE)
        if kind == "uniform":
            # small siblings are merged: on average groups are over half full
            # (without merging a uniform cloud of 2e4 gives 64 groups of ~310)
            assert gs.size < 2 * 20_000 / tree.GROUP_SIZE


def test_field_alone_equals_field_with_potential():
    # the field-only near sums of spheres leave the potential out and must
    # give the very same field (same pairs, same order), and the potential
    # asked alone must equal the one asked with the field; checked at a
    # single-precision accuracy (1e-3) and a double one (1e-5)
    rng = _rng(31)
    n = 6000
    pos = _clustered(rng, n)
    q = _mixed(rng, n)
    radii = rng.uniform(0.0, 2e-3, n)
    t = tree.Tree(pos, q, radii)
    for acc in (1e-3, 1e-5):
        f_both, p_both = t.evaluate(accuracy=acc)
        f_only, none = t.evaluate(need_potential=False, accuracy=acc)
        none2, p_only = t.evaluate(need_field=False, accuracy=acc)
        assert none is None and none2 is None
        np.testing.assert_array_equal(f_only, f_both)
        np.testing.assert_array_equal(p_only, p_both)


def test_radii_with_point_members_and_huge_self_potential():
    # reference: direct sum with the sphere kernel; some particles of a
    # radii set have R = 0 (point members, no false coincidence), others
    # have tiny R (own-sphere potential 3q/2R far above the sum, which is
    # not part of the result)
    rng = _rng(13)
    n = 5000
    pos = _clustered(rng, n)
    q = _mixed(rng, n)
    radii = rng.uniform(0.0, 1e-3, n)
    radii[::7] = 0.0
    radii[3::7] = 1e-12
    e_ref, p_ref = direct.evaluate(pos, q, None, radii)
    e, p = tree.evaluate(pos, q, None, radii, accuracy=1e-3)
    assert _err(e, e_ref) <= 1e-3 and _err(p, p_ref) <= 1e-3



def _monos(points, p):
    from chargesim.coulomb import _multipoles as mp

    parent, axis = mp.monomial_table(p)
    out = np.ones((points.shape[0], parent.size))
    for c in range(1, parent.size):
        out[:, c] = out[:, parent[c]] * points[:, axis[c]]
    return out


def _local_expansion(s, q, r_vec, single=False, qscale=1.0):
    """Local coefficients at a target centre R = r_vec from charges q at s (source centre 0), the
    translation in double or single precision (charges in units of ``qscale``)."""
    from chargesim.coulomb import _tree_kernels as _k

    raw = (q @ _monos(s, tree._mp.ORDER))[None, :]
    # the sparse fold of the tree, checked against the dense product it replaces
    mm = np.empty((1, tree._FOLD.shape[0]))
    _k.fold_moments(raw, tree._FOLD_ROWS, tree._FOLD_COLS, tree._FOLD_VALS, mm)
    np.testing.assert_allclose(mm, raw @ (tree._FOLD * tree._MOMENT_SCALE).T, rtol=1e-13, atol=0.0)
    nd = np.zeros((1, _k.NODE_COLS))
    ncl = tree._LOCAL_SCALE.size
    loc = np.zeros(ncl)
    dt = np.float32 if single else np.float64
    _k._local_coefficients(nd, mm, np.zeros(1, np.int64), 1, r_vec[0], r_vec[1], r_vec[2],
                           np.empty((mm.shape[1], 1), dt), np.empty((ncl, 1), dt), np.empty((4, 1), dt), tree._DIDX,
                           tree._DCOEF32 if single else tree._DCOEF, tree._DERIV, tree._M2L_ROWS, tree._UNFOLD,
                           tree._LOCAL_SCALE, tree._RED_PTR, tree._COMP_ORDER, qscale, float(r_vec @ r_vec),
                           np.empty(tree._COMP_ORDER.max() + 1), np.empty(ncl + 1, dt), loc)
    return loc


def test_local_expansion_converges_at_its_order():
    # reference: Coulomb's law summed directly. The translated expansion of
    # a source cluster about a distant target centre is the Taylor series of
    # 1/|R + t - s| kept to total order ORDER: its potential error must fall
    # as (size / distance)^(ORDER + 1), so by ~2^(ORDER + 1) each time the
    # distance doubles
    rng = _rng(30)
    s = rng.uniform(-1, 1, (30, 3))
    q = rng.normal(size=30)
    t = rng.uniform(-1, 1, (20, 3))
    errs = []
    for dist in (8.0, 16.0, 32.0):
        r_vec = dist * np.array([0.6, 0.48, -0.64])
        loc = _local_expansion(s, q, r_vec)
        phi = _monos(t, tree._mp.ORDER) @ loc
        d = (r_vec + t)[:, None, :] - s[None, :, :]
        ref = (q / np.linalg.norm(d, axis=2)).sum(axis=1)
        errs.append(np.abs(phi - ref).max() / np.abs(ref).max())
    ratios = [errs[0] / errs[1], errs[1] / errs[2]]
    order = tree._mp.ORDER
    assert errs[0] < 1e-4
    assert all(2**order < r < 2 ** (order + 2.5) for r in ratios), ratios


def test_local_shift_is_exact():
    # a local expansion is a polynomial: shifting it to a new centre (L2L,
    # binomial theorem) must give the same values (exact algebra)
    from chargesim.coulomb import _multipoles as mp
    from chargesim.coulomb import _tree_kernels as tk

    rng = _rng(31)
    loc = rng.normal(size=mp.n_components(mp.ORDER))
    delta = np.array([0.3, -0.2, 0.15])
    shifted = np.zeros_like(loc)
    tk._shift(shifted, loc, delta[0], delta[1], delta[2], tree._EXPO, tree._BINOM, False, np.empty((3, loc.size)))
    t = rng.uniform(-0.5, 0.5, (10, 3))
    np.testing.assert_allclose(_monos(t, mp.ORDER) @ shifted, _monos(t + delta, mp.ORDER) @ loc, rtol=1e-12)


def test_moment_shift_is_exact():
    # raw moments A_m = sum_j q_j (x_j - c)^m about a child's centre c,
    # shifted to the parent's centre P (M2M, binomial theorem with
    # d = c - P), must equal the moments taken about P directly (exact algebra)
    from chargesim.coulomb import _multipoles as mp
    from chargesim.coulomb import _tree_kernels as tk

    rng = _rng(33)
    x = rng.uniform(-1, 1, (40, 3))
    q = rng.normal(size=40)
    c = np.array([0.1, -0.3, 0.2])
    big_p = np.array([-0.4, 0.25, 0.6])
    child = q @ _monos(x - c, mp.ORDER)
    out = np.full_like(child, 0.5)  # the shift adds to what is there
    tk._shift(out, child, *(c - big_p), tree._EXPO, tree._BINOM, True, np.empty((3, child.size)))
    np.testing.assert_allclose(out - 0.5, q @ _monos(x - big_p, mp.ORDER), rtol=1e-12, atol=1e-12)


def test_local_expansion_equals_the_truncated_legendre_series():
    # reference: 1/|R - u| = sum_j |u|^j / |R|^(j+1) P_j(cos angle(R, u))
    # (Legendre expansion of the Coulomb kernel, any electromagnetism text;
    # P_j from scipy.special). The translation keeps the terms of total
    # order |n| + |k| <= ORDER of the Taylor series of 1/|R + t - s|, which
    # are exactly the Legendre terms j <= ORDER with u = s - t: so for any
    # charges, sum_k L_k t^k must equal that truncated series to round-off.
    from scipy.special import eval_legendre

    rng = _rng(32)
    s = rng.uniform(-1, 1, (6, 3))
    q = rng.normal(size=6)
    t = rng.uniform(-1, 1, (15, 3))
    r_vec = np.array([3.1, -2.2, 1.7])
    loc = _local_expansion(s, q, r_vec)
    phi = _monos(t, tree._mp.ORDER) @ loc
    u = s[None, :, :] - t[:, None, :]
    un = np.linalg.norm(u, axis=2)
    rn = np.linalg.norm(r_vec)
    cos = (u @ r_vec) / (un * rn)
    ref = sum((q * un**j * eval_legendre(j, cos)).sum(axis=1) / rn ** (j + 1) for j in range(tree._mp.ORDER + 1))
    np.testing.assert_allclose(phi, ref, rtol=1e-12, atol=1e-14 * np.abs(ref).max())
    # the single-precision translation (asked accuracies from 1e-4 up), in
    # units far outside single precision's range (1e-20 m, 1e-25 C): the
    # same series to single precision's rounding
    for length, charge in ((1.0, 1.0), (1e-20, 1e-25)):
        loc = _local_expansion(s * length, q * charge, r_vec * length, single=True,
                               qscale=math.ldexp(1.0, math.frexp(charge)[1]))
        phi = _monos(t * length, tree._mp.ORDER) @ loc
        np.testing.assert_allclose(phi, ref * (charge / length), rtol=2e-6, atol=2e-6 * np.abs(ref * charge / length).max())


def test_single_precision_translations_fall_back_over_a_wide_range_of_distances():
    # reference: direct sum. Two clusters 1e-7 across, 4e-6 apart on either
    # side of a cell face, an outlier and a background filling half the box:
    # the small clusters' nodes translate each other (distances ~4e-6) and
    # background nodes (~0.5), a ratio of 1.8e5 (measured), beyond
    # tree.SINGLE_M2L_RANGE, so those translations run in double precision
    rng = _rng(33)
    sep = 2e-6
    c1 = np.array([0.5 - sep, 0.3, 0.3]) + rng.normal(size=(1000, 3)) * sep / 20
    c2 = np.array([0.5 + sep, 0.3, 0.3]) + rng.normal(size=(1000, 3)) * sep / 20
    back = rng.random((4000, 3)) * [0.5, 1.0, 1.0] + [0.5, 0.0, 0.0]
    pos = np.concatenate([c1, c2, back, np.zeros((1, 3))])
    q = _mixed(rng, pos.shape[0])
    idx = np.arange(0, pos.shape[0], 10)
    e_ref, p_ref = _self_reference(pos, q, idx)
    e, p = tree.evaluate(pos, q, None, None, accuracy=1e-3)
    assert np.all(np.isfinite(e)) and np.all(np.isfinite(p))
    for part in (slice(0, 200), slice(200, None)):
        assert _err(e[idx][part], e_ref[part]) <= 1e-3
        assert _err(p[idx][part], p_ref[part]) <= 1e-3


def test_walks_cover_every_source_once_at_every_target_leaf():
    # exact bookkeeping of the fast multipole method (any FMM text): at each
    # target leaf, the source nodes taken by a local expansion of the leaf or
    # of any node above it (the group's nodes, then the upper nodes above
    # the groups) plus the leaf's near nodes hold every source exactly once
    from chargesim.coulomb import _tree_kernels as _k

    rng = _rng(34)
    n = 20_000
    pos = _clustered(rng, n)
    t = tree.Tree(pos, _mixed(rng, n))
    theta = tree.theta_for(1e-3)
    up_nodes, par_up, m2l_off, m2l_src, pend_off, pend_src = _k.upper_walk(
        t._nd, t._first, t._nchild, t._nd, t._first, t._nchild, t._g0, t._g1, theta, tree.DIRECT_MAX)
    assert up_nodes.size > 1 and t._g0.size > 8  # both walks have work
    # sources taken at each upper node, its own and those of the upper nodes above it
    taken_up = []
    for u, k in enumerate(up_nodes):
        own = list(m2l_src[m2l_off[u]:m2l_off[u + 1]])
        taken_up.append(own if u == 0 else taken_up[par_up[k]] + own)
    pa = np.empty(16, np.int64)
    pb = np.empty(16, np.int64)
    lists = ((np.empty(16, np.int64), np.empty(16, np.int64)), (np.empty(16, np.int64), np.empty(16, np.int64)))
    tn = np.empty(4, np.int64)
    counts = np.empty(8, np.int64)
    leaves = 0
    for g in range(t._g0.size):
        tn, counts, ntn = _k._group_nodes(t._first, t._nchild, t._g0[g], t._g1[g], tn, counts)
        pa, pb, l0, l1, n0, n1 = _k._traverse(t._nd, t._first, t._nchild, t._nd, t._nchild, tn, ntn, pend_off,
                                              pend_src, theta, tree.DIRECT_MAX, pa, pb, lists, counts)
        lists = (l0, l1)
        far = [[] for _ in range(ntn)]
        near = [[] for _ in range(ntn)]
        for a, k in zip(l0[0][:n0], l0[1][:n0]):
            far[a].append(k)
        for a, k in zip(l1[0][:n1], l1[1][:n1]):
            near[a].append(k)
        for a in range(ntn):
            if t._nchild[tn[a]] != 0:
                continue
            nodes = list(near[a])
            b = a
            while b >= 0:
                nodes += far[b]
                top = b
                b = counts[b]
            pu = par_up[tn[top]]
            if pu >= 0:
                nodes += taken_up[pu]
            cover = np.zeros(n + 1, np.int64)
            np.add.at(cover, t._start[nodes], 1)
            np.add.at(cover, t._end[nodes], -1)
            assert np.all(np.cumsum(cover)[:n] == 1), (g, a)
            leaves += 1
    assert leaves == int(np.sum(t._nchild == 0))
