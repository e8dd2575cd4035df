"""How many numba threads a command uses when the config says ``run.threads = 0`` (auto).

The chain does not depend on the thread count (see ``rng.py``), so this only changes the speed:

- below ``CROSSOVER_SITES`` sites per colour times nf^2 (the work of a colour update grows with
  the nf x nf matrices) one thread: a colour update then takes tens of microseconds, and waking
  a second thread costs about as much as it saves (``benchmarks/threads_crossover.py`` measures
  this: on an idle 2-core machine, default schedule, d = 3, U(1) 8^3 0.95x, 12^3 1.40x, 16^3
  1.74x and above 1.5-1.8x; U(3) 4^3 and 6^3 0.95x, 8^3 1.20x, 12^3 1.49x, 16^3 1.69x; so one
  thread below 2^11 site-components, where U(1) 8^3 and U(3) 6^3 lie and 2 threads lose);
- above it every core that is idle, never more: the number of cores this process may use
  (``os.sched_getaffinity``) minus the one-minute load average (``os.getloadavg``), rounded,
  at least one.  A parallel region waits for its slowest thread, so a thread that shares a
  core with another program makes every colour update wait for the scheduler.

A positive ``run.threads`` (or ``--threads``) is used as given, capped at numba's maximum.
"""

from __future__ import annotations

import os

__all__ = ["CROSSOVER_SITES", "usable_cores", "idle_cores", "auto_threads", "choose_threads", "set_threads"]

# Sites per colour (volume / 2) times nf^2 below which one thread is used.
# See benchmarks/threads_crossover.py and DEVELOPERS.md ("Benchmarks").
CROSSOVER_SITES = 2**11


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity; the CPU count where that is unknown)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def idle_cores(load: float | None = None, cores: int | None = None) -> int:
    """Usable cores minus the one-minute load average, rounded to the nearest integer, at least 1.

    ``load`` and ``cores`` default to what the OS says now (load 0 where it cannot say).
    """
    cores = usable_cores() if cores is None else cores
    if load is None:
        try:
            load = os.getloadavg()[0]
        except (AttributeError, OSError):
            load = 0.0
    return max(1, min(cores, int(cores - load + 0.5)))


def auto_threads(sites_per_colour: int | None, nf: int = 1, *, load: float | None = None,
                 cores: int | None = None) -> int:
    """The ``run.threads = 0`` choice for ``sites_per_colour`` sites of nf x nf matrices (None: large)."""
    if sites_per_colour is not None and sites_per_colour * nf * nf < CROSSOVER_SITES:
        return 1
    return idle_cores(load, cores)


def choose_threads(requested: int, sites_per_colour: int | None = None, nf: int = 1, *,
                   available: int | None = None, load: float | None = None, cores: int | None = None) -> int:
    """Threads to use: ``requested`` if positive, else :func:`auto_threads`; capped at ``available``."""
    n = requested if requested > 0 else auto_threads(sites_per_colour, nf, load=load, cores=cores)
    if available is not None:
        n = min(n, available)
    return max(1, n)


def set_threads(requested: int, sites_per_colour: int | None = None, nf: int = 1) -> int:
    """Set numba's thread count for a command (see :func:`choose_threads`); returns it."""
    import numba

    n = choose_threads(requested, sites_per_colour, nf, available=numba.config.NUMBA_NUM_THREADS)
    numba.set_num_threads(n)
    return n
