"""Verdicts through the whole pipeline: runs too short, runs stuck in one well, ladders.

Each run's answer is also compared with the exact one (quadrature by boost.models with
scipy), so a verdict of 'settled' is seen next to an estimate that is right, and 'not
settled' next to one that may not be.
"""

import json
import re
import shutil
from pathlib import Path

import pytest

from boost.analysis import analyse_run
from boost.protocol import load_protocol
from boost.report import format_summary, write_report
from boost.scheduler import run_protocol
from boost.store import LEDGER, Ledger
from boost.verdict import DRIFTING, SETTLED, TOO_FEW
from conftest import SHORT_LADDER, exact_high_well_left_population as exact_left_population

REPO = Path(__file__).resolve().parents[1]


def run(tmp_path, text, name="run"):
    path = tmp_path / f"{name}.yaml"
    path.write_text(text)
    return run_protocol(load_protocol(path), tmp_path / name, progress=False)


def umbrella_text(production, seed=3):
    text = (REPO / "protocols" / "double-well-umbrella.yaml").read_text()
    text = text.replace("production: 100 ps", f"production: {production}")
    text = text.replace("timestep: 2 fs", "timestep: 2 fs\nplatform: {name: Reference, workers: 1}")
    return re.sub(r"^seed: .*$", f"seed: {seed}", text, flags=re.M)


def test_umbrella_run_of_a_few_cycles_per_window_is_not_settled_and_says_why(tmp_path):
    # 21 windows × 30 cycles: a handful of uncorrelated samples per window
    analysis = analyse_run(run(tmp_path, umbrella_text("6 ps")), energy_unit="kT")
    verdicts = analysis.verdicts
    words = [v.word for v in verdicts.populations]
    assert SETTLED not in words, [v.reason for v in verdicts.populations]
    for v in verdicts.populations:
        assert ("independent samples" in v.reason) or ("halves differ" in v.reason), v.reason
    summary = format_summary(analysis)
    assert re.search(r"left: (too few samples|drifting), ", summary), summary


def test_long_enough_umbrella_run_is_settled_and_right(tmp_path):
    # the example as shipped (100 ps per window): settled, and the exact population lies
    # inside the reported 95 % interval
    analysis = analyse_run(run(tmp_path, umbrella_text("100 ps")), energy_unit="kT")
    basins, verdicts = analysis.basins, analysis.verdicts
    assert [v.word for v in verdicts.populations] == [SETTLED, SETTLED], [v.reason for v in verdicts.populations]
    exact = exact_left_population()
    assert basins.populations_low[0] <= exact <= basins.populations_high[0]
    assert verdicts.delta_g[(0, 1)].word == SETTLED
    assert verdicts.populations[0].independent >= 20


def test_plain_md_stuck_in_one_well_is_too_few_samples(tmp_path):
    # 25 kJ/mol barrier (about 10 kT): 20 ps of plain MD never crosses (common practice:
    # the Kramers time is many orders longer); the only basin seen has no outside to weigh
    text = """\
protocol: 1
system: double-well-high
seed: 4
temperature: 300 K
timestep: 2 fs
platform: {name: Reference, workers: 1}
coordinates:
  x: {position: 0, axis: x}
run: {cycle: 0.2 ps, production: 20 ps}
basins:
  left: {x: [-1 nm, 0 nm]}
  right: {x: [0 nm, 1 nm]}
"""
    with pytest.warns(UserWarning, match="basin right holds no sample"):
        analysis = analyse_run(run(tmp_path, text))
    (verdict,) = analysis.verdicts.populations
    assert analysis.basins.populations[0] == pytest.approx(1.0)
    assert verdict.word == TOO_FEW, verdict.reason


LADDER = re.sub(r"^seed: .*$", "seed: 8", SHORT_LADDER, flags=re.M)


@pytest.fixture(scope="module")
def ladder(tmp_path_factory):
    return run(tmp_path_factory.mktemp("ladder"), LADDER)


def test_ladder_verdicts_cover_populations_and_every_neighbour_pair(ladder, tmp_path):
    analysis = analyse_run(ladder, energy_unit="kT")
    verdicts = analysis.verdicts
    assert [(i, j) for i, j, *_ in verdicts.acceptance] == [(0, 1), (1, 2), (2, 3)]
    for i, j, acceptance, attempts, v in verdicts.acceptance:
        assert acceptance == pytest.approx(analysis.swaps.acceptance_ij[i, j])
        assert v.word in (SETTLED, DRIFTING, TOO_FEW) and v.reason
    assert all(v.word in (SETTLED, DRIFTING, TOO_FEW) for v in verdicts.populations)
    out = write_report(analysis, tmp_path / "report")
    summary = json.loads((out / "summary.json").read_text())
    assert summary["basins"]["left"]["verdict"]["word"] == verdicts.populations[0].word
    assert len(summary["neighbour swaps"]) == 3
    assert (out / "convergence.png").stat().st_size > 0 and (out / "neighbour-swaps.csv").exists()
    rows = (out / "convergence.csv").read_text().splitlines()
    assert rows[0].startswith("number,fraction of production,production used (ps)")
    assert len(rows) == 1 + 3 * 10          # two populations and one ΔG, ten fractions each


def test_a_run_still_going_gets_verdicts_from_what_is_there(ladder, tmp_path):
    # as `boost analyze` sees a run in progress: the ledger cut back to its first cycles
    folder = tmp_path / "partial"
    shutil.copytree(ladder, folder)
    shutil.rmtree(folder / "checkpoints")      # the finished run's are past cycle 299
    ledger = Ledger(folder / LEDGER)
    ledger.truncate_after(99 + 200)             # 100 equilibration cycles, then 200 of 1500
    ledger.close()
    analysis = analyse_run(folder, energy_unit="kT")
    assert analysis.n_cycles == 300
    assert analysis.verdicts.production_ps == pytest.approx(200 * 0.2)
    assert len(analysis.verdicts.populations) == 2
