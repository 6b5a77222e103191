"""System specs -> OpenMM System, topology and starting positions.

:mod:`boost.system_spec` reads and checks a spec when the protocol is loaded; this
module only builds: it opens the files a :class:`~boost.system_spec.SystemSpec` names,
parses them with OpenMM's readers, applies the force field and options, and reports in
one line (naming the file and key path) what only the files' contents can tell.
Modeller's random choices (hydrogen positions, which waters become ions) are seeded, so
a spec builds the same system every time.
"""

import random
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import openmm
from openmm import app, unit

from .exceptions import BoostError, InputError, ProtocolError, printable
from .spec import file_problem, read_text
from .system_spec import (AmberSource, CharmmSource, GromacsSource, MissingSystemFile, ModelSource, PdbSource,
                          PeptideSource, SerializedSource)

_IMPLICIT_OPENMM = {"obc1": app.OBC1, "obc2": app.OBC2, "gbn": app.GBn, "gbn2": app.GBn2,
                    "hct": app.HCT}
CONSTRAINTS = {"none": None, "h_bonds": app.HBonds, "all_bonds": app.AllBonds,
               "h_angles": app.HAngles}
_OPENMM_DATA = Path(app.__file__).parent / "data"


@dataclass(frozen=True)
class BuiltSystem:
    """A molecular system ready for OpenMM.

    Attributes
    ----------
    system : openmm.System
    topology : openmm.app.Topology
    positions : ndarray, shape (n_atoms, 3), in nm
    box_vectors : ndarray, shape (3, 3), in nm, or None when not periodic
    title : str
    """

    system: openmm.System
    topology: app.Topology
    positions: np.ndarray
    box_vectors: np.ndarray | None
    title: str = ""

    @property
    def masses(self):
        """Particle masses, ndarray shape (n_atoms,), in amu (g/mol)."""
        return np.array([self.system.getParticleMass(i).value_in_unit(openmm.unit.dalton)
                         for i in range(self.system.getNumParticles())])


# -- public entry point -----------------------------------------------------------------
def build_system(spec):
    """Build the system a spec describes.

    Parameters
    ----------
    spec : boost.system_spec.SystemSpec or MissingSystemFile
        As read by :func:`boost.system_spec.read_system_spec` (``Protocol.system``).

    Returns
    -------
    BuiltSystem

    Raises
    ------
    InputError, ProtocolError
        One line naming the file and key path, for what only the files can tell: a named
        file missing or malformed, a residue without a template, a cutoff too long for the box.
    """
    if isinstance(spec, MissingSystemFile):
        raise InputError(spec.message)
    system, topology, positions, coordinates_place = _BUILDERS[type(spec.source)](spec)
    return _finish(system, topology, positions, spec.title, coordinates_place)


# -- files ------------------------------------------------------------------------------
def _input_file(ref):
    """The regular file a FileRef names, or an InputError naming its key and path.

    Every file passes here before a reader opens it: the spec was checked when it was
    read, but the file may have gone or changed since.
    """
    problem = file_problem(ref.path)
    if problem is not None:
        raise InputError(f"{ref.place} names {printable(ref.path)}, which {problem}.")
    return ref.path


def _read(ref, kind, reader, *, path=None, place=None):
    """Run an OpenMM reader on the file ``ref`` names, any failure as one InputError line.

    ``path`` and ``place``: what the reader reads and where it is written, when not ``ref``'s.
    """
    path = path or _input_file(ref)
    try:
        return reader(str(path))
    except BoostError:
        raise
    except Exception as err:  # OpenMM's readers raise many types on malformed files
        raise InputError(f"{place or ref.place} names {printable(path)}, which cannot be read as {kind} "
                         f"({_cut(f'{type(err).__name__}: {_one_line(err)}')}).") from None


def _read_structure(ref):
    """A PDB or PDBx/mmCIF file (chosen by suffix) with at least one atom."""
    path = _input_file(ref)
    if path.suffix.lower() in (".cif", ".pdbx", ".mmcif"):
        structure = _read(ref, "a PDBx/mmCIF file", app.PDBxFile, path=path)
    else:
        structure = _read(ref, "a PDB file", app.PDBFile, path=path)
    if structure.topology.getNumAtoms() == 0:
        raise InputError(f"{ref.place} names {printable(path)}, which holds no atoms.")
    return structure


def _one_line(err):
    """A library's error message on one line, anything unprintable in it escaped."""
    return printable(" ".join(str(err).split()).rstrip(".")) or type(err).__name__


def _cut(text, limit=80):
    """A reader's message may quote the file it read: keep it short."""
    return text if len(text) <= limit else text[:limit - 3] + "..."


# -- the sources: each returns (system, topology, positions in nm, place of the positions) --
def _build_model(spec):
    system, topology, positions = spec.source.model.build_system()
    return system, topology, positions, spec.source.place


def _build_peptide(spec):
    from . import builder
    src, options = spec.source, spec.options
    entries = _forcefield_entries(options, implicit=False)
    _load_forcefield(options.forcefield_place, entries)  # a bad file name is reported here, not by the builder
    with _template_errors(options.forcefield_place, entries), _fixed_random():
        try:
            topology, positions = builder.build_peptide(
                list(src.sequence), phi=src.phi, psi=src.psi, forcefield_files=tuple(name for _, name in entries))
        except ProtocolError as err:
            reason = str(err).removeprefix("build_peptide: ")
            raise ProtocolError(f"{src.place} cannot be built: {reason}") from None
    system, topology, positions = _parametrize(spec, topology, positions)
    return system, topology, positions, src.place


def _build_pdb(spec):
    structure = _read_structure(spec.source.structure)
    positions = structure.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    system, topology, positions = _parametrize(spec, structure.topology, positions)
    return system, topology, positions, spec.source.place


def _build_amber(spec):
    src = spec.source
    prmtop = _read(src.prmtop, "an Amber prmtop file", app.AmberPrmtopFile)
    inpcrd = _read(src.inpcrd, "an Amber inpcrd file", app.AmberInpcrdFile)
    topology = prmtop.topology
    if inpcrd.boxVectors is not None:
        topology.setPeriodicBoxVectors(inpcrd.boxVectors)
    with _openmm_errors(spec):
        system = prmtop.createSystem(**_create_options(spec.options, topology, implicit=True))
    positions = inpcrd.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    return system, topology, positions, src.inpcrd.place


def _build_gromacs(spec):
    src = spec.source
    gro = _read(src.gro, "a GROMACS gro file", app.GromacsGroFile)
    box = gro.getPeriodicBoxVectors()
    if box is not None and _box_array_of(box).diagonal().min() <= 0:
        box = None  # a zero box line means "no box"
    options = {"periodicBoxVectors": box}
    if src.include_dir is not None:
        if not src.include_dir.path.is_dir():
            raise InputError(f"{src.include_dir.place} names {printable(src.include_dir.path)}, "
                             "which is not an existing folder.")
        options["includeDir"] = str(src.include_dir.path)
    top = _read(src.top, "a GROMACS top file", lambda path: app.GromacsTopFile(path, **options))
    with _openmm_errors(spec):
        system = top.createSystem(**_create_options(spec.options, top.topology))
    positions = gro.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    return system, top.topology, positions, src.gro.place


def _build_charmm(spec):
    src = spec.source
    psf = _read(src.psf, "a CHARMM PSF file", app.CharmmPsfFile)
    paths = [str(_input_file(item)) for item in src.parameters]
    params = _read(src.parameters[0], "CHARMM parameter and stream files", lambda _: app.CharmmParameterSet(*paths),
                   path=", ".join(paths), place=src.parameters_place)
    if src.coordinates.path.suffix.lower() in (".crd", ".cor"):
        crd = _read(src.coordinates, "a CHARMM crd file", app.CharmmCrdFile)
        positions = crd.positions.value_in_unit(unit.nanometer)
    else:
        positions = _read_structure(src.coordinates).getPositions(asNumpy=True)
        positions = positions.value_in_unit(unit.nanometer)
    if src.box is not None:
        psf.setBox(*(length * unit.nanometer for length in src.box))
    topology = psf.topology
    with _openmm_errors(spec):
        system = psf.createSystem(params, **_create_options(spec.options, topology, implicit=True))
    return system, topology, positions, src.coordinates.place


def _build_serialized(spec):
    src = spec.source
    path = _input_file(src.system)
    text = read_text(path, "serialized system")
    system = _read(src.system, "an OpenMM XML file", lambda _: openmm.XmlSerializer.deserialize(text), path=path)
    if not isinstance(system, openmm.System):
        raise InputError(f"{src.system.place} names {printable(path)}, which holds a serialized "
                         f"{type(system).__name__}, not a System.")
    structure = _read_structure(src.pdb)
    box = structure.topology.getPeriodicBoxVectors()
    if box is not None and system.usesPeriodicBoundaryConditions():
        system.setDefaultPeriodicBoxVectors(*box)  # the structure holds the latest box
    positions = structure.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    return system, structure.topology, positions, src.pdb.place


_BUILDERS = {ModelSource: _build_model, PeptideSource: _build_peptide, PdbSource: _build_pdb,
             AmberSource: _build_amber, GromacsSource: _build_gromacs, CharmmSource: _build_charmm,
             SerializedSource: _build_serialized}


# -- force fields, solvent, nonbonded options ----------------------------------------
def _forcefield_entries(options, *, implicit=True):
    """``(place, file)`` pairs: the listed force fields, then the implicit-solvent file."""
    entries = [(item.place, item.name) for item in options.forcefield]
    if implicit and options.implicit_solvent != "none":
        entries.append((options.implicit_solvent_place, f"implicit/{options.implicit_solvent}.xml"))
    return entries


def _load_forcefield(ff_place, entries):
    files = [name for _, name in entries]
    try:
        return app.ForceField(*files)
    except Exception as err:  # missing files raise ValueError, bad XML several types
        for place, name in entries:
            try:
                app.ForceField(name)
            except Exception as one:
                raise InputError(f"{place} names {name!r}, which is neither a file beside the "
                                 f"spec nor a force field OpenMM can load ({_one_line(one)}).") from None
        raise ProtocolError(f"{ff_place}: the force field files {', '.join(files)} "
                            f"cannot be combined ({_one_line(err)}).") from None


@contextmanager
def _template_errors(ff_place, entries):
    """Name the force field files when OpenMM finds no template for a residue."""
    try:
        yield
    except BoostError:
        raise
    except ValueError as err:
        files = ", ".join(name for _, name in entries)
        raise ProtocolError(f"{ff_place} cannot parametrize this structure: "
                            f"{_one_line(err)}. Force field files: {files}.") from None


@contextmanager
def _fixed_random(seed=20260101):
    """Seed Python's global RNG for one call, then restore it: OpenMM's Modeller draws
    from it (hydrogen start positions, which waters become ions), and a spec must build
    the same system every time."""
    state = random.getstate()
    random.seed(seed)
    try:
        yield
    finally:
        random.setstate(state)


@contextmanager
def _openmm_errors(spec):
    """Turn OpenMM's createSystem failures on file-based sources into one line."""
    try:
        yield
    except BoostError:
        raise
    except ValueError as err:
        raise ProtocolError(f"{spec.place}: OpenMM cannot build this system "
                            f"({_one_line(err)}).") from None
    except Exception as err:  # a malformed file often fails only here
        raise InputError(f"{spec.source.place}: OpenMM cannot build a System from these files "
                         f"({type(err).__name__}: {_one_line(err)}).") from None


def _parametrize(spec, topology, positions):
    """Force field (+ water box) -> System for pdb and peptide sources."""
    options = spec.options
    entries = _forcefield_entries(options)
    forcefield = _load_forcefield(options.forcefield_place, entries)
    if options.water_box is not None:
        forcefield, topology, positions = _add_water(
            options.water_box, options.forcefield_place, entries, forcefield, topology, positions)
    with _template_errors(options.forcefield_place, entries):
        system = forcefield.createSystem(topology, **_create_options(options, topology))
    return system, topology, positions


def _add_water(water_box, ff_place, entries, forcefield, topology, positions):
    """Solvate in a cubic water box; adds the water model's force field file if needed."""
    model = water_box.water_model
    if not _knows_water(forcefield, model):
        candidates = [f"amber14/{model}.xml", f"{model}.xml"]
        name = next(c for c in candidates if (_OPENMM_DATA / c).is_file())
        entries.append((water_box.water_model_place, name))
        forcefield = _load_forcefield(ff_place, entries)
    modeller = app.Modeller(topology, np.asarray(positions) * unit.nanometer)
    with _template_errors(ff_place, entries), _fixed_random():
        modeller.addSolvent(forcefield, model=model, padding=water_box.padding * unit.nanometer,
                            ionicStrength=water_box.ionic_strength * unit.molar)
    solvated = modeller.getPositions().value_in_unit(unit.nanometer)
    return forcefield, modeller.topology, np.asarray(solvated, dtype=float)


def _knows_water(forcefield, model):
    """Whether ``forcefield`` has a template for one molecule of Modeller's ``model`` box."""
    box = app.PDBFile(str(_OPENMM_DATA / f"{model}.pdb")).topology
    first = next(box.residues())
    water = app.Topology()
    residue = water.addResidue(first.name, water.addChain())
    atoms = {atom: water.addAtom(atom.name, atom.element, residue) for atom in first.atoms()}
    for a, b in box.bonds():
        if a in atoms and b in atoms:
            water.addBond(atoms[a], atoms[b])
    return not forcefield.getUnmatchedResidues(water)


def _nonbonded(nonbonded, box):
    """OpenMM nonbonded method and cutoff; ``box`` is the (3, 3) nm box or None.

    The spec's choices were checked when it was read; what depends on the box is checked here.
    """
    method = nonbonded.method or ("pme" if box is not None else "no_cutoff")
    if method == "pme" and box is None:
        raise ProtocolError(f"{nonbonded.method_place} is 'pme', which needs a periodic box, and "
                            "this system has none. Use 'no_cutoff' or 'cutoff', or add a box.")
    if method == "no_cutoff":
        if nonbonded.cutoff is not None:
            raise ProtocolError(f"{nonbonded.cutoff_place} does not apply with method "
                                "'no_cutoff'. Remove it or choose 'cutoff' or 'pme'.")
        return app.NoCutoff, 1.0 * unit.nanometer
    cutoff = 1.0 if nonbonded.cutoff is None else nonbonded.cutoff
    if box is not None and cutoff > 0.5 * box.diagonal().min():
        raise ProtocolError(f"{nonbonded.cutoff_place} must be at most half the box width "
                            f"({0.5 * box.diagonal().min():.4g} nm). Got {cutoff:.4g} nm instead; "
                            "give a shorter cutoff, a bigger box or method 'no_cutoff'.")
    if method == "pme":
        return app.PME, cutoff * unit.nanometer
    return (app.CutoffPeriodic if box is not None else app.CutoffNonPeriodic), cutoff * unit.nanometer


def _create_options(options, topology, *, implicit=False):
    """createSystem keywords: nonbonded method and cutoff, constraints, implicit solvent."""
    method, cutoff = _nonbonded(options.nonbonded, _box_array(topology))
    keywords = {"nonbondedMethod": method, "nonbondedCutoff": cutoff,
                "constraints": CONSTRAINTS[options.constraints]}
    if implicit:
        keywords["implicitSolvent"] = _IMPLICIT_OPENMM.get(options.implicit_solvent)
    return keywords


# -- the result -----------------------------------------------------------------------
def _box_array_of(vectors):
    """(3, 3) array in nm from a Quantity of vectors or a list of Quantity vectors."""
    if unit.is_quantity(vectors):
        vectors = vectors.value_in_unit(unit.nanometer)
    rows = [v.value_in_unit(unit.nanometer) if unit.is_quantity(v) else v for v in vectors]
    return np.array([[v[0], v[1], v[2]] for v in rows], dtype=float)


def _box_array(topology):
    vectors = topology.getPeriodicBoxVectors()
    return None if vectors is None else _box_array_of(vectors)


def _finish(system, topology, positions, title, coordinates_place):
    positions = np.array(positions, dtype=float).reshape(-1, 3)
    n_particles = system.getNumParticles()
    for count, what in ((positions.shape[0], "coordinates"), (topology.getNumAtoms(), "topology")):
        if count != n_particles:
            raise InputError(f"{coordinates_place}: the {what} hold {count} atoms, but the "
                             f"system has {n_particles} particles.")
    if not np.all(np.isfinite(positions)):
        raise InputError(f"{coordinates_place}: the coordinates are not all finite numbers.")
    box = vectors = None    # no box: a box the system does not use would only mislead later readers
    if system.usesPeriodicBoundaryConditions():
        box = _box_array_of(system.getDefaultPeriodicBoxVectors())
        # one Quantity of Vec3 rows, as OpenMM's own readers set it (the PDB writer needs that form)
        vectors = [openmm.Vec3(*row) for row in box] * unit.nanometer
    topology.setPeriodicBoxVectors(vectors)
    return BuiltSystem(system=system, topology=topology, positions=positions,
                       box_vectors=box, title=title)
