"""Serve fringegauge for a lab: ``python serve.py --help``.

Starts the page (``app.py`` next to this file) with ``panel.serve`` in this process,
so it works from any working directory. ``panel.serve`` is used rather than the
``panel serve`` command line because it takes Tornado handlers directly (the
``/health`` endpoint) and receives the password and cookie secret in memory, never on
a command line where other users of the machine could read them.

The server's protections live in :mod:`labserver` (routes, websocket bounds, page limits,
login) and :mod:`views.limits` (heavy work); this file reads the options and puts them together.
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime
import gc
import json
import logging
import os
import secrets
import signal
import socket
import sys
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent
APP_PATH = ROOT / "app.py"
COOKIE_SECRET_ENV = "FRINGEGAUGE_COOKIE_SECRET"
LIBRARY_ENV = "FRINGEGAUGE_LIBRARY"
#: Identity providers Panel's OAuth support knows by name.
OAUTH_PROVIDERS = ("azure", "bitbucket", "github", "gitlab", "google", "okta", "generic", "password", "auth_code")
#: Shortest cookie secret accepted (characters).
MIN_COOKIE_SECRET_CHARS = 32
#: How often Panel looks for sessions whose browser has gone (ms).
CHECK_UNUSED_MS = 17_000
#: Largest HTTP request body: the page sends nothing over plain HTTP but the login form (uploads go
#: through the websocket in chunks), so a large body is never legitimate.
MAX_REQUEST_BODY_BYTES = 64 * 1024
#: Seconds an HTTP connection may sit idle, and a request body may take, before it is closed (a
#: client that opens connections and sends nothing would otherwise hold them for an hour).
IDLE_CONNECTION_S = 60
BODY_TIMEOUT_S = 30
#: Environment variable telling the page how users are known: off, shared, users or oauth.
AUTH_ENV = "FRINGEGAUGE_AUTH"

if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from labserver.login import DEFAULT_LOGIN_HOURS, read_password_file  # noqa: E402
from library.store import DEFAULT_KEY_FILE, DEFAULT_ROOT, KEY_FILE_ENV, load_or_create_key, prepare_root  # noqa: E402
from labserver.sessions import SessionLimits  # noqa: E402
from views.limits import THREADS_ENV, WEBSOCKET_MESSAGE_CAP_BYTES, Limits  # noqa: E402

log = logging.getLogger("fringegauge")

# ---------------------------------------------------------------------------- logging

_RECORD_FIELDS = set(vars(logging.LogRecord("", 0, "", 0, "", (), None))) | {"message", "asctime"}


class JsonFormatter(logging.Formatter):
    """One JSON object per line: timestamp, level, logger, message and any ``extra`` fields."""

    def format(self, record: logging.LogRecord) -> str:
        out = {
            "timestamp": datetime.datetime.fromtimestamp(record.created, datetime.timezone.utc)
            .isoformat(timespec="milliseconds"),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        for key, value in vars(record).items():
            if key not in _RECORD_FIELDS and not key.startswith("_"):
                out[key] = value
        if record.exc_info:
            out["exception"] = self.formatException(record.exc_info)
        return json.dumps(out, default=str)


#: Loggers of the libraries the server runs on, which bring their own plain-text handlers.
LIBRARY_LOGGERS = ("bokeh", "panel", "tornado")


def configure_logging(level: int = logging.INFO) -> None:
    """Send every log line to stderr as JSON: the ``fringegauge`` logger at ``level``, the libraries'
    loggers and Python warnings at WARNING and above (messages only, no request bodies)."""
    import bokeh  # noqa: F401  (both add their own handlers when imported: replace them after)
    import panel  # noqa: F401

    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    log.handlers[:] = [handler]
    log.setLevel(level)
    log.propagate = False
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(logging.WARNING)
    for name in LIBRARY_LOGGERS:
        lib = logging.getLogger(name)
        lib.handlers[:] = []
        lib.setLevel(logging.NOTSET)
        lib.propagate = True
    logging.captureWarnings(True)


# ---------------------------------------------------------------------------- options

def _int_in(lo: int, hi: int | None = None):
    def parse(text: str) -> int:
        try:
            value = int(text.replace("_", ""))
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
        if value < lo or (hi is not None and value > hi):
            span = f"between {lo} and {hi}" if hi is not None else f"at least {lo}"
            raise argparse.ArgumentTypeError(f"{value} must be {span}")
        return value
    return parse


def _positive_float(text: str) -> float:
    try:
        value = float(text.replace("_", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not value > 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"{text} must be a positive number")
    return value


def _fraction(text: str) -> float:
    value = _positive_float(text)
    if value > 1:
        raise argparse.ArgumentTypeError(f"{text} must be a fraction between 0 and 1")
    return value


class _HelpFormatter(argparse.ArgumentDefaultsHelpFormatter):
    """Show defaults, except for options that are off unless given."""

    def _get_help_string(self, action):
        return action.help if action.default is None else super()._get_help_string(action)


def build_parser() -> argparse.ArgumentParser:
    d, s = Limits(), SessionLimits()
    p = argparse.ArgumentParser(
        prog="python serve.py",
        description="Serve the fringegauge page (http://HOST:PORT/app) for a lab.",
        formatter_class=_HelpFormatter)
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on: 127.0.0.1 for this machine only, 0.0.0.0 to serve the lab network")
    p.add_argument("--port", type=_int_in(1, 65535), default=5006, help="TCP port to listen on")
    p.add_argument("--allow-origin", action="append", metavar="HOST[:PORT]",
                   help="host[:port] browsers use to reach the page (repeatable); default HOST:PORT, "
                        "plus localhost:PORT on loopback or this machine's names on 0.0.0.0")
    p.add_argument("--threads", type=_int_in(1, 64), default=2,
                   help="worker threads shared by all pages for quick work (spectra, strips, film and grating maps); photo maps and fits get their own --max-jobs-server threads")
    p.add_argument("--library", type=Path, default=DEFAULT_ROOT,
                   help="folder for the shared library (created if missing; relative to the current directory)")
    p.add_argument("--library-key-file", metavar="KEY_FILE", type=Path,
                   help=f"file holding the key that signs the library's metadata, made at first start (mode 0600); "
                        f"outside the library folder. Default: ${KEY_FILE_ENV}, else ~/{DEFAULT_KEY_FILE}. "
                        "Back it up apart from the library: without it saved items show as not written by this server "
                        "until `python -m library sign` accepts them again")
    p.add_argument("--basic-auth", metavar="PASSWORD_FILE", type=Path,
                   help="turn on a login page; the file holds one shared password, or a JSON object "
                        "{\"user\": \"password\", ...}. Off by default. The password is never printed or logged")
    p.add_argument("--oauth-provider", choices=OAUTH_PROVIDERS,
                   help="log in through the lab's identity provider with Panel's OAuth support instead of "
                        "--basic-auth; the client id and secret come from the environment variables "
                        "PANEL_OAUTH_KEY and PANEL_OAUTH_SECRET (never the command line), provider options from "
                        "PANEL_OAUTH_EXTRA_PARAMS; needs a cookie secret")
    p.add_argument("--oauth-redirect-uri", metavar="URL",
                   help="the address the identity provider sends users back to, e.g. https://HOST:PORT/app")
    p.add_argument("--cookie-secret-file", metavar="FILE", type=Path,
                   help=f"file holding the secret that signs login cookies (at least {MIN_COOKIE_SECRET_CHARS} "
                        f"characters); or set {COOKIE_SECRET_ENV}. Without it a random one is made at each start, "
                        "so logins end when the server restarts")
    p.add_argument("--idle-timeout-s", type=_positive_float, default=900.0,
                   help="seconds after the browser goes away before a session and its memory are freed")
    p.add_argument("--tls-cert", metavar="CERT_FILE", type=Path,
                   help="serve https with this certificate (PEM, with its chain); needs --tls-key")
    p.add_argument("--tls-key", metavar="KEY_FILE", type=Path,
                   help="the certificate's private key (PEM); keep it readable only by the server's account")
    p.add_argument("--login-hours", type=_positive_float, default=DEFAULT_LOGIN_HOURS,
                   help="hours a --basic-auth login lasts before the person logs in again")
    p.add_argument("--max-sessions", type=_int_in(1), default=s.max_sessions,
                   help="open pages the server holds in all (each keeps about 18 MB until its tab has been "
                        "closed for --idle-timeout-s); beyond it people are told the server is full")
    p.add_argument("--max-sessions-per-address", type=_int_in(1), default=s.max_per_address,
                   help="open pages from one client address (raise it behind a proxy or NAT, where many "
                        "people share one address)")
    p.add_argument("--page-opens-per-minute", type=_positive_float, default=s.opens_per_minute,
                   help=f"page opens per client address and minute, after a burst of {s.burst}")
    p.add_argument("--pages-waiting-per-address", type=_int_in(1), default=s.max_waiting_per_address,
                   help="pages of one client address built but not yet joined by their browser (a browser joins "
                        "within seconds; a client that opens pages and never connects is held here)")
    p.add_argument("--loop-share-per-address", type=_fraction, default=s.loop_share,
                   help="fraction of the server's event loop (the one thread that applies every page's changes) "
                        "one client address may keep busy once a burst is spent; its further changes then wait "
                        "(1 lets one address take it all)")
    p.add_argument("--max-grid-points", type=_int_in(1), default=d.max_grid_points,
                   help="largest number of grid points (positions x wavelengths) one computation may evaluate; the film map is coarsened to fit, other computations are refused with a message")
    p.add_argument("--max-photo-megapixels", type=_positive_float, default=d.max_photo_megapixels,
                   help="largest photo (megapixels) accepted for colour → thickness")
    p.add_argument("--max-upload-mb", type=_positive_float, default=d.max_upload_mb,
                   help="largest uploaded file (MB)")
    p.add_argument("--max-jobs-per-session", type=_int_in(1), default=d.max_jobs_per_session,
                   help="heavy jobs (photo maps, spectrum fits) one browser page may run at once")
    p.add_argument("--max-jobs-server", type=_int_in(1), default=d.max_jobs_server,
                   help="heavy jobs running across all pages (and threads for them) before users are told the server is busy")
    p.add_argument("--log-level", default="INFO", choices=["DEBUG", "INFO", "WARNING", "ERROR"],
                   help="level of the JSON log lines written to stderr")
    return p


def default_origins(host: str, port: int) -> list[str]:
    origins = [f"{host}:{port}"]
    if host in ("127.0.0.1", "localhost", "::1"):
        origins.append(f"localhost:{port}")
    elif host in ("0.0.0.0", "::"):
        names = {socket.gethostname(), socket.getfqdn(), "localhost", "127.0.0.1"}
        origins.extend(f"{n}:{port}" for n in sorted(names) if n)
    return list(dict.fromkeys(origins))


def read_basic_auth(path: Path):
    """The password (str) or {user: password} from *path*; raises ValueError without echoing content."""
    return read_password_file(path)


def read_cookie_secret(path: Path | None) -> str | None:
    env = os.environ.get(COOKIE_SECRET_ENV, "").strip()
    if path is not None and env:
        raise ValueError(f"give the cookie secret either with --cookie-secret-file or {COOKIE_SECRET_ENV}, not both")
    if path is not None:
        try:
            secret = path.read_text(encoding="utf-8").strip()
        except OSError as exc:
            raise ValueError(f"cannot read cookie secret file {path}: {exc.strerror}") from None
        source = str(path)
    else:
        secret, source = env, COOKIE_SECRET_ENV
    if not secret:
        if path is not None:
            raise ValueError(f"cookie secret file {path} is empty")
        return None
    if len(secret) < MIN_COOKIE_SECRET_CHARS:
        raise ValueError(f"the cookie secret from {source} is shorter than {MIN_COOKIE_SECRET_CHARS} characters")
    return secret


@dataclasses.dataclass
class Settings:
    host: str
    port: int
    origins: list[str]
    threads: int
    library: Path
    basic_auth: object
    cookie_secret: str | None
    oauth_provider: str | None
    oauth_redirect_uri: str | None
    idle_timeout_s: float
    limits: Limits
    log_level: str
    sessions: SessionLimits = dataclasses.field(default_factory=SessionLimits)
    tls_cert: Path | None = None
    tls_key: Path | None = None
    login_hours: float = DEFAULT_LOGIN_HOURS
    library_notes: list = dataclasses.field(default_factory=list)

    @property
    def tls(self) -> bool:
        return self.tls_cert is not None

    @property
    def auth_mode(self) -> str:
        """How users are known: "off", "shared" (one password, names typed), "users" (a password each) or "oauth"."""
        if self.basic_auth is not None:
            return "users" if isinstance(self.basic_auth, dict) else "shared"
        return "oauth" if self.oauth_provider else "off"

    def describe(self) -> dict:
        """What is safe to log: no password, no secret."""
        return {"host": self.host, "port": self.port, "allow_origin": self.origins, "threads": self.threads,
                "library": str(self.library), "auth": ("basic" if self.basic_auth else f"oauth:{self.oauth_provider}" if self.oauth_provider
                                                                  else "off"),
                "auth_mode": self.auth_mode, "tls": self.tls,
                "cookie_secret": "given" if self.cookie_secret else ("random per start" if self.basic_auth else "unused"),
                "idle_timeout_s": self.idle_timeout_s, **dataclasses.asdict(self.limits),
                **{f"sessions_{k}": v for k, v in dataclasses.asdict(self.sessions).items()}}


def parse_settings(argv=None) -> Settings:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        basic_auth = read_basic_auth(args.basic_auth) if args.basic_auth else None
        cookie_secret = read_cookie_secret(args.cookie_secret_file)
        if args.oauth_provider:
            if basic_auth:
                raise ValueError("choose either --basic-auth or --oauth-provider, not both")
            missing = [v for v in ("PANEL_OAUTH_KEY", "PANEL_OAUTH_SECRET") if not os.environ.get(v)]
            if missing:
                raise ValueError(f"--oauth-provider needs the environment variable(s) {', '.join(missing)} "
                                 "(the client id and secret registered with the identity provider)")
            if not cookie_secret:
                raise ValueError(f"--oauth-provider needs a cookie secret: --cookie-secret-file or {COOKIE_SECRET_ENV}")
        limits = Limits(max_grid_points=args.max_grid_points, max_photo_megapixels=args.max_photo_megapixels,
                        max_upload_mb=args.max_upload_mb, max_jobs_per_session=args.max_jobs_per_session,
                        max_jobs_server=args.max_jobs_server)
        sessions = dataclasses.replace(SessionLimits(), max_sessions=args.max_sessions,
                                       max_per_address=min(args.max_sessions_per_address, args.max_sessions),
                                       opens_per_minute=args.page_opens_per_minute,
                                       max_connections_per_address=3 * args.max_sessions_per_address,
                                       loop_share=args.loop_share_per_address,
                                       max_waiting_per_address=args.pages_waiting_per_address)
        tls_cert, tls_key = check_tls_files(args.tls_cert, args.tls_key)
        library = args.library.expanduser().resolve()
        library_notes = prepare_root(library)          # makes it on first start, cleans what a killed save left
        if args.library_key_file is not None:
            os.environ[KEY_FILE_ENV] = str(args.library_key_file.expanduser().resolve())
        load_or_create_key(library_root=library)        # an unusable key stops the start, not the first save
    except ValueError as exc:
        parser.error(str(exc))
    origins = args.allow_origin or default_origins(args.host, args.port)
    return Settings(host=args.host, port=args.port, origins=origins, threads=args.threads, library=library,
                    basic_auth=basic_auth, cookie_secret=cookie_secret, oauth_provider=args.oauth_provider,
                    oauth_redirect_uri=args.oauth_redirect_uri, idle_timeout_s=args.idle_timeout_s,
                    limits=limits, log_level=args.log_level, sessions=sessions, tls_cert=tls_cert, tls_key=tls_key,
                    login_hours=args.login_hours, library_notes=library_notes)


def check_tls_files(cert: Path | None, key: Path | None):
    """Both TLS files or neither, each a readable PEM file that loads as a pair; raises ValueError."""
    if cert is None and key is None:
        return None, None
    if cert is None or key is None:
        raise ValueError("give both --tls-cert and --tls-key, or neither")
    import ssl

    cert, key = cert.expanduser().resolve(), key.expanduser().resolve()
    for path, what in ((cert, "--tls-cert"), (key, "--tls-key")):
        if not path.is_file():
            raise ValueError(f"{what} {path} is not a file")
    try:
        ssl.create_default_context(ssl.Purpose.CLIENT_AUTH).load_cert_chain(certfile=str(cert), keyfile=str(key))
    except (ssl.SSLError, OSError) as exc:
        raise ValueError(f"--tls-cert and --tls-key do not load as a certificate and its key "
                         f"({getattr(exc, 'reason', None) or exc.__class__.__name__})") from None
    return cert, key


# ---------------------------------------------------------------------------- health

def health_handler(started: float):
    import tornado.web

    class HealthHandler(tornado.web.RequestHandler):
        """GET /health → {"status", "sessions", "max_sessions", "heavy_jobs", "max_jobs_server", "workers",
        "uptime_s"}; no login needed, no page state. ``heavy_jobs`` is the number of photo maps and fits running
        now; ``workers`` the state of the processes that run them (``views.workers.status``). Status "ok" while
        everything works; "degraded" when a worker slot keeps failing to start, with HTTP 503 once no worker can
        run photo maps and fits at all (the pages still answer), HTTP 200 otherwise."""

        def get(self):
            app = self.application  # the BokehTornado application serving the page
            try:
                sessions = sum(len(app.get_sessions(path)) for path in app.app_paths)
            except Exception:
                sessions = None
            from views import workers
            from views.limits import running_jobs
            worker_state = workers.status()
            degraded = worker_state.get("state") == "degraded"
            cannot_run = degraded and not worker_state.get("alive")
            guard = getattr(app, "fringegauge_sessions", None)
            self.set_status(503 if cannot_run else 200)
            self.set_header("Content-Type", "application/json")
            self.set_header("Cache-Control", "no-store")
            self.write(json.dumps({"status": "degraded" if degraded else "ok", "sessions": sessions,
                                   "max_sessions": guard.limits.max_sessions if guard is not None else None,
                                   "heavy_jobs": len(running_jobs()["server"]),
                                   "max_jobs_server": Limits.from_env().max_jobs_server,
                                   "workers": worker_state,
                                   "uptime_s": round(time.monotonic() - started, 1)}))

    return HealthHandler


# ---------------------------------------------------------------------------- start

def raise_open_file_limit() -> int:
    """Raise this process's limit on open files to the system's hard limit (each open page and each
    waiting connection holds one); returns the limit now in force."""
    try:
        import resource
    except ImportError:                                  # pragma: no cover - not POSIX
        return -1
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if hard == resource.RLIM_INFINITY or hard > soft:
        target = 65_536 if hard == resource.RLIM_INFINITY else hard
        try:
            resource.setrlimit(resource.RLIMIT_NOFILE, (target, hard))
            soft = target
        except (ValueError, OSError):
            pass
    return soft


def server_options(settings: Settings, started: float, cookie_secret: str | None, login) -> dict:
    """Everything handed to ``panel.serve``: the page's routes, the session and websocket settings, TLS."""
    from labserver.login import EXCLUDED_COOKIES

    options = dict(
        port=settings.port, address=settings.host, websocket_origin=settings.origins,
        show=False, start=False, verbose=False, threaded=False,
        warm=True,                       # build one page at start: the first person's page needs no imports
        extra_patterns=[(r"/health", health_handler(started))],
        unused_session_lifetime_milliseconds=int(settings.idle_timeout_s * 1000),
        check_unused_sessions_milliseconds=min(CHECK_UNUSED_MS, int(settings.idle_timeout_s * 1000)),
        websocket_max_message_size=WEBSOCKET_MESSAGE_CAP_BYTES,
        # session ids signed with a key made at each start: only this server's pages carry valid ones
        sign_sessions=True, secret_key=secrets.token_bytes(32), generate_session_ids=True,
        exclude_cookies=list(EXCLUDED_COOKIES),
        http_server_kwargs=dict(max_body_size=MAX_REQUEST_BODY_BYTES, idle_connection_timeout=IDLE_CONNECTION_S,
                                body_timeout=BODY_TIMEOUT_S),
    )
    if login is not None:
        options["auth_provider"] = login.provider()
    if settings.oauth_provider:            # key and secret: Panel reads PANEL_OAUTH_KEY / PANEL_OAUTH_SECRET
        options["oauth_provider"] = settings.oauth_provider
        if settings.oauth_redirect_uri:
            options["oauth_redirect_uri"] = settings.oauth_redirect_uri
    if cookie_secret:
        options["cookie_secret"] = cookie_secret
    if settings.tls:
        options["ssl_certfile"], options["ssl_keyfile"] = str(settings.tls_cert), str(settings.tls_key)
    return options


def _on_loopback(host: str) -> bool:
    return host in ("127.0.0.1", "localhost", "::1")


def main(argv=None) -> int:
    settings = parse_settings(argv)
    configure_logging(getattr(logging, settings.log_level))
    os.environ.update(settings.limits.to_env())
    os.environ[LIBRARY_ENV] = str(settings.library)
    os.environ[THREADS_ENV] = str(settings.threads)
    os.environ[AUTH_ENV] = settings.auth_mode
    started = time.monotonic()
    open_files = raise_open_file_limit()
    for note in settings.library_notes:
        log.info(note)

    import panel as pn
    from tornado.ioloop import IOLoop

    from labserver.login import Credentials, LabLogin
    from labserver.routes import restrict_routes
    from labserver.sessions import SessionGuard
    from labserver.stalls import StallWatch
    from labserver.websocket import install_handlers

    cookie_secret = settings.cookie_secret
    if settings.basic_auth and not cookie_secret:
        cookie_secret = secrets.token_urlsafe(32)
        log.warning("no cookie secret given: using a random one, so logins end when the server restarts")
    login = None
    if settings.basic_auth is not None:
        login = LabLogin(Credentials.from_file_content(settings.basic_auth), tls=settings.tls,
                         origins=settings.origins, hours=settings.login_hours)
        if not settings.tls and not _on_loopback(settings.host):
            log.warning("basic auth without TLS: passwords cross the network unencrypted; "
                        "give --tls-cert and --tls-key")
    guard = SessionGuard(settings.sessions)
    install_handlers()
    server = pn.serve({"app": str(APP_PATH)}, **server_options(settings, started, cookie_secret, login))
    server._tornado.fringegauge_sessions = guard
    restrict_routes(server._tornado)
    if login is not None:
        login.on_logout = guard.close_pages_of
    loop = IOLoop.current()

    def stop(signum, _frame):
        log.info("stopping", extra={"signal": signal.Signals(signum).name})
        loop.asyncio_loop.call_soon_threadsafe(loop.stop)

    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, stop)
    from views import workers
    server.start()
    guard.start(server._tornado)
    # Everything loaded so far (libraries, the warm-up page's modules) lives as long as the server: leave it
    # out of the collector's full passes, which otherwise hold the interpreter for ~0.15 s every time.
    gc.collect()
    gc.freeze()
    stalls = StallWatch(loop.asyncio_loop, threading.get_ident()).start()
    workers.warm(settings.limits.max_jobs_server)        # the first photo map should not wait for imports
    scheme = "https" if settings.tls else "http"
    log.info("serving", extra={"url": f"{scheme}://{settings.host}:{server.port}/app", "open_files": open_files,
                               **settings.describe()})
    try:
        loop.start()
    finally:
        stalls.stop()
        guard.stop()
        server.stop()
        workers.shutdown()
        log.info("stopped")
    return 0


if __name__ == "__main__":
    sys.exit(main())
