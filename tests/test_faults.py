"""Faults against a real server and a real library: garbage on the websocket, an oversized message,
and a saving process killed at random moments.

The server is serve.py on a free loopback port; websockets are opened the way the page's script does
(the session token from GET /app as the second subprotocol after "bokeh").
"""

from __future__ import annotations

import asyncio
import hashlib
import json
import os
import random
import re
import signal
import subprocess
import sys
import textwrap
import time
import urllib.request
from pathlib import Path

import pytest
from tornado.httpclient import HTTPRequest
from tornado.iostream import StreamClosedError
from tornado.websocket import WebSocketClosedError, websocket_connect

from library.store import Library
from physics.stackfile import load_stack_file
from tests.support.loadclient import CROWD_SERVER_ARGS
from tests.support.server import served_lab
from views.limits import WEBSOCKET_MESSAGE_CAP_BYTES

#: Times the server: in a parallel run, each test runs while no other test does (tests/conftest.py).
pytestmark = pytest.mark.exclusive

ROOT = Path(__file__).resolve().parents[1]
#: The websocket message cap serve.py sets (4 MiB: one upload chunk with room around it).
WS_CAP_BYTES = WEBSOCKET_MESSAGE_CAP_BYTES


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    # pages as many and as fast as these tests make them (the limits on pages are tested in test_server_hostile.py)
    with served_lab(tmp_path_factory.mktemp("faults"), "--max-upload-mb", "1", *CROWD_SERVER_ARGS) \
            as (base, proc, log_path):
        yield {"port": int(base.rsplit(":", 1)[1]), "log": log_path, "proc": proc}


def _get(port, path, timeout=30):
    with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=timeout) as resp:
        return resp.status, resp.read().decode("utf-8", "replace")


def _token(port) -> str:
    status, html = _get(port, "/app")
    assert status == 200
    return re.search(r'"token":"([^"]+)"', html).group(1)


async def _connect(port, token=None):
    req = HTTPRequest(f"ws://127.0.0.1:{port}/app/ws", headers={"Origin": f"http://127.0.0.1:{port}"},
                      request_timeout=30)
    return await websocket_connect(req, subprotocols=["bokeh", token or _token(port)], max_message_size=64 * 2**20)


async def _read_message(ws, timeout=30):
    """One Bokeh protocol message (header, metadata, content, buffers) as (header dict, content str), or None
    when the server closed the connection."""
    header = await asyncio.wait_for(ws.read_message(), timeout)
    if header is None:
        return None
    header = json.loads(header)
    await asyncio.wait_for(ws.read_message(), timeout)                     # metadata
    content = await asyncio.wait_for(ws.read_message(), timeout)
    for _ in range(header.get("num_buffers", 0)):
        await asyncio.wait_for(ws.read_message(), timeout)
    return header, content


async def _send(ws, msgtype, content="{}", msgid="t1"):
    for part in (json.dumps({"msgid": msgid, "msgtype": msgtype}), "{}", content):
        await ws.write_message(part)


async def _fresh_session_works(port, token=None):
    """A new websocket gets its ACK and answers a document request with the page's document."""
    ws = await _connect(port, token)
    try:
        ack = await _read_message(ws)
        assert ack is not None and ack[0]["msgtype"] == "ACK"
        await _send(ws, "PULL-DOC-REQ", msgid="pull-1")
        while True:
            msg = await _read_message(ws, timeout=60)
            assert msg is not None, "the server closed a fresh, well-behaved connection"
            if msg[0]["msgtype"] == "PULL-DOC-REPLY":
                assert msg[0]["reqid"] == "pull-1" and "fringegauge" in msg[1]
                return
    finally:
        ws.close()


def _assert_serving(port):
    status, body = _get(port, "/health")
    assert status == 200 and json.loads(body)["status"] == "ok"
    status, html = _get(port, "/app")
    assert status == 200 and "render_items" in html
    asyncio.run(_fresh_session_works(port, re.search(r'"token":"([^"]+)"', html).group(1)))


async def _closed_or_ignored(ws, wait_s=5.0):
    """'closed' when the server closes the connection within wait_s, 'ignored' when nothing comes back."""
    deadline = time.monotonic() + wait_s
    while time.monotonic() < deadline:
        try:
            frame = await asyncio.wait_for(ws.read_message(), deadline - time.monotonic())
        except asyncio.TimeoutError:
            return "ignored"
        if frame is None:
            return "closed"
        assert "PULL-DOC-REPLY" not in str(frame)[:200], "garbage was answered like a request"
    return "ignored"


GARBAGE = {
    "not-json": ["hello, server"],
    "json-but-not-a-header": [json.dumps({"x": 1}), "{}", "{}"],
    "header-list": ["[1, 2, 3]", "{}", "{}"],
    "unknown-msgtype": [json.dumps({"msgid": "g1", "msgtype": "NO-SUCH-TYPE"}), "{}", "{}"],
    "bad-content": [json.dumps({"msgid": "g2", "msgtype": "PATCH-DOC"}), "{}", "{not json"],
    "patch-of-nothing": [json.dumps({"msgid": "g3", "msgtype": "PATCH-DOC"}), "{}",
                         json.dumps({"events": [{"kind": "ModelChanged", "model": {"id": "nope"}, "attr": "value",
                                                 "new": "__import__('os')"}]})],
    "huge-num-buffers": [json.dumps({"msgid": "g4", "msgtype": "PATCH-DOC", "num_buffers": 10**12}), "{}", "{}"],
    "negative-num-buffers": [json.dumps({"msgid": "g5", "msgtype": "PATCH-DOC", "num_buffers": -5}), "{}", "{}"],
    "binary-junk": [bytes(range(256)) * 8],
    "binary-after-header": [json.dumps({"msgid": "g6", "msgtype": "PULL-DOC-REQ"}), b"\x00\xff" * 64, "{}"],
    "deep-json": ["[" * 100_000 + "]" * 100_000],
    "invalid-utf8-text": [b"\xff\xfe\xfd"],
}


def test_garbage_on_the_websocket_drops_that_connection_only(server):
    """Each kind of garbage on its own connection (all at once, up to three connections per page, the
    server's limit): each connection is closed or its garbage ignored; then the server still serves a
    fresh page and a fresh session."""
    port = server["port"]
    tokens = [_token(port) for _ in range(-(-len(GARBAGE) // 3))]

    async def one(frames, token):
        ws = await _connect(port, token)
        try:
            ack = await _read_message(ws)
            assert ack[0]["msgtype"] == "ACK"
            for frame in frames:
                if ws.protocol is None:
                    break
                try:
                    await ws.write_message(frame, binary=isinstance(frame, bytes))
                except (WebSocketClosedError, StreamClosedError):      # closed at an earlier frame
                    return "closed"
            return await _closed_or_ignored(ws, wait_s=2.0)
        finally:
            ws.close()

    async def run():
        return await asyncio.gather(*(one(frames, tokens[i // 3]) for i, frames in enumerate(GARBAGE.values())))
    outcomes = dict(zip(GARBAGE, asyncio.run(run())))
    assert set(outcomes.values()) <= {"closed", "ignored"}, outcomes
    # Bokeh closes on a protocol error; a lone frame waits for the rest of its message (ignored)
    assert outcomes["binary-junk"] == outcomes["unknown-msgtype"] == "closed", outcomes
    _assert_serving(port)


def test_oversized_messages_and_the_server_goes_on(server):
    """serve.py caps websocket messages at 4 MiB (uploads come in chunks): a 3 MB message is read (and
    here, an empty patch, ignored or closed); one over the cap closes the connection unread. Either way
    the server goes on."""
    port = server["port"]
    token = _token(port)

    async def send(size_bytes, wait_s):
        ws = await _connect(port, token)
        try:
            await _read_message(ws)
            header = json.dumps({"msgid": "big", "msgtype": "PATCH-DOC"})
            content = json.dumps({"events": [], "pad": "x" * size_bytes})
            for part in (header, "{}", content):
                try:
                    await ws.write_message(part)
                except Exception:             # the server may close while the frame is still going out
                    break
            return await _closed_or_ignored(ws, wait_s=wait_s)
        finally:
            ws.close()

    async def run():
        return await asyncio.gather(send(3 * 2**20, 6), send(WS_CAP_BYTES + 2**20, 20))
    three_mb, over_cap = asyncio.run(run())
    assert three_mb in ("closed", "ignored")
    assert over_cap == "closed"
    _assert_serving(port)


def test_hostile_uploads_are_dropped_at_the_cap_as_they_arrive(server):
    """A client that skips the browser's size check and streams 160 MiB of chunks at the photo drop zone
    (cap 1 MB here) is stopped at the cap: the server never holds the file, the page says why, a chunk
    out of order is refused the same way, and a proper photo is still taken afterwards."""
    from tests.support.loadclient import PhotoMapUser, rss_kb, synthetic_wedge_png

    port = server["port"]
    pid = server["proc"].pid
    chunk = bytes(2 * 2**20)

    async def scenario():
        user = PhotoMapUser(f"http://127.0.0.1:{port}", synthetic_wedge_png(300, 200))
        assert await user.open(), user.open_error
        s = user.session
        try:
            await s.set_value(user.tabs, "active", 1)
            await s.wait_until(user._photo_controls_arrived)
            said = lambda words: any(words in t for t in user._texts())  # noqa: E731
            rss_before = rss_kb(pid)
            for i in range(80):
                payload = {"type": "map", "entries": [
                    ["chunk", i + 1], ["data", {"type": "bytes", "data": {"id": f"h{i}"}}], ["name", "huge.png"],
                    ["total_chunks", 10**6], ["type", "image/png"]]}
                await s.send_event("upload_event", user.drop, payload, buffers=[(f"h{i}", chunk)])
            await s.wait_until(lambda: said("larger than this server accepts"))
            grown_mb = (rss_kb(pid) - rss_before) / 1024
            payload = {"type": "map", "entries": [
                ["chunk", 5], ["data", {"type": "bytes", "data": {"id": "o1"}}], ["name", "late.png"],
                ["total_chunks", 9], ["type", "image/png"]]}
            await s.send_event("upload_event", user.drop, payload, buffers=[("o1", b"x" * 100)])
            await s.wait_until(lambda: said("arrived out of order"))
            await s.upload(user.drop, user.name, user.png, "image/png")
            await s.wait_until(lambda: s.attr(user.button, "disabled") is False)
            return grown_mb
        finally:
            await user.close()

    grown_mb = asyncio.run(scenario())
    print(f"server RSS grew {grown_mb:.1f} MB while 160 MiB of chunks arrived")
    assert grown_mb < 60, f"the server held on to a refused upload: RSS +{grown_mb:.0f} MB"
    _assert_serving(port)


def test_server_log_is_json_and_has_no_traceback_from_our_code(server):
    """Run after the garbage tests: Bokeh logs its own protocol errors, as JSON lines like everything the
    server logs; no frame of ours may appear in any traceback."""
    status, body = _get(server["port"], "/health")
    assert status == 200 and json.loads(body)["status"] == "ok"
    log = server["log"].read_text(errors="replace")
    records, not_json = [], []
    for line in filter(str.strip, log.splitlines()):
        try:
            records.append(json.loads(line))
        except ValueError:
            not_json.append(line)
    assert not_json == [], "log lines that are not JSON:\n" + "\n".join(not_json[:10])
    frames = [frame for r in records for frame in str(r.get("exception", "")).splitlines()
              if frame.strip().startswith("File ")]
    ours = [f for f in frames if str(ROOT) in f and "site-packages" not in f]
    assert ours == [], "a traceback passed through our code:\n" + "\n".join(ours)
    bokeh = sorted({f"{r['level']} {r['logger']}: {re.sub(r'[0-9]+', 'N', r['message'])[:120]}"
                    for r in records if r["level"] in ("ERROR", "WARNING")})
    print("\n".join(["Bokeh's own log lines for the garbage above:", *bokeh]))
    assert server["proc"].poll() is None


# ---------------------------------------------------------------------- killed while saving
SAVER = textwrap.dedent("""
    import sys
    from library.store import Library
    from physics.stackfile import load_stack_file
    root, text = sys.argv[1], open(sys.argv[2], encoding="utf-8").read()
    load_stack_file(text)                      # load the materials before the first save is timed
    lib = Library(root)
    print("ready", flush=True)
    while True:
        lib.save("stacks", "Same name", text, user="killed-saver")
""")


def _valid_stack_text() -> str:
    text = (ROOT / "presets" / "thermal_oxide_on_silicon.json").read_text(encoding="utf-8")
    load_stack_file(text)
    return text


def test_saver_killed_at_random_moments_leaves_no_half_written_entry(tmp_path):
    root, text = tmp_path / "library", _valid_stack_text()
    text_path = tmp_path / "stack.json"
    text_path.write_text(text, encoding="utf-8")
    rng = random.Random(20_261_202)
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    for _ in range(5):
        proc = subprocess.Popen([sys.executable, "-c", SAVER, str(root), str(text_path)], cwd=tmp_path, env=env,
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        try:
            assert proc.stdout.readline().strip() == "ready", proc.stderr.read()
            time.sleep(rng.uniform(0.02, 0.5))
        finally:
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=30)
            proc.stdout.close()
            proc.stderr.close()

    lib = Library(root)
    folder = root / "stacks"
    entries, problems = lib.list("stacks"), lib.list_problems("stacks")
    assert entries, "no save completed in any round"
    listed = {e.file_name for e in entries}
    reported = {p.file_name for p in problems}
    for e in entries:
        assert not e.file_name.startswith(".") and ".tmp-" not in e.file_name
        raw = (folder / e.file_name).read_bytes()
        meta = json.loads((folder / (e.file_name + ".meta.json")).read_text(encoding="utf-8"))
        assert hashlib.sha256(raw).hexdigest() == meta["sha256"] == e.sha256 and len(raw) == meta["size"]
        assert raw.decode("utf-8") == text
        load_stack_file(raw)
        assert lib.load("stacks", "Same name", e.version) == text
    for path in folder.iterdir():
        name = path.name
        if name.startswith(".") or name.endswith(".meta.json"):
            continue
        assert name in listed or name in reported, f"{name} is neither listed nor reported"
    versions = sorted(e.version for e in entries)
    assert len(set(versions)) == len(versions)
    res = lib.save("stacks", "Same name", text, user="after")
    assert res.version > max(versions)
    assert lib.load("stacks", "Same name") == text
    assert lib.list("stacks")[0].user == "after"


def test_pages_closed_mid_computation_stop_their_work_and_the_server_goes_on(tmp_path):
    """A photo map whose page is closed while it runs frees its place (it stops at its next stage once the
    server drops the page, which tests/test_limits.py checks with a real worker); a page closed right
    after a slider move drops its result. Nothing reaches the log as an error; the server goes on."""
    from tests.support.loadclient import ExplorerUser, HeavyResult, PhotoMapUser, log_problems, synthetic_wedge_png

    png = synthetic_wedge_png(3000, 2000)                    # 6 MP: a map takes seconds
    with served_lab(tmp_path, "--idle-timeout-s", "3", *CROWD_SERVER_ARGS) as (base, proc, log_path):
        async def scenario():
            mapper = PhotoMapUser(base, png)
            assert await mapper.open(), mapper.open_error
            await mapper.upload(HeavyResult())
            await mapper.session.send_event("button_click", mapper.button)
            await asyncio.sleep(1.0)                     # the map is under way
            await mapper.close()                          # the person closes the tab mid-map
            mover = ExplorerUser(base, "leaver", seed=5)
            assert await mover.open(), mover.open_error
            await mover.session.set_value(mover.thick, "value", 321.5)
            await mover.close()                           # and another closes right after a move
        asyncio.run(scenario())
        deadline = time.time() + 60
        while time.time() < deadline:
            if '"kind": "photo_map"' in log_path.read_text() and \
                    json.loads(urllib.request.urlopen(base + "/health", timeout=10).read())["heavy_jobs"] == 0:
                break
            time.sleep(0.5)
        log = log_path.read_text()
        line = next(json.loads(x) for x in log.splitlines() if '"kind": "photo_map"' in x and '"heavy job"' in x)
        # stopped at its next stage once the server dropped the page, or finished first: never an error
        assert line["outcome"] in ("cancelled", "ok"), line
        assert json.loads(urllib.request.urlopen(base + "/health", timeout=10).read())["heavy_jobs"] == 0
        assert log_problems(log) == []
        assert urllib.request.urlopen(base + "/app", timeout=30).status == 200
        assert proc.poll() is None

