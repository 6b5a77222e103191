"""Walkers in processes and on MPI ranks give the same ledger as walkers in this process."""

import os
import shutil
import subprocess
import sys

import numpy as np
import pytest

from boost.cores import core_sets
from boost.protocol import load_protocol
from boost.scheduler import run_protocol
from boost.store import read_ledger
from boost.workers import WalkerHost, spread

# Four walkers that swap temperatures, so any difference in any walker shows everywhere.
LADDER = """\
protocol: 1
title: four temperatures on a double well
system: double-well-high
seed: 8
temperature: 300 K
timestep: 2 fs
platform: PLATFORM
coordinates:
  x: {position: 0, axis: x}
temperatures: {lowest: 300 K, highest: 900 K, count: 4}
exchange: {pairs: adjacent}
run: {cycle: 0.2 ps, equilibration: 2 ps, production: 10 ps, frame_every: 2 ps}
"""


def ledger_arrays(folder):
    data = read_ledger(folder)
    return data.u_krt, data.condition_rt, data.values_rtc


def assert_same(a, b):
    for x, y in zip(ledger_arrays(a), ledger_arrays(b)):
        assert np.array_equal(x, y)


@pytest.mark.parametrize("platform", ["Reference", "{name: CPU, threads: 1}"])
def test_same_seed_same_result_whatever_the_worker_count(tmp_path, platform):
    # deterministic platforms (Reference; CPU with DeterministicForces) — measured here:
    # tests/REFERENCES.md, deterministic platforms
    (tmp_path / "p.yaml").write_text(LADDER.replace("PLATFORM", platform))
    protocol = load_protocol(tmp_path / "p.yaml")
    one = run_protocol(protocol, tmp_path / "one", progress=False, workers=1)
    two = run_protocol(protocol, tmp_path / "two", progress=False, workers=2)
    three = run_protocol(protocol, tmp_path / "three", progress=False, workers=3)
    assert_same(one, two)
    assert_same(one, three)


def test_spread_deals_walkers_round_robin():
    assert spread(range(5), 2) == [[0, 2, 4], [1, 3]]
    assert spread(range(2), 4) == [[0], [1]]


def _mpiexec():
    try:
        import mpi4py  # noqa: F401
    except ImportError:
        return None
    return shutil.which("mpiexec", path=os.path.dirname(sys.executable) + os.pathsep + os.environ.get("PATH", ""))


@pytest.mark.skipif(_mpiexec() is None, reason="needs the mpi extra: pip install -e '.[mpi]'")
@pytest.mark.parametrize("platform", ["Reference", "{name: CPU, threads: 1}"])
def test_two_mpi_ranks_equal_the_local_run(tmp_path, platform):
    (tmp_path / "p.yaml").write_text(LADDER.replace("PLATFORM", platform))
    local = run_protocol(load_protocol(tmp_path / "p.yaml"), tmp_path / "local", progress=False, workers=1)
    command = [_mpiexec(), "-n", "2", sys.executable, "-m", "boost.cli", "run", "p.yaml", "-o", "mpi", "--quiet"]
    result = subprocess.run(command, cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr
    assert_same(local, tmp_path / "mpi")


@pytest.mark.skipif(_mpiexec() is None, reason="needs the mpi extra: pip install -e '.[mpi]'")
def test_bad_protocol_under_mpi_is_one_line_and_no_rank_hangs(tmp_path):
    (tmp_path / "p.yaml").write_text(LADDER.replace("PLATFORM", "Reference").replace("seed: 8", "seed: -8"))
    command = [_mpiexec(), "-n", "2", sys.executable, "-m", "boost.cli", "run", "p.yaml", "--quiet"]
    result = subprocess.run(command, cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert result.returncode != 0
    assert "seed must be a whole number of at least 0" in result.stderr and "Traceback" not in result.stderr


CORES_OF_RANK = """\
import os
from mpi4py import MPI
from boost.workers import cores_of_rank
rank = MPI.COMM_WORLD.rank
line = f"{rank} {len(os.sched_getaffinity(0))} {','.join(map(str, cores_of_rank(MPI.COMM_WORLD)))}"
open(f"rank-{rank}.txt", "w").write(line)     # a file each: the ranks' stdout can interleave
"""


@pytest.mark.skipif(_mpiexec() is None, reason="needs the mpi extra: pip install -e '.[mpi]'")
def test_unbound_ranks_on_one_machine_share_its_cores(tmp_path):
    (tmp_path / "cores.py").write_text(CORES_OF_RANK)
    command = [_mpiexec(), "-n", "2", sys.executable, "cores.py"]
    result = subprocess.run(command, cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    rows = [(tmp_path / f"rank-{r}.txt").read_text().split() for r in range(2)]
    assert sorted(int(rank) for rank, _, _ in rows) == [0, 1]
    affinities = {int(affinity) for _, affinity, _ in rows}
    shares = [set(map(int, cores.split(","))) for _, _, cores in rows]
    if affinities == {os.cpu_count()} and os.cpu_count() >= 2:
        # both ranks may use every core (mpiexec binds none by default): each gets its own half
        assert not shares[0] & shares[1]
        assert [len(share) for share in shares] == [os.cpu_count() // 2] * 2
    else:
        pytest.skip("this launcher binds ranks to cores; the split applies to unbound ranks")


def test_hosts_get_disjoint_cores_when_they_fit():
    assert core_sets([0, 1, 2, 3], 2, 2) == [[0, 1], [2, 3]]
    assert core_sets([4, 5], 2, 1) == [[4], [5]]
    assert core_sets([0, 1], 2, 2) is None       # oversubscribed: let the system place them


FAILING_RANK = """\
import sys
from mpi4py import MPI
import boost.workers
from boost.exceptions import SimulationError

if MPI.COMM_WORLD.rank == int(sys.argv[1]):
    def cannot_build(self, setup, indices):
        raise SimulationError(f"rank {MPI.COMM_WORLD.rank} could not build its walkers")
    boost.workers.WalkerHost.__init__ = cannot_build
from boost.cli import main
main(["run", "p.yaml", "-o", "run", "--quiet"])
"""


@pytest.mark.skipif(_mpiexec() is None, reason="needs the mpi extra: pip install -e '.[mpi]'")
@pytest.mark.parametrize("failing", [0, 1])
def test_a_rank_that_cannot_build_its_walkers_stops_every_rank_with_one_line(tmp_path, failing):
    # rank 0 failing leaves rank 1 with walkers waiting for commands: it must be told to stop
    (tmp_path / "p.yaml").write_text(LADDER.replace("PLATFORM", "Reference"))
    (tmp_path / "fail.py").write_text(FAILING_RANK)
    command = [_mpiexec(), "-n", "2", sys.executable, "fail.py", str(failing)]
    result = subprocess.run(command, cwd=tmp_path, capture_output=True, text=True, timeout=120)  # no hang
    assert result.returncode != 0
    assert f"rank {failing} could not build its walkers" in result.stderr and "Traceback" not in result.stderr


def _ladder_hosts(tmp_path, count):
    from boost.plan import make_plan
    from boost.scheduler import Scheduler

    (tmp_path / "p.yaml").write_text(LADDER.replace("PLATFORM", "Reference"))
    scheduler = Scheduler(make_plan(load_protocol(tmp_path / "p.yaml")), tmp_path / "run", progress=False)
    setup = scheduler._walker_setup()
    hosts = [WalkerHost(setup, range(4)) for _ in range(count)]
    for host in hosts:
        host.draw_velocities(dict(enumerate(setup.seeds)))
        host.propagate(50, False)
    return setup, hosts


def test_an_assigned_condition_is_taken_as_if_applied_at_once(tmp_path):
    # A host lets a walker take a new condition at its next step (or before a checkpoint);
    # the trajectory must be the one a walker moved at once follows, bit for bit.
    setup, (waiting, at_once) = _ladder_hosts(tmp_path, 2)
    swapped = {0: 1, 1: 0, 2: 3, 3: 2}
    waiting.assign(swapped)
    for r, k in swapped.items():
        at_once.walkers[r].apply(setup.conditions[k])
    for _ in range(2):
        (a,), (b,) = waiting.propagate(50, True).values(), at_once.propagate(50, True).values()
        assert np.array_equal(a.positions_r, b.positions_r) and np.array_equal(a.potential_r, b.potential_r)
    waiting.assign({0: 0, 1: 1})
    at_once.walkers[0].apply(setup.conditions[0])
    at_once.walkers[1].apply(setup.conditions[1])
    assert waiting.checkpoints() == at_once.checkpoints()
    assert [w.condition.index for w in waiting.walkers.values()] == [0, 1, 3, 2]


def test_a_script_without_a_main_guard_is_told_so(tmp_path):
    # Python's multiprocessing runs the main script again in each worker it starts (its
    # documented "safe importing of main module" rule); without the guard the script's run
    # starts again there and the worker dies: the error has to say why, in one line.
    (tmp_path / "p.yaml").write_text(LADDER.replace("PLATFORM", "Reference"))
    script = tmp_path / "unguarded.py"
    script.write_text("from boost.protocol import load_protocol\n"
                      "from boost.scheduler import run_protocol\n"
                      f"run_protocol(load_protocol({str(tmp_path / 'p.yaml')!r}), {str(tmp_path / 'run')!r}, "
                      "progress=False, workers=2)\n")
    done = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=300)
    assert done.returncode != 0
    last = done.stderr.strip().splitlines()[-1]
    assert "died while starting" in last and "if __name__ == \"__main__\":" in last and str(script) in last
    (tmp_path / "guarded.py").write_text(script.read_text().replace("run_protocol(load", "if __name__ == '__main__':\n"
                                                                    "    run_protocol(load"))
    done = subprocess.run([sys.executable, str(tmp_path / "guarded.py")], capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr
