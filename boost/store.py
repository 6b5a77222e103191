"""The run folder: ledger, frames, checkpoints, protocol copy and provenance.

Layout::

    RUN/
      boost-run.json    identity: a random run id (also in the ledger); marks the folder as boost's
      protocol.yaml     the protocol text, byte for byte
      provenance.json   protocol hash, seeds, platform, package versions, host, times
      ledger.sqlite     one transaction per cycle (see below)
      topology.pdb      the starting structure, for reading frames with mdtraj
      frames/walker-NNN.dcd
      checkpoints/      OpenMM checkpoints and scheduler state

Ledger tables (units in column comments): ``conditions`` (index, temperature K, centres,
springs as JSON), ``cycles`` (cycle, time ps, production 0/1), ``samples`` (cycle,
walker, condition, potential kJ/mol, volume nm³, one column per coordinate in nm or rad,
reduced: float64 bytes of u_k for every condition k, in kT), ``swaps`` (cycle, pair of
conditions, attempts, accepted) and ``frames`` (walker, cycle, index in its DCD file).
"""

import hashlib
import itertools
import json
import os
import secrets
import sqlite3
import struct
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .conditions import Condition
from .exceptions import RunFolderError

LEDGER = "ledger.sqlite"
LOCK = "lock"
PROTOCOL = "protocol.yaml"
PROVENANCE = "provenance.json"
IDENTITY = "boost-run.json"
#: Every top-level entry boost writes into a run folder (SQLite may add its journal files).
OWN_ENTRIES = frozenset({IDENTITY, PROTOCOL, PROVENANCE, LEDGER, LOCK, "topology.pdb", "frames", "checkpoints",
                         "analysis", LEDGER + "-journal", LEDGER + "-wal", LEDGER + "-shm"})


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
    entries = sorted(entry.name for entry in path.iterdir())
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
    if protocol_hash(copy.read_text(encoding="utf-8", errors="replace")) != protocol_hash(protocol_text):
        raise RunFolderError(f"{path}: belongs to another protocol (its {PROTOCOL} differs); "
                             "choose another folder or remove it.")
    return "same"


def claim_folder(path):
    """Create ``path`` if needed and its identity file, unless it has one; returns the run id."""
    path = Path(path)
    path.mkdir(parents=True, exist_ok=True)
    identity = path / IDENTITY
    if identity.exists():
        return read_run_id(path)
    run_id = secrets.token_hex(16)
    fd = os.open(identity, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)   # never replaces a file
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


def check_ledger_run_id(path, run_id):
    """Refuse a ledger that another run wrote (copied in, or the identity file replaced)."""
    connection = sqlite3.connect(f"file:{Path(path) / LEDGER}?mode=ro", uri=True)
    try:
        row = connection.execute("SELECT value FROM meta WHERE key = 'run_id'").fetchone()
        recorded = json.loads(row[0]) if row else None
    except (sqlite3.DatabaseError, ValueError, TypeError):
        raise RunFolderError(f"{Path(path) / LEDGER}: is damaged (its run id cannot be read); "
                             "start a new run folder.") from None
    finally:
        connection.close()
    if recorded != run_id:
        raise RunFolderError(f"{Path(path) / LEDGER}: was not written by this run (its run id differs from "
                             f"{IDENTITY}'s); resume only the folder a run created.")


def _is_own_partial(name):
    return name.endswith(".partial") and name[: -len(".partial")] in OWN_ENTRIES


def _quoted(name):
    """A file name fit for a one-line message: escaped, and cut short when long."""
    text = repr(name)
    return text if len(text) <= 60 else text[:57] + "..."


class Ledger:
    """Writer of the SQLite ledger; one transaction per cycle."""

    def __init__(self, path, *, coordinate_names=()):
        self.path = Path(path)
        self.coordinate_names = tuple(coordinate_names)
        self.connection = sqlite3.connect(self.path)
        self.connection.execute("PRAGMA journal_mode=WAL")
        self.connection.execute("PRAGMA synchronous=NORMAL")

    def create(self, conditions, metadata):
        columns = "".join(f', "{name}" REAL' for name in self.coordinate_names)
        with self.connection:
            self.connection.executescript(f"""
                CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT);
                CREATE TABLE conditions (condition INTEGER PRIMARY KEY, temperature REAL,
                                         centres TEXT, springs TEXT);
                CREATE TABLE cycles (cycle INTEGER PRIMARY KEY, time REAL, production INTEGER);
                CREATE TABLE samples (cycle INTEGER, walker INTEGER, condition INTEGER,
                                      potential REAL, volume REAL{columns}, reduced BLOB,
                                      PRIMARY KEY (cycle, walker));
                CREATE TABLE swaps (cycle INTEGER, condition_i INTEGER, condition_j INTEGER,
                                    attempts INTEGER, accepted INTEGER);
                CREATE TABLE frames (walker INTEGER, cycle INTEGER, frame INTEGER);
            """)
            self.connection.executemany("INSERT INTO meta VALUES (?, ?)",
                                        [(k, json.dumps(v)) for k, v in metadata.items()])
            self.connection.executemany(
                "INSERT INTO conditions VALUES (?, ?, ?, ?)",
                [(c.index, c.temperature, json.dumps(c.centres), json.dumps(c.springs)) for c in conditions])

    def record_cycle(self, cycle, *, time, production, condition_r, potential_r, volume_r,
                     values_rc, u_kr, swaps=(), frames=()):
        """Store one complete cycle in one transaction.

        values_rc : ndarray, shape (n_walkers, n_coordinates), nm or rad
        u_kr : ndarray, shape (n_conditions, n_walkers), kT
        swaps : iterable of (condition_i, condition_j, attempts, accepted)
        frames : iterable of (walker, frame index)
        """
        placeholders = ", ".join("?" * (6 + len(self.coordinate_names)))
        rows = [(cycle, r, int(condition_r[r]), float(potential_r[r]),
                 None if volume_r[r] is None else float(volume_r[r]),
                 *map(float, values_rc[r]), np.ascontiguousarray(u_kr[:, r], dtype="<f8").tobytes())
                for r in range(len(condition_r))]
        with self.connection:
            self.connection.execute("INSERT INTO cycles VALUES (?, ?, ?)", (cycle, time, int(production)))
            self.connection.executemany(f"INSERT INTO samples VALUES ({placeholders})", rows)
            self.connection.executemany("INSERT INTO swaps VALUES (?, ?, ?, ?, ?)",
                                        [(cycle, *map(int, s)) for s in swaps])
            self.connection.executemany("INSERT INTO frames VALUES (?, ?, ?)",
                                        [(walker, cycle, index) for walker, index in frames])

    def truncate_after(self, cycle):
        """Forget every record after ``cycle`` (-1: all), in one transaction."""
        with self.connection:
            for table in ("cycles", "samples", "swaps", "frames"):
                self.connection.execute(f"DELETE FROM {table} WHERE cycle > ?", (cycle,))

    def frame_counts(self, n_walkers):
        """Frames recorded per walker (the frame files may hold more, from a cycle in flight)."""
        counts = dict(self.connection.execute("SELECT walker, COUNT(*) FROM frames GROUP BY walker"))
        return [counts.get(r, 0) for r in range(n_walkers)]

    def record_retry(self, cycle, walker, seed):
        with self.connection:
            self.connection.execute("CREATE TABLE IF NOT EXISTS retries (cycle INTEGER, walker INTEGER, seed INTEGER)")
            self.connection.execute("INSERT INTO retries VALUES (?, ?, ?)", (cycle, walker, seed))

    def last_cycle(self):
        row = self.connection.execute("SELECT MAX(cycle) FROM cycles").fetchone()
        return -1 if row[0] is None else row[0]

    def close(self):
        self.connection.close()


@dataclass(frozen=True)
class LedgerData:
    """Everything the analysis needs, read from a ledger.

    Attributes
    ----------
    conditions : tuple of Condition
    coordinate_names : tuple of str
    cycle_t, time_t, production_t : ndarray, shape (n_cycles,)
    condition_rt : ndarray of int, shape (n_walkers, n_cycles)
    potential_rt, volume_rt : ndarray, shape (n_walkers, n_cycles), kJ/mol and nm³ (NaN: none)
    values_rtc : ndarray, shape (n_walkers, n_cycles, n_coordinates), nm or rad
    u_krt : ndarray, shape (n_conditions, n_walkers, n_cycles), kT
    swaps : ndarray, shape (n_swap_rows, 5): cycle, condition_i, condition_j, attempts, accepted
    metadata : dict
    """

    conditions: tuple
    coordinate_names: tuple
    cycle_t: np.ndarray
    time_t: np.ndarray
    production_t: np.ndarray
    condition_rt: np.ndarray
    potential_rt: np.ndarray
    volume_rt: np.ndarray
    values_rtc: np.ndarray
    u_krt: np.ndarray
    swaps: np.ndarray
    metadata: dict


def recorded_last_cycle(folder):
    """The last complete cycle in a run folder's ledger (-1 when none), read only."""
    path = Path(folder) / LEDGER
    connection = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        value = connection.execute("SELECT MAX(cycle) FROM cycles").fetchone()[0]
    finally:
        connection.close()
    return -1 if value is None else value


def read_ledger(folder, *, reduced=True):
    """Read a run folder's ledger (complete cycles only) into arrays.

    ``reduced=False`` leaves ``u_krt`` empty (shape (n_conditions, n_walkers, 0)): the
    analysis recomputes reduced potentials for the samples it keeps, which needs far less
    memory than all of them.
    """
    path = Path(folder) / LEDGER
    if not path.is_file():
        raise RunFolderError(f"{folder}: is not a run folder (no {LEDGER}).")
    connection = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        connection.execute("BEGIN")          # one snapshot, even while the run goes on writing
        return _read(connection, reduced)
    except sqlite3.DatabaseError as err:
        raise RunFolderError(f"{path}: cannot be read as a ledger ({err}).") from None
    finally:
        connection.close()


def _read(connection, with_reduced):
    metadata = {k: json.loads(v) for k, v in connection.execute("SELECT key, value FROM meta")}
    conditions = tuple(Condition(i, t, tuple(json.loads(c)), tuple(json.loads(s)))
                       for i, t, c, s in connection.execute("SELECT * FROM conditions ORDER BY condition"))
    names = tuple(metadata["coordinates"])
    cycles = _read_numbers(connection.execute("SELECT cycle, time, production FROM cycles ORDER BY cycle"), 3)
    n_walkers, n_cycles, n_conditions = metadata["n_walkers"], len(cycles), len(conditions)
    table = np.empty((n_cycles, n_walkers, 3 + len(names)))
    u_trk = np.empty((n_cycles if with_reduced else 0, n_walkers, n_conditions))
    quoted = "".join(f', "{name}"' for name in names)
    reduced = ", reduced" if with_reduced else ""
    cursor = connection.execute(f"SELECT cycle, walker, condition, potential, volume{quoted}{reduced} "
                                f"FROM samples WHERE cycle < ? ORDER BY cycle, walker", (n_cycles,))
    width = 5 + len(names)
    while rows := cursor.fetchmany(20000):   # streamed: memory stays that of the arrays
        numbers = _float_rows([row[:width] for row in rows] if with_reduced else rows, width)
        t, r = numbers[:, 0].astype(int), numbers[:, 1].astype(int)
        table[t, r] = numbers[:, 2:]
        if with_reduced:
            u_trk[t, r] = np.frombuffer(b"".join(row[-1] for row in rows), dtype="<f8").reshape(len(rows), -1)
    swaps = _read_numbers(connection.execute("SELECT * FROM swaps WHERE cycle < ? ORDER BY cycle", (n_cycles,)),
                          5).astype(int)
    return LedgerData(
        conditions=conditions, coordinate_names=names,
        cycle_t=cycles[:, 0].astype(int), time_t=cycles[:, 1], production_t=cycles[:, 2].astype(bool),
        condition_rt=table[:, :, 0].T.astype(int), potential_rt=np.ascontiguousarray(table[:, :, 1].T),
        volume_rt=np.ascontiguousarray(table[:, :, 2].T), values_rtc=np.ascontiguousarray(table[:, :, 3:].transpose(1, 0, 2)),
        u_krt=np.ascontiguousarray(u_trk.transpose(2, 1, 0)), swaps=swaps, metadata=metadata)


def _read_numbers(cursor, width):
    """All rows of a numeric query as floats, shape (n_rows, width), fetched in chunks:
    millions of rows never exist as Python tuples at once (twice as fast as fetchall)."""
    chunks = [np.empty((0, width))]
    while rows := cursor.fetchmany(20000):
        chunks.append(_float_rows(rows, width))
    return np.concatenate(chunks)


def _float_rows(rows, width):
    """Rows of numbers (None: NaN) as an array of shape (len(rows), width), built without
    a Python object per cell: 5x faster than np.array(rows) on millions of rows."""
    flat = np.fromiter(itertools.chain.from_iterable(rows), dtype=float, count=len(rows) * width)
    return flat.reshape(len(rows), width)


_DCD_HEADER = 276   # bytes OpenMM's DCDFile writes before the first frame


def _dcd_frame_bytes(n_atoms, periodic):
    return (56 if periodic else 0) + 3 * (8 + 4 * n_atoms)


class FrameWriter:
    """One DCD file per walker under frames/, appended at the frame interval.

    ``counts``: frames already recorded per walker (resume); each file is cut back to
    that many frames, so a frame written in a cycle that never completed disappears.
    """

    def __init__(self, folder, topology, n_walkers, *, timestep_ps, steps_between, counts=None):
        from openmm import unit

        self._unit = unit
        self.topology = topology
        self.dcd_args = (timestep_ps * unit.picosecond, steps_between, steps_between)
        (Path(folder) / "frames").mkdir(exist_ok=True)
        self.paths = [Path(folder) / "frames" / f"walker-{r:03d}.dcd" for r in range(n_walkers)]
        self.frame_bytes = _dcd_frame_bytes(topology.getNumAtoms(), topology.getPeriodicBoxVectors() is not None)
        self.handles, self.files = [], []
        self._open(list(counts) if counts else [0] * n_walkers)

    def _open(self, counts):
        from openmm import app

        self.close()
        self.counts = list(counts)
        self.handles, self.files = [], []
        for path, count in zip(self.paths, self.counts):
            append = count > 0 and path.exists()
            handle = open(path, "r+b" if append else "wb")
            if append:
                handle.truncate(_DCD_HEADER + count * self.frame_bytes)
                handle.seek(8)
                handle.write(struct.pack("<i", count))
            self.handles.append(handle)
            self.files.append(app.DCDFile(handle, self.topology, *self.dcd_args, append=append))

    def cut_back(self, counts):
        """Cut each file back to ``counts`` frames (after returning to a checkpoint)."""
        self._open(counts)

    def write(self, walker, positions, box_vectors):
        unit = self._unit
        box = None if box_vectors is None else [_vec3(row) for row in box_vectors] * unit.nanometer
        self.files[walker].writeModel(positions * unit.nanometer, periodicBoxVectors=box)
        self.handles[walker].flush()
        self.counts[walker] += 1
        return self.counts[walker] - 1

    def close(self):
        for handle in self.handles:
            handle.close()
        self.handles = []


def _vec3(row):
    from openmm import Vec3
    return Vec3(*map(float, row))


def write_checkpoint(folder, *, cycle, walker_states, scheduler_state):
    """Write all walkers' OpenMM checkpoints and the scheduler state as one file, atomically.

    The file is a JSON header line (cycle, scheduler state, blob lengths) followed by the
    walkers' checkpoint bytes; no pickle.
    """
    header = {"cycle": cycle, "scheduler": scheduler_state, "lengths": [len(b) for b in walker_states]}
    data = json.dumps(header).encode() + b"\n" + b"".join(walker_states)
    (Path(folder) / "checkpoints").mkdir(exist_ok=True)
    write_atomically(Path(folder) / "checkpoints" / "state.bin", data)


def read_checkpoint(folder):
    """Return (cycle, scheduler_state, walker_states) or None when there is no checkpoint."""
    path = Path(folder) / "checkpoints" / "state.bin"
    if not path.exists():
        return None
    data = path.read_bytes()
    line, _, rest = data.partition(b"\n")
    header = json.loads(line)
    states, offset = [], 0
    for length in header["lengths"]:
        states.append(rest[offset: offset + length])
        offset += length
    return header["cycle"], header["scheduler"], states


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
