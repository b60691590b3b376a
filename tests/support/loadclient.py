"""Simulated users of the served page, many at once from one Python process, without a browser.

Each :class:`PageSession` does what a browser tab does on the wire: ``GET /app`` (the server
builds the session's document and answers a page carrying a session token), a websocket on
``/app/ws`` with the ``bokeh`` subprotocol and that token, ``PULL-DOC-REQ`` for the document,
then ``PATCH-DOC`` messages to change widget values or to send UI events (button clicks, file
chunks). Models are found in the pulled document by their type and css class; the server's
``PATCH-DOC`` messages are applied to a flat table of model attributes, so a user can wait for
"the swatch now shows 123.5 nm at 4.0°". Everything runs on one asyncio loop (Tornado's
websocket client), so twenty sessions cost the load generator little CPU.

Latency of one move = time from writing the ``PATCH-DOC`` that sets the slider until the
server's message carrying the swatch text for the new value has been read. The server's
``OK`` reply to the patch is timed as well: it says when the event loop had applied the new
value, so ``ack`` vs ``update`` separates event-loop queueing from computing and pushing.
Like a browser, the client sets TCP_NODELAY: without it a message's small frames wait for the
server's delayed ACK and every ``OK`` arrives ~40 ms late.

Memory of the server is read from ``/proc/<pid>/status`` (``VmRSS``).
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import html
import io
import itertools
import json
import os
import random
import re
import statistics
import subprocess
import threading
import time
from pathlib import Path

from tornado.httpclient import AsyncHTTPClient, HTTPRequest
from tornado.websocket import websocket_connect

from tests.support.server import served_lab
from views.limits import UPLOAD_CHUNK_BYTES

#: Seconds to wait for one update (a swatch after a move, the page after an upload) before it counts as lost.
UPDATE_TIMEOUT_S = 15.0
#: Seconds to wait for a photo map to finish.
MAP_TIMEOUT_S = 60.0
#: Largest websocket message the client accepts (the pulled document is ~0.35 MB of JSON).
MAX_MESSAGE_BYTES = 256 * 2**20
#: Think time between two moves of one simulated user (s): a person dragging in short strokes.
THINK_S = (0.2, 0.5)
#: Every n-th move of a user changes the viewing angle instead of the thickness.
ANGLE_EVERY = 4
#: Pause of the photo-map user between one map's result and the next click (s): looking at the result.
MAP_THINK_S = 2.0
#: Pause between opening the colour → thickness tab and dropping the photo (s).
TAB_TO_UPLOAD_S = 1.0

_ids = itertools.count(1)


# ---------------------------------------------------------------------------- server process

def _own_rss_kb(pid: int) -> int | None:
    try:
        with open(f"/proc/{pid}/status") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1])
    except OSError:
        return None
    return None


def _descendants(pid: int) -> list[int]:
    """Every process below *pid* (the server's worker processes, their manager and starter)."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat") as f:
                ppid = int(f.read().rsplit(")", 1)[1].split()[1])
        except (OSError, IndexError, ValueError):
            continue
        children.setdefault(ppid, []).append(int(entry))
    out, todo = [], [pid]
    while todo:
        for child in children.get(todo.pop(), []):
            out.append(child)
            todo.append(child)
    return out


def rss_kb(pid: int) -> int | None:
    """Resident set size in kB of process *pid* and every process below it (``VmRSS`` of
    /proc/<pid>/status, summed: the server with its worker processes); None if *pid* is gone."""
    own = _own_rss_kb(pid)
    if own is None:
        return None
    return own + sum(_own_rss_kb(c) or 0 for c in _descendants(pid))


def thread_cpu_s(pid: int) -> tuple[float, float]:
    """CPU seconds (user + system) used so far by a process's main thread (the server's event loop)
    and by all its other threads together (worker pools, including threads that have ended)."""
    tick = os.sysconf("SC_CLK_TCK")

    def cpu(path):
        with open(path) as f:
            fields = f.read().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / tick    # utime, stime: fields 14, 15 of stat(5)
    try:
        total, main = cpu(f"/proc/{pid}/stat"), cpu(f"/proc/{pid}/task/{pid}/stat")
    except OSError:
        return float("nan"), float("nan")
    return main, total - main


def machine_cpu() -> tuple[float, float]:
    """(busy, total) CPU seconds of the whole machine so far, all cores, from /proc/stat."""
    tick = os.sysconf("SC_CLK_TCK")
    with open("/proc/stat") as f:
        values = [int(v) for v in f.readline().split()[1:]]
    idle = values[3] + (values[4] if len(values) > 4 else 0)          # idle + iowait
    total = sum(values[:8])                                            # guest time is inside user
    return (total - idle) / tick, total / tick


class RssSampler:
    """Sample a process's RSS every *interval_s* on a background thread; keeps the peak."""

    def __init__(self, pid: int, interval_s: float = 0.1):
        self.pid, self.interval_s = pid, interval_s
        self.peak_kb = rss_kb(pid) or 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self):
        while not self._stop.wait(self.interval_s):
            kb = rss_kb(self.pid)
            if kb:
                self.peak_kb = max(self.peak_kb, kb)

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()


@dataclasses.dataclass
class Server:
    base_url: str
    proc: subprocess.Popen
    log_path: Path

    @property
    def pid(self) -> int:
        return self.proc.pid

    def log_text(self) -> str:
        return self.log_path.read_text(errors="replace")

    def rss_kb(self) -> int | None:
        return rss_kb(self.proc.pid)


#: Server options for tests that drive many pages from 127.0.0.1 alone (a lab's people come from their own
#: stations), so the per-address limits are lifted there (the limits are tested elsewhere; a Crowd sends
#: each user from an address of its own and needs none of this).
CROWD_SERVER_ARGS = ("--max-sessions-per-address", "100", "--page-opens-per-minute", "1200",
                     "--pages-waiting-per-address", "100", "--loop-share-per-address", "1")


@contextlib.contextmanager
def serve(workdir: Path, *args: str):
    """Run ``serve.py`` on a free loopback port with a library under *workdir*; yield a :class:`Server`."""
    with served_lab(workdir, *args) as (base, proc, log_path):
        yield Server(base, proc, log_path)


def log_problems(text: str) -> list[str]:
    """Lines of a server log that report a traceback or an error."""
    bad = []
    for line in text.splitlines():
        if "Traceback" in line or re.search(r"\bERROR\b", line) or re.search(r'"level":\s*"(ERROR|CRITICAL)"', line):
            bad.append(line)
    return bad


# ---------------------------------------------------------------------------- one session

class PageError(RuntimeError):
    """The page did not answer as a browser would expect."""


#: The part of the page that arrives last (see views/pagebuild.py): the page is complete once it is there.
PAGE_COMPLETE = ("HTML", "fg-swatch")


class PageSession:
    """One simulated browser tab on ``/app``: a synced table of the document's models."""

    def __init__(self, base_url: str, path: str = "/app", cookie: str | None = None, source: str | None = None):
        """``cookie``: a ``Cookie`` header value (a login); ``source``: the loopback address to send from."""
        self.base_url, self.path = base_url.rstrip("/"), path
        self.cookie, self.source = cookie, source
        self.models: dict[str, dict] = {}          # id -> {"name": type name, "attributes": {...}}
        self.errors: list[str] = []
        self.closed = False
        self.messages_in = 0
        self._conn = None
        self._reader = None
        self._changed = asyncio.Event()
        self._acks: dict[str, asyncio.Future] = {}
        self._pull: asyncio.Future | None = None
        self.watched: set[str] = set()             # ids whose changes are kept in ``history``
        self.history: list[tuple[float, str, str, object]] = []   # (perf_counter, id, attr, new)

    # -- connect
    async def open(self, timeout_s: float = 60.0):
        """GET the page, open the websocket, pull the document."""
        client = AsyncHTTPClient()
        headers = {"Cookie": self.cookie} if self.cookie else {}
        resp = await client.fetch(HTTPRequest(self.base_url + self.path, request_timeout=timeout_s, headers=headers,
                                              network_interface=self.source, follow_redirects=False))
        m = re.search(r'"token"\s*:\s*"([^"]+)"', resp.body.decode("utf-8", "replace"))
        if not m:
            raise PageError("the page carried no session token")
        host = self.base_url.split("://", 1)[1]
        req = HTTPRequest(f"ws://{host}{self.path}/ws", headers={"Origin": self.base_url, **headers},
                          request_timeout=timeout_s, connect_timeout=timeout_s, network_interface=self.source)
        self._conn = await websocket_connect(req, subprotocols=["bokeh", m.group(1)],
                                             max_message_size=MAX_MESSAGE_BYTES)
        self._conn.protocol.set_nodelay(True)  # as browsers do: a message's small frames must not wait for ACKs
        header, _, _, _ = await asyncio.wait_for(self._read_message(), timeout_s)
        if header.get("msgtype") != "ACK":
            raise PageError(f"expected ACK, got {header.get('msgtype')}")
        loop = asyncio.get_running_loop()
        self._pull = loop.create_future()
        self._reader = asyncio.ensure_future(self._read_loop())
        await self._send("PULL-DOC-REQ", {})
        doc = await asyncio.wait_for(self._pull, timeout_s)
        self._register(doc)
        # a browser tells the server its document is rendered; the page then sends its sidebar and plots
        await self.send_event("document_ready", None)
        await self.wait_until(lambda: self.has(*PAGE_COMPLETE), timeout_s)
        return self

    async def close(self):
        if self._conn is not None:
            self._conn.close()
        if self._reader is not None:
            self._reader.cancel()
            with contextlib.suppress(BaseException):
                await self._reader
        self.closed = True

    # -- wire
    async def _read_message(self):
        """(header, metadata, content, buffers) of the next protocol message; None at close."""
        first = await self._conn.read_message()
        if first is None:
            return None
        header = json.loads(first)
        meta = await self._conn.read_message()
        content = await self._conn.read_message()
        if meta is None or content is None:
            return None
        buffers = {}
        for _ in range(header.get("num_buffers", 0)):
            bh = await self._conn.read_message()
            payload = await self._conn.read_message()
            if bh is None or payload is None:
                return None
            buffers[json.loads(bh)["id"]] = payload
        return header, json.loads(meta), json.loads(content), buffers

    async def _read_loop(self):
        try:
            while True:
                msg = await self._read_message()
                if msg is None:
                    break
                self.messages_in += 1
                header, _, content, _ = msg
                kind = header.get("msgtype")
                if kind == "PULL-DOC-REPLY" and self._pull and not self._pull.done():
                    self._pull.set_result(content["doc"])
                elif kind == "PATCH-DOC":
                    self._apply_patch(content)
                elif kind == "OK":
                    fut = self._acks.pop(header.get("reqid"), None)
                    if fut is not None and not fut.done():
                        fut.set_result(time.perf_counter())
                elif kind == "ERROR":
                    self.errors.append(f"server ERROR message: {content.get('text', content)}")
                    fut = self._acks.pop(header.get("reqid"), None)
                    if fut is not None and not fut.done():
                        fut.set_exception(PageError(str(content.get("text"))))
        except Exception as exc:  # noqa: BLE001 - recorded, the waiter sees the close
            self.errors.append(f"reader: {type(exc).__name__}: {exc}")
        finally:
            self.closed = True
            self._changed.set()
            if self._pull and not self._pull.done():
                self._pull.set_exception(PageError("websocket closed before the document arrived"))

    async def _send(self, msgtype: str, content, buffers=()):
        """Write one protocol message; return (msgid, future of the server's OK time)."""
        msgid = f"lc{next(_ids)}"
        header = {"msgid": msgid, "msgtype": msgtype}
        if buffers:
            header["num_buffers"] = len(buffers)
        fut = asyncio.get_running_loop().create_future()
        self._acks[msgid] = fut
        await self._conn.write_message(json.dumps(header))
        await self._conn.write_message("{}")
        await self._conn.write_message(json.dumps(content))
        for bid, payload in buffers:
            await self._conn.write_message(json.dumps({"id": bid}))
            await self._conn.write_message(payload, binary=True)
        return msgid, fut

    # -- document
    def _register(self, obj):
        """Record every model definition found in a serialized value."""
        stack = [obj]
        while stack:
            o = stack.pop()
            if isinstance(o, dict):
                if o.get("type") == "object" and "id" in o and "name" in o:
                    entry = self.models.setdefault(o["id"], {"name": o["name"], "attributes": {}})
                    entry["attributes"].update(o.get("attributes") or {})
                stack.extend(o.values())
            elif isinstance(o, list):
                stack.extend(o)

    def _apply_patch(self, content):
        for ev in content.get("events", []):
            if ev.get("kind") == "ModelChanged":
                self._register(ev.get("new"))
                mid = ev["model"]["id"]
                if mid in self.watched:
                    self.history.append((time.perf_counter(), mid, ev["attr"], ev.get("new")))
                self.models.setdefault(mid, {"name": "?", "attributes": {}})["attributes"][ev["attr"]] = ev.get("new")
            elif ev.get("kind") == "RootAdded":
                self._register(ev.get("model"))
        self._changed.set()

    def has(self, name_suffix: str, css: str | None = None, **attrs) -> bool:
        """True when the document holds a model :meth:`find` would return."""
        try:
            self.find(name_suffix, css, **attrs)
        except PageError:
            return False
        return True

    def find(self, name_suffix: str, css: str | None = None, **attrs) -> str:
        """Id of the one model whose type name ends with *name_suffix*, with css class *css* and *attrs*."""
        hits = []
        for mid, m in self.models.items():
            a = m["attributes"]
            if not m["name"].endswith(name_suffix):
                continue
            if css is not None and css not in (a.get("css_classes") or []):
                continue
            if all(a.get(k) == v for k, v in attrs.items()):
                hits.append(mid)
        if len(hits) != 1:
            raise PageError(f"expected one {name_suffix} model (css {css!r}, {attrs}), found {len(hits)}")
        return hits[0]

    def attr(self, mid: str, name: str):
        return self.models[mid]["attributes"].get(name)

    def text(self, mid: str) -> str:
        """A markup model's text, unescaped."""
        return html.unescape(self.attr(mid, "text") or "")

    async def wait_until(self, predicate, timeout_s: float = UPDATE_TIMEOUT_S) -> float:
        """Wait until ``predicate()`` holds after some server message; return the perf_counter time it did."""
        deadline = time.perf_counter() + timeout_s
        while True:
            if predicate():
                return time.perf_counter()
            if self.closed:
                raise PageError("websocket closed")
            left = deadline - time.perf_counter()
            if left <= 0:
                raise asyncio.TimeoutError()
            self._changed.clear()
            with contextlib.suppress(asyncio.TimeoutError):
                await asyncio.wait_for(self._changed.wait(), left)

    # -- user actions
    async def set_value(self, mid: str, attr: str, value):
        """Change one model attribute as a widget would; returns the future of the server's OK time."""
        self.models[mid]["attributes"][attr] = value
        _, ack = await self._send("PATCH-DOC", {"events": [
            {"kind": "ModelChanged", "model": {"id": mid}, "attr": attr, "new": value}]})
        return ack

    async def send_event(self, name: str, model_id: str | None, data=None, buffers=()):
        """Send a UI event (``button_click``, ``upload_event``, ...) as BokehJS does: a MessageSent patch."""
        entries = []
        if model_id is not None:
            entries.append(["model", {"id": model_id}])
        if data is not None:
            entries.append(["data", data])
        ev = {"kind": "MessageSent", "msg_type": "bokeh_event",
              "msg_data": {"type": "event", "name": name, "values": {"type": "map", "entries": entries}}}
        _, ack = await self._send("PATCH-DOC", {"events": [ev]}, buffers)
        return ack

    async def upload(self, mid: str, name: str, data: bytes, mime: str, chunk_bytes: int = UPLOAD_CHUNK_BYTES):
        """Send a file to a file dropper in chunks, as its browser side does (binary buffers)."""
        chunks = max(1, -(-(len(data) + 1) // chunk_bytes))
        ack = None
        for i in range(chunks):
            part = data[i * chunk_bytes:(i + 1) * chunk_bytes]
            bid = f"up{next(_ids)}"
            payload = {"type": "map", "entries": [
                ["chunk", i + 1], ["data", {"type": "bytes", "data": {"id": bid}}], ["name", name],
                ["total_chunks", chunks], ["type", mime]]}
            ack = await self.send_event("upload_event", mid, payload, buffers=[(bid, part)])
        return ack


# ---------------------------------------------------------------------------- the film explorer user

def swatch_says(thickness_nm: float, angle_deg: float) -> str:
    """The fragment of the swatch text that shows a state (see ``_swatch_html`` in views/explorer.py)."""
    return f"<b>{thickness_nm:.1f} nm</b> at <b>{angle_deg:.1f}°</b>"


@dataclasses.dataclass
class UserResult:
    name: str
    moves_planned: int
    latencies_ms: list = dataclasses.field(default_factory=list)
    acks_ms: list = dataclasses.field(default_factory=list)
    errors: list = dataclasses.field(default_factory=list)

    @property
    def moves_done(self) -> int:
        return len(self.latencies_ms)

    @property
    def all_updates(self) -> bool:
        return self.moves_done == self.moves_planned and not self.errors


class ExplorerUser:
    """One session that drags the explorer's thickness slider (every ``angle_every``-th move the angle)."""

    def __init__(self, base_url: str, name: str, seed: int = 0, think_s=THINK_S, angle_every: int = ANGLE_EVERY,
                 source: str | None = None):
        self.base_url, self.name, self.think_s, self.angle_every = base_url, name, think_s, angle_every
        self.source = source
        self.rng = random.Random(seed)
        self.session: PageSession | None = None
        self.open_s = float("nan")
        self.open_error: str | None = None

    async def open(self) -> bool:
        t0 = time.perf_counter()
        try:
            self.session = s = await PageSession(self.base_url, source=self.source).open()
            self.thick = s.find("Slider", "fg-thickness-slider")
            self.angle = s.find("Slider", "fg-angle-slider")
            self.swatch = s.find("HTML", "fg-swatch")
            self.t = float(s.attr(self.thick, "value"))
            self.a = float(s.attr(self.angle, "value"))
            await s.wait_until(lambda: swatch_says(self.t, self.a) in s.text(self.swatch), UPDATE_TIMEOUT_S)
        except Exception as exc:  # noqa: BLE001 - reported with the results
            self.open_error = f"open: {type(exc).__name__}: {exc}"
            return False
        self.open_s = time.perf_counter() - t0
        return True

    def _next_value(self, i: int):
        s = self.session
        if self.angle_every and i % self.angle_every == self.angle_every - 1:
            end = min(float(s.attr(self.angle, "end")), 60.0)
            while True:
                a = self.rng.randrange(0, int(end * 10) + 1) / 10
                if f"{a:.1f}" != f"{self.a:.1f}":
                    return self.angle, "a", a
        end = float(s.attr(self.thick, "end"))
        while True:
            t = self.rng.randrange(20, int(end * 2) + 1) / 2                 # 0.5 nm steps from 10 nm
            if f"{t:.1f}" != f"{self.t:.1f}":
                return self.thick, "t", t

    async def moves(self, n: int) -> UserResult:
        """Make *n* moves with think time between them; time each until the swatch shows the new value."""
        r = UserResult(self.name, n)
        if self.session is None:
            r.errors.append(self.open_error or "not open")
            return r
        s = self.session
        for i in range(n):
            await asyncio.sleep(self.rng.uniform(*self.think_s))
            mid, which, value = self._next_value(i)
            if which == "t":
                self.t = value
            else:
                self.a = value
            want = swatch_says(self.t, self.a)
            t0 = time.perf_counter()
            try:
                ack = await s.set_value(mid, "value", value)
                t1 = await s.wait_until(lambda: want in s.text(self.swatch))
            except asyncio.TimeoutError:
                r.errors.append(f"move {i}: no swatch showing {want!r} within {UPDATE_TIMEOUT_S:g} s")
                continue
            except Exception as exc:  # noqa: BLE001
                r.errors.append(f"move {i}: {type(exc).__name__}: {exc}")
                break
            r.latencies_ms.append((t1 - t0) * 1000)
            if ack.done() and not ack.cancelled() and ack.exception() is None:
                r.acks_ms.append((ack.result() - t0) * 1000)
        r.errors.extend(s.errors)
        s.errors.clear()
        return r

    async def close(self):
        if self.session is not None:
            await self.session.close()


# ---------------------------------------------------------------------------- the photo-map user

def synthetic_wedge_png(width: int = 1500, height: int = 1000, seed: int = 7) -> bytes:
    """An invented photo, not a measurement: a bevelled thermal oxide on silicon, a bare strip then
    20 → 600 nm left to right, in the colours the page's own physics predicts at normal incidence,
    with a mild warm cast, vignetting and camera noise; an 8-bit sRGB PNG (1.5 MP by default)."""
    import numpy as np
    from PIL import Image

    from physics.appearance import color_map
    from physics.stackfile import load_preset

    stack = load_preset("thermal_oxide_on_silicon").stack
    bare = width // 10
    d = np.concatenate([np.zeros(bare), np.linspace(20.0, 600.0, width - bare)])
    rgb = color_map(stack, 0, d, [0.0]).rgb[:, 0, :]                       # (width, 3) sRGB 0..1
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4) * np.array([1.08, 1.0, 0.92]) * 0.85
    yy = np.linspace(-1.0, 1.0, height)[:, None, None]
    xx = np.linspace(-1.0, 1.0, width)[None, :, None]
    img = lin[None, :, :] * (1.0 - 0.08 * (xx ** 2 + yy ** 2))
    img = np.clip(img + np.random.default_rng(seed).normal(0.0, 0.004, img.shape), 0.0, 1.0)
    enc = np.where(img <= 0.0031308, 12.92 * img, 1.055 * img ** (1 / 2.4) - 0.055)
    buf = io.BytesIO()
    Image.fromarray(np.round(enc * 255).astype(np.uint8)).save(buf, format="PNG", compress_level=1)
    return buf.getvalue()


@dataclasses.dataclass
class HeavyResult:
    upload_s: float = float("nan")
    maps_s: list = dataclasses.field(default_factory=list)
    message: str = ""
    errors: list = dataclasses.field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.errors and bool(self.maps_s)


class PhotoMapUser:
    """One session that drops a photo on the colour → thickness tab and makes thickness maps."""

    def __init__(self, base_url: str, png: bytes, name: str = "wedge.png", cookie: str | None = None,
                 source: str | None = None):
        self.base_url, self.png, self.name = base_url, png, name
        self.cookie, self.source = cookie, source
        self.session: PageSession | None = None
        self.open_s = float("nan")
        self.open_error: str | None = None
        self.uploaded = False
        self.tab_open_s = float("nan")

    async def open(self) -> bool:
        t0 = time.perf_counter()
        try:
            self.session = s = await PageSession(self.base_url, cookie=self.cookie, source=self.source).open()
            self.tabs = s.find("Tabs")
        except Exception as exc:  # noqa: BLE001
            self.open_error = f"open: {type(exc).__name__}: {exc}"
            return False
        self.open_s = time.perf_counter() - t0
        return True

    def _photo_controls_arrived(self) -> bool:
        """The page builds a tab when it is first opened: look for its drop zone and button."""
        try:
            self.drop = self.session.find("FileDropper", "fg-photo-drop")
            self.button = self.session.find("Button", label="Make thickness map")
        except PageError:
            return False
        return True

    def _texts(self):
        s = self.session
        return [s.text(mid) for mid, m in s.models.items()
                if m["name"].endswith(("Markdown", "HTML")) and m["attributes"].get("text")]

    async def upload(self, r: HeavyResult):
        s = self.session
        t_tab = time.perf_counter()
        await s.set_value(self.tabs, "active", 1)                           # "Colour → thickness"
        await s.wait_until(self._photo_controls_arrived, UPDATE_TIMEOUT_S)
        self.tab_open_s = time.perf_counter() - t_tab
        s.watched.add(self.button)
        await asyncio.sleep(TAB_TO_UPLOAD_S)                               # a person picks the file
        t0 = time.perf_counter()
        await s.upload(self.drop, self.name, self.png, "image/png")
        await s.wait_until(lambda: s.attr(self.button, "disabled") is False, UPDATE_TIMEOUT_S * 2)
        r.upload_s = time.perf_counter() - t0
        self.uploaded = True

    async def make_map(self, r: HeavyResult):
        """Click "Make thickness map" (no calibration box: the photo's colours are taken as they are)
        and wait until the button, disabled while the job runs, is enabled again with statistics shown."""
        s = self.session
        t0 = time.perf_counter()
        await s.send_event("button_click", self.button)

        def finished():
            seen = [v for t, mid, a, v in s.history if t >= t0 and mid == self.button and a == "disabled"]
            return True in seen and seen[-1] is False
        await s.wait_until(finished, MAP_TIMEOUT_S)
        r.maps_s.append(time.perf_counter() - t0)
        # the statistics and the message follow the button in later messages of the same update
        try:
            await s.wait_until(lambda: any("uniformity (max − min)/(2 mean)" in t for t in self._texts())
                               and any("of the region matched" in t for t in self._texts()), UPDATE_TIMEOUT_S)
        except asyncio.TimeoutError:
            raise PageError("the map finished without statistics and a message") from None
        r.message = next(t for t in self._texts() if "of the region matched" in t)

    async def work(self, stop: asyncio.Event | None = None) -> HeavyResult:
        """Upload the photo once, then make maps: one, or one every ``MAP_THINK_S`` after the last
        until *stop* is set."""
        r = HeavyResult()
        if self.session is None:
            r.errors.append(self.open_error or "not open")
            return r
        try:
            if not self.uploaded:
                await self.upload(r)
            while True:
                await self.make_map(r)
                if stop is None or stop.is_set():
                    break
                with contextlib.suppress(asyncio.TimeoutError):
                    await asyncio.wait_for(stop.wait(), MAP_THINK_S)
                if stop.is_set():
                    break
        except asyncio.TimeoutError:
            r.errors.append("photo map: timed out")
        except Exception as exc:  # noqa: BLE001
            r.errors.append(f"photo map: {type(exc).__name__}: {exc}")
        r.errors.extend(self.session.errors)
        self.session.errors.clear()
        return r

    async def close(self):
        if self.session is not None:
            await self.session.close()


# ---------------------------------------------------------------------------- a crowd of users

def percentile(xs, q) -> float:
    """Nearest-rank percentile; NaN for no data."""
    xs = sorted(xs)
    if not xs:
        return float("nan")
    return xs[min(len(xs) - 1, int(round(q / 100 * (len(xs) - 1))))]


@dataclasses.dataclass
class Phase:
    """What happened while some users worked at once."""
    users: list
    heavy: HeavyResult | None
    wall_s: float
    loop_cpu_s: float          # server main thread (event loop): applying changes, callbacks, serializing
    worker_cpu_s: float        # all other server threads: physics in the pools
    client_cpu_s: float        # this (load-generating) process
    machine_busy: float        # fraction of all the machine's cores busy (any process) during the phase
    rss_before_kb: int
    rss_peak_kb: int
    rss_after_kb: int
    health_s: list = dataclasses.field(default_factory=list)    # every /health answer time during the phase
    hostile: dict | None = None                                  # what the hostile client did, if one ran

    def health_ms(self) -> tuple[float, float]:
        """(median, worst) /health answer time during the phase, ms."""
        if not self.health_s:
            return float("nan"), float("nan")
        return 1000 * statistics.median(self.health_s), 1000 * max(self.health_s)

    @property
    def latencies_ms(self) -> list:
        return [x for u in self.users for x in u.latencies_ms]

    @property
    def acks_ms(self) -> list:
        return [x for u in self.users for x in u.acks_ms]

    @property
    def errors(self) -> list:
        return [f"{u.name}: {e}" for u in self.users for e in u.errors] + \
            ([f"photo-map user: {e}" for e in self.heavy.errors] if self.heavy else [])

    @property
    def moves_done(self) -> int:
        return sum(u.moves_done for u in self.users)

    @property
    def moves_planned(self) -> int:
        return sum(u.moves_planned for u in self.users)

    def median_ms(self) -> float:
        return statistics.median(self.latencies_ms) if self.latencies_ms else float("nan")

    def p95_ms(self) -> float:
        return percentile(self.latencies_ms, 95)

    def loop_ms_per_move(self) -> float:
        return 1000 * self.loop_cpu_s / max(self.moves_done, 1)

    def summary(self) -> str:
        acks = self.acks_ms
        heavy = ""
        if self.heavy is not None:
            heavy = (f"; photo maps {len(self.heavy.maps_s)} "
                     f"({', '.join(f'{x:.1f}' for x in self.heavy.maps_s)} s, upload {self.heavy.upload_s:.2f} s)")
        return (f"{len(self.users)} users, {self.moves_done}/{self.moves_planned} moves in {self.wall_s:.1f} s; "
                f"latency median {self.median_ms():.0f} ms, p95 {self.p95_ms():.0f} ms, max "
                f"{max(self.latencies_ms, default=float('nan')):.0f} ms; server OK of the patch median "
                f"{statistics.median(acks) if acks else float('nan'):.0f} ms, p95 {percentile(acks, 95):.0f} ms; "
                f"server CPU: event loop {self.loop_cpu_s:.1f} s ({100 * self.loop_cpu_s / self.wall_s:.0f} % of one "
                f"core, {self.loop_ms_per_move():.0f} ms per move), other threads {self.worker_cpu_s:.1f} s; "
                f"client CPU {self.client_cpu_s:.1f} s; machine {100 * self.machine_busy:.0f} % busy "
                f"({os.cpu_count()} CPUs); server RSS {self.rss_before_kb / 1024:.0f} → peak "
                f"{self.rss_peak_kb / 1024:.0f} → {self.rss_after_kb / 1024:.0f} MB{heavy}; "
                f"errors {len(self.errors)}")


class Crowd:
    """Many explorer users (and optionally one photo-map user) on one server, driven from one loop.

    Each person sends from a loopback address of their own (127.0.1.x; the photo-map user 127.0.2.1),
    as people at their own stations do, so the server's per-address limits apply as in a lab.
    """

    def __init__(self, base_url: str, server_pid: int, users: int, png: bytes | None = None, seed: int = 1,
                 think_s=THINK_S):
        self.base_url, self.pid = base_url, server_pid
        self.users = [ExplorerUser(base_url, f"user{i:02d}", seed=seed * 1000 + i, think_s=think_s,
                                   source=f"127.0.1.{i + 1}") for i in range(users)]
        self.heavy = PhotoMapUser(base_url, png, source="127.0.2.1") if png is not None else None
        self.open_wall_s = float("nan")

    async def open(self, batch: int = 3, users: int | None = None, heavy: bool = True) -> list[str]:
        """Open the sessions of the first *users* users (all by default) and of the photo-map user,
        *batch* at a time, skipping those already open; returns the errors of those that failed."""
        everyone = self.users[:users] + ([self.heavy] if self.heavy and heavy else [])
        todo = [u for u in everyone if u.session is None and u.open_error is None]
        t0 = time.perf_counter()
        for i in range(0, len(todo), batch):
            await asyncio.gather(*(u.open() for u in todo[i:i + batch]))
        self.open_wall_s = time.perf_counter() - t0
        errors = [f"{getattr(u, 'name', 'photo-map user')}: {u.open_error}" for u in todo if u.open_error]
        if self.heavy in todo and self.heavy.session is not None:
            # The photo user has its tab open and its photo dropped before anyone is timed, as at an
            # inspection station; opening a tab builds it on the server once per page (tab_open_s).
            prep = HeavyResult()
            try:
                await self.heavy.upload(prep)
            except Exception as exc:  # noqa: BLE001
                errors.append(f"photo-map user: preparing: {type(exc).__name__}: {exc}")
        return errors

    async def phase(self, moves: int, users: int | None = None, heavy: bool = False,
                    think_s=None, hostile: bool = False, watch_health: bool = False) -> Phase:
        """The first *users* users make *moves* moves each, all at once; with *heavy*, the photo-map
        user makes maps one after another until the last of them has finished; with *hostile*, one
        misbehaving client (tests/support/hostile.py) works beside them; with *watch_health*, /health is
        polled throughout (from a thread of this process, which then shares its interpreter)."""
        from tests.support.hostile import HealthWatch, hostile_mix

        people = self.users[:users] if users is not None else self.users
        if think_s is not None:
            for p in people:
                p.think_s = think_s
        rss0 = rss_kb(self.pid) or 0
        loop0, work0 = thread_cpu_s(self.pid)
        client0 = time.process_time()
        busy0, total0 = machine_cpu()
        with RssSampler(self.pid) as sampler, (HealthWatch(self.base_url) if watch_health
                                                else contextlib.nullcontext()) as health:
            t0 = time.perf_counter()
            stop = asyncio.Event()
            heavy_task = asyncio.ensure_future(self.heavy.work(stop)) if heavy and self.heavy else None
            hostile_task = asyncio.ensure_future(hostile_mix(self.base_url, stop)) if hostile else None
            results = await asyncio.gather(*(p.moves(moves) for p in people))
            stop.set()
            heavy_result = await heavy_task if heavy_task else None
            hostile_result = await hostile_task if hostile_task else None
            wall = time.perf_counter() - t0
        loop1, work1 = thread_cpu_s(self.pid)
        busy1, total1 = machine_cpu()
        return Phase(list(results), heavy_result, wall, loop1 - loop0, work1 - work0,
                     time.process_time() - client0, (busy1 - busy0) / max(total1 - total0, 1e-9),
                     rss0, sampler.peak_kb, rss_kb(self.pid) or 0, list(health.latencies) if health else [],
                     hostile_result)

    async def close(self):
        for u in self.users + ([self.heavy] if self.heavy else []):
            await u.close()


def fetch_json(url: str, timeout_s: float = 10.0):
    """(HTTP status, decoded JSON) of a GET."""
    import urllib.request
    with urllib.request.urlopen(url, timeout=timeout_s) as resp:
        return resp.status, json.loads(resp.read().decode())
