"""Protocol parsing: valid files become frozen objects; every bad input is one clear line."""

import math

import pytest

from boost.exceptions import InputError, ProtocolError
from boost.protocol import load_protocol, parse_protocol
from conftest import double_well_protocol


def edit(text, old, new):
    assert old in text, old
    return text.replace(old, new, 1)


def test_valid_protocol_reads_units(write_protocol, double_well_text):
    protocol = load_protocol(write_protocol(double_well_text))
    assert protocol.temperature == 300.0
    assert protocol.timestep == pytest.approx(0.002)
    assert protocol.run.steps_per_cycle == 50
    assert protocol.run.equilibration_cycles == 10 and protocol.run.production_cycles == 50
    assert protocol.run.frame_every == 10
    assert protocol.basins["left"]["x"] == (-1.0, 0.0)
    assert protocol.temperatures == (300.0,) and protocol.umbrella == ()


def test_umbrella_and_ladder(write_protocol):
    text = double_well_protocol(umbrella={"x": "{centres: {from: -0.15 nm, to: 0.15 nm, count: 7}, spring: 500 kJ/mol/nm**2}"},
                                temperatures="{lowest: 300 K, highest: 600 K, count: 4}", exchange="{pairs: adjacent}")
    protocol = load_protocol(write_protocol(text))
    axis = protocol.umbrella[0]
    assert len(axis.centres) == 7 and axis.centres[0] == pytest.approx(-0.15)
    assert axis.springs == (500.0,) * 7
    # geometric ladder: constant ratio (common practice, Predescu et al. 2004)
    ratios = [b / a for a, b in zip(protocol.temperatures, protocol.temperatures[1:])]
    assert ratios == pytest.approx([2 ** (1 / 3)] * 3)
    assert protocol.n_windows == 7


def test_dihedral_umbrella_in_degrees(write_protocol):
    text = """\
    protocol: 1
    system: alanine-vacuum
    seed: 1
    temperature: 300 K
    timestep: 2 fs
    coordinates:
      phi: {dihedral: [4, 6, 8, 14]}
    umbrella:
      phi: {centres: [-60 deg, 60 deg], spring: [100 kJ/mol/rad**2, 200 kJ/mol/rad**2]}
    run: {production: 1 ps}
    basins:
      wrap: {phi: [150 deg, -150 deg]}
    """
    protocol = load_protocol(write_protocol(text))
    assert protocol.umbrella[0].centres == pytest.approx((-math.pi / 3, math.pi / 3))
    assert protocol.umbrella[0].springs == (100.0, 200.0)
    assert protocol.basins["wrap"]["phi"] == pytest.approx((math.radians(150), math.radians(-150)))


BAD = [
    # (old, new, key path and expectation in the message)
    ("timestep: 2 fs", "timestep: 2", r"protocol\.yaml: timestep must be a time .*bare number"),
    ("timestep: 2 fs", "timestep: -2 fs", r"protocol\.yaml: timestep must be positive"),
    ("timestep: 2 fs", "timestep: 2 nm", r"protocol\.yaml: timestep must be a time .*not a time"),
    ("timestep: 2 fs", "timestpe: 2 fs", r"protocol\.yaml: timestpe is not a known key\. Did you mean 'timestep'\?"),
    ("temperature: 300 K", "temperature: 0 K", r"protocol\.yaml: temperature must be positive"),
    ("cycle: 0.1 ps", "cycle: 0.1", r"protocol\.yaml: run\.cycle must be a time"),
    ("cycle: 0.1 ps", "cycle: 0.003 ps", r"protocol\.yaml: run\.cycle must be a whole number of timesteps"),
    ("production: 5 ps", "production: 5.05 ps", r"run\.production must be a whole number of cycles"),
    ("production: 5 ps", "productoin: 5 ps", r"run\.productoin is not a known key\. Did you mean 'production'"),
    ("protocol: 1", "protocol: 7", r"protocol\.yaml: protocol must be the schema version 1"),
    ("seed: 5", "seed: -1", r"protocol\.yaml: seed must be a whole number of at least 0"),
    ("seed: 5", "seed: five", r"protocol\.yaml: seed must be a whole number"),
    ("x: {position: 0, axis: x}", "x: {position: 0, axis: w}", r"coordinates\.x\.axis must be one of 'x', 'y', 'z'"),
    ("x: {position: 0, axis: x}", "x: {dihedral: [0, 1]}", r"coordinates\.x\.dihedral must be a list of 4"),
    ("x: {position: 0, axis: x}", "cycle: {position: 0, axis: x}", r"coordinates\.cycle must be named by an identifier"),
    ("left: {x: [-1 nm, 0 nm]}", "left: {x: [-1, 0 nm]}", r"basins\.left\.x\[0\] must be a length .*bare number"),
    ("left: {x: [-1 nm, 0 nm]}", "left: {y: [-1 nm, 0 nm]}", r"basins\.left\.y must be the name of a coordinate"),
    ("left: {x: [-1 nm, 0 nm]}", "left: {x: [0 nm, -1 nm]}", r"basins\.left\.x must be \[lower, upper\]"),
    ("seed: 5\n", "seed: 5\nseed: 6\n", r"protocol\.yaml: is not valid YAML at line 6.*duplicate key 'seed'"),
    ("title: test double well", "title: [unclosed", r"protocol\.yaml: is not valid YAML at line \d+"),
    # run keys of earlier schema versions
    ("frame_every: 1 ps", "frame_interval: 1 ps",
     r"protocol\.yaml: run\.frame_interval is no longer read; write run\.frame_every instead"),
    ("frame_every: 1 ps", "checkpoint_interval: 1 ps",
     r"protocol\.yaml: run\.checkpoint_interval is no longer read; write run\.checkpoint_every instead"),
    ("seed: 5", "seed: !!python/object:os.system 5", r"protocol\.yaml: is not valid YAML"),
]


@pytest.mark.parametrize("old, new, message", BAD)
def test_bad_input_is_one_clear_line(write_protocol, double_well_text, old, new, message):
    path = write_protocol(edit(double_well_text, old, new))
    with pytest.raises(ProtocolError, match=message) as info:
        load_protocol(path)
    assert "\n" not in str(info.value)


BAD_EXTRA = [
    ("umbrella:\n  x: {centres: {from: 0 nm, to: 0.1 nm, count: 1}, spring: 1 kJ/mol/nm**2}\n",
     r"umbrella\.x\.centres\.count must be a whole number of at least 2"),
    ("umbrella:\n  x: {centres: [0 nm], spring: -1 kJ/mol/nm**2}\n", r"umbrella\.x\.spring must be positive"),
    ("umbrella:\n  x: {centres: [0 nm], spring: 1 kJ/mol/rad**2}\n", r"umbrella\.x\.spring must be an energy per length squared"),
    ("umbrella:\n  x: {centres: [0 nm, 1 nm], spring: [1 kJ/mol/nm**2]}\n", r"umbrella\.x\.spring must be one spring constant, or a list of 2"),
    ("umbrella:\n  y: {centres: [0 nm], spring: 1 kJ/mol/nm**2}\n", r"umbrella\.y must be the name of a coordinate"),
    ("temperatures: [300 K, 290 K]\n", r"temperatures must be a strictly increasing list"),
    ("temperatures: [300 K]\n", r"temperatures must be a list of at least 2 items"),
    ("temperatures: [300 K, -3 K]\n", r"temperatures\[1\] must be positive"),
    ("exchange: {pairs: adjacent}\n", r"protocol\.yaml: exchange must be used with a ladder"),
    ("umbrella:\n  x: {centres: [0 nm, 0 nm], spring: 1 kJ/mol/nm**2}\n", r"umbrella\.x must be windows that differ"),
    ("temperatures: [300 K, 400 K]\nexchange: {attempts: 0}\n", r"exchange\.attempts must be a whole number of at least 1"),
    ("temperatures: [300 K, 400 K]\nexchange: {pairs: random}\n", r"exchange\.pairs must be one of 'adjacent', 'any'"),
    ("flat_bottom:\n  - {coordinate: x, spring: 1 kJ/mol/nm**2}\n",
     r"flat_bottom\[0\] must be a flat-bottom restraint with a 'from' or a 'to'"),
    ("flat_bottom:\n  - {coordinate: x, from: 1 nm, to: 0 nm, spring: 1 kJ/mol/nm**2}\n",
     r"flat_bottom\[0\]\.to must be above 'from'"),
    # spellings of earlier schema versions: an error that names the replacement, no alias
    ("walls:\n  - {coordinate: x, upper: 0.5 nm, spring: 1 kJ/mol/nm**2}\n",
     r"protocol\.yaml: walls is no longer read; write flat_bottom \(a list of \{coordinate, from, to, spring\}\) instead"),
    ("flat_bottom:\n  - {coordinate: x, upper: 0.5 nm, spring: 1 kJ/mol/nm**2}\n",
     r"flat_bottom\[0\]\.upper is no longer read; write 'to' instead"),
    ("flat_bottom:\n  - {coordinate: x, lower: 0.5 nm, spring: 1 kJ/mol/nm**2}\n",
     r"flat_bottom\[0\]\.lower is no longer read; write 'from' instead"),
    ("temperatures: [300 K, 400 K]\nexchange: {scheme: neighbours}\n",
     r"exchange\.scheme is no longer read; write exchange\.pairs \(adjacent: neighbours on the ladder; any: every pair\)"),
    ("temperatures: [300 K, 400 K]\nexchange: {pairs: all_pairs}\n", r"exchange\.pairs must be one of 'adjacent', 'any'"),
    ("analysis: {energy_unit: eV}\n", r"analysis\.energy_unit must be one of"),
    ("analysis: {memory: 100 MiB}\n", r"analysis\.memory must be at least 512 MiB"),
    ("analysis: {memory: 2 nm}\n", r"analysis\.memory must be an amount of memory"),
    ("analysis: {uncertainty: bootstrap}\n", r"analysis\.uncertainty must be a mapping"),
    ("analysis: {uncertainty: {method: jackknife}}\n",
     r"analysis\.uncertainty\.method must be one of 'auto', 'asymptotic', 'bootstrap'"),
    ("analysis: {uncertainty: {resamples: 5}}\n",
     r"analysis\.uncertainty\.resamples must be a whole number of at least 20 and at most 100000"),
    ("analysis: {uncertainty: {resamples: 200.5}}\n", r"analysis\.uncertainty\.resamples must be a whole number"),
    ("analysis: {uncertainty: {block: 0.15 ps}}\n",
     r"analysis\.uncertainty\.block must be a whole number of cycles \(0\.1 ps each\) for a bootstrap block"),
    ("analysis: {uncertainty: {block: 20}}\n", r"analysis\.uncertainty\.block must be 'auto' or a time such as '2 ps'"),
    ("analysis: {uncertainty: {block: 20 K}}\n", r"analysis\.uncertainty\.block must be a time"),
    ("analysis: {uncertainty: {block: 0 ps}}\n",
     r"analysis\.uncertainty\.block must be between one cycle \(0\.1 ps\) and the production \(5 ps\)"),
    ("analysis: {uncertainty: {block: 6 ps}}\n", r"analysis\.uncertainty\.block must be between one cycle"),
    ("analysis: {uncertainty: {blocks: auto}}\n",
     r"analysis\.uncertainty\.blocks is not a known key\. Did you mean 'block'\?"),
    ("umbrella:\n  d: {centres: [-0.1 nm, 0.2 nm], spring: 1 kJ/mol/nm**2}\ncoordinates:\n  x: {position: 0, axis: x}\n",
     r"duplicate key"),
]

BAD_COORDINATES = [
    ("d: {distance: [0, 0]}", "umbrella:\n  d: {centres: [-0.1 nm, 0.2 nm], spring: 1 kJ/mol/nm**2}\n",
     r"umbrella\.d\.centres must be centres within the range of d, a distance \(0 nm or more\)"),
    ("a: {angle: [0, 0, 0]}", "umbrella:\n  a: {centres: [10 deg, 190 deg], spring: 1 kJ/mol/rad**2}\n",
     r"umbrella\.a\.centres must be centres within the range of a, a angle"),
    ("p: {dihedral: [0, 0, 0, 0]}", "umbrella:\n  p: {centres: [10 deg, 200 deg], spring: 1 kJ/mol/rad**2}\n",
     r"umbrella\.p\.centres must be centres within the range of p, a dihedral"),
    ("p: {dihedral: [0, 0, 0, 0]}", "basins:\n  one: {p: [-180 deg, 0 deg]}\n  two: {p: [-10 deg, 90 deg]}\n",
     r"basins\.two must be disjoint from basin 'one'"),
    ("p: {dihedral: [0, 0, 0, 0]}", "basins:\n  one: {p: [150 deg, -150 deg]}\n  two: {p: [-160 deg, 0 deg]}\n",
     r"basins\.two must be disjoint from basin 'one'"),

]


@pytest.mark.parametrize("coordinate, extra, message", BAD_COORDINATES)
def test_bad_windows_and_basins(write_protocol, coordinate, extra, message):
    name, value = coordinate.split(": ", 1)
    text = double_well_protocol(coordinates={name: value}, basins=None) + extra
    with pytest.raises(ProtocolError, match=message):
        load_protocol(write_protocol(text))


def test_disjoint_wrapped_basins_are_fine(write_protocol):
    text = double_well_protocol(coordinates={"p": "{dihedral: [0, 0, 0, 0]}"},
                                basins={"left": None, "right": None, "one": "{p: [150 deg, -150 deg]}",
                                        "two": "{p: [-150 deg, 150 deg]}"})
    assert set(load_protocol(write_protocol(text)).basins) == {"one", "two"}


@pytest.mark.parametrize("extra, message", BAD_EXTRA)
def test_bad_sampling_input(write_protocol, double_well_text, extra, message):
    with pytest.raises(ProtocolError, match=message):
        load_protocol(write_protocol(double_well_text + extra))


def test_uncertainty_settings_are_read(write_protocol, double_well_text):
    protocol = load_protocol(write_protocol(double_well_text))
    assert (protocol.analysis.uncertainty.method, protocol.analysis.uncertainty.resamples,
            protocol.analysis.uncertainty.block_cycles) == ("auto", 200, 0)
    text = double_well_protocol(analysis="{uncertainty: {method: bootstrap, resamples: 50, block: 1.2 ps}}")
    settings = load_protocol(write_protocol(text)).analysis.uncertainty
    assert (settings.method, settings.resamples, settings.block_cycles) == ("bootstrap", 50, 12)  # 0.1 ps cycles


def test_missing_file_is_input_error(tmp_path):
    with pytest.raises(InputError, match=r"nowhere\.yaml: protocol file not found"):
        load_protocol(tmp_path / "nowhere.yaml")


def test_required_key_missing(write_protocol):
    with pytest.raises(ProtocolError, match=r"protocol\.yaml: seed is required but missing"):
        load_protocol(write_protocol(double_well_protocol(seed=None)))


def test_top_level_must_be_mapping(tmp_path):
    with pytest.raises(ProtocolError, match=r"p\.yaml: \(top level\) must be a mapping"):
        parse_protocol("- just\n- a list\n", tmp_path / "p.yaml")


def test_the_default_checkpoint_interval_fits_any_cycle(write_protocol, double_well_text):
    # a cycle that does not divide 10 ps must not make the key the user never wrote an error
    text = double_well_protocol(run={"cycle": "3 ps", "equilibration": "3 ps", "production": "30 ps", "frame_every": "3 ps"})
    assert load_protocol(write_protocol(text)).run.checkpoint_every == 3          # 9 ps, nearest to 10 ps
    assert load_protocol(write_protocol(double_well_text)).run.checkpoint_every == 100


# -- solute scaling ----------------------------------------------------------------------
def solute(section):
    """The test double well with a solute section (its scales are read without the system's atoms)."""
    return double_well_protocol(solute=section)


def test_solute_scales_as_a_list_or_a_geometric_range(write_protocol):
    from boost.conditions import build_conditions, ladder_shape

    listed = load_protocol(write_protocol(solute("{atoms: all, scales: [1, 0.8, 0.5]}")))
    assert listed.solute.atoms == "all" and listed.solute.scales == (1.0, 0.8, 0.5)
    ranged = load_protocol(write_protocol(solute("{atoms: all, scales: {lowest: 0.5, count: 4}}")))
    # geometric: constant ratio from 1 down to the lowest (common practice, as for temperature ladders)
    assert ranged.solute.scales[0] == 1.0 and ranged.solute.scales[-1] == 0.5
    assert [b / a for a, b in zip(ranged.solute.scales, ranged.solute.scales[1:])] == pytest.approx([0.5 ** (1 / 3)] * 3)
    # conditions: temperatures slowest, then solute scales, then windows (boost.conditions)
    text = double_well_protocol(solute="{atoms: all, scales: [1, 0.5]}", temperatures="[300 K, 330 K]",
                                umbrella={"x": "{centres: [-0.1 nm, 0 nm, 0.1 nm], spring: 500 kJ/mol/nm**2}"})
    protocol = load_protocol(write_protocol(text))
    conditions = build_conditions(protocol)
    assert ladder_shape(protocol) == (2, 2, 3) and len(conditions) == 12
    assert [(c.temperature, c.solute_scale, c.centres[0]) for c in conditions[:4]] == \
        [(300.0, 1.0, -0.1), (300.0, 1.0, 0.0), (300.0, 1.0, 0.1), (300.0, 0.5, -0.1)]
    assert conditions[6].temperature == 330.0 and conditions[6].solute_scale == 1.0
    assert all(c.solute_scale == 1.0 for c in build_conditions(load_protocol(write_protocol(DOUBLE_WELL_TEXT))))


DOUBLE_WELL_TEXT = double_well_protocol()


def test_effective_temperatures_become_scales_at_the_protocol_temperature(write_protocol):
    # λ = β_m / β_0 = T_0 / T_m (Wang, Friesner & Berne 2011; tests/REFERENCES.md, "Solute scaling")
    listed = load_protocol(write_protocol(solute("{atoms: all, effective_temperatures: [300 K, 400 K, 600 K]}")))
    assert listed.solute.scales == (1.0, 0.75, 0.5)
    ranged = load_protocol(write_protocol(solute("{atoms: all, effective_temperatures: {highest: 600 K, count: 3}}")))
    assert ranged.solute.scales == pytest.approx((1.0, 2 ** -0.5, 0.5)) and ranged.solute.scales[0] == 1.0
    # in °C too: the first rung must be the protocol's temperature, whatever its unit
    celsius = load_protocol(write_protocol(solute("{atoms: all, effective_temperatures: [26.85 degC, 600 K]}")))
    assert celsius.solute.scales == (1.0, 0.5)


BAD_SOLUTE = [
    ("{atoms: all, scales: [1, 1.5]}", r"protocol\.yaml: solute\.scales\[1\] must be in \(0, 1\]"),
    ("{atoms: all, scales: [1, 0]}", r"protocol\.yaml: solute\.scales\[1\] must be in \(0, 1\]"),
    ("{atoms: all, scales: [1, -0.5]}", r"solute\.scales\[1\] must be in \(0, 1\]"),
    ("{atoms: all, scales: [1, .nan]}", r"solute\.scales\[1\] must be a finite number"),
    ("{atoms: all, scales: [1, 0.5 K]}", r"solute\.scales\[1\] must be a plain number"),
    ("{atoms: all, scales: [0.8, 0.5]}", r"solute\.scales\[0\] must be 1 \(the first rung is the physical"),
    ("{atoms: all, scales: [1, 0.5, 0.7]}", r"solute\.scales must be solute scales falling strictly from 1"),
    ("{atoms: all, scales: [1, 1]}", r"solute\.scales must be solute scales falling strictly from 1"),
    ("{atoms: all, scales: [1]}", r"solute\.scales must be a list of at least 2 items"),
    ("{atoms: all, scales: {lowest: 1.5, count: 3}}", r"solute\.scales\.lowest must be in \(0, 1\]"),
    ("{atoms: all, scales: {lowest: 0, count: 3}}", r"solute\.scales\.lowest must be in \(0, 1\]"),
    ("{atoms: all, scales: {lowest: 1, count: 3}}", r"solute\.scales\.lowest must be below 1"),
    ("{atoms: all, scales: {lowest: 0.5, count: 1}}", r"solute\.scales\.count must be a whole number of at least 2"),
    ("{atoms: all, scales: {lowest: 0.5, highest: 1, count: 3}}", r"solute\.scales\.highest is not a known key"),
    ("{atoms: all, effective_temperatures: [310 K, 400 K]}",
     r"solute\.effective_temperatures\[0\] must be the protocol's temperature \(300 K\)"),
    ("{atoms: all, effective_temperatures: [300 K, 280 K]}",
     r"solute\.effective_temperatures must be a strictly increasing list of temperatures"),
    ("{atoms: all, effective_temperatures: [300 K, 400]}", r"solute\.effective_temperatures\[1\] must be a temperature"),
    ("{atoms: all, effective_temperatures: {highest: 250 K, count: 3}}",
     r"solute\.effective_temperatures\.highest must be above the protocol's temperature \(300 K\)"),
    ("{atoms: all, scales: [1, 0.5], effective_temperatures: [300 K, 600 K]}",
     r"protocol\.yaml: solute must be a mapping with 'atoms' and exactly one of 'scales' or 'effective_temperatures'"),
    ("{atoms: all}", r"solute must be a mapping with 'atoms' and exactly one of"),
    ("{scales: [1, 0.5]}", r"protocol\.yaml: solute\.atoms is required but missing"),
    ("{atoms: '', scales: [1, 0.5]}", r"solute\.atoms must be a non-empty text"),
    ("{atoms: [0, 1], scales: [1, 0.5]}", r"solute\.atoms must be a non-empty text"),
    ("{atoms: all, scale: [1, 0.5]}", r"solute\.scale is not a known key\. Did you mean 'scales'\?"),
    ("[1, 0.5]", r"protocol\.yaml: solute must be a mapping"),
    ("{atoms: all, scales: 0.5}", r"solute\.scales must be a list of solute scales \[1, \.\.\.\] or \{lowest, count\}"),
    ("{atoms: all, effective_temperatures: 600 K}", r"solute\.effective_temperatures must be a list of temperatures"),
]


@pytest.mark.parametrize("section, message", BAD_SOLUTE)
def test_bad_solute_section_is_one_clear_line(write_protocol, section, message):
    with pytest.raises(ProtocolError, match=message) as info:
        load_protocol(write_protocol(solute(section)))
    assert "\n" not in str(info.value)


def test_exchange_along_solute_scales_alone_is_a_ladder(write_protocol):
    protocol = load_protocol(write_protocol(double_well_protocol(solute="{atoms: all, scales: [1, 0.5]}",
                                                                 exchange="{pairs: adjacent}")))
    assert protocol.exchange is not None


SOLVATED = """\
protocol: 1
system:
  peptide: {sequence: [ACE, ALA, NME]}
  water_box: {padding: 0.5 nm}
  nonbonded: {method: pme, cutoff: 0.6 nm}
seed: 1
temperature: 300 K
timestep: 2 fs
run: {cycle: 0.1 ps, production: 1 ps}
"""


@pytest.mark.parametrize("text, atoms, message", [
    (SOLVATED, "resname XYZ", r"protocol\.yaml: solute\.atoms must select at least one atom\. Got 'resname XYZ'"),
    (SOLVATED, "resname ALA and", r"protocol\.yaml: solute\.atoms must be an mdtraj selection"),
    (SOLVATED, "all", r"protocol\.yaml: solute\.atoms must select the solute only, not the solvent around it.*"
                      r"matches all \d+ atoms of a system with solvent"),
    (SOLVATED.replace("  water_box: {padding: 0.5 nm}\n  nonbonded: {method: pme, cutoff: 0.6 nm}\n",
                      "  implicit_solvent: obc2\n"), "resname ALA",
     r"protocol\.yaml: solute\.atoms: the system's force \d+ \((GBSAOBCForce|CustomGBForce)\) acts on solute atoms"),
])
def test_a_solute_the_build_cannot_scale_is_one_line_before_any_md(write_protocol, text, atoms, message):
    from boost.plan import make_plan

    protocol = load_protocol(write_protocol(text + f"solute: {{atoms: {atoms!r}, scales: [1, 0.5]}}\n"))
    with pytest.raises(ProtocolError, match=message) as info:
        make_plan(protocol, probe=False)           # the build stage: no walker made, no step taken
    assert "\n" not in str(info.value)


def test_the_whole_molecule_in_vacuum_may_be_the_solute(write_protocol):
    from boost.plan import make_plan

    text = SOLVATED.replace("  water_box: {padding: 0.5 nm}\n  nonbonded: {method: pme, cutoff: 0.6 nm}\n", "")
    plan = make_plan(load_protocol(write_protocol(text + "solute: {atoms: all, scales: [1, 0.5]}\n")), probe=False)
    assert plan.solute.solute == tuple(range(22)) and plan.n_walkers == 2


def test_propose_says_it_does_not_plan_solute_ladders(write_protocol):
    from boost.proposal import what_to_plan

    protocol = load_protocol(write_protocol(solute("{atoms: all, scales: [1, 0.5]}")))
    with pytest.raises(ProtocolError, match=r"protocol\.yaml: solute has a ladder of solute scales; boost propose plans"):
        what_to_plan(protocol)
