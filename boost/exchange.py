"""Swaps of conditions between walkers, accepted by the Metropolis criterion (pure numpy).

u_kr[k, r] is the reduced potential (kT) of walker r's configuration in condition k;
``assignment[r]`` is the condition walker r holds. Swapping the conditions of walkers
r and s is accepted with probability

    min{1, exp(-[u_a(x_s) + u_b(x_r) - u_a(x_r) - u_b(x_s)])},  a = assignment[r], b = assignment[s]

(Sugita & Okamoto, Chem. Phys. Lett. 314, 141 (1999), doi:10.1016/S0009-2614(99)01123-9;
Metropolis et al., J. Chem. Phys. 21, 1087 (1953), doi:10.1063/1.1699114). For two
temperatures this is min{1, exp[(β_a - β_b)(U_r - U_s)]}.
"""

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np


@dataclass(frozen=True)
class SwapTally:
    """Attempts and acceptances of one cycle per pair of conditions (i < j)."""

    pairs: tuple            # ((condition_i, condition_j, attempts, accepted), ...)


def compute_swap_log_ratio(u_kr, r, s, a, b):
    """-Δ, the log of the Metropolis ratio for giving walker r condition b and walker s condition a."""
    return -(u_kr[a, s] + u_kr[b, r] - u_kr[a, r] - u_kr[b, s])


def accept_swap(log_ratio, rng):
    """Metropolis test: always accept downhill, uphill with probability exp(log_ratio)."""
    return log_ratio >= 0 or rng.random() < math.exp(log_ratio)


def neighbour_pairs(ladder_shape, cycle):
    """Condition pairs that may swap this cycle: neighbours along one ladder axis.

    The axis and the parity (even or odd pairs) alternate from cycle to cycle, so every
    neighbour pair is attempted regularly. Conditions are indexed in C order over
    ``ladder_shape`` (temperatures, then window axes).
    """
    return list(_neighbour_pairs(ladder_shape, cycle)[0])


def _neighbour_pairs(ladder_shape, cycle):
    axes = [a for a, size in enumerate(ladder_shape) if size > 1]
    if not axes:
        return (), np.empty(0, dtype=np.intp), np.empty(0, dtype=np.intp)
    return _pairs_along(tuple(ladder_shape), axes[cycle % len(axes)], (cycle // len(axes)) % 2)


@lru_cache(maxsize=64)
def _pairs_along(ladder_shape, axis, parity):
    """Neighbour pairs along ``axis`` whose lower member sits at an even (0) or odd (1) step,
    as tuples and as arrays of lower and upper members; made once for each (a run asks for
    the same few every cycle)."""
    index = np.arange(int(np.prod(ladder_shape))).reshape(ladder_shape)
    lower = np.moveaxis(index, axis, 0)
    pairs = tuple((int(a), int(b)) for step in range(parity, ladder_shape[axis] - 1, 2)
                  for a, b in zip(lower[step].ravel(), lower[step + 1].ravel()))
    return pairs, np.array([a for a, _ in pairs], dtype=np.intp), np.array([b for _, b in pairs], dtype=np.intp)


def swap_adjacent(u_kr, assignment, ladder_shape, cycle, rng, *, attempts=1):
    """Attempt swaps between walkers holding neighbouring conditions.

    The pairs of one pass share no condition, so their log ratios are computed at once;
    the Metropolis tests (:func:`accept_swap`) then run in pair order.

    Returns
    -------
    new_assignment : list of int, condition of each walker
    tally : SwapTally
    """
    assignment = list(assignment)
    holder = np.empty(len(assignment), dtype=np.intp)
    holder[assignment] = np.arange(len(assignment))
    counts = {}
    for attempt in range(attempts):
        pairs, a_p, b_p = _neighbour_pairs(ladder_shape, cycle * attempts + attempt)
        r_p, s_p = holder[a_p], holder[b_p]
        log_ratios = compute_swap_log_ratio(u_kr, r_p, s_p, a_p, b_p).tolist()
        for (a, b), r, s, log_ratio in zip(pairs, r_p.tolist(), s_p.tolist(), log_ratios):
            accepted = accept_swap(log_ratio, rng)
            if accepted:
                assignment[r], assignment[s] = b, a
                holder[a], holder[b] = s, r
            tried, won = counts.get((a, b), (0, 0))
            counts[(a, b)] = (tried + 1, won + int(accepted))
    return assignment, SwapTally(tuple((a, b, n, m) for (a, b), (n, m) in sorted(counts.items())))


def swap_any_pairs(u_kr, assignment, rng, *, attempts=None):
    """Many random pair swaps among all walkers, approaching a fresh draw of the assignment.

    Chodera & Shirts, J. Chem. Phys. 135, 194110 (2011), doi:10.1063/1.3660669: repeated
    Metropolis pair swaps (Gibbs sampling of the permutation). ``attempts`` defaults to
    n_walkers³, which they found enough to mix the assignment.
    """
    assignment = list(assignment)
    n = len(assignment)
    counts = {}
    for _ in range(attempts if attempts is not None else n**3):
        r, s = rng.choice(n, size=2, replace=False)
        a, b = assignment[r], assignment[s]
        accepted = accept_swap(compute_swap_log_ratio(u_kr, r, s, a, b), rng)
        if accepted:
            assignment[r], assignment[s] = b, a
        key = (min(a, b), max(a, b))
        tried, won = counts.get(key, (0, 0))
        counts[key] = (tried + 1, won + int(accepted))
    return assignment, SwapTally(tuple((a, b, n, m) for (a, b), (n, m) in sorted(counts.items())))


def any_pairs_proposals(attempts, n_walkers):
    """Proposals per cycle with ``pairs: any``: ``attempts`` times n_walkers³ (see swap_any_pairs)."""
    return attempts * n_walkers**3


def swap_for_cycle(pairs, attempts, u_kr, assignment, ladder_shape, cycle, rng):
    """One cycle's swaps under the protocol's exchange policy (``exchange.pairs``, ``attempts``).

    'adjacent': ``attempts`` passes over neighbouring pairs of the ladder; 'any': random
    pairs of any two conditions, ``any_pairs_proposals`` of them. Returns the new
    assignment and the tally rows (condition_i, condition_j, attempts, accepted).
    """
    if pairs == "any":
        new, tally = swap_any_pairs(u_kr, assignment, rng, attempts=any_pairs_proposals(attempts, len(assignment)))
    else:
        new, tally = swap_adjacent(u_kr, assignment, ladder_shape, cycle, rng, attempts=attempts)
    return new, tally.pairs
