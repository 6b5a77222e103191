"""Tests of boost.builder: capped peptides from a sequence and backbone angles.

Geometry is measured with mdtraj (reference library), never with the builder's own code.
"""

import math

import mdtraj as md
import numpy as np
import openmm
import pytest
from openmm import app, unit

from boost.builder import build_peptide
from boost.exceptions import ProtocolError

STANDARD = ["ALA", "ARG", "ASN", "ASP", "CYS", "GLN", "GLU", "GLY", "HIS", "ILE",
            "LEU", "LYS", "MET", "PHE", "PRO", "SER", "THR", "TRP", "TYR", "VAL"]
KCAL = 4.184  # kJ per kcal (thermochemical calorie, exact by definition)


def _trajectory(topology, positions):
    return md.Trajectory(positions[None], md.Topology.from_openmm(topology))


def _atom(traj, resid, name):
    (index,) = traj.topology.select(f"resid {resid} and name {name}")
    return index


def _angle_difference(a, b):
    """Smallest signed difference of two angles in radians."""
    return np.angle(np.exp(1j * (np.asarray(a) - np.asarray(b))))


def _minimise(topology, positions, files, iterations=500):
    """Minimised potential energy (kJ/mol) and positions (nm) on the Reference platform."""
    system = app.ForceField(*files).createSystem(topology, nonbondedMethod=app.NoCutoff,
                                                 constraints=None)
    context = openmm.Context(system, openmm.VerletIntegrator(0.001),
                             openmm.Platform.getPlatformByName("Reference"))
    context.setPositions(positions)
    openmm.LocalEnergyMinimizer.minimize(context, 1.0, iterations)
    state = context.getState(getEnergy=True, getPositions=True)
    energy = state.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
    return system, energy, state.getPositions(asNumpy=True).value_in_unit(unit.nanometer)


# --- backbone geometry -------------------------------------------------------------

# source: Engh & Huber, Acta Cryst. A47, 392 (1991), table of protein bond lengths (Å)
# and angles (degrees), published; general, Gly and Pro rows (the Gly/Pro rows and the
# pre-Pro O=C-N 122.0 are values from memory, cross-checked against a copy of the table).
EH_N_CA = {"GLY": 1.451, "PRO": 1.466}
EH_CA_C = {"GLY": 1.516}
EH_C_N_CA = {"GLY": 120.6, "PRO": 122.6}
EH_N_CA_C = {"GLY": 112.5, "PRO": 111.8}
EH_CA_C_N = {"GLY": 116.4}


def _expected_backbone(sequence):
    """(atom pair or triple as (resid, name), E&H value) for every backbone term."""
    bonds, angles = [], []
    for i, name in enumerate(sequence[1:-1], start=1):
        nxt = sequence[i + 1]
        bonds += [(((i, "N"), (i, "CA")), EH_N_CA.get(name, 1.458)),
                  (((i, "CA"), (i, "C")), EH_CA_C.get(name, 1.525)),
                  (((i, "C"), (i, "O")), 1.231),
                  (((i, "C"), (i + 1, "N")), 1.341 if nxt == "PRO" else 1.329)]
        angles += [(((i - 1, "C"), (i, "N"), (i, "CA")), EH_C_N_CA.get(name, 121.7)),
                   (((i, "N"), (i, "CA"), (i, "C")), EH_N_CA_C.get(name, 111.2)),
                   (((i, "CA"), (i, "C"), (i + 1, "N")),
                    116.9 if nxt == "PRO" else EH_CA_C_N.get(name, 116.2)),
                   (((i, "CA"), (i, "C"), (i, "O")), 120.8),
                   (((i, "O"), (i, "C"), (i + 1, "N")), 122.0 if nxt == "PRO" else 123.0)]
    return bonds, angles


@pytest.mark.parametrize("sequence", [["ACE", "ALA", "NME"],
                                      ["ACE", "ALA", "GLY", "PRO", "SER", "VAL", "NME"]])
def test_backbone_bonds_and_angles_match_engh_huber(sequence):
    n = len(sequence) - 2
    topology, positions = build_peptide(sequence, phi=np.radians(np.linspace(-150, -60, n)),
                                        psi=np.radians(np.linspace(100, 160, n)))
    traj = _trajectory(topology, positions)
    bonds, angles = _expected_backbone(sequence)
    pairs = np.array([[_atom(traj, *a) for a in atoms] for atoms, _ in bonds])
    lengths = md.compute_distances(traj, pairs)[0] * 10.0  # nm -> Å
    np.testing.assert_allclose(lengths, [value for _, value in bonds], atol=0.005)
    triples = np.array([[_atom(traj, *a) for a in atoms] for atoms, _ in angles])
    measured = np.degrees(md.compute_angles(traj, triples)[0])
    np.testing.assert_allclose(measured, [value for _, value in angles], atol=1.0)


def test_peptide_bonds_are_trans():
    # source: omega = 180 deg is the ideal trans peptide (Engh & Huber 1991; common practice)
    topology, positions = build_peptide(["ACE", "ALA", "GLY", "LEU", "NME"],
                                        phi=-1.2, psi=2.2)
    _, omega = md.compute_omega(_trajectory(topology, positions))
    assert omega.shape[1] >= 2
    np.testing.assert_allclose(np.abs(omega[0]), math.pi, atol=np.radians(0.01))


# --- requested backbone angles ------------------------------------------------------

# C7eq and C7ax: basins of capped alanine in vacuum (Tobias & Brooks, J. Phys. Chem. 96,
# 3864 (1992), published); alpha-R, beta, PPII: common practice; the rest probe edges.
ANGLE_PAIRS = [(-80, 75), (70, -65), (-57, -47), (-120, 130), (-75, 145), (180, -180),
               (0, 0), (60, 179.9)]


@pytest.mark.parametrize("phi_deg, psi_deg", ANGLE_PAIRS)
def test_phi_psi_equal_the_requested_ones(phi_deg, psi_deg):
    topology, positions = build_peptide(["ACE", "ALA", "NME"], phi=math.radians(phi_deg),
                                        psi=math.radians(psi_deg))
    traj = _trajectory(topology, positions)
    _, phi = md.compute_phi(traj)  # source: mdtraj (reference library)
    _, psi = md.compute_psi(traj)
    assert phi.shape == psi.shape == (1, 1)
    assert abs(_angle_difference(phi[0, 0], math.radians(phi_deg))) < math.radians(0.01)
    assert abs(_angle_difference(psi[0, 0], math.radians(psi_deg))) < math.radians(0.01)


def test_per_residue_angle_lists_are_applied_in_order():
    sequence = ["ACE", "ALA", "GLY", "PRO", "TRP", "NME"]
    phi_deg, psi_deg = [-80.0, 70.0, -65.0, -140.0], [75.0, -65.0, 150.0, 135.0]
    topology, positions = build_peptide(sequence, phi=np.radians(phi_deg), psi=list(np.radians(psi_deg)))
    traj = _trajectory(topology, positions)
    _, phi = md.compute_phi(traj)  # source: mdtraj (reference library)
    _, psi = md.compute_psi(traj)
    assert np.all(np.abs(_angle_difference(phi[0], np.radians(phi_deg))) < np.radians(0.01))
    assert np.all(np.abs(_angle_difference(psi[0], np.radians(psi_deg))) < np.radians(0.01))


# --- force field and energies --------------------------------------------------------

@pytest.mark.parametrize("files", [("amber14-all.xml",), ("amber14-all.xml", "implicit/obc2.xml")])
def test_capped_alanine_builds_and_minimises(files):
    topology, positions = build_peptide(["ACE", "ALA", "NME"], phi=math.radians(-80),
                                        psi=math.radians(75), forcefield_files=files)
    # source: capped alanine is C6H12N2O2, 22 atoms (published formula of
    # N-acetyl-L-alanine N'-methylamide, value from memory; DESIGN notes agree)
    elements = [atom.element.symbol for atom in topology.atoms()]
    assert {s: elements.count(s) for s in set(elements)} == {"C": 6, "H": 12, "N": 2, "O": 2}
    system, energy, _ = _minimise(topology, positions, files)
    assert system.getNumParticles() == 22
    assert math.isfinite(energy)
    if len(files) > 1:  # the implicit-solvent file must add a Generalized Born force
        assert any("GB" in type(force).__name__ for force in system.getForces())


def test_c7eq_lies_below_c7ax_so_the_residue_is_l():
    # source: Tobias & Brooks, J. Phys. Chem. 96, 3864 (1992), published: C7ax minimum
    # 2.00 kcal/mol above C7eq (CHARMM); Amber families ~1.5-3.5 kcal/mol (from memory).
    # A D residue would swap the order, so this also checks chirality.
    energies = {}
    for basin, (phi_deg, psi_deg) in {"C7eq": (-80, 75), "C7ax": (70, -65)}.items():
        topology, positions = build_peptide(["ACE", "ALA", "NME"], phi=math.radians(phi_deg),
                                            psi=math.radians(psi_deg))
        _, energies[basin], minimised = _minimise(topology, positions, ("amber14-all.xml",))
        _, phi = md.compute_phi(_trajectory(topology, minimised))
        assert np.sign(phi[0, 0]) == np.sign(phi_deg)  # stayed in its basin
    gap = (energies["C7ax"] - energies["C7eq"]) / KCAL
    assert 0.5 < gap < 4.0


def test_alpha_carbons_have_l_chirality():
    # source: CORN rule for L amino acids (common practice); chiral volume
    # (N-CA).((C-CA)x(CB-CA)) of an L alpha carbon is about +2.5 Å^3 (Engh & Huber 1991,
    # value from memory)
    residues = [name for name in STANDARD if name != "GLY"]
    topology, positions = build_peptide(["ACE", *residues, "NME"], phi=-1.4, psi=2.4)
    traj = _trajectory(topology, positions)
    xyz = traj.xyz[0] * 10.0
    for resid in range(1, len(residues) + 1):
        n, ca, c, cb = (xyz[_atom(traj, resid, name)] for name in ("N", "CA", "C", "CB"))
        volume = np.dot(n - ca, np.cross(c - ca, cb - ca))
        assert 2.0 < volume < 3.0, (residues[resid - 1], volume)


def test_every_standard_residue_matches_amber14():
    sequence = ["ACE", *STANDARD, "NME"]
    phi = np.radians([-65.0 if name == "PRO" else -120.0 for name in STANDARD])
    topology, positions = build_peptide(sequence, phi=phi, psi=np.radians(130.0))
    files = ("amber14-all.xml", "implicit/obc2.xml")
    system, energy, _ = _minimise(topology, positions, files, iterations=20)  # templates match
    assert math.isfinite(energy)
    atoms = list(topology.atoms())
    heavy = {atom.index for atom in atoms if atom.element.symbol != "H"}
    # source: amber14 (ff14SB) equilibrium bond lengths and angles, reference library.
    # Angles get a loose bound: ff14SB puts generic 120 deg on five-membered rings.
    bonds = next(f for f in system.getForces() if isinstance(f, openmm.HarmonicBondForce))
    checked = 0
    for k in range(bonds.getNumBonds()):
        i, j, r0, _ = bonds.getBondParameters(k)
        if {i, j} <= heavy:
            length = np.linalg.norm(positions[i] - positions[j])
            assert abs(length - r0.value_in_unit(unit.nanometer)) < 0.004, (atoms[i], atoms[j])
            checked += 1
    assert checked == sum(1 for b in topology.bonds() if {b[0].index, b[1].index} <= heavy)
    angles = next(f for f in system.getForces() if isinstance(f, openmm.HarmonicAngleForce))
    for k in range(angles.getNumAngles()):
        i, j, m, theta0, _ = angles.getAngleParameters(k)
        if {i, j, m} <= heavy:
            u, v = positions[i] - positions[j], positions[m] - positions[j]
            theta = math.acos(np.dot(u, v) / np.linalg.norm(u) / np.linalg.norm(v))
            assert abs(theta - theta0.value_in_unit(unit.radian)) < math.radians(15.0), atoms[j]


# --- bad input -----------------------------------------------------------------------

@pytest.mark.parametrize("sequence, pattern", [
    (["ACE", "XYZ", "NME"], r"sequence\[1\].*'XYZ'"),
    (["ACE", "ALA", "HOH", "NME"], r"sequence\[2\].*'HOH'"),
    (["ALA", "NME"], r"start with 'ACE'"),
    (["ACE", "ALA"], r"end with 'NME'"),
    (["ACE", "NME"], r"at least one amino acid"),
    ("ACE ALA NME", r"list of residue names"),
])
def test_bad_sequences_raise_protocol_error(sequence, pattern):
    with pytest.raises(ProtocolError, match=pattern):
        build_peptide(sequence, phi=-1.4, psi=1.3)


@pytest.mark.parametrize("phi, psi, pattern", [
    ([-1.4, -1.2], 1.3, r"phi must be one angle or a list of 1 angles.*got 2"),
    (-1.4, [1.3, 1.2, 1.1], r"psi must be one angle or a list of 1 angles.*got 3"),
    ([-1.4], [], r"psi .*got 0"),
    (float("nan"), 1.3, r"phi .*non-finite"),
    ("minus eighty", 1.3, r"phi .*'minus eighty'"),
])
def test_bad_angles_raise_protocol_error(phi, psi, pattern):
    with pytest.raises(ProtocolError, match=pattern):
        build_peptide(["ACE", "ALA", "NME"], phi=phi, psi=psi)


def test_angle_list_length_follows_the_sequence():
    with pytest.raises(ProtocolError, match=r"list of 2 angles.*got 3"):
        build_peptide(["ACE", "ALA", "GLY", "NME"], phi=[-1.4, -1.2, -1.0], psi=1.3)
