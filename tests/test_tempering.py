"""Replica exchange through the whole pipeline: temperature ladders and window ladders.

Each check runs a protocol (load_protocol -> run_protocol -> analyse_run) and compares
swap acceptance, free energies and basin populations with exact results: the
incomplete-beta law for harmonic degrees of freedom, closed-form harmonic free energies
and basin populations by quadrature.
"""

import math
import struct
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from scipy.special import betainc

from boost.analysis import analyse_run
from boost.models import read_model
from boost.protocol import load_protocol
from boost.report import write_report
from boost.plan import make_plan
from boost.scheduler import run_protocol
from boost.spec import Node, load_yaml
from boost.store import read_ledger
from boost.units import MOLAR_GAS_CONSTANT
from pymbar import timeseries  # after boost.analysis, which imports pymbar quietly

REPO = Path(__file__).resolve().parents[1]
PROTOCOLS = sorted((REPO / "protocols").glob("*.yaml"))
SIDES = {"left": {"x": (-np.inf, 0.0)}, "right": {"x": (0.0, np.inf)}}

# 22 particles (d = 66) in one harmonic well at 300 K and 330 K. Friction 10/ps: the
# oscillator (ω = sqrt(K/m) = 9.1/ps) is underdamped and U forgets itself within ~1/γ =
# 0.1 ps, five times shorter than a cycle, so consecutive swap attempts are independent.
TWO_TEMPERATURES = """\
protocol: 1
title: harmonic well, two temperatures
system:
  model: {name: harmonic_well, particles: 22, spring: 1000 kJ/mol/nm**2, mass: 12 amu}
seed: 2004
temperature: 300 K
timestep: 5 fs
friction: 10/ps
platform: Reference
temperatures: [300 K, 330 K]
exchange: {pairs: adjacent, attempts: 2}   # two walkers: odd-parity passes hold no pair,
run:                                          # so this is one attempt per cycle
  cycle: 0.5 ps
  equilibration: 5 ps
  production: 1250 ps
"""

# One particle; umbrella windows on x with the same centre and springs 2500 and 500 on
# top of the well's own 500 kJ/mol/nm²: total springs 3000 and 1000 along x (R = 3);
# y and z feel the same well in both windows, so they cancel from every swap (d = 1).
TWO_SPRINGS = """\
protocol: 1
title: harmonic well, two stiffnesses along x
system:
  model: {name: harmonic_well, particles: 1, spring: 500 kJ/mol/nm**2, mass: 12 amu}
seed: 2005
temperature: 300 K
timestep: 5 fs
friction: 20/ps
platform: Reference
coordinates:
  x: {position: 0, axis: x}
umbrella:
  x: {centres: [0 nm, 0 nm], spring: [2500 kJ/mol/nm**2, 500 kJ/mol/nm**2]}
exchange: {pairs: adjacent, attempts: 2}   # one attempt per cycle, as above
run:
  cycle: 0.5 ps
  equilibration: 5 ps
  production: 1000 ps
analysis:
  bins: {x: {from: -0.15 nm, to: 0.15 nm, count: 15}}
"""

# Five particles (d = 15), four temperatures 300-600 K, swaps among all pairs.
FOUR_TEMPERATURES = """\
protocol: 1
title: harmonic well, four temperatures, all-pairs swaps
system:
  model: {name: harmonic_well, particles: 5, spring: 1000 kJ/mol/nm**2, mass: 12 amu}
seed: 2008
temperature: 300 K
timestep: 5 fs
friction: 10/ps
platform: Reference
temperatures: {lowest: 300 K, highest: 600 K, count: 4}
exchange: {pairs: any}
run:
  cycle: 0.5 ps
  equilibration: 5 ps
  production: 500 ps
"""


def exact_acceptance(d, ratio):
    """Mean swap acceptance between harmonic systems with d degrees of freedom.

    source: Predescu, Predescu & Ciobanu, J. Chem. Phys. 120, 4119 (2004),
    doi:10.1063/1.1644093: <acc> = 2 I_{1/(1+R)}(d/2, d/2), the regularized incomplete
    beta function, R = T_hi/T_lo (or K_i/K_j for two springs at one temperature). Exact.
    """
    return 2.0 * betainc(d / 2, d / 2, 1.0 / (1.0 + ratio))


def measured_acceptance(data, i, j):
    """Acceptance of swaps between conditions i < j over production cycles, and its error.

    The error is the ratio estimator's over cycles (binomial for one attempt per cycle,
    and it absorbs the correlation of attempts within a cycle), times sqrt(g) with g the
    statistical inefficiency of the per-cycle residuals (pymbar.timeseries, Chodera 2016)
    as the allowance for correlation between cycles.
    """
    production = data.cycle_t[data.production_t]
    rows = data.swaps[(data.swaps[:, 1] == i) & (data.swaps[:, 2] == j) & np.isin(data.swaps[:, 0], production)]
    attempts, accepted = rows[:, 3].astype(float), rows[:, 4].astype(float)
    mean = accepted.sum() / attempts.sum()
    residual = accepted - mean * attempts
    g = max(1.0, float(timeseries.statistical_inefficiency(residual))) if np.ptp(residual) > 0 else 1.0
    return mean, math.sqrt(g * np.sum(residual**2)) / attempts.sum()


def run(text, folder, name="protocol.yaml"):
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_text(text)
    return run_protocol(load_protocol(path), folder / "run", progress=False)


def run_example(name, folder):
    """Run protocols/NAME.yaml as it is, but on the Reference platform: fixed seeds then
    fix every number, whichever platform 'auto' would measure as faster on this machine."""
    protocol = load_protocol(REPO / "protocols" / f"{name}.yaml")
    reference = replace(protocol.platform, name="Reference")
    return protocol, run_protocol(protocol, folder, platform=reference, progress=False)


def model_of(protocol):
    return protocol.system.source.model


def bundled_model(name):
    return read_model(load_yaml(REPO / "systems" / f"{name}.yaml", what="system").get("model"))


def held_samples(data, k):
    """Production potential energies (kJ/mol) recorded in condition k."""
    held = (data.condition_rt == k) & data.production_t[None, :]
    return data.potential_rt[held]


@pytest.fixture(scope="module")
def two_temperatures(tmp_path_factory):
    return run(TWO_TEMPERATURES, tmp_path_factory.mktemp("two-temperatures"))


@pytest.fixture(scope="module")
def two_springs(tmp_path_factory):
    return run(TWO_SPRINGS, tmp_path_factory.mktemp("two-springs"))


@pytest.fixture(scope="module")
def four_temperatures(tmp_path_factory):
    return run(FOUR_TEMPERATURES, tmp_path_factory.mktemp("four-temperatures"))


@pytest.fixture(scope="module")
def double_well_ladder(tmp_path_factory):
    """The bundled example protocols/double-well-tempering.yaml, run as it is."""
    return run_example("double-well-tempering", tmp_path_factory.mktemp("double-well") / "run")


# -- the harmonic_well model ------------------------------------------------------------

def test_harmonic_well_model_matches_openmm():
    # exact: U = Σ ½ K |r_i|², evaluated by OpenMM's Reference platform and by numpy
    import openmm

    model = read_model(Node({"name": "harmonic_well", "particles": 4, "spring": "750 kJ/mol/nm**2"},
                            "test", "system.model"))
    system, topology, positions = model.build_system()
    assert system.getNumParticles() == topology.getNumAtoms() == 4 and positions.shape == (4, 3)
    assert system.getNumConstraints() == 0 and model.degrees_of_freedom == 12
    assert not any(isinstance(f, openmm.CMMotionRemover) for f in system.getForces())
    context = openmm.Context(system, openmm.VerletIntegrator(0.001), openmm.Platform.getPlatformByName("Reference"))
    xyz = np.random.default_rng(3).normal(0.0, 0.1, (5, 4, 3))
    energies = []
    for frame in xyz:
        context.setPositions(frame)
        energies.append(context.getState(getEnergy=True).getPotentialEnergy().value_in_unit(
            openmm.unit.kilojoule_per_mole))
    assert np.allclose(energies, model.compute_energy(xyz), rtol=1e-10)
    assert np.allclose(model.compute_energy(xyz), 375.0 * np.sum(xyz**2, axis=(1, 2)))


# -- 1. the incomplete-beta law, temperatures -------------------------------------------

def test_temperature_swaps_follow_incomplete_beta_law(two_temperatures):
    data = read_ledger(two_temperatures)
    analysis = analyse_run(two_temperatures, energy_unit="kT")
    exact = exact_acceptance(66, 330.0 / 300.0)
    assert exact == pytest.approx(0.6998, abs=1e-4)
    mean, error = measured_acceptance(data, 0, 1)
    assert analysis.swaps.acceptance_ij[0, 1] == pytest.approx(mean)
    assert analysis.swaps.attempts_ij[0, 1] == data.production_t.sum()     # one per cycle
    # a few σ (with the correlation allowance) and an absolute bound
    assert abs(mean - exact) < 4 * error and abs(mean - exact) < 0.03, (mean, error, exact)


def test_cycles_decorrelate_harmonic_energies(two_temperatures):
    # exact: βU of d harmonic dof is Gamma(d/2, 1): <U> = (d/2) kT, var U = (d/2) (kT)².
    # Uncorrelated cycles (g near 1) are what makes the swap attempts independent.
    data = read_ledger(two_temperatures)
    analysis = analyse_run(two_temperatures, energy_unit="kT")
    model = model_of(load_protocol(two_temperatures / "protocol.yaml"))
    assert np.all(analysis.g_k < 1.5), analysis.g_k
    for k, temperature in enumerate((300.0, 330.0)):
        energy = held_samples(data, k)
        kt = MOLAR_GAS_CONSTANT * temperature
        assert model.compute_exact_mean_energy(temperature) == pytest.approx(33.0 * kt)
        error = math.sqrt(33.0) * kt / math.sqrt(energy.size) * math.sqrt(analysis.g_k[k])
        assert abs(energy.mean() - 33.0 * kt) < 4 * error and abs(energy.mean() / (33.0 * kt) - 1) < 0.01
        assert np.var(energy) / (33.0 * kt**2) == pytest.approx(1.0, abs=0.1)


# -- 2. the incomplete-beta law, two springs at one temperature --------------------------

def test_window_swaps_between_springs_follow_incomplete_beta_law(two_springs):
    folder = two_springs
    data = read_ledger(folder)
    exact = exact_acceptance(1, 3000.0 / 1000.0)
    # source: Predescu et al. (2004), d = 1 special case (4/π) arctan(R^-1/2) = 2/3 at R = 3
    assert exact == pytest.approx(2.0 / 3.0)
    mean, error = measured_acceptance(data, 0, 1)
    assert abs(mean - exact) < 4 * error and abs(mean - exact) < 0.03, (mean, error, exact)
    # exact: window free energies along x, Δf = ½ ln(K_1/K_0) with total springs (y, z cancel)
    analysis = analyse_run(folder, energy_unit="kT")
    expected = 0.5 * math.log(1000.0 / 3000.0)
    assert abs(analysis.f_k[1] - expected) < 4 * analysis.df_k[1] and abs(analysis.f_k[1] - expected) < 0.05


def test_window_ladder_reweights_to_the_unbiased_well(two_springs):
    # exact: the unbiased x marginal is normal with variance kT/K (K = 500 kJ/mol/nm²), so
    # each bin's probability is a difference of normal CDFs (scipy.stats).
    analysis = analyse_run(two_springs, energy_unit="kT")
    (profile,) = [p for p in analysis.profiles if p.coordinates == ("x",)]
    edges = np.linspace(-0.15, 0.15, 16)
    sigma = math.sqrt(MOLAR_GAS_CONSTANT * 300.0 / 500.0)
    p_b = np.diff(stats.norm.cdf(edges, scale=sigma))
    reference = int(np.nanargmin(profile.f))           # the analysis' zero bin
    exact_f = -np.log(p_b) + np.log(p_b[reference])
    dense = profile.counts >= 100
    z = (profile.f[dense] - exact_f[dense]) / np.where(profile.df[dense] > 0, profile.df[dense], np.inf)
    assert dense.sum() >= 6                           # the bins within about 1.2 σ of the centre
    assert np.all(np.abs(z) < 4) and np.all(np.abs(profile.f[dense] - exact_f[dense]) < 0.35), z


# -- 3. double well: populations at the lowest rung and between rungs ----------------------

@pytest.mark.parametrize("temperature", [300.0, 340.0])
def test_double_well_ladder_populations_match_quadrature(double_well_ladder, temperature):
    # exact: basin populations of exp(-U/kT) by quadrature (scipy, boost.models). 300 K is
    # the lowest rung; 340 K lies between the rungs at 300 K and 377 K (MBAR interpolates).
    protocol, folder = double_well_ladder
    assert protocol.temperatures[0] == 300.0 and protocol.temperatures[1] > 340.0
    analysis = analyse_run(folder, temperature=temperature, energy_unit="kT")
    assert analysis.temperature == temperature
    exact = bundled_model("double-well-high").compute_exact_populations(temperature, SIDES)
    basins = analysis.basins
    for i, name in enumerate(basins.names):
        error = abs(basins.populations[i] - exact[name])
        assert error < 3 * basins.d_populations[i] and error < 0.03, (name, basins.populations[i], exact[name])


# -- 4. MBAR across temperatures ----------------------------------------------------------

def test_mbar_free_energies_across_temperatures(four_temperatures, two_temperatures):
    # exact: for d harmonic dof, f_j - f_i = (d/2) ln(β_j/β_i) (tests/REFERENCES.md, harmonic well)
    for path, d in ((four_temperatures, 15), (two_temperatures, 66)):
        protocol = load_protocol(path / "protocol.yaml")
        assert model_of(protocol).degrees_of_freedom == d
        analysis = analyse_run(path, energy_unit="kT")
        temperatures = np.array(protocol.temperatures)
        exact = 0.5 * d * np.log(temperatures[0] / temperatures)
        model = model_of(protocol)
        closed_form = [model.compute_exact_free_energy(t) - model.compute_exact_free_energy(temperatures[0])
                       for t in temperatures]
        assert np.allclose(closed_form, exact)
        z = (analysis.f_k[1:] - exact[1:]) / analysis.df_k[1:]
        assert np.all(np.abs(z) < 4) and np.allclose(analysis.f_k, exact, atol=0.1), (analysis.f_k, exact)


def test_any_pairs_swaps_follow_incomplete_beta_law(four_temperatures):
    # source: Predescu et al. (2004) for every pair, R = T_j/T_i; all-pairs swaps keep the
    # joint distribution stationary, so each attempt sees canonical configurations (exact).
    data = read_ledger(four_temperatures)
    temperatures = [c.temperature for c in data.conditions]
    for i in range(4):
        for j in range(i + 1, 4):
            exact = exact_acceptance(15, temperatures[j] / temperatures[i])
            mean, error = measured_acceptance(data, i, j)
            assert abs(mean - exact) < 4 * error and abs(mean - exact) < 0.04, (i, j, mean, error, exact)


# -- 5. window ladder with exchange (replica-exchange umbrella sampling) --------------------

def test_window_exchange_example_matches_quadrature(tmp_path):
    # exact: populations by quadrature (boost.models) for the bundled high double well
    analysis = analyse_run(run_example("double-well-window-exchange", tmp_path / "run")[1])
    exact = bundled_model("double-well-high").compute_exact_populations(300.0, SIDES)
    basins = analysis.basins
    for i, name in enumerate(basins.names):
        error = abs(basins.populations[i] - exact[name])
        assert error < 3 * basins.d_populations[i] and error < 0.05, (name, basins.populations[i], exact[name])
    neighbours = np.diag(analysis.swaps.acceptance_ij, 1)
    assert np.all(neighbours > 0.1), neighbours        # every pair of windows exchanges


# -- 6. diagnostics --------------------------------------------------------------------

def test_ladder_diagnostics_and_plots(double_well_ladder, tmp_path):
    protocol, folder = double_well_ladder
    analysis = analyse_run(folder)
    swaps, n = analysis.swaps, len(protocol.temperatures)
    acceptance = swaps.acceptance_ij
    assert np.allclose(acceptance, acceptance.T, equal_nan=True)
    assert np.array_equal(swaps.attempts_ij, swaps.attempts_ij.T)
    # exact bookkeeping: each accepted swap shows as two walkers trading conditions in the
    # traces between one cycle and the next (neighbour swaps: disjoint pairs per cycle)
    data = read_ledger(folder)
    traded = np.zeros((n, n))
    production = np.flatnonzero(data.production_t)
    for t in production[production + 1 < data.condition_rt.shape[1]]:
        before, after = data.condition_rt[:, t], data.condition_rt[:, t + 1]
        for r in np.flatnonzero(before != after):
            traded[before[r], after[r]] += 0.5
    last = data.cycle_t[production[-1]]
    tally = swaps.accepted_ij - _accepted_in_cycle(data, last, n)
    assert np.array_equal(traded + traded.T, tally)
    # a well-mixed ladder: every walker makes round trips; each one needs at least
    # 2 (n - 1) cycles, since a neighbour swap moves a walker one rung per cycle
    trips = swaps.round_trips_r
    assert np.all(trips > 0) and np.all(trips <= len(production) / (2 * (n - 1))), trips
    out = write_report(analysis, tmp_path / "report")
    for name in ("walker-traces.png", "swap-acceptance.png"):
        data_png = (out / name).read_bytes()
        assert data_png[:8] == b"\x89PNG\r\n\x1a\n"
        width, height = struct.unpack(">II", data_png[16:24])
        assert width > 100 and height > 100


def _accepted_in_cycle(data, cycle, n):
    """Accepted swaps of one cycle as a symmetric matrix (they show in no later trace)."""
    out = np.zeros((n, n))
    for _, i, j, _, accepted in data.swaps[data.swaps[:, 0] == cycle]:
        out[i, j] += accepted
        out[j, i] += accepted
    return out


# -- 7. every example protocol is valid -----------------------------------------------------

@pytest.mark.parametrize("path", PROTOCOLS, ids=[p.name for p in PROTOCOLS])
def test_example_protocol_checks_and_explains_itself(path):
    plan = make_plan(load_protocol(path), probe=False)
    assert plan.n_walkers == len(plan.conditions) >= 1
    header = []
    for line in path.read_text(encoding="utf-8").splitlines():
        if not line.startswith("#"):
            break
        header.append(line)
    text = " ".join(header)
    # README: each example says what it shows, what to expect and how long it runs
    assert header and "Shows:" in text and "What to expect:" in text and "Runs" in text, path.name


# -- 5 (slow). capped alanine: replica exchange against umbrella windows ---------------------

@pytest.mark.slow
def test_alanine_tempering_agrees_with_umbrella_windows(tmp_path):
    # Internal agreement between two independent routes on the same force field
    # (tests/REFERENCES.md, capped alanine): ΔG(C7eq -> C7ax) at 300 K from temperature replica
    # exchange and from umbrella windows along phi, within 3 combined standard errors.
    # Sign: C7eq is the global minimum in vacuum (published: Rosso, Abrams & Tuckerman,
    # J. Phys. Chem. B 109, 4162 (2005); Tobias & Brooks, J. Phys. Chem. 96, 3864 (1992)).
    results = {}
    for name in ("alanine-tempering", "alanine-phi-umbrella"):
        _, folder = run_example(name, tmp_path / name)
        analysis = analyse_run(folder, energy_unit="kT")
        basins = analysis.basins
        assert basins.names == ("C7eq", "C7ax")
        results[name] = (basins.Delta_g[0, 1], basins.d_Delta_g[0, 1], analysis)
        print(f"{name}: ΔG(C7eq->C7ax) = {basins.Delta_g[0, 1]:.3f} ± {basins.d_Delta_g[0, 1]:.3f} kT")
    (g1, e1, tempering), (g2, e2, _) = results["alanine-tempering"], results["alanine-phi-umbrella"]
    assert g1 > 0 and g2 > 0
    assert abs(g1 - g2) < 3 * math.hypot(e1, e2), (g1, e1, g2, e2)
    # common practice: neighbour acceptance well inside (0.15, 0.75) on a useful ladder
    neighbours = np.diag(tempering.swaps.acceptance_ij, 1)
    print("neighbour acceptance", np.round(neighbours, 3), "round trips", tempering.swaps.round_trips_r)
    assert np.all((neighbours > 0.15) & (neighbours < 0.75)), neighbours
    assert np.all(tempering.swaps.round_trips_r > 0)
