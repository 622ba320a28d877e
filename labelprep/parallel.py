"""One way to map per-file work over many files: in this process or on a process pool.

Results come back in input order, whatever order the workers finish in, so outputs are
deterministic; at most a bounded number of chunks are in flight, so memory stays flat in N.
"""

from __future__ import annotations

import os
from collections import deque
from itertools import islice

from .errors import ParameterError


def resolve_jobs(jobs) -> int:
    """The number of worker processes: ``None`` or ``0`` means every core."""
    if jobs is None or jobs == 0:
        return os.cpu_count() or 1
    if not isinstance(jobs, int) or isinstance(jobs, bool):
        raise TypeError(f"jobs must be an int; got {type(jobs).__name__}")
    if jobs < 0:
        raise ParameterError(f"jobs must be >= 0 (0 means every core); got jobs={jobs}")
    return jobs


def map_ordered(func, items, *, jobs=None, chunksize: int = 16):
    """Yield ``func(item)`` for each item, in order.

    Parameters
    ----------
    func : callable
        A picklable function of one argument (module-level, or a functools.partial of one).
    items : iterable
    jobs : int, optional
        Worker processes; 1 runs in this process; None or 0 uses every core.
    chunksize : int
        Items per task sent to a worker.
    """
    jobs = resolve_jobs(jobs)
    if jobs == 1:
        for item in items:
            yield func(item)
        return
    from concurrent.futures import ProcessPoolExecutor

    items = iter(items)
    window = 4 * jobs
    with ProcessPoolExecutor(max_workers=jobs) as pool:
        pending: deque = deque()
        while True:
            while len(pending) < window:
                chunk = list(islice(items, chunksize))
                if not chunk:
                    break
                pending.append(pool.submit(_run_chunk, func, chunk))
            if not pending:
                return
            yield from pending.popleft().result()


def _run_chunk(func, chunk):
    return [func(item) for item in chunk]
