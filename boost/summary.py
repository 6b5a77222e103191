"""Plain-text description of a plan: what a run will do, for ``boost check`` and ``boost run``."""

from .units import format_coordinate


def _angle_or_length(value, unit):
    return format_coordinate(value, unit == "rad")


def describe_plan(plan):
    protocol, run = plan.protocol, plan.protocol.run
    built = plan.built
    lines = [
        f"protocol  {protocol.path}  ({protocol.title})",
        f"system    {built.title or 'untitled'}: {built.system.getNumParticles()} atoms, "
        f"{'periodic box' if built.box_vectors is not None else 'no box'}",
    ]
    for name, coordinate in plan.coordinates.items():
        lines.append(f"coordinate {name}: {coordinate.kind} ({coordinate.unit})")
    for axis in protocol.umbrella:
        unit = plan.coordinates[axis.coordinate].unit
        lines.append(f"umbrella  {axis.coordinate}: {len(axis.centres)} windows from "
                     f"{_angle_or_length(axis.centres[0], unit)} to {_angle_or_length(axis.centres[-1], unit)}")
    temperatures = ", ".join(f"{t:.1f}" for t in protocol.temperatures)
    lines.append(f"temperatures (K) {temperatures}")
    if plan.solute is not None:
        scales = ", ".join(f"{s:.4g}" for s in protocol.solute.scales)
        hottest = protocol.temperature / protocol.solute.scales[-1]
        lines.append(f"solute    {len(plan.solute.solute)} atoms ({protocol.solute.atoms}); scales {scales} "
                     f"(effective temperatures up to {hottest:.1f} K)")
    lines.append(f"conditions {len(plan.conditions)}, walkers {plan.n_walkers}, "
                 f"swaps {'every cycle (' + protocol.exchange.pairs + ' pairs)' if protocol.exchange else 'none'}")
    if plan.source is not None:
        lines.append(f"builds on {plan.source.folder}: its {len(plan.source.conditions)} conditions are not run "
                     f"again; this run adds {len(plan.conditions)}, each walker starting from the stored "
                     "configuration nearest to its condition, and the analysis pools both")
    cycle_ps = run.steps_per_cycle * protocol.timestep
    lines.append(f"cycles    {run.equilibration_cycles} equilibration + {run.production_cycles} production, "
                 f"{run.steps_per_cycle} steps ({cycle_ps:g} ps) each; "
                 f"{run.n_cycles * run.steps_per_cycle * plan.n_walkers} steps in all")
    probe = ", ".join(f"{name} {rate:.0f} steps/s" + (f" x {at_once[0]}" if at_once and at_once[0] > 1 else "")
                      for name, rate, *at_once in plan.platform.probe)
    lines.append(f"platform  {plan.platform.name}" + (f" (measured: {probe})" if probe else ""))
    return "\n".join(lines)
