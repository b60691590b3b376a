"""Unit tests of physics/camera.py: flat field, calibrations, saving and reading back, refusals.

The photos are invented scenes made with this program's own colours (self-consistency); the checks against
the outside world are in tests/test_camera_outside.py.
"""

from __future__ import annotations

import copy
import json

import numpy as np
import pytest

from physics import InputError
from physics.appearance import color_map
from physics.camera import (MIN_BOXES, CameraCalibration, FlatField, builtin_target, calibrate_from_reference,
                            calibrate_from_target, flat_field, read_target)
from physics.color import _linear_srgb
from physics.inverse import thickness_map
from physics.stackfile import load_preset

OXIDE = load_preset("thermal_oxide_on_silicon").stack
MIX = np.array([[0.85, 0.12, 0.03], [0.08, 0.84, 0.08], [0.02, 0.12, 0.86]])   # an invented camera
DARK = np.array([0.010, 0.012, 0.008])
H, W = 60, 100
STEPS = (0.0, 100.0, 200.0, 300.0, 450.0)


def _encode(lin):
    lin = np.clip(lin, 0, 1)
    enc = np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * lin ** (1 / 2.4) - 0.055)   # IEC 61966-2-1
    return np.clip(np.round(enc * 255), 0, 255).astype(np.uint8)


def _fall_off(strength=0.2):
    y, x = np.mgrid[0:H, 0:W]
    return 1 - strength * (((x - (W - 1) / 2) / (W / 2)) ** 2 + ((y - (H - 1) / 2) / (H / 2)) ** 2) / 2


def _shoot(thickness_per_column, fall=True):
    cm = color_map(OXIDE, 0, np.asarray(thickness_per_column, dtype=float), [0.0])
    lin = _linear_srgb(cm.xyz[:, 0, :], "D65", "2") @ MIX.T * 0.9
    img = lin[None, :, :] * (_fall_off()[..., None] if fall else np.ones((H, 1, 1))) + DARK
    return _encode(img)


def _reference_photo():
    band = W // len(STEPS)
    cols = np.repeat(STEPS, band)
    boxes = [(band * k + 5, 15, band * k + 15, 45) for k in range(len(STEPS))]
    return _shoot(cols), boxes


@pytest.fixture(scope="module")
def flat():
    return flat_field(_shoot(np.zeros(W)))


@pytest.fixture(scope="module")
def cal(flat):
    img, boxes = _reference_photo()
    return calibrate_from_reference(img, boxes, STEPS, OXIDE, flat_field=flat, camera="cam A", lamp="ring LED",
                                    objective="5x", objective_na=0.15, date="2026-12-04")


# ---------------------------------------------------------------------- flat field
def test_flat_field_follows_the_fall_off_and_flattens(flat):
    f = _fall_off()
    g = flat.gain(None)[:, :, 1]
    assert abs(float(g.mean()) - 1.0) < 0.01
    np.testing.assert_allclose(g / g.mean(), f / f.mean(), rtol=0.02)     # the dark level bends it slightly
    img = _shoot(np.zeros(W))
    from physics.imageio import load_image
    flat_img = flat.apply(load_image(img).linear_rgb())
    assert flat_img[:, :, 1].std() / flat_img[:, :, 1].mean() < 0.01


def test_flat_field_round_trip_is_small_and_equal(flat):
    d = flat.to_dict()
    text = json.dumps(d)
    assert len(text) < 60_000
    back = FlatField.from_dict(json.loads(text))
    np.testing.assert_allclose(back.gain(DARK), flat.gain(DARK), rtol=1e-5)
    assert (back.width, back.height) == (W, H)


@pytest.mark.parametrize("spoil,words", [
    (lambda a: a.__setitem__((slice(0, 20), slice(0, 20)), 255), "overexposed"),
    (lambda a: a.__setitem__((slice(0, 20), slice(0, 20)), 5), "too dark"),
    (lambda a: a.__setitem__((slice(None), slice(None, None, 8)), a[:, ::8] // 2), "not uniform"),
])
def test_flat_field_refuses_a_bad_photo(spoil, words):
    img = _shoot(np.zeros(W)).copy()
    spoil(img)
    with pytest.raises(InputError, match=words):
        flat_field(img)


def test_flat_field_refuses_a_tiny_photo():
    with pytest.raises(InputError, match="at least"):
        flat_field(np.full((8, 8, 3), 128, dtype=np.uint8))


def test_flat_field_of_another_size_is_refused(flat, cal):
    with pytest.raises(InputError, match="100 x 60"):
        flat.apply(np.ones((H, W + 1, 3), dtype=np.float32))
    img = np.pad(_shoot(np.full(W, 200.0)), ((0, 2), (0, 0), (0, 0)), mode="edge")
    with pytest.raises(InputError, match="flat field was made on a 100 x 60"):
        thickness_map(img, OXIDE, flat_field=flat)
    with pytest.raises(InputError, match="camera calibration was made on a 100 x 60"):
        thickness_map(img, OXIDE, calibration=cal)


# ---------------------------------------------------------------------- calibration from a reference sample
def test_reference_calibration_recovers_the_camera(cal):
    np.testing.assert_allclose(cal.dark, DARK, atol=0.003)
    assert cal.residual_delta_e.shape == (5,) and np.all(cal.residual_delta_e < 0.5)
    assert cal.residual_nm.shape == (5,) and np.all(np.abs(cal.residual_nm) < 1.5)
    assert cal.holdout_delta_e.shape == (5,)
    assert cal.image_size == (W, H) and cal.kind == "reference" and cal.flat_field is not None
    assert "calibration from 5 boxes" in cal.message
    assert (cal.camera, cal.lamp, cal.objective, cal.na, cal.date) == ("cam A", "ring LED", "5x", 0.15, "2026-12-04")


def test_calibrated_map_reads_a_wedge(cal):
    truth = np.linspace(60, 500, W)
    m = thickness_map(_shoot(truth), OXIDE, 0, (0, 1000), calibration=cal)
    err = np.abs(m.thickness_nm - truth[None, :])
    assert np.mean(err <= 5) >= 0.95
    assert m.uncertainty_nm.shape == (H, W)
    assert np.array_equal(np.isfinite(m.uncertainty_nm), np.isfinite(m.thickness_nm))
    assert np.isfinite(m.stats["median_uncertainty_nm"])


def test_plain_map_has_an_uncertainty_too():
    m = thickness_map(_shoot(np.linspace(60, 500, W), fall=False), OXIDE, 0, (0, 1000),
                      reference_box=None)
    assert m.uncertainty_nm.shape == (H, W)
    assert not m.stats["calibrated"] and m.stats["denoise"] is None


def test_gains_with_a_flat_field(flat):
    # Without a calibration the flat field still evens the field before the bare-substrate gains.
    truth = np.r_[np.zeros(10), np.linspace(60, 500, W - 10)]
    img = _shoot(truth)
    m = thickness_map(img, OXIDE, 0, (0, 1000), reference_box=(0, 0, 10, H), flat_field=flat)
    plain = thickness_map(img, OXIDE, 0, (0, 1000), reference_box=(0, 0, 10, H))
    assert m.stats["flat_fielded"] and not m.stats["calibrated"]
    err = lambda t: float(np.nanmedian(np.abs(t - truth[None, :])))                            # noqa: E731
    assert err(m.thickness_nm) < err(plain.thickness_nm), (err(m.thickness_nm), err(plain.thickness_nm))


def test_a_known_dark_level_is_kept(flat):
    img, boxes = _reference_photo()
    fixed = calibrate_from_reference(img, boxes, STEPS, OXIDE, flat_field=flat, dark=DARK)
    np.testing.assert_array_equal(fixed.dark, DARK)
    with pytest.raises(InputError, match="one linear value or three"):
        calibrate_from_reference(img, boxes, STEPS, OXIDE, dark=[0.01, 0.02])


def test_calibration_round_trip(cal):
    d = cal.to_dict()
    back = CameraCalibration.from_dict(json.loads(json.dumps(d)))
    for name in ("model", "illuminant", "observer", "width", "height", "boxes", "kind", "camera", "lamp",
                 "objective", "objective_na", "date", "message"):
        assert getattr(back, name) == getattr(cal, name), name
    for name in ("matrix", "dark", "reference_lab", "residual_delta_e", "residual_nm", "thickness_nm",
                 "holdout_delta_e"):
        np.testing.assert_allclose(getattr(back, name), getattr(cal, name), err_msg=name)
    rgb = np.random.default_rng(0).uniform(0.05, 0.6, (20, 3))
    np.testing.assert_allclose(back.xyz_from_linear(rgb), cal.xyz_from_linear(rgb))
    assert back.to_dict() == json.loads(json.dumps(d))


def test_root_polynomial_needs_more_boxes(flat):
    img, boxes = _reference_photo()
    with pytest.raises(InputError, match=f"at least {MIN_BOXES['root-polynomial']} boxes.*Add at least 3 more"):
        calibrate_from_reference(img, boxes, STEPS, OXIDE, model="root-polynomial", flat_field=flat)


def test_too_few_boxes_say_how_many_more():
    img, boxes = _reference_photo()
    with pytest.raises(InputError, match="at least 5 boxes.*Add at least 1 more box of clearly different colour"):
        calibrate_from_reference(img, boxes[:4], STEPS[:4], OXIDE)


def test_boxes_of_one_colour_are_refused():
    img = _shoot(np.full(W, 200.0), fall=False)
    boxes = [(10 * k, 10, 10 * k + 8, 40) for k in range(6)]
    with pytest.raises(InputError, match="too alike.*add at least"):
        calibrate_from_reference(img, boxes, [200.0] * 6, OXIDE)


@pytest.mark.parametrize("change,words", [
    (lambda b, t: ([*b[:4], (90, 10, 120, 40)], t), "reaches outside the image"),
    (lambda b, t: (b, [*t[:4], 1500.0]), "outside the window 0-1000 nm"),
    (lambda b, t: (b, t[:4]), "one known thickness per box"),
    (lambda b, t: (b, [*t[:4], float("nan")]), "finite"),
])
def test_reference_refusals(change, words):
    img, boxes = _reference_photo()
    b, t = change(boxes, list(STEPS))
    with pytest.raises(InputError, match=words):
        calibrate_from_reference(img, b, t, OXIDE)


def test_clipped_box_is_refused():
    img, boxes = _reference_photo()
    img = img.copy()
    x0, y0, x1, y1 = boxes[2]
    img[y0:y1, x0:x1] = 255
    with pytest.raises(InputError, match="Calibration box 3.*overexposed"):
        calibrate_from_reference(img, boxes, STEPS, OXIDE)


@pytest.mark.parametrize("kwargs,words", [
    ({"model": "cubic"}, "model must be one of"),
    ({"illuminant": (np.arange(380, 781, 5.0), np.ones(81))}, "as a name"),
    ({"objective_na": "wide"}, "NA is a number"),
    ({"camera": "x" * 500}, "at most 200 characters"),
])
def test_option_refusals(kwargs, words):
    img, boxes = _reference_photo()
    with pytest.raises(InputError, match=words):
        calibrate_from_reference(img, boxes, STEPS, OXIDE, **kwargs)


def test_calibration_without_flat_field_refuses_one(flat):
    img, boxes = _reference_photo()
    plain = calibrate_from_reference(img, boxes, STEPS, OXIDE)
    assert plain.flat_field is None
    with pytest.raises(InputError, match="made without a flat field"):
        thickness_map(img, OXIDE, calibration=plain, flat_field=flat)


def test_map_refuses_another_lamp_and_a_bad_filter(cal):
    img, _ = _reference_photo()
    with pytest.raises(InputError, match="lamp D65"):
        thickness_map(img, OXIDE, illuminant="A", calibration=cal)
    with pytest.raises(InputError, match="denoise must be"):
        thickness_map(img, OXIDE, calibration=cal, denoise="wavelet")


# ---------------------------------------------------------------------- hostile saved calibrations
HOSTILE_VALUES = [None, "", "x" * 10_000, -1, 1e308, float("nan"), float("inf"), True, [], {}, [[[]]],
                  [1e308] * 3, ["a", "b", "c"], list(range(100_000))]


def test_hostile_dicts_raise_input_error_only(cal):
    good = cal.to_dict()
    for bad in (None, [], "text", 3, {"format": "fringegauge camera calibration"}, {}):
        with pytest.raises(InputError):
            CameraCalibration.from_dict(bad)
    for key in good:                                   # from_dict never changes its input: shallow copies do
        for value in HOSTILE_VALUES:
            try:
                CameraCalibration.from_dict({**good, key: value})
            except InputError:
                pass
        try:
            CameraCalibration.from_dict({k: v for k, v in good.items() if k != key})
        except InputError:
            pass
    for key in good["flat_field"]:
        for value in HOSTILE_VALUES:
            try:
                CameraCalibration.from_dict({**good, "flat_field": {**good["flat_field"], key: value}})
            except InputError:
                pass


def test_deeply_nested_and_mismatched_fields_are_refused(cal):
    deep = []
    for _ in range(10_000):
        deep = [deep]
    for key, value in (("matrix", deep), ("boxes", [[0, 0, 10_000, 10]]), ("boxes", [[0, 0, 1.5, 2]]),
                       ("matrix", [[1, 2], [3, 4], [5, 6]]), ("model", "root-polynomial"), ("version", 99),
                       ("residual_delta_e", [0.1]), ("illuminant", "moonlight"), ("kind", "guess")):
        d = copy.deepcopy(cal.to_dict())
        d[key] = value
        with pytest.raises(InputError):
            CameraCalibration.from_dict(d)


# ---------------------------------------------------------------------- targets
def test_target_csv_lab_and_missing_patches():
    text = "patch,L*,a*,b*\nwhite,95,0,1\nred,40,55,30\nblue,30,10,-50\n"
    t = read_target(text)
    np.testing.assert_allclose(t.lab_of(["blue", "White "]), [[30, 10, -50], [95, 0, 1]])
    with pytest.raises(InputError, match="no patch named 'green'"):
        t.lab_of(["red", "green"])
    with pytest.raises(InputError, match="'cyan'"):
        read_target(text, patches=["white", "cyan"])
    with pytest.raises(InputError, match="Row 3 .* fill every cell"):
        read_target("patch,L*,a*,b*\nwhite,95,0,1\nred,40,,30\n")
    with pytest.raises(InputError, match="more than once"):
        read_target("patch,L*,a*,b*\nwhite,95,0,1\nWhite,95,0,1\n")
    with pytest.raises(InputError, match="out of range"):
        read_target("patch,L*,a*,b*\nwhite,195,0,1\n")


def test_target_csv_spectra_match_the_builtin_data():
    builtin = builtin_target()
    assert len(builtin.names) == 24 and "BSD-3-Clause" in builtin.source
    import colour
    sds = colour.SDS_COLOURCHECKERS["BabelColor Average"]
    wl = sds["dark skin"].wavelengths
    rows = ["name," + ",".join(f"{w:g}" for w in wl)]
    for n in ("dark skin", "cyan"):
        rows.append(n + "," + ",".join(f"{v * 100:.4f}" for v in sds[n].values))     # percent
    t = read_target("\n".join(rows))
    np.testing.assert_allclose(t.lab_of(["cyan", "dark skin"]), builtin.lab_of(["cyan", "dark skin"]), atol=0.01)


def test_target_calibration_fits_its_patches(flat):
    target = builtin_target()
    names = list(target.names)
    lab = target.lab_of(names)
    from physics.color import lab_to_xyz
    lin = _linear_srgb(lab_to_xyz(lab), "D65", "2") @ MIX.T * 0.8
    img = np.zeros((H, W, 3))
    img[:] = 0.2
    boxes = []
    for k, rgb in enumerate(lin):
        r, c = divmod(k, 8)
        y0, x0 = 3 + 19 * r, 2 + 12 * c
        img[y0:y0 + 12, x0:x0 + 10] = rgb
        boxes.append((x0 + 2, y0 + 2, x0 + 8, y0 + 10))
    photo = _encode(img * _fall_off()[..., None] + DARK)
    cal = calibrate_from_target(photo, boxes, lab, flat_field=flat, model="root-polynomial")
    assert cal.kind == "target" and cal.residual_nm.size == 0
    assert cal.rms_delta_e < 1.0, cal.message
    back = CameraCalibration.from_dict(json.loads(json.dumps(cal.to_dict())))
    assert back.model == "root-polynomial"
    with pytest.raises(InputError, match="reference colours"):
        calibrate_from_target(photo, boxes, lab[:-1], flat_field=flat)
