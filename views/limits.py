"""Server-wide limits on heavy work, set by ``serve.py`` and read by the page.

``serve.py`` validates its command-line options and writes them to ``FRINGEGAUGE_*``
environment variables before Panel starts, so every session of the same process sees
the same values through :meth:`Limits.from_env`. Running ``panel serve app.py``
directly gives the defaults below.

Where each limit is enforced:

``max_grid_points`` (``FRINGEGAUGE_MAX_GRID_POINTS``): positions x wavelengths of one computation.
    The film map (``views.state.compute_map``) is coarsened on both axes to fit, down to 16 x 16;
    the grating colour map (``views.grating.compute_colour_map``) and a spectrum fit's scan
    (``physics.fit.fit_thickness(max_grid_points=...)``) are refused with a message.
``max_photo_megapixels`` (``FRINGEGAUGE_MAX_PHOTO_MEGAPIXELS``)
    ``views.inverse`` passes it to ``physics.imageio.load_image``, which checks the header's size
    before decoding pixels.
``max_upload_mb`` (``FRINGEGAUGE_MAX_UPLOAD_MB``)
    Every upload handler calls :func:`upload_refusal` (through ``views.uploads.UploadReader``) with its own cap (stack file 1 MB, lamp
    spectrum 2 MB, measured spectrum 20 MB, photo 200 MB), so the smaller of the two applies; the
    photo drop zone also checks in the browser. ``serve.py`` sizes the websocket message limit to it.
``max_jobs_per_session`` / ``max_jobs_server``
    :func:`heavy_job` around photo maps and spectrum fits: refused at once, with a sentence, when the
    page or the server already runs that many; they run in :mod:`views.workers`' pool of exactly
    ``max_jobs_server`` worker processes, while sliders, spectra and the quick maps use
    :func:`interactive_executor` threads, so heavy work never queues in front of them.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping

#: Environment variable prefix shared by serve.py and the page.
ENV_PREFIX = "FRINGEGAUGE_"


def require_positive(settings) -> None:
    """Raise ValueError naming the first field of the dataclass ``settings`` that is not positive."""
    for field in dataclasses.fields(settings):
        value = getattr(settings, field.name)
        if not value > 0:
            raise ValueError(f"{field.name} must be positive, got {value!r}")


@dataclasses.dataclass(frozen=True)
class Limits:
    """Safe defaults for one lab server (2 cores, a few simultaneous users)."""

    #: positions x wavelengths of one computation: the film map is 2.95 M, the grating map 14.9 M
    max_grid_points: int = 20_000_000
    #: a photo map holds about 154 bytes per pixel while it runs (measured on a 4 MP map): 3.7 GB at 24 MP
    max_photo_megapixels: float = 24.0
    max_upload_mb: float = 200.0
    max_jobs_per_session: int = 1
    max_jobs_server: int = 2

    def __post_init__(self):
        require_positive(self)

    @staticmethod
    def env_name(field_name: str) -> str:
        return ENV_PREFIX + field_name.upper()

    def to_env(self) -> dict[str, str]:
        """The environment variables that :meth:`from_env` reads back."""
        return {self.env_name(f.name): repr(getattr(self, f.name)) for f in dataclasses.fields(self)}

    @classmethod
    def from_env(cls, environ: Mapping[str, str] | None = None) -> Limits:
        """Limits from ``FRINGEGAUGE_*`` variables; unset ones keep their defaults.

        A malformed or non-positive value raises ``ValueError`` naming the variable.
        """
        environ = os.environ if environ is None else environ
        values = {}
        for field in dataclasses.fields(cls):
            name = cls.env_name(field.name)
            raw = environ.get(name)
            if raw is None or raw.strip() == "":
                continue
            kind = int if field.type in ("int", int) else float
            try:
                values[field.name] = kind(raw.replace("_", ""))
            except ValueError:
                raise ValueError(f"{name}={raw!r} is not a valid {kind.__name__}") from None
        return cls(**values)


# ---------------------------------------------------------------------- heavy jobs
import contextlib  # noqa: E402
import functools  # noqa: E402
import logging  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402
from concurrent.futures import ThreadPoolExecutor  # noqa: E402

_log = logging.getLogger("fringegauge")
#: Set by ``serve.py --threads``: worker threads for the interactive work of every session.
THREADS_ENV = ENV_PREFIX + "THREADS"
DEFAULT_THREADS = 2
_guard = threading.Lock()
_server_running: list = []                  # kinds of the heavy jobs running now, server-wide
_session_running: dict = {}                 # session key -> kinds running for that page
_interactive: ThreadPoolExecutor | None = None


def interactive_executor() -> ThreadPoolExecutor:
    """Threads for the quick, per-input work of every session (spectra, strips, colour maps, searches).

    Photo maps and fits run in worker processes instead (:mod:`views.workers`), so they never queue in
    front of anybody's slider nor hold the interpreter lock it needs.
    Sized by ``FRINGEGAUGE_THREADS`` (``serve.py --threads``), default 2.
    """
    global _interactive
    raw = os.environ.get(THREADS_ENV, "").strip()
    try:
        workers = max(1, int(raw)) if raw else DEFAULT_THREADS
    except ValueError:
        workers = DEFAULT_THREADS
    with _guard:
        if _interactive is None or _interactive._max_workers != workers:
            if _interactive is not None:
                _interactive.shutdown(wait=False)
            _interactive = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="fringegauge")
        return _interactive


#: Hex digits of a session id's hash kept in keys and log lines: enough to tell pages apart, useless
#: for joining a page (the id itself grants access to a live page, so it is never logged).
SESSION_HASH_CHARS = 12


def session_hash(session_id: str) -> str:
    """A short, one-way name for a Bokeh session id, safe to log and to compare."""
    import hashlib

    return "s-" + hashlib.sha256(str(session_id).encode("utf-8", "surrogatepass")).hexdigest()[:SESSION_HASH_CHARS]


def session_key(fallback: object = None) -> str:
    """A short key for the current page session (a hash of its Bokeh session id, never the id itself),
    or ``id(fallback)`` outside a server."""
    try:
        import panel as pn
        ctx = pn.state.curdoc.session_context if pn.state.curdoc is not None else None
        if ctx is not None:
            return session_hash(ctx.id)
    except Exception:  # pragma: no cover - no Panel state at all
        pass
    return f"local-{id(fallback):x}"


def running_jobs() -> dict:
    """What is running now: ``{"server": [...kinds], "sessions": {key: [...kinds]}}`` (for /health and tests)."""
    with _guard:
        return {"server": list(_server_running), "sessions": {k: list(v) for k, v in _session_running.items()}}


@contextlib.contextmanager
def heavy_job(kind: str, size: int, session: str = "", limits: Limits | None = None):
    """Hold one of the heavy-job places (per page and per server) for a photo map or a fit, and log it.

    Enter it on the event loop *before* handing the work to :mod:`views.workers` and leave it when
    the work is done, so nothing queues: a request over a limit is refused at once with a sentence for
    the user (``physics.InputError``). ``max_jobs_per_session`` counts jobs of one page (``session``);
    ``max_jobs_server`` counts jobs of all pages. One JSON-ready log line per job carries the session,
    kind, size, duration and outcome, never uploaded content.
    """
    from physics import InputError

    limits = limits or Limits.from_env()
    info = {"session": session, "kind": kind, "size": int(size)}
    with _guard:
        mine = _session_running.setdefault(session, [])
        if len(mine) >= limits.max_jobs_per_session:
            busy = ", ".join(k.replace("_", " ") for k in mine)
            refusal = (f"This page is still running a {busy}; this server runs at most "
                       f"{limits.max_jobs_per_session} heavy computation(s) per page at once. "
                       "Wait for it to finish, then try again.")
        elif len(_server_running) >= limits.max_jobs_server:
            refusal = (f"The server is busy with {limits.max_jobs_server} other heavy computation(s); "
                       "try again in a moment.")
        else:
            refusal = None
            mine.append(kind)
            _server_running.append(kind)
        if refusal and not mine:
            del _session_running[session]
    if refusal:
        _log.info("heavy job refused", extra={**info, "outcome": "busy"})
        raise InputError(refusal)
    try:
        with logged_job(kind, size, session):
            yield
    finally:
        with _guard:
            _server_running.remove(kind)
            mine.remove(kind)
            if not mine:
                _session_running.pop(session, None)


@contextlib.contextmanager
def logged_job(kind: str, size: int, session: str = ""):
    """Log one JSON-ready line for a job (session, kind, size, duration, outcome) when it ends.

    Used alone for the page's quick maps, which no limit holds back, and inside :func:`heavy_job`.
    """
    info = {"session": session, "kind": kind, "size": int(size)}
    t0 = time.perf_counter()
    outcome = "ok"
    try:
        yield
    except BaseException as exc:
        outcome = ("error" if isinstance(exc, ValueError) else
                   "cancelled" if isinstance(exc, JobCancelled) else "failed")
        raise
    finally:
        _log.info("heavy job", extra={**info, "duration_s": round(time.perf_counter() - t0, 3), "outcome": outcome})


class JobCancelled(Exception):
    """Raised inside a heavy job whose page has gone or whose request was superseded."""


def check_grid_points(what: str, points: int, limits: Limits | None = None) -> None:
    """Refuse a computation of more than ``max_grid_points`` grid points with a sentence saying what to change."""
    from physics import InputError

    limits = limits or Limits.from_env()
    if points > limits.max_grid_points:
        raise InputError(f"The {what} needs {points:,} grid points; this server allows "
                         f"{limits.max_grid_points:,} per computation. Narrow the range or use fewer points, "
                         "or ask whoever runs the server to raise --max-grid-points.")


#: Bytes in the megabyte of every size the page states: 10**6, as the browser's drop zone (it counts in
#: powers of 1000) and file managers show file sizes.
MB = 1_000_000


def size_text(n_bytes: int) -> str:
    """A size for a message, in MB of 10**6 bytes with at most one decimal: '20 MB', '1.5 MB', '0.3 MB'."""
    mb = f"{n_bytes / MB:,.1f}"
    return (mb[:-2] if mb.endswith(".0") else mb) + " MB"


def upload_cap_bytes(kind_cap_bytes: int, limits: Limits | None = None) -> int:
    """The largest upload of one kind this server takes: the smaller of the kind's own cap and ``max_upload_mb``."""
    limits = limits or Limits.from_env()
    return min(int(kind_cap_bytes), int(limits.max_upload_mb * MB))


def upload_refusal(name: str, n_bytes: int, kind_cap_bytes: int, advice: str = "",
                   limits: Limits | None = None) -> str | None:
    """A sentence refusing an upload larger than :func:`upload_cap_bytes`, else None.

    Sizes are in MB of 10**6 bytes; where the file and the cap round to the same text they are given in bytes.
    """
    cap = upload_cap_bytes(kind_cap_bytes, limits)
    if n_bytes <= cap:
        return None
    big, most = size_text(n_bytes), size_text(cap)
    if big == most:
        big, most = f"{n_bytes:,} bytes", f"{cap:,} bytes"
    return f"{name} is {big}; this server accepts up to {most} for it." + (f" {advice}" if advice else "")


#: Every upload reaches the server in chunks of this size (see views/uploads.py), so no message is large.
UPLOAD_CHUNK_BYTES = 2 * 2**20
#: Largest websocket message the server reads: one upload chunk with room around it. A larger message
#: is refused before it is read (the connection is closed). Uploads come in chunks whatever
#: ``max_upload_mb`` is, so this does not grow with it.
WEBSOCKET_MESSAGE_CAP_BYTES = 4 * 2**20


def served(doc=None) -> bool:
    """True when ``doc`` (default: the current document) belongs to a live browser session, False in a
    plain script or test, or once the server has dropped the page (Bokeh clears its session context)."""
    if doc is None:
        import panel as pn
        doc = pn.state.curdoc
    return doc is not None and doc.session_context is not None


def post_to_page(doc, callback) -> bool:
    """Schedule ``callback`` on the page's next tick; False (and nothing done) if the page has gone."""
    if not served(doc):
        return False
    try:
        doc.add_next_tick_callback(callback)
        return True
    except Exception:                            # the session was destroyed meanwhile
        return False


def quiet_closed_connections(loop=None) -> None:
    """Log a page closed while the server was writing to it as one INFO line, not an asyncio traceback.

    People close tabs at any moment; a result written to the socket in that instant fails with
    Tornado's ``WebSocketClosedError``/``StreamClosedError``, which Panel's direct writes can leave
    unretrieved for asyncio to report as "Task exception was never retrieved". Every other error
    still goes to the loop's own handler. Installing it twice on one loop does nothing.
    """
    import asyncio

    from tornado.iostream import StreamClosedError
    from tornado.websocket import WebSocketClosedError

    loop = loop or asyncio.get_event_loop()
    previous = loop.get_exception_handler()
    if getattr(previous, "quiet_closed_connections", False):
        return

    def handler(loop, context):
        if isinstance(context.get("exception"), (WebSocketClosedError, StreamClosedError)):
            _log.info("a page closed while the server was writing to it")
        elif previous is not None:
            previous(loop, context)
        else:
            loop.default_exception_handler(context)
    handler.quiet_closed_connections = True
    loop.set_exception_handler(handler)


#: Seconds after the last page closed before freed memory is handed back to the system (pages often
#: close in a burst at a shift change; one hand-back covers them all).
GIVE_BACK_DELAY_S = 5.0
_give_back = {"timer": None}
_give_back_lock = threading.Lock()


def page_closed(session_context) -> None:
    """Bokeh destroyed a page's session (its tab closed a while ago): let its memory go back.

    Registered with ``pn.state.on_session_destroyed``; it lives here, not in app.py, because Bokeh
    has discarded the page's own module by the time it calls this.
    """
    give_back_memory_soon()


def give_back_memory_soon() -> bool:
    """After a page's session is destroyed: return the C heap's free pages to the system shortly after.

    Python frees a closed page's objects at once, but glibc's allocator keeps the freed pages mapped
    for reuse, so the server's resident memory stays at its busiest level. ``malloc_trim(0)`` hands
    them back (in a background thread, once per burst of closes). Does nothing, and returns False,
    where the C library is not glibc.
    """
    trim = _malloc_trim()
    if trim is None:
        return False
    with _give_back_lock:
        if _give_back["timer"] is not None:
            _give_back["timer"].cancel()
        timer = threading.Timer(GIVE_BACK_DELAY_S, _collect_and_trim, args=(trim,))
        timer.daemon = True
        timer.name = "fringegauge-give-back-memory"
        _give_back["timer"] = timer
        timer.start()
    return True


def _collect_and_trim(trim) -> None:
    import gc

    t0 = time.perf_counter()
    collected = gc.collect()             # a closed page's objects in reference cycles, so their pages free up
    t1 = time.perf_counter()
    trim(0)
    _log.info("memory handed back", extra={"objects_collected": collected, "gc_s": round(t1 - t0, 3),
                                          "trim_s": round(time.perf_counter() - t1, 3)})


@functools.lru_cache(maxsize=1)
def _malloc_trim():
    """glibc's ``malloc_trim`` (looked up once: ``platform.libc_ver`` reads the interpreter's binary)."""
    import ctypes
    import platform

    if platform.libc_ver()[0] != "glibc":
        return None
    try:
        return ctypes.CDLL("libc.so.6").malloc_trim
    except (OSError, AttributeError):
        return None
