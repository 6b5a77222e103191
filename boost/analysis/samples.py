"""From a run folder to the samples MBAR uses: production cycles, equilibration removed,
subsampled by statistical inefficiency, thinned to fit analysis.memory."""

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..conditions import compute_reduced_potentials
from ..correlation import compute_statistical_inefficiency
from ..exceptions import AnalysisError, BoostWarning
from ..reweight import decorrelate
from ..units import format_coordinate

@dataclass(frozen=True, eq=False)
class Samples:
    """The samples MBAR uses, per condition of origin, and how they were picked.

    Attributes
    ----------
    u_kn : ndarray, shape (n_conditions, n_samples), kT: every sample in every condition
    N_k : ndarray of int, shape (n_conditions,): samples from each condition
    picks : tuple (per condition) of (walker indices, cycle indices) of its samples
    t0_k : ndarray of int: production cycles discarded as equilibration, per condition
    g_k : ndarray: statistical inefficiency (cycles) used for the spacing, per condition
    thinning_k : ndarray of int: further 1-in-n thinning to fit analysis.memory, per condition
    """

    u_kn: np.ndarray
    N_k: np.ndarray
    picks: tuple
    t0_k: np.ndarray
    g_k: np.ndarray
    thinning_k: np.ndarray


#: Fewest samples per condition (after subsampling) the analysis accepts.
MIN_SAMPLES = 5


def window_values(data, protocol):
    columns = [data.coordinate_names.index(a.coordinate) for a in protocol.umbrella]
    if not columns:
        return ()
    production = data.production_t
    out = []
    for k in range(len(data.conditions)):
        held = (data.condition_rt == k) & production[None, :]
        values = data.values_rtc[held][:, columns]
        out.append(values)
    return tuple(out)


def condition_labels(data, protocol):
    labels = []
    for condition in data.conditions:
        parts = [f"{condition.temperature:.1f} K"] if len(protocol.temperatures) > 1 else []
        if protocol.solute is not None:
            parts.append(f"λ = {condition.solute_scale:.4g}")
        for axis, centre in zip(protocol.umbrella, condition.centres):
            parts.append(f"{axis.coordinate} = {format_coordinate(centre, axis.coordinate in data.angle_coordinates)}")
        labels.append(f"condition {condition.index} ({', '.join(parts) or 'unbiased'})")
    return tuple(labels)


def gather(array_rt, picks):
    return np.concatenate([array_rt[walkers, cycles] for walkers, cycles in picks])


def condition_walkers(data, k, cycles):
    """(walker_t, held_t): of ``cycles``, those in which some walker held condition k
    (all of them, but in a pooled study: see boost.analysis.pooling), and that walker."""
    holds = data.condition_rt[:, cycles] == k
    present = holds.any(axis=0)
    return np.argmax(holds[:, present], axis=0), np.asarray(cycles)[present]


def sample_positions(data, picks, cycles):
    """Where each sample lies in its condition's share of ``cycles``, from 0 to 1 (in
    condition order, as the picks): the forward/reverse estimates cut every condition's
    series at the same fraction, also where the runs of a pooled study differ in length."""
    out = []
    for k, (_, picked) in enumerate(picks):
        _, held = condition_walkers(data, k, cycles)
        out.append(np.searchsorted(held, picked) / held.size)
    return np.concatenate(out)


def _decorrelation_series(data, k, walkers, cycles, protocol):
    """Observables whose correlation time bounds the sample spacing in condition k."""
    series = [compute_sample_reduced_potentials(data, protocol, [data.conditions[k]], walkers, cycles)[0]]
    watched = {a.coordinate for a in protocol.umbrella} | {c for b in protocol.basins.values() for c in b}
    for c, name in enumerate(data.coordinate_names):
        if name in watched:
            values = data.values_rtc[walkers, cycles, c]
            series += [np.cos(values), np.sin(values)] if data.periodic[c] else [values]
    return series


def compute_sample_reduced_potentials(data, protocol, conditions, walkers, cycles):
    """u_kn for the samples (walkers[n], cycles[n]) in ``conditions``, from energies and values.

    The same formula the run used (boost.conditions), so it equals the ledger's stored
    reduced potentials; computing only the kept samples saves memory.
    """
    columns = [data.coordinate_names.index(name) for name in data.umbrella_coordinates]
    periodic = [data.periodic[c] for c in columns]
    values = data.values_rtc[walkers, cycles][:, columns]
    return compute_reduced_potentials(conditions, data.potential_rt[walkers, cycles], values, periodic,
                                      solute_r2=data.solute_rt2[walkers, cycles],
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
    """Production samples per condition, equilibration removed, subsampled: a :class:`Samples`."""
    production = np.flatnonzero(data.production_t)
    if production.size == 0:
        raise AnalysisError(f"{folder}: holds no production cycle yet.")
    picks, t0_k, g_k = [], [], []
    for k in range(len(data.conditions)):
        walker_t, held = condition_walkers(data, k, production)
        series = _decorrelation_series(data, k, walker_t, held, protocol)
        # equilibration from the condition's own reduced potential (Chodera 2016); the
        # spacing from the slowest watched observable after it
        t0 = decorrelate(series[0]).t0
        g = max([1.0] + [compute_statistical_inefficiency(s[t0:]) for s in series if np.ptp(s[t0:]) > 0])
        keep = t0 + np.unique(np.floor(np.arange(0, held.size - t0, g) + 0.5).astype(int))
        keep = keep[keep < held.size]
        if keep.size < MIN_SAMPLES:
            raise AnalysisError(f"{folder}: condition {k} has only {keep.size} uncorrelated samples "
                                f"(g = {g:.1f} cycles): too few samples to analyse; run longer.")
        picks.append((walker_t[keep], held[keep]))
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
    return Samples(u_kn=u_kn, N_k=N_k, picks=tuple(picks), t0_k=np.array(t0_k), g_k=np.array(g_k),
                   thinning_k=np.array(strides))


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


