"""RunFolder: the one owner of a run folder's layout.

Where each record lives, whether a folder is new or ours, how a new run is laid out,
what a resume may start from (after checking the ledger, checkpoints and frames), and
what the folder recorded about how the run was made. The scheduler and the analysis
ask it; neither builds a path into a run folder itself.
"""

import json
import os
from pathlib import Path

from ..exceptions import RunFolderError
from .checkpoints import choose_checkpoint, has_checkpoint
from .folder import (CHECKPOINTS, FRAMES, IDENTITY, LEDGER, PROTOCOL, PROVENANCE, FolderLock, check_folder_for,
                     claim_folder, read_run_id, write_atomically)
from .frames import inspect_frames
from .ledger import Ledger, read_ledger_metadata, scan_ledger


class RunFolder:
    """A run folder on disk (see the package docstring for its layout)."""

    def __init__(self, path):
        self.path = Path(path)

    ledger = property(lambda self: self.path / LEDGER)
    protocol_copy = property(lambda self: self.path / PROTOCOL)
    provenance = property(lambda self: self.path / PROVENANCE)
    identity = property(lambda self: self.path / IDENTITY)
    topology = property(lambda self: self.path / "topology.pdb")
    checkpoints = property(lambda self: self.path / CHECKPOINTS)
    frames = property(lambda self: self.path / FRAMES)

    def __str__(self):
        return str(self.path)

    def state_for(self, protocol_text):
        """'new' (absent, empty, or ours with nothing recorded) or 'same' (ours, this protocol,
        a ledger there); RunFolderError for anything else (see check_folder_for)."""
        state = check_folder_for(self.path, protocol_text)
        return "same" if state == "same" and self.ledger.exists() else "new"

    def claim(self):
        """Make the folder boost's (identity file) unless it is already; returns the run id."""
        return claim_folder(self.path)

    def lock(self):
        return FolderLock(self.path)

    def lay_out(self, *, protocol_text, provenance, topology, positions_nm, conditions, ledger_header):
        """Write a new run's protocol copy, provenance, starting structure and empty ledger;
        returns the ledger's writer."""
        from openmm import app, unit

        write_atomically(self.protocol_copy, protocol_text)
        write_atomically(self.provenance, json.dumps(provenance, indent=2))
        with open(self.topology, "w") as handle:
            app.PDBFile.writeFile(topology, positions_nm * unit.nanometer, handle)
        ledger = Ledger(self.ledger, coordinate_names=tuple(ledger_header["coordinates"]))
        ledger.create(conditions, ledger_header)
        return ledger

    def recorded_protocol_text(self):
        """The protocol text the verified ledger records (the one its data were made with)."""
        return read_ledger_metadata(self.path)["protocol_text"]

    def record_extension(self, protocol_text, protocol_sha256, when):
        """Make the folder follow a protocol that extends the one it records: the ledger's
        header first (so a kill midway leaves the new protocol on record), then the protocol
        copy, then an entry in provenance.json's ``extensions``."""
        metadata = read_ledger_metadata(self.path)
        ledger = Ledger(self.ledger)
        try:
            ledger.amend_header({"protocol_text": protocol_text, "protocol_sha256": protocol_sha256})
        finally:
            ledger.close()
        write_atomically(self.protocol_copy, protocol_text)
        provenance = self.read_provenance()
        provenance.setdefault("extensions", []).append(
            {"from_protocol_sha256": metadata["protocol_sha256"], "to_protocol_sha256": protocol_sha256, "at": when})
        write_atomically(self.provenance, json.dumps(provenance, indent=2))

    def open_ledger(self, coordinate_names):
        """The ledger's writer, to go on recording (after resume_point has verified it)."""
        return Ledger(self.ledger, coordinate_names=tuple(coordinate_names))

    def resume_point(self, *, run_id, protocol_sha256, n_cycles):
        """Verify the folder before a resume; returns (state, notes).

        state: 'complete', None (nothing recorded yet: start afresh) or the newest intact
        Checkpoint at or before the ledger's last intact cycle; notes: one line for each
        damaged thing passed over. RunFolderError when the run cannot be continued.
        """
        n_recorded, first_bad, metadata = scan_ledger(self.path)
        if metadata.get("run_id") != run_id:
            raise RunFolderError(f"{self.ledger}: was not written by this run (its run id differs from "
                                 "the identity file's); resume only the folder a run created.")
        if metadata.get("protocol_sha256") != protocol_sha256:
            raise RunFolderError(f"{self.ledger}: was recorded for another protocol (the folder's "
                                 f"{PROTOCOL} was edited after the run started); choose another folder.")
        if first_bad is None and n_recorded >= n_cycles:
            return "complete", []
        if n_recorded == 0 and not has_checkpoint(self.path):
            return None, []
        last_intact = (n_recorded if first_bad is None else first_bad) - 1
        try:
            checkpoint, notes = choose_checkpoint(self.path, run_id=run_id, last_intact_cycle=last_intact)
        except RunFolderError:
            if first_bad is None:
                raise
            raise RunFolderError(f"{self.ledger}: cycle {first_bad} is damaged (its records fail their checksum) "
                                 "and no intact checkpoint comes before it; this run cannot be continued: start "
                                 "a new run folder.") from None
        if first_bad is not None:
            notes.insert(0, f"{LEDGER}: cycle {first_bad} is damaged")
        return checkpoint, notes

    def frames_to_keep(self, ledger, n_walkers, *, frame_bytes, n_atoms):
        """Per walker, how many frames to write on after (the ledger's records cut to what is
        intact on disk; records of lost frames are forgotten), and one line per problem."""
        counts, notes = [], []
        for check in inspect_frames(self.path, ledger.frame_records(n_walkers), frame_bytes, n_atoms):
            if check.problem:
                notes.append(f"{check.problem}; frames go on from frame {check.usable}")
            if check.usable < check.recorded:
                ledger.forget_frames_from(check.walker, check.usable)
            counts.append(check.usable)
        return counts, notes

    def read_provenance(self):
        """provenance.json as a dict; RunFolderError when it is missing or damaged."""
        try:
            record = json.loads(self.provenance.read_bytes())
            if not isinstance(record, dict):
                raise ValueError
            return record
        except (OSError, ValueError):
            raise RunFolderError(f"{self.provenance}: is missing or damaged; it records how the run was made "
                                 "(the platform a resume must use): restore it, or start a new run folder.") from None

    def recorded_platform(self):
        """(name, properties, probe rows) of the platform the run started on."""
        record = self.read_provenance()
        try:
            return (str(record["platform"]), dict(record["platform_properties"]),
                    tuple(tuple(row) for row in record.get("platform_probe", ())))
        except (KeyError, TypeError, ValueError):
            raise RunFolderError(f"{self.provenance}: is damaged (no platform recorded); it records the platform "
                                 "a resume must use: restore it, or start a new run folder.") from None

    def original_protocol_place(self):
        """Where the protocol file stood when the run started (relative paths in it are
        relative to that folder): provenance's 'protocol_folder' and 'protocol_file' when
        recorded (a relative one taken from the current folder, where ``boost run``
        usually started), else the protocol copy itself."""
        record = self.read_provenance() if self.provenance.is_file() else {}
        place = self.protocol_copy
        if record.get("protocol_file"):
            place = Path(record["protocol_file"])
            if record.get("protocol_folder"):
                place = Path(record["protocol_folder"]) / place.name
        return place

    def describe_source(self, source, cycles):
        """What the ledger header of a run that builds on ``source`` (a RunFolder whose
        ledger holds ``cycles`` cycles) records of it: where it is, seen from this folder
        and absolutely, its run id and how many cycles it held then."""
        absolute = Path(os.path.abspath(source.path))
        return {"relative": os.path.relpath(absolute, os.path.abspath(self.path)), "absolute": str(absolute),
                "run_id": read_run_id(source.path), "cycles": int(cycles)}

    def source(self):
        """(RunFolder, cycles) of the run this one builds on, as its ledger header records
        it, or None. Looked for beside this folder first (a study moved as a whole), then
        where it was; RunFolderError when neither holds the run with the recorded id."""
        record = read_ledger_metadata(self.path).get("builds_on")
        if not record:
            return None
        for candidate in (self.path / record["relative"], Path(record["absolute"])):
            if (candidate / IDENTITY).is_file() and read_run_id(candidate) == record["run_id"]:
                return RunFolder(candidate), int(record["cycles"])
        raise RunFolderError(f"{self.path}: builds on the run {record['run_id']}, which is neither at "
                             f"{self.path / record['relative']} nor at {record['absolute']}; put that run folder "
                             "back to analyse this one.")
