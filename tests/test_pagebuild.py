"""Tabs built off the event loop (views/pagebuild.py BuiltOnFirstOpen): built once, whoever asks first."""

import threading
import time
from types import SimpleNamespace

import panel as pn

from views.pagebuild import BuiltOnFirstOpen


class _Section:
    def __init__(self, made):
        made.append(self)

    def panel(self):
        return pn.pane.Markdown("the section")


class _FakeServedDoc:
    """Enough of a served Bokeh document for open_soon: a session, and next-tick callbacks run by the test."""

    def __init__(self):
        self.session_context = SimpleNamespace(request=SimpleNamespace(arguments={}, cookies={}, headers={}), id="fake-session")
        self.ticks = []

    def add_next_tick_callback(self, fn):
        self.ticks.append(fn)

    def get_model_by_id(self, _ref):
        return None


def _wait_for(cond, timeout_s=20.0):
    deadline = time.monotonic() + timeout_s
    while not cond() and time.monotonic() < deadline:
        time.sleep(0.01)
    assert cond()


def test_outside_a_server_a_tab_is_built_at_once():
    made, called = [], []
    tab = BuiltOnFirstOpen(lambda: _Section(made), on_built=called.append)
    tab.open_soon(None, then=lambda: called.append("then"))
    assert tab.built and len(made) == 1 and called == [made[0], "then"]
    assert tab.holder.objects[0].object == "the section"


def test_a_tab_opened_on_a_server_is_built_in_a_thread_and_placed_on_the_loop():
    made, called, threads = [], [], []

    def build():
        threads.append(threading.current_thread().name)
        return _Section(made)
    tab = BuiltOnFirstOpen(build, on_built=called.append)
    doc = _FakeServedDoc()
    tab.open_soon(doc, then=lambda: called.append("then"))
    _wait_for(lambda: doc.ticks)
    assert not tab.built and "Preparing" in tab.holder.objects[0].object     # not placed until the loop's turn
    assert threads[0].startswith("fringegauge-tab")
    doc.ticks.pop()()                                                         # the loop's turn
    assert tab.built and called == [made[0], "then"]
    assert tab.holder.objects[0].object == "the section"


def test_asking_for_a_tab_while_its_thread_builds_it_waits_for_that_build():
    made, release = [], threading.Event()

    def slow_build():
        release.wait(10)
        return _Section(made)
    tab = BuiltOnFirstOpen(slow_build)
    doc = _FakeServedDoc()
    tab.open_soon(doc)
    tab.open_soon(doc)                                  # a second click while building starts nothing new
    _wait_for(lambda: tab.building)
    threading.Timer(0.2, release.set).start()
    section = tab.get()                                 # a library load into the tab, on the loop
    assert len(made) == 1 and section is made[0]
    _wait_for(lambda: doc.ticks)
    for tick in doc.ticks:
        tick()
    assert tab.section is section and len(made) == 1


def test_a_build_that_fails_in_its_thread_is_made_again_on_the_loop_where_the_error_shows():
    attempts = []

    def build():
        attempts.append(threading.current_thread().name)
        if len(attempts) == 1:
            raise RuntimeError("first build fails")
        return _Section([])
    tab = BuiltOnFirstOpen(build)
    doc = _FakeServedDoc()
    tab.open_soon(doc)
    _wait_for(lambda: doc.ticks)
    doc.ticks.pop()()
    assert tab.built and len(attempts) == 2 and attempts[1] == threading.current_thread().name
