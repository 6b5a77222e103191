"""Quantities with units: the one place where text becomes numbers.

Protocol values carry units as text ("300 K", "2 fs", "200 kJ/mol/rad**2"). They are
parsed with pint and converted once to OpenMM's MD units: nm, ps, K, kJ/mol, radians,
amu, bar, mol/L. Angles are dimensionless to pint, so their presence is checked from the
unit names: a spring on a dihedral must say ``/rad**2`` (or ``/deg**2``), and an angle
must say ``deg`` or ``rad``.

Energies become reduced (dimensionless, in kT) only through :func:`reduced`.
"""

import math
import re
import reprlib

import numpy as np
import pint

from .exceptions import ProtocolError

REGISTRY = pint.UnitRegistry(on_redefinition="ignore")
Q_ = REGISTRY.Quantity

#: Boltzmann constant times Avogadro's number, kJ/mol/K (CODATA 2018, exact by definition
#: of the SI since 2019; common practice, same value as openmm.unit.MOLAR_GAS_CONSTANT_R).
MOLAR_GAS_CONSTANT = 8.314462618e-3

_ANGLE_UNITS = {"radian", "degree", "turn", "arcminute", "arcsecond", "grade", "milliradian"}

# Each dimension boost reads: the pint unit it converts to (OpenMM's MD unit), the power
# of angle it must carry, an example for error messages.
DIMENSIONS = {
    "length": ("nm", 0, "a length", "0.5 nm"),
    "time": ("ps", 0, "a time", "2 fs"),
    "rate": ("1/ps", 0, "a rate", "1/ps"),
    "temperature": ("K", 0, "a temperature", "300 K"),
    "energy": ("kJ/mol", 0, "an energy", "5 kJ/mol"),
    "angle": ("rad", 1, "an angle", "60 deg"),
    "mass": ("g/mol", 0, "a mass", "12 amu"),
    "pressure": ("bar", 0, "a pressure", "1 bar"),
    "concentration": ("mol/L", 0, "a concentration", "0.15 molar"),
    "spring_length": ("kJ/mol/nm**2", 0, "an energy per length squared", "1000 kJ/mol/nm**2"),
    "spring_angle": ("kJ/mol/rad**2", -2, "an energy per angle squared", "200 kJ/mol/rad**2"),
    "memory": ("byte", 0, "an amount of memory", "2 GiB"),
}

_NUMBER = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")
# A numeric literal that is not part of a name; whole ones become floats before pint sees
# them, so "10**10**10" overflows at once instead of building a huge integer.
_LITERAL = re.compile(r"(?<![\w.])(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?(?![\w.])")
_MAX_TEXT = 200  # characters; pint's parser is slow on long texts and none is that long
REGISTRY.define("amu = g/mol")  # per particle in OpenMM's sense: molar mass in g/mol


class _Brief(reprlib.Repr):
    """repr() cut short: bounded work on huge, deep or self-referencing values."""

    def __init__(self):
        super().__init__()
        self.maxlevel, self.maxstring, self.maxother, self.maxlong = 3, 60, 60, 60
        self.maxlist = self.maxtuple = self.maxdict = self.maxset = self.maxfrozenset = 6

    def repr_int(self, x, level):
        if x.bit_length() > 192:  # repr() refuses ints beyond 4300 digits; a sketch will do
            return f"<a whole number of about {int(x.bit_length() * math.log10(2)) + 1} digits>"
        return repr(x)


_BRIEF = _Brief()


def show_value(value):
    """A short one-line repr of any YAML value, for error messages."""
    text = _BRIEF.repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def _angle_power(quantity):
    return sum(power for name, power in quantity._units.items() if name in _ANGLE_UNITS)


def _parse(text):
    text = _LITERAL.sub(lambda m: m.group() + ".0" if m.group().isdigit() else m.group(), text)
    match = _NUMBER.match(text)
    if match and match.group(2) and not match.group(2).startswith(("/", "*")):
        return Q_(float(match.group(1)), match.group(2))
    return Q_(text)


def parse_quantity(value, dimension, *, place):
    """Convert text with a unit to a float in OpenMM's MD unit for ``dimension``.

    Parameters
    ----------
    value : str
        The text from the protocol, e.g. ``"2 fs"``.
    dimension : str
        A key of :data:`DIMENSIONS`.
    place : str
        ``file: key.path`` for the error message.

    Returns
    -------
    float
        The value in the MD unit of ``dimension`` (nm, ps, 1/ps, K, kJ/mol, rad, amu,
        bar, mol/L, kJ/mol/nm**2, kJ/mol/rad**2).
    """
    target, angle_power, kind, example = DIMENSIONS[dimension]
    expected = f"{place} must be {kind} with its unit, such as '{example}'."
    if isinstance(value, bool) or not isinstance(value, (str, int, float)):
        raise ProtocolError(f"{expected} Got {show_value(value)} instead.")
    if not isinstance(value, str):
        raise ProtocolError(f"{expected} Got '{show_value(value)}', a bare number without a unit.")
    text, shown = value, show_value(value)
    if len(text) > _MAX_TEXT:
        raise ProtocolError(f"{expected} Got {shown}, which is too long for a quantity.")
    if re.search(r"\bkT\b", text):
        raise ProtocolError(f"{expected} Got {shown}: kT depends on temperature; give kJ/mol or kcal/mol.")
    try:
        quantity = _parse(text)
    except Exception:  # pint raises many types for bad text
        raise ProtocolError(f"{expected} Got {shown}, which is not a quantity pint can read.") from None
    if not isinstance(quantity, pint.Quantity) or not quantity._units:
        raise ProtocolError(f"{expected} Got {shown}, a bare number without a unit.")
    if _angle_power(quantity) != angle_power:
        raise ProtocolError(f"{expected} Got {shown}, which has the wrong angle units.")
    try:
        number = float(quantity.to(target).magnitude)
    except (pint.DimensionalityError, pint.OffsetUnitCalculusError):
        raise ProtocolError(f"{expected} Got {shown}, which is not {kind}.") from None
    except (TypeError, ArithmeticError):  # a complex magnitude, as from '(-1)**0.5 K'
        raise ProtocolError(f"{expected} Got {shown}, which is not a finite real number.") from None
    if not math.isfinite(number):
        raise ProtocolError(f"{expected} Got {shown}, which is not finite.")
    return number


#: The unit :func:`format_quantity` writes each dimension in (OpenMM's MD unit, but angles in deg).
_WRITTEN_UNITS = {"length": "nm", "time": "ps", "rate": "/ps", "temperature": "K", "energy": "kJ/mol",
                  "angle": "deg", "mass": "amu", "pressure": "bar", "concentration": "molar",
                  "spring_length": "kJ/mol/nm**2", "spring_angle": "kJ/mol/rad**2", "memory": "byte"}
_BINARY_PREFIXES = (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10))


def format_number(number):
    """The shortest text of a float that reads back to it; whole numbers without '.0'."""
    number = float(number)
    return str(int(number)) if number.is_integer() and abs(number) < 2**53 else repr(number)


def format_quantity(value, dimension):
    """Text with a unit that :func:`parse_quantity` reads back to exactly ``value``.

    Parameters
    ----------
    value : float
        In the MD unit of ``dimension`` (see :func:`parse_quantity`).
    dimension : str
        A key of :data:`DIMENSIONS`.

    Returns
    -------
    str
        E.g. ``"300 K"``, ``"0.002 ps"``, ``"-80 deg"`` (the shortest decimal number of
        degrees that converts back to the same radians; ``"... rad"`` when none does),
        ``"1 GiB"`` (memory in the largest binary unit it is a whole multiple of).
    """
    value = float(value)
    for number, unit in _written_forms(value, dimension):
        text = f"{format_number(number)}{'' if unit.startswith('/') else ' '}{unit}"
        if parse_quantity(text, dimension, place="") == value:
            return text
    return f"{format_number(value)} {DIMENSIONS[dimension][0]}"    # the MD unit itself: exact


def _written_forms(value, dimension):
    if dimension == "angle":
        degrees = math.degrees(value)
        return [(float(f"{degrees:.{digits}g}"), "deg") for digits in range(1, 18)]
    if dimension == "memory":
        return [(value / size, unit) for unit, size in _BINARY_PREFIXES if value % size == 0] + [(value, "byte")]
    return [(value, _WRITTEN_UNITS[dimension])]


def coordinate_unit_shown(is_angle):
    """The unit a coordinate is shown in: degrees for angles (radians inside boost), else nm."""
    return "deg" if is_angle else "nm"


def coordinate_shown(values, is_angle):
    """Coordinate values (numbers or arrays, rad or nm) in the unit of coordinate_unit_shown."""
    return np.degrees(values) if is_angle else values


def format_coordinate(value, is_angle):
    """One coordinate value as text with its unit, e.g. ``"-62.5 deg"`` or ``"0.1234 nm"``."""
    return f"{math.degrees(value):.1f} deg" if is_angle else f"{value:.4g} nm"


def thermal_energy(temperature):
    """kT in kJ/mol for a temperature in K."""
    return MOLAR_GAS_CONSTANT * temperature


def beta(temperature):
    """Inverse thermal energy 1/kT in mol/kJ for a temperature in K."""
    return 1.0 / thermal_energy(temperature)


def reduced(energy, temperature):
    """Energy in kJ/mol at ``temperature`` (K) as a reduced, dimensionless energy (kT)."""
    return energy * beta(temperature)


ENERGY_UNITS = {"kJ/mol": 1.0, "kcal/mol": 1.0 / 4.184}


def energy_in(value_kt, unit, temperature):
    """Convert a reduced energy (kT at ``temperature`` K) to ``unit``: 'kT', 'kJ/mol', 'kcal/mol'."""
    if unit == "kT":
        return value_kt
    return value_kt / beta(temperature) * ENERGY_UNITS[unit]
