"""The ledger: an SQLite file, every cycle with checksums, each complete in one transaction.

Tables (units in column comments): ``meta`` (key, JSON value; ``header_sha256`` covers
every other meta row and the conditions table), ``conditions`` (index, temperature K,
centres, springs as JSON, solute scale λ), ``cycles`` (cycle, time ps, production 0/1,
``checksum`` of the cycle's numbers, ``reduced_checksum`` of its reduced potentials),
``samples`` (cycle, walker, condition, potential kJ/mol at λ = 1, volume nm³, the solute
parts solute_cross and solute_inner in kJ/mol (boost.solute_parts; zero without a solute),
one column per coordinate in nm or rad, reduced: float64 bytes of u_k for every condition
k, in kT), ``swaps`` (cycle, pair of conditions, attempts, accepted) and ``frames``
(walker, cycle, index in its DCD file, crc32 of the frame's bytes). Checksums:
boost.store.checksums; the solute columns are numbers of their sample's record like the others.

Ledgers of format 2 (before solute scaling) have neither solute column; they read with
λ = 1 and zero parts, and a run that wrote one goes on writing it in its own format.

Reading verifies before anything is used: SQLite's quick_check, the header digest, and
every cycle's checksums; damage is reported with the first damaged cycle
(:class:`LedgerDamage`), never read as numbers.
"""

import hashlib
import itertools
import json
import sqlite3
from dataclasses import dataclass
from pathlib import Path
from time import monotonic

import numpy as np

from ..conditions import Condition
from ..exceptions import RunFolderError
from . import checksums
from .folder import LEDGER
from . import records

#: Ledger layout version; 2 added checksums, the header digest and the protocol text; 3 the
#: solute scale of each condition and the solute parts of each sample.
FORMAT = 3
#: The first format with solute columns.
SOLUTE_FORMAT = 3
_HEADER_KEY = "header_sha256"
#: Seconds a recorded cycle may wait in memory: Ledger.record_cycle keeps cycles and writes
#: them together, in one transaction, once the oldest waiting one is this old (and whenever
#: the ledger is asked anything, is closed, or Ledger.write_waiting is called: the scheduler
#: calls it before every checkpoint).
WRITE_EVERY_SECONDS = 1.0
_TABLES = ("meta", "conditions", "cycles", "samples", "swaps", "frames")


class LedgerDamage(RunFolderError):
    """A ledger whose records fail their checks. ``first_bad_cycle``: the earliest cycle
    whose records are damaged (None when the damage is not in one cycle's records)."""

    def __init__(self, message, first_bad_cycle=None):
        super().__init__(message)
        self.first_bad_cycle = first_bad_cycle


def _header_digest(meta_rows, condition_rows):
    """sha256 over the meta rows (bytes key, bytes JSON value) but the digest's own, and the
    conditions rows (index, temperature, centres bytes, springs bytes[, solute scale])."""
    digest = hashlib.sha256()
    for key, value in sorted(meta_rows):
        if key != _HEADER_KEY.encode():
            digest.update(b"%d:%s%d:%s" % (len(key), key, len(value), value))
    for index, temperature, centres, springs, *scale in condition_rows:
        solute = f"|{scale[0]!r}".encode() if scale else b""
        digest.update(f"{index!r}|{temperature!r}|".encode() + bytes(centres) + b"|" + bytes(springs) + solute + b"\n")
    return digest.hexdigest()


class Ledger:
    """Writer of the SQLite ledger: every cycle complete in one transaction, several cycles at
    once when they come quickly (see WRITE_EVERY_SECONDS).

    A kill loses only cycles recorded within the last ``write_every`` seconds and after the
    newest checkpoint: cycles a resume computes again anyway (it starts from that checkpoint).
    """

    def __init__(self, path, *, coordinate_names=(), write_every=None):
        self.path = Path(path)
        self.coordinate_names = tuple(coordinate_names)
        self.write_every = WRITE_EVERY_SECONDS if write_every is None else write_every
        self._waiting = []                   # the numbers of each recorded cycle not yet written
        self._oldest = None                  # monotonic() when the oldest waiting cycle was recorded
        self.connection = sqlite3.connect(self.path)
        self.connection.execute("PRAGMA journal_mode=WAL")
        self.connection.execute("PRAGMA synchronous=NORMAL")
        self.format = self._recorded_format() or FORMAT

    def _recorded_format(self):
        """The format of an existing ledger (None for a new file)."""
        if not self.connection.execute("SELECT 1 FROM sqlite_master WHERE name = 'meta'").fetchone():
            return None
        row = self.connection.execute("SELECT value FROM meta WHERE key = 'ledger_format'").fetchone()
        return json.loads(row[0]) if row else None

    @property
    def has_solute_columns(self):
        return self.format >= SOLUTE_FORMAT

    def create(self, conditions, metadata):
        self.format = FORMAT
        columns = "".join(f', "{name}" REAL' for name in self.coordinate_names)
        meta_rows = [(key.encode(), json.dumps(value).encode())
                     for key, value in {**metadata, "ledger_format": FORMAT}.items()]
        condition_rows = [(c.index, float(c.temperature), json.dumps(c.centres).encode(),
                           json.dumps(c.springs).encode(), float(c.solute_scale)) for c in conditions]
        meta_rows.append((_HEADER_KEY.encode(), json.dumps(_header_digest(meta_rows, condition_rows)).encode()))
        with self.connection:
            self.connection.executescript(f"""
                CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT);
                CREATE TABLE conditions (condition INTEGER PRIMARY KEY, temperature REAL,
                                         centres TEXT, springs TEXT, solute_scale REAL);
                CREATE TABLE cycles (cycle INTEGER PRIMARY KEY, time REAL, production INTEGER,
                                     checksum INTEGER, reduced_checksum INTEGER);
                CREATE TABLE samples (cycle INTEGER, walker INTEGER, condition INTEGER,
                                      potential REAL, volume REAL, solute_cross REAL, solute_inner REAL{columns},
                                      reduced BLOB,
                                      PRIMARY KEY (cycle, walker));
                CREATE TABLE swaps (cycle INTEGER, condition_i INTEGER, condition_j INTEGER,
                                    attempts INTEGER, accepted INTEGER);
                CREATE TABLE frames (walker INTEGER, cycle INTEGER, frame INTEGER, checksum INTEGER);
            """)
            self.connection.executemany("INSERT INTO meta VALUES (?, ?)",
                                        [(k.decode(), v.decode()) for k, v in meta_rows])
            self.connection.executemany("INSERT INTO conditions VALUES (?, ?, ?, ?, ?)",
                                        [(i, t, c.decode(), s.decode(), scale) for i, t, c, s, scale in condition_rows])

    def record_cycle(self, cycle, *, time, production, condition_r, potential_r, volume_r,
                     values_rc, u_kr, solute_r2=None, swaps=(), frames=()):
        """Record one complete cycle; it reaches the file with the cycles waiting beside it, in
        one transaction (see the class docstring).

        values_rc : ndarray, shape (n_walkers, n_coordinates), nm or rad
        u_kr : ndarray, shape (n_conditions, n_walkers), kT
        solute_r2 : ndarray, shape (n_walkers, 2), kJ/mol: (E_cross, E_inner); None: zeros
        swaps : iterable of (condition_i, condition_j, attempts, accepted)
        frames : iterable of (walker, frame index, crc32 of the frame's bytes)
        """
        if solute_r2 is not None and not self.has_solute_columns:
            self._refuse_parts(solute_r2)
        if self._waiting and cycle != self._waiting[-1][0] + 1:
            self.write_waiting()          # a batch holds consecutive cycles
        self._waiting.append((int(cycle), float(time), bool(production), np.array(condition_r),
                              np.array(potential_r, dtype=float), np.array(volume_r, dtype=float),
                              np.array(values_rc, dtype=float).reshape(len(condition_r), -1),
                              np.array(u_kr, dtype=float), None if solute_r2 is None else np.array(solute_r2, dtype=float),
                              list(swaps), list(frames)))
        now = monotonic()
        self._oldest = now if self._oldest is None else self._oldest
        if now - self._oldest >= self.write_every:
            self.write_waiting()

    def write_waiting(self):
        """Write every recorded cycle not yet in the file, in one transaction."""
        if not self._waiting:
            return
        cycle_t, time_t, production_t, condition, potential, volume, values, u, solute, swaps, frames = \
            zip(*self._waiting)
        parts = None if all(p is None for p in solute) else \
            np.stack([np.zeros((len(condition[0]), 2)) if p is None else p for p in solute], axis=1)
        self._write(cycle_t[0], time_t=time_t, production_t=production_t, condition_rt=np.stack(condition, axis=1),
                    potential_rt=np.stack(potential, axis=1), volume_rt=np.stack(volume, axis=1),
                    values_rtc=np.stack(values, axis=1), u_krt=np.stack(u, axis=2), solute_rt2=parts,
                    swaps=[(t, *s) for t, rows in zip(cycle_t, swaps) for s in rows],
                    frames=[(walker, t, *rest) for t, rows in zip(cycle_t, frames) for walker, *rest in rows])
        self._waiting.clear()
        self._oldest = None

    def _refuse_parts(self, parts):
        if np.any(parts):
            raise ValueError(f"{self.path}: a ledger of format {self.format} cannot hold solute parts")

    @staticmethod
    def _insert_sample(n_columns):
        return f"INSERT INTO samples VALUES ({', '.join('?' * n_columns)})"

    def record_cycles(self, first, *, time_t, production_t, condition_rt, potential_rt, volume_rt,
                      values_rtc, u_krt, solute_rt2=None, swaps=(), frames=()):
        """Store cycles ``first`` .. ``first + n_cycles - 1`` in one transaction, with checksums.

        Arrays as in :class:`LedgerData` (volume NaN: none; solute_rt2 None: zeros); swaps :
        (cycle, condition_i, condition_j, attempts, accepted) rows; frames : (walker, cycle,
        frame index, crc32) rows.
        """
        self.write_waiting()
        self._write(first, time_t=time_t, production_t=production_t, condition_rt=condition_rt,
                    potential_rt=potential_rt, volume_rt=volume_rt, values_rtc=values_rtc, u_krt=u_krt,
                    solute_rt2=solute_rt2, swaps=swaps, frames=frames)

    def _write(self, first, *, solute_rt2, frames, **numbers):
        n_walkers, n_cycles = np.shape(numbers["condition_rt"])
        solute_n2 = np.zeros((n_cycles * n_walkers, 2)) if solute_rt2 is None else \
            np.asarray(solute_rt2, dtype=float).transpose(1, 0, 2).reshape(n_cycles * n_walkers, 2)
        if not self.has_solute_columns:
            self._refuse_parts(solute_n2)
            solute_n2 = solute_n2[:, :0]
        cycles, samples, swaps = records.rows_of_cycles(first, solute_n2=solute_n2, **numbers)
        with self.connection:
            self.connection.executemany("INSERT INTO cycles VALUES (?, ?, ?, ?, ?)", cycles)
            self.connection.executemany(self._insert_sample(len(samples[0])), samples)
            if swaps:
                self.connection.executemany("INSERT INTO swaps VALUES (?, ?, ?, ?, ?)", swaps)
            if frames:
                self.connection.executemany("INSERT INTO frames VALUES (?, ?, ?, ?)",
                                            [tuple(int(x) for x in row) for row in frames])

    def amend_header(self, changes):
        """Replace meta entries (``{key: value}``) and the header digest, in one transaction:
        how an extended run records the protocol it now follows."""
        self.write_waiting()
        with self.connection:
            self.connection.executemany("INSERT OR REPLACE INTO meta VALUES (?, ?)",
                                        [(key, json.dumps(value)) for key, value in changes.items()])
            meta_rows = [(k.encode(), v.encode()) for k, v in self.connection.execute("SELECT key, value FROM meta")]
            condition_rows = [(i, t, c.encode(), s.encode(), *scale) for i, t, c, s, *scale in
                              self.connection.execute("SELECT * FROM conditions ORDER BY condition")]
            self.connection.execute("UPDATE meta SET value = ? WHERE key = ?",
                                    (json.dumps(_header_digest(meta_rows, condition_rows)), _HEADER_KEY))

    def truncate_after(self, cycle):
        """Forget every record after ``cycle`` (-1: all), in one transaction."""
        self.write_waiting()
        with self.connection:
            for table in ("cycles", "samples", "swaps", "frames"):
                self.connection.execute(f"DELETE FROM {table} WHERE cycle > ?", (cycle,))

    def frame_records(self, n_walkers):
        """Per walker, the crc32 of each recorded frame in file order."""
        self.write_waiting()
        records = [[] for _ in range(n_walkers)]
        for walker, crc in self.connection.execute("SELECT walker, checksum FROM frames ORDER BY walker, frame"):
            records[walker].append(crc)
        return records

    def forget_frames_from(self, walker, count):
        """Drop the frame records of ``walker`` from index ``count`` on (frames lost on disk)."""
        self.write_waiting()
        with self.connection:
            self.connection.execute("DELETE FROM frames WHERE walker = ? AND frame >= ?", (walker, count))

    def record_retry(self, cycle, walker, seed):
        self.write_waiting()
        with self.connection:
            self.connection.execute("CREATE TABLE IF NOT EXISTS retries (cycle INTEGER, walker INTEGER, seed INTEGER)")
            self.connection.execute("INSERT INTO retries VALUES (?, ?, ?)", (cycle, walker, seed))

    def close(self):
        """Write what waits, then close the file."""
        try:
            self.write_waiting()
        finally:
            self.connection.close()


@dataclass(frozen=True)
class LedgerData:
    """Everything the analysis needs, read from a ledger.

    Attributes
    ----------
    conditions : tuple of Condition
    coordinate_names : tuple of str
    periodic : tuple of bool, per coordinate (in coordinate_names' order): True for angles
        that wrap at ±π
    angle_coordinates : frozenset of str, the coordinates measured in radians (the rest in nm)
    umbrella_coordinates : tuple of str, the coordinates umbrellas act on, in ladder-axis order
    cycle_t, time_t, production_t : ndarray, shape (n_cycles,)
    condition_rt : ndarray of int, shape (n_walkers, n_cycles)
    potential_rt, volume_rt : ndarray, shape (n_walkers, n_cycles), kJ/mol (λ = 1) and nm³ (NaN: none)
    solute_rt2 : ndarray, shape (n_walkers, n_cycles, 2), kJ/mol: the solute parts (E_cross,
        E_inner) of each sample (boost.solute_parts), zeros without solute scaling
    values_rtc : ndarray, shape (n_walkers, n_cycles, n_coordinates), nm or rad
    u_krt : ndarray, shape (n_conditions, n_walkers, n_cycles), kT
    swaps : ndarray, shape (n_swap_rows, 5): cycle, condition_i, condition_j, attempts, accepted
    metadata : dict, the ledger's meta table as written (run id, protocol text and hash, ...)
    frame_crcs : tuple (per walker) of tuples of int: crc32 of each recorded frame, in file order
    """

    conditions: tuple
    coordinate_names: tuple
    periodic: tuple
    angle_coordinates: frozenset
    umbrella_coordinates: tuple
    cycle_t: np.ndarray
    time_t: np.ndarray
    production_t: np.ndarray
    condition_rt: np.ndarray
    potential_rt: np.ndarray
    volume_rt: np.ndarray
    solute_rt2: np.ndarray
    values_rtc: np.ndarray
    u_krt: np.ndarray
    swaps: np.ndarray
    metadata: dict
    frame_crcs: tuple = ()


def read_ledger(folder, *, reduced=True):
    """Read and verify a run folder's ledger (complete cycles only) into arrays.

    ``reduced=False`` leaves ``u_krt`` empty (shape (n_conditions, n_walkers, 0)) and its
    checksums unchecked: the analysis recomputes reduced potentials for the samples it
    keeps, which needs far less memory than all of them. Raises :class:`LedgerDamage`
    when any check fails.
    """
    with _open_verified(folder) as (connection, path, metadata, conditions):
        data, _, first_bad = _read(connection, path, metadata, conditions, reduced)
    if first_bad is not None:
        raise LedgerDamage(f"{path}: cycle {first_bad} is damaged (its records fail their checksum); cycles 0 to "
                           f"{first_bad - 1} are intact, but boost does not analyse a damaged ledger. Resuming "
                           "the run recomputes damaged cycles after an intact checkpoint.", first_bad)
    return data


def scan_ledger(folder):
    """Verify every record (reduced potentials included) holding nothing of its size in
    memory; returns (n_cycles, first_bad_cycle or None, metadata). Header damage raises
    :class:`LedgerDamage`."""
    with _open_verified(folder) as (connection, path, metadata, conditions):
        _, n_cycles, first_bad = _read(connection, path, metadata, conditions, True, keep_arrays=False)
        return n_cycles, first_bad, metadata


def read_ledger_conditions(folder):
    """The verified conditions table of a run folder's ledger (tuple of Condition)."""
    with _open_verified(folder) as (_, _path, _metadata, conditions):
        return conditions


def read_ledger_metadata(folder):
    """The verified meta table of a run folder's ledger."""
    with _open_verified(folder) as (_, _path, metadata, _conditions):
        return metadata


class _open_verified:
    """Context manager: a read-only connection to a ledger whose file, page structure and
    header have been checked, with its metadata and conditions."""

    def __init__(self, folder):
        self.path = Path(folder) / LEDGER
        self.connection = None

    def __enter__(self):
        path = self.path
        if not path.exists():
            raise RunFolderError(f"{path.parent}: is not a run folder (no {LEDGER}).")
        if not path.is_file():
            raise RunFolderError(f"{path}: is not a regular file, so not a ledger.")
        if path.stat().st_size == 0:
            raise LedgerDamage(f"{path}: is empty (0 bytes): the run's record is gone; start a new run folder.")
        try:
            self.connection = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
            self.connection.text_factory = bytes
            self.connection.execute("BEGIN")      # one snapshot, even while the run goes on writing
            check = self.connection.execute("PRAGMA quick_check").fetchall()
            if check != [(b"ok",)]:
                raise LedgerDamage(f"{path}: is damaged (SQLite's quick_check finds its pages inconsistent); "
                                   "no number can be trusted from it: start a new run folder.")
            metadata, conditions = _verified_header(self.connection, path)
        except _SQLITE_DAMAGE as err:
            self.__exit__(None, None, None)
            raise LedgerDamage(f"{path}: is damaged or not a ledger (SQLite: {_plain(err)}); "
                               "start a new run folder.") from None
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self.connection, path, metadata, conditions

    def __exit__(self, kind, err, traceback):
        if self.connection is not None:
            self.connection.close()
            self.connection = None
        if kind is not None and issubclass(kind, _SQLITE_DAMAGE):      # damage met while reading rows
            raise LedgerDamage(f"{self.path}: is damaged (SQLite: {_plain(err)}); start a new run folder.") from None
        return False


#: What SQLite raises on a damaged file; a damaged schema can also make its messages undecodable.
_SQLITE_DAMAGE = (sqlite3.DatabaseError, UnicodeDecodeError)


def _plain(err):
    """An SQLite message fit for one line: printable ASCII only, cut short."""
    text = "".join(c if 32 <= ord(c) < 127 else "?" for c in str(err))
    return text if len(text) <= 80 else text[:77] + "..."


def _verified_header(connection, path):
    tables = {row[0] for row in connection.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    if not set(_TABLES) <= {t.decode(errors="replace") for t in tables}:
        raise LedgerDamage(f"{path}: is damaged or not a ledger (tables are missing); start a new run folder.")
    meta_rows = [(bytes(k), bytes(v)) for k, v in connection.execute("SELECT key, value FROM meta")]
    condition_rows = connection.execute("SELECT * FROM conditions ORDER BY condition").fetchall()
    recorded = dict(meta_rows).get(_HEADER_KEY.encode())
    if recorded is None:
        format_row = dict(meta_rows).get(b"ledger_format")
        raise LedgerDamage(f"{path}: carries no checksums (written by an older boost, or its header is damaged); "
                           "boost cannot verify it: start a new run folder." if format_row is None else
                           f"{path}: is damaged (its header digest is missing); start a new run folder.")
    try:
        digest_ok = json.loads(recorded.decode()) == _header_digest(
            meta_rows, [(i, t, bytes(c), bytes(s), *scale) for i, t, c, s, *scale in condition_rows])
        recorded_format = json.loads(dict(meta_rows)[b"ledger_format"].decode())
        digest_ok = digest_ok and all(len(row) == (5 if recorded_format >= SOLUTE_FORMAT else 4)
                                      for row in condition_rows)
    except (ValueError, TypeError, UnicodeDecodeError, KeyError):
        digest_ok = False
    if not digest_ok:
        raise LedgerDamage(f"{path}: is damaged (its header - conditions and run settings - fails its digest); "
                           "no number can be trusted from it: start a new run folder.")
    metadata = {k.decode(): json.loads(v.decode()) for k, v in meta_rows if k != _HEADER_KEY.encode()}
    conditions = tuple(Condition(i, t, tuple(json.loads(c.decode())), tuple(json.loads(s.decode())),
                                 *[float(x) for x in scale]) for i, t, c, s, *scale in condition_rows)
    return metadata, conditions


def _read(connection, path, metadata, conditions, with_reduced, *, keep_arrays=True):
    """Every cycle's records, checked against their checksums.

    Returns (LedgerData or None when ``keep_arrays`` is false, number of cycles recorded,
    first damaged cycle or None). Without ``keep_arrays`` nothing the size of the ledger
    is held in memory: that is how a resume verifies a ledger of any length.
    """
    names = tuple(metadata["coordinates"])
    # numbers as floats; the checksums as the integers SQLite stores (0 and flagged when not one)
    cycles = _chunked(connection.execute(
        "SELECT cycle, time, production, typeof(checksum) = 'integer' AND typeof(reduced_checksum) = 'integer' "
        "FROM cycles ORDER BY cycle"), 4, path)
    stored = _chunked(connection.execute(
        "SELECT CASE WHEN typeof(checksum) = 'integer' THEN checksum ELSE 0 END, "
        "CASE WHEN typeof(reduced_checksum) = 'integer' THEN reduced_checksum ELSE 0 END "
        "FROM cycles ORDER BY cycle"), 2, path, dtype=np.int64)
    n_cycles, n_walkers, n_conditions = len(cycles), metadata["n_walkers"], len(conditions)
    n_parts = 2 if metadata["ledger_format"] >= SOLUTE_FORMAT else 0
    check = _Checks(cycles, stored, with_reduced)
    table = np.zeros((n_cycles if keep_arrays else 0, n_walkers, 3 + n_parts + len(names)))
    u_trk = np.zeros((n_cycles if with_reduced and keep_arrays else 0, n_walkers, n_conditions))
    quoted = (", solute_cross, solute_inner" if n_parts else "") + "".join(f', "{name}"' for name in names)
    reduced = ", reduced" if with_reduced else ""
    cursor = connection.execute(f"SELECT cycle, walker, condition, potential, volume{quoted}{reduced} "
                                f"FROM samples WHERE cycle < ? ORDER BY cycle, walker", (n_cycles,))
    width = 5 + n_parts + len(names)
    while rows := cursor.fetchmany(20000):   # streamed: memory stays that of the arrays
        numbers = _numbers([row[:width] for row in rows] if with_reduced else rows, width, path)
        t, r = check.place(numbers[:, 0], n_cycles), check.place(numbers[:, 1], n_walkers)
        check.add_samples(numbers, t, r)
        ok = (t >= 0) & (r >= 0)
        if keep_arrays:
            table[t[ok], r[ok]] = numbers[ok, 2:]
        if with_reduced:
            u_rk = check.blobs([row[-1] for row in rows], n_conditions, t)
            check.add_reduced(numbers[:, 1], u_rk, t)
            if keep_arrays:
                u_trk[t[ok], r[ok]] = u_rk[ok]
    swaps = _chunked(connection.execute("SELECT * FROM swaps WHERE cycle < ? ORDER BY cycle", (n_cycles,)), 5, path)
    check.add_swaps(swaps, check.place(swaps[:, 0], n_cycles))
    first_bad = check.first_bad(n_walkers)
    if not keep_arrays:
        return None, n_cycles, first_bad
    data = LedgerData(
        conditions=conditions, coordinate_names=names,
        periodic=tuple(bool(p) for p in metadata["periodic"]),
        angle_coordinates=frozenset(n for n, unit in metadata["units"].items() if unit == "rad"),
        umbrella_coordinates=tuple(metadata["umbrella"]),
        cycle_t=cycles[:, 0].astype(int), time_t=cycles[:, 1], production_t=cycles[:, 2].astype(bool),
        condition_rt=table[:, :, 0].T.astype(int), potential_rt=np.ascontiguousarray(table[:, :, 1].T),
        volume_rt=np.ascontiguousarray(table[:, :, 2].T),
        solute_rt2=np.ascontiguousarray(table[:, :, 3:3 + n_parts].transpose(1, 0, 2)) if n_parts else
        np.zeros((n_walkers, n_cycles, 2)),
        values_rtc=np.ascontiguousarray(table[:, :, 3 + n_parts:].transpose(1, 0, 2)),
        u_krt=np.ascontiguousarray(u_trk.transpose(2, 1, 0)),
        swaps=swaps.astype(int), metadata=metadata, frame_crcs=_frame_crcs(connection, n_walkers, n_cycles))
    return data, n_cycles, first_bad


def _frame_crcs(connection, n_walkers, n_cycles):
    crcs = [[] for _ in range(n_walkers)]
    for walker, crc in connection.execute("SELECT walker, checksum FROM frames WHERE cycle < ? "
                                          "ORDER BY walker, frame", (n_cycles,)):
        if isinstance(walker, int) and 0 <= walker < n_walkers:
            crcs[walker].append(crc)
    return tuple(tuple(c) for c in crcs)


class _Checks:
    """Running per-cycle checksums of what was read, against what the ledger recorded."""

    def __init__(self, cycles, stored, with_reduced):
        n_cycles = len(cycles)
        self.bad = (cycles[:, 0] != np.arange(n_cycles)) | (cycles[:, 3] != 1)   # numbered 0, 1, 2 ...
        self.expected = checksums.from_stored(stored[:, 0])
        self.expected_reduced = checksums.from_stored(stored[:, 1])
        self.sums = checksums.compute_row_checksums(cycles[:, :3], checksums.CYCLES).reshape(n_cycles)
        self.reduced_sums = np.zeros(n_cycles, dtype=np.uint64) if with_reduced else None
        self.counts = np.zeros(n_cycles, dtype=np.int64)
        self.unplaced = False

    def place(self, column, size):
        """Row indices from a column of whole numbers; -1 where the value cannot be one."""
        whole = np.isfinite(column) & (column == np.round(column)) & (column >= 0) & (column < size)
        if not whole.all():
            self.unplaced = True
        return np.where(whole, column, -1).astype(np.int64)

    def add_samples(self, numbers, t, r):
        inside = t >= 0
        self.bad[t[inside & (r < 0)]] = True
        sums = checksums.compute_row_checksums(numbers, checksums.SAMPLES)
        self.sums += checksums.sum_by_cycle(sums[inside], t[inside], len(self.sums))
        np.add.at(self.counts, t[inside], 1)

    def blobs(self, blobs, n_conditions, t):
        """The reduced-potential rows; a blob of the wrong kind or size marks its cycle bad."""
        width = 8 * n_conditions
        if all(isinstance(b, bytes) for b in blobs):
            joined = b"".join(blobs)
            if len(joined) == width * len(blobs):     # sizes that only add up are caught by the checksum
                return np.frombuffer(joined, dtype="<f8").reshape(len(blobs), n_conditions)
        u_rk = np.full((len(blobs), n_conditions), np.nan)
        for i, blob in enumerate(blobs):
            if isinstance(blob, bytes) and len(blob) == width:
                u_rk[i] = np.frombuffer(blob, dtype="<f8")
            elif t[i] >= 0:
                self.bad[t[i]] = True
        return u_rk

    def add_reduced(self, walker_n, u_rk, t):
        inside = t >= 0
        sums = checksums.compute_row_checksums(np.column_stack([walker_n, u_rk]), checksums.REDUCED)
        self.reduced_sums += checksums.sum_by_cycle(sums[inside], t[inside], len(self.reduced_sums))

    def add_swaps(self, swaps, t):
        inside = t >= 0
        sums = checksums.compute_row_checksums(swaps, checksums.SWAPS)
        self.sums += checksums.sum_by_cycle(sums[inside], t[inside], len(self.sums))

    def first_bad(self, n_walkers):
        bad = self.bad | (self.sums != self.expected) | (self.counts != n_walkers)
        if self.reduced_sums is not None:
            bad |= self.reduced_sums != self.expected_reduced
        if self.unplaced and not bad.any():
            bad[-1] = True          # a record that belongs to no cycle: blame the last one
        hits = np.flatnonzero(bad)
        return int(hits[0]) if hits.size else None


def _numbers(rows, width, path, dtype=float):
    """Rows of numbers (None: NaN) as an array, shape (n_rows, width), built without a Python
    object per cell (5x faster than np.array(rows) on millions of rows)."""
    try:
        flat = np.fromiter(itertools.chain.from_iterable(rows), dtype=dtype, count=len(rows) * width)
    except (ValueError, TypeError):
        raise LedgerDamage(f"{path}: is damaged (a record holds text where a number belongs); "
                           "start a new run folder.") from None
    return flat.reshape(len(rows), width)


def _chunked(cursor, width, path, dtype=float):
    """All rows of a numeric query, fetched in chunks: millions of rows never exist as
    Python tuples at once (twice as fast as fetchall)."""
    chunks = [np.empty((0, width), dtype=dtype)]
    while rows := cursor.fetchmany(20000):
        chunks.append(_numbers(rows, width, path, dtype))
    return np.concatenate(chunks)


def check_ledger_run_id(folder, run_id):
    """Refuse a ledger that another run wrote (copied in, or the identity file replaced)."""
    recorded = read_ledger_metadata(folder).get("run_id")
    if recorded != run_id:
        raise RunFolderError(f"{Path(folder) / LEDGER}: was not written by this run (its run id differs from "
                             "the identity file's); resume only the folder a run created.")
