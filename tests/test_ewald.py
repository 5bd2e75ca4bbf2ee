"""Ewald summation (chargesim.coulomb.ewald) against lattice sums with known values."""
import math
import warnings

import numpy as np
import pytest

import chargesim
from chargesim.coulomb import direct, ewald
from chargesim.physics.constants import COULOMB_K, ELEMENTARY_CHARGE

# Madelung constant of rock salt, referred to the nearest-neighbour distance:
# OEIS A085469; Kittel, Introduction to Solid State Physics.
MADELUNG_NACL = 1.747564594633


def rock_salt(a):
    """The 8-ion conventional cube of rock salt, nearest-neighbour distance a (m), charges +-e."""
    idx = np.array([(i, j, k) for i in range(2) for j in range(2) for k in range(2)], dtype=float)
    q = ELEMENTARY_CHARGE * (-1.0) ** idx.sum(axis=1)
    return idx * a, q, np.full(3, 2.0 * a)


def random_neutral(n, box, seed):
    rng = np.random.default_rng(seed)
    x = rng.random((n, 3)) * box
    q = rng.normal(size=n) * 1e-15
    q -= q.mean()
    return x, q


def opts(**kw):
    """Every option filled in, as the front door hands them to a method module."""
    full = dict(ewald.OPTIONS)
    full.update(kw)
    return full


def test_madelung_rock_salt():
    # OEIS A085469; Kittel: E per ion pair = -M k e^2 / a, so the 8-ion cell
    # holds E = -4 M k e^2 / a
    a = 2.82e-10
    x, q, box = rock_salt(a)
    e = chargesim.energy(x, q, method="ewald", box=box, accuracy=1e-12)
    m = -e * a / (4.0 * COULOMB_K * ELEMENTARY_CHARGE ** 2)
    assert m == pytest.approx(MADELUNG_NACL, abs=1e-8)


def test_madelung_shifted_and_unwrapped_cell():
    # OEIS A085469; Kittel: the lattice energy does not depend on where the
    # cell is cut or on particles given outside the box (periodic images)
    a = 1.0
    x, q, box = rock_salt(a)
    x = x + np.array([0.3, -0.7, 5.1])
    e = chargesim.coulomb.energy(x, q, method="ewald", box=box, accuracy=1e-12)
    m = -e * a / (4.0 * COULOMB_K * ELEMENTARY_CHARGE ** 2)
    assert m == pytest.approx(MADELUNG_NACL, abs=1e-8)


def test_energy_does_not_depend_on_splitting_parameter():
    # analytic: the Ewald split is exact, only alpha's share between real and
    # reciprocal space changes (Ewald 1921)
    box = np.array([1.0, 1.2, 0.9])
    x, q = random_neutral(60, box, seed=11)
    energies = []
    for alpha in (12.0, 18.0, 30.0):
        _, p = ewald.evaluate(x, q, None, None, need_field=False, need_potential=True,
                              **opts(box=box, accuracy=1e-12, alpha=alpha))
        energies.append(0.5 * q @ p)
    assert energies[1] == pytest.approx(energies[0], rel=1e-9)
    assert energies[2] == pytest.approx(energies[0], rel=1e-9)


def test_forces_are_minus_energy_gradient():
    # analytic: F_i = -dE/dx_i; central differences of the Ewald energy
    box = np.array([1.0, 1.0, 1.0])
    x, q = random_neutral(30, box, seed=5)
    f = chargesim.coulomb.forces(x, q, method="ewald", box=box, accuracy=1e-12)
    h = 1e-6
    for i in (0, 7):
        for axis in range(3):
            xp = x.copy()
            xm = x.copy()
            xp[i, axis] += h
            xm[i, axis] -= h
            ep = chargesim.coulomb.energy(xp, q, method="ewald", box=box, accuracy=1e-12)
            em = chargesim.coulomb.energy(xm, q, method="ewald", box=box, accuracy=1e-12)
            assert f[i, axis] == pytest.approx(-(ep - em) / (2 * h), rel=1e-5, abs=1e-8 * np.abs(f).max())


def test_field_at_targets_is_minus_potential_gradient():
    # analytic: E = -grad phi at free target points
    box = np.array([1.0, 1.0, 1.0])
    x, q = random_neutral(40, box, seed=8)
    t = np.random.default_rng(9).random((5, 3))
    e, _ = ewald.evaluate(x, q, t, None, **opts(box=box, accuracy=1e-12))
    h = 1e-6
    for axis in range(3):
        d = np.zeros(3)
        d[axis] = h
        _, pp = ewald.evaluate(x, q, t + d, None, **opts(box=box, accuracy=1e-12))
        _, pm = ewald.evaluate(x, q, t - d, None, **opts(box=box, accuracy=1e-12))
        np.testing.assert_allclose(e[:, axis], -(pp - pm) / (2 * h), rtol=1e-5, atol=1e-8 * np.abs(e).max())


def test_field_on_particle_matches_target_at_its_place():
    # analytic: the field on particle 0 from everything else (its own images
    # included) is the field at its position minus the field of particle 0
    # alone with its images and background; the lone charge's field at its own
    # place vanishes by symmetry, so the two agree (cubic box)
    box = np.array([1.0, 1.0, 1.0])
    x, q = random_neutral(20, box, seed=2)
    f_all, _ = ewald.evaluate(x, q, None, None, **opts(box=box, accuracy=1e-12))
    rest = np.arange(1, 20)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # the rest carries a net charge
        f0, _ = ewald.evaluate(x[rest], q[rest], x[:1], None, **opts(box=box, accuracy=1e-12))
    np.testing.assert_allclose(f_all[0], f0[0], rtol=1e-8, atol=1e-10 * np.abs(f_all).max())


def test_spherical_shells_converge_to_vacuum_boundary():
    # de Leeuw, Perram and Smith, Proc. R. Soc. A 373, 27 (1980): the direct
    # sum over a growing sphere of cells (in vacuum) tends to the tin-foil
    # Ewald energy plus the surface term 2 pi |M|^2 / (3V)
    box = np.array([1.0, 1.0, 1.0])
    x, q = random_neutral(8, box, seed=3)
    _, pt = ewald.evaluate(x, q, None, None, **opts(box=box, accuracy=1e-12))
    _, pv = ewald.evaluate(x, q, None, None, **opts(box=box, accuracy=1e-12, boundary="vacuum"))
    e_tin = 0.5 * q @ pt
    e_vac = 0.5 * q @ pv
    m = q @ x
    assert e_vac - e_tin == pytest.approx(2 * math.pi / 3 * (m @ m), rel=1e-10)
    assert abs(e_vac - e_tin) > 0.1 * abs(e_vac)  # the dipole term is large here
    _, p_self = direct.evaluate(x, q, None, None)
    errors = []
    for radius in (5, 10, 20):
        r = np.arange(-radius, radius + 1)
        n = np.stack(np.meshgrid(r, r, r, indexing="ij"), -1).reshape(-1, 3)
        n = n[(np.sum(n * n, axis=1) <= radius * radius) & np.any(n != 0, axis=1)]
        src = (x[None, :, :] + n[:, None, :] * box).reshape(-1, 3)
        _, p = direct.evaluate(src, np.tile(q, len(n)), x, None)
        errors.append(abs(0.5 * q @ (p + p_self) - e_vac))
    assert errors[0] > errors[1] > errors[2]
    assert errors[2] < 1e-5 * abs(e_vac)


def test_lone_charge_with_background():
    # a point charge in a cubic box with a neutralizing background:
    # E = -xi q^2 / (2 L), xi = 2.837297 (simple-cubic Wigner constant;
    # Nijboer and De Wette, Physica 23, 309 (1957), value from memory)
    box = np.full(3, 2.0)
    with pytest.warns(RuntimeWarning, match="net charge"):
        e = chargesim.coulomb.energy([[0.3, 0.2, 0.1]], [1e-9], method="ewald", box=box, accuracy=1e-12)
    assert e / (COULOMB_K * 1e-18) == pytest.approx(-2.837297 / (2 * 2.0), rel=1e-6)


def test_neutral_system_does_not_warn():
    box = np.ones(3)
    x, q = random_neutral(30, box, seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        chargesim.coulomb.energy(x, q, method="ewald", box=box)


def test_finite_radii_change_only_overlapping_pairs():
    # Gauss's law (uniformly charged sphere): the sphere kernel replaces the
    # point kernel for the overlapping pair only; every image is far outside
    box = np.ones(3)
    x, q = random_neutral(12, box, seed=4)
    x[1] = x[0] + np.array([0.01, 0.0, 0.0])
    radii = np.full(12, 1e-4)
    radii[1] = 0.02
    _, p_pt = ewald.evaluate(x, q, None, None, **opts(box=box, accuracy=1e-12))
    _, p_sp = ewald.evaluate(x, q, None, radii, **opts(box=box, accuracy=1e-12))
    _, d_pt = direct.evaluate(x[:2], q[:2], None, None)
    _, d_sp = direct.evaluate(x[:2], q[:2], None, radii[:2])
    np.testing.assert_allclose((p_sp - p_pt)[:2], d_sp - d_pt, rtol=1e-9)
    np.testing.assert_allclose((p_sp - p_pt)[2:], 0.0, atol=1e-12 * np.abs(p_pt).max())


def test_coincident_spheres_are_finite():
    # Gauss's law: two concentric uniformly charged spheres of radius a have
    # the pair energy (6/5) k q1 q2 / a; the Ewald value differs from the
    # same pair at a small offset only by the offset's smooth change
    box = np.ones(3)
    x = np.array([[0.5, 0.5, 0.5], [0.5, 0.5, 0.5]])
    q = np.array([1e-15, -1e-15])
    radii = np.array([0.05, 0.05])
    _, p0 = ewald.evaluate(x, q, None, radii, **opts(box=box, accuracy=1e-12))
    x2 = x.copy()
    x2[1, 0] += 1e-7
    _, p1 = ewald.evaluate(x2, q, None, radii, **opts(box=box, accuracy=1e-12))
    assert np.all(np.isfinite(p0))
    np.testing.assert_allclose(p0, p1, rtol=1e-6)


def test_coincident_points_raise():
    box = np.ones(3)
    x = np.array([[0.1, 0.2, 0.3], [0.1, 0.2, 0.3], [0.5, 0.5, 0.5]])
    q = np.array([1.0, -2.0, 1.0]) * 1e-15
    with pytest.raises(ValueError, match="coincides"):
        chargesim.coulomb.energy(x, q, method="ewald", box=box)
    with pytest.raises(ValueError, match="target 0 coincides"):
        chargesim.coulomb.field(x, q, targets=x[2:], method="ewald", box=box)


def test_slab_correction_against_large_gap():
    # Yeh and Berkowitz, J. Chem. Phys. 111, 3155 (1999): with the slab
    # correction the 3-D sum of a layer converges fast with the vacuum gap
    # (what is left of the layer-layer coupling decays about as
    # exp(-2 pi gap / L_x)); without it the spurious dipole-dipole coupling of
    # the layers decays only as 1/L_z
    rng = np.random.default_rng(6)
    n = 40
    x = rng.random((n, 3)) * np.array([1.0, 1.0, 0.3])
    q = rng.normal(size=n)
    q -= q.mean()
    q[np.argsort(x[:, 2])[-5:]] += 0.5  # a sizeable dipole along z
    q[np.argsort(x[:, 2])[:5]] -= 0.5

    def energy(lz, slab):
        box = np.array([1.0, 1.0, lz])
        _, p = ewald.evaluate(x, q, None, None, need_field=False, **opts(box=box, accuracy=1e-10, slab=slab))
        return 0.5 * q @ p

    ref = energy(12.0, 2)
    assert energy(2.0, 2) == pytest.approx(ref, rel=3e-5)  # gap 1.7 L_x
    assert energy(3.0, 2) == pytest.approx(ref, rel=1e-7)  # gap 2.7 L_x
    # the uncorrected sum is much further off at the same gap
    assert abs(energy(3.0, None) - ref) > 100 * abs(energy(3.0, 2) - ref)


def test_slab_forces_against_large_gap():
    # Yeh and Berkowitz (1999), as above, for the forces (slab axis 0)
    rng = np.random.default_rng(7)
    n = 30
    x = rng.random((n, 3)) * np.array([0.25, 1.0, 1.0])
    q = rng.normal(size=n)
    q -= q.mean()
    f3 = chargesim.coulomb.forces(x, q, method="ewald", box=(2.5, 1.0, 1.0), slab=0, accuracy=1e-10)  # gap 2.25 L
    f12 = chargesim.coulomb.forces(x, q, method="ewald", box=(6.0, 1.0, 1.0), slab=0, accuracy=1e-10)
    rel = np.sqrt(np.mean(np.sum((f3 - f12) ** 2, axis=1)) / np.mean(np.sum(f12 ** 2, axis=1)))
    assert rel < 1e-5


def test_slab_net_charge_energy_consistent_with_potential():
    # Ballenegger, Arnold and Cerda, J. Chem. Phys. 131, 094107 (2009): the
    # slab energy with a net charge; 1/2 sum q phi must equal the energy whose
    # gradient is the force (checked by a central difference)
    rng = np.random.default_rng(12)
    x = rng.random((10, 3)) * np.array([1.0, 1.0, 0.3])
    q = rng.normal(size=10) + 0.3
    box = (1.0, 1.0, 1.5)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        f = chargesim.coulomb.forces(x, q, method="ewald", box=box, slab=2, accuracy=1e-12)
        h = 1e-6
        xp = x.copy()
        xm = x.copy()
        xp[3, 2] += h
        xm[3, 2] -= h
        ep = chargesim.coulomb.energy(xp, q, method="ewald", box=box, slab=2, accuracy=1e-12)
        em = chargesim.coulomb.energy(xm, q, method="ewald", box=box, slab=2, accuracy=1e-12)
    assert f[3, 2] == pytest.approx(-(ep - em) / (2 * h), rel=1e-5)


def test_accuracy_option_is_met():
    # the documented meaning of accuracy: rms relative force error (against a
    # much tighter evaluation; common practice)
    box = np.ones(3)
    x, q = random_neutral(400, box, seed=10)
    ref = chargesim.coulomb.forces(x, q, method="ewald", box=box, accuracy=1e-12)
    for acc in (1e-3, 1e-5):
        f = chargesim.coulomb.forces(x, q, method="ewald", box=box, accuracy=acc)
        rel = np.sqrt(np.mean(np.sum((f - ref) ** 2, axis=1)) / np.mean(np.sum(ref ** 2, axis=1)))
        assert rel < acc


def test_repeatable_bitwise():
    box = np.ones(3)
    x, q = random_neutral(200, box, seed=13)
    a = chargesim.coulomb.field(x, q, method="ewald", box=box)
    b = chargesim.coulomb.field(x, q, method="ewald", box=box)
    assert np.array_equal(a, b)


def test_auto_picks_ewald_for_small_periodic_systems():
    assert chargesim.coulomb.method_for(10, box=(1, 1, 1)) == "ewald"
    assert chargesim.coulomb.method_for(ewald.MESH_CROSSOVER, box=(1, 1, 1)) == "mesh"


@pytest.mark.parametrize("bad, match", [
    ({}, "box is required"),
    ({"box": (1.0, -1.0, 1.0)}, "box"),
    ({"box": (1.0, 1.0)}, "box"),
    ({"box": 1, "accuracy": 0.0}, "accuracy"),
    ({"box": 1, "accuracy": 0.5}, "accuracy"),
    ({"box": 1, "accuracy": "tight"}, "accuracy"),
    ({"box": 1, "slab": 3}, "slab"),
    ({"box": 1, "slab": "z"}, "slab"),
    ({"box": 1, "boundary": "metal"}, "boundary"),
    ({"box": 1, "slab": 2, "boundary": "vacuum"}, "boundary"),
    ({"box": 1, "real_cutoff": 0.6}, "real_cutoff"),
    ({"box": 1, "alpha": -2.0}, "alpha"),
    ({"box": 1, "screening": 1.0}, "does not take"),
])
def test_bad_options(bad, match):
    box = bad.pop("box", None)
    kw = dict(bad)
    if box is not None:
        kw["box"] = (box, box, box) if np.isscalar(box) else box
    x, q = random_neutral(4, np.ones(3), seed=0)
    with pytest.raises(ValueError, match=match):
        chargesim.coulomb.energy(x, q, method="ewald", **kw)


def test_layer_thicker_than_box_is_refused():
    x = np.array([[0.1, 0.1, 0.0], [0.2, 0.2, 1.5]])
    with pytest.raises(ValueError, match="slab"):
        chargesim.coulomb.energy(x, [1e-15, -1e-15], method="ewald", box=(1, 1, 1), slab=2)


def test_radius_beyond_half_box_is_refused():
    x, q = random_neutral(4, np.ones(3), seed=0)
    with pytest.raises(ValueError, match="radii"):
        chargesim.coulomb.energy(x, q, method="ewald", box=(1, 1, 1), radii=[0.1, 0.6, 0.1, 0.1])


def test_erfc_table_against_scipy():
    # scipy.special.erfc (reference library): the tabulated erfc of the
    # real-space kernel, relative error over the whole range it serves
    from scipy.special import erfc

    from chargesim.coulomb import _ewald_common

    x = np.linspace(0.0, 9.0, 100_001)
    got = _ewald_common.erfc_many(x, _ewald_common.ERFCX_TABLE)
    np.testing.assert_allclose(got, erfc(x), rtol=2e-14, atol=0)
