"""Clients that misbehave on purpose, for tests and the load benchmark, on loopback only.

- :func:`http` sends one plain HTTP request from a chosen loopback source address (127.0.0.x), so
  per-address limits can be seen to hold one address back and not another.
- :func:`ws_connect` opens the page's websocket as a browser would, or with someone else's token.
- :class:`HealthWatch` polls ``/health`` every 0.1 s on a thread and keeps every latency.
- :func:`hostile_mix` is one misbehaving client's repertoire, run in a loop until told to stop
  (used by ``benchmarks/bench_serve.py`` beside ordinary users).

Every loop here is bounded by a count or a deadline.
"""

from __future__ import annotations

import asyncio
import dataclasses
import http.client as httpclient
import json
import re
import threading
import time
from urllib.parse import urlsplit

from tornado.httpclient import HTTPRequest
from tornado.websocket import websocket_connect

#: Polling period of :class:`HealthWatch` (s) and how long one poll may take before it counts as failed.
HEALTH_EVERY_S = 0.1
HEALTH_TIMEOUT_S = 5.0


@dataclasses.dataclass
class Reply:
    status: int
    headers: httpclient.HTTPMessage
    body: str

    def cookie(self) -> str:
        """The cookies this reply sets, as a ``Cookie`` header value."""
        pairs = []
        for value in self.headers.get_all("Set-Cookie") or []:
            name_value = value.split(";", 1)[0]
            if name_value.split("=", 1)[1] not in ('""', ""):
                pairs.append(name_value)
        return "; ".join(pairs)

    def token(self) -> str | None:
        m = re.search(r'"token"\s*:\s*"([^"]+)"', self.body)
        return m.group(1) if m else None


def http(base: str, method: str, path: str, *, source: str = "127.0.0.1", cookie: str | None = None,
         headers: dict | None = None, body: bytes | str | None = None, timeout: float = 30.0) -> Reply:
    """One request to ``base`` (http://127.0.0.1:PORT) from ``source``, without following redirects."""
    parts = urlsplit(base)
    conn = httpclient.HTTPConnection(parts.hostname, parts.port, timeout=timeout, source_address=(source, 0))
    try:
        all_headers = dict(headers or {})
        if cookie:
            all_headers["Cookie"] = cookie
        if isinstance(body, str):
            body = body.encode()
        if body is not None and "Content-Type" not in all_headers:
            all_headers["Content-Type"] = "application/x-www-form-urlencoded"
        conn.request(method, path, body=body, headers=all_headers)
        resp = conn.getresponse()
        return Reply(resp.status, resp.headers, resp.read().decode("utf-8", "replace"))
    finally:
        conn.close()


def login(base: str, user: str, password: str, source: str = "127.0.0.1") -> str:
    """Log in through the form; the ``Cookie`` header value of the login (raises when refused)."""
    from urllib.parse import urlencode

    reply = http(base, "POST", "/login", source=source, body=urlencode({"username": user, "password": password}))
    if reply.status != 302:
        raise AssertionError(f"login of {user} refused: {reply.status}")
    return reply.cookie()


async def ws_connect(base: str, token: str, *, source: str = "127.0.0.1", cookie: str | None = None,
                     timeout: float = 30.0):
    """The page's websocket with ``token`` (the ``bokeh`` subprotocol), as a browser on ``base`` opens it."""
    host = urlsplit(base).netloc
    headers = {"Origin": base}
    if cookie:
        headers["Cookie"] = cookie
    req = HTTPRequest(f"ws://{host}/app/ws", headers=headers, request_timeout=timeout, connect_timeout=timeout,
                      network_interface=source)
    return await websocket_connect(req, subprotocols=["bokeh", token], max_message_size=64 * 2**20)


async def first_message_type(ws, timeout: float = 20.0) -> str | None:
    """The type of the first protocol message the server sends (``ACK`` on a joined page), or None when it
    closes the connection first."""
    frame = await asyncio.wait_for(ws.read_message(), timeout)
    if frame is None:
        return None
    return json.loads(frame).get("msgtype")


async def closed_within(ws, seconds: float) -> bool:
    """True when the server closes ``ws`` within ``seconds`` (frames it sends meanwhile are read and dropped)."""
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        try:
            frame = await asyncio.wait_for(ws.read_message(), deadline - time.monotonic())
        except asyncio.TimeoutError:
            return False
        if frame is None:
            return True
    return False


class HealthWatch:
    """Poll ``base/health`` every :data:`HEALTH_EVERY_S` on a thread; every latency (s) and failure is kept."""

    def __init__(self, base: str):
        self.base = base
        self.latencies: list[float] = []
        self.failures: list[str] = []
        self.slow: list[tuple[str, float, str]] = []          # (wall-clock time, latency s, what) of polls over 0.5 s
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True, name="health-watch")

    def _run(self):
        while not self._stop.is_set():
            t0 = time.perf_counter()
            try:
                reply = http(self.base, "GET", "/health", timeout=HEALTH_TIMEOUT_S)
                if reply.status not in (200, 503):
                    self.failures.append(f"HTTP {reply.status}")
            except Exception as exc:                 # a timeout or a refused connection: the server is down
                self.failures.append(type(exc).__name__)
            took = time.perf_counter() - t0
            self.latencies.append(took)
            if took > 0.5:
                self.slow.append((time.strftime("%H:%M:%S"), round(took, 2), self.failures[-1] if self.failures else ""))
            self._stop.wait(max(0.0, HEALTH_EVERY_S - (time.perf_counter() - t0)))

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()

    def worst_s(self) -> float:
        return max(self.latencies, default=float("nan"))

    def median_s(self) -> float:
        xs = sorted(self.latencies)
        return xs[len(xs) // 2] if xs else float("nan")


# ---------------------------------------------------------------------------- one hostile client

#: Paths that Panel or Bokeh would serve but the page does not need (each must be a 404).
FOREIGN_PATHS = ("/components/venv.__main__/x/y/z", "/components/this/x/y/z", "/components/app/FilmExplorer/_css/a.css",
                 "/app/autoload.js", "/app/metadata", "/liveness", "/rest/session_info", "/admin")


async def _announce_many_buffers(base: str, token: str, source: str) -> bool:
    """A PATCH-DOC header that announces 250 buffers; True when the server closed the connection."""
    ws = await ws_connect(base, token, source=source)
    try:
        await first_message_type(ws)
        await ws.write_message(json.dumps({"msgid": "h1", "msgtype": "PATCH-DOC", "num_buffers": 250}))
        return await closed_within(ws, 10)
    finally:
        ws.close()


async def _flood(base: str, token: str, source: str, n: int = 2000) -> bool:
    """``n`` tiny messages as fast as the socket takes them; True when the server closed the connection."""
    ws = await ws_connect(base, token, source=source)
    try:
        await first_message_type(ws)
        for i in range(n):
            if ws.protocol is None:
                break
            try:
                for part in (json.dumps({"msgid": f"f{i}", "msgtype": "PULL-DOC-REQ"}), "{}", "{}"):
                    await ws.write_message(part)
            except Exception:                         # the server closed it mid-flood
                break
        return await closed_within(ws, 10)
    finally:
        ws.close()


async def hostile_mix(base: str, stop: asyncio.Event, source: str = "127.0.0.9", max_rounds: int = 1000) -> dict:
    """One misbehaving client until ``stop`` is set (or ``max_rounds``): foreign routes, page opens without a
    websocket, a message announcing 250 buffers, a message flood, and wrong logins. Counts what happened."""
    loop = asyncio.get_running_loop()
    seen = {"rounds": 0, "foreign_404": 0, "pages": 0, "refused_pages": 0, "closed_ws": 0, "errors": 0}
    for _ in range(max_rounds):
        if stop.is_set():
            break
        seen["rounds"] += 1
        try:
            for path in FOREIGN_PATHS:
                reply = await loop.run_in_executor(None, lambda p=path: http(base, "GET", p, source=source))
                seen["foreign_404"] += reply.status == 404
            reply = await loop.run_in_executor(None, lambda: http(base, "GET", "/app", source=source))
            if reply.status == 200 and reply.token():
                seen["pages"] += 1
                token = reply.token()
                seen["closed_ws"] += await _announce_many_buffers(base, token, source)
                seen["closed_ws"] += await _flood(base, token, source, n=600)
            else:
                seen["refused_pages"] += 1
            for _ in range(3):
                await loop.run_in_executor(None, lambda: http(base, "POST", "/login", source=source,
                                                              body="username=x&password=y"))
        except Exception:
            seen["errors"] += 1
        try:
            await asyncio.wait_for(stop.wait(), 0.5)
        except asyncio.TimeoutError:
            pass
    return seen
