"""Run a protocol again and say, number by number, whether the repeat reproduces the original.

A repeat starts from a run folder (its ``protocol.yaml`` copy, run again on the platform
the original ran on) or from a protocol file (as it is now, or as committed at a git
revision). It runs into a new folder, analyses both runs with the same target
temperature and energy unit, and compares every headline number: basin populations, ΔG
between basin pairs, condition free energies f_k and PMF values per bin.

Verdicts, per number:

- ``identical``: value and standard error are equal bit for bit (what a deterministic
  platform gives for the same protocol);
- ``agrees``: the values differ by at most :data:`AGREEMENT` combined standard errors,
  sqrt(σ_original² + σ_repeat²);
- ``differs``: anything else, including a number only one run has.
"""

import json
import logging
import math
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from .exceptions import InputError, RunFolderError, warnings_to_log
from .limits import MAX_SPEC_BYTES
from .protocol import PlatformSettings, parse_protocol
from .protocol_dump import dump_protocol
from .provenance import read_protocol_at_commit
from .spec import read_text
from .store import LEDGER, PROTOCOL, RunFolder, write_atomically
from .units import format_coordinate

log = logging.getLogger("boost")

#: Combined standard errors within which two values agree.
AGREEMENT = 2.0
#: What a repeat writes into its own folder besides the run: where it came from.
RECORD = "repeat.json"


@dataclass(frozen=True)
class Headline:
    """One headline number of an analysis, with its standard error (NaN when it has none)."""

    quantity: str          # our words, e.g. "population of basin left"
    unit: str              # 'fraction', 'kT', 'kJ/mol', 'kcal/mol'
    value: float
    error: float


@dataclass(frozen=True)
class Check:
    """One number of the original next to the same number of the repeat, and the verdict."""

    quantity: str
    unit: str
    original: Headline | None      # None: the original has no such number
    repeat: Headline | None
    verdict: str                   # 'identical', 'agrees' or 'differs'

    @property
    def difference(self):
        """Repeat minus original, in ``unit`` (NaN when either is missing)."""
        if self.original is None or self.repeat is None:
            return math.nan
        return self.repeat.value - self.original.value


@dataclass(frozen=True)
class Comparison:
    """Every check of a repeat against its original."""

    checks: tuple          # tuple[Check, ...]

    def count(self, verdict):
        return sum(check.verdict == verdict for check in self.checks)

    @property
    def reproduced(self):
        """True when no number differs."""
        return self.count("differs") == 0


@dataclass(frozen=True)
class RepeatPlan:
    """What a repeat will do, checked before anything is written."""

    source: Path
    kind: str                      # 'run folder' or 'protocol file'
    protocol: object               # boost.protocol.Protocol
    commit: str | None             # full sha when the protocol was read at a commit
    original: Path | None          # run folder to compare with, or None
    folder: Path                   # where the repeat runs
    platform: PlatformSettings | None   # the original's platform; None: the protocol's
    earlier: "RepeatPlan | None" = None  # the repeat of the run this one builds on (run.builds_on), made first


@dataclass(frozen=True)
class RepeatOutcome:
    plan: RepeatPlan
    temperature: float             # K, of both analyses
    headlines: tuple               # the repeat's Headline numbers
    comparison: Comparison | None  # None when there is no original to compare with
    earlier: "RepeatOutcome | None" = None   # the repeat of the run this one builds on


# -- planning: every check before anything is written -----------------------------------
def plan_repeat(source, *, folder=None, revision=None, against=None):
    """Read and check what to repeat; writes nothing.

    Parameters
    ----------
    source : path-like
        A run folder, or a protocol file.
    folder : path-like, optional
        Where the repeat runs; must be absent or empty. Default: ``SOURCE-repeat`` for a
        run folder, ``AGAINST-repeat`` with ``against``, else ``runs/<protocol
        name>-repeat`` (``runs/<protocol name>-<commit>`` at a commit).
    revision : str, optional
        A git revision: run the protocol file as committed there (protocol files only).
    against : path-like, optional
        A run folder to compare the repeat with instead of the source.

    Raises
    ------
    InputError, ProtocolError, RunFolderError
        One line naming the source, the folder or the revision.
    """
    source = Path(source)
    if source.is_dir():
        if revision is not None:
            raise RunFolderError(f"{source}: --commit needs a protocol file; a run folder is repeated "
                                 f"from its own {PROTOCOL}.")
        kind, commit = "run folder", None
        protocol = _protocol_of_run(source)
    else:
        kind = "protocol file"
        if revision is not None:
            text, commit = read_protocol_at_commit(source, revision)
        elif source.exists():         # read_text refuses a FIFO, a device or a too-large file in one line
            text, commit = read_text(source, "protocol", max_bytes=MAX_SPEC_BYTES), None
        else:
            raise InputError(f"{source}: no such run folder or protocol file.")
        protocol = parse_protocol(text, source)
    original = Path(against) if against is not None else (source if kind == "run folder" else None)
    if original is not None:
        _check_run_folder(original, "--against" if against is not None else "SOURCE")
    folder = Path(folder) if folder is not None else _default_folder(source, kind, commit, original)
    _check_fresh(folder)
    return RepeatPlan(source=source, kind=kind, protocol=protocol, commit=commit, original=original,
                      folder=folder, platform=_recorded_platform(original, protocol) if original else None,
                      earlier=_plan_earlier(protocol, original, folder))


def _plan_earlier(protocol, original, folder):
    """The repeat of the run ``protocol`` builds on, into FOLDER-earlier: the chain is
    rebuilt run by run, each compared with its original. The earlier run is the one the
    original's ledger records, else the one the protocol names."""
    if protocol.run.builds_on is None:
        return None
    found = RunFolder(original).source() if original is not None else None
    earlier = found[0].path if found else protocol.source_folder
    if not (earlier / LEDGER).is_file():
        raise RunFolderError(f"{protocol.path}: run.builds_on names {earlier}, which is not a run folder; a repeat "
                             "rebuilds the run it builds on from that folder's protocol.")
    return plan_repeat(earlier, folder=folder.with_name(folder.name + "-earlier"))


def _protocol_of_run(run):
    """A run folder's protocol copy, parsed as if it stood where the original protocol file was.

    Relative paths in the copy are relative to the original file's folder; the folder
    comes from provenance.json ('protocol_folder' when recorded, else 'protocol_file',
    a relative one taken from the current folder, where ``boost run`` usually started).
    """
    copy = run / PROTOCOL
    if not copy.is_file():
        raise RunFolderError(f"{run}: is a folder but not a run folder (no {PROTOCOL}); "
                             "give a run folder or a protocol file.")
    return parse_protocol(read_text(copy, "protocol"), RunFolder(run).original_protocol_place())


def _read_provenance(run):
    """A run folder's provenance record ({} for a folder made without one)."""
    folder = RunFolder(run)
    return folder.read_provenance() if folder.provenance.is_file() else {}


def _check_run_folder(run, option):
    for name in (PROTOCOL, LEDGER):
        if not (run / name).is_file():
            raise RunFolderError(f"{run}: {option} must be a run folder; it has no {name}.")


def _default_folder(source, kind, commit, original):
    if original is not None:
        named = original if original.name else original.resolve()
        return named.with_name(named.name + "-repeat")
    suffix = commit[:8] if commit else "repeat"
    return Path("runs") / f"{source.stem}-{suffix}"


def _check_fresh(folder):
    if folder.exists() and (not folder.is_dir() or any(folder.iterdir())):
        raise RunFolderError(f"{folder}: already exists and is not empty; a repeat needs a new folder "
                             "(choose one with -o).")


def _recorded_platform(run, protocol):
    """The protocol's platform settings, set to the platform a run folder ran on."""
    provenance = _read_provenance(run)
    name = provenance.get("platform")
    if name not in ("Reference", "CPU"):
        return None
    properties = provenance.get("platform_properties") or {}
    threads = properties.get("Threads")
    return replace(protocol.platform, name=name, threads=int(threads) if threads else None,
                   deterministic=properties.get("DeterministicForces") == "true")


# -- running ---------------------------------------------------------------------------
def run_repeat(plan, *, progress=True):
    """Analyse the original, run the repeat into ``plan.folder``, analyse it and compare.

    The original is analysed first, so a run that cannot be analysed stops the repeat
    before any MD. Both analyses use the repeated protocol's temperature and energy unit.

    Returns
    -------
    RepeatOutcome
    """
    from .scheduler import run_protocol

    protocol = plan.protocol
    earlier = run_repeat(plan.earlier, progress=progress) if plan.earlier else None
    if earlier is not None:             # build on the repeat of the earlier run, not on the original
        run = replace(protocol.run, builds_on=str(plan.earlier.folder.resolve()))
        protocol = parse_protocol(dump_protocol(replace(protocol, run=run)), protocol.path)
    settings = {"temperature": protocol.temperature, "energy_unit": protocol.analysis.energy_unit}
    original = _analyse(plan.original, "original", settings) if plan.original else None
    run_protocol(protocol, plan.folder, platform=plan.platform, progress=progress)
    repeat = _analyse(plan.folder, "repeat", settings)
    comparison = compare_analyses(original, repeat) if original is not None else None
    _write_record(plan, comparison)
    return RepeatOutcome(plan=plan, temperature=protocol.temperature, headlines=headline_numbers(repeat),
                         comparison=comparison, earlier=earlier)


def _analyse(folder, role, settings):
    from .analysis import analyse_run

    with warnings_to_log(f"warning ({role}, {folder})"):
        return analyse_run(folder, **settings)


def _write_record(plan, comparison):
    record = {"source": str(plan.source), "source_kind": plan.kind, "commit": plan.commit,
              "compared_with": None if plan.original is None else str(plan.original)}
    if comparison is not None:
        record["verdicts"] = {v: comparison.count(v) for v in ("identical", "agrees", "differs")}
    write_atomically(plan.folder / RECORD, json.dumps(record, indent=2))


# -- headline numbers and verdicts --------------------------------------------------------
def headline_numbers(analysis):
    """The numbers a repeat is judged on, in the analysis's energy unit.

    Parameters
    ----------
    analysis : boost.analysis.Analysis

    Returns
    -------
    tuple of Headline
        Basin populations (fraction), ΔG for every basin pair i < j (G_j − G_i),
        condition free energies f_k (kT, relative to condition 0), PMF value per bin.
    """
    unit, numbers = analysis.energy_unit, []
    basins = analysis.basins
    if basins is not None:
        for i, name in enumerate(basins.names):
            numbers.append(Headline(f"population of basin {name}", "fraction",
                                    float(basins.populations[i]), float(basins.d_populations[i])))
        for i, a in enumerate(basins.names):
            for j in range(i + 1, len(basins.names)):
                numbers.append(Headline(f"ΔG from basin {a} to basin {basins.names[j]}", unit,
                                        float(basins.Delta_g[i, j]), float(basins.d_Delta_g[i, j])))
    for k, label in enumerate(analysis.condition_labels):
        numbers.append(Headline(f"free energy f of {label}", "kT", float(analysis.f_k[k]),
                                float(analysis.df_k[k])))
    for profile in analysis.profiles:
        numbers.extend(_profile_numbers(analysis, profile))
    return tuple(numbers)


def _profile_numbers(analysis, profile):
    angles = [name in analysis.angle_coordinates for name in profile.coordinates]
    along = ", ".join(profile.coordinates)
    for index in np.ndindex(profile.f.shape):
        where = ", ".join(f"{name} = {format_coordinate(centres[i], angle)}" for name, centres, i, angle
                          in zip(profile.coordinates, profile.centres, index, angles))
        yield Headline(f"PMF along {along} at {where}", analysis.energy_unit,
                       float(profile.f[index]), float(profile.df[index]))


def judge(original, repeat):
    """The verdict on one number: 'identical', 'agrees' or 'differs'.

    Parameters
    ----------
    original, repeat : Headline or None
        None where that run lacks the number.
    """
    if original is None or repeat is None:
        return "differs"
    if _same_bits(original.value, repeat.value) and _same_bits(original.error, repeat.error):
        return "identical"
    if not (math.isfinite(original.value) and math.isfinite(repeat.value)):
        return "agrees" if original.value == repeat.value else "differs"   # equal infinities
    combined = math.hypot(original.error, repeat.error)
    if abs(repeat.value - original.value) <= AGREEMENT * combined:    # False for a NaN error
        return "agrees"
    return "differs"


def _same_bits(a, b):
    return np.float64(a).tobytes() == np.float64(b).tobytes()


def compare_analyses(original, repeat):
    """Check every headline number of ``repeat`` against ``original``.

    Parameters
    ----------
    original, repeat : boost.analysis.Analysis
        Analysed in the same energy unit.

    Returns
    -------
    Comparison
        One check per number either run has, in the original's order, then numbers
        only the repeat has. PMF bins that neither run sampled (NaN in both) are left out.
    """
    before = {h.quantity: h for h in headline_numbers(original)}
    after = {h.quantity: h for h in headline_numbers(repeat)}
    checks = []
    for quantity in [*before, *(q for q in after if q not in before)]:
        a, b = before.get(quantity), after.get(quantity)
        if all(h is None or math.isnan(h.value) for h in (a, b)):
            continue
        unit = (a or b).unit
        checks.append(Check(quantity, unit, a, b, judge(a, b)))
    return Comparison(tuple(checks))


# -- the table -------------------------------------------------------------------------
def _number(value):
    return "–" if value is None or math.isnan(value) else f"{value:.6g}"


def _table(header, rows):
    widths = [max(len(str(cell)) for cell in column) for column in zip(header, *rows)]
    lines = ["  ".join(cell.ljust(w) if i < 2 else cell.rjust(w) for i, (cell, w) in enumerate(zip(line, widths)))
             for line in (header, *rows)]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return lines


def format_outcome(outcome):
    """The terminal report of a repeat: the comparison table, or the repeat's numbers alone."""
    plan = outcome.plan
    at = f" as committed at {plan.commit[:12]}" if plan.commit else ""
    lines = [format_outcome(outcome.earlier), ""] if outcome.earlier is not None else []
    lines += [f"repeat of {plan.source} ({plan.kind}{at}) in {plan.folder}, "
              f"numbers at {outcome.temperature:.2f} K"]
    if plan.earlier is not None:
        lines.append(f"built on the repeat of {plan.earlier.source} in {plan.earlier.folder}")
    if outcome.comparison is None:
        rows = [(h.quantity, h.unit, _number(h.value), _number(h.error)) for h in outcome.headlines
                if not math.isnan(h.value)]
        lines += _table(("quantity", "unit", "value", "± standard error"), rows)
        lines.append("no original run to compare with (give one with --against)")
        return "\n".join(lines)
    lines.append(f"compared with {plan.original}")
    rows = [(c.quantity, c.unit, _number(c.original and c.original.value),
             _number(c.original and c.original.error), _number(c.repeat and c.repeat.value),
             _number(c.repeat and c.repeat.error), _number(c.difference), c.verdict)
            for c in outcome.comparison.checks]
    lines += _table(("quantity", "unit", "original", "± standard error", "repeat", "± standard error",
                     "repeat − original", "verdict"), rows)
    comparison = outcome.comparison
    lines.append(f"{comparison.count('identical')} identical (bit for bit), {comparison.count('agrees')} agree "
                 f"within {AGREEMENT:g} combined standard errors, {comparison.count('differs')} differ")
    return "\n".join(lines)
