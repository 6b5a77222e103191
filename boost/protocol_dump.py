"""A loaded protocol written back as YAML: what it asks for, in its own key names.

Every dimensional value carries its unit: nm, ps, K, kJ/mol, bar, amu, molar, as in
OpenMM's MD units, but angles in degrees (see :func:`boost.units.format_quantity`: the
shortest number that reads back to the same value, radians when no decimal number of
degrees does). Lists that a range made are written as that range again when it gives
them back exactly (``{from, to, count}`` windows, ``{lowest, highest, count}`` ladders,
``{lowest, count}`` solute scales; effective temperatures are written as the scales they give),
defaults are written out, run lengths are times. A system given by a bundled name or a
spec file is written as that name or path (relative to the protocol's folder, as
written); an inline spec as a mapping.

Reading the text back (from the same folder) gives an equal Protocol, all but its text,
path and hash; so dumping that gives the same text again.
"""

import numpy as np

from .protocol import SCHEMA_VERSION
from .solute_spec import dump_solute_spec
from .spec import dump_yaml
from .system_spec import dump_system_spec
from .units import format_quantity

_AXIS_NAMES = "xyz"


def dump_protocol(protocol):
    """YAML text of a protocol that :func:`boost.protocol.parse_protocol` reads back to it.

    Parameters
    ----------
    protocol : boost.protocol.Protocol

    Returns
    -------
    str
    """
    p = protocol
    tree = {"protocol": SCHEMA_VERSION, "title": p.title, "system": dump_system_spec(p.system), "seed": p.seed,
            "temperature": format_quantity(p.temperature, "temperature"),
            "timestep": format_quantity(p.timestep, "time"), "friction": format_quantity(p.friction, "rate"),
            "pressure": None if p.pressure is None else format_quantity(p.pressure, "pressure"),
            "platform": _platform(p.platform),
            "coordinates": {name: _coordinate(spec) for name, spec in p.coordinates.items()},
            "flat_bottom": [_flat_bottom(restraint, p.coordinates) for restraint in p.flat_bottom],
            "umbrella": {axis.coordinate: _umbrella(axis, p.coordinates[axis.coordinate]) for axis in p.umbrella},
            "temperatures": None if p.temperatures == (p.temperature,) else _ladder(p.temperatures),
            "solute": dump_solute_spec(p.solute),
            "exchange": p.exchange and {"pairs": p.exchange.pairs, "attempts": p.exchange.attempts},
            "run": _run(p.run, p.timestep),
            "basins": {name: {coordinate: [_value(bound, p.coordinates[coordinate]) for bound in interval]
                              for coordinate, interval in intervals.items()} for name, intervals in p.basins.items()},
            "analysis": _analysis(p.analysis, p.coordinates, p.run, p.timestep)}
    return dump_yaml({key: value for key, value in tree.items() if value not in (None, {}, [])})


def _value(value, coordinate):
    return format_quantity(value, coordinate.value_dimension)


def _spring(value, coordinate):
    return format_quantity(value, coordinate.spring_dimension)


def _platform(settings):
    written = {"name": settings.name}
    if settings.threads is not None:
        written["threads"] = settings.threads
    return {**written, "deterministic": settings.deterministic, "workers": settings.workers}


def _coordinate(spec):
    if spec.kind == "combination":
        return {"combination": {name: coefficient for coefficient, name in spec.terms}}
    points = [_point(point) for point in spec.points]
    if spec.kind == "position":
        return {"position": points[0], "axis": _AXIS_NAMES[spec.axis]}
    return {spec.kind: points}


def _point(point):
    if not point.centre:
        return point.atoms
    return {"centre": list(point.atoms) if isinstance(point.atoms, tuple) else point.atoms}


def _flat_bottom(restraint, coordinates):
    coordinate = coordinates[restraint.coordinate]
    written = {"coordinate": restraint.coordinate}
    for key, bound in (("from", restraint.lower), ("to", restraint.upper)):
        if bound is not None:
            written[key] = _value(bound, coordinate)
    return {**written, "spring": _spring(restraint.spring, coordinate)}


def _umbrella(axis, coordinate):
    centres, springs = axis.centres, axis.springs
    if _is_range(centres, np.linspace):
        written = {"from": _value(centres[0], coordinate), "to": _value(centres[-1], coordinate),
                   "count": len(centres)}
    else:
        written = [_value(centre, coordinate) for centre in centres]
    spring = (_spring(springs[0], coordinate) if len(set(springs)) == 1
              else [_spring(value, coordinate) for value in springs])
    return {"centres": written, "spring": spring}


def _ladder(temperatures):
    if _is_range(temperatures, np.geomspace):
        return {"lowest": format_quantity(temperatures[0], "temperature"),
                "highest": format_quantity(temperatures[-1], "temperature"), "count": len(temperatures)}
    return [format_quantity(value, "temperature") for value in temperatures]


def _is_range(values, spacing):
    """Whether ``spacing(first, last, count)`` (np.linspace or np.geomspace) gives ``values`` exactly."""
    return len(values) >= 2 and values[-1] > values[0] and \
        tuple(spacing(values[0], values[-1], len(values)).tolist()) == tuple(values)


def _cycles(cycles, run, timestep):
    return format_quantity(cycles * run.steps_per_cycle * timestep, "time")


def _run(run, timestep):
    def time(cycles):
        return _cycles(cycles, run, timestep)

    written = {"cycle": time(1), "equilibration": time(run.equilibration_cycles),
               "production": time(run.production_cycles)}
    if run.frame_every:
        written["frame_every"] = time(run.frame_every)
    written = {**written, "checkpoint_every": time(run.checkpoint_every), "minimise": run.minimise,
               "retries": run.retries}
    return written if run.builds_on is None else {**written, "builds_on": run.builds_on}


def _analysis(analysis, coordinates, run, timestep):
    bins = {}
    for entry in analysis.bins:
        coordinate = coordinates[entry.coordinate]
        bins[entry.coordinate] = {"from": _value(entry.edges[0], coordinate), "to": _value(entry.edges[-1], coordinate),
                                  "count": len(entry.edges) - 1}
    uncertainty = analysis.uncertainty
    block = "auto" if uncertainty.block_cycles == 0 else _cycles(uncertainty.block_cycles, run, timestep)
    written = {"bins": bins} if bins else {}
    return {**written, "energy_unit": analysis.energy_unit, "memory": format_quantity(analysis.memory, "memory"),
            "uncertainty": {"method": uncertainty.method, "resamples": uncertainty.resamples, "block": block}}
