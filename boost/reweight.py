"""Decorrelation and MBAR reweighting: free energies, PMFs and basin populations.

Everything here works on dimensionless reduced potentials and never touches OpenMM.
The reduced potential of a sample x in condition k is
u_k(x) = β_k [U(x) + w_k(ξ(x))] (+ β_k p V), so every energy below is in kT.

Array names follow pymbar's index-suffix convention:

- ``u_kn[k, n]`` : reduced potential (kT) of sample n evaluated in condition k.
- ``N_k[k]`` : number of samples drawn from condition k; the samples (columns of
  ``u_kn``) are ordered by condition of origin, the first ``N_k[0]`` from condition 0
  and so on. ``N_k[k] = 0`` is allowed (a condition evaluated but never sampled).
- ``u_n[n]`` : reduced potential (kT) of sample n in the target condition, usually the
  unbiased one at the temperature of interest.
- ``f_k[k]`` : reduced free energy (kT) of condition k relative to condition 0.
- ``Deltaf_ij[i, j]`` : f_j - f_i (kT); ``dDeltaf_ij`` its standard error.

References
----------
.. [1] M. R. Shirts and J. D. Chodera, "Statistically optimal analysis of samples from
   multiple equilibrium states", J. Chem. Phys. 129, 124105 (2008),
   doi:10.1063/1.2978177.
.. [2] J. D. Chodera, "A simple method for automated equilibration detection in
   molecular simulations", J. Chem. Theory Comput. 12, 1799 (2016),
   doi:10.1021/acs.jctc.5b00784.
"""

import logging
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.sparse.csgraph import connected_components
from scipy.special import logsumexp

from boost.correlation import detect_equilibration
from boost.exceptions import AnalysisError, ConvergenceWarning, PoorOverlapWarning


def _import_pymbar_quietly():
    """Import pymbar with its import-time banners (JAX, timeseries caveat) muted.

    pymbar 4 logs them as warnings on the ``pymbar`` logger tree while its modules load;
    the level is raised only for the import, so later pymbar warnings still show.
    """
    pymbar_logger = logging.getLogger("pymbar")
    level = pymbar_logger.level
    pymbar_logger.setLevel(logging.ERROR)
    try:
        import pymbar
    finally:
        pymbar_logger.setLevel(level)
    return pymbar


pymbar = _import_pymbar_quietly()

#: Overlap matrix elements below this do not connect two conditions (common practice).
OVERLAP_THRESHOLD = 0.03
#: Fewer effectively uncorrelated samples than this raise a ConvergenceWarning.
MIN_EFFECTIVE_SAMPLES = 10
# pymbar refuses weight matrices whose columns do not sum to 1 within this tolerance.
_NORMALIZATION_TOLERANCE = 1.0e-4
# Singular directions of I - W N W^T smaller than this are dropped, as pymbar does.
_PINV_TOLERANCE = 1.0e-10
# pymbar solver settings for a warm start: scipy's hybr root search, with pymbar's
# adaptive Newton / self-consistent method if it misses. Measured on bootstrap resamples
# of the double-well examples: 20 ms per solve (8 rungs, 3,000 samples) and 0.5 s (25
# windows, 19,000 samples), about half the time adaptive alone took.
#: Problems with more samples than this are first solved on about _COARSE_SAMPLES of them.
_COARSE_ABOVE = 20_000
_COARSE_SAMPLES = 5_000
_WARM_START_SOLVER = (dict(method="hybr", tol=1.0e-10), dict(method="adaptive", options=dict(min_sc_iter=0)))


@dataclass(frozen=True, eq=False)
class Decorrelation:
    """Equilibrated, effectively uncorrelated part of one time series.

    Attributes
    ----------
    t0 : int
        Index of the first sample kept; earlier samples are equilibration.
    g : float
        Statistical inefficiency g = 1 + 2τ of the series from ``t0`` on, in samples.
    n_effective : float
        (T - t0) / g, the number of effectively uncorrelated samples.
    indices : ndarray, shape (n_kept,), dtype int
        Indices into the original series of the subsampled samples.
    """

    t0: int
    g: float
    n_effective: float
    indices: np.ndarray


@dataclass(frozen=True, eq=False)
class Profile:
    """A PMF on a grid of bins in the target condition.

    Attributes
    ----------
    edges, centres : list of ndarray, shapes (n_bins_d + 1,) and (n_bins_d,)
        Bin edges and centres per dimension, in the coordinate's own units.
    f : ndarray, shape (n_bins_0[, n_bins_1]), in kT
        -ln of each bin's probability (not a density), zero at the lowest bin; NaN
        where the bin holds no sample, +inf where its samples have no target weight.
    df : ndarray, shape like ``f``, in kT
        Standard error of f relative to the lowest bin (zero there), as pymbar's FES
        reports with ``reference_point='from-lowest'``; NaN where f is NaN or +inf.
    counts : ndarray, shape like ``f``, dtype int
        Number of samples (from all conditions) in each bin.
    """

    edges: list
    centres: list
    f: np.ndarray
    df: np.ndarray
    counts: np.ndarray


@dataclass(frozen=True, eq=False)
class Basins:
    """Populations of named basins in the target condition and ΔG between them.

    Attributes
    ----------
    names : tuple of str, length n_basins
    populations, d_populations : ndarray, shape (n_basins,)
        Fraction of the whole target ensemble in each basin, and its standard error.
    Delta_g, d_Delta_g : ndarray, shape (n_basins, n_basins), in kT
        ``Delta_g[i, j] = -ln(p_j / p_i)``, free energy of basin j minus basin i, and
        its standard error, which includes the correlation between p_i and p_j.
    """

    names: tuple
    populations: np.ndarray
    d_populations: np.ndarray
    Delta_g: np.ndarray
    d_Delta_g: np.ndarray


def decorrelate(series, *, max_origins=100):
    """Discard equilibration and subsample a series to uncorrelated samples.

    The equilibration time t0 maximizes the number of effectively uncorrelated samples
    (T - t0) / g(t0) [2]_ (:func:`boost.correlation.detect_equilibration`, the estimator
    of pymbar.timeseries.detect_equilibration in O(T log T)); the rest is subsampled at
    the rounded multiples of g, as pymbar.timeseries.subsample_correlated_data does. A
    constant series is treated as uncorrelated: t0 = 0, g = 1, every sample kept.

    Parameters
    ----------
    series : array_like, shape (T,)
        An observable recorded at equal intervals (e.g. a reduced potential).
    max_origins : int, optional
        About this many evenly spaced candidates for t0 are tried.

    Returns
    -------
    Decorrelation

    Warns
    -----
    ConvergenceWarning
        If fewer than ``MIN_EFFECTIVE_SAMPLES`` effectively uncorrelated samples remain.
    """
    a_t = np.asarray(series, dtype=float)
    if a_t.ndim != 1 or a_t.size == 0 or not np.all(np.isfinite(a_t)):
        raise AnalysisError(f"series must be 1-D, non-empty, finite; got shape {a_t.shape}")
    n_total = a_t.size
    t0, g = 0, 1.0
    if n_total >= 3 and np.ptp(a_t) > 0.0:
        t0, g = detect_equilibration(a_t, n_origins=max_origins)
    n_effective = (n_total - t0) / g
    if n_effective < MIN_EFFECTIVE_SAMPLES:
        warnings.warn(
            f"series of {n_total} samples holds only {n_effective:.1f} effectively "
            f"uncorrelated samples after equilibration (t0 = {t0}, g = {g:.1f})",
            ConvergenceWarning,
            stacklevel=2,
        )
    indices = t0 + subsample_indices(n_total - t0, g)
    return Decorrelation(t0=t0, g=g, n_effective=n_effective, indices=indices)


def subsample_indices(n_samples, g):
    """Indices round(i g), i = 0, 1, …, below ``n_samples``: about n_samples / g of them.

    Parameters
    ----------
    n_samples : int
    g : float, in samples
        Statistical inefficiency, at least 1.

    Returns
    -------
    indices : ndarray, shape (n_kept,), dtype int
    """
    indices = np.round(np.arange(0.0, n_samples, g)).astype(int)
    kept = (indices < n_samples) & np.concatenate([[True], np.diff(indices) > 0])  # sorted: drop repeats
    return indices[kept]


class Reweighting:
    """MBAR [1]_ solved once on samples from several conditions, then reweighted at will.

    Parameters
    ----------
    u_kn : array_like, shape (n_conditions, n_samples), in kT
        Reduced potential of every sample in every condition; +inf is allowed where a
        sample is impossible in a condition (not in its own), NaN and -inf are not.
    N_k : array_like, shape (n_conditions,), dtype int
        Samples drawn from each condition, in the column order of ``u_kn``.
    overlap_threshold : float, optional
        Overlap matrix element from which two conditions count as connected.
    initial_f_k : array_like, shape (n_conditions,), in kT, optional
        Starting guess for the free energies (a nearby solution converges in a few steps).
    errors : bool, optional
        False skips the asymptotic errors and the overlap matrix (``df_k``,
        ``dDeltaf_ij`` are NaN, ``overlap`` is None): the cheap form for resampling.

    Warns
    -----
    PoorOverlapWarning
        If the sampled conditions fall apart into groups that are not connected.
    """

    def __init__(self, u_kn, N_k, *, overlap_threshold=OVERLAP_THRESHOLD, initial_f_k=None, errors=True):
        self._u_kn, self._N_k = _check_u_kn(u_kn, N_k)
        self._mbar = _solve(self._u_kn, self._N_k, initial_f_k)
        if not errors:
            f_k = self._mbar.f_k - self._mbar.f_k[0]
            self._Deltaf_ij = _read_only(f_k[None, :] - f_k[:, None])
            self._dDeltaf_ij = _read_only(np.full_like(self._Deltaf_ij, np.nan))
            self._overlap = None
            return
        with np.errstate(invalid="ignore"):  # NaN errors mean no overlap; warned below
            result = self._mbar.compute_free_energy_differences()
        self._Deltaf_ij = _read_only(result["Delta_f"])
        self._dDeltaf_ij = _read_only(result["dDelta_f"])
        if self._N_k.size == 1:  # pymbar's eigenvalue gap needs two conditions
            self._overlap = _read_only(np.ones((1, 1)))
        else:
            self._overlap = _read_only(self._mbar.compute_overlap()["matrix"])
        _warn_on_poor_overlap(self._overlap, self._N_k, overlap_threshold)

    def subset(self, columns, *, errors=False):
        """MBAR re-solved on a subset or multiset of this one's samples, warm-started here.

        Parameters
        ----------
        columns : array_like, dtype int
            Column indices into ``u_kn``; repeats count a sample several times. A
            bootstrap replicate, or a prefix of the production for estimates in time.
        errors : bool, optional
            As for the constructor; False (the default) is the cheap form.

        Returns
        -------
        Reweighting
            Its samples are the chosen columns, regrouped by condition of origin.

        Raises
        ------
        AnalysisError
            If MBAR does not converge on the subset.
        """
        columns = np.sort(np.asarray(columns, dtype=int))   # keeps samples grouped by origin
        origin_n = np.repeat(np.arange(self._N_k.size), self._N_k)
        N_k = np.bincount(origin_n[columns], minlength=self._N_k.size)
        return Reweighting(self._u_kn[:, columns], N_k, initial_f_k=self._mbar.f_k, errors=errors)

    def target_weights(self, u_n):
        """Normalized MBAR weights of the samples in the target condition.

        Parameters
        ----------
        u_n : array_like, shape (n_samples,), in kT
            Reduced potential of every sample in the target condition.

        Returns
        -------
        ndarray, shape (n_samples,)
            Non-negative, summing to 1: the probability of the target each sample carries.
        """
        return self._target_weights(self._check_u_n(u_n))

    @property
    def f_k(self):
        """ndarray, shape (n_conditions,), in kT: free energies relative to condition 0."""
        return self._Deltaf_ij[0]

    @property
    def df_k(self):
        """ndarray, shape (n_conditions,), in kT: standard errors of ``f_k``."""
        return self._dDeltaf_ij[0]

    @property
    def Deltaf_ij(self):
        """ndarray, shape (n_conditions, n_conditions), in kT: f_j - f_i."""
        return self._Deltaf_ij

    @property
    def dDeltaf_ij(self):
        """ndarray, shape (n_conditions, n_conditions), in kT: errors of ``Deltaf_ij``."""
        return self._dDeltaf_ij

    @property
    def overlap(self):
        """ndarray, shape (n_conditions, n_conditions): MBAR overlap matrix (None without errors).

        Element [i, j] estimates the probability that a sample from condition i is
        observed in condition j (pymbar's compute_overlap); sampled rows sum to 1.
        """
        return self._overlap

    def compute_target_free_energy(self, u_n):
        """Free energy of the target condition relative to condition 0.

        Parameters
        ----------
        u_n : array_like, shape (n_samples,), in kT
            Reduced potential of every sample in the target condition.

        Returns
        -------
        f, df : float, in kT
            The free energy and its standard error.
        """
        u_ln = np.vstack([self._u_kn[0], self._check_u_n(u_n)])
        result = self._mbar.compute_perturbed_free_energies(u_ln)
        return float(result["Delta_f"][0, 1]), float(result["dDelta_f"][0, 1])

    def compute_pmf(self, u_n, values, edges):
        """PMF of the target condition on a grid of bins along one or two coordinates.

        Each populated bin is an extra MBAR state with u_n inside the bin and +inf
        outside; its free energy is -ln p_b and MBAR's asymptotic covariance [1]_ gives
        the errors. The result equals pymbar's FES histogram ('from-lowest',
        analytical errors) at O(n_samples × n_conditions²) cost, since bins are
        disjoint. Samples outside the grid are ignored; the last edge belongs to the
        last bin, as in numpy.histogram. Wrap periodic coordinates into the edges first.

        Parameters
        ----------
        u_n : array_like, shape (n_samples,), in kT
            Reduced potential of every sample in the target condition.
        values : array_like, shape (n_samples,) or (n_samples, d), d in {1, 2}
            Coordinate values of every sample, in the units of ``edges``.
        edges : sequence of d array_like, each shape (n_bins_d + 1,)
            Increasing bin edges per dimension.

        Returns
        -------
        Profile
        """
        u_n = self._check_u_n(u_n)
        bin_n, edges, shape = bin_samples(values, edges, u_n.size)
        w_n = self._target_weights(u_n)
        inside = bin_n >= 0
        counts = np.bincount(bin_n[inside], minlength=int(np.prod(shape)))
        p_b = np.bincount(bin_n[inside], weights=w_n[inside], minlength=counts.size)
        populated = np.flatnonzero(p_b > 0)
        if populated.size == 0:
            raise AnalysisError("no sample with weight in the target lies inside the edges")
        f, df = np.full(counts.size, np.nan), np.full(counts.size, np.nan)
        with np.errstate(divide="ignore"):
            f[counts > 0] = -np.log(p_b[counts > 0])
        lowest = np.argmin(f[populated])
        f -= f[populated[lowest]]
        rank_b = np.full(counts.size + 1, -1)  # populated bins renumbered; -1 elsewhere
        rank_b[populated] = np.arange(populated.size)
        sampled = self._N_k > 0
        a_nk = self._mbar.weights()[:, sampled] * np.sqrt(self._N_k[sampled])
        theta_b, theta_bl = _bin_covariance(a_nk, rank_b[bin_n], w_n, p_b[populated],
                                            lowest)
        d2 = theta_b + theta_b[lowest] - 2.0 * theta_bl
        df[populated] = np.sqrt(np.clip(d2, 0.0, None))
        return Profile(
            edges=edges,
            centres=[0.5 * (e[1:] + e[:-1]) for e in edges],
            f=f.reshape(shape),
            df=df.reshape(shape),
            counts=counts.reshape(shape),
        )

    def compute_basins(self, u_n, masks):
        """Populations of basins in the target condition and ΔG between them.

        Each basin is an extra MBAR state with u_n inside the basin and +inf outside, so
        its free energy relative to the target is -ln p; MBAR's covariance of these
        perturbed free energies [1]_ makes the errors of differences account for the
        correlation between basins. Basins may overlap and need not cover everything.

        Parameters
        ----------
        u_n : array_like, shape (n_samples,), in kT
            Reduced potential of every sample in the target condition.
        masks : dict of str to ndarray, shape (n_samples,), dtype bool
            Which samples lie in each basin.

        Returns
        -------
        Basins
        """
        u_n = self._check_u_n(u_n)
        names, mask_bn = _check_masks(masks, u_n.size)
        w_n = self._target_weights(u_n)
        for name, mask in zip(names, mask_bn):
            if not np.any(w_n[mask] > 0):
                raise AnalysisError(f"basin '{name}' holds no sample with target weight")
        u_ln = np.vstack([u_n, np.where(mask_bn, u_n, np.inf)])
        result = self._mbar.compute_perturbed_free_energies(u_ln)
        populations = np.exp(-result["Delta_f"][0, 1:])
        return Basins(
            names=names,
            populations=populations,
            d_populations=populations * result["dDelta_f"][0, 1:],
            Delta_g=np.array(result["Delta_f"][1:, 1:]),
            d_Delta_g=np.array(result["dDelta_f"][1:, 1:]),
        )

    def _check_u_n(self, u_n):
        return _check_energies(u_n, (self._u_kn.shape[1],), "u_n")

    def _target_weights(self, u_n):
        """Normalized MBAR weights of the samples in the target (Eq. 9 of [1]_)."""
        sampled = self._N_k > 0
        log_denominator_n = logsumexp(self._mbar.f_k[sampled, None] - self._u_kn[sampled],
                                      b=self._N_k[sampled, None], axis=0)
        log_w_n = -u_n - log_denominator_n
        return np.exp(log_w_n - logsumexp(log_w_n))


def _bin_covariance(a_nk, bin_n, w_n, p_b, lowest):
    """Covariance of populated bins' free energies: its diagonal and column ``lowest``.

    Theta = W_b^T (I - W N W^T)^+ W_b for new states without samples (Eq. D4 of [1]_).
    With A = W N^½ = U S V^T over the sampled conditions (``a_nk``, all samples), the
    pseudo-inverse gives Theta = W_b^T W_b + (W_b^T U) diag(c) (U^T W_b) with
    c = s² / (1 - s²), and c = 0 on the null direction (the constant vector, whose term
    cancels in every difference). Bins are disjoint, so W_b^T W_b is diagonal.
    ``bin_n`` numbers the populated bin of each sample (-1: none), ``w_n`` holds the
    target weights and ``p_b`` the populated bins' probabilities.
    """
    used = (bin_n >= 0) & (w_n > 0)
    bin_n, w_n = bin_n[used], w_n[used]
    s2, v = np.linalg.eigh(a_nk.T @ a_nk)
    keep = s2 > _PINV_TOLERANCE
    s2, v = s2[keep], v[:, keep]
    gap = 1.0 - s2
    c = np.where(gap > _PINV_TOLERANCE, s2 / np.where(gap > 0, gap, 1.0), 0.0)
    wa_bk = np.zeros((p_b.size, a_nk.shape[1]))
    np.add.at(wa_bk, bin_n, w_n[:, None] * a_nk[used])
    wu_bi = (wa_bk @ v) / np.sqrt(s2) / p_b[:, None]
    q_b = np.bincount(bin_n, weights=w_n**2, minlength=p_b.size) / p_b**2
    theta_b = q_b + np.einsum("bi,i,bi->b", wu_bi, c, wu_bi)
    theta_bl = wu_bi @ (c * wu_bi[lowest])
    theta_bl[lowest] += q_b[lowest]
    return theta_b, theta_bl


def _solve(u_kn, N_k, initial_f_k):
    """pymbar's MBAR solution, checked: AnalysisError when its weights are not normalized.

    Without a starting point, a large problem starts from the solution on an evenly
    thinned set of its samples (a few thousand, solved in a fraction of the time): the
    warm-started solve then needs few steps, about a third less time for 10⁵ samples.
    A start from zero that fails is tried again from pymbar's BAR estimates between
    neighbouring conditions: free energies a hundred kT or more apart (a temperature or
    solute-scale ladder on a molecule of large energies) defeat pymbar's solvers from zero
    (seen with pymbar 4.0.3; tests/test_reweight.py).
    """
    if initial_f_k is None and u_kn.shape[1] > _COARSE_ABOVE:
        stride = u_kn.shape[1] // _COARSE_SAMPLES
        columns = np.arange(0, u_kn.shape[1], stride)
        origin = np.repeat(np.arange(N_k.size), N_k)
        try:
            guess = _solve_start(u_kn[:, columns], np.bincount(origin[columns], minlength=N_k.size)).f_k
            return _solve_once(u_kn, N_k, guess)
        except AnalysisError:
            pass                   # the thinned set did not overlap well enough: solve from zero
    if initial_f_k is not None:
        return _solve_once(u_kn, N_k, initial_f_k)
    return _solve_start(u_kn, N_k)


def _solve_start(u_kn, N_k):
    """Solved without a starting point: from zero, then from BAR estimates (see _solve)."""
    try:
        return _solve_once(u_kn, N_k, None)
    except AnalysisError:
        return _solve_once(u_kn, N_k, None, initialize="BAR")


def _solve_once(u_kn, N_k, initial_f_k, initialize="zeros"):
    protocol = None if initial_f_k is None else _WARM_START_SOLVER
    # a warm start's hand-over from hybr to adaptive is routine, not news: pymbar's log
    # is muted for it (the normalization check below catches real failures)
    pymbar_logger = logging.getLogger("pymbar")
    level = pymbar_logger.level
    if initial_f_k is not None:
        pymbar_logger.setLevel(logging.ERROR)
    try:
        mbar = pymbar.MBAR(u_kn, N_k, initial_f_k=initial_f_k, solver_protocol=protocol, initialize=initialize)
    except pymbar.utils.ParameterError as err:
        raise AnalysisError(f"MBAR could not be solved: {err}") from err
    finally:
        pymbar_logger.setLevel(level)
    with np.errstate(divide="ignore", invalid="ignore"):
        residual = np.max(np.abs(np.log(mbar.weights().sum(axis=0))))
    if not residual <= _NORMALIZATION_TOLERANCE:   # NaN fails too
        raise AnalysisError(
            f"MBAR did not converge: weights are off normalization by {residual:.2g} "
            "(expected below 1e-4); check u_kn and N_k"
        )
    return mbar


def _read_only(array):
    array = np.array(array, dtype=float)
    array.setflags(write=False)
    return array


def _check_energies(u, shape, name):
    u = np.array(u, dtype=float)
    if u.shape != shape:
        raise AnalysisError(f"{name} must have shape {shape}; got {u.shape}")
    if np.any(np.isnan(u)) or np.any(u == -np.inf):
        raise AnalysisError(f"{name} must hold finite numbers or +inf; got NaN or -inf")
    return u


def _check_u_kn(u_kn, N_k):
    N_k = np.asarray(N_k)
    if N_k.ndim != 1 or np.any(N_k < 0) or np.any(N_k != np.round(N_k)):
        raise AnalysisError(f"N_k must be a 1-D array of counts; got {N_k.tolist()}")
    N_k = N_k.astype(np.int64)
    u_kn = _check_energies(u_kn, (N_k.size, int(N_k.sum())), "u_kn (shape from N_k)")
    origin_n = np.repeat(np.arange(N_k.size), N_k)
    if not np.all(np.isfinite(u_kn[origin_n, np.arange(origin_n.size)])):
        raise AnalysisError("u_kn is infinite for some sample in its condition of origin")
    return u_kn, N_k


def _warn_on_poor_overlap(overlap, N_k, threshold):
    sampled = np.flatnonzero(N_k > 0)
    o = overlap[np.ix_(sampled, sampled)]
    n_groups, label = connected_components((o >= threshold) | (o.T >= threshold))
    if n_groups > 1:
        groups = "; ".join(str(sampled[label == g].tolist()) for g in range(n_groups))
        message = (f"sampled conditions split into {n_groups} groups with overlap "
                   f"below {threshold} between them: {groups}")
        warnings.warn(message, PoorOverlapWarning, stacklevel=3)


def _check_grid(values, edges, n_samples):
    x_nd = np.asarray(values, dtype=float)
    x_nd = x_nd[:, None] if x_nd.ndim == 1 else x_nd
    if x_nd.ndim != 2 or x_nd.shape[0] != n_samples or x_nd.shape[1] not in (1, 2):
        expected = f"({n_samples},) or ({n_samples}, d), d in (1, 2)"
        raise AnalysisError(f"values must have shape {expected}; got {np.shape(values)}")
    edges = [np.asarray(e, dtype=float) for e in edges]
    if len(edges) != x_nd.shape[1]:
        raise AnalysisError(f"edges must hold {x_nd.shape[1]} arrays; got {len(edges)}")
    for d, e in enumerate(edges):
        if e.ndim != 1 or e.size < 2 or np.any(np.diff(e) <= 0):
            raise AnalysisError(f"edges[{d}] must be 2 or more increasing numbers; got {e}")
    return x_nd, edges


def bin_samples(values, edges, n_samples):
    """Flat bin index of every sample on a grid, -1 outside it (as :meth:`Reweighting.compute_pmf` bins).

    Parameters
    ----------
    values : array_like, shape (n_samples,) or (n_samples, d), d in {1, 2}
    edges : sequence of d array_like, each shape (n_bins_d + 1,), increasing
    n_samples : int

    Returns
    -------
    bin_n : ndarray, shape (n_samples,), dtype int
    edges : list of ndarray
    shape : tuple of int, (n_bins_0[, n_bins_1])
    """
    x_nd, edges = _check_grid(values, edges, n_samples)
    shape = tuple(e.size - 1 for e in edges)
    return _bin_index(x_nd, edges, shape), edges, shape


def _bin_index(x_nd, edges, shape):
    """Flat bin index per sample, -1 outside the grid; the last edge is in the last bin."""
    index_nd = np.empty(x_nd.shape, dtype=int)
    outside = np.zeros(x_nd.shape[0], dtype=bool)
    for d, e in enumerate(edges):
        i = np.searchsorted(e, x_nd[:, d], side="right") - 1
        i[x_nd[:, d] == e[-1]] = e.size - 2
        outside |= (i < 0) | (i > e.size - 2)
        index_nd[:, d] = np.clip(i, 0, e.size - 2)
    flat = np.ravel_multi_index(tuple(index_nd.T), shape)
    flat[outside] = -1
    return flat


def _check_masks(masks, n_samples):
    if not masks:
        raise AnalysisError("masks must name at least one basin; got none")
    for name, mask in masks.items():
        mask = np.asarray(mask)
        if mask.shape != (n_samples,) or mask.dtype != bool:
            shape = f"bool of shape ({n_samples},); got {mask.dtype} {mask.shape}"
            raise AnalysisError(f"basin '{name}' mask must be {shape}")
        if not mask.any():
            raise AnalysisError(f"basin '{name}' holds no sample")
    return tuple(masks), np.array([np.asarray(m) for m in masks.values()])
