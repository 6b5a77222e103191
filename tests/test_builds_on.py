"""A run that builds on an earlier one (run.builds_on): more windows or rungs, the earlier
samples reused untouched, one MBAR over both, checked against exact results.

The double well's exact populations come from quadrature of exp(-U/kT) (scipy, through
``boost.models``), as in tests/test_umbrella.py.
"""

import hashlib
import subprocess
import sys

import numpy as np
import pytest

from boost.analysis import analyse_run
from boost.conditions import Condition
from boost.exceptions import ProtocolError, RunFolderError
from boost.lineage import choose_nearest
from boost.protocol import load_protocol, parse_protocol
from boost.scheduler import run_protocol
from boost.store import FolderLock, read_ledger
from boost.units import MOLAR_GAS_CONSTANT
from conftest import double_well_protocol, run_stopped_before

TEMPERATURE = 300.0  # K
SIDES = {"left": {"x": (-np.inf, 0.0)}, "right": {"x": (0.0, np.inf)}}
# The 40 kJ/mol double well of tests/test_umbrella.py (16 kT barrier; spring and friction
# chosen there). The first run has 10 windows, 5 in each well, and a gap over the barrier
# that no window covers; the second adds 6 windows in the gap.
SYSTEM = {"model": "{name: double_well, barrier: 40 kJ/mol, minimum: 0.1 nm, tilt: 2 kJ/mol}"}
OUTER = [-0.14, -0.126, -0.112, -0.098, -0.084, 0.084, 0.098, 0.112, 0.126, 0.14]
GAP = [-0.06, -0.036, -0.012, 0.012, 0.036, 0.06]
SPRING = "20000 kJ/mol/nm**2"


def _windows(centres):
    listed = ", ".join(f"{c:g} nm" for c in sorted(centres))
    return {"x": f"{{centres: [{listed}], spring: {SPRING}}}"}


def _protocol(centres, *, seed=1, production="400 ps", builds_on=None, **changes):
    run = {"cycle": "0.2 ps", "equilibration": "5 ps", "production": production, "frame_every": None,
           "checkpoint_every": "20 ps", "builds_on": builds_on}
    keys = dict(title="windows that build on a run", system=SYSTEM, seed=seed, timestep="5 fs", friction="10/ps",
                platform="Reference", umbrella=_windows(centres), run=run)
    return double_well_protocol(**{**keys, **changes})


def _digests(folder):
    """sha256 of every file but SQLite's side files (-wal, -shm), which reading a ledger may
    leave empty or remove (tested apart in test_the_earlier_run_is_only_read)."""
    return {p.relative_to(folder): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and not p.name.endswith(("-wal", "-shm"))}


def _write(folder, name, text):
    path = folder / name
    path.write_text(text)
    return load_protocol(path)


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    """The first run (10 windows), then a second run adding 6 in the gap; the first run's
    files' digests before the second run and after it and its analysis."""
    root = tmp_path_factory.mktemp("study")
    first = run_protocol(_write(root, "first.yaml", _protocol(OUTER)), root / "first", progress=False)
    before = _digests(first)
    second = _write(root, "second.yaml", _protocol(OUTER + GAP, seed=2, builds_on="first"))
    run_protocol(second, root / "second", progress=False)
    analysis = analyse_run(root / "second")
    return root, before, _digests(first), analysis


def test_pooled_windows_match_quadrature(study):
    root, _, _, analysis = study
    model = load_protocol(root / "second.yaml").system.source.model
    exact = model.compute_exact_populations(TEMPERATURE, SIDES)   # source: exact, quadrature (scipy)
    basins = analysis.basins
    assert len(analysis.samples_k) == 16 and min(analysis.samples_k) >= 50
    left = basins.names.index("left")
    error = basins.populations[left] - exact["left"]
    # within 3 reported standard errors and 0.06 absolute (the 0.4 ns bound of test_umbrella.py)
    assert abs(error) < 3 * basins.d_populations[left] and abs(error) < 0.06
    right = 1 - left
    assert analysis.energy_unit == "kJ/mol"
    exact_dg = -MOLAR_GAS_CONSTANT * TEMPERATURE * np.log(exact["right"] / exact["left"])   # kJ/mol, exact as above
    dg, d_dg = basins.Delta_g[left, right], basins.d_Delta_g[left, right]
    # within 3 reported standard errors and 1 kJ/mol (0.4 kT, the 0.4 ns bound of test_umbrella.py)
    assert abs(dg - exact_dg) < 3 * d_dg and abs(dg - exact_dg) < 1.0
    assert not analysis.poor_pairs, analysis.poor_pairs        # the gap is covered now


def test_the_first_run_alone_has_a_gap(study):
    root, *_ = study
    with pytest.warns(Warning) as caught:
        try:
            analyse_run(root / "first")
        except Exception:            # a gap this wide may also stop MBAR; either way it is not an answer
            pass
    assert any("overlap" in str(w.message) for w in caught)


def test_the_earlier_run_is_only_read(study):
    _, before, after, _ = study
    assert before and after == before
    wal = study[0] / "first" / "ledger.sqlite-wal"
    assert not wal.exists() or wal.stat().st_size == 0        # nothing written through SQLite either


def test_the_new_run_holds_only_the_added_windows(study):
    root, *_ = study
    data = read_ledger(root / "second", reduced=False)
    assert sorted(c.centres[0] for c in data.conditions) == pytest.approx(sorted(GAP))
    assert data.metadata["builds_on"]["relative"] == "../first"
    first = read_ledger(root / "first", reduced=False)
    assert len(first.conditions) == 10


def test_each_new_walker_starts_nearest_its_window():
    # three stored configurations at x = -0.1, 0.0, 0.1 nm, sampled at 300, 300 and 400 K
    conditions = [Condition(0, 300.0, (-0.05,), (20000.0,)), Condition(1, 300.0, (0.08,), (20000.0,)),
                  Condition(2, 350.0, (0.0,), (0.0,))]
    values = np.array([[-0.1], [0.0], [0.1]])
    # nearest in spring widths; with no spring (all 0 kT) the nearest temperature wins
    assert choose_nearest(conditions, values, [300.0, 300.0, 400.0], [False]) == [0, 2, 2]


def test_a_stopped_run_that_builds_on_another_resumes_bit_for_bit(study, tmp_path):
    root, *_ = study
    text = _protocol(OUTER + [-0.06, 0.06], seed=3, production="10 ps", builds_on=str(root / "first"))
    protocol = _write(tmp_path, "more.yaml", text)
    whole = run_protocol(protocol, tmp_path / "whole", progress=False)
    stopped = run_stopped_before(protocol, tmp_path / "stopped", 30)
    run_protocol(protocol, stopped, progress=False)
    a, b = read_ledger(whole, reduced=False), read_ledger(stopped, reduced=False)
    assert np.array_equal(a.potential_rt, b.potential_rt) and np.array_equal(a.values_rtc, b.values_rtc)


# -- bad input: one line, exit 2, the earlier folder untouched -----------------------------

def _refused(tmp_path, text, match):
    protocol = _write(tmp_path, "next.yaml", text)
    with pytest.raises(RunFolderError, match=match):
        run_protocol(protocol, tmp_path / "next", progress=False)
    assert not (tmp_path / "next").exists()


def test_missing_and_foreign_sources_are_refused(study, tmp_path):
    root, *_ = study
    _refused(tmp_path, _protocol(OUTER + GAP, builds_on="nowhere"), "run.builds_on .*no such folder")
    (tmp_path / "notes").mkdir()
    (tmp_path / "notes" / "a.txt").write_text("not a run\n")
    _refused(tmp_path, _protocol(OUTER + GAP, builds_on="notes"), "is not a run folder")


def test_a_source_being_written_is_refused(study, tmp_path):
    root, *_ = study
    before = _digests(root / "first")
    lock = FolderLock(root / "first")
    lock.acquire()
    try:
        _refused(tmp_path, _protocol(OUTER + GAP, builds_on=str(root / "first")), "is being written by process")
    finally:
        lock.release()
    after = _digests(root / "first")
    assert {k: v for k, v in after.items() if k.name != "lock"} == {k: v for k, v in before.items() if k.name != "lock"}


def test_an_unfinished_source_is_refused(tmp_path):
    stopped = run_stopped_before(_write(tmp_path, "first.yaml", _protocol(OUTER, production="10 ps")),
                                 tmp_path / "first", 20)
    before = _digests(stopped)
    _refused(tmp_path, _protocol(OUTER + GAP, production="10 ps", builds_on="first"),
             r"is not finished \(cycle 20 of 75\)")
    assert _digests(stopped) == before


def test_another_system_a_dropped_window_or_nothing_added_is_refused(study, tmp_path):
    root, *_ = study
    source = str(root / "first")
    other = {"model": "{name: double_well, barrier: 30 kJ/mol, minimum: 0.1 nm, tilt: 2 kJ/mol}"}
    _refused(tmp_path, _protocol(OUTER + GAP, builds_on=source).replace(SYSTEM["model"], other["model"]),
             r"its system differs from this protocol's \(system\)")
    _refused(tmp_path, _protocol(OUTER[1:] + GAP, builds_on=source),
             r"holds the condition 300 K, x = -0.14 nm, which this protocol lacks")
    _refused(tmp_path, _protocol(OUTER, builds_on=source), "adds no condition")
    _refused(tmp_path, _protocol(OUTER + GAP, builds_on=source, timestep="2 fs"), r"timestep differs")


def test_added_conditions_that_are_no_ladder_are_refused_for_swaps(tmp_path):
    ladder = {"temperatures": "[300 K, 330 K]", "exchange": "{pairs: adjacent}"}
    _write(tmp_path, "first.yaml", _protocol(OUTER[:3], production="4 ps", **ladder))
    run_protocol(load_protocol(tmp_path / "first.yaml"), tmp_path / "first", progress=False)
    # a new temperature (every window) and a new window (every temperature): no grid of their own
    more = _protocol(OUTER[:4], production="4 ps", builds_on="first", temperatures="[300 K, 330 K, 363 K]",
                     exchange="{pairs: adjacent}")
    _refused(tmp_path, more, "do not form a ladder of their own")
    # a temperature-exchange run with another system under it
    other = _protocol(OUTER[:3], production="4 ps", builds_on="first", temperatures="[300 K, 330 K, 363 K]",
                      exchange="{pairs: adjacent}").replace("barrier: 40 kJ/mol", "barrier: 20 kJ/mol")
    _refused(tmp_path, other, r"its system differs from this protocol's \(system\)")


def test_an_empty_source_path_is_refused_when_the_protocol_loads(tmp_path):
    with pytest.raises(ProtocolError, match=r"run.builds_on"):
        parse_protocol(_protocol(OUTER, builds_on="''"), tmp_path / "p.yaml")


def test_the_command_line_says_one_line_and_exits_2(study, tmp_path):
    (tmp_path / "next.yaml").write_text(_protocol(OUTER + GAP, builds_on="nowhere"))
    result = subprocess.run([sys.executable, "-m", "boost.cli", "run", "next.yaml", "-o", "next"], cwd=tmp_path,
                            capture_output=True, text=True, timeout=300)
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "run.builds_on" in lines[0] and "Traceback" not in result.stderr
    assert not (tmp_path / "next").exists()


def test_rungs_added_to_a_temperature_ladder_pool_with_it(tmp_path):
    from conftest import SHORT_LADDER, exact_high_well_left_population

    first = SHORT_LADDER.replace("{lowest: 300 K, highest: 1500 K, count: 4}", "[300 K, 600 K, 1500 K]") \
        .replace("production: 300 ps", "production: 200 ps")
    _write(tmp_path, "first.yaml", first)
    run_protocol(load_protocol(tmp_path / "first.yaml"), tmp_path / "first", progress=False)
    second = first.replace("[300 K, 600 K, 1500 K]", "[300 K, 420 K, 600 K, 950 K, 1500 K]") \
        .replace("seed: 1", "seed: 7").replace("production: 200 ps", "production: 200 ps\n  builds_on: first")
    run_protocol(_write(tmp_path, "second.yaml", second), tmp_path / "second", progress=False)
    analysis = analyse_run(tmp_path / "second")
    assert len(analysis.samples_k) == 5
    # each run swapped along its own ladder: 0-2, 2-4 in the first, 1-3 in the second
    assert [(i, j) for i, j, *_ in analysis.verdicts.acceptance] == [(0, 2), (1, 3), (2, 4)]
    assert all(attempts > 0 for *_, attempts, _ in analysis.verdicts.acceptance)
    left = analysis.basins.names.index("left")
    error = analysis.basins.populations[left] - exact_high_well_left_population()   # source: exact, quadrature
    assert abs(error) < 3 * analysis.basins.d_populations[left] and abs(error) < 0.1


def test_refine_writes_a_protocol_that_builds_on_the_run(study, tmp_path):
    from boost.proposal import Targets, propose, read_source

    root, *_ = study
    protocol = load_protocol(root / "first.yaml")
    proposal = propose(protocol, read_source(root / "first"), Targets(), tmp_path / "refined.yaml", refine=True)
    refined = parse_protocol(proposal.text, tmp_path / "refined.yaml")
    assert refined.source_folder.resolve() == (root / "first").resolve()
    assert len(refined.umbrella[0].centres) > len(OUTER)          # the gap gets windows


def test_repeat_rebuilds_the_chain_bit_for_bit(study, tmp_path):
    from boost.repeat import format_outcome, plan_repeat, run_repeat

    root, *_ = study
    plan = plan_repeat(root / "second", folder=tmp_path / "again")
    assert plan.earlier is not None and plan.earlier.folder == tmp_path / "again-earlier"
    outcome = run_repeat(plan, progress=False)
    # Reference platform, same seeds: each run of the chain and the pooled numbers come out bit for bit
    for result in (outcome, outcome.earlier):
        assert result.comparison.count("identical") == len(result.comparison.checks) > 0
    assert read_ledger(tmp_path / "again", reduced=False).metadata["builds_on"]["absolute"] == \
        str((tmp_path / "again-earlier").resolve())
    assert "built on the repeat of" in format_outcome(outcome)
