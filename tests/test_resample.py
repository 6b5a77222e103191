"""Block bootstrap over cycles (boost.resample) and its wiring into the analysis.

Outside references: pymbar's harmonic-oscillator test system (independent samples, for
which the bootstrap and MBAR's asymptotic error must agree) and the central limit theorem
for the spread of a standard deviation over replicates.
"""

import json
import math
import subprocess
import sys
import warnings

import numpy as np
import pytest

from boost import resample
from boost.convergence import FRACTIONS
from boost.analysis import analyse_run, population_interval, select_samples
from boost.exceptions import AnalysisError, ConvergenceWarning
from boost.protocol import load_protocol
from boost.report import format_summary, write_report
from boost.reweight import Reweighting
from boost.scheduler import run_protocol
from boost.store import read_ledger
from pymbar import testsystems  # after boost.reweight, which imports pymbar quietly

# A short temperature ladder on the bundled high double well: walkers cross the barrier
# at the top rungs and carry their wells down, which is what the bootstrap is for.
SHORT_LADDER = """\
protocol: 1
title: short double-well ladder
system: double-well-high
seed: {seed}
temperature: 300 K
timestep: 2 fs
friction: 5/ps
platform: {{name: Reference, workers: 1}}
coordinates:
  x: {{position: 0, axis: x}}
temperatures: {{lowest: 300 K, highest: 1500 K, count: 4}}
exchange: {{pairs: adjacent}}
run:
  cycle: 0.2 ps
  equilibration: {equilibration}
  production: {production}
basins:
  left: {{x: [-1 nm, 0 nm]}}
  right: {{x: [0 nm, 1 nm]}}
analysis:
  bins: {{x: {{from: -0.2 nm, to: 0.2 nm, count: 20}}}}
{extra}"""


def run_ladder(folder, *, seed=21, equilibration="2 ps", production="60 ps", extra=""):
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "protocol.yaml"
    path.write_text(SHORT_LADDER.format(seed=seed, equilibration=equilibration, production=production,
                                        extra=extra))
    return run_protocol(load_protocol(path), folder / "run", progress=False)


@pytest.fixture(scope="module")
def ladder(tmp_path_factory):
    return run_ladder(tmp_path_factory.mktemp("ladder"), extra="  uncertainty: {resamples: 40}\n")


# -- the resampling itself ----------------------------------------------------------------

def test_cycle_counts_hold_whole_blocks():
    rng = np.random.default_rng(5)
    count_bt = resample.draw_cycle_counts(103, 10, 300, rng)
    assert count_bt.shape == (300, 103) and np.all(count_bt.sum(axis=1) == 103)
    # every cycle can be drawn; with blocks of the whole production every replicate is the data
    assert np.all(count_bt.sum(axis=0) > 0)
    assert np.all(resample.draw_cycle_counts(50, 50, 4, rng) == 1)
    # consecutive cycles travel together: with blocks of 10, neighbours inside a block share
    # their count far more often than with blocks of 1 (independent draws)
    same_blocks = np.mean(count_bt[:, 40:60:2] == count_bt[:, 41:61:2])
    singles = resample.draw_cycle_counts(103, 1, 300, rng)
    same_singles = np.mean(singles[:, 40:60:2] == singles[:, 41:61:2])
    assert same_blocks > same_singles + 0.2, (same_blocks, same_singles)


def test_block_length_follows_the_inefficiency_and_fits_the_production():
    assert resample.choose_block_length(10.2, 2000) == (31, False)    # ceil(3 x 10.2)
    assert resample.choose_block_length(0.5, 2000) == (3, False)      # g is at least 1
    assert resample.choose_block_length(50.0, 400) == (40, True)      # 10 blocks must fit
    with pytest.raises(AnalysisError, match=r"at least 10 production cycles"):
        resample.choose_block_length(1.0, 9)


def test_failed_replicates_are_counted_not_used():
    calls = iter(range(100))

    def estimate(count_t):
        if next(calls) % 4 == 0:
            raise AnalysisError("no convergence")
        return np.array([count_t[:5].sum(), math.inf])

    result = resample.run_replicates(estimate, resample.draw_cycle_counts(20, 2, 40, np.random.default_rng(1)))
    assert result.n_failed == 10 and result.value_bs.shape == (30, 2)
    assert np.isfinite(result.error_s[0]) and np.isnan(result.error_s[1])   # no finite replicate
    assert result.low_s[0] <= np.median(result.value_bs[:, 0]) <= result.high_s[0]


@pytest.mark.parametrize("block", [1, 4])
def test_bootstrap_of_independent_samples_matches_mbar_asymptotic_error(block):
    # reference: pymbar.testsystems.HarmonicOscillatorsTestCase draws independent samples;
    # for them the spread of MBAR over resamples and MBAR's asymptotic error estimate the
    # same thing (Shirts & Chodera 2008, doi:10.1063/1.2978177), blocks or not. Cycle t
    # holds sample t of every oscillator, as a ladder's cycle holds one sample per rung.
    # Tolerance 15 %: the standard deviation of 400 replicates scatters by 1/sqrt(2 x 399)
    # = 3.5 % (central limit theorem), the two estimators differ by O(1/sqrt(N)) for
    # N = 300 per condition; 15 % is about three times the two combined.
    system = testsystems.HarmonicOscillatorsTestCase(O_k=(0.0, 0.6, 1.2), K_k=(1.0, 1.5, 2.0))
    n = 300
    x_n, u_kn, N_k, _ = system.sample(N_k=(n, n, n), mode="u_kn", seed=17)
    full = Reweighting(u_kn, N_k)
    masks = {"low": x_n < 0.5, "high": x_n >= 0.5}
    basins = full.compute_basins(u_kn[0], masks)
    position_n = np.tile(np.arange(n), 3)
    count_bt = resample.draw_cycle_counts(n, block, 400, np.random.default_rng(3))

    def estimate(count_t):
        columns = np.repeat(np.arange(x_n.size), count_t[position_n])
        replicate = full.subset(columns)
        w_n = replicate.target_weights(u_kn[0, columns])
        return np.concatenate([replicate.f_k[1:], [w_n[masks["low"][columns]].sum()]])

    result = resample.run_replicates(estimate, count_bt)
    assert result.n_failed == 0
    asymptotic = np.concatenate([full.df_k[1:], basins.d_populations[:1]])
    ratio = result.error_s / asymptotic
    assert np.all(np.abs(ratio - 1.0) < 0.15), ratio
    # and both centre on the exact answer: f_k from the oscillators' closed form (pymbar)
    exact_f = system.analytical_free_energies()
    assert np.all(np.abs(full.f_k - (exact_f - exact_f[0])) < 4 * np.maximum(full.df_k, 1e-9))


def test_subset_of_every_column_reproduces_the_solution():
    system = testsystems.HarmonicOscillatorsTestCase(O_k=(0.0, 1.0), K_k=(1.0, 1.0))
    _, u_kn, N_k, _ = system.sample(N_k=(100, 100), mode="u_kn", seed=2)
    full = Reweighting(u_kn, N_k)
    again = full.subset(np.arange(200))
    assert np.allclose(again.f_k, full.f_k, atol=1e-8) and np.isnan(again.df_k[1]) and again.overlap is None
    doubled = full.subset(np.repeat(np.arange(200), 2))   # every sample twice: the same MBAR solution
    assert np.allclose(doubled.f_k, full.f_k, atol=1e-8)
    prefix = full.subset(np.r_[0:50, 100:150], errors=True)   # first halves, as for estimates in time
    assert prefix.df_k[1] > full.df_k[1]


# -- populations stay inside [0, 1] -----------------------------------------------------------

def test_asymptotic_population_interval_stays_inside_zero_one():
    p = np.array([0.95, 0.5, 0.01])
    low, high = population_interval(p, [1.07, 0.01, 0.02])     # 1.07 on 0.95: seen with few samples
    assert np.all((0 <= low) & (low < p) & (p < high) & (high <= 1)), (low, high)
    assert population_interval([1.0], [0.0]) == ([1.0], [1.0])   # a basin holding everything
    # small errors: the logit interval becomes p ± 1.96 dp (delta method, common practice)
    assert low[1] == pytest.approx(0.5 - 1.96 * 0.01, abs=1e-4) and high[1] == pytest.approx(0.5 + 1.96 * 0.01, abs=1e-4)


# -- wiring into the analysis ------------------------------------------------------------------

def test_exchange_run_reports_a_block_bootstrap(ladder, tmp_path):
    analysis = analyse_run(ladder)
    u = analysis.uncertainty
    assert u.method == "bootstrap" and u.resamples == 40 and u.failed == 0 and u.block_chosen
    assert u.block_cycles >= math.ceil(resample.BLOCK_MULTIPLIER * u.walker_g) or u.block_cycles == 300 // 10
    b = analysis.basins
    assert np.all((0 <= b.populations_low) & (b.populations_low <= b.populations_high) & (b.populations_high <= 1))
    out = write_report(analysis, tmp_path / "report")
    summary = json.loads((out / "summary.json").read_text())
    label = f"block bootstrap, 40 resamples, blocks of {u.block_cycles} cycles, 0 failed"
    assert summary["error bars"]["method"] == label and summary["error bars"]["failed resamples"] == 0
    assert summary["basins"]["left"]["population 95% high"] == pytest.approx(b.populations_high[0])
    for name in ("basins.csv", "free-energy-differences.csv", "pmf-x.csv"):
        header, first = (out / name).read_text().splitlines()[:2]
        assert "95% low" in header and label in first, name
    assert f"error bars: {label}" in format_summary(analysis)


def test_bootstrap_blocks_are_shared_by_every_condition(ladder, monkeypatch):
    protocol = load_protocol(ladder / "protocol.yaml")
    data = read_ledger(ladder, reduced=False)
    picks = select_samples(data, protocol, ladder, protocol.analysis.memory).picks
    cycle_n = np.concatenate([c for _, c in picks])
    condition_n = np.repeat(np.arange(len(picks)), [len(c) for _, c in picks])
    seen = []
    original = Reweighting.subset

    def spy(self, columns, **kwargs):
        seen.append(np.bincount(columns, minlength=cycle_n.size))
        return original(self, columns, **kwargs)

    monkeypatch.setattr(Reweighting, "subset", spy)
    analysis = analyse_run(ladder)
    # the resamples come first; the verdicts' parts of production (19 of them) follow
    assert len(seen) == analysis.uncertainty.resamples + 2 * len(FRACTIONS) - 1
    seen = seen[:analysis.uncertainty.resamples]
    shared = [t for t in np.unique(cycle_n) if np.unique(condition_n[cycle_n == t]).size > 1]
    assert len(shared) > 10                     # many cycles hold samples of several conditions
    for multiplicity_n in seen[:20]:
        for t in shared:
            assert np.unique(multiplicity_n[cycle_n == t]).size == 1, t


def test_failed_resamples_are_counted_and_reported(ladder, monkeypatch, tmp_path):
    calls = []
    original = Reweighting.subset

    def flaky(self, columns, **kwargs):
        calls.append(1)
        if len(calls) % 4 == 0:
            raise AnalysisError("MBAR did not converge")
        return original(self, columns, **kwargs)

    monkeypatch.setattr(Reweighting, "subset", flaky)
    with pytest.warns(ConvergenceWarning, match=r"did not converge on 10 of the 40 bootstrap resamples"):
        analysis = analyse_run(ladder)
    assert analysis.uncertainty.failed == 10
    summary = json.loads((write_report(analysis, tmp_path / "r") / "summary.json").read_text())
    assert summary["error bars"]["failed resamples"] == 10 and "10 failed" in summary["error bars"]["method"]


def test_asymptotic_method_can_be_chosen_for_an_exchange_run(tmp_path):
    folder = run_ladder(tmp_path, production="20 ps", extra="  uncertainty: {method: asymptotic}\n")
    analysis = analyse_run(folder)
    assert analysis.uncertainty.method == "asymptotic" and analysis.uncertainty.label == "MBAR asymptotic"


def test_too_long_a_block_is_one_line(tmp_path):
    folder = run_ladder(tmp_path, production="20 ps", extra="  uncertainty: {block: 10 ps}\n")
    with pytest.raises(AnalysisError, match=r"analysis\.uncertainty\.block \(50 cycles\) leaves fewer than 10 blocks"):
        analyse_run(folder)


def test_population_error_past_one_gets_a_note(ladder):
    from dataclasses import replace

    analysis = analyse_run(ladder)
    wide = replace(analysis.basins, d_populations=np.array([0.5, 0.5]))
    text = format_summary(replace(analysis, basins=wide))
    p_left = analysis.basins.populations[0]
    assert f"note: the ± error of left reaches {'above 1' if p_left > 0.5 else 'below 0'}" in text
    assert f"note: the ± error of right reaches {'below 0' if p_left > 0.5 else 'above 1'}" in text
    narrow = replace(analysis.basins, d_populations=np.array([0.001, 0.001]))
    assert "note:" not in format_summary(replace(analysis, basins=narrow))


def _analyze(folder):
    return subprocess.run([sys.executable, "-m", "boost.cli", "analyze", str(folder)],
                          capture_output=True, text=True, timeout=300)


def test_cli_analyze_of_a_too_short_exchange_run_explains_itself(tmp_path):
    folder = run_ladder(tmp_path / "auto", equilibration="0 ps", production="1.6 ps")    # 8 cycles
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        done = _analyze(folder)
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    assert "fewer than the 10 a block bootstrap needs" in done.stderr and "error bars: MBAR asymptotic" in done.stdout
    explicit = run_ladder(tmp_path / "explicit", equilibration="0 ps", production="1.6 ps",
                          extra="  uncertainty: {method: bootstrap}\n")
    done = _analyze(explicit)
    assert done.returncode == 2 and "Traceback" not in done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "needs at least 10 production cycles" in lines[0], done.stderr
