"""Viewing cones: the adaptive quadrature against a fine independent one, lab-frame polarizers, NA limits.

The stacks are invented test cases (oxide and high-index films of a few µm on silicon or glass), with
indices given as numbers so the checks do not depend on a material table.
"""

import numpy as np
import pytest
import tmm
from scipy.integrate import quad_vec

from physics import InputError, Layer, Stack
from physics.appearance import (DRY_INDEX_MAX, IMMERSION_NA_FRACTION, MAX_NA, cone_rays,
                                cone_reflectance, max_na)

SI = 3.9 + 0.02j                    # an absorbing substrate (near crystalline Si at 600 nm, rounded)
GLASS = 1.52
WAVELENGTHS = np.array([400.0, 470.0, 550.0, 620.0, 700.0])
STACKS = {
    "bare silicon": Stack([], substrate=SI, ambient=1.0),
    "1.5 µm oxide on silicon": Stack([Layer(1.46, 1500.0)], substrate=SI, ambient=1.0),
    "5 µm oxide on silicon": Stack([Layer(1.46, 5000.0)], substrate=SI, ambient=1.0),
    "5 µm n=2.4 film on glass": Stack([Layer(2.4, 5000.0)], substrate=GLASS, ambient=1.0),
    "2 µm n=2.0 + 3 µm oxide on silicon": Stack([Layer(2.0, 2000.0), Layer(1.46, 3000.0)], substrate=SI,
                                                 ambient=1.0),
}
#: Accuracy goal of the cone average against a converged one.
CONE_TOLERANCE = 1e-4
#: (view °, NA) of the convergence grid: normal, oblique and near-grazing views, narrow to the widest dry cone,
#: cut cones (view + half-angle past 90°) among them.
CONE_CASES = [(0.0, 0.3), (0.0, 0.95), (30.0, 0.95), (60.0, 0.6), (75.0, 0.3), (75.0, 0.95)]
#: Last kept incidence angle (rays beyond are dropped, as in the physics).
GRAZING = np.radians(89.9)


def _fine_cone_average(stack, wl, view_deg, na, pol, n0=1.0, n_alpha=100, n_phi=140):
    """A fine, independent quadrature of the same average: Gauss-Legendre in the cone angle α (weight
    sin α cos α) and in φ over each ring's kept arc [0, φ_max(α)], split where rings start to be cut,
    with α = α_c + L t² on cut rings (their arc ends like a square root). At 100 x 140 nodes it agrees
    with 320 x 480 to 1e-6 on the cases below."""
    tv = np.radians(view_deg)
    amax = np.arcsin(na / n0)
    cut = GRAZING - tv
    pieces = [(0.0, min(cut, amax), False)] if cut > 0 else []
    if cut < amax:
        pieces.append((max(cut, 0.0), amax, True))
    xa, wa = np.polynomial.legendre.leggauss(n_alpha)
    xp, wp = np.polynomial.legendre.leggauss(n_phi)
    num, den = 0.0, 0.0
    for lo, hi, is_cut in pieces:
        t = 0.5 * (xa + 1)
        if is_cut:
            alpha, jac = lo + (hi - lo) * t * t, 0.5 * wa * 2 * (hi - lo) * t
        else:
            alpha, jac = lo + (hi - lo) * t, 0.5 * wa * (hi - lo)
        if tv == 0:
            pmax = np.full(alpha.shape, np.pi)
        else:
            x = (np.cos(GRAZING) - np.cos(tv) * np.cos(alpha)) / (np.sin(tv) * np.sin(alpha))
            pmax = np.arccos(np.clip(x, -1, 1))
        phi = 0.5 * pmax[:, None] * (xp[None, :] + 1)
        w = (jac * np.sin(alpha) * np.cos(alpha) * 0.5 * pmax)[:, None] * wp[None, :]
        ct = np.cos(tv) * np.cos(alpha)[:, None] + np.sin(tv) * np.sin(alpha)[:, None] * np.cos(phi)
        theta = np.minimum(np.degrees(np.arccos(np.clip(ct, -1, 1))), 89.9)
        R = stack.reflectance(wl, theta.ravel(), pol)
        num = num + w.ravel() @ R
        den = den + w.sum()
    return num / den


def _scipy_cone_average(stack, wl, view_deg, na, pol, n0=1.0):
    """The same average with scipy.integrate.quad_vec (adaptive) over α, 200 Gauss-Legendre nodes in φ."""
    tv = np.radians(view_deg)
    xp, wp = np.polynomial.legendre.leggauss(200)

    def ring(alpha):
        x = (np.cos(GRAZING) - np.cos(tv) * np.cos(alpha)) / (np.sin(tv) * np.sin(alpha) + 1e-300)
        pmax = np.pi if tv == 0 else np.arccos(np.clip(x, -1, 1))
        phi = 0.5 * pmax * (xp + 1)
        ct = np.cos(tv) * np.cos(alpha) + np.sin(tv) * np.sin(alpha) * np.cos(phi)
        R = stack.reflectance(wl, np.minimum(np.degrees(np.arccos(np.clip(ct, -1, 1))), 89.9), pol)
        jac = np.sin(alpha) * np.cos(alpha)
        return np.concatenate([jac * 0.5 * pmax * (wp @ R), [jac * pmax]])

    amax = np.arcsin(na / n0)
    points = [GRAZING - tv] if 0 < GRAZING - tv < amax else None
    val, _ = quad_vec(ring, 0.0, amax, points=points, epsabs=1e-8, epsrel=1e-9, limit=200)
    return val[:-1] / val[-1]


def test_fine_reference_agrees_with_scipy_adaptive_integration():
    """The test's own fine quadrature checked once against scipy.integrate.quad_vec, on a cut cone."""
    stack = STACKS["1.5 µm oxide on silicon"]
    wl = np.array([400.0])
    ref = _scipy_cone_average(stack, wl, 75.0, 0.3, "s")
    np.testing.assert_allclose(_fine_cone_average(stack, wl, 75.0, 0.3, "s"), ref, atol=1e-6)


@pytest.mark.parametrize("name", list(STACKS))
def test_cone_average_converges_to_the_fine_quadrature(name):
    """|ΔR| <= 1e-4 for NA up to 0.95, views up to 75°, s, p and unpolarized, 400-700 nm."""
    stack = STACKS[name]
    worst = 0.0
    for view, na in CONE_CASES:
        ref = {p: _fine_cone_average(stack, WAVELENGTHS, view, na, p) for p in ("s", "p")}
        ref["unpolarized"] = 0.5 * (ref["s"] + ref["p"])
        for pol, r in ref.items():
            got = cone_reflectance(stack, WAVELENGTHS, view, na, pol)
            worst = max(worst, float(np.abs(got - r).max()))
    assert worst <= CONE_TOLERANCE


def test_thick_oxide_example_at_normal_view():
    """A 1.5 µm oxide at NA 0.9 and 420 nm: the converged average (the fixed 8 x 12 rule gave 0.2242)."""
    stack = STACKS["1.5 µm oxide on silicon"]
    ref = _fine_cone_average(stack, np.array([420.0]), 0.0, 0.9, "unpolarized")
    got = cone_reflectance(stack, [420.0], 0.0, 0.9)
    assert got[0] == pytest.approx(0.2347, abs=5e-4)
    assert abs(got[0] - ref[0]) <= CONE_TOLERANCE


def test_ray_count_follows_the_film():
    thin = cone_rays([30.0], 0.6, 1.0)[0].shape[1]
    thick = cone_rays([30.0], 0.6, 1.0, stack=STACKS["5 µm oxide on silicon"], wavelength_nm=WAVELENGTHS)
    assert thick[0].shape[1] > 4 * thin
    np.testing.assert_allclose(thick[1].sum(axis=1), 1.0)


def test_rays_past_grazing_are_dropped():
    angles, weights = cone_rays([75.0], 0.95, 1.0)
    assert angles.max() <= 89.9 + 1e-9 and np.all(weights >= 0)
    # the kept share of the pupil: the dropped rays carry no weight, so R of a cut cone is the mean over
    # the kept rays only (a perfect absorber's neighbour, R = 1 at grazing, would otherwise dominate)
    with pytest.raises(InputError, match="below the surface"):
        cone_rays([89.95], 0.0001, 1.0)


# ----------------------------------------------------------------------------- lab-frame polarizers
OXIDE = Stack([Layer(1.46, 300.0)], substrate=SI, ambient=1.0)
BARE_GLASS = Stack([], substrate=GLASS, ambient=1.0)


def test_reflection_amplitudes_match_tmm():
    """Complex r_s, r_p against tmm.coh_tmm (S. J. Byrnes, tmm package)."""
    n_list = [1.0, 2.0, 1.46, SI]
    d_list = [np.inf, 120.0, 800.0, np.inf]
    stack = Stack([Layer(2.0, 120.0), Layer(1.46, 800.0)], substrate=SI, ambient=1.0)
    wl = np.array([420.0, 555.0, 690.0])
    ang = np.array([0.0, 35.0, 70.0])
    r_s, r_p = stack.reflection_amplitudes(wl, ang)
    for i, a in enumerate(ang):
        for j, w in enumerate(wl):
            assert r_s[i, j] == pytest.approx(tmm.coh_tmm("s", n_list, d_list, np.radians(a), w)["r"], abs=1e-10)
            assert r_p[i, j] == pytest.approx(tmm.coh_tmm("p", n_list, d_list, np.radians(a), w)["r"], abs=1e-10)
    with pytest.raises(InputError, match="thick substrate"):
        Stack([], substrate=GLASS, ambient=1.0, substrate_thickness_mm=1.0).reflection_amplitudes(wl)


@pytest.mark.parametrize("stack", [BARE_GLASS, OXIDE], ids=["glass", "oxide"])
def test_normal_view_is_the_same_for_every_polarizer_angle(stack):
    """An isotropic stack seen along the normal has no preferred direction in its plane."""
    wl = np.array([450.0, 600.0])
    ref = cone_reflectance(stack, wl, 0.0, 0.5, polarizer_deg=0.0)
    for psi in (90.0, 33.0, -70.0):
        np.testing.assert_allclose(cone_reflectance(stack, wl, 0.0, 0.5, polarizer_deg=psi), ref, atol=1e-12)
    for psi in (0.0, 90.0, 33.0):
        par = cone_reflectance(stack, wl, 0.0, 0.5, polarizer_deg=psi, analyzer_deg=psi)
        np.testing.assert_allclose(par, cone_reflectance(stack, wl, 0.0, 0.5, polarizer_deg=0, analyzer_deg=0),
                                   atol=1e-12)
    # and without an analyzer it equals the unpolarized cone (each ray's s and p shares average out)
    np.testing.assert_allclose(ref, cone_reflectance(stack, wl, 0.0, 0.5), atol=1e-12)


def test_per_ray_s_and_p_differ_from_a_real_polarizer():
    """Per-ray "s" and "p" are not what a linear polarizer gives: at normal view they differ, a polarizer does not."""
    s = cone_reflectance(BARE_GLASS, [550.0], 0.0, 0.5, "s")
    p = cone_reflectance(BARE_GLASS, [550.0], 0.0, 0.5, "p")
    lab = cone_reflectance(BARE_GLASS, [550.0], 0.0, 0.5, polarizer_deg=90.0)
    assert s[0] - p[0] > 0.01
    assert lab[0] == pytest.approx(0.5 * (s[0] + p[0]), abs=1e-12)


@pytest.mark.parametrize("view", [0.0, 40.0, 70.0])
def test_small_cone_polarizer_reduces_to_s_and_p(view):
    """90° (field perpendicular to the plane of tilt) is s, 0° is p, as the cone shrinks to one ray."""
    wl = np.array([430.0, 650.0])
    for na in (0.0, 1e-4):
        np.testing.assert_allclose(cone_reflectance(OXIDE, wl, view, na, polarizer_deg=90.0),
                                   OXIDE.reflectance(wl, view, "s"), atol=1e-7)
        np.testing.assert_allclose(cone_reflectance(OXIDE, wl, view, na, polarizer_deg=0.0),
                                   OXIDE.reflectance(wl, view, "p"), atol=1e-7)
        # parallel analyzer at an oblique polarizer: |r_s sin²ψ − r_p cos²ψ|², the sign from p̂ = ŝ × k̂
        psi = np.radians(30.0)
        r_s, r_p = OXIDE.reflection_amplitudes(wl, view)
        want = np.abs(r_s * np.sin(psi) ** 2 - r_p * np.cos(psi) ** 2) ** 2
        np.testing.assert_allclose(cone_reflectance(OXIDE, wl, view, na, polarizer_deg=30.0, analyzer_deg=30.0),
                                   want, atol=1e-7)


def test_crossed_polarizers_pass_nothing_as_the_cone_shrinks():
    wl = np.array([500.0])
    for psi in (0.0, 25.0, 90.0):                       # at normal view, any polarizer angle
        assert cone_reflectance(OXIDE, wl, 0.0, 1e-4, polarizer_deg=psi, analyzer_deg=psi + 90)[0] < 1e-12
    for psi in (0.0, 90.0):                             # oblique: along s or p (others turn the field); the
        # leak of a cone of NA 1e-4 is of order NA² R
        assert cone_reflectance(OXIDE, wl, 45.0, 1e-4, polarizer_deg=psi, analyzer_deg=psi + 90)[0] < 1e-9
    # a wide cone leaks: the rays' planes of incidence turn about the axis (the Maltese cross)
    assert cone_reflectance(OXIDE, wl, 0.0, 0.6, polarizer_deg=0.0, analyzer_deg=90.0)[0] > 1e-5


def test_parallel_plus_crossed_analyzer_is_the_polarizer_alone():
    wl = np.array([420.0, 580.0])
    par = cone_reflectance(OXIDE, wl, 25.0, 0.7, polarizer_deg=10.0, analyzer_deg=10.0)
    crossed = cone_reflectance(OXIDE, wl, 25.0, 0.7, polarizer_deg=10.0, analyzer_deg=100.0)
    np.testing.assert_allclose(par + crossed, cone_reflectance(OXIDE, wl, 25.0, 0.7, polarizer_deg=10.0),
                               atol=1e-12)
    # unpolarized light through an analyzer: the mean of two crossed polarizers
    unpol = cone_reflectance(OXIDE, wl, 25.0, 0.7, analyzer_deg=10.0)
    both = [cone_reflectance(OXIDE, wl, 25.0, 0.7, polarizer_deg=p, analyzer_deg=10.0) for p in (10.0, 100.0)]
    np.testing.assert_allclose(unpol, 0.5 * (both[0] + both[1]), atol=1e-12)


def test_polarizer_transmittance_and_refusals():
    plate = Stack([Layer(1.46, 500.0)], substrate=GLASS, ambient=1.0)
    wl = np.array([550.0])
    T = cone_reflectance(plate, wl, 0.0, 0.3, quantity="transmittance", polarizer_deg=45.0)
    np.testing.assert_allclose(T, cone_reflectance(plate, wl, 0.0, 0.3, quantity="transmittance"), atol=1e-12)
    with pytest.raises(InputError, match="reflected beam only"):
        cone_reflectance(plate, wl, 0.0, 0.3, quantity="transmittance", polarizer_deg=0, analyzer_deg=90)
    with pytest.raises(InputError, match="exclude each other"):
        cone_reflectance(plate, wl, 0.0, 0.3, "s", polarizer_deg=0)
    thick = Stack([], substrate=GLASS, ambient=1.0, substrate_thickness_mm=1.0)
    with pytest.raises(InputError, match="thick"):
        cone_reflectance(thick, wl, 0.0, 0.3, polarizer_deg=0, analyzer_deg=0)


# ----------------------------------------------------------------------------- NA limits
def test_na_cap_follows_the_ambient():
    assert max_na(1.00028) == MAX_NA
    assert max_na(1.333) == pytest.approx(IMMERSION_NA_FRACTION * 1.333)
    assert DRY_INDEX_MAX < 1.333
    water = Stack([Layer(1.46, 300.0)], substrate=SI, ambient=1.333)
    R = cone_reflectance(water, [550.0], 0.0, 1.2)            # a water-immersion objective
    assert 0 < R[0] < 1
    with pytest.raises(InputError, match="1.333"):
        cone_reflectance(water, [550.0], 0.0, 1.32)
    with pytest.raises(InputError, match="dry objective"):
        cone_rays([0.0], 0.97, 1.0)


def test_stack_file_na_is_checked_against_its_ambient():
    from physics.stackfile import stack_to_dict
    water = Stack([Layer(1.46, 300.0)], substrate=SI, ambient=1.333)
    assert stack_to_dict(water, view={"na": 1.25})["view"]["na"] == 1.25
    with pytest.raises(InputError, match="view.na: NA = 1.25 is too large"):
        stack_to_dict(Stack([Layer(1.46, 300.0)], substrate=SI, ambient=1.0), view={"na": 1.25})


@pytest.mark.parametrize("na", [0.0, 0.5])
@pytest.mark.parametrize("polarizer, analyzer", [(90.0, None), (20.0, None), (20.0, 20.0), (0.0, 90.0), (None, 30.0)])
def test_colour_map_with_a_polarizer_matches_direct_cone_averages(na, polarizer, analyzer):
    from physics import spectrum_to_xyz
    from physics.appearance import color_map
    wl = np.linspace(400.0, 700.0, 16)
    d, ang = np.array([100.0, 2000.0]), np.array([0.0, 70.0])
    cm = color_map(OXIDE, 0, d, ang, wl, na=na, polarizer_deg=polarizer, analyzer_deg=analyzer)
    for i, t in enumerate(d):
        R = cone_reflectance(OXIDE.with_thickness(0, t), wl, ang, na, polarizer_deg=polarizer, analyzer_deg=analyzer)
        # the map interpolates R on its cos θ grid (cubic); the direct average evaluates every ray
        np.testing.assert_allclose(cm.xyz[i], spectrum_to_xyz(R, wl), atol=1e-4)
