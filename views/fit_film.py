"""The spectrum tab's film-model editor: fit a film's n and k with its thickness, and use the fitted film.

Part of :class:`views.fit.SpectrumFitSection` (built with it, when the tab is first opened). With a dispersion
model chosen (or a roughness layer or a thickness spread ticked) "Fit" runs :func:`physics.filmcurves.fit_film_curves`
(:func:`physics.fit_film` and the curves the page draws) in a worker, as the thickness fit runs; this module
shows the result and puts the fitted film into the film explorer's stack. Every number comes from physics.
"""

from __future__ import annotations

import json
import re

import numpy as np
import panel as pn
import param
from bokeh.models import ColumnDataSource, Legend, LegendItem, LinearAxis, Range1d
from bokeh.plotting import figure

from physics import InputError
from physics.filmcurves import fit_film_curves
from physics.filmfit import BANDWIDTH_MAX_NM, model_parameters

from .explorer import Field, TickBox, _esc, _label
from .urlstate import LinkField
from .state import parse_number

#: The film models offered, in the page's words, and the fit_film model each runs.
FILM_MODELS = {"fixed constants (the stack's material)": "fixed", "Cauchy (transparent)": "cauchy",
               "Cauchy + Urbach absorption tail": "cauchy-urbach", "Sellmeier, one term (transparent)": "sellmeier",
               "Sellmeier, two terms (transparent)": "sellmeier-2", "Tauc-Lorentz (absorbing, amorphous)": "tauc-lorentz"}
#: Slit shapes offered for the instrument's bandwidth, in the page's words, and the fit_film slit each is.
SLIT_SHAPES = {"Gaussian (array spectrometer)": "gaussian", "triangular (scanning monochromator)": "triangular"}
#: Models whose k is 0 everywhere.
TRANSPARENT_MODELS = ("cauchy", "sellmeier", "sellmeier-2")
#: Wavelength at which n and k are quoted (nm): the helium-neon line, where film indices are commonly quoted
#: (common practice); the band's middle when the spectrum does not reach it.
QUOTE_WAVELENGTH_NM = 633.0
#: Most points of the measured spectrum a film fit uses (the fit bins denser spectra itself; a cap here
#: keeps the model curve the worker returns bounded).
MAX_FILM_POINTS = 20_000
#: Fewest points left after the "Use wavelengths" range for a film fit to be tried.
MIN_FILM_POINTS = 10
#: How each fitted parameter is named on the page: (label, unit, factor from the fit's value to the shown one).
PARAMETER_LABELS = {
    "thickness_nm": ("thickness d", "nm", 1.0),
    "A": ("Cauchy A", "", 1.0), "B_um2": ("Cauchy B", "µm²", 1.0), "C_um4": ("Cauchy C", "µm⁴", 1.0),
    "k_amplitude": ("k at the band's short end", "", 1.0), "k_exponent_per_ev": ("Urbach slope", "1/eV", 1.0),
    "B1": ("Sellmeier B₁", "", 1.0), "C1_um2": ("Sellmeier C₁", "µm²", 1.0),
    "B2": ("Sellmeier B₂", "", 1.0), "C2_um2": ("Sellmeier C₂", "µm²", 1.0),
    "eps_inf": ("ε∞", "", 1.0), "gap_ev": ("Tauc gap Eg", "eV", 1.0), "amplitude_ev": ("amplitude A", "eV", 1.0),
    "center_ev": ("peak energy E₀", "eV", 1.0), "broadening_ev": ("broadening C", "eV", 1.0),
    "roughness_nm": ("surface roughness layer", "nm", 1.0), "spread_nm": ("thickness spread σ in the spot", "nm", 1.0),
    "scale": ("reflectance scale", "", 1.0), "offset": ("reflectance offset", "% R", 100.0),
}
NK_TITLE = "Fitted n and k of the film"
#: The fit's API words and how the page says them (the page has a model list and tick boxes, not keywords).
PAGE_WORDS = (("(model='fixed' with a known material)",
               "(untick the index's parameters in the table under “Film model” and type their known values, or "
               "choose the film model “fixed constants” with the film's known material in the film explorer)"),
              ("(model='fixed', no roughness or spread, no free scale or offset)",
               "(film model “fixed constants”, no surface roughness or thickness spread, no free scale or offset)"),
              ("fit the top layer (layer=0) with roughness=True",
               "make the top layer the explorer's swept layer to fit it with a surface roughness"),
              (" and A trade", " and Cauchy A trade"))


def page_text(message: str) -> str:
    """A fit's message in the page's words (:data:`PAGE_WORDS`); parameter names become their page labels."""
    for api, page in PAGE_WORDS:
        message = message.replace(api, page)
    for name, (label, _, _) in PARAMETER_LABELS.items():
        if "_" in name or name in ("B1", "B2"):                 # names that are no everyday word
            message = re.sub(rf"\b{name}\b", label, message)
    return message


def value_text(value: float, sigma: float) -> tuple[str, str]:
    """(value, ±1σ) as text: the value to the σ's second significant digit, 4 significant digits without σ."""
    if not np.isfinite(sigma) or sigma <= 0:
        return f"{value:.4g}", "–"
    place = int(np.floor(np.log10(sigma))) - 1
    digits = max(0, -place)
    if abs(value) >= 1e5 or (value != 0 and abs(value) < 1e-3 and digits > 6):
        return f"{value:.3e}", f"{sigma:.2g}"
    return f"{value:.{digits}f}", f"{sigma:.{digits}f}" if digits else f"{sigma:.0f}"


def _band(c):
    """(n_lo, n_hi, k_lo, k_hi) of fitted curves: the sampled 68 % band, or the curves themselves when there is none."""
    if c.n_lo is None:
        return c.n, c.n, c.k, c.k
    return c.n_lo, c.n_hi, c.k_lo, c.k_hi


def fit_film_reporting(reporter, **kwargs):
    """:func:`physics.filmcurves.fit_film_curves` (``**kwargs``) telling ``reporter.report(fraction, text)`` how far
    it has come (a worker's progress channel, whose ``report`` raises to stop the fit)."""
    return fit_film_curves(**kwargs, progress=reporter.report)


#: Each model's formula, said above its parameter table (as the models are defined in physics.filmfit).
MODEL_FORMULAS = {
    "cauchy": "n = A + B/λ² + C/λ⁴ (λ in µm), k = 0.",
    "cauchy-urbach": "n = A + B/λ² + C/λ⁴ (λ in µm); k = k₀·exp(s·(E − E₀)), k₀ its value at the band's short "
                     "end (photon energy E₀), s the Urbach slope (1/eV).",
    "sellmeier": "n² = 1 + B₁λ²/(λ² − C₁) (λ in µm), k = 0.",
    "sellmeier-2": "n² = 1 + B₁λ²/(λ² − C₁) + B₂λ²/(λ² − C₂) (λ in µm), k = 0.",
    "tauc-lorentz": "ε₂: a Tauc absorption edge at Eg times a Lorentz peak (amplitude A at E₀, broadening C); "
                    "ε₁ = ε∞ + its Kramers-Kronig integral.",
}
#: Link key of the parameter table's edits, and the longest text it takes (five rows of four numbers fit in 200).
PARAMS_LINK_KEY = "s_fp"
PARAMS_LINK_MAX = 400


def _number_text(v: float) -> str:
    return f"{v:.6g}"


class _Mark(param.Parameterized):
    """Changes whenever the parameter table's edits do (the page address follows its ``value``)."""

    value = param.String(default="")


class ParameterTable:
    """The chosen model's dispersion parameters, one row each: free or held, start (or held value), lowest and
    highest, checked as typed; the fitted value ± 1σ beside each row after a fit. Edits are kept per model, so
    switching models and back loses nothing."""

    ROWS = max(len(model_parameters(m)) for m in FILM_MODELS.values())

    def __init__(self):
        self.model = "fixed"
        self.edits = {}                 # model -> {name: [free, start text, lowest text, highest text]}
        self.fitted = {}                # name -> (value, 1σ, held) of the last fit of this model
        self.fitted_model = None
        self._loading = False
        self.mark = _Mark()
        style = {"font-size": "12px"}
        self.names = [pn.pane.HTML("", width=112, margin=(4, 2), styles=style) for _ in range(self.ROWS)]
        self.free = [pn.widgets.Checkbox(value=True, width=22, margin=(10, 2), css_classes=["fg-fp-free"])
                     for _ in range(self.ROWS)]
        self.cells = [[pn.widgets.TextInput(value="", width=62, margin=(2, 2), css_classes=[f"fg-fp-{kind}"])
                       for kind in ("start", "lo", "hi")] for _ in range(self.ROWS)]
        self.rows = [pn.Row(self.names[i], self.free[i], *self.cells[i], margin=0, visible=False)
                     for i in range(self.ROWS)]
        self.header = pn.pane.HTML(
            "<div style='font-size:11px;color:#555;display:grid;grid-template-columns:114px 26px 66px 66px 66px'>"
            "<span>parameter</span><span>free</span><span>start</span><span>lowest</span><span>highest</span>"
            "</div>", margin=(4, 5, 0, 5))
        self.note = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "11px", "color": "#555"})
        self.message = pn.pane.HTML("", margin=(0, 5), visible=False, css_classes=["fg-error", "fg-fp-message"],
                                    styles={"font-size": "12px", "color": "#a61b1b"})
        self.from_fit = pn.widgets.Button(label="Start from the fit", color="light", width=150, margin=(2, 5),
                                          visible=False, css_classes=["fg-fp-from-fit"])
        self.from_fit.on_click(lambda *_: self.start_from_fit())
        for i in range(self.ROWS):
            self.free[i].param.watch(lambda e: self._edited(), "value")
            for w in self.cells[i]:
                w.param.watch(lambda e: self._edited(), "value")
        self.panel = pn.Column(self.header, *self.rows, self.message, self.from_fit, self.note, margin=0,
                               visible=False, css_classes=["fg-fp-table"])

    # ------------------------------------------------------------------ rows
    def defaults(self, model=None):
        """{name: [free, start, lowest, highest]} of ``model``'s generic start and physical range."""
        return {nm: [True, _number_text(s), _number_text(lo), _number_text(hi)]
                for nm, s, lo, hi, _ in model_parameters(model or self.model)}

    def rows_of(self, model=None) -> dict:
        model = model or self.model
        return {nm: list(self.edits.get(model, {}).get(nm, row)) for nm, row in self.defaults(model).items()}

    def show_model(self, model: str):
        """Fill the rows with ``model``'s parameters (its edits kept from before, else its defaults)."""
        self.model = model
        rows = self.rows_of(model)
        self._loading = True
        try:
            for i in range(self.ROWS):
                self.rows[i].visible = i < len(rows)
            for i, (nm, (free, start, lo, hi)) in enumerate(rows.items()):
                self.free[i].value = free
                for w, text in zip(self.cells[i], (start, lo, hi)):
                    w.value = text
        finally:
            self._loading = False
        self.panel.visible = bool(rows)
        self._refresh()

    def _edited(self):
        if self._loading:
            return
        names = list(self.defaults())
        self.edits[self.model] = {nm: [bool(self.free[i].value)] + [w.value for w in self.cells[i]]
                                  for i, nm in enumerate(names)}
        self._refresh()
        self.mark.value = self.link_text() or ""

    def _refresh(self):
        names = list(self.defaults())
        units = {nm: u for nm, _, _, _, u in model_parameters(self.model)}
        for i, nm in enumerate(names):
            label = PARAMETER_LABELS.get(nm, (nm,))[0]
            unit = f" ({units[nm]})" if units[nm] else ""
            fit = ""
            if self.fitted_model == self.model and nm in self.fitted:
                v, sd, held = self.fitted[nm]
                fit = ("<br><span style='color:#1e6b2e'>held at " + f"{v:.4g}</span>" if held else
                       "<br><span style='color:#1e6b2e'>fit " + " ± ".join(value_text(v, sd)) + "</span>")
            self.names[i].object = f"{_esc(label)}{_esc(unit)}{fit}"
        self.from_fit.visible = self.fitted_model == self.model and bool(self.fitted)
        try:
            self.values()
        except ValueError as exc:
            self.message.object, self.message.visible = _esc(str(exc)), True
        else:
            self.message.object, self.message.visible = "", False
        held = [PARAMETER_LABELS.get(nm, (nm,))[0] for nm in names if not self.rows_of()[nm][0]]
        self.note.object = (MODEL_FORMULAS.get(self.model, "") + " "
                            + (("Unticked: held at the start value, not fitted (" + ", ".join(held) + "). ") if held
                               else "Untick a parameter to hold it at its start value (a thin film's index: A and "
                                    "B at known values). " if self.model.startswith("cauchy") else
                               "Untick a parameter to hold it at its start value. ")
                            + "The search also tries starts spread between each lowest and highest.")

    def values(self):
        """(fixed, start, bounds) for :func:`physics.fit_film` from the rows; raises ValueError with the sentence."""
        fixed, start, bounds = {}, {}, {}
        for (nm, s, lo, hi, unit), (free, *texts) in zip(model_parameters(self.model), self.rows_of().values()):
            label = PARAMETER_LABELS.get(nm, (nm,))[0]
            nums = []
            for what, text in zip(("start" if free else "held value", "lowest", "highest"), texts):
                try:
                    v = float(text.strip().replace("−", "-"))
                except ValueError:
                    v = float("nan")
                if not np.isfinite(v):
                    raise ValueError(f"{label}: the {what} “{text.strip()[:20]}” is not a number; type one such "
                                     f"as {_number_text(s)}.")
                nums.append(v)
            v, a, b = nums
            if not lo <= a < b <= hi:
                raise ValueError(f"{label}: lowest {a:g} and highest {b:g} must rise and lie inside the model's "
                                 f"range, {lo:g} to {hi:g}{(' ' + unit) if unit else ''}.")
            if not a <= v <= b:
                raise ValueError(f"{label}: the {'start' if free else 'held value'} {v:g} lies outside lowest "
                                 f"{a:g} to highest {b:g}; move it inside, or widen them.")
            (start if free else fixed)[nm] = v
            if (a, b) != (lo, hi):
                bounds[nm] = (a, b)
        if model_parameters(self.model) and not start:
            raise ValueError("Every parameter is held, so there is nothing of the film's n and k to fit: tick at "
                             "least one as free, or choose the film model “fixed constants”.")
        return fixed, start, bounds

    # ------------------------------------------------------------------ fit
    def show_fit(self, result):
        self.fitted_model = result.model
        held = set(getattr(result, "fixed", ()))
        self.fitted = {nm: (result.parameters[nm], result.uncertainties[nm], nm in held)
                       for nm in self.defaults(result.model) if nm in result.parameters}
        self._refresh()

    def clear_fit(self):
        self.fitted, self.fitted_model = {}, None
        self._refresh()

    def start_from_fit(self):
        """Copy the fitted values into the starts of the free rows."""
        if self.fitted_model != self.model:
            return
        for i, nm in enumerate(self.defaults()):
            if nm in self.fitted and not self.fitted[nm][2]:
                self.cells[i][0].value = _number_text(self.fitted[nm][0])

    # ------------------------------------------------------------------ link
    def link_text(self):
        """The rows that differ from the defaults, as ``name=start/lowest/highest`` (``!name`` when held), joined
        by ``;``; None when none do."""
        default = self.defaults()
        parts = [("" if row[0] else "!") + f"{nm}={'/'.join(t.strip() for t in row[1:])}"
                 for nm, row in self.rows_of().items() if row != default[nm]]
        return ";".join(parts) or None

    def apply_link(self, text: str):
        """Apply a link's rows; a sentence for the items not applied (the others are)."""
        if len(text) > PARAMS_LINK_MAX:
            return f"it is {len(text)} characters long, more than {PARAMS_LINK_MAX}"
        rows, bad = self.rows_of(), []
        for item in filter(None, text.split(";")):
            nm, _, vals = item.partition("=")
            held, nm = nm.startswith("!"), nm.lstrip("!")
            texts = vals.split("/")
            if nm not in rows or len(texts) != 3:
                bad.append(item[:30])
                continue
            rows[nm] = [not held] + texts
        self.edits[self.model] = rows
        self.show_model(self.model)
        self.mark.value = self.link_text() or ""
        if bad:
            names = ", ".join(self.defaults()) or "none"
            return (f"{', '.join(bad)} is not name=start/lowest/highest of a parameter of this film model "
                    f"({names})")
        return None

    def link_field(self) -> LinkField:
        return LinkField(PARAMS_LINK_KEY, "Film model parameters", self.link_text, self.apply_link, self.mark)


def settings_key(state) -> tuple:
    """The explorer settings a spectrum fit depends on: stack, unknown layer, angle, polarization."""
    return state.stack_json, state.swept_layer, state.angle_deg, state.polarization


class FilmModelEditor:
    """Film model choice, the fitted film's table and n, k plot, and "Use this fitted film", for one section."""

    def __init__(self, section):
        self.section = section
        self.result = None              # physics.FilmFitResult shown
        self.curves = None              # physics.filmcurves.FilmFitCurves shown
        self.args = None                # the fit's arguments
        self.adopting = False           # the explorer's stack is being changed by "Use this fitted film"
        self.adopted = None             # the explorer's settings it left (a served page calls watchers a tick later)
        self.model = pn.widgets.Select(label="Film model", options=FILM_MODELS, value="fixed", width=300,
                                       margin=(2, 5), css_classes=["fg-fit-model"])
        self.roughness = TickBox("Surface roughness (50 % void top layer)")
        self.spread = TickBox("Thickness spread in the spot")
        self.bandwidth = Field("Bandwidth, FWHM (nm)", width=140, css="fg-fit-bandwidth")
        self.bandwidth.set_text("0")
        self.slit = pn.widgets.Select(label="Slit shape", options=SLIT_SHAPES, value="gaussian", width=150,
                                      margin=(2, 5), css_classes=["fg-fit-slit"])
        self.hint = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "11px", "color": "#555"})
        self.use_button = pn.widgets.Button(label="Use this fitted film", color="success", width=200, margin=(4, 5),
                                            visible=False, css_classes=["fg-fit-use-film"])
        self.use_status = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px"},
                                       css_classes=["fg-fit-use-status"])
        self.download = pn.widgets.FileDownload(callback=self._nk_csv, filename="fitted_film_n_k.csv",
                                                label="Fitted film: parameters, n and k (.csv)", width=300,
                                                disabled=True, margin=(2, 5))
        self.nk_src = ColumnDataSource(dict(wl=[], n=[], n_lo=[], n_hi=[], k=[], k_lo=[], k_hi=[]))
        f = figure(height=220, sizing_mode="stretch_width", tools="pan,wheel_zoom,box_zoom,reset,save",
                   title=NK_TITLE, x_axis_label="wavelength (nm)", y_axis_label="refractive index n",
                   y_range=Range1d(1.0, 3.0), x_range=Range1d(400.0, 1000.0), visible=False)   # set when drawn
        f.extra_y_ranges = {"k": Range1d(0.0, 0.1)}
        f.add_layout(LinearAxis(y_range_name="k", axis_label="extinction coefficient k"), "right")
        f.varea("wl", "n_lo", "n_hi", source=self.nk_src, fill_color="#1f6fb4", fill_alpha=0.2)
        n_line = f.line("wl", "n", source=self.nk_src, color="#1f6fb4", line_width=2)
        f.varea("wl", "k_lo", "k_hi", source=self.nk_src, fill_color="#c0392b", fill_alpha=0.2, y_range_name="k")
        k_line = f.line("wl", "k", source=self.nk_src, color="#c0392b", line_width=2, line_dash="dashed",
                        y_range_name="k")
        self._k_parts = [f.renderers[-2], k_line, f.right[0]]      # band, line, axis: hidden when k = 0
        self._legend_items = [LegendItem(label="n (left axis)", renderers=[n_line]),
                              LegendItem(label="k (right axis)", renderers=[k_line])]
        self._legend = Legend(items=list(self._legend_items), orientation="horizontal", location="top_right",
                              label_text_font_size="11px", margin=0, padding=2)
        f.add_layout(self._legend, "above")
        self.nk_fig = f
        self.params = ParameterTable()
        self.model.param.watch(lambda e: self.params.show_model(e.new), "value")
        self.model.param.watch(lambda e: self._show_hint(), "value")
        self.roughness.param.watch(lambda e: self._show_hint(), "value")
        self.spread.param.watch(lambda e: self._show_hint(), "value")
        self.bandwidth.input.param.watch(lambda e: self._check_bandwidth(), "value")
        self._show_hint()

    # ------------------------------------------------------------------ controls
    def active(self) -> bool:
        """True when "Fit" fits a film model (n and k, or roughness, or a spread, or through a bandwidth), not the
        thickness alone."""
        return (self.model.value != "fixed" or bool(self.roughness.value) or bool(self.spread.value)
                or self._bandwidth_text() != 0.0)

    def _bandwidth_text(self):
        """The bandwidth typed (nm), or None when it does not read as one."""
        try:
            return parse_number(self.bandwidth.input.value.strip() or "0", "Instrument bandwidth", 0.0,
                                BANDWIDTH_MAX_NM, "nm")
        except InputError:
            return None

    def _check_bandwidth(self):
        """Say beside the bandwidth field, as soon as it changes, whether its text reads as a bandwidth."""
        try:
            parse_number(self.bandwidth.input.value.strip() or "0", "Instrument bandwidth", 0.0, BANDWIDTH_MAX_NM, "nm")
        except InputError as exc:
            self.bandwidth.show_error(str(exc))
        else:
            self.bandwidth.show_error(None)
        self._show_hint()

    def _show_hint(self):
        s = self.section
        bw = self._bandwidth_text()
        slit_note = (f" The model is read through the instrument's {bw:g} nm slit." if bw else "")
        if self.model.value == "fixed" and not (self.roughness.value or self.spread.value):
            self.hint.object = "The layer keeps the stack's optical constants; only its thickness is fitted." + slit_note
            label = "Fit thickness"
        else:
            what = "its n and k" if self.model.value != "fixed" else "the stack's n and k for it"
            self.hint.object = (f"The unknown layer's thickness and {what} are fitted together"
                                + (", with a surface roughness layer" if self.roughness.value else "")
                                + (" and a thickness spread" if self.spread.value else "")
                                + ". It fits one unknown layer: leave “Second unknown layer” at (none)." + slit_note)
            label = "Fit thickness and film"
        if hasattr(s, "fit_button"):
            s.fit_button.label = label

    def controls(self):
        return pn.Column(pn.pane.HTML("<h3 style='margin:10px 5px 2px;font-size:15px'>Film model</h3>"),
                         self.model, self.params.panel, self.roughness, self.spread,
                         pn.Row(self.bandwidth.input, self.slit, margin=0), self.bandwidth.message, self.hint,
                         margin=0)

    def request(self, args: dict) -> dict:
        """fit_film's arguments from the thickness fit's; raises ValueError with the sentence for the page."""
        if "second_layer" in args:
            raise ValueError("A film-model fit finds one unknown layer: choose “(none)” under “Second unknown "
                             "layer”, or the film model “fixed constants” to fit two thicknesses.")
        try:
            bandwidth = parse_number(self.bandwidth.input.value.strip() or "0", "Instrument bandwidth", 0.0,
                                     BANDWIDTH_MAX_NM, "nm")
        except InputError as exc:
            self.bandwidth.show_error(str(exc))
            raise ValueError(f"Instrument bandwidth: {exc}") from None
        self.bandwidth.show_error(None)
        wl, R = np.asarray(args["wavelength_nm"]), np.asarray(args["reflectance"])
        rng = args.get("wavelength_range_nm")
        if rng is not None:
            keep = (wl >= rng[0]) & (wl <= rng[1])
            if keep.sum() < MIN_FILM_POINTS:
                raise ValueError(f"Only {int(keep.sum())} points of the spectrum lie in {rng[0]:g}–{rng[1]:g} nm; a "
                                 f"film fit needs at least {MIN_FILM_POINTS}: widen “Use wavelengths”.")
            wl, R = wl[keep], R[keep]
        if wl.size > MAX_FILM_POINTS:
            pick = np.unique(np.linspace(0, wl.size - 1, MAX_FILM_POINTS).round().astype(int))
            wl, R = wl[pick], R[pick]
        extra = {}
        if self.model.value != "fixed":
            try:
                fixed, start, bounds = self.params.values()
            except ValueError as exc:
                raise ValueError(f"Film model parameters: {exc}") from None
            extra = dict(start=start, **({"fixed": fixed} if fixed else {}), **({"bounds": bounds} if bounds else {}))
        return dict(**extra, wavelength_nm=wl, reflectance=R, stack=args["stack"], layer=args["layer"],
                    model=self.model.value, thickness_nm=args["thickness_nm"], angle_deg=args["angle_deg"],
                    polarization=args["polarization"], roughness=bool(self.roughness.value),
                    spread=bool(self.spread.value), free_scale=args["free_scale"], free_offset=args["free_offset"],
                    bandwidth_nm=bandwidth, slit=self.slit.value)

    # ------------------------------------------------------------------ result
    def clear(self):
        self.result = self.curves = self.args = self.adopted = None
        self.use_button.visible = False
        self.download.disabled = True
        self.use_status.object = ""
        self.nk_src.data = dict(wl=[], n=[], n_lo=[], n_hi=[], k=[], k_lo=[], k_hi=[])
        self.nk_fig.visible = False
        self.section.scan_fig.visible = True
        self.params.clear_fit()

    def show(self, result, curves, args, file_name: str):
        """Show a film fit: the verdict, the parameter table, the spectra and the n, k plot."""
        s = self.section
        self.result, self.curves, self.args = result, curves, args
        layer = args["layer"]
        old = args["stack"].layers[layer].material.name
        kind, lines = self._verdict(result, curves, layer, old)
        s.verdict.alert_type = kind
        s.verdict.object = "<br>".join(lines)
        s.details.object = self._table(result, curves)
        fitted_model = result.model != "fixed"
        self.use_button.visible = fitted_model or result.roughness_nm is not None
        self.download.disabled = False
        self.use_status.object = ""
        s.draw_film_curves(curves, f"Measured ({file_name}) and fitted: "
                                   f"d = {' ± '.join(value_text(result.thickness_nm, result.uncertainty_nm))} nm")
        s.scan_fig.visible = False
        self.params.show_fit(result)
        if fitted_model:
            self._draw_nk(curves, result)
        else:
            self.nk_fig.visible = False

    def quote_wavelength(self, curves) -> float:
        lo, hi = float(curves.nk_wavelength_nm[0]), float(curves.nk_wavelength_nm[-1])
        return QUOTE_WAVELENGTH_NM if lo <= QUOTE_WAVELENGTH_NM <= hi else 0.5 * (lo + hi)

    def _verdict(self, r, c, layer, old):
        at = self.quote_wavelength(c)
        n, k = float(r.n_at([at])[0]), float(r.k_at([at])[0])
        sn = sk = float("nan")
        if c.sigma_n is not None:
            sn = float(np.interp(at, c.nk_wavelength_nm, c.sigma_n))
            sk = float(np.interp(at, c.nk_wavelength_nm, c.sigma_k))
        model = next(label for label, v in FILM_MODELS.items() if v == r.model)
        d, sd = value_text(r.thickness_nm, r.uncertainty_nm)
        lines = [f"<b>d = {d} ± {sd} nm (1σ)</b> — layer {layer + 1}, "
                 + (f"fitted with the film model {_esc(model)}, starting from {_esc(old)}" if r.model != "fixed" else
                    f"{_esc(old)}, optical constants as in the stack")]
        nk_text = f"n = {' ± '.join(value_text(n, sn)) if np.isfinite(sn) else f'{n:.4f}'}"
        if k == 0 and r.model in TRANSPARENT_MODELS:
            nk_text += ", k = 0 (a transparent model)"
        else:
            nk_text += f", k = {' ± '.join(value_text(k, sk)) if np.isfinite(sk) and sk > 0 else f'{k:.3g}'}"
        lines.append(f"<b>{nk_text}</b> at {at:.0f} nm" + ("" if at == QUOTE_WAVELENGTH_NM else
                                                           " (the band's middle: the spectrum does not reach 633 nm)"))
        if r.roughness_nm is not None:
            lines.append("surface roughness layer " + " ± ".join(value_text(r.roughness_nm,
                                                                            r.uncertainties["roughness_nm"]))
                         + " nm (the film's material with 50 % void)")
        if r.spread_nm is not None:
            lines.append("thickness spread across the spot σ = " + " ± ".join(value_text(r.spread_nm,
                                                                                      r.uncertainties["spread_nm"]))
                         + " nm")
        if r.bandwidth_nm:
            lines.append(f"model read through the instrument's {r.bandwidth_nm:g} nm {r.slit} slit (FWHM)")
        free = len(r.parameter_names) - len(r.fixed)
        lines.append(f"rms residual {100 * r.rms:.3g} % over {r.n_points} points, {free} free parameters"
                     + (f" ({', '.join(PARAMETER_LABELS.get(p, (p,))[0] for p in r.fixed)} held)" if r.fixed else ""))
        if r.message:
            lines.append(f"⚠ {_esc(page_text(r.message))}")
        if c.at_bounds:
            names = ", ".join(PARAMETER_LABELS.get(p, (p,))[0] for p in c.at_bounds)
            lines.append(f"⚠ {_esc(names)} ended at the limit of the model's range: the data do not fix "
                         f"{'it' if len(c.at_bounds) == 1 else 'them'}, so the ± there means little. A simpler "
                         "model may describe this film as well.")
        kind = "danger" if r.quality == "poor" else (
            "warning" if r.quality != "good" or r.message or c.at_bounds else "success")
        return kind, lines

    def _table(self, r, c):
        rows = []
        for name in r.parameter_names:
            label, unit, factor = PARAMETER_LABELS.get(name, (name, "", 1.0))
            v, s = value_text(factor * r.parameters[name], factor * r.uncertainties[name])
            mark = ""
            if name in c.at_bounds:                 # the ± says little there: the value in full, the ± short
                v, s, mark = f"{factor * r.parameters[name]:.4g}", f"{factor * r.uncertainties[name]:.2g}", " (at its limit)"
            pm = f"± {s}"
            if name in r.fixed:                     # held at the value given: no ±
                v, pm = f"{factor * r.parameters[name]:.6g}", "held, not fitted"
            rows.append(f"<tr><td>{_esc(label)}{mark}</td><td style='text-align:right'>{v}</td>"
                        f"<td>{pm}</td><td>{_esc(unit)}</td></tr>")
        band = f"{c.wavelength_nm[0]:g}–{c.wavelength_nm[-1]:g} nm"
        return ("<table class='fg-fit-table fg-fit-params' style='font-size:13px' cellpadding='2'>"
                "<tr><th style='text-align:left'>fitted parameter</th><th>value</th><th>1σ</th><th></th></tr>"
                + "".join(rows) + "</table>"
                f"<div style='font-size:11px;color:#555'>Fitted over {band}; the ± are 1σ from the fit's curvature "
                "scaled by its residual; the n and k bands in the plot hold the central 68 % of n and k over 200 "
                "parameter sets drawn from the fit's covariance (an absorption tail's band is lopsided).</div>")

    def _draw_nk(self, c, r):
        n_lo, n_hi, k_lo, k_hi = _band(c)
        self.nk_src.data = dict(wl=c.nk_wavelength_nm, n=c.n, n_lo=n_lo, n_hi=n_hi, k=c.k, k_lo=k_lo, k_hi=k_hi)
        wl = np.asarray(c.nk_wavelength_nm, dtype=float)
        if wl.size > 1:
            self.nk_fig.x_range.start, self.nk_fig.x_range.end = float(wl.min()), float(wl.max())
        lo, hi = float(np.min(n_lo)), float(np.max(n_hi))
        pad = max(0.05 * (hi - lo), 0.01)
        self.nk_fig.y_range.start, self.nk_fig.y_range.end = lo - pad, hi + pad
        k_top = float(np.max(k_hi))
        self.nk_fig.extra_y_ranges["k"].start = 0.0
        self.nk_fig.extra_y_ranges["k"].end = k_top * 1.1 if k_top > 0 else 0.01
        absorbing = bool(np.any(c.k > 0))
        for part in self._k_parts:
            part.visible = absorbing
        self._legend.items = self._legend_items if absorbing else self._legend_items[:1]
        self.nk_fig.title.text = (NK_TITLE + (" (shaded: central 68 %)" if c.sigma_n is not None else "")
                                  + ("" if absorbing else "; k = 0 everywhere (a transparent model)"))
        self.nk_fig.visible = True

    def _nk_csv(self):
        import io
        from datetime import date

        r, c, a = self.result, self.curves, self.args
        s = self.section
        info = (s.result_info or {}).get("import_info", {})
        lines = ["# fringegauge film fit (a model fit, not certified metrology)",
                 f"# date: {(s.result_info or {}).get('date', date.today().isoformat())}",
                 f"# spectrum file: {info.get('sample_file', '')}; {c.wavelength_nm[0]:g}-{c.wavelength_nm[-1]:g} nm, "
                 f"{r.n_points} points; angle_deg {a['angle_deg']:g}; polarization {a['polarization']}",
                 f"# layer {a['layer'] + 1}, film model: {r.model}; rms residual (fraction): {r.rms:.6g}; "
                 f"quality: {r.quality}"
                 + (f"; instrument bandwidth {r.bandwidth_nm:g} nm FWHM, {r.slit} slit" if r.bandwidth_nm else "")]
        lines += [f"# {name}: {r.parameters[name]:.10g} "
                  + ("(held, not fitted)" if name in r.fixed else f"+/- {r.uncertainties[name]:.3g} (1 sigma)")
                  for name in r.parameter_names]
        if r.message:
            lines.append(f"# note: {page_text(r.message)}")
        lines.append("# material as a stack file stores it: " + json.dumps(r.material.spec(), ensure_ascii=False))
        lines.append("# sigma: linear 1 sigma; lo68, hi68: the central 68 % of 200 parameter sets drawn from the "
                     "fit's covariance")
        lines.append("wavelength_nm,n,sigma_n,k,sigma_k,n_lo68,n_hi68,k_lo68,k_hi68")
        zero = np.zeros_like(c.n)
        sn = c.sigma_n if c.sigma_n is not None else zero
        sk = c.sigma_k if c.sigma_k is not None else zero
        band = _band(c)
        lines += [f"{w:.6g},{n:.8g},{a_:.3g},{k:.8g},{b:.3g},{nl:.8g},{nh:.8g},{kl:.8g},{kh:.8g}"
                  for w, n, a_, k, b, nl, nh, kl, kh in zip(c.nk_wavelength_nm, c.n, sn, c.k, sk, *band)]
        return io.StringIO("\n".join(lines) + "\n")

    # ------------------------------------------------------------------ use it
    def fitted_layers(self, rows: list, file_name: str, day: str) -> tuple[list, int]:
        """The explorer's layer rows with the fitted film in place of the fitted layer (and its roughness layer
        on top of it), and the index of the film."""
        r, layer = self.result, self.args["layer"]
        rows = [dict(x) for x in rows]
        spec = r.material.spec() if r.model != "fixed" else rows[layer]["material"]
        if isinstance(spec, dict) and r.model != "fixed":
            spec = dict(spec, name=f"{spec.get('name', 'film')} fit, {file_name}"[:200],
                        source=f"fitted by fringegauge to {file_name} on {day} ({r.model}, "
                               f"{100 * r.rms:.2g} % rms)"[:1000])
        rows[layer] = {"material": spec, "thickness_nm": float(r.thickness_nm)}
        if r.roughness_nm is not None:
            mix = {"kind": "effective-medium", "a": spec, "b": {"kind": "constant", "n": 1.0, "k": 0.0},
                   "fraction_b": 0.5, "rule": "bruggeman", "name": "surface roughness (50 % void)"}
            rows.insert(layer, {"material": mix, "thickness_nm": float(r.roughness_nm)})
            layer += 1
        return rows, layer

    def use(self, file_name: str, day: str) -> bool:
        """Put the fitted film into the film explorer's stack; False (with the sentence shown) when it cannot."""
        s = self.section
        if self.result is None:
            return False
        state = s.ex.state
        try:
            rows, layer = self.fitted_layers(state.layer_rows(), file_name, day)
            self.adopting = True
            try:
                state.set_stack(layers=rows, swept_layer=layer)
                self.adopted = settings_key(state)
            finally:
                self.adopting = False
        except InputError as exc:
            s.fit_msg.show_error(f"The fitted film cannot go into the stack: {exc}")
            return False
        s.ex._sync_widgets()
        name = rows[layer]["material"]
        name = name.get("name", "fitted film") if isinstance(name, dict) else name
        extra = ("" if self.result.spread_nm is None else
                 " The thickness spread is not part of a stack: the explorer shows one thickness.")
        self.use_status.object = (f"<span style='color:#1e6b2e'>✓ The film explorer's layer {layer + 1} is now "
                                  f"<b>{_esc(name)}</b>, {self.result.thickness_nm:.1f} nm"
                                  + (", under its roughness layer" if self.result.roughness_nm is not None else "")
                                  + f": its colours, map and saved stack file use it.{extra}</span>")
        self.use_button.visible = False
        return True
