"""The gratings tab's planner ranked by rigorous efficiency, and the rigorous settings in links and files."""

import pytest

from physics import grating as gr
from views.grating import GratingSection


# ---------------------------------------------------------------------- the planner's ranking
@pytest.fixture(scope="module")
def one():
    """One section for the whole file (building one costs seconds); each test sets what it needs."""
    return GratingSection()


@pytest.fixture(scope="module")
def two():
    """A second section, the receiving end of links and files."""
    return GratingSection()


def _cheap_plan(g):
    """The default preset's planner (three designs) with a cheap groove: lamellar glass, 120 nm."""
    g.load_preset("compact_spectrometer_1200_blazed")
    g.plan_efficiency = None
    g.rig_profile.value = "lamellar"
    g.rig_material.value = "SiO2"
    g.rig_depth.value = "120"
    assert len(g.plan) >= 2
    return g


def test_planner_ranks_designs_by_rigorous_band_efficiency(one):
    g = _cheap_plan(one)
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


def test_planner_computes_a_bounded_number_rigorously(one, monkeypatch):
    import views.grating as vg
    monkeypatch.setattr(vg, "PLAN_RIGOROUS_MAX", 1)
    g = _cheap_plan(one)
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


def test_planner_ranking_refuses_a_bad_groove_with_a_sentence(one):
    g = _cheap_plan(one)
    g.rig_depth.value = "deep"
    assert not g.rank_plan(sync=True)
    assert "not a number" in g.plan_status.object and g.plan_efficiency is None
    g.rig_depth.value = "120"


# ---------------------------------------------------------------------- links and files
def test_rigorous_settings_travel_in_the_link(one, two):
    a = one
    a.apply_rigorous({"profile": "sinusoidal", "depth_nm": 150.0, "material": "Au", "polarization": "TM"})
    items = a.link_state()
    assert (items["g_rprofile"], items["g_rdepth"], items["g_rmat"], items["g_rpol"]) == ("sinusoidal", "150", "Au",
                                                                                          "TM")
    b = two
    assert b.apply_link_state(items) == []
    assert b.rigorous_dict() == a.rigorous_dict() and b.rig_depth.value == "150"
    errors = b.apply_link_state({"g_rprofile": "zigzag", "g_rdepth": "-5", "g_rmat": "Pt", "g_rpol": "circular"})
    assert len(errors) == 4 and all("was not applied" in e for e in errors)
    assert b.rigorous_dict() == a.rigorous_dict()        # nothing bad was taken
    assert b.apply_link_state({"g_rdepth": ""}) == [] and b.rigorous_state.depth_nm is None


def test_rigorous_settings_travel_in_the_grating_file(one, two):
    from physics.gratingfile import load_grating_file
    a = one
    a.apply_rigorous({"profile": "lamellar", "depth_nm": 80.0, "material": "Ag", "polarization": "TE"})
    text = a.file_text()
    assert load_grating_file(text).rigorous == a.rigorous_dict()
    b = two
    b.load_file_text(text)
    assert b.rigorous_dict() == a.rigorous_dict()
    b.load_preset("optical_disc_track")                  # a file without the object keeps the page's choice
    assert b.rigorous_dict() == a.rigorous_dict()
    b.load_preset("compact_spectrometer_1200_blazed")    # the preset carries its groove
    assert b.rigorous_dict() == {"profile": "blazed", "depth_nm": None, "material": "Al",
                                 "polarization": "unpolarized"}
