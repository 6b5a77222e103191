"""boost writes only into folders it created: user files are never replaced (issue reproducers).

Each case runs the command line as a user would and asserts exit 2, one line on stderr,
and every file that was there before byte-identical afterwards.
"""

import json
import sqlite3
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from conftest import double_well_protocol  # noqa: E402
from test_cli import assert_one_line_error, boost  # noqa: E402

SHORT = double_well_protocol(run={"production": "1 ps"})


def snapshot(folder):
    """Every file's bytes; SQLite's side files (-wal, -shm), which a read of the ledger may add, left out."""
    return {p.relative_to(folder): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file() and not p.name.endswith(("-wal", "-shm"))}


def test_a_folder_holding_the_same_protocol_bytes_is_not_taken_for_a_run_folder(tmp_path):
    (tmp_path / "small.yaml").write_text(SHORT)
    mine = tmp_path / "mydir"
    (mine / "frames").mkdir(parents=True)
    (mine / "protocol.yaml").write_text(SHORT)                 # same bytes as the protocol
    (mine / "topology.pdb").write_text("my own structure\n")
    (mine / "provenance.json").write_text('{"mine": true}\n')
    (mine / "frames" / "walker-000.dcd").write_bytes(b"my trajectory")
    before = snapshot(mine)
    assert_one_line_error(boost("run", "small.yaml", "-o", "mydir", "--quiet", cwd=tmp_path),
                          r"mydir: holds 'frames', which boost did not write")
    assert snapshot(mine) == before


def test_a_user_file_named_lock_is_not_truncated(tmp_path):
    (tmp_path / "small.yaml").write_text(SHORT)
    target = tmp_path / "target"
    target.mkdir()
    (target / "lock").write_text("my notes about locks\n")
    assert_one_line_error(boost("run", "small.yaml", "-o", "target", "--quiet", cwd=tmp_path),
                          r"target: holds 'lock', which boost did not write")
    assert snapshot(target) == {Path("lock"): b"my notes about locks\n"}


def test_a_run_folder_with_a_foreign_entry_is_not_resumed(tmp_path):
    (tmp_path / "small.yaml").write_text(SHORT)
    result = boost("run", "small.yaml", "-o", "run", "--quiet", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    run = tmp_path / "run"
    assert json.loads((run / "boost-run.json").read_text())["run_id"]
    (run / "notes.txt").write_text("my notes\n")
    before = snapshot(run)
    assert_one_line_error(boost("run", "small.yaml", "-o", "run", "--quiet", cwd=tmp_path),
                          r"run: holds 'notes\.txt', which boost did not write; move it out")
    assert snapshot(run) == before


def test_a_ledger_from_another_run_is_refused_on_resume(tmp_path):
    (tmp_path / "small.yaml").write_text(SHORT)
    for name in ("a", "b"):
        assert boost("run", "small.yaml", "-o", name, "--quiet", cwd=tmp_path).returncode == 0
    a, b = tmp_path / "a", tmp_path / "b"
    ids = [json.loads((f / "boost-run.json").read_text())["run_id"] for f in (a, b)]
    assert ids[0] != ids[1]                                    # a random id per run folder
    with sqlite3.connect(a / "ledger.sqlite") as connection:   # the id is also in the ledger
        assert json.loads(connection.execute("SELECT value FROM meta WHERE key='run_id'").fetchone()[0]) == ids[0]
    (b / "ledger.sqlite").write_bytes((a / "ledger.sqlite").read_bytes())   # copied over from run a
    before = snapshot(b)
    assert_one_line_error(boost("run", "small.yaml", "-o", "b", "--quiet", cwd=tmp_path),
                          r"ledger\.sqlite: was not written by this run")
    assert snapshot(b) == before


def test_a_damaged_identity_file_is_reported(tmp_path):
    (tmp_path / "small.yaml").write_text(SHORT)
    run = tmp_path / "run"
    run.mkdir()
    (run / "boost-run.json").write_bytes(b"\x00garbage")
    assert_one_line_error(boost("run", "small.yaml", "-o", "run", "--quiet", cwd=tmp_path),
                          r"boost-run\.json: is damaged")
    assert snapshot(run) == {Path("boost-run.json"): b"\x00garbage"}


def test_a_long_or_odd_foreign_name_is_quoted_short_and_escaped(tmp_path):
    (tmp_path / "small.yaml").write_text(SHORT)
    target = tmp_path / "target"
    target.mkdir()
    (target / ("a\x1b[31m" + "x" * 200)).write_text("")
    result = boost("run", "small.yaml", "-o", "target", "--quiet", cwd=tmp_path)
    assert_one_line_error(result, r"holds 'a\\x1b\[31mxxx")
    assert "\x1b" not in result.stderr and len(result.stderr) < 300


def test_analysis_output_never_replaces_a_user_file(tmp_path):
    (tmp_path / "small.yaml").write_text(SHORT)
    assert boost("run", "small.yaml", "-o", "run", "--quiet", cwd=tmp_path).returncode == 0
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "summary.json").write_text("my own summary\n")          # a name boost analyze also writes
    (mine / "notes.txt").write_text("my notes\n")
    before = snapshot(mine)
    assert_one_line_error(boost("analyze", "run", "--output", "mine", cwd=tmp_path),
                          r"mine: holds 'notes\.txt', which boost analyze did not write")
    assert snapshot(mine) == before
    for place in ("/proc/boost-analysis", "/sys/boost-analysis"):
        assert_one_line_error(boost("analyze", "run", "--output", place, cwd=tmp_path),
                              r"cannot be used for the analysis output")
    first = boost("analyze", "run", cwd=tmp_path)                      # its own folder, twice
    assert first.returncode == 0, first.stderr
    assert boost("analyze", "run", cwd=tmp_path).returncode == 0


def test_analyze_of_a_folder_that_is_not_a_run_leaves_it_alone(tmp_path):
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("my notes\n")
    assert_one_line_error(boost("analyze", "mine", cwd=tmp_path), r"mine: is not a run folder \(no ledger\.sqlite\)")
    assert snapshot(mine) == {Path("notes.txt"): b"my notes\n"}
