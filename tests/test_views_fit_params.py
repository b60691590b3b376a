"""The spectrum tab's film-parameter table (free or held, start, lowest, highest), driven without a browser.

The measured spectrum is the one of tests/test_views_fit_model.py: a 500 nm silicon-nitride film on silicon made
with the tmm package and the refractiveindex.info page of Luke et al. 2015 (main/Si3N4/Luke), plus seeded noise."""

import re

import pytest

from test_views_fit_model import nitride_csv, section  # noqa: F401  (fixtures)
from views.explorer import FilmExplorer
from views.fit import SpectrumFitSection
from views.fit_film import PARAMS_LINK_KEY, PARAMS_LINK_MAX


def _names(table):
    return [re.sub(r"<[^>]+>.*", "", table.names[i].object) for i, r in enumerate(table.rows) if r.visible]


def test_the_table_follows_the_model_and_keeps_what_was_typed(section):
    t = section.film.params
    assert not t.panel.visible                                   # "fixed constants": nothing to edit
    section.film_model.value = "cauchy"
    assert t.panel.visible and _names(t) == ["Cauchy A", "Cauchy B (µm²)", "Cauchy C (µm⁴)"]
    assert [w.value for w in t.cells[0]] == ["1.95", "1", "4"]    # generic start, the model's range
    t.cells[0][0].value = "2.05"
    section.film_model.value = "tauc-lorentz"
    assert len(_names(t)) == 5 and _names(t)[1] == "Tauc gap Eg (eV)"
    section.film_model.value = "cauchy"
    assert t.cells[0][0].value == "2.05"                         # nothing lost


def test_a_held_parameter_reaches_fit_film_and_the_fit_shows_beside_each_row(section, nitride_csv):
    csv, n633 = nitride_csv
    assert section.load_file("sample", csv, "nitride_invented.csv")
    section.film_model.value = "cauchy"
    t = section.film.params
    t.free[2].value = False                                      # hold C at 0
    t.cells[2][0].value = "0"
    t.cells[0][1].value, t.cells[0][2].value = "1.7", "2.4"      # A between 1.7 and 2.4
    args = section.film.request(section._request())
    assert args["fixed"] == {"C_um4": 0.0} and args["bounds"] == {"A": (1.7, 2.4)}
    assert args["start"] == {"A": 1.95, "B_um2": 0.02}
    assert section.run_fit(sync=True)
    r = section.film.result
    assert r.fixed == ("C_um4",) and r.parameters["C_um4"] == 0.0
    assert r.thickness_nm == pytest.approx(500.0, rel=0.01)
    assert "held at 0" in t.names[2].object and "fit " in t.names[0].object and "±" in t.names[0].object
    assert "held, not fitted" in section.details.object and "(Cauchy C held)" in section.verdict.object
    assert t.from_fit.visible
    t.start_from_fit()
    assert float(t.cells[0][0].value) == pytest.approx(r.parameters["A"], rel=1e-5)
    assert t.cells[2][0].value == "0"                            # a held value stays as typed


@pytest.mark.parametrize("row, col, text, sentence", [
    (0, 1, "abc", "Cauchy A: the lowest “abc” is not a number"),
    (0, 1, "5", "must rise and lie inside the model's range, 1 to 4"),
    (1, 0, "0.5", "Cauchy B: the start 0.5 lies outside lowest -0.02 to highest 0.3"),
])
def test_a_bad_typed_value_gives_a_sentence_and_stays(section, nitride_csv, row, col, text, sentence):
    assert section.load_file("sample", nitride_csv[0], "nitride_invented.csv")
    section.film_model.value = "cauchy"
    t = section.film.params
    t.cells[row][col].value = text
    assert t.message.visible and sentence in t.message.object.replace("&#x27;", "'")
    assert not section.run_fit(sync=True)
    assert "Film model parameters" in section.fit_msg.message.object
    assert t.cells[row][col].value == text


def test_holding_every_parameter_is_refused(section):
    section.film_model.value = "cauchy"
    t = section.film.params
    for box in t.free[:3]:
        box.value = False
    assert "nothing of the film's n and k to fit" in t.message.object


def test_the_edits_travel_in_the_link(section):
    section.film_model.value = "cauchy"
    t = section.film.params
    t.free[2].value = False
    t.cells[2][0].value = "0"
    fields = {f.key: f for f in section.link_fields()}
    text = fields[PARAMS_LINK_KEY].read()
    assert text == "!C_um4=0/-0.002/0.05"
    other = SpectrumFitSection(FilmExplorer())
    o = {f.key: f for f in other.link_fields()}
    assert o["s_model"].write("cauchy") is None and o[PARAMS_LINK_KEY].write(text) is None
    assert not other.film.params.free[2].value and other.film.params.cells[2][0].value == "0"
    why = o[PARAMS_LINK_KEY].write("A=2.1/1/4;Z=1/2/3")           # the bad item is named, the rest applies
    assert "Z=1/2/3" in why and other.film.params.cells[0][0].value == "2.1"
    assert "characters long" in o[PARAMS_LINK_KEY].write("A=" + "1" * PARAMS_LINK_MAX)
    assert fields[PARAMS_LINK_KEY].read() == text                # untouched by the other page
