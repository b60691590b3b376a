"""The lab library tab driven from its objects: two users, versions, bad files, a folder that cannot be written."""

import errno
import io
import os

import numpy as np
import pytest
from PIL import Image

from library import store
from library.store import Library
from physics.appearance import color_map
from views.explorer import FilmExplorer
from views.grating import GratingSection
from views.inverse import ColourToThickness
from views.library import LIBRARY_ENV, LibrarySection


def _page(lib):
    ex = FilmExplorer()
    return LibrarySection(ex, ColourToThickness(ex), GratingSection(), library=lib)


def _save(section, kind, name, user):
    section.kind.value = kind
    section.name.set_text(name)
    section.user.set_text(user)
    return section.save_current()


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
    a.listing.value = 0
    assert a.load_selected() and abs(a.ex.state.thickness_nm - 480.0) < 1e-9
    a.listing.value = 1
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
    monkeypatch.setattr(store.tempfile, "NamedTemporaryFile", fail)
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


def test_without_a_library_folder_the_tab_says_how_to_set_one(monkeypatch):
    monkeypatch.delenv(LIBRARY_ENV, raising=False)
    ex = FilmExplorer()
    a = LibrarySection(ex)
    assert a.lib is None and "serve.py --library" in a.message.object
    assert not a.save_current()


def test_library_from_the_environment(tmp_path, monkeypatch):
    monkeypatch.setenv(LIBRARY_ENV, str(tmp_path / "shared"))
    a = LibrarySection(FilmExplorer())
    assert a.lib is not None and a.lib.root == (tmp_path / "shared").absolute()
