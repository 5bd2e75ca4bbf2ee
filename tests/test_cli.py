"""The command line: malformed-scenario corpus (exit 2, exact message), check, run, field, report."""
import json

import pytest

from chargesim import __version__
from chargesim.cli import main
from scenario_fixtures import BASE, ROOT, SHIPPED



def _sub(old, new):
    assert old in BASE
    return BASE.replace(old, new)


# (case id, scenario text, exact message fragment)
MALFORMED = [
    ("misspelt_key", _sub('diameter = "2.5 um"', 'diamter = "2.5 um"'),
     "populations[0].diamter: unknown key (did you mean 'diameter'?)"),
    ("wrong_dimension", _sub('"2.5 um"', '"3 kg"'),
     "populations[0].diameter: expected a length (convertible to m), but 'kg' has dimension [mass]"),
    ("negative_diameter", _sub('"2.5 um"', '"-1 um"'),
     "populations[0].diameter: '-1 um' is out of range: must be > 0 m (a particle has a positive diameter)"),
    ("nan", _sub('"2.5 um"', "nan"), "populations[0].diameter: NaN and infinite values are not allowed"),
    ("inf", _sub('"2.5 um"', "inf"), "populations[0].diameter: NaN and infinite values are not allowed"),
    ("nan_in_string", _sub('"2.5 um"', '"nan um"'), "populations[0].diameter: expected a length written as a number"),
    ("zero_viscosity", BASE + "\n[medium]\nviscosity = 0\n",
     "medium.viscosity: 0 is out of range: must be > 0 Pa*s (a gas has positive viscosity)"),
    ("unknown_unit", _sub('"2.5 um"', '"2.5 furlongz"'), "populations[0].diameter: unknown unit 'furlongz'"),
    ("domain_inverted", _sub('upper = ["1 m", "1 m", "1 m"]', 'upper = ["-1 m", "1 m", "1 m"]'),
     "domain.upper[0]: -1 m must be greater than domain.lower[0] = 0 m"),
    ("particle_outside", _sub("count = 10", 'positions = [["2 m", "0.5 m", "0.5 m"]]'),
     "populations[0].positions[0]: particle at [2, 0.5, 0.5] m is outside the domain"),
    ("inlet_outside", BASE + '\n[[inlets]]\npopulation = "dust"\ntype = "disc"\ncenter = ["0.5 m", "0.5 m", "3 m"]\n'
                             'normal = [0, 0, 1]\nradius = "1 cm"\nrate = 100\n',
     "inlets[0].center: inlet disc centre at [0.5, 0.5, 3] m is outside the domain"),
    ("plates_overlap", BASE + '\n[[electrodes]]\ntype = "parallel_plates"\naxis = "z"\nlower = "0.5 m"\n'
                              'upper = "0.5 m"\nvoltage_upper = "10 kV"\n',
     "electrodes[0].upper: 0.5 m must be greater than lower = 0.5 m (the plates would touch or cross: "
     "overlapping electrodes)"),
    ("wire_thicker_than_tube", BASE + '\n[[electrodes]]\ntype = "wire_in_tube"\naxis = "z"\n'
                                      'center = ["0.5 m", "0.5 m", "0 m"]\nwire_radius = "2 cm"\n'
                                      'tube_radius = "1 cm"\nvoltage = "-30 kV"\n',
     "electrodes[0].tube_radius: 0.01 m must be greater than wire_radius = 0.02 m (the wire would touch the tube)"),
    ("wires_touch_plates", BASE + '\n[[electrodes]]\ntype = "wire_plate"\nplates = ["0 m", "1 m"]\n'
                                  'first_wire = "0.5 m"\nwire_radius = "0.6 m"\nvoltage = "-40 kV"\n',
     "electrodes[0].wire_radius: 0.6 m: the wires midway would touch the plates 1 m apart (overlapping electrodes)"),
    ("wires_overlap", BASE + '\n[[electrodes]]\ntype = "wire_plate"\nplates = ["0 m", "1 m"]\nfirst_wire = "0.1 m"\n'
                             'wire_spacing = "1 mm"\nn_wires = 3\nwire_radius = "1 mm"\nvoltage = "-40 kV"\n',
     "electrodes[0].wire_spacing: 0.001 m is not more than one wire diameter (0.002 m): the wires overlap"),
    ("unknown_section", BASE + "\n[mediun]\ntemperature = 300\n", "mediun: unknown key (did you mean 'medium'?)"),
    ("bad_choice", BASE + '\n[coulomb]\nmethod = "ewold"\n',
     "coulomb.method: 'ewold' is not allowed; allowed: 'auto', 'direct', 'cutoff', 'tree', 'ewald', 'mesh', 'off' "
     "(did you mean 'ewald'?)"),
    ("ewald_not_periodic", BASE + '\n[coulomb]\nmethod = "ewald"\n',
     "coulomb.method: 'ewald' is a periodic sum: it needs all domain boundaries 'periodic'"),
    ("one_face_periodic", BASE + '\n[domain.boundaries]\nx_min = "periodic"\n',
     "domain.boundaries.x_max: 'outlet' is not allowed here: x_min and x_max are 'periodic' together or not at all"),
    ("end_before_step", _sub('end = "10 ms"', 'end = "0.5 ms"'),
     "time.end: 0.0005 s must be greater than time.step = 0.001 s"),
    ("missing_time", BASE.replace('[time]\nstep = "1 ms"\nend = "10 ms"\n', ""),
     "time: missing required section [time] (time stepping)"),
    ("no_populations", BASE.replace('[[populations]]\nname = "dust"\ndiameter = "2.5 um"\ncount = 10\n', ""),
     "populations: missing: at least 1 [[populations]] section(s) required"),
    ("inlet_unknown_population", BASE + '\n[[inlets]]\npopulation = "dusty"\ntype = "disc"\n'
                                        'center = ["0.5 m", "0.5 m", "0.5 m"]\nnormal = [0, 0, 1]\n'
                                        'radius = "1 cm"\nrate = 100\n',
     "inlets[0].population: 'dusty' is not a population (did you mean 'dust'?)"),
    ("electrode_no_type", BASE + '\n[[electrodes]]\nfield = [0, 0, "1 kV/m"]\n',
     "electrodes[0].type: missing required key; allowed: 'uniform', 'parallel_plates', 'wire_plate', 'wire_in_tube'"),
    ("electrode_bad_type", BASE + '\n[[electrodes]]\ntype = "wire_plat"\n',
     "electrodes[0].type: 'wire_plat' is not allowed; allowed: 'uniform', 'parallel_plates', 'wire_plate', "
     "'wire_in_tube' (did you mean 'wire_plate'?)"),
    ("not_toml", "[domain\nlower = [", "not valid TOML"),
    ("count_not_integer", _sub("count = 10", 'count = "ten"'), "populations[0].count: expected a whole number, got 'ten'"),
    ("boolean_quantity", _sub('"2.5 um"', "true"), "populations[0].diameter: expected a length, got a boolean"),
    ("below_absolute_zero", BASE + '\n[medium]\ntemperature = "-300 degC"\n',
     "medium.temperature: '-300 degC' is out of range: must be > 0 K (absolute temperature is above 0 K)"),
    ("unknown_atmosphere", BASE + '\n[hazards]\natmosphere = "propan"\n',
     "hazards.atmosphere: 'propan' is not in the table of flammable atmospheres (did you mean 'propane'?)"),
    ("conductor_underspecified", BASE + '\n[[hazards.conductors]]\nname = "can"\nvoltage = "10 kV"\n',
     "hazards.conductors[0]: give exactly one of capacitance, radius (sphere), or area and gap (plate); got none"),
    ("grid_zero_points", BASE + '\n[[output.field_grids]]\nname = "g"\nlower = [0, 0, 0]\nupper = [1, 1, 1]\n'
                                'shape = [0, 2, 2]\n',
     "output.field_grids[0].shape[0]: 0 is out of range: must be >= 1 and <= 2000"),
    ("gsd_below_one", _sub('diameter = "2.5 um"', 'distribution = "lognormal"\nmedian_diameter = "2 um"\ngsd = 0.9'),
     "populations[0].gsd: 0.9 is out of range: must be > 1 (a geometric standard deviation exceeds 1"),
    ("charges_length", _sub("count = 10", 'positions = [[0.1, 0.1, 0.1], [0.2, 0.2, 0.2]]\ncharges = ["1 fC"]'),
     "populations[0].charges: has 1 values but positions has 2"),
    ("vector_length", _sub("lower = [0, 0, 0]", "lower = [0, 0]"),
     "domain.lower: expected a list of 3 values (length), got [0, 0]"),
    ("negative_seed", "seed = -1\n" + BASE, "seed: -1 is out of range: must be >= 0"),
    ("duplicate_population", BASE + '\n[[populations]]\nname = "dust"\ndiameter = "1 um"\ncount = 1\n',
     "populations[1].name: 'dust' is already the name of populations[0]; names are unique"),
    ("medium_eps_below_one", BASE + "\n[medium]\neps_r = 0.5\n",
     "medium.eps_r: 0.5 is out of range: must be >= 1 (no medium has a relative permittivity below that of vacuum)"),
    ("particle_inside_wire", BASE + '\n[[electrodes]]\ntype = "wire_in_tube"\naxis = "z"\n'
                                    'center = ["0.5 m", "0.5 m", "0 m"]\nwire_radius = "5 cm"\ntube_radius = "0.4 m"\n'
                                    'voltage = "-30 kV"\n[[populations]]\nname = "b"\ndiameter = "1 um"\n'
                                    'positions = [["0.5 m", "0.5 m", "0.5 m"]]\n',
     "populations[1].positions[0]: particle at [0.5, 0.5, 0.5] m is inside the wire of electrodes[0]"),
    ("frame_interval_short", BASE + '\n[output]\nframe_interval = "0.1 ms"\n',
     "output.frame_interval: 0.0001 s is shorter than the time step (0.001 s)"),
]


def test_corpus_is_large_enough():
    assert len(MALFORMED) >= 30
    assert len({c[0] for c in MALFORMED}) == len(MALFORMED)


@pytest.mark.parametrize("case,text,fragment", MALFORMED, ids=[c[0] for c in MALFORMED])
def test_malformed_scenario_exit_2(tmp_path, capsys, case, text, fragment):
    p = tmp_path / f"{case}.toml"
    p.write_text(text)
    for cmd in (["check", str(p)], ["run", str(p)]):
        assert main(cmd) == 2
        err = capsys.readouterr().err
        assert fragment in err, err
        assert str(p) in err
        assert "Traceback" not in err
        assert err.count("\n") == 1  # one clear message


def test_help_and_version(capsys):
    for cmd in ([], ["run"], ["check"], ["field"], ["report"]):
        assert main(cmd + ["--help"]) == 0
        assert "usage: chargesim" in capsys.readouterr().out
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"chargesim {__version__}"


def test_usage_errors_exit_2(capsys):
    assert main(["frobnicate"]) == 2
    assert main(["run"]) == 2
    assert main([]) == 2
    assert "Traceback" not in capsys.readouterr().err


def test_missing_file_exit_2(tmp_path, capsys):
    assert main(["check", str(tmp_path / "nope.toml")]) == 2
    err = capsys.readouterr().err
    assert "nope.toml: cannot read the file" in err


@pytest.mark.parametrize("path", SHIPPED, ids=lambda p: p.name)
def test_check_shipped(path, capsys):
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "Cautions" in out and "local codes" in out
    assert main(["check", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert isinstance(doc["hazards"], list)
    for f in doc["hazards"]:
        assert {"kind", "value", "threshold", "units", "message"} <= set(f)
    assert doc["time"]["steps"] >= 0 and doc["particles"]["total"] > 0


def test_check_json_reports_findings(capsys):
    # the spray scenario has an ungrounded 5 cm sphere at 15 kV in toluene vapour:
    # U = 1/2 C V^2 with C = 4 pi eps0 R (standard relations) = 0.63 mJ > 0.24 mJ (guidance, from memory)
    assert main(["check", str(ROOT / "scenarios" / "spray_panel.toml"), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    kinds = [f["kind"] for f in doc["hazards"]]
    assert "ignition" in kinds
    f = doc["hazards"][kinds.index("ignition")]
    c = 4 * 3.141592653589793 * 8.8541878128e-12 * 0.05
    assert f["value"] == pytest.approx(0.5 * c * 15e3**2, rel=1e-6) and f["units"] == "J"


def _short(tmp_path, name, overrides):
    """A shortened copy of a shipped scenario (the end time overridden)."""
    from chargesim.scenario import load_scenario

    s = load_scenario(ROOT / "scenarios" / name, overrides=overrides)
    p = tmp_path / name
    p.write_text(s.text)
    return p


SHORT = {
    "precipitator_duct.toml": {"time.end": "0.06 s", "output.checkpoint_interval": "0.02 s"},
    "spray_panel.toml": {"time.end": "0.02 s", "inlets[0].rate": "500 1/s"},
    "beads_over_sheet.toml": {},
    "ionic_cell.toml": {},
}


@pytest.mark.parametrize("name", sorted(SHORT))
def test_run_shortened_shipped(tmp_path, capsys, name):
    from chargesim.io import open_results

    p = _short(tmp_path, name, SHORT[name])
    out = tmp_path / "out.h5"
    assert main(["run", str(p), "-o", str(out), "--quiet"]) == 0
    res = open_results(out)
    assert res.finished
    assert set(res.fields)  # every shipped scenario asks for field grids
    # overwrite refusal: the file stays as it is
    before = out.stat().st_mtime_ns
    assert main(["run", str(p), "-o", str(out)]) == 2
    assert "exists already; use --overwrite" in capsys.readouterr().err
    assert out.stat().st_mtime_ns == before
    assert not (tmp_path / "out.h5.partial").exists()
    # resuming a finished run does nothing
    assert main(["run", str(p), "-o", str(out), "--resume", "--quiet"]) == 0
    assert out.stat().st_mtime_ns == before
    if name == "ionic_cell.toml":
        # Madelung constant of rock salt 1.747564594633 (OEIS A085469; Kittel)
        k, e, a = 8.9875517923e9, 1.602176634e-19, 0.282e-9
        assert res.summary["energy"] == pytest.approx(-4 * 1.747564594633 * k * e * e / a, rel=1e-6)


def test_field_command(tmp_path, capsys):
    from chargesim.io import open_results

    out = tmp_path / "f.h5"
    assert main(["field", str(ROOT / "scenarios" / "beads_over_sheet.toml"), "-o", str(out)]) == 0
    res = open_results(out)
    assert set(res.fields) == {"bead_plane", "section"}
    g = res.fields["bead_plane"]
    assert g["field"].shape[-1] == 3 and g["potential"].size == 81 * 81
    assert main(["field", str(ROOT / "scenarios" / "beads_over_sheet.toml"), "-o", str(out)]) == 2


def test_report_command(tmp_path, capsys):
    pytest.importorskip("chargesim.plots")
    from chargesim import plots

    if not hasattr(plots, "make_report"):
        pytest.skip("report not there yet")
    p = _short(tmp_path, "precipitator_duct.toml", SHORT["precipitator_duct.toml"])
    out = tmp_path / "r.h5"
    assert main(["run", str(p), "-o", str(out), "--quiet"]) == 0
    rep = tmp_path / "report"
    assert main(["report", str(out), "-o", str(rep)]) == 0
    assert list(rep.glob("*.png"))


def test_report_on_non_results_file(tmp_path, capsys):
    bad = tmp_path / "x.h5"
    bad.write_bytes(b"not hdf5")
    rc = main(["report", str(bad)])
    assert rc in (1, 2)
    assert "Traceback" not in capsys.readouterr().err


def test_delegated_command_not_available(capsys):
    rc = main(["verify", "--help"])
    assert rc in (0, 1)
    assert "Traceback" not in capsys.readouterr().err


def test_overcharged_bead_raises_breakdown_finding(tmp_path, capsys):
    # a 1 mm bead with 100 pC: surface field k q / R^2 = 3.6 MV/m (Gauss's law) exceeds the
    # dielectric strength of air, about 3 MV/m at 20 degC and 1 atm (common practice)
    text = (ROOT / "scenarios" / "beads_over_sheet.toml").read_text().replace('"40 pC"', '"100 pC"')
    p = tmp_path / "hot_beads.toml"
    p.write_text(text)
    assert main(["check", str(p), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    hits = [f for f in doc["hazards"] if f["kind"] == "breakdown"]
    assert hits and hits[0]["units"] == "V/m"
    # the centre bead sees no field from its eight neighbours (symmetry), so its own surface field is the peak;
    # air eps_r 1.00059: CRC Handbook (from memory)
    assert hits[0]["value"] == pytest.approx(8.9875517923e9 * 100e-12 / (1.00059 * (0.5e-3) ** 2), rel=1e-8)
    assert main(["check", str(ROOT / "scenarios" / "beads_over_sheet.toml"), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["hazards"] == []


def test_precipitator_wires_in_corona_without_breakdown(capsys):
    # corona wires are meant to exceed the onset field: Peek's law (Peek 1929, from memory) at 150 degC,
    # delta = 293.15/423.15; the mean field 55 kV/150 mm = 0.37 MV/m stays far below 3 MV/m x delta
    # (common practice), so no breakdown finding
    path = ROOT / "scenarios" / "precipitator_duct.toml"
    assert main(["check", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    kinds = [f["kind"] for f in doc["hazards"]]
    assert "breakdown" not in kinds and "breakdown_margin" not in kinds
    assert kinds.count("corona_onset") == 1
    f = doc["hazards"][kinds.index("corona_onset")]
    delta = 293.15 / 423.15
    assert f["threshold"] == pytest.approx(3.1e6 * delta * (1 + 0.0308 / (delta * 1.5e-3) ** 0.5), rel=1e-9)
    assert f["value"] > f["threshold"] and f["severity"] == "info" and f["units"] == "V/m"
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "[corona_onset]" in out and "Safety findings: none" in out
    # the same duct at 100 kV: 0.67 MV/m mean field, still no sparkover finding; at 20 kV the wires stay
    # below onset (surface field about 2.7 MV/m < 4.2 MV/m): no corona, the dust is not charged
    from chargesim.scenario import load_scenario
    from chargesim.scenario.summary import hazard_findings

    low = hazard_findings(load_scenario(path, overrides={"electrodes[0].voltage": "-20 kV"}))
    assert [f.kind for f in low] == ["no_corona"] and "particles will not be charged" in low[0].message


def test_given_ignition_energy_goes_through_the_safety_checks(tmp_path, capsys):
    # hazards.minimum_ignition_energy instead of a named atmosphere: the 5 cm hanger at 15 kV stores
    # 1/2 (4 pi eps0 R) V^2 = 0.63 mJ (standard relations), above 0.5 mJ and below 1 mJ
    from chargesim.scenario import load_scenario
    from chargesim.scenario.summary import hazard_findings

    path = ROOT / "scenarios" / "spray_panel.toml"
    text = path.read_text().replace('atmosphere = "toluene"', 'minimum_ignition_energy = "0.5 mJ"')
    p = tmp_path / "spray_mie.toml"
    p.write_text(text)
    found = [f for f in hazard_findings(load_scenario(p)) if f.kind == "ignition"]
    assert len(found) == 1 and found[0].threshold == pytest.approx(0.5e-3)
    c = 4 * 3.141592653589793 * 8.8541878128e-12 * 0.05
    assert found[0].value == pytest.approx(0.5 * c * 15e3**2, rel=1e-6)
    p.write_text(text.replace('"0.5 mJ"', '"1 mJ"'))
    assert [f for f in hazard_findings(load_scenario(p)) if f.kind == "ignition"] == []
