"""P7, solute scaling: the cost of the energy parts next to plain MD, one context each.

Capped alanine (ACE-ALA-NME) solvated in TIP3P (padding 1 nm, PME, cutoff 1 nm, bonds to
hydrogen constrained) on the CPU platform, one thread. Two contexts side by side:

- plain: the original System, LangevinMiddleIntegrator 300 K, 1/ps, 2 fs;
- scaled: boost.solute_scaling's copy with the peptide as solute, at λ = 0.6, same
  integrator; every cycle ends with compute_solute_parts (three energies and the
  restored parameters).

Printed: time of one MD step of each, of one part evaluation (and of one plain energy
evaluation for scale), and the cycle rate ratio scaled / plain for cycles of 100, 500
and 1000 steps (trials alternate sides; the median ratio is the result). The target
for a solute-scaled run is ≥ 0.9 × plain MD steps/s; the driver's own overhead is not
in this loop (P1 measures that).

Run: python bench/p7_solute_parts.py [--trials 5]
"""

import argparse
import statistics
import time

import numpy as np
import openmm
from openmm import unit

import benchlib
from boost import systems
from boost.solute_scaling import build_solute_scaled_system, compute_solute_parts, set_solute_scale
from boost.spec import Node
from boost.system_spec import read_system_spec

TARGET = 0.9
SPEC = {"peptide": {"sequence": ["ACE", "ALA", "NME"], "phi": "-80 deg", "psi": "75 deg"},
        "water_box": {"padding": "1 nm"}, "nonbonded": {"method": "pme", "cutoff": "1 nm"}}


def _context(system, positions):
    integrator = openmm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond, 0.002 * unit.picosecond)
    integrator.setRandomNumberSeed(7)
    platform = openmm.Platform.getPlatformByName("CPU")
    context = openmm.Context(system, integrator, platform, {"Threads": "1"})
    context.setPositions(positions * unit.nanometer)
    openmm.LocalEnergyMinimizer.minimize(context, maxIterations=200)
    return context, integrator


def _seconds(function, repeats):
    start = time.perf_counter()
    for _ in range(repeats):
        function()
    return (time.perf_counter() - start) / repeats


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=5)
    args = parser.parse_args()
    benchlib.describe_machine("P7 solute scaling: part evaluation vs MD steps (CPU platform, 1 thread)")
    built = systems.build_system(read_system_spec(Node(SPEC, "bench", "system"), "."))
    solute = [a.index for a in built.topology.atoms() if a.residue.name != "HOH"]
    start = time.perf_counter()
    scaled = build_solute_scaled_system(built.system, solute)
    print(f"system    {built.system.getNumParticles()} particles, solute {len(solute)} atoms; "
          f"build_solute_scaled_system {time.perf_counter() - start:.3f} s", flush=True)
    plain, plain_integrator = _context(built.system, built.positions)
    walker, walker_integrator = _context(scaled.system, built.positions)
    set_solute_scale(walker, 0.6)
    plain_integrator.step(200)
    walker_integrator.step(200)

    step_plain = _seconds(lambda: plain_integrator.step(100), 5) / 100
    step_scaled = _seconds(lambda: walker_integrator.step(100), 5) / 100
    energy = _seconds(lambda: plain.getState(getEnergy=True), 20)
    parts = _seconds(lambda: compute_solute_parts(scaled, walker), 20)
    benchlib.print_table(("piece", "ms", "in plain MD steps"), [
        ("MD step, plain", f"{1e3 * step_plain:.3f}", "1"),
        ("MD step, scaled (λ = 0.6)", f"{1e3 * step_scaled:.3f}", f"{step_scaled / step_plain:.2f}"),
        ("energy evaluation, plain", f"{1e3 * energy:.3f}", f"{energy / step_plain:.2f}"),
        ("compute_solute_parts", f"{1e3 * parts:.3f}", f"{parts / step_plain:.2f}")])

    rows = []
    for steps in (100, 500, 1000):
        ratios = []
        for _ in range(args.trials):
            plain_s = _seconds(lambda: plain_integrator.step(steps), 1)
            scaled_s = _seconds(lambda: (walker_integrator.step(steps), compute_solute_parts(scaled, walker)), 1)
            ratios.append(plain_s / scaled_s)
        ratio = statistics.median(ratios)
        rows.append((steps, f"{ratio:.3f}", f"{min(ratios):.3f} - {max(ratios):.3f}",
                     benchlib.verdict(ratio, TARGET)))
    print()
    benchlib.print_table(("steps per cycle", "scaled / plain steps/s (median)", "range", f"target ≥ {TARGET}"), rows)
    finite = np.isfinite(compute_solute_parts(scaled, walker)).all()
    print(f"parts finite after the run: {finite}")
    benchlib.describe_load("end")


if __name__ == "__main__":
    main()
