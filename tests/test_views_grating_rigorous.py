"""The grating section's rigorous efficiency curve, driven from its objects without a browser."""

from dataclasses import replace

import numpy as np
import pytest

from physics import grating as gr
from views.grating import RIGOROUS_SAMPLES, GratingSection, compute_rigorous


def _cheap(section):
    """A transparent lamellar grating over a short band: a curve in about a second."""
    section.settings = replace(section.settings, lines_per_mm=600.0, groove="lamellar", duty_cycle=0.5,
                               incidence_deg=10.0, band_lo_nm=500.0, band_hi_nm=700.0, order=1, kind="reflection")
    section.refresh()
    section.rig_profile.value = "lamellar"
    section.rig_material.value = "SiO2"
    section.rig_depth.value = "120"


@pytest.fixture(scope="module")
def computed():
    g = GratingSection()
    _cheap(g)
    assert g.rigorous is None and len(g.rig_src.data["wl"]) == 0   # nothing is computed before the button
    assert g.compute_rigorous(sync=True)
    return g


def test_curves_equal_physics(computed):
    g = computed
    s, r = g.shown, g.rigorous
    wl = np.linspace(500.0, 700.0, RIGOROUS_SAMPLES)
    np.testing.assert_allclose(g.rig_src.data["wl"], wl)
    kw = dict(profile="lamellar", depth_nm=120.0, duty_cycle=0.5, material="SiO2")
    te = gr.rigorous_efficiency(wl, 600.0, 1, 10.0, polarization="TE", **kw)
    tm = gr.rigorous_efficiency(wl, 600.0, 1, 10.0, polarization="TM", **kw)
    np.testing.assert_allclose(g.rig_src.data["te"], te)
    np.testing.assert_allclose(g.rig_src.data["tm"], tm)
    np.testing.assert_allclose(g.rig_src.data["unpolarized"], 0.5 * (te + tm))
    np.testing.assert_allclose(g.rig_src.data["scalar"], gr.groove_efficiency(wl, 600.0, 1, "lamellar", 0.5,
                                                                              incidence_deg=10.0) * np.ones_like(wl))
    assert s.lines_per_mm == 600.0 and r["orders_te"] >= 17


def test_rayleigh_lines_and_trust_text(computed):
    g = computed
    # d = 1667 nm, α = 10°: order +3 goes grazing at d(1 + sin α)/3 = 652 nm and order −2 at
    # d(1 − sin α)/2 = 689 nm (by hand), both in the band; order −1 at 1377 nm is outside it.
    lams = [gr.rayleigh_wavelength_nm(600.0, k, 10.0) for k in (-2, 3)]
    assert all(500 <= x <= 700 for x in lams) and gr.rayleigh_wavelength_nm(600.0, -1, 10.0) > 700
    assert g.rig_ray_src.data["x"] == pytest.approx(lams)
    assert g.rig_ray_src.data["label"] == ["Rayleigh (order -2)", "Rayleigh (order +3)"]
    text = g.rig_text.object
    assert "d/λ &lt; 3" in text and "common practice" in text and "Fourier orders for TE" in text
    assert " for TM" in text
    # d = 1667 nm: d/λ = 3 at 556 nm, so the shaded span starts there
    assert g.rig_trust_src.data["left"] == pytest.approx([1e6 / 600 / 3])


def test_changed_settings_mark_the_curve_stale(computed):
    g = computed
    g.settings = replace(g.settings, incidence_deg=12.0)
    g.refresh()
    assert "press the button again" in g.rig_text.object
    g.settings = replace(g.settings, incidence_deg=10.0)
    g.refresh()
    assert "press the button again" not in g.rig_text.object


def test_bad_depth_and_material_give_sentences():
    g = GratingSection()
    g.rig_depth.value = "deep"
    assert not g.compute_rigorous(sync=True)
    assert "not a number" in g.rig_status.object and g.rigorous is None
    g.rig_depth.value = "-3"
    assert not g.compute_rigorous(sync=True)
    assert "outside" in g.rig_status.object
    # a metal transmission grating means nothing: the physics sentence is shown, nothing crashes
    g.settings = replace(g.settings, kind="transmission")
    g.refresh()
    g.rig_depth.value = ""
    assert g.compute_rigorous(sync=True)
    assert "transparent material" in g.rig_status.object and not g.rig_button.disabled


def test_compute_function_reports_progress():
    seen = []

    class Channel:
        def report(self, fraction, text):
            seen.append((fraction, text))

    g = GratingSection()
    _cheap(g)
    s = replace(g.shown, band_lo_nm=600.0, band_hi_nm=610.0)
    out = compute_rigorous(s, "lamellar", 120.0, "SiO2", Channel())
    assert [f for f, _ in seen] == [0.0, 0.5, 1.0] and out["rayleigh"] == []
    assert "stops being trustworthy" not in out["trust"] and "not to be trusted" in out["trust"]


# ---------------------------------------------------------------------- the planner's ranking
def _cheap_plan():
    """The default preset's planner (three designs) with a cheap groove: lamellar glass, 120 nm."""
    g = GratingSection()
    g.rig_profile.value = "lamellar"
    g.rig_material.value = "SiO2"
    g.rig_depth.value = "120"
    assert len(g.plan) >= 2
    return g


def test_planner_ranks_designs_by_rigorous_band_efficiency():
    g = _cheap_plan()
    assert "Best resolution first" in g.plan_html.object and "rigorous efficiency (band mean" in g.plan_html.object
    assert g.rank_plan(sync=True)
    eff, s = g.plan_efficiency, g.shown
    assert eff["computed"] == eff["total"] == len(g.plan)
    for d in g.plan:                                     # each figure is the physics function's
        ref = gr.band_efficiency(s.band, d.lines_per_mm, d.order, d.incidence_deg, profile="lamellar",
                                 depth_nm=120.0, duty_cycle=s.duty_cycle, material="SiO2", kind=s.kind)
        assert eff["rigorous"][(d.lines_per_mm, d.order)] == pytest.approx(ref, abs=1e-12)
    shown, ranking, _ = g._plan_ranking()
    values = [ranking["rigorous"][(d.lines_per_mm, d.order)] for d in shown]
    assert values == sorted(values, reverse=True)
    assert f"for the {len(g.plan)} of {len(g.plan)} designs" in g.plan_html.object
    assert f"<b>{values[0]:.3f}</b>" in g.plan_html.object
    g.rig_material.value = "Al"                          # another groove: the ranking no longer applies
    assert "Best resolution first" in g.plan_html.object


def test_planner_computes_a_bounded_number_rigorously(monkeypatch):
    import views.grating as vg
    monkeypatch.setattr(vg, "PLAN_RIGOROUS_MAX", 1)
    g = _cheap_plan()
    assert g.rank_plan(sync=True)
    eff = g.plan_efficiency
    assert eff["computed"] == 1 and len(eff["rigorous"]) == 1
    best_scalar = max(eff["scalar"], key=eff["scalar"].get)
    assert list(eff["rigorous"]) == [best_scalar]        # the best scalar estimate is the one solved
    rest = len(g.plan) - 1
    assert f"the other {rest} follow by their scalar estimate" in g.plan_html.object
    shown, _, scalar = g._plan_ranking()                  # the solved one first, the rest by their scalar estimate
    assert (shown[0].lines_per_mm, shown[0].order) == best_scalar
    rest_scalar = [scalar[(d.lines_per_mm, d.order)] for d in shown[1:]]
    assert rest_scalar == sorted(rest_scalar, reverse=True)


def test_planner_ranking_refuses_a_bad_groove_with_a_sentence():
    g = GratingSection()
    g.rig_depth.value = "deep"
    assert not g.rank_plan(sync=True)
    assert "not a number" in g.plan_status.object and g.plan_efficiency is None


# ---------------------------------------------------------------------- links and files
def test_rigorous_settings_travel_in_the_link():
    a = GratingSection()
    a.apply_rigorous({"profile": "sinusoidal", "depth_nm": 150.0, "material": "Au", "polarization": "TM"})
    items = a.link_state()
    assert (items["g_rprofile"], items["g_rdepth"], items["g_rmat"], items["g_rpol"]) == ("sinusoidal", "150", "Au",
                                                                                          "TM")
    b = GratingSection()
    assert b.apply_link_state(items) == []
    assert b.rigorous_dict() == a.rigorous_dict() and b.rig_depth.value == "150"
    errors = b.apply_link_state({"g_rprofile": "zigzag", "g_rdepth": "-5", "g_rmat": "Pt", "g_rpol": "circular"})
    assert len(errors) == 4 and all("was not applied" in e for e in errors)
    assert b.rigorous_dict() == a.rigorous_dict()        # nothing bad was taken
    assert b.apply_link_state({"g_rdepth": ""}) == [] and b.rigorous_state.depth_nm is None


def test_rigorous_settings_travel_in_the_grating_file():
    from physics.gratingfile import load_grating_file
    a = GratingSection()
    a.apply_rigorous({"profile": "lamellar", "depth_nm": 80.0, "material": "Ag", "polarization": "TE"})
    text = a.file_text()
    assert load_grating_file(text).rigorous == a.rigorous_dict()
    b = GratingSection()
    b.load_file_text(text)
    assert b.rigorous_dict() == a.rigorous_dict()
    b.load_preset("optical_disc_track")                  # a file without the object keeps the page's choice
    assert b.rigorous_dict() == a.rigorous_dict()
    b.load_preset("compact_spectrometer_1200_blazed")    # the preset carries its groove
    assert b.rigorous_dict() == {"profile": "blazed", "depth_nm": None, "material": "Al",
                                 "polarization": "unpolarized"}
