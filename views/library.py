"""The lab library tab: browse, load and save the stacks, gratings and calibrations the lab shares.

Every item lives in the server's library folder (:mod:`library.store`, set by ``serve.py
--library``, read here from ``FRINGEGAUGE_LIBRARY``). Saving never overwrites: a name that
exists is saved as its next version and the user is told. A file that fails validation is
listed under "Skipped files" with the reason and never loaded. When the server writes nothing
(no library folder set, or the folder is read-only or full) the page says so, and what is on the
page stays as it is, ready to download.
"""

from __future__ import annotations

import os

import panel as pn

from library.store import NOUNS, Library, LibraryWriteError, validate_calibration
from physics import InputError
from physics.stackfile import load_stack_file

from .explorer import Field, _esc, _label
from .inverse import locked

#: Environment variable naming the library folder (set by serve.py).
LIBRARY_ENV = "FRINGEGAUGE_LIBRARY"
#: Most entries listed per kind (newest first); older ones stay in the folder.
MAX_LISTED = 500

_SOURCE = {"stacks": "the Film explorer's stack (with its thickness and view)",
           "gratings": "the Gratings tab's grating and spectrometer",
           "calibrations": "the calibration box and reference on the Colour → thickness tab"}


def library_from_env() -> Library | None:
    """The library named by ``FRINGEGAUGE_LIBRARY``, or None when it is not set."""
    root = os.environ.get(LIBRARY_ENV, "").strip()
    return Library(root) if root else None


class LibrarySection:
    """The "Lab library" tab, bound to the page's explorer, colour → thickness and grating sections."""

    def __init__(self, explorer, inverse=None, grating=None, library: Library | None = None):
        self.ex, self.inverse, self.grating = explorer, inverse, grating
        self.lib = library if library is not None else library_from_env()
        self.entries: list = []
        self.kind = pn.widgets.RadioButtonGroup(options={"Stacks": "stacks", "Gratings": "gratings",
                                                         "Calibrations": "calibrations"},
                                                value="stacks", margin=(2, 5))
        self.listing = pn.widgets.Select(options={}, size=14, width=560, margin=(2, 5),
                                         css_classes=["fg-lib-list"])
        self.detail = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px"}, css_classes=["fg-lib-detail"])
        self.load_button = pn.widgets.Button(label="Load into the page", color="primary", width=170, margin=(6, 5))
        self.refresh_button = pn.widgets.Button(label="Refresh list", color="light", width=120, margin=(6, 5))
        self.archive_button = pn.widgets.Button(label="Archive this version", color="light", width=170,
                                                margin=(6, 5))
        self.name = Field("Name to save under", width=300)
        self.user = Field("Your name or initials (saved with the item)", width=300)
        self.source = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#444"})
        self.save_button = pn.widgets.Button(label="Save to the lab library", color="primary", width=200,
                                             margin=(6, 5))
        self.message = pn.pane.Alert("", alert_type="light", visible=False, margin=(5, 5),
                                     css_classes=["fg-lib-message"])
        self.problems = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#8a4b00"},
                                     css_classes=["fg-lib-problems"])
        login = getattr(pn.state, "user", None)
        if login:
            self.user.set_text(str(login))
            self.user.input.disabled = True
        self.kind.param.watch(lambda e: self.refresh(), "value")
        self.listing.param.watch(lambda e: self._show_detail(), "value")
        self.refresh_button.on_click(lambda e: self.refresh())
        # loading reaches other tabs' Bokeh models: under the document lock (see views.inverse.locked)
        self.load_button.on_click(locked(lambda e: self.load_selected()))
        self.archive_button.on_click(lambda e: self.archive_selected())
        self.save_button.on_click(lambda e: self.save_current())
        self.refresh()

    # ------------------------------------------------------------------ listing
    def refresh(self) -> None:
        """Re-read the kind's folder: valid entries newest first, skipped files with their reasons."""
        kind = self.kind.value
        self.source.object = f"Saves {_SOURCE[kind]}."
        if self.lib is None:
            self._set_listing([])
            self.problems.object = ""
            self._say("No library folder is set on this server, so nothing can be shared or saved here. "
                      "Start the page with <code>python serve.py --library FOLDER</code>; until then, use the "
                      "download buttons on each tab.", "warning")
            return
        try:
            entries = self.lib.list(kind)
            problems = self.lib.list_problems(kind)
        except (InputError, OSError) as exc:
            self._set_listing([])
            self._say(f"The library folder cannot be read: {_esc(str(exc))}", "danger")
            return
        entries = sorted(entries, key=lambda e: (e.saved_at, e.name, e.version), reverse=True)[:MAX_LISTED]
        chosen = self.selected()
        self._set_listing(entries)
        if chosen is not None:
            self._select(chosen.name, chosen.version)               # keep the user's choice
        if problems:
            items = "".join(f"<li>{_esc(str(p))}</li>" for p in problems[:50])
            more = f"<li>… and {len(problems) - 50} more</li>" if len(problems) > 50 else ""
            self.problems.object = (f"<b>Skipped files ({len(problems)})</b>: not loaded because they failed "
                                    f"the checks; whoever looks after the server can inspect them.<ul>{items}{more}</ul>")
        else:
            self.problems.object = ""

    def _set_listing(self, entries) -> None:
        self.entries = list(entries)
        options = {}
        for i, e in enumerate(self.entries):
            options[f"{e.name}  ·  v{e.version}  ·  {e.user}  ·  {_when(e.saved_at)}"] = i
        self.listing.options = options
        self.listing.value = 0 if self.entries else None
        self._show_detail()

    def selected(self):
        i = self.listing.value
        return self.entries[i] if isinstance(i, int) and 0 <= i < len(self.entries) else None

    def _show_detail(self) -> None:
        e = self.selected()
        if e is None:
            noun = NOUNS[self.kind.value]
            self.detail.object = f"No {noun} saved yet." if self.lib is not None else ""
            return
        self.detail.object = (f"<div class='fg-lib-entry'><b>{_esc(e.name)}</b>, version {e.version}: saved by "
                              f"{_esc(e.user)} on {_esc(_when(e.saved_at))} (UTC), {e.size:,} bytes, file "
                              f"<code>{_esc(e.file_name)}</code></div>")

    # ------------------------------------------------------------------ actions
    def load_selected(self) -> bool:
        """Load the selected entry into its tab; on a problem say why and change nothing."""
        e, kind = self.selected(), self.kind.value
        if self.lib is None or e is None:
            self._say("Choose an item in the list first.", "warning")
            return False
        try:
            text = self.lib.load(kind, e.name, e.version)
            if kind == "stacks":
                sf = load_stack_file(text)
                self.ex.state.load(sf, e.name)
                self.ex._sync_widgets()
                where = "the Film explorer"
            elif kind == "gratings":
                if self.grating is None:
                    raise InputError("This page has no Gratings tab to load into.")
                self.grating.load_file_text(text)
                where = "the Gratings tab"
            else:
                if self.inverse is None:
                    raise InputError("This page has no Colour → thickness tab to load into.")
                self.inverse.apply_calibration(validate_calibration(text))
                where = "the Colour → thickness tab"
        except (InputError, OSError) as exc:
            self._say(f"Could not load {_esc(e.name)} v{e.version}: {_esc(str(exc))}", "danger")
            return False
        self._say(f"Loaded {_esc(e.name)} v{e.version} (saved by {_esc(e.user)}) into {where}.", "success")
        return True

    def save_current(self) -> bool:
        """Save what the page shows under the typed name; a taken name becomes its next version."""
        kind = self.kind.value
        if self.lib is None:
            self.refresh()
            return False
        name = self.name.input.value.strip()
        user = self.user.input.value.strip()
        ok = True
        if not name:
            self.name.show_error("Type a name to save under.")
            ok = False
        else:
            self.name.show_error(None)
        if not user:
            self.user.show_error("Type your name or initials: the lab sees who saved each item.")
            ok = False
        else:
            self.user.show_error(None)
        if not ok:
            return False
        try:
            content = self._current_text(kind, name)
        except InputError as exc:
            self._say(f"Nothing to save: {_esc(str(exc))}", "warning")
            return False
        try:
            result = self.lib.save(kind, name, content, user=user)
        except LibraryWriteError as exc:
            self._say(f"Not saved: {_esc(str(exc))}", "danger")
            return False
        except InputError as exc:
            self.name.show_error(str(exc))
            return False
        self.refresh()
        self._select(name, result.version)
        self._say(_esc(result.message), "success" if result.version == 1 else "warning")
        return True

    def archive_selected(self) -> bool:
        """Move the selected version to the kind's archive folder (never deleted)."""
        e, kind = self.selected(), self.kind.value
        if self.lib is None or e is None:
            self._say("Choose an item in the list first.", "warning")
            return False
        try:
            self.lib.archive(kind, e.name, e.version)
        except (InputError, OSError) as exc:
            self._say(f"Not archived: {_esc(str(exc))}", "danger")
            return False
        self.refresh()
        self._say(f"Archived {_esc(e.name)} v{e.version}: it is no longer listed, and whoever looks after the "
                  "server can still restore it from the library's .archive folder.", "success")
        return True

    def _current_text(self, kind: str, name: str) -> str:
        if kind == "stacks":
            return self.ex.state.file_text()
        if kind == "gratings":
            if self.grating is None:
                raise InputError("This page has no Gratings tab to save from.")
            return self.grating.file_text(name)
        if self.inverse is None:
            raise InputError("This page has no Colour → thickness tab to save from.")
        return self.inverse.calibration_text(name)

    def _select(self, name: str, version: int) -> None:
        for i, e in enumerate(self.entries):
            if e.name == name and e.version == version:
                self.listing.value = i
                return

    def _say(self, html: str, kind: str) -> None:
        self.message.object = f'<div class="fg-lib-text">{html}</div>'        # the class lets tests find it
        self.message.alert_type, self.message.visible = kind, True

    # ------------------------------------------------------------------ layout
    def panel(self):
        intro = pn.pane.HTML(
            "<div style='font-size:13px;max-width:900px'>The lab library is a folder on this server that "
            "everyone using the page shares. Saving never replaces anyone's work: a name that is already "
            "taken is saved as its next version, and you are told. Archived versions are kept in the "
            "folder, not deleted.</div>", margin=(5, 5))
        browse = pn.Column(_label("Saved in the lab library (newest first)"), self.kind, self.listing, self.detail,
                           pn.Row(self.load_button, self.refresh_button, self.archive_button), self.problems,
                           width=600)
        save = pn.Column(_label("Save what this page shows"), self.source, self.name.view(), self.user.view(),
                         self.save_button, width=340)
        return pn.Column(intro, self.message, pn.Row(browse, save), sizing_mode="stretch_width", scroll=True)


def _when(iso: str) -> str:
    """'2026-12-02T07:10:03+00:00' → '2026-12-02 07:10'."""
    return iso.replace("T", " ")[:16] if isinstance(iso, str) else "?"
