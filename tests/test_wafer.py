"""Line profiles, the wafer's usable area and site statistics of a thickness map (invented wafer maps)."""

import numpy as np
import pytest

from physics import InputError
from physics.wafer import SITE_PATTERNS, line_profile, site_layout_mm, wafer_mask, wafer_sites


@pytest.mark.parametrize("pattern", sorted(SITE_PATTERNS))
def test_site_layouts_have_their_count_a_centre_and_an_outer_ring_on_the_usable_edge(pattern):
    xy = site_layout_mm(pattern, 72.0)
    r = np.hypot(*xy.T)
    assert xy.shape == (pattern, 2) and r[0] == 0.0
    assert r.max() == pytest.approx(72.0) and np.all(r <= 72.0 + 1e-9)
    assert len({(round(x, 6), round(y, 6)) for x, y in xy}) == pattern          # no site twice


def _radial_map(n=301, radius_px=140.0):
    """An invented 150 mm wafer seen 301 px wide: thicker towards the edge, and thinner in its upper half."""
    y, x = np.mgrid[:n, :n] + 0.5
    c = n / 2
    scale = 75.0 / radius_px                                                     # mm per pixel
    r_mm = np.hypot(x - c, y - c) * scale
    T = 100.0 + 0.002 * r_mm ** 2 - np.where(y < c, 5.0, 0.0)
    T[np.hypot(x - c, y - c) > radius_px] = np.nan                               # off the wafer: unmatched
    return T, (c, c), radius_px, scale


def test_sites_read_the_map_where_they_lie_with_y_up():
    T, centre, r_px, scale = _radial_map()
    s = wafer_sites(T, centre, r_px, diameter_mm=150.0, edge_exclusion_mm=5.0, pattern=9)
    assert s.mm_per_px == pytest.approx(scale) and s.usable_radius_mm == pytest.approx(70.0)
    r_mm = np.hypot(s.x_mm, s.y_mm)
    expected = 100.0 + 0.002 * r_mm ** 2 - np.where(s.y_mm > 0, 5.0, 0.0)      # y up: +y sites are the thin half
    # a site's square is averaged over the usable area only, so an edge site leans a little inward
    assert np.allclose(s.thickness_nm[np.abs(s.y_mm) > 1], expected[np.abs(s.y_mm) > 1], atol=0.5)
    assert s.thickness_nm[np.argmax(s.y_mm)] < s.thickness_nm[np.argmin(s.y_mm)] - 4
    st = s.stats
    assert st["sites"] == st["measured"] == 9
    assert st["range_nm"] == pytest.approx(st["max_nm"] - st["min_nm"])
    assert st["uniformity"] == pytest.approx(st["range_nm"] / (2 * st["mean_nm"]))
    same = wafer_sites(T, centre, r_px, mm_per_px=scale, edge_exclusion_mm=5.0, pattern=9)
    assert np.allclose(same.thickness_nm, s.thickness_nm)


def test_the_edge_exclusion_leaves_out_the_outer_ring():
    m = wafer_mask((100, 100), (50, 50), 40, 10)
    assert m[50, 50] and not m[50, 50 + 35] and m[50, 50 + 29]
    assert m.sum() == pytest.approx(np.pi * 30 ** 2, rel=0.03)
    with pytest.raises(InputError, match="edge exclusion"):
        wafer_mask((10, 10), (5, 5), 4, 4)


@pytest.mark.parametrize("kwargs, fragment", [
    (dict(pattern=7, diameter_mm=150.0), "7-site"), (dict(), "diameter"),
    (dict(diameter_mm=150.0, edge_exclusion_mm=80.0), "edge exclusion"), (dict(diameter_mm=-1.0), "diameter_mm"),
])
def test_bad_wafer_settings(kwargs, fragment):
    T, centre, r_px, _ = _radial_map(61, 28.0)
    with pytest.raises(InputError, match=fragment):
        wafer_sites(T, centre, r_px, **kwargs)


def test_a_line_profile_follows_the_map_from_start_to_end():
    T = np.tile(np.arange(200.0), (50, 1))                                       # an invented ramp, 1 nm a pixel
    p = line_profile(T, (10, 25), (110, 25))
    assert p.unit == "px" and p.distance[0] == 0 and p.distance[-1] == pytest.approx(100.0)
    assert np.allclose(p.thickness_nm, 10 + p.distance, atol=1.0)
    back = line_profile(T, (110, 25), (10, 25), mm_per_px=0.5)
    assert back.unit == "mm" and back.distance[-1] == pytest.approx(50.0) and back.thickness_nm[0] == 110
    with pytest.raises(InputError, match="outside"):
        line_profile(T, (0, 0), (500, 0))
    with pytest.raises(InputError, match="shorter"):
        line_profile(T, (3, 3), (3.2, 3))


def test_area_statistics_read_the_usable_area_and_thin_out_a_large_one(monkeypatch):
    from physics import wafer
    T, centre, r_px, _ = _radial_map()
    full = wafer.area_statistics(T, centre, r_px, 10)
    mask = wafer_mask(T.shape, centre, r_px, 10)
    assert full["stride"] == 1 and full["pixels"] == mask.sum()
    assert full["mean_nm"] == pytest.approx(np.nanmean(T[mask]))
    monkeypatch.setattr(wafer, "AREA_MAX_PIXELS", 5_000)
    thin = wafer.area_statistics(T, centre, r_px, 10)
    assert thin["stride"] > 1 and thin["pixels"] <= 5_000
    assert thin["mean_nm"] == pytest.approx(full["mean_nm"], abs=0.5)
