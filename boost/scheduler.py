"""The cycle loop: propagate -> reduced potentials -> records -> swaps.

Every method is this one loop: a single run has one condition, umbrella sampling has one
walker per window and no swaps, replica exchange adds swaps between walkers.
"""

import logging
import sqlite3
import sys
import time
from contextlib import contextmanager
from dataclasses import replace

import numpy as np
from tqdm import tqdm

from .conditions import ConditionArrays
from .engine import PlatformChoice, derive_seeds
from .exceptions import BoostError, RunFolderError, SimulationError
from .exchange import swap_for_cycle
from .lineage import check_extension
from .plan import describe_run, frame_bytes, ledger_header, make_plan
from .run_status import RunStatus
from .store import FrameWriter, RunFolder, choose_checkpoint, write_checkpoint
from .store.folder import OtherProtocol
from .workers import WalkerSetup, open_workers

log = logging.getLogger("boost")


class Scheduler:
    """Runs a plan into a run folder: a fresh start, or a resume from its last checkpoint."""

    def __init__(self, plan, folder, *, progress=True, workers=None, comm=None, cores=None):
        self.plan = plan
        self.comm = comm
        self.cores = cores
        self.worker_count = workers if workers is not None else plan.protocol.platform.workers
        self.folder = RunFolder(folder)
        self.progress = progress
        self.coordinate_list = list(plan.coordinates.values())
        self.umbrella_columns = [list(plan.coordinates).index(name) for name in plan.umbrella_names]
        self.periodic_a = [plan.coordinates[name].periodic for name in plan.umbrella_names]
        self.condition_arrays = ConditionArrays(plan.conditions, self.periodic_a)
        self.masses = plan.built.masses
        protocol = plan.protocol
        self.ladder_shape = plan.ladder_shape
        self.seeds, self.swap_seed = derive_seeds(protocol.seed, plan.n_walkers)
        self.retries_left = protocol.run.retries
        self.run_id = None                       # the folder's, once claimed
        self.loop_timing = (0, 0.0)              # (cycles, wall seconds) of the cycle loop of the last run()

    def run(self):
        """Run to the end; returns the folder path. Resumes a partial run of the same protocol,
        and continues a run whose protocol differs only by a longer production (boost.lineage)."""
        protocol = self.plan.protocol
        extending = self._extends()            # checked before anything in the folder changes
        self.run_id = self.folder.claim()        # before the lock file: a foreign 'lock' is never opened
        lock = self.folder.lock()
        stale = lock.acquire()
        try:
            if stale:
                log.info("taking over the run folder from %s, which is no longer running", stale)
            with _disk_errors(self.folder):
                if extending and self._extends():
                    self.folder.record_extension(protocol.text, protocol.sha256, time.strftime("%Y-%m-%dT%H:%M:%S%z"))
                    log.info("%s: extending the run to %d production cycles", self.folder,
                             protocol.run.production_cycles)
                self._run(self.folder.state_for(protocol.text) == "same")
        finally:
            lock.release()
        return self.folder.path

    def _extends(self):
        """False for a new folder or this very protocol's; True when the protocol extends the
        one the folder recorded; RunFolderError otherwise."""
        try:
            self.folder.state_for(self.plan.protocol.text)
            return False
        except OtherProtocol:
            if not self.folder.ledger.exists():
                raise
        check_extension(self.folder, self.folder.recorded_protocol_text(), self.plan.protocol)
        return True

    def _run(self, resume):
        plan, protocol = self.plan, self.plan.protocol
        state = None
        if resume:
            state, notes = self.folder.resume_point(run_id=self.run_id, protocol_sha256=protocol.sha256,
                                                    n_cycles=protocol.run.n_cycles)
            if state == "complete":
                log.info("%s: the run is already complete", self.folder)
                return
            for note in notes:
                log.warning("warning: %s; resuming from checkpoints/%s (after cycle %d), the cycles after it are "
                            "computed again", note, state.name, state.cycle)
            plan = self.plan = _with_recorded_platform(plan, self.folder)
            ledger = self.folder.open_ledger(plan.coordinates)
        else:
            provenance, header = describe_run(plan, self.seeds, self.swap_seed), ledger_header(plan, self.run_id)
            if plan.source is not None:
                header["builds_on"] = provenance["builds_on"] = self.folder.describe_source(plan.source.folder,
                                                                                            plan.source.cycles)
            ledger = self.folder.lay_out(
                protocol_text=protocol.text, provenance=provenance,
                topology=plan.built.topology, positions_nm=plan.built.positions, conditions=plan.conditions,
                ledger_header=header)
        workers = open_workers(self._walker_setup(), self.worker_count, self.comm, self.cores)
        frames = None
        try:
            start, assignment, rng = self._restore(workers, ledger, state)
            if protocol.run.frame_every:
                frames = FrameWriter(self.folder.path, plan.built.topology, plan.n_walkers,
                                     timestep_ps=protocol.timestep,
                                     steps_between=protocol.run.frame_every * protocol.run.steps_per_cycle,
                                     counts=self._frames_on_disk(ledger))
            self._loop(workers, ledger, frames, rng, start, assignment)
        finally:
            workers.close()
            if frames:
                frames.close()
            ledger.close()       # last: it writes the cycles still waiting, which may fail

    def _frames_on_disk(self, ledger):
        counts, notes = self.folder.frames_to_keep(ledger, self.plan.n_walkers, frame_bytes=frame_bytes(self.plan),
                                                   n_atoms=self.plan.built.topology.getNumAtoms())
        for note in notes:
            log.warning("warning: %s", note)
        return counts

    def _walker_setup(self):
        import openmm

        plan, protocol = self.plan, self.plan.protocol
        return WalkerSetup(
            system_xml=openmm.XmlSerializer.serialize(plan.system), umbrella_names=plan.umbrella_names,
            positions=plan.built.positions, box_vectors=plan.built.box_vectors, conditions=plan.conditions,
            coordinates=tuple(self.coordinate_list), masses=self.masses, timestep=protocol.timestep,
            friction=protocol.friction, platform=plan.platform, seeds=tuple(self.seeds), solute=plan.solute,
            starts=plan.starts)

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
        write_checkpoint(self.folder.path, cycle=cycle, walker_states=workers.checkpoints(), run_id=self.run_id,
                         scheduler_state={"assignment": list(assignment), "rng": rng.bit_generator.state})

    def _loop(self, workers, ledger, frames, rng, start, assignment):
        plan, run = self.plan, self.plan.protocol.run
        cycle_ps = run.steps_per_cycle * plan.protocol.timestep
        bar = tqdm(total=run.n_cycles, initial=start, unit="cycle", disable=not self.progress,
                   desc="boost run", dynamic_ncols=True)
        began = time.perf_counter()
        status = RunStatus(plan.conditions, self.periodic_a, run.n_cycles, start) if self.progress else None
        with bar:
            cycle = start
            while cycle < run.n_cycles:
                try:
                    framing = bool(frames) and (cycle + 1) % run.frame_every == 0
                    reports = workers.propagate(run.steps_per_cycle, framing)
                    values_rc, solute_r2, u_kr = self._evaluate(reports, assignment, cycle)
                except SimulationError as err:
                    cycle, assignment, rng = self._retry(err, workers, ledger, frames, cycle)
                    bar.n = cycle
                    continue
                new_assignment, tally = self._swap(u_kr, assignment, cycle, rng)
                written = [(r, *frames.write(r, positions, box)) for r, (positions, box)
                           in enumerate(zip(reports.positions_r, reports.box_vectors_r))] if framing else []
                ledger.record_cycle(
                    cycle, time=(cycle + 1) * cycle_ps, production=cycle >= run.equilibration_cycles,
                    condition_r=assignment, potential_r=reports.potential_r, volume_r=reports.volume_r,
                    values_rc=values_rc, u_kr=u_kr, solute_r2=solute_r2, swaps=tally, frames=written)
                if status is not None:
                    status.add(cycle, assignment, values_rc[:, self.umbrella_columns], tally)
                    if status.due():
                        bar.write(status.line(cycle + 1), file=sys.stderr)
                assignment = new_assignment
                workers.assign(assignment)
                if (cycle + 1) % run.checkpoint_every == 0 or cycle + 1 == run.n_cycles:
                    ledger.write_waiting()       # a checkpoint never runs ahead of the ledger
                    self._checkpoint(workers, cycle, assignment, rng)
                bar.update()
                cycle += 1
        self.loop_timing = (cycle - start, time.perf_counter() - began)

    def _retry(self, err, workers, ledger, frames, cycle):
        """After a blow-up: back to the last checkpoint with fresh velocities, a bounded number of times."""
        if self.retries_left <= 0:
            raise SimulationError(f"{err} The run folder holds every cycle before it and can be resumed; "
                                  "try a smaller timestep, minimisation, or run.retries.") from None
        self.retries_left -= 1
        state, notes = choose_checkpoint(self.folder.path, run_id=self.run_id, last_intact_cycle=cycle - 1)
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
        return swap_for_cycle(settings.pairs, settings.attempts, u_kr, assignment, self.ladder_shape, cycle, rng)

    def _evaluate(self, reports, assignment, cycle):
        plan = self.plan
        if not reports.finite_r.all():
            r = int(np.flatnonzero(~reports.finite_r)[0])
            raise WalkerBlowUp(r, f"walker {r} in condition {assignment[r]} blew up at cycle {cycle} "
                                  f"(potential energy {reports.potential_r[r]} kJ/mol).")
        values_rc, solute_r2 = reports.values_rc, reports.solute_r2
        u_kr = self.condition_arrays.reduced_potentials(
            reports.potential_r, values_rc[:, self.umbrella_columns], solute_r2=solute_r2,
            volume_r=reports.volume_r, pressure=plan.protocol.pressure)
        return values_rc, solute_r2, u_kr


class WalkerBlowUp(SimulationError):
    """A walker's energy or positions are no longer finite."""

    def __init__(self, walker, message):
        super().__init__(message)
        self.walker = walker


def _with_recorded_platform(plan, folder):
    """Resume on the platform the run started on, so a deterministic run stays bit-for-bit."""
    return replace(plan, platform=PlatformChoice(*folder.recorded_platform()))


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
        raise RunFolderError(f"{folder.ledger}: is damaged (SQLite cannot use it); "
                             "start a new run folder.") from None


def run_protocol(protocol, folder, *, platform=None, progress=True, workers=None):
    """Plan (check everything), then run ``protocol`` into ``folder``.

    ``workers``: worker processes (None: the protocol's ``platform.workers``).
    """
    plan = make_plan(protocol, platform=platform)
    return Scheduler(plan, folder, progress=progress, workers=workers).run()
