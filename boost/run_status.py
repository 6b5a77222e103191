"""A one-line status of a running run, every so often: how far, how long still, how well.

"How well" is what a practitioner watches: for exchange runs, the fraction of swap
attempts accepted since the last line; for umbrella windows, how far walkers sit from the
centre of the window they hold, in spring widths sqrt(kT/k) (a walker in a flat region
sits about one width away; many widths mean the window is pushed hard and may need a
stiffer spring or a neighbour). Pure numpy; the scheduler calls :meth:`RunStatus.add`
once per cycle.
"""

import math
import time

import numpy as np

from .conditions import wrap_difference
from .units import thermal_energy

#: Seconds between two status lines.
EVERY_SECONDS = 60.0


class RunStatus:
    """Tallies since the last line and the text of the next one."""

    def __init__(self, conditions, periodic_a, n_cycles, start_cycle, *, every=None, clock=time.monotonic):
        self.n_cycles, self.start_cycle, self.clock = n_cycles, start_cycle, clock
        self.every = EVERY_SECONDS if every is None else every
        self.started = clock()
        self.periodic_a = np.asarray(periodic_a, dtype=bool)
        self.centre_ka = np.array([c.centres for c in conditions], dtype=float).reshape(len(conditions), -1)
        # width of each window's spring at its temperature: sqrt(kT/k) (nm or rad)
        spring_ka = np.array([c.springs for c in conditions], dtype=float).reshape(len(conditions), -1)
        kt_k = np.array([thermal_energy(c.temperature) for c in conditions])
        with np.errstate(divide="ignore"):
            self.width_ka = np.sqrt(kt_k[:, None] / spring_ka)
        self._reset(None, None)

    def _reset(self, cycle, when):
        self.since_cycle, self.since = cycle, when
        self.attempts = self.accepted = 0
        self.distance_sum, self.distance_count = 0.0, 0

    def add(self, cycle, assignment, values_ra, tally):
        """One cycle: the assignment the walkers held, their umbrella coordinate values, the swap tally."""
        now = self.clock()
        if self.since is None:
            self._reset(cycle, now)
        for _i, _j, attempts, accepted in tally:
            self.attempts += attempts
            self.accepted += accepted
        if self.centre_ka.shape[1]:
            held = np.asarray(assignment)
            offset = np.asarray(values_ra, dtype=float) - self.centre_ka[held]
            offset = np.where(self.periodic_a, wrap_difference(offset), offset)
            widths = np.abs(offset) / self.width_ka[held]
            self.distance_sum += float(np.sum(widths))
            self.distance_count += widths.size

    def due(self):
        return self.since is not None and self.clock() - self.since >= self.every

    def line(self, cycle_done):
        """The status after ``cycle_done`` complete cycles."""
        now = self.clock()
        rate = (cycle_done - self.start_cycle) / max(now - self.started, 1e-9)
        left = (self.n_cycles - cycle_done) / rate if rate > 0 else math.inf
        text = (f"cycle {cycle_done} of {self.n_cycles} ({100 * cycle_done / self.n_cycles:.0f} %), "
                f"about {_duration(left)} left")
        recent = []
        if self.attempts:
            recent.append(f"{self.accepted / self.attempts:.0%} of {self.attempts} swap attempts accepted")
        if self.distance_count:
            recent.append(f"walkers {self.distance_sum / self.distance_count:.1f} spring widths from their "
                          "window centres on average")
        self._reset(cycle_done, now)
        return text + ("; since the last line: " + ", ".join(recent) if recent else "")


def _duration(seconds):
    if not math.isfinite(seconds):
        return "an unknown time"
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 90 * 60:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"
