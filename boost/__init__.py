"""boost: enhanced sampling on OpenMM, reweighted with MBAR to equilibrium populations,
free-energy differences and PMFs.

Typical use is the ``boost`` command; the same steps from Python::

    from boost import load_protocol, run_protocol, analyse_run
    protocol = load_protocol("protocols/alanine-phi-umbrella.yaml")
    folder = run_protocol(protocol, "runs/alanine-phi-umbrella")
    result = analyse_run(folder)

Names are imported on first use, so worker processes and ``boost --help`` start fast.
"""

from importlib import import_module
from importlib import metadata as _metadata

from .exceptions import (AnalysisError, BoostError, BoostWarning, ConvergenceWarning, InputError,
                         PoorOverlapWarning, ProtocolError, RunFolderError, SimulationError)

_LAZY = {
    "Analysis": "analysis", "analyse_run": "analysis",
    "Protocol": "protocol", "load_protocol": "protocol", "parse_protocol": "protocol",
    "dump_protocol": "protocol_dump",
    "make_plan": "plan", "run_protocol": "scheduler",
    "read_ledger": "store",
}

try:
    __version__ = _metadata.version("boost")
except _metadata.PackageNotFoundError:  # running from a source tree without install
    __version__ = "0+unknown"

__all__ = [
    "AnalysisError", "BoostError", "BoostWarning", "ConvergenceWarning", "InputError",
    "PoorOverlapWarning", "ProtocolError", "RunFolderError", "SimulationError",
    *_LAZY, "__version__",
]


def __getattr__(name):
    if name in _LAZY:
        return getattr(import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'boost' has no attribute {name!r}")
