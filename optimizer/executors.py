"""Where independent tasks run: in this process, a local process pool, or a Dask cluster; and the
atomic JSON write their resume folders use.

One interface (``submit(fn, *args) -> handle``, ``wait_one(pending) -> [(handle, result)]``,
``close()``) shared by the trade studies and the dispersion runs.  May import: the standard library
(and ``distributed`` when a Dask cluster is asked for); nothing of the optimiser, so a runner that
must stay free of CasADi (the dispersion analysis) can use it.
"""

from __future__ import annotations

import concurrent.futures as cf
import json
import multiprocessing
import os
import uuid
from pathlib import Path

__all__ = ["Inline", "Processes", "DaskCluster", "make_executor", "atomic_json"]


class Inline:
    """Runs tasks in this process, one at a time (``workers=1``)."""

    def __init__(self):
        self.queue = []

    def submit(self, fn, *args):
        self.queue.append((fn, args))
        return len(self.queue) - 1

    def wait_one(self, pending):
        key = min(pending)
        fn, args = self.queue[key]
        return [(key, fn(*args))]

    def close(self):
        pass


class Processes:
    """A local process pool (spawned, so no thread state of this process is inherited);
    ``initializer(*initargs)`` runs once in each worker."""

    def __init__(self, workers, initializer=None, initargs=()):
        self.workers = workers
        self.pool = cf.ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                                           initializer=initializer, initargs=initargs)

    def submit(self, fn, *args):
        return self.pool.submit(fn, *args)

    def wait_one(self, pending):
        done, _ = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
        return [(f, f.result()) for f in done]

    def close(self):
        self.pool.shutdown(wait=True, cancel_futures=True)


class DaskCluster:
    """A Dask distributed cluster, by scheduler address or an existing ``distributed.Client``."""

    def __init__(self, scheduler):
        import distributed

        self.distributed = distributed
        if isinstance(scheduler, distributed.Client):
            self.client, self.own = scheduler, False
        else:
            self.client, self.own = distributed.Client(scheduler), True

    def submit(self, fn, *args):
        return self.client.submit(fn, *args, pure=False)

    def wait_one(self, pending):
        done = self.distributed.wait(list(pending), return_when="FIRST_COMPLETED").done
        return [(f, f.result()) for f in done]

    def close(self):
        if self.own:
            self.client.close()


def make_executor(workers, scheduler, error=ValueError, initializer_for=None, name="workers"):
    """Dask when ``scheduler`` is given, else ``workers`` local processes (None: one per core),
    in this process when 1.  ``error`` is raised for a bad worker count;
    ``initializer_for(n) -> (initializer, initargs)`` sets up each of ``n`` local workers."""
    if scheduler is not None:
        return DaskCluster(scheduler)
    n = (os.cpu_count() or 1) if workers is None else workers
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise error(f"{name}: expected a whole number of at least 1, got {workers!r}")
    if n == 1:
        return Inline()
    init, args = initializer_for(n) if initializer_for is not None else (None, ())
    return Processes(n, init, args)


def atomic_json(path: Path, data) -> None:
    """Write ``data`` as JSON to ``path`` through a temporary file, synced, then renamed."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.tmp")
    with open(tmp, "w") as f:
        json.dump(data, f, allow_nan=True, separators=(",", ":"))
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)
