"""Building a page cheaply: the server builds every page on the event loop that all pages share.

While one page is built, nobody else's slider, upload or ``/health`` is answered, so the work done
on the loop for a new page is kept small:

- :class:`SpareExplorers` keeps a film explorer built ahead, off the loop, in a thread of its own: a
  new page takes it and only attaches it to its document;
- :class:`BuiltOnFirstOpen` builds the other tabs the first time they are opened, in a builder thread, and
  only puts the finished section in its tab on the loop;
- :func:`in_turns` fills a page's parts once the browser has its frame, one part per turn of the loop
  (``FilmExplorer.panel``: the sidebar, then the plots).
"""

from __future__ import annotations

import collections
import logging
import threading
import time

import panel as pn
from bokeh.document import Document
from panel.io.state import set_curdoc

__all__ = ["BuiltOnFirstOpen", "SpareExplorers", "spare_explorers", "ensure_spare", "in_turns"]

log = logging.getLogger("fringegauge")
#: Film explorers kept built ahead: one covers a person opening the page; a burst takes the rest
#: from the loop as before.
SPARES = 1
#: The next spare is built only once no page has been opened for this long (s): a build in the thread
#: shares the interpreter with the loop, and during a burst of page opens it would slow the loop's own.
QUIET_S = 1.0


#: Threads that build tabs' sections off the loop, for every page of the process: two keep one long build
#: from holding up another page's tab, and more would only share the same two cores.
TAB_BUILDERS = 2
_tab_pool: dict = {}
_tab_pool_lock = threading.Lock()


def _tab_builders():
    from concurrent.futures import ThreadPoolExecutor
    with _tab_pool_lock:
        if "pool" not in _tab_pool:
            _tab_pool["pool"] = ThreadPoolExecutor(TAB_BUILDERS, thread_name_prefix="fringegauge-tab")
        return _tab_pool["pool"]


class BuiltOnFirstOpen:
    """A tab whose section is built the first time the tab is opened, or the first time another tab needs it.

    Opening the page builds only the film explorer: each page is built on the server's event loop, which
    every open page shares, so the other tabs (the gratings tab alone costs more than the explorer) wait
    until someone looks at them. Until then the tab holds a one-line placeholder. Attribute access is
    passed to the section, building it first, so the lab library can load into a tab not yet opened.

    On a server a tab opened by a person is built with :meth:`open_soon`: the section and its layout are
    made in a builder thread (with the page's document as Panel's current document), and only putting the
    layout in the tab runs on the loop, on a later turn. :meth:`get` called meanwhile (a library load, a
    link) waits for that build and uses it, so a section is never built twice. ``on_built(section)`` runs on
    the loop once the section is in place (the page follows its settings from then on).
    """

    def __init__(self, build, on_built=None):
        self._build, self.section = build, None
        self._on_built = on_built
        self._lock = threading.Lock()          # held by whoever is building the section
        self._made = None                      # (section, layout) made but not yet in the tab
        self._building = False
        self.holder = pn.Column(pn.pane.Markdown("Preparing this tab…", margin=(10, 12)), sizing_mode="stretch_both")

    @property
    def built(self) -> bool:
        return self.section is not None

    @property
    def building(self) -> bool:
        return self._building and self.section is None

    def _make(self):
        section = self._build()
        return section, section.panel()

    def _finish(self):
        """Put the made section in the tab (on the loop, or at once outside a server)."""
        if self.section is not None or self._made is None:
            return
        section, layout = self._made
        self._made = None
        self.section = section
        self.holder.objects = [layout]
        if self._on_built is not None:
            self._on_built(section)

    def get(self):
        if self.section is None:
            with self._lock:                   # waits for a build under way in a builder thread
                if self._made is None and self.section is None:
                    self._made = self._make()
            self._finish()
        return self.section

    def _page_root(self, doc):
        """(root model, the holder's model) of the page ``doc`` shows the tab in, or None if it has not been
        drawn there yet."""
        for ref, (model, _parent) in list(self.holder._models.items()):
            root = doc.get_model_by_id(ref)
            if root is not None:
                return root, model
        return None

    def open_soon(self, doc=None, then=None) -> None:
        """Build the section in a builder thread and put it in the tab on a later turn of ``doc``'s loop, then
        call ``then()`` there. Outside a server (no ``doc``) it is :meth:`get` and ``then()`` at once.

        The thread also makes the layout's Bokeh models for the page (Panel reuses a child's models made
        for the same root). What stays on the loop is putting them in the tab and encoding them for the
        browser: 0.2-0.4 s of the loop thread's time for a tab of 300-430 models on a 2-core machine, against
        0.8-1.5 s when the whole build ran there.
        """
        if self.section is not None or doc is None or doc.session_context is None:
            self.get()
            if then is not None:
                then()
            return
        if self._building:
            return
        self._building = True
        where = self._page_root(doc)

        def build():
            try:
                with self._lock:
                    if self._made is None and self.section is None:
                        with set_curdoc(doc):
                            self._made = self._make()
                            if where is not None and doc.session_context is not None:
                                self._made[1]._get_model(doc, where[0], where[1], None)
            except Exception:                   # the loop builds it again, where the error reaches the page
                log.exception("building a tab off the loop failed")
            finally:
                self._building = False
            if doc.session_context is not None:
                doc.add_next_tick_callback(done)

        def done():
            if self.section is None:
                self.get()
            if then is not None:
                then()
        _tab_builders().submit(build)

    def __getattr__(self, name):
        if name.startswith("_") or name in ("section", "holder"):
            raise AttributeError(name)
        return getattr(self.get(), name)


class SpareExplorers:
    """Film explorers built ahead in a thread, for pages to take (see the module docstring).

    ``make()`` builds one (a ``FilmExplorer`` of the default state). The thread builds with a document
    of its own as Panel's current document, so nothing it does reaches a page being served (Panel
    falls back to Bokeh's process-wide current document otherwise). :meth:`take` returns a spare when
    one is ready, else builds one at once, and asks the thread for the next, which it builds once page
    opens have paused for :data:`QUIET_S`.
    """

    def __init__(self, make, spares: int = SPARES):
        self._make, self._spares = make, spares
        self._ready = collections.deque()
        self._building = threading.Lock()
        self._wanted = threading.Event()
        self._thread = None
        self._taken_at = 0.0
        self.built_ahead = 0

    def _run(self):
        while True:
            self._wanted.wait()
            self._wanted.clear()
            while (quiet := time.monotonic() - self._taken_at) < QUIET_S:
                time.sleep(QUIET_S - quiet)
            while len(self._ready) < self._spares:
                if not self._build_one():
                    break

    def _build_one(self) -> bool:
        with self._building:
            if len(self._ready) >= self._spares:
                return True
            try:
                with set_curdoc(Document()):
                    self._ready.append(self._make())
            except Exception:                           # never stop refilling for one failed build
                log.exception("building a spare film explorer failed")
                return False
            self.built_ahead += 1
            return True

    def ensure(self) -> None:
        """Have a spare ready, building it in the calling thread if there is none (the server calls this in
        a thread of its own before it builds a page, so the build itself never runs on the loop)."""
        if not self._ready:
            self._build_one()

    def _refill(self):
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, daemon=True, name="fringegauge-spare-pages")
            self._thread.start()
        self._wanted.set()

    def take(self):
        self._taken_at = time.monotonic()
        try:
            explorer = self._ready.popleft()
        except IndexError:
            explorer = self._make()
        self._refill()
        return explorer


_spares: dict = {}
_spares_lock = threading.Lock()


def ensure_spare() -> None:
    """:meth:`SpareExplorers.ensure` of the process's pool, once a page has made it (else nothing)."""
    pool = _spares.get("pool")
    if pool is not None:
        pool.ensure()


def spare_explorers(make) -> SpareExplorers:
    """The process's one :class:`SpareExplorers` (made with ``make`` on first use)."""
    with _spares_lock:
        if "pool" not in _spares:
            _spares["pool"] = SpareExplorers(make)
        return _spares["pool"]


def in_turns(*steps) -> None:
    """Run ``steps`` (callables that add parts to the page) once the browser has the page, each on its own
    turn of the event loop, so that other pages' messages are answered in between. Call while the page is
    built; each step runs with the document lock held (it may change Bokeh models)."""
    doc = pn.state.curdoc

    def run(i=0):
        try:
            steps[i]()
        finally:
            if i + 1 < len(steps) and doc.session_context is not None:
                doc.add_next_tick_callback(lambda: run(i + 1))

    pn.state.onload(run)
