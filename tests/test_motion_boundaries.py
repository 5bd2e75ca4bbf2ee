"""Collectors, domain boundaries, Brownian motion and charging zones."""
import math

import numba
import numpy as np
import pytest

from chargesim.motion import (
    ChargingZone,
    CylinderCollector,
    Domain,
    MemoryRecorder,
    Medium,
    ParticleState,
    PlaneCollector,
    Simulation,
    SphereCollector,
    System,
)
from chargesim.physics import charging
from chargesim.physics.constants import ELEMENTARY_CHARGE, EPSILON_0
from chargesim.sources import WireInTube


@pytest.fixture(autouse=True)
def one_thread():
    old = numba.get_num_threads()
    numba.set_num_threads(1)
    yield
    numba.set_num_threads(old)


def test_plane_contact_is_where_the_particle_surface_touches():
    # straight-line geometry worked by hand
    plate = PlaneCollector("p", (0, 0, 0), (0, 2, 0), lo=(-1, -1, -1), hi=(1, 1, 1))
    x0 = np.array([[0.0, 1.0, 0.0], [5.0, 1.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.05, 0.0]])
    x1 = np.array([[0.0, -1.0, 0.0], [5.0, -1.0, 0.0], [0.0, 0.5, 0.0], [0.0, 0.5, 0.0]])
    s, p = plate.contact(x0, x1, np.full(4, 0.1))
    assert s[0] == pytest.approx(0.45)  # centre at y = r = 0.1
    np.testing.assert_allclose(p[0], [0, 0, 0], atol=1e-15)
    assert np.isinf(s[1])  # passes beside the plate
    assert np.isinf(s[2])  # does not reach it
    assert s[3] == 0.0  # touching at the start
    assert plate.area == 4.0
    assert plate.signed_distance(np.array([[0.0, 0.3, 0.0]]), np.array([0.1]))[0] == pytest.approx(0.2)


def test_cylinder_and_sphere_contacts():
    tube = CylinderCollector("tube", (0, 0, 0), (0, 0, 1), 1.0, inside=True, extent=(-2, 2))
    s, p = tube.contact(np.array([[0.0, 0, 0]]), np.array([[2.0, 0, 1.0]]), np.array([0.1]))
    assert s[0] == pytest.approx(0.45)  # radial distance 0.9 = R - r reached at 0.45
    np.testing.assert_allclose(p[0], [1.0, 0, 0.45])
    assert tube.area == pytest.approx(2 * math.pi * 4)
    wire = CylinderCollector("wire", (0, 0, 0), (0, 0, 1), 0.1, inside=False)
    s, p = wire.contact(np.array([[1.0, 0.05, 0]]), np.array([[-1.0, 0.05, 0]]), np.array([0.0]))
    # enters |w| = 0.1 at x = sqrt(0.1^2 - 0.05^2)
    assert s[0] == pytest.approx((1 - math.sqrt(0.01 - 0.0025)) / 2)
    np.testing.assert_allclose(np.hypot(p[0, 0], p[0, 1]), 0.1)
    ball = SphereCollector("ball", (0, 0, 0), 1.0)
    # passes through the sphere within one step: still caught
    s, p = ball.contact(np.array([[-3.0, 0.5, 0]]), np.array([[3.0, 0.5, 0]]), np.array([0.0]))
    assert s[0] == pytest.approx((3 - math.sqrt(0.75)) / 6)
    np.testing.assert_allclose(np.linalg.norm(p[0]), 1.0)
    s, _ = ball.contact(np.array([[-3.0, 1.5, 0]]), np.array([[3.0, 1.5, 0]]), np.array([0.4]))
    assert np.isinf(s[0])  # misses by 0.1
    assert ball.area == pytest.approx(4 * math.pi)
    # mirrored random-walk points leave the collector
    y = ball.mirror(np.array([[0.95, 0, 0]]), np.array([0.0]))
    np.testing.assert_allclose(y[0], [1.05, 0, 0])


def test_domain_reflects_wraps_and_finds_outlets():
    dom = Domain(lo=(0, 0, -math.inf), hi=(1, 1, 2.0), kinds=("reflecting", "periodic", "open"),
                 outlet_names={"z+": "stack"})
    x = np.array([[1.2, 1.25, 0], [-0.3, -0.25, 0], [2.5, 3.5, 0]])
    v = np.ones((3, 3))
    dom.fold(x, v)
    np.testing.assert_allclose(x[:, 0], [0.8, 0.3, 0.5])
    np.testing.assert_allclose(v[:, 0], [-1, -1, 1])  # one, one and two reflections
    np.testing.assert_allclose(x[:, 1], [0.25, 0.75, 0.5])
    assert dom.outlets == [(2, 1, "stack")]
    s = dom.crossing(np.array([[0.5, 0.5, 1.0]]), np.array([[0.5, 0.5, 3.0]]), 2, 1)
    assert s[0] == pytest.approx(0.5)
    # the crossing fraction of a straight segment through a face (analytic
    # geometry: (bound - z0) / (z1 - z0)); inf for segments ending inside,
    # low face too
    rng = np.random.default_rng(4)
    z0 = rng.uniform(0, 2, 500)
    z1 = z0 + rng.normal(size=500)
    pts0 = np.column_stack([np.full(500, 0.5), np.full(500, 0.5), z0])
    pts1 = np.column_stack([np.full(500, 0.5), np.full(500, 0.5), z1])
    box = Domain(lo=(0, 0, 0.0), hi=(1, 1, 2.0), kinds=("open", "open", "open"))
    for side, bound, beyond in ((1, 2.0, z1 > 2.0), (-1, 0.0, z1 < 0.0)):
        s = box.crossing(pts0, pts1, 2, side)
        assert np.array_equal(np.isinf(s), ~beyond) and beyond.any()
        np.testing.assert_allclose(s[beyond], np.clip((bound - z0[beyond]) / (z1 - z0)[beyond], 0, 1), rtol=1e-14)
    with pytest.raises(ValueError, match="kinds"):
        Domain(kinds=("open", "sideways", "open"))
    with pytest.raises(ValueError, match="finite"):
        Domain(kinds=("periodic", "open", "open"))


def test_brownian_mean_square_displacement():
    # <dx^2> = 2 D t per axis with D = k T Cc/(3 pi mu d) (Einstein; Hinds)
    n = 20000
    s = ParticleState(n)
    s.add(np.zeros((n, 3)), diameter=0.1e-6, density=1000.0)
    med = Medium()
    sys_ = System(np.random.default_rng(11), particles=s, medium=med, brownian=True, coulomb=None)
    dt = 1e-3
    Simulation(sys_, dt=dt, diagnostics_every=0).run(steps=10)
    d = med.diffusivity(0.1e-6)
    msd = np.mean(s.position ** 2, axis=0)
    # the sample variance of N normal values has relative error sqrt(2/N) = 1 %
    np.testing.assert_allclose(msd, 2 * d * 10 * dt, rtol=0.04)


def test_field_charging_in_a_zone_follows_the_pauthenier_rate():
    # q(t) = q_s t/(t + tau), tau = 4 eps0/(N_i e Z_i), with
    # q_s = 3 pi eps0 d^2 E eps_p/(eps_p + 2) (Pauthenier & Moreau-Hanot 1932; Hinds)
    from chargesim.sources import UniformField

    d, e, ni, eps_p = 5e-6, 3e5, 1e14, 4.0
    s = ParticleState()
    s.add(np.zeros((1, 3)), diameter=d, density=1000.0, eps_p=eps_p)
    zone = ChargingZone((-1, -1, -1), (1, 1, 1), ion_density=ni, diffusion=False)
    sys_ = System(np.random.default_rng(0), particles=s, sources=[UniformField((0, 0, e))], coulomb=None,
                  charging=[zone])
    t = 0.02
    Simulation(sys_, dt=1e-3, diagnostics_every=0).run(t_end=t)
    qs = 3 * math.pi * EPSILON_0 * d * d * e * eps_p / (eps_p + 2)
    tau = 4 * EPSILON_0 / (ni * ELEMENTARY_CHARGE * charging.DEFAULT_ION_MOBILITY)
    assert s.charge[0] == pytest.approx(-qs * t / (t + tau), rel=1e-9)  # negative ions


def test_wire_in_tube_deposits_on_the_tube_at_the_analytic_time():
    # E(r) = V/(r ln(b/a)) (standard electrostatics); at terminal drift
    # dr/dt = Z E(r), so r^2 - r0^2 = 2 Z |V| t/ln(b/a) (analytic), reaching
    # contact at r = b - d/2
    a, b, v = 1e-3, 0.1, -30e3
    d, q = 5e-6, -500 * ELEMENTARY_CHARGE
    rng = np.random.default_rng(2)
    n = 200
    r0 = rng.uniform(0.02, 0.09, n)
    phi = rng.uniform(0, 2 * math.pi, n)
    s = ParticleState()
    s.add(np.column_stack([r0 * np.cos(phi), r0 * np.sin(phi), rng.uniform(-0.1, 0.1, n)]),
          diameter=d, density=1000.0, charge=q)
    tube = CylinderCollector("tube", (0, 0, 0), (0, 0, 1), b, inside=True, extent=(-0.5, 0.5))
    wire = CylinderCollector("wire", (0, 0, 0), (0, 0, 1), a, inside=False)
    sys_ = System(rng, particles=s, sources=[WireInTube(v, a, b)], collectors=[tube, wire], coulomb=None)
    med = Medium()
    z = q * med.mobility(d)
    t_far = (b ** 2 - 0.02 ** 2) * math.log(b / a) / (2 * abs(z * v))
    rec = MemoryRecorder(keep_frames=False)
    Simulation(sys_, dt=t_far / 1000, diagnostics_every=0).run(t_end=1.05 * t_far, recorder=rec)
    dep = rec.all_deposits
    assert dep["id"].size == n and np.all(dep["surface"] == "tube")
    np.testing.assert_allclose(np.hypot(dep["position"][:, 0], dep["position"][:, 1]), b, rtol=1e-12)
    r_start = r0[dep["id"]]
    expect = ((b - d / 2) ** 2 - r_start ** 2) * math.log(b / a) / (2 * abs(z * v))
    np.testing.assert_allclose(dep["time"], expect, rtol=2e-3)


@pytest.mark.parametrize("bounded", [False, True])
def test_plane_contact_is_the_segment_plane_intersection(bounded):
    # reference: the line-plane intersection of analytic geometry, for the
    # sphere of radius a: the centre meets the plane shifted by a along the
    # normal at s = d0 / (d0 - d1), d = (x - p) . n - a; 0 if touching at the
    # start; a touch outside the collector's box does not count
    rng = np.random.default_rng(12)
    m = 2000
    n = np.array([0.3, -0.8, 0.52])
    n /= np.linalg.norm(n)
    p = np.array([0.1, 0.2, -0.1])
    kw = dict(lo=(-0.3, -0.4, -0.5), hi=(0.5, 0.6, 0.2)) if bounded else {}
    plate = PlaneCollector("p", p, n, **kw)
    x0 = rng.uniform(-1, 1, (m, 3))
    x1 = x0 + rng.normal(size=(m, 3)) * 0.3
    a = rng.uniform(0, 0.05, m)
    s, point = plate.contact(x0, x1, a)
    d0 = (x0 - p) @ n - a
    d1 = (x1 - p) @ n - a
    want = np.where(d0 <= 0, 0.0, np.where(d1 <= 0, d0 / np.where(d1 <= 0, d0 - d1, 1.0), np.inf))
    xs = x0 + np.where(np.isfinite(want), want, 0.0)[:, None] * (x1 - x0)
    foot = xs - ((xs - p) @ n)[:, None] * n
    if bounded:
        outside = ~np.all((foot >= kw["lo"]) & (foot <= kw["hi"]), axis=1)
        want[outside] = np.inf
    assert np.array_equal(np.isinf(s), np.isinf(want))
    assert 0 < np.isfinite(s).sum() < m and np.any(s == 0) and np.any((s > 0) & (s < 1))
    np.testing.assert_allclose(s[np.isfinite(s)], want[np.isfinite(want)], rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(point, foot, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose((point - p) @ n, 0.0, atol=1e-14)
