"""Protocol limits: sizes no real study reaches are refused in one line, before anything grows.

Each limit is tested at its real value (boost.limits), with the value at the limit accepted
where that is cheap. The contract checked (one line naming file and key path, exit code 2,
nothing written) is the project's rule for bad input; the periodicity of a dihedral
(-180 deg and 180 deg are one angle) is common practice.
"""

import math
import subprocess
import sys
import tracemalloc

import pytest
from conftest import DOUBLE_WELL, double_well_protocol

from boost.exceptions import InputError, ProtocolError
from boost.limits import (MAX_CONDITIONS, MAX_COUNT, MAX_SPEC_BYTES, MAX_SWAP_ATTEMPTS, MAX_SWAP_PROPOSALS,
                          MAX_TITLE_LENGTH, MAX_WALKERS)
from boost.protocol import load_protocol, parse_protocol

PATH = "protocol.yaml"
DIHEDRALS = {"phi": "{dihedral: [0, 1, 2, 3]}", "psi": "{dihedral: [1, 2, 3, 4]}"}


def protocol(dihedrals=False, **changes):
    """The test double well with ``changes`` (see conftest), and dihedrals phi and psi if asked."""
    return double_well_protocol(**changes, **({"coordinates": DIHEDRALS} if dihedrals else {}))


def grid(*counts, temperatures=1):
    """Umbrella windows along x (and y) with these counts, times a ladder of ``temperatures``."""
    umbrella = {name: f"{{centres: {{from: -1 nm, to: 1 nm, count: {count}}}, spring: 100 kJ/mol/nm**2}}"
                for name, count in zip("xy", counts)}
    ladder = f"{{lowest: 300 K, highest: 600 K, count: {temperatures}}}" if temperatures > 1 else None
    return protocol(coordinates={"y": "{position: 0, axis: y}" if len(counts) > 1 else None},
                    umbrella=umbrella, temperatures=ladder)


def refused(text, pattern):
    with pytest.raises(ProtocolError, match=pattern) as info:
        parse_protocol(text, PATH)
    message = str(info.value)
    assert message.startswith(f"{PATH}: ") and "\n" not in message and "\r" not in message, message
    return message


# -- conditions and walkers --------------------------------------------------------------
def test_a_solute_ladder_counts_against_the_bounds():
    refused(protocol(solute=f"{{atoms: all, scales: {{lowest: 0.5, count: {MAX_COUNT + 1}}}}}"),
            rf"solute\.scales\.count must be a whole number of at least 2 and at most {MAX_COUNT}")
    refused(protocol(solute=f"{{atoms: all, effective_temperatures: {{highest: 600 K, count: {MAX_COUNT + 1}}}}}"),
            rf"solute\.effective_temperatures\.count must be a whole number of at least 2 and at most {MAX_COUNT}")
    # conditions are temperatures × solute scales × windows: each count below its bound, the product above
    text = grid(1000, temperatures=3).replace(
        "\numbrella:", f"\nsolute: {{atoms: all, scales: {{lowest: 0.5, count: 7}}}}\numbrella:")
    message = refused(text, rf"umbrella must make at most {MAX_WALKERS} walkers")
    assert "3 × 7 × 1000 = 21000" in message and "solute scales" in message
    assert parse_protocol(protocol(solute="{atoms: all, scales: {lowest: 0.5, count: 7}}"), PATH).solute


def test_a_huge_grid_is_refused_from_its_counts_without_expanding_it():
    tracemalloc.start()
    try:
        message = refused(grid(MAX_COUNT, MAX_COUNT), rf"umbrella must make at most {MAX_CONDITIONS} conditions")
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert f"1 × {MAX_COUNT} × {MAX_COUNT} = {MAX_COUNT**2}" in message
    # the grid would be 10^8 conditions; two axes of 10^4 centres are well under a megabyte each
    assert peak < 50 * 2**20, peak


def test_conditions_limit_is_met_before_the_walker_limit_only_past_it():
    temperatures = MAX_CONDITIONS // MAX_COUNT
    assert temperatures * MAX_COUNT == MAX_CONDITIONS
    refused(grid(MAX_COUNT, temperatures=temperatures + 1), rf"umbrella must make at most {MAX_CONDITIONS} conditions")
    # exactly MAX_CONDITIONS conditions passes that limit and meets the walker limit instead
    refused(grid(MAX_COUNT, temperatures=temperatures), rf"umbrella must make at most {MAX_WALKERS} walkers")


def test_walker_limit_and_the_largest_accepted_ladder():
    side = math.isqrt(MAX_WALKERS)
    assert side * side == MAX_WALKERS
    accepted = parse_protocol(grid(side, side), PATH)
    assert accepted.n_windows * len(accepted.temperatures) == MAX_WALKERS
    message = refused(grid(side, side + 1), rf"protocol\.yaml: umbrella must make at most {MAX_WALKERS} walkers")
    assert f"= {side * (side + 1)} instead" in message


def test_a_list_of_centres_longer_than_the_axis_limit_is_refused_before_reading_it():
    centres = ", ".join(["0 nm"] * (MAX_COUNT + 1))        # identical items: reading them would fail otherwise
    refused(protocol(umbrella={"x": f"{{centres: [{centres}], spring: 1 kJ/mol/nm**2}}"}),
            rf"umbrella\.x\.centres must be a list of at most {MAX_COUNT} items\. Got {MAX_COUNT + 1} items")


def test_a_temperature_list_longer_than_the_limit_is_refused():
    ladder = ", ".join(f"{300 + i} K" for i in range(MAX_COUNT + 1))
    refused(protocol(temperatures=f"[{ladder}]"), rf"temperatures must be a list of at most {MAX_COUNT} items")


# -- swaps ---------------------------------------------------------------------------
def test_swap_attempts_per_cycle_are_bounded():
    ladder = "[300 K, 400 K]"
    refused(protocol(temperatures=ladder, exchange="{attempts: 1000000000}"),
            rf"exchange\.attempts must be a whole number of at least 1 and at most {MAX_SWAP_ATTEMPTS}\. "
            r"Got 1000000000 instead")
    accepted = parse_protocol(protocol(temperatures=ladder, exchange=f"{{attempts: {MAX_SWAP_ATTEMPTS}}}"), PATH)
    assert accepted.exchange.attempts == MAX_SWAP_ATTEMPTS


def test_swap_proposals_of_any_pairs_are_bounded():
    walkers = round(MAX_SWAP_PROPOSALS ** (1 / 3))
    while walkers**3 > MAX_SWAP_PROPOSALS:
        walkers -= 1
    while (walkers + 1) ** 3 <= MAX_SWAP_PROPOSALS:
        walkers += 1                                   # the most walkers with attempts x walkers^3 in bounds
    def ladder(count, pairs):
        return protocol(temperatures=f"{{lowest: 300 K, highest: 600 K, count: {count}}}", exchange=f"{{pairs: {pairs}}}")

    assert parse_protocol(ladder(walkers, "any"), PATH).exchange.pairs == "any"
    message = refused(ladder(walkers + 1, "any"),
                      rf"protocol\.yaml: exchange must propose at most {MAX_SWAP_PROPOSALS} swaps per cycle")
    assert f"1 × {walkers + 1}³ = {(walkers + 1) ** 3} instead" in message
    parse_protocol(ladder(walkers + 1, "adjacent"), PATH)     # neighbours only: no bound met


# -- title ---------------------------------------------------------------------------
def test_title_length_is_bounded_and_a_long_title_is_not_printed():
    at_limit = "t" * MAX_TITLE_LENGTH
    assert parse_protocol(protocol(title=at_limit), PATH).title == at_limit
    message = refused(protocol(title=f"{at_limit}t"),
                      rf"title must be at most {MAX_TITLE_LENGTH} characters long\. "
                      rf"Got {MAX_TITLE_LENGTH + 1} characters instead")
    assert "ttt" not in message


@pytest.mark.parametrize("escaped, code", [(r"\0", "U+0000"), (r"\r", "U+000D"), (r"\e[2J", "U+001B"),
                                           (r"\u202e", "U+202E"), (r"\n", "U+000A"), (r"\t", "U+0009")])
def test_title_with_a_control_character_is_refused_without_echoing_it(escaped, code):
    message = refused(protocol(title=f'"zq{escaped}zq"'),
                      rf"title must be printable text on one line \(no control characters\)\. "
                      rf"Got U\+{code[2:]} at character 3 instead")
    assert message.isprintable() and "zq" not in message


def test_title_with_other_spaces_and_letters_is_kept():
    title = "ΔG of alanine\u00a0φ/ψ"          # a no-break space is a space, not a control character
    assert parse_protocol(protocol(title=title), PATH).title == title


def test_a_protocol_file_larger_than_the_limit_is_refused_unread(tmp_path):
    at_limit = DOUBLE_WELL + "# " + "x" * (MAX_SPEC_BYTES - len(DOUBLE_WELL) - 3) + "\n"
    assert len(at_limit.encode()) == MAX_SPEC_BYTES
    (tmp_path / "p.yaml").write_text(at_limit)
    assert load_protocol(tmp_path / "p.yaml").title == "test double well"
    (tmp_path / "p.yaml").write_text(at_limit + "\n")
    with pytest.raises(InputError, match=rf"p\.yaml: a protocol file must be at most {MAX_SPEC_BYTES} bytes\. "
                                         rf"Got {MAX_SPEC_BYTES + 1} bytes instead"):
        load_protocol(tmp_path / "p.yaml")


# -- run intervals -------------------------------------------------------------------
@pytest.mark.parametrize("run, pattern", [
    ({"frame_every": "0 ps"},
     r"run\.frame_every must be at least one cycle \(0\.1 ps\) \(leave it out for no frames\)\. Got '0 ps'"),
    ({"frame_every": None, "checkpoint_every": "0 ps"}, r"run\.checkpoint_every must be at least one cycle \(0\.1 ps\)"),
])
def test_zero_intervals_are_refused(run, pattern):
    refused(protocol(run=run), pattern)


def test_intervals_of_one_cycle_and_no_frames_are_accepted():
    run = parse_protocol(protocol(run={"frame_every": "0.1 ps", "checkpoint_every": "0.1 ps"}), PATH).run
    assert (run.frame_every, run.checkpoint_every) == (1, 1)
    assert parse_protocol(protocol(run={"frame_every": None}), PATH).run.frame_every == 0


# -- windows that are the same modulo the period ------------------------------------------
@pytest.mark.parametrize("centres, first, second", [
    ("[-180 deg, 180 deg]", "centres[0] (-180 deg)", "centres[1] (180 deg)"),
    ("{from: -180 deg, to: 180 deg, count: 37}", "centres[0] (-180 deg)", "centres[36] (180 deg)"),
    ("[180 deg, 0 deg, -180 deg]", "centres[0] (180 deg)", "centres[2] (-180 deg)"),
])
def test_dihedral_windows_360_deg_apart_are_one_window(centres, first, second):
    text = protocol(umbrella={"phi": f"{{centres: {centres}, spring: 100 kJ/mol/rad**2}}"}, dihedrals=True)
    message = refused(text, r"umbrella\.phi must be windows that differ in centre \(modulo 360 deg on a dihedral\) "
                            r"or spring")
    assert f"Got {first} and {second} with the same spring instead" in message


def test_duplicate_windows_on_one_axis_of_a_dihedral_grid():
    text = protocol(umbrella={"phi": "{centres: [-60 deg, 60 deg], spring: 100 kJ/mol/rad**2}",
                              "psi": "{centres: [-180 deg, 0 deg, 180 deg], spring: 100 kJ/mol/rad**2}"}, dihedrals=True)
    refused(text, r"umbrella\.psi must be windows that differ in centre \(modulo 360 deg")


def test_dihedral_windows_that_differ_are_accepted():
    text = protocol(umbrella={"phi": "{centres: {from: -180 deg, to: 170 deg, count: 36}, spring: 100 kJ/mol/rad**2}",
                              "psi": "{centres: [-180 deg, 180 deg], spring: [100 kJ/mol/rad**2, 200 kJ/mol/rad**2]}"},
                    dihedrals=True)
    accepted = parse_protocol(text, PATH)
    assert accepted.n_windows == 36 * 2


def test_a_distance_axis_is_not_periodic():
    accepted = parse_protocol(protocol(umbrella={"x": "{centres: [0 nm, 6.283185307179586 nm], spring: 1 kJ/mol/nm**2}"}),
                              PATH)
    assert accepted.n_windows == 2


# -- through the command line --------------------------------------------------------------
def boost(*args, cwd):
    return subprocess.run([sys.executable, "-m", "boost.cli", *args], cwd=cwd, capture_output=True,
                          timeout=120)


def assert_one_line_exit_2(result, pattern):
    import re

    stderr = result.stderr.decode("utf-8")
    assert result.returncode == 2, stderr
    assert len(stderr.splitlines()) == 1 and stderr.endswith("\n"), stderr
    assert re.search(pattern, stderr), stderr
    return stderr


def test_check_of_a_huge_grid_fails_fast_in_one_line(write_protocol, tmp_path):
    path = write_protocol(grid(MAX_COUNT, MAX_COUNT))
    assert_one_line_exit_2(boost("check", str(path), cwd=tmp_path),
                           rf"protocol\.yaml: umbrella must make at most {MAX_CONDITIONS} conditions")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["protocol.yaml"]


def test_run_with_a_control_character_in_the_title_writes_nothing(write_protocol, tmp_path):
    path = write_protocol(protocol(title='"x\\e]0;owned\\a\\r"'))
    stderr = assert_one_line_exit_2(boost("run", str(path), "--quiet", cwd=tmp_path), r"title must be printable")
    assert "\x1b" not in stderr and "\r" not in stderr and "owned" not in stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["protocol.yaml"]


def test_an_atom_index_and_a_seed_past_their_bounds_are_refused():
    from boost.limits import MAX_ATOM_INDEX, MAX_SEED

    at_most = parse_protocol(double_well_protocol(seed=str(MAX_SEED),
                                                  coordinates={"x": f"{{position: {MAX_ATOM_INDEX}, axis: x}}"}),
                             "p.yaml")
    assert at_most.seed == MAX_SEED
    refused(double_well_protocol(seed=str(MAX_SEED + 1)), r"seed must be a whole number of at least 0 and at most")
    refused(double_well_protocol(coordinates={"x": f"{{position: {MAX_ATOM_INDEX + 1}, axis: x}}"}),
            r"coordinates.x.position must be a whole number of at least 0 and at most 2147483647")
    # any other whole number is held to a signed 64-bit integer (hex literals may be long)
    refused(double_well_protocol(run={"retries": "0x1" + "0" * 5000}),
            r"run.retries must be a whole number of at least 0 and of at most 9223372036854775807 in size. "
            r"Got <a whole number of about 6021 digits> instead")
