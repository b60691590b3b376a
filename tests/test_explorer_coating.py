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
