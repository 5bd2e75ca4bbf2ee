"""Layout relaxation and stability against published and analytic results.

Sources are named beside each check (see REFERENCES.md of the project).
Charges on the unit sphere use q = 1/sqrt(k), so k q^2 = 1 and energies in J
equal the dimensionless values of the Thomson-problem tables.
"""
import math
import warnings

import numpy as np
import pytest

import chargesim
from chargesim import layout
from chargesim.physics.constants import COULOMB_K as K  # CODATA 2018, derived

Q1 = 1.0 / math.sqrt(K)  # k q^2 = 1 (J m)

# Thomson problem, unit sphere, k = q = 1: Wales & Ulker, Phys. Rev. B 74, 212101 (2006)
THOMSON = {2: 0.500000, 3: 1.732051, 4: 3.674234, 5: 6.474691, 6: 9.985281, 12: 49.165253}


@pytest.mark.parametrize("n", sorted(THOMSON))
def test_thomson_minimal_energies(n):
    # Wales & Ulker, Phys. Rev. B 74, 212101 (2006): published minima to 6 decimals
    rng = np.random.default_rng(100 + n)
    res = chargesim.relax(rng.normal(size=(n, 3)), Q1, radius=1.0, restarts=3, rng=rng)
    assert res.converged and res.residual <= 1e-8
    assert abs(res.energy - THOMSON[n]) <= 1e-6
    np.testing.assert_allclose(np.linalg.norm(res.positions, axis=1), 1.0, rtol=1e-14)
    # the global minimum is a stable equilibrium; the three rigid rotations are trivial
    st = res.stability
    assert st.n_unstable == 0 and st.n_soft == 0
    assert st.n_trivial == (2 if n == 2 else 3)
    assert st.dimension == 2 * n and st.eigenvalues.size == 2 * n - st.n_trivial
    assert np.all(np.abs(st.trivial_eigenvalues) < 1e-9)


def test_two_charges_on_a_sphere_mode_stiffness():
    # analytic: antipodal charges, relative tilt theta: U = k q^2 / (2 R cos(theta/2)),
    # so U'' = k q^2 / (8 R) per particle angle; in arc length on R = 2 m the
    # non-trivial eigenvalue (both tilts opposite) is k q^2 / (4 R^3), twice
    # (two tangent directions); the rotation about the pair axis does not move them
    rng = np.random.default_rng(2)
    res = chargesim.relax(rng.normal(size=(2, 3)), Q1, radius=2.0, centre=(1.0, -1.0, 0.5))
    np.testing.assert_allclose(res.stability.eigenvalues, [1 / 32, 1 / 32], rtol=1e-9)
    assert res.energy == pytest.approx(1 / 4, rel=1e-14)  # k q^2 / (2 R)


def test_earnshaw_charge_between_two_fixed_charges_is_a_saddle():
    # Earnshaw's theorem (1842): no stable equilibrium of a charge in an
    # electrostatic field. Analytic: the Hessian of q Q / r at distance a on
    # the z axis is k q Q diag(-1, -1, 2) / a^3; two charges at +-a give
    # eigenvalues -2 kqQ/a^3 (twice, unstable) and +4 kqQ/a^3 at the midpoint
    a, qf, qq = 0.05, 2e-9, 3e-9
    pos = np.array([[0, 0, -a], [0, 0, a], [0, 0, 0.3 * a]])
    res = chargesim.relax(pos, [qq, qq, qf], fixed=[0, 1])
    assert res.converged
    np.testing.assert_allclose(res.positions[2], [0, 0, 0], atol=1e-12 * a)
    s = K * qf * qq / a**3
    st = res.stability
    assert st.n_unstable == 2 and not st.stable
    np.testing.assert_allclose(st.eigenvalues, [-2 * s, -2 * s, 4 * s], rtol=1e-9)
    np.testing.assert_allclose(st.unstable_eigenvalues, [-2 * s, -2 * s], rtol=1e-9)
    assert st.n_trivial == 0  # fixed charges leave no rigid motion but the axis spin, which moves nothing


def test_earnshaw_random_fixed_charges_no_minimum_anywhere():
    # Earnshaw's theorem via Laplace's equation: the trace of the Hessian of a
    # free charge among fixed ones is q times the Laplacian of the potential,
    # zero in free space, so a negative eigenvalue always exists
    rng = np.random.default_rng(7)
    fixed = rng.normal(size=(12, 3))
    qs = np.concatenate((rng.uniform(0.5, 2.0, 12) * 1e-9, [1e-9]))
    for _ in range(5):
        probe = rng.normal(size=(1, 3)) * 0.5
        st = layout.stability(np.vstack((fixed, probe)), qs, fixed=np.arange(12))
        scale = np.max(np.abs(st.eigenvalues))
        assert st.eigenvalues.size == 3
        assert abs(np.sum(st.eigenvalues)) < 1e-10 * scale
        assert st.eigenvalues[0] < 0 and st.n_unstable >= 1


def test_two_charges_in_a_box_end_at_opposite_corners():
    # analytic: 1/r is least at the largest distance, the body diagonal
    lower, upper = np.array([0.0, -0.1, 0.2]), np.array([0.3, 0.1, 0.6])
    pos = np.array([[0.1, 0.0, 0.35], [0.2, 0.02, 0.4]])
    res = chargesim.relax(pos, [1e-9, 2e-9], constraint="box", bounds=(lower, upper))
    assert res.converged
    corners = np.sort(res.positions, axis=0)
    np.testing.assert_allclose(corners, np.vstack((lower, upper)), atol=1e-12)
    assert res.energy == pytest.approx(K * 2e-18 / np.linalg.norm(upper - lower), rel=1e-12)
    assert res.stability.dimension == 0 and res.stability.stable  # every coordinate held by a wall


def test_fixed_particles_do_not_move_and_field_balances():
    # analytic force balance on a plane: a free charge q pushed by a uniform
    # field E towards a fixed like charge Q stops where k q Q / r^2 = q E
    # (a second, far fixed charge on the same axis shifts it slightly: solved
    # below); Earnshaw: the Hessian of k q Q / r there is k q Q diag(2, -1)/r^3
    # in the plane, so the sideways mode is unstable
    qq, qf, e, qfar, xfar = 5e-9, 1e-9, 2.0e4, 1e-10, 2.0
    pos = np.array([[0.0, 0.0, 0.0], [0.3, 0.0, 0.01], [xfar, 0.0, 0.0]])
    fixed = np.array([True, False, True])
    res = chargesim.relax(pos, [qq, qf, qfar], constraint="plane", point=(0, 0, 0), normal=(0, 0, 1),
                          fixed=fixed, field=(-e, 0.0, 0.0))
    assert res.converged
    assert np.array_equal(res.positions[fixed], pos[fixed])  # bitwise
    assert np.all(res.residual_forces[fixed] == 0)
    r = res.positions[1, 0]
    # scipy.optimize.brentq on the force balance along the axis (reference library)
    from scipy.optimize import brentq

    r_ref = brentq(lambda x: K * qq / x**2 - K * qfar / (xfar - x) ** 2 - e, 0.01, 1.0, xtol=1e-15)
    assert r == pytest.approx(r_ref, rel=1e-9)
    assert res.positions[1, 1] == 0.0 and res.positions[1, 2] == 0.0
    s = K * qf * qq / r_ref**3
    sf = K * qf * qfar / (xfar - r_ref) ** 3
    st = res.stability
    assert st.n_trivial == 0 and st.n_unstable == 1
    np.testing.assert_allclose(st.eigenvalues, [-s - sf, 2 * s + 2 * sf], rtol=1e-7)


def test_two_charges_in_a_harmonic_trap():
    # analytic force balance: E = -kappa x acts on each charge; two equal
    # charges settle at separation d with k q^2 / d^2 = q kappa d / 2
    q, kappa = 1e-9, 1e6  # C, V/m^2
    d = (2 * K * q / kappa) ** (1 / 3)
    pos = np.array([[0.01, 0.002, 0.0], [-0.003, 0.0, 0.004]])
    with_pot = chargesim.relax(pos, q, field=lambda x: -kappa * x,
                               potential=lambda x: 0.5 * kappa * np.sum(x**2, axis=1))
    force_only = chargesim.relax(pos, q, field=lambda x: -kappa * x)
    for res in (with_pot, force_only):
        assert res.converged
        assert np.linalg.norm(res.positions[0] - res.positions[1]) == pytest.approx(d, rel=1e-9)
        np.testing.assert_allclose(res.positions.mean(axis=0), 0.0, atol=1e-8 * d)  # residual 1e-8
        assert res.stability.n_unstable == 0
    assert with_pot.minimizer == "lbfgs" and force_only.minimizer == "fire"
    assert math.isnan(force_only.energy)
    # energy: k q^2 / d + 2 * (1/2) kappa (d/2)^2 * q
    assert with_pot.energy == pytest.approx(K * q * q / d + q * kappa * d**2 / 4, rel=1e-12)


def test_hessian_matches_finite_differences_of_front_door_forces():
    # analytic identity H = -dF/dx, forces from chargesim.forces (direct sum)
    rng = np.random.default_rng(11)
    x = rng.normal(size=(8, 3))
    q = rng.uniform(-1, 1, 8) * 1e-9
    # three fixed particles leave no rigid motion, so no mode is set aside
    st = layout.stability(x, q, fixed=[0, 1, 2], stability_method="dense")
    assert st.n_trivial == 0
    h = 1e-6
    cols = []
    for i in range(3, 8):
        for c in range(3):
            dx = np.zeros_like(x)
            dx[i, c] = h
            df = chargesim.forces(x + dx, q, method="direct") - chargesim.forces(x - dx, q, method="direct")
            cols.append(-(df[3:] / (2 * h)).reshape(-1))
    hfd = np.array(cols).T
    np.testing.assert_allclose(np.sort(st.eigenvalues), np.linalg.eigvalsh(0.5 * (hfd + hfd.T)),
                               rtol=1e-5, atol=1e-6 * np.abs(st.eigenvalues).max())


def test_lanczos_lowest_eigenvalues_match_dense():
    # scipy.sparse.linalg.eigsh (reference library) against the dense spectrum
    rng = np.random.default_rng(3)
    res = chargesim.relax(rng.normal(size=(20, 3)), Q1, radius=1.0, stability=False)
    dense = layout.stability(res.positions, Q1, radius=1.0, stability_method="dense")
    lanc = layout.stability(res.positions, Q1, radius=1.0, stability_method="lanczos", n_modes=4)
    assert lanc.n_trivial == dense.n_trivial == 3
    np.testing.assert_allclose(lanc.eigenvalues, dense.eigenvalues[:4], rtol=1e-7)
    assert dense.complete and not lanc.complete


def test_restarts_are_reproducible_with_a_seed():
    # common practice: the same seed gives the same result, bitwise
    x = np.random.default_rng(5).normal(size=(7, 3))
    a = chargesim.relax(x, Q1, radius=1.0, restarts=2, rng=np.random.default_rng(9), stability=False)
    b = chargesim.relax(x, Q1, radius=1.0, restarts=2, rng=9, stability=False)
    assert np.array_equal(a.positions, b.positions) and a.energy == b.energy
    assert a.start_energies.size == 3


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"radius": -1.0}, "radius"),
        ({"constraint": "cylinder"}, "cylinder"),
        ({"constraint": "plane", "radius": 1.0}, "radius"),
        ({"fixed": [0, 9]}, "index 9"),
        ({"fixed": np.array([True, False])}, "mask"),
        ({"restarts": 2}, "rng"),
        ({"restarts": -1}, "restarts"),
        ({"tolerance": 0.0}, "tolerance"),
        ({"eps_r": 0.5}, "eps_r"),
        ({"constraint": "box", "bounds": ((0, 0, 0), (1, 1, 1))}, "outside the bounds"),
        ({"constraint": "box", "bounds": ((0, 0, 0), (1, -1, 1))}, "axis 1"),
        ({"field": (1.0, 2.0)}, "field"),
        ({"field": lambda x: x, "minimizer": "lbfgs"}, "potential"),
        ({"minimizer": "newton"}, "minimizer"),
    ],
)
def test_bad_input_is_refused_with_a_clear_message(kwargs, match):
    pos = np.array([[0.5, 0.5, 0.5], [2.0, 0.1, 0.2], [0.1, 0.9, 0.3]])
    with pytest.raises(ValueError, match=match):
        chargesim.relax(pos, 1e-9, **kwargs)


def test_bad_arrays_are_refused():
    with pytest.raises(ValueError, match="positions"):
        chargesim.relax(np.zeros((3, 2)), 1.0)
    with pytest.raises(ValueError, match="index 1"):
        chargesim.relax([[0, 0, 1.0], [0, 0, np.nan]], 1.0)
    with pytest.raises(ValueError, match="centre of the sphere"):
        chargesim.relax([[0, 0, 0.0], [0, 0, 1.0]], 1.0, radius=1.0)


def test_not_converged_warns():
    rng = np.random.default_rng(4)
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        res = chargesim.relax(rng.normal(size=(30, 3)), Q1, radius=1.0, max_iterations=3, stability=False)
    assert not res.converged
    assert any("not converged" in str(w.message) for w in rec)


# -- the relax command ---------------------------------------------------------------
SHIPPED = __import__("pathlib").Path(__file__).resolve().parents[1] / "scenarios" / "bead_sheet_layout.toml"


def _args(*argv):
    import argparse

    p = argparse.ArgumentParser()
    layout.add_arguments(p)
    return p.parse_args(list(argv))


def test_relax_command_end_to_end_on_the_shipped_layout(tmp_path):
    import h5py

    out = tmp_path / "bead.h5"
    fig = tmp_path / "bead.png"
    rc = layout.command(_args(str(SHIPPED), "-o", str(out), "--figure", str(fig), "--quiet"))
    assert rc == 0
    with h5py.File(out, "r") as f:
        # results conventions (issue 5): root attributes, units on every dataset
        for key in ("format", "format_version", "program_version", "created", "scenario", "seed"):
            assert key in f.attrs
        assert f.attrs["scenario"] == SHIPPED.read_text()
        missing = []
        f.visititems(lambda n, o: missing.append(n) if isinstance(o, h5py.Dataset) and "units" not in o.attrs else None)
        assert missing == []
        pos = f["layout/position"][()]
        q = f["layout/charge"][()]
        fixed = f["layout/fixed"][()].astype(bool)
        energy = float(f["layout/energy"][()])
        assert f["layout/energy"].attrs["units"] == "J"
        assert np.array_equal(pos[fixed], f["layout/initial_position"][()][fixed])
        assert np.all(pos[~fixed, 2] == 0.0)  # on the sheet
        assert f["stability"].attrs["n_unstable"] == 0
        assert f["stability/eigenvalues"].attrs["units"] == "J/m^2"
        nn = f["layout/nearest_distance"][()]
        phi = f["fields/layout/potential"][()]
        assert np.all(np.isfinite(phi))
    # the stored energy, recomputed through the front door (direct sum) plus the
    # uniform field's -sum q E.x (analytic), in air (CRC Handbook, from memory)
    e_field = np.array([0.0, 0.0, 2.0e4])
    expect = chargesim.energy(pos, q, eps_r=1.00059, method="direct") - float(np.sum(q * (pos @ e_field)))
    assert energy == pytest.approx(expect, rel=1e-12)
    # nearest-neighbour distances against scipy.spatial.cKDTree (reference library)
    from scipy.spatial import cKDTree

    np.testing.assert_allclose(nn, cKDTree(pos).query(pos, k=2)[0][:, 1], rtol=1e-15)
    assert fig.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the reader of the results layer opens it
    res = chargesim.open_results(out)
    assert "layout" in res.fields
    # an existing file is not replaced without --overwrite
    with pytest.raises(ValueError, match="exists"):
        layout.command(_args(str(SHIPPED), "-o", str(out), "--quiet"))


@pytest.mark.parametrize(
    "edit, match",
    [
        (('kind = "plane"', 'kind = "cone"'), r"constraint\.kind: 'cone'"),
        (('charge = "-2 pC"', 'charge = "-2 pF"'), r"particles\[0\]\.charge: '-2 pF'"),
        (("tolerance = 1e-8", "tolerence = 1e-8"), r"layout\.tolerence.*did you mean 'tolerance'"),
        (('radius = "12 mm"', 'radius = "-12 mm"'), r"particles\[1\]\.ring\.radius"),
        (("seed = 20261201", ""), r"layout\.seed: restarts need a seed"),
    ],
)
def test_relax_command_bad_layout_names_file_key_and_value(tmp_path, edit, match):
    text = SHIPPED.read_text()
    assert edit[0] in text
    bad = tmp_path / "bad_layout.toml"
    bad.write_text(text.replace(edit[0], edit[1]))
    with pytest.raises(ValueError, match=match) as err:
        layout.command(_args(str(bad), "-o", str(tmp_path / "x.h5"), "--quiet"))
    assert str(bad) in str(err.value)


def test_matrix_free_newton_and_lanczos_agree_with_dense(monkeypatch):
    # the large-N path (MINRES Newton steps and Lanczos eigenvalues on
    # matrix-free Hessian products, scipy.sparse.linalg) against the dense path
    from chargesim.layout import _stability

    x = np.random.default_rng(8).normal(size=(40, 3))
    dense = chargesim.relax(x, Q1, radius=1.0, n_modes=4)
    monkeypatch.setattr(_stability, "DENSE_LIMIT", 10)
    sparse = chargesim.relax(x, Q1, radius=1.0, n_modes=4)
    assert sparse.converged and sparse.stability.method == "lanczos"
    assert sparse.energy == pytest.approx(dense.energy, rel=1e-13)
    np.testing.assert_allclose(sparse.stability.eigenvalues, dense.stability.eigenvalues[:4], rtol=1e-6)


def test_two_like_charges_in_a_periodic_cell_form_bcc():
    # Two like charges per cubic cell (neutralizing background): they settle
    # half a body diagonal apart, the body-centred cubic lattice, the
    # lowest-energy cubic lattice of the one-component plasma (Fuchs 1935,
    # from memory); cubic symmetry makes the three non-trivial eigenvalues
    # equal, and the three rigid translations are trivial (analytic)
    pytest.importorskip("chargesim.coulomb.ewald")
    edge = 0.02
    x = np.array([[0.1, 0.2, 0.15], [0.4, 0.45, 0.6]]) * edge
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*net charge.*")
        res = chargesim.relax(x, 1e-12, box=(edge, edge, edge))
    assert res.converged and res.method == "ewald"
    d = res.positions[1] - res.positions[0]
    d -= np.round(d / edge) * edge
    np.testing.assert_allclose(np.abs(d), 0.5 * edge, rtol=1e-8)
    st = res.stability
    assert st.n_trivial == 3 and st.n_unstable == 0
    np.testing.assert_allclose(st.eigenvalues, st.eigenvalues.mean(), rtol=1e-5)


def test_fire_on_the_sphere_reaches_the_thomson_minimum():
    # Wales & Ulker, Phys. Rev. B 74, 212101 (2006): N = 6, the octahedron;
    # the force-only minimizer with projection onto the sphere
    rng = np.random.default_rng(6)
    res = chargesim.relax(rng.normal(size=(6, 3)), Q1, radius=1.0, minimizer="fire", restarts=2, rng=rng)
    assert res.minimizer == "fire" and res.converged
    assert abs(res.energy - THOMSON[6]) <= 1e-6


def test_unconfined_like_charges_run_away_and_are_not_converged():
    # Earnshaw's theorem / Coulomb's law: like charges with nothing to hold
    # them have no equilibrium; the result must say so rather than "converge"
    pos = np.array([[0.0, 0.0, 0.0], [0.01, 0.0, 0.0], [0.0, 0.012, 0.003]])
    with pytest.warns(RuntimeWarning, match="ran away"):
        res = chargesim.relax(pos, 1e-9)
    assert not res.converged and res.escaped.size >= 1 and res.stability is None


def test_reported_modes_are_eigenvectors():
    # linear algebra: each returned mode v of eigenvalue lam satisfies H v = lam v;
    # checked with the Hessian from central differences of the front door's forces
    rng = np.random.default_rng(12)
    x = rng.normal(size=(9, 3))
    q = rng.uniform(0.5, 1.5, 9) * 1e-9
    st = layout.stability(x, q, fixed=[0, 1, 2], n_modes=3)
    h = 1e-6
    for lam, mode in zip(st.eigenvalues[:3], st.modes):
        assert np.linalg.norm(mode) == pytest.approx(1.0, rel=1e-12)
        assert np.all(mode[:3] == 0)  # fixed particles do not take part
        hv = -(chargesim.forces(x + h * mode, q, method="direct") - chargesim.forces(x - h * mode, q, method="direct")) / (2 * h)
        np.testing.assert_allclose(hv[3:], lam * mode[3:], atol=1e-5 * np.abs(st.eigenvalues).max())
