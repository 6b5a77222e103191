"""Units at the edge: the analysis keeps radians, what people read shows degrees."""

import csv
import math

import numpy as np
import pytest

from boost.analysis import analyse_run
from boost.protocol import load_protocol
from boost.report import write_report
from boost.scheduler import run_protocol
from boost.units import coordinate_shown, coordinate_unit_shown, format_coordinate

FOUR_WINDOWS = """\
protocol: 1
system: alanine-vacuum
seed: 3
temperature: 300 K
timestep: 2 fs
platform: Reference
coordinates:
  phi: {dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}
umbrella:
  phi: {centres: [-150 deg, -120 deg, -90 deg, -60 deg], spring: 100 kJ/mol/rad**2}
run: {cycle: 0.1 ps, equilibration: 0.5 ps, production: 6 ps}
"""


def test_formatting_of_coordinates():
    # source: exact — π/3 rad is 60°
    assert format_coordinate(math.pi / 3, True) == "60.0 deg"
    assert format_coordinate(0.12345, False) == "0.1235 nm"
    assert coordinate_unit_shown(True) == "deg" and coordinate_unit_shown(False) == "nm"
    np.testing.assert_allclose(coordinate_shown(np.array([-math.pi, math.pi / 2]), True), [-180.0, 90.0])
    assert coordinate_shown(0.3, False) == 0.3


def test_profile_in_radians_inside_and_degrees_in_its_table(tmp_path, write_protocol):
    folder = run_protocol(load_protocol(write_protocol(FOUR_WINDOWS)), tmp_path / "run", progress=False)
    analysis = analyse_run(folder, energy_unit="kT")
    (profile,) = analysis.profiles
    centres = profile.centres[0]
    assert np.all(np.abs(centres) <= math.pi)
    assert all(np.all(np.abs(v) <= math.pi) for v in analysis.window_values)
    out = write_report(analysis)
    with open(out / "pmf-phi.csv") as handle:
        rows = list(csv.reader(handle))
    assert rows[0][0] == "phi (deg)"
    shown = np.array([float(row[0]) for row in rows[1:]])
    np.testing.assert_allclose(shown, np.degrees(centres), atol=1e-5)
    assert any(label.endswith("(phi = -150.0 deg)") for label in analysis.condition_labels)


def test_basins_outlined_on_a_2d_profile_wrap_at_180_degrees():
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from types import SimpleNamespace

    from boost.report import _outline_basins

    # C7ax-like basin 50° < φ < 100°, any ψ; a basin across ±180° in φ (from 150° to -150°)
    analysis = SimpleNamespace(angle_coordinates=frozenset({"phi", "psi"}), basin_intervals={
        "ax": {"phi": (math.radians(50), math.radians(100))},
        "across": {"phi": (math.radians(150), math.radians(-150)), "psi": (0.0, math.radians(90))}})
    fig, ax = plt.subplots()
    ax.set_xlim(-180, 180)
    ax.set_ylim(-180, 180)
    _outline_basins(ax, analysis, ("phi", "psi"))
    boxes = sorted((round(p.get_x()), round(p.get_y()), round(p.get_width()), round(p.get_height()))
                   for p in ax.patches)
    plt.close(fig)
    # exact geometry of the intervals above, in degrees
    assert boxes == [(-180, 0, 30, 90), (50, -180, 50, 360), (150, 0, 30, 90)]
