"""The lab server's protections as plain objects: routes, websocket message bounds, page limits, logins.

The same protections are exercised against the real server by tests/test_server_hostile.py.
"""

from __future__ import annotations

import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labserver.login import (MAX_FAILURES, Credentials, FailedLogins, LoginBook, read_password_file, safe_next)
from labserver.routes import allowed
from labserver.sessions import SessionGuard, SessionLimits
from labserver.websocket import MAX_BUFFERS, MAX_MESSAGE_BYTES, MessageMeter


class Clock:
    def __init__(self, t=1000.0):
        self.t = t

    def __call__(self):
        return self.t


# ---------------------------------------------------------------------- routes
@pytest.mark.parametrize("method, path, status", [
    ("GET", "/app", 200), ("GET", "/app/", 200), ("GET", "/app/ws", 200), ("GET", "/health", 200),
    ("GET", "/", 200), ("GET", "/login", 200), ("POST", "/login", 200), ("GET", "/logout", 200),
    ("GET", "/static/js/bokeh.min.js", 200), ("HEAD", "/favicon.ico", 200),
    ("GET", "/static/extensions/panel/bundled/filedropper/filepond@%5E4/dist/filepond.min.js", 200),
    ("POST", "/app", 405), ("OPTIONS", "/app", 405), ("PUT", "/health", 405), ("DELETE", "/app/ws", 405),
    ("GET", "/components/venv.__main__/x/y/z", 404), ("GET", "/components/app/FilmExplorer/_css/x", 404),
    ("OPTIONS", "/app/autoload.js", 404), ("GET", "/app/autoload.js", 404), ("GET", "/app/metadata", 404),
    ("GET", "/%63omponents/os/x/y/z", 404), ("GET", "//components/os/x/y", 404), ("GET", "/app/../components", 404),
    ("GET", "/liveness", 404), ("GET", "/rest/session_info", 404), ("GET", "/admin", 404), ("GET", "/app/x", 404),
    ("GET", "/health/", 404), ("GET", "/static/", 404), ("GET", "", 404), ("GET", "/static/a b", 404),
])
def test_only_the_pages_routes_are_served(method, path, status):
    assert allowed(method, path) == status


# ---------------------------------------------------------------------- websocket messages
def _header(n=0, **extra):
    return json.dumps({"msgid": "m", "msgtype": "PATCH-DOC", **({"num_buffers": n} if n is not None else {}), **extra})


def _feed(meter, parts):
    for part in parts:
        problem = meter.take(part)
        if problem:
            return problem
    return None


def test_a_well_formed_message_with_an_upload_chunk_passes():
    meter = MessageMeter()
    parts = [_header(1), "{}", "{}", json.dumps({"id": "b"}), bytes(2 * 2**20)]
    assert _feed(meter, parts) is None and not meter.in_message
    assert _feed(meter, [_header(None), "{}", "{}"]) is None and not meter.in_message


def test_many_announced_buffers_are_refused_at_the_header():
    meter = MessageMeter()
    assert "buffers" in meter.take(_header(250))
    for bad in (-1, 10**12, True, 1.5, "3"):
        assert "buffers" in MessageMeter().take(_header(bad))


def test_a_message_larger_than_the_cap_in_all_its_parts_is_refused():
    meter = MessageMeter()
    parts = [_header(MAX_BUFFERS), "{}", "{}"]
    for i in range(MAX_BUFFERS):
        parts += [json.dumps({"id": str(i)}), bytes(2 * 2**20)]
    fed = 0
    for part in parts:
        fed += 1
        problem = meter.take(part)
        if problem:
            break
    assert problem and "larger" in problem
    assert fed == 7                        # the second 2 MiB chunk, with the JSON before it, crosses 4 MiB
    assert meter.bytes - 2 * 2**20 <= MAX_MESSAGE_BYTES


def test_headers_that_are_not_headers_are_refused():
    for part in (b"\x00\xff", "x" * 20_000, "not json", "[1, 2]", json.dumps("PATCH-DOC")):
        assert MessageMeter().take(part) is not None


def test_an_incomplete_message_becomes_overdue():
    clock = Clock()
    meter = MessageMeter(complete_within_s=30, clock=clock)
    meter.take(_header(2))
    clock.t += 29
    assert not meter.overdue()
    clock.t += 2
    assert meter.overdue()


def test_a_flood_of_messages_is_refused_after_the_burst_and_allowed_again_later():
    clock = Clock()
    meter = MessageMeter(per_s=10, burst=20, clock=clock)
    results = [_feed(meter, [_header(None), "{}", "{}"]) for _ in range(25)]
    assert results[:20] == [None] * 20 and all(r and "messages a second" in r for r in results[20:])
    clock.t += 1.0
    assert _feed(meter, [_header(None), "{}", "{}"]) is None


@settings(max_examples=200, deadline=None)
@given(st.lists(st.one_of(st.text(max_size=50), st.binary(max_size=50),
                          st.builds(_header, st.integers(-3, 20))), max_size=40))
def test_the_meter_never_raises_and_never_holds_more_than_the_cap(parts):
    meter = MessageMeter(max_bytes=400)
    for part in parts:
        if meter.take(part) is not None:
            break
        assert meter.bytes <= 400


# ---------------------------------------------------------------------- pages
def _limits(**kw):
    base = dict(max_sessions=5, max_per_address=3, opens_per_minute=60, burst=4, connect_within_s=10,
                max_connections_per_session=2, max_connections_per_address=4)
    return SessionLimits(**{**base, **kw})


def test_pages_per_address_and_in_total():
    guard = SessionGuard(_limits(), clock=Clock())
    held = [guard.reserve("10.0.0.1") for _ in range(3)]
    assert all(hasattr(r, "bind") for r in held)
    refused = guard.reserve("10.0.0.1")
    assert refused.status == 503 and "full for this computer" in refused.message
    for i, r in enumerate(held):
        r.bind(f"sid{i}", "")
    assert hasattr(guard.reserve("10.0.0.2"), "bind") and hasattr(guard.reserve("10.0.0.2"), "bind")
    full = guard.reserve("10.0.0.3")
    assert full.status == 503 and "The server is full" in full.message and "--max-sessions" in full.message


def test_page_opens_refill_at_their_rate():
    clock = Clock()
    guard = SessionGuard(_limits(max_per_address=100, max_sessions=100), clock=clock)
    for _ in range(4):
        guard.reserve("a").release()
    refused = guard.reserve("a")
    assert "many times" in refused.message
    clock.t += 1.0                                       # 60 a minute: one more
    assert hasattr(guard.reserve("a"), "bind")
    assert hasattr(guard.reserve("b"), "bind")           # another address has its own bucket


def test_an_address_whose_pages_never_connect_gets_no_more_for_a_while():
    clock = Clock()
    guard = SessionGuard(_limits(max_per_address=10, max_sessions=20, burst=10, max_waiting_per_address=2),
                         clock=clock)
    guard.reserve("a").bind("s1", "")
    guard.reserve("a").bind("s2", "")
    refused = guard.reserve("a")
    assert refused.status == 503 and "not connected" in refused.message
    guard.connect("s1", "a", object())                 # one browser arrives: room for one more
    assert hasattr(guard.reserve("a"), "bind")
    assert hasattr(guard.reserve("b"), "bind")


def test_an_address_over_its_share_of_the_loop_opens_no_page():
    guard = SessionGuard(_limits(max_per_address=10, max_sessions=20, burst=10, loop_share=0.5, loop_burst_s=1.0),
                         clock=Clock())
    guard.charge("a", 3.0)
    refused = guard.reserve("a")
    assert refused.status == 503 and "busy" in refused.message and "Wait 4 s" in refused.message
    assert hasattr(guard.reserve("b"), "bind")


def test_a_released_reservation_without_a_page_gives_its_open_back():
    guard = SessionGuard(_limits(burst=1), clock=Clock())
    guard.reserve("a").release(refund=True)              # e.g. redirected to the login form
    assert hasattr(guard.reserve("a"), "bind")


def test_pages_that_never_connect_are_listed_for_freeing():
    clock = Clock()
    guard = SessionGuard(_limits(), clock=clock)
    guard.reserve("a").bind("s1", "")
    guard.reserve("a").bind("s2", "")
    assert guard.connect("s2", "a", object()) is None
    clock.t += 11
    assert guard.never_connected() == ["s1"]


def test_connections_join_only_pages_built_here_and_within_limits():
    guard = SessionGuard(_limits(), clock=Clock())
    guard.reserve("a").bind("s1", "login-1")
    assert guard.connect("nope", "a", object()).status == 4001
    assert guard.page_owner("s1") == "login-1" and guard.page_owner("nope") is None
    sockets = [object(), object()]
    assert all(guard.connect("s1", "a", s) is None for s in sockets)
    assert guard.connect("s1", "a", object()).status == 4002
    guard.disconnect("s1", "a", sockets[0])
    assert guard.connect("s1", "a", object()) is None


def test_logging_out_closes_that_logins_pages_only():
    class Socket:
        def __init__(self):
            self.closed = None

        def close(self, code, reason):
            self.closed = code

    guard = SessionGuard(_limits(), clock=Clock())
    guard.reserve("a").bind("s1", "login-1")
    guard.reserve("b").bind("s2", "login-2")
    mine, theirs = Socket(), Socket()
    guard.connect("s1", "a", mine)
    guard.connect("s2", "b", theirs)
    assert guard.close_pages_of("login-1") == 1
    assert mine.closed == 4004 and theirs.closed is None


# ---------------------------------------------------------------------- logins
def test_passwords_are_read_exactly(tmp_path):
    f = tmp_path / "pw"
    f.write_text("  spaced pass  \n")
    assert read_password_file(f) == "  spaced pass  "
    f.write_text("p\r\n")
    assert read_password_file(f) == "p"
    f.write_text(json.dumps({"ana": " a ", "ben": "b"}))
    assert read_password_file(f) == {"ana": " a ", "ben": "b"}
    for bad in ("", "\n", "a\nb\n", "{not json", json.dumps({"ana": ""}), json.dumps({"": "x"})):
        f.write_text(bad)
        with pytest.raises(ValueError) as err:
            read_password_file(f)
        assert "a\nb" not in str(err.value)


def test_credentials_compare_exactly():
    shared = Credentials.from_file_content("Lab pass 7")
    assert shared.mode == "shared" and shared.check("anyone", "Lab pass 7")
    assert not shared.check("anyone", "Lab pass 7 ") and not shared.check("anyone", " Lab pass 7")
    users = Credentials.from_file_content({"ana": "a-pass", "ben": "b-pass"})
    assert users.mode == "users" and users.check("ana", "a-pass")
    assert not users.check("ana", "b-pass") and not users.check("carl", "a-pass") and not users.check("ana", "")


def test_logins_expire_and_are_revoked():
    clock = Clock(0.0)
    book = LoginBook(hours=1, clock=clock)
    token = book.issue("ana")
    assert book.user(token) == "ana" and book.user(token + "x") is None and book.user(None) is None
    assert book.revoke(token) and book.user(token) is None and not book.revoke(token)
    token = book.issue("ben")
    clock.t += 3601
    assert book.user(token) is None and len(book) == 0


def test_failed_logins_make_an_address_wait():
    clock = Clock()
    failures = FailedLogins(clock=clock)
    for _ in range(MAX_FAILURES):
        assert failures.wait_s("a") == 0
        failures.failed("a")
    assert 0 < failures.wait_s("a") <= 60 and failures.wait_s("b") == 0
    clock.t += 61
    assert failures.wait_s("a") == 0


@pytest.mark.parametrize("url, expected", [
    ("/app", "/app"), ("/app?d=120&dmax=800", "/app?d=120&dmax=800"), ("/app/", "/app/"),
    ("https://evil.example/app", "/app"), ("//evil.example/app", "/app"), ("/appx", "/app"),
    ("/app/../login", "/app"), ("/app\\@evil", "/app"), (None, "/app"), ("", "/app"),
])
def test_after_logging_in_only_the_page_is_a_destination(url, expected):
    assert safe_next(url) == expected


def test_a_busy_address_waits_for_its_share_of_the_loop():
    clock = Clock()
    guard = SessionGuard(_limits(loop_share=0.5, loop_burst_s=2.0), clock=clock)
    guard.charge("a", 1.5)
    assert guard.loop_wait_s("a") == 0
    guard.charge("a", 1.5)                               # owes 3 s: 1 s over its burst, at 0.5 s/s
    assert guard.loop_wait_s("a") == pytest.approx(2.0)
    assert guard.loop_wait_s("b") == 0
    clock.t += 2.0
    assert guard.loop_wait_s("a") == pytest.approx(0.0)


def test_document_pulls_are_limited_per_connection():
    meter = MessageMeter()
    pull = [json.dumps({"msgid": "p", "msgtype": "PULL-DOC-REQ"}), "{}", "{}"]
    assert _feed(meter, pull) is None and _feed(meter, pull) is None
    assert "whole page" in _feed(meter, pull)


def test_a_websocket_closed_before_its_page_joined_it_closes_quietly():
    """A browser that leaves while its page is still being built: the connection exists, its session not yet;
    closing it forgets the connection and raises nothing (Bokeh's own close would assert)."""
    from labserver.websocket import GuardedWSHandler

    class Connection:
        _session = None

    class Application:
        fringegauge_sessions = None

        def __init__(self):
            self.lost = []

        def client_lost(self, conn):
            self.lost.append(conn)

    handler = GuardedWSHandler.__new__(GuardedWSHandler)
    conn, app = Connection(), Application()
    handler.__dict__.update(_deadline=None, _joined=None, application=app, connection=conn,
                            close_code=1001, close_reason=None)
    handler.on_close()
    assert app.lost == [conn] and handler.connection is None
