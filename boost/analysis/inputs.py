"""What the analysis reads from a run folder, verified: the ledger (checksums), the
protocol the run was made with, and a report on frames and checkpoints.

The ledger is the record of what was run. The folder's protocol copy may have been
edited since: edits to basins and analysis settings (and the title) are honoured, with
a warning; any other edit is refused, since the ledger's data were made without it.
"""

import warnings

from ..exceptions import BoostWarning, RunFolderError
from ..protocol import parse_protocol
from ..spec import differing_paths, parse_yaml, read_text
from ..store import RunFolder, inspect_frames, protocol_hash, read_checkpoint_file, read_ledger, read_run_id
from ..store.checkpoints import NEWEST
from .pooling import pool_runs
from .results import RunAbout

#: Top-level protocol sections that may be edited between a run and its analysis.
EDITABLE_AFTER_RUN = ("basins", "analysis", "title")


def load_study(folder):
    """(protocol, data, own): the run's protocol, the data to analyse and the run's own
    ledger data. ``data`` is ``own`` unless the run builds on earlier runs: then it pools
    them all (boost.analysis.pooling), each with every cycle it holds now (an earlier
    run extended after the later one started adds its new cycles)."""
    protocol, own = load_run(folder)
    runs, at = [(RunFolder(folder), own)], RunFolder(folder)
    while (earlier := at.source()) is not None:
        at, _ = earlier
        runs.append((at, load_run(at.path)[1]))
    return protocol, own if len(runs) == 1 else pool_runs(protocol, runs), own


def load_run(folder):
    """The protocol of a run folder and its verified ledger (reduced potentials not read)."""
    folder = RunFolder(folder)
    checkpoint_cycle = _checkpoint_cycle(folder)      # before the ledger: a running run only adds cycles
    data = read_ledger(folder.path, reduced=False)
    if checkpoint_cycle is not None and checkpoint_cycle >= len(data.cycle_t):
        raise RunFolderError(f"{folder}: the ledger holds {len(data.cycle_t)} cycles but the run's checkpoint is "
                             f"at cycle {checkpoint_cycle}: cycles are missing from the ledger, so it cannot be "
                             "analysed.")
    protocol = _protocol_of_run(folder, data.metadata)
    _report_frames(folder, data)
    return protocol, data


def _protocol_of_run(folder, metadata):
    path = folder.protocol_copy
    recorded = metadata.get("protocol_text")
    if recorded is not None and protocol_hash(recorded) != metadata.get("protocol_sha256"):
        recorded = None
    if not path.exists() and recorded is not None:
        warnings.warn(f"{path}: is missing; the protocol text recorded in the ledger is used.", BoostWarning)
        return parse_protocol(recorded, path)
    text = read_text(path, "protocol copy")
    if protocol_hash(text) == metadata.get("protocol_sha256"):
        return parse_protocol(text, path)
    if recorded is None:
        raise RunFolderError(f"{path}: was edited after the run (it no longer matches the hash the ledger "
                             "recorded); restore the original to analyse this run.")
    edited = [p for p in differing_paths(parse_yaml(recorded, path).value, parse_yaml(text, path).value)
              if p.split(".")[0] not in EDITABLE_AFTER_RUN]
    if edited:
        shown = ", ".join(edited[:3]) + (" ..." if len(edited) > 3 else "")
        raise RunFolderError(f"{path}: was edited after the run ({shown} differ from what was run, as the "
                             f"ledger records it); only {', '.join(EDITABLE_AFTER_RUN)} may change between a run "
                             "and its analysis: undo the other edits.")
    warnings.warn(f"{path}: was edited after the run; its {', '.join(EDITABLE_AFTER_RUN)} sections are used, "
                  "everything else is as the ledger records it.", BoostWarning)
    return parse_protocol(text, path)


def _checkpoint_cycle(folder):
    """The cycle of the run's intact newest checkpoint (None: no identity, none, or damaged)."""
    newest = folder.checkpoints / NEWEST
    if not folder.identity.exists() or not newest.exists():
        return None
    checkpoint, _ = read_checkpoint_file(newest, read_run_id(folder.path))
    return None if checkpoint is None else checkpoint.cycle


def _report_frames(folder, data):
    meta = data.metadata
    if not any(data.frame_crcs) or "frame_bytes" not in meta:
        return
    for check in inspect_frames(folder.path, data.frame_crcs, meta["frame_bytes"], meta["frame_atoms"]):
        if check.problem:
            warnings.warn(f"{check.problem} (frames are not used by this analysis; its numbers are unaffected).",
                          BoostWarning)


def describe_run_folder(folder, protocol, data, pooled=None):
    """What was run, for a report's header (RunAbout): the protocol and provenance.json.
    ``data``: the run's own ledger data; ``pooled``: what the analysis pooled (default: ``data``)."""
    pooled = data if pooled is None else pooled
    folder = RunFolder(folder)
    try:
        record = folder.read_provenance()
    except RunFolderError:
        record = {}
    git = record.get("git") if isinstance(record.get("git"), dict) else {}
    system = protocol.system
    run = protocol.run
    cycle_ps = run.steps_per_cycle * protocol.timestep
    text = data.metadata.get("protocol_text")
    return RunAbout(
        title=protocol.title, system=_system_text(system),
        conditions=len(pooled.conditions), walkers=int(pooled.condition_rt.shape[0]), cycle_ps=cycle_ps,
        cycles_planned=run.n_cycles, cycles_done=len(data.cycle_t), production_ps=run.production_cycles * cycle_ps,
        platform=str(record.get("platform", "")), commit=str(git.get("commit") or ""),
        protocol_text=text if isinstance(text, str) else "")


def _system_text(system):
    """The system as the protocol names it: its title, its bundled name or file, or its kind."""
    if getattr(system, "title", ""):
        return system.title
    if getattr(system, "reference", None):
        return str(system.reference)
    key = getattr(system, "source_key", None)
    return f"{key} (written in the protocol)" if key else "written in the protocol"
