"""Frames: one DCD file per walker under frames/, each frame's crc32 recorded in the ledger.

The analysis never reads frames, so damaged frames cannot change a number; they are
reported (``inspect_frames``) and, on resume, the ledger's frame records are cut to what
is really on disk before writing goes on.
"""

import io
import os
import struct
import zlib
from dataclasses import dataclass
from pathlib import Path

from .folder import FRAMES

#: Bytes OpenMM's DCDFile writes before the first frame.
DCD_HEADER = 276
#: Header bytes that change as frames are added (frame count, last step) or hold the
#: creation time; the rest of a header is fixed by the topology and the frame interval.
_VARIABLE = ((8, 12), (20, 24), (180, 260))


def dcd_frame_bytes(n_atoms, periodic):
    """Bytes of one frame: an optional unit-cell record, then x, y and z records."""
    return (56 if periodic else 0) + 3 * (8 + 4 * n_atoms)


def frame_path(folder, walker):
    return Path(folder) / FRAMES / f"walker-{walker:03d}.dcd"


@dataclass(frozen=True)
class FrameCheck:
    """What is on disk for one walker: ``usable`` leading frames that match the ledger's
    records, and a one-line ``problem`` (empty when all recorded frames are there intact)."""

    walker: int
    recorded: int
    usable: int
    problem: str


def inspect_frames(folder, records, frame_bytes, n_atoms):
    """Check each walker's DCD file against its recorded crc32s.

    records : list (per walker) of lists of crc32, in file order
    Returns a list of FrameCheck, one per walker.
    """
    checks = []
    for walker, crcs in enumerate(records):
        path = frame_path(folder, walker)
        name = f"{FRAMES}/{path.name}"
        if not crcs:
            checks.append(FrameCheck(walker, 0, 0, ""))
            continue
        if not path.is_file():
            checks.append(FrameCheck(walker, len(crcs), 0, f"{name} is missing (the ledger records {len(crcs)} frames)"))
            continue
        with open(path, "rb") as handle:
            header_ok = _header_fits(handle.read(DCD_HEADER), n_atoms)
            on_disk = max(0, (os.fstat(handle.fileno()).st_size - DCD_HEADER) // frame_bytes)
            handle.seek(DCD_HEADER)
            damaged = [i for i in range(min(on_disk, len(crcs)))
                       if zlib.crc32(handle.read(frame_bytes)) != crcs[i]]
        problems = [] if header_ok else [f"{name} has a damaged header"]
        if damaged:
            problems.append(f"{name}: {len(damaged)} of its frames are damaged (the first is frame {damaged[0]})")
        if on_disk < len(crcs):
            problems.append(f"{name} holds {on_disk} frames, the ledger records {len(crcs)}: "
                            f"frames {on_disk} on are lost")
        checks.append(FrameCheck(walker, len(crcs), min(on_disk, len(crcs)), "; ".join(problems)))
    return checks


def _header_fits(header, n_atoms):
    return (len(header) == DCD_HEADER and header[:4] == struct.pack("<i", 84) and header[4:8] == b"CORD"
            and header[268:272] == struct.pack("<i", n_atoms))


class FrameWriter:
    """Appends frames to each walker's DCD file and returns each frame's crc32.

    ``counts``: frames to keep per walker (resume); each file is cut back to that many
    frames, so a frame written in a cycle that never completed disappears, and a header
    that no longer matches the run's is written anew (the frames after it are kept).
    """

    def __init__(self, folder, topology, n_walkers, *, timestep_ps, steps_between, counts=None):
        from openmm import unit

        self._unit = unit
        self.topology = topology
        self.dcd_args = (timestep_ps * unit.picosecond, steps_between, steps_between)
        (Path(folder) / FRAMES).mkdir(exist_ok=True)
        self.paths = [frame_path(folder, r) for r in range(n_walkers)]
        self.frame_bytes = dcd_frame_bytes(topology.getNumAtoms(), topology.getPeriodicBoxVectors() is not None)
        self.handles, self.files = [], []
        self._open(list(counts) if counts else [0] * n_walkers)

    def _open(self, counts):
        from openmm import app

        self.close()
        self.counts = list(counts)
        self.handles, self.files = [], []
        for path, count in zip(self.paths, self.counts):
            append = count > 0 and path.exists()
            handle = open(path, "r+b" if append else "w+b")
            if append:
                handle.truncate(DCD_HEADER + count * self.frame_bytes)
                self._mend_header(handle)
                handle.seek(8)
                handle.write(struct.pack("<i", count))
            self.handles.append(handle)
            self.files.append(app.DCDFile(handle, self.topology, *self.dcd_args, append=append))

    def _mend_header(self, handle):
        from openmm import app

        fresh = io.BytesIO()
        app.DCDFile(fresh, self.topology, *self.dcd_args)
        template = fresh.getvalue()
        handle.seek(0)
        header = handle.read(DCD_HEADER)
        if _masked(header) != _masked(template):
            handle.seek(0)
            handle.write(template)

    def cut_back(self, counts):
        """Cut each file back to ``counts`` frames (after returning to a checkpoint)."""
        self._open(counts)

    def write(self, walker, positions, box_vectors):
        """Append a frame; returns (its index in the file, crc32 of its bytes)."""
        unit = self._unit
        box = None if box_vectors is None else [_vec3(row) for row in box_vectors] * unit.nanometer
        self.files[walker].writeModel(positions * unit.nanometer, periodicBoxVectors=box)
        handle = self.handles[walker]
        handle.flush()
        index = self.counts[walker]
        written = os.pread(handle.fileno(), self.frame_bytes, DCD_HEADER + index * self.frame_bytes)
        self.counts[walker] += 1
        return index, zlib.crc32(written)

    def close(self):
        for handle in self.handles:
            handle.close()
        self.handles = []


def _masked(header):
    header = bytearray(header)
    for start, stop in _VARIABLE:
        header[start:stop] = bytes(stop - start)
    return bytes(header)


def _vec3(row):
    from openmm import Vec3
    return Vec3(*map(float, row))
