"""The page's two handlers with the server's limits: building a page and the page's websocket.

A Bokeh protocol message is several websocket messages: a header, metadata, content, and then a
buffer header and a binary payload for each of the header's ``num_buffers``. Tornado's
``websocket_max_message_size`` bounds one websocket message; nothing in Bokeh bounds a whole
protocol message, so a client that announces many buffers and sends them slowly can make the server
hold gigabytes. :class:`MessageMeter` bounds each protocol message, before Bokeh sees any part:

- at most :data:`MAX_MESSAGE_BYTES` in all its parts and :data:`MAX_BUFFERS` buffers;
- complete within :data:`COMPLETE_WITHIN_S` of its header;
- at most :data:`MESSAGES_PER_S` messages a second on one connection, after a burst of
  :data:`MESSAGE_BURST`, and at most :data:`MAX_DOCUMENT_PULLS` requests for the whole document
  (a browser sends one per connection; each costs the server a serialization of the page).

Past any bound the connection is closed with a reason.

Besides the bounds, each client address has a share of the event loop's time
(:meth:`labserver.sessions.SessionGuard.loop_wait_s`): the time spent applying its messages is
charged to it, and once it has used its share, its next message waits. Tornado reads a connection's
next message only when the last one has been handled, so a busy client is slowed down, not
dropped, and everybody else's messages go on being applied.

The page's other connections and pages are not touched. A websocket joins only a page this server built, for the login that built it, and
never a page that has been freed (Bokeh would otherwise build a new one for any valid token).

:class:`GuardedDocHandler` builds a page only when :class:`labserver.sessions.SessionGuard` has
room, and always a new page: a request that names an existing session (``bokeh-session-id``,
``bokeh-token``) is refused, so knowing a session id is never enough to join someone's page.
"""

from __future__ import annotations

import asyncio
import html
import json
import logging
import time

from bokeh.protocol.exceptions import MessageError, ProtocolError, ValidationError
from bokeh.util.token import check_token_signature, get_session_id, get_token_payload
from panel.io.server import DocHandler as PanelDocHandler
from panel.io.server import WSHandler as PanelWSHandler

from views.limits import UPLOAD_CHUNK_BYTES, WEBSOCKET_MESSAGE_CAP_BYTES, session_hash
from views.pagebuild import ensure_spare

__all__ = ["MessageMeter", "GuardedWSHandler", "GuardedDocHandler", "install_handlers",
           "MAX_MESSAGE_BYTES", "MAX_BUFFERS", "COMPLETE_WITHIN_S", "MESSAGES_PER_S", "MESSAGE_BURST"]

_log = logging.getLogger("fringegauge")

#: All parts of one protocol message: the largest the page sends is one upload chunk (2 MiB) with its
#: JSON around it, so one websocket message's cap covers it with room.
MAX_MESSAGE_BYTES = WEBSOCKET_MESSAGE_CAP_BYTES
#: Binary buffers in one message: an upload chunk is one; a few for anything else the browser sends.
MAX_BUFFERS = 8
#: Longest header part (characters): a real one is under 200.
MAX_HEADER_CHARS = 16_384
#: Seconds from a message's header to its last part: an upload chunk over a 1 Mbit/s link takes ~17 s.
COMPLETE_WITHIN_S = 30.0
#: Messages per second on one connection: dragging a slider sends at most a few dozen.
MESSAGES_PER_S = 60.0
MESSAGE_BURST = 240
#: Requests for the whole document on one connection (a browser sends one after connecting).
MAX_DOCUMENT_PULLS = 2
#: Longest a message waits for its address's share of the event loop (s) before the connection is
#: closed instead (a client that keeps the loop busy this long is not a person at a page).
MAX_SHARE_WAIT_S = 30.0
#: Pause between building a page's document and writing the page out (s): both hold the event loop, and
#: a request that arrived meanwhile (another page's message, /health) is answered in between.
BETWEEN_BUILD_AND_PAGE_S = 0.05
#: Longest error text kept in a log line (never a message's content).
LOG_TEXT_CHARS = 300

assert UPLOAD_CHUNK_BYTES < MAX_MESSAGE_BYTES


class MessageMeter:
    """Counts the parts of each protocol message on one connection; :meth:`take` says when to close."""

    def __init__(self, max_bytes: int = MAX_MESSAGE_BYTES, max_buffers: int = MAX_BUFFERS,
                 complete_within_s: float = COMPLETE_WITHIN_S, per_s: float = MESSAGES_PER_S,
                 burst: int = MESSAGE_BURST, clock=time.monotonic):
        self.max_bytes, self.max_buffers, self.complete_within_s = max_bytes, max_buffers, complete_within_s
        self.per_s, self.burst, self._clock = per_s, burst, clock
        self.remaining = 0                 # parts still to come in the current message (0: a header is next)
        self.bytes = 0
        self.started = 0.0
        self.pulls = 0
        self._tokens, self._at = float(burst), clock()

    @property
    def in_message(self) -> bool:
        return self.remaining > 0

    def take(self, part) -> str | None:
        """Count one websocket message; a sentence when the connection must be closed, else None."""
        size = len(part) if isinstance(part, (str, bytes, bytearray, memoryview)) else 0
        if not self.in_message:
            return self._header(part, size)
        self.remaining -= 1
        self.bytes += size
        if self.bytes > self.max_bytes:
            return f"a message larger than {self.max_bytes // 2**20} MiB"
        return None

    def _header(self, part, size: int) -> str | None:
        now = self._clock()
        self._tokens = min(float(self.burst), self._tokens + (now - self._at) * self.per_s)
        self._at = now
        if self._tokens < 1.0:
            return f"more than {self.per_s:g} messages a second"
        self._tokens -= 1.0
        if not isinstance(part, str) or size > MAX_HEADER_CHARS:
            return "a message that does not start with a header"
        try:
            header = json.loads(part)
        except ValueError:
            return "a message header that is not JSON"
        n = header.get("num_buffers", 0) if isinstance(header, dict) else None
        if type(n) is not int or not 0 <= n <= self.max_buffers:
            return f"a message announcing other than 0 to {self.max_buffers} buffers"
        if header.get("msgtype") == "PULL-DOC-REQ":
            self.pulls += 1
            if self.pulls > MAX_DOCUMENT_PULLS:
                return f"more than {MAX_DOCUMENT_PULLS} requests for the whole page on one connection"
        self.remaining = 2 + 2 * n         # metadata, content, then a header and a payload per buffer
        self.bytes, self.started = size, now
        return None

    def overdue(self) -> bool:
        """True when the current message has been incomplete for longer than ``complete_within_s``."""
        return self.in_message and self._clock() - self.started > self.complete_within_s


def _guard(handler):
    return getattr(handler.application, "fringegauge_sessions", None)


def _owner(handler) -> str:
    """Who a request comes from, for binding pages: the login (see labserver.login), else the user name."""
    user = handler.current_user                    # computing it sets ``fringegauge_login`` under our login
    login = getattr(handler, "fringegauge_login", None)
    if login:
        return login
    if isinstance(user, bytes):
        user = user.decode("utf-8", "replace")
    return "" if user is None else "user-" + str(user)


class GuardedWSHandler(PanelWSHandler):
    """Panel's page websocket with :class:`MessageMeter`, page binding and quiet errors."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._meter = MessageMeter()
        self._joined = None                 # session id once counted by the guard
        self._deadline = None
        self._refused = False               # closed by the server: later frames are dropped unread

    def _refuse(self, code: int, reason: str, log_reason: str) -> None:
        if self._refused:
            return                                  # said once; what was already on its way is dropped
        self._refused = True
        _log.warning("websocket closed", extra={"client": self.request.remote_ip, "reason": log_reason,
                                                **({"session": session_hash(self._joined)} if self._joined else {})})
        self.close(code, reason)

    def open(self, *args, **kwargs):
        """Refuse a connection without a valid, unexpired token of this server quietly (Bokeh would log the
        session id it names and raise a traceback), then let Panel and Bokeh open it."""
        token = self._token
        problem = None
        if self.selected_subprotocol != "bokeh" or not token:
            problem = "no page token"
        elif not check_token_signature(token, signed=self.application.sign_sessions,
                                       secret_key=self.application.secret_key):
            problem = "a token this server did not sign"
        else:
            try:
                expiry = get_token_payload(token).get("session_expiry")
            except Exception:
                expiry = None
            if not isinstance(expiry, (int, float)) or expiry <= time.time():
                problem = "an expired token"
        if problem is not None:
            return self._refuse(4001, "This page has expired; reload it.", problem)
        return super().open(*args, **kwargs)

    async def _async_open(self, token: str) -> None:
        guard = _guard(self)
        session_id = str(get_session_id(token))
        if guard is not None:
            owner = guard.page_owner(session_id)
            if owner is None:
                return self._refuse(4001, "This page has expired; reload it.", "no such page")
            if owner != _owner(self):
                return self._refuse(4003, "This page belongs to another login.", "another login's page")
            refusal = guard.connect(session_id, self.request.remote_ip, self)
            if refusal is not None:
                return self._refuse(refusal.status, refusal.message, refusal.reason)
            self._joined = session_id
        try:
            return await super()._async_open(token)
        except Exception as exc:                   # a bad or expired token: that connection only
            self._refuse(4001, "This page has expired; reload it.", type(exc).__name__)

    def on_close(self) -> None:
        if self._deadline is not None:
            self.application.io_loop.remove_timeout(self._deadline)
            self._deadline = None
        guard = _guard(self)
        if guard is not None and self._joined is not None:
            guard.disconnect(self._joined, self.request.remote_ip, self)
        self._joined = None
        conn = getattr(self, "connection", None)
        if conn is not None and getattr(conn, "_session", None) is None:
            # The browser left after its connection was made and before the page's session joined it (the
            # page was still being built): nothing to notify, only the connection to forget.
            self.application.client_lost(conn)
            self.connection = None
        super().on_close()

    def _check_overdue(self) -> None:
        self._deadline = None
        if self._meter.overdue():
            self._refuse(1009, f"a message was not completed within {COMPLETE_WITHIN_S:g} s", "incomplete message")

    async def on_message(self, fragment) -> None:
        if self._refused:
            return None
        started = self._meter.in_message
        problem = self._meter.take(fragment)
        if problem is not None:
            return self._refuse(1009 if "larger" in problem else 1008, problem[:120], problem)
        if self.receiver is None:                  # before the page has been joined: not a page's behaviour
            return self._refuse(1008, "a message before the connection was acknowledged", "early message")
        if not started and self._meter.in_message and self._deadline is None:
            self._deadline = self.application.io_loop.call_later(COMPLETE_WITHIN_S + 0.5, self._check_overdue)
        elif not self._meter.in_message and self._deadline is not None:
            self.application.io_loop.remove_timeout(self._deadline)
            self._deadline = None
        try:
            message = await self.receiver.consume(fragment)
        except (MessageError, ProtocolError, ValidationError) as exc:
            return self._refuse(1008, "malformed message", f"malformed message: {str(exc)[:LOG_TEXT_CHARS]}")
        except Exception as exc:                   # never log the fragment: it may be someone's upload
            return self._refuse(1008, "malformed message", f"unreadable message: {type(exc).__name__}")
        if not message:
            return None
        guard = _guard(self)
        address = self.request.remote_ip
        if guard is not None:
            wait_s = guard.loop_wait_s(address)
            if wait_s > MAX_SHARE_WAIT_S:
                return self._refuse(1008, "this computer keeps the server too busy", "over its share of the loop")
            if wait_s > 0:
                await asyncio.sleep(wait_s)
        t0 = time.thread_time()
        try:
            work = await self._handle(message)
            if work:
                await self._schedule(work)
        except Exception as exc:
            _log.error("a page's message could not be applied", exc_info=True,
                       extra={"msgtype": str(message.header.get("msgtype"))[:40],
                              "error": f"{type(exc).__name__}: {str(exc)[:LOG_TEXT_CHARS]}",
                              **({"session": session_hash(self._joined)} if self._joined else {})})
            self._refused = True
            self.close(1011, "the server could not apply a message")
        finally:
            if guard is not None:
                guard.charge(address, time.thread_time() - t0)
        return None


#: Query arguments and headers that would make ``GET /app`` join an existing page instead of a new one.
_JOINING_ARGUMENTS = ("bokeh-session-id", "bokeh-token")
_JOINING_HEADERS = ("Bokeh-Session-Id",)

_PAGE_TEMPLATE = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>fringegauge: {title}</title>
<style>body{{font-family:sans-serif;max-width:40em;margin:3em auto;padding:0 1em;color:#222}}
h1{{font-size:1.3em}}</style></head>
<body><h1>fringegauge: {title}</h1><p>{message}</p></body></html>
"""


def simple_page(title: str, message: str) -> str:
    """A self-contained HTML page with one sentence (no scripts, nothing loaded from elsewhere)."""
    return _PAGE_TEMPLATE.format(title=html.escape(title), message=html.escape(message))


async def _awaited(result):
    """The page handler's result: a coroutine, or None when the login check redirected instead."""
    return await result if result is not None else None


class GuardedDocHandler(PanelDocHandler):
    """Panel's page handler that builds a new page only when the server has room for it."""

    async def get(self, *args, **kwargs):
        if any(a in self.request.arguments for a in _JOINING_ARGUMENTS) or \
                any(h in self.request.headers for h in _JOINING_HEADERS):
            self.set_status(400)
            self.set_header("Cache-Control", "no-store")
            self.finish(simple_page("address not accepted", "This address tries to join an existing page; open "
                                    "the page at /app for a page of your own."))
            return
        guard = _guard(self)
        if guard is None:
            return await _awaited(super().get(*args, **kwargs))
        reservation = guard.reserve(self.request.remote_ip)
        if not hasattr(reservation, "bind"):          # a Refusal: say so in a page of its own
            self.set_status(reservation.status)
            self.set_header("Retry-After", "60")
            self.set_header("Cache-Control", "no-store")
            self.finish(simple_page("the server is full", reservation.message))
            return
        self._reservation = reservation
        try:
            async with guard.building():
                # the page's Python objects are built in a thread while the loop goes on; only attaching
                # them to the page's document is left for the loop
                await asyncio.get_running_loop().run_in_executor(None, ensure_spare)
                t0 = time.thread_time()
                try:
                    return await _awaited(super().get(*args, **kwargs))
                finally:
                    guard.charge(self.request.remote_ip, time.thread_time() - t0)
        finally:
            reservation.release(refund=True)          # no page was built (a login redirect, an error)

    async def get_session(self):
        session = await super().get_session()
        reservation = getattr(self, "_reservation", None)
        if reservation is not None:
            reservation.bind(session.id, _owner(self))
            await asyncio.sleep(BETWEEN_BUILD_AND_PAGE_S)     # the loop's turn before the page is written out
        return session


def install_handlers() -> None:
    """Serve the page with :class:`GuardedDocHandler` and :class:`GuardedWSHandler` (call before the server
    is made; Bokeh builds each application's routes from this list)."""
    from bokeh.server import urls

    replace = {PanelWSHandler: GuardedWSHandler, PanelDocHandler: GuardedDocHandler}
    urls.per_app_patterns[:] = [(pattern, replace.get(cls, cls), *rest) for pattern, cls, *rest in urls.per_app_patterns]
