"""The public API: every name in __all__ is importable from the package."""

import boost


def test_public_names_resolve():
    for name in boost.__all__:
        assert getattr(boost, name) is not None, name


def test_errors_are_also_builtin_types():
    # common practice (scikit-learn style): our errors subclass a built-in as well
    assert issubclass(boost.ProtocolError, ValueError)
    assert issubclass(boost.InputError, OSError)
    assert issubclass(boost.SimulationError, RuntimeError)
