"""A run folder's identity, ownership and lock; atomic writes.

A folder is boost's only by the identity file boost wrote into it (a random run id, also
recorded in the ledger); boost writes nowhere else, and never replaces a file it did not
create.
"""

import hashlib
import json
import os
import secrets
from pathlib import Path

from ..exceptions import RunFolderError

LEDGER = "ledger.sqlite"
LOCK = "lock"
PROTOCOL = "protocol.yaml"
PROVENANCE = "provenance.json"
IDENTITY = "boost-run.json"
CHECKPOINTS = "checkpoints"
FRAMES = "frames"
#: Every top-level entry boost writes into a run folder (SQLite may add its journal files).
OWN_ENTRIES = frozenset({IDENTITY, PROTOCOL, PROVENANCE, LEDGER, LOCK, "topology.pdb", FRAMES, CHECKPOINTS,
                         "analysis", LEDGER + "-journal", LEDGER + "-wal", LEDGER + "-shm"})


class OtherProtocol(RunFolderError):
    """A run folder of boost's whose protocol copy differs from the protocol given."""


def write_atomically(path, data):
    """Write bytes or text to ``path`` through a temporary file and a rename."""
    path = Path(path)
    temporary = path.with_name(path.name + ".partial")
    mode = "wb" if isinstance(data, bytes) else "w"
    with open(temporary, mode) as handle:
        handle.write(data)
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(temporary, path)


def protocol_hash(text):
    return hashlib.sha256(text.encode()).hexdigest()


def check_folder_for(path, protocol_text):
    """Return 'new' (absent, empty, or ours and not started) or 'same' (ours, this very protocol).

    A folder counts as boost's only by the identity file boost wrote into it; one without
    it must be empty, and one with it may hold only entries boost writes. Anything else is
    refused before a byte is written, so no user file is ever replaced.
    """
    path = Path(path)
    if not path.exists():
        return "new"
    if not path.is_dir():
        raise RunFolderError(f"{path}: is a file, not a run folder.")
    try:
        entries = sorted(entry.name for entry in path.iterdir())
    except OSError as err:
        raise RunFolderError(f"{path}: cannot be read ({err.strerror or err}).") from None
    if IDENTITY not in entries:
        if not entries:
            return "new"
        if PROTOCOL in entries and LEDGER in entries:
            raise RunFolderError(f"{path}: has no {IDENTITY} (a run folder of an older boost, or copied without it); "
                                 "boost only writes into folders it created: choose another folder.")
        raise RunFolderError(f"{path}: holds {_quoted(entries[0])}, which boost did not write; a run needs a new "
                             "or empty folder: choose another folder.")
    read_run_id(path)
    foreign = [name for name in entries if name not in OWN_ENTRIES and not _is_own_partial(name)]
    if foreign:
        raise RunFolderError(f"{path}: holds {_quoted(foreign[0])}, which boost did not write; move it out of the "
                             "run folder or choose another folder.")
    copy = path / PROTOCOL
    if not copy.exists():
        return "new"
    try:
        recorded = copy.read_bytes()
    except OSError as err:
        raise RunFolderError(f"{copy}: cannot be read ({err.strerror or err}).") from None
    if hashlib.sha256(recorded).hexdigest() != protocol_hash(protocol_text):
        raise OtherProtocol(f"{path}: belongs to another protocol (its {PROTOCOL} differs); "
                            "choose another folder or remove it.")
    return "same"


def claim_folder(path):
    """Create ``path`` if needed and its identity file, unless it has one; returns the run id."""
    path = Path(path)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise RunFolderError(f"{path}: cannot be made a run folder ({err.strerror or err}); "
                             "choose a folder you can write to.") from None
    identity = path / IDENTITY
    if identity.exists():
        return read_run_id(path)
    run_id = secrets.token_hex(16)
    try:
        fd = os.open(identity, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)   # never replaces a file
    except OSError as err:
        raise RunFolderError(f"{path}: cannot be made a run folder ({err.strerror or err}); "
                             "choose a folder you can write to.") from None
    with os.fdopen(fd, "w") as handle:
        handle.write(json.dumps({"run_id": run_id, "written_by": "boost"}) + "\n")
        handle.flush()
        os.fsync(handle.fileno())
    return run_id


def read_run_id(path):
    """The run id in a folder's identity file; RunFolderError when it is damaged."""
    identity = Path(path) / IDENTITY
    try:
        run_id = json.loads(identity.read_bytes().decode())["run_id"]
    except (OSError, UnicodeDecodeError, ValueError, KeyError, TypeError):
        raise RunFolderError(f"{identity}: is damaged (expected a JSON object with a run_id); "
                             "this folder cannot be trusted as a run folder.") from None
    if not (isinstance(run_id, str) and len(run_id) == 32 and all(c in "0123456789abcdef" for c in run_id)):
        raise RunFolderError(f"{identity}: is damaged (its run_id is not 32 hex digits).")
    return run_id


def _is_own_partial(name):
    return name.endswith(".partial") and name[: -len(".partial")] in OWN_ENTRIES


def _quoted(name):
    """A file name fit for a one-line message: escaped, and cut short when long."""
    text = repr(name)
    return text if len(text) <= 60 else text[:57] + "..."




def writer_of(path):
    """Who is writing the run folder ``path`` now (the lock file's text), or None.

    Reads only: the lock file is not made when absent, and a shared lock taken for an
    instant tells whether a live process holds the writer's exclusive one.
    """
    import fcntl

    try:
        fd = os.open(Path(path) / LOCK, os.O_RDONLY)
    except OSError:
        return None
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except OSError:
            return os.pread(fd, 4096, 0).decode(errors="replace").strip() or "another process"
        fcntl.flock(fd, fcntl.LOCK_UN)
        return None
    finally:
        os.close(fd)


class FolderLock:
    """An exclusive lock on a run folder, held with flock for as long as a run writes.

    The kernel drops the flock when its process dies, so a lock file left by a dead
    process is simply taken over; the file names the holder for the error message.
    """

    def __init__(self, folder):
        self.path = Path(folder) / LOCK
        self.fd = None

    def acquire(self):
        import fcntl
        import socket

        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            holder = os.pread(fd, 4096, 0).decode(errors="replace").strip() or "another process"
            os.close(fd)
            raise RunFolderError(f"{self.path.parent}: is being written by {holder}; "
                                 "wait for it to finish or stop it first.") from None
        previous = os.pread(fd, 4096, 0).decode(errors="replace").strip()
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"process {os.getpid()} on {socket.gethostname()}".encode(), 0)
        os.fsync(fd)
        self.fd = fd
        return previous      # holder text of a stale lock, or ''

    def release(self):
        if self.fd is not None:
            os.ftruncate(self.fd, 0)
            os.close(self.fd)
            self.fd = None

