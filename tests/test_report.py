"""The report of a results file: figures with data, skipped ones noted, text summary.

Outside reference: the Deutsch-Anderson relation eta = 1 - exp(-w A/Q)
(Deutsch 1922, REFERENCES.md "Deutsch-Anderson"), drawn on the grade
efficiency figure.
"""
import math
import os

import matplotlib.image as mpimg
import numpy as np
import pytest

from chargesim.io import ResultsWriter, open_results
from chargesim.plots import make_report
from chargesim.plots.figures import deutsch_anderson


def _run(path, *, field=True, frames=True):
    from chargesim.motion import (Domain, FixedCharge, Inlet, LognormalSize, Medium, PlaneCollector, Population,
                                  RectangleArea, Simulation, System, UniformFlow)
    from chargesim.sources import UniformField

    med = Medium(flow=UniformFlow((1.0, 0, 0)))
    pop = Population("dust", LognormalSize(4e-6, 1.6), 1000.0, charge=FixedCharge(-1e-16), weight=100.0)
    inlet = Inlet(pop, RectangleArea((0, 0.05, 0.05), (0, 0.1, 0), (0, 0, 0.1)), rate=2000.0, stop=0.2)
    plate = PlaneCollector("plate", (0, 0, 0), (0, 1, 0), lo=(0, -1, 0), hi=(0.5, 1, 0.1))
    dom = Domain(lo=(-1, 0, 0), hi=(0.5, 0.1, 0.1), kinds=("open", "reflecting", "periodic"))
    sys_ = System(np.random.default_rng(3), medium=med, sources=[UniformField((0, 3e5, 0))], domain=dom,
                  collectors=[plate], inlets=[inlet], coulomb=None)
    sim = Simulation(sys_, dt=5e-3, diagnostics_every=1, frame_every=5 if frames else 0)
    w = ResultsWriter(path, scenario_text="invented report channel", seed=3)
    if field:
        x, y, z = np.linspace(0, 0.5, 26), np.linspace(0, 0.1, 11), np.array([0.05])
        X, Y, Z = np.meshgrid(x, y, z, indexing="ij")
        e = np.zeros(X.shape + (3,))
        e[..., 1] = 3e5 * (1 + 0.5 * X)
        w.write_field("applied", x, y, z, potential=-3e5 * Y, field=e)

    class Info:  # the scenario layer adds what the report needs to the run info
        def __getattr__(self, name):
            return getattr(w, name)

        def start(self, info):
            info = dict(info, size_bins=[1e-6, 3e-6, 6e-6, 2e-5], migration_velocity=[0.01, 0.03, 0.06],
                        collection_area_per_flow=5.0, hazards=[{"kind": "breakdown", "name": "plate",
                                                                 "message": "invented finding for the test",
                                                                 "value": 1.0, "threshold": 2.0, "units": "V/m"},
                                                                {"kind": "corona_onset", "name": "wire",
                                                                 "severity": "info", "message": "invented onset",
                                                                 "value": 6.0, "threshold": 5.0, "units": "V/m"}])
            w.start(info)
    sim.run(t_end=0.5, recorder=Info())
    return path


def test_deutsch_anderson_values():
    # Deutsch (1922): w = 0.1 m/s, A/Q = 20 s/m -> 1 - e^-2
    assert deutsch_anderson(0.1, 20.0) == pytest.approx(1 - math.exp(-2.0), rel=1e-15)
    assert deutsch_anderson([0.0], 20.0)[0] == 0.0


def test_report_figures_and_summary(tmp_path):
    p = _run(str(tmp_path / "run.h5"))
    out = tmp_path / "rep"
    made = make_report(p, out)
    names = [os.path.basename(m) for m in made]
    assert names == ["field_map.png", "particle_paths.png", "deposition.png", "grade_efficiency.png",
                     "diagnostics.png", "summary.txt"]
    for m in made[:-1]:
        img = mpimg.imread(m)
        assert img.ndim == 3 and img.shape[0] > 200 and img.shape[1] > 300
        assert img.std() > 0.01  # not a blank canvas
    text = (out / "summary.txt").read_text()
    res = open_results(p)
    assert f"{res.summary['collection_efficiency']:.6g}" in text
    assert "invented finding for the test" in text and "local codes" in text
    # information findings (corona onset) stand apart from the hazards
    corona, safety = text.index("Corona electrodes"), text.index("Safety findings")
    assert corona < text.index("invented onset") < safety < text.index("invented finding for the test")
    assert f"deposited on 'plate': {len(res.deposits['id'])} simulated" in text
    assert "grade efficiency" in text


def test_figures_without_data_are_skipped_with_a_note(tmp_path):
    p = _run(str(tmp_path / "bare.h5"), field=False, frames=False)
    made = make_report(p, tmp_path / "rep")
    names = [os.path.basename(m) for m in made]
    assert "field_map.png" not in names and "particle_paths.png" not in names
    assert not (tmp_path / "rep" / "field_map.png").exists()
    text = (tmp_path / "rep" / "summary.txt").read_text()
    assert "field_map.png: skipped: the file holds no field grids" in text
    assert "particle_paths.png: skipped" in text
    assert "deposition.png" in names and "diagnostics.png" in names


def test_report_refuses_a_file_that_is_not_ours(tmp_path):
    bad = tmp_path / "x.h5"
    bad.write_bytes(b"not hdf5 at all")
    with pytest.raises(ValueError, match=r"x\.h5.*not an HDF5 file"):
        make_report(str(bad), tmp_path / "rep")
