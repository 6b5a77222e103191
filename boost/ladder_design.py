"""Temperature ladders spaced for a target neighbour swap acceptance (pure numpy/scipy).

A swap between neighbour rungs i and j exchanges configurations whose potential energies
U_i and U_j were drawn at T_i and T_j; it is accepted with min(1, e^x), x = (β_i − β_j)(U_i
− U_j). If U at each temperature is normal with mean μ(T) and variance σ²(T), and the two
draws independent, x is normal with

    m = (β_i − β_j)(μ_i − μ_j),   s² = (β_i − β_j)² (σ_i² + σ_j²),

and the mean acceptance is the partial expectation of a log-normal variable:

    E[min(1, e^x)] = Φ(m / s) + exp(m + s² / 2) Φ(−m / s − s)

(the first term is P(x ≥ 0); the second is E[e^x; x < 0], by completing the square).
tests/test_propose.py checks it against numerical integration (scipy.integrate.quad) and,
for harmonic degrees of freedom, against the exact incomplete-beta law of Predescu,
Predescu & Ciobanu, J. Chem. Phys. 120, 4119 (2004), doi:10.1063/1.1644093, which the
Gaussian form approaches as the number of degrees of freedom grows.

Between measured temperatures, μ(T) is interpolated linearly in T and σ²(T) linearly in
log T against log σ² (a power law on each interval): both are exact for harmonic degrees
of freedom (μ = d kT / 2, σ² = d (kT)² / 2) and follow the heat-capacity relation
σ² = k_B T² C_V to first order elsewhere. Outside the measured range the end intervals
are extended.

Energies in kJ/mol, temperatures in K.
"""

from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq
from scipy.special import log_ndtr, ndtr

from .units import beta


def compute_gaussian_acceptance(beta_i, beta_j, mean_i, mean_j, variance_i, variance_j):
    """Mean Metropolis swap acceptance between two rungs with normal energy distributions.

    Parameters
    ----------
    beta_i, beta_j : float, in mol/kJ
    mean_i, mean_j : float, in kJ/mol
        Mean potential energy at each rung.
    variance_i, variance_j : float, in (kJ/mol)²

    Returns
    -------
    float
        Between 0 and 1.
    """
    m = (beta_i - beta_j) * (mean_i - mean_j)
    s = abs(beta_i - beta_j) * np.sqrt(variance_i + variance_j)
    if s == 0.0:
        return float(min(1.0, np.exp(m)))
    return float(ndtr(m / s) + np.exp(m + 0.5 * s * s + log_ndtr(-m / s - s)))


@dataclass(frozen=True)
class EnergyMoments:
    """Mean and variance of the potential energy at measured temperatures.

    Attributes
    ----------
    temperature_k : ndarray, shape (n,), K, strictly increasing, n ≥ 2
    mean_k : ndarray, shape (n,), kJ/mol
    variance_k : ndarray, shape (n,), (kJ/mol)², positive
    """

    temperature_k: np.ndarray
    mean_k: np.ndarray
    variance_k: np.ndarray

    def mean(self, temperature):
        return float(_extended_interp(temperature, self.temperature_k, self.mean_k))

    def variance(self, temperature):
        log_t = np.log(self.temperature_k)
        return float(np.exp(_extended_interp(np.log(temperature), log_t, np.log(self.variance_k))))

    def acceptance(self, t_i, t_j):
        """Predicted mean swap acceptance between rungs at t_i and t_j (K)."""
        return compute_gaussian_acceptance(beta(t_i), beta(t_j), self.mean(t_i), self.mean(t_j),
                                           self.variance(t_i), self.variance(t_j))


def _extended_interp(x, xp, fp):
    """Piecewise-linear interpolation, with the end intervals extended beyond the data."""
    if x <= xp[0]:
        return fp[0] + (x - xp[0]) * (fp[1] - fp[0]) / (xp[1] - xp[0])
    if x >= xp[-1]:
        return fp[-1] + (x - xp[-1]) * (fp[-1] - fp[-2]) / (xp[-1] - xp[-2])
    return np.interp(x, xp, fp)


@dataclass(frozen=True)
class LadderDesign:
    """A planned temperature ladder.

    Attributes
    ----------
    temperatures : tuple of float, K
    acceptance : tuple of float, predicted mean swap acceptance of each neighbour pair
    """

    temperatures: tuple
    acceptance: tuple


def _next_rung(moments, temperature, acceptance):
    """The temperature above ``temperature`` whose predicted acceptance with it is ``acceptance``."""
    upper = temperature * 1.01
    while moments.acceptance(temperature, upper) > acceptance:
        upper = temperature + 2.0 * (upper - temperature)
        if upper > 1e3 * temperature:
            return upper
    return brentq(lambda t: moments.acceptance(temperature, t) - acceptance, temperature * (1 + 1e-12), upper,
                  xtol=1e-9 * temperature)


def _climb(moments, lowest, acceptance, steps):
    ladder = [lowest]
    for _ in range(steps):
        ladder.append(_next_rung(moments, ladder[-1], acceptance))
    return ladder


def design_ladder(moments, lowest, highest, target):
    """The fewest rungs from ``lowest`` to ``highest`` whose neighbours all predict at least
    ``target`` acceptance, spaced so that every pair predicts the same acceptance.

    Rungs are placed greedily from the lowest temperature at ``target`` until the highest is
    reached; with that count, the common acceptance is raised (bisection) until the top
    rung lands on ``highest`` exactly.

    Parameters
    ----------
    moments : EnergyMoments
    lowest, highest : float, K, lowest < highest
    target : float, between 0 and 1

    Returns
    -------
    LadderDesign
    """
    ladder = [lowest]
    while ladder[-1] < highest:
        ladder.append(_next_rung(moments, ladder[-1], target))
    steps = len(ladder) - 1
    if steps == 1:
        ladder = [lowest, highest]
    else:
        low, high = target, 1.0 - 1e-12           # acceptance: the top rung overshoots at low, falls short at high
        for _ in range(60):
            middle = 0.5 * (low + high)
            if _climb(moments, lowest, middle, steps)[-1] >= highest:
                low = middle
            else:
                high = middle
        ladder = _climb(moments, lowest, low, steps - 1) + [highest]
    acceptance = tuple(moments.acceptance(a, b) for a, b in zip(ladder, ladder[1:]))
    return LadderDesign(tuple(float(t) for t in ladder), acceptance)


def insert_rungs(moments, ladder, poor_pairs, target):
    """``ladder`` with rungs added inside each poor pair (i, i+1): the fewest geometrically
    spaced ones whose sub-pairs all predict at least ``target``, and at least one.

    Returns
    -------
    LadderDesign
    """
    ladder = list(ladder)
    added = []
    for i in sorted({i for i, _ in poor_pairs}):
        low, high = ladder[i], ladder[i + 1]
        for extra in range(1, 1000):
            inside = np.geomspace(low, high, extra + 2)
            if min(moments.acceptance(a, b) for a, b in zip(inside, inside[1:])) >= target:
                break
        added += inside[1:-1].tolist()
    ladder = sorted(ladder + added)
    return LadderDesign(tuple(float(t) for t in ladder),
                        tuple(moments.acceptance(a, b) for a, b in zip(ladder, ladder[1:])))
