"""Slider-to-swatch latency of the served page with 1, 5, 10 and 20 people at once.

Run:  python benchmarks/bench_serve.py [--users 1,5,10,20] [--moves 10] [--no-photo]

Starts ``serve.py`` on a free loopback port (temporary library folder) and drives simulated users
without a browser (``tests/support/loadclient.py``: Bokeh's websocket protocol, one asyncio loop).
Each user opens its own page session and drags the film explorer's thickness slider (every fourth
move the viewing angle), thinking 0.2-0.5 s between moves; a move is timed from sending the value
until the server pushes the swatch showing it. Sessions are opened before each row starts, so rows
measure moving, not page creation. A last row adds one more user who uploads an invented 1.5 MP
wedge photo and makes a thickness map every two seconds (the photo is made by
``synthetic_wedge_png``: the page's own colours of a 0-600 nm oxide bevel, not a real photo).

The reference is the 1-user row of the same run: each row prints its median over that one.
Beside it, where the time goes: the server's event-loop CPU per move and how busy that one
thread was, the CPU of its other threads (the physics pools) and of this client.
A pair of longer rows runs the 20 users again, alone and then beside one misbehaving client (foreign routes, page opens
without a browser, a message announcing 250 buffers, a message flood, wrong logins; from its own
loopback address, with the server's default limits); every row polls /health every 0.1 s.
Goals (lab serving, 2-core machine): median with 20 users at most 2x the 1-user median; with the
hostile client beside them, at most 1.3x the run without it.
"""

from __future__ import annotations

import argparse
import asyncio
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from tests.support.loadclient import Crowd, fetch_json, log_problems, serve, synthetic_wedge_png  # noqa: E402

GOAL_RATIO = 2.0
#: With one hostile client beside the users, their median may be at most this multiple of the run without it.
HOSTILE_GOAL_RATIO = 1.3
#: The pair of rows with and without the hostile client makes this many times the moves of the other rows.
HOSTILE_ROW_MOVES_X = 4


def _row(label, ph, ref_median):
    moves = ph.moves_done
    ratio = ph.median_ms() / ref_median if ref_median else float("nan")
    maps = f"{len(ph.heavy.maps_s)}" if ph.heavy else "-"
    return (f"{label:>14s} {moves:>5d}/{ph.moves_planned:<5d} {moves / ph.wall_s:8.1f} {ph.median_ms():8.0f} "
            f"{ph.p95_ms():8.0f} {ratio:7.1f} {len(ph.errors):6d} {ph.rss_peak_kb / 1024:9.0f} "
            f"{ph.loop_ms_per_move():8.0f} {100 * ph.loop_cpu_s / ph.wall_s:6.0f}% "
            f"{ph.worker_cpu_s:7.1f} {ph.client_cpu_s:7.1f} {100 * ph.machine_busy:7.0f}% {maps:>5s} "
            f"{ph.health_ms()[0]:6.0f}/{ph.health_ms()[1]:<6.0f}")


async def _until_pages_freed(server, pages: int, timeout_s: float = 60.0) -> None:
    """Wait until the server holds no more than ``pages`` pages (those of the crowd)."""
    loop = asyncio.get_running_loop()
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        _, health = await loop.run_in_executor(None, fetch_json, server.base_url + "/health")
        if health["sessions"] <= pages + 1:
            return
        await asyncio.sleep(1.0)


async def _bench(server, counts, moves, png, hostile=True):
    crowd = Crowd(server.base_url, server.pid, max(counts), png=png, seed=5)
    rows, ref = [], None
    opening = []
    for n in counts:
        t0 = time.perf_counter()
        errors = await crowd.open(users=n, heavy=False)
        opening.append((n, time.perf_counter() - t0, errors))
        ph = await crowd.phase(moves * 2 if n == 1 else moves, users=n, watch_health=True)
        ref = ref or ph.median_ms()
        rows.append((f"{n} user" + ("s" if n > 1 else ""), ph))
    if hostile:
        # a longer pair of rows: the hostile client's first burst (what every limit lets through at once)
        # would otherwise be most of a short row
        for label, with_hostile in ((f"{max(counts)} users, long", False), (f"{max(counts)} + hostile", True)):
            ph = await crowd.phase(moves * HOSTILE_ROW_MOVES_X, users=max(counts), hostile=with_hostile,
                                   watch_health=True)
            rows.append((label, ph))
        await _until_pages_freed(server, max(counts))          # the hostile client's pages, before the next row
    if png is not None:
        await crowd.open(heavy=True)
        ph = await crowd.phase(moves, heavy=True, watch_health=True)
        rows.append((f"{max(counts)} + photo", ph))
    await crowd.close()
    return rows, ref, opening


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--users", default="1,5,10,20",
                   help="comma-separated numbers of users at once; the first is the reference")
    p.add_argument("--moves", type=int, default=10, help="moves per user per row (the 1-user row makes twice as many)")
    p.add_argument("--no-photo", action="store_true", help="leave out the row with the photo-map user")
    p.add_argument("--no-hostile", action="store_true", help="leave out the row with the hostile client")
    args = p.parse_args(argv)
    counts = [int(x) for x in args.users.split(",")]
    png = None if args.no_photo else synthetic_wedge_png()
    with tempfile.TemporaryDirectory() as tmp, serve(Path(tmp)) as server:
        rss0 = server.rss_kb() / 1024
        rows, ref, opening = asyncio.run(_bench(server, counts, args.moves, png, hostile=not args.no_hostile))
        problems = log_problems(server.log_text())
    print(f"served page, slider move to updated swatch (ms); server RSS at start {rss0:.0f} MB; "
          f"{os.cpu_count()} CPUs")
    print(f"{'users':>14s} {'moves done':>11s} {'upd/s':>8s} {'median':>8s} {'p95':>8s} {'x ref':>7s} "
          f"{'errors':>6s} {'peak RSS':>9s} {'loop/mv':>8s} {'loop':>7s} {'pools s':>7s} {'client':>7s} "
          f"{'machine':>8s} {'maps':>5s} {'health p50/max':>14s}")
    for label, ph in rows:
        print(_row(label, ph, ref))
    print("x ref: median over the 1-user median of this run; loop/mv: server event-loop CPU per move (ms); "
          "loop: how busy that thread was; pools s: CPU s of the server's other threads; client: CPU s of this "
          "process; machine: all cores busy, any process (other work on the machine makes rows noisy); health: "
          "GET /health answer time, median/worst (ms), polled every 0.1 s")
    for n, secs, errors in opening:
        print(f"opening sessions up to {n}: {secs:.1f} s" + (f", errors: {errors}" if errors else ""))
    target = next((ph for label, ph in rows if label.startswith(f"{max(counts)} user")), None)
    if target is not None and ref:
        ratio = target.median_ms() / ref
        print(f"goal ({max(counts)} users, median <= {GOAL_RATIO:g}x the 1-user median):",
              "met" if ratio <= GOAL_RATIO else f"NOT met (x{ratio:.1f})")
    calm = next((ph for label, ph in rows if label == f"{max(counts)} users, long"), None)
    rough = next((ph for label, ph in rows if label.endswith("hostile")), None)
    if calm is not None and rough is not None:
        ratio = rough.median_ms() / calm.median_ms()
        print(f"hostile client beside {max(counts)} users: their median x{ratio:.2f} of the run without it "
              f"(goal <= {HOSTILE_GOAL_RATIO:g}x): " + ("met" if ratio <= HOSTILE_GOAL_RATIO else "NOT met")
              + f"; it did {rough.hostile}")
    print("server log:", "clean" if not problems else f"{len(problems)} error lines, first: {problems[0][:200]}")


if __name__ == "__main__":
    main()
