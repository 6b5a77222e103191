"""The analysis stage: a run folder in, unbiased populations, ΔG and PMFs out.

Reads only the run folder (its protocol copy and ledger), so a run can be analysed on
another machine, later, while it is still going, with other settings. Steps: keep
production cycles; per condition, discard equilibration and subsample by statistical
inefficiency (samples.py); MBAR over all conditions; reweight to the unbiased condition
at the target temperature (estimates.py); error bars (asymptotic, or a block bootstrap
for exchange runs: errorbars.py).
"""

from dataclasses import replace

import numpy as np

from ..conditions import compute_unbiased_reduced_potential, ladder_shape
from ..diagnostics import closes_circle, summarise_swaps, warn_poor_overlap
from ..exceptions import AnalysisError
from ..protocol import UNCERTAINTY_METHODS
from ..reweight import Reweighting
from ..units import energy_in
from .errorbars import compute_bootstrap_errors, uses_bootstrap
from .estimates import compute_basin_results, compute_profiles, population_interval
from .inputs import describe_run_folder, load_run, load_study
from .results import Analysis, BasinResult, ProfileResult, RunAbout, Uncertainty
from .verdicts import Verdicts, compute_verdicts
from .samples import (MBAR_COPIES, MBAR_SHARE, MIN_SAMPLES, Samples, basin_masks,
                      compute_sample_reduced_potentials, condition_labels, gather, select_samples,
                      thinning_stride, window_values)

__all__ = ["Analysis", "BasinResult", "ProfileResult", "RunAbout", "Samples", "Uncertainty", "Verdicts", "analyse_run", "basin_masks",
           "compute_sample_reduced_potentials", "condition_labels", "load_run", "load_study", "population_interval",
           "select_samples", "thinning_stride", "MBAR_COPIES", "MBAR_SHARE", "MIN_SAMPLES"]


def analyse_run(folder, *, temperature=None, energy_unit=None, memory=None, uncertainty=None):
    """Analyse a run folder; see :class:`Analysis`. ``temperature`` in K; ``memory`` in
    bytes overrides the protocol's analysis.memory; ``uncertainty`` ('auto', 'asymptotic'
    or 'bootstrap') its analysis.uncertainty.method."""
    protocol, data, own = load_study(folder)
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
    u_kn, N_k, picks = samples.u_kn, samples.N_k, samples.picks
    mbar = Reweighting(u_kn, N_k)
    u_n = compute_unbiased_reduced_potential(
        temperature, gather(data.potential_rt, picks),
        volume_n=gather(data.volume_rt, picks), pressure=protocol.pressure)
    values_nc = np.stack([gather(data.values_rtc[:, :, c], picks) for c in range(len(data.coordinate_names))],
                         axis=1) if data.coordinate_names else np.zeros((len(u_n), 0))
    labels = condition_labels(data, protocol)
    shape = ladder_shape(protocol)
    circles = tuple(2 + a for a, axis in enumerate(protocol.umbrella)      # after temperatures and solute scales
                    if protocol.coordinates[axis.coordinate].periodic and closes_circle(axis.centres))
    poor = warn_poor_overlap(mbar.overlap, shape, lambda k: labels[k], circles) if len(N_k) > 1 else []
    scale = energy_in(1.0, unit, temperature)
    production = set(data.cycle_t[data.production_t].tolist())
    profiles = compute_profiles(mbar, u_n, values_nc, data, protocol, scale)
    basins = compute_basin_results(mbar, u_n, values_nc, data, protocol, scale)
    df_k, uncertainty, asymptotic = mbar.df_k, Uncertainty("asymptotic"), (profiles, basins)
    if uses_bootstrap(protocol):
        df_k, profiles, basins, uncertainty = compute_bootstrap_errors(
            mbar, u_n, samples, data, protocol, folder, profiles, basins, scale)
    verdicts = compute_verdicts(mbar, u_n, samples, data, protocol, profiles, basins, asymptotic, uncertainty,
                                scale)
    return Analysis(
        folder=str(folder), temperature=temperature, energy_unit=unit, n_cycles=len(own.cycle_t),
        samples_k=N_k, thinning_k=samples.thinning_k, t0_k=samples.t0_k, g_k=samples.g_k,
        f_k=mbar.f_k, df_k=df_k, overlap=mbar.overlap,
        poor_pairs=tuple(poor),
        profiles=tuple(p for p, _ in profiles),
        basins=basins[0] if basins else None,
        uncertainty=uncertainty,
        verdicts=verdicts,
        swaps=summarise_swaps(data.swaps, data.condition_rt[:, data.production_t], len(data.conditions),
                              production) if protocol.exchange else None,
        condition_labels=labels, window_values=window_values(data, protocol),
        umbrella_coordinates=tuple(a.coordinate for a in protocol.umbrella),
        angle_coordinates=data.angle_coordinates,
        walker_traces=data.condition_rt[:, data.production_t],
        about=describe_run_folder(folder, protocol, own, data),
        basin_intervals={name: dict(intervals) for name, intervals in protocol.basins.items()})


