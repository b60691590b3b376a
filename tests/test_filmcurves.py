"""The curves a page draws of a film fit: the model spectrum against the tmm package (coh_tmm), and the
linear 1σ band of n against a Monte Carlo draw from the same covariance."""

import dataclasses

import numpy as np
import pytest
import tmm

from physics import CauchyMaterial, Layer, Stack, fit_film, material
from physics.filmcurves import film_fit_reflectance, fit_film_curves, nk_sigma, parameters_at_bounds
from physics.filmfit import _MODELS

WL = np.linspace(400.0, 1000.0, 150)


@pytest.fixture(scope="module")
def fitted():
    si = material("Si")
    truth = CauchyMaterial(2.0, 0.016)
    R = Stack([Layer(truth, 400.0)], si, ambient=1.0).reflectance(WL)
    R = R + np.random.default_rng(3).normal(0.0, 0.002, WL.size)
    start = Stack([Layer(CauchyMaterial(1.6, 0.005), 0.0)], si, ambient=1.0)
    return fit_film(WL, R, start, model="cauchy", thickness_nm=(0, 1500)), start, R


def test_model_spectrum_is_tmm_of_the_fitted_film(fitted):
    r, start, R = fitted
    model = film_fit_reflectance(r, start, 0, WL)
    si = material("Si")
    ref = [tmm.coh_tmm("s", [1.0, complex(r.material.nk(w)), complex(si.nk(w))], [np.inf, r.thickness_nm, np.inf],
                       0.0, w)["R"] for w in WL]                  # tmm package, normal incidence
    np.testing.assert_allclose(model, ref, atol=1e-12)
    assert np.sqrt(np.mean((model - R) ** 2)) == pytest.approx(r.rms, rel=1e-9)


def test_linear_sigma_of_n_matches_a_monte_carlo_draw(fitted):
    r = fitted[0]
    wl = np.array([450.0, 633.0, 900.0])
    sn, sk = nk_sigma(r, wl)
    family = _MODELS["cauchy"]
    idx = [r.parameter_names.index(n) for n in family.names]
    p = np.array([r.parameters[n] for n in family.names])
    s = np.array([r.uncertainties[n] for n in family.names])
    draws = np.random.default_rng(0).multivariate_normal(p, r.correlation[np.ix_(idx, idx)] * np.outer(s, s), 2000)
    n = np.array([family.build(q, r.material.range_nm).nk(wl).real for q in draws])
    np.testing.assert_allclose(sn, n.std(axis=0), rtol=0.08)     # 2000 draws: the std is known to ~2 %
    assert np.all(sk == 0)


def test_curves_and_bounds():
    si = material("Si")
    R = Stack([Layer(CauchyMaterial(2.0, 0.016), 300.0)], si, ambient=1.0).reflectance(WL)
    r, c = fit_film_curves(WL, R, Stack([Layer("SiO2", 0.0)], si, ambient=1.0), model="tauc-lorentz",
                           thickness_nm=(0, 1000))
    assert c.model.shape == c.residual.shape == WL.shape and c.n.shape == c.sigma_n.shape == (200,)
    assert c.at_bounds == parameters_at_bounds(r)
    at_floor = dataclasses.replace(r, parameters=r.parameters | {"eps_inf": _MODELS["tauc-lorentz"].lower[0]})
    assert "eps_inf" in parameters_at_bounds(at_floor)
    fixed = fit_film(WL, R, Stack([Layer("SiO2", 0.0)], si, ambient=1.0), model="fixed", thickness_nm=(0, 1000))
    assert nk_sigma(fixed, WL) is None and parameters_at_bounds(fixed) == ()
    no_spread = dataclasses.replace(fixed, parameters=fixed.parameters | {"spread_nm": 0.0}, spread_nm=0.0)
    assert parameters_at_bounds(no_spread) == ("spread_nm",)


def test_sampled_band_of_an_urbach_tail_is_its_exact_percentiles():
    """k = k₀·exp(s·(E − E₀)) with only the slope s uncertain (σ_s) is monotonic in s, so its central 68 % interval is
    exactly k at s ± σ_s: exp(∓σ_s·|E − E₀|) times k below the band edge. The sampled band finds it (200 draws put
    each percentile within ~0.1σ_s, a sample quantile's standard error); the linear band k(1 ± σ_s|E − E₀|) is too
    narrow above and crosses zero below."""
    from physics import CauchyMaterial
    from physics.filmcurves import nk_band
    from physics.filmfit import FilmFitResult
    from physics.materials import HC_EV_NM

    names = ("thickness_nm", "A", "B_um2", "C_um4", "k_amplitude", "k_exponent_per_ev")
    values = dict(zip(names, (300.0, 1.9, 0.01, 0.0, 0.05, 4.0)))
    sigmas = dict(zip(names, (1.0, 0.0, 0.0, 0.0, 0.0, 0.8)))
    band = (400.0, 1000.0)
    mat = CauchyMaterial(1.9, 0.01, 0.0, range_nm=band, k_amplitude=0.05, k_exponent_per_ev=4.0, k_band_edge_nm=400.0)
    r = FilmFitResult(300.0, 1.0, mat, values, sigmas, np.eye(len(names)), names, None, None, "",
                      model="cauchy-urbach")
    wl = np.array([500.0, 700.0, 900.0])
    de = HC_EV_NM / wl - HC_EV_NM / band[0]                                # E − E₀ < 0 below the edge
    n_lo, n_hi, k_lo, k_hi = nk_band(r, wl)
    k = mat.nk(wl).imag
    s_hi, s_lo = np.log(k_hi / k) / de, np.log(k_lo / k) / de               # the slopes the band ends stand for
    np.testing.assert_allclose(s_hi, -0.8, atol=0.3 * 0.8)
    np.testing.assert_allclose(s_lo, 0.8, atol=0.3 * 0.8)
    linear = k * (1 + 0.8 * np.abs(de))
    assert np.all(k_hi > linear) and np.all(k_hi[1:] > 1.3 * linear[1:]) and np.all(k_lo > 0)
    assert np.all(k[1:] * (1 - 0.8 * np.abs(de[1:])) < 0)
    np.testing.assert_allclose([n_lo, n_hi], [mat.nk(wl).real] * 2, atol=1e-12)     # n has no uncertainty here
