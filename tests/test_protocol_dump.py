"""Protocol dump: load -> dump -> load gives an equal Protocol, and the dump is a fixed point.

No outside value is involved: the loader is the reference, and every check is a round
trip through it. Equal means every field but the text, the path and the text's hash
(the places used in error messages of system specs are left out of comparisons). The
fuzzed protocols come from tests/test_protocol_fuzz.py's mutations of the examples.
"""

import dataclasses

import pytest
from conftest import DOUBLE_WELL, REPO
from hypothesis import given
from test_protocol_fuzz import _fuzz, check_loads_or_explains, tree_mutants

from boost.protocol import Protocol, load_protocol, parse_protocol
from boost.protocol_dump import dump_protocol
from boost.units import format_quantity, parse_quantity

SYSTEM = "system:\n  model: {name: double_well, barrier: 5 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}\n"


def assert_round_trip(protocol):
    """Dump, read back from the same path, compare; dump again and compare the texts."""
    text = dump_protocol(protocol)
    again = parse_protocol(text, protocol.path)
    assert dataclasses.replace(again, text=protocol.text, path=protocol.path, sha256=protocol.sha256) == protocol
    assert dump_protocol(again) == text
    assert parse_protocol(dump_protocol(again), protocol.path).sha256 == again.sha256
    return text


@pytest.mark.parametrize("path", sorted((REPO / "protocols").glob("*.yaml")), ids=lambda p: p.stem)
def test_every_example_protocol_round_trips(path):
    text = assert_round_trip(load_protocol(path))
    assert "temperature: 300 K\n" in text            # the examples' own values, with units
    assert "memory: 1 GiB\n" in text                 # a default, written out


EVERY_KEY = """\
protocol: 1
title: 'every key: a test protocol'
system:
  model: {name: double_well, barrier: 5 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}
seed: 0
temperature: 310 K
timestep: 1 fs
friction: 5/ps
pressure: 1.01325 bar
platform: {name: CPU, threads: 2, deterministic: false, workers: 2}
coordinates:
  r: {distance: ["name CA", {centre: [0, 1, 2]}]}
  bend: {angle: [0, 1, {centre: "resname ALA"}]}
  twist: {dihedral: [0, 1, 2, 3]}
  z: {position: 0, axis: z}
  mix: {combination: {r: 0.5, z: -1.5}}
flat_bottom:
  - {coordinate: r, from: 0.2 nm, to: 1.5 nm, spring: 1000 kJ/mol/nm**2}
  - {coordinate: bend, to: 150 deg, spring: 50 kJ/mol/rad**2}
umbrella:
  twist: {centres: {from: -180 deg, to: 90 deg, count: 4}, spring: [100 kJ/mol/rad**2, 200 kJ/mol/rad**2,
          300 kJ/mol/rad**2, 400 kJ/mol/rad**2]}
  mix: {centres: [0.1 nm, 0.25 nm, 0.333 nm], spring: 500 kJ/mol/nm**2}
temperatures: [310 K, 330 K, 352.5 K]
solute: {atoms: "resname ALA and not element H", scales: [1, 0.75, 0.6]}
exchange: {pairs: any, attempts: 2}
run:
  cycle: 0.25 ps
  equilibration: 1 ps
  production: 10 ps
  frame_every: 0.5 ps
  checkpoint_every: 2.5 ps
  minimise: false
  retries: 3
  builds_on: ../runs/first try
basins:
  "wrapped one": {twist: [150 deg, -150 deg], r: [0 nm, 0.5 nm]}
  other: {twist: [-90 deg, 90 deg]}
analysis:
  bins:
    twist: {from: -180 deg, to: 180 deg, count: 72}
    r: {from: 0 nm, to: 2 nm, count: 20}
  energy_unit: kcal/mol
  memory: 768 MiB
  uncertainty: {method: bootstrap, resamples: 500, block: 2.5 ps}
"""


def test_a_protocol_with_every_key_round_trips(tmp_path):
    protocol = parse_protocol(EVERY_KEY, tmp_path / "protocol.yaml")
    text = assert_round_trip(protocol)
    for line in ("pressure: 1.01325 bar", "friction: 5/ps", "timestep: 0.001 ps", "memory: 768 MiB",
                 "block: 2.5 ps", "checkpoint_every: 2.5 ps", "frame_every: 0.5 ps", "- coordinate: bend",
                 "  atoms: resname ALA and not element H\n  scales: [1.0, 0.75, 0.6]\n"):
        assert line in text, line
    assert "to: 150 deg" in text and "from: -180 deg" in text and "twist: [150 deg, -150 deg]" in text


def test_solute_scales_are_written_as_their_range_or_as_numbers(tmp_path):
    ranged = DOUBLE_WELL + "solute: {atoms: all, scales: {lowest: 0.4, count: 5}}\n"
    dumped = assert_round_trip(parse_protocol(ranged, tmp_path / "protocol.yaml"))
    assert "  scales:\n    lowest: 0.4\n    count: 5\n" in dumped
    # effective temperatures are written as the scales T / T_k they give, exactly
    hot = DOUBLE_WELL + "solute: {atoms: all, effective_temperatures: [300 K, 350 K, 420 K]}\n"
    protocol = parse_protocol(hot, tmp_path / "protocol.yaml")
    dumped = assert_round_trip(protocol)
    assert "effective_temperatures" not in dumped and "scales: [1.0, 0.8571428571428571, 0.7142857142857143]" in dumped
    assert parse_protocol(dumped, tmp_path / "protocol.yaml").solute.scales == (1.0, 300 / 350, 300 / 420)


def test_a_geometric_ladder_is_written_as_its_range(tmp_path):
    text = DOUBLE_WELL + "temperatures: {lowest: 300 K, highest: 450 K, count: 5}\nexchange: {}\n"
    dumped = assert_round_trip(parse_protocol(text, tmp_path / "protocol.yaml"))
    assert "lowest: 300 K" in dumped and "highest: 450 K" in dumped and "count: 5" in dumped


def test_angles_are_written_in_degrees_or_exactly_in_radians(tmp_path):
    # a window list in rad whose values have no exact decimal number of degrees
    centres = [k * 0.001 for k in range(1, 200)]
    kinds = {format_quantity(value, "angle").split()[1] for value in centres}
    assert all(parse_quantity(format_quantity(v, "angle"), "angle", place="") == v for v in centres)
    assert kinds == {"deg", "rad"}
    windows = f"umbrella:\n  t: {{centres: [{', '.join(f'{c!r} rad' for c in centres)}], spring: 1 kJ/mol/rad**2}}\n"
    text = DOUBLE_WELL.replace("  x: {position: 0, axis: x}\n", "  x: {position: 0, axis: x}\n  t: {dihedral: [0, 1, 2, 3]}\n")
    assert_round_trip(parse_protocol(text + windows, tmp_path / "protocol.yaml"))


INLINE_SYSTEMS = {
    "model-double-well": "{model: {name: double_well, barrier: 12.5 kJ/mol, tilt: -2 kJ/mol}}",
    "model-muller-brown": "{model: {name: muller_brown, length_scale: 0.2 nm}, title: surface}",
    "model-harmonic-well": "{model: {name: harmonic_well, particles: 4, spring: 250 kJ/mol/nm**2}}",
    "peptide": "{peptide: {sequence: ACE ALA GLY NME, phi: [-80 deg, 60 deg], psi: 75 deg}, "
               "forcefield: amber14-all.xml, implicit_solvent: obc2, nonbonded: {method: cutoff, cutoff: 1.2 nm}, "
               "constraints: all_bonds}",
    "pdb": "{pdb: files/ala.pdb, forcefield: [amber14-all.xml, amber14/tip3pfb.xml], "
           "water_box: {padding: 0.8 nm, water_model: tip3p, ionic_strength: 0.15 molar}, nonbonded: {method: pme}}",
    "amber": "{amber: {prmtop: a.prmtop, inpcrd: a.inpcrd}, implicit_solvent: gbn2, constraints: none}",
    "gromacs": "{gromacs: {top: g.top, gro: g.gro, include_dir: ff}, nonbonded: {cutoff: 0.9 nm}}",
    "charmm": "{charmm: {psf: c.psf, coordinates: c.crd, parameters: c.prm, box: 3 nm}}",
    "charmm-box": "{charmm: {psf: c.psf, coordinates: c.pdb, parameters: [a.prm, b.str], box: [3 nm, 4 nm, 5 nm]}}",
    "serialized": "{serialized: {system: s.xml, pdb: s.pdb}}",
}


@pytest.mark.parametrize("system", list(INLINE_SYSTEMS.values()), ids=list(INLINE_SYSTEMS))
def test_inline_system_specs_round_trip(tmp_path, system):
    # the files need not exist: a spec is read without opening them
    protocol = parse_protocol(DOUBLE_WELL.replace(SYSTEM, f"system: {system}\n"), tmp_path / "protocol.yaml")
    assert protocol.system.reference is None
    assert_round_trip(protocol)


def test_a_dumped_peptide_spec_builds_the_same_system(tmp_path):
    from boost.systems import build_system

    text = DOUBLE_WELL.replace(SYSTEM, f"system: {INLINE_SYSTEMS['peptide']}\n")
    protocol = parse_protocol(text, tmp_path / "protocol.yaml")
    again = parse_protocol(dump_protocol(protocol), tmp_path / "protocol.yaml")
    first, second = build_system(protocol.system), build_system(again.system)
    assert (first.positions == second.positions).all()
    assert first.system.getNumParticles() == second.system.getNumParticles() == 29    # ACE-ALA-GLY-NME


def test_systems_given_by_name_or_file_are_written_as_given(tmp_path):
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "sys.yaml").write_text("model: {name: muller_brown}\n")
    for system in ("sub/sys.yaml", "double-well", "nowhere.yaml"):
        protocol = parse_protocol(DOUBLE_WELL.replace(SYSTEM, f"system: {system}\n"), tmp_path / "protocol.yaml")
        assert f"\nsystem: {system}\n" in assert_round_trip(protocol)


def test_text_that_needs_quoting_survives(tmp_path):
    text = DOUBLE_WELL.replace("title: test double well", "title: 'yes: 300'").replace(
        "coordinates:\n  x: {position: 0, axis: x}",
        "coordinates:\n  x: {position: \"resname MDL and name P\", axis: x}\n"
        "  y: {distance: ['null', \"x\\x1b[31m\"]}")
    protocol = parse_protocol(text, tmp_path / "protocol.yaml")
    assert protocol.title == "yes: 300"
    assert_round_trip(protocol)


@given(tree_mutants())
@_fuzz(max_examples=150)
def test_every_protocol_the_fuzzer_loads_round_trips(text):
    protocol = check_loads_or_explains(text)
    if isinstance(protocol, Protocol):
        assert_round_trip(protocol)
