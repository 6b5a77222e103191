"""One cycle's ledger rows and their checksums, built with a few numpy calls.

The scheduler writes one cycle per transaction (Ledger.record_cycle). On a small system a
cycle of MD takes a few milliseconds, so the work around the rows weighs: here the
checksums of the cycle's records (boost.store.checksums: its cycles row, samples and swaps
for ``checksum``, its reduced potentials for ``reduced_checksum``) come from one pass over
one array of all their numbers, with the salts of each shape of block made once. A sum
mod 2**64 does not depend on the order of its terms, so these are the sums row-by-row
checksums give (tests/test_records.py compares with Ledger.record_cycles).
"""

from functools import lru_cache

import numpy as np

from . import checksums


@lru_cache(maxsize=256)
def _salts(blocks):
    """Salts of every number of ``blocks`` ((table, n_rows, n_columns), ...), flattened in order."""
    return np.concatenate([np.tile(checksums.column_salts(n_columns, table), n_rows)
                           for table, n_rows, n_columns in blocks])


def cycle_rows(cycle, *, time, production, condition_r, potential_r, volume_r, parts_r2, values_rc, u_kr, swaps):
    """The rows of one cycle as the ledger's tables take them.

    parts_r2 : ndarray, shape (n_walkers, 2) in kJ/mol, or (n_walkers, 0) for a ledger
        without solute columns; volume_r : nm³ or None; swaps : (condition_i, condition_j,
        attempts, accepted) rows; other arguments as Ledger.record_cycle.

    Returns
    -------
    cycle_row : (cycle, time, production, checksum, reduced_checksum)
    sample_rows : list of (cycle, walker, condition, potential, volume, [parts,] values..., reduced bytes)
    swap_rows : list of (cycle, condition_i, condition_j, attempts, accepted)
    """
    cycle, (n_walkers, n_parts) = int(cycle), parts_r2.shape
    u_rk = np.ascontiguousarray(np.transpose(u_kr), dtype="<f8")
    values_rc = np.asarray(values_rc, dtype=float).reshape(n_walkers, -1)
    walker_r = np.arange(n_walkers)
    numbers = np.empty((n_walkers, 5 + n_parts + values_rc.shape[1]))    # the columns the reader selects
    numbers[:, 0], numbers[:, 1], numbers[:, 2], numbers[:, 3] = cycle, walker_r, condition_r, potential_r
    numbers[:, 4] = np.array(volume_r, dtype=float)       # None: NaN
    numbers[:, 5:5 + n_parts] = parts_r2
    numbers[:, 5 + n_parts:] = values_rc
    reduced = np.empty((n_walkers, 1 + u_rk.shape[1]))
    reduced[:, 0], reduced[:, 1:] = walker_r, u_rk
    swap_rows = [(cycle, *(int(x) for x in row)) for row in swaps]
    words = np.concatenate([(cycle, time, float(bool(production))), numbers.ravel(),
                            np.array(swap_rows, dtype=float).ravel(), reduced.ravel()])
    salts = _salts(((checksums.CYCLES, 1, 3), (checksums.SAMPLES, *numbers.shape), (checksums.SWAPS, len(swap_rows), 5),
                    (checksums.REDUCED, *reduced.shape)))
    mixed = checksums.mix_words(words, salts)
    split = words.size - reduced.size
    sums = np.array([mixed[:split].sum(dtype=np.uint64), mixed[split:].sum(dtype=np.uint64)])
    checksum, reduced_checksum = sums.view(np.int64).tolist()     # as SQLite stores them (checksums.as_stored)
    width, blob = 8 * u_rk.shape[1], u_rk.tobytes()
    sample_rows = [(cycle, r, int(row[2]), *[x if x == x else None for x in row[3:]], blob[r * width:(r + 1) * width])
                   for r, row in enumerate(numbers.tolist())]
    return (cycle, float(time), int(bool(production)), checksum, reduced_checksum), sample_rows, swap_rows
