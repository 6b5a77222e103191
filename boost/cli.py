"""The ``boost`` command: thin wiring from the command line to the pipeline."""

import logging
import os
import sys
from dataclasses import replace
from pathlib import Path

import click

from .exceptions import BoostError


def _fail(err, debug):
    if debug:
        raise err
    click.echo(f"boost: {err}", err=True)
    sys.exit(2)


class _Group(click.Group):
    """Turns every BoostError into one line on stderr and exit code 2."""

    def invoke(self, ctx):
        debug = "--debug" in sys.argv
        try:
            return super().invoke(ctx)
        except BoostError as err:
            _fail(err, debug)
        except KeyboardInterrupt:
            click.echo("boost: interrupted; the run folder holds every complete cycle.", err=True)
            sys.exit(130)
        except (click.exceptions.Exit, click.ClickException, click.Abort):
            raise
        except BrokenPipeError:
            # the reader of our output went away (`boost ... | head`): stop quietly, as the
            # Python documentation advises for SIGPIPE, so the interpreter's final flush
            # does not fail again
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
            sys.exit(1)
        except Exception as err:  # a bug in boost or a library: still one line unless --debug
            if debug:
                raise
            click.echo(f"boost: internal error: {type(err).__name__}: {err} (rerun with --debug for details)",
                       err=True)
            sys.exit(1)


@click.group(cls=_Group)
@click.option("--debug", is_flag=True, help="Show tracebacks for errors.")
@click.version_option(package_name="boost")
def main(debug):
    """Enhanced sampling on OpenMM, reweighted to equilibrium populations, ΔG and PMFs."""
    logger = logging.getLogger("boost")
    if not logger.handlers:
        handler = logging.StreamHandler()
        handler.setFormatter(logging.Formatter("boost: %(message)s"))
        logger.addHandler(handler)
    logger.setLevel(logging.DEBUG if debug else logging.INFO)
    logger.propagate = False


def _platform_override(protocol, name, threads):
    if name is None and threads is None:
        return None
    settings = protocol.platform
    return replace(settings, name=name or settings.name, threads=threads or settings.threads)


@main.command()
@click.argument("protocol_file", type=click.Path(path_type=Path))   # read_text explains a folder in one line
def check(protocol_file):
    """Validate PROTOCOL_FILE and its system without running MD; print what would run."""
    from .protocol import load_protocol
    from .plan import make_plan
    from .summary import describe_plan

    protocol = load_protocol(protocol_file)
    plan = make_plan(protocol, probe=False)
    click.echo(describe_plan(plan))
    click.echo("protocol is valid.")


@main.command()
@click.argument("protocol_file", type=click.Path(path_type=Path))   # read_text explains a folder in one line
@click.option("-o", "--folder", type=click.Path(file_okay=False, path_type=Path),
              help="Run folder (default: runs/<protocol name>).")
@click.option("--platform", "platform_name", type=click.Choice(["auto", "Reference", "CPU"]),
              help="OpenMM platform, overriding the protocol.")
@click.option("--threads", type=click.IntRange(min=1), help="CPU platform threads.")
@click.option("--workers", type=click.IntRange(min=1), help="Worker processes (default: one per core).")
@click.option("--quiet", is_flag=True, help="No progress bar.")
def run(protocol_file, folder, platform_name, threads, workers, quiet):
    """Run PROTOCOL_FILE into a run folder; a partial run of the same protocol resumes.

    Under mpiexec, walkers are spread over the ranks and rank 0 writes the run folder.
    """
    from .protocol import load_protocol
    from .plan import make_plan
    from .scheduler import Scheduler
    from .summary import describe_plan
    from .workers import cores_of_rank, mpi_world, release_waiting_ranks, serve_mpi_rank

    comm = mpi_world()
    if comm is not None and comm.rank > 0:
        serve_mpi_rank(comm)
        return
    cores = None if comm is None else cores_of_rank(comm)
    try:
        protocol = load_protocol(protocol_file)
        folder = folder or Path("runs") / protocol_file.stem
        plan = make_plan(protocol, platform=_platform_override(protocol, platform_name, threads),
                         workers=workers, comm=comm, cores=cores)
        click.echo(describe_plan(plan))
        Scheduler(plan, folder, progress=not quiet, workers=workers, comm=comm, cores=cores).run()
    finally:
        release_waiting_ranks(comm)
    click.echo(f"run complete: {folder}")


@main.command()
def systems():
    """List the bundled systems a protocol can name, and where the example protocols are."""
    from .bundled import bundled_folder
    from .system_spec import list_bundled_systems

    for name, title, _ in list_bundled_systems():
        click.echo(f"{name:24s} {title}")
    click.echo(f"example protocols: {bundled_folder('protocols')}")


@main.command()
@click.argument("run_folder", type=click.Path(file_okay=False, path_type=Path))
@click.option("--temperature", help="Target temperature with its unit, e.g. '320 K' (default: the protocol's).")
@click.option("--unit", "energy_unit", type=click.Choice(["kJ/mol", "kcal/mol", "kT"]),
              help="Energy unit of the tables (default: the protocol's analysis.energy_unit).")
@click.option("--output", type=click.Path(file_okay=False, path_type=Path),
              help="Folder for tables and plots (default: RUN_FOLDER/analysis).")
@click.option("--memory", help="Memory the analysis may use, e.g. '4 GiB' (default: the protocol's analysis.memory).")
def analyze(run_folder, temperature, energy_unit, output, memory):
    """Reweight RUN_FOLDER with MBAR: basin populations, ΔG, PMFs, diagnostics."""
    from .analysis import analyse_run
    from .exceptions import ProtocolError, RunFolderError, warnings_to_log
    from .protocol import MIN_ANALYSIS_MEMORY
    from .report import claim_output_folder, format_summary, write_report
    from .store import LEDGER
    from .units import parse_quantity

    if not run_folder.is_dir():
        raise RunFolderError(f"{run_folder}: no such run folder.")
    if not (run_folder / LEDGER).is_file():
        raise RunFolderError(f"{run_folder}: is not a run folder (no {LEDGER}).")
    target = None
    if temperature is not None:
        target = parse_quantity(temperature, "temperature", place="--temperature")
    memory_bytes = None
    if memory is not None:
        memory_bytes = parse_quantity(memory, "memory", place="--memory")
        if memory_bytes < MIN_ANALYSIS_MEMORY:
            raise ProtocolError(f"--memory must be at least {MIN_ANALYSIS_MEMORY // 2**20} MiB. Got {memory!r} instead.")
    output = claim_output_folder(output or run_folder / "analysis")     # before hours of work, not after
    with warnings_to_log():
        analysis = analyse_run(run_folder, temperature=target, energy_unit=energy_unit, memory=memory_bytes)
    out = write_report(analysis, output)
    click.echo(format_summary(analysis))
    click.echo(f"tables and plots: {out}")


@main.command()
@click.argument("source", type=click.Path(path_type=Path))
@click.option("-o", "--folder", type=click.Path(file_okay=False, path_type=Path),
              help="Folder for the repeat, absent or empty (default: SOURCE-repeat for a run folder).")
@click.option("--commit", "revision", help="Run the protocol file as committed at this git revision.")
@click.option("--against", type=click.Path(file_okay=False, path_type=Path),
              help="Run folder to compare the repeat with (default: SOURCE when it is a run folder).")
@click.option("--quiet", is_flag=True, help="No progress bar.")
@click.pass_context
def repeat(ctx, source, folder, revision, against, quiet):
    """Run SOURCE again (a run folder or a protocol file) and compare every headline number.

    Exit code 0 when no number differs, 1 when one does, 2 for bad input.
    """
    from .repeat import format_outcome, plan_repeat, run_repeat

    plan = plan_repeat(source, folder=folder, revision=revision, against=against)
    outcome = run_repeat(plan, progress=not quiet)
    click.echo(format_outcome(outcome))
    if outcome.comparison is not None and not outcome.comparison.reproduced:
        ctx.exit(1)


@main.command()
@click.argument("protocol_file", type=click.Path(path_type=Path))   # read_text explains a folder in one line
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="The protocol to write; must not exist yet.")
@click.option("--from", "source", type=click.Path(path_type=Path),
              help="Plan from this run folder instead of running a trial.")
@click.option("--refine", is_flag=True,
              help="With --from a run of PROTOCOL_FILE: keep its conditions, add extra ones only between "
                   "neighbours whose measured swap acceptance or overlap is below the target.")
@click.option("--trial", "trial_length", help="Production of the trial run per condition (default: '20 ps').")
@click.option("--trial-folder", type=click.Path(file_okay=False, path_type=Path),
              help="Keep the trial's run folder here (default: a temporary folder, removed afterwards).")
@click.option("--acceptance", help="Target neighbour swap acceptance of a temperature ladder (default 0.3).")
@click.option("--overlap", help="Target MBAR overlap between neighbour windows (default 0.05).")
@click.option("--error", help="Target standard error of ΔG between the first two basins, e.g. '0.1 kcal/mol' "
                              "or '0.2 kT' (kT at the protocol's temperature); sets the production.")
@click.option("--quiet", is_flag=True, help="No progress bar for the trial.")
def propose(protocol_file, output, source, refine, trial_length, trial_folder, acceptance, overlap, error, quiet):
    """Propose a new protocol from PROTOCOL_FILE and a short trial (or a run folder): a
    temperature ladder or umbrella windows spaced for a target swap acceptance or overlap,
    the production for a target error and the wall time it takes here."""
    from .exceptions import ProtocolError, warnings_to_log
    from .proposal import (DEFAULT_TRIAL, propose as plan_protocol, read_source, read_targets, run_trial,
                           trial_folder as trial_place, what_to_plan, write_proposal)
    from .protocol import load_protocol
    from .units import parse_quantity

    if output.exists() or output.is_symlink():
        raise ProtocolError(f"{output}: already exists; boost propose never overwrites a file: choose another -o.")
    if not output.parent.is_dir():
        raise ProtocolError(f"{output}: its folder {output.parent} does not exist; make it or choose another -o.")
    protocol = load_protocol(protocol_file)
    what_to_plan(protocol)
    targets = read_targets(protocol, acceptance=acceptance, overlap=overlap, error=error)
    if source is not None and (trial_length is not None or trial_folder is not None):
        raise ProtocolError("--from plans from an existing run folder; --trial and --trial-folder are for a new "
                            "trial: give one or the other.")
    if refine and source is None:
        raise ProtocolError("--refine needs --from: the run folder of PROTOCOL_FILE whose conditions it refines.")
    with warnings_to_log():
        if source is not None:
            proposal = plan_protocol(protocol, read_source(source), targets, output, refine=refine)
        else:
            length = parse_quantity(trial_length or DEFAULT_TRIAL, "time", place="--trial")
            if not length > 0:
                raise ProtocolError(f"--trial must be a positive time, such as '20 ps'. Got {trial_length!r} instead.")
            with trial_place(trial_folder) as folder:
                trial = run_trial(protocol, length, folder, progress=not quiet)
                proposal = plan_protocol(protocol, trial, targets, output)
    written = write_proposal(proposal, output)
    for line in proposal.report:
        click.echo(line)
    click.echo(f"written: {written}")


if __name__ == "__main__":
    main()
