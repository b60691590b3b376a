"""Colour tab: the colour reading error, the viewing conditions beside the answer, colour words, and the
map downloads (orientation, title), driven from the view objects without a browser."""

import csv
import io

import numpy as np
import pytest
from PIL import Image

from physics.appearance import color_map
from physics.inverse import AMBIGUOUS_DE
from views.explorer import FilmExplorer
from views.inverse import READING_PRESETS, ColourToThickness


@pytest.fixture()
def section():
    return ColourToThickness(FilmExplorer())


def _find(section, colour, **fields):
    section.colour.input.value = colour
    for name, value in fields.items():
        getattr(section, name).input.value = value
    section._on_find()
    return section.last_candidates


def test_reading_presets_are_declared_and_custom_follows_a_typed_value(section):
    r = section.reading
    assert r.reading == "by eye / on a display" and r.reading_error_de == READING_PRESETS["by eye / on a display"]
    r.reading = "calibrated camera"
    assert r.reading_error_de == AMBIGUOUS_DE
    r.reading_error_de = 2.5
    assert r.reading == "custom" and r.reading_error_de == 2.5
    with pytest.raises(ValueError):
        r.reading_error_de = 0.0                       # the declared bounds refuse a zero error


def test_a_colour_of_several_possible_orders_is_not_green(section):
    c = _find(section, "#937e8d")                      # by eye: 850 nm, or 666 / 593 nm
    assert c.ambiguous and [round(p.thickness_nm) for p in c.possible][:1] == [850]
    assert {round(p.thickness_nm / 10) for p in c.possible} >= {85, 67, 59}
    assert section.verdict.alert_type == "warning"
    head = section.verdict.object
    assert head.startswith("<b>850 nm, or 666 / 593 nm: colour alone cannot decide</b>")
    assert "tilt the part" in head and "nominal" in head
    assert section.table.object.count(">possible<") == 3


def test_a_calibrated_reading_of_the_same_colour_is_one_answer(section):
    _find(section, "#937e8d")
    section.reading.reading = "calibrated camera"      # the answer on the page is searched again
    c = section.last_candidates
    assert not c.ambiguous and len(c.possible) == 1 and section.verdict.alert_type == "success"
    assert "Best match 850 nm" in section.verdict.object


def test_the_viewing_conditions_sit_beside_the_answer_and_are_the_explorers(section):
    ex = section.ex
    ex.state.angle_deg = 41.5                          # as a tap on the explorer's map would set it
    assert section.view_angle.value == 41.5
    _find(section, "#937e8d")
    assert "at 41.5° from the normal" in section.verdict.object
    section.view_angle.value = 0.0                     # set back from the colour tab
    assert ex.state.angle_deg == 0.0
    c = _find(section, "#937e8d")
    assert round(c[0].thickness_nm) == 850
    assert "at 0° from the normal, lamp D65, CIE 2° observer" in section.verdict.object
    section.view_angle.value = 41.5                    # changed beside the answer: answered again at once
    assert round(section.last_candidates[0].thickness_nm) != 850 and "at 41.5° from" in section.verdict.object
    section.view_lamp.value = "A"
    assert ex.state.illuminant == "A" and "lamp A" in section.verdict.object


def test_a_picked_point_is_not_answered_again_under_new_conditions(section):
    from tests.test_views_inverse import _wedge_png
    data, _ = _wedge_png()
    section.load_photo(data, "wedge.png")
    assert section.pick(100, 30) is not None
    section.view_angle.value = 20.0                    # its colour was read under the old lamp and angle
    assert section.last_candidates is None and "changed since this search" in section.verdict.object


def test_a_colour_word_is_an_approximation_with_its_own_error(section):
    from physics.colour_words import colour_word
    c = _find(section, "gold")
    w = colour_word("gold")
    assert c is not None and c.reading_error_de == w.reading_error_de and c.words == [w]
    assert "colour word" in section.verdict.object and "approximation" in section.verdict.object
    assert not section.colour.message.visible


def test_a_tilted_colour_that_conflicts_says_which(section):
    _find(section, "#937e8d", colour2="#4d6caf", angle2="40")
    assert section.verdict.alert_type == "danger"
    text = section.verdict.object
    assert "The 0° colour matches 850" in text and "the 40° colour matches nothing within" in text


def _known_map(section, T):
    """Put a map of thickness ``T`` (H, W) on the section as if a photo map had just finished."""
    from physics.inverse import ThicknessMap, _stats
    H, W = T.shape
    data = io.BytesIO()
    Image.fromarray(np.zeros((H, W, 3), dtype=np.uint8)).save(data, format="PNG")
    section._show_photo("known.png", __import__("views.inverse", fromlist=["_decode_photo"])._decode_photo(
        data.getvalue(), max_pixels=10**6))
    stats = _stats(T)
    r = ThicknessMap(T, np.zeros_like(T), np.full_like(T, 10.0), np.ones(T.shape, int), np.ones(3), stats, "")
    section._job += 1
    section._finish_map(section._job, section.ex._snapshot(), r, None, run_number=1, window=(0.0, 450.0))


def test_the_png_download_has_the_photos_top_row_at_the_top(section):
    T = np.full((40, 60), 400.0)
    T[:10] = 50.0                                      # an invented map: a thin band along the photo's top edge
    _known_map(section, T)
    img = np.asarray(Image.open(section._png()).convert("RGB")).astype(int)
    low = np.array([0x44, 0x01, 0x54])                 # Viridis' first colour (the thin band)
    high = np.array([0xFD, 0xE7, 0x25])                # Viridis' last colour (the rest)
    ys_low = np.nonzero(np.abs(img - low).sum(axis=2) < 30)[0]
    ys_high = np.nonzero(np.abs(img - high).sum(axis=2) < 30)[0]
    assert ys_low.size and ys_high.size
    # the map's band is above the rest (the colour bar's own ends are outside the map's rows)
    band = ys_low[ys_low < np.median(ys_high)]
    assert band.size > 0.5 * ys_low.size


def test_downloads_name_the_stack_by_the_range_searched(section, monkeypatch):
    from views import inverse
    section.ex.state.thickness_nm = 100.0              # the explorer's thickness is not the map's
    _known_map(section, np.linspace(0, 450, 40 * 60).reshape(40, 60))
    titles = []
    real = inverse.render.colorbar_png
    monkeypatch.setattr(inverse.render, "colorbar_png", lambda v, **k: titles.append(k["title"]) or real(v, **k))
    section._png()
    text = section._stats_csv().getvalue()
    for t in (titles[0], text):
        assert "SiO2 (unknown, searched 0–450 nm)" in t and "SiO2 100 nm" not in t
    rows = [r for r in csv.reader(io.StringIO(text)) if r and not r[0].startswith("#")]
    assert rows[0][0] == "mean_nm"


def test_a_photo_map_marks_pixels_whose_order_colour_cannot_decide(section):
    """An invented bevelled oxide 0 → 900 nm: a wide reading error leaves more pixels' order undecided."""
    st = section.ex.state.stack
    d = np.linspace(0, 900, 180)
    img = np.repeat(color_map(st, 0, d, [0.0]).rgb[:, 0, :][None], 20, axis=0)
    buf = io.BytesIO()
    Image.fromarray(np.round(img * 255).astype(np.uint8)).save(buf, format="PNG")
    section.load_photo(buf.getvalue(), "bevel.png")
    counts = {}
    for preset in ("calibrated camera", "by eye / on a display"):
        section.reading.reading = preset
        section.start_map(sync=True)
        counts[preset] = section.result.stats["undecided"]
        assert section.result.undecided.shape == (20, 180)
    assert counts["by eye / on a display"] > counts["calibrated camera"]
    assert "order not decided by colour" in section.stats.object


def test_a_linear_photo_is_previewed_as_a_display_would_show_it():
    """A 16-bit linear TIFF is drawn sRGB-encoded (IEC 61966-2-1, colour-science's encoding), an 8-bit sRGB
    photo as its codes: neither looks darker on the page than the part photographed."""
    import tifffile
    from views.inverse import _decode_photo
    lin = np.full((8, 10, 3), 0.2)
    buf = io.BytesIO()
    tifffile.imwrite(buf, np.round(lin * 65535).astype(np.uint16), photometric="rgb")
    photo, preview = _decode_photo(buf.getvalue(), max_pixels=10_000)
    assert photo.linear
    red = int(preview.view(np.uint8).reshape(8, 10, 4)[0, 0, 0])
    assert red == pytest.approx(255 * (1.055 * 0.2 ** (1 / 2.4) - 0.055), abs=1.0)      # 124, not 51
    png = io.BytesIO()
    Image.fromarray(np.full((8, 10, 3), 124, np.uint8)).save(png, format="PNG")
    photo8, preview8 = _decode_photo(png.getvalue(), max_pixels=10_000)
    assert not photo8.linear and int(preview8.view(np.uint8).reshape(8, 10, 4)[0, 0, 0]) == 124
