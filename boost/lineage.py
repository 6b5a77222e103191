"""How a study grows: a run folder goes on for a longer production; a new run builds on
a finished one with more conditions.

A protocol that differs from the one a run folder's ledger records only by a longer
``run.production`` (``run.frame_every`` and ``run.checkpoint_every`` may change too)
continues that run from its last checkpoint: on a deterministic platform the result is
bit for bit the run that had asked for the longer production from the start, since every
random number comes from the seed and the checkpoint. Any other change is refused,
naming the keys that differ.

A protocol whose ``run.builds_on`` names a finished run folder keeps every condition of
that run and adds some (umbrella centres, temperatures): its run simulates only the added
conditions, each walker starting from the stored configuration nearest to its condition,
and the analysis pools both runs' samples in one MBAR. The earlier folder is only read.
"""

from dataclasses import dataclass, replace

import numpy as np

from .conditions import build_conditions, compute_bias_energies, index_of_condition, ladder_of, ladder_shape
from .exceptions import RunFolderError
from .protocol import parse_protocol
from .spec import differing_paths, parse_yaml
from .store import RunFolder, scan_ledger, writer_of
from .units import beta, format_coordinate

#: Keys a protocol may change to extend the run folder of an earlier version of itself.
EXTENDABLE = ("run.production", "run.frame_every", "run.checkpoint_every")


def check_extension(folder, recorded_text, protocol):
    """Refuse ``protocol`` for the run folder ``folder`` unless it extends the recorded one.

    Parameters
    ----------
    folder : path-like, for messages
    recorded_text : str, the protocol text the folder's ledger records
    protocol : boost.protocol.Protocol, the protocol given now

    Raises
    ------
    RunFolderError
        One line naming the keys that differ, or saying the production would shrink.
    """
    recorded = parse_protocol(recorded_text, protocol.path)
    paths = differing_paths(parse_yaml(recorded_text, protocol.path).value, parse_yaml(protocol.text, protocol.path).value)
    others = [p for p in paths if p not in EXTENDABLE]
    if others:
        shown = ", ".join(others[:3]) + (" ..." if len(others) > 3 else "")
        raise RunFolderError(f"{folder}: belongs to another protocol ({shown} differ from the run's); a run folder "
                             f"goes on only with a longer run.production ({', '.join(EXTENDABLE[1:])} may change "
                             "too): choose another folder.")
    if protocol.run.production_cycles < recorded.run.production_cycles:
        raise RunFolderError(f"{folder}: was run with run.production of {recorded.run.production_cycles} cycles; "
                             f"{protocol.path} asks for {protocol.run.production_cycles}, and a run cannot be "
                             "shortened (analyse it as it is, or choose another folder).")


# -- building on an earlier run: more conditions, pooled in one analysis ------------------

#: Protocol values a run that builds on another must share with it: they define the
#: ensemble every condition samples and what a sample records.
SHARED = (("system", "system"), ("coordinates", "coordinates"), ("flat_bottom", "flat-bottom restraints"),
          ("pressure", "pressure"), ("timestep", "timestep"))


@dataclass(frozen=True)
class SourceRun:
    """A finished run that a protocol builds on (run.builds_on), checked.

    Attributes
    ----------
    folder : RunFolder
    protocol : Protocol, as it ran (relative paths from where its file stood)
    cycles : int, cycles its ledger holds (all of them are pooled)
    conditions : tuple of Condition, every condition its data cover (its own and those of
        the runs it builds on): the protocol's whole grid
    """

    folder: object
    protocol: object
    cycles: int
    conditions: tuple


def read_source_run(protocol):
    """The run folder ``protocol`` builds on, checked before anything is written.

    Raises RunFolderError (one line naming the protocol, run.builds_on and what is wrong)
    when the folder is missing, not a run folder, being written, damaged, unfinished or
    made with another system, coordinates, restraints, pressure or timestep, or when
    ``protocol`` drops one of its conditions or adds none.
    """
    folder = RunFolder(protocol.source_folder)
    place = f"{protocol.path}: run.builds_on ({folder})"
    if not folder.path.is_dir():
        raise RunFolderError(f"{place}: no such folder; expected an earlier run folder.")
    if not folder.identity.is_file() or not folder.ledger.is_file():
        raise RunFolderError(f"{place}: is not a run folder (no {folder.identity.name} and ledger); expected "
                             "the folder of an earlier boost run.")
    holder = writer_of(folder.path)
    if holder:
        raise RunFolderError(f"{place}: is being written by {holder}; build on it once that run has finished.")
    try:
        n_cycles, first_bad, metadata = scan_ledger(folder.path)
    except RunFolderError as err:
        raise RunFolderError(f"{place}: {err}") from None
    if first_bad is not None:
        raise RunFolderError(f"{place}: its ledger is damaged at cycle {first_bad}; resume that run to repair "
                             "it first.")
    source = parse_protocol(metadata["protocol_text"], folder.original_protocol_place())
    if n_cycles < source.run.n_cycles:
        raise RunFolderError(f"{place}: is not finished (cycle {n_cycles} of {source.run.n_cycles}); finish it "
                             "first (boost run resumes it).")
    for key, what in SHARED:
        if getattr(source, key) != getattr(protocol, key):
            raise RunFolderError(f"{place}: its {what} differs from this protocol's ({key}); a run builds only on "
                                 "one with the same system, coordinates, restraints, pressure and timestep.")
    if source.solute is not None and protocol.solute is not None and source.solute.atoms != protocol.solute.atoms:
        raise RunFolderError(f"{place}: scales another solute (solute.atoms {source.solute.atoms!r}, here "
                             f"{protocol.solute.atoms!r}); the same solute scale means the same state only for "
                             "the same solute.")
    axes = tuple(a.coordinate for a in protocol.umbrella)
    if tuple(a.coordinate for a in source.umbrella) != axes:
        raise RunFolderError(f"{place}: has umbrellas along ({', '.join(a.coordinate for a in source.umbrella)}), "
                             f"this protocol along ({', '.join(axes)}); both must use the same coordinates.")
    covered = build_conditions(source)
    conditions = build_conditions(protocol)
    for condition in covered:
        if index_of_condition(condition, conditions) is None:
            raise RunFolderError(f"{place}: holds {describe_condition(condition, source)}, which this protocol "
                                 "lacks; a run that builds on another keeps all its conditions and adds to them.")
    return SourceRun(folder=folder, protocol=source, cycles=n_cycles, conditions=covered)


def conditions_to_run(protocol, source):
    """The conditions of ``protocol`` its source run does not cover, numbered from 0, and
    their ladder shape (for swaps); everything when there is no source."""
    conditions = build_conditions(protocol)
    shape = ladder_shape(protocol)
    if source is None:
        return conditions, shape
    added = [c for c in conditions if index_of_condition(c, source.conditions) is None]
    place = f"{protocol.path}: run.builds_on ({source.folder})"
    if not added:
        raise RunFolderError(f"{place}: this protocol adds no condition to that run; add umbrella centres or "
                             "temperatures (or, to run it longer, raise run.production and run it in its own folder).")
    added = tuple(replace(c, index=k) for k, c in enumerate(added))
    shape = ladder_of(added, shape)
    if protocol.exchange is not None and protocol.exchange.pairs != "any" and shape is None:
        raise RunFolderError(f"{place}: the conditions this protocol adds do not form a ladder of their own (every "
                             "added temperature with every added window), which swaps between neighbours need; "
                             "add whole rows of the grid, or set exchange.pairs: any.")
    return added, shape or (len(added),)


def describe_condition(condition, protocol):
    """A condition in words, for messages: its temperature and window centres."""
    parts = [f"{condition.temperature:g} K"]
    for axis, centre in zip(protocol.umbrella, condition.centres):
        parts.append(f"{axis.coordinate} = "
                     f"{format_coordinate(centre, protocol.coordinates[axis.coordinate].unit == 'rad')}")
    return "the condition " + ", ".join(parts)


def source_chain(source):
    """(RunFolder, cycles) of the source run and of each run it builds on in turn, newest first."""
    chain = [(source.folder, source.cycles)]
    while (earlier := chain[-1][0].source()) is not None:
        chain.append(earlier)
    return chain


def choose_nearest(conditions, values_na, temperature_n, periodic_a):
    """For each condition, the stored configuration n to start its walker from.

    Nearest first in umbrella energy of the condition (kT: window distance in spring
    widths), then in effective temperature T/λ (|ln|, T_n/λ_n that of the condition the
    configuration was sampled in). values_na: umbrella coordinate values of each configuration.
    """
    beta_k = np.array([beta(c.temperature) for c in conditions])[:, None]
    bias_kn = beta_k * compute_bias_energies(conditions, values_na, periodic_a)
    heat_kn = np.abs(np.log(np.array([c.temperature / c.solute_scale for c in conditions])[:, None]
                            / np.asarray(temperature_n, dtype=float)[None, :]))
    return [int(np.lexsort((heat_kn[k], bias_kn[k]))[0]) for k in range(len(conditions))]
