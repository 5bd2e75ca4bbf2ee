"""Efficiency and deposition functions on hand-made event records
(values worked out by hand from the definitions: collection efficiency =
deposited / emitted mass; grade efficiency = the same per size bin;
deposition density = deposit per unit area)."""
import numpy as np
import pytest

from chargesim.analysis import (
    collection_efficiency,
    counts,
    deposition_density,
    deposition_map,
    grade_efficiency,
    real_mass,
    transfer_efficiency,
)


def _records(surface, diameter, mass, weight, position=None, charge=None):
    k = len(surface)
    return {
        "id": np.arange(k),
        "time": np.zeros(k),
        "position": np.zeros((k, 3)) if position is None else np.asarray(position, float),
        "velocity": np.zeros((k, 3)),
        "surface": np.array(surface, dtype=str),
        "charge": np.zeros(k) if charge is None else np.asarray(charge, float),
        "mass": np.asarray(mass, float),
        "diameter": np.asarray(diameter, float),
        "weight": np.asarray(weight, float),
        "population": np.zeros(k, dtype=np.int32),
    }


DEP = _records(["panel", "panel", "booth wall", "panel"], [1e-6, 3e-6, 3e-6, 9e-6], [1.0, 2.0, 2.0, 4.0],
               [10.0, 1.0, 1.0, 2.0], position=[[0.1, 0, 0.1], [0.3, 0, 0.1], [0, 0, 0], [0.3, 0, 0.3]],
               charge=[1e-15, 2e-15, 0.0, -1e-15])
ESC = _records(["exhaust", "exhaust"], [1e-6, 3e-6], [1.0, 2.0], [30.0, 3.0])


def test_masses_and_counts():
    # real mass = sum weight x mass: 10 + 2 + 2 + 8 = 22 deposited
    assert real_mass(DEP) == 22.0
    assert real_mass(DEP, "panel") == 20.0
    c = counts(DEP)
    assert c["panel"] == {"simulated": 3, "real": 13.0, "mass": 20.0}
    assert c["booth wall"]["simulated"] == 1
    assert counts({}) == {}


def test_collection_and_transfer_efficiency():
    emitted = 22.0 + 36.0  # everything deposited or escaped
    assert collection_efficiency(DEP, emitted) == pytest.approx(22.0 / 58.0)
    assert transfer_efficiency(DEP, emitted, "panel") == pytest.approx(20.0 / 58.0)
    assert collection_efficiency({}, 1.0) == 0.0
    with pytest.raises(ValueError, match="emitted_mass"):
        collection_efficiency(DEP, 0.0)


def test_grade_efficiency_by_number_and_mass():
    g = grade_efficiency(DEP, ESC, [0.5e-6, 2e-6, 5e-6, 2e-5])
    # bin 1 (1 um): 10 deposited of 10 + 30 real particles; bin 2 (3 um):
    # 2 of 2 + 3; bin 3 (9 um): 2 of 2
    np.testing.assert_allclose(g["efficiency"], [10 / 40, 2 / 5, 1.0])
    np.testing.assert_array_equal(g["n_simulated"], [2, 3, 1])
    np.testing.assert_allclose(g["centers"], np.sqrt([0.5e-6 * 2e-6, 2e-6 * 5e-6, 5e-6 * 2e-5]))
    # collected on the panel only: the wall deposit counts as not collected
    gp = grade_efficiency(DEP, ESC, [0.5e-6, 2e-6, 5e-6, 2e-5], surfaces="panel")
    np.testing.assert_allclose(gp["efficiency"], [10 / 40, 1 / 5, 1.0])
    gm = grade_efficiency(DEP, ESC, [0.5e-6, 2e-6, 5e-6, 2e-5], quantity="mass")
    np.testing.assert_allclose(gm["efficiency"], [10 / 40, 4 / 10, 1.0])
    # an empty bin has no efficiency
    ge = grade_efficiency(DEP, ESC, [1e-7, 2e-7, 2e-5])
    assert np.isnan(ge["efficiency"][0])
    with pytest.raises(ValueError, match="edges"):
        grade_efficiency(DEP, ESC, [2e-6, 1e-6])


def test_deposition_density_and_map():
    assert deposition_density(DEP, "panel", 0.5) == pytest.approx(40.0)  # 20 kg on 0.5 m^2
    assert deposition_density(DEP, "panel", 0.5, quantity="charge") == pytest.approx(
        (10 * 1e-15 + 1 * 2e-15 + 2 * -1e-15) / 0.5)
    dmap, eu, ev = deposition_map(DEP, "panel", (0, 2), 2, ((0, 0.4), (0, 0.4)))
    # cells of 0.2 m x 0.2 m = 0.04 m^2: (0,0) holds 10 kg, (1,0) 2 kg, (1,1) 8 kg
    np.testing.assert_allclose(dmap, [[10 / 0.04, 0], [2 / 0.04, 8 / 0.04]])
    np.testing.assert_allclose(eu, [0, 0.2, 0.4])
    with pytest.raises(ValueError, match="area"):
        deposition_density(DEP, "panel", 0.0)


def test_results_file_round_trip_gives_the_same_efficiencies(tmp_path):
    # the run loop -> HDF5 recorder -> reader -> analysis path agrees with
    # the in-memory records of the same run (same seed)
    import math

    import numba

    from chargesim.io import ResultsWriter, open_results
    from chargesim.motion import (Domain, FixedCharge, FixedSize, Inlet, MemoryRecorder, Medium, PlaneCollector,
                                  Population, RectangleArea, Simulation, System, UniformFlow)
    from chargesim.sources import UniformField

    def build():
        med = Medium(flow=UniformFlow((1.0, 0, 0)))
        pop = Population("dust", FixedSize(5e-6), 1000.0, charge=FixedCharge(-1e-16), weight=100.0)
        inlet = Inlet(pop, RectangleArea((0, 0.05, 0.05), (0, 0.1, 0), (0, 0, 0.1)), rate=2000.0, stop=0.1)
        plate = PlaneCollector("plate", (0, 0, 0), (0, 1, 0), lo=(0, -1, 0), hi=(0.5, 1, 0.1))
        dom = Domain(lo=(-1, 0, 0), hi=(0.5, 0.1, 0.1), kinds=("open", "reflecting", "periodic"))
        sys_ = System(np.random.default_rng(5), medium=med, sources=[UniformField((0, 3e5, 0))], domain=dom,
                      collectors=[plate], inlets=[inlet], coulomb=None)
        return Simulation(sys_, dt=5e-3, diagnostics_every=10, frame_every=50)

    old = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        mem = MemoryRecorder(keep_frames=False)
        sim = build()
        summary = sim.run(t_end=0.4, recorder=mem)
        st = sim.system.state
        airborne = {"diameter": st.diameter, "weight": st.weight, "mass": st.mass}
        path = tmp_path / "channel.h5"
        build().run(t_end=0.4, recorder=ResultsWriter(str(path), scenario_text="invented test channel", seed=5))
    finally:
        numba.set_num_threads(old)
    res = open_results(str(path))
    assert res.collection_efficiency() == pytest.approx(summary["collection_efficiency"], rel=1e-12)
    assert collection_efficiency(res.deposits, res.emitted_mass()) == pytest.approx(
        summary["collection_efficiency"], rel=1e-12)
    edges = [1e-6, 1e-5]
    g_file = res.grade_efficiency(edges)
    g_mem = grade_efficiency(mem.all_deposits, mem.all_escapes, edges, airborne=airborne)
    assert st.n > 0  # some still in flight: they count as not collected
    assert g_file["efficiency"][0] == pytest.approx(g_mem["efficiency"][0], rel=1e-12)
    assert 0 < g_mem["efficiency"][0] < 1 and not math.isnan(g_mem["efficiency"][0])
