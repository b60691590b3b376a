"""The film explorer for coatings: brightness reference, adding layers, coating read-outs."""

import numpy as np
import pytest

from physics.color import xyz_to_lab
from views.explorer import FilmExplorer
from views.state import compute_strip, brightness_scale


@pytest.fixture()
def ar():
    ex = FilmExplorer()
    ex.preset.value = "broadband_ar_on_bk7"
    return ex


def test_brightest_white_on_the_strip_shows_a_dark_coating_s_hue(ar):
    dark = ar._point.lab[0]
    ar.brightness.value = "normalized"
    assert ar.state.brightness_reference == "strip"
    ar.norm_lo.input.value = "85"
    ar.norm_hi.input.value = "105"
    # the brightest strip colour inside 85-105 nm is white: the design point's residual becomes visible
    st = compute_strip(ar.state)
    inside = (st.thickness_nm >= 85) & (st.thickness_nm <= 105)
    assert ar._scale == pytest.approx(1.0 / st.xyz[inside, 1].max())
    assert ar._point.lab[0] > dark + 30
    assert "85–105 nm" in ar.bright_note.object and "85–105 nm" in ar.map_fig.title.text
    assert "85–105 nm" in ar.swatch.object
    # the map is recoloured with the same factor
    assert np.allclose(ar._map.lab, xyz_to_lab(ar._map.xyz * ar._scale))


def test_the_whole_map_reference_keeps_the_old_meaning(ar):
    ar.brightness.value = "normalized"
    ar.bright_ref.value = "map"
    assert ar._scale == pytest.approx(1.0 / ar._map.xyz[..., 1].max())
    assert "whole map" in ar.bright_note.object
    assert not ar.norm_lo.input.visible


def test_a_new_angle_rescales_with_the_strip_reference(ar):
    ar.brightness.value = "normalized"
    before = ar._scale
    ar.angle_slider.value = 60.0
    assert ar._scale != before
    assert ar._scale == pytest.approx(brightness_scale(ar.state, ar._map, compute_strip(ar.state)))


def test_adding_a_layer_keeps_the_swept_layer():
    ex = FilmExplorer()
    ex.preset.value = "nitride_on_oxide_on_silicon"
    ex.swept.value = 1
    thickness = ex.state.thickness_nm
    ex.add_layer.clicks += 1
    assert ex.state.swept_layer == 1 and ex.state.thickness_nm == thickness
    assert len(ex.state.layer_rows()) == 3 and ex.swept.value == 1


def test_luminous_reflectance_is_d65_photopic_weighting():
    # V(λ) is the CIE 1931 ȳ(λ) (CIE 015:2018, sec. 7.1), so under D65 the luminous reflectance equals Y
    from physics import spectrum_to_xyz
    from physics.color import luminous_reflectance
    wl = np.arange(380.0, 781.0, 5.0)
    R = 0.02 + 0.01 * np.cos(wl / 40.0)
    assert luminous_reflectance(R, wl) == pytest.approx(spectrum_to_xyz(R, wl)[1], rel=1e-6)
    assert luminous_reflectance(np.full(wl.size, 0.3), wl) == pytest.approx(0.3)


def test_coating_readouts_and_views(ar):
    pt = ar._point
    assert 0 < pt.luminous_R < 0.005 and pt.band_R < 0.005 and pt.band_T > 0.99
    assert "luminous R" in ar.readouts.object and "420–680 nm" in ar.readouts.object
    ar.spec_view.value = "zoom"
    # fitted to R over the read-out band (420-680 nm), where this design leaves under 1 %
    assert ar.state.spectrum_view == "zoom" and ar.spec_fig.y_range.end < 1.0 and not ar.line_T.visible
    ar.spec_view.value = "log"
    assert ar.log_fig.visible and not ar.spec_fig.visible
    assert ar.log_fig.y_range.start < pt.R.min() * 100
    ar.band_lo.input.value = "500"
    ar.band_hi.input.value = "600"
    assert "500–600 nm" in ar.readouts.object


def test_band_average_of_a_bare_glass_surface():
    # a single uncoated face: R = ((n-1)/(n+1))² at normal incidence (Fresnel); BK7 n_d = 1.5168 (Schott data
    # sheet, recalled from memory)
    from physics import Stack
    from physics.appearance import band_average
    R, T = band_average(Stack([], "BK7", ambient=1.0), (500.0, 600.0))
    assert R == pytest.approx(((1.517 - 1) / (1.517 + 1)) ** 2, rel=0.02) and R + T == pytest.approx(1.0)


def test_whole_stack_thickness_error_scales_every_layer(ar):
    before = [l.thickness_nm for l in ar.state.stack.layers]
    ar.stack_scale.input.value = "3"
    after = [l.thickness_nm for l in ar.state.stack.layers]
    assert after == pytest.approx([1.03 * t for t in before])
    assert "103 % of nominal" in ar.readouts.object
    assert ar._map.thickness_nm[-1] == ar.state.thickness_max_nm          # the map's axis stays nominal
    assert '"thickness_nm": 94.5' in ar.state.file_text()                # a saved file keeps the nominal stack
    ar.stack_scale.input.value = "90"
    assert ar.state.thickness_scale_pct == 3 and ar.stack_scale.message.visible


def test_tolerance_run_is_seeded_and_bounded(ar):
    from physics.appearance import tolerance_run, MAX_TOLERANCE_TRIALS
    from physics import InputError
    a = tolerance_run(ar.state.stack, 3.0, 50, seed=7)
    b = tolerance_run(ar.state.stack, 3.0, 50, seed=7)
    assert np.array_equal(a.delta_e, b.delta_e) and np.all(np.abs(a.factors - 1) <= 0.03)
    assert np.allclose(a.lab_absolute, a.lab)                  # at brightness 1 both are the same colours
    brighter = tolerance_run(ar.state.stack, 3.0, 50, seed=7, scale=10.0)
    assert np.allclose(brighter.lab_absolute, a.lab) and brighter.lab[0, 0] > a.lab[0, 0]
    assert tolerance_run(ar.state.stack, 0.0, 5).delta_e.max() == pytest.approx(0.0, abs=1e-9)
    with pytest.raises(InputError):
        tolerance_run(ar.state.stack, 3.0, MAX_TOLERANCE_TRIALS + 1)
    ar.tol_pct.input.value = "3"
    ar.tol_trials.input.value = "40"
    ar.run_tolerance()
    assert "40 stacks" in ar.tol_out.object and "ΔE00 from nominal" in ar.tol_out.object
    assert "a* " in ar.tol_out.object and "b* " in ar.tol_out.object
    ar.angle_slider.value = 10.0
    assert "run it again" in ar.tol_out.object


def test_a_tolerance_run_too_large_is_refused_with_what_to_change():
    from physics import InputError, Stack
    from physics.appearance import tolerance_run
    thick = Stack([("SiO2", 90_000.0)] * 12, "Si")
    with pytest.raises(InputError, match="fewer trials"):
        tolerance_run(thick, 5.0, 1000, na=0.5)
