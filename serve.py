"""Serve fringegauge for a lab: ``python serve.py --help``.

Starts the page (``app.py`` next to this file) with ``panel.serve`` in this process,
so it works from any working directory. ``panel.serve`` is used rather than the
``panel serve`` command line because it takes Tornado handlers directly (the
``/health`` endpoint) and receives the password and cookie secret in memory, never on
a command line where other users of the machine could read them.
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime
import json
import logging
import os
import secrets
import signal
import socket
import sys
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

if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

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


class _HelpFormatter(argparse.ArgumentDefaultsHelpFormatter):
    """Show defaults, except for options that are off unless given."""

    def _get_help_string(self, action):
        return action.help if action.default is None else super()._get_help_string(action)


def build_parser() -> argparse.ArgumentParser:
    d = Limits()
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
    p.add_argument("--library", type=Path, default=Path("lab-library"),
                   help="folder for the shared library (created if missing; relative to the current directory)")
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
    try:
        text = path.read_text(encoding="utf-8").strip()
    except OSError as exc:
        raise ValueError(f"cannot read password file {path}: {exc.strerror}") from None
    if not text:
        raise ValueError(f"password file {path} is empty")
    if text.startswith("{"):
        try:
            users = json.loads(text)
        except json.JSONDecodeError:
            raise ValueError(f"password file {path} starts with '{{' but is not valid JSON") from None
        if not users or not all(isinstance(k, str) and isinstance(v, str) and v for k, v in users.items()):
            raise ValueError(f"password file {path} must map user names to non-empty passwords")
        return users
    if "\n" in text:
        raise ValueError(f"password file {path} must hold a single line (or a JSON object of users)")
    return text


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

    def describe(self) -> dict:
        """What is safe to log: no password, no secret."""
        return {"host": self.host, "port": self.port, "allow_origin": self.origins, "threads": self.threads,
                "library": str(self.library), "auth": ("basic" if self.basic_auth else f"oauth:{self.oauth_provider}" if self.oauth_provider
                                                                  else "off"),
                "cookie_secret": "given" if self.cookie_secret else ("random per start" if self.basic_auth else "unused"),
                "idle_timeout_s": self.idle_timeout_s, **dataclasses.asdict(self.limits)}


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
        library = args.library.expanduser().resolve()
        try:
            library.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise ValueError(f"cannot create library folder {library}: {exc.strerror}") from None
    except ValueError as exc:
        parser.error(str(exc))
    origins = args.allow_origin or default_origins(args.host, args.port)
    return Settings(host=args.host, port=args.port, origins=origins, threads=args.threads, library=library,
                    basic_auth=basic_auth, cookie_secret=cookie_secret, oauth_provider=args.oauth_provider,
                    oauth_redirect_uri=args.oauth_redirect_uri, idle_timeout_s=args.idle_timeout_s,
                    limits=limits, log_level=args.log_level)


# ---------------------------------------------------------------------------- health

def health_handler(started: float):
    import tornado.web

    class HealthHandler(tornado.web.RequestHandler):
        """GET /health → {"status", "sessions", "heavy_jobs", "max_jobs_server", "uptime_s"}; no login needed,
        no page state. ``heavy_jobs`` is the number of photo maps and fits running now."""

        def get(self):
            app = self.application  # the BokehTornado application serving the page
            try:
                sessions = sum(len(app.get_sessions(path)) for path in app.app_paths)
            except Exception:
                sessions = None
            self.set_header("Content-Type", "application/json")
            self.set_header("Cache-Control", "no-store")
            from views.limits import running_jobs
            self.write(json.dumps({"status": "ok", "sessions": sessions,
                                   "heavy_jobs": len(running_jobs()["server"]),
                                   "max_jobs_server": Limits.from_env().max_jobs_server,
                                   "uptime_s": round(time.monotonic() - started, 1)}))

    return HealthHandler


# ---------------------------------------------------------------------------- start

def main(argv=None) -> int:
    settings = parse_settings(argv)
    configure_logging(getattr(logging, settings.log_level))
    os.environ.update(settings.limits.to_env())
    os.environ[LIBRARY_ENV] = str(settings.library)
    os.environ[THREADS_ENV] = str(settings.threads)
    started = time.monotonic()

    import panel as pn
    from tornado.ioloop import IOLoop

    cookie_secret = settings.cookie_secret
    if settings.basic_auth and not cookie_secret:
        cookie_secret = secrets.token_urlsafe(32)
        log.warning("no cookie secret given: using a random one, so logins end when the server restarts")
    options = dict(
        port=settings.port, address=settings.host, websocket_origin=settings.origins,
        show=False, start=False, verbose=False, threaded=False,
        extra_patterns=[(r"/health", health_handler(started))],
        unused_session_lifetime_milliseconds=int(settings.idle_timeout_s * 1000),
        check_unused_sessions_milliseconds=min(CHECK_UNUSED_MS, int(settings.idle_timeout_s * 1000)),
        websocket_max_message_size=WEBSOCKET_MESSAGE_CAP_BYTES,
    )
    if settings.basic_auth:
        options["basic_auth"] = settings.basic_auth
    if settings.oauth_provider:            # key and secret: Panel reads PANEL_OAUTH_KEY / PANEL_OAUTH_SECRET
        options["oauth_provider"] = settings.oauth_provider
        if settings.oauth_redirect_uri:
            options["oauth_redirect_uri"] = settings.oauth_redirect_uri
    if cookie_secret:
        options["cookie_secret"] = cookie_secret

    server = pn.serve({"app": str(APP_PATH)}, **options)
    loop = IOLoop.current()

    def stop(signum, _frame):
        log.info("stopping", extra={"signal": signal.Signals(signum).name})
        loop.asyncio_loop.call_soon_threadsafe(loop.stop)

    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, stop)
    from views import workers
    server.start()
    workers.warm(settings.limits.max_jobs_server)        # the first photo map should not wait for imports
    log.info("serving", extra={"url": f"http://{settings.host}:{server.port}/app", **settings.describe()})
    try:
        loop.start()
    finally:
        server.stop()
        workers.shutdown()
        log.info("stopped")
    return 0


if __name__ == "__main__":
    sys.exit(main())
