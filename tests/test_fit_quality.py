"""How physics/fit.py judges its own fits, reads units, and averages dense spectra.

Spectra come from the independent pipeline of tests/outside_pipeline.py (tmm by S. J. Byrnes with
refractiveindex.info pages: Malitson SiO2, Green-2008 Si, Philipp Si3N4, Ciddor air), with Gaussian
noise of fixed seeds. The wafers and spectrometers are invented for these tests.
"""

from __future__ import annotations

import functools

import numpy as np
import pytest

import outside_pipeline as op
from physics import fit_thickness, read_spectrum
from physics.fit import (COUNTS_ABOVE, MAX_FIT_POINTS, UNCERTAINTY_FLOOR_NM, noise_rms)
from physics.stackfile import load_preset

OXIDE = load_preset("thermal_oxide_on_silicon").stack
NITRIDE = load_preset("nitride_on_oxide_on_silicon").stack
WL = np.linspace(400.0, 1000.0, 250)


@functools.lru_cache(maxsize=None)
def outside(layers: tuple, wl: tuple | None = None):
    R = op.reflectance_on(WL if wl is None else np.array(wl), layers)
    R.setflags(write=False)
    return R


def noisy(R, sigma, seed):
    return R + np.random.default_rng(seed).normal(0.0, sigma, R.size)


def _rows(wl, values, fmt="{:.4f},{:.6f}"):
    return "\n".join(fmt.format(a, b) for a, b in zip(wl, values))


# ---------------------------------------------------------------------- the noise estimate
@pytest.mark.parametrize("sigma", [0.001, 0.003, 0.01])
def test_noise_estimate_on_a_well_sampled_spectrum(sigma):
    # 450 nm oxide on 2000 points: about 20 points per fringe-width of curvature; white noise of known rms.
    wl = np.linspace(400.0, 1000.0, 2000)
    R = noisy(outside(((op.SIO2, 450.0),), tuple(wl)), sigma, 3)
    assert noise_rms(R) == pytest.approx(sigma, rel=0.15)


def test_noise_estimate_never_underestimates_sparse_fringes():
    R = noisy(outside(((op.SIO2, 5000.0),)), 0.003, 4)          # ~4-5 points per fringe at 400 nm
    assert noise_rms(R) >= 0.003


# ---------------------------------------------------------------------- the verdict
@pytest.mark.parametrize("truth,sigma", [(40.0, 0.003), (120.0, 0.02), (450.0, 0.003), (2500.0, 0.005)])
def test_right_models_are_judged_good(truth, sigma):
    r = fit_thickness(WL, noisy(outside(((op.SIO2, truth),)), sigma, 7), OXIDE, 0, (0.0, 3000.0))
    assert r.quality == "good" and r.quality_note == "" and r.window_hint == "" and r.trustworthy


def test_a_film_thicker_than_the_window_is_poor_and_the_window_is_suggested():
    r = fit_thickness(WL, noisy(outside(((op.SIO2, 5000.0),)), 0.003, 8), OXIDE, 0, (0.0, 3000.0))
    assert r.quality == "poor" and not r.trustworthy
    assert "not trustworthy" in r.quality_note
    assert r.fourier_thickness_nm == pytest.approx(5000.0, rel=0.05)
    assert "widen the window to about 5600 nm" in r.window_hint
    wide = fit_thickness(WL, noisy(outside(((op.SIO2, 5000.0),)), 0.003, 8), OXIDE, 0, (0.0, 5600.0))
    assert wide.quality == "good" and abs(wide.thickness_nm - 5000.0) < 1.0


def test_percent_read_twice_is_poor():
    R = noisy(outside(((op.SIO2, 640.0),)), 0.003, 9) / 100.0
    assert fit_thickness(WL, R, OXIDE, 0, (0.0, 3000.0)).quality == "poor"


@pytest.mark.parametrize("oxide,expect", [(30.0, ("misfit",)), (60.0, ("poor", "misfit")), (100.0, ("poor",))])
def test_a_wrong_fixed_underlayer_is_not_good(oxide, expect):
    # The model says 20 nm of oxide under the nitride; the invented wafer has more.
    R = noisy(outside(((op.SI3N4, 300.0), (op.SIO2, oxide))), 0.003, 10)
    r = fit_thickness(WL, R, NITRIDE, 0, (0.0, 2000.0))
    assert r.quality in expect and r.quality_note


def test_a_miscalibrated_reference_is_a_misfit_until_scale_and_offset_are_free():
    R = noisy(0.93 * outside(((op.SIO2, 800.0),)) + 0.01, 0.003, 11)
    assert fit_thickness(WL, R, OXIDE, 0, (0.0, 3000.0)).quality == "misfit"
    assert fit_thickness(WL, R, OXIDE, 0, (0.0, 3000.0), free_scale=True, free_offset=True).quality == "good"


def test_the_quoted_uncertainty_has_a_floor():
    r = fit_thickness(WL, outside(((op.SIO2, 640.0),)), OXIDE, 0, (0.0, 3000.0))   # noise-free
    assert r.uncertainty_nm < 1e-4 and r.quoted_uncertainty_nm == UNCERTAINTY_FLOOR_NM and r.quality == "good"
    n = fit_thickness(WL, noisy(outside(((op.SIO2, 640.0),)), 0.003, 12), OXIDE, 0, (0.0, 3000.0))
    assert n.quoted_uncertainty_nm == n.uncertainty_nm > UNCERTAINTY_FLOOR_NM


# ---------------------------------------------------------------------- dense spectra
def test_a_dense_spectrum_is_averaged_without_moving_the_result():
    # 20 000 points from the outside pipeline; the same spectrum decimated to 2000 points is fitted as is.
    wl = np.linspace(400.0, 1000.0, 20000)
    R = noisy(outside(((op.SIO2, 1500.0),), tuple(wl)), 0.003, 13)
    r = fit_thickness(wl, R, OXIDE, 0, (0.0, 3000.0))
    assert r.n_points_read == 20000 and r.points_per_bin > 1 and r.n_points <= MAX_FIT_POINTS
    assert abs(r.thickness_nm - 1500.0) <= 3 * r.uncertainty_nm and r.quality == "good"
    sparse = fit_thickness(wl[::10], R[::10], OXIDE, 0, (0.0, 3000.0))
    assert sparse.points_per_bin == 1
    # averaging keeps the information: the uncertainty is that of all the points, not of a tenth of them
    assert r.uncertainty_nm < 0.6 * sparse.uncertainty_nm


def test_spectra_below_the_limit_are_not_averaged():
    r = fit_thickness(WL, noisy(outside(((op.SIO2, 450.0),)), 0.003, 14), OXIDE, 0, (0.0, 3000.0))
    assert r.points_per_bin == 1 and r.n_points == r.n_points_read == WL.size


def test_progress_is_reported_and_can_stop_the_fit():
    seen = []
    R = noisy(outside(((op.SIO2, 450.0),)), 0.003, 15)
    fit_thickness(WL, R, OXIDE, 0, (0.0, 3000.0), progress=lambda f, t: seen.append((f, t)))
    assert seen and all(0.0 <= f <= 1.0 for f, _ in seen)

    class Stop(Exception):
        pass

    def stop(f, t):
        raise Stop
    with pytest.raises(Stop):
        fit_thickness(WL, R, OXIDE, 0, (0.0, 3000.0), progress=stop)


# ---------------------------------------------------------------------- units
def test_raw_counts_are_recognised():
    d = read_spectrum(_rows(WL, 20000.0 * outside(((op.SIO2, 450.0),)) + 800.0))
    assert d.value_unit == "counts" and d.is_counts
    assert any("raw counts" in w and "reference" in w for w in d.warnings)
    assert not any("percent" in n for n in d.notes)


def test_percent_up_to_the_counts_threshold_stays_percent():
    d = read_spectrum(_rows(WL, np.linspace(20.0, COUNTS_ABOVE, WL.size)))
    assert d.value_unit == "percent" and d.warnings == []


def test_overrides_keep_a_line_and_warn_when_implausible():
    R = outside(((op.SIO2, 450.0),))
    d = read_spectrum(_rows(WL, R), wavelength_unit="um")               # nm read as µm: 400 000-1 000 000 nm
    assert any("Wavelengths read as µm (as chosen" in n for n in d.notes)
    assert any("check the wavelength unit" in w for w in d.warnings)
    d = read_spectrum(_rows(WL, R), value_unit="percent")               # fractions read as percent
    assert any("Reflectance read as percent (as chosen" in n for n in d.notes)
    assert any("choose fraction" in n for n in d.notes)
    d = read_spectrum(_rows(WL, 100 * R), value_unit="fraction")        # percent read as fractions
    assert any("look like percent" in w for w in d.warnings)
    d = read_spectrum(_rows(WL, R))
    assert d.warnings == [] and any("detected" in n for n in d.notes)
