"""How many pages the server holds, for whom, and for how long a page may wait for its browser.

Each ``GET /app`` builds a whole page on the event loop (about 0.5 s of CPU and 15-20 MB that stay
until the page is freed). Without limits, a client that only sends ``GET /app`` fills the memory
and the loop. :class:`SessionGuard` decides, before a page is built, whether it may be:

- at most ``max_sessions`` pages in the server and ``max_per_address`` per client address
  (open and still being built), of which at most ``max_waiting_per_address`` not yet joined by their
  browser, and none while the address is over its share of the loop (below);
- page opens per address come from a bucket of ``burst`` that refills at ``opens_per_minute``;
- a page whose websocket has not connected ``connect_within_s`` after it was built is freed
  (a browser connects within a second or two of receiving the page);
- pages are built one at a time, with a breath for the loop after each (:meth:`SessionGuard.building`);
- at most ``max_connections_per_session`` websockets per page and ``max_connections_per_address``
  per address;
- each address has a share of the event loop: ``loop_share`` seconds of loop time per second after
  a burst of ``loop_burst_s`` (:meth:`SessionGuard.charge`, :meth:`SessionGuard.loop_wait_s`).

A refused page gets HTTP 503 with a sentence saying the server is full and what to do. Every
record is keyed by a hash of the session id (:func:`views.limits.session_hash`): the id itself
grants access to a live page and is never logged.

All methods run on the event loop's thread (Tornado handlers and a periodic callback), so the
guard needs no lock; its tables are bounded by the limits themselves.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import logging
import time

from views.limits import require_positive, session_hash

__all__ = ["SessionLimits", "SessionGuard", "Refusal"]

_log = logging.getLogger("fringegauge")

#: How often the sweeper looks for pages whose browser never connected (s).
SWEEP_EVERY_S = 1.0
#: After building a page, the next build waits this fraction of the build's time (at most
#: BREATH_MAX_S): a request that arrived meanwhile (another page's message, /health) needs a few
#: turns of the loop, and back-to-back builds would leave it none.
BREATH_FRACTION = 0.5
BREATH_MAX_S = 0.5
#: Client addresses whose page-open bucket is remembered; beyond it the fullest buckets are forgotten
#: (a full bucket is the same as a new one, so forgetting it loses nothing).
MAX_TRACKED_ADDRESSES = 10_000


@dataclasses.dataclass(frozen=True)
class SessionLimits:
    """Named limits on pages, with defaults for a 2-core lab machine (about 18 MB per open page)."""

    #: pages in the whole server: 60 x 18 MB is about 1.1 GB
    max_sessions: int = 60
    #: pages per client address: a station with several tabs; raise it behind a proxy or a NAT
    max_per_address: int = 12
    #: page opens per address and minute, after a burst of ``burst``: a person opens the page a few times
    #: a shift; each open costs the server about 0.75 s of interpreter time (measured on 2 cores)
    opens_per_minute: float = 6.0
    burst: int = 4
    #: pages of one address built but not yet joined by their browser: a browser joins within seconds, so
    #: only a client that opens pages and never connects has more (each cost the loop a page build)
    max_waiting_per_address: int = 3
    #: seconds a built page waits for its browser's websocket before it is freed: a browser connects
    #: within a second or two of receiving the page, a few more while the server builds others' pages
    connect_within_s: float = 15.0
    #: websockets on one page (a reconnect overlaps the old connection for a moment)
    max_connections_per_session: int = 3
    #: websockets per client address
    max_connections_per_address: int = 36
    #: seconds of event-loop time per second one address may use once its burst is spent: a person
    #: dragging a slider uses about 0.06 (12 ms a move, five moves a second); opening a tab or reading an
    #: upload is a burst of under a second
    loop_share: float = 0.25
    loop_burst_s: float = 3.0

    def __post_init__(self):
        require_positive(self)


@dataclasses.dataclass
class _Page:
    key: str                  # hash of the session id
    address: str
    owner: str                # the login that built it ("" without logins)
    built_at: float
    sockets: set = dataclasses.field(default_factory=set)
    ever_connected: bool = False


@dataclasses.dataclass(frozen=True)
class Refusal:
    """Why a page or a connection was refused: ``status`` (HTTP) and a sentence for the person."""

    status: int
    message: str
    reason: str               # short word for the log


class Reservation:
    """A page slot held while the page is built; :meth:`bind` it to the session or :meth:`release` it."""

    def __init__(self, guard: SessionGuard, address: str):
        self._guard, self.address, self._open = guard, address, True

    def bind(self, session_id: str, owner: str) -> None:
        if self._open:
            self._open = False
            self._guard._bind(self, str(session_id), owner)

    def release(self, refund: bool = False) -> None:
        """Give the slot back; ``refund`` also returns the page-open token (no page was built)."""
        if self._open:
            self._open = False
            self._guard._pending[self.address] -= 1
            if not self._guard._pending[self.address]:
                del self._guard._pending[self.address]
            if refund:
                self._guard._refund(self.address)


class SessionGuard:
    """The page and connection limits of one server (see the module docstring)."""

    def __init__(self, limits: SessionLimits | None = None, clock=time.monotonic):
        self.limits = limits or SessionLimits()
        self._clock = clock
        self._pages: dict[str, _Page] = {}            # session id -> page
        self._pending: dict[str, int] = {}            # address -> pages being built
        self._buckets: dict[str, tuple[float, float]] = {}   # address -> (tokens, at)
        self._connections: dict[str, int] = {}        # address -> open websockets
        self._loop_use: dict[str, tuple[float, float]] = {}  # address -> (seconds owed, at)
        self._timer = None
        self._building = None                          # asyncio.Lock, made on the loop
        self.refused = 0

    # ------------------------------------------------------------------ pages
    def _count(self, address: str) -> tuple[int, int]:
        mine = sum(1 for p in self._pages.values() if p.address == address) + self._pending.get(address, 0)
        return len(self._pages) + sum(self._pending.values()), mine

    def _waiting(self, address: str) -> int:
        return self._pending.get(address, 0) + sum(1 for p in self._pages.values()
                                                   if p.address == address and not p.ever_connected)

    def _tokens(self, address: str) -> float:
        lim = self.limits
        tokens, at = self._buckets.get(address, (float(lim.burst), self._clock()))
        now = self._clock()
        return min(float(lim.burst), tokens + (now - at) * lim.opens_per_minute / 60.0)

    def _take_token(self, address: str) -> bool:
        tokens = self._tokens(address)
        if tokens < 1.0:
            return False
        self._buckets[address] = (tokens - 1.0, self._clock())
        if len(self._buckets) > MAX_TRACKED_ADDRESSES:
            self._forget_full_buckets()
        return True

    def _refund(self, address: str) -> None:
        self._buckets[address] = (min(float(self.limits.burst), self._tokens(address) + 1.0), self._clock())

    def _forget_full_buckets(self) -> None:
        for address in [a for a in self._buckets if self._tokens(a) >= self.limits.burst]:
            del self._buckets[address]
        while len(self._buckets) > MAX_TRACKED_ADDRESSES:            # all busy: drop the oldest
            del self._buckets[next(iter(self._buckets))]

    def reserve(self, address: str) -> Reservation | Refusal:
        """A slot for a new page from ``address``, or why not (and nothing held)."""
        lim = self.limits
        total, mine = self._count(address)
        if total >= lim.max_sessions:
            refusal = Refusal(503, f"The server is full: {lim.max_sessions} pages are open, its limit. Close a "
                                   "tab of this page you no longer use, or try again in a few minutes; if this "
                                   "happens often, ask whoever runs the server to raise --max-sessions.", "full")
        elif mine >= lim.max_per_address:
            refusal = Refusal(503, f"The server is full for this computer: {lim.max_per_address} pages are open "
                                   "from its address, the limit per address. Close tabs of this page you no longer "
                                   "use, or try again in a few minutes.", "full for address")
        elif self._waiting(address) >= lim.max_waiting_per_address:
            refusal = Refusal(503, "This computer has pages that have not connected to the server yet; the "
                                   "server is full for it for a moment. Wait a few seconds and reload.",
                              "pages waiting for their browser")
        elif (wait_s := self.loop_wait_s(address)) > 0:
            refusal = Refusal(503, "This computer has kept the server busy; the server is full for it for a "
                                   f"moment. Wait {max(1, round(wait_s))} s and reload.", "over its share of the loop")
        elif not self._take_token(address):
            wait_s = max(1, round(60.0 / lim.opens_per_minute))
            refusal = Refusal(503, "This computer has opened the page many times in a short while; the server is "
                                   f"full for it for a moment. Wait {wait_s} s and reload.", "opening too often")
        else:
            self._pending[address] = self._pending.get(address, 0) + 1
            return Reservation(self, address)
        self.refused += 1
        _log.warning("page refused", extra={"client": address, "reason": refusal.reason})
        return refusal

    def _bind(self, reservation: Reservation, session_id: str, owner: str) -> None:
        address = reservation.address
        self._pending[address] -= 1
        if not self._pending[address]:
            del self._pending[address]
        self._pages[session_id] = _Page(session_hash(session_id), address, owner, self._clock())

    def page_owner(self, session_id: str) -> str | None:
        """The login that built the page ``session_id`` ("" without logins), or None when this server did not
        build it or has freed it."""
        page = self._pages.get(str(session_id))
        return None if page is None else page.owner

    def close_pages_of(self, owner: str) -> int:
        """Close every websocket of the pages ``owner`` built (its login ended); how many pages had one."""
        closed = 0
        for page in self._pages.values():
            if page.owner == owner and page.sockets:
                closed += 1
                for socket in list(page.sockets):
                    socket.close(4004, "You have logged out; log in again to open the page.")
        return closed

    def forget(self, session_id: str) -> None:
        """The page has been freed (Bokeh destroyed its session)."""
        self._pages.pop(str(session_id), None)

    def open_pages(self) -> int:
        return len(self._pages)

    @contextlib.asynccontextmanager
    async def building(self):
        """Build one page at a time: pages are built on the event loop, each in one piece; between two
        builds the loop gets a breath for everything else that is waiting."""
        if self._building is None:
            self._building = asyncio.Lock()
        async with self._building:
            t0 = time.perf_counter()
            try:
                yield
            finally:
                await asyncio.sleep(min(BREATH_MAX_S, BREATH_FRACTION * (time.perf_counter() - t0)))

    # ------------------------------------------------------------------ websockets
    def connect(self, session_id: str, address: str, socket) -> Refusal | None:
        """The websocket ``socket`` of ``address`` joins the page ``session_id``; None when allowed (and counted)."""
        page = self._pages.get(str(session_id))
        if page is None:
            return Refusal(4001, "This page has expired; reload it.", "no such page")
        if len(page.sockets) >= self.limits.max_connections_per_session:
            return Refusal(4002, "This page is already open in too many connections.", "too many connections")
        if self._connections.get(address, 0) >= self.limits.max_connections_per_address:
            return Refusal(4002, "This computer has too many connections to the server.", "too many connections")
        page.sockets.add(socket)
        page.ever_connected = True
        self._connections[address] = self._connections.get(address, 0) + 1
        return None

    def disconnect(self, session_id: str, address: str, socket) -> None:
        page = self._pages.get(str(session_id))
        if page is not None:
            page.sockets.discard(socket)
        left = self._connections.get(address, 0) - 1
        if left > 0:
            self._connections[address] = left
        else:
            self._connections.pop(address, None)

    # ------------------------------------------------------------------ share of the event loop
    def _owed(self, address: str) -> float:
        owed, at = self._loop_use.get(address, (0.0, self._clock()))
        return max(0.0, owed - (self._clock() - at) * self.limits.loop_share)

    def charge(self, address: str, loop_s: float) -> None:
        """``address`` has just used ``loop_s`` seconds of the event loop."""
        owed = self._owed(address) + max(0.0, loop_s)
        if owed > 0:
            self._loop_use[address] = (owed, self._clock())
        else:
            self._loop_use.pop(address, None)
        if len(self._loop_use) > MAX_TRACKED_ADDRESSES:
            for a in [a for a in self._loop_use if self._owed(a) == 0]:
                del self._loop_use[a]

    def loop_wait_s(self, address: str) -> float:
        """How long the next message of ``address`` must wait for its share of the loop (0: at once)."""
        over = self._owed(address) - self.limits.loop_burst_s
        return over / self.limits.loop_share if over > 0 else 0.0

    # ------------------------------------------------------------------ the sweeper
    def never_connected(self) -> list[str]:
        """Session ids of pages whose browser has not connected within ``connect_within_s`` of being built."""
        now = self._clock()
        return [sid for sid, p in self._pages.items()
                if not p.ever_connected and now - p.built_at > self.limits.connect_within_s]

    def start(self, tornado_app) -> None:
        """Sweep ``tornado_app``'s sessions every :data:`SWEEP_EVERY_S` on the current loop."""
        from tornado.ioloop import PeriodicCallback

        async def sweep():
            try:
                await self._sweep(tornado_app)
            except Exception:                        # the sweeper must outlive any surprise
                _log.exception("session sweep failed")

        self._timer = PeriodicCallback(sweep, SWEEP_EVERY_S * 1000)
        self._timer.start()

    async def _sweep(self, tornado_app) -> None:
        contexts = list(tornado_app._applications.values())
        live = {s.id: (ctx, s) for ctx in contexts for s in ctx.sessions}
        for sid in [sid for sid in self._pages if sid not in live]:
            self.forget(sid)                              # Bokeh freed it (idle timeout)
        for sid in self.never_connected():
            ctx, session = live[sid]
            self.forget(sid)
            if session.connection_count == 0:
                _log.info("page freed: its browser never connected", extra={"session": session_hash(sid)})
                await ctx._discard_session(session, lambda s: s.connection_count == 0)

    def stop(self) -> None:
        if self._timer is not None:
            self._timer.stop()
