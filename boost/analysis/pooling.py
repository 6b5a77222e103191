"""One study from several runs: a run that builds on earlier ones (``run.builds_on``) is
analysed with their samples, all conditions in one MBAR.

Each run's production cycles are laid side by side, aligned at the start of production:
pooled cycle t holds every run's t-th production cycle. A walker whose run is shorter
holds no condition (-1) in the cycles after its end, with NaN energies and values there.
Conditions are renumbered into the grid of the newest protocol, which holds every run's.
Only production cycles are kept; swap rows keep their run's pairs, renumbered.
"""

import numpy as np

from ..conditions import build_conditions, index_of_condition
from ..exceptions import RunFolderError
from ..store import LedgerData

#: Condition held by a walker in a pooled cycle after its run ended.
ABSENT = -1


def pool_runs(protocol, runs):
    """One LedgerData for the runs of a study.

    Parameters
    ----------
    protocol : Protocol, the newest run's (its grid holds every run's conditions)
    runs : sequence of (folder, LedgerData), the newest run first

    Returns
    -------
    LedgerData of production cycles only, conditions in ``protocol``'s grid order,
    walkers run after run (the newest run's first), metadata the newest run's
    """
    conditions = build_conditions(protocol)
    newest = runs[0][1]
    lengths = [int(np.sum(data.production_t)) for _, data in runs]
    n_cycles, n_walkers = max(lengths), sum(data.condition_rt.shape[0] for _, data in runs)
    condition_rt = np.full((n_walkers, n_cycles), ABSENT)
    potential_rt = np.full((n_walkers, n_cycles), np.nan)
    volume_rt = np.full((n_walkers, n_cycles), np.nan)
    solute_rt2 = np.full((n_walkers, n_cycles, 2), np.nan)
    values_rtc = np.full((n_walkers, n_cycles, len(newest.coordinate_names)), np.nan)
    swaps, first = [], 0
    for (folder, data), length in zip(runs, lengths):
        if data.coordinate_names != newest.coordinate_names or data.umbrella_coordinates != newest.umbrella_coordinates:
            raise RunFolderError(f"{folder}: records other coordinates than the run that builds on it; "
                                 "the runs cannot be pooled.")
        number = _renumbering(folder, data.conditions, conditions)
        production = np.flatnonzero(data.production_t)
        walkers = slice(first, first + data.condition_rt.shape[0])
        condition_rt[walkers, :length] = number[data.condition_rt[:, production]]
        potential_rt[walkers, :length] = data.potential_rt[:, production]
        volume_rt[walkers, :length] = data.volume_rt[:, production]
        solute_rt2[walkers, :length] = data.solute_rt2[:, production]
        values_rtc[walkers, :length] = data.values_rtc[:, production]
        if data.swaps.size:
            rows = data.swaps[np.isin(data.swaps[:, 0], data.cycle_t[production])].copy()
            rows[:, 0] = np.searchsorted(data.cycle_t[production], rows[:, 0])
            rows[:, 1:3] = number[rows[:, 1:3]]
            swaps.append(rows)
        first += data.condition_rt.shape[0]
    longest = runs[int(np.argmax(lengths))][1]
    return LedgerData(
        conditions=conditions, coordinate_names=newest.coordinate_names, periodic=newest.periodic,
        angle_coordinates=newest.angle_coordinates, umbrella_coordinates=newest.umbrella_coordinates,
        cycle_t=np.arange(n_cycles), time_t=longest.time_t[longest.production_t],
        production_t=np.ones(n_cycles, dtype=bool), condition_rt=condition_rt, potential_rt=potential_rt,
        volume_rt=volume_rt, solute_rt2=solute_rt2, values_rtc=values_rtc, u_krt=np.zeros((len(conditions), n_walkers, 0)),
        swaps=np.concatenate(swaps) if swaps else np.zeros((0, 5), dtype=int), metadata=newest.metadata)


def _renumbering(folder, held, conditions):
    """number[k]: the index in ``conditions`` of the run's condition k."""
    number = []
    for condition in held:
        k = index_of_condition(condition, conditions)
        if k is None:
            raise RunFolderError(f"{folder}: ran a condition the protocol of the run that builds on it lacks "
                                 f"({condition.temperature:g} K, centres {condition.centres}); the runs cannot "
                                 "be pooled.")
        number.append(k)
    return np.array(number, dtype=int)
