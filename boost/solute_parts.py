"""Solute-scaled conditions as numbers: energy parts -> each condition's energy.

In solute tempering of the second kind (Wang, Friesner & Berne 2011) every walker runs at
the same temperature T, and condition k scales the solute's interactions by its solute
scale λ_k in (0, 1]: solute–solute terms by λ_k, solute–rest terms by √λ_k, the rest not
at all. With s = √λ every such potential is a quadratic in s,

    U(x; λ) = E0(x) + s E1(x) + s² E2(x),

so the three parts ``parts = (E0, E1, E2)`` of one configuration (in kJ/mol, measured by
:func:`boost.solute_scaling.compute_solute_parts`) give its energy in every condition.
λ = 1 is the physical potential U = E0 + E1 + E2. Walkers report U and the two parts that
λ scales, (E_cross, E_inner) = (E1, E2); then

    U(x; λ) = U(x) + (√λ − 1) E_cross(x) + (λ − 1) E_inner(x),

which is U itself, bit for bit, at λ = 1 (both factors are zero there). Reduced
potentials are made from these energies in one place, boost.conditions. Arrays:
parts_r3[r, j] part j of walker r's configuration; solute_r2[r] = (E_cross, E_inner);
scale_k[k] the solute scale of condition k; energies in kJ/mol.

No OpenMM here.

References
----------
L. Wang, R. A. Friesner, B. J. Berne, "Replica exchange with solute scaling: a more
efficient version of replica exchange with solute tempering (REST2)", J. Phys. Chem. B
115, 9431–9438 (2011). doi:10.1021/jp204407d
"""

import math

import numpy as np

from .exceptions import ProtocolError


def check_solute_scale(scale, *, place="solute scale"):
    """The solute scale λ as a float, or a one-line ProtocolError unless 0 < λ ≤ 1.

    ``place`` names where the value was written (file and key path), for the message.
    """
    try:
        value = float(scale)
    except (TypeError, ValueError):
        raise ProtocolError(f"{place} must be a number in (0, 1]; got {scale!r}.") from None
    if not (math.isfinite(value) and 0.0 < value <= 1.0):
        raise ProtocolError(f"{place} must be in (0, 1] (1 is the physical potential); got {value!r}.")
    return value


def check_solute_scales(scales, *, place="solute scales"):
    """Each λ of a ladder checked by :func:`check_solute_scale`; ndarray shape (n_conditions,)."""
    values = np.atleast_1d(np.asarray(scales, dtype=object))
    if values.ndim != 1 or values.size == 0:
        raise ProtocolError(f"{place} must be a non-empty list of numbers in (0, 1]; got {scales!r}.")
    return np.array([check_solute_scale(v, place=f"{place}[{i}]") for i, v in enumerate(values)])


def compute_solute_shifts(solute_r2, scale_k):
    """shift_kr[k, r] = (√λ_k − 1) E_cross + (λ_k − 1) E_inner of walker r, in kJ/mol:
    what condition k adds to the physical potential (zero, exactly, where λ_k = 1).

    Parameters
    ----------
    solute_r2 : ndarray, shape (n_walkers, 2), in kJ/mol
    scale_k : ndarray, shape (n_conditions,), each in (0, 1]
    """
    return shifts_from_factors(solute_factors(scale_k), solute_r2)


def shifts_from_factors(factors_k2, solute_r2):
    """compute_solute_shifts with the factors of ``solute_factors`` made beforehand."""
    return factors_k2 @ np.asarray(solute_r2, dtype=float).reshape(-1, 2).T


def solute_factors(scale_k):
    """(√λ_k − 1, λ_k − 1) per condition, shape (n_conditions, 2), after checking each λ_k."""
    scale_k = check_solute_scales(scale_k)
    return np.stack([np.sqrt(scale_k) - 1.0, scale_k - 1.0], axis=1)


def compute_solute_energies(parts_r3, scale_k):
    """energy_kr[k, r] = E0 + √λ_k E1 + λ_k E2 of walker r's configuration, in kJ/mol.

    Parameters
    ----------
    parts_r3 : ndarray, shape (n_walkers, 3), in kJ/mol
    scale_k : ndarray, shape (n_conditions,), each in (0, 1]
    """
    parts_r3 = np.atleast_2d(np.asarray(parts_r3, dtype=float))
    if parts_r3.ndim != 2 or parts_r3.shape[1] != 3:
        raise ValueError(f"parts_r3 must be shape (n_walkers, 3); got {parts_r3.shape}")
    return parts_r3.sum(axis=1)[None, :] + compute_solute_shifts(parts_r3[:, 1:], scale_k)
