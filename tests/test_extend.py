"""Extending a finished run: a longer run.production continues it in the same folder.

The check is against the run that asked for the longer production from the start: on the
Reference platform (deterministic, measured here: tests/REFERENCES.md) the extended ledger,
frames and analysis must equal it bit for bit.
"""

import json
import sys
from pathlib import Path

import numpy as np
import pytest

from boost.analysis import analyse_run
from boost.exceptions import RunFolderError
from boost.protocol import load_protocol
from boost.scheduler import run_protocol
from boost.store import read_ledger
from conftest import double_well_protocol

sys.path.insert(0, str(Path(__file__).parent))
from test_cli import assert_one_line_error, boost  # noqa: E402

# two temperatures that swap: the extension must carry on the swap RNG and the assignment
LADDER = {"temperatures": "[300 K, 400 K]", "exchange": "{pairs: adjacent}",
          "platform": "{name: Reference, workers: 1}", "analysis": "{uncertainty: {method: asymptotic}}"}


def text(production, **changes):
    keys = {**LADDER, **changes}
    return double_well_protocol(**keys, run={"production": production, "checkpoint_every": "1 ps"})


def files_of(folder):
    return {p.relative_to(folder): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file() and not p.name.endswith(("-wal", "-shm", "lock"))}


@pytest.fixture(scope="module")
def longer(tmp_path_factory):
    """The reference: 10 ps of production asked for from the start."""
    base = tmp_path_factory.mktemp("extend")
    (base / "long.yaml").write_text(text("10 ps"))
    return run_protocol(load_protocol(base / "long.yaml"), base / "long", progress=False)


def test_on_the_deterministic_cpu_platform_too(tmp_path):
    # CPU with DeterministicForces continues a checkpoint bit for bit (measured here: tests/REFERENCES.md)
    cpu = {"platform": "{name: CPU, threads: 1, workers: 1}"}
    (tmp_path / "long.yaml").write_text(text("4 ps", **cpu))
    reference = run_protocol(load_protocol(tmp_path / "long.yaml"), tmp_path / "long", progress=False)
    (tmp_path / "p.yaml").write_text(text("2 ps", **cpu))
    folder = run_protocol(load_protocol(tmp_path / "p.yaml"), tmp_path / "run", progress=False)
    (tmp_path / "p.yaml").write_text(text("4 ps", **cpu))
    run_protocol(load_protocol(tmp_path / "p.yaml"), folder, progress=False)
    a, b = read_ledger(reference), read_ledger(folder)
    assert np.array_equal(a.potential_rt, b.potential_rt) and np.array_equal(a.values_rtc, b.values_rtc)
    assert np.array_equal(a.condition_rt, b.condition_rt) and a.frame_crcs == b.frame_crcs


def test_a_longer_production_continues_the_run_bit_for_bit(tmp_path, longer):
    path = tmp_path / "p.yaml"
    path.write_text(text("5 ps"))
    folder = run_protocol(load_protocol(path), tmp_path / "run", progress=False)
    assert len(read_ledger(folder).cycle_t) == 60
    path.write_text(text("10 ps"))
    run_protocol(load_protocol(path), folder, progress=False)
    a, b = read_ledger(longer), read_ledger(folder)
    for name in ("cycle_t", "time_t", "production_t", "condition_rt", "potential_rt", "values_rtc", "u_krt", "swaps"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    assert a.frame_crcs == b.frame_crcs                        # the frames are the same bytes
    assert (folder / "protocol.yaml").read_text() == text("10 ps")
    first, second = analyse_run(longer), analyse_run(folder)
    assert np.array_equal(first.basins.populations, second.basins.populations)
    assert np.array_equal(first.f_k, second.f_k)
    extensions = json.loads((folder / "provenance.json").read_text())["extensions"]
    assert len(extensions) == 1 and extensions[0]["to_protocol_sha256"] == load_protocol(path).sha256


def test_extending_again_with_the_same_protocol_is_already_complete(tmp_path, longer, caplog):
    folder = tmp_path / "copy"
    import shutil
    shutil.copytree(longer, folder)
    (tmp_path / "p.yaml").write_text(text("10 ps"))
    before = files_of(folder)
    with caplog.at_level("INFO", logger="boost"):
        run_protocol(load_protocol(tmp_path / "p.yaml"), folder, progress=False)
    assert "already complete" in caplog.text
    assert files_of(folder) == before


def test_a_changed_frame_interval_may_come_with_the_extension(tmp_path):
    (tmp_path / "p.yaml").write_text(text("3 ps"))
    assert boost("run", "p.yaml", "-o", "run", "--quiet", cwd=tmp_path).returncode == 0
    (tmp_path / "p.yaml").write_text(text("6 ps").replace("frame_every: 1 ps", "frame_every: 0.5 ps"))
    result = boost("run", "p.yaml", "-o", "run", "--quiet", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    data = read_ledger(tmp_path / "run")
    assert len(data.cycle_t) == 70 and len(data.frame_crcs[0]) == 4 + 6      # 1 ps, then every 0.5 ps


@pytest.mark.parametrize("change, named", [
    ({"seed": 6}, "seed"),
    ({"temperature": "310 K"}, "temperature"),
    ({"timestep": "1 fs"}, "timestep"),
    ({"system": {"model": "{name: double_well, barrier: 6 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}"}},
     r"system\.model\.barrier"),
])
def test_any_other_change_is_refused_naming_the_keys(tmp_path, change, named):
    (tmp_path / "p.yaml").write_text(text("2 ps"))
    assert boost("run", "p.yaml", "-o", "run", "--quiet", cwd=tmp_path).returncode == 0
    before = files_of(tmp_path / "run")
    (tmp_path / "p.yaml").write_text(text("4 ps", **change))
    result = boost("run", "p.yaml", "-o", "run", "--quiet", cwd=tmp_path)
    assert_one_line_error(result, rf"run: belongs to another protocol \({named} differ from the run's\); a run "
                                  r"folder goes on only with a longer run\.production")
    assert files_of(tmp_path / "run") == before


def test_a_shorter_production_is_refused(tmp_path):
    (tmp_path / "p.yaml").write_text(text("3 ps"))
    folder = run_protocol(load_protocol(tmp_path / "p.yaml"), tmp_path / "run", progress=False)
    before = files_of(folder)
    (tmp_path / "p.yaml").write_text(text("2 ps"))
    with pytest.raises(RunFolderError, match=r"was run with run\.production of 30 cycles; .* asks for 20, and a run "
                                             r"cannot be shortened"):
        run_protocol(load_protocol(tmp_path / "p.yaml"), folder, progress=False)
    assert files_of(folder) == before
