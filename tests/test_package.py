"""The public API and the packaging: what ``import boost`` offers and what a wheel carries."""

import inspect
import re
from importlib import import_module, metadata
from pathlib import Path

import pytest

import boost
from boost import bundled, exceptions

REPO = Path(__file__).resolve().parents[1]


def test_public_names_are_unique_and_cover_the_lazy_ones_and_the_errors():
    assert len(boost.__all__) == len(set(boost.__all__))
    assert set(boost._LAZY) <= set(boost.__all__)
    # every error and warning class of boost.exceptions is public
    classes = {name for name, obj in vars(exceptions).items()
               if inspect.isclass(obj) and obj.__module__ == exceptions.__name__}
    assert classes and classes <= set(boost.__all__)


@pytest.mark.parametrize("name", [name for name in boost.__all__ if name != "__version__"])
def test_each_public_name_is_defined_in_boost(name):
    obj = getattr(boost, name)
    assert obj.__module__.split(".")[0] == "boost", (name, obj.__module__)
    if name in boost._LAZY:          # the object the lazy table promises, not a stand-in
        assert obj is getattr(import_module(f"boost.{boost._LAZY[name]}"), name)


def test_version_is_the_installed_distributions():
    try:
        expected = metadata.version("boost")
    except metadata.PackageNotFoundError:
        expected = "0+unknown"
    assert boost.__version__ == expected


def test_errors_are_also_builtin_types():
    # common practice (scikit-learn style): our errors subclass a built-in as well
    assert issubclass(boost.ProtocolError, ValueError)
    assert issubclass(boost.InputError, OSError)
    assert issubclass(boost.SimulationError, RuntimeError)


# -- package data ------------------------------------------------------------------------
def _setuptools_config():
    tomllib = pytest.importorskip("tomllib")          # Python 3.11+
    return tomllib.loads((REPO / "pyproject.toml").read_text())["tool"]["setuptools"]


def test_the_wheel_lists_every_subpackage():
    # packages are listed by hand (the data mapping rules out automatic discovery)
    listed = set(_setuptools_config()["packages"])
    folders = {".".join(p.parent.relative_to(REPO).parts) for p in (REPO / "boost").rglob("*.py")}
    assert folders <= listed, folders - listed


def test_the_wheel_maps_the_top_level_folders_into_the_package():
    config = _setuptools_config()
    for kind in bundled.KINDS:
        package = f"boost.data.{kind}"
        assert package in config["packages"]
        assert config["package-dir"][package] == kind
        assert config["package-data"][package] == ["*.yaml"]
        assert sorted((REPO / kind).glob("*.yaml")), kind


def test_bundled_folders_in_a_source_tree_are_the_top_level_ones():
    assert bundled.bundled_folder("systems") == REPO / "systems"
    assert bundled.bundled_folder("protocols") == REPO / "protocols"


def test_bundled_folders_in_an_installed_package_are_inside_it(tmp_path, monkeypatch):
    # the layout a wheel installs: boost/data/KIND beside boost/__init__.py
    (tmp_path / "boost" / "data" / "systems").mkdir(parents=True)
    monkeypatch.setattr(bundled, "_PACKAGE", tmp_path / "boost")
    assert bundled.bundled_folder("systems") == tmp_path / "boost" / "data" / "systems"
    assert bundled.bundled_folder("protocols") == tmp_path / "protocols"      # not shipped there
    with pytest.raises(ValueError, match="no bundled 'data'"):
        bundled.bundled_folder("data")


# -- the repository stands alone ---------------------------------------------------------
def test_every_file_the_tests_cite_is_inside_the_project():
    # a comment such as "tests/REFERENCES.md, harmonic well" must name a file of this repository
    cited = {(path.name, name) for path in (REPO / "tests").glob("*.py")
             for name in re.findall(r"[\w./-]+\.md\b", path.read_text(encoding="utf-8"))}
    assert ("test_alanine.py", "tests/REFERENCES.md") in cited
    missing = {(test, name) for test, name in cited if not (REPO / name).is_file()}
    assert not missing, missing
