"""Swap moves against the published criteria and exact acceptance laws."""

import itertools

import numpy as np
import pytest
from scipy.special import betainc

from boost.exchange import (accept_swap, compute_swap_log_ratio, neighbour_pairs, swap_any_pairs,
                            swap_adjacent)


def temperature_u_kr(beta_k, energy_r):
    return np.outer(beta_k, energy_r)


def test_temperature_swap_ratio_matches_published_formula():
    # source: Sugita & Okamoto, Chem. Phys. Lett. 314, 141 (1999):
    # acc = min{1, exp[(β_i − β_j)(U(x_i) − U(x_j))]} for walkers at β_i (holding x_i) and β_j.
    beta_k = np.array([1 / 2.494, 1 / 2.744])       # 300 K and 330 K in mol/kJ
    energy_r = np.array([-10.0, -4.0])              # walker 0 at cold, walker 1 at hot
    u_kr = temperature_u_kr(beta_k, energy_r)
    log_ratio = compute_swap_log_ratio(u_kr, 0, 1, 0, 1)
    assert log_ratio == pytest.approx((beta_k[0] - beta_k[1]) * (energy_r[0] - energy_r[1]))


def test_colder_walker_with_higher_energy_always_accepted():
    # source: Sugita & Okamoto (1999); common practice: the swap is downhill, so accepted always.
    beta_k = np.array([1.0, 0.5])
    u_kr = temperature_u_kr(beta_k, np.array([5.0, 1.0]))  # cold walker holds the higher energy
    log_ratio = compute_swap_log_ratio(u_kr, 0, 1, 0, 1)
    assert log_ratio > 0
    rng = np.random.default_rng(0)
    assert all(accept_swap(log_ratio, rng) for _ in range(1000))


def test_uphill_swap_accepted_with_metropolis_probability():
    # source: Metropolis et al., J. Chem. Phys. 21, 1087 (1953): uphill accepted with exp(−Δ).
    rng = np.random.default_rng(1)
    accepted = np.mean([accept_swap(np.log(0.3), rng) for _ in range(40000)])
    assert accepted == pytest.approx(0.3, abs=4 * np.sqrt(0.3 * 0.7 / 40000))


@pytest.mark.parametrize("d", [1, 2, 10, 66])
def test_incomplete_beta_law_for_harmonic_energies(d):
    # source: Predescu, Predescu & Ciobanu, J. Chem. Phys. 120, 4119 (2004): for d harmonic
    # degrees of freedom, <acc> = 2 I_{1/(1+R)}(d/2, d/2), R = T_hi/T_lo (exact).
    # Harmonic potential energy at temperature T is Gamma(d/2, kT) distributed (exact).
    rng = np.random.default_rng(d)
    kt_lo, kt_hi = 2.494, 2.494 * 1.1
    n = 200_000
    energy_lo = rng.gamma(d / 2, kt_lo, n)
    energy_hi = rng.gamma(d / 2, kt_hi, n)
    log_ratio = (1 / kt_lo - 1 / kt_hi) * (energy_lo - energy_hi)
    mean = np.mean(np.minimum(1.0, np.exp(log_ratio)))
    exact = 2 * betainc(d / 2, d / 2, 1 / (1 + 1.1))
    assert mean == pytest.approx(exact, abs=0.004)
    # the same numbers through our criterion, on a few samples
    u_kr = np.array([[energy_lo[0] / kt_lo, energy_hi[0] / kt_lo], [energy_lo[0] / kt_hi, energy_hi[0] / kt_hi]])
    assert compute_swap_log_ratio(u_kr, 0, 1, 0, 1) == pytest.approx(log_ratio[0])


def test_incomplete_beta_special_cases():
    # source: Predescu et al. (2004): d=2 gives 2/(1+R); d=1 gives (4/π) arctan(R^-1/2) (exact).
    for ratio in (1.2, 2.0, 5.0):
        assert 2 * betainc(1, 1, 1 / (1 + ratio)) == pytest.approx(2 / (1 + ratio))
        assert 2 * betainc(0.5, 0.5, 1 / (1 + ratio)) == pytest.approx(4 / np.pi * np.arctan(ratio**-0.5))


def _exact_permutation_weights(u_kr):
    # exact: with frozen configurations the assignment σ is distributed ∝ exp(−Σ_r u_σ(r)(x_r))
    n = u_kr.shape[1]
    perms = list(itertools.permutations(range(n)))
    weights = np.array([np.exp(-sum(u_kr[k, r] for r, k in enumerate(p))) for p in perms])
    return perms, weights / weights.sum()


@pytest.mark.parametrize("pairs", ["adjacent", "any"])
def test_detailed_balance_on_frozen_configurations(pairs):
    # exact: the stationary distribution of the permutation, enumerated (detailed balance).
    rng = np.random.default_rng(7)
    u_kr = rng.normal(0, 1.0, (3, 3))
    perms, exact = _exact_permutation_weights(u_kr)
    counts = dict.fromkeys(perms, 0)
    assignment = [0, 1, 2]
    n_cycles = 30000
    for cycle in range(n_cycles):
        if pairs == "adjacent":
            assignment, _ = swap_adjacent(u_kr, assignment, (3,), cycle, rng)
        else:
            assignment, _ = swap_any_pairs(u_kr, assignment, rng, attempts=3)
        counts[tuple(assignment)] += 1
    empirical = np.array([counts[p] for p in perms]) / n_cycles
    # correlated samples: allow ~5 binomial σ with a correlation allowance of 3
    tolerance = 5 * np.sqrt(exact * (1 - exact) / n_cycles) * 3
    assert np.all(np.abs(empirical - exact) < tolerance + 0.005)


def test_neighbour_pairs_alternate_and_cover_the_ladder():
    assert neighbour_pairs((5,), 0) == [(0, 1), (2, 3)]
    assert neighbour_pairs((5,), 1) == [(1, 2), (3, 4)]
    # 2 temperatures x 3 windows: axes alternate; pairs differ by one step along one axis
    pairs = neighbour_pairs((2, 3), 0) + neighbour_pairs((2, 3), 1) + neighbour_pairs((2, 3), 2) \
        + neighbour_pairs((2, 3), 3)
    assert set(pairs) == {(0, 3), (1, 4), (2, 5), (0, 1), (3, 4), (1, 2), (4, 5)}
    assert neighbour_pairs((1,), 0) == []


def test_swap_tally_counts_attempts_and_acceptances():
    u_kr = np.zeros((4, 4))                           # every swap is neutral: always accepted
    assignment, tally = swap_adjacent(u_kr, [0, 1, 2, 3], (4,), 0, np.random.default_rng(0))
    assert assignment == [1, 0, 3, 2]
    assert tally.pairs == ((0, 1, 1, 1), (2, 3, 1, 1))
