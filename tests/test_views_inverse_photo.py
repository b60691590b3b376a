"""Photos on the colour tab: the picked point's marker and answer, a line profile, the wafer circle and its
sites, driven from the view objects without a browser."""

import csv
import io

import numpy as np
import pytest
from PIL import Image

from physics.appearance import color_map
from views.explorer import FilmExplorer
from views.inverse import ColourToThickness


@pytest.fixture()
def section():
    return ColourToThickness(FilmExplorer())


def _png(rgb):
    buf = io.BytesIO()
    Image.fromarray(np.round(np.clip(rgb, 0, 1) * 255).astype(np.uint8)).save(buf, format="PNG")
    return buf.getvalue()


def _wafer_photo(section, n=161, radius=70):
    """An invented 100 mm furnace-monitor wafer: oxide 90 nm at the centre rising to 130 nm at the edge, on a
    bare silicon chuck; (photo bytes, centre, radius px)."""
    st = section.ex.state.stack
    y, x = np.mgrid[:n, :n] + 0.5
    r = np.hypot(x - n / 2, y - n / 2)
    T = np.where(r <= radius, 90.0 + 40.0 * (r / radius) ** 2, 0.0)
    d = np.unique(np.round(T, 1))
    rgb = color_map(st, 0, d, [0.0]).rgb[:, 0, :]
    img = rgb[np.searchsorted(d, np.round(T, 1))]
    return _png(img), (n / 2, n / 2), radius


def _set_window(section, hi):
    section.win_hi.input.value = str(hi)


def test_a_picked_point_is_marked_and_answered_beside_the_photo(section):
    data, c, r = _wafer_photo(section)
    section.load_photo(data, "wafer.png")
    cands = section.pick(80, 80)
    assert cands is not None and section.mark_src.data["x"] == [80.5]
    assert section.mark_src.data["label"][0].endswith(("nm", "nm?"))
    assert "Picked (80, 80) px" in section.pick_info.object and "nm" in section.pick_info.object


def test_a_line_profile_follows_the_drawn_line(section):
    data, (cx, cy), r = _wafer_photo(section)
    section.load_photo(data, "wafer.png")
    _set_window(section, 200)
    section.mode.value = "line"
    section.tools.tap(cx, cy)
    section.tools.tap(cx + 60, cy)
    assert section.tools.line == ((cx, cy), (cx + 60, cy))
    section.start_map(sync=True)
    p = section.tools.profile
    assert p is not None and p.unit == "px" and p.distance[-1] == pytest.approx(60.0)
    ok = np.isfinite(p.thickness_nm)
    assert ok.mean() > 0.9 and p.thickness_nm[ok][-1] > p.thickness_nm[ok][0] + 20      # thicker towards the edge
    assert len(section.tools.prof_src.data["d"]) == p.distance.size
    section.tools.set_circle((cx - r, cy - r, cx + r, cy + r))                          # now a scale: mm
    assert section.tools.profile.unit == "mm"
    assert section.tools.profile.distance[-1] == pytest.approx(60 * section.tools.settings.diameter_mm / (2 * r))


@pytest.mark.parametrize("pattern", [5, 9, 13, 49])
def test_sites_on_the_wafer_inside_the_edge_exclusion(section, pattern):
    data, (cx, cy), r = _wafer_photo(section)
    section.load_photo(data, "wafer.png")
    _set_window(section, 200)
    section.start_map(sync=True)
    section.mode.value = "wafer"
    section.tools.set_circle((cx - r, cy - r, cx + r, cy + r))
    w = section.tools.settings
    w.diameter_mm, w.edge_exclusion_mm, w.pattern = 100.0, 5.0, pattern
    s = section.tools.sites
    assert s is not None and s.stats["sites"] == s.stats["measured"] == pattern
    assert np.hypot(s.x_mm, s.y_mm).max() == pytest.approx(45.0)
    assert 88 < s.stats["min_nm"] < 95 and s.stats["max_nm"] < 130
    assert f"{pattern} sites ({pattern} measured)" in section.tools.site_table.object
    assert len(section.tools.site_src.data["x"]) == pattern
    rows = [row for row in csv.reader(section._stats_csv()) if row and not row[0].startswith("#")]
    assert rows[2] == ["site", "x_mm", "y_mm", "thickness_nm"] and len(rows) == 3 + pattern


def test_a_bad_wafer_setting_is_said_not_raised(section):
    data, (cx, cy), r = _wafer_photo(section)
    section.load_photo(data, "wafer.png")
    _set_window(section, 200)
    section.start_map(sync=True)
    section.tools.set_circle((cx - r, cy - r, cx + r, cy + r))
    section.tools.settings.edge_exclusion_mm = 80.0                                     # more than the 75 mm radius
    assert section.tools.sites is None and "edge exclusion" in section.tools.info.object


def test_a_photo_is_read_as_from_an_uncalibrated_camera_unless_the_user_chose(section):
    data, c, r = _wafer_photo(section)
    assert section.reading.reading == "by eye / on a display"
    section.load_photo(data, "wafer.png")
    assert (section.reading.reading, section.reading.reading_error_de) == ("uncalibrated camera", 4.0)
    assert "uncalibrated camera" in section.pick_info.object
    section.reading.reading = "calibrated camera"
    section.load_photo(data, "wafer2.png")
    assert section.reading.reading == "calibrated camera"             # a choice the user made is kept
