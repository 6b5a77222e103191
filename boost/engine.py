"""OpenMM contexts, integrators and platforms: one walker, one context, for the whole run.

The umbrella forces live in their own force group (:data:`BIAS_GROUP`), so the energy a
walker reports excludes them: the reduced potential of every condition is then computed
from that energy and the coordinate values (boost.conditions), with no re-evaluation.
With solute scaling a walker reports the physical energy and the two parts that the
solute scale multiplies (boost.solute_scaling), measured in one context whose own solute
scale is that of the condition it holds.
"""

import time
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import openmm
from openmm import unit

from .bias import build_umbrella_force, build_flat_bottom_force, centre_parameter, spring_parameter
from .cores import pinned, usable_cores
from .exceptions import ProtocolError, SimulationError
from .solute_scaling import compute_solute_parts, set_solute_scale

BIAS_GROUP = 31
PHYSICAL_GROUPS = set(range(31))
#: PHYSICAL_GROUPS as the bit mask getState also takes (a set is folded into one on every call)
PHYSICAL_MASK = (1 << BIAS_GROUP) - 1
_MAX_SEED = 2**30


@dataclass(frozen=True)
class PlatformChoice:
    """The OpenMM platform walkers run on, and how it was chosen."""

    name: str
    properties: dict
    probe: tuple = ()      # ((setting, steps/s of one context, contexts at once), ...) when measured


def derive_seeds(seed, n_walkers):
    """Integrator seeds (one per walker, never 0, which OpenMM reads as 'random') and a swap seed."""
    sequence = np.random.SeedSequence(seed)
    values = sequence.generate_state(n_walkers + 1, dtype=np.uint32) % (_MAX_SEED - 1) + 1
    return [int(v) for v in values[:n_walkers]], int(values[n_walkers])


def prepare_system(built, protocol, coordinates):
    """A copy of the built System with the flat-bottom restraints, the umbrella forces and a barostat added.

    Returns
    -------
    system : openmm.System
    umbrella_names : tuple of str, the coordinates with an umbrella, in protocol order
    """
    system = openmm.XmlSerializer.clone(built.system)
    for force in system.getForces():
        if force.getForceGroup() == BIAS_GROUP:
            raise ProtocolError(f"{protocol.path}: system uses force group {BIAS_GROUP}, which boost "
                                "reserves for umbrella forces.")
    for restraint in protocol.flat_bottom:
        system.addForce(build_flat_bottom_force(coordinates[restraint.coordinate], system, lower=restraint.lower,
                                                upper=restraint.upper, spring=restraint.spring))
    for axis in protocol.umbrella:
        force = build_umbrella_force(coordinates[axis.coordinate], system,
                                     centre=axis.centres[0], spring=axis.springs[0])
        force.setForceGroup(BIAS_GROUP)
        system.addForce(force)
    if protocol.pressure is not None:
        if not system.usesPeriodicBoundaryConditions():
            raise ProtocolError(f"{protocol.path}: pressure needs a periodic system (a water box).")
        system.addForce(openmm.MonteCarloBarostat(protocol.pressure * unit.bar,
                                                  protocol.temperature * unit.kelvin))
    return system, tuple(axis.coordinate for axis in protocol.umbrella)


def platform_properties(name, settings, threads=None):
    properties = {}
    if name == "CPU":
        threads = settings.threads or threads
        if threads:
            properties["Threads"] = str(threads)
        if settings.deterministic:
            properties["DeterministicForces"] = "true"
    return properties


def probe_thread_counts(n_cores):
    """CPU thread counts worth trying on ``n_cores`` cores: 1, 2, 4, ... and n_cores."""
    counts, t = [], 1
    while t < n_cores:
        counts.append(t)
        t *= 2
    return counts + [n_cores]


def choose_platform(settings, system, positions, *, timestep, n_walkers=1, cores=None, workers="auto",
                    seconds=0.3):
    """Pick the platform: as the protocol says, or (``auto``) the fastest in a short probe.

    Each setting runs one context pinned to as many cores as it has threads (as the
    walkers will run); a setting is ranked by that speed times the contexts that can run
    at once: ``n_walkers``, at most cores / threads, at most ``workers`` processes. A CPU
    platform named without threads gets the cores shared out among those contexts.
    ``cores``: the cores the walkers may use (default: this process's).
    """
    cores = usable_cores() if cores is None else list(cores)
    limit = n_walkers if workers == "auto" else min(n_walkers, int(workers))

    def at_once(threads):
        return max(1, min(limit, len(cores) // threads))

    if settings.name != "auto":
        shared_out = max(1, len(cores) // at_once(1))
        return PlatformChoice(settings.name, platform_properties(settings.name, settings, shared_out))
    candidates = [("Reference", 1)] + [("CPU", t) for t in
                                       ([settings.threads] if settings.threads else probe_thread_counts(len(cores)))]
    probe, best = [], None
    for name, threads in candidates:
        properties = platform_properties(name, settings, threads)
        with pinned(cores[:threads]):
            rate = _measure_speed(system, positions, name, properties, timestep, seconds)
        label = name if name == "Reference" else f"CPU {threads} thread{'s' if threads > 1 else ''}"
        probe.append((label, rate, at_once(threads)))
        if best is None or rate * at_once(threads) > best[0]:
            best = (rate * at_once(threads), name, properties)
    return PlatformChoice(best[1], best[2], tuple(probe))


def _measure_speed(system, positions, name, properties, timestep, seconds):
    integrator = openmm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond,
                                                 timestep * unit.picosecond)
    integrator.setRandomNumberSeed(1)
    context = openmm.Context(system, integrator, openmm.Platform.getPlatformByName(name), properties)
    context.setPositions(positions)
    integrator.step(10)
    steps, start = 0, time.perf_counter()
    while time.perf_counter() - start < seconds:
        integrator.step(20)
        steps += 20
    rate = steps / (time.perf_counter() - start)
    del context, integrator
    return rate


BAROSTATS = (openmm.MonteCarloBarostat, openmm.MonteCarloAnisotropicBarostat,
             openmm.MonteCarloMembraneBarostat, openmm.MonteCarloFlexibleBarostat)


def shares_random_stream(platform_name, system):
    """Whether the contexts of one process draw from one process-wide random stream.

    OpenMM's Reference platform does for its integrators, and Monte Carlo barostats do on
    every platform (seen here: two Reference contexts stepped in turn follow other
    trajectories than one alone). The CPU platform's integrators keep a stream per context.
    """
    return platform_name == "Reference" or any(isinstance(f, BAROSTATS) for f in system.getForces())


def read_state(context, types, groups=-1):
    """``context.getState`` for ``types`` (a sum of openmm.State flags) and force groups
    ``groups`` (a bit mask as a signed 32-bit int, -1 for all): the call it makes, without its
    keyword handling (a few microseconds of every walker's every cycle)."""
    return openmm._openmm.Context_getState(context, types, False, groups)


def vectors(state, kind, n_atoms, out=None):
    """Positions (nm) or velocities (nm/ps) that ``state`` holds (``kind``: openmm.State.Positions
    or .Velocities), as a plain float64 array, shape (n_atoms, 3), written into ``out`` when
    given (a C-contiguous float64 array of that shape).

    The very numbers State.getPositions(asNumpy=True) returns, without the unit wrapper around
    them (which value_in_unit then copies): a tenth of the cost, and for a walker of a few dozen
    atoms that wrapper cost more than its energy evaluation (bench/p1_overhead.py).
    """
    array = np.empty((n_atoms, 3)) if out is None else out
    state._getVectorAsNumpy(kind, array)
    return array


def potential_energy(state):
    """The potential energy ``state`` holds, in kJ/mol (OpenMM's unit for it), as a float: the
    number State.getPotentialEnergy wraps in a unit object."""
    return openmm._openmm.State_getPotentialEnergy(state)


class Observation(NamedTuple):
    """What a walker reports after propagating: energies without umbrellas (a tuple: made for
    every walker every cycle, and a frozen dataclass costs several times more to make)."""

    potential: float            # kJ/mol at λ = 1, flat-bottom restraints included, umbrellas excluded
    positions: np.ndarray       # (n_atoms, 3) nm
    box_vectors: np.ndarray | None  # (3, 3) nm
    volume: float | None        # nm³
    solute: tuple | None = None     # (E_cross, E_inner) kJ/mol with solute scaling (boost.solute_parts)


class Walker:
    """One replica: an OpenMM context that lives for the whole run.

    Parameters
    ----------
    index : int
    system : openmm.System, from :func:`prepare_system`
    umbrella_names : tuple of str
    positions : ndarray, shape (n_atoms, 3), in nm
    box_vectors : ndarray, shape (3, 3), in nm, or None
    condition : boost.conditions.Condition
    timestep : float, ps
    friction : float, 1/ps
    platform : PlatformChoice
    seed : int, positive
    solute : boost.solute_scaling.SoluteScaledSystem or None
        When ``system`` is solute-scaled: its tail coefficients and nonbonded group (its
        ``system`` field is not used).
    """

    def __init__(self, index, system, umbrella_names, positions, box_vectors, condition, *,
                 timestep, friction, platform, seed, solute=None):
        self.index = index
        self.umbrella_names = umbrella_names
        self.solute = solute
        self.uses_pbc = system.usesPeriodicBoundaryConditions()
        self.n_atoms = system.getNumParticles()
        barostats = [f for f in system.getForces() if isinstance(f, BAROSTATS)]
        self.barostat_temperatures = sorted({type(f).Temperature() for f in barostats})   # parameter names
        for force in barostats:
            # read when the context is made (0 would mean 'random'); the System is the host's own copy
            force.setRandomNumberSeed(seed)
        self.integrator = openmm.LangevinMiddleIntegrator(
            condition.temperature * unit.kelvin, friction / unit.picosecond, timestep * unit.picosecond)
        self.integrator.setRandomNumberSeed(seed)
        self.seed = seed
        self.context = openmm.Context(system, self.integrator,
                                      openmm.Platform.getPlatformByName(platform.name),
                                      platform.properties)
        if box_vectors is not None:
            self.context.setPeriodicBoxVectors(*[openmm.Vec3(*row) for row in box_vectors])
        self.context.setPositions(positions)
        # Where the random stream is process-wide, this walker's own place in it travels in
        # a checkpoint of its context (OpenMM checkpoints hold the random state), swapped in
        # before and out after everything done to the walker: walkers can then share a
        # process and each follows the trajectory it would follow alone.
        self._state = self.context.createCheckpoint() if shares_random_stream(platform.name, system) else None
        self._own_stream = _OwnStream(self)      # with self._own_stream: ...
        self.condition = None
        self.apply(condition)

    def apply(self, condition):
        """Move this walker to ``condition``: umbrella parameters, solute scale and temperature.

        On a temperature change velocities are rescaled by sqrt(T_new/T_old) so the walker
        carries on in equilibrium at the new temperature (common practice).
        """
        with self._own_stream:
            self._apply(condition)

    def _apply(self, condition):
        for name, centre, spring in zip(self.umbrella_names, condition.centres, condition.springs):
            self.context.setParameter(centre_parameter(name), centre)
            self.context.setParameter(spring_parameter(name), spring)
        if self.solute is not None:
            set_solute_scale(self.context, condition.solute_scale)
        old = self.condition
        # plain numbers in OpenMM's own units (nm/ps, K): the same values without unit objects
        if old is not None and old.temperature != condition.temperature:
            velocities = vectors(read_state(self.context, openmm.State.Velocities), openmm.State.Velocities,
                                 self.n_atoms)
            self.context.setVelocities(velocities * np.sqrt(condition.temperature / old.temperature))
        self.integrator.setTemperature(condition.temperature)
        for name in self.barostat_temperatures:
            self.context.setParameter(name, condition.temperature)
        self.condition = condition

    def minimise(self, *, tolerance=10.0, max_iterations=2000):
        """Local energy minimisation in the current condition (tolerance in kJ/mol/nm)."""
        with self._own_stream:
            openmm.LocalEnergyMinimizer.minimize(self.context, tolerance, max_iterations)

    def draw_velocities(self, seed):
        with self._own_stream:
            self.context.setVelocitiesToTemperature(self.condition.temperature * unit.kelvin, seed)

    def step(self, n_steps, conditions=()):
        """Move to each of ``conditions`` in turn (see apply), then take ``n_steps``: one visit
        to the walker's random stream for both."""
        try:
            with self._own_stream:
                for condition in conditions:
                    self._apply(condition)
                self.integrator.step(n_steps)
        except openmm.OpenMMException as err:
            raise SimulationError(f"walker {self.index} (condition {self.condition.index}) failed in "
                                  f"OpenMM: {str(err).strip()}") from None

    def observe(self, positions=None):
        """An Observation of the walker now; its positions are written into ``positions`` when
        given (a float64 array of shape (n_atoms, 3), say a row of the host's report)."""
        # Without umbrellas every group is physical; asking for all of them spares OpenMM
        # a recomputation of the forces at the next step.
        groups = PHYSICAL_MASK if self.umbrella_names else -1
        solute = None
        if self.solute is None:
            state = read_state(self.context, openmm.State.Energy + openmm.State.Positions, groups)
            potential = potential_energy(state)
        else:
            # Three energies at other solute scales; the parameters come back bit for bit and
            # no random number is drawn, so the walker's trajectory and its place in a shared
            # random stream are those it would have without them (tests/test_solute_run.py).
            parts = compute_solute_parts(self.solute, self.context, groups=PHYSICAL_GROUPS)
            potential, solute = float(parts.sum()), (float(parts[1]), float(parts[2]))
            state = read_state(self.context, openmm.State.Positions)
        positions = vectors(state, openmm.State.Positions, self.n_atoms, positions)
        box = volume = None
        if self.uses_pbc:
            box = state.getPeriodicBoxVectors(asNumpy=True).value_in_unit(unit.nanometer)
            volume = float(np.linalg.det(box))
        return Observation(potential, positions, box, volume, solute)

    def checkpoint(self):
        """OpenMM checkpoint bytes (positions, velocities, box, parameters, RNG states)."""
        return self.context.createCheckpoint() if self._state is None else self._state

    def restore(self, data, condition):
        self.context.loadCheckpoint(data)
        if self._state is not None:
            self._state = data
        self.condition = None
        self.apply(condition)



class _OwnStream:
    """A walker's place in a process-wide random stream, swapped in on entering and out on
    leaving without an error (a context manager made once per walker: it is entered every
    cycle, and a generator-based one costs several times more)."""

    __slots__ = ("walker",)

    def __init__(self, walker):
        self.walker = walker

    def __enter__(self):
        if self.walker._state is not None:
            self.walker.context.loadCheckpoint(self.walker._state)

    def __exit__(self, kind, value, traceback):
        if kind is None and self.walker._state is not None:
            self.walker._state = self.walker.context.createCheckpoint()
        return False


def read_checkpoint_configurations(system, platform, blobs):
    """Positions (nm, shape (n_atoms, 3)) and box vectors (nm, (3, 3), or None) held in
    each walker's OpenMM checkpoint of ``blobs``, loaded into one throwaway context of
    ``system`` on the PlatformChoice they were written on (checkpoints are platform specific)."""
    integrator = openmm.VerletIntegrator(0.001)
    context = openmm.Context(system, integrator, openmm.Platform.getPlatformByName(platform.name),
                             platform.properties)
    configurations = []
    for blob in blobs:
        context.loadCheckpoint(blob)
        state = context.getState(getPositions=True)
        positions = np.asarray(state.getPositions(asNumpy=True).value_in_unit(unit.nanometer))
        box = np.asarray(state.getPeriodicBoxVectors(asNumpy=True).value_in_unit(unit.nanometer)) \
            if system.usesPeriodicBoundaryConditions() else None
        configurations.append((positions, box))
    return configurations
