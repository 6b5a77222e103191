"""Protocol files: YAML -> validated, frozen protocol objects.

A protocol fully determines a run: the system, the coordinates, the conditions (the
temperature ladder times the solute rungs times the umbrella windows), how long to run, what to analyse and the
seed. Every input check happens here (the system spec's in :mod:`boost.system_spec`), so
later stages trust what they are given; the only checks left for later need the built system
(atom selections, see :func:`resolve_coordinates`) or the contents of its files.

Internal units: nm, ps, K, kJ/mol, rad, bar.
"""

import hashlib
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .exceptions import ProtocolError
from .limits import (MAX_ATOM_INDEX, MAX_COUNT, MAX_SEED, MAX_SPEC_BYTES, MAX_SWAP_ATTEMPTS, MAX_TITLE_LENGTH, check_conditions,
                     check_swap_proposals)
from .solute_spec import read_solute_spec
from .spec import Node, parse_yaml, read_text
from .system_spec import read_system_spec

SCHEMA_VERSION = 1
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")   # used with match(); \Z refuses "x\n"
_SAME_ANGLE = 1e-9     # rad: dihedral window centres closer than this (modulo 360 deg) are one centre
# ledger column names (a coordinate's values get a column named after it)
_RESERVED = {"cycle", "walker", "condition", "potential", "volume", "reduced", "time", "production",
             "solute_cross", "solute_inner"}
_POINT_COUNT = {"distance": 2, "angle": 3, "dihedral": 4, "position": 1}
_AXES = {"x": 0, "y": 1, "z": 2}
_RANGES = {"dihedral": (-math.pi, math.pi, "-180 deg to 180 deg"), "angle": (0.0, math.pi, "0 deg to 180 deg"),
           "distance": (0.0, math.inf, "0 nm or more")}
TOP_KEYS = ("protocol", "title", "system", "seed", "temperature", "timestep", "friction",
            "pressure", "platform", "coordinates", "flat_bottom", "umbrella", "temperatures",
            "exchange", "run", "basins", "analysis", "solute")


@dataclass(frozen=True)
class PointSpec:
    """One point of a coordinate: an atom selection, or the mass-weighted centre of one."""

    atoms: object          # mdtraj selection text, an int index, or a tuple of ints
    centre: bool           # True: centre of all selected atoms; False: exactly one atom
    place: str = field(compare=False)   # file: key.path, for errors found when resolving


@dataclass(frozen=True)
class CoordinateSpec:
    """A coordinate as written in the protocol, before atoms are resolved."""

    name: str
    kind: str                                    # distance | angle | dihedral | position | combination
    points: tuple = ()                           # tuple[PointSpec, ...]
    axis: int | None = None
    terms: tuple = ()                            # tuple[(coefficient, name), ...] for combination
    unit: str = "nm"                             # 'nm' or 'rad'

    @property
    def periodic(self):
        return self.kind == "dihedral"

    @property
    def value_dimension(self):
        return "angle" if self.unit == "rad" else "length"

    @property
    def spring_dimension(self):
        return "spring_angle" if self.unit == "rad" else "spring_length"


#: Keys of earlier versions of the schema and what replaces them (an error names the new one).
RENAMED_TOP_KEYS = {"walls": "flat_bottom (a list of {coordinate, from, to, spring})"}
RENAMED_RUN_KEYS = {"checkpoint_interval": "run.checkpoint_every", "frame_interval": "run.frame_every"}
EXCHANGE_PAIRS = ("adjacent", "any")


@dataclass(frozen=True)
class FlatBottom:
    """A flat-bottom restraint on a coordinate: zero between its bounds, harmonic outside.

    Present in every condition, so part of the ensemble that is analysed.
    """

    coordinate: str
    lower: float | None
    upper: float | None
    spring: float


@dataclass(frozen=True)
class UmbrellaAxis:
    """Umbrella windows along one coordinate: one centre and spring per window."""

    coordinate: str
    centres: tuple
    springs: tuple


@dataclass(frozen=True)
class ExchangeSettings:
    pairs: str             # 'adjacent' (neighbours on the ladder) or 'any' (every pair)
    attempts: int          # swap attempts per cycle


@dataclass(frozen=True)
class PlatformSettings:
    name: str              # 'auto', 'Reference' or 'CPU'
    threads: int | None
    deterministic: bool
    workers: object = "auto"   # worker processes: 'auto' or a whole number


@dataclass(frozen=True)
class RunSettings:
    steps_per_cycle: int
    equilibration_cycles: int
    production_cycles: int
    frame_every: int       # cycles between frames; 0 = no frames
    checkpoint_every: int  # cycles between checkpoints
    minimise: bool
    retries: int           # restarts from the last checkpoint after a blow-up
    builds_on: str | None = None   # an earlier run folder whose conditions this run adds to, as written

    @property
    def n_cycles(self):
        return self.equilibration_cycles + self.production_cycles


@dataclass(frozen=True)
class Bins:
    coordinate: str
    edges: tuple           # bin edges in nm or rad


MIN_ANALYSIS_MEMORY = 512 * 2**20
UNCERTAINTY_METHODS = ("auto", "asymptotic", "bootstrap")
#: Bounds on analysis.uncertainty.resamples: fewer than 20 make no 95 % interval.
MIN_RESAMPLES, MAX_RESAMPLES = 20, 100_000


@dataclass(frozen=True)
class UncertaintySettings:
    method: str = "auto"     # 'auto' (bootstrap with exchange, else asymptotic), 'asymptotic', 'bootstrap'
    resamples: int = 200     # bootstrap replicates
    block_cycles: int = 0    # bootstrap block length in cycles; 0: chosen from the data


@dataclass(frozen=True)
class AnalysisSettings:
    bins: tuple            # tuple[Bins, ...]; empty: chosen from the data
    energy_unit: str       # 'kJ/mol', 'kcal/mol' or 'kT'
    memory: float = 2**30  # bytes the analysis may use (MBAR's samples are thinned to fit)
    uncertainty: UncertaintySettings = UncertaintySettings()


@dataclass(frozen=True)
class Protocol:
    """A validated protocol. Quantities in nm, ps, K, kJ/mol, rad, bar."""

    path: Path
    text: str
    sha256: str
    title: str
    seed: int
    temperature: float
    timestep: float
    friction: float
    pressure: float | None
    system: object         # boost.system_spec.SystemSpec (or MissingSystemFile)
    coordinates: dict
    flat_bottom: tuple     # tuple[FlatBottom, ...]
    umbrella: tuple
    temperatures: tuple
    exchange: ExchangeSettings | None
    platform: PlatformSettings
    run: RunSettings
    basins: dict           # name -> {coordinate: (lower, upper)}
    analysis: AnalysisSettings
    solute: object = None  # boost.solute_spec.SoluteSpec, or None: no solute scaling

    @property
    def base_dir(self):
        return self.path.parent

    @property
    def source_folder(self):
        """The run folder ``run.builds_on`` names, resolved against this protocol's folder (or None)."""
        if self.run.builds_on is None:
            return None
        path = Path(self.run.builds_on).expanduser()
        return path if path.is_absolute() else self.base_dir / path

    @property
    def n_windows(self):
        return math.prod(len(axis.centres) for axis in self.umbrella) if self.umbrella else 1


def load_protocol(path):
    """Read, parse and validate a protocol file.

    Raises
    ------
    ProtocolError, InputError
        One line naming the file, the key path and what was expected.
    """
    path = Path(path)
    text = read_text(path, "protocol", max_bytes=MAX_SPEC_BYTES)
    return parse_protocol(text, path)


def parse_protocol(text, path):
    """Validate protocol ``text`` as if read from ``path`` (for messages and relative paths)."""
    path = Path(path)
    root = parse_yaml(text, path)
    root.mapping(allowed=TOP_KEYS, required=("protocol", "system", "seed", "temperature", "timestep", "run"),
                 renamed=RENAMED_TOP_KEYS)
    version = root.get("protocol")
    if isinstance(version.value, bool) or version.value != SCHEMA_VERSION:   # true == 1 in Python
        version.fail(f"the schema version {SCHEMA_VERSION}")
    temperature = root.get("temperature").quantity("temperature", positive=True)
    coordinates = _read_coordinates(root.get("coordinates", {}))
    timestep = root.get("timestep").quantity("time", positive=True)
    pressure = None
    if root.has("pressure"):
        pressure = root.get("pressure").quantity("pressure", positive=True)
    umbrella = _read_umbrella(root.get("umbrella", {}), coordinates)
    temperatures = _read_temperatures(root.get("temperatures", None), temperature)
    exchange = _read_exchange(root.get("exchange", None))
    solute = read_solute_spec(root.get("solute", None), temperature)
    ladder = "umbrella" if umbrella else "solute" if solute else "temperatures"
    n_conditions = check_conditions(root.get(ladder, None), len(temperatures), [len(axis.centres) for axis in umbrella],
                                    n_scales=len(solute.scales) if solute else 1)
    if exchange is not None and n_conditions < 2:
        root.get("exchange").fail("used with a ladder: a 'temperatures' list, 'solute' scales or 'umbrella' "
                                  "windows along a coordinate, which this protocol lacks")
    if exchange is not None and exchange.pairs == "any":
        check_swap_proposals(root.get("exchange"), exchange.attempts, n_conditions)   # one walker each
    run = _read_run(root.get("run"), timestep)
    return Protocol(
        path=path, text=text, sha256=hashlib.sha256(text.encode()).hexdigest(),
        title=_read_title(root), seed=root.get("seed").integer(minimum=0, maximum=MAX_SEED),
        temperature=temperature, timestep=timestep,
        friction=root.get("friction", "1/ps").quantity("rate", positive=True),
        pressure=pressure, system=read_system_spec(root.get("system"), path.parent), coordinates=coordinates,
        flat_bottom=_read_flat_bottom(root.get("flat_bottom", []), coordinates),
        umbrella=umbrella, temperatures=temperatures, exchange=exchange,
        platform=_read_platform(root.get("platform", {})),
        run=run,
        basins=_read_basins(root.get("basins", {}), coordinates),
        analysis=_read_analysis(root.get("analysis", {}), coordinates, run, timestep),
        solute=solute,
    )


def _read_title(root):
    return root.get("title", "untitled").line(MAX_TITLE_LENGTH)


# -- coordinates ----------------------------------------------------------------------
def _read_coordinates(node):
    specs = {}
    for name, entry in node.items():
        if not isinstance(name, str) or not _NAME.match(name) or name in _RESERVED:
            entry.fail("named by an identifier (letters, digits, _; not " + ", ".join(sorted(_RESERVED)) + ")",
                       got=name)
        kinds = [*_POINT_COUNT, "combination"]
        entry.mapping(allowed=[*kinds, "axis"])
        given = [kind for kind in kinds if entry.has(kind)]
        if len(given) != 1:
            entry.fail("a mapping with exactly one of " + ", ".join(kinds), got=entry.value)
        kind = given[0]
        if kind == "combination":
            specs[name] = _read_combination(name, entry.get(kind), specs)
            continue
        if kind != "position" and entry.has("axis"):
            raise ProtocolError(f"{entry.get('axis').place} is only for a position coordinate.")
        body = entry.get(kind)
        points = [body] if kind == "position" else body.sequence()
        if len(points) != _POINT_COUNT[kind]:
            body.fail(f"a list of {_POINT_COUNT[kind]} atoms or centres for a {kind}")
        axis = None
        if kind == "position":
            axis = _AXES[entry.get("axis").text(choices=tuple(_AXES))]
        specs[name] = CoordinateSpec(
            name=name, kind=kind, points=tuple(_read_point(p) for p in points), axis=axis,
            unit="rad" if kind in ("angle", "dihedral") else "nm")
    return specs


def _read_point(node):
    value = node.value
    if isinstance(value, dict):
        node.mapping(allowed=("centre",), required=("centre",))
        inner = node.get("centre")
        if isinstance(inner.value, list):
            indices = tuple(_index(item) for item in inner.sequence(min_length=1))
            return PointSpec(atoms=indices, centre=True, place=inner.place)
        return PointSpec(atoms=inner.text(), centre=True, place=inner.place)
    if isinstance(value, int) and not isinstance(value, bool):
        return PointSpec(atoms=_index(node), centre=False, place=node.place)
    if isinstance(value, str) and value.strip():
        return PointSpec(atoms=value, centre=False, place=node.place)
    node.fail("an mdtraj selection text, a 0-based atom index, or {centre: selection}")


def _index(node):
    return node.integer(minimum=0, maximum=MAX_ATOM_INDEX)


def _read_combination(name, node, known):
    terms = []
    for other, coefficient in node.items():
        if other not in known or known[other].kind == "combination":
            coefficient.fail("a coefficient of a coordinate defined above it (not a combination)", got=other)
        terms.append((coefficient.number(), other))
    if not terms:
        node.fail("a mapping of coordinate names to coefficients")
    units = {known[other].unit for _, other in terms}
    if len(units) != 1:
        node.fail("a combination of coordinates with the same unit (all lengths or all angles)")
    return CoordinateSpec(name=name, kind="combination", terms=tuple(terms), unit=units.pop())


def _coordinate(node, coordinates):
    name = node.text()
    if name not in coordinates:
        known = ", ".join(coordinates) or "none defined"
        node.fail(f"the name of a coordinate under 'coordinates' ({known})")
    return coordinates[name]


# -- biases ---------------------------------------------------------------------------
def _read_flat_bottom(node, coordinates):
    restraints = []
    for entry in node.sequence():
        entry.mapping(allowed=("coordinate", "from", "to", "spring"), required=("coordinate", "spring"),
                      renamed={"lower": "'from'", "upper": "'to'"})
        coordinate = _coordinate(entry.get("coordinate"), coordinates)
        if coordinate.periodic:
            entry.get("coordinate").fail("a non-periodic coordinate (flat-bottom restraints on a dihedral "
                                         "are not supported)")
        bounds = [entry.get(key).quantity(coordinate.value_dimension) if entry.has(key) else None
                  for key in ("from", "to")]
        if bounds == [None, None]:
            entry.fail("a flat-bottom restraint with a 'from' or a 'to' bound (or both)")
        if None not in bounds and bounds[0] >= bounds[1]:
            entry.get("to").fail("above 'from'")
        spring = entry.get("spring").quantity(coordinate.spring_dimension, positive=True)
        restraints.append(FlatBottom(coordinate.name, bounds[0], bounds[1], spring))
    return tuple(restraints)


def _read_umbrella(node, coordinates):
    axes = []
    for name, entry in node.items():
        coordinate = _coordinate(Node(name, node.file, entry.path), coordinates)
        entry.mapping(allowed=("centres", "spring"), required=("centres", "spring"))
        centres = _read_centres(entry.get("centres"), coordinate)
        springs = _read_springs(entry.get("spring"), coordinate, len(centres))
        _check_distinct_windows(entry, coordinate, centres, springs)
        axes.append(UmbrellaAxis(coordinate.name, centres, springs))
    if len(axes) > 2:
        node.fail("windows along one coordinate or a grid over two")
    return tuple(axes)


def _check_distinct_windows(node, coordinate, centres, springs):
    """Refuse two windows with the same spring and centre; on a dihedral, centres 360 deg apart."""
    period = 2 * math.pi if coordinate.periodic else None
    by_spring = {}
    for i, spring in enumerate(springs):
        by_spring.setdefault(spring, []).append(i)
    for indices in by_spring.values():
        keys = sorted((centres[i] % period if period else centres[i], i) for i in indices)
        if period:
            keys.append((keys[0][0] + period, keys[0][1]))      # the circle closes
        for (a, i), (b, j) in zip(keys, keys[1:]):
            if i != j and b - a <= (_SAME_ANGLE if period else 0.0):
                i, j = sorted((i, j))
                modulo = " (modulo 360 deg on a dihedral)" if period else ""
                raise ProtocolError(
                    f"{node.place} must be windows that differ in centre{modulo} or spring. Got centres[{i}] "
                    f"({_show_centre(centres[i], coordinate)}) and centres[{j}] "
                    f"({_show_centre(centres[j], coordinate)}) with the same spring instead.")


def _show_centre(value, coordinate):
    return f"{math.degrees(value):g} deg" if coordinate.unit == "rad" else f"{value:g} nm"


def _read_centres(node, coordinate):
    dimension = coordinate.value_dimension
    if isinstance(node.value, list):
        centres = tuple(item.quantity(dimension) for item in node.sequence(min_length=1, max_length=MAX_COUNT))
    else:
        node.mapping(allowed=("from", "to", "count"), required=("from", "to", "count"))
        start = node.get("from").quantity(dimension)
        stop = node.get("to").quantity(dimension)
        count = node.get("count").integer(minimum=2, maximum=MAX_COUNT)
        if stop <= start:
            node.get("to").fail("above 'from'")
        if not math.isfinite(stop - start):
            node.fail("a range of finite width")
        centres = tuple(np.linspace(start, stop, count).tolist())
    low, high, what = _RANGES.get(coordinate.kind, (-math.inf, math.inf, ""))
    if any(not low - 1e-9 <= c <= high + 1e-9 for c in centres):
        node.fail(f"centres within the range of {coordinate.name}, a {coordinate.kind} ({what})")
    return centres


def _read_springs(node, coordinate, count):
    dimension = coordinate.spring_dimension
    if isinstance(node.value, list):
        if len(node.value) != count:
            node.fail(f"one spring constant, or a list of {count} (one per window)")
        return tuple(item.quantity(dimension, positive=True) for item in node.sequence())
    return (node.quantity(dimension, positive=True),) * count


def _read_temperatures(node, temperature):
    if node.value is None:
        return (temperature,)
    if isinstance(node.value, list):
        ladder = tuple(item.quantity("temperature", positive=True)
                       for item in node.sequence(min_length=2, max_length=MAX_COUNT))
    else:
        node.mapping(allowed=("lowest", "highest", "count"), required=("lowest", "highest", "count"))
        lowest = node.get("lowest").quantity("temperature", positive=True)
        highest = node.get("highest").quantity("temperature", positive=True)
        count = node.get("count").integer(minimum=2, maximum=MAX_COUNT)
        if highest <= lowest:
            node.get("highest").fail("above 'lowest'")
        ladder = tuple(np.geomspace(lowest, highest, count).tolist())
    if any(b <= a for a, b in zip(ladder, ladder[1:])):
        node.fail("a strictly increasing list of temperatures")
    return ladder


def _read_exchange(node):
    if node.value is None:
        return None
    node.mapping(allowed=("pairs", "attempts"),
                 renamed={"scheme": "exchange.pairs (adjacent: neighbours on the ladder; any: every pair)"})
    pairs = node.get("pairs", "adjacent").text(choices=EXCHANGE_PAIRS)
    attempts = node.get("attempts", 1).integer(minimum=1, maximum=MAX_SWAP_ATTEMPTS)
    return ExchangeSettings(pairs=pairs, attempts=attempts)


def _read_platform(node):
    if isinstance(node.value, str):
        node = Node({"name": node.value}, node.file, node.path)
    node.mapping(allowed=("name", "threads", "deterministic", "workers"))
    name = node.get("name", "auto").text(choices=("auto", "Reference", "CPU"))
    threads = node.get("threads", None)
    workers = node.get("workers", "auto")
    return PlatformSettings(
        name=name, threads=None if threads.value is None else threads.integer(minimum=1),
        deterministic=node.get("deterministic", True).boolean(),
        workers="auto" if workers.value == "auto" else workers.integer(minimum=1))


# -- run length -----------------------------------------------------------------------
def _steps(node, timestep, what):
    value = node.quantity("time", non_negative=True)
    steps = value / timestep
    if not math.isfinite(steps) or abs(steps - round(steps)) > 1e-6 * max(1.0, steps):
        node.fail(f"a whole number of timesteps ({timestep * 1000:g} fs) for {what}")
    return int(round(steps))


def _cycles(node, steps_per_cycle, timestep, what):
    steps = _steps(node, timestep, what)
    if steps % steps_per_cycle:
        node.fail(f"a whole number of cycles ({steps_per_cycle * timestep:g} ps each) for {what}")
    return steps // steps_per_cycle


#: Without run.checkpoint_every, a checkpoint about this often (ps), at a whole number of cycles.
DEFAULT_CHECKPOINT_PS = 10.0


def _interval(node, steps_per_cycle, timestep, what, hint=""):
    """Cycles between two writes: at least one (0 would not mean 'never' nor 'every cycle')."""
    cycles = _cycles(node, steps_per_cycle, timestep, what)
    if cycles < 1:
        node.fail(f"at least one cycle ({steps_per_cycle * timestep:g} ps){hint}")
    return cycles


def _read_run(node, timestep):
    node.mapping(allowed=("cycle", "equilibration", "production", "frame_every",
                          "checkpoint_every", "minimise", "retries", "builds_on"), required=("production",),
                 renamed=RENAMED_RUN_KEYS)
    steps_per_cycle = _steps(node.get("cycle", "1 ps"), timestep, "a cycle")
    if steps_per_cycle < 1:
        node.get("cycle", "1 ps").fail("at least one timestep")
    production = _cycles(node.get("production"), steps_per_cycle, timestep, "the production")
    if production < 1:
        node.get("production").fail("at least one cycle long")
    frames = node.get("frame_every", None)
    return RunSettings(
        steps_per_cycle=steps_per_cycle,
        equilibration_cycles=_cycles(node.get("equilibration", "0 ps"), steps_per_cycle, timestep,
                                     "the equilibration"),
        production_cycles=production,
        frame_every=0 if frames.value is None else _interval(frames, steps_per_cycle, timestep,
                                                             "the frame interval", " (leave it out for no frames)"),
        checkpoint_every=_interval(node.get("checkpoint_every"), steps_per_cycle, timestep, "the checkpoint interval")
        if node.has("checkpoint_every") else max(1, round(DEFAULT_CHECKPOINT_PS / (steps_per_cycle * timestep))),
        minimise=node.get("minimise", True).boolean(),
        retries=node.get("retries", 0).integer(minimum=0),
        builds_on=_read_source_folder(node.get("builds_on", None)),
    )


def _read_source_folder(node):
    """run.builds_on: a run folder's path as written (resolved against the protocol's folder
    when the run is planned; boost.lineage checks the folder itself)."""
    if node.value is None:
        return None
    text = node.text()
    if not text.strip():
        node.fail("the path of an earlier run folder")
    return text


# -- analysis -------------------------------------------------------------------------
def _read_interval(node, coordinate):
    items = node.sequence()
    if len(items) != 2:
        node.fail(f"a list of two {coordinate.value_dimension}s [lower, upper]")
    lower, upper = (item.quantity(coordinate.value_dimension) for item in items)
    if lower == upper or (lower > upper and not coordinate.periodic):
        node.fail("[lower, upper] with lower below upper (only a dihedral interval may wrap)")
    return lower, upper


def _read_basins(node, coordinates):
    basins = {}
    for name, entry in node.items():
        if not isinstance(name, str) or not name.strip() or not name.isprintable():
            entry.fail("named by a non-empty, printable text", got=name)   # it heads table columns
        intervals = {}
        for coordinate_name, interval in entry.items():
            coordinate = _coordinate(Node(coordinate_name, node.file, interval.path), coordinates)
            intervals[coordinate.name] = _read_interval(interval, coordinate)
        if not intervals:
            entry.fail("a mapping of coordinate names to [lower, upper] intervals")
        for other, other_intervals in basins.items():
            if _boxes_overlap(intervals, other_intervals, coordinates):
                entry.fail(f"disjoint from basin '{other}' (they overlap)", got=entry.value)
        basins[name] = intervals
    return basins


def _segments(interval, periodic):
    lower, upper = interval
    if periodic and lower > upper:                   # wraps through ±180 deg
        return [(lower, math.pi), (-math.pi, upper)]
    return [(lower, upper)]


def _boxes_overlap(a, b, coordinates):
    """Whether two basins given on the same coordinates share any region."""
    if set(a) != set(b):
        return False                                 # cannot tell without samples; analysis checks
    for name in a:
        periodic = coordinates[name].periodic
        if not any(lo1 < hi2 and lo2 < hi1 for lo1, hi1 in _segments(a[name], periodic)
                   for lo2, hi2 in _segments(b[name], periodic)):
            return False
    return True


def _read_analysis(node, coordinates, run, timestep):
    node.mapping(allowed=("bins", "energy_unit", "memory", "uncertainty"))
    bins = []
    for name, entry in node.get("bins", {}).items():
        coordinate = _coordinate(Node(name, node.file, entry.path), coordinates)
        entry.mapping(allowed=("from", "to", "count"), required=("from", "to", "count"))
        start = entry.get("from").quantity(coordinate.value_dimension)
        stop = entry.get("to").quantity(coordinate.value_dimension)
        if stop <= start:
            entry.get("to").fail("above 'from'")
        if not math.isfinite(stop - start):
            entry.fail("a range of finite width")
        count = entry.get("count").integer(minimum=1, maximum=MAX_COUNT)
        bins.append(Bins(coordinate.name, tuple(np.linspace(start, stop, count + 1).tolist())))
    unit = node.get("energy_unit", "kJ/mol").text(choices=("kJ/mol", "kcal/mol", "kT"))
    memory = node.get("memory", "1 GiB").quantity("memory", positive=True)
    if memory < MIN_ANALYSIS_MEMORY:
        node.get("memory").fail(f"at least {MIN_ANALYSIS_MEMORY // 2**20} MiB (the analysis needs that much "
                                "before any sample)")
    return AnalysisSettings(bins=tuple(bins), energy_unit=unit, memory=memory,
                            uncertainty=_read_uncertainty(node.get("uncertainty", {}), run, timestep))


def _read_uncertainty(node, run, timestep):
    node.mapping(allowed=("method", "resamples", "block"))
    method = node.get("method", "auto").text(choices=UNCERTAINTY_METHODS)
    resamples = node.get("resamples", 200).integer(minimum=MIN_RESAMPLES, maximum=MAX_RESAMPLES)
    block = node.get("block", "auto")
    block_cycles = 0
    if block.value != "auto":
        cycle_ps = run.steps_per_cycle * timestep
        if not isinstance(block.value, str):
            block.fail(f"'auto' or a time such as '{20 * cycle_ps:g} ps'")
        block_cycles = _cycles(block, run.steps_per_cycle, timestep, "a bootstrap block")
        if not 1 <= block_cycles <= run.production_cycles:
            block.fail(f"between one cycle ({cycle_ps:g} ps) and the production "
                       f"({run.production_cycles * cycle_ps:g} ps)")
    return UncertaintySettings(method=method, resamples=resamples, block_cycles=block_cycles)


# -- atoms (needs the built topology) ---------------------------------------------------
def resolve_coordinates(protocol, topology):
    """Resolve every coordinate's atom selections on ``topology``.

    Parameters
    ----------
    protocol : Protocol
    topology : openmm.app.Topology

    Returns
    -------
    dict of str to boost.coordinates.Coordinate
    """
    import mdtraj

    from .coordinates import Coordinate

    md_topology = mdtraj.Topology.from_openmm(topology)
    resolved = {}
    for name, spec in protocol.coordinates.items():
        if spec.kind == "combination":
            terms = tuple((coefficient, resolved[other]) for coefficient, other in spec.terms)
            resolved[name] = Coordinate(name=name, kind="combination", terms=terms)
            continue
        groups = tuple(_resolve_point(point, md_topology) for point in spec.points)
        for i, group in enumerate(groups):
            for other in groups[i + 1:]:
                if group == other:
                    raise ProtocolError(f"{spec.points[i].place} names the same atoms as another point of '{name}'.")
        resolved[name] = Coordinate(name=name, kind=spec.kind, groups=groups, axis=spec.axis)
    return resolved


def _resolve_point(point, md_topology):
    n_atoms = md_topology.n_atoms
    if isinstance(point.atoms, str):
        try:
            indices = tuple(int(i) for i in md_topology.select(point.atoms))
        except Exception as err:  # mdtraj raises several types for a bad selection
            raise ProtocolError(f"{point.place} must be an mdtraj selection. "
                                f"Got {point.atoms!r}, which mdtraj cannot read ({err}).") from None
    else:
        indices = point.atoms if isinstance(point.atoms, tuple) else (point.atoms,)
        bad = [i for i in indices if i >= n_atoms]
        if bad:
            raise ProtocolError(f"{point.place} must be atom indices below {n_atoms} (the system's atom count). "
                                f"Got {bad[0]} instead.")
    if not indices:
        raise ProtocolError(f"{point.place} must select at least one atom. Got {point.atoms!r}, which matches none.")
    if not point.centre and len(indices) != 1:
        raise ProtocolError(f"{point.place} must select exactly one atom (use {{centre: ...}} for a group). "
                            f"Got {point.atoms!r}, which matches {len(indices)}.")
    return indices
