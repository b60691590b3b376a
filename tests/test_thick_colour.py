"""Colour of thick layers: the adaptive wavelength grid against brute-force fine integration."""

import warnings

import numpy as np
import pytest

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    import colour

from physics import Stack, spectrum_to_xyz
from physics.appearance import color_map, colour_band_nm, colour_wavelengths_nm
from physics.color import delta_e_2000, xyz_to_lab
from views.state import ExplorerState, compute_point, default_state

#: Step of the brute-force reference integration, nm: at 100 µm of oxide the fringes are 0.5 nm apart at 380 nm,
#: so 0.05 nm gives ten samples per fringe in the bluest part of the band.
REFERENCE_STEP_NM = 0.05
#: Largest colour difference allowed from the reference (about the smallest step an observer sees side by side).
MAX_DELTA_E = 1.0
THICKNESSES_NM = [1_000, 3_000, 10_000, 30_000, 100_000]
CASES = {
    "oxide on silicon": lambda d: Stack([("SiO2", d)], "Si", ambient=1.0),
    "free-standing oxide": lambda d: Stack([("SiO2", d)], 1.0, ambient=1.0),
    "titania on glass": lambda d: Stack([("TiO2", d)], "BK7", ambient=1.0),
}


def brute_force_lab(stack: Stack, illuminant: str = "D65", angle_deg: float = 0.0) -> np.ndarray:
    """Reference by brute force: the project's own stack reflectance every 0.05 nm over 380-780 nm, times the
    colour-science illuminant and CIE 1931 2° observer interpolated linearly onto that grid, trapezoid rule."""
    wl = np.arange(380.0, 780.0 + 1e-9, REFERENCE_STEP_NM)
    R = stack.reflectance(wl, angle_deg)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        shape = colour.SpectralShape(360, 830, 1)
        cmfs = colour.MSDS_CMFS["CIE 1931 2 Degree Standard Observer"].copy().align(shape)
        ill_key = {"F11": "FL11"}.get(illuminant, illuminant)
        spd = colour.colorimetry.reshape_sd(colour.SDS_ILLUMINANTS[ill_key], shape)
    fine = np.arange(360.0, 831.0)
    S = spd.values[:, None] * cmfs.values
    Sw = np.stack([np.interp(wl, fine, S[:, k]) for k in range(3)], axis=1)
    xyz = np.trapezoid(R[:, None] * Sw, wl, axis=0) / np.trapezoid(Sw[:, 1], wl)
    return xyz_to_lab(xyz, illuminant)


@pytest.mark.parametrize("case", list(CASES))
@pytest.mark.parametrize("d", THICKNESSES_NM)
def test_thick_layer_colour_matches_fine_integration(case, d):
    stack = CASES[case](d)
    ref = brute_force_lab(stack)
    cm = color_map(stack, 0, [d], [0.0])
    assert float(delta_e_2000(cm.lab[0, 0], ref)) < MAX_DELTA_E
    wl = colour_wavelengths_nm(stack)
    lab = xyz_to_lab(spectrum_to_xyz(stack.reflectance(wl), wl))
    assert float(delta_e_2000(lab, ref)) < MAX_DELTA_E


@pytest.mark.parametrize("d", [3_000, 30_000])
def test_thick_layer_colour_under_a_line_lamp(d):
    # a tri-band fluorescent's narrow lines sample the fringes: the hardest case for a coarse grid
    stack = CASES["oxide on silicon"](d)
    cm = color_map(stack, 0, [d], [0.0], illuminant="F11")
    assert float(delta_e_2000(cm.lab[0, 0], brute_force_lab(stack, "F11"))) < MAX_DELTA_E


def test_a_map_row_equals_the_single_point_at_an_angle():
    stack = CASES["oxide on silicon"](50_000)
    cm = color_map(stack, 0, [1_000, 50_000], [0.0, 40.0])
    assert float(delta_e_2000(cm.lab[1, 1], brute_force_lab(stack, angle_deg=40.0))) < MAX_DELTA_E
    assert float(delta_e_2000(cm.lab[0, 0], brute_force_lab(CASES["oxide on silicon"](1_000)))) < MAX_DELTA_E


def test_thin_films_keep_the_5_nm_grid():
    stack = CASES["oxide on silicon"](500)
    assert np.array_equal(colour_wavelengths_nm(stack), colour_band_nm(stack))
    assert colour_wavelengths_nm(CASES["oxide on silicon"](50_000)).size > 10 * colour_band_nm(stack).size


def test_a_grid_finer_than_1_nm_integrates_like_a_coarse_one():
    # a smooth spectrum: the 0.1 nm grid must not be read only at whole nanometres
    coarse = np.arange(380.0, 781.0, 5.0)
    fine = np.arange(380.0, 780.0 + 1e-9, 0.1)
    ramp = lambda w: 0.2 + 0.6 * (w - 380.0) / 400.0              # noqa: E731
    assert np.allclose(spectrum_to_xyz(ramp(fine), fine), spectrum_to_xyz(ramp(coarse), coarse), atol=2e-4)


def test_swatch_at_50_um_is_not_the_aliased_colour():
    s = default_state()
    s.param.update(thickness_max_nm=100_000.0, thickness_nm=50_000.0)
    pt = compute_point(s, 1.0, np.arange(300.0, 1001.0, 2.0))
    assert float(delta_e_2000(pt.lab, brute_force_lab(s.stack))) < MAX_DELTA_E


def test_the_spectrum_of_a_thick_layer_is_a_step_average_with_its_fringe_range():
    s = default_state()
    s.param.update(thickness_max_nm=100_000.0, thickness_nm=50_000.0)
    wl = np.arange(400.0, 700.0, 2.0)
    pt = compute_point(s, 1.0, wl)
    assert pt.R_low is not None and np.all(pt.R_low <= pt.R + 1e-12) and np.all(pt.R <= pt.R_high + 1e-12)
    # fringes of oxide on silicon swing R over several % inside each 2 nm step
    assert float(np.median(pt.R_high - pt.R_low)) > 0.05
    n_g = 1.47                             # group index of fused silica near 550 nm, recalled from memory
    assert pt.fringe_spacing_nm == pytest.approx(550.0 ** 2 / (2 * n_g * 50_000.0), rel=0.05)
    thin = ExplorerState(**{k: v for k, v in s.param.values().items() if k != "name"})
    thin.thickness_nm = 100.0
    assert compute_point(thin, 1.0, wl).R_low is None


def test_line_lamps_get_more_samples_per_fringe_than_smooth_ones():
    from physics.appearance import SAMPLES_PER_FRINGE, SMOOTH_SAMPLES_PER_FRINGE, samples_per_fringe
    for lamp in ("F2", "F11", "YELLOW"):
        assert samples_per_fringe(lamp) == SAMPLES_PER_FRINGE
    for lamp in ("D65", "A", "LED-B3"):
        assert samples_per_fringe(lamp) == SMOOTH_SAMPLES_PER_FRINGE
    assert samples_per_fringe(None) == SAMPLES_PER_FRINGE


@pytest.mark.parametrize("d", [10_000, 100_000])
def test_thick_layer_colour_under_a_white_led(d):
    stack = CASES["free-standing oxide"](d)
    cm = color_map(stack, 0, [d], [0.0], illuminant="LED-B3")
    assert float(delta_e_2000(cm.lab[0, 0], brute_force_lab(stack, "LED-B3"))) < MAX_DELTA_E


def test_the_page_map_of_a_thick_range_stays_within_its_point_budget():
    from physics.appearance import colour_map_points
    from views.state import MAP_POINT_BUDGET, compute_map
    s = default_state()
    s.param.update(thickness_max_nm=100_000.0, thickness_nm=50_000.0)
    cm = compute_map(s, 10 ** 9)
    assert colour_map_points(s.stack, 0, cm.thickness_nm, cm.angle_deg.size, "D65") <= MAP_POINT_BUDGET
    assert cm.thickness_nm.size >= 100 and cm.angle_deg.size >= 30
