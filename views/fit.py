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
from bokeh.models import ColumnDataSource, HoverTool, Span
from bokeh.plotting import figure

from physics import InputError, Stack, read_spectrum, reflectance_from_counts
from physics.errors import WavelengthRangeError

from . import workers
from .limits import Limits, heavy_job, post_to_page, served, session_key, upload_refusal
from .uploads import COMPACT, CappedDropper
from .explorer import Field, _esc, _fmt, _label
from .inverse import _locked, locked
from .state import THICKNESS_LIMITS_NM, parse_number

log = logging.getLogger("fringegauge")

#: Largest spectrum file accepted through the page (bytes).
MAX_UPLOAD_BYTES = 20_000_000
#: Default windows searched for the unknown layers (nm).
DEFAULT_WINDOW_NM = (0.0, 3000.0)
DEFAULT_SECOND_WINDOW_NM = (0.0, 1000.0)
#: Wavelengths typed for the range used (nm).
WAVELENGTH_LIMITS_NM = (1.0, 100_000.0)
NOT_METROLOGY = ("This result is a model fit of the spectrum to the stack shown, not certified metrology: "
                 "confirm with a calibrated instrument before a release decision.")
FILE_ROLES = ("sample", "reference", "dark")


class _Stop(Exception):
    """A field was invalid; its message is already shown beside it."""


class SpectrumFitSection:
    """The spectrum → thickness section for one session, bound to a :class:`views.explorer.FilmExplorer`."""

    def __init__(self, explorer):
        self.ex = explorer
        self.files = {}                # role -> (name, bytes)
        self.spectrum = None           # (wavelength_nm, reflectance) in use
        self.import_info = {}          # what the import detected and did
        self.result = None             # physics.fit.FitResult
        self.result_info = None        # inputs and extras of the shown result
        self.fourier = None
        self._job = 0
        self._build()

    # ------------------------------------------------------------------ widgets
    def _build(self):
        self.file_msg = {role: Field("") for role in FILE_ROLES}
        self.file_in = {
            role: CappedDropper(MAX_UPLOAD_BYTES, locked(lambda name, data, role=role: self.load_file(role, data, name)),
                                locked(self.file_msg[role].show_error), what=f"The {role} spectrum file",
                                accepted_filetypes=[".csv", ".txt", ".tsv", ".dat", "text/csv", "text/plain",
                                                    "text/tab-separated-values"],
                                **COMPACT,
                                css_classes=[f"fg-fit-{role}-file"])
            for role in FILE_ROLES}
        self.clear_ref = pn.widgets.Button(label="Remove reference and dark", color="light", width=200,
                                           margin=(2, 5))
        self.ref_mode = pn.widgets.RadioButtonGroup(options={"bare silicon (computed)": "silicon",
                                                             "a number": "number"}, value="silicon", margin=(2, 5))
        self.ref_value = Field("Reference reflectance (0-1)", width=160)
        self.ref_value.set_text("1.0")
        self.wl_unit = pn.widgets.Select(label="Wavelength unit", options={"detected": "auto", "nm": "nm",
                                                                           "µm": "um"},
                                         value="auto", width=145, margin=(2, 5))
        self.value_unit = pn.widgets.Select(label="Reflectance as", options={"detected": "auto",
                                                                             "fraction (0-1)": "fraction",
                                                                             "percent": "percent"},
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
        self.free_scale = pn.widgets.Checkbox(label="Free scale (imperfect reference)", margin=(4, 5))
        self.free_offset = pn.widgets.Checkbox(label="Free offset (stray light)", margin=(4, 5))
        self.wl_lo = Field("Use wavelengths from (nm)", width=140, placeholder="all")
        self.wl_hi = Field("to (nm)", width=140, placeholder="all")
        self.fit_button = pn.widgets.Button(label="Fit thickness", color="primary", width=200, margin=(6, 5),
                                            css_classes=["fg-fit-run"])
        self.fit_msg = Field("")
        self.status = pn.pane.HTML("", css_classes=["fg-status"], margin=(0, 5))
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
        meas = p.scatter("wl", "R", source=self.meas_src, size=4, color="#1f6fb4", alpha=0.7, legend_label="measured")
        p.line("wl", "R", source=self.model_src, line_width=2, color="#c0392b", legend_label="model fit")
        p.add_tools(HoverTool(renderers=[meas], tooltips=[("λ", "@wl{0.0} nm"), ("R", "@R{0.00} %")]))
        p.legend.location = "top_right"
        p.legend.background_fill_alpha = 0.7
        p.legend.label_text_font_size = "11px"
        p.legend.click_policy = "hide"
        self.spec_fig = p
        r = figure(height=160, sizing_mode="stretch_width", tools=tools, title="Residual (measured − model)",
                   x_axis_label="wavelength (nm)", y_axis_label="residual (%)", x_range=p.x_range)
        r.scatter("wl", "res", source=self.model_src, size=3, color="#444")
        r.add_layout(Span(location=0, dimension="width", line_color="#999", line_dash="dashed"))
        self.resid_fig = r
        self.scan_src = ColumnDataSource(dict(d=[], rms=[]))
        self.minima_src = ColumnDataSource(dict(d=[], rms=[], label=[]))
        g = figure(height=220, sizing_mode="stretch_width", tools=tools,
                   title="Goodness of fit against the unknown thickness (triangles: refined minima)",
                   x_axis_label="thickness of the unknown layer (nm)", y_axis_label="rms residual (%)",
                   y_axis_type="log")
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
        self.dl_scan = pn.widgets.FileDownload(callback=self._scan_csv, filename="goodness_of_fit.csv",
                                               label="Goodness-of-fit curve (.csv)", width=300, disabled=True,
                                               margin=(2, 5))
        self.dl_json = pn.widgets.FileDownload(callback=self._summary_json, filename="fit_summary.json",
                                               label="Summary (.json)", width=300, disabled=True, margin=(2, 5))

        # Handlers that change Bokeh models run under the document lock (see views.inverse.locked).
        self.clear_ref.on_click(locked(self._on_clear_ref))
        self.ref_mode.param.watch(locked(lambda e: self._reimport()), "value")
        self.ref_value.input.param.watch(locked(lambda e: self._reimport()), "value")
        self.wl_unit.param.watch(locked(lambda e: self._reimport()), "value")
        self.value_unit.param.watch(locked(lambda e: self._reimport()), "value")
        self.fit_button.on_click(locked(lambda *_: self.run_fit()))
        self.ex.state.param.watch(locked(self._on_state), ["stack_json", "swept_layer", "angle_deg", "polarization"])
        self._sync_layers()

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
        self.unknown.object = (f"Unknown layer: <b>layer {swept} ({_esc(names[swept])})</b>, the explorer's "
                               f"swept layer; angle {s.angle_deg:g}°, {s.polarization}.")
        opts = {"(none)": -1} | {f"{i}: {n}": i for i, n in enumerate(names) if i != swept}
        keep = self.second.value if self.second.value in opts.values() else -1
        self.second.options = opts
        self.second.value = keep

    def _on_state(self, *events):
        self._sync_layers()
        if "reference" in self.files and self.ref_mode.value == "silicon":
            self._reimport()                        # the computed reference depends on the angle and ambient
        if self.result is not None:
            self.status.object = "The stack, unknown layer or angle changed since this fit: press “Fit thickness”."

    # ------------------------------------------------------------------ import
    def _on_clear_ref(self, *_):
        self.files.pop("reference", None)
        self.files.pop("dark", None)
        for role in ("reference", "dark"):
            self.file_msg[role].show_error(None)
        self._reimport()

    def load_file(self, role: str, data: bytes, name: str = "") -> bool:
        """Take an uploaded file (``role``: sample, reference or dark); on a bad file say why beside it
        and keep the previous spectrum."""
        if role not in FILE_ROLES:
            raise ValueError(role)
        name = name or f"{role}.csv"
        refusal = upload_refusal(name, len(data), MAX_UPLOAD_BYTES, "Export just two columns.")
        if refusal:
            self.file_msg[role].show_error(refusal)
            return False
        previous = self.files.get(role)
        self.files[role] = (name, bytes(data))
        if role != "sample" and "sample" not in self.files:
            try:                                   # check it alone; it is used once a sample arrives
                read_spectrum(data, **self._units())
            except InputError as exc:
                self._restore(role, previous)
                self.file_msg[role].show_error(f"{name}: {str(exc)}")
                return False
            self.file_msg[role].show_error(None)
            return True
        if not self._reimport(blame=role):
            self._restore(role, previous)
            return False
        return True

    def _restore(self, role, previous):
        if previous is None:
            self.files.pop(role, None)
        else:
            self.files[role] = previous

    def _units(self):
        w, v = self.wl_unit.value, self.value_unit.value
        return dict(wavelength_unit=None if w == "auto" else w, value_unit=None if v == "auto" else v)

    def _reimport(self, blame: str | None = None) -> bool:
        """Read the stored files with the current unit and reference choices; on success show the spectrum."""
        if "sample" not in self.files:
            return False
        try:
            wl, R, info = self._read_all(blame)
        except _Stop:
            return False
        for role in FILE_ROLES:
            self.file_msg[role].show_error(None)
        self.spectrum = (wl, R)
        self.import_info = info
        self.notes.object = "<div class='fg-fit-notes-text'>" + "<br>".join(_esc(n) for n in info["notes"]) + "</div>"
        _locked(partial(self._show_measured, wl, R))
        return True

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
        info = dict(sample_file=self.files["sample"][0], wavelength_unit=sample.wavelength_unit,
                    value_unit=sample.value_unit, dropped_rows=sample.dropped_rows, counts=False)
        if "reference" not in data:
            if "dark" in data:
                notes.append("A dark spectrum without a reference is not used; upload the reference too.")
            notes += sample.notes
            info["notes"] = notes
            return wl, sample.reflectance, info
        # raw counts: (S - D) / (Ref - D) x R_ref on the sample's wavelengths
        notes += [n for n in sample.notes if not n.startswith("Reflectance read as")]
        notes.append("Sample, reference and dark read as raw counts (the reflectance unit does not apply).")
        grids = {}
        for role in ("reference", "dark"):
            if role not in data:
                continue
            d = data[role]
            if d.wavelength_nm[0] > wl[0] * (1 + 1e-9) or d.wavelength_nm[-1] < wl[-1] * (1 - 1e-9):
                self.file_msg[role].show_error(
                    f"{_esc(self.files[role][0])} covers {d.wavelength_nm[0]:g}-{d.wavelength_nm[-1]:g} nm but the "
                    f"sample {wl[0]:g}-{wl[-1]:g} nm; measure it over the sample's range.")
                raise _Stop
            same = d.wavelength_nm.size == wl.size and np.allclose(d.wavelength_nm, wl, rtol=1e-9, atol=1e-9)
            grids[role] = d.values if same else np.interp(wl, d.wavelength_nm, d.values)
            if not same:
                notes.append(f"The {role} spectrum was interpolated onto the sample's wavelengths.")
        if self.ref_mode.value == "silicon":
            s = self.ex.state
            try:
                ambient = s.stack.ambient
                r_ref = Stack([], substrate="Si", ambient=ambient).reflectance(wl, s.angle_deg, s.polarization)
            except InputError as exc:
                self.file_msg["reference"].show_error(f"Bare silicon reference: {str(exc)}")
                raise _Stop from None
            ref_text = f"bare silicon (computed, in {ambient.name}, {s.angle_deg:g}°, {s.polarization})"
        else:
            try:
                r_ref = parse_number(self.ref_value.input.value, "Reference reflectance", 0.001, 1.0)
            except InputError as exc:
                self.ref_value.show_error(str(exc))
                raise _Stop from None
            self.ref_value.show_error(None)
            ref_text = f"{r_ref:g}"
        try:
            R = reflectance_from_counts(sample.values, grids["reference"], grids.get("dark"), r_ref)
        except InputError as exc:
            self.file_msg[blame if blame in ("reference", "dark") else "reference"].show_error(str(exc))
            raise _Stop from None
        notes.append(f"Reflectance = (sample − dark)/(reference − dark) × reference reflectance ({ref_text}).")
        info.update(counts=True, reference_file=self.files["reference"][0],
                    dark_file=self.files["dark"][0] if "dark" in self.files else None, reference_reflectance=ref_text,
                    value_unit="counts")
        info["notes"] = notes
        return wl, R, info

    def _show_measured(self, wl, R):
        self.meas_src.data = dict(wl=wl, R=R * 100)
        if self.result is None:
            self.model_src.data = dict(wl=[], R=[], res=[])
        self.spec_fig.title.text = f"Measured spectrum ({self.files['sample'][0]})"

    # ------------------------------------------------------------------ fit
    def _num(self, field, name, lo, hi, unit="nm", optional=False):
        text = field.input.value.strip()
        if optional and not text:
            field.show_error(None)
            return None
        try:
            v = parse_number(text, name, lo, hi, unit)
        except InputError as exc:
            field.show_error(str(exc))
            raise _Stop from None
        field.show_error(None)
        return v

    def _window(self, lo_field, hi_field, name):
        lo = self._num(lo_field, f"{name} from", *THICKNESS_LIMITS_NM)
        hi = self._num(hi_field, f"{name} to", *THICKNESS_LIMITS_NM)
        if not lo < hi:
            hi_field.show_error("The window's end must be above its start.")
            raise _Stop
        return lo, hi

    def _request(self):
        """The fit's arguments from the widgets and the explorer (raises _Stop after showing a message)."""
        if self.spectrum is None:
            self.fit_msg.show_error("Upload a spectrum first.")
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
        wl, R = self.spectrum
        args = dict(wavelength_nm=wl, reflectance=R, stack=stack, layer=layer, thickness_nm=window,
                    angle_deg=s.angle_deg, polarization=s.polarization, free_scale=bool(self.free_scale.value),
                    free_offset=bool(self.free_offset.value), wavelength_range_nm=wl_range)
        if second is not None:
            args.update(second_layer=second, second_thickness_nm=second_window)
        return args

    def _wavelength_range(self):
        lo = self._num(self.wl_lo, "Wavelengths from", *WAVELENGTH_LIMITS_NM, optional=True)
        hi = self._num(self.wl_hi, "Wavelengths to", *WAVELENGTH_LIMITS_NM, optional=True)
        if lo is None and hi is None:
            return None
        lo = 0.0 if lo is None else lo
        hi = WAVELENGTH_LIMITS_NM[1] if hi is None else hi
        if not lo < hi:
            self.wl_hi.show_error("The range's end must be above its start.")
            raise _Stop
        return lo, hi

    def run_fit(self, sync: bool = False):
        """Fit the current spectrum (off the event loop when served). Returns True when a fit was started."""
        try:
            args = self._request()
        except _Stop:
            return False
        self.fit_msg.show_error(None)
        self._job += 1
        job = self._job
        info = dict(self.import_info)
        doc = pn.state.curdoc
        size = len(args["wavelength_nm"])
        session = session_key(self.ex)
        if sync or not served(doc):
            limits = Limits.from_env()
            try:
                with heavy_job("spectrum_fit", size, session, limits):
                    out = workers.spectrum_fit(args, limits.max_grid_points)
            except InputError as exc:
                out = None, None, exc
            self._finish(job, args, info, *out)
            return True
        self.status.object = "fitting…"
        self.fit_button.disabled = True

        async def run():
            limits = Limits.from_env()
            try:
                with heavy_job("spectrum_fit", size, session, limits):
                    out = await workers.run_in_worker(limits.max_jobs_server, workers.spectrum_fit, args,
                                                      limits.max_grid_points)
            except InputError as exc:
                out = None, None, exc
            except workers.WorkerLost as exc:
                log.error("spectrum fit: worker process lost", extra={"session": session, "size": size})
                out = None, None, InputError(str(exc))
            except Exception:  # never lose the session to one failed computation
                log.exception("spectrum fit failed")
                out = None, None, InputError("The fit failed unexpectedly; the server log has the details.")
            post_to_page(doc, partial(self._finish, job, args, info, *out))
        pn.state.execute(run)
        return True

    def _finish(self, job, args, info, result, fourier, error):
        if job != self._job:                     # superseded by a newer request
            return
        self.fit_button.disabled = False
        self.status.object = ""
        if error is not None:
            self._show_fit_error(error)
            return
        self.result, self.fourier = result, fourier
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
            field = self.fit_msg
        field.show_error(text)

    def _show_result(self):
        r, a = self.result, self.result_info["args"]
        stack = a["stack"]
        names = [l.material.name for l in stack.layers]
        kind = "warning" if r.warning else "success"
        lines = [f"<b>d = {_pm(r.thickness_nm, r.uncertainty_nm)} nm (1σ)</b> — layer {a['layer']} "
                 f"({_esc(names[a['layer']])})"]
        if r.second_thickness_nm is not None:
            lines.append(f"<b>d₂ = {_pm(r.second_thickness_nm, r.second_uncertainty_nm)} nm (1σ)</b> — layer "
                         f"{a['second_layer']} ({_esc(names[a['second_layer']])})")
        lines.append(f"rms residual {100 * r.rms:.3f} % over {r.n_points} points, {r.n_parameters} free "
                     f"parameter{'s' if r.n_parameters > 1 else ''}")
        if a["free_scale"] or a["free_offset"]:
            lines.append(f"scale {r.scale:.4f}, offset {100 * r.offset:+.3f} %")
        if r.warning:
            lines.append(f"⚠ {_esc(r.warning)}")
        self.verdict.alert_type = kind
        self.verdict.object = "<br>".join(lines)
        rows = [("wavelengths used", f"{r.wavelength_nm[0]:g}–{r.wavelength_nm[-1]:g} nm ({r.n_points} points)"),
                ("window searched", f"{a['thickness_nm'][0]:g}–{a['thickness_nm'][1]:g} nm"),
                ("angle, polarization", f"{a['angle_deg']:g}°, {a['polarization']}")]
        if r.minima:
            rows.append(("minima (thickness, rms)", "; ".join(f"{t:.1f} nm, {100 * v:.3f} %" for t, v in r.minima)))
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
        self.meas_src.data = dict(wl=r.wavelength_nm, R=r.measured * 100)
        self.model_src.data = dict(wl=r.wavelength_nm, R=r.model * 100, res=r.residual * 100)
        self.spec_fig.title.text = (f"Measured ({self.result_info['import_info'].get('sample_file', '')}) and fitted: "
                                    f"d = {_pm(r.thickness_nm, r.uncertainty_nm)} nm")
        rms = np.maximum(r.scan_rms * 100, 1e-9)
        self.scan_src.data = dict(d=r.scan_thickness_nm, rms=rms)
        self.minima_src.data = dict(d=[m[0] for m in r.minima], rms=[max(m[1] * 100, 1e-9) for m in r.minima],
                                    label=["best" if i == 0 else f"#{i + 1}" for i in range(len(r.minima))])
        self.best_span.location = r.thickness_nm
        self.best_span.visible = True
        self.scan_fig.title.text = (f"Goodness of fit against the thickness of layer {a['layer']}"
                                    + (" (minimised over the second layer)" if r.second_thickness_nm is not None else "")
                                    + "; triangles: refined minima")

    def fourier_thickness(self):
        """(optical thickness n·d·cos θ, d for the unknown layer, n cos θ used, wavelength) or None."""
        if self.fourier is None or self.result is None:
            return None
        a = self.result_info["args"]
        stack, wl = a["stack"], self.result.wavelength_nm
        centre = float(0.5 * (wl[0] + wl[-1]))
        n_layer = stack.layers[a["layer"]].material.nk(np.array([centre]))[0].real
        n_amb = stack.ambient.nk(np.array([centre]))[0].real
        n_cos = math.sqrt(max(n_layer ** 2 - (n_amb * math.sin(math.radians(a["angle_deg"]))) ** 2, 1e-12))
        return self.fourier, self.fourier / n_cos, n_cos, centre

    def _fourier_text(self):
        f = self.fourier_thickness()
        if f is None:
            return ""
        opt, d, n_cos, centre = f
        return (f"optical thickness n·d·cos θ ≈ {opt:.0f} nm → d ≈ {d:.0f} nm (n·cos θ = {n_cos:.3f} at "
                f"{centre:.0f} nm; assumes the strongest fringes come from this layer; unresolved below about "
                "two fringes in the band)")

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
            f"# layer {a['layer']} thickness_nm: {r.thickness_nm:.4f} +/- {r.uncertainty_nm:.4f} (1 sigma)",
        ]
        if r.second_thickness_nm is not None:
            lines.append(f"# layer {a['second_layer']} thickness_nm: {r.second_thickness_nm:.4f} +/- "
                         f"{r.second_uncertainty_nm:.4f} (1 sigma)")
        lines.append(f"# rms (fraction): {r.rms:.6g}; scale: {r.scale:.6g}; offset (fraction): {r.offset:.6g}")
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
                "layers": [medium(f"layer {i}", l.material, l.thickness_nm, i) for i, l in enumerate(st.layers)],
                "substrate": medium("substrate", st.substrate),
                "substrate_thickness_mm": st.substrate_thickness_mm,
            },
            "result": {
                "thickness_nm": r.thickness_nm, "uncertainty_nm": r.uncertainty_nm, "uncertainty_level": "1 sigma",
                "second_thickness_nm": r.second_thickness_nm, "second_uncertainty_nm": r.second_uncertainty_nm,
                "rms_fraction": r.rms, "scale": r.scale, "offset_fraction": r.offset,
                "n_points": r.n_points, "n_parameters": r.n_parameters,
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
            _label("The reference's reflectance"), self.ref_mode, self.ref_value.view(),
            pn.Row(self.wl_unit, self.value_unit, margin=0), self.notes,
            pn.pane.HTML("<h3 style='margin:10px 5px 2px;font-size:15px'>Model</h3>"),
            self.unknown, pn.Row(self.win_lo.view(), self.win_hi.view(), margin=0),
            self.second, pn.Row(self.win2_lo.view(), self.win2_hi.view(), margin=0),
            self.free_scale, self.free_offset,
            pn.Row(self.wl_lo.view(), self.wl_hi.view(), margin=0),
            self.fit_button, self.fit_msg.message, self.status,
            pn.pane.HTML("<h3 style='margin:10px 5px 2px;font-size:15px'>Downloads</h3>"),
            self.dl_csv, self.dl_scan, self.dl_json, width=340)
        results = pn.Column(
            self.verdict, self.details, self.disclaimer,
            pn.pane.Bokeh(self.spec_fig, sizing_mode="stretch_width"),
            pn.pane.Bokeh(self.resid_fig, sizing_mode="stretch_width"),
            pn.pane.Bokeh(self.scan_fig, sizing_mode="stretch_width"),
            sizing_mode="stretch_width")
        return pn.Row(controls, results, sizing_mode="stretch_width", scroll=True)


def _pm(value: float, sigma: float) -> str:
    """'X ± Y' with Y to two significant digits and X to the same decimals."""
    if not np.isfinite(sigma) or sigma <= 0:
        return f"{value:.2f} ± {sigma:.2g}"
    decimals = max(0, min(6, 1 - int(math.floor(math.log10(sigma)))))
    return f"{value:.{decimals}f} ± {sigma:.{decimals}f}"
