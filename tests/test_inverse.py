"""Colour → thickness: parsing, ranking, verdicts and bad input (the physics; outside checks are in
tests/test_inverse_outside.py)."""

import numpy as np
import pytest

from physics import InputError, parse_color, thickness_candidates
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
