"""Electrostatic safety relations and checks: breakdown, corona onset, stored energy, ignition.

Pure functions and small records, SI units. :func:`assess` turns the peak
electrode fields and the isolated conductors of a design into a list of
:class:`Finding` records; the command line prints them and :data:`CAUTIONS`.

Corona electrodes (the wires of a wire-plate channel, a wire in a tube) are
meant to run above corona onset: for them :func:`assess` reports whether
corona starts (the surface field against Peek's onset field, an
informational finding) and checks the mean field across the gap against the
breakdown strength of air (sparkover). Other electrodes have their peak
surface or gap field checked against the breakdown strength.

These are engineering estimates. They do not replace a hazard assessment by a
competent person under the codes that apply where the equipment is used.
"""
import math
from dataclasses import asdict, dataclass
from typing import Optional

import numpy as np

from .aerosol import _array, _out
from .constants import EPSILON_0, ROOM_TEMPERATURE, STANDARD_PRESSURE

#: Capacitance of a person in the human-body model, F (ESD component test
#: standard, human-body model, from memory; 1.5 kOhm in series there).
HUMAN_BODY_CAPACITANCE = 100e-12
#: Dielectric strength of air at 20 degC and 1 atm for gaps of centimetres,
#: V/m (common practice; Paschen's law behind it).
AIR_BREAKDOWN_FIELD = 3.0e6
#: Peek's law for the corona onset field at the surface of a wire in a coaxial
#: (wire-cylinder) gap, E_c = m 3.1e6 delta (1 + 0.0308/sqrt(delta r)) V/m with
#: r in m (F. W. Peek, Dielectric Phenomena in High Voltage Engineering, 1929;
#: constants from memory: 31 kV/cm and 0.308 cm^0.5 in Peek's units).
PEEK_FIELD = 3.1e6
#: The radius term of Peek's law, m^0.5 (from memory, see :data:`PEEK_FIELD`).
PEEK_RADIUS_TERM = 0.0308
#: Default margin: a field above this fraction of breakdown is reported.
DEFAULT_MARGIN = 0.8
#: A person whose potential exceeds this is reported as charged, V. Chosen well
#: below the roughly 2-3 kV at which a person feels their own discharge (common
#: practice, from memory): a person at any such potential is not grounded.
PERSON_VOLTAGE_LIMIT = 100.0


def stored_energy(capacitance, voltage):
    """Energy stored on a capacitor, U = C V^2 / 2.

    Parameters
    ----------
    capacitance : float or array_like
        Capacitance, F (> 0).
    voltage : float or array_like
        Potential difference to ground, V.

    Returns
    -------
    float or ndarray
        Energy, J.
    """
    c = _array(capacitance, "capacitance")
    v = _array(voltage, "voltage", positive=False)
    return _out(0.5 * c * v * v)


def energy_from_charge(charge, capacitance):
    """Energy stored on a capacitor from its charge, U = Q^2/(2 C).

    Parameters
    ----------
    charge : float or array_like
        Charge, C.
    capacitance : float or array_like
        Capacitance, F (> 0).

    Returns
    -------
    float or ndarray
        Energy, J.
    """
    q = _array(charge, "charge", positive=False)
    c = _array(capacitance, "capacitance")
    return _out(q * q / (2.0 * c))


def charge_from_voltage(capacitance, voltage):
    """Charge on a capacitor, Q = C V.

    Parameters
    ----------
    capacitance : float or array_like
        Capacitance, F (> 0).
    voltage : float or array_like
        Potential, V.

    Returns
    -------
    float or ndarray
        Charge, C.
    """
    c = _array(capacitance, "capacitance")
    v = _array(voltage, "voltage", positive=False)
    return _out(c * v)


def sphere_capacitance(radius, eps_r=1.0):
    """Capacitance of an isolated sphere, C = 4 pi eps0 eps_r R.

    Parameters
    ----------
    radius : float or array_like
        Sphere radius, m (> 0).
    eps_r : float or array_like
        Relative permittivity of the surrounding medium, 1 (>= 1).

    Returns
    -------
    float or ndarray
        Capacitance, F (a 1 m sphere in vacuum: about 111 pF).
    """
    r = _array(radius, "radius")
    e = _eps(eps_r)
    return _out(4.0 * math.pi * EPSILON_0 * e * r)


def plate_capacitance(area, gap, eps_r=1.0):
    """Capacitance of a parallel-plate capacitor, C = eps0 eps_r A/d (edges neglected).

    Parameters
    ----------
    area : float or array_like
        Plate area, m^2 (> 0).
    gap : float or array_like
        Plate separation, m (> 0).
    eps_r : float or array_like
        Relative permittivity of the medium in the gap, 1 (>= 1).

    Returns
    -------
    float or ndarray
        Capacitance, F.
    """
    a = _array(area, "area")
    d = _array(gap, "gap")
    e = _eps(eps_r)
    return _out(EPSILON_0 * e * a / d)


def _eps(eps_r):
    e = _array(eps_r, "eps_r")
    if np.any(e < 1.0):
        raise ValueError(f"eps_r must be >= 1 (relative permittivity), got {eps_r!r}")
    return e


def relative_air_density(temperature=ROOM_TEMPERATURE, pressure=STANDARD_PRESSURE):
    """Gas density relative to 20 degC and 1 atm, delta = (p/p0)(T0/T) (ideal gas).

    The one density factor of the breakdown and corona-onset relations here.

    Parameters
    ----------
    temperature : float or array_like
        Gas temperature, K (> 0).
    pressure : float or array_like
        Gas pressure, Pa (> 0).

    Returns
    -------
    float or ndarray
        delta, 1.
    """
    t = _array(temperature, "temperature")
    p = _array(pressure, "pressure")
    return _out((p / STANDARD_PRESSURE) * (ROOM_TEMPERATURE / t))


def breakdown_field(temperature=ROOM_TEMPERATURE, pressure=STANDARD_PRESSURE):
    """Breakdown field of air, 3 MV/m at 20 degC and 1 atm scaled with gas density.

    E_b = 3 MV/m x delta, delta = (p/p0)(T0/T) (:func:`relative_air_density`):
    the breakdown field of a uniform gap scales about with the relative gas
    density (common practice; Paschen's law behind it). Sharp electrodes ionize
    at lower mean fields, and gaps far below a centimetre hold higher fields:
    use it as the order of the limit.

    Parameters
    ----------
    temperature : float or array_like
        Gas temperature, K (> 0).
    pressure : float or array_like
        Gas pressure, Pa (> 0).

    Returns
    -------
    float or ndarray
        Field, V/m.
    """
    return _out(AIR_BREAKDOWN_FIELD * np.asarray(relative_air_density(temperature, pressure)))


def corona_onset_field(wire_radius, temperature=ROOM_TEMPERATURE, pressure=STANDARD_PRESSURE, roughness=1.0):
    """Corona onset field at the surface of a wire, by Peek's law.

    E_c = m x 3.1 MV/m x delta x (1 + 0.0308 m^0.5/sqrt(delta r)) (F. W. Peek,
    Dielectric Phenomena in High Voltage Engineering, 1929; constants from
    memory), delta the relative air density of :func:`relative_air_density`.
    Peek referred delta to 25 degC and 76 cmHg; here it is referred to 20 degC
    and 1 atm like the breakdown field, which shifts E_c by under 2 %, well
    inside the scatter of the law. A wire whose surface field (without space
    charge) exceeds E_c goes into corona.

    Parameters
    ----------
    wire_radius : float or array_like
        Wire radius r, m (> 0).
    temperature : float or array_like
        Gas temperature, K (> 0).
    pressure : float or array_like
        Gas pressure, Pa (> 0).
    roughness : float
        Peek's surface factor m, 0 < m <= 1: 1 for a smooth, clean wire; about
        0.8-0.9 for weathered or stranded wires, lower for dirty or
        dust-coated ones (from memory). A rougher wire starts corona earlier.

    Returns
    -------
    float or ndarray
        Onset field, V/m (a 1.5 mm wire in air at 20 degC, 1 atm: about
        5.6 MV/m).
    """
    r = _array(wire_radius, "wire_radius")
    m = float(roughness)
    if not (0.0 < m <= 1.0):
        raise ValueError(f"roughness must be in (0, 1] (Peek's surface factor), got {roughness!r}")
    delta = np.asarray(relative_air_density(temperature, pressure))
    return _out(m * PEEK_FIELD * delta * (1.0 + PEEK_RADIUS_TERM / np.sqrt(delta * r)))


@dataclass(frozen=True)
class Atmosphere:
    """A flammable atmosphere and its minimum ignition energy.

    Attributes
    ----------
    name : str
        Lookup key (lower case).
    min_ignition_energy : float
        Lowest spark energy that ignites the most easily ignited mixture in
        air, J.
    kind : str
        "gas/vapour" or "dust".
    source : str
        Where the value comes from.
    """

    name: str
    min_ignition_energy: float
    kind: str
    source: str


_GUIDE = "electrostatic-hazard guidance standards, from memory"
_DUST = "dust-explosion guidance, from memory; dusts vary widely with fineness and moisture"

_ATMOSPHERES = {
    a.name: a
    for a in [
        Atmosphere("hydrogen", 0.017e-3, "gas/vapour", _GUIDE),
        Atmosphere("acetylene", 0.017e-3, "gas/vapour", _GUIDE),
        Atmosphere("carbon disulfide", 0.009e-3, "gas/vapour", _GUIDE),
        Atmosphere("ethylene", 0.07e-3, "gas/vapour", _GUIDE),
        Atmosphere("methanol", 0.14e-3, "gas/vapour", _GUIDE),
        Atmosphere("diethyl ether", 0.19e-3, "gas/vapour", _GUIDE),
        Atmosphere("propane", 0.25e-3, "gas/vapour", _GUIDE),
        Atmosphere("butane", 0.25e-3, "gas/vapour", _GUIDE),
        Atmosphere("hexane", 0.24e-3, "gas/vapour", _GUIDE),
        Atmosphere("heptane", 0.24e-3, "gas/vapour", _GUIDE),
        Atmosphere("toluene", 0.24e-3, "gas/vapour", _GUIDE),
        Atmosphere("ethanol", 0.23e-3, "gas/vapour", _GUIDE),
        Atmosphere("methane", 0.28e-3, "gas/vapour", _GUIDE),
        Atmosphere("acetone", 1.15e-3, "gas/vapour", _GUIDE),
        Atmosphere("aluminium dust", 10e-3, "dust", _DUST + " (fine powders ignite below 1 mJ)"),
        Atmosphere("coating powder", 5e-3, "dust", _DUST + " (organic coating powders, a few mJ and up)"),
        Atmosphere("wood dust", 30e-3, "dust", _DUST),
        Atmosphere("sugar dust", 30e-3, "dust", _DUST),
        Atmosphere("flour dust", 50e-3, "dust", _DUST),
        Atmosphere("coal dust", 60e-3, "dust", _DUST),
    ]
}


def atmospheres():
    """Names of the flammable atmospheres in the table, sorted."""
    return sorted(_ATMOSPHERES)


def atmosphere(name):
    """Look up a flammable atmosphere by name.

    Parameters
    ----------
    name : str
        Name, case-insensitive (for example ``"hydrogen"``, ``"Toluene"``).

    Returns
    -------
    Atmosphere

    Raises
    ------
    ValueError
        For an unknown name; the message lists the known names.
    """
    return _lookup(name)


def _lookup(name):
    key = " ".join(str(name).strip().lower().replace("_", " ").split())
    try:
        return _ATMOSPHERES[key]
    except KeyError:
        raise ValueError(f"unknown flammable atmosphere {name!r}; known: {', '.join(atmospheres())}") from None


def min_ignition_energy(name):
    """Minimum ignition energy of a named atmosphere, J (see :func:`atmosphere`)."""
    return atmosphere(name).min_ignition_energy


@dataclass(frozen=True)
class Finding:
    """One result of the safety checks.

    Attributes
    ----------
    kind : str
        Hazards: "breakdown" (a field at or above the breakdown field; for a
        corona electrode the mean field across its gap: sparkover),
        "breakdown_margin" (within the margin below it), "ignition" (stored
        energy at or above the minimum ignition energy), "person_charged"
        (a person at a potential). Information on corona electrodes:
        "corona_onset" (the wire's surface field reaches Peek's onset field:
        corona starts, as intended) and "no_corona" (below onset: the
        electrode does not charge particles).
    value : float
        The measured quantity, in ``units``.
    threshold : float
        The limit it was compared with, in ``units``.
    units : str
        SI unit of value and threshold ("V/m", "J", "V").
    message : str
        One sentence for the user.
    name : str
        The electrode, gap or conductor concerned.
    severity : str
        "hazard" (a safety finding) or "info" (how the design works; not a
        hazard by itself).
    """

    kind: str
    value: float
    threshold: float
    units: str
    message: str
    name: str = ""
    severity: str = "hazard"

    def to_dict(self):
        """The finding as a plain dict (for JSON output)."""
        return asdict(self)


#: Kinds of the informational findings (``severity == "info"``).
INFO_KINDS = ("corona_onset", "no_corona")


@dataclass(frozen=True)
class Conductor:
    """An isolated (ungrounded) conductor: a workpiece, a part, a can, a person.

    Give the capacitance, or a radius (isolated sphere), or a plate area and
    gap; a person without any of these is taken as the human-body model
    (100 pF). Give its voltage or its charge.

    Attributes
    ----------
    name : str
        What it is.
    capacitance : float, optional
        To ground, F.
    voltage : float, optional
        Potential, V.
    charge : float, optional
        Charge, C.
    radius : float, optional
        Sphere radius, m (capacitance of an isolated sphere).
    area, gap : float, optional
        Plate area, m^2, and gap to ground, m (parallel-plate capacitance).
    eps_r : float
        Relative permittivity around it (or in the gap), 1.
    person : bool
        True for a person.
    """

    name: str
    capacitance: Optional[float] = None
    voltage: Optional[float] = None
    charge: Optional[float] = None
    radius: Optional[float] = None
    area: Optional[float] = None
    gap: Optional[float] = None
    eps_r: float = 1.0
    person: bool = False

    def resolved_capacitance(self):
        """Capacitance to ground, F, from whichever description was given."""
        if self.capacitance is not None:
            return float(_array(self.capacitance, f"capacitance of {self.name!r}"))
        if self.radius is not None:
            return float(sphere_capacitance(self.radius, self.eps_r))
        if self.area is not None or self.gap is not None:
            if self.area is None or self.gap is None:
                raise ValueError(f"conductor {self.name!r}: a plate needs both area and gap")
            return float(plate_capacitance(self.area, self.gap, self.eps_r))
        if self.person:
            return HUMAN_BODY_CAPACITANCE
        raise ValueError(f"conductor {self.name!r}: give capacitance, radius, or area and gap")

    def resolved_voltage(self):
        """Potential, V, given or from V = Q/C."""
        if self.voltage is not None and self.charge is not None:
            raise ValueError(f"conductor {self.name!r}: give voltage or charge, not both")
        if self.voltage is not None:
            return float(_array(self.voltage, f"voltage of {self.name!r}", positive=False))
        if self.charge is not None:
            q = float(_array(self.charge, f"charge of {self.name!r}", positive=False))
            return q / self.resolved_capacitance()
        raise ValueError(f"conductor {self.name!r}: give its voltage or its charge")


def _as_conductor(item, index):
    if isinstance(item, Conductor):
        return item
    if isinstance(item, dict):
        try:
            return Conductor(**item)
        except TypeError as exc:
            raise ValueError(f"conductors[{index}]: {exc}") from None
    raise ValueError(f"conductors[{index}] must be a Conductor or a dict, got {type(item).__name__}")


def _optional(value, what):
    if value is None:
        return None
    v = float(value)
    if not math.isfinite(v) or v <= 0:
        raise ValueError(f"{what} must be finite and > 0, got {value!r}")
    return v


def _as_field(item, index):
    """(name, peak field, gap field or None, corona wire radius or None) of one field item.

    Accepts a (name, V/m) pair, a dict with "name", "peak_field" and optionally
    "gap_field" (V/m) and "corona_wire_radius" (m), or a field source: an object
    with ``name``, ``peak_field()`` and optionally ``gap_field()`` and
    ``corona_wire_radius`` (see :class:`chargesim.sources.FieldSource`).
    """
    if hasattr(item, "peak_field"):
        name = str(getattr(item, "name", f"source {index}"))
        gap = item.gap_field() if callable(getattr(item, "gap_field", None)) else None
        wire = getattr(item, "corona_wire_radius", None)
        peak = float(item.peak_field())
    elif isinstance(item, dict):
        name = str(item.get("name", f"field {index}"))
        try:
            peak = float(item["peak_field"])
        except KeyError:
            raise ValueError(f"fields[{index}] ({name!r}): a dict needs 'peak_field' (V/m)") from None
        gap, wire = item.get("gap_field"), item.get("corona_wire_radius")
    else:
        try:
            name, value = item
        except (TypeError, ValueError):
            raise ValueError(f"fields[{index}] must be (name, peak field in V/m), a dict or a field source") from None
        name, peak, gap, wire = str(name), float(value), None, None
    if not math.isfinite(peak):
        raise ValueError(f"fields[{index}] ({name!r}): peak field must be finite, got {peak!r}")
    if gap is not None:
        gap = float(gap)
        if not math.isfinite(gap):
            raise ValueError(f"fields[{index}] ({name!r}): gap field must be finite, got {gap!r}")
        gap = abs(gap)
    wire = _optional(wire, f"fields[{index}] ({name!r}): corona_wire_radius")
    if wire is not None and gap is None:
        raise ValueError(f"fields[{index}] ({name!r}): a corona electrode needs its gap field (mean field across "
                         "the gap, V/m) for the sparkover check")
    return name, abs(peak), gap, wire


def _breakdown(name, e, eb, m, where, conditions, expect="corona or sparkover", note=""):
    """A "breakdown" or "breakdown_margin" finding for a field e against eb (V/m), or None."""
    if e >= eb:
        return Finding("breakdown", e, eb, "V/m",
                       f"{name}: {where} {e / 1e6:.3g} MV/m reaches the breakdown field of air "
                       f"({eb / 1e6:.3g} MV/m at {conditions}): expect {expect}{note}", name)
    if e >= m * eb:
        return Finding("breakdown_margin", e, m * eb, "V/m",
                       f"{name}: {where} {e / 1e6:.3g} MV/m is within the margin "
                       f"({m:.0%} of {eb / 1e6:.3g} MV/m) of the breakdown field of air" + note, name)
    return None


def assess(
    fields=(),
    conductors=(),
    atmosphere=None,
    temperature=ROOM_TEMPERATURE,
    pressure=STANDARD_PRESSURE,
    margin=DEFAULT_MARGIN,
    person_voltage_limit=PERSON_VOLTAGE_LIMIT,
    min_ignition_energy=None,
    corona_roughness=1.0,
):
    """Safety findings of a design: fields against breakdown, conductors against ignition.

    A field item with a corona wire radius is a corona electrode: its surface
    field is compared with the corona onset field (:func:`corona_onset_field`;
    a "corona_onset" or "no_corona" finding of severity "info", never a
    hazard), and its mean gap field with the breakdown field (a "breakdown" or
    "breakdown_margin" finding: sparkover). Any other item has its peak field
    compared with the breakdown field.

    Parameters
    ----------
    fields : sequence
        Peak fields at electrode surfaces or across gaps: (name, V/m) pairs,
        dicts with "name" and "peak_field" (and, for a corona electrode,
        "gap_field" in V/m and "corona_wire_radius" in m), or applied field
        sources (objects with ``name``, ``peak_field()`` and optionally
        ``gap_field()`` and ``corona_wire_radius``).
    conductors : sequence of Conductor or dict
        Isolated conductors (workpieces, parts, people) with their potentials
        or charges.
    atmosphere : str, optional
        Flammable atmosphere present (see :func:`atmospheres`); None: no
        ignition check.
    temperature : float
        Gas temperature, K.
    pressure : float
        Gas pressure, Pa.
    margin : float
        Fraction of the breakdown field above which a field is reported,
        0 < margin <= 1.
    person_voltage_limit : float
        A person above this potential magnitude is reported, V.
    min_ignition_energy : float, optional
        A minimum ignition energy given directly, J (> 0), for an atmosphere
        not in the table; not together with ``atmosphere``.
    corona_roughness : float
        Peek's surface factor of the corona wires, 0 < m <= 1 (see
        :func:`corona_onset_field`).

    Returns
    -------
    list of Finding
        Empty when nothing was found.
    """
    m = float(margin)
    if not (0.0 < m <= 1.0):
        raise ValueError(f"margin must be in (0, 1], got {margin!r}")
    eb = float(breakdown_field(temperature, pressure))
    if min_ignition_energy is not None:
        if atmosphere is not None:
            raise ValueError("give atmosphere or min_ignition_energy, not both")
        mie = Atmosphere("the given atmosphere", float(_array(min_ignition_energy, "min_ignition_energy")),
                         "given", "given by the user")
    else:
        mie = None if atmosphere is None else _lookup(atmosphere)
    conditions = f"{float(temperature):.1f} K, {float(pressure) / 1e3:.1f} kPa"
    out = []
    for i, item in enumerate(fields):
        name, e, gap, wire = _as_field(item, i)
        if wire is None:
            found = _breakdown(name, e, eb, m, "peak field", conditions)
            if found is not None:
                out.append(found)
            continue
        onset = float(corona_onset_field(wire, temperature, pressure, corona_roughness))
        peek = f"Peek's law for a {wire * 1e3:.3g} mm wire at {conditions}"
        if e >= onset:
            out.append(Finding("corona_onset", e, onset, "V/m",
                               f"{name}: surface field {e / 1e6:.3g} MV/m is above the corona onset field "
                               f"{onset / 1e6:.3g} MV/m ({peek}): corona starts and its ions charge the "
                               "particles (intended for a discharge electrode)", name, "info"))
        else:
            out.append(Finding("no_corona", e, onset, "V/m",
                               f"{name}: no corona: surface field {e / 1e6:.3g} MV/m is below the corona onset "
                               f"field {onset / 1e6:.3g} MV/m ({peek}): particles will not be charged by this "
                               "electrode (raise the voltage or use a thinner wire)", name, "info"))
        found = _breakdown(name, gap, eb, m, "mean field across the gap (voltage over wire-to-ground distance)",
                           conditions, "sparkover across the gap", "; a corona gap can spark over at lower mean fields (space charge, "
                           "streamers): treat this as an upper limit")
        if found is not None:
            out.append(found)
    for i, item in enumerate(conductors):
        c = _as_conductor(item, i)
        cap = c.resolved_capacitance()
        v = c.resolved_voltage()
        u = float(stored_energy(cap, v))
        what = "person" if c.person else "isolated conductor"
        if c.person and abs(v) > person_voltage_limit:
            out.append(Finding("person_charged", abs(v), float(person_voltage_limit), "V",
                               f"{c.name}: a person at {v / 1e3:.3g} kV ({u * 1e3:.3g} mJ on {cap * 1e12:.3g} pF) "
                               "is not grounded: ground people (conductive footwear and floor)", c.name))
        if mie is not None and u >= mie.min_ignition_energy:
            out.append(Finding("ignition", u, mie.min_ignition_energy, "J",
                               f"{c.name}: {what} at {v / 1e3:.3g} kV stores {u * 1e3:.3g} mJ, at or above the "
                               f"minimum ignition energy of {mie.name} ({mie.min_ignition_energy * 1e3:.3g} mJ, "
                               f"{mie.source}): a spark from it can ignite the atmosphere; ground it", c.name))
    return out


#: The usual cautions, printed at the end of the safety checks.
CAUTIONS = """\
Cautions
- High voltage: the electrodes of precipitators and coating equipment carry
  tens of kilovolts and can deliver dangerous shocks. Work on them only
  de-energized, discharged and earthed, under the site's lock-out procedure.
- Grounding: workpieces, hangers, conveyors, containers, spray equipment and
  people in the area must be grounded; an ungrounded conductor charges up and
  sparks. Check that grounding paths stay clean (coating build-up insulates).
- Flammable atmospheres: solvent vapours and combustible dusts can be ignited
  by sparks far weaker than a shock a person notices (hydrogen below 0.02 mJ,
  many solvents about 0.2-0.3 mJ). Keep ventilation, interlocks and
  explosion protection as the applicable rules require.
- These results are engineering estimates from an idealized simulation:
  geometry, corona, surface contamination, humidity and ageing change real
  fields and charges, and tabulated ignition energies and breakdown fields are
  representative values, not guarantees. A clean check is not proof of safety.
- Defer to local codes, the equipment maker's instructions and licensed,
  competent practice for design, installation and operation.
"""
