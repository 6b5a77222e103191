"""Error bars from a block bootstrap over cycles, for exchange runs (see boost.resample)."""

import warnings
from dataclasses import replace

import numpy as np

from .. import resample
from ..correlation import compute_statistical_inefficiency
from ..exceptions import AnalysisError, ConvergenceWarning
from .results import BasinResult, Uncertainty
from .samples import basin_masks, compute_sample_reduced_potentials


#: Second word of the bootstrap's random seed, after the protocol's seed: its own stream.
_BOOTSTRAP_STREAM = 0xB007


def uses_bootstrap(protocol):
    method = protocol.analysis.uncertainty.method
    return method == "bootstrap" or (method == "auto" and protocol.exchange is not None)


def compute_bootstrap_errors(mbar, u_n, samples, data, protocol, folder, profiles, basins, scale):
    """Replace the asymptotic errors by a block bootstrap over cycles (see boost.resample)."""
    settings = protocol.analysis.uncertainty
    production = np.flatnonzero(data.production_t)
    start = int(min(samples.t0_k))          # no condition keeps a sample before this
    cycles = production[start:]
    if settings.method == "auto" and cycles.size < resample.MIN_BLOCKS:
        warnings.warn(f"only {cycles.size} production cycles to resample, fewer than the {resample.MIN_BLOCKS} a "
                      "block bootstrap needs; the error bars are MBAR's asymptotic ones, which are too small for "
                      "an exchange run. Run longer.", ConvergenceWarning, stacklevel=3)
        return mbar.df_k, profiles, basins, Uncertainty("asymptotic")
    try:
        resample.check_cycles(cycles.size)
    except AnalysisError as err:
        raise AnalysisError(f"{folder}: {err}") from None
    walker_g = max(_walker_inefficiency(data, protocol, cycles), float(max(samples.g_k)))
    block, shortened = settings.block_cycles, False
    if block and cycles.size // block < resample.MIN_BLOCKS:
        raise AnalysisError(f"{folder}: analysis.uncertainty.block ({block} cycles) leaves fewer than "
                            f"{resample.MIN_BLOCKS} blocks in the {cycles.size} cycles analysed; "
                            "give a shorter block or run longer.")
    if not block:
        block, shortened = resample.choose_block_length(walker_g, cycles.size)
        if shortened:
            warnings.warn(f"the walkers stay correlated for about {walker_g:.0f} cycles (statistical inefficiency), "
                          f"too long for {resample.MIN_BLOCKS} bootstrap blocks of {resample.BLOCK_MULTIPLIER} "
                          f"times that in {cycles.size} cycles; blocks of {block} cycles may give error bars "
                          "that are too small. Run longer.", ConvergenceWarning, stacklevel=3)
    rng = np.random.default_rng([protocol.seed, _BOOTSTRAP_STREAM])
    count_bt = resample.draw_cycle_counts(cycles.size, block, settings.resamples, rng)
    position_n = np.searchsorted(cycles, np.concatenate([c for _, c in samples.picks]))
    masks = basins[1] if basins else None
    result = resample.run_replicates(
        lambda count_t: compute_statistics(mbar, u_n, count_t[position_n], masks, [b for _, b in profiles]), count_bt)
    if result.n_failed == settings.resamples:
        raise AnalysisError(f"{folder}: MBAR converged on none of the {settings.resamples} bootstrap resamples; "
                            "set analysis.uncertainty.method: asymptotic.")
    if result.n_failed:
        warnings.warn(f"MBAR did not converge on {result.n_failed} of the {settings.resamples} bootstrap resamples; "
                      "the error bars come from the others.", ConvergenceWarning, stacklevel=3)
    uncertainty = Uncertainty("bootstrap", settings.resamples, block, not settings.block_cycles,
                              result.n_failed, walker_g, protocol.run.steps_per_cycle * protocol.timestep,
                              shortened)
    return (*_with_bootstrap(result, len(samples.N_k), profiles, basins, scale), uncertainty)


def _walker_inefficiency(data, protocol, cycles):
    """Largest statistical inefficiency (cycles) of a walker's observables along its own path.

    Per walker, whatever condition it holds: its reduced potential in that condition, the
    watched coordinates (umbrella, basin and PMF coordinates) and each basin's indicator.
    These carry the correlation a walker takes from one condition to the next. Each is
    taken relative to its mean in the condition held: otherwise a walker's slow drift
    along a window ladder (its coordinate follows the window it holds) would pass for a
    correlation of the samples, and blocks would come out as long as a round trip.
    """
    watched = ({a.coordinate for a in protocol.umbrella} | {c for b in protocol.basins.values() for c in b}
               | {b.coordinate for b in protocol.analysis.bins})
    names, periodic = list(data.coordinate_names), data.periodic
    rows, held = [], []        # per walker: its observables (n_observables, n_cycles run) and conditions held
    for r in range(data.condition_rt.shape[0]):
        ran = cycles[data.condition_rt[r, cycles] >= 0]     # all cycles, but in a pooled study
        if ran.size == 0:
            continue
        k_t = data.condition_rt[r, ran]
        u_kt = compute_sample_reduced_potentials(data, protocol, data.conditions, np.full(ran.size, r), ran)
        row = [u_kt[k_t, np.arange(ran.size)]]
        values_tc = data.values_rtc[r, ran]
        for c, name in enumerate(names):
            if name in watched:
                x = values_tc[:, c]
                row += [np.cos(x), np.sin(x)] if periodic[c] else [x]
        row += [mask.astype(float) for mask in basin_masks(protocol, names, periodic, values_tc).values()]
        rows.append(np.array(row))
        held.append(k_t)
    g = 1.0
    n_conditions = len(data.conditions)
    k_all = np.concatenate(held)
    counts = np.bincount(k_all, minlength=n_conditions)
    for i in range(rows[0].shape[0]):
        mean_k = np.bincount(k_all, weights=np.concatenate([row[i] for row in rows]),
                             minlength=n_conditions) / np.maximum(counts, 1)
        for row, k_t in zip(rows, held):
            s = row[i] - mean_k[k_t]
            if np.ptp(s) > 1e-12 * max(1.0, np.abs(s).max()):
                g = max(g, compute_statistical_inefficiency(s))
    return g


def compute_statistics(mbar, u_n, multiplicity_n, mask_bn, profile_bins):
    """f_k (kT), basin populations, ΔG matrix (kT) and PMF bins (kT), flat, of the samples taken
    ``multiplicity_n`` times each (a bootstrap replicate, or a part of production)."""
    columns = np.repeat(np.arange(u_n.size), multiplicity_n)
    replicate = mbar.subset(columns)
    w_n = replicate.target_weights(u_n[columns])
    parts = [replicate.f_k]
    with np.errstate(divide="ignore", invalid="ignore"):
        if mask_bn is not None:
            p = mask_bn[:, columns] @ w_n
            parts += [p, (np.log(p)[:, None] - np.log(p)[None, :]).ravel()]
        for bin_n, n_bins, zero in profile_bins:
            b_n = bin_n[columns]
            inside = b_n >= 0
            p_b = np.bincount(b_n[inside], weights=w_n[inside], minlength=n_bins)
            parts.append(np.log(p_b[zero]) - np.log(p_b))
    return np.concatenate(parts)


def _with_bootstrap(result, n_conditions, profiles, basins, scale):
    """df_k, profiles and basins with the bootstrap's errors and intervals."""
    error, low, high = result.error_s, result.low_s, result.high_s
    df_k, at = error[:n_conditions], n_conditions
    if basins:
        b, n = basins[0], len(basins[0].names)
        p = slice(at, at + n)
        g = slice(at + n, at + n + n * n)
        square = (lambda a: a[g].reshape(n, n) * scale)
        basins = (BasinResult(b.names, b.populations, error[p], low[p], high[p],
                              b.Delta_g, square(error), square(low), square(high)), basins[1])
        at += n + n * n
    out = []
    for profile, bins in profiles:
        size, shape = bins[1], profile.f.shape
        bins_slice = slice(at, at + size)
        part = (lambda a: a[bins_slice].reshape(shape) * scale)
        out.append((replace(profile, df=part(error), f_low=part(low), f_high=part(high)), bins))
        at += size
    return df_k, out, basins
