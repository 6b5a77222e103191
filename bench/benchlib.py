"""Shared helpers of the benchmarks: machine description, timed runs, bare OpenMM loops.

Every benchmark prints ratios of quantities measured side by side in one process run,
never against numbers from another run.
"""

import datetime
import os
import platform as _platform
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

import boost.cores                                # noqa: E402
from boost.protocol import load_protocol          # noqa: E402
from boost.plan import make_plan  # noqa: E402
from boost.scheduler import Scheduler  # noqa: E402


# -- the machine ------------------------------------------------------------------------
def cpu_model():
    """The CPU model name from /proc/cpuinfo ('unknown' elsewhere)."""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.lower().startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return _platform.processor() or "unknown"


def usable_cores():
    return len(boost.cores.usable_cores())


def git_revision():
    try:
        head = subprocess.run(["git", "-C", str(REPO), "rev-parse", "--short", "HEAD"],
                              capture_output=True, text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(REPO), "status", "--porcelain", "boost"],
                               capture_output=True, text=True, check=True).stdout.strip()
        return head + (" (boost/ modified)" if dirty else "")
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


def load_average():
    """The 1-minute load average (other processes competing for the cores)."""
    try:
        return float(Path("/proc/loadavg").read_text().split()[0])
    except (OSError, ValueError, IndexError):
        return float("nan")


_SPIN = ("import time\nstart = time.perf_counter()\ncpu = time.process_time()\n"
         "while time.perf_counter() - start < {seconds}: pass\n"
         "print((time.process_time() - cpu) / (time.perf_counter() - start))")


def core_availability(seconds=1.0):
    """Mean share of a core that each of ``usable_cores()`` busy processes actually got.

    1.0 on an idle machine; well below 1 when other processes compete, and then wall
    times (and most of all parallel speedups) are not to be trusted.
    """
    command = [sys.executable, "-c", _SPIN.format(seconds=seconds)]
    spinners = [subprocess.Popen(command, stdout=subprocess.PIPE, text=True) for _ in range(usable_cores())]
    shares = [float(p.communicate()[0]) for p in spinners]
    return sum(shares) / len(shares)


def describe_load(when):
    """One line: load average and measured core availability."""
    share = core_availability()
    note = "" if share > 0.9 else "  << machine busy: wall-time ratios are unreliable"
    text = f"load      {when}: 1-min load average {load_average():.1f}, core availability {share:.0%}{note}"
    print(text, flush=True)
    return share


def describe_machine(title):
    """Print and return a short header: benchmark, date, CPU, cores, versions, load."""
    from importlib.metadata import version

    import numpy
    import openmm

    lines = [
        f"== {title}",
        f"date      {datetime.datetime.now().astimezone().strftime('%Y-%m-%d %H:%M %Z')}",
        f"cpu       {cpu_model()}; {os.cpu_count()} logical cores, {usable_cores()} usable",
        f"python    {_platform.python_version()}; openmm {openmm.__version__}; "
        f"numpy {numpy.__version__}; pymbar {version('pymbar')}",
        f"boost     git {git_revision()}",
    ]
    text = "\n".join(lines)
    print(text, flush=True)
    describe_load("start")
    return text


# -- protocols and timed runs ------------------------------------------------------------
def write_protocol(folder, name, text):
    """Write a protocol (dedented) as folder/name.yaml and return its path."""
    path = Path(folder) / f"{name}.yaml"
    path.write_text(textwrap.dedent(text))
    return path


def _descendants(pid):
    """Process ids of every live descendant of ``pid`` (Linux /proc)."""
    parent_of = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                stat = (entry / "stat").read_text()
            except OSError:
                continue
            parent_of[int(entry.name)] = int(stat.rpartition(")")[2].split()[1])
    found, frontier = set(), {pid}
    while frontier:
        frontier = {child for child, parent in parent_of.items() if parent in frontier} - found
        found |= frontier
    return found


def tree_cpu_seconds(root=None):
    """CPU seconds (user + system) used so far by this process and its live descendants.

    Worker processes are grandchildren (children of multiprocessing's fork server), so
    their time is read from /proc/PID/stat while they are alive. ``root``: count the
    process tree under that pid instead (e.g. the MPI launcher's proxy, whose children
    are all the ranks of this machine).
    """
    ticks = os.sysconf("SC_CLK_TCK")
    total = time.process_time() if root is None else 0.0
    pids = _descendants(os.getpid()) if root is None else _descendants(root) | {root}
    for pid in pids:
        try:
            fields = Path(f"/proc/{pid}/stat").read_text().rpartition(")")[2].split()
        except OSError:
            continue
        total += (int(fields[11]) + int(fields[12])) / ticks
    return total


class TimedScheduler(Scheduler):
    """The real Scheduler; only the cycle loop is wrapped in a timer.

    ``loop_seconds`` covers every cycle (MD, reports, reduced potentials, swaps, ledger
    transaction, checkpoints); everything before it (worker start, contexts,
    minimisation, first checkpoint) is setup. ``loop_cpu_seconds`` is the CPU time of
    this process and its worker processes over the same span.
    """

    loop_seconds = None
    loop_cpu_seconds = None
    cpu_root = None

    def _loop(self, *args, **kwargs):
        cpu = tree_cpu_seconds(self.cpu_root)
        start = time.perf_counter()
        try:
            return super()._loop(*args, **kwargs)
        finally:
            self.loop_seconds = time.perf_counter() - start
            self.loop_cpu_seconds = tree_cpu_seconds(self.cpu_root) - cpu


def timed_run(protocol_path, folder, *, platform=None, workers=None, comm=None, cpu_root=None):
    """Plan and run a protocol; return a dict of timings (s) and sizes.

    plan_s: make_plan (system build, platform probe when 'auto'); setup_s: Scheduler.run
    outside the loop; loop_s: the cycle loop; steps: MD steps of all walkers.
    """
    protocol = load_protocol(protocol_path)
    start = time.perf_counter()
    plan = make_plan(protocol, platform=platform)
    planned = time.perf_counter()
    scheduler = TimedScheduler(plan, folder, progress=False, workers=workers, comm=comm)
    scheduler.cpu_root = cpu_root
    scheduler.run()
    total = time.perf_counter() - planned
    run = protocol.run
    return {"plan_s": planned - start, "setup_s": total - scheduler.loop_seconds,
            "loop_s": scheduler.loop_seconds, "loop_cpu_s": scheduler.loop_cpu_seconds, "run_s": total, "n_cycles": run.n_cycles,
            "steps": run.n_cycles * run.steps_per_cycle * plan.n_walkers,
            "n_walkers": plan.n_walkers, "platform": plan.platform, "plan": plan}


class BareLoop:
    """One context per condition stepped in turn by plain integrator.step, nothing else.

    Same System (umbrella forces included), integrator, platform, temperatures and
    starting positions as the plan's walkers.
    """

    def __init__(self, plan):
        import openmm
        from openmm import unit

        protocol = plan.protocol
        platform = openmm.Platform.getPlatformByName(plan.platform.name)
        self.steps = protocol.run.steps_per_cycle
        self.contexts = []
        for condition in plan.conditions:
            integrator = openmm.LangevinMiddleIntegrator(
                condition.temperature * unit.kelvin, protocol.friction / unit.picosecond,
                protocol.timestep * unit.picosecond)
            integrator.setRandomNumberSeed(condition.index + 1)
            context = openmm.Context(plan.system, integrator, platform, plan.platform.properties)
            context.setPositions(plan.built.positions)
            context.setVelocitiesToTemperature(condition.temperature * unit.kelvin, condition.index + 1)
            self.contexts.append((context, integrator))
        self.cycle()      # warm-up, as the walkers' minimisation is setup too

    def cycle(self):
        for _, integrator in self.contexts:
            integrator.step(self.steps)


def bare_loop_seconds(plan, n_cycles):
    """(wall, CPU) seconds of ``n_cycles`` cycles of a :class:`BareLoop`."""
    loop = BareLoop(plan)
    cpu, start = time.process_time(), time.perf_counter()
    for _ in range(n_cycles):
        loop.cycle()
    return time.perf_counter() - start, time.process_time() - cpu


def temporary_folder(prefix):
    return tempfile.TemporaryDirectory(prefix=f"boost-bench-{prefix}-")


def pin_to_one_core():
    """Restrict this process (and every child it starts later) to one core; returns it."""
    core = min(os.sched_getaffinity(0))
    os.sched_setaffinity(0, {core})
    return core


def verdict(value, target, *, at_least=True):
    ok = value >= target if at_least else value <= target
    return "PASS" if ok else "MISS"


def print_table(header, rows):
    """A plain text table; rows are sequences of already formatted cells."""
    widths = [max(len(str(c)) for c in column) for column in zip(header, *rows)]
    line = "  ".join(f"{h:<{w}}" for h, w in zip(header, widths))
    print(line)
    print("  ".join("-" * w for w in widths))
    for row in rows:
        print("  ".join(f"{str(c):<{w}}" for c, w in zip(row, widths)))
    sys.stdout.flush()
