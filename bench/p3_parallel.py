"""P3, parallel efficiency: 2 worker processes vs 1, and 2 MPI ranks vs 1.

Workload where per-cycle MD dominates: 4 umbrella windows along phi of capped alanine in
OBC2 implicit solvent, CPU platform with 1 thread per context, neighbour swaps between
windows every 1 ps cycle. The real Scheduler runs it with workers=1 (all walkers in the
driver process) and workers=2 (two worker processes), and under
``mpiexec -n 1`` and ``mpiexec -n 2`` (this script run again as an MPI program, one
worker per rank). Only the cycle loop is timed; trials alternate the layouts.

Speedup = loop time with 1 / loop time with 2 (target >= 1.8 on 2 cores). That needs an
idle machine: when other processes compete for the cores, the kernel's fair share gives
two processes more CPU than one and wall-time speedups come out too high or too low. So
the CPU time of the whole process tree over the loop is measured too, and
2 x CPU(1) / CPU(2) is printed as a load-robust estimate of the speedup on an idle
machine (it counts the extra work of the parallel layout but not idle waiting; MPICH
ranks busy-wait, so for MPI their waiting is counted as work and the estimate is low).

Run: python bench/p3_parallel.py [--production-ps 10] [--trials 2] [--mpiexec PATH]
"""

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
from pathlib import Path

import benchlib

TARGET = 1.8

PROTOCOL = """\
protocol: 1
title: P3 benchmark, 4 exchanging umbrella windows, capped alanine in OBC2
system: alanine-obc2
seed: 303
temperature: 300 K
timestep: 2 fs
platform: {{name: CPU, threads: 1}}
coordinates:
  phi: {{dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}}
  psi: {{dihedral: ["resid 1 and name N", "resid 1 and name CA", "resid 1 and name C", "resid 2 and name N"]}}
umbrella:
  phi: {{centres: [-150 deg, -110 deg, -70 deg, -30 deg], spring: 300 kJ/mol/rad**2}}
exchange: {{pairs: adjacent}}
run:
  cycle: 1 ps
  production: {production} ps
"""


def mpi_child(protocol_path, folder):
    """Run under mpiexec: rank 0 drives a timed run, the other ranks host walkers."""
    from boost.workers import mpi_world, release_waiting_ranks, serve_mpi_rank

    comm = mpi_world()
    if comm is not None and comm.rank > 0:
        serve_mpi_rank(comm)
        return
    try:
        # every rank of this machine is a child of the launcher's proxy, our parent
        result = benchlib.timed_run(protocol_path, folder, workers=1, comm=comm, cpu_root=os.getppid())
    finally:
        release_waiting_ranks(comm)
    print("RESULT " + json.dumps({"loop_s": result["loop_s"], "loop_cpu_s": result["loop_cpu_s"],
                                  "steps": result["steps"],
                                  "setup_s": result["setup_s"], "ranks": 1 if comm is None else comm.size}))


def run_mpi(mpiexec, ranks, protocol_path, folder):
    shutil.rmtree(folder, ignore_errors=True)
    command = [mpiexec, "-n", str(ranks), sys.executable, __file__, "--mpi-child", str(protocol_path), str(folder)]
    done = subprocess.run(command, capture_output=True, text=True, timeout=1800)
    for line in done.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError(f"mpiexec -n {ranks} failed (exit {done.returncode}): {done.stderr.strip()[-2000:]}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--production-ps", type=float, default=10.0)
    parser.add_argument("--trials", type=int, default=2)
    parser.add_argument("--mpiexec", default=str(Path(sys.executable).parent / "mpiexec"))
    parser.add_argument("--mpi-child", nargs=2, metavar=("PROTOCOL", "FOLDER"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.mpi_child:
        mpi_child(*args.mpi_child)
        return
    benchlib.describe_machine("P3 parallel efficiency: 2 workers vs 1, 2 MPI ranks vs 1")
    print(f"4 walkers of capped alanine (OBC2, CPU platform, 1 thread each), cycle 1 ps, "
          f"{args.production_ps:g} ps per walker per run, {args.trials} trials\n", flush=True)
    have_mpi = os.access(args.mpiexec, os.X_OK)
    times = {"workers=1": [], "workers=2": [], "mpiexec -n 1": [], "mpiexec -n 2": []}
    cpus = {key: [] for key in times}
    with benchlib.temporary_folder("p3") as tmp:
        tmp = Path(tmp)
        path = benchlib.write_protocol(tmp, "p3", PROTOCOL.format(production=args.production_ps))
        for trial in range(args.trials):
            for workers in (1, 2):
                result = benchlib.timed_run(path, tmp / f"w{workers}-{trial}", workers=workers)
                times[f"workers={workers}"].append(result["loop_s"])
                cpus[f"workers={workers}"].append(result["loop_cpu_s"])
                steps = result["steps"]
            if have_mpi:
                for ranks in (1, 2):
                    result = run_mpi(args.mpiexec, ranks, path, tmp / f"mpi{ranks}-{trial}")
                    times[f"mpiexec -n {ranks}"].append(result["loop_s"])
                    cpus[f"mpiexec -n {ranks}"].append(result["loop_cpu_s"])
            print(f"trial {trial}: " + ", ".join(f"{k} {v[-1]:.1f} s" for k, v in times.items() if v), flush=True)
    print()
    rows = [(k, " / ".join(f"{t:.1f}" for t in v), " / ".join(f"{c:.1f}" for c in cpus[k]),
             f"{steps / statistics.median(v):.0f}") for k, v in times.items() if v]
    benchlib.print_table(("layout", "loop wall s per trial", "loop CPU s per trial", "median steps/s"), rows)
    print()
    results = [("2 worker processes vs 1", "workers=2", "workers=1")]
    if have_mpi:
        results.append(("2 MPI ranks vs 1", "mpiexec -n 2", "mpiexec -n 1"))
    else:
        print(f"no MPI: {args.mpiexec} not found")
    summary = []
    for name, two, one in results:
        speedups = [a / b for a, b in zip(times[one], times[two])]
        speedup = statistics.median(speedups)
        estimate = statistics.median([2 * a / b for a, b in zip(cpus[one], cpus[two])])
        summary.append((name, " / ".join(f"{s:.2f}" for s in speedups), f"{speedup:.2f}",
                        benchlib.verdict(speedup, TARGET), f"{estimate:.2f}", benchlib.verdict(estimate, TARGET)))
    benchlib.print_table(("comparison", "wall speedup per trial", "median", f"target >= {TARGET}",
                          "CPU-based estimate", f"target >= {TARGET}"), summary)
    benchlib.describe_load("end")


if __name__ == "__main__":
    main()
