"""Scenario loading: units, validation messages, physical checks, fuzzing, shipped scenarios."""
import math

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from chargesim.scenario import ScenarioError, load_scenario, loads_scenario
from chargesim.scenario.docs import render_reference
from chargesim.scenario.load import set_key, tomllib
from chargesim.scenario.units import to_si
from scenario_fixtures import BASE, ROOT, SHIPPED



def test_units_to_si():
    # unit definitions: SI prefixes, 0 degC = 273.15 K (SI brochure), 1 atm = 101325 Pa (definition)
    assert to_si("30 kV", "V") == pytest.approx(30e3, rel=1e-15)
    assert to_si("2.5 um", "m") == pytest.approx(2.5e-6, rel=1e-15)
    assert to_si("1.2 m/s", "m/s") == pytest.approx(1.2, rel=1e-15)
    assert to_si("400 kV/m", "V/m") == pytest.approx(4e5, rel=1e-15)
    assert to_si("20 degC", "K") == pytest.approx(293.15, abs=1e-12)
    assert to_si("68 degF", "K") == pytest.approx(293.15, abs=1e-9)
    assert to_si("1 atm", "Pa") == pytest.approx(101325.0, rel=1e-15)
    assert to_si("1 mC/kg", "C/kg") == pytest.approx(1e-3, rel=1e-15)
    assert to_si("50 %", "1") == 0.5
    assert to_si("180 deg", "1") == pytest.approx(math.pi, rel=1e-15)
    assert to_si(7, "m") == 7.0
    with pytest.raises(ValueError, match=r"expected a length .* 'kg' has dimension \[mass\]"):
        to_si("3 kg", "m")
    with pytest.raises(ValueError, match="NaN and infinite"):
        to_si(float("nan"), "m")


def test_base_loads_with_defaults():
    s = loads_scenario(BASE)
    d = s.data
    assert d["medium"]["temperature"] == pytest.approx(293.15)
    assert d["populations"][0]["diameter"] == pytest.approx(2.5e-6)
    assert d["coulomb"]["method"] == "auto"
    assert s.steps == 10
    assert s.text == BASE


def test_overrides_revalidate_and_keep_text():
    s = loads_scenario(BASE, overrides={"time.end": "20 ms", "populations[0].diameter": "5 um"})
    assert s.steps == 20 and s.data["populations"][0]["diameter"] == pytest.approx(5e-6)
    again = tomllib.loads(s.text)  # the text with overrides is valid TOML of the same document
    assert again["time"]["end"] == "20 ms"
    with pytest.raises(ScenarioError, match=r"populations\[0\]\.diameter"):
        loads_scenario(BASE, overrides={"populations[0].diameter": "-1 um"})


def test_error_names_file_path_value_and_hint(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text(BASE.replace('diameter = "2.5 um"', 'diamter = "2.5 um"'))
    with pytest.raises(ScenarioError) as exc:
        load_scenario(p)
    msg = str(exc.value)
    assert str(p) in msg and "populations[0].diamter" in msg and "did you mean 'diameter'?" in msg
    assert exc.value.path == "populations[0].diamter"


def test_image_force_on_bead_over_dielectric():
    # method of images for a dielectric half-space (Griffiths, Introduction to Electrodynamics;
    # Jackson 4.4): F = k q^2 (eps - 1)/(eps + 1) / (2h)^2, toward the surface
    text = """
[domain]
lower = ["-1 cm", "-1 cm", "0 cm"]
upper = ["1 cm", "1 cm", "1 cm"]
[[dielectrics]]
point = [0, 0, 0]
normal = [0, 0, 1]
eps_r = 2.1
[[populations]]
name = "bead"
fixed = true
positions = [["0 mm", "0 mm", "2 mm"]]
charges = ["50 pC"]
[time]
step = "1 ms"
end = "2 ms"
"""
    from chargesim.scenario import run

    s = loads_scenario(text)
    s.data["medium"]["eps_r"] = 1.0  # vacuum medium for the textbook formula
    res = run(s)["static"]
    k, q, h, eps = 8.9875517923e9, 50e-12, 2e-3, 2.1
    expect = k * q * q * (eps - 1) / (eps + 1) / (2 * h) ** 2
    assert res["forces"][0, 2] == pytest.approx(-expect, rel=1e-12)
    assert abs(res["forces"][0, 0]) < 1e-12 * expect


def test_ionic_cell_madelung_energy():
    # rock salt, Madelung constant 1.747564594633 (OEIS A085469; Kittel): E = -(N/2) M k e^2 / a
    from chargesim.scenario import run

    s = load_scenario(ROOT / "scenarios" / "ionic_cell.toml")
    res = run(s)["static"]
    k, e, a = 8.9875517923e9, 1.602176634e-19, 0.282e-9
    expect = -(8 / 2) * 1.747564594633 * k * e * e / a
    assert res["energy"] == pytest.approx(expect, rel=1e-6)


@pytest.mark.parametrize("path", SHIPPED, ids=lambda p: p.name)
def test_shipped_scenarios_load(path):
    s = load_scenario(path)
    assert s.name


def test_required_shipped_scenarios_exist():
    names = [p.name for p in SHIPPED]
    assert any("precipitator" in n for n in names) and any("spray" in n for n in names)
    assert "beads_over_sheet.toml" in names and "ionic_cell.toml" in names


def test_docs_hold_the_generated_reference():
    text = (ROOT / "docs" / "scenario.md").read_text()
    assert render_reference() in text, "regenerate with: python -m chargesim.scenario.docs"


# -- fuzzing: nothing but ScenarioError ----------------------------------------
_scalars = st.one_of(
    st.none(), st.booleans(), st.integers(-10**20, 10**20), st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=20), st.sampled_from(["3 kV", "2.5 um", "-1 m", "nan m", "1 furlongs", "20 degC", "x y z",
                                            "1e400 m", "0", "inf", "[]", "1 m/s", "auto", "ewald", "lognormal"]),
)
_values = st.recursive(_scalars, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                         st.dictionaries(st.text(max_size=8), inner, max_size=3)),
                       max_leaves=8)
_paths = st.sampled_from([
    "seed", "title", "medium.temperature", "medium.viscosity", "medium.gas", "medium.gravity", "domain.lower",
    "domain.upper", "domain.upper[1]", "domain.boundaries.x_min", "populations[0].diameter",
    "populations[0].count", "populations[0].distribution", "populations[0].positions", "populations[0].charges",
    "populations[0].gsd", "time.step", "time.end", "time.integrator", "coulomb.method", "coulomb.accuracy",
    "output.field_grids", "hazards.atmosphere", "hazards.conductors", "electrodes", "inlets", "flow.velocity",
    "flow.profile", "charging.mode", "nonsense", "populations[0].nonsense", "medium",
])


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(key=_paths, value=_values)
def test_fuzz_values_into_valid_document(key, value):
    try:
        loads_scenario(BASE, overrides={key: value})
    except ScenarioError:
        pass


@settings(max_examples=200, deadline=None)
@given(st.lists(st.sampled_from(list('[]="., \n#abcdeimnoprstuy0123456789-+{}') + ["[[", "]]", "populations",
                                                                                       "domain", "time", "nan"]),
                max_size=120).map("".join))
def test_fuzz_random_documents(text):
    try:
        loads_scenario(text)
    except ScenarioError:
        pass


def test_set_key_paths():
    doc = {"a": [{"b": 1}]}
    set_key(doc, "a[0].b", 2)
    set_key(doc, "c.d", 3)
    assert doc == {"a": [{"b": 2}], "c": {"d": 3}}
    with pytest.raises(ScenarioError, match="out of range"):
        set_key(doc, "a[3].b", 1)


def test_front_door_names_and_replace():
    import chargesim

    s = chargesim.load_scenario(ROOT / "scenarios" / "ionic_cell.toml")
    assert chargesim.run is not None
    t = s.replace({"coulomb.accuracy": 1e-6})
    assert t.data["coulomb"]["accuracy"] == 1e-6 and s.data["coulomb"]["accuracy"] == 1e-8
    with pytest.raises(ScenarioError, match="coulomb.accuracy"):
        s.replace({"coulomb.accuracy": 2})


def test_spray_transfer_efficiency_in_typical_range(tmp_path):
    # electrostatic spray transfer efficiency 60-90 % (REFERENCES.md, common practice): the shipped spray
    # with half its simulated droplets (same mass flow, so the same space charge) lands in that range,
    # losing mass past the panel edges; nothing is left in flight at the end
    import chargesim
    from chargesim.io import open_results

    s = load_scenario(ROOT / "scenarios" / "spray_panel.toml", overrides={"inlets[0].rate": "5000 1/s"})
    chargesim.run(s, output=tmp_path / "spray.h5")
    r = open_results(tmp_path / "spray.h5").summary
    te = r["deposited_mass"] / r["emitted_mass"]
    assert 0.6 <= te <= 0.9
    assert r["airborne_mass"] == 0.0 and r["escaped_mass"] > 0.0
