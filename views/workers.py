"""Heavy jobs (photo maps, spectrum fits) in worker processes, so they never hold up the page.

A photo map spends much of its time in Python code; run in a thread of the server it would hold
the interpreter lock and every user's slider would wait for it. Here it runs in a separate
process with a lower scheduling priority: the server's event loop keeps one core's worth of
Python to itself. This module imports no Panel or Bokeh, so workers start light.

The pool has ``max_jobs_server`` processes (:func:`views.limits.heavy_job` decides when a job may
start; nothing queues). Each worker is replaced after :data:`TASKS_PER_WORKER` jobs, which
returns a large photo's memory to the system. A worker that dies (killed, out of memory) breaks
its pool; the next job gets a fresh pool and the user of the lost job a message.

Progress and cancellation travel through a :class:`Channel`: a queue the worker puts
``(fraction, text)`` on, and an event the page sets to cancel. Both live in one small manager
process, started with the first job.
"""

from __future__ import annotations

import asyncio
import multiprocessing
import os
import threading
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool

#: Jobs a worker process runs before it is replaced by a fresh one.
TASKS_PER_WORKER = 25
#: Scheduling niceness of the worker processes (higher runs later when the cores are busy).
WORKER_NICENESS = 10
#: How often the page looks for progress while a job runs (s).
POLL_S = 0.25

_guard = threading.Lock()
_pool: ProcessPoolExecutor | None = None
_pool_size = 0
_manager = None


def _context():
    """Worker processes start from a clean server process, never by forking the threaded web server."""
    return multiprocessing.get_context("forkserver")


def _init_worker() -> None:
    try:
        os.nice(WORKER_NICENESS)
    except (AttributeError, OSError):            # not POSIX, or not allowed: normal priority
        pass
    import physics.fit  # noqa: F401  (import the numerics once per worker, not per job)
    import physics.inverse  # noqa: F401


def process_pool(workers: int) -> ProcessPoolExecutor:
    """The pool of ``workers`` processes, made (again) when missing, resized or broken."""
    global _pool, _pool_size
    with _guard:
        if _pool is None or _pool_size != workers or getattr(_pool, "_broken", False):
            if _pool is not None:
                _pool.shutdown(wait=False, cancel_futures=True)
            _pool = ProcessPoolExecutor(max_workers=workers, mp_context=_context(), initializer=_init_worker,
                                        max_tasks_per_child=TASKS_PER_WORKER)
            _pool_size = workers
        return _pool


def warm(workers: int) -> None:
    """Start the worker processes now (each imports the numerics) so the first job does not wait."""
    pool = process_pool(workers)
    for _ in range(workers):
        pool.submit(os.getpid)
    _the_manager()                               # and the manager process that carries progress


def shutdown() -> None:
    """Stop the workers and the manager (the server calls this when it stops)."""
    global _pool, _manager
    with _guard:
        if _pool is not None:
            _pool.shutdown(wait=False, cancel_futures=True)
            _pool = None
        if _manager is not None:
            _manager.shutdown()
            _manager = None


def _the_manager():
    """The manager process holding every job's progress queue and cancel flag, started on first use."""
    global _manager
    with _guard:
        if _manager is None:
            _manager = _context().Manager()
        return _manager


class Channel:
    """Progress from a worker to the page, and a cancel flag from the page to the worker."""

    def __init__(self, queue, event):
        self.queue, self.event = queue, event

    @classmethod
    def make(cls) -> Channel:
        """A new channel (two round trips to the manager process: call it off the event loop)."""
        manager = _the_manager()
        return cls(manager.Queue(), manager.Event())

    # worker side
    def report(self, fraction: float, text: str) -> None:
        from .limits import JobCancelled
        if self.event.is_set():
            raise JobCancelled()
        self.queue.put((float(fraction), str(text)))

    # page side
    def cancel(self) -> None:
        self.event.set()

    def drain(self):
        """The newest (fraction, text) reported since the last call, or None."""
        last = None
        while True:
            try:
                last = self.queue.get_nowait()
            except Exception:                    # queue.Empty through the manager
                return last


class LocalChannel:
    """The same interface within one process (tests, and pages not run by a server)."""

    def __init__(self, on_progress=None, cancelled=None):
        self.on_progress, self.cancelled = on_progress, cancelled

    def report(self, fraction: float, text: str) -> None:
        from .limits import JobCancelled
        if self.cancelled is not None and self.cancelled():
            raise JobCancelled()
        if self.on_progress is not None:
            self.on_progress(fraction, text)


# ---------------------------------------------------------------------- the jobs (run in a worker)
def photo_map(args: dict, channel) -> tuple:
    """``physics.thickness_map(**args)`` → (result, None) or (None, message).

    The maps come back as float32 (orders as int16): half the bytes through the pipe, and what the
    page shows and saves (its .npy download is float32) loses nothing that matters (0.1 pm at 1 µm).
    """
    import dataclasses

    import numpy as np

    from physics import InputError, thickness_map
    try:
        r = thickness_map(progress=channel.report, **args)
    except InputError as exc:
        return None, str(exc)
    return dataclasses.replace(r, thickness_nm=r.thickness_nm.astype(np.float32),
                               delta_e=r.delta_e.astype(np.float32), margin=r.margin.astype(np.float32),
                               order=r.order.astype(np.int16)), None


# ---------------------------------------------------------------------- the page side
async def new_channel() -> Channel:
    """A new :class:`Channel`, made off the event loop (it takes round trips to the manager process)."""
    return await asyncio.get_running_loop().run_in_executor(None, Channel.make)


async def run_in_worker(workers: int, fn, *args, channel: Channel | None = None, on_progress=None,
                        cancelled=None):
    """Run ``fn(*args)`` (or ``fn(*args, channel)``) in the pool and await it.

    While it runs, every :data:`POLL_S` the newest progress goes to ``on_progress(fraction, text)``
    and, once ``cancelled()`` is true, the worker is told to stop at its next stage. Raises
    :class:`WorkerLost` when the worker process died.
    """
    pool = process_pool(workers)
    call_args = (*args, channel) if channel is not None else args
    told = channel is not None and cancelled is not None and cancelled()
    if told:
        channel.cancel()                          # superseded already: the worker stops at its first stage
    future = asyncio.wrap_future(pool.submit(fn, *call_args))
    while not future.done():
        await asyncio.wait([future], timeout=POLL_S)
        if channel is not None:
            if not told and cancelled is not None and cancelled():
                channel.cancel()
                told = True
            latest = channel.drain()
            if latest is not None and on_progress is not None:
                on_progress(*latest)
    try:
        return future.result()
    except BrokenProcessPool:
        raise WorkerLost("The computation's worker process stopped unexpectedly (perhaps the server ran "
                         "out of memory); try again, or with a smaller photo or region.") from None


class WorkerLost(RuntimeError):
    """The worker process running a job died; the message is for the user."""
