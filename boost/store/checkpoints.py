"""Checkpoints: every walker's OpenMM checkpoint and the scheduler state, in two generations.

``checkpoints/state.bin`` is the newest, ``state-previous.bin`` the one before it. A file
is a first line ``boost checkpoint 2 <sha256 of the header line>``, a JSON header line
(cycle, run id, scheduler state, each walker blob's length and sha256), then the walker
blobs; no pickle. Reading checks every digest, so a damaged file is named, never loaded.
"""

import hashlib
import json
import os
from dataclasses import dataclass
from pathlib import Path

from ..exceptions import RunFolderError
from .folder import CHECKPOINTS, write_atomically

NEWEST = "state.bin"
PREVIOUS = "state-previous.bin"
_MAGIC = b"boost checkpoint 2 "


@dataclass(frozen=True)
class Checkpoint:
    """A verified checkpoint: the last cycle it holds (-1: before the first), the scheduler
    state, and the walkers' OpenMM checkpoint bytes, from file ``name``."""

    cycle: int
    scheduler: dict
    walker_states: list
    name: str


def write_checkpoint(folder, *, cycle, walker_states, scheduler_state, run_id):
    """Write a new newest checkpoint atomically; the old newest becomes the previous one."""
    digests = [hashlib.sha256(blob).hexdigest() for blob in walker_states]
    header = json.dumps({"cycle": cycle, "run_id": run_id, "scheduler": scheduler_state,
                         "lengths": [len(b) for b in walker_states], "sha256": digests}).encode()
    data = _MAGIC + hashlib.sha256(header).hexdigest().encode() + b"\n" + header + b"\n" + b"".join(walker_states)
    folder = Path(folder) / CHECKPOINTS
    folder.mkdir(exist_ok=True)
    if (folder / NEWEST).exists():
        os.replace(folder / NEWEST, folder / PREVIOUS)
    write_atomically(folder / NEWEST, data)


def has_checkpoint(folder):
    return any((Path(folder) / CHECKPOINTS / name).exists() for name in (NEWEST, PREVIOUS))


def read_checkpoint_file(path, run_id):
    """(Checkpoint, '') when ``path`` is intact and this run's, else (None, what is wrong)."""
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        return None, "is missing"
    except OSError as err:
        return None, f"cannot be read ({err.strerror or err})"
    first, _, rest = data.partition(b"\n")
    header, _, blobs = rest.partition(b"\n")
    if not first.startswith(_MAGIC):
        return None, "has a damaged first line (or was written by an older boost)"
    if hashlib.sha256(header).hexdigest().encode() != first[len(_MAGIC):]:
        return None, "has a damaged header"
    head = json.loads(header)
    if head["run_id"] != run_id:
        return None, "belongs to another run"
    states, offset = [], 0
    for walker, (length, digest) in enumerate(zip(head["lengths"], head["sha256"])):
        blob = blobs[offset: offset + length]
        if len(blob) < length:
            return None, f"is cut short (the checkpoint of walker {walker} is incomplete)"
        if hashlib.sha256(blob).hexdigest() != digest:
            return None, f"holds a damaged checkpoint of walker {walker}"
        states.append(blob)
        offset += length
    return Checkpoint(head["cycle"], head["scheduler"], states, Path(path).name), ""


def choose_checkpoint(folder, *, run_id, last_intact_cycle):
    """The newest intact checkpoint at or before ``last_intact_cycle`` (the ledger's last
    verified cycle), and a list of one-line notes on the files passed over.

    Raises RunFolderError when there is none: the ledger's cycles cannot be continued.
    """
    notes = []
    for name in (NEWEST, PREVIOUS):
        path = Path(folder) / CHECKPOINTS / name
        checkpoint, problem = read_checkpoint_file(path, run_id)
        if checkpoint is not None and checkpoint.cycle > last_intact_cycle:
            problem = f"is at cycle {checkpoint.cycle}, past the ledger's last intact cycle {last_intact_cycle}"
            checkpoint = None
        if checkpoint is not None:
            return checkpoint, notes
        if problem != "is missing" or name == NEWEST:
            notes.append(f"{CHECKPOINTS}/{name} {problem}")
    raise RunFolderError(f"{Path(folder)}: has no intact checkpoint to resume from ({'; '.join(notes)}); "
                         "this run cannot be continued: start a new run folder.")
