"""Where batch and sweep tasks run: in this process or in a pool of worker processes.

Every executor has the same small interface, ``run(fn, items, on_start=None)``,
a generator that yields ``(index, value)`` pairs as tasks finish (in any
order).  ``value`` is what ``fn(item)`` returned, the exception it raised, or
a :class:`WorkerLost` when the process running the task died and the retries
ran out.  ``fn`` must
catch its own errors (a failed image is a result, not an exception); what
reaches the executor is a dead worker, an interrupted run or a bug.

:class:`LocalPool` is the default (one process per core, started from a
fork server or with ``spawn``, so that no thread of the parent leaks into the
workers);
:class:`InProcess` runs tasks one after the other here, and
:class:`mrfclean.cluster.DaskExecutor` sends them to a Dask cluster.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import multiprocessing
import os
import signal
from concurrent.futures.process import BrokenProcessPool

#: Attempts per task when its worker process dies (killed, out of memory).
MAX_ATTEMPTS = 3


class WorkerLost(Exception):
    """The process running a task died before returning a result."""


class ExecutorError(RuntimeError):
    """Where the tasks should run cannot be used (unreachable scheduler, missing extra)."""


def cpu_count() -> int:
    """Cores this process may use (the affinity mask where the OS has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def default_threads(workers: int) -> int:
    """Numba threads per worker: the cores shared out between the workers."""
    return max(1, cpu_count() // max(1, workers))


def set_threads(n: int | None) -> int | None:
    """Set numba's thread count for this thread; return the previous value."""
    if n is None:
        return None
    import numba

    old = numba.get_num_threads()
    numba.set_num_threads(max(1, min(int(n), numba.config.NUMBA_NUM_THREADS)))
    return old


def _context():
    """Worker start method: ``forkserver`` where the OS has it, else ``spawn``.

    Both start workers from a clean process (no thread of the caller, such as
    numba's thread pool, is ever forked).  The fork server imports mrfclean
    once and forks each worker from there, which saves every worker the
    import (about a second each).
    """
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["mrfclean.batch", "mrfclean.sweep"])
        return ctx
    return multiprocessing.get_context("spawn")


def _load_kernels():
    """Run a tiny clean so the compiled kernels are loaded from numba's cache now."""
    import warnings

    import numpy as np

    from .clean import Settings, clean

    img = np.zeros((16, 16), np.uint8)
    img[4:12, 4:12] = 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        clean(img, settings=Settings(burn_in=2, samples=2, chains=2), rng=0)


def _ping(_):
    import time

    time.sleep(0.2)  # long enough that each ping lands on a different worker
    return os.getpid()


def _init_worker(threads):
    # Ctrl-C goes to the whole process group; the parent decides what stops.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    set_threads(threads)
    try:
        _load_kernels()  # needed before the first image anyway; done while the parent plans
    except Exception:  # noqa: BLE001 - a real task will report any problem properly
        pass


class InProcess:
    """Run tasks one after the other in this process (``workers=1``)."""

    workers = 1

    def __init__(self, threads: int | None = None):
        self.threads = threads

    def run(self, fn, items, on_start=None):
        old = set_threads(self.threads)
        try:
            for i, item in enumerate(items):
                if on_start is not None:
                    on_start(i)
                try:
                    value = fn(item)
                except Exception as exc:  # noqa: BLE001 - a bug in fn: a result, the run goes on
                    value = exc
                yield i, value
        finally:
            set_threads(old)

    def close(self):
        pass


class LocalPool:
    """A pool of worker processes on this machine.

    Parameters
    ----------
    workers : int
        Processes (default: every core).
    threads : int, optional
        Numba threads per worker (default: the cores shared out).
    max_attempts : int
        A task whose worker dies is resubmitted to a fresh pool up to this
        many times in all, then reported as :class:`WorkerLost`.
    """

    def __init__(self, workers: int | None = None, threads: int | None = None,
                 max_attempts: int = MAX_ATTEMPTS):
        self.workers = int(workers or cpu_count())
        if self.workers < 1:
            raise ValueError(f"workers must be at least 1, got {workers}")
        self.threads = default_threads(self.workers) if threads is None else int(threads)
        self.max_attempts = int(max_attempts)
        self._ex = None

    def _new_executor(self):
        return cf.ProcessPoolExecutor(max_workers=self.workers, mp_context=_context(),
                                      initializer=_init_worker, initargs=(self.threads,))

    @staticmethod
    def _stop(ex):
        """Stop an executor now: cancel what waits, end the processes that run."""
        procs = list((getattr(ex, "_processes", None) or {}).values())
        ex.shutdown(wait=False, cancel_futures=True)
        for p in procs:
            with contextlib.suppress(Exception):
                p.terminate()
        for p in procs:
            with contextlib.suppress(Exception):
                p.join(timeout=5)

    def run(self, fn, items, on_start=None):
        items = list(items)
        pending = list(range(len(items)))[::-1]  # a stack: pop() gives the next in order
        attempts = [0] * len(items)
        window = 2 * self.workers  # bounded submission: 'started' means really started soon
        ex = self._ex or self._new_executor()
        self._ex = None  # held by this run until it ends well
        running: dict[cf.Future, int] = {}
        try:
            while pending or running:
                while pending and len(running) < window:
                    i = pending.pop()
                    attempts[i] += 1
                    if on_start is not None and attempts[i] == 1:
                        on_start(i)
                    try:
                        running[ex.submit(fn, items[i])] = i
                    except BrokenProcessPool:
                        pending.append(i)
                        attempts[i] -= 1
                        break
                done, _ = cf.wait(running, return_when=cf.FIRST_COMPLETED)
                broken = False
                for fut in done:
                    i = running.pop(fut)
                    try:
                        value = fut.result()
                    except BrokenProcessPool:
                        broken = True
                        if attempts[i] >= self.max_attempts:
                            yield i, WorkerLost(f"worker process died {attempts[i]} times while "
                                                "running this task (killed, or out of memory?)")
                        else:
                            pending.append(i)
                        continue
                    except Exception as exc:  # noqa: BLE001 - raised by fn in the worker
                        value = exc
                    yield i, value
                if broken or getattr(ex, "_broken", False):
                    # every task still in flight died with the pool: run them again
                    for fut, i in list(running.items()):
                        if attempts[i] >= self.max_attempts:
                            yield i, WorkerLost(f"worker process died {attempts[i]} times while "
                                                "running this task (killed, or out of memory?)")
                        else:
                            pending.append(i)
                    running.clear()
                    self._stop(ex)
                    ex = self._new_executor()
        except BaseException:
            self._stop(ex)
            raise
        else:
            self._ex = ex  # the workers stay up for the next run until close()

    def warm(self) -> None:
        """Start every worker now (each loads the compiled kernels), e.g. before timing a run."""
        list(self.run(_ping, [None] * self.workers))

    def close(self):
        if self._ex is not None:
            self._ex.shutdown(wait=True)
            self._ex = None


def make_executor(workers=None, threads=None, *, scheduler=None, local_cluster=None):
    """The executor for a batch or sweep.

    Parameters
    ----------
    workers : int, optional
        Local worker processes (default: every core); 1 runs in this process.
    threads : int, optional
        Numba threads per worker.
    scheduler : str, optional
        Address of a running Dask scheduler (``tcp://host:8786``).
    local_cluster : int, optional
        Start a local Dask cluster with this many worker processes.
    """
    if scheduler is not None or local_cluster is not None:
        from .cluster import DaskExecutor

        return DaskExecutor(address=scheduler, local_workers=local_cluster, threads=threads)
    workers = cpu_count() if workers is None else int(workers)
    if workers < 1:
        raise ValueError(f"workers must be at least 1, got {workers}")
    if workers == 1:
        return InProcess(threads=default_threads(1) if threads is None else threads)
    return LocalPool(workers, threads)
