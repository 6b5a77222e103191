"""Reading system specs: every check happens when the protocol is loaded, before any build.

The energies of built systems are checked in tests/test_systems.py; here the question is
only where a bad spec is refused. Each bad spec below is refused by ``boost check`` with
make_plan (everything that builds) replaced by a function that fails the test, so the
one-line error can only come from loading the protocol. The contract (one line naming
file and key path, exit code 2) is the project's rule for bad input.
"""

import os
import re
import subprocess
import sys
import textwrap

import pytest
from click.testing import CliRunner
from conftest import DOUBLE_WELL

from boost import cli, plan, systems
from boost.exceptions import InputError, ProtocolError
from boost.protocol import load_protocol, parse_protocol
from boost.spec import Node
from boost.system_spec import (MissingSystemFile, ModelSource, PeptideSource, SystemSpec, WaterBox,
                               read_system_spec)

SYSTEM = "system:\n  model: {name: double_well, barrier: 5 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}\n"
PEPTIDE = "{sequence: [ACE, ALA, NME]}"


def with_system(system):
    assert SYSTEM in DOUBLE_WELL
    return DOUBLE_WELL.replace(SYSTEM, f"system: {system}\n")


def _no_build(*args, **kwargs):
    raise AssertionError("the system was built")


@pytest.fixture
def checked(tmp_path, monkeypatch):
    """Run `boost check` in-process on a system spec, with every build replaced by a failure."""
    monkeypatch.setattr(plan, "make_plan", _no_build)            # `boost check` builds only through it
    monkeypatch.chdir(tmp_path)

    def check(system):
        (tmp_path / "protocol.yaml").write_text(with_system(system))
        return CliRunner().invoke(cli.main, ["check", "protocol.yaml"])

    return check


BAD_SPECS = [
    ("{pdb: x.pdb, forcfield: [amber14-all.xml]}", r"system\.forcfield is not a known key\. Did you mean 'forcefield'"),
    ("{pdb: a.pdb, amber: {}}", r"system must have exactly one source key.*'pdb' and 'amber'"),
    ("{title: nothing}", r"system must have exactly one source key.*none of them"),
    ("{amber: {prmtop: a, inpcrd: b}, forcefield: [amber14-all.xml]}",
     r"system\.forcefield does not apply to the 'amber' source"),
    ("{model: {name: double_well}, constraints: none}", r"system\.constraints does not apply"),
    ("{model: {name: double_well, barrier: 5}}", r"system\.model\.barrier must be an energy"),
    ("{model: {name: double_well, mass: -1 amu}}", r"system\.model\.mass must be positive"),
    ("{model: {name: triple_well}}", r"system\.model\.name must be one of"),
    ("{amber: {prmtop: a.prmtop}}", r"system\.amber\.inpcrd is required but missing"),
    ("{charmm: {psf: a.psf, coordinates: a.crd, parameters: [a.prm], box: [3 nm, 3 nm]}}",
     r"system\.charmm\.box must be one length \(a cube\) or a list of three lengths"),
    ("{charmm: {psf: a.psf, coordinates: a.crd, parameters: []}}", r"system\.charmm\.parameters must be a list"),
    ("{peptide: {sequence: [ACE, ALA, NME], phi: -80}}", r"system\.peptide\.phi must be an angle"),
    ("{peptide: {sequence: [ACE, ALA, NME], phi: [-80 deg, 60 deg]}}",
     r"system\.peptide\.phi must be one angle or a list of 1 angle,"),
    ("{peptide: {sequence: [ACE, XYZ, NME]}}", r"system\.peptide cannot be built: .*XYZ"),
    (f"{{peptide: {PEPTIDE}, water_box: {{padding: 1 kg}}}}", r"system\.water_box\.padding must be a length"),
    (f"{{peptide: {PEPTIDE}, water_box: {{water_model: tip9p}}}}", r"system\.water_box\.water_model must be one of"),
    (f"{{peptide: {PEPTIDE}, implicit_solvent: obc2, water_box: {{}}}}", r"system\.water_box cannot be combined"),
    (f"{{peptide: {PEPTIDE}, implicit_solvent: gbsa}}", r"system\.implicit_solvent must be one of"),
    (f"{{peptide: {PEPTIDE}, constraints: hbonds}}", r"system\.constraints must be one of"),
    (f"{{peptide: {PEPTIDE}, nonbonded: {{method: ewald}}}}", r"system\.nonbonded\.method must be one of"),
    (f"{{peptide: {PEPTIDE}, nonbonded: {{method: no_cutoff, cutoff: 1 nm}}}}",
     r"system\.nonbonded\.cutoff does not apply with method 'no_cutoff'"),
    (f"{{peptide: {PEPTIDE}, nonbonded: {{cutoff: '1'}}}}", r"system\.nonbonded\.cutoff must be a length"),
    ("{pdb: '~no-such-user-here/x.pdb'}", r"system\.pdb must be a path whose leading '~' names a known user"),
    ("5", r"protocol\.yaml: system must be a system file, the name of a bundled system, or a mapping"),
]


@pytest.mark.parametrize("system, message", BAD_SPECS)
def test_bad_specs_are_refused_when_the_protocol_is_loaded(checked, system, message):
    result = checked(system)
    assert result.exit_code == 2, result.output
    lines = result.output.splitlines()
    assert len(lines) == 1 and lines[0].startswith("boost: protocol.yaml: "), result.output
    assert re.search(message, lines[0]), lines[0]


def test_the_build_is_really_replaced(checked):
    # a good spec gets past loading and reaches the replaced make_plan: an internal error
    result = checked("{model: {name: double_well}}")
    assert result.exit_code == 1 and "the system was built" in result.output, result.output


@pytest.mark.parametrize("system, make, message", [
    ("{pdb: here}", "folder", r"system\.pdb names \S*here, which is a folder, not a file"),
    ("{gromacs: {top: a.top, gro: a.gro, include_dir: here}}", "file",
     r"system\.gromacs\.include_dir names \S*here, which is not an existing folder"),
    (f"{{peptide: {PEPTIDE}, forcefield: [here]}}", "fifo",
     r"system\.forcefield\[0\] names \S*here, which is not a regular file \(a FIFO\)"),
    ("here", "fifo", r"protocol\.yaml: system names \S*here, which is not a regular file \(a FIFO\)"),
])
def test_paths_that_name_the_wrong_kind_of_thing_are_refused_when_loaded(checked, tmp_path, system, make,
                                                                        message):
    {"folder": lambda p: p.mkdir(), "file": lambda p: p.write_text("x\n"), "fifo": os.mkfifo}[make](tmp_path / "here")
    result = checked(system)
    assert result.exit_code == 2 and re.search(message, result.output), result.output


def test_errors_inside_a_spec_file_name_that_file(checked, tmp_path):
    (tmp_path / "sys.yaml").write_text("model: {name: double_well}\nwater_box: {}\n")
    result = checked("sys.yaml")
    assert result.exit_code == 2, result.output
    assert result.output.startswith("boost: sys.yaml: water_box does not apply to the 'model' source")


def test_an_inline_spec_is_read_into_typed_values(tmp_path):
    text = with_system("{peptide: {sequence: ACE ALA NME, phi: -80 deg}, title: ala, "
                       "water_box: {padding: 0.6 nm, ionic_strength: 0.15 molar}, nonbonded: {cutoff: 0.6 nm}}")
    spec = parse_protocol(text, tmp_path / "protocol.yaml").system
    assert isinstance(spec, SystemSpec) and spec.reference is None and spec.title == "ala"
    assert isinstance(spec.source, PeptideSource) and spec.source.sequence == ("ACE", "ALA", "NME")
    # source: exact unit conversions (-80 deg in rad; the 180 deg default is pi)
    assert spec.source.phi == pytest.approx(-80 * 3.141592653589793 / 180, rel=1e-15)
    assert spec.source.psi == pytest.approx(3.141592653589793, rel=1e-15)
    assert spec.options.water_box == WaterBox(0.6, "tip3p", 0.15, place="", water_model_place="")
    assert spec.options.nonbonded.method is None and spec.options.nonbonded.cutoff == 0.6
    assert [item.name for item in spec.options.forcefield] == ["amber14-all.xml"]
    assert spec.options.constraints == "h_bonds" and spec.options.implicit_solvent == "none"


def test_bundled_names_and_spec_files_are_resolved_when_loaded(tmp_path):
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "sys.yaml").write_text("title: mine\nmodel: {name: harmonic_well, particles: 3}\n")
    spec = read_system_spec(Node("sub/sys.yaml", "protocol.yaml", "system"), tmp_path)
    assert spec.reference == "sub/sys.yaml" and spec.title == "mine"
    assert isinstance(spec.source, ModelSource) and spec.source.model.particles == 3
    bundled = read_system_spec(Node("double-well", "protocol.yaml", "system"), tmp_path)
    assert bundled.reference == "double-well" and isinstance(bundled.source, ModelSource)


def test_a_spec_file_that_is_not_there_is_reported_by_the_build(tmp_path):
    # a run folder's protocol copy stands away from its system files and must still load
    # for the analysis; the build (boost check, boost run) names the missing file as before
    protocol = parse_protocol(with_system("nowhere.yaml"), tmp_path / "protocol.yaml")
    assert isinstance(protocol.system, MissingSystemFile)
    with pytest.raises(InputError, match=r"protocol\.yaml: system names \S*nowhere\.yaml, which does not exist, "
                                         r"and no bundled system is called 'nowhere'"):
        systems.build_system(protocol.system)


def test_a_file_the_spec_names_that_is_not_there_is_reported_by_the_build(tmp_path):
    protocol = parse_protocol(with_system("{pdb: gone.pdb}"), tmp_path / "protocol.yaml")
    with pytest.raises(InputError, match=r"protocol\.yaml: system\.pdb names \S*gone\.pdb, which does not exist"):
        systems.build_system(protocol.system)


def test_loading_a_protocol_does_not_import_openmm(tmp_path, repo):
    # loading is cheap and needs no OpenMM: the analysis reads protocols too
    code = textwrap.dedent(f"""\
        import sys
        from boost.protocol import load_protocol
        for name in ("alanine-phi-umbrella", "double-well", "muller-brown-umbrella"):
            load_protocol({str(repo / 'protocols')!r} + "/" + name + ".yaml")
        print(sorted(m for m in ("openmm", "scipy.integrate", "scipy.optimize") if m in sys.modules))
        """)
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True)
    assert result.stdout.strip() == "[]", result.stdout + result.stderr


def test_protocol_load_errors_from_the_system_section(tmp_path):
    path = tmp_path / "protocol.yaml"
    path.write_text(with_system("{peptide: {sequence: [ACE, ALA, NME]}, nonbonded: {method: ewald}}"))
    with pytest.raises(ProtocolError, match=r"protocol\.yaml: system\.nonbonded\.method must be one of"):
        load_protocol(path)
