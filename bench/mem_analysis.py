"""Memory: peak RSS of analysing a 24-window run with 10^5 samples per window.

The ledger is SYNTHETIC (invented data, for this benchmark only): 24 umbrella windows
along phi (the conditions of a 24-window alanine protocol, 15 deg apart, 300
kJ/mol/rad^2), walker r always in window r, 10^5 cycles. Per window phi is a Gaussian
AR(1) series around the window centre with the umbrella's width sqrt(kT/spring) (a flat
PMF), psi uniform, the potential energy Gaussian; the reduced potentials follow from
them with boost.conditions, as a run would store them. It is written cycle by cycle with
boost.store.Ledger.record_cycle into a run folder with the protocol copy.

boost.analysis.analyse_run then runs in a fresh subprocess; its peak RSS (VmHWM) is
reported for two kinds of data: correlated (AR(1) coefficient 0.9, statistical
inefficiency about 19, as MD gives; the analysis keeps about 1 sample in 19) and
uncorrelated (coefficient 0: every sample is uncorrelated, the worst case for MBAR's
memory; at the default analysis.memory of 1 GiB the analysis thins them evenly to what
fits, and says so; --memory-gib 8 shows the unthinned cost). With --stages, the peak of
each analysis stage is measured with tracemalloc.

Target: peak RSS <= 1 GiB.

Run: python bench/mem_analysis.py [--cycles 100000] [--rho 0.9 0.0] [--stages] [--memory-gib G]
"""

import argparse
import json
import math
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

import benchlib

LIMIT = 1024**3
N_WINDOWS = 24

PROTOCOL = """\
protocol: 1
title: SYNTHETIC ledger for the memory benchmark (invented data), 24 windows along phi
system: alanine-vacuum
seed: 1
temperature: 300 K
timestep: 2 fs
coordinates:
  phi: {{dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}}
  psi: {{dihedral: ["resid 1 and name N", "resid 1 and name CA", "resid 1 and name C", "resid 2 and name N"]}}
umbrella:
  phi: {{centres: {{from: -180 deg, to: 165 deg, count: 24}}, spring: 300 kJ/mol/rad**2}}
run:
  cycle: 0.5 ps
  production: {production} ps
basins:
  C7eq: {{phi: [-180 deg, 0 deg]}}
  C7ax: {{phi: [0 deg, 180 deg]}}
analysis:
  bins: {{phi: {{from: -180 deg, to: 180 deg, count: 36}}}}
"""

#: Address-space cap of the analysis subprocess, so a run far over the target fails with
#: MemoryError instead of pushing a shared machine into swapping or the OOM killer.
SAFETY_CAP = 6 * 1024**3

CHILD = r"""
import json, resource, sys, time, warnings
resource.setrlimit(resource.RLIMIT_AS, ({cap}, {cap}))
sys.path.insert(0, {repo!r})
from boost.analysis import analyse_run
start = time.perf_counter()
with warnings.catch_warnings(record=True) as caught:
    warnings.simplefilter("always")
    result = analyse_run({folder!r}, memory={memory!r})
seconds = time.perf_counter() - start
hwm = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0].split()[1]
print("RESULT " + json.dumps({{"seconds": seconds, "vmhwm_kib": int(hwm),
      "samples": int(result.samples_k.sum()), "g_mean": float(result.g_k.mean()),
      "thinning": int(result.thinning_k.max()),
      "warnings": [str(w.message) for w in caught if "MBAR uses" in str(w.message)]}}))
"""

STAGES = r"""
import sys, time, tracemalloc, warnings
sys.path.insert(0, {repo!r})
import boost.analysis as analysis, boost.analysis.samples as samples, boost.reweight as reweight, boost.store as store
tracemalloc.start()
rows = []
def watch(module, name, label):
    original = getattr(module, name)
    def wrapped(*args, **kwargs):
        before = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        try:
            return original(*args, **kwargs)
        finally:
            now, peak = tracemalloc.get_traced_memory()
            rows.append((label, before, peak, now))
    setattr(module, name, wrapped)
watch(samples, "read_ledger", "read_ledger (store)")
watch(analysis, "select_samples", "select_samples (decorrelation, u_kn)")
watch(analysis, "Reweighting", "Reweighting: MBAR solve, errors, overlap")
watch(reweight.Reweighting, "compute_pmf", "Reweighting.compute_pmf")
watch(reweight.Reweighting, "compute_basins", "Reweighting.compute_basins")
watch(analysis, "window_values", "window_values")
with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    analysis.analyse_run({folder!r})
for label, before, peak, after in rows:
    print(f"STAGE {{label}}|{{before / 2**20:.0f}}|{{peak / 2**20:.0f}}|{{after / 2**20:.0f}}")
"""


def write_synthetic_ledger(folder, n_cycles, rho, seed=12345):
    """A run folder with invented Gaussian-umbrella data; returns seconds spent writing."""
    from boost.conditions import build_conditions, compute_reduced_potentials
    from boost.protocol import parse_protocol
    from boost.store import LEDGER, PROTOCOL as PROTOCOL_FILE, Ledger
    from boost.units import MOLAR_GAS_CONSTANT

    folder.mkdir(parents=True)
    text = PROTOCOL.format(production=n_cycles * 0.5)
    (folder / PROTOCOL_FILE).write_text(text)
    protocol = parse_protocol(text, folder / PROTOCOL_FILE)
    conditions = build_conditions(protocol)
    ledger = Ledger(folder / LEDGER, coordinate_names=("phi", "psi"))
    ledger.create(conditions, {     # the keys the scheduler writes (boost.plan.ledger_header)
        "coordinates": ["phi", "psi"], "periodic": [True, True], "units": {"phi": "rad", "psi": "rad"},
        "umbrella": ["phi"], "n_walkers": N_WINDOWS, "temperature": 300.0, "pressure": None,
        "timestep_ps": protocol.timestep, "steps_per_cycle": protocol.run.steps_per_cycle,
        "protocol_sha256": protocol.sha256, "synthetic": "invented Gaussian-umbrella data for a benchmark"})
    rng = np.random.default_rng(seed)
    centre_r = np.array([c.centres[0] for c in conditions])
    width = math.sqrt(MOLAR_GAS_CONSTANT * 300.0 / conditions[0].springs[0])
    noise = math.sqrt(1 - rho**2)
    offset_r = rng.normal(size=N_WINDOWS)
    energy_r = rng.normal(size=N_WINDOWS)
    condition_r = list(range(N_WINDOWS))
    start = time.perf_counter()
    for cycle in range(n_cycles):
        offset_r = rho * offset_r + noise * rng.normal(size=N_WINDOWS)
        energy_r = rho * energy_r + noise * rng.normal(size=N_WINDOWS)
        phi_r = (centre_r + width * offset_r + math.pi) % (2 * math.pi) - math.pi
        values_rc = np.column_stack([phi_r, rng.uniform(-math.pi, math.pi, N_WINDOWS)])
        potential_r = -40.0 + 5.0 * energy_r
        u_kr = compute_reduced_potentials(conditions, potential_r, phi_r[:, None], [True])
        ledger.record_cycle(cycle, time=(cycle + 1) * 0.5, production=True, condition_r=condition_r,
                            potential_r=potential_r, volume_r=[None] * N_WINDOWS, values_rc=values_rc, u_kr=u_kr)
    ledger.close()
    return time.perf_counter() - start


def analyse_in_child(folder, memory):
    """(child's result dict, parent's RUSAGE_CHILDREN peak in KiB) for analyse_run(folder)."""
    import resource

    code = CHILD.format(repo=str(benchlib.REPO), folder=str(folder), cap=SAFETY_CAP, memory=memory)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    children_kib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    line = next((l for l in done.stdout.splitlines() if l.startswith("RESULT ")), None)
    if line is None:
        if "MemoryError" in done.stderr:
            return None, children_kib
        raise RuntimeError(f"analysis failed (exit {done.returncode}): {done.stderr.strip()[-3000:]}")
    return json.loads(line[7:]), children_kib


def stage_peaks(folder):
    code = STAGES.format(repo=str(benchlib.REPO), folder=str(folder))
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    rows = [l[6:].split("|") for l in done.stdout.splitlines() if l.startswith("STAGE ")]
    if not rows:
        raise RuntimeError(f"stage profile failed (exit {done.returncode}): {done.stderr.strip()[-3000:]}")
    return rows


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cycles", type=int, default=100_000, help="samples per window")
    parser.add_argument("--rho", type=float, nargs="+", default=[0.9, 0.0], help="AR(1) coefficients to try")
    parser.add_argument("--stages", action="store_true", help="tracemalloc peak per analysis stage")
    parser.add_argument("--memory-gib", type=float, default=None,
                        help="analysis memory (analyse_run's memory=; default: the protocol's, 1 GiB)")
    args = parser.parse_args()
    benchlib.describe_machine("Memory: analyse_run on a SYNTHETIC 24-window x 10^5-sample ledger")
    rows = []
    with benchlib.temporary_folder("mem") as tmp:
        for rho in args.rho:
            folder = Path(tmp) / f"rho-{rho}"
            seconds = write_synthetic_ledger(folder, args.cycles, rho)
            size = (folder / "ledger.sqlite").stat().st_size
            print(f"rho {rho}: wrote {N_WINDOWS} x {args.cycles} samples with Ledger.record_cycle in "
                  f"{seconds:.0f} s ({seconds / args.cycles * 1e6:.0f} µs per cycle); ledger {size / 2**20:.0f} MiB",
                  flush=True)
            memory = None if args.memory_gib is None else args.memory_gib * 2**30
            result, children_kib = analyse_in_child(folder, memory)
            if result is None:
                peak = math.inf
                rows.append((f"{rho}", "-", "-", "-", "-", f"> {SAFETY_CAP / 2**20:.0f} (MemoryError at the cap)",
                             f"{children_kib / 1024:.0f}", "MISS"))
                print(f"  analyse_run: MemoryError under the {SAFETY_CAP / 2**30:.0f} GiB address-space cap", flush=True)
            else:
                peak = result["vmhwm_kib"] * 1024
                for message in result["warnings"]:
                    print(f"  warning: {message}")
                rows.append((f"{rho}", f"{result['g_mean']:.1f}", f"{result['samples']}", f"{result['thinning']}",
                             f"{result['seconds']:.1f}",
                             f"{peak / 2**20:.0f}", f"{children_kib / 1024:.0f}",
                             benchlib.verdict(peak, LIMIT, at_least=False)))
                print(f"  analyse_run: {result['seconds']:.1f} s, peak RSS {peak / 2**20:.0f} MiB", flush=True)
            if args.stages or (peak > LIMIT and peak < math.inf):
                print("  tracemalloc per stage (MiB): traced before / peak during / after")
                for label, before, peak_mib, after in stage_peaks(folder):
                    print(f"    {label:45s} {before:>6} / {peak_mib:>6} / {after:>6}")
            for path in folder.iterdir():
                path.unlink()
    print()
    benchlib.print_table(("AR(1) rho", "mean g (cycles)", "samples to MBAR", "1 in (memory thinning)",
                          "analysis s", "peak RSS MiB (VmHWM)",
                          "largest child so far, MiB (getrusage)", "target <= 1024 MiB"), rows)


if __name__ == "__main__":
    main()
