"""The BoostError tree and boost's own warning categories.

Every error also subclasses a built-in type so that callers who do not know boost can
still catch it. The command line prints a BoostError as one line and exits with code 2.
"""

import contextlib


class BoostError(Exception):
    """Base of every error boost raises on purpose."""


class ProtocolError(BoostError, ValueError):
    """A protocol or system spec is malformed: names the file, the key path, what was expected."""


class InputError(BoostError, OSError):
    """A file that boost must read is missing, unreadable or not what it claims to be."""


class RunFolderError(BoostError, RuntimeError):
    """A run folder is missing, belongs to another protocol, is locked or is damaged."""


class SimulationError(BoostError, RuntimeError):
    """A simulation failed: NaN energies, exploding walkers, OpenMM errors."""


class AnalysisError(BoostError, ValueError):
    """The data in a run folder cannot support the analysis asked for."""


class BoostWarning(UserWarning):
    """Base of boost's soft problems; they go through logging and warnings."""


class PoorOverlapWarning(BoostWarning):
    """Neighbouring conditions share too little phase space for reliable reweighting."""


class ConvergenceWarning(BoostWarning):
    """A series is too short or too correlated for the estimate to be trusted."""


def printable(text):
    """``text`` as it may go on a terminal line: each character that is not printable escaped."""
    text = str(text)
    return text if text.isprintable() else "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def where(file, key_path):
    """Format the place an input problem is found: ``protocol.yaml: run.timestep``."""
    name = printable(file) if file is not None else "<input>"
    return f"{name}: {key_path}" if key_path else name


@contextlib.contextmanager
def warnings_to_log(prefix="warning"):
    """Route boost's warnings raised inside the block to the 'boost' log, one line each,
    as ``<prefix>: <message>``, after the block (other warnings pass through untouched)."""
    import logging
    import warnings

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", BoostWarning)
        yield
    log = logging.getLogger("boost")
    for warning in caught:
        if issubclass(warning.category, BoostWarning):
            log.warning("%s: %s", prefix, warning.message)
        else:
            warnings.warn_explicit(warning.message, warning.category, warning.filename, warning.lineno)
