"""Capped peptides from a sequence and backbone angles.

Heavy atoms are placed one by one from internal coordinates (bond length, bond angle,
dihedral to three atoms already placed), with ideal geometry from Engh & Huber, Acta
Cryst. A47, 392 (1991), doi:10.1107/S0108767391001071, and ω = 180°. Hydrogens are
then added by OpenMM's ``Modeller.addHydrogens`` with the force field, which moves only
the hydrogens, so the built φ and ψ are kept exactly.

Lengths are in Å inside this module and in nm on the way out; angles are in degrees in
the tables and radians at the public edge.
"""

import math

import numpy as np

from .exceptions import ProtocolError, SimulationError

# OpenMM is imported where atoms are made: a sequence is checked (when a protocol is
# loaded) without it.

# Backbone, Engh & Huber 1991, general / Gly / Pro values, in Å and degrees. Recalled,
# then checked against a third-party copy of the table (not the paper itself).
_N_CA = {"GLY": 1.451, "PRO": 1.466}, 1.458
_CA_C = {"GLY": 1.516}, 1.525
_C_N = {"PRO": 1.341}, 1.329  # keyed by the residue that owns the N
_C_O = 1.231
_C_N_CA = {"GLY": 120.6, "PRO": 122.6}, 121.7
_N_CA_C = {"GLY": 112.5, "PRO": 111.8}, 111.2
_CA_C_N = {"GLY": 116.4}, 116.2  # keyed by the residue that owns the C
_CA_C_N_PRO = 116.9  # at the C before a Pro N (E&H type N), value from memory
_CA_C_O = 120.8  # O=C-N = 360 - 116.2 - 120.8 = 123.0 follows from planarity
_OMEGA = 180.0

# CB: (CA-CB in Å, N-CA-CB, C-CA-CB in degrees). Engh & Huber 1991; Ala, beta-branched
# and Pro angles are values from memory.
_CB = {"ALA": (1.521, 110.4, 110.5), "ILE": (1.540, 111.5, 109.1), "THR": (1.540, 111.5, 109.1),
       "VAL": (1.540, 111.5, 109.1), "PRO": (1.530, 103.0, 110.1)}
_CB_DEFAULT = (1.530, 110.5, 110.1)

# Side chains beyond CB, one atom per entry: "NAME A B PARENT bond angle dihedral",
# placed bonded to PARENT with angle B-PARENT-NAME and dihedral A-B-PARENT-NAME.
# Bond lengths and angles: Engh & Huber 1991, values from memory (cross-checked against a
# copy of the table; the tests compare them with amber14's equilibrium values).
# Dihedrals: planar groups at 0/180 degrees, chi angles at common rotamers (common
# practice); minimisation settles both.
_SIDE_CHAINS = {
    "ALA": "", "GLY": "",
    "ARG": "CG N CA CB 1.520 114.1 -65; CD CA CB CG 1.520 111.3 180; NE CB CG CD 1.460 112.0 180;"
           "CZ CG CD NE 1.329 124.2 180; NH1 CD NE CZ 1.326 120.0 0; NH2 CD NE CZ 1.326 120.0 180",
    "ASN": "CG N CA CB 1.516 112.6 -65; OD1 CA CB CG 1.231 120.8 -20; ND2 CA CB CG 1.328 116.4 160",
    "ASP": "CG N CA CB 1.516 112.6 -70; OD1 CA CB CG 1.249 118.4 -15; OD2 CA CB CG 1.249 118.4 165",
    "CYS": "SG N CA CB 1.808 114.4 -65",
    "GLN": "CG N CA CB 1.520 114.1 -65; CD CA CB CG 1.516 112.6 180; OE1 CB CG CD 1.231 120.8 -25;"
           "NE2 CB CG CD 1.328 116.4 155",
    "GLU": "CG N CA CB 1.520 114.1 -65; CD CA CB CG 1.516 112.6 180; OE1 CB CG CD 1.249 118.4 -25;"
           "OE2 CB CG CD 1.249 118.4 155",
    "HIS": "CG N CA CB 1.497 113.8 -65; ND1 CA CB CG 1.371 121.6 -70; CD2 CA CB CG 1.356 129.1 110;"
           "CE1 CB CG ND1 1.319 105.6 180; NE2 CB CG CD2 1.374 106.5 180",
    "ILE": "CG1 N CA CB 1.530 110.4 -65; CG2 N CA CB 1.521 110.5 175; CD1 CA CB CG1 1.513 113.8 170",
    "LEU": "CG N CA CB 1.530 116.3 -65; CD1 CA CB CG 1.521 110.7 175; CD2 CA CB CG 1.521 110.7 -65",
    "LYS": "CG N CA CB 1.520 114.1 -65; CD CA CB CG 1.520 111.3 180; CE CB CG CD 1.520 111.3 180;"
           "NZ CG CD CE 1.489 111.9 180",
    "MET": "CG N CA CB 1.520 114.1 -65; SD CA CB CG 1.803 112.7 180; CE CB CG SD 1.791 100.9 180",
    "PHE": "CG N CA CB 1.502 113.8 -65; CD1 CA CB CG 1.384 120.7 90; CD2 CA CB CG 1.384 120.7 -90;"
           "CE1 CB CG CD1 1.382 120.7 180; CE2 CB CG CD2 1.382 120.7 180; CZ CG CD1 CE1 1.382 120.0 0",
    "PRO": "CG N CA CB 1.492 104.5 28; CD CA CB CG 1.503 106.1 -34",
    "SER": "OG N CA CB 1.417 111.1 62",
    "THR": "OG1 N CA CB 1.433 109.6 62; CG2 N CA CB 1.521 110.5 -58",
    "TRP": "CG N CA CB 1.498 113.6 -65; CD1 CA CB CG 1.365 126.8 95; CD2 CA CB CG 1.433 126.9 -85;"
           "NE1 CB CG CD1 1.374 110.2 180; CE2 CB CG CD2 1.409 107.2 180; CE3 CB CG CD2 1.398 133.9 0;"
           "CZ2 CG CD2 CE2 1.394 122.4 180; CZ3 CG CD2 CE3 1.382 118.6 180; CH2 CD2 CE3 CZ3 1.400 121.1 0",
    "TYR": "CG N CA CB 1.512 113.9 -65; CD1 CA CB CG 1.389 120.8 90; CD2 CA CB CG 1.389 120.8 -90;"
           "CE1 CB CG CD1 1.382 121.2 180; CE2 CB CG CD2 1.382 121.2 180; CZ CG CD1 CE1 1.378 119.6 0;"
           "OH CD1 CE1 CZ 1.376 119.9 180",
    "VAL": "CG1 N CA CB 1.521 110.5 175; CG2 N CA CB 1.521 110.5 -65",
}
# Bonds that close rings, besides the parent bonds of the entries above.
_RING_BONDS = {"HIS": [("CE1", "NE2")], "PHE": [("CE2", "CZ")], "TYR": [("CE2", "CZ")],
               "PRO": [("CD", "N")], "TRP": [("NE1", "CE2"), ("CZ2", "CH2")]}
_AMINO_ACIDS = tuple(sorted(_SIDE_CHAINS))


def _value(table, name):
    special, general = table
    return special.get(name, general)


def _ca_c_n(name, next_name):
    """Angle CA-C-N (degrees) at the C of ``name`` bonded to the N of ``next_name``."""
    return _CA_C_N_PRO if next_name == "PRO" else _value(_CA_C_N, name)


def _place(a, b, c, bond, angle, dihedral):
    """Position of atom d bonded to c, with angle b-c-d and dihedral a-b-c-d (Å, degrees)."""
    angle, dihedral = math.radians(angle), math.radians(dihedral)
    bc = (c - b) / np.linalg.norm(c - b)
    normal = np.cross(b - a, bc)
    normal /= np.linalg.norm(normal)
    local = np.array([-math.cos(angle), math.sin(angle) * math.cos(dihedral),
                      math.sin(angle) * math.sin(dihedral)])
    return c + bond * (local[0] * bc + local[1] * np.cross(normal, bc) + local[2] * normal)


def _cb_dihedral(name):
    """Dihedral C-N-CA-CB (degrees) that gives the C-CA-CB angle of an L residue."""
    _, n_ca_cb, c_ca_cb = _CB.get(name, _CB_DEFAULT)
    t1, t2, gamma = (math.radians(x) for x in (_value(_N_CA_C, name), n_ca_cb, c_ca_cb))
    # spherical law of cosines about the N-CA axis
    cos_turn = (math.cos(gamma) - math.cos(t1) * math.cos(t2)) / (math.sin(t1) * math.sin(t2))
    return -math.degrees(math.acos(cos_turn))


def _side_chain(name, xyz):
    """Add the side-chain heavy atoms of residue ``name`` to ``xyz`` (name -> Å); return bonds."""
    if name == "GLY":
        return []
    bond, n_ca_cb, _ = _CB.get(name, _CB_DEFAULT)
    xyz["CB"] = _place(xyz["C"], xyz["N"], xyz["CA"], bond, n_ca_cb, _cb_dihedral(name))
    bonds = [("CA", "CB")]
    for entry in filter(None, _SIDE_CHAINS[name].split(";")):
        atom, a, b, parent, length, angle, dihedral = entry.split()
        xyz[atom] = _place(xyz[a], xyz[b], xyz[parent], float(length), float(angle), float(dihedral))
        bonds.append((parent, atom))
    return bonds + _RING_BONDS.get(name, [])


def check_sequence(sequence):
    """Return the residue names (upper case) as a list, or raise ProtocolError."""
    if isinstance(sequence, str) or not hasattr(sequence, "__len__"):
        raise ProtocolError(f"build_peptide: sequence must be a list of residue names such as "
                            f"['ACE', 'ALA', 'NME']; got {sequence!r}.")
    names = [str(name).upper() for name in sequence]
    if len(names) < 3 or names[0] != "ACE" or names[-1] != "NME":
        raise ProtocolError(f"build_peptide: sequence must start with 'ACE', end with 'NME' and hold "
                            f"at least one amino acid between; got {list(sequence)!r}.")
    for i, name in enumerate(names[1:-1], start=1):
        if name not in _SIDE_CHAINS:
            raise ProtocolError(f"build_peptide: sequence[{i}] must be a standard amino acid "
                                f"({', '.join(_AMINO_ACIDS)}); got {sequence[i]!r}.")
    return names


def _check_angles(value, n_residues, key):
    """Return one angle per residue (degrees), or raise ProtocolError."""
    expected = f"build_peptide: {key} must be one angle or a list of {n_residues} angles in radians"
    try:
        angles = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ProtocolError(f"{expected}; got {value!r}.") from None
    if angles.ndim == 0:
        angles = np.full(n_residues, float(angles))
    if angles.shape != (n_residues,):
        raise ProtocolError(f"{expected}; got {angles.size} angles in shape {angles.shape}.")
    if not np.all(np.isfinite(angles)):
        raise ProtocolError(f"{expected}; got non-finite values {angles.tolist()}.")
    return np.degrees(angles)


def _backbone(names, phi, psi):
    """Heavy-atom positions (Å) per residue and the bonds inside each residue."""
    # the caps' methyl carbons take the geometry of the CA they stand in for
    ace = {"CH3": np.zeros(3), "C": np.array([_value(_CA_C, "ACE"), 0.0, 0.0])}
    # an arbitrary point fixes the frame: only internal coordinates matter
    n_next = _place(np.array([0.0, 1.0, 0.0]), ace["CH3"], ace["C"],
                    _value(_C_N, names[1]), _ca_c_n("ACE", names[1]), 180.0)
    residues, bonds = [ace], [[("CH3", "C"), ("C", "O")]]
    prev_ca, prev_c = ace["CH3"], ace["C"]
    for i, name in enumerate(names[1:], start=1):
        xyz = {"N": n_next}
        ca_name = "C" if name == "NME" else "CA"  # NME's methyl takes CA geometry
        xyz[ca_name] = _place(prev_ca, prev_c, xyz["N"], _value(_N_CA, name),
                              _value(_C_N_CA, name), _OMEGA)
        residues[-1]["O"] = None  # keeps the atom order N CA C O; placed once the next N exists
        if name == "NME":
            residues.append(xyz)
            bonds.append([("N", "C")])
            break
        xyz["C"] = _place(prev_c, xyz["N"], xyz["CA"], _value(_CA_C, name),
                          _value(_N_CA_C, name), phi[i - 1])
        n_next = _place(xyz["N"], xyz["CA"], xyz["C"], _value(_C_N, names[i + 1]),
                        _ca_c_n(name, names[i + 1]), psi[i - 1])
        residues.append(xyz)
        bonds.append([("N", "CA"), ("CA", "C"), ("C", "O")])
        prev_ca, prev_c = xyz["CA"], xyz["C"]
    for i, xyz in enumerate(residues[:-1]):
        ca = xyz["CH3"] if i == 0 else xyz["CA"]
        xyz["O"] = _place(residues[i + 1]["N"], ca, xyz["C"], _C_O, _CA_C_O, 180.0)
    for name, xyz, residue_bonds in zip(names[1:-1], residues[1:-1], bonds[1:-1]):
        residue_bonds.extend(_side_chain(name, xyz))
    return residues, bonds


def _heavy_topology(names, residues, bonds):
    """OpenMM topology and positions (nm) of the heavy atoms, bonds included."""
    from openmm import app

    topology = app.Topology()
    chain = topology.addChain()
    positions, atoms = [], []
    for name, xyz, residue_bonds in zip(names, residues, bonds):
        residue = topology.addResidue(name, chain)
        by_name = {}
        for atom_name, position in xyz.items():
            element = app.Element.getBySymbol(atom_name[0])
            by_name[atom_name] = topology.addAtom(atom_name, element, residue)
            positions.append(position / 10.0)
        for first, second in residue_bonds:
            topology.addBond(by_name[first], by_name[second])
        if atoms:
            topology.addBond(atoms[-1]["C"], by_name["N"])
        atoms.append(by_name)
    return topology, np.array(positions)


def build_peptide(sequence, *, phi, psi, forcefield_files=("amber14-all.xml",)):
    """Build a capped peptide with chosen backbone angles, hydrogens included.

    Parameters
    ----------
    sequence : list of str
        Residue names, e.g. ``["ACE", "ALA", "NME"]``: ``ACE`` first, ``NME`` last and
        standard amino acids between (HIS gets the tautomer ``addHydrogens`` picks).
        Side chains start in common rotamers; a Pro ring is built closed, so a Pro
        φ far from about -65° leaves its N out of plane.
    phi, psi : float or sequence of float, in radians
        One angle for every non-cap residue, or one list with one angle per non-cap
        residue (IUPAC sign convention, as in mdtraj.compute_phi/compute_psi).
    forcefield_files : tuple of str
        Force field files for ``openmm.app.ForceField``; its templates decide the
        hydrogens (charged ASP, GLU, LYS, ARG at pH 7).

    Returns
    -------
    topology : openmm.app.Topology
        The peptide with hydrogens and bonds, atom names as in OpenMM's templates.
    positions : ndarray, shape (n_atoms, 3), in nm

    Raises
    ------
    ProtocolError
        For an unknown residue name, missing caps or a wrong number of angles.
    SimulationError
        If adding hydrogens moved a heavy atom (OpenMM is expected to hold them fixed).

    References
    ----------
    Engh & Huber, Acta Cryst. A47, 392 (1991), doi:10.1107/S0108767391001071.
    """
    import openmm
    from openmm import app, unit

    names = check_sequence(sequence)
    phi_deg = _check_angles(phi, len(names) - 2, "phi")
    psi_deg = _check_angles(psi, len(names) - 2, "psi")
    residues, bonds = _backbone(names, phi_deg, psi_deg)
    heavy_topology, heavy_positions = _heavy_topology(names, residues, bonds)
    modeller = app.Modeller(heavy_topology, heavy_positions * unit.nanometer)
    forcefield = app.ForceField(*forcefield_files)
    modeller.addHydrogens(forcefield, platform=openmm.Platform.getPlatformByName("Reference"))
    positions = np.array(modeller.getPositions().value_in_unit(unit.nanometer))
    heavy = [atom.index for atom in modeller.topology.atoms() if atom.element.symbol != "H"]
    if len(heavy) != len(heavy_positions) or not np.allclose(positions[heavy], heavy_positions,
                                                             rtol=0.0, atol=1e-9):
        raise SimulationError("build_peptide: adding hydrogens moved heavy atoms; OpenMM's Modeller "
                         "was expected to keep them fixed.")
    positions[heavy] = heavy_positions  # exact, free of unit round trips
    return modeller.topology, positions
