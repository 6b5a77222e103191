"""Solute scaling on an OpenMM System: one context holds every solute scale λ.

:func:`build_solute_scaled_system` copies a System and ties its solute terms to two
context parameters, so that a walker's context runs at any λ in (0, 1] without being
rebuilt (:func:`set_solute_scale`), and :func:`compute_solute_parts` measures the three
parts (E0, E1, E2) of :mod:`boost.solute_parts` for the configuration in the context.
With s = √λ (Wang, Friesner & Berne 2011; doi:10.1021/jp204407d):

- solute particles: charge × s and Lennard-Jones ε × λ. NonbondedForce combines ε as
  √(ε_i ε_j), so solute–rest Lennard-Jones pairs follow with √λ; Coulomb pairs, Ewald/PME
  reciprocal space, self energy and the reaction field are bilinear in the charges, so
  every nonbonded term is exactly a quadratic in s;
- exceptions (1-4 pairs): both atoms in the solute, charge product and ε × λ; one atom
  in the solute, × s;
- proper torsions (consecutive atoms bonded): all four atoms in the solute × λ; some but
  not all × s, the rule of the nonbonded solute–rest terms (our choice: Wang et al. take
  a whole molecule as the solute, where such torsions do not arise). Impropers, bonds
  and angles are left unscaled (common practice in solute tempering, from memory): they
  hold the geometry and are not what keeps barriers high.

The rest (solvent, virtual sites of TIP4P-style waters, constraints) is untouched, and
at λ = 1 the copy is the original system: both parameters are shifts that are zero there.

Two limits of OpenMM, handled here:

- NonbondedForce has no energy derivatives with respect to its parameters (OpenMM
  8.6), so the parts come from energies at three values of s, an exact quadratic fit;
- OpenMM computes the long-range dispersion correction (E = C / V) once, from the
  parameters at their default values, i.e. at λ = 1 whatever λ the context holds. The
  parts add the exact difference C(λ) − C(1), with C(λ) = C0 + s C1 + s² C2 measured
  by OpenMM itself when the system is scaled. Molecular dynamics at constant volume is
  exact (the correction exerts no force); a barostat at λ < 1 sees the λ = 1 correction.

Everything else acting on solute atoms is refused with a one-line error naming the
force: CustomNonbondedForce, implicit solvent, CMAP and Ryckaert–Bellemans torsions,
custom bonded forces on the solute, LJPME.
"""

import math
from dataclasses import dataclass

import numpy as np
import openmm
from openmm import unit

from .exceptions import ProtocolError
from .solute_parts import check_solute_scale

#: Context parameters, both zero at the physical potential (λ = 1): s − 1 with s = √λ
#: (solute charges, solute–rest exceptions and torsions) and λ − 1 (solute ε,
#: solute–solute exceptions and torsions).
ROOT_SHIFT = "solute_root_shift"
SCALE_SHIFT = "solute_scale_shift"

#: The values of s = √λ at which compute_solute_parts evaluates the energy.
PART_NODES = (0.0, 0.5, 1.0)
_POWERS = np.vander(PART_NODES, 3, increasing=True)  # row j: 1, s_j, s_j²

#: Forces that may act on solute atoms and stay unscaled; they hold the geometry or no energy.
_UNSCALED = (openmm.HarmonicBondForce, openmm.HarmonicAngleForce, openmm.CMMotionRemover,
             openmm.MonteCarloBarostat, openmm.MonteCarloAnisotropicBarostat,
             openmm.MonteCarloMembraneBarostat, openmm.MonteCarloFlexibleBarostat,
             openmm.AndersenThermostat)
_TORSION_EXPRESSION = (f"(1 + select(inside, {SCALE_SHIFT}, {ROOT_SHIFT}))"
                       " * k * (1 + cos(periodicity * theta - phase))")
_TAIL_METHODS = (openmm.NonbondedForce.CutoffPeriodic, openmm.NonbondedForce.Ewald,
                 openmm.NonbondedForce.PME)


@dataclass(frozen=True)
class SoluteScaledSystem:
    """A System whose solute terms follow the solute scale λ (context parameters).

    Attributes
    ----------
    system : openmm.System
        A scaled copy; at its default parameters (λ = 1) it is the original system.
    solute : tuple of int
        The solute's particle indices, sorted.
    tail_coefficients : tuple of 3 float, in kJ/mol nm³
        (C0, C1, C2): the dispersion correction of condition λ is (C0 + s C1 + s² C2) / V;
        zeros when the system has none.
    nonbonded_group : int
        Force group of the NonbondedForce (where the dispersion correction is counted).

    A run's walkers get a copy with ``system`` None (their System travels as XML):
    :func:`compute_solute_parts` reads only the other fields.
    """

    system: openmm.System
    solute: tuple
    tail_coefficients: tuple
    nonbonded_group: int


# -- building ---------------------------------------------------------------------------
def build_solute_scaled_system(system, solute_atoms, *, place="solute", whole_system=False):
    """Copy ``system`` with its solute terms tied to the solute scale (module docstring).

    Parameters
    ----------
    system : openmm.System
        Left unchanged.
    solute_atoms : sequence of int
        0-based particle indices of the solute; atoms outside it (solvent) must exist
        unless ``whole_system``.
    place : str
        Where the selection was written (file and key path), to begin error messages.
    whole_system : bool
        Accept every particle as the solute: a molecule in vacuum, where solute scaling
        scales its torsions and nonbonded terms (not its bonds, angles and impropers).

    Returns
    -------
    SoluteScaledSystem

    Raises
    ------
    ProtocolError
        One line: an empty, out-of-range or whole-system selection, a virtual site split
        from its parent atoms, or a force the scaling cannot handle (named).
    """
    solute = _check_selection(system, solute_atoms, place, whole_system)
    _check_forces(system, solute, place)
    scaled = openmm.XmlSerializer.clone(system)
    nonbonded = _the_nonbonded_force(scaled, place)
    _scale_nonbonded(nonbonded, solute)
    bonded = _bonded_pairs(scaled)
    for force in list(scaled.getForces()):
        if isinstance(force, openmm.PeriodicTorsionForce):
            _scale_torsions(scaled, force, solute, bonded)
    return SoluteScaledSystem(system=scaled, solute=tuple(sorted(solute)),
                              tail_coefficients=_tail_coefficients(system, nonbonded, solute),
                              nonbonded_group=nonbonded.getForceGroup())


def _check_selection(system, solute_atoms, place, whole_system):
    n_particles = system.getNumParticles()
    try:
        atoms = [int(i) for i in solute_atoms]
    except (TypeError, ValueError):
        raise ProtocolError(f"{place} must be a list of particle indices; got {solute_atoms!r}.") from None
    if not atoms:
        raise ProtocolError(f"{place} selects no atoms; solute scaling needs at least one solute atom.")
    bad = [i for i in atoms if not 0 <= i < n_particles]
    if bad:
        raise ProtocolError(f"{place}: particle index {bad[0]} is out of range for a system of "
                            f"{n_particles} particles.")
    solute = set(atoms)
    if len(solute) == n_particles and not whole_system:
        raise ProtocolError(f"{place} selects all {n_particles} particles of the system; solute scaling "
                            "needs atoms outside the solute (solvent). Select the solute only.")
    for i in range(n_particles):
        if system.isVirtualSite(i):
            site = system.getVirtualSite(i)
            parents = {site.getParticle(j) for j in range(site.getNumParticles())}
            if any((p in solute) != (i in solute) for p in parents):
                raise ProtocolError(f"{place}: virtual site {i} and its parent particles "
                                    f"{sorted(parents)} must be all in the solute or all outside it.")
    return solute


# -- which forces may act on the solute ---------------------------------------------------
def _check_forces(system, solute, place):
    for index, force in enumerate(system.getForces()):
        if isinstance(force, openmm.NonbondedForce):
            _check_nonbonded(force, index, place)
        elif isinstance(force, (openmm.PeriodicTorsionForce,) + _UNSCALED):
            continue
        else:
            atoms = _atoms_of(force)
            if atoms is None or atoms & solute:
                raise ProtocolError(
                    f"{place}: the system's force {index} ({type(force).__name__}) acts on solute atoms, "
                    "and solute scaling cannot scale it exactly. Remove it or choose another solute.")


def _check_nonbonded(force, index, place):
    name = f"the system's force {index} (NonbondedForce)"
    if force.getNonbondedMethod() == openmm.NonbondedForce.LJPME:
        raise ProtocolError(f"{place}: {name} uses LJPME, which solute scaling does not handle; "
                            "use PME, a cutoff or no cutoff.")
    if force.getNumGlobalParameters() or force.getNumParticleParameterOffsets() or \
            force.getNumExceptionParameterOffsets():
        raise ProtocolError(f"{place}: {name} already has global parameters or parameter offsets, "
                            "which solute scaling would have to combine with its own.")


def _the_nonbonded_force(system, place):
    found = [f for f in system.getForces() if isinstance(f, openmm.NonbondedForce)]
    if len(found) != 1:
        raise ProtocolError(f"{place}: solute scaling needs exactly one NonbondedForce in the system; "
                            f"it has {len(found)}.")
    return found[0]


def _atoms_of(force):
    """The particles a bonded or external force acts on, or None for one that may act on any."""
    if isinstance(force, (openmm.RBTorsionForce, openmm.CMAPTorsionForce)):
        if isinstance(force, openmm.CMAPTorsionForce):
            terms = (force.getTorsionParameters(i)[1:9] for i in range(force.getNumTorsions()))
        else:
            terms = (force.getTorsionParameters(i)[:4] for i in range(force.getNumTorsions()))
        return {int(a) for term in terms for a in term}
    counted = {openmm.CustomBondForce: ("getNumBonds", "getBondParameters", 2),
               openmm.CustomAngleForce: ("getNumAngles", "getAngleParameters", 3),
               openmm.CustomTorsionForce: ("getNumTorsions", "getTorsionParameters", 4),
               openmm.CustomExternalForce: ("getNumParticles", "getParticleParameters", 1)}
    for kind, (count, get, width) in counted.items():
        if isinstance(force, kind):
            return {int(a) for i in range(getattr(force, count)()) for a in getattr(force, get)(i)[:width]}
    if isinstance(force, openmm.CustomCompoundBondForce):
        return {int(a) for i in range(force.getNumBonds()) for a in force.getBondParameters(i)[0]}
    if isinstance(force, openmm.CustomCentroidBondForce):
        return {int(a) for g in range(force.getNumGroups()) for a in force.getGroupParameters(g)[0]}
    return None


# -- the scaling ------------------------------------------------------------------------
def _md(value):
    """A float in OpenMM's MD units from a Quantity (or a float already)."""
    return value.value_in_unit_system(unit.md_unit_system) if unit.is_quantity(value) else float(value)


def _scale_nonbonded(force, solute):
    """Charge offsets (s − 1) q and ε offsets (λ − 1) ε; exceptions by how many ends are solute."""
    force.addGlobalParameter(ROOT_SHIFT, 0.0)
    force.addGlobalParameter(SCALE_SHIFT, 0.0)
    for i in sorted(solute):
        charge, _, epsilon = (_md(v) for v in force.getParticleParameters(i))
        if charge != 0.0:
            force.addParticleParameterOffset(ROOT_SHIFT, i, charge, 0.0, 0.0)
        if epsilon != 0.0:
            force.addParticleParameterOffset(SCALE_SHIFT, i, 0.0, 0.0, epsilon)
    for index in range(force.getNumExceptions()):
        a, b, charge_product, _, epsilon = force.getExceptionParameters(index)
        inside = (a in solute) + (b in solute)
        charge_product, epsilon = _md(charge_product), _md(epsilon)
        if inside and (charge_product != 0.0 or epsilon != 0.0):
            shift = SCALE_SHIFT if inside == 2 else ROOT_SHIFT
            force.addExceptionParameterOffset(shift, index, charge_product, 0.0, epsilon)


def _bonded_pairs(system):
    """Pairs of particles joined by a harmonic bond or a constraint, as frozensets."""
    pairs = {frozenset(system.getConstraintParameters(i)[:2]) for i in range(system.getNumConstraints())}
    for force in system.getForces():
        if isinstance(force, openmm.HarmonicBondForce):
            pairs.update(frozenset(force.getBondParameters(i)[:2]) for i in range(force.getNumBonds()))
    return pairs


def _scale_torsions(system, force, solute, bonded):
    """Move the proper torsions touching the solute to a CustomTorsionForce that scales them."""
    moved = openmm.CustomTorsionForce(_TORSION_EXPRESSION)
    for name in ("periodicity", "phase", "k", "inside"):
        moved.addPerTorsionParameter(name)
    moved.addGlobalParameter(ROOT_SHIFT, 0.0)
    moved.addGlobalParameter(SCALE_SHIFT, 0.0)
    for index in range(force.getNumTorsions()):
        a, b, c, d, periodicity, phase, k = force.getTorsionParameters(index)
        inside = sum(atom in solute for atom in (a, b, c, d))
        proper = all(frozenset(pair) in bonded for pair in ((a, b), (b, c), (c, d)))
        if inside and proper:
            moved.addTorsion(a, b, c, d, [periodicity, _md(phase), _md(k), float(inside == 4)])
            force.setTorsionParameters(index, a, b, c, d, periodicity, phase, 0.0)
    if moved.getNumTorsions():
        moved.setForceGroup(force.getForceGroup())
        moved.setUsesPeriodicBoundaryConditions(force.usesPeriodicBoundaryConditions())
        system.addForce(moved)


def _tail_coefficients(system, force, solute):
    """(C0, C1, C2) in kJ/mol nm³ of the dispersion correction C(s) / V, measured by OpenMM."""
    if force.getNonbondedMethod() not in _TAIL_METHODS or not force.getUseDispersionCorrection():
        return (0.0, 0.0, 0.0)
    c_j = [_tail_coefficient(system, force, solute, s) for s in PART_NODES]
    return tuple(float(c) for c in np.linalg.solve(_POWERS, c_j))


def _tail_coefficient(system, force, solute, root):
    """C of the dispersion correction with solute ε × root², by OpenMM on a sparse lattice.

    The particles sit on a cubic lattice wider than the cutoff, so no pair interacts and
    the energy is the correction C / V alone.
    """
    n_particles = system.getNumParticles()
    cutoff = _md(force.getCutoffDistance())
    per_side = max(3, math.ceil(n_particles ** (1 / 3)))
    spacing = 1.01 * cutoff
    lattice = openmm.System()
    copy = openmm.NonbondedForce()
    copy.setNonbondedMethod(openmm.NonbondedForce.CutoffPeriodic)
    copy.setCutoffDistance(cutoff)
    copy.setUseSwitchingFunction(force.getUseSwitchingFunction())
    copy.setSwitchingDistance(force.getSwitchingDistance())
    copy.setUseDispersionCorrection(True)
    for i in range(n_particles):
        lattice.addParticle(1.0)
        _, sigma, epsilon = (_md(v) for v in force.getParticleParameters(i))
        copy.addParticle(0.0, sigma, epsilon * root**2 if i in solute else epsilon)
    lattice.addForce(copy)
    side = per_side * spacing
    lattice.setDefaultPeriodicBoxVectors(*(openmm.Vec3(*(side * np.eye(3)[k])) for k in range(3)))
    grid = np.indices((per_side,) * 3).reshape(3, -1).T[:n_particles] * spacing
    context = openmm.Context(lattice, openmm.VerletIntegrator(0.001),
                             openmm.Platform.getPlatformByName("Reference"))
    context.setPositions(grid)
    energy = context.getState(getEnergy=True).getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
    return energy * side**3


# -- contexts ---------------------------------------------------------------------------
def set_solute_scale(context, scale, *, place="solute scale"):
    """Put a context of a solute-scaled system at solute scale ``scale`` (λ in (0, 1])."""
    scale = check_solute_scale(scale, place=place)
    _set_root(context, math.sqrt(scale))


def _set_root(context, root):
    context.setParameter(ROOT_SHIFT, root - 1.0)
    context.setParameter(SCALE_SHIFT, root * root - 1.0)


def compute_solute_parts(scaled, context, *, groups=None):
    """The parts (E0, E1, E2) of the configuration in ``context``, in kJ/mol.

    U(λ) = E0 + √λ E1 + λ E2 in every condition λ: the energy of the forces in ``groups``
    at s = 0, ½ and 1, fitted exactly by the quadratic, plus the dispersion correction's
    dependence on λ (module docstring). The context's parameters are restored afterwards,
    bit for bit, so that it runs on at its walker's own λ.

    Parameters
    ----------
    scaled : SoluteScaledSystem
        The system the context was made from.
    context : openmm.Context
    groups : set of int, optional
        Force groups to count (default: all).

    Returns
    -------
    ndarray, shape (3,), in kJ/mol
    """
    groups = set(range(32)) if groups is None else set(groups)
    shifts = {name: context.getParameter(name) for name in (ROOT_SHIFT, SCALE_SHIFT)}
    energy_j = np.empty(len(PART_NODES))
    try:
        for j, root in enumerate(PART_NODES):
            _set_root(context, root)
            state = context.getState(getEnergy=True, groups=groups)
            energy_j[j] = state.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
    finally:
        for name, value in shifts.items():
            context.setParameter(name, value)
    parts = np.linalg.solve(_POWERS, energy_j)
    tail = np.asarray(scaled.tail_coefficients)
    if tail.any() and scaled.nonbonded_group in groups:
        # the context counts C(1) / V at every s; replace it by C(s) / V
        volume = state.getPeriodicBoxVolume().value_in_unit(unit.nanometer**3)
        parts += (tail - np.array([tail.sum(), 0.0, 0.0])) / volume
    return parts
