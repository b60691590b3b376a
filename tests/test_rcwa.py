"""Rigorous grating efficiency (physics.grating.rigorous_efficiency, physics.rcwa): outside checks."""

import math

import numpy as np
import pytest
import tmm

from physics import InputError, material
from physics import grating as G
from physics import rcwa
from tests.support.rcwa_te import te_efficiencies

#: Energy balance of a lossless grating: rounding only (each order's efficiency is a |amplitude|²).
ENERGY_TOL = 1e-9
#: Agreement with the independent TE solver at the same harmonic count: rounding of two different
#: linear-algebra paths.
ORACLE_TOL = 1e-6


# ---------------------------------------------------------------------- an independent solver
@pytest.mark.parametrize("wl, alpha, duty, depth", [(550.0, 0.0, 0.5, 150.0), (633.0, 25.0, 0.3, 300.0),
                                                    (450.0, -10.0, 0.6, 80.0)])
def test_te_lamellar_agrees_with_an_independent_solver(wl, alpha, duty, depth):
    # tests/support/rcwa_te.py: Moharam & Gaylord, JOSA 71, 811 (1981) with the enhanced transmittance
    # matrix of Moharam et al., JOSA A 12, 1068 (1995), written separately from the meent solver.
    d, n = G.groove_spacing_nm(1200.0), 12
    th, iv = rcwa.profile_slices("lamellar", depth, duty, None, d, wl)
    R, T = rcwa.solve_orders([wl], d, alpha, th, iv, [1.5], n, pols=(0,))
    r, t = te_efficiencies(wl, d, alpha, [(depth, *iv[0])], 1.5, 1.5, n)
    np.testing.assert_allclose(R[0, 0], r, atol=ORACLE_TOL)
    np.testing.assert_allclose(T[0, 0], t, atol=ORACLE_TOL)
    assert R[0, 0, n + 1] > 1e-3                                      # a real first order, not two zeros


def test_te_staircase_agrees_with_an_independent_solver():
    # Many slices (a sinusoidal profile cut into a staircase) exercise the layer-to-layer matrices.
    d, n, wl = G.groove_spacing_nm(900.0), 10, 600.0
    th, iv = rcwa.profile_slices("sinusoidal", 250.0, 0.5, None, d, wl)
    R, T = rcwa.solve_orders([wl], d, 15.0, th, iv, [1.46], n, pols=(0,))
    r, t = te_efficiencies(wl, d, 15.0, [(h, *x) for h, x in zip(th, iv)], 1.46, 1.46, n)
    np.testing.assert_allclose(R[0, 0], r, atol=ORACLE_TOL)
    np.testing.assert_allclose(T[0, 0], t, atol=ORACLE_TOL)


#: Agreement of the project's solver with meent at the same harmonic count: two implementations of the
#: same formulation (Li's inverse rule for TM included); measured 2e-11 for metals, 1e-14 for glass.
MEENT_TOL = 1e-8


@pytest.mark.parametrize("profile, mat, kw, kind", [
    ("lamellar", "Al", {"depth_nm": 100.0, "duty_cycle": 0.5}, "reflection"),
    ("sinusoidal", "Au", {"depth_nm": 150.0}, "reflection"),
    ("blazed", "Al", {"blaze_angle_deg": 8.6}, "reflection"),
    ("lamellar", "SiO2", {"depth_nm": 300.0, "duty_cycle": 0.4}, "transmission"),
])
def test_fourier_modal_solver_agrees_with_meent(profile, mat, kw, kind):
    # The meent package (MIT; Kim et al., github.com/kc-ml2/meent) as the second implementation:
    # every order, TE and TM, two wavelengths, 10° incidence; the blazed facet's orientation included.
    lines = 600.0 if profile == "blazed" else 1200.0
    d, wl, n = G.groove_spacing_nm(lines), np.array([450.0, 700.0]), 10
    depth = rcwa.check_profile(profile, kw.get("depth_nm"), kw.get("duty_cycle", 0.5), kw.get("blaze_angle_deg"), d)
    th, iv = rcwa.profile_slices(profile, depth, kw.get("duty_cycle", 0.5), kw.get("blaze_angle_deg"), d, wl.min())
    nk = material(mat).nk(wl)
    R, T = rcwa.solve_orders(wl, d, 10.0, th, iv, nk, n)
    Rm, Tm = rcwa.solve_orders(wl, d, 10.0, th, iv, nk, n, backend="meent")
    np.testing.assert_allclose(R, Rm, atol=MEENT_TOL)
    if kind == "transmission":                                        # meent's T of a metal is behind its backing
        np.testing.assert_allclose(T, Tm, atol=MEENT_TOL)
    assert R.max() > 0.01


def test_threads_split_the_wavelengths_without_changing_the_answer():
    d, wl = G.groove_spacing_nm(1200.0), np.linspace(420.0, 780.0, 40)
    th, iv = rcwa.profile_slices("lamellar", 100.0, 0.5, None, d, 420.0)
    nk = material("Al").nk(wl)
    one = rcwa.solve_orders(wl, d, 10.0, th, iv, nk, 8, threads=1)
    two = rcwa.solve_orders(wl, d, 10.0, th, iv, nk, 8, threads=2)
    np.testing.assert_array_equal(one[0], two[0])
    np.testing.assert_array_equal(one[1], two[1])


# ---------------------------------------------------------------------- energy
@pytest.mark.parametrize("profile, kw", [("lamellar", {"duty_cycle": 0.4}), ("sinusoidal", {}),
                                         ("blazed", {"blaze_angle_deg": 20.0})])
def test_lossless_grating_conserves_energy(profile, kw):
    # Σ reflected + Σ transmitted = 1 for a transparent grating (Poynting theorem), each polarization.
    r = G.rigorous_efficiency_detail([420.0, 560.0, 710.0], 1500.0, 1, 12.0, profile=profile, depth_nm=200.0,
                                     material="SiO2", kind="transmission", **kw)
    np.testing.assert_allclose(r.reflected_total + r.transmitted_total, 1.0, atol=ENERGY_TOL)
    np.testing.assert_allclose(r.absorbed, 0.0, atol=ENERGY_TOL)
    assert np.all(r.efficiency > 0) and np.all(r.efficiency < 1)


def test_flat_metal_reflects_as_the_fresnel_equations_say():
    # A uniform Al slice on Al: the reflectance, hence the absorption 1 − R, is tmm's (Byrnes' tmm
    # package, the stack oracle), for s and p at 40°.
    wl, d = 500.0, G.groove_spacing_nm(600.0)
    n = complex(material("Al").nk(wl))
    # What enters the metal is one decaying plane wave: the power crossing 80 nm further down is
    # (1 − R)·exp(−2 k0 h Im √(N² − sin²α)) (Born & Wolf sec. 14.2, the field in an absorbing medium).
    decay = math.exp(-2 * 2 * math.pi / wl * 80.0 * np.sqrt(n ** 2 - math.sin(math.radians(40.0)) ** 2).imag)
    R, T = rcwa.solve_orders([wl], d, 40.0, [80.0], [(0.0, 1.0)], [n], 6)
    Rm, Tm = rcwa.solve_orders([wl], d, 40.0, [80.0], [(0.0, 1.0)], [n], 6, backend="meent")
    for j, pol in enumerate("sp"):
        ref = tmm.coh_tmm(pol, [1.0, n], [np.inf, np.inf], math.radians(40.0), wl)["R"]
        assert R[0, j].sum() == pytest.approx(ref, abs=1e-9)
        assert Rm[0, j].sum() == pytest.approx(ref, abs=1e-9)
        assert T[0, j].sum() == pytest.approx((1 - ref) * decay, rel=1e-6)
        assert Tm[0, j].sum() < 1e-9                                  # meent: behind its opaque backing slab


def test_lossy_grating_absorbs_and_the_loss_vanishes_with_the_loss():
    # Σ orders < 1 with the rest absorbed; a metal-like index n + 5i with n → 0 (ε → −25, lossless)
    # reflects all light in the limit, so Σ reflected → 1 and the absorbed part falls with n.
    wl = [480.0, 620.0]
    al = G.rigorous_efficiency_detail(wl, 1200.0, 1, 10.0, material="Al", depth_nm=60.0)
    assert np.all(al.reflected_total < 1.0) and np.all(al.absorbed > 0.01)
    np.testing.assert_allclose(al.reflected_total + al.absorbed, 1.0)
    losses = [G.rigorous_efficiency_detail(wl, 1200.0, 1, 10.0, material=complex(n, 5.0), depth_nm=60.0,
                                           polarization="TE").absorbed.max() for n in (0.5, 0.1, 0.02, 0.004)]
    assert losses[0] > losses[1] > losses[2] > losses[3] > 0 and losses[3] < 0.01


# ---------------------------------------------------------------------- scalar limit
def test_coarse_shallow_phase_grating_meets_the_scalar_result():
    # Scalar Kirchhoff/Fraunhofer result for a thin binary phase grating (duty 0.5, phase step φ):
    # η_m = (2/(mπ))² sin²(φ/2) for odd m (Goodman, Introduction to Fourier Optics, sec. 4.4, the
    # Fourier series of the transmittance; recalled from memory). 50 lines/mm at 1 µm: d/λ = 20;
    # n = 1.5 and depth 1 µm give φ = π. The rigorous orders, over the total transmitted (the
    # surface's Fresnel loss is outside scalar theory), agree within a few %.
    r = G.rigorous_efficiency_detail(1000.0, 50.0, [1, -1, 3], material=1.5, depth_nm=1000.0, kind="transmission",
                                     polarization="TE")
    share = r.efficiency[0] / r.transmitted_total[0, 0]
    scalar = np.array([4 / math.pi ** 2, 4 / math.pi ** 2, 4 / (9 * math.pi ** 2)])
    np.testing.assert_allclose(share, scalar, rtol=0.03)


def test_blazed_facets_send_light_into_the_positive_orders():
    # Littrow at the blaze wavelength (Palmer & Loewen eq. 2-11): order +1 is bright, −1 does not propagate.
    lb = G.blaze_wavelength_nm(10.0, 600.0)
    eff = G.rigorous_efficiency(lb, 600.0, [1, 0, -1], 10.0, profile="blazed", blaze_angle_deg=10.0, material="Al",
                                polarization="TE")
    assert eff[0, 0] > 0.6 and eff[0, 0] > 3 * eff[0, 1]


# ---------------------------------------------------------------------- Rayleigh wavelengths
def test_orders_switch_on_and_off_at_the_rayleigh_wavelength():
    lr = G.rayleigh_wavelength_nm(1200.0, -1, 10.0)
    eff = G.rigorous_efficiency([lr * (1 - 1e-6), lr * (1 + 1e-6)], 1200.0, -1, 10.0, material="Al", depth_nm=60.0,
                                polarization="TE")
    assert eff[0] > 0 and eff[1] == 0.0


def test_tm_on_a_metal_shows_an_anomaly_at_the_rayleigh_wavelength():
    # Wood's anomaly (Palmer & Loewen, ch. 9): in TM the specular order jumps where order −1 goes
    # grazing; 60 nm further on, the curve is smooth.
    lr = G.rayleigh_wavelength_nm(1200.0, -1, 10.0)
    near, far = np.linspace(lr - 2, lr + 2, 9), np.linspace(lr + 58, lr + 62, 9)
    tm = G.rigorous_efficiency(np.concatenate([near, far]), 1200.0, 0, 10.0, material="Al", depth_nm=60.0,
                               polarization="TM")
    assert np.abs(np.diff(tm[:9])).max() > 10 * np.abs(np.diff(tm[9:])).max()


# ---------------------------------------------------------------------- shapes, polarization, record
def test_shapes_polarization_and_record():
    wl = np.array([450.0, 520.0, 900.0])
    r = G.rigorous_efficiency_detail(wl, 1200.0, [1, 2], material="Al")
    assert r.efficiency.shape == (3, 2) and r.te.shape == r.tm.shape == (3, 2)
    np.testing.assert_allclose(r.efficiency, 0.5 * (r.te + r.tm))
    assert np.all(r.efficiency[:, 1] == 0.0)                          # 2λ > 2d: order 2 never propagates here
    assert r.efficiency[2, 0] == 0.0                                  # 900 nm > d: order 1 is evanescent
    assert r.harmonics >= rcwa.MIN_HARMONICS and r.fourier_orders == 2 * r.harmonics + 1 and r.slices == 1
    assert "Fourier orders" in r.note
    one = G.rigorous_efficiency(wl, 1200.0, 1, material="Al", polarization="s")
    assert one.shape == (3,)
    np.testing.assert_allclose(one, r.te[:, 0], atol=2 * rcwa.CONVERGENCE_TOL)


# ---------------------------------------------------------------------- bad input
@pytest.mark.parametrize("kw, words", [
    ({"depth_nm": 0.0}, "depth_nm"), ({"depth_nm": -5.0}, "positive"), ({"duty_cycle": 1.0}, "duty_cycle"),
    ({"duty_cycle": 0.0}, "between 0 and 1"), ({"profile": "trapezoid"}, "profile must be one of"),
    ({"material": "unobtainium"}, "Unknown material"), ({"polarization": "circular"}, "polarization"),
    ({"kind": "both"}, "kind must be"), ({"profile": "blazed"}, "needs blaze_angle_deg"),
    ({"profile": "blazed", "blaze_angle_deg": 30.0, "depth_nm": 5000.0}, "too deep"),
    ({"kind": "transmission"}, "transparent material"),
])
def test_bad_input_gets_a_sentence(kw, words):
    with pytest.raises(InputError, match=words):
        G.rigorous_efficiency([500.0], 600.0, 1, **kw)


def test_wavelength_outside_the_material_data_is_refused():
    with pytest.raises(InputError, match="no data at 150 nm"):
        G.rigorous_efficiency([150.0, 500.0], 600.0, 1, material="Ag")


# ---------------------------------------------------------------------- band mean (the planner's figure)
def test_band_efficiency_is_the_mean_over_the_band():
    kw = dict(profile="lamellar", depth_nm=120.0, material="SiO2", kind="transmission")
    mean = G.band_efficiency((500.0, 700.0), 600.0, 1, 10.0, samples=5, **kw)
    curve = G.rigorous_efficiency(np.linspace(500.0, 700.0, 5), 600.0, 1, 10.0, **kw)
    assert mean == pytest.approx(float(curve.mean()), abs=1e-12) and 0 < mean < 1
    with pytest.raises(InputError, match="samples"):
        G.band_efficiency((500.0, 700.0), 600.0, 1, samples=1, **kw)
    with pytest.raises(InputError, match="short < long"):
        G.band_efficiency((700.0, 500.0), 600.0, 1, **kw)
