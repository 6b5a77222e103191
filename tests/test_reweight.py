"""Checks of boost.reweight against exact results and against pymbar itself."""

import os
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import norm

import boost.reweight as rw
from boost.exceptions import AnalysisError, ConvergenceWarning, PoorOverlapWarning
from boost.reweight import Reweighting, decorrelate, pymbar

# Unbiased well U = ½ K x² (β = 1), umbrella windows ½ k (x - x_i)².
WELL_K = 1.0
SPRING_K = 4.0
WINDOW_CENTRES = np.linspace(-3.0, 3.0, 9)
SAMPLES_PER_WINDOW = 4000


def _umbrella_data(seed):
    """Exact samples of each window: Gaussian, mean k x_i/(K+k), variance 1/(K+k)."""
    # source: exact (product of Gaussians; tests/REFERENCES.md, umbrella windows on a harmonic well)
    rng = np.random.default_rng(seed)
    total = WELL_K + SPRING_K
    x_n = np.concatenate(
        [
            rng.normal(SPRING_K * c / total, total**-0.5, SAMPLES_PER_WINDOW)
            for c in WINDOW_CENTRES
        ]
    )
    bias_kn = 0.5 * SPRING_K * (x_n[None, :] - WINDOW_CENTRES[:, None]) ** 2
    u_kn = 0.5 * WELL_K * x_n**2 + bias_kn
    N_k = np.full(WINDOW_CENTRES.size, SAMPLES_PER_WINDOW)
    return x_n, u_kn, N_k


@pytest.fixture(scope="module")
def umbrella():
    x_n, u_kn, N_k = _umbrella_data(seed=2026)
    return x_n, Reweighting(u_kn, N_k)


def _ar1(rho, n_steps, seed):
    rng = np.random.default_rng(seed)
    eps = rng.normal(size=n_steps)
    x = np.empty(n_steps)
    x[0] = eps[0] / np.sqrt(1.0 - rho**2)  # start in the stationary distribution
    for t in range(1, n_steps):
        x[t] = rho * x[t - 1] + eps[t]
    return x


def test_import_is_quiet_and_free_of_openmm():
    code = "import sys, boost.reweight; assert 'openmm' not in sys.modules"
    package_root = str(Path(rw.__file__).resolve().parents[1])
    env = dict(os.environ, PYTHONPATH=package_root)
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, env=env, check=False
    )
    assert done.returncode == 0, done.stderr
    assert "JAX" not in done.stderr and "timeseries" not in done.stderr, done.stderr


def test_harmonic_oscillators_match_pymbar_analytic_free_energies():
    # source: library — pymbar.testsystems.HarmonicOscillatorsTestCase,
    # analytical_free_energies() = (0, 0.34657, 0.69315, 1.03972, 1.38629)
    system = pymbar.testsystems.HarmonicOscillatorsTestCase(
        O_k=(0, 1, 2, 3, 4), K_k=(1, 2, 4, 8, 16), beta=1.0
    )
    # 20,000 samples per state make the worst standard error (state 4) about 0.03 kT
    _, u_kn, N_k, _ = system.sample(N_k=(20000,) * 5, mode="u_kn", seed=7)
    result = Reweighting(u_kn, N_k)
    exact = system.analytical_free_energies()
    np.testing.assert_allclose(exact, [0, 0.34657, 0.69315, 1.03972, 1.38629], atol=1e-5)
    z = (result.f_k[1:] - exact[1:]) / result.df_k[1:]
    assert np.all(np.abs(z) < 4.0), z
    assert np.all(np.abs(result.f_k - exact) < 0.1)
    assert result.f_k[0] == 0.0 and result.df_k[0] == 0.0


def test_a_large_problem_started_from_a_thinned_solution_equals_pymbar_from_zero():
    # source: library — pymbar.MBAR's own solution from its default start; boost starts a
    # problem of more than 20,000 samples from the solution on a thinned set, which may
    # change the path to the answer but not the answer
    system = pymbar.testsystems.HarmonicOscillatorsTestCase(O_k=(0, 1, 2, 3, 4), K_k=(1, 2, 4, 8, 16))
    _, u_kn, N_k, _ = system.sample(N_k=(6000,) * 5, mode="u_kn", seed=5)
    assert u_kn.shape[1] > 20_000
    np.testing.assert_allclose(Reweighting(u_kn, N_k).f_k, pymbar.MBAR(u_kn, N_k).f_k, atol=1e-8)


def test_wrapper_equals_direct_pymbar_call():
    # source: library — pymbar.MBAR on the same u_kn
    system = pymbar.testsystems.HarmonicOscillatorsTestCase()
    _, u_kn, N_k, _ = system.sample(N_k=(300,) * 5, mode="u_kn", seed=11)
    ours = Reweighting(u_kn, N_k)
    mbar = pymbar.MBAR(u_kn, N_k)
    theirs = mbar.compute_free_energy_differences()
    np.testing.assert_allclose(ours.Deltaf_ij, theirs["Delta_f"], atol=1e-8)
    np.testing.assert_allclose(ours.dDeltaf_ij, theirs["dDelta_f"], atol=1e-8)
    np.testing.assert_allclose(ours.f_k, mbar.f_k, atol=1e-8)
    np.testing.assert_allclose(ours.overlap, mbar.compute_overlap()["matrix"], atol=1e-8)
    f, df = ours.compute_target_free_energy(u_kn[3])
    assert f == pytest.approx(mbar.f_k[3], abs=1e-8)
    assert df == pytest.approx(theirs["dDelta_f"][0, 3], abs=1e-8)


@pytest.mark.parametrize("n_dims", [1, 3])
def test_harmonic_wells_free_energy_difference(n_dims):
    # source: exact — Δf = ½ ln(k2/k1) per dimension (tests/REFERENCES.md, harmonic well)
    rng = np.random.default_rng(5 + n_dims)
    k = np.array([1.0, 4.0])
    n_per = 3000
    x_nd = np.concatenate([rng.normal(0.0, ki**-0.5, (n_per, n_dims)) for ki in k])
    r2_n = np.sum(x_nd**2, axis=1)
    u_kn = 0.5 * k[:, None] * r2_n[None, :]
    result = Reweighting(u_kn, [n_per, n_per])
    exact = 0.5 * n_dims * np.log(k[1] / k[0])
    assert abs(result.f_k[1] - exact) < 4.0 * result.df_k[1]
    assert abs(result.f_k[1] - exact) < 0.05
    # an unsampled target in between: k = 2
    f, df = result.compute_target_free_energy(0.5 * 2.0 * r2_n)
    exact_target = 0.5 * n_dims * np.log(2.0 / k[0])
    assert abs(f - exact_target) < 4.0 * df and abs(f - exact_target) < 0.05


def test_a_temperature_ladder_with_free_energies_far_apart_is_solved(caplog):
    # source: exact — d harmonic degrees of freedom of spring K under a constant energy U0:
    # f(β) = β U0 − (d/2) ln(2π / (β K)) (tests/REFERENCES.md, harmonic well). With U0 like
    # a bound molecule's (−1100 kJ/mol) the free energies of 300, 380 and 480 K lie 90 and 160 kT
    # apart, and pymbar's solvers do not converge from zero (seen with pymbar 4.0.3, below).
    import logging

    import pymbar

    rng = np.random.default_rng(15)
    d, spring, offset, n_per = 15, 1.0, -1100.0, 400
    beta_k = 1.0 / (8.314462618e-3 * np.array([300.0, 380.0, 480.0]))
    r2_n = np.concatenate([np.sum(rng.normal(0.0, (b * spring) ** -0.5, (n_per, d)) ** 2, axis=1) for b in beta_k])
    u_kn = beta_k[:, None] * (offset + 0.5 * spring * r2_n[None, :])
    with caplog.at_level(logging.CRITICAL, logger="pymbar"):
        from_zero = pymbar.MBAR(u_kn, [n_per] * 3)
        assert not np.allclose(from_zero.weights().sum(axis=0), 1.0)       # the failure this guards against
        result = Reweighting(u_kn, [n_per] * 3)
    exact = beta_k * offset - 0.5 * d * np.log(2 * np.pi / (beta_k * spring))
    exact -= exact[0]
    assert np.all(np.abs(result.f_k - exact) < 4.0 * result.df_k + 1e-12) and np.all(np.abs(result.f_k - exact) < 0.2)


def test_pmf_of_umbrella_windows_is_the_unbiased_well(umbrella):
    # source: exact — unbiased PMF is ½ β K x²; per bin, -ln ∫_bin exp(-½Kx²) dx via
    # the Gaussian cdf (scipy.stats.norm), which differs from ½Kx² at the centre by
    # O(h²) only.
    x_n, result = umbrella
    edges = np.linspace(-2.5, 2.5, 26)
    profile = result.compute_pmf(0.5 * WELL_K * x_n**2, x_n, [edges])
    p_exact = np.diff(norm.cdf(edges, scale=WELL_K**-0.5))
    f_exact = -np.log(p_exact)
    lowest = np.nanargmin(profile.f)
    f_exact -= f_exact[lowest]
    assert np.all(profile.counts > 500)  # the whole grid is sampled
    error = profile.f - f_exact
    assert np.all(np.abs(error) <= 3.0 * profile.df + 1e-12), error / profile.df
    assert np.all(np.abs(error) < 0.1)
    np.testing.assert_allclose(profile.centres[0], 0.5 * (edges[1:] + edges[:-1]))
    # the closed form at bin centres agrees to the bin-width error
    centre_pmf = 0.5 * WELL_K * profile.centres[0] ** 2
    assert np.all(np.abs(profile.f - (centre_pmf - centre_pmf[lowest])) < 0.1)


def test_pmf_matches_pymbar_fes_histogram_in_1d_and_2d():
    # source: library — pymbar.FES histogram, reference_point='from-lowest', analytical
    rng = np.random.default_rng(3)
    x_n, u_kn, N_k = _umbrella_data(seed=4)
    starts = np.arange(N_k.size) * SAMPLES_PER_WINDOW
    keep = (starts[:, None] + np.arange(150)[None, :]).ravel()  # 150 per window
    x_n, u_kn, N_k = x_n[keep], u_kn[:, keep], np.full(N_k.size, 150)
    y_n = rng.normal(size=x_n.size)  # a second, unbiased coordinate
    u_n = 0.5 * WELL_K * x_n**2
    ours = Reweighting(u_kn, N_k)
    fes = pymbar.FES(u_kn, N_k)
    # pymbar's histogram mislabels samples above the last edge: keep every sample inside
    x_edges = np.linspace(x_n.min(), x_n.max() + 1e-9, 21)
    xy_edges = [np.linspace(v.min(), v.max() + 1e-9, 7) for v in (x_n, y_n)]
    for values, edges in [(x_n, [x_edges]), (np.column_stack([x_n, y_n]), xy_edges)]:
        profile = ours.compute_pmf(u_n, values, edges)
        fes.generate_fes(
            u_n, values, fes_type="histogram", histogram_parameters={"bin_edges": edges}
        )
        grid = np.stack(np.meshgrid(*profile.centres, indexing="ij"), axis=-1)
        full = profile.counts.ravel() > 0
        theirs = fes.get_fes(
            grid.reshape(-1, len(edges))[full],
            reference_point="from-lowest",
            uncertainty_method="analytical",
        )
        np.testing.assert_allclose(profile.f.ravel()[full], theirs["f_i"], atol=1e-8)
        np.testing.assert_allclose(profile.df.ravel()[full], theirs["df_i"], atol=1e-8)
        assert np.all(np.isnan(profile.f.ravel()[~full]))


def test_pmf_with_samples_off_the_grid_matches_bins_as_basins(umbrella):
    # source: library — the same bins as basins go through pymbar's
    # compute_perturbed_free_energies (dense covariance), an independent route to f, df
    x_n, result = umbrella
    u_n = 0.5 * WELL_K * (x_n - 0.4) ** 2
    edges = np.linspace(-1.0, 2.0, 13)  # many samples lie outside
    profile = result.compute_pmf(u_n, x_n, [edges])
    masks = {f"bin{b}": (x_n >= edges[b]) & (x_n < edges[b + 1]) for b in range(12)}
    basins = result.compute_basins(u_n, masks)
    lowest = int(np.argmin(profile.f))
    np.testing.assert_allclose(profile.f, basins.Delta_g[lowest], atol=1e-8)
    np.testing.assert_allclose(profile.df, basins.d_Delta_g[lowest], atol=1e-8)
    np.testing.assert_array_equal(profile.counts, [m.sum() for m in masks.values()])


def test_basin_populations_of_an_offset_well(umbrella):
    # source: exact — target U = ½K(x - x0)²: p(x < 0) = Φ(-x0 √K) (scipy.stats.norm)
    x_n, result = umbrella
    x0 = 0.7
    u_n = 0.5 * WELL_K * (x_n - x0) ** 2
    basins = result.compute_basins(u_n, {"left": x_n < 0, "right": x_n >= 0})
    exact = norm.cdf([-x0 * WELL_K**0.5, x0 * WELL_K**0.5])
    z = (basins.populations - exact) / basins.d_populations
    assert np.all(np.abs(z) < 4.0), z
    assert np.all(np.abs(basins.populations - exact) < 0.02)
    assert basins.names == ("left", "right")
    assert basins.populations.sum() == pytest.approx(1.0, abs=1e-10)
    # Delta_g[i, j] = -ln(p_j / p_i), antisymmetric, exact value from the cdf
    np.testing.assert_allclose(basins.Delta_g, -basins.Delta_g.T, atol=1e-12)
    np.testing.assert_allclose(basins.d_Delta_g, basins.d_Delta_g.T, atol=1e-12)
    assert basins.Delta_g[0, 1] == pytest.approx(
        -np.log(basins.populations[1] / basins.populations[0]), abs=1e-10
    )
    exact_dg = -np.log(exact[1] / exact[0])
    assert abs(basins.Delta_g[0, 1] - exact_dg) < 4.0 * basins.d_Delta_g[0, 1]
    assert abs(basins.Delta_g[0, 1] - exact_dg) < 0.1
    # source: exact — p_right = 1 - p_left, so the delta method gives
    # d(Δg) = dp / (p (1 - p)); treating p_i, p_j as independent would give less.
    p, dp = basins.populations[0], basins.d_populations[0]
    assert basins.d_Delta_g[0, 1] == pytest.approx(dp / (p * (1 - p)), rel=1e-5)


def test_basins_that_cover_everything_sum_to_one(umbrella):
    # source: exact — populations of a partition of the whole ensemble sum to 1
    x_n, result = umbrella
    u_n = 0.5 * WELL_K * (x_n + 0.3) ** 2
    masks = {"a": x_n < -1.0, "b": (x_n >= -1.0) & (x_n < 0.5), "c": x_n >= 0.5,
             "all": np.ones(x_n.size, dtype=bool)}
    basins = result.compute_basins(u_n, masks)
    assert basins.populations[:3].sum() == pytest.approx(1.0, abs=1e-10)
    assert basins.populations[3] == pytest.approx(1.0, abs=1e-10)
    assert basins.d_populations[3] == pytest.approx(0.0, abs=1e-6)


def test_empty_basin_is_an_analysis_error(umbrella):
    x_n, result = umbrella
    with pytest.raises(AnalysisError, match="'nowhere'"):
        result.compute_basins(0.5 * x_n**2, {"left": x_n < 0, "nowhere": x_n > 100.0})


def test_conditions_without_overlap_warn():
    # source: common practice — overlap below ~0.03 between conditions is poor
    rng = np.random.default_rng(9)
    centres = np.array([0.0, 9.0])
    x_n = np.concatenate([rng.normal(c, 1.0, 300) for c in centres])
    u_kn = 0.5 * (x_n[None, :] - centres[:, None]) ** 2
    with pytest.warns(PoorOverlapWarning, match=r"\[0\]; \[1\]"):
        Reweighting(u_kn, [300, 300])


def test_ar1_statistical_inefficiency():
    # source: exact — AR(1) x_t = ρ x_{t-1} + ε has g = (1 + ρ) / (1 - ρ) = 19 for ρ = 0.9
    rho = 0.9
    series = _ar1(rho, 20000, seed=1)
    result = decorrelate(series)
    exact = (1 + rho) / (1 - rho)
    assert abs(result.g - exact) < 0.2 * exact
    assert result.n_effective == pytest.approx((series.size - result.t0) / result.g)
    assert result.indices[0] == result.t0
    assert abs(np.mean(np.diff(result.indices)) - result.g) < 1.0


def test_transient_is_detected_as_equilibration():
    # source: published — Chodera, JCTC 12, 1799 (2016): t0 maximizes (T - t0)/g
    series = _ar1(0.9, 20000, seed=2) + 30.0 * np.exp(-np.arange(20000) / 300.0)
    result = decorrelate(series)
    assert result.t0 > 0
    assert np.all(result.indices >= result.t0)


def test_constant_series_is_uncorrelated():
    # our convention (documented in decorrelate): no fluctuation, so g = 1, keep all
    result = decorrelate(np.full(50, 3.0))
    assert (result.t0, result.g, result.n_effective) == (0, 1.0, 50.0)
    np.testing.assert_array_equal(result.indices, np.arange(50))


def test_short_correlated_series_warns():
    # source: exact — ρ = 0.99 gives g = 199, so 200 samples hold about one independent one
    with pytest.warns(ConvergenceWarning, match="effectively uncorrelated"):
        decorrelate(_ar1(0.99, 200, seed=3))


def test_bad_inputs_are_analysis_errors():
    with pytest.raises(AnalysisError, match="N_k"):
        Reweighting(np.zeros((2, 5)), [2, 2])
    with pytest.raises(AnalysisError, match="series"):
        decorrelate([1.0, np.nan, 2.0])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = Reweighting(np.zeros((1, 4)), [4])
    with pytest.raises(AnalysisError, match="edges"):
        result.compute_pmf(np.zeros(4), np.arange(4.0), [np.array([1.0, 0.0])])
