"""System specs -> OpenMM System, topology and starting positions.

A system spec is a YAML mapping, in a file of its own (the bundled ones live in the
repository's ``systems/`` folder) or written inline in a protocol. It has exactly one
source key, which says where the atoms and their parameters come from:

``model``       an analytic model potential (:func:`boost.models.build_model`)
``peptide``     a capped peptide from a sequence and backbone angles (:mod:`boost.builder`)
``pdb``         a PDB or PDBx/mmCIF (``.cif``) structure, parametrized by a force field
``amber``       an Amber prmtop + inpcrd pair
``gromacs``     a GROMACS top + gro pair (``include_dir`` for ``#include`` files)
``charmm``      a CHARMM PSF, coordinates (crd, pdb or cif) and parameter/stream files
``serialized``  an OpenMM System in XML plus a structure for topology and positions

Physics options, each accepted only where it means something: ``forcefield``,
``implicit_solvent`` and ``water_box`` (pdb, peptide); ``nonbonded`` and
``constraints`` (all but model and serialized); ``implicit_solvent`` also for amber
and charmm. Paths are relative to the file the spec is written in; a force field
that is not a file there is taken as one of OpenMM's bundled force fields. Defaults:
forcefield amber14-all.xml; peptide phi and psi 180 deg; water_box padding 1 nm,
tip3p, no salt (the water model's force field file is added when the listed ones lack
water); nonbonded pme with a box, else no_cutoff, cutoff 1 nm; constraints h_bonds.
"""

import os
import random
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import openmm
from openmm import app, unit

from .bundled import bundled_folder
from .exceptions import BoostError, InputError, ProtocolError, printable
from .limits import MAX_TITLE_LENGTH
from .spec import file_problem, load_yaml, read_text

SOURCE_KEYS = ("model", "peptide", "pdb", "amber", "gromacs", "charmm", "serialized")
OPTION_KEYS = ("forcefield", "implicit_solvent", "water_box", "nonbonded", "constraints")
SPEC_KEYS = ("title",) + SOURCE_KEYS + OPTION_KEYS

#: The physics options each source accepts; any other is an error there.
OPTIONS_BY_SOURCE = {
    "model": (), "peptide": OPTION_KEYS, "pdb": OPTION_KEYS, "serialized": (),
    "amber": ("implicit_solvent", "nonbonded", "constraints"),
    "gromacs": ("nonbonded", "constraints"),
    "charmm": ("implicit_solvent", "nonbonded", "constraints")}

DEFAULT_FORCEFIELD = ("amber14-all.xml",)
IMPLICIT_SOLVENTS = ("none", "obc1", "obc2", "gbn", "gbn2", "hct")
_IMPLICIT_OPENMM = {"obc1": app.OBC1, "obc2": app.OBC2, "gbn": app.GBn, "gbn2": app.GBn2,
                    "hct": app.HCT}
#: Water models for which OpenMM's Modeller ships an equilibrated box.
WATER_MODELS = ("tip3p", "spce", "tip4pew", "tip5p", "swm4ndp")
CONSTRAINTS = {"none": None, "h_bonds": app.HBonds, "all_bonds": app.AllBonds,
               "h_angles": app.HAngles}
NONBONDED_METHODS = ("no_cutoff", "cutoff", "pme")
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


# -- public entry points --------------------------------------------------------------
def bundled_systems_folder():
    """The folder of bundled system specs: ``$BOOST_SYSTEMS``, else :func:`boost.bundled.bundled_folder`."""
    override = os.environ.get("BOOST_SYSTEMS")
    return Path(override) if override else bundled_folder("systems")


def list_bundled_systems():
    """The bundled systems as ``(name, title, path)`` rows, sorted by name.

    Returns
    -------
    list of tuple (str, str, pathlib.Path)
        Name (the file stem, usable as ``system: NAME`` in a protocol), the spec's
        ``title`` (empty if it has none) and the spec file.
    """
    rows = []
    for path in sorted(bundled_systems_folder().glob("*.yaml"), key=lambda p: p.stem):
        root = load_yaml(path, what="system")
        title = root.get("title").line(MAX_TITLE_LENGTH) if root.has("title") else ""
        rows.append((path.stem, title, path))
    return rows


def load_system(node, base_dir):
    """Build the system a protocol names: a spec file, a bundled system or an inline spec.

    Parameters
    ----------
    node : boost.spec.Node
        Text (a path to a system YAML file relative to ``base_dir``, or the bare name
        of a bundled system when no such file exists) or a mapping (an inline spec).
    base_dir : path-like
        Folder of the file ``node`` was written in.

    Returns
    -------
    BuiltSystem
    """
    if isinstance(node.value, dict):
        return build_system(node, base_dir)
    if not isinstance(node.value, str) or not node.value.strip():
        node.fail("a system file, the name of a bundled system, or a mapping with a source key")
    path = _find_spec_file(node, base_dir)
    try:
        root = load_yaml(path, what="system")
    except InputError as err:
        raise InputError(f"{node.place} names a file that cannot be read: {err}") from None
    return build_system(root, path.parent)


def build_system(node, base_dir):
    """Build a system from a spec mapping.

    Parameters
    ----------
    node : boost.spec.Node
        The spec mapping (see the module docstring for its keys).
    base_dir : path-like
        Folder that the spec's relative paths start from.

    Returns
    -------
    BuiltSystem
    """
    node.mapping(allowed=SPEC_KEYS)
    source = _source_key(node)
    allowed = OPTIONS_BY_SOURCE[source]
    for key in OPTION_KEYS:
        if node.has(key) and key not in allowed:
            raise ProtocolError(
                f"{node.get(key).place} does not apply to the '{source}' source. "
                f"Options there: {', '.join(allowed) or 'none'}.")
    title = node.get("title").line(MAX_TITLE_LENGTH) if node.has("title") else ""
    system, topology, positions, coordinates_node = _SOURCES[source](
        node, node.get(source), Path(base_dir))
    return _finish(system, topology, positions, title, coordinates_node)


# -- finding files --------------------------------------------------------------------
def _find_spec_file(node, base_dir):
    path = node.path_value(base_dir)
    if path.is_file():
        return path
    text = node.value.strip()
    if not path.exists() and Path(text).name == text:
        stem = text[:-5] if text.endswith(".yaml") else text
        bundled = bundled_systems_folder() / f"{stem}.yaml"
        if bundled.is_file():
            return bundled
        names = ", ".join(sorted(p.stem for p in bundled_systems_folder().glob("*.yaml")))
        raise InputError(f"{node.place} names {printable(path)}, which does not exist, and no bundled "
                         f"system is called '{stem}' (bundled: {names or 'none'}).")
    return _input_file(node, base_dir)


def _input_file(node, base_dir):
    """The regular file a path node names, or an InputError naming the node and path.

    Every file of a system spec passes here before a reader opens it: a FIFO or a device
    is refused without being opened (reading one may block or never end).
    """
    path = node.path_value(base_dir)
    problem = file_problem(path)
    if problem is not None:
        raise InputError(f"{node.place} names {printable(path)}, which {problem}.")
    return path


def _read(node, base_dir, kind, reader, *, path=None):
    """Run an OpenMM reader on the file ``node`` names, any failure as one InputError line."""
    path = path or _input_file(node, base_dir)
    try:
        return reader(str(path))
    except BoostError:
        raise
    except Exception as err:  # OpenMM's readers raise many types on malformed files
        raise InputError(f"{node.place} names {printable(path)}, which cannot be read as {kind} "
                         f"({_cut(f'{type(err).__name__}: {_one_line(err)}')}).") from None


def _read_structure(node, base_dir):
    """A PDB or PDBx/mmCIF file (chosen by suffix) with at least one atom."""
    path = _input_file(node, base_dir)
    if path.suffix.lower() in (".cif", ".pdbx", ".mmcif"):
        structure = _read(node, base_dir, "a PDBx/mmCIF file", app.PDBxFile, path=path)
    else:
        structure = _read(node, base_dir, "a PDB file", app.PDBFile, path=path)
    if structure.topology.getNumAtoms() == 0:
        raise InputError(f"{node.place} names {printable(path)}, which holds no atoms.")
    return structure


def _one_line(err):
    """A library's error message on one line, anything unprintable in it escaped."""
    return printable(" ".join(str(err).split()).rstrip(".")) or type(err).__name__


def _cut(text, limit=80):
    """A reader's message may quote the file it read: keep it short."""
    return text if len(text) <= limit else text[:limit - 3] + "..."


# -- the sources ----------------------------------------------------------------------
def _source_key(node):
    present = [key for key in SOURCE_KEYS if node.has(key)]
    if len(present) != 1:
        got = " and ".join(map(repr, present)) or "none of them"
        raise ProtocolError(f"{node.place} must have exactly one source key, one of "
                            f"{', '.join(SOURCE_KEYS)}. Got {got} instead.")
    return present[0]


def _from_model(spec, src, base_dir):
    from . import models
    system, topology, positions = models.build_model(src)
    return system, topology, positions, src


def _from_peptide(spec, src, base_dir):
    src.mapping(allowed=("sequence", "phi", "psi"), required=("sequence",))
    seq = src.get("sequence")
    if isinstance(seq.value, str):
        sequence = seq.text().split()
    else:
        sequence = [item.text() for item in seq.sequence(min_length=1)]
    phi, psi = (_angles(src.get(key, "180 deg"), len(sequence) - 2) for key in ("phi", "psi"))
    ff_node = spec.get("forcefield", list(DEFAULT_FORCEFIELD))
    entries = _forcefield_entries(spec, base_dir, implicit=False)
    _load_forcefield(ff_node, entries)  # a bad file name is reported here, not by the builder
    from . import builder
    with _template_errors(ff_node, entries), _fixed_random():
        try:
            topology, positions = builder.build_peptide(
                sequence, phi=phi, psi=psi, forcefield_files=tuple(name for _, name in entries))
        except ProtocolError as err:
            reason = str(err).removeprefix("build_peptide: ")
            raise ProtocolError(f"{src.place} cannot be built: {reason}") from None
    system, topology, positions = _parametrize(spec, topology, positions, base_dir)
    return system, topology, positions, src


def _angles(node, count):
    """One angle or a list of ``count`` angles (one per non-cap residue), in radians."""
    if not isinstance(node.value, list):
        return node.quantity("angle")
    if count >= 1 and len(node.value) != count:
        node.fail(f"one angle or a list of {count} angle{'s' if count != 1 else ''}, one per "
                  "residue between the caps")
    return [item.quantity("angle") for item in node.sequence()]


def _from_pdb(spec, src, base_dir):
    structure = _read_structure(src, base_dir)
    positions = structure.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    system, topology, positions = _parametrize(spec, structure.topology, positions, base_dir)
    return system, topology, positions, src


def _from_amber(spec, src, base_dir):
    src.mapping(allowed=("prmtop", "inpcrd"), required=("prmtop", "inpcrd"))
    prmtop_node, inpcrd_node = src.get("prmtop"), src.get("inpcrd")
    prmtop = _read(prmtop_node, base_dir, "an Amber prmtop file", app.AmberPrmtopFile)
    inpcrd = _read(inpcrd_node, base_dir, "an Amber inpcrd file", app.AmberInpcrdFile)
    topology = prmtop.topology
    if inpcrd.boxVectors is not None:
        topology.setPeriodicBoxVectors(inpcrd.boxVectors)
    with _openmm_errors(spec, src):
        system = prmtop.createSystem(**_create_options(spec, topology, implicit=True))
    positions = inpcrd.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    return system, topology, positions, inpcrd_node


def _from_gromacs(spec, src, base_dir):
    src.mapping(allowed=("top", "gro", "include_dir"), required=("top", "gro"))
    top_node, gro_node = src.get("top"), src.get("gro")
    gro = _read(gro_node, base_dir, "a GROMACS gro file", app.GromacsGroFile)
    box = gro.getPeriodicBoxVectors()
    if box is not None and _box_array_of(box).diagonal().min() <= 0:
        box = None  # a zero box line means "no box"
    options = {"periodicBoxVectors": box}
    if src.has("include_dir"):
        include = src.get("include_dir").path_value(base_dir)
        if not include.is_dir():
            raise InputError(f"{src.get('include_dir').place} names {printable(include)}, "
                             "which is not an existing folder.")
        options["includeDir"] = str(include)
    top = _read(top_node, base_dir, "a GROMACS top file",
                lambda path: app.GromacsTopFile(path, **options))
    with _openmm_errors(spec, src):
        system = top.createSystem(**_create_options(spec, top.topology))
    positions = gro.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    return system, top.topology, positions, gro_node


def _from_charmm(spec, src, base_dir):
    src.mapping(allowed=("psf", "coordinates", "parameters", "box"),
                required=("psf", "coordinates", "parameters"))
    psf_node, coord_node, par_node = (src.get(k) for k in ("psf", "coordinates", "parameters"))
    psf = _read(psf_node, base_dir, "a CHARMM PSF file", app.CharmmPsfFile)
    items = [par_node] if isinstance(par_node.value, str) else par_node.sequence(min_length=1)
    paths = [str(_input_file(item, base_dir)) for item in items]
    params = _read(par_node, base_dir, "CHARMM parameter and stream files",
                   lambda _: app.CharmmParameterSet(*paths), path=", ".join(paths))
    if Path(coord_node.text()).suffix.lower() in (".crd", ".cor"):
        crd = _read(coord_node, base_dir, "a CHARMM crd file", app.CharmmCrdFile)
        positions = crd.positions.value_in_unit(unit.nanometer)
    else:
        positions = _read_structure(coord_node, base_dir).getPositions(asNumpy=True)
        positions = positions.value_in_unit(unit.nanometer)
    if src.has("box"):
        psf.setBox(*(length * unit.nanometer for length in _box_lengths(src.get("box"))))
    topology = psf.topology
    with _openmm_errors(spec, src):
        system = psf.createSystem(params, **_create_options(spec, topology, implicit=True))
    return system, topology, positions, coord_node


def _box_lengths(node):
    """A cube edge ("3 nm") or three rectangular edges, in nm."""
    if isinstance(node.value, list):
        if len(node.value) != 3:
            node.fail("one length (a cube) or a list of three lengths")
        return [item.quantity("length", positive=True) for item in node.sequence()]
    return [node.quantity("length", positive=True)] * 3


def _from_serialized(spec, src, base_dir):
    src.mapping(allowed=("system", "pdb"), required=("system", "pdb"))
    xml_node, pdb_node = src.get("system"), src.get("pdb")
    path = _input_file(xml_node, base_dir)
    text = read_text(path, "serialized system")
    system = _read(xml_node, base_dir, "an OpenMM XML file",
                   lambda _: openmm.XmlSerializer.deserialize(text), path=path)
    if not isinstance(system, openmm.System):
        raise InputError(f"{xml_node.place} names {printable(path)}, which holds a serialized "
                         f"{type(system).__name__}, not a System.")
    structure = _read_structure(pdb_node, base_dir)
    box = structure.topology.getPeriodicBoxVectors()
    if box is not None and system.usesPeriodicBoundaryConditions():
        system.setDefaultPeriodicBoxVectors(*box)  # the structure holds the latest box
    positions = structure.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    return system, structure.topology, positions, pdb_node


_SOURCES = {"model": _from_model, "peptide": _from_peptide, "pdb": _from_pdb,
            "amber": _from_amber, "gromacs": _from_gromacs, "charmm": _from_charmm,
            "serialized": _from_serialized}


# -- force fields, solvent, nonbonded options ----------------------------------------
def _forcefield_entries(spec, base_dir, *, implicit=True):
    """``(place, file)`` pairs: the listed force fields, then the implicit-solvent file."""
    ff_node = spec.get("forcefield", list(DEFAULT_FORCEFIELD))
    items = [ff_node] if isinstance(ff_node.value, str) else ff_node.sequence(min_length=1)
    entries = []
    for item in items:
        entries.append((item.place, _forcefield_file(item, base_dir)))
    implicit_node = spec.get("implicit_solvent", "none")
    name = implicit_node.text(choices=IMPLICIT_SOLVENTS)
    if implicit and name != "none":
        entries.append((implicit_node.place, f"implicit/{name}.xml"))
    return entries


def _forcefield_file(item, base_dir):
    """The force field file beside the spec, else the name for OpenMM to look up.

    A FIFO, a device or a folder is refused, also under the name as OpenMM would open it
    (from the working folder): reading one may block or never end.
    """
    local = item.path_value(base_dir)
    for path in (local,) if local.is_file() else (local, Path(item.text())):
        if path.exists() and file_problem(path) is not None:
            raise InputError(f"{item.place} names {printable(path)}, which {file_problem(path)}.")
    return str(local) if local.is_file() else item.text()


def _load_forcefield(ff_node, entries):
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
        raise ProtocolError(f"{ff_node.place}: the force field files {', '.join(files)} "
                            f"cannot be combined ({_one_line(err)}).") from None


@contextmanager
def _template_errors(ff_node, entries):
    """Name the force field files when OpenMM finds no template for a residue."""
    try:
        yield
    except BoostError:
        raise
    except ValueError as err:
        files = ", ".join(name for _, name in entries)
        raise ProtocolError(f"{ff_node.place} cannot parametrize this structure: "
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
def _openmm_errors(spec, src):
    """Turn OpenMM's createSystem failures on file-based sources into one line."""
    try:
        yield
    except BoostError:
        raise
    except ValueError as err:
        raise ProtocolError(f"{spec.place}: OpenMM cannot build this system "
                            f"({_one_line(err)}).") from None
    except Exception as err:  # a malformed file often fails only here
        raise InputError(f"{src.place}: OpenMM cannot build a System from these files "
                         f"({type(err).__name__}: {_one_line(err)}).") from None


def _parametrize(spec, topology, positions, base_dir):
    """Force field (+ water box) -> System for pdb and peptide sources."""
    ff_node = spec.get("forcefield", list(DEFAULT_FORCEFIELD))
    entries = _forcefield_entries(spec, base_dir)
    forcefield = _load_forcefield(ff_node, entries)
    if spec.has("water_box"):
        if spec.get("implicit_solvent", "none").value != "none":
            raise ProtocolError(f"{spec.get('water_box').place} cannot be combined with "
                                "implicit_solvent: choose one kind of solvent.")
        forcefield, topology, positions = _add_water(
            spec.get("water_box"), ff_node, entries, forcefield, topology, positions)
    with _template_errors(ff_node, entries):
        system = forcefield.createSystem(topology, **_create_options(spec, topology))
    return system, topology, positions


def _add_water(node, ff_node, entries, forcefield, topology, positions):
    """Solvate in a cubic water box; adds the water model's force field file if needed."""
    node.mapping(allowed=("padding", "water_model", "ionic_strength"))
    padding = node.get("padding", "1 nm").quantity("length", positive=True)
    model = node.get("water_model", "tip3p").text(choices=WATER_MODELS)
    ionic = node.get("ionic_strength", "0 molar").quantity("concentration", non_negative=True)
    if not _knows_water(forcefield, model):
        candidates = [f"amber14/{model}.xml", f"{model}.xml"]
        name = next(c for c in candidates if (_OPENMM_DATA / c).is_file())
        entries.append((node.get("water_model", model).place, name))
        forcefield = _load_forcefield(ff_node, entries)
    modeller = app.Modeller(topology, np.asarray(positions) * unit.nanometer)
    with _template_errors(ff_node, entries), _fixed_random():
        modeller.addSolvent(forcefield, model=model, padding=padding * unit.nanometer,
                            ionicStrength=ionic * unit.molar)
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


def _nonbonded(node, box):
    """OpenMM nonbonded method and cutoff; ``box`` is the (3, 3) nm box or None."""
    node.mapping(allowed=("method", "cutoff"))
    method_node = node.get("method", "pme" if box is not None else "no_cutoff")
    method = method_node.text(choices=NONBONDED_METHODS)
    if method == "pme" and box is None:
        raise ProtocolError(f"{method_node.place} is 'pme', which needs a periodic box, and "
                            "this system has none. Use 'no_cutoff' or 'cutoff', or add a box.")
    if method == "no_cutoff":
        if node.has("cutoff"):
            raise ProtocolError(f"{node.get('cutoff').place} does not apply with method "
                                "'no_cutoff'. Remove it or choose 'cutoff' or 'pme'.")
        return app.NoCutoff, 1.0 * unit.nanometer
    cutoff_node = node.get("cutoff", "1 nm")
    cutoff = cutoff_node.quantity("length", positive=True)
    if box is not None and cutoff > 0.5 * box.diagonal().min():
        raise ProtocolError(f"{cutoff_node.place} must be at most half the box width "
                            f"({0.5 * box.diagonal().min():.4g} nm). Got {cutoff:.4g} nm instead; "
                            "give a shorter cutoff, a bigger box or method 'no_cutoff'.")
    if method == "pme":
        return app.PME, cutoff * unit.nanometer
    return (app.CutoffPeriodic if box is not None else app.CutoffNonPeriodic), cutoff * unit.nanometer


def _create_options(spec, topology, *, implicit=False):
    """createSystem keywords: nonbonded method and cutoff, constraints, implicit solvent."""
    method, cutoff = _nonbonded(spec.get("nonbonded", {}), _box_array(topology))
    options = {"nonbondedMethod": method, "nonbondedCutoff": cutoff,
               "constraints": _constraints(spec)}
    if implicit:
        name = spec.get("implicit_solvent", "none").text(choices=IMPLICIT_SOLVENTS)
        options["implicitSolvent"] = _IMPLICIT_OPENMM.get(name)
    return options


def _constraints(spec):
    return CONSTRAINTS[spec.get("constraints", "h_bonds").text(choices=tuple(CONSTRAINTS))]


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


def _finish(system, topology, positions, title, coordinates_node):
    positions = np.array(positions, dtype=float).reshape(-1, 3)
    n_particles = system.getNumParticles()
    for count, what in ((positions.shape[0], "coordinates"), (topology.getNumAtoms(), "topology")):
        if count != n_particles:
            raise InputError(f"{coordinates_node.place}: the {what} hold {count} atoms, but the "
                             f"system has {n_particles} particles.")
    if not np.all(np.isfinite(positions)):
        raise InputError(f"{coordinates_node.place}: the coordinates are not all finite numbers.")
    box = None
    if system.usesPeriodicBoundaryConditions():
        vectors = system.getDefaultPeriodicBoxVectors()
        box = _box_array_of(vectors)
    else:
        vectors = None  # a box the system does not use would only mislead later readers
    topology.setPeriodicBoxVectors(vectors)
    return BuiltSystem(system=system, topology=topology, positions=positions,
                       box_vectors=box, title=title)
