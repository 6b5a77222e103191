"""Thermodynamic conditions and their reduced potentials.

A condition k is a temperature T_k plus, for each umbrella axis a, a window centre c_ka
and spring constant s_ka. Its reduced potential of a configuration x is

    u_k(x) = β_k [ U(x) + Σ_a ½ s_ka d(ξ_a(x), c_ka)² + p V(x) ],   β_k = 1 / (k_B T_k)

where U includes the flat-bottom restraints (they are part of every condition's ensemble), d is the
difference, wrapped into [-π, π) on a periodic coordinate, and the pV term is present
only at constant pressure. The unbiased condition at temperature T drops the umbrella
sum. Arrays: u_kr[k, r] reduced potential of walker r's configuration in condition k, in
kT; potential_r in kJ/mol; values_ra[r, a] the umbrella coordinates in nm or rad.
"""

import itertools
import math
from dataclasses import dataclass

import numpy as np

from .units import beta

#: kJ/mol per (bar nm³): 1e5 Pa × 1e-27 m³ × Avogadro's number (exact SI constants).
BAR_NM3 = 6.02214076e23 * 1e-22 * 1e-3


@dataclass(frozen=True)
class Condition:
    """One thermodynamic condition (K, and per umbrella axis: nm or rad, kJ/mol/unit²)."""

    index: int
    temperature: float
    centres: tuple = ()
    springs: tuple = ()


def build_conditions(protocol):
    """All conditions of a protocol: each temperature of the ladder times each window.

    Windows of a 2-D grid vary fastest along the last axis; temperatures vary slowest.
    """
    axes = protocol.umbrella
    windows = list(itertools.product(*[range(len(axis.centres)) for axis in axes]))
    conditions = []
    for temperature in protocol.temperatures:
        for window in windows:
            conditions.append(Condition(
                index=len(conditions), temperature=temperature,
                centres=tuple(axis.centres[i] for axis, i in zip(axes, window)),
                springs=tuple(axis.springs[i] for axis, i in zip(axes, window))))
    return tuple(conditions)


def wrap_difference(difference):
    """Wrap an angle difference (rad) into [-π, π)."""
    return difference - 2 * np.pi * np.floor((difference + np.pi) / (2 * np.pi))


def compute_bias_energies(conditions, values_ra, periodic_a):
    """Umbrella energy of each walker in each condition.

    Parameters
    ----------
    conditions : sequence of Condition, length n_conditions
    values_ra : ndarray, shape (n_walkers, n_axes), in nm or rad
    periodic_a : sequence of bool, length n_axes

    Returns
    -------
    ndarray, shape (n_conditions, n_walkers), in kJ/mol
    """
    values_ra = np.asarray(values_ra, dtype=float)
    energy_kr = np.zeros((len(conditions), values_ra.shape[0]))
    for a, periodic in enumerate(periodic_a):
        centre_k = np.array([c.centres[a] for c in conditions])[:, None]
        spring_k = np.array([c.springs[a] for c in conditions])[:, None]
        difference = values_ra[None, :, a] - centre_k
        if periodic:
            difference = wrap_difference(difference)
        energy_kr += 0.5 * spring_k * difference**2
    return energy_kr


def compute_reduced_potentials(conditions, potential_r, values_ra, periodic_a, *,
                               volume_r=None, pressure=None):
    """u_kr[k, r]: reduced potential (kT) of walker r's configuration in condition k.

    Parameters
    ----------
    potential_r : ndarray, shape (n_walkers,), in kJ/mol (flat-bottom restraints included, umbrellas not)
    volume_r : ndarray, shape (n_walkers,), in nm³, used only when ``pressure`` (bar) is set
    """
    potential_r = np.asarray(potential_r, dtype=float)
    energy_kr = potential_r[None, :] + compute_bias_energies(conditions, values_ra, periodic_a)
    if pressure is not None:
        energy_kr = energy_kr + pressure * BAR_NM3 * np.asarray(volume_r, dtype=float)[None, :]
    beta_k = np.array([beta(c.temperature) for c in conditions])
    return beta_k[:, None] * energy_kr


def compute_unbiased_reduced_potential(temperature, potential_n, *, volume_n=None, pressure=None):
    """u_n: reduced potential (kT) of each sample in the unbiased condition at ``temperature`` (K)."""
    energy = np.asarray(potential_n, dtype=float)
    if pressure is not None:
        energy = energy + pressure * BAR_NM3 * np.asarray(volume_n, dtype=float)
    return beta(temperature) * energy


def same_condition(a, b):
    """Whether two conditions are the same thermodynamic state (to rounding of the values
    a protocol was read from: 1e-9 relative)."""
    return (len(a.centres) == len(b.centres)
            and np.allclose((a.temperature, *a.centres, *a.springs), (b.temperature, *b.centres, *b.springs),
                            rtol=1e-9, atol=1e-12))


def index_of_condition(condition, conditions):
    """Position of ``condition`` in ``conditions`` (see same_condition), or None."""
    return next((k for k, other in enumerate(conditions) if same_condition(condition, other)), None)


def ladder_of(conditions, ladder_shape):
    """The ladder shape of a subset of a protocol's grid of conditions, or None.

    ``conditions`` (the subset, in grid order) form a ladder of their own when they are
    the product of the distinct temperatures and window centres they hold, as a grid.
    """
    if not conditions:
        return None
    axes = [sorted({c.temperature for c in conditions})]
    axes += [sorted({c.centres[a] for c in conditions}) for a in range(len(ladder_shape) - 1)]
    shape = tuple(len(values) for values in axes)
    return shape if math.prod(shape) == len(conditions) else None
