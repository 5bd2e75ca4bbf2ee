"""Unit strings at the scenario boundary: one shared pint registry.

A quantity in a scenario file is a plain number (SI) or a string of a number
and a unit ("30 kV", "2.5 um", "20 degC"). :func:`to_si` converts either to a
float in the SI unit of the key, and says which dimension was expected when the
unit does not fit. Offset units (degC, degF) are handled by splitting the
number from the unit before pint sees them: pint refuses ``20 * degC`` as an
ambiguous product, but ``Quantity(20, "degC")`` is an absolute temperature.
"""
import math
import re

import pint

#: The one registry of the package (pint quantities from different registries
#: do not mix, so nothing else creates one).
UREG = pint.UnitRegistry()

# a number at the start of the string; the rest is the unit expression
_NUMBER = re.compile(r"^\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*(.*?)\s*$")

#: Human names of the dimensions the scenario vocabulary uses, by SI unit.
DIMENSION_NAMES = {
    "1": "dimensionless number",
    "m": "length",
    "m^2": "area",
    "m^3": "volume",
    "s": "time",
    "1/s": "rate",
    "kg": "mass",
    "K": "temperature",
    "Pa": "pressure",
    "Pa*s": "dynamic viscosity",
    "m/s": "velocity",
    "m/s^2": "acceleration",
    "kg/m^3": "density (mass per volume)",
    "1/m^3": "number density",
    "m^3/s": "volume flow",
    "m^2/s": "diffusivity",
    "kg/s": "mass flow",
    "V": "voltage",
    "V/m": "electric field",
    "C": "charge",
    "C/kg": "charge-to-mass ratio",
    "C/m^3": "charge density",
    "F": "capacitance",
    "J": "energy",
    "N/m": "surface tension",
    "m^2/(V*s)": "mobility",
    "A": "current",
}


def dimension_name(si_unit):
    """The human name of the dimension of ``si_unit`` (for messages)."""
    return DIMENSION_NAMES.get(si_unit, f"quantity in {si_unit}")


def _example(si_unit):
    return {
        "m": '"2.5 um", "150 mm"', "V": '"30 kV"', "V/m": '"400 kV/m"', "m/s": '"1.2 m/s"',
        "K": '"20 degC", "293.15 K"', "s": '"2 ms"', "Pa": '"1 atm", "101.3 kPa"',
        "kg/m^3": '"1000 kg/m^3"', "C": '"5 fC"', "F": '"100 pF"', "J": '"0.25 mJ"',
    }.get(si_unit, f'"<number> {si_unit}"')


def to_si(value, si_unit):
    """Convert a scenario value to a float in ``si_unit``.

    Parameters
    ----------
    value : int, float or str
        A plain number (taken as SI) or ``"<number> <unit>"``.
    si_unit : str
        The SI unit of the key, one of :data:`DIMENSION_NAMES` (``"1"`` for a
        dimensionless number).

    Returns
    -------
    float
        The value in ``si_unit``; finite.

    Raises
    ------
    ValueError
        With the reason (wrong dimension, unknown unit, not a number, not
        finite); the caller adds the file and key path.
    """
    if isinstance(value, bool):
        raise ValueError(f"expected a {dimension_name(si_unit)}, got a boolean")
    if isinstance(value, (int, float)):
        out = float(value)
    elif isinstance(value, str):
        out = _parse(value, si_unit)
    else:
        raise ValueError(
            f"expected a {dimension_name(si_unit)} (a number in {si_unit} or a string like {_example(si_unit)}), "
            f"got a {type(value).__name__}"
        )
    if not math.isfinite(out):
        raise ValueError("NaN and infinite values are not allowed")
    return out


def _parse(text, si_unit):
    m = _NUMBER.match(text)
    if m is None:
        raise ValueError(
            f"expected a {dimension_name(si_unit)} written as a number and a unit (e.g. {_example(si_unit)})"
        )
    number, unit = float(m.group(1)), m.group(2)
    if si_unit == "1" and unit in ("", "%", "percent"):
        return number / 100.0 if unit else number
    if unit == "":
        return number  # a bare number inside a string: SI, like a plain number
    try:
        q = UREG.Quantity(number, unit)
        target = UREG.Unit("dimensionless" if si_unit == "1" else si_unit)
    except Exception as exc:  # pint raises several types for a bad unit string
        raise ValueError(f"unknown unit {unit!r} ({type(exc).__name__})") from None
    if q.dimensionality != target.dimensionality:
        raise ValueError(
            f"expected a {dimension_name(si_unit)} (convertible to {si_unit}), "
            f"but {unit!r} has dimension {q.dimensionality}"
        )
    try:
        return float(q.to(target).magnitude)
    except Exception as exc:  # offset-unit corner cases
        raise ValueError(f"cannot convert {text!r} to {si_unit} ({exc})") from None
