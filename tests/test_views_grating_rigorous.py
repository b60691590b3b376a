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

