"""boost propose: planned ladders and windows against outside references, bad input, and
runs of planned protocols that measure what the plan predicted.

Sources: the lognormal partial expectation behind the Gaussian acceptance (exact, checked
here by scipy.integrate.quad); the incomplete-beta law for harmonic degrees of freedom
(tests/REFERENCES.md, "Swap acceptance between harmonic systems"); pymbar's
compute_overlap on sampled data for the overlap integral (tests/REFERENCES.md, "MBAR
overlap of umbrella windows").
"""

import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import betainc

from boost.ladder_design import EnergyMoments, compute_gaussian_acceptance, design_ladder, insert_rungs
from boost.units import MOLAR_GAS_CONSTANT, beta
from boost.window_design import (MARGIN, Profile, compute_predicted_overlap, compute_window_densities,
                                 design_windows, insert_windows, predict_neighbour_overlaps)
from conftest import double_well_protocol
from test_cli import assert_one_line_error, boost

REPO = Path(__file__).resolve().parents[1]


def exact_acceptance(d, ratio):
    """tests/REFERENCES.md, "Swap acceptance between harmonic systems": Predescu, Predescu &
    Ciobanu (2004), <acc> = 2 I_{1/(1+R)}(d/2, d/2), R = T_hi / T_lo (exact)."""
    return 2.0 * betainc(d / 2, d / 2, 1.0 / (1.0 + ratio))


def harmonic_moments(d, temperatures):
    """Exact energy moments of d harmonic degrees of freedom: U ~ Gamma(d/2, kT), so
    mean d kT / 2 and variance d (kT)² / 2 (exact)."""
    kt = MOLAR_GAS_CONSTANT * np.asarray(temperatures, dtype=float)
    return EnergyMoments(np.asarray(temperatures, dtype=float), d / 2 * kt, d / 2 * kt**2)


# -- the Gaussian acceptance -------------------------------------------------------------

@pytest.mark.parametrize("m, s", [(-0.5, 0.3), (-2.0, 1.5), (-5.0, 3.0), (0.4, 0.2), (-0.01, 2.0)])
def test_gaussian_acceptance_is_the_lognormal_partial_expectation(m, s):
    # exact: E[min(1, e^x)] for x ~ N(m, s²), by adaptive quadrature over the normal density
    quadrature, _ = integrate.quad(lambda x: min(1.0, math.exp(x)) * stats.norm.pdf(x, m, s), m - 12 * s, m + 12 * s,
                                   points=[0.0], limit=200)
    # the same m and s through the rung form: beta_i - beta_j = 1, mean and variance split
    value = compute_gaussian_acceptance(2.0, 1.0, m, 0.0, s * s / 2, s * s / 2)
    assert value == pytest.approx(quadrature, abs=1e-9)


@pytest.mark.parametrize("d, ratio, tolerance", [(60, 1.15, 0.01), (300, 1.07, 0.005), (3000, 1.02, 0.002)])
def test_gaussian_acceptance_approaches_the_incomplete_beta_law(d, ratio, tolerance):
    # tests/REFERENCES.md, "Swap acceptance between harmonic systems" (exact for Gamma-distributed
    # energies; the Gaussian model is its large-d limit, so the gap must shrink with d)
    moments = harmonic_moments(d, [300.0, 300.0 * ratio])
    assert moments.acceptance(300.0, 300.0 * ratio) == pytest.approx(exact_acceptance(d, ratio), abs=tolerance)


def test_moments_interpolate_exactly_for_harmonic_energies():
    # exact: μ linear in T and σ² a power law in T, as the module interpolates them
    moments = harmonic_moments(10, [300.0, 500.0, 800.0])
    for t in (300.0, 377.0, 650.0, 900.0):
        kt = MOLAR_GAS_CONSTANT * t
        assert moments.mean(t) == pytest.approx(5 * kt) and moments.variance(t) == pytest.approx(5 * kt * kt)


@pytest.mark.parametrize("d", [30, 66, 300])
def test_planned_ladder_reproduces_the_incomplete_beta_law(d):
    # tests/REFERENCES.md, "Swap acceptance between harmonic systems": exact acceptance of each
    # planned pair within 0.05 of the planner's prediction, and at least the target - 0.05
    moments = harmonic_moments(d, [300.0, 450.0, 600.0, 900.0])
    design = design_ladder(moments, 300.0, 900.0, 0.3)
    temperatures = design.temperatures
    assert temperatures[0] == 300.0 and temperatures[-1] == 900.0
    assert all(b > a for a, b in zip(temperatures, temperatures[1:]))
    exact = [exact_acceptance(d, b / a) for a, b in zip(temperatures, temperatures[1:])]
    assert np.allclose(design.acceptance, exact, atol=0.05)
    assert min(design.acceptance) >= 0.3 - 1e-9 and min(exact) >= 0.25
    # the fewest rungs: one fewer would put some pair below the target
    fewer = np.geomspace(300.0, 900.0, len(temperatures) - 1)
    assert min(moments.acceptance(a, b) for a, b in zip(fewer, fewer[1:])) < 0.3
    # pairs are balanced: the same prediction for each
    assert np.ptp(design.acceptance) < 1e-6


def test_inserted_rungs_go_only_into_poor_pairs():
    moments = harmonic_moments(66, [300.0, 600.0])
    ladder = (300.0, 330.0, 500.0, 550.0, 600.0)
    design = insert_rungs(moments, ladder, [(1, 2)], 0.3)
    assert set(ladder) <= set(design.temperatures)
    added = sorted(set(design.temperatures) - set(ladder))
    assert added and all(330.0 < t < 500.0 for t in added)
    inside = [a for a, t in zip(design.acceptance, design.temperatures) if 330.0 <= t < 500.0]
    assert min(inside) >= 0.3


# -- the predicted overlap ---------------------------------------------------------------

def _gaussian_windows(centres, springs, curvature, beta_):
    """Exact biased densities on a harmonic PMF F = ½ β K x² (tests/REFERENCES.md, "Umbrella
    windows on a harmonic well"): normal, mean k c / (K + k), variance 1 / (β (K + k))."""
    grid = np.linspace(-3.0, 3.0, 6001)
    profile = Profile(grid, 0.5 * beta_ * curvature * grid**2, False)
    means = [k * c / (curvature + k) for c, k in zip(centres, springs)]
    sds = [1.0 / math.sqrt(beta_ * (curvature + k)) for k in springs]
    return profile, means, sds


@pytest.mark.parametrize("centres, counts", [((0.0, 0.35), (4000, 4000)), ((-0.4, 0.0, 0.3, 0.7), (3000,) * 4),
                                             ((-0.2, 0.1, 0.4), (1500, 4000, 2500))])
def test_overlap_integral_matches_pymbar_on_sampled_data(centres, counts):
    # tests/REFERENCES.md, "MBAR overlap of umbrella windows": pymbar's compute_overlap on
    # exact samples of each window against the integral; statistical, within 0.01 and 15 %
    from boost.reweight import pymbar

    beta_, curvature, spring = 1.0, 2.0, 40.0
    springs = (spring,) * len(centres)
    profile, means, sds = _gaussian_windows(centres, springs, curvature, beta_)
    rng = np.random.default_rng(len(centres))
    x_n = np.concatenate([rng.normal(m, s, n) for m, s, n in zip(means, sds, counts)])
    u_kn = np.array([0.5 * beta_ * curvature * x_n**2 + 0.5 * beta_ * spring * (x_n - c) ** 2 for c in centres])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        measured = pymbar.MBAR(u_kn, np.array(counts)).compute_overlap()["matrix"]
    densities = compute_window_densities(profile, centres, springs, beta_)
    predicted = compute_predicted_overlap(densities, profile.step, counts)
    assert np.allclose(predicted.sum(axis=1), 1.0, atol=1e-6)
    assert np.allclose(predicted, measured, atol=0.01, rtol=0.15)
    # the densities are the exact normals
    for density, m, s in zip(densities, means, sds):
        assert np.allclose(density, stats.norm.pdf(profile.grid, m, s), atol=1e-6 * density.max())


def test_two_equal_windows_overlap_one_half():
    # exact: identical densities give ∫ p p / 2p = ½
    profile, _, _ = _gaussian_windows((0.0, 0.0), (10.0, 10.0), 1.0, 1.0)
    assert predict_neighbour_overlaps(profile, (0.1, 0.1), (10.0, 10.0), 1.0)[0] == pytest.approx(0.5)


def _double_well_profile(beta_):
    """The bundled high double well's PMF along x in kT (exact: U(x) of boost.models, a
    25 kJ/mol quartic barrier tilted by 2 kJ/mol)."""
    grid = np.arange(-0.25, 0.25, 0.0002)
    s = grid / 0.1
    return Profile(grid, beta_ * (25.0 * (s * s - 1) ** 2 + 2.0 * s), False)


def test_planned_windows_meet_the_target_and_crowd_where_the_profile_bends_over():
    beta_ = beta(300.0)
    profile = _double_well_profile(beta_)
    design = design_windows(profile, -0.16, 0.16, 20000.0, beta_, 0.05)
    assert design.centres[0] == -0.16 and design.centres[-1] == 0.16
    assert min(design.overlap) >= 0.05 * MARGIN
    assert design.overlap == predict_neighbour_overlaps(profile, design.centres, design.springs, beta_)
    # A constant slope only shifts every biased density alike (exact for a harmonic bias), so
    # spacing follows where the slope changes: over the barrier top (F'' < 0) the PMF pushes
    # neighbouring windows apart, and they must sit closer there than in the wells.
    gaps = np.diff(design.centres)
    middles = 0.5 * (np.array(design.centres[1:]) + np.array(design.centres[:-1]))
    assert gaps[np.abs(middles) < 0.03].max() < gaps[np.abs(np.abs(middles) - 0.1) < 0.03].min()
    # the same number of windows evenly spaced predicts a worse weakest pair
    even = tuple(np.linspace(-0.16, 0.16, len(design.centres)).tolist())
    assert min(predict_neighbour_overlaps(profile, even, design.springs, beta_)) < min(design.overlap)


def test_periodic_windows_close_the_circle():
    beta_ = beta(300.0)
    grid = np.arange(-np.pi, np.pi, 0.002)
    profile = Profile(grid, 3.0 * (1 + np.cos(grid)) + 1.5 * (1 + np.cos(2 * grid)), True)
    design = design_windows(profile, -np.pi, None, 400.0, beta_, 0.05)
    assert all(-np.pi - 1e-12 <= c < np.pi for c in design.centres)
    assert len(design.overlap) == len(design.centres)          # the wrap pair included
    assert min(design.overlap) >= 0.05 * MARGIN


def test_inserted_windows_go_only_into_poor_gaps():
    beta_ = beta(300.0)
    profile = _double_well_profile(beta_)
    centres = tuple(np.linspace(-0.16, 0.16, 7).tolist())
    springs = (20000.0,) * 7
    before = predict_neighbour_overlaps(profile, centres, springs, beta_)
    poor = [(i, i + 1) for i, value in enumerate(before) if value < 0.05]
    assert poor
    design = insert_windows(profile, centres, springs, poor, beta_, 0.05)
    assert set(centres) <= set(design.centres)
    for c in (design.centres[i] for i in design.added):
        assert any(centres[i] < c < centres[j] for i, j in poor)
    assert min(design.overlap) >= 0.05


# -- bad input ---------------------------------------------------------------------------

UMBRELLA = double_well_protocol(umbrella={"x": "{centres: {from: -0.1 nm, to: 0.1 nm, count: 3}, "
                                                "spring: 2000 kJ/mol/nm**2}"},
                                run={"production": "2 ps", "frame_every": None},
                                platform="{name: Reference, workers: 1}")


@pytest.fixture
def umbrella_protocol(write_protocol):
    return write_protocol(UMBRELLA)


@pytest.mark.parametrize("args, pattern", [
    (["--acceptance", "1.5"], r"--acceptance must be a number above 0 and below 1"),
    (["--acceptance", "lots"], r"--acceptance must be a number .* Got 'lots'"),
    (["--overlap", "0.6"], r"--overlap must be a number above 0 and below 0\.5"),
    (["--overlap", "0"], r"--overlap must be"),
    (["--error", "-1 kT"], r"--error must be"),
    (["--error", "0.1 nm"], r"--error must be an energy"),
    (["--trial", "0 ps"], r"--trial must be a positive time"),
    (["--trial", "20"], r"--trial must be a time"),
    (["--refine"], r"--refine needs --from"),
    (["--from", "absent"], r"absent: no such run folder"),
    (["--from", "empty"], r"empty: is not a run folder"),
    (["--from", "empty", "--trial", "5 ps"], r"--trial and --trial-folder are for a new trial"),
])
def test_bad_options_are_one_line(umbrella_protocol, tmp_path, args, pattern):
    (tmp_path / "empty").mkdir(exist_ok=True)
    result = boost("propose", str(umbrella_protocol), "-o", "new.yaml", *args, cwd=tmp_path)
    assert_one_line_error(result, pattern)
    assert not (tmp_path / "new.yaml").exists()


def test_missing_protocol_is_one_line(tmp_path):
    assert_one_line_error(boost("propose", "absent.yaml", "-o", "new.yaml", cwd=tmp_path),
                          r"absent\.yaml: protocol file not found")


def test_existing_output_is_never_overwritten(umbrella_protocol, tmp_path):
    (tmp_path / "mine.yaml").write_text("my notes\n")
    assert_one_line_error(boost("propose", str(umbrella_protocol), "-o", "mine.yaml", cwd=tmp_path),
                          r"mine\.yaml: already exists; boost propose never overwrites")
    assert (tmp_path / "mine.yaml").read_text() == "my notes\n"


@pytest.mark.parametrize("changes, pattern", [
    ({}, r"has no temperature ladder .* and no umbrella windows"),
    ({"umbrella": {"x": "{centres: [0 nm], spring: 2000 kJ/mol/nm**2}"}}, r"has no temperature ladder"),
    ({"coordinates": {"y": "{position: 0, axis: y}"},
      "umbrella": {"x": "{centres: [0 nm, 0.1 nm], spring: 2000 kJ/mol/nm**2}",
                   "y": "{centres: [0 nm, 0.1 nm], spring: 2000 kJ/mol/nm**2}"}}, r"umbrella has windows along 2 coordinates"),
    ({"temperatures": "[300 K, 400 K]", "umbrella": {"x": "{centres: [0 nm, 0.1 nm], spring: 2000 kJ/mol/nm**2}"}},
     r"temperatures and umbrella are both set"),
])
def test_protocol_without_one_thing_to_plan_is_one_line(write_protocol, tmp_path, changes, pattern):
    path = write_protocol(double_well_protocol(**changes))
    assert_one_line_error(boost("propose", str(path), "-o", "new.yaml", cwd=tmp_path), r"protocol\.yaml: " + pattern)


def test_refine_needs_a_run_of_the_same_windows(umbrella_protocol, write_protocol, tmp_path):
    # a run of other windows is refused for --refine, in one line, and the folder is untouched
    other = write_protocol(UMBRELLA.replace("count: 3", "count: 4"), "other.yaml")
    assert boost("run", str(other), "-o", "run", "--quiet", cwd=tmp_path).returncode == 0
    before = {p: p.read_bytes() for p in (tmp_path / "run").rglob("*") if p.is_file() and "-wal" not in p.name
              and "-shm" not in p.name}
    assert_one_line_error(boost("propose", str(umbrella_protocol), "-o", "new.yaml", "--from", "run", "--refine",
                                cwd=tmp_path), r"run: --refine adds conditions to the run of this very protocol")
    after = {p: p.read_bytes() for p in before}
    assert after == before and not (tmp_path / "new.yaml").exists()


# -- a whole proposal through the command line -------------------------------------------

def test_propose_writes_a_protocol_that_checks_and_says_where_it_came_from(umbrella_protocol, tmp_path):
    result = boost("propose", str(umbrella_protocol), "-o", "plans/new.yaml", "--trial", "4 ps", "--quiet",
                   "--trial-folder", "trial", cwd=tmp_path)
    assert_one_line_error(result, r"plans/new\.yaml: its folder plans does not exist")
    assert not (tmp_path / "trial").exists()       # refused before the trial ran
    (tmp_path / "plans").mkdir()
    result = boost("propose", str(umbrella_protocol), "-o", "plans/new.yaml", "--trial", "4 ps", "--quiet",
                   "--trial-folder", "trial", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    text = (tmp_path / "plans" / "new.yaml").read_text()
    assert text.startswith("# planned by boost propose from a 4 ps trial of protocol.yaml on ")
    assert "umbrella windows along x" in result.stdout and "wall time on this machine" in result.stdout
    checked = boost("check", "plans/new.yaml", cwd=tmp_path)
    assert checked.returncode == 0, checked.stderr
    # the same plan again from the kept trial folder: same windows
    again = boost("propose", str(umbrella_protocol), "-o", "plans/again.yaml", "--from", "trial", cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    body = lambda t: t.split("\n", 2)[2]   # noqa: E731  (the header names the source)
    assert body((tmp_path / "plans" / "again.yaml").read_text()) == body(text)


# -- runs of planned protocols (slow) ------------------------------------------------------

def _plan(protocol_path, folder, *, trial_ps=None, source=None, refine=False, targets=None, name="planned.yaml"):
    from boost.proposal import Targets, propose, read_source, run_trial, write_proposal
    from boost.protocol import load_protocol

    protocol = load_protocol(protocol_path)
    if source is None:
        source = run_trial(protocol, trial_ps, folder / "trial")
    else:
        source = read_source(source)
    proposal = propose(protocol, source, targets or Targets(), folder / name, refine=refine)
    write_proposal(proposal, folder / name)
    return load_protocol(folder / name), proposal


def _run_and_analyse(protocol, folder):
    from boost.analysis import analyse_run
    from boost.scheduler import run_protocol

    run_protocol(protocol, folder, progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return analyse_run(folder)


def _measured_neighbour_overlaps(analysis, periodic):
    """min(O_ij, O_ji) of neighbours along the (sorted) windows, the wrap included on a circle."""
    from boost.diagnostics import neighbour_overlaps

    overlap = analysis.overlap
    return [value for _, _, value in neighbour_overlaps(overlap, (len(overlap),), circles=(0,) if periodic else ())]


# 22 particles (d = 66) in one harmonic well; the trial ladder spans 300-900 K.
HARMONIC_LADDER = """\
protocol: 1
title: harmonic well, trial ladder
system:
  model: {name: harmonic_well, particles: 22, spring: 1000 kJ/mol/nm**2, mass: 12 amu}
seed: 2031
temperature: 300 K
timestep: 5 fs
friction: 10/ps
platform: {name: Reference, workers: 1}
temperatures: [300 K, 450 K, 650 K, 900 K]
exchange: {pairs: adjacent, attempts: 2}
run:
  cycle: 0.5 ps
  equilibration: 5 ps
  production: 400 ps
"""


@pytest.mark.slow
def test_planned_ladder_measures_the_predicted_acceptance(tmp_path):
    # tests/REFERENCES.md, "Swap acceptance between harmonic systems": the ladder planned from a
    # 50 ps trial predicts, per pair, the exact acceptance within 0.05, and a run of it
    # measures the exact acceptance within 0.05 (and within 3 of its standard errors + 0.02)
    from boost.store import read_ledger
    from test_tempering import measured_acceptance

    path = tmp_path / "ladder.yaml"
    path.write_text(HARMONIC_LADDER)
    planned, proposal = _plan(path, tmp_path, trial_ps=50.0)
    temperatures = planned.temperatures
    assert temperatures[0] == 300.0 and temperatures[-1] == 900.0 and len(temperatures) >= 5
    predicted = [p for _, _, p in proposal.pairs]
    exact = [exact_acceptance(66, b / a) for a, b in zip(temperatures, temperatures[1:])]
    print("planned ladder", temperatures, "predicted", np.round(predicted, 3), "exact", np.round(exact, 3))
    assert min(predicted) >= 0.3
    assert np.allclose(predicted, exact, atol=0.05)
    _run_and_analyse(planned, tmp_path / "run")
    data = read_ledger(tmp_path / "run", reduced=False)
    for i, value in enumerate(exact):
        mean, error = measured_acceptance(data, i, i + 1)
        print(f"pair {i}: measured {mean:.3f} ± {error:.3f}, exact {value:.3f}, predicted {predicted[i]:.3f}")
        assert abs(mean - value) < 0.05 and abs(mean - value) < 3 * error + 0.02


def _with_production(protocol, ps):
    """``protocol`` with a production of ``ps`` for every condition, run whole (no run.builds_on;
    dumped and read back, so text and hash agree)."""
    from dataclasses import replace

    from boost.protocol import parse_protocol
    from boost.protocol_dump import dump_protocol

    cycles = round(ps / (protocol.run.steps_per_cycle * protocol.timestep))
    run = replace(protocol.run, production_cycles=cycles, builds_on=None)
    return parse_protocol(dump_protocol(replace(protocol, run=run)), protocol.path)


def _coarse_double_well(folder):
    """The shipped double-well umbrella example with 7 windows instead of 21, 20 ps each."""
    text = (REPO / "protocols" / "double-well-umbrella.yaml").read_text()
    text = text.replace("count: 21", "count: 7").replace("production: 100 ps", "production: 20 ps")
    path = folder / "coarse.yaml"
    path.write_text(text.replace("seed: 3", "seed: 3\nplatform: {name: Reference, workers: 1}"))
    return path


@pytest.mark.slow
def test_planned_double_well_windows_overlap_as_targeted(tmp_path):
    # The target itself, measured with pymbar's overlap matrix (boost analyze's): every
    # neighbour pair of a 200 ps run of the protocol planned from a 20 ps trial of 7 coarse
    # windows overlaps by at least 0.05, where the trial's own neighbours did not.
    coarse = _coarse_double_well(tmp_path)
    planned, proposal = _plan(coarse, tmp_path, trial_ps=20.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        from boost.analysis import analyse_run
        trial = _measured_neighbour_overlaps(analyse_run(tmp_path / "trial"), False)
    assert min(trial) < 0.05
    analysis = _run_and_analyse(_with_production(planned, 200.0), tmp_path / "run")
    measured = _measured_neighbour_overlaps(analysis, False)
    print("trial", np.round(trial, 3), "planned", len(planned.umbrella[0].centres), "windows, predicted",
          np.round([p for _, _, p in proposal.pairs], 3), "measured", np.round(measured, 3))
    assert min(measured) >= 0.05


@pytest.mark.slow
def test_refined_double_well_windows_add_only_between_poor_pairs(tmp_path):
    # --refine on a finished run of the coarse protocol keeps its 7 windows, adds windows only
    # inside pairs whose measured overlap was below 0.05 x MARGIN, and a run of the refined protocol
    # measures at least 0.05 between all neighbours (pymbar's overlap matrix, as above)
    from boost.analysis import analyse_run
    from boost.protocol import load_protocol
    from boost.scheduler import run_protocol

    coarse = _coarse_double_well(tmp_path)
    original = load_protocol(coarse)
    run_protocol(original, tmp_path / "finished", progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        before = _measured_neighbour_overlaps(analyse_run(tmp_path / "finished"), False)
    refined, _ = _plan(coarse, tmp_path, source=tmp_path / "finished", refine=True, name="refined.yaml")
    old, new = original.umbrella[0].centres, refined.umbrella[0].centres
    assert set(old) <= set(new) and len(new) > len(old)
    assert refined.source_folder.resolve() == (tmp_path / "finished").resolve()    # it builds on the run
    poor = [(old[i], old[i + 1]) for i, value in enumerate(before) if value < 0.05 * MARGIN]
    for c in set(new) - set(old):
        assert any(a < c < b for a, b in poor)
    analysis = _run_and_analyse(_with_production(refined, 200.0), tmp_path / "run")
    measured = _measured_neighbour_overlaps(analysis, False)
    print("before", np.round(before, 3), "refined", len(new), "windows, measured", np.round(measured, 3))
    assert min(measured) >= 0.05


@pytest.mark.slow
def test_planned_alanine_windows_overlap_as_targeted(tmp_path):
    # The shipped alanine demo (36 windows along phi) as a 20 ps trial; the planned windows,
    # run 300 ps each, overlap by at least 0.05 between every pair of neighbours, the wrap at
    # ±180 deg included (pymbar's overlap matrix through boost analyze).
    text = (REPO / "protocols" / "alanine-phi-umbrella.yaml").read_text()
    text = text.replace("seed: 2026", "seed: 11\nplatform: {name: Reference, workers: 1}")
    path = tmp_path / "alanine.yaml"
    path.write_text(text.replace("  frame_every: 5 ps\n", ""))
    planned, proposal = _plan(path, tmp_path, trial_ps=20.0)
    analysis = _run_and_analyse(_with_production(planned, 300.0), tmp_path / "run")
    measured = _measured_neighbour_overlaps(analysis, True)
    print("planned", len(planned.umbrella[0].centres), "windows, predicted",
          np.round([p for _, _, p in proposal.pairs], 3), "measured", np.round(measured, 3))
    assert len(planned.umbrella[0].centres) < 36
    assert min(measured) >= 0.05


def test_relative_system_path_still_names_the_file_from_another_folder(tmp_path):
    # the planned protocol goes to another folder than the original: its system path is
    # rewritten so that it names the same file from there
    (tmp_path / "systems").mkdir()
    (tmp_path / "study").mkdir()
    (tmp_path / "systems" / "well.yaml").write_text(
        "model: {name: double_well, barrier: 5 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}\n")
    text = UMBRELLA.replace("system:\n  model: {name: double_well, barrier: 5 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}",
                            "system: ../systems/well.yaml")
    assert "../systems/well.yaml" in text
    (tmp_path / "study" / "protocol.yaml").write_text(text)
    result = boost("propose", "study/protocol.yaml", "-o", "new.yaml", "--trial", "2 ps", "--quiet", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "\nsystem: systems/well.yaml\n" in (tmp_path / "new.yaml").read_text()
    assert boost("check", "new.yaml", cwd=tmp_path).returncode == 0
