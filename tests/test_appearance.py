"""What an observer sees: viewing cones, colour maps and fringe orders."""

import numpy as np
import pytest

from physics import InputError, Layer, Stack, spectrum_to_xyz, sweep
from physics.appearance import (color_map, colour_band_nm, cone_rays, cone_reflectance, interference_order,
                                order_thicknesses_nm)
from physics.stackfile import load_preset

OXIDE = load_preset("thermal_oxide_on_silicon").stack


def _pupil_average(stack, wl, view_deg, na, n=400):
    """Brute-force average over a uniformly filled pupil: a fine grid in the pupil's direction
    cosines (an independent quadrature of the same integral)."""
    r_max = na
    g = np.linspace(-r_max, r_max, n)
    px, py = np.meshgrid(g, g)
    inside = px ** 2 + py ** 2 <= r_max ** 2
    px, py = px[inside], py[inside]
    pz = np.sqrt(1 - px ** 2 - py ** 2)
    # weight of a pupil point: uniform in (px, py) (projected solid angle)
    t = np.radians(view_deg)
    # rotate the cone axis from the normal to the viewing direction about y
    z = pz * np.cos(t) + px * np.sin(t)
    theta = np.degrees(np.arccos(np.clip(z, -1, 1)))
    keep = theta < 89.9
    R = stack.reflectance(wl, theta[keep])
    return R.mean(axis=0)


@pytest.mark.parametrize("view, na", [(0.0, 0.3), (30.0, 0.5), (60.0, 0.25)])
def test_cone_average_matches_brute_force_pupil_integration(view, na):
    wl = np.array([450.0, 550.0, 650.0])
    stack = OXIDE.with_thickness(0, 300.0)
    got = cone_reflectance(stack, wl, view, na)
    ref = _pupil_average(stack, wl, view, na)
    np.testing.assert_allclose(got, ref, atol=2e-3)


def test_cone_rays_weights_and_limits():
    angles, w = cone_rays([0.0, 45.0, 85.0], 0.6)
    np.testing.assert_allclose(w.sum(axis=1), 1.0)
    assert angles[0].max() == pytest.approx(np.degrees(np.arcsin(0.6)), abs=3.0)
    a0, w0 = cone_rays([10.0], 0.0)
    assert a0.tolist() == [[10.0]] and w0.tolist() == [[1.0]]
    with pytest.raises(InputError):
        cone_rays([0.0], 1.2)


def test_small_cone_tends_to_the_single_direction():
    wl = colour_band_nm(OXIDE)
    R0 = OXIDE.reflectance(wl, 20.0)
    np.testing.assert_allclose(cone_reflectance(OXIDE, wl, 20.0, 0.01), R0, atol=2e-4)


@pytest.mark.parametrize("d, ang, na, atol", [
    ((80.0, 260.0, 510.0), (0.0, 25.0, 50.0), 0.4, 3e-4),
    ((200.0, 1500.0, 3000.0), (0.0, 40.0, 75.0), 0.6, 1e-3),   # thick rows, a cone cut at grazing
])
def test_cone_map_equals_direct_cone_average(d, ang, na, atol):
    """The map interpolates R on a cos θ grid; the direct average evaluates every ray."""
    wl = colour_band_nm(OXIDE)
    d, ang = np.array(d), np.array(ang)
    cm = color_map(OXIDE, 0, d, ang, wl, na=na)
    for i, t in enumerate(d):
        R = cone_reflectance(OXIDE.with_thickness(0, t), wl, ang, na)
        np.testing.assert_allclose(cm.xyz[i], spectrum_to_xyz(R, wl), atol=atol)


def test_normalized_brightness_makes_the_brightest_white():
    cm = color_map(OXIDE, 0, np.linspace(0, 600, 61), [0.0, 40.0], brightness="normalized")
    assert cm.scale > 1 and cm.lab[..., 0].max() == pytest.approx(100.0, abs=1e-6)


def test_fringe_orders():
    """Round-trip optical path 2 n d cos θ (Born & Wolf, sec. 7.5.1, fringes of equal thickness)."""
    n = OXIDE.layers[0].material.nk(550.0).real
    assert float(interference_order(OXIDE, 0, 100.0)) == pytest.approx(2 * n * 100.0 / 550.0)
    marks = order_thicknesses_nm(OXIDE, 0, 0.0, 1000.0)
    np.testing.assert_allclose(marks[:2], [550.0 / (2 * n), 1100.0 / (2 * n)])
    tilted = order_thicknesses_nm(OXIDE, 0, 60.0, 1000.0)
    assert tilted[0] > marks[0]                      # cos θ inside the film shrinks the path
