"""Only the routes the page needs are reachable; everything else is 404 before any handler runs.

Panel and Bokeh register more routes than this page uses: a resource route that imports any module
named in its path (``/components/<module>/...``), an embedding script with permissive CORS headers
(``/app/autoload.js``), a metadata route and, with some settings, REST and admin routes. A route
that is not served cannot be abused, so the server answers only:

=====================  ==========  ==================================================
path                   methods     what
=====================  ==========  ==================================================
``/``                  GET         redirect to the page
``/app``               GET         the page (one new session per request)
``/app/ws``            GET         the page's websocket
``/static/...``        GET, HEAD   Bokeh's and Panel's JavaScript and stylesheets
``/favicon.ico``       GET, HEAD   the tab icon
``/health``            GET         monitoring, no login
``/login``             GET, POST   the login form (when a login is configured)
``/logout``            GET         ends the login
=====================  ==========  ==================================================

Matching is on the raw request path (as Tornado routes it), anchored at both ends, so no
encoding or ``..`` trick reaches a route that is not listed. The access log (:func:`log_request`)
leaves out every query string.
"""

from __future__ import annotations

import logging
import re

import tornado.web

__all__ = ["ALLOWED", "allowed", "restrict_routes", "log_request"]

#: (path pattern, methods) of every route the page needs.
ALLOWED = (
    (re.compile(r"/"), {"GET"}),
    (re.compile(r"/app/?"), {"GET"}),
    (re.compile(r"/app/ws"), {"GET"}),
    (re.compile(r"/static/[A-Za-z0-9_./%@^+~-]+"), {"GET", "HEAD"}),
    (re.compile(r"/favicon\.ico"), {"GET", "HEAD"}),
    (re.compile(r"/health"), {"GET"}),
    (re.compile(r"/login"), {"GET", "POST"}),
    (re.compile(r"/logout"), {"GET"}),
)


def allowed(method: str, path: str) -> int:
    """200 when (method, path) is a route of the page, 405 for a listed path with another method,
    404 for any other path."""
    for pattern, methods in ALLOWED:
        if pattern.fullmatch(path):
            return 200 if method in methods else 405
    return 404


class RefusedRoute(tornado.web.RequestHandler):
    """Answers a request for a route the page does not serve, for every method, with a short text."""

    def initialize(self, status_code: int = 404):
        self._status = status_code

    def prepare(self):
        self.set_status(self._status)
        self.set_header("Content-Type", "text/plain; charset=utf-8")
        self.set_header("Cache-Control", "no-store")
        if self._status == 405:
            self.finish("This address does not take that kind of request.\n")
        else:
            self.finish("Not found. The page is at /app.\n")

    def check_xsrf_cookie(self):                  # nothing is processed, so there is nothing to protect
        return None


_access = logging.getLogger("tornado.access")


def log_request(handler) -> None:
    """One access-log line per request: status, method, path without its query, client, duration.

    The query is left out: it may carry a session id or token (which grant access to a page) or a
    long page state; neither belongs in a log. 5xx answers of the server's own limits (503) are
    warnings, like other refusals; only other 5xx are errors.
    """
    status = handler.get_status()
    level = logging.INFO if status < 400 else logging.ERROR if status >= 500 and status != 503 else logging.WARNING
    if _access.isEnabledFor(level):
        request = handler.request
        _access.log(level, "%d %s %s (%s) %.1fms", status, request.method, (request.path or "")[:200],
                    request.remote_ip, 1000.0 * request.request_time())


def restrict_routes(tornado_app) -> None:
    """Answer every request outside :data:`ALLOWED` with :class:`RefusedRoute`, before Tornado looks
    for the handler Panel or Bokeh registered for it (so none of their code runs for it)."""
    routed = tornado_app.find_handler

    def find_handler(request, **kwargs):
        status = allowed(request.method or "", request.path or "")
        if status != 200:
            return tornado_app.get_handler_delegate(request, RefusedRoute, {"status_code": status})
        return routed(request, **kwargs)

    tornado_app.find_handler = find_handler      # Tornado's HTTP server asks the application for each request
    tornado_app.settings["log_function"] = log_request
