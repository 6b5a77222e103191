"""What an analysis returns: frozen results with their units in the field comments."""

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class ProfileResult:
    """A PMF, in ``energy_unit``; zero at its minimum. centres in nm or degrees."""

    coordinates: tuple
    centres: tuple          # one array per coordinate (nm, or degrees for angles)
    f: np.ndarray
    df: np.ndarray          # standard error, relative to the zero bin
    counts: np.ndarray
    f_low: np.ndarray       # 95 % interval, relative to the zero bin
    f_high: np.ndarray


@dataclass(frozen=True)
class BasinResult:
    names: tuple
    populations: np.ndarray
    d_populations: np.ndarray    # standard error
    populations_low: np.ndarray  # 95 % interval, inside [0, 1]
    populations_high: np.ndarray
    Delta_g: np.ndarray      # [i, j] = G_j - G_i, in energy_unit
    d_Delta_g: np.ndarray
    Delta_g_low: np.ndarray  # 95 % interval, in energy_unit
    Delta_g_high: np.ndarray


@dataclass(frozen=True)
class Uncertainty:
    """Which method made the error bars and intervals of an analysis."""

    method: str          # 'asymptotic' (MBAR's covariance) or 'bootstrap' (block bootstrap over cycles)
    resamples: int = 0   # bootstrap replicates drawn (0: asymptotic)
    block_cycles: int = 0
    block_chosen: bool = False  # block length measured from the walkers, not given
    failed: int = 0      # replicates whose MBAR did not converge (left out of the bars)
    walker_g: float = math.nan  # largest statistical inefficiency along a walker's path (cycles)
    cycle_ps: float = math.nan  # length of a cycle (ps)
    cut_short: bool = False     # blocks shorter than the walkers' correlation asks for

    @property
    def label(self):
        """Names the method: 'MBAR asymptotic' or 'block bootstrap, N resamples, blocks of L cycles'."""
        if self.method == "asymptotic":
            return "MBAR asymptotic"
        return f"block bootstrap, {self.resamples} resamples, blocks of {self.block_cycles} cycles"


@dataclass(frozen=True)
class RunAbout:
    """What was run, for the header of a report: read from the run folder, never measured."""

    title: str
    system: str              # the system's title, or its bundled name / spec file
    conditions: int
    walkers: int
    cycle_ps: float
    cycles_planned: int      # equilibration + production, as the protocol asks
    cycles_done: int         # complete cycles in the ledger now
    production_ps: float     # planned production per walker
    platform: str            # from provenance.json ('' when it cannot be read)
    commit: str              # the protocol's git commit at run time ('' when none was recorded)
    protocol_text: str

    @property
    def partial(self):
        return self.cycles_done < self.cycles_planned


@dataclass(frozen=True)
class Analysis:
    """Everything ``boost analyze`` reports. Energies in ``energy_unit`` at ``temperature``."""

    folder: str
    temperature: float
    energy_unit: str
    n_cycles: int
    samples_k: np.ndarray     # uncorrelated samples used per condition
    thinning_k: np.ndarray    # of those, every how many MBAR used (1: all; see analysis.memory)
    t0_k: np.ndarray          # equilibration discarded per condition (production cycles)
    g_k: np.ndarray           # statistical inefficiency per condition (cycles)
    f_k: np.ndarray           # condition free energies relative to condition 0, in kT
    df_k: np.ndarray          # in kT
    overlap: np.ndarray
    poor_pairs: tuple
    profiles: tuple
    basins: BasinResult | None
    swaps: object             # diagnostics.SwapSummary or None
    condition_labels: tuple
    window_values: tuple      # per condition: umbrella coordinate values of its production
                              # samples, shape (n, n_axes), nm or degrees
    umbrella_coordinates: tuple
    angle_coordinates: frozenset   # coordinates reported in degrees
    walker_traces: np.ndarray      # condition_rt over production cycles
    uncertainty: Uncertainty = Uncertainty("asymptotic")
    verdicts: object = None        # analysis.verdicts.Verdicts
    about: RunAbout | None = None
    basin_intervals: dict = None   # name -> {coordinate: (lower, upper)} in nm or rad; lower > upper wraps


