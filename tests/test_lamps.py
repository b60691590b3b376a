"""Lamps: CIE codes with their words, white LEDs, a halogen at a chosen temperature, the lithography yellow light."""

import numpy as np
import pytest

from physics.color import (LED_ILLUMINANTS, illuminant_white_xyz, lamp_label, planck_spd,
                           yellow_filter_transmittance)
from views.explorer import FilmExplorer
from views.state import ILLUMINANT_CHOICES, ExplorerState


def test_old_lamp_codes_still_work_and_read_with_words():
    for code in ("D65", "D50", "A", "F2", "F11", "custom"):
        assert code in ILLUMINANT_CHOICES
    assert lamp_label("F11") == "F11 tri-band fluorescent"
    assert lamp_label("A").startswith("A incandescent")
    ex = FilmExplorer()
    assert "F2 cool-white fluorescent" in ex.illuminant.options


def test_white_leds_come_from_colour_science():
    # CIE 015:2018 gives LED-B3 a CCT of about 4100 K (recalled from memory): its white is near the
    # Planck radiator of that temperature
    assert all(k in ILLUMINANT_CHOICES for k in LED_ILLUMINANTS)
    w = illuminant_white_xyz("LED-B3")
    p = illuminant_white_xyz(planck_spd(4103.0))
    xy = lambda v: v[:2] / v.sum()                             # noqa: E731
    assert np.allclose(xy(w), xy(p), atol=0.01)


def test_planck_radiator_at_2856_k_is_illuminant_a():
    # CIE 015:2018 defines illuminant A as a Planck radiator at 2856 K (c2 = 1.4388e-2 m K)
    assert np.allclose(illuminant_white_xyz(planck_spd(2856.0)), illuminant_white_xyz("A"), atol=2e-4)


def test_halogen_on_the_page_follows_its_temperature():
    ex = FilmExplorer()
    ex.illuminant.value = "A"
    a_hex = ex._point.hex
    ex.illuminant.value = "halogen"
    assert ex.lamp_k.input.visible
    ex.lamp_k.input.value = "2856"
    assert ex._point.hex == a_hex and "halogen 2856 K" in ex.swatch.object
    ex.lamp_k.input.value = "200"
    assert ex.state.lamp_cct_k == 2856 and ex.lamp_k.message.visible


def test_yellow_light_has_no_blue():
    wl = np.array([420.0, 460.0, 530.0, 600.0])
    t = yellow_filter_transmittance(wl)
    assert t[0] < 1e-4 and t[1] < 2e-3 and t[2] > 0.99 and t[3] > 0.999
    w = illuminant_white_xyz("YELLOW")
    assert w[2] < 0.1 * illuminant_white_xyz("F2")[2]
    s = ExplorerState()
    s.load_preset("thermal_oxide_on_silicon")
    s.illuminant = "YELLOW"
    assert "Yellow room" in s.lamp_text()
