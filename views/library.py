"""The lab library tab: browse, load and save the stacks, gratings and calibrations the lab shares.

Every item lives in the server's library folder (:mod:`library.store`, set by ``serve.py
--library``, read here from ``FRINGEGAUGE_LIBRARY``; a page served without one, as by ``panel
serve app.py``, uses serve.py's default folder ``lab-library`` and says so). Saving never overwrites: a name that
exists (in any mix of upper and lower case) is saved as its next version and the user is told
which name it joined. A file that fails validation is listed under "Skipped files" with the
reason and never loaded. When the server writes nothing (no library folder set, or the folder is
read-only or full) the page says so, and what is on the page stays as it is, ready to download.

Every action (save, load, archive, refresh) replaces the message at the top with its own
outcome. While the tab is on screen the list follows the folder: every ``WATCH_PERIOD_MS`` a
periodic document callback compares :meth:`Library.change_marker` (a stat and a small read) with
the last one and re-reads the list only when it differs; the callback removes itself once the tab
is hidden or the page is closed, and ``refresh`` (called when the tab is opened) starts it
again. Archiving takes two clicks: the first asks, naming the version, and the question lapses
after ``CONFIRM_MS``; afterwards nothing is selected, so a further click cannot archive another
item.

Who saved. ``FRINGEGAUGE_AUTH`` (set by serve.py) says what the server's login proves: "users"
(a password per user) or "oauth" (an identity provider) prove the name, so the saver is the login
name (``pn.state.user``) read on the server at the moment of saving, whatever the page's name field
holds, and it is recorded as verified; the field only shows it. "shared" (one password for
everyone: Panel's basic auth then accepts any user name) and "off" prove nothing, so the person
types a name, which is recorded and shown as typed ("J. Ortiz (typed name)"). Unset or unknown
values count as "off": nothing is claimed as verified that the server did not check.

Messages on the page name items and files inside the library, never the server's folders.
"""

from __future__ import annotations

import difflib
import os
import time
import uuid
from dataclasses import dataclass, field
from functools import partial

import panel as pn

from library.store import (DEFAULT_ROOT, MAX_NOTE_CHARS, NOUNS, ItemMissing, clean_note, Library, LibraryKeyError, LibraryWriteError, error_text,
                           validate_calibration)
from physics import InputError
from physics.materials import page_wording
from physics.stackfile import load_stack_file

from .explorer import Field, _esc
from .inverse import locked
from .limits import served

#: Environment variable naming the library folder (set by serve.py).
LIBRARY_ENV = "FRINGEGAUGE_LIBRARY"
#: Environment variable saying what the server's login proves (set by serve.py): one of AUTH_MODES.
AUTH_ENV = "FRINGEGAUGE_AUTH"
#: "off": no login; "shared": one password for everyone; "users": a password per user; "oauth": a provider.
AUTH_MODES = ("off", "shared", "users", "oauth")
#: The modes whose login name identifies a person, so it is the saver and recorded as verified.
VERIFIED_AUTH_MODES = ("users", "oauth")
#: Most entries listed per kind (newest first); older ones stay in the folder.
MAX_LISTED = 500
#: How often the shown tab checks the folder for changes (ms): soon enough that a save in another
#: window appears while one looks, rare enough that the check (tens of microseconds) is negligible.
WATCH_PERIOD_MS = 3000
#: How long an archive question stays answerable (ms); after that a second click is needed again.
CONFIRM_MS = 8000
#: Characters of a note shown in the list (the whole note is shown under it when the item is selected).
NOTE_IN_LIST_CHARS = 40
#: Most lines compared in the two-version view: the stacks, gratings and calibrations saved here are tens
#: of lines; a longer file would make the comparison slow and the page long.
MAX_DIFF_LINES = 3000
#: Lines of context kept around each change in the two-version view.
DIFF_CONTEXT_LINES = 3

_SOURCE = {"stacks": "the Film explorer's stack (with its thickness and view)",
           "gratings": "the Gratings tab's grating and spectrometer",
           "calibrations": "the calibration box and reference on the Colour → thickness tab",
           "camera_calibrations": "the camera calibration in use on the Colour → thickness tab (with its flat "
                                  "field, camera, lamp, objective, NA and date)"}

#: Headings of the tab's two columns: a real gap below them, so they never touch the controls.
_CSS = """
.fg-lib-heading { font-size: 14px; font-weight: 600; color: #333; margin: 0; line-height: 1.3; }
.fg-lib-confirm { font-size: 13px; line-height: 1.35; }
table.diff { font: 12px monospace; border-collapse: collapse; }
table.diff td { padding: 0 4px; white-space: pre-wrap; vertical-align: top; }
table.diff th.diff_header { background: #eee; font-weight: 600; }
table.diff td.diff_header { color: #888; text-align: right; }
table.diff td.diff_next, table.diff th.diff_next { display: none; }
.diff_add { background: #d9f2d9; } .diff_chg { background: #fff0b3; } .diff_sub { background: #f7d4d4; }
"""


def auth_mode() -> str:
    """``FRINGEGAUGE_AUTH`` as one of AUTH_MODES; unset, empty or unknown values are "off" (nothing verified)."""
    mode = os.environ.get(AUTH_ENV, "").strip().lower()
    return mode if mode in AUTH_MODES else "off"


def login_name() -> str | None:
    """The page's login name as the server knows it (``pn.state.user``, from the signed login cookie), or
    None. Panel answers "guest" for an unsigned ``is_guest`` cookie a browser can set by itself, so that
    answer is not taken as a login."""
    try:
        if pn.state.cookies.get("is_guest"):
            return None
        user = pn.state.user
    except (AttributeError, RuntimeError, ValueError):     # no session (a script or test without a page)
        return None
    return str(user) if user else None


def library_from_env() -> Library:
    """The library named by ``FRINGEGAUGE_LIBRARY``, else the default folder :data:`library.store.DEFAULT_ROOT`
    in the folder the server started in (``panel serve app.py`` sets no folder), as ``serve.py`` uses."""
    return Library(library_folder_set() or DEFAULT_ROOT)


def library_folder_set() -> str:
    """The folder ``FRINGEGAUGE_LIBRARY`` names ("" when the page was served without one)."""
    return os.environ.get(LIBRARY_ENV, "").strip()


def library_title(name: str, version: int) -> str:
    """The title given to the Film explorer for a stack loaded from the library, e.g.
    ``"Gate oxide (lab library, version 2)"``: it names the item and, having a form no preset file
    name takes, never makes the preset menu claim a preset is loaded."""
    return f"{name} (lab library, version {version})"


def _heading(text: str) -> pn.pane.HTML:
    return pn.pane.HTML(f'<div class="fg-lib-heading">{text}</div>', margin=(8, 5, 8, 5), stylesheets=[_CSS])


@dataclass
class _PendingArchive:
    """An archive question on screen: the exact version it names, and when it lapses."""

    kind: str
    entry: object
    deadline: float                                   # time.monotonic() seconds
    token: object = field(default_factory=object)     # identifies this question to its timeout


def _stop_watch(section, session_context) -> None:
    """Session-destroyed callback: the page has closed. Bokeh has already dropped the document's
    callbacks by then, so the section only forgets its own."""
    section.stop_watching(session_ended=True)


class LibrarySection:
    """The "Lab library" tab, bound to the page's explorer, colour → thickness and grating sections."""

    def __init__(self, explorer, inverse=None, grating=None, library: Library | None = None):
        self.ex, self.inverse, self.grating = explorer, inverse, grating
        self.lib = library if library is not None else library_from_env()
        #: True when the page was served without a library folder and uses the default one.
        self.default_folder = library is None and not library_folder_set()
        self.entries: list = []
        self.skipped = 0                 # files of the kind that failed the checks (listed under the buttons)
        self._marker = None              # the folder's change marker when the list was last read
        self._pending: _PendingArchive | None = None
        self._watch = None               # the document's periodic callback while the tab is shown
        self._watch_doc = None
        self._closing_hooked = set()     # documents told to stop the watch when their session ends
        #: Name of the tab's body in the Bokeh document: present there only while the tab is on screen.
        self.body_name = f"fg-lib-body-{uuid.uuid4().hex}"
        self.kind = pn.widgets.RadioButtonGroup(options={"Stacks": "stacks", "Gratings": "gratings",
                                                         "Calibrations": "calibrations",
                                                         "Camera calibrations": "camera_calibrations"},
                                                value="stacks", margin=(2, 5))
        # a list box that can also select nothing (a Select always falls back to its first option),
        # so that after an archive no other item is selected; one item at a time (see _selection_changed)
        self.listing = pn.widgets.MultiSelect(options={}, value=[], size=14, width=560, margin=(2, 5),
                                              css_classes=["fg-lib-list"])
        self.detail = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px"}, css_classes=["fg-lib-detail"])
        self.search = pn.widgets.TextInput(label="Search the list (name, saver or note)", width=560, margin=(2, 5),
                                           placeholder="e.g. gate oxide, ak, line 3", css_classes=["fg-lib-search"])
        self.compare_with = pn.widgets.Select(label="Compare with version", options={}, width=260, margin=(2, 5),
                                              css_classes=["fg-lib-compare-with"])
        self.compare_button = pn.widgets.Button(label="Show both side by side", color="light", width=190,
                                                margin=(20, 5, 2, 5))
        self.diff = pn.pane.HTML("", margin=(4, 5), sizing_mode="stretch_width", stylesheets=[_CSS],
                                 css_classes=["fg-lib-diff"])
        self.all_entries: list = []      # every listed entry of the kind; ``entries`` are those the search keeps
        self.load_button = pn.widgets.Button(label="Load into the page", color="primary", width=170, margin=(6, 5))
        self.refresh_button = pn.widgets.Button(label="Refresh list", color="light", width=120, margin=(6, 5))
        self.archive_button = pn.widgets.Button(label="Archive this version…", color="light", width=170,
                                                margin=(6, 5))
        self.confirm_text = pn.pane.HTML("", margin=(4, 5), width=300, css_classes=["fg-lib-confirm"],
                                         stylesheets=[_CSS])
        self.confirm_button = pn.widgets.Button(label="Yes, archive it", color="danger", width=120, margin=(6, 5))
        self.keep_button = pn.widgets.Button(label="Keep it", color="light", width=90, margin=(6, 5))
        self.confirm_row = pn.Row(self.confirm_text, self.confirm_button, self.keep_button, visible=False,
                                  margin=0, css_classes=["fg-lib-confirm-row"])
        self.name = Field("Name to save under", width=300)
        self.user = Field("Your name or initials (saved with the item)", width=300)
        self.note = Field(f"Note (optional, at most {MAX_NOTE_CHARS} characters)", width=300,
                          placeholder="what it is for, what changed", css="fg-lib-note")
        self.source = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#444"})
        self.save_button = pn.widgets.Button(label="Save to the lab library", color="primary", width=200,
                                             margin=(6, 5))
        self.message = pn.pane.Alert("", alert_type="light", visible=False, margin=(5, 5),
                                     css_classes=["fg-lib-message"])
        self.problems = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#8a4b00"},
                                     css_classes=["fg-lib-problems"])
        self.auth = auth_mode()
        self._login_at_start = login_name()      # read on the server as the page is built
        if self.verified_logins():
            self.user.input.name = "Saved under your login"
            self.user.set_text(self._login_at_start or "")
            self.user.input.disabled = True      # shows the login; what it holds is never used for saving
        else:
            self.user.input.name = "Your name or initials (saved with the item)"   # listed as typed
            if self._login_at_start:             # a shared password proves no name: a suggestion only
                self.user.set_text(self._login_at_start)
        # every handler below changes Bokeh models: under the document lock (see views.inverse.locked)
        self.kind.param.watch(locked(lambda e: self._kind_changed()), "value")
        self.listing.param.watch(locked(self._selection_changed), "value")
        self.refresh_button.on_click(locked(lambda e: self.refresh_pressed()))
        self.load_button.on_click(locked(lambda e: self.load_selected()))
        self.archive_button.on_click(locked(lambda e: self.ask_archive()))
        self.confirm_button.on_click(locked(lambda e: self.confirm_archive()))
        self.keep_button.on_click(locked(lambda e: self.keep()))
        self.save_button.on_click(locked(lambda e: self.save_current()))
        self.search.param.watch(locked(lambda e: self._set_listing(self.all_entries, self._selected_file())),
                                "value_input")
        self.compare_button.on_click(locked(lambda e: self.compare_selected()))
        self._reread()

    def verified_logins(self) -> bool:
        """True when the server's login identifies each person (FRINGEGAUGE_AUTH "users" or "oauth")."""
        return self.auth in VERIFIED_AUTH_MODES

    def saver(self):
        """(user, verified) for a save now: the login name under a per-user login (None when the page has
        none), else the typed name."""
        if self.verified_logins():
            login = login_name() or self._login_at_start
            if login:
                self.user.set_text(login)
            return login, True
        return self.user.input.value.strip(), False

    # ------------------------------------------------------------------ listing
    def refresh(self) -> None:
        """Re-read the kind's folder and, when served, keep following it while the tab is shown.

        The page calls this when the tab is opened.
        """
        self._reread()
        self.start_watching()

    def refresh_pressed(self) -> None:
        """The "Refresh list" button: re-read and say what the list holds."""
        self.refresh()
        if self.lib is None:
            return
        noun = NOUNS[self.kind.value]
        n, skipped = len(self.entries), self.skipped
        self._say(f"The list is up to date: {n} {noun}{'' if n == 1 else 's'}"
                  + (f", and {skipped} skipped file{'' if skipped == 1 else 's'} below." if skipped else "."), "info")

    def _reread(self, select: str = "keep") -> bool:
        """Re-read the kind's folder: valid entries newest first, skipped files with their reasons.

        ``select``: "keep" the user's choice (the newest entry when nothing was listed before),
        select the "newest" entry, or select "none". Returns True when the entry the user had
        selected is no longer listed (archived, or changed by hand).
        """
        kind = self.kind.value
        self.source.object = f"Saves {_SOURCE[kind]}."
        if self.lib is None:
            self._set_listing([], None)
            self.problems.object = ""
            self._say("No library folder is set on this server, so nothing can be shared or saved here. "
                      "Start the page with <code>python serve.py --library FOLDER</code>; until then, use the "
                      "download buttons on each tab.", "warning")
            return False
        chosen = self.selected()
        try:
            self._marker = self.lib.change_marker(kind)       # before reading: a change meanwhile shows next time
            entries, problems = self.lib.list_with_problems(kind)
        except LibraryKeyError as exc:
            self._set_listing([], None)
            self._say(_esc(error_text(exc)), "danger")
            return False
        except (InputError, OSError) as exc:
            self._set_listing([], None)
            self._say(f"The library folder cannot be read: {_esc(error_text(exc))}", "danger")
            return False
        gone = self.lib.root_problem()
        if gone:
            self._say(_esc(gone), "warning")
        entries = sorted(entries, key=lambda e: (e.saved_at, e.name, e.version), reverse=True)[:MAX_LISTED]
        newest = entries[0].file_name if entries else None
        if select == "none":
            keep = None
        elif select == "newest" or (chosen is None and not self.entries):
            keep = newest
        else:
            keep = chosen.file_name if chosen is not None and any(e == chosen for e in entries) else None
        self._set_listing(entries, keep)
        self.skipped = len(problems)
        if problems:
            items = "".join(f"<li>{_esc(str(p))}</li>" for p in problems[:50])
            more = f"<li>… and {len(problems) - 50} more</li>" if len(problems) > 50 else ""
            self.problems.object = (f"<b>Skipped files ({len(problems)})</b>: not loaded because they failed "
                                    "the checks (links, special or oversized files, metadata not written by this "
                                    "server, changed content); whoever looks after the server can inspect them."
                                    f"<ul>{items}{more}</ul>")
        else:
            self.problems.object = ""
        return chosen is not None and keep is None and select == "keep"

    def _set_listing(self, entries, keep) -> None:
        """Show those of ``entries`` the search keeps; select the one whose file is ``keep`` (None: nothing)."""
        self.all_entries = list(entries)
        self.entries = [e for e in self.all_entries if matches(e, self.search.value_input or "")]
        self.listing.options = {_list_label(e): e.file_name for e in self.entries}
        self.select_file(keep)

    def _selected_file(self):
        e = self.selected()
        return e.file_name if e is not None else None

    def select_file(self, file_name: str | None) -> None:
        """Select the listed entry stored in ``file_name`` (None, or a file not listed: nothing)."""
        self.listing.value = [file_name] if any(e.file_name == file_name for e in self.entries) else []
        self._selection_changed()

    def selected(self):
        """The selected :class:`library.store.Entry`, or None (nothing, or more than one, selected)."""
        value = self.listing.value or []
        return next((e for e in self.entries if e.file_name == value[0]), None) if len(value) == 1 else None

    def _selection_changed(self, event=None) -> None:
        if event is not None and len(event.new or []) > 1:          # a shift- or ctrl-click: keep the newest
            added = [v for v in event.new if v not in (event.old or [])]
            self.listing.value = (added or list(event.new))[-1:]
            return                                                  # the watcher runs again with one item
        e = self.selected()
        if self._pending is not None and (e is None or e != self._pending.entry):
            self._withdraw()                       # the question named another item
        self.load_button.disabled = e is None
        self.archive_button.disabled = e is None or self._pending is not None
        if e is None:
            self._show_versions(None)
            noun = NOUNS[self.kind.value]
            self.detail.object = ("" if self.lib is None else f"No {noun} saved yet." if not self.entries
                                  else f"Nothing is selected: choose a {noun} in the list to load or archive it.")
            return
        who = ("" if e.user_verified else
               " — a name typed when saving, not checked by a login, so anyone could have typed it")
        note = f"<br>Note: {_esc(e.note)}" if e.note else ""
        self.detail.object = (f"<div class='fg-lib-entry'><b>{_esc(e.name)}</b>, version {e.version}: saved by "
                              f"{_esc(e.saved_by)}{who} on {_esc(_when(e.saved_at))} (UTC), {e.size:,} bytes, file "
                              f"<code>{_esc(e.file_name)}</code>{note}</div>")
        self._show_versions(e)

    def _kind_changed(self) -> None:
        self._withdraw()
        self.message.visible = False                 # a message about the other kind's list no longer applies
        self._reread(select="newest")

    # ------------------------------------------------------------------ following the folder
    def start_watching(self) -> bool:
        """Check the folder every ``WATCH_PERIOD_MS`` while the tab is shown (served pages only)."""
        doc = pn.state.curdoc
        if self._watch is not None or self.lib is None or not served(doc):
            return self._watch is not None
        self._watch_doc = doc
        self._watch = doc.add_periodic_callback(self._tick, WATCH_PERIOD_MS)
        if id(doc) not in self._closing_hooked:
            self._closing_hooked.add(id(doc))
            doc.on_session_destroyed(partial(_stop_watch, self))
        return True

    def stop_watching(self, session_ended: bool = False) -> None:
        """Remove the periodic check (the tab was hidden or the page closed)."""
        cb, doc = self._watch, self._watch_doc
        self._watch = self._watch_doc = None
        if cb is not None and doc is not None and not session_ended:
            try:
                doc.remove_periodic_callback(cb)
            except (ValueError, KeyError):           # already gone with its session
                pass

    def watching(self) -> bool:
        return self._watch is not None

    def on_screen(self) -> bool:
        """True while the tab's body is part of the live page (a hidden tab's body is not)."""
        doc = self._watch_doc
        return served(doc) and bool(doc.select({"name": self.body_name}))

    def _tick(self) -> None:
        if not self.on_screen():
            self.stop_watching()
            return
        self.check_for_changes()

    def check_for_changes(self) -> bool:
        """Re-read the list when the folder changed since it was read; True when it did.

        Costs one :meth:`Library.change_marker` when nothing changed.
        """
        if self.lib is None:
            return False
        try:
            marker = self.lib.change_marker(self.kind.value)
        except (InputError, OSError):
            return False
        if marker == self._marker:
            return False
        chosen = self.selected()
        if self._reread() and chosen is not None:
            self._say(f"{_esc(chosen.name)} v{chosen.version}, which you had selected, is no longer in the "
                      "lab library: it was archived or changed by someone else. Nothing is selected now.",
                      "warning")
        return True

    # ------------------------------------------------------------------ actions
    def load_selected(self) -> bool:
        """Load the selected entry into its tab; on a problem say why and change nothing."""
        e, kind = self.selected(), self.kind.value
        if self.lib is None or e is None:
            self._say("Nothing loaded: choose an item in the list first.", "warning")
            return False
        try:
            text = self.lib.load(kind, e.name, e.version)
            if kind == "stacks":
                sf = load_stack_file(text)
                self.ex.state.load(sf, library_title(e.name, e.version))
                self.ex._sync_widgets()
                where = "the Film explorer"
            elif kind == "gratings":
                if self.grating is None:
                    raise InputError("This page has no Gratings tab to load into.")
                self.grating.load_file_text(text)
                where = "the Gratings tab"
            elif kind == "camera_calibrations":
                if self.inverse is None:
                    raise InputError("This page has no Colour → thickness tab to load into.")
                self.inverse.apply_camera_calibration(text, f"{e.name} v{e.version}")
                where = "the Colour → thickness tab (Calibrated camera; the next map uses it)"
            else:
                if self.inverse is None:
                    raise InputError("This page has no Colour → thickness tab to load into.")
                self.inverse.apply_calibration(validate_calibration(text))
                where = "the Colour → thickness tab"
        except (InputError, OSError) as exc:
            if self._gone(e, exc):
                return False
            self._say(f"Could not load {_esc(e.name)} v{e.version}: {_esc(page_wording(error_text(exc)))}", "danger")
            return False
        self._say(f"Loaded {_esc(e.name)} v{e.version} (saved by {_esc(e.saved_by)}) into {where}.", "success")
        return True

    def _gone(self, e, exc) -> bool:
        """After a failed load or archive of ``e``: re-read the list and, if ``e`` has left it, say so."""
        self._reread()
        if not isinstance(exc, ItemMissing) and any(x == e for x in self.entries):
            return False
        self._say(f"{_esc(e.name)} v{e.version} is no longer in the lab library: it was archived or changed by "
                  "someone else. The list now shows what is there.", "warning")
        return True

    def save_current(self) -> bool:
        """Save what the page shows under the typed name; a taken name becomes its next version."""
        kind = self.kind.value
        if self.lib is None:
            self._reread()
            return False
        name = self.name.input.value.strip()
        user, verified = self.saver()
        self.name.show_error(None if name else "Type a name to save under.")
        if verified and not user:
            self.user.show_error("This server saves under your login, and this page has none.")
            self._say("Not saved: this server saves each item under the saver's login, and this page has no "
                      "login. Reload the page and log in.", "warning")
            return False
        self.user.show_error(None if user else "Type your name or initials: the lab sees who saved each item.")
        missing = [what for what, given in (("a name to save under", name), ("your name or initials", user))
                   if not given]
        if missing:
            self._say(f"Not saved: type {' and '.join(missing)}.", "warning")
            return False
        try:
            note = clean_note(self.note.input.value)
        except InputError as exc:
            self.note.show_error(str(exc))
            self._say(f"Not saved: {_esc(str(exc))}", "warning")
            return False
        self.note.show_error(None)
        try:
            content = self._current_text(kind, name)
        except InputError as exc:
            self._say(f"Nothing to save: {_esc(str(exc))}", "warning")
            return False
        try:
            result = self.lib.save(kind, name, content, user=user, user_verified=verified, note=note)
        except (LibraryWriteError, LibraryKeyError) as exc:
            self._say(f"Not saved: {_esc(error_text(exc))}", "danger")
            return False
        except InputError as exc:
            self.name.show_error(str(exc))
            self._say(f"Not saved: {_esc(str(exc))}", "danger")
            return False
        self._reread()
        self.select_file(result.path_name)
        self._say(_esc(result.message), "success" if result.version == 1 else "warning")
        return True

    def ask_archive(self) -> bool:
        """First click of Archive: ask about the selected version, by name, for ``CONFIRM_MS``."""
        e = self.selected()
        if self.lib is None or e is None:
            self._withdraw()
            self._say("Nothing archived: choose an item in the list first.", "warning")
            return False
        pending = _PendingArchive(self.kind.value, e, time.monotonic() + CONFIRM_MS / 1000)
        self._pending = pending
        self.confirm_text.object = (f"Archive <b>{_esc(e.name)}</b> v{e.version}? It leaves the list; the file is "
                                    "kept in the library's archive folder.")
        self.confirm_row.visible = True
        self.archive_button.disabled = True
        self.message.visible = False              # the question is this click's outcome
        doc = pn.state.curdoc
        if served(doc):
            doc.add_timeout_callback(partial(self._lapse, pending.token), CONFIRM_MS)
        return True

    def confirm_archive(self) -> bool:
        """Second click: archive exactly the version the question named, then select nothing."""
        p = self._pending
        self._withdraw()
        if p is None or p.kind != self.kind.value:
            self._say("Nothing archived: press “Archive this version…” first.", "warning")
            return False
        e = p.entry
        if time.monotonic() > p.deadline:
            self._say(f"Nothing archived: the question about {_esc(e.name)} v{e.version} lapsed. Press "
                      "“Archive this version…” again.", "warning")
            return False
        try:
            self.lib.archive(p.kind, e.name, e.version)
        except (InputError, OSError) as exc:
            if self._gone(e, exc):
                return False
            self._say(f"Not archived: {_esc(error_text(exc))}", "danger")
            return False
        self._reread(select="none")
        self._say(f"Archived {_esc(e.name)} v{e.version}: it is no longer listed, and whoever looks after the "
                  "server can still restore it from the library's .archive folder.", "success")
        return True

    def archive_selected(self) -> bool:
        """Archive the selected version in one call (both clicks): for scripts and tests."""
        return self.ask_archive() and self.confirm_archive()

    def keep(self) -> None:
        """Answer "Keep it": nothing is archived."""
        p = self._pending
        self._withdraw()
        if p is not None:
            self._say(f"Kept {_esc(p.entry.name)} v{p.entry.version}: nothing was archived.", "info")

    def _lapse(self, token) -> None:
        if self._pending is not None and self._pending.token is token:
            self._withdraw()

    def _withdraw(self) -> None:
        self._pending = None
        self.confirm_row.visible = False
        self.archive_button.disabled = self.selected() is None

    # ------------------------------------------------------------------ two versions side by side
    def _versions_of(self, e) -> list:
        """The listed versions of ``e``'s item (every case form of its name is one item), newest first."""
        return [x for x in self.all_entries if x.name.lower() == e.name.lower()]

    def _show_versions(self, e) -> None:
        """Offer the selected item's other versions to compare with (the one before it first)."""
        others = [] if e is None else [x for x in self._versions_of(e) if x.version != e.version]
        self.compare_with.options = {f"version {x.version} ({_when(x.saved_at)})": x.file_name for x in others}
        older = [x for x in others if x.version < e.version] if e is not None else []
        self.compare_with.value = (older[0] if older else others[0]).file_name if others else None
        self.compare_with.disabled = self.compare_button.disabled = not others
        self.diff.object = ""

    def compare_selected(self) -> bool:
        """Show the selected version and the one chosen beside it, line by line (changes marked)."""
        e = self.selected()
        other = next((x for x in self.all_entries if x.file_name == self.compare_with.value), None)
        if self.lib is None or e is None or other is None:
            self._say("Nothing to compare: choose an item that has more than one version, then a version to "
                      "compare it with.", "warning")
            return False
        old, new = sorted((other, e), key=lambda x: x.version)
        try:
            texts = [self.lib.load(self.kind.value, x.name, x.version) for x in (old, new)]
        except (InputError, OSError) as exc:
            if self._gone(e, exc):
                return False
            self._say(f"Could not compare: {_esc(page_wording(error_text(exc)))}", "danger")
            return False
        self.diff.object = version_diff_html(old, new, *texts)
        self.message.visible = False
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
        if kind == "camera_calibrations":
            return self.inverse.camera_calibration_text(name)
        return self.inverse.calibration_text(name)

    def _say(self, html: str, kind: str) -> None:
        self.message.object = f'<div class="fg-lib-text">{html}</div>'        # the class lets tests find it
        self.message.alert_type, self.message.visible = kind, True

    # ------------------------------------------------------------------ layout
    def panel(self):
        intro = pn.pane.HTML(
            "<div style='font-size:13px;max-width:900px'>The lab library is a folder on this server that "
            "everyone using the page shares. Saving never replaces anyone's work: a name that is already "
            "taken (in any mix of upper and lower case) is saved as its next version, and you are told. "
            "Archived versions are kept in the folder, not deleted."
            + (f" This server was started without a library folder, so it keeps the library in the folder "
               f"<code>{_esc(str(DEFAULT_ROOT))}</code> beside where it was started (made on the first save), as "
               "<code>python serve.py</code> does; <code>python serve.py --library FOLDER</code> chooses another."
               if self.default_folder else "") + "</div>", margin=(5, 5), css_classes=["fg-lib-intro"])
        browse = pn.Column(_heading("Saved in the lab library (newest first)"), self.kind, self.search, self.listing,
                           self.detail, pn.Row(self.load_button, self.refresh_button, self.archive_button),
                           pn.Row(self.compare_with, self.compare_button, margin=0),
                           self.confirm_row, self.problems, width=600, margin=(0, 20, 0, 0))
        save = pn.Column(_heading("Save what this page shows"), self.source, self.name.view(), self.user.view(),
                         self.note.view(), self.save_button, width=340)
        body = pn.Row(browse, save, name=self.body_name)
        return pn.Column(intro, self.message, body, self.diff, sizing_mode="stretch_width", scroll=True)


def _when(iso: str) -> str:
    """'2026-12-02T07:10:03+00:00' → '2026-12-02 07:10'."""
    return iso.replace("T", " ")[:16] if isinstance(iso, str) else "?"


def matches(entry, query: str) -> bool:
    """True when every word of ``query`` occurs (in any case) in the entry's name, saver or note."""
    hay = f"{entry.name} {entry.saved_by} {entry.note}".lower()
    return all(word in hay for word in query.lower().split())


def _list_label(e) -> str:
    note = e.note if len(e.note) <= NOTE_IN_LIST_CHARS else e.note[:NOTE_IN_LIST_CHARS - 1].rstrip() + "…"
    return (f"{e.name}  ·  v{e.version}  ·  {e.saved_by}  ·  {_when(e.saved_at)}"
            + (f"  ·  {note}" if note else ""))


def version_diff_html(old, new, old_text: str, new_text: str) -> str:
    """Two versions of one item side by side (:class:`difflib.HtmlDiff`, which escapes the text), only the
    changed lines with :data:`DIFF_CONTEXT_LINES` around them; a sentence when they are the same or too long."""
    a, b = old_text.splitlines(), new_text.splitlines()
    head = f"<b>{_esc(old.name)}</b>: version {old.version} (left) and version {new.version} (right)"
    if a == b:
        return f"<div>{head} hold the same text.</div>"
    if max(len(a), len(b)) > MAX_DIFF_LINES:
        return (f"<div>{head}: too long to compare here (more than {MAX_DIFF_LINES:,} lines); load each and "
                "compare the downloads.</div>")
    table = difflib.HtmlDiff(wrapcolumn=70).make_table(a, b, f"version {old.version}", f"version {new.version}",
                                                       context=True, numlines=DIFF_CONTEXT_LINES)
    return (f"<div style='margin-bottom:4px'>{head}; changed lines are marked (green added, yellow changed, "
            f"red removed).</div>{table}")
