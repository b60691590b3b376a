"""Logging in to the lab server with ``--basic-auth``: the form, the checks and revocable logins.

- The password file holds one shared password or ``{"user": "password", ...}`` (see
  :func:`read_password_file`); a password is compared exactly (:func:`hmac.compare_digest` on its
  UTF-8 bytes), never trimmed.
- With one shared password, any name logs in: the name is what the person typed, not proven
  (``mode == "shared"``). With a file of users, the name is the login (``mode == "users"``).
- A successful login gets a random token, kept in this process (:class:`LoginBook`) and sent as a
  signed, ``HttpOnly``, ``SameSite=Lax`` cookie (``Secure`` under TLS). Logging out forgets the token,
  so the cookie stops working at once; so does a restart. A login lasts ``login_hours``.
- Failed logins are counted per client address: after :data:`MAX_FAILURES` within
  :data:`FAILURE_WINDOW_S`, that address is refused for the rest of the window without a password
  check (HTTP 429).
- The form comes from this server (no scripts, nothing from elsewhere) and says when the
  connection is not encrypted.
"""

from __future__ import annotations

import dataclasses
import hashlib
import hmac
import html
import json
import logging
import secrets
import time
import unicodedata
from pathlib import Path
from urllib.parse import urlsplit

import tornado.web
from bokeh.server.auth_provider import AuthProvider

__all__ = ["read_password_file", "Credentials", "LoginBook", "FailedLogins", "LabLogin",
           "LOGIN_COOKIE", "USER_COOKIE", "MAX_FAILURES", "FAILURE_WINDOW_S"]

_log = logging.getLogger("fringegauge")

#: The cookie that carries a login's random token (never included in a page's session data).
LOGIN_COOKIE = "fringegauge_login"
#: The signed user name, the cookie Panel reads for ``pn.state.user``.
USER_COOKIE = "user"
#: Cookies a page's session never carries: the login token, and ones Panel would read as a login.
EXCLUDED_COOKIES = [LOGIN_COOKIE, "is_guest", "id_token", "access_token", "refresh_token", "oauth_expiry"]
#: Failed logins per address within the window before that address must wait.
MAX_FAILURES = 5
FAILURE_WINDOW_S = 60.0
#: Client addresses whose failures are remembered at once (oldest forgotten first).
MAX_TRACKED_ADDRESSES = 10_000
#: Logins held at once; the oldest is forgotten first (its person logs in again).
MAX_LOGINS = 10_000
#: Longest user name and password accepted from the form (characters).
MAX_USER_CHARS = 100
MAX_PASSWORD_CHARS = 1024
#: Default length of a login (a shift).
DEFAULT_LOGIN_HOURS = 12.0


def read_password_file(path: Path):
    """The shared password (str) or ``{user: password}`` from ``path``; raises ValueError without echoing content.

    Only a final line break is taken off a single-line password: spaces are part of it.
    """
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ValueError(f"cannot read password file {path}: {exc.strerror}") from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise ValueError(f"password file {path} is not UTF-8 text") from None
    if text.endswith("\r\n"):
        text = text[:-2]
    elif text.endswith("\n"):
        text = text[:-1]
    if not text.strip():
        raise ValueError(f"password file {path} is empty")
    if text.lstrip().startswith("{"):
        try:
            users = json.loads(text)
        except json.JSONDecodeError:
            raise ValueError(f"password file {path} starts with '{{' but is not valid JSON") from None
        if not isinstance(users, dict) or not users or not all(
                isinstance(k, str) and k.strip() and isinstance(v, str) and v for k, v in users.items()):
            raise ValueError(f"password file {path} must map user names to non-empty passwords")
        return users
    if "\n" in text or "\r" in text:
        raise ValueError(f"password file {path} must hold a single line (or a JSON object of users)")
    return text


def _same(given: str, expected: str) -> bool:
    return hmac.compare_digest(given.encode("utf-8", "surrogatepass"), expected.encode("utf-8", "surrogatepass"))


@dataclasses.dataclass(frozen=True)
class Credentials:
    """Who may log in: one shared password (``mode == "shared"``) or a password per user (``"users"``)."""

    shared: str | None = None
    users: dict | None = None

    @classmethod
    def from_file_content(cls, content) -> Credentials:
        return cls(users=dict(content)) if isinstance(content, dict) else cls(shared=str(content))

    @property
    def mode(self) -> str:
        return "users" if self.users is not None else "shared"

    def check(self, user: str, password: str) -> bool:
        """True when ``password`` is right for ``user``; the time taken does not depend on where they differ."""
        if self.users is None:
            return _same(password, self.shared or "")
        expected = self.users.get(user)
        ok = _same(password, expected if expected is not None else secrets.token_urlsafe(16))
        return ok and expected is not None


@dataclasses.dataclass(frozen=True)
class Login:
    user: str
    expires: float


class LoginBook:
    """The logins this process has granted, by a hash of their token (so a memory dump shows no token)."""

    def __init__(self, hours: float = DEFAULT_LOGIN_HOURS, clock=time.time):
        self.hours, self._clock = hours, clock
        self._logins: dict[str, Login] = {}

    @staticmethod
    def key(token: str) -> str:
        return hashlib.sha256(token.encode("utf-8", "surrogatepass")).hexdigest()

    def issue(self, user: str) -> str:
        now = self._clock()
        if len(self._logins) >= MAX_LOGINS:
            for key in [k for k, v in self._logins.items() if v.expires <= now]:
                del self._logins[key]
            while len(self._logins) >= MAX_LOGINS:
                del self._logins[next(iter(self._logins))]
        token = secrets.token_urlsafe(32)
        self._logins[self.key(token)] = Login(user, now + self.hours * 3600.0)
        return token

    def user(self, token) -> str | None:
        if not isinstance(token, str) or not token:
            return None
        login = self._logins.get(self.key(token))
        if login is None:
            return None
        if login.expires <= self._clock():
            del self._logins[self.key(token)]
            return None
        return login.user

    def revoke(self, token) -> bool:
        return isinstance(token, str) and self._logins.pop(self.key(token), None) is not None

    def __len__(self) -> int:
        return len(self._logins)


class FailedLogins:
    """Failed logins per client address within a sliding window."""

    def __init__(self, max_failures: int = MAX_FAILURES, window_s: float = FAILURE_WINDOW_S, clock=time.monotonic):
        self.max_failures, self.window_s, self._clock = max_failures, window_s, clock
        self._failures: dict[str, list[float]] = {}

    def _recent(self, address: str) -> list[float]:
        now = self._clock()
        times = [t for t in self._failures.get(address, []) if now - t < self.window_s]
        if times:
            self._failures[address] = times
        else:
            self._failures.pop(address, None)
        return times

    def wait_s(self, address: str) -> float:
        """Seconds ``address`` must wait before trying again (0: it may try now)."""
        times = self._recent(address)
        if len(times) < self.max_failures:
            return 0.0
        return max(0.0, self.window_s - (self._clock() - times[-self.max_failures]))

    def failed(self, address: str) -> None:
        times = self._recent(address)
        times.append(self._clock())
        self._failures[address] = times[-self.max_failures:]
        while len(self._failures) > MAX_TRACKED_ADDRESSES:
            del self._failures[next(iter(self._failures))]

    def succeeded(self, address: str) -> None:
        self._failures.pop(address, None)


def _clean_user(text: str) -> str:
    text = unicodedata.normalize("NFC", text).strip()
    if not text or len(text) > MAX_USER_CHARS or any(unicodedata.category(c).startswith("C") for c in text):
        return ""
    return text


_FORM = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>fringegauge: log in</title>
<meta name="viewport" content="width=device-width, initial-scale=1">
<style>
body {{ font-family: sans-serif; max-width: 26em; margin: 4em auto; padding: 0 1em; color: #222; }}
h1 {{ font-size: 1.4em; }} label {{ display: block; margin-top: 1em; }}
input {{ width: 100%; padding: .4em; font-size: 1em; box-sizing: border-box; }}
button {{ margin-top: 1.2em; padding: .5em 1.4em; font-size: 1em; }}
.error {{ color: #a00; }} .note {{ color: #555; font-size: .9em; }}
</style></head>
<body><h1>fringegauge</h1>
<p>Log in to open the lab's page.</p>
{error}
<form method="post" action="/login">
<label for="username">{user_label}</label>
<input id="username" name="username" autocomplete="username" maxlength="{max_user}" required autofocus>
<label for="password">{password_label}</label>
<input id="password" name="password" type="password" autocomplete="current-password" maxlength="{max_password}" required>
<input type="hidden" name="next" value="{next}">
<button type="submit">Log in</button>
</form>
{note}
</body></html>
"""

_DONE = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>fringegauge: logged out</title>
<style>body {{ font-family: sans-serif; max-width: 26em; margin: 4em auto; padding: 0 1em; }}</style></head>
<body><h1>fringegauge</h1><p>{message}</p><p><a href="/login">Log in again</a></p></body></html>
"""


def safe_next(url) -> str:
    """Where to go after logging in: a path of the page on this server, never another site."""
    if not isinstance(url, str) or not url.startswith("/app") or "\\" in url or len(url) > 4000:
        return "/app"
    parts = urlsplit(url)
    return url if not parts.scheme and not parts.netloc and parts.path in ("/app", "/app/") else "/app"


class LabLogin:
    """The login of one server: credentials, granted logins, failures, and the Tornado handlers."""

    def __init__(self, credentials: Credentials, *, tls: bool, origins=(), hours: float = DEFAULT_LOGIN_HOURS):
        self.credentials, self.tls, self.origins = credentials, tls, [o.lower() for o in origins]
        self.book = LoginBook(hours)
        self.failures = FailedLogins()
        #: called with a login's name (as set on requests by :meth:`user_of`) when it logs out
        self.on_logout = None

    @property
    def mode(self) -> str:
        return self.credentials.mode

    def cookie_options(self) -> dict:
        return dict(httponly=True, samesite="Lax", secure=self.tls, path="/")

    def user_of(self, handler) -> str | None:
        """The logged-in user of a request, or None: a live login token and the matching signed name."""
        days = self.book.hours / 24.0
        token = handler.get_signed_cookie(LOGIN_COOKIE, max_age_days=days)
        token = token.decode("utf-8", "replace") if token else None
        user = self.book.user(token)
        if user is None:
            return None
        named = handler.get_signed_cookie(USER_COOKIE, max_age_days=days)
        if named is None or named.decode("utf-8", "replace") != user:
            return None
        handler.fringegauge_login = "login-" + LoginBook.key(token)[:16]     # which login, for binding pages
        return user

    def provider(self) -> AuthProvider:
        login = self

        class Provider(AuthProvider):
            @property
            def get_user(self):
                return login.user_of

            @property
            def login_url(self):
                return "/login"

            @property
            def login_handler(self):
                return login.login_handler()

            @property
            def logout_url(self):
                return "/logout"

            @property
            def logout_handler(self):
                return login.logout_handler()

        return Provider()

    # ------------------------------------------------------------------ handlers
    def _form(self, error: str = "", next_url: str = "/app") -> str:
        shared = self.mode == "shared"
        note = ("" if self.tls else
                '<p class="note">This server does not use TLS: the password crosses the network unencrypted. '
                "Ask whoever runs it to turn TLS on before using it beyond this computer.</p>")
        if shared:
            note += ('<p class="note">Everyone uses the lab\'s one password here, so the name you type is '
                     "not checked; it is shown as typed wherever the page records who did something.</p>")
        return _FORM.format(error=f'<p class="error">{html.escape(error)}</p>' if error else "",
                            user_label="Your name or initials" if shared else "User name",
                            password_label="The lab's password" if shared else "Password",
                            max_user=MAX_USER_CHARS, max_password=MAX_PASSWORD_CHARS,
                            next=html.escape(safe_next(next_url)), note=note)

    def login_handler(self):
        login = self

        class LoginHandler(tornado.web.RequestHandler):
            def _page(self, status: int, error: str = "", next_url: str = "/app"):
                self.set_status(status)
                self.set_header("Content-Type", "text/html; charset=utf-8")
                self.set_header("Cache-Control", "no-store")
                self.finish(login._form(error, next_url))

            def get(self):
                self._page(200, next_url=self.get_argument("next", "/app"))

            def post(self):
                address = self.request.remote_ip
                origin = self.request.headers.get("Origin")
                if origin is not None and urlsplit(origin).netloc.lower() not in login.origins:
                    _log.warning("login refused", extra={"client": address, "reason": "foreign origin"})
                    return self._page(403, "This form was sent from another site; open the page's own address.")
                wait = login.failures.wait_s(address)
                if wait > 0:
                    self.set_header("Retry-After", str(int(wait) + 1))
                    _log.warning("login refused", extra={"client": address, "reason": "too many failures"})
                    return self._page(429, f"Too many failed logins from this computer; wait {int(wait) + 1} s, "
                                           "then try again.")
                raw_user = self.get_body_argument("username", "", strip=False)
                password = self.get_body_argument("password", "", strip=False)
                next_url = self.get_body_argument("next", "/app", strip=False)
                user = _clean_user(raw_user)
                if not user or len(password) > MAX_PASSWORD_CHARS or not login.credentials.check(user, password):
                    login.failures.failed(address)
                    _log.info("login failed", extra={"client": address})
                    return self._page(401, "That name and password do not match; try again.", next_url)
                login.failures.succeeded(address)
                token = login.book.issue(user)
                days = login.book.hours / 24.0
                self.set_signed_cookie(LOGIN_COOKIE, token, expires_days=days, **login.cookie_options())
                self.set_signed_cookie(USER_COOKIE, user, expires_days=days, **login.cookie_options())
                for stale in ("is_guest", "id_token"):
                    self.clear_cookie(stale, path="/")
                _log.info("logged in", extra={"client": address, "user": user, "mode": login.mode})
                self.redirect(safe_next(next_url))

            def check_xsrf_cookie(self):              # the Origin check above does this form's job
                return None

        return LoginHandler

    def logout_handler(self):
        login = self

        class LogoutHandler(tornado.web.RequestHandler):
            def get(self):
                token = self.get_signed_cookie(LOGIN_COOKIE, max_age_days=login.book.hours / 24.0)
                token = token.decode("utf-8", "replace") if token else None
                revoked = login.book.revoke(token)
                if revoked and login.on_logout is not None:
                    login.on_logout("login-" + LoginBook.key(token)[:16])
                for name in (LOGIN_COOKIE, USER_COOKIE, "is_guest", "id_token"):
                    self.clear_cookie(name, path="/")
                if revoked:
                    _log.info("logged out", extra={"client": self.request.remote_ip})
                self.set_header("Cache-Control", "no-store")
                self.finish(_DONE.format(message="You have logged out; the pages this login had open have "
                                                 "been closed."))

        return LogoutHandler
