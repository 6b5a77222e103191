"""How a run folder may grow after it was started: a longer production.

A protocol that differs from the one a run folder's ledger records only by a longer
``run.production`` (``run.frame_every`` and ``run.checkpoint_every`` may change too)
continues that run from its last checkpoint: on a deterministic platform the result is
bit for bit the run that had asked for the longer production from the start, since every
random number comes from the seed and the checkpoint. Any other change is refused,
naming the keys that differ.
"""

from .exceptions import RunFolderError
from .protocol import parse_protocol
from .spec import differing_paths, parse_yaml

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
