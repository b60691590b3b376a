"""PNG figures: valid images, colours where the data put them, round ticks, refused bad input."""

import io
import math

import numpy as np
import pytest
from hypothesis import given, strategies as st
from PIL import Image

from physics.errors import InputError
from views import render
from views.render import colorbar_png, map_png, nice_ticks, strip_layout, strip_png

FOOTER = "Computed colours; not certified metrology. Display and camera colours differ."


def _open(png: bytes) -> Image.Image:
    assert isinstance(png, bytes)
    img = Image.open(io.BytesIO(png))
    assert img.format == "PNG"
    img.load()
    return img.convert("RGB")


def _rgb_at(img: Image.Image, x: int, y: int) -> np.ndarray:
    return np.array(img.getpixel((int(x), int(y))), dtype=float)


def _uniform_map(colour, n_y=12, n_x=20):
    return np.broadcast_to(np.asarray(colour, dtype=float), (n_y, n_x, 3)).copy()


def _ramp_strip(t):
    """Colours that change linearly with thickness over 0..1000 nm, distinct everywhere."""
    s = (t - 0.0) / 1000.0
    return np.stack([s, 1.0 - s, 0.25 + 0.5 * s], axis=-1)


# ---------------------------------------------------------------------------------- nice_ticks

def _mantissa(step):
    return step / 10.0 ** math.floor(math.log10(step) + 1e-12)


@pytest.mark.parametrize("lo, hi, expected", [
    (0.0, 1000.0, [0, 200, 400, 600, 800, 1000]),
    (0.0, 70.0, [0, 10, 20, 30, 40, 50, 60, 70]),
    (380.0, 780.0, [400, 450, 500, 550, 600, 650, 700, 750]),
    (-1.0, 1.0, [-1.0, -0.5, 0.0, 0.5, 1.0]),  # 11 or 5 ticks tie at 3 from 8: larger step wins
    (0.013, 0.087, [0.02, 0.03, 0.04, 0.05, 0.06, 0.07, 0.08]),
])
def test_nice_ticks_examples(lo, hi, expected):
    np.testing.assert_allclose(nice_ticks(lo, hi), expected)


def test_nice_ticks_print_exactly():
    ticks = nice_ticks(0.0, 0.7)
    assert [f"{v}" for v in ticks] == ["0.0", "0.1", "0.2", "0.3", "0.4", "0.5", "0.6", "0.7"]
    ticks = nice_ticks(-3.0, 3.0)
    assert not np.any(np.signbit(ticks[ticks == 0]))  # no "-0"


@given(lo=st.floats(-1e6, 1e6), log_span=st.floats(-4, 6), target=st.integers(2, 12))
def test_nice_ticks_round_steps_cover_range(lo, log_span, target):
    span = 10.0 ** log_span * max(1.0, abs(lo)) * 1e-3
    hi = lo + span
    if hi <= lo:
        return
    ticks = nice_ticks(lo, hi, target)
    assert ticks.size >= 2
    steps = np.diff(ticks)
    step = float(np.median(steps))
    np.testing.assert_allclose(steps, step, rtol=1e-5)
    assert any(abs(_mantissa(step) - m) < 1e-6 for m in (1.0, 2.0, 5.0, 10.0))
    tol = 1e-9 * max(1.0, abs(lo), abs(hi))
    assert lo - tol <= ticks[0] < lo + step + tol
    assert hi - step - tol < ticks[-1] <= hi + tol
    assert ticks.size <= 2.5 * target + 2


@pytest.mark.parametrize("lo, hi", [(1e6, 1e6 + 1e-3), (-1e6 - 0.07, -1e6), (123456.789, 123456.79),
                                    (1e6, 1e6 + 1e-9), (1.0, 1.0 + 1e-15), (0.0, 1e300)])
def test_nice_ticks_stay_inside_far_from_zero(lo, hi):
    ticks = nice_ticks(lo, hi)
    assert 2 <= ticks.size <= 21
    assert np.all(np.diff(ticks) >= 0)
    assert ticks[0] >= lo - 1e-12 * abs(lo) and ticks[-1] <= hi + 1e-12 * abs(hi)


def test_nice_ticks_default_gives_six_to_ten():
    for lo, hi in [(0, 1), (0, 3), (0, 7), (10, 23), (0, 90), (0, 1000), (350, 700), (-5, 5)]:
        assert 5 <= nice_ticks(lo, hi).size <= 11, (lo, hi)


def test_nice_ticks_degenerate_and_bad():
    np.testing.assert_array_equal(nice_ticks(3.0, 3.0), [3.0])
    for args in [(float("nan"), 1.0), (0.0, float("inf")), (2.0, 1.0), ("a", 1.0)]:
        with pytest.raises(InputError):
            nice_ticks(*args)
    with pytest.raises(InputError):
        nice_ticks(0.0, 1.0, target=1)


# ---------------------------------------------------------------------------------- map_png

def _map(rgb, xs=None, ys=None, **kw):
    shape = np.shape(rgb)
    xs = np.arange(shape[1], dtype=float) * 10.0 if xs is None else xs
    ys = np.arange(shape[0], dtype=float) * 5.0 if ys is None else ys
    kw.setdefault("x_label", "Thickness (nm)")
    kw.setdefault("y_label", "Viewing angle θ (°)")
    kw.setdefault("title", "Test map")
    return map_png(rgb, xs, ys, **kw)


def test_map_png_is_a_reasonable_png_and_centre_keeps_colour():
    colour = (0.8, 0.35, 0.1)
    img = _open(_map(_uniform_map(colour), subtitle="Air / SiO₂ / Si · D65", footer=FOOTER))
    w, h = img.size
    assert 900 <= w <= 2500 and 400 <= h <= 2000
    np.testing.assert_allclose(_rgb_at(img, w // 2, h // 2), np.round(np.array(colour) * 255), atol=1)


def test_map_png_orientation_y_up_x_right():
    rgb = np.zeros((2, 2, 3))
    rgb[0, :] = (1.0, 0.0, 0.0)   # lowest y: red
    rgb[1, :] = (0.0, 0.0, 1.0)   # highest y: blue
    img = np.asarray(_open(_map(rgb)))
    col = img[:, img.shape[1] // 2]
    red = np.where(np.all(col == (255, 0, 0), axis=1))[0]
    blue = np.where(np.all(col == (0, 0, 255), axis=1))[0]
    assert red.size > 100 and blue.size > 100
    assert blue.max() < red.min()  # blue drawn above red

    rgb = np.zeros((2, 2, 3))
    rgb[:, 0] = (1.0, 0.0, 0.0)   # lowest x: red
    rgb[:, 1] = (0.0, 1.0, 0.0)
    img = np.asarray(_open(_map(rgb)))
    row = img[img.shape[0] // 2]
    red = np.where(np.all(row == (255, 0, 0), axis=1))[0]
    green = np.where(np.all(row == (0, 255, 0), axis=1))[0]
    assert red.size > 300 and green.size > 300
    assert red.max() < green.min()
    assert red.size + green.size >= 800  # plot area at least ~800 px wide


def test_map_png_crosshair_draws_black_and_white():
    colour = (0.2, 0.6, 0.3)
    plain = np.asarray(_open(_map(_uniform_map(colour))))
    crossed = np.asarray(_open(_map(_uniform_map(colour), crosshair=(95.0, 27.5))))
    assert plain.shape == crossed.shape
    changed = np.any(plain != crossed, axis=2)
    assert changed.sum() > 500
    values = {tuple(v) for v in crossed[changed]}
    assert values <= {(0, 0, 0), (255, 255, 255)}


@pytest.mark.parametrize("shape", [(1, 1), (1, 30), (30, 1)])
def test_map_png_single_row_or_column(shape):
    colour = (0.4, 0.5, 0.6)
    n_y, n_x = shape
    img = _open(_map(_uniform_map(colour, n_y, n_x), crosshair=(0.0, 0.0)))
    w, h = img.size
    np.testing.assert_allclose(_rgb_at(img, w // 2, h // 2 + 20), np.round(np.array(colour) * 255), atol=1)


def test_map_png_clips_out_of_range_colours_and_ignores_outside_crosshair():
    rgb = _uniform_map((1.3, -0.2, 0.5))
    img = _open(_map(rgb, crosshair=(1e6, -1e6)))
    w, h = img.size
    np.testing.assert_allclose(_rgb_at(img, w // 2, h // 2), (255, 0, 128), atol=1)


@pytest.mark.parametrize("rgb, xs, ys, kw", [
    (np.zeros((4, 5)), np.arange(5.0), np.arange(4.0), {}),                 # not 3-D
    (np.zeros((4, 5, 4)), np.arange(5.0), np.arange(4.0), {}),              # 4 channels
    (np.zeros((0, 5, 3)), np.arange(5.0), np.arange(0.0), {}),              # empty
    (np.full((4, 5, 3), np.nan), np.arange(5.0), np.arange(4.0), {}),       # NaN colours
    (np.zeros((4, 5, 3)), np.arange(6.0), np.arange(4.0), {}),              # x length
    (np.zeros((4, 5, 3)), np.arange(5.0), np.arange(3.0), {}),              # y length
    (np.zeros((4, 5, 3)), np.array([0, 1, 1, 2, 3.0]), np.arange(4.0), {}),  # x not increasing
    (np.zeros((4, 5, 3)), np.arange(5.0), np.arange(4.0)[::-1], {}),        # y decreasing
    (np.zeros((4, 5, 3)), np.arange(5.0), np.array([0, 1, np.nan, 3]), {}),  # NaN coordinate
    (np.zeros((4, 5, 3)), np.arange(5.0), np.arange(4.0), {"crosshair": (1.0,)}),
    (np.zeros((4, 5, 3)), np.arange(5.0), np.arange(4.0), {"crosshair": (np.nan, 1.0)}),
    (np.zeros((4, 5, 3)), np.arange(5.0), np.arange(4.0), {"title": 3}),
    ("red", np.arange(5.0), np.arange(4.0), {}),
])
def test_map_png_bad_input(rgb, xs, ys, kw):
    with pytest.raises(InputError):
        _map(rgb, xs, ys, **kw)


def test_nan_message_names_the_place():
    rgb = _uniform_map((0.5, 0.5, 0.5))
    rgb[3, 4, 1] = np.nan
    with pytest.raises(InputError, match=r"\(3, 4, 1\)"):
        _map(rgb)


# ---------------------------------------------------------------------------------- strip_png

STRIP_KW = dict(title="Reference chart", subtitle="Air / SiO₂ / Si · D65 · 2° · θ = 0°",
                order_marks=[(190.0, "m=1"), (375.0, "m=2"), (560.0, "m=3"), (565.0, "m=3b")],
                candidates=[(412.0, "A"), (418.0, "B"), (693.0, "C"), (1500.0, "far")],
                footer=FOOTER)


def test_strip_png_size_rows_and_colour_under_thickness():
    t = np.arange(0.0, 1001.0, 1.0)
    rgb = _ramp_strip(t)
    png = strip_png(rgb, t, **STRIP_KW)
    img = _open(png)
    layout = strip_layout(t, **STRIP_KW)
    assert img.size == (layout.width, layout.height)
    assert 1800 <= img.size[0] <= 2400 and 500 <= img.size[1] <= 1600
    assert len(layout.rows) == 3
    assert layout.rows[0].lo_nm == 0.0 and layout.rows[-1].hi_nm == 1000.0
    assert all(r.y1 - r.y0 >= 120 for r in layout.rows)
    for a, b in zip(layout.rows, layout.rows[1:]):
        assert a.hi_nm == b.lo_nm and a.y1 < b.y0
    for thickness in (5.0, 123.0, 350.0, 412.5, 600.0, 777.0, 999.0, 1000.0):
        x, y = layout.pixel_of(thickness)
        expected = np.round(np.clip(_ramp_strip(np.array(thickness)), 0, 1) * 255)
        # upper part of the strip, clear of mark lines and candidate notches
        r = next(r for r in layout.rows if r.y0 <= y < r.y1)
        np.testing.assert_allclose(_rgb_at(img, x, r.y0 + 20), expected, atol=1,
                                   err_msg=f"thickness {thickness} nm at ({x}, {r.y0 + 20})")
    assert layout.pixel_of(-1.0) is None and layout.pixel_of(1000.5) is None


def test_strip_layout_maps_pixels_back_to_thickness():
    t = np.linspace(0.0, 1000.0, 201)
    layout = strip_layout(t, title="x")
    for thickness in np.linspace(0.0, 999.0, 37):
        x, y = layout.pixel_of(thickness)
        row = next(i for i, r in enumerate(layout.rows) if r.y0 <= y < r.y1)
        assert abs(layout.thickness_at(x, row) - thickness) <= 0.5 / layout.px_per_nm + 1e-9


def test_strip_png_step_colours_land_in_their_rows():
    t = np.arange(0.0, 1001.0, 1.0)
    rgb = np.where((t < 500.0)[:, None], [1.0, 0.0, 0.0], [0.0, 0.0, 1.0])
    img = _open(strip_png(rgb, t, title="step"))
    layout = strip_layout(t, title="step")
    x, y = layout.pixel_of(250.0)
    assert tuple(_rgb_at(img, x, y)) == (255, 0, 0)
    x2, y2 = layout.pixel_of(750.0)
    assert tuple(_rgb_at(img, x2, y2)) == (0, 0, 255)
    assert y < y2


def test_strip_png_short_range_is_one_row_long_range_at_most_three():
    t = np.arange(380.0, 781.0, 2.0)
    assert len(strip_layout(t, title="short").rows) == 1
    t = np.arange(0.0, 3001.0, 5.0)
    layout = strip_layout(t, title="long")
    assert len(layout.rows) == 3
    img = _open(strip_png(_ramp_strip(t / 3.0), t, title="long"))
    assert img.size == (layout.width, layout.height)


def test_strip_png_marks_change_pixels_near_their_thickness():
    t = np.arange(0.0, 401.0, 1.0)
    rgb = np.full((t.size, 3), 0.5)
    plain = np.asarray(_open(strip_png(rgb, t, title="t")))
    layout = strip_layout(t, title="t", order_marks=[(200.0, "m=1")])
    marked = np.asarray(_open(strip_png(rgb, t, title="t", order_marks=[(200.0, "m=1")])))
    x, _ = layout.pixel_of(200.0)
    r = layout.rows[0]
    assert tuple(marked[(r.y0 + r.y1) // 2, x]) == (0, 0, 0)
    assert tuple(plain[(r.y0 + r.y1) // 2, x]) == (128, 128, 128)


@pytest.mark.parametrize("rgb, t, kw", [
    (np.zeros((5, 4)), np.arange(5.0), {}),                       # 4 channels
    (np.zeros((5,)), np.arange(5.0), {}),                         # 1-D colours
    (np.zeros((0, 3)), np.arange(0.0), {}),                       # empty
    (np.zeros((1, 3)), np.array([100.0]), {}),                    # single sample
    (np.zeros((5, 3)), np.arange(6.0), {}),                       # length mismatch
    (np.zeros((5, 3)), np.array([0, 1, 2, 2, 3.0]), {}),          # repeated thickness
    (np.zeros((5, 3)), np.arange(5.0)[::-1], {}),                 # decreasing
    (np.zeros((5, 3)), np.array([0, 1, np.nan, 3, 4]), {}),       # NaN thickness
    (np.full((5, 3), np.nan), np.arange(5.0), {}),                # NaN colours
    (np.zeros((5, 3)), np.arange(5.0), {"order_marks": [(1.0,)]}),
    (np.zeros((5, 3)), np.arange(5.0), {"order_marks": [("x", "m=1")]}),
    (np.zeros((5, 3)), np.arange(5.0), {"candidates": [(np.inf, "A")]}),
    (np.zeros((5, 3)), np.arange(5.0), {"candidates": 5}),
    (np.zeros((5, 3)), np.arange(5.0), {"candidates": [(1.0, 2)]}),
])
def test_strip_png_bad_input(rgb, t, kw):
    with pytest.raises(InputError):
        strip_png(rgb, t, title="bad", **kw)


# ---------------------------------------------------------------------------------- colorbar_png

def _hex(h):
    return np.array([int(h[i:i + 2], 16) for i in (1, 3, 5)], dtype=float)


def test_colorbar_png_uses_bokeh_viridis_at_the_ends():
    from bokeh.palettes import Viridis256
    vals = np.full((20, 30), 250.0)
    for vmin, vmax, entry in [(250.0, 300.0, Viridis256[0]), (200.0, 250.0, Viridis256[-1])]:
        img = _open(colorbar_png(vals, label="Thickness (nm)", title="t", vmin=vmin, vmax=vmax,
                                 footer=FOOTER))
        w, h = img.size
        assert 700 <= w <= 2500 and 400 <= h <= 2000
        np.testing.assert_allclose(_rgb_at(img, w // 2, h // 2), _hex(entry), atol=1)


def test_colorbar_lut_is_bokehs_table():
    from bokeh.palettes import Viridis256
    lut = render._lut("viridis")
    assert lut.shape == (256, 3)
    np.testing.assert_array_equal(lut, np.array([_hex(h) for h in Viridis256]))


def test_colorbar_png_nan_is_grey_and_gradient_increases():
    vals = np.tile(np.linspace(100.0, 200.0, 40), (30, 1))
    vals[:, 15:25] = np.nan
    img = np.asarray(_open(colorbar_png(vals, label="Thickness (nm)", title="t", cmap="viridis")))
    h, w, _ = img.shape
    row = img[h // 2]
    greys = np.where(np.all(row == render.MISSING, axis=1) | np.all(row == render.MISSING_HATCH, axis=1))[0]
    assert greys.size > 100
    from bokeh.palettes import Viridis256
    first = np.where(np.all(row == _hex(Viridis256[0]), axis=1))[0]
    last = np.where(np.all(row == _hex(Viridis256[-1]), axis=1))[0]
    assert first.size and last.size and first.min() < greys.min() < greys.max() < last.max()


def test_colorbar_png_origin_upper_flips_rows():
    vals = np.zeros((2, 2))
    vals[0] = 1.0
    lower = np.asarray(_open(colorbar_png(vals, label="v", title="t", origin="lower")))
    upper = np.asarray(_open(colorbar_png(vals, label="v", title="t", origin="upper")))
    from bokeh.palettes import Viridis256
    top_colour = _hex(Viridis256[-1])
    col = lower.shape[1] // 3
    assert np.where(np.all(lower[:, col] == top_colour, axis=1))[0].min() > \
        np.where(np.all(upper[:, col] == top_colour, axis=1))[0].min()


@pytest.mark.parametrize("vals", [np.array([[5.0]]), np.linspace(0, 1, 500)[None, :],
                                  np.linspace(0, 1, 500)[:, None], np.full((3, 3), 7.0)])
def test_colorbar_png_degenerate_shapes(vals):
    img = _open(colorbar_png(vals, label="v", title="degenerate", cmap="turbo"))
    assert img.size[0] > 300 and img.size[1] > 300


def test_colorbar_png_all_missing_needs_a_range():
    vals = np.full((4, 4), np.nan)
    with pytest.raises(InputError, match="vmin and vmax"):
        colorbar_png(vals, label="v", title="t")
    img = _open(colorbar_png(vals, label="v", title="t", vmin=0.0, vmax=1.0))
    w, h = img.size
    assert len(set(_rgb_at(img, w // 2, h // 2))) == 1  # grey


@pytest.mark.parametrize("vals, kw", [
    (np.zeros(5), {}),
    (np.zeros((0, 5)), {}),
    (np.array([[1.0, np.inf]]), {}),
    (np.zeros((3, 3)), {"cmap": "rainbow"}),
    (np.zeros((3, 3)), {"vmin": 2.0, "vmax": 1.0}),
    (np.zeros((3, 3)), {"vmin": np.nan}),
    (np.zeros((3, 3)), {"origin": "left"}),
    (np.zeros((3, 3)), {"label": None, "title": 5}),
])
def test_colorbar_png_bad_input(vals, kw):
    kw = {"label": "v", "title": "t", **kw}
    with pytest.raises(InputError):
        colorbar_png(vals, **kw)


# ---------------------------------------------------------------------------------- fonts

@pytest.fixture
def font_source(monkeypatch):
    def use(source):
        monkeypatch.setattr(render, "_font_source", lambda: source)
        render._font.cache_clear()
    yield use
    render._font.cache_clear()


@pytest.mark.parametrize("source", ["dejavu", "default", "bitmap"])
def test_every_font_fallback_draws(font_source, source):
    if source == "dejavu" and render._font_source() != "dejavu":
        pytest.skip("DejaVu Sans is not installed")
    font_source(source)
    colour = (0.1, 0.7, 0.9)
    img = _open(_map(_uniform_map(colour), subtitle="SiO₂ · θ = 30°", crosshair=(10.0, 10.0),
                     footer=FOOTER))
    w, h = img.size
    np.testing.assert_allclose(_rgb_at(img, w // 2, h // 2), np.round(np.array(colour) * 255), atol=1)
    t = np.arange(0.0, 801.0, 2.0)
    _open(strip_png(_ramp_strip(t), t, **STRIP_KW))
    _open(colorbar_png(np.arange(12.0).reshape(3, 4), label="Thickness (nm)", title="λ map"))
