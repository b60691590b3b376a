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

from tests.support.loadclient import (THINK_S, Crowd, ExplorerUser, fetch_json, log_problems, rss_kb, serve,
                                      synthetic_wedge_png)

ROOT = Path(__file__).resolve().parents[1]
#: Longest the scenario may take before the test gives up (s); about a minute on an idle 2-core machine.
SCENARIO_TIMEOUT_S = 300

#: Simulated people working at once in the load phase (each its own page session), plus the photo-map user.
USERS = 20
#: Moves of the lone user (the single-user median) and of each user under load.
BASELINE_MOVES, LOAD_MOVES = 20, 10
#: Think time of the lone user (s): shorter than under load; the server is idle between moves either way.
BASELINE_THINK_S = (0.1, 0.2)
#: Median latency under load may be at most this multiple of the single-user median (the lab's goal).
LOAD_MEDIAN_RATIO_MAX = 2.0
#: The goal above is demanded only when the server could have met it: while the event loop, which
#: applies every change of every session on one thread, is offered less than this fraction of one
#: core (measured alone, at the rate the users would move with x2 latency), and while the machine
#: had cores to spare (all cores busy less than MACHINE_BUSY_MAX of the load phase). Otherwise the
#: test reports XFAIL with the numbers: queueing, not a bug of the moment, sets the latency.
EVENT_LOOP_HEADROOM = 0.7
MACHINE_BUSY_MAX = 0.95
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


def test_latency_under_load_within_twice_single_user(run):
    base, load = run["baseline"], run["load"]
    ratio = load.median_ms() / base.median_ms()
    # Every move costs the server's event loop (one thread) the time measured alone; under load the
    # users offer that work at the rate they move. Near one core of it, changes queue and the
    # latency grows with the queue, whatever the number of cores.
    think = sum(THINK_S) / 2
    rate_per_s = USERS / (think + LOAD_MEDIAN_RATIO_MAX * base.median_ms() / 1000)
    demand = rate_per_s * base.loop_ms_per_move() / 1000
    numbers = (f"median alone {base.median_ms():.0f} ms, under load {load.median_ms():.0f} ms "
               f"(x{ratio:.1f}, p95 {load.p95_ms():.0f} ms); event loop {base.loop_ms_per_move():.0f} ms "
               f"per move alone, {load.loop_ms_per_move():.0f} ms under load, busy "
               f"{100 * load.loop_cpu_s / load.wall_s:.0f} % of the load phase, the server's other threads "
               f"{100 * load.worker_cpu_s / load.wall_s:.0f} %; offered event-loop work at "
               f"x{LOAD_MEDIAN_RATIO_MAX:g} latency: {demand:.2f} of one core")
    numbers += f"; machine {100 * load.machine_busy:.0f} % busy during the load phase"
    if ratio > LOAD_MEDIAN_RATIO_MAX and demand >= EVENT_LOOP_HEADROOM:
        pytest.xfail("the server's one event loop has no headroom for this many users: " + numbers)
    if ratio > LOAD_MEDIAN_RATIO_MAX and load.machine_busy >= MACHINE_BUSY_MAX:
        pytest.xfail("the machine had no CPU to spare during the load phase: " + numbers)
    assert ratio <= LOAD_MEDIAN_RATIO_MAX, numbers


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
