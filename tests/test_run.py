"""A whole single run through the scheduler: ledger, frames, provenance, physics."""

import json
import sqlite3

import mdtraj
import numpy as np
import pytest

from boost.analysis import analyse_run
from boost.exceptions import RunFolderError
from boost.protocol import load_protocol
from boost.scheduler import run_protocol
from boost.store import read_ledger
from conftest import double_well_protocol

# 4 ns of plain MD in the low well (10/ps friction, 5 fs): many crossings, no frames
LOW_WELL = double_well_protocol(title="low double well", seed=17, timestep="5 fs", friction="10/ps", run={
    "cycle": "0.5 ps", "equilibration": "10 ps", "production": "4 ns", "frame_every": None})


@pytest.fixture
def small_run(tmp_path, write_protocol, double_well_text):
    protocol = load_protocol(write_protocol(double_well_text))
    folder = run_protocol(protocol, tmp_path / "run", progress=False)
    return protocol, folder


def test_ledger_holds_every_cycle_with_units(small_run):
    protocol, folder = small_run
    data = read_ledger(folder)
    assert len(data.cycle_t) == protocol.run.n_cycles == 60
    assert data.production_t.sum() == 50
    assert data.time_t[-1] == pytest.approx(6.0)          # ps
    assert data.condition_rt.shape == (1, 60)
    assert np.all(np.isfinite(data.potential_rt))
    # reduced potential of the unbiased condition is βU (β at 300 K; R = 8.314462618e-3 kJ/mol/K, CODATA)
    assert data.u_krt[0, 0] == pytest.approx(data.potential_rt[0] / (8.314462618e-3 * 300))
    # what each coordinate is, as typed fields: x is a position in nm, nothing wraps, no umbrella
    assert data.coordinate_names == ("x",)
    assert data.periodic == (False,) and data.angle_coordinates == frozenset()
    assert data.umbrella_coordinates == ()


ALANINE_TWO_COORDINATES = """\
protocol: 1
system: alanine-vacuum
seed: 1
temperature: 300 K
timestep: 2 fs
platform: Reference
coordinates:
  end_to_end: {distance: ["resid 0 and name C", "resid 2 and name N"]}
  phi: {dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}
umbrella:
  phi: {centres: [-60 deg], spring: 100 kJ/mol/rad**2}
run: {cycle: 0.1 ps, production: 0.3 ps}
"""


def test_ledger_says_which_coordinates_are_angles(tmp_path, write_protocol):
    folder = run_protocol(load_protocol(write_protocol(ALANINE_TWO_COORDINATES)), tmp_path / "run", progress=False)
    data = read_ledger(folder)
    assert data.coordinate_names == ("end_to_end", "phi")
    assert data.periodic == (False, True)
    assert data.angle_coordinates == frozenset({"phi"})
    assert data.umbrella_coordinates == ("phi",)


def test_frames_open_with_mdtraj_and_match_the_ledger(small_run):
    # reference library: mdtraj reads the DCD frames; their x equals the ledger's coordinate
    protocol, folder = small_run
    trajectory = mdtraj.load(str(folder / "frames" / "walker-000.dcd"), top=str(folder / "topology.pdb"))
    assert trajectory.n_frames == 6
    with sqlite3.connect(folder / "ledger.sqlite") as connection:
        cycles = [c for (c,) in connection.execute("SELECT cycle FROM frames ORDER BY frame")]
    data = read_ledger(folder)
    # DCD stores float32 in Å: agreement to ~1e-6 nm
    assert trajectory.xyz[:, 0, 0] == pytest.approx(data.values_rtc[0, cycles, 0], abs=2e-6)


def test_provenance_and_protocol_copy(small_run):
    protocol, folder = small_run
    assert (folder / "protocol.yaml").read_text() == protocol.text
    provenance = json.loads((folder / "provenance.json").read_text())
    assert provenance["protocol_sha256"] == protocol.sha256
    assert provenance["seed"] == 5 and provenance["versions"]["openmm"]
    assert provenance["platform"] in ("Reference", "CPU")


def test_folder_of_another_protocol_is_refused_and_left_alone(small_run, write_protocol):
    protocol, folder = small_run
    before = {p: p.read_bytes() for p in folder.rglob("*") if p.is_file() and not p.name.endswith(("-wal", "-shm"))}
    other = load_protocol(write_protocol(double_well_protocol(seed=6), "other.yaml"))
    with pytest.raises(RunFolderError, match="belongs to another protocol"):
        run_protocol(other, folder, progress=False)
    assert {p: p.read_bytes() for p in folder.rglob("*") if p.is_file() and not p.name.endswith(("-wal", "-shm"))} == before


def test_same_seed_same_ledger(tmp_path, write_protocol):
    # Reference platform with fixed seeds is deterministic (measured here: tests/REFERENCES.md)
    protocol = load_protocol(write_protocol(double_well_protocol(run={"production": "2 ps"})))
    a = read_ledger(run_protocol(protocol, tmp_path / "a", progress=False))
    b = read_ledger(run_protocol(protocol, tmp_path / "b", progress=False))
    assert np.array_equal(a.u_krt, b.u_krt) and np.array_equal(a.values_rtc, b.values_rtc)


def test_unbiased_low_barrier_populations_match_quadrature(tmp_path, write_protocol):
    # exact: basin populations of exp(-U/kT) by quadrature (scipy, via boost.models).
    # Plain MD crosses a ~2 kT barrier often, so a short run must agree within a few
    # reported standard errors (and within 0.05 absolute).
    protocol = load_protocol(write_protocol(LOW_WELL))
    analysis = analyse_run(run_protocol(protocol, tmp_path / "run", progress=False))
    model = protocol.system.source.model         # the typed model spec, as read from the protocol
    exact = model.compute_exact_populations(300.0, {"left": {"x": (-np.inf, 0.0)}, "right": {"x": (0.0, np.inf)}})
    basins = analysis.basins
    for i, name in enumerate(basins.names):
        error = abs(basins.populations[i] - exact[name])
        assert error < 4 * basins.d_populations[i] and error < 0.05, (name, basins.populations[i], exact[name])


def test_analysis_recomputes_the_reduced_potentials_the_run_stored(tmp_path, write_protocol):
    # two implementations cross-checked: the run's stored u_k and the analysis' recomputation
    from boost.analysis import compute_sample_reduced_potentials

    text = double_well_protocol(umbrella={"x": "{centres: [-0.1 nm, 0 nm, 0.1 nm], spring: 2000 kJ/mol/nm**2}"},
                                temperatures="[300 K, 350 K]")
    protocol = load_protocol(write_protocol(text))
    folder = run_protocol(protocol, tmp_path / "run", progress=False)
    data = read_ledger(folder)
    walkers, cycles = np.meshgrid(np.arange(6), np.arange(60), indexing="ij")
    u_kn = compute_sample_reduced_potentials(data, protocol, data.conditions, walkers.ravel(), cycles.ravel())
    assert np.array_equal(u_kn, data.u_krt.reshape(6, -1))
