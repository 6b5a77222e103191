"""The command line: bad input is one line on stderr, exit code 2, no traceback, no damage."""

import os
import subprocess
import sys
from pathlib import Path

import pytest

BOOST = [sys.executable, "-m", "boost.cli"]


def boost(*args, cwd):
    return subprocess.run([*BOOST, *args], cwd=cwd, capture_output=True, text=True, timeout=300)


def assert_one_line_error(result, pattern):
    import re

    assert result.returncode == 2, result.stderr
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, result.stderr
    assert "Traceback" not in result.stderr
    assert re.search(pattern, lines[0]), lines[0]


ALANINE = """\
protocol: 1
system: alanine-vacuum
seed: 1
temperature: 300 K
timestep: 2 fs
coordinates:
  phi: {dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}
umbrella:
  phi: {centres: [60 deg], spring: 100 kJ/mol/rad**2}
run: {cycle: 0.1 ps, production: 0.5 ps}
"""


def test_check_prints_plan(write_protocol, tmp_path):
    result = boost("check", str(write_protocol(ALANINE)), cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "22 atoms" in result.stdout and "protocol is valid" in result.stdout
    assert not (tmp_path / "runs").exists()          # check writes nothing


@pytest.mark.parametrize("old, new, pattern", [
    ('"resid 1 and name CA"', '"resid 1 and name XX"', r"protocol\.yaml: coordinates\.phi\.dihedral\[2\] must select at least one atom"),
    ('"resid 1 and name CA"', '"resid 1"', r"coordinates\.phi\.dihedral\[2\] must select exactly one atom.*matches 10"),
    ('"resid 1 and name CA"', '"resid 1 and nome CA"', r"coordinates\.phi\.dihedral\[2\] must be an mdtraj selection"),
    ('"resid 1 and name CA"', "99", r"coordinates\.phi\.dihedral\[2\] must be atom indices below 22"),
    ("spring: 100 kJ/mol/rad**2", "spring: -100 kJ/mol/rad**2", r"umbrella\.phi\.spring must be positive"),
    ("timestep: 2 fs", "timestep: -2 fs", r"protocol\.yaml: timestep must be positive"),
    ("timestep: 2 fs", "timestep: 2", r"protocol\.yaml: timestep must be a time with its unit"),
    ("seed: 1", "sead: 1", r"protocol\.yaml: sead is not a known key\. Did you mean 'seed'\?"),
    ("system: alanine-vacuum", "system: nowhere.yaml", r"nowhere\.yaml"),
    ("seed: 1", "seed: [1", r"protocol\.yaml: is not valid YAML at line \d+"),
    # spellings of an earlier schema: the message names the key that replaces them
    ("run: {cycle: 0.1 ps, production: 0.5 ps}", "run: {cycle: 0.1 ps, production: 0.5 ps, checkpoint_interval: 1 ps}",
     r"protocol\.yaml: run\.checkpoint_interval is no longer read; write run\.checkpoint_every instead"),
    ("umbrella:", "walls:\n  - {coordinate: phi, lower: 0 deg, spring: 1 kJ/mol/rad**2}\numbrella:",
     r"protocol\.yaml: walls is no longer read; write flat_bottom"),
])
def test_bad_protocol_is_one_line(write_protocol, tmp_path, old, new, pattern):
    path = write_protocol(ALANINE.replace(old, new))
    for command in ("check", "run"):
        assert_one_line_error(boost(command, str(path), cwd=tmp_path), pattern)
    assert not (tmp_path / "runs").exists()


@pytest.mark.parametrize("solute, system, pattern", [
    ("{atoms: 'resname ALA', scales: [1, 1.2]}", None, r"protocol\.yaml: solute\.scales\[1\] must be in \(0, 1\]"),
    ("{atoms: 'resname XYZ', scales: [1, 0.5]}", None, r"protocol\.yaml: solute\.atoms must select at least one atom"),
    ("{atoms: 'resname ALA', scales: [1, 0.5]}", "alanine-obc2",
     r"protocol\.yaml: solute\.atoms: the system's force \d+ \((GBSAOBCForce|CustomGBForce)\) acts on solute atoms"),
])
def test_bad_solute_is_one_line_and_nothing_runs(write_protocol, tmp_path, solute, system, pattern):
    text = ALANINE + f"solute: {solute}\n"
    if system:
        text = text.replace("system: alanine-vacuum", f"system: {system}")
    path = write_protocol(text)
    folder = tmp_path / "existing"
    folder.mkdir()
    (folder / "notes.txt").write_text("mine")
    for command in (["check"], ["run", "-o", str(folder)]):
        assert_one_line_error(boost(*command, str(path), cwd=tmp_path), pattern)
    assert [p.name for p in folder.iterdir()] == ["notes.txt"] and not (tmp_path / "runs").exists()


def test_missing_residue_template_is_one_line(write_protocol, tmp_path):
    # a force field without the residues of the structure (tip3p.xml holds water only)
    text = ALANINE.replace("system: alanine-vacuum", "system:\n  peptide: {sequence: [ACE, ALA, NME]}\n"
                           "  forcefield: [tip3p.xml]")
    assert_one_line_error(boost("check", str(write_protocol(text)), cwd=tmp_path), r"forcefield")


def test_missing_protocol_file(tmp_path):
    assert_one_line_error(boost("check", "absent.yaml", cwd=tmp_path), r"absent\.yaml: protocol file not found")


def test_run_then_foreign_protocol_refused_without_damage(write_protocol, tmp_path):
    path = write_protocol(ALANINE)
    result = boost("run", str(path), "--quiet", "-o", "out", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    folder = tmp_path / "out"
    before = {p: p.read_bytes() for p in folder.rglob("*") if p.is_file() and not p.name.endswith(("-wal", "-shm"))}
    other = write_protocol(ALANINE.replace("seed: 1", "seed: 2"), "other.yaml")
    assert_one_line_error(boost("run", str(other), "--quiet", "-o", "out", cwd=tmp_path),
                          r"out: belongs to another protocol")
    assert {p: p.read_bytes() for p in folder.rglob("*") if p.is_file() and not p.name.endswith(("-wal", "-shm"))} == before
    analysed = boost("analyze", "out", cwd=tmp_path)
    assert analysed.returncode == 0, analysed.stderr
    snapshot = {p: p.read_bytes() for p in folder.rglob("*") if p.is_file() and not p.name.endswith(("-wal", "-shm"))}
    for memory, message in (("10 MiB", r"--memory must be at least 512 MiB"),
                            ("lots", r"--memory must be an amount of memory")):
        assert_one_line_error(boost("analyze", "out", "--memory", memory, cwd=tmp_path), message)
    assert {p: p.read_bytes() for p in folder.rglob("*") if p.is_file() and not p.name.endswith(("-wal", "-shm"))} == snapshot
    assert boost("analyze", "out", "--memory", "2 GiB", cwd=tmp_path).returncode == 0


def test_analyze_rejects_a_folder_that_is_not_a_run(tmp_path):
    (tmp_path / "empty").mkdir()
    assert_one_line_error(boost("analyze", "empty", cwd=tmp_path), r"empty: is not a run folder")
    assert_one_line_error(boost("analyze", "absent", cwd=tmp_path), r"absent: no such run folder")


def test_bad_command_line_option(write_protocol, tmp_path):
    result = boost("run", str(write_protocol(ALANINE)), "--platform", "GPU", cwd=tmp_path)
    assert result.returncode == 2 and "Traceback" not in result.stderr and "GPU" in result.stderr


def test_systems_lists_bundled(tmp_path):
    result = boost("systems", cwd=tmp_path)
    assert result.returncode == 0
    assert "alanine-vacuum" in result.stdout and "double-well" in result.stdout
    # the last line points at the example protocols (here the source tree's protocols/)
    examples = Path(result.stdout.splitlines()[-1].removeprefix("example protocols: "))
    assert (examples / "alanine-phi-umbrella.yaml").is_file(), result.stdout


def test_closed_output_pipe_is_a_quiet_stop(tmp_path):
    """`boost systems | head -1`: the reader closes the pipe; boost stops without an error line."""
    read_end, write_end = os.pipe()
    os.close(read_end)
    try:
        result = subprocess.run([*BOOST, "systems"], cwd=tmp_path, stdout=write_end,
                                stderr=subprocess.PIPE, text=True, timeout=300)
    finally:
        os.close(write_end)
    assert result.returncode == 1
    assert result.stderr == ""
