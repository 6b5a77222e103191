"""Headline numbers from a solved MBAR: PMFs and basin populations with asymptotic errors."""

import math
import warnings

import numpy as np
from scipy.special import expit

from ..exceptions import AnalysisError, ConvergenceWarning
from ..reweight import bin_samples
from ..store import PROTOCOL
from .results import BasinResult, ProfileResult
from .samples import basin_masks

DEFAULT_BIN_COUNT = {"periodic": 36, "open": 40}
#: Half-width of a central 95 % normal interval in standard errors (scipy.stats.norm.ppf(0.975)).
Z95 = 1.959963984540054


def bin_edges(protocol, data, name, values):
    for bins in protocol.analysis.bins:
        if bins.coordinate == name:
            return np.array(bins.edges)
    c = data.coordinate_names.index(name)
    if data.periodic[c]:
        return np.linspace(-math.pi, math.pi, DEFAULT_BIN_COUNT["periodic"] + 1)
    low, high = float(np.min(values)), float(np.max(values))
    return np.linspace(low, high + 1e-9 * max(1.0, abs(high)), DEFAULT_BIN_COUNT["open"] + 1)


def compute_profiles(mbar, u_n, values_nc, data, protocol, scale):
    """Each PMF with asymptotic errors, paired with (bin of each sample, bin count, zero bin)."""
    names = [a.coordinate for a in protocol.umbrella]
    names += [b.coordinate for b in protocol.analysis.bins if b.coordinate not in names]
    grids = [(name,) for name in names]
    if len(protocol.umbrella) == 2:
        grids.append(tuple(a.coordinate for a in protocol.umbrella))
    profiles = []
    for grid in grids:
        columns = [data.coordinate_names.index(name) for name in grid]
        values = values_nc[:, columns]
        edges = [bin_edges(protocol, data, name, values[:, i]) for i, name in enumerate(grid)]
        profile = mbar.compute_pmf(u_n, values, edges)
        _warn_sparse_bins(grid, profile.counts)
        centres = tuple(profile.centres)
        f, df = profile.f * scale, profile.df * scale
        bin_n, _, _ = bin_samples(values, edges, len(u_n))
        zero = int(np.nanargmin(np.where(np.isfinite(profile.f), profile.f, np.nan).ravel()))
        profiles.append((ProfileResult(grid, centres, f, df, profile.counts, f - Z95 * df, f + Z95 * df),
                         (bin_n, profile.f.size, zero)))
    return profiles


def _warn_sparse_bins(grid, counts):
    """Warn when bins inside the sampled range are empty or nearly so: bins too fine for the data."""
    populated = np.flatnonzero(counts.ravel() > 0)
    inside = counts.ravel()[populated.min(): populated.max() + 1] if len(grid) == 1 else counts.ravel()[populated]
    empty = int(np.sum(inside == 0))
    if empty or np.median(inside) < 10:
        warnings.warn(f"PMF bins along {', '.join(grid)} are finer than the data supports ({empty} empty "
                      f"bin(s) inside the sampled range, median {np.median(inside):.0f} samples per bin); "
                      "use fewer bins (analysis.bins) or run longer.", ConvergenceWarning, stacklevel=3)


def compute_basin_results(mbar, u_n, values_nc, data, protocol, scale):
    if not protocol.basins:
        return None
    masks = basin_masks(protocol, list(data.coordinate_names), data.periodic, values_nc)
    names = list(masks)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            if np.any(masks[a] & masks[b]):
                raise AnalysisError(f"{PROTOCOL}: basins.{a} and basins.{b} overlap; basins must be disjoint.")
    empty = [name for name in names if not masks[name].any()]
    for name in empty:
        warnings.warn(f"basin {name} holds no sample, so its population cannot be estimated; "
                      "sample it (more windows, longer runs) or check its interval.", ConvergenceWarning,
                      stacklevel=2)
        del masks[name]
    if not masks:
        raise AnalysisError(f"{PROTOCOL}: no basin holds a sample; check the basin intervals.")
    result = mbar.compute_basins(u_n, masks)
    low, high = population_interval(result.populations, result.d_populations)
    g, dg = result.Delta_g * scale, result.d_Delta_g * scale
    return BasinResult(result.names, result.populations, result.d_populations, low, high,
                       g, dg, g - Z95 * dg, g + Z95 * dg), np.array([masks[n] for n in result.names])


def population_interval(p, dp):
    """95 % interval of populations ``p`` with standard errors ``dp``, inside [0, 1].

    Normal on the logit scale, logit p = ln p - ln(1 - p), whose error follows from the
    error of ln p (dp / p, what MBAR reports) by the delta method: d logit p = d ln p / (1 - p).
    """
    p, dp = np.asarray(p, dtype=float), np.asarray(dp, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        logit = np.log(p) - np.log1p(-p)
        half = Z95 * dp / p / (1.0 - p)
        low, high = expit(logit - half), expit(logit + half)
    certain = (dp == 0) | (p <= 0) | (p >= 1)     # e.g. one basin holding every sample
    return np.where(certain, p, low), np.where(certain, p, high)


