"""Tests for boost.models: model potentials against OpenMM, published values and quadrature."""

import io
import math

import mdtraj
import numpy as np
import openmm
import pytest
from openmm import app

from boost.exceptions import ProtocolError
from boost.models import MODEL_NAMES, DoubleWell, MullerBrown, read_model
from boost.spec import Node
from boost.units import MOLAR_GAS_CONSTANT

FILE = "system.yaml"

# source: Müller & Brown, Theor. Chim. Acta 53, 75 (1979); stationary points computed from
# the published parameters (tests/REFERENCES.md, Müller–Brown surface), in surface units:
# (kind, x, y, V).
MB_PUBLISHED = [
    ("minimum", -0.558224, 1.441726, -146.6995),
    ("minimum", 0.623499, 0.028038, -108.1667),
    ("minimum", -0.050011, 0.466694, -80.7678),
    ("saddle", -0.822002, 0.624313, -40.6648),
    ("saddle", 0.212487, 0.292988, -72.2489),
]


def model(**spec):
    return read_model(Node(spec, FILE, "system.model"))


def reference_context(system, seed=None, temperature=300.0, friction=1.0, timestep=0.002):
    integrator = openmm.LangevinMiddleIntegrator(temperature, friction, timestep)
    if seed is not None:
        integrator.setRandomNumberSeed(seed)
    return openmm.Context(system, integrator, openmm.Platform.getPlatformByName("Reference"))


def openmm_energy_and_forces(system, xyz):
    context = reference_context(system)
    energies, forces = [], []
    for point in xyz:
        context.setPositions(point[None, :])
        state = context.getState(getEnergy=True, getForces=True)
        energies.append(state.getPotentialEnergy().value_in_unit(openmm.unit.kilojoule_per_mole))
        forces.append(state.getForces(asNumpy=True).value_in_unit(
            openmm.unit.kilojoule_per_mole / openmm.unit.nanometer)[0])
    return np.array(energies), np.array(forces)


def random_points(rng, n, box):
    lows, highs = np.array(box).T
    return rng.uniform(lows, highs, size=(n, 3))


TILTED = dict(name="double_well", barrier="10 kJ/mol", minimum="0.12 nm", tilt="1 kJ/mol",
              transverse_spring="500 kJ/mol/nm**2")
SCALED_MB = dict(name="muller_brown", energy_scale="0.3 kJ/mol", length_scale="0.5 nm")


# -- reading specs ------------------------------------------------------------------------

def test_read_model_defaults_in_md_units():
    # source: unit conversions of the defaults (common practice: MD units nm, kJ/mol, amu)
    well = model(name="double_well")
    assert well == DoubleWell(barrier=10.0, minimum=0.1, tilt=0.0, mass=12.0, transverse_spring=1000.0)
    surface = model(name="muller_brown", length_scale="10 angstrom", energy_scale="1 kcal/mol")
    assert surface.length_scale == pytest.approx(1.0)
    assert surface.energy_scale == pytest.approx(4.184)
    assert set(MODEL_NAMES) == {"double_well", "muller_brown", "harmonic_well"}


@pytest.mark.parametrize("spec, pattern", [
    (dict(name="double_well", barier="5 kJ/mol"),
     r"system\.model\.barier is not a known key\. Did you mean 'barrier'"),
    (dict(name="muller_brown", tilt="1 kJ/mol"), r"system\.model\.tilt is not a known key"),
    (dict(name="double_well", barrier=5), r"system\.model\.barrier must be an energy"),
    (dict(name="double_well", minimum="-0.1 nm"), r"system\.model\.minimum must be positive"),
    (dict(name="triple_well"), r"system\.model\.name must be one of"),
    (dict(barrier="5 kJ/mol"), r"system\.model\.name is required"),
])
def test_read_model_rejects_bad_specs(spec, pattern):
    with pytest.raises(ProtocolError, match=pattern):
        model(**spec)


# -- OpenMM objects -----------------------------------------------------------------------

@pytest.mark.parametrize("spec", [TILTED, SCALED_MB])
def test_topology_is_one_selectable_atom(spec):
    system, topology, positions = read_model(Node(spec, FILE, "system.model")).build_system()
    assert system.getNumParticles() == 1 and system.getNumConstraints() == 0
    assert not system.usesPeriodicBoundaryConditions()
    assert positions.shape == (1, 3)
    # source: mdtraj (reference library) must read the topology and select the atom
    assert list(mdtraj.Topology.from_openmm(topology).select("index 0")) == [0]
    buffer = io.StringIO()
    app.PDBFile.writeFile(topology, positions * openmm.unit.nanometer, buffer)
    buffer.seek(0)
    reread = app.PDBFile(buffer)  # source: OpenMM's PDB reader (reference library)
    assert [atom.element.symbol for atom in reread.topology.atoms()] == ["C"]
    np.testing.assert_allclose(reread.getPositions(asNumpy=True)._value, positions, atol=1e-4)


@pytest.mark.parametrize("spec, box", [
    (TILTED, [(-0.25, 0.25), (-0.1, 0.1), (-0.1, 0.1)]),
    (SCALED_MB, [(-0.75, 0.6), (-0.25, 1.0), (-0.1, 0.1)]),
])
def test_numpy_energy_matches_openmm(spec, box):
    # source: OpenMM Reference platform (double precision) evaluating the same force
    built = model(**spec)
    xyz = random_points(np.random.default_rng(11), 40, box)
    energies, _ = openmm_energy_and_forces(built.build_system()[0], xyz)
    np.testing.assert_allclose(built.compute_energy(xyz), energies, rtol=0, atol=1e-6)


@pytest.mark.parametrize("spec, box", [
    (TILTED, [(-0.25, 0.25), (-0.1, 0.1), (-0.1, 0.1)]),
    (SCALED_MB, [(-0.75, 0.6), (-0.25, 1.0), (-0.1, 0.1)]),
])
def test_openmm_forces_are_minus_numerical_gradient(spec, box):
    # source: exact (F = -dU/dx), central differences of compute_energy with h = 1e-6 nm
    built = model(**spec)
    xyz = random_points(np.random.default_rng(5), 10, box)
    _, forces = openmm_energy_and_forces(built.build_system()[0], xyz)
    h = 1e-6
    energy = built.compute_energy
    gradient = np.stack([(energy(xyz + h * e) - energy(xyz - h * e)) / (2 * h) for e in np.eye(3)], axis=1)
    np.testing.assert_allclose(forces, -gradient, rtol=1e-5, atol=1e-3)


@pytest.mark.parametrize("spec", [TILTED, SCALED_MB])
def test_start_position_is_a_minimum(spec):
    # source: exact (the force vanishes at a stationary point)
    system, _, positions = read_model(Node(spec, FILE, "system.model")).build_system()
    _, forces = openmm_energy_and_forces(system, positions)
    assert np.abs(forces).max() < 1e-6


def test_double_well_starts_in_left_well():
    # source: exact (dU/ds = 4 barrier s (s^2 - 1) + tilt = 0, solved here in closed form
    # for the left root with Cardano's trigonometric formula)
    built = model(**TILTED)
    _, _, positions = built.build_system()
    p, q = -1.0, built.tilt / (4 * built.barrier)
    angle = math.acos(1.5 * q / p * math.sqrt(-3 / p)) / 3 - 4 * math.pi / 3
    left = 2 * math.sqrt(-p / 3) * math.cos(angle)
    assert positions[0, 0] == pytest.approx(left * built.minimum, abs=1e-10)
    assert positions[0, 0] < 0


# -- Müller–Brown published stationary points -------------------------------------------

@pytest.mark.parametrize("kind, x, y, energy", MB_PUBLISHED)
def test_muller_brown_stationary_points_match_published(kind, x, y, energy):
    # source: Müller & Brown, Theor. Chim. Acta 53, 75 (1979) (tests/REFERENCES.md);
    # started from the published point rounded to one decimal, on a scaled surface.
    built = model(**SCALED_MB)
    guess = (round(x, 1) * built.length_scale, round(y, 1) * built.length_scale)
    point = built.find_stationary_point(guess)
    assert point.kind == kind
    assert point.x / built.length_scale == pytest.approx(x, abs=1e-4)
    assert point.y / built.length_scale == pytest.approx(y, abs=1e-4)
    assert point.energy / built.energy_scale == pytest.approx(energy, abs=1e-3)


def test_muller_brown_deepest_minimum():
    # source: Müller & Brown (1979): the lowest of the three minima is (-0.558224, 1.441726)
    built = model(**SCALED_MB)
    deepest = built.find_deepest_minimum()
    assert deepest.x / built.length_scale == pytest.approx(-0.558224, abs=1e-4)
    assert deepest.y / built.length_scale == pytest.approx(1.441726, abs=1e-4)
    _, _, positions = built.build_system()
    assert built.compute_energy(positions)[0] / built.energy_scale == pytest.approx(-146.6995, abs=1e-3)


# -- exact populations and PMFs -----------------------------------------------------------

HALVES = {"left": {"x": (-np.inf, 0.0)}, "right": {"x": (0.0, np.inf)}}


@pytest.mark.parametrize("temperature", [150.0, 300.0, 900.0])
def test_symmetric_double_well_is_half_and_half(temperature):
    # source: exact by symmetry U(x) = U(-x) when tilt = 0
    populations = model(name="double_well").compute_exact_populations(temperature, HALVES)
    assert populations["left"] == pytest.approx(0.5, abs=1e-9)
    assert populations["right"] == pytest.approx(0.5, abs=1e-9)


def midpoint_weights(energy, lo, hi, temperature, n):
    """Midpoint-rule Boltzmann weights on n cells of [lo, hi]: an independent quadrature."""
    x = lo + (np.arange(n) + 0.5) * (hi - lo) / n
    u = energy(x) / (MOLAR_GAS_CONSTANT * temperature)
    return x, np.exp(-(u - u.min()))


def test_tilted_double_well_matches_midpoint_rule():
    # source: exact (quadrature); cross-checked with an independent midpoint rule on the
    # same domain (spectrally accurate for a smooth integrand that vanishes at the ends)
    built = model(**TILTED)
    populations = built.compute_exact_populations(300.0, HALVES)
    (lo, hi), = built.compute_domain(300.0)
    energy = lambda x: built.compute_energy(np.column_stack([x, 0 * x, 0 * x]))  # noqa: E731
    x, weight = midpoint_weights(energy, lo, hi, 300.0, 20000)
    assert populations["left"] == pytest.approx(weight[x < 0].sum() / weight.sum(), abs=1e-6)
    assert populations["left"] + populations["right"] == pytest.approx(1.0, abs=1e-9)
    assert populations["left"] > 0.6  # a positive tilt lowers the left well


@pytest.mark.parametrize("temperature, tolerance", [(100.0, 0.02), (30.0, 0.003)])
def test_tilted_double_well_matches_laplace_approximation(temperature, tolerance):
    # source: low-temperature harmonic (Laplace) approximation of each well,
    # p_i ∝ exp(-U_i/kT)/sqrt(U''_i); a loose check whose error shrinks like kT
    # (tolerances set from that scaling, not exact)
    built = model(**TILTED)
    populations = built.compute_exact_populations(temperature, HALVES)
    s = built.compute_minima() / built.minimum
    energy = built.barrier * (s**2 - 1) ** 2 + built.tilt * s
    curvature = built.barrier * (12 * s**2 - 4) / built.minimum**2
    log_ratio = -(energy[0] - energy[1]) / (MOLAR_GAS_CONSTANT * temperature) \
        - 0.5 * math.log(curvature[0] / curvature[1])
    assert math.log(populations["left"] / populations["right"]) == pytest.approx(log_ratio, abs=tolerance)


def test_double_well_pmf_is_the_potential_along_x():
    # source: exact (y and z are separable harmonic directions, so F(x) = U(x, 0, 0) + const)
    built = model(**TILTED)
    grid = np.linspace(-0.2, 0.2, 41)
    s = grid / built.minimum
    expected = built.barrier * (s**2 - 1) ** 2 + built.tilt * s
    np.testing.assert_allclose(built.compute_exact_pmf(300.0, grid), expected - expected.min(), atol=1e-9)
    with pytest.raises(ValueError, match="axis"):
        built.compute_exact_pmf(300.0, grid, axis="y")


MB_BASINS = {"deep": {"y": (0.8, np.inf)}, "second": {"x": (0.25, np.inf), "y": (-np.inf, 0.8)},
             "third": {"x": (-np.inf, 0.25), "y": (-np.inf, 0.8)}}


def test_muller_brown_populations_match_midpoint_rule():
    # source: exact (nested quadrature), cross-checked with a 2-D midpoint rule on the
    # same domain with cell edges on the basin boundaries (error ~ h^2, here < 1e-4)
    built = model(name="muller_brown", length_scale="0.5 nm")
    halved = {name: {axis: tuple(0.5 * np.array(limits)) for axis, limits in box.items()}
              for name, box in MB_BASINS.items()}  # length_scale 0.5 nm
    populations = built.compute_exact_populations(300.0, halved)
    (x_lo, x_hi), (y_lo, y_hi) = built.compute_domain(300.0)
    h = 0.0025
    x = np.arange(x_lo + h / 2, x_hi, h)
    y = np.arange(y_lo + h / 2, y_hi, h)
    xx, yy = np.meshgrid(x, y, indexing="ij")
    u = built.compute_energy(np.column_stack([xx.ravel(), yy.ravel(), 0 * xx.ravel()]))
    weight = np.exp(-(u - u.min()) / (MOLAR_GAS_CONSTANT * 300.0)).reshape(xx.shape)
    upper, right = yy > 0.4, xx > 0.125
    grid = {"deep": weight[upper], "second": weight[~upper & right], "third": weight[~upper & ~right]}
    for name, cells in grid.items():
        assert populations[name] == pytest.approx(cells.sum() / weight.sum(), abs=1e-4)
    assert sum(populations.values()) == pytest.approx(1.0, abs=1e-8)
    assert populations["deep"] > populations["second"] > populations["third"] > 0.001


@pytest.mark.parametrize("axis", ["x", "y"])
def test_muller_brown_pmf_matches_midpoint_marginal(axis):
    # source: exact (quadrature of the marginal), cross-checked by a midpoint rule over
    # the other axis
    built = model(name="muller_brown")
    grid = np.linspace(-1.2, 1.0, 12) if axis == "x" else np.linspace(-0.3, 1.8, 12)
    pmf = built.compute_exact_pmf(300.0, grid, axis=axis)
    domain = built.compute_domain(300.0)[1 if axis == "x" else 0]
    other = domain[0] + (np.arange(20000) + 0.5) * (domain[1] - domain[0]) / 20000
    kt = MOLAR_GAS_CONSTANT * 300.0
    check = []
    for value in grid:
        pair = (np.full_like(other, value), other) if axis == "x" else (other, np.full_like(other, value))
        u = built.compute_energy(np.column_stack([*pair, 0 * other]))
        check.append(-kt * np.log(np.exp(-u / kt).sum()))
    check = np.array(check)
    np.testing.assert_allclose(pmf, check - check.min(), atol=1e-6)
    assert pmf.min() == 0.0


def test_basins_with_unknown_axis_are_rejected():
    with pytest.raises(ValueError, match="axes"):
        model(name="double_well").compute_exact_populations(300.0, {"a": {"y": (0, 1)}})
    with pytest.raises(ValueError, match="lo < hi"):
        model(name="muller_brown").compute_exact_populations(300.0, {"a": {"x": (1, 0)}})


# -- plain Langevin dynamics against the exact population --------------------------------

def test_langevin_run_samples_exact_population():
    # source: exact population by quadrature; the run's standard error from pymbar's
    # statistical inefficiency (Chodera, J. Chem. Theory Comput. 12, 1799 (2016))
    from pymbar import timeseries

    spec = dict(name="double_well", barrier="5 kJ/mol", tilt="1 kJ/mol")  # barrier ~2 kT
    system, _, positions = read_model(Node(spec, FILE, "system.model")).build_system()
    context = reference_context(system, seed=2718, friction=10.0, timestep=0.005)
    context.setPositions(positions)
    context.setVelocitiesToTemperature(300.0, 31)
    integrator = context.getIntegrator()
    integrator.step(2000)  # 10 ps equilibration
    n_samples, stride = 100_000, 20
    x_n = np.empty(n_samples)
    for n in range(n_samples):
        integrator.step(stride)
        x_n[n] = context.getState(getPositions=True).getPositions(asNumpy=True)._value[0, 0]
    left_n = (x_n < 0).astype(float)
    g = timeseries.statistical_inefficiency(left_n)
    standard_error = math.sqrt(left_n.var() * g / n_samples)
    exact = model(**spec).compute_exact_populations(300.0, {"left": {"x": (-np.inf, 0.0)}})["left"]
    assert abs(left_n.mean() - exact) < 4 * standard_error
    assert abs(left_n.mean() - exact) < 0.03
    assert standard_error < 0.02  # the run really crossed the barrier many times
