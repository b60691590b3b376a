"""The film explorer built and driven from its param state, without a browser."""

import csv
import io
import json

import numpy as np
import param
import pytest
from PIL import Image

from physics import Stack, spectrum_to_xyz, xyz_to_srgb, srgb_to_hex
from physics.appearance import colour_band_nm
from physics.stackfile import list_presets, load_preset
from views.explorer import FilmExplorer
from views.state import ExplorerState, compute_point


@pytest.fixture(scope="module")
def explorer():
    return FilmExplorer()


def _physics_hex(stack: Stack, angle: float = 0.0, illuminant="D65", observer="2") -> str:
    wl = colour_band_nm(stack)
    xyz = spectrum_to_xyz(stack.reflectance(wl, angle), wl, illuminant, observer)
    return srgb_to_hex(xyz_to_srgb(xyz, illuminant, observer))


@pytest.mark.parametrize("stem", [stem for stem, _ in list_presets()])
def test_preset_swatch_matches_physics(stem):
    ex = FilmExplorer()
    ex.preset.value = stem
    sf = load_preset(stem)
    assert ex.state.stack_json and ex._point.hex == _physics_hex(sf.stack, sf.view["angle_deg"], sf.view["illuminant"],
                                                                    sf.view["observer"])
    assert ex.swatch.object.count(ex._point.hex) >= 2
    assert ex.map_src.data["image"][0].shape == (91, 400)


def test_thickness_slider_changes_swatch(explorer):
    explorer.thickness_slider.value = 250.0
    assert explorer.state.thickness_nm == 250.0
    assert explorer._point.hex == _physics_hex(explorer.state.stack)
    assert explorer.vspan.location == 250.0


@pytest.mark.parametrize("which", ["thickness", "angle"])
def test_resting_value_handled_before_the_running_value_still_lands_in_the_field(which):
    # the browser sends a slider's resting value beside its running value; they may be handled either way round
    ex = FilmExplorer()
    slider, field = (ex.thickness_slider, ex.thickness) if which == "thickness" else (ex.angle_slider, ex.angle)
    target = 130.0 if which == "thickness" else 30.0
    with param.edit_constant(slider):
        slider.value_throttled = target
    assert (ex.state.thickness_nm if which == "thickness" else ex.state.angle_deg) == target
    assert float(field.input.value) == target
    slider.value = target                           # the running value arriving afterwards changes nothing
    assert float(field.input.value) == target


@pytest.mark.parametrize("text", ["abc", "-5", "1e9", "nan", ""])
def test_bad_thickness_text_keeps_state_and_shows_message(text):
    ex = FilmExplorer()
    before = ex.state.thickness_nm
    ex.thickness.input.value = text
    assert ex.state.thickness_nm == before
    assert ex.thickness.message.visible and "Thickness" in ex.thickness.message.object
    ex.thickness.input.value = "123.5"
    assert ex.state.thickness_nm == 123.5 and not ex.thickness.message.visible


@pytest.mark.parametrize("text", ["95", "-1", "x"])
def test_bad_angle(text):
    ex = FilmExplorer()
    ex.angle.input.value = text
    assert ex.state.angle_deg == 0.0 and ex.angle.message.visible


def test_url_round_trip_restores_the_state():
    """The page address carries the state."""
    from views.urlstate import URL_KEYS, apply_query, state_to_query

    ex = FilmExplorer()
    ex.preset.value = "nitride_on_oxide_on_silicon"
    ex.state.param.update(angle_deg=33.0, thickness_nm=77.0, illuminant="F11", observer="10", na=0.2,
                          brightness="normalized", swept_layer=1)
    query = state_to_query(ex.state)
    assert "stack=" in query and "angle=33" in query
    fresh = ExplorerState()
    assert apply_query(fresh, query) == []
    for name in URL_KEYS:
        assert getattr(fresh, name) == getattr(ex.state, name), name
    assert compute_point(fresh).hex == compute_point(ex.state).hex


@pytest.mark.parametrize("query, key", [("?stack=garbage", "stack"), ("?angle=95", "angle"), ("?obs=7", "obs"),
                                        ("?d=-3", "d"), ("?pol=circular", "pol"), ("?layer=x", "layer")])
def test_bad_link_fields_are_reported_and_skipped(query, key):
    from views.urlstate import apply_query

    s = ExplorerState()
    before = s.param.values()
    errors = apply_query(s, query)
    assert len(errors) == 1 and f"'{key}'" in errors[0]
    assert s.param.values() == before


def test_malformed_stack_file_changes_nothing():
    ex = FilmExplorer()
    before = ex.state.param.values()
    for content in (b"{not json", b'{"format": "fringegauge-stack", "version": 1, "layers": [], "bogus": 1}',
                    b'{"format": "fringegauge-stack", "version": 1, "layers": [{"material": "unobtainium", '
                    b'"thickness_nm": 5}], "substrate": "Si"}', b"\xff\xfe\x00"):
        ex.file_in.receive("bad.json", content, "application/json")
        assert ex.file_msg.message.visible
        assert ex.state.param.values() == before


def test_save_and_load_round_trip():
    ex = FilmExplorer()
    ex.preset.value = "broadband_ar_on_bk7"
    ex.state.angle_deg = 12.0
    saved = ex._stack_file_bytes().getvalue()
    other = FilmExplorer()
    other.file_in.receive("saved.json", saved.encode(), "application/json")
    assert not other.file_msg.message.visible
    assert other.preset.value == ""                 # the preset list no longer names the stack shown
    assert other._point.hex == ex._point.hex
    assert json.loads(other.state.stack_json)["layers"] == json.loads(ex.state.stack_json)["layers"]


def test_layer_editing():
    ex = FilmExplorer()
    ex._on_add_layer()
    assert len(ex.state.layer_rows()) == 2 and ex.state.swept_layer == 0        # the swept layer stays
    ex._on_layer_action(1, "dup")
    assert len(ex.state.layer_rows()) == 3
    ex._on_layer_action(2, "up")
    ex._on_layer_action(0, "del")
    assert len(ex.state.layer_rows()) == 2
    row = ex.layers_box.objects[0]
    mat = row.objects[0].objects[0]
    mat.value = "Si3N4"
    assert ex.state.layer_rows()[0]["material"] == "Si3N4"
    mat.value = "kryptonite"
    assert ex.state.layer_rows()[0]["material"] == "Si3N4"
    assert row.objects[1].visible and "Unknown material" in row.objects[1].object
    mat.value = "1.7+0.01i"
    assert ex.state.layer_rows()[0]["material"] == {"kind": "constant", "n": 1.7, "k": 0.01}
    bad_k = "1.5-0.1i"
    mat.value = bad_k
    assert "k" in row.objects[1].object


def test_downloads_open_and_parse():
    ex = FilmExplorer()
    text = ex._spectrum_csv().getvalue()
    rows = [r for r in csv.reader(io.StringIO(text)) if r and not r[0].startswith("#")]
    assert rows[0][0] == "wavelength_nm" and len(rows) > 300
    assert abs(float(rows[1][0]) - 300.0) < 1e-9
    for fn in (ex._map_png, ex._strip_png):
        img = Image.open(fn())
        assert img.format == "PNG" and img.size[0] >= 600


def test_custom_lamp_spectrum():
    ex = FilmExplorer()
    wl = np.arange(380, 781, 5)
    content = "wavelength,power\n" + "\n".join(f"{w},{1.0 + 0.001 * w}" for w in wl)
    ex.spd_in.receive("lamp.csv", content.encode(), "text/csv")
    assert ex.state.illuminant == "custom" and not ex.spd_msg.message.visible
    ex.spd_in.receive("lamp.csv", b"one,two\nthree,four", "text/csv")
    assert ex.spd_msg.message.visible and ex.state.illuminant == "custom"


def test_a_refused_lamp_or_stack_file_is_named_in_its_message():
    ex = FilmExplorer()
    before = ex.state.param.values()
    ex.spd_in.receive("narrow.csv", b"500,1\n510,1\n520,1\n530,1\n540,1\n", "text/csv")
    assert "narrow.csv: The lamp spectrum covers 500-540 nm" in ex.spd_msg.message.object
    ex.spd_in.receive("long.csv", b"500,1\n" * 30_000, "text/csv")
    assert "long.csv: The lamp spectrum file has more than 20,000 lines" in ex.spd_msg.message.object
    ex.file_in.receive("bad.json", b"{not json", "application/json")
    assert "bad.json: The file is not valid JSON" in ex.file_msg.message.object
    assert ex.state.param.values() == before


def test_a_stack_file_the_page_could_not_keep_is_refused_and_changes_nothing():
    """Materials written out as the page stores them can outgrow the file they came from (here 0.87 MB of
    tables become 1.1 MB): such a file is refused whole instead of leaving a stack that no longer reads."""
    rows = 10_000
    table = {"kind": "table", "wavelength_nm": [300 + 0.07 * i for i in range(rows)], "n": [1.5] * rows}
    text = json.dumps({"format": "fringegauge-stack", "version": 1, "ambient": "air", "substrate": "Si",
                       "layers": [{"material": dict(table, name=f"t{k}"), "thickness_nm": 100} for k in range(6)]},
                      separators=(",", ":")).encode()
    assert len(text) < 1_000_000
    ex = FilmExplorer()
    before = ex.state.param.values()
    assert not ex.load_stack_upload("tables.json", text)
    assert "tables.json: The stack in it cannot be kept as the page stores it" in ex.file_msg.message.object
    assert ex.state.param.values() == before and ex.state.stack.layers


def test_viewing_cone_and_brightness_change_the_map():
    ex = FilmExplorer()
    before = ex.map_src.data["image"][0].copy()
    ex.na_slider.value = 0.5
    assert not np.array_equal(before, ex.map_src.data["image"][0])
    ex.brightness.value = "normalized"
    assert ex._scale > 1.0


def test_editing_another_layer_keeps_the_current_thickness():
    ex = FilmExplorer()
    ex.preset.value = "nitride_on_oxide_on_silicon"
    ex.thickness_slider.value = 150.0
    assert ex._row_thickness[0].value == "150"
    ex._row_thickness[1].value = "25"
    assert ex.state.thickness_nm == 150.0
    assert ex.state.layer_rows()[1]["thickness_nm"] == 25.0
    assert ex.state.stack.layers[0].thickness_nm == 150.0


def test_a_link_whose_stack_starts_with_a_byte_order_mark_is_read():
    import base64
    import zlib

    from views.urlstate import apply_query

    s = ExplorerState()
    s.load_preset("thermal_oxide_on_silicon")
    text = "\ufeff" + s.stack_json
    link = base64.urlsafe_b64encode(zlib.compress(text.encode("utf-8"))).decode().rstrip("=")
    other = ExplorerState()
    assert apply_query(other, {"stack": link}) == []
    assert json.loads(other.stack_json) == json.loads(s.stack_json)


def test_removing_every_layer_shows_the_bare_substrate_not_the_last_stack():
    ex = FilmExplorer()
    ex.preset.value = "thermal_oxide_on_silicon"
    while json.loads(ex.state.stack_json)["layers"]:
        ex._on_layer_action(0, "del")
    bare = Stack([], substrate="Si", ambient="air")
    assert ex._point.hex == _physics_hex(bare)
    assert "bare substrate" in ex.swatch.object and ex.error.visible and ex.error.alert_type == "warning"
    assert ex.map_src.data["image"] == [] and ex.strip_src.data["image"] == []
    assert not ex.strip_mark.visible and not ex.vspan.visible
    ex.add_layer.clicks += 1                                         # a layer again: the map comes back
    assert not ex.error.visible and len(ex.map_src.data["image"]) == 1 and ex.strip_mark.visible


def test_the_preset_list_names_a_preset_only_while_it_is_what_is_shown():
    from views.urlstate import apply_query, state_to_query

    ex = FilmExplorer()
    ex.preset.value = "nitride_on_oxide_on_silicon"
    assert ex.preset.value == "nitride_on_oxide_on_silicon"
    ex.state.thickness_nm = 150.0                                    # moving the thickness is not an edit
    assert ex.preset.value == "nitride_on_oxide_on_silicon"
    layers = ex.state.layer_rows()
    layers[0]["material"] = "TiO2"
    ex.state.set_stack(layers=layers)
    assert ex.preset.value == "" and "since edited" in ex.scenario.object
    other = FilmExplorer()                                           # a shared link of a preset's stack
    shared = FilmExplorer()
    shared.preset.value = "nitride_on_oxide_on_silicon"
    query = dict(pair.split("=", 1) for pair in state_to_query(shared.state)[1:].split("&"))
    from urllib.parse import unquote
    assert apply_query(other.state, {k: unquote(v) for k, v in query.items()}) == []
    other._sync_widgets()
    assert other.preset.value == "nitride_on_oxide_on_silicon"          # the link names the preset it shows
    edited = dict(query, stack=state_to_query(ex.state)[1:].split("stack=")[1].split("&")[0])
    third = FilmExplorer()
    assert apply_query(third.state, {k: unquote(v) for k, v in edited.items()}) == []
    third._sync_widgets()
    assert third.preset.value == ""                                     # a preset's name over an edited stack: none


def test_the_swatch_names_the_swept_layer_and_says_when_it_is_beyond_the_map():
    ex = FilmExplorer()
    ex.preset.value = "nitride_on_oxide_on_silicon"
    assert "layer 1 (" in ex.swatch.object and "of 2" in ex.swatch.object
    ex.thickness.input.value = "1500"
    ex.tmax.input.value = "1000"
    assert "beyond the map, which ends at 1000 nm" in ex.swatch.object


def test_a_dark_swatch_points_to_the_brightness_choice():
    ex = FilmExplorer()
    ex.preset.value = "broadband_ar_on_bk7"
    assert ex._point.lab[0] < 10 and "brightest = white" in ex.swatch.object
    ex.brightness.value = "normalized"
    assert "Little light comes back" not in ex.swatch.object


def test_the_first_layer_cannot_move_up_nor_the_last_down():
    ex = FilmExplorer()
    ex.preset.value = "nitride_on_oxide_on_silicon"
    rows = ex.layers_box.objects
    up = [b for b in rows[0].objects[0].objects if getattr(b, "label", "") == "↑"][0]
    down = [b for b in rows[-1].objects[0].objects if getattr(b, "label", "") == "↓"][0]
    assert up.disabled and down.disabled


def test_the_spectrum_download_says_why_transmittance_is_empty():
    ex = FilmExplorer()
    ex.preset.value = "thermal_oxide_on_silicon"
    assert "T_percent is empty: the substrate absorbs" in ex._spectrum_csv().getvalue()
    ex.preset.value = "broadband_ar_on_bk7"
    assert "T_percent is empty" not in ex._spectrum_csv().getvalue()


def test_a_tick_box_is_one_boolean_whichever_side_changes():
    from views.explorer import TickBox

    box = TickBox("Thick plate")
    seen = []
    box.param.watch(lambda e: seen.append(e.new), "value")
    box._group.value = ["Thick plate"]                               # ticked in the page (box or words)
    assert box.value is True and seen == [True]
    box.value = False                                                # set from Python
    assert box._group.value == [] and seen == [True, False]


def test_viewing_cone_na_beyond_the_ambient_is_refused_in_the_page_and_immersion_allows_it():
    from physics import Layer
    from physics.stackfile import dump_stack_file
    ex = FilmExplorer()
    assert ex.na_slider.end == ex.state.param.na.bounds[1] > 1.0
    ex.na_slider.value = 1.2                               # in air: no objective reaches it
    assert ex.error.visible and "too large for an ambient of index" in ex.error.object
    water = Stack([Layer("SiO2", 300.0)], substrate="Si", ambient=1.333)
    assert ex.load_stack_upload("water.json", dump_stack_file(water, name="invented water cell",
                                                              view={"na": 1.2}).encode())
    assert ex.state.na == 1.2 and not ex.error.visible    # a water-immersion objective


def test_polarizer_and_analyzer_feed_the_map_swatch_and_link():
    from physics.appearance import cone_reflectance
    from views.urlstate import apply_query, state_to_query
    ex = FilmExplorer()
    ex.na_slider.value = 0.4
    before_map, before_hex = ex.map_src.data["image"][0].copy(), ex._point.hex
    ex.polarizer.value = "linear"
    ex.polarizer_angle.input.value = "30"
    ex.analyzer.value = "crossed"
    s = ex.state
    assert s.lab_frame() == {"polarizer_deg": 30.0, "analyzer_deg": 120.0} and s.ray_polarization == "unpolarized"
    assert not np.array_equal(before_map, ex.map_src.data["image"][0]) and ex._point.hex != before_hex
    wl = np.array([450.0, 600.0])
    np.testing.assert_allclose(compute_point(s, 1.0, wl).R, cone_reflectance(s.stack, wl, s.angle_deg, 0.4,
                                                                             polarizer_deg=30.0, analyzer_deg=120.0))
    other = ExplorerState()
    assert apply_query(other, state_to_query(s)) == []
    assert other.lab_frame() == s.lab_frame()
    ex.polarizer_angle.input.value = "400"                 # outside the allowed angles: refused in place
    assert s.polarizer_deg == 30.0 and ex.polarizer_angle.message.visible
