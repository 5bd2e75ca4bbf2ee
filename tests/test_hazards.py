"""Safety relations and checks (sources named beside each check)."""
import math

import pytest

from chargesim import hazards
from chargesim.physics.constants import EPSILON_0 as EPS0


def test_public_name_is_the_physics_module():
    import chargesim.physics.hazards as impl

    assert hazards is impl


def test_capacitor_relations():
    # standard relations: C = eps0 eps_r A/d, Q = C V, U = 1/2 C V^2 = Q^2/(2C)
    c = hazards.plate_capacitance(0.5, 2e-3, eps_r=2.1)
    assert c == pytest.approx(EPS0 * 2.1 * 0.5 / 2e-3, rel=1e-12)
    q = hazards.charge_from_voltage(c, 1500.0)
    assert q == pytest.approx(c * 1500.0, rel=1e-15)
    u = hazards.stored_energy(c, 1500.0)
    assert u == pytest.approx(0.5 * c * 1500.0**2, rel=1e-15)
    assert hazards.energy_from_charge(q, c) == pytest.approx(u, rel=1e-12)


def test_person_at_10kV_stores_5mJ():
    # human-body model 100 pF (ESD component test standard, from memory): 1/2 C V^2 = 5 mJ
    assert hazards.HUMAN_BODY_CAPACITANCE == 100e-12
    assert hazards.stored_energy(hazards.HUMAN_BODY_CAPACITANCE, 10e3) == pytest.approx(5e-3, rel=1e-12)


def test_one_metre_sphere_is_111pF():
    # standard relation C = 4 pi eps0 eps_r R: a 1 m sphere is about 111 pF
    assert hazards.sphere_capacitance(1.0) == pytest.approx(111.265e-12, rel=1e-4)
    assert hazards.sphere_capacitance(0.1, eps_r=2.0) == pytest.approx(2 * 11.1265e-12, rel=1e-4)


def test_breakdown_field_scaling():
    # about 3 MV/m at 20 degC, 1 atm, scaled with relative gas density (common practice)
    assert hazards.breakdown_field() == pytest.approx(3e6, rel=1e-12)
    assert hazards.breakdown_field(293.15, 0.5 * 101325) == pytest.approx(1.5e6, rel=1e-12)
    assert hazards.breakdown_field(2 * 293.15) == pytest.approx(1.5e6, rel=1e-12)


def test_peek_corona_onset_field():
    # Peek's law (F. W. Peek, Dielectric Phenomena in High Voltage Engineering, 1929; constants from memory):
    # E_c = 3.1 MV/m delta (1 + 0.0308/sqrt(delta r)), r in m; a 1.5 mm wire at 20 degC, 1 atm (delta = 1)
    assert hazards.corona_onset_field(1.5e-3) == pytest.approx(3.1e6 * (1 + 0.0308 / math.sqrt(1.5e-3)), rel=1e-12)
    assert hazards.corona_onset_field(1.5e-3) == pytest.approx(5.565e6, rel=1e-3)
    # delta from the ideal gas, 1 at 20 degC and 1 atm (the breakdown field's density factor)
    delta = 293.15 / 423.15
    assert hazards.relative_air_density(423.15) == pytest.approx(delta, rel=1e-12)
    assert hazards.corona_onset_field(1.5e-3, temperature=423.15) == pytest.approx(
        3.1e6 * delta * (1 + 0.0308 / math.sqrt(delta * 1.5e-3)), rel=1e-12)
    # Peek's surface factor m multiplies the onset field; thinner wires need a higher surface field
    assert hazards.corona_onset_field(1e-3, roughness=0.8) == pytest.approx(0.8 * hazards.corona_onset_field(1e-3))
    assert hazards.corona_onset_field(0.1e-3) > hazards.corona_onset_field(1e-3)
    with pytest.raises(ValueError, match="roughness"):
        hazards.corona_onset_field(1e-3, roughness=1.2)


def test_corona_electrode_onset_and_sparkover():
    # a wire above onset is informational (corona intended), not a breakdown hazard (Peek's law, from memory)
    wire = {"name": "wire", "peak_field": 7e6, "gap_field": 0.4e6, "corona_wire_radius": 1.5e-3}
    found = hazards.assess(fields=[wire])
    assert [(f.kind, f.severity) for f in found] == [("corona_onset", "info")]
    assert found[0].value == 7e6 and found[0].threshold == pytest.approx(hazards.corona_onset_field(1.5e-3))
    assert found[0].to_dict()["severity"] == "info" and found[0].units == "V/m"
    # below onset: no corona, the particles are not charged
    low = hazards.assess(fields=[dict(wire, peak_field=4e6)])
    assert [f.kind for f in low] == ["no_corona"] and "particles will not be charged" in low[0].message
    # the mean gap field against 3 MV/m x relative density (common practice) decides sparkover
    hot = hazards.assess(fields=[dict(wire, gap_field=3.2e6)])
    assert [f.kind for f in hot] == ["corona_onset", "breakdown"]
    assert hot[1].value == 3.2e6 and hot[1].threshold == pytest.approx(3e6) and "sparkover" in hot[1].message
    near = hazards.assess(fields=[dict(wire, gap_field=2.5e6)])
    assert [f.kind for f in near] == ["corona_onset", "breakdown_margin"]
    # a corona electrode without its gap field cannot be checked for sparkover
    with pytest.raises(ValueError, match="gap field"):
        hazards.assess(fields=[{"name": "wire", "peak_field": 7e6, "corona_wire_radius": 1.5e-3}])


def test_minimum_ignition_energies():
    # electrostatic-hazard guidance standards, from memory: hydrogen about 0.02 mJ,
    # many hydrocarbons and solvents 0.2-0.3 mJ, dusts larger
    assert hazards.min_ignition_energy("Hydrogen") == pytest.approx(0.02e-3, rel=0.2)
    for name in ("propane", "hexane", "toluene", "methane"):
        assert 0.2e-3 <= hazards.min_ignition_energy(name) <= 0.3e-3
    assert hazards.min_ignition_energy("flour dust") > 1e-3
    with pytest.raises(ValueError, match="known: .*hydrogen"):
        hazards.atmosphere("unobtainium")
    for name in hazards.atmospheres():
        assert "from memory" in hazards.atmosphere(name).source


def test_hot_gap_raises_breakdown_finding():
    # a 30 mm gap at 100 kV: 3.3 MV/m, above 3 MV/m (common practice)
    found = hazards.assess(fields=[("gun to part", 100e3 / 30e-3)])
    assert [f.kind for f in found] == ["breakdown"]
    f = found[0]
    assert f.value == pytest.approx(100e3 / 30e-3) and f.threshold == pytest.approx(3e6)
    assert f.units == "V/m" and f.name == "gun to part" and "gun to part" in f.message
    assert set(f.to_dict()) >= {"kind", "value", "threshold", "units", "message"}
    # 2.6 MV/m sits within the default margin (80 % of breakdown)
    near = hazards.assess(fields=[{"name": "wire", "peak_field": 2.6e6}])
    assert [f.kind for f in near] == ["breakdown_margin"]
    assert f.severity == "hazard" and "expect corona or sparkover" in f.message
    # at half an atmosphere the same 2 MV/m gap is over breakdown
    low_p = hazards.assess(fields=[("gap", 2e6)], pressure=0.5 * 101325)
    assert [f.kind for f in low_p] == ["breakdown"]


def test_charged_ungrounded_part_raises_ignition_finding():
    # a 0.2 m sphere (22 pF) at 20 kV stores 4.4 mJ, far above toluene's 0.24 mJ
    part = hazards.Conductor("hanging part", radius=0.2, voltage=20e3)
    found = hazards.assess(conductors=[part], atmosphere="toluene")
    assert [f.kind for f in found] == ["ignition"]
    u = 0.5 * 4 * math.pi * EPS0 * 0.2 * 20e3**2
    assert found[0].value == pytest.approx(u, rel=1e-12)
    assert found[0].threshold == pytest.approx(hazards.min_ignition_energy("toluene"))
    # described by its charge instead: Q = C V gives the same energy
    by_q = hazards.Conductor("hanging part", radius=0.2, charge=hazards.sphere_capacitance(0.2) * 20e3)
    assert hazards.assess(conductors=[by_q], atmosphere="toluene")[0].value == pytest.approx(u, rel=1e-12)


def test_given_ignition_energy():
    part = hazards.Conductor("drum", capacitance=200e-12, voltage=5e3)  # 2.5 mJ
    assert [f.kind for f in hazards.assess(conductors=[part], min_ignition_energy=1e-3)] == ["ignition"]
    assert hazards.assess(conductors=[part], min_ignition_energy=5e-3) == []
    with pytest.raises(ValueError, match="not both"):
        hazards.assess(conductors=[part], atmosphere="hexane", min_ignition_energy=1e-3)


def test_person_at_potential():
    found = hazards.assess(conductors=[{"name": "operator", "voltage": 10e3, "person": True}], atmosphere="propane")
    kinds = sorted(f.kind for f in found)
    assert kinds == ["ignition", "person_charged"]
    ign = next(f for f in found if f.kind == "ignition")
    assert ign.value == pytest.approx(5e-3)  # 100 pF at 10 kV


def test_safe_setup_raises_nothing():
    # a precipitator-like mean field of 0.5 MV/m, a grounded (0 V) part and a
    # barely charged small can (1 pF at 100 V: 5 nJ) in hexane vapour
    found = hazards.assess(
        fields=[("wire to plate", 0.5e6)],
        conductors=[
            hazards.Conductor("workpiece", capacitance=50e-12, voltage=0.0),
            hazards.Conductor("can", capacitance=1e-12, voltage=100.0),
            hazards.Conductor("operator", voltage=20.0, person=True),
        ],
        atmosphere="hexane",
    )
    assert found == []


def test_source_objects_are_accepted():
    class Source:
        name = "plates"

        def peak_field(self):
            return 3.5e6

    assert [f.kind for f in hazards.assess(fields=[Source()])] == ["breakdown"]


def test_cautions_text():
    text = hazards.CAUTIONS.lower()
    for word in ("high voltage", "ground", "flammable", "estimates", "local codes", "licensed"):
        assert word in text


@pytest.mark.parametrize(
    "call, name",
    [
        (lambda: hazards.sphere_capacitance(0.0), "radius"),
        (lambda: hazards.plate_capacitance(1.0, -1.0), "gap"),
        (lambda: hazards.stored_energy(-1e-12, 5.0), "capacitance"),
        (lambda: hazards.breakdown_field(pressure=0.0), "pressure"),
        (lambda: hazards.assess(margin=1.5), "margin"),
        (lambda: hazards.assess(conductors=[hazards.Conductor("x", voltage=1.0)]), "'x'"),
    ],
)
def test_validation(call, name):
    with pytest.raises(ValueError, match=name):
        call()
