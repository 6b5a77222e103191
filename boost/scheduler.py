"""The cycle loop: propagate -> reduced potentials -> records -> swaps.

Every method is this one loop: a single run has one condition, umbrella sampling has one
walker per window and no swaps, replica exchange adds swaps between walkers.
"""

import json
import sqlite3
from contextlib import contextmanager
from dataclasses import replace
import logging
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from tqdm import tqdm

from .conditions import build_conditions, compute_reduced_potentials
from .engine import PlatformChoice, choose_platform, derive_seeds, prepare_system
from .exceptions import BoostError, RunFolderError, SimulationError
from .exchange import swap_any_pairs, swap_adjacent
from .protocol import resolve_coordinates
from .provenance import describe_environment, describe_git
from .store import (LEDGER, PROTOCOL, PROVENANCE, FolderLock, FrameWriter, Ledger, check_folder_for,
                    choose_checkpoint, claim_folder, dcd_frame_bytes, has_checkpoint, inspect_frames, scan_ledger,
                    write_atomically, write_checkpoint)
from .systems import load_system
from .workers import WalkerSetup, open_workers, rank_walkers

log = logging.getLogger("boost")


@dataclass(frozen=True)
class Plan:
    """Everything a run needs, built and checked before anything is written."""

    protocol: object
    built: object
    coordinates: dict
    conditions: tuple
    system: object
    umbrella_names: tuple
    platform: object

    @property
    def n_walkers(self):
        return len(self.conditions)


def make_plan(protocol, *, platform=None, probe=True, workers=None, comm=None, cores=None):
    """Build the system and check every input; writes nothing.

    ``platform``: a PlatformSettings overriding the protocol's. ``probe=False`` leaves an
    automatic platform choice unmade (name 'auto'), so no MD step runs. ``workers``,
    ``comm`` and ``cores`` (this rank's, see boost.workers.cores_of_rank) tell the
    platform choice how the walkers will be laid out.
    """
    built = load_system(protocol.system)
    coordinates = resolve_coordinates(protocol, built.topology)
    conditions = build_conditions(protocol)
    system, umbrella_names = prepare_system(built, protocol, coordinates)
    settings = platform or protocol.platform
    if settings.name == "auto" and not probe:
        choice = PlatformChoice("auto", {})
    else:
        n_walkers = len(conditions) if comm is None else len(rank_walkers(len(conditions), comm, 0))
        choice = choose_platform(settings, system, built.positions, timestep=protocol.timestep,
                                 n_walkers=n_walkers, cores=cores,
                                 workers=settings.workers if workers is None else workers)
    return Plan(protocol, built, coordinates, conditions, system, umbrella_names, choice)


def _provenance(plan, seeds, swap_seed):
    return {
        "protocol_file": str(plan.protocol.path), "protocol_folder": str(plan.protocol.base_dir.resolve()),
        "protocol_sha256": plan.protocol.sha256, "git": describe_git(plan.protocol.path),
        "seed": plan.protocol.seed, "walker_seeds": seeds, "swap_seed": swap_seed,
        "platform": plan.platform.name, "platform_properties": plan.platform.properties,
        "platform_probe": [list(item) for item in plan.platform.probe],
        **describe_environment(), "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }


def _create_folder(folder, plan, seeds, swap_seed, run_id):
    from openmm import app, unit

    write_atomically(folder / PROTOCOL, plan.protocol.text)
    write_atomically(folder / PROVENANCE, json.dumps(_provenance(plan, seeds, swap_seed), indent=2))
    with open(folder / "topology.pdb", "w") as handle:
        app.PDBFile.writeFile(plan.built.topology, plan.built.positions * unit.nanometer, handle)
    ledger = Ledger(folder / LEDGER, coordinate_names=tuple(plan.coordinates))
    ledger.create(plan.conditions, {
        "coordinates": list(plan.coordinates),
        "periodic": [c.periodic for c in plan.coordinates.values()],
        "units": {name: c.unit for name, c in plan.coordinates.items()},
        "umbrella": list(plan.umbrella_names), "n_walkers": plan.n_walkers,
        "temperature": plan.protocol.temperature, "pressure": plan.protocol.pressure,
        "timestep_ps": plan.protocol.timestep, "steps_per_cycle": plan.protocol.run.steps_per_cycle,
        "protocol_sha256": plan.protocol.sha256, "protocol_text": plan.protocol.text, "run_id": run_id,
        "frame_atoms": plan.built.topology.getNumAtoms(), "frame_bytes": _frame_bytes(plan),
    })
    return ledger


def _frame_bytes(plan):
    topology = plan.built.topology
    return dcd_frame_bytes(topology.getNumAtoms(), topology.getPeriodicBoxVectors() is not None)


class Scheduler:
    """Runs a plan into a run folder: a fresh start, or a resume from its last checkpoint."""

    def __init__(self, plan, folder, *, progress=True, workers=None, comm=None, cores=None):
        self.plan = plan
        self.comm = comm
        self.cores = cores
        self.worker_count = workers if workers is not None else plan.protocol.platform.workers
        self.folder = Path(folder)
        self.progress = progress
        self.coordinate_list = list(plan.coordinates.values())
        self.umbrella_columns = [list(plan.coordinates).index(name) for name in plan.umbrella_names]
        self.periodic_a = [plan.coordinates[name].periodic for name in plan.umbrella_names]
        self.masses = plan.built.masses
        protocol = plan.protocol
        self.ladder_shape = (len(protocol.temperatures), *[len(a.centres) for a in protocol.umbrella])
        self.seeds, self.swap_seed = derive_seeds(protocol.seed, plan.n_walkers)
        self.retries_left = protocol.run.retries

    def run(self):
        """Run to the end; returns the folder. Resumes a partial run of the same protocol."""
        check_folder_for(self.folder, self.plan.protocol.text)
        self.run_id = claim_folder(self.folder)        # before the lock file: a foreign 'lock' is never opened
        lock = FolderLock(self.folder)
        stale = lock.acquire()
        try:
            if stale:
                log.info("taking over the run folder from %s, which is no longer running", stale)
            resume = check_folder_for(self.folder, self.plan.protocol.text) == "same" \
                and (self.folder / LEDGER).exists()
            with _disk_errors(self.folder):
                self._run(resume)
        finally:
            lock.release()
        return self.folder

    def _run(self, resume):
        plan, protocol = self.plan, self.plan.protocol
        state = self._resume_point() if resume else None
        if state == "complete":
            log.info("%s: the run is already complete", self.folder)
            return
        if resume:
            plan = self.plan = _with_recorded_platform(plan, self.folder)
            ledger = Ledger(self.folder / LEDGER, coordinate_names=tuple(plan.coordinates))
        else:
            ledger = _create_folder(self.folder, plan, self.seeds, self.swap_seed, self.run_id)
        workers = open_workers(self._walker_setup(), self.worker_count, self.comm, self.cores)
        frames = None
        try:
            start, assignment, rng = self._restore(workers, ledger, state)
            if protocol.run.frame_every:
                frames = FrameWriter(self.folder, plan.built.topology, plan.n_walkers,
                                     timestep_ps=protocol.timestep,
                                     steps_between=protocol.run.frame_every * protocol.run.steps_per_cycle,
                                     counts=self._frames_on_disk(ledger))
            self._loop(workers, ledger, frames, rng, start, assignment)
        finally:
            workers.close()
            ledger.close()
            if frames:
                frames.close()

    def _resume_point(self):
        """Verify the folder before resuming: 'complete', None (start afresh: nothing
        recorded) or the newest intact checkpoint at or before the ledger's last intact cycle."""
        n_recorded, first_bad, metadata = scan_ledger(self.folder)
        if metadata.get("run_id") != self.run_id:
            raise RunFolderError(f"{self.folder / LEDGER}: was not written by this run (its run id differs from "
                                 "the identity file's); resume only the folder a run created.")
        if metadata.get("protocol_sha256") != self.plan.protocol.sha256:
            raise RunFolderError(f"{self.folder / LEDGER}: was recorded for another protocol (the folder's "
                                 f"{PROTOCOL} was edited after the run started); choose another folder.")
        if first_bad is None and n_recorded >= self.plan.protocol.run.n_cycles:
            return "complete"
        if n_recorded == 0 and not has_checkpoint(self.folder):
            return None
        last_intact = (n_recorded if first_bad is None else first_bad) - 1
        try:
            checkpoint, notes = choose_checkpoint(self.folder, run_id=self.run_id, last_intact_cycle=last_intact)
        except RunFolderError:
            if first_bad is None:
                raise
            raise RunFolderError(f"{self.folder / LEDGER}: cycle {first_bad} is damaged (its records fail their "
                                 "checksum) and no intact checkpoint comes before it; this run cannot be "
                                 "continued: start a new run folder.") from None
        if first_bad is not None:
            notes.insert(0, f"{LEDGER}: cycle {first_bad} is damaged")
        for note in notes:
            log.warning("warning: %s; resuming from checkpoints/%s (after cycle %d), the cycles after it are "
                        "computed again", note, checkpoint.name, checkpoint.cycle)
        return checkpoint

    def _frames_on_disk(self, ledger):
        """Frames to keep per walker: the ledger's records, cut to what is intact on disk."""
        records = ledger.frame_records(self.plan.n_walkers)
        counts = []
        for check in inspect_frames(self.folder, records, _frame_bytes(self.plan),
                                    self.plan.built.topology.getNumAtoms()):
            if check.problem:
                log.warning("warning: %s; frames go on from frame %d", check.problem, check.usable)
            if check.usable < check.recorded:
                ledger.forget_frames_from(check.walker, check.usable)
            counts.append(check.usable)
        return counts

    def _walker_setup(self):
        import openmm

        plan, protocol = self.plan, self.plan.protocol
        return WalkerSetup(
            system_xml=openmm.XmlSerializer.serialize(plan.system), umbrella_names=plan.umbrella_names,
            positions=plan.built.positions, box_vectors=plan.built.box_vectors, conditions=plan.conditions,
            coordinates=tuple(self.coordinate_list), masses=self.masses, timestep=protocol.timestep,
            friction=protocol.friction, platform=plan.platform, seeds=tuple(self.seeds))

    def _restore(self, workers, ledger, state):
        """Walkers, assignment and swap RNG at the last checkpoint; ledger cut back to it."""
        if state is None:
            ledger.truncate_after(-1)
            if self.plan.protocol.run.minimise:
                workers.minimise()
            workers.draw_velocities(dict(enumerate(self.seeds)))
            assignment, rng = list(range(self.plan.n_walkers)), np.random.default_rng(self.swap_seed)
            self._checkpoint(workers, -1, assignment, rng)
            return 0, assignment, rng
        ledger.truncate_after(state.cycle)
        assignment = list(state.scheduler["assignment"])
        workers.restore(state.walker_states, assignment)
        rng = np.random.default_rng(self.swap_seed)
        rng.bit_generator.state = state.scheduler["rng"]
        return state.cycle + 1, assignment, rng

    def _checkpoint(self, workers, cycle, assignment, rng):
        write_checkpoint(self.folder, cycle=cycle, walker_states=workers.checkpoints(), run_id=self.run_id,
                         scheduler_state={"assignment": list(assignment), "rng": rng.bit_generator.state})

    def _loop(self, workers, ledger, frames, rng, start, assignment):
        plan, run = self.plan, self.plan.protocol.run
        cycle_ps = run.steps_per_cycle * plan.protocol.timestep
        bar = tqdm(total=run.n_cycles, initial=start, unit="cycle", disable=not self.progress,
                   desc="boost run", dynamic_ncols=True)
        with bar:
            cycle = start
            while cycle < run.n_cycles:
                try:
                    framing = bool(frames) and (cycle + 1) % run.frame_every == 0
                    reports = workers.propagate(run.steps_per_cycle, framing)
                    values_rc, u_kr = self._evaluate(reports, assignment, cycle)
                except SimulationError as err:
                    cycle, assignment, rng = self._retry(err, workers, ledger, frames, cycle)
                    bar.n = cycle
                    continue
                new_assignment, tally = self._swap(u_kr, assignment, cycle, rng)
                written = [(r, *frames.write(r, o.positions, o.box_vectors)) for r, o in enumerate(reports)] \
                    if framing else []
                ledger.record_cycle(
                    cycle, time=(cycle + 1) * cycle_ps, production=cycle >= run.equilibration_cycles,
                    condition_r=assignment, potential_r=[o.potential for o in reports],
                    volume_r=[o.volume for o in reports], values_rc=values_rc, u_kr=u_kr,
                    swaps=tally, frames=written)
                assignment = new_assignment
                workers.assign(assignment)
                if (cycle + 1) % run.checkpoint_every == 0 or cycle + 1 == run.n_cycles:
                    self._checkpoint(workers, cycle, assignment, rng)
                bar.update()
                cycle += 1

    def _retry(self, err, workers, ledger, frames, cycle):
        """After a blow-up: back to the last checkpoint with fresh velocities, a bounded number of times."""
        if self.retries_left <= 0:
            raise SimulationError(f"{err} The run folder holds every cycle before it and can be resumed; "
                                  "try a smaller timestep, minimisation, or run.retries.") from None
        self.retries_left -= 1
        state, notes = choose_checkpoint(self.folder, run_id=self.run_id, last_intact_cycle=cycle - 1)
        for note in notes:
            log.warning("warning: %s; going back to checkpoints/%s", note, state.name)
        start, assignment, rng = self._restore(workers, ledger, state)
        seed = int(np.random.default_rng([self.plan.protocol.seed, cycle, self.retries_left]).integers(1, 2**30))
        walker = getattr(err, "walker", None)
        workers.draw_velocities({r: seed + r for r in range(self.plan.n_walkers) if walker in (None, r)})
        ledger.record_retry(cycle, -1 if walker is None else walker, seed)
        if frames:
            frames.cut_back([len(crcs) for crcs in ledger.frame_records(self.plan.n_walkers)])
        log.warning("%s; retrying from cycle %d with fresh velocities (%d retries left)", err, start,
                    self.retries_left)
        return start, assignment, rng

    def _swap(self, u_kr, assignment, cycle, rng):
        settings = self.plan.protocol.exchange
        if settings is None:
            return assignment, ()
        if settings.pairs == "any":
            new, tally = swap_any_pairs(u_kr, assignment, rng, attempts=settings.attempts * len(assignment) ** 3)
        else:
            new, tally = swap_adjacent(u_kr, assignment, self.ladder_shape, cycle, rng,
                                         attempts=settings.attempts)
        return new, tally.pairs

    def _evaluate(self, reports, assignment, cycle):
        plan = self.plan
        bad = [o.walker for o in reports if not o.finite]
        if bad:
            r = bad[0]
            raise WalkerBlowUp(r, f"walker {r} in condition {assignment[r]} blew up at cycle {cycle} "
                                  f"(potential energy {reports[r].potential} kJ/mol).")
        values_rc = np.array([o.values for o in reports]).reshape(len(reports), len(self.coordinate_list))
        potential_r = np.array([o.potential for o in reports])
        u_kr = compute_reduced_potentials(
            plan.conditions, potential_r, values_rc[:, self.umbrella_columns], self.periodic_a,
            volume_r=[o.volume for o in reports], pressure=plan.protocol.pressure)
        return values_rc, u_kr


class WalkerBlowUp(SimulationError):
    """A walker's energy or positions are no longer finite."""

    def __init__(self, walker, message):
        super().__init__(message)
        self.walker = walker


def _with_recorded_platform(plan, folder):
    """Resume on the platform the run started on, so a deterministic run stays bit-for-bit."""
    path = Path(folder) / PROVENANCE
    try:
        provenance = json.loads(path.read_bytes())
        recorded = PlatformChoice(provenance["platform"], provenance["platform_properties"],
                                  tuple(tuple(item) for item in provenance.get("platform_probe", ())))
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        raise RunFolderError(f"{path}: is missing or damaged; it records the platform the run started on, which "
                             "a resume must use: restore it, or start a new run folder.") from None
    return replace(plan, platform=recorded)


@contextmanager
def _disk_errors(folder):
    """Turn a full disk or a read-only folder into one clear line; the ledger stays consistent."""
    try:
        yield
    except (OSError, sqlite3.OperationalError) as err:
        if isinstance(err, BoostError):
            raise
        reason = getattr(err, "strerror", None) or str(err)
        raise RunFolderError(f"{folder}: cannot write ({reason}); the ledger keeps every complete cycle. "
                             "Free space or fix permissions, then run again to resume.") from None
    except sqlite3.DatabaseError:
        raise RunFolderError(f"{Path(folder) / LEDGER}: is damaged (SQLite cannot use it); "
                             "start a new run folder.") from None


def run_protocol(protocol, folder, *, platform=None, progress=True, workers=None):
    """Plan (check everything), then run ``protocol`` into ``folder``.

    ``workers``: worker processes (None: the protocol's ``platform.workers``).
    """
    plan = make_plan(protocol, platform=platform)
    return Scheduler(plan, folder, progress=progress, workers=workers).run()
