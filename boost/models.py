"""Analytic model potentials as OpenMM systems of independent particles, with exact references.

Each particle (a carbon-like atom named ``P`` in a residue ``MDL`` of its own) moves in
an external potential U(x, y, z), built as one ``CustomExternalForce``: no constraints,
no periodic box, no centre-of-mass motion remover. Everything is in OpenMM's MD units: positions in nm, energies in kJ/mol,
masses in amu, temperatures in K.

The exact references are integrals of the Boltzmann factor exp(-U/kT) by adaptive
quadrature (``scipy.integrate.quad``), marginalised over the directions that only carry
a harmonic restraint (those factor out exactly). The integrals run over a bounded domain
outside which exp(-[U - U_min]/kT) < exp(-40); see each model's ``compute_domain``.

Models: ``double_well`` (a quartic double well along x, :class:`DoubleWell`) and
``muller_brown`` (the surface of Müller & Brown, Theor. Chim. Acta 53, 75 (1979), in x
and y, :class:`MullerBrown`), one particle each, restrain the remaining directions with
a harmonic transverse_spring; ``harmonic_well`` (:class:`HarmonicWell`) holds N
independent particles in one isotropic 3-D harmonic well, whose free energy is known in
closed form.
"""

import math
from dataclasses import dataclass

import numpy as np

from .units import beta, thermal_energy

# OpenMM and SciPy are imported where a model is built or integrated: reading a model
# spec (when a protocol is loaded) needs neither.

MODEL_NAMES = ("double_well", "muller_brown", "harmonic_well")

#: Boltzmann factors below exp(-CUTOFF_KT) relative to the global minimum are neglected.
CUTOFF_KT = 40.0

_COMMON_KEYS = {"mass": ("mass", "12 amu"), "transverse_spring": ("spring_length", "1000 kJ/mol/nm**2")}
_KEYS = {
    "double_well": {"barrier": ("energy", "10 kJ/mol"), "minimum": ("length", "0.1 nm"),
                    "tilt": ("energy", "0 kJ/mol"), **_COMMON_KEYS},
    # 0.2 kJ/mol per surface unit: at 300 K the deep minimum sits ~8.5 kT below its
    # saddle, 3.1 kT below the second minimum (see MullerBrown).
    "muller_brown": {"energy_scale": ("energy", "0.2 kJ/mol"), "length_scale": ("length", "1 nm"),
                     **_COMMON_KEYS},
    # dimension None: a whole number of at least 1
    "harmonic_well": {"particles": (None, 1), "spring": ("spring_length", "1000 kJ/mol/nm**2"),
                      "mass": ("mass", "12 amu")},
}

# Müller & Brown (1979) constants, one row per term: A, a, b, c, x0, y0.
_MB_TERMS = (
    (-200.0, -1.0, 0.0, -10.0, 1.0, 0.0),
    (-100.0, -1.0, 0.0, -10.0, 0.0, 0.5),
    (-170.0, -6.5, 11.0, -6.5, -0.5, 1.5),
    (15.0, 0.7, 0.6, 0.7, -1.0, 1.0),
)
# Starting box in surface units (the region usually drawn for this surface; common
# practice), widened by compute_domain until the cutoff holds on every edge.
_MB_BOX = ((-1.5, 1.2), (-0.5, 2.0))


def read_model(node):
    """Read a model spec into a :class:`DoubleWell`, :class:`MullerBrown` or :class:`HarmonicWell`.

    The result is the typed model spec: frozen, every parameter checked and in MD units;
    its ``build_system()`` makes the OpenMM system.

    Parameters
    ----------
    node : boost.spec.Node
        A mapping ``{name: double_well, barrier: 10 kJ/mol, ...}``; every key but
        ``name`` is optional and carries its unit.

    Returns
    -------
    DoubleWell, MullerBrown or HarmonicWell
        The parameters as floats in MD units (``particles`` as an int).
    """
    node.mapping(required=("name",))
    name = node.get("name").text(choices=MODEL_NAMES)
    keys = _KEYS[name]
    node.mapping(allowed=("name", *keys), required=("name",))
    values = {key: node.get(key, default).integer(minimum=1) if dimension is None
              else node.get(key, default).quantity(dimension, positive=key != "tilt")
              for key, (dimension, default) in keys.items()}
    classes = {"double_well": DoubleWell, "muller_brown": MullerBrown, "harmonic_well": HarmonicWell}
    return classes[name](**values)


def model_parameters(model):
    """``(key, dimension, value)`` of each parameter of a model spec, in the order of its keys.

    ``dimension`` is a key of :data:`boost.units.DIMENSIONS`, or None for a whole number.
    """
    return [(key, dimension, getattr(model, key)) for key, (dimension, _) in _KEYS[model.name].items()]


def _one_particle(expression, parameters, mass, position):
    """One particle of ``mass`` (amu) in a CustomExternalForce with per-particle parameters."""
    return _particles(expression, parameters, mass, [position])


def _particles(expression, parameters, mass, positions):
    """Independent particles of ``mass`` (amu), one residue each, in one CustomExternalForce."""
    import openmm
    from openmm import app

    force = openmm.CustomExternalForce(expression)
    for key in parameters:
        force.addPerParticleParameter(key)
    system = openmm.System()
    topology = app.Topology()
    chain = topology.addChain()
    for index in range(len(positions)):
        force.addParticle(index, list(parameters.values()))
        system.addParticle(mass)
        topology.addAtom("P", app.element.carbon, topology.addResidue("MDL", chain))
    system.addForce(force)
    return system, topology, np.array(positions, dtype=float).reshape(-1, 3)


def _check_xyz(xyz):
    xyz = np.asarray(xyz, dtype=float)
    if xyz.ndim != 2 or xyz.shape[1] != 3:
        raise ValueError(f"xyz must be shape (n, 3) in nm, you supplied shape {xyz.shape}.")
    return xyz


def _check_basins(basins, axes):
    """Basin specs -> {name: {axis: (lo, hi)}} over every axis, in nm."""
    limits = {}
    for name, spec in basins.items():
        unknown = set(spec) - set(axes)
        if unknown:
            raise ValueError(f"basin {name!r} uses axes {sorted(unknown)}; this model has {list(axes)}.")
        limits[name] = {}
        for axis in axes:
            lo, hi = (float(v) for v in spec.get(axis, (-math.inf, math.inf)))
            if not lo < hi:
                raise ValueError(f"basin {name!r}: {axis} interval must have lo < hi, got ({lo}, {hi}).")
            limits[name][axis] = (lo, hi)
    return limits


def _quad(function, lo, hi, points):
    """Integral of a smooth scalar function over [lo, hi], split at interior ``points``."""
    from scipy import integrate

    inner = [p for p in points if lo < p < hi]
    value, _ = integrate.quad(function, lo, hi, points=inner or None, limit=400,
                              epsabs=0.0, epsrel=1e-10)
    return value


def _panels(lo, hi, width):
    """Break points every ``width`` so adaptive quadrature cannot step over a narrow well."""
    return list(np.arange(lo + width, hi, width))


def _nested_quad(weight, box, points, fixed=()):
    """Integral of weight(*coordinates) over a box, one (lo, hi) per axis, outer axis first."""
    (lo, hi), rest = box[0], box[1:]
    if not rest:
        return _quad(lambda t: weight(*fixed, t), lo, hi, points[0])
    return _quad(lambda t: _nested_quad(weight, rest, points[1:], (*fixed, t)), lo, hi, points[0])


class _ExactPopulations:
    """Basin populations by quadrature; models provide axes, compute_domain, _weight, _break_points."""

    def compute_exact_populations(self, temperature, basins):
        """Equilibrium populations of basins (boxes over the model's axes) by quadrature.

        Parameters
        ----------
        temperature : float, K
        basins : dict of str to dict
            ``{name: {axis: (lo, hi)}}`` in nm over the axes of the model ("x"; "x" and
            "y" for Müller–Brown). A missing axis means the whole line; infinite bounds
            are allowed.

        Returns
        -------
        dict of str to float
            Fraction of the Boltzmann distribution exp(-U/kT) in each basin; the
            harmonically restrained directions integrate out.
        """
        limits = _check_basins(basins, self.axes)
        weight = self._weight(temperature)
        domain = self.compute_domain(temperature)
        points = self._break_points(domain)

        def box_integral(box):
            box = [(max(a, lo), min(b, hi)) for (a, b), (lo, hi) in zip(box, domain)]
            return _nested_quad(weight, box, points) if all(a < b for a, b in box) else 0.0

        total = box_integral(domain)
        return {name: box_integral([box[axis] for axis in self.axes]) / total
                for name, box in limits.items()}


@dataclass(frozen=True)
class DoubleWell(_ExactPopulations):
    """A quartic double well along x with harmonic restraints along y and z.

    Attributes
    ----------
    barrier : float, kJ/mol
        Height of the central barrier above the wells when ``tilt`` is zero.
    minimum : float, nm
        Distance of the (untilted) minima from x = 0.
    tilt : float, kJ/mol
        Linear term ``tilt * x / minimum``; positive values lower the left well.
    mass : float, amu
    transverse_spring : float, kJ/mol/nm**2
        Spring constant of the restraint on y and z.
    """

    barrier: float
    minimum: float
    tilt: float
    mass: float
    transverse_spring: float
    name = "double_well"
    axes = ("x",)

    def compute_energy(self, xyz):
        """Potential energy, ndarray shape (n,), in kJ/mol, of positions xyz, shape (n, 3), nm."""
        x, y, z = _check_xyz(xyz).T
        return self._energy_x(x) + 0.5 * self.transverse_spring * (y**2 + z**2)

    def _energy_x(self, x):
        s = x / self.minimum
        return self.barrier * (s * s - 1.0) ** 2 + self.tilt * s

    def compute_minima(self):
        """Positions along x of the local minima, ndarray, ascending, in nm."""
        roots = np.roots([4.0 * self.barrier, 0.0, -4.0 * self.barrier, self.tilt])
        roots = np.sort(roots[np.abs(roots.imag) < 1e-9].real)
        curvature = 12.0 * roots**2 - 4.0  # sign of d2U/ds2 in units of barrier
        return roots[curvature > 0] * self.minimum

    def build_system(self):
        """OpenMM system, topology and positions, shape (1, 3), nm, at the left minimum."""
        expression = ("barrier*((x/minimum)^2 - 1)^2 + tilt*x/minimum"
                      " + 0.5*transverse_spring*(y^2 + z^2)")
        parameters = {"barrier": self.barrier, "minimum": self.minimum, "tilt": self.tilt,
                      "transverse_spring": self.transverse_spring}
        return _one_particle(expression, parameters, self.mass, (self.compute_minima()[0], 0.0, 0.0))

    def compute_domain(self, temperature):
        """((lo, hi),): the x interval in nm outside which exp(-[U - U_min]/kT) < exp(-40)."""
        kt = thermal_energy(temperature)
        lowest = self._energy_x(self.compute_minima()).min()
        ends = []
        for sign in (-1.0, 1.0):
            x = 1.5 * self.minimum * sign
            while (self._energy_x(x) - lowest) / kt < CUTOFF_KT:
                x *= 1.5  # U rises monotonically beyond the outer minima
            ends.append(x)
        return ((ends[0], ends[1]),)

    def _weight(self, temperature):
        beta_ = beta(temperature)
        lowest = self._energy_x(self.compute_minima()).min()
        return lambda x: math.exp(-beta_ * (self._energy_x(x) - lowest))

    def _break_points(self, domain):
        return [[*self.compute_minima(), *_panels(*domain[0], self.minimum / 4)]]

    def compute_exact_pmf(self, temperature, grid, *, axis="x"):
        """PMF along x, ndarray shape (n,), in kJ/mol, zero at its minimum on ``grid`` (nm).

        y and z are independent harmonic directions, so the PMF along x is U(x, 0, 0) up to
        a constant, whatever the temperature.
        """
        if axis != "x":
            raise ValueError(f"axis must be 'x' for the double well, got {axis!r}.")
        pmf = self._energy_x(np.asarray(grid, dtype=float))
        return pmf - pmf.min()


@dataclass(frozen=True)
class StationaryPoint:
    """A stationary point of the Müller–Brown model in the z = 0 plane.

    Attributes
    ----------
    kind : str
        ``"minimum"``, ``"saddle"`` or ``"maximum"``, from the Hessian's eigenvalues.
    x, y : float, nm
    energy : float, kJ/mol
    """

    kind: str
    x: float
    y: float
    energy: float


def _mb_surface(u, v, exp=np.exp):
    """Müller–Brown V(u, v) in surface units; ``exp=math.exp`` for fast scalar calls."""
    total = 0.0
    for big_a, a, b, c, u0, v0 in _MB_TERMS:
        du, dv = u - u0, v - v0
        total = total + big_a * exp(a * du * du + b * du * dv + c * dv * dv)
    return total


def _mb_derivatives(point):
    """Gradient, shape (2,), and Hessian, shape (2, 2), of V at (u, v), surface units."""
    gradient, hessian = np.zeros(2), np.zeros((2, 2))
    for big_a, a, b, c, u0, v0 in _MB_TERMS:
        du, dv = point[0] - u0, point[1] - v0
        term = big_a * math.exp(a * du * du + b * du * dv + c * dv * dv)
        slope = np.array([2 * a * du + b * dv, b * du + 2 * c * dv])
        gradient += term * slope
        hessian += term * (np.outer(slope, slope) + np.array([[2 * a, b], [b, 2 * c]]))
    return gradient, hessian


@dataclass(frozen=True)
class MullerBrown(_ExactPopulations):
    """The Müller–Brown surface in x and y, scaled to MD units, with a harmonic z restraint.

    With the default 0.2 kJ/mol per surface unit at 300 K (kT = 2.49 kJ/mol) the deep
    minimum (-0.56, 1.44) lies 8.5 kT below its saddle and 3.1 kT below the second
    minimum (0.62, 0.03), which lies 2.9 kT below the saddle to the shallow third: the
    deep well is left rarely in plain MD, easily with umbrella windows. Populations at
    300 K are about 0.94, 0.04 and 0.02.

    Attributes
    ----------
    energy_scale : float, kJ/mol per surface energy unit
    length_scale : float, nm per surface length unit
    mass : float, amu
    transverse_spring : float, kJ/mol/nm**2
        Spring constant of the restraint on z.

    References
    ----------
    K. Müller and L. D. Brown, Theor. Chim. Acta 53, 75 (1979).
    """

    energy_scale: float
    length_scale: float
    mass: float
    transverse_spring: float
    name = "muller_brown"
    axes = ("x", "y")

    def compute_energy(self, xyz):
        """Potential energy, ndarray shape (n,), in kJ/mol, of positions xyz, shape (n, 3), nm."""
        x, y, z = _check_xyz(xyz).T
        surface = _mb_surface(x / self.length_scale, y / self.length_scale)
        return self.energy_scale * surface + 0.5 * self.transverse_spring * z**2

    def build_system(self):
        """OpenMM system, topology and positions, shape (1, 3), nm, at the deepest minimum."""
        terms = [f"({big_a!r})*exp(({a!r})*(u-({u0!r}))^2 + ({b!r})*(u-({u0!r}))*(v-({v0!r}))"
                 f" + ({c!r})*(v-({v0!r}))^2)" for big_a, a, b, c, u0, v0 in _MB_TERMS]
        expression = (f"energy_scale*({' + '.join(terms)}) + 0.5*transverse_spring*z^2;"
                      " u = x/length_scale; v = y/length_scale")
        parameters = {"energy_scale": self.energy_scale, "length_scale": self.length_scale,
                      "transverse_spring": self.transverse_spring}
        start = self.find_deepest_minimum()
        return _one_particle(expression, parameters, self.mass, (start.x, start.y, 0.0))

    def find_stationary_point(self, guess):
        """The :class:`StationaryPoint` reached from ``guess`` (x, y in nm) by root finding."""
        from scipy import optimize

        start = np.asarray(guess, dtype=float) / self.length_scale
        solution = optimize.root(lambda p: _mb_derivatives(p)[0], start,
                                 jac=lambda p: _mb_derivatives(p)[1], tol=1e-13)
        if not solution.success:
            raise ValueError(f"no stationary point found from {tuple(guess)}: {solution.message}")
        u, v = solution.x
        eigenvalues = np.linalg.eigvalsh(_mb_derivatives(solution.x)[1])
        kind = ("minimum" if eigenvalues.min() > 0 else
                "maximum" if eigenvalues.max() < 0 else "saddle")
        return StationaryPoint(kind, float(u * self.length_scale), float(v * self.length_scale),
                               float(self.energy_scale * _mb_surface(u, v, math.exp)))

    def find_deepest_minimum(self):
        """The global minimum (a :class:`StationaryPoint`), refined from a grid over the box."""
        u, v = np.meshgrid(np.linspace(*_MB_BOX[0], 271), np.linspace(*_MB_BOX[1], 251))
        best = np.argmin(_mb_surface(u, v))
        start = np.array([u.flat[best], v.flat[best]]) * self.length_scale
        return self.find_stationary_point(start)

    def compute_domain(self, temperature):
        """((x_lo, x_hi), (y_lo, y_hi)) in nm, outside which exp(-[U - U_min]/kT) < exp(-40).

        Starts from x in [-1.5, 1.2], y in [-0.5, 2.0] surface units and moves each edge
        outward by 0.25 units until the energy on that whole edge clears the cutoff.
        """
        beta_scaled = self.energy_scale * beta(temperature)
        lowest = self.find_deepest_minimum().energy / self.energy_scale
        box = [list(_MB_BOX[0]), list(_MB_BOX[1])]
        for _ in range(400):
            moved = False
            for axis, side in ((0, 0), (0, 1), (1, 0), (1, 1)):
                other = np.linspace(*box[1 - axis], 401)
                edge = np.full_like(other, box[axis][side])
                u, v = (edge, other) if axis == 0 else (other, edge)
                if beta_scaled * (_mb_surface(u, v).min() - lowest) < CUTOFF_KT:
                    box[axis][side] += 0.25 if side else -0.25
                    moved = True
            if not moved:
                return tuple((lo * self.length_scale, hi * self.length_scale) for lo, hi in box)
        raise ValueError(f"no bounded domain found at {temperature} K; is the temperature sane?")

    def _weight(self, temperature):
        """exp(-[U - U_min]/kT) as a scalar function of (x, y) in nm."""
        beta_scaled = self.energy_scale * beta(temperature)
        lowest, scale = self.find_deepest_minimum().energy / self.energy_scale, self.length_scale
        return lambda x, y: math.exp(
            -beta_scaled * (_mb_surface(x / scale, y / scale, math.exp) - lowest))

    def _break_points(self, domain):
        return [_panels(lo, hi, 0.25 * self.length_scale) for lo, hi in domain]

    def compute_exact_pmf(self, temperature, grid, *, axis="x"):
        """PMF along x or y, marginalising the other, by quadrature.

        Parameters
        ----------
        temperature : float, K
        grid : ndarray, shape (n,), in nm
            Values of the coordinate ``axis``.
        axis : {"x", "y"}

        Returns
        -------
        ndarray, shape (n,), in kJ/mol
            -kT ln of the marginal density, zero at its minimum on ``grid``; +inf where
            the density underflows (outside the domain).
        """
        if axis not in self.axes:
            raise ValueError(f"axis must be 'x' or 'y' for the Müller–Brown model, got {axis!r}.")
        weight = self._weight(temperature)
        along = self.axes.index(axis)
        domain = self.compute_domain(temperature)[1 - along]
        points = self._break_points([domain])[0]
        densities = []
        for value in np.asarray(grid, dtype=float):
            at = (lambda t, g=value: weight(g, t)) if along == 0 else (lambda t, g=value: weight(t, g))
            densities.append(_quad(at, *domain, points))
        with np.errstate(divide="ignore"):
            pmf = -thermal_energy(temperature) * np.log(np.array(densities))
        return pmf - pmf.min()


@dataclass(frozen=True)
class HarmonicWell:
    """N independent particles in one isotropic harmonic well U = Σ_i ½ spring |r_i|².

    Its d = 3N degrees of freedom are all harmonic, so everything is known in closed form
    (exact): the configurational partition function is (2π kT / spring)^(d/2), the
    reduced free energy f = -(d/2) ln(2π kT / spring) (lengths in nm), ⟨U⟩ = (d/2) kT,
    and βU follows a Gamma(d/2, 1) law. Between temperatures, Δf_ij = (d/2) ln(β_j/β_i).

    Attributes
    ----------
    particles : int
    spring : float, kJ/mol/nm**2
    mass : float, amu
    """

    particles: int
    spring: float
    mass: float
    name = "harmonic_well"

    @property
    def degrees_of_freedom(self):
        """d = 3N, the number of harmonic degrees of freedom (int)."""
        return 3 * self.particles

    def compute_energy(self, xyz):
        """Potential energy, ndarray shape (n_frames,), kJ/mol, of xyz, shape (n_frames, N, 3), nm."""
        xyz = np.asarray(xyz, dtype=float)
        if xyz.ndim != 3 or xyz.shape[1:] != (self.particles, 3):
            raise ValueError(f"xyz must be shape (n_frames, {self.particles}, 3) in nm, "
                             f"you supplied shape {xyz.shape}.")
        return 0.5 * self.spring * np.sum(xyz**2, axis=(1, 2))

    def build_system(self):
        """OpenMM system, topology and positions, shape (N, 3), nm, all at the minimum."""
        return _particles("0.5*spring*(x^2 + y^2 + z^2)", {"spring": self.spring}, self.mass,
                          np.zeros((self.particles, 3)))

    def compute_exact_free_energy(self, temperature):
        """Reduced configurational free energy f = -ln ∫ exp(-U/kT) d^d x (x in nm), in kT."""
        kt = thermal_energy(temperature)
        return -0.5 * self.degrees_of_freedom * math.log(2.0 * math.pi * kt / self.spring)

    def compute_exact_mean_energy(self, temperature):
        """⟨U⟩ = (d/2) kT, in kJ/mol, at ``temperature`` (K)."""
        return 0.5 * self.degrees_of_freedom * thermal_energy(temperature)
