"""The analysis stage: a run folder in, unbiased populations, ΔG and PMFs out.

Reads only the run folder (its protocol copy and ledger), so a run can be analysed on
another machine, later, while it is still going, with other settings. Steps: keep
production cycles; per condition, discard equilibration and subsample by statistical
inefficiency; MBAR over all conditions; reweight to the unbiased condition at the target
temperature.
"""

import math
import warnings
from dataclasses import dataclass, replace

import numpy as np
from scipy.special import expit

from .conditions import compute_reduced_potentials, compute_unbiased_reduced_potential
from .diagnostics import summarise_swaps, warn_poor_overlap
from .exceptions import AnalysisError, BoostWarning, ConvergenceWarning
from .protocol import UNCERTAINTY_METHODS, parse_protocol
from .spec import read_text
from . import resample
from .correlation import compute_statistical_inefficiency
from .reweight import Reweighting, bin_samples, decorrelate
from .store import PROTOCOL, read_ledger
from .units import energy_in

#: Fewest samples per condition (after subsampling) the analysis accepts.
MIN_SAMPLES = 5
DEFAULT_BIN_COUNT = {"periodic": 36, "open": 40}
#: Half-width of a central 95 % normal interval in standard errors (scipy.stats.norm.ppf(0.975)).
Z95 = 1.959963984540054


@dataclass(frozen=True)
class ProfileResult:
    """A PMF, in ``energy_unit``; zero at its minimum. centres in nm or degrees."""

    coordinates: tuple
    centres: tuple          # one array per coordinate (nm, or degrees for angles)
    f: np.ndarray
    df: np.ndarray          # standard error, relative to the zero bin
    counts: np.ndarray
    f_low: np.ndarray       # 95 % interval, relative to the zero bin
    f_high: np.ndarray


@dataclass(frozen=True)
class BasinResult:
    names: tuple
    populations: np.ndarray
    d_populations: np.ndarray    # standard error
    populations_low: np.ndarray  # 95 % interval, inside [0, 1]
    populations_high: np.ndarray
    Delta_g: np.ndarray      # [i, j] = G_j - G_i, in energy_unit
    d_Delta_g: np.ndarray
    Delta_g_low: np.ndarray  # 95 % interval, in energy_unit
    Delta_g_high: np.ndarray


@dataclass(frozen=True)
class Uncertainty:
    """Which method made the error bars and intervals of an analysis."""

    method: str          # 'asymptotic' (MBAR's covariance) or 'bootstrap' (block bootstrap over cycles)
    resamples: int = 0   # bootstrap replicates drawn (0: asymptotic)
    block_cycles: int = 0
    block_chosen: bool = False  # block length measured from the walkers, not given
    failed: int = 0      # replicates whose MBAR did not converge (left out of the bars)
    walker_g: float = math.nan  # largest statistical inefficiency along a walker's path (cycles)
    cycle_ps: float = math.nan  # length of a cycle (ps)

    @property
    def label(self):
        """Names the method: 'MBAR asymptotic' or 'block bootstrap, N resamples, blocks of L cycles'."""
        if self.method == "asymptotic":
            return "MBAR asymptotic"
        return f"block bootstrap, {self.resamples} resamples, blocks of {self.block_cycles} cycles"


@dataclass(frozen=True)
class Analysis:
    """Everything ``boost analyze`` reports. Energies in ``energy_unit`` at ``temperature``."""

    folder: str
    temperature: float
    energy_unit: str
    n_cycles: int
    samples_k: np.ndarray     # uncorrelated samples used per condition
    thinning_k: np.ndarray    # of those, every how many MBAR used (1: all; see analysis.memory)
    t0_k: np.ndarray          # equilibration discarded per condition (production cycles)
    g_k: np.ndarray           # statistical inefficiency per condition (cycles)
    f_k: np.ndarray           # condition free energies relative to condition 0, in kT
    df_k: np.ndarray          # in kT
    overlap: np.ndarray
    poor_pairs: tuple
    profiles: tuple
    basins: BasinResult | None
    swaps: object             # diagnostics.SwapSummary or None
    condition_labels: tuple
    window_values: tuple      # per condition: umbrella coordinate values of its production
                              # samples, shape (n, n_axes), nm or degrees
    umbrella_coordinates: tuple
    angle_coordinates: frozenset   # coordinates reported in degrees
    walker_traces: np.ndarray      # condition_rt over production cycles
    uncertainty: Uncertainty = Uncertainty("asymptotic")


def load_run(folder):
    """The protocol copy and ledger of a run folder."""
    from pathlib import Path

    data = read_ledger(folder, reduced=False)
    path = Path(folder) / PROTOCOL
    protocol = parse_protocol(read_text(path, "protocol copy"), path)
    return protocol, data


def analyse_run(folder, *, temperature=None, energy_unit=None, memory=None, uncertainty=None):
    """Analyse a run folder; see :class:`Analysis`. ``temperature`` in K; ``memory`` in
    bytes overrides the protocol's analysis.memory; ``uncertainty`` ('auto', 'asymptotic'
    or 'bootstrap') its analysis.uncertainty.method."""
    protocol, data = load_run(folder)
    if uncertainty is not None:
        if uncertainty not in UNCERTAINTY_METHODS:
            raise AnalysisError(f"uncertainty must be one of {', '.join(UNCERTAINTY_METHODS)}; got {uncertainty!r}")
        settings = replace(protocol.analysis.uncertainty, method=uncertainty)
        protocol = replace(protocol, analysis=replace(protocol.analysis, uncertainty=settings))
    temperature = protocol.temperature if temperature is None else temperature
    ladder = protocol.temperatures
    if not min(ladder) - 1e-9 <= temperature <= max(ladder) + 1e-9:
        raise AnalysisError(f"{folder}: target temperature {temperature:g} K is outside the ladder "
                            f"({min(ladder):g} K to {max(ladder):g} K); MBAR cannot extrapolate.")
    unit = energy_unit or protocol.analysis.energy_unit
    samples = select_samples(data, protocol, folder, protocol.analysis.memory if memory is None else memory)
    u_kn, N_k, picks = samples["u_kn"], samples["N_k"], samples["picks"]
    mbar = Reweighting(u_kn, N_k)
    u_n = compute_unbiased_reduced_potential(
        temperature, _gather(data.potential_rt, picks),
        volume_n=_gather(data.volume_rt, picks), pressure=protocol.pressure)
    values_nc = np.stack([_gather(data.values_rtc[:, :, c], picks) for c in range(len(data.coordinate_names))],
                         axis=1) if data.coordinate_names else np.zeros((len(u_n), 0))
    labels = condition_labels(data, protocol)
    ladder_shape = (len(ladder), *[len(a.centres) for a in protocol.umbrella])
    poor = warn_poor_overlap(mbar.overlap, ladder_shape, lambda k: labels[k]) if len(N_k) > 1 else []
    scale = energy_in(1.0, unit, temperature)
    production = set(data.cycle_t[data.production_t].tolist())
    profiles = _profiles(mbar, u_n, values_nc, data, protocol, scale)
    basins = _basins(mbar, u_n, values_nc, data, protocol, scale)
    df_k, uncertainty = mbar.df_k, Uncertainty("asymptotic")
    if _uses_bootstrap(protocol):
        df_k, profiles, basins, uncertainty = _bootstrap_errors(
            mbar, u_n, samples, data, protocol, folder, profiles, basins, scale)
    return Analysis(
        folder=str(folder), temperature=temperature, energy_unit=unit, n_cycles=len(data.cycle_t),
        samples_k=N_k, thinning_k=samples["thinning_k"], t0_k=samples["t0_k"], g_k=samples["g_k"],
        f_k=mbar.f_k, df_k=df_k, overlap=mbar.overlap,
        poor_pairs=tuple(poor),
        profiles=tuple(p for p, _ in profiles),
        basins=basins[0] if basins else None,
        uncertainty=uncertainty,
        swaps=summarise_swaps(data.swaps, data.condition_rt[:, data.production_t], len(data.conditions),
                              production) if protocol.exchange else None,
        condition_labels=labels, window_values=_window_values(data, protocol),
        umbrella_coordinates=tuple(a.coordinate for a in protocol.umbrella),
        angle_coordinates=frozenset(n for n, u in data.metadata["units"].items() if u == "rad"),
        walker_traces=data.condition_rt[:, data.production_t])


def _window_values(data, protocol):
    columns = [data.coordinate_names.index(a.coordinate) for a in protocol.umbrella]
    if not columns:
        return ()
    angular = [data.metadata["units"][a.coordinate] == "rad" for a in protocol.umbrella]
    production = data.production_t
    out = []
    for k in range(len(data.conditions)):
        held = (data.condition_rt == k) & production[None, :]
        values = data.values_rtc[held][:, columns]
        out.append(np.where(angular, np.degrees(values), values))
    return tuple(out)


def condition_labels(data, protocol):
    labels = []
    for condition in data.conditions:
        parts = [f"{condition.temperature:.1f} K"] if len(protocol.temperatures) > 1 else []
        for axis, centre in zip(protocol.umbrella, condition.centres):
            unit = data.metadata["units"][axis.coordinate]
            shown = f"{math.degrees(centre):.1f} deg" if unit == "rad" else f"{centre:.4g} nm"
            parts.append(f"{axis.coordinate} = {shown}")
        labels.append(f"condition {condition.index} ({', '.join(parts) or 'unbiased'})")
    return tuple(labels)


def _gather(array_rt, picks):
    return np.concatenate([array_rt[walkers, cycles] for walkers, cycles in picks])


def _decorrelation_series(data, k, walkers, cycles, protocol):
    """Observables whose correlation time bounds the sample spacing in condition k."""
    series = [compute_sample_reduced_potentials(data, protocol, [data.conditions[k]], walkers, cycles)[0]]
    watched = {a.coordinate for a in protocol.umbrella} | {c for b in protocol.basins.values() for c in b}
    for c, name in enumerate(data.coordinate_names):
        if name in watched:
            values = data.values_rtc[walkers, cycles, c]
            series += [np.cos(values), np.sin(values)] if data.metadata["periodic"][c] else [values]
    return series


def compute_sample_reduced_potentials(data, protocol, conditions, walkers, cycles):
    """u_kn for the samples (walkers[n], cycles[n]) in ``conditions``, from energies and values.

    The same formula the run used (boost.conditions), so it equals the ledger's stored
    reduced potentials; computing only the kept samples saves memory.
    """
    umbrella = data.metadata["umbrella"]
    columns = [data.coordinate_names.index(name) for name in umbrella]
    periodic = [data.metadata["periodic"][c] for c in columns]
    values = data.values_rtc[walkers, cycles][:, columns]
    return compute_reduced_potentials(conditions, data.potential_rt[walkers, cycles], values, periodic,
                                      volume_r=data.volume_rt[walkers, cycles], pressure=protocol.pressure)


#: pymbar 4.0.3 holds about this many arrays of conditions x samples float64 at its peak
#: (solve, uncertainties, overlap), measured with bench/mem_analysis.py.
MBAR_COPIES = 12
#: Share of analysis.memory given to those arrays; the rest is Python, the ledger's
#: columns and the tables (about 250 MiB measured for 24 conditions x 10^5 cycles).
MBAR_SHARE = 0.6


def thinning_stride(n_samples, n_conditions, memory):
    """Take every stride-th sample of each condition so MBAR fits in ``memory`` bytes."""
    fits = int(memory * MBAR_SHARE / (MBAR_COPIES * 8 * n_conditions))
    return max(1, math.ceil(n_samples / max(fits, 1)))


def select_samples(data, protocol, folder, memory):
    """Production samples per condition, equilibration removed, subsampled; u_kn and N_k."""
    production = np.flatnonzero(data.production_t)
    if production.size == 0:
        raise AnalysisError(f"{folder}: holds no production cycle yet.")
    picks, t0_k, g_k = [], [], []
    for k in range(len(data.conditions)):
        walker_t = np.argmax(data.condition_rt[:, production] == k, axis=0)
        series = _decorrelation_series(data, k, walker_t, production, protocol)
        # equilibration from the condition's own reduced potential (Chodera 2016); the
        # spacing from the slowest watched observable after it
        t0 = decorrelate(series[0]).t0
        g = max([1.0] + [compute_statistical_inefficiency(s[t0:]) for s in series if np.ptp(s[t0:]) > 0])
        keep = t0 + np.unique(np.floor(np.arange(0, production.size - t0, g) + 0.5).astype(int))
        keep = keep[keep < production.size]
        if keep.size < MIN_SAMPLES:
            raise AnalysisError(f"{folder}: condition {k} has only {keep.size} uncorrelated samples "
                                f"(g = {g:.1f} cycles); run longer before analysing.")
        picks.append((walker_t[keep], production[keep]))
        t0_k.append(t0)
        g_k.append(g)
    total = sum(len(w) for w, _ in picks)
    stride = thinning_stride(total, len(data.conditions), memory)
    strides = [max(1, min(stride, len(w) // MIN_SAMPLES)) for w, _ in picks]
    if stride > 1:
        picks = [(w[::k], c[::k]) for (w, c), k in zip(picks, strides)]
        warnings.warn(f"MBAR uses {sum(len(w) for w, _ in picks)} of the {total} uncorrelated samples "
                      f"(1 in {stride}, evenly spaced) to stay within analysis.memory ({memory / 2**30:.3g} GiB); "
                      "boost analyze --memory raises it.", BoostWarning)
    walkers_n = np.concatenate([w for w, _ in picks])
    cycles_n = np.concatenate([c for _, c in picks])
    u_kn = compute_sample_reduced_potentials(data, protocol, data.conditions, walkers_n, cycles_n)
    N_k = np.array([len(w) for w, _ in picks])
    return {"u_kn": u_kn, "N_k": N_k, "picks": picks, "t0_k": np.array(t0_k), "g_k": np.array(g_k),
            "thinning_k": np.array(strides)}


def _edges(protocol, data, name, values):
    for bins in protocol.analysis.bins:
        if bins.coordinate == name:
            return np.array(bins.edges)
    c = data.coordinate_names.index(name)
    if data.metadata["periodic"][c]:
        return np.linspace(-math.pi, math.pi, DEFAULT_BIN_COUNT["periodic"] + 1)
    low, high = float(np.min(values)), float(np.max(values))
    return np.linspace(low, high + 1e-9 * max(1.0, abs(high)), DEFAULT_BIN_COUNT["open"] + 1)


def _profiles(mbar, u_n, values_nc, data, protocol, scale):
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
        edges = [_edges(protocol, data, name, values[:, i]) for i, name in enumerate(grid)]
        profile = mbar.compute_pmf(u_n, values, edges)
        _warn_sparse_bins(grid, profile.counts)
        centres = tuple(np.degrees(c) if data.metadata["units"][name] == "rad" else c
                        for c, name in zip(profile.centres, grid))
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


def basin_masks(protocol, coordinate_names, periodic, values_nc):
    """Which samples lie in each basin (intervals per coordinate; dihedral intervals may wrap)."""
    masks = {}
    for name, intervals in protocol.basins.items():
        mask = np.ones(len(values_nc), dtype=bool)
        for coordinate, (lower, upper) in intervals.items():
            c = coordinate_names.index(coordinate)
            x = values_nc[:, c]
            if periodic[c] and lower > upper:
                mask &= (x >= lower) | (x < upper)
            else:
                mask &= (x >= lower) & (x < upper)
        masks[name] = mask
    return masks


def _basins(mbar, u_n, values_nc, data, protocol, scale):
    if not protocol.basins:
        return None
    masks = basin_masks(protocol, list(data.coordinate_names), data.metadata["periodic"], values_nc)
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


# -- bootstrap error bars for exchange runs ----------------------------------------------
#: Second word of the bootstrap's random seed, after the protocol's seed: its own stream.
_BOOTSTRAP_STREAM = 0xB007


def _uses_bootstrap(protocol):
    method = protocol.analysis.uncertainty.method
    return method == "bootstrap" or (method == "auto" and protocol.exchange is not None)


def _bootstrap_errors(mbar, u_n, samples, data, protocol, folder, profiles, basins, scale):
    """Replace the asymptotic errors by a block bootstrap over cycles (see boost.resample)."""
    settings = protocol.analysis.uncertainty
    production = np.flatnonzero(data.production_t)
    start = int(min(samples["t0_k"]))          # no condition keeps a sample before this
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
    walker_g = max(_walker_inefficiency(data, protocol, cycles), float(max(samples["g_k"])))
    block = settings.block_cycles
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
    position_n = np.searchsorted(cycles, np.concatenate([c for _, c in samples["picks"]]))
    masks = basins[1] if basins else None
    result = resample.run_replicates(
        lambda count_t: _replicate(mbar, u_n, count_t[position_n], masks, [b for _, b in profiles]), count_bt)
    if result.n_failed == settings.resamples:
        raise AnalysisError(f"{folder}: MBAR converged on none of the {settings.resamples} bootstrap resamples; "
                            "set analysis.uncertainty.method: asymptotic.")
    if result.n_failed:
        warnings.warn(f"MBAR did not converge on {result.n_failed} of the {settings.resamples} bootstrap resamples; "
                      "the error bars come from the others.", ConvergenceWarning, stacklevel=3)
    uncertainty = Uncertainty("bootstrap", settings.resamples, block, not settings.block_cycles,
                              result.n_failed, walker_g, protocol.run.steps_per_cycle * protocol.timestep)
    return (*_with_bootstrap(result, len(samples["N_k"]), profiles, basins, scale), uncertainty)


def _walker_inefficiency(data, protocol, cycles):
    """Largest statistical inefficiency (cycles) of a walker's observables along its own path.

    Per walker, whatever condition it holds: its reduced potential in that condition, the
    watched coordinates (umbrella, basin and PMF coordinates) and each basin's indicator.
    These carry the correlation a walker takes from one condition to the next.
    """
    watched = ({a.coordinate for a in protocol.umbrella} | {c for b in protocol.basins.values() for c in b}
               | {b.coordinate for b in protocol.analysis.bins})
    names, periodic = list(data.coordinate_names), data.metadata["periodic"]
    times = np.arange(cycles.size)
    g = 1.0
    for r in range(data.condition_rt.shape[0]):
        walker_t = np.full(cycles.size, r)
        u_kt = compute_sample_reduced_potentials(data, protocol, data.conditions, walker_t, cycles)
        series = [u_kt[data.condition_rt[r, cycles], times]]
        values_tc = data.values_rtc[r, cycles]
        for c, name in enumerate(names):
            if name in watched:
                x = values_tc[:, c]
                series += [np.cos(x), np.sin(x)] if periodic[c] else [x]
        series += [mask.astype(float) for mask in basin_masks(protocol, names, periodic, values_tc).values()]
        for s in series:
            if np.ptp(s) > 0:
                g = max(g, compute_statistical_inefficiency(s))
    return g


def _replicate(mbar, u_n, multiplicity_n, mask_bn, profile_bins):
    """One replicate's f_k (kT), basin populations, ΔG matrix (kT) and PMF bins (kT), flat."""
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
