"""A convergence verdict on every headline number of an analysis (rules in boost.verdict).

Per number: the independent samples behind it, the estimates of the two halves of
production and, where walkers are not held in windows, whether any walker crossed the
basin boundary. Independent samples are Kish's effective count of the MBAR target
weights involved; for bootstrap error bars they are divided by the variance inflation
(bootstrap variance over asymptotic variance), which is how much fewer the correlations
across conditions make them. Forward and reverse cumulative estimates
(boost.convergence) are kept for the convergence plot.
"""

from dataclasses import dataclass

import numpy as np

from ..conditions import ladder_shape
from ..convergence import Cumulative, compute_cumulative
from ..diagnostics import neighbour_pairs_on_grid
from ..verdict import TOO_FEW, Verdict, count_crossing_walkers, count_effective, judge
from .errorbars import compute_statistics
from .samples import basin_masks, sample_positions


@dataclass(frozen=True, eq=False)
class Verdicts:
    """Verdicts of an analysis, in the order of its results.

    Attributes
    ----------
    populations : tuple of Verdict, one per basin of ``Analysis.basins``
    delta_g : dict of (i, j) -> Verdict, i < j, for ΔG between basins i and j
    profiles : tuple of ndarray of Verdict (dtype object), shapes of each profile's f;
        None where a bin has no estimate
    acceptance : tuple of (i, j, acceptance, attempts, Verdict) per neighbouring pair
    cumulative : Cumulative
        Forward and reverse estimates of the basin populations (rows 0 … n_basins-1)
        and of ΔG from the first basin to each other (rows n_basins …), ΔG in the
        analysis' energy unit.
    production_ps : float
        Length of production, the time axis of ``cumulative`` (fractions of it).
    """

    populations: tuple
    delta_g: dict
    profiles: tuple
    acceptance: tuple
    cumulative: Cumulative | None
    production_ps: float


def compute_verdicts(mbar, u_n, samples, data, protocol, profiles, basins, asymptotic, uncertainty, scale):
    """Verdicts for basin populations, ΔG, PMF bins and neighbour swap acceptance.

    profiles, basins : as analyse_run holds them, (result, bins) pairs and (BasinResult,
        mask_bn) or None, with their final error bars; asymptotic : (profiles, basins)
        before the bootstrap replaced the errors (the same objects when it did not).
    """
    production = np.flatnonzero(data.production_t)
    position_n = sample_positions(data, samples.picks, production)
    mask_bn = basins[1] if basins else None
    bins = [b for _, b in profiles]
    error_s = _error_vector(len(samples.N_k), profiles, basins, scale)
    cumulative = compute_cumulative(lambda m: compute_statistics(mbar, u_n, m, mask_bn, bins), position_n, error_s)
    w_n = mbar.target_weights(u_n)
    inflation_s = _inflation(error_s, _error_vector(len(samples.N_k), *asymptotic, scale))
    cut_short = _cut_short_verdict(uncertainty, production.size)
    layout = _Layout(len(samples.N_k), len(basins[0].names) if basins else 0, [b[1] for b in bins])
    crossings = _crossings(data, protocol, production) if basins and not protocol.umbrella else None
    populations, delta_g = (), {}
    if basins:
        populations, delta_g = _basin_verdicts(basins, w_n, cumulative, inflation_s, layout, crossings, scale)
    profile_verdicts = tuple(_profile_verdicts(k, profile, bin_info, w_n, cumulative, inflation_s, layout, scale)
                             for k, (profile, bin_info) in enumerate(profiles))
    if cut_short is not None:
        populations = tuple(cut_short for _ in populations)
        delta_g = {key: cut_short for key in delta_g}
        replace_all = np.vectorize(lambda v: None if v is None else cut_short, otypes=[object])
        profile_verdicts = tuple(replace_all(v) for v in profile_verdicts)
    rows = layout.populations + [layout.delta_g(0, j) for j in range(1, layout.n_basins)]
    kept = Cumulative(cumulative.fractions, *(a[rows] for a in (cumulative.forward, cumulative.d_forward,
                                                               cumulative.reverse, cumulative.d_reverse)))
    for a in (kept.forward, kept.d_forward, kept.reverse, kept.d_reverse):
        a[layout.n_basins:] *= scale
    production_ps = production.size * protocol.run.steps_per_cycle * protocol.timestep
    return Verdicts(populations, delta_g, profile_verdicts, _acceptance_verdicts(data, protocol, production),
                    kept if rows else None, production_ps)


class _Layout:
    """Where each statistic sits in the flat vector of errorbars.compute_statistics."""

    def __init__(self, n_conditions, n_basins, bin_counts):
        self.n_basins = n_basins
        self.populations = list(range(n_conditions, n_conditions + n_basins))
        self._g0 = n_conditions + n_basins
        self._profile_starts = np.cumsum([self._g0 + n_basins**2] + list(bin_counts))

    def delta_g(self, i, j):
        return self._g0 + i * self.n_basins + j

    def profile_bin(self, k, b):
        return int(self._profile_starts[k] + b)


def _error_vector(n_conditions, profiles, basins, scale):
    """Standard errors in the layout of compute_statistics (kT where it gives kT)."""
    parts = [np.full(n_conditions, np.nan)]
    if basins:
        parts += [basins[0].d_populations, np.ravel(basins[0].d_Delta_g) / scale]
    parts += [np.ravel(profile.df) / scale for profile, _ in profiles]
    return np.concatenate(parts)


def _inflation(error_s, asymptotic_s):
    """Variance inflation of the final error bars over the asymptotic ones (1 where equal)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = (error_s / asymptotic_s) ** 2
    return np.where(np.isfinite(ratio) & (ratio > 0), ratio, 1.0)


def _cut_short_verdict(uncertainty, n_production):
    if uncertainty.method != "bootstrap" or not uncertainty.cut_short:
        return None
    spans = n_production / uncertainty.walker_g
    return Verdict(TOO_FEW, f"production spans only {spans:.0f} walker correlation times, too few for "
                            "the bootstrap's blocks", np.nan, np.nan, np.nan, np.nan)


def _crossings(data, protocol, production):
    """Per basin, walkers whose production configurations were both inside and outside it."""
    values_rtc = data.values_rtc[:, production]
    present_rt = data.condition_rt[:, production] >= 0
    flat = values_rtc.reshape(-1, values_rtc.shape[-1])
    masks = basin_masks(protocol, list(data.coordinate_names), data.periodic, flat)
    return {name: count_crossing_walkers(mask.reshape(values_rtc.shape[:2]), present_rt)
            for name, mask in masks.items()}


def _verdict(s, independent, cumulative, scale=1.0, **extra):
    first, d_first, second, d_second = (x * scale for x in cumulative.halves(s))
    return judge(independent=independent, first=first, d_first=d_first, second=second, d_second=d_second, **extra)


def _basin_verdicts(basins, w_n, cumulative, inflation_s, layout, crossings, scale):
    result, mask_bn = basins
    inside = [count_effective(w_n[mask]) for mask in mask_bn]
    outside = [count_effective(w_n[~mask]) for mask in mask_bn]
    populations = []
    for b, name in enumerate(result.names):
        s = layout.populations[b]
        extra = {} if crossings is None else {"crossings": crossings[name], "what": f"into and out of {name}"}
        populations.append(_verdict(s, min(inside[b], outside[b]) / inflation_s[s], cumulative, **extra))
    delta_g = {}
    for i, a in enumerate(result.names):
        for j in range(i + 1, len(result.names)):
            b, s = result.names[j], layout.delta_g(i, j)
            extra = {} if crossings is None else {"crossings": min(crossings[a], crossings[b]),
                                                 "what": f"between {a} and {b}"}
            delta_g[(i, j)] = _verdict(s, min(inside[i], inside[j]) / inflation_s[s], cumulative, scale, **extra)
    return tuple(populations), delta_g


def _profile_verdicts(k, profile, bin_info, w_n, cumulative, inflation_s, layout, scale):
    bin_n, n_bins, zero = bin_info
    inside = bin_n >= 0
    sum_b = np.bincount(bin_n[inside], weights=w_n[inside], minlength=n_bins)
    with np.errstate(invalid="ignore"):      # Kish's count per bin, 0 where no weight
        effective_b = np.nan_to_num(sum_b**2 / np.bincount(bin_n[inside], weights=w_n[inside]**2, minlength=n_bins))
    out = np.full(n_bins, None, dtype=object)
    f = np.ravel(profile.f)
    for b in np.flatnonzero(np.isfinite(f)):
        s = layout.profile_bin(k, b)
        independent = effective_b[b] if b == zero else min(effective_b[b], effective_b[zero])
        out[b] = _verdict(s, independent / inflation_s[s], cumulative, scale)
    return out.reshape(profile.f.shape)


def _acceptance_verdicts(data, protocol, production):
    """Swap acceptance of each neighbouring pair: halves of production, accepted vs rejected."""
    if protocol.exchange is None or data.swaps.size == 0:
        return ()
    cycles = data.cycle_t[production]
    middle = cycles[cycles.size // 2]
    rows = data.swaps[np.isin(data.swaps[:, 0], cycles)]
    out = []
    for i, j in _judged_pairs(protocol, ladder_shape(protocol), rows):
        pair = rows[(rows[:, 1] == i) & (rows[:, 2] == j)]
        halves = [pair[pair[:, 0] < middle], pair[pair[:, 0] >= middle]]
        estimates = [_rate(h[:, 3].sum(), h[:, 4].sum()) for h in halves]
        attempts, accepted = pair[:, 3].sum(), pair[:, 4].sum()
        verdict = judge(independent=min(accepted, attempts - accepted), first=estimates[0][0],
                        d_first=estimates[0][1], second=estimates[1][0], d_second=estimates[1][1])
        out.append((i, j, accepted / attempts if attempts else np.nan, int(attempts), verdict))
    return tuple(out)


def _judged_pairs(protocol, ladder_shape, rows):
    """Pairs whose acceptance is judged: neighbours on the ladder; with swaps between
    neighbours only, the pairs attempted (the same, but in a pooled study, where each run
    swapped along its own ladder: boost.analysis.pooling)."""
    if protocol.exchange.pairs == "any":
        return neighbour_pairs_on_grid(ladder_shape)
    return sorted({(int(i), int(j)) for i, j in rows[:, 1:3]})


def _rate(attempts, accepted):
    """Acceptance and its binomial standard error (attempts taken as independent)."""
    if attempts == 0:
        return np.nan, np.nan
    a = accepted / attempts
    return a, np.sqrt(max(a * (1 - a), 1.0 / attempts) / attempts)
