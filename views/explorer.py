"""The film explorer page: stack editor, viewing controls, spectrum, swatch, colour map and strip.

The page only displays: each number comes from :mod:`views.state`, which calls
``physics``. Work runs off the event loop in a thread pool; inputs that arrive
while a computation runs are coalesced, so only the newest state is computed
(stale work is dropped) and sliders keep answering.
"""

from __future__ import annotations

import asyncio
import io
import json
import logging
import threading
from datetime import date
from functools import partial
from types import SimpleNamespace

import numpy as np
import panel as pn
import param
from panel.io import hold
from bokeh.models import ColumnDataSource, HoverTool, NumeralTickFormatter, Range1d, Span, TapTool
from bokeh.events import Tap
from bokeh.plotting import figure

from physics import InputError, search_materials, list_materials
from physics.materials import page_wording
from physics.color import lamp_label, srgb_to_hex
from physics.stackfile import MAX_FILE_BYTES as MAX_STACK_FILE_BYTES, list_presets, load_stack_file

from . import render
from .pagebuild import in_turns
from .uploads import COMPACT, CappedDropper, UploadReader
from .limits import Limits, interactive_executor, logged_job, post_to_page, served, session_key
from .state import (ANGLE_MAX_DEG, MAP_ANGLE_POINTS, MAP_THICKNESS_POINTS, MAX_LAYERS, THICKNESS_LIMITS_NM,
                    ExplorerState, compute_map, compute_point, compute_strip, default_state, parse_material,
                    parse_number, parse_spd_csv, EDITED_MARK, MAX_SPD_BYTES, BRIGHTNESS_REFERENCES,
                    brightness_scale, rescaled_map, rescaled_strip, compute_tolerance, SPECTRUM_VIEWS,
                    ILLUMINANT_CHOICES, HALOGEN, compute_chart_steps)

#: Slider read-outs as the typed fields write numbers: no trailing zeros (numbro format: 101.5, 100).
SLIDER_FORMAT = "0.[00]"
log = logging.getLogger("fringegauge")

#: Slider values are rounded to this many decimals (a 0.5 nm step sums to 101.00000000000001).
SLIDER_DIGITS = 6
#: Wavelength step of the plotted spectrum (nm); the CSV download uses 1 nm.
SPECTRUM_STEP_NM = 2.0
#: Lowest reflectance on the log view (%): a perfect AR zero would otherwise have no place on a log axis.
LOG_FLOOR_PCT = 1e-4
#: The zoomed view's top is the highest R times this (room above the curve), and at least MIN_ZOOM_PCT.
ZOOM_HEADROOM = 1.15
MIN_ZOOM_PCT = 0.01
#: Most fringe-order marks drawn on the strip; beyond this they would cover it.
MAX_ORDER_MARKS = 40
STRIP_TITLE = "Reference strip at the current angle (dashed: start of each fringe order at 550 nm)"
#: Thickness axes read 1,000 and 20,000 nm rather than 2.000e+4 (numbro format).
THICKNESS_TICKS = "0,0.[0]"
#: Trials' colours shown as small swatches beside a tolerance run's figures.
TOLERANCE_SWATCHES = 24

CAUTIONS = (
    "**Cautions.** Computed colours are estimates, not certified metrology: confirm thickness "
    "with a calibrated instrument before a release decision. The sRGB colours on this screen, a "
    "camera's and your eye's all differ with display, lamp and adaptation. Handle wafers, "
    "solvents and oil samples as your site's safety rules and local codes require."
)

CSS = """
.fg-label { font-size: 12px; color: #444; margin: 0 0 -6px 2px; }
.fg-error { color: #b00020; font-size: 12px; margin: -4px 0 0 2px; }
.fg-swatch-values { font-family: ui-monospace, monospace; font-size: 13px; line-height: 1.5; }
.fg-status { font-size: 12px; color: #555; }
"""


def _rule() -> pn.pane.HTML:
    """A horizontal rule between page sections (plain HTML: a tab built on opening fetches no stylesheet)."""
    return pn.pane.HTML("<hr style='border:0;border-top:1px solid #ddd;margin:6px 0'>", sizing_mode="stretch_width",
                        margin=(4, 5))


def _label(text: str) -> pn.pane.HTML:
    return pn.pane.HTML(f'<div class="fg-label">{text}</div>', margin=(4, 5, 0, 5), stylesheets=[CSS])


#: Sidebar parts sent to the browser in one turn of the event loop when a page opens: a turn of the
#: whole sidebar held the loop up to about a second on a busy 2-core machine (every other page waits).
SIDEBAR_ITEMS_PER_TURN = 4

class TickBox(pn.viewable.Viewer):
    """A checkbox whose words tick it too, with a boolean ``value`` (Bokeh's own Checkbox puts its label
    beside the box, where a click does nothing; a one-option checkbox group wraps both in a label)."""

    value = param.Boolean(default=False, doc="Whether the box is ticked.")

    def __init__(self, label: str, margin=(4, 5), **params):
        super().__init__(**params)
        self._label = label
        self._group = pn.widgets.CheckBoxGroup(options=[label], value=[label] if self.value else [], margin=margin)
        self._group.param.watch(lambda e: setattr(self, "value", bool(e.new)), "value")
        self.param.watch(lambda e: setattr(self._group, "value", [label] if e.new else []), "value")

    def __panel__(self):
        return self._group


class Field:
    """A typed value with its own inline message: the state changes only when the text is valid."""

    def __init__(self, label: str, width: int = 120, placeholder: str = "", css: str = ""):
        self.input = pn.widgets.TextInput(label=label, width=width, placeholder=placeholder, margin=(2, 5),
                                          css_classes=[css] if css else [])
        self.message = pn.pane.HTML("", css_classes=["fg-error"], margin=(0, 5), visible=False, stylesheets=[CSS])

    def show_error(self, text: str | None) -> None:
        """Show ``text`` (plain text: it is escaped, so a message quoting user input cannot add markup), worded
        for the page (:func:`physics.materials.page_wording`)."""
        self.message.object = f'<div class="fg-error" role="alert">{_esc(page_wording(str(text)))}</div>' if text else ""
        self.message.visible = bool(text)

    def set_text(self, text: str) -> None:
        if self.input.value != text:
            self.input.value = text

    def view(self):
        return pn.Column(self.input, self.message, margin=0)


def _fmt(x: float, digits: int = 1) -> str:
    return f"{x:.{digits}f}".rstrip("0").rstrip(".") if digits else f"{x:.0f}"


def field_pair(left, right, message_width: int | None = None, **column):
    """Two fields (or a field and a widget) side by side, their messages below both (a long message beside
    a field would push its neighbour out of the column); ``message_width`` fixes where they wrap and
    ``column`` goes to the enclosing Column."""
    fields = [f for f in (left, right) if isinstance(f, Field)]
    if message_width is not None:
        for f in fields:
            f.message.width = message_width
    widget = lambda f: f.input if isinstance(f, Field) else f  # noqa: E731
    return pn.Column(pn.Row(widget(left), widget(right), margin=0), *(f.message for f in fields),
                     **{"margin": 0, **column})


class FilmExplorer:
    """One session's page."""

    def __init__(self, state: ExplorerState | None = None):
        self.state = state or default_state()
        self._dirty: set[str] = set()
        self._running = False
        self._lock = threading.Lock()
        self._map = None
        self._point = None
        self._strip = None
        self._scale = 1.0
        self.generation = 0          # results applied so far (tests and benchmarks watch it)
        self._syncing = False
        self._dragging = False
        self._build_widgets()
        self._build_plots()
        self._wire()
        self.refresh(("map", "strip", "point"), sync=True)

    # ------------------------------------------------------------------ widgets
    def _build_widgets(self):
        s = self.state
        presets = list_presets()
        self.preset = pn.widgets.Select(label="Preset stack", options={"(choose a preset)": ""} | {n: stem for stem, n in presets},
                                        value=s.preset_name if s.preset_name in dict(presets) else "",
                                        width=300, margin=(2, 5))
        self.file_msg = Field("")
        self.file_reader = UploadReader(self.file_msg, "stack_file")
        self.file_in = CappedDropper(MAX_STACK_FILE_BYTES, self.load_stack_upload, self.file_reader.refuse,
                                     what="The stack file", accepted_filetypes=[".json", "application/json"],
                                     **COMPACT,
                                     css_classes=["fg-stack-file"])
        self.file_out = pn.widgets.FileDownload(callback=self._stack_file_bytes, filename="stack.json",
                                                label="Save stack file (.json)", color="default",
                                                width=300, margin=(2, 5))
        curated = [n for n, _, _ in list_materials()]
        self.ambient = pn.widgets.AutocompleteInput(label="Ambient (light comes from)", options=curated,
                                                    case_sensitive=False, search_strategy="includes",
                                                    restrict=False, min_characters=1, width=300, margin=(2, 5))
        self.ambient_msg = Field("")
        self.substrate = pn.widgets.AutocompleteInput(label="Substrate", options=curated, case_sensitive=False,
                                                      search_strategy="includes", restrict=False,
                                                      min_characters=1, width=300, margin=(2, 5))
        self.substrate_msg = Field("")
        self.plate = TickBox("Thick plate: add its back face (incoherent)")
        self.plate_mm = Field("Plate thickness (mm)", width=140)
        self.layers_box = pn.Column(margin=0)
        self.add_layer = pn.widgets.Button(label="+ Add layer", color="light", width=120, margin=(4, 5))
        self.db_search = pn.widgets.TextInput(label="Find a material (curated names and the whole database)",
                                              placeholder="e.g. nitride, GaN, Johnson", width=300, margin=(2, 5))
        self.db_results = pn.pane.HTML("", width=300, margin=(0, 5), styles={"font-size": "12px"})

        self.swept = pn.widgets.Select(label="Swept layer (map and strip; 1 is the top layer)", options={}, width=300, margin=(2, 5))
        self.thickness_slider = pn.widgets.FloatSlider(label="Thickness of the swept layer (nm)", start=0.0,
                                                       end=s.thickness_max_nm, step=0.5, value=s.thickness_nm,
                                                       format=SLIDER_FORMAT, width=300, margin=(2, 5),
                                                       css_classes=["fg-thickness-slider"])
        self.thickness = Field("Thickness (nm)", width=140, css="fg-thickness-field")
        self.tmax = Field("Map up to (nm)", width=140)
        self.angle_slider = pn.widgets.FloatSlider(label="Viewing angle (° from normal)", start=0.0, end=ANGLE_MAX_DEG,
                                                   step=0.1, value=s.angle_deg, format=SLIDER_FORMAT, width=300,
                                                   margin=(2, 5), css_classes=["fg-angle-slider"])
        self.angle = Field("Angle (°)", width=140, css="fg-angle-field")
        self.polarization = pn.widgets.RadioButtonGroup.from_param(s.param.polarization, label="Polarization",
                                                                   color="default", margin=(2, 5))
        self.polarizer = pn.widgets.Select.from_param(s.param.polarizer, label="Polarizer (in the light)", width=145,
                                                      margin=(2, 5))
        self.polarizer_angle = Field("Polarizer axis (°, 90 = s)", width=145)
        self.analyzer = pn.widgets.Select.from_param(s.param.analyzer, label="Analyzer (in the view)", width=145,
                                                     margin=(2, 5))
        self.analyzer_angle = Field("Analyzer axis (°)", width=145)
        self.illuminant = pn.widgets.Select(label="Illuminant (lamp)", width=300, margin=(2, 5),
                                            options={_lamp_option(c): c for c in sorted(ILLUMINANT_CHOICES,
                                                                                          key=lambda c: c == "custom")},
                                            value=s.illuminant, css_classes=["fg-lamp"])
        self.lamp_k = Field("Halogen colour temperature (K)", width=200, css="fg-lamp-k")
        self.spd_msg = Field("")
        self.spd_reader = UploadReader(self.spd_msg, "lamp_spectrum")
        self.spd_in = CappedDropper(MAX_SPD_BYTES, self.load_lamp_upload, self.spd_reader.refuse,
                                    what="The lamp spectrum file",
                                    accepted_filetypes=[".csv", ".txt", "text/csv", "text/plain"],
                                    **COMPACT,
                                    css_classes=["fg-lamp-file"])
        self.observer = pn.widgets.RadioButtonGroup(label="Observer", options={"2° (CIE 1931)": "2", "10° (CIE 1964)": "10"},
                                                    value=s.observer, margin=(2, 5))
        self.na_slider = pn.widgets.FloatSlider(label="Viewing cone NA (0 = eye at a distance)", start=0.0,
                                                end=s.param.na.bounds[1],      # above 0.95 in immersion only
                                                step=0.01, value=s.na, width=300, margin=(2, 5),
                                                tooltips=False)      # the label shows the value; a bubble hid it
        self.brightness = pn.widgets.RadioButtonGroup(label="Brightness", options={"absolute": "absolute",
                                                      "brightest = white": "normalized"}, value=s.brightness,
                                                      margin=(2, 5))
        self.bright_ref = pn.widgets.Select(label="White is the brightest colour of", width=300, margin=(2, 5),
                                            options={v: k for k, v in BRIGHTNESS_REFERENCES.items()},
                                            value=s.brightness_reference)
        self.norm_lo = Field("… from thickness (nm)", width=140)
        self.norm_hi = Field("to (nm)", width=140)
        self.bright_note = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#555"},
                                        css_classes=["fg-bright-note"])
        self.stack_scale = Field("Whole-stack thickness error (%)", width=200, css="fg-stack-scale")
        self.band_lo = Field("Mean R, T over: from (nm)", width=140)
        self.band_hi = Field("to (nm)", width=140)
        self.tol_pct = Field("Tolerance ± % per layer", width=140)
        self.tol_trials = Field("Trials", width=140)
        self.tol_run = pn.widgets.Button(label="Run tolerance", color="default", width=140, margin=(4, 5),
                                         css_classes=["fg-tol-run"])
        self.tol_out = pn.pane.HTML("", margin=(4, 5), css_classes=["fg-tolerance"], sizing_mode="stretch_width")
        self.spec_view = pn.widgets.RadioButtonGroup(options={v: k for k, v in SPECTRUM_VIEWS.items()},
                                                     value=s.spectrum_view, margin=(2, 5), color="default")
        self.readouts = pn.pane.HTML("", margin=(2, 5), css_classes=["fg-readouts"], sizing_mode="stretch_width")
        self.dl_csv = pn.widgets.FileDownload(callback=self._spectrum_csv, filename="spectrum.csv",
                                              label="Spectrum (.csv)", width=300, margin=(2, 5),
                                              css_classes=["fg-dl-csv"])
        self.dl_map = pn.widgets.FileDownload(callback=self._map_png, filename="colour_map.png",
                                              label="Colour map (.png)", width=300, margin=(2, 5),
                                              css_classes=["fg-dl-map"])
        self.dl_strip = pn.widgets.FileDownload(callback=self._strip_png, filename="reference_chart.png",
                                                label="Reference chart to print (.png)", width=300,
                                                margin=(2, 5), css_classes=["fg-dl-strip"])
        self.status = pn.pane.HTML("", css_classes=["fg-status"], margin=(0, 5))
        self.error = pn.pane.Alert("", alert_type="danger", visible=False, margin=(5, 5))
        self.swatch = pn.pane.HTML("", margin=(5, 5), width=270, height=250, css_classes=["fg-swatch"])
        self.scenario = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#555"})

    def _build_plots(self):
        tools = "pan,wheel_zoom,box_zoom,reset,save"
        self.spec_src = ColumnDataSource(dict(wl=[], R=[], Rs=[], Rp=[], T=[], R_low=[], R_high=[]))
        p = figure(height=250, sizing_mode="stretch_width", tools=tools, title="Spectrum at the current point",
                   x_axis_label="wavelength (nm)", y_axis_label="reflectance, transmittance (%)",
                   x_range=Range1d(380, 780), y_range=Range1d(0, 100))
        self.band_R = p.varea("wl", "R_low", "R_high", source=self.spec_src, fill_color="#1b1b1b", fill_alpha=0.15,
                              visible=False)             # the title explains it when it shows
        self.line_R = p.line("wl", "R", source=self.spec_src, line_width=2.5, color="#1b1b1b", legend_label="R")
        self.line_Rs = p.line("wl", "Rs", source=self.spec_src, line_width=1.2, color="#1f6fb4", line_dash="dashed",
                              legend_label="R s")
        self.line_Rp = p.line("wl", "Rp", source=self.spec_src, line_width=1.2, color="#c0392b", line_dash="dotted",
                              legend_label="R p")
        self.line_T = p.line("wl", "T", source=self.spec_src, line_width=1.5, color="#2e8b57", legend_label="T")
        p.legend.orientation = "horizontal"           # above the plot: inside it covers the curves
        p.add_layout(p.legend[0], "above")
        p.legend.update(location="top_right", margin=0, padding=2, spacing=8, label_height=12, glyph_height=12,
                        border_line_alpha=0)
        p.legend.background_fill_alpha = 0.7
        p.legend.click_policy = "hide"
        p.legend.label_text_font_size = "11px"
        p.add_tools(HoverTool(renderers=[self.line_R], mode="vline",
                              tooltips=[("λ", "@wl{0} nm"), ("R", "@R{0.00} %"), ("R s", "@Rs{0.00} %"),
                                        ("R p", "@Rp{0.00} %"), ("T", "@T{0.00} %")]))
        self.spec_fig = p
        lg = figure(height=250, sizing_mode="stretch_width", tools=tools, title="Reflectance, log scale",
                    x_axis_label="wavelength (nm)", y_axis_label="reflectance (%)", y_axis_type="log",
                    x_range=p.x_range, y_range=Range1d(LOG_FLOOR_PCT, 100), visible=False)
        self.log_src = ColumnDataSource(dict(wl=[], R=[], Rs=[], Rp=[]))
        lg.line("wl", "R", source=self.log_src, line_width=2.5, color="#1b1b1b", legend_label="R")
        self.log_Rs = lg.line("wl", "Rs", source=self.log_src, line_width=1.2, color="#1f6fb4", line_dash="dashed",
                              legend_label="R s")
        self.log_Rp = lg.line("wl", "Rp", source=self.log_src, line_width=1.2, color="#c0392b", line_dash="dotted",
                              legend_label="R p")
        lg.legend.location = "bottom_right"
        lg.legend.click_policy = "hide"
        lg.legend.label_text_font_size = "11px"
        lg.add_tools(HoverTool(mode="vline", renderers=lg.renderers[:1], tooltips=[("λ", "@wl{0} nm"), ("R", "@R{0.000} %")]))
        self.log_fig = lg

        self.map_src = ColumnDataSource(dict(image=[], L=[], a=[], b=[], x=[], y=[], dw=[], dh=[]))
        m = figure(height=330, sizing_mode="stretch_width", tools=tools, title="Colour vs thickness and viewing angle",
                   x_axis_label="thickness of the swept layer (nm)", y_axis_label="viewing angle (°)")
        img = m.image_rgba(image="image", x="x", y="y", dw="dw", dh="dh", source=self.map_src)
        m.add_tools(HoverTool(renderers=[img], tooltips=[("thickness", "$x{0.0} nm"), ("angle", "$y{0.0}°"),
                                                          ("L*, a*, b*", "@L{0.0}, @a{0.0}, @b{0.0}")]))
        m.add_tools(TapTool())
        self.vspan = Span(location=0, dimension="height", line_color="white", line_width=1.5, line_dash="dashed")
        self.hspan = Span(location=0, dimension="width", line_color="white", line_width=1.5, line_dash="dashed")
        m.add_layout(self.vspan)
        m.add_layout(self.hspan)
        m.x_range = Range1d(0, 1000)
        m.y_range = Range1d(0, ANGLE_MAX_DEG)
        m.on_event(Tap, self._on_map_tap)
        m.xaxis.formatter = NumeralTickFormatter(format=THICKNESS_TICKS)
        self.map_fig = m

        self.strip_src = ColumnDataSource(dict(image=[], L=[], a=[], b=[], x=[], y=[], dw=[], dh=[]))
        st = figure(height=150, sizing_mode="stretch_width", tools="xpan,xwheel_zoom,reset,save",
                    title=STRIP_TITLE,
                    x_axis_label="thickness (nm)", y_range=Range1d(0, 1))
        sim = st.image_rgba(image="image", x="x", y="y", dw="dw", dh="dh", source=self.strip_src)
        st.add_tools(HoverTool(renderers=[sim], tooltips=[("thickness", "$x{0.0} nm"),
                                                           ("L*, a*, b*", "@L{0.0}, @a{0.0}, @b{0.0}")]))
        st.yaxis.visible = False
        st.ygrid.visible = False
        st.xaxis.minor_tick_line_color = "black"
        st.xaxis.minor_tick_out = 4
        self.strip_mark = Span(location=0, dimension="height", line_color="black", line_width=2)
        st.add_layout(self.strip_mark)
        self.order_src = ColumnDataSource(dict(x=[], label=[]))
        st.segment(x0="x", x1="x", y0=0, y1=1, source=self.order_src, line_color="white", line_dash="dashed",
                   line_width=1.2)
        st.text(x="x", y=0.98, text="label", source=self.order_src, text_font_size="10px", text_color="white",
                text_baseline="top", x_offset=3)
        st.x_range = Range1d(0, 1000)
        st.xaxis.formatter = NumeralTickFormatter(format=THICKNESS_TICKS)
        self.strip_fig = st

    # ------------------------------------------------------------------ wiring
    def _wire(self):
        s = self.state
        self.preset.param.watch(self._on_preset, "value")
        self.ambient.param.watch(partial(self._on_medium, "ambient"), "value")
        self.substrate.param.watch(partial(self._on_medium, "substrate"), "value")
        self.plate.param.watch(self._on_plate, "value")
        self.plate_mm.input.param.watch(self._on_plate, "value")
        self.add_layer.on_click(self._on_add_layer)
        self.db_search.param.watch(self._on_db_search, "value_input")
        self.swept.param.watch(self._on_swept, "value")
        self.thickness_slider.param.watch(self._on_thickness_slider, "value")
        self.thickness_slider.param.watch(partial(self._on_slider_rest, "thickness"), "value_throttled")
        self.angle_slider.param.watch(partial(self._on_slider_rest, "angle"), "value_throttled")
        self.thickness.input.param.watch(self._on_thickness_text, "value")
        self.tmax.input.param.watch(self._on_tmax, "value")
        self.angle_slider.param.watch(self._on_angle_slider, "value")
        self.angle.input.param.watch(self._on_angle_text, "value")
        self.observer.param.watch(lambda e: setattr(s, "observer", e.new), "value")
        self.illuminant.param.watch(lambda e: None if self._syncing else setattr(s, "illuminant", e.new), "value")
        self.lamp_k.input.param.watch(partial(self._on_number, "lamp_cct_k", self.lamp_k, "Colour temperature", "K"),
                                      "value")
        self.na_slider.param.watch(lambda e: setattr(s, "na", round(float(e.new), 3)), "value")
        self.polarizer_angle.input.param.watch(partial(self._on_number, "polarizer_deg", self.polarizer_angle,
                                                       "Polarizer axis", "°"), "value")
        self.analyzer_angle.input.param.watch(partial(self._on_number, "analyzer_deg", self.analyzer_angle,
                                                      "Analyzer axis", "°"), "value")
        self.brightness.param.watch(lambda e: setattr(s, "brightness", e.new), "value")
        self.spec_view.param.watch(lambda e: None if self._syncing else setattr(s, "spectrum_view", e.new), "value")
        self.stack_scale.input.param.watch(partial(self._on_number, "thickness_scale_pct", self.stack_scale,
                                                   "Whole-stack thickness error", "%"), "value")
        self.band_lo.input.param.watch(partial(self._on_number, "band_min_nm", self.band_lo, "Band start", "nm"), "value")
        self.band_hi.input.param.watch(partial(self._on_number, "band_max_nm", self.band_hi, "Band end", "nm"), "value")
        self.tol_pct.input.param.watch(partial(self._on_number, "tolerance_pct", self.tol_pct, "Tolerance", "%"),
                                       "value")
        self.tol_trials.input.param.watch(partial(self._on_number, "tolerance_trials", self.tol_trials, "Trials", ""),
                                          "value")
        self.tol_run.on_click(self.run_tolerance)
        self.bright_ref.param.watch(lambda e: None if self._syncing else setattr(s, "brightness_reference", e.new),
                                    "value")
        self.norm_lo.input.param.watch(partial(self._on_norm_range, "normalize_min_nm", self.norm_lo), "value")
        self.norm_hi.input.param.watch(partial(self._on_norm_range, "normalize_max_nm", self.norm_hi), "value")
        s.param.watch(self._on_state, list(s.param))
        self._sync_widgets()

    def _sync_widgets(self):
        """Show the state in the widgets (after a preset, a file, a URL or a tap)."""
        s = self.state
        self._syncing = True
        try:
            d = json.loads(s.stack_json)
            self._show_stack_name()
            self.ambient.value = _spec_text(d["ambient"])
            self.substrate.value = _spec_text(d["substrate"])
            self.plate.value = d.get("substrate_thickness_mm") is not None
            self.plate_mm.set_text(_fmt(d["substrate_thickness_mm"], 3) if d.get("substrate_thickness_mm") else "1")
            self.plate_mm.input.visible = self.plate.value
            self._rebuild_layers(s.layer_rows())
            self.swept.options = {f"{i + 1}: {_spec_text(l['material'])}": i for i, l in enumerate(d["layers"])} or {"(no layer)": 0}
            self.swept.value = s.swept_layer
            self.thickness_slider.end = max(s.thickness_max_nm, s.thickness_nm)
            self.thickness_slider.value = s.thickness_nm
            self.thickness.set_text(_fmt(s.thickness_nm, 2))
            self.tmax.set_text(_fmt(s.thickness_max_nm, 1))
            self.angle_slider.value = s.angle_deg
            self.angle.set_text(_fmt(s.angle_deg, 2))
            self.observer.value = s.observer
            self.illuminant.value = s.illuminant
            self.lamp_k.set_text(_fmt(s.lamp_cct_k, 0))
            self.lamp_k.input.visible = s.illuminant == HALOGEN
            self.na_slider.value = s.na
            self.polarizer_angle.set_text(_fmt(s.polarizer_deg, 1))
            self.analyzer_angle.set_text(_fmt(s.analyzer_deg, 1))
            self.brightness.value = s.brightness
            self._show_brightness()
            self.spec_view.value = s.spectrum_view
            self.stack_scale.set_text(_fmt(s.thickness_scale_pct, 2))
            self.band_lo.set_text(_fmt(s.band_min_nm, 1))
            self.band_hi.set_text(_fmt(s.band_max_nm, 1))
            self.tol_pct.set_text(_fmt(s.tolerance_pct, 2))
            self.tol_trials.set_text(str(s.tolerance_trials))
        finally:
            self._syncing = False

    def _show_brightness(self):
        """The normalizing choices only while "brightest = white" is on, and a line saying what is white."""
        s = self.state
        was, self._syncing = self._syncing, True
        try:
            normalized = s.brightness == "normalized"
            self.bright_ref.value = s.brightness_reference
            self.bright_ref.visible = normalized
            strip = normalized and s.brightness_reference == "strip"
            for f in (self.norm_lo, self.norm_hi):
                f.input.visible = strip
            self.norm_lo.set_text(_fmt(s.normalize_min_nm, 2))
            self.norm_hi.set_text(_fmt(min(s.normalize_max_nm, s.thickness_max_nm), 2))
            self.bright_note.object = f"<span class='fg-bright-text'>Brightness: {_esc(s.brightness_text())}.</span>"
        finally:
            self._syncing = was

    def _on_number(self, name, field, label, unit, event):
        """A typed number for state parameter ``name``, checked against its declared bounds."""
        if self._syncing:
            return
        lo, hi = self.state.param[name].bounds

        def apply():
            value = parse_number(event.new, label, lo, hi, unit)
            if isinstance(self.state.param[name], param.Integer):
                if value != int(value):
                    raise InputError(f"{label}: type a whole number from {lo:g} to {hi:g}.")
                value = int(value)
            setattr(self.state, name, value)
        self._guard(field, apply)

    # ------------------------------------------------------------------ tolerance run
    def run_tolerance(self, _event=None):
        """Run the tolerance Monte-Carlo on the stack as shown; off the event loop when served."""
        snap, scale = self._snapshot(), self._scale
        if not served():
            self._show_tolerance(snap, *self._tolerance(snap, scale))
            return
        self.tol_run.disabled = True
        self.tol_out.object = "<i>running the tolerance trials…</i>"
        doc = pn.state.curdoc

        async def job():
            loop = asyncio.get_running_loop()
            try:
                out = await loop.run_in_executor(interactive_executor(), self._tolerance, snap, scale)
            except Exception:                          # never lose the session to one failed run
                log.exception("tolerance run failed")
                out = (None, "The tolerance run failed because of an unexpected error (logged on the server).")
            post_to_page(doc, partial(self._show_tolerance, snap, *out))
        pn.state.execute(job)

    @staticmethod
    def _tolerance(snap, scale):
        try:
            return compute_tolerance(snap, scale), ""
        except InputError as exc:
            return None, str(exc)

    def _show_tolerance(self, snap, result, error=""):
        self.tol_run.disabled = False
        self._tolerance_for = snap.param.values()
        self.tol_out.object = (f'<div class="fg-error" role="alert">{_esc(error)}</div>' if error
                               else _tolerance_html(result, snap))

    def _on_norm_range(self, name, field, event):
        if self._syncing:
            return
        self._guard(field, lambda: setattr(self.state, name, parse_number(event.new, "Normalizing range",
                                                                          *THICKNESS_LIMITS_NM, "nm")))

    def _show_stack_name(self):
        """The preset list names a preset only while it is what is shown (not a link, a file, a library
        entry or an edited preset); the line under it says when the stack was edited since loading."""
        s = self.state
        was, self._syncing = self._syncing, True
        try:
            self.preset.value = s.preset_name if s.preset_name in self.preset.options.values() else ""
            d = json.loads(s.stack_json)
            sc = d.get("scenario", "")
            edited = s.preset_name.endswith(EDITED_MARK)
            self.scenario.object = (f"<i>{_esc(d.get('name', ''))}</i>"
                                    + (" <b>as loaded, since edited</b>" if edited else "")
                                    + (f" — {_esc(sc)}" if sc else ""))
        finally:
            self._syncing = was

    def _rebuild_layers(self, layers):
        rows = []
        self._row_thickness = []
        for i, layer in enumerate(layers):
            mat = pn.widgets.AutocompleteInput(options=[n for n, _, _ in list_materials()], value=_spec_text(layer["material"]),
                                               case_sensitive=False, search_strategy="includes", restrict=False,
                                               min_characters=1, width=120, margin=(2, 2), label=f"Layer {i + 1}")
            thick = pn.widgets.TextInput(value=_fmt(layer["thickness_nm"], 2), width=80, margin=(2, 2), label="nm")
            self._row_thickness.append(thick)
            msg = pn.pane.HTML("", visible=False, margin=(0, 5))
            buttons = []
            for label, action, tip in (("↑", "up", "move up"), ("↓", "down", "move down"),
                                       ("⊕", "dup", "duplicate"), ("✕", "del", "remove")):
                b = pn.widgets.Button(label=label, width=26, height=30, margin=(18, 1, 2, 1), color="light",
                                      description=f"{tip} layer {i + 1}",
                                      disabled=(action == "up" and i == 0) or (action == "down" and i == len(layers) - 1))
                b.on_click(partial(self._on_layer_action, i, action))
                buttons.append(b)
            mat.param.watch(partial(self._on_layer_edit, i, "material", msg), "value")
            thick.param.watch(partial(self._on_layer_edit, i, "thickness_nm", msg), "value")
            rows.append(pn.Column(pn.Row(mat, thick, *buttons, margin=0), msg, margin=0))
        self.layers_box.objects = rows
        self.add_layer.disabled = len(layers) >= MAX_LAYERS

    # ------------------------------------------------------------------ input handlers
    def _guard(self, field, fn):
        """Run a state change; show InputError next to the field and keep the previous state."""
        try:
            fn()
        except InputError as exc:
            field.show_error(str(exc))
            return False
        except Exception:                    # a bug, not bad input: keep the page and the previous state
            log.exception("unexpected error handling an input")
            field.show_error("That input could not be used because of an unexpected error (logged on the "
                             "server); the previous value is kept.")
            return False
        field.show_error(None)
        return True

    def _show_text(self, field, text):
        """Mirror a slider in its typed field without echoing back to the slider."""
        self._syncing = True
        try:
            field.set_text(text)
            field.show_error(None)
        finally:
            self._syncing = False

    def _on_preset(self, event):
        if self._syncing or not event.new:
            return
        self.file_reader.cancel()                  # a stack file still being read would replace the preset
        self.file_msg.show_error(None)
        self.state.load_preset(event.new)
        self._sync_widgets()

    def load_stack_upload(self, name: str, data: bytes) -> bool:
        """Open an uploaded stack file; on a bad file say why and keep the current stack.

        When served, the file is read in a worker thread (:class:`views.uploads.UploadReader`) and this
        returns True once reading has started; otherwise it returns whether the stack was taken.
        """
        before = self._snapshot()
        shown = name or "The stack file"

        def apply(changes):
            if self._guard(self.file_msg, partial(_named, shown, self.state.param.update, **changes)):
                self._sync_widgets()
                return True
            return False
        return self.file_reader.take(shown, data, MAX_STACK_FILE_BYTES,
                                     lambda data, progress: _stack_changes(data, name, before), apply)

    def _on_medium(self, which, event):
        if self._syncing:
            return
        field = self.ambient_msg if which == "ambient" else self.substrate_msg
        self._guard(field, lambda: self.state.set_stack(**{which: parse_material(event.new)}))

    def _on_plate(self, event):
        if self._syncing:
            return
        self.plate_mm.input.visible = self.plate.value

        def apply():
            mm = None
            if self.plate.value:
                mm = parse_number(self.plate_mm.input.value, "Plate thickness", 0.001, 1000.0, "mm")
            self.state.set_stack(substrate_thickness_mm=mm)
        self._guard(self.plate_mm, apply)

    def _on_layer_edit(self, index, key, msg, event):
        if self._syncing:
            return
        layers = self.state.layer_rows()
        try:
            if key == "material":
                layers[index]["material"] = parse_material(event.new)
            else:
                layers[index]["thickness_nm"] = parse_number(event.new, f"Layer {index + 1} thickness",
                                                             *THICKNESS_LIMITS_NM, "nm")
            self.state.set_stack(layers=layers)
        except InputError as exc:
            msg.object = f'<div class="fg-error" role="alert">{_esc(page_wording(str(exc)))}</div>'
            msg.visible = True
            return
        msg.visible = False
        if key == "material" or index == self.state.swept_layer:
            self._sync_widgets()

    def _on_layer_action(self, index, action, _event=None):
        layers = self.state.layer_rows()
        swept = self.state.swept_layer
        if action == "up" and index > 0:
            layers[index - 1], layers[index] = layers[index], layers[index - 1]
            swept = {index: index - 1, index - 1: index}.get(swept, swept)
        elif action == "down" and index < len(layers) - 1:
            layers[index + 1], layers[index] = layers[index], layers[index + 1]
            swept = {index: index + 1, index + 1: index}.get(swept, swept)
        elif action == "dup" and len(layers) < MAX_LAYERS:
            layers.insert(index + 1, dict(layers[index]))
            swept = swept + 1 if swept > index else swept
        elif action == "del":
            layers.pop(index)
            swept = swept - 1 if swept > index else min(swept, max(len(layers) - 1, 0))
        else:
            return
        if self._guard(self.file_msg, lambda: self.state.set_stack(layers=layers, swept_layer=swept)):
            self._sync_widgets()

    def _on_add_layer(self, _event=None):
        layers = self.state.layer_rows()
        layers.append({"material": "SiO2", "thickness_nm": 100.0})
        if self._guard(self.file_msg, lambda: self.state.set_stack(layers=layers)):      # the swept layer stays
            self._sync_widgets()

    def _on_db_search(self, event):
        text = (event.new or "").strip()
        if len(text) < 2:
            self.db_results.object = ""
            return
        rows = search_materials(text, limit=12)
        if not rows:
            self.db_results.object = "<i>No match.</i>"
            return
        items = "".join(f"<li><code>{_esc(spec)}</code> {_esc(desc)}</li>" for spec, desc in rows)
        self.db_results.object = (f"<ul style='padding-left:16px;margin:2px 0'>{items}</ul>"
                                  "<span>Type a name or a <code>shelf/book/page</code> into a material field.</span>")

    def _on_swept(self, event):
        if self._syncing or event.new is None:
            return
        if self._guard(self.file_msg, lambda: self.state.set_stack(swept_layer=int(event.new))):
            self._sync_widgets()

    def _on_thickness_slider(self, event):
        if self._syncing:
            return
        self._dragging = served()                # while served, the typed fields follow at release
        try:
            self.state.thickness_nm = round(float(event.new), SLIDER_DIGITS)
        finally:
            self._dragging = False
        if not served():
            self._echo_slider("thickness")

    def _on_slider_rest(self, which: str, event):
        """A slider came to rest. The browser sends its resting value beside the running one, and the
        two may be handled in either order: apply the resting value first (a no-op when the running
        value already did) so the echo never shows the step before last."""
        if self._syncing or event.new is None:
            return
        value = round(float(event.new), SLIDER_DIGITS)
        if which == "thickness" and value != self.state.thickness_nm:
            self._on_thickness_slider(SimpleNamespace(new=value))
        elif which == "angle" and value != self.state.angle_deg:
            self._on_angle_slider(SimpleNamespace(new=value))
        self._echo_slider(which)

    def _echo_slider(self, which: str, *_):
        """Mirror a slider into its typed field (and the swept layer's row). While served this runs when
        a drag ends, not at every step: each echo is work for the server's one event loop."""
        if which == "thickness":
            self._show_text(self.thickness, _fmt(self.state.thickness_nm, 2))
            self._show_row_thickness()
        else:
            self._show_text(self.angle, _fmt(self.state.angle_deg, 2))

    def _show_row_thickness(self):
        if self.state.swept_layer < len(getattr(self, "_row_thickness", [])):
            self._syncing, was = True, self._syncing
            try:
                self._row_thickness[self.state.swept_layer].value = _fmt(self.state.thickness_nm, 2)
            finally:
                self._syncing = was

    def _on_thickness_text(self, event):
        if self._syncing:
            return

        def apply():
            value = parse_number(event.new, "Thickness", *THICKNESS_LIMITS_NM, "nm")
            self.state.thickness_nm = value
            if value > self.thickness_slider.end:
                self.state.thickness_max_nm = value
        if self._guard(self.thickness, apply):
            self._sync_widgets()

    def _on_tmax(self, event):
        if self._syncing:
            return

        def apply():
            self.state.thickness_max_nm = parse_number(event.new, "Map range", 10.0, THICKNESS_LIMITS_NM[1], "nm")
        if self._guard(self.tmax, apply):
            self._sync_widgets()

    def _on_angle_slider(self, event):
        if self._syncing:
            return
        self.state.angle_deg = round(float(event.new), SLIDER_DIGITS)
        if not served():
            self._echo_slider("angle")

    def _on_angle_text(self, event):
        if self._syncing:
            return

        def apply():
            self.state.angle_deg = parse_number(event.new, "Angle", 0.0, ANGLE_MAX_DEG, "°")
        if self._guard(self.angle, apply):
            self._sync_widgets()

    def load_lamp_upload(self, name: str, data: bytes) -> bool:
        """Take an uploaded lamp spectrum as the 'custom' illuminant; on a bad file say why and keep the lamp.

        When served, the file is read in a worker thread (:class:`views.uploads.UploadReader`) and this
        returns True once reading has started; otherwise it returns whether the lamp was taken.
        """
        name = name or "The lamp spectrum file"
        return self.spd_reader.take(name, data, MAX_SPD_BYTES, parse_spd_csv,
                                    lambda spd: self._guard(self.spd_msg, partial(_named, name, self.state.set_spd,
                                                                                  *spd)))

    def _on_map_tap(self, event):
        if event.x is None or event.y is None:
            return
        s = self.state
        s.param.update(thickness_nm=float(np.clip(event.x, 0, s.thickness_max_nm)),
                       angle_deg=float(np.clip(event.y, 0, ANGLE_MAX_DEG)))
        self._sync_widgets()

    def _on_state(self, *events):
        names = {e.name for e in events}
        if "preset_name" in names:
            self._show_stack_name()
        if "thickness_nm" in names and not self._dragging:
            self._show_row_thickness()
        kinds = {"point"}
        if names & {"stack_json", "swept_layer", "thickness_max_nm", "polarization", "illuminant", "spd_json",
                    "observer", "na", "brightness", "polarizer", "polarizer_deg", "analyzer", "analyzer_deg"}:
            kinds |= {"map", "strip"}
        if names & {"angle_deg", "brightness_reference", "normalize_min_nm", "normalize_max_nm"}:
            kinds.add("strip")
        if names & {"angle_deg", "brightness", "brightness_reference", "normalize_min_nm", "normalize_max_nm",
                    "thickness_max_nm"}:
            self._show_brightness()
        if "illuminant" in names:
            self._syncing, was = True, self._syncing
            try:
                self.illuminant.value = self.state.illuminant
                self.lamp_k.input.visible = self.state.illuminant == HALOGEN
            finally:
                self._syncing = was
        if names & {"stack_json", "swept_layer", "thickness_scale_pct", "lamp_cct_k"}:
            kinds |= {"map", "strip"}
        if getattr(self, "_tolerance_for", None) and self.tol_out.object and "fg-tol-stale" not in self.tol_out.object:
            self.tol_out.object += ("<div class='fg-tol-stale' style='color:#8a5a00;font-size:12px'>The view has "
                                    "changed since this run: run it again.</div>")
        self.refresh(kinds)

    # ------------------------------------------------------------------ computing
    def refresh(self, kinds, sync: bool = False):
        """Recompute ``kinds`` ("map", "strip", "point"); off the event loop when served."""
        with self._lock:
            self._dirty |= set(kinds)
            if self._running and not sync:
                return
            self._running = True
        if sync or not served():
            try:
                while self._dirty:
                    with self._lock:
                        todo, self._dirty = self._dirty, set()
                    self._apply(self._compute(self._snapshot(), todo, self._scale, session_key(self),
                                              (self._map, self._strip)))
            finally:
                self._running = False
            return
        if set(kinds) - {"point"}:                 # a spectrum alone takes a few ms: no status flicker
            self.status.object = "computing…"
        pn.state.execute(self._worker)

    async def _worker(self):
        loop = asyncio.get_running_loop()
        doc = pn.state.curdoc
        session = session_key(self)
        try:
            while True:
                with self._lock:
                    todo, self._dirty = self._dirty, set()
                    if not todo or not served(doc):                   # done, or the page has gone
                        self._running = False
                        return
                snap = self._snapshot()
                result = await loop.run_in_executor(interactive_executor(), self._compute, snap, todo, self._scale,
                                                    session, (self._map, self._strip))
                post_to_page(doc, partial(self._apply, result))
        except Exception:  # never lose the session to one failed computation
            log.exception("film explorer computation failed")
            with self._lock:
                self._running = False

    def _snapshot(self) -> ExplorerState:
        return ExplorerState(**{k: v for k, v in self.state.param.values().items() if k != "name"})

    @staticmethod
    def _compute(s: ExplorerState, kinds, scale, session: str = "", current=(None, None)):
        """Results for ``kinds``; ``current`` = (map, strip) on the page, recoloured when the brightness
        factor changes (with "brightest = white" on the strip, a new angle rescales the map)."""
        out = {"kinds": kinds, "state": s, "error": None}
        try:
            if not s.stack.layers:               # the bare substrate: a colour and a spectrum, nothing to sweep
                out.update(bare=True, scale=1.0,
                           point=compute_point(s, 1.0, np.arange(*_spectrum_range(s), SPECTRUM_STEP_NM)))
                return out
            cm, strip = current
            if "map" in kinds:
                with logged_job("colour_map", MAP_THICKNESS_POINTS * MAP_ANGLE_POINTS, session):
                    cm = compute_map(s, Limits.from_env().max_grid_points)
            if "strip" in kinds or strip is None or strip.xyz is None:
                strip = compute_strip(s, 1.0)
                kinds = set(kinds) | {"strip"}
            new_scale = brightness_scale(s, cm, strip)
            if cm is not None and ("map" in kinds or cm.scale != new_scale):
                out["map"] = rescaled_map(s, cm, new_scale)
            if "strip" in kinds or new_scale != scale:
                out["strip"] = rescaled_strip(s, strip, new_scale)
            scale = new_scale
            out["scale"] = scale
            if "point" in kinds:
                out["point"] = compute_point(s, scale, np.arange(*_spectrum_range(s), SPECTRUM_STEP_NM))
        except InputError as exc:
            out["error"] = str(exc)
        return out

    def _apply(self, result):
        """Push computed results into the plots (runs with the document lock when served).

        All the changes go to the browser as one message (``hold``): a slider move changes about
        ten model properties, and each message costs the server a walk over the whole page.
        """
        with hold():
            self._apply_held(result)

    def _apply_held(self, result):
        self.generation += 1
        busy = "computing…" if self._dirty else ""
        if self.status.object != busy:
            self.status.object = busy
        if result["error"]:
            self.error.alert_type = "danger"
            self.error.object = result["error"]
            self.error.visible = True
            return
        s = result["state"]
        self._scale = result["scale"]
        if result.get("bare"):
            self.error.alert_type = "warning"
            self.error.object = ("The stack has no layer: the swatch and spectrum show the bare substrate. "
                                 "Add a layer to see its colour against thickness and angle.")
            self.error.visible = True
            self._clear_map_and_strip()
        else:
            self.error.visible = False
        for mark in (self.vspan, self.hspan, self.strip_mark):     # nothing is swept without a layer
            mark.visible = not result.get("bare")
        if "map" in result:
            self._map = cm = result["map"]
            rgb = np.transpose(cm.rgb, (1, 0, 2))          # rows = angle
            lab = np.transpose(cm.lab, (1, 0, 2))
            d0, d1 = cm.thickness_nm[0], cm.thickness_nm[-1]
            a0, a1 = cm.angle_deg[0], cm.angle_deg[-1]
            dd = (d1 - d0) / max(cm.thickness_nm.size - 1, 1)
            da = (a1 - a0) / max(cm.angle_deg.size - 1, 1)
            self.map_src.data = dict(image=[_rgba(rgb)], L=[lab[..., 0]], a=[lab[..., 1]], b=[lab[..., 2]],
                                     x=[d0 - dd / 2], y=[a0 - da / 2], dw=[d1 - d0 + dd], dh=[a1 - a0 + da])
            self.map_fig.x_range.update(start=d0, end=d1)
            self.map_fig.y_range.update(start=a0, end=a1)
            self.map_fig.title.text = (f"Colour vs thickness of layer {s.swept_layer + 1} and viewing angle — "
                                       f"{s.lamp_short()}, {s.observer}° observer, {s.polarization_text()}"
                                       + (f", cone NA {s.na:g}" if s.na else "")
                                       + (f" — {s.brightness_text()}" if s.brightness == "normalized" else ""))
        if "strip" in result:
            self._strip = st = result["strip"]
            d = st.thickness_nm
            dd = (d[-1] - d[0]) / max(d.size - 1, 1)
            self.strip_src.data = dict(image=[_rgba(st.rgb[None, :, :])], L=[st.lab[None, :, 0]],
                                       a=[st.lab[None, :, 1]], b=[st.lab[None, :, 2]], x=[d[0] - dd / 2], y=[0],
                                       dw=[d[-1] - d[0] + dd], dh=[1])
            dense = len(st.order_marks) > MAX_ORDER_MARKS
            self.order_src.data = (dict(x=[], label=[]) if dense else
                                   dict(x=[float(d[0])] + list(st.order_marks),
                                        label=[f"order {i + 1}" for i in range(len(st.order_marks) + 1)]))
            self.strip_fig.title.text = (STRIP_TITLE if not dense else
                                         f"Reference strip at the current angle ({len(st.order_marks) + 1} fringe "
                                         "orders: too many to mark)")
            self.strip_fig.x_range.update(start=d[0], end=d[-1])
        if "point" in result:
            self._point = pt = result["point"]
            T = pt.T * 100 if pt.T is not None else np.full_like(pt.R, np.nan)
            averaged = pt.R_low is not None
            low = pt.R_low * 100 if averaged else np.full_like(pt.R, np.nan)
            high = pt.R_high * 100 if averaged else np.full_like(pt.R, np.nan)
            self.spec_src.data = dict(wl=pt.wavelength_nm, R=pt.R * 100, Rs=pt.Rs * 100, Rp=pt.Rp * 100, T=T,
                                      R_low=low, R_high=high)
            self.line_T.visible = pt.T is not None
            self.line_Rs.visible = self.line_Rp.visible = s.polarization == "unpolarized"
            self.band_R.visible = averaged
            self._show_spectrum_view(pt, s)
            self.readouts.object = _readouts_html(pt, s)
            self.spec_fig.title.text = ((f"Spectrum of the bare substrate at {s.angle_deg:.1f}°" if result.get("bare")
                                         else f"Spectrum at {s.thickness_nm:.1f} nm, {s.angle_deg:.1f}°")
                                        + (f", cone NA {s.na:g}" if s.na else "")
                                        + (f" — fringes {pt.fringe_spacing_nm:.2g} nm apart at 550 nm: "
                                           f"{SPECTRUM_STEP_NM:g} nm averages, grey = fringe range" if averaged else ""))
            self.swatch.object = _swatch_html(pt, s, bare=bool(result.get("bare")))
            self.vspan.location = s.thickness_nm
            self.hspan.location = s.angle_deg
            self.strip_mark.location = s.thickness_nm

    def _show_spectrum_view(self, pt, s: ExplorerState):
        """Linear 0-100 % (R and T), R alone on a range fitted to it, or R on a log axis."""
        view = s.spectrum_view
        self.spec_fig.visible = view != "log"
        self.log_fig.visible = view == "log"
        lo, hi = float(pt.wavelength_nm[0]), float(pt.wavelength_nm[-1])
        if hi > lo:
            self.spec_fig.x_range.update(start=lo, end=hi)
        top = pt.R_high if pt.R_low is not None else pt.R
        if view == "zoom":
            self.line_T.visible = False
            band = (min(s.band_min_nm, s.band_max_nm), max(s.band_min_nm, s.band_max_nm))
            visible = (pt.wavelength_nm >= band[0]) & (pt.wavelength_nm <= band[1])
            seen = top[visible] if visible.any() else top
            peak = float(np.nanmax(seen)) * 100 if seen.size else 1.0
            self.spec_fig.y_range.update(start=0.0, end=max(peak * ZOOM_HEADROOM, MIN_ZOOM_PCT))
            self.spec_fig.yaxis.axis_label = f"R (%), fitted to {band[0]:g}–{band[1]:g} nm"
        else:
            self.spec_fig.y_range.update(start=0.0, end=100.0)
            self.spec_fig.yaxis.axis_label = "reflectance, transmittance (%)"
        if view == "log":
            floor = lambda a: np.maximum(a * 100, LOG_FLOOR_PCT)      # noqa: E731
            self.log_src.data = dict(wl=pt.wavelength_nm, R=floor(pt.R), Rs=floor(pt.Rs), Rp=floor(pt.Rp))
            self.log_Rs.visible = self.log_Rp.visible = s.polarization == "unpolarized"
            vals = floor(pt.R)
            self.log_fig.y_range.update(start=max(float(vals.min()) / 2, LOG_FLOOR_PCT),
                                        end=min(float(vals.max()) * 2, 100.0) if vals.size else 100.0)
            self.log_fig.title.text = self.spec_fig.title.text + " — log scale"

    def _clear_map_and_strip(self):
        """Nothing to sweep: the map and strip show nothing rather than the last stack's colours."""
        self._map = self._strip = None
        self.map_src.data = {k: [] for k in self.map_src.data}
        self.strip_src.data = {k: [] for k in self.strip_src.data}
        self.order_src.data = {k: [] for k in self.order_src.data}
        self.map_fig.title.text = "Colour vs thickness and viewing angle: add a layer to sweep"

    # ------------------------------------------------------------------ downloads
    def _stack_file_bytes(self):
        return io.StringIO(self.state.file_text())

    def _spectrum_csv(self):
        s = self._snapshot()
        pt = compute_point(s, self._scale, np.arange(*_spectrum_range(s), 1.0))
        lines = [
            "# fringegauge spectrum (computed; not certified metrology)",
            f"# date: {date.today().isoformat()}",
            f"# stack (top to bottom): {_stack_text(s)}",
            f"# swept layer {s.swept_layer + 1} (from the top) thickness_nm: {s.thickness_nm:g}; angle_deg: {s.angle_deg:g}; "
            f"cone NA: {s.na:g}; polarization: {s.polarization_text()}",
            f"# colour: illuminant {s.lamp_text()}, observer {s.observer} deg: sRGB {pt.hex}, "
            f"L*a*b* {pt.lab[0]:.2f} {pt.lab[1]:.2f} {pt.lab[2]:.2f}",
        ]
        if pt.R_low is not None:
            lines.append(f"# fringes every {pt.fringe_spacing_nm:.3g} nm at 550 nm are finer than the 1 nm rows: each "
                         "row is the average over 1 nm centred on its wavelength")
        lines.append(f"# luminous R (ISO 13666, D65 x V): {pt.luminous_R * 100:.4g} %; luminous T: "
                     f"{pt.luminous_T * 100:.4g} %; mean over {s.band_min_nm:g}-{s.band_max_nm:g} nm: R "
                     f"{pt.band_R * 100:.4g} %, T {pt.band_T * 100:.4g} %")
        if s.thickness_scale_pct:
            lines.append(f"# every layer at {s.thickness_factor * 100:g} % of its nominal thickness")
        if pt.T is None:
            lines.append("# T_percent is empty: the substrate absorbs, so no light comes through the stack")
        lines.append("wavelength_nm,R_percent,R_s_percent,R_p_percent,T_percent")
        T = pt.T if pt.T is not None else np.full_like(pt.R, np.nan)
        for row in zip(pt.wavelength_nm, pt.R * 100, pt.Rs * 100, pt.Rp * 100, T * 100):
            lines.append(",".join("" if not np.isfinite(v) else f"{v:.6g}" for v in row))
        return io.StringIO("\n".join(lines) + "\n")

    def _map_png(self):
        s = self._snapshot()
        cm = self._map if self._map is not None else compute_map(s)
        png = render.map_png(np.transpose(cm.rgb, (1, 0, 2)), cm.thickness_nm, cm.angle_deg,
                             x_label="thickness of the swept layer (nm)", y_label="viewing angle (°)",
                             title=f"Film colour: {_stack_text(s, swept_range=True)}", subtitle=_light_text(s),
                             crosshair=(s.thickness_nm, s.angle_deg), footer=_footer())
        return io.BytesIO(png)

    def _strip_png(self):
        s = self._snapshot()
        st = compute_strip(s, self._scale)
        marks = [(float(st.thickness_nm[0]), "order 1")] + [(float(x), f"order {i + 2}")
                                                             for i, x in enumerate(st.order_marks)]
        steps = compute_chart_steps(s, self._scale)
        png = render.strip_png(st.rgb, st.thickness_nm, title=f"Reference colours: {_stack_text(s, swept_range=True)}",
                               subtitle=(f"layer {s.swept_layer + 1} swept; viewing angle {s.angle_deg:g}°; "
                                         "marks: start of each fringe order at 550 nm; " + _light_text(s)),
                               order_marks=marks, footer=_footer(),
                               steps=[(t, h, tuple(l)) for t, h, l in zip(steps.thickness_nm, steps.hex, steps.lab)],
                               steps_caption=(f"Chart steps: one every {steps.step_nm:g} nm of layer "
                                              f"{s.swept_layer + 1}, with their sRGB hex and CIELAB (L*, a*, b*) under "
                                              f"{s.lamp_text()}, CIE {s.observer}° observer; the printed colour "
                                              "depends on the printer and paper"))
        return io.BytesIO(png)

    # ------------------------------------------------------------------ layout
    def panel(self, extra_tabs=(), without_stack=(), on_tab=None):
        """The page: sidebar and, as tabs, the explorer's views and any ``extra_tabs`` (title, layout).

        Tabs named in ``without_stack`` do not use the stack: the stack sidebar is hidden there.
        ``on_tab(title)`` is called each time a tab is opened. Tabs are built in the browser when
        first opened (``dynamic``), which keeps every message of a slider move small.
        """
        section = lambda title: pn.pane.HTML(f"<h3 style='margin:10px 0 2px 5px;font-size:15px'>{title}</h3>")  # noqa: E731
        heading = pn.pane.HTML("<h2 style='margin:4px 5px;font-size:20px'>fringegauge</h2>" + _login_line())
        sidebar_items = [
            pn.Card(pn.pane.Markdown(CAUTIONS, styles={"font-size": "12px"}), title="Cautions", collapsed=True,
                    width=310, margin=(2, 5)),
            section("Stack"),
            self.preset, _label("Open a stack file"), self.file_in, self.file_msg.message, self.file_out,
            self.scenario,
            self.ambient, self.ambient_msg.message,
            _label("Layers, top (next to the ambient) to bottom: material, thickness (nm)"),
            self.layers_box, self.add_layer,
            self.substrate, self.substrate_msg.message, self.plate, self.plate_mm.view(),
            self.db_search, self.db_results,
            section("Swept layer"),
            self.swept, self.thickness_slider, pn.Row(self.thickness.view(), self.tmax.view(), margin=0),
            section("Viewing and light"),
            self.angle_slider, self.angle.view(), _label("Polarization (each ray's own s or p)"), self.polarization,
            pn.Row(self.polarizer, self.analyzer, margin=0),
            pn.Row(self.polarizer_angle.view(), self.analyzer_angle.view(), margin=0),
            self.illuminant, self.lamp_k.view(), _label("Lamp spectrum (CSV: nm, power) → illuminant 'custom'"), self.spd_in,
            self.spd_msg.message, _label("Observer"), self.observer, self.na_slider, _label("Brightness"),
            self.brightness, self.bright_ref, field_pair(self.norm_lo, self.norm_hi, message_width=290),
            self.bright_note,
            section("Coating checks"),
            self.stack_scale.view(), field_pair(self.band_lo, self.band_hi, message_width=290),
            field_pair(self.tol_pct, self.tol_trials, message_width=290), self.tol_run,
            section("Downloads"),
            self.dl_csv, self.dl_map, self.dl_strip,
        ]
        sidebar = pn.Column(heading, width=330, scroll=True, sizing_mode="stretch_height", margin=(0, 5),
                            styles={"background": "#f6f6f4", "border-right": "1px solid #ddd"})
        views = [
            pn.Row(self.swatch, pn.Column(pn.pane.Bokeh(self.spec_fig, sizing_mode="stretch_width"),
                                          pn.pane.Bokeh(self.log_fig, sizing_mode="stretch_width"),
                                          pn.Row(self.spec_view, self.readouts, margin=0, sizing_mode="stretch_width"),
                                          sizing_mode="stretch_width", margin=0),
                   sizing_mode="stretch_width"),
            self.tol_out,
            pn.pane.HTML("Tap the map to set thickness and angle.", margin=(4, 5, 0, 5),
                         styles={"font-size": "12px", "color": "#555"}),
            pn.pane.Bokeh(self.map_fig, sizing_mode="stretch_width"),
            pn.pane.Bokeh(self.strip_fig, sizing_mode="stretch_width"),
            pn.pane.Markdown(CAUTIONS.split("**Cautions.** ")[1],
                             styles={"font-size": "11px", "color": "#555"}),
        ]
        main = pn.Column(pn.Row(self.status, self.error, margin=0), sizing_mode="stretch_both", scroll=True,
                         margin=(0, 10))
        if served():
            # The server builds pages on the event loop that every page shares: the page goes out as a frame,
            # and its sidebar and its plots follow in turns of their own once the browser has it, so no turn
            # holds the loop for long (see views/pagebuild.py).
            sidebar.append(pn.pane.HTML("Opening the page…", margin=(4, 8)))
            parts = [sidebar_items[i:i + SIDEBAR_ITEMS_PER_TURN]
                     for i in range(0, len(sidebar_items), SIDEBAR_ITEMS_PER_TURN)]
            in_turns(lambda: setattr(sidebar, "objects", [heading, *parts[0]]),
                     *(partial(sidebar.extend, part) for part in parts[1:]),
                     *(partial(main.append, view) for view in views))
        else:
            sidebar.extend(sidebar_items)
            main.extend(views)
        if extra_tabs:
            main = pn.Tabs(("Film explorer", main), *extra_tabs, sizing_mode="stretch_both", dynamic=True)
            titles = ["Film explorer", *(t for t, _ in extra_tabs)]

            def opened(event):
                sidebar.visible = titles[event.new] not in without_stack
                if on_tab is not None:
                    on_tab(titles[event.new])
            main.param.watch(opened, "active")
        return pn.Row(sidebar, main, sizing_mode="stretch_both", stylesheets=[CSS])


# ---------------------------------------------------------------------- helpers

def _login_line() -> str:
    """Under a login: who is logged in, and a link to log out (which closes this login's pages)."""
    from .library import auth_mode, login_name

    user = login_name() if served() and auth_mode() != "off" else None
    if not user:
        return ""
    return (f"<div style='margin:0 5px 4px;font-size:12px;color:#555'>Logged in as {_esc(user)} · "
            "<a href='/logout'>log out</a></div>")


def _named(name: str, fn, *args, **kwargs):
    """``fn(*args, **kwargs)``, the file's name put before the message of an InputError it raises."""
    try:
        return fn(*args, **kwargs)
    except InputError as exc:
        raise InputError(f"{name}: {exc}") from None


def _stack_changes(data: bytes, name: str, before: ExplorerState) -> dict:
    """What opening the stack file ``data`` changes in a state that was ``before`` (parameter -> value).

    The slow part of a stack upload, run off the event loop: the file is parsed and checked, loaded
    into ``before`` (a copy of the page's state) and the stored stack read back once, which leaves it in
    :mod:`views.state`'s cache; applying the changes on the page then costs almost nothing.
    """
    sf = load_stack_file(data)
    old = before.param.values()
    before.load(sf, name or sf.name)
    try:
        before.stack_file()
    except InputError as exc:
        raise InputError(f"The stack in it cannot be kept as the page stores it ({exc}); use shorter material "
                         "tables.") from None
    return {k: v for k, v in before.param.values().items() if k != "name" and v != old[k]}


def _spectrum_range(s: ExplorerState):
    lo, hi = s.stack.wavelength_range_nm()
    return max(300.0, np.ceil(lo)), min(1000.0, np.floor(hi)) + 1.0


def _rgba(rgb: np.ndarray) -> np.ndarray:
    """(..., 3) floats 0..1 → uint32 RGBA image as Bokeh's image_rgba wants it."""
    u8 = np.clip(np.round(rgb * 255), 0, 255).astype(np.uint8)
    out = np.empty(rgb.shape[:-1] + (4,), dtype=np.uint8)
    out[..., :3] = u8
    out[..., 3] = 255
    return out.view(np.uint32).reshape(rgb.shape[:-1])


def _spec_text(spec) -> str:
    if isinstance(spec, str):
        return spec
    if isinstance(spec, dict) and spec.get("kind") == "constant":
        n, k = spec.get("n"), spec.get("k", 0.0)
        return f"{n:g}" if not k else f"{n:g}+{k:g}i"
    if isinstance(spec, dict):
        return spec.get("name", spec.get("kind", "custom"))
    return str(spec)


def _stack_text(s: ExplorerState, swept_range: bool = False) -> str:
    """'air / SiO2 100 nm / Si'; with ``swept_range`` the swept layer reads 'SiO2 0–1000 nm swept' (a chart
    over thickness)."""
    d = json.loads(s.stack_json)
    parts = [_spec_text(d["ambient"])]
    for i, l in enumerate(d["layers"]):
        if i == s.swept_layer and swept_range:
            parts.append(f"{_spec_text(l['material'])} 0–{s.thickness_max_nm:g} nm swept")
            continue
        t = s.thickness_nm if i == s.swept_layer else l["thickness_nm"]
        parts.append(f"{_spec_text(l['material'])} {t:g} nm")
    sub = _spec_text(d["substrate"])
    if d.get("substrate_thickness_mm"):
        sub += f" ({d['substrate_thickness_mm']:g} mm plate)"
    parts.append(sub)
    return " / ".join(parts)


def _light_text(s: ExplorerState) -> str:
    return (f"illuminant {s.lamp_text()}, CIE {s.observer}° observer, {s.polarization_text()}"
            + (f", cone NA {s.na:g}" if s.na else "") + (f", {s.brightness_text()}" if s.brightness == "normalized" else ""))


def _footer() -> str:
    return (f"fringegauge {date.today().isoformat()} · computed colours, not certified metrology · "
            "screen, camera and eye colours differ")


def _esc(text: str) -> str:
    return (str(text).replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;"))


#: Below this lightness L* the swatch is nearly black and its hue hard to judge (recalled from memory:
#: CIELAB L* of about 10 is a very dark grey on a typical office display).
DARK_SWATCH_L = 10.0


def _dark_hint(pt, s: ExplorerState) -> str:
    if pt.lab[0] >= DARK_SWATCH_L:
        return ""
    if s.brightness == "normalized":
        return ("<div style='color:#555;font-size:12px'>Still dark: brighter colours lie in the reference; narrow "
                "the thickness range under Brightness to a few % around this thickness to see its hue.</div>")
    return ("<div style='color:#555;font-size:12px'>Little light comes back (an anti-reflection stack?): choose "
            "“brightest = white” under Brightness to see its hue.</div>")


def _swatch_headline(pt, s: ExplorerState, bare: bool) -> str:
    """What the swatch shows: the swept layer's thickness, the angle, the fringe order and which layer."""
    if bare:
        return f"<b>bare substrate</b> at <b>{s.angle_deg:.1f}°</b>"
    layers = json.loads(s.stack_json)["layers"]             # not bare: the swept layer exists
    line = (f"<b>{s.thickness_nm:.1f} nm</b> at <b>{s.angle_deg:.1f}°</b>, fringe order {pt.order}<br>"
            f"layer {s.swept_layer + 1} ({_esc(_spec_text(layers[s.swept_layer]['material']))})"
            + (f" of {len(layers)}" if len(layers) > 1 else ""))
    if s.thickness_nm > s.thickness_max_nm:
        line += (f"<br><span style='color:#8a5a00'>beyond the map, which ends at {s.thickness_max_nm:g} nm: "
                 "raise “Map up to” to see it there</span>")
    return line


def _swatch_html(pt, s: ExplorerState, bare: bool = False) -> str:
    L, a, b = pt.lab
    gamut = ("<div style='color:#b00020'>outside the sRGB gamut: the screen shows the nearest colour</div>"
             if pt.out_of_gamut else "<div style='color:#2e7d32'>inside the sRGB gamut</div>")
    return f"""
<div role="img" aria-label="colour swatch {pt.hex}" data-hex="{pt.hex}"
     style="width:240px;height:110px;border:1px solid #888;border-radius:4px;background:{pt.hex}"></div>
<div class="fg-swatch-values" style="margin-top:6px">
{_swatch_headline(pt, s, bare)}<br>
sRGB <span class="fg-hex">{pt.hex}</span><br>
L*a*b* {L:.1f}, {a:.1f}, {b:.1f}<br>
xy {pt.xy[0]:.4f}, {pt.xy[1]:.4f}<br>
{gamut}
{_dark_hint(pt, s)}<div style="color:#666;font-size:11px">{_esc(s.lamp_text())}, {s.observer}° observer; {_esc(s.brightness_text())}.
Not certified metrology.</div>
</div>"""


def _pct(x: float, digits: int = 3) -> str:
    return "—" if not np.isfinite(x) else f"{x * 100:.{digits}g} %"


def _readouts_html(pt, s: ExplorerState) -> str:
    """Luminous R and T (ISO 13666: D65 × V(λ)) and the band means, on one line under the spectrum."""
    band = (f"mean over {s.band_min_nm:g}–{s.band_max_nm:g} nm: R {_pct(pt.band_R)}, T {_pct(pt.band_T)}"
            if not pt.band_error else f"band mean: {_esc(pt.band_error)}")
    scale = (f" · whole stack at {s.thickness_factor * 100:g} % of nominal thickness"
             if s.thickness_scale_pct else "")
    return (f"<div class='fg-swatch-values fg-readout-text' style='font-size:12px'>luminous R {_pct(pt.luminous_R)}, "
            f"luminous T {_pct(pt.luminous_T)} (ISO 13666: D65 × V(λ)) · {band}{scale}</div>")


def _tolerance_html(r, s: ExplorerState) -> str:
    """A tolerance run's spread: ΔE00 from nominal and luminous reflectance, and some trials' colours."""
    de, lum, ab = r.delta_e, r.luminous, r.lab_absolute[:, 1:]
    p95 = float(np.percentile(de, 95))
    boxes = "".join(f"<span title='ΔE00 {d:.2f}' style='display:inline-block;width:16px;height:16px;margin:1px;"
                    f"border:1px solid #888;background:{srgb_to_hex(c)}'></span>"
                    for c, d in zip(r.rgb[:TOLERANCE_SWATCHES], de[:TOLERANCE_SWATCHES]))
    return (f"<div class='fg-swatch-values' style='font-size:12px'><b>Tolerance run</b>: {de.size} stacks, each "
            f"layer's thickness uniform within ±{r.tolerance_pct:g} % (seed {r.seed}), {s.angle_deg:.1f}°, "
            f"{_esc(s.lamp_text())}.<br>ΔE00 from nominal: median {np.median(de):.2f}, 95 % of trials below {p95:.2f}, "
            f"largest {de.max():.2f}<br>luminous R: nominal {_pct(r.nominal_luminous)}, range "
            f"{_pct(float(lum.min()))} – {_pct(float(lum.max()))}, standard deviation {_pct(float(lum.std()), 2)}"
            f"<br>reflex colour at absolute brightness: a* {ab[:, 0].min():.1f} to {ab[:, 0].max():.1f}, "
            f"b* {ab[:, 1].min():.1f} to {ab[:, 1].max():.1f}"
            f"<br>{boxes}<br><span style='color:#666'>Colours at the page's brightness; a model of random "
            "thickness errors, not a yield prediction.</span></div>")


def _lamp_option(code: str) -> str:
    """The lamp list's words for a state code."""
    if code == HALOGEN:
        return "halogen (Planck radiator, choose K)"
    if code == "custom":
        return "custom (upload a lamp spectrum)"
    return lamp_label(code)
