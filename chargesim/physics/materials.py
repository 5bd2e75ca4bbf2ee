"""Relative permittivity of common media, looked up by name.

Each value names its source. Values from a handbook quoted from memory are
marked so; a range of types (glass) gives a representative value and the range.
"""
from dataclasses import dataclass


@dataclass(frozen=True)
class Dielectric:
    """A medium and its static relative permittivity.

    Attributes
    ----------
    name : str
        Lookup key (lower case).
    eps_r : float
        Relative permittivity (static, room temperature unless stated), 1.
    low, high : float
        Range over the types the name covers, 1 (equal to eps_r for one type).
    source : str
        Where the value comes from.
    """

    name: str
    eps_r: float
    low: float
    high: float
    source: str


_CRC = "CRC Handbook of Chemistry and Physics (from memory)"
_PRACTICE = "common practice"

_TABLE = {
    d.name: d
    for d in [
        Dielectric("vacuum", 1.0, 1.0, 1.0, "definition"),
        Dielectric("dry air", 1.00059, 1.00059, 1.00059, _CRC + "; 0 degC, 1 atm"),
        Dielectric("air", 1.00059, 1.00059, 1.00059, _CRC + "; dry, 0 degC, 1 atm"),
        Dielectric("nitrogen", 1.00055, 1.00055, 1.00055, _CRC + "; 20 degC, 1 atm"),
        Dielectric("carbon dioxide", 1.00092, 1.00092, 1.00092, _CRC + "; 20 degC, 1 atm"),
        Dielectric("ptfe", 2.1, 2.0, 2.1, _CRC + "; also " + _PRACTICE),
        Dielectric("polyethylene", 2.25, 2.2, 2.4, _CRC),
        Dielectric("polypropylene", 2.2, 2.2, 2.3, _CRC),
        Dielectric("polystyrene", 2.6, 2.4, 2.7, _CRC),
        Dielectric("pvc", 3.2, 2.9, 3.4, _CRC),
        Dielectric("epoxy", 3.6, 3.0, 4.5, _PRACTICE + " (cured resins vary)"),
        Dielectric("paper", 2.5, 1.5, 3.5, _PRACTICE + " (dry)"),
        Dielectric("glass", 6.0, 4.0, 10.0, _PRACTICE + "; 4-10 by type"),
        Dielectric("fused silica", 3.8, 3.75, 3.85, _CRC),
        Dielectric("alumina", 9.8, 9.0, 10.0, _CRC + "; sintered"),
        Dielectric("mica", 6.0, 5.4, 7.0, _CRC),
        Dielectric("mineral oil", 2.2, 2.1, 2.4, _CRC + "; transformer grade"),
        Dielectric("ethanol", 24.5, 24.3, 25.3, _CRC + "; 25 degC"),
        Dielectric("water", 80.1, 80.1, 80.1, _CRC + "; 20 degC"),
    ]
}


def dielectric(name):
    """Look up a medium by name.

    Parameters
    ----------
    name : str
        Medium name, case-insensitive (for example ``"PTFE"``, ``"water"``).

    Returns
    -------
    Dielectric
        The table entry with eps_r (1) and its source.

    Raises
    ------
    ValueError
        For an unknown name; the message lists the known names.
    """
    key = str(name).strip().lower()
    try:
        return _TABLE[key]
    except KeyError:
        known = ", ".join(sorted(_TABLE))
        raise ValueError(f"unknown medium {name!r} for relative permittivity; known media: {known}") from None


def relative_permittivity(name):
    """Relative permittivity of a named medium, 1 (see :func:`dielectric`)."""
    return dielectric(name).eps_r


def known_media():
    """Names of all media in the table, sorted."""
    return sorted(_TABLE)
