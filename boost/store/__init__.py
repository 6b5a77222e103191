"""The run folder: identity, ledger, frames, checkpoints, protocol copy and provenance.

Layout::

    RUN/
      boost-run.json    identity: a random run id (also in the ledger); marks the folder as boost's
      protocol.yaml     the protocol text, byte for byte
      provenance.json   protocol hash, seeds, platform, package versions, host, times
      ledger.sqlite     every cycle with checksums, cycles written in batches (ledger.py)
      topology.pdb      the starting structure, for reading frames with mdtraj
      frames/walker-NNN.dcd   one DCD file per walker, each frame's crc32 in the ledger (frames.py)
      checkpoints/      state.bin and state-previous.bin, with digests (checkpoints.py)

folder.py owns identity, ownership and the lock; everything read back is verified first.
"""

from .checkpoints import Checkpoint, choose_checkpoint, has_checkpoint, read_checkpoint_file, write_checkpoint
from .folder import (CHECKPOINTS, FRAMES, IDENTITY, LEDGER, LOCK, OWN_ENTRIES, PROTOCOL, PROVENANCE, FolderLock,
                     check_folder_for, claim_folder, protocol_hash, read_run_id, write_atomically, writer_of)
from .frames import FrameCheck, FrameWriter, dcd_frame_bytes, inspect_frames
from .runfolder import RunFolder
from .ledger import (FORMAT, Ledger, LedgerDamage, LedgerData, check_ledger_run_id, read_ledger,
                     read_ledger_conditions, read_ledger_metadata, scan_ledger)

__all__ = ["CHECKPOINTS", "FRAMES", "IDENTITY", "LEDGER", "LOCK", "OWN_ENTRIES", "PROTOCOL", "PROVENANCE",
           "Checkpoint", "FORMAT", "FolderLock", "RunFolder", "FrameCheck", "FrameWriter", "Ledger", "LedgerDamage", "LedgerData",
           "check_folder_for", "check_ledger_run_id", "choose_checkpoint", "claim_folder", "dcd_frame_bytes",
           "has_checkpoint", "inspect_frames", "protocol_hash", "read_checkpoint_file", "read_ledger",
           "read_ledger_conditions", "read_ledger_metadata", "read_run_id", "scan_ledger", "write_atomically", "write_checkpoint", "writer_of"]
