"""The rows of consecutive cycles as the ledger's tables take them, with their checksums.

The ledger writes the cycles the scheduler records in batches (boost.store.ledger), so
the numbers of a batch are turned into rows and checksums (boost.store.checksums) here
with a fixed number of numpy calls, whatever the number of cycles, and one Python tuple
per row built from plain floats (``tolist``), never from numpy scalars one by one.
"""

import numpy as np

from . import checksums


def rows_of_cycles(first, *, time_t, production_t, condition_rt, potential_rt, volume_rt, values_rtc, u_krt,
                   solute_n2, swaps):
    """Rows of cycles ``first`` .. ``first + n_cycles - 1`` for the cycles, samples and swaps tables.

    Arrays as in boost.store.LedgerData (volume NaN: none); solute_n2 : ndarray, shape
    (n_cycles * n_walkers, 2) in (cycle, walker) order, kJ/mol, or (…, 0) for a ledger
    without solute columns; swaps : (cycle, condition_i, condition_j, attempts, accepted) rows.

    Returns
    -------
    cycle_rows : list of (cycle, time, production, checksum, reduced_checksum), checksums as SQLite stores them
    sample_rows : list of (cycle, walker, condition, potential, volume, [parts,] values..., reduced bytes);
        None for NaN
    swap_rows : list of (cycle, condition_i, condition_j, attempts, accepted)
    """
    condition_rt = np.asarray(condition_rt)
    n_walkers, n_cycles = condition_rt.shape
    cycle_t = np.arange(first, first + n_cycles, dtype=float)
    numbers = np.concatenate([   # rows in (cycle, walker) order, columns as the reader selects them
        np.stack([np.repeat(cycle_t, n_walkers), np.tile(np.arange(n_walkers, dtype=float), n_cycles),
                  condition_rt.T.ravel().astype(float), np.asarray(potential_rt, dtype=float).T.ravel(),
                  np.asarray(volume_rt, dtype=float).T.ravel()], axis=1), solute_n2,
        np.asarray(values_rtc, dtype=float).transpose(1, 0, 2).reshape(n_cycles * n_walkers, -1)], axis=1)
    u_nk = np.ascontiguousarray(np.asarray(u_krt, dtype="<f8").transpose(2, 1, 0).reshape(-1, len(u_krt)))
    swap_rows = np.array(list(swaps), dtype=float).reshape(-1, 5)
    cycle_rows = np.stack([cycle_t, np.asarray(time_t, dtype=float),
                           np.asarray(production_t, dtype=bool).astype(float)], axis=1)
    checksum_t = (checksums.compute_row_checksums(cycle_rows, checksums.CYCLES)
                  + checksums.compute_row_checksums(numbers, checksums.SAMPLES).reshape(n_cycles, n_walkers).sum(axis=1, dtype=np.uint64)
                  + checksums.sum_by_cycle(checksums.compute_row_checksums(swap_rows, checksums.SWAPS),
                                           swap_rows[:, 0].astype(np.int64) - first, n_cycles))
    reduced_t = checksums.compute_row_checksums(np.column_stack([numbers[:, 1], u_nk]), checksums.REDUCED) \
        .reshape(n_cycles, n_walkers).sum(axis=1, dtype=np.uint64)
    width, blob = 8 * u_nk.shape[1], u_nk.tobytes()
    samples = [(int(row[0]), int(row[1]), int(row[2]), *[x if x == x else None for x in row[3:]],
                blob[n * width:(n + 1) * width]) for n, row in enumerate(numbers.tolist())]
    stored = np.stack([checksum_t, reduced_t], axis=1).view(np.int64).tolist()    # checksums.as_stored
    cycles = [(int(t), time, int(production), *sums)
              for (t, time, production), sums in zip(cycle_rows.tolist(), stored)]
    return cycles, samples, [tuple(row) for row in swap_rows.astype(np.int64).tolist()]
