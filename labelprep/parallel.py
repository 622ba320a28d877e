"""One way to map per-file work over many files: in this process, on a process pool, or on a Dask
cluster.

Results come back in input order, whatever order the workers finish in, so outputs are
deterministic; at most a bounded number of chunks are in flight, so memory stays flat in N
however long the input is.
"""

from __future__ import annotations

import functools
import os
from collections import deque
from itertools import islice

from .errors import InputError, LabelprepError, ParameterError

# chunks in flight per worker: enough to keep every worker busy while the head chunk is
# collected, few enough that results waiting to be consumed stay a small, fixed amount
WINDOW_PER_JOB = 4
# seconds to wait for a Dask scheduler to answer before giving up on the address
CONNECT_SECONDS = 10


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


_NOTHING = object()


def map_ordered(func, items, *, jobs=None, chunksize: int = 16, cluster=None, shared=_NOTHING,
                isolated: bool = False):
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
    cluster : str, optional
        Address of a running Dask distributed scheduler (``tcp://host:8786``); the chunks then
        run on its workers instead (``jobs`` is ignored: the workers' threads set the width) and
        at most ``WINDOW_PER_JOB`` chunks per worker thread are in flight. Needs the ``cluster``
        extra; ``func`` and the items must make sense on every worker (same paths).
    shared : object, optional
        A large read-only argument common to every item: ``func(item, shared)`` is called
        instead of ``func(item)``. On a cluster it is sent to every worker once (scattered),
        not with every task.
    isolated : bool, default False
        Run even one job in a worker process rather than in this one: work that relies on the
        worker's signal handling (the per-file time limit of :func:`labelprep.probe.probe`)
        then gets it, and this process's signal state is never changed.

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
    if cluster is not None:
        yield from _on_cluster(func, iter(items), cluster, chunksize, shared)
        return
    if shared is not _NOTHING:
        func = functools.partial(_with_shared, func, shared)
    if jobs == 1 and not isolated:
        for item in items:
            yield func(item)
        return
    yield from _pooled(func, iter(items), jobs, chunksize)


def _pooled(func, items, jobs: int, chunksize: int):
    from concurrent.futures import ProcessPoolExecutor
    from concurrent.futures.process import BrokenProcessPool

    pool = ProcessPoolExecutor(max_workers=jobs, initializer=_worker_setup)
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


def _on_cluster(func, items, address, chunksize: int, shared=_NOTHING):
    """:func:`_pooled` on a Dask cluster: the same chunks through :func:`_run_chunk`, in order."""
    if not isinstance(address, str):
        raise TypeError(f"cluster must be a scheduler address string; got {type(address).__name__}")
    try:
        from distributed import Client
    except ImportError as exc:
        raise InputError("--cluster needs Dask: pip install 'labelprep[cluster]'") from exc
    try:
        client = Client(address, timeout=CONNECT_SECONDS, set_as_default=False)
    except (OSError, ValueError) as exc:  # refused, timed out (OSError) or a malformed address
        raise InputError(f"cannot reach the Dask scheduler at {address}: {exc}") from exc
    pending: deque = deque()
    try:
        try:
            # a scheduler without workers would queue the chunks forever, silently
            client.wait_for_workers(1, timeout=CONNECT_SECONDS)
        except TimeoutError as exc:
            raise InputError(f"the Dask scheduler at {address} has no workers "
                             f"(none joined within {CONNECT_SECONDS} s)") from exc
        window = WINDOW_PER_JOB * sum(client.nthreads().values())
        extra = ()
        if shared is not _NOTHING:
            # one copy per worker, sent once; a future among the arguments arrives as its value
            extra = (client.scatter(shared, broadcast=True, hash=False),)
        while True:
            while len(pending) < window:
                chunk = list(islice(items, chunksize))
                if not chunk:
                    break
                # pure=False: a key made from the arguments would let the scheduler hand back a
                # result it still holds for the same paths, from before a file changed
                pending.append(client.submit(_run_chunk, func, chunk, *extra, pure=False))
            if not pending:
                return
            try:
                done = pending.popleft().result()
            except Exception as exc:
                # _run_chunk never raises, so this is the cluster failing the task (KilledWorker,
                # lost connection, a result that cannot be sent back)
                raise LabelprepError(f"the Dask cluster at {address} failed a task ({type(exc).__name__}: "
                                     f"{exc}); run the command again to resume") from exc
            for failed, value in done:
                if failed:
                    raise value
                yield value
    finally:
        # closing the client releases its futures: on early close the scheduler drops the
        # queued chunks instead of letting the workers finish them
        client.close()


def _worker_setup():
    """Workers ignore Ctrl-C (sent to the whole process group): the parent stops the pool and
    cancels queued work, so an interrupt ends cleanly instead of in one traceback per worker.
    SIGTERM gets its default back (a forked worker inherits the command line's handler), so a
    pool that terminates its workers ends them at once. SIGALRM is the per-file time limit's
    (:func:`labelprep.probe.expire`): the worker is labelprep's own, so its handler may be set.

    A worker also ends when its parent dies without stopping the pool (SIGKILL, the out-of-memory
    killer): it would otherwise wait forever on a queue whose other end it holds itself. Linux
    delivers a chosen signal on the parent's death (prctl PR_SET_PDEATHSIG); elsewhere nothing
    is set.
    """
    import multiprocessing
    import signal
    import sys

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    if hasattr(signal, "SIGALRM"):
        from .probe import expire

        signal.signal(signal.SIGALRM, expire)
    if sys.platform.startswith("linux"):
        import ctypes

        pr_set_pdeathsig = 1  # linux/prctl.h
        ctypes.CDLL(None).prctl(pr_set_pdeathsig, signal.SIGTERM)
        parent = multiprocessing.parent_process()
        if parent is not None and not parent.is_alive():  # it died before the request took effect
            os._exit(1)


def _with_shared(func, shared, item):
    return func(item, shared)


def _run_chunk(func, chunk, *shared):
    """``(failed, result or exception)`` per item, so one failure does not hide its neighbours.

    ``shared``, when given (on a cluster, the scattered value), is passed to ``func`` after the item.
    """
    if shared:
        func = functools.partial(_with_shared, func, shared[0])
    out = []
    for item in chunk:
        try:
            out.append((False, func(item)))
        except Exception as exc:
            out.append((True, exc))
    return out
