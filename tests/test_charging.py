"""Particle charging against its published laws (sources named beside each check)."""
import math
import warnings

import numpy as np
import pytest
from scipy.integrate import quad, solve_ivp

from chargesim import charging
from chargesim.physics.constants import BOLTZMANN, ELEMENTARY_CHARGE as E, EPSILON_0 as EPS0

K_E = 1.0 / (4 * math.pi * EPS0)


def test_public_name_is_the_physics_module():
    import chargesim.physics.charging as impl

    assert charging is impl


def test_pauthenier_limit_values():
    # Pauthenier & Moreau-Hanot (1932); Hinds, Aerosol Technology:
    # q_s = 3 pi eps0 d^2 E eps_p/(eps_p + 2)
    d, field = 1e-6, 5e5
    conductor = 3 * math.pi * EPS0 * d**2 * field  # eps_p -> inf
    assert charging.saturation_charge(d, field, np.inf) == pytest.approx(conductor, rel=1e-12)
    assert charging.saturation_charge(d, field, 1e12) == pytest.approx(conductor, rel=1e-11)
    # 1 um conductor at 500 kV/m holds about 260 elementary charges (worked number)
    assert conductor / E == pytest.approx(260.5, rel=2e-3)
    assert charging.saturation_charge(d, field, 1.0) == pytest.approx(conductor / 3, rel=1e-12)
    assert charging.saturation_charge(d, -field, 4.0) == pytest.approx(conductor * 4 / 6, rel=1e-12)
    qs = charging.saturation_charge(np.array([1e-6, 2e-6]), field, 4.0)
    np.testing.assert_allclose(qs[1] / qs[0], 4.0, rtol=1e-12)  # ~ d^2


def _ion_current(q, d, field, eps_p, n_i, z_i):
    """Ion current onto a sphere in a uniform field, integrated over its surface.

    Independent of the rate law: the radial field at the surface of a dielectric
    sphere with charge q in a uniform field E0 is E0 cos(theta) 3 eps_p/(eps_p+2)
    + q/(4 pi eps0 a^2) (any electromagnetism text); positive ions arrive where it
    points inward, with drift speed Z E (Pauthenier's picture).
    """
    a = d / 2

    def inward(theta):
        er = field * math.cos(theta) * 3 * eps_p / (eps_p + 2) + q / (4 * math.pi * EPS0 * a * a)
        return max(0.0, -er) * 2 * math.pi * a * a * math.sin(theta)

    val, _ = quad(inward, 0.0, math.pi, limit=200, epsabs=0, epsrel=1e-11)
    return n_i * E * z_i * val


@pytest.mark.parametrize("x", [0.0, 0.3, 0.9, -0.5, -1.0, -3.0])
def test_field_charging_rate_law_from_ion_flux(x):
    # Pauthenier rate dq/dt = (q_s/tau)(1 - q/q_s)^2 for -q_s <= q < q_s, and the
    # whole surface draws ions (rate -4 q/tau) when q < -q_s: check the rate implied
    # by one tiny charge_step against the ion current integrated over the surface
    d, field, eps_p, n_i, z_i = 2e-6, 4e5, 5.0, 1e13, 1.5e-4
    qs = charging.saturation_charge(d, field, eps_p)
    q0 = x * qs
    dt = 1e-9 * charging.field_charging_time_constant(n_i, z_i)
    q1 = charging.charge_step(q0, d, eps_p, field, n_i, z_i, 293.15, charging.DEFAULT_ION_MASS, dt, ion_sign=+1, diffusion=False)
    rate = (q1 - q0) / dt
    assert rate == pytest.approx(_ion_current(q0, d, field, eps_p, n_i, z_i), rel=1e-6)


def test_field_charge_closed_form():
    # Hinds, Aerosol Technology: q(t) = q_s t/(t + tau), tau = 4 eps0/(N_i e Z_i)
    n_i, z_i = 1e13, 1.5e-4
    tau = charging.field_charging_time_constant(n_i, z_i)
    assert tau == pytest.approx(4 * EPS0 / (n_i * E * z_i), rel=1e-12)
    d, field, eps_p = 5e-6, 3e5, 3.0
    qs = charging.saturation_charge(d, field, eps_p)
    t = np.array([0.0, 0.1 * tau, tau, 10 * tau])
    np.testing.assert_allclose(charging.field_charge(t, d, field, eps_p, n_i, z_i), qs * t / (t + tau), rtol=1e-12)
    # and the same from integrating the rate law numerically (scipy solve_ivp)
    sol = solve_ivp(lambda _, q: qs / tau * (1 - q / qs) ** 2, (0, 10 * tau), [0.0], rtol=1e-11, atol=1e-30)
    assert sol.y[0, -1] == pytest.approx(qs * 10 / 11, rel=1e-8)


def test_charge_step_many_small_steps_equal_one_big_step():
    # the field-charging update is the exact solution of the rate law (Hinds), so
    # splitting the exposure must not change the result
    n_i, z_i = 2e13, 2e-4
    tau = charging.field_charging_time_constant(n_i, z_i)
    d = np.array([0.5e-6, 2e-6, 10e-6])
    field, eps_p, temp, m = 5e5, np.array([2.0, 6.0, np.inf]), 293.15, charging.DEFAULT_ION_MASS
    qs = charging.saturation_charge(d, field, eps_p)
    for q_start in (np.zeros(3), -2.5 * qs, 0.4 * qs):
        big = charging.charge_step(q_start, d, eps_p, field, n_i, z_i, temp, m, 3 * tau, ion_sign=+1, diffusion=False)
        q = q_start.copy()
        for _ in range(300):
            q = charging.charge_step(q, d, eps_p, field, n_i, z_i, temp, m, 0.01 * tau, ion_sign=+1, diffusion=False)
        np.testing.assert_allclose(q, big, rtol=1e-10)
    # from zero: the closed form q_s t/(t + tau), with the ions' sign
    neg = charging.charge_step(0.0, d, eps_p, field, n_i, z_i, temp, m, 3 * tau, ion_sign=-1, diffusion=False)
    np.testing.assert_allclose(neg, -qs * 3 / 4, rtol=1e-12)


def test_charged_beyond_saturation_takes_no_field_charge():
    qs = charging.saturation_charge(1e-6, 1e5, 3.0)
    q = charging.charge_step(1.5 * qs, 1e-6, 3.0, 1e5, 1e14, 2e-4, 293.15, charging.DEFAULT_ION_MASS, 1.0, ion_sign=+1, diffusion=False)
    assert q == pytest.approx(1.5 * qs, rel=1e-15)


def test_no_ions_no_charging():
    q = charging.charge_step([0.0, 3e-17], 1e-6, 3.0, 4e5, 0.0, 2e-4, 293.15, charging.DEFAULT_ION_MASS, 10.0)
    np.testing.assert_array_equal(q, [0.0, 3e-17])


def test_diffusion_charging_white_equation():
    # White (1951); Hinds, Aerosol Technology:
    # n(t) = d k T/(2 K_E e^2) ln(1 + pi K_E d c_i e^2 N_i t/(2 k T)), c_i = sqrt(8kT/(pi m_i))
    temp, m = 293.15, 1.8e-25
    c_i = math.sqrt(8 * BOLTZMANN * temp / (math.pi * m))
    assert charging.mean_ion_speed(temp, m) == pytest.approx(c_i, rel=1e-12)
    d = np.array([0.05e-6, 0.2e-6, 1e-6])
    n_i, t = 1e13, 1.0
    white = d * BOLTZMANN * temp / (2 * K_E * E**2) * np.log(1 + math.pi * K_E * d * c_i * E**2 * n_i * t / (2 * BOLTZMANN * temp))
    np.testing.assert_allclose(charging.diffusion_charge(t, d, n_i, temp, m) / E, white, rtol=1e-12)
    # charge_step with diffusion alone reproduces White's equation over one step
    # and over many (its update is the exact solution of White's rate law)
    one = charging.charge_step(0.0, d, 2.0, 0.0, n_i, 1.5e-4, temp, m, t, ion_sign=+1, field_charging=False)
    np.testing.assert_allclose(one / E, white, rtol=1e-12)
    q = np.zeros(3)
    for _ in range(100):
        q = charging.charge_step(q, d, 2.0, 0.0, n_i, 1.5e-4, temp, m, t / 100, ion_sign=+1, field_charging=False)
    np.testing.assert_allclose(q / E, white, rtol=1e-10)
    # Hinds's default ion speed: 240 m/s in air at 20 degC (from memory)
    assert charging.mean_ion_speed() == pytest.approx(240.0, rel=1e-12)


def test_combined_charging():
    d, field, eps_p, n_i, z_i = 0.4e-6, 4e5, 4.0, 5e12, 1.5e-4
    t = 0.5
    qf = charging.field_charge(t, d, field, eps_p, n_i, z_i)
    qd = charging.diffusion_charge(t, d, n_i)
    assert charging.combined_charge(t, d, field, eps_p, n_i, z_i) == pytest.approx(qf + qd, rel=1e-12)
    # charge_step with both mechanisms converges (second order) to the solution of
    # the summed rate laws, integrated by scipy solve_ivp
    qs = charging.saturation_charge(d, field, eps_p)
    tau = charging.field_charging_time_constant(n_i, z_i)
    a = d * BOLTZMANN * 293.15 / (2 * K_E * E)
    rate0 = E * math.pi * d * d * charging.mean_ion_speed() * n_i / 4

    def rhs(_, q):
        fc = qs / tau * (1 - q[0] / qs) ** 2 if q[0] < qs else 0.0
        return [fc + rate0 * math.exp(-q[0] / a)]

    ref = solve_ivp(rhs, (0, t), [0.0], method="LSODA", rtol=1e-11, atol=1e-30).y[0, -1]
    errs = []
    for steps in (20, 40):
        q = 0.0
        for _ in range(steps):
            q = charging.charge_step(q, d, eps_p, field, n_i, z_i, 293.15, charging.DEFAULT_ION_MASS, t / steps, ion_sign=+1)
        errs.append(abs(q - ref) / ref)
    assert errs[0] < 1e-3
    assert errs[1] < errs[0] / 3  # second-order splitting: error falls ~4x per halving


def test_rayleigh_limit():
    # Rayleigh (1882): q_R = 8 pi (eps0 gamma r^3)^{1/2}; equivalently the Coulomb
    # self-energy q^2/(8 pi eps0 r) equals twice the surface energy 4 pi r^2 gamma
    d, gamma = 20e-6, 0.072
    qr = charging.rayleigh_limit(d, gamma)
    r = d / 2
    assert qr == pytest.approx(8 * math.pi * math.sqrt(EPS0 * gamma * r**3), rel=1e-12)
    assert qr**2 / (8 * math.pi * EPS0 * r) == pytest.approx(2 * 4 * math.pi * r**2 * gamma, rel=1e-12)
    assert charging.rayleigh_limit(d, np.inf) == np.inf


def test_cap_rayleigh_counts_and_warns():
    d = np.array([20e-6, 20e-6, 20e-6])
    qr = charging.rayleigh_limit(20e-6, 0.072)
    q = np.array([0.5 * qr, -2 * qr, 3 * qr])
    with pytest.warns(RuntimeWarning, match="Rayleigh"):
        capped, n = charging.cap_rayleigh(q, d, 0.072)
    assert n == 2
    np.testing.assert_allclose(capped, [0.5 * qr, -qr, qr], rtol=1e-15)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        same, n0 = charging.cap_rayleigh(q[:1], d[:1], 0.072)
    assert n0 == 0 and same[0] == q[0]


@pytest.mark.parametrize(
    "call, name",
    [
        (lambda: charging.saturation_charge(0.0, 1e5, 2.0), "diameter"),
        (lambda: charging.saturation_charge(1e-6, 1e5, 0.5), "particle_eps_r"),
        (lambda: charging.rayleigh_limit(1e-6, -1.0), "surface_tension"),
        (lambda: charging.field_charging_time_constant(0.0, 1e-4), "ion_density"),
        (lambda: charging.charge_step(0.0, 1e-6, 2.0, 1e5, 1e13, 1e-4, 293.15, 1e-25, -1.0), "dt"),
        (lambda: charging.charge_step(0.0, 1e-6, 2.0, 1e5, 1e13, 1e-4, 293.15, 1e-25, 1.0, ion_sign=2), "ion_sign"),
    ],
)
def test_validation(call, name):
    with pytest.raises(ValueError, match=name):
        call()


def test_threaded_path_matches_serial_path():
    # above PARALLEL_THRESHOLD the per-particle kernel runs threaded: same numbers
    n = charging.PARALLEL_THRESHOLD + 11
    rng = np.random.default_rng(4)
    q = rng.normal(size=n) * 1e-17
    d = rng.uniform(0.1e-6, 20e-6, n)
    e = rng.uniform(0, 6e5, n)
    args = (d, 4.0, e, 1e13, 2e-4, 293.15, charging.DEFAULT_ION_MASS, 1e-3)
    whole = charging.charge_step(q, *args)
    half = n // 2
    parts = np.concatenate([
        charging.charge_step(q[:half], d[:half], 4.0, e[:half], *args[3:]),
        charging.charge_step(q[half:], d[half:], 4.0, e[half:], *args[3:]),
    ])
    np.testing.assert_array_equal(whole, parts)
