"""Neighbours on the condition grid, and the poor-overlap warning around a circle."""

import math

import numpy as np
import pytest

from boost.diagnostics import closes_circle, neighbour_pairs_on_grid, warn_poor_overlap
from boost.exceptions import PoorOverlapWarning


def test_windows_all_the_way_around_close_the_circle():
    # source: exact geometry — 36 centres 10° apart from -180° leave a 10° gap back to -180°
    assert closes_circle(np.radians(np.arange(-180, 180, 10)))
    assert closes_circle(np.radians([-170, -50, 70]))          # 120° everywhere, across ±180° too
    assert not closes_circle(np.radians(np.arange(-90, 91, 10)))  # 180° back across ±180°
    assert not closes_circle(np.radians([-170, 170]))          # two windows: one pair only
    assert not closes_circle(np.radians([70, -50, -170]))      # not in increasing order


def test_grid_pairs_with_and_without_the_wrap():
    assert neighbour_pairs_on_grid((1, 4)) == [(0, 1), (1, 2), (2, 3)]
    assert neighbour_pairs_on_grid((1, 4), circles=(1,)) == [(0, 1), (1, 2), (2, 3), (0, 3)]
    # two temperatures × three windows, circle along the windows (row-major: k = t * 3 + w)
    pairs = neighbour_pairs_on_grid((2, 3), circles=(1,))
    assert sorted(pairs) == sorted([(0, 3), (1, 4), (2, 5), (0, 1), (3, 4), (1, 2), (4, 5), (0, 2), (3, 5)])


def test_poor_overlap_across_the_wrap_is_named():
    n = 6
    overlap = np.eye(n) * 0.5
    for i in range(n - 1):
        overlap[i, i + 1] = overlap[i + 1, i] = 0.2
    overlap[0, n - 1] = overlap[n - 1, 0] = 0.001                 # only the pair across ±180°
    names = [f"window {k}" for k in range(n)]
    assert warn_poor_overlap(overlap, (1, n), names.__getitem__) == []
    with pytest.warns(PoorOverlapWarning, match="window 0 and window 5"):
        poor = warn_poor_overlap(overlap, (1, n), names.__getitem__, circles=(1,))
    assert [(i, j) for i, j, _ in poor] == [(0, 5)]
    assert math.isclose(poor[0][2], 0.001)
