"""The cycle loop: propagate -> reduced potentials -> records -> swaps.

Every method is this one loop: a single run has one condition, umbrella sampling has one
walker per window and no swaps, replica exchange adds swaps between walkers.
"""

import json
import logging
import platform as host_platform
import socket
import sys
import time
from dataclasses import dataclass
from importlib import metadata as package_metadata
from pathlib import Path

import numpy as np
from tqdm import tqdm

from .conditions import build_conditions, compute_reduced_potentials
from .coordinates import compute_coordinate_values_many
from .engine import PlatformChoice, Walker, choose_platform, derive_seeds, prepare_system
from .exceptions import RunFolderError, SimulationError
from .exchange import swap_all_pairs, swap_neighbours
from .protocol import resolve_coordinates
from .store import (LEDGER, PROTOCOL, PROVENANCE, FrameWriter, Ledger, check_folder_for,
                    write_atomically, write_checkpoint)
from .systems import load_system
from .workers import SerialWorkers

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


def make_plan(protocol, *, platform=None, probe=True):
    """Build the system and check every input; writes nothing.

    ``platform``: a PlatformSettings overriding the protocol's. ``probe=False`` leaves an
    automatic platform choice unmade (name 'auto'), so no MD step runs.
    """
    built = load_system(protocol.system, protocol.base_dir)
    coordinates = resolve_coordinates(protocol, built.topology)
    conditions = build_conditions(protocol)
    system, umbrella_names = prepare_system(built, protocol, coordinates)
    settings = platform or protocol.platform
    if settings.name == "auto" and not probe:
        choice = PlatformChoice("auto", {})
    else:
        choice = choose_platform(settings, system, built.positions, timestep=protocol.timestep)
    return Plan(protocol, built, coordinates, conditions, system, umbrella_names, choice)


def _provenance(plan, seeds, swap_seed):
    versions = {}
    for name in ("boost", "openmm", "numpy", "pymbar", "mdtraj", "scipy", "pint"):
        try:
            versions[name] = package_metadata.version(name)
        except package_metadata.PackageNotFoundError:
            versions[name] = None
    return {
        "protocol_file": str(plan.protocol.path), "protocol_sha256": plan.protocol.sha256,
        "seed": plan.protocol.seed, "walker_seeds": seeds, "swap_seed": swap_seed,
        "platform": plan.platform.name, "platform_properties": plan.platform.properties,
        "platform_probe": [list(item) for item in plan.platform.probe],
        "versions": versions, "python": sys.version.split()[0], "host": socket.gethostname(),
        "machine": host_platform.platform(), "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }


def _create_folder(folder, plan, seeds, swap_seed):
    from openmm import app, unit

    folder.mkdir(parents=True, exist_ok=True)
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
        "protocol_sha256": plan.protocol.sha256,
    })
    return ledger


class Scheduler:
    """Runs a plan into a run folder."""

    def __init__(self, plan, folder, *, progress=True):
        self.plan = plan
        self.folder = Path(folder)
        self.progress = progress
        self.coordinate_list = list(plan.coordinates.values())
        self.umbrella_columns = [list(plan.coordinates).index(name) for name in plan.umbrella_names]
        self.periodic_a = [plan.coordinates[name].periodic for name in plan.umbrella_names]
        self.masses = plan.built.masses
        protocol = plan.protocol
        self.ladder_shape = (len(protocol.temperatures), *[len(a.centres) for a in protocol.umbrella])

    def run(self):
        plan, protocol = self.plan, self.plan.protocol
        state = check_folder_for(self.folder, protocol.text)
        if state == "same":
            raise RunFolderError(f"{self.folder}: already holds a run of this protocol; "
                                 "choose another folder.")
        seeds, swap_seed = derive_seeds(protocol.seed, plan.n_walkers)
        walkers = [Walker(r, plan.system, plan.umbrella_names, plan.built.positions, plan.built.box_vectors,
                          plan.conditions[r], timestep=protocol.timestep, friction=protocol.friction,
                          platform=plan.platform, seed=seeds[r]) for r in range(plan.n_walkers)]
        workers = SerialWorkers(walkers)
        ledger = _create_folder(self.folder, plan, seeds, swap_seed)
        frames = None
        if protocol.run.frame_every:
            frames = FrameWriter(self.folder, plan.built.topology, plan.n_walkers, timestep_ps=protocol.timestep,
                                 steps_between=protocol.run.frame_every * protocol.run.steps_per_cycle)
        try:
            if protocol.run.minimise:
                workers.minimise()
            workers.draw_velocities(seeds)
            self._loop(workers, ledger, frames, np.random.default_rng(swap_seed))
        finally:
            ledger.close()
            if frames:
                frames.close()
        return self.folder

    def _loop(self, workers, ledger, frames, rng):
        plan, run = self.plan, self.plan.protocol.run
        assignment = list(range(plan.n_walkers))
        cycle_ps = run.steps_per_cycle * plan.protocol.timestep
        bar = tqdm(total=run.n_cycles, unit="cycle", disable=not self.progress, desc="boost run",
                   dynamic_ncols=True)
        with bar:
            for cycle in range(run.n_cycles):
                observations = workers.propagate(run.steps_per_cycle)
                values_rc, u_kr = self._evaluate(observations, assignment, cycle)
                new_assignment, tally = self._swap(u_kr, assignment, cycle, rng)
                written = []
                if frames and (cycle + 1) % run.frame_every == 0:
                    written = [(r, frames.write(r, o.positions, o.box_vectors)) for r, o in enumerate(observations)]
                ledger.record_cycle(
                    cycle, time=(cycle + 1) * cycle_ps, production=cycle >= run.equilibration_cycles,
                    condition_r=assignment, potential_r=[o.potential for o in observations],
                    volume_r=[o.volume for o in observations], values_rc=values_rc, u_kr=u_kr,
                    swaps=tally, frames=written)
                assignment = new_assignment
                workers.assign([plan.conditions[k] for k in assignment])
                if (cycle + 1) % run.checkpoint_every == 0 or cycle + 1 == run.n_cycles:
                    write_checkpoint(self.folder, cycle=cycle, walker_states=workers.checkpoints(),
                                     scheduler_state={"assignment": assignment,
                                                      "rng": rng.bit_generator.state})
                bar.update()

    def _swap(self, u_kr, assignment, cycle, rng):
        settings = self.plan.protocol.exchange
        if settings is None:
            return assignment, ()
        if settings.scheme == "all_pairs":
            new, tally = swap_all_pairs(u_kr, assignment, rng, attempts=settings.attempts * len(assignment) ** 3)
        else:
            new, tally = swap_neighbours(u_kr, assignment, self.ladder_shape, cycle, rng,
                                         attempts=settings.attempts)
        return new, tally.pairs

    def _evaluate(self, observations, assignment, cycle):
        plan = self.plan
        values_rc = np.vstack([compute_coordinate_values_many(self.coordinate_list, o.positions, self.masses,
                                                              o.box_vectors) for o in observations]) \
            if self.coordinate_list else np.zeros((len(observations), 0))
        potential_r = np.array([o.potential for o in observations])
        u_kr = compute_reduced_potentials(
            plan.conditions, potential_r, values_rc[:, self.umbrella_columns], self.periodic_a,
            volume_r=[o.volume for o in observations], pressure=plan.protocol.pressure)
        bad = [r for r in range(len(observations))
               if not np.isfinite(potential_r[r]) or not np.all(np.isfinite(observations[r].positions))]
        if bad:
            r = bad[0]
            raise SimulationError(
                f"walker {r} in condition {assignment[r]} blew up at cycle {cycle} (energy "
                f"{potential_r[r]}): try a smaller timestep, minimisation, or a softer start.")
        return values_rc, u_kr


def run_protocol(protocol, folder, *, platform=None, progress=True):
    """Plan (check everything), then run ``protocol`` into ``folder``."""
    plan = make_plan(protocol, platform=platform)
    return Scheduler(plan, folder, progress=progress).run()
