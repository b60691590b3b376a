"""Colour → thickness: parsing, ranking, verdicts and bad input (the physics; outside checks are in
tests/test_inverse_outside.py)."""

import numpy as np
import pytest

from physics import InputError, parse_color, thickness_candidates
from physics.inverse import AMBIGUOUS_DE
from physics.appearance import colour_band_nm
from physics.color import spectrum_to_xyz, srgb_to_hex, xyz_to_lab, xyz_to_srgb
from physics.stackfile import load_preset

OXIDE = load_preset("thermal_oxide_on_silicon").stack


def _hex(stack, t, angle=0.0, illuminant="D65"):
    wl = colour_band_nm(stack)
    xyz = spectrum_to_xyz(stack.with_thickness(0, t).reflectance(wl, angle), wl, illuminant)
    return srgb_to_hex(xyz_to_srgb(xyz, illuminant))


@pytest.mark.parametrize("text, kind, value", [
    ("#4f719f", "srgb", [0x4f / 255, 0x71 / 255, 0x9f / 255]), ("4F719F", "srgb", [0x4f / 255, 0x71 / 255, 0x9f / 255]),
    ("#47a", "srgb", [0x44 / 255, 0x77 / 255, 0xaa / 255]), ("79, 113, 159", "srgb", [79 / 255, 113 / 255, 159 / 255]),
    ("rgb(79 113 159)", "srgb", [79 / 255, 113 / 255, 159 / 255]), ((79, 113, 159), "srgb", [79 / 255, 113 / 255, 159 / 255]),
    ("lab(52.1, -3.2, -27.5)", "lab", [52.1, -3.2, -27.5]), ("L*a*b* 52.1 -3.2 -27.5", "lab", [52.1, -3.2, -27.5]),
])
def test_parse_color(text, kind, value):
    k, v = parse_color(text)
    assert k == kind and np.allclose(v, value)


@pytest.mark.parametrize("bad", ["blue-ish", "#12345", "300, 1, 1", "lab(120, 0, 0)", "", None, (1, 2), "#ggg000"])
def test_bad_colours(bad):
    with pytest.raises(InputError, match="colour|CIELAB|sRGB"):
        thickness_candidates(bad, OXIDE)


@pytest.mark.parametrize("t", [60.0, 140.0, 300.0, 455.0, 620.0, 880.0])
def test_own_colours_come_back_first(t):
    cands = thickness_candidates(_hex(OXIDE, t), OXIDE, 0, (0, 1000))
    assert cands.acceptable
    best = cands[0]
    assert best.range_nm[0] - 2 <= t <= best.range_nm[1] + 2 or any(abs(c.thickness_nm - t) < 3 for c in cands[:2])
    assert [c.delta_e for c in cands] == sorted(c.delta_e for c in cands)


def test_lab_input_equals_hex_input():
    k, rgb = parse_color("#4f719f")
    from physics import srgb_to_xyz
    lab = xyz_to_lab(srgb_to_xyz(rgb))
    a = thickness_candidates("#4f719f", OXIDE)
    b = thickness_candidates(f"lab({lab[0]:.6f}, {lab[1]:.6f}, {lab[2]:.6f})", OXIDE)
    assert a[0].thickness_nm == pytest.approx(b[0].thickness_nm, abs=0.05)


def test_no_match_is_said_and_nearest_shown():
    cands = thickness_candidates("#00ff00", OXIDE, 0, (0, 1000))
    assert not cands.acceptable and "No thickness" in cands.message and len(cands) >= 1


def test_ambiguity_is_stated_and_a_second_angle_resolves_it():
    """A colour that repeats at two orders: find one, then show that a tilted view separates them."""
    d = np.arange(20.0, 1000.0, 5.0)
    wl = colour_band_nm(OXIDE)
    labs = np.array([xyz_to_lab(spectrum_to_xyz(OXIDE.with_thickness(0, x).reflectance(wl), wl)) for x in d])
    from physics import delta_e_2000
    best = None
    for i in range(d.size):
        far = np.abs(d - d[i]) > 150
        de = delta_e_2000(labs[far], labs[i][None, :])
        j = np.argmin(de)
        if best is None or de[j] < best[0]:
            best = (de[j], d[i], d[far][j])
    _, t1, t2 = best
    c0 = thickness_candidates(_hex(OXIDE, t1), OXIDE, 0, (0, 1000))
    if c0.ambiguous:
        assert "cannot decide" in c0.message and "second viewing angle" in c0.message
    c2 = thickness_candidates([_hex(OXIDE, t1), _hex(OXIDE, t1, 50.0)], OXIDE, 0, (0, 1000), angle_deg=[0.0, 50.0])
    assert abs(c2[0].thickness_nm - t1) < 5
    assert not c2.ambiguous


def test_nominal_and_tolerance():
    cands = thickness_candidates(_hex(OXIDE, 300.0), OXIDE, 0, None, nominal_nm=310.0, tolerance_nm=30.0)
    assert cands.window_nm == (280.0, 340.0)
    assert abs(cands[0].thickness_nm - 300.0) < 3 and cands[0].in_tolerance


@pytest.mark.parametrize("kwargs, fragment", [
    (dict(thickness_nm=(500, 100)), "window"), (dict(thickness_nm=(-5, 100)), "thickness_nm"),
    (dict(layer=3), "layer"), (dict(top=0), "top"), (dict(angle_deg=[0.0, 10.0]), "one viewing angle"),
])
def test_bad_arguments(kwargs, fragment):
    with pytest.raises(InputError, match=fragment):
        thickness_candidates("#4f719f", OXIDE, **kwargs)


def test_thickness_and_range_do_not_depend_on_the_window():
    """Each candidate is refined on a local path, so a wide window (coarse scan) gives the same answer."""
    from physics.inverse import FULL_STEP_WINDOW_NM, LUT_STEP_NM
    colour = _hex(OXIDE, 100.0)
    narrow = thickness_candidates(colour, OXIDE, 0, (0, 1000))
    wide = thickness_candidates(colour, OXIDE, 0, (0, 100_000))
    assert narrow.scan_step_nm == pytest.approx(LUT_STEP_NM) and wide.scan_step_nm > LUT_STEP_NM
    assert wide[0].thickness_nm == pytest.approx(narrow[0].thickness_nm, abs=0.1)
    assert np.allclose(wide[0].range_nm, narrow[0].range_nm, atol=0.2)
    assert narrow[0].range_nm[1] - narrow[0].range_nm[0] > 2          # not collapsed to one sample
    assert "scanned every" in wide.message and "scanned every" not in narrow.message
    assert f"{FULL_STEP_WINDOW_NM:g}" in wide.message


def test_map_statistics_give_a_robust_range_and_flag_stray_orders():
    from physics.inverse import ROBUST_PERCENTILES, _order_outliers, _stats
    # an invented thickness field: a smooth 100 -> 500 nm ramp (orders 1-3) with 30 stray pixels of order 5
    h, w = 80, 200
    T = np.tile(np.linspace(100.0, 500.0, w, dtype=np.float32), (h, 1))
    O = np.where(T < 190, 1, np.where(T < 380, 2, 3)).astype(np.int16)
    rng = np.random.default_rng(1)
    ys, xs = rng.integers(0, h, 30), rng.integers(0, w, 30)
    T[ys, xs], O[ys, xs] = 950.0, 5
    flagged = _order_outliers(O, np.isfinite(T))
    assert flagged[ys, xs].all() and flagged.sum() == len(set(zip(ys, xs)))   # none beside the true boundaries
    st = _stats(T, flagged)
    assert st["max_nm"] == 950.0 and st["p_high_nm"] <= 500.0
    assert st["p_low_nm"] == pytest.approx(np.percentile(T, ROBUST_PERCENTILES[0]))
    assert st["uniformity_robust"] < st["uniformity"] and st["order_outliers"] == flagged.sum()
    empty = _stats(np.full((3, 3), np.nan))
    assert empty["pixels"] == 0 and empty["order_outliers"] == 0


@pytest.mark.parametrize("colour, error, thicknesses", [
    # The default oxide stack (thermal_oxide_on_silicon), D65, 2° observer, straight on.
    ("#937e8d", AMBIGUOUS_DE, [850]), ("#937e8d", 5.0, [850, 666, 593]),
    ("#4d6caf", AMBIGUOUS_DE, [300]), ("#4d6caf", 4.0, [300, 117]),
])
def test_every_order_within_the_reading_error_is_possible(colour, error, thicknesses):
    c = thickness_candidates(colour, OXIDE, 0, (0, 1000), reading_error_de=error)
    assert [round(p.thickness_nm) for p in c.possible] == pytest.approx(thicknesses, abs=2)
    assert c.ambiguous == (len(thicknesses) > 1) and c.reading_error_de == error
    assert all(p.delta_e - c[0].delta_e < error for p in c.possible)
    if c.ambiguous:
        alts = " / ".join(f"{p.thickness_nm:.0f}" for p in c.possible[1:])
        assert c.message.startswith(f"{c[0].thickness_nm:.0f} nm, or {alts} nm: colour alone cannot decide")
    else:
        assert c.message.startswith(f"Best match {thicknesses[0]:.0f} nm")


def test_the_default_reading_error_is_the_calibrated_one():
    assert thickness_candidates("#937e8d", OXIDE).reading_error_de == AMBIGUOUS_DE


def test_a_wide_reading_error_widens_the_stated_range():
    narrow = thickness_candidates(_hex(OXIDE, 100.0), OXIDE, 0, (0, 1000))
    wide = thickness_candidates(_hex(OXIDE, 100.0), OXIDE, 0, (0, 1000), reading_error_de=5.0)
    assert narrow.reading_range_nm == narrow[0].range_nm
    assert wide.reading_range_nm[0] < narrow.reading_range_nm[0] < narrow.reading_range_nm[1] < wide.reading_range_nm[1]


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan"), 1e6])
def test_bad_reading_errors(bad):
    with pytest.raises(InputError, match="reading_error_de"):
        thickness_candidates("#4f719f", OXIDE, reading_error_de=bad)


@pytest.mark.parametrize("word", ["gold", "Light-Blue", "violet"])
def test_a_colour_word_brings_its_own_reading_error(word):
    from physics.colour_words import colour_word
    w = colour_word(word)
    c = thickness_candidates(word, OXIDE, 0, (0, 1000), reading_error_de=AMBIGUOUS_DE)
    assert c.words == [w] and c.reading_error_de == w.reading_error_de
    assert c.acceptable and c.possible and all(p.delta_e <= w.reading_error_de for p in c.possible)


def test_colour_words_are_known_and_nothing_else_is_guessed():
    from physics.colour_words import colour_word, colour_words
    assert colour_word("light  blue") == colour_word("light_blue") == colour_word("LIGHT-BLUE")
    assert colour_word("bluish") is None and colour_word("x" * 1000) is None and colour_word(None) is None
    for w in colour_words():
        kind, rgb = parse_color(w.hex)
        assert kind == "srgb" and np.allclose(w.rgb, rgb) and w.reading_error_de > AMBIGUOUS_DE


def test_a_conflicting_tilted_colour_is_named():
    c = thickness_candidates(["#937e8d", "#4d6caf"], OXIDE, 0, (0, 1000), angle_deg=[0.0, 40.0])
    assert not c.acceptable
    assert "The 0° colour matches 850 nm, but the 40° colour matches nothing within ΔE00 6 of it" in c.message
    assert "alone it matches" in c.message


def test_map_pixels_whose_order_colour_cannot_decide_are_flagged():
    from physics import thickness_map
    from physics.appearance import color_map
    d = np.linspace(0.0, 900.0, 180)               # an invented bevel, 0 → 900 nm
    img = np.round(np.repeat(color_map(OXIDE, 0, d, [0.0]).rgb[:, 0, :][None], 10, axis=0) * 255).astype(np.uint8)
    tight = thickness_map(img, OXIDE, 0, (0, 1000), reading_error_de=AMBIGUOUS_DE)
    loose = thickness_map(img, OXIDE, 0, (0, 1000), reading_error_de=5.0)
    default = thickness_map(img, OXIDE, 0, (0, 1000))
    assert loose.undecided.sum() > tight.undecided.sum() and loose.stats["undecided"] == loose.undecided.sum()
    assert default.stats["reading_error_de"] == pytest.approx(2.0)
    assert not (loose.undecided & ~np.isfinite(loose.thickness_nm)).any()
    assert "cannot decide the fringe order" in loose.message


def test_histogram_percentiles_equal_numpys():
    """The maps' percentiles (a histogram, then a partition of one bin) are np.percentile's to the bit."""
    from physics.inverse import _percentiles
    rng = np.random.default_rng(5)
    for dt in (np.float32, np.float64):
        for n in (1, 2, 3, 10, 999, 100_003):
            for x in (rng.normal(300, 100, n), rng.integers(0, 40, n) * 0.37, np.full(n, 5.0)):
                x = x.astype(dt)
                for q in ([1.0, 50.0, 99.0], [50.0, 95.0], [0.0, 12.345, 100.0]):
                    assert np.array_equal(_percentiles(x, q), np.percentile(x, q))
                    assert np.array_equal(_percentiles(x, q, np.float64), np.percentile(x.astype(np.float64), q))
    import physics.colourkernel as ck
    ck.warm()                                                          # (a page module may have turned them off)
    for dt in (np.float32, np.float64):                                # past 1 M values: the compiled histogram
        x = rng.normal(300, 100, 1_200_007).astype(dt)
        assert np.array_equal(_percentiles(x, [2.0, 50.0, 98.0]), np.percentile(x, [2.0, 50.0, 98.0]))


@pytest.mark.parametrize("kw", [{}, {"nominal_nm": 700.0, "roi": (3, 2, 1197, 878)}, {"reading_error_de": 5.0}])
def test_a_16_bit_map_is_the_same_compiled_or_not(kw, monkeypatch):
    """A 16-bit photo of more than UNIQUE_16BIT_MAX_PIXELS pixels (every pixel its own colour) maps through the
    compiled loops of physics.colourkernel; without numba through numpy. The same map but for float32
    rounding: a pixel on a vertex boundary or a tie of two orders to 1e-6 ΔE00 may go the other way."""
    import physics.colourkernel as ck
    import physics.colourtable as ct
    from physics import thickness_map
    from physics.appearance import color_map
    from physics.inverse import UNIQUE_16BIT_MAX_PIXELS
    if not ck.warm():                                                 # (a page module may have turned them off)
        pytest.skip("numba is not installed here")
    d = np.linspace(0.0, 950.0, 400)                                   # an invented bevel, 0 → 950 nm
    rgb = color_map(OXIDE, 0, d, [0.0]).rgb[:, 0, :]
    rng = np.random.default_rng(5)
    x = np.arange(1200) * (d.size - 1) / 1199
    row = np.stack([np.interp(x, np.arange(d.size), rgb[:, c]) for c in range(3)], axis=-1)
    img = np.clip(np.rint(row[None] * 65535 + rng.normal(0, 300, (880, 1200, 3))), 0, 65535).astype(np.uint16)
    assert img.shape[0] * img.shape[1] > UNIQUE_16BIT_MAX_PIXELS
    img[5, 7] = 0                                                      # a black pixel: no match
    fast = thickness_map(img, OXIDE, 0, (0, 1000), **kw)
    monkeypatch.setattr(ck, "kernels", lambda: None)
    monkeypatch.setattr(ct, "kernel", lambda: None)
    plain = thickness_map(img, OXIDE, 0, (0, 1000), **kw)
    for name in ("thickness_nm", "delta_e", "margin", "order", "undecided", "order_outlier"):
        a, b = getattr(fast, name).astype(float), getattr(plain, name).astype(float)
        assert np.array_equal(np.isnan(a), np.isnan(b)), name
        close = np.isclose(a, b, rtol=0, atol=1e-3, equal_nan=True)
        assert close.mean() > 0.9998, name
    assert fast.stats["pixels"] == plain.stats["pixels"]
    for key in ("median_nm", "p_low_nm", "p_high_nm", "median_uncertainty_nm"):
        assert fast.stats[key] == pytest.approx(plain.stats[key], abs=0.02), key
    assert fast.stats["order_outliers"] == pytest.approx(plain.stats["order_outliers"], abs=5)
    assert fast.stats["mean_nm"] == pytest.approx(plain.stats["mean_nm"], abs=0.01)
    assert fast.stats["undecided"] == pytest.approx(plain.stats["undecided"], rel=0.01, abs=3)
