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
