"""Engines that run the items of a batch: local (serial or a process pool) and Dask distributed.

Every engine has one method, ``run(func, jobs)``, which yields
:class:`Outcome` objects ``(index, result, error)`` in completion order; the
runner persists each outcome at once and assembles the tables in manifest
order, so the tables never depend on the engine, the worker count or the
order in which items finish.  ``func`` is a top-level function and ``jobs``
are plain picklable values (file paths, numbers, parameters): every worker
opens its own files.

When the local engine uses processes
------------------------------------
Starting a worker process (spawn: a fresh interpreter that imports numpy,
SciPy, pandas and lasecyto) costs 1.3-3 s on the 2-core reference machine,
1.5-4.5 s for a pool of two, depending on other load (``benchmarks/engines.py``
measures it).  A pool of ``w`` workers saves ``W (1 - 1/w)`` of ``W``
seconds of serial work, so it pays only when ``W`` is several seconds.  The
local engine therefore runs items in the calling process first and moves the
rest to a pool only when the work left, estimated as the mean time of the
items done so far times the number of items left, exceeds
``parallel_min_s`` (default :data:`PARALLEL_MIN_S`).  ``workers=1`` is
always serial; ``parallel_min_s=0`` always uses the pool.
"""

from __future__ import annotations

import concurrent.futures as cf
import logging
import multiprocessing
import os
import secrets
import threading
import time
from dataclasses import dataclass
from pathlib import Path

from ..exceptions import InputError

__all__ = ["DaskEngine", "Engine", "LocalEngine", "Outcome", "PARALLEL_MIN_S", "make_engine"]

logger = logging.getLogger("lasecyto.pipeline.engines")

#: Estimated serial work (s) above which the local engine starts its process pool.
#: benchmarks/engines.py on the 2-core reference machine: a 2-worker pool takes 1.5-4.5 s
#: to start (more when other jobs share the cores), so on an idle machine it breaks even near
#: 2 x 1.7 = 3.4 s of serial work; with other jobs on the cores the measured break-even was
#: 18 s, 23 s and above 16 s in three runs.  10 s is between the two.
PARALLEL_MIN_S = 10.0


@dataclass
class Outcome:
    """One finished item: its index in ``jobs`` and either a result or the engine's error."""

    index: int
    result: object = None
    error: BaseException | None = None


def _exit_with_parent(parent_pid, interval_s=0.5):
    """Worker initializer: end this worker when the process that started it is gone.

    A pool's workers otherwise outlive a run that was killed (SIGKILL gives
    the parent no chance to stop them) and wait for work forever.
    """

    def watch():
        while os.getppid() == parent_pid:
            time.sleep(interval_s)
        os._exit(1)

    threading.Thread(target=watch, name="lasecyto-parent-watch", daemon=True).start()


class Engine:
    """Interface of the engines: ``run(func, jobs)`` yields :class:`Outcome` in completion order."""

    kind = "engine"

    def run(self, func, jobs):  # pragma: no cover - interface
        raise TypeError(f"{type(self).__name__} does not implement run()")

    def describe(self) -> dict:
        """Plain description for the run record."""
        return {"kind": self.kind}


class LocalEngine(Engine):
    """Serial in the calling process, or a spawn process pool when it pays (module docstring).

    Parameters
    ----------
    workers : int
        Largest number of worker processes (1 = always serial).
    parallel_min_s : float
        Estimated serial work above which the pool is started.
    """

    kind = "local"

    def __init__(self, workers=1, *, parallel_min_s=PARALLEL_MIN_S):
        if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
            raise InputError("bad worker count", field="workers", expected="an integer >= 1",
                             found=repr(workers))
        if not parallel_min_s >= 0:
            raise InputError("bad threshold", field="parallel_min_s", expected="a number >= 0",
                             found=repr(parallel_min_s))
        self.workers = workers
        self.parallel_min_s = float(parallel_min_s)
        self.serial_items = 0
        self.pool_items = 0
        self.pool_workers = 0

    def describe(self):
        return {"kind": self.kind, "workers": self.workers, "parallel_min_s": self.parallel_min_s,
                "serial_items": self.serial_items, "pool_items": self.pool_items,
                "pool_workers": self.pool_workers}

    def _go_parallel(self, done, left, spent_s):
        if self.workers <= 1 or left <= 1:
            return False
        if self.parallel_min_s <= 0:
            return True
        return done > 0 and spent_s / done * left > self.parallel_min_s

    def run(self, func, jobs):
        jobs = list(jobs)
        n = len(jobs)
        i, spent = 0, 0.0
        while i < n and not self._go_parallel(i, n - i, spent):
            t0 = time.perf_counter()
            try:
                outcome = Outcome(i, result=func(jobs[i]))
            except Exception as exc:  # the function should not raise; never lose the batch if it does
                outcome = Outcome(i, error=exc)
            spent += time.perf_counter() - t0
            self.serial_items += 1
            i += 1
            yield outcome
        if i >= n:
            return
        self.pool_workers = min(self.workers, n - i)
        logger.info("starting %d worker processes for %d items (estimated serial work %.1f s)",
                    self.pool_workers, n - i, spent / i * (n - i) if i else float("nan"))
        ctx = multiprocessing.get_context("spawn")
        with cf.ProcessPoolExecutor(max_workers=self.pool_workers, mp_context=ctx,
                                    initializer=_exit_with_parent, initargs=(os.getpid(),)) as pool:
            futures = {pool.submit(func, jobs[k]): k for k in range(i, n)}
            try:
                for fut in cf.as_completed(futures):
                    k = futures.pop(fut)
                    self.pool_items += 1
                    try:
                        yield Outcome(k, result=fut.result())
                    except Exception as exc:  # e.g. BrokenProcessPool: a worker died
                        yield Outcome(k, error=exc)
            finally:
                for fut in futures:
                    fut.cancel()


class DaskEngine(Engine):
    """Items as tasks on a Dask distributed cluster (optional extra ``lasecyto[dask]``).

    Parameters
    ----------
    address : str, optional
        Scheduler address, e.g. ``tcp://10.0.0.5:8786``.
    scheduler_file : path, optional
        JSON file written by ``dask scheduler --scheduler-file``.
    timeout_s : float
        Time allowed to reach the scheduler.

    The workers must have lasecyto installed and see the input files under
    the same paths; results come back to the calling process, which writes
    them.
    """

    kind = "dask"

    def __init__(self, *, address=None, scheduler_file=None, timeout_s=30.0):
        if (address is None) == (scheduler_file is None):
            raise InputError("give one way to reach the Dask scheduler", field="scheduler",
                             expected="either an address or a scheduler file",
                             found="both" if address is not None else "neither")
        self.address = None if address is None else str(address)
        self.scheduler_file = None if scheduler_file is None else Path(scheduler_file)
        self.timeout_s = float(timeout_s)
        self.n_workers = None

    def describe(self):
        return {"kind": self.kind, "address": self.address,
                "scheduler_file": None if self.scheduler_file is None else str(self.scheduler_file),
                "cluster_workers": self.n_workers}

    def _client(self):
        try:
            from distributed import Client
        except ImportError:
            raise InputError("the Dask engine needs the optional dependency dask[distributed]",
                             field="--scheduler", expected="pip install 'lasecyto[dask]'",
                             found="distributed is not installed") from None
        where = self.address
        if self.scheduler_file is not None:
            if not self.scheduler_file.is_file():
                raise InputError("scheduler file not found", path=self.scheduler_file,
                                 field="--scheduler-file", expected="the JSON file written by the scheduler",
                                 found="nothing")
            where = str(self.scheduler_file)
        try:
            if self.scheduler_file is not None:
                client = Client(scheduler_file=str(self.scheduler_file), timeout=self.timeout_s,
                                set_as_default=False)
            else:
                client = Client(self.address, timeout=self.timeout_s, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise InputError("cannot reach the Dask scheduler", path=where, field="scheduler",
                             expected="a running scheduler", found=" ".join(str(exc).split())) from None
        self.n_workers = len(client.scheduler_info().get("workers", {}))
        return client

    def run(self, func, jobs):
        from distributed import as_completed

        jobs = list(jobs)
        if not jobs:
            return
        client = self._client()
        token = secrets.token_hex(4)
        try:
            futures = [client.submit(func, job, key=f"lasecyto-item-{k}-{token}", pure=False)
                       for k, job in enumerate(jobs)]
            index = {fut.key: k for k, fut in enumerate(futures)}
            for fut in as_completed(futures, loop=client.loop):
                k = index[fut.key]
                try:
                    outcome = Outcome(k, result=fut.result())
                except Exception as exc:  # a lost worker, a task that could not run
                    outcome = Outcome(k, error=exc)
                fut.release()
                yield outcome
        finally:
            client.close()


def make_engine(*, workers=1, scheduler=None, scheduler_file=None, parallel_min_s=PARALLEL_MIN_S) -> Engine:
    """The engine for the options of ``lasecyto run``.

    Dask when ``scheduler`` (an address) or ``scheduler_file`` is given,
    otherwise the local engine with up to ``workers`` processes.
    """
    if scheduler is not None or scheduler_file is not None:
        if scheduler is not None and scheduler_file is not None:
            raise InputError("give either a scheduler address or a scheduler file", field="scheduler",
                             expected="one of them", found="both")
        return DaskEngine(address=scheduler, scheduler_file=scheduler_file)
    return LocalEngine(workers, parallel_min_s=parallel_min_s)
