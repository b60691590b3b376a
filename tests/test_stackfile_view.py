"""Stack files keep every lamp and polarizer setting of the page (saving must not lose them)."""

import json

import numpy as np
import pytest

from physics.errors import InputError
from physics.stackfile import ILLUMINANTS, VIEW_DEFAULTS, dump_stack_file, load_stack_file, stack_from_dict
from physics.stack import Layer, Stack
from views.state import ILLUMINANT_CHOICES, ExplorerState


def _doc(**view):
    return {"format": "fringegauge-stack", "version": 1, "ambient": "air",
            "layers": [{"material": "SiO2", "thickness_nm": 100.0}], "substrate": "Si", "view": view}


def test_every_lamp_of_the_page_can_be_written():
    assert set(ILLUMINANT_CHOICES) <= set(ILLUMINANTS)


@pytest.mark.parametrize("lamp", [k for k in ILLUMINANT_CHOICES if k != "custom"])
def test_the_page_saves_and_reloads_its_lamp(lamp):
    s = ExplorerState()
    s.load_preset("thermal_oxide_on_silicon")
    s.illuminant = lamp
    s.lamp_cct_k = 2700.0
    back = ExplorerState()
    back.load(load_stack_file(s.file_text()))
    assert back.illuminant == lamp and back.lamp_text() == s.lamp_text()


def test_a_measured_lamp_and_the_polarizers_survive_a_save():
    s = ExplorerState()
    s.load_preset("thermal_oxide_on_silicon")
    s.set_spd(np.arange(380.0, 781.0, 10.0), np.linspace(1.0, 2.0, 41))
    s.polarizer, s.polarizer_deg, s.analyzer, s.analyzer_deg = "linear", 45.0, "angle", -30.0
    back = ExplorerState()
    back.load(load_stack_file(s.file_text()))
    assert back.illuminant == "custom" and back.spd_json == s.spd_json
    assert (back.polarizer, back.polarizer_deg, back.analyzer, back.analyzer_deg) == ("linear", 45.0, "angle", -30.0)


def test_files_without_the_new_fields_read_with_defaults():
    sf = stack_from_dict(_doc(illuminant="F11"))
    assert sf.view["polarizer"] == "none" and sf.view["lamp_spectrum"] is None
    assert sf.view["lamp_cct_k"] == VIEW_DEFAULTS["lamp_cct_k"]


@pytest.mark.parametrize("view, words", [
    ({"illuminant": "custom"}, "view.lamp_spectrum: missing"),
    ({"illuminant": "custom", "lamp_spectrum": [[400, 550, 700], [1, 1]]}, "one power per wavelength"),
    ({"illuminant": "custom", "lamp_spectrum": [[450, 600], [1, 1]]}, "400-700 nm"),
    ({"illuminant": "custom", "lamp_spectrum": "warm"}, "[[wavelengths in nm], [relative powers]]"),
    ({"lamp_spectrum": [list(range(3000)), [1] * 3000]}, "2 to 2000"),
    ({"lamp_cct_k": 50.0}, "view.lamp_cct_k"),
    ({"polarizer": "circular"}, "view.polarizer"),
    ({"analyzer_deg": 400}, "view.analyzer_deg"),
    ({"illuminant": "sodium"}, "view.illuminant"),
])
def test_bad_lamp_and_polarizer_fields_are_sentences(view, words):
    with pytest.raises(InputError) as e:
        stack_from_dict(_doc(**view))
    assert words in str(e.value)


def test_a_written_custom_lamp_reads_back_to_the_same_data():
    view = {"illuminant": "custom", "lamp_spectrum": [[380.0, 550.0, 780.0], [0.5, 1.0, 0.7]]}
    text = dump_stack_file(Stack([Layer("SiO2", 100.0)], substrate="Si"), view=view)
    assert json.loads(text)["view"]["lamp_spectrum"] == view["lamp_spectrum"]
    assert load_stack_file(text).view["lamp_spectrum"] == view["lamp_spectrum"]
