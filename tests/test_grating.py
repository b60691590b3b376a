"""Diffraction gratings checked against handbook relations and values worked by hand.

Convention under test: m·λ = d·(sin α + sin β), angles from the grating normal, positive on the
side of the incident beam, d = 10⁶ / (lines per mm) nm. Values marked "by hand" were worked from
the relation named beside them, not taken from any table.
"""

import math
import warnings

import numpy as np
import pytest
from hypothesis import assume, given
from hypothesis import strategies as st

from physics import InputError
from physics import grating as G
from physics.color import xyz_to_lab

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    import colour

# ---------------------------------------------------------------------- strategies
wavelengths = st.floats(200.0, 2000.0, allow_nan=False, allow_infinity=False)
densities = st.floats(10.0, 3600.0, allow_nan=False, allow_infinity=False)
incidences = st.floats(-89.0, 89.0, allow_nan=False, allow_infinity=False)
nonzero_orders = st.integers(-5, 5).filter(lambda m: m != 0)
positive_orders = st.integers(1, 5)

#: Rounding slack on |sin β| <= 1 that the module documents (an order exactly at grazing propagates).
GRAZING_TOL = 1e-12


def _sin_beta(wl, lpmm, m, alpha):
    """The grating equation solved for sin β (independent of the module)."""
    return m * wl / (1e6 / lpmm) - math.sin(math.radians(alpha))


# ---------------------------------------------------------------------- diffraction angles
# Normal incidence, 1200 lines/mm (d = 833.33 nm), 500 nm — by hand from m·λ = d·(sin α + sin β):
#   m = ±1: sin β = ±0.6 → β = ±36.8699°;  m = ±2: sin β = ±1.2 → evanescent;  m = 0: β = 0.
@pytest.mark.parametrize("order, beta", [(1, 36.8699), (-1, -36.8699), (0, 0.0)])
def test_normal_incidence_angles_by_hand(order, beta):
    assert G.diffraction_angle_deg(500.0, 1200.0, order) == pytest.approx(beta, abs=5e-5)
    assert "propagates" in G.order_status(500.0, 1200.0, order)


@pytest.mark.parametrize("order", [2, -2, 3])
def test_normal_incidence_evanescent_orders(order):
    assert math.isnan(G.diffraction_angle_deg(500.0, 1200.0, order))
    status = G.order_status(500.0, 1200.0, order)
    assert "evanescent" in status and "propagates" not in status


# Oblique incidence, 600 lines/mm (d = 1666.67 nm), 500 nm, α = 30° (sin α = 0.5) — by hand:
#   m·λ/d = 0.3·m, so sin β = 0.3 m − 0.5:
#   m = −1: −0.8 → −53.1301°; m = 0: −0.5 → −30° (specular); m = 1: −0.2 → −11.5370°;
#   m = 2: 0.1 → 5.7392°; m = 3: 0.4 → 23.5782°; m = 4: 0.7 → 44.4270°; m = 5: 1.0 → 90° (grazing);
#   m = −2: −1.1 and m = 6: 1.3 → evanescent.
OBLIQUE = {-1: -53.1301, 0: -30.0, 1: -11.5370, 2: 5.7392, 3: 23.5782, 4: 44.4270, 5: 90.0}


@pytest.mark.parametrize("order, beta", sorted(OBLIQUE.items()))
def test_oblique_incidence_angles_by_hand(order, beta):
    assert G.diffraction_angle_deg(500.0, 600.0, order, 30.0) == pytest.approx(beta, abs=5e-4)


def test_oblique_incidence_orders_by_hand():
    assert G.propagating_orders(500.0, 600.0, 30.0) == sorted(OBLIQUE)
    for m in (-2, 6):
        assert math.isnan(G.diffraction_angle_deg(500.0, 600.0, m, 30.0))
        assert "evanescent" in G.order_status(500.0, 600.0, m, 30.0)


def test_angles_broadcast_over_orders():
    beta = G.diffraction_angle_deg(500.0, 600.0, np.arange(-2, 7), 30.0)
    assert beta.shape == (9,)
    assert np.isnan(beta[0]) and np.isnan(beta[-1])
    np.testing.assert_allclose(beta[1:-1], [OBLIQUE[m] for m in range(-1, 6)], atol=5e-4)


@given(wavelengths, densities, nonzero_orders)
def test_plus_minus_orders_symmetric_at_normal_incidence(wl, lpmm, m):
    b_plus = G.diffraction_angle_deg(wl, lpmm, m)
    b_minus = G.diffraction_angle_deg(wl, lpmm, -m)
    assert np.isnan(b_plus) == np.isnan(b_minus)
    if not np.isnan(b_plus):
        assert b_minus == pytest.approx(-b_plus, abs=1e-12)


@given(wavelengths, densities, nonzero_orders, incidences)
def test_angles_satisfy_the_grating_equation(wl, lpmm, m, alpha):
    s = _sin_beta(wl, lpmm, m, alpha)
    assume(abs(s) < 1 - 1e-9)
    beta = G.diffraction_angle_deg(wl, lpmm, m, alpha)
    d = 1e6 / lpmm
    assert d * (math.sin(math.radians(alpha)) + math.sin(math.radians(beta))) == pytest.approx(
        m * wl, rel=1e-9, abs=1e-9 * d)


# ---------------------------------------------------------------------- propagating orders
@given(wavelengths, densities, incidences)
def test_propagating_orders_brute_force(wl, lpmm, alpha):
    orders = G.propagating_orders(wl, lpmm, alpha)
    assert 0 in orders
    assert orders == sorted(orders) and all(isinstance(m, int) for m in orders)
    d = 1e6 / lpmm
    m_max = int(math.ceil(2 * d / wl)) + 3
    m = np.arange(-m_max, m_max + 1)
    s = m * wl / d - math.sin(math.radians(alpha))
    strict = set(m[np.abs(s) <= 1.0].tolist())
    with_rounding = set(m[np.abs(s) <= 1.0 + GRAZING_TOL].tolist())
    assert strict <= set(orders)
    assert set(orders) == with_rounding
    beta = G.diffraction_angle_deg(wl, lpmm, m, alpha)
    np.testing.assert_array_equal(np.isfinite(beta), np.isin(m, orders))


# ---------------------------------------------------------------------- Littrow and blaze
def test_littrow_and_blaze_by_hand():
    # Littrow, sin θ = m·λ/(2d): 1200 lines/mm, 500 nm, m = 1 → sin θ = 0.3, θ = 17.4576° (by hand).
    assert G.littrow_angle_deg(500.0, 1200.0, 1) == pytest.approx(17.4576, abs=5e-5)
    # m = 4: sin θ = 1.2 → no Littrow configuration.
    assert math.isnan(G.littrow_angle_deg(500.0, 1200.0, 4))
    # Blaze in Littrow, λ_B = 2d sin θ_B / m: 600 lines/mm (d = 1666.67 nm), sin θ_B = 0.3 →
    # λ_B = 1000 nm in order 1, 500 nm in order 2 (by hand).
    tb = math.degrees(math.asin(0.3))
    assert G.blaze_wavelength_nm(tb, 600.0, 1) == pytest.approx(1000.0, rel=1e-12)
    assert G.blaze_wavelength_nm(tb, 600.0, 2) == pytest.approx(500.0, rel=1e-12)
    # At a deviation D between the beams, λ_B·cos(D/2): D = 60° → 1000·cos 30° = 866.025 nm (by hand).
    assert G.blaze_wavelength_at_deviation_nm(tb, 600.0, 1, 60.0) == pytest.approx(866.0254, abs=1e-4)
    assert G.blaze_wavelength_at_deviation_nm(tb, 600.0, 1, 0.0) == pytest.approx(1000.0, rel=1e-12)


@given(wavelengths, densities, positive_orders)
def test_littrow_means_incidence_equals_diffraction(wl, lpmm, m):
    theta = G.littrow_angle_deg(wl, lpmm, m)
    s = m * wl / (2e6 / lpmm)
    assert np.isnan(theta) == (s > 1)
    assume(s < 0.999)
    assert math.sin(math.radians(theta)) == pytest.approx(s, rel=1e-12)
    assert G.diffraction_angle_deg(wl, lpmm, m, theta) == pytest.approx(theta, abs=1e-8)


@given(st.floats(0.5, 85.0), densities, positive_orders)
def test_littrow_angle_of_blaze_wavelength_is_blaze_angle(tb, lpmm, m):
    lb = G.blaze_wavelength_nm(tb, lpmm, m)
    assert lb == pytest.approx(2 * (1e6 / lpmm) * math.sin(math.radians(tb)) / m, rel=1e-12)
    assert G.littrow_angle_deg(lb, lpmm, m) == pytest.approx(tb, abs=1e-7)


@given(st.floats(0.5, 80.0), densities, positive_orders, st.floats(0.0, 120.0))
def test_blaze_at_deviation_is_the_grating_equation_at_the_facet_angle(tb, lpmm, m, dev):
    # Grating turned by θ_B, beams ±D/2 about it: α = θ_B + D/2, β = θ_B − D/2, so
    # m·λ = d·(sin α + sin β) = 2d·sin θ_B·cos(D/2).
    lb = G.blaze_wavelength_at_deviation_nm(tb, lpmm, m, dev)
    assert lb == pytest.approx(G.blaze_wavelength_nm(tb, lpmm, m) * math.cos(math.radians(dev) / 2), rel=1e-12)
    alpha = tb + dev / 2
    assume(alpha < 89.0 and tb - dev / 2 > -85.0)
    assert G.diffraction_angle_deg(lb, lpmm, m, alpha) == pytest.approx(tb - dev / 2, abs=1e-7)


@pytest.mark.parametrize("func", [G.blaze_wavelength_nm,
                                  lambda tb, g, m: G.blaze_wavelength_at_deviation_nm(tb, g, m, 20.0)])
def test_blaze_wavelength_is_never_negative(func):
    # A wavelength is positive; a negative order must give a positive blaze wavelength or a clear error.
    try:
        lb = func(17.0, 600.0, -1)
    except InputError:
        return
    assert lb > 0


# ---------------------------------------------------------------------- resolving power
def test_resolving_power_is_m_times_n():
    # R = |m|·N, N = density × illuminated width: 1200 lines/mm × 10 mm × order 2 = 24000 (by hand).
    assert G.resolving_power(1200.0, 10.0, 2) == pytest.approx(24000.0)
    assert G.resolving_power(1200.0, 10.0, -2) == pytest.approx(24000.0)
    assert G.resolvable_difference_nm(600.0, 1200.0, 10.0, 2) == pytest.approx(600.0 / 24000.0)


# Sodium D doublet, 589.0 and 589.6 nm (wavelengths recalled from memory): λ/Δλ ≈ 982, so a
# resolving power of about 1000 separates it (the classic handbook example of R = mN).
NA_D1, NA_D2 = 589.0, 589.6


@pytest.mark.parametrize("lpmm, width_mm, order, separates", [
    (1200.0, 1.0, 1, True),      # N = 1200, R = 1200 > 982
    (1200.0, 0.5, 1, False),     # N = 600,  R = 600 < 982
    (1200.0, 0.5, 2, True),      # N = 600 in order 2, R = 1200
    (100.0, 9.0, 1, False),      # N = 900,  R = 900 < 982
    (100.0, 10.0, 1, True),      # N = 1000, R = 1000 > 982
])
def test_sodium_doublet(lpmm, width_mm, order, separates):
    dl = G.resolvable_difference_nm(NA_D1, lpmm, width_mm, order)
    assert (dl < NA_D2 - NA_D1) == separates


# ---------------------------------------------------------------------- free spectral range and overlaps
def test_free_spectral_range_by_hand():
    # FSR = λ/m with λ the short end: 400 nm in order 1 → 400 nm (400-800), order 2 → 200 nm (400-600).
    assert G.free_spectral_range_nm(400.0, 1) == pytest.approx(400.0)
    assert G.free_spectral_range_nm(400.0, 2) == pytest.approx(200.0)
    assert G.free_spectral_range_nm(400.0, -2) == pytest.approx(200.0)
    # Exact form with λ the long end: 800 nm in order 1 → 800/2 = 400 nm; 600 nm in order 2 → 200 nm.
    assert G.free_spectral_range_exact_nm(800.0, 1) == pytest.approx(400.0)
    assert G.free_spectral_range_exact_nm(600.0, 2) == pytest.approx(200.0)


@given(wavelengths, positive_orders)
def test_free_spectral_range_short_and_long_end_agree(lo, m):
    hi = lo * (m + 1) / m
    assert G.free_spectral_range_nm(lo, m) == pytest.approx(hi - lo, rel=1e-12)
    assert G.free_spectral_range_exact_nm(hi, m) == pytest.approx(hi - lo, rel=1e-12)


@given(wavelengths, densities, nonzero_orders, incidences)
def test_next_order_overlaps_at_the_same_angle(wl, lpmm, m, alpha):
    # Order m+1 at λ·m/(m+1) (same sign) satisfies the grating equation with the same m·λ.
    mp = m + (1 if m > 0 else -1)
    b = G.diffraction_angle_deg(wl, lpmm, m, alpha)
    assume(not np.isnan(b) and abs(b) < 89.0)
    assert G.diffraction_angle_deg(wl * m / mp, lpmm, mp, alpha) == pytest.approx(b, abs=1e-8)


def test_order_overlaps_by_hand():
    # 600 lines/mm, 400-700 nm in order 1, source 200-1100 nm (λ' = λ/m'):
    #   order 2 brings 200-350 nm onto the whole band; order 3 brings 133-233 nm, of which the source
    #   emits 200-233.3 nm, landing on 600-700 nm; order 4 brings 100-175 nm: none emitted.
    rows = G.order_overlaps((400.0, 700.0), 600.0, 1)
    assert [r["order"] for r in rows] == [2, 3]
    assert (rows[0]["lo_nm"], rows[0]["hi_nm"]) == pytest.approx((200.0, 350.0))
    assert rows[0]["at_band_nm"] == pytest.approx((400.0, 700.0))
    assert (rows[1]["lo_nm"], rows[1]["hi_nm"]) == pytest.approx((200.0, 700.0 / 3))
    assert rows[1]["at_band_nm"] == pytest.approx((600.0, 700.0))


@pytest.mark.parametrize("band, lpmm, order, alpha", [
    ((400.0, 700.0), 600.0, 1, 0.0),
    ((400.0, 700.0), 600.0, 2, 0.0),
    ((500.0, 650.0), 300.0, -1, 20.0),
    ((300.0, 500.0), 1200.0, 1, -15.0),
    ((400.0, 900.0), 1200.0, 1, 0.0),      # only part of the band propagates (up to d = 833 nm)
])
def test_order_overlaps_share_angles_and_are_complete(band, lpmm, order, alpha):
    source = (200.0, 1100.0)
    rows = G.order_overlaps(band, lpmm, order, alpha, source_band_nm=source)
    assert rows, "a band this wide must meet another order"
    for r in rows:
        mp = r["order"]
        assert mp != order and mp * order > 0
        assert source[0] - 1e-9 <= r["lo_nm"] < r["hi_nm"] <= source[1] + 1e-9
        lam_p = np.linspace(r["lo_nm"], r["hi_nm"], 25)
        lam = mp * lam_p / order
        assert np.all(lam >= r["at_band_nm"][0] - 1e-9) and np.all(lam <= r["at_band_nm"][1] + 1e-9)
        assert np.all(lam >= band[0] - 1e-9) and np.all(lam <= band[1] + 1e-9)
        b_other = G.diffraction_angle_deg(lam_p, lpmm, mp, alpha)
        b_band = G.diffraction_angle_deg(lam, lpmm, order, alpha)
        assert np.all(np.isfinite(b_other))
        np.testing.assert_allclose(b_other, b_band, atol=1e-8)
    # Completeness: every other order of the same sign whose overlapping light the source emits.
    d = 1e6 / lpmm
    sa = math.sin(math.radians(alpha))
    hi_prop = min(band[1], d * (sa + (1 if order > 0 else -1)) / order)
    expected = []
    for k in range(1, 40):
        mp = k * (1 if order > 0 else -1)
        if mp == order:
            continue
        a, b = order * band[0] / mp, order * hi_prop / mp
        if max(a, source[0]) < min(b, source[1]) - 1e-3:      # clear overlap (not an endpoint touch)
            expected.append(mp)
    got = [r["order"] for r in rows]
    assert set(expected) <= set(got)


def test_order_sorting_filter_by_hand():
    # 450-800 nm in order 1 spans less than ×2: one long-pass edge at 450 nm removes order 2 (225-400 nm).
    one = G.order_sorting_filter_nm((450.0, 800.0), 1)
    assert one["edges_nm"] == pytest.approx([450.0])
    # 400-1100 nm in order 1: order 2 brings 400-550 nm onto 800-1100 nm, which a 400 nm edge passes;
    # a second section from 800 nm is needed (by hand).
    two = G.order_sorting_filter_nm((400.0, 1100.0), 1)
    assert two["edges_nm"] == pytest.approx([400.0, 800.0])
    # Order 3, 500-700 nm (×1.4 > ×4/3): edges 500 and 666.7 nm. Lower orders bring 3λ/m' onto the
    # band: order 2 from 750 nm (emitted by a 200-1100 nm source), order 1 from 1500 nm (not emitted
    # unless the source reaches that far).
    three = G.order_sorting_filter_nm((500.0, 700.0), 3)
    assert three["edges_nm"] == pytest.approx([500.0, 2000.0 / 3])
    assert three["longer_orders"] == [2]
    assert "Order 2 also brings longer wavelengths" in three["note"] and "from 750 nm" in three["note"]
    four = G.order_sorting_filter_nm((500.0, 700.0), 4, source_band_nm=(200.0, 3000.0))
    assert four["longer_orders"] == [1, 2, 3] and "Orders 1, 2 and 3 also bring" in four["note"]
    assert G.order_sorting_filter_nm((500.0, 700.0), 3, source_band_nm=(200.0, 2500.0))["longer_orders"] == [1, 2]


def test_order_sorting_filter_follows_the_source():
    # 200-1000 nm in order 1 with a source from 200 nm: order 2 brings λ/2 onto band position λ, which the
    # source emits only from λ = 400 nm (by hand): no filter below 400 nm, sections from 400 and 800 nm.
    res = G.order_sorting_filter_nm((200.0, 1000.0), 1, source_band_nm=(200.0, 1100.0))
    assert res["clean_below_nm"] == pytest.approx(400.0) and res["edges_nm"] == pytest.approx([400.0, 800.0])
    assert "below 400 nm needs no filter" in res["note"] and "400 and 800 nm" in res["note"]
    assert "200 nm" not in res["note"].split("needs no filter")[1]
    # 200-350 nm: order 2 would bring 100-175 nm, which the source does not emit: no filter at all.
    none = G.order_sorting_filter_nm((200.0, 350.0), 1, source_band_nm=(200.0, 1100.0))
    assert none["edges_nm"] == [] and none["note"].startswith("No long-pass filter is needed")
    one = G.order_sorting_filter_nm((450.0, 800.0), 1)
    assert one["note"] == "One long-pass filter with its edge just below 450 nm removes the higher orders."


@given(st.floats(150.0, 1000.0), st.floats(1.01, 6.0), positive_orders, st.floats(100.0, 900.0))
def test_order_sorting_filter_blocks_every_emitted_higher_order(lo, ratio, m, s_lo):
    hi = lo * ratio
    res = G.order_sorting_filter_nm((lo, hi), m, source_band_nm=(s_lo, 20000.0))
    edges = np.asarray(res["edges_nm"])
    lam = np.linspace(lo, hi, 401)[:-1]
    covered = lam >= res["clean_below_nm"]
    # uncovered positions: the next order's light there is shorter than the source emits
    assert np.all(lam[~covered] * m / (m + 1) < s_lo * (1 + 1e-12))
    if covered.any():
        e = edges[np.searchsorted(edges, lam[covered] * (1 + 1e-12), side="right") - 1]
        assert np.all(lam[covered] >= e * (1 - 1e-12)) and np.all(lam[covered] * m / (m + 1) < e * (1 + 1e-12))


@given(st.floats(200.0, 1000.0), st.floats(1.01, 6.0), positive_orders)
def test_order_sorting_filter_edges_block_every_higher_order(lo, ratio, m):
    hi = lo * ratio
    res = G.order_sorting_filter_nm((lo, hi), m, source_band_nm=(100.0, 10000.0))
    edges = res["edges_nm"]
    step = (m + 1) / m
    assert edges[0] == pytest.approx(lo)
    assert (len(edges) == 1) == (hi <= lo * step)
    assert all(e < hi for e in edges)
    np.testing.assert_allclose(np.diff(np.log(edges)), math.log(step), rtol=1e-9)
    # Each wavelength of the band sits behind the last edge at or below it: the band light passes it
    # and every higher order's light (λ·m/m') is below it, so it is blocked.
    lam = np.linspace(lo, hi, 401)[:-1]
    e = np.asarray(edges)[np.searchsorted(edges, lam * (1 + 1e-12), side="right") - 1]
    assert np.all(lam >= e * (1 - 1e-12))
    assert np.all(lam * m / (m + 1) < e * (1 + 1e-12))


# ---------------------------------------------------------------------- Rayleigh wavelengths
@given(densities, nonzero_orders, incidences)
def test_rayleigh_wavelength_is_grazing(lpmm, m, alpha):
    lr = G.rayleigh_wavelength_nm(lpmm, m, alpha)
    assert lr > 0
    beta = G.diffraction_angle_deg(lr, lpmm, m, alpha)
    assert abs(beta) == pytest.approx(90.0, abs=1e-5)
    assert np.sign(beta) == np.sign(m)
    assert "propagates" in G.order_status(lr, lpmm, m, alpha)
    assert np.isfinite(G.diffraction_angle_deg(lr * (1 - 1e-6), lpmm, m, alpha))
    above = lr * (1 + 1e-6)
    assert np.isnan(G.diffraction_angle_deg(above, lpmm, m, alpha))
    assert "evanescent" in G.order_status(above, lpmm, m, alpha)


def test_rayleigh_wavelength_by_hand():
    # λ = d(sin α + 1)/m: 1200 lines/mm at normal incidence, order 1 → 833.33 nm; α = 30°, order 2:
    # 833.33 × 1.5 / 2 = 625 nm; order −1 at α = 30°: 833.33 × (0.5 − 1)/(−1) = 416.67 nm (by hand).
    assert G.rayleigh_wavelength_nm(1200.0, 1) == pytest.approx(1e6 / 1200)
    assert G.rayleigh_wavelength_nm(1200.0, 2, 30.0) == pytest.approx(625.0)
    assert G.rayleigh_wavelength_nm(1200.0, -1, 30.0) == pytest.approx(1e6 / 2400)


# ---------------------------------------------------------------------- dispersion
def test_dispersion_by_hand():
    # 1200 lines/mm, 500 nm, order 1, normal incidence: cos β = 0.8, dβ/dλ = m/(d cos β)
    # = 1/(833.33 × 0.8) = 0.0015 rad/nm = 0.0859437 °/nm; with f = 100 mm: 0.15 mm/nm,
    # reciprocal 6.6667 nm/mm (by hand).
    assert G.angular_dispersion_deg_per_nm(500.0, 1200.0) == pytest.approx(0.0859437, rel=1e-6)
    assert G.linear_dispersion_mm_per_nm(500.0, 1200.0, 100.0) == pytest.approx(0.15, rel=1e-12)
    assert G.reciprocal_linear_dispersion_nm_per_mm(500.0, 1200.0, 100.0) == pytest.approx(20.0 / 3, rel=1e-12)


@given(wavelengths, densities, nonzero_orders, st.floats(-80.0, 80.0))
def test_angular_dispersion_matches_central_difference(wl, lpmm, m, alpha):
    s = _sin_beta(wl, lpmm, m, alpha)
    assume(abs(s) < 0.95)
    d = 1e6 / lpmm
    h = 1e-6 * d / abs(m)                               # moves sin β by 1e-6 (truncation ~1e-12)
    num = (G.diffraction_angle_deg(wl + h, lpmm, m, alpha) - G.diffraction_angle_deg(wl - h, lpmm, m, alpha)) / (2 * h)
    assert G.angular_dispersion_deg_per_nm(wl, lpmm, m, alpha) == pytest.approx(num, rel=1e-6)


@given(wavelengths, densities, nonzero_orders, incidences, st.floats(10.0, 2000.0))
def test_linear_and_reciprocal_dispersion_follow_focal_length(wl, lpmm, m, alpha, f):
    s = _sin_beta(wl, lpmm, m, alpha)
    assume(abs(s) < 0.999)
    ang = G.angular_dispersion_deg_per_nm(wl, lpmm, m, alpha)
    lin = G.linear_dispersion_mm_per_nm(wl, lpmm, f, m, alpha)
    rec = G.reciprocal_linear_dispersion_nm_per_mm(wl, lpmm, f, m, alpha)
    assert lin == pytest.approx(f * math.radians(ang), rel=1e-12)
    # Reciprocal linear dispersion d·cos β/(m·f) (magnitude).
    d = 1e6 / lpmm
    assert rec == pytest.approx(d * math.sqrt(1 - s * s) / (abs(m) * f), rel=1e-9)
    assert rec * abs(lin) == pytest.approx(1.0, rel=1e-12)
    assert G.linear_dispersion_mm_per_nm(wl, lpmm, 2 * f, m, alpha) == pytest.approx(2 * lin, rel=1e-12)


# ---------------------------------------------------------------------- N-slit pattern
# Closed form (Born & Wolf, Principles of Optics, sec. 8.6.1):
#   I = sinc²(a·u/λ)·[sin(Nφ)/sin φ]², φ = π d u/λ, u = sin α + sin β.
# Checked below against a direct sum of N phasors, and its stated properties.
def _phasor_sum(beta_deg, wl, lpmm, n, a, alpha):
    d = 1e6 / lpmm
    u = math.sin(math.radians(alpha)) + np.sin(np.radians(beta_deg))
    k = np.arange(n)
    field = np.exp(2j * np.pi * d * np.multiply.outer(u, k) / wl).sum(axis=-1)
    return np.sinc(a * u / wl) ** 2 * np.abs(field) ** 2


@given(st.floats(400.0, 800.0), st.floats(100.0, 1200.0), st.integers(1, 40), st.floats(-40.0, 40.0),
       st.floats(0.05, 1.0))
def test_n_slit_matches_phasor_sum(wl, lpmm, n, alpha, frac):
    d = 1e6 / lpmm
    beta = np.linspace(-89.0, 89.0, 997)
    got = G.n_slit_intensity(beta, wl, lpmm, n, slit_width_nm=frac * d, incidence_deg=alpha)
    want = _phasor_sum(beta, wl, lpmm, n, frac * d, alpha)
    np.testing.assert_allclose(got, want, rtol=1e-7, atol=1e-9 * n * n)


@given(st.floats(400.0, 800.0), st.floats(100.0, 1200.0), st.integers(2, 60), st.floats(-40.0, 40.0))
def test_principal_maxima_reach_n_squared_times_envelope(wl, lpmm, n, alpha):
    d = 1e6 / lpmm
    a = 0.3 * d
    for m in G.propagating_orders(wl, lpmm, alpha):
        beta = G.diffraction_angle_deg(wl, lpmm, m, alpha)
        env = np.sinc(a * m / d) ** 2                     # u = m·λ/d at the order
        got = G.n_slit_intensity(beta, wl, lpmm, n, slit_width_nm=a, incidence_deg=alpha)
        assert float(got) == pytest.approx(n * n * env, rel=1e-8)


@given(st.floats(400.0, 800.0), st.floats(100.0, 1200.0), st.integers(2, 60), st.floats(-30.0, 30.0),
       st.integers(-1, 1))
def test_first_zero_beside_a_principal_maximum(wl, lpmm, n, alpha, m):
    d = 1e6 / lpmm
    s_m = _sin_beta(wl, lpmm, m, alpha)
    s_z = s_m + wl / (n * d)                             # N·d·Δ(sin β) = λ
    assume(abs(s_m) < 0.98 and abs(s_z) < 0.98)
    b_m = G.diffraction_angle_deg(wl, lpmm, m, alpha)
    b_z = math.degrees(math.asin(s_z))
    peak = float(G.n_slit_intensity(b_m, wl, lpmm, n, incidence_deg=alpha))
    assert float(G.n_slit_intensity(b_z, wl, lpmm, n, incidence_deg=alpha)) < 1e-12 * peak
    inside = np.degrees(np.arcsin(np.linspace(s_m, s_z, 202)[1:-1]))
    between = G.n_slit_intensity(inside, wl, lpmm, n, incidence_deg=alpha)
    assert np.all(between > 1e-9 * peak)                  # no zero closer to the maximum


def _count_local_maxima(y, floor=1e-9):
    """Local maxima above ``floor`` (rounding noise near the zeros, ~1e-32, is not a maximum)."""
    return int(np.sum((y[1:-1] > y[:-2]) & (y[1:-1] >= y[2:]) & (y[1:-1] > floor)))


@given(st.floats(400.0, 800.0), st.floats(100.0, 1200.0), st.integers(2, 25), st.floats(-30.0, 30.0))
def test_n_minus_2_secondary_maxima_between_principal_maxima(wl, lpmm, n, alpha):
    # Between the first zeros beside orders 0 and 1 (sin β moved by λ/(N d) from each), sampled finely;
    # the principal peaks themselves (shifted a little by the sloping envelope) are left outside.
    s1 = _sin_beta(wl, lpmm, 1, alpha)
    assume(abs(s1) < 0.99)
    s0 = -math.sin(math.radians(alpha))
    step = wl / (n * 1e6 / lpmm)
    grid = np.degrees(np.arcsin(np.linspace(s0 + step, s1 - step, 20001)))
    y = G.n_slit_intensity(grid, wl, lpmm, n, incidence_deg=alpha)
    assert _count_local_maxima(y) == n - 2


@pytest.mark.parametrize("ratio, missing", [(2, {2, 4}), (3, {3})])
def test_missing_orders_on_envelope_zeros(ratio, missing):
    # Slit width a = d/ratio: the envelope sinc²(a·m/d) vanishes at orders m = ratio·k (k ≠ 0).
    wl, lpmm, n = 500.0, 200.0, 12                        # d = 5000 nm: orders up to ±10
    d = 1e6 / lpmm
    for m in range(-5, 6):
        beta = G.diffraction_angle_deg(wl, lpmm, m)
        got = float(G.n_slit_intensity(beta, wl, lpmm, n, slit_width_nm=d / ratio))
        if abs(m) in missing:
            assert got < 1e-20 * n * n
        else:
            assert got == pytest.approx(n * n * np.sinc(m / ratio) ** 2, rel=1e-8)
            assert got > 1e-3 * n * n


def test_default_slit_width_is_half_the_period():
    beta = np.linspace(-80, 80, 301)
    d = 1e6 / 600
    np.testing.assert_allclose(G.n_slit_intensity(beta, 550.0, 600.0, 7),
                               G.n_slit_intensity(beta, 550.0, 600.0, 7, slit_width_nm=d / 2))


# ---------------------------------------------------------------------- groove efficiency
def test_blazed_efficiency_peaks_on_the_facet_specular_direction():
    # Scalar Kirchhoff result (Loewen & Popov ch. 4): the blaze peak lies where α + β = 2θ_B, at any
    # deviation. 600 lines/mm, θ_B = 40°, α = 0: order 1 leaves at β = 80° for λ = d·sin 80° (by hand).
    lam = G.groove_spacing_nm(600.0) * math.sin(math.radians(80.0))
    assert float(G.groove_efficiency(lam, 600.0, 1, "blazed", blaze_angle_deg=40.0)) == pytest.approx(1.0, abs=1e-9)
    assert float(G.groove_efficiency(lam, 600.0, 1, "blazed", blaze_angle_deg=40.0, incidence_deg=20.0)) < 0.9
    # An order that does not propagate carries nothing.
    assert float(G.groove_efficiency(2 * lam, 600.0, 1, "blazed", blaze_angle_deg=40.0)) == 0.0


def test_lamellar_efficiency_values():
    # sinc²(m·f), sinc(x) = sin(πx)/(πx): m = 0 → 1; f = 0.5: m = ±1 → 4/π² = 0.405285 (by hand),
    # even orders → 0; f = 1/3: every third order → 0.
    assert float(G.groove_efficiency(500.0, 600.0, 0)) == pytest.approx(1.0)
    assert float(G.groove_efficiency(500.0, 600.0, 0, duty_cycle=0.2)) == pytest.approx(1.0)
    for m in (1, -1):
        assert float(G.groove_efficiency(500.0, 600.0, m)) == pytest.approx(4 / math.pi ** 2, rel=1e-12)
    for m in (2, -2, 4):
        assert float(G.groove_efficiency(500.0, 600.0, m)) < 1e-20
    assert float(G.groove_efficiency(500.0, 600.0, 3, duty_cycle=1 / 3)) < 1e-20


@given(st.floats(1.0, 60.0), densities)
def test_blazed_efficiency_is_one_at_the_blaze_wavelength(tb, lpmm):
    lb = G.blaze_wavelength_nm(tb, lpmm, 1)                 # the Littrow blaze: α = β = θ_B
    lit = dict(blaze_angle_deg=tb, incidence_deg=tb)
    assert float(G.groove_efficiency(lb, lpmm, 1, "blazed", **lit)) == pytest.approx(1.0, rel=1e-12)
    # Order 2 is blazed at λ_B/2: sinc²(2 − 2) = 1 (by hand from sinc²(m − λ_B/λ)).
    assert float(G.groove_efficiency(lb / 2, lpmm, 2, "blazed", **lit)) == pytest.approx(1.0, rel=1e-12)
    # Away from it the efficiency drops.
    assert float(G.groove_efficiency(1.3 * lb, lpmm, 1, "blazed", **lit)) < 1.0


# ---------------------------------------------------------------------- grating colour
CMFS = {"2": "CIE 1931 2 Degree Standard Observer", "10": "CIE 1964 10 Degree Standard Observer"}


def _locus_xy(wl, observer):
    """Spectral-locus chromaticity from colour-science's CIE colour-matching functions."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        xyz = colour.wavelength_to_XYZ(wl, colour.MSDS_CMFS[CMFS[observer]])
    return np.asarray(xyz)[:2] / np.sum(xyz)


def _visible_orders(view, lpmm, alpha):
    d = 1e6 / lpmm
    u = math.sin(math.radians(alpha)) + math.sin(math.radians(view))
    m_max = int(2 * d / 380) + 2
    return [(m, d * u / m) for m in range(-m_max, m_max + 1)
            if m != 0 and 380.0 <= d * u / m <= 780.0]


@pytest.mark.parametrize("lpmm, wl, alpha", [(600.0, 550.0, 0.0), (300.0, 450.0, 0.0), (1200.0, 600.0, 20.0),
                                             (1800.0, 470.0, 10.0), (1200.0, 650.0, 0.0)])
@pytest.mark.parametrize("illuminant, observer", [("D65", "2"), ("A", "2"), ("D65", "10")])
def test_single_order_colour_is_the_spectral_colour(lpmm, wl, alpha, illuminant, observer):
    # View where order 1 sends λ: sin β = λ/d − sin α; no other order sends visible light there.
    view = math.degrees(math.asin(wl / (1e6 / lpmm) - math.sin(math.radians(alpha))))
    vis = _visible_orders(view, lpmm, alpha)
    assert [m for m, _ in vis] == [1]
    c = G.grating_color(view, lpmm, alpha, illuminant, observer)
    xyz = np.asarray(c["xyz"]).reshape(-1, 3)[0]
    assert not np.asarray(c["dark"]).ravel()[0]
    np.testing.assert_allclose(xyz[:2] / xyz.sum(), _locus_xy(wl, observer), atol=1e-3)
    assert [m for m, _ in c["orders"]] == [1]
    assert c["orders"][0][1] == pytest.approx(wl, abs=1e-6)


@given(st.integers(400, 700), st.sampled_from([150.0, 300.0, 600.0, 1200.0]), st.floats(-30.0, 30.0))
def test_single_visible_order_colour_hypothesis(wl, lpmm, alpha):
    s = wl / (1e6 / lpmm) - math.sin(math.radians(alpha))
    assume(abs(s) < 0.99)
    view = math.degrees(math.asin(s))
    assume([m for m, _ in _visible_orders(view, lpmm, alpha)] == [1])
    xyz = np.asarray(G.grating_color(view, lpmm, alpha)["xyz"]).reshape(-1, 3)[0]
    np.testing.assert_allclose(xyz[:2] / xyz.sum(), _locus_xy(float(wl), "2"), atol=1e-3)


def test_no_visible_order_is_dark():
    # 3600 lines/mm: d = 277.8 nm, so λ = d·|u|/|m| <= 2d = 556 nm needs |u| large; at normal incidence
    # λ = d sin β / m <= 277.8 nm < 380 nm — no visible order anywhere.
    views = np.linspace(-85, 85, 35)
    c = G.grating_color(views, 3600.0)
    assert np.all(c["dark"])
    np.testing.assert_array_equal(c["rgb"], 0.0)
    np.testing.assert_allclose(c["lab"][..., 0], 0.0, atol=1e-9)
    # The zero-order direction (β = −α) gets no dispersed light either.
    c0 = G.grating_color(-20.0, 600.0, 20.0)
    assert np.all(c0["dark"]) and np.all(np.asarray(c0["rgb"]) == 0.0)


def test_direction_reached_only_by_a_missing_order_is_dark():
    # 600 lines/mm (d = 1666.7 nm), normal incidence, view 30° (sin β = 0.5): order 1 sends 833 nm
    # (invisible), order 2 sends 416.7 nm and order 3 277.8 nm (by hand). A lamellar grating of duty
    # cycle 0.5 has no order 2 (sinc²(1) = 0), so no visible light reaches this direction.
    assert [m for m, _ in _visible_orders(30.0, 600.0, 0.0)] == [2]
    c = G.grating_color(30.0, 600.0)
    assert np.all(c["dark"])
    np.testing.assert_array_equal(c["rgb"], 0.0)


VIEWS = np.linspace(-70.0, 70.0, 29)


def test_normalize_per_direction_brightest_channel_is_one():
    c = G.grating_color(VIEWS, 600.0, normalize="per_direction")
    lit = ~np.asarray(c["dark"])
    assert lit.sum() > 10
    np.testing.assert_allclose(np.max(c["rgb"][lit], axis=-1), 1.0, atol=1e-9)
    np.testing.assert_array_equal(c["rgb"][~lit], 0.0)


def test_normalize_common_keeps_relative_brightness():
    c = G.grating_color(VIEWS, 600.0, normalize="common")
    y = c["xyz"][..., 1]
    assert np.ndim(c["scale"]) == 0
    # one scale: the largest that keeps every direction inside the display, so the most intense
    # direction has a channel at full scale and none is clipped
    assert np.max(c["rgb"]) == pytest.approx(1.0, abs=1e-9)
    assert c["lab"][..., 0].max() <= 100.0 + 1e-9
    order = np.argsort(y)
    assert np.all(np.diff(c["lab"][order, 0]) >= -1e-9)          # L* follows Y
    np.testing.assert_allclose(c["lab"], xyz_to_lab(c["xyz"] * c["scale"]), atol=1e-9)


def test_normalize_number_is_display_white():
    c = G.grating_color(VIEWS, 600.0, normalize=2.5)
    assert float(c["scale"]) == pytest.approx(1 / 2.5)
    np.testing.assert_allclose(c["lab"], xyz_to_lab(c["xyz"] / 2.5), atol=1e-9)


@pytest.mark.parametrize("bad", ["brightest", -1.0, 0.0])
def test_normalize_bad_values(bad):
    with pytest.raises(InputError, match="normalize"):
        G.grating_color(VIEWS, 600.0, normalize=bad)


def test_colour_map_shapes_and_rows():
    dens = [300.0, 600.0, 1200.0]
    views = np.linspace(-60, 60, 7)
    cm = G.grating_color_map(views, dens)
    assert cm["rgb"].shape == (3, 7, 3) and cm["lab"].shape == (3, 7, 3)
    assert cm["dark"].shape == (3, 7) and cm["out_of_gamut"].shape == (3, 7)
    np.testing.assert_array_equal(cm["lines_per_mm"], dens)
    np.testing.assert_array_equal(cm["view_deg"], views)
    for i, g in enumerate(dens):                         # per-direction scaling: rows equal single calls
        np.testing.assert_allclose(cm["rgb"][i], G.grating_color(views, g)["rgb"], atol=1e-12)
    common = G.grating_color_map(views, dens, normalize="common")
    assert common["rgb"].max() == pytest.approx(1.0, abs=1e-9) and common["lab"][..., 0].max() <= 100.0 + 1e-9


# ---------------------------------------------------------------------- display colours (gamut mapping)
def _cs_linear_srgb(xyz):
    """Linear sRGB of D65-relative XYZ by colour-science (independent of the module)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(colour.XYZ_to_RGB(xyz, "sRGB", apply_cctf_encoding=False), dtype=float)


def _cs_decode(rgb):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(colour.models.eotf_sRGB(rgb), dtype=float)


def _xy(xyz):
    xyz = np.asarray(xyz, dtype=float)
    return xyz[..., :2] / xyz.sum(axis=-1, keepdims=True)


def test_display_srgb_of_in_gamut_colours_is_the_standard_encoding():
    xyz = np.array([[0.2, 0.3, 0.25], [0.9505, 1.0, 1.089], [0.05, 0.04, 0.06]])      # inside sRGB
    rgb, oog = G.display_srgb(xyz)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = np.asarray(colour.XYZ_to_sRGB(xyz), dtype=float)                      # IEC 61966-2-1 via colour-science
    np.testing.assert_allclose(rgb, ref, atol=2e-3)
    assert not oog.any()


@pytest.mark.parametrize("wl", [400.0, 420.0, 480.0, 500.0, 520.0, 600.0, 700.0])
def test_spectral_colours_are_desaturated_toward_white_at_constant_luminance(wl):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        xyz = np.asarray(colour.wavelength_to_XYZ(wl, colour.MSDS_CMFS[CMFS["2"]]))    # CIE 1931 via colour-science
    xyz = 0.2 * xyz / xyz[1]                                   # dim enough to need no scaling down
    rgb, oog = G.display_srgb(xyz)
    assert oog
    lin = _cs_decode(rgb)
    assert lin.min() == pytest.approx(0.0, abs=1e-9)          # the least desaturation that fits
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        shown = np.asarray(colour.RGB_to_XYZ(lin, "sRGB", apply_cctf_decoding=False), dtype=float)
    if lin.max() < 1.0 - 1e-9:                                # not scaled down: luminance kept
        assert shown[1] == pytest.approx(0.2, rel=1e-3)
    # the chromaticity lies on the straight line from the D65 white point to the spectral colour
    white = np.array([0.3127, 0.3290])                        # IEC 61966-2-1 D65 white point
    a, b = _xy(xyz) - white, _xy(shown) - white
    assert abs(a[0] * b[1] - a[1] * b[0]) < 2e-4 * np.linalg.norm(a) and a @ b > 0


def test_over_bright_violet_is_scaled_down_not_clipped_to_magenta():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        xyz = np.asarray(colour.wavelength_to_XYZ(415.0, colour.MSDS_CMFS[CMFS["2"]]))
    dim, _ = G.display_srgb(xyz / xyz[1] * 0.001)
    bright, _ = G.display_srgb(xyz / xyz[1])                 # Y = 1: far beyond any displayable violet
    r, g, b = bright
    assert b == pytest.approx(1.0) and g == pytest.approx(0.0, abs=1e-9) and r < 0.6
    lin_dim, lin_bright = _cs_decode(dim), _cs_decode(bright)
    np.testing.assert_allclose(lin_dim / lin_dim.max(), lin_bright, atol=1e-6)        # same chromaticity


def test_spectral_line_colours():
    rgb = G.spectral_line_srgb(np.array([405.0, 430.0, 550.0, 620.0, 300.0]))
    assert rgb.shape == (5, 3)
    for r, g, b in rgb[:2]:                                   # violet: dim (the blue primary), not magenta
        assert b == pytest.approx(1.0) and g == pytest.approx(0.0, abs=1e-9) and r < 0.6
    assert np.argmax(rgb[2]) == 1 and np.argmax(rgb[3]) == 0
    np.testing.assert_array_equal(rgb[4], 0.0)                # outside the CIE tables: black
    assert np.max(rgb[:4], axis=-1) == pytest.approx(1.0)


def test_violet_only_strip_is_dim_violet():
    # 3600 lines/mm at 35° incidence: order 1 reaches at most d(sin α + 1) = 437 nm (by hand), so only
    # 380-437 nm is seen; with relative brightness the strip is violet, darker toward 400 nm.
    views = np.linspace(-80.0, 80.0, 321)
    c = G.grating_color(views, 3600.0, 35.0, normalize="common", kind="blazed", blaze_angle_deg=17.5)
    lit = ~c["dark"]
    r, g, b = c["rgb"][lit].T
    assert np.all(g <= 1e-9) and np.all(r <= 0.6 * b + 1e-9)
    assert b.max() == pytest.approx(1.0) and b.min() < 0.2


# ---------------------------------------------------------------------- spectrometer planning
def _check_design(des, band, f, L, pitch_um, dev):
    lo, hi = band
    g, m, alpha = des.lines_per_mm, des.order, des.incidence_deg
    b_lo = G.diffraction_angle_deg(lo, g, m, alpha)
    b_hi = G.diffraction_angle_deg(hi, g, m, alpha)
    assert np.isfinite(b_lo) and np.isfinite(b_hi)
    assert des.beta_range_deg == pytest.approx((b_lo, b_hi))
    # Fits the detector.
    spread = f * math.radians(abs(b_hi - b_lo))
    assert des.spread_mm == pytest.approx(spread, rel=1e-9)
    assert des.spread_mm <= L * (1 + 1e-12)
    assert des.fill_fraction == pytest.approx(des.spread_mm / L)
    # Inside one free spectral range: order m+1 at the short end lands at or beyond the long end.
    assert hi - lo <= G.free_spectral_range_nm(lo, m) * (1 + 1e-12)
    assert des.free_spectral_range_nm == pytest.approx(G.free_spectral_range_nm(lo, m))
    b_next = G.diffraction_angle_deg(lo, g, m + 1, alpha)
    assert np.isnan(b_next) or b_next >= b_hi - 1e-9
    # nm per pixel = reciprocal linear dispersion (at the band centre) × pixel pitch.
    centre = 0.5 * (lo + hi)
    rld = G.reciprocal_linear_dispersion_nm_per_mm(centre, g, f, m, alpha)
    assert des.nm_per_pixel == pytest.approx(rld * pitch_um / 1000, rel=1e-12)
    assert des.resolution_nm == pytest.approx(des.nm_per_pixel * G.PIXELS_PER_RESOLUTION_ELEMENT)
    # The mount: the centre wavelength leaves at the stated deviation from the incident beam.
    assert alpha - G.diffraction_angle_deg(centre, g, m, alpha) == pytest.approx(dev, abs=1e-7)


def test_plan_spectrometer_example():
    band, f, L, pitch, dev = (400.0, 700.0), 100.0, 25.0, 10.0, 30.0
    designs = G.plan_spectrometer(band, f, L, pitch, deviation_deg=dev)
    assert designs
    for des in designs:
        _check_design(des, band, f, L, pitch, dev)
    res = [des.resolution_nm for des in designs]
    assert res == sorted(res)


@given(st.floats(300.0, 900.0), st.floats(1.02, 1.95), st.floats(50.0, 500.0), st.floats(5.0, 50.0),
       st.floats(3.0, 30.0), st.floats(0.0, 60.0))
def test_plan_spectrometer_designs_fit(lo, ratio, f, L, pitch, dev):
    band = (lo, lo * ratio)
    for des in G.plan_spectrometer(band, f, L, pitch, deviation_deg=dev):
        _check_design(des, band, f, L, pitch, dev)
        assert des.fill_fraction >= 0.3 - 1e-12


@pytest.mark.parametrize("band", [(400.0, 850.0), (300.0, 1000.0)])
def test_plan_spectrometer_no_first_order_design_beyond_an_octave(band):
    designs = G.plan_spectrometer(band, 100.0, 1000.0, 10.0, min_fill=0.0)
    assert not [des for des in designs if des.order == 1]


# ---------------------------------------------------------------------- bad input
DENSITY_CALLS = {
    "groove_spacing_nm": lambda g: G.groove_spacing_nm(g),
    "diffraction_angle_deg": lambda g: G.diffraction_angle_deg(500.0, g),
    "order_status": lambda g: G.order_status(500.0, g),
    "propagating_orders": lambda g: G.propagating_orders(500.0, g),
    "order_band_nm": lambda g: G.order_band_nm(g, 1),
    "angular_dispersion": lambda g: G.angular_dispersion_deg_per_nm(500.0, g),
    "linear_dispersion": lambda g: G.linear_dispersion_mm_per_nm(500.0, g, 100.0),
    "reciprocal_dispersion": lambda g: G.reciprocal_linear_dispersion_nm_per_mm(500.0, g, 100.0),
    "resolving_power": lambda g: G.resolving_power(g, 10.0),
    "resolvable_difference": lambda g: G.resolvable_difference_nm(500.0, g, 10.0),
    "order_overlaps": lambda g: G.order_overlaps((400.0, 700.0), g),
    "littrow_angle_deg": lambda g: G.littrow_angle_deg(500.0, g),
    "blaze_wavelength_nm": lambda g: G.blaze_wavelength_nm(17.0, g),
    "blaze_at_deviation": lambda g: G.blaze_wavelength_at_deviation_nm(17.0, g, 1, 20.0),
    "rayleigh_wavelength_nm": lambda g: G.rayleigh_wavelength_nm(g),
    "n_slit_intensity": lambda g: G.n_slit_intensity(10.0, 500.0, g, 5),
    "groove_efficiency_lamellar": lambda g: G.groove_efficiency(500.0, g, 1),
    "groove_efficiency_blazed": lambda g: G.groove_efficiency(500.0, g, 1, "blazed", blaze_angle_deg=17.0),
    "grating_spectrum": lambda g: G.grating_spectrum(10.0, g),
    "grating_color": lambda g: G.grating_color(10.0, g),
    "grating_color_map": lambda g: G.grating_color_map([10.0], [g]),
    "plan_spectrometer": lambda g: G.plan_spectrometer((400.0, 700.0), 100.0, 25.0, 10.0, densities=(g,)),
}


@pytest.mark.parametrize("name", sorted(DENSITY_CALLS))
@pytest.mark.parametrize("density", [0.0, -600.0])
def test_bad_groove_density(name, density):
    with pytest.raises(InputError, match="lines_per_mm|groove density"):
        DENSITY_CALLS[name](density)


@pytest.mark.parametrize("call, name", [
    (lambda w: G.resolving_power(600.0, w), "illuminated_width_mm"),
    (lambda w: G.resolvable_difference_nm(500.0, 600.0, w), "illuminated_width_mm"),
    (lambda w: G.n_slit_intensity(10.0, 500.0, 600.0, 5, slit_width_nm=w), "slit_width_nm"),
    (lambda w: G.linear_dispersion_mm_per_nm(500.0, 600.0, w), "focal_length_mm"),
    (lambda w: G.plan_spectrometer((400.0, 700.0), 100.0, w, 10.0), "detector_length_mm"),
    (lambda w: G.plan_spectrometer((400.0, 700.0), 100.0, 25.0, w), "pixel_pitch_um"),
])
@pytest.mark.parametrize("width", [0.0, -1.0])
def test_bad_width(call, name, width):
    with pytest.raises(InputError, match=name):
        call(width)


INCIDENCE_CALLS = {
    "diffraction_angle_deg": lambda a: G.diffraction_angle_deg(500.0, 600.0, 1, a),
    "order_status": lambda a: G.order_status(500.0, 600.0, 1, a),
    "propagating_orders": lambda a: G.propagating_orders(500.0, 600.0, a),
    "order_band_nm": lambda a: G.order_band_nm(600.0, 1, a),
    "angular_dispersion": lambda a: G.angular_dispersion_deg_per_nm(500.0, 600.0, 1, a),
    "order_overlaps": lambda a: G.order_overlaps((400.0, 700.0), 600.0, 1, a),
    "rayleigh_wavelength_nm": lambda a: G.rayleigh_wavelength_nm(600.0, 1, a),
    "n_slit_intensity": lambda a: G.n_slit_intensity(10.0, 500.0, 600.0, 5, incidence_deg=a),
    "grating_color": lambda a: G.grating_color(10.0, 600.0, a),
}


@pytest.mark.parametrize("name", sorted(INCIDENCE_CALLS))
@pytest.mark.parametrize("alpha", [90.0, -90.0, 120.0])
def test_grazing_or_beyond_incidence(name, alpha):
    with pytest.raises(InputError, match="incidence_deg.*90"):
        INCIDENCE_CALLS[name](alpha)


ORDER_CALLS = {
    "angular_dispersion": lambda m: G.angular_dispersion_deg_per_nm(500.0, 600.0, m),
    "linear_dispersion": lambda m: G.linear_dispersion_mm_per_nm(500.0, 600.0, 100.0, m),
    "reciprocal_dispersion": lambda m: G.reciprocal_linear_dispersion_nm_per_mm(500.0, 600.0, 100.0, m),
    "resolving_power": lambda m: G.resolving_power(600.0, 10.0, m),
    "resolvable_difference": lambda m: G.resolvable_difference_nm(500.0, 600.0, 10.0, m),
    "free_spectral_range_nm": lambda m: G.free_spectral_range_nm(500.0, m),
    "free_spectral_range_exact_nm": lambda m: G.free_spectral_range_exact_nm(500.0, m),
    "blaze_wavelength_nm": lambda m: G.blaze_wavelength_nm(17.0, 600.0, m),
    "blaze_at_deviation": lambda m: G.blaze_wavelength_at_deviation_nm(17.0, 600.0, m, 20.0),
    "rayleigh_wavelength_nm": lambda m: G.rayleigh_wavelength_nm(600.0, m),
    "order_overlaps": lambda m: G.order_overlaps((400.0, 700.0), 600.0, m),
    "order_sorting_filter_nm": lambda m: G.order_sorting_filter_nm((400.0, 700.0), m),
    "plan_spectrometer": lambda m: G.plan_spectrometer((400.0, 700.0), 100.0, 25.0, 10.0, orders=(m,)),
}


@pytest.mark.parametrize("name", sorted(ORDER_CALLS))
def test_zero_order_where_dispersion_is_needed(name):
    with pytest.raises(InputError, match="order ≠ 0|zero order"):
        ORDER_CALLS[name](0)


NONINTEGER_CALLS = dict(ORDER_CALLS, **{
    "diffraction_angle_deg": lambda m: G.diffraction_angle_deg(500.0, 600.0, m),
    "order_status": lambda m: G.order_status(500.0, 600.0, m),
    "littrow_angle_deg": lambda m: G.littrow_angle_deg(500.0, 600.0, m),
    "groove_efficiency": lambda m: G.groove_efficiency(500.0, 600.0, m),
})


@pytest.mark.parametrize("name", sorted(NONINTEGER_CALLS))
@pytest.mark.parametrize("order", [1.5, -0.5, float("nan"), None, "one"])
def test_non_integer_order(name, order):
    with pytest.raises(InputError, match="whole number"):
        NONINTEGER_CALLS[name](order)


def test_integer_valued_float_order_is_accepted():
    assert G.diffraction_angle_deg(500.0, 1200.0, 1.0) == pytest.approx(G.diffraction_angle_deg(500.0, 1200.0, 1))


def test_band_with_no_propagating_order():
    # 3600 lines/mm: d = 277.8 nm, so at normal incidence order 1 needs λ <= 277.8 nm.
    with pytest.raises(InputError, match="does not propagate"):
        G.order_overlaps((400.0, 700.0), 3600.0, 1)
    with pytest.raises(InputError, match="does not propagate"):
        G.order_overlaps((400.0, 700.0), 1200.0, 3)          # d = 833 nm: 3·400/833 > 1


@pytest.mark.parametrize("band", [(700.0, 400.0), (500.0, 500.0), (0.0, 500.0), (400.0,)])
def test_bad_band(band):
    with pytest.raises(InputError, match="band_nm"):
        G.order_overlaps(band, 600.0)
    with pytest.raises(InputError, match="band_nm"):
        G.order_sorting_filter_nm(band)
    with pytest.raises(InputError, match="band_nm"):
        G.plan_spectrometer(band, 100.0, 25.0, 10.0)


# ---------------------------------------------------------------------- no silent NaN
@given(wavelengths, densities, incidences, st.floats(1.0, 100.0), st.floats(10.0, 1000.0))
def test_no_nan_for_propagating_orders(wl, lpmm, alpha, width, f):
    for m in G.propagating_orders(wl, lpmm, alpha)[:: max(1, len(G.propagating_orders(wl, lpmm, alpha)) // 7)]:
        beta = G.diffraction_angle_deg(wl, lpmm, m, alpha)
        assert np.isfinite(beta)
        assert "propagates" in G.order_status(wl, lpmm, m, alpha)
        assert np.isfinite(G.n_slit_intensity(beta, wl, lpmm, 9, incidence_deg=alpha))
        assert np.isfinite(G.groove_efficiency(wl, lpmm, m))
        assert np.isfinite(G.littrow_angle_deg(wl, lpmm, m))            # |m|λ <= d(1 + |sin α|) < 2d
        if m == 0:
            continue
        for value in (G.angular_dispersion_deg_per_nm(wl, lpmm, m, alpha),
                      G.linear_dispersion_mm_per_nm(wl, lpmm, f, m, alpha),
                      G.reciprocal_linear_dispersion_nm_per_mm(wl, lpmm, f, m, alpha),
                      G.resolving_power(lpmm, width, m), G.resolvable_difference_nm(wl, lpmm, width, m),
                      G.free_spectral_range_nm(wl, m), G.free_spectral_range_exact_nm(wl, m),
                      G.rayleigh_wavelength_nm(lpmm, m, alpha),
                      G.groove_efficiency(wl, lpmm, m, "blazed", blaze_angle_deg=20.0)):
            assert np.all(np.isfinite(value))


def test_no_filter_note_quotes_the_longest_higher_order_wavelength():
    # band 400-800 nm in order 1: order 2 brings 200-400 nm onto it; a source from 500 nm emits none of it
    r = G.order_sorting_filter_nm((400.0, 800.0), 1, source_band_nm=(500.0, 600.0))
    assert r["edges_nm"] == [] and "shorter than 400 nm" in r["note"]


def test_plan_report_accounts_for_every_density_and_order_tried():
    """Every (density, order) tried is either a design or a rejection with its reason; a band wider than one
    free spectral range is kept only with a source to sort orders for (Palmer & Loewen, Diffraction
    Grating Handbook, sec. 2.7)."""
    dens, ords = (150, 300, 600, 1200, 2400), (1, 2, 3)
    for band, source in (((400.0, 700.0), None), ((400.0, 1000.0), None), ((400.0, 1000.0), (200.0, 1100.0))):
        designs, rejected = G.plan_spectrometer_report(band, 75.0, 28.7, 14.0, densities=dens, orders=ords,
                                                       source_band_nm=source)
        tried = {(d.lines_per_mm, d.order) for d in designs} | {(r.lines_per_mm, r.order) for r in rejected}
        assert tried == {(float(g), m) for g in dens for m in ords} and len(designs) + len(rejected) == 15
        assert designs == G.plan_spectrometer(band, 75.0, 28.7, 14.0, densities=dens, orders=ords,
                                               source_band_nm=source)
        for d in designs:
            wide = band[1] > band[0] * (d.order + 1) / d.order
            assert bool(d.filter_edges_nm) == wide
            if wide:
                assert d.filter_edges_nm == tuple(G.order_sorting_filter_nm(band, d.order, source)["edges_nm"])
    assert not G.plan_spectrometer((400.0, 1000.0), 75.0, 28.7, 14.0)
