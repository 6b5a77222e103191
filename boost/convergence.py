"""Estimates from parts of production, time-ordered: forward and reverse cumulative.

The forward estimate at fraction f uses the first f of production, the reverse one the
last f (common practice for judging convergence by eye and by rule). The forward and
reverse estimates at one half are the two halves of production, independent of each
other, which :mod:`boost.verdict` compares.

A part's standard error is the full run's, scaled by sqrt(n / n_part) for the samples it
holds: errors of averages over stationary data shrink as 1/sqrt(samples), and the full
run's error already carries whatever correlation its method (asymptotic or bootstrap)
saw. Pure numpy: the estimates come from a callable, so this module knows nothing of MBAR.
"""

import math
import warnings
from dataclasses import dataclass

import numpy as np

from .exceptions import AnalysisError

#: Fractions of production at which cumulative estimates are made.
FRACTIONS = (0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0)
HALF = FRACTIONS.index(0.5)


@dataclass(frozen=True, eq=False)
class Cumulative:
    """Forward and reverse cumulative estimates of a vector of statistics.

    Attributes
    ----------
    fractions : ndarray, shape (n_fractions,)
    forward, d_forward, reverse, d_reverse : ndarray, shape (n_statistics, n_fractions)
        Estimates and standard errors, in each statistic's own unit; NaN where a part of
        production gave no estimate (too few samples in it, or MBAR failed).
    """

    fractions: np.ndarray
    forward: np.ndarray
    d_forward: np.ndarray
    reverse: np.ndarray
    d_reverse: np.ndarray

    def halves(self, s):
        """(first, d_first, second, d_second) of statistic s."""
        return (self.forward[s, HALF], self.d_forward[s, HALF], self.reverse[s, HALF],
                self.d_reverse[s, HALF])


def compute_cumulative(estimate, position_n, error_s, *, fractions=FRACTIONS):
    """Forward and reverse cumulative estimates over production.

    Parameters
    ----------
    estimate : callable
        ``estimate(multiplicity_n)`` with a 0/1 int array over the samples returns the
        statistics of that part, shape (n_statistics,); it may raise AnalysisError when
        the part holds too little to estimate from.
    position_n : array_like, shape (n_samples,)
        Where each sample lies in production, as a fraction in [0, 1).
    error_s : array_like, shape (n_statistics,)
        Standard errors of the statistics from all samples.

    Returns
    -------
    Cumulative
    """
    position_n = np.asarray(position_n, dtype=float)
    error_s = np.asarray(error_s, dtype=float)
    shape = (error_s.size, len(fractions))
    out = {key: np.full(shape, np.nan) for key in ("forward", "d_forward", "reverse", "d_reverse")}
    for j, fraction in enumerate(fractions):
        parts = {"forward": position_n < fraction - 1e-12, "reverse": position_n >= 1.0 - fraction - 1e-12}
        for direction, inside in parts.items():
            if not inside.any():
                continue
            if direction == "reverse" and fraction == 1.0:     # all of production, as forward
                out["reverse"][:, j], out["d_reverse"][:, j] = out["forward"][:, j], out["d_forward"][:, j]
                continue
            value_s = _estimate_quietly(estimate, inside.astype(int))
            if value_s is not None:
                out[direction][:, j] = value_s
                out["d_" + direction][:, j] = error_s * math.sqrt(position_n.size / inside.sum())
    return Cumulative(fractions=np.array(fractions), **out)


def _estimate_quietly(estimate, multiplicity_n):
    """The statistics of a part, or None where it is too small to estimate from. Its
    warnings are the full run's again (poor overlap, sparse bins) and would only repeat them."""
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        try:
            return np.asarray(estimate(multiplicity_n), dtype=float)
        except AnalysisError:
            return None
