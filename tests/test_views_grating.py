"""The grating section driven from its objects, without a browser: every number against a direct physics call."""

import csv
import io

import numpy as np
import pytest
from PIL import Image

from physics import grating as gr
from physics.gratingfile import list_grating_presets, load_grating_preset
from views.grating import (DEFAULT_SOURCE_BAND_NM, FAN_RAYS, NO_PRESET, VIEW_DEG, GratingSection, compute_colour_map,
                           csv_wavelengths_nm, line_colours, map_densities)
from views.state import parse_number
from physics import InputError

STEMS = [stem for stem, _ in list_grating_presets()]


@pytest.fixture(scope="module")
def disc():
    return GratingSection("optical_disc_track")


@pytest.fixture()
def section():
    return GratingSection()


# ---------------------------------------------------------------------- presets and read-outs
@pytest.mark.parametrize("stem", STEMS)
def test_preset_readouts_equal_physics(stem):
    g = GratingSection(stem)
    gf = load_grating_preset(stem)
    s, r = g.settings, g.readouts
    assert (s.lines_per_mm, s.incidence_deg, s.band) == (gf.lines_per_mm, gf.incidence_deg, gf.band_nm)
    lo, hi = gf.band_nm
    c = 0.5 * (lo + hi)
    g_, a, m = gf.lines_per_mm, gf.incidence_deg, 1
    assert r["spacing_nm"] == pytest.approx(gr.groove_spacing_nm(g_))
    np.testing.assert_equal(r["beta_lo_deg"], gr.diffraction_angle_deg(lo, g_, m, a))
    np.testing.assert_equal(r["beta_hi_deg"], gr.diffraction_angle_deg(hi, g_, m, a))
    assert r["angular_dispersion_deg_per_nm"] == gr.angular_dispersion_deg_per_nm(c, g_, m, a)
    assert r["reciprocal_linear_dispersion_nm_per_mm"] == gr.reciprocal_linear_dispersion_nm_per_mm(
        c, g_, gf.focal_length_mm, m, a)
    assert r["resolving_power"] == gr.resolving_power(g_, gf.illuminated_width_mm, m)
    assert r["resolvable_nm"] == gr.resolvable_difference_nm(c, g_, gf.illuminated_width_mm, m)
    assert r["free_spectral_range_nm"] == gr.free_spectral_range_nm(lo, m)
    np.testing.assert_equal(r["littrow_deg"], gr.littrow_angle_deg(c, g_, m))
    if gf.groove == "blazed":
        assert r["blaze_nm"] == gr.blaze_wavelength_nm(gf.blaze_angle_deg, g_, m)
    for k, v in r["rayleigh_nm"].items():
        assert v == gr.rayleigh_wavelength_nm(g_, k, a)
    html = g.readout_html.object
    assert f"{r['spacing_nm']:.1f} nm" in html and f"{r['resolving_power']:,.0f}" in html
    assert "Invented scenario" in g.scenario.object


def test_section_builds_with_no_argument_and_shows_the_caution(section):
    assert section.settings.lines_per_mm == 1200
    text = section.caution.object
    assert "Never look at a laser or the sun along a diffracted order" in text
    assert "laser-safety rules and local codes" in text and "approximate" in text
    assert section.panel() is not None


def test_overlap_table_and_filter_equal_physics(section):
    s = section.settings
    assert s.source_band == DEFAULT_SOURCE_BAND_NM
    rows = gr.order_overlaps(s.band, s.lines_per_mm, s.order, s.incidence_deg, s.source_band)
    assert section.overlaps["rows"] == rows and rows
    assert section.overlaps["filter"] == gr.order_sorting_filter_nm(s.band, s.order, s.source_band)
    for r in rows:
        assert f"{r['lo_nm']:.0f}–{r['hi_nm']:.0f}" in section.overlap_html.object


def test_plan_table_equals_physics(section):
    s = section.settings
    plan = gr.plan_spectrometer(s.band, s.focal_length_mm, s.detector_length_mm, s.pixel_pitch_um)
    assert section.plan == plan and plan
    assert "current density" in section.plan_html.object            # 1200 lines/mm is among the designs
    for d in plan:
        assert f"{d.nm_per_pixel:.3f}" in section.plan_html.object


def test_new_density_changes_readouts_and_moves_the_map_marker(section):
    job = section._map_job
    section.density.input.value = "600"
    assert section.settings.lines_per_mm == 600 and not section.density.message.visible
    assert "1666.7 nm" in section.readout_html.object
    assert section.map_density.location == 600
    assert section._map_job == job                                    # the map does not depend on the density
    section.incidence.input.value = "20"
    assert section._map_job == job + 1 and section._map_shown_key == section.settings.map_key()


# ---------------------------------------------------------------------- fan of orders
@pytest.mark.parametrize("stem", STEMS)
def test_fan_has_one_entry_per_propagating_order(stem):
    g = GratingSection(stem)
    s = g.settings
    wl = np.linspace(*s.band, 201)
    expected = sorted({m for w in wl for m in gr.propagating_orders(w, s.lines_per_mm, s.incidence_deg)})
    assert g.fan_label_src.data["order"] == expected
    orders = np.array([int(o) for o in g.ray_src.data["order"]])
    for m in expected:
        if m == 0:
            continue
        rays = orders == m
        beta = gr.diffraction_angle_deg(np.linspace(*s.band, FAN_RAYS), s.lines_per_mm, m, s.incidence_deg)
        assert rays.sum() == np.isfinite(beta).sum() > 0
        np.testing.assert_allclose(np.asarray(g.ray_src.data["beta"])[rays], beta[np.isfinite(beta)])


def test_fan_sides_follow_the_grating_kind(section):
    y = np.asarray(section.ray_src.data["y1"])
    assert (y > 0).all()                                               # reflection: back on the incident side
    section.kind.value = "transmission"
    y = np.asarray(section.ray_src.data["y1"])
    assert (y < 0).all()                                               # transmission: through to the far side
    assert section.zero_src.data["y1"][0] < 0


def test_ray_colours_are_those_of_monochromatic_lines():
    blue, green, red, uv = line_colours([450.0, 540.0, 650.0, 300.0])
    rgb = lambda h: [int(h[i:i + 2], 16) for i in (1, 3, 5)]  # noqa: E731
    assert np.argmax(rgb(blue)) == 2 and np.argmax(rgb(green)) == 1 and np.argmax(rgb(red)) == 0
    assert uv == "#9e9e9e"
    for violet in line_colours([400.0, 415.0, 430.0]):       # violet: blue well above red, never magenta
        r, g, b = rgb(violet)
        assert b == 255 and g == 0 and r < 0.6 * b


def test_colour_map_range_follows_the_groove_density(section):
    assert map_densities(1200)[0] == 100 and map_densities(1200)[-1] == 2400
    np.testing.assert_allclose(np.diff(map_densities(1200)), 20.0)
    section.density.input.value = "3600"
    top = section.map_fig.y_range.end
    assert section.colour_map["lines_per_mm"][0] <= 3600 <= section.colour_map["lines_per_mm"][-1] == top
    assert section.map_density.location == 3600 and "lines/mm)" in section.map_fig.title.text
    section.density.input.value = "50"
    assert section.colour_map["lines_per_mm"][0] <= 50


# ---------------------------------------------------------------------- typed values
@pytest.mark.parametrize("attr, text, words", [
    ("density", "abc", "not a number"), ("density", "-5", "outside"), ("density", "0", "outside"),
    ("incidence", "95", "outside"), ("order", "0", "zero order"), ("order", "1.5", "whole number"),
    ("order", "abc", "not a number"), ("band_lo", "800", "band"), ("band_hi", "300", "band"),
    ("duty", "1.5", "outside"), ("blaze", "-1", "outside"), ("focal", "0", "outside"),
    ("pitch", "", "not a number"), ("density", "nan", "not a number"), ("focal", "NaN", "not a number"),
    ("density", "inf", "not finite"), ("incidence", "-inf", "not finite"),
])
def test_bad_value_shows_message_beside_the_field_and_keeps_the_state(attr, text, words):
    g = GratingSection("optical_disc_track")
    before, generation = g.settings, g.generation
    field = getattr(g, attr)
    field.input.value = text
    assert g.settings == before and g.generation == generation
    assert field.message.visible and words in field.message.object.lower()
    assert "role=\"alert\"" in field.message.object


@pytest.mark.parametrize("text, value", [("1,200", 1200.0), ("1 200", 1200.0), ("1\u202f200", 1200.0),
                                         ("1,200.5", 1200.5), ("1200", 1200.0), ("600,5", 600.5)])
def test_density_with_a_thousands_separator_is_read_when_unambiguous(section, text, value):
    section.density.input.value = text
    assert section.settings.lines_per_mm == value and not section.density.message.visible


@pytest.mark.parametrize("attr, text, words", [
    ("density", "20,000", "could be read as 20 (decimal comma) or 20000"),
    ("density", "12 000", "12000 lines/mm (from '12 000') is outside"),
    ("focal", "1,200", "could be read as 1.2"),
])
def test_ambiguous_or_out_of_range_grouped_numbers_are_explained(section, attr, text, words):
    before = section.settings
    field = getattr(section, attr)
    field.input.value = text
    assert section.settings == before and field.message.visible
    assert words in field.message.object and "thousands separator" in field.message.object


def test_typed_numbers_keep_the_decimal_comma():
    assert parse_number("1,5", "x", 0, 10) == 1.5
    assert parse_number("−2", "x", -10, 10) == -2
    with pytest.raises(InputError, match="not a number"):
        parse_number("1.200,5", "x", 0, 10_000)
    assert parse_number("1,200", "x", 10, 10_000) == 1200            # 1.2 is out of range: a separator
    with pytest.raises(InputError, match="could be read as 1.2"):      # 1.2 in range: never guessed
        parse_number("1,200", "x", 0, 100)
    with pytest.raises(InputError, match="could be read as 20"):
        parse_number("20,000", "x", 0, 50_000)


@pytest.mark.parametrize("lo, hi, other_lo, other_hi", [
    ("band_lo", "band_hi", "band_lo_nm", "band_hi_nm"), ("source_lo", "source_hi", "source_lo_nm", "source_hi_nm")])
def test_linked_pair_applies_both_typed_values_once_valid(lo, hi, other_lo, other_hi):
    g = GratingSection()
    lo_f, hi_f = getattr(g, lo), getattr(g, hi)
    start = (getattr(g.settings, other_lo), getattr(g.settings, other_hi))
    big = start[1] + 100
    lo_f.input.value = f"{big:g}"                        # above the long end: refused
    assert lo_f.message.visible and (getattr(g.settings, other_lo), getattr(g.settings, other_hi)) == start
    hi_f.input.value = f"{big + 200:g}"                  # now the pair is valid: both typed values apply
    assert (getattr(g.settings, other_lo), getattr(g.settings, other_hi)) == (big, big + 200)
    assert not lo_f.message.visible and not hi_f.message.visible
    if lo == "band_lo":
        assert f"{big:g}–{big + 200:g} nm" in g.fan_fig.title.text
        assert f"β at {big:g} nm" in g.readout_html.object
    hi_f.input.value = f"{big - 50:g}"                   # below the short end: refused, marked, not applied
    assert hi_f.message.visible and getattr(g.settings, other_hi) == big + 200


def test_linked_pair_never_shows_an_unused_value_without_a_message():
    g = GratingSection()                                 # band 400-700
    g.band_lo.input.value = "800"
    g.band_hi.input.value = "750"                        # still not a band: both fields say so
    assert g.settings.band == (400.0, 700.0)
    assert g.band_lo.message.visible and g.band_hi.message.visible
    g.band_lo.input.value = "abc"                        # its own message; the other end is not applied either
    assert g.band_lo.message.visible and "not a number" in g.band_lo.message.object
    g.band_hi.input.value = "650"                        # applied with the short end in use (400 nm)
    assert g.settings.band == (400.0, 650.0) and not g.band_hi.message.visible and g.band_lo.message.visible


def test_source_band_sets_the_overlaps_and_the_filter():
    g = GratingSection()
    g.source_lo.input.value = "350"
    g.source_hi.input.value = "1000"
    s = g.settings
    assert s.source_band == (350.0, 1000.0)
    assert g.overlaps["rows"] == gr.order_overlaps(s.band, s.lines_per_mm, s.order, s.incidence_deg, (350.0, 1000.0))
    assert "source taken to emit 350–1000 nm" in g.overlap_html.object
    g.source_hi.input.value = "20001"
    assert g.source_hi.message.visible and g.settings.source_band == (350.0, 1000.0)
    g.source_lo.input.value = "500"                      # does not cover the band's short end: said
    assert "does not cover all of the band" in g.overlap_html.object


def test_hidden_groove_field_returns_to_its_value_in_use(section):
    section.blaze.input.value = "-1"
    assert section.blaze.message.visible
    section.groove.value = "lamellar"
    section.groove.value = "blazed"
    assert section.blaze.input.value == "17.5" and not section.blaze.message.visible


def test_good_value_after_a_bad_one_clears_the_message():
    g = GratingSection()
    g.order.input.value = "0"
    assert g.order.message.visible and g.settings.order == 1
    g.order.input.value = "2"
    assert not g.order.message.visible and g.settings.order == 2
    assert g.readouts["resolving_power"] == gr.resolving_power(1200, 10, 2)
    g.order.input.value = "−1"                                          # a typographic minus is accepted
    assert g.settings.order == -1


def test_order_that_does_not_propagate_is_explained_not_refused():
    g = GratingSection()
    g.order.input.value = "5"
    assert g.settings.order == 5 and not g.order.message.visible
    assert "evanescent" in g.readout_html.object
    assert "does not propagate" in g.overlap_html.object


def test_changed_grating_leaves_its_preset_and_scenario(section):
    assert section.preset.value == "compact_spectrometer_1200_blazed" and "Invented scenario" in section.scenario.object
    section.density.input.value = "3600"
    assert section.preset.value == "" and dict(section.preset.options)[NO_PRESET] == ""
    assert "Invented scenario" not in section.scenario.object and "Changed from the preset" in section.scenario.object
    assert "(changed)" in section.file_text() and '"scenario": ""' in section.file_text()
    section.order.input.value = "2"                       # a view choice, not the grating: still changed
    section.density.input.value = "1200"                  # the preset's grating again
    assert section.preset.value == "compact_spectrometer_1200_blazed"
    assert "Invented scenario" in section.scenario.object and "(changed)" not in section.file_text()
    section.density.input.value = "3600"
    section.preset.value = "compact_spectrometer_1200_blazed"     # choosing it again restores it
    assert section.settings.lines_per_mm == 1200 and section.density.input.value == "1200"


def test_preset_names_fit_their_selector():
    # the selector is 300 px wide: about 36 characters of its 14 px font (measured in Chromium)
    assert all(len(name) <= 36 for _, name in list_grating_presets())


def test_preset_choice_resets_fields_and_messages(section):
    section.density.input.value = "abc"
    section.preset.value = "colour_check_600_transmission"
    assert not section.density.message.visible and section.density.input.value == "600"
    assert section.settings.kind == "transmission" and section.kind.value == "transmission"
    assert section.duty.input.visible and not section.blaze.input.visible


# ---------------------------------------------------------------------- line shape
@pytest.mark.parametrize("n", [8, 40])
def test_line_shape_has_n_minus_2_secondary_maxima_and_missing_orders(disc, n):
    disc.n_slits.value = n
    ls = disc.line_shape
    s = disc.settings
    c = s.centre_nm
    np.testing.assert_allclose(ls["rel"], gr.n_slit_intensity(ls["beta"], c, s.lines_per_mm, n,
                                                               slit_width_nm=s.duty_cycle * ls["spacing_nm"],
                                                               incidence_deg=s.incidence_deg) / n ** 2)
    b0, b1 = (gr.diffraction_angle_deg(c, s.lines_per_mm, m, s.incidence_deg) for m in (0, 1))
    inside = (ls["beta"] > b0 + 0.2) & (ls["beta"] < b1 - 0.2)        # leave out the principal maxima
    y = ls["rel"][inside]
    peaks = np.sum((y[1:-1] > y[:-2]) & (y[1:-1] > y[2:]))
    assert peaks == n - 2
    missing = [o["order"] for o in ls["orders"] if o["missing"]]
    assert missing and all(m % 2 == 0 for m in missing)              # duty cycle 0.5: even orders vanish
    assert any("missing" in t for t in disc.missing_src.data["label"])


def test_log_scale_plots_decibels(disc):
    disc.scale.value = "log"
    assert np.allclose(disc.shape_src.data["y"], disc.line_shape["db"], atol=1e-4)
    assert disc.shape_fig.y_range.start < -20
    disc.scale.value = "linear"
    assert np.allclose(disc.shape_src.data["y"], disc.line_shape["rel"], atol=1e-6)


# ---------------------------------------------------------------------- colours
def test_strip_and_map_equal_physics(section):
    s = section.settings
    col = gr.grating_color(VIEW_DEG, s.lines_per_mm, s.incidence_deg, s.illuminant, normalize=s.brightness,
                           **s.groove_kw())
    np.testing.assert_array_equal(section.strip["rgb"], col["rgb"])
    dens = map_densities(s.lines_per_mm)
    cm = gr.grating_color_map(VIEW_DEG, dens, s.incidence_deg, s.illuminant, normalize=s.brightness,
                              **s.groove_kw())
    np.testing.assert_array_equal(section.colour_map["rgb"], cm["rgb"])
    assert section.map_src.data["image"][0].shape == (dens.size, VIEW_DEG.size)
    section.brightness.value = "per_direction"
    np.testing.assert_array_equal(section.colour_map["rgb"], compute_colour_map(section.settings)["rgb"])


# ---------------------------------------------------------------------- downloads
def test_csv_download_parses_with_units_in_the_header(section):
    text = section._fan_csv().read()
    rows = [r for r in csv.reader(io.StringIO(text)) if r and not r[0].startswith("#")]
    head, body = rows[0], rows[1:]
    assert head[:3] == ["order", "wavelength_nm", "beta_deg"]
    assert "angular_dispersion_deg_per_nm" in head and "reciprocal_linear_dispersion_nm_per_mm" in head
    s = section.settings
    wl = np.arange(400.0, 700.1, 5.0)                   # 400-700 nm: a 5 nm step (60 steps at most)
    expected = [(m, w) for m in section.fan["drawn"] for w in wl
                if np.isfinite(gr.diffraction_angle_deg(w, s.lines_per_mm, m, s.incidence_deg))]
    assert [(int(r[0]), float(r[1])) for r in body] == expected         # evanescent rows left out
    for r in body:
        m, w = int(r[0]), float(r[1])
        assert float(r[2]) == pytest.approx(gr.diffraction_angle_deg(w, s.lines_per_mm, m, s.incidence_deg), abs=1e-6)
    assert "evanescent" in text and "left out" in text


@pytest.mark.parametrize("band, step", [((400.0, 700.0), 5.0), ((380.0, 780.0), 10.0), ((400.0, 410.0), 0.2),
                                        ((403.3, 700.0), 5.0), ((200.0, 1100.0), 20.0)])
def test_csv_wavelengths_use_a_round_step_and_keep_the_band_ends(band, step):
    wl = csv_wavelengths_nm(band)
    assert wl[0] == band[0] and wl[-1] == band[1]
    inner = wl[1:-1]
    np.testing.assert_allclose(inner / step, np.round(inner / step), atol=1e-9)
    assert np.all(np.diff(wl) <= step + 1e-9) and len(wl) <= 62


@pytest.mark.parametrize("which", ["_map_png", "_strip_png"])
def test_png_downloads_open(section, which):
    img = Image.open(getattr(section, which)())
    assert img.format == "PNG" and img.size[0] >= 800


def test_strip_download_is_the_strip_on_the_page(section):
    section.density.input.value = "3600"
    img = np.asarray(Image.open(section._strip_png()).convert("RGB"))
    shown = np.round(np.asarray(section.strip["rgb"]) * 255).astype(int)
    # the row through the middle of the strip holds exactly the page's colours, and nothing else
    colours = {tuple(c) for c in shown}
    rows = [r for r in img if len({tuple(p) for p in r[40:-40]} - colours) <= 3]   # a frame and the zero-order line
    assert len(rows) >= 100
    assert "3600 lines/mm" in Image.open(section._strip_png()).info["Title"]


def test_grooves_too_fine_for_the_band_leave_only_the_zero_order(section):
    section.density.input.value = "10000"
    assert section.fan_label_src.data["order"] == [0]
    assert "Only the zero order propagates" in section.fan_caption.object
    assert "evanescent" in section.readout_html.object


# ---------------------------------------------------------------------- laser, deviation, wide bands, missing orders
def test_a_laser_line_source_shows_its_caution_and_every_beam_it_sends():
    g = GratingSection()
    assert not g.laser_caution.visible
    g.source.value = "laser"
    g.laser.input.value = "532"
    s = g.settings
    assert s.source == "laser" and s.laser_nm == 532.0 and g.laser_caution.visible
    assert "laser-safety rules" in g.laser_caution.object and "zero order" in g.laser_caution.object
    html = g.overlap_html.object
    assert "532 nm laser line" in html and "Beams leaving the grating" in html
    for m in gr.propagating_orders(532.0, s.lines_per_mm, s.incidence_deg):
        beta = gr.diffraction_angle_deg(532.0, s.lines_per_mm, m, s.incidence_deg)
        assert f"{float(beta):.2f}°".replace("-0.00", "0.00") in html
    lo, hi = s.source_band
    assert lo < 532.0 < hi and hi - lo < 0.1


def test_one_deviation_setting_drives_the_planner_and_the_blaze_read_out():
    g = GratingSection()
    assert g.settings.deviation_deg == 30.0 and g.deviation.input.value == "30"
    g.deviation.input.value = "40"
    s = g.settings
    designs = gr.plan_spectrometer(s.band, s.focal_length_mm, s.detector_length_mm, s.pixel_pitch_um, deviation_deg=40.0)
    assert g.plan == designs
    expected = gr.blaze_wavelength_at_deviation_nm(s.blaze_angle_deg, s.lines_per_mm, 1, 40.0)
    assert g.readouts["blaze_at_deviation_nm"] == pytest.approx(expected)
    assert "planner's 40° deviation" in g.readout_html.object and "40° between incident" in g.plan_html.object
    g.deviation.input.value = "150"
    assert g.settings.deviation_deg == 40.0 and "outside 0 to 120" in g.deviation.message.object


def test_the_planner_takes_a_broadband_band_with_a_stepped_filter_and_says_why_others_dropped():
    g = GratingSection()
    g.band_hi.input.value = "1000"                             # 400-1000 nm: wider than one free spectral range
    s = g.settings
    designs, rejected = gr.plan_spectrometer_report(s.band, s.focal_length_mm, s.detector_length_mm,
                                                    s.pixel_pitch_um, source_band_nm=s.source_band)
    assert designs and all(d.filter_edges_nm for d in designs) and g.plan == designs
    flt = gr.order_sorting_filter_nm(s.band, 1, s.source_band)
    assert designs[0].filter_edges_nm == tuple(flt["edges_nm"])
    assert "stepped, edges" in g.plan_html.object and "dropped out" in g.plan_html.object
    for r in rejected:
        assert f"{r.lines_per_mm:g} lines/mm, order {r.order:+d}" in g.plan_html.object and r.reason
    assert gr.plan_spectrometer(s.band, s.focal_length_mm, s.detector_length_mm, s.pixel_pitch_um) == []


def test_a_lamellar_grating_at_half_duty_marks_its_missing_even_orders():
    g = GratingSection()
    g.groove.value = "lamellar"
    g.density.input.value = "300"                               # many orders propagate
    s = g.settings
    assert s.duty_cycle == 0.5
    missing = g.readouts["missing_orders"]
    props = [m for m in gr.propagating_orders(s.band_lo_nm, s.lines_per_mm, s.incidence_deg) if m]
    assert missing and missing == [m for m in props if m % 2 == 0 and abs(m) <= 12]
    assert "every even order" in g.readout_html.object
    g.duty.input.value = "0.3"
    assert "every even order" not in g.readout_html.object
