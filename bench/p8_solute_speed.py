"""P8, solute scaling speed: MD steps/s of a solute-scaled walker vs plain MD, one system.

The bundled system ``alanine-tip3p`` (capped alanine in 233 TIP3P waters, PME with a
0.9 nm cutoff, bonds to hydrogen constrained) on the CPU platform, with the platform
properties a boost walker gets (``boost.engine.platform_properties``: ``--threads``
threads, DeterministicForces on unless ``--fast-forces``). Two contexts, one integrator
each (LangevinMiddleIntegrator, 300 K, 1/ps, 2 fs, the same seed):

- plain: the built System;
- scaled: ``build_solute_scaled_system`` with the peptide as solute (mdtraj selection
  ``protein``), put at λ = ``--scale`` (0.6) by ``set_solute_scale``.

Each trial runs one cycle (``--cycle-steps`` MD steps) on each side, in alternating
order, timed on its own (wall and CPU time): plain MD, scaled MD, and scaled MD followed
by one ``compute_solute_parts`` (what a solute-tempering walker does per cycle). Printed:
the median steps/s of each side and the median over trials of the ratios scaled / plain,
wall and CPU (target ≥ 0.9 for MD alone, judged on CPU time, which other processes on the
core do not stretch; the cycle with its part evaluation is shown beside it), the
cost of one part evaluation in plain MD steps and as a share of a cycle's MD, and where
the time of one force evaluation goes, force by force, in each system (the profile that
says what to change if the ratio misses).

With one thread the process pins itself to one core, so that both sides get the same
core whatever else runs on the machine.

Run: python bench/p8_solute_speed.py [--trials 9] [--cycle-steps 500] [--threads 1]
"""

import argparse
import statistics
import time

import mdtraj
import openmm
from openmm import unit

import benchlib
from boost import systems
from boost.engine import platform_properties
from boost.protocol import PlatformSettings
from boost.solute_scaling import build_solute_scaled_system, compute_solute_parts, set_solute_scale
from boost.spec import Node
from boost.system_spec import read_system_spec

TARGET = 0.9
SYSTEM = "alanine-tip3p"
SOLUTE = "protein"


def _context(system, built, properties):
    integrator = openmm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond, 0.002 * unit.picosecond)
    integrator.setRandomNumberSeed(7)
    context = openmm.Context(system, integrator, openmm.Platform.getPlatformByName("CPU"), properties)
    context.setPeriodicBoxVectors(*built.box_vectors * unit.nanometer)
    context.setPositions(built.positions * unit.nanometer)
    return context, integrator


def _equilibrate(context, integrator, steps):
    openmm.LocalEnergyMinimizer.minimize(context, 10.0, 500)
    context.setVelocitiesToTemperature(300 * unit.kelvin, 11)
    integrator.step(steps)


def _seconds(function, repeats=1):
    start = time.perf_counter()
    for _ in range(repeats):
        function()
    return (time.perf_counter() - start) / repeats


def _median_seconds(function, repeats):
    return statistics.median(_seconds(function) for _ in range(repeats))


def _trials(sides, n_trials):
    """(wall, CPU) seconds per trial of each side; the order of the sides rotates from trial to trial.

    CPU time is this process's, OpenMM's threads included: other processes on the core
    stretch wall times but not it.
    """
    seconds = {name: [] for name in sides}
    names = list(sides)
    for trial in range(n_trials):
        for name in names[trial % len(names):] + names[:trial % len(names)]:
            cpu = time.process_time()
            wall = _seconds(sides[name])
            seconds[name].append((wall, time.process_time() - cpu))
    return seconds


def _ratio_row(name, seconds, steps):
    """steps/s and the median ratios scaled / plain (of steps/s), wall and CPU."""
    row = [name]
    for k in (0, 1):
        ratios = [p[k] / s[k] for p, s in zip(seconds["plain MD"], seconds[name])]
        row += [f"{steps / statistics.median(s[k] for s in seconds[name]):.1f}",
                f"{statistics.median(ratios):.3f} ({min(ratios):.3f} - {max(ratios):.3f})"]
    return row, statistics.median(p[1] / s[1] for p, s in zip(seconds["plain MD"], seconds[name]))


def _by_force(system, built, properties):
    """Median ms of one energy + forces evaluation of each force, one force group each."""
    copy = openmm.XmlSerializer.clone(system)
    names = []
    for group, force in enumerate(copy.getForces()):
        force.setForceGroup(group)
        names.append(type(force).__name__)
    context, _ = _context(copy, built, properties)
    return {f"{group}: {name}": 1e3 * _median_seconds(
        lambda: context.getState(getEnergy=True, getForces=True, groups={group}), 15)
        for group, name in enumerate(names)}


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=9)
    parser.add_argument("--cycle-steps", type=int, default=500, help="MD steps per cycle (500 = 1 ps)")
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--scale", type=float, default=0.6, help="solute scale λ of the scaled walker")
    parser.add_argument("--fast-forces", action="store_true", help="DeterministicForces off")
    args = parser.parse_args()
    if args.threads == 1:
        benchlib.pin_to_one_core()
    properties = platform_properties("CPU", PlatformSettings("CPU", args.threads, not args.fast_forces))
    benchlib.describe_machine(f"P8 solute scaling speed: scaled walker vs plain MD, CPU platform {properties}")
    built = systems.build_system(read_system_spec(Node(SYSTEM, "bench", "system"), "."))
    solute = mdtraj.Topology.from_openmm(built.topology).select(SOLUTE)
    scaled = build_solute_scaled_system(built.system, solute)
    n_waters = sum(residue.name == "HOH" for residue in built.topology.residues())
    print(f"system    {SYSTEM}: {built.system.getNumParticles()} particles ({len(solute)} solute atoms, "
          f"selection '{SOLUTE}'; {n_waters} waters), cube edge {built.box_vectors[0, 0]:.3f} nm; "
          f"λ = {args.scale}, {args.cycle_steps} steps per cycle, {args.trials} trials", flush=True)

    plain, plain_integrator = _context(built.system, built, properties)
    walker, walker_integrator = _context(scaled.system, built, properties)
    set_solute_scale(walker, args.scale)
    for context, integrator in ((plain, plain_integrator), (walker, walker_integrator)):
        _equilibrate(context, integrator, args.cycle_steps)

    steps = args.cycle_steps
    seconds = _trials({
        "plain MD": lambda: plain_integrator.step(steps),
        "scaled MD": lambda: walker_integrator.step(steps),
        "scaled MD + parts": lambda: (walker_integrator.step(steps), compute_solute_parts(scaled, walker)),
    }, args.trials)
    rows = []
    for name in ("plain MD", "scaled MD", "scaled MD + parts"):
        row, cpu_ratio = _ratio_row(name, seconds, steps)
        rows.append(row + ["" if name == "plain MD" else benchlib.verdict(cpu_ratio, TARGET)])
    print()
    benchlib.print_table(("side", "steps/s, wall", "÷ plain, wall: median (range)", "steps/s, CPU",
                          "÷ plain, CPU: median (range)", f"CPU ratio ≥ {TARGET}"), rows)

    step_plain = statistics.median(wall for wall, _ in seconds["plain MD"]) / steps
    cycle_scaled = statistics.median(wall for wall, _ in seconds["scaled MD"])
    parts = _median_seconds(lambda: compute_solute_parts(scaled, walker), 21)
    energy = _median_seconds(lambda: walker.getState(getEnergy=True), 21)
    print()
    benchlib.print_table(("piece", "ms", "in plain MD steps", f"share of a {steps}-step cycle's scaled MD"), [
        ("MD step, plain", f"{1e3 * step_plain:.3f}", "1", ""),
        ("energy evaluation, scaled", f"{1e3 * energy:.3f}", f"{energy / step_plain:.2f}",
         f"{100 * energy / cycle_scaled:.2f} %"),
        ("compute_solute_parts", f"{1e3 * parts:.3f}", f"{parts / step_plain:.2f}",
         f"{100 * parts / cycle_scaled:.2f} %")])

    plain_forces = _by_force(built.system, built, properties)
    scaled_forces = _by_force(scaled.system, built, properties)
    print("\none energy + forces evaluation per force (ms, median of 15; PME's reciprocal part is in "
          "the NonbondedForce)")
    benchlib.print_table(("system", "force group: force", "ms"),
                         [("plain", name, f"{ms:.3f}") for name, ms in plain_forces.items()]
                         + [("scaled", name, f"{ms:.3f}") for name, ms in scaled_forces.items()])
    benchlib.describe_load("end")


if __name__ == "__main__":
    main()
