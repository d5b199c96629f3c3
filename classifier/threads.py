"""How many BLAS/OpenMP threads a model fit or a scoring worker may use.

HistGradientBoosting builds each tree in OpenMP parallel regions that end in barriers,
thousands per fit. On a machine shared with other busy processes, one of its threads is
often waiting for a core, and every barrier waits for it: measured on a 2-core machine
with one other busy process, a fit that takes 1 s on one thread took 5-213 s on two
(docs/threads.md). Threads are therefore kept to the cores other work leaves free, and
parallel work goes to processes (``--jobs``), one thread each, which the operating system
shares fairly.

``CALLSIEVE_THREADS`` (``auto`` or a whole number >= 1) overrides the choice: threads per
process, for the fit and for each scoring worker.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterator, Mapping
from contextlib import contextmanager

from .errors import InputError

__all__ = [
    "THREADS_ENV",
    "thread_setting",
    "free_cores",
    "fit_threads",
    "worker_threads",
    "limited_threads",
]

THREADS_ENV = "CALLSIEVE_THREADS"


def thread_setting(environ: Mapping[str, str] | None = None) -> int | None:
    """The thread count ``CALLSIEVE_THREADS`` asks for, or None for the automatic choice.

    Parameters
    ----------
    environ : mapping, optional; the environment to read (default ``os.environ``)

    Returns
    -------
    int or None
        Threads per process; None when the variable is unset, empty or ``auto``.

    Raises
    ------
    InputError
        When the value is neither ``auto`` nor a whole number >= 1.
    """
    raw = (os.environ if environ is None else environ).get(THREADS_ENV, "")
    value = raw.strip().lower()
    if value in ("", "auto"):
        return None
    try:
        threads = int(value)
    except ValueError:
        threads = 0
    if threads < 1:
        raise InputError(
            f"{THREADS_ENV}={raw!r}: must be 'auto' or a whole number of threads >= 1 "
            f"(e.g. {THREADS_ENV}=1); unset it for the automatic choice"
        )
    return threads


def free_cores(cpu_count: int | None = None, load_1min: float | None = None) -> int:
    """Cores the 1-minute load average leaves free, at least 1.

    A partly busy core counts as busy (the load is rounded up): an OpenMP team that
    shares even one core with another process waits for it at every barrier.

    Parameters
    ----------
    cpu_count : int, optional; cores this process may run on (default: its CPU affinity,
        else ``os.cpu_count()``)
    load_1min : float, optional; runnable processes averaged over a minute (default
        ``os.getloadavg()[0]``; where the system has none, one core is assumed busy)

    Returns
    -------
    int
        Between 1 and ``cpu_count``.
    """
    cores = max(int(cpu_count or _usable_cores()), 1)
    if load_1min is None:
        try:
            load_1min = os.getloadavg()[0]
        except (OSError, AttributeError):  # no load average (Windows): keep one core spare
            load_1min = 1.0
    busy = math.ceil(max(float(load_1min), 0.0)) if math.isfinite(load_1min) else cores
    return min(max(cores - busy, 1), cores)


def _usable_cores() -> int:
    """Cores this process may run on (a CPU set or ``taskset`` narrows them), else all."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # not on Linux
        return os.cpu_count() or 1


def fit_threads(environ: Mapping[str, str] | None = None, **machine: float) -> int:
    """Threads for a model fit, or for scoring in one process (``--jobs 1``).

    ``CALLSIEVE_THREADS`` when set, else :func:`free_cores` (``machine`` passes its
    ``cpu_count`` and ``load_1min``, for tests). Our own process counts in the load, so on
    an idle 2-core machine this is 1 thread, which measured faster there than 2 (docs/threads.md).
    """
    setting = thread_setting(environ)
    return setting if setting is not None else free_cores(**machine)


def worker_threads(jobs: int, environ: Mapping[str, str] | None = None) -> int:
    """Threads for each of ``jobs`` worker processes: ``CALLSIEVE_THREADS``, else 1.

    With several workers the parallelism is in the processes; threads inside each would
    only compete with the other workers for the same cores.
    """
    setting = thread_setting(environ)
    if setting is not None:
        return setting
    return 1 if jobs > 1 else fit_threads(environ)


@contextmanager
def limited_threads(threads: int) -> Iterator[int]:
    """Cap every BLAS and OpenMP pool of this process at ``threads`` inside the block.

    Parameters
    ----------
    threads : int, >= 1

    Yields
    ------
    int
        ``threads``, for messages and records.
    """
    from threadpoolctl import threadpool_limits

    if int(threads) < 1:
        raise ValueError(f"threads must be >= 1, got {threads}")
    with threadpool_limits(limits=int(threads)):
        yield int(threads)
