"""Smooth particle-mesh Ewald (chargesim.coulomb.mesh) against Ewald and known lattice sums."""
import warnings

import numpy as np
import pytest
from scipy.interpolate import BSpline

import chargesim
from chargesim.coulomb import ewald, mesh
from chargesim.physics.constants import COULOMB_K, ELEMENTARY_CHARGE

# OEIS A085469; Kittel, Introduction to Solid State Physics
MADELUNG_NACL = 1.747564594633


def random_neutral(n, box, seed):
    rng = np.random.default_rng(seed)
    x = rng.random((n, 3)) * box
    q = rng.normal(size=n) * 1e-15
    q -= q.mean()
    return x, q


def rms_rel(a, ref):
    return np.sqrt(np.mean(np.sum((a - ref) ** 2, axis=1)) / np.mean(np.sum(ref ** 2, axis=1)))


def opts(**kw):
    full = dict(mesh.OPTIONS)
    full.update(kw)
    return full


def test_madelung_rock_salt():
    # OEIS A085469; Kittel: 8-ion conventional cube, E = -4 M k e^2 / a
    a = 2.82e-10
    idx = np.array([(i, j, k) for i in range(2) for j in range(2) for k in range(2)], dtype=float)
    q = ELEMENTARY_CHARGE * (-1.0) ** idx.sum(axis=1)
    e = chargesim.energy(idx * a, q, method="mesh", box=np.full(3, 2 * a), accuracy=1e-7)
    m = -e * a / (4.0 * COULOMB_K * ELEMENTARY_CHARGE ** 2)
    assert m == pytest.approx(MADELUNG_NACL, abs=1e-5)


@pytest.mark.parametrize("order", [4, 6, 8, 10, 12])
def test_spline_weights_match_scipy(order):
    # scipy.interpolate.BSpline (reference library): the cardinal B-spline
    # M_p on the knots 0..p and its derivative
    ref = BSpline.basis_element(np.arange(order + 1), extrapolate=False)
    dref = ref.derivative()
    w = np.empty(order)
    dw = np.empty(order)
    for t in (0.0, 0.137, 0.5, 0.999):
        mesh._spline(t, order, w, dw)
        xs = t + np.arange(order)
        np.testing.assert_allclose(w, np.nan_to_num(ref(xs)), atol=1e-14)
        np.testing.assert_allclose(dw, np.nan_to_num(dref(xs)), atol=1e-13)
        assert w.sum() == pytest.approx(1.0, abs=1e-14)  # partition of unity


def test_forces_against_ewald_at_1e_4():
    # the check: rms relative force error <= 1e-4 at accuracy 1e-4,
    # against Ewald (tight) on random neutral charges
    box = np.array([1.0, 1.1, 0.9])
    x, q = random_neutral(1500, box, seed=21)
    ref = chargesim.coulomb.forces(x, q, method="ewald", box=box, accuracy=1e-10)
    f = chargesim.coulomb.forces(x, q, method="mesh", box=box, accuracy=1e-4)
    assert rms_rel(f, ref) <= 1e-4


@pytest.mark.parametrize("acc", [1e-3, 1e-6])
def test_accuracy_option_is_met(acc):
    # the documented meaning of accuracy: rms relative force error
    box = np.ones(3)
    x, q = random_neutral(600, box, seed=22)
    ref = chargesim.coulomb.forces(x, q, method="ewald", box=box, accuracy=1e-11)
    f = chargesim.coulomb.forces(x, q, method="mesh", box=box, accuracy=acc)
    assert rms_rel(f, ref) <= acc


def test_forced_order_and_mesh():
    # a forced fine mesh reaches Ewald closely, a forced coarse one does not
    box = np.ones(3)
    x, q = random_neutral(300, box, seed=23)
    ref = chargesim.coulomb.forces(x, q, method="ewald", box=box, accuracy=1e-10)
    fine = chargesim.coulomb.forces(x, q, method="mesh", box=box, accuracy=1e-6, order=8, mesh=64)
    coarse = chargesim.coulomb.forces(x, q, method="mesh", box=box, accuracy=1e-6, order=4, mesh=(12, 12, 12))
    assert rms_rel(fine, ref) < 1e-6
    assert rms_rel(coarse, ref) > 1e-4


def test_potential_at_targets_against_ewald():
    # Ewald (tight) as the reference at free target points, with a net charge
    box = np.array([1.0, 1.0, 1.3])
    x, q = random_neutral(200, box, seed=24)
    q[0] += 3e-15
    t = np.random.default_rng(25).random((50, 3)) * box
    with pytest.warns(RuntimeWarning, match="net charge"):
        fe, pe = chargesim.coulomb.field_and_potential(x, q, t, method="ewald", box=box, accuracy=1e-10)
    with pytest.warns(RuntimeWarning, match="net charge"):
        fm, pm = chargesim.coulomb.field_and_potential(x, q, t, method="mesh", box=box, accuracy=1e-6)
    assert rms_rel(fm, fe) < 1e-6
    assert np.sqrt(np.mean((pm - pe) ** 2) / np.mean(pe ** 2)) < 1e-6


@pytest.mark.parametrize("extra", [{"slab": 2}, {"boundary": "vacuum"}])
def test_slab_and_vacuum_terms_match_ewald(extra):
    # the shared corrections (Yeh and Berkowitz 1999; de Leeuw, Perram and
    # Smith 1980): mesh and Ewald agree in every geometry
    box = np.array([1.0, 1.0, 2.5])
    rng = np.random.default_rng(26)
    x = rng.random((300, 3)) * np.array([1.0, 1.0, 0.8])
    q = rng.normal(size=300) * 1e-15
    q -= q.mean()
    fe = chargesim.coulomb.forces(x, q, method="ewald", box=box, accuracy=1e-10, **extra)
    fm = chargesim.coulomb.forces(x, q, method="mesh", box=box, accuracy=1e-6, **extra)
    assert rms_rel(fm, fe) < 1e-6
    ee = chargesim.coulomb.energy(x, q, method="ewald", box=box, accuracy=1e-10, **extra)
    em = chargesim.coulomb.energy(x, q, method="mesh", box=box, accuracy=1e-6, **extra)
    assert em == pytest.approx(ee, rel=1e-5)


def test_finite_radii_and_coincidence_like_ewald():
    # the real-space part is shared with Ewald: same sphere kernel, same error
    box = np.ones(3)
    x, q = random_neutral(50, box, seed=27)
    x[1] = x[0]
    radii = np.full(50, 0.01)
    pe = chargesim.coulomb.potential(x, q, method="ewald", box=box, radii=radii, accuracy=1e-10)
    pm = chargesim.coulomb.potential(x, q, method="mesh", box=box, radii=radii, accuracy=1e-7)
    np.testing.assert_allclose(pm, pe, rtol=0, atol=1e-6 * np.abs(pe).max())
    with pytest.raises(ValueError, match="coincides"):
        chargesim.coulomb.potential(x, q, method="mesh", box=box)


def test_mesh_does_not_depend_on_where_the_cell_is_cut():
    # analytic: a rigid shift of all particles by a lattice-incommensurate
    # vector changes nothing physical; B-spline assignment is nearly shift
    # invariant (within the accuracy)
    box = np.ones(3)
    x, q = random_neutral(400, box, seed=28)
    f0 = chargesim.coulomb.forces(x, q, method="mesh", box=box, accuracy=1e-5)
    f1 = chargesim.coulomb.forces(x + np.array([0.0123, -3.3, 0.4567]), q, method="mesh", box=box, accuracy=1e-5)
    assert rms_rel(f1, f0) < 1e-5


def test_repeatable_bitwise():
    box = np.ones(3)
    x, q = random_neutral(3000, box, seed=29)
    a = chargesim.coulomb.field(x, q, method="mesh", box=box, accuracy=1e-4)
    b = chargesim.coulomb.field(x, q, method="mesh", box=box, accuracy=1e-4)
    assert np.array_equal(a, b)


def test_auto_uses_mesh_above_crossover():
    box = np.ones(3)
    n = ewald.MESH_CROSSOVER
    x, q = random_neutral(n, box, seed=30)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fa = chargesim.coulomb.forces(x, q, box=box, accuracy=1e-4)
    fm = chargesim.coulomb.forces(x, q, method="mesh", box=box, accuracy=1e-4)
    assert np.array_equal(fa, fm)


@pytest.mark.parametrize("bad, match", [
    ({"order": 5}, "order"),
    ({"order": 2}, "order"),
    ({"order": 6.0}, "order"),
    ({"mesh": 3, "order": 4}, "mesh"),
    ({"mesh": (16, 16)}, "mesh"),
    ({"mesh": 16.5}, "mesh"),
    ({"slab": -1}, "slab"),
    ({"accuracy": -1e-4}, "accuracy"),
])
def test_bad_options(bad, match):
    x, q = random_neutral(4, np.ones(3), seed=0)
    with pytest.raises(ValueError, match=match):
        chargesim.coulomb.energy(x, q, method="mesh", box=(1, 1, 1), **bad)


def test_box_required():
    x, q = random_neutral(4, np.ones(3), seed=0)
    with pytest.raises(ValueError, match="box is required"):
        chargesim.coulomb.energy(x, q, method="mesh")


def test_same_bits_on_one_and_two_threads():
    # the slab-parity spreading adds in an order set by the mesh alone
    import numba

    box = np.ones(3)
    x, q = random_neutral(12000, box, seed=31)  # large enough for the parallel slabs
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        a = chargesim.coulomb.field(x, q, method="mesh", box=box, accuracy=1e-4)
        numba.set_num_threads(min(2, numba.config.NUMBA_NUM_THREADS))
        b = chargesim.coulomb.field(x, q, method="mesh", box=box, accuracy=1e-4)
    finally:
        numba.set_num_threads(before)
    assert np.array_equal(a, b)
