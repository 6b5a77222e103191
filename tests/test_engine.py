"""Walkers on OpenMM: reduced potentials from numpy equal OpenMM's energies."""

import math

import numpy as np
import openmm
import pytest
from openmm import unit

from boost.conditions import Condition, compute_reduced_potentials
from boost.coordinates import compute_coordinate_values_many
from boost.engine import (BIAS_GROUP, PHYSICAL_GROUPS, PlatformChoice, Walker, derive_seeds, prepare_system,
                          vectors)
from boost.protocol import load_protocol, resolve_coordinates
from boost.systems import build_system
from boost.units import beta

ALANINE = """\
protocol: 1
system: alanine-vacuum
seed: 4
temperature: 300 K
timestep: 2 fs
coordinates:
  phi: {dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}
  psi: {dihedral: ["resid 1 and name N", "resid 1 and name CA", "resid 1 and name C", "resid 2 and name N"]}
  d: {distance: [{centre: "resid 0"}, {centre: "resid 2"}]}
flat_bottom:
  - {coordinate: d, to: 0.5 nm, spring: 1000 kJ/mol/nm**2}
umbrella:
  phi: {centres: [-170 deg, 175 deg], spring: 150 kJ/mol/rad**2}
  psi: {centres: [0 deg], spring: 50 kJ/mol/rad**2}
temperatures: [300 K, 400 K]
run: {production: 1 ps}
"""


@pytest.fixture
def alanine(write_protocol):
    protocol = load_protocol(write_protocol(ALANINE))
    built = build_system(protocol.system)
    coordinates = resolve_coordinates(protocol, built.topology)
    system, names = prepare_system(built, protocol, coordinates)
    return protocol, built, coordinates, system, names


def _total_energy(walker):
    return walker.context.getState(getEnergy=True).getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)


def test_reduced_potentials_match_openmm_in_every_condition(alanine):
    # Cross-check of two implementations: numpy umbrella energies on coordinate values
    # (conditions.py) vs OpenMM's CustomCVForce in a context set to each condition; to 1e-6 kJ/mol.
    protocol, built, coordinates, system, names = alanine
    conditions = [Condition(0, 300.0, (math.radians(-170), 0.0), (150.0, 50.0)),
                  Condition(1, 400.0, (math.radians(175), 0.3), (150.0, 80.0))]
    walker = Walker(0, system, names, built.positions, None, conditions[0], timestep=0.002, friction=1.0,
                    platform=PlatformChoice("Reference", {}), seed=7)
    walker.draw_velocities(3)
    walker.step(200)
    observation = walker.observe()
    values = compute_coordinate_values_many(list(coordinates.values()), observation.positions, built.masses)
    columns = [list(coordinates).index(n) for n in names]
    u_kr = compute_reduced_potentials(conditions, [observation.potential], values[:, columns], [True, True])
    for condition in conditions:
        walker.apply(condition)
        total = _total_energy(walker)
        assert u_kr[condition.index, 0] / beta(condition.temperature) == pytest.approx(total, abs=1e-6)


def test_reported_potential_excludes_umbrellas_but_includes_flat_bottom(alanine):
    protocol, built, coordinates, system, names = alanine
    groups = {f.getForceGroup() for f in system.getForces() if isinstance(f, openmm.CustomCVForce)}
    assert groups == {0, BIAS_GROUP}     # the wall in the physical group, umbrellas in the bias group
    condition = Condition(0, 300.0, (0.0, 0.0), (0.0, 0.0))   # springs off: only the flat bottom remains
    walker = Walker(0, system, names, built.positions, None, condition, timestep=0.002, friction=1.0,
                    platform=PlatformChoice("Reference", {}), seed=7)
    assert walker.observe().potential == pytest.approx(_total_energy(walker), abs=1e-9)


def test_observed_numbers_are_openmms_own_bit_for_bit(alanine):
    # Cross-check of two read-outs of one State: the walker's (no unit objects) and OpenMM's
    # public getters with value_in_unit; bit for bit, since the ledger stores these numbers.
    protocol, built, coordinates, system, names = alanine
    walker = Walker(0, system, names, built.positions, None, Condition(0, 300.0, (0.0, 0.0), (150.0, 50.0)),
                    timestep=0.002, friction=1.0, platform=PlatformChoice("Reference", {}), seed=7)
    walker.draw_velocities(3)
    walker.step(20)
    observation = walker.observe()
    state = walker.context.getState(getEnergy=True, getPositions=True, getVelocities=True, groups=PHYSICAL_GROUPS)
    assert observation.potential == state.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
    assert np.array_equal(observation.positions, state.getPositions(asNumpy=True).value_in_unit(unit.nanometer))
    assert np.array_equal(vectors(state, openmm.State.Velocities, system.getNumParticles()),
                          state.getVelocities(asNumpy=True).value_in_unit(unit.nanometer / unit.picosecond))


def test_temperature_change_rescales_velocities(alanine):
    # common practice: velocities scale by sqrt(T_new / T_old) on a temperature swap
    protocol, built, coordinates, system, names = alanine
    cold = Condition(0, 300.0, (0.0, 0.0), (150.0, 50.0))
    hot = Condition(1, 400.0, (0.0, 0.0), (150.0, 50.0))
    walker = Walker(0, system, names, built.positions, None, cold, timestep=0.002, friction=1.0,
                    platform=PlatformChoice("Reference", {}), seed=7)
    walker.draw_velocities(5)
    before = walker.context.getState(getVelocities=True).getVelocities(asNumpy=True)._value
    walker.apply(hot)
    after = walker.context.getState(getVelocities=True).getVelocities(asNumpy=True)._value
    assert after == pytest.approx(before * math.sqrt(400 / 300), rel=1e-12)
    assert walker.integrator.getTemperature().value_in_unit(unit.kelvin) == pytest.approx(400)


def test_checkpoint_round_trip_is_bit_for_bit(alanine):
    # OpenMM checkpoints continue bit-for-bit on the Reference platform (measured here:
    # tests/REFERENCES.md, deterministic platforms)
    protocol, built, coordinates, system, names = alanine
    condition = Condition(0, 300.0, (0.0, 0.0), (150.0, 50.0))
    make = lambda: Walker(0, system, names, built.positions, None, condition, timestep=0.002, friction=1.0,
                          platform=PlatformChoice("Reference", {}), seed=9)
    first = make()
    first.draw_velocities(1)
    first.step(50)
    saved = first.checkpoint()
    first.step(100)
    second = make()
    second.restore(saved, condition)
    second.step(100)
    assert np.array_equal(first.observe().positions, second.observe().positions)


def test_seeds_are_positive_distinct_and_reproducible():
    seeds, swap = derive_seeds(2026, 8)
    assert len(set(seeds + [swap])) == 9 and min(seeds) > 0
    assert derive_seeds(2026, 8) == (seeds, swap)
    assert derive_seeds(2027, 8)[0] != seeds


def _positions_after_cycles(walker, other=None):
    """Walker positions after three cycles of 50 steps; ``other`` (if any) steps in between."""
    walker.draw_velocities(1)
    if other is not None:
        other.draw_velocities(2)
    trace = []
    for _ in range(3):
        if other is not None:
            other.step(37)
        walker.step(50)
        observation = walker.observe()
        trace.append((observation.positions, observation.box_vectors))
    return trace


def test_walkers_sharing_a_process_follow_the_trajectory_they_follow_alone(alanine):
    # Reference contexts of one process draw from one random stream (OpenMM's reference
    # kernels seed a process-wide generator); each walker carries its own place in it.
    protocol, built, coordinates, system, names = alanine
    condition = Condition(0, 300.0, (0.0, 0.0), (150.0, 50.0))
    make = lambda seed: Walker(0, system, names, built.positions, None, condition, timestep=0.002,
                               friction=1.0, platform=PlatformChoice("Reference", {}), seed=seed)
    alone = _positions_after_cycles(make(11))
    first = make(11)
    shared = _positions_after_cycles(first, other=make(22))
    assert all(np.array_equal(a[0], b[0]) for a, b in zip(alone, shared))


def _argon_box(barostat=None):
    """125 Lennard-Jones argon atoms in a 3 nm periodic box with a Monte Carlo barostat.

    sigma 0.3405 nm, epsilon 0.996 kJ/mol (argon, value from memory; only a test fluid here).
    """
    system = openmm.System()
    system.setDefaultPeriodicBoxVectors(openmm.Vec3(3, 0, 0), openmm.Vec3(0, 3, 0), openmm.Vec3(0, 0, 3))
    nonbonded = openmm.NonbondedForce()
    nonbonded.setNonbondedMethod(openmm.NonbondedForce.CutoffPeriodic)
    nonbonded.setCutoffDistance(1.0)
    grid = np.array([(i, j, k) for i in range(5) for j in range(5) for k in range(5)]) * 0.6 + 0.3
    for _ in grid:
        system.addParticle(39.948)
        nonbonded.addParticle(0.0, 0.3405, 0.996)
    system.addForce(nonbonded)
    system.addForce(barostat or openmm.MonteCarloBarostat(1.0 * unit.bar, 120 * unit.kelvin, 5))
    return system, grid


def test_barostat_runs_repeat_with_the_seed_and_whatever_shares_the_process():
    # A barostat left at seed 0 draws a fresh seed per context (OpenMM docs); ours get the
    # walker's seed, and barostat moves draw from a process-wide stream (as above).
    system, grid = _argon_box()
    box = np.diag([3.0, 3.0, 3.0])
    platform = PlatformChoice("CPU", {"Threads": "1", "DeterministicForces": "true"})
    make = lambda seed: Walker(0, system, (), grid, box, Condition(0, 120.0, (), ()), timestep=0.005,
                               friction=1.0, platform=platform, seed=seed)
    alone = _positions_after_cycles(make(5))
    again = _positions_after_cycles(make(5))
    first = make(5)
    shared = _positions_after_cycles(first, other=make(6))
    volumes = [np.linalg.det(b) for _, b in alone]
    assert len(set(volumes)) > 1                     # the barostat did move the box
    for other in (again, shared):
        assert all(np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1]) for a, b in zip(alone, other))


@pytest.mark.parametrize("barostat", [
    lambda: openmm.MonteCarloBarostat(1.0, 120.0, 5),
    lambda: openmm.MonteCarloAnisotropicBarostat(openmm.Vec3(1, 1, 1), 120.0, True, True, True, 5),
    lambda: openmm.MonteCarloMembraneBarostat(1.0, 0.0, 120.0, openmm.MonteCarloMembraneBarostat.XYIsotropic,
                                              openmm.MonteCarloMembraneBarostat.ZFree, 5),
    lambda: openmm.MonteCarloFlexibleBarostat(1.0, 120.0, 5),
])
def test_a_temperature_swap_reaches_every_kind_of_barostat(barostat):
    # each Monte Carlo barostat reads its temperature from a context parameter of its own name
    system, grid = _argon_box(barostat())
    walker = Walker(0, system, (), grid, np.diag([3.0, 3.0, 3.0]), Condition(0, 120.0, (), ()), timestep=0.005,
                    friction=1.0, platform=PlatformChoice("Reference", {}), seed=3)
    walker.apply(Condition(1, 150.0, (), ()))
    name = type(system.getForce(system.getNumForces() - 1)).Temperature()
    assert walker.context.getParameter(name) == pytest.approx(150.0)
    walker.step(10)
