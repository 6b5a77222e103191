"""P4, time to answer: wall time until ΔG is right, umbrella / replica exchange / plain MD.

Double well (bundled ``double-well-high``: 25 kJ/mol barrier, 2 kJ/mol tilt, 300 K):
ΔG(left -> right) exact by quadrature (boost.models.DoubleWell); tolerance 0.1 kT.
Methods: umbrella windows and temperature replica exchange, with the settings of the
bundled protocols double-well-umbrella.yaml and double-well-tempering.yaml, and plain MD
(one unbiased walker, the settings of double-well.yaml on the high barrier).
Plain MD runs last: its length is set from a short calibration run so that it takes
10.5x the slowest enhanced method's time to answer (capped by --plain-cap), which is
exactly what the target needs: if plain MD has no answer by then, the ratio is > 10.

Capped alanine in vacuum at 300 K: ΔG(C7eq -> C7ax) against a long umbrella run made
here first (the windows of protocols/alanine-phi-umbrella.yaml, another seed; its
length is printed); tolerance 0.3 kcal/mol. Methods: umbrella windows and plain MD.

Each run goes to its end with the real Scheduler (platform auto, workers auto); then
growing prefixes of its ledger (a copy cut back with Ledger.truncate_after) are analysed
with boost.analysis.analyse_run, as ``boost analyze`` would on a run still going. The
wall time of a prefix ending at cycle c is plan + setup + loop time × (c + 1) / cycles
(the loop runs at a steady rate). Time to answer = the earliest prefix from which every
later prefix stays within the tolerance and boost's verdict on ΔG says 'settled' ('first
within' and 'stays within' are reported too). A method that
never gets there has time > its run's wall time, and a ratio against it is a lower
bound, marked '>'. Plain MD prefixes are analysed from the longest down, each in a
subprocess with a time limit, and only until one misses (shorter ones cannot change
its time to answer; its 'first within' covers the analysed prefixes only). Prefixes in
which a basin was never visited have no ΔG and are not analysed.

Target: each enhanced method answers >= 10x sooner than plain MD.

Run: python bench/p4_time_to_answer.py [--quick] [--prefixes 30] [--plain-prefixes 12] [--plain-cap S] [--skip-alanine] [--skip-double-well]
"""

import argparse
import math
import shutil
import warnings
from pathlib import Path

import numpy as np

import benchlib

TARGET = 10.0
DW_TOLERANCE_KT = 0.1
ALA_TOLERANCE_KCAL = 0.3

# production per run and mode; plain MD runs get a wall-time budget instead (see --plain-cap)
LENGTHS = {
    "full": {"dw umbrella": "6 ns", "dw replica exchange": "1 ns", "ala reference": "2 ns", "ala umbrella": "1 ns"},
    "quick": {"dw umbrella": "300 ps", "dw replica exchange": "200 ps", "ala reference": "200 ps",
              "ala umbrella": "100 ps"},
}
PLAIN_CAP_S = {"full": 1200.0, "quick": 90.0}
#: Most seconds one analysis of a plain MD prefix may take (it runs in a subprocess).
PLAIN_ANALYSIS_TIMEOUT_S = {"full": 600.0, "quick": 120.0}
TIMED_OUT = "timed out"

DW_HEAD = """\
protocol: 1
system: double-well-high
temperature: 300 K
timestep: 2 fs
coordinates:
  x: {position: 0, axis: x}
basins:
  left: {x: [-1 nm, 0 nm]}
  right: {x: [0 nm, 1 nm]}
analysis:
  bins: {x: {from: -0.16 nm, to: 0.16 nm, count: 32}}
"""

DW_METHODS = {
    "dw umbrella": """\
title: P4 double well, umbrella windows (as double-well-umbrella.yaml)
seed: 3
umbrella:
  x: {{centres: {{from: -0.16 nm, to: 0.16 nm, count: 21}}, spring: 20000 kJ/mol/nm**2}}
run: {{cycle: 0.2 ps, equilibration: 5 ps, production: {production}}}
""",
    "dw replica exchange": """\
title: P4 double well, temperature replica exchange (as double-well-tempering.yaml)
seed: 8
friction: 5/ps
temperatures: {{lowest: 300 K, highest: 1500 K, count: 8}}
exchange: {{pairs: adjacent}}
run: {{cycle: 0.2 ps, equilibration: 10 ps, production: {production}}}
""",
    "dw plain MD": """\
title: P4 double well, plain MD (as double-well.yaml, high barrier)
seed: 11
friction: 1/ps
run: {{cycle: 0.2 ps, equilibration: 10 ps, production: {production}}}
""",
}

ALA_HEAD = """\
protocol: 1
system: alanine-vacuum
temperature: 300 K
timestep: 2 fs
friction: 1/ps
coordinates:
  phi: {dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}
  psi: {dihedral: ["resid 1 and name N", "resid 1 and name CA", "resid 1 and name C", "resid 2 and name N"]}
basins:
  C7eq: {phi: [-180 deg, 0 deg]}
  C7ax: {phi: [0 deg, 180 deg]}
analysis:
  bins: {phi: {from: -180 deg, to: 180 deg, count: 36}}
  energy_unit: kcal/mol
"""

ALA_UMBRELLA = """\
title: P4 capped alanine, umbrella windows along phi (as alanine-phi-umbrella.yaml)
seed: {seed}
umbrella:
  phi: {{centres: {{from: -180 deg, to: 170 deg, count: 36}}, spring: 400 kJ/mol/rad**2}}
run: {{cycle: 0.5 ps, equilibration: 10 ps, production: {production}}}
"""

ALA_PLAIN = """\
title: P4 capped alanine, plain MD
seed: 7
run: {{cycle: 0.5 ps, equilibration: 10 ps, production: {production}}}
"""


def exact_double_well_delta_g():
    """ΔG(left -> right) in kT at 300 K by quadrature, from the bundled system file."""
    from boost.models import read_model
    from boost.spec import load_yaml
    from boost.systems import bundled_systems_folder

    model = read_model(load_yaml(bundled_systems_folder() / "double-well-high.yaml", what="system").get("model"))
    p = model.compute_exact_populations(300.0, {"left": {"x": (-math.inf, 0.0)}, "right": {"x": (0.0, math.inf)}})
    return -math.log(p["right"] / p["left"])


def delta_g(folder, energy_unit):
    """(ΔG first basin -> second, its error, its verdict word) from analyse_run, or None."""
    from boost.analysis import analyse_run
    from boost.exceptions import BoostError

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            result = analyse_run(folder, energy_unit=energy_unit)
        except BoostError:
            return None
    basins = result.basins
    if basins is None or len(basins.names) < 2:
        return None
    verdict = result.verdicts.delta_g.get((0, 1)) if result.verdicts is not None else None
    return float(basins.Delta_g[0, 1]), float(basins.d_Delta_g[0, 1]), verdict.word if verdict else None


_CHILD = r"""
import json, sys, warnings
sys.path.insert(0, {repo!r})
sys.path.insert(0, {bench!r})
from p4_time_to_answer import delta_g
print("RESULT " + json.dumps(delta_g({folder!r}, {unit!r})))
"""


def delta_g_with_timeout(folder, energy_unit, timeout):
    """delta_g in a subprocess; TIMED_OUT when it takes longer than ``timeout`` s."""
    import json
    import subprocess
    import sys

    code = _CHILD.format(repo=str(benchlib.REPO), bench=str(Path(__file__).parent), folder=str(folder),
                         unit=energy_unit)
    try:
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        return TIMED_OUT
    line = next((l for l in done.stdout.splitlines() if l.startswith("RESULT ")), None)
    if line is None:
        raise RuntimeError(f"analysis failed (exit {done.returncode}): {done.stderr.strip()[-2000:]}")
    value = json.loads(line[7:])
    return None if value is None else tuple(value)


def all_basins_visited_at(folder):
    """First production cycle by which every basin has held a sample (None: never).

    A prefix ending earlier has an empty basin, for which analyse_run reports no ΔG;
    such prefixes are not analysed (the answer is known, and the analysis of long
    single-walker ledgers is slow, see bench/README.md).
    """
    from boost.analysis import basin_masks, load_run

    protocol, data = load_run(folder)
    values = data.values_rtc[:, data.production_t]
    n_walkers, n_cycles, n_coordinates = values.shape
    masks = basin_masks(protocol, list(data.coordinate_names), data.periodic,
                        values.reshape(-1, n_coordinates))
    firsts = []
    for mask in masks.values():
        seen = np.flatnonzero(mask.reshape(n_walkers, n_cycles).any(axis=0))
        if seen.size == 0:
            return None
        firsts.append(seen[0])
    return int(data.cycle_t[data.production_t][max(firsts)])


def prefix_series(run, folder, energy_unit, n_prefixes, work, *, exact=None, tolerance=None, timeout=None):
    """[(wall s, cycles, ΔG or None, error, verdict word)] for growing prefixes of a finished run.

    With ``timeout`` (plain MD): each analysis runs in a subprocess for at most that
    long (ΔG TIMED_OUT beyond), and prefixes are analysed from the longest down only
    until one is not within ``tolerance`` of ``exact``: shorter ones cannot change the
    time to answer, and are marked not analysed (ΔG None, error 'skipped').
    """
    import time

    from boost.store import LEDGER, PROTOCOL, Ledger

    visited = all_basins_visited_at(folder)
    protocol = run["plan"].protocol
    first = protocol.run.equilibration_cycles
    n = protocol.run.n_cycles
    ends = sorted({min(n - 1, first + max(1, round((n - first) * i / n_prefixes)) - 1)
                   for i in range(1, n_prefixes + 1)}, reverse=True)
    copy = work / "prefix"
    shutil.rmtree(copy, ignore_errors=True)
    copy.mkdir()
    shutil.copy(Path(folder) / PROTOCOL, copy / PROTOCOL)
    shutil.copy(Path(folder) / LEDGER, copy / LEDGER)
    series, spent, stop = [], time.perf_counter(), False
    for end in ends:            # longest first: each cut only removes cycles
        wall = run["plan_s"] + run["setup_s"] + run["loop_s"] * (end + 1) / n
        if stop:
            series.append((wall, end + 1, None, "skipped", None))
            continue
        if visited is None or end < visited:
            series.append((wall, end + 1, None, None, None))
            stop = timeout is not None
            continue
        ledger = Ledger(copy / LEDGER)
        ledger.truncate_after(end)
        ledger.close()
        value = delta_g(copy, energy_unit) if timeout is None else delta_g_with_timeout(copy, energy_unit, timeout)
        if value == TIMED_OUT:
            series.append((wall, end + 1, None, TIMED_OUT, None))
        else:
            series.append((wall, end + 1, *(value or (None, None, None))))
        if timeout is not None and (series[-1][2] is None or abs(series[-1][2] - exact) > tolerance):
            stop = True
    shutil.rmtree(copy)
    series.reverse()
    return series, time.perf_counter() - spent


def time_to_answer(series, exact, tolerance):
    """(first within, stays within from, settled and within from) wall times in s; None when never.

    The last: from that prefix on, every prefix is within the tolerance and boost's own
    verdict on ΔG says 'settled' (the answer a user could act on without knowing it).
    """
    inside = [g is not None and abs(g - exact) <= tolerance for _, _, g, _, _ in series]
    first = next((s[0] for s, ok in zip(series, inside) if ok), None)
    return first, _stays_from(series, inside), _stays_from(
        series, [ok and word == "settled" for ok, (*_, word) in zip(inside, series)])


def _stays_from(series, good):
    stays = None
    for s, ok in zip(reversed(series), reversed(good)):
        if not ok:
            break
        stays = s[0]
    return stays


def show_series(name, series, exact, unit, tolerance):
    print(f"  {name}: wall s of the prefix -> ΔG ({unit}) ± error; * within {tolerance} {unit} of {exact:+.3f}")
    def cell(g, e):
        if g is None:
            return {"skipped": "  not analysed  ", TIMED_OUT: "analysis timeout"}.get(e, "        n/a     ")
        return f"{g:+.3f} ± {e:.3f}{' *' if abs(g - exact) <= tolerance else '  '}"

    cells = [f"{w:7.1f} s: {cell(g, e)} {(word or '-')[:8]:8s}" for w, _, g, e, word in series]
    for i in range(0, len(cells), 3):
        print("    " + "   ".join(cells[i:i + 3]))


def run_method(name, text, tmp):
    path = benchlib.write_protocol(tmp, name.replace(" ", "-"), text)
    folder = tmp / (name.replace(" ", "-") + "-run")
    print(f"running {name} ...", flush=True)
    run = benchlib.timed_run(path, folder)
    protocol = run["plan"].protocol
    ps = protocol.run.n_cycles * protocol.run.steps_per_cycle * protocol.timestep
    print(f"  {run['n_walkers']} walker(s) x {ps:g} ps on {run['platform'].name}: plan {run['plan_s']:.1f} s, "
          f"setup {run['setup_s']:.1f} s, loop {run['loop_s']:.1f} s", flush=True)
    return run, folder


def compare(label, results, exact, tolerance, unit, plain_name):
    rows = []
    plain = results[plain_name]
    for name, (run, series) in results.items():
        first, within, stays = time_to_answer(series, exact, tolerance)
        total = series[-1][0]
        g, e, word = series[-1][2], series[-1][3], series[-1][4]
        final = (e if isinstance(e, str) else "n/a") if g is None else f"{g:+.3f} ± {e:.3f} ({word})"
        rows.append([name, final, "-" if first is None else f"{first:.1f}",
                     f"> {total:.1f}" if within is None else f"{within:.1f}",
                     f"> {total:.1f}" if stays is None else f"{stays:.1f}", stays, total])
    plain_stays, plain_total = rows[list(results).index(plain_name)][5:7]
    table, verdicts = [], []
    for row in rows:
        name, stays, total = row[0], row[5], row[6]
        if name == plain_name:
            ratio_text, verdict = "1", ""
        elif stays is None:
            ratio_text, verdict = "no answer", "MISS"
        elif plain_stays is None:
            ratio = plain_total / stays
            ratio_text = f"> {ratio:.1f}"
            verdict = "PASS" if ratio >= TARGET else "open (plain MD run too short)"
        else:
            ratio = plain_stays / stays
            ratio_text, verdict = f"{ratio:.1f}", benchlib.verdict(ratio, TARGET)
        table.append((name, row[1], row[2], row[3], row[4], ratio_text, verdict))
        verdicts.append((label, name, ratio_text, verdict))
    print(f"\n{label}: reference ΔG {exact:+.3f} {unit}, tolerance {tolerance} {unit}")
    benchlib.print_table(("method", f"ΔG at end ({unit})", "first within s", "stays within from s",
                          "settled and within from s", "plain MD time / time", f"target >= {TARGET:g}x"), table)
    return verdicts


def plain_budget(results, exact, tolerance, cap):
    """Wall seconds for plain MD: 10.5x the slowest enhanced answer (or run), at most ``cap``."""
    slowest = max(time_to_answer(series, exact, tolerance)[2] or series[-1][0] for _, series in results.values())
    return min(cap, 1.05 * TARGET * slowest)


def plain_production(name, make_text, budget, tmp):
    """Production (text with unit) that makes the plain MD run take about ``budget`` s."""
    run, folder = run_method(name + " (calibration)", make_text("20 ps"), tmp)
    shutil.rmtree(folder)
    protocol = run["plan"].protocol
    cycle_ps = protocol.run.steps_per_cycle * protocol.timestep
    cycles = (budget - run["plan_s"] - run["setup_s"]) / (run["loop_s"] / run["n_cycles"])
    cycles = max(protocol.run.equilibration_cycles + 10, int(cycles)) - protocol.run.equilibration_cycles
    return f"{cycles * cycle_ps:.1f} ps"


def analysed_run(name, text, tmp, energy_unit, exact, tolerance, args):
    run, folder = run_method(name, text, tmp)
    plain = "plain" in name
    series, spent = prefix_series(run, folder, energy_unit, args.plain_prefixes if plain else args.prefixes, tmp,
                                  exact=exact, tolerance=tolerance, timeout=args.analysis_timeout if plain else None)
    print(f"  analysed {len(series)} prefixes in {spent:.1f} s", flush=True)
    show_series(name, series, exact, energy_unit, tolerance)
    shutil.rmtree(folder)
    return run, series


def double_well(tmp, lengths, args):
    exact = exact_double_well_delta_g()
    results = {}
    for name, body in DW_METHODS.items():
        if name == "dw plain MD":
            budget = plain_budget(results, exact, DW_TOLERANCE_KT, args.plain_cap)
            production = plain_production(name, lambda p: DW_HEAD + body.format(production=p), budget, tmp)
            print(f"  plain MD budget {budget:.0f} s -> production {production}", flush=True)
        else:
            production = lengths[name]
        results[name] = analysed_run(name, DW_HEAD + body.format(production=production), tmp, "kT", exact,
                                     DW_TOLERANCE_KT, args)
    return compare("double well ΔG(left -> right)", results, exact, DW_TOLERANCE_KT, "kT", "dw plain MD")


def alanine(tmp, lengths, args):
    reference_text = ALA_HEAD + ALA_UMBRELLA.format(seed=4242, production=lengths["ala reference"])
    run, folder = run_method("ala reference", reference_text, tmp)
    reference = delta_g(folder, "kcal/mol")
    shutil.rmtree(folder)
    print(f"  reference: 36 windows x {lengths['ala reference']} production, ΔG(C7eq -> C7ax) = "
          f"{reference[0]:+.3f} ± {reference[1]:.3f} kcal/mol", flush=True)
    results = {}
    text = ALA_HEAD + ALA_UMBRELLA.format(seed=2026, production=lengths["ala umbrella"])
    results["ala umbrella"] = analysed_run("ala umbrella", text, tmp, "kcal/mol", reference[0],
                                           ALA_TOLERANCE_KCAL, args)
    budget = plain_budget(results, reference[0], ALA_TOLERANCE_KCAL, args.plain_cap)
    production = plain_production("ala plain MD", lambda p: ALA_HEAD + ALA_PLAIN.format(production=p), budget, tmp)
    print(f"  plain MD budget {budget:.0f} s -> production {production}", flush=True)
    results["ala plain MD"] = analysed_run("ala plain MD", ALA_HEAD + ALA_PLAIN.format(production=production), tmp,
                                           "kcal/mol", reference[0], ALA_TOLERANCE_KCAL, args)
    label = f"capped alanine ΔG(C7eq -> C7ax), reference: umbrella 36 windows x {lengths['ala reference']}"
    return compare(label, results, reference[0], ALA_TOLERANCE_KCAL, "kcal/mol", "ala plain MD")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short runs (a few minutes in all)")
    parser.add_argument("--prefixes", type=int, default=30, help="prefixes analysed per enhanced run")
    parser.add_argument("--plain-prefixes", type=int, default=12, help="prefixes analysed per plain MD run")
    parser.add_argument("--skip-alanine", action="store_true")
    parser.add_argument("--skip-double-well", action="store_true")
    parser.add_argument("--plain-cap", type=float, help="most wall seconds per plain MD run "
                        f"(default {PLAIN_CAP_S['full']:g}, with --quick {PLAIN_CAP_S['quick']:g})")
    args = parser.parse_args()
    mode = "quick" if args.quick else "full"
    lengths = LENGTHS[mode]
    args.plain_cap = args.plain_cap or PLAIN_CAP_S[mode]
    args.analysis_timeout = PLAIN_ANALYSIS_TIMEOUT_S[mode]
    benchlib.describe_machine(f"P4 time to answer ({mode}): umbrella / replica exchange vs plain MD")
    print("run lengths (production): " + ", ".join(f"{k} {v}" for k, v in lengths.items()) +
          f"; plain MD: 10.5x the slowest answer, at most {args.plain_cap:g} s, each analysis of one "
          f"of its prefixes at most {args.analysis_timeout:g} s\n", flush=True)
    with benchlib.temporary_folder("p4") as tmp:
        tmp = Path(tmp)
        verdicts = [] if args.skip_double_well else double_well(tmp, lengths, args)
        if not args.skip_alanine:
            verdicts += alanine(tmp, lengths, args)
    print("\nP4 summary")
    benchlib.print_table(("system", "method", "plain MD time / time", f"target >= {TARGET:g}x"),
                         [(s.split(" ΔG")[0], m, r, v) for s, m, r, v in verdicts if v])
    benchlib.describe_load("end")


if __name__ == "__main__":
    main()
