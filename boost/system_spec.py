"""System specs: YAML -> a frozen, validated :class:`SystemSpec` (:mod:`boost.systems` builds it).

A system spec is a YAML mapping, in a file of its own (the bundled ones live in the
repository's ``systems/`` folder) or written inline in a protocol. It has exactly one
source key, which says where the atoms and their parameters come from:

``model``       an analytic model potential (:mod:`boost.models`)
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
tip3p, no salt; nonbonded pme with a box, else no_cutoff, cutoff 1 nm; constraints h_bonds.

Everything written in a spec is checked here, when the protocol is loaded: keys, types,
units, ranges, the options a source accepts, residue names, and that a named path which
exists is a regular file (a folder for ``include_dir``), looked at but never opened.
Files are opened only when the system is built, which reports what only their contents
can tell (a malformed file, a residue without a template, a cutoff longer than half the
box) and a named file that does not exist: a protocol copy in a run folder stands away
from its files and is still read for the analysis. No OpenMM here.
"""

import os
from dataclasses import dataclass, field
from pathlib import Path

from .builder import check_sequence
from .bundled import bundled_folder
from .exceptions import InputError, ProtocolError, printable
from .limits import MAX_TITLE_LENGTH
from .models import model_parameters, read_model
from .spec import FOLDER, MISSING_FILE, file_problem, load_yaml
from .units import format_quantity

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
#: Water models for which OpenMM's Modeller ships an equilibrated box.
WATER_MODELS = ("tip3p", "spce", "tip4pew", "tip5p", "swm4ndp")
CONSTRAINT_NAMES = ("none", "h_bonds", "all_bonds", "h_angles")
NONBONDED_METHODS = ("no_cutoff", "cutoff", "pme")


# -- the spec ---------------------------------------------------------------------------
# Every ``place`` is 'file: key.path', for a one-line error when building fails on a file's
# contents. Places are left out of comparisons: specs that build the same system are equal.
@dataclass(frozen=True)
class FileRef:
    """A file (or folder) a spec names."""

    path: Path             # resolved against the folder of the file the spec is written in
    text: str              # as written
    place: str = field(compare=False)


@dataclass(frozen=True)
class ModelSource:
    model: object          # boost.models.DoubleWell, MullerBrown or HarmonicWell (MD units)
    place: str = field(compare=False)


@dataclass(frozen=True)
class PeptideSource:
    sequence: tuple        # residue names as written: ACE, amino acids, NME
    phi: object            # rad: one float for every residue between the caps, or a tuple, one each
    psi: object
    place: str = field(compare=False)


@dataclass(frozen=True)
class PdbSource:
    structure: FileRef     # PDB, or PDBx/mmCIF by its suffix

    @property
    def place(self):
        return self.structure.place


@dataclass(frozen=True)
class AmberSource:
    prmtop: FileRef
    inpcrd: FileRef
    place: str = field(compare=False)


@dataclass(frozen=True)
class GromacsSource:
    top: FileRef
    gro: FileRef
    include_dir: FileRef | None
    place: str = field(compare=False)


@dataclass(frozen=True)
class CharmmSource:
    psf: FileRef
    coordinates: FileRef   # crd/cor by suffix, else PDB or PDBx/mmCIF
    parameters: tuple      # tuple[FileRef, ...]: parameter and stream files
    box: tuple | None      # three edges in nm
    parameters_place: str = field(compare=False)
    place: str = field(compare=False)


@dataclass(frozen=True)
class SerializedSource:
    system: FileRef        # an OpenMM System in XML
    pdb: FileRef           # topology and positions (PDB or PDBx/mmCIF)
    place: str = field(compare=False)


_SOURCE_CLASSES = {"model": ModelSource, "peptide": PeptideSource, "pdb": PdbSource, "amber": AmberSource,
                   "gromacs": GromacsSource, "charmm": CharmmSource, "serialized": SerializedSource}


@dataclass(frozen=True)
class ForceFieldFile:
    name: str              # the file beside the spec (its full path), else a force field OpenMM ships
    text: str              # as written
    place: str = field(compare=False)


@dataclass(frozen=True)
class WaterBox:
    padding: float         # nm
    water_model: str       # one of WATER_MODELS
    ionic_strength: float  # mol/L
    place: str = field(compare=False)
    water_model_place: str = field(compare=False)


@dataclass(frozen=True)
class Nonbonded:
    method: str | None     # one of NONBONDED_METHODS; None: pme with a box, else no_cutoff
    cutoff: float | None   # nm; None: 1 nm where a cutoff applies
    method_place: str = field(compare=False)
    cutoff_place: str = field(compare=False)


@dataclass(frozen=True)
class SystemOptions:
    """The physics options; those a source does not accept keep their defaults, unused."""

    forcefield: tuple      # tuple[ForceFieldFile, ...]; empty for sources without a force field
    implicit_solvent: str  # one of IMPLICIT_SOLVENTS
    water_box: WaterBox | None
    nonbonded: Nonbonded
    constraints: str       # one of CONSTRAINT_NAMES
    forcefield_place: str = field(compare=False)
    implicit_solvent_place: str = field(compare=False)


@dataclass(frozen=True)
class SystemSpec:
    """A validated system spec: everything :func:`boost.systems.build_system` needs."""

    source: object         # one of ModelSource, PeptideSource, PdbSource, ... (see source_key)
    options: SystemOptions
    title: str             # '' when the spec has none
    reference: str | None  # the bundled name or spec file the protocol wrote; None: written inline
    place: str = field(compare=False)

    @property
    def source_key(self):
        return next(key for key, kind in _SOURCE_CLASSES.items() if isinstance(self.source, kind))


@dataclass(frozen=True)
class MissingSystemFile:
    """A protocol's ``system`` names a spec file that does not exist (building it raises ``message``)."""

    reference: str         # as written
    message: str


# -- bundled systems --------------------------------------------------------------------
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


# -- reading ----------------------------------------------------------------------------
def read_system_spec(node, base_dir):
    """Read and check the system a protocol names: a bundled name, a spec file or an inline spec.

    Parameters
    ----------
    node : boost.spec.Node
        Text (a path to a system YAML file relative to ``base_dir``, or the bare name of a
        bundled system when no such file exists) or a mapping (an inline spec).
    base_dir : path-like
        Folder of the file ``node`` is written in.

    Returns
    -------
    SystemSpec, or MissingSystemFile when the spec file named does not exist

    Raises
    ------
    ProtocolError, InputError
        One line naming the file, the key path and what was expected.
    """
    if isinstance(node.value, dict):
        return _read_spec(node, Path(base_dir), reference=None)
    if not isinstance(node.value, str) or not node.value.strip():
        node.fail("a system file, the name of a bundled system, or a mapping with a source key")
    path = _find_spec_file(node, base_dir)
    if isinstance(path, MissingSystemFile):
        return path
    try:
        root = load_yaml(path, what="system")
    except InputError as err:
        raise InputError(f"{node.place} names a file that cannot be read: {err}") from None
    return _read_spec(root, path.parent, reference=node.value)


def _find_spec_file(node, base_dir):
    path = node.path_value(base_dir)
    problem = file_problem(path)
    if problem is None:
        return path
    if problem != MISSING_FILE:
        raise InputError(f"{node.place} names {printable(path)}, which {problem}.")
    text = node.value.strip()
    if Path(text).name != text:
        return MissingSystemFile(node.value, f"{node.place} names {printable(path)}, which {problem}.")
    stem = text.removesuffix(".yaml")
    bundled = bundled_systems_folder() / f"{stem}.yaml"
    if file_problem(bundled) is None:
        return bundled
    names = ", ".join(sorted(p.stem for p in bundled_systems_folder().glob("*.yaml")))
    return MissingSystemFile(node.value, f"{node.place} names {printable(path)}, which does not exist, and no "
                                         f"bundled system is called '{printable(stem)}' (bundled: {names or 'none'}).")


def _read_spec(node, base_dir, reference):
    node.mapping(allowed=SPEC_KEYS)
    present = [key for key in SOURCE_KEYS if node.has(key)]
    if len(present) != 1:
        got = " and ".join(map(repr, present)) or "none of them"
        raise ProtocolError(f"{node.place} must have exactly one source key, one of "
                            f"{', '.join(SOURCE_KEYS)}. Got {got} instead.")
    key = present[0]
    allowed = OPTIONS_BY_SOURCE[key]
    for option in OPTION_KEYS:
        if node.has(option) and option not in allowed:
            raise ProtocolError(f"{node.get(option).place} does not apply to the '{key}' source. "
                                f"Options there: {', '.join(allowed) or 'none'}.")
    title = node.get("title").line(MAX_TITLE_LENGTH) if node.has("title") else ""
    source = _READERS[key](node.get(key), base_dir)
    return SystemSpec(source=source, options=_read_options(node, base_dir, allowed), title=title,
                      reference=reference, place=node.place)


def _file(node, base_dir, *, folder=False):
    """A path as written, refused now if something other than a file (a folder) is there."""
    path = node.path_value(base_dir)
    problem = file_problem(path)
    if folder and problem not in (FOLDER, MISSING_FILE):
        raise InputError(f"{node.place} names {printable(path)}, which is not an existing folder.")
    if not folder and problem not in (None, MISSING_FILE):
        raise InputError(f"{node.place} names {printable(path)}, which {problem}.")
    return FileRef(path=path, text=node.value, place=node.place)


def _read_model(node, base_dir):
    return ModelSource(model=read_model(node), place=node.place)


def _read_peptide(node, base_dir):
    node.mapping(allowed=("sequence", "phi", "psi"), required=("sequence",))
    written = node.get("sequence")
    if isinstance(written.value, str):
        sequence = written.text().split()
    else:
        sequence = [item.text() for item in written.sequence(min_length=1)]
    phi, psi = (_angles(node.get(key, "180 deg"), len(sequence) - 2) for key in ("phi", "psi"))
    try:
        check_sequence(sequence)
    except ProtocolError as err:
        reason = str(err).removeprefix("build_peptide: ")
        raise ProtocolError(f"{node.place} cannot be built: {reason}") from None
    return PeptideSource(sequence=tuple(sequence), phi=phi, psi=psi, place=node.place)


def _angles(node, count):
    """One angle, or a tuple of ``count`` angles (one per non-cap residue), in radians."""
    if not isinstance(node.value, list):
        return node.quantity("angle")
    if count >= 1 and len(node.value) != count:
        node.fail(f"one angle or a list of {count} angle{'s' if count != 1 else ''}, one per "
                  "residue between the caps")
    return tuple(item.quantity("angle") for item in node.sequence())


def _read_pdb(node, base_dir):
    return PdbSource(structure=_file(node, base_dir))


def _read_amber(node, base_dir):
    node.mapping(allowed=("prmtop", "inpcrd"), required=("prmtop", "inpcrd"))
    return AmberSource(prmtop=_file(node.get("prmtop"), base_dir), inpcrd=_file(node.get("inpcrd"), base_dir),
                       place=node.place)


def _read_gromacs(node, base_dir):
    node.mapping(allowed=("top", "gro", "include_dir"), required=("top", "gro"))
    include = _file(node.get("include_dir"), base_dir, folder=True) if node.has("include_dir") else None
    return GromacsSource(top=_file(node.get("top"), base_dir), gro=_file(node.get("gro"), base_dir),
                         include_dir=include, place=node.place)


def _read_charmm(node, base_dir):
    node.mapping(allowed=("psf", "coordinates", "parameters", "box"),
                 required=("psf", "coordinates", "parameters"))
    parameters = node.get("parameters")
    items = [parameters] if isinstance(parameters.value, str) else parameters.sequence(min_length=1)
    return CharmmSource(
        psf=_file(node.get("psf"), base_dir), coordinates=_file(node.get("coordinates"), base_dir),
        parameters=tuple(_file(item, base_dir) for item in items),
        box=_box_lengths(node.get("box")) if node.has("box") else None,
        parameters_place=parameters.place, place=node.place)


def _box_lengths(node):
    """A cube edge ("3 nm") or three rectangular edges, in nm."""
    if isinstance(node.value, list):
        if len(node.value) != 3:
            node.fail("one length (a cube) or a list of three lengths")
        return tuple(item.quantity("length", positive=True) for item in node.sequence())
    return (node.quantity("length", positive=True),) * 3


def _read_serialized(node, base_dir):
    node.mapping(allowed=("system", "pdb"), required=("system", "pdb"))
    return SerializedSource(system=_file(node.get("system"), base_dir), pdb=_file(node.get("pdb"), base_dir),
                            place=node.place)


_READERS = {"model": _read_model, "peptide": _read_peptide, "pdb": _read_pdb, "amber": _read_amber,
            "gromacs": _read_gromacs, "charmm": _read_charmm, "serialized": _read_serialized}


# -- options ----------------------------------------------------------------------------
def _read_options(node, base_dir, allowed):
    forcefield = node.get("forcefield", list(DEFAULT_FORCEFIELD))
    implicit = node.get("implicit_solvent", "none")
    water_box = _read_water_box(node.get("water_box")) if node.has("water_box") else None
    options = SystemOptions(
        forcefield=_read_forcefield(forcefield, base_dir) if "forcefield" in allowed else (),
        implicit_solvent=implicit.text(choices=IMPLICIT_SOLVENTS),
        water_box=water_box, nonbonded=_read_nonbonded(node.get("nonbonded", {})),
        constraints=node.get("constraints", "h_bonds").text(choices=CONSTRAINT_NAMES),
        forcefield_place=forcefield.place, implicit_solvent_place=implicit.place)
    if water_box is not None and options.implicit_solvent != "none":
        raise ProtocolError(f"{water_box.place} cannot be combined with implicit_solvent: "
                            "choose one kind of solvent.")
    return options


def _read_forcefield(node, base_dir):
    items = [node] if isinstance(node.value, str) else node.sequence(min_length=1)
    return tuple(_forcefield_file(item, base_dir) for item in items)


def _forcefield_file(item, base_dir):
    """The force field file beside the spec, else the name for OpenMM to look up.

    A FIFO, a device or a folder is refused, also under the name as OpenMM would open it
    (from the working folder): reading one may block or never end.
    """
    local = item.path_value(base_dir)
    if file_problem(local) is None:
        return ForceFieldFile(name=str(local), text=item.value, place=item.place)
    for path in (local, Path(item.value)):
        problem = file_problem(path)
        if problem not in (None, MISSING_FILE):
            raise InputError(f"{item.place} names {printable(path)}, which {problem}.")
    return ForceFieldFile(name=item.value, text=item.value, place=item.place)


def _read_water_box(node):
    node.mapping(allowed=("padding", "water_model", "ionic_strength"))
    model = node.get("water_model", "tip3p")
    return WaterBox(padding=node.get("padding", "1 nm").quantity("length", positive=True),
                    water_model=model.text(choices=WATER_MODELS),
                    ionic_strength=node.get("ionic_strength", "0 molar").quantity("concentration",
                                                                                  non_negative=True),
                    place=node.place, water_model_place=model.place)


def _read_nonbonded(node):
    node.mapping(allowed=("method", "cutoff"))
    method, cutoff = node.get("method", None), node.get("cutoff", None)
    if method.value is not None:
        method.text(choices=NONBONDED_METHODS)
    if method.value == "no_cutoff" and cutoff.value is not None:
        raise ProtocolError(f"{cutoff.place} does not apply with method 'no_cutoff'. "
                            "Remove it or choose 'cutoff' or 'pme'.")
    return Nonbonded(method=method.value,
                     cutoff=None if cutoff.value is None else cutoff.quantity("length", positive=True),
                     method_place=method.place, cutoff_place=cutoff.place)


# -- writing ----------------------------------------------------------------------------
def dump_system_spec(spec):
    """The value to write as a protocol's ``system`` that reads back to ``spec``.

    A system given by a bundled name or a spec file is written as that name or path;
    an inline spec as a mapping with every option its source accepts, units on every
    dimensional value, paths as written.

    Parameters
    ----------
    spec : SystemSpec or MissingSystemFile

    Returns
    -------
    str or dict
    """
    if spec.reference is not None:
        return spec.reference
    key = spec.source_key
    written = {"title": spec.title} if spec.title else {}
    written[key] = _DUMPERS[key](spec.source)
    written.update(_dump_options(spec.options, OPTIONS_BY_SOURCE[key]))
    return written


def _dump_model(source):
    return {"name": source.model.name, **{key: value if dimension is None else format_quantity(value, dimension)
                                          for key, dimension, value in model_parameters(source.model)}}


def _dump_angles(value):
    if isinstance(value, tuple):
        return [format_quantity(angle, "angle") for angle in value]
    return format_quantity(value, "angle")


def _dump_peptide(source):
    return {"sequence": list(source.sequence), "phi": _dump_angles(source.phi), "psi": _dump_angles(source.psi)}


def _dump_charmm(source):
    written = {"psf": source.psf.text, "coordinates": source.coordinates.text,
               "parameters": [item.text for item in source.parameters]}
    if source.box is not None:
        written["box"] = [format_quantity(edge, "length") for edge in source.box]
    return written


def _dump_gromacs(source):
    written = {"top": source.top.text, "gro": source.gro.text}
    if source.include_dir is not None:
        written["include_dir"] = source.include_dir.text
    return written


_DUMPERS = {
    "model": _dump_model, "peptide": _dump_peptide, "pdb": lambda source: source.structure.text,
    "amber": lambda source: {"prmtop": source.prmtop.text, "inpcrd": source.inpcrd.text},
    "gromacs": _dump_gromacs, "charmm": _dump_charmm,
    "serialized": lambda source: {"system": source.system.text, "pdb": source.pdb.text}}


def _dump_options(options, allowed):
    nonbonded = {}
    if options.nonbonded.method is not None:
        nonbonded["method"] = options.nonbonded.method
    if options.nonbonded.cutoff is not None:
        nonbonded["cutoff"] = format_quantity(options.nonbonded.cutoff, "length")
    box = options.water_box
    written = {
        "forcefield": [item.text for item in options.forcefield],
        "implicit_solvent": options.implicit_solvent,
        "water_box": box and {"padding": format_quantity(box.padding, "length"), "water_model": box.water_model,
                              "ionic_strength": format_quantity(box.ionic_strength, "concentration")},
        "nonbonded": nonbonded or None, "constraints": options.constraints}
    return {key: value for key, value in written.items() if key in allowed and value is not None}
