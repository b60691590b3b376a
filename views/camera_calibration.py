"""The "Camera calibration" part of the colour tab's photo section (views/inverse.py).

Two ways to turn a photo's code values into colour: **Quick** (today's bare-substrate gains: one gain
per channel from the calibration box) or **Calibrated camera**: a colour correction fitted once per
camera + lamp + optics (``physics.camera``) and then loaded onto any later photo, optionally with a
flat field (a photo of a uniform bare substrate that divides out the lamp's fall-off).

A calibration is fitted from a photo of a **reference sample** (boxes drawn on its steps, each with its
known thickness typed in a row of the box table, or boxes and thicknesses read from a CSV
``x0,y0,x1,y1,thickness_nm``), or from a **colour target** (a CSV ``patch,L*,a*,b*`` and one box per
patch, drawn in the CSV's order). The fit runs in the worker processes (views/workers.py), like a
photo map; its residual per box (ΔE00, and nm for a reference sample) is shown, or the sentence saying
why the boxes cannot constrain it. A calibration is saved to the lab library as a
``camera_calibrations`` item (:func:`library.store.validate_camera_calibration`) with the camera, lamp,
objective, NA and date, and loaded back from it here or from the Lab library tab.

Declared state: :class:`CameraCalibrationSettings`. Every number comes from ``physics.camera``.
"""

from __future__ import annotations

import csv
import io
import json
import logging
from datetime import datetime, timezone
from functools import partial

import numpy as np
import panel as pn
import param
from bokeh.models import ColorBar, ColumnDataSource, HoverTool, LinearColorMapper
from bokeh.palettes import Cividis256
from bokeh.plotting import figure

from physics import InputError
from physics import imageio as _imageio
from physics.camera import MIN_BOXES
from physics.imageio import MAX_BYTES as MAX_PHOTO_BYTES, load_image

from . import workers
from .explorer import Field, _esc, _fmt, _label
from .figures import RangeHolder
from .limits import JobCancelled, Limits, heavy_job, post_to_page, served, session_key
from .state import THICKNESS_LIMITS_NM, parse_number
from .uploads import COMPACT, CappedDropper, UploadReader

log = logging.getLogger("fringegauge")

#: Largest box or target CSV taken (bytes): a few dozen rows of numbers are a few kB.
MAX_CSV_BYTES = 100_000
#: Most boxes (or target patches) one calibration takes: a step wafer has 5-20 steps, a colour target 24-140
#: patches; more rows only make the table unreadable.
MAX_BOXES = 140
#: Colour of the calibration sample's boxes on the photo (none of the tab's other marks uses it).
BOX_COLOUR = "#ffa500"
#: The item kind in the lab library (:data:`library.store.KINDS`).
LIBRARY_KIND = "camera_calibrations"
#: Models offered, labelled for the page (the values are physics.camera's ``model`` names).
MODELS = {f"3x3 matrix + dark offset ({MIN_BOXES['matrix']} boxes or more)": "matrix",
          f"root-polynomial ({MIN_BOXES['root-polynomial']} boxes or more)": "root-polynomial"}
#: Denoising offered before a calibrated map (keys of physics.camera.DENOISE_FILTERS): a median filter keeps
#: a step's edge where it is and removes pixel noise.
DENOISE = {"none": "none", "median 3 x 3 px": "median3", "median 5 x 5 px": "median", "median 7 x 7 px": "median7"}
#: Width of the section (px), the photo column's.
COLUMN_PX = 330
#: Camera RAW file endings the photo reader takes (``physics.imageio.RAW_EXTENSIONS``; none where it reads no RAW).
RAW_TYPES = list(getattr(_imageio, "RAW_EXTENSIONS", ()))
#: Photo files the colour tab's photo drop zone and the flat-field drop zone take, and the words for them.
PHOTO_TYPES = [".jpg", ".jpeg", ".png", ".tif", ".tiff", *RAW_TYPES]
PHOTO_KINDS_TEXT = "JPEG, PNG or TIFF, 8 or 16 bit" + (", or camera RAW / DNG" if RAW_TYPES else "")
#: Fallback label when the page gives no name to a calibration fitted here.
FITTED_HERE = "fitted on this page"

NOT_METROLOGY = ("Colour estimates are not certified metrology: check a calibrated station against an "
                 "instrument (ellipsometer, reflectometer) before trusting its numbers.")


class CameraCalibrationSettings(param.Parameterized):
    """How the photo's colours are read, and what describes the station a calibration belongs to."""

    method = param.Selector(default="quick", objects={"Quick: bare-substrate gains": "quick",
                                                      "Calibrated camera": "calibrated"},
                            doc="Quick: one gain per channel from a bare-substrate box; calibrated: a fitted "
                                "camera calibration.")
    source = param.Selector(default="reference", objects={"Reference sample": "reference",
                                                          "Colour target": "target"},
                            doc="What the calibration photo shows: a sample of known thicknesses or a colour "
                                "target of known CIELAB.")
    model = param.Selector(default="matrix", objects=MODELS, doc="The colour-correction model fitted.")
    camera = param.String(default="", doc="Camera (make, model, serial) the calibration belongs to.")
    lamp = param.String(default="", doc="Lamp or illumination of the station.")
    objective = param.String(default="", doc="Objective or lens of the station.")
    na = param.Number(default=None, allow_None=True, bounds=(0.0, 1.7), doc="Numerical aperture of the objective.")
    denoise = param.Selector(default="none", objects=DENOISE, doc="Edge-preserving filter on the photo before matching.")


# ---------------------------------------------------------------------- CSV files (plain functions)
def _csv_rows(data: bytes, what: str):
    """(row number, cells) of a small CSV, blank and ``#`` lines skipped; refuses what is not UTF-8 text."""
    if len(data) > MAX_CSV_BYTES:
        raise InputError(f"The {what} is {len(data):,} bytes; it may be at most {MAX_CSV_BYTES:,} bytes.")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise InputError(f"The {what} is not UTF-8 text; save it as CSV (comma-separated) text.") from None
    for i, cells in enumerate(csv.reader(io.StringIO(text)), start=1):
        cells = [c.strip() for c in cells]
        if not any(cells) or cells[0].startswith("#"):
            continue
        yield i, cells


def _is_header(cells) -> bool:
    """A first row whose first cell is not a number names the columns."""
    try:
        float(cells[0])
        return False
    except ValueError:
        return True


def parse_box_csv(data: bytes) -> list:
    """Boxes and known thicknesses from a CSV of rows ``x0,y0,x1,y1,thickness_nm`` (a header row is allowed).

    Returns a list of ((x0, y0, x1, y1) whole pixels, thickness nm). Raises InputError naming the first bad
    row: not five numbers, a negative or reversed box, a thickness outside 0-100,000 nm, too many rows.
    """
    out = []
    lo, hi = THICKNESS_LIMITS_NM
    for n, cells in _csv_rows(data, "box file"):
        if not out and _is_header(cells):
            continue
        if len(cells) != 5:
            raise InputError(f"Row {n}: has {len(cells)} value(s); each row is x0,y0,x1,y1,thickness_nm "
                             "(pixels, x right, y down; then the known thickness in nm).")
        try:
            x0, y0, x1, y1, t = (float(c) for c in cells)
        except ValueError:
            raise InputError(f"Row {n}: {', '.join(cells)} is not five numbers; each row is "
                             "x0,y0,x1,y1,thickness_nm.") from None
        if not all(np.isfinite((x0, y0, x1, y1, t))):
            raise InputError(f"Row {n}: every value must be a finite number.")
        if min(x0, y0) < 0 or not (x0 < x1 and y0 < y1):
            raise InputError(f"Row {n}: the box ({x0:g}, {y0:g}) – ({x1:g}, {y1:g}) must have 0 <= x0 < x1 and "
                             "0 <= y0 < y1 (top-left corner first, pixels).")
        if not lo <= t <= hi:
            raise InputError(f"Row {n}: the thickness {t:g} nm is outside {lo:g}-{hi:g} nm.")
        out.append(((int(round(x0)), int(round(y0)), int(round(x1)), int(round(y1))), t))
        if len(out) > MAX_BOXES:
            raise InputError(f"Row {n}: the file has more than {MAX_BOXES} boxes; a calibration takes at most "
                             f"{MAX_BOXES}.")
    if not out:
        raise InputError("The box file holds no rows; give one row x0,y0,x1,y1,thickness_nm per box.")
    return out


# ---------------------------------------------------------------------- the calibration as a library file
def calibration_file_text(calibration, flat=None, name: str = "", note: str = "") -> str:
    """The text of a lab-library camera calibration (see :func:`library.store.validate_camera_calibration`):
    ``calibration.to_dict()`` (which holds the flat field it was fitted with) and its station's fields;
    ``flat`` is a flat field to use with it that it does not hold already."""
    from library.store import CAMERA_CAL_FORMAT, CAMERA_CAL_VERSION

    meta = _metadata(calibration)
    if flat is calibration.flat_field:
        flat = None
    doc = {"format": CAMERA_CAL_FORMAT, "version": CAMERA_CAL_VERSION, "name": name,
           "camera": meta.get("camera", ""), "lamp": meta.get("lamp", ""), "objective": meta.get("objective", ""),
           "na": meta.get("na"), "date": meta.get("date", ""), "note": note,
           "calibration": calibration.to_dict(), "flat_field": None if flat is None else flat.to_dict()}
    try:
        return json.dumps(doc, indent=1, allow_nan=False) + "\n"
    except ValueError:
        raise InputError("The calibration holds a number that is not finite and cannot be saved; fit it again.") \
            from None


def calibration_from_text(text: str):
    """(CameraCalibration, FlatField or None, the file's fields) from a library camera calibration's text; the
    flat field is the file's own, else the calibration's."""
    from library.store import validate_camera_calibration
    from physics import camera

    data = validate_camera_calibration(text)
    cal = camera.CameraCalibration.from_dict(data["calibration"])
    flat = cal.flat_field if data.get("flat_field") is None else camera.FlatField.from_dict(data["flat_field"])
    return cal, flat, data


def _metadata(cal) -> dict:
    """camera, lamp, objective, na, date of a calibration, as the library file names them."""
    return {"camera": cal.camera, "lamp": cal.lamp, "objective": cal.objective, "na": cal.objective_na,
            "date": cal.date}


def photo_decoding_text(photo) -> str:
    """The photo's bit depth and how its values were decoded (``Photo.decoding``), for the page."""
    decoding = getattr(photo, "decoding", "")
    if isinstance(decoding, str) and decoding:
        return decoding
    return f"{photo.bit_depth}-bit {photo.source_format}, sRGB decode"


def _fit_job(kind: str, image, boxes, known, stack, layer, options: dict):
    """The fit run in a worker: ``physics.camera.calibrate_from_reference`` or ``calibrate_from_target``
    (``known``: the boxes' thicknesses, or their patches' CIELAB (N, 3))."""
    from physics import camera

    if kind == "reference":
        return camera.calibrate_from_reference(image, boxes, known, stack, layer, **options)
    return camera.calibrate_from_target(image, boxes, known, **options)


def _decode_flat(data: bytes, progress=None, *, max_pixels: int):
    """(photo, FlatField) of a flat-field photo's bytes; the slow part of its upload, off the event loop."""
    from physics import camera

    photo = load_image(data, max_pixels=max_pixels)
    return photo, camera.flat_field(photo)


class CameraCalibrationPanel:
    """The camera calibration of one :class:`views.inverse.ColourToThickness` section."""

    def __init__(self, section):
        self.sec = section
        self.settings = CameraCalibrationSettings()
        self.boxes: list = []                 # [(x0, y0, x1, y1), ...] pixels of the calibration photo
        self.thickness_fields: list = []      # one Field per box (reference sample)
        self.target = None                    # physics.camera.ColourTarget read from the target CSV (or built in)
        self.target_data = None               # that CSV's bytes (read again under the lamp of the fit), or None
        self.target_name = ""
        self.flat = None                      # FlatField of the uploaded flat-field photo
        self.flat_name = ""
        self.flat_size = None                 # (width, height) of that photo
        self.fitted = None                    # the calibration last fitted here
        self.active = None                    # the calibration maps use (fitted here or loaded)
        self.active_flat = None
        self.active_label = ""
        self.library = None                   # the lab library (library_from_env() when first needed)
        self.quick_part = self.calibrated_part = None      # made by panel()
        self._fit_job = 0
        self._typed: list = []                # thicknesses typed, kept while the table shows target patches
        self._build()

    # ------------------------------------------------------------------ widgets
    def _build(self):
        st = self.settings
        self.method = pn.widgets.RadioButtonGroup.from_param(st.param.method, name="", margin=(2, 5),
                                                             css_classes=["fg-cal-method"])
        self.source = pn.widgets.RadioButtonGroup.from_param(st.param.source, name="", margin=(2, 5),
                                                             css_classes=["fg-cal-source"])
        self.model = pn.widgets.Select.from_param(st.param.model, name="Model", width=COLUMN_PX - 10,
                                                  css_classes=["fg-cal-model"])
        self.camera = pn.widgets.TextInput.from_param(st.param.camera, name="Camera", width=150,
                                                      placeholder="e.g. line-3 scope camera", css_classes=["fg-cal-camera"])
        self.lamp = pn.widgets.TextInput.from_param(st.param.lamp, name="Lamp", width=150, placeholder="e.g. halogen 3200 K",
                                                    css_classes=["fg-cal-lamp"])
        self.objective = pn.widgets.TextInput.from_param(st.param.objective, name="Objective", width=150,
                                                         placeholder="e.g. 5x", css_classes=["fg-cal-objective"])
        self.na = pn.widgets.FloatInput.from_param(st.param.na, name="NA", width=80, step=0.05,
                                                   css_classes=["fg-cal-na"])
        self.denoise = pn.widgets.Select.from_param(st.param.denoise, name="Denoise the photo before the map",
                                                    width=COLUMN_PX - 10, css_classes=["fg-cal-denoise"])
        self.builtin_button = pn.widgets.Button(label="Use the built-in 24-patch chart data", color="light",
                                                width=250, margin=(2, 5))
        self.intro = pn.pane.HTML(
            "<div style='font-size:12px;color:#444'>Once per camera + lamp + optics: photograph a reference sample "
            "of known thicknesses (a step wafer, monitor wafers measured on an instrument) or a colour target, "
            "draw a box on each step or patch, and fit. Then load the calibration onto any later photo taken "
            f"the same way. {NOT_METROLOGY}</div>", width=COLUMN_PX, margin=(0, 5))
        self.photo_info = pn.pane.HTML("", margin=(0, 5), width=COLUMN_PX, styles={"font-size": "12px"},
                                       css_classes=["fg-cal-photo-info"])
        self.howto = pn.pane.HTML("", margin=(0, 5), width=COLUMN_PX, styles={"font-size": "12px"})
        self.box_msg, self.box_reader, self.box_drop = _drop_zone(
            "calibration_boxes", MAX_CSV_BYTES, lambda n, d: self.load_box_csv(d, n), "The box file",
            [".csv", ".txt"], "fg-cal-box-csv")
        self.target_msg, self.target_reader, self.target_drop = _drop_zone(
            "calibration_target", MAX_CSV_BYTES, lambda n, d: self.load_target_csv(d, n), "The target file",
            [".csv", ".txt"], "fg-cal-target-csv")
        self.target_info = pn.pane.HTML("", margin=(0, 5), width=COLUMN_PX, styles={"font-size": "12px"})
        self.rows = pn.Column(margin=0, css_classes=["fg-cal-rows"])
        self.clear_boxes = pn.widgets.Button(label="Remove all boxes", color="light", width=150, margin=(2, 5))
        self.undo_box = pn.widgets.Button(label="Remove the last box", color="light", width=150, margin=(2, 5))
        self.flat_msg, self.flat_reader, self.flat_drop = _drop_zone(
            "flat_field", MAX_PHOTO_BYTES, lambda n, d: self.load_flat(d, n), "The flat-field photo", PHOTO_TYPES,
            "fg-cal-flat")
        self.flat_info = pn.pane.HTML("", margin=(0, 5), width=COLUMN_PX, styles={"font-size": "12px"})
        self.forget_flat = pn.widgets.Button(label="No flat field", color="light", width=120, margin=(2, 5),
                                             visible=False)
        self.fit_button = pn.widgets.Button(label="Fit calibration", color="primary", width=160, margin=(6, 5),
                                            css_classes=["fg-cal-fit"])
        self.fit_msg = pn.pane.HTML("", visible=False, margin=(4, 5), width=COLUMN_PX - 10,
                                    css_classes=["fg-cal-fit-msg"])
        self.fit_kind = "light"               # how the fit message is shown: light (working), danger, success
        self.residuals = pn.pane.HTML("", margin=(0, 5), width=COLUMN_PX, css_classes=["fg-cal-residuals"])
        self.active_info = pn.pane.HTML("", margin=(2, 5), width=COLUMN_PX, styles={"font-size": "12px"},
                                        css_classes=["fg-cal-active"])
        # the lab library
        self.save_name = pn.widgets.TextInput(label="Save under the name", width=200, placeholder="e.g. Line 3 scope, 5x",
                                              css_classes=["fg-cal-save-name"], margin=(2, 5))
        self.save_user = pn.widgets.TextInput(label="Your name or initials", width=110, margin=(2, 5),
                                              css_classes=["fg-cal-save-user"])
        from .library import VERIFIED_AUTH_MODES, auth_mode, login_name
        if auth_mode() in VERIFIED_AUTH_MODES:            # saved under the login, as on the Lab library tab
            self.save_user.param.update(value=login_name() or "", disabled=True, label="Saved under your login")
        self.save_button = pn.widgets.Button(label="Save calibration to library", color="light", width=210,
                                             margin=(4, 5), css_classes=["fg-cal-save"])
        self.picker = pn.widgets.Select(label="Saved calibrations", options={}, width=COLUMN_PX - 10, margin=(2, 5),
                                        css_classes=["fg-cal-picker"])
        self.load_button = pn.widgets.Button(label="Load onto this photo", color="light", width=160, margin=(4, 5),
                                             css_classes=["fg-cal-load"])
        self.list_button = pn.widgets.Button(label="Refresh list", color="light", width=110, margin=(4, 5))
        self.lib_msg = pn.pane.HTML("", margin=(0, 5), width=COLUMN_PX, styles={"font-size": "12px"},
                                    css_classes=["fg-cal-lib-msg"])
        # on the photo: the calibration sample's boxes
        self.box_src = ColumnDataSource(dict(x=[], y=[], w=[], h=[], label=[]))
        pf = self.sec.photo_fig
        pf.rect(x="x", y="y", width="w", height="h", source=self.box_src, fill_alpha=0.0, line_color=BOX_COLOUR,
                line_width=2, line_dash="dashed")
        pf.text(x="x", y="y", text="label", source=self.box_src, text_align="center", text_baseline="middle",
                text_font_size="12px", text_color="black", background_fill_color=BOX_COLOUR,
                background_fill_alpha=0.85)
        # the uncertainty map
        self.unc_src = ColumnDataSource(dict(image=[], x=[], y=[], dw=[], dh=[]))
        self.unc_mapper = LinearColorMapper(palette=Cividis256, low=0, high=1, nan_color="#d9d9d9")
        uf = figure(height=330, sizing_mode="stretch_width", match_aspect=True, tools="pan,wheel_zoom,reset,save",
                    css_classes=["fg-unc-map"], x_range=self.sec.tmap_fig.x_range, y_range=self.sec.tmap_fig.y_range,
                    title="Uncertainty of the thickness (nm), from the colour residual and the colour path's slope")
        img = uf.image(image="image", x="x", y="y", dw="dw", dh="dh", source=self.unc_src, color_mapper=self.unc_mapper)
        uf.add_tools(HoverTool(renderers=[img], tooltips=[("x, y", "$x{0}, $y{0} px"), ("uncertainty", "± @image{0.0} nm")]))
        uf.add_layout(ColorBar(color_mapper=self.unc_mapper, title="nm", width=12), "right")
        RangeHolder(uf)
        self.unc_fig = uf
        self.unc_note = pn.pane.HTML("", margin=(5, 5), width=300, styles={"font-size": "12px"})
        self.unc_row = pn.Row(pn.pane.Bokeh(uf, sizing_mode="stretch_width"), self.unc_note, visible=False,
                              sizing_mode="stretch_width")
        # The calibration's widgets and the uncertainty figure (about 120 Bokeh models) join the page only when
        # first needed, so a tab that never uses them costs the event loop nothing more when it opens.
        self.calibrated_holder = pn.Column(margin=0)
        self.unc_holder = pn.Column(margin=0, sizing_mode="stretch_width")

        st.param.watch(_locked_call(lambda *e: self._show_parts()), "method")
        st.param.watch(_locked_call(lambda *e: self._source_changed()), "source")
        self.clear_boxes.on_click(_locked_call(lambda e: self.remove_boxes()))
        self.undo_box.on_click(_locked_call(lambda e: self.remove_boxes(last=True)))
        self.forget_flat.on_click(_locked_call(lambda e: self.drop_flat()))
        self.fit_button.on_click(_locked_call(lambda e: self.fit()))
        self.builtin_button.on_click(_locked_call(lambda e: self.use_builtin_target()))
        self.save_button.on_click(_locked_call(lambda e: self.save()))
        self.load_button.on_click(_locked_call(lambda e: self.load_selected()))
        self.list_button.on_click(_locked_call(lambda e: self.refresh_list(say=True)))
        self._show_parts()
        self._show_active()

    # ------------------------------------------------------------------ what is shown
    def calibrated(self) -> bool:
        return self.settings.method == "calibrated"

    def _show_parts(self):
        cal, ref = self.calibrated(), self.settings.source == "reference"
        if self.calibrated_part is not None:
            self.calibrated_part.visible = cal
            if cal and not self.calibrated_holder.objects:
                self.calibrated_holder.objects = [self.calibrated_part]
                self.refresh_list()                      # the library's calibrations, read when first needed
        if self.quick_part is not None:
            self.quick_part.visible = not cal
        self.box_drop.visible = self.box_msg.message.visible = ref
        self.target_drop.visible = self.target_info.visible = self.builtin_button.visible = not ref
        mode = "“calibration sample boxes” under “Dragging or tapping on the photo sets”"
        self.howto.object = (
            f"Open the photo of the reference sample, choose {mode} and drag a box on each step; type each box's "
            "known thickness below. Or drop a CSV of rows <code>x0,y0,x1,y1,thickness_nm</code>:" if ref else
            "Drop the target's CSV (rows <code>patch,L*,a*,b*</code>), open its photo, choose "
            f"{mode} and drag a box on each patch in the CSV's order.")
        if cal and self.sec.photo is not None and self.sec.mode.value == "calib" and not self.boxes:
            self.sec.mode.value = "refbox"
        self._draw()

    def _source_changed(self):
        """Reference sample ↔ colour target: the table shows thicknesses or patches; typed thicknesses are kept."""
        if self.thickness_fields:
            self._typed = [f.input.value for f in self.thickness_fields]
        self._rebuild_rows()
        self._stale_fit()
        self._show_parts()

    def _draw(self):
        data = dict(x=[], y=[], w=[], h=[], label=[])
        show = self.calibrated()
        for i, (x0, y0, x1, y1) in enumerate(self.boxes if show else []):
            data["x"].append((x0 + x1) / 2)
            data["y"].append((y0 + y1) / 2)
            data["w"].append(x1 - x0)
            data["h"].append(y1 - y0)
            data["label"].append(str(i + 1))
        self.box_src.data = data

    def _rebuild_rows(self):
        """One row per box: its number and pixels, and (reference sample) its known thickness or (target) its
        patch."""
        ref = self.settings.source == "reference"
        old = [f.input.value for f in self.thickness_fields] or self._typed
        self.thickness_fields = []
        rows = []
        for i, (x0, y0, x1, y1) in enumerate(self.boxes):
            where = pn.pane.HTML(f"<b>{i + 1}</b> &nbsp;({x0}, {y0}) – ({x1}, {y1})", width=150, margin=(8, 5, 0, 5),
                                 styles={"font-size": "12px"})
            if ref:
                f = Field("", width=110, placeholder="thickness nm", css=f"fg-cal-t{i + 1}")
                f.input.stylesheets = [":host { margin-top: 0; }"]
                if i < len(old):
                    f.set_text(old[i])
                f.message.width = COLUMN_PX - 10
                self.thickness_fields.append(f)
                rows.append(pn.Column(pn.Row(where, f.input, margin=0), f.message, margin=0))
            else:
                t = self.target
                patch = (f"patch {_esc(t.names[i])}: L*a*b* {', '.join(f'{v:.1f}' for v in t.lab[i])}"
                         if t is not None and i < len(t.names) else
                         "<span style='color:#b00'>no patch in the target data</span>")
                rows.append(pn.Row(where, pn.pane.HTML(patch, margin=(8, 5, 0, 5), styles={"font-size": "12px"}),
                                   margin=0))
        if rows:
            head = ("box (x0, y0) – (x1, y1) px &nbsp;·&nbsp; known thickness (nm)" if ref
                    else "box (x0, y0) – (x1, y1) px &nbsp;·&nbsp; target patch")
            rows.insert(0, pn.pane.HTML(f"<div style='font-size:11px;color:#555'>{head}</div>", margin=(2, 5, 0, 5)))
        self.rows.objects = rows
        self.clear_boxes.visible = self.undo_box.visible = bool(self.boxes)

    def photo_changed(self):
        """A new photo is on the page: say its bit depth and decoding; boxes stay (a second photo of the same
        sample) and are checked against the photo when fitting."""
        photo = self.sec.photo
        self.photo_info.object = "" if photo is None else f"This photo: {_esc(photo_decoding_text(photo))}."
        if self.calibrated() and self.sec.mode.value == "calib":
            self.sec.mode.value = "refbox"
        self._draw()
        self._show_active()

    # ------------------------------------------------------------------ boxes
    def add_box(self, box) -> bool:
        """A box dragged on the photo in "calibration sample boxes" mode (pixels x0, y0, x1, y1)."""
        photo = self.sec.photo
        if photo is None:
            return False
        x0, y0, x1, y1 = (int(round(v)) for v in box)
        x0, x1 = sorted((min(max(x0, 0), photo.width), min(max(x1, 0), photo.width)))
        y0, y1 = sorted((min(max(y0, 0), photo.height), min(max(y1, 0), photo.height)))
        if x1 - x0 < 2 or y1 - y0 < 2:
            self.box_msg.show_error("The box is empty or outside the photo; drag a box of a few pixels on one "
                                    "step of the sample (or one patch of the target).")
            return False
        if len(self.boxes) >= MAX_BOXES:
            self.box_msg.show_error(f"A calibration takes at most {MAX_BOXES} boxes; remove some first.")
            return False
        self.box_msg.show_error(None)
        if not self.calibrated():
            self.settings.method = "calibrated"
        self.boxes.append((x0, y0, x1, y1))
        self._rebuild_rows()
        self._draw()
        self._stale_fit()
        return True

    def remove_boxes(self, last: bool = False):
        self.boxes = self.boxes[:-1] if last else []
        if not last:
            self.thickness_fields, self._typed = [], []
        self._rebuild_rows()
        self._draw()
        self._stale_fit()

    def set_boxes(self, boxes, thicknesses=None):
        """Replace the boxes (and, for a reference sample, their known thicknesses in nm)."""
        self.boxes = [tuple(int(v) for v in b) for b in boxes]
        self.thickness_fields, self._typed = [], []
        self._rebuild_rows()
        for f, t in zip(self.thickness_fields, thicknesses or []):
            f.set_text(_fmt(float(t), 3))
        self._draw()
        self._stale_fit()

    def load_box_csv(self, data: bytes, name: str = "boxes.csv") -> bool:
        """Boxes and thicknesses from a CSV (x0,y0,x1,y1,thickness_nm); a bad row is refused by its number and
        the boxes already on the page stay."""
        def apply(rows):
            self.settings.source, self.settings.method = "reference", "calibrated"
            self.set_boxes([b for b, _ in rows], [t for _, t in rows])
            self.box_msg.show_error(None)
            self.box_msg.message.object = (f"<div style='font-size:12px'>{_esc(name)}: {len(rows)} box(es) read."
                                           "</div>")
            self.box_msg.message.visible = True
            return True
        return self.box_reader.take(name, data, MAX_CSV_BYTES, lambda d, progress=None: parse_box_csv(d), apply)

    def load_target_csv(self, data: bytes, name: str = "target.csv") -> bool:
        """A colour target's data (``physics.camera.read_target``: patch,L*,a*,b* or reflectance spectra); a bad
        row is refused by its number and nothing else changes."""
        s = self.sec.ex.state

        def parse(d, progress=None):
            from physics import camera
            return camera.read_target(d, illuminant=_lamp_name(s), observer=s.observer)

        def apply(target):
            self.set_target(target, name, data)
            self.target_msg.show_error(None)
            return True
        return self.target_reader.take(name, data, MAX_CSV_BYTES, parse, apply)

    def use_builtin_target(self) -> bool:
        """colour-science's averaged 24-patch chart data as the target (``physics.camera.builtin_target``)."""
        from physics import camera
        s = self.sec.ex.state
        try:
            target = camera.builtin_target(illuminant=_lamp_name(s), observer=s.observer)
        except InputError as exc:
            self.target_msg.show_error(str(exc))
            return False
        self.set_target(target, "built-in 24-patch chart (average of many charts)", None)
        return True

    def set_target(self, target, name: str, data) -> None:
        self.target, self.target_name, self.target_data = target, name, data
        self.settings.source, self.settings.method = "target", "calibrated"
        self._rebuild_rows()
        self._stale_fit()
        self.target_info.object = (f"{_esc(name)}: {len(target.names)} patches ({_esc(target.source)}), first "
                                   f"{_esc(target.names[0])}. Draw a box on each patch in this order.")

    # ------------------------------------------------------------------ flat field
    def load_flat(self, data: bytes, name: str = "flat.png") -> bool:
        """A photo of a uniform bare substrate, taken like the others: its smoothed fall-off is divided out."""
        max_pixels = int(Limits.from_env().max_photo_megapixels * 1e6)

        def apply(decoded):
            photo, flat = decoded
            self.flat, self.flat_name, self.flat_size = flat, name, (photo.width, photo.height)
            self.flat_msg.show_error(None)
            self.flat_info.object = (f"Flat field: {_esc(name)}, {photo.width} x {photo.height} px "
                                     f"({_esc(photo_decoding_text(photo))}); used by the next fit.")
            self.forget_flat.visible = True
            self._stale_fit()
            return True
        return self.flat_reader.take(name, data, MAX_PHOTO_BYTES, partial(_decode_flat, max_pixels=max_pixels), apply)

    def drop_flat(self):
        self.flat, self.flat_name, self.flat_size = None, "", None
        self.flat_info.object = "No flat field: the lamp's fall-off across the field is not corrected."
        self.forget_flat.visible = False
        self._stale_fit()

    # ------------------------------------------------------------------ fit
    def _stale_fit(self):
        """The boxes or their inputs changed: the residuals shown belong to the previous fit."""
        if self.residuals.object:
            self.residuals.object = ("<div style='font-size:11px;color:#8a4b00'>The boxes changed since this fit; "
                                     "press “Fit calibration” again.</div>" + self.residuals.object.split("</div>", 1)[-1]
                                     if "changed since" not in self.residuals.object else self.residuals.object)

    def _fit_inputs(self):
        """(kind, boxes, known values) checked against the open photo; InputError with a sentence otherwise."""
        photo = self.sec.photo
        if photo is None:
            raise InputError("Open the photo of the reference sample (or target) first, then draw its boxes.")
        if not self.boxes:
            raise InputError("There are no boxes: choose “calibration sample boxes” and drag a box on each step "
                             "of the sample (or each patch of the target), or drop a box CSV.")
        for i, (x0, y0, x1, y1) in enumerate(self.boxes):
            if x1 > photo.width or y1 > photo.height:
                raise InputError(f"Box {i + 1} ({x0}, {y0}) – ({x1}, {y1}) lies outside this photo "
                                 f"({photo.width} x {photo.height} px): it was drawn on another photo. Remove it or "
                                 "open the photo the boxes belong to.")
        if self.flat is not None and self.flat_size is not None and self.flat_size != (photo.width, photo.height):
            raise InputError(f"The flat field ({self.flat_name}, {self.flat_size[0]} x {self.flat_size[1]} px) is not "
                             f"the size of this photo ({photo.width} x {photo.height} px); take both with the same "
                             "camera setting, or press “No flat field”.")
        if self.settings.source == "target":
            if self.target is None:
                raise InputError("Drop the target's data (a CSV of patch,L*,a*,b*) first, or use the built-in chart: "
                                 "each box is matched to its patch in order.")
            n = len(self.target.names)
            if len(self.boxes) > n:
                raise InputError(f"There are {len(self.boxes)} boxes but the target data list {n} patches: box {n + 1} "
                                 "has no patch. Remove the extra boxes, or give target data with every patch.")
            from physics import camera
            s = self.sec.ex.state
            target = self.target if self.target_data is None else camera.read_target(
                self.target_data, illuminant=_lamp_name(s), observer=s.observer)      # under the lamp of now
            return "target", list(self.boxes), target.lab[:len(self.boxes)]
        lo, hi = self.sec._window()
        known, bad = [], None
        for i, f in enumerate(self.thickness_fields):
            try:
                t = parse_number(f.input.value, f"Box {i + 1} thickness", *THICKNESS_LIMITS_NM, "nm")
            except InputError as exc:
                f.show_error(str(exc) if f.input.value.strip() else f"Box {i + 1}: type its known thickness in nm.")
                bad = bad or f"Box {i + 1}: type its known thickness in nm (a number)."
                continue
            if not lo <= t <= hi:
                msg = (f"Box {i + 1}: its known thickness {t:g} nm is outside the search window {lo:g}-{hi:g} nm; "
                       "widen the window (Window from / to, above) or correct the thickness.")
                f.show_error(msg)
                bad = bad or msg
                continue
            f.show_error(None)
            known.append(t)
        if bad:
            raise InputError(bad)
        return "reference", list(self.boxes), known

    def fit(self, sync: bool = False):
        """Fit a calibration to the boxes (off the event loop when served); shows residuals or why not."""
        from .inverse import _Stop
        try:
            kind, boxes, known = self._fit_inputs()
        except InputError as exc:
            return self._fit_done(None, f"Not fitted: {exc}")
        except _Stop:                                    # the window field says why beside it
            return self._fit_done(None, "Not fitted: fix the search window above (its message says how).")
        s = self.sec.ex._snapshot()
        options = dict(illuminant=s.illuminant_spec(), observer=s.observer, model=self.settings.model,
                       flat_field=self.flat, **self.metadata())
        if kind == "reference":
            options.update(angle_deg=s.angle_deg, polarization=s.polarization, na=s.na, window_nm=self.sec._window())
        args = (kind, self.sec.photo, boxes, known, s.stack, s.swept_layer, options)
        self._fit_job += 1
        job = self._fit_job
        self.fit_button.disabled = True
        self._say_fit("Fitting …", "light")
        doc = pn.state.curdoc
        size = self.sec.photo.width * self.sec.photo.height
        session = session_key(self.sec.ex)
        if sync or not served(doc):
            try:
                with heavy_job("camera_calibration", size, session):
                    result = _fit_job(*args), None
            except InputError as exc:
                result = None, str(exc)
            return self._fit_done(*result, job=job, kind=kind, known=known)

        async def run():
            limits = Limits.from_env()
            try:
                with heavy_job("camera_calibration", size, session, limits):
                    result = await workers.run_in_worker(limits.max_jobs_server, _fit_job, *args), None
            except InputError as exc:
                result = None, str(exc)
            except JobCancelled:
                return
            except workers.WorkerLost as exc:
                result = None, str(exc)
            except Exception:  # never lose the session to one failed fit
                log.exception("camera calibration fit failed")
                result = None, "The fit failed unexpectedly; the server log has the details."
            post_to_page(doc, partial(self._fit_done, *result, job=job, kind=kind, known=known))
        pn.state.execute(run)
        return None

    def _fit_done(self, cal, error, job=None, kind="reference", known=()):
        if job is not None and job != self._fit_job:
            return None
        self.fit_button.disabled = False
        if error:
            text = error if error.startswith("Not fitted") else f"Not fitted: {error}"
            self._say_fit(text + (" The calibration in use is unchanged." if self.active else ""), "danger")
            return None
        self.fitted = cal
        self.residuals.object = residual_table(cal, kind, known, self.target.names if self.target else ())
        de = np.asarray(getattr(cal, "residual_delta_e", []), dtype=float)
        worst = f"; worst box ΔE00 {np.nanmax(de):.2f}" if de.size else ""
        self._say_fit(f"Fitted: {cal.message or f'{len(self.boxes)} boxes{worst}.'} It is now used for maps of this "
                      "photo and later ones of the same size; save it to the library to keep it.", "success")
        self.use(cal, cal.flat_field, f"{FITTED_HERE} ({self.sec.photo_name})")
        return cal

    def _say_fit(self, text: str, kind: str) -> None:
        """The fit's outcome as a sentence in a coloured box (wrapped inside the column)."""
        colours = {"light": ("#f4f4f4", "#333"), "danger": ("#f8d7da", "#721c24"), "success": ("#d4edda", "#155724")}
        bg, fg = colours[kind]
        self.fit_kind = kind
        self.fit_msg.object = (f"<div role='status' style='background:{bg};color:{fg};border-radius:4px;padding:6px 8px;"
                               f"font-size:13px;overflow-wrap:anywhere'>{_esc(text)}</div>")
        self.fit_msg.visible = True

    def metadata(self) -> dict:
        """The station's fields as ``physics.camera`` takes them; the date is today's (UTC)."""
        st = self.settings
        return {"camera": st.camera.strip(), "lamp": st.lamp.strip(), "objective": st.objective.strip(),
                "objective_na": st.na, "date": datetime.now(timezone.utc).date().isoformat()}

    # ------------------------------------------------------------------ the calibration in use
    def use(self, cal, flat, label: str):
        """Make ``cal`` (with the flat field ``flat``, or None) the calibration of the next maps."""
        self.active, self.active_flat, self.active_label = cal, flat, label
        self.settings.method = "calibrated"
        reading = self.sec.reading
        if reading.reading == "uncalibrated camera":         # the colours now come from a calibrated camera
            reading.reading = "calibrated camera"
            self.sec.pick_info.object = (f"Colour read set to “calibrated camera” (reading error ΔE00 "
                                         f"{reading.reading_error_de:g}): a camera calibration is in use.")
        self._show_active()

    def _size_refusal(self):
        """A sentence when the calibration in use was made on a photo of another size than the open one."""
        photo = self.sec.photo
        if self.active is None or photo is None or self.active.image_size == (photo.width, photo.height):
            return None
        w, h = self.active.image_size
        return (f"The calibration in use was made on a {w} x {h} px photo and this photo is {photo.width} x "
                f"{photo.height} px: use photos taken with the same camera, resolution and crop as the calibration, "
                "or fit a calibration on a photo of this size.")

    def _show_active(self):
        if self.active is None:
            self.active_info.object = ("<i>No camera calibration in use yet: fit one here or load one from the lab "
                                       "library.</i>" if self.calibrated() else "")
            return
        m = _metadata(self.active)
        station = ", ".join(v for v in (m["camera"], m["lamp"], m["objective"]) if v)
        na = f", NA {m['na']:g}" if isinstance(m["na"], (int, float)) else ""
        flat = "with a flat field" if self.active_flat is not None else "no flat field"
        w, h = self.active.image_size
        refusal = self._size_refusal()
        warn = f"<br><span style='color:#b00'>{_esc(refusal)}</span>" if refusal else ""
        self.active_info.object = (f"<b>In use:</b> {_esc(self.active_label)}"
                                   + (f" — {_esc(station)}{na}" if station or na else "")
                                   + (f", {_esc(m['date'])}" if m["date"] else "")
                                   + f"; {_esc(self.active.model)}, lamp {_esc(self.active.illuminant)}, {w} x {h} px, "
                                     f"{flat}; ΔE00 {self.active.rms_delta_e:.2f} RMS over its boxes.{warn}")

    def map_arguments(self) -> dict:
        """Extra arguments of ``thickness_map`` for the photo on the page: none for the quick gains, else the
        calibration and its flat field. Raises InputError (a sentence) when a calibrated map cannot be made."""
        if not self.calibrated():
            return {}
        if self.active is None:
            raise InputError("“Calibrated camera” is chosen but no calibration is in use: fit one from a reference "
                             "sample or target, load one from the library, or choose “Quick: bare-substrate gains”.")
        refusal = self._size_refusal()
        if refusal:
            raise InputError(refusal)
        denoise = None if self.settings.denoise == "none" else self.settings.denoise
        return {"calibration": self.active, "flat_field": self.active_flat, "denoise": denoise}

    def box_lab(self, box):
        """Mean CIELAB of a box of the open photo through the calibration in use (and its flat field), or None
        when the quick gains are chosen. InputError (a sentence) when it cannot be used on this photo."""
        args = self.map_arguments()
        if not args:
            return None
        cal, flat = args["calibration"], args["flat_field"]
        lab = cal.lab_from_linear(self.sec.photo.linear_rgb(box), flat, box if flat is not None else None)
        return np.asarray(lab, dtype=float).reshape(-1, 3).mean(axis=0)

    # ------------------------------------------------------------------ the map's uncertainty
    def show_map(self, result, step: int) -> list:
        """Draw the map's uncertainty (when it has one); returns rows for the statistics table."""
        u = getattr(result, "uncertainty_nm", None)
        if u is None:
            self.unc_src.data = dict(image=[], x=[], y=[], dw=[], dh=[])
            self.unc_row.visible = False
            return []
        u = np.asarray(u, dtype=float)
        H, W = u.shape
        finite = u[np.isfinite(u)]
        self.unc_src.data = dict(image=[u[::step, ::step]], x=[0], y=[0], dw=[W], dh=[H])
        if finite.size:
            lo, hi = float(np.percentile(finite, 1)), float(np.percentile(finite, 99))
            self.unc_mapper.update(low=lo, high=max(hi, lo + 1e-3))
            p50, p95 = float(np.median(finite)), float(np.percentile(finite, 95))
        else:
            p50 = p95 = float("nan")
        self.unc_note.object = (f"Each pixel's thickness ± (nm) from its colour residual and how many nm one ΔE00 "
                                f"is on the colour path there: median ± {p50:.1f} nm, 95 % of pixels within ± "
                                f"{p95:.1f} nm. Grey: no match. {NOT_METROLOGY}")
        self.unc_row.visible = True
        if not self.unc_holder.objects:
            self.unc_holder.objects = [self.unc_row]
        read = (f"camera calibration {self.active_label} (the box's gains are not used)"
                if result.stats.get("calibrated") else "the calibration box's gains (quick)")
        return [("uncertainty (median, P95)", f"± {p50:.1f} nm, ± {p95:.1f} nm"), ("colour read with", _esc(read))]

    # ------------------------------------------------------------------ the lab library
    def _library(self):
        if self.library is None:
            from .library import library_from_env
            self.library = library_from_env()
        return self.library

    def file_text(self, name: str, note: str = "") -> str:
        """The calibration in use as the text of a lab-library item; InputError when there is none."""
        if self.active is None:
            raise InputError("There is no camera calibration to save: fit one on the Colour → thickness tab "
                             "(Calibrated camera) first.")
        typed = {k: v for k, v in self.metadata().items() if v not in ("", None) and k != "date"}
        cal = self.active.with_metadata(**typed) if typed else self.active          # typed after the fit
        return calibration_file_text(cal, self.active_flat, name, note)

    def apply_text(self, text: str, label: str = "") -> None:
        """Use a library camera calibration's text on the page; InputError (a sentence) when it is unusable."""
        cal, flat, data = calibration_from_text(text)
        st = self.settings
        st.camera, st.lamp, st.objective = data.get("camera", ""), data.get("lamp", ""), data.get("objective", "")
        st.na = data.get("na")
        self.use(cal, flat, label or data.get("name") or "from the lab library")
        self.photo_changed()

    def _saver(self):
        from .library import VERIFIED_AUTH_MODES, auth_mode, login_name
        if auth_mode() in VERIFIED_AUTH_MODES:
            return login_name(), True
        return self.save_user.value.strip(), False

    def save(self) -> bool:
        """Save the calibration in use under the typed name (a taken name becomes its next version)."""
        from library.store import LibraryKeyError, LibraryWriteError, error_text
        name = self.save_name.value.strip()
        user, verified = self._saver()
        if not name or not user:
            self._lib_say("Not saved: type " + " and ".join(w for w, ok in (("a name to save under", name),
                                                                            ("your name or initials", user)) if not ok)
                          + ".", "#b00")
            return False
        try:
            text = self.file_text(name)
            result = self._library().save(LIBRARY_KIND, name, text, user=user, user_verified=verified,
                                          note=_station_note(self.settings))
        except (LibraryWriteError, LibraryKeyError) as exc:
            self._lib_say(f"Not saved: {error_text(exc)}", "#b00")
            return False
        except InputError as exc:
            self._lib_say(f"Not saved: {exc}", "#b00")
            return False
        self.active_label = f"{result.name if hasattr(result, 'name') else name} v{result.version}"
        self._show_active()
        self.refresh_list()
        self._lib_say(result.message, "#2a6a2a")
        return True

    def refresh_list(self, say: bool = False) -> None:
        """Read the library's camera calibrations into the picker; skipped (corrupt, hand-made) files are counted."""
        from library.store import error_text
        try:
            entries, problems = self._library().list_with_problems(LIBRARY_KIND)
        except (InputError, OSError) as exc:
            self.picker.options = {}
            self._lib_say(f"The lab library cannot be read: {error_text(exc)}", "#b00")
            return
        entries = sorted(entries, key=lambda e: (e.saved_at, e.name, e.version), reverse=True)
        self.picker.options = {f"{e.name} · v{e.version} · {e.saved_by} · {e.saved_at[:10]}": (e.name, e.version)
                               for e in entries}
        self.load_button.disabled = not entries
        skipped = (f" {len(problems)} file(s) in the folder were skipped (corrupt, hand-made or not written by this "
                   "server); the Lab library tab lists why." if problems else "")
        if say or problems or not entries:
            self._lib_say((f"{len(entries)} saved calibration(s)." if entries else
                           "No camera calibration is saved in the lab library yet.") + skipped,
                          "#8a4b00" if problems else "#444")

    def load_selected(self) -> bool:
        """Load the calibration chosen in the picker onto the page; a corrupt one is a sentence, nothing changes."""
        from library.store import error_text
        choice = self.picker.value
        if not choice:
            self._lib_say("Nothing loaded: choose a saved calibration first (Refresh list if it is empty).", "#b00")
            return False
        name, version = choice
        try:
            text = self._library().load(LIBRARY_KIND, name, version)
            self.apply_text(text, f"{name} v{version}")
        except (InputError, OSError) as exc:
            self._lib_say(f"Could not load {name} v{version}: {error_text(exc)} The calibration in use is unchanged.",
                          "#b00")
            return False
        self._lib_say(f"Loaded {name} v{version}: the next map uses it.", "#2a6a2a")
        return True

    def _lib_say(self, text: str, colour: str) -> None:
        self.lib_msg.object = f"<div style='color:{colour}'>{_esc(text)}</div>"

    # ------------------------------------------------------------------ layout
    def panel(self, quick):
        """The section: the choice of method, ``quick`` (the bare-substrate box's widgets) and the calibration."""
        self.quick_part = quick
        self.calibrated_part = pn.Column(
            self.intro, _label("Calibrate from"), self.source, self.howto, self.box_drop,
            self.box_msg.message, self.target_drop, self.builtin_button, self.target_msg.message, self.target_info,
            self.rows,
            pn.Row(self.undo_box, self.clear_boxes, margin=0), self.model,
            _label("Flat field (optional): a photo of a uniform bare substrate"), self.flat_drop, self.flat_msg.message,
            pn.Row(self.flat_info, self.forget_flat, margin=0),
            _label("The station (saved with the calibration; the date is added)"),
            pn.Row(self.camera, self.lamp, margin=0), pn.Row(self.objective, self.na, margin=0),
            self.fit_button, self.fit_msg, self.residuals, self.active_info, self.denoise,
            _label("Lab library"), pn.Row(self.save_name, self.save_user, margin=0), self.save_button,
            self.picker, pn.Row(self.load_button, self.list_button, margin=0), self.lib_msg,
            margin=0, width=COLUMN_PX + 10, css_classes=["fg-cal-section"])
        self._show_parts()
        return pn.Column(pn.pane.HTML("<b>Camera calibration</b>", margin=(6, 5, 0, 5)), self.photo_info, self.method,
                         quick,
                         self.calibrated_holder, margin=0, css_classes=["fg-camera-calibration"])


def residual_table(cal, kind: str, known, patches=()) -> str:
    """HTML table of a calibration's residual per box: ΔE00, ΔE00 of the box predicted from the other boxes
    (when the calibration has it) and, for a reference sample, the map's thickness minus the known one."""
    de = np.asarray(cal.residual_delta_e, dtype=float).ravel()
    held = np.asarray(getattr(cal, "holdout_delta_e", ()), dtype=float).ravel()
    nm = np.asarray(cal.residual_nm, dtype=float).ravel() if kind == "reference" else np.zeros(0)
    cols = ["box", "known (nm)" if kind == "reference" else "patch", "ΔE00"]
    cols += ["ΔE00 left out"] * (held.size == de.size) + ["map − known (nm)"] * (nm.size == de.size)
    body = ""
    for i, d in enumerate(de):
        cells = [str(i + 1), f"{known[i]:g}" if kind == "reference" and i < len(known) else
                 _esc(patches[i]) if i < len(patches) else "", f"{d:.2f}"]
        if held.size == de.size:
            cells.append(f"{held[i]:.2f}")
        if nm.size == de.size:
            cells.append(f"{round(float(nm[i]), 1) + 0.0:+.1f}" if np.isfinite(nm[i]) else "—")
        body += "<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>"
    head = "<tr>" + "".join(f"<th>{c}</th>" for c in cols) + "</tr>"
    return ("<div style='font-size:11px;color:#555'>Residual per box after the fit (ΔE00 ≤ 2: hard to see, common "
            "practice; “left out”: the box predicted by a fit to the other boxes)</div>"
            "<table class='fg-cal-residual-table' style='font-size:12px;border-collapse:collapse' "
            f"cellpadding='2'>{head}{body}</table>")


def _lamp_name(state):
    """The lamp a calibration is made for: the explorer's illuminant as physics.camera takes it (a name; a
    halogen or custom lamp is a spectrum, which physics.camera refuses with a sentence)."""
    return state.illuminant_spec()


def _station_note(st) -> str:
    parts = [p for p in (st.camera.strip(), st.lamp.strip(), st.objective.strip()) if p]
    if st.na is not None:
        parts.append(f"NA {st.na:g}")
    return ", ".join(parts)[:400]


def _drop_zone(kind: str, cap: int, on_file, what: str, types, css: str):
    """(message field, reader, one-line drop zone) for one kind of file of the section."""
    field = Field("")
    field.message.width = COLUMN_PX - 10
    reader = UploadReader(field, kind)
    drop = CappedDropper(cap, _locked_call(on_file), _locked_call(reader.refuse), what=what, accepted_filetypes=types,
                         css_classes=[css], **{**COMPACT, "width": COLUMN_PX - 10})
    return field, reader, drop


def _locked_call(handler):
    """``views.inverse.locked`` (imported late: that module imports this one)."""
    def run(*args, **kwargs):
        from .inverse import locked
        return locked(handler)(*args, **kwargs)
    return run
