"""Background jobs of the dashboard (the Drill-down's window studies): a bounded number at
once, the rest queued with their place shown, no finished process left behind, none
outliving the server.

Dash runs each background callback in a process of its own (:class:`dash.DiskcacheManager`).
:class:`BoundedJobs` keeps that, and adds:

- at most ``max_jobs`` studies compute at once (a semaphore the processes share); a study
  started beyond that waits, and its progress bar says how many run and wait before it;
- finished processes are reaped whenever a job starts or is polled (no zombie processes);
- :meth:`BoundedJobs.shutdown` (run when the server stops, and at interpreter exit)
  terminates every job still alive.
"""

from __future__ import annotations

import atexit
import os

import multiprocess
from dash import DiskcacheManager

#: Studies computing at once by default: one per core, at least one.
DEFAULT_JOBS = max(1, os.cpu_count() or 1)


def job_slots(max_jobs: int = DEFAULT_JOBS):
    """A semaphore of ``max_jobs`` slots that server processes forked after it share, so
    that the bound holds across them (:class:`BoundedJobs`' ``slots``)."""
    if max_jobs < 1:
        raise ValueError(f"max_jobs must be at least 1, got {max_jobs}")
    return multiprocess.BoundedSemaphore(max_jobs)


class BoundedJobs(DiskcacheManager):
    """A :class:`dash.DiskcacheManager` running at most ``max_jobs`` jobs at once.

    Parameters
    ----------
    cache : diskcache.Cache
    max_jobs : int
        Jobs computing at once; later ones wait in their own process until a slot frees.
    slots : semaphore, optional
        The slots (:func:`job_slots` of ``max_jobs``), when several server processes share
        them and the cache; by default the manager's own.
    """

    def __init__(self, cache, max_jobs: int = DEFAULT_JOBS, slots=None):
        super().__init__(cache)
        self.max_jobs = max_jobs
        self._slots = slots if slots is not None else job_slots(max_jobs)
        self._parent = os.getpid()
        atexit.register(self.shutdown)

    def call_job_fn(self, key, job_fn, args, context):
        reap()
        process = multiprocess.Process(
            target=_queued, args=(job_fn, self._slots, self.handle, self.max_jobs, key,
                                  self._make_progress_key(key), args, context))
        process.start()
        return process.pid

    def job_running(self, job):
        reap()
        return super().job_running(job)

    def shutdown(self) -> None:
        """Terminate every job process still alive (only in the process that started them)."""
        if os.getpid() != self._parent:
            return
        for child in multiprocess.active_children():
            child.terminate()
        for child in multiprocess.active_children():
            child.join(timeout=5)


def reap() -> int:
    """Join the finished job processes of this process; returns how many are still alive."""
    return len(multiprocess.active_children())


_WAITING = "comove-jobs-waiting"
_RUNNING = "comove-jobs-running"


def _queued(job_fn, slots, cache, max_jobs: int, key, progress_key, args, context) -> None:
    """Run one job once a slot is free; meanwhile its progress bar says where it stands."""
    waiting = cache.incr(_WAITING, default=0)
    running = int(cache.get(_RUNNING, 0))
    if running >= max_jobs:
        studies = "study" if running == 1 else "studies"
        label = f"waiting: {running} {studies} running, this one {waiting} in the queue"
        cache.set(progress_key, [0, 1, label])
    slots.acquire()
    cache.decr(_WAITING)
    cache.incr(_RUNNING, default=0)
    try:
        job_fn(key, progress_key, args, context)
    finally:
        cache.decr(_RUNNING)
        slots.release()
