"""Stack files: presets, round trips, every malformed case, and fuzzing.

The presets' optics are checked against our own computations only (a bare
substrate, a quarter-wave condition), not against outside data.
"""

import copy
import json

import numpy as np
import pytest
from hypothesis import given, strategies as st

from physics import (CauchyMaterial, EffectiveMedium, InputError, Layer, Stack, TaucLorentzMaterial,
                     curated_materials, material)
from physics.stackfile import (FORMAT, MAX_FILE_BYTES, MAX_LAYERS, VIEW_DEFAULTS, StackFile,
                               dump_stack_file, list_presets, load_preset, load_stack_file,
                               stack_from_dict, stack_to_dict)

WL_VISIBLE = np.arange(400.0, 700.001, 5.0)
PRESET_STEMS = {
    "thermal_oxide_on_silicon", "silicon_nitride_on_silicon", "nitride_on_oxide_on_silicon",
    "mgf2_ar_on_bk7", "broadband_ar_on_bk7", "anodic_tio2_on_titanium", "oil_film_on_water",
    "soap_film_in_air",
}


def _valid() -> dict:
    """A small valid stack file object (three layers so layer indices up to 2 exist)."""
    return {
        "format": FORMAT, "version": 1, "name": "test", "scenario": "Invented scenario: a test.",
        "ambient": "air",
        "layers": [{"material": "SiO2", "thickness_nm": 100.0},
                   {"material": "Si3N4", "thickness_nm": 50.0},
                   {"material": {"kind": "constant", "n": 1.7, "k": 0.0}, "thickness_nm": 10.0}],
        "substrate": "Si", "substrate_thickness_mm": None, "swept_layer": 0,
        "view": dict(VIEW_DEFAULTS),
    }


def _args(sf: StackFile) -> dict:
    return dict(name=sf.name, scenario=sf.scenario, swept_layer=sf.swept_layer, view=sf.view)


# ---------------------------------------------------------------------- presets
def test_list_presets_names_every_preset():
    presets = list_presets()
    assert {stem for stem, _ in presets} == PRESET_STEMS
    assert all(isinstance(name, str) and name for _, name in presets)


@pytest.mark.parametrize("stem", sorted(PRESET_STEMS))
def test_preset_loads_and_round_trips(stem):
    sf = load_preset(stem)
    assert "Invented scenario" in sf.scenario
    assert 0 <= sf.swept_layer < len(sf.stack.layers)
    text = dump_stack_file(sf.stack, **_args(sf))
    again = load_stack_file(text)
    assert stack_to_dict(again.stack, **_args(again)) == stack_to_dict(sf.stack, **_args(sf))
    assert (again.name, again.scenario, again.swept_layer, again.view) == \
        (sf.name, sf.scenario, sf.swept_layer, sf.view)
    np.testing.assert_array_equal(again.stack.reflectance(WL_VISIBLE),
                                  sf.stack.reflectance(WL_VISIBLE))
    # presets are stored exactly as dump_stack_file writes them
    from physics.stackfile import PRESET_DIR
    assert (PRESET_DIR / f"{stem}.json").read_text(encoding="utf-8") == text


@pytest.mark.parametrize("stem", sorted(PRESET_STEMS))
def test_preset_covers_colour_band_and_its_thickness_axis(stem):
    sf = load_preset(stem)
    lo, hi = sf.stack.wavelength_range_nm()
    assert lo <= 360.0 and hi >= 830.0        # the CIE table span used by physics.color
    swept = sf.stack.layers[sf.swept_layer].thickness_nm
    assert 0 < swept < sf.view["thickness_max_nm"]
    R = sf.stack.reflectance(np.arange(360.0, 830.001, 5.0), sf.view["angle_deg"],
                             sf.view["polarization"])
    assert np.all((R >= 0) & (R <= 1))


def test_single_layer_ar_is_quarter_wave_at_550nm():
    sf = load_preset("mgf2_ar_on_bk7")
    (layer,) = sf.stack.layers
    optical = layer.material.nk(550.0).real * layer.thickness_nm
    assert abs(optical - 550.0 / 4) < 0.5
    assert sf.stack.substrate_thickness_mm == 2.0
    bare = Stack([], sf.stack.substrate, "air", 2.0)
    assert sf.stack.reflectance(550.0) < bare.reflectance(550.0) - 0.02


def test_broadband_ar_is_well_below_bare_glass():
    sf = load_preset("broadband_ar_on_bk7")
    assert len(sf.stack.layers) == 4
    wl = np.arange(420.0, 680.001, 1.0)
    mean_ar = sf.stack.reflectance(wl).mean()
    mean_bare = Stack([], sf.stack.substrate, sf.stack.ambient).reflectance(wl).mean()
    assert 0.040 < mean_bare < 0.045          # one uncoated glass face, computed here
    assert mean_ar < 0.005                    # design value 0.10 %
    assert sf.stack.reflectance(wl).max() < 0.01


def test_load_preset_rejects_unknown_and_path_names():
    for bad in ("no_such_preset", "../pyproject", "README", "", None):
        with pytest.raises(InputError, match="preset"):
            load_preset(bad)


# ---------------------------------------------------------------------- round trips
curated_names = sorted(curated_materials())
constant_spec = st.builds(lambda n, k: {"kind": "constant", "n": n, "k": k},
                          st.floats(1.0, 4.0), st.one_of(st.just(0.0), st.floats(0.0, 3.0)))
cauchy_spec = st.builds(lambda a, b, c: {"kind": "cauchy", "coefficients": [a, b, c],
                                         "range_nm": [300.0, 1000.0]},
                        st.floats(1.3, 2.5), st.floats(0.0, 0.05), st.floats(0.0, 0.001))
any_material = st.one_of(st.sampled_from(curated_names), constant_spec, cauchy_spec)
transparent = st.one_of(st.sampled_from(["air", "SiO2"]),
                        st.builds(lambda n: {"kind": "constant", "n": n, "k": 0.0}, st.floats(1.0, 2.0)))
views = st.fixed_dictionaries({}, optional={
    "angle_deg": st.floats(0.0, 89.9), "polarization": st.sampled_from(["s", "p", "unpolarized"]),
    "illuminant": st.sampled_from(["D65", "D50", "A", "F2", "F11"]),
    "observer": st.sampled_from(["2", "10"]), "na": st.floats(0.0, 0.95),
    "thickness_max_nm": st.floats(10.0, 100000.0)})


@st.composite
def stack_files(draw):
    layers = draw(st.lists(st.tuples(any_material, st.floats(0.0, 100000.0)), max_size=MAX_LAYERS))
    stack = Stack([Layer(material(m), d) for m, d in layers],
                  substrate=draw(any_material), ambient=draw(transparent),
                  substrate_thickness_mm=draw(st.one_of(st.none(), st.floats(0.01, 10.0))))
    swept = draw(st.integers(0, max(0, len(layers) - 1)))
    return stack, dict(name=draw(st.text(max_size=200)), scenario=draw(st.text(max_size=1000)),
                       swept_layer=swept, view=draw(views))


@given(stack_files())
def test_dict_round_trip_random_stacks(case):
    stack, args = case
    data = stack_to_dict(stack, **args)
    sf = stack_from_dict(copy.deepcopy(data))
    assert stack_to_dict(sf.stack, **_args(sf)) == data
    assert sf.view == {**VIEW_DEFAULTS, **args["view"]}
    assert (sf.name, sf.scenario, sf.swept_layer) == (args["name"], args["scenario"], args["swept_layer"])
    wl = [450.0, 550.0, 650.0]
    np.testing.assert_array_equal(sf.stack.reflectance(wl), stack.reflectance(wl))


@given(stack_files())
def test_text_round_trip_random_stacks(case):
    stack, args = case
    text = dump_stack_file(stack, **args)
    assert text.endswith("}\n") and text.startswith('{\n  "format"')
    sf = load_stack_file(text.encode("utf-8"))
    assert stack_to_dict(sf.stack, **_args(sf)) == stack_to_dict(stack, **args)
    assert dump_stack_file(sf.stack, **_args(sf)) == text


def test_optional_fields_take_defaults():
    data = _valid()
    for key in ("name", "scenario", "substrate_thickness_mm", "swept_layer", "view"):
        del data[key]
    sf = stack_from_dict(data)
    assert (sf.name, sf.scenario, sf.swept_layer) == ("untitled stack", "", 0)
    assert sf.view == VIEW_DEFAULTS and sf.stack.substrate_thickness_mm is None
    data["view"] = {"angle_deg": 20}
    assert stack_from_dict(data).view == {**VIEW_DEFAULTS, "angle_deg": 20.0}


def test_empty_stack_is_allowed_with_swept_layer_zero():
    data = _valid()
    data["layers"] = []
    sf = stack_from_dict(data)
    assert sf.stack.layers == () and sf.swept_layer == 0
    data["swept_layer"] = 1
    with pytest.raises(InputError, match="swept_layer"):
        stack_from_dict(data)


def test_material_strings_and_objects_of_every_kind_load():
    data = _valid()
    data["layers"] = [
        {"material": "thermal oxide", "thickness_nm": 1},
        {"material": "main/SiO2/Malitson", "thickness_nm": 1},
        {"material": "1.46", "thickness_nm": 1},
        {"material": "2.0+0.1i", "thickness_nm": 1},
        {"material": {"kind": "cauchy", "coefficients": [1.45, 0.004], "range_nm": [300, 1000]},
         "thickness_nm": 1},
        {"material": {"kind": "sellmeier", "B": [1.0], "C": [0.01]}, "thickness_nm": 1},
        {"material": {"kind": "table", "wavelength_nm": [300, 1000], "n": [1.5, 1.4]}, "thickness_nm": 1},
        {"material": {"kind": "database", "page": "main/SiO2/Malitson"}, "thickness_nm": 1},
        {"material": {"kind": "curated", "name": "Si3N4"}, "thickness_nm": 1},
    ]
    sf = stack_from_dict(data)
    assert len(sf.stack.layers) == 9
    assert np.all(np.isfinite(sf.stack.reflectance(WL_VISIBLE)))
    again = stack_from_dict(stack_to_dict(sf.stack))
    np.testing.assert_array_equal(again.stack.reflectance(WL_VISIBLE), sf.stack.reflectance(WL_VISIBLE))


# ---------------------------------------------------------------------- malformed files
def _set(path, value):
    """A mutation of _valid(): set the item at ``path`` (keys and indices) to ``value``."""
    def mutate(d):
        target = d
        for key in path[:-1]:
            target = target[key]
        target[path[-1]] = value
        return d
    return mutate


def _delete(path):
    def mutate(d):
        target = d
        for key in path[:-1]:
            target = target[key]
        del target[path[-1]]
        return d
    return mutate


MALFORMED = [
    # (mutation, text the message must contain)
    (_set(("format",), "other-tool-stack"), "format"),
    (_delete(("format",)), "format"),
    (_set(("version",), 2), "version"),
    (_set(("version",), "1"), "version"),
    (_set(("version",), True), "version"),
    (_delete(("version",)), "version"),
    (_set(("colour",), "red"), "colour"),
    (_set(("layers", 1, "color"), "red"), "layers[1]"),
    (_set(("layers", 1, "color"), "red"), "color"),
    (_set(("view", "zoom"), 2), "zoom"),
    (_set(("view", "zoom"), 2), "view"),
    (_delete(("layers",)), "layers"),
    (_set(("layers",), {"material": "SiO2"}), "layers"),
    (_set(("layers", 0), "SiO2"), "layers[0]"),
    (_delete(("layers", 1, "material")), "layers[1].material"),
    (_delete(("layers", 2, "thickness_nm")), "layers[2].thickness_nm"),
    (_set(("layers",), [{"material": "SiO2", "thickness_nm": 1.0}] * (MAX_LAYERS + 1)), "layers"),
    (_set(("layers", 0, "thickness_nm"), -1.0), "layers[0].thickness_nm"),
    (_set(("layers", 0, "thickness_nm"), 100000.5), "layers[0].thickness_nm"),
    (_set(("layers", 0, "thickness_nm"), "100"), "layers[0].thickness_nm"),
    (_set(("layers", 0, "thickness_nm"), None), "layers[0].thickness_nm"),
    (_set(("layers", 0, "thickness_nm"), True), "layers[0].thickness_nm"),
    (_set(("layers", 0, "thickness_nm"), float("nan")), "layers[0].thickness_nm"),
    (_set(("layers", 0, "thickness_nm"), 10 ** 400), "layers[0].thickness_nm"),
    (_set(("layers", 2, "material"), "unobtainium"), "layers[2].material: Unknown material"),
    (_set(("layers", 2, "material"), "main/Nope/Nobody"), "layers[2].material"),
    (_set(("layers", 2, "material"), 1.46), "layers[2].material"),
    (_set(("layers", 2, "material"), None), "layers[2].material"),
    (_set(("layers", 2, "material"), "x" * 201), "layers[2].material"),
    (_set(("layers", 2, "material"), {"kind": "constant", "n": -1.0}), "layers[2].material"),
    (_set(("layers", 2, "material"), {"kind": "constant", "n": 1.5, "k": -0.1}), "layers[2].material"),
    (_set(("layers", 2, "material"), {"kind": "plasma"}), "layers[2].material.kind"),
    (_set(("layers", 2, "material"), {"kind": ["constant"]}), "layers[2].material.kind"),
    (_set(("layers", 2, "material"), {"n": 1.5}), "layers[2].material.kind"),
    (_set(("layers", 2, "material"), {"kind": "constant", "n": 1.5, "hue": 1}), "hue"),
    (_set(("layers", 2, "material"), {"kind": "constant"}), "layers[2].material.n"),
    (_set(("layers", 2, "material"), {"kind": "constant", "n": [1, 2]}), "layers[2].material.n"),
    (_set(("layers", 2, "material"), {"kind": "cauchy", "coefficients": [1, 2, 3, 4]}),
     "layers[2].material.coefficients"),
    (_set(("layers", 2, "material"), {"kind": "cauchy", "coefficients": [1.5], "range_nm": [900, 300]}),
     "layers[2].material"),
    (_set(("layers", 2, "material"), {"kind": "sellmeier", "B": [1.0, 2.0], "C": [0.01]}),
     "layers[2].material"),
    (_set(("layers", 2, "material"), {"kind": "table", "wavelength_nm": [500], "n": [1.5]}),
     "layers[2].material"),
    (_set(("layers", 2, "material"), {"kind": "curated", "name": {"kind": "curated", "name": "SiO2"}}),
     "layers[2].material.name"),
    (_set(("ambient",), "unobtainium"), "ambient"),
    (_delete(("ambient",)), "ambient"),
    (_set(("substrate",), "unobtainium"), "substrate"),
    (_set(("substrate",), ["Si"]), "substrate"),
    (_delete(("substrate",)), "substrate"),
    (_set(("substrate_thickness_mm",), 0.0), "substrate_thickness_mm"),
    (_set(("substrate_thickness_mm",), -2.0), "substrate_thickness_mm"),
    (_set(("substrate_thickness_mm",), "2"), "substrate_thickness_mm"),
    (_set(("swept_layer",), 3), "swept_layer"),
    (_set(("swept_layer",), -1), "swept_layer"),
    (_set(("swept_layer",), 1.0), "swept_layer"),
    (_set(("swept_layer",), False), "swept_layer"),
    (_set(("view",), [0.0]), "view"),
    (_set(("view", "angle_deg"), 90.0), "view.angle_deg"),
    (_set(("view", "angle_deg"), -0.1), "view.angle_deg"),
    (_set(("view", "polarization"), "circular"), "view.polarization"),
    (_set(("view", "illuminant"), "D77"), "view.illuminant"),
    (_set(("view", "illuminant"), "d65"), "view.illuminant"),
    (_set(("view", "observer"), 2), "view.observer"),
    (_set(("view", "observer"), "5"), "view.observer"),
    (_set(("view", "na"), 0.96), "view.na"),
    (_set(("view", "na"), -0.01), "view.na"),
    (_set(("view", "thickness_max_nm"), 9.9), "view.thickness_max_nm"),
    (_set(("view", "thickness_max_nm"), 100001.0), "view.thickness_max_nm"),
    (_set(("name",), "n" * 201), "name"),
    (_set(("name",), 7), "name"),
    (_set(("scenario",), "s" * 1001), "scenario"),
    (_set(("scenario",), None), "scenario"),
]


@pytest.mark.parametrize("mutate, field", MALFORMED, ids=[f"{i}-{f}" for i, (_, f) in enumerate(MALFORMED)])
def test_malformed_dict_names_the_field(mutate, field):
    data = mutate(_valid())
    with pytest.raises(InputError) as info:
        stack_from_dict(data)
    assert field in str(info.value)
    # the same through JSON text, where the value can be written as JSON
    try:
        text = json.dumps(data, allow_nan=False)
    except ValueError:
        return
    with pytest.raises(InputError) as info:
        load_stack_file(text)
    assert field in str(info.value)


def test_unknown_field_message_lists_allowed_fields():
    for mutate, allowed in ((_set(("colour",), 1), "swept_layer"),
                            (_set(("layers", 0, "colour"), 1), "thickness_nm"),
                            (_set(("view", "colour"), 1), "illuminant")):
        with pytest.raises(InputError, match=allowed):
            stack_from_dict(mutate(_valid()))


def test_too_many_layers_message_gives_limit():
    with pytest.raises(InputError, match=f"at most {MAX_LAYERS}"):
        stack_from_dict(_set(("layers",), [{"material": "SiO2", "thickness_nm": 1.0}] * 13)(_valid()))


def test_not_json_reports_line_and_column():
    text = '{\n  "format": "fringegauge-stack",\n  "version": 1,,\n}'
    with pytest.raises(InputError, match=r"line 3, column 16"):
        load_stack_file(text)


@pytest.mark.parametrize("text, fragment", [
    ("[1, 2]", "top level"),
    ('"just a string"', "top level"),
    ("", "line 1, column 1"),
    ('{"format": NaN}', "NaN"),
    ('{"format": Infinity}', "Infinity"),
    ('{"format": "fringegauge-stack", "format": "fringegauge-stack"}', "'format' appears twice"),
    ("[" * 100000 + "]" * 100000, "nest"),
    ('{"version": ' + "9" * 5000 + "}", "usable"),
])
def test_bad_json_text(text, fragment):
    with pytest.raises(InputError, match=fragment):
        load_stack_file(text)


def test_not_utf8_bytes():
    with pytest.raises(InputError, match="UTF-8"):
        load_stack_file(b'{"name": "\xff\xfe"}')


def test_utf8_bom_is_accepted():
    text = json.dumps(_valid())
    assert load_stack_file(b"\xef\xbb\xbf" + text.encode()).name == "test"
    assert load_stack_file("\ufeff" + text).name == "test"


def test_oversize_file_is_rejected_before_parsing():
    # valid JSON padded past the limit: the size, not the syntax, is reported
    padded = json.dumps(_valid()) + " " * MAX_FILE_BYTES
    for content in (padded, padded.encode()):
        with pytest.raises(InputError, match="1 MB"):
            load_stack_file(content)
    # one multi-byte character too many counts in bytes for text input too
    big = '{"name": "' + "é" * (MAX_FILE_BYTES // 2) + '"}'
    with pytest.raises(InputError, match="1 MB"):
        load_stack_file(big)


def test_content_of_other_types_is_rejected():
    for content in (None, 12, {"format": FORMAT}):
        with pytest.raises(InputError):
            load_stack_file(content)


def test_writing_checks_like_reading():
    with pytest.raises(InputError, match="layers"):
        stack_to_dict(Stack([Layer("SiO2", 1.0)] * 13, "Si"))
    with pytest.raises(InputError, match=r"layers\[0\].thickness_nm"):
        stack_to_dict(Stack([Layer("SiO2", 200000.0)], "Si"))
    with pytest.raises(InputError, match="swept_layer"):
        stack_to_dict(Stack([Layer("SiO2", 1.0)], "Si"), swept_layer=1)
    with pytest.raises(InputError, match="view.na"):
        dump_stack_file(Stack([], "Si"), view={"na": 2.0})
    with pytest.raises(InputError, match="name"):
        dump_stack_file(Stack([], "Si"), name="x" * 201)
    with pytest.raises(InputError, match="Stack"):
        stack_to_dict("not a stack")


# ---------------------------------------------------------------------- fuzzing
json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=10), inner, max_size=5),
    max_leaves=25)
field_names = st.sampled_from(["format", "version", "name", "scenario", "ambient", "layers",
                               "substrate", "substrate_thickness_mm", "swept_layer", "view",
                               "material", "thickness_nm", "kind", "n", "k", "coefficients",
                               "range_nm", "B", "C", "wavelength_nm", "page", "angle_deg",
                               "polarization", "illuminant", "observer", "na", "thickness_max_nm"])
material_objects = st.fixed_dictionaries(
    {"kind": st.sampled_from(["constant", "cauchy", "sellmeier", "table", "database", "curated"])},
    optional={k: json_values | st.lists(st.floats(-5, 2000), max_size=4) | st.floats(-1, 5)
              for k in ("n", "k", "coefficients", "range_nm", "B", "C", "wavelength_nm", "page",
                        "name", "source")})


def _load_any(content):
    """Load and accept only a StackFile or an InputError."""
    try:
        assert isinstance(load_stack_file(content), StackFile)
    except InputError as exc:
        assert str(exc)


@given(json_values)
def test_fuzz_arbitrary_json_values(value):
    text = json.dumps(value)              # NaN and Infinity may appear: they must be refused too
    _load_any(text)
    _load_any(text.encode("utf-8", errors="surrogatepass"))


@given(st.dictionaries(st.one_of(field_names, st.text(max_size=8)), json_values, max_size=8))
def test_fuzz_json_objects(value):
    _load_any(json.dumps(value))
    try:
        stack_from_dict(value)
    except InputError:
        pass


@given(path=st.sampled_from([("format",), ("version",), ("name",), ("ambient",), ("layers",),
                             ("layers", 0), ("layers", 1, "material"), ("layers", 2, "thickness_nm"),
                             ("layers", 0, "extra"), ("substrate",), ("substrate_thickness_mm",),
                             ("swept_layer",), ("view",), ("view", "angle_deg"), ("view", "observer"),
                             ("view", "illuminant"), ("view", "na"), ("view", "thickness_max_nm")]),
       value=st.one_of(json_values, material_objects))
def test_fuzz_one_field_of_a_valid_file(path, value):
    data = _set(path, value)(_valid())
    _load_any(json.dumps(data))
    try:
        stack_from_dict(data)
    except InputError:
        pass


@given(material_objects)
def test_fuzz_material_objects(spec):
    _load_any(json.dumps(_set(("layers", 2, "material"), spec)(_valid())))


@given(st.binary(max_size=2000))
def test_fuzz_arbitrary_bytes(content):
    _load_any(content)


@given(st.text(max_size=500))
def test_fuzz_arbitrary_text(content):
    _load_any(content)


# ---------------------------------------------------------------------- film models
def _with_material(spec) -> dict:
    data = _valid()
    data["layers"][2]["material"] = spec
    return data


FILM_MODELS = [
    CauchyMaterial(2.0, 0.016, 0.0002, range_nm=(400.0, 1000.0), name="PECVD nitride, invented",
                   k_amplitude=0.01, k_exponent_per_ev=3.0, k_band_edge_nm=400.0),
    TaucLorentzMaterial(1.5, 1.7, 120.0, 3.7, 2.2, range_nm=(300.0, 1200.0), name="a-Si-like, invented"),
    EffectiveMedium("Si", 1.0, 0.5),
    EffectiveMedium(EffectiveMedium("SiO2", TaucLorentzMaterial(1.5, 1.7, 120.0, 3.7, 2.2), 0.2), 1.0, 0.3,
                    "maxwell-garnett", name="graded top, invented"),
]


@pytest.mark.parametrize("film", FILM_MODELS, ids=["cauchy-urbach", "tauc-lorentz", "rough-si", "nested"])
def test_film_models_round_trip_through_a_stack_file(film):
    stack = Stack([Layer(film, 120.0)], "Si")
    text = dump_stack_file(stack)
    back = load_stack_file(text).stack
    assert back.layers[0].material.spec() == film.spec()              # exactly what spec() writes
    assert json.loads(dump_stack_file(back)) == json.loads(text)
    wl = np.linspace(400.0, 1000.0, 31)
    np.testing.assert_array_equal(back.reflectance(wl), stack.reflectance(wl))


def test_fitted_film_is_stored_as_fit_film_writes_it():
    from physics import fit_film

    wl = np.linspace(400.0, 1000.0, 200)
    truth = Stack([Layer(CauchyMaterial(2.0, 0.016), 300.0)], "Si", ambient=1.0)
    start = Stack([Layer(CauchyMaterial(1.6, 0.005), 0.0)], "Si", ambient=1.0)
    r = fit_film(wl, truth.reflectance(wl), start, model="cauchy-urbach", thickness_nm=(0, 1000))
    sf = load_stack_file(dump_stack_file(Stack([Layer(r.material, r.thickness_nm)], "Si")))
    assert sf.stack.layers[0].material.spec() == r.material.spec()


_TL = {"kind": "tauc-lorentz", "eps_inf": 1.5, "gap_ev": 1.7, "amplitude_ev": 120.0, "center_ev": 3.7,
       "broadening_ev": 2.2}


def _nested(depth: int):
    spec = "SiO2"
    for _ in range(depth):
        spec = {"kind": "effective-medium", "a": spec, "b": "1.0", "fraction_b": 0.1}
    return spec


@pytest.mark.parametrize("spec, field, words", [
    ({"kind": "cauchy", "coefficients": [1.5], "urbach": [0.01, 3.0]}, "urbach", "give 3"),
    ({"kind": "cauchy", "coefficients": [1.5], "urbach": [-0.01, 3.0, 400]}, r"urbach\[0\]", "out of range"),
    ({"kind": "cauchy", "coefficients": [1.5], "urbach": [0.01, 500.0, 400]}, r"urbach\[1\]", "0 to 100 1/eV"),
    ({"kind": "cauchy", "coefficients": [1.5], "urbach": [0.01, 50.0, 400]}, "urbach", "grows too fast"),
    ({"kind": "cauchy", "coefficients": [1.5], "urbach": "steep"}, "urbach", "list of numbers"),
    (_TL | {"eps_inf": 0.5}, "eps_inf", "from 1 to 100"),
    (_TL | {"gap_ev": None}, "gap_ev", "must be a number"),
    (_TL | {"amplitude_ev": 0.0}, "amplitude_ev", "above 0"),
    (_TL | {"center_ev": 1e9}, "center_ev", "out of range"),
    (_TL | {"broadening_ev": 8.0}, "material", "not below 2·center_ev"),
    (_TL | {"range_nm": [900, 300]}, "material", "lowest < highest"),
    ({k: v for k, v in _TL.items() if k != "gap_ev"}, "gap_ev", "missing"),
    (_TL | {"oscillators": 2}, "material", "unknown field"),
    ({"kind": "effective-medium", "a": "SiO2", "b": "void-ish", "fraction_b": 0.5}, "b", "Unknown"),
    ({"kind": "effective-medium", "a": {"kind": "constant", "n": 1.5, "k": -1.0}, "b": "1", "fraction_b": 0.5},
     "a", "k >= 0"),
    ({"kind": "effective-medium", "a": "SiO2", "b": "1", "fraction_b": 1.5}, "fraction_b", "from 0 to 1"),
    ({"kind": "effective-medium", "a": "SiO2", "b": "1", "fraction_b": 0.5, "rule": "lorentz-lorenz"}, "rule",
     "bruggeman"),
    ({"kind": "effective-medium", "a": "SiO2", "fraction_b": 0.5}, "b", "missing"),
    ({"kind": "effective-medium", "a": 7, "b": "1", "fraction_b": 0.5}, "a", "material name"),
    (_nested(4), r"a\.a\.a", "at most 3 deep"),
])
def test_film_model_refusals_name_the_field(spec, field, words):
    where = r"layers\[2\]\.material" + ("" if field == "material" else rf"\.{field}")
    with pytest.raises(InputError, match=rf"{where}.*{words}"):
        stack_from_dict(_with_material(spec))


def test_film_model_nan_in_the_text_is_refused():
    text = json.dumps(_with_material(_TL)).replace('"gap_ev": 1.7', '"gap_ev": NaN')
    with pytest.raises(InputError, match="NaN is not a JSON number"):
        load_stack_file(text)


def test_three_mixtures_deep_is_allowed():
    assert isinstance(stack_from_dict(_with_material(_nested(3))).stack.layers[2].material, EffectiveMedium)


film_objects = st.fixed_dictionaries(
    {"kind": st.sampled_from(["cauchy", "tauc-lorentz", "effective-medium"])},
    optional={k: json_values | st.floats(-5, 200) | st.sampled_from(["SiO2", "1.0", "bruggeman"])
              | st.lists(st.floats(-5, 2000), max_size=4) | material_objects
              for k in ("coefficients", "urbach", "range_nm", "eps_inf", "gap_ev", "amplitude_ev", "center_ev",
                        "broadening_ev", "a", "b", "fraction_b", "rule", "name")})


@given(film_objects)
def test_fuzz_film_model_objects(spec):
    _load_any(json.dumps(_with_material(spec)))
