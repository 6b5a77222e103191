"""Where the bundled systems and example protocols are, in a wheel or in a source tree.

The repository keeps them in its top-level ``systems/`` and ``protocols/`` folders.
``pyproject.toml`` maps those folders into the package as ``boost/data/systems`` and
``boost/data/protocols`` when a wheel is built, so a plain ``pip install .`` carries them.
A source tree (an editable install, or ``PYTHONPATH`` pointing at a checkout) has no
``boost/data``: there the folders beside the package are the bundled ones.
"""

from pathlib import Path

KINDS = ("systems", "protocols")
_PACKAGE = Path(__file__).resolve().parent


def bundled_folder(kind):
    """The folder of bundled files of one kind.

    Parameters
    ----------
    kind : str
        ``"systems"`` (system specs a protocol can name) or ``"protocols"`` (examples).

    Returns
    -------
    pathlib.Path
        ``boost/data/KIND`` inside an installed wheel, else ``KIND/`` beside the package.
    """
    if kind not in KINDS:
        raise ValueError(f"no bundled {kind!r}; kinds: {', '.join(KINDS)}")
    installed = _PACKAGE / "data" / kind
    return installed if installed.is_dir() else _PACKAGE.parent / kind
