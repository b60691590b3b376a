"""The served page under load: twenty people dragging sliders while one makes a photo thickness map.

One ``serve.py`` on a free loopback port with a temporary library folder. Users are simulated
without a browser (``tests/support/loadclient.py``: Bokeh's websocket protocol from one asyncio
loop); each move is timed from sending the new slider value until the server pushes the swatch
showing it. The scenario runs once for the module; each test checks one property of it:

1. one session alone: ``BASELINE_MOVES`` moves (the single-user median);
2. ``USERS`` more sessions opened, plus one whose user opens the colour → thickness tab and drops
   an invented 1.5 MP wedge photo (opening a tab builds it on the server, once per page: timed
   and reported, not mixed into slider latency); then ``USERS`` users × ``LOAD_MOVES`` moves at
   once while that user makes thickness maps, one two seconds after each result, until the
   others are done;
3. afterwards: /health, a new session, the server log, the server's memory.

Timing and memory bounds are named below with their reasons. The whole module takes about a
minute on an idle 2-core machine, most of it the server building 22 page documents.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import pickle
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.support.loadclient import (Crowd, ExplorerUser, fetch_json, log_problems, rss_kb, serve,
                                      synthetic_wedge_png)

#: Times the server: in a parallel run, each test runs while no other test does (tests/conftest.py).
pytestmark = pytest.mark.exclusive

ROOT = Path(__file__).resolve().parents[1]
#: Longest the scenario may take before the test gives up (s); about a minute on an idle 2-core machine.
SCENARIO_TIMEOUT_S = 300

#: Simulated people working at once in the load phase (each its own page session), plus the photo-map user.
USERS = 20
#: Moves of the lone user (the single-user median) and of each user under load.
BASELINE_MOVES, LOAD_MOVES = 20, 10
#: Think time of the lone user (s): shorter than under load; the server is idle between moves either way.
BASELINE_THINK_S = (0.1, 0.2)
#: Longest any one move may wait for its swatch under load (ms): a stalled session, not a slow one.
#: Measured here: max 400-450 ms with 20 users and a photo map on a 2-core machine; ten times that
#: leaves room for a busy CI machine while a loop held up for seconds still fails.
MOVE_WAIT_MAX_MS = 5000
#: Memory one more open page session may keep in the server (MB): measured 17-20 MB per session here
#: (a document of ~1000 Bokeh models for the four tabs and their Panel objects), plus 50 % margin.
SESSION_MB = 30
#: Memory the load phase may add (MB): the photo-map user's jobs and 200 moves. One map of the
#: 1.5 MP photo peaks at ~320 MB more (~215 bytes per pixel) and glibc keeps most of that peak
#: mapped afterwards (its dynamic mmap threshold): measured 300-420 MB kept; moves add ~2 MB.
LOAD_PHASE_MB = 550
#: RSS growth allowed after the load over the RSS with one warm session: every session opened
#: (they are kept until the idle timeout) plus the load phase.
RSS_GROWTH_MAX_MB = (USERS + 1) * SESSION_MB + LOAD_PHASE_MB
#: Sessions stay in the server this long after their websocket closes (s); kept past the end of the test.
IDLE_TIMEOUT_S = 600


async def _scenario(server, png):
    out = {}
    lone = Crowd(server.base_url, server.pid, 1, seed=11)
    out["lone_open_errors"] = await lone.open()
    out["baseline"] = await lone.phase(BASELINE_MOVES, think_s=BASELINE_THINK_S)
    out["rss_warm_kb"] = server.rss_kb()

    crowd = Crowd(server.base_url, server.pid, USERS, png=png, seed=23)
    t0 = time.perf_counter()
    out["open_errors"] = await crowd.open()
    out["open_s"] = time.perf_counter() - t0
    out["tab_open_s"] = crowd.heavy.tab_open_s
    out["load"] = await crowd.phase(LOAD_MOVES, heavy=True)
    await crowd.close()
    await lone.close()
    await asyncio.sleep(0.5)
    out["rss_after_kb"] = server.rss_kb()
    return out


class _ServerView:
    """What the scenario needs of the server when it runs in another process than the one that started it."""

    def __init__(self, base_url: str, pid: int):
        self.base_url, self.pid = base_url, pid

    def rss_kb(self):
        return rss_kb(self.pid)


def _child(base_url: str, pid: int, png_path: str, out_path: str) -> None:
    """The scenario in a fresh interpreter (run by the fixture below), its results pickled to *out_path*."""
    out = asyncio.run(_scenario(_ServerView(base_url, pid), Path(png_path).read_bytes()))
    Path(out_path).write_bytes(pickle.dumps(out))


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """The scenario, its simulated users driven from a fresh Python process: the test process, after a
    thousand other tests, has a large heap whose collections would add pauses to the measured latency."""
    workdir = tmp_path_factory.mktemp("load")
    with concurrent.futures.ThreadPoolExecutor(1) as pool:
        photo = pool.submit(synthetic_wedge_png)              # made while the server starts
        with serve(workdir, "--idle-timeout-s", str(IDLE_TIMEOUT_S)) as server:
            png_path, out_path = workdir / "wedge.png", workdir / "scenario.pickle"
            png_path.write_bytes(photo.result())
            t0 = time.perf_counter()
            subprocess.run([sys.executable, "-c", f"from tests.test_load import _child; _child("
                            f"{server.base_url!r}, {server.pid}, {str(png_path)!r}, {str(out_path)!r})"],
                           cwd=ROOT, check=True, timeout=SCENARIO_TIMEOUT_S)
            out = pickle.loads(out_path.read_bytes())
            out["scenario_s"] = time.perf_counter() - t0
            out["server"] = server
            print(f"\nload test: {USERS} sessions opened in {out['open_s']:.1f} s; the photo tab built in "
                  f"{out['tab_open_s']:.2f} s; "
                  f"alone: {out['baseline'].summary()}\nunder load: {out['load'].summary()}")
            yield out


def test_one_session_gets_every_update(run):
    base = run["baseline"]
    assert run["lone_open_errors"] == [] and base.errors == [], run["lone_open_errors"] + base.errors
    assert base.moves_done == BASELINE_MOVES


def test_every_session_gets_every_update_under_load(run):
    load = run["load"]
    assert run["open_errors"] == [], run["open_errors"]
    assert load.errors == [], load.errors[:10]
    assert load.moves_done == load.moves_planned == USERS * LOAD_MOVES
    assert all(u.all_updates for u in load.users)
    assert load.heavy is not None and load.heavy.ok and load.heavy.maps_s, load.heavy
    assert "of the region matched" in load.heavy.message


def test_no_move_waits_seconds_under_load(run):
    """Liveness, not speed: under load every move's swatch arrives, none after seconds. How fast it
    arrives against one user alone (the lab's x2 goal) is measured by ``benchmarks/bench_serve.py``,
    which compares both in one run; a timed assertion here would pass or fail with the machine's other work."""
    base, load = run["baseline"], run["load"]
    worst = max(load.latencies_ms, default=float("nan"))
    print(f"\nmedian alone {base.median_ms():.0f} ms, under load {load.median_ms():.0f} ms "
          f"(x{load.median_ms() / base.median_ms():.1f}, p95 {load.p95_ms():.0f} ms, max {worst:.0f} ms)")
    assert load.latencies_ms and worst <= MOVE_WAIT_MAX_MS, f"a move waited {worst:.0f} ms for its swatch"


def test_memory_growth_is_bounded(run):
    warm, load = run["rss_warm_kb"] / 1024, run["load"]
    opened, after = load.rss_before_kb / 1024, run["rss_after_kb"] / 1024
    numbers = (f"RSS with one warm session {warm:.0f} MB, after opening {USERS + 1} more {opened:.0f} MB, "
               f"peak under load {load.rss_peak_kb / 1024:.0f} MB, after the load {after:.0f} MB")
    assert (opened - warm) / (USERS + 1) < SESSION_MB, numbers
    assert after - opened < LOAD_PHASE_MB, numbers
    assert after - warm < RSS_GROWTH_MAX_MB, numbers


def test_health_and_a_new_session_after_the_load(run):
    server = run["server"]
    status, body = fetch_json(server.base_url + "/health")
    assert status == 200 and body["status"] == "ok"

    async def newcomer():
        user = ExplorerUser(server.base_url, "newcomer", seed=99)
        try:
            assert await user.open(), user.open_error
            return await user.moves(3)
        finally:
            await user.close()
    result = asyncio.run(newcomer())
    assert result.all_updates, result.errors


def test_server_log_has_no_error(run):
    problems = log_problems(run["server"].log_text())
    assert problems == [], "\n".join(problems[:20])
