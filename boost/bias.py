"""Bias potentials w(ξ) on coordinates: harmonic umbrellas and flat-bottom restraints.

Each bias exists as one OpenMM ``CustomCVForce`` (whatever the coordinate, including
combinations) and as a numpy function of coordinate values; the two use the same
formula, so the reduced potentials of bias windows can be computed from coordinate
values without touching OpenMM. All energies are in kJ/mol, values in nm or rad, spring
constants in kJ/mol/nm² or kJ/mol/rad².

Umbrella
    w = ½ k d², d = ξ − ξ₀; for a periodic coordinate (a dihedral) d is wrapped into
    [−π, π) by d − 2π⌊(d + π)/2π⌋, which keeps w continuous across ±π. The centre ξ₀
    and spring k are OpenMM global parameters (:func:`centre_parameter`,
    :func:`spring_parameter`), so changing a window only calls ``Context.setParameter``.
Flat bottom
    w = ½ k [max(0, ξ − upper)² + max(0, lower − ξ)²], zero inside [lower, upper];
    either bound may be absent. The constants are written into the expression.

The force group is left alone: the engine sets it.
"""

import math

import numpy as np
import openmm

from .coordinates import coordinate_expression
from .exceptions import ProtocolError

_PI = repr(math.pi)
_TWO_PI = repr(2.0 * math.pi)


def centre_parameter(name):
    """OpenMM global parameter holding the umbrella centre on the coordinate ``name``."""
    return f"centre_{name}"


def spring_parameter(name):
    """OpenMM global parameter holding the umbrella spring constant on the coordinate ``name``."""
    return f"spring_{name}"


def _literal(number):
    return f"({float(number)!r})"


def _cv_force(coordinate, system, energy):
    """A CustomCVForce with ``energy`` written in the variable ``value`` (the coordinate)."""
    expression, variables = coordinate_expression(coordinate, system, f"cv_{coordinate.name}")
    force = openmm.CustomCVForce(f"{energy}; value = {expression}")
    for name, leaf in variables:
        force.addCollectiveVariable(name, leaf)
    return force


def _check_spring(coordinate, spring):
    if not (math.isfinite(spring) and spring >= 0.0):
        raise ProtocolError(f"coordinate {coordinate.name!r}: the spring constant must be finite "
                            f"and not negative; got {spring!r}.")


def build_umbrella_force(coordinate, system, *, centre, spring):
    """A harmonic umbrella on a coordinate, as one OpenMM force.

    Parameters
    ----------
    coordinate : boost.coordinates.Coordinate
    system : openmm.System
        Supplies masses and periodicity for the coordinate's forces; not modified.
    centre : float, in nm or rad
        Default value of the global parameter ``centre_parameter(coordinate.name)``.
    spring : float, in kJ/mol/nm² or kJ/mol/rad²
        Default value of the global parameter ``spring_parameter(coordinate.name)``.

    Returns
    -------
    openmm.CustomCVForce
        Energy ½ k d² in kJ/mol, d wrapped into [−π, π) when the coordinate is periodic.
    """
    _check_spring(coordinate, float(spring))
    centre_name = centre_parameter(coordinate.name)
    spring_name = spring_parameter(coordinate.name)
    if coordinate.periodic:
        energy = (f"0.5*{spring_name}*d^2; d = dw - {_TWO_PI}*floor((dw + {_PI})/{_TWO_PI}); "
                  f"dw = value - {centre_name}")
    else:
        energy = f"0.5*{spring_name}*d^2; d = value - {centre_name}"
    force = _cv_force(coordinate, system, energy)
    force.addGlobalParameter(centre_name, float(centre))
    force.addGlobalParameter(spring_name, float(spring))
    force.setName(f"umbrella on {coordinate.name}")
    return force


def _check_bounds(coordinate, lower, upper):
    if lower is None and upper is None:
        raise ProtocolError(f"coordinate {coordinate.name!r}: a flat-bottom restraint needs a lower bound, "
                            "an upper bound or both; got neither.")
    if lower is not None and upper is not None and lower > upper:
        raise ProtocolError(f"coordinate {coordinate.name!r}: the flat-bottom restraint's lower bound must not "
                            f"exceed its upper bound; got lower={lower!r}, upper={upper!r}.")
    if coordinate.periodic:
        # On a circle a flat-bottom restraint on the value in (-π, π] would jump at ±π.
        raise ProtocolError(f"coordinate {coordinate.name!r}: flat-bottom restraints on a periodic "
                            "coordinate (a dihedral) are not supported; use an umbrella instead.")


def build_flat_bottom_force(coordinate, system, *, lower=None, upper=None, spring):
    """A flat-bottom restraint on a coordinate, as one OpenMM force.

    Parameters
    ----------
    coordinate : boost.coordinates.Coordinate
        Not periodic (a flat bottom on a dihedral would be discontinuous at ±π).
    system : openmm.System
    lower, upper : float or None, in nm or rad
        Bounds of the flat region; at least one must be given.
    spring : float, in kJ/mol/nm² or kJ/mol/rad²

    Returns
    -------
    openmm.CustomCVForce
        Energy ½ k (excess)² in kJ/mol outside [lower, upper], 0 inside; the constants
        are part of the expression, so the force has no global parameters.
    """
    _check_spring(coordinate, float(spring))
    _check_bounds(coordinate, lower, upper)
    excesses = []
    if upper is not None:
        excesses.append(f"max(0, value - {_literal(upper)})^2")
    if lower is not None:
        excesses.append(f"max(0, {_literal(lower)} - value)^2")
    energy = f"0.5*{_literal(spring)}*({' + '.join(excesses)})"
    force = _cv_force(coordinate, system, energy)
    force.setName(f"flat bottom on {coordinate.name}")
    return force


def compute_umbrella_energy(values, *, centre, spring, periodic):
    """Umbrella energy for coordinate values, the formula of :func:`build_umbrella_force`.

    Parameters
    ----------
    values : ndarray, shape (n_samples,) or any shape, in nm or rad
    centre : float or ndarray broadcastable with values, in nm or rad
    spring : float or ndarray broadcastable with values, in kJ/mol/nm² or kJ/mol/rad²
    periodic : bool
        Wrap d = value − centre into [−π, π) first (dihedrals).

    Returns
    -------
    ndarray, the broadcast shape of the inputs, in kJ/mol
    """
    d = np.asarray(values, dtype=float) - centre
    if periodic:
        d = d - 2.0 * math.pi * np.floor((d + math.pi) / (2.0 * math.pi))
    return 0.5 * spring * d**2


def compute_flat_bottom_energy(values, *, lower, upper, spring):
    """Flat-bottom restraint energy for coordinate values, the formula of :func:`build_flat_bottom_force`.

    Parameters
    ----------
    values : ndarray, any shape, in nm or rad
    lower, upper : float or None, in nm or rad
    spring : float, in kJ/mol/nm² or kJ/mol/rad²

    Returns
    -------
    ndarray, the shape of values, in kJ/mol
    """
    values = np.asarray(values, dtype=float)
    excess = np.zeros_like(values)
    if upper is not None:
        excess += np.maximum(0.0, values - upper) ** 2
    if lower is not None:
        excess += np.maximum(0.0, lower - values) ** 2
    return 0.5 * spring * excess
