"""The worker processes behind photo maps and fits (views/workers.py): a dead worker costs only its own job.

Jobs here are small functions of this module (the workers import it by name): each reports its
process id as its first progress text, then keeps reporting until a file appears, so a test decides
when it ends without counting on how fast anything runs. Every wait is bounded (``BOUND_S``); no test
asserts a duration beyond such a protection bound.
"""

from __future__ import annotations

import asyncio
import json
import multiprocessing
import os
import signal
import time
import urllib.request
from pathlib import Path

import numpy as np
import pytest

from physics.imageio import load_image
from tests.support.loadclient import _descendants
from views import workers
from views.limits import JobCancelled

#: Times the server: in a parallel run, each test runs while no other test does (tests/conftest.py).
pytestmark = pytest.mark.exclusive

#: Slots of the pool under test: the default ``max_jobs_server``.
POOL = 2
#: Longest any one scenario may take before the test gives up (s): generous for a busy 2-core machine.
BOUND_S = 120
#: Longest a job of this module keeps waiting for its file before it gives up (s).
JOB_WAIT_S = 90


# ---------------------------------------------------------------------- jobs (run in the workers)
def _until_file(label, path, channel):
    """Report ``pid <n>``, then a stage every 20 ms until ``path`` exists; return label, pid and a payload."""
    pid = os.getpid()
    channel.report(0.0, f"pid {pid}")
    end = time.monotonic() + JOB_WAIT_S
    while not os.path.exists(path) and time.monotonic() < end:
        time.sleep(0.02)
        channel.report(0.5, f"pid {pid}")
    return label, pid, _payload(label)


def _payload(label):
    return np.arange(200_000, dtype=np.float64) * len(label)


def _sleep_silently(seconds, channel=None):
    """A job that never reports: only the wall-clock cap can stop it."""
    time.sleep(seconds)
    return "woke"


def _allocate(n_bytes, channel=None):
    """Ask for ``n_bytes`` of address space (np.empty touches no page, so without a limit this costs nothing)."""
    return np.empty(int(n_bytes), dtype=np.uint8).size


def _address_space_limit(channel=None):
    """This process's soft RLIMIT_AS (bytes), or None for no limit."""
    import resource
    soft, _ = resource.getrlimit(resource.RLIMIT_AS)
    return None if soft == resource.RLIM_INFINITY else soft


def _niceness(channel=None):
    return os.getpriority(os.PRIO_PROCESS, 0)


def _broken_initializer(memory_bytes):
    raise RuntimeError("this worker cannot start")


# ---------------------------------------------------------------------- helpers (this process)
@pytest.fixture
def pool():
    workers.warm(POOL)
    try:
        yield
    finally:
        workers.shutdown()


async def _run(fn, *args, on_progress=None, cancelled=None):
    channel = await workers.new_channel()
    return await workers.run_in_worker(POOL, fn, *args, channel=channel, on_progress=on_progress,
                                       cancelled=cancelled)


def _pid_into(pids, key):
    def seen(fraction, text):
        if text.startswith("pid "):
            pids.setdefault(key, int(text.split()[1]))
    return seen


async def _until(predicate, what, bound_s=BOUND_S):
    deadline = time.monotonic() + bound_s
    while not predicate():
        if time.monotonic() > deadline:
            raise AssertionError(f"gave up waiting for {what}")
        await asyncio.sleep(0.05)


def _wait_for(predicate, what, bound_s=BOUND_S):
    asyncio.run(_until(predicate, what, bound_s))


def _wedge_args():
    from tests.test_views_inverse import _wedge_png
    from views.explorer import FilmExplorer

    data, _ = _wedge_png()
    return dict(image=load_image(data), stack=FilmExplorer().state.stack, layer=0, thickness_nm=(0.0, 1000.0))


def _state(pid):
    """The process state letter of ``pid`` from /proc ("R", "S", "Z", ...), or None when it has gone."""
    try:
        with open(f"/proc/{pid}/stat") as f:
            return f.read().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return None


def _gone(pid):
    return _state(pid) in (None, "Z", "X")


def _cmdline(pid):
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as f:
            return f.read().replace(b"\0", b" ").decode("utf-8", "replace")
    except OSError:
        return ""


def _ppid(pid):
    try:
        with open(f"/proc/{pid}/stat") as f:
            return int(f.read().rsplit(")", 1)[1].split()[1])
    except (OSError, IndexError, ValueError):
        return None


def _worker_pids_under(pid):
    """Worker processes below ``pid``: the children of its forkserver process(es)."""
    below = _descendants(pid)
    servers = {p for p in below if "multiprocessing.forkserver" in _cmdline(p) and _ppid(p) == pid}
    return sorted(p for p in below if _ppid(p) in servers and not _gone(p))


# ---------------------------------------------------------------------- a dead worker
def test_a_killed_worker_costs_only_its_own_job_and_the_pool_recovers(pool, tmp_path):
    """kill -9 one of two workers while both run a job: that job raises WorkerLost, the other job's result
    arrives intact from its own process, and a photo map afterwards runs without any restart."""
    go = str(tmp_path / "go")

    async def scenario():
        pids = {}
        killed = asyncio.ensure_future(_run(_until_file, "killed", go, on_progress=_pid_into(pids, "killed")))
        other = asyncio.ensure_future(_run(_until_file, "other", go, on_progress=_pid_into(pids, "other")))
        await _until(lambda: len(pids) == 2, "both jobs to report")
        assert pids["killed"] != pids["other"]
        os.kill(pids["killed"], signal.SIGKILL)
        with pytest.raises(workers.WorkerLost, match="stopped unexpectedly"):
            await killed
        assert not other.done()                 # still running: it waits for the file
        Path(go).touch()
        label, pid, payload = await other
        assert (label, pid) == ("other", pids["other"]) and np.array_equal(payload, _payload("other"))
        result, error = await _run(workers.photo_map, _wedge_args())
        assert error is None and result.stats["pixels"] > 0
        return pids

    pids = asyncio.run(asyncio.wait_for(scenario(), BOUND_S))
    _wait_for(lambda: workers.status()["state"] == "ok", "the pool to be whole again")
    s = workers.status()
    assert s["alive"] == s["expected"] == POOL and s["restarts"] >= 1 and s["jobs_lost"] >= 1
    assert _gone(pids["killed"])


@pytest.mark.filterwarnings("ignore:resource_tracker")   # multiprocessing says it starts its tracker again
def test_killing_every_helper_process_leaves_later_jobs_working(pool, tmp_path):
    """Every process of the machinery that is not a worker (multiprocessing's forkserver and resource
    tracker; no manager) is killed while two jobs run: both finish with their results, later jobs run,
    and a worker killed afterwards is replaced (the forkserver is started again)."""
    go = str(tmp_path / "go")

    async def scenario():
        pids = {}
        jobs = [asyncio.ensure_future(_run(_until_file, k, go, on_progress=_pid_into(pids, k))) for k in ("a", "b")]
        await _until(lambda: len(pids) == 2, "both jobs to report")
        helpers = [p for p in _descendants(os.getpid()) if "multiprocessing" in _cmdline(p)
                   and p not in pids.values() and not _gone(p)]
        assert helpers, "expected multiprocessing's forkserver below this process"
        for p in helpers:
            os.kill(p, signal.SIGKILL)
        Path(go).touch()
        for key, job in zip("ab", jobs):
            label, pid, payload = await job
            assert (label, pid) == (key, pids[key]) and np.array_equal(payload, _payload(key))
        result, error = await _run(workers.photo_map, _wedge_args())
        assert error is None and result.stats["pixels"] > 0
        os.kill(pids["a"], signal.SIGKILL)        # a new process must come from a new forkserver
        await _until(lambda: workers.status()["restarts"] >= 1 and workers.status()["state"] == "ok",
                     "a replacement worker")
        again = {}
        Path(go).touch()
        out = await asyncio.gather(*(_run(_until_file, k, go, on_progress=_pid_into(again, k)) for k in ("c", "d")))
        assert [o[0] for o in out] == ["c", "d"] and pids["a"] not in {o[1] for o in out}

    asyncio.run(asyncio.wait_for(scenario(), BOUND_S))


# ---------------------------------------------------------------------- status
def test_status_is_degraded_while_workers_cannot_start_and_ok_again_after(monkeypatch):
    """Workers whose initializer fails: status() says degraded (with the reason), a job is refused with a
    sentence instead of waiting forever; once they can start, status() comes back to ok and jobs run."""
    workers.shutdown()
    monkeypatch.setattr(workers, "_initializer", _broken_initializer)
    try:
        workers.warm(POOL)
        _wait_for(lambda: workers.status()["state"] == "degraded", "status() to say degraded")
        s = workers.status()
        assert s["alive"] == 0 and s["expected"] == POOL and "cannot start" in s["detail"], s
        with pytest.raises(workers.WorkerLost, match="cannot start"):
            asyncio.run(asyncio.wait_for(_run(_sleep_silently, 0), BOUND_S))
        monkeypatch.setattr(workers, "_initializer", workers._init_worker)
        _wait_for(lambda: workers.status()["state"] == "ok", "status() to say ok again")
        assert asyncio.run(asyncio.wait_for(_run(_sleep_silently, 0), BOUND_S)) == "woke"
    finally:
        workers.shutdown()


def test_status_fields_are_plain_and_cheap(pool):
    _wait_for(lambda: workers.status()["state"] == "ok", "the pool to start")
    s = workers.status()
    assert set(s) >= {"state", "alive", "busy", "expected", "restarts", "jobs_lost", "detail"}
    assert s["alive"] == s["expected"] == POOL and s["busy"] == 0
    json.dumps(s)
    assert all(workers.status()["state"] == "ok" for _ in range(1000))   # no lock, pipe or process touched


# ---------------------------------------------------------------------- cancel, time and memory
def test_a_cancelled_job_stops_at_its_next_stage_and_its_slot_runs_the_next(pool, tmp_path):
    never = str(tmp_path / "never")

    async def scenario():
        pids = {}
        with pytest.raises(JobCancelled):
            await _run(_until_file, "c", never, on_progress=_pid_into(pids, "c"), cancelled=lambda: bool(pids))
        out = await asyncio.gather(*(_run(_sleep_silently, 0) for _ in range(POOL)))
        assert out == ["woke"] * POOL
        return pids

    pids = asyncio.run(asyncio.wait_for(scenario(), BOUND_S))
    assert not _gone(pids["c"])                 # stopped by its own code: the process lives on
    assert workers.status()["restarts"] == 0


def test_a_runaway_job_is_killed_at_the_wall_clock_cap_and_its_user_told(pool, monkeypatch):
    monkeypatch.setattr(workers, "JOB_WALL_CLOCK_S", 1.0)

    async def scenario():
        with pytest.raises(workers.WorkerLost, match="stopped it") as lost:
            await _run(_sleep_silently, JOB_WAIT_S)
        assert isinstance(lost.value, workers.JobTimedOut)
        monkeypatch.setattr(workers, "JOB_WALL_CLOCK_S", 600.0)
        assert await _run(_sleep_silently, 0) == "woke"

    asyncio.run(asyncio.wait_for(scenario(), BOUND_S))


def test_workers_run_at_lower_priority_with_an_address_space_limit_and_a_job_beyond_it_fails_alone(pool):
    limit = workers.worker_memory_bytes()
    # the limit leaves room for the largest photo the server takes, and is below the machine's memory
    from views.limits import Limits
    assert limit >= Limits.from_env().max_photo_megapixels * 1e6 * 154 or \
        limit == os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")

    async def scenario():
        assert await _run(_address_space_limit) == limit
        assert await _run(_niceness) == min(19, os.getpriority(os.PRIO_PROCESS, 0) + workers.WORKER_NICENESS)
        with pytest.raises(workers.WorkerLost, match="more memory") as lost:
            await _run(_allocate, limit + 2**30)
        assert isinstance(lost.value, workers.JobOutOfMemory)
        assert await _run(_allocate, 2**20) == 2**20
        result, error = await _run(workers.photo_map, _wedge_args())
        assert error is None and result.stats["pixels"] > 0

    asyncio.run(asyncio.wait_for(scenario(), BOUND_S))


# ---------------------------------------------------------------------- shutdown
def test_shutdown_is_prompt_fails_running_jobs_and_leaves_no_process(tmp_path):
    never = str(tmp_path / "never")
    workers.warm(POOL)

    async def scenario():
        pids = {}
        jobs = [asyncio.ensure_future(_run(_until_file, k, never, on_progress=_pid_into(pids, k))) for k in "ab"]
        await _until(lambda: len(pids) == 2, "both jobs to report")
        loop = asyncio.get_running_loop()
        await asyncio.wait_for(loop.run_in_executor(None, workers.shutdown), 20)   # a protection bound
        for job in jobs:
            with pytest.raises(workers.WorkerLost):
                await job
        return pids

    pids = asyncio.run(asyncio.wait_for(scenario(), BOUND_S))
    assert multiprocessing.active_children() == []
    _wait_for(lambda: all(_gone(p) for p in pids.values()), "the workers to exit", bound_s=20)
    assert _worker_pids_under(os.getpid()) == []
    assert workers.status()["expected"] == 0


# ---------------------------------------------------------------------- the real server
def test_served_lab_maps_again_after_its_workers_are_killed(tmp_path):
    """serve.py with a photo on its colour → thickness tab: a map; then every multiprocessing process below
    the server (found in /proc: the workers, the forkserver, the resource tracker) is killed with kill -9
    while the next map runs, and that user reads a sentence; /health answers, the workers come back by
    themselves, and the next map works."""
    from tests.support.loadclient import HeavyResult, PhotoMapUser, synthetic_wedge_png
    from tests.support.server import served_lab

    png = synthetic_wedge_png(3000, 2000)                  # 6 MP: a map takes seconds

    def health():
        with urllib.request.urlopen(base + "/health", timeout=10) as resp:
            return json.loads(resp.read())

    with served_lab(tmp_path, "--max-jobs-server", str(POOL)) as (base, proc, log_path):
        _wait_for(lambda: len(_worker_pids_under(proc.pid)) == POOL, "the server's workers to start")
        first = _worker_pids_under(proc.pid)

        async def scenario():
            user = PhotoMapUser(base, png)
            assert await user.open(), user.open_error
            s = user.session
            try:
                await user.upload(HeavyResult())
                await user.make_map(HeavyResult())                  # the map works
                await s.send_event("button_click", user.button)     # the next one is killed midway
                await s.wait_until(lambda: any(w in t for t in user._texts() for w in ("matching", "resolving")),
                                   BOUND_S)
                machinery = [p for p in _descendants(proc.pid) if "multiprocessing" in _cmdline(p) and not _gone(p)]
                assert set(_worker_pids_under(proc.pid)) < set(machinery)
                for pid in machinery:                               # the workers, the forkserver and the rest
                    os.kill(pid, signal.SIGKILL)
                await s.wait_until(lambda: any("stopped unexpectedly" in t for t in user._texts()), BOUND_S)
                await s.wait_until(lambda: s.attr(user.button, "disabled") is False, BOUND_S)
                assert health()["status"] == "ok"
                await _until(lambda: len(_worker_pids_under(proc.pid)) == POOL, "the workers to come back")
                r = HeavyResult()
                await user.make_map(r)                              # and the map works again
                assert "of the region matched" in r.message
            finally:
                await user.close()

        asyncio.run(asyncio.wait_for(scenario(), BOUND_S * 2))
        assert set(_worker_pids_under(proc.pid)).isdisjoint(first)
        assert health()["status"] == "ok" and health()["heavy_jobs"] == 0
        assert proc.poll() is None
