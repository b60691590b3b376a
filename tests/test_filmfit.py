"""fit_film against spectra made outside the project: reflectance from the tmm package (coh_tmm) with
optical constants from refractiveindex.info pages, plus seeded noise; each fit starts from a generic Cauchy
film, not from the page that made the spectrum."""

import numpy as np
import pytest
import tmm

from physics import (CauchyMaterial, EffectiveMedium, InputError, Layer, SellmeierMaterial, Stack,
                     TaucLorentzMaterial, fit_film, fit_thickness, material, search_materials)

WL = np.linspace(400.0, 1000.0, 500)
#: Noise of the invented measurements (rms reflectance): a good reflectometer's 0.1-0.3 % (common practice).
NOISE = 0.002
#: A generic start: a glass-like Cauchy film, far from nitride (n ≈ 2.04).
GENERIC = CauchyMaterial(1.6, 0.005)


def nitride_page():
    """The Luke et al. 2015 silicon nitride page of refractiveindex.info, found by the material search."""
    pages = [spec for spec, _ in search_materials("Si3N4 Luke") if spec.endswith("/Luke")]
    assert pages == ["main/Si3N4/Luke"]
    return material(pages[0])


def tmm_reflectance(media, thicknesses, wl, angle_deg=0.0):
    """Unpolarized R of ambient / layers / substrate from tmm.coh_tmm; media are Materials or numbers."""
    th = np.radians(angle_deg)
    out = np.empty(len(wl))
    nk = np.array([m.nk(wl) if hasattr(m, "nk") else np.full(len(wl), complex(m)) for m in media])   # (medium, wl)
    ds = [np.inf, *thicknesses, np.inf]
    for i, w in enumerate(wl):
        ns = list(nk[:, i])
        rs = tmm.coh_tmm("s", ns, ds, th, w)["R"]
        out[i] = rs if angle_deg == 0 else 0.5 * (rs + tmm.coh_tmm("p", ns, ds, th, w)["R"])
    return out


def noisy(R, seed):
    return R + np.random.default_rng(seed).normal(0.0, NOISE, R.size)


def check_nitride(r, nitride, d_true):
    assert r.thickness_nm == pytest.approx(d_true, rel=0.01)
    assert abs(float(r.n_at(633.0)) - float(nitride.nk(633.0).real)) < 0.01
    assert r.k_at(633.0) == 0.0 and r.rms < 1.5 * NOISE
    assert set(r.parameters) == {"thickness_nm", "A", "B_um2", "C_um4"} == set(r.uncertainties)
    assert r.correlation.shape == (4, 4) and np.allclose(np.diag(r.correlation), 1.0)
    assert material(r.material.spec()).spec() == r.material.spec()     # the fitted film can be stored


@pytest.mark.parametrize("d_true", [300.0, 900.0])
def test_pecvd_like_nitride_on_silicon(d_true):
    nitride, si = nitride_page(), material("Si")
    R = noisy(tmm_reflectance([1.0, nitride, si], [d_true], WL), int(d_true))
    r = fit_film(WL, R, Stack([Layer(GENERIC, 500.0)], si, ambient=1.0), model="cauchy", thickness_nm=(0, 2000))
    check_nitride(r, nitride, d_true)


def test_thin_nitride_needs_a_second_angle():
    """At 80 nm one normal-incidence spectrum fits two films about equally well (the quarter-wave minimum
    ((n_s − n²)/(n_s + n²))² is as deep for n as for n_s/n; Born & Wolf, Principles of Optics, sec. 7.6.1):
    the fit says so; with 65° added it is settled."""
    nitride, si = nitride_page(), material("Si")
    start = Stack([Layer(GENERIC, 500.0)], si, ambient=1.0)
    R0 = noisy(tmm_reflectance([1.0, nitride, si], [80.0], WL), 80)
    one = fit_film(WL, R0, start, model="cauchy", thickness_nm=(0, 2000))
    assert "Another solution fits the data as well" in one.message and "another angle" in one.message
    R65 = noisy(tmm_reflectance([1.0, nitride, si], [80.0], WL, 65.0), 81)
    both = fit_film([WL, WL], [R0, R65], start, model="cauchy", thickness_nm=(0, 2000), angle_deg=[0.0, 65.0])
    check_nitride(both, nitride, 80.0)
    assert both.n_points == 2 * WL.size


def test_rough_poly_si_surface():
    """Poly-Si-like film (the crystalline-Si page as its stand-in) on oxide on silicon, with a 10 nm surface
    layer of Si and void 50/50 (Bruggeman)."""
    psi, ox, si = material("poly-Si"), material("SiO2"), material("Si")
    rough = EffectiveMedium(psi, 1.0, 0.5)
    R = noisy(tmm_reflectance([1.0, rough, psi, ox, si], [10.0, 180.0, 100.0], WL), 7)
    start = Stack([Layer(psi, 0.0), Layer(ox, 100.0)], si, ambient=1.0)
    r = fit_film(WL, R, start, model="fixed", thickness_nm=(0, 500), roughness=True)
    assert r.roughness_nm == pytest.approx(10.0, abs=3.0)
    assert r.thickness_nm == pytest.approx(180.0, abs=3.0)
    assert r.parameters["roughness_nm"] == r.roughness_nm and r.uncertainties["roughness_nm"] > 0


def test_thick_film_with_thickness_spread():
    """10 µm oxide on silicon whose thickness varies across the spot (Gaussian, σ = 40 nm): the measured
    spectrum is the tmm spectra averaged over thickness by Simpson's rule over ±4σ (not Gauss-Hermite)."""
    ox, si = material("SiO2"), material("Si")
    wl = np.linspace(500.0, 1000.0, 200)
    d0, sigma = 10_000.0, 40.0
    ds = d0 + np.linspace(-4 * sigma, 4 * sigma, 25)
    w = np.exp(-0.5 * ((ds - d0) / sigma) ** 2) * np.r_[1, np.tile([4, 2], 11), 4, 1]
    R = sum(wi * tmm_reflectance([1.0, ox, si], [d], wl) for wi, d in zip(w / w.sum(), ds))
    r = fit_film(wl, noisy(R, 11), Stack([Layer(ox, 0.0)], si, ambient=1.0), model="fixed",
                 thickness_nm=(9500, 10500), spread=True)
    assert r.spread_nm == pytest.approx(sigma, abs=10.0)
    assert r.thickness_nm == pytest.approx(d0, abs=20.0)


def test_thin_film_says_thickness_and_index_trade():
    si = material("Si")
    film = CauchyMaterial(1.95, 0.015)
    R = noisy(tmm_reflectance([1.0, film, si], [30.0], WL), 3)
    r = fit_film(WL, R, Stack([Layer(GENERIC, 0.0)], si, ambient=1.0), model="cauchy", thickness_nm=(0, 300))
    assert "thickness_nm and A trade against each other" in r.message
    assert "another angle" in r.message


def test_absorbing_amorphous_film_by_tauc_lorentz():
    """An a-Si-like Tauc-Lorentz film (invented parameters) on oxide on silicon: thickness, n and k recovered;
    a transparent Cauchy cannot describe it, and the fit says so."""
    ox, si = material("SiO2"), material("Si")
    truth = TaucLorentzMaterial(1.5, 1.7, 120.0, 3.7, 2.2)
    wl = WL[::2]
    R = noisy(tmm_reflectance([1.0, truth, ox, si], [60.0, 100.0], wl), 5)
    start = Stack([Layer(GENERIC, 0.0), Layer(ox, 100.0)], si, ambient=1.0)
    r = fit_film(wl, R, start, model="tauc-lorentz", thickness_nm=(0, 1000))
    assert r.thickness_nm == pytest.approx(60.0, rel=0.01) and r.quality == "good"
    np.testing.assert_allclose(r.n_at([500.0, 800.0]), truth.nk([500.0, 800.0]).real, atol=0.02)
    np.testing.assert_allclose(r.k_at([500.0, 700.0]), truth.nk([500.0, 700.0]).imag, atol=0.01)
    wrong = fit_film(wl, R, start, model="cauchy", thickness_nm=(0, 1000))
    assert wrong.quality != "good" and "times the noise" in wrong.message


def test_fixed_model_is_fit_thickness():
    ox, si = material("SiO2"), material("Si")
    st = Stack([Layer(ox, 0.0)], si, ambient=1.0)
    R = noisy(st.with_thickness(0, 640.0).reflectance(WL), 5)
    r = fit_film(WL, R, st, model="fixed", thickness_nm=(0, 3000))
    ref = fit_thickness(WL, R, st, 0, (0, 3000))
    assert r.thickness_nm == pytest.approx(ref.thickness_nm, abs=1e-3)
    assert r.uncertainty_nm == pytest.approx(ref.uncertainty_nm, rel=1e-3)
    assert r.material is ox and r.thickness_fit is not None


def test_one_sigma_intervals_cover_the_truth():
    """Over 50 noise draws of a one-term Sellmeier film (the model is exact), each parameter's ±1σ covers
    the truth about 68 % of the time (a normal 1σ interval); 55-80 % is the accepted band (±2 binomial σ)."""
    si = material("Si")
    truth = SellmeierMaterial([2.9], [0.02])
    wl = WL[::5]
    clean = tmm_reflectance([1.0, truth, si], [250.0], wl)
    start = Stack([Layer(SellmeierMaterial([2.0], [0.01]), 0.0)], si, ambient=1.0)
    true = {"thickness_nm": 250.0, "B1": 2.9, "C1_um2": 0.02}
    hits = []
    for seed in range(50):
        r = fit_film(wl, noisy(clean, 1000 + seed), start, model="sellmeier", thickness_nm=(200, 300))
        hits += [abs(r.parameters[k] - v) <= r.uncertainties[k] for k, v in true.items()]
    assert 0.55 <= np.mean(hits) <= 0.80


@pytest.mark.parametrize("kwargs, words", [
    (dict(reflectance=np.r_[np.nan, np.zeros(WL.size - 1)]), "nan"),
    (dict(stack=Stack([Layer(CauchyMaterial(5.0), 0.0)], "Si", ambient=1.0)), "outside the range"),
    (dict(wavelength_nm=WL[:30], reflectance=np.full(30, 0.3), model="tauc-lorentz", roughness=True, spread=True,
          free_scale=True, free_offset=True), "free parameters"),
    (dict(stack=Stack([Layer("SiO2", 10.0), Layer(GENERIC, 0.0)], "Si", ambient=1.0), layer=1, roughness=True),
     "top surface"),
    (dict(model="drude"), "model must be one of"),
    (dict(wavelength_nm=[WL, WL], reflectance=[np.full(WL.size, 0.3)] * 2, angle_deg=[0.0]), "one angle per"),
    (dict(wavelength_nm=[WL] * 51, reflectance=[np.full(WL.size, 0.3)] * 51), "at most 50"),
    (dict(angle_deg=float("nan")), "angle_deg"),
])
def test_bad_input_gets_a_sentence(kwargs, words):
    args = dict(wavelength_nm=WL, reflectance=np.full(WL.size, 0.3), stack=Stack([Layer(GENERIC, 0.0)], "Si",
                                                                                  ambient=1.0)) | kwargs
    with pytest.raises(InputError, match=words):
        fit_film(args.pop("wavelength_nm"), args.pop("reflectance"), args.pop("stack"), **args)
