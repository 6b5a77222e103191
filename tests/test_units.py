"""Units: text with units becomes OpenMM MD units; bare numbers and wrong dimensions fail."""

import math

import pytest

from boost.exceptions import ProtocolError
from boost.units import MOLAR_GAS_CONSTANT, beta, energy_in, parse_quantity, thermal_energy

PLACE = "p.yaml: key"


@pytest.mark.parametrize("text, dimension, expected", [
    ("2 fs", "time", 0.002),
    ("1/ps", "rate", 1.0),
    ("300 K", "temperature", 300.0),
    ("26.85 degC", "temperature", 300.0),
    ("1 kcal/mol", "energy", 4.184),            # source: thermochemical calorie, 4.184 J exactly (common practice)
    ("180 deg", "angle", math.pi),
    ("1 kcal/mol/Å**2", "spring_length", 418.4),
    ("200 kJ/mol/rad**2", "spring_angle", 200.0),
    ("1 kJ/mol/deg**2", "spring_angle", (180 / math.pi) ** 2),
    ("0.15 molar", "concentration", 0.15),
    ("1 atm", "pressure", 1.01325),              # source: standard atmosphere = 101325 Pa (SI definition)
    ("2 GiB", "memory", 2 * 2**30),              # source: IEC binary prefixes, 1 GiB = 2**30 bytes
    ("1.5 GB", "memory", 1.5e9),                 # source: SI prefixes, 1 GB = 10**9 bytes
])
def test_parse_quantity_converts_to_md_units(text, dimension, expected):
    assert parse_quantity(text, dimension, place=PLACE) == pytest.approx(expected)


@pytest.mark.parametrize("value, dimension, message", [
    ("2", "time", "bare number"),
    (2, "time", "bare number"),
    ("2 nm", "time", "not a time"),
    ("200 kJ/mol", "spring_angle", "angle units"),
    ("60", "angle", "bare number"),
    ("5 kT", "energy", "kT depends on temperature"),
    ("fast", "time", "not a quantity"),
    (None, "time", "Got None"),
    (True, "time", "Got True"),
])
def test_parse_quantity_rejects_bad_text(value, dimension, message):
    with pytest.raises(ProtocolError, match=r"p\.yaml: key must be .*" + message):
        parse_quantity(value, dimension, place=PLACE)


def test_kt_at_300_kelvin():
    # source: R = 8.314462618 J/(mol K) (CODATA 2018); kT at 300 K = 2.4943 kJ/mol.
    assert MOLAR_GAS_CONSTANT * 300 == pytest.approx(2.4943, abs=1e-4)
    assert energy_in(1.0, "kcal/mol", 300) == pytest.approx(2.4943 / 4.184, abs=1e-4)
    assert energy_in(2.0, "kT", 300) == 2.0
    assert beta(300) * 2.4943387854 == pytest.approx(1.0)
    assert thermal_energy(300) == pytest.approx(2.4943387854, rel=1e-10)
