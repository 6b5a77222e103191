"""P1, driver overhead: a boost replica-exchange run against a bare loop of integrator.step.

Both sides run on one core (this process and every worker it starts are pinned to the
same core), over the same systems (the plan's OpenMM System, umbrella forces included),
integrator, platform, temperatures and steps per cycle. The boost side is the real
Scheduler into a temporary run folder; only its cycle loop is timed (worker start,
contexts, minimisation and the first checkpoint are setup and left out; the bare loop
likewise leaves out context creation and one warm-up cycle). Trials alternate
boost/bare so slow drifts in machine load hit both.

Ratio = aggregate steps/s of boost / steps/s of the bare loop (target >= 0.97), by wall
time and by CPU time (this process plus its worker processes), the second being less
sensitive to other load on the machine.

Run: python bench/p1_overhead.py [--walkers 8] [--cycle-ps 0.5] [--production-ps 100] [--trials 3]
"""

import argparse
import statistics
import time

import numpy as np

import benchlib

TARGET = 0.97

PROTOCOL = """\
protocol: 1
title: P1 benchmark, temperature replica exchange of capped alanine in vacuum
system: alanine-vacuum
seed: 101
temperature: 300 K
timestep: 2 fs
platform: {{name: Reference, workers: 1}}
coordinates:
  phi: {{dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}}
  psi: {{dihedral: ["resid 1 and name N", "resid 1 and name CA", "resid 1 and name C", "resid 2 and name N"]}}
temperatures: {{lowest: 300 K, highest: 450 K, count: {walkers}}}
exchange: {{scheme: neighbours}}
run:
  cycle: {cycle} ps
  production: {production} ps
"""


def per_call_cpu_us(function, repeats):
    start = time.process_time()
    for _ in range(repeats):
        function()
    return (time.process_time() - start) / repeats * 1e6


def cost_breakdown(scheduler, plan, folder):
    """CPU µs per cycle of each piece of driver work, measured in this process."""
    from boost.store import Ledger
    from boost.workers import SerialWorkers

    workers = SerialWorkers(scheduler._walker_setup())
    host, n = workers.host, plan.n_walkers
    walker = host.walkers[0]
    steps = plan.protocol.run.steps_per_cycle
    rows = [("MD: integrator.step, all walkers", per_call_cpu_us(lambda: walker.integrator.step(steps), 20) * n)]
    rows.append(("worker: getState + numpy positions (observe)", per_call_cpu_us(walker.observe, 300) * n))
    observations = {r: w.observe() for r, w in host.walkers.items()}
    rows.append(("worker: coordinate values in numpy (all walkers at once)", per_call_cpu_us(
        lambda: host._coordinate_values(observations), 300)))
    reports = [host.propagate(0, False)[r] for r in range(n)]
    import pickle
    rows.append(("pipes: pickle + unpickle the reports", per_call_cpu_us(
        lambda: pickle.loads(pickle.dumps(reports)), 300)))
    assignment = list(range(n))
    rows.append(("driver: reduced potentials u_kr", per_call_cpu_us(
        lambda: scheduler._evaluate(reports, assignment, 0), 300)))
    values_rc, u_kr = scheduler._evaluate(reports, assignment, 0)
    rng = np.random.default_rng(1)
    rows.append(("driver: swap attempts", per_call_cpu_us(lambda: scheduler._swap(u_kr, assignment, 0, rng), 300)))
    ledger = Ledger(folder / "breakdown.sqlite", coordinate_names=tuple(plan.coordinates))
    ledger.create(plan.conditions, {"benchmark": True})
    counter = iter(range(10**9))
    rows.append(("driver: ledger transaction (SQLite)", per_call_cpu_us(lambda: ledger.record_cycle(
        next(counter), time=0.0, production=True, condition_r=assignment,
        potential_r=[o.potential for o in reports], volume_r=[None] * n, values_rc=values_rc, u_kr=u_kr,
        swaps=[(0, 1, 1, 0)]), 300)))
    ledger.close()
    checkpoint_every = plan.protocol.run.checkpoint_every
    rows.append((f"driver: checkpoint (every {checkpoint_every} cycles, per cycle)", per_call_cpu_us(
        lambda: scheduler._checkpoint(workers, 0, assignment, rng), 20) / checkpoint_every))
    workers.close()
    return rows


def layout_probe(scheduler, n_cycles):
    """Seconds (wall, CPU) to propagate all walkers n_cycles through boost.workers layouts.

    Diagnostic only (not the target): the same walkers in this process, in one worker
    process, and one process per walker.
    """
    from boost.workers import ProcessWorkers, SerialWorkers

    setup = scheduler._walker_setup()
    n = len(setup.seeds)
    steps = scheduler.plan.protocol.run.steps_per_cycle
    layouts = [("all walkers in the driver process", lambda: SerialWorkers(setup)),
               ("all walkers in one worker process", lambda: ProcessWorkers(setup, [list(range(n))])),
               ("one worker process per walker", lambda: ProcessWorkers(setup, [[r] for r in range(n)]))]
    # boost uses the first two (workers=1 on one core: the first); the third shows what
    # process switching alone costs when walkers outnumber cores.
    rows = []
    for name, make in layouts:
        workers = make()
        workers.draw_velocities(dict(enumerate(setup.seeds)))
        workers.propagate(steps)
        cpu, start = benchlib.tree_cpu_seconds(), time.perf_counter()
        for _ in range(n_cycles):
            workers.propagate(steps)
        rows.append((name, time.perf_counter() - start, benchlib.tree_cpu_seconds() - cpu))
        workers.close()
    return rows


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--walkers", type=int, default=8)
    parser.add_argument("--cycle-ps", type=float, default=0.5)
    parser.add_argument("--production-ps", type=float, default=100.0)
    parser.add_argument("--trials", type=int, default=3)
    args = parser.parse_args()
    core = benchlib.pin_to_one_core()
    benchlib.describe_machine("P1 driver overhead: boost replica exchange vs bare integrator.step loop")
    print(f"pinned to core {core}; {args.walkers} walkers of capped alanine (vacuum, Reference), "
          f"temperature ladder 300-450 K with neighbour swaps, cycle {args.cycle_ps} ps, "
          f"{args.production_ps} ps per walker per trial\n", flush=True)
    rows, wall_ratios, cpu_ratios = [], [], []
    with benchlib.temporary_folder("p1") as tmp:
        from pathlib import Path
        tmp = Path(tmp)
        path = benchlib.write_protocol(tmp, "p1", PROTOCOL.format(
            walkers=args.walkers, cycle=args.cycle_ps, production=args.production_ps))
        for trial in range(args.trials):
            result = benchlib.timed_run(path, tmp / f"run-{trial}")
            plan = result["plan"]
            bare_s, bare_cpu = benchlib.bare_loop_seconds(plan, result["n_cycles"], plan.protocol.run.steps_per_cycle)
            wall_ratios.append(bare_s / result["loop_s"])
            cpu_ratios.append(bare_cpu / result["loop_cpu_s"])
            overhead_ms = (result["loop_s"] - bare_s) / result["n_cycles"] * 1e3
            rows.append((trial, f"{result['steps'] / result['loop_s']:.0f}", f"{result['steps'] / bare_s:.0f}",
                         f"{wall_ratios[-1]:.3f}", f"{cpu_ratios[-1]:.3f}", f"{overhead_ms:.2f}",
                         f"{result['setup_s']:.1f}"))
        benchlib.print_table(("trial", "boost steps/s", "bare steps/s", "ratio (wall)", "ratio (CPU)",
                              "overhead ms/cycle", "boost setup s"), rows)
        wall, cpu = statistics.median(wall_ratios), statistics.median(cpu_ratios)
        print(f"\nP1 median ratio: wall {wall:.3f}, CPU {cpu:.3f} (target >= {TARGET}): "
              f"{benchlib.verdict(wall, TARGET)} by wall time, {benchlib.verdict(cpu, TARGET)} by CPU time")
        benchlib.describe_load("end")
        print("Where the time of one cycle goes (CPU µs, measured in this process):")
        from boost.scheduler import Scheduler
        (tmp / "breakdown").mkdir()
        scheduler = Scheduler(plan, tmp / "breakdown", progress=False, workers=1)
        pieces = cost_breakdown(scheduler, plan, tmp)
        md = pieces[0][1]
        benchlib.print_table(("piece", "µs per cycle", "share of MD"),
                             [(name, f"{us:.0f}", f"{us / md:.1%}") for name, us in pieces])
        n_probe = result["n_cycles"] // 2
        bare_s, bare_cpu = benchlib.bare_loop_seconds(plan, n_probe, plan.protocol.run.steps_per_cycle)
        print(f"\nWorker layouts (diagnostic: workers.propagate only, {n_probe} cycles, vs a bare loop "
              "measured next to them):")
        benchlib.print_table(("layout", "wall s", "CPU s", "bare/layout (wall)", "bare/layout (CPU)"),
                             [("bare integrator.step loop", f"{bare_s:.2f}", f"{bare_cpu:.2f}", "1", "1")] +
                             [(name, f"{w:.2f}", f"{c:.2f}", f"{bare_s / w:.3f}", f"{bare_cpu / c:.3f}")
                              for name, w, c in layout_probe(scheduler, n_probe)])


if __name__ == "__main__":
    main()
