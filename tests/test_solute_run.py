"""Solute scaling through the whole pipeline: protocol -> plan -> walkers -> ledger -> analysis.

Checks and their sources:

- (exact) A molecule in vacuum whose only terms are those solute scaling scales (nonbonded
  terms and proper torsions), all of it the solute: U(x; λ) = λ U(x), so condition λ at T_0
  has the Boltzmann weight of temperature T_0 / λ, β_0 λ U = β_m U (tests/REFERENCES.md,
  "Boltzmann weights of a solute ladder"). Its reduced potentials must equal those of
  the matching temperature ladder (1e-6 kT), and (slow) the basin populations at 300 K of
  a solute-tempering run those of a temperature-exchange run within their combined error.
- (common practice) Neighbour swap acceptance of two solute scales predicted from the
  mean and variance of the energy difference the swap sees, taken as normal
  (boost.ladder_design.compute_gaussian_acceptance; tests/REFERENCES.md, "Gaussian swap
  acceptance"), against the acceptance measured in a run.
- (pymbar 4.0.3 as the outside reference) the analysis' basin populations at λ = 1 equal
  pymbar's expectations in the ladder's λ = 1 condition from the same reduced potentials.
- (measured here: tests/REFERENCES.md, "Deterministic platforms") a run killed and resumed,
  or spread over other worker counts, repeats bit for bit on the Reference platform.
- The ledger keeps the solute parts under its checksums, and a ledger written before solute
  scaling (tests/data/ledger-format-2, written by commit 83cad5d) reads and analyses to the
  numbers that commit gave.
"""

import json
import math
import shutil
import struct
import sys
from pathlib import Path

import numpy as np
import openmm
import pytest
from openmm import app, unit

from boost.analysis import analyse_run, select_samples
from boost.analysis.samples import basin_masks, compute_sample_reduced_potentials
from boost.conditions import compute_reduced_potentials
from boost.engine import PlatformChoice, Walker
from boost.ladder_design import compute_gaussian_acceptance
from boost.plan import make_plan
from boost.protocol import load_protocol, parse_protocol
from boost.scheduler import run_protocol
from boost.store import Ledger, LedgerDamage, read_ledger
from boost.units import beta

sys.path.insert(0, str(Path(__file__).parent))
from test_resume import assert_same_frames, resume_after_kills  # noqa: E402
from test_tempering import measured_acceptance  # noqa: E402

DATA = Path(__file__).parent / "data"


# -- a molecule made only of terms that solute scaling scales -----------------------------
BOND, ANGLE = 0.153, math.radians(111.0)      # nm, rad


def chain_positions(n_atoms, dihedral=math.radians(-170.0)):
    """A chain of ``n_atoms`` at bond length BOND, angle ANGLE and every dihedral ``dihedral`` (nm)."""
    xyz = [np.zeros(3), np.array([BOND, 0.0, 0.0])]
    xyz.append(xyz[1] + BOND * np.array([-math.cos(ANGLE), math.sin(ANGLE), 0.0]))
    for i in range(3, n_atoms):
        a, b, c = xyz[i - 3:i]
        bc = (c - b) / np.linalg.norm(c - b)
        normal = np.cross(b - a, bc)
        normal /= np.linalg.norm(normal)
        frame = np.array([bc, np.cross(normal, bc), normal]).T
        step = BOND * np.array([-math.cos(ANGLE), math.sin(ANGLE) * math.cos(dihedral),
                                math.sin(ANGLE) * math.sin(dihedral)])
        xyz.append(c + frame @ step)
    return np.array(xyz)


def write_chain(folder, n_atoms=5):
    """chain.xml and chain.pdb: five 16 amu particles whose bonds and angles are Lennard-Jones
    exceptions (deep wells at the bond length and at the 1-3 distance), with charges, 1-4
    exceptions, a 1-5 pair and two proper torsions of three-fold and one-fold terms.

    Solute scaling leaves bonds, angles and impropers unscaled, so a molecule with those
    would not satisfy U(λ) = λ U; this one does. The HarmonicBondForce has force constants
    of zero: it adds no energy and only records the bonds, which is how solute scaling
    (and OpenMM) tell a proper torsion from an improper one.
    """
    xyz = chain_positions(n_atoms)
    system = openmm.System()
    for _ in range(n_atoms):
        system.addParticle(16.0)
    nonbonded = openmm.NonbondedForce()
    nonbonded.setNonbondedMethod(openmm.NonbondedForce.NoCutoff)
    charges = [0.25 * (-1) ** i for i in range(n_atoms)]
    for charge in charges:
        nonbonded.addParticle(charge, 0.35, 0.4)
    minimum = 2 ** (1 / 6)                        # r_min / σ of a Lennard-Jones well
    third = 2 * BOND * math.sin(ANGLE / 2)
    for i in range(n_atoms - 1):
        nonbonded.addException(i, i + 1, 0.0, BOND / minimum, 250.0)
    for i in range(n_atoms - 2):
        nonbonded.addException(i, i + 2, 0.0, third / minimum, 40.0)
    for i in range(n_atoms - 3):
        nonbonded.addException(i, i + 3, charges[i] * charges[i + 3] / 1.2, 0.35, 0.2)
    system.addForce(nonbonded)
    bonds = openmm.HarmonicBondForce()
    for i in range(n_atoms - 1):
        bonds.addBond(i, i + 1, BOND, 0.0)
    system.addForce(bonds)
    torsions = openmm.PeriodicTorsionForce()
    for i in range(n_atoms - 3):
        torsions.addTorsion(i, i + 1, i + 2, i + 3, 3, 0.0, 6.0)
        torsions.addTorsion(i, i + 1, i + 2, i + 3, 1, 0.0, 2.0)
    system.addForce(torsions)
    (Path(folder) / "chain.xml").write_text(openmm.XmlSerializer.serialize(system))
    topology = app.Topology()
    residue = topology.addResidue("CHN", topology.addChain())
    atoms = [topology.addAtom(f"C{i + 1}", app.element.carbon, residue) for i in range(n_atoms)]
    for a, b in zip(atoms, atoms[1:]):
        topology.addBond(a, b)
    with open(Path(folder) / "chain.pdb", "w") as handle:
        app.PDBFile.writeFile(topology, xyz * unit.nanometer, handle)


CHAIN = """\
protocol: 1
title: five-particle chain
system: {serialized: {system: chain.xml, pdb: chain.pdb}}
seed: 2011
temperature: 300 K
timestep: 2 fs
friction: 5/ps
platform: {name: Reference, workers: 1}
coordinates:
  phi: {dihedral: [0, 1, 2, 3]}
exchange: {pairs: adjacent}
run: {cycle: 0.2 ps, equilibration: 20 ps, production: PRODUCTION}
basins:
  trans: {phi: [120 deg, -120 deg]}
  gauche: {phi: [-120 deg, 120 deg]}
analysis: {uncertainty: {method: bootstrap}}
"""
#: The same ladder twice: λ_k = T_0 / T_k.
SOLUTE_LADDER = "solute: {atoms: all, effective_temperatures: [300 K, 380 K, 480 K]}\n"
TEMPERATURE_LADDER = "temperatures: [300 K, 380 K, 480 K]\n"


@pytest.fixture(scope="module")
def chain_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("chain")
    write_chain(folder)
    return folder


def chain_protocol(folder, ladder, production="2 ps", name="protocol.yaml"):
    path = folder / name
    path.write_text(CHAIN.replace("PRODUCTION", production) + ladder)
    return load_protocol(path)


def walker_of(plan, condition, *, seed=3, platform=PlatformChoice("Reference", {})):
    return Walker(0, openmm.XmlSerializer.clone(plan.system), plan.umbrella_names, plan.built.positions,
                  plan.built.box_vectors, plan.conditions[condition], timestep=plan.protocol.timestep,
                  friction=plan.protocol.friction, platform=platform, seed=seed, solute=plan.solute)


def reduced_potentials(plan, observation):
    """u_k of one walker's observation, by the run's own formula (as boost.scheduler does)."""
    solute_r2 = [observation.solute] if observation.solute is not None else None
    return compute_reduced_potentials(plan.conditions, [observation.potential], np.zeros((1, 0)), [],
                                      solute_r2=solute_r2)[:, 0]


# -- (a) the whole molecule as solute is temperature scaling ------------------------------
def test_whole_molecule_solute_ladder_has_the_reduced_potentials_of_the_temperature_ladder(chain_folder):
    # exact: β_0 (λ_k U) = β_k U with λ_k = T_0 / T_k (tests/REFERENCES.md, "Boltzmann weights of a solute ladder")
    solute = make_plan(chain_protocol(chain_folder, SOLUTE_LADDER, name="solute.yaml"), probe=False)
    heated = make_plan(chain_protocol(chain_folder, TEMPERATURE_LADDER, name="heated.yaml"), probe=False)
    assert [c.solute_scale for c in solute.conditions] == pytest.approx([1.0, 300 / 380, 300 / 480])
    assert len(solute.solute.solute) == 5
    moving = walker_of(solute, 2)                    # λ = 300/480: the configurations of a hot rung
    probe = walker_of(heated, 0)
    moving.draw_velocities(7)
    u_solute, u_heated = [], []
    for _ in range(8):
        moving.step(100)
        seen = moving.observe()
        probe.context.setPositions(seen.positions)
        u_solute.append(reduced_potentials(solute, seen))
        u_heated.append(reduced_potentials(heated, probe.observe()))
        # everything is solute: no solute-rest part, and the physical potential is all solute-solute
        assert abs(seen.solute[0]) < 1e-9 and seen.solute[1] == pytest.approx(seen.potential, rel=1e-12)
    u_solute, u_heated = np.array(u_solute), np.array(u_heated)
    assert np.ptp(u_solute, axis=1).min() > 10.0       # the rungs differ by many kT
    np.testing.assert_allclose(u_solute, u_heated, rtol=0, atol=1e-6)


def test_measuring_the_parts_leaves_the_trajectory_alone():
    # the parts take three energies at other solute scales and restore the context's
    # parameters; a walker that measures them must move exactly as one that does not
    text = ALANINE.replace("PRODUCTION", "1 ps")
    plan = make_plan(parse_protocol(text, Path("solute.yaml")), probe=False)
    for platform in (PlatformChoice("Reference", {}),
                     PlatformChoice("CPU", {"Threads": "1", "DeterministicForces": "true"})):
        measuring, quiet = (walker_of(plan, 2, seed=5, platform=platform) for _ in range(2))
        for walker in (measuring, quiet):
            walker.draw_velocities(9)
        for _ in range(10):
            measuring.step(50)
            quiet.step(50)
            assert measuring.observe().solute is not None
        positions = [w.context.getState(getPositions=True).getPositions(asNumpy=True)._value for w in (measuring, quiet)]
        assert np.array_equal(*positions), platform.name


# -- a solute-tempering run on capped alanine: the ALA residue is the solute ---------------
ALANINE = """\
protocol: 1
title: capped alanine, the ALA residue tempered
system: alanine-vacuum
seed: 915
temperature: 300 K
timestep: 2 fs
friction: 5/ps
platform: {name: Reference, workers: 1}
coordinates:
  phi: {dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}
  psi: {dihedral: ["resid 1 and name N", "resid 1 and name CA", "resid 1 and name C", "resid 2 and name N"]}
solute: {atoms: "resname ALA", scales: [1, 0.8, 0.64]}
exchange: {pairs: adjacent}
run: {cycle: 0.2 ps, equilibration: 2 ps, production: PRODUCTION, checkpoint_every: 10 ps}
basins:                 # along psi, which turns in picoseconds at 300 K (phi > 0 is not reached here)
  extended: {psi: [60 deg, -120 deg]}
  helical: {psi: [-120 deg, 60 deg]}
"""


@pytest.fixture(scope="module")
def alanine_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("alanine")
    (folder / "p.yaml").write_text(ALANINE.replace("PRODUCTION", "300 ps"))
    return run_protocol(load_protocol(folder / "p.yaml"), folder / "run", progress=False)


def test_the_ledger_keeps_the_parts_and_the_analysis_rebuilds_every_reduced_potential(alanine_run):
    data = read_ledger(alanine_run)
    assert data.metadata["ledger_format"] == 3
    assert [c.solute_scale for c in data.conditions] == [1.0, 0.8, 0.64]
    # the ALA residue has neighbours (the caps): both parts are there and move
    assert np.all(np.std(data.solute_rt2, axis=1) > 1.0)
    walkers, cycles = np.meshgrid(np.arange(3), data.cycle_t, indexing="ij")
    protocol = load_protocol(alanine_run / "protocol.yaml")
    u_kn = compute_sample_reduced_potentials(data, protocol, data.conditions, walkers.ravel(), cycles.ravel())
    np.testing.assert_allclose(u_kn, data.u_krt.reshape(3, -1), rtol=1e-12, atol=0)
    # λ = 1 is the physical potential, bit for bit
    assert np.array_equal(data.u_krt[0], data.potential_rt * beta(300.0))


def test_the_analysis_reports_the_physical_condition(alanine_run):
    import pymbar

    analysis = analyse_run(alanine_run)
    assert analysis.condition_labels[1] == "condition 1 (λ = 0.8)"
    protocol, data = load_protocol(alanine_run / "protocol.yaml"), read_ledger(alanine_run, reduced=False)
    samples = select_samples(data, protocol, alanine_run, protocol.analysis.memory)
    values_n = np.concatenate([data.values_rtc[w, t] for w, t in samples.picks])
    masks = basin_masks(protocol, list(data.coordinate_names), data.periodic, values_n)
    # pymbar 4.0.3, the outside reference: expectations in state 0 (λ = 1 at 300 K) of the same u_kn
    mbar = pymbar.MBAR(samples.u_kn, samples.N_k)
    with np.errstate(divide="ignore"):       # pymbar takes the log of the indicator's zeros
        populations = [mbar.compute_expectations(masks[name].astype(float))["mu"][0] for name in analysis.basins.names]
    np.testing.assert_allclose(analysis.basins.populations, populations, rtol=1e-8, atol=1e-10)
    assert analysis.basins.names == ("extended", "helical") and 0.1 < min(populations)
    assert analysis.swaps.round_trips_r.sum() > 0


def test_neighbour_acceptance_measured_and_predicted_from_the_part_variances(alanine_run):
    # A swap of rungs a and b sees x = β [D(x_a) − D(x_b)] with D = (√λ_a − √λ_b) E_cross
    # + (λ_a − λ_b) E_inner, D drawn in each rung. Taken as normal, its mean acceptance is
    # boost.ladder_design.compute_gaussian_acceptance with β_j = 0 and D's moments (common
    # practice; tests/REFERENCES.md, "Gaussian swap acceptance").
    data = read_ledger(alanine_run)
    scales = [c.solute_scale for c in data.conditions]
    b = beta(300.0)
    for a in range(2):
        d_k = []
        for k in (a, a + 1):
            held = (data.condition_rt == k) & data.production_t[None, :]
            d_k.append((math.sqrt(scales[a]) - math.sqrt(scales[a + 1])) * data.solute_rt2[held][:, 0]
                       + (scales[a] - scales[a + 1]) * data.solute_rt2[held][:, 1])
        predicted = compute_gaussian_acceptance(b, 0.0, d_k[0].mean(), d_k[1].mean(), d_k[0].var(ddof=1),
                                                d_k[1].var(ddof=1))
        # the same without the normal model: min(1, e^x) averaged over every pair of samples
        pairs = np.minimum(1.0, np.exp(np.minimum(b * (d_k[0][:, None] - d_k[1][None, :]), 0.0))).mean()
        measured, error = measured_acceptance(data, a, a + 1)
        print(f"pair {a}-{a + 1}: measured {measured:.3f} ± {error:.3f}, predicted {predicted:.3f}, "
              f"over sample pairs {pairs:.3f}")
        # Tolerance: 4 standard errors of the measured acceptance (ratio estimator over cycles,
        # with the correlation allowance) and at most 0.05. The normal model's own bias must be
        # well inside that: D is slightly skewed here (0.2 to 0.5, seen when this test was
        # written), and the prediction moves by less than 0.02 when the model is dropped.
        assert 0.3 < predicted < 0.95 and abs(predicted - pairs) < 0.02, (a, predicted, pairs)
        assert abs(measured - predicted) < 4 * error and abs(measured - predicted) < 0.05, (a, measured, error, predicted)


def test_a_damaged_solute_part_is_found_by_its_cycle_checksum(alanine_run, tmp_path):
    folder = tmp_path / "copy"
    shutil.copytree(alanine_run, folder)
    value = read_ledger(folder).solute_rt2[1, 40, 0]
    data = bytearray((folder / "ledger.sqlite").read_bytes())
    offset = data.find(struct.pack(">d", value))       # SQLite stores a REAL as 8 big-endian bytes
    assert offset >= 0
    data[offset + 7] ^= 0x01
    (folder / "ledger.sqlite").write_bytes(bytes(data))
    with pytest.raises(LedgerDamage, match=r"cycle 40 is damaged") as caught:
        read_ledger(folder, reduced=False)
    assert caught.value.first_bad_cycle == 40


# -- (c) resume and layouts ------------------------------------------------------------------
RESUMED = ALANINE.replace("PRODUCTION", "40 ps").replace("cycle: 0.2 ps", "cycle: 0.1 ps") \
    .replace("checkpoint_every: 10 ps", "checkpoint_every: 0.5 ps, frame_every: 1 ps")


def assert_same_solute_ledger(a_folder, b_folder):
    a, b = read_ledger(a_folder), read_ledger(b_folder)
    for name in ("cycle_t", "condition_rt", "potential_rt", "solute_rt2", "values_rtc", "u_krt", "swaps"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name


@pytest.fixture(scope="module")
def resumed_reference(tmp_path_factory):
    folder = tmp_path_factory.mktemp("resumed-reference")
    (folder / "p.yaml").write_text(RESUMED)
    return run_protocol(load_protocol(folder / "p.yaml"), folder / "run", progress=False, workers=1)


def test_a_killed_solute_run_resumes_bit_for_bit(tmp_path, resumed_reference):
    # Reference platform: a checkpoint continues bit for bit (tests/REFERENCES.md, measured here)
    targets = np.random.default_rng().choice(np.arange(5, 400), size=2, replace=False)
    folder, kills = resume_after_kills(tmp_path, targets, text=RESUMED)
    assert kills == 2, f"the run finished before both kills ({targets})"
    assert_same_solute_ledger(resumed_reference, folder)
    assert_same_frames(resumed_reference, folder, 3)


def test_a_solute_run_is_the_same_whatever_the_worker_count(tmp_path, resumed_reference):
    (tmp_path / "p.yaml").write_text(RESUMED)
    two = run_protocol(load_protocol(tmp_path / "p.yaml"), tmp_path / "two", progress=False, workers=2)
    assert_same_solute_ledger(resumed_reference, two)


# -- ledgers written before solute scaling -------------------------------------------------
@pytest.fixture
def old_folder(tmp_path):
    folder = tmp_path / "old"
    shutil.copytree(DATA / "ledger-format-2", folder)
    return folder


def test_a_ledger_of_format_2_reads_with_unscaled_conditions(old_folder):
    data = read_ledger(old_folder)
    assert data.metadata["ledger_format"] == 2
    assert [c.solute_scale for c in data.conditions] == [1.0, 1.0]
    assert data.solute_rt2.shape == (2, 210, 2) and not data.solute_rt2.any()
    # the reduced potentials its writer stored are those the current formula gives, bit for bit
    walkers, cycles = np.meshgrid(np.arange(2), data.cycle_t, indexing="ij")
    protocol = load_protocol(old_folder / "protocol.yaml")
    u_kn = compute_sample_reduced_potentials(data, protocol, data.conditions, walkers.ravel(), cycles.ravel())
    assert np.array_equal(u_kn, data.u_krt.reshape(2, -1))


def test_a_ledger_of_format_2_analyses_to_the_numbers_it_gave_before(old_folder):
    before = json.loads((old_folder / "analysis-at-83cad5d.json").read_text())
    with pytest.warns(Warning):          # this short run's bootstrap warns, as it did then
        analysis = analyse_run(old_folder)
    for name, value in (("f_k", analysis.f_k), ("df_k", analysis.df_k), ("populations", analysis.basins.populations),
                        ("d_populations", analysis.basins.d_populations), ("Delta_g", analysis.basins.Delta_g)):
        np.testing.assert_allclose(value, before[name], rtol=1e-10, atol=1e-12, err_msg=name)


def test_a_ledger_of_format_2_goes_on_in_its_own_format(old_folder):
    data = read_ledger(old_folder)
    ledger = Ledger(old_folder / "ledger.sqlite", coordinate_names=data.coordinate_names)
    try:
        assert not ledger.has_solute_columns
        ledger.record_cycle(210, time=21.1, production=True, condition_r=[1, 0], potential_r=[-1.0, 2.0],
                            volume_r=[None, None], values_rc=[[0.1], [-0.1]], u_kr=[[0.5, 0.25], [0.75, 0.125]])
        with pytest.raises(ValueError, match="cannot hold solute parts"):
            ledger.record_cycle(211, time=21.2, production=True, condition_r=[0, 1], potential_r=[0.0, 0.0],
                                volume_r=[None, None], values_rc=[[0.0], [0.0]], u_kr=np.zeros((2, 2)),
                                solute_r2=[[1.0, 0.0], [0.0, 0.0]])
    finally:
        ledger.close()
    again = read_ledger(old_folder)
    assert len(again.cycle_t) == 211 and again.potential_rt[1, 210] == 2.0 and again.u_krt[1, 0, 210] == 0.75


# -- (a), slow: populations of solute tempering and of temperature exchange ----------------
@pytest.mark.slow
def test_whole_molecule_solute_tempering_gives_the_populations_of_temperature_exchange(chain_folder):
    # exact (same Boltzmann weights, tests/REFERENCES.md, "Boltzmann weights of a solute
    # ladder"): the two runs sample one ensemble at 300 K by different dynamics; their basin
    # populations agree within a few combined standard errors (block bootstrap) and 0.05.
    results = {}
    for name, ladder in (("solute", SOLUTE_LADDER), ("heated", TEMPERATURE_LADDER)):
        protocol = chain_protocol(chain_folder, ladder, production="3000 ps", name=f"{name}.yaml")
        results[name] = analyse_run(run_protocol(protocol, chain_folder / name, progress=False))
    solute, heated = results["solute"].basins, results["heated"].basins
    print("solute", solute.populations, solute.d_populations, "heated", heated.populations, heated.d_populations)
    assert solute.names == heated.names == ("trans", "gauche")
    difference = solute.populations - heated.populations
    combined = np.hypot(solute.d_populations, heated.d_populations)
    assert np.all(combined < 0.03), combined
    assert np.all(np.abs(difference) < 4 * combined) and np.all(np.abs(difference) < 0.05), (difference, combined)
