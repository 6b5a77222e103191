"""Collective coordinates ξ(x), as OpenMM forces and as numpy values on frames.

Every coordinate exists twice: as OpenMM forces whose energy *is* the coordinate value
(so a bias on it is one ``CustomCVForce``), and as numpy values on frames (for analysis
and for the reduced potentials of bias windows every cycle). The two agree to rounding.

A coordinate is built from points; each point is the mass-weighted centre of a group of
0-based atom indices (a one-atom group is the atom itself, whatever its mass), taken on
the raw, unwrapped positions. Lengths are in nm, angles in radians.

With a box, the displacement between two points follows OpenMM's rule for boxes in
reduced (triclinic) form ``a = (ax, 0, 0)``, ``b = (bx, by, 0)``, ``c = (cx, cy, cz)``:
subtract ``c`` to bring ``dz`` within half a box, then ``b`` for ``dy``, then ``a`` for
``dx``. OpenMM relies on this rule for its cutoffs, which may not exceed half the
smallest box width; for points farther apart it may differ from the true minimum image,
but it is still exactly what OpenMM computes, which is what a bias needs.
"""

import math
from dataclasses import dataclass

import numpy as np
import openmm

from .exceptions import ProtocolError

#: Number of points each kind of coordinate is built from.
POINTS_PER_KIND = {"distance": 2, "angle": 3, "dihedral": 4, "position": 1}
KINDS = (*POINTS_PER_KIND, "combination")

_CENTROID_EXPRESSIONS = {
    "distance": "distance(g1,g2)",
    "angle": "angle(g1,g2,g3)",
    "dihedral": "dihedral(g1,g2,g3,g4)",
}


@dataclass(frozen=True)
class Coordinate:
    """A collective coordinate.

    Attributes
    ----------
    name : str
        Identifier ``[A-Za-z_][A-Za-z0-9_]*`` (checked by the protocol reader).
    kind : str
        'distance', 'angle', 'dihedral', 'position' or 'combination'.
    groups : tuple of tuple of int
        The points, each a group of 0-based atom indices: 2 for a distance, 3 for an
        angle (vertex in the middle), 4 for a dihedral, 1 for a position.
    axis : int or None
        For a position: 0, 1, 2 for x, y, z.
    terms : tuple of (float, Coordinate)
        For a combination: ξ = Σ coefficient * term; terms are not combinations and all
        share one unit.
    """

    name: str
    kind: str
    groups: tuple[tuple[int, ...], ...] = ()
    axis: int | None = None
    terms: tuple[tuple[float, "Coordinate"], ...] = ()

    def __post_init__(self):
        if self.kind not in KINDS:
            self._fail(f"kind must be one of {', '.join(KINDS)}; got {self.kind!r}")
        groups = tuple(tuple(int(i) for i in group) for group in self.groups)
        terms = tuple((float(c), term) for c, term in self.terms)
        object.__setattr__(self, "groups", groups)
        object.__setattr__(self, "terms", terms)
        if self.kind == "combination":
            self._check_terms()
        else:
            self._check_groups()

    def _fail(self, what):
        raise ProtocolError(f"coordinate {self.name!r}: {what}.")

    def _check_groups(self):
        expected = POINTS_PER_KIND[self.kind]
        if len(self.groups) != expected:
            self._fail(f"a {self.kind} needs {expected} atom groups; got {len(self.groups)}")
        if any(len(group) == 0 for group in self.groups):
            self._fail("every atom group needs at least one atom; got an empty group")
        if any(i < 0 for group in self.groups for i in group):
            self._fail("atom indices are 0-based and cannot be negative")
        if self.terms:
            self._fail(f"a {self.kind} takes no terms")
        if self.kind == "position" and self.axis not in (0, 1, 2):
            self._fail(f"a position needs axis 0, 1 or 2 (x, y, z); got {self.axis!r}")
        if self.kind != "position" and self.axis is not None:
            self._fail(f"only a position takes an axis; a {self.kind} got axis {self.axis!r}")

    def _check_terms(self):
        if not self.terms:
            self._fail("a combination needs at least one term")
        if self.groups or self.axis is not None:
            self._fail("a combination takes terms, not groups or an axis")
        for coefficient, term in self.terms:
            if not isinstance(term, Coordinate) or term.kind == "combination":
                self._fail("each term of a combination must be a coordinate that is not a combination")
            if not math.isfinite(coefficient):
                self._fail(f"coefficients must be finite; got {coefficient!r}")
        units = sorted({term.unit for _, term in self.terms})
        if len(units) > 1:
            self._fail(f"all terms of a combination must share one unit; got {' and '.join(units)}")

    @property
    def periodic(self):
        """True for a dihedral (period 2π, values in (-π, π]); False otherwise."""
        return self.kind == "dihedral"

    @property
    def unit(self):
        """'nm' for distances and positions, 'rad' for angles and dihedrals."""
        if self.kind == "combination":
            return self.terms[0][1].unit
        return "rad" if self.kind in ("angle", "dihedral") else "nm"


# ---------------------------------------------------------------------------- numpy
# Every cycle each host computes its walkers' coordinates, so a set of coordinates is
# prepared once (CoordinateSet) and then costs a few dozen numpy calls on all frames
# whatever its size: one gather for every point, one vectorised pass per kind of leaf,
# one product for combinations. Small hand-written vector helpers: np.cross and
# np.linalg.norm cost tens of microseconds on small arrays.


def _as_frames(xyz):
    xyz = np.asarray(xyz, dtype=float)
    if xyz.ndim == 2:
        xyz = xyz[np.newaxis]
    if xyz.ndim != 3 or xyz.shape[2] != 3:
        raise ValueError(f"xyz must be shape (n_frames, n_atoms, 3) or (n_atoms, 3); got {xyz.shape}")
    return xyz


def _as_boxes(box_vectors, n_frames):
    """None, ('diagonal', lengths (n_frames, 1, 3)) or ('rows', [(k, row (n_frames, 1, 3),
    length (n_frames, 1)) for c, b, a]): shaped to broadcast over (n_frames, n_leaves, 3)."""
    if box_vectors is None:
        return None
    boxes = np.asarray(box_vectors, dtype=float)
    if boxes.shape == (3, 3):
        boxes = boxes[np.newaxis]
    elif boxes.shape != (n_frames, 3, 3):
        raise ValueError(f"box_vectors must be shape (3, 3) or ({n_frames}, 3, 3); got {boxes.shape}")
    if not (boxes[:, 1, 0].any() or boxes[:, 2, :2].any()):
        return "diagonal", boxes.diagonal(axis1=1, axis2=2)[:, np.newaxis]
    return "rows", [(k, boxes[:, np.newaxis, k], boxes[:, k, k, np.newaxis]) for k in (2, 1, 0)]


def _dot(a, b):
    return (a * b).sum(axis=-1)


_YZX, _ZXY = np.array([1, 2, 0]), np.array([2, 0, 1])     # made once: a list index is converted every call


def _cross(a, b):
    return a[..., _YZX] * b[..., _ZXY] - a[..., _ZXY] * b[..., _YZX]


def _displacement(start, end, boxes):
    """end - start, shape (n_frames, n_leaves, 3), reduced the way OpenMM reduces it."""
    delta = end - start
    if boxes is None:
        return delta
    form, data = boxes
    if form == "diagonal":  # the three reductions are then independent
        return delta - np.floor(delta / data + 0.5) * data
    for k, row, length in data:  # c first, then b, then a
        delta = delta - np.floor(delta[..., k] / length + 0.5)[..., np.newaxis] * row
    return delta


def _distances(points, boxes):
    delta = _displacement(points[0], points[1], boxes)
    return np.sqrt(_dot(delta, delta))


def _angles(points, boxes):
    first = _displacement(points[1], points[0], boxes)
    second = _displacement(points[1], points[2], boxes)
    normal = _cross(first, second)
    return np.arctan2(np.sqrt(_dot(normal, normal)), _dot(first, second))


def _dihedrals(points, boxes):
    b1 = _displacement(points[0], points[1], boxes)
    b2 = _displacement(points[1], points[2], boxes)
    b3 = _displacement(points[2], points[3], boxes)
    n2 = _cross(b2, b3)
    y = np.sqrt(_dot(b2, b2)) * _dot(b1, n2)
    values = np.arctan2(y, _dot(_cross(b1, b2), n2))
    values[values == -np.pi] = np.pi  # the range is (-π, π]
    return values


_LEAF_VALUES = {"distance": _distances, "angle": _angles, "dihedral": _dihedrals}


class CoordinateSet:
    """Coordinates prepared for evaluation on frames, all at once.

    Parameters
    ----------
    coordinates : sequence of Coordinate
    masses : array_like, shape (n_atoms,), in amu (weights of the atom groups' centres)
    """

    def __init__(self, coordinates, masses):
        self.coordinates = tuple(coordinates)
        masses = np.asarray(masses, dtype=float)
        leaves = [term for c in self.coordinates for term in ([c] if c.kind != "combination" else
                                                               [t for _, t in c.terms])]
        groups = [group for leaf in leaves for group in leaf.groups]
        # a point is Σ weight·x over its group / its total weight; a one-atom group is its atom
        self._atoms = np.array([i for group in groups for i in group], dtype=np.intp)
        self._weights = np.array([1.0 if len(g) == 1 else masses[i] for g in groups for i in g])[:, np.newaxis]
        self._starts = np.cumsum([0] + [len(g) for g in groups[:-1]], dtype=np.intp)
        self._totals = np.array([1.0 if len(g) == 1 else masses[list(g)].sum() for g in groups])[:, np.newaxis]
        first_point = np.cumsum([0] + [len(leaf.groups) for leaf in leaves[:-1]], dtype=np.intp)
        self._kinds = []    # (leaf columns, value function (None: position), point indices (n_points, n_leaves), axes)
        for kind in POINTS_PER_KIND:
            columns = [n for n, leaf in enumerate(leaves) if leaf.kind == kind]
            if columns:
                points = first_point[columns] + np.arange(POINTS_PER_KIND[kind])[:, np.newaxis]
                axes = np.array([leaves[n].axis for n in columns]) if kind == "position" else None
                self._kinds.append((np.array(columns), _LEAF_VALUES.get(kind), points, axes))
        self._n_leaves = len(leaves)
        # coordinate = Σ coefficient · leaf: the identity column for a leaf coordinate
        self._combine = np.zeros((len(leaves), len(self.coordinates)))
        row = 0
        for column, c in enumerate(self.coordinates):
            for coefficient, _ in (c.terms if c.kind == "combination" else [(1.0, c)]):
                self._combine[row, column] = coefficient
                row += 1
        self._plain = all(c.kind != "combination" for c in self.coordinates)

    def values(self, xyz, box_vectors=None):
        """Values on frames: ndarray (n_frames, n_coordinates), each column in its coordinate's
        unit (arguments as :func:`compute_coordinate_values`)."""
        xyz = _as_frames(xyz)
        n_frames = xyz.shape[0]
        if not self.coordinates:
            return np.empty((n_frames, 0))
        boxes = _as_boxes(box_vectors, n_frames)
        centres = np.add.reduceat(xyz[:, self._atoms] * self._weights, self._starts, axis=1) / self._totals
        leaves = np.empty((n_frames, self._n_leaves))
        for columns, leaf_values, points, axes in self._kinds:
            if leaf_values is None:      # positions: raw, never wrapped
                leaves[:, columns] = centres[:, points[0], axes]
            else:
                leaves[:, columns] = leaf_values(np.moveaxis(centres[:, points], 1, 0), boxes)
        return leaves if self._plain else leaves @ self._combine


def compute_coordinate_values(coordinate, xyz, masses, box_vectors=None):
    """Values of one coordinate on frames.

    Parameters
    ----------
    coordinate : Coordinate
    xyz : ndarray, shape (n_frames, n_atoms, 3) or (n_atoms, 3), in nm
        Raw (unwrapped) positions; a 2-D array is one frame.
    masses : ndarray, shape (n_atoms,), in amu
    box_vectors : ndarray, shape (3, 3) or (n_frames, 3, 3), in nm, optional
        Periodic box in OpenMM's reduced form (rows are a, b, c); None for no box.

    Returns
    -------
    ndarray, shape (n_frames,), in nm or rad (see ``coordinate.unit``)
        Dihedrals lie in (-π, π], angles in [0, π]; positions are raw, never wrapped.
    """
    return CoordinateSet([coordinate], masses).values(xyz, box_vectors)[:, 0]


def compute_coordinate_values_many(coordinates, xyz, masses, box_vectors=None):
    """Values of several coordinates on frames (arguments as :func:`compute_coordinate_values`).

    Returns
    -------
    ndarray, shape (n_frames, n_coordinates), each column in its coordinate's unit
    """
    return CoordinateSet(coordinates, masses).values(xyz, box_vectors)


# --------------------------------------------------------------------------- OpenMM


def _check_atoms(coordinate, system):
    n_particles = system.getNumParticles()
    for group in coordinate.groups:
        for i in group:
            if i >= n_particles:
                raise ProtocolError(f"coordinate {coordinate.name!r}: atom index {i} is out of range "
                                    f"for a system of {n_particles} atoms.")


def _group_weights(coordinate, system, group):
    if len(group) == 1:
        return [1.0]  # a one-atom group is the atom, even a massless one
    weights = [system.getParticleMass(i).value_in_unit(openmm.unit.dalton) for i in group]
    if sum(weights) <= 0.0:
        raise ProtocolError(f"coordinate {coordinate.name!r}: the atom group {list(group)} "
                            "has no mass, so it has no centre of mass.")
    return weights


def _atom_force(coordinate, atoms):
    kind = coordinate.kind
    if kind == "position":
        force = openmm.CustomExternalForce("xyz"[coordinate.axis])
        force.addParticle(atoms[0], [])
    elif kind == "distance":
        force = openmm.CustomBondForce("r")
        force.addBond(*atoms, [])
    elif kind == "angle":
        force = openmm.CustomAngleForce("theta")
        force.addAngle(*atoms, [])
    else:
        force = openmm.CustomTorsionForce("theta")
        force.addTorsion(*atoms, [])
    return force


def _centroid_force(coordinate, system):
    n_groups = len(coordinate.groups)
    if coordinate.kind == "position":
        expression = "xyz"[coordinate.axis] + "1"
    else:
        expression = _CENTROID_EXPRESSIONS[coordinate.kind]
    force = openmm.CustomCentroidBondForce(n_groups, expression)
    for group in coordinate.groups:
        force.addGroup(list(group), _group_weights(coordinate, system, group))
    force.addBond(list(range(n_groups)), [])
    return force


def build_coordinate_force(coordinate, system):
    """An OpenMM force whose energy equals the value of a coordinate that is not a combination.

    Parameters
    ----------
    coordinate : Coordinate
        Any kind but 'combination'.
    system : openmm.System
        Supplies the masses and whether periodic boundary conditions apply.

    Returns
    -------
    openmm.Force
        Energy in kJ/mol numerically equal to the value in nm or rad. Displacements use
        periodic boundary conditions iff ``system.usesPeriodicBoundaryConditions()``; a
        position is the raw coordinate, never wrapped.
    """
    if coordinate.kind == "combination":
        raise ProtocolError(f"coordinate {coordinate.name!r}: a combination has no single force; "
                            "use coordinate_expression.")
    _check_atoms(coordinate, system)
    if all(len(group) == 1 for group in coordinate.groups):
        force = _atom_force(coordinate, [group[0] for group in coordinate.groups])
    else:
        force = _centroid_force(coordinate, system)
    if not isinstance(force, openmm.CustomExternalForce):  # it has no such switch
        force.setUsesPeriodicBoundaryConditions(system.usesPeriodicBoundaryConditions())
    force.setName(f"coordinate {coordinate.name}")
    return force


def coordinate_expression(coordinate, system, prefix):
    """A coordinate as an energy expression in collective variables, with their forces.

    Parameters
    ----------
    coordinate : Coordinate
    system : openmm.System
    prefix : str
        Collective-variable names start with it; it must be a valid expression variable
        name (letters, digits, underscores) that clashes with nothing else in the force.

    Returns
    -------
    expression : str
        The coordinate's value in terms of the collective-variable names, parenthesised
        for combinations so it can be embedded in a larger expression.
    variables : list of (str, openmm.Force)
        Each collective variable's name and the force whose energy is its value; add them
        with ``CustomCVForce.addCollectiveVariable(name, force)``.
    """
    if coordinate.kind != "combination":
        return prefix, [(prefix, build_coordinate_force(coordinate, system))]
    parts, variables = [], []
    for index, (coefficient, term) in enumerate(coordinate.terms):
        name = f"{prefix}_{index}"
        parts.append(f"({coefficient!r})*{name}")
        variables.append((name, build_coordinate_force(term, system)))
    return "(" + " + ".join(parts) + ")", variables
