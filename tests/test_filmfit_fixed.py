"""fit_film with dispersion parameters held fixed or started where the caller says, and model_parameters.

The outside check's spectrum is made outside the project: a silicon-nitride film on silicon from the tmm package
(coh_tmm, via tests/outside_pipeline.py) with the nitride's n from the refractiveindex.info page of Luke et al.,
Opt. Lett. 40, 4823 (2015) (main/Si3N4/Luke), silicon from the page the pipeline uses, plus seeded noise. The index
held fixed is a three-term Cauchy fitted in this test (numpy.polyfit in 1/λ²) to that page's n over the band."""

import numpy as np
import pytest

import outside_pipeline as op
from physics import CauchyMaterial, InputError, Layer, Stack, fit_film
from physics.filmfit import MODELS, model_parameters

WL = np.linspace(400.0, 1000.0, 300)
#: Noise of the invented measurement (rms reflectance): a good reflectometer's 0.1-0.3 % (common practice).
NOISE = 0.002
LUKE = ("main", "Si3N4", "Luke")
START = Stack([Layer(CauchyMaterial(1.6, 0.005), 0.0)], "Si", ambient=1.0)      # a generic glass-like start


@pytest.fixture(scope="module")
def thin_nitride():
    R = op.reflectance_on(WL, ((LUKE, 40.0),), ambient=1.0) + np.random.default_rng(40).normal(0.0, NOISE, WL.size)
    n = np.array(op._nk_on(LUKE, tuple(WL))).real
    c, b, a = np.polyfit((1e3 / WL) ** 2, n, 2)            # n = A + B/λ² + C/λ⁴, λ in µm: within 0.001 of the page
    return R, float(a), float(b)


def test_fixing_the_index_of_a_thin_nitride_recovers_its_thickness(thin_nitride):
    """Issue 13's advice for a thin film ("fix the index"): 40 nm of nitride on Si, its index held at the page's
    Cauchy A and B, gives the thickness within 1 %, and a far smaller 1σ than with the index free."""
    R, a, b = thin_nitride
    free = fit_film(WL, R, START, model="cauchy", thickness_nm=(0, 300))
    held = fit_film(WL, R, START, model="cauchy", thickness_nm=(0, 300), fixed={"A": a, "B_um2": b})
    assert held.thickness_nm == pytest.approx(40.0, rel=0.01)
    assert held.uncertainty_nm < 0.1 * free.uncertainty_nm               # measured: 0.027 nm against 2.3 nm
    assert held.parameters["A"] == a and held.parameters["B_um2"] == b     # held exactly
    assert held.material.A == a and held.material.B == b
    assert held.uncertainties["A"] == 0.0 and held.uncertainties["B_um2"] == 0.0
    assert held.fixed == ("A", "B_um2") and free.fixed == ()
    assert held.parameter_names == free.parameter_names == ("thickness_nm", "A", "B_um2", "C_um4")
    i = held.parameter_names.index("A")
    assert held.correlation[i, i] == 1.0 and np.all(np.delete(held.correlation[i], i) == 0.0)
    assert "trade" in free.message and "trade" not in held.message


def test_a_start_given_is_where_the_fit_starts(thin_nitride):
    R, a, b = thin_nitride
    r = fit_film(WL, R, START, model="cauchy", thickness_nm=(0, 300), fixed={"A": a, "B_um2": b},
                 start={"C_um4": 0.0})
    assert r.thickness_nm == pytest.approx(40.0, rel=0.01)


def test_model_parameters_lists_names_starts_and_ranges():
    rows = model_parameters("cauchy")
    assert [r[0] for r in rows] == ["A", "B_um2", "C_um4"]
    assert all(lo <= s <= hi for _, s, lo, hi, _ in rows)
    assert rows[1][4] == "µm²"
    assert model_parameters("fixed") == []
    assert all(model_parameters(m) or m == "fixed" for m in MODELS)
    with pytest.raises(InputError, match="model must be one of"):
        model_parameters("drude")


BASE = dict(wavelength_nm=WL, reflectance=np.full(WL.size, 0.3), stack=START, model="cauchy")


@pytest.mark.parametrize("kwargs, sentence", [
    (dict(fixed={"n": 2.0}), r"fixed names 'n', which model 'cauchy' does not have; its parameters are A, B_um2"),
    (dict(start={"A": 2.0}, model="fixed"), r"start names 'A', which model 'fixed' does not have"),
    (dict(fixed={"A": 7.0}), r"fixed cauchy parameter A = 7 lies outside the range the fit searches \(1 to 4\)"),
    (dict(fixed={"A": 1.5}, bounds={"A": (1.8, 2.2)}), r"fixed cauchy parameter A = 1.5 lies outside the bounds you"),
    (dict(start={"A": 1.5}, bounds={"A": (1.8, 2.2)}), r"starting cauchy parameter A = 1.5 lies outside the bounds"),
    (dict(fixed={"A": 2.0, "B_um2": 0.01, "C_um4": 0.0}), r"nothing of the film's optical constants left to fit"),
    (dict(fixed={"A": float("nan")}), r"fixed\['A'\]"),
    (dict(fixed=[("A", 2.0)]), r"fixed must be a dict"),
])
def test_bad_fixed_or_start_is_refused_with_a_sentence(kwargs, sentence):
    with pytest.raises(InputError, match=sentence):
        fit_film(**{**BASE, **kwargs})


def test_the_point_count_check_counts_only_free_parameters():
    wl = np.linspace(400.0, 1000.0, 18)                 # 18 points: too few for 4 free, enough for 3 (5 each)
    with pytest.raises(InputError, match="4 free parameters"):
        fit_film(wl, np.full(wl.size, 0.3), START, model="cauchy")
    r = fit_film(wl, np.full(wl.size, 0.3), START, model="cauchy", fixed={"C_um4": 0.0})
    assert r.fixed == ("C_um4",)


def test_a_wafer_map_holds_a_parameter_shared_by_its_points():
    """Two points of one wafer (invented: a Cauchy film n = 1.98 + 0.018/λ², λ in µm, 300 and 320 nm on Si, no
    noise) sharing a dispersion whose C is held at 0: each point's thickness back, C reported as held."""
    wl = np.linspace(400.0, 1000.0, 150)
    spectra = [Stack([Layer(CauchyMaterial(1.98, 0.018), d)], "Si", ambient=1.0).reflectance(wl) for d in (300, 320)]
    r = fit_film([wl, wl], spectra, START, model="cauchy", thickness_per_spectrum=True, fixed={"C_um4": 0.0},
                 free_scale=True)
    assert r.thicknesses_nm == pytest.approx((300.0, 320.0), abs=0.01)
    assert r.fixed == ("C_um4",) and r.parameter_names[:3] == ("A", "B_um2", "C_um4")
    assert r.correlation.shape == (7, 7) and r.uncertainties["C_um4"] == 0.0
