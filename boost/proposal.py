"""Plan a protocol from a short trial (or a finished run): ``boost propose``.

From a protocol with a temperature ladder or umbrella windows along one coordinate, and
the data of a run of it (a short trial this module runs, or an existing run folder), it
proposes a new protocol:

- a temperature ladder whose neighbours predict a target swap acceptance, from the
  measured mean and variance of the potential energy at each rung (boost.ladder_design);
- umbrella windows whose neighbours predict a target MBAR overlap, from the run's PMF
  (boost.window_design): denser where the PMF is steep;
- or, refining a finished run, its conditions plus extra ones between the neighbours whose
  measured swap acceptance or overlap fell short of the target;

with the production the run's error on ΔG and statistical inefficiencies ask for to reach
a target error, and the wall time the run's measured speed predicts on this machine.
"""

import math
import os
import tempfile
import time
import warnings
from dataclasses import dataclass, fields, is_dataclass, replace
from pathlib import Path

import numpy as np

from .exceptions import AnalysisError, BoostWarning, ProtocolError, RunFolderError
from .ladder_design import EnergyMoments, design_ladder, insert_rungs
from .protocol import UmbrellaAxis, parse_protocol
from .protocol_dump import dump_protocol
from .system_spec import FileRef
from .units import beta, energy_in, format_coordinate, format_quantity, parse_quantity
from .window_design import (MARGIN, design_windows, insert_windows, neighbour_pairs, predict_neighbour_overlaps,
                            profile_on_grid)

#: A condition needs this many statistically independent samples for boost's verdicts to
#: say more than 'too few samples' (boost.verdict), so a production is at least this many
#: statistical inefficiencies long.
MIN_INDEPENDENT = 20
#: Default trial production per condition.
DEFAULT_TRIAL = "20 ps"


@dataclass(frozen=True)
class Targets:
    """What the planned protocol should reach.

    acceptance : mean swap acceptance between neighbour rungs (0 to 1)
    overlap : MBAR overlap between neighbour windows (0 to ½)
    error_kt : standard error of ΔG between the first two basins, in kT (None: keep the production)
    """

    acceptance: float = 0.3
    overlap: float = 0.05
    error_kt: float | None = None


def read_targets(protocol, *, acceptance=None, overlap=None, error=None):
    """Targets from command-line text; one-line ProtocolError naming the option otherwise."""
    def fraction(text, option, upper, example):
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        if not 0.0 < value < upper:
            raise ProtocolError(f"{option} must be a number above 0 and below {upper:g}, such as {example}. "
                                f"Got {text!r} instead.")
        return value

    targets = Targets()
    if acceptance is not None:
        targets = replace(targets, acceptance=fraction(acceptance, "--acceptance", 1.0, "0.3"))
    if overlap is not None:
        targets = replace(targets, overlap=fraction(overlap, "--overlap", 0.5, "0.05"))
    if error is not None:
        text = str(error).strip()
        if text.endswith("kT"):
            value = fraction(text[:-2].strip() or "nan", "--error", math.inf, "'0.2 kT' or '0.1 kcal/mol'")
        else:
            value = parse_quantity(text, "energy", place="--error") * beta(protocol.temperature)
            if not 0.0 < value < math.inf:
                raise ProtocolError(f"--error must be a positive energy, such as '0.1 kcal/mol' or '0.2 kT'. "
                                    f"Got {text!r} instead.")
        targets = replace(targets, error_kt=value)
    return targets


def what_to_plan(protocol):
    """'ladder' or 'windows'; a one-line ProtocolError when the protocol has neither (or both)."""
    name = protocol.path
    if protocol.solute is not None:
        raise ProtocolError(f"{name}: solute has a ladder of solute scales; boost propose plans temperature "
                            "ladders and umbrella windows only.")
    ladder, axes = len(protocol.temperatures) > 1, protocol.umbrella
    if ladder and axes:
        raise ProtocolError(f"{name}: temperatures and umbrella are both set; boost propose plans a temperature "
                            "ladder or windows along one coordinate, one at a time.")
    if len(axes) > 1:
        raise ProtocolError(f"{name}: umbrella has windows along {len(axes)} coordinates; boost propose plans "
                            "windows along one.")
    if ladder:
        return "ladder"
    if axes and len(axes[0].centres) >= 2:
        return "windows"
    raise ProtocolError(f"{name}: has no temperature ladder ('temperatures' with two or more) and no umbrella "
                        "windows (two or more along one coordinate) to plan.")


# -- the data: a trial this module runs, or a run folder --------------------------------
@dataclass(frozen=True)
class Source:
    """The run a proposal is planned from.

    folder : Path
    description : str, for the report and the written protocol's header
    walker_steps_per_second : float, measured speed of all walkers together on this machine
    speed_from : str, how the speed was measured
    """

    folder: Path
    description: str
    walker_steps_per_second: float
    speed_from: str


def trial_protocol(protocol, length_ps):
    """``protocol`` with a production of ``length_ps`` (whole cycles, at least one), no frames."""
    cycle_ps = protocol.run.steps_per_cycle * protocol.timestep
    cycles = max(1, math.ceil(length_ps / cycle_ps - 1e-9))
    run = replace(protocol.run, production_cycles=cycles, frame_every=0,
                  checkpoint_every=min(protocol.run.checkpoint_every, protocol.run.n_cycles))
    return parse_protocol(dump_protocol(replace(protocol, run=run)), protocol.path)


def run_trial(protocol, length_ps, folder, *, progress=False):
    """Run a short trial of ``protocol`` into ``folder``; returns a Source with its speed."""
    trial = trial_protocol(protocol, length_ps)
    rate, how = _timed_run(trial, folder, progress=progress)
    cycle_ps = trial.run.steps_per_cycle * trial.timestep
    return Source(Path(folder), f"a {trial.run.production_cycles * cycle_ps:g} ps trial of {protocol.path.name}",
                  rate, f"the trial's {how}")


def _timed_run(protocol, folder, *, progress=False):
    """Run ``protocol`` into ``folder``; (walker steps per second of its cycle loop, description)."""
    from .plan import make_plan
    from .scheduler import Scheduler

    plan = make_plan(protocol)
    scheduler = Scheduler(plan, folder, progress=progress)
    scheduler.run()
    cycles, seconds = scheduler.loop_timing
    steps = plan.n_walkers * cycles * protocol.run.steps_per_cycle
    if cycles == 0 or seconds <= 0:
        return math.nan, "cycles (none were run here: the folder was complete)"
    return steps / seconds, f"{cycles} cycles of {plan.n_walkers} walkers on {plan.platform.name} ({seconds:.2f} s)"


def read_source(folder):
    """A run folder to plan from (its speed is measured later, on the proposed protocol)."""
    from .store import LEDGER

    folder = Path(folder)
    if not folder.is_dir():
        raise RunFolderError(f"{folder}: no such run folder (--from).")
    if not (folder / LEDGER).is_file():
        raise RunFolderError(f"{folder}: is not a run folder (no {LEDGER}) (--from).")
    return Source(folder, f"the run folder {folder}", math.nan, "")


#: Cycles of the proposed protocol timed here when the source run gives no speed.
TIMING_CYCLES = 20


def _measure_here(protocol):
    """Walker steps per second of ``protocol``'s cycle loop on this machine, over a few cycles
    run in a temporary folder (building the walkers is not counted)."""
    cycle_ps = protocol.run.steps_per_cycle * protocol.timestep
    short = replace(protocol.run, equilibration_cycles=0, production_cycles=TIMING_CYCLES, frame_every=0,
                    checkpoint_every=TIMING_CYCLES)
    short = parse_protocol(dump_protocol(replace(protocol, run=short)), protocol.path)
    with _temporary() as folder:
        rate, how = _timed_run(short, folder)
    return rate, f"{how}, {TIMING_CYCLES * cycle_ps:g} ps of the proposed protocol timed here"


# -- what the run says -------------------------------------------------------------------
def _quiet_analysis(folder, **options):
    """analyse_run in kT with boost's warnings held back (a short trial overlaps poorly: that
    is what the plan mends); too few samples becomes a hint to run a longer trial."""
    from .analysis import analyse_run

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", BoostWarning)
        try:
            return analyse_run(folder, energy_unit="kT", **options)
        except AnalysisError as err:
            raise AnalysisError(f"{err} (a longer --trial, or a longer run for --from)") from None


def _check_same_axis(protocol, run_protocol, folder, what):
    if what == "ladder":
        run_ladder = run_protocol.temperatures
        low, high = protocol.temperatures[0], protocol.temperatures[-1]
        if len(run_ladder) < 2 or run_ladder[0] > low * (1 + 1e-9) or run_ladder[-1] < high * (1 - 1e-9):
            raise RunFolderError(f"{folder}: its temperature ladder ({run_ladder[0]:g} K to {run_ladder[-1]:g} K) "
                                 f"must span the protocol's ({low:g} K to {high:g} K) to plan from it.")
    else:
        axis = protocol.umbrella[0]
        if [a.coordinate for a in run_protocol.umbrella] != [axis.coordinate] or \
                _definition(run_protocol.coordinates[axis.coordinate]) != \
                _definition(protocol.coordinates[axis.coordinate]):
            raise RunFolderError(f"{folder}: its windows are not along the protocol's coordinate "
                                 f"{axis.coordinate!r} (defined the same way).")
        if len(run_protocol.temperatures) > 1 or run_protocol.temperature != protocol.temperature:
            raise RunFolderError(f"{folder}: its windows must run at the protocol's temperature "
                                 f"({protocol.temperature:g} K) and without a ladder.")


def _definition(spec):
    """What defines a coordinate, without where it was written."""
    return spec.kind, tuple((p.atoms, p.centre) for p in spec.points), spec.axis, spec.terms, spec.unit


def _energy_moments(folder):
    """Mean and variance of the potential energy per rung over production cycles."""
    from .analysis import load_study

    protocol, data, _ = load_study(folder)
    means, variances = [], []
    for k in range(len(data.conditions)):
        energies = data.potential_rt[(data.condition_rt == k) & data.production_t[None, :]]
        means.append(float(np.mean(energies)))
        variances.append(float(np.var(energies, ddof=1)) if energies.size > 1 else 0.0)
    if min(variances) <= 0.0:
        raise AnalysisError(f"{folder}: a rung has no spread of potential energies yet "
                            "(a longer --trial, or a longer run for --from)")
    return EnergyMoments(np.array(protocol.temperatures), np.array(means), np.array(variances))


# -- the proposal ------------------------------------------------------------------------
@dataclass(frozen=True)
class Proposal:
    """A planned protocol and what it predicts.

    protocol : boost.protocol.Protocol, as it reads back from ``text`` at the output path
    text : str, the YAML to write, header comment included
    pairs : tuple of (label_i, label_j, predicted), one per neighbour pair
    measured : tuple of (label_i, label_j, measured) of the source run (refinement), else ()
    report : tuple of str, lines for the terminal
    """

    protocol: object
    text: str
    pairs: tuple
    measured: tuple
    report: tuple


def propose(protocol, source, targets, output, *, refine=False):
    """Plan a new protocol from ``protocol`` and the run in ``source``; returns a Proposal.

    Parameters
    ----------
    protocol : boost.protocol.Protocol
    source : Source
    targets : Targets
    output : path-like, where the protocol will be written (paths in it are made relative to it)
    refine : bool
        Keep every condition of ``protocol`` (the source must be a run of it) and add
        conditions only between neighbours whose measured acceptance or overlap is short
        of the target.
    """
    from .analysis import load_study

    what = what_to_plan(protocol)
    run_protocol, data, _ = load_study(source.folder)
    _check_same_axis(protocol, run_protocol, source.folder, what)
    if refine and _conditions(run_protocol) != _conditions(protocol):
        raise RunFolderError(f"{source.folder}: --refine adds conditions to the run of this very protocol; the "
                             "folder's temperatures or windows differ from it.")
    if what == "ladder":
        analysis = _quiet_analysis(source.folder)
        new, pairs, measured, lines = _plan_ladder(protocol, source, analysis, targets, refine)
    else:
        analysis = _quiet_analysis(source.folder)
        new, pairs, measured, lines = _plan_windows(protocol, source, analysis, targets, refine)
    run, production_lines = _production(protocol, run_protocol, data, analysis, targets,
                                        _weakest_pair(run_protocol, analysis, what, targets))
    new = replace(new, run=run)
    if refine and run.production_cycles == run_protocol.run.production_cycles:
        # the refined protocol adds to the run instead of repeating it (boost.lineage)
        where = os.path.relpath(os.path.abspath(source.folder), os.path.abspath(Path(output).parent))
        new = replace(new, run=replace(run, builds_on=where))
        lines.append(f"builds on {source.folder} (run.builds_on): only the added conditions run, and the analysis "
                     "pools them with its samples")
    kept = len(run_protocol.temperatures) * run_protocol.n_windows if new.run.builds_on else 0
    lines += production_lines + _wall_time(new, source, kept)
    header = _header(source, what, targets, refine, pairs)
    text = header + _rebased_dump(new, protocol, Path(output))
    planned = parse_protocol(text, Path(output))
    return Proposal(planned, text, tuple(pairs), tuple(measured), tuple(lines))


def _weakest_pair(run_protocol, analysis, what, targets):
    """The source run's lowest measured neighbour acceptance or overlap, over the target."""
    from .diagnostics import neighbour_overlaps

    if what == "ladder":
        if analysis.swaps is None:
            return math.inf
        n = len(run_protocol.temperatures)
        return min(analysis.swaps.acceptance_ij[i, i + 1] for i in range(n - 1)) / targets.acceptance
    shape = (len(run_protocol.umbrella[0].centres),)
    order = np.argsort(run_protocol.umbrella[0].centres, kind="stable")
    overlap = analysis.overlap[np.ix_(order, order)]
    return min(value for _, _, value in neighbour_overlaps(overlap, shape)) / targets.overlap


def _conditions(protocol):
    return (protocol.temperatures, tuple((a.coordinate, a.centres, a.springs) for a in protocol.umbrella))


def _plan_ladder(protocol, source, analysis, targets, refine):
    moments = _energy_moments(source.folder)
    ladder = protocol.temperatures
    measured = ()
    if refine:
        if analysis.swaps is None:
            raise ProtocolError(f"{protocol.path}: --refine of a temperature ladder reads the measured swap "
                                "acceptance; the protocol has no 'exchange'.")
        measured = tuple((i, i + 1, float(analysis.swaps.acceptance_ij[i, i + 1])) for i in range(len(ladder) - 1))
        poor = [(i, j) for i, j, value in measured if not value >= targets.acceptance]
        design = insert_rungs(moments, ladder, poor, targets.acceptance)
        measured = tuple((f"{ladder[i]:.1f} K", f"{ladder[j]:.1f} K", value) for i, j, value in measured)
    else:
        design = design_ladder(moments, ladder[0], ladder[-1], targets.acceptance)
    # new rungs to 0.1 K, so the written protocol reads easily; predictions follow the rounding
    temperatures = tuple(t if t in ladder else round(t, 1) for t in design.temperatures)
    design = replace(design, acceptance=tuple(moments.acceptance(a, b) for a, b in zip(temperatures, temperatures[1:])))
    pairs = [(f"{a:.1f} K", f"{b:.1f} K", p) for a, b, p in zip(temperatures, temperatures[1:], design.acceptance)]
    added = len(temperatures) - len(ladder)
    lines = [f"temperature ladder: {len(temperatures)} rungs from {temperatures[0]:g} K to {temperatures[-1]:g} K"
             + (f" ({added} added between neighbours whose measured acceptance is below {targets.acceptance:g})"
                if refine else "")
             + f" for neighbour swap acceptance of at least {targets.acceptance:g} (Gaussian energy model)"]
    lines += [f"  {a} - {b}: predicted acceptance {p:.3f}" for a, b, p in pairs]
    if refine:
        lines += [f"  measured in the run: {a} - {b}: {p:.3f}" for a, b, p in measured if not p >= targets.acceptance]
    new = replace(protocol, temperatures=tuple(temperatures))
    return new, pairs, measured, lines


#: Most samples per condition the planning PMF uses (evenly spaced over the production).
PROFILE_SAMPLES = 2000


def _planning_profile(folder, protocol):
    """The run's PMF along the protocol's umbrella coordinate, in kT at its temperature, on
    bins one window width wide (the stiffest window's standard deviation), as a Profile.

    MBAR (boost.reweight) over every production sample of the run, consecutive ones
    included, up to PROFILE_SAMPLES per condition: for the shape of a PMF more samples
    beat fewer independent ones, and no error bar is wanted here.
    """
    from .analysis import compute_sample_reduced_potentials, load_study
    from .analysis.samples import condition_walkers
    from .conditions import compute_unbiased_reduced_potential
    from .reweight import Reweighting

    axis = protocol.umbrella[0]
    periodic = protocol.coordinates[axis.coordinate].periodic
    width = 1.0 / math.sqrt(beta(protocol.temperature) * max(axis.springs))
    run_protocol, data, _ = load_study(folder)
    production = np.flatnonzero(data.production_t)
    walkers, cycles, N_k = [], [], []
    for k in range(len(data.conditions)):
        walker_t, held = condition_walkers(data, k, production)
        keep = np.unique(np.linspace(0, held.size - 1, min(held.size, PROFILE_SAMPLES)).astype(int))
        walkers.append(walker_t[keep])
        cycles.append(held[keep])
        N_k.append(keep.size)
    walkers, cycles = np.concatenate(walkers), np.concatenate(cycles)
    u_kn = compute_sample_reduced_potentials(data, run_protocol, data.conditions, walkers, cycles)
    u_n = compute_unbiased_reduced_potential(protocol.temperature, data.potential_rt[walkers, cycles],
                                             volume_n=data.volume_rt[walkers, cycles], pressure=protocol.pressure)
    values = data.values_rtc[walkers, cycles, data.coordinate_names.index(axis.coordinate)]
    if periodic:
        edges = np.linspace(-math.pi, math.pi, min(720, max(36, math.ceil(2 * math.pi / width))) + 1)
        lower, upper = -math.pi, math.pi
    else:
        lower, upper = min(axis.centres) - 4 * width, max(axis.centres) + 4 * width
        edges = np.linspace(min(lower, values.min()), max(upper, values.max()) + 1e-9,
                            min(2000, max(20, math.ceil((upper - lower) / width))) + 1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", BoostWarning)
        pmf = Reweighting(u_kn, np.array(N_k), errors=False).compute_pmf(u_n, values, [edges])
    f = np.where(pmf.counts > 0, pmf.f, np.nan)
    return profile_on_grid(pmf.centres[0], f, periodic=periodic, lower=lower, upper=upper, step=width / 20)


def _plan_windows(protocol, source, analysis, targets, refine):
    axis = protocol.umbrella[0]
    coordinate = protocol.coordinates[axis.coordinate]
    b = beta(protocol.temperature)
    width = 1.0 / math.sqrt(b * max(axis.springs))
    profile = _planning_profile(source.folder, protocol)
    share = _sample_share(source.folder, analysis, coordinate.periodic)
    order = np.argsort(axis.centres, kind="stable")
    sorted_c = [axis.centres[i] for i in order]
    sorted_k = [axis.springs[i] for i in order]
    measured = ()
    if refine:
        overlap = analysis.overlap
        measured = tuple((i, j, float(min(overlap[order[i], order[j]], overlap[order[j], order[i]])))
                         for i, j in neighbour_pairs(len(sorted_c), coordinate.periodic))
        # the planner's margin here too: a short run's measured overlap scatters as much as a prediction
        poor = [(i, j) for i, j, value in measured if not value >= targets.overlap * MARGIN]
        design = insert_windows(profile, sorted_c, sorted_k, poor, b, targets.overlap, share=share)
        measured = tuple((_show(sorted_c[i], coordinate), _show(sorted_c[j], coordinate), value)
                         for i, j, value in measured)
    else:
        design = design_windows(profile, sorted_c[0], sorted_c[-1], min(axis.springs), b, targets.overlap,
                                share=share)
    design = _rounded(design, coordinate, width, profile, b, share)
    shown = [_show(c, coordinate) for c in design.centres]
    pairs = [(shown[i], shown[j], p) for (i, j), p in zip(neighbour_pairs(len(shown), coordinate.periodic),
                                                           design.overlap)]
    spring_text = format_quantity(min(axis.springs), coordinate.spring_dimension)
    head = (f"umbrella windows along {axis.coordinate}: {len(design.centres)} "
            + (f"({len(design.added)} added between neighbours whose measured overlap is below "
               f"{targets.overlap * MARGIN:g}, {MARGIN:g} x the target) " if refine else f"from {shown[0]} to {shown[-1] if not coordinate.periodic else 'around the circle'}, spring {spring_text} (the protocol's{' softest' if len(set(axis.springs)) > 1 else ''}), ")
            + f"for neighbour MBAR overlap of at least {targets.overlap:g} (planned for {targets.overlap * MARGIN:g}, each window weighted by its expected independent samples)")
    lines = [head] + [f"  {a} - {b_}: predicted overlap {p:.3f}" for a, b_, p in pairs]
    if refine:
        lines += [f"  measured in the run: {a} - {b_}: {p:.3f}" for a, b_, p in measured
                  if not p >= targets.overlap * MARGIN]
    new = replace(protocol, umbrella=(UmbrellaAxis(axis.coordinate, design.centres, design.springs),))
    return new, pairs, measured, lines


def _sample_share(folder, analysis, periodic):
    """centre -> 1 / g: the relative count of independent samples a window there gets, g
    (statistical inefficiency) interpolated between the source run's windows."""
    from .analysis import load_run

    run_protocol, _ = load_run(folder)
    centres = np.asarray(run_protocol.umbrella[0].centres)
    share = 1.0 / np.maximum(1.0, np.asarray(analysis.g_k, dtype=float))
    order = np.argsort(centres)
    centres, share = centres[order], share[order]
    if periodic:
        return lambda c: float(np.interp(c, centres, share, period=2 * math.pi))
    return lambda c: float(np.interp(c, centres, share))


def _rounded(design, coordinate, width, profile, b, share):
    """New centres rounded to a whole multiple of a power of ten below a twentieth of a
    window's width (in degrees on an angle), so the written protocol reads easily; the
    predicted overlaps are recomputed for the rounded centres."""
    angle = coordinate.unit == "rad"
    exponent = math.floor(math.log10((math.degrees(width) if angle else width) / 20))
    if design.added:
        kept = set(range(len(design.centres))) - set(design.added)
    else:                                      # the protocol's ends (its first centre on a circle)
        kept = {0} if coordinate.periodic else {0, len(design.centres) - 1}
    centres = []
    for i, c in enumerate(design.centres):
        if i in kept:
            centres.append(c)
        else:
            shown = round(math.degrees(c) if angle else c, -exponent)
            centres.append(math.radians(shown) if angle else shown)
    overlap = predict_neighbour_overlaps(profile, centres, design.springs, b, share)
    return replace(design, centres=tuple(centres), overlap=overlap)


def _show(value, coordinate):
    return format_coordinate(value, coordinate.periodic or coordinate.unit == "rad")


#: Below this fraction of the target, a run's weakest neighbour pair dominates its error on
#: ΔG, which then says nothing about a run of the planned protocol.
DISCONNECTED = 0.5


def _production(protocol, run_protocol, data, analysis, targets, weakest):
    """The run settings of the proposal and the report lines on its production.

    ``weakest``: the source's lowest neighbour acceptance or overlap over the target. Below
    DISCONNECTED its error on ΔG measures that gap rather than sampling, and no production
    is planned from it; between that and 1 the estimate errs long (the planned neighbours
    overlap more than the run's did).
    """
    cycle_ps = protocol.run.steps_per_cycle * protocol.timestep
    run_cycle_ps = run_protocol.run.steps_per_cycle * run_protocol.timestep
    source_ps = float(np.sum(data.production_t)) * run_cycle_ps
    g_ps = float(np.max(analysis.g_k)) * run_cycle_ps
    floor_ps = MIN_INDEPENDENT * g_ps
    lines = [f"statistical inefficiency in the run: up to {g_ps:.3g} ps (condition {int(np.argmax(analysis.g_k))}); "
             f"{MIN_INDEPENDENT} independent samples per condition need at least {floor_ps:.3g} ps of production"]
    run = protocol.run
    basins = analysis.basins
    if basins is None or len(basins.names) < 2:
        lines.append("no ΔG to aim at (the protocol names fewer than two basins): production kept"
                     if targets.error_kt is not None else "production kept (no basins for a ΔG)")
        return run, lines
    name_a, name_b = basins.names[:2]
    error = float(basins.d_Delta_g[0, 1])
    unit = protocol.analysis.energy_unit
    shown = lambda kt: f"{energy_in(kt, unit, protocol.temperature):.3g} {unit}"   # noqa: E731
    lines.append(f"ΔG({name_a} -> {name_b}) in the run: {shown(float(basins.Delta_g[0, 1]))} ± {shown(error)} "
                 f"after {source_ps:g} ps per condition ({analysis.uncertainty.label})")
    if weakest < DISCONNECTED:
        lines.append(f"production kept: a neighbour pair of the run reaches only {weakest:.2f} of the target, so "
                     "its error on ΔG says little about the planned protocol; run that, then plan the production "
                     "from it (boost propose NEW --from ITS_RUN --error ...)")
        return run, lines
    caveat = "; errs long: a neighbour pair of the run fell short of the target" if weakest < 1 else ""
    if targets.error_kt is None:
        planned_ps = run.production_cycles * cycle_ps
        lines.append(f"production kept at {planned_ps:g} ps: predicted error ± "
                     f"{shown(error * math.sqrt(source_ps / planned_ps))} (errors shrink as 1/sqrt(production), "
                     f"--error sets a target{caveat})")
        return run, lines
    needed_ps = max(source_ps * (error / targets.error_kt) ** 2, floor_ps)
    cycles = max(1, math.ceil(needed_ps / cycle_ps - 1e-9))
    lines.append(f"production set to {cycles * cycle_ps:g} ps per condition for ± {shown(targets.error_kt)} on ΔG "
                 f"(errors shrink as 1/sqrt(production), each new condition assumed to sample as the run's did{caveat})")
    return replace(run, production_cycles=cycles), lines


def _wall_time(protocol, source, kept=0):
    """The proposed run's wall time; ``kept``: conditions of the run it builds on, not run again."""
    rate, how = source.walker_steps_per_second, source.speed_from
    if not rate > 0:
        rate, how = _measure_here(protocol)
    conditions = len(protocol.temperatures) * protocol.n_windows - kept
    steps = conditions * protocol.run.n_cycles * protocol.run.steps_per_cycle
    return [f"wall time on this machine: about {_duration(steps / rate)} for {steps} walker steps at "
            f"{rate:.4g} walker steps/s (measured from {how})"]


def _duration(seconds):
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _header(source, what, targets, refine, pairs):
    kind = "acceptance" if what == "ladder" else "MBAR overlap"
    goal = targets.acceptance if what == "ladder" else targets.overlap
    low = min(p for _, _, p in pairs)
    action = "refined (extra conditions between poor neighbours)" if refine else f"{what} planned"
    return (f"# planned by boost propose from {source.description} on {time.strftime('%Y-%m-%d')}: {action}\n"
            f"# for neighbour {kind} of at least {goal:g}; the lowest predicted is {low:.3f} over "
            f"{len(pairs)} neighbour pairs.\n")


def _rebased_dump(new, original, output):
    """YAML of ``new`` whose relative file paths (written for ``original``'s folder) name the
    same files from ``output``'s folder."""
    here, there = original.base_dir.resolve(), output.resolve().parent
    system = new.system
    if here != there:
        system = _rebase(system, here, there)
        reference = getattr(system, "reference", None)
        if reference is not None and (here / reference).is_file() and not Path(reference).is_absolute():
            system = replace(system, reference=os.path.relpath(here / reference, there))
    return dump_protocol(replace(new, system=system))


def _rebase(value, here, there):
    if isinstance(value, FileRef):
        if Path(value.text).is_absolute():
            return value
        return replace(value, text=os.path.relpath(value.path, there))
    if isinstance(value, tuple):
        return tuple(_rebase(item, here, there) for item in value)
    if is_dataclass(value) and not isinstance(value, type):
        changes = {f.name: _rebase(getattr(value, f.name), here, there) for f in fields(value) if f.init}
        return replace(value, **{k: v for k, v in changes.items() if v is not getattr(value, k)})
    return value


def write_proposal(proposal, path):
    """Write the proposal's text to ``path``, a file that must not exist yet (never overwritten)."""
    path = Path(path)
    try:
        with open(path, "x", encoding="utf-8") as handle:
            handle.write(proposal.text)
    except FileExistsError:
        raise ProtocolError(f"{path}: already exists; boost propose never overwrites a file: "
                            "choose another -o.") from None
    except OSError as err:
        raise ProtocolError(f"{path}: cannot be written ({err.strerror}); choose another -o.") from None
    return path


def trial_folder(folder):
    """A context manager giving the trial's run folder: ``folder``, or a temporary one removed after."""
    if folder is not None:
        from contextlib import nullcontext
        return nullcontext(Path(folder))
    return _temporary()


class _temporary:
    def __enter__(self):
        self._holder = tempfile.TemporaryDirectory(prefix="boost-trial-")
        return Path(self._holder.name) / "trial"

    def __exit__(self, *exc):
        self._holder.cleanup()
        return False
