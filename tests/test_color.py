"""Colour against colour-science's own integration and published colour values."""

import warnings

import numpy as np
import pytest

from physics import (InputError, Layer, Stack, WavelengthRangeError, delta_e_2000, illuminant_white_xyz,
                     spectra_to_srgb, spectrum_to_xyz, srgb_out_of_gamut, srgb_to_hex, sweep, xyz_to_lab,
                     xyz_to_srgb, lab_to_xyz, srgb_to_xyz)

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    import colour

OBSERVER_NAMES = {"2": "CIE 1931 2 Degree Standard Observer", "10": "CIE 1964 10 Degree Standard Observer"}
COLOUR_KEYS = {"D65": "D65", "D50": "D50", "A": "A", "F2": "FL2", "F11": "FL11"}
#: Issue requirement: our colour of bundled reflectances within ΔE00 0.5 of colour-science's.
MAX_DE_VS_REFERENCE = 0.5


def _reference_lab(sd, illuminant, observer):
    """colour-science: sd_to_XYZ (integration, 1 nm) and XYZ_to_Lab with the illuminant's own white."""
    cmfs = colour.MSDS_CMFS[OBSERVER_NAMES[observer]]
    ill = colour.SDS_ILLUMINANTS[COLOUR_KEYS[illuminant]]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        xyz = colour.sd_to_XYZ(sd, cmfs, ill, method="Integration") / 100
        white = colour.sd_to_XYZ(colour.sd_ones(cmfs.shape), cmfs, ill, method="Integration") / 100
        return colour.XYZ_to_Lab(xyz, colour.XYZ_to_xy(white))


@pytest.mark.parametrize("illuminant", ["D65", "D50", "A", "F2", "F11"])
@pytest.mark.parametrize("observer", ["2", "10"])
@pytest.mark.parametrize("step", [5.0, 10.0])
def test_colorchecker_against_colour_science(illuminant, observer, step):
    """The 24 patches of colour-science's bundled 'BabelColor Average' ColorChecker reflectances."""
    wl = np.arange(380.0, 780.0 + step / 2, step)
    worst = 0.0
    for sd in colour.SDS_COLOURCHECKERS["BabelColor Average"].values():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            R = sd.copy().align(colour.SpectralShape(380, 780, 1)).values[::int(step)]
        lab = xyz_to_lab(spectrum_to_xyz(R, wl, illuminant, observer), illuminant, observer)
        worst = max(worst, float(delta_e_2000(lab, _reference_lab(sd, illuminant, observer))))
    assert worst <= MAX_DE_VS_REFERENCE


def test_perfect_reflector_is_white():
    wl = np.arange(380.0, 781.0, 5.0)
    xyz = spectrum_to_xyz(np.ones(wl.size), wl)
    assert xyz[1] == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(xyz_to_lab(xyz), [100.0, 0.0, 0.0], atol=1e-6)
    # IEC 61966-2-1: the D65 white is sRGB (1, 1, 1); the published 4-digit matrix holds it to ~1e-4.
    np.testing.assert_allclose(xyz_to_srgb(xyz, clip=False), [1.0, 1.0, 1.0], atol=2e-4)
    # Under illuminant A, an adapted eye sees a white sheet as white too (CAT02, CIE 159:2004).
    xyz_a = spectrum_to_xyz(np.ones(wl.size), wl, "A")
    np.testing.assert_allclose(xyz_to_srgb(xyz_a, "A", clip=False), [1.0, 1.0, 1.0], atol=2e-4)
    assert srgb_to_hex(xyz_to_srgb(xyz)) == "#ffffff"


def test_d65_white_point_matches_cie_tables():
    """CIE 015:2018 table: D65 / 2° chromaticity x = 0.31272, y = 0.32903 (recalled from memory)."""
    xy = colour.XYZ_to_xy(illuminant_white_xyz("D65"))
    assert xy == pytest.approx([0.31272, 0.32903], abs=2e-5)


def test_ciede2000_published_pair():
    """G. Sharma, W. Wu, E. N. Dalal, Color Res. Appl. 30, 21 (2005), Table 1 pair 1: ΔE00 = 2.0425
    (values recalled from memory)."""
    assert float(delta_e_2000([50.0, 2.6772, -79.7751], [50.0, 0.0, -82.7485])) == pytest.approx(2.0425, abs=1e-4)


def test_srgb_against_colour_science():
    rng = np.random.default_rng(3)
    xyz = rng.uniform(0.02, 0.9, (200, 3))
    for ill in ("D65", "A", "F11"):
        white_xy = colour.XYZ_to_xy(illuminant_white_xyz(ill))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = colour.XYZ_to_sRGB(xyz, white_xy, chromatic_adaptation_transform="CAT02")
        np.testing.assert_allclose(xyz_to_srgb(xyz, ill, clip=False), ref, atol=1e-10)


def test_fast_path_equals_the_step_by_step_path():
    wl = np.arange(380.0, 781.0, 5.0)
    R = Stack([Layer("SiO2", 0.0)], substrate="Si").reflectance(wl)
    R = sweep(Stack([Layer("SiO2", 0.0)], substrate="Si"), 0, np.linspace(0, 900, 37), [0.0, 50.0], wl)
    for ill in ("D65", "F2"):
        rgb, oog = spectra_to_srgb(R, wl, ill)
        xyz = spectrum_to_xyz(R, wl, ill)
        np.testing.assert_allclose(rgb, xyz_to_srgb(xyz, ill), atol=1e-12)
        assert np.array_equal(oog, srgb_out_of_gamut(xyz, ill))
        assert rgb.shape == (37, 2, 3)
    rgb_n, _ = spectra_to_srgb(R * 0.5, wl, normalize=True)
    assert rgb_n.max() <= 1.0 and np.isclose(spectrum_to_xyz(R * 0.5, wl)[..., 1].max() / 0.5,
                                             spectrum_to_xyz(R, wl)[..., 1].max())


def test_out_of_gamut_flag():
    wl = np.arange(380.0, 781.0, 5.0)
    narrow_green = np.where(np.abs(wl - 520) <= 5, 1.0, 0.0)        # a spectral green: outside sRGB
    grey = np.full(wl.size, 0.4)
    flags = srgb_out_of_gamut(spectrum_to_xyz(np.stack([narrow_green, grey]), wl))
    assert flags.tolist() == [True, False]


def test_round_trips():
    lab = np.array([[55.0, 10.0, -30.0], [80.0, -5.0, 20.0]])
    np.testing.assert_allclose(xyz_to_lab(lab_to_xyz(lab, "D50"), "D50"), lab, atol=1e-9)
    rgb = np.array([0.2, 0.5, 0.7])
    np.testing.assert_allclose(xyz_to_srgb(srgb_to_xyz(rgb, "A"), "A"), rgb, atol=1e-9)


def test_user_spd_equals_named_illuminant():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        d65 = colour.SDS_ILLUMINANTS["D65"].copy().align(colour.SpectralShape(360, 830, 1))
    wl = np.arange(400.0, 701.0, 10.0)
    R = np.linspace(0.1, 0.9, wl.size)
    np.testing.assert_allclose(spectrum_to_xyz(R, wl, (d65.wavelengths, d65.values)),
                               spectrum_to_xyz(R, wl, "D65"), rtol=1e-9)


# Oxide-on-silicon colour chart: W. A. Pliskin and E. E. Conrad, IBM J. Res. Dev. 8, 43 (1964),
# colours of thermal SiO2 on Si viewed at normal incidence under daylight (chart entries recalled
# from memory). Each family is an interval of CIELAB hue angle h_ab in degrees.
FAMILIES = {
    "tan/brown": (0.0, 75.0),
    "violet": (270.0, 335.0),
    "blue": (235.0, 300.0),
    "yellow/gold": (75.0, 120.0),
    "red-violet/pink": (310.0, 365.0),
    "green/blue-green": (160.0, 235.0),
    "orange": (20.0, 75.0),
}
CHART = [(50, "tan/brown"), (100, "violet"), (120, "blue"), (150, "blue"), (220, "yellow/gold"),
         (270, "red-violet/pink"), (310, "blue"), (410, "orange"), (420, "red-violet/pink"),
         (440, "red-violet/pink"), (490, "blue"), (520, "green/blue-green"), (600, "red-violet/pink"),
         (720, "green/blue-green")]


def test_oxide_on_silicon_chart_hue_families():
    wl = np.arange(380.0, 781.0, 5.0)
    stack = Stack([Layer("SiO2", 0.0)], substrate="Si")
    d = np.array([t for t, _ in CHART], dtype=float)
    lab = xyz_to_lab(spectrum_to_xyz(sweep(stack, 0, d, 0.0, wl)[:, 0, :], wl))
    hue = np.degrees(np.arctan2(lab[:, 2], lab[:, 1])) % 360
    for (t, family), h in zip(CHART, hue):
        lo, hi = FAMILIES[family]
        assert lo <= h <= hi or lo <= h + 360 <= hi, f"{t} nm: hue {h:.0f}° not {family}"


@pytest.mark.parametrize("call, error", [
    (lambda: spectrum_to_xyz(np.ones(5), np.linspace(300, 700, 5)), WavelengthRangeError),
    (lambda: spectrum_to_xyz(np.ones(5), np.linspace(500, 600, 5)), WavelengthRangeError),
    (lambda: spectrum_to_xyz(np.ones(4), np.linspace(400, 700, 5)), InputError),
    (lambda: spectrum_to_xyz([1, np.nan, 1, 1, 1], np.linspace(400, 700, 5)), InputError),
    (lambda: spectrum_to_xyz(np.ones(5), [400, 500, 450, 600, 700]), InputError),
    (lambda: spectrum_to_xyz(np.ones(5), np.linspace(400, 700, 5), "D93"), InputError),
    (lambda: spectrum_to_xyz(np.ones(5), np.linspace(400, 700, 5), observer="5"), InputError),
    (lambda: spectrum_to_xyz(np.ones(5), np.linspace(400, 700, 5), ([500, 600], [1, 1])), WavelengthRangeError),
    (lambda: xyz_to_lab([1.0, 2.0]), InputError),
    (lambda: delta_e_2000([1.0, 2.0], [1.0, 2.0, 3.0]), InputError),
])
def test_bad_colour_input(call, error):
    with pytest.raises(error):
        call()
