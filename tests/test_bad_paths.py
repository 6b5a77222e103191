"""Paths to things that are not regular files: one line naming the file and what it is, no hang.

A FIFO or a device is never opened (reading a FIFO without a writer blocks; /dev/zero never
ends), and no message quotes raw bytes of a file it was pointed at. Every case that could
hang runs in a subprocess with a timeout, so a hang fails the test instead of blocking it.
The contract (one line, exit code 2, nothing written) is the project's rule for bad input;
that /dev/zero is a character device is common practice on Linux.
"""

import os
import subprocess
import sys
import textwrap

import pytest
from conftest import double_well_protocol

from boost import systems
from boost.exceptions import InputError, ProtocolError
from boost.protocol import load_protocol
from boost.spec import Node
from boost.system_spec import read_system_spec

TIMEOUT = 120   # s; a run that reads a FIFO would wait forever


def boost(*args, cwd):
    return subprocess.run([sys.executable, "-m", "boost.cli", *args], cwd=cwd, capture_output=True,
                          timeout=TIMEOUT)


def assert_one_line_exit_2(result, pattern):
    import re

    stderr = result.stderr.decode("utf-8")
    assert result.returncode == 2, stderr
    assert len(stderr.splitlines()) == 1 and "Traceback" not in stderr, stderr
    assert re.search(pattern, stderr), stderr
    assert stderr[:-1].isprintable(), stderr
    return stderr


def contents(folder):
    return sorted(p.name for p in folder.iterdir())


@pytest.fixture
def fifo(tmp_path):
    path = tmp_path / "pipe.yaml"
    os.mkfifo(path)
    return path


# -- the protocol file itself ---------------------------------------------------------------
@pytest.mark.parametrize("command", ["check", "run", "repeat"])
def test_protocol_argument_that_is_a_fifo(command, fifo, tmp_path):
    result = boost(command, str(fifo), cwd=tmp_path)
    assert_one_line_exit_2(result, r"pipe\.yaml: is not a regular file \(a FIFO\); a protocol file is expected")
    assert contents(tmp_path) == ["pipe.yaml"]


def test_protocol_argument_that_is_a_device(tmp_path):
    assert_one_line_exit_2(boost("check", "/dev/zero", cwd=tmp_path),
                           r"^boost: /dev/zero: is not a regular file \(a device\); a protocol file is expected\.$")


def test_protocol_argument_that_is_a_folder(tmp_path):
    (tmp_path / "folder.yaml").mkdir()
    assert_one_line_exit_2(boost("check", "folder.yaml", cwd=tmp_path),
                           r"folder\.yaml: is a folder, not a file; a protocol file is expected")


def test_a_protocol_that_is_not_yaml_text_is_described_not_quoted(tmp_path):
    (tmp_path / "notes.yaml").write_text("Some prose, not a protocol; a shopping list perhaps.\n" * 1000)
    with pytest.raises(ProtocolError, match=r"notes\.yaml: \(top level\) must be a mapping of keys to values\. "
                                            r"Got a text of \d+ characters instead\.$") as info:
        load_protocol(tmp_path / "notes.yaml")
    assert "prose" not in str(info.value)


# -- files a protocol or a system spec names --------------------------------------------------
SYSTEM_CASES = [
    # (system: value, what to create at NAME, the message)
    ("NAME", "fifo", r"protocol\.yaml: system names \S*pipe\.yaml, which is not a regular file \(a FIFO\)"),
    ("/dev/zero", None, r"protocol\.yaml: system names /dev/zero, which is not a regular file \(a device\)"),
    ("{pdb: NAME}", "fifo", r"protocol\.yaml: system\.pdb names \S*pipe\.yaml, which is not a regular file \(a FIFO\)"),
    ("{pdb: /dev/zero}", None, r"system\.pdb names /dev/zero, which is not a regular file \(a device\)"),
    ("{amber: {prmtop: NAME, inpcrd: x.inpcrd}}", "fifo",
     r"system\.amber\.prmtop names \S*pipe\.yaml, which is not a regular file \(a FIFO\)"),
    ("{serialized: {system: NAME, pdb: x.pdb}}", "fifo",
     r"system\.serialized\.system names \S*pipe\.yaml, which is not a regular file \(a FIFO\)"),
    ("{charmm: {psf: /dev/zero, coordinates: x.crd, parameters: [x.prm]}}", None,
     r"system\.charmm\.psf names /dev/zero, which is not a regular file \(a device\)"),
    ("{peptide: {sequence: [ACE, ALA, NME]}, forcefield: [NAME]}", "fifo",
     r"system\.forcefield\[0\] names \S*pipe\.yaml, which is not a regular file \(a FIFO\)"),
    ("{peptide: {sequence: [ACE, ALA, NME]}, forcefield: [amber14-all.xml, /dev/zero]}", None,
     r"system\.forcefield\[1\] names /dev/zero, which is not a regular file \(a device\)"),
]


@pytest.mark.parametrize("system, make, message", SYSTEM_CASES)
def test_system_files_that_are_fifos_or_devices(system, make, message, tmp_path):
    if make == "fifo":
        os.mkfifo(tmp_path / "pipe.yaml")
    text = double_well_protocol(system=system.replace("NAME", "pipe.yaml"))
    (tmp_path / "protocol.yaml").write_text(text)
    before = contents(tmp_path)
    assert_one_line_exit_2(boost("check", "protocol.yaml", cwd=tmp_path), message)
    assert contents(tmp_path) == before


def test_a_system_spec_file_that_is_a_fifo_in_process(tmp_path, fifo):
    # stat only: this returns at once with the fix (and would block without it, so it runs last)
    with pytest.raises(InputError, match=r"system names \S*pipe\.yaml, which is not a regular file \(a FIFO\)\.$"):
        read_system_spec(Node("pipe.yaml", "protocol.yaml", "system"), tmp_path)


# -- no raw bytes from a file in a message ----------------------------------------------------
@pytest.mark.parametrize("name, spec", [
    ("bad.psf", {"charmm": {"psf": "bad.psf", "coordinates": "x.crd", "parameters": ["x.prm"]}}),
    ("bad.gro", {"gromacs": {"top": "x.top", "gro": "bad.gro"}}),
    ("bad.pdb", {"pdb": "bad.pdb"}),
])
def test_reader_errors_quote_no_raw_bytes_of_the_file(tmp_path, name, spec):
    # a CHARMM reader quotes the first line of a file it cannot read; here that line clears the screen
    (tmp_path / name).write_bytes(b"\x1b[2J\x1b]0;owned\x07\r" + b"#" * 500 + b"\x00\n" * 3)
    with pytest.raises(InputError) as info:
        systems.build_system(read_system_spec(Node(spec, "protocol.yaml", "system"), tmp_path))
    message = str(info.value)
    assert message.isprintable() and "#" * 41 not in message, message       # a snippet at most: cut short
    assert message.startswith(f"protocol.yaml: system.") and f"names {tmp_path / name}, which cannot be read" in message


def test_a_title_of_a_system_spec_is_one_printable_line(tmp_path):
    spec = textwrap.dedent("""\
        title: "double well\\e[2J"
        model: {name: double_well, barrier: 5 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}
        """)
    (tmp_path / "dw.yaml").write_text(spec)
    with pytest.raises(ProtocolError, match=r"dw\.yaml: title must be printable text on one line .*U\+001B"):
        read_system_spec(Node("dw.yaml", "protocol.yaml", "system"), tmp_path)
