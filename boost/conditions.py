"""Thermodynamic conditions and their reduced potentials.

A condition k is a temperature T_k, a solute scale λ_k in (0, 1] (1 without solute
scaling) and, for each umbrella axis a, a window centre c_ka and spring constant s_ka.
Its reduced potential of a configuration x is

    u_k(x) = β_k [ U(x; λ_k) + Σ_a ½ s_ka d(ξ_a(x), c_ka)² + p V(x) ],   β_k = 1 / (k_B T_k)
    U(x; λ) = U(x) + (√λ − 1) E_cross(x) + (λ − 1) E_inner(x)

where U is the physical potential (λ = 1; flat-bottom restraints included, they are part
of every condition's ensemble), E_cross and E_inner the solute–rest and solute–solute
parts that solute scaling multiplies by √λ and λ (boost.solute_parts; both zero without
a solute), d the difference, wrapped into [-π, π) on a periodic coordinate, and the pV
term is present only at constant pressure. The unbiased condition at temperature T is
λ = 1 without the umbrella sum. Arrays: u_kr[k, r] reduced potential of walker r's
configuration in condition k, in kT; potential_r in kJ/mol; solute_r2[r] = (E_cross,
E_inner) in kJ/mol; values_ra[r, a] the umbrella coordinates in nm or rad.

Conditions are ordered temperatures (slowest), then solute scales, then windows (fastest,
the last umbrella axis fastest of all): condition k sits at ``np.unravel_index(k,
ladder_shape(protocol))``.
"""

import itertools
import math
from dataclasses import dataclass

import numpy as np

from .solute_parts import shifts_from_factors, solute_factors
from .units import beta

#: kJ/mol per (bar nm³): 1e5 Pa × 1e-27 m³ × Avogadro's number (exact SI constants).
BAR_NM3 = 6.02214076e23 * 1e-22 * 1e-3


@dataclass(frozen=True)
class Condition:
    """One thermodynamic condition (K, and per umbrella axis: nm or rad, kJ/mol/unit²; solute scale λ)."""

    index: int
    temperature: float
    centres: tuple = ()
    springs: tuple = ()
    solute_scale: float = 1.0


def solute_scales(protocol):
    """The protocol's solute ladder (λ per rung), (1.0,) without solute scaling."""
    return protocol.solute.scales if protocol.solute is not None else (1.0,)


def ladder_shape(protocol):
    """(temperatures, solute scales, windows along each umbrella axis): the conditions' grid."""
    return (len(protocol.temperatures), len(solute_scales(protocol)), *[len(a.centres) for a in protocol.umbrella])


def build_conditions(protocol):
    """All conditions of a protocol: each temperature times each solute scale times each window,
    in the order of the module docstring."""
    axes = protocol.umbrella
    windows = list(itertools.product(*[range(len(axis.centres)) for axis in axes]))
    conditions = []
    for temperature in protocol.temperatures:
        for scale in solute_scales(protocol):
            for window in windows:
                conditions.append(Condition(
                    index=len(conditions), temperature=temperature,
                    centres=tuple(axis.centres[i] for axis, i in zip(axes, window)),
                    springs=tuple(axis.springs[i] for axis, i in zip(axes, window)), solute_scale=scale))
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
    return ConditionArrays(conditions, periodic_a).bias_energies(values_ra)


def compute_reduced_potentials(conditions, potential_r, values_ra, periodic_a, *,
                               solute_r2=None, volume_r=None, pressure=None):
    """u_kr[k, r]: reduced potential (kT) of walker r's configuration in condition k.

    Parameters
    ----------
    potential_r : ndarray, shape (n_walkers,), in kJ/mol: the physical potential (λ = 1;
        flat-bottom restraints included, umbrellas not)
    solute_r2 : ndarray, shape (n_walkers, 2), in kJ/mol: (E_cross, E_inner), or None (zeros)
    volume_r : ndarray, shape (n_walkers,), in nm³, used only when ``pressure`` (bar) is set
    """
    return ConditionArrays(conditions, periodic_a).reduced_potentials(
        potential_r, values_ra, solute_r2=solute_r2, volume_r=volume_r, pressure=pressure)


class ConditionArrays:
    """The numbers of some conditions as arrays, made once: what the reduced potentials of
    every cycle need (the scheduler keeps one for the run; a cycle then costs a few numpy calls).

    Parameters
    ----------
    conditions : sequence of Condition, length n_conditions
    periodic_a : sequence of bool, per umbrella axis
    """

    def __init__(self, conditions, periodic_a):
        self.periodic_a = tuple(periodic_a)
        self.centre_ak = [np.array([c.centres[a] for c in conditions])[:, None] for a in range(len(self.periodic_a))]
        self.spring_ak = [np.array([c.springs[a] for c in conditions])[:, None] for a in range(len(self.periodic_a))]
        self.solute_factors_k2 = solute_factors([c.solute_scale for c in conditions])
        self.scales_solute = bool(self.solute_factors_k2.any())    # else the shifts are all zero
        self.beta_k = np.array([beta(c.temperature) for c in conditions])

    def bias_energies(self, values_ra):
        """Umbrella energy (kJ/mol) of each walker in each condition, shape (n_conditions, n_walkers)."""
        values_ra = np.asarray(values_ra, dtype=float)
        energy_kr = np.zeros((len(self.beta_k), values_ra.shape[0]))
        for a, periodic in enumerate(self.periodic_a):
            difference = values_ra[None, :, a] - self.centre_ak[a]
            if periodic:
                difference = wrap_difference(difference)
            energy_kr += 0.5 * self.spring_ak[a] * difference**2
        return energy_kr

    def reduced_potentials(self, potential_r, values_ra, *, solute_r2=None, volume_r=None, pressure=None):
        """u_kr, as :func:`compute_reduced_potentials`."""
        potential_r = np.asarray(potential_r, dtype=float)
        energy_kr = potential_r[None, :] + self.bias_energies(values_ra)
        if solute_r2 is not None and self.scales_solute:
            energy_kr = energy_kr + shifts_from_factors(self.solute_factors_k2, solute_r2)
        if pressure is not None:
            energy_kr = energy_kr + pressure * BAR_NM3 * np.asarray(volume_r, dtype=float)[None, :]
        return self.beta_k[:, None] * energy_kr


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
            and np.allclose((a.temperature, a.solute_scale, *a.centres, *a.springs),
                            (b.temperature, b.solute_scale, *b.centres, *b.springs), rtol=1e-9, atol=1e-12))


def index_of_condition(condition, conditions):
    """Position of ``condition`` in ``conditions`` (see same_condition), or None."""
    return next((k for k, other in enumerate(conditions) if same_condition(condition, other)), None)


def ladder_of(conditions, ladder_shape):
    """The ladder shape of a subset of a protocol's grid of conditions, or None.

    ``conditions`` (the subset, in grid order) form a ladder of their own when they are
    the product of the distinct temperatures, solute scales and window centres they hold.
    """
    if not conditions:
        return None
    axes = [sorted({c.temperature for c in conditions}), sorted({c.solute_scale for c in conditions})]
    axes += [sorted({c.centres[a] for c in conditions}) for a in range(len(ladder_shape) - 2)]
    shape = tuple(len(values) for values in axes)
    return shape if math.prod(shape) == len(conditions) else None
