"""Where the runs of a sweep or an optimisation execute.

Three executors with one interface, ``run(tasks)`` yielding each task's
outcome as it finishes (in any order) and ``close(abort)``:

* :class:`SerialExecutor`: in this process, one run after the other, the
  kernels on all cores (``--workers 1``);
* :class:`ProcessExecutor`: a pool of local worker processes (started with
  ``spawn``: no state copied from the parent), each running its kernels on
  its share of the cores so that the machine is not oversubscribed;
* :class:`DaskExecutor`: the workers of an existing Dask distributed
  cluster (``--scheduler ADDRESS``; optional dependency ``distributed``).
  ``mdrotor run --scheduler`` uses its :meth:`DaskExecutor.map` to spread
  one run's trajectory chunks (:func:`mdrotor.engine.run.run_chunk`).

A run's result depends only on its config and seed, never on the executor,
the number of workers or threads, or the order in which runs finish.
Workers only compute; the parent process writes every file.
"""

from __future__ import annotations

import os
import threading

from mdrotor.errors import InputError

_WORKER_THREADS = None  # thread share of a local worker process
DASK_LOCK = threading.Lock()  # one run at a time per Dask worker process


def worker_threads():
    """The thread share of this local worker process (None outside a worker)."""
    return _WORKER_THREADS


def _perform(task):
    """Run one task object (a study's :class:`mdrotor.studies.tasks.Task`): executors only decide where."""
    return task()


def dask_worker_threads():
    import sys

    if "distributed" not in sys.modules:  # a Dask worker has it loaded already
        return None
    try:
        from distributed import get_worker

        w = get_worker()
    except (ImportError, ValueError):
        return None
    state = getattr(w, "state", None)
    n = getattr(state, "nthreads", None) or getattr(w, "nthreads", None) or 1
    return int(n)


def available_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not Linux
        return os.cpu_count() or 1


# ---------------------------------------------------------------------------
class SerialExecutor:
    """Runs in this process, kernels on all cores."""

    name = "serial"
    workers = 1

    def run(self, tasks):
        for t in tasks:
            yield _perform(t)

    def close(self, abort: bool = False) -> None:
        pass


def _init_worker(parent_pid: int, threads: int) -> None:
    import signal
    import time

    global _WORKER_THREADS
    _WORKER_THREADS = threads
    # Ctrl-C goes to the whole process group: the parent handles it and
    # stops the pool, the workers ignore it.
    signal.signal(signal.SIGINT, signal.SIG_IGN)

    def watchdog():
        # A parent killed with SIGKILL cannot stop its pool: leave with it.
        while True:
            time.sleep(0.5)
            if os.getppid() != parent_pid:
                os._exit(3)

    threading.Thread(target=watchdog, daemon=True, name="mdrotor-parent-watchdog").start()


class ProcessExecutor:
    """A pool of ``workers`` local processes, each with a share of the cores."""

    name = "processes"

    def __init__(self, workers: int, threads: int | None = None):
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        self.workers = int(workers)
        self.threads = int(threads) if threads else max(1, available_cores() // self.workers)
        # the children read these at start-up: no BLAS thread pools on top of ours
        self._env = {k: "1" for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")}
        self.pool = ProcessPoolExecutor(self.workers, mp_context=multiprocessing.get_context("spawn"),
                                        initializer=_init_worker, initargs=(os.getpid(), self.threads))

    def run(self, tasks):
        from concurrent.futures import as_completed

        saved = {k: os.environ.get(k) for k in self._env}
        os.environ.update(self._env)
        try:
            futs = [self.pool.submit(_perform, t) for t in tasks]
        finally:
            for k, v in saved.items():
                if v is None:
                    os.environ.pop(k, None)
                else:
                    os.environ[k] = v
        try:
            for f in as_completed(futs):
                yield f.result()
        finally:
            for f in futs:
                f.cancel()

    def close(self, abort: bool = False) -> None:
        procs = list(getattr(self.pool, "_processes", {}).values()) if abort else []
        self.pool.shutdown(wait=not abort, cancel_futures=True)
        for p in procs:  # our own worker processes, stopped by id
            if p.is_alive():
                p.terminate()
        for p in procs:
            p.join(5)


class DaskExecutor:
    """The workers of a running Dask distributed cluster."""

    name = "dask"

    def __init__(self, address: str):
        try:
            from distributed import Client
        except ImportError:
            raise InputError("--scheduler", "needs the optional dependency 'distributed': pip install 'mdrotor[cluster]'",
                             "command line") from None
        try:
            self.client = Client(address, timeout="10s")
        except (OSError, TimeoutError, ValueError) as e:
            raise InputError("--scheduler", f"cannot reach a Dask scheduler at {address!r} ({e})", "command line") from None
        self.workers = len(self.client.scheduler_info().get("workers", {}))
        self._futs = []

    def run(self, tasks):
        tasks = list(tasks)
        for _, outcome in self.map(_perform, tasks, [t.name for t in tasks]):
            yield outcome

    def map(self, fn, items, names=None):
        """Submit ``fn(item)`` for every item; yield ``(position, result)`` as
        each finishes (in any order). A worker's exception is raised here;
        what is still pending is cancelled when the caller stops early."""
        import uuid

        from distributed import as_completed

        items = list(items)
        names = names if names is not None else [str(i) for i in range(len(items))]
        tag = uuid.uuid4().hex
        futs = [self.client.submit(fn, it, pure=False, key=f"mdrotor-{str(nm).replace('/', '-')}-{tag}")
                for it, nm in zip(items, names)]
        where = {f.key: i for i, f in enumerate(futs)}
        self._futs = futs
        try:
            for f in as_completed(futs):
                yield where[f.key], f.result()
        finally:
            pending = [f for f in futs if not f.done()]
            if pending:
                self.client.cancel(pending)

    def close(self, abort: bool = False) -> None:
        pending = [f for f in self._futs if not f.done()]
        if pending:
            self.client.cancel(pending)
        self.client.close()


def make_executor(workers: int | None = None, scheduler: str | None = None, n_tasks: int | None = None):
    """The executor for ``--workers`` / ``--scheduler`` (see module doc).

    ``workers`` None: one local process per core (at most one per task);
    1: in this process.
    """
    if scheduler:
        return DaskExecutor(scheduler)
    n = int(workers) if workers else available_cores()
    if n_tasks is not None:
        n = max(1, min(n, n_tasks))
    if n <= 1:
        return SerialExecutor()
    return ProcessExecutor(n)
