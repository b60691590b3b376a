"""Spectrum → thickness page section: import a measured reflectance spectrum and fit the film.

Shares the explorer's state: the model is the explorer's stack, the unknown layer is its swept
layer, and the angle and polarization are the explorer's. An optional second unknown layer is
chosen here. Every number comes from :mod:`physics.fit` (import, counts → reflectance, the fit,
the Fourier estimate); fits run in a worker process when served (:mod:`views.workers`), and a new request
supersedes an unfinished one. A rejected input shows its message beside its field and the
previous spectrum and result stay on screen.
"""

from __future__ import annotations

import io
import json
import logging
import math
from datetime import date
from functools import partial

import numpy as np
import panel as pn
from bokeh.models import ColumnDataSource, HoverTool, Legend, Range1d, Span
from bokeh.plotting import figure

from physics import InputError, Stack, read_spectrum, reflectance_from_counts
from physics.errors import WavelengthRangeError
from physics.fit import (BIN_POINTS_PER_FRINGE, COUNTS_ABOVE, MAX_FRACTION, MAX_SPECTRUM_BYTES,
                         fit_thickness_reporting, read_spectrum_table)

from .figures import RangeHolder
from . import workers
from .limits import JobCancelled, Limits, heavy_job, post_to_page, served, session_key
from .uploads import COMPACT, CappedDropper, UploadReader
from .explorer import Field, TickBox, _esc, _fmt, _label, field_pair
from .fit_film import BANDWIDTH_MAX_NM, FilmModelEditor, fit_film_reporting, page_text as film_page_text, settings_key
from .inverse import _locked, locked
from .state import THICKNESS_LIMITS_NM, parse_number
from .urlstate import widget_fields

log = logging.getLogger("fringegauge")

#: Largest spectrum file accepted through the page (bytes; 20 MB of 10**6 bytes), as physics.fit reads it.
MAX_UPLOAD_BYTES = MAX_SPECTRUM_BYTES
#: Default windows searched for the unknown layers (nm).
DEFAULT_WINDOW_NM = (0.0, 3000.0)
DEFAULT_SECOND_WINDOW_NM = (0.0, 1000.0)
#: Wavelengths typed for the range used (nm).
WAVELENGTH_LIMITS_NM = (1.0, 100_000.0)
NOT_METROLOGY = ("This result is a model fit of the spectrum to the stack shown, not certified metrology: "
                 "confirm with a calibrated instrument before a release decision.")
FILE_ROLES = ("sample", "reference", "dark")
#: Shown where the result was when the measurement changes under it.
SPECTRUM_CHANGED = "The spectrum changed: press “Fit thickness”."
#: Width of the message under a pair of fields (px): the controls column is 340 px wide.
PAIR_MESSAGE_WIDTH = 320
#: Title of the scan plot: the same words as its axes (the spectrum's rms residual at each trial thickness).
SCAN_TITLE = "rms residual against trial thickness of the unknown layer (triangles: refined minima)"
#: Residual axis units: the first whose values reach 0.1 is used (percent, then parts per million, billion).
RESIDUAL_UNITS = (("%", 1e-2), ("ppm", 1e-6), ("ppb", 1e-9))

#: The settings a share link carries: (link key, label, attribute, kind[, number bounds]).
LINK_FIELDS = (("s_ref", "Reference", "ref_mode", "choice"),
               ("s_refval", "Reference reflectance", "ref_value", "text", (0.0, 1.0)),
               ("s_wlunit", "Wavelength unit", "wl_unit", "choice"),
               ("s_unit", "Reflectance as", "value_unit", "choice"),
               ("s_from", "Window from", "win_lo", "text"),
               ("s_to", "Window to", "win_hi", "text"),
               ("s_second", "Second unknown layer", "second", "choice"),
               ("s_from2", "Second window from", "win2_lo", "text"),
               ("s_to2", "Second window to", "win2_hi", "text"),
               ("s_scale", "Free scale", "free_scale", "tick"),
               ("s_offset", "Free offset", "free_offset", "tick"),
               ("s_wlfrom", "Use wavelengths from", "wl_lo", "text"),
               ("s_wlto", "Use wavelengths to", "wl_hi", "text"),
               ("s_model", "Film model", "film_model", "choice"),
               ("s_rough", "Surface roughness", "film_roughness", "tick"),
               ("s_spread", "Thickness spread", "film_spread", "tick"),
               ("s_bw", "Instrument bandwidth", "film_bandwidth", "text", (0.0, BANDWIDTH_MAX_NM)),
               ("s_slit", "Slit shape", "film_slit", "choice"))


#: Wavelengths (nm) the spectrum figure spans before a spectrum arrives (the visible band and a little more).
PLACEHOLDER_WL_NM = (380.0, 1000.0)
#: Margin added to a fitted figure's range on each side, as a fraction of the data's span.
RANGE_PAD = 0.05

class _Stop(Exception):
    """A field was invalid; its message is already shown beside it."""


class SpectrumFitSection:
    """The spectrum → thickness section for one session, bound to a :class:`views.explorer.FilmExplorer`."""

    def __init__(self, explorer):
        self.ex = explorer
        self.files = {}                # role -> (name, physics.fit.SpectrumTable read from the file)
        self.spectrum = None           # (wavelength_nm, reflectance) in use
        self.import_info = {}          # what the import detected and did
        self.result = None             # physics.fit.FitResult
        self.result_info = None        # inputs and extras of the shown result
        self._job = 0
        self._waiting_for_reference = False    # a raw-counts sample is held until a reference arrives
        self._fit_error_fields = []            # fields showing a message from the last fit
        self._file_names = {}                  # the files the spectrum in use was read from
        self._build()

    # ------------------------------------------------------------------ widgets
    def _build(self):
        self.file_msg = {role: Field("") for role in FILE_ROLES}
        self.readers = {role: UploadReader(self.file_msg[role], "spectrum") for role in FILE_ROLES}
        self.file_in = {
            role: CappedDropper(MAX_UPLOAD_BYTES, locked(lambda name, data, role=role: self.load_file(role, data, name)),
                                locked(self.readers[role].refuse), what=f"The {role} spectrum file",
                                accepted_filetypes=[".csv", ".txt", ".tsv", ".dat", "text/csv", "text/plain",
                                                    "text/tab-separated-values"],
                                **COMPACT,
                                css_classes=[f"fg-fit-{role}-file"])
            for role in FILE_ROLES}
        self.clear_ref = pn.widgets.Button(label="Remove reference and dark", color="light", width=200,
                                           margin=(2, 5), visible=False)
        self.ref_mode = pn.widgets.RadioButtonGroup(options={"bare silicon (computed)": "silicon",
                                                             "a number": "number"}, value="silicon", margin=(2, 5))
        self.ref_value = Field("Reference reflectance (0-1)", width=160)
        self.ref_value.set_text("1.0")
        self.ref_value_box = self.ref_value.view()
        self.ref_value_box.visible = False
        self.wl_unit = pn.widgets.Select(label="Wavelength unit", options={"detected": "auto", "nm": "nm",
                                                                           "µm": "um"},
                                         value="auto", width=145, margin=(2, 5))
        self.value_unit = pn.widgets.Select(label="Reflectance as", options={"detected": "auto",
                                                                             "fraction (0-1)": "fraction",
                                                                             "percent": "percent",
                                                                             "raw counts": "counts"},
                                            value="auto", width=145, margin=(2, 5))
        self.notes = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px"}, css_classes=["fg-fit-notes"])

        self.unknown = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "13px"})
        self.win_lo = Field("Window from (nm)", width=140)
        self.win_hi = Field("to (nm)", width=140)
        self.win_lo.set_text(_fmt(DEFAULT_WINDOW_NM[0]))
        self.win_hi.set_text(_fmt(DEFAULT_WINDOW_NM[1]))
        self.second = pn.widgets.Select(label="Second unknown layer (optional)", options={"(none)": -1}, value=-1,
                                        width=300, margin=(2, 5))
        self.win2_lo = Field("Its window from (nm)", width=140)
        self.win2_hi = Field("to (nm)", width=140)
        self.win2_lo.set_text(_fmt(DEFAULT_SECOND_WINDOW_NM[0]))
        self.win2_hi.set_text(_fmt(DEFAULT_SECOND_WINDOW_NM[1]))
        self.free_scale = TickBox("Free scale (imperfect reference)")
        self.free_offset = TickBox("Free offset (stray light)")
        self.wl_lo = Field("Use wavelengths from (nm)", width=140, placeholder="all")
        self.wl_hi = Field("to (nm)", width=140, placeholder="all")
        self.fit_button = pn.widgets.Button(label="Fit thickness", color="primary", width=200, margin=(6, 5),
                                            css_classes=["fg-fit-run"])
        self.film = FilmModelEditor(self)
        self.film_model, self.film_roughness, self.film_spread = self.film.model, self.film.roughness, self.film.spread
        self.film_bandwidth, self.film_slit = self.film.bandwidth, self.film.slit
        self.fit_msg = Field("")
        self.status = pn.pane.HTML("", css_classes=["fg-status"], margin=(0, 5))
        self.progress = pn.indicators.Progress(value=0, max=100, width=300, visible=False, margin=(6, 5),
                                               css_classes=["fg-fit-progress"])
        self.cancel_button = pn.widgets.Button(label="Cancel the fit", color="light", width=140, margin=(2, 5),
                                               visible=False, css_classes=["fg-fit-cancel"])
        self.verdict = pn.pane.Alert("Upload a measured spectrum (two columns: wavelength, reflectance). The model "
                                     "is the film explorer's stack; the unknown layer is its swept layer, at its "
                                     "viewing angle and polarization.", alert_type="light", margin=(5, 5),
                                     css_classes=["fg-fit-verdict"])
        self.details = pn.pane.HTML("", margin=(0, 5), css_classes=["fg-fit-details"])
        self.disclaimer = pn.pane.HTML(f"<div style='font-size:11px;color:#555'>{NOT_METROLOGY}</div>",
                                       margin=(0, 5))

        tools = "pan,wheel_zoom,box_zoom,reset,save"
        self.meas_src = ColumnDataSource(dict(wl=[], R=[]))
        self.model_src = ColumnDataSource(dict(wl=[], R=[], res=[]))
        p = figure(height=280, sizing_mode="stretch_width", tools=tools, title="Measured and fitted spectra",
                   x_axis_label="wavelength (nm)", y_axis_label="reflectance (%)")
        meas = p.scatter("wl", "R", source=self.meas_src, size=4, color="#1f6fb4", alpha=0.7)
        fitted = p.line("wl", "R", source=self.model_src, line_width=2, color="#c0392b")
        p.add_tools(HoverTool(renderers=[meas], tooltips=[("λ", "@wl{0.0} nm"), ("R", "@R{0.00} %")]))
        # the legend sits beside the plot, where it can hide no measured point
        legend = Legend(items=[("measured", [meas]), ("model fit", [fitted])], orientation="horizontal",
                        location="top_right", label_text_font_size="11px", click_policy="hide", margin=0,
                        padding=2)
        p.add_layout(legend, "above")
        self.spec_fig = p
        self.spec_holder = RangeHolder(p, x=PLACEHOLDER_WL_NM, y=(0.0, 100.0))
        r = figure(height=160, sizing_mode="stretch_width", tools=tools, title="Residual (measured − model)",
                   x_axis_label="wavelength (nm)", y_axis_label="residual (% reflectance)", x_range=p.x_range,
                   y_range=Range1d(-1.0, 1.0))                      # set from the residuals when a fit is drawn
        r.scatter("wl", "res", source=self.model_src, size=3, color="#444")
        r.add_layout(Span(location=0, dimension="width", line_color="#999", line_dash="dashed"))
        self.resid_fig = r
        self.scan_src = ColumnDataSource(dict(d=[], rms=[]))
        self.minima_src = ColumnDataSource(dict(d=[], rms=[], label=[]))
        g = figure(height=220, sizing_mode="stretch_width", tools=tools,
                   title=SCAN_TITLE,
                   x_axis_label="trial thickness of the unknown layer (nm)", y_axis_label="rms residual (%)",
                   y_axis_type="log", y_range=Range1d(1e-3, 100.0),   # set from the curve when a fit is drawn
                   x_range=Range1d(0.0, 1000.0))
        g.line("d", "rms", source=self.scan_src, color="#333", line_width=1.2)
        mk = g.scatter("d", "rms", source=self.minima_src, marker="inverted_triangle", size=11, color="#c0392b")
        g.text("d", "rms", text="label", source=self.minima_src, text_font_size="10px", y_offset=-8,
               text_align="center")
        g.add_tools(HoverTool(renderers=[mk], tooltips=[("thickness", "@d{0.0} nm"), ("rms", "@rms{0.000} %")]))
        self.best_span = Span(location=0, dimension="height", line_color="#c0392b", line_dash="dashed",
                              visible=False)
        g.add_layout(self.best_span)
        self.scan_fig = g

        self.dl_csv = pn.widgets.FileDownload(callback=self._curves_csv, filename="spectrum_fit.csv",
                                              label="Measured, model and residual (.csv)", width=300,
                                              disabled=True, margin=(2, 5))
        self.dl_scan = pn.widgets.FileDownload(callback=self._scan_csv, filename="rms_residual_vs_trial_thickness.csv",
                                               label="rms residual against trial thickness (.csv)", width=300, disabled=True,
                                               margin=(2, 5))
        self.dl_json = pn.widgets.FileDownload(callback=self._summary_json, filename="fit_summary.json",
                                               label="Summary (.json)", width=300, disabled=True, margin=(2, 5))

        # Handlers that change Bokeh models run under the document lock (see views.inverse.locked).
        self.clear_ref.on_click(locked(self._on_clear_ref))
        self.cancel_button.on_click(locked(lambda *_: self.cancel()))
        self.ref_mode.param.watch(locked(lambda e: self._reimport()), "value")
        self.ref_value.input.param.watch(locked(lambda e: self._reimport()), "value")
        for field, name, limits in ((self.win_lo, "Window from", THICKNESS_LIMITS_NM),
                                    (self.win_hi, "Window to", THICKNESS_LIMITS_NM),
                                    (self.win2_lo, "Second window from", THICKNESS_LIMITS_NM),
                                    (self.win2_hi, "Second window to", THICKNESS_LIMITS_NM),
                                    (self.wl_lo, "Wavelengths from", WAVELENGTH_LIMITS_NM),
                                    (self.wl_hi, "Wavelengths to", WAVELENGTH_LIMITS_NM)):
            # each field says at once whether (and how) its text reads as a number
            field.input.param.watch(locked(lambda e, f=field, n=name, lim=limits: self._check_field(f, n, *lim)),
                                    "value")
        self.wl_unit.param.watch(locked(lambda e: self._reimport()), "value")
        self.value_unit.param.watch(locked(lambda e: self._reimport()), "value")
        self.fit_button.on_click(locked(lambda *_: self.run_fit()))
        self.film.use_button.on_click(locked(lambda *_: self.use_fitted_film()))
        self.ex.state.param.watch(locked(self._on_state), ["stack_json", "swept_layer", "angle_deg", "polarization"])
        self._sync_layers()

    # ------------------------------------------------------------------ link
    def link_fields(self):
        """The settings a share link carries (never the uploaded spectra), in the order they are applied."""
        return widget_fields(self, LINK_FIELDS) + [self.film.params.link_field()]

    # ------------------------------------------------------------------ explorer state
    def _sync_layers(self):
        s = self.ex.state
        try:
            stack = s.stack
        except InputError:
            return
        names = [l.material.name for l in stack.layers]
        if not names:
            self.unknown.object = "The stack has no layer: add one in the film explorer."
            self.second.options = {"(none)": -1}
            return
        swept = min(s.swept_layer, len(names) - 1)
        self.unknown.object = (f"Unknown layer: <b>layer {swept + 1} ({_esc(names[swept])})</b>, the explorer's "
                               f"swept layer; angle {s.angle_deg:g}°, {s.polarization}.")
        opts = {"(none)": -1} | {f"{i + 1}: {n}": i for i, n in enumerate(names) if i != swept}
        keep = self.second.value if self.second.value in opts.values() else -1
        self.second.options = opts
        self.second.value = keep

    def _on_state(self, *events):
        self._sync_layers()
        if self.film.adopting or self.film.adopted == settings_key(self.ex.state):
            return                                  # the fitted film went into the stack: the fit stays current
        if "reference" in self.files and self.ref_mode.value == "silicon":
            self._reimport()                        # the computed reference depends on the angle and ambient
        if self.result is not None or self.film.result is not None:    # a fit of another model must not look current
            self._clear_result("The stack, unknown layer, angle or polarization changed since the last fit: "
                               "press “Fit thickness”.")

    # ------------------------------------------------------------------ import
    def _on_clear_ref(self, *_):
        self.files.pop("reference", None)
        self.files.pop("dark", None)
        for role in ("reference", "dark"):
            self.readers[role].cancel()
            self.file_msg[role].show_error(None)
        self._show_file_controls()
        self._reimport()

    def _show_file_controls(self):
        """Show the controls that apply: removing a reference or dark only when one is loaded, the reference's
        reflectance as a number only when that is chosen."""
        self.clear_ref.visible = "reference" in self.files or "dark" in self.files
        self.ref_value_box.visible = self.ref_mode.value == "number"
        if self.ref_mode.value != "number":
            self.ref_value.show_error(None)

    def load_file(self, role: str, data: bytes, name: str = "") -> bool:
        """Take an uploaded file (``role``: sample, reference or dark); on a bad file say why beside it
        and keep the previous spectrum.

        When served, the file is read in a worker thread (:class:`views.uploads.UploadReader`): this
        returns True once reading has started, and the outcome shows beside the drop zone on a later tick.
        Otherwise it returns whether the file was taken.
        """
        if role not in FILE_ROLES:
            raise ValueError(role)
        name = name or f"{role}.csv"
        return self.readers[role].take(name, data, MAX_UPLOAD_BYTES,
                                       lambda data, progress: read_spectrum_table(data, progress=progress),
                                       partial(self._take_file, role, name), "Export just two columns.")

    def _take_file(self, role: str, name: str, table) -> bool:
        """Use a spectrum read from a file (a :class:`physics.fit.SpectrumTable`) as ``role``."""
        previous = self.files.get(role)
        self.files[role] = (name, table)
        if role != "sample" and "sample" not in self.files:
            try:                                   # check it alone; it is used once a sample arrives
                read_spectrum(table, **self._units())
            except InputError as exc:
                self._restore(role, previous)
                self.file_msg[role].show_error(f"{name}: {str(exc)}")
                return False
            self.file_msg[role].show_error(None)
            self._show_file_controls()
            return True
        if not self._reimport(blame=role) and not (role == "sample" and self._waiting_for_reference):
            self._restore(role, previous)
            self._show_file_controls()
            return False
        self._show_file_controls()
        return True                                # taken (a raw-counts sample waits for its reference)

    def _restore(self, role, previous):
        if previous is None:
            self.files.pop(role, None)
        else:
            self.files[role] = previous

    def _units(self):
        w, v = self.wl_unit.value, self.value_unit.value
        return dict(wavelength_unit=None if w == "auto" else w, value_unit=None if v == "auto" else v)

    def _reimport(self, blame: str | None = None) -> bool:
        """Read the stored files with the current unit and reference choices; on success show the spectrum.

        Whenever the measurement is read again the shown fit no longer belongs to it: it is cleared (and a
        running fit dropped), with a line saying so. Messages about the previous reading are cleared.
        """
        self._show_file_controls()
        self._waiting_for_reference = False
        if "sample" not in self.files:
            return False
        try:
            wl, R, info = self._read_all(blame)
        except _Stop:
            return False
        for role in FILE_ROLES:
            if not self.readers[role].reading:     # a file still being read keeps its "Reading …"
                self.file_msg[role].show_error(None)
        same = (self.spectrum is not None and np.array_equal(self.spectrum[0], wl)
                and np.array_equal(self.spectrum[1], R) and self._file_names == self._names())
        self.spectrum = (wl, R)
        self._file_names = self._names()
        self.import_info = info
        self._show_notes(info)
        self._clear_fit_messages()
        if not same and (self.result is not None or self.film.result is not None or self.fit_button.disabled):
            self._clear_result(SPECTRUM_CHANGED)
        _locked(partial(self._show_measured, wl, R))
        return True

    def _names(self):
        return {role: name for role, (name, _) in self.files.items()}

    def _show_notes(self, info):
        lines = [f"<span>{_esc(n)}</span>" for n in info.get("notes", [])]
        lines += [f"<span class='fg-fit-import-warning' style='color:#a05a00'>⚠ {_esc(w)}</span>"
                  for w in info.get("warnings", [])]
        self.notes.object = "<div class='fg-fit-notes-text'>" + "<br>".join(lines) + "</div>"

    def _clear_fit_messages(self):
        """Messages the last fit put beside fields: their cause (that fit) is gone."""
        self.fit_msg.show_error(None)
        for field in self._fit_error_fields:
            field.show_error(None)
        self._fit_error_fields = []

    def _clear_result(self, why: str = ""):
        """Take the shown fit off the page (curves, verdict, details, downloads) and drop a running fit."""
        self._job += 1
        self._end_progress()
        self.result = self.result_info = None
        self.film.clear()
        self.details.object = ""
        self.verdict.alert_type = "light"
        self.verdict.object = why or "Press “Fit thickness” to fit the spectrum."
        self.status.object = ""
        for w in (self.dl_csv, self.dl_scan, self.dl_json):
            w.disabled = True
        _locked(self._clear_curves)

    def _clear_curves(self):
        self.model_src.data = dict(wl=[], R=[], res=[])
        self.scan_src.data = dict(d=[], rms=[])
        self.minima_src.data = dict(d=[], rms=[], label=[])
        self.best_span.visible = False
        self.scan_fig.title.text = SCAN_TITLE

    def _no_spectrum(self, why: str):
        """The files in hand give no reflectance (raw counts without a reference): nothing to fit or show."""
        had = self.spectrum is not None or self.result is not None or self.film.result is not None
        self.spectrum = None
        self.import_info = {}
        self._clear_result(why if had else "")
        _locked(partial(self._show_measured, np.zeros(0), np.zeros(0)))

    def _read_all(self, blame):
        units = self._units()
        data = {}
        for role in FILE_ROLES:
            if role not in self.files:
                continue
            name, content = self.files[role]
            try:
                data[role] = read_spectrum(content, **units)
            except InputError as exc:
                self.file_msg[role].show_error(f"{name}: {str(exc)}")
                raise _Stop from None
        sample = data["sample"]
        wl = sample.wavelength_nm
        notes = [f"Sample {self.files['sample'][0]}: {wl.size} points, {wl[0]:g}-{wl[-1]:g} nm."]
        warnings = [w for w in sample.warnings if "raw counts" not in w or "reference" not in data]
        info = dict(sample_file=self.files["sample"][0], wavelength_unit=sample.wavelength_unit,
                    value_unit=sample.value_unit, dropped_rows=sample.dropped_rows, counts=False)
        if "reference" not in data:
            self.ref_value.show_error(None)
            if "dark" in data:
                notes.append("A dark spectrum without a reference is not used; upload the reference too.")
            notes += sample.notes
            if sample.is_counts:                   # said beside the file, not twice
                self._show_notes(dict(notes=notes, warnings=[w for w in warnings if "raw counts" not in w]))
                self.file_msg["sample"].show_error(
                    f"{self.files['sample'][0]} looks like raw counts (largest value {sample.values.max():g}): add a "
                    "reference spectrum (and a dark one) below to turn it into reflectance.")
                self._waiting_for_reference = True
                self._no_spectrum("The spectrum is raw counts: add a reference spectrum to fit it.")
                raise _Stop
            info.update(notes=notes, warnings=warnings)
            return wl, sample.reflectance, info
        # raw counts: (S - D) / (Ref - D) x R_ref on the sample's wavelengths
        notes += [n for n in sample.notes if not n.startswith(("Reflectance read as", "Values read as", "Every value"))]
        warnings = [w for w in warnings if "reflectance reaches" not in w]
        notes.append(f"Sample, reference and dark read as raw counts (largest sample value {sample.values.max():g}; "
                     "the reflectance unit does not apply).")
        grids = {}
        for role in ("reference", "dark"):
            if role not in data:
                continue
            d = data[role]
            if d.wavelength_nm[0] > wl[0] * (1 + 1e-9) or d.wavelength_nm[-1] < wl[-1] * (1 - 1e-9):
                self.file_msg[role].show_error(
                    f"{self.files[role][0]} covers {d.wavelength_nm[0]:g}-{d.wavelength_nm[-1]:g} nm but the "
                    f"sample {wl[0]:g}-{wl[-1]:g} nm; measure it over the sample's range.")
                raise _Stop
            same = d.wavelength_nm.size == wl.size and np.allclose(d.wavelength_nm, wl, rtol=1e-9, atol=1e-9)
            grids[role] = d.values if same else np.interp(wl, d.wavelength_nm, d.values)
            if not same:
                notes.append(f"The {role} spectrum was interpolated onto the sample's wavelengths.")
        if self.ref_mode.value == "silicon":
            self.ref_value.show_error(None)
            s = self.ex.state
            try:
                ambient = s.stack.ambient
                r_ref = Stack([], substrate="Si", ambient=ambient).reflectance(wl, s.angle_deg, s.polarization)
            except InputError as exc:
                self.file_msg["reference"].show_error(f"Bare silicon reference: {str(exc)}")
                raise _Stop from None
            ref_text = f"bare silicon (computed, in {ambient.name}, {s.angle_deg:g}°, {s.polarization})"
        else:
            r_ref = self._number(self.ref_value, "Reference reflectance", 0.001, 1.0, unit="")
            ref_text = f"{r_ref:g}"
        try:
            R = reflectance_from_counts(sample.values, grids["reference"], grids.get("dark"), r_ref)
        except InputError as exc:
            self.file_msg[blame if blame in ("reference", "dark") else "reference"].show_error(str(exc))
            raise _Stop from None
        notes.append(f"Reflectance = (sample − dark)/(reference − dark) × reference reflectance ({ref_text}).")
        if R.max() > MAX_FRACTION:
            warnings.append(f"The reflectance computed reaches {R.max():.3g}, above {MAX_FRACTION:g}: check that the "
                            "reference and sample were measured alike, and the reference's reflectance.")
        info.update(counts=True, reference_file=self.files["reference"][0],
                    dark_file=self.files["dark"][0] if "dark" in self.files else None, reference_reflectance=ref_text,
                    value_unit="counts")
        info.update(notes=notes, warnings=warnings)
        return wl, R, info

    def _show_measured(self, wl, R):
        self.spec_holder.release()
        self.meas_src.data = dict(wl=wl, R=R * 100)
        if self.result is None:
            self.model_src.data = dict(wl=[], R=[], res=[])
        self.spec_fig.title.text = f"Measured spectrum ({self.files['sample'][0]})"

    # ------------------------------------------------------------------ fit
    def _number(self, field, name, lo, hi, unit="nm", optional=False):
        """The number typed in ``field``, or _Stop after a message beside it (read by ``parse_number``); when
        the text has a comma, the value read is shown beside the field."""
        text = field.input.value.strip()
        if optional and not text:
            field.show_error(None)
            return None
        u = f" {unit}" if unit else ""
        try:
            v = parse_number(text, name, lo, hi, unit)
        except InputError as exc:
            field.show_error(str(exc))
            raise _Stop from None
        if "," in text:
            field.message.object = (f"<div class='fg-fit-parsed' style='font-size:11px;color:#555'>"
                                    f"read as {v:g}{_esc(u)}</div>")
            field.message.visible = True
        else:
            field.show_error(None)
        return v

    def _check_field(self, field, name, lo, hi):
        """Say beside a window or range field, as soon as it changes, whether its text reads as a number."""
        try:
            self._number(field, name, lo, hi, optional=True)
        except _Stop:
            pass
        if field in self._fit_error_fields:
            self._fit_error_fields.remove(field)

    def _window(self, lo_field, hi_field, name):
        lo = self._number(lo_field, f"{name} from", *THICKNESS_LIMITS_NM)
        hi = self._number(hi_field, f"{name} to", *THICKNESS_LIMITS_NM)
        if not lo < hi:
            hi_field.show_error("The window's end must be above its start.")
            raise _Stop
        return lo, hi

    def _request(self):
        """The fit's arguments from the widgets and the explorer (raises _Stop after showing a message)."""
        if self.spectrum is None:
            self.fit_msg.show_error("Upload a spectrum first." if "sample" not in self.files else
                                    "The spectrum gives no reflectance yet: see the message beside the file.")
            raise _Stop
        s = self.ex.state
        try:
            stack = s.stack
        except InputError as exc:
            self.fit_msg.show_error(str(exc))
            raise _Stop from None
        if not stack.layers:
            self.fit_msg.show_error("The stack has no layer to fit: add one in the film explorer.")
            raise _Stop
        wl, R = self.spectrum
        if R.size and R.max() > MAX_FRACTION:
            if self.import_info.get("counts"):
                why = (f"The reflectance computed from the counts reaches {R.max():.3g}, above {MAX_FRACTION:g}: check "
                       "the reference spectrum and the reference's reflectance.")
            else:
                unit = self.import_info.get("value_unit", "")
                why = (f"Read as {'percent' if unit == 'percent' else 'a fraction'}, the reflectance reaches "
                       f"{R.max():.4g}, above {MAX_FRACTION:g}: " +
                       ("the values look like percent: choose percent under “Reflectance as”."
                        if unit == "fraction" and R.max() <= COUNTS_ABOVE else
                        "the values look like raw counts: add a reference spectrum (and a dark one)."))
            self.fit_msg.show_error(why)
            raise _Stop
        values, failed = [], False
        for fn in (lambda: self._window(self.win_lo, self.win_hi, "Window"),
                   lambda: self._window(self.win2_lo, self.win2_hi, "Second window") if self.second.value >= 0 else None,
                   self._wavelength_range):
            try:                                   # check every field, so each shows its own message
                values.append(fn())
            except _Stop:
                values.append(None)
                failed = True
        if failed:
            raise _Stop
        window, second_window, wl_range = values
        layer = min(s.swept_layer, len(stack.layers) - 1)
        second = self.second.value if 0 <= self.second.value < len(stack.layers) and self.second.value != layer else None
        args = dict(wavelength_nm=wl, reflectance=R, stack=stack, layer=layer, thickness_nm=window,
                    angle_deg=s.angle_deg, polarization=s.polarization, free_scale=bool(self.free_scale.value),
                    free_offset=bool(self.free_offset.value), wavelength_range_nm=wl_range)
        if second is not None:
            args.update(second_layer=second, second_thickness_nm=second_window)
        return args

    def _wavelength_range(self):
        lo = self._number(self.wl_lo, "Wavelengths from", *WAVELENGTH_LIMITS_NM, optional=True)
        hi = self._number(self.wl_hi, "Wavelengths to", *WAVELENGTH_LIMITS_NM, optional=True)
        if lo is None and hi is None:
            return None
        lo = 0.0 if lo is None else lo
        hi = WAVELENGTH_LIMITS_NM[1] if hi is None else hi
        if not lo < hi:
            self.wl_hi.show_error("The range's end must be above its start.")
            raise _Stop
        return lo, hi

    def _start_progress(self, job, film: bool = False):
        self.fit_button.disabled = True
        self.progress.value = 0
        self.progress.active = False
        self.progress.visible = self.cancel_button.visible = True
        self.status.object = "Fitting the film model…" if film else "Fitting…"

    def _show_progress(self, job, fraction, text):
        if job == self._job:
            self.progress.value = int(100 * min(max(fraction, 0.0), 1.0))
            self.status.object = f"Fitting: {_esc(text)}…"

    def _end_progress(self):
        self.fit_button.disabled = False
        self.progress.visible = self.cancel_button.visible = False

    def cancel(self) -> None:
        """Drop the running fit: the worker stops at its next stage and its result is never shown."""
        self._job += 1
        self._end_progress()
        self.status.object = "Fit cancelled."

    def run_fit(self, sync: bool = False):
        """Fit the current spectrum (off the event loop when served). Returns True when a fit was started."""
        try:
            args = self._request()
            film = self.film.active()
            if film:
                args = self.film.request(args)
        except _Stop:
            return False
        except ValueError as exc:                   # a film fit that cannot be asked for these settings
            self._clear_fit_messages()
            self.fit_msg.show_error(str(exc))
            self._fit_error_fields.append(self.fit_msg)
            return False
        self._clear_fit_messages()
        self._job += 1
        job = self._job
        info = dict(self.import_info)
        doc = pn.state.curdoc
        size = len(args["wavelength_nm"])
        session = session_key(self.ex)
        live = served(doc)

        def gone():
            return job != self._job or (live and not served(doc))

        self._start_progress(job, film)
        kind = "film_fit" if film else "spectrum_fit"
        if sync or not live:
            limits = Limits.from_env()
            channel = workers.LocalChannel(partial(self._show_progress, job), gone)
            try:
                with heavy_job(kind, size, session, limits):
                    out = (fit_film_reporting(channel, **args) if film else
                           fit_thickness_reporting(channel, **args, max_grid_points=limits.max_grid_points)), None
            except InputError as exc:
                out = None, exc
            except JobCancelled:
                return True
            self._finish(job, args, info, *out)
            return True

        async def run():
            limits = Limits.from_env()
            try:
                with heavy_job(kind, size, session, limits):
                    channel = await workers.new_channel()
                    job_fn = (partial(fit_film_reporting, **args) if film else
                              partial(fit_thickness_reporting, **args, max_grid_points=limits.max_grid_points))
                    result = await workers.run_in_worker(
                        limits.max_jobs_server, job_fn, channel=channel, cancelled=gone,
                        on_progress=lambda f, text: post_to_page(doc, partial(self._show_progress, job, f, text)))
                out = result, None
            except InputError as exc:
                out = None, exc
            except JobCancelled:
                return
            except workers.WorkerLost as exc:
                log.error(f"{kind.replace('_', ' ')}: worker process lost", extra={"session": session, "size": size})
                out = None, InputError(str(exc))
            except Exception:  # never lose the session to one failed computation
                log.exception(f"{kind.replace('_', ' ')} failed")
                out = None, InputError("The fit failed unexpectedly; the server log has the details.")
            post_to_page(doc, partial(self._finish, job, args, info, *out))
        pn.state.execute(run)
        return True

    def _finish(self, job, args, info, result, error):
        if job != self._job:                     # superseded by a newer request
            return
        self._end_progress()
        self.status.object = ""
        if error is not None:
            self._show_fit_error(error)
            return
        if isinstance(result, tuple):               # a film fit: (FilmFitResult, FilmFitCurves)
            self.film.show(*result, args, info.get("sample_file", ""))
            self.result_info = dict(args=args, import_info=info, date=date.today().isoformat())
            return
        self.result = result
        self.result_info = dict(args=args, import_info=info, date=date.today().isoformat())
        self._show_result()

    def _show_fit_error(self, exc):
        text = str(exc)
        if isinstance(exc, WavelengthRangeError):
            field = self.wl_lo
        elif "second thickness window" in text:
            field = self.win2_hi
        elif "thickness window" in text:
            field = self.win_hi
        else:
            field, text = self.fit_msg, film_page_text(text)
        field.show_error(text)
        self._fit_error_fields.append(field)

    def _verdict_lines(self):
        """The result box: kind ("success", "warning", "danger") and its lines (HTML)."""
        r, a = self.result, self.result_info["args"]
        names = [l.material.name for l in a["stack"].layers]
        trusted = r.trustworthy
        if trusted:
            label = "1σ" + (", noise only" if r.quality == "misfit" else "")
            lines = [f"<b>d = {_pm(r.thickness_nm, r.quoted_uncertainty_nm)} nm ({label})</b> — layer {a['layer'] + 1} "
                     f"({_esc(names[a['layer']])})"]
            if r.second_thickness_nm is not None:
                lines.append(f"<b>d₂ = {_pm(r.second_thickness_nm, r.second_quoted_uncertainty_nm)} nm ({label})</b> — "
                             f"layer {a['second_layer'] + 1} ({_esc(names[a['second_layer']])})")
            floored = [u for u in (r.uncertainty_nm, r.second_uncertainty_nm) if u is not None
                       and u < r.uncertainty_floor_nm]
            if floored:
                lines.append(f"The ± is statistical; below {r.uncertainty_floor_nm:g} nm it is not meaningful, so "
                             f"{r.uncertainty_floor_nm:g} nm is quoted (the fit's own 1σ: {max(floored):.1g} nm).")
        else:
            lines = [f"<b>d ≈ {r.thickness_nm:.0f} nm: not trustworthy</b> — layer {a['layer'] + 1} "
                     f"({_esc(names[a['layer']])}); no uncertainty is quoted"]
            if r.second_thickness_nm is not None:
                lines.append(f"<b>d₂ ≈ {r.second_thickness_nm:.0f} nm: not trustworthy</b> — layer "
                             f"{a['second_layer'] + 1} ({_esc(names[a['second_layer']])})")
        lines.append(f"rms residual {_sig(100 * r.rms)} % over {r.n_points} points, {r.n_parameters} free "
                     f"parameter{'s' if r.n_parameters > 1 else ''}; noise seen in the spectrum {_sig(100 * r.noise_rms)} %")
        if a["free_scale"] or a["free_offset"]:
            lines.append(f"scale {r.scale:.4f}, offset {100 * r.offset:+.3f} %")
        for text in (r.quality_note, r.window_hint, r.warning):
            if text:
                lines.append(f"⚠ {_esc(text)}")
        kind = "danger" if not trusted else "warning" if (r.quality != "good" or r.warning) else "success"
        return kind, lines

    def _show_result(self):
        r, a = self.result, self.result_info["args"]
        kind, lines = self._verdict_lines()
        self.verdict.alert_type = kind
        self.verdict.object = "<br>".join(lines)
        used = f"{r.wavelength_nm[0]:g}–{r.wavelength_nm[-1]:g} nm ({r.n_points} points"
        if r.points_per_bin > 1:
            used += (f": the {r.n_points_read} points read averaged in groups of {r.points_per_bin}, still "
                     f"{BIN_POINTS_PER_FRINGE} or more per fringe")
        rows = [("wavelengths used", used + ")"),
                ("window searched", f"{a['thickness_nm'][0]:g}–{a['thickness_nm'][1]:g} nm (layer {a['layer'] + 1})")]
        if "second_layer" in a:
            rows.append(("second window searched", f"{a['second_thickness_nm'][0]:g}–{a['second_thickness_nm'][1]:g} nm "
                                                   f"(layer {a['second_layer'] + 1})"))
        rows.append(("angle, polarization", f"{a['angle_deg']:g}°, {a['polarization']}"))
        if r.minima:
            rows.append(("minima (thickness, rms)", "; ".join(f"{t:.1f} nm, {_sig(100 * v)} %" for t, v in r.minima)))
        fourier = self._fourier_text()
        if fourier:
            rows.append(("Fourier estimate", fourier))
        self.details.object = ("<table class='fg-fit-table' style='font-size:13px' cellpadding='2'>"
                               + "".join(f"<tr><td>{_esc(k)}</td><td>{v}</td></tr>" for k, v in rows) + "</table>")
        _locked(self._draw_result)
        for w in (self.dl_csv, self.dl_scan, self.dl_json):
            w.disabled = False

    def _draw_result(self):
        r, a = self.result, self.result_info["args"]
        head = (f"d = {_pm(r.thickness_nm, r.quoted_uncertainty_nm)} nm" if r.trustworthy else
                f"d ≈ {r.thickness_nm:.0f} nm (not trustworthy)")
        self._draw_curves(r.wavelength_nm, r.measured, r.model, r.residual,
                          f"Measured ({self.result_info['import_info'].get('sample_file', '')}) and fitted: {head}")
        _span_range(self.scan_fig.x_range, r.scan_thickness_nm)
        rms = np.maximum(r.scan_rms * 100, 1e-9)
        self.scan_src.data = dict(d=r.scan_thickness_nm, rms=rms)
        mins = [max(m[1] * 100, 1e-9) for m in r.minima]
        self.minima_src.data = dict(d=[m[0] for m in r.minima], rms=mins,
                                    label=["best" if i == 0 else f"#{i + 1}" for i in range(len(r.minima))])
        lo, hi = float(min(rms.min(), *mins)), float(max(rms.max(), *mins))
        self.scan_fig.y_range.start, self.scan_fig.y_range.end = lo / 2.0, hi * 4.0   # room for the labels above
        self.best_span.location = r.thickness_nm
        self.best_span.visible = True
        self.scan_fig.title.text = (f"rms residual against trial thickness of layer {a['layer'] + 1}"
                                    + (" (minimised over the second layer)" if r.second_thickness_nm is not None else "")
                                    + "; triangles: refined minima")

    def draw_film_curves(self, c, title: str):
        """Measured, model and residual of a film fit (:class:`physics.filmcurves.FilmFitCurves`) in the spectrum
        and residual plots."""
        _locked(partial(self._draw_curves, c.wavelength_nm, c.measured, c.model, c.residual, title))

    def _draw_curves(self, wl, measured, model, residual, title):
        self.spec_holder.release()
        self.meas_src.data = dict(wl=wl, R=measured * 100)
        unit, scale = _residual_unit(residual)
        self.model_src.data = dict(wl=wl, R=model * 100, res=residual / scale)
        _span_range(self.resid_fig.y_range, residual / scale, symmetric=True)
        self.resid_fig.yaxis.axis_label = f"residual ({unit} reflectance)" if unit == "%" else f"residual ({unit})"
        self.spec_fig.title.text = title

    def use_fitted_film(self) -> bool:
        """Put the fitted film into the film explorer's stack in place of the fitted layer."""
        info = self.result_info or {}
        return self.film.use(info.get("import_info", {}).get("sample_file", "spectrum"),
                             info.get("date", date.today().isoformat()))

    def fourier_thickness(self):
        """(optical thickness n·d·cos θ, d for the unknown layer, n cos θ used, wavelength) or None."""
        if self.result is None or self.result.fourier_optical_nm is None:
            return None
        r = self.result
        wl = r.wavelength_nm
        centre = float(0.5 * (wl[0] + wl[-1]))
        if r.fourier_thickness_nm is None:
            return r.fourier_optical_nm, None, None, centre
        return r.fourier_optical_nm, r.fourier_thickness_nm, r.fourier_optical_nm / r.fourier_thickness_nm, centre

    def _fourier_text(self):
        f = self.fourier_thickness()
        if f is None:
            return ""
        opt, d, n_cos, centre = f
        if d is None:
            return (f"optical thickness n·d·cos θ ≈ {opt:.0f} nm: fewer than two fringes in the band, not resolved "
                    "(the fit does not rely on it)")
        lo, hi = self.result_info["args"]["thickness_nm"]
        outside = "" if lo <= d <= hi else f"; <b>outside the window searched ({lo:g}–{hi:g} nm)</b>"
        return (f"optical thickness n·d·cos θ ≈ {opt:.0f} nm → d ≈ {d:.0f} nm (n·cos θ = {n_cos:.3f} at "
                f"{centre:.0f} nm; assumes the strongest fringes come from this layer){outside}")

    # ------------------------------------------------------------------ downloads
    def _header(self):
        r, a, info = self.result, self.result_info["args"], self.result_info["import_info"]
        st = a["stack"]
        layers = " / ".join(
            f"{l.material.name} " + ("(unknown)" if i in (a["layer"], a.get("second_layer")) else f"{l.thickness_nm:g} nm")
            for i, l in enumerate(st.layers))
        lines = [
            "# fringegauge spectrum fit (a model fit, not certified metrology)",
            f"# date: {self.result_info['date']}",
            f"# stack (top to bottom): {st.ambient.name} / {layers} / {st.substrate.name}",
            f"# angle_deg: {a['angle_deg']:g}; polarization: {a['polarization']}",
            f"# layer {a['layer'] + 1} thickness_nm: {_thickness_text(r, r.thickness_nm, r.quoted_uncertainty_nm)}",
        ]
        if r.second_thickness_nm is not None:
            lines.append(f"# layer {a['second_layer'] + 1} thickness_nm: "
                         f"{_thickness_text(r, r.second_thickness_nm, r.second_quoted_uncertainty_nm)}")
        lines.append(f"# fit quality: {r.quality}" + (f" ({r.quality_note})" if r.quality_note else ""))
        lines.append(f"# rms (fraction): {r.rms:.6g}; noise seen (fraction): {r.noise_rms:.3g}; scale: {r.scale:.6g}; "
                     f"offset (fraction): {r.offset:.6g}")
        lines.append(f"# sample file: {info.get('sample_file', '')}")
        return lines

    def _curves_csv(self):
        r = self.result
        lines = self._header() + ["# units: wavelength in nm; reflectance and residual as fractions (0-1)",
                                  "wavelength_nm,measured_R_fraction,model_R_fraction,residual_fraction"]
        lines += [f"{w:.6g},{m:.8g},{f:.8g},{e:.8g}" for w, m, f, e in zip(r.wavelength_nm, r.measured, r.model,
                                                                         r.residual)]
        return io.StringIO("\n".join(lines) + "\n")

    def _scan_csv(self):
        r = self.result
        lines = self._header() + ["# units: thickness in nm; rms residual as a fraction (0-1)",
                                  "thickness_nm,rms_fraction"]
        lines += [f"{d:.6g},{v:.8g}" for d, v in zip(r.scan_thickness_nm, r.scan_rms)]
        return io.StringIO("\n".join(lines) + "\n")

    def summary(self) -> dict:
        """The JSON summary: inputs, the stack with each material's name and source, the result."""
        r, a, info = self.result, self.result_info["args"], self.result_info["import_info"]
        st = a["stack"]
        unknown = {a["layer"]: "first", a.get("second_layer"): "second"}

        def medium(role, m, thickness=None, i=None):
            d = {"role": role, "material": m.name, "source": m.source}
            if i is not None:
                d["thickness_nm"] = None if i in unknown else thickness
                d["unknown"] = unknown.get(i)
            return d

        f = self.fourier_thickness()
        return {
            "format": "fringegauge-spectrum-fit",
            "note": NOT_METROLOGY,
            "date": self.result_info["date"],
            "inputs": {
                "import": {k: v for k, v in info.items() if k != "notes"},
                "import_notes": info.get("notes", []),
                "unknown_layer": a["layer"], "thickness_window_nm": list(a["thickness_nm"]),
                "second_unknown_layer": a.get("second_layer"),
                "second_thickness_window_nm": list(a["second_thickness_nm"]) if "second_layer" in a else None,
                "angle_deg": a["angle_deg"], "polarization": a["polarization"],
                "free_scale": a["free_scale"], "free_offset": a["free_offset"],
                "wavelength_range_nm": list(a["wavelength_range_nm"]) if a["wavelength_range_nm"] else None,
            },
            "stack": {
                "ambient": medium("ambient", st.ambient),
                "layers": [medium(f"layer {i + 1}", l.material, l.thickness_nm, i) for i, l in enumerate(st.layers)],
                "substrate": medium("substrate", st.substrate),
                "substrate_thickness_mm": st.substrate_thickness_mm,
            },
            "result": {
                "thickness_nm": r.thickness_nm, "uncertainty_nm": r.uncertainty_nm, "uncertainty_level": "1 sigma",
                "second_thickness_nm": r.second_thickness_nm, "second_uncertainty_nm": r.second_uncertainty_nm,
                "quoted_uncertainty_nm": r.quoted_uncertainty_nm if r.trustworthy else None,
                "second_quoted_uncertainty_nm": (r.second_quoted_uncertainty_nm
                                                 if r.trustworthy and r.second_thickness_nm is not None else None),
                "uncertainty_floor_nm": r.uncertainty_floor_nm,
                "quality": r.quality, "quality_note": r.quality_note, "window_hint": r.window_hint,
                "noise_rms_fraction": r.noise_rms,
                "rms_fraction": r.rms, "scale": r.scale, "offset_fraction": r.offset,
                "n_points": r.n_points, "n_points_read": r.n_points_read, "points_per_bin": r.points_per_bin,
                "n_parameters": r.n_parameters,
                "wavelength_used_nm": [float(r.wavelength_nm[0]), float(r.wavelength_nm[-1])],
                "minima": [{"thickness_nm": t, "rms_fraction": v} for t, v in r.minima],
                "warning": r.warning,
                "fourier_optical_thickness_nm": f[0] if f else None,
                "fourier_thickness_nm": f[1] if f else None,
            },
        }

    def _summary_json(self):
        return io.StringIO(json.dumps(self.summary(), indent=2, ensure_ascii=False))

    # ------------------------------------------------------------------ layout
    def panel(self):
        controls = pn.Column(
            pn.pane.HTML("<h3 style='margin:6px 5px 2px'>A measured spectrum to thickness</h3>"),
            _label("Spectrum (CSV or TXT: wavelength, reflectance — or raw counts)"), self.file_in["sample"],
            self.file_msg["sample"].message,
            _label("Optional, for raw counts: reference spectrum"), self.file_in["reference"],
            self.file_msg["reference"].message,
            _label("Optional: dark spectrum"), self.file_in["dark"], self.file_msg["dark"].message,
            self.clear_ref,
            _label("The reference's reflectance"), self.ref_mode, self.ref_value_box,
            pn.Row(self.wl_unit, self.value_unit, margin=0), self.notes,
            pn.pane.HTML("<h3 style='margin:10px 5px 2px;font-size:15px'>Model</h3>"),
            self.unknown, field_pair(self.win_lo, self.win_hi, PAIR_MESSAGE_WIDTH),
            self.second, field_pair(self.win2_lo, self.win2_hi, PAIR_MESSAGE_WIDTH),
            self.free_scale, self.free_offset,
            field_pair(self.wl_lo, self.wl_hi, PAIR_MESSAGE_WIDTH),
            self.film.controls(),
            self.fit_button, self.fit_msg.message, self.status, self.progress, self.cancel_button,
            self.film.use_button, self.film.use_status,
            pn.pane.HTML("<h3 style='margin:10px 5px 2px;font-size:15px'>Downloads</h3>"),
            self.dl_csv, self.dl_scan, self.dl_json, self.film.download, width=340)
        results = pn.Column(
            self.verdict, self.details, self.disclaimer,
            pn.pane.Bokeh(self.spec_fig, sizing_mode="stretch_width"),
            pn.pane.Bokeh(self.resid_fig, sizing_mode="stretch_width"),
            pn.pane.Bokeh(self.scan_fig, sizing_mode="stretch_width"),
            pn.pane.Bokeh(self.film.nk_fig, sizing_mode="stretch_width"),
            sizing_mode="stretch_width")
        return pn.Row(controls, results, sizing_mode="stretch_width", scroll=True)


def _pm(value: float, sigma: float) -> str:
    """'X ± Y' with Y to two significant digits and X to the same decimal place."""
    if not np.isfinite(sigma) or sigma <= 0:
        return f"{value:.2f} ± {sigma:.2g}"
    exponent = int(math.floor(math.log10(sigma))) - 1                  # place of Y's second digit
    if exponent >= 0:                                                   # sigma >= 10: round to tens, hundreds, ...
        step = 10.0 ** exponent
        return f"{round(value / step) * step:.0f} ± {round(sigma / step) * step:.0f}"
    return f"{value:.{-exponent}f} ± {sigma:.{-exponent}f}"


def _sig(x: float, digits: int = 2) -> str:
    """``x`` to ``digits`` significant digits, without an exponent for everyday sizes."""
    if x == 0 or not np.isfinite(x):
        return f"{x:g}"
    if 1e-4 <= abs(x) < 1e6:
        d = max(0, digits - 1 - int(math.floor(math.log10(abs(x)))))
        return f"{x:.{d}f}"
    return f"{x:.{digits - 1}e}"


def _thickness_text(r, value: float, sigma: float) -> str:
    """A thickness for the downloads' header: 'X +/- Y (1 sigma)' or 'X (not trustworthy)'."""
    if not r.trustworthy:
        return f"{value:.0f} (not trustworthy: the model does not reproduce the spectrum; no uncertainty)"
    return _pm(value, sigma).replace("±", "+/-") + " (1 sigma" + (", noise only)" if r.quality == "misfit" else ")")


def _residual_unit(residual) -> tuple[str, float]:
    """(unit, size of the unit as a fraction) that shows ``residual`` (fractions) with readable ticks."""
    top = float(np.max(np.abs(residual))) if np.size(residual) else 0.0
    for unit, size in RESIDUAL_UNITS:
        if top / size >= 0.1:
            return unit, size
    return RESIDUAL_UNITS[-1]


def _span_range(rng, values, symmetric: bool = False) -> None:
    """Set a Range1d to the finite extent of ``values`` plus RANGE_PAD of its span (about 0 when
    ``symmetric``); unchanged when there is nothing finite."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return
    if symmetric:
        half = float(np.max(np.abs(v))) * (1 + RANGE_PAD) or 1.0
        rng.start, rng.end = -half, half
        return
    lo, hi = float(v.min()), float(v.max())
    pad = (hi - lo) * RANGE_PAD or max(abs(lo), 1.0) * RANGE_PAD
    rng.start, rng.end = lo - pad, hi + pad
