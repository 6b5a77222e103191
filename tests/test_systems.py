"""Tests for boost.systems: every source, the physics options, bundled systems, errors.

The file-format loaders are checked on tiny molecules whose files are written here by
hand with invented parameters (test inputs only, never check values): three carbon-like
atoms C1-C2-C3 with two harmonic bonds and one harmonic angle, all other terms zero or
excluded. The loaded system's energy must equal the same parameters evaluated with
numpy in the format's own documented functional form.
"""

import hashlib
import itertools
import math
import os
import random
import subprocess
import sys
import textwrap

import mdtraj
import numpy as np
import openmm
import pytest
from openmm import app, unit

from boost import system_spec, systems
from boost.exceptions import InputError, ProtocolError
from boost.spec import Node
from boost.system_spec import read_system_spec

KCAL = 4.184  # kJ per thermochemical kcal (exact by definition; common practice)

# Three-atom test molecule, positions in nm with at most 3 decimals so that every format
# (gro: 3 decimals in nm; pdb, crd, inpcrd: at least 3 decimals in Å) stores them exactly.
TRI_XYZ = np.array([[0.0, 0.0, 0.0], [0.152, 0.0, 0.0], [0.213, 0.141, 0.012]])


def _bond_lengths(xyz):
    return np.linalg.norm(xyz[1] - xyz[0]), np.linalg.norm(xyz[2] - xyz[1])


def _angle(xyz):
    u, v = xyz[0] - xyz[1], xyz[2] - xyz[1]
    return math.acos(np.dot(u, v) / (np.linalg.norm(u) * np.linalg.norm(v)))


def _energy(system, positions):
    """Potential energy in kJ/mol on the Reference platform."""
    context = openmm.Context(system, openmm.VerletIntegrator(0.001),
                             openmm.Platform.getPlatformByName("Reference"))
    context.setPositions(np.asarray(positions) * unit.nanometer)
    energy = context.getState(getEnergy=True).getPotentialEnergy()
    return energy.value_in_unit(unit.kilojoule_per_mole)


def _spec(value, file="protocol.yaml", path="system"):
    return Node(value, file, path)


def _build(value, base_dir):
    """Read a protocol's ``system`` value (every check of the spec), then build it."""
    return systems.build_system(read_system_spec(_spec(value), base_dir))


def _write(path, text):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(textwrap.dedent(text))
    return path


@pytest.fixture(scope="module")
def alanine():
    return _build("alanine-vacuum", ".")


PEPTIDE = {"sequence": ["ACE", "ALA", "NME"]}


def _write_alanine_pdb(built, path):
    with open(path, "w") as handle:
        app.PDBFile.writeFile(built.topology, built.positions * unit.nanometer, handle)
    return path


# -- bundled systems ------------------------------------------------------------------
BUNDLED = system_spec.list_bundled_systems()


def test_the_bundled_systems_are_the_expected_ones():
    names = {name for name, _, _ in BUNDLED}
    assert {"double-well", "double-well-low", "muller-brown", "alanine-vacuum",
            "alanine-obc2", "alanine-tip3p", "agaa-tip3p"} <= names
    assert all(title for _, title, _ in BUNDLED)


@pytest.mark.parametrize("name", [name for name, _, _ in BUNDLED])
def test_every_bundled_system_builds(name):
    built = _build(name, ".")
    n = built.system.getNumParticles()
    assert built.positions.shape == (n, 3)
    assert built.topology.getNumAtoms() == n
    assert math.isfinite(_energy(built.system, built.positions))


def test_alanine_vacuum_is_capped_alanine_without_box(alanine):
    # source: ACE-ALA-NME is C6H12N2O2, 22 atoms (common practice, formula from memory)
    elements = [atom.element.symbol for atom in alanine.topology.atoms()]
    assert len(elements) == 22
    assert {s: elements.count(s) for s in set(elements)} == {"C": 6, "H": 12, "N": 2, "O": 2}
    assert alanine.box_vectors is None
    assert not alanine.system.usesPeriodicBoundaryConditions()
    nonbonded = next(f for f in alanine.system.getForces() if isinstance(f, openmm.NonbondedForce))
    assert nonbonded.getNonbondedMethod() == openmm.NonbondedForce.NoCutoff
    # h_bonds: one constraint per hydrogen, each bound to one heavy atom (common practice)
    assert alanine.system.getNumConstraints() == 12


def test_alanine_is_built_at_the_requested_angles(alanine):
    # source: mdtraj's dihedral geometry (library), against the spec's -80 deg / 75 deg
    traj = mdtraj.Trajectory(alanine.positions[None], mdtraj.Topology.from_openmm(alanine.topology))
    phi = np.degrees(mdtraj.compute_phi(traj)[1][0, 0])
    psi = np.degrees(mdtraj.compute_psi(traj)[1][0, 0])
    assert phi == pytest.approx(-80.0, abs=1e-4)
    assert psi == pytest.approx(75.0, abs=1e-4)


def test_peptide_sequence_as_text_and_angles_as_lists(alanine):
    spec = {"peptide": {"sequence": "ACE ALA NME", "phi": ["-80 deg"], "psi": ["75 deg"]},
            "title": "same alanine"}
    built = _build(spec, ".")
    assert built.title == "same alanine"
    np.testing.assert_array_equal(built.positions, alanine.positions)


def test_solvated_system_with_ions_is_reproducible():
    # Modeller places hydrogens and ions at random; a spec must still build one system
    spec = {"peptide": PEPTIDE, "water_box": {"padding": "0.6 nm", "ionic_strength": "1 molar"},
            "nonbonded": {"cutoff": "0.6 nm"}}
    random.seed(1)
    first = _build(spec, ".")
    random.seed(2)  # the caller's random state must not matter
    second = _build(spec, ".")
    assert {"NA", "CL"} <= {residue.name for residue in first.topology.residues()}
    np.testing.assert_array_equal(first.positions, second.positions)


def test_obc2_has_a_generalized_born_force():
    built = _build("alanine-obc2", ".")
    gb = [f for f in built.system.getForces()
          if isinstance(f, (openmm.GBSAOBCForce, openmm.CustomGBForce))]
    assert len(gb) == 1
    assert built.box_vectors is None


# -- bundled peptides in water ----------------------------------------------------------
# name: (sequence, phi and psi in degrees as the spec writes them, atoms of the peptide)
# Atom counts from the residue formulas (common practice): ACE C2H3O 6 atoms, ALA (in a
# chain) C3H5NO 10, GLY C2H3NO 7, NME CH4N 6; 6 + 10 + 6 = 22, 6 + 3 x 10 + 7 + 6 = 49.
SOLVATED = {"alanine-tip3p": (["ACE", "ALA", "NME"], -80.0, 75.0, 22),
            "agaa-tip3p": (["ACE", "ALA", "GLY", "ALA", "ALA", "NME"], -75.0, 145.0, 49)}
WATER_PADDING, WATER_CUTOFF = 1.0, 0.9  # nm, as the two spec files write them


@pytest.fixture(scope="module", params=sorted(SOLVATED))
def solvated(request):
    return request.param, _build(request.param, ".")


def _peptide_and_water(built):
    peptide = [atom.index for atom in built.topology.atoms() if atom.residue.name != "HOH"]
    waters = [residue for residue in built.topology.residues() if residue.name == "HOH"]
    return peptide, waters


def test_solvated_peptides_are_the_peptide_at_its_angles_in_a_cube_of_water(solvated):
    name, built = solvated
    sequence, phi, psi, n_peptide = SOLVATED[name]
    peptide, waters = _peptide_and_water(built)
    assert peptide == list(range(n_peptide))  # the peptide first, then the water
    assert [r.name for r in built.topology.residues()][:len(sequence)] == sequence
    assert built.system.getNumParticles() == n_peptide + 3 * len(waters)
    box = built.box_vectors
    assert np.array_equal(box, box[0, 0] * np.eye(3))
    # source: mdtraj's dihedral geometry (library): solvating moved no peptide atom
    traj = mdtraj.Trajectory(built.positions[None], mdtraj.Topology.from_openmm(built.topology))
    np.testing.assert_allclose(np.degrees(mdtraj.compute_phi(traj)[1][0]), phi, atol=1e-4)
    np.testing.assert_allclose(np.degrees(mdtraj.compute_psi(traj)[1][0]), psi, atol=1e-4)
    # the solute selection a solute-tempering protocol uses picks the peptide and nothing else
    assert traj.topology.select("protein").tolist() == peptide


def test_solvated_peptides_hold_water_at_the_density_of_liquid_water(solvated):
    name, built = solvated
    _, waters = _peptide_and_water(built)
    # source: liquid water holds about 33.3 molecules per nm^3 near 300 K (0.997 g/cm^3,
    # 18.015 g/mol; common practice, tests/REFERENCES.md, Liquid water). The peptide and the
    # shell Modeller keeps free around it take some of the box, so the count lies below a
    # full box, and never above it.
    full_box = 33.3 * abs(np.linalg.det(built.box_vectors))
    assert 0.8 * full_box < len(waters) <= full_box


def test_solvated_peptides_stay_out_of_reach_of_their_periodic_copies(solvated):
    # source: OpenMM's Modeller.addSolvent documentation (8.6): with a padding, no solute
    # atom comes closer than the padding to any atom of a periodic copy of the solute.
    # A padding longer than the cutoff keeps the peptide from feeling its own copies.
    name, built = solvated
    peptide, _ = _peptide_and_water(built)
    xyz, box = built.positions[peptide], built.box_vectors
    closest = min(np.linalg.norm(xyz[:, None] - xyz[None] - np.array(shift) @ box, axis=-1).min()
                  for shift in itertools.product((-1, 0, 1), repeat=3) if any(shift))
    assert closest >= WATER_PADDING > WATER_CUTOFF


def test_solvated_peptides_match_the_direct_openmm_route(solvated):
    # source: OpenMM's own app layer (library): the same peptide solvated by Modeller and
    # parametrized by ForceField directly, with the settings the spec files write
    name, built = solvated
    peptide, waters = _peptide_and_water(built)
    forcefield = app.ForceField("amber14-all.xml", "amber14/tip3p.xml")
    modeller = app.Modeller(built.topology, built.positions * unit.nanometer)
    modeller.delete([r for r in modeller.topology.residues() if r.name == "HOH"])
    modeller.topology.setPeriodicBoxVectors(None)
    modeller.addSolvent(forcefield, model="tip3p", padding=WATER_PADDING * unit.nanometer)
    positions = np.array(modeller.getPositions().value_in_unit(unit.nanometer))
    assert np.array_equal(built.positions, positions)
    box = modeller.topology.getPeriodicBoxVectors().value_in_unit(unit.nanometer)
    np.testing.assert_array_equal(built.box_vectors, np.array([list(v) for v in box]))
    direct = forcefield.createSystem(modeller.topology, nonbondedMethod=app.PME,
                                     nonbondedCutoff=WATER_CUTOFF * unit.nanometer, constraints=app.HBonds)
    assert _energy(built.system, built.positions) == pytest.approx(_energy(direct, positions), rel=1e-12)
    # bonds to hydrogen in the peptide, and three per rigid water (common practice)
    atoms = list(built.topology.atoms())
    n_hydrogens = sum(atoms[i].element.symbol == "H" for i in peptide)
    assert built.system.getNumConstraints() == direct.getNumConstraints() == n_hydrogens + 3 * len(waters)
    nonbonded = next(f for f in built.system.getForces() if isinstance(f, openmm.NonbondedForce))
    assert nonbonded.getNonbondedMethod() == openmm.NonbondedForce.PME
    assert nonbonded.getCutoffDistance().value_in_unit(unit.nanometer) == pytest.approx(WATER_CUTOFF)


_DIGEST = """\
import hashlib, sys
from boost import systems
from boost.spec import Node
from boost.system_spec import read_system_spec
built = systems.build_system(read_system_spec(Node(sys.argv[1], "protocol.yaml", "system"), "."))
print(hashlib.sha256(built.positions.tobytes() + built.box_vectors.tobytes()).hexdigest())
"""


def test_solvated_peptides_build_the_same_atoms_every_time(solvated):
    # in this process with another random state, and in a fresh one with another hash seed
    name, built = solvated
    random.seed(99)
    again = _build(name, ".")
    np.testing.assert_array_equal(again.positions, built.positions)
    np.testing.assert_array_equal(again.box_vectors, built.box_vectors)
    assert [a.name for a in again.topology.atoms()] == [a.name for a in built.topology.atoms()]
    environment = {**os.environ, "PYTHONHASHSEED": "12345",
                   "PYTHONPATH": os.pathsep.join(filter(None, [os.path.dirname(os.path.dirname(systems.__file__)),
                                                               os.environ.get("PYTHONPATH")]))}
    fresh = subprocess.run([sys.executable, "-c", _DIGEST, name], capture_output=True, text=True,
                           env=environment, timeout=300, check=True).stdout.split()[-1]
    assert fresh == hashlib.sha256(built.positions.tobytes() + built.box_vectors.tobytes()).hexdigest()


def test_double_well_energy_at_the_barrier_top():
    # source: exact; U = barrier ((x/minimum)^2 - 1)^2 + tilt x/minimum + k(y^2+z^2)/2
    # (boost.models docstring) gives U(0, 0, 0) = barrier = 10 kJ/mol in double-well.yaml
    built = _build("double-well", ".")
    assert built.system.getNumConstraints() == 0
    assert built.box_vectors is None
    assert _energy(built.system, [[0.0, 0.0, 0.0]]) == pytest.approx(10.0, abs=1e-9)


def test_a_file_beside_the_protocol_wins_over_a_bundled_name(tmp_path):
    _write(tmp_path / "double-well.yaml", "model: {name: muller_brown}\n")
    local = _build("double-well.yaml", tmp_path)
    bundled = _build("double-well", tmp_path)
    assert local.system.getForce(0).getEnergyFunction() != bundled.system.getForce(0).getEnergyFunction()


def test_environment_variable_overrides_the_bundled_folder(tmp_path, monkeypatch):
    _write(tmp_path / "mine.yaml", "title: my well\nmodel: {name: double_well}\n")
    monkeypatch.setenv("BOOST_SYSTEMS", str(tmp_path))
    assert system_spec.bundled_systems_folder() == tmp_path
    assert system_spec.list_bundled_systems() == [("mine", "my well", tmp_path / "mine.yaml")]
    assert _build("mine", tmp_path / "elsewhere").title == "my well"


# -- PDB / PDBx + force field ---------------------------------------------------------
@pytest.mark.parametrize("suffix", [".pdb", ".cif"])
def test_structure_file_matches_the_direct_openmm_route(alanine, tmp_path, suffix):
    path = tmp_path / f"ala{suffix}"
    writer = app.PDBFile if suffix == ".pdb" else app.PDBxFile
    with open(path, "w") as handle:
        writer.writeFile(alanine.topology, alanine.positions * unit.nanometer, handle)
    _write(tmp_path / "sys.yaml", f"pdb: ala{suffix}\nforcefield: [amber14-all.xml]\n")
    built = _build("sys.yaml", tmp_path)
    # source: OpenMM's own app layer (library), called directly on the same file
    structure = (app.PDBFile if suffix == ".pdb" else app.PDBxFile)(str(path))
    direct = app.ForceField("amber14-all.xml").createSystem(
        structure.topology, nonbondedMethod=app.NoCutoff, constraints=app.HBonds)
    positions = structure.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    assert np.array_equal(built.positions, positions)
    assert _energy(built.system, built.positions) == pytest.approx(
        _energy(direct, positions), rel=1e-12, abs=1e-9)
    assert built.system.getNumConstraints() == direct.getNumConstraints()


TRI_FORCEFIELD = """\
<ForceField>
 <AtomTypes>
  <Type name="tri-c" class="CX" element="C" mass="12.011"/>
 </AtomTypes>
 <Residues>
  <Residue name="TRI">
   <Atom name="C1" type="tri-c"/>
   <Atom name="C2" type="tri-c"/>
   <Atom name="C3" type="tri-c"/>
   <Bond atomName1="C1" atomName2="C2"/>
   <Bond atomName1="C2" atomName2="C3"/>
  </Residue>
 </Residues>
 <HarmonicBondForce>
  <Bond class1="CX" class2="CX" length="0.1526" k="259408.0"/>
 </HarmonicBondForce>
 <HarmonicAngleForce>
  <Angle class1="CX" class2="CX" class3="CX" angle="1.9111" k="527.184"/>
 </HarmonicAngleForce>
 <NonbondedForce coulomb14scale="0.8333" lj14scale="0.5">
  <Atom type="tri-c" charge="0" sigma="0.3" epsilon="0"/>
 </NonbondedForce>
</ForceField>
"""


def _write_tri_pdb(path):
    topology = app.Topology()
    residue = topology.addResidue("TRI", topology.addChain())
    atoms = [topology.addAtom(f"C{i + 1}", app.element.carbon, residue) for i in range(3)]
    topology.addBond(atoms[0], atoms[1])
    topology.addBond(atoms[1], atoms[2])
    with open(path, "w") as handle:
        app.PDBFile.writeFile(topology, TRI_XYZ * unit.nanometer, handle)
    return path


def test_local_forcefield_file_relative_to_the_spec(tmp_path):
    # the spec file sits in sub/, so its paths start there, not beside the protocol
    _write(tmp_path / "sub" / "ff" / "tri.xml", TRI_FORCEFIELD)
    _write_tri_pdb(tmp_path / "sub" / "tri.pdb")
    _write(tmp_path / "sub" / "sys.yaml", "pdb: tri.pdb\nforcefield: [ff/tri.xml]\nconstraints: none\n")
    built = _build("sub/sys.yaml", tmp_path)
    # source: exact; OpenMM's XML force fields use E = k/2 (r - r0)^2 and k/2 (θ - θ0)^2
    # (OpenMM user guide, HarmonicBondForce / HarmonicAngleForce)
    expected = sum(0.5 * 259408.0 * (r - 0.1526) ** 2 for r in _bond_lengths(TRI_XYZ))
    expected += 0.5 * 527.184 * (_angle(TRI_XYZ) - 1.9111) ** 2
    assert _energy(built.system, built.positions) == pytest.approx(expected, rel=1e-9)
    assert built.system.getNumConstraints() == 0


def test_water_box_adds_water_a_box_and_pme(alanine, tmp_path):
    _write_alanine_pdb(alanine, tmp_path / "ala.pdb")
    spec = {"pdb": "ala.pdb", "water_box": {"padding": "0.6 nm"}, "nonbonded": {"cutoff": "0.6 nm"}}
    built = _build(spec, tmp_path)
    waters = [r for r in built.topology.residues() if r.name == "HOH"]
    assert len(waters) > 10
    assert built.system.getNumParticles() == 22 + 3 * len(waters)
    assert built.system.usesPeriodicBoundaryConditions()
    assert built.box_vectors.shape == (3, 3)
    nonbonded = next(f for f in built.system.getForces() if isinstance(f, openmm.NonbondedForce))
    assert nonbonded.getNonbondedMethod() == openmm.NonbondedForce.PME
    assert math.isfinite(_energy(built.system, built.positions))
    # source: liquid water is about 1.0 g/cm^3 at room temperature (common practice); a
    # small box packed around a solute lands somewhat below that
    volume_cm3 = abs(np.linalg.det(built.box_vectors)) * 1e-21
    density = built.masses.sum() / 6.02214076e23 / volume_cm3
    assert 0.6 < density < 1.1


# -- serialized -----------------------------------------------------------------------
def test_serialized_round_trip_gives_the_same_energy(alanine, tmp_path):
    (tmp_path / "system.xml").write_text(openmm.XmlSerializer.serialize(alanine.system))
    _write_alanine_pdb(alanine, tmp_path / "ala.pdb")
    spec = {"serialized": {"system": "system.xml", "pdb": "ala.pdb"}, "title": "round trip"}
    built = _build(spec, tmp_path)
    assert built.title == "round trip"
    # source: OpenMM's XmlSerializer (library) evaluated on the original System
    positions = app.PDBFile(str(tmp_path / "ala.pdb")).getPositions(asNumpy=True)
    assert _energy(built.system, built.positions) == pytest.approx(
        _energy(alanine.system, positions.value_in_unit(unit.nanometer)), rel=1e-12)


# -- Amber ----------------------------------------------------------------------------
AMBER_BOND = (310.0, 1.526)   # kcal/mol/Å^2, Å (invented test input)
AMBER_ANGLE = (63.0, 1.9111)  # kcal/mol/rad^2, rad (invented test input)


def _prmtop_section(flag, fmt, values):
    count, kind, width = fmt
    lines = [f"%FLAG {flag}", f"%FORMAT({count}{kind}{width}{'.8' if kind == 'E' else ''})"]
    cells = [f"{v:{width}d}" if kind == "I" else f"{v:{width}.8E}" if kind == "E" else f"{v:<{width}s}"
             for v in values]
    lines += ["".join(cells[i:i + count]) for i in range(0, len(cells), count)] or [""]
    return lines


def _write_prmtop(path):
    i8, e16, a4 = (10, "I", 8), (5, "E", 16), (20, "a", 4)
    pointers = [3, 1, 0, 2, 0, 1, 0, 0, 0, 0, 4, 1, 2, 1, 0, 1, 1, 0, 1, 0,
                0, 0, 0, 0, 0, 0, 0, 0, 3, 0, 0]
    sections = [
        ("TITLE", a4, ["TRI"]), ("POINTERS", i8, pointers), ("ATOM_NAME", a4, ["C1", "C2", "C3"]),
        ("CHARGE", e16, [0.2 * 18.2223, -0.4 * 18.2223, 0.2 * 18.2223]),
        ("ATOMIC_NUMBER", i8, [6, 6, 6]), ("MASS", e16, [12.011] * 3),
        ("ATOM_TYPE_INDEX", i8, [1, 1, 1]), ("NUMBER_EXCLUDED_ATOMS", i8, [2, 1, 1]),
        ("NONBONDED_PARM_INDEX", i8, [1]), ("RESIDUE_LABEL", a4, ["TRI"]),
        ("RESIDUE_POINTER", i8, [1]), ("BOND_FORCE_CONSTANT", e16, [AMBER_BOND[0]]),
        ("BOND_EQUIL_VALUE", e16, [AMBER_BOND[1]]), ("ANGLE_FORCE_CONSTANT", e16, [AMBER_ANGLE[0]]),
        ("ANGLE_EQUIL_VALUE", e16, [AMBER_ANGLE[1]]), ("DIHEDRAL_FORCE_CONSTANT", e16, []),
        ("DIHEDRAL_PERIODICITY", e16, []), ("DIHEDRAL_PHASE", e16, []),
        ("SCEE_SCALE_FACTOR", e16, []), ("SCNB_SCALE_FACTOR", e16, []), ("SOLTY", e16, [0.0]),
        ("LENNARD_JONES_ACOEF", e16, [0.0]), ("LENNARD_JONES_BCOEF", e16, [0.0]),
        ("BONDS_INC_HYDROGEN", i8, []), ("BONDS_WITHOUT_HYDROGEN", i8, [0, 3, 1, 3, 6, 1]),
        ("ANGLES_INC_HYDROGEN", i8, []), ("ANGLES_WITHOUT_HYDROGEN", i8, [0, 3, 6, 1]),
        ("DIHEDRALS_INC_HYDROGEN", i8, []), ("DIHEDRALS_WITHOUT_HYDROGEN", i8, []),
        ("EXCLUDED_ATOMS_LIST", i8, [2, 3, 3, 0]), ("HBOND_ACOEF", e16, []),
        ("HBOND_BCOEF", e16, []), ("HBFCUT", e16, []), ("AMBER_ATOM_TYPE", a4, ["CT"] * 3),
        ("TREE_CHAIN_CLASSIFICATION", a4, ["M"] * 3), ("JOIN_ARRAY", i8, [0] * 3),
        ("IROTAT", i8, [0] * 3), ("RADIUS_SET", (1, "a", 80), ["modified Bondi radii"]),
        ("RADII", e16, [1.7] * 3), ("SCREEN", e16, [0.72] * 3),
    ]
    lines = ["%VERSION  VERSION_STAMP = V0001.000  DATE = 01/01/26  00:00:00"]
    for flag, fmt, values in sections:
        lines += _prmtop_section(flag, fmt, values)
    path.write_text("\n".join(lines) + "\n")
    return path


def _write_inpcrd(path, xyz_nm, box_nm=None):
    values = list((np.asarray(xyz_nm) * 10).ravel())
    rows = ["".join(f"{v:12.7f}" for v in values[i:i + 6]) for i in range(0, len(values), 6)]
    if box_nm is not None:
        rows.append("".join(f"{v:12.7f}" for v in [10 * box_nm] * 3 + [90.0] * 3))
    path.write_text("TRI\n" + f"{len(xyz_nm):6d}\n" + "\n".join(rows) + "\n")
    return path


def _amber_expected(xyz):
    # source: exact; Amber's file convention E = K (r - r0)^2, E = K (θ - θ0)^2 with K in
    # kcal/mol/Å^2 and kcal/mol/rad^2, the 1/2 absorbed into K (common practice)
    k_b, r0 = AMBER_BOND
    k_a, t0 = AMBER_ANGLE
    bonds = sum(k_b * (10 * r - r0) ** 2 for r in _bond_lengths(xyz))
    return KCAL * (bonds + k_a * (_angle(xyz) - t0) ** 2)


def test_amber_files_give_the_hand_computed_energy(tmp_path):
    _write_prmtop(tmp_path / "tri.prmtop")
    _write_inpcrd(tmp_path / "tri.inpcrd", TRI_XYZ)
    spec = {"amber": {"prmtop": "tri.prmtop", "inpcrd": "tri.inpcrd"}, "constraints": "none"}
    built = _build(spec, tmp_path)
    assert built.box_vectors is None
    np.testing.assert_allclose(built.positions, TRI_XYZ, rtol=0, atol=1e-12)
    assert _energy(built.system, built.positions) == pytest.approx(_amber_expected(TRI_XYZ), rel=1e-9)


def test_amber_implicit_solvent_and_box(tmp_path):
    _write_prmtop(tmp_path / "tri.prmtop")
    _write_inpcrd(tmp_path / "tri.inpcrd", TRI_XYZ)
    _write_inpcrd(tmp_path / "box.inpcrd", TRI_XYZ, box_nm=2.5)
    spec = {"amber": {"prmtop": "tri.prmtop", "inpcrd": "tri.inpcrd"}, "implicit_solvent": "obc2"}
    gb = _build(spec, tmp_path)
    assert any(isinstance(f, (openmm.GBSAOBCForce, openmm.CustomGBForce)) for f in gb.system.getForces())
    spec = {"amber": {"prmtop": "tri.prmtop", "inpcrd": "box.inpcrd"}}
    boxed = _build(spec, tmp_path)
    np.testing.assert_allclose(boxed.box_vectors, 2.5 * np.eye(3), atol=1e-12)
    nonbonded = next(f for f in boxed.system.getForces() if isinstance(f, openmm.NonbondedForce))
    assert nonbonded.getNonbondedMethod() == openmm.NonbondedForce.PME


# -- GROMACS --------------------------------------------------------------------------
GMX_BOND = (0.1526, 259408.0)  # nm, kJ/mol/nm^2 (invented test input)
GMX_ANGLE = (109.5, 527.184)   # deg, kJ/mol/rad^2 (invented test input)


def _write_gromacs(folder):
    _write(folder / "ff" / "types.itp", """\
        [ atomtypes ]
        ; name  at.num  mass  charge  ptype  sigma  epsilon
        CX      6   12.011  0.0  A  0.3  0.0
        """)
    _write(folder / "tri.top", f"""\
        [ defaults ]
        ; nbfunc  comb-rule  gen-pairs  fudgeLJ  fudgeQQ
        1  2  yes  0.5  0.8333
        #include "types.itp"
        [ moleculetype ]
        TRI  3
        [ atoms ]
        1  CX  1  TRI  C1  1  0.0  12.011
        2  CX  1  TRI  C2  2  0.0  12.011
        3  CX  1  TRI  C3  3  0.0  12.011
        [ bonds ]
        1  2  1  {GMX_BOND[0]}  {GMX_BOND[1]}
        2  3  1  {GMX_BOND[0]}  {GMX_BOND[1]}
        [ angles ]
        1  2  3  1  {GMX_ANGLE[0]}  {GMX_ANGLE[1]}
        [ system ]
        TRI
        [ molecules ]
        TRI  1
        """)
    atoms = "".join(f"{1:5d}{'TRI':<5s}{f'C{i + 1}':>5s}{i + 1:5d}{x:8.3f}{y:8.3f}{z:8.3f}\n"
                    for i, (x, y, z) in enumerate(TRI_XYZ))
    (folder / "tri.gro").write_text(f"TRI\n{3:5d}\n{atoms}   3.00000   3.00000   3.00000\n")


def test_gromacs_files_give_the_hand_computed_energy(tmp_path):
    _write_gromacs(tmp_path)
    spec = {"gromacs": {"top": "tri.top", "gro": "tri.gro", "include_dir": "ff"},
            "constraints": "none"}
    built = _build(spec, tmp_path)
    np.testing.assert_allclose(built.box_vectors, 3.0 * np.eye(3), atol=1e-12)
    nonbonded = next(f for f in built.system.getForces() if isinstance(f, openmm.NonbondedForce))
    assert nonbonded.getNonbondedMethod() == openmm.NonbondedForce.PME
    # source: exact; GROMACS bond and angle type 1: E = kb/2 (r - b0)^2, kθ/2 (θ - θ0)^2,
    # θ0 in degrees (GROMACS reference manual, common practice); all charges and LJ zero
    b0, kb = GMX_BOND
    t0, kt = GMX_ANGLE
    expected = sum(0.5 * kb * (r - b0) ** 2 for r in _bond_lengths(TRI_XYZ))
    expected += 0.5 * kt * (_angle(TRI_XYZ) - math.radians(t0)) ** 2
    assert _energy(built.system, built.positions) == pytest.approx(expected, rel=1e-9, abs=1e-9)


# -- CHARMM ---------------------------------------------------------------------------
CHARMM_BOND = (310.0, 1.526)  # kcal/mol/Å^2, Å (invented test input)
CHARMM_ANGLE = (63.0, 109.5)  # kcal/mol/rad^2, deg (invented test input)


def _write_charmm(folder):
    atoms = "".join(f"{i + 1:8d} TRI  1    TRI  C{i + 1}   CX     0.000000       12.0110           0\n"
                    for i in range(3))
    (folder / "tri.psf").write_text(
        "PSF\n\n       1 !NTITLE\n REMARKS test molecule\n\n"
        f"       3 !NATOM\n{atoms}\n"
        "       2 !NBOND: bonds\n       1       2       2       3\n\n"
        "       1 !NTHETA: angles\n       1       2       3\n\n"
        "       0 !NPHI: dihedrals\n\n\n       0 !NIMPHI: impropers\n\n\n")
    _write(folder / "tri.prm", f"""\
        * test parameters
        *
        ATOMS
        MASS    1 CX    12.01100 C

        BONDS
        CX   CX   {CHARMM_BOND[0]}   {CHARMM_BOND[1]}

        ANGLES
        CX   CX   CX   {CHARMM_ANGLE[0]}   {CHARMM_ANGLE[1]}

        NONBONDED nbxmod  5 atom cdiel shift vatom vdistance vswitch -
        cutnb 14.0 ctofnb 12.0 ctonnb 10.0 eps 1.0 e14fac 1.0 wmin 1.5
        CX     0.0   -0.0   2.0

        END
        """)
    rows = "".join(f"{i + 1:5d}{1:5d} TRI  C{i + 1}  {10 * x:10.5f}{10 * y:10.5f}{10 * z:10.5f} TRI  1      0.00000\n"
                   for i, (x, y, z) in enumerate(TRI_XYZ))
    (folder / "tri.crd").write_text(f"* test coordinates\n*\n{3:5d}\n{rows}")


def test_charmm_files_give_the_hand_computed_energy(tmp_path):
    _write_charmm(tmp_path)
    spec = {"charmm": {"psf": "tri.psf", "coordinates": "tri.crd", "parameters": ["tri.prm"],
                       "box": "3 nm"}, "constraints": "none"}
    built = _build(spec, tmp_path)
    np.testing.assert_allclose(built.box_vectors, 3.0 * np.eye(3), atol=1e-12)
    # source: exact; CHARMM's E = Kb (b - b0)^2, Kθ (θ - θ0)^2 in kcal/mol/Å^2 and
    # kcal/mol/rad^2, θ0 in degrees (CHARMM parameter-file convention, common practice)
    k_b, b0 = CHARMM_BOND
    k_a, t0 = CHARMM_ANGLE
    expected = sum(k_b * (10 * r - b0) ** 2 for r in _bond_lengths(TRI_XYZ))
    expected = KCAL * (expected + k_a * (_angle(TRI_XYZ) - math.radians(t0)) ** 2)
    assert _energy(built.system, built.positions) == pytest.approx(expected, rel=1e-9, abs=1e-9)


def test_charmm_without_box_has_no_cutoff(tmp_path):
    _write_charmm(tmp_path)
    _write_tri_pdb(tmp_path / "tri.pdb")
    spec = {"charmm": {"psf": "tri.psf", "coordinates": "tri.pdb", "parameters": "tri.prm"}}
    built = _build(spec, tmp_path)
    assert built.box_vectors is None
    np.testing.assert_allclose(built.positions, TRI_XYZ, rtol=0, atol=1e-12)


# -- errors ---------------------------------------------------------------------------
def test_missing_system_file_names_the_key_and_path(tmp_path):
    with pytest.raises(InputError, match=r"protocol\.yaml: system names .*sub.nothere\.yaml"):
        _build("sub/nothere.yaml", tmp_path)
    with pytest.raises(InputError, match=r"system names .* no bundled system is called 'no-such'"):
        _build("no-such", tmp_path)
    (tmp_path / "folder.yaml").mkdir()
    with pytest.raises(InputError, match=r"system names .*folder\.yaml, which is a folder"):
        _build("folder.yaml", tmp_path)


def test_missing_structure_file_names_the_key_and_path(tmp_path):
    with pytest.raises(InputError, match=r"protocol\.yaml: system\.pdb names .*nothere\.pdb"):
        _build({"pdb": "nothere.pdb"}, tmp_path)
    _write(tmp_path / "sys.yaml", "amber: {prmtop: x.prmtop, inpcrd: x.inpcrd}\n")
    with pytest.raises(InputError, match=r"sys\.yaml: amber\.prmtop names .*x\.prmtop"):
        _build("sys.yaml", tmp_path)


@pytest.mark.parametrize("key, spec, name", [
    (r"system\.pdb", {"pdb": "bad.pdb"}, "bad.pdb"),
    (r"system\.amber\.prmtop", {"amber": {"prmtop": "bad.prmtop", "inpcrd": "bad.inpcrd"}}, "bad.prmtop"),
    (r"system\.serialized\.system", {"serialized": {"system": "bad.xml", "pdb": "x.pdb"}}, "bad.xml"),
    (r"system\.gromacs\.gro", {"gromacs": {"top": "bad.top", "gro": "bad.gro"}}, "bad.gro"),
    (r"system\.charmm\.psf", {"charmm": {"psf": "bad.psf", "coordinates": "x.crd",
                                         "parameters": ["x.prm"]}}, "bad.psf"),
])
def test_corrupt_structure_files_are_input_errors(tmp_path, key, spec, name):
    (tmp_path / name).write_text("this is not a structure file\n")
    with pytest.raises(InputError, match=key):
        _build(spec, tmp_path)


def test_serialized_file_that_is_not_a_system(tmp_path):
    (tmp_path / "int.xml").write_text(openmm.XmlSerializer.serialize(openmm.VerletIntegrator(0.001)))
    _write_tri_pdb(tmp_path / "tri.pdb")
    with pytest.raises(InputError, match=r"system\.serialized\.system .*not a System"):
        _build({"serialized": {"system": "int.xml", "pdb": "tri.pdb"}}, tmp_path)


def test_atom_count_mismatch_names_the_coordinates(tmp_path):
    _write_prmtop(tmp_path / "tri.prmtop")
    _write_inpcrd(tmp_path / "two.inpcrd", TRI_XYZ[:2])
    with pytest.raises(InputError, match=r"system\.amber\.inpcrd: the coordinates hold 2 atoms"):
        _build({"amber": {"prmtop": "tri.prmtop", "inpcrd": "two.inpcrd"}},
                             tmp_path)


def test_unknown_key_gets_a_suggestion():
    with pytest.raises(ProtocolError, match=r"system\.forcfield is not a known key\. Did you mean 'forcefield'"):
        _build({"pdb": "x.pdb", "forcfield": ["amber14-all.xml"]}, ".")


@pytest.mark.parametrize("spec, got", [({"title": "nothing"}, "none of them"),
                                       ({"pdb": "a.pdb", "amber": {}}, "'pdb' and 'amber'")])
def test_exactly_one_source_key(spec, got):
    with pytest.raises(ProtocolError, match=rf"protocol\.yaml: system must have exactly one source key.*{got}"):
        _build(spec, ".")


@pytest.mark.parametrize("spec, key", [
    ({"amber": {}, "forcefield": ["amber14-all.xml"]}, r"system\.forcefield does not apply to the 'amber' source"),
    ({"model": {"name": "double_well"}, "constraints": "none"}, r"system\.constraints does not apply"),
    ({"gromacs": {}, "implicit_solvent": "obc2"}, r"system\.implicit_solvent does not apply"),
    ({"serialized": {}, "nonbonded": {}}, r"system\.nonbonded does not apply"),
])
def test_options_where_they_mean_nothing(spec, key):
    with pytest.raises(ProtocolError, match=key):
        _build(spec, ".")


def test_missing_residue_template_names_residue_and_force_field(tmp_path):
    _write_tri_pdb(tmp_path / "tri.pdb")
    with pytest.raises(ProtocolError, match=r"system\.forcefield cannot parametrize.*TRI.*amber14-all\.xml"):
        _build({"pdb": "tri.pdb"}, tmp_path)


def test_unknown_force_field_file(tmp_path):
    _write_tri_pdb(tmp_path / "tri.pdb")
    with pytest.raises(InputError, match=r"system\.forcefield\[1\] names 'nothere\.xml'"):
        _build({"pdb": "tri.pdb", "forcefield": ["amber14-all.xml", "nothere.xml"]},
                             tmp_path)


@pytest.mark.parametrize("spec, key", [
    ({"peptide": {"sequence": ["ACE", "ALA", "NME"], "phi": "-80"}}, r"system\.peptide\.phi must be an angle"),
    ({"peptide": {"sequence": ["ACE", "ALA", "NME"]}, "water_box": {"padding": "1 kg"}},
     r"system\.water_box\.padding must be a length"),
    ({"peptide": {"sequence": ["ACE", "ALA", "NME"]}, "nonbonded": {"method": "cutoff", "cutoff": "1"}},
     r"system\.nonbonded\.cutoff must be a length"),
    ({"peptide": {"sequence": ["ACE", "ALA", "NME"]}, "water_box": {"ionic_strength": "0.1 nm"}},
     r"system\.water_box\.ionic_strength must be a concentration"),
    ({"peptide": {"sequence": ["ACE", "ALA", "NME"], "phi": ["-80 deg", "60 deg"]}},
     r"system\.peptide\.phi must be one angle or a list of 1 angle,"),
])
def test_bad_units_and_angle_counts(spec, key):
    with pytest.raises(ProtocolError, match=key):
        _build(spec, ".")


@pytest.mark.parametrize("extra, key", [
    ({"nonbonded": {"method": "pme"}}, r"system\.nonbonded\.method is 'pme', which needs a periodic box"),
    ({"nonbonded": {"method": "no_cutoff", "cutoff": "1 nm"}}, r"system\.nonbonded\.cutoff does not apply"),
    ({"nonbonded": {"method": "ewald"}}, r"system\.nonbonded\.method must be one of"),
    ({"implicit_solvent": "gbsa"}, r"system\.implicit_solvent must be one of"),
    ({"constraints": "hbonds"}, r"system\.constraints must be one of"),
    ({"implicit_solvent": "obc2", "water_box": {}}, r"system\.water_box cannot be combined"),
    ({"water_box": {"water_model": "tip9p"}}, r"system\.water_box\.water_model must be one of"),
])
def test_bad_physics_options(extra, key):
    with pytest.raises(ProtocolError, match=key):
        _build({"peptide": PEPTIDE, **extra}, ".")


def test_cutoff_longer_than_half_the_box(tmp_path):
    _write_gromacs(tmp_path)
    spec = {"gromacs": {"top": "tri.top", "gro": "tri.gro", "include_dir": "ff"},
            "nonbonded": {"cutoff": "2 nm"}}
    with pytest.raises(ProtocolError, match=r"system\.nonbonded\.cutoff must be at most half the box"):
        _build(spec, tmp_path)


def test_bad_peptide_and_bad_include_dir(tmp_path):
    with pytest.raises(ProtocolError, match=r"system\.peptide cannot be built: .*XYZ"):
        _build({"peptide": {"sequence": ["ACE", "XYZ", "NME"]}}, ".")
    _write_gromacs(tmp_path)
    spec = {"gromacs": {"top": "tri.top", "gro": "tri.gro", "include_dir": "nofolder"}}
    with pytest.raises(InputError, match=r"system\.gromacs\.include_dir names .*nofolder"):
        _build(spec, tmp_path)


def test_system_value_of_the_wrong_kind():
    with pytest.raises(ProtocolError, match=r"protocol\.yaml: system must be a system file"):
        _build(5, ".")


def test_a_periodic_topology_writes_a_pdb_that_mdtraj_reads_with_its_box(solvated, tmp_path):
    # the run folder's topology.pdb is written by OpenMM's PDB writer; mdtraj reads the box
    # back from its CRYST1 record (reference library: mdtraj, unit cell in nm)
    import mdtraj

    name, built = solvated
    path = tmp_path / "topology.pdb"
    with open(path, "w") as handle:
        app.PDBFile.writeFile(built.topology, built.positions * unit.nanometer, handle)
    traj = mdtraj.load(str(path))
    assert traj.n_atoms == built.topology.getNumAtoms()
    assert np.allclose(traj.unitcell_vectors[0], built.box_vectors, atol=1e-3)
