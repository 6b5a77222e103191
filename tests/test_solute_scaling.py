"""Tests for boost.solute_scaling and boost.solute_parts: solute-scaled energies from one context.

The reference for every energy is a second code path written plainly here: a deep copy
of the original System whose parameters are scaled by hand (solute charges × √λ, solute
ε × λ, exceptions and proper torsions by how many of their atoms are solute, proper
torsions found from the topology's bonds), evaluated in a freshly built context. The rule
is Wang, Friesner & Berne, J. Phys. Chem. B 115, 9431 (2011) (tests/REFERENCES.md,
"Solute scaling"); the tolerance, 1e-6 of the energy, is common practice for comparing
two evaluations of one potential in double precision (Reference platform).
"""

import copy
import math
import subprocess
import sys

import numpy as np
import openmm
import pytest
from openmm import unit

from boost import systems
from boost.exceptions import ProtocolError
from boost.conditions import Condition, compute_reduced_potentials
from boost.solute_parts import check_solute_scale, check_solute_scales, compute_solute_energies
from boost.solute_scaling import (ROOT_SHIFT, SCALE_SHIFT, build_solute_scaled_system,
                                  compute_solute_parts, set_solute_scale)
from boost.spec import Node
from boost.system_spec import read_system_spec

SCALES = (1.0, 0.8, 0.6, 0.4)
PEPTIDE = {"sequence": ["ACE", "ALA", "NME"], "phi": "-80 deg", "psi": "75 deg"}
CASES = {
    "tip3p-pme": {"water_box": {"padding": "0.5 nm"}, "nonbonded": {"method": "pme", "cutoff": "0.6 nm"}},
    "tip4pew-pme": {"water_box": {"padding": "0.5 nm", "water_model": "tip4pew"},
                    "nonbonded": {"method": "pme", "cutoff": "0.6 nm"}},
    "tip4pew-no-cutoff": {"water_box": {"padding": "0.5 nm", "water_model": "tip4pew"},
                          "nonbonded": {"method": "no_cutoff"}},
    "tip3p-reaction-field": {"water_box": {"padding": "0.5 nm"},
                             "nonbonded": {"method": "cutoff", "cutoff": "0.6 nm"}},
}


def _build(options):
    spec = {"peptide": PEPTIDE, **options}
    return systems.build_system(read_system_spec(Node(spec, "protocol.yaml", "system"), "."))


def _part_of_a_peptide():
    """Capped alanine in vacuum with only the ALA residue as solute: its 1-4 pairs and
    torsions across the boundary to the caps are solute–rest terms."""
    built = systems.build_system(read_system_spec(Node("alanine-vacuum", "protocol.yaml", "system"), "."))
    return built, [a.index for a in built.topology.atoms() if a.residue.name == "ALA"]


@pytest.fixture(scope="module")
def part_of_a_peptide():
    return _part_of_a_peptide()


@pytest.fixture(scope="module", params=sorted(CASES) + ["ala-residue-in-vacuum"])
def case(request):
    """(built system, solute indices): the capped peptide is the solute, the water the
    rest; or the ALA residue of capped alanine in vacuum, the caps the rest."""
    if request.param not in CASES:
        return _part_of_a_peptide()
    built = _build(CASES[request.param])
    solute = [a.index for a in built.topology.atoms() if a.residue.name != "HOH"]
    assert built.system.getNumConstraints() > 0  # bonds to hydrogen and rigid water
    if "tip4pew" in request.param:
        assert any(built.system.isVirtualSite(i) for i in range(built.system.getNumParticles()))
    return built, solute


# -- the plain second code path --------------------------------------------------------
def _explicitly_scaled(built, solute, scale):
    """A copy of the original System with the solute's parameters scaled by hand."""
    root, solute = math.sqrt(scale), set(solute)
    factor = {0: 1.0, 1: root, 2: scale}  # by the number of solute atoms in a pair
    bonds = {frozenset((a.index, b.index)) for a, b in built.topology.bonds()}
    system = copy.deepcopy(built.system)
    for force in system.getForces():
        if isinstance(force, openmm.NonbondedForce):
            for i in solute:
                charge, sigma, epsilon = force.getParticleParameters(i)
                force.setParticleParameters(i, charge * root, sigma, epsilon * scale)
            for k in range(force.getNumExceptions()):
                a, b, charge_product, sigma, epsilon = force.getExceptionParameters(k)
                f = factor[(a in solute) + (b in solute)]
                force.setExceptionParameters(k, a, b, charge_product * f, sigma, epsilon * f)
        elif isinstance(force, openmm.PeriodicTorsionForce):
            for k in range(force.getNumTorsions()):
                a, b, c, d, periodicity, phase, barrier = force.getTorsionParameters(k)
                inside = sum(atom in solute for atom in (a, b, c, d))
                proper = all(frozenset(pair) in bonds for pair in ((a, b), (b, c), (c, d)))
                if proper and inside:
                    f = scale if inside == 4 else root
                    force.setTorsionParameters(k, a, b, c, d, periodicity, phase, barrier * f)
    return system


def _context(system, positions):
    context = openmm.Context(system, openmm.VerletIntegrator(0.001), openmm.Platform.getPlatformByName("Reference"))
    context.setPositions(positions * unit.nanometer)
    return context


def _energy(context):
    return context.getState(getEnergy=True).getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)


def _forces(context):
    forces = context.getState(getForces=True).getForces(asNumpy=True)
    return forces.value_in_unit(unit.kilojoule_per_mole / unit.nanometer)


# -- exactness -------------------------------------------------------------------------
def test_scale_one_is_the_original_system(case):
    built, solute = case
    scaled = build_solute_scaled_system(built.system, solute)
    original = _energy(_context(built.system, built.positions))
    context = _context(scaled.system, built.positions)
    assert _energy(context) == pytest.approx(original, rel=1e-6, abs=0)
    set_solute_scale(context, 0.5)
    set_solute_scale(context, 1.0)
    assert _energy(context) == pytest.approx(original, rel=1e-6, abs=0)
    parts = compute_solute_parts(scaled, context)
    assert compute_solute_energies(parts, [1.0])[0, 0] == pytest.approx(original, rel=1e-6, abs=0)


def test_parts_give_the_energy_of_explicitly_scaled_systems(case):
    built, solute = case
    scaled = build_solute_scaled_system(built.system, solute)
    context = _context(scaled.system, built.positions)
    set_solute_scale(context, 0.6)  # the walker's own scale must not matter
    parts = compute_solute_parts(scaled, context)
    combined_k = compute_solute_energies(parts, SCALES)[:, 0]
    reference_k = np.array([_energy(_context(_explicitly_scaled(built, solute, s), built.positions))
                            for s in SCALES])
    assert np.ptp(reference_k) > 1.0  # the scale changes the energy by more than 1 kJ/mol
    np.testing.assert_allclose(combined_k, reference_k, rtol=1e-6, atol=0)


def test_part_of_a_peptide_scales_torsions_across_the_boundary(part_of_a_peptide):
    built, solute = part_of_a_peptide
    scaled = build_solute_scaled_system(built.system, solute)
    moved = [f for f in scaled.system.getForces() if isinstance(f, openmm.CustomTorsionForce)]
    inside = [moved[0].getTorsionParameters(i)[4][3] for i in range(moved[0].getNumTorsions())]
    assert 0.0 in inside and 1.0 in inside  # some torsions × √λ, some × λ


def test_forces_at_the_walker_scale_are_those_of_the_explicit_system(case):
    # MD runs at the walker's own scale: forces must be exact there (the dispersion
    # correction exerts none)
    built, solute = case
    scaled = build_solute_scaled_system(built.system, solute)
    context = _context(scaled.system, built.positions)
    set_solute_scale(context, 0.4)
    reference = _forces(_context(_explicitly_scaled(built, solute, 0.4), built.positions))
    np.testing.assert_allclose(_forces(context), reference, rtol=0, atol=1e-6 * np.abs(reference).max())


def test_the_context_keeps_the_dispersion_correction_of_scale_one():
    # OpenMM computes the dispersion correction from the default parameter values (λ = 1);
    # the parts correct for it. Should OpenMM start recomputing it, this test says so.
    built = _build(CASES["tip3p-pme"])
    solute = [a.index for a in built.topology.atoms() if a.residue.name != "HOH"]
    scaled = build_solute_scaled_system(built.system, solute)
    context = _context(scaled.system, built.positions)
    set_solute_scale(context, 0.4)
    reference = _energy(_context(_explicitly_scaled(built, solute, 0.4), built.positions))
    tail = np.array(scaled.tail_coefficients)
    volume = float(np.prod(built.box_vectors.diagonal()))
    expected_gap = (tail @ [1.0, math.sqrt(0.4), 0.4] - tail.sum()) / volume
    assert abs(expected_gap) > 0.1  # kJ/mol
    assert _energy(context) - reference == pytest.approx(-expected_gap, rel=1e-6)


def test_parts_leave_the_context_as_they_found_it(case):
    built, solute = case
    scaled = build_solute_scaled_system(built.system, solute)
    context = _context(scaled.system, built.positions)
    set_solute_scale(context, 0.7)
    before = (context.getParameter(ROOT_SHIFT), context.getParameter(SCALE_SHIFT), _energy(context))
    compute_solute_parts(scaled, context)
    assert (context.getParameter(ROOT_SHIFT), context.getParameter(SCALE_SHIFT), _energy(context)) == before


def test_reduced_potentials_of_two_configurations(part_of_a_peptide):
    built, solute = part_of_a_peptide
    scaled = build_solute_scaled_system(built.system, solute)
    context = _context(scaled.system, built.positions)
    moved = built.positions + np.random.default_rng(3).normal(0.0, 0.005, built.positions.shape)
    parts_r3 = [compute_solute_parts(scaled, context)]
    context.setPositions(moved * unit.nanometer)
    parts_r3.append(compute_solute_parts(scaled, context))
    # the run's one mechanism: the physical potential and the two scaled parts, per condition
    conditions = [Condition(k, 310.0, solute_scale=s) for k, s in enumerate(SCALES)]
    parts_r3 = np.array(parts_r3)
    u_kr = compute_reduced_potentials(conditions, parts_r3.sum(axis=1), np.zeros((2, 0)), [],
                                      solute_r2=parts_r3[:, 1:])
    # 1/kT from OpenMM's own gas constant (CODATA; common practice)
    kt = (unit.MOLAR_GAS_CONSTANT_R * 310.0 * unit.kelvin).value_in_unit(unit.kilojoule_per_mole)
    for r, positions in enumerate((built.positions, moved)):
        for k, s in enumerate(SCALES):
            energy = _energy(_context(_explicitly_scaled(built, solute, s), positions))
            assert u_kr[k, r] == pytest.approx(energy / kt, rel=1e-6)


def test_solute_parts_imports_no_openmm():
    code = "import sys, boost.solute_parts; assert 'openmm' not in sys.modules"
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=False)
    assert done.returncode == 0, done.stderr


# -- bad input -------------------------------------------------------------------------
def _one_line_error(function, *args, match, **kwargs):
    with pytest.raises(ProtocolError, match=match) as caught:
        function(*args, **kwargs)
    assert "\n" not in str(caught.value)


@pytest.mark.parametrize("scale", [0.0, -0.1, 1.5, float("nan"), float("inf"), "half", None])
def test_a_scale_outside_zero_to_one_is_refused(scale):
    _one_line_error(check_solute_scale, scale, place="protocol.yaml: sampling.solute.scales[2]",
                    match=r"protocol\.yaml: sampling\.solute\.scales\[2\] must be")
    _one_line_error(check_solute_scales, [1.0, scale], match=r"solute scales\[1\]")
    _one_line_error(compute_solute_energies, np.zeros((1, 3)), [1.0, scale], match=r"\(0, 1\]")


def test_set_solute_scale_refuses_before_touching_the_context(part_of_a_peptide):
    built, solute = part_of_a_peptide
    scaled = build_solute_scaled_system(built.system, solute)
    context = _context(scaled.system, built.positions)
    _one_line_error(set_solute_scale, context, 0.0, match=r"\(0, 1\]")
    assert context.getParameter(ROOT_SHIFT) == 0.0


def test_an_empty_or_whole_system_solute_is_refused(part_of_a_peptide):
    built, _ = part_of_a_peptide
    everything = range(built.system.getNumParticles())
    _one_line_error(build_solute_scaled_system, built.system, [], place="protocol.yaml: sampling.solute",
                    match=r"^protocol\.yaml: sampling\.solute selects no atoms")
    _one_line_error(build_solute_scaled_system, built.system, everything, match=r"selects all 22 particles")
    _one_line_error(build_solute_scaled_system, built.system, [0, 22], match=r"index 22 is out of range")
    _one_line_error(build_solute_scaled_system, built.system, "CA", match=r"list of particle indices")


def test_a_virtual_site_split_from_its_atoms_is_refused():
    built = _build(CASES["tip4pew-no-cutoff"])
    water = [a.index for a in next(r for r in built.topology.residues() if r.name == "HOH").atoms()]
    site = next(i for i in water if built.system.isVirtualSite(i))
    without_site = [i for i in water if i != site]
    _one_line_error(build_solute_scaled_system, built.system, without_site, match=rf"virtual site {site}")
    build_solute_scaled_system(built.system, water)  # the whole water molecule is fine


def _with_force(built, force):
    system = copy.deepcopy(built.system)
    system.addForce(force)
    return system


def test_forces_it_cannot_scale_are_named(part_of_a_peptide):
    built, solute = part_of_a_peptide
    n = built.system.getNumParticles()
    custom = openmm.CustomNonbondedForce("0")
    for _ in range(n):
        custom.addParticle([])
    cmap = openmm.CMAPTorsionForce()
    cmap.addMap(2, [0.0] * 4)
    cmap.addTorsion(0, *solute[:4], *solute[1:5])
    for force, name in ((custom, "CustomNonbondedForce"), (cmap, "CMAPTorsionForce")):
        _one_line_error(build_solute_scaled_system, _with_force(built, force), solute, match=name)
    outside = openmm.CustomExternalForce("x")
    outside.addParticle(0, [])  # atom 0 is in the ACE cap, outside the solute: accepted
    assert 0 not in solute
    build_solute_scaled_system(_with_force(built, outside), solute)
    inside = openmm.CustomExternalForce("x")
    inside.addParticle(solute[0], [])
    _one_line_error(build_solute_scaled_system, _with_force(built, inside), solute, match="CustomExternalForce")


def test_implicit_solvent_and_lj_pme_are_refused():
    obc2 = systems.build_system(read_system_spec(Node("alanine-obc2", "protocol.yaml", "system"), "."))
    forces = {type(f).__name__ for f in obc2.system.getForces()}
    named = next(n for n in ("GBSAOBCForce", "CustomGBForce") if n in forces)
    _one_line_error(build_solute_scaled_system, obc2.system, [8, 9, 10], match=named)
    built = _build(CASES["tip3p-pme"])
    system = copy.deepcopy(built.system)
    next(f for f in system.getForces() if isinstance(f, openmm.NonbondedForce)).setNonbondedMethod(
        openmm.NonbondedForce.LJPME)
    _one_line_error(build_solute_scaled_system, system, [0, 1], match="LJPME")
