"""Camera calibration (physics/camera.py) and calibrated photo maps checked against the outside world.

Every colour comes from the independent pipeline of tests/outside_pipeline.py (nothing from physics/):
optical constants from refractiveindex.info pages (main/SiO2/Malitson: I. H. Malitson, JOSA 55, 1205
(1965); main/Si/Green-2008: M. A. Green, SEMSC 92, 1305 (2008); other/air/Ciddor: P. E. Ciddor, Appl.
Opt. 35, 1566 (1996)), reflectance from the ``tmm`` package (S. J. Byrnes), XYZ, CIELAB and the sRGB
encoding from colour-science; the colour target's reflectance spectra are colour-science's
``SDS_COLOURCHECKERS["BabelColor Average"]`` (BabelColor 2012, BSD-3-Clause via colour-science).

The simulated camera (invented for these tests) records linear light with its own primaries (a fixed 3 x 3
mixing :data:`CAMERA_MIX` of linear sRGB), an exposure error, 30 % vignetting toward the corners, a dark
level, then encodes sRGB to 8 bits with Gaussian noise of :data:`NOISE_DN` code values (an averaged frame).
It photographs (1) an oxide wedge 50-550 nm on silicon, drawn as 101 steps of 5 nm, 3 px each, beside a
bare strip; (2) a 5-step reference sample; (3) a bare wafer for the flat field; (4) a 24-patch colour
target. Run with ``pytest -s`` to see the figures printed beside the asserts.
"""

from __future__ import annotations

import functools
import warnings

import numpy as np
import pytest

import outside_pipeline as op
from physics.camera import CameraCalibration, calibrate_from_reference, calibrate_from_target, flat_field
from physics.imageio import load_image
from physics.inverse import thickness_map
from physics.stackfile import load_preset

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    import colour

OXIDE = load_preset("thermal_oxide_on_silicon").stack          # air / SiO2 (Malitson) / Si (Green 2008)

#: The simulated camera (invented): channel mixing of linear sRGB (its primaries are not sRGB's), exposure,
#: vignetting at the corners, dark level (linear), noise (8-bit code values, one sigma).
CAMERA_MIX = np.array([[0.82, 0.14, 0.04], [0.09, 0.80, 0.11], [0.03, 0.13, 0.84]])
EXPOSURE = 0.8
VIGNETTING = 0.30
DARK = np.array([0.012, 0.010, 0.014])
NOISE_DN = 1.0
HEIGHT = 150
BARE_PX = 21
WEDGE_NM = np.linspace(50.0, 550.0, 101)                     # 5 nm steps, 3 px each
STEP_PX = 3
WIDTH = BARE_PX + STEP_PX * WEDGE_NM.size                    # 324
REFERENCE_NM = (0.0, 110.0, 230.0, 340.0, 470.0)
TOLERANCE_NM = 5.0


def _vignetting():
    y, x = np.mgrid[0:HEIGHT, 0:WIDTH]
    yc, xc = (HEIGHT - 1) / 2, (WIDTH - 1) / 2
    return 1.0 - VIGNETTING * ((x - xc) ** 2 + (y - yc) ** 2) / (xc ** 2 + yc ** 2)


def shoot(linear_srgb, seed, noise_dn=NOISE_DN):
    """8-bit photo of a scene given as linear sRGB (HEIGHT, WIDTH, 3) or per column (WIDTH, 3)."""
    lin = np.asarray(linear_srgb, dtype=float)
    if lin.ndim == 2:
        lin = np.broadcast_to(lin[None], (HEIGHT, WIDTH, 3))
    cam = (lin @ CAMERA_MIX.T) * EXPOSURE * _vignetting()[..., None] + DARK
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        enc = np.asarray(colour.cctf_encoding(np.clip(cam, 0.0, 1.0), function="sRGB"), dtype=float) * 255.0
    enc = enc + np.random.default_rng(seed).normal(0.0, noise_dn, enc.shape)
    return np.clip(np.round(enc), 0, 255).astype(np.uint8)


@functools.lru_cache(maxsize=None)
def _oxide_columns():
    """(bare, wedge steps) linear sRGB from the outside pipeline."""
    cols = op.oxide_linear_srgb(np.r_[0.0, WEDGE_NM])
    return cols[0], cols[1:]


def wedge_scene():
    bare, steps = _oxide_columns()
    truth = np.r_[np.zeros(BARE_PX), np.repeat(WEDGE_NM, STEP_PX)]
    return np.r_[np.repeat(bare[None], BARE_PX, 0), np.repeat(steps, STEP_PX, 0)], truth


def reference_scene(steps_nm=REFERENCE_NM):
    """Vertical bands of the reference thicknesses and a box in each band's middle."""
    cols = op.oxide_linear_srgb(steps_nm)
    band = -(-WIDTH // len(steps_nm))
    lin = np.repeat(cols, band, 0)[:WIDTH]
    boxes = [(band * k + band // 4, 40, band * k + band - band // 4, 110) for k in range(len(steps_nm))]
    return lin, boxes


@pytest.fixture(scope="module")
def flat():
    bare, _ = _oxide_columns()
    return flat_field(shoot(np.repeat(bare[None], WIDTH, 0), seed=3))


@pytest.fixture(scope="module")
def calibration(flat):
    lin, boxes = reference_scene()
    return calibrate_from_reference(shoot(lin, seed=2), boxes, REFERENCE_NM, OXIDE, flat_field=flat)


def _within(m, truth, roi=(0, 0, WIDTH, HEIGHT)):
    T = m.thickness_nm[roi[1]:roi[3], BARE_PX:]
    return float(np.mean(np.abs(T - truth[None, BARE_PX:]) <= TOLERANCE_NM))     # NaN counts as a miss


@pytest.fixture(scope="module")
def wedge_maps(calibration):
    lin, truth = wedge_scene()
    img = shoot(lin, seed=1)
    cal = thickness_map(img, OXIDE, 0, (0, 1000), calibration=calibration)
    gains = thickness_map(img, OXIDE, 0, (0, 1000), reference_box=(0, 0, BARE_PX, HEIGHT))
    return cal, gains, truth


def test_flat_field_follows_the_vignetting(flat, calibration):
    # The simulated fall-off (above) is the source: the flat field's divisor with the fitted dark offset is
    # the vignetting relative to its mean, within 1 %.
    v = _vignetting()
    np.testing.assert_allclose(flat.gain(calibration.dark)[:, :, 1], v / v.mean(), rtol=0.01)


def test_calibration_finds_the_dark_level_and_fits_the_steps(calibration):
    # Measured: dark (0.0120, 0.0101, 0.0138) against the simulated (0.012, 0.010, 0.014); box ΔE00 0.01 RMS,
    # thickness residuals under 0.1 nm. Required: dark within 0.002, ΔE00 < 0.5, residual < 1 nm per box.
    np.testing.assert_allclose(calibration.dark, DARK, atol=0.002)
    assert np.all(calibration.residual_delta_e < 0.5), calibration.residual_delta_e
    assert np.all(np.abs(calibration.residual_nm) < 1.0), calibration.residual_nm
    assert calibration.image_size == (WIDTH, HEIGHT)


def test_calibrated_wedge_within_5_nm(wedge_maps):
    # Measured: 0.994-0.996 of wedge pixels within 5 nm with calibration + flat field; 0.25-0.27 with
    # today's bare-substrate gains on the same photo. Required: >= 0.95 (issue 11).
    cal, gains, truth = wedge_maps
    f_cal, f_gains = _within(cal, truth), _within(gains, truth)
    print(f"\nwedge 50-550 nm, 1 DN: {f_cal:.1%} within {TOLERANCE_NM:g} nm calibrated + flat field; "
          f"gains-only (bare box) {f_gains:.1%}")
    assert f_cal >= 0.95, (f_cal, f_gains)
    assert f_gains < f_cal - 0.3, (f_cal, f_gains)
    assert cal.stats["calibrated"] and cal.stats["flat_fielded"]


def test_uncertainty_covers_the_errors(wedge_maps):
    # The uncertainty is about one standard uncertainty. Measured on this photo: 0.53 of matched wedge
    # pixels within 1 u of the truth, 0.79 within 2 u, 0.89 within 3 u (a normal error: 0.68, 0.95, 0.997:
    # the estimate is short in the tail, where the photo's 8-bit rounding and noise move a pixel along the
    # path more than its residual shows). Required: >= 0.45 within 1 u and >= 0.85 within 3 u, finite
    # exactly where matched.
    cal, _, truth = wedge_maps
    T, U = cal.thickness_nm[:, BARE_PX:], cal.uncertainty_nm[:, BARE_PX:]
    assert np.array_equal(np.isfinite(T), np.isfinite(U))
    ok = np.isfinite(T)
    err = np.abs(T - truth[None, BARE_PX:])[ok]
    within = [float(np.mean(err <= k * U[ok])) for k in (1, 2, 3)]
    print(f"\nuncertainty: median {cal.stats['median_uncertainty_nm']:.2f} nm, P95 "
          f"{cal.stats['p95_uncertainty_nm']:.1f} nm; within 1, 2, 3 u of the truth: "
          + ", ".join(f"{w:.1%}" for w in within))
    assert within[0] >= 0.45 and within[2] >= 0.85, within
    assert 0 < cal.stats["median_uncertainty_nm"] < 5.0


def test_three_dn_noise_and_the_median_denoise(calibration):
    # Measured at 3 DN (upper half of the photo): 0.78-0.79 within 5 nm per pixel, 0.994-0.995 after the 5 x 5
    # median (scipy.ndimage.median_filter).
    # Required: the denoised map >= 0.95 and better than without.
    lin, truth = wedge_scene()
    img = shoot(lin, seed=11, noise_dn=3.0)
    half = (0, 0, WIDTH, HEIGHT // 2)                                 # the upper half, corners included
    raw = _within(thickness_map(img, OXIDE, 0, (0, 1000), calibration=calibration, roi=half), truth, half)
    den = thickness_map(img, OXIDE, 0, (0, 1000), calibration=calibration, denoise="median", roi=half)
    f_den = _within(den, truth, half)
    print(f"\nwedge, 3 DN noise: {raw:.1%} within {TOLERANCE_NM:g} nm per pixel; {f_den:.1%} with denoise='median'")
    assert f_den >= 0.95 and f_den > raw, (raw, f_den)
    assert den.stats["denoise"] == "median"


def test_saved_calibration_maps_the_same(calibration, wedge_maps):
    # A calibration saved and read back (its flat field stored as a coarse grid) maps the same photo to the
    # same thickness within one path step (0.5 nm) at >= 99.9 % of pixels (measured: all but 1 of 9,720; the
    # stored grid's 6 digits can tip a pixel between two near-equal path points).
    cal_map, _, _ = wedge_maps
    again = CameraCalibration.from_dict(calibration.to_dict())
    lin, _ = wedge_scene()
    band = (0, 0, WIDTH, 30)
    m = thickness_map(shoot(lin, seed=1), OXIDE, 0, (0, 1000), calibration=again, roi=band)
    a, b = m.thickness_nm[:30], cal_map.thickness_nm[:30]
    assert np.array_equal(np.isnan(a), np.isnan(b))
    assert np.mean(np.abs(a - b)[np.isfinite(a)] <= 0.51) >= 0.999


def test_root_polynomial_from_an_eight_step_sample(flat):
    # The root-polynomial model needs at least 8 boxes: an 8-step reference sample (invented). Measured:
    # 0.994 of the wedge's upper half within 5 nm (condition number about 900). Required: >= 0.95.
    steps = (0.0, 60.0, 110.0, 170.0, 230.0, 290.0, 340.0, 470.0)
    lin, boxes = reference_scene(steps)
    cal = calibrate_from_reference(shoot(lin, seed=4), boxes, steps, OXIDE, model="root-polynomial", flat_field=flat)
    wedge, truth = wedge_scene()
    half = (0, 0, WIDTH, HEIGHT // 2)
    m = thickness_map(shoot(wedge, seed=1), OXIDE, 0, (0, 1000), calibration=cal, roi=half)
    f = _within(m, truth, half)
    print(f"\nroot-polynomial from 8 steps: {f:.1%} within {TOLERANCE_NM:g} nm; {cal.message}")
    assert f >= 0.95, (f, cal.message)


# ---------------------------------------------------------------------- colour target
def _target_scene():
    """24 patches of the BabelColor average spectra (colour-science) on a 20 % grey card, 4 rows of 6."""
    sds = colour.SDS_COLOURCHECKERS["BabelColor Average"]
    names = list(sds.keys())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        shape = colour.SpectralShape(float(op.WAVELENGTHS_NM[0]), float(op.WAVELENGTHS_NM[-1]), 5)
        R = np.stack([np.asarray(sds[n].copy().align(shape).values, dtype=float) for n in names])
        xyz = op.spectra_to_xyz(R)
        lab = np.asarray(colour.XYZ_to_Lab(xyz, np.array(op.white_xy())), dtype=float)
    grey = op.xyz_to_linear_srgb(op.spectra_to_xyz(np.full(op.WAVELENGTHS_NM.size, 0.2)))
    img = np.broadcast_to(grey, (HEIGHT, WIDTH, 3)).copy()
    boxes = []
    for k, rgb in enumerate(op.xyz_to_linear_srgb(xyz)):
        r, c = divmod(k, 6)
        y0, x0 = 7 + 35 * r, 22 + 50 * c
        img[y0:y0 + 28, x0:x0 + 28] = rgb
        boxes.append((x0 + 4, y0 + 4, x0 + 24, y0 + 24))
    return img, boxes, lab


@pytest.mark.parametrize("model", ["matrix", "root-polynomial"])
def test_target_calibration_on_held_out_patches(model, flat):
    # Fit on 18 patches, check on the other 6 (every fourth). Measured ΔE00 on held-out patches: at most
    # 0.24 (matrix) and 0.17 (root-polynomial). Required: <= 2 (issue 11).
    img, boxes, lab = _target_scene()
    photo = load_image(shoot(img, seed=5))
    held = np.arange(len(boxes)) % 4 == 3
    cal = calibrate_from_target(photo, [b for b, h in zip(boxes, held) if not h], lab[~held], model=model,
                                flat_field=flat)
    lin = photo.linear_rgb()
    got = []
    for x0, y0, x1, y1 in np.array(boxes)[held]:
        xyz = cal.xyz_from_linear(lin[y0:y1, x0:x1], flat, (x0, y0, x1, y1)).reshape(-1, 3).mean(axis=0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            got.append(colour.XYZ_to_Lab(xyz, np.array(op.white_xy())))
    de = np.asarray(colour.delta_E(np.array(got), lab[held], method="CIE 2000"))
    print(f"\ntarget, {model}: held-out ΔE00 max {de.max():.2f}, mean {de.mean():.2f}")
    assert de.max() <= 2.0, de


# ---------------------------------------------------------------------- a real camera's spectral sensitivities
# The camera above meets the Luther condition (its channels are a linear mix of the CIE observer's), so a 3 x 3
# matrix can be exact. A real camera does not: here the channels are the measured spectral sensitivities of a
# Nikon D5100 (M. M. Darrodi, G. Finlayson, T. Goodman, M. Mackiewicz, JOSA A 32, 381 (2015), via
# colour-science's MSDS_CAMERA_SENSITIVITIES, BSD-3-Clause) under D65, with the same exposure, vignetting,
# dark level and noise. These figures say what the calibration is worth on such a camera.
def _real_camera():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        shape = colour.SpectralShape(float(op.WAVELENGTHS_NM[0]), float(op.WAVELENGTHS_NM[-1]), 5)
        sens = np.asarray(colour.MSDS_CAMERA_SENSITIVITIES["Nikon 5100 (NPL)"].copy().align(shape).values)
        lamp = np.asarray(colour.SDS_ILLUMINANTS["D65"].copy().align(shape).values)
    w = sens * lamp[:, None]
    return w / w[:, 1].sum()                                          # a perfect reflector: green 1


def _real_shot(camera_rgb, seed):
    cam = np.broadcast_to(camera_rgb, (HEIGHT, WIDTH, 3)) * EXPOSURE * _vignetting()[..., None] + DARK
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        enc = np.asarray(colour.cctf_encoding(np.clip(cam, 0.0, 1.0), function="sRGB"), dtype=float) * 255.0
    enc = enc + np.random.default_rng(seed).normal(0.0, NOISE_DN, enc.shape)
    return np.clip(np.round(enc), 0, 255).astype(np.uint8)


def test_real_camera_sensitivities():
    # Measured: 0.92 of the wedge's upper half within 5 nm (matrix from the 5 steps; the Luther camera above:
    # 0.99); held-out target patches ΔE00 at most 2.0 (matrix) and 1.0 (root-polynomial). Required: >= 0.88
    # and <= 2.5 / 1.5: a real camera's colour error between the boxes limits the map, and the report says so.
    w = _real_camera()
    R = lambda ts: np.stack([op.reflectance(((op.SIO2, float(t)),)) for t in ts])     # noqa: E731
    flat = flat_field(_real_shot((R([0.0]) @ w)[0], seed=3))
    band = -(-WIDTH // len(REFERENCE_NM))
    _, boxes = reference_scene()
    steps = np.repeat(R(REFERENCE_NM) @ w, band, 0)[:WIDTH][None]
    cal = calibrate_from_reference(_real_shot(steps, seed=2), boxes, REFERENCE_NM, OXIDE, flat_field=flat)
    truth = wedge_scene()[1]
    wedge = (np.r_[R([0.0]), R(WEDGE_NM)] @ w)[np.r_[np.zeros(BARE_PX, int), np.repeat(np.arange(1, 102), STEP_PX)]]
    half = (0, 0, WIDTH, HEIGHT // 2)
    f = _within(thickness_map(_real_shot(wedge[None], seed=1), OXIDE, 0, (0, 1000), calibration=cal, roi=half),
                truth, half)
    img, tboxes, lab = _target_scene()
    sds = colour.SDS_COLOURCHECKERS["BabelColor Average"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        shape = colour.SpectralShape(float(op.WAVELENGTHS_NM[0]), float(op.WAVELENGTHS_NM[-1]), 5)
        refl = np.stack([np.asarray(sds[n].copy().align(shape).values, dtype=float) for n in sds.keys()])
    scene = np.broadcast_to(np.full(op.WAVELENGTHS_NM.size, 0.2) @ w, (HEIGHT, WIDTH, 3)).copy()
    for (x0, y0, x1, y1), rgb in zip(tboxes, refl @ w):
        scene[y0 - 4:y1 + 4, x0 - 4:x1 + 4] = rgb
    photo = load_image(_real_shot(scene, seed=5))
    held = np.arange(len(tboxes)) % 4 == 3
    worst = {}
    for model in ("matrix", "root-polynomial"):
        tcal = calibrate_from_target(photo, [b for b, h in zip(tboxes, held) if not h], lab[~held], model=model,
                                     flat_field=flat)
        got = [tcal.xyz_from_linear(photo.linear_rgb((x0, y0, x1, y1)), flat, (x0, y0, x1, y1)).reshape(-1, 3).mean(0)
               for x0, y0, x1, y1 in np.array(tboxes)[held]]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            got_lab = colour.XYZ_to_Lab(np.array(got), np.array(op.white_xy()))
        worst[model] = float(np.max(colour.delta_E(got_lab, lab[held], method="CIE 2000")))
    print(f"\nreal camera sensitivities: wedge {f:.1%} within {TOLERANCE_NM:g} nm ({cal.message}); held-out "
          f"target ΔE00 at most {worst['matrix']:.2f} (matrix), {worst['root-polynomial']:.2f} (root-polynomial)")
    assert f >= 0.88 and worst["matrix"] <= 2.5 and worst["root-polynomial"] <= 1.5, (f, worst)
