"""Repeating a run: git provenance of the protocol file, `boost repeat`, verdicts per number."""

import json
import math
import os
import re
import subprocess
import sys
from dataclasses import replace

import numpy as np
import pytest

from boost.analysis import analyse_run
from boost.protocol import load_protocol
from boost.provenance import describe_environment, describe_git, read_protocol_at_commit
from boost.repeat import Headline, compare_analyses, judge
from boost.scheduler import run_protocol
from boost.exceptions import InputError

from conftest import double_well_protocol

BOOST = [sys.executable, "-m", "boost.cli"]


def small(**changes):
    """The small double well on the Reference platform, with PMF bins so every kind of number appears."""
    return double_well_protocol(platform="Reference", analysis={"bins": "{x: {from: -0.2 nm, to: 0.2 nm, count: 8}}"},
                                **changes)


SMALL = small()
VERDICT = re.compile(r"\s(identical|agrees|differs)$")


def boost(*args, cwd):
    return subprocess.run([*BOOST, *args], cwd=cwd, capture_output=True, text=True, timeout=300)


def git(folder, *args):
    identity = ["-c", "user.name=boost tests", "-c", "user.email=tests@example.org", "-c", "commit.gpgsign=false"]
    return subprocess.run(["git", *identity, *args], cwd=folder, check=True, capture_output=True,
                          text=True, timeout=30).stdout.strip()


def verdicts(stdout):
    """The verdict column of a comparison table, row by row."""
    return [m.group(1) for line in stdout.splitlines() if (m := VERDICT.search(line))]


def files_under(folder):
    return sorted(p.relative_to(folder) for p in folder.rglob("*"))


@pytest.fixture
def git_project(tmp_path, monkeypatch):
    """A git work tree in tmp_path/project holding a committed protocol; git never looks above tmp_path."""
    monkeypatch.setenv("GIT_CEILING_DIRECTORIES", str(tmp_path))
    project = tmp_path / "project"
    project.mkdir()
    git(project, "init", "-q")
    path = project / "protocols" / "well.yaml"
    path.parent.mkdir()
    path.write_text(SMALL)
    git(project, "add", "protocols/well.yaml")
    git(project, "commit", "-q", "-m", "a protocol")
    return project, path, git(project, "rev-parse", "HEAD")


@pytest.fixture
def small_run(tmp_path):
    path = tmp_path / "well.yaml"
    path.write_text(SMALL)
    return run_protocol(load_protocol(path), tmp_path / "original", progress=False)


# -- provenance -------------------------------------------------------------------------
def test_describe_git_follows_the_work_tree(git_project):
    project, path, head = git_project
    # source: git itself (rev-parse HEAD) for the sha; the file is committed and unchanged
    assert describe_git(path) == {"commit": head, "path_in_repo": "protocols/well.yaml",
                                  "uncommitted_changes": False}
    path.write_text(small(seed=6))
    assert describe_git(path)["uncommitted_changes"] is True
    git(project, "add", "protocols/well.yaml")              # staged is still not committed
    assert describe_git(path)["uncommitted_changes"] is True
    untracked = project / "protocols" / "new.yaml"
    untracked.write_text(SMALL)
    assert describe_git(untracked) == {"commit": head, "path_in_repo": "protocols/new.yaml",
                                       "uncommitted_changes": True}


def test_describe_git_outside_a_work_tree_or_without_git(tmp_path, monkeypatch):
    monkeypatch.setenv("GIT_CEILING_DIRECTORIES", str(tmp_path))
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "p.yaml").write_text(SMALL)
    assert describe_git(outside / "p.yaml") is None
    assert describe_git(tmp_path / "absent" / "p.yaml") is None
    monkeypatch.setenv("PATH", str(tmp_path / "no-programs-here"))
    assert describe_git(outside / "p.yaml") is None


def test_describe_git_gives_up_on_a_git_that_hangs(tmp_path, monkeypatch):
    fake = tmp_path / "bin"
    fake.mkdir()
    (fake / "git").write_text("#!/bin/sh\nexec sleep 20\n")
    (fake / "git").chmod(0o755)
    monkeypatch.setenv("PATH", str(fake) + os.pathsep + os.environ["PATH"])
    monkeypatch.setattr("boost.provenance.GIT_TIMEOUT", 0.2)
    (tmp_path / "p.yaml").write_text(SMALL)
    assert describe_git(tmp_path / "p.yaml") is None


def test_read_protocol_at_commit_and_its_errors(git_project):
    project, path, head = git_project
    path.write_text(small(seed=6))
    assert read_protocol_at_commit(path, "HEAD") == (SMALL, head)
    with pytest.raises(InputError, match=r"well\.yaml: --commit must name a commit.*Got 'no-such-rev'"):
        read_protocol_at_commit(path, "no-such-rev")
    with pytest.raises(InputError, match=r"holds no file protocols/other\.yaml"):
        read_protocol_at_commit(path.with_name("other.yaml"), "HEAD")


def test_describe_environment_has_the_recorded_keys():
    from importlib import metadata

    environment = describe_environment()
    # source: the installed package metadata (importlib.metadata), read independently
    assert environment["versions"]["openmm"] == metadata.version("openmm")
    assert environment["python"] == "{}.{}.{}".format(*sys.version_info[:3])
    assert {"host", "machine"} <= set(environment)


# -- verdicts -------------------------------------------------------------------------
def test_judge_follows_the_definition():
    # source: the definition in boost.repeat (agreement within 2 combined standard errors,
    # sqrt(σ1² + σ2²); common practice for comparing two independent estimates)
    a = Headline("q", "kT", 1.0, 0.1)
    assert judge(a, Headline("q", "kT", 1.0, 0.1)) == "identical"
    assert judge(a, Headline("q", "kT", 1.28, 0.1)) == "agrees"         # 0.28 < 2·0.1414
    assert judge(a, Headline("q", "kT", 1.29, 0.1)) == "differs"        # 0.29 > 2·0.1414
    assert judge(a, Headline("q", "kT", 1.0, 0.2)) == "agrees"          # same value, other error
    assert judge(Headline("q", "kT", 0.0, 0.0), Headline("q", "kT", -0.0, 0.0)) == "agrees"  # bits differ
    exact = Headline("q", "kT", 1.0, 0.0)
    assert judge(exact, Headline("q", "kT", np.nextafter(1.0, 2.0), 0.0)) == "differs"
    assert judge(a, Headline("q", "kT", math.nan, math.nan)) == "differs"
    assert judge(a, None) == judge(None, a) == "differs"


@pytest.mark.filterwarnings("ignore::boost.exceptions.ConvergenceWarning")   # right basin unvisited
def test_compare_analyses_of_shifted_copies(small_run):
    analysis = analyse_run(small_run)
    same = compare_analyses(analysis, analysis)
    assert same.checks and same.count("identical") == len(same.checks) and same.reproduced
    # the repeat's free energy f_0 moved by one, then by three combined standard errors
    df = np.array([0.1])
    one = replace(analysis, f_k=analysis.f_k + math.sqrt(2) * 0.1, df_k=df)
    three = replace(analysis, f_k=analysis.f_k + 3 * math.sqrt(2) * 0.1, df_k=df)
    for shifted, verdict in ((one, "agrees"), (three, "differs")):
        checks = [c for c in compare_analyses(replace(analysis, df_k=df), shifted).checks
                  if c.quantity.startswith("free energy f of condition 0")]
        assert [c.verdict for c in checks] == [verdict]
    assert not compare_analyses(replace(analysis, df_k=df), three).reproduced


# -- boost repeat ------------------------------------------------------------------------
def test_repeat_of_a_run_folder_is_identical(small_run, tmp_path):
    result = boost("repeat", str(small_run), "--quiet", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    rows = verdicts(result.stdout)
    # the Reference platform is deterministic (measured here: tests/REFERENCES.md,
    # deterministic platforms), so the same protocol and seed give every number bit for bit
    assert rows and set(rows) == {"identical"}
    assert "population of basin left" in result.stdout and "PMF along x" in result.stdout
    repeat = tmp_path / "original-repeat"
    assert (repeat / "protocol.yaml").read_text() == (small_run / "protocol.yaml").read_text()
    record = json.loads((repeat / "repeat.json").read_text())
    assert record["verdicts"]["differs"] == 0 and record["compared_with"] == str(small_run)


def test_repeat_finds_files_next_to_the_original_protocol(tmp_path):
    # relative paths in the copy are relative to the original protocol file's folder
    project = tmp_path / "project"
    project.mkdir()
    (project / "well-system.yaml").write_text(
        "model: {name: double_well, barrier: 5 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}\n")
    (project / "well.yaml").write_text(small(system="well-system.yaml"))
    run = run_protocol(load_protocol(project / "well.yaml"), tmp_path / "runs" / "first", progress=False)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    result = boost("repeat", str(run), "-o", "again", "--quiet", cwd=elsewhere)
    assert result.returncode == 0, result.stderr
    assert set(verdicts(result.stdout)) == {"identical"}


def test_repeat_at_a_commit_runs_the_committed_text(git_project, tmp_path):
    project, path, head = git_project
    original = run_protocol(load_protocol(path), tmp_path / "original", progress=False)
    path.write_text(small(seed=6))      # edited after the commit
    result = boost("repeat", str(path), "--commit", "HEAD", "--against", str(original), "--quiet",
                   cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert set(verdicts(result.stdout)) == {"identical"}     # deterministic platform (as above)
    assert head[:12] in result.stdout
    repeat = tmp_path / "original-repeat"
    assert (repeat / "protocol.yaml").read_text() == SMALL
    assert json.loads((repeat / "repeat.json").read_text())["commit"] == head
    # without an original it just runs and reports, into runs/<name>-<commit>
    alone = boost("repeat", str(path), "--commit", head[:10], "--quiet", cwd=tmp_path)
    assert alone.returncode == 0, alone.stderr
    assert "population of basin left" in alone.stdout and not verdicts(alone.stdout)
    assert (tmp_path / "runs" / f"well-{head[:8]}" / "protocol.yaml").read_text() == SMALL


def test_repeat_against_another_seed_differs(small_run, tmp_path):
    other = tmp_path / "seed-6.yaml"
    other.write_text(small(seed=6))
    against = run_protocol(load_protocol(other), tmp_path / "seed-6", progress=False)
    result = boost("repeat", str(small_run), "--against", str(against), "-o", "new", "--quiet", cwd=tmp_path)
    rows = verdicts(result.stdout)
    # another seed is another trajectory: not every number can be bit for bit the same,
    # and the exit code says whether any differs
    assert set(rows) - {"identical"}
    assert result.returncode == (1 if "differs" in rows else 0), result.stderr
    assert re.search(rf"\b{rows.count('differs')} differ\b", result.stdout)
    # f of condition 0 is 0 by MBAR's convention in both (source: pymbar reports f_k
    # relative to state 0)
    assert re.search(r"free energy f of condition 0 .*identical$", result.stdout, re.M)
    assert "differs" in rows and result.returncode == 1         # seed 6 crosses to the right basin


# -- bad input -----------------------------------------------------------------------------
def assert_one_line_error(result, pattern):
    assert result.returncode == 2, result.stderr
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "Traceback" not in result.stderr, result.stderr
    assert re.search(pattern, lines[0]), lines[0]


def test_bad_sources_are_one_line_and_write_nothing(small_run, git_project, tmp_path):
    _, path, _ = git_project
    (tmp_path / "empty").mkdir()
    (tmp_path / "notes.txt").write_text("not a protocol: [\n")
    before = files_under(tmp_path)
    cases = [
        (("absent",), r"absent: no such run folder or protocol file"),
        (("empty",), r"empty: is a folder but not a run folder"),
        (("notes.txt",), r"notes\.txt: is not valid YAML"),
        ((str(path), "--commit", "no-such-rev"), r"well\.yaml: --commit must name a commit.*'no-such-rev'"),
        ((str(small_run), "--commit", "HEAD"), r"--commit needs a protocol file"),
        ((str(path), "--against", "empty"), r"empty: --against must be a run folder"),
        ((str(small_run), "-o", str(small_run)), r"already exists and is not empty"),
    ]
    for args, pattern in cases:
        assert_one_line_error(boost("repeat", *args, "--quiet", cwd=tmp_path), pattern)
    assert files_under(tmp_path) == before
