"""Grating files: the shipped presets, every malformed case naming its field, and fuzzing."""

import json

import pytest
from hypothesis import given, strategies as st

from physics import InputError
from physics.gratingfile import (FORMAT, LIMITS, MAX_FILE_BYTES, GratingFile, grating_from_dict,
                                 list_grating_presets, load_grating_file, load_grating_preset)
from tests.test_stackfile import json_values

PRESET_STEMS = {"compact_spectrometer_1200_blazed", "colour_check_600_transmission", "optical_disc_track"}
FIELDS = ["format", "version", "name", "scenario", "lines_per_mm", "kind", "groove", "blaze_angle_deg",
          "duty_cycle", "incidence_deg", "band_nm", "focal_length_mm", "illuminated_width_mm",
          "detector_length_mm", "pixel_pitch_um"]


def _valid() -> dict:
    return {"format": FORMAT, "version": 1, "name": "test grating", "scenario": "Invented scenario: a test.",
            "lines_per_mm": 1200, "kind": "reflection", "groove": "blazed", "blaze_angle_deg": 17.5,
            "duty_cycle": 0.5, "incidence_deg": 35.0, "band_nm": [400, 700], "focal_length_mm": 75,
            "illuminated_width_mm": 10, "detector_length_mm": 28.7, "pixel_pitch_um": 14}


# ---------------------------------------------------------------------- presets
def test_list_names_every_preset():
    presets = list_grating_presets()
    assert {stem for stem, _ in presets} == PRESET_STEMS
    assert all(isinstance(name, str) and name for _, name in presets)


@pytest.mark.parametrize("stem", sorted(PRESET_STEMS))
def test_preset_loads_and_says_it_is_invented(stem):
    gf = load_grating_preset(stem)
    assert isinstance(gf, GratingFile)
    assert "Invented scenario" in gf.scenario
    assert gf.band_nm[0] < gf.band_nm[1]
    assert (gf.blaze_angle_deg is not None) == (gf.groove == "blazed")


def test_presets_are_the_gratings_described():
    spec = load_grating_preset("compact_spectrometer_1200_blazed")
    assert (spec.lines_per_mm, spec.kind, spec.groove) == (1200, "reflection", "blazed")
    bench = load_grating_preset("colour_check_600_transmission")
    assert (bench.lines_per_mm, bench.kind) == (600, "transmission")
    disc = load_grating_preset("optical_disc_track")
    assert abs(1000.0 / disc.lines_per_mm - 1.6) < 1e-9 and disc.groove == "lamellar"


def test_unknown_preset_lists_the_presets():
    with pytest.raises(InputError, match="optical_disc_track"):
        load_grating_preset("no_such_grating")
    with pytest.raises(InputError):
        load_grating_preset(None)


# ---------------------------------------------------------------------- reading
def test_valid_file_reads_back_its_values():
    gf = load_grating_file(json.dumps(_valid()))
    assert gf.lines_per_mm == 1200 and gf.band_nm == (400.0, 700.0) and gf.blaze_angle_deg == 17.5
    gf = load_grating_file(("\ufeff" + json.dumps(_valid())).encode("utf-8"))
    assert gf.name == "test grating"


def test_optional_name_and_scenario():
    data = _valid()
    del data["name"], data["scenario"]
    gf = grating_from_dict(data)
    assert gf.name == "untitled grating" and gf.scenario == ""


def test_lamellar_grooves_take_a_null_blaze_angle():
    data = _valid() | {"groove": "lamellar", "blaze_angle_deg": None}
    assert grating_from_dict(data).blaze_angle_deg is None


def _with(**changes):
    data = _valid()
    for k, v in changes.items():
        if v is _DROP:
            del data[k]
        else:
            data[k] = v
    return data


_DROP = object()

MALFORMED = [
    (_with(colour="red"), "colour"),
    (_with(lines_per_mm="1200"), "lines_per_mm"),
    (_with(lines_per_mm=True), "lines_per_mm"),
    (_with(lines_per_mm=0), "lines_per_mm"),
    (_with(lines_per_mm=-5), "lines_per_mm"),
    (_with(lines_per_mm=1e6), "lines_per_mm"),
    (_with(lines_per_mm=_DROP), "lines_per_mm"),
    (_with(kind="mirror"), "kind"),
    (_with(kind=None), "kind"),
    (_with(groove=3), "groove"),
    (_with(blaze_angle_deg=None), "blaze_angle_deg"),
    (_with(blaze_angle_deg=95), "blaze_angle_deg"),
    (_with(blaze_angle_deg="17"), "blaze_angle_deg"),
    (_with(duty_cycle=1.5), "duty_cycle"),
    (_with(duty_cycle=0), "duty_cycle"),
    (_with(incidence_deg=95), "incidence_deg"),
    (_with(incidence_deg=[35]), "incidence_deg"),
    (_with(band_nm=[700, 400]), "band_nm"),
    (_with(band_nm=[400]), "band_nm"),
    (_with(band_nm="400-700"), "band_nm"),
    (_with(band_nm=[400, "x"]), r"band_nm\[1\]"),
    (_with(band_nm=[50, 700]), r"band_nm\[0\]"),
    (_with(focal_length_mm=-1), "focal_length_mm"),
    (_with(illuminated_width_mm=0), "illuminated_width_mm"),
    (_with(detector_length_mm={}), "detector_length_mm"),
    (_with(pixel_pitch_um=_DROP), "pixel_pitch_um"),
    (_with(format="fringegauge-stack"), "format"),
    (_with(version=2), "version"),
    (_with(version=True), "version"),
    (_with(name=5), "name"),
    (_with(scenario="x" * 1001), "scenario"),
]


@pytest.mark.parametrize("data, field", MALFORMED)
def test_malformed_file_names_the_field(data, field):
    with pytest.raises(InputError, match=field):
        load_grating_file(json.dumps(data))
    with pytest.raises(InputError, match=field):
        grating_from_dict(data)


@pytest.mark.parametrize("text, words", [
    ('{"format": "fringegauge-grating", "lines_per_mm": NaN}', "NaN"),
    ('{"lines_per_mm": 1, "lines_per_mm": 2}', "lines_per_mm"),
    ("[1, 2, 3]", "one JSON object"),
    ("{", "not valid JSON"),
    ("", "not valid JSON"),
    ("1" * 5000, "usable"),
    ("[" * 100_000, "too large|nest"),
])
def test_not_a_grating_file(text, words):
    with pytest.raises(InputError, match=words):
        load_grating_file(text)


def test_bytes_that_are_not_utf8_or_too_large():
    with pytest.raises(InputError, match="UTF-8"):
        load_grating_file(b"\xff\xfe{}")
    with pytest.raises(InputError, match="at most"):
        load_grating_file(b" " * (MAX_FILE_BYTES + 1))
    with pytest.raises(InputError, match="text or bytes"):
        load_grating_file(12)


def test_limits_cover_every_numeric_field():
    numeric = {k for k, v in _valid().items() if isinstance(v, (int, float, list)) and k != "version"}
    assert numeric == set(LIMITS)


# ---------------------------------------------------------------------- fuzzing
def _load_any(content):
    """Load and accept only a GratingFile or an InputError with a message."""
    try:
        assert isinstance(load_grating_file(content), GratingFile)
    except InputError as exc:
        assert str(exc)


@given(json_values)
def test_fuzz_arbitrary_json_values(value):
    text = json.dumps(value)             # NaN and Infinity may appear: they must be refused too
    _load_any(text)
    _load_any(text.encode("utf-8", errors="surrogatepass"))


@given(st.dictionaries(st.one_of(st.sampled_from(FIELDS), st.text(max_size=8)), json_values, max_size=16))
def test_fuzz_json_objects(value):
    _load_any(json.dumps(value))


@given(field=st.sampled_from(FIELDS + ["extra"]), value=json_values)
def test_fuzz_one_field_of_a_valid_file(field, value):
    data = _valid()
    data[field] = value
    _load_any(json.dumps(data))


@given(st.binary(max_size=2000))
def test_fuzz_arbitrary_bytes(content):
    _load_any(content)


# ---------------------------------------------------------------------- the optional "rigorous" object
def _with_rigorous(rig):
    import json
    from physics.gratingfile import dump_grating_file, load_grating_preset
    data = json.loads(dump_grating_file(load_grating_preset("optical_disc_track")))
    data["rigorous"] = rig
    return json.dumps(data)


def test_rigorous_object_reads_and_writes_back():
    from dataclasses import replace
    from physics.gratingfile import dump_grating_file, load_grating_file, load_grating_preset
    old = load_grating_preset("optical_disc_track")
    assert old.rigorous is None and "rigorous" not in dump_grating_file(old)      # old files are unchanged
    rig = {"profile": "sinusoidal", "depth_nm": 90.0, "material": "Au", "polarization": "TM"}
    gf = load_grating_file(_with_rigorous(rig))
    assert gf.rigorous == rig and load_grating_file(dump_grating_file(gf)) == gf
    gf = replace(gf, rigorous=dict(rig, depth_nm=None))
    assert load_grating_file(dump_grating_file(gf)).rigorous["depth_nm"] is None


@pytest.mark.parametrize("rig, words", [
    ("blazed", "rigorous: must be an object"),
    ({"profile": "blazed", "depth_nm": None, "material": "Al"}, "rigorous.polarization: missing"),
    ({"profile": "wavy", "depth_nm": None, "material": "Al", "polarization": "TE"}, "rigorous.profile"),
    ({"profile": "blazed", "depth_nm": 0.0, "material": "Al", "polarization": "TE"}, "rigorous.depth_nm"),
    ({"profile": "blazed", "depth_nm": None, "material": "Pt", "polarization": "TE"}, "rigorous.material"),
    ({"profile": "blazed", "depth_nm": None, "material": "Al", "polarization": "TE", "x": 1}, "unknown field"),
])
def test_bad_rigorous_object_gets_a_sentence(rig, words):
    from physics.gratingfile import load_grating_file
    with pytest.raises(InputError, match=words):
        load_grating_file(_with_rigorous(rig))
