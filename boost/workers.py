"""Who owns the walkers: the scheduler talks to workers, never to contexts directly.

A :class:`WalkerHost` owns some walkers (their OpenMM contexts live as long as the run)
and answers commands. Hosts live in this process (:class:`SerialWorkers`), in child
processes (:class:`ProcessWorkers`) or on MPI ranks (:class:`MPIWorkers`); all three offer
the same methods. Per cycle only condition indices go in and energies, coordinate values
and volumes come out; positions cross only when frames are due.
"""

import multiprocessing
import os
import sys
from dataclasses import dataclass

import numpy as np

from .coordinates import CoordinateSet
from .cores import core_sets, pin, unpin, usable_cores
from .engine import Walker
from .exceptions import SimulationError


@dataclass(frozen=True)
class WalkerSetup:
    """Everything a host needs to build its walkers (picklable; the System travels as XML)."""

    system_xml: str
    umbrella_names: tuple
    positions: np.ndarray
    box_vectors: object
    conditions: tuple
    coordinates: tuple        # boost.coordinates.Coordinate, in ledger column order
    masses: np.ndarray
    timestep: float
    friction: float
    platform: object
    seeds: tuple
    solute: object = None     # boost.solute_scaling.SoluteScaledSystem without its system (that is system_xml)
    starts: tuple = ()        # per walker (positions, box_vectors) overriding the two above; empty: none

    def start_of(self, r):
        """Walker r's starting (positions, box_vectors), in nm."""
        return self.starts[r] if self.starts else (self.positions, self.box_vectors)


@dataclass(frozen=True)
class Reports:
    """Walkers after one cycle, one row each (row i is walker ``walker_r[i]``).

    potential_r : ndarray, shape (n,), kJ/mol at λ = 1, umbrellas excluded
    values_rc : ndarray, shape (n, n_coordinates), nm or rad (NaN where not finite)
    volume_r : ndarray, shape (n,), nm³, NaN without a box
    finite_r : ndarray of bool, shape (n,): energy, positions and solute parts all finite
    solute_r2 : ndarray, shape (n, 2), kJ/mol: (E_cross, E_inner), zeros without solute scaling
    positions_r, box_vectors_r : tuples of ndarray (nm) or None, when frames are due
    """

    walker_r: tuple
    potential_r: np.ndarray
    values_rc: np.ndarray
    volume_r: np.ndarray
    finite_r: np.ndarray
    solute_r2: np.ndarray
    positions_r: tuple | None = None
    box_vectors_r: tuple | None = None


def join_reports(parts, order):
    """One Reports of the rows of ``parts`` (each host's), in the walker order ``order``."""
    if len(parts) == 1 and parts[0].walker_r == tuple(order):
        return parts[0]
    walker_r = sum((p.walker_r for p in parts), ())
    rows = [walker_r.index(r) for r in order]
    framed = parts[0].positions_r is not None

    def pick(name):
        return np.concatenate([getattr(p, name) for p in parts])[rows]

    def pick_each(name):
        joined = sum((getattr(p, name) for p in parts), ())
        return tuple(joined[i] for i in rows)

    return Reports(tuple(order), pick("potential_r"), pick("values_rc"), pick("volume_r"), pick("finite_r"),
                   pick("solute_r2"), pick_each("positions_r") if framed else None,
                   pick_each("box_vectors_r") if framed else None)


class WalkerHost:
    """Owns walkers ``indices`` and carries out the commands of the worker protocol."""

    def __init__(self, setup, indices):
        import openmm

        system = openmm.XmlSerializer.deserialize(setup.system_xml)
        self.setup = setup
        self.walkers = {r: Walker(r, system, setup.umbrella_names, *setup.start_of(r), setup.conditions[r],
                                  timestep=setup.timestep, friction=setup.friction, platform=setup.platform,
                                  seed=setup.seeds[r], solute=setup.solute)
                        for r in indices}
        self.waiting = {}     # walker -> conditions it takes, in turn, before its next step (see assign)
        self.n_atoms = system.getNumParticles()
        self.coordinates = CoordinateSet(setup.coordinates, setup.masses)

    def minimise(self):
        self._settle()
        for walker in self.walkers.values():
            walker.minimise()
        return {}

    def draw_velocities(self, seeds):
        """seeds: dict walker -> seed (only walkers of this host are touched)."""
        self._settle()
        for r, seed in seeds.items():
            if r in self.walkers:
                self.walkers[r].draw_velocities(seed)
        return {}

    def propagate(self, n_steps, with_positions):
        """Step every walker, then report them all at once: {walker indices: Reports}."""
        walker_r = tuple(self.walkers)
        xyz = np.empty((len(walker_r), self.n_atoms, 3))     # each walker writes its own row
        observations = []
        for walker, positions in zip(self.walkers.values(), xyz):
            walker.step(n_steps, self.waiting.pop(walker.index, ()))
            observations.append(walker.observe(positions))
        potential_r, volume_r = np.array([(o.potential, o.volume) for o in observations], dtype=float).T
        solute_r2 = np.array([o.solute for o in observations]) if self.setup.solute is not None \
            else np.zeros((len(walker_r), 2))
        finite_r = np.isfinite(potential_r) & np.isfinite(xyz).all(axis=(1, 2)) & np.isfinite(solute_r2).all(axis=1)
        boxes = None if observations[0].box_vectors is None else np.stack([o.box_vectors for o in observations])
        with np.errstate(all="ignore"):      # a walker that blew up gets NaN values; the driver stops on it
            values_rc = self.coordinates.values(xyz, boxes)
        values_rc[~finite_r] = np.nan
        return {walker_r: Reports(walker_r, potential_r, values_rc, volume_r, finite_r, solute_r2,
                                  tuple(xyz) if with_positions else None,
                                  tuple(o.box_vectors for o in observations) if with_positions else None)}

    def assign(self, conditions):
        """conditions: dict walker -> condition index.

        A walker takes a new condition at its next step, in the same visit to its random
        stream (Walker.step), or before anything else is done to it: one visit instead of two.
        """
        for r, k in conditions.items():
            if r in self.walkers and self._held(r).index != k:
                self.waiting.setdefault(r, []).append(self.setup.conditions[k])
        return {}

    def _held(self, r):
        """The condition walker r holds once the waiting ones are taken."""
        waiting = self.waiting.get(r)
        return waiting[-1] if waiting else self.walkers[r].condition

    def _settle(self):
        """Every waiting condition taken now."""
        for r, conditions in self.waiting.items():
            for condition in conditions:
                self.walkers[r].apply(condition)
        self.waiting.clear()

    def checkpoints(self):
        self._settle()
        return {r: walker.checkpoint() for r, walker in self.walkers.items()}

    def restore(self, states, conditions):
        self.waiting.clear()
        for r, walker in self.walkers.items():
            walker.restore(states[r], self.setup.conditions[conditions[r]])
        return {}


def spread(indices, n_hosts):
    """Walker indices of each host, dealt round-robin."""
    indices = list(indices)
    return [indices[h::n_hosts] for h in range(n_hosts) if indices[h::n_hosts]]


class _Workers:
    """The scheduler's view of some walkers; subclasses say how a command reaches the hosts.

    Commands return dicts keyed by walker index (propagate: by the tuple of a host's walker
    indices, one Reports each); the methods below put them in the order of ``indices``.
    """

    indices = ()

    def call(self, command, *args):
        raise NotImplementedError

    def minimise(self):
        self.call("minimise")

    def draw_velocities(self, seeds):
        self.call("draw_velocities", dict(seeds))

    def propagate(self, n_steps, with_positions=False):
        """Advance every walker ``n_steps``; return one Reports of them all, in walker order."""
        return join_reports(list(self.call("propagate", n_steps, with_positions).values()), self.indices)

    def assign(self, condition_r):
        self.call("assign", dict(enumerate(condition_r)))

    def checkpoints(self):
        states = self.call("checkpoints")
        return [states[r] for r in self.indices]

    def restore(self, states, condition_r):
        self.call("restore", dict(enumerate(states)), dict(enumerate(condition_r)))

    def close(self):
        pass


class SerialWorkers(_Workers):
    """Walkers in this process, propagated one after another."""

    def __init__(self, setup, indices=None, cores=None):
        self.indices = list(range(len(setup.seeds)) if indices is None else indices)
        self._unpinned = pin(cores)       # this thread, for as long as it hosts the walkers
        try:
            self.host = WalkerHost(setup, self.indices)
        except BaseException:
            self.close()
            raise

    def call(self, command, *args):
        return getattr(self.host, command)(*args)

    def close(self):
        unpin(self._unpinned)
        self._unpinned = None


def merge_replies(replies):
    """Merge hosts' ('ok', {walker: value}) replies; raise the first ('error', exception)."""
    merged, failure = {}, None
    for status, value in list(replies):
        if status == "error":
            failure = failure or value
        else:
            merged.update(value)
    if failure is not None:
        raise failure
    return merged


def answer_commands(host, receive, reply):
    """Serve ``host``: carry out each received (command, args) until 'stop', replying to each."""
    while True:
        command, args = receive()
        if command == "stop":
            return
        try:
            reply(("ok", getattr(host, command)(*args)))
        except Exception as err:  # sent back and raised where the command came from
            reply(("error", err))


DIED = "a worker process died unexpectedly"


def _receive(connection, died=DIED):
    try:
        return connection.recv()
    except EOFError:
        return "error", SimulationError(died)


def died_while_starting():
    """The error text for a worker that died before reporting its walkers built.

    Worker processes run the main script again before anything of boost's (how Python's
    multiprocessing starts them), so a script that calls boost without a main guard starts
    a second run inside each worker, which fails there: name that likely cause.
    """
    main = sys.modules.get("__main__")
    script = getattr(main, "__file__", None)
    if script is None or getattr(getattr(main, "__spec__", None), "name", None) is not None:
        return "a worker process died while starting"
    return (f"a worker process died while starting; worker processes run the main script ({script}) "
            "again first, so a script that calls boost needs the call under 'if __name__ == \"__main__\":'")


#: A worker's first reply, sent before it builds anything: a worker that dies before it
#: died while Python started it, not in boost.
STARTED = ("ok", {})


def _serve_pipe(connection, setup, indices, cores):
    """Child process: build the walkers, then answer commands until told to stop."""
    connection.send(STARTED)
    try:
        pin(cores)
        host = WalkerHost(setup, indices)
        connection.send(("ok", {}))
    except Exception as err:  # report any failure to build to the parent
        connection.send(("error", err))
        return
    answer_commands(host, connection.recv, connection.send)


class ProcessWorkers(_Workers):
    """Walkers in child processes on this machine, ``layout`` listing each child's walkers.

    Children come from a fork server that starts clean (no OpenMM context or thread pool
    is ever forked) with boost's worker module preloaded, so they start quickly.
    """

    def __init__(self, setup, layout, cores=None):
        """cores: a core list per child (see boost.cores), or None to let the system place them."""
        self.indices = sorted(r for group in layout for r in group)
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload(["boost.workers"])
        self.connections, self.processes = [], []
        try:
            for indices, child_cores in zip(layout, cores or [None] * len(layout)):
                parent, child = context.Pipe()
                process = context.Process(target=_serve_pipe, args=(child, setup, indices, child_cores),
                                          daemon=True)
                process.start()
                child.close()
                self.connections.append(parent)
                self.processes.append(process)
            self._collect(died_while_starting())
            self._collect("a worker process died while building its walkers")
        except BaseException:
            self.close()
            raise

    def _collect(self, died=DIED):
        return merge_replies(_receive(connection, died) for connection in self.connections)

    def call(self, command, *args):
        try:
            for connection in self.connections:
                connection.send((command, args))
        except OSError:        # the pipe of a worker that died
            raise SimulationError(DIED) from None
        return self._collect()

    def close(self):
        for connection, process in zip(self.connections, self.processes):
            try:
                connection.send(("stop", ()))
            except OSError:
                pass
        for process in self.processes:
            process.join(timeout=10)
            if process.is_alive():
                process.kill()
        self.connections, self.processes = [], []


#: Communicators whose ranks have received a setup (the others still wait for one).
MPI_SETUP_SENT = set()


def rank_walkers(n_walkers, comm, rank):
    return list(range(rank, n_walkers, comm.size))


class MPIWorkers(_Workers):
    """Walkers spread over MPI ranks; rank 0 runs the scheduler and hosts walkers too.

    Each rank keeps its walkers in local workers on its share of the cores (cores_of_rank).
    """

    def __init__(self, setup, comm, count, cores=None):
        """cores: rank 0's share (boost.workers.cores_of_rank, which the other ranks have
        called too before waiting for the setup); computed here when not given."""
        self.comm = comm
        self.indices = list(range(len(setup.seeds)))
        cores = cores_of_rank(comm) if cores is None else cores
        comm.bcast((setup, count), root=0)
        MPI_SETUP_SENT.add(id(comm))
        self.host = None
        try:
            self._gather(lambda: self._build(setup, count, cores))
        except BaseException:
            self.close()       # every rank stops, those that built their walkers close them
            raise

    def _build(self, setup, count, cores):
        self.host = local_workers(setup, rank_walkers(len(self.indices), self.comm, 0), count, cores)
        return {}

    def _gather(self, work):
        try:
            mine = ("ok", work())
        except Exception as err:  # gathered like the other ranks' failures, so none is left waiting
            mine = ("error", err)
        return merge_replies(self.comm.gather(mine, root=0))

    def call(self, command, *args):
        self.comm.bcast((command, args), root=0)
        return self._gather(lambda: self.host.call(command, *args))

    def close(self):
        self.comm.bcast(("stop", ()), root=0)
        if self.host is not None:
            self.host.close()


def serve_mpi_rank(comm):
    """Ranks above 0: receive the setup, host walkers, answer commands until told to stop."""
    cores = cores_of_rank(comm)
    message = comm.bcast(None, root=0)
    if message is None:        # rank 0 stopped before the run started (bad input, run complete)
        return
    setup, count = message
    try:
        host = local_workers(setup, rank_walkers(len(setup.seeds), comm, comm.rank), count, cores)
        comm.gather(("ok", {}), root=0)
    except Exception as err:
        comm.gather(("error", err), root=0)
        comm.bcast(None, root=0)     # rank 0's 'stop' after a failed start
        return
    try:
        answer_commands(_HostCalls(host), lambda: comm.bcast(None, root=0), lambda r: comm.gather(r, root=0))
    finally:
        host.close()


def cores_of_rank(comm):
    """The cores for this rank's workers: its own share of those it may use.

    Collective over ``comm``. Ranks bound to cores of their own keep them; ranks that were
    not bound (all may use the same cores) split those cores between them in rank order.
    """
    from mpi4py import MPI

    mine = usable_cores()
    machine = comm.Split_type(MPI.COMM_TYPE_SHARED)
    try:
        alike = [rank for rank, other in enumerate(machine.allgather(mine)) if other == mine]
        position = alike.index(machine.rank)
    finally:
        machine.Free()
    share = max(1, len(mine) // len(alike))
    start = position * share % len(mine)
    return mine[start:start + share]


class _HostCalls:
    """Commands by name on local workers (which take them through ``call``)."""

    def __init__(self, workers):
        self.workers = workers

    def __getattr__(self, command):
        return lambda *args: self.workers.call(command, *args)


def local_workers(setup, indices, count, cores=None):
    """Workers for walkers ``indices`` on this machine.

    count : int or 'auto' -- processes to spread the walkers over ('auto': as many as
    ``cores`` (default: those this process may use) allow at the platform's thread count).
    Each process is pinned to cores of its own when they fit (boost.cores).
    """
    indices = list(indices)
    cores = usable_cores() if cores is None else list(cores)
    threads = int(setup.platform.properties.get("Threads", 1))
    n = max(1, len(cores) // threads) if count == "auto" else int(count)
    n = min(n, len(indices))
    sets = core_sets(cores, n, threads) or [cores] * n     # oversubscribed: share all of them
    if n <= 1:
        return SerialWorkers(setup, indices, sets[0])
    return ProcessWorkers(setup, spread(indices, n), sets)


def open_workers(setup, count, comm=None, cores=None):
    """Workers for a run: spread over MPI ranks when ``comm`` spans several, else local."""
    if comm is not None and comm.size > 1:
        return MPIWorkers(setup, comm, count, cores)
    return local_workers(setup, range(len(setup.seeds)), count, cores)


def mpi_world():
    """MPI.COMM_WORLD when launched by mpiexec on several ranks, else None (mpi4py is optional)."""
    launched = any(name in os.environ for name in ("PMI_SIZE", "OMPI_COMM_WORLD_SIZE", "PMIX_RANK"))
    if not launched:
        return None
    try:
        from mpi4py import MPI
    except ImportError:
        return None
    return MPI.COMM_WORLD if MPI.COMM_WORLD.size > 1 else None


def release_waiting_ranks(comm):
    """Let ranks above 0 leave if rank 0 never sent them a setup."""
    if comm is not None and id(comm) not in MPI_SETUP_SENT:
        comm.bcast(None, root=0)
