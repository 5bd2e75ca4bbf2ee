"""Particle state, medium, gas flows, populations and inlets."""
import math

import numpy as np
import pytest

from chargesim.motion import (
    ChannelFlow,
    DiscArea,
    FixedCharge,
    FixedSize,
    GriddedFlow,
    Inlet,
    LognormalSize,
    Medium,
    ParticleState,
    Population,
    RectangleArea,
    SaturationCharge,
    ChargeToMass,
    TableSize,
    UniformFlow,
)
from chargesim.physics.constants import EPSILON_0


def _add(state, k, **kw):
    args = dict(diameter=1e-6, density=1000.0)
    args.update(kw)
    return state.add(np.arange(3 * k, dtype=float).reshape(k, 3), **args)


def test_state_grows_by_doubling_and_keeps_ids():
    s = ParticleState(capacity=2)
    ids = [_add(s, 3), _add(s, 5)]
    assert s.n == 8 and s.capacity == 8
    np.testing.assert_array_equal(np.concatenate(ids), np.arange(8))
    np.testing.assert_array_equal(s.position[3], [0.0, 1.0, 2.0])
    s.alive[[1, 4]] = False
    (extra,) = s.compact(extra=(np.arange(8.0),))
    np.testing.assert_array_equal(s.id, [0, 2, 3, 5, 6, 7])
    np.testing.assert_array_equal(extra, [0, 2, 3, 5, 6, 7])
    # ids are never reused
    assert _add(s, 1)[0] == 8


def test_compact_keeps_every_field_of_the_survivors_in_order():
    # reference: numpy boolean masking of a copy taken before the compaction,
    # on every field (float rows of 3, int64, int32, bool), random masks
    rng = np.random.default_rng(5)
    s = ParticleState(capacity=4)
    for _ in range(3):
        k = 50
        s.add(rng.random((k, 3)), rng.random((k, 3)), diameter=rng.uniform(1e-6, 1e-5, k), density=1000.0,
              charge=rng.normal(size=k) * 1e-16, weight=rng.uniform(1, 5, k), population=rng.integers(0, 3, k))
        before = s.to_dict()
        alive = rng.random(s.n) < 0.6
        s.alive[:] = alive
        s.compact()
        for name in ("id", "position", "velocity", "diameter", "density", "eps_p", "charge", "weight",
                     "population", "alive"):
            np.testing.assert_array_equal(getattr(s, name), before[name][alive], err_msg=name)
        assert s.n == int(alive.sum()) and s.alive.all()


def test_state_dict_round_trip_and_copy_are_independent():
    s = ParticleState()
    _add(s, 4, charge=[1e-15, 2e-15, 3e-15, 4e-15], weight=10.0, population=1)
    d = s.to_dict()
    t = ParticleState.from_dict(d)
    for k in ("id", "position", "velocity", "diameter", "charge", "weight", "population", "alive"):
        np.testing.assert_array_equal(getattr(s, k), getattr(t, k))
    assert t.next_id == 4
    c = s.copy()
    c.position[0, 0] = 99.0
    assert s.position[0, 0] == 0.0
    # mass of one real particle: pi/6 d^3 rho
    assert s.mass[0] == pytest.approx(math.pi / 6 * 1e-18 * 1000.0, rel=1e-15)


def test_state_rejects_bad_input_naming_argument_and_index():
    s = ParticleState()
    with pytest.raises(ValueError, match="diameter.*index 1"):
        s.add(np.zeros((2, 3)), diameter=[1e-6, -1.0], density=1000.0)
    with pytest.raises(ValueError, match="position"):
        s.add(np.zeros((2, 2)), diameter=1e-6, density=1000.0)
    with pytest.raises(ValueError, match="eps_p"):
        s.add(np.zeros((1, 3)), diameter=1e-6, density=1000.0, eps_p=0.5)


def test_medium_viscosity_and_mean_free_path_follow_the_physics_layer():
    # Hinds, Aerosol Technology: 1.81e-5 Pa s and 0.0665 um at 20 degC, 1 atm
    m = Medium()
    assert m.viscosity == pytest.approx(1.81e-5, rel=1e-12)
    assert m.mean_free_path == pytest.approx(0.0665e-6, rel=1e-12)
    # Hinds (from memory): Cc(1 um) about 1.15
    assert m.slip_correction(1e-6) == pytest.approx(1.15, abs=0.01)
    # a given mean free path enters the slip correction: Kn = 2 lambda/d with
    # Cc = 1 + Kn (1.142 + 0.558 exp(-0.999/Kn)) (Allen & Raabe 1985, in Hinds)
    m2 = Medium(mean_free_path=0.5e-6)
    kn = 2 * 0.5e-6 / 1e-6
    assert m2.slip_correction(1e-6) == pytest.approx(1 + kn * (1.142 + 0.558 * math.exp(-0.999 / kn)), rel=1e-12)
    # the mean free path scales as 1/p (kinetic theory)
    assert Medium(pressure=50662.5).mean_free_path == pytest.approx(2 * 0.0665e-6, rel=1e-12)
    with pytest.raises(ValueError, match="temperature"):
        Medium(temperature=-1.0)
    with pytest.raises(ValueError, match="eps_r"):
        Medium(eps_r=0.5)


def test_loop_drag_rate_is_the_inverse_relaxation_time():
    # the run loop's unchecked drag rate must be 1/tau of the checked
    # physics relation, tau = rho d^2 Cc/(18 mu) (Hinds), to the bit (runs
    # and their resumes are compared bitwise), also for a given mean free
    # path and a hot, thin gas; Hinds (from memory): tau(1 um, 1000 kg/m^3)
    # about 3.6e-6 s in air at 20 degC
    rng = np.random.default_rng(3)
    d = 10.0 ** rng.uniform(-8, -4, 500)
    rho = rng.uniform(500, 8000, 500)
    for m in (Medium(), Medium(mean_free_path=0.5e-6), Medium(temperature=450.0, pressure=2e4)):
        np.testing.assert_array_equal(m.drag_rate(d, rho), 1.0 / m.relaxation_time(d, rho))
    assert 1.0 / Medium().drag_rate(np.array([1e-6]), np.array([1000.0]))[0] == pytest.approx(3.6e-6, rel=0.02)


def test_channel_flow_is_plane_poiseuille_with_the_given_mean():
    # analytic: u = 1.5 U (1 - (s/h)^2), mean over the gap = U
    f = ChannelFlow(2.0, "x", "y", 0.0, 0.2)
    y = (np.arange(20000) + 0.5) / 20000 * 0.2
    pts = np.column_stack([np.zeros_like(y), y, np.zeros_like(y)])
    u = f(pts)
    assert u[:, 0].mean() == pytest.approx(2.0, rel=1e-8)
    assert np.all(u[:, 1:] == 0)
    assert f(np.array([[0.0, 0.1, 0.0]]))[0, 0] == pytest.approx(3.0)
    with pytest.raises(ValueError, match="wall_axis"):
        ChannelFlow(1.0, "x", "x", 0.0, 1.0)


def test_gridded_flow_is_exact_for_linear_fields_and_refuses_outside():
    # trilinear interpolation reproduces any linear field exactly
    x, y, z = np.meshgrid(np.arange(4) * 0.1, np.arange(3) * 0.2, np.arange(5) * 0.05, indexing="ij")
    vals = np.stack([1 + 2 * x - y, 3 * z, x + y + z], axis=-1)
    f = GriddedFlow((0, 0, 0), (0.1, 0.2, 0.05), vals)
    p = np.random.default_rng(0).random((50, 3)) * [0.3, 0.4, 0.2]
    expect = np.column_stack([1 + 2 * p[:, 0] - p[:, 1], 3 * p[:, 2], p.sum(axis=1)])
    np.testing.assert_allclose(f(p), expect, rtol=1e-12, atol=1e-12)
    with pytest.raises(ValueError, match=r"points\[1\].*outside the grid"):
        f(np.array([[0.1, 0.1, 0.1], [0.5, 0.1, 0.1]]))
    assert np.allclose(UniformFlow((1, 2, 3))(p), [1, 2, 3])


def test_inlet_emits_the_exact_long_run_count_with_fractional_carry():
    pop = Population("dust", FixedSize(2e-6), 2000.0)
    inl = Inlet(pop, RectangleArea((0, 0, 0), (0, 1, 0), (0, 0, 1)), rate=333.3, start=0.01, stop=0.5)
    rng = np.random.default_rng(1)
    total = 0
    for k in range(100):
        out = inl.emit(rng, k * 0.007, 0.007, Medium(flow=UniformFlow((1.5, 0, 0))))
        if out is not None:
            total += out["position"].shape[0]
            assert np.all(np.abs(out["position"][:, 1:]) <= 0.5) and np.all(out["position"][:, 0] == 0)
            np.testing.assert_array_equal(out["velocity"], np.tile([1.5, 0, 0], (len(out["velocity"]), 1)))
    assert total == math.floor(333.3 * 0.49 + 1e-9)


def test_size_distributions_match_their_definitions():
    rng = np.random.default_rng(2)
    d = LognormalSize(3e-6, 1.8).sample(rng, 200000)
    # lognormal: ln d ~ N(ln CMD, ln GSD) (definition of the count median
    # diameter and geometric standard deviation, Hinds)
    assert np.median(d) == pytest.approx(3e-6, rel=0.01)
    assert np.std(np.log(d)) == pytest.approx(math.log(1.8), rel=0.01)
    t = TableSize([1e-6, 5e-6, 1e-5], [1, 2, 1]).sample(rng, 100000)
    assert np.mean(t == 5e-6) == pytest.approx(0.5, abs=0.01)
    assert np.mean(t == 1e-6) == pytest.approx(0.25, abs=0.01)
    p = DiscArea((0, 0, 1), (0, 0, 2), 0.5).sample(rng, 50000)
    r = np.hypot(p[:, 0], p[:, 1])
    assert np.all(r <= 0.5) and np.allclose(p[:, 2], 1.0)
    # uniform on a disc: P(r < R/2) = 1/4
    assert np.mean(r < 0.25) == pytest.approx(0.25, abs=0.01)


def test_initial_charges():
    d = np.array([1e-6, 1e-5])
    q = SaturationCharge(-2e5).assign(d, 1000.0, 4.0)
    # Pauthenier limit q_s = 3 pi eps0 d^2 E eps_p/(eps_p + 2) (Pauthenier & Moreau-Hanot 1932; Hinds)
    np.testing.assert_allclose(q, -3 * math.pi * EPSILON_0 * d ** 2 * 2e5 * 4 / 6, rtol=1e-12)
    np.testing.assert_allclose(ChargeToMass(1e-3).assign(d, 1000.0, 4.0), 1e-3 * math.pi / 6 * d ** 3 * 1000.0)
    np.testing.assert_array_equal(FixedCharge(1e-16).assign(d, 1.0, 1.0), [1e-16, 1e-16])
    with pytest.raises(ValueError, match="gsd"):
        LognormalSize(1e-6, 0.5)
    with pytest.raises(ValueError, match="rate"):
        Inlet(Population("p", 1e-6, 1000.0), DiscArea((0, 0, 0), (1, 0, 0), 1.0), rate=0)


def test_state_and_system_pickle_for_parallel_sweeps():
    # sweeps ship systems to worker processes: they must pickle
    import pickle

    from chargesim.motion import Simulation, System

    s = ParticleState()
    _add(s, 3, charge=1e-16)
    t = pickle.loads(pickle.dumps(s))
    np.testing.assert_array_equal(t.position, s.position)
    sim = Simulation(System(np.random.default_rng(0), particles=s, coulomb=None), dt=1e-3)
    sim2 = pickle.loads(pickle.dumps(sim))
    sim.run(steps=3)
    sim2.run(steps=3)
    np.testing.assert_array_equal(sim.system.state.position, sim2.system.state.position)
