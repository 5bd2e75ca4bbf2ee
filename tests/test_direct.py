"""The direct Coulomb evaluator and the front door against textbook results.

Sources are named beside each check (see REFERENCES.md of the project).
"""
import warnings

import numpy as np
import pytest

import chargesim
from chargesim.coulomb import direct
from chargesim.physics.constants import COULOMB_K as K  # CODATA 2018, derived

rng = np.random.default_rng(20261201)


def test_coulombs_law_two_charges():
    # Coulomb's law, any electromagnetism text: F = k q1 q2 / r^2 along the line
    q1, q2, r = 2e-6, -3e-6, 0.25
    pos = np.array([[0.0, 0.0, 0.0], [r, 0.0, 0.0]])
    f = chargesim.forces(pos, [q1, q2], method="direct")
    expected = K * q1 * q2 / r**2
    assert f[1, 0] == pytest.approx(expected, rel=1e-14)
    assert f[0, 0] == pytest.approx(-expected, rel=1e-14)
    assert np.all(f[:, 1:] == 0)
    assert chargesim.energy(pos, [q1, q2], method="direct") == pytest.approx(K * q1 * q2 / r, rel=1e-14)
    phi = chargesim.potential(pos, [q1, q2], [[0.0, 0.5, 0.0]], method="direct")
    assert phi[0] == pytest.approx(K * (q1 / 0.5 + q2 / np.hypot(r, 0.5)), rel=1e-14)


def test_superposition():
    # superposition principle: the field of a set is the sum of the single fields
    pos = rng.normal(size=(50, 3))
    q = rng.normal(size=50) * 1e-9
    tgt = rng.normal(size=(20, 3)) + 5.0
    total = chargesim.field(pos, q, tgt, method="direct")
    parts = sum(chargesim.field(pos[i : i + 1], q[i : i + 1], tgt, method="direct") for i in range(50))
    np.testing.assert_allclose(total, parts, rtol=1e-12, atol=1e-12 * np.abs(total).max())


def test_newtons_third_law():
    # Newton's third law: internal forces sum to zero (to round-off)
    pos = rng.random((3000, 3))
    q = rng.normal(size=3000) * 1e-9
    f = chargesim.forces(pos, q, method="direct")
    scale = np.abs(f).sum(axis=0)
    assert np.all(np.abs(f.sum(axis=0)) < 1e-12 * scale)


def test_ring_on_axis():
    # Griffiths, Introduction to Electrodynamics: E = k Q z / (z^2 + R^2)^(3/2) on the axis
    n, radius, total = 2000, 0.1, 5e-9
    phi = np.linspace(0, 2 * np.pi, n, endpoint=False)
    pos = np.stack([radius * np.cos(phi), radius * np.sin(phi), np.zeros(n)], axis=1)
    z = np.array([0.01, 0.05, 0.1, 0.3])
    tgt = np.stack([np.zeros_like(z), np.zeros_like(z), z], axis=1)
    e = chargesim.field(pos, np.full(n, total / n), tgt, method="direct")
    expected = K * total * z / (z**2 + radius**2) ** 1.5
    np.testing.assert_allclose(e[:, 2], expected, rtol=1e-12)
    np.testing.assert_allclose(e[:, :2], 0, atol=1e-9 * expected.max())


def _sphere_points(n, radius, rng):
    # uniform points in a ball
    v = rng.normal(size=(n, 3))
    v /= np.linalg.norm(v, axis=1)[:, None]
    return v * radius * rng.random(n)[:, None] ** (1 / 3)


def _fibonacci_sphere(n):
    i = np.arange(n) + 0.5
    z = 1 - 2 * i / n
    phi = np.pi * (1 + 5**0.5) * i
    s = np.sqrt(1 - z**2)
    return np.stack([s * np.cos(phi), s * np.sin(phi), z], axis=1)


def test_uniform_sphere_from_many_charges():
    # Gauss's law (shell theorem): outside k Q / r^2; inside, the flux through a
    # sphere of radius r gives the mean radial field k Q_enc / r^2 = k Q r / R^3
    n, radius, total = 100_000, 1.0, 1e-6
    pos = _sphere_points(n, radius, rng)
    q = np.full(n, total / n)
    # outside: a point far from the ball sees the total charge (statistical
    # error of the point cloud's dipole moment ~ 1/sqrt(n))
    r = np.array([1.5, 3.0])
    e = chargesim.field(pos, q, np.stack([r, 0 * r, 0 * r], axis=1), method="direct")[:, 0]
    np.testing.assert_allclose(e, K * total / r**2, rtol=3e-3)
    # inside: mean radial field over a sphere of targets, against Gauss's law
    dirs = _fibonacci_sphere(20_000)
    dist = np.linalg.norm(pos, axis=1)
    for rr in (0.4, 0.7):
        # keep sources off the target sphere, where the flux quadrature is singular
        keep = np.abs(dist - rr) > 0.03
        e = chargesim.field(pos[keep], q[keep], dirs * rr, method="direct")
        mean_radial = np.mean(np.einsum("ij,ij->i", e, dirs))
        q_enc = q[keep & (dist < rr)].sum()
        assert mean_radial == pytest.approx(K * q_enc / rr**2, rel=2e-3)
        # and the enclosed charge of a uniform ball: Q r^3 / R^3 (1/sqrt(count) statistics)
        q_in = q[dist < rr].sum()
        assert q_in == pytest.approx(total * rr**3 / radius**3, rel=4 / np.sqrt(n * rr**3))


def test_uniform_sphere_with_radii_option():
    # Gauss's law: a target inside a finite particle of radius R sees k q r / R^3;
    # potential inside k q (3R^2 - r^2)/(2R^3), outside k q / r
    q, radius = 1e-9, 0.01
    r = np.array([0.0, 0.002, 0.005, 0.0099, 0.0101, 0.05])
    tgt = np.stack([r, np.zeros_like(r), np.zeros_like(r)], axis=1)
    e = chargesim.field([[0, 0, 0]], [q], tgt, radii=[radius], method="direct")[:, 0]
    p = chargesim.potential([[0, 0, 0]], [q], tgt, radii=[radius], method="direct")
    inside = r < radius
    exp_e = np.where(inside, K * q * r / radius**3, K * q / np.maximum(r, 1e-6) ** 2)
    exp_p = np.where(inside, K * q * (3 * radius**2 - r**2) / (2 * radius**3), K * q / np.maximum(r, 1e-6))
    np.testing.assert_allclose(e, exp_e, rtol=1e-13, atol=0)
    np.testing.assert_allclose(p, exp_p, rtol=1e-13)


def test_touching_and_overlapping_particles_stay_finite():
    # uniformly charged spheres (Gauss's law): contact never gives inf or NaN
    pos = np.array([[0.0, 0, 0], [0.0, 0, 0], [0.001, 0, 0]])
    q = np.array([1e-12, -2e-12, 3e-12])
    radii = np.array([0.002, 0.001, 0.0005])
    f = chargesim.forces(pos, q, radii=radii, method="direct")
    assert np.all(np.isfinite(f))
    # pair (0, 2): a = max(R0, R2) = 2 mm, r = 1 mm inside -> k q0 q2 r / a^3;
    # pair (1, 2): a = 1 mm = r, on the surface -> the point value k q1 q2 / r^2
    r = 0.001
    assert f[2, 0] == pytest.approx(K * q[2] * (q[0] * r / 0.002**3 + q[1] / r**2), rel=1e-13)
    assert np.abs(f.sum(axis=0)).max() < 1e-14 * np.abs(f).max()
    u = chargesim.energy(pos, q, radii=radii, method="direct")
    a = 0.002
    u01 = K * q[0] * q[1] * 3 / (2 * a)
    u02 = K * q[0] * q[2] * (3 * a**2 - 0.001**2) / (2 * a**3)
    u12 = K * q[1] * q[2] * (3 * 0.001**2 - 0.001**2) / (2 * 0.001**3)
    assert u == pytest.approx(u01 + u02 + u12, rel=1e-13)


def test_dipole_far_field():
    # point dipole, any electromagnetism text: E = k (3 (p.r^) r^ - p) / r^3 far away
    q, s = 1e-9, 1e-3
    pos = np.array([[0, 0, s / 2], [0, 0, -s / 2]])
    p = np.array([0, 0, q * s])
    dirs = rng.normal(size=(30, 3))
    dirs /= np.linalg.norm(dirs, axis=1)[:, None]
    r = 2.0
    tgt = dirs * r
    e = chargesim.field(pos, [q, -q], tgt, method="direct")
    expected = K * (3 * (dirs @ p)[:, None] * dirs - p) / r**3
    # next multipole order is (s / r)^2 ~ 2.5e-7 relative
    np.testing.assert_allclose(e, expected, atol=1e-6 * np.abs(expected).max())


def test_eps_r_divides_fields_of_free_charges():
    # a linear dielectric medium divides the field of free charges by eps_r (any EM text)
    pos = rng.random((40, 3))
    q = rng.normal(size=40) * 1e-9
    for name in ["PTFE", "water"]:
        eps = chargesim.materials.relative_permittivity(name)
        np.testing.assert_allclose(
            chargesim.field(pos, q, eps_r=eps, method="direct"),
            chargesim.field(pos, q, method="direct") / eps,
            rtol=1e-14,
        )
        assert chargesim.energy(pos, q, eps_r=eps, method="direct") == pytest.approx(
            chargesim.energy(pos, q, method="direct") / eps, rel=1e-14
        )


def test_numba_kernel_matches_numpy_reference():
    pos = rng.random((1500, 3))
    q = rng.normal(size=1500)
    tgt = rng.random((700, 3)) * 2 - 0.5
    radii = rng.random(1500) * 0.02
    for targets in (None, tgt):
        for rad in (None, radii):
            a_f, a_p = direct.evaluate(pos, q, targets, rad)
            b_f, b_p = direct.evaluate_numpy(pos, q, targets, rad, memory_budget=2**20)
            np.testing.assert_allclose(a_f, b_f, rtol=1e-11, atol=1e-11 * np.abs(b_f).max())
            np.testing.assert_allclose(a_p, b_p, rtol=1e-11, atol=1e-11 * np.abs(b_p).max())


def test_against_fmm3dpy_10k_mixed_sign():
    # fmm3dpy (general-purpose reference library): Laplace sums at eps = 1e-12
    fmm3dpy = pytest.importorskip("fmm3dpy")
    n = 10_000
    pos = rng.random((n, 3))
    q = rng.normal(size=n)
    out = fmm3dpy.lfmm3d(eps=1e-12, sources=np.ascontiguousarray(pos.T), charges=q, pg=2)
    # fmm3dpy 2.x: pot = sum q / (4 pi r), grad = grad(pot); field = -grad
    ref_e = -out.grad.T * (4 * np.pi)
    ref_p = out.pot * (4 * np.pi)
    e = chargesim.field(pos, q, method="direct") / K
    p = chargesim.potential(pos, q, method="direct") / K
    err_e = np.linalg.norm(e - ref_e) / np.linalg.norm(ref_e)
    err_p = np.linalg.norm(p - ref_p) / np.linalg.norm(ref_p)
    assert err_e < 1e-9 and err_p < 1e-9


# --- bad input ---------------------------------------------------------------

GOOD_POS = np.zeros((3, 3)) + np.arange(3)[:, None]
GOOD_Q = np.ones(3)


@pytest.mark.parametrize(
    "kwargs, fragment",
    [
        (dict(positions=[[0, 0, 0], [np.nan, 0, 0]], charges=[1, 1]), "positions holds a non-finite value .* index 1"),
        (dict(positions=[[0, 0, 0], [1, np.inf, 0]], charges=[1, 1]), "positions .* index 1"),
        # +inf and -inf in one row: their sum is NaN, the check must still name the row
        (dict(positions=[[0, 0, 0], [0, 0, 1], [np.inf, -np.inf, 0]], charges=[1, 1, 1]), "positions .* index 2"),
        (dict(positions=GOOD_POS, charges=[1, np.nan, 1]), "charges holds a non-finite value .* index 1"),
        (dict(positions=np.zeros((3, 2)), charges=GOOD_Q), r"positions must have shape \(N, 3\)"),
        (dict(positions=GOOD_POS, charges=[1, 2]), r"charges must have shape \(3,\)"),
        (dict(positions=GOOD_POS, charges=GOOD_Q, eps_r=0.5), "eps_r must be a finite number >= 1"),
        (dict(positions=GOOD_POS, charges=GOOD_Q, eps_r=np.nan), "eps_r"),
        (dict(positions=GOOD_POS, charges=GOOD_Q, radii=[0.1, -0.1, 0.1]), "radii must be >= 0; index 1"),
        (dict(positions=GOOD_POS, charges=GOOD_Q, radii=[0.1, 0.1]), r"radii must have shape \(3,\)"),
        (dict(positions=GOOD_POS, charges=GOOD_Q, targets=[[0, 0, np.nan]]), "targets holds a non-finite value .* index 0"),
        (dict(positions=GOOD_POS, charges=GOOD_Q, method="magic"), "unknown method 'magic'; allowed: 'auto', 'direct'"),
        (dict(positions=GOOD_POS, charges=GOOD_Q, method="direct", accuracy=1e-3), "method 'direct' does not take option"),
        (dict(positions=GOOD_POS, charges=GOOD_Q, method="direct", bogus=1), r"\['bogus'\]"),
    ],
)
def test_bad_input_names_the_argument(kwargs, fragment):
    with pytest.raises(ValueError, match=fragment):
        chargesim.field(**kwargs)


def test_huge_finite_positions_pass_the_finiteness_check():
    # the check's fast path sums over the coordinates; huge finite values
    # must never read as non-finite (IEEE 754: inf and NaN, nothing else)
    pos = np.array([[1e308, 1e308, 0.0], [1e308, -1e308, 1e308], [-1e308, 1e308, 1e308]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the overflow of the fast path stays silent
        f = chargesim.field(pos, [1.0, 1.0, 1.0], method="direct")
    assert f.shape == (3, 3)


def test_finiteness_check_finds_every_kind_of_non_finite_value():
    # IEEE 754: +inf, -inf and NaN anywhere (any position modulo the check's
    # four side-by-side sums, and in the tail) make an array non-finite
    from chargesim._validate import all_finite

    assert all_finite(np.zeros(0)) and all_finite(np.full(7, 1e308)) and all_finite(np.arange(9))
    for bad in (np.inf, -np.inf, np.nan):
        for n in (1, 4, 7, 10):
            for i in range(n):
                a = np.ones(n)
                a[i] = bad
                assert not all_finite(a) and not all_finite(a.reshape(n, 1))


def test_coincident_points_are_refused_with_indices():
    pos = np.array([[0.0, 0, 0], [1.0, 0, 0], [0.0, 0, 0]])
    with pytest.raises(ValueError, match="particle 0 coincides with source particle 2"):
        chargesim.forces(pos, [1, 1, 1], method="direct")
    with pytest.raises(ValueError, match="target 0 coincides with source particle 1"):
        chargesim.field(pos, [1, 1, 1], [[1.0, 0, 0]], method="direct")
    # with radii the same layout is finite
    f = chargesim.forces(pos, [1, 1, 1], method="direct", radii=[0.1, 0.1, 0.1])
    assert np.all(np.isfinite(f))


def test_empty_inputs():
    assert chargesim.field(np.zeros((0, 3)), [], method="direct").shape == (0, 3)
    assert chargesim.energy(np.zeros((0, 3)), [], method="direct") == 0.0
    assert chargesim.forces([[1.0, 2, 3]], [1e-9], method="direct").tolist() == [[0.0, 0.0, 0.0]]
