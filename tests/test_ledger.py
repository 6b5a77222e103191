"""Writing the ledger: cycles recorded one by one reach the file in batches, row for row as
written at once, and never behind a checkpoint."""

import sqlite3
import sys
from pathlib import Path

import numpy as np
import pytest

import boost.store.ledger
from boost.conditions import Condition
from boost.protocol import load_protocol
from boost.scheduler import run_protocol
from boost.store import LEDGER, Ledger, read_ledger

sys.path.insert(0, str(Path(__file__).parent))
from conftest import double_well_protocol  # noqa: E402

CONDITIONS = (Condition(0, 300.0), Condition(1, 330.0), Condition(2, 363.0))
HEADER = {"coordinates": ["phi", "d"], "periodic": [True, False], "units": {"phi": "rad", "d": "nm"},
          "umbrella": [], "n_walkers": 3}


def invented_cycles(n_cycles, with_volume):
    """Invented numbers for 3 walkers (only a writer's input here)."""
    rng = np.random.default_rng(5)
    for t in range(n_cycles):
        yield dict(time=0.5 * (t + 1), production=t >= 2, condition_r=list(rng.permutation(3)),
                   potential_r=rng.normal(-50, 5, 3), volume_r=list(rng.uniform(8, 9, 3)) if with_volume else [None] * 3,
                   values_rc=rng.uniform(-3, 3, (3, 2)), u_kr=rng.normal(-20, 3, (3, 3)),
                   solute_r2=rng.normal(0, 10, (3, 2)), swaps=[(0, 1, 1, int(t % 2)), (1, 2, 2, 1)][:t % 3],
                   frames=[(r, t // 2, 1000 + 7 * r + t) for r in range(3)] if t % 2 else [])   # walker, frame, crc32


def new_ledger(folder, **kwargs):
    folder.mkdir()
    ledger = Ledger(folder / LEDGER, coordinate_names=HEADER["coordinates"], **kwargs)
    ledger.create(CONDITIONS, HEADER)
    return ledger


def table_rows(folder):
    with sqlite3.connect(folder / LEDGER) as connection:
        return {table: connection.execute(f"SELECT * FROM {table} ORDER BY rowid").fetchall()
                for table in ("cycles", "samples", "swaps", "frames")}


def write_all_at_once(ledger, cycles):
    ledger.record_cycles(0, time_t=[c["time"] for c in cycles], production_t=[c["production"] for c in cycles],
                         condition_rt=np.transpose([c["condition_r"] for c in cycles]),
                         potential_rt=np.transpose([c["potential_r"] for c in cycles]),
                         volume_rt=np.transpose(np.array([c["volume_r"] for c in cycles], dtype=float)),
                         values_rtc=np.stack([c["values_rc"] for c in cycles], axis=1),
                         u_krt=np.stack([c["u_kr"] for c in cycles], axis=2),
                         solute_rt2=np.stack([c["solute_r2"] for c in cycles], axis=1),
                         swaps=[(t, *s) for t, c in enumerate(cycles) for s in c["swaps"]],
                         frames=[(w, t, *rest) for t, c in enumerate(cycles) for w, *rest in c["frames"]])


@pytest.mark.parametrize("with_volume", [False, True])
def test_cycles_written_alone_in_batches_or_at_once_give_the_same_rows(tmp_path, with_volume):
    cycles = list(invented_cycles(7, with_volume))
    for name, write_every in (("alone", 0.0), ("batched", 3600.0)):
        ledger = new_ledger(tmp_path / name, write_every=write_every)
        for t, c in enumerate(cycles):
            ledger.record_cycle(t, **c)
            if name == "batched" and t == 3:
                ledger.write_waiting()        # two batches: cycles 0-3 and 4-6
        ledger.close()
    write_all_at_once(new_ledger(tmp_path / "at-once"), cycles)
    alone = table_rows(tmp_path / "alone")
    assert alone == table_rows(tmp_path / "batched") == table_rows(tmp_path / "at-once")
    assert len(alone["cycles"]) == 7 and len(alone["swaps"]) == 6 and len(alone["frames"]) == 9
    assert all((row[4] is None) != with_volume for row in alone["samples"])
    data = read_ledger(tmp_path / "batched")           # every checksum verified
    assert np.array_equal(data.u_krt[:, :, 4], cycles[4]["u_kr"])
    assert np.array_equal(data.solute_rt2[:, 5], cycles[5]["solute_r2"])


def test_recorded_cycles_wait_until_written_and_the_ledger_itself_sees_them(tmp_path):
    ledger = new_ledger(tmp_path / "run", write_every=3600.0)
    for t, c in enumerate(invented_cycles(4, False)):
        ledger.record_cycle(t, **c)
    assert table_rows(tmp_path / "run")["cycles"] == []          # another reader sees none yet
    assert [len(crcs) for crcs in ledger.frame_records(3)] == [2, 2, 2]     # this writer sees all
    assert len(table_rows(tmp_path / "run")["cycles"]) == 4       # asking wrote them
    ledger.record_cycle(4, **list(invented_cycles(5, False))[4])
    ledger.truncate_after(2)                                      # acts on every recorded cycle
    ledger.close()
    assert [row[0] for row in table_rows(tmp_path / "run")["cycles"]] == [0, 1, 2]


# Two temperatures of the test double well, 30 cycles, a checkpoint every 7.
TWO_TEMPERATURES = double_well_protocol(
    platform="Reference", temperatures="[300 K, 400 K]", exchange="{pairs: adjacent}", basins=None,
    run={"equilibration": None, "production": "3 ps", "checkpoint_every": "0.7 ps", "frame_every": "0.5 ps"})


def test_no_checkpoint_runs_ahead_of_the_ledger(tmp_path, monkeypatch):
    # a resume starts from the newest checkpoint at or before the ledger's last cycle: every
    # checkpoint must find the cycles it holds written, however long cycles may wait
    from boost import scheduler

    seen = []
    real = scheduler.write_checkpoint

    def checkpoint_and_look(folder, *, cycle, **kwargs):
        seen.append((cycle, len(table_rows(folder)["cycles"])))
        return real(folder, cycle=cycle, **kwargs)

    monkeypatch.setattr(boost.store.ledger, "WRITE_EVERY_SECONDS", 3600.0)
    monkeypatch.setattr(scheduler, "write_checkpoint", checkpoint_and_look)
    (tmp_path / "p.yaml").write_text(TWO_TEMPERATURES)
    run_protocol(load_protocol(tmp_path / "p.yaml"), tmp_path / "run", progress=False)
    assert seen == [(-1, 0), (6, 7), (13, 14), (20, 21), (27, 28), (29, 30)]
