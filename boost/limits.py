"""Bounds on the size of a protocol: numbers no real study reaches, checked before anything grows.

A typo or a hostile file (a 10⁴ × 10⁴ window grid, 10⁹ swap attempts per cycle, a title of
50 MB) must stop at ``boost check`` with one line, not take gigabytes of memory or start a
run that never finishes a cycle. Every bound is checked on counts (the product of the
per-axis counts, the length of a list, the size of a file) before the list or grid they
count is made. The README's protocol reference gives each bound and its reason.
"""

import math

from .exceptions import ProtocolError
from .exchange import any_pairs_proposals

#: Windows along one umbrella axis, temperatures of a ladder, PMF bins along a coordinate:
#: written with ``count`` or as a list (a window every 0.036 deg around a dihedral).
MAX_COUNT = 10_000
#: Conditions (temperatures × solute scales × windows). MBAR's matrices over pairs of conditions (overlap,
#: covariance of the free energies) take 8 bytes × conditions², 80 GB at this size.
MAX_CONDITIONS = 100_000
#: Walkers (one per condition today, so this is the bound a protocol meets first). Each is an
#: OpenMM context for the whole run, and every cycle records each walker's reduced potential
#: in every condition: 8 bytes × walkers × conditions, 800 MB per cycle at this size.
MAX_WALKERS = 10_000
#: Swap passes per cycle (``exchange.attempts``). Swaps should cost little next to MD; 1000
#: passes over 10⁴ walkers took 21 s of Python per cycle on a 2-core test machine.
MAX_SWAP_ATTEMPTS = 1_000
#: Swap proposals per cycle with ``pairs: any`` (attempts × walkers³). One proposal took 11 µs
#: of Python on a 2-core test machine, so this many take 18 minutes per cycle.
MAX_SWAP_PROPOSALS = 100_000_000
#: Characters of a title (protocol or system spec); it is printed on one terminal line.
MAX_TITLE_LENGTH = 200
#: Bytes of a protocol or system YAML file. A protocol that writes out two axes of
#: MAX_COUNT centres and springs as lists is under 1 MB; most are a few kB.
MAX_SPEC_BYTES = 4 * 2**20
#: An atom index in a coordinate: OpenMM numbers particles with 32-bit signed integers.
MAX_ATOM_INDEX = 2**31 - 1
#: The protocol's seed: numpy's generators take it whole; 64 bits are more seeds than any study
#: needs, and a number of thousands of digits could not even be printed back.
MAX_SEED = 2**64 - 1


def check_conditions(node, n_temperatures, window_counts, *, n_scales=1):
    """Refuse more conditions or walkers than the bounds, from the counts alone.

    Parameters
    ----------
    node : boost.spec.Node
        Where the windows (or, without windows, the solute scales or the temperatures) are written.
    n_temperatures : int
    window_counts : sequence of int
        Windows along each umbrella axis.
    n_scales : int
        Rungs of the solute ladder (1 without one).

    Returns
    -------
    int
        The number of conditions (= walkers).
    """
    n_conditions = n_temperatures * n_scales * math.prod(window_counts)
    counts = (n_temperatures, *([n_scales] if n_scales > 1 else []), *window_counts)
    product = " × ".join(str(count) for count in counts)
    what = "temperatures × solute scales × windows" if n_scales > 1 else "temperatures × windows"
    if n_conditions > MAX_CONDITIONS:
        raise ProtocolError(f"{node.place} must make at most {MAX_CONDITIONS} conditions ({what}). "
                            f"Got {product} = {n_conditions} instead.")
    if n_conditions > MAX_WALKERS:
        raise ProtocolError(f"{node.place} must make at most {MAX_WALKERS} walkers (one per condition: "
                            f"{what}). Got {product} = {n_conditions} instead.")
    return n_conditions


def check_swap_proposals(node, attempts, n_walkers):
    """Refuse ``pairs: any`` with more proposals per cycle (attempts × walkers³) than the bound."""
    proposals = any_pairs_proposals(attempts, n_walkers)
    if proposals > MAX_SWAP_PROPOSALS:
        raise ProtocolError(f"{node.place} must propose at most {MAX_SWAP_PROPOSALS} swaps per cycle (with "
                            f"pairs 'any': attempts × walkers³; 'adjacent' proposes far fewer). "
                            f"Got {attempts} × {n_walkers}³ = {proposals} instead.")
