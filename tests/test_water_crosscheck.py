"""Capped alanine in TIP3P water: ΔG between the phi < 0 and phi > 0 sides from solute
tempering against umbrella windows along phi (the bundled system alanine-tip3p).

Source of the check: both runs sample one Boltzmann distribution at 300 K (the solute
ladder's λ = 1 condition is the unscaled system, tests/REFERENCES.md, "Boltzmann weights of
a solute ladder"; umbrella windows are unbiased by MBAR), so the two ΔG agree within their
combined standard error — 3 combined σ here (common practice for a one-off comparison).
The check is only worth something when the two bars are small; the combined σ must stay
below 0.75 kcal/mol, so a run too short to decide fails instead of passing on wide bars.

Marked ``long``: about an hour on 2 cores, outside the CI budget; run it with
``python -m pytest -m long``.
"""

import numpy as np
import pytest

from boost.analysis import analyse_run
from boost.protocol import parse_protocol
from boost.scheduler import run_protocol

COMMON = """\
protocol: 1
system: alanine-tip3p
seed: 44
temperature: 300 K
timestep: 2 fs
friction: 1/ps
coordinates:
  phi: {dihedral: ["resid 0 and name C", "resid 1 and name N", "resid 1 and name CA", "resid 1 and name C"]}
exchange: {pairs: adjacent}
basins:
  negative: {phi: [-180 deg, 0 deg]}
  positive: {phi: [0 deg, 180 deg]}
analysis:
  energy_unit: kcal/mol
"""

# Four solute rungs up to an effective 1000 K: the 22 solute atoms need few rungs, and
# at λ = 0.3 the phi barriers are crossed within picoseconds.
SOLUTE = COMMON + """\
title: water cross-check, solute tempering
solute:
  atoms: protein
  effective_temperatures: {highest: 1000 K, count: 4}
run:
  cycle: 1 ps
  equilibration: 50 ps
  production: 1000 ps
"""

# 36 windows 10 deg apart around the whole circle; at 150 kJ/mol/rad² a window's width
# (sqrt(kT/k), 7.4 deg at 300 K) keeps neighbours overlapping on the steep flanks too.
UMBRELLA = COMMON + """\
title: water cross-check, umbrella windows along phi
umbrella:
  phi:
    centres: {from: -180 deg, to: 170 deg, count: 36}
    spring: 150 kJ/mol/rad**2
run:
  cycle: 1 ps
  equilibration: 10 ps
  production: 60 ps
"""


@pytest.mark.long
def test_solute_tempering_and_umbrella_windows_give_one_phi_delta_g(tmp_path):
    results = {}
    for name, text in (("solute", SOLUTE), ("umbrella", UMBRELLA)):
        path = tmp_path / f"{name}.yaml"
        path.write_text(text)
        folder = run_protocol(parse_protocol(text, path), tmp_path / name, progress=False)
        analysis = analyse_run(folder)
        basins = analysis.basins
        i, j = basins.names.index("negative"), basins.names.index("positive")
        results[name] = (basins.Delta_g[i, j], basins.d_Delta_g[i, j], analysis.uncertainty)
        print(name, results[name])
    (g_solute, d_solute, u_solute), (g_umbrella, d_umbrella, _) = results["solute"], results["umbrella"]
    combined = np.hypot(d_solute, d_umbrella)
    assert not u_solute.cut_short, u_solute       # a bar from blocks shorter than the correlation is too small
    assert combined < 0.75, (d_solute, d_umbrella)
    assert abs(g_solute - g_umbrella) < 3 * combined, (g_solute, g_umbrella, combined)
