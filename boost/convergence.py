"""Estimates from parts of production, time-ordered: forward and reverse cumulative.

The forward estimate at fraction f uses the first f of production, the reverse one the
last f (common practice for judging convergence by eye and by rule). The forward and
reverse estimates at one half are the two halves of production, independent of each
other, which :mod:`boost.verdict` compares.

Pure numpy: the estimates themselves come from a callable, so this module knows nothing
of MBAR.
"""

import warnings
from dataclasses import dataclass

import numpy as np

from .exceptions import AnalysisError

#: Fractions of production at which cumulative estimates are made.
FRACTIONS = (0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0)
HALF = FRACTIONS.index(0.5)


@dataclass(frozen=True, eq=False)
class Cumulative:
    """Forward and reverse cumulative estimates of named numbers.

    Attributes
    ----------
    fractions : ndarray, shape (n_fractions,)
    names : tuple of str, length n_numbers
    forward, d_forward, reverse, d_reverse : ndarray, shape (n_numbers, n_fractions)
        Estimates and standard errors, in each number's own unit; NaN where a part of
        production gave no estimate (too few samples in it, or MBAR failed).
    """

    fractions: np.ndarray
    names: tuple
    forward: np.ndarray
    d_forward: np.ndarray
    reverse: np.ndarray
    d_reverse: np.ndarray

    def halves(self, name):
        """(first, d_first, second, d_second) for one number."""
        i = self.names.index(name)
        return (self.forward[i, HALF], self.d_forward[i, HALF], self.reverse[i, HALF],
                self.d_reverse[i, HALF])


def compute_cumulative(estimate, position_n, names, *, fractions=FRACTIONS):
    """Forward and reverse cumulative estimates over production.

    Parameters
    ----------
    estimate : callable
        ``estimate(columns)`` with ``columns`` an int array of sample indices returns a
        dict of name -> (value, standard error); it may raise AnalysisError when the part
        holds too little to estimate from.
    position_n : array_like, shape (n_samples,)
        Where each sample lies in production, as a fraction in [0, 1) (production cycle
        index over the number of production cycles).
    names : sequence of str
        The numbers to record (keys of what ``estimate`` returns).

    Returns
    -------
    Cumulative
    """
    position_n = np.asarray(position_n, dtype=float)
    names = tuple(names)
    shape = (len(names), len(fractions))
    out = {key: np.full(shape, np.nan) for key in ("forward", "d_forward", "reverse", "d_reverse")}
    for j, fraction in enumerate(fractions):
        parts = {"forward": position_n < fraction - 1e-12, "reverse": position_n >= 1.0 - fraction - 1e-12}
        for direction, mask in parts.items():
            if direction == "reverse" and fraction == 1.0:
                out["reverse"][:, j], out["d_reverse"][:, j] = out["forward"][:, j], out["d_forward"][:, j]
                continue
            result = _estimate_quietly(estimate, np.flatnonzero(mask))
            for i, name in enumerate(names):
                if name in result:
                    out[direction][i, j], out["d_" + direction][i, j] = result[name]
    return Cumulative(fractions=np.array(fractions), names=names, **out)


def _estimate_quietly(estimate, columns):
    """The estimate on a part, or {} where the part is too small; its warnings are the
    full run's warnings again (poor overlap, sparse bins) and would only repeat them."""
    if columns.size == 0:
        return {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return estimate(columns)
        except AnalysisError:
            return {}
