"""One way to map per-file work over many files: in this process or on a process pool.

Results come back in input order, whatever order the workers finish in, so outputs are
deterministic; at most a bounded number of chunks are in flight, so memory stays flat in N
however long the input is.
"""

from __future__ import annotations

import os
from collections import deque
from itertools import islice

from .errors import LabelprepError, ParameterError

# chunks in flight per worker: enough to keep every worker busy while the head chunk is
# collected, few enough that results waiting to be consumed stay a small, fixed amount
WINDOW_PER_JOB = 4


def resolve_jobs(jobs) -> int:
    """The number of worker processes: ``None`` or ``0`` means every core.

    Examples
    --------
    >>> resolve_jobs(3)
    3
    >>> resolve_jobs(0) == (os.cpu_count() or 1)
    True
    """
    if jobs is None or jobs == 0:
        return os.cpu_count() or 1
    if not isinstance(jobs, int) or isinstance(jobs, bool):
        raise TypeError(f"jobs must be an int; got {type(jobs).__name__}")
    if jobs < 0:
        raise ParameterError(f"jobs must be >= 0 (0 means every core); got jobs={jobs}")
    return jobs


def map_ordered(func, items, *, jobs=None, chunksize: int = 16):
    """Yield ``func(item)`` for each item, in input order, with bounded memory.

    Parameters
    ----------
    func : callable
        A picklable function of one argument (module-level, or a functools.partial of one).
    items : iterable
        Consumed lazily: at most ``jobs * WINDOW_PER_JOB * chunksize`` items are in flight.
    jobs : int, optional
        Worker processes; 1 runs in this process; None or 0 uses every core.
    chunksize : int
        Items per task sent to a worker (amortises the cost of a round trip to a worker).

    Yields
    ------
    object
        ``func(item)``, in the order of ``items``. An exception raised by ``func`` is raised
        here, at the position of its item. Closing the generator early cancels queued work.

    Examples
    --------
    >>> list(map_ordered(abs, [-3, 1, -2], jobs=1))
    [3, 1, 2]
    """
    jobs = resolve_jobs(jobs)
    if not isinstance(chunksize, int) or isinstance(chunksize, bool):
        raise TypeError(f"chunksize must be an int; got {type(chunksize).__name__}")
    if chunksize < 1:
        raise ParameterError(f"chunksize must be >= 1; got chunksize={chunksize}")
    if jobs == 1:
        for item in items:
            yield func(item)
        return
    yield from _pooled(func, iter(items), jobs, chunksize)


def _pooled(func, items, jobs: int, chunksize: int):
    from concurrent.futures import ProcessPoolExecutor
    from concurrent.futures.process import BrokenProcessPool

    pool = ProcessPoolExecutor(max_workers=jobs, initializer=_leave_interrupts_to_parent)
    pending: deque = deque()
    try:
        while True:
            while len(pending) < WINDOW_PER_JOB * jobs:
                chunk = list(islice(items, chunksize))
                if not chunk:
                    break
                pending.append(pool.submit(_run_chunk, func, chunk))
            if not pending:
                return
            try:
                done = pending.popleft().result()
            except BrokenProcessPool as exc:
                raise LabelprepError("a worker process stopped unexpectedly (killed, or out of "
                                     "memory); run the command again to resume") from exc
            for failed, value in done:
                if failed:
                    raise value
                yield value
    finally:
        # on early close (an interrupted scan) do not wait for the queued chunks to run
        pool.shutdown(wait=True, cancel_futures=True)


def _leave_interrupts_to_parent():
    """Workers ignore Ctrl-C (sent to the whole process group): the parent stops the pool and
    cancels queued work, so an interrupt ends cleanly instead of in one traceback per worker."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _run_chunk(func, chunk):
    """``(failed, result or exception)`` per item, so one failure does not hide its neighbours."""
    out = []
    for item in chunk:
        try:
            out.append((False, func(item)))
        except Exception as exc:
            out.append((True, exc))
    return out
