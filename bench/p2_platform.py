"""P2, platform choice: the default run (platform auto) against each platform setting.

For two systems, capped alanine in vacuum and in OBC2 implicit solvent, the same
4-window umbrella protocol runs with the default platform (``auto``: boost probes
Reference and CPU at 1 and 2 threads and takes the fastest for the machine) and with each
setting a user could force:
Reference; CPU with 1 thread; CPU with 2 threads. Everything else is the default too
(``workers: auto``, one worker process per core). Only the cycle loop is timed; the
auto probe's own cost is printed separately (it runs once per run, before the loop).

Each setting runs for about the same wall time: its production length comes from the
probe's single-context speed, and the result is steps per second, which does not
depend on the length. Trials alternate through the settings.

Ratio = loop steps/s of the default / the best setting's (target >= 0.95).

Run: python bench/p2_platform.py [--seconds 8] [--trials 2]
"""

import argparse
import math
import statistics
from dataclasses import replace
from pathlib import Path

import benchlib

TARGET = 0.95
WINDOWS = 4
CYCLE_PS = 0.5

PROTOCOL = """\
protocol: 1
title: P2 benchmark, 4 umbrella windows along phi of capped alanine
system: {system}
seed: 202
temperature: 300 K
timestep: 2 fs
coordinates:
  phi: {{dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}}
  psi: {{dihedral: ["resid 1 and name N", "resid 1 and name CA", "resid 1 and name C", "resid 2 and name N"]}}
umbrella:
  phi: {{centres: [-150 deg, -110 deg, -70 deg, -30 deg], spring: 300 kJ/mol/rad**2}}
run:
  cycle: {cycle} ps
  production: {production} ps
"""

SETTINGS = (("default (auto)", None, None), ("Reference", "Reference", None),
            ("CPU, 1 thread", "CPU", 1), ("CPU, 2 threads", "CPU", 2))


def production_ps(steps_per_second, seconds, cores, threads):
    """Production (ps, whole cycles) that takes about ``seconds`` at this speed per context."""
    parallel = max(1, min(cores // threads, WINDOWS))
    steps = steps_per_second * seconds * parallel / WINDOWS
    cycles = max(4, math.ceil(steps / (CYCLE_PS / 0.002)))
    return cycles * CYCLE_PS


def settings_for(protocol_platform, name, threads):
    if name is None:
        return None
    return replace(protocol_platform, name=name, threads=threads)


def measure_system(system, tmp, args):
    from boost.protocol import load_protocol
    from boost.plan import make_plan

    probe_path = benchlib.write_protocol(tmp, f"{system}-probe", PROTOCOL.format(
        system=system, cycle=CYCLE_PS, production=CYCLE_PS))
    auto = make_plan(load_protocol(probe_path))
    speeds = {label: rate for label, rate, _ in auto.platform.probe}
    chosen_threads = int(auto.platform.properties.get("Threads", 1))
    print(f"{system}: auto probe measured {', '.join(f'{k} {v:.0f} steps/s' for k, v in speeds.items())}; "
          f"chose {auto.platform.name} {auto.platform.properties or ''}", flush=True)
    paths = {}
    for label, name, threads in SETTINGS:
        threads = threads or (chosen_threads if name is None else 1)
        key = "Reference" if (name or auto.platform.name) == "Reference" else \
            f"CPU {threads} thread{'s' if threads > 1 else ''}"
        paths[label] = benchlib.write_protocol(tmp, f"{system}-{len(paths)}", PROTOCOL.format(
            system=system, cycle=CYCLE_PS,
            production=production_ps(speeds[key], args.seconds, benchlib.usable_cores(), threads)))
    rates = {label: [] for label, _, _ in SETTINGS}
    detail = {}
    for trial in range(args.trials):
        for label, name, threads in SETTINGS:
            protocol = load_protocol(paths[label])
            result = benchlib.timed_run(paths[label], tmp / f"{system}-{trial}-{len(detail)}",
                                        platform=settings_for(protocol.platform, name, threads))
            detail[label, trial] = result
            rates[label].append(result["steps"] / result["loop_s"])
    return rates, detail


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=8.0, help="aimed loop time of each run")
    parser.add_argument("--trials", type=int, default=2)
    args = parser.parse_args()
    benchlib.describe_machine("P2 platform choice: default (auto) run vs each platform setting")
    print(f"{WINDOWS} umbrella windows along phi, cycle {CYCLE_PS} ps, workers auto; "
          f"{args.trials} trials of about {args.seconds:g} s each per setting\n", flush=True)
    summary = []
    with benchlib.temporary_folder("p2") as tmp:
        tmp = Path(tmp)
        for system in ("alanine-vacuum", "alanine-obc2"):
            rates, detail = measure_system(system, tmp, args)
            medians = {label: statistics.median(values) for label, values in rates.items()}
            best_label = max((label for label in medians if label != SETTINGS[0][0]), key=medians.get)
            rows = []
            for label, _, _ in SETTINGS:
                first = detail[label, 0]
                used = [detail[label, t]["platform"] for t in range(args.trials)]
                layout = " / ".join(dict.fromkeys(f"{u.name} {u.properties or ''}".strip() for u in used))
                rows.append((label, layout, " / ".join(f"{v:.0f}" for v in rates[label]), f"{medians[label]:.0f}",
                             f"{medians[label] / medians[best_label]:.3f}", f"{first['plan_s']:.1f}",
                             f"{first['setup_s']:.1f}"))
            probes = [" / ".join(f"{k} {v:.0f}" for k, v, _ in detail[SETTINGS[0][0], t]["platform"].probe)
                      for t in range(args.trials)]
            print(f"{system}: the default run's own probes (steps/s): " + "; ".join(probes))
            print()
            benchlib.print_table(("setting", "platform used (per trial)", "steps/s per trial", "median steps/s",
                                  "vs best forced", "plan s", "setup s"), rows)
            ratio = medians[SETTINGS[0][0]] / medians[best_label]
            summary.append((system, best_label, ratio))
            print(f"{system}: default / best ({best_label}) = {ratio:.3f} (target >= {TARGET}): "
                  f"{benchlib.verdict(ratio, TARGET)}; 'plan s' includes the auto probe\n", flush=True)
    print("P2 summary")
    benchlib.print_table(("system", "best forced setting", "default / best", "verdict"),
                         [(s, b, f"{r:.3f}", benchlib.verdict(r, TARGET)) for s, b, r in summary])
    benchlib.describe_load("end")


if __name__ == "__main__":
    main()
