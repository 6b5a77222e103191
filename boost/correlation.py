"""Statistical inefficiency and equilibration detection in O(T log T), pure numpy.

Definitions, for a series a_t, t = 0 … T-1, with fluctuations δa_t = a_t - mean(a):

- ``C_t[t]`` : normalized autocorrelation at lag t,
  Σ_{n<T-t} δa_n δa_{n+t} / ((T - t) σ²), σ² = Σ δa_n² / T, so C(0) = 1.
- ``g`` : statistical inefficiency 1 + 2 Σ_{t≥1} (1 - t/T) C(t), in samples. The sum
  stops at the first lag t > 3 with C(t) ≤ 0 (the correlation has sunk into noise) and
  g is at least 1: the estimator of pymbar's ``timeseries.statistical_inefficiency``
  (fast=False), whose lagged sums cost O(T × lag); here they come from one FFT.
- ``t0`` : equilibration time, the origin maximizing N_eff = (T - t0) / g(t0) [1]_.

References
----------
.. [1] J. D. Chodera, "A simple method for automated equilibration detection in
   molecular simulations", J. Chem. Theory Comput. 12, 1799 (2016),
   doi:10.1021/acs.jctc.5b00784.
"""

import numpy as np

from boost.exceptions import AnalysisError

#: Correlations at lags up to this are always summed, even if negative (as pymbar).
MIN_LAG = 3
# Lags read at first per block: at least this many in equilibration detection, exactly
# this many in compute_statistical_inefficiency (more only when C(t) has not reached 0).
_MIN_LAGS = 512
_FIRST_LAGS = 1 << 14


def compute_statistical_inefficiency(series):
    """Statistical inefficiency g of a series (see the module docstring).

    The lagged sums come block by block from FFTs of blocks of L samples, zero padded to
    2L so no lag wraps around: O(T log L). L starts at ``_FIRST_LAGS`` and grows until
    C(t) drops to zero within it; at L = T this is one zero-padded FFT of the series.

    Parameters
    ----------
    series : array_like, shape (T,)
        Values at equal intervals, any unit; T ≥ 2 and not constant.

    Returns
    -------
    g : float, in samples
    """
    a_t = _centred(series, 2)
    n = a_t.size
    lags = min(n, _FIRST_LAGS)
    while True:
        size = _fft_size(2 * lags)
        sum_t = sum(_block_lagged_sum(a_t, start, start + lags, lags, size)
                    for start in range(0, n, lags))
        C_t = sum_t / (np.arange(n, n - lags, -1) * (sum_t[0] / n))
        g, complete = _truncated_sum(C_t, n)
        if complete:
            return float(g)
        lags = min(n, 8 * lags)


def detect_equilibration(series, *, n_origins=100):
    """Equilibration time t0 maximizing (T - t0) / g(t0) over evenly spaced origins [1]_.

    The candidates are t0 = 0, s, 2s, … with s = max(1, T // n_origins), the grid
    pymbar's ``detect_equilibration(nskip=s)`` searches; g(t0) is the estimator of
    :func:`compute_statistical_inefficiency` on a[t0:], exactly, not an approximation.
    A constant tail counts as one sample (g = T - t0).

    Parameters
    ----------
    series : array_like, shape (T,)
        Values at equal intervals, any unit; T ≥ 3 and not constant.
    n_origins : int, optional
        About this many candidate origins are tried.

    Returns
    -------
    t0 : int
    g : float, in samples
        Statistical inefficiency of a[t0:].
    """
    a_t = _centred(series, 3)   # centred: keeps the moment sums free of cancellation
    stride = max(1, a_t.size // n_origins)
    origin_j = np.arange(0, a_t.size - 1, stride)
    g_j = _origin_inefficiencies(a_t, origin_j, stride)
    n_effective_j = (a_t.size - origin_j) / g_j
    best = int(np.argmax(n_effective_j))
    return int(origin_j[best]), float(g_j[best])


def _origin_inefficiencies(a_t, origin_j, stride):
    """g of a[o:] for every origin o in ``origin_j`` (spaced ``stride`` apart).

    Why this is fast and still exact: the lagged sum of a[o:] at lag t is the sum over
    the blocks [o_i, o_i + stride) at or after o of Σ_{n in block} a_n a_{n+t}. One FFT
    per block gives those for lags up to L, a running sum from the last block back gives
    every origin in turn, and prefix sums of a correct for each origin's own mean: about
    O(T log L + n_origins × L) instead of an O(T log T) FFT per origin. An origin whose
    correlation has not dropped to zero within L lags is recomputed in full.
    """
    n = a_t.size
    lags = min(n, max(stride, _MIN_LAGS))
    size = _fft_size(stride + lags)  # block plus reach: no lag wraps around
    prefix = np.concatenate([[0.0], np.cumsum(a_t)])
    constant_j = _constant_tails(a_t, origin_j)
    running_t = np.zeros(lags)
    g_j = np.empty(origin_j.size)
    for j in range(origin_j.size - 1, -1, -1):
        start = origin_j[j]
        stop = n if j == origin_j.size - 1 else origin_j[j + 1]
        running_t += _block_lagged_sum(a_t, start, stop, lags, size)
        if constant_j[j]:
            g_j[j] = n - start   # one sample's worth, as pymbar counts a constant tail
            continue
        C_t = _origin_correlation(running_t, prefix, start)
        g_j[j], complete = _truncated_sum(C_t, n - start)
        if not complete:
            g_j[j] = compute_statistical_inefficiency(a_t[start:])
    return g_j


def _block_lagged_sum(a_t, start, stop, lags, size):
    """Σ_{start ≤ n < stop, n + t < T} a_n a_{n+t} for lags t < ``lags``."""
    block = np.fft.rfft(a_t[start:stop], size)
    reach = np.fft.rfft(a_t[start:stop + lags], size)
    return np.fft.irfft(block.conj() * reach, size)[:lags]


def _origin_correlation(sum_t, prefix, origin):
    """C(t) of a[origin:] from its raw lagged sums ``sum_t`` and the prefix sums of a."""
    n, t = prefix.size - 1, np.arange(sum_t.size)
    count = n - origin
    mean = (prefix[n] - prefix[origin]) / count
    head_t = prefix[np.clip(n - t, origin, n)] - prefix[origin]    # Σ a_n, origin ≤ n < T - t
    tail_t = prefix[n] - prefix[np.clip(origin + t, origin, n)]    # Σ a_n, origin + t ≤ n < T
    pairs_t = np.maximum(count - t, 1)
    centred_t = sum_t - mean * (head_t + tail_t) + pairs_t * mean**2
    return centred_t / (pairs_t * (centred_t[0] / count))


def _truncated_sum(C_t, count):
    """g by pymbar's truncation rule, and whether the stop lies within ``C_t``.

    Lags 1 ≤ t < stop are summed, stop being the first t > MIN_LAG with C(t) ≤ 0, or
    count - 1 (the last lag pymbar visits is count - 2).
    """
    t = np.arange(C_t.size)
    stops = np.flatnonzero(((C_t <= 0.0) & (t > MIN_LAG)) | (t >= count - 1))
    if stops.size == 0:
        return 1.0, False
    used = slice(1, stops[0])
    g = 1.0 + 2.0 * np.sum(C_t[used] * (1.0 - t[used] / count))
    return max(g, 1.0), True


def _constant_tails(a_t, origin_j):
    """Whether a[o:] is constant, for every origin o in ``origin_j``."""
    high_j = np.maximum.accumulate(np.maximum.reduceat(a_t, origin_j)[::-1])[::-1]
    low_j = np.minimum.accumulate(np.minimum.reduceat(a_t, origin_j)[::-1])[::-1]
    return high_j == low_j


def _centred(series, shortest):
    a_t = np.asarray(series, dtype=float)
    if a_t.ndim != 1 or a_t.size < shortest or not np.all(np.isfinite(a_t)) or np.ptp(a_t) == 0:
        raise AnalysisError(f"series must be 1-D, finite, not constant, with {shortest} or more "
                            f"samples; got shape {a_t.shape}")
    return a_t - a_t.mean()


def _fft_size(n):
    """The smallest 2^i 3^j 5^k ≥ n: numpy's FFT is fast on those lengths."""
    best = 1 << int(np.ceil(np.log2(max(n, 1))))
    power3 = 1
    while power3 < best:
        power5 = power3
        while power5 < best:
            candidate = power5 * (1 << max(0, int(np.ceil(np.log2(n / power5)))))
            best = min(best, candidate)
            power5 *= 5
        power3 *= 3
    return best
