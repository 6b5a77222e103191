"""Capped alanine in TIP3P water (the bundled system alanine-tip3p): free-energy differences
from solute tempering against umbrella windows.

Source of the check: both runs sample one Boltzmann distribution at 300 K (the solute
ladder's λ = 1 condition is the unscaled system, tests/REFERENCES.md, "Boltzmann weights of
a solute ladder"; umbrella windows are unbiased by MBAR), so the two ΔG agree within their
combined standard error — 3 combined σ here (common practice for a one-off comparison).
A comparison is only worth something when both numbers have settled and their bars are
small: boost's own verdict on each ΔG must be 'settled' and the combined σ below a bound,
so a run too short to decide fails instead of passing on wide bars.

- (long) ψ: the helix side (ψ in [-120°, 50°)) against the extended side (ψ in
  [50°, -120°), through 180°), both with φ < 0. These interconvert within tens of
  picoseconds, so any error in the reduced potentials that pool the solute rungs at λ = 1
  shows as a shift. Run 2026-12-04 at a quarter of the lengths below (400 ps per rung,
  40 ps per window, 29 min on 2 cores): G(extended) − G(helix) −0.72 ± 0.40 kcal/mol from
  solute tempering, −1.19 ± 0.59 from umbrella windows, in agreement, but both verdicts
  'too few samples' (walker correlation 58 and 12 cycles), so the test failed as it
  should. The lengths below give each run about 30 of those correlation times (the
  bootstrap's 10 blocks of 3 each need that many); not run to the end yet.
- (long) φ: the φ < 0 side against φ > 0, the issue's original target. With 4 solute
  rungs up to an effective 1000 K and 1 ns each (2026-12-04) no walker reached φ > 0 at
  λ = 1 and boost's verdict on ΔG was 'too few samples' (8.3 ± 0.6 kcal/mol from a
  handful of samples). With the 8 rungs up to 3000 K below, 1 ns each, and 60 ps per
  umbrella window (2026-12-04, 85 min on 2 cores): 2.78 ± 1.81 kcal/mol from solute
  tempering, 2.62 ± 0.30 from umbrella windows, in agreement, but both 'too few samples'
  (walker correlation 52 and 10 cycles, so production spanned under 30 of them).
  Extended (2026-12-04) to 2 ns per rung and 320 ps per window: 2.59 ± 0.55 kcal/mol from
  solute tempering, 2.39 ± 0.18 from umbrella windows, again in agreement and again both
  'too few samples'. Umbrella windows: the walker correlation grew to 17 cycles, so 320
  cycles held only 19 of them; the production below is 640 ps. Solute tempering: its
  walker correlation fell to 42 cycles (11 round trips per walker) and production was
  long enough for the bootstrap's blocks, but the error bars are so much wider than
  MBAR's asymptotic ones that the φ > 0 population rests on about 3 independent samples
  and ΔG on about 1 (20 needed); the halves gave 0.6 % and 2.0 % of φ > 0. φ > 0 holds
  1.3 % at λ = 1, so few walkers bring it down the ladder. If the independent samples
  grow in proportion to production, 20 behind ΔG need about 16 times it: the production
  below is 32 ns per rung, about 30 hours on 2 cores (3.4 s per 1 ps cycle of 8 walkers),
  to be reached over many sittings.

Both are marked ``long`` (hours on 2 cores, outside the CI budget); run them with
``python -m pytest -m long``. With BOOST_LONG_RUNS set to a folder the runs are kept there,
so the hours can be spread over several sittings (runs_folder).
"""

import os
from pathlib import Path

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
  psi: {dihedral: ["resid 1 and name N", "resid 1 and name CA", "resid 1 and name C", "resid 2 and name N"]}
exchange: {pairs: adjacent}
analysis:
  energy_unit: kcal/mol
"""

PSI_BASINS = """\
basins:
  helix: {phi: [-180 deg, 0 deg], psi: [-120 deg, 50 deg]}
  extended: {phi: [-180 deg, 0 deg], psi: [50 deg, -120 deg]}
"""

PHI_BASINS = """\
basins:
  negative: {phi: [-180 deg, 0 deg]}
  positive: {phi: [0 deg, 180 deg]}
"""

# The 22 solute atoms need few rungs: four up to an effective 1000 K for psi. For phi
# that ladder never carried a walker to phi > 0 at λ = 1 (see above); eight up to 3000 K
# did (pilot, 150 ps: phi > 0 in 1 % of λ = 1 samples, 12 % at the next rung, 35 % at the
# top; neighbour acceptance 0.2 at the cold end, 0.4-0.7 above).
SOLUTE = """\
title: water cross-check, solute tempering
solute:
  atoms: protein
  effective_temperatures: {{highest: {highest}, count: {count}}}
run:
  cycle: 1 ps
  equilibration: {equilibration}
  production: {production}
"""

# 36 windows 10 deg apart around the whole circle; at 150 kJ/mol/rad² a window's width
# (sqrt(kT/k), 7.4 deg at 300 K) keeps neighbours overlapping on the steep flanks too.
UMBRELLA = """\
title: water cross-check, umbrella windows along {axis}
umbrella:
  {axis}:
    centres: {{from: -180 deg, to: 170 deg, count: 36}}
    spring: 150 kJ/mol/rad**2
run:
  cycle: 1 ps
  equilibration: {equilibration}
  production: {production}
"""


def runs_folder(tmp_path, check):
    """Where a check's runs go: under $BOOST_LONG_RUNS/<check> when that is set, so the hours
    of MD they take can be spread over several sittings (an interrupted run resumes, a
    finished one is reused, one whose protocol here gained production is extended), else
    a fresh temporary folder."""
    kept = os.environ.get("BOOST_LONG_RUNS")
    folder = Path(kept) / check if kept else tmp_path
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def run_and_compare(folder, protocols, basins, largest_sigma):
    """Run each protocol text, then compare their ΔG(first basin → second)."""
    results = {}
    for name, text in protocols.items():
        path = folder / f"{name}.yaml"
        path.write_text(text)
        analysis = analyse_run(run_protocol(parse_protocol(text, path), folder / name, progress=False))
        i, j = (analysis.basins.names.index(b) for b in basins)
        results[name] = (analysis.basins.Delta_g[i, j], analysis.basins.d_Delta_g[i, j],
                         analysis.verdicts.delta_g[(i, j)].word)
        print(name, results[name], analysis.uncertainty)
    (g_a, d_a, word_a), (g_b, d_b, word_b) = results.values()
    combined = np.hypot(d_a, d_b)
    assert word_a == word_b == "settled", results
    assert combined < largest_sigma, results
    assert abs(g_a - g_b) < 3 * combined, (results, combined)


@pytest.mark.long
def test_solute_tempering_and_umbrella_windows_give_one_psi_delta_g(tmp_path):
    run_and_compare(runs_folder(tmp_path, "psi"), {
        "solute": COMMON + PSI_BASINS + SOLUTE.format(highest="1000 K", count=4, equilibration="50 ps",
                                                      production="2000 ps"),
        "umbrella": COMMON + PSI_BASINS + UMBRELLA.format(axis="psi", equilibration="10 ps", production="480 ps"),
    }, ("helix", "extended"), largest_sigma=0.4)


@pytest.mark.long
def test_solute_tempering_and_umbrella_windows_give_one_phi_delta_g(tmp_path):
    run_and_compare(runs_folder(tmp_path, "phi"), {
        "umbrella": COMMON + PHI_BASINS + UMBRELLA.format(axis="phi", equilibration="10 ps", production="640 ps"),
        "solute": COMMON + PHI_BASINS + SOLUTE.format(highest="3000 K", count=8, equilibration="50 ps",
                                                      production="32000 ps"),
    }, ("negative", "positive"), largest_sigma=0.75)
