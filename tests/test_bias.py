"""Biases: numpy energies against the OpenMM forces, on the same positions."""

import math

import numpy as np
import openmm
import pytest

from boost.bias import (
    build_umbrella_force,
    build_flat_bottom_force,
    centre_parameter,
    compute_umbrella_energy,
    compute_flat_bottom_energy,
    spring_parameter,
)
from boost.coordinates import Coordinate, compute_coordinate_values
from boost.exceptions import ProtocolError

N_ATOMS = 10
N_FRAMES = 8
MASSES = np.array([12.011, 14.007, 15.999, 1.008, 12.011, 32.06, 1.008, 12.011, 15.999, 14.007])
# Reduced form as OpenMM requires: |bx|, |cx| <= ax/2 and |cy| <= by/2.
TRICLINIC = np.array([[3.0, 0.0, 0.0], [1.0, 2.9, 0.0], [-0.8, 1.2, 2.8]])
KJ = openmm.unit.kilojoule_per_mole

PHI = Coordinate("phi", "dihedral", ((0,), (1,), (2,), (3,)))
COORDINATES = {
    "distance": Coordinate("d", "distance", ((0,), (5,))),
    "angle": Coordinate("theta", "angle", ((0,), (1,), (2,))),
    "dihedral": PHI,
    "position": Coordinate("y4", "position", ((4,),), axis=1),
    "group_distance": Coordinate("dg", "distance", ((0, 1, 2), (5, 6, 7, 8))),
    "group_dihedral": Coordinate("tg", "dihedral", ((0, 1), (2,), (3, 4), (9,))),
    "combination": Coordinate("s", "combination", terms=(
        (1.0, Coordinate("a", "distance", ((0,), (5,)))),
        (-0.5, Coordinate("b", "distance", ((2, 3), (8, 9)))),
        (0.25, Coordinate("c", "position", ((7,),), axis=0)))),
}


def frames(seed):
    """Random molecule-like frames; atoms 0-3 get dihedrals right next to ±π."""
    rng = np.random.default_rng(seed)
    xyz = 1.5 + rng.normal(scale=0.25, size=(N_FRAMES, N_ATOMS, 3))
    for f, angle in enumerate([np.pi - 1e-4, -np.pi + 1e-4, np.pi - 0.05, -np.pi + 0.05]):
        ring = np.array([[0.15, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.15],
                         [0.15 * np.cos(angle), 0.15 * np.sin(angle), 0.15]])
        xyz[f, :4] = 1.5 + ring
    return xyz


def plain_system():
    """A System of the test atoms' masses and no forces."""
    system = openmm.System()
    for mass in MASSES:
        system.addParticle(mass)
    return system


def make_context(force, periodic):
    """A Reference-platform context holding ``force`` (group 1) and the masses."""
    system = plain_system()
    if periodic:  # a force with no terms that makes the system periodic
        dummy = openmm.CustomBondForce("0")
        dummy.setUsesPeriodicBoundaryConditions(True)
        system.addForce(dummy)
        system.setDefaultPeriodicBoxVectors(*TRICLINIC)
    built = force(system)
    built.setForceGroup(1)
    system.addForce(built)
    return openmm.Context(system, openmm.VerletIntegrator(0.001),
                          openmm.Platform.getPlatformByName("Reference"))


def energies_of(context, xyz):
    result = []
    for frame in xyz:
        context.setPositions(frame)
        state = context.getState(getEnergy=True, groups={1})
        result.append(state.getPotentialEnergy().value_in_unit(KJ))
    return np.array(result)


def values_of(coordinate, xyz, periodic):
    return compute_coordinate_values(coordinate, xyz, MASSES, TRICLINIC if periodic else None)


UMBRELLAS = [("distance", 0.8, 500.0), ("angle", 1.9, 50.0), ("dihedral", 3.1, 80.0),
             ("dihedral", -3.1, 80.0), ("dihedral", math.pi, 80.0), ("dihedral", 0.3, 80.0),
             ("position", 1.2, 300.0), ("group_distance", 0.4, 700.0),
             ("group_dihedral", -3.0, 40.0), ("combination", 0.1, 250.0)]


@pytest.mark.parametrize("periodic", [False, True])
@pytest.mark.parametrize("kind, centre, spring", UMBRELLAS)
def test_umbrella_numpy_matches_openmm(kind, centre, spring, periodic):
    coordinate = COORDINATES[kind]
    context = make_context(lambda s: build_umbrella_force(coordinate, s, centre=centre, spring=spring),
                           periodic)
    xyz = frames(seed=5)
    # source: OpenMM (library) CustomCVForce on the Reference platform, double precision
    expected = energies_of(context, xyz)
    ours = compute_umbrella_energy(values_of(coordinate, xyz, periodic), centre=centre,
                                   spring=spring, periodic=coordinate.periodic)
    np.testing.assert_allclose(ours, expected, rtol=0, atol=1e-6)
    assert np.ptp(expected) > 1e-3  # the frames really probe the bias


def test_wrapping_matters_near_pi():
    values = values_of(PHI, frames(seed=5), periodic=False)[:2]
    # source: exact — frames 0 and 1 hold dihedrals ±(π − 1e-4) of opposite sign; centred
    # on the mirror of frame 0, frame 0 lies 2e-4 rad away through ±π, frame 1 on the centre
    wrapped = compute_umbrella_energy(values, centre=-values[0], spring=80.0, periodic=True)
    unwrapped = compute_umbrella_energy(values, centre=-values[0], spring=80.0, periodic=False)
    np.testing.assert_allclose(wrapped, 0.5 * 80.0 * np.array([2e-4, 0.0]) ** 2, atol=1e-9)
    assert unwrapped[0] > 1000.0


def test_set_parameter_changes_umbrella_energy():
    coordinate = COORDINATES["dihedral"]
    context = make_context(lambda s: build_umbrella_force(coordinate, s, centre=0.5, spring=10.0),
                           periodic=False)
    xyz = frames(seed=7)
    values = values_of(coordinate, xyz, periodic=False)
    for centre, spring in [(-2.9, 10.0), (-2.9, 123.0), (3.05, 7.5)]:
        context.setParameter(centre_parameter("phi"), centre)
        context.setParameter(spring_parameter("phi"), spring)
        # source: OpenMM (library), Context.setParameter on the Reference platform
        expected = energies_of(context, xyz)
        ours = compute_umbrella_energy(values, centre=centre, spring=spring, periodic=True)
        np.testing.assert_allclose(ours, expected, rtol=0, atol=1e-6)


def test_umbrella_global_parameters():
    system = plain_system()
    force = build_umbrella_force(PHI, system, centre=1.0, spring=2.0)
    names = {force.getGlobalParameterName(i): force.getGlobalParameterDefaultValue(i)
             for i in range(force.getNumGlobalParameters())}
    # source: the bias contract (parameter names and defaults)
    assert centre_parameter("phi") == "centre_phi" and spring_parameter("phi") == "spring_phi"
    assert names == {"centre_phi": 1.0, "spring_phi": 2.0}


WALLS = [("distance", "both"), ("distance", "lower"), ("distance", "upper"),
         ("angle", "both"), ("position", "both"), ("group_distance", "upper"),
         ("combination", "both")]


@pytest.mark.parametrize("periodic", [False, True])
@pytest.mark.parametrize("kind, sides", WALLS)
def test_flat_bottom_numpy_matches_openmm(kind, sides, periodic):
    coordinate = COORDINATES[kind]
    xyz = frames(seed=9)
    values = values_of(coordinate, xyz, periodic)
    low, high = np.quantile(values, [0.3, 0.7])  # bounds that leave frames on every side
    lower = low if sides in ("both", "lower") else None
    upper = high if sides in ("both", "upper") else None
    context = make_context(lambda s: build_flat_bottom_force(coordinate, s, lower=lower, upper=upper,
                                                      spring=400.0), periodic)
    # source: OpenMM (library) CustomCVForce on the Reference platform, double precision
    expected = energies_of(context, xyz)
    ours = compute_flat_bottom_energy(values, lower=lower, upper=upper, spring=400.0)
    np.testing.assert_allclose(ours, expected, rtol=0, atol=1e-6)
    inside = (values >= (lower if lower is not None else -np.inf)) & \
             (values <= (upper if upper is not None else np.inf))
    # source: exact — a flat-bottom restraint is zero inside its bounds and positive outside
    assert np.all(expected[inside] == 0.0) and np.all(expected[~inside] > 0.0)
    assert inside.any() and (~inside).any()


def test_flat_bottom_has_no_global_parameters():
    system = plain_system()
    force = build_flat_bottom_force(COORDINATES["distance"], system, lower=0.2, upper=0.9, spring=100.0)
    # source: the bias contract (flat-bottom constants are baked into the expression)
    assert force.getNumGlobalParameters() == 0


def test_periodic_umbrella_is_continuous_across_pi():
    spring = 80.0
    for centre in (0.0, 3.1, -2.0):
        opposite = centre + np.pi
        for eps in (1e-3, 1e-6, 1e-9):
            above, below = compute_umbrella_energy(
                np.array([opposite - eps, opposite + eps - 2 * np.pi]),
                centre=centre, spring=spring, periodic=True)
            # source: exact — both sides sit π − eps from the centre around the circle
            assert above == pytest.approx(0.5 * spring * (np.pi - eps) ** 2, abs=1e-9)
            assert below == pytest.approx(above, abs=1e-9)
        values = np.linspace(-10.0, 10.0, 41)
        # source: exact — the energy has period 2π in the value
        np.testing.assert_allclose(
            compute_umbrella_energy(values + 2 * np.pi, centre=centre, spring=spring, periodic=True),
            compute_umbrella_energy(values, centre=centre, spring=spring, periodic=True), atol=1e-9)


def test_bad_flat_bottoms_are_protocol_errors():
    system = plain_system()
    distance = COORDINATES["distance"]
    # source: the bias contract (bounds in order, at least one bound, no flat bottom on dihedrals)
    with pytest.raises(ProtocolError, match="lower bound must not exceed"):
        build_flat_bottom_force(distance, system, lower=1.0, upper=0.5, spring=10.0)
    with pytest.raises(ProtocolError, match="got neither"):
        build_flat_bottom_force(distance, system, spring=10.0)
    with pytest.raises(ProtocolError, match="periodic coordinate"):
        build_flat_bottom_force(PHI, system, lower=-1.0, upper=1.0, spring=10.0)
    with pytest.raises(ProtocolError, match="spring constant"):
        build_umbrella_force(distance, system, centre=0.5, spring=-1.0)
