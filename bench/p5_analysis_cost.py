"""P5, analysis cost: the analysis stage as a share of the run's wall time, 24 windows.

A 24-window umbrella run along phi of capped alanine in vacuum (15 deg apart, the
cycle, equilibration, production and frame settings of protocols/alanine-phi-umbrella.yaml)
runs with the real Scheduler and default settings (platform auto, workers auto); its wall
time counts everything a user waits for: make_plan (system build, platform probe) and
Scheduler.run. Then boost.analysis.analyse_run (MBAR, PMF, basins, diagnostics) and
boost.report.write_report (tables and plots) run on its folder, timed separately.

Share = analyse_run wall time / run wall time (target <= 5 %); the share with the
report written too is printed next to it.

Run: python bench/p5_analysis_cost.py [--production-ps 200]
"""

import argparse
import time
import warnings
from pathlib import Path

import benchlib

TARGET = 0.05

PROTOCOL = """\
protocol: 1
title: P5 benchmark, 24 umbrella windows along phi of capped alanine
system: alanine-vacuum
seed: 505
temperature: 300 K
timestep: 2 fs
friction: 1/ps
coordinates:
  phi: {{dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}}
  psi: {{dihedral: ["resid 1 and name N", "resid 1 and name CA", "resid 1 and name C", "resid 2 and name N"]}}
umbrella:
  phi: {{centres: {{from: -180 deg, to: 165 deg, count: 24}}, spring: 300 kJ/mol/rad**2}}
run:
  cycle: 0.5 ps
  equilibration: 10 ps
  production: {production} ps
  frame_every: 5 ps
basins:
  C7eq: {{phi: [-180 deg, 0 deg]}}
  C7ax: {{phi: [0 deg, 180 deg]}}
analysis:
  bins: {{phi: {{from: -180 deg, to: 180 deg, count: 36}}}}
  energy_unit: kcal/mol
"""


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--production-ps", type=float, default=200.0)
    args = parser.parse_args()
    benchlib.describe_machine("P5 analysis cost: analysis share of a 24-window run")
    with benchlib.temporary_folder("p5") as tmp:
        tmp = Path(tmp)
        path = benchlib.write_protocol(tmp, "p5", PROTOCOL.format(production=args.production_ps))
        result = benchlib.timed_run(path, tmp / "run")
        run_s = result["plan_s"] + result["run_s"]
        print(f"run: {result['n_walkers']} walkers x {result['n_cycles']} cycles on {result['platform'].name}: "
              f"plan {result['plan_s']:.1f} s + setup {result['setup_s']:.1f} s + loop {result['loop_s']:.1f} s "
              f"= {run_s:.1f} s", flush=True)
        from boost.analysis import analyse_run
        from boost.report import write_report

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            start = time.perf_counter()
            analysis = analyse_run(tmp / "run")
            analyse_s = time.perf_counter() - start
            start = time.perf_counter()
            write_report(analysis, tmp / "analysis")
            report_s = time.perf_counter() - start
        print(f"samples used per window: {analysis.samples_k.min()}-{analysis.samples_k.max()} "
              f"(of {result['n_cycles']} cycles)\n")
        rows = [("analyse_run (MBAR, PMF, basins, diagnostics)", f"{analyse_s:.2f}", f"{analyse_s / run_s:.2%}",
                 benchlib.verdict(analyse_s / run_s, TARGET, at_least=False)),
                ("analyse_run + write_report (tables, plots)", f"{analyse_s + report_s:.2f}",
                 f"{(analyse_s + report_s) / run_s:.2%}", "")]
        benchlib.print_table(("stage", "wall s", f"share of the run ({run_s:.1f} s)",
                              f"target <= {TARGET:.0%}"), rows)
    benchlib.describe_load("end")


if __name__ == "__main__":
    main()
