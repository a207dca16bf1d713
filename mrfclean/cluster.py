"""Run batch and sweep tasks on a Dask cluster.

:class:`DaskExecutor` has the interface of the local executors in
:mod:`mrfclean.pool` (``run(fn, items, on_start=None)`` yielding
``(index, value)`` as tasks finish), so :func:`mrfclean.batch.run_batch` and
:func:`mrfclean.sweep.run_sweep` run unchanged on a cluster: give them
``scheduler="tcp://host:8786"`` (an existing cluster) or ``local_cluster=N``
(a :class:`distributed.LocalCluster` of N worker processes started for the
run and closed after it).

Results are the same as with the local pool: each task carries its own seed
(derived from the run seed and the image's relative path), so where and in
which order tasks run does not matter.

A worker that dies mid-task (killed, out of memory) is handled by the Dask
scheduler, which reruns its tasks on other workers; a task whose workers keep
dying (``distributed.scheduler.allowed-failures``, default 3) comes back as
:class:`mrfclean.pool.WorkerLost` and is recorded as failed -- never silently
dropped.

Starting a cluster by hand (every machine needs mrfclean installed, and the
inputs and output folder on a shared file system at the same paths)::

    dask scheduler --port 8786                       # on the head node
    dask worker tcp://HEAD:8786 --nworkers 4 --nthreads 1   # on each worker machine
    mrfclean clean /shared/scans -o /shared/cleaned -r --scheduler tcp://HEAD:8786
"""

from __future__ import annotations

import itertools
import logging
import os
import uuid

from .pool import ExecutorError, WorkerLost, set_threads


def _call(fn, item, threads):
    """Run one task on a Dask worker with the requested numba thread count."""
    old = set_threads(threads)
    try:
        return fn(item)
    finally:
        set_threads(old)


class DaskExecutor:
    """Send tasks to a Dask cluster.

    Parameters
    ----------
    address : str, optional
        Scheduler address of a running cluster (``tcp://host:8786``).
    local_workers : int, optional
        Without an address: start a local cluster of this many worker
        processes (one thread each) for the lifetime of the executor.
    threads : int, optional
        Numba threads per task (default 1: Dask's worker threads are the parallelism).
    client : distributed.Client, optional
        Use this client instead (it is not closed by :meth:`close`).
    """

    def __init__(self, address=None, local_workers=None, threads=None, client=None):
        try:
            from distributed import Client, LocalCluster
        except ImportError:  # pragma: no cover - the extra is not installed
            raise ExecutorError("Dask support needs the 'dask' extra: "
                               "pip install 'mrfclean[dask]'") from None
        self.threads = 1 if threads is None else int(threads)
        self._own_client = client is None
        self._cluster = None
        if client is not None:
            self.client = client
        elif address is not None:
            try:
                self.client = Client(address, timeout="15s")
            except (OSError, ValueError, TypeError) as exc:
                raise ExecutorError(f"{address}: cannot reach the Dask scheduler "
                                    f"({' '.join(str(exc).split())})") from None
        else:
            n = int(local_workers or 1)
            self._cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                         dashboard_address=":0", silence_logs=logging.ERROR)
            self.client = Client(self._cluster)
        self._run_id = uuid.uuid4().hex[:12]
        self._counter = itertools.count()

    @property
    def workers(self) -> int:
        """Worker threads on the cluster now."""
        return max(1, sum(self.client.nthreads().values()))

    def run(self, fn, items, on_start=None):
        from distributed import as_completed
        from distributed.scheduler import KilledWorker

        items = list(items)
        window = max(4, 2 * self.workers)
        pending = list(range(len(items)))[::-1]
        futures = {}
        ac = as_completed()

        def submit_next():
            i = pending.pop()
            if on_start is not None:
                on_start(i)
            key = f"mrfclean-{self._run_id}-{next(self._counter)}-{i}"
            fut = self.client.submit(_call, fn, items[i], self.threads, key=key, pure=False)
            futures[fut] = i
            ac.add(fut)

        try:
            while pending and len(futures) < window:
                submit_next()
            for fut in ac:
                i = futures.pop(fut)
                try:
                    value = fut.result()
                except KilledWorker as exc:
                    value = WorkerLost(f"Dask workers died while running this task ({exc})")
                except Exception as exc:  # noqa: BLE001 - cancelled, lost, or a bug in fn
                    if fut.status == "cancelled":
                        value = WorkerLost("the Dask cluster cancelled this task (scheduler lost?)")
                    else:
                        value = exc
                fut.release()
                yield i, value
                if pending:
                    submit_next()
        except BaseException:
            if futures:
                self.client.cancel(list(futures))
            raise

    def warm(self) -> None:
        """Load the compiled kernels on every worker now (e.g. before timing a run)."""
        from .pool import _load_kernels

        self.client.run(_load_kernels)

    def worker_pids(self) -> dict:
        """``{worker address: process id}`` of the cluster's workers."""
        return self.client.run(os.getpid)

    def close(self):
        if self._own_client:
            self.client.close()
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None
