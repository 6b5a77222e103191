"""Coordinates: numpy values against mdtraj, and OpenMM forces against numpy."""

import mdtraj as md
import numpy as np
import openmm
import pytest

from boost.coordinates import (
    Coordinate,
    build_coordinate_force,
    compute_coordinate_values,
    compute_coordinate_values_many,
    coordinate_expression,
)
from boost.exceptions import ProtocolError

ELEMENTS = ["C", "N", "O", "H", "C", "S", "H", "C", "O", "N"]
N_ATOMS = len(ELEMENTS)
N_FRAMES = 6
ORTHORHOMBIC = np.diag([3.0, 3.2, 3.4])
# Reduced form as OpenMM requires: |bx|, |cx| <= ax/2 and |cy| <= by/2.
TRICLINIC = np.array([[3.0, 0.0, 0.0], [1.0, 2.9, 0.0], [-0.8, 1.2, 2.8]])
BOXES = {"none": None, "orthorhombic": ORTHORHOMBIC, "triclinic": TRICLINIC}

PAIRS = [(0, 1), (2, 7), (3, 9), (5, 6)]
TRIPLETS = [(0, 1, 2), (3, 4, 5), (9, 2, 6), (7, 8, 0)]
QUARTETS = [(0, 1, 2, 3), (4, 5, 6, 7), (9, 8, 7, 6), (1, 3, 5, 7)]
GROUPS = [(0, 1, 2), (3, 4), (5, 6, 7), (8, 9)]


def make_topology(n_atoms=N_ATOMS):
    topology = md.Topology()
    residue = topology.add_residue("MOL", topology.add_chain())
    for i in range(n_atoms):
        topology.add_atom(f"A{i}", md.element.get_by_symbol(ELEMENTS[i % N_ATOMS]), residue)
    return topology


TOPOLOGY = make_topology()
MASSES = np.array([atom.element.mass for atom in TOPOLOGY.atoms])


def make_trajectory(xyz, box=None, topology=TOPOLOGY):
    traj = md.Trajectory(np.asarray(xyz, dtype=np.float32), topology)
    if box is not None:
        traj.unitcell_vectors = np.broadcast_to(box, (len(xyz), 3, 3)).astype(np.float32)
    return traj


def frame_boxes(box):
    """One box per frame, slightly scaled each frame so that (n_frames, 3, 3) is exercised."""
    return np.array([box * (1.0 + 0.02 * f) for f in range(N_FRAMES)])


def molecule_frames(seed):
    """A compact cluster of atoms (all within ~0.7 nm), as a molecule would be."""
    rng = np.random.default_rng(seed)
    return 1.5 + rng.normal(scale=0.15, size=(N_FRAMES, N_ATOMS, 3))


def lattice_shift(xyz, boxes, seed, blocks):
    """Move each block of atoms by its own random whole box vectors, frame by frame."""
    rng = np.random.default_rng(seed)
    shifted = xyz.copy()
    for f in range(len(xyz)):
        for block in blocks:
            n = rng.integers(-1, 2, size=3)
            shifted[f, list(block)] += n @ boxes[f]
    return shifted


def angle_difference(a, b):
    """|a - b| through the nearest multiple of 2π (plain |a - b| for small gaps, e.g. in nm)."""
    return np.abs((a - b + np.pi) % (2 * np.pi) - np.pi)


def coordinates_from(indices, kind):
    return [Coordinate(f"c{i}", kind, tuple((j,) for j in atoms)) for i, atoms in enumerate(indices)]


# ------------------------------------------------------------------- numpy vs mdtraj


@pytest.mark.parametrize("box_name", ["none", "orthorhombic", "triclinic"])
def test_atom_coordinates_match_mdtraj(box_name):
    xyz = molecule_frames(seed=11)
    boxes = None if BOXES[box_name] is None else frame_boxes(BOXES[box_name])
    if boxes is not None:  # atoms scattered over images; the geometry must not change
        xyz = lattice_shift(xyz, boxes, seed=12, blocks=[(i,) for i in range(N_ATOMS)])
    traj = make_trajectory(xyz, boxes)
    xyz = traj.xyz.astype(float)  # the same float32-rounded positions mdtraj sees
    # source: mdtraj (library) compute_distances / compute_angles / compute_dihedrals,
    # periodic=True (its own minimum image). mdtraj works in float32 (errors ~1e-5 rad on
    # short vectors), hence 1e-4; a wrong image or sign is off by far more.
    checks = [("distance", PAIRS, md.compute_distances), ("angle", TRIPLETS, md.compute_angles),
              ("dihedral", QUARTETS, md.compute_dihedrals)]
    for kind, indices, reference in checks:
        expected = reference(traj, indices, periodic=True)
        ours = compute_coordinate_values_many(coordinates_from(indices, kind), xyz, MASSES, boxes)
        assert ours.shape == (N_FRAMES, len(indices))
        assert np.max(angle_difference(ours, expected)) < 1e-4, kind


@pytest.mark.parametrize("box_name", ["none", "triclinic"])
def test_a_mixed_set_gives_each_column_its_own_coordinate(box_name):
    # Kinds interleaved in one call (the set groups them by kind and must put every value
    # back in its own column). source: mdtraj (library) compute_distances / compute_angles /
    # compute_dihedrals as above; a position is the raw coordinate of its atom; a
    # combination is its terms' mdtraj values combined.
    xyz = molecule_frames(seed=31)
    boxes = None if BOXES[box_name] is None else frame_boxes(BOXES[box_name])
    traj = make_trajectory(xyz, boxes)
    xyz = traj.xyz.astype(float)
    distance, other = Coordinate("d", "distance", ((2,), (7,))), Coordinate("e", "distance", ((0,), (1,)))
    coordinates = [Coordinate("t", "dihedral", ((9,), (8,), (7,), (6,))), distance,
                   Coordinate("z", "position", ((4,),), axis=2), Coordinate("a", "angle", ((3,), (4,), (5,))),
                   Coordinate("c", "combination", terms=((2.0, distance), (-0.5, other))),
                   Coordinate("u", "dihedral", ((0,), (1,), (2,), (3,)))]
    distances = md.compute_distances(traj, [(2, 7), (0, 1)], periodic=True)
    expected = np.stack([md.compute_dihedrals(traj, [(9, 8, 7, 6)], periodic=True)[:, 0], distances[:, 0],
                         xyz[:, 4, 2], md.compute_angles(traj, [(3, 4, 5)], periodic=True)[:, 0],
                         2.0 * distances[:, 0] - 0.5 * distances[:, 1],
                         md.compute_dihedrals(traj, [(0, 1, 2, 3)], periodic=True)[:, 0]], axis=1)
    ours = compute_coordinate_values_many(coordinates, xyz, MASSES, boxes)
    assert ours.shape == (N_FRAMES, len(coordinates))
    assert np.max(angle_difference(ours, expected)) < 1e-4


@pytest.mark.parametrize("box_name", ["orthorhombic", "triclinic"])
def test_periodic_values_do_not_depend_on_images(box_name):
    xyz = molecule_frames(seed=21)
    boxes = frame_boxes(BOXES[box_name])
    shifted = lattice_shift(xyz, boxes, seed=22, blocks=[(i,) for i in range(N_ATOMS)])
    coordinates = (coordinates_from(PAIRS, "distance") + coordinates_from(TRIPLETS, "angle")
                   + coordinates_from(QUARTETS, "dihedral"))
    # source: exact — moving atoms by whole box vectors leaves minimum-image geometry unchanged
    unshifted = compute_coordinate_values_many(coordinates, xyz, MASSES)
    periodic = compute_coordinate_values_many(coordinates, shifted, MASSES, boxes)
    assert np.max(angle_difference(periodic, unshifted)) < 1e-9


def group_coordinates():
    return [Coordinate("d", "distance", (GROUPS[0], GROUPS[2])),
            Coordinate("a", "angle", (GROUPS[0], GROUPS[1], GROUPS[2])),
            Coordinate("t", "dihedral", tuple(GROUPS)),
            Coordinate("py", "position", (GROUPS[3],), axis=1)]


@pytest.mark.parametrize("box_name", ["none", "orthorhombic", "triclinic"])
def test_group_centres_match_mdtraj(box_name):
    xyz = molecule_frames(seed=31)
    boxes = None if BOXES[box_name] is None else frame_boxes(BOXES[box_name])
    if boxes is not None:  # whole groups moved to other images; centres use raw positions
        xyz = lattice_shift(xyz, boxes, seed=32, blocks=GROUPS)
    traj = make_trajectory(xyz, boxes)
    # source: mdtraj (library) compute_center_of_mass on each group, then mdtraj geometry
    # on the four centres as points of a new trajectory (float32, hence 1e-4).
    centres = np.stack([md.compute_center_of_mass(traj.atom_slice(list(g))) for g in GROUPS], axis=1)
    centre_traj = make_trajectory(centres, boxes, topology=make_topology(len(GROUPS)))
    expected = np.stack([md.compute_distances(centre_traj, [(0, 2)])[:, 0],
                         md.compute_angles(centre_traj, [(0, 1, 2)])[:, 0],
                         md.compute_dihedrals(centre_traj, [(0, 1, 2, 3)])[:, 0],
                         centres[:, 3, 1]], axis=1)
    ours = compute_coordinate_values_many(group_coordinates(), traj.xyz.astype(float), MASSES, boxes)
    assert np.max(angle_difference(ours, expected)) < 1e-4


def test_group_centre_is_mass_weighted_mean():
    xyz = molecule_frames(seed=41)
    group = GROUPS[0]
    weights = MASSES[list(group)]
    # source: exact — the centre of mass Σ m_i x_i / Σ m_i, computed directly
    expected = (xyz[:, list(group), 2] * weights).sum(axis=1) / weights.sum()
    ours = compute_coordinate_values(Coordinate("z", "position", (group,), axis=2), xyz, MASSES)
    np.testing.assert_allclose(ours, expected, rtol=0, atol=1e-12)


def test_one_frame_and_combination():
    xyz = molecule_frames(seed=51)
    first, second = Coordinate("a", "distance", ((0,), (1,))), Coordinate("b", "distance", ((2,), (3,)))
    combination = Coordinate("s", "combination", terms=((2.0, first), (-0.5, second)))
    # source: exact — a combination is the stated linear sum of its terms
    expected = (2.0 * compute_coordinate_values(first, xyz, MASSES)
                - 0.5 * compute_coordinate_values(second, xyz, MASSES))
    ours = compute_coordinate_values(combination, xyz, MASSES)
    np.testing.assert_allclose(ours, expected, rtol=0, atol=1e-14)
    one = compute_coordinate_values(combination, xyz[2], MASSES)
    assert one.shape == (1,) and one[0] == pytest.approx(expected[2], abs=1e-14)


# ------------------------------------------------------------------- OpenMM vs numpy


def make_system(periodic):
    system = openmm.System()
    for mass in MASSES:
        system.addParticle(mass)
    if periodic:  # a force with no terms that makes the system periodic
        dummy = openmm.CustomBondForce("0")
        dummy.setUsesPeriodicBoundaryConditions(True)
        system.addForce(dummy)
    return system


def openmm_energies(system, force, xyz, box):
    """Energy of ``force`` (kJ/mol) on each frame in a Reference-platform context."""
    force.setForceGroup(1)
    system.addForce(force)
    context = openmm.Context(system, openmm.VerletIntegrator(0.001),
                             openmm.Platform.getPlatformByName("Reference"))
    energies = []
    for frame in xyz:
        if box is not None:
            context.setPeriodicBoxVectors(*box)
        context.setPositions(frame)
        state = context.getState(getEnergy=True, groups={1})
        energies.append(state.getPotentialEnergy().value_in_unit(openmm.unit.kilojoule_per_mole))
    return np.array(energies)


def leaf_coordinates():
    return (coordinates_from(PAIRS[:2], "distance") + coordinates_from(TRIPLETS[:2], "angle")
            + coordinates_from(QUARTETS[:2], "dihedral")
            + [Coordinate("px", "position", ((4,),), axis=0)] + group_coordinates())


@pytest.mark.parametrize("box_name", ["none", "orthorhombic", "triclinic"])
def test_openmm_leaf_forces_match_numpy(box_name):
    box = BOXES[box_name]
    rng = np.random.default_rng(61)
    # Spread far beyond one box, so OpenMM's reduction rule is tested where it is not the
    # true minimum image too.
    xyz = rng.uniform(-1.5, 4.5, size=(N_FRAMES, N_ATOMS, 3))
    for coordinate in leaf_coordinates():
        system = make_system(periodic=box is not None)
        energies = openmm_energies(system, build_coordinate_force(coordinate, system), xyz, box)
        # source: OpenMM (library), Reference platform, double precision
        values = compute_coordinate_values(coordinate, xyz, MASSES, box)
        assert np.max(angle_difference(values, energies)) < 1e-6, coordinate.name


def test_openmm_torsion_convention_matches_mdtraj():
    xyz = molecule_frames(seed=71)
    traj = make_trajectory(xyz)
    system = make_system(periodic=False)
    force = openmm.CustomTorsionForce("theta")
    force.addTorsion(*QUARTETS[0], [])
    # source: OpenMM CustomTorsionForce theta vs mdtraj compute_dihedrals (both libraries):
    # same sign (IUPAC) and range (mdtraj in float32, hence 1e-4)
    energies = openmm_energies(system, force, traj.xyz.astype(float), None)
    expected = md.compute_dihedrals(traj, [QUARTETS[0]])[:, 0]
    assert np.max(angle_difference(energies, expected)) < 1e-4
    assert np.all(np.abs(energies) <= np.pi)


@pytest.mark.parametrize("box_name", ["none", "triclinic"])
def test_coordinate_expression_of_combination(box_name):
    box = BOXES[box_name]
    rng = np.random.default_rng(81)
    xyz = rng.uniform(-1.0, 4.0, size=(N_FRAMES, N_ATOMS, 3))
    terms = ((1.5, Coordinate("a", "distance", ((0,), (5,)))),
             (-0.25, Coordinate("b", "distance", (GROUPS[1], GROUPS[3]))),
             (1e-3, Coordinate("c", "position", ((7,),), axis=2)))
    combination = Coordinate("s", "combination", terms=terms)
    system = make_system(periodic=box is not None)
    expression, variables = coordinate_expression(combination, system, "cv_s")
    assert [name for name, _ in variables] == ["cv_s_0", "cv_s_1", "cv_s_2"]
    force = openmm.CustomCVForce(expression)
    for name, leaf in variables:
        force.addCollectiveVariable(name, leaf)
    # source: OpenMM (library), Reference platform
    energies = openmm_energies(system, force, xyz, box)
    np.testing.assert_allclose(compute_coordinate_values(combination, xyz, MASSES, box), energies,
                               rtol=0, atol=1e-6)


def test_leaf_forces_follow_system_periodicity():
    coordinate = Coordinate("d", "distance", (GROUPS[0], GROUPS[1]))
    for periodic in (False, True):
        # source: the contract — leaf forces are periodic iff the system is
        force = build_coordinate_force(coordinate, make_system(periodic))
        assert force.usesPeriodicBoundaryConditions() is periodic


# ----------------------------------------------------------------------- the contract


def test_units_and_periodicity():
    phi = Coordinate("phi", "dihedral", ((0,), (1,), (2,), (3,)))
    # source: the Coordinate contract (dihedrals alone are periodic; units nm or rad)
    assert phi.periodic and phi.unit == "rad"
    assert not Coordinate("a", "angle", ((0,), (1,), (2,))).periodic
    combo = Coordinate("s", "combination", terms=((1.0, phi), (-1.0, phi)))
    assert not combo.periodic and combo.unit == "rad"
    assert Coordinate("x", "position", ((0, 1),), axis=0).unit == "nm"


@pytest.mark.parametrize("arguments, message", [
    (dict(kind="distance", groups=((0,), (1,), (2,))), "needs 2 atom groups"),
    (dict(kind="bend", groups=((0,), (1,))), "kind must be one of"),
    (dict(kind="position", groups=((0,),)), "axis 0, 1 or 2"),
    (dict(kind="angle", groups=((0,), (), (2,))), "empty group"),
    (dict(kind="combination", terms=()), "at least one term"),
])
def test_bad_coordinates_are_protocol_errors(arguments, message):
    # source: the Coordinate contract (points per kind, axes, terms)
    with pytest.raises(ProtocolError, match=message):
        Coordinate("bad", **arguments)


def test_mixed_units_and_bad_indices_are_protocol_errors():
    distance = Coordinate("d", "distance", ((0,), (1,)))
    angle = Coordinate("a", "angle", ((0,), (1,), (2,)))
    # source: the Coordinate contract (one unit per combination, indices within the system)
    with pytest.raises(ProtocolError, match="share one unit"):
        Coordinate("s", "combination", terms=((1.0, distance), (1.0, angle)))
    with pytest.raises(ProtocolError, match="out of range"):
        build_coordinate_force(Coordinate("d", "distance", ((0,), (N_ATOMS,))), make_system(False))

