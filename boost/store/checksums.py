"""Checksums of ledger records that numpy computes for millions of rows at once.

A record (a row of the ledger) is a sequence of numbers, each stored as 64 bits. Its
checksum is the sum, modulo 2**64, of every number's bits mixed with its column: the
mixer is the finaliser of SplitMix64 (Steele, Lea & Flood, "Fast splittable pseudorandom
number generators", OOPSLA 2014, doi:10.1145/2660193.2660195), a bijection of 64-bit
words, so one changed number always changes the sum, and two changes cancel with odds of
about 2**-64. A cycle's checksum is the sum of its records' checksums; sums do not depend
on the order the rows are read in, which lets the reader check cycles chunk by chunk.
"""

from functools import lru_cache

import numpy as np

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)

#: Separate column salts per table, so the same numbers in another table sum differently.
CYCLES, SAMPLES, SWAPS, REDUCED = 0, 1, 2, 3


def _mix(z):
    z = (z ^ (z >> np.uint64(30))) * _M1
    z = (z ^ (z >> np.uint64(27))) * _M2
    return z ^ (z >> np.uint64(31))


def _words(numbers):
    """float64 numbers as 64-bit words; every NaN (a missing value) as the same word."""
    numbers = np.asarray(numbers, dtype=np.float64)
    numbers = np.where(np.isnan(numbers), np.nan, numbers)
    return np.ascontiguousarray(numbers).view(np.uint64)


def compute_row_checksums(rows, table):
    """Checksum of each row.

    rows : ndarray, shape (n_rows, n_columns), float64 (integers exactly as floats, NaN for none)
    table : int, one of CYCLES, SAMPLES, SWAPS, REDUCED
    Returns ndarray of uint64, shape (n_rows,).
    """
    rows = np.atleast_2d(rows)
    with np.errstate(over="ignore"):
        return _mix(_words(rows) ^ _column_salts(rows.shape[1], table)).sum(axis=1, dtype=np.uint64)


@lru_cache(maxsize=64)
def _column_salts(n_columns, table):
    """The salt each column's numbers are mixed with: uint64, shape (n_columns,); made once per
    width and table (the ledger checksums every cycle's rows)."""
    columns = np.arange(n_columns, dtype=np.uint64)
    return _mix((columns + np.uint64(1 + 64 * table)) * _GOLDEN)


def sum_by_cycle(checksums, cycle_of_row, n_cycles):
    """Per-cycle sums (mod 2**64) of row checksums; rows of cycles >= n_cycles are left out."""
    out = np.zeros(n_cycles, dtype=np.uint64)
    inside = cycle_of_row < n_cycles
    np.add.at(out, cycle_of_row[inside], checksums[inside])
    return out


def as_stored(checksum):
    """A uint64 checksum as the signed 64-bit integer SQLite stores."""
    return int(np.uint64(checksum).astype(np.int64))


def from_stored(values):
    """Stored signed integers back to uint64 checksums."""
    return np.asarray(values, dtype=np.int64).astype(np.uint64)
