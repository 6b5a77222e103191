"""P6, long series: boost.correlation against pymbar.timeseries, and `boost analyze` on long ledgers.

Part 1 times, side by side on the same AR(1) series (φ = 0.9, exact g = 19), our
statistical inefficiency (boost.correlation) and pymbar's timeseries.statistical_inefficiency
(fast=False) at 10^5 and 10^6 points, and decorrelate (equilibration detection over 100
origins + subsampling) against pymbar's detect_equilibration(fast=False, nskip=T/100)
where that finishes in reasonable time (10^5 points; --pymbar-detect-1e6 adds 10^6).
Our decorrelate also runs on 10^7 points (target < 5 s).

Part 2 times `boost analyze` (the CLI command, in this process: read ledger, decorrelation,
MBAR, PMF, basins, report) on SYNTHETIC ledgers (invented data, for this benchmark only):

- one walker in one unbiased double-well condition, --cycles cycles (default 10^7), x an
  AR(1) series (φ = 0.99) crossing between the wells, the potential an AR(1) series (φ = 0.9);
- 36 umbrella windows × --window-cycles cycles (default 10^5), x Gaussian AR(1) (φ = 0.9)
  around each centre with the umbrella's width.

The ledgers have the tables and metadata of boost.store.Ledger.create. The first
--record-cycles cycles go through Ledger.record_cycle (as a run records them: written in
batches, Ledger's WRITE_EVERY_SECONDS) to measure its rate; the rest is inserted in bulk rows of the same form,
since 10^7 transactions alone would take far longer than the analysis. Each analysis
stage's time is printed (wrapped functions), so it shows where the time goes.

Targets: decorrelate(10^7 points) < 5 s; boost analyze of 10^7 cycles < 60 s; of
36 windows × 10^5 cycles, seconds.

Run: python bench/p6_long_series.py [--cycles 10000000] [--window-cycles 100000] [--pymbar-detect-1e6]
"""

import argparse
import logging
import math
import time
import warnings
from pathlib import Path

import numpy as np
from scipy.signal import lfilter

import benchlib

TARGET_DECORRELATE_S = 5.0
TARGET_ANALYZE_S = 60.0

SINGLE = """\
protocol: 1
title: SYNTHETIC single-walker double-well ledger for P6 (invented data)
system:
  model: {{name: double_well, barrier: 5 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}}
seed: 1
temperature: 300 K
timestep: 2 fs
coordinates:
  x: {{position: 0, axis: x}}
run:
  cycle: 0.1 ps
  production: {production} ps
basins:
  left: {{x: [-1 nm, 0 nm]}}
  right: {{x: [0 nm, 1 nm]}}
"""

WINDOWS = """\
protocol: 1
title: SYNTHETIC 36-window double-well umbrella ledger for P6 (invented data)
system: double-well-high
seed: 1
temperature: 300 K
timestep: 2 fs
coordinates:
  x: {{position: 0, axis: x}}
umbrella:
  x: {{centres: {{from: -0.175 nm, to: 0.175 nm, count: 36}}, spring: 20000 kJ/mol/nm**2}}
run:
  cycle: 0.2 ps
  production: {production} ps
basins:
  left: {{x: [-1 nm, 0 nm]}}
  right: {{x: [0 nm, 1 nm]}}
analysis:
  bins: {{x: {{from: -0.175 nm, to: 0.175 nm, count: 35}}}}
"""


def ar1(phi, n_steps, rng):
    """Unit-variance AR(1) series x_t = φ x_{t-1} + sqrt(1 - φ²) ε_t, exact g = (1 + φ)/(1 - φ)."""
    eps = rng.normal(size=n_steps)
    eps[1:] *= math.sqrt(1.0 - phi**2)
    return lfilter([1.0], [1.0, -phi], eps)


def timed(function, *args, **kwargs):
    start = time.perf_counter()
    result = function(*args, **kwargs)
    return result, time.perf_counter() - start


# -- part 1: the estimators ---------------------------------------------------------------
def compare_estimators(args):
    from pymbar import timeseries

    from boost.correlation import compute_statistical_inefficiency
    from boost.reweight import decorrelate

    logging.getLogger("pymbar").setLevel(logging.ERROR)
    rng = np.random.default_rng(606)
    rows = []
    for n in (10**5, 10**6):
        series = ar1(0.9, n, rng)
        ours, ours_s = timed(compute_statistical_inefficiency, series)
        ref, ref_s = timed(timeseries.statistical_inefficiency, series)
        rows.append((f"g, 10^{round(math.log10(n))}", f"{ours:.4f}", f"{ref:.4f}", f"{ours_s:.3f}",
                     f"{ref_s:.3f}", f"{ref_s / ours_s:.0f}x"))
    for n in (10**5, 10**6, 10**7):
        series = ar1(0.9, n, rng) + 10.0 * np.exp(-np.arange(n) / (n / 200))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            result, ours_s = timed(decorrelate, series)
        ref_cell, ref_s_cell, ratio = "-", "not run", ""
        if n == 10**5 or (n == 10**6 and args.pymbar_detect_1e6):
            (t0, g, _), ref_s = timed(timeseries.detect_equilibration, series, fast=False, nskip=n // 100)
            ref_cell, ref_s_cell, ratio = f"t0 {t0}, g {g:.3f}", f"{ref_s:.2f}", f"{ref_s / ours_s:.0f}x"
        verdict = benchlib.verdict(ours_s, TARGET_DECORRELATE_S, at_least=False) if n == 10**7 else ""
        rows.append((f"decorrelate, 10^{round(math.log10(n))}", f"t0 {result.t0}, g {result.g:.3f}", ref_cell,
                     f"{ours_s:.3f}", ref_s_cell, f"{ratio} {verdict}".strip()))
    benchlib.print_table(("AR(1), φ = 0.9 (exact g = 19)", "boost.correlation", "pymbar.timeseries",
                          "ours s", "pymbar s", "pymbar / ours"), rows)


# -- part 2: boost analyze on long synthetic ledgers ----------------------------------------
def write_ledger(folder, text, x_rt, potential_rt, record_cycles):
    """A run folder with the protocol copy and a ledger of the given values; write seconds."""
    from boost.conditions import build_conditions, compute_reduced_potentials
    from boost.protocol import parse_protocol
    from boost.store import LEDGER, PROTOCOL, Ledger

    folder.mkdir(parents=True)
    (folder / PROTOCOL).write_text(text)
    protocol = parse_protocol(text, folder / PROTOCOL)
    conditions = build_conditions(protocol)
    n_walkers, n_cycles = x_rt.shape
    ledger = Ledger(folder / LEDGER, coordinate_names=("x",))
    ledger.create(conditions, {     # the keys the scheduler writes (boost.plan.ledger_header)
        "coordinates": ["x"], "periodic": [False], "units": {"x": "nm"},
        "umbrella": ["x"] if protocol.umbrella else [], "n_walkers": n_walkers, "temperature": 300.0,
        "pressure": None, "timestep_ps": protocol.timestep, "steps_per_cycle": protocol.run.steps_per_cycle,
        "protocol_sha256": protocol.sha256, "synthetic": "invented AR(1) data for a benchmark"})
    cycle_time = protocol.run.steps_per_cycle * protocol.timestep   # ps
    condition_r = list(range(n_walkers))
    n_umbrella = len(protocol.umbrella)        # the bias sees x only in umbrella windows
    record_cycles = min(record_cycles, n_cycles)
    start = time.perf_counter()
    for t in range(record_cycles):
        u_kr = compute_reduced_potentials(conditions, potential_rt[:, t], x_rt[:, t, None][:, :n_umbrella],
                                          [False] * n_umbrella)
        ledger.record_cycle(t, time=(t + 1) * cycle_time, production=True, condition_r=condition_r,
                            potential_r=potential_rt[:, t], volume_r=[None] * n_walkers,
                            values_rc=x_rt[:, t, None], u_kr=u_kr)
    record_s = time.perf_counter() - start
    for first in range(record_cycles, n_cycles, 100_000):
        _insert_bulk(ledger, conditions, x_rt, potential_rt, first, min(n_cycles, first + 100_000), cycle_time,
                     n_umbrella)
    ledger.close()
    return record_s, record_cycles, time.perf_counter() - start


def _insert_bulk(ledger, conditions, x_rt, potential_rt, first, stop, cycle_time, n_umbrella):
    """Cycles first..stop-1 in one transaction (Ledger.record_cycles, checksums included)."""
    from boost.conditions import compute_reduced_potentials

    n_walkers = x_rt.shape[0]
    x_n = x_rt[:, first:stop].T.ravel()
    potential_n = potential_rt[:, first:stop].T.ravel()
    u_kn = compute_reduced_potentials(conditions, potential_n, x_n[:, None][:, :n_umbrella], [False] * n_umbrella)
    n_cycles = stop - first
    ledger.record_cycles(
        first, time_t=(np.arange(first, stop) + 1) * cycle_time, production_t=np.ones(n_cycles, dtype=bool),
        condition_rt=np.repeat(np.arange(n_walkers)[:, None], n_cycles, axis=1),
        potential_rt=potential_rt[:, first:stop], volume_rt=np.full((n_walkers, n_cycles), np.nan),
        values_rtc=x_rt[:, first:stop, None], u_krt=u_kn.reshape(len(conditions), n_cycles, n_walkers).transpose(0, 2, 1))


def single_walker_values(n_cycles, rng):
    x_rt = 0.12 * ar1(0.99, n_cycles, rng)[None, :]          # nm, crosses x = 0 often
    potential_rt = (-5.0 + 2.0 * ar1(0.9, n_cycles, rng))[None, :]
    return x_rt, potential_rt


def window_values(text, n_cycles, rng):
    from boost.conditions import build_conditions
    from boost.protocol import parse_protocol
    from boost.units import MOLAR_GAS_CONSTANT

    conditions = build_conditions(parse_protocol(text, "p6.yaml"))
    centre_r = np.array([c.centres[0] for c in conditions])
    width = math.sqrt(MOLAR_GAS_CONSTANT * 300.0 / conditions[0].springs[0])
    x_rt = np.stack([c + width * ar1(0.9, n_cycles, rng) for c in centre_r])
    potential_rt = np.stack([-5.0 + 2.0 * ar1(0.9, n_cycles, rng) for _ in centre_r])
    return x_rt, potential_rt


STAGES = [("boost.analysis.inputs", "read_ledger", "read and verify ledger"),
          ("boost.analysis", "select_samples", "decorrelate, subsample, u_kn"),
          ("boost.analysis", "Reweighting", "MBAR solve"),
          ("boost.analysis", "compute_profiles", "PMFs"),
          ("boost.analysis", "compute_basin_results", "basins"),
          ("boost.report", "write_report", "report (tables, plots)")]


def analyze_by_stage(folder):
    """Run `boost analyze FOLDER` in this process; ((wall s, CPU s), {stage: (wall s, CPU s)})."""
    import importlib

    from click.testing import CliRunner

    from boost.cli import main

    spent, originals = {}, []
    for module_name, name, label in STAGES:
        module = importlib.import_module(module_name)
        original = getattr(module, name)
        originals.append((module, name, original))

        def wrapped(*args, _original=original, _label=label, **kwargs):
            start, cpu = time.perf_counter(), time.process_time()
            try:
                return _original(*args, **kwargs)
            finally:
                wall_s, cpu_s = spent.get(_label, (0.0, 0.0))
                spent[_label] = (wall_s + time.perf_counter() - start, cpu_s + time.process_time() - cpu)
        setattr(module, name, wrapped)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            start, cpu = time.perf_counter(), time.process_time()
            done = CliRunner().invoke(main, ["analyze", str(folder)])
            total = (time.perf_counter() - start, time.process_time() - cpu)
    finally:
        for module, name, original in originals:
            setattr(module, name, original)
    if done.exit_code != 0:
        raise RuntimeError(f"boost analyze failed: {done.output.strip()[-2000:]} {done.exception!r}")
    return total, spent


def time_analyze(label, folder, text, values, record_cycles, target):
    x_rt, potential_rt = values
    record_s, recorded, write_s = write_ledger(folder, text, x_rt, potential_rt, record_cycles)
    size = (folder / "ledger.sqlite").stat().st_size
    print(f"{label}: wrote {x_rt.size} samples in {write_s:.0f} s, ledger {size / 2**20:.0f} MiB; "
          f"Ledger.record_cycle {record_s / max(recorded, 1) * 1e6:.0f} µs per cycle over the first "
          f"{recorded} cycles (so {record_s / max(recorded, 1) * x_rt.shape[1] / 60:.0f} min for all)", flush=True)
    total, spent = analyze_by_stage(folder)
    rows = [(stage, f"{wall_s:.2f}", f"{cpu_s:.2f}", f"{wall_s / total[0]:.0%}")
            for stage, (wall_s, cpu_s) in spent.items()]
    rows.append(("boost analyze, end to end", f"{total[0]:.2f}", f"{total[1]:.2f}",
                 f"{benchlib.verdict(total[0], target, at_least=False)} (target < {target:g} s wall)"))
    benchlib.print_table((label, "wall s", "CPU s", "share of wall"), rows)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cycles", type=int, default=10_000_000, help="cycles of the single-walker ledger")
    parser.add_argument("--window-cycles", type=int, default=100_000, help="cycles of the 36-window ledger")
    parser.add_argument("--record-cycles", type=int, default=10_000,
                        help="cycles written through Ledger.record_cycle (the rest in bulk)")
    parser.add_argument("--pymbar-detect-1e6", action="store_true",
                        help="also time pymbar's detect_equilibration on 10^6 points (minutes)")
    parser.add_argument("--skip-ledgers", action="store_true", help="part 1 only")
    parser.add_argument("--skip-estimators", action="store_true", help="part 2 only")
    args = parser.parse_args()
    benchlib.describe_machine("P6 long series: FFT statistics and boost analyze on long ledgers")
    if not args.skip_estimators:
        compare_estimators(args)
    if args.skip_ledgers:
        benchlib.describe_load("end")
        return
    rng = np.random.default_rng(6)
    with benchlib.temporary_folder("p6") as tmp:
        text = SINGLE.format(production=args.cycles * 0.1)
        time_analyze(f"1 walker x {args.cycles} cycles", Path(tmp) / "single", text,
                     single_walker_values(args.cycles, rng), args.record_cycles, TARGET_ANALYZE_S)
        text = WINDOWS.format(production=args.window_cycles * 0.2)
        time_analyze(f"36 windows x {args.window_cycles} cycles", Path(tmp) / "windows", text,
                     window_values(text, args.window_cycles, rng), args.record_cycles // 36, 10.0)
    benchlib.describe_load("end")


if __name__ == "__main__":
    main()
