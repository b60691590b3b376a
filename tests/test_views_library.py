"""The lab library tab driven from its objects: two users, versions, bad files, a folder that cannot be written."""

import errno
import io
import os
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import panel as pn
import pytest
from PIL import Image

from library import store
from library.store import Library
from physics.appearance import color_map
from views.explorer import FilmExplorer
from views.grating import GratingSection
from views.inverse import ColourToThickness
from views.library import LIBRARY_ENV, LibrarySection, library_title
from views.pagebuild import BuiltOnFirstOpen


def _page(lib):
    """A page's library tab; as on the page, the colour and gratings tabs are built when first needed."""
    ex = FilmExplorer()
    return LibrarySection(ex, BuiltOnFirstOpen(lambda: ColourToThickness(ex)), BuiltOnFirstOpen(GratingSection),
                          library=lib)


def _choose(section, i):
    """Select the ``i``-th listed entry, as a click in the list does."""
    section.select_file(section.entries[i].file_name)


def _save(section, kind, name, user):
    section.kind.value = kind
    section.name.set_text(name)
    section.user.set_text(user)
    return section.save_current()


@pytest.fixture(autouse=True, scope="module")
def _key_file(tmp_path_factory):
    """Every library here signs with a key in a temporary folder, never one in the home folder."""
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("FRINGEGAUGE_LIBRARY_KEY_FILE", str(tmp_path_factory.mktemp("key") / "library.key"))
        yield


@pytest.fixture()
def lib(tmp_path):
    return Library(tmp_path / "lab")


def test_two_users_saving_one_name_get_two_versions_and_the_second_is_told(lib):
    a, b = _page(lib), _page(lib)
    a.ex.state.thickness_nm = 120.0
    assert _save(a, "stacks", "Gate oxide line 3", "ak")
    assert a.message.alert_type == "success" and "Saved" in a.message.object
    b.ex.state.thickness_nm = 480.0
    assert _save(b, "stacks", "Gate oxide line 3", "bz")
    assert b.message.alert_type == "warning"
    assert "already exists" in b.message.object and "version 2" in b.message.object and "ak" in b.message.object
    a.refresh()
    assert [(e.version, e.user) for e in a.entries] == [(2, "bz"), (1, "ak")]
    # a loads b's version: the explorer takes b's thickness
    _choose(a, 0)
    assert a.load_selected() and abs(a.ex.state.thickness_nm - 480.0) < 1e-9
    _choose(a, 1)
    assert a.load_selected() and abs(a.ex.state.thickness_nm - 120.0) < 1e-9
    assert "saved by ak" in a.message.object


def test_grating_round_trip_through_the_library(lib):
    a, b = _page(lib), _page(lib)
    a.grating.load_file_text(a.grating.file_text().replace('"lines_per_mm": 1200.0', '"lines_per_mm": 600.0'))
    assert a.grating.settings.lines_per_mm == 600.0
    assert _save(a, "gratings", "Bench 2 grating", "ak")
    b.kind.value = "gratings"
    b.refresh()
    assert b.load_selected() and b.grating.settings.lines_per_mm == 600.0


def _wedge_png():
    """An invented bevelled oxide on a silicon monitor wafer: bare Si strip, then 50 → 600 nm."""
    st = FilmExplorer().state.stack
    d = np.concatenate([np.zeros(20), np.linspace(50, 600, 140)])
    rgb = color_map(st, 0, d, [0.0]).rgb[:, 0, :]
    buf = io.BytesIO()
    Image.fromarray(np.round(np.repeat(rgb[None], 60, axis=0) * 255).astype(np.uint8)).save(buf, format="PNG")
    return buf.getvalue()


def test_calibration_round_trip_and_its_checks(lib):
    a, b = _page(lib), _page(lib)
    assert not _save(a, "calibrations", "Wedge station", "ak")            # no photo, no box
    assert a.message.alert_type == "warning" and "no calibration box" in a.message.object
    a.inverse.load_photo(_wedge_png(), "wedge.png")
    a.inverse.set_box("calib", (2, 5, 18, 55))
    assert _save(a, "calibrations", "Wedge station", "ak")
    b.kind.value = "calibrations"
    b.refresh()
    assert not b.load_selected() and "Open the photo" in b.message.object   # b has no photo yet
    b.inverse.load_photo(_wedge_png(), "wedge.png")
    assert b.load_selected() and b.inverse.calib_box == (2, 5, 18, 55)
    assert b.inverse.reference.value == "substrate"


def test_corrupt_and_hand_edited_files_are_listed_as_skipped_never_loaded(lib):
    a = _page(lib)
    assert _save(a, "stacks", "Good one", "ak")
    folder = lib.root / "stacks"
    (folder / "Broken.json").write_text("{ not json")
    good = next(folder.glob("Good one.json"))
    good.write_text(good.read_text().replace("Si", "Ge"))                   # edited by hand after saving
    a.refresh()
    assert a.entries == []
    assert "Skipped files (2)" in a.problems.object and "Broken.json" in a.problems.object
    assert "Good one.json" in a.problems.object


@pytest.mark.parametrize("err", [errno.EROFS, errno.ENOSPC])
def test_folder_read_only_or_full_says_so_and_keeps_the_page(lib, monkeypatch, err):
    a = _page(lib)
    assert _save(a, "stacks", "Kept", "ak")
    a.ex.state.thickness_nm = 333.0
    before = a.ex.state.file_text()

    def fail(*args, **kwargs):
        raise OSError(err, os.strerror(err))
    monkeypatch.setattr(store, "_create_temp", fail)
    assert not _save(a, "stacks", "Kept", "bz")
    monkeypatch.undo()
    assert a.message.alert_type == "danger" and "Not saved" in a.message.object
    assert "download it as a file" in a.message.object
    assert a.ex.state.file_text() == before                                # nothing lost in the page
    a.refresh()
    assert [e.version for e in a.entries] == [1]


def test_names_that_leave_the_folder_are_refused_and_nothing_is_written(lib, tmp_path):
    a = _page(lib)
    for bad in ("../escape", "/etc/passwd", ".hidden", "a/b", "..", "CON"):
        assert not _save(a, "stacks", bad, "ak"), bad
        assert a.name.message.visible
    written = [p for p in tmp_path.rglob("*") if p.is_file() and p.name != ".lock"]
    assert written == []


def test_name_and_user_are_required(lib):
    a = _page(lib)
    assert not _save(a, "stacks", "", "")
    assert a.name.message.visible and a.user.message.visible


def test_archive_hides_a_version_and_keeps_its_file(lib):
    a = _page(lib)
    assert _save(a, "stacks", "Old recipe", "ak")
    a.refresh()
    assert a.archive_selected()
    assert a.entries == []
    kept = list((lib.root / "stacks" / ".archive").rglob("Old recipe*.json"))
    assert kept


def test_without_a_library_folder_the_tab_uses_serve_py_s_default_and_says_so(tmp_path, monkeypatch):
    """`panel serve app.py` sets no folder: the tab keeps the library in ./lab-library, made on the first save."""
    from library.store import DEFAULT_ROOT
    from serve import build_parser

    monkeypatch.delenv(LIBRARY_ENV, raising=False)
    monkeypatch.chdir(tmp_path)
    a = LibrarySection(FilmExplorer())
    assert a.default_folder and a.lib.root == (tmp_path / "lab-library").absolute()
    assert build_parser().parse_args([]).library == DEFAULT_ROOT == Path("lab-library")   # serve.py's default
    intro = a.panel()[0].object
    assert "started without a library folder" in intro and "lab-library" in intro and str(tmp_path) not in intro
    assert not (tmp_path / "lab-library").exists() and not a.message.visible
    assert _save(a, "stacks", "Oxide", "ak")
    assert (tmp_path / "lab-library" / "stacks").is_dir()


def test_a_section_given_no_library_says_how_to_set_one():
    a = LibrarySection(FilmExplorer(), library=None)
    a.lib = None
    a._reread()
    assert "serve.py --library" in a.message.object and not a.save_current()


def test_library_from_the_environment(tmp_path, monkeypatch):
    monkeypatch.setenv(LIBRARY_ENV, str(tmp_path / "shared"))
    a = LibrarySection(FilmExplorer())
    assert a.lib is not None and a.lib.root == (tmp_path / "shared").absolute()


# ---------------------------------------------------------------------- every action says its own outcome
def test_a_refused_name_replaces_the_message_of_the_save_before(lib):
    a = _page(lib)
    assert _save(a, "stacks", "Oxide", "ak") and _save(a, "stacks", "Oxide", "ak")
    assert "version 2" in a.message.object
    assert not _save(a, "stacks", "../../etc/passwd", "ak")
    assert a.message.alert_type == "danger" and "Not saved" in a.message.object and "'/'" in a.message.object
    assert "version 2" not in a.message.object
    assert a.name.message.visible
    assert not _save(a, "stacks", "", "")
    assert a.message.alert_type == "warning" and "a name to save under and your name" in a.message.object
    assert _save(a, "stacks", "Fine name", "ak")
    assert a.message.alert_type == "success" and not a.name.message.visible
    a.select_file(None)
    assert not a.load_selected() and "Nothing loaded" in a.message.object
    a.refresh_pressed()
    assert a.message.alert_type == "info" and "3 stacks" in a.message.object


# ---------------------------------------------------------------------- the list follows the folder
def test_another_windows_save_shows_without_refresh_and_keeps_the_choice(lib, monkeypatch):
    a, b = _page(lib), _page(lib)
    assert _save(b, "stacks", "First", "bz")
    assert a.check_for_changes() and [e.name for e in a.entries] == ["First"]
    _choose(a, 0)
    reads = []
    real = lib.list_with_problems
    monkeypatch.setattr(lib, "list_with_problems", lambda kind: reads.append(kind) or real(kind))
    assert not a.check_for_changes() and reads == []            # nothing changed: the folder is not re-read
    assert _save(b, "stacks", "Second", "bz")
    reads.clear()                                               # b's own re-read after its save
    assert a.check_for_changes() and reads == ["stacks"]
    assert [e.name for e in a.entries] == ["Second", "First"]
    assert a.selected().name == "First"                         # the user's choice stays


def test_a_selected_version_archived_elsewhere_is_dropped_and_explained(lib):
    a, b = _page(lib), _page(lib)
    assert _save(b, "stacks", "Recipe", "bz") and _save(b, "stacks", "Recipe", "bz")
    a.refresh()
    _choose(a, 1)                                               # version 1
    lib.archive("stacks", "Recipe", 1)
    assert a.check_for_changes()
    assert a.selected() is None and [e.version for e in a.entries] == [2]
    assert "archived or changed by someone else" in a.message.object


@pytest.mark.parametrize("action", ["load", "archive"])
def test_load_or_archive_of_a_version_that_vanished_refreshes_and_says_so(lib, action):
    a, b = _page(lib), _page(lib)
    assert _save(b, "stacks", "Recipe", "bz") and _save(b, "stacks", "Recipe", "bz")
    a.refresh()
    _choose(a, 1)
    assert a.ask_archive() if action == "archive" else True
    lib.archive("stacks", "Recipe", 1)                          # another window, before a's click arrives
    ok = a.load_selected() if action == "load" else a.confirm_archive()
    assert not ok
    assert "Recipe v1 is no longer in the lab library: it was archived or changed by someone else" \
        in a.message.object
    assert [e.version for e in a.entries] == [2] and a.selected() is None
    assert len(list((lib.root / "stacks" / ".archive").glob("Recipe*.json"))) == 2   # file and sidecar, once


def test_a_version_changed_by_hand_counts_as_changed_by_someone_else(lib):
    a = _page(lib)
    assert _save(a, "stacks", "Recipe", "ak")
    a.refresh()
    path = lib.root / "stacks" / "Recipe.json"
    path.write_text(path.read_text().replace("Si", "Ge"))
    assert not a.load_selected() and "changed by someone else" in a.message.object
    assert a.entries == [] and "Recipe.json" in a.problems.object


# ---------------------------------------------------------------------- archiving asks first
def test_archive_asks_naming_the_version_and_keep_archives_nothing(lib):
    a = _page(lib)
    assert _save(a, "stacks", "Old recipe", "ak") and _save(a, "stacks", "New recipe", "ak")
    _choose(a, 1)
    assert a.ask_archive()
    assert a.confirm_row.visible and "Old recipe" in a.confirm_text.object and "v1" in a.confirm_text.object
    assert a.archive_button.disabled and not a.message.visible
    assert len(lib.list("stacks")) == 2                        # the first click archives nothing
    a.keep()
    assert not a.confirm_row.visible and "nothing was archived" in a.message.object
    assert len(lib.list("stacks")) == 2
    assert not a.confirm_archive() and len(lib.list("stacks")) == 2   # no question open: nothing to confirm


def test_after_archiving_nothing_is_selected_so_a_second_click_archives_nothing(lib):
    a = _page(lib)
    for name in ("A", "B", "C"):
        assert _save(a, "stacks", name, "ak")
    _choose(a, 1)
    assert a.ask_archive() and a.confirm_archive()
    assert [e.name for e in a.entries] == ["C", "A"]
    assert a.selected() is None and a.archive_button.disabled and a.load_button.disabled
    assert "Nothing is selected" in a.detail.object
    assert not a.ask_archive() and not a.confirm_archive()
    assert [e.name for e in lib.list("stacks")] == ["C", "A"]
    a.check_for_changes()                                      # a later re-read does not pick one either
    a._reread()
    assert a.selected() is None


def test_the_archive_question_lapses_and_follows_the_selection(lib, monkeypatch):
    import views.library as vl
    a = _page(lib)
    assert _save(a, "stacks", "A", "ak") and _save(a, "stacks", "B", "ak")
    assert a.ask_archive()
    now = vl.time.monotonic()
    monkeypatch.setattr(vl.time, "monotonic", lambda: now + vl.CONFIRM_MS / 1000 + 1)
    assert not a.confirm_archive() and "lapsed" in a.message.object
    monkeypatch.undo()
    assert len(lib.list("stacks")) == 2
    assert a.ask_archive()
    _choose(a, 1)                                              # another item chosen: the question goes
    assert not a.confirm_row.visible and not a.confirm_archive()
    assert len(lib.list("stacks")) == 2


# ---------------------------------------------------------------------- names in any case
def test_a_save_in_other_case_joins_the_first_name_and_says_which(lib):
    a = _page(lib)
    assert _save(a, "stacks", "Oxide 640 nm", "ak")
    assert _save(a, "stacks", "oxide 640 NM", "bz")
    assert a.message.alert_type == "warning"
    assert "version 2 of 'Oxide 640 nm'" in a.message.object and "oxide 640 NM" in a.message.object
    assert [(e.name, e.version) for e in a.entries] == [("Oxide 640 nm", 2), ("Oxide 640 nm", 1)]
    assert a.selected().version == 2


# ---------------------------------------------------------------------- what the explorer is told
def test_a_loaded_stack_gives_the_explorer_its_library_name(lib):
    a = _page(lib)
    assert _save(a, "stacks", "thermal_oxide_on_silicon", "ak")   # a library name that is also a preset's file
    assert a.load_selected()
    title = a.ex.state.preset_name
    assert title == library_title("thermal_oxide_on_silicon", 1) and "thermal_oxide_on_silicon" in title
    assert a.ex.preset.value == ""                             # the preset menu does not claim the preset


# ---------------------------------------------------------------------- the periodic check's life
class _Doc:
    """Enough of a served Bokeh document to watch the periodic check start and stop."""

    def __init__(self):
        self.session_context = SimpleNamespace(request=SimpleNamespace(arguments={}))
        self.periodic, self.destroyed, self.shown = [], [], set()

    def add_periodic_callback(self, cb, period_ms):
        self.periodic.append((cb, period_ms))
        return cb

    def remove_periodic_callback(self, cb):
        self.periodic = [p for p in self.periodic if p[0] is not cb]

    def on_session_destroyed(self, cb):
        self.destroyed.append(cb)

    def add_timeout_callback(self, cb, ms):
        pass

    def add_next_tick_callback(self, cb):
        cb()

    def select(self, selector):
        return [object()] if selector.get("name") in self.shown else []


def test_the_check_runs_only_while_the_tab_is_shown_and_the_page_is_open(lib, monkeypatch):
    from panel.io.state import set_curdoc

    from views.library import WATCH_PERIOD_MS
    a = _page(lib)
    doc = _Doc()
    with set_curdoc(doc):
        doc.shown.add(a.body_name)
        a.refresh()                                            # the page opens the tab
        a.refresh()                                            # ... twice: still one check
        assert a.watching() and len(doc.periodic) == 1 and doc.periodic[0][1] == WATCH_PERIOD_MS
        tick = doc.periodic[0][0]
        lib.save("stacks", "From elsewhere", a.ex.state.file_text(), user="bz")
        tick()
        assert [e.name for e in a.entries] == ["From elsewhere"]
        doc.shown.clear()                                      # another tab opened
        tick()
        assert not a.watching() and doc.periodic == []
        doc.shown.add(a.body_name)
        a.refresh()
        assert a.watching() and len(doc.periodic) == 1
        assert len(doc.destroyed) == 1                         # one hook per page
        doc.session_context = None                             # the page closes
        for cb in doc.destroyed:
            cb(None)
        assert not a.watching()


def test_switching_kind_takes_the_other_kind_s_message_away(tmp_path, monkeypatch):
    monkeypatch.setenv("FRINGEGAUGE_LIBRARY", str(tmp_path / "lib"))
    from views.explorer import FilmExplorer
    from views.grating import GratingSection
    from views.inverse import ColourToThickness
    from views.library import LibrarySection

    ex = FilmExplorer()
    lib = LibrarySection(ex, ColourToThickness(ex), GratingSection())
    lib._say("The list is up to date: 1 stack.", "success")
    lib.kind.value = "gratings"
    assert not lib.message.visible or "stack" not in lib.message.object


# ---------------------------------------------------------------------- who saved
@pytest.fixture()
def login(monkeypatch):
    """Set the page's login as the server sees it (``pn.state.user`` and the request's cookies)."""
    def set_login(user, cookies=None):
        monkeypatch.setattr(type(pn.state), "user", property(lambda self: user))
        monkeypatch.setattr(type(pn.state), "cookies", property(lambda self: cookies or {}))
    return set_login


@pytest.mark.parametrize("mode", ["users", "oauth"])
def test_with_a_per_user_login_the_login_is_the_saver_whatever_the_field_sends(lib, monkeypatch, login, mode):
    monkeypatch.setenv("FRINGEGAUGE_AUTH", mode)
    login("alice")
    a = _page(lib)
    assert a.user.input.value == "alice" and a.user.input.disabled
    a.name.set_text("Gate oxide")
    a.user.input.value = "mallory"                     # a value change sent by a client despite the disabled field
    assert a.save_current()
    [entry] = lib.list("stacks")
    assert entry.user == "alice"
    assert (entry.user_verified, entry.saved_by) == (True, "alice")
    assert a.user.input.value == "alice"               # the field shows who it was saved as
    assert "(typed name)" not in next(iter(a.listing.options))


def test_with_a_per_user_login_a_page_without_one_saves_nothing(lib, monkeypatch, login):
    monkeypatch.setenv("FRINGEGAUGE_AUTH", "users")
    login(None)
    a = _page(lib)
    a.name.set_text("Gate oxide")
    a.user.input.value = "mallory"
    assert not a.save_current()
    assert "no login" in a.message.object and lib.list("stacks") == []


def test_a_guest_cookie_is_not_a_login(lib, monkeypatch, login):
    monkeypatch.setenv("FRINGEGAUGE_AUTH", "users")
    login("guest", cookies={"is_guest": "1"})          # Panel answers "guest" for this unsigned cookie
    a = _page(lib)
    a.name.set_text("Gate oxide")
    assert not a.save_current() and lib.list("stacks") == []


@pytest.mark.parametrize("mode", ["shared", "off", "", "no-such-mode"])
def test_without_a_per_user_login_the_name_is_typed_and_shown_as_typed(lib, monkeypatch, login, mode):
    monkeypatch.setenv("FRINGEGAUGE_AUTH", mode)
    login("anyone" if mode == "shared" else None)      # a shared password takes any user name
    a = _page(lib)
    assert not a.user.input.disabled
    assert a.user.input.value == ("anyone" if mode == "shared" else "")
    assert _save(a, "stacks", "Gate oxide", "J. Ortiz")
    [entry] = lib.list("stacks")
    assert (entry.user, entry.user_verified) == ("J. Ortiz", False)
    assert "J. Ortiz (typed name)" in next(iter(a.listing.options))
    assert "J. Ortiz (typed name)" in a.detail.object and "not checked by a login" in a.detail.object
    assert a.load_selected() and "saved by J. Ortiz (typed name)" in a.message.object


def test_the_auth_mode_defaults_to_off(monkeypatch):
    from views.library import auth_mode
    monkeypatch.delenv("FRINGEGAUGE_AUTH", raising=False)
    assert auth_mode() == "off"
    monkeypatch.setenv("FRINGEGAUGE_AUTH", " OAuth ")
    assert auth_mode() == "oauth"


# ---------------------------------------------------------------------- a folder that goes away
def test_a_library_folder_deleted_after_start_is_said_and_not_recreated(lib):
    import shutil
    a = _page(lib)
    assert _save(a, "stacks", "Kept", "ak")
    shutil.rmtree(lib.root)
    a.refresh()
    assert a.message.alert_type == "warning" and "folder is missing (deleted or unmounted?)" in a.message.object
    assert not _save(a, "stacks", "Again", "ak")
    assert "folder is missing" in a.message.object and "your work is still in this page" in a.message.object
    assert not lib.root.exists()


def test_the_tab_shows_no_server_path(lib, monkeypatch):
    a = _page(lib)
    assert _save(a, "stacks", "Kept", "ak")
    secret = str(lib.root)

    def denied(kind):
        raise OSError(errno.EACCES, "Permission denied", secret + "/stacks")
    monkeypatch.setattr(lib, "list_with_problems", denied)
    a.refresh()
    assert "Permission denied" in a.message.object and secret not in a.message.object
    monkeypatch.undo()
    a.refresh()
    monkeypatch.setattr(lib, "load", lambda *args: (_ for _ in ()).throw(OSError(errno.EIO, "I/O error", secret)))
    assert not a.load_selected()
    assert "I/O error" in a.message.object and secret not in a.message.object


# ---------------------------------------------------------------------- notes, search, two versions
def test_notes_show_in_the_list_and_the_search_finds_name_saver_or_note(lib):
    a = _page(lib)
    a.note.set_text("after the furnace service on line 3")
    assert _save(a, "stacks", "Gate oxide", "ak")
    a.note.set_text("")
    assert _save(a, "stacks", "Field oxide", "bz")
    assert any("furnace" in label for label in a.listing.options)
    a.select_file(next(e.file_name for e in a.entries if e.name == "Gate oxide"))
    assert "Note: after the furnace service on line 3" in a.detail.object
    for query, names in (("furnace", {"Gate oxide"}), ("BZ", {"Field oxide"}), ("oxide", {"Gate oxide", "Field oxide"}),
                         ("line 3 ak", {"Gate oxide"}), ("nothing like it", set())):
        a.search.value_input = query
        assert {e.name for e in a.entries} == names, query
    a.search.value_input = ""
    a.note.set_text("x" * 501)
    assert not _save(a, "stacks", "Gate oxide", "ak") and "at most 500" in a.note.message.object


def test_two_versions_side_by_side_mark_what_changed(lib):
    a = _page(lib)
    assert _save(a, "stacks", "Gate oxide", "ak")
    a.ex.state.thickness_nm = 123.0
    assert _save(a, "stacks", "Gate oxide", "bz")
    assert a.selected().version == 2 and a.compare_with.value is not None and not a.compare_button.disabled
    assert a.compare_selected()
    html = a.diff.object
    assert "version 1 (left) and version 2 (right)" in html and "<table" in html and "23" in html
    assert "diff_chg" in html or "diff_add" in html
    assert _save(a, "stacks", "Other", "ak") and a.compare_button.disabled     # one version: nothing to compare
