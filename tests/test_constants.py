"""Constants and the permittivity table against published values."""
import math

import pytest

from chargesim.physics import constants as c
from chargesim.physics import materials


def test_codata_2018_values():
    # CODATA 2018 (via scipy.constants): epsilon_0 = 8.8541878128e-12 F/m
    assert c.EPSILON_0 == pytest.approx(8.8541878128e-12, rel=1e-9)
    # CODATA 2018 (derived): k = 1/(4 pi epsilon_0) = 8.9875517923e9 N m^2/C^2
    assert c.COULOMB_K == pytest.approx(8.9875517923e9, rel=1e-9)
    # SI 2019 definition: e = 1.602176634e-19 C exactly
    assert c.ELEMENTARY_CHARGE == 1.602176634e-19


def test_rounded_values_of_common_practice():
    # common practice: epsilon_0 ~ 8.854e-12 F/m, k ~ 8.988e9 N m^2/C^2 (4 significant figures)
    assert round(c.EPSILON_0, 15) == 8.854e-12
    assert float(f"{c.COULOMB_K:.4g}") == 8.988e9
    assert c.COULOMB_K * 4 * math.pi * c.EPSILON_0 == pytest.approx(1.0, rel=1e-15)


@pytest.mark.parametrize(
    "name, value, source",
    [
        ("dry air", 1.00059, "CRC Handbook (from memory)"),
        ("PTFE", 2.1, "CRC Handbook (from memory); common practice"),
        ("water", 80.1, "CRC Handbook (from memory), 20 degC"),
        ("vacuum", 1.0, "definition"),
    ],
)
def test_permittivity_table(name, value, source):
    entry = materials.dielectric(name)
    assert entry.eps_r == pytest.approx(value, rel=1e-6), source
    assert entry.source


def test_glass_range_is_the_common_practice_range():
    # common practice: glass 4-10 by type
    g = materials.dielectric("glass")
    assert (g.low, g.high) == (4.0, 10.0)
    assert g.low <= g.eps_r <= g.high


def test_unknown_medium_lists_known_names():
    with pytest.raises(ValueError, match="unknown medium 'unobtainium'.*known media: .*water"):
        materials.relative_permittivity("unobtainium")


def test_every_entry_names_its_source():
    for name in materials.known_media():
        d = materials.dielectric(name)
        assert d.source, name
        assert d.low <= d.eps_r <= d.high, name
