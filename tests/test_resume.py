"""Runs that survive: kill -9 and resume bit for bit; locks; blow-ups; disk trouble."""

import os
import signal
import sqlite3
import subprocess
import sys
import time

import mdtraj
import numpy as np
import pytest

from boost.analysis import analyse_run
from boost.exceptions import RunFolderError, SimulationError
from boost.protocol import load_protocol
from boost.scheduler import run_protocol
from boost.store import FolderLock, claim_folder, read_ledger

# Two walkers that swap temperatures: resume must restore contexts, assignment and swap RNG.
TEMPERING = """\
protocol: 1
title: alanine, two temperatures
system: alanine-vacuum
seed: 42
temperature: 300 K
timestep: 2 fs
platform: Reference
coordinates:
  phi: {dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}
temperatures: [300 K, 360 K]
exchange: {pairs: adjacent}
run:
  cycle: 0.1 ps
  equilibration: 2 ps
  production: 40 ps
  frame_every: 1 ps
  checkpoint_every: 0.5 ps
basins:
  C7eq: {phi: [-180 deg, 0 deg]}
  C7ax: {phi: [0 deg, 180 deg]}
"""


def assert_same_ledger(a_folder, b_folder):
    a, b = read_ledger(a_folder), read_ledger(b_folder)
    for name in ("cycle_t", "time_t", "production_t", "condition_rt", "potential_rt", "values_rtc", "u_krt", "swaps"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name


def assert_same_frames(a_folder, b_folder, n_walkers):
    for r in range(n_walkers):
        name = f"frames/walker-{r:03d}.dcd"
        ta = mdtraj.load(str(a_folder / name), top=str(a_folder / "topology.pdb"))
        tb = mdtraj.load(str(b_folder / name), top=str(b_folder / "topology.pdb"))
        assert ta.n_frames == tb.n_frames and np.array_equal(ta.xyz, tb.xyz)


def last_cycle(folder):
    try:
        with sqlite3.connect(f"file:{folder / 'ledger.sqlite'}?mode=ro", uri=True, timeout=1) as connection:
            value = connection.execute("SELECT MAX(cycle) FROM cycles").fetchone()[0]
        return -1 if value is None else value
    except sqlite3.Error:
        return -1


def kill_at(command, folder, target, cwd):
    """Start ``boost run`` and kill -9 it once the ledger passes cycle ``target``; True if killed."""
    process = subprocess.Popen(command, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    while process.poll() is None:
        if last_cycle(folder) >= target:
            process.send_signal(signal.SIGKILL)
            process.wait()
            return True
        time.sleep(0.005)
    assert process.returncode == 0, process.stderr.read().decode()
    return False


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    folder = tmp_path_factory.mktemp("ref")
    (folder / "p.yaml").write_text(TEMPERING)
    return run_protocol(load_protocol(folder / "p.yaml"), folder / "run", progress=False)


def resume_after_kills(tmp_path, targets, text=TEMPERING):
    path = tmp_path / "p.yaml"
    path.write_text(text)
    folder = tmp_path / "run"
    command = [sys.executable, "-m", "boost.cli", "run", str(path), "-o", str(folder), "--quiet"]
    kills = sum(kill_at(command, folder, target, tmp_path) for target in sorted(targets))
    finished = subprocess.run(command, cwd=tmp_path, capture_output=True, text=True, timeout=600)
    assert finished.returncode == 0, finished.stderr
    return folder, kills


def test_kill_nine_three_times_then_resume_is_bit_for_bit(tmp_path, reference):
    # Reference platform: a checkpoint continues bit-for-bit (measured here: tests/REFERENCES.md)
    rng = np.random.default_rng(int(time.time()))
    targets = rng.choice(np.arange(5, 400), size=3, replace=False)
    folder, kills = resume_after_kills(tmp_path, targets)
    assert kills == 3, f"the run finished before all kills ({targets})"
    assert_same_ledger(reference, folder)
    assert_same_frames(reference, folder, 2)
    a, b = analyse_run(reference), analyse_run(folder)
    assert np.array_equal(a.basins.populations, b.basins.populations)
    assert np.array_equal(a.basins.Delta_g, b.basins.Delta_g)


@pytest.mark.slow
def test_many_kills_then_resume_is_bit_for_bit(tmp_path, reference):
    targets = np.random.default_rng(11).choice(np.arange(3, 415), size=12, replace=False)
    folder, kills = resume_after_kills(tmp_path, targets)
    assert kills >= 10
    assert_same_ledger(reference, folder)
    assert_same_frames(reference, folder, 2)


def test_second_writer_is_refused_naming_the_holder(tmp_path):
    folder = tmp_path / "run"
    claim_folder(folder)
    holder = FolderLock(folder)
    holder.acquire()
    try:
        (tmp_path / "p.yaml").write_text(TEMPERING)
        with pytest.raises(RunFolderError, match=rf"run: is being written by process {os.getpid()} on "):
            run_protocol(load_protocol(tmp_path / "p.yaml"), folder, progress=False)
    finally:
        holder.release()
    assert sorted(p.name for p in folder.iterdir()) == ["boost-run.json", "lock"]     # nothing else written


def test_stale_lock_of_a_dead_process_is_taken_over(tmp_path, caplog):
    folder = tmp_path / "run"
    claim_folder(folder)
    (folder / "lock").write_text("process 999999 on elsewhere")   # no flock held: its process is gone
    (tmp_path / "p.yaml").write_text(TEMPERING.replace("production: 40 ps", "production: 1 ps"))
    with caplog.at_level("INFO", logger="boost"):
        run_protocol(load_protocol(tmp_path / "p.yaml"), folder, progress=False)
    assert "taking over the run folder from process 999999 on elsewhere" in caplog.text
    assert len(read_ledger(folder).cycle_t) == 30


def test_concurrent_real_process_is_refused(tmp_path):
    path = tmp_path / "p.yaml"
    path.write_text(TEMPERING.replace("production: 40 ps", "production: 400 ps"))
    folder = tmp_path / "run"
    command = [sys.executable, "-m", "boost.cli", "run", str(path), "-o", str(folder), "--quiet"]
    first = subprocess.Popen(command, cwd=tmp_path, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        while last_cycle(folder) < 1:
            assert first.poll() is None
            time.sleep(0.01)
        second = subprocess.run(command, cwd=tmp_path, capture_output=True, text=True, timeout=120)
        assert second.returncode == 2
        assert f"is being written by process {first.pid}" in second.stderr
        assert len(second.stderr.strip().splitlines()) == 1
    finally:
        first.kill()
        first.wait()


EXPLODING = """\
protocol: 1
title: a well too stiff for its timestep
system:
  model: {name: double_well, barrier: 1e7 kJ/mol, minimum: 0.1 nm}
seed: 1
temperature: 300 K
timestep: 20 fs
platform: Reference
coordinates:
  x: {position: 0, axis: x}
run: {cycle: 0.2 ps, production: 20 ps, minimise: false, checkpoint_every: 1 ps}
"""


def test_blow_up_names_walker_condition_cycle_and_leaves_a_consistent_folder(tmp_path):
    (tmp_path / "p.yaml").write_text(EXPLODING)
    folder = tmp_path / "run"
    with pytest.raises(SimulationError, match=r"walker 0 .*condition 0.* cycle \d+.*smaller timestep"):
        run_protocol(load_protocol(tmp_path / "p.yaml"), folder, progress=False)
    data = read_ledger(folder)               # readable, with only complete, finite cycles
    assert np.all(np.isfinite(data.potential_rt))
    assert len(data.cycle_t) < 100


def test_blow_up_retry_from_checkpoint_with_fresh_velocities(tmp_path, monkeypatch):
    # inject one non-finite observation at cycle 7: the run must go back to its last
    # checkpoint, draw fresh velocities, record the retry and finish
    from boost import engine

    real = engine.Walker.observe
    calls = {"n": 0}

    def flaky(self, positions=None):
        calls["n"] += 1
        observation = real(self, positions)
        if calls["n"] == 8:
            return engine.Observation(float("nan"), observation.positions, None, None)
        return observation

    monkeypatch.setattr(engine.Walker, "observe", flaky)
    text = EXPLODING.replace("barrier: 1e7 kJ/mol", "barrier: 5 kJ/mol").replace("timestep: 20 fs", "timestep: 2 fs")
    text = text.replace("run: {", "run: {retries: 1, ")
    (tmp_path / "p.yaml").write_text(text)
    folder = run_protocol(load_protocol(tmp_path / "p.yaml"), tmp_path / "run", progress=False)
    data = read_ledger(folder)
    assert list(data.cycle_t) == list(range(100))
    with sqlite3.connect(folder / "ledger.sqlite") as connection:
        assert connection.execute("SELECT cycle, walker FROM retries").fetchall() == [(7, 0)]


def test_full_disk_stops_cleanly_and_resumes_identically(tmp_path, reference, monkeypatch):
    # a write failure at cycle 100 (what SQLite raises on a full disk) must leave the
    # ledger at the last complete cycle; running again resumes to the same result
    from boost import store

    real = store.Ledger.record_cycle

    def full_disk(self, cycle, **kwargs):
        if cycle == 100:
            raise sqlite3.OperationalError("database or disk is full")
        return real(self, cycle, **kwargs)

    (tmp_path / "p.yaml").write_text(TEMPERING)
    protocol = load_protocol(tmp_path / "p.yaml")
    monkeypatch.setattr(store.Ledger, "record_cycle", full_disk)
    with pytest.raises(RunFolderError, match=r"run: cannot write \(database or disk is full\).*resume"):
        run_protocol(protocol, tmp_path / "run", progress=False)
    assert read_ledger(tmp_path / "run").cycle_t[-1] == 99
    monkeypatch.setattr(store.Ledger, "record_cycle", real)
    run_protocol(protocol, tmp_path / "run", progress=False)
    assert_same_ledger(reference, tmp_path / "run")


def test_read_only_folder_gives_one_clear_error(tmp_path, monkeypatch):
    # root ignores permission bits, so the read-only file system is injected at the
    # lowest write boundary boost uses (os.replace of an atomic write)
    import errno

    from boost.store import folder as run_folder

    def read_only(*args, **kwargs):
        raise OSError(errno.EROFS, "Read-only file system")

    (tmp_path / "p.yaml").write_text(TEMPERING)
    monkeypatch.setattr(run_folder.os, "replace", read_only)
    with pytest.raises(RunFolderError, match=r"run: cannot write \(Read-only file system\)"):
        run_protocol(load_protocol(tmp_path / "p.yaml"), tmp_path / "run", progress=False)


def test_finished_run_is_left_alone(tmp_path, reference, caplog):
    before = {p: p.read_bytes() for p in reference.rglob("*") if p.is_file() and p.name != "lock"}
    with caplog.at_level("INFO", logger="boost"):
        run_protocol(load_protocol(reference.parent / "p.yaml"), reference, progress=False)
    assert "already complete" in caplog.text
    after = {p: p.read_bytes() for p in reference.rglob("*") if p.is_file() and p.name != "lock"}
    assert after == before
