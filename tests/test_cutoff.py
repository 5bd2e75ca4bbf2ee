"""Cutoff sums (method="cutoff"): truncated and screened pair interactions.

References: scipy.spatial.cKDTree (general-purpose reference library) for the
pairs within the cutoff, with the pair sums done here in plain numpy;
the Debye–Hückel potential of a point charge, k q e^(-r/λ)/(εr r) (standard
result of linearised Poisson–Boltzmann theory, any electrolyte or plasma
text); the shifted-potential and shifted-force forms as in Allen & Tildesley,
Computer Simulation of Liquids (from memory); CODATA 2018 for k via
scipy.constants.
"""
import math

import numba
import numpy as np
import pytest
import scipy.constants as sc
from scipy.spatial import cKDTree

import chargesim
from chargesim.coulomb import cutoff as cut

K = 1.0 / (4.0 * math.pi * sc.epsilon_0)  # CODATA 2018, via scipy.constants


def _pairs(sources, targets, rc, box=None):
    """(target index, source index, separation target - source) within rc, from cKDTree."""
    if box is None:
        ts, tt = cKDTree(sources), cKDTree(targets)
    else:
        ts = cKDTree(np.mod(sources, box), boxsize=box)
        tt = cKDTree(np.mod(targets, box), boxsize=box)
    m = tt.sparse_distance_matrix(ts, rc, output_type="ndarray")
    i, j = m["i"].astype(np.int64), m["j"].astype(np.int64)
    d = targets[i] - sources[j]
    if box is not None:
        d -= box * np.round(d / box)  # minimum image
    return i, j, d


def _reference(sources, q, targets, rc, pair, box=None, self_targets=False):
    """Field and potential sums in numpy over cKDTree pairs: pair(r) -> (u, f)."""
    i, j, d = _pairs(sources, targets, rc, box)
    r = np.sqrt(np.sum(d * d, axis=1))
    keep = r < rc
    if self_targets:
        keep &= i != j
    i, j, d, r = i[keep], j[keep], d[keep], r[keep]
    u, f = pair(r)
    m = targets.shape[0]
    field = np.stack([np.bincount(i, q[j] * f / r * d[:, k], minlength=m) for k in range(3)], axis=1)
    pot = np.bincount(i, q[j] * u, minlength=m)
    return field, pot


def _coulomb(r):
    return 1.0 / r, 1.0 / r**2


def _close(a, b, rel=1e-12):
    # relative to the largest value: single sums may cancel to near zero
    np.testing.assert_allclose(a, b, rtol=rel, atol=rel * np.abs(b).max())


@pytest.fixture(scope="module")
def cloud():
    rng = np.random.default_rng(61)
    pts = rng.random((3000, 3)) * np.array([1.0, 0.8, 0.6])
    q = rng.normal(size=3000) * 1e-12
    return pts, q


def test_plain_field_equals_direct_sum_within_cutoff(cloud):
    # direct sum in numpy over the cKDTree.query pairs (general-purpose reference library)
    pts, q = cloud
    rc = 0.08
    f, p = cut.evaluate(pts, q, None, None, cutoff=rc)
    rf, rp = _reference(pts, q, pts, rc, _coulomb, self_targets=True)
    _close(f, rf)
    _close(p, rp)
    # and through the front door, with k/eps_r applied (CODATA 2018)
    e = chargesim.field(pts, q, method="cutoff", cutoff=rc, eps_r=2.0)
    _close(e, rf * K / 2.0)


def test_plain_field_periodic_minimum_image(cloud):
    # cKDTree(boxsize=) pairs, minimum-image sums in numpy (general-purpose reference library)
    pts, q = cloud
    box = np.array([1.0, 0.8, 0.6])
    shifted = pts + box * np.array([1.0, -2.0, 0.0])  # outside the box: wrapped
    rc = 0.1
    f, p = cut.evaluate(shifted, q, None, None, cutoff=rc, box=box)
    rf, rp = _reference(pts, q, pts, rc, _coulomb, box=box, self_targets=True)
    _close(f, rf)
    _close(p, rp)


def test_plain_field_at_separate_targets(cloud):
    # cKDTree.sparse_distance_matrix pairs (general-purpose reference library);
    # targets reach beyond the sources' extent (a field grid around a cloud)
    pts, q = cloud
    rng = np.random.default_rng(62)
    tgt = rng.random((800, 3)) * 1.6 - 0.3
    rc = 0.09
    f, p = cut.evaluate(pts, q, tgt, None, cutoff=rc)
    rf, rp = _reference(pts, q, tgt, rc, _coulomb)
    _close(f, rf)
    _close(p, rp)
    far = np.all(rf == 0.0, axis=1)
    assert far.any() and np.all(f[far] == 0.0)


@pytest.mark.parametrize("periodic", [False, True])
def test_shifted_forms_and_screening(cloud, periodic):
    # shifted-potential u(r) - u(rc) and shifted-force u(r) - u(rc) + (r - rc) f(rc),
    # f(r) - f(rc): Allen & Tildesley (from memory); pair sums in numpy over
    # cKDTree pairs (general-purpose reference library)
    pts, q = cloud
    box = np.array([1.0, 0.8, 0.6]) if periodic else None
    rc, lam = 0.1, 0.03

    def screened(r):
        e = np.exp(-r / lam)
        return e / r, e * (1.0 + r / lam) / r**2

    for pair, kw in ((_coulomb, {}), (screened, {"screening_length": lam})):
        uc, fc = (float(v) for v in pair(np.array(rc)))
        forms = {
            "shifted-potential": lambda r, pair=pair, uc=uc: (pair(r)[0] - uc, pair(r)[1]),
            "shifted-force": lambda r, pair=pair, uc=uc, fc=fc: (pair(r)[0] - uc + (r - rc) * fc,
                                                                 pair(r)[1] - fc),
            "plain": pair,
        }
        for name, form in forms.items():
            f, p = cut.evaluate(pts, q, None, None, cutoff=rc, truncation=name, box=box, **kw)
            rf, rp = _reference(pts, q, pts, rc, form, box=box, self_targets=True)
            _close(f, rf)
            _close(p, rp)


def test_periodic_field_at_separate_targets(cloud):
    # cKDTree(boxsize=).sparse_distance_matrix pairs, minimum image in numpy
    # (general-purpose reference library); targets outside the box are wrapped
    pts, q = cloud
    box = np.array([1.0, 0.8, 0.6])
    rng = np.random.default_rng(67)
    tgt = rng.random((500, 3)) * 3 * box - box
    f, p = cut.evaluate(pts, q, tgt, None, cutoff=0.12, truncation="shifted-force", box=box)

    def sf(r):
        return 1 / r - 1 / 0.12 + (r - 0.12) / 0.12**2, 1 / r**2 - 1 / 0.12**2

    rf, rp = _reference(pts, q, tgt, 0.12, sf, box=box)
    _close(f, rf)
    _close(p, rp)


def test_sphere_path_matches_point_pairs_outside_contact(cloud):
    # with radii too small for any pair to touch, the finite-sphere kernel must
    # give the point-pair sums of every truncation and of screening (numpy over
    # cKDTree pairs, general-purpose reference library)
    pts, q = cloud
    rad = np.full(pts.shape[0], 1e-7)
    rc, lam = 0.1, 0.04

    def screened(r):
        e = np.exp(-r / lam)
        return e / r, e * (1.0 + r / lam) / r**2

    uc, fc = (float(v) for v in screened(np.array(rc)))
    i, j, d = _pairs(pts, pts, rc)
    r = np.sqrt(np.sum(d * d, axis=1))
    assert r[i != j].min() > 2e-7
    for name, form in (("plain", screened),
                       ("shifted-potential", lambda r: (screened(r)[0] - uc, screened(r)[1])),
                       ("shifted-force", lambda r: (screened(r)[0] - uc + (r - rc) * fc, screened(r)[1] - fc))):
        f, p = cut.evaluate(pts, q, None, rad, cutoff=rc, truncation=name, screening_length=lam)
        rf, rp = _reference(pts, q, pts, rc, form, self_targets=True)
        _close(f, rf)
        _close(p, rp)


def test_screened_single_charge_against_formula():
    # Debye–Hückel potential k q e^(-r/λ)/(εr r) and field k q e^(-r/λ)(1 + r/λ)/(εr r^2)
    # (linearised Poisson–Boltzmann, standard result); k from CODATA 2018
    q, lam, eps = 3e-15, 2e-6, 80.1  # water, 20 °C: CRC Handbook (from memory)
    r = np.array([0.1, 0.5, 1.0, 3.0, 10.0]) * lam
    tgt = np.stack([r, np.zeros_like(r), np.zeros_like(r)], axis=1)
    src = np.zeros((1, 3))
    phi = chargesim.potential(src, [q], tgt, method="cutoff", screening_length=lam, eps_r=eps)
    np.testing.assert_allclose(phi, K * q * np.exp(-r / lam) / (eps * r), rtol=1e-13)
    e = chargesim.field(src, [q], tgt, method="cutoff", screening_length=lam, eps_r=eps)
    np.testing.assert_allclose(e[:, 0], K * q * np.exp(-r / lam) * (1 + r / lam) / (eps * r**2), rtol=1e-13)
    np.testing.assert_array_equal(e[:, 1:], 0.0)
    # the default cutoff (documented rule: e^(-rc/λ) = 1e-6) drops what lies beyond
    beyond = np.array([[1.01 * cut.SCREENING_CUTOFFS * lam, 0.0, 0.0]])
    assert chargesim.potential(src, [q], beyond, method="cutoff", screening_length=lam)[0] == 0.0
    # method="auto" takes the cutoff method when a screening length is given
    assert chargesim.coulomb.method_for(10, screening_length=lam) == "cutoff"
    auto = chargesim.potential(src, [q], tgt, screening_length=lam, eps_r=eps)
    np.testing.assert_array_equal(auto, phi)


def test_finite_radii_uniform_sphere_inside():
    # uniformly charged sphere: inside q r/a^3 and q (3a^2 - r^2)/(2a^3) (Gauss's law),
    # a = max(R_i, R_j); pair sums in numpy over cKDTree pairs (general-purpose reference library)
    rng = np.random.default_rng(63)
    pts = rng.random((400, 3)) * 0.2
    pts[1] = pts[0]  # coincident distinct spheres are legitimate
    q = rng.normal(size=400)
    rad = rng.random(400) * 0.02 + 0.001
    rc = 0.05
    i, j, d = _pairs(pts, pts, rc)
    keep = i != j
    i, j, d = i[keep], j[keep], d[keep]
    r = np.sqrt(np.sum(d * d, axis=1))
    a = np.maximum(rad[i], rad[j])
    inside = r < a
    u = np.where(inside, (3 * a**2 - r**2) / (2 * a**3), 1 / np.maximum(r, a))
    g = np.where(inside, 1 / a**3, 1 / np.maximum(r, a) ** 3)
    rf = np.stack([np.bincount(i, q[j] * g * d[:, k], minlength=400) for k in range(3)], axis=1)
    rp = np.bincount(i, q[j] * u, minlength=400)
    f, p = cut.evaluate(pts, q, None, rad, cutoff=rc)
    _close(f, rf)
    _close(p, rp)


def test_screened_sphere_cap_is_smooth_and_tends_to_uniform_sphere():
    # inside a screened sphere the documented cap matches value and slope at
    # r = a (continuity, analytic) and, as λ grows, tends to the uniformly charged
    # sphere q (3a^2 - r^2)/(2a^3), q r/a^3 (Gauss's law)
    a, q = 0.01, np.array([2.0])
    src = np.zeros((1, 3))
    r = a * np.array([1 - 1e-9, 1 + 1e-9, 0.5, 0.25])
    tgt = np.stack([r, np.zeros(4), np.zeros(4)], axis=1)
    f, p = cut.evaluate(src, q, tgt, np.array([a]), cutoff=0.05, screening_length=0.02)
    np.testing.assert_allclose(p[0], p[1], rtol=1e-8)
    np.testing.assert_allclose(f[0, 0], f[1, 0], rtol=1e-7)
    np.testing.assert_allclose(f[2:, 0] / r[2:], f[0, 0] / r[0], rtol=1e-7)  # linear in r inside
    f, p = cut.evaluate(src, q, tgt[2:], np.array([a]), cutoff=0.05, screening_length=1e9)
    np.testing.assert_allclose(p, q * (3 * a**2 - r[2:] ** 2) / (2 * a**3), rtol=1e-9)
    np.testing.assert_allclose(f[:, 0], q * r[2:] / a**3, rtol=1e-9)


def test_velocity_verlet_conserves_energy_with_shifted_force():
    # shifted-force truncation leaves no jump in force or energy at the cutoff, so
    # velocity Verlet (symplectic, time-reversible) conserves energy to O(dt^2);
    # plain truncation does not (Allen & Tildesley, from memory)
    rng = np.random.default_rng(64)
    box = np.array([3.0, 3.0, 3.0])
    grid = np.stack(np.meshgrid(*[np.arange(3) + 0.5] * 3, indexing="ij"), -1).reshape(-1, 3)
    x0 = grid + rng.normal(scale=0.1, size=grid.shape)
    q = np.full(27, 1e-5)  # all alike: a repulsive one-component system
    mass, rc, duration = 1.0, 1.4, 15.0  # kg, m, s: about ten collision times
    v0 = rng.normal(scale=0.5, size=grid.shape)

    def drift(truncation, dt):
        kw = dict(method="cutoff", cutoff=rc, truncation=truncation, box=box)
        x, v = x0.copy(), v0.copy()
        f = chargesim.forces(x, q, **kw)
        e0 = chargesim.energy(x, q, **kw) + 0.5 * mass * np.sum(v * v)
        worst = 0.0
        for _ in range(int(round(duration / dt))):
            v += 0.5 * dt * f / mass
            x += dt * v
            f = chargesim.forces(x, q, **kw)
            v += 0.5 * dt * f / mass
            e = chargesim.energy(x, q, **kw) + 0.5 * mass * np.sum(v * v)
            worst = max(worst, abs(e - e0) / abs(e0))
        return worst

    sf = drift("shifted-force", 0.01)
    assert sf < 1e-4
    # the error is the integrator's O(dt^2), not jumps at the cutoff
    assert drift("shifted-force", 0.005) < sf / 3
    # the check can tell a truncation that jumps from one that does not
    assert drift("plain", 0.01) > 30 * sf


def test_empty_and_single_particle():
    # a lone charge feels no field from itself; its own field is q/r^2 (Coulomb's law)
    one = np.array([[0.1, 0.2, 0.3]])
    f, p = cut.evaluate(one, np.array([2.0]), None, None, cutoff=0.5)
    np.testing.assert_array_equal(f, 0.0)
    np.testing.assert_array_equal(p, 0.0)
    tgt = np.array([[0.1, 0.2, 0.55], [0.1, 0.2, 0.9]])
    f, p = cut.evaluate(one, np.array([2.0]), tgt, None, cutoff=0.5)
    np.testing.assert_allclose(f[0], [0, 0, 2.0 / 0.25**2], rtol=1e-14)
    np.testing.assert_allclose(p, [2.0 / 0.25, 0.0], rtol=1e-14)
    np.testing.assert_array_equal(f[1], 0.0)
    for box in (None, [1.0, 1.0, 1.0]):
        e = chargesim.field(np.zeros((0, 3)), [], method="cutoff", cutoff=0.3, box=box)
        assert e.shape == (0, 3)
        assert chargesim.energy(one, [1e-9], method="cutoff", cutoff=0.3, box=box) == 0.0
    e = chargesim.field(np.zeros((0, 3)), [], tgt, method="cutoff", cutoff=0.3)
    np.testing.assert_array_equal(e, np.zeros((2, 3)))


def test_coincident_points_raise_and_results_are_reproducible():
    # a point target on a point source: the field is infinite (Coulomb's law)
    rng = np.random.default_rng(65)
    pts = rng.random((500, 3))
    pts[7] = pts[3]
    with pytest.raises(ValueError, match="particle 3 coincides with source particle 7"):
        cut.evaluate(pts, np.ones(500), None, None, cutoff=0.2)
    with pytest.raises(ValueError, match="target 1 coincides with source particle 3"):
        cut.evaluate(pts, np.ones(500), np.stack([pts[3] + 1e-3, pts[7]]), None, cutoff=0.2)
    # one thread or two: each target is summed by one thread in a fixed order
    pts = rng.random((5000, 3))
    q = rng.normal(size=5000)
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = cut.evaluate(pts, q, None, None, cutoff=0.1)
        numba.set_num_threads(min(2, numba.config.NUMBA_NUM_THREADS))
        two = cut.evaluate(pts, q, None, None, cutoff=0.1)
    finally:
        numba.set_num_threads(before)
    np.testing.assert_array_equal(one[0], two[0])
    np.testing.assert_array_equal(one[1], two[1])


@pytest.mark.parametrize("options, match", [
    ({"cutoff": 0.1, "truncation": "shifted"}, "truncation must be one of 'plain', 'shifted-potential', 'shifted-force'"),
    ({"cutoff": -1.0}, "cutoff must be a finite positive number"),
    ({"cutoff": "far"}, "cutoff must be a positive number"),
    ({"cutoff": 0.1, "screening_length": 0.0}, "screening_length must be a finite positive number"),
    ({"cutoff": 0.1, "box": [1.0, 1.0]}, "box must be three"),
    ({"cutoff": 0.6, "box": [1.0, 1.0, 1.0]}, "exceeds half the smallest box edge"),
    ({"screening_length": 0.1, "box": [1.0, 1.0, 1.0]}, "default cutoff"),
    ({}, "cutoff must be given"),
])
def test_bad_options(options, match):
    # option checks name the option and what is allowed (house rule)
    pts = np.random.default_rng(66).random((10, 3))
    with pytest.raises(ValueError, match=match):
        chargesim.field(pts, np.ones(10), method="cutoff", **options)
