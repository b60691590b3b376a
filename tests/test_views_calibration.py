"""The colour tab's camera calibration driven from its objects, without a browser: the box table, a box CSV,
the fit and its residuals, the refusals, and a save/load round trip through a temporary lab library.

Every photo here is invented: an 8-step oxide-on-silicon reference sample (steps of known thickness, as a
fab's step wafer would be measured on an instrument), rendered through a made-up camera (a fixed 3x3 mixing
of the channels and a dark level) so that the quick gains cannot read it and a calibration can.
"""

import csv
import io
import json
from types import SimpleNamespace

import numpy as np
import pytest
from PIL import Image

from library.store import Library, validate_camera_calibration
from physics import InputError
from physics.appearance import color_map
from views.camera_calibration import parse_box_csv
from views.explorer import FilmExplorer
from views.inverse import ColourToThickness

#: Known thicknesses of the invented reference sample's steps (nm).
STEPS_NM = (40.0, 90.0, 140.0, 190.0, 240.0, 300.0, 360.0, 420.0)
#: Width of one step in the photo (px); the photo is 40 px high.
STEP_PX = 24
#: The invented camera: a fixed channel mixing and a dark level (fraction of full scale).
MIXING = np.array([[0.85, 0.12, 0.03], [0.08, 0.84, 0.08], [0.02, 0.15, 0.83]])
DARK = 0.03


@pytest.fixture(scope="module")
def explorer():
    """One film explorer for the module (its state is never changed here): a new one per test would double
    the file's time."""
    return FilmExplorer()


@pytest.fixture()
def section(tmp_path, explorer):
    sec = ColourToThickness(explorer)
    sec.panel()
    sec.camcal.library = Library(tmp_path / "lab")
    sec.win_hi.input.value = "500"
    return sec


def _png(rgb):
    buf = io.BytesIO()
    Image.fromarray(np.round(np.clip(rgb, 0, 1) * 255).astype(np.uint8)).save(buf, format="PNG")
    return buf.getvalue()


def _camera(linear):
    """sRGB-encoded output of the invented camera for linear-light sRGB values (..., 3)."""
    out = np.clip(linear @ MIXING.T * 0.9 + DARK, 0, 1)
    return np.where(out <= 0.0031308, 12.92 * out, 1.055 * out ** (1 / 2.4) - 0.055)


def _reference_photo(section, steps=STEPS_NM, height=40):
    """(PNG bytes, boxes) of the invented step sample: one vertical stripe per step."""
    st = section.ex.state.stack
    srgb = color_map(st, 0, list(steps), [0.0]).rgb[:, 0, :]
    lin = np.where(srgb <= 0.04045, srgb / 12.92, ((srgb + 0.055) / 1.055) ** 2.4)
    img = np.repeat(_camera(lin)[None, :, :], height, axis=0).repeat(STEP_PX, axis=1)
    boxes = [(i * STEP_PX + 4, 8, (i + 1) * STEP_PX - 4, height - 8) for i in range(len(steps))]
    return _png(img), boxes


def _csv(boxes, thicknesses):
    lines = ["x0,y0,x1,y1,thickness_nm"] + [",".join(str(v) for v in (*b, t)) for b, t in zip(boxes, thicknesses)]
    return ("\n".join(lines) + "\n").encode()


def _draw(section, boxes, thicknesses):
    """Boxes dragged on the photo in "calibration sample boxes" mode, each thickness typed in its row."""
    section.camcal.settings.method = "calibrated"
    section.mode.value = "refbox"
    for b in boxes:
        assert section.camcal.add_box(b)
    for f, t in zip(section.camcal.thickness_fields, thicknesses):
        f.input.value = f"{t:g}"


def test_drawn_boxes_get_rows_and_the_fit_shows_residuals_per_box(section):
    data, boxes = _reference_photo(section)
    section.load_photo(data, "steps.png")
    assert "8-bit PNG" in section.camcal.photo_info.object            # bit depth and decode path shown
    _draw(section, boxes, STEPS_NM)
    assert len(section.camcal.thickness_fields) == len(STEPS_NM)
    assert section.camcal.box_src.data["label"] == [str(i + 1) for i in range(len(STEPS_NM))]
    cal = section.camcal.fit()
    assert cal is not None, section.camcal.fit_msg.object
    table = section.camcal.residuals.object
    assert table.count("<tr>") == len(STEPS_NM) + 1 and "ΔE00" in table and "map − known (nm)" in table
    assert len(cal.residual_delta_e) == len(STEPS_NM)
    assert section.camcal.fit_kind == "success"
    assert section.camcal.active is cal and "In use" in section.camcal.active_info.object
    # the map now uses the calibration and shows an uncertainty
    args = section.camcal.map_arguments()
    assert args["calibration"] is cal
    section.start_map(sync=True)
    assert section.result is not None, section.map_msg.object
    assert section.camcal.unc_row.visible and "uncertainty" in section.stats.object
    assert "camera calibration fitted on this page (steps.png)" in section.stats.object
    text = section._stats_csv().getvalue()
    rows = [r for r in csv.reader(io.StringIO(text)) if r and not r[0].startswith("#")]
    assert rows[0][-2:] == ["median_uncertainty_nm", "p95_uncertainty_nm"] and float(rows[1][-1]) > 0
    assert "# camera calibration: fitted on this page (steps.png)" in text
    # a picked point is read through the calibration too: the 190 nm step
    cands = section.pick_box(boxes[3])
    assert cands is not None and any(abs(c.thickness_nm - STEPS_NM[3]) < 5 for c in cands.possible)


def test_a_box_csv_fills_the_table_and_a_bad_row_is_named(section):
    data, boxes = _reference_photo(section)
    section.load_photo(data, "steps.png")
    assert section.camcal.load_box_csv(_csv(boxes, STEPS_NM), "steps.csv")
    assert [f.input.value for f in section.camcal.thickness_fields] == [f"{t:g}" for t in STEPS_NM]
    assert section.camcal.settings.method == "calibrated"
    section.camcal.settings.source = "target"                           # the table shows patches, then again
    assert section.camcal.thickness_fields == [] and "no patch in the target data" in section.camcal.rows.objects[1].objects[1].object
    section.camcal.settings.source = "reference"                        # the thicknesses, as they were typed
    assert [f.input.value for f in section.camcal.thickness_fields] == [f"{t:g}" for t in STEPS_NM]
    bad = _csv(boxes[:2], STEPS_NM[:2]) + b"10,5,4,30,100\n"
    assert not section.camcal.load_box_csv(bad, "bad.csv")
    msg = section.camcal.box_msg.message.object
    assert "bad.csv" in msg and "Row 4" in msg
    assert len(section.camcal.boxes) == len(STEPS_NM)                   # the boxes on the page stay


@pytest.mark.parametrize("text, row", [
    (b"0,0,10,10\n", "Row 1: has 4 value(s)"),
    (b"0,0,10,10,abc\n", "Row 1: 0, 0, 10, 10, abc is not five numbers"),
    (b"x0,y0,x1,y1,t\n0,0,10,10,100\n0,0,10,10,-5\n", "Row 3: the thickness -5 nm is outside"),
    (b"", "holds no rows"),
])
def test_box_csv_refusals_name_the_row(text, row):
    with pytest.raises(InputError, match=row.replace("(", r"\(").replace(")", r"\)")):
        parse_box_csv(text)


def test_refusals_are_sentences_and_keep_what_was_there(section):
    data, boxes = _reference_photo(section)
    section.load_photo(data, "steps.png")
    _draw(section, boxes, STEPS_NM)
    good = section.camcal.fit()
    assert good is not None
    # a known thickness outside the window
    section.camcal.thickness_fields[3].input.value = "800"
    assert section.camcal.fit() is None
    assert "Box 4" in section.camcal.fit_msg.object and "outside the search window" in section.camcal.fit_msg.object
    assert section.camcal.active is good                                 # the calibration in use stays
    section.camcal.thickness_fields[3].input.value = f"{STEPS_NM[3]:g}"
    # a box outside a smaller photo
    small, _ = _reference_photo(section, steps=STEPS_NM[:3])
    section.load_photo(small, "small.png")
    assert section.camcal.fit() is None
    assert "lies outside this photo" in section.camcal.fit_msg.object
    # too few boxes: the fit's own sentence
    section.load_photo(data, "steps.png")
    section.camcal.remove_boxes()
    _draw(section, boxes[:2], STEPS_NM[:2])
    assert section.camcal.fit() is None
    assert section.camcal.fit_kind == "danger" and ">Not fitted: " in section.camcal.fit_msg.object
    # calibrated without a calibration in use: the map is refused with a sentence
    section.camcal.active = None
    section.start_map(sync=True)
    assert "no calibration is in use" in section.map_msg.object


def test_save_and_load_round_trip_through_the_library(section, tmp_path):
    data, boxes = _reference_photo(section)
    section.load_photo(data, "steps.png")
    _draw(section, boxes, STEPS_NM)
    cam = section.camcal
    cam.settings.camera, cam.settings.lamp, cam.settings.objective, cam.settings.na = "Line 3 scope", "halogen", "5x", 0.15
    cal = cam.fit()
    assert cal is not None
    cam.save_name.value, cam.save_user.value = "Line 3 scope 5x", "ak"
    assert cam.save(), cam.lib_msg.object
    text = cam.library.load("camera_calibrations", "Line 3 scope 5x")
    doc = validate_camera_calibration(text)
    assert doc["camera"] == "Line 3 scope" and doc["na"] == 0.15 and len(doc["date"]) == 10
    # a second page loads it from its picker
    other = ColourToThickness(section.ex)
    other.panel()
    other.camcal.library = cam.library
    other.camcal.refresh_list()
    assert list(other.camcal.picker.options.values()) == [("Line 3 scope 5x", 1)]
    other.camcal.picker.value = ("Line 3 scope 5x", 1)
    assert other.camcal.load_selected(), other.camcal.lib_msg.object
    assert other.camcal.active is not None and other.camcal.settings.method == "calibrated"
    assert np.allclose(other.camcal.active.residual_delta_e, cal.residual_delta_e)
    assert "Line 3 scope 5x v1" in other.camcal.active_info.object


def test_a_corrupt_calibration_in_the_library_is_a_sentence(section, tmp_path):
    data, boxes = _reference_photo(section)
    section.load_photo(data, "steps.png")
    _draw(section, boxes, STEPS_NM)
    assert section.camcal.fit() is not None
    cam = section.camcal
    cam.save_name.value, cam.save_user.value = "Scope", "ak"
    assert cam.save()
    path = cam.library.path_for("camera_calibrations", "Scope")
    doc = json.loads(path.read_text())
    doc["calibration"] = {"garbage": [1, 2]}
    path.write_text(json.dumps(doc))                                      # edited by hand: checksum fails
    cam.refresh_list()
    assert "skipped" in cam.lib_msg.object
    cam.active = None
    cam.picker.options = {"Scope · v1": ("Scope", 1)}
    cam.picker.value = ("Scope", 1)
    assert not cam.load_selected()
    assert "Could not load Scope v1" in cam.lib_msg.object and cam.active is None
    # the envelope's own check refuses a calibration that does not rebuild, with the field named
    with pytest.raises(InputError, match="calibration"):
        validate_camera_calibration(json.dumps(doc))


def test_a_map_of_a_photo_of_another_size_is_refused_with_a_sentence(section):
    data, boxes = _reference_photo(section)
    section.load_photo(data, "steps.png")
    _draw(section, boxes, STEPS_NM)
    assert section.camcal.fit() is not None
    other, _ = _reference_photo(section, height=60)
    section.load_photo(other, "other.png")
    section.start_map(sync=True)
    assert section.result is None and section.map_msg.alert_type == "danger"
    assert "made on a 192 x 40 px photo and this photo is 192 x 60 px" in section.map_msg.object
    assert "192 x 40 px photo" in section.camcal.active_info.object       # said beside the calibration too


def test_a_flat_field_is_used_by_the_fit_and_one_of_another_size_is_refused(section):
    data, boxes = _reference_photo(section)
    section.load_photo(data, "steps.png")
    _draw(section, boxes, STEPS_NM)
    y, x = np.mgrid[:40, :192]
    fall = 1.0 - 0.3 * (((x - 96) / 96) ** 2 + ((y - 20) / 96) ** 2)     # an invented lamp fall-off
    bare = np.repeat(np.clip(fall[..., None] * 0.55, 0, 1), 3, axis=2)
    assert section.camcal.load_flat(_png(bare ** (1 / 2.2)), "bare.png"), section.camcal.flat_msg.message.object
    assert "bare.png, 192 x 40 px" in section.camcal.flat_info.object
    cal = section.camcal.fit()
    assert cal is not None and cal.flat_field is not None, section.camcal.fit_msg.object
    assert "with a flat field" in section.camcal.active_info.object
    assert section.camcal.load_flat(_png(np.full((30, 30, 3), 0.5)), "small.png")
    assert section.camcal.fit() is None
    assert "flat field (small.png, 30 x 30 px) is not the size of this photo" in section.camcal.fit_msg.object
    section.camcal.drop_flat()
    assert section.camcal.flat is None and section.camcal.fit() is not None


def _target_photo():
    """(PNG bytes, boxes) of colour-science's averaged 24-patch chart (6 x 4 patches of 20 px) through the
    invented camera."""
    from physics import camera
    from physics.color import lab_to_xyz, xyz_to_srgb

    target = camera.builtin_target()
    srgb = np.clip(xyz_to_srgb(lab_to_xyz(target.lab, "D65", "2"), "D65", "2"), 0, 1)
    lin = np.where(srgb <= 0.04045, srgb / 12.92, ((srgb + 0.055) / 1.055) ** 2.4)
    patches = _camera(lin).reshape(4, 6, 3)
    img = patches.repeat(20, axis=0).repeat(20, axis=1)
    boxes = [(c * 20 + 4, r * 20 + 4, c * 20 + 16, r * 20 + 16) for r in range(4) for c in range(6)]
    return _png(img), boxes, target


def test_a_colour_target_fit_from_its_csv_and_missing_patches_refused(section):
    data, boxes, target = _target_photo()
    section.load_photo(data, "chart.png")
    cam = section.camcal
    cam.settings.source = "target"
    rows = ["patch,L*,a*,b*"] + [f"{n},{L:.3f},{a:.3f},{b:.3f}" for n, (L, a, b) in zip(target.names, target.lab)]
    short = ("\n".join(rows[:11]) + "\n").encode()                     # ten patches only
    assert cam.load_target_csv(short, "chart.csv")
    for b in boxes[:12]:
        cam.add_box(b)
    assert cam.fit() is None
    assert "12 boxes but the target data list 10 patches: box 11 has no patch" in cam.fit_msg.object
    assert "no patch in the target data" in str(cam.rows.objects[-1].objects[-1].object)
    assert not cam.load_target_csv(b"patch,L*,a*,b*\nA1,50,1\n", "bad.csv")
    assert "bad.csv: Row 2 of the target file" in cam.target_msg.message.object
    assert cam.target_name == "chart.csv" and len(cam.target.names) == 10      # the target read before stays
    assert cam.load_target_csv(("\n".join(rows) + "\n").encode(), "chart.csv")
    cal = cam.fit()
    assert cal is not None and cal.kind == "target", cam.fit_msg.object
    assert cam.residuals.object.count("<tr>") == 13 and "dark skin" in cam.residuals.object
    assert np.median(cal.residual_delta_e) < 2


def test_the_lab_library_tab_lists_saves_and_loads_camera_calibrations(section):
    from views.library import LibrarySection

    data, boxes = _reference_photo(section)
    section.load_photo(data, "steps.png")
    _draw(section, boxes, STEPS_NM)
    cal = section.camcal.fit()
    tab = LibrarySection(section.ex, section, library=section.camcal.library)
    tab.kind.value = "camera_calibrations"
    tab.name.set_text("Bench scope")
    tab.user.set_text("cy")
    assert tab.save_current(), tab.message.object
    assert [e.name for e in tab.entries] == ["Bench scope"]
    section.camcal.active = None
    tab.select_file(tab.entries[0].file_name)
    assert tab.load_selected(), tab.message.object
    assert np.allclose(section.camcal.active.matrix, cal.matrix) and "Bench scope v1" in section.camcal.active_label


@pytest.fixture(scope="module")
def saved_doc(explorer):
    """The library text of a calibration fitted on the invented step sample."""
    from physics import camera
    from views.camera_calibration import calibration_file_text

    data, boxes = _reference_photo(SimpleNamespace(ex=explorer))
    cal = camera.calibrate_from_reference(data, boxes, list(STEPS_NM), explorer.state.stack, 0, window_nm=(0, 500))
    text = calibration_file_text(cal, name="Scope")
    assert validate_camera_calibration(text)["calibration"] == cal.to_dict()
    return text


@pytest.mark.parametrize("change", [
    lambda d: d.update(calibration=[1, 2, 3]),
    lambda d: d.update(calibration={"format": "fringegauge camera calibration", "version": 1, "model": ["x"]}),
    lambda d: d["calibration"].update(matrix=[[1e308] * 3] * 3),
    lambda d: d["calibration"].update(boxes=[[0, 0, 10**9, 5]]),
    lambda d: d.update(flat_field={"format": "fringegauge flat field", "grid": "x" * 1000}),
    lambda d: d.update(na="wide"),
    lambda d: d.update(date="yesterday"),
    lambda d: d.update(version=True),
    lambda d: d.update(extra=1),
    lambda d: d.pop("calibration"),
])
def test_hostile_camera_calibration_files_are_refused_with_a_sentence(saved_doc, change):
    """What a hand-made or damaged library file may hold: each is an InputError naming the field, never a crash."""
    doc = json.loads(saved_doc)
    change(doc)
    with pytest.raises(InputError) as info:
        validate_camera_calibration(json.dumps(doc))
    assert str(info.value).endswith((".", "fields calibration."))


def test_the_calibration_settings_travel_in_the_link_and_a_bad_one_is_named():
    from test_views_link import _page

    link = _page()
    cam = link.tabs["Colour → thickness"].get().camcal
    cam.settings.param.update(method="calibrated", source="target", model="root-polynomial", na=0.15,
                              denoise="median")
    other = _page()
    assert other.apply_link_state(link.query()) == []
    back = other.tabs["Colour → thickness"].get().camcal.settings
    assert (back.method, back.source, back.model, back.na, back.denoise) == (
        "calibrated", "target", "root-polynomial", 0.15, "median")
    errors = _page().apply_link_state("?c_cam_model=cubic&c_cam_na=3")
    assert len(errors) == 2 and any("'c_cam_model'" in e and "root-polynomial" in e for e in errors)


def test_under_a_per_user_login_the_calibration_is_saved_under_the_login(section, monkeypatch):
    import views.library as vl

    monkeypatch.setenv(vl.AUTH_ENV, "users")
    monkeypatch.setattr(vl, "login_name", lambda: "jortiz")
    data, boxes = _reference_photo(section)
    section.load_photo(data, "steps.png")
    _draw(section, boxes, STEPS_NM)
    assert section.camcal.fit() is not None
    section.camcal.save_name.value, section.camcal.save_user.value = "Scope", "someone else"
    assert section.camcal.save()
    e = section.camcal.library.list("camera_calibrations")[0]
    assert (e.user, e.user_verified) == ("jortiz", True)


def test_a_raw_file_that_cannot_be_read_is_a_sentence_and_the_photo_stays(section):
    data, _ = _reference_photo(section)
    section.load_photo(data, "steps.png")
    damaged = b"II*\x00" + bytes(range(256)) * 8                      # a TIFF-like camera RAW header, then noise
    assert not section.load_photo(damaged, "frame.dng")
    msg = section.photo_msg.message.object
    assert section.photo_msg.message.visible and "frame.dng:" in msg and msg.rstrip("</div>").endswith(".")
    assert section.photo_name == "steps.png" and section.photo.width == 192
