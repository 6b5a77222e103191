"""The build stage: a protocol in, a Plan out (system, coordinates, conditions, platform),
every input checked and nothing written. ``boost check`` stops here; ``boost run`` hands
the plan to the scheduler."""

import time
from dataclasses import dataclass, replace

import numpy as np

from .coordinates import compute_coordinate_values_many
from .engine import PlatformChoice, choose_platform, prepare_system, read_checkpoint_configurations
from .lineage import choose_nearest, conditions_to_run, read_source_run, source_chain
from .protocol import resolve_coordinates
from .provenance import describe_environment, describe_git
from .solute_spec import resolve_solute_atoms
from .store import choose_checkpoint, dcd_frame_bytes, read_ledger_conditions, read_run_id
from .systems import build_system
from .workers import rank_walkers


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
    ladder_shape: tuple = ()     # temperatures, solute scales, then window axes, of the conditions run (for swaps)
    solute: object = None        # boost.solute_scaling.SoluteScaledSystem without its system, or None
    source: object = None        # boost.lineage.SourceRun that run.builds_on names, or None
    starts: tuple = ()           # per walker (positions nm, box nm or None); empty: the system's own

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
    source = read_source_run(protocol) if protocol.run.builds_on is not None else None
    built = build_system(protocol.system)
    coordinates = resolve_coordinates(protocol, built.topology)
    conditions, ladder_shape = conditions_to_run(protocol, source)
    solute, scaled_built = _solute_scaled(protocol, built)
    system, umbrella_names = prepare_system(scaled_built, protocol, coordinates)
    settings = platform or protocol.platform
    if settings.name == "auto" and not probe:
        choice = PlatformChoice("auto", {})
    else:
        n_walkers = len(conditions) if comm is None else len(rank_walkers(len(conditions), comm, 0))
        choice = choose_platform(settings, system, built.positions, timestep=protocol.timestep,
                                 n_walkers=n_walkers, cores=cores,
                                 workers=settings.workers if workers is None else workers)
    starts = _stored_starts(source, system, conditions, coordinates, umbrella_names, built.masses) if source else ()
    return Plan(protocol, built, coordinates, conditions, system, umbrella_names, choice, ladder_shape, solute,
                source, starts)


def _stored_starts(source, system, conditions, coordinates, umbrella_names, masses):
    """Each walker's starting configuration: the one stored at the end of the source runs
    (their newest checkpoints) nearest to its condition (boost.lineage.choose_nearest)."""
    configurations, temperatures = [], []
    for folder, cycles in source_chain(source):
        checkpoint, _ = choose_checkpoint(folder.path, run_id=read_run_id(folder.path), last_intact_cycle=cycles - 1)
        held = read_ledger_conditions(folder.path)
        configurations += read_checkpoint_configurations(system, PlatformChoice(*folder.recorded_platform()),
                                                         checkpoint.walker_states)
        temperatures += [held[k].temperature / held[k].solute_scale for k in checkpoint.scheduler["assignment"]]
    umbrella = [coordinates[name] for name in umbrella_names]
    xyz = np.stack([positions for positions, _ in configurations])
    boxes = None if configurations[0][1] is None else np.stack([box for _, box in configurations])
    values_na = compute_coordinate_values_many(umbrella, xyz, masses, boxes)
    chosen = choose_nearest(conditions, values_na, temperatures, [c.periodic for c in umbrella])
    return tuple(configurations[n] for n in chosen)


def _solute_scaled(protocol, built):
    """(solute record, built system whose System is solute-scaled), or (None, built) without a solute.

    Scaled before restraints, umbrellas and a barostat are added: those stay unscaled.
    """
    if protocol.solute is None:
        return None, built
    from .solute_scaling import build_solute_scaled_system

    atoms = resolve_solute_atoms(protocol.solute, built.topology)
    scaled = build_solute_scaled_system(built.system, atoms, place=protocol.solute.place, whole_system=True)
    return replace(scaled, system=None), replace(built, system=scaled.system)


def describe_run(plan, seeds, swap_seed):
    """What provenance.json records of a run: protocol, seeds, platform, software, start time."""
    return {
        "protocol_file": str(plan.protocol.path), "protocol_folder": str(plan.protocol.base_dir.resolve()),
        "protocol_sha256": plan.protocol.sha256, "git": describe_git(plan.protocol.path),
        "seed": plan.protocol.seed, "walker_seeds": seeds, "swap_seed": swap_seed,
        "platform": plan.platform.name, "platform_properties": plan.platform.properties,
        "platform_probe": [list(item) for item in plan.platform.probe],
        **describe_environment(), "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }


def frame_bytes(plan):
    """Bytes of one DCD frame of the plan's system."""
    topology = plan.built.topology
    return dcd_frame_bytes(topology.getNumAtoms(), topology.getPeriodicBoxVectors() is not None)


def ledger_header(plan, run_id):
    """The ledger's meta table of a new run (checked by its header digest ever after)."""
    return {
        "coordinates": list(plan.coordinates),
        "periodic": [c.periodic for c in plan.coordinates.values()],
        "units": {name: c.unit for name, c in plan.coordinates.items()},
        "umbrella": list(plan.umbrella_names), "n_walkers": plan.n_walkers,
        "temperature": plan.protocol.temperature, "pressure": plan.protocol.pressure,
        "timestep_ps": plan.protocol.timestep, "steps_per_cycle": plan.protocol.run.steps_per_cycle,
        "protocol_sha256": plan.protocol.sha256, "protocol_text": plan.protocol.text, "run_id": run_id,
        "frame_atoms": plan.built.topology.getNumAtoms(), "frame_bytes": frame_bytes(plan),
    }
