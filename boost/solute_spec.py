"""The protocol's ``solute`` section: which atoms are the solute and the ladder of solute scales.

Written as::

    solute:
      atoms: "not water and not element Na Cl"     # an mdtraj selection
      scales: [1, 0.8, 0.64, 0.5]                  # λ per rung, or {lowest: 0.5, count: 4}
      # or, instead of scales, the solute's effective temperatures T / λ:
      effective_temperatures: [300 K, 375 K, 470 K, 600 K]   # or {highest: 600 K, count: 4}

Rung 0 is always λ = 1, the physical potential (the one the analysis reports), and λ
falls strictly along the ladder, as the temperature ladder rises. The ranges are
geometric, from 1 down to ``lowest`` (or from ``temperature`` up to ``highest``), the
spacing that keeps neighbour acceptance even when the heat capacity is (common practice
for temperature ladders). Effective temperatures are taken at the protocol's
``temperature``: λ_k = T / T_k; a loaded protocol holds the scales only.

Read and checked without OpenMM or the system's files (:func:`read_solute_spec`); the
selection is resolved on the built topology (:func:`resolve_solute_atoms`).
"""

from dataclasses import dataclass, field

import numpy as np

from .exceptions import ProtocolError
from .limits import MAX_COUNT
from .solute_parts import check_solute_scale
from .units import format_quantity

#: Relative tolerance within which the first effective temperature must equal ``temperature``.
_SAME_TEMPERATURE = 1e-9


@dataclass(frozen=True)
class SoluteSpec:
    """The solute and its ladder of solute scales, as the protocol gives them.

    Attributes
    ----------
    atoms : str, an mdtraj selection
    scales : tuple of float, λ per rung: 1.0 first, then strictly falling, each in (0, 1]
    place : str, 'file: solute.atoms', for errors found when the selection is resolved
    """

    atoms: str
    scales: tuple
    place: str = field(compare=False)


def read_solute_spec(node, temperature):
    """The ``solute`` section (a boost.spec.Node) as a SoluteSpec, or None when absent.

    ``temperature``: the protocol's, in K, for effective temperatures.
    """
    if node.value is None:
        return None
    node.mapping(allowed=("atoms", "scales", "effective_temperatures"), required=("atoms",))
    atoms = node.get("atoms")
    atoms.text()
    given = [key for key in ("scales", "effective_temperatures") if node.has(key)]
    if len(given) != 1:
        node.fail("a mapping with 'atoms' and exactly one of 'scales' or 'effective_temperatures'")
    if given[0] == "scales":
        scales = _read_scales(node.get("scales"))
    else:
        scales = _read_effective_temperatures(node.get("effective_temperatures"), temperature)
    return SoluteSpec(atoms=atoms.value, scales=scales, place=atoms.place)


def _read_scales(node):
    if isinstance(node.value, list):
        items = node.sequence(min_length=2, max_length=MAX_COUNT)
        scales = tuple(check_solute_scale(item.number(), place=item.place) for item in items)
        if scales[0] != 1.0:
            items[0].fail("1 (the first rung is the physical potential, which the analysis reports)")
    else:
        if not isinstance(node.value, dict):
            node.fail("a list of solute scales [1, ...] or {lowest, count}")
        node.mapping(allowed=("lowest", "count"), required=("lowest", "count"))
        lowest = node.get("lowest")
        value = check_solute_scale(lowest.number(), place=lowest.place)
        if value == 1.0:
            lowest.fail("below 1 (the ladder runs from 1 down to it)")
        count = node.get("count").integer(minimum=2, maximum=MAX_COUNT)
        scales = tuple(np.geomspace(1.0, value, count).tolist())
    _check_falling(node, scales, "solute scales falling strictly from 1")
    return scales


def _read_effective_temperatures(node, temperature):
    if isinstance(node.value, list):
        items = node.sequence(min_length=2, max_length=MAX_COUNT)
        ladder = [item.quantity("temperature", positive=True) for item in items]
        if abs(ladder[0] - temperature) > _SAME_TEMPERATURE * temperature:
            items[0].fail(f"the protocol's temperature ({format_quantity(temperature, 'temperature')}): "
                          "the first rung is the physical potential, which the analysis reports")
        ladder[0] = temperature
    else:
        if not isinstance(node.value, dict):
            node.fail("a list of temperatures starting at the protocol's or {highest, count}")
        node.mapping(allowed=("highest", "count"), required=("highest", "count"))
        highest = node.get("highest").quantity("temperature", positive=True)
        if not highest > temperature:
            node.get("highest").fail(f"above the protocol's temperature ({format_quantity(temperature, 'temperature')})")
        count = node.get("count").integer(minimum=2, maximum=MAX_COUNT)
        ladder = np.geomspace(temperature, highest, count).tolist()
    if any(b <= a for a, b in zip(ladder, ladder[1:])):
        node.fail("a strictly increasing list of temperatures")
    scales = tuple(temperature / t for t in ladder)
    _check_falling(node, scales, "effective temperatures whose scales T / T_k differ (they are too close)")
    return scales


def _check_falling(node, scales, expected):
    if any(b >= a for a, b in zip(scales, scales[1:])) or not all(0.0 < s <= 1.0 for s in scales):
        node.fail(expected)


def dump_solute_spec(spec):
    """The section as plain data for the protocol dump: scales as their range when it gives them
    back exactly, else as a list of numbers."""
    if spec is None:
        return None
    scales = spec.scales
    if tuple(np.geomspace(1.0, scales[-1], len(scales)).tolist()) == scales:
        written = {"lowest": scales[-1], "count": len(scales)}
    else:
        written = list(scales)
    return {"atoms": spec.atoms, "scales": written}


# -- atoms (needs the built topology) ---------------------------------------------------
def resolve_solute_atoms(spec, topology):
    """The solute's atom indices on ``topology`` (an openmm.app.Topology), sorted.

    Raises a one-line ProtocolError naming ``solute.atoms`` for a selection mdtraj cannot
    read, one that matches no atom, or one that matches every atom of a system with
    solvent (water, or a periodic box): then there is nothing to keep cold. In vacuum the
    whole molecule may be the solute.
    """
    import mdtraj

    md_topology = mdtraj.Topology.from_openmm(topology)
    try:
        atoms = [int(i) for i in md_topology.select(spec.atoms)]
    except Exception as err:  # mdtraj raises several types for a bad selection
        raise ProtocolError(f"{spec.place} must be an mdtraj selection. "
                            f"Got {spec.atoms!r}, which mdtraj cannot read ({_brief(err)}).") from None
    if not atoms:
        raise ProtocolError(f"{spec.place} must select at least one atom. Got {spec.atoms!r}, which matches none.")
    solvent = topology.getPeriodicBoxVectors() is not None or md_topology.select("water").size > 0
    if len(atoms) == md_topology.n_atoms and solvent:
        raise ProtocolError(f"{spec.place} must select the solute only, not the solvent around it. Got "
                            f"{spec.atoms!r}, which matches all {len(atoms)} atoms of a system with solvent "
                            "(water or a periodic box).")
    return sorted(atoms)



def _brief(err, length=100):
    """mdtraj's reason on one short line: its parser's messages span lines and list its grammar;
    their end says where the text went wrong."""
    text = " ".join(str(err).splitlines()[0].split())
    return text if len(text) <= length else "..." + text[-length:]
