"""Moving-block bootstrap over cycles, shared by every condition of an exchange run.

An exchange run's samples are correlated across conditions: a walker carries its
configuration from one condition to the next, so per-condition decorrelation misses part
of the correlation and MBAR's asymptotic errors come out too small. Resampling whole
ranges of cycles, the same ranges for every condition, keeps every correlation shorter
than a block inside the replicate, whichever conditions it spans [1]_ [2]_.

Pure numpy: no OpenMM, no pymbar. Array names: ``count_bt[b, t]`` is how many times
replicate b takes cycle t (of the cycles being resampled); ``value_bs[b, s]`` is
statistic s of replicate b.

References
----------
.. [1] H. R. Künsch, "The jackknife and the bootstrap for general stationary
   observations", Ann. Statist. 17, 1217 (1989), doi:10.1214/aos/1176347265.
.. [2] P. Hall, J. L. Horowitz and B.-Y. Jing, "On blocking rules for the bootstrap with
   dependent data", Biometrika 82, 561 (1995), doi:10.1093/biomet/82.3.561.
"""

import math
from dataclasses import dataclass

import numpy as np

from .exceptions import AnalysisError

#: Block length in units of the largest statistical inefficiency g = 1 + 2τ seen along a
#: walker. Blocks cut the correlations that straddle their edges: for a correlation
#: exp(-t/τ) the block bootstrap's variance falls short by about τ / L = (g - 1) / (2 L)
#: [1]_, a sixth at L = 3 g (8 % of the error bar), while its own noise grows as
#: sqrt(4 L / (3 n)) [2]_. Balancing the two (the mean squared error, optimal L ∝ n^(1/3)
#: [2]_) gives L ≈ 2.4 g for the double-well ladder example (g ≈ 56 cycles of 2000);
#: 3 g leans to the side of the smaller bias, which is what coverage needs. g is the
#: largest over many observables and walkers, an upper estimate for the one estimated.
BLOCK_MULTIPLIER = 3
#: Fewest blocks a production must hold for a block bootstrap: with 10, the error bar's
#: own relative error is about sqrt(1 / (3 n_blocks)) = 18 % [2]_.
MIN_BLOCKS = 10
#: Two-sided level of the reported intervals.
LEVEL = 0.95


@dataclass(frozen=True, eq=False)
class BootstrapResult:
    """Replicate statistics and their spread.

    Attributes
    ----------
    value_bs : ndarray, shape (n_converged, n_statistics)
        Statistics of the replicates whose estimate succeeded.
    n_failed : int
        Replicates whose estimate raised AnalysisError (not in ``value_bs``).
    error_s, low_s, high_s : ndarray, shape (n_statistics,)
        Standard deviation over replicates and the 2.5 / 97.5 percentiles, from the
        replicates where the statistic is finite; NaN where fewer than two are.
    """

    value_bs: np.ndarray
    n_failed: int
    error_s: np.ndarray
    low_s: np.ndarray
    high_s: np.ndarray


def choose_block_length(g, n_cycles, *, multiplier=BLOCK_MULTIPLIER, min_blocks=MIN_BLOCKS):
    """Block length in cycles from the largest statistical inefficiency ``g`` (cycles).

    Returns
    -------
    block : int
        ``ceil(multiplier * g)``, shortened so that ``min_blocks`` blocks fit.
    shortened : bool
        True when the production was too short for the length ``g`` asks for.

    Raises
    ------
    AnalysisError
        If ``n_cycles`` is below ``min_blocks``: no block length makes a useful bootstrap.
    """
    check_cycles(n_cycles, min_blocks)
    wanted = max(1, math.ceil(multiplier * max(float(g), 1.0)))
    longest = n_cycles // min_blocks
    return min(wanted, longest), wanted > longest


def check_cycles(n_cycles, min_blocks=MIN_BLOCKS):
    if n_cycles < min_blocks:
        raise AnalysisError(f"a block bootstrap needs at least {min_blocks} production cycles to resample; "
                            f"{n_cycles} are analysed. Run longer, or set analysis.uncertainty.method: asymptotic.")


def draw_cycle_counts(n_cycles, block, n_resamples, rng):
    """How often each cycle enters each replicate of a moving-block bootstrap.

    A replicate takes blocks of ``block`` consecutive cycles, starting anywhere a whole
    block fits, with replacement, until it holds ``n_cycles`` cycles (the last block is
    cut short). The same counts apply to every condition.

    Returns
    -------
    count_bt : ndarray, shape (n_resamples, n_cycles), dtype int
    """
    if not 1 <= block <= n_cycles:
        raise AnalysisError(f"block must be 1 to {n_cycles} cycles; got {block}")
    n_blocks = math.ceil(n_cycles / block)
    start_bj = rng.integers(0, n_cycles - block + 1, size=(n_resamples, n_blocks))
    cycle_bl = (start_bj[:, :, None] + np.arange(block)).reshape(n_resamples, -1)[:, :n_cycles]
    count_bt = np.zeros((n_resamples, n_cycles), dtype=int)
    np.add.at(count_bt, (np.arange(n_resamples)[:, None], cycle_bl), 1)
    return count_bt


def run_replicates(estimate, count_bt):
    """Apply ``estimate`` to each replicate's cycle counts and summarise the spread.

    Parameters
    ----------
    estimate : callable
        ``estimate(count_t)`` returns a 1-D array of statistics (the same length every
        time) or raises AnalysisError when the replicate cannot be estimated (e.g. MBAR
        does not converge); such replicates are counted, not used.
    count_bt : ndarray, shape (n_resamples, n_cycles), dtype int

    Returns
    -------
    BootstrapResult
    """
    values, failed = [], 0
    for count_t in count_bt:
        try:
            values.append(np.asarray(estimate(count_t), dtype=float))
        except AnalysisError:
            failed += 1
    if not values:
        return BootstrapResult(np.zeros((0, 0)), failed, np.array([]), np.array([]), np.array([]))
    value_bs = np.array(values)
    return BootstrapResult(value_bs, failed, *summarise(value_bs))


def summarise(value_bs, level=LEVEL):
    """Standard deviation and central ``level`` percentile interval per column, over finite entries."""
    tail = 100.0 * (1.0 - level) / 2.0
    finite_bs = np.where(np.isfinite(value_bs), value_bs, np.nan)
    enough = np.sum(np.isfinite(finite_bs), axis=0) >= 2
    error_s, low_s, high_s = (np.full(value_bs.shape[1], np.nan) for _ in range(3))
    if enough.any():
        kept = finite_bs[:, enough]
        error_s[enough] = np.nanstd(kept, axis=0, ddof=1)
        low_s[enough], high_s[enough] = np.nanpercentile(kept, [tail, 100.0 - tail], axis=0)
    return error_s, low_s, high_s
