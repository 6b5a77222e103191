"""One cycle's ledger rows (boost.store.records, Ledger.record_cycle) against Ledger.record_cycles."""

import sqlite3

import numpy as np
import pytest

from boost.conditions import Condition
from boost.store import LEDGER, Ledger, read_ledger

CONDITIONS = (Condition(0, 300.0), Condition(1, 330.0), Condition(2, 363.0))
HEADER = {"coordinates": ["phi", "d"], "periodic": [True, False], "units": {"phi": "rad", "d": "nm"},
          "umbrella": [], "n_walkers": 3}


def invented_cycles(n_cycles, with_volume):
    """Invented numbers for 3 walkers (only a writer's input here), NaN-free but for no volume."""
    rng = np.random.default_rng(5)
    for t in range(n_cycles):
        yield dict(time=0.5 * (t + 1), production=t >= 2, condition_r=list(rng.permutation(3)),
                   potential_r=rng.normal(-50, 5, 3), volume_r=list(rng.uniform(8, 9, 3)) if with_volume else [None] * 3,
                   values_rc=rng.uniform(-3, 3, (3, 2)), u_kr=rng.normal(-20, 3, (3, 3)),
                   solute_r2=rng.normal(0, 10, (3, 2)), swaps=[(0, 1, 1, int(t % 2)), (1, 2, 2, 1)][:t % 3],
                   frames=[(r, t // 2, 1000 + 7 * r + t) for r in range(3)] if t % 2 else [])   # walker, frame, crc32


def table_rows(folder):
    with sqlite3.connect(folder / LEDGER) as connection:
        return {table: connection.execute(f"SELECT * FROM {table} ORDER BY rowid").fetchall()
                for table in ("cycles", "samples", "swaps", "frames")}


@pytest.mark.parametrize("with_volume", [False, True])
def test_one_cycle_at_a_time_writes_the_rows_of_many_at_once(tmp_path, with_volume):
    # cross-check of two implementations of the ledger's rows and checksums
    cycles = list(invented_cycles(6, with_volume))
    for name in ("single", "bulk"):
        (tmp_path / name).mkdir()
        ledger = Ledger(tmp_path / name / LEDGER, coordinate_names=HEADER["coordinates"])
        ledger.create(CONDITIONS, HEADER)
        for t, c in enumerate(cycles):
            if name == "single":
                ledger.record_cycle(t, **c)
            else:
                ledger.record_cycles(t, time_t=[c["time"]], production_t=[c["production"]],
                                     condition_rt=np.reshape(c["condition_r"], (3, 1)),
                                     potential_rt=c["potential_r"][:, None],
                                     volume_rt=np.array(c["volume_r"], dtype=float)[:, None],
                                     values_rtc=c["values_rc"][:, None], u_krt=c["u_kr"][:, :, None],
                                     solute_rt2=c["solute_r2"][:, None], swaps=[(t, *s) for s in c["swaps"]],
                                     frames=[(walker, t, *rest) for walker, *rest in c["frames"]])
        ledger.close()
    single, bulk = table_rows(tmp_path / "single"), table_rows(tmp_path / "bulk")
    assert single == bulk
    assert len(single["swaps"]) == 6 and len(single["frames"]) == 9
    assert all((row[4] is None) != with_volume for row in single["samples"])
    data = read_ledger(tmp_path / "single")           # every checksum verified
    assert np.array_equal(data.u_krt[:, :, 4], cycles[4]["u_kr"])
    assert np.array_equal(data.solute_rt2[:, 5], cycles[5]["solute_r2"])
