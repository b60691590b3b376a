"""The spectrum → thickness section driven from its objects, without a browser.

Spectra are made with physics itself for invented wafers (the fit is checked against outside
spectra in tests/test_fit_outside.py); here the page's import, messages and downloads are checked.
"""

import csv
import io
import json

import numpy as np
import pytest

from physics import Stack
from views.explorer import FilmExplorer
from views.fit import SpectrumFitSection

WL = np.linspace(400.0, 1000.0, 250)


@pytest.fixture()
def section():
    return SpectrumFitSection(FilmExplorer())            # thermal oxide on silicon, swept layer 0, 0°


def _spectrum(section, thickness, sigma=0.003, seed=1):
    R = section.ex.state.stack.with_thickness(0, thickness).reflectance(WL)
    return R + np.random.default_rng(seed).normal(0.0, sigma, WL.size)


def _csv(wl, values, header="Invented spectrometer export\nwavelength_nm,reflectance\n", fmt="{:.4f},{:.7f}"):
    return (header + "\n".join(fmt.format(a, b) for a, b in zip(wl, values))).encode()


def _fit(section, thickness=650.0, **kw):
    assert section.load_file("sample", _csv(WL, _spectrum(section, thickness, **kw)), "wafer.csv")
    assert section.run_fit(sync=True)
    return section.result


def test_uploaded_spectrum_is_fitted(section):
    r = _fit(section, 650.0)
    assert r is not None and abs(r.thickness_nm - 650.0) <= 3 * r.uncertainty_nm
    assert "d = " in section.verdict.object and "(1σ)" in section.verdict.object
    assert section.verdict.alert_type == "success"
    assert "not certified metrology" in section.disclaimer.object
    assert len(section.meas_src.data["wl"]) == 250 and len(section.model_src.data["R"]) == 250
    assert len(section.scan_src.data["d"]) == r.scan_thickness_nm.size
    assert section.minima_src.data["label"][0] == "best"
    assert "Fourier estimate" in section.details.object
    opt, d, _, _ = section.fourier_thickness()
    assert d == pytest.approx(650.0, rel=0.1)
    assert "Wavelengths read as nm" in section.notes.object
    assert not section.dl_csv.disabled and not section.dl_json.disabled


def test_percent_and_micrometres_detected_with_overrides(section):
    R = _spectrum(section, 300.0)
    data = _csv(WL / 1000, 100 * R, header="λ (µm); R (%)\n", fmt="{:.6f};{:.5f}")
    assert section.load_file("sample", data, "um_percent.txt")
    assert "µm" in section.notes.object and "percent" in section.notes.object
    assert section.import_info["wavelength_unit"] == "um" and section.import_info["value_unit"] == "percent"
    section.run_fit(sync=True)
    assert abs(section.result.thickness_nm - 300.0) <= 3 * section.result.uncertainty_nm
    section.value_unit.value = "fraction"                  # a wrong override: values 10-50 read as fractions
    assert section.result is None and "spectrum changed" in section.verdict.object   # the old fit is gone
    assert "look like percent" in section.notes.object and "as chosen" in section.notes.object
    section.run_fit(sync=True)
    assert section.fit_msg.message.visible and "choose percent" in section.fit_msg.message.object
    assert section.result is None
    section.value_unit.value = "auto"
    assert not section.fit_msg.message.visible             # its cause is gone
    section.wl_unit.value = "nm"                           # a wrong override: 0.4-1 nm
    assert "check the wavelength unit" in section.notes.object and "Wavelengths read as nm (as chosen" in \
        section.notes.object
    section.run_fit(sync=True)
    assert section.wl_lo.message.visible and section.result is None


@pytest.mark.parametrize("bad,expect", [(b"", "usable rows"), (b"not a spectrum at all\n" * 3, "usable rows"),
                                        (b"\x89PNG\r\n\x1a\n\x00\x00", "not text"),
                                        (_csv(WL[:5], np.full(5, 0.3)), "at least 10"),
                                        (b"wl,R\n" + b"\n".join(b"%d,%.2f" % (400 + i, 0.3) for i in range(12))
                                         + b"\n" + b"\n".join(b"%d,bad" % (500 + i) for i in range(20)), "Line 14")],
                         ids=["empty", "text", "binary", "five_rows", "text_column"])
def test_bad_files_show_a_message_and_keep_the_previous_result(section, bad, expect):
    r = _fit(section, 650.0)
    spectrum = section.spectrum
    assert not section.load_file("sample", bad, "bad.csv")
    assert section.file_msg["sample"].message.visible and expect in section.file_msg["sample"].message.object
    assert section.result is r and section.spectrum is spectrum
    assert section.files["sample"][0] == "wafer.csv"
    section.run_fit(sync=True)                             # the previous file is still the one fitted
    assert section.result.thickness_nm == pytest.approx(r.thickness_nm)


def test_a_file_is_read_once_and_a_unit_change_only_reinterprets_it(section, monkeypatch):
    import views.fit as vfit

    reads = []
    real = vfit.read_spectrum_table
    monkeypatch.setattr(vfit, "read_spectrum_table", lambda data, **kw: reads.append(len(data)) or real(data, **kw))
    R = _spectrum(section, 300.0)
    assert section.load_file("sample", _csv(WL / 1000, 100 * R, fmt="{:.6f},{:.5f}"), "um_percent.csv")
    assert len(reads) == 1 and section.spectrum[0][0] == pytest.approx(400.0)
    section.wl_unit.value = "nm"                             # the same numbers read as nm: 0.4-1 nm
    section.value_unit.value = "fraction"
    assert len(reads) == 1 and section.spectrum[0][0] == pytest.approx(0.4)
    assert all(not isinstance(table, (bytes, str)) for _, table in section.files.values())


def test_an_oversized_spectrum_says_its_size_in_megabytes(section):
    assert not section.load_file("sample", b"1" * 20_000_001, "huge.csv")
    msg = section.file_msg["sample"].message.object
    assert "huge.csv is 20,000,001 bytes; this server accepts up to 20,000,000 bytes" in msg and "19.1" not in msg
    assert not section.load_file("sample", b"1" * 25_000_000, "huger.csv")
    assert "huger.csv is 25 MB; this server accepts up to 20 MB for it." in section.file_msg["sample"].message.object


def test_a_spectrum_over_the_line_bound_is_refused_with_how_to_fix_it(section):
    assert not section.load_file("sample", b"4,1\n" * 300_000, "dense.csv")
    msg = section.file_msg["sample"].message.object
    assert "dense.csv: The spectrum file has more than 200,000 lines" in msg and "every 1 nm" in msg


def test_bad_fields_show_messages_beside_them_and_keep_the_result(section):
    r = _fit(section, 650.0)
    section.win_hi.input.value = "lots"
    assert not section.run_fit(sync=True)
    assert section.win_hi.message.visible and section.result is r
    section.win_hi.input.value = "100000"                  # too wide to resolve
    section.run_fit(sync=True)
    assert section.win_hi.message.visible and "narrow the window" in section.win_hi.message.object
    assert section.result is r
    section.win_hi.input.value = "3000"
    section.wl_lo.input.value = "200"                      # a range holding none of the file's points
    section.wl_hi.input.value = "210"
    section.run_fit(sync=True)
    assert section.fit_msg.message.visible and section.result is r
    section.wl_lo.input.value = "500"
    section.wl_hi.input.value = "800"
    section.run_fit(sync=True)
    assert section.result is not r and section.result.wavelength_nm.max() <= 800
    assert not section.win_hi.message.visible and not section.fit_msg.message.visible


def test_spectrum_beyond_the_materials_data_is_refused(section):
    wl = np.linspace(200.0, 1000.0, 300)                   # the silicon page has data from 250 nm
    assert section.load_file("sample", _csv(wl, np.full(wl.size, 0.3)), "uv.csv")
    section.run_fit(sync=True)
    assert section.wl_lo.message.visible and "250" in section.wl_lo.message.object
    assert section.result is None


def test_downloads_parse(section):
    r = _fit(section, 1200.0)
    text = section._curves_csv().getvalue()
    assert "# units: wavelength in nm" in text
    rows = [row for row in csv.reader(io.StringIO(text)) if row and not row[0].startswith("#")]
    assert rows[0] == ["wavelength_nm", "measured_R_fraction", "model_R_fraction", "residual_fraction"]
    data = np.array(rows[1:], dtype=float)
    assert data.shape == (r.n_points, 4) and np.allclose(data[:, 1] - data[:, 2], data[:, 3], atol=1e-7)
    scan = [row for row in csv.reader(section._scan_csv()) if row and not row[0].startswith("#")]
    assert scan[0] == ["thickness_nm", "rms_fraction"] and len(scan) - 1 == r.scan_thickness_nm.size
    summary = json.loads(section._summary_json().getvalue())
    assert summary["result"]["thickness_nm"] == pytest.approx(r.thickness_nm)
    assert summary["result"]["uncertainty_level"] == "1 sigma"
    assert "not certified metrology" in summary["note"]
    layers = summary["stack"]["layers"]
    assert layers[0]["material"] == "SiO2" and layers[0]["unknown"] == "first" and layers[0]["thickness_nm"] is None
    assert "Malitson" in layers[0]["source"] and "Green" in summary["stack"]["substrate"]["source"]
    assert "Ciddor" in summary["stack"]["ambient"]["source"]
    assert summary["inputs"]["import"]["sample_file"] == "wafer.csv"
    assert summary["inputs"]["thickness_window_nm"] == [0.0, 3000.0]


def test_reference_and_dark_counts(section):
    """Invented raw counts: dark 800, a lamp rising with wavelength, a bare-silicon reference wafer."""
    truth = 480.0
    R = _spectrum(section, truth, sigma=0.0)
    lamp = 20000.0 + 30.0 * (WL - 400.0)
    dark = np.full(WL.size, 800.0)
    r_si = Stack([], substrate="Si").reflectance(WL)
    ref_counts = lamp * r_si + dark
    sample_counts = lamp * R + dark + np.random.default_rng(4).normal(0, 30, WL.size)
    assert section.load_file("sample", _csv(WL, sample_counts, fmt="{:.4f},{:.2f}"), "sample_counts.csv")
    fine = np.linspace(390.0, 1010.0, 400)                 # the reference on another grid: interpolated
    assert section.load_file("reference", _csv(fine, np.interp(fine, WL, ref_counts), fmt="{:.4f},{:.3f}"), "ref.csv")
    assert section.load_file("dark", _csv(WL, dark, fmt="{:.4f},{:.1f}"), "dark.csv")
    assert section.import_info["counts"] and "interpolated" in section.notes.object
    assert "bare silicon" in section.notes.object
    assert np.allclose(section.spectrum[1], R, atol=0.01)
    section.run_fit(sync=True)
    r = section.result
    assert abs(r.thickness_nm - truth) <= 3 * r.uncertainty_nm
    assert json.loads(section._summary_json().getvalue())["inputs"]["import"]["dark_file"] == "dark.csv"
    # a number for the reference's reflectance: a reference mirror of 0.9 (invented)
    section.ref_mode.value = "number"
    section.ref_value.input.value = "0.9"
    assert np.allclose(section.spectrum[1], 0.9 * R / r_si, atol=0.02)
    section.ref_value.input.value = "2"
    assert section.ref_value.message.visible
    # a dark above the reference is refused beside the dark file, keeping the spectrum
    section.ref_mode.value = "silicon"
    spectrum = section.spectrum
    assert not section.load_file("dark", _csv(WL, ref_counts + 10, fmt="{:.4f},{:.1f}"), "bright_dark.csv")
    assert section.file_msg["dark"].message.visible and section.spectrum is spectrum
    assert section.files["dark"][0] == "dark.csv"
    # a reference that does not cover the sample
    assert not section.load_file("reference", _csv(WL[:100], ref_counts[:100], fmt="{:.4f},{:.3f}"), "short.csv")
    assert "covers" in section.file_msg["reference"].message.object
    section._on_clear_ref()                                # raw counts without a reference: nothing to fit
    assert section.spectrum is None and section.result is None and not section.clear_ref.visible
    assert "raw counts" in section.file_msg["sample"].message.object


def test_second_unknown_layer_and_free_scale(section):
    ex = section.ex
    ex.state.load_preset("nitride_on_oxide_on_silicon")
    ex._sync_widgets()
    assert list(section.second.options.values()) == [-1, 1]
    st = ex.state.stack
    R = st.with_thickness(0, 220.0).with_thickness(1, 380.0).reflectance(WL)
    R = 0.95 * R + 0.005 + np.random.default_rng(7).normal(0, 0.003, WL.size)
    section.load_file("sample", _csv(WL, R), "two_layers.csv")
    section.second.value = 1
    section.win_hi.input.value = "1000"
    section.free_scale.value = True
    section.free_offset.value = True
    section.run_fit(sync=True)
    r = section.result
    assert abs(r.thickness_nm - 220.0) <= 3 * r.uncertainty_nm
    assert abs(r.second_thickness_nm - 380.0) <= 3 * r.second_uncertainty_nm
    assert "d₂ = " in section.verdict.object and "scale" in section.verdict.object
    summary = section.summary()
    assert summary["stack"]["layers"][1]["unknown"] == "second" and summary["inputs"]["free_scale"]
    ex.state.angle_deg = 10.0                              # the explorer changes: a fit of another model goes
    assert section.result is None and "changed since the last fit" in section.verdict.object
    assert section.dl_json.disabled and section.model_src.data["wl"] == []


def test_panel_builds(section):
    assert section.panel() is not None


# ---------------------------------------------------------------------- honest verdicts
def test_a_thick_film_outside_the_window_is_not_reported_as_a_result(section):
    """An invented 5 µm oxide: the default 0-3000 nm window cannot hold it."""
    r = _fit(section, 5000.0)
    assert r.quality == "poor"
    assert section.verdict.alert_type == "danger"
    assert "not trustworthy" in section.verdict.object and "±" not in section.verdict.object
    assert "does not reproduce the measured fringes" in section.verdict.object
    assert "widen the window to about 5600 nm" in section.verdict.object
    assert "outside the window searched" in section.details.object
    assert "not trustworthy" in section.spec_fig.title.text
    assert "not trustworthy" in section._curves_csv().getvalue()
    assert json.loads(section._summary_json().getvalue())["result"]["quoted_uncertainty_nm"] is None
    section.win_hi.input.value = "5600"                    # the page's own advice
    section.run_fit(sync=True)
    assert section.verdict.alert_type == "success" and abs(section.result.thickness_nm - 5000.0) < 1.0


def test_percent_forced_on_fractions_is_not_a_result(section):
    assert section.load_file("sample", _csv(WL, _spectrum(section, 640.0)), "fractions.csv")
    section.value_unit.value = "percent"
    assert "Reflectance read as percent (as chosen" in section.notes.object   # how the file was read stays
    assert "choose fraction" in section.notes.object
    section.run_fit(sync=True)
    assert section.verdict.alert_type == "danger" and "not trustworthy" in section.verdict.object


def test_a_wrong_fixed_underlayer_is_flagged(section):
    """Nitride on oxide: the stack says 20 nm of oxide, the invented wafer has 60 nm."""
    ex = section.ex
    ex.state.load_preset("nitride_on_oxide_on_silicon")
    ex._sync_widgets()
    R = ex.state.stack.with_thickness(0, 300.0).with_thickness(1, 60.0).reflectance(WL)
    R = R + np.random.default_rng(3).normal(0, 0.003, WL.size)
    assert section.load_file("sample", _csv(WL, R), "nitride.csv")
    section.win_hi.input.value = "2000"
    section.run_fit(sync=True)
    assert section.result.quality != "good" and section.verdict.alert_type in ("warning", "danger")
    assert "check the stack" in section.verdict.object.lower()


def test_a_good_fit_quotes_sensible_figures(section):
    """A noise-free spectrum: the statistical 1σ is tiny, the quoted one is floored and says so."""
    R = section.ex.state.stack.with_thickness(0, 640.0).reflectance(WL)
    assert section.load_file("sample", _csv(WL, R, fmt="{:.4f},{:.12f}"), "ideal.csv")
    section.run_fit(sync=True)
    r = section.result
    assert r.uncertainty_nm < 1e-3 and r.quoted_uncertainty_nm == pytest.approx(0.01)
    assert "d = 640.000 ± 0.010 nm (1σ)" in section.verdict.object
    assert "not meaningful" in section.verdict.object
    assert "640.000 ± 0.010" in section.spec_fig.title.text
    assert "640.000 +/- 0.010 (1 sigma)" in section._curves_csv().getvalue()
    assert section.resid_fig.yaxis.axis_label in ("residual (ppm)", "residual (ppb)")
    res = np.asarray(section.model_src.data["res"])
    assert 0.1 <= np.abs(res).max() < 1000                 # ticks of everyday size
    noisy = _fit(section, 640.0)                           # noise 0.3 %: percent and 2 significant digits
    assert section.resid_fig.yaxis.axis_label == "residual (% reflectance)"
    assert f"± {noisy.uncertainty_nm:.2f}" in section.verdict.object or f"± {noisy.uncertainty_nm:.3f}" in \
        section.verdict.object


# ---------------------------------------------------------------------- a changed measurement
def test_a_new_spectrum_clears_the_old_fit(section):
    _fit(section, 650.0)
    assert not section.dl_csv.disabled and len(section.model_src.data["R"]) > 0
    assert section.load_file("sample", _csv(WL, _spectrum(section, 900.0)), "second_wafer.csv")
    assert section.result is None and "The spectrum changed" in section.verdict.object
    assert section.verdict.alert_type == "light" and section.details.object == ""
    assert len(section.model_src.data["R"]) == 0 and len(section.scan_src.data["d"]) == 0
    assert len(section.minima_src.data["d"]) == 0 and not section.best_span.visible
    assert section.dl_csv.disabled and section.dl_scan.disabled and section.dl_json.disabled
    assert len(section.meas_src.data["wl"]) == WL.size          # the new measurement is shown
    section.run_fit(sync=True)
    assert abs(section.result.thickness_nm - 900.0) < 2.0
    section.wl_unit.value = "nm"                           # re-read (same values): nothing changed, fit kept
    assert section.result is not None


def test_raw_counts_without_a_reference_are_recognised_at_upload(section):
    counts = 20000.0 * _spectrum(section, 480.0, sigma=0.0) + 800.0
    assert section.load_file("sample", _csv(WL, counts, fmt="{:.4f},{:.2f}"), "counts.csv")
    msg = section.file_msg["sample"].message
    assert msg.visible and "raw counts" in msg.object and "add a reference spectrum" in msg.object
    assert "percent" not in section.notes.object
    assert section.spectrum is None and not section.run_fit(sync=True)
    assert "no reflectance" in section.fit_msg.message.object
    ref = 20000.0 * Stack([], substrate="Si").reflectance(WL) + 800.0
    assert section.load_file("reference", _csv(WL, ref, fmt="{:.4f},{:.2f}"), "ref.csv")
    assert not msg.visible and section.spectrum is not None and section.clear_ref.visible
    section.run_fit(sync=True)
    assert not section.fit_msg.message.visible and section.result is not None


def test_messages_clear_when_their_cause_is_gone(section):
    lamp = 20000.0
    R = _spectrum(section, 480.0, sigma=0.0)
    r_si = Stack([], substrate="Si").reflectance(WL)
    assert not section.clear_ref.visible and not section.ref_value_box.visible
    assert section.load_file("sample", _csv(WL, lamp * R, fmt="{:.4f},{:.2f}"), "s.csv")
    assert section.load_file("reference", _csv(WL, lamp * r_si, fmt="{:.4f},{:.2f}"), "r.csv")
    section.ref_mode.value = "number"
    assert section.ref_value_box.visible
    section.ref_value.input.value = "35"
    assert section.ref_value.message.visible
    section.ref_mode.value = "silicon"
    assert not section.ref_value.message.visible and not section.ref_value_box.visible
    # a fit message goes when the spectrum it was about is replaced
    section.wl_lo.input.value = "200"
    section.wl_hi.input.value = "210"
    section.run_fit(sync=True)
    assert section.fit_msg.message.visible
    section._on_clear_ref()
    assert section.load_file("sample", _csv(WL, R), "fraction.csv")
    assert not section.fit_msg.message.visible


def test_numbers_with_commas(section):
    section.win_hi.input.value = "1,5"
    assert "read as 1.5 nm" in section.win_hi.message.object and "fg-error" not in section.win_hi.message.object
    section.win_hi.input.value = "5,000"
    assert "could be read as 5 (decimal comma) or 5000" in section.win_hi.message.object
    assert section.load_file("sample", _csv(WL, _spectrum(section, 650.0)), "w.csv")
    assert not section.run_fit(sync=True)
    section.win_hi.input.value = "3000"
    assert not section.win_hi.message.visible
    assert section.run_fit(sync=True)


def test_details_name_both_windows(section):
    ex = section.ex
    ex.state.load_preset("nitride_on_oxide_on_silicon")
    ex._sync_widgets()
    R = ex.state.stack.with_thickness(0, 220.0).with_thickness(1, 380.0).reflectance(WL)
    section.load_file("sample", _csv(WL, R + np.random.default_rng(2).normal(0, 0.003, WL.size)), "two.csv")
    section.second.value = 1
    section.win_hi.input.value = "1000"
    section.win2_hi.input.value = "800"
    section.run_fit(sync=True)
    assert "second window searched" in section.details.object and "0–800 nm (layer 2)" in section.details.object


def test_a_dense_spectrum_is_averaged_and_says_so(section):
    wl = np.linspace(400.0, 1000.0, 20000)
    R = section.ex.state.stack.with_thickness(0, 1500.0).reflectance(wl)
    R = R + np.random.default_rng(5).normal(0, 0.003, wl.size)
    assert section.load_file("sample", _csv(wl, R), "dense.csv")
    seen = []
    section._show_progress = lambda job, f, text: seen.append(f)       # the progress the fit reports
    section.run_fit(sync=True)
    r = section.result
    assert r.n_points_read == 20000 and r.points_per_bin > 1 and abs(r.thickness_nm - 1500.0) < 3 * r.uncertainty_nm
    assert "averaged in groups of" in section.details.object
    assert seen and not section.progress.visible and not section.fit_button.disabled


def test_cancel_drops_the_running_fit(section):
    assert section.load_file("sample", _csv(WL, _spectrum(section, 650.0)), "w.csv")
    section._show_progress = lambda job, f, text: section.cancel()     # the user presses Cancel at once
    assert section.run_fit(sync=True)
    assert section.result is None and "cancelled" in section.status.object
    assert not section.fit_button.disabled and not section.progress.visible


def test_the_scan_plot_and_its_file_say_what_their_axes_say(section):
    """Title, axis and download name the same quantity: the rms residual at each trial thickness."""
    fig = section.scan_fig
    assert fig.title.text.startswith("rms residual against trial thickness")
    assert fig.yaxis[0].axis_label.startswith("rms residual") and "trial thickness" in fig.xaxis[0].axis_label
    assert section.dl_scan.filename == "rms_residual_vs_trial_thickness.csv"
    _fit(section, 650.0)
    assert fig.title.text.startswith("rms residual against trial thickness of layer 1")
    assert "goodness" not in (fig.title.text + section.dl_scan.label).lower()
