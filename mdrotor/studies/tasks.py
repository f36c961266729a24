"""A study's unit of work: one full run of a config, wherever an executor sends it."""

from __future__ import annotations

from dataclasses import dataclass

from mdrotor.engine.executors import DASK_LOCK, dask_worker_threads, worker_threads
from mdrotor.engine.run import run
from mdrotor.errors import InputError


@dataclass
class Task:
    """One full run: a validated config (with its seed and trajectory
    count in ``[run]``) and the name it is stored under."""

    name: str
    cfg: object
    threads: int | None = None
    progress: bool = False

    def __call__(self) -> "Outcome":
        return run_task(self)


@dataclass
class Outcome:
    name: str
    result: object = None  # mdrotor.results.result.Result
    error: str = ""  # a run refused by the physics (unbound crystal, ...)


def run_task(task: Task) -> Outcome:
    """Run one task (in whichever process or cluster worker it lands)."""

    threads = task.threads if task.threads is not None else worker_threads()
    dask_threads = dask_worker_threads() if threads is None else None
    try:
        if dask_threads is not None:
            # A Dask worker with k threads runs one point at a time on k
            # numba threads: its cores are used and never oversubscribed.
            with DASK_LOCK:
                res = run(task.cfg, threads=dask_threads, progress=task.progress)
        else:
            res = run(task.cfg, threads=threads, progress=task.progress)
    except InputError as e:
        return Outcome(task.name, None, e.line())
    return Outcome(task.name, res, "")
