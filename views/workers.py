"""Heavy jobs (photo maps, spectrum fits) in worker processes, so they never hold up the page.

A photo map spends much of its time in Python code; run in a thread of the server it would hold
the interpreter lock and every user's slider would wait for it. Here it runs in a separate
process with a lower scheduling priority: the server's event loop keeps one core's worth of
Python to itself. This module imports no Panel or Bokeh, so workers start light.

The pool has ``max_jobs_server`` *slots* (:func:`views.limits.heavy_job` decides when a job may
start; nothing queues in practice). Each slot is one worker process of its own, started from a
clean forkserver process (never forked from the threaded web server) at :data:`WORKER_NICENESS`
with an address-space limit (:func:`worker_memory_bytes`), and joined to the server by its own
pipe. A thread per slot does all the talking: it sends the job, reads progress and the result,
and takes the pipe closing as the process's death. So a worker that dies (killed, out of memory,
a crash in a C library) costs only the job it was running: that job's user gets a sentence
(:class:`WorkerLost`), every other job runs on, and the slot starts a new process by itself.
A slot's process is also replaced after :data:`TASKS_PER_WORKER` jobs (to give a large photo's
memory back), after a job that ran out of memory (:class:`JobOutOfMemory`), and when a job runs
past :data:`JOB_WALL_CLOCK_S` (killed; :class:`JobTimedOut`). A process that cannot start is tried
again after a growing pause, and :func:`status` says "degraded" meanwhile.

Progress and cancellation need no helper process: the worker writes ``(fraction, text)`` on its
pipe, and cancelling writes the job's number into a word of shared memory that belongs to the
slot, which the worker reads at every stage of the job (its channel's ``report`` then raises
``JobCancelled``). The event loop never reads a pipe nor waits for a process: :func:`run_in_worker`
looks at its job every :data:`POLL_S`. The only processes besides the workers are
multiprocessing's forkserver and resource tracker, which start again by themselves when a new
worker needs them.
"""

from __future__ import annotations

import asyncio
import itertools
import multiprocessing
import os
import pickle
import queue
import signal
import threading
import time
from concurrent.futures import Future, InvalidStateError
from logging import getLogger

from .limits import JobCancelled, Limits

#: Jobs a worker process runs before it is replaced by a fresh one.
TASKS_PER_WORKER = 25
#: Scheduling niceness of the worker processes (higher runs later when the cores are busy).
WORKER_NICENESS = 10
#: How often the page looks for progress while a job runs (s).
POLL_S = 0.25
#: Longest one job may run before its worker is killed and its user told (s). The largest photo the
#: server takes (24 MP, an invented wedge) mapped in 19 s on a busy 2-core machine and a fit takes
#: seconds, so ten minutes is far beyond any job that is going to finish, yet a runaway cannot hold a
#: slot all day.
JOB_WALL_CLOCK_S = 600.0
#: Longest a new worker may take to be ready (it imports the numerics, about a second) before the start
#: counts as failed and the process is killed (s).
WORKER_START_TIMEOUT_S = 60.0
#: Failed starts in a row of one slot after which :func:`status` says "degraded" (one can be bad luck).
DEGRADED_AFTER_FAILED_STARTS = 2
#: Pause before a slot tries again after a failed start, doubled for each further failure up to the cap
#: (s): a worker that cannot start must not cost the server its cores.
RESTART_PAUSE_S, RESTART_PAUSE_MAX_S = 0.5, 30.0
#: How often an idle slot checks that its process is still there (s).
IDLE_CHECK_S = 0.5
#: How long :func:`shutdown` lets a worker exit by itself before it is killed (s).
STOP_GRACE_S = 2.0
#: Address space a worker needs besides its job's data: measured 0.46 GB with the numerics imported,
#: 0.57 GB at a fit's largest scan (MAX_SCAN_POINTS x MAX_FIT_POINTS); rounded up to leave room.
WORKER_BASE_BYTES = 2**30
#: Address space a photo map may reserve per photo pixel: twice the 154 bytes a map holds while it runs
#: (views/limits.py, measured on a 4 MP map), because reserved address space runs ahead of resident
#: memory (allocator arenas, the photo while it is unpickled). Measured: a 24 MP map peaked at 1.8 GB.
MAP_ADDRESS_BYTES_PER_PIXEL = 2 * 154

LOST = ("The computation's worker process stopped unexpectedly (perhaps the server ran out of memory); "
        "try again, or with a smaller photo or region.")
CANNOT_START = ("The server cannot start its worker processes for photo maps and fits just now; try again "
                "in a minute, and tell whoever runs the server if this goes on.")
STOPPING = "The server is stopping; try again once it is back."

_log = getLogger("fringegauge")
_guard = threading.Lock()
_start_lock = threading.Lock()               # one process start at a time (forkserver handshakes)
_pool: WorkerPool | None = None


class WorkerLost(RuntimeError):
    """The worker process running a job died or was stopped; the message is for the user."""


class JobTimedOut(WorkerLost):
    """A job ran past :data:`JOB_WALL_CLOCK_S`; its worker was killed."""


class JobOutOfMemory(WorkerLost):
    """A job needed more address space than :func:`worker_memory_bytes`; its worker was replaced."""


#: Threads each BLAS/OpenMP library may start in a worker process: the server runs up to
#: ``max_jobs_server`` workers on a few cores and the numerics' matrices are small, so more threads per
#: process only oversubscribe the cores. Set in the environment the forkserver starts with (it imports
#: numpy before any worker runs); a value already in the environment is kept.
WORKER_BLAS_THREADS = "1"
_BLAS_THREAD_VARS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def _context():
    """Worker processes start from a clean server process, never by forking the threaded web server."""
    for var in _BLAS_THREAD_VARS:
        os.environ.setdefault(var, WORKER_BLAS_THREADS)
    return multiprocessing.get_context("forkserver")


def _share_cores() -> None:
    """Give this worker its share of the cores: the rigorous grating solver's own threads
    (``FRINGEGAUGE_SOLVER_THREADS``, unless set) are the cores over ``max_jobs_server``, at least 1."""
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cores = os.cpu_count() or 1
    os.environ.setdefault("FRINGEGAUGE_SOLVER_THREADS", str(max(1, cores // max(1, Limits.from_env().max_jobs_server))))


def worker_memory_bytes(limits: Limits | None = None) -> int:
    """The address-space limit (``RLIMIT_AS``, bytes) of each worker process.

    :data:`WORKER_BASE_BYTES` plus :data:`MAP_ADDRESS_BYTES_PER_PIXEL` for every pixel of the largest
    photo the server takes (``max_photo_megapixels``: 8.5 GB at the default 24 MP), but no more than
    the machine's memory, beyond which a limit would protect nothing. A job that needs more fails
    alone with :class:`JobOutOfMemory` instead of drawing the machine into swap or the kernel's
    out-of-memory killer.
    """
    limits = limits or Limits.from_env()
    wanted = WORKER_BASE_BYTES + int(limits.max_photo_megapixels * 1e6 * MAP_ADDRESS_BYTES_PER_PIXEL)
    try:
        machine = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (AttributeError, ValueError, OSError):
        return wanted
    return min(wanted, machine) if machine > 0 else wanted


# ---------------------------------------------------------------------- the worker process
def _init_worker(memory_bytes: int) -> None:
    """Set up a new worker: lower priority, the address-space limit, the numerics imported once."""
    try:
        os.nice(WORKER_NICENESS)
    except (AttributeError, OSError):            # not POSIX, or not allowed: normal priority
        pass
    try:
        import resource
        _, hard = resource.getrlimit(resource.RLIMIT_AS)
        soft = memory_bytes if hard == resource.RLIM_INFINITY else min(memory_bytes, hard)
        resource.setrlimit(resource.RLIMIT_AS, (soft, hard))
    except (ImportError, AttributeError, ValueError, OSError):    # not Linux: no limit
        pass
    _share_cores()
    import physics.fit  # noqa: F401  (import the numerics once per worker, not per job)
    import physics.inverse  # noqa: F401
    from physics.colourkernel import warm
    try:
        warm()                                   # the photo map's compiled loops, from numba's cache
    except Exception:                            # noqa: BLE001 - the numpy passes serve without them
        pass


#: What a new worker process runs first, given :func:`worker_memory_bytes`.
_initializer = _init_worker


class _WorkerChannel:
    """A job's channel inside its worker: progress onto the pipe, cancel read from the slot's shared word."""

    def __init__(self, conn, cancel_word, job_id: int):
        self.conn, self.cancel_word, self.job_id = conn, cancel_word, job_id

    def report(self, fraction: float, text: str) -> None:
        if self.cancel_word.value == self.job_id:
            raise JobCancelled()
        if self.conn.poll():                     # the server sends nothing during a job: its end has closed
            raise SystemExit(0)                  # nobody waits for this result: stop quietly
        self.conn.send(("progress", float(fraction), str(text)))


def _worker_main(conn, cancel_word, memory_bytes: int, initializer) -> None:
    """A worker process: start up, say "ready", then run one job per message until told to stop."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)             # Ctrl-C in a terminal is the server's to handle
    try:
        initializer(memory_bytes)
    except BaseException as exc:                             # noqa: BLE001 - told to the server, then exit
        conn.send(("failed", f"{type(exc).__name__}: {exc}"[:300]))
        return
    conn.send(("ready", os.getpid()))
    while True:
        try:
            data = conn.recv_bytes()
        except (EOFError, OSError):
            return                                            # the server has gone
        conn.send(("ack",))
        reply = _run_job(data, conn, cancel_word)
        del data
        if reply is None:
            return                                            # told to stop
        try:
            conn.send(reply)
        except MemoryError:
            reply = ("memory",)
            conn.send(reply)
        except (OSError, EOFError):
            return
        except Exception as exc:                             # noqa: BLE001 - the result does not pickle
            conn.send(("raised", RuntimeError(f"The computation's result could not be sent back: {exc}")))
        if reply[0] == "memory":
            return                                            # a fresh process after running out of memory
        del reply
        _give_back_memory()


def _give_back_memory() -> None:
    """Hand a finished job's freed memory back to the system (a photo map frees hundreds of MB that glibc
    would otherwise keep mapped until the process is replaced); does nothing where libc is not glibc."""
    from .limits import _malloc_trim

    trim = _malloc_trim()
    if trim is not None:
        trim(0)


def _run_job(data: bytes, conn, cancel_word):
    """("done", result), ("raised", exception), ("memory",), or None for the stop message."""
    try:
        message = pickle.loads(data)
        if message is None:
            return None
        job_id, fn, args, with_channel = message
        del message
        if with_channel:
            args = (*args, _WorkerChannel(conn, cancel_word, job_id))
        return ("done", fn(*args))
    except MemoryError:
        return ("memory",)
    except Exception as exc:                                 # noqa: BLE001 - the caller's to handle
        return ("raised", exc)


# ---------------------------------------------------------------------- the server side
class _Job:
    """One call of :func:`run_in_worker`: what to run, its future, newest progress and cancel flag."""

    _ids = itertools.count(1)

    def __init__(self, fn, args: tuple, with_channel: bool):
        self.id = next(self._ids)
        self.fn, self.args, self.with_channel = fn, args, with_channel
        self.future: Future = Future()
        self.progress = None                     # (sequence number, fraction, text), newest
        self.cancel_requested = False
        self.slot: _Slot | None = None
        self.worker: _Worker | None = None
        self.deadline: float | None = None
        self.started = False                     # the worker has the job (it said so)
        self.tries = 0
        self.sequence = itertools.count(1)       # numbers its progress messages
        self._lock = threading.Lock()
        self._state = "queued"                   # "queued" -> "claimed" (a slot runs it) | "abandoned"

    def claim(self, slot) -> bool:
        with self._lock:
            if self._state != "queued" or self.future.done():
                return False
            self._state, self.slot = "claimed", slot
            self.tries += 1
            return True

    def requeue(self) -> None:
        with self._lock:
            self._state, self.slot, self.worker, self.deadline = "queued", None, None, None
            self.started = False

    def abandon(self) -> bool:
        with self._lock:
            if self._state != "queued":
                return False
            self._state = "abandoned"
            return True

    def cancel(self) -> None:
        """Ask the worker to stop at the job's next stage (a write to shared memory: never blocks)."""
        self.cancel_requested = True
        slot = self.slot
        if slot is not None and slot.cancel_word is not None:
            slot.cancel_word.value = self.id

    def finish(self, result=None, exc: BaseException | None = None) -> None:
        try:
            if exc is not None:
                self.future.set_exception(exc)
            else:
                self.future.set_result(result)
        except InvalidStateError:                # already finished (abandoned, or stopped at shutdown)
            pass
        self.fn = self.args = None               # the photo goes with the job


class _Worker:
    """One worker process and the server's end of its pipe."""

    def __init__(self, process, conn):
        self.process, self.conn, self.pid = process, conn, process.pid
        self.jobs = 0
        self.kill_reason: str | None = None
        self.released = False

    def kill(self, reason: str) -> None:
        """SIGKILL the process once (never blocks); the slot's thread sees its pipe close."""
        if self.released or self.kill_reason is not None:    # once reaped its pid may be another's
            return
        self.kill_reason = reason
        try:
            os.kill(self.pid, signal.SIGKILL)
        except OSError:                          # already gone
            pass

    def gone(self) -> bool:
        """True when an idle worker's pipe has closed (an idle worker writes nothing)."""
        try:
            return self.conn.poll(0)
        except (OSError, EOFError, ValueError):
            return True

    def wait_closed(self, timeout_s: float) -> bool:
        """Read until the pipe closes, at most ``timeout_s``; True once it has."""
        deadline = time.monotonic() + timeout_s
        try:
            while True:
                left = deadline - time.monotonic()
                if left <= 0:
                    return False
                if self.conn.poll(left):
                    self.conn.recv_bytes()
        except (EOFError, OSError, ValueError):
            return True

    def release(self) -> None:
        """After the pipe closed: reap and forget the process."""
        self.released = True
        self.conn.close()
        self.process.join(1.0)
        try:
            self.process.close()
        except ValueError:                       # its forkserver has not reported the exit yet
            pass


class _Slot:
    """One place in the pool: a thread that keeps one worker process and runs jobs on it."""

    def __init__(self, pool: WorkerPool, index: int):
        self.pool, self.index = pool, index
        self.cancel_word = None                  # shared with every process of this slot
        self.worker: _Worker | None = None       # set while a process is ready or busy
        self.starting: _Worker | None = None     # set while a process is starting
        self.job: _Job | None = None
        self.failed_starts = 0
        self.last_failure = ""
        self.replacing = False                   # the next start replaces a process that died
        self.thread = threading.Thread(target=self._loop, name=f"fringegauge-worker-slot-{index}", daemon=True)

    # -- the slot's thread
    def _loop(self) -> None:
        pool = self.pool
        while not pool.stopping.is_set():
            try:
                self._step()
            except Exception:                    # noqa: BLE001 - a fault here must not take the slot away
                _log.exception("worker slot failed; starting it again")
                job, self.job = self.job, None
                if job is not None:
                    job.finish(exc=WorkerLost(LOST))
                if self.worker is not None:
                    self.worker.kill("fault")
                    self._lose_worker()
                pool.stopping.wait(RESTART_PAUSE_S)
        self._retire()

    def _step(self) -> None:
        """Start a process if the slot has none, else run the next job (or check the idle process)."""
        pool = self.pool
        if self.cancel_word is None:
            self.cancel_word = _context().RawValue("q", 0)
        if self.worker is None:
            if not self._start():
                pool.stopping.wait(min(RESTART_PAUSE_MAX_S, RESTART_PAUSE_S * 2 ** max(0, self.failed_starts - 1)))
            return
        try:
            job = pool.jobs.get(timeout=IDLE_CHECK_S)
        except queue.Empty:
            if self.worker.gone():               # died while idle: start another before the next job
                self._lose_worker()
            return
        if job is not None and job.claim(self):
            self._run(job)

    def _start(self) -> bool:
        """Start a process and wait until it is ready; False (and the failure noted) if it is not."""
        ctx = _context()
        conn, child_end = ctx.Pipe(duplex=True)
        process = ctx.Process(target=_worker_main, name=f"fringegauge-worker-{self.index}", daemon=True,
                              args=(child_end, self.cancel_word, self.pool.memory_bytes, _initializer))
        try:
            with _start_lock:
                process.start()
        except Exception as exc:                 # noqa: BLE001 - e.g. no processes left to fork
            conn.close()
            return self._failed(f"{type(exc).__name__}: {exc}")
        finally:
            child_end.close()                    # only the worker holds its end: its death closes the pipe
        worker = self.starting = _Worker(process, conn)
        deadline = time.monotonic() + WORKER_START_TIMEOUT_S
        message = ("failed", f"not ready within {WORKER_START_TIMEOUT_S:g} s")
        try:
            while time.monotonic() < deadline and not self.pool.stopping.is_set():
                if conn.poll(min(0.5, max(0.0, deadline - time.monotonic()))):
                    message = conn.recv()
                    break
        except (EOFError, OSError):
            process.join(1.0)
            message = ("failed", f"exited while starting (exit code {process.exitcode})")
        finally:
            self.starting = None
        if message[0] != "ready":
            worker.kill("start")
            worker.wait_closed(STOP_GRACE_S)
            worker.release()
            return False if self.pool.stopping.is_set() else self._failed(str(message[1]))
        self.worker = worker
        self.failed_starts, self.last_failure = 0, ""
        if self.replacing:
            self.replacing = False
            self.pool.count("restarts")
        return True

    def _failed(self, reason: str) -> bool:
        self.failed_starts += 1
        self.last_failure = reason
        self.replacing = True
        return False

    def _run(self, job: _Job) -> None:
        worker = self.worker
        self.job, job.worker = job, worker
        if job.cancel_requested:                 # cancelled before it started: nothing to run
            self.cancel_word.value = job.id
            self._done(job, exc=JobCancelled())
            return
        job.deadline = time.monotonic() + JOB_WALL_CLOCK_S
        try:
            worker.conn.send((job.id, job.fn, job.args, job.with_channel))
        except (OSError, EOFError):
            message = None                       # the worker had died: the job never reached it
        except Exception as exc:                 # noqa: BLE001 - the job does not pickle: the caller's error
            self._done(job, exc=exc)
            return
        else:
            message = self._follow(job, worker)
        if message is None:
            self._lose_worker()
            if worker.kill_reason == "stop":
                self._done(job, exc=WorkerLost(STOPPING))
            elif worker.kill_reason == "time":
                self._done(job, exc=JobTimedOut(
                    f"The computation ran for more than {JOB_WALL_CLOCK_S / 60:g} minutes, far longer than a "
                    "photo map or fit needs, so the server stopped it. Try a smaller photo or region, or a "
                    "narrower thickness window."))
            elif not job.started and job.tries < 2:
                self.job = None
                job.requeue()                    # it never ran: another worker may take it
                self.pool.jobs.put(job)
            else:
                self.pool.count("jobs_lost")
                self._done(job, exc=WorkerLost(LOST))
            return
        worker.jobs += 1
        kind = message[0]
        if kind == "done":
            self._done(job, result=message[1])
        elif kind == "raised":
            self._done(job, exc=message[1])
        else:                                    # "memory": the worker exits by itself
            self._done(job, exc=JobOutOfMemory(
                f"The computation needed more memory than this server gives one computation "
                f"({self.pool.memory_bytes / 1e9:.1f} GB), so it was stopped. Try a smaller photo or "
                "region, or a narrower thickness window."))
        if kind == "memory" or worker.jobs >= TASKS_PER_WORKER:
            self._retire()

    def _follow(self, job: _Job, worker: _Worker):
        """Read the job's messages until its reply; None when the worker died (or was killed) first."""
        try:
            while True:
                left = job.deadline - time.monotonic()
                if self.pool.killing:
                    worker.kill("stop")
                elif left <= 0:
                    worker.kill("time")
                if not worker.conn.poll(min(1.0, max(0.05, left))):
                    continue
                message = worker.conn.recv()
                if message[0] == "ack":
                    job.started = True
                elif message[0] == "progress":
                    job.progress = (next(job.sequence), message[1], message[2])
                else:
                    return message
        except (EOFError, OSError):
            return None
        except Exception as exc:                 # noqa: BLE001 - the reply does not unpickle here
            return ("raised", RuntimeError(f"The computation's result could not be read back: {exc}"))

    def _done(self, job: _Job, result=None, exc=None) -> None:
        self.job = None
        job.finish(result, exc)

    def _lose_worker(self) -> None:
        """The process died (or was killed): forget it; the loop starts a replacement."""
        worker, self.worker = self.worker, None
        if worker is not None:
            worker.wait_closed(STOP_GRACE_S)
            worker.release()
            self.replacing = worker.kill_reason != "stop"

    def _retire(self) -> None:
        """Stop this slot's process (asked first, killed after :data:`STOP_GRACE_S`); not a restart."""
        worker, self.worker = self.worker, None
        if worker is None:
            return
        try:
            worker.conn.send(None)
        except (OSError, EOFError, ValueError):
            pass
        if not worker.wait_closed(STOP_GRACE_S):
            worker.kill("stop")
            worker.wait_closed(STOP_GRACE_S)
        worker.release()


class WorkerPool:
    """``size`` slots sharing one job queue (see the module docstring)."""

    def __init__(self, size: int, memory_bytes: int):
        self.size, self.memory_bytes = size, memory_bytes
        self.jobs: queue.Queue = queue.Queue()
        self.stopping = threading.Event()        # no new jobs: closed, resized away or stopped
        self.killing = False                     # stopped: running jobs end now
        self.counts = {"restarts": 0, "jobs_lost": 0}
        self._count_lock = threading.Lock()
        self.slots = [_Slot(self, i) for i in range(size)]
        for slot in self.slots:
            slot.thread.start()

    def count(self, name: str) -> None:
        with self._count_lock:
            self.counts[name] += 1

    def submit(self, job: _Job) -> None:
        self.jobs.put(job)

    def cannot_run(self) -> bool:
        """True when no slot has a process and every one keeps failing to start one."""
        return all(s.worker is None and s.failed_starts >= DEGRADED_AFTER_FAILED_STARTS for s in self.slots)

    def status(self) -> dict:
        slots = self.slots
        alive = sum(s.worker is not None for s in slots)
        busy = sum(s.job is not None for s in slots)
        failing = [s for s in slots if s.worker is None and s.failed_starts >= DEGRADED_AFTER_FAILED_STARTS]
        if failing:
            state = "degraded"
            detail = (f"{len(failing)} of {self.size} worker processes cannot start "
                      f"({failing[0].last_failure}); retrying every {RESTART_PAUSE_MAX_S:g} s or sooner. "
                      + ("Photo maps and fits use the others." if alive else "Photo maps and fits are refused."))
        elif alive < self.size:
            state = "starting"
            detail = f"{self.size - alive} of {self.size} worker processes starting."
        else:
            state = "ok"
            detail = f"{self.size} worker processes ready, {busy} busy."
        return {"state": state, "alive": alive, "busy": busy, "expected": self.size, **self.counts,
                "detail": detail}

    def close(self) -> None:
        """Stop taking jobs (queued ones fail with a sentence); each slot stops its process after its job."""
        self.stopping.set()
        while True:
            try:
                job = self.jobs.get_nowait()
            except queue.Empty:
                break
            if job is not None and job.abandon():
                job.finish(exc=WorkerLost(STOPPING))
        for _ in self.slots:
            self.jobs.put(None)                  # wakes the idle slots

    def stop(self) -> None:
        """Close, end the running jobs now, and wait (bounded) until every slot's process has gone."""
        self.killing = True                      # each slot's thread kills its busy process within a second
        self.close()
        for slot in self.slots:
            if slot.starting is not None:
                slot.starting.kill("stop")
        deadline = time.monotonic() + 3 * STOP_GRACE_S
        for slot in self.slots:
            slot.thread.join(max(0.0, deadline - time.monotonic()))


def process_pool(workers: int) -> WorkerPool:
    """The pool of ``workers`` slots, made when missing or resized (a resized pool's jobs finish first)."""
    global _pool
    with _guard:
        if _pool is None or _pool.size != workers:
            old, _pool = _pool, WorkerPool(workers, worker_memory_bytes())
            if old is not None:
                old.close()
        return _pool


def warm(workers: int) -> None:
    """Start the worker processes now (each imports the numerics) so the first job does not wait.

    Returns at once: the slots' threads start the processes; :func:`status` says when they are ready.
    """
    process_pool(workers)


def shutdown() -> None:
    """Stop every worker process (running jobs fail with :class:`WorkerLost`); the server calls this when it
    stops. Returns within a few seconds; multiprocessing's forkserver stays until the server exits."""
    global _pool
    with _guard:
        pool, _pool = _pool, None
    if pool is not None:
        pool.stop()


def status() -> dict:
    """How the worker processes are, for ``/health``: cheap, never blocks (it reads a few attributes).

    ``state``
        ``"ok"``: every slot has a process ready or busy (also before any pool exists: one starts with the
        first job). ``"starting"``: some processes are starting (after :func:`warm`, after a death, and for
        about a second each time one is replaced after :data:`TASKS_PER_WORKER` jobs). ``"degraded"``: some
        slot failed :data:`DEGRADED_AFTER_FAILED_STARTS` starts in a row and is retrying; when no slot has a
        process, photo maps and fits are refused with a sentence meanwhile.
    ``alive``
        worker processes ready or running a job now.
    ``busy``
        of those, running a job now.
    ``expected``
        slots in the pool (``max_jobs_server``); 0 before the pool is made or after :func:`shutdown`.
    ``restarts``
        processes started to replace one that died, was killed or could not start (the planned replacement
        every :data:`TASKS_PER_WORKER` jobs does not count).
    ``jobs_lost``
        jobs whose worker died under them (their users were told); cancelled, out-of-memory and over-time
        jobs do not count.
    ``detail``
        one sentence for a person reading /health.
    """
    pool = _pool
    if pool is None:
        return {"state": "ok", "alive": 0, "busy": 0, "expected": 0, "restarts": 0, "jobs_lost": 0,
                "detail": "No worker processes yet: they start with the first photo map or fit."}
    return pool.status()


# ---------------------------------------------------------------------- channels
class Channel:
    """The page's handle on one job's progress and cancel flag, passed to :func:`run_in_worker`.

    Inside the worker the job gets its own channel (progress on the pipe, cancel from shared memory); this
    object follows it from the server's side. Used directly in one process, ``report`` records progress and
    raises ``JobCancelled`` once :meth:`cancel` was called.
    """

    def __init__(self):
        self._job: _Job | None = None
        self._cancelled = False
        self._local = None                       # (sequence, fraction, text) reported in this process
        self._drained = 0                        # sequence number of the newest progress handed out

    @classmethod
    def make(cls) -> Channel:
        return cls()

    def _bind(self, job: _Job) -> None:
        self._job = job
        if self._cancelled:
            job.cancel()

    def report(self, fraction: float, text: str) -> None:
        if self._cancelled:
            raise JobCancelled()
        self._local = ((self._local[0] if self._local else 0) + 1, float(fraction), str(text))

    def cancel(self) -> None:
        self._cancelled = True
        if self._job is not None:
            self._job.cancel()

    def drain(self):
        """The newest (fraction, text) reported since the last call, or None."""
        latest = self._job.progress if self._job is not None else self._local
        if latest is None or latest[0] <= self._drained:
            return None
        self._drained = latest[0]
        return latest[1:]


class LocalChannel:
    """The same interface within one process (tests, and pages not run by a server)."""

    def __init__(self, on_progress=None, cancelled=None):
        self.on_progress, self.cancelled = on_progress, cancelled

    def report(self, fraction: float, text: str) -> None:
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
    """A new :class:`Channel` (nothing to start: progress and cancel travel with the job's own worker)."""
    return Channel.make()


async def run_in_worker(workers: int, fn, *args, channel: Channel | None = None, on_progress=None,
                        cancelled=None):
    """Run ``fn(*args)`` (or ``fn(*args, channel)``) in the pool of ``workers`` slots and await it.

    While it runs, every :data:`POLL_S` the newest progress goes to ``on_progress(fraction, text)`` and,
    once ``cancelled()`` is true, the worker is told to stop at its next stage (``JobCancelled`` is
    raised here). Raises :class:`WorkerLost` (with a sentence for the user) when the worker process died,
    ran past :data:`JOB_WALL_CLOCK_S` (:class:`JobTimedOut`) or out of memory (:class:`JobOutOfMemory`),
    or when no worker can be started. Nothing here blocks the event loop: the slot's thread does the
    pickling, the pipe and the waiting.
    """
    pool = process_pool(workers)
    job = _Job(fn, args, with_channel=channel is not None)
    if channel is not None:
        channel._bind(job)
    if cancelled is not None and cancelled():
        job.cancel()                              # superseded already: it will not run
    future = asyncio.wrap_future(job.future)
    pool.submit(job)
    try:
        while not future.done():
            await asyncio.wait([future], timeout=POLL_S)
            if future.done():
                break
            if not job.cancel_requested and cancelled is not None and cancelled():
                job.cancel()
            latest = channel.drain() if channel is not None else None
            if latest is not None and on_progress is not None:
                on_progress(*latest)
            worker, deadline = job.worker, job.deadline
            if worker is not None and worker.kill_reason is None and deadline is not None \
                    and time.monotonic() > deadline + 1.0:
                worker.kill("time")              # its slot's thread is stuck on a stalled pipe
            if pool.cannot_run() and job.abandon():
                job.finish(exc=WorkerLost(CANNOT_START))
    except asyncio.CancelledError:
        job.cancel()
        raise
    return future.result()
