"""Convergence verdicts: has a headline number settled, is it drifting, or does it rest on
too few independent samples?

The checks are the ones a careful practitioner runs by hand (common practice):

- the number of independent samples behind the estimate, against a floor;
- the estimates from the first and the second half of production, which are independent
  of each other, agree within their combined standard error;
- for exchange runs, some walker has carried configurations across the boundary the
  number depends on (it visited both sides of a basin boundary).

Pure numpy; the numbers judged are in any unit, as long as an estimate and its errors
share it.
"""

import math
from dataclasses import dataclass

import numpy as np

SETTLED = "settled"
DRIFTING = "drifting"
TOO_FEW = "too few samples"
WORDS = (SETTLED, DRIFTING, TOO_FEW)

#: Fewer independent samples than this behind a number and it is not judged settled
#: (common practice: a binomial fraction from 20 samples is already uncertain by ~20 %).
MIN_INDEPENDENT = 20
#: Halves of production whose estimates differ by more than this many combined standard
#: errors show a drift (two independent estimates of one value: |z| > 2 at about 5 %).
HALVES_Z = 2.0


@dataclass(frozen=True)
class Verdict:
    """The verdict on one number, its reason in one short clause, and what it rests on.

    Attributes
    ----------
    word : str
        One of ``WORDS``.
    reason : str
        Why, in a few words with the figures.
    independent : float
        Independent samples behind the number (NaN where not known).
    first_half, second_half : float
        The estimate from each half of production (NaN where a half gave none).
    halves_z : float
        |first − second| over their combined standard error (NaN where not known).
    """

    word: str
    reason: str
    independent: float
    first_half: float
    second_half: float
    halves_z: float


def judge(*, independent, first, d_first, second, d_second, crossings=None, what="it",
          floor=MIN_INDEPENDENT, z_max=HALVES_Z):
    """One verdict from the figures of one number.

    Parameters
    ----------
    independent : float
        Independent samples behind the number.
    first, d_first, second, d_second : float
        Estimates from the first and second half of production and their standard errors.
    crossings : int, optional
        For exchange runs: walkers that visited both sides of the boundary the number
        depends on. None where it does not apply.
    what : str
        What the crossings cross, for the reason (e.g. "the C7ax boundary").
    """
    z = _halves_z(first, d_first, second, d_second)
    base = dict(independent=float(independent), first_half=float(first), second_half=float(second),
                halves_z=z)
    if not independent >= floor:                       # NaN counts as too few
        shown = "no" if not np.isfinite(independent) else f"only {independent:.0f}"
        return Verdict(TOO_FEW, f"{shown} independent samples (at least {floor} needed)", **base)
    if crossings is not None and crossings < 1:
        return Verdict(TOO_FEW, f"no walker has crossed {what}", **base)
    if not np.isfinite(z):
        return Verdict(TOO_FEW, "a half of production gives no estimate", **base)
    if z > z_max:
        return Verdict(DRIFTING, f"halves differ by {z:.1f} combined errors "
                                 f"({_show(first)} then {_show(second)})", **base)
    return Verdict(SETTLED, f"halves agree within {z:.1f} combined errors; "
                            f"{independent:.0f} independent samples", **base)


def _halves_z(first, d_first, second, d_second):
    values = np.array([first, d_first, second, d_second], dtype=float)
    if not np.all(np.isfinite(values)):
        return math.nan
    combined = math.hypot(d_first, d_second)
    if combined == 0.0:
        return 0.0 if first == second else math.inf
    return abs(first - second) / combined


def _show(value):
    return f"{value:.3g}"


def count_effective(w_n):
    """Kish's effective sample size (Σw)² / Σw² of weighted samples.

    Parameters
    ----------
    w_n : array_like, shape (n_samples,)
        Non-negative weights (e.g. MBAR target weights of the samples in a basin).

    Returns
    -------
    float
        Between 1 and n_samples for any non-zero weights; 0 for none.

    References
    ----------
    L. Kish, Survey Sampling (Wiley, 1965) — the design-effect sample size.
    """
    w_n = np.asarray(w_n, dtype=float)
    total = w_n.sum()
    if total <= 0.0:
        return 0.0
    return float(total**2 / np.sum(w_n**2))


def count_crossing_walkers(inside_rt, present_rt=None):
    """Walkers that have been both inside and outside a region.

    inside_rt : ndarray, shape (n_walkers, n_cycles), dtype bool
        Whether walker r's configuration lay in the region at cycle t.
    present_rt : same shape, optional: the cycles each walker ran (default: all)
    """
    inside_rt = np.asarray(inside_rt, dtype=bool)
    present_rt = np.ones_like(inside_rt) if present_rt is None else np.asarray(present_rt, dtype=bool)
    return int(np.sum((inside_rt & present_rt).any(axis=1) & (~inside_rt & present_rt).any(axis=1)))
