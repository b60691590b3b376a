"""Colour → thickness page section: a typed colour, a picked point of a photo, a whole photo as a map.

Shares the explorer's state: the stack, the unknown layer (the swept layer), the
viewing angle, the lamp, the observer, polarization and cone NA are the ones set there;
the viewing conditions are shown beside the answer with widgets bound to that same state.
The colour reading error (how the colour was read: by eye, camera) is this tab's own
declared state, :class:`ColourReading`. Every number
comes from ``physics.inverse``; photo maps run in the worker processes (views/workers.py)
with a progress bar and a Cancel, and a new request supersedes an unfinished one.
"""

from __future__ import annotations

import csv
import io
import json
import logging
from datetime import date, datetime
from functools import partial

import numpy as np
import panel as pn
from bokeh.events import SelectionGeometry, Tap
from bokeh.models import (BoxSelectTool, ColorBar, ColumnDataSource, DataRange1d, HoverTool, LinearColorMapper,
                          Range1d)
from bokeh.palettes import Viridis256, Magma256
from bokeh.plotting import figure

from physics import InputError, parse_color, thickness_candidates, thickness_map
from physics.imageio import MAX_BYTES as MAX_PHOTO_BYTES, box_mean_linear, load_image
from physics.colour_words import colour_word, colour_words
from physics.inverse import AMBIGUOUS_DE, FULL_STEP_WINDOW_NM, MATCH_DE_MAX, ROBUST_PERCENTILES, _lab_from_linear

from . import render
from .explorer import Field, _esc, _fmt, _label, _rgba, _rule, _footer, field_pair
from . import workers
from .limits import JobCancelled, Limits, heavy_job, post_to_page, served, session_key
from .figures import RangeHolder
from .colour_answer import (CUSTOM_READING, READING_PRESETS, ColourReading, _searched_stack_text,  # noqa: F401
                            _tolerance_verdict, _viewing_text)
from .photo_reading import PhotoReading
from .camera_calibration import PHOTO_KINDS_TEXT, RAW_TYPES, CameraCalibrationPanel, photo_decoding_text
from .uploads import CappedDropper, UploadReader
from .state import ANGLE_MAX_DEG, THICKNESS_LIMITS_NM, compute_strip, parse_number

log = logging.getLogger("fringegauge")

#: Longest side of a photo as shown on the page (pixels); the map itself is computed at full size.
DISPLAY_MAX_SIDE = 900
#: Largest photo accepted through the page (bytes; 200 MB of 10**6 bytes), as physics.imageio reads it.
MAX_UPLOAD_BYTES = MAX_PHOTO_BYTES
#: Half-size of the square averaged when a point of a photo is picked (pixels).
PICK_HALF_SIZE = 4
#: Widest search window the page accepts (nm): the widest that ``physics.inverse`` scans at its full
#: step, so a window never coarsens the search. Colours of high orders grow pale and repeat, so a
#: wider window adds ambiguity rather than answers.
WINDOW_MAX_WIDTH_NM = FULL_STEP_WINDOW_NM
#: Width of the typed-colour column (px); messages beside its fields wrap inside it.
TYPED_COLUMN_PX = 340
#: Width of a field message in that column (px).
MESSAGE_PX = TYPED_COLUMN_PX - 20
#: Stylesheet letting a field message wrap anywhere (a quoted input may be one long word).
WRAP_CSS = ".fg-error { white-space: normal; overflow-wrap: anywhere; }"
#: Candidate labels on the strip closer than this fraction of its span to an end are aligned inward.
LABEL_EDGE_FRACTION = 0.06
#: Bins of the thickness histogram over the map's robust range.
HIST_BINS = 60
#: Rest (ms) of the viewing conditions or reading error before the answer shown is searched again.
ANSWER_AGAIN_MS = 400

#: How a photo's colours are read when the page still says "by eye": from a camera no one has calibrated
#: (its usual reading error, common practice, is the preset's).
PHOTO_READING = "uncalibrated camera"

class ColourToThickness:
    """The colour → thickness section for one session, bound to a :class:`views.explorer.FilmExplorer`."""

    def __init__(self, explorer):
        self.ex = explorer
        self.photo = None
        self.calib_box = None
        self.shown = True                       # the page sets False while another tab is open
        self._strip_stale = False
        self.roi = None
        self.result = None
        self.result_label = ""                  # which run the map on the page is ("map 2, made 14:02:33")
        self._job = 0
        self._runs = 0                          # maps started for the open photo
        self._cancelled_job = None              # the job the user cancelled, until another starts
        self.last_candidates = None
        self._last_query = None
        self._again_token = 0
        self._again_query = None                # a query waiting to be answered again (served pages)
        self._build()

    # ------------------------------------------------------------------ widgets
    def _build(self):
        self.colour = Field("Observed colour", width=300,
                            placeholder="#4f719f · 79, 113, 159 · lab(52, -3, -27) · gold",
                            css="fg-colour-field")
        self.colour2 = Field("Same spot tilted: colour (optional)", width=190, placeholder="e.g. #6a7fae",
                             css="fg-colour2-field")
        self.angle2 = Field("Tilt angle (°)", width=110, placeholder="e.g. 45", css="fg-angle2-field")
        self.win_lo = Field("Window from (nm)", width=150, css="fg-win-lo")
        self.win_hi = Field("Window to (nm)", width=150, css="fg-win-hi")
        self.nominal = Field("Nominal (nm, optional)", width=150, css="fg-nominal")
        self.tolerance = Field("± tolerance (nm)", width=150, css="fg-tolerance")
        for f in self._typed_fields():
            f.message.width = MESSAGE_PX
            f.message.stylesheets = [*f.message.stylesheets, WRAP_CSS]
        self.win_lo.set_text("0")
        self.win_hi.set_text(_fmt(self.ex.state.thickness_max_nm, 1))
        self.find = pn.widgets.Button(label="Find thicknesses", color="primary", width=200, margin=(6, 5),
                                      css_classes=["fg-find"])
        self.reading = ColourReading()
        self.reading_select = pn.widgets.Select.from_param(self.reading.param.reading, name="Colour read",
                                                           width=180, css_classes=["fg-reading"])
        self.reading_error = pn.widgets.FloatInput.from_param(self.reading.param.reading_error_de,
                                                              name="Reading error (ΔE00)", step=0.5, width=120,
                                                              css_classes=["fg-reading-error"])
        s = self.ex.state
        # The viewing conditions of the answer: the film explorer's own state, so the two tabs always agree.
        self.view_angle = pn.widgets.FloatInput.from_param(s.param.angle_deg, name="Viewing angle (°)", step=1.0,
                                                           width=110, css_classes=["fg-view-angle"])
        self.view_lamp = pn.widgets.Select.from_param(s.param.illuminant, name="Lamp", width=110,
                                                      css_classes=["fg-view-lamp"])
        self.view_observer = pn.widgets.Select.from_param(s.param.observer, name="Observer (°)", width=90,
                                                          css_classes=["fg-view-observer"])
        self.view_pol = pn.widgets.Select.from_param(s.param.polarization, name="Polarization", width=110,
                                                     css_classes=["fg-view-pol"])
        self.view_na = pn.widgets.FloatInput.from_param(s.param.na, name="Cone NA", step=0.01, width=90,
                                                        css_classes=["fg-view-na"])
        self.verdict = pn.pane.Alert("Type a colour and press “Find thicknesses”. The stack and the unknown layer "
                                     "are the film explorer's (its swept layer); the viewing conditions are set just "
                                     "above.",
                                     alert_type="light", margin=(5, 5), css_classes=["fg-verdict"])
        self.table = pn.pane.HTML("", margin=(0, 5), css_classes=["fg-candidates"])
        self.cand_src = ColumnDataSource(dict(x=[], label=[], align=[]))
        self.strip_src = ColumnDataSource(dict(image=[], x=[], y=[], dw=[], dh=[]))
        st = figure(height=130, sizing_mode="stretch_width", tools="xpan,xwheel_zoom,reset,save",
                    title="Candidates on the colour strip at the current angle", x_axis_label="thickness (nm)",
                    x_range=Range1d(0, 1000), y_range=Range1d(0, 1))
        st.image_rgba(image="image", x="x", y="y", dw="dw", dh="dh", source=self.strip_src)
        st.scatter(x="x", y=0.5, size=16, marker="inverted_triangle", color="white", line_color="black",
                   source=self.cand_src)
        st.text(x="x", y=0.75, text="label", source=self.cand_src, text_font_size="11px", text_color="black",
                text_align="align", background_fill_color="white", background_fill_alpha=0.8)
        st.yaxis.visible = False
        st.ygrid.visible = False
        self.strip_fig = st

        # photo
        self.photo_msg = Field("")
        self.photo_reader = UploadReader(self.photo_msg, "photo")
        self.dropper = CappedDropper(MAX_UPLOAD_BYTES, locked(lambda name, data: self.load_photo(data, name)),
                                     locked(self.photo_reader.refuse), what="The photo",
                                     accepted_filetypes=["image/jpeg", "image/png", "image/tiff", ".tif", ".tiff",
                                                         ".jpg", ".jpeg", ".png", *RAW_TYPES],
                                     height=110, sizing_mode="stretch_width", margin=(2, 5),
                                     css_classes=["fg-photo-drop"])
        self.mode = pn.widgets.RadioBoxGroup(options={"calibration box": "calib", "region of interest": "roi",
                                                      "pick a point": "pick", "profile line": "line",
                                                      "wafer circle": "wafer", "calibration sample boxes": "refbox"},
                                             value="calib", inline=True,
                                             width=330, margin=(2, 5), css_classes=["fg-photo-mode"],
                                             stylesheets=[".bk-input-group { flex-wrap: wrap; gap: 2px 10px; }"])
        self.reference = pn.widgets.RadioButtonGroup(options={"bare substrate": "substrate", "grey card": "grey"},
                                                     value="substrate", margin=(2, 5))
        self.grey = Field("Grey card reflectance (0-1)", width=160)
        self.grey.set_text("0.18")
        self.box_info = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px"})
        self.run_map = pn.widgets.Button(label="Make thickness map", color="primary", width=200, margin=(6, 5),
                                         disabled=True)
        self.progress = pn.indicators.Progress(value=0, max=100, width=300, visible=False, margin=(6, 5))
        self.cancel_map = pn.widgets.Button(label="Cancel the map", color="light", width=140, margin=(2, 5),
                                            visible=False)
        self.progress_text = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px"})
        self.map_msg = pn.pane.Alert("", alert_type="light", visible=False, margin=(5, 5))
        self.photo_src = ColumnDataSource(dict(image=[], x=[], y=[], dw=[], dh=[]))
        self.box_src = ColumnDataSource(dict(x=[], y=[], w=[], h=[], color=[], name=[]))
        pf = figure(height=420, sizing_mode="stretch_width", match_aspect=True, tools="pan,wheel_zoom,reset",
                    css_classes=["fg-photo-fig"], **_image_ranges(),
                    title="Photo: drag a box or tap, as the mode on the left says")
        pf.image_rgba(image="image", x="x", y="y", dw="dw", dh="dh", source=self.photo_src)
        pf.rect(x="x", y="y", width="w", height="h", fill_alpha=0.0, line_color="color", line_width=2,
                source=self.box_src, legend_field="name")
        box_tool = BoxSelectTool()
        pf.add_tools(box_tool)
        pf.toolbar.active_drag = box_tool                      # dragging draws the box; pan stays in the toolbar
        pf.on_event(SelectionGeometry, self._on_box)
        pf.on_event(Tap, self._on_pick)
        pf.legend.location = "top_right"
        pf.legend.visible = False
        pf.legend.label_text_font_size = "11px"
        self.photo_fig = pf
        RangeHolder(pf)                               # inside every photo (pixels from 0): never released

        self.tmap_src = ColumnDataSource(dict(image=[], de=[], x=[], y=[], dw=[], dh=[]))
        self.tmapper = LinearColorMapper(palette=Viridis256, nan_color="#d9d9d9")
        tm = figure(height=330, sizing_mode="stretch_width", match_aspect=True, tools="pan,wheel_zoom,reset,save",
                    css_classes=["fg-tmap"], **_image_ranges(),
                    title="Thickness (grey: no match · red: stray order · pale: order undecided by colour)")
        img = tm.image(image="image", x="x", y="y", dw="dw", dh="dh", source=self.tmap_src, color_mapper=self.tmapper)
        self.stray_src = ColumnDataSource(dict(image=[], x=[], y=[], dw=[], dh=[]))
        tm.image_rgba(image="image", x="x", y="y", dw="dw", dh="dh", source=self.stray_src)
        tm.add_tools(HoverTool(renderers=[img], tooltips=[("x, y", "$x{0}, $y{0} px"), ("thickness", "@image{0.0} nm"),
                                                          ("ΔE00", "@de{0.0}")]))
        tm.add_layout(ColorBar(color_mapper=self.tmapper, title="nm", width=12), "right")
        self.tmap_fig = tm
        RangeHolder(tm)
        self.mark_src = ColumnDataSource(dict(x=[], y=[], label=[]))
        pf.scatter(x="x", y="y", source=self.mark_src, marker="cross", size=18, line_width=3, color="#ff00ff")
        pf.text(x="x", y="y", text="label", source=self.mark_src, x_offset=10, y_offset=-8, text_font_size="12px",
                text_color="black", background_fill_color="white", background_fill_alpha=0.85)
        self.pick_info = pn.pane.HTML("", margin=(0, 5), css_classes=["fg-pick-info"], styles={"font-size": "13px"})
        self.tools = PhotoReading(self)
        self.camcal = CameraCalibrationPanel(self)
        self.cmap_src = ColumnDataSource(dict(image=[], x=[], y=[], dw=[], dh=[]))
        self.cmapper = LinearColorMapper(palette=Magma256[::-1], low=0, high=MATCH_DE_MAX, nan_color="#d9d9d9")
        cf = figure(height=330, sizing_mode="stretch_width", match_aspect=True, tools="pan,wheel_zoom,reset,save",
                    **_image_ranges(),
                    title="Confidence: ΔE00 of the match (lower is better)")
        cf.image(image="image", x="x", y="y", dw="dw", dh="dh", source=self.cmap_src, color_mapper=self.cmapper)
        cf.add_layout(ColorBar(color_mapper=self.cmapper, title="ΔE00", width=12), "right")
        self.conf_fig = cf
        RangeHolder(cf)
        self.hist_src = ColumnDataSource(dict(left=[], right=[], top=[]))
        hf = figure(height=250, sizing_mode="stretch_width", tools="save", title="Histogram of thickness",
                    x_range=Range1d(0, 1), y_range=Range1d(0, 1),
                    x_axis_label="thickness (nm)", y_axis_label="pixels")
        hf.quad(left="left", right="right", top="top", bottom=0, source=self.hist_src, color="#3b6fa0")
        self.hist_fig = hf
        self.stats = pn.pane.HTML("", margin=(5, 5), css_classes=["fg-stats"])
        self.dl_npy = pn.widgets.FileDownload(callback=self._npy, filename="thickness_map.npy",
                                              label="Thickness map (.npy, float32 nm)", width=300, disabled=True)
        self.dl_png = pn.widgets.FileDownload(callback=self._png, filename="thickness_map.png",
                                              label="Thickness map with colour bar (.png)", width=300, disabled=True)
        self.dl_csv = pn.widgets.FileDownload(callback=self._stats_csv, filename="thickness_statistics.csv",
                                              label="Statistics (.csv)", width=300, disabled=True)

        # Handlers that change Bokeh models run under the document lock (see _locked).
        self.find.on_click(locked(self._on_find))
        self.colour.input.param.watch(locked(self._on_find), "enter_pressed")
        self.run_map.on_click(locked(self._on_run_map))
        self.cancel_map.on_click(locked(lambda e: self.cancel()))
        for group, fields in self._groups().items():
            for f in fields:
                f.input.param.watch(locked(partial(self._on_field, group)), "value")
        self.reading.param.watch(locked(self._on_reading), "reading_error_de")
        self.ex.state.param.watch(locked(self._on_state), ["stack_json", "swept_layer", "angle_deg", "illuminant",
                                                    "observer", "polarization", "na", "thickness_max_nm"])

    # ------------------------------------------------------------------ typed colour
    def _typed_fields(self):
        return (self.colour, self.colour2, self.angle2, self.win_lo, self.win_hi, self.nominal, self.tolerance)

    def _groups(self):
        """Fields checked together (a pair's check depends on both), keyed by the name of their checker."""
        return {"colour": (self.colour,), "tilt": (self.colour2, self.angle2), "window": (self.win_lo, self.win_hi),
                "target": (self.nominal, self.tolerance)}

    def _on_field(self, group, *_):
        """A field changed: check its group at once, so a message goes as soon as its field is valid or empty."""
        try:
            self._check({group}, live=True)
        except _Stop:
            pass                                   # the message is beside the field

    def _check(self, groups, live=False):
        """Check the named field groups; every field gets its message (or loses it).

        ``live``: a field still empty is not an error yet (the user may be filling it in), but a message
        about it from the last search stays while its cause does. Returns the values read:
        ``colour``, ``tilt`` ((colour, angle °) or None), ``window`` ((lo, hi) nm), ``nominal`` and
        ``tolerance`` (nm or None). Raises :class:`_Stop` when any field is invalid.
        """
        errors, values = {}, {}

        def number(field, lo, hi, unit):
            text = field.input.value.strip()
            if not text:
                return None
            try:
                return parse_number(text, field.input.name, lo, hi, unit)
            except InputError as exc:
                errors[field] = str(exc)
                return None

        def missing(field, text):
            if not live or field.message.visible:
                errors[field] = text

        def colour(field):
            text = field.input.value.strip()
            if not text:
                return None
            try:
                if colour_word(text) is None:
                    parse_color(text)
            except InputError as exc:
                exc = f"{exc} Or a colour word: {', '.join(w.word for w in colour_words()[:6])} ..."
                errors[field] = f"{field.input.name}: {exc}"
                return None
            return text

        if "colour" in groups:
            values["colour"] = colour(self.colour)
            if values["colour"] is None and self.colour not in errors:
                missing(self.colour, f"{self.colour.input.name}: type a colour, e.g. #4f719f, 79, 113, 159 or "
                                     "lab(52, -3, -27).")
        if "tilt" in groups:
            c2 = colour(self.colour2)
            a2 = number(self.angle2, 0.0, ANGLE_MAX_DEG, "°")
            if c2 is not None and a2 is None and self.angle2 not in errors:
                missing(self.angle2, f"{self.angle2.input.name}: type the angle the second colour was seen at, "
                                     f"in degrees from the normal (0 to {ANGLE_MAX_DEG:g}).")
            values["tilt"] = (c2, a2) if c2 is not None and a2 is not None else None
        if "window" in groups:
            lo = number(self.win_lo, *THICKNESS_LIMITS_NM, "nm")
            hi = number(self.win_hi, *THICKNESS_LIMITS_NM, "nm")
            for f, v, what in ((self.win_lo, lo, "thinnest"), (self.win_hi, hi, "thickest")):
                if v is None and f not in errors:
                    missing(f, f"{f.input.name}: type the {what} thickness to search, in nm.")
            if lo is not None and hi is not None:
                if not lo < hi:
                    errors[self.win_hi] = (f"{self.win_hi.input.name}: the end ({hi:g} nm) must be above the start "
                                           f"({lo:g} nm); swap them or type a larger end.")
                elif hi - lo > WINDOW_MAX_WIDTH_NM:
                    errors[self.win_hi] = (f"{self.win_hi.input.name}: the window is {hi - lo:g} nm wide; search at "
                                           f"most {WINDOW_MAX_WIDTH_NM:g} nm at once (high orders grow pale and "
                                           "repeat): narrow it around the expected thickness.")
            values["window"] = (lo, hi) if not errors.keys() & {self.win_lo, self.win_hi} else None
        if "target" in groups:
            nominal = number(self.nominal, *THICKNESS_LIMITS_NM, "nm")
            tol = number(self.tolerance, 0.001, THICKNESS_LIMITS_NM[1], "nm")
            if tol is not None and nominal is None and self.nominal not in errors:
                missing(self.tolerance, f"{self.tolerance.input.name}: a tolerance needs a nominal thickness; "
                                        f"type {self.nominal.input.name.split(' (')[0]} too, or clear the tolerance.")
            values["nominal"], values["tolerance"] = nominal, tol
        for group in groups:
            for f in self._groups()[group]:
                f.show_error(errors.get(f))
        if errors:
            raise _Stop(" ".join(errors.values()))
        return values

    def _window(self):
        """The search window (lo, hi) nm; raises :class:`_Stop` when a window field is invalid."""
        return self._check({"window"})["window"]

    def _on_find(self, *_):
        try:
            self.find_candidates(self.colour.input.value)
        except _Stop:
            pass

    def _refuse(self, text, alert_type="warning"):
        """A search was refused (or its inputs changed): drop the previous result so it cannot be read as
        this one's answer."""
        self.last_candidates = None
        self.verdict.alert_type = alert_type
        self.verdict.object = _esc(text)
        self.table.object = ""
        self.cand_src.data = dict(x=[], label=[], align=[])

    def find_candidates(self, colour, lab=None):
        """Rank thicknesses for a typed colour (or a picked point's CIELAB); shows the verdict and table.

        Every field is checked first; when any is invalid, each says why beside it, the previous
        result is cleared and None is returned.
        """
        s = self.ex.state
        self._again_query = None
        groups = {"tilt", "window", "target"} | ({"colour"} if lab is None else set())
        try:
            v = self._check(groups)
        except _Stop:
            bad = [f.input.name for f in self._typed_fields() if f.message.visible]
            self._refuse(f"Not searched: fix {', '.join(bad) or 'the field marked in red'} (the message beside "
                         "it says how), then press “Find thicknesses”. The previous result was cleared.")
            return None
        first = v["colour"] if lab is None else f"lab({lab[0]:.4f}, {lab[1]:.4f}, {lab[2]:.4f})"
        colours, angles = [first], [s.angle_deg]
        if v["tilt"] is not None:
            colours.append(v["tilt"][0])
            angles.append(v["tilt"][1])
        nominal, tol = v["nominal"], v["tolerance"]
        try:
            cands = thickness_candidates(colours if len(colours) > 1 else colours[0], s.stack, s.swept_layer,
                                         v["window"], angles if len(angles) > 1 else angles[0], s.illuminant_spec(),
                                         top=6, observer=s.observer, polarization=s.polarization, na=s.na,
                                         nominal_nm=nominal, tolerance_nm=tol,
                                         reading_error_de=self.reading.reading_error_de)
        except InputError as exc:
            self._refuse(f"Not searched: {exc}")
            return None
        self.last_candidates = cands
        self._last_query, self._again_query = (colour, lab), None
        note = ""
        if nominal is not None and tol is None:
            note = (f" The nominal {nominal:g} nm only breaks near-ties: the in-tolerance check needs both "
                    f"{self.nominal.input.name.split(' (')[0]} and {self.tolerance.input.name}.")
        self._show_candidates(cands, colours[0] if lab is None else None, lab, note, nominal, tol)
        return cands

    def _show_candidates(self, cands, typed, lab, note="", nominal=None, tol=None):
        kind = "danger" if not cands.acceptable else ("warning" if cands.ambiguous else "success")
        if cands.acceptable and nominal is not None and tol is not None and cands[0].in_tolerance is not None:
            kind, verdict = _tolerance_verdict(cands, nominal, tol, kind)
            note = verdict + note
        self.verdict.alert_type = kind
        s = self.ex.state
        words = "".join(f" “{w.word}” is a colour word: it is read as the approximate colour {w.hex} with its own "
                        f"reading error ΔE00 {w.reading_error_de:g}, which replaces the reading-error setting; a word "
                        "is an approximation, not a measurement." for w in cands.words)
        head, _, rest = cands.message.partition(": colour alone cannot decide")
        body = (f"<b>{_esc(head)}: colour alone cannot decide</b>{_esc(rest)}" if rest or cands.ambiguous
                else _esc(cands.message))
        self.verdict.object = (body + _esc(note + words) + f" <i>Seen {_esc(_viewing_text(s))}.</i>"
                               + (" Estimates from colour are not certified metrology." if cands.acceptable else ""))
        from physics import lab_to_xyz, xyz_to_srgb, srgb_to_hex
        obs_hex = srgb_to_hex(xyz_to_srgb(lab_to_xyz(cands.observed_lab[0], s.illuminant_spec(), s.observer),
                                          s.illuminant_spec(), s.observer))
        accepted = max(MATCH_DE_MAX, cands.reading_error_de)
        rows = "".join(
            f"<tr style='{'' if c.delta_e <= accepted else 'color:#999'}'><td>{i + 1}</td><td><b>{c.thickness_nm:.1f}</b></td><td>{c.range_nm[0]:.0f}–{c.range_nm[1]:.0f}</td>"
            f"<td>{c.delta_e:.2f}</td><td>{c.order}</td>"
            f"<td><span style='display:inline-block;width:36px;height:18px;background:{obs_hex};border:1px solid #888'></span>"
            f"<span style='display:inline-block;width:36px;height:18px;background:{c.hex};border:1px solid #888'></span></td>"
            + (f"<td>{'yes' if c.in_tolerance else 'no'}</td>" if c.in_tolerance is not None else "")
            + f"<td>{'possible' if any(c is p for p in cands.possible) else ''}</td></tr>"
            for i, c in enumerate(cands))
        tol_head = "<th>in tol.</th>" if cands and cands[0].in_tolerance is not None else ""
        self.table.object = (
            "<table style='font-size:13px;border-collapse:collapse' cellpadding='3'>"
            "<tr><th>#</th><th>thickness (nm)</th><th>colour-equal range (nm)</th><th>ΔE00</th><th>order</th>"
            f"<th>observed · predicted</th>{tol_head}<th>answer</th></tr>{rows}</table>"
            f"<div style='font-size:11px;color:#555'>possible: within the colour reading error ΔE00 "
            f"{cands.reading_error_de:g} of the best match; ΔE00 ≤ {AMBIGUOUS_DE:g}: not distinguishable by eye; "
            f"> {accepted:g}: not accepted as a match (common practice).</div>")
        self._refresh_strip()
        x = [c.thickness_nm for c in cands]
        self.cand_src.data = dict(x=x, label=[f"#{i + 1}" for i in range(len(cands))], align=self._label_align(x))

    def _on_reading(self, *_):
        """The reading error changed: the answer shown is searched again with it (the colour paths are cached)."""
        if (self.last_candidates is not None or self._again_query is not None) and self._last_query is not None:
            self._answer_again()

    def _answer_again(self):
        """Search the last query again under the new settings: at once outside a server; when served, once the
        settings have rested for :data:`ANSWER_AGAIN_MS` (a dragged slider asks for one search, not hundreds)."""
        query = self._again_query or self._last_query
        doc = pn.state.curdoc
        if not served(doc):
            self.find_candidates(*query)
            return
        self._refuse("The settings changed: answering again …", alert_type="light")
        self._again_query = query
        self._again_token += 1
        token = self._again_token

        def run():
            if token == self._again_token and self._again_query is query:
                self.find_candidates(*query)
        doc.add_timeout_callback(run, ANSWER_AGAIN_MS)

    def _label_align(self, x):
        """Text alignment of each strip label: inward near an end of the strip, so no label is cut off."""
        lo, hi = self.strip_fig.x_range.start, self.strip_fig.x_range.end
        edge = LABEL_EDGE_FRACTION * max(hi - lo, 1e-9)
        return ["left" if v < lo + edge else "right" if v > hi - edge else "center" for v in x]

    def _refresh_strip(self):
        s = self.ex.state
        try:
            st = compute_strip(s)
        except InputError:
            return
        d = st.thickness_nm
        dd = (d[-1] - d[0]) / max(d.size - 1, 1)
        self.strip_src.data = dict(image=[_rgba(st.rgb[None, :, :])], x=[d[0] - dd / 2], y=[0],
                                   dw=[d[-1] - d[0] + dd], dh=[1])
        self.strip_fig.x_range.update(start=d[0], end=d[-1])
        if self.cand_src.data["x"]:
            self.cand_src.data = dict(self.cand_src.data, align=self._label_align(self.cand_src.data["x"]))

    def _on_state(self, *events):
        if any(e.name == "thickness_max_nm" for e in events):
            self.win_hi.set_text(_fmt(self.ex.state.thickness_max_nm, 1))
        waiting = self._again_query is not None
        if (self.last_candidates is not None or waiting) and any(e.name != "thickness_max_nm" for e in events):
            typed = self._last_query is not None and self._last_query[1] is None
            if self.shown and typed:            # changed beside the answer (or with the tab open): answer again
                self._answer_again()
            else:                               # a picked point's colour was read under the old conditions
                self._again_query = None
                self._refuse("The stack, unknown layer, angle, lamp or observer changed since this search: press "
                             "“Find thicknesses” again.", alert_type="light")
        if self.shown:
            self._refresh_strip()
        else:                                   # drawn when the tab is opened, not on every slider move
            self._strip_stale = True

    def set_shown(self, shown: bool) -> None:
        """Tell the section whether its tab is open (the page calls this on every tab change)."""
        self.shown = bool(shown)
        if self.shown and self._strip_stale:
            self._strip_stale = False
            self._refresh_strip()

    # ------------------------------------------------------------------ photo
    def load_photo(self, data: bytes, name: str = "photo") -> bool:
        """Read an uploaded photo; on a bad file say why and keep the previous photo.

        When served, the photo is decoded in a worker thread (:class:`views.uploads.UploadReader`) and
        this returns True once decoding has started; otherwise it returns whether the photo was taken.
        """
        max_pixels = int(Limits.from_env().max_photo_megapixels * 1e6)
        return self.photo_reader.take(name, data, MAX_UPLOAD_BYTES, partial(_decode_photo, max_pixels=max_pixels),
                                      partial(self._show_photo, name))

    def _show_photo(self, name: str, decoded) -> bool:
        """Put a decoded photo (from :func:`_decode_photo`) on the page, with no box and no map yet."""
        photo, preview = decoded
        self.photo_msg.show_error(None)
        self.photo, self.photo_name = photo, name
        self.calib_box = self.roi = None
        self._job += 1                            # a map still running belongs to the previous photo
        self._runs = 0
        self._clear_map()
        self.progress.visible = self.cancel_map.visible = False
        self.progress_text.object = ""
        self.photo_src.data = dict(image=[preview], x=[0], y=[0], dw=[photo.width], dh=[photo.height])
        self.photo_fig.title.text = f"{name}: {photo.width} x {photo.height} px, {photo_decoding_text(photo)}"
        self.mark_src.data = dict(x=[], y=[], label=[])
        self.pick_info.object = ""
        if self.reading.reading == self.reading.param.reading.default:     # a photo's colours come from a camera
            self.reading.reading = PHOTO_READING
            self.pick_info.object = (f"Colour read set to “{PHOTO_READING}” (reading error ΔE00 "
                                     f"{self.reading.reading_error_de:g}) for this photo; choose “calibrated camera” "
                                     "under Colour read once the camera is calibrated against a reference.")
        self.tools.clear()
        self._draw_boxes()
        self.camcal.photo_changed()
        self.run_map.disabled = False
        return True

    def _on_box(self, event):
        g = event.geometry
        if self.photo is None or g.get("type") != "rect":
            return
        box = (min(g["x0"], g["x1"]), min(g["y0"], g["y1"]), max(g["x0"], g["x1"]), max(g["y0"], g["y1"]))
        if self.mode.value == "pick":
            self.pick_box(box)
        elif self.mode.value == "wafer":
            self.tools.set_circle(box)
        elif self.mode.value == "refbox":
            self.camcal.add_box(box)
        else:
            self.set_box(self.mode.value, box)

    def set_box(self, which, box):
        """Set the calibration box or the region of interest (pixel box x0, y0, x1, y1)."""
        W, H = self.photo.width, self.photo.height
        x0, y0, x1, y1 = (int(round(v)) for v in box)
        x0, x1 = sorted((min(max(x0, 0), W), min(max(x1, 0), W)))
        y0, y1 = sorted((min(max(y0, 0), H), min(max(y1, 0), H)))
        if x1 - x0 < 1 or y1 - y0 < 1:
            self.photo_msg.show_error("The box is empty or outside the photo; drag a box over the photo.")
            return
        if which == "roi":
            self.roi = (x0, y0, x1, y1)
        else:
            self.calib_box = (x0, y0, x1, y1)
        self.photo_msg.show_error(None)
        self._draw_boxes()

    def calibration_text(self, name: str, note: str = "") -> str:
        """The current calibration box and reference as the text of a library calibration.

        Raises InputError when there is no photo or no box, or the grey card value is not valid.
        """
        if self.photo is None or self.calib_box is None:
            raise InputError("There is no calibration box to save: open a photo on the Colour → thickness tab "
                             "and drag a box over bare substrate or a grey card.")
        ref = "substrate"
        if self.reference.value == "grey":
            try:
                ref = _grey_value(self.grey)
            except _Stop as exc:
                raise InputError(str(exc)) from None
        return json.dumps({"name": name, "box": [int(v) for v in self.calib_box], "reference": ref,
                           "note": note or f"box in pixels of {self.photo_name} "
                                           f"({self.photo.width} x {self.photo.height} px)"}, indent=2) + "\n"

    def apply_calibration(self, data: dict) -> None:
        """Use a validated library calibration (``library.store.validate_calibration``) on the open photo.

        Raises InputError when no photo is open or the box lies outside it.
        """
        if self.photo is None:
            raise InputError("Open the photo on the Colour → thickness tab first: a calibration box is in that "
                             "photo's pixels.")
        x0, y0, x1, y1 = data["box"]
        if x1 > self.photo.width or y1 > self.photo.height:
            raise InputError(f"The calibration box [{x0:g}, {y0:g}, {x1:g}, {y1:g}] reaches beyond this photo "
                             f"({self.photo.width} x {self.photo.height} px); it was made on another photo size.")
        if data["reference"] == "substrate":
            self.reference.value = "substrate"
        else:
            self.reference.value = "grey"
            self.grey.set_text(_fmt(float(data["reference"]), 4))
        self.set_box("calib", (x0, y0, x1, y1))

    def camera_calibration_text(self, name: str, note: str = "") -> str:
        """The camera calibration in use as the text of a lab-library item (views/camera_calibration.py)."""
        return self.camcal.file_text(name, note)

    def apply_camera_calibration(self, text: str, label: str = "") -> None:
        """Use a lab-library camera calibration's text for the next maps; InputError when it is unusable."""
        self.camcal.apply_text(text, label)

    def _draw_boxes(self):
        data = dict(x=[], y=[], w=[], h=[], color=[], name=[])
        for box, color, name in ((self.calib_box, "#ff00ff", "calibration"), (self.roi, "#00e0ff", "region")):
            if box:
                x0, y0, x1, y1 = box
                data["x"].append((x0 + x1) / 2)
                data["y"].append((y0 + y1) / 2)
                data["w"].append(x1 - x0)
                data["h"].append(y1 - y0)
                data["color"].append(color)
                data["name"].append(name)
        self.box_src.data = data
        self.photo_fig.legend.visible = bool(data["x"])
        txt = []
        if self.calib_box:
            txt.append(f"calibration box {self.calib_box} ({self.reference.value})")
        if self.roi:
            txt.append(f"region {self.roi}")
        self.box_info.object = "; ".join(txt) or "No calibration box: the photo's colours are taken as they are."

    def _gains(self):
        from physics.inverse import _calibration_gains
        s = self.ex.state
        ref = "substrate"
        if self.reference.value == "grey":
            ref = _grey_value(self.grey)
        return _calibration_gains(self.photo, self.calib_box, ref, s.stack, s.swept_layer, s.angle_deg,
                                  s.illuminant_spec(), s.observer, s.polarization, s.na)

    def _on_pick(self, event):
        if self.photo is None or event.x is None:
            return
        if self.mode.value == "pick":
            self.pick(event.x, event.y)
        elif self.mode.value == "line":
            self.tools.tap(event.x, event.y)

    def pick(self, x, y):
        """Candidates for the mean colour (linear light) of a small square around a photo point."""
        h = PICK_HALF_SIZE
        return self.pick_box((int(x) - h, int(y) - h, int(x) + h + 1, int(y) + h + 1))

    def pick_box(self, box):
        """Candidates for the mean colour (linear light, calibrated) of a rectangle of the photo."""
        W, H = self.photo.width, self.photo.height
        x0, y0, x1, y1 = (int(round(v)) for v in box)
        box = (max(0, x0), max(0, y0), min(W, x1), min(H, y1))
        s = self.ex.state
        try:
            lab = self.camcal.box_lab(box)                # with the camera calibration in use, if chosen
            if lab is None:
                lab = _lab_from_linear(box_mean_linear(self.photo, box) * self._gains(), s.illuminant_spec(),
                                       s.observer).reshape(3)                   # one colour, whatever the shape
        except (InputError, _Stop) as exc:
            self.photo_msg.show_error(str(exc))
            return None
        cands = self.find_candidates(None, lab=lab)
        self._mark_pick(box, cands)
        return cands

    def _mark_pick(self, box, cands):
        """A marker at the picked point and its answer beside the photo."""
        x0, y0, x1, y1 = box
        cx, cy = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
        if cands is None:
            self.mark_src.data = dict(x=[], y=[], label=[])
            self.pick_info.object = ""
            return
        if not cands.acceptable:
            label, text = "no match", "no acceptable match (see the answer above)"
        else:
            label = " / ".join(f"{c.thickness_nm:.0f}" for c in cands.possible) + " nm"
            text = (f"<b>{label}</b>" + (": colour alone cannot decide between these" if cands.ambiguous
                                         else f" (order {cands[0].order}, ΔE00 {cands[0].delta_e:.1f})"))
        self.mark_src.data = dict(x=[cx], y=[cy], label=[label + ("?" if cands.ambiguous else "")])
        self.pick_info.object = (f"Picked ({cx:.0f}, {cy:.0f}) px, mean of {x1 - x0} × {y1 - y0} px: {text}; "
                                 f"reading error ΔE00 {cands.reading_error_de:g}.")

    def _on_run_map(self, *_):
        self.start_map()

    def _shown_map_text(self) -> str:
        """Which map the page shows, as a sentence."""
        if self.result is None:
            return "No map is shown."
        return f"The map shown is the earlier one ({self.result_label})."

    def cancel(self) -> None:
        """Drop the running photo map: it stops at its next stage and its result is never shown."""
        self._cancelled_job = self._job
        self._job += 1
        self.progress.visible = self.cancel_map.visible = False
        self.run_map.disabled = self.photo is None
        self.progress_text.object = ("Cancelled: this map's result will not be shown; the server stops it at its "
                                     "next stage. " + _esc(self._shown_map_text()))

    def _clear_map(self):
        """Take the map, its statistics and downloads off the page."""
        self.result = None
        self.result_label = ""
        for src in (self.tmap_src, self.cmap_src, self.stray_src):
            src.data = {k: [] for k in src.data}
        self.hist_src.data = dict(left=[], right=[], top=[])
        self.hist_fig.title.text = "Histogram of thickness"
        self.stats.object = ""
        self.camcal.show_map(None, 1)
        self.map_msg.visible = False
        for w in (self.dl_npy, self.dl_png, self.dl_csv):
            w.disabled = True
        self.tools.refresh()

    def start_map(self, sync=False):
        """Compute the thickness map of the photo (off the event loop when served)."""
        if self.photo is None:
            return
        s = self.ex._snapshot()
        try:
            ref = "substrate" if self.reference.value == "substrate" else _grey_value(self.grey)
            v = self._check({"window", "target"})
            camera = self.camcal.map_arguments()          # the camera calibration in use, if chosen
        except (_Stop, InputError) as exc:
            self.map_msg.object = _esc(f"Not started: {exc} " + self._shown_map_text())
            self.map_msg.alert_type, self.map_msg.visible = "danger", True
            return
        window, nominal = v["window"], v["nominal"]
        self._job += 1
        self._cancelled_job = None
        self._runs += 1
        job, run_number = self._job, self._runs
        args = dict(image=self.photo, stack=s.stack, layer=s.swept_layer, thickness_nm=window,
                    reference_box=self.calib_box, illuminant=s.illuminant_spec(), angle_deg=s.angle_deg,
                    observer=s.observer, polarization=s.polarization, na=s.na, reference=ref, roi=self.roi,
                    nominal_nm=nominal, reading_error_de=self.reading.reading_error_de, **camera)
        self.progress.visible = self.cancel_map.visible = True
        self.progress.value = 0
        self.run_map.disabled = True
        doc = pn.state.curdoc
        live = served(doc)

        def gone():
            return job != self._job or (live and not served(doc))

        def show(fraction, text):
            if job == self._job:
                self.progress.value = int(100 * fraction)
                self.progress_text.object = text

        size = self.photo.width * self.photo.height
        session = session_key(self.ex)
        if sync or not live:
            channel = workers.LocalChannel(show, gone)
            try:
                with heavy_job("photo_map", size, session):
                    try:
                        result = thickness_map(progress=channel.report, **args), None
                    except InputError as exc:
                        result = None, str(exc)
                    self._finish_map(job, s, *result, run_number=run_number, window=window)
            except InputError as exc:
                self._finish_map(job, s, None, str(exc), run_number=run_number, window=window)
            except JobCancelled:
                pass
            return

        async def run():
            limits = Limits.from_env()
            try:
                with heavy_job("photo_map", size, session, limits):
                    channel = await workers.new_channel()
                    result = await workers.run_in_worker(
                        limits.max_jobs_server, workers.photo_map, args, channel=channel,
                        on_progress=lambda f, text: post_to_page(doc, partial(show, f, text)), cancelled=gone)
            except InputError as exc:
                result = None, str(exc)
            except JobCancelled:
                return
            except workers.WorkerLost as exc:
                log.error("photo thickness map: worker process lost", extra={"session": session, "size": size})
                result = None, str(exc)
            except Exception:  # never lose the session to one failed computation
                log.exception("photo thickness map failed")
                result = None, "The thickness map failed unexpectedly; the server log has the details."
            post_to_page(doc, partial(self._finish_map, job, s, *result, run_number=run_number, window=window))
        pn.state.execute(run)

    def _finish_map(self, job, s, result, error, run_number=0, window=(0.0, 0.0)):
        if job != self._job:                      # superseded by a newer request, or cancelled
            if job == self._cancelled_job and self._job == job + 1 and result is not None:
                self.progress_text.object = _esc(
                    "Cancelled, but the map had already finished on the server before the cancel reached it; "
                    "as asked, its result is not shown. " + self._shown_map_text()
                    + " Press “Make thickness map” to run it again.")
            return
        self.progress.visible = self.cancel_map.visible = False
        self.run_map.disabled = False
        if error:
            self.map_msg.object = _esc(f"{error} " + self._shown_map_text())
            self.map_msg.alert_type, self.map_msg.visible = "danger", True
            return
        self.result, self.result_state, self.result_window = result, s, window
        self.result_label = f"map {run_number} of {self.photo_name}, made {datetime.now():%H:%M:%S}"
        st = result.stats
        self.map_msg.object = (f"<b>{_esc(self.result_label.capitalize())}.</b> " + _esc(result.message)
                               + " Colour estimates are not certified metrology.")
        self.map_msg.alert_type = ("success" if st["valid_fraction"] > 0.5 and not st["order_outliers"]
                                   else "warning")
        self.map_msg.visible = True
        self.progress_text.object = ""
        H, W = result.thickness_nm.shape
        step = max(1, int(np.ceil(max(W, H) / DISPLAY_MAX_SIDE)))
        T = result.thickness_nm[::step, ::step]
        D = result.delta_e[::step, ::step]
        self.tmap_src.data = dict(image=[T], de=[D], x=[0], y=[0], dw=[W], dh=[H])
        self.cmap_src.data = dict(image=[D], x=[0], y=[0], dw=[W], dh=[H])
        stray, undecided = result.order_outlier, result.undecided
        marks = [(m, rgba) for m, rgba in ((undecided, UNDECIDED_RGBA), (stray, STRAY_RGBA))
                 if m is not None and m.any()]
        self.stray_src.data = (dict(image=[_overlay(marks, step)], x=[0], y=[0], dw=[W], dh=[H]) if marks
                               else dict(image=[], x=[], y=[], dw=[], dh=[]))
        p0, p1 = ROBUST_PERCENTILES
        if st["pixels"]:
            lo, hi = st["p_low_nm"], max(st["p_high_nm"], st["p_low_nm"] + 1e-6)
            self.tmapper.update(low=lo, high=hi)
            v = result.thickness_nm[np.isfinite(result.thickness_nm)]
            top, edges = np.histogram(v, bins=HIST_BINS, range=(lo, hi))
            outside = int(v.size - top.sum())
            self.hist_src.data = dict(left=edges[:-1], right=edges[1:], top=top)
            self.hist_fig.x_range.update(start=edges[0], end=edges[-1])
            self.hist_fig.y_range.update(start=0, end=max(1, top.max()) * 1.05)
            self.hist_fig.title.text = (f"Histogram of thickness, P{p0:g}–P{p1:g} range"
                                        + (f" ({outside:,} pixels outside it)" if outside else ""))
        else:
            self.hist_src.data = dict(left=[], right=[], top=[])
            self.hist_fig.title.text = "Histogram of thickness"
        g = result.gains
        rows = (
            ("mean", f"{st['mean_nm']:.1f} nm"), ("median", f"{st['median_nm']:.1f} nm"),
            ("standard deviation", f"{st['std_nm']:.1f} nm"),
            (f"range P{p0:g} – P{p1:g} (percentiles)", f"{st['p_low_nm']:.1f} – {st['p_high_nm']:.1f} nm"),
            ("min – max", f"{st['min_nm']:.1f} – {st['max_nm']:.1f} nm"),
            (f"uniformity (P{p1:g} − P{p0:g})/(2 mean)", f"{100 * st['uniformity_robust']:.1f} %"),
            ("uniformity (max − min)/(2 mean)", f"{100 * st['uniformity']:.1f} %"),
            ("pixels matched", f"{st['pixels']:,} ({100 * st['valid_fraction']:.1f} % of region)"),
            ("of another order than their neighbourhood",
             f"{st['order_outliers']:,} ({100 * st['order_outlier_fraction']:.1f} % of matched)"),
            (f"order not decided by colour (reading error ΔE00 {st.get('reading_error_de', 0):g})",
             f"{st.get('undecided', 0):,} ({100 * st.get('undecided_fraction', 0):.1f} % of matched)"),
            ("calibration gains R, G, B", f"{g[0]:.3f}, {g[1]:.3f}, {g[2]:.3f}"),
            *self.camcal.show_map(result, step))
        self.stats.object = ("<table style='font-size:13px' cellpadding='2'>"
                             + "".join(f"<tr><td>{k}</td><td><b>{v}</b></td></tr>" for k, v in rows) + "</table>")
        for w in (self.dl_npy, self.dl_png, self.dl_csv):
            w.disabled = False
        self.tools.refresh()

    # ------------------------------------------------------------------ downloads
    def _npy(self):
        buf = io.BytesIO()
        np.save(buf, self.result.thickness_nm.astype(np.float32))
        buf.seek(0)
        return buf

    def _png(self):
        """The map as a PNG with its colour bar, row 0 (the photo's top row) at the top, as on the page."""
        s = self.result_state
        return io.BytesIO(render.colorbar_png(self.result.thickness_nm, label="thickness (nm)",
                                              title=f"Thickness of layer {s.swept_layer + 1}: "
                                                    f"{_searched_stack_text(s, self.result_window)}",
                                              footer=_footer(), origin="upper"))

    def _stats_csv(self):
        s, st, g = self.result_state, self.result.stats, self.result.gains
        out = io.StringIO()
        out.write(f"# fringegauge thickness map statistics (computed from colour; not certified metrology)\n"
                  f"# date: {date.today().isoformat()}\n# photo: {getattr(self, 'photo_name', '')}\n"
                  f"# stack: {_searched_stack_text(s, self.result_window)}; unknown layer {s.swept_layer + 1} "
                  f"(from the top)\n"
                  f"# illuminant {s.illuminant}, observer {s.observer} deg, angle {s.angle_deg:g} deg, "
                  f"colour reading error {st.get('reading_error_de', 0):g} dE00\n"
                  f"# calibration box: {self.calib_box}; region: {self.roi}\n"
                  + (f"# camera calibration: {self.camcal.active_label}\n" if st.get("calibrated") else "")
                  + f"# {self.result_label}\n")
        w = csv.writer(out)
        p0, p1 = ROBUST_PERCENTILES
        w.writerow(["mean_nm", "std_nm", "min_nm", "max_nm", "uniformity", "valid_fraction", "pixels",
                    "gain_r", "gain_g", "gain_b", "median_nm", f"p{p0:g}_nm", f"p{p1:g}_nm", "uniformity_robust",
                    "order_outliers", "median_uncertainty_nm", "p95_uncertainty_nm"])
        w.writerow([f"{st['mean_nm']:.3f}", f"{st['std_nm']:.3f}", f"{st['min_nm']:.3f}", f"{st['max_nm']:.3f}",
                    f"{st['uniformity']:.5f}", f"{st['valid_fraction']:.5f}", st["pixels"],
                    f"{g[0]:.5f}", f"{g[1]:.5f}", f"{g[2]:.5f}", f"{st['median_nm']:.3f}", f"{st['p_low_nm']:.3f}",
                    f"{st['p_high_nm']:.3f}", f"{st['uniformity_robust']:.5f}", st["order_outliers"],
                    *(f"{st.get(k, float('nan')):.3f}" for k in ("median_uncertainty_nm", "p95_uncertainty_nm"))])
        if self.tools.sites is not None:
            ws = self.tools.settings
            out.write(f"# {ws.pattern} sites inside a {ws.edge_exclusion_mm:g} mm edge exclusion, mm from the wafer "
                      "centre (x right, y up)\n")
            w.writerows(self.tools.csv_rows())
        out.seek(0)
        return out

    # ------------------------------------------------------------------ layout
    def panel(self):
        typed = pn.Column(
            pn.pane.HTML("<h3 style='margin:6px 5px 2px'>A colour to thickness candidates</h3>"),
            self.colour.view(),
            pn.Row(self.reading_select, self.reading_error, margin=0),
            pn.pane.HTML("<div style='font-size:11px;color:#555;margin:-4px 5px 2px'>Reading error, common practice: "
                         + " · ".join(f"{k} ≈ {v:g}" for k, v in READING_PRESETS.items())
                         + ". A colour word (gold, violet, light blue …) brings its own, larger error.</div>",
                         width=TYPED_COLUMN_PX),
            *(field_pair(a, b, width=TYPED_COLUMN_PX) for a, b in ((self.colour2, self.angle2),
                                                                    (self.win_lo, self.win_hi),
                                                                    (self.nominal, self.tolerance))),
            self.find, width=TYPED_COLUMN_PX)
        seen = pn.Column(
            _label("Seen under (the film explorer's settings: a change here changes them there, and back)"),
            pn.Row(self.view_angle, self.view_lamp, self.view_observer, self.view_pol, self.view_na, margin=0),
            margin=(0, 0, 4, 0), css_classes=["fg-seen"])
        results = pn.Column(seen, self.verdict, self.table,
                            pn.pane.Bokeh(self.strip_fig, sizing_mode="stretch_width"), sizing_mode="stretch_width")
        photo_controls = pn.Column(
            pn.pane.HTML("<h3 style='margin:6px 5px 2px'>A photo to a thickness map</h3>"),
            _label(f"Photo ({PHOTO_KINDS_TEXT})"), self.dropper, self.photo_msg.message,
            _label("Dragging or tapping on the photo sets"), self.mode,
            self.camcal.panel(quick=pn.Column(_label("The calibration box shows"), self.reference, self.grey.view(),
                                              self.box_info, margin=0)),
            _label("The wafer (for sites and its usable area)"),
            self.tools.controls(), self.run_map, self.progress, self.cancel_map, self.progress_text,
            self.dl_npy, self.dl_png, self.dl_csv, width=340)
        return pn.Column(
            pn.Row(typed, results, sizing_mode="stretch_width"),
            _rule(),
            pn.Row(photo_controls, pn.Column(self.map_msg, self.pick_info,
                                             pn.pane.Bokeh(self.photo_fig, sizing_mode="stretch_width"),
                                             sizing_mode="stretch_width"), sizing_mode="stretch_width"),
            pn.Row(pn.pane.Bokeh(self.tmap_fig, sizing_mode="stretch_width"),
                   pn.pane.Bokeh(self.conf_fig, sizing_mode="stretch_width"), sizing_mode="stretch_width"),
            self.camcal.unc_holder,
            pn.Row(pn.pane.Bokeh(self.hist_fig, sizing_mode="stretch_width"), self.stats, sizing_mode="stretch_width"),
            pn.Row(pn.pane.Bokeh(self.tools.prof_fig, sizing_mode="stretch_width"), self.tools.site_table,
                   sizing_mode="stretch_width"),
            sizing_mode="stretch_width", scroll=True)



#: Colour of pixels whose fringe order differs from their neighbourhood, drawn over the thickness map
#: (packed RGBA for Bokeh's image_rgba: opaque red, which the Viridis palette never shows).
STRAY_RGBA = np.array([0xE0, 0x10, 0x10, 0xFF], dtype=np.uint8).view(np.uint32)[0]


#: Colour of pixels whose fringe order colour alone cannot decide (within the reading error): a
#: half-transparent white veil, so the thickness under it still shows.
UNDECIDED_RGBA = np.array([0xFF, 0xFF, 0xFF, 0x99], dtype=np.uint8).view(np.uint32)[0]


def _overlay(marks, step: int) -> np.ndarray:
    """Masks at display size (a block is marked if any of its pixels is) as one RGBA image; later masks of
    ``marks`` ((mask, packed RGBA), ...) are drawn over earlier ones."""
    out = None
    for mask, rgba in marks:
        h, w = mask.shape
        hs, ws = -(-h // step), -(-w // step)
        padded = np.zeros((hs * step, ws * step), dtype=bool)
        padded[:h, :w] = mask
        blocks = padded.reshape(hs, step, ws, step).any(axis=(1, 3))
        out = np.zeros(blocks.shape, dtype=np.uint32) if out is None else out
        out[blocks] = rgba
    return out


def locked(handler):
    """``handler`` wrapped to run through :func:`_locked`: for watchers and clicks that change Bokeh models.

    Panel may call a handler outside the document lock (a click or upload that arrives just after
    another change of the same page); changing a Bokeh model there fails, so the call is moved to
    the next tick, where the lock is held. Outside a server it runs at once.
    """
    def run(*args, **kwargs):
        _locked(partial(handler, *args, **kwargs))
    return run


def _locked(fn):
    """Run ``fn`` where Bokeh models may be changed: on the next tick (document lock held) when served,
    at once otherwise. Some Panel events arrive in coroutines that do not hold the lock."""
    doc = pn.state.curdoc
    if served(doc):
        doc.add_next_tick_callback(fn)
    else:
        fn()


def _decode_photo(data: bytes, progress=None, *, max_pixels: int):
    """(photo, RGBA preview of at most DISPLAY_MAX_SIDE pixels a side) from a photo file's bytes; the slow
    part of an upload, run off the event loop. Raises InputError for a file that is not a usable photo."""
    photo = load_image(data, max_pixels=max_pixels)
    step = max(1, int(np.ceil(max(photo.width, photo.height) / DISPLAY_MAX_SIDE)))
    small = photo.rgb[::step, ::step].astype(float) / (65535.0 if photo.bit_depth == 16 else 255.0)
    if photo.linear:                                      # linear light (16-bit linear TIFF, RAW): shown as a
        import colour                                     # display would show it, sRGB-encoded, else it looks dark
        small = np.asarray(colour.models.eotf_inverse_sRGB(np.clip(small, 0.0, 1.0)), dtype=float)
    return photo, _rgba(small)


def _image_ranges():
    """x and y ranges of a photo figure: fitted to the image (y down), so with ``match_aspect`` a pixel is square."""
    return dict(x_range=DataRange1d(range_padding=0), y_range=DataRange1d(range_padding=0, flipped=True))


class _Stop(Exception):
    """A field was invalid; its message is already shown beside it."""


def _grey_value(field):
    from .state import parse_number
    try:
        v = parse_number(field.input.value, "Grey card reflectance", 0.001, 1.0)
    except InputError as exc:
        field.show_error(str(exc))
        raise _Stop(str(exc)) from None
    field.show_error(None)
    return v
