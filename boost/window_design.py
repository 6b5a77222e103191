"""Umbrella windows spaced for a target MBAR overlap between neighbours (pure numpy/scipy).

Given a PMF F(ξ) in kT along one coordinate, the window with centre c and spring k samples
the biased density

    p_c(ξ) ∝ exp(−F(ξ) − β ½ k d(ξ, c)²)

(d wrapped on a periodic coordinate). pymbar's overlap matrix is O = Wᵀ W N with W_nk =
p_k(x_n) / Σ_l N_l p_l(x_n) the MBAR weights (Shirts & Chodera, J. Chem. Phys. 129,
124105 (2008), doi:10.1063/1.2978177; Klimovich, Shirts & Mobley, J. Comput. Aided Mol.
Des. 29, 397 (2015), doi:10.1007/s10822-015-9840-9). With infinitely many samples the sum
over samples n becomes an integral over their mixture density Σ_l N_l p_l, so

    O_ij = N_j ∫ p_i(ξ) p_j(ξ) / Σ_l N_l p_l(ξ) dξ,

which for equal sample counts is ∫ p_i p_j / Σ_l p_l dξ (for two windows ∫ p_i p_j / (p_i
+ p_j) dξ, at most ½). It depends on the counts only through their ratios. The umbrella
energies depend on ξ only, so the ξ-marginal densities give the overlap of the full
ensembles. tests/test_propose.py checks the integral against pymbar's compute_overlap on
sampled data.

A run's analysis counts a window's statistically independent samples, production / g,
and g (the statistical inefficiency) differs between windows: a window where a slow
degree of freedom relaxes has few, and its measured overlaps, min(O_ij, O_ji), fall with
them. The planner therefore weighs each window by a relative count 1 / g(c), g
interpolated along the coordinate from the source run's windows.

Lengths in the coordinate's unit (nm or rad), springs in kJ/mol per unit², β in mol/kJ.
"""

from dataclasses import dataclass

import numpy as np
from scipy.special import logsumexp

#: The planner aims each neighbour pair at this multiple of the target overlap: the trial's
#: PMF and statistical inefficiencies carry statistical error, and a run's measured overlap
#: scatters around its prediction.
MARGIN = 1.5
_TWO_PI = 2.0 * np.pi
#: The highest two-window overlap the planner aims at (two identical windows give ½).
_MOST = 0.49


@dataclass(frozen=True)
class Profile:
    """A PMF on an evenly spaced grid.

    Attributes
    ----------
    grid : ndarray, shape (n,), nm or rad; on a periodic coordinate it covers [−π, π)
    f : ndarray, shape (n,), kT, finite
    periodic : bool
    """

    grid: np.ndarray
    f: np.ndarray
    periodic: bool

    @property
    def step(self):
        return float(self.grid[1] - self.grid[0])


def profile_on_grid(centres, f, *, periodic, lower, upper, step):
    """Resample a binned PMF (bin centres, NaN where unsampled) onto an even grid.

    Linear between sampled bins; beyond the outermost sampled bins the end value is
    kept. A periodic grid covers [−π, π) and interpolates through the wrap.

    Parameters
    ----------
    centres, f : ndarray, shape (n_bins,), nm or rad and kT
    lower, upper : float, nm or rad: the grid's range (ignored on a periodic coordinate)
    step : float, nm or rad

    Returns
    -------
    Profile
    """
    sampled = np.isfinite(f)
    x, y = np.asarray(centres, float)[sampled], np.asarray(f, float)[sampled]
    if periodic:
        grid = np.arange(-np.pi, np.pi, step)
        values = np.interp(grid, x, y, period=_TWO_PI)
    else:
        grid = np.arange(lower, upper + 0.5 * step, step)
        values = np.interp(grid, x, y)
    return Profile(grid, values - values.min(), periodic)


def _displacement(grid, centre, periodic):
    d = grid - centre
    return d - _TWO_PI * np.floor((d + np.pi) / _TWO_PI) if periodic else d


def compute_window_densities(profile, centres, springs, beta):
    """Normalised biased densities p_k on the profile's grid.

    Returns
    -------
    ndarray, shape (n_windows, n_grid), per unit of the coordinate
    """
    log_p = np.array([-profile.f - 0.5 * beta * k * _displacement(profile.grid, c, profile.periodic) ** 2
                      for c, k in zip(centres, springs)])
    log_p -= logsumexp(log_p, axis=1, keepdims=True) + np.log(profile.step)
    return np.exp(log_p)


def compute_predicted_overlap(densities, step, counts=None):
    """The MBAR overlap matrix the windows' densities predict.

    Parameters
    ----------
    densities : ndarray, shape (n_windows, n_grid), normalised on a grid of spacing ``step``
    counts : ndarray, shape (n_windows,), optional
        Relative sample counts N_k (only ratios matter); equal when not given.

    Returns
    -------
    ndarray, shape (n_windows, n_windows); rows sum to 1
    """
    counts = np.ones(len(densities)) if counts is None else np.asarray(counts, dtype=float)
    mixture = counts @ densities
    inside = mixture > 0
    p = densities[:, inside]
    return (p / mixture[inside]) @ p.T * step * counts[None, :]


def neighbour_pairs(n_windows, periodic):
    """(i, i+1) along the windows, and (last, first) around a circle."""
    pairs = [(i, i + 1) for i in range(n_windows - 1)]
    return pairs + [(n_windows - 1, 0)] if periodic and n_windows > 2 else pairs


def predict_neighbour_overlaps(profile, centres, springs, beta, share=None):
    """min(O_ij, O_ji) for each neighbour pair of windows sorted along the coordinate.

    ``share``: callable, centre -> relative count of independent samples (None: equal).
    """
    counts = None if share is None else [share(c) for c in centres]
    overlap = compute_predicted_overlap(compute_window_densities(profile, centres, springs, beta), profile.step,
                                        counts)
    return tuple(float(min(overlap[i, j], overlap[j, i])) for i, j in neighbour_pairs(len(centres), profile.periodic))


@dataclass(frozen=True)
class WindowDesign:
    """Planned windows along one coordinate, sorted by centre.

    Attributes
    ----------
    centres, springs : tuple of float (nm or rad; kJ/mol per unit²)
    overlap : tuple of float, predicted MBAR overlap of each neighbour pair (see neighbour_pairs)
    added : tuple of int, indices of windows that are new (refinement), empty for a fresh plan
    """

    centres: tuple
    springs: tuple
    overlap: tuple
    added: tuple = ()


def _pair_overlap(profile, a, b, spring, beta, share):
    p = compute_window_densities(profile, (a, b), (spring, spring), beta)
    overlap = compute_predicted_overlap(p, profile.step, None if share is None else (share(a), share(b)))
    return min(overlap[0, 1], overlap[1, 0])


def _greedy(profile, first, end, spring, beta, aim, share):
    """Centres from ``first`` towards ``end`` (``end`` itself included on an open coordinate;
    on a circle it is ``first`` again): each step the longest, on a grid of a tenth of a
    window's width, whose two-window overlap stays at or above ``aim``."""
    stride = min(1.0 / np.sqrt(beta * spring), end - first) / 10.0
    centres = [first]
    # on a circle ``end`` is ``first`` again, and a displacement beyond half a turn wraps:
    # the circle is closed only from less than half a turn away, and no step exceeds it
    longest = np.pi if profile.periodic else np.inf

    def open_gap():
        return end - centres[-1] > longest or _pair_overlap(profile, centres[-1], end, spring, beta, share) < aim

    while open_gap():
        step = stride
        while centres[-1] + step + stride < end and step + stride <= longest and \
                _pair_overlap(profile, centres[-1], centres[-1] + step + stride, spring, beta, share) >= aim:
            step += stride
        centres.append(centres[-1] + step)
    return centres if profile.periodic else centres + [end]


def design_windows(profile, first, last, spring, beta, target, *, margin=MARGIN, share=None):
    """Windows from ``first`` to ``last`` (on a periodic coordinate, around the whole circle
    from ``first``; ``last`` is ignored) whose neighbours all predict an overlap of at least
    ``target`` × ``margin`` when every window is present, denser where F is steep.
    ``share``: callable, centre -> relative count of independent samples (None: equal).

    Windows are placed greedily by the two-window overlap, aiming at ``target`` × ``margin``;
    the aim is raised until the overlap with all windows present (what a run's MBAR
    measures: the other windows take a share of each sample) meets it too.

    Returns
    -------
    WindowDesign
    """
    goal = target * margin
    end = first + _TWO_PI if profile.periodic else last

    def plan(aim):
        centres = _greedy(profile, first, end, spring, beta, aim, share)
        centres = _wrap_sorted(centres) if profile.periodic else centres
        return centres, predict_neighbour_overlaps(profile, centres, (spring,) * len(centres), beta, share)

    aim = goal
    centres, overlap = plan(aim)
    while min(overlap) < goal and aim < _MOST:
        aim = min(_MOST, aim * 1.1)
        centres, overlap = plan(aim)
    # Spread the same number of windows more evenly: the highest aim that still needs no
    # more windows leaves the last gap (the remainder of the range) least crowded.
    low, high = aim, _MOST
    for _ in range(12):
        middle = 0.5 * (low + high)
        trial = plan(middle)
        if len(trial[0]) == len(centres) and min(trial[1]) >= goal:
            low, (centres, overlap) = middle, trial
        else:
            high = middle
    return WindowDesign(tuple(centres), (spring,) * len(centres), overlap)


def _wrap_sorted(centres):
    wrapped = np.asarray(centres) - _TWO_PI * np.floor((np.asarray(centres) + np.pi) / _TWO_PI)
    return sorted(float(c) for c in wrapped)


def insert_windows(profile, centres, springs, poor_pairs, beta, target, *, margin=MARGIN, share=None):
    """The windows with extra ones inside each poor neighbour pair (i, j): the fewest evenly
    spaced ones (at least one, with the pair's softer spring) for which every sub-pair
    predicts ``target`` × ``margin`` with all windows present.

    Parameters
    ----------
    centres, springs : sequence of float, sorted by centre
    poor_pairs : iterable of (i, j), neighbours in that order (j = 0 for the wrap of a circle)

    Returns
    -------
    WindowDesign
        Sorted by centre; ``added`` lists the new windows.
    """
    goal = target * margin
    centres, springs = list(centres), list(springs)
    extra_c, extra_k = [], []
    for i, j in sorted(set(poor_pairs)):
        low, high = centres[i], centres[j]
        if profile.periodic and high <= low:
            high += _TWO_PI
        spring = min(springs[i], springs[j])
        for count in range(1, 1000):
            inside = np.linspace(low, high, count + 2)[1:-1]
            trial_c = np.concatenate([[low], inside, [high]])
            trial_c = trial_c - _TWO_PI * np.floor((trial_c + np.pi) / _TWO_PI) if profile.periodic else trial_c
            others = [c for n, c in enumerate(centres) if n not in (i, j)]
            other_k = [k for n, k in enumerate(springs) if n not in (i, j)]
            every_c = [*trial_c, *others]
            every_k = [springs[i], *[spring] * count, springs[j], *other_k]
            overlap = compute_predicted_overlap(compute_window_densities(profile, every_c, every_k, beta),
                                                profile.step, None if share is None else [share(c) for c in every_c])
            if all(min(overlap[n, n + 1], overlap[n + 1, n]) >= goal for n in range(count + 1)):
                break
        extra_c += [float(c) for c in trial_c[1:-1]]
        extra_k += [spring] * count
    order = np.argsort(np.asarray(centres + extra_c), kind="stable")
    all_c = [float(np.asarray(centres + extra_c)[n]) for n in order]
    all_k = [float(np.asarray(springs + extra_k)[n]) for n in order]
    added = tuple(int(np.flatnonzero(order == len(centres) + m)[0]) for m in range(len(extra_c)))
    return WindowDesign(tuple(all_c), tuple(all_k), predict_neighbour_overlaps(profile, all_c, all_k, beta, share),
                        added)
