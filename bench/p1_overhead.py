"""P1, driver overhead: a boost replica-exchange run against a bare loop of integrator.step.

Both sides run on one core (this process is pinned), in this process, over the same
systems (the plan's OpenMM System), integrator, platform, temperatures and steps per
cycle. The boost side is the real Scheduler (workers=1: walkers in this process) into a
temporary run folder. The two sides alternate cycle by cycle: before each boost cycle one
bare cycle of integrator.step over as many contexts runs, each side timed on its own
(wall and CPU), so drifts in the machine's speed (large on shared virtual machines) hit
both alike. A boost cycle is everything between two propagations: MD, observation,
coordinate values, reduced potentials, swaps, the ledger records, checkpoints.

Ratio = aggregate steps/s of boost / steps/s of the bare loop (target >= 0.97).

Cases: capped alanine in vacuum on Reference (0.5 and 2 ps cycles), and in OBC2 implicit
solvent on CPU with 1 thread (0.5 ps cycles).

Run: python bench/p1_overhead.py [--walkers 8] [--trials 3] [--quick]
"""

import argparse
import statistics
import time

import numpy as np

import benchlib
from boost.scheduler import Scheduler

TARGET = 0.97

PROTOCOL = """\
protocol: 1
title: P1 benchmark, temperature replica exchange of capped alanine
system: {system}
seed: 101
temperature: 300 K
timestep: 2 fs
platform: {platform}
coordinates:
  phi: {{dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}}
  psi: {{dihedral: ["resid 1 and name N", "resid 1 and name CA", "resid 1 and name C", "resid 2 and name N"]}}
temperatures: {{lowest: 300 K, highest: 450 K, count: {walkers}}}
exchange: {{pairs: adjacent}}
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
    stream = per_call_cpu_us(lambda: walker.step(0), 300) * n
    observe = per_call_cpu_us(walker.observe, 300) * n
    rows.append(("worker: each walker's own random stream around its steps (Walker.step(0))", stream))
    rows.append(("worker: getState + numpy positions (observe)", observe))
    rows.append(("worker: the rest of the host's report: coordinate values, finiteness (all walkers at once)",
                 per_call_cpu_us(lambda: host.propagate(0, False), 300) - stream - observe))
    reports = workers.propagate(0)
    import pickle
    rows.append(("pipes: pickle + unpickle the reports", per_call_cpu_us(
        lambda: pickle.loads(pickle.dumps(reports)), 300)))
    assignment = list(range(n))
    rows.append(("driver: reduced potentials u_kr", per_call_cpu_us(
        lambda: scheduler._evaluate(reports, assignment, 0), 300)))
    values_rc, solute_r2, u_kr = scheduler._evaluate(reports, assignment, 0)
    rng = np.random.default_rng(1)
    rows.append(("driver: swap attempts", per_call_cpu_us(lambda: scheduler._swap(u_kr, assignment, 0, rng), 300)))
    # every walker changes temperature, taken as at its next step (Walker.step); worst case
    swapped = [[plan.conditions[r ^ 1] for r in range(n)], list(plan.conditions[:n])]
    flips = iter(range(10**9))

    def all_to_new_conditions():
        for w, condition in zip(host.walkers.values(), swapped[next(flips) % 2]):
            w._apply(condition)
    rows.append(("worker: all walkers to new conditions (at their next step; worst case)", per_call_cpu_us(
        all_to_new_conditions, 300)))
    # cycles reach the file in batches: here one per checkpoint (cycles come faster than a second)
    checkpoint_every = plan.protocol.run.checkpoint_every
    ledger = Ledger(folder / "breakdown.sqlite", coordinate_names=tuple(plan.coordinates), write_every=1e9)
    ledger.create(plan.conditions, {"benchmark": True})
    counter = iter(range(10**9))

    def record_a_batch():
        for _ in range(checkpoint_every):
            ledger.record_cycle(next(counter), time=0.0, production=True, condition_r=assignment,
                                potential_r=reports.potential_r, volume_r=reports.volume_r, values_rc=values_rc,
                                u_kr=u_kr, solute_r2=solute_r2, swaps=[(0, 1, 1, 0)])
        ledger.write_waiting()
    rows.append((f"driver: ledger records, written {checkpoint_every} cycles per transaction (per cycle)",
                 per_call_cpu_us(record_a_batch, 30) / checkpoint_every))
    ledger.close()
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


class _Interleaved:
    """The scheduler's workers, with one bare cycle run (and timed) before each propagation."""

    def __init__(self, workers, bare):
        self.workers, self.bare = workers, bare
        self.boost = [0.0, 0.0]     # wall, CPU seconds
        self.plain = [0.0, 0.0]
        self.mark = None

    def __getattr__(self, name):
        return getattr(self.workers, name)

    def _lap(self, totals):
        now = (time.perf_counter(), time.process_time())
        if self.mark is not None:
            totals[0] += now[0] - self.mark[0]
            totals[1] += now[1] - self.mark[1]
        self.mark = now

    def propagate(self, n_steps, with_positions=False):
        self._lap(self.boost)
        self.bare.cycle()
        self._lap(self.plain)
        return self.workers.propagate(n_steps, with_positions)

    def finish(self):
        self._lap(self.boost)


class InterleavedScheduler(Scheduler):
    bare = None
    timing = None

    def _loop(self, workers, *args):
        self.timing = _Interleaved(workers, self.bare)
        try:
            return super()._loop(self.timing, *args)
        finally:
            self.timing.finish()


def interleaved_trial(path, folder):
    from boost.protocol import load_protocol
    from boost.plan import make_plan

    plan = make_plan(load_protocol(path))
    scheduler = InterleavedScheduler(plan, folder, progress=False, workers=1)
    # Contexts made first run 1-2 % slower than identical ones made after them (measured
    # here: four identical bare loops stepped in turn, the first made was the slow one), so
    # a set made and kept before both sides spares either of them that place.
    placeholder = benchlib.BareLoop(plan)
    scheduler.bare = benchlib.BareLoop(plan)
    scheduler.run()
    del placeholder
    return plan, scheduler.timing


#: (system, platform, cycle lengths in ps, production ps per walker): the tiny vacuum
#: system on Reference is the hard case (a cycle of MD costs little, so fixed per-cycle
#: work weighs most); implicit solvent on CPU is closer to production use.
CASES = (("alanine-vacuum", "{name: Reference, workers: 1}", (0.5, 2.0), 100.0),
         ("alanine-obc2", "{name: CPU, threads: 1, workers: 1}", (0.5,), 5.0))


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--walkers", type=int, default=8)
    parser.add_argument("--trials", type=int, default=3)
    parser.add_argument("--quick", action="store_true", help="the vacuum case only")
    args = parser.parse_args()
    core = benchlib.pin_to_one_core()
    benchlib.describe_machine("P1 driver overhead: boost replica exchange vs bare integrator.step loop")
    print(f"pinned to core {core}; {args.walkers} walkers of capped alanine, temperature ladder "
          "300-450 K with neighbour swaps; boost and bare cycles alternate\n", flush=True)
    rows, summary = [], []
    with benchlib.temporary_folder("p1") as tmp:
        from pathlib import Path
        tmp = Path(tmp)
        for system, platform, cycles, production in CASES[:1] if args.quick else CASES:
            for cycle_ps in cycles:
                name = f"{system}-{cycle_ps:g}"
                path = benchlib.write_protocol(tmp, name, PROTOCOL.format(
                    system=system, platform=platform, walkers=args.walkers, cycle=cycle_ps, production=production))
                wall_ratios, cpu_ratios = [], []
                for trial in range(args.trials):
                    plan, timing = interleaved_trial(path, tmp / f"run-{name}-{trial}")
                    n_cycles = plan.protocol.run.n_cycles
                    steps = n_cycles * plan.protocol.run.steps_per_cycle * plan.n_walkers
                    wall_ratios.append(timing.plain[0] / timing.boost[0])
                    cpu_ratios.append(timing.plain[1] / timing.boost[1])
                    overhead_ms = (timing.boost[0] - timing.plain[0]) / n_cycles * 1e3
                    rows.append((system, plan.platform.name, f"{cycle_ps:g}", trial, f"{steps / timing.boost[0]:.0f}",
                                 f"{steps / timing.plain[0]:.0f}", f"{wall_ratios[-1]:.3f}",
                                 f"{cpu_ratios[-1]:.3f}", f"{overhead_ms:.2f}"))
                summary.append((system, cycle_ps, statistics.median(wall_ratios), statistics.median(cpu_ratios)))
        benchlib.print_table(("system", "platform", "cycle ps", "trial", "boost steps/s", "bare steps/s",
                              "ratio (wall)", "ratio (CPU)", "overhead ms/cycle"), rows)
        print()
        for system, cycle_ps, wall, cpu in summary:
            print(f"P1 median ratio, {system}, {cycle_ps:g} ps cycles: wall {wall:.3f}, CPU {cpu:.3f} "
                  f"(target >= {TARGET}): {benchlib.verdict(wall, TARGET)} by wall time, "
                  f"{benchlib.verdict(cpu, TARGET)} by CPU time")
        path = benchlib.write_protocol(tmp, "breakdown", PROTOCOL.format(
            system=CASES[0][0], platform=CASES[0][1], walkers=args.walkers, cycle=0.5, production=100.0))
        from boost.protocol import load_protocol
        from boost.plan import make_plan
        plan = make_plan(load_protocol(path))
        benchlib.describe_load("end")
        print("Where the time of one cycle goes (vacuum case, 0.5 ps cycles; CPU µs, measured in this process):")
        (tmp / "breakdown").mkdir()
        scheduler = Scheduler(plan, tmp / "breakdown", progress=False, workers=1)
        pieces = cost_breakdown(scheduler, plan, tmp)
        md = pieces[0][1]
        benchlib.print_table(("piece", "µs per cycle", "share of MD"),
                             [(name, f"{us:.0f}", f"{us / md:.1%}") for name, us in pieces])
        n_probe = plan.protocol.run.n_cycles // 2
        bare_s, bare_cpu = benchlib.bare_loop_seconds(plan, n_probe)
        print(f"\nWorker layouts (diagnostic: workers.propagate only, {n_probe} cycles, vs a bare loop "
              "measured next to them):")
        benchlib.print_table(("layout", "wall s", "CPU s", "bare/layout (wall)", "bare/layout (CPU)"),
                             [("bare integrator.step loop", f"{bare_s:.2f}", f"{bare_cpu:.2f}", "1", "1")] +
                             [(name, f"{w:.2f}", f"{c:.2f}", f"{bare_s / w:.3f}", f"{bare_cpu / c:.3f}")
                              for name, w, c in layout_probe(scheduler, n_probe)])


if __name__ == "__main__":
    main()
