"""The colour → thickness section's fields, refusals, statistics and cancel, driven without a browser."""

import numpy as np
import pytest
from bokeh.models import DataRange1d

import views.inverse as inv
from views.explorer import FilmExplorer
from views.inverse import MESSAGE_PX, WINDOW_MAX_WIDTH_NM, ColourToThickness

from tests.test_views_inverse import _wedge_png

GOOD = "#525a84"          # the preset's 100 nm oxide, as the film explorer shows it


@pytest.fixture()
def section():
    return ColourToThickness(FilmExplorer())


def _set(sec, **fields):
    for name, text in fields.items():
        getattr(sec, name).input.value = text


def _good_search(sec):
    _set(sec, colour=GOOD)
    sec._on_find()
    assert sec.last_candidates and sec.verdict.alert_type == "success" and sec.table.object


def _refused(sec):
    return (sec.last_candidates is None and sec.table.object == "" and sec.cand_src.data["x"] == []
            and "Best match" not in sec.verdict.object and "Not searched" in sec.verdict.object)


def test_an_upside_down_window_stops_the_search_and_clears_the_result(section):
    _good_search(section)
    _set(section, win_lo="500", win_hi="200")
    section._on_find()
    assert _refused(section)
    assert section.win_hi.message.visible and "must be above the start" in section.win_hi.message.object
    assert "Window to (nm)" in section.verdict.object


@pytest.mark.parametrize("bad", ["bluish", "#12345", ""])
def test_a_refused_colour_clears_the_previous_result(section, bad):
    _good_search(section)
    _set(section, colour=bad)
    section._on_find()
    assert _refused(section) and section.colour.message.visible
    assert "Observed colour" in section.colour.message.object


def test_a_bad_tilted_colour_is_reported_beside_its_own_field(section):
    _set(section, colour=GOOD, colour2="bluish", angle2="40")
    section._on_find()
    assert _refused(section)
    assert section.colour2.message.visible and not section.colour.message.visible


def test_every_field_is_checked_on_each_search_and_a_message_goes_when_its_field_is_fixed(section):
    _set(section, colour=GOOD, angle2="95")              # no tilted colour: the angle is still checked
    section._on_find()
    assert _refused(section) and "Tilt angle (°)" in section.angle2.message.object
    _set(section, angle2="")
    assert not section.angle2.message.visible             # gone as soon as the field is empty
    _set(section, win_lo="abc")
    assert section.win_lo.message.visible and "'abc' is not a number" in section.win_lo.message.object
    _set(section, win_lo="0")
    assert not section.win_lo.message.visible
    _set(section, win_lo="500", win_hi="200")
    assert section.win_hi.message.visible                 # the pair is checked together as it changes
    _set(section, win_hi="1000")
    assert not section.win_hi.message.visible
    _set(section, win_lo="0")
    _good_search(section)
    assert not any(f.message.visible for f in section._typed_fields())


def test_a_missing_tilt_angle_says_what_to_type_and_stays_until_given(section):
    assert section.angle2.input.placeholder.startswith("e.g.")
    _set(section, colour=GOOD, colour2="#6a7fae")
    section._on_find()
    msg = section.angle2.message.object
    assert _refused(section) and "Tilt angle (°)" in msg and "type the angle the second colour was seen at" in msg
    _set(section, nominal="100")                          # another field changing leaves it alone
    assert section.angle2.message.visible
    _set(section, colour2="")                             # no tilted colour: nothing is missing
    assert not section.angle2.message.visible


def test_messages_use_the_labels_on_screen(section):
    for f, text in ((section.win_lo, "x"), (section.win_hi, "x"), (section.nominal, "x"), (section.tolerance, "x"),
                    (section.angle2, "x")):
        f.input.value = text
        section._on_find()
        assert section.last_candidates is None
        assert f.message.object.count(f.input.name) == 1, f.message.object
        f.input.value = {"win_lo": "0", "win_hi": "1000"}.get(
            next(k for k, v in vars(section).items() if v is f), "")


def test_half_a_tolerance_check_is_said(section):
    _set(section, colour=GOOD, nominal="100")
    section._on_find()
    assert section.last_candidates is not None            # a nominal alone still breaks near-ties
    assert "needs both" in section.verdict.object and "<th>in tol.</th>" not in section.table.object
    _set(section, nominal="", tolerance="10")
    section._on_find()
    assert _refused(section) and "needs a nominal thickness" in section.tolerance.message.object
    _set(section, nominal="100")
    section._on_find()
    assert "<th>in tol.</th>" in section.table.object and not section.tolerance.message.visible


def test_messages_wrap_inside_the_field_column(section):
    for f in section._typed_fields():
        assert f.message.width == MESSAGE_PX < inv.TYPED_COLUMN_PX


def test_the_colour_equal_range_does_not_depend_on_the_window(section):
    _set(section, colour=GOOD, win_lo="0", win_hi="1000")
    section._on_find()
    narrow = section.last_candidates[0].range_nm
    _set(section, win_hi=f"{WINDOW_MAX_WIDTH_NM:g}")
    section._on_find()
    wide = section.last_candidates[0].range_nm
    assert np.allclose(narrow, wide, atol=0.2) and wide[1] - wide[0] > 2
    _set(section, win_hi="100000")
    section._on_find()
    assert _refused(section) and f"{WINDOW_MAX_WIDTH_NM:g}" in section.win_hi.message.object


def test_a_label_near_the_strip_end_is_aligned_inward(section):
    lo, hi = section.strip_fig.x_range.start, section.strip_fig.x_range.end
    assert section._label_align([lo + 1, (lo + hi) / 2, hi - 1]) == ["left", "center", "right"]


def test_photo_figures_keep_the_photo_aspect(section):
    for f in (section.photo_fig, section.tmap_fig, section.conf_fig):
        assert f.match_aspect and isinstance(f.x_range, DataRange1d) and isinstance(f.y_range, DataRange1d)
        assert f.y_range.flipped                              # rows run down, as in the photo


def _stray_wedge(section):
    """The invented wedge with 40 scattered pixels painted in the colour of a far order (an invented fault)."""
    from PIL import Image
    import io
    data, d = _wedge_png()
    img = np.array(Image.open(io.BytesIO(data)))
    from physics.appearance import color_map
    stray = np.round(color_map(section.ex.state.stack, 0, [930.0], [0.0]).rgb[0, 0] * 255).astype(np.uint8)
    rng = np.random.default_rng(3)
    ys, xs = rng.integers(5, 55, 40), rng.integers(40, 150, 40)
    img[ys, xs] = stray
    buf = io.BytesIO()
    Image.fromarray(img).save(buf, format="PNG")
    return buf.getvalue(), d, ys, xs


def test_map_statistics_are_robust_to_stray_pixels(section):
    data, d, ys, xs = _stray_wedge(section)
    assert section.load_photo(data, "stray.png")
    section.set_box("calib", (0, 0, 20, 60))
    section.start_map(sync=True)
    st, r = section.result.stats, section.result
    assert st["max_nm"] > 800                               # the strays stretch the min-max ...
    assert st["p_high_nm"] < d.max() + 15                   # ... not the robust range
    assert st["uniformity_robust"] < st["uniformity"]
    assert np.mean(r.order_outlier[ys, xs]) > 0.9 and st["order_outliers"] < 3 * len(ys)
    assert "P1" in section.stats.object and "another order" in section.stats.object
    left, right = section.hist_src.data["left"], section.hist_src.data["right"]
    assert left[0] == pytest.approx(st["p_low_nm"]) and right[-1] == pytest.approx(st["p_high_nm"])
    assert "map 1 of stray.png" in section.map_msg.object.lower()
    overlay = section.stray_src.data["image"][0]                 # drawn over the map, at display size
    assert overlay.shape == section.tmap_src.data["image"][0].shape and (overlay != 0).sum() >= 0.9 * len(set(zip(ys, xs)))


def test_a_new_photo_takes_the_old_map_off_the_page(section):
    data, _ = _wedge_png()
    section.load_photo(data, "a.png")
    section.start_map(sync=True)
    assert section.tmap_src.data["image"]
    section.load_photo(data, "b.png")
    assert section.result is None and not section.tmap_src.data["image"] and section.stats.object == ""
    assert not section.stray_src.data["image"]
    assert section.dl_npy.disabled and not section.map_msg.visible


def test_cancel_names_the_map_still_shown(section):
    data, _ = _wedge_png()
    section.load_photo(data, "wedge.png")
    section.cancel()
    assert "No map is shown" in section.progress_text.object
    section.start_map(sync=True)
    section.cancel()
    assert "earlier one (map 1 of wedge.png" in section.progress_text.object


def test_a_map_that_finished_before_the_cancel_is_not_shown_and_this_is_said(section, monkeypatch):
    data, _ = _wedge_png()
    section.load_photo(data, "wedge.png")
    section.start_map(sync=True)
    first = section.result
    real = inv.thickness_map

    def finishes_then_cancelled(progress=None, **kw):
        out = real(progress=progress, **kw)
        section.cancel()                                   # the click arrives after the last stage
        return out
    monkeypatch.setattr(inv, "thickness_map", finishes_then_cancelled)
    section.start_map(sync=True)
    assert section.result is first
    text = section.progress_text.object
    assert "had already finished" in text and "not shown" in text and "map 1 of wedge.png" in text


def test_the_verdict_reads_the_tolerance_and_a_changed_view_clears_the_search(section):
    ex = section.ex
    _set(section, colour=GOOD, nominal="100", tolerance="10")      # 100 nm of oxide
    section._on_find()
    assert "within 100 ± 10 nm" in section.verdict.object
    section.nominal.input.value = "600"
    section._on_find()
    assert "600 ± 10 nm" in section.verdict.object and section.verdict.alert_type in ("warning", "danger")
    assert "The best match is within" not in section.verdict.object
    section.set_shown(False)
    ex.state.angle_deg = 30.0                                     # the explorer's view changed: not this search
    assert section.last_candidates is None and "changed since this search" in section.verdict.object
