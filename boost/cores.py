"""Which cores a host of walkers runs on.

OpenMM's CPU platform hands work between its threads several times per step. Left to
migrate, those threads pay for every hand-off across cores (seen here on a 2-core
virtual machine: capped alanine in OBC2 with 1 thread ran at 430 steps/s unpinned and
3,000 pinned to one core). So each host is pinned to cores of its own, as many as its
contexts' threads, whenever the hosts fit on the cores this process may use.
"""

import os
from contextlib import contextmanager


def usable_cores():
    """The cores this process may run on, in order."""
    if hasattr(os, "sched_getaffinity"):
        return sorted(os.sched_getaffinity(0))
    return list(range(os.cpu_count() or 1))


def core_sets(cores, n_hosts, threads):
    """Disjoint core lists, ``threads`` each, for ``n_hosts`` hosts; None when they do not fit."""
    if n_hosts * threads > len(cores):
        return None
    return [list(cores[h * threads:(h + 1) * threads]) for h in range(n_hosts)]


def pin(cores):
    """Pin the calling thread (and the threads it starts later) to ``cores``; returns the old set."""
    if not cores or not hasattr(os, "sched_setaffinity"):
        return None
    old = os.sched_getaffinity(0)
    os.sched_setaffinity(0, cores)
    return old


def unpin(old):
    if old is not None:
        os.sched_setaffinity(0, old)


@contextmanager
def pinned(cores):
    old = pin(cores)
    try:
        yield
    finally:
        unpin(old)
