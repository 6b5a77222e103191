"""Damaged run folders: a clear error or the very same result, never a different number.

Reproducers of the damage a real disk, a careless copy or an edit can do: flipped bytes
in the ledger, checkpoints and frames, cut or emptied files, an edited protocol copy, a
deleted provenance file. Each asserts the run's numbers come out bit for bit as before
(the Reference platform repeats a run exactly) or boost stops with one line naming what
is damaged; the user's files are left as they were.
"""

import shutil
import sqlite3
import struct
import sys
from pathlib import Path

import numpy as np
import pytest

from boost.analysis import analyse_run
from boost.exceptions import BoostError, RunFolderError
from boost.protocol import load_protocol
from boost.scheduler import run_protocol
from boost.store import Ledger, LedgerDamage, read_ledger

sys.path.insert(0, str(Path(__file__).parent))
from conftest import double_well_protocol, run_stopped_before  # noqa: E402
from test_cli import assert_one_line_error, boost  # noqa: E402

# Two temperatures that swap, so checkpoints hold two walkers and the swap RNG; checkpoints
# every 10 cycles, frames every 5; 110 cycles in all.
PROTOCOL = double_well_protocol(
    title="integrity checks", seed=7, platform="{name: Reference, workers: 1}",
    temperatures="[300 K, 400 K]", exchange="{pairs: adjacent}",
    run={"production": "10 ps", "frame_every": "0.5 ps", "checkpoint_every": "1 ps"},
    analysis={"uncertainty": "{method: asymptotic}"})
N_CYCLES = 110
KILLED_AT = 73          # the partial run's ledger ends at cycle 72; its checkpoints are at 69 and 59


def numbers(folder):
    """The headline numbers of a run folder's analysis, as arrays (compared bit for bit)."""
    analysis = analyse_run(folder)
    return (analysis.f_k, analysis.df_k, analysis.basins.populations, analysis.basins.d_populations,
            analysis.basins.Delta_g)


def same_numbers(a, b):
    return all(np.array_equal(x, y) for x, y in zip(a, b))


def assert_same_ledger(a_folder, b_folder):
    a, b = read_ledger(a_folder), read_ledger(b_folder)
    for name in ("cycle_t", "time_t", "production_t", "condition_rt", "potential_rt", "values_rtc", "u_krt",
                 "swaps", "frame_crcs"):
        assert np.array_equal(np.asarray(getattr(a, name), dtype=object), np.asarray(getattr(b, name), dtype=object)), name


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """A finished run, its numbers, and a run stopped after cycle KILLED_AT - 1."""
    base = tmp_path_factory.mktemp("integrity")
    (base / "p.yaml").write_text(PROTOCOL)
    protocol = load_protocol(base / "p.yaml")
    finished = run_protocol(protocol, base / "finished", progress=False)
    run_stopped_before(protocol, base / "partial", KILLED_AT)      # a kill between two checkpoints
    return {"protocol": protocol, "finished": finished, "partial": base / "partial", "numbers": numbers(finished)}


@pytest.fixture
def copy_of(runs, tmp_path):
    def make(name):
        target = tmp_path / name
        shutil.copytree(runs[name], target)
        return target
    return make


def flip(path, offset, mask=0xFF):
    data = bytearray(path.read_bytes())
    data[offset] ^= mask
    path.write_bytes(bytes(data))


def offset_of_real(path, value):
    """Where SQLite stores a REAL (8 bytes, big-endian IEEE 754, SQLite's file format)."""
    offset = path.read_bytes().find(struct.pack(">d", value))
    assert offset >= 0
    return offset


def resume(runs, folder):
    return run_protocol(runs["protocol"], folder, progress=False)


def test_the_partial_run_resumes_to_the_finished_one(runs, copy_of):
    folder = copy_of("partial")
    assert len(read_ledger(folder).cycle_t) == KILLED_AT
    resume(runs, folder)
    assert_same_ledger(runs["finished"], folder)


def test_a_flipped_byte_in_a_recorded_potential_is_found_by_its_cycle_checksum(runs, copy_of):
    # the case: one flipped byte in ledger.sqlite changed a population, exit 0
    folder = copy_of("finished")
    potential = read_ledger(folder).potential_rt[1, 40]
    flip(folder / "ledger.sqlite", offset_of_real(folder / "ledger.sqlite", potential) + 5, 0x01)
    with pytest.raises(LedgerDamage, match=r"cycle 40 is damaged .*cycles 0 to 39 are intact") as caught:
        analyse_run(folder)
    assert caught.value.first_bad_cycle == 40


def test_a_flipped_ledger_byte_through_the_command_line_prints_no_number_and_changes_nothing(runs, copy_of):
    folder = copy_of("finished")
    potential = read_ledger(folder).potential_rt[0, 55]
    flip(folder / "ledger.sqlite", offset_of_real(folder / "ledger.sqlite", potential) + 6, 0x04)
    before = files_of(folder)
    result = boost("analyze", str(folder), cwd=folder.parent)
    assert_one_line_error(result, r"ledger\.sqlite: cycle 55 is damaged")
    assert result.stdout == ""                                   # no table, no number
    assert files_of(folder) == before


def files_of(folder):
    """Every file's bytes but SQLite's side files (-wal, -shm), which a read of the ledger may add."""
    return {p: p.read_bytes() for p in folder.rglob("*") if p.is_file() and not p.name.endswith(("-wal", "-shm"))}


def test_resume_recomputes_a_damaged_cycle_after_an_intact_checkpoint(runs, copy_of, caplog):
    folder = copy_of("finished")
    potential = read_ledger(folder).potential_rt[0, 104]
    flip(folder / "ledger.sqlite", offset_of_real(folder / "ledger.sqlite", potential) + 7, 0x10)
    with caplog.at_level("WARNING", logger="boost"):
        resume(runs, folder)
    assert "ledger.sqlite: cycle 104 is damaged; resuming from checkpoints/state-previous.bin (after cycle 99)" \
        in caplog.text
    assert_same_ledger(runs["finished"], folder)
    assert same_numbers(numbers(folder), runs["numbers"])


def test_a_damaged_cycle_before_every_checkpoint_cannot_be_resumed(runs, copy_of):
    folder = copy_of("finished")
    potential = read_ledger(folder).potential_rt[0, 20]
    flip(folder / "ledger.sqlite", offset_of_real(folder / "ledger.sqlite", potential) + 3)
    result = boost("run", _protocol_file(folder), "-o", str(folder), "--quiet", cwd=folder.parent)
    assert_one_line_error(result, r"ledger\.sqlite: cycle 20 is damaged \(its records fail their checksum\) and no "
                                  r"intact checkpoint comes before it; this run cannot be continued")


def test_a_damaged_reduced_potential_is_found_on_resume(runs, copy_of):
    # the analysis recomputes reduced potentials (it never reads these bytes); resume checks them
    folder = copy_of("partial")
    u = read_ledger(folder).u_krt[1, 0, 71]
    offset = (folder / "ledger.sqlite").read_bytes().find(struct.pack("<d", u))    # blobs hold little-endian floats
    assert offset >= 0
    flip(folder / "ledger.sqlite", offset + 2)
    with pytest.raises(LedgerDamage, match="cycle 71 is damaged"):
        read_ledger(folder)
    resume(runs, folder)                     # cycle 71 lies after the checkpoint at 69
    assert_same_ledger(runs["finished"], folder)


@pytest.mark.parametrize("damage", ["cut", "header", "empty"])
def test_a_cut_garbled_or_emptied_ledger_gets_one_line(runs, copy_of, damage):
    folder = copy_of("finished")
    path = folder / "ledger.sqlite"
    data = path.read_bytes()
    path.write_bytes({"cut": data[: len(data) // 2], "header": b"\x00garbage" * 16 + data[128:],
                      "empty": b""}[damage])
    before = {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()}
    result = boost("analyze", str(folder), cwd=folder.parent)
    assert_one_line_error(result, r"ledger\.sqlite: (is damaged|is empty)")
    assert not any(ord(c) < 32 and c not in "\n" for c in result.stderr)      # no raw bytes echoed
    result = boost("run", _protocol_file(folder), "-o", str(folder), "--quiet", cwd=folder.parent)
    assert_one_line_error(result, r"ledger\.sqlite: (is damaged|is empty)")
    assert all((folder / name).read_bytes() == data for name, data in before.items() if name != "lock")


def _protocol_file(folder):
    path = folder.parent / "p.yaml"
    path.write_text(PROTOCOL)
    return str(path)


@pytest.mark.parametrize("edit", [
    ("UPDATE meta SET value = '{not json' WHERE key = 'temperature'", ()),      # the foreign ledger
    ("UPDATE meta SET value = '310.0' WHERE key = 'temperature'", ()),         # valid, but not what was run
    ("UPDATE conditions SET centres = ? WHERE condition = 1", (b"\x1b[31m\x00\xff raw",)),   # binary in a text column
])
def test_a_ledger_whose_header_was_edited_is_refused_without_echoing_it(runs, copy_of, edit):
    # the cases: bad JSON in the meta table ended in "internal error"; raw bytes
    # of a corrupted text column reached the terminal
    folder = copy_of("finished")
    with sqlite3.connect(folder / "ledger.sqlite") as connection:
        connection.execute(*edit)
    connection.close()
    result = boost("analyze", str(folder), cwd=folder.parent)
    assert_one_line_error(result, r"ledger\.sqlite: is damaged \(its header")
    assert "\x1b" not in result.stderr and "raw" not in result.stderr


def test_a_damaged_walker_checkpoint_falls_back_to_the_one_before(runs, copy_of, caplog):
    # the case: two flipped bytes in one walker's blob, then resume, gave another ledger
    folder = copy_of("partial")
    path = folder / "checkpoints" / "state.bin"
    size = path.stat().st_size
    flip(path, size - 100)
    flip(path, size - 99)
    with caplog.at_level("WARNING", logger="boost"):
        resume(runs, folder)
    assert "checkpoints/state.bin holds a damaged checkpoint of walker 1; resuming from " \
           "checkpoints/state-previous.bin (after cycle 59)" in caplog.text
    assert_same_ledger(runs["finished"], folder)


@pytest.mark.parametrize("damage", ["first line", "header", "cut", "empty"])
def test_both_checkpoints_damaged_is_one_clear_line(runs, copy_of, damage):
    folder = copy_of("partial")
    for name in ("state.bin", "state-previous.bin"):
        path = folder / "checkpoints" / name
        data = path.read_bytes()
        newline = data.index(b"\n")
        path.write_bytes({"first line": b"x" + data[1:], "header": data[: newline + 3] + b"#" + data[newline + 4:],
                          "cut": data[: len(data) - 50], "empty": b""}[damage])
    result = boost("run", _protocol_file(folder), "-o", str(folder), "--quiet", cwd=folder.parent)
    assert_one_line_error(result, r"has no intact checkpoint to resume from \(checkpoints/state\.bin .*"
                                  r"checkpoints/state-previous\.bin .*this run cannot be continued")
    assert len(read_ledger(folder).cycle_t) == KILLED_AT       # nothing was cut back


def test_a_deleted_frame_file_is_reported_and_the_frame_records_follow_the_disk(runs, copy_of, caplog):
    # the case: a deleted frame file on resume went unnoticed
    folder = copy_of("partial")
    (folder / "frames" / "walker-001.dcd").unlink()
    with caplog.at_level("WARNING", logger="boost"):
        resume(runs, folder)
    assert "frames/walker-001.dcd is missing (the ledger records 14 frames); frames go on from frame 0" \
        in caplog.text
    data = read_ledger(folder)
    import mdtraj
    on_disk = mdtraj.load(str(folder / "frames" / "walker-001.dcd"), top=str(folder / "topology.pdb")).n_frames
    assert len(data.frame_crcs[1]) == on_disk == 22 - 14        # frames of cycles 74 .. 109 only
    assert len(data.frame_crcs[0]) == 22
    assert same_numbers(numbers(folder), runs["numbers"])       # frames never enter the numbers


def test_damaged_frames_are_named_by_the_analysis(runs, copy_of):
    folder = copy_of("finished")
    flip(folder / "frames" / "walker-000.dcd", 276 + 10)        # inside frame 0 (36 bytes a frame)
    with pytest.warns(UserWarning, match=r"frames/walker-000\.dcd: 1 of its frames are damaged \(the first is "
                                         r"frame 0\)"):
        result = numbers(folder)
    assert same_numbers(result, runs["numbers"])


def test_an_edited_protocol_copy_is_refused_naming_the_key(runs, copy_of):
    # the case: the folder's protocol.yaml edited, then analyze: IndexError
    folder = copy_of("finished")
    copy = folder / "protocol.yaml"
    copy.write_text(copy.read_text().replace("temperatures: [300 K, 400 K]", "temperatures: [300 K, 350 K, 400 K]"))
    result = boost("analyze", str(folder), cwd=folder.parent)
    assert_one_line_error(result, r"protocol\.yaml: was edited after the run \(temperatures differ from what was "
                                  r"run")


def test_edited_basins_are_used_with_a_warning(runs, copy_of):
    folder = copy_of("finished")
    copy = folder / "protocol.yaml"
    copy.write_text(copy.read_text().replace("left: {x: [-1 nm, 0 nm]}", "left: {x: [-1 nm, -0.05 nm]}"))
    with pytest.warns(UserWarning, match="was edited after the run; its basins, analysis, title sections are used"):
        analysis = analyse_run(folder)
    assert analysis.basins.populations[0] < runs["numbers"][2][0]


def test_a_deleted_protocol_copy_is_read_from_the_ledger(runs, copy_of):
    folder = copy_of("finished")
    (folder / "protocol.yaml").unlink()
    with pytest.warns(UserWarning, match="is missing; the protocol text recorded in the ledger is used"):
        assert same_numbers(numbers(folder), runs["numbers"])


def test_a_deleted_provenance_file_is_named_on_resume(runs, copy_of):
    # the case: this gave "cannot write ... free space"
    folder = copy_of("partial")
    (folder / "provenance.json").unlink()
    result = boost("run", _protocol_file(folder), "-o", str(folder), "--quiet", cwd=folder.parent)
    assert_one_line_error(result, r"provenance\.json: is missing or damaged; it records how the run was made")


@pytest.mark.parametrize("place", ["/proc/boost-run", "/sys/boost-run"])
def test_an_unwritable_output_folder_is_one_line(tmp_path, place):
    (tmp_path / "p.yaml").write_text(PROTOCOL)
    result = boost("run", "p.yaml", "-o", place, "--quiet", cwd=tmp_path)
    assert_one_line_error(result, r"cannot be made a run folder")


def test_a_ledger_shorter_than_its_checkpoint_is_refused(runs, copy_of):
    folder = copy_of("finished")
    ledger = Ledger(folder / "ledger.sqlite")
    ledger.truncate_after(99)                   # ten whole cycles gone, each intact
    ledger.close()
    with pytest.raises(RunFolderError, match="the ledger holds 100 cycles but the run's checkpoint is at cycle 109"):
        analyse_run(folder)


def _attempt(action):
    """'ok' with the action's value, or 'error' when boost refused with one of its own errors."""
    try:
        return "ok", action()
    except BoostError as err:
        assert "\n" not in str(err)
        return "error", None


@pytest.mark.slow
def test_random_flipped_bytes_give_the_same_numbers_or_a_clear_error(runs, tmp_path):
    # fault injection: 1-3 random bytes flipped in the ledger, a checkpoint or a frame file of
    # a finished run (then analyse, then resume) or of a stopped one (then resume, then
    # analyse); every outcome must be the uninterrupted run's numbers bit for bit, or a
    # BoostError (one line, exit 2 through the command line) - never another number
    rng = np.random.default_rng(12)
    files = ["ledger.sqlite", "checkpoints/state.bin", "checkpoints/state-previous.bin", "frames/walker-000.dcd"]
    outcomes = {}
    for trial in range(220):
        source = "finished" if trial % 2 else "partial"
        folder = tmp_path / f"trial-{trial}"
        shutil.copytree(runs[source], folder)
        name = files[rng.choice(4, p=[0.55, 0.15, 0.15, 0.15])]
        path = folder / name
        size = path.stat().st_size
        for offset in rng.choice(size, size=rng.integers(1, 4), replace=False):
            flip(path, int(offset), int(rng.integers(1, 256)))
        steps = [("analyse", lambda: numbers(folder))] if source == "finished" else []
        steps += [("resume", lambda: resume(runs, folder)), ("analyse", lambda: numbers(folder))]
        for step, action in steps:
            outcome, value = _attempt(action)
            if outcome == "error":
                break
            if step == "analyse":
                assert same_numbers(value, runs["numbers"]), (trial, name, source)
        else:
            assert_same_ledger(runs["finished"], folder)
        key = (source, name.split("/")[0], outcome)
        outcomes[key] = outcomes.get(key, 0) + 1
        shutil.rmtree(folder)
    print("\nfault injection outcomes:", dict(sorted(outcomes.items())))
    assert sum(n for (_, _, o), n in outcomes.items() if o == "error") >= 20     # the damage was noticed
    assert sum(n for (_, _, o), n in outcomes.items() if o == "ok") >= 20        # and recovered from
