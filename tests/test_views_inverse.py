"""The colour → thickness section driven from its objects, without a browser."""

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
    ex = FilmExplorer()
    return ColourToThickness(ex)


def _wedge_png(bits=8):
    """An invented bevelled oxide on a silicon monitor wafer: bare Si strip, then 50 → 600 nm."""
    ex = FilmExplorer()
    st = ex.state.stack
    d = np.concatenate([np.zeros(20), np.linspace(50, 600, 140)])
    rgb = color_map(st, 0, d, [0.0]).rgb[:, 0, :]
    img = np.repeat(rgb[None, :, :], 60, axis=0)
    buf = io.BytesIO()
    Image.fromarray(np.round(img * 255).astype(np.uint8)).save(buf, format="PNG")
    return buf.getvalue(), d


def test_typed_colour_gives_ranked_candidates(section):
    section.colour.input.value = "#525a84"
    section._on_find()
    c = section.last_candidates
    assert c and c.acceptable and abs(c[0].thickness_nm - 100) < 3
    assert "100" in section.table.object and section.verdict.alert_type == "success"
    assert len(section.cand_src.data["x"]) == len(c)


@pytest.mark.parametrize("bad", ["purplish", "#12", "400,0,0"])
def test_bad_colour_is_reported_beside_the_field(section, bad):
    section.colour.input.value = bad
    section._on_find()
    assert section.colour.message.visible and section.last_candidates is None


def test_no_match_is_flagged(section):
    section.colour.input.value = "#00ff00"
    section._on_find()
    assert section.verdict.alert_type == "danger" and "No thickness" in section.verdict.object


def test_photo_map_calibration_pick_and_downloads(section):
    data, d = _wedge_png()
    assert section.load_photo(data, "wedge.png")
    section.set_box("calib", (0, 0, 20, 60))
    section.start_map(sync=True)
    r = section.result
    assert r is not None and r.thickness_nm.shape == (60, 160)
    err = np.abs(r.thickness_nm[:, 20:] - d[None, 20:])
    assert np.nanmean(err < 15) > 0.95
    assert "mean" in section.stats.object
    arr = np.load(section._npy())
    assert arr.dtype == np.float32 and arr.shape == (60, 160)
    assert Image.open(section._png()).format == "PNG"
    rows = [r for r in csv.reader(section._stats_csv()) if r and not r[0].startswith("#")]
    assert rows[0][0] == "mean_nm" and float(rows[1][0]) > 0
    cands = section.pick(100, 30)
    assert cands is not None and abs(cands[0].thickness_nm - d[100]) < 15


def test_bad_photo_keeps_the_previous_one(section):
    data, _ = _wedge_png()
    section.load_photo(data, "wedge.png")
    for bad in (b"", b"not an image", _grey_png()):
        assert not section.load_photo(bad, "bad.png")
        assert section.photo_msg.message.visible
        assert section.photo.width == 160


def _grey_png():
    buf = io.BytesIO()
    Image.new("L", (10, 10), 128).save(buf, format="PNG")
    return buf.getvalue()


def test_saturated_calibration_box_is_refused(section):
    img = np.full((40, 40, 3), 255, dtype=np.uint8)
    buf = io.BytesIO()
    Image.fromarray(img).save(buf, format="PNG")
    section.load_photo(buf.getvalue(), "white.png")
    section.set_box("calib", (0, 0, 10, 10))
    section.start_map(sync=True)
    assert section.map_msg.visible and "overexposed" in section.map_msg.object


def test_rectangle_pick_uses_the_mean_in_linear_light(section):
    data, d = _wedge_png()
    section.load_photo(data, "wedge.png")
    cands = section.pick_box((90, 10, 95, 50))
    assert cands is not None and abs(cands[0].thickness_nm - d[92]) < 15


def test_server_limits_on_photos_and_heavy_jobs(section, monkeypatch):
    """Named limits (views/limits.py): photo size, and heavy jobs running at once on the server."""
    import threading
    from views import limits as L

    data, _ = _wedge_png()
    monkeypatch.setenv("FRINGEGAUGE_MAX_PHOTO_MEGAPIXELS", "0.005")      # 5,000 pixels; the wedge has 9,600
    assert not section.load_photo(data, "wedge.png")
    assert "pixel" in section.photo_msg.message.object.lower() or "megapixel" in section.photo_msg.message.object.lower()
    monkeypatch.delenv("FRINGEGAUGE_MAX_PHOTO_MEGAPIXELS")
    assert section.load_photo(data, "wedge.png")
    monkeypatch.setenv("FRINGEGAUGE_MAX_JOBS_SERVER", "1")
    limits = L.Limits.from_env()
    release = threading.Event()
    entered = threading.Event()

    def hold():
        with L.heavy_job("test", 1, "other", limits):
            entered.set()
            release.wait(10)
    t = threading.Thread(target=hold)
    t.start()
    entered.wait(10)
    try:
        section.start_map(sync=True)
        assert section.map_msg.visible and "busy" in section.map_msg.object
    finally:
        release.set()
        t.join()
    section.start_map(sync=True)
    assert section.result is not None
