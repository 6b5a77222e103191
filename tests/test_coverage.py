"""Do the reported 95 % intervals cover the exact answer? Many short runs, many seeds (slow).

The exact answer is the 300 K population of the left well of the bundled high double
well, by quadrature of exp(-U/kT) (boost.models with scipy). Common practice for an
interval estimator: over independent repetitions, a 95 % interval holds the true value in
about 95 % of them, and the reported standard error matches the spread of the estimates.
Each check prints what it measured (run pytest with -s to see it).
"""

import re
from pathlib import Path

import numpy as np
import pytest

from boost.analysis import analyse_run
from boost.protocol import load_protocol
from boost.scheduler import run_protocol
from conftest import SHORT_LADDER as LADDER, exact_high_well_left_population as exact_left_population

REPO = Path(__file__).resolve().parents[1]


def repeat_runs(template, seeds, tmp_path):
    """Per seed: the analysis as run (auto method) and the asymptotic one, left basin."""
    rows = []
    for seed in seeds:
        folder = tmp_path / f"seed-{seed}"
        folder.mkdir()
        path = folder / "protocol.yaml"
        path.write_text(re.sub(r"^seed: .*$", f"seed: {seed}", template, flags=re.M))
        run = run_protocol(load_protocol(path), folder / "run", progress=False)
        auto = analyse_run(run, energy_unit="kT")
        asymptotic = analyse_run(run, energy_unit="kT", uncertainty="asymptotic")
        rows.append((auto, asymptotic))
    return rows


def coverage(analyses, exact):
    """Fraction of 95 % intervals holding ``exact``, mean error / spread, estimates."""
    p = np.array([a.basins.populations[0] for a in analyses])
    error = np.array([a.basins.d_populations[0] for a in analyses])
    inside = [a.basins.populations_low[0] <= exact <= a.basins.populations_high[0] for a in analyses]
    return float(np.mean(inside)), float(np.mean(error) / np.std(p, ddof=1)), p


def report(name, rows, exact):
    auto = [a for a, _ in rows]
    fraction, ratio, p = coverage(auto, exact)
    old_fraction, old_ratio, _ = coverage([b for _, b in rows], exact)
    u = auto[0].uncertainty
    print(f"\n{name}: {len(rows)} seeds, exact {exact:.4f}, mean estimate {p.mean():.4f}, "
          f"spread (sd over seeds) {np.std(p, ddof=1):.4f}")
    print(f"  {u.label} (first seed): 95% coverage {fraction:.2f}, mean error / spread {ratio:.2f}")
    print(f"  MBAR asymptotic: 95% coverage {old_fraction:.2f}, mean error / spread {old_ratio:.2f}")
    print(f"  blocks (cycles) per seed: {[a.uncertainty.block_cycles for a in auto]}")
    words = [a.verdicts.populations[0].word for a in auto]
    print("  verdicts on the left population: " + ", ".join(f"{words.count(w)} {w}" for w in sorted(set(words))))
    dg_words = [a.verdicts.delta_g[(0, 1)].word for a in auto]
    print("  verdicts on ΔG(left→right): " + ", ".join(f"{dg_words.count(w)} {w}" for w in sorted(set(dg_words))))
    return fraction, ratio, words


def check_verdicts(words, rows, exact):
    # A settled, correctly barred estimate has halves more than two combined errors apart
    # in about 5 % of runs (normal tails): 'drifting' stays rare, and the runs called
    # settled still cover the exact value.
    assert words.count("drifting") <= 0.2 * len(words), words
    settled = [a for (a, _), w in zip(rows, words) if w == "settled"]
    if settled:
        inside = np.mean([a.basins.populations_low[0] <= exact <= a.basins.populations_high[0] for a in settled])
        print(f"  95% coverage among the {len(settled)} settled runs: {inside:.2f}")
        assert inside >= 0.8


@pytest.mark.slow
def test_ladder_bootstrap_intervals_cover_the_exact_population(tmp_path):
    # exact: quadrature (boost.models); common practice: 95 % coverage over repetitions
    exact = exact_left_population()
    assert exact == pytest.approx(0.828, abs=0.001)
    rows = repeat_runs(LADDER, range(200, 230), tmp_path)
    assert all(a.uncertainty.method == "bootstrap" and a.uncertainty.failed == 0 for a, _ in rows)
    fraction, ratio, words = report("temperature ladder", rows, exact)
    assert 0.85 <= fraction <= 1.0
    assert 1 / 1.5 <= ratio <= 1.5
    check_verdicts(words, rows, exact)


@pytest.mark.slow
def test_umbrella_runs_keep_the_asymptotic_bar_and_its_coverage(tmp_path):
    # exact: quadrature (boost.models); common practice: 95 % coverage over repetitions.
    # The example protocols/double-well-umbrella.yaml, shortened: no exchange, so the
    # windows are independent and MBAR's asymptotic error is the one reported.
    text = (REPO / "protocols" / "double-well-umbrella.yaml").read_text()
    text = text.replace("production: 100 ps", "production: 50 ps")
    text = text.replace("timestep: 2 fs", "timestep: 2 fs\nplatform: {name: Reference, workers: 1}")
    assert "production: 50 ps" in text and "exchange" not in text
    exact = exact_left_population()
    rows = repeat_runs(text, range(400, 424), tmp_path)
    assert all(a.uncertainty.method == "asymptotic" for a, _ in rows)
    assert all(np.array_equal(a.basins.d_populations, b.basins.d_populations) for a, b in rows)
    fraction, ratio, words = report("umbrella windows, no exchange", rows, exact)
    assert 0.85 <= fraction <= 1.0
    assert 1 / 1.5 <= ratio <= 1.5
    check_verdicts(words, rows, exact)


@pytest.mark.slow
def test_window_exchange_bootstrap_intervals_cover_the_exact_population(tmp_path):
    # exact: quadrature (boost.models); common practice: 95 % coverage over repetitions.
    # The example protocols/double-well-window-exchange.yaml (umbrella windows that swap),
    # shortened to run 24 seeds with their bootstraps in about four minutes: 17 windows
    # from -0.128 to 0.128 nm (0.016 nm apart, spring x spacing^2 about 2 kT; the wells'
    # minima are at +-0.1 nm) instead of 25 over +-0.16 nm, and 100 ps of production
    # (500 cycles: blocks of 3 walker correlation times fit 10 times over).
    text = (REPO / "protocols" / "double-well-window-exchange.yaml").read_text()
    text = text.replace("centres: {from: -0.16 nm, to: 0.16 nm, count: 25}",
                        "centres: {from: -0.128 nm, to: 0.128 nm, count: 17}")
    text = text.replace("production: 200 ps", "production: 100 ps")
    text = text.replace("timestep: 2 fs", "timestep: 2 fs\nplatform: {name: Reference, workers: 1}")
    assert "count: 17" in text and "production: 100 ps" in text and "exchange: {pairs: adjacent}" in text
    exact = exact_left_population()
    rows = repeat_runs(text, range(600, 624), tmp_path)
    assert all(a.uncertainty.method == "bootstrap" and a.uncertainty.failed == 0 for a, _ in rows)
    assert not any(a.uncertainty.cut_short for a, _ in rows)    # the case the bootstrap is built for
    fraction, ratio, words = report("window exchange", rows, exact)
    assert 0.85 <= fraction <= 1.0
    assert 1 / 1.5 <= ratio <= 1.5
    check_verdicts(words, rows, exact)
