"""Particle dynamics against analytic mechanics: drift, settling, scattering,
energy conservation, Coulomb explosion, image attraction."""
import math

import numba
import numpy as np
import pytest
from scipy.optimize import brentq

from chargesim import coulomb
from chargesim.motion import (
    Coulomb,
    DragExact,
    Medium,
    ParticleState,
    Simulation,
    StepControl,
    System,
    VelocityVerlet,
)
from chargesim.physics import aerosol
from chargesim.physics.constants import COULOMB_K, ELEMENTARY_CHARGE, STANDARD_GRAVITY
from chargesim.sources import GroundedPlane, UniformField


@pytest.fixture(autouse=True)
def one_thread():
    # small N: waking threads costs more than the work on a shared machine
    old = numba.get_num_threads()
    numba.set_num_threads(1)
    yield
    numba.set_num_threads(old)


def _one(position, velocity=(0, 0, 0), *, diameter=1e-6, density=1000.0, charge=0.0):
    s = ParticleState()
    s.add(np.atleast_2d(np.asarray(position, float)), np.atleast_2d(np.asarray(velocity, float)),
          diameter=diameter, density=density, charge=charge)
    return s


def test_migration_velocity_is_reached_in_a_uniform_field():
    # w = q E Cc/(3 pi mu d) (Hinds, Aerosol Technology)
    d, q, e = 2e-6, -50 * ELEMENTARY_CHARGE, 3e5
    med = Medium()
    tau = med.relaxation_time(d, 1000.0)
    s = _one((0, 0, 0), diameter=d, charge=q)
    sim = Simulation(System(np.random.default_rng(0), particles=s, sources=[UniformField((0, e, 0))], coulomb=None),
                     dt=0.05 * tau, diagnostics_every=0)
    sim.run(t_end=40 * tau)
    w = q * e * med.slip_correction(d) / (3 * math.pi * med.viscosity * d)
    assert s.velocity[0, 1] == pytest.approx(w, rel=1e-9)
    assert w == pytest.approx(aerosol.migration_velocity(d, q, e), rel=1e-12)
    assert abs(s.velocity[0, 0]) < 1e-20 and abs(s.velocity[0, 2]) < 1e-20


@pytest.mark.parametrize("integrator", ["drag-exact", "auto"])
def test_drag_exact_at_1000_tau_gives_the_settling_velocity_and_exact_path(integrator):
    # V_TS = tau g (Stokes regime, Hinds); about 3.5e-5 m/s and tau about
    # 3.6e-6 s for 1 um, 1000 kg/m^3 in air at 20 degC (Hinds table, from memory)
    med = Medium()
    tau = med.relaxation_time(1e-6, 1000.0)
    assert tau == pytest.approx(3.6e-6, rel=0.02)
    s = _one((0, 0, 0))
    sys_ = System(np.random.default_rng(0), particles=s, gravity=(0, 0, -STANDARD_GRAVITY), coulomb=None)
    dt = 1000 * tau
    sim = Simulation(sys_, dt=dt, integrator=integrator, diagnostics_every=0)
    sim.run(steps=5)
    vts = tau * STANDARD_GRAVITY
    assert vts == pytest.approx(3.5e-5, rel=0.02)
    assert s.velocity[0, 2] == pytest.approx(-vts, rel=1e-12)
    # from rest under a constant force: z(t) = -V_TS (t - tau (1 - exp(-t/tau)))
    t = 5 * dt
    assert s.position[0, 2] == pytest.approx(-vts * (t - tau * (1 - math.exp(-t / tau))), rel=1e-12)


def test_verlet_refuses_a_step_beyond_its_stability_limit_under_drag():
    med = Medium()
    tau = med.relaxation_time(1e-6, 1000.0)
    s = _one((0, 0, 0))
    sim = Simulation(System(np.random.default_rng(0), particles=s, coulomb=None), dt=3 * tau, integrator="verlet")
    with pytest.raises(ValueError, match="stability limit"):
        sim.run(steps=1)
    assert np.isinf(DragExact().stable_step(np.array([1e6]))[0])
    assert VelocityVerlet().stable_step(np.array([1.0 / tau]))[0] == pytest.approx(2 * tau)


@pytest.mark.parametrize("b_over_d0", [1.0, 3.0])
def test_rutherford_scattering_angle(b_over_d0):
    # tan(theta/2) = k q1 q2/(mu v0^2 b) (any classical mechanics text); the
    # target is 1e12 times heavier (mu = m), start and end at 2000 d0: the
    # finite distance shifts tan(theta/2) by about d0/L = 5e-4
    q, m, v0 = 1e-12, 1e-12, 1.0
    d0 = COULOMB_K * q * q / (m * v0 ** 2)
    b, length = b_over_d0 * d0, 2000 * d0
    rho = m / (math.pi / 6 * 1e-18)
    s = ParticleState()
    s.add([[-length, b, 0]], [[v0, 0, 0]], diameter=1e-6, density=rho, charge=q)
    s.add([[0, 0, 0]], diameter=1e-6, density=rho * 1e12, charge=q)
    sys_ = System(np.random.default_rng(0), particles=s, drag=False, coulomb=Coulomb("direct", radii="none"))
    ctl = StepControl(tolerance=1e-6 * d0, dt_min=1e-6 * d0 / v0, dt_max=50 * d0 / v0)
    sim = Simulation(sys_, dt=1e-3 * d0 / v0, integrator="verlet", step_control=ctl, diagnostics_every=0)
    sim.run(t_end=2 * length / v0)
    v = s.velocity[0]
    theta = math.atan2(v[1], v[0])
    assert math.tan(theta / 2) == pytest.approx(d0 / b, rel=2e-3)
    # energy conservation: v^2 = v0^2 + 2 k q^2/m (1/r_start - 1/r_end)
    r1 = np.linalg.norm(s.position[0] - s.position[1])
    v_end = math.sqrt(v0 ** 2 + 2 * COULOMB_K * q * q / m * (1 / math.hypot(length, b) - 1 / r1))
    assert np.linalg.norm(v) == pytest.approx(v_end, rel=1e-5)


def _cold_lattice(rng, n_side=4, spacing=1e-3, jitter=0.2e-3):
    g = (np.arange(n_side) - (n_side - 1) / 2) * spacing
    p = np.stack(np.meshgrid(g, g, g, indexing="ij"), -1).reshape(-1, 3)
    return p + rng.uniform(-jitter, jitter, p.shape)


def test_velocity_verlet_conserves_energy_of_a_cold_charged_cloud():
    # |dE/E| <= 1e-6 over 1e4 steps at dt = 1e-3 of the cloud's time scale
    # sqrt(m a^3/(k q^2)), a the spacing (the criterion; a
    # symplectic scheme shows no drift, common practice)
    rng = np.random.default_rng(3)
    pos = _cold_lattice(rng)
    q = 1e-13
    s = ParticleState()
    s.add(pos, diameter=1e-5, density=1000.0, charge=q)
    t_scale = math.sqrt(s.mass[0] * 1e-9 / (COULOMB_K * q * q))
    sys_ = System(np.random.default_rng(0), particles=s, drag=False, coulomb=Coulomb("direct", radii="none"))
    sim = Simulation(sys_, dt=1e-3 * t_scale, integrator="verlet", diagnostics_every=0)

    def energy():
        kin = 0.5 * np.sum(s.mass * np.einsum("ij,ij->i", s.velocity, s.velocity))
        return kin + coulomb.energy(s.position, s.charge, method="direct")

    e0 = energy()
    sim.run(steps=10000)
    assert abs(energy() - e0) / abs(e0) <= 1e-6
    # the cloud did expand: the test is not of a frozen state
    assert np.mean(np.linalg.norm(s.position, axis=1)) > 1.5 * np.mean(np.linalg.norm(pos, axis=1))


def test_energy_error_falls_as_dt_squared():
    rng = np.random.default_rng(4)
    pos = _cold_lattice(rng, n_side=3)
    q = 1e-13
    errs = []
    for frac in (4e-3, 2e-3):
        s = ParticleState()
        s.add(pos, diameter=1e-5, density=1000.0, charge=q)
        t_scale = math.sqrt(s.mass[0] * 1e-9 / (COULOMB_K * q * q))
        sys_ = System(np.random.default_rng(0), particles=s, drag=False, coulomb=Coulomb("direct", radii="none"))
        e0 = coulomb.energy(s.position, s.charge, method="direct")
        Simulation(sys_, dt=frac * t_scale, integrator="verlet", diagnostics_every=0).run(t_end=2 * t_scale)
        e1 = 0.5 * np.sum(s.mass * np.einsum("ij,ij->i", s.velocity, s.velocity)) + \
            coulomb.energy(s.position, s.charge, method="direct")
        errs.append(abs(e1 - e0) / e0)
    # second order: halving dt divides the error by about 4
    assert 2.5 < errs[0] / errs[1] < 6.0


def test_uniformly_charged_cold_sphere_expands_self_similarly():
    # Each shell r0 obeys r'' = k q Q(r0)/(m r^2) while shells do not cross;
    # energy conservation gives t(r) = T0 [sqrt(x(x-1)) + ln(sqrt(x) + sqrt(x-1))],
    # x = r/r0, T0 = sqrt(m r0^3/(2 k q Q(r0))) (analytic); for a uniform
    # sphere T0 is the same for every shell, so the cloud grows self-similarly.
    rng = np.random.default_rng(5)
    n, radius, q = 600, 1e-3, 1e-14
    p = rng.normal(size=(n, 3))
    p *= (radius * rng.random(n) ** (1 / 3) / np.linalg.norm(p, axis=1))[:, None]
    s = ParticleState()
    s.add(p, diameter=1e-5, density=1000.0, charge=q)
    m = s.mass[0]
    t0 = math.sqrt(m * radius ** 3 / (2 * COULOMB_K * q * q * n))
    sys_ = System(rng, particles=s, drag=False, coulomb=Coulomb("direct", radii="none"))
    t_end = 3 * t0
    Simulation(sys_, dt=3e-3 * t0, integrator="verlet", diagnostics_every=0).run(t_end=t_end)

    def shape(x):
        return math.sqrt(x * (x - 1)) + math.log(math.sqrt(x) + math.sqrt(x - 1))

    r0 = np.linalg.norm(p, axis=1)
    r = np.linalg.norm(s.position, axis=1)
    enclosed = np.empty(n)
    enclosed[np.argsort(r0)] = q * np.arange(n)  # the charge inside each particle's shell
    ratio = []
    outer = np.flatnonzero(r0 > 0.3 * radius)
    outer = outer[np.argsort(r0[outer])]
    for i in outer:
        ti = math.sqrt(m * r0[i] ** 3 / (2 * COULOMB_K * q * enclosed[i]))
        ratio.append(r[i] / (r0[i] * brentq(lambda x: ti * shape(x) - t_end, 1.0, 100.0)))
    ratio = np.array(ratio)
    x_uniform = brentq(lambda x: t0 * shape(x) - t_end, 1.0, 100.0)
    assert x_uniform > 2.4  # the cloud more than doubled its size
    # the median particle follows the analytic law, and so does the mean of
    # each of 7 shells of about 84 particles; single particles scatter by
    # about 10 % (the graininess of N = 600 point charges), so a shell mean
    # carries about 1 % noise: 3 % is about three of those
    assert np.median(ratio) == pytest.approx(1.0, abs=0.01)
    for shell in np.array_split(ratio, 7):
        assert shell.mean() == pytest.approx(1.0, abs=0.03)


@pytest.mark.parametrize("eps_r", [1.0, 2.0])
def test_image_force_over_a_grounded_plane(eps_r):
    # F = k q^2/(4 z^2) toward the plane (method of images, any
    # electromagnetism text), divided by eps_r in a dielectric medium
    z, q, d = 1e-3, 1e-12, 1e-5
    s = _one((0.0, 0.0, z), diameter=d, charge=q)
    m = s.mass[0]
    a = COULOMB_K * q * q / (4 * z * z) / eps_r / m
    dt = math.sqrt(2e-6 * z / a)  # moves about 1e-6 z in the step
    sys_ = System(np.random.default_rng(0), particles=s, drag=False, medium=Medium(eps_r=eps_r),
                  images=[GroundedPlane((0, 0, 0), (0, 0, 1))])
    Simulation(sys_, dt=dt, integrator="verlet", diagnostics_every=0).run(steps=1)
    # the first Verlet step from rest moves a dt^2/2 exactly
    assert 2 * (z - s.position[0, 2]) / dt ** 2 == pytest.approx(a, rel=1e-6)
    assert s.position[0, 0] == 0.0 and s.position[0, 1] == 0.0


def test_auto_integrator_picks_a_scheme_per_particle():
    from chargesim.motion import AutoIntegrator

    med = Medium()
    tau = np.array([med.relaxation_time(1e-6, 1000.0), med.relaxation_time(1e-3, 1000.0), np.inf])
    codes = AutoIntegrator(ratio=0.1).assign(1.0 / tau, 1e-3)
    # 1 um: tau = 3.6 us << dt -> drag-exact; 1 mm: tau of seconds -> Verlet;
    # vacuum (beta = 0) -> Verlet
    np.testing.assert_array_equal(codes, [DragExact.code, VelocityVerlet.code, VelocityVerlet.code])


def test_step_control_follows_its_documented_rule():
    ctl = StepControl(tolerance=1e-6, dt_min=1e-6, dt_max=1.0, safety=0.9, grow=2.0)
    # dt_next = dt * clip(0.9 (tol/err)^(1/3), 1/2, 2)
    assert ctl.next_dt(1e-3, 1e-6 / 8) == pytest.approx(1e-3 * 1.8)
    assert ctl.next_dt(1e-3, 1e-3) == pytest.approx(0.5e-3)
    assert ctl.next_dt(1e-3, 0.0) == pytest.approx(2e-3)
    assert ctl.next_dt(0.9, 0.0) == 1.0
    with pytest.raises(ValueError, match="dt_min"):
        StepControl(1e-6, 1.0, 0.1)
    # a constant force: the Verlet estimate dt^2/2 |a(t+dt) - a(t)| is zero,
    # so the step grows to dt_max; the path is exact (z = -g t^2/2)
    s = _one((0, 0, 0))
    sys_ = System(np.random.default_rng(0), particles=s, drag=False, gravity=(0, 0, -STANDARD_GRAVITY),
                  coulomb=None)
    sim = Simulation(sys_, dt=1e-3, integrator="verlet", step_control=StepControl(1e-9, 1e-4, 0.05),
                     diagnostics_every=0)
    sim.run(t_end=1.0)
    assert sim.dt == 0.05 and sim.step < 40
    assert s.position[0, 2] == pytest.approx(-0.5 * STANDARD_GRAVITY, rel=1e-12)


def test_a_run_without_recorder_makes_no_reports_and_moves_the_same():
    # the diagnostics row and snapshot only serve a recorder: without one they
    # are not computed (a row costs a tenth of a step at N = 1e5), and the
    # motion is the same bit for bit as with a recorder listening
    def make():
        s = ParticleState()
        rng = np.random.default_rng(3)
        s.add(rng.random((20, 3)) * 1e-3, diameter=2e-6, density=1000.0, charge=-1e-17)
        sys_ = System(np.random.default_rng(4), particles=s, medium=Medium(), sources=[UniformField((0, 1e5, 0))],
                      coulomb=Coulomb("direct"))
        return Simulation(sys_, 1e-5, frame_every=2, diagnostics_every=1, checkpoint_every=3)

    class Listener:
        def __init__(self):
            self.calls = {"frame": 0, "diagnostics": 0, "checkpoint": 0}

        def start(self, info): pass
        def deposits(self, records): pass
        def escapes(self, records): pass
        def finish(self, summary): pass

        def frame(self, step, time, state):
            self.calls["frame"] += 1

        def diagnostics(self, step, time, values):
            self.calls["diagnostics"] += 1

        def checkpoint(self, snapshot):
            self.calls["checkpoint"] += 1

    quiet = make()
    made = []
    quiet.diagnostics = lambda: made.append("diagnostics")
    quiet.snapshot = lambda: made.append("snapshot")
    quiet.run(steps=6)
    assert made == []
    heard, rec = make(), Listener()
    heard.run(steps=6, recorder=rec)
    # checkpoints every 3 steps: at step 3, not at step 6, the run's last (finish follows at once)
    assert rec.calls == {"frame": 4, "diagnostics": 6, "checkpoint": 1}
    a, b = quiet.system.state, heard.system.state
    assert np.array_equal(a.position, b.position) and np.array_equal(a.velocity, b.velocity)
