"""Aerosol mechanics against handbook values (sources named beside each check)."""
import math

import numpy as np
import pytest

from chargesim import aerosol
from chargesim.physics import constants as c


def test_public_name_is_the_physics_module():
    import chargesim.physics.aerosol as impl

    assert aerosol is impl


def test_viscosity_of_air_at_20C():
    # Hinds, Aerosol Technology; Sutherland (1893): 1.81e-5 Pa s at 20 degC
    assert aerosol.air_viscosity(293.15) == pytest.approx(1.81e-5, rel=1e-6)


def test_viscosity_sutherland_other_temperatures():
    # Sutherland's law, S = 110.4 K (Hinds). Handbook air viscosity at 0 degC is
    # about 1.72e-5 Pa s and at 100 degC about 2.18e-5 Pa s (CRC Handbook, from memory)
    assert aerosol.air_viscosity(273.15) == pytest.approx(1.72e-5, rel=0.01)
    assert aerosol.air_viscosity(373.15) == pytest.approx(2.18e-5, rel=0.015)
    t = np.array([250.0, 300.0, 400.0])
    mu = aerosol.air_viscosity(t)
    assert mu.shape == (3,) and np.all(np.diff(mu) > 0)  # gas viscosity rises with T


def test_mean_free_path():
    # Hinds, Aerosol Technology: 0.0665 um at 20 degC, 1 atm; inversely with pressure
    assert aerosol.mean_free_path(293.15, 101325.0) == pytest.approx(0.0665e-6, rel=1e-9)
    assert aerosol.mean_free_path(293.15, 2 * 101325.0) == pytest.approx(0.0665e-6 / 2, rel=1e-9)
    # kinetic theory lambda ~ mu/p * sqrt(pi R T/(2 M)) (Hinds eq. 2.26 form): the
    # temperature scaling must agree with the Sutherland viscosity within 1 %
    t1, t2 = 293.15, 400.0
    ratio = aerosol.mean_free_path(t2) / aerosol.mean_free_path(t1)
    kin = aerosol.air_viscosity(t2) / aerosol.air_viscosity(t1) * math.sqrt(t2 / t1)
    assert ratio == pytest.approx(kin, rel=0.01)


@pytest.mark.parametrize(
    "d, cc, tol",
    # Hinds, Aerosol Technology, appendix table (from memory)
    [(0.1e-6, 2.9, 0.02), (1e-6, 1.15, 0.005), (10e-6, 1.016, 0.001)],
)
def test_slip_correction_table(d, cc, tol):
    assert aerosol.slip_correction(d) == pytest.approx(cc, rel=tol)


def test_slip_correction_formula_and_vectorized():
    # Allen & Raabe (1985) as given in Hinds: Cc = 1 + Kn (1.142 + 0.558 exp(-0.999/Kn))
    d = np.array([0.02e-6, 0.5e-6, 3e-6])
    kn = 2 * 0.0665e-6 / d
    expect = 1 + kn * (1.142 + 0.558 * np.exp(-0.999 / kn))
    np.testing.assert_allclose(aerosol.slip_correction(d), expect, rtol=1e-12)
    # low pressure: more slip
    assert aerosol.slip_correction(1e-6, pressure=10000.0) > aerosol.slip_correction(1e-6)


def test_relaxation_time_and_settling_velocity():
    # Hinds, Aerosol Technology, table (from memory): 1 um, 1000 kg/m^3, 20 degC:
    # settling velocity about 3.5e-5 m/s, relaxation time about 3.6e-6 s
    tau = aerosol.relaxation_time(1e-6, 1000.0)
    vts = aerosol.settling_velocity(1e-6, 1000.0)
    assert tau == pytest.approx(3.6e-6, rel=0.03)
    assert vts == pytest.approx(3.5e-5, rel=0.02)
    # V_TS = tau g (Hinds)
    assert vts == pytest.approx(tau * c.STANDARD_GRAVITY, rel=1e-12)
    # Hinds table (from memory): 10 um unit density settles at about 3.06e-3 m/s
    assert aerosol.settling_velocity(10e-6, 1000.0) == pytest.approx(3.06e-3, rel=0.02)


def test_migration_velocity_formula():
    # w = q E Cc/(3 pi mu d) (Hinds, Aerosol Technology)
    d, q, e = 2e-6, 50 * c.ELEMENTARY_CHARGE, 4e5
    mu = 1.81e-5
    cc = aerosol.slip_correction(d)
    w = aerosol.migration_velocity(d, q, e)
    assert w == pytest.approx(q * e * cc / (3 * math.pi * mu * d), rel=1e-12)
    assert aerosol.migration_velocity(d, -q, e) == pytest.approx(-w)
    # drag at the migration velocity balances the electric force q E
    assert aerosol.stokes_drag_coefficient(d) * w == pytest.approx(q * e, rel=1e-12)
    assert aerosol.mobility(d) * aerosol.stokes_drag_coefficient(d) == pytest.approx(1.0)
    assert aerosol.electrical_mobility(d, q) * e == pytest.approx(w)


def test_particle_diffusivity():
    # Hinds, Aerosol Technology, table (from memory): D(0.1 um) about 6.8e-10 m^2/s,
    # D(1 um) about 2.7e-11 m^2/s in air at 20 degC
    assert aerosol.particle_diffusivity(0.1e-6) == pytest.approx(6.8e-10, rel=0.02)
    assert aerosol.particle_diffusivity(1e-6) == pytest.approx(2.7e-11, rel=0.03)


def test_air_density_and_reynolds():
    # dry air at 20 degC, 1 atm: 1.204 kg/m^3 (CRC Handbook, from memory)
    assert aerosol.air_density() == pytest.approx(1.204, rel=2e-3)
    re = aerosol.reynolds_number(10e-6, 0.1)
    assert re == pytest.approx(1.204 * 0.1 * 10e-6 / 1.81e-5, rel=2e-3)


@pytest.mark.parametrize(
    "call, name",
    [
        (lambda: aerosol.slip_correction(-1e-6), "diameter"),
        (lambda: aerosol.slip_correction([1e-6, 0.0]), "index 1"),
        # arrays go through a fast path (one sum, one minimum): it must still
        # catch NaN, inf, a sign and +inf/-inf together, and name the index
        (lambda: aerosol.slip_correction([1e-6, 2e-6, float("nan")]), "index 2"),
        (lambda: aerosol.relaxation_time([1e-6, 1e-6], [1000.0, float("inf")]), "density .* index 1"),
        (lambda: aerosol.migration_velocity([1e-6, 1e-6], [float("inf"), float("-inf")], 1.0), "charge .* index 0"),
        (lambda: aerosol.relaxation_time([1e-6, 1e-6, 1e-6], [1e3, 1e3, -1e3]), "density .* index 2"),
        (lambda: aerosol.air_viscosity(0.0), "temperature"),
        (lambda: aerosol.mean_free_path(293.0, -5.0), "pressure"),
        (lambda: aerosol.relaxation_time(1e-6, 0.0), "density"),
        (lambda: aerosol.migration_velocity(1e-6, float("nan"), 1.0), "charge"),
        (lambda: aerosol.settling_velocity(1e-6, 1000.0, gravity=0.0), "gravity"),
    ],
)
def test_validation_names_the_argument(call, name):
    with pytest.raises(ValueError, match=name):
        call()
