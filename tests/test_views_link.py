"""The page link: every tab's settings and the open tab travel in the address and come back."""

import panel as pn
import pytest

from views.explorer import FilmExplorer
from views.fit import SpectrumFitSection
from views.grating import GratingSection
from views.inverse import ColourToThickness
from views.pagebuild import BuiltOnFirstOpen
from views.urlstate import MAX_LINK_CHARS, PageLink, state_to_query

TITLES = ["Film explorer", "Colour → thickness", "Spectrum → thickness", "Gratings", "Lab library"]


def _page():
    ex = FilmExplorer()
    tabs = {"Colour → thickness": BuiltOnFirstOpen(lambda: ColourToThickness(ex)),
            "Spectrum → thickness": BuiltOnFirstOpen(lambda: SpectrumFitSection(ex)),
            "Gratings": BuiltOnFirstOpen(GratingSection)}
    switcher = pn.Tabs(*[(t, pn.pane.Markdown(t)) for t in TITLES])
    return PageLink(ex, tabs, switcher, TITLES)


@pytest.fixture(scope="module")
def shared():
    """A page with something set on every tab, its link, and a second page that opened the link."""
    link = _page()
    ex, tabs = link.ex, link.tabs
    ex.state.load_preset("thermal_oxide_on_silicon")
    ex._sync_widgets()
    ex.state.thickness_nm = 250.0
    tabs["Colour → thickness"].colour.input.value = "#525a84"
    tabs["Colour → thickness"].nominal.input.value = "240"
    tabs["Spectrum → thickness"].win_hi.input.value = "1500"
    tabs["Spectrum → thickness"].free_scale.value = True
    tabs["Spectrum → thickness"].value_unit.value = "percent"
    tabs["Spectrum → thickness"].film_bandwidth.input.value = "2.5"
    g = tabs["Gratings"]
    g.density.input.value = "600"
    g.order.input.value = "2"
    g.scale.value = "log"
    link.switcher.active = TITLES.index("Gratings")
    query = link.query()
    other = _page()
    return link, query, other, other.apply_link_state(query)


def test_link_brings_back_every_tab_and_the_open_tab(shared):
    link, query, other, errors = shared
    assert errors == []
    assert other.ex.state.thickness_nm == 250.0 and other.ex.state.preset_name == "thermal_oxide_on_silicon"
    assert other.ex.preset.value == "thermal_oxide_on_silicon"          # the menu names the preset, not "(choose…)"
    assert other.tabs["Colour → thickness"].colour.input.value == "#525a84"
    assert other.tabs["Colour → thickness"].nominal.input.value == "240"
    fit = other.tabs["Spectrum → thickness"]
    assert (fit.win_hi.input.value, fit.free_scale.value, fit.value_unit.value) == ("1500", True, "percent")
    assert fit.film_bandwidth.input.value == "2.5"
    g = other.tabs["Gratings"]
    assert g.settings == link.tabs["Gratings"].settings and g.settings.lines_per_mm == 600 and g.settings.order == 2
    assert g.scale.value == "log"
    assert other.switcher.active == TITLES.index("Gratings")
    assert other.query() == query


def test_unchanged_grating_preset_comes_back_by_name():
    link = _page()
    link.tabs["Gratings"].load_preset("optical_disc_track")
    other = _page()
    assert other.apply_link_state(link.query()) == []
    assert other.tabs["Gratings"].preset.value == "optical_disc_track"


def test_tabs_never_opened_add_nothing_to_the_link():
    link = _page()
    q = link.query()
    assert "c_" not in q and "s_" not in q and "g_" not in q and "tab=" not in q
    assert not any(t.built for t in link.tabs.values())


def test_an_explorer_link_made_before_the_other_tabs_still_opens():
    old = _page()
    old.ex.state.thickness_nm = 321.0
    query = state_to_query(old.ex.state).replace("&name=thermal_oxide_on_silicon", "")
    other = _page()
    assert other.apply_link_state(query) == []
    assert other.ex.state.thickness_nm == 321.0


def test_a_preset_name_with_another_stack_is_not_claimed():
    link = _page()
    link.ex.state.load_preset("thermal_oxide_on_silicon")
    q = link.query()
    other = _page()
    other.apply_link_state(q.replace("name=thermal_oxide_on_silicon", "name=silicon_nitride_on_silicon"))
    assert other.ex.preset.value == ""


@pytest.mark.parametrize("extra, words", [
    ("g_lpmm=nan", ["'g_lpmm'", "Groove density", "not a number"]),
    ("g_m=0", ["'g_m'", "Order"]),
    ("g_from=900&g_to=500", ["band", "not applied"]),
    ("c_grey=2", ["'c_grey'", "outside 0 to 1"]),
    ("c_colour=not-a-colour", ["'c_colour'", "Observed colour"]),
    ("s_unit=furlongs", ["'s_unit'", "give one of"]),
    ("s_scale=yes", ["'s_scale'", "1 (ticked)"]),
    ("tab=kitchen", ["'tab'", "gratings"]),
    ("d=abc", ["'d'", "not a finite number"]),
    ("mystery=1", ["does not know", "'mystery'", "ignored"]),
])
def test_bad_link_fields_are_named_and_skipped_never_raised(extra, words):
    link = _page()
    errors = link.apply_link_state("?" + extra)
    assert errors and all(w in " ".join(errors) for w in words), errors


def test_an_over_long_link_is_refused_whole():
    link = _page()
    errors = link.apply_link_state("?d=200&g_lpmm=600&pad=" + "x" * MAX_LINK_CHARS)
    assert len(errors) == 1 and "nothing from it was applied" in errors[0]
    assert link.ex.state.thickness_nm == 100.0 and not link.tabs["Gratings"].built


def test_the_address_follows_a_built_tab():
    link = _page()
    calls = []
    g = link.tabs["Gratings"].get()
    link.follow("Gratings", g, lambda *_: calls.append(1))
    g.density.input.value = "900"
    fit = link.tabs["Spectrum → thickness"].get()
    link.follow("Spectrum → thickness", fit, lambda *_: calls.append(2))
    fit.win_lo.input.value = "10"
    assert calls == [1, 2]


def test_the_explorer_s_coating_and_brightness_settings_travel_only_when_set():
    link = _page()
    plain = link.query()
    assert "bref=" not in plain and "tol=" not in plain and "cct=" not in plain
    st = link.ex.state
    st.param.update(brightness_reference=[r for r in st.param.brightness_reference.objects
                                          if r != st.param.brightness_reference.default][0],
                    normalize_min_nm=85.0, normalize_max_nm=105.0, thickness_scale_pct=-3.0,
                    band_min_nm=420.0, band_max_nm=680.0, tolerance_pct=5.0, tolerance_trials=300,
                    lamp_cct_k=3200.0,
                    spectrum_view=[v for v in st.param.spectrum_view.objects if v != st.param.spectrum_view.default][0])
    other = _page()
    assert other.apply_link_state(link.query()) == []
    names = ("brightness_reference", "normalize_min_nm", "normalize_max_nm", "thickness_scale_pct", "band_min_nm",
             "band_max_nm", "spectrum_view", "tolerance_pct", "tolerance_trials", "lamp_cct_k")
    assert {n: getattr(other.ex.state, n) for n in names} == {n: getattr(st, n) for n in names}


def test_the_colour_reading_and_wafer_settings_travel():
    link = _page()
    colour = link.tabs["Colour → thickness"].get()
    colour.reading.reading = "calibrated camera" if "calibrated camera" in colour.reading.param.reading.objects \
        else colour.reading.param.reading.objects[-2]
    wafer = colour.tools.settings
    wafer.param.update(diameter_mm=200.0, edge_exclusion_mm=5.0, pattern=49)
    other = _page()
    assert other.apply_link_state(link.query()) == []
    back = other.tabs["Colour → thickness"].get()
    assert (back.reading.reading, back.reading.reading_error_de) == (colour.reading.reading,
                                                                     colour.reading.reading_error_de)
    w = back.tools.settings
    assert (w.diameter_mm, w.edge_exclusion_mm, w.pattern) == (200.0, 5.0, 49)


def test_a_bad_wafer_field_in_a_link_is_named_and_skipped():
    other = _page()
    errors = other.apply_link_state("?c_edge=-4&c_sites=7&c_error=nan")
    assert len(errors) == 3, errors
    assert any("'c_edge'" in e and "Edge exclusion" in e for e in errors)
    assert any("'c_sites'" in e and "49" in e for e in errors)
    assert any("'c_error'" in e and "number" in e for e in errors)
    w = other.tabs["Colour → thickness"].get().tools.settings
    assert w.edge_exclusion_mm == w.param.edge_exclusion_mm.default and w.pattern == w.param.pattern.default
