"""Diagnostics of a run: window overlap, swap acceptance, walker traces and round trips.

Pure numpy on ledger arrays. condition_rt[r, t] is the condition walker r held in cycle t.
"""

import logging
import warnings
from dataclasses import dataclass

import numpy as np

from .exceptions import PoorOverlapWarning

log = logging.getLogger("boost")

#: Neighbouring conditions whose MBAR overlap element is below this are flagged
#: (common practice: overlap ≳ 0.03 between neighbours for reliable MBAR).
POOR_OVERLAP = 0.03


@dataclass(frozen=True)
class SwapSummary:
    """Swap statistics over the analysed cycles.

    Attributes
    ----------
    attempts_ij, accepted_ij : ndarray, shape (n_conditions, n_conditions), symmetric counts
    acceptance_ij : ndarray, accepted / attempts (NaN where never attempted)
    round_trips_r : ndarray, shape (n_walkers,), lowest -> highest -> lowest condition trips
    """

    attempts_ij: np.ndarray
    accepted_ij: np.ndarray
    acceptance_ij: np.ndarray
    round_trips_r: np.ndarray


def summarise_swaps(swaps, condition_rt, n_conditions, cycles=None):
    """Acceptance matrix from the ledger's swap rows and round trips from the traces.

    swaps : ndarray, shape (n_rows, 5): cycle, condition_i, condition_j, attempts, accepted
    cycles : optional set of cycles to count (e.g. production only)
    """
    attempts = np.zeros((n_conditions, n_conditions))
    accepted = np.zeros((n_conditions, n_conditions))
    for cycle, i, j, n, m in swaps:
        if cycles is not None and cycle not in cycles:
            continue
        attempts[i, j] += n
        attempts[j, i] += n
        accepted[i, j] += m
        accepted[j, i] += m
    with np.errstate(invalid="ignore", divide="ignore"):
        acceptance = np.where(attempts > 0, accepted / attempts, np.nan)
    trips = np.array([count_round_trips(trace, 0, n_conditions - 1) for trace in condition_rt])
    return SwapSummary(attempts, accepted, acceptance, trips)


def count_round_trips(trace, lowest, highest):
    """Completed lowest -> highest -> lowest journeys along one walker's trace."""
    trips, target, started = 0, highest, False
    for condition in trace:
        if condition == lowest and not started:
            started, target = True, highest
        elif started and condition == target:
            if target == lowest:
                trips += 1
                target = highest
            else:
                target = lowest
    return trips


def closes_circle(centres):
    """True when windows on a periodic axis, in ladder order, go all the way around.

    They do when the centres increase and the gap from the last back to the first across
    ±180° is no wider than the widest gap between neighbours; then that pair meets too.
    """
    centres = np.asarray(centres, dtype=float)
    steps = np.diff(centres)
    if centres.size < 3 or not np.all(steps > 0):
        return False
    return 2 * np.pi - (centres[-1] - centres[0]) <= steps.max() * (1 + 1e-9)


def neighbour_pairs_on_grid(ladder_shape, circles=()):
    """(i, j) for every pair of neighbouring conditions on the ladder grid, i < j.

    ``circles``: axes whose last and first conditions are neighbours too (see closes_circle).
    """
    index = np.arange(int(np.prod(ladder_shape))).reshape(ladder_shape)
    pairs = []
    for axis in range(len(ladder_shape)):
        moved = np.moveaxis(index, axis, 0)
        steps = [(step, step + 1) for step in range(ladder_shape[axis] - 1)]
        steps += [(ladder_shape[axis] - 1, 0)] if axis in circles else []
        for a, b in steps:
            pairs += [(min(int(i), int(j)), max(int(i), int(j))) for i, j in zip(moved[a].ravel(), moved[b].ravel())]
    return pairs


def neighbour_overlaps(overlap, ladder_shape, circles=()):
    """(i, j, overlap) for every pair of neighbouring conditions on the ladder grid."""
    return [(i, j, float(min(overlap[i, j], overlap[j, i])))
            for i, j in neighbour_pairs_on_grid(ladder_shape, circles)]


def warn_poor_overlap(overlap, ladder_shape, describe, circles=()):
    """Warn (our own category) naming each pair of neighbouring conditions that overlap poorly.

    describe : callable, condition index -> short text such as 'window 3 (phi = 45 deg)'
    circles : axes of ladder_shape whose windows go around a circle (see closes_circle)
    """
    poor = [(i, j, o) for i, j, o in neighbour_overlaps(overlap, ladder_shape, circles) if o < POOR_OVERLAP]
    for i, j, o in poor:
        message = (f"{describe(i)} and {describe(j)} overlap poorly (MBAR overlap {o:.3f} < {POOR_OVERLAP}); "
                   "add windows between them or soften the springs.")
        warnings.warn(message, PoorOverlapWarning, stacklevel=2)
    return poor
