"""Film models: Tauc-Lorentz against its own Kramers-Kronig integral, effective media against their limits
and bounds, the Cauchy Urbach tail, and every model as a stack layer against the tmm package."""

import numpy as np
import pytest
import tmm
from scipy.integrate import quad
from scipy.optimize import brentq

from physics import (CauchyMaterial, EffectiveMedium, InputError, Layer, Stack, TaucLorentzMaterial, material)
from physics.filmmodels import effective_epsilon, tauc_lorentz_epsilon
from physics.materials import HC_EV_NM

# Invented parameter sets: an amorphous-silicon-like film (gap in the visible) and a nitride-like one
# (gap in the UV); and one with the gap above the peak, where the closed form's branches differ.
TL_SETS = [(1.5, 1.7, 120.0, 3.7, 2.2), (1.2, 4.5, 60.0, 8.0, 3.0), (2.0, 3.0, 40.0, 2.6, 1.1)]


def kramers_kronig_eps1(E, eps_inf, Eg, A, E0, C):
    """ε1(E) = ε∞ + (2/π) P∫_Eg^∞ ξ ε2(ξ)/(ξ² − E²) dξ, by scipy.integrate.quad (principal value by its
    Cauchy weight). Jellison & Modine, Appl. Phys. Lett. 69, 371 (1996), eq. 3."""
    e2 = lambda x: float(tauc_lorentz_epsilon(x, eps_inf, Eg, A, E0, C).imag)      # noqa: E731
    top = 50.0 * max(E0, E, Eg + 1.0)
    if E > Eg:
        head, _ = quad(lambda x: x * e2(x) / (x + E), Eg, top, weight="cauchy", wvar=E, limit=500)
    else:
        head, _ = quad(lambda x: x * e2(x) / (x * x - E * E), Eg, top, limit=500)
    tail, _ = quad(lambda x: x * e2(x) / (x * x - E * E), top, np.inf, limit=500)
    return eps_inf + 2.0 / np.pi * (head + tail)


@pytest.mark.parametrize("p", TL_SETS)
def test_tauc_lorentz_eps1_is_the_kramers_kronig_transform_of_eps2(p):
    energies = [0.4, 1.0, p[1], p[1] + 0.3, 0.5 * (p[1] + p[3]), p[3], 6.0, 12.0]
    closed = tauc_lorentz_epsilon(np.array(energies), *p).real
    numeric = [kramers_kronig_eps1(E, *p) for E in energies]
    np.testing.assert_allclose(closed, numeric, rtol=1e-8, atol=1e-8)


def test_tauc_lorentz_eps2_closed_form_and_limits():
    eps_inf, Eg, A, E0, C = TL_SETS[0]
    E = np.array([1.0, 2.5, 4.0])
    # Jellison & Modine 1996, eq. 4, written out here again
    by_hand = np.where(E > Eg, A * E0 * C * (E - Eg) ** 2 / (((E ** 2 - E0 ** 2) ** 2 + C ** 2 * E ** 2) * E), 0.0)
    np.testing.assert_allclose(tauc_lorentz_epsilon(E, *TL_SETS[0]).imag, by_hand, rtol=1e-14)
    # ε1 tends to ε∞ far above the oscillator (eq. 5 at E → ∞)
    assert tauc_lorentz_epsilon(1e4, *TL_SETS[0]).real == pytest.approx(eps_inf, abs=1e-4)
    m = TaucLorentzMaterial(*TL_SETS[0])
    below_gap = HC_EV_NM / np.array([800.0, 1200.0, 2000.0])
    assert np.all(m.nk(HC_EV_NM / below_gap).imag == 0.0)
    assert np.all(m.nk(np.linspace(200, 700, 50)).imag > 0.0)
    assert np.isfinite(tauc_lorentz_epsilon(Eg, *TL_SETS[0]).real)     # E = Eg exactly: the 0·log limit


@pytest.mark.parametrize("kwargs, words", [
    (dict(gap_ev=-0.1), "gap_ev"), (dict(amplitude_ev=0.0), "amplitude_ev"), (dict(broadening_ev=0.0), "broadening_ev"),
    (dict(center_ev=0.0), "center_ev"), (dict(broadening_ev=8.0), "2·center_ev"), (dict(eps_inf=0.5), "eps_inf"),
    (dict(amplitude_ev=float("nan")), "nan"),
])
def test_tauc_lorentz_refuses_unphysical_parameters(kwargs, words):
    p = dict(eps_inf=1.5, gap_ev=1.7, amplitude_ev=120.0, center_ev=3.7, broadening_ev=2.2) | kwargs
    with pytest.raises(InputError, match=words):
        TaucLorentzMaterial(**p)


def tmm_reflectance(stack_media, thicknesses, wl):
    """Unpolarized normal-incidence R from the tmm package (coh_tmm), media as Materials."""
    nk = np.array([m.nk(wl) if hasattr(m, "nk") else np.full(len(wl), complex(m)) for m in stack_media])
    return np.array([tmm.coh_tmm("s", list(nk[:, i]), [np.inf, *thicknesses, np.inf], 0.0, w)["R"]
                     for i, w in enumerate(wl)])


def test_film_models_as_stack_layers_against_tmm():
    wl = np.linspace(300.0, 1000.0, 36)
    tl = TaucLorentzMaterial(*TL_SETS[0])
    rough = EffectiveMedium(tl, 1.0, 0.5)
    si = material("Si")
    st = Stack([Layer(rough, 8.0), Layer(tl, 120.0)], si, ambient=1.0)
    np.testing.assert_allclose(st.reflectance(wl), tmm_reflectance([1.0, rough, tl, si], [8.0, 120.0], wl),
                               rtol=0, atol=1e-12)


def test_effective_medium_limits_are_the_materials():
    a, b = material("Si"), material("SiO2")
    wl = np.linspace(400, 900, 11)
    for rule in ("bruggeman", "maxwell-garnett"):
        np.testing.assert_allclose(EffectiveMedium(a, b, 0.0, rule).nk(wl), a.nk(wl), rtol=1e-13)
        np.testing.assert_allclose(EffectiveMedium(a, b, 1.0, rule).nk(wl), b.nk(wl), rtol=1e-13)


def test_maxwell_garnett_equals_bruggeman_to_first_order():
    """dε/df at f = 0 is 3 ε_a (ε_b − ε_a)/(ε_b + 2 ε_a) for both rules (the dilute limit, Aspnes 1982)."""
    ea, eb = np.array([15.0 + 0.2j, 2.1 + 0j, 4.0 + 1.0j]), np.array([1.0 + 0j, 12.0 + 0.5j, -3.0 + 2.0j])
    slope = 3 * ea * (eb - ea) / (eb + 2 * ea)
    f = 1e-5
    for rule in ("bruggeman", "maxwell-garnett"):
        np.testing.assert_allclose((effective_epsilon(ea, eb, f, rule) - ea) / f, slope, rtol=1e-3)
    # ... and they differ at second order
    assert np.all(np.abs(effective_epsilon(ea, eb, 0.3) - effective_epsilon(ea, eb, 0.3, "maxwell-garnett")) > 1e-3)


def test_bruggeman_solves_its_equation_and_matches_a_root_finder():
    """The chosen root satisfies f_a(ε_a−ε)/(ε_a+2ε) + f_b(ε_b−ε)/(ε_b+2ε) = 0 and, for real inputs, is the
    positive root scipy.optimize.brentq finds between ε_b and ε_a."""
    ea, eb = 12.0, 1.0
    for f in (0.1, 0.5, 0.9):
        eq = lambda e: (1 - f) * (ea - e) / (ea + 2 * e) + f * (eb - e) / (eb + 2 * e)      # noqa: E731
        assert effective_epsilon(ea, eb, f).real == pytest.approx(brentq(eq, eb, ea, xtol=1e-14), rel=1e-12)
    ea_c, eb_c = 15.0 + 0.5j, 1.0 + 0j
    for f in np.linspace(0, 1, 11):
        e = effective_epsilon(ea_c, eb_c, f)
        assert abs((1 - f) * (ea_c - e) / (ea_c + 2 * e) + f * (eb_c - e) / (eb_c + 2 * e)) < 1e-12


def test_bruggeman_branch_is_absorbing_and_continuous():
    ea, eb = -20.0 + 1.5j, 2.25 + 0j          # a metal-like host and a glass-like inclusion
    fs = np.linspace(0.0, 1.0, 2001)
    e = np.array([complex(effective_epsilon(ea, eb, f)) for f in fs])
    assert np.all(e.imag >= 0)
    assert np.max(np.abs(np.diff(e))) < 0.2    # no jump to the other root (steps of f = 0.0005)
    assert e[0] == pytest.approx(ea) and e[-1] == pytest.approx(eb)


def test_mixtures_lie_within_the_hashin_shtrikman_bounds():
    """For real ε_a > ε_b > 0, Maxwell Garnett with host a and with host b are the upper and lower
    Hashin-Shtrikman bounds, and Bruggeman lies between them, all inside the Wiener bounds
    f_a ε_a + f_b ε_b and 1/(f_a/ε_a + f_b/ε_b) (Aspnes, Thin Solid Films 89, 249 (1982), sec. 3;
    Z. Hashin and S. Shtrikman, J. Appl. Phys. 33, 3125 (1962))."""
    ea, eb = 13.0, 1.0
    for f in (0.1, 0.3, 0.5, 0.7, 0.9):
        upper = effective_epsilon(ea, eb, f, "maxwell-garnett").real
        lower = effective_epsilon(eb, ea, 1 - f, "maxwell-garnett").real
        br = effective_epsilon(ea, eb, f).real
        wiener_hi, wiener_lo = (1 - f) * ea + f * eb, 1 / ((1 - f) / ea + f / eb)
        assert wiener_lo <= lower < br < upper <= wiener_hi


def test_film_models_serialize_through_material():
    wl = np.linspace(400, 900, 7)
    tl = TaucLorentzMaterial(*TL_SETS[1], name="nitride-like")
    ema = EffectiveMedium(tl, "SiO2", 0.25, "maxwell-garnett")
    for m in (tl, ema):
        back = material(m.spec())
        assert type(back) is type(m) and back.spec() == m.spec()
        np.testing.assert_array_equal(back.nk(wl), m.nk(wl))
    with pytest.raises(InputError, match="rule"):
        EffectiveMedium("Si", 1.0, 0.5, rule="linear")
    with pytest.raises(InputError, match="fraction_b"):
        EffectiveMedium("Si", 1.0, 1.5)


def test_cauchy_urbach_tail():
    plain = CauchyMaterial(1.9, 0.02, 0.0003)
    assert "urbach" not in plain.spec() and np.all(plain.nk(np.linspace(300, 2500, 30)).imag == 0.0)
    m = CauchyMaterial(1.9, 0.02, 0.0003, k_amplitude=0.01, k_exponent_per_ev=2.0, k_band_edge_nm=350.0)
    np.testing.assert_array_equal(m.nk([500.0]).real, plain.nk([500.0]).real)
    assert m.nk([350.0]).imag[0] == pytest.approx(0.01, rel=1e-12)
    e1 = HC_EV_NM / 350.0 - 1.0                   # one eV below the band-edge energy: k falls by e²
    assert m.nk([HC_EV_NM / e1]).imag[0] == pytest.approx(0.01 * np.exp(-2.0), rel=1e-12)
    back = material(m.spec())
    np.testing.assert_array_equal(back.nk([400.0, 600.0]), m.nk([400.0, 600.0]))
    with pytest.raises(InputError, match="k_amplitude"):
        CauchyMaterial(1.9, k_amplitude=-0.1)


@pytest.mark.parametrize("desc, words", [
    ({"kind": "sellmeier", "B": [-1.0], "C": [0.01]}, r"B\[0\]: -1 is out of range"),
    ({"kind": "sellmeier", "B": [1.0] * 7, "C": [0.01] * 7}, "give 1 to 6"),
    ({"kind": "sellmeier", "B": [1.0], "C": [-0.01]}, r"C\[0\]: -0.01 µm² is out of range"),
    ({"kind": "sellmeier", "B": [2.0, 1.0], "C": [0.3, 0.001]}, r"C\[0\]: puts a resonance at 547.7 nm"),
    ({"kind": "sellmeier", "B": [2.0, 1.0], "C": [0.05]}, "same, non-zero length"),
])
def test_sellmeier_in_a_stack_file_is_bounded(desc, words):
    from physics.stackfile import stack_from_dict
    doc = {"format": "fringegauge-stack", "version": 1, "ambient": "1.0", "substrate": "Si",
           "layers": [{"material": desc, "thickness_nm": 100.0}]}
    with pytest.raises(InputError, match=words):
        stack_from_dict(doc)


def test_two_term_sellmeier_round_trips_through_a_stack_file():
    """The form of Luke et al., Opt. Lett. 40, 4823 (2015) for Si3N4 (a UV and an infrared term): n(633 nm) as the
    refractiveindex.info main/Si3N4/Luke page gives it (2.0394, its formula 1 with these coefficients)."""
    from physics.stackfile import stack_from_dict, stack_to_dict
    desc = {"kind": "sellmeier", "B": [3.0249, 40314.0], "C": [0.1353406 ** 2, 1239.842 ** 2]}
    st = stack_from_dict({"format": "fringegauge-stack", "version": 1, "ambient": "1.0", "substrate": "Si",
                          "layers": [{"material": desc, "thickness_nm": 100.0}]}).stack
    m = st.layers[0].material
    assert float(m.nk(633.0).real) == pytest.approx(float(material("main/Si3N4/Luke").nk(633.0).real), abs=1e-4)
    back = stack_from_dict(stack_to_dict(st)).stack.layers[0].material
    np.testing.assert_allclose(back.nk(np.linspace(400, 1000, 7)), m.nk(np.linspace(400, 1000, 7)), rtol=1e-14)
