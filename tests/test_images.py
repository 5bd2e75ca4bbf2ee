"""Image charges of grounded conductors (method of images; sources named beside each check)."""
import math

import numpy as np
import pytest
from scipy.special import polygamma

import chargesim
from chargesim.physics.constants import COULOMB_K as K
from chargesim.sources import GroundedPlane, GroundedPlates, GroundedSphere, ImageSystem


def test_image_force_over_grounded_plane():
    # method of images, any electromagnetism text: F = k q^2/(4 z^2), toward the plane
    plane = GroundedPlane(point=[0.0, 0.0, 0.1], normal=[0.0, 0.0, 1.0])
    for qi, zi in ((2e-12, 0.02), (-5e-13, 0.5)):
        q = np.array([qi])
        pos = np.array([[0.3, -0.2, 0.1 + zi]])
        ipos, iq = plane.images(pos, q)
        e = chargesim.field(ipos, iq, targets=pos)  # the image's field at the charge
        f = e * q[:, None]
        assert f[0, 2] == pytest.approx(-K * qi**2 / (4 * zi**2), rel=1e-12)
        np.testing.assert_allclose(f[0, :2], 0.0, atol=1e-30)
        # the medium's permittivity divides the image field like any free charge's
        np.testing.assert_allclose(plane.field_at_charges(pos, q, eps_r=2.0), e / 2.0, rtol=1e-12)
    assert isinstance(plane, ImageSystem)


def test_grounded_plane_tilted_potential_zero_on_plane():
    n = np.array([1.0, 2.0, -0.5])
    plane = GroundedPlane(point=[0.2, 0.0, 0.0], normal=n)
    rng = np.random.default_rng(5)
    nh = n / np.linalg.norm(n)
    pos = np.array([0.2, 0.0, 0.0]) + rng.uniform(0.05, 0.5, (6, 1)) * nh + rng.normal(size=(6, 3)) * 0.1
    pos += np.outer(np.maximum(0.0, 0.05 - (pos - [0.2, 0, 0]) @ nh), nh)  # keep them on the gas side
    q = rng.normal(size=6) * 1e-12
    ipos, iq = plane.images(pos, q)
    t1 = np.cross(nh, [0.0, 0.0, 1.0])
    t1 /= np.linalg.norm(t1)
    t2 = np.cross(nh, t1)
    s = rng.uniform(-1, 1, (30, 2))
    on_plane = np.array([0.2, 0.0, 0.0]) + s[:, :1] * t1 + s[:, 1:] * t2
    phi = chargesim.potential(np.vstack([pos, ipos]), np.concatenate([q, iq]), targets=on_plane)
    assert np.max(np.abs(phi)) < 1e-9 * np.max(np.abs(chargesim.potential(pos, q, targets=on_plane)))


def test_grounded_sphere_kelvin_image():
    # Kelvin image q' = -q R/d at R^2/d: the sphere surface is at 0 V
    centre, r = np.array([0.1, -0.2, 0.3]), 0.05
    sphere = GroundedSphere(centre, r)
    pos = centre + np.array([[0.0, 0.0, 0.08], [0.03, 0.04, 0.1], [-0.2, 0.0, 0.0]])
    q = np.array([1e-12, -3e-12, 2e-12])
    ipos, iq = sphere.images(pos, q)
    d = np.linalg.norm(pos - centre, axis=1)
    np.testing.assert_allclose(iq, -q * r / d, rtol=1e-14)
    np.testing.assert_allclose(np.linalg.norm(ipos - centre, axis=1), r * r / d, rtol=1e-14)
    rng = np.random.default_rng(2)
    u = rng.normal(size=(100, 3))
    surface = centre + r * u / np.linalg.norm(u, axis=1)[:, None]
    phi = chargesim.potential(np.vstack([pos, ipos]), np.concatenate([q, iq]), targets=surface)
    scale = np.max(np.abs(chargesim.potential(pos, q, targets=surface)))
    assert np.max(np.abs(phi)) < 1e-12 * scale
    # force on one charge at distance d from a grounded sphere: k q^2 R d/(d^2 - R^2)^2,
    # toward the centre (method of images, any electromagnetism text)
    one = GroundedSphere(centre, r)
    p1 = centre + [[0.0, 0.0, 0.08]]
    e = one.field_at_charges(p1, [1e-12])
    dd = 0.08
    assert -e[0, 2] * 1e-12 == pytest.approx(K * 1e-24 * r * dd / (dd**2 - r**2) ** 2, rel=1e-12)


def test_charge_inside_grounded_shell():
    # the same Kelvin image serves a charge inside a grounded spherical shell
    sphere = GroundedSphere([0.0, 0.0, 0.0], 1.0)
    pos, q = np.array([[0.3, 0.0, 0.2]]), np.array([1e-12])
    ipos, iq = sphere.images(pos, q)
    surf = np.array([[1.0, 0, 0], [0, -1.0, 0], [0, 0.6, 0.8]])
    phi = chargesim.potential(np.vstack([pos, ipos]), np.concatenate([q, iq]), targets=surf)
    np.testing.assert_allclose(phi, 0.0, atol=1e-12 * K * 1e-12)


def _plates_force(q, w, gap):
    """Exact image force on q at distance w above the lower of two grounded plates.

    Method of images summed in closed form: F = -(k q^2/(4 L^2)) [psi_1(t) - psi_1(1 - t)],
    t = w/L, with the trigamma function psi_1 (scipy.special.polygamma); near one
    plate it tends to the single-plane k q^2/(4 w^2).
    """
    t = w / gap
    return -K * q * q / (4 * gap * gap) * (polygamma(1, t) - polygamma(1, 1 - t))


@pytest.mark.parametrize("tol", [1e-3, 1e-5, 1e-7])
def test_two_grounded_plates_series(tol):
    a, b = -0.02, 0.08
    gap = b - a
    plates = GroundedPlates("z", (a, b), tol=tol)
    w = np.array([0.003, 0.02, 0.05, 0.09])
    pos = np.column_stack([np.linspace(-0.1, 0.2, 4), np.zeros(4), a + w])
    q = np.full(4, 1e-12)
    # one charge at a time: each feels only its own images
    e = np.vstack([plates.field_at_charges(pos[i:i + 1], q[i:i + 1]) for i in range(4)])
    force = e[:, 2] * q
    scale = K * 1e-24 / gap**2  # the tolerance is relative to k q^2/L^2
    np.testing.assert_allclose(force, _plates_force(1e-12, w, gap), rtol=0, atol=tol * scale)
    np.testing.assert_allclose(e[:, :2], 0.0, atol=1e-9)
    # the plates are at 0 V: potential of charges plus images on both plates
    ipos, iq = plates.images(pos, q)
    assert ipos.shape == (4 * plates.terms, 3)
    y = np.linspace(-0.3, 0.3, 13)
    for zp in (a, b):
        pts = np.column_stack([0.05 + y, y, np.full_like(y, zp)])
        phi = chargesim.potential(np.vstack([pos, ipos]), np.concatenate([q, iq]), targets=pts)
        assert np.max(np.abs(phi)) < tol * K * 1e-12 / gap * 4


def test_plates_series_fewer_terms_than_plain_truncation():
    # the end correction keeps the image count small: about 20 images at 1e-4
    assert GroundedPlates(0, (0.0, 1.0), tol=1e-4).terms <= 26


def test_plates_reject_charges_outside_the_gap():
    plates = GroundedPlates(1, (0.0, 0.1))
    with pytest.raises(ValueError, match=r"positions\[1\].*outside the gap"):
        plates.images([[0.0, 0.05, 0.0], [0.0, 0.2, 0.0]], [1e-12, 1e-12])


def test_memory_is_n_times_terms_and_empty_input():
    plates = GroundedPlates(2, (0.0, 1.0), tol=1e-4)
    pos = np.column_stack([np.zeros(1000), np.zeros(1000), np.linspace(0.01, 0.99, 1000)])
    ipos, iq = plates.images(pos, np.ones(1000))
    assert ipos.shape == (1000 * plates.terms, 3) and iq.shape == (1000 * plates.terms,)
    # images conserve neutrality: each free charge with its images sums to zero
    assert abs(iq.sum() + 1000) < 1e-9
    e_pos, e_q = GroundedPlane([0, 0, 0], [0, 0, 1]).images(np.zeros((0, 3)), np.zeros(0))
    assert e_pos.shape == (0, 3) and e_q.shape == (0,)
