"""The grating section of the page: orders and angles, dispersion and resolution, line shape,
colours seen at each viewing angle, and spectrometer planning.

Every number shown comes from :mod:`physics.grating`; this module only chooses what to
evaluate and draws it. Convention (shown on the page): m·λ = d·(sin α + sin β), angles from
the grating normal, positive on the side of the incident beam. Typed values are checked
against :data:`physics.gratingfile.LIMITS`; a rejected value shows its message beside the
field and the section keeps its last good settings. Everything but the colour map is computed
at once (a few milliseconds); the colour map, which depends only on the incidence, the
grooves and the lamp (not on the groove density), runs in the shared thread pool when served.
"""

from __future__ import annotations

import asyncio
import csv
import functools
import io
import logging
import time
from dataclasses import dataclass, replace
from datetime import date
from functools import partial

import numpy as np
import panel as pn
import param
from bokeh.models import Arrow, ColumnDataSource, DataRange1d, HoverTool, Range1d, Span, VeeHead
from bokeh.plotting import figure
from PIL import Image

from physics import InputError
from physics import grating as gr
from physics.color import srgb_to_hex
from physics import gratingfile as gf_rigorous
from physics.gratingfile import (LIMITS, GratingFile, dump_grating_file, list_grating_presets, load_grating_file,
                                load_grating_preset)

from . import render
from .explorer import Field, _esc, _fmt, _label, _rgba, _rule, field_pair
from .figures import RangeHolder
from .inverse import _locked
from . import workers
from .limits import (JobCancelled, Limits, check_grid_points, heavy_job, interactive_executor, post_to_page,
                     served, session_key)
from .state import parse_number

log = logging.getLogger("fringegauge")

DEFAULT_PRESET = "compact_spectrometer_1200_blazed"
CAUTION = ("**Caution.** Never look at a laser or the sun along a diffracted order; diffracted laser beams "
           "remain hazardous. Follow your site's laser-safety rules and local codes. Grating colours shown "
           "here are approximate (scalar groove efficiency, one lamp, display colours).")
CONVENTION = ("m·λ = d·(sin α + sin β): α incidence, β diffraction, both from the grating normal and "
              "positive on the side the light comes from; d = 1/(groove density). β = −α is the zero order.")
#: Lamps offered for the grating colours.
ILLUMINANT_CHOICES = ("D65", "D50", "A", "F2", "F11")
#: Wavelengths the source is taken to emit by default when other orders are checked for overlap (nm):
#: a broadband lamp seen by a silicon detector (common practice: silicon responds from the deep UV
#: to about 1100 nm). The user can type another band.
DEFAULT_SOURCE_BAND_NM = (200.0, 1100.0)
#: Viewing angles of the colour strip and map (degrees).
VIEW_DEG = np.linspace(-80.0, 80.0, 321)
#: Rows of the colour map (groove densities); 116 rows over 100-2400 lines/mm is a 20 lines/mm step.
MAP_ROWS = 116
#: Top of the colour map's groove-density axis (lines/mm): the smallest of these that holds the current
#: density, so the map follows the grating without being recomputed for every typed density.
MAP_TOPS_LINES_PER_MM = (2400.0, 4800.0, LIMITS["lines_per_mm"][1])
#: Bottom of the map's density axis (lines/mm), or the lowest density allowed when the grating is coarser.
MAP_BOTTOM_LINES_PER_MM = 100.0
#: Wavelength steps offered for the orders CSV (nm): the smallest giving at most CSV_MAX_STEPS steps
#: across the band.
CSV_STEPS_NM = (0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0, 200.0, 500.0, 1000.0)
CSV_MAX_STEPS = 60
#: Rays drawn per order in the fan (evenly spaced wavelengths across the band).
FAN_RAYS = 31
#: Highest |order| drawn in the fan (coarse gratings send hundreds of orders).
MAX_FAN_ORDER = 12
#: Brightness of the grating colours: relative brightness kept (the brightest direction of the strip, or of
#: the map, at full display brightness), or every direction at full brightness (hues of faint orders).
BRIGHTNESS_CHOICES = {"relative brightness": "common", "each direction at full brightness": "per_direction"}
#: Height of the colour strip in its PNG download (px); its width is the colour map's plot width.
STRIP_PNG_HEIGHT_PX = 120
#: Grooves lit in the line-shape view (a small N makes the secondary maxima visible).
N_CHOICES = (8, 40)
#: Points along the line-shape curve (more, up to the second number, when many fringes are in view).
LINE_SHAPE_POINTS = 3001
LINE_SHAPE_MAX_POINTS = 20001
#: Lowest level of the line shape on the logarithmic scale (dB).
LOG_FLOOR_DB = -60.0
#: Orders either side of the order of interest in the line-shape view.
LINE_SHAPE_ORDERS = 3
#: Grey for wavelengths outside 380-780 nm (no display colour).
INVISIBLE = "#9e9e9e"
#: Groove efficiency below this marks a missing order.
MISSING_EFFICIENCY = 1e-9
#: Orders whose wavelengths the strip's hover lists.
HOVER_ORDERS = (-3, -2, -1, 1, 2, 3)
#: Size of the fan diagram (px); its axes keep one unit per pixel both ways, so angles look true.
FAN_WIDTH_PX = 420
FAN_HEIGHT_PX = {"reflection": 300, "transmission": 430}
#: Shown in the preset selector when the settings are not those of a shipped preset.
NO_PRESET = "(choose a preset)"
#: Angle between incident and diffracted beams the planner assumes by default (degrees): a common
#: compact mount (common practice). The read-outs' blaze wavelength "at the deviation" uses the same setting.
DEFAULT_DEVIATION_DEG = 30.0
#: Deviation angles the planner accepts (degrees), as physics.grating.plan_spectrometer does.
DEVIATION_LIMITS_DEG = (0.0, 120.0)
#: Half-width given to a laser line when other orders are checked for overlap (nm): a single-mode gas or
#: diode laser line is far narrower (common practice: well under 0.01 nm); the half-width only makes the
#: line a band the overlap and filter calculations take, and is far below any band position shown.
LASER_LINE_HALF_WIDTH_NM = 0.005
#: The laser line offered first (nm): the helium-neon red line, 632.8 nm (recalled from memory).
DEFAULT_LASER_NM = 632.8
#: The source choices: a broadband lamp over a band, or one laser line.
SOURCE_CHOICES = {"broadband lamp (band)": "band", "laser line": "laser"}
LASER_CAUTION = ("**Laser source.** Every order a grating sends, the zero order included, carries part of the "
                 "beam, and each can injure the eye or skin; a grating turns one beam into several going in "
                 "directions you may not expect. Block unused orders with beam dumps, wear eyewear rated for the "
                 "wavelength and power, and follow your site's laser-safety rules and your laser safety officer.")


#: Link keys of the numeric fields, in the order of ``GratingSection._fields``.
LINK_NUMBER_KEYS = ("g_lpmm", "g_blaze", "g_duty", "g_alpha", "g_from", "g_to", "g_src_from", "g_src_to", "g_focal",
                    "g_width", "g_det", "g_pitch", "g_laser", "g_dev")
#: Link keys of the choices: (key, settings key, label, allowed values).
LINK_CHOICES = (("g_kind", "kind", "Reflection or transmission", ("reflection", "transmission")),
                ("g_groove", "groove", "Grooves", ("lamellar", "blazed")),
                ("g_lamp", "illuminant", "Lamp", ILLUMINANT_CHOICES),
                ("g_bright", "brightness", "Brightness", tuple(BRIGHTNESS_CHOICES.values())),
                ("g_source", "source", "Source", tuple(SOURCE_CHOICES.values())))


def _link_order(text: str) -> int:
    """The order of interest from a link's text (a nonzero whole number from -100 to 100)."""
    value = parse_number(text, "Order", -100, 100)
    if value != int(value) or value == 0:
        raise InputError("Order: give a nonzero whole number such as 1 or -1.")
    return int(value)


def _link_choice(text: str, allowed) -> str:
    if text not in allowed:
        raise InputError(f"give one of {', '.join(allowed)}")
    return text


# ---------------------------------------------------------------------- settings
#: Grating colour maps kept for reuse (a few hundred kB each): every new page computes the defaults' map,
#: 0.4 s of interpreter time, and people going back and forth between settings meet the same ones again.
COLOUR_MAPS_KEPT = 32


@dataclass(frozen=True)
class GratingSettings:
    """Everything the section shows depends on; only valid values are ever stored."""

    name: str = ""
    scenario: str = ""
    lines_per_mm: float = 1200.0
    kind: str = "reflection"
    groove: str = "blazed"
    blaze_angle_deg: float = 17.5
    duty_cycle: float = 0.5
    incidence_deg: float = 35.0
    band_lo_nm: float = 400.0
    band_hi_nm: float = 700.0
    focal_length_mm: float = 75.0
    illuminated_width_mm: float = 10.0
    detector_length_mm: float = 28.7
    pixel_pitch_um: float = 14.0
    order: int = 1
    illuminant: str = "D65"
    brightness: str = "common"
    source_lo_nm: float = DEFAULT_SOURCE_BAND_NM[0]
    source_hi_nm: float = DEFAULT_SOURCE_BAND_NM[1]
    source: str = "band"                       # "band" (a lamp over source_lo–hi) or "laser" (one line)
    laser_nm: float = DEFAULT_LASER_NM
    deviation_deg: float = DEFAULT_DEVIATION_DEG

    @classmethod
    def from_file(cls, gf: GratingFile, previous: "GratingSettings | None" = None) -> "GratingSettings":
        """Settings of a grating file; order, lamp, brightness, source band and an unused blaze angle carry
        over from ``previous``."""
        prev = previous or cls()
        return cls(name=gf.name, scenario=gf.scenario, lines_per_mm=gf.lines_per_mm, kind=gf.kind,
                   groove=gf.groove,
                   blaze_angle_deg=gf.blaze_angle_deg if gf.blaze_angle_deg is not None else prev.blaze_angle_deg,
                   duty_cycle=gf.duty_cycle, incidence_deg=gf.incidence_deg, band_lo_nm=gf.band_nm[0],
                   band_hi_nm=gf.band_nm[1], focal_length_mm=gf.focal_length_mm,
                   illuminated_width_mm=gf.illuminated_width_mm, detector_length_mm=gf.detector_length_mm,
                   pixel_pitch_um=gf.pixel_pitch_um, order=prev.order, illuminant=prev.illuminant,
                   brightness=prev.brightness, source_lo_nm=prev.source_lo_nm, source_hi_nm=prev.source_hi_nm,
                   source=prev.source, laser_nm=prev.laser_nm, deviation_deg=prev.deviation_deg)

    def to_file(self) -> GratingFile:
        """The grating file of these settings (order, lamp, brightness and source band are view choices,
        not stored)."""
        return GratingFile(name=self.name or "untitled grating", scenario=self.scenario,
                           lines_per_mm=self.lines_per_mm, kind=self.kind, groove=self.groove,
                           blaze_angle_deg=self.blaze_angle_deg, duty_cycle=self.duty_cycle,
                           incidence_deg=self.incidence_deg, band_nm=self.band, focal_length_mm=self.focal_length_mm,
                           illuminated_width_mm=self.illuminated_width_mm, detector_length_mm=self.detector_length_mm,
                           pixel_pitch_um=self.pixel_pitch_um)

    @property
    def band(self) -> tuple[float, float]:
        return (self.band_lo_nm, self.band_hi_nm)

    @property
    def source_band(self) -> tuple[float, float]:
        """Wavelengths the source is taken to emit (nm), for the order overlaps and the filter: the lamp's band,
        or the laser line widened by :data:`LASER_LINE_HALF_WIDTH_NM` each side."""
        if self.source == "laser":
            return (self.laser_nm - LASER_LINE_HALF_WIDTH_NM, self.laser_nm + LASER_LINE_HALF_WIDTH_NM)
        return (self.source_lo_nm, self.source_hi_nm)

    def grating_fields(self) -> tuple:
        """The stored grating (a grating file's fields but its name and scenario): what a preset fixes."""
        gf = self.to_file()
        return (gf.lines_per_mm, gf.kind, gf.groove, gf.blaze_angle_deg if gf.groove == "blazed" else None,
                gf.duty_cycle if gf.groove == "lamellar" else None, gf.incidence_deg, gf.band_nm,
                gf.focal_length_mm, gf.illuminated_width_mm, gf.detector_length_mm, gf.pixel_pitch_um)

    @property
    def centre_nm(self) -> float:
        return 0.5 * (self.band_lo_nm + self.band_hi_nm)

    @property
    def blaze(self) -> float | None:
        """The blaze angle when the grooves are blazed, else None."""
        return self.blaze_angle_deg if self.groove == "blazed" else None

    def groove_kw(self) -> dict:
        """Groove arguments of the physics colour and efficiency functions."""
        return dict(kind=self.groove, duty_cycle=self.duty_cycle, blaze_angle_deg=self.blaze)

    def describe(self) -> str:
        grooves = (f"blazed {self.blaze_angle_deg:g}°" if self.groove == "blazed"
                   else f"lamellar, duty cycle {self.duty_cycle:g}")
        return (f"{self.lines_per_mm:g} lines/mm {self.kind} grating ({grooves}), incidence α = "
                f"{self.incidence_deg:g}°, band {self.band_lo_nm:g}–{self.band_hi_nm:g} nm")

    def map_key(self) -> tuple:
        """What the colour map depends on (the groove density only moves its marker, or picks another
        density range when it leaves the map's)."""
        lo, hi = map_range_lines_per_mm(self.lines_per_mm)
        return (self.incidence_deg, self.groove, self.duty_cycle if self.groove == "lamellar" else None,
                self.blaze, self.illuminant, self.brightness, lo, hi)


def map_range_lines_per_mm(lines_per_mm: float) -> tuple[float, float]:
    """(lowest, highest) groove density of the colour map (lines/mm) that holds ``lines_per_mm``."""
    top = next((t for t in MAP_TOPS_LINES_PER_MM if lines_per_mm <= t), MAP_TOPS_LINES_PER_MM[-1])
    bottom = MAP_BOTTOM_LINES_PER_MM if lines_per_mm >= MAP_BOTTOM_LINES_PER_MM else LIMITS["lines_per_mm"][0]
    return bottom, top


def map_densities(lines_per_mm: float) -> np.ndarray:
    """Groove densities of the colour map's rows (lines/mm), increasing, for a grating of ``lines_per_mm``."""
    return np.linspace(*map_range_lines_per_mm(lines_per_mm), MAP_ROWS)


def csv_step_nm(band_nm) -> float:
    """Wavelength step of the orders CSV (nm): the smallest of :data:`CSV_STEPS_NM` giving at most
    :data:`CSV_MAX_STEPS` steps across the band."""
    lo, hi = band_nm
    return next((st for st in CSV_STEPS_NM if (hi - lo) / st <= CSV_MAX_STEPS), CSV_STEPS_NM[-1])


def csv_wavelengths_nm(band_nm) -> np.ndarray:
    """Wavelengths of the orders CSV (nm): the multiples of :func:`csv_step_nm` in the band, plus both ends."""
    lo, hi = band_nm
    step = csv_step_nm(band_nm)
    inner = np.arange(np.ceil(lo / step), np.floor(hi / step) + 1) * step
    return np.unique(np.round(np.concatenate([[lo], inner, [hi]]), 9))


# ---------------------------------------------------------------------- computations (physics calls)
def line_colours(wavelength_nm) -> list[str]:
    """Display colour ('#rrggbb') of a monochromatic line at each wavelength (the brightest display
    colour of its hue, gamut-mapped by :func:`physics.grating.spectral_line_srgb`); grey outside
    380-780 nm."""
    wl = np.atleast_1d(np.asarray(wavelength_nm, dtype=float))
    rgb = gr.spectral_line_srgb(wl)
    visible = (wl >= 380.0) & (wl <= 780.0)
    return [srgb_to_hex(c) if v else INVISIBLE for c, v in zip(rgb, visible)]


def fan_orders(s: GratingSettings) -> list[int]:
    """Orders (zero included) that propagate for at least part of the band.

    The short end of the band has the most propagating orders, so its list covers the band.
    """
    return gr.propagating_orders(s.band_lo_nm, s.lines_per_mm, s.incidence_deg)


def compute_fan(s: GratingSettings) -> dict:
    """Rays of every propagating order across the band, and one summary row per order."""
    lo, hi = s.band
    wl = np.linspace(lo, hi, FAN_RAYS)
    colours = line_colours(wl)
    orders = fan_orders(s)
    drawn = [m for m in orders if abs(m) <= MAX_FAN_ORDER]
    rays = dict(order=[], wl=[], beta=[], color=[])
    rows = []
    for m in drawn:
        if m == 0:
            rows.append(dict(order=0, beta_lo=-s.incidence_deg, beta_hi=-s.incidence_deg, wl_lo=lo, wl_hi=hi))
            continue
        beta = np.atleast_1d(gr.diffraction_angle_deg(wl, s.lines_per_mm, m, s.incidence_deg))
        ok = np.isfinite(beta)
        reach = gr.order_band_nm(s.lines_per_mm, m, s.incidence_deg)
        w_lo, w_hi = (max(lo, reach[0]), min(hi, reach[1])) if reach else (np.nan, np.nan)
        b = np.atleast_1d(gr.diffraction_angle_deg(np.array([w_lo, w_hi]), s.lines_per_mm, m, s.incidence_deg))
        rows.append(dict(order=m, beta_lo=float(b[0]), beta_hi=float(b[1]), wl_lo=w_lo, wl_hi=w_hi))
        for w, bb, c in zip(wl[ok], beta[ok], np.asarray(colours)[ok]):
            rays["order"].append(m)
            rays["wl"].append(float(w))
            rays["beta"].append(float(bb))
            rays["color"].append(str(c))
    return dict(orders=orders, drawn=drawn, rows=rows, rays=rays, wavelengths=wl)


def compute_readouts(s: GratingSettings) -> dict:
    """The read-outs for the order of interest at the band ends and centre."""
    lo, hi = s.band
    c = s.centre_nm
    g, m, a = s.lines_per_mm, s.order, s.incidence_deg
    out = dict(
        spacing_nm=float(gr.groove_spacing_nm(g)),
        beta_lo_deg=gr.diffraction_angle_deg(lo, g, m, a),
        beta_hi_deg=gr.diffraction_angle_deg(hi, g, m, a),
        beta_centre_deg=gr.diffraction_angle_deg(c, g, m, a),
        status_lo=gr.order_status(lo, g, m, a),
        status_hi=gr.order_status(hi, g, m, a),
        status_centre=gr.order_status(c, g, m, a),
        angular_dispersion_deg_per_nm=gr.angular_dispersion_deg_per_nm(c, g, m, a),
        reciprocal_linear_dispersion_nm_per_mm=gr.reciprocal_linear_dispersion_nm_per_mm(
            c, g, s.focal_length_mm, m, a),
        resolving_power=gr.resolving_power(g, s.illuminated_width_mm, m),
        grooves_lit=gr.resolving_power(g, s.illuminated_width_mm, 1),
        resolvable_nm=gr.resolvable_difference_nm(c, g, s.illuminated_width_mm, m),
        free_spectral_range_nm=gr.free_spectral_range_nm(lo, m),
        littrow_deg=gr.littrow_angle_deg(c, g, m),
        efficiency=float(np.asarray(gr.groove_efficiency(c, g, m, **s.groove_kw(), incidence_deg=a))),
        blaze_nm=None, blaze_at_deviation_nm=None, deviation_deg=None,
        rayleigh_nm={},
    )
    if s.groove == "blazed":
        out["blaze_nm"] = gr.blaze_wavelength_nm(s.blaze_angle_deg, g, m) if m > 0 else None
        if s.kind == "reflection" and m > 0:
            out["deviation_deg"] = s.deviation_deg           # the planner's mount: one setting for both
            out["blaze_at_deviation_nm"] = gr.blaze_wavelength_at_deviation_nm(s.blaze_angle_deg, g, m,
                                                                               s.deviation_deg)
    for k in fan_orders(s):
        if k != 0 and abs(k) <= MAX_FAN_ORDER:
            out["rayleigh_nm"][k] = gr.rayleigh_wavelength_nm(g, k, a)
    out["missing_orders"] = missing_orders(s)
    return out


def missing_orders(s: GratingSettings) -> list[int]:
    """Propagating nonzero orders (up to MAX_FAN_ORDER) whose lamellar groove envelope is zero: m·duty a whole
    number, so at a 50 % duty cycle every even order (the same at every wavelength)."""
    if s.groove != "lamellar":
        return []
    return [k for k in fan_orders(s) if k != 0 and abs(k) <= MAX_FAN_ORDER
            and float(np.asarray(gr.groove_efficiency(s.centre_nm, s.lines_per_mm, k, **s.groove_kw(),
                                                       incidence_deg=s.incidence_deg)))
            < MISSING_EFFICIENCY]


def compute_overlaps(s: GratingSettings) -> dict:
    """Other orders on the band's angles and the order-sorting filter; ``error`` when the order
    of interest does not propagate in the band."""
    try:
        rows = gr.order_overlaps(s.band, s.lines_per_mm, s.order, s.incidence_deg, s.source_band)
    except InputError as exc:
        return dict(rows=[], filter=None, error=str(exc))
    return dict(rows=rows, filter=gr.order_sorting_filter_nm(s.band, s.order, s.source_band), error=None)


def compute_line_shape(s: GratingSettings, n_slits: int) -> dict:
    """N-slit intensity (relative to N², so a principal maximum of a full envelope is 1) around
    the order of interest at the band centre, with the orders in view and their groove efficiency.

    Lamellar grooves: slits as wide as the duty cycle times the period (missing orders where the
    envelope is zero). Blazed grooves: the interference of N grooves alone (narrow slits) and,
    per order, the scalar blaze efficiency.
    """
    c, g, a, m = s.centre_nm, s.lines_per_mm, s.incidence_deg, s.order
    d = float(gr.groove_spacing_nm(g))
    b_m = gr.diffraction_angle_deg(c, g, m, a)
    around = np.isfinite(b_m)
    if around:
        ends = []
        for k, edge in ((m - LINE_SHAPE_ORDERS, -1.0), (m + LINE_SHAPE_ORDERS, 1.0)):
            b = gr.diffraction_angle_deg(c, g, k, a)
            ends.append(np.sin(np.radians(b)) if np.isfinite(b) else edge)
        s_lo, s_hi = ends
    else:
        s_lo, s_hi = -1.0, 1.0
    fringes = n_slits * (s_hi - s_lo) * d / c                     # secondary maxima in view, about
    points = int(np.clip(12 * fringes, LINE_SHAPE_POINTS, LINE_SHAPE_MAX_POINTS))
    beta = np.degrees(np.arcsin(np.linspace(s_lo, s_hi, points)))
    width = s.duty_cycle * d if s.groove == "lamellar" else d * 1e-6
    rel = gr.n_slit_intensity(beta, c, g, int(n_slits), slit_width_nm=width, incidence_deg=a) / n_slits ** 2
    orders = []
    for k in range(m - LINE_SHAPE_ORDERS, m + LINE_SHAPE_ORDERS + 1):
        bk = gr.diffraction_angle_deg(c, g, k, a)
        if not np.isfinite(bk) or not beta[0] <= bk <= beta[-1]:
            continue
        eff = float(np.asarray(gr.groove_efficiency(c, g, k, **s.groove_kw(), incidence_deg=a)))
        missing = s.groove == "lamellar" and k != 0 and eff < MISSING_EFFICIENCY
        orders.append(dict(order=k, beta=float(bk), efficiency=eff, missing=missing))
    return dict(beta=beta, rel=rel, db=10 * np.log10(np.maximum(rel, 10 ** (LOG_FLOOR_DB / 10))),
                orders=orders, around=bool(around), slit_width_nm=width, spacing_nm=d, n=int(n_slits))


def compute_strip(s: GratingSettings) -> dict:
    """Colours seen along the viewing angles at the current groove density, and the wavelength each
    low order sends to each angle (for the hover)."""
    col = gr.grating_color(VIEW_DEG, s.lines_per_mm, s.incidence_deg, s.illuminant, normalize=s.brightness,
                           **s.groove_kw())
    wl = np.arange(380.0, 780.5, 1.0)
    seen = {}
    for k in HOVER_ORDERS:
        beta = np.atleast_1d(gr.diffraction_angle_deg(wl, s.lines_per_mm, k, s.incidence_deg))
        ok = np.isfinite(beta)
        lam = np.full(VIEW_DEG.shape, np.nan)
        if ok.sum() >= 2:
            b, w = beta[ok], wl[ok]
            order = np.argsort(b)                              # β rises with λ for k > 0, falls for k < 0
            b, w = b[order], w[order]
            inside = (VIEW_DEG >= b[0]) & (VIEW_DEG <= b[-1])
            lam[inside] = np.interp(VIEW_DEG[inside], b, w)
        seen[k] = lam
    text = []
    for i in range(VIEW_DEG.size):
        parts = [f"{k:+d}: {seen[k][i]:.0f} nm" for k in HOVER_ORDERS if np.isfinite(seen[k][i])]
        text.append(", ".join(parts) or "no visible light from orders ±1 to ±3")
    return dict(rgb=col["rgb"], lab=col["lab"], dark=col["dark"], orders_text=text)


def compute_colour_map(s: GratingSettings) -> dict:
    """Colours over (groove density, viewing angle) for the current incidence, grooves and lamp, over the
    density range of :func:`map_densities` that holds the current density. Its arrays are shared between
    pages with the same settings (every new page opens on the defaults): read them, never write them."""
    dens = map_densities(s.lines_per_mm)
    check_grid_points("grating colour map", VIEW_DEG.size * dens.size * gr.COLOUR_BAND_SAMPLES)
    kw = s.groove_kw()
    return _shared_colour_map(tuple(float(g) for g in dens), float(s.incidence_deg), s.illuminant, s.brightness,
                              tuple(sorted(kw.items())))


@functools.lru_cache(maxsize=COLOUR_MAPS_KEPT)
def _shared_colour_map(dens, incidence_deg, illuminant, brightness, groove_items) -> dict:
    cm = gr.grating_color_map(VIEW_DEG, np.array(dens), incidence_deg, illuminant, normalize=brightness,
                              **dict(groove_items))
    for v in cm.values():
        if isinstance(v, np.ndarray):
            v.setflags(write=False)
    return cm


def compute_plan(s: GratingSettings) -> dict:
    """The planner's designs for the band (``designs``) and why each other density and order dropped out
    (``rejected``), at the set deviation, order-sorting wide bands for the set source."""
    designs, rejected = gr.plan_spectrometer_report(s.band, s.focal_length_mm, s.detector_length_mm,
                                                    s.pixel_pitch_um, deviation_deg=s.deviation_deg,
                                                    source_band_nm=s.source_band)
    return dict(designs=designs, rejected=rejected)


def compute_laser_orders(s: GratingSettings) -> list:
    """Where a laser line leaves the grating: (order, β in degrees) of every order it propagates in."""
    return [(m, float(gr.diffraction_angle_deg(s.laser_nm, s.lines_per_mm, m, s.incidence_deg)))
            for m in gr.propagating_orders(s.laser_nm, s.lines_per_mm, s.incidence_deg)]


# ---------------------------------------------------------------------- text helpers
def _deg(x, digits=2) -> str:
    if x is None or not np.isfinite(x):
        return "—"
    x = float(x) if round(float(x), digits) != 0 else 0.0                  # no "-0.00°"
    return f"{x:.{digits}f}°"


def _order_text(m: int) -> str:
    return f"{m:+d}" if m else "0"


def _num(x, fmt="{:.4g}") -> str:
    return fmt.format(x) if x is not None and np.isfinite(x) else "—"


def _table(head, rows, css="") -> str:
    th = "".join(f"<th style='text-align:left;padding:2px 8px 2px 0'>{h}</th>" for h in head)
    body = "".join("<tr>" + "".join(f"<td style='padding:1px 8px 1px 0;white-space:nowrap'>{c}</td>" for c in r) + "</tr>"
                   for r in rows)
    return f"<table class='{css}' style='font-size:13px;border-collapse:collapse'><tr>{th}</tr>{body}</table>"


def _markdown_bold(text: str) -> str:
    """``**x**`` → ``<b>x</b>`` after escaping."""
    parts = _esc(text).split("**")
    return "".join(f"<b>{p}</b>" if i % 2 else p for i, p in enumerate(parts))


# ---------------------------------------------------------------------- rigorous efficiency
#: Wavelengths of the rigorous curve over the band: fine enough to show a Rayleigh anomaly's edge
#: (a few nm wide) and about a second of solver time for a lamellar groove.
RIGOROUS_SAMPLES = 101
#: Groove profiles and materials offered for the rigorous curve (physics.material names).
RIGOROUS_PROFILES, RIGOROUS_MATERIALS, RIGOROUS_POLARIZATIONS = (gf_rigorous.RIGOROUS_PROFILES,
                                                                 gf_rigorous.RIGOROUS_MATERIALS,
                                                                 gf_rigorous.RIGOROUS_POLARIZATIONS)
#: Link keys of the rigorous settings: (key, RigorousSettings parameter, label).
LINK_RIGOROUS_KEYS = (("g_rprofile", "profile", "Rigorous profile"), ("g_rdepth", "depth_nm", "Rigorous depth"),
                      ("g_rmat", "material", "Rigorous material"), ("g_rpol", "polarization", "Rank by polarization"))
#: Planner candidates whose band efficiency is computed rigorously, those with the best scalar
#: estimate first: each costs about a tenth of a curve (gr.PLAN_EFFICIENCY_SAMPLES wavelengths), so
#: eight stay within a few seconds; the others keep their scalar rank.
PLAN_RIGOROUS_MAX = 8
RIGOROUS_NOTE = ("Rigorous: Maxwell's equations solved for the groove (coupled waves), absolute efficiency "
                 "of an ideal grating (no surface roughness or oxide). Scalar: the page's sawtooth/rectangle "
                 "estimate, relative to its peak.")


class RigorousSettings(param.Parameterized):
    """What the rigorous efficiency curve needs beyond the grating settings (the band, order, kind,
    incidence, duty cycle and blaze angle come from :class:`GratingSettings`)."""

    profile = param.Selector(default="blazed", objects=list(RIGOROUS_PROFILES),
                             doc="Groove shape; sinusoidal and blazed grooves are cut into a staircase.")
    depth_nm = param.Number(default=None, allow_None=True, bounds=gf_rigorous.RIGOROUS_DEPTH_NM,
                            doc="Groove depth peak to valley (nm); empty: 100 nm, or the right-angle apex "
                                "depth for blazed grooves.")
    material = param.Selector(default="Al", objects=list(RIGOROUS_MATERIALS),
                              doc="Grating material (and substrate); air above.")
    polarization = param.Selector(default="unpolarized", objects=list(RIGOROUS_POLARIZATIONS),
                                  doc="Polarization the planner ranks gratings by (the curve shows all three).")


def compute_rigorous(s: GratingSettings, profile: str, depth_nm, material: str, channel=None) -> dict:
    """The rigorous TE, TM and unpolarized efficiency of the order of interest over the band, the
    scalar estimate beside it, the Rayleigh wavelengths in the band and where scalar theory stops
    being trustworthy. ``channel`` (optional) receives progress reports."""
    lo, hi = s.band
    g, m, a = s.lines_per_mm, s.order, s.incidence_deg
    wl = np.linspace(lo, hi, RIGOROUS_SAMPLES)
    kw = dict(profile=profile, depth_nm=depth_nm, duty_cycle=s.duty_cycle,
              blaze_angle_deg=s.blaze_angle_deg if profile == "blazed" else None, material=material, kind=s.kind)
    detail = {}
    for step, pol in enumerate(("TE", "TM")):
        if channel is not None:
            channel.report(step / 2, f"solving {pol} ({'s' if pol == 'TE' else 'p'}) light…")
        detail[pol] = gr.rigorous_efficiency_detail(wl, g, m, a, polarization=pol, **kw)
    te, tm = detail["TE"].efficiency[:, 0], detail["TM"].efficiency[:, 0]
    scalar_kind = "blazed" if profile == "blazed" else "lamellar"
    scalar = np.asarray(gr.groove_efficiency(wl, g, m, scalar_kind, s.duty_cycle,
                                             s.blaze_angle_deg if profile == "blazed" else None, incidence_deg=a),
                        dtype=float) * np.ones_like(wl)
    scalar = np.where(np.isfinite(gr.diffraction_angle_deg(wl, g, m, a)), scalar, 0.0)
    d = float(gr.groove_spacing_nm(g))
    rayleigh = []
    reach = int(np.ceil(2 * d / lo)) + 1
    for k in [k for k in range(-reach, reach + 1) if k != 0]:
        lam = float(gr.rayleigh_wavelength_nm(g, k, a))
        if lo <= lam <= hi:
            rayleigh.append((k, lam))
    edge = d / gr.SCALAR_TRUST_D_OVER_LAMBDA                            # d/λ = 3 here
    if edge >= hi:
        trust = (f"Scalar theory is fair across this band: d/λ ≥ {gr.SCALAR_TRUST_D_OVER_LAMBDA:g} everywhere "
                 "(common practice).")
    elif edge <= lo:
        trust = (f"Scalar theory is not to be trusted anywhere in this band: d/λ < {gr.SCALAR_TRUST_D_OVER_LAMBDA:g} "
                 f"(d = {d:.0f} nm; common practice), where efficiency depends on polarization and shows anomalies.")
    else:
        trust = (f"Scalar theory stops being trustworthy above {edge:.0f} nm, where d/λ < "
                 f"{gr.SCALAR_TRUST_D_OVER_LAMBDA:g} (common practice).")
    if channel is not None:
        channel.report(1.0, "done")
    return dict(wavelength_nm=wl, te=te, tm=tm, unpolarized=0.5 * (te + tm), scalar=scalar, rayleigh=rayleigh,
                trust=trust, trust_edge_nm=edge, orders_te=detail["TE"].fourier_orders,
                orders_tm=detail["TM"].fourier_orders,
                converged=detail["TE"].converged and detail["TM"].converged,
                change=max(detail["TE"].change if not detail["TE"].converged else 0.0,
                           detail["TM"].change if not detail["TM"].converged else 0.0),
                slices=detail["TE"].slices, settings=(s, profile, depth_nm, material))


def plan_scalar_efficiency(s: GratingSettings, design) -> float:
    """Mean scalar groove efficiency (relative) of a planner design's order over the band."""
    wl = np.linspace(*s.band, gr.PLAN_EFFICIENCY_SAMPLES)
    eff = np.asarray(gr.groove_efficiency(wl, design.lines_per_mm, design.order, s.groove, s.duty_cycle, s.blaze,
                                          incidence_deg=design.incidence_deg), dtype=float) * np.ones_like(wl)
    live = np.isfinite(gr.diffraction_angle_deg(wl, design.lines_per_mm, design.order, design.incidence_deg))
    return float(np.mean(np.where(live, eff, 0.0)))


def compute_plan_efficiency(s: GratingSettings, designs, profile: str, depth_nm, material: str,
                            polarization: str = "unpolarized", channel=None) -> dict:
    """Mean rigorous efficiency over the band of the planner's designs, at most :data:`PLAN_RIGOROUS_MAX`
    of them (the best scalar estimates first), each at its own incidence angle.

    Returns {"rigorous": {(lines/mm, order): mean or an error sentence}, "scalar": {(lines/mm, order):
    mean}, "computed": count, "total": count, "settings": what it was computed for}.
    """
    scalar = {(d.lines_per_mm, d.order): plan_scalar_efficiency(s, d) for d in designs}
    chosen = sorted(designs, key=lambda d: (-scalar[(d.lines_per_mm, d.order)], d.resolution_nm))[:PLAN_RIGOROUS_MAX]
    out = {}
    for i, d in enumerate(chosen):
        if channel is not None:
            channel.report(i / max(1, len(chosen)), f"{d.lines_per_mm:g} lines/mm, order {d.order:+d} "
                                                    f"({i + 1} of {len(chosen)})…")
        try:
            out[(d.lines_per_mm, d.order)] = gr.band_efficiency(
                s.band, d.lines_per_mm, d.order, d.incidence_deg, polarization=polarization, profile=profile,
                depth_nm=depth_nm, duty_cycle=s.duty_cycle, blaze_angle_deg=s.blaze_angle_deg if profile == "blazed"
                else None, material=material, kind=s.kind)
        except InputError as exc:
            out[(d.lines_per_mm, d.order)] = str(exc)
    if channel is not None:
        channel.report(1.0, "done")
    return dict(rigorous=out, scalar=scalar, computed=len(chosen), total=len(designs),
                settings=(s, profile, depth_nm, material, polarization))


def _footer() -> str:
    return (f"fringegauge {date.today().isoformat()} · computed colours (scalar groove efficiency), approximate · "
            "never look at a laser or the sun along a diffracted order")


# ---------------------------------------------------------------------- the section
class GratingSection:
    """The "Gratings" tab for one session: build with no argument (the default preset) or a preset stem."""

    def __init__(self, preset: str | None = None):
        self._syncing = False
        self._map_job = 0
        self._map_shown_key = None
        self._map_pending_key = None
        self.colour_map = None
        self.strip = None
        self.fan = None
        self.readouts = None
        self.overlaps = None
        self.line_shape = None
        self.plan = None
        self.plan_rejected = []
        self.rigorous = None            # the last rigorous efficiency curve shown (compute_rigorous's dict)
        self._rigorous_job = 0
        self.plan_efficiency = None     # the planner's last rigorous ranking (compute_plan_efficiency's dict)
        self._plan_job = 0
        self.generation = 0
        self.timings_ms = {}
        self.on_change = []             # callables run after the settings change (the page address follows)
        stem = preset or DEFAULT_PRESET
        self.settings = GratingSettings.from_file(load_grating_preset(stem))
        self._origin = (stem, self.settings)
        self._build_widgets(stem)
        self._style_messages()
        self._build_plots()
        self._build_rigorous()
        self._sync_fields()
        self._wire()
        self.refresh()

    # ------------------------------------------------------------------ widgets
    def _build_widgets(self, stem):
        presets = list_grating_presets()
        self.preset = pn.widgets.Select(label="Preset grating",
                                        options={NO_PRESET: ""} | {name: st for st, name in presets}, value=stem, width=300, margin=(2, 5), css_classes=["fg-grating-preset"])
        self.scenario = pn.pane.HTML("", width=300, margin=(0, 5), styles={"font-size": "12px", "color": "#555"})
        self.density = Field("Groove density (lines/mm)", width=145, css="fg-grating-density")
        self.order = Field("Order of interest m", width=145, css="fg-grating-order")
        self.kind = pn.widgets.RadioButtonGroup(options={"reflection": "reflection", "transmission": "transmission"},
                                                value="reflection", margin=(2, 5))
        self.groove = pn.widgets.RadioButtonGroup(options={"lamellar (rectangular)": "lamellar",
                                                           "blazed (sawtooth)": "blazed"},
                                                  value="blazed", margin=(2, 5))
        self.blaze = Field("Blaze angle (°)", width=145, css="fg-grating-blaze")
        self.duty = Field("Duty cycle (0.01-0.99)", width=145, css="fg-grating-duty")
        self.incidence = Field("Incidence α (°)", width=145, css="fg-grating-incidence")
        self.illuminant = pn.widgets.Select(label="Lamp (colours)", options=list(ILLUMINANT_CHOICES), value="D65",
                                            width=145, margin=(2, 5))
        self.band_lo = Field("Band from (nm)", width=145, css="fg-grating-band-lo")
        self.band_hi = Field("to (nm)", width=145, css="fg-grating-band-hi")
        self.source_lo = Field("Source emits from (nm)", width=145, css="fg-grating-source-lo")
        self.source_hi = Field("to (nm)", width=145, css="fg-grating-source-hi")
        self.source = pn.widgets.RadioButtonGroup(options=SOURCE_CHOICES, value="band", margin=(2, 5))
        self.laser = Field("Laser line (nm)", width=145, css="fg-grating-laser")
        self.deviation = Field("Deviation (°, α to β)", width=145, css="fg-grating-deviation")
        self.laser_caution = pn.pane.HTML(
            f"<div role='note' style='background:#fde2e2;border:1px solid #d9534f;border-radius:4px;padding:5px 8px;"
            f"font-size:12px;color:#5c1010'>{_markdown_bold(LASER_CAUTION)}</div>",
            margin=(5, 5), sizing_mode="stretch_width", visible=False, css_classes=["fg-grating-laser-caution"])
        self.focal = Field("Focal length (mm)", width=145)
        self.width = Field("Illuminated width (mm)", width=145)
        self.det_len = Field("Detector length (mm)", width=145)
        self.pitch = Field("Pixel pitch (µm)", width=145)
        self.brightness = pn.widgets.RadioButtonGroup(options=BRIGHTNESS_CHOICES, value="common", margin=(2, 5))
        self.n_slits = pn.widgets.RadioButtonGroup(options={f"N = {n}": n for n in N_CHOICES}, value=N_CHOICES[0],
                                                   margin=(2, 5))
        self.scale = pn.widgets.RadioButtonGroup(options={"linear": "linear", "log (dB)": "log"}, value="linear",
                                                 margin=(2, 5))
        self.dl_csv = pn.widgets.FileDownload(callback=self._fan_csv, filename="grating_orders.csv",
                                              label="Orders and angles (.csv)", width=300, margin=(2, 5),
                                              css_classes=["fg-grating-dl-csv"])
        self.dl_map = pn.widgets.FileDownload(callback=self._map_png, filename="grating_colour_map.png",
                                              label="Colour map (.png)", width=300, margin=(2, 5),
                                              css_classes=["fg-grating-dl-map"])
        self.dl_strip = pn.widgets.FileDownload(callback=self._strip_png, filename="grating_colour_strip.png",
                                                label="Colour strip (.png)", width=300, margin=(2, 5),
                                                css_classes=["fg-grating-dl-strip"])
        self.caution = pn.pane.HTML(
            f"<div role='note' style='background:#fff4d6;border:1px solid #e0b84a;border-radius:4px;padding:5px 8px;"
            f"font-size:12px;color:#5c4300'>{_markdown_bold(CAUTION)}</div>",
            margin=(5, 5), sizing_mode="stretch_width", css_classes=["fg-grating-caution"])
        self.caution_end = pn.pane.HTML(f"<div style='font-size:11px;color:#555'>{_markdown_bold(CAUTION)}</div>",
                                        margin=(8, 5), sizing_mode="stretch_width")
        self.colour_caption = pn.pane.HTML(
            "<div style='font-size:12px;color:#444'>White light from the lamp at α, summed over all nonzero "
            "orders reaching each direction (black: no or too little visible light). "
            "Relative brightness: one scale for the strip (and one for the map), the most intense direction at full "
            "display brightness. Colours a display cannot show (every spectral colour) are desaturated toward white "
            "at constant luminance and scaled down, never clipped into another hue, so deep violet stays a dim "
            "violet. Choose 'each direction at full brightness' to see the hue of faint orders. Dashed "
            "vertical line: the zero order (β = −α, specular or straight through), left out of the colours. On the map the dashed horizontal line is the current groove density. Hover for the "
            "wavelengths each order sends to an angle.</div>", margin=(0, 5), sizing_mode="stretch_width")
        self.readout_html = pn.pane.HTML("", margin=(0, 5), css_classes=["fg-grating-readouts"],
                                         sizing_mode="stretch_width")
        self.fan_caption = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#444"},
                                        sizing_mode="stretch_width")
        self.overlap_html = pn.pane.HTML("", margin=(0, 5), css_classes=["fg-grating-overlaps"],
                                         sizing_mode="stretch_width")
        self.plan_html = pn.pane.HTML("", margin=(0, 5), css_classes=["fg-grating-plan"], sizing_mode="stretch_width")
        self.line_caption = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#444"},
                                         sizing_mode="stretch_width")
        self.map_status = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#555"})

    def _style_messages(self):
        for field in [f for f, *_ in self._fields()] + [self.order]:
            field.message.styles = {"color": "#b00020", "font-size": "12px"}
            field.message.width = 300

    def _fields(self):
        """(field, settings key, label for messages, lowest, highest, unit) of every numeric field."""
        L = LIMITS
        return [
            (self.density, "lines_per_mm", "Groove density", *L["lines_per_mm"]),
            (self.blaze, "blaze_angle_deg", "Blaze angle", *L["blaze_angle_deg"][:2], "°"),
            (self.duty, "duty_cycle", "Duty cycle", *L["duty_cycle"]),
            (self.incidence, "incidence_deg", "Incidence angle", *L["incidence_deg"][:2], "°"),
            (self.band_lo, "band_lo_nm", "Band from", *L["band_nm"]),
            (self.band_hi, "band_hi_nm", "Band to", *L["band_nm"]),
            (self.source_lo, "source_lo_nm", "Source from", *L["band_nm"]),
            (self.source_hi, "source_hi_nm", "Source to", *L["band_nm"]),
            (self.focal, "focal_length_mm", "Focal length", *L["focal_length_mm"]),
            (self.width, "illuminated_width_mm", "Illuminated width", *L["illuminated_width_mm"]),
            (self.det_len, "detector_length_mm", "Detector length", *L["detector_length_mm"]),
            (self.pitch, "pixel_pitch_um", "Pixel pitch", *L["pixel_pitch_um"]),
            (self.laser, "laser_nm", "Laser line", *L["band_nm"]),
            (self.deviation, "deviation_deg", "Deviation", *DEVIATION_LIMITS_DEG, "°"),
        ]

    def _pairs(self):
        """Linked pairs of fields (short end, long end, what they bound): both typed values are checked and
        applied together whenever either changes."""
        return [(self.band_lo, self.band_hi, "band"), (self.source_lo, self.source_hi, "source band")]

    def _build_plots(self):
        # a. fan of orders
        self.ray_src = ColumnDataSource(dict(x0=[], y0=[], x1=[], y1=[], color=[], order=[], wl=[], beta=[]))
        self.fan_label_src = ColumnDataSource(dict(x=[], y=[], text=[], order=[], span=[]))
        self.beam_src = ColumnDataSource(dict(x0=[], y0=[], x1=[], y1=[]))
        self.note_src = ColumnDataSource(dict(x=[], y=[], text=[], align=[]))
        self.zero_src = ColumnDataSource(dict(x0=[], y0=[], x1=[], y1=[], beta=[]))
        self.scale_src = ColumnDataSource(dict(x=[], y=[], text=[]))
        self.scale_line_src = ColumnDataSource(dict(x0=[], y0=[], x1=[], y1=[]))
        self.body_src = ColumnDataSource(dict(left=[], right=[], top=[], bottom=[]))
        f = figure(width=FAN_WIDTH_PX, height=FAN_HEIGHT_PX["reflection"], x_range=DataRange1d(range_padding=0.02),
                   y_range=DataRange1d(range_padding=0.02), match_aspect=True, min_border=4,
                   tools="pan,wheel_zoom,reset,save", toolbar_location="right", title="Orders and angles")
        f.title.text_font_size = "12px"
        f.axis.visible = False
        f.grid.visible = False
        f.quad(left="left", right="right", top="top", bottom="bottom", source=self.body_src, fill_color="#b9bcc2",
               line_color="#555", hatch_pattern="/", hatch_color="#777", hatch_alpha=0.5)
        f.segment(x0="x0", y0="y0", x1="x1", y1="y1", source=self.scale_line_src, line_color="#d5d5d5",
                  line_width=1)
        f.text(x="x", y="y", text="text", source=self.scale_src, text_font_size="10px", text_color="#888",
               text_align="center", text_baseline="middle")
        f.segment(x0="x0", y0="y0", x1="x1", y1="y1", source=self.zero_src, line_color="#333", line_width=2,
                  line_dash="dashed")
        rays = f.segment(x0="x0", y0="y0", x1="x1", y1="y1", source=self.ray_src, line_color="color", line_width=2.5,
                         line_alpha=0.9)
        ends = f.scatter(x="x1", y="y1", source=self.ray_src, color="color", size=5)
        f.add_layout(Arrow(end=VeeHead(size=12, fill_color="#000"), source=self.beam_src, x_start="x0", y_start="y0",
                           x_end="x1", y_end="y1", line_width=3, line_color="#000"))
        f.text(x="x", y="y", text="text", source=self.fan_label_src, text_font_size="12px", text_font_style="bold",
               text_align="center", text_baseline="middle", background_fill_color="white",
               background_fill_alpha=0.8)
        f.text(x="x", y="y", text="text", source=self.note_src, text_font_size="11px", text_color="#333",
               text_align="align", text_baseline="middle")
        f.add_tools(HoverTool(renderers=[rays, ends], tooltips=[("order", "@order"), ("λ", "@wl{0.0} nm"),
                                                                ("β", "@beta{0.00}°")]))
        self.fan_fig = f

        # c. N-slit line shape
        self.shape_src = ColumnDataSource(dict(beta=[], y=[]))
        self.peak_src = ColumnDataSource(dict(beta=[], y=[], label=[], efficiency=[]))
        self.missing_src = ColumnDataSource(dict(beta=[], y=[], label=[], align=[]))
        self.eff_src = ColumnDataSource(dict(beta=[], y=[], order=[], efficiency=[]))
        p = figure(height=260, sizing_mode="stretch_width", tools="xpan,xwheel_zoom,box_zoom,reset,save",
                   x_axis_label="diffraction angle β (°)", y_axis_label="intensity / N²",
                   title="N-slit line shape", y_range=Range1d(0, 1.12))
        line = p.line("beta", "y", source=self.shape_src, line_width=1.4, color="#1b1b1b")
        p.text(x="beta", y="y", text="label", source=self.peak_src, text_font_size="11px", text_align="center",
               text_baseline="bottom", y_offset=-2, text_color="#1f4e8c")
        p.scatter(x="beta", y="y", source=self.missing_src, marker="x", size=12, color="#b00020", line_width=2)
        p.text(x="beta", y="y", text="label", source=self.missing_src, text_font_size="11px", text_align="align",
               text_baseline="bottom", y_offset=-8, text_color="#b00020")
        eff = p.scatter(x="beta", y="y", source=self.eff_src, marker="circle", size=9, color="#d97706")
        self.shape_hover = HoverTool(renderers=[line], mode="vline", tooltips=[("β", "@beta{0.000}°"),
                                                                               ("I/N²", "@y{0.0000}")])
        p.add_tools(self.shape_hover)
        p.add_tools(HoverTool(renderers=[eff], tooltips=[("order", "@order"), ("efficiency", "@efficiency{0.000}")]))
        self.eff_renderer = eff
        self.shape_fig = p

        # d. colour strip and colour map
        tools = "pan,wheel_zoom,reset,save"
        self.strip_src = ColumnDataSource(dict(image=[], L=[], a=[], b=[], orders=[], x=[], y=[], dw=[], dh=[]))
        st = figure(height=140, sizing_mode="stretch_width", tools="xpan,xwheel_zoom,reset,save",
                    x_range=Range1d(VIEW_DEG[0], VIEW_DEG[-1]), y_range=Range1d(0, 1),
                    x_axis_label="viewing angle β (° from the normal; + on the lamp's side)",
                    title="Colour seen at each viewing angle (white light)")
        simg = st.image_rgba(image="image", x="x", y="y", dw="dw", dh="dh", source=self.strip_src)
        st.add_tools(HoverTool(renderers=[simg], tooltips=[("view", "$x{0.0}°"), ("orders reaching the eye", "@orders"),
                                                           ("L*, a*, b*", "@L{0.0}, @a{0.0}, @b{0.0}")]))
        st.yaxis.visible = False
        st.ygrid.visible = False
        self.strip_specular = Span(location=0, dimension="height", line_color="white", line_width=2, line_dash="dashed")
        st.add_layout(self.strip_specular)
        self.strip_fig = st

        self.map_src = ColumnDataSource(dict(image=[], L=[], a=[], b=[], x=[], y=[], dw=[], dh=[]))
        dens = map_densities(self.settings.lines_per_mm)
        m = figure(height=330, sizing_mode="stretch_width", tools=tools,
                   x_range=Range1d(VIEW_DEG[0], VIEW_DEG[-1]), y_range=Range1d(dens[0], dens[-1]),
                   x_axis_label="viewing angle β (°)", y_axis_label="groove density (lines/mm)",
                   title="Colour vs viewing angle and groove density")
        mimg = m.image_rgba(image="image", x="x", y="y", dw="dw", dh="dh", source=self.map_src)
        m.add_tools(HoverTool(renderers=[mimg], tooltips=[("view", "$x{0.0}°"), ("density", "$y{0} lines/mm"),
                                                          ("L*, a*, b*", "@L{0.0}, @a{0.0}, @b{0.0}")]))
        self.map_density = Span(location=0, dimension="width", line_color="white", line_width=2, line_dash="dashed")
        self.map_specular = Span(location=0, dimension="height", line_color="white", line_width=1.5,
                                 line_dash="dashed")
        m.add_layout(self.map_density)
        m.add_layout(self.map_specular)
        self.map_fig = m

    # ------------------------------------------------------------------ wiring
    def _wire(self):
        for field, key, name, lo, hi, unit in self._fields():
            field.input.param.watch(partial(self._on_number, field, key, name, lo, hi, unit), "value")
        self.order.input.param.watch(self._on_order, "value")
        self.preset.param.watch(self._on_preset, "value")
        self.kind.param.watch(partial(self._on_choice, "kind"), "value")
        self.groove.param.watch(partial(self._on_choice, "groove"), "value")
        self.illuminant.param.watch(partial(self._on_choice, "illuminant"), "value")
        self.brightness.param.watch(partial(self._on_choice, "brightness"), "value")
        self.source.param.watch(partial(self._on_choice, "source"), "value")
        self.n_slits.param.watch(lambda e: _locked(self._draw_line_shape), "value")
        self.scale.param.watch(lambda e: _locked(self._draw_line_shape), "value")
        self.n_slits.param.watch(self._changed, "value")
        self.scale.param.watch(self._changed, "value")

    def _sync_fields(self):
        """Show the settings in the widgets (after a preset) without firing their handlers."""
        s = self.settings
        self._syncing = True
        try:
            for field, key, *_ in self._fields():
                field.set_text(_fmt(getattr(s, key), 4))
                field.show_error(None)
            self.order.set_text(str(s.order))
            self.order.show_error(None)
            self.kind.value = s.kind
            self.groove.value = s.groove
            self.illuminant.value = s.illuminant
            self.brightness.value = s.brightness
            self.source.value = s.source
            self._show_groove_fields()
        finally:
            self._syncing = False
        self._show_origin()

    def _show_source_fields(self):
        """The laser line's field and caution for a laser source, the band's fields for a lamp."""
        laser = self.shown.source == "laser"
        self.laser.input.visible = self.laser_caution.visible = laser
        self.source_lo.input.visible = self.source_hi.input.visible = not laser

    def _show_groove_fields(self):
        """Show the field the grooves use; the hidden one goes back to its value in use, without a message,
        so it never reappears with a value the calculation is not using."""
        s = self.settings
        blazed = s.groove == "blazed"
        self.blaze.input.visible = blazed
        self.duty.input.visible = not blazed
        hidden, key = (self.duty, "duty_cycle") if blazed else (self.blaze, "blaze_angle_deg")
        syncing, self._syncing = self._syncing, True
        try:
            hidden.set_text(_fmt(getattr(s, key), 4))
        finally:
            self._syncing = syncing
        hidden.show_error(None)

    def modified(self) -> bool:
        """True when the grating differs from the preset or file it was loaded from."""
        return self.settings.grating_fields() != self._origin[1].grating_fields()

    def _show_origin(self):
        """The preset selector and scenario line: the preset while the grating is the preset's, else
        "(choose a preset)" and a note that the preset's scenario no longer describes the settings."""
        stem, origin = self._origin
        changed = self.modified()
        syncing, self._syncing = self._syncing, True
        try:
            self.preset.value = stem if (stem and not changed) else ""
        finally:
            self._syncing = syncing
        if not changed:
            sc = f" — {_esc(origin.scenario)}" if origin.scenario else ""
            self.scenario.object = f"<i>{_esc(origin.name)}</i>{sc}"
        else:
            what = "preset" if stem else "grating"
            self.scenario.object = (f"<i>Changed from the {what} “{_esc(origin.name)}”</i>: its scenario no longer "
                                    "describes these settings. Choose the preset again to restore it.")

    # ------------------------------------------------------------------ input handlers
    def _take(self, field, new: GratingSettings) -> bool:
        """Take ``new`` settings if every view can be computed from them, and draw them; else say why
        beside ``field`` and keep the previous settings."""
        try:
            results = self._compute(new)
        except InputError as exc:
            if field is not None:
                field.show_error(str(exc))
            return False
        if field is not None:
            field.show_error(None)
        self.settings = new
        _locked(partial(self._apply, new, results))
        _locked(self._show_origin)
        self._changed()
        return True

    def _changed(self, *_):
        for fn in self.on_change:
            fn()

    def _on_number(self, field, key, name, lo, hi, unit, event):
        if self._syncing:
            return
        pair = next((p for p in self._pairs() if field in p[:2]), None)
        if pair is not None:
            self._on_pair(pair, field)
            return
        try:
            value = parse_number(event.new, name, lo, hi, unit)
        except InputError as exc:
            field.show_error(str(exc))
            return
        self._take(field, replace(self.settings, **{key: value}))

    def _on_pair(self, pair, changed):
        """Either field of a linked pair changed: check both typed values and apply them together.

        The changed field's value is refused with a message beside it when it is not a number in range
        or not below (above) the other end; a pair that becomes valid is applied whole, so both fields
        always show values in use unless a message stands beside them."""
        lo_f, hi_f, what = pair
        spec = {f: (key, name, lo, hi, unit) for f, key, name, lo, hi, unit in self._fields()}
        values, errors = {}, {}
        for f in (lo_f, hi_f):
            key, name, lo, hi, unit = spec[f]
            try:
                values[f] = parse_number(f.input.value, name, lo, hi, unit)
            except InputError as exc:
                errors[f] = str(exc)
        if changed in errors:
            changed.show_error(errors[changed])
            return
        in_use = {f: getattr(self.settings, spec[f][0]) for f in (lo_f, hi_f)}
        lo_v, hi_v = (values.get(f, in_use[f]) for f in (lo_f, hi_f))
        if not lo_v < hi_v:
            name = spec[changed][1]
            msg = (f"{name}: the {what} runs from its short end to its long end; {lo_v:g} nm is not below "
                   f"{hi_v:g} nm. Make the first field the shorter wavelength.")
            changed.show_error(msg)
            other = hi_f if changed is lo_f else lo_f
            if other not in errors and values[other] != in_use[other]:   # said once; the other field only points to it
                other.show_error(f"{spec[other][1]}: not in use until the {what} is valid (see {name}).")
            return
        new = replace(self.settings, **{spec[lo_f][0]: lo_v, spec[hi_f][0]: hi_v})
        if self._take(changed, new):
            for f in (lo_f, hi_f):
                if f not in errors:
                    f.show_error(None)

    def _on_order(self, event):
        if self._syncing:
            return
        field = self.order
        try:
            value = parse_number(event.new, "Order", -100, 100)
            if value != int(value):
                raise InputError(f"Order: {event.new} is not a whole number; orders are …, −2, −1, 1, 2, ….")
            if value == 0:
                raise InputError("Order: the zero order does not disperse, so it has no dispersion, resolving "
                                 "power or free spectral range; type a nonzero order such as 1 or −1.")
        except InputError as exc:
            field.show_error(str(exc))
            return
        self._take(field, replace(self.settings, order=int(value)))

    def _on_choice(self, key, event):
        if self._syncing or event.new is None:
            return
        new = replace(self.settings, **{key: event.new})
        if self._take(None, new):
            if key == "groove":
                self._show_groove_fields()
            return
        syncing, self._syncing = self._syncing, True     # not taken: the widget shows the value in use
        try:
            getattr(self, key).value = getattr(self.settings, key)
        finally:
            self._syncing = syncing

    def _on_preset(self, event):
        if self._syncing or not event.new:
            return
        self.load_preset(event.new)

    # ------------------------------------------------------------------ link
    def _link_spec(self) -> dict:
        """Link key → (settings key, label, check): ``check(text)`` gives the value or raises InputError."""
        spec = {}
        for (field, key, label, lo, hi, *unit), short in zip(self._fields(), LINK_NUMBER_KEYS):
            spec[short] = (key, label, partial(parse_number, name=label, lo=lo, hi=hi, unit=unit[0] if unit else ""))
        spec["g_m"] = ("order", "Order of interest", _link_order)
        for short, key, label, allowed in LINK_CHOICES:
            spec[short] = (key, label, partial(_link_choice, allowed=allowed))
        return spec

    def link_keys(self) -> set[str]:
        return set(self._link_spec()) | {"g_preset", "g_name", "g_n", "g_scale"} | {k for k, *_ in LINK_RIGOROUS_KEYS}

    def rigorous_dict(self) -> dict:
        """The rigorous settings as a grating file's "rigorous" object (depth None: the default)."""
        st = self.rigorous_state
        return {"profile": st.profile, "depth_nm": st.depth_nm, "material": st.material,
                "polarization": st.polarization}

    def apply_rigorous(self, values: dict) -> None:
        """Set the rigorous settings (already checked: a grating file's "rigorous" object) and their widgets."""
        st = self.rigorous_state
        st.param.update(**{k: values[k] for k in ("profile", "depth_nm", "material", "polarization") if k in values})
        self.rig_depth.value = "" if st.depth_nm is None else f"{st.depth_nm:g}"

    def _apply_rigorous_link(self, items: dict, said) -> None:
        values = {}
        for short, key, label in LINK_RIGOROUS_KEYS:
            if short not in items:
                continue
            text = str(items[short])[:200].strip()
            try:
                if key == "depth_nm":
                    values[key] = None if text == "" else parse_number(text, label, *gf_rigorous.RIGOROUS_DEPTH_NM,
                                                                       "nm")
                else:
                    values[key] = _link_choice(text, RigorousSettings.param[key].objects)
            except InputError as exc:
                said(short, label, str(exc))
        if values:
            self.apply_rigorous(values)

    def link_state(self) -> dict[str, str]:
        """{link key: text} of the settings, the preset or grating they came from, and the line-shape view."""
        s, (stem, origin) = self.settings, self._origin
        out = {"g_preset": stem} if stem else {"g_name": origin.name[:200]}
        for short, (key, *_rest) in self._link_spec().items():
            v = getattr(s, key)
            out[short] = f"{v:.10g}" if isinstance(v, float) else str(v)
        out["g_n"], out["g_scale"] = str(self.n_slits.value), str(self.scale.value)
        for short, key, _label in LINK_RIGOROUS_KEYS:
            v = getattr(self.rigorous_state, key)
            out[short] = "" if v is None else f"{v:.10g}" if isinstance(v, float) else str(v)
        return out

    def apply_link_state(self, items: dict) -> list[str]:
        """Show the settings a link carries; a sentence per field not applied (the others are applied)."""
        errors = []
        said = lambda key, label, why: errors.append(  # noqa: E731
            f"Link field '{key}' ({label}) was not applied: {why}".rstrip(".") + ".")
        stems = dict(list_grating_presets())
        base, origin = self.settings, None
        if "g_preset" in items:
            if items["g_preset"] in stems:
                base = GratingSettings.from_file(load_grating_preset(items["g_preset"]), self.settings)
                origin = (items["g_preset"], base)
            else:
                said("g_preset", "Preset grating", f"give one of {', '.join(stems)}")
        changes = {}
        for short, (key, label, check) in self._link_spec().items():
            if short in items:
                try:
                    changes[key] = check(str(items[short])[:200])
                except InputError as exc:
                    said(short, label, str(exc))
        for lo_key, hi_key, what in (("band_lo_nm", "band_hi_nm", "band"), ("source_lo_nm", "source_hi_nm",
                                                                           "source band")):
            lo, hi = (changes.get(k, getattr(base, k)) for k in (lo_key, hi_key))
            if not lo < hi and (lo_key in changes or hi_key in changes):
                changes.pop(lo_key, None), changes.pop(hi_key, None)
                errors.append(f"The link's {what} ({lo:g} to {hi:g} nm) does not run from a short to a long "
                              "wavelength; it was not applied.")
        new = replace(base, **changes)
        try:                                  # one draw of the final settings (each draw is a message)
            self._compute(new)
        except InputError as exc:
            errors.append(f"The link's grating settings were not applied: {exc}")
            new = base
        if origin is None and "g_name" in items:
            name = "".join(c for c in str(items["g_name"]) if c.isprintable())[:200].strip()
            origin = (None, replace(new, name=name or "grating from a link", scenario=""))
        if new != self.settings and not self._take(None, new):
            origin = None
        if origin is not None:
            self._origin = origin
        for short, widget, label in (("g_n", self.n_slits, "Grooves lit"), ("g_scale", self.scale, "Scale")):
            if short in items:
                match = next((v for v in widget.options.values() if str(v) == items[short]), None)
                if match is None:
                    said(short, label, f"give one of {', '.join(str(v) for v in widget.options.values())}")
                else:
                    widget.value = match
        if "g_preset" in items and origin is not None and origin[0] == items["g_preset"]:
            rig = load_grating_preset(items["g_preset"]).rigorous
            if rig is not None:
                self.apply_rigorous(rig)
        self._apply_rigorous_link(items, said)
        self._sync_fields()
        return errors

    def file_text(self, name: str | None = None) -> str:
        """The current grating as the text of a grating file (``name`` replaces its name). A grating changed
        since its preset or file was loaded is named "… (changed)" and carries no scenario."""
        gf = replace(self.settings.to_file(), rigorous=self.rigorous_dict())
        if self.modified():
            gf = replace(gf, name=f"{gf.name} (changed)"[:200], scenario="")
        if name:
            gf = replace(gf, name=name)
        return dump_grating_file(gf)

    def load_file_text(self, text) -> str:
        """Show the grating of a grating file's text; returns its name. Raises InputError (settings kept)."""
        gf = load_grating_file(text)
        new = GratingSettings.from_file(gf, self.settings)
        self._compute(new)                              # raises InputError before anything changes
        self._origin = (None, new)
        if gf.rigorous is not None:
            self.apply_rigorous(gf.rigorous)
        self._take(None, new)
        self._sync_fields()
        return gf.name

    def load_preset(self, stem: str) -> None:
        """Show one shipped grating preset (its order and lamp keep the current choice)."""
        preset = load_grating_preset(stem)
        new = GratingSettings.from_file(preset, self.settings)
        if preset.rigorous is not None:
            self.apply_rigorous(preset.rigorous)
        if self._take(None, new):
            self._origin = (stem, new)
            self._sync_fields()

    # ------------------------------------------------------------------ computing and drawing
    def refresh(self):
        """Recompute and redraw every view of the current settings (the colour map starts in the
        background if its inputs changed). Raises InputError if they cannot be computed."""
        self._apply(self.settings, self._compute(self.settings))

    @staticmethod
    def _compute(s: GratingSettings) -> dict:
        """Everything but the colour map and the line shape, from ``s`` (physics calls only)."""
        t0 = time.perf_counter()
        out = dict(fan=compute_fan(s), readouts=compute_readouts(s), overlaps=compute_overlaps(s),
                   strip=compute_strip(s), plan=compute_plan(s))
        out["ms"] = 1000 * (time.perf_counter() - t0)
        return out

    def _apply(self, s: GratingSettings, results: dict):
        """Show computed results (changes Bokeh models: runs with the document lock when served)."""
        t0 = time.perf_counter()
        self.shown = s
        self._show_source_fields()
        self.fan, self.readouts, self.overlaps = results["fan"], results["readouts"], results["overlaps"]
        self.strip, self.plan = results["strip"], results["plan"]["designs"]
        self.plan_rejected = results["plan"]["rejected"]
        self._draw_fan()
        self._draw_readouts()
        self._draw_overlaps()
        self._draw_line_shape()
        self._draw_strip()
        self._draw_plan()
        self.map_density.location = s.lines_per_mm
        self.map_specular.location = -s.incidence_deg
        self.generation += 1
        self.timings_ms["compute"] = results["ms"]
        self.timings_ms["draw"] = 1000 * (time.perf_counter() - t0)
        self._refresh_map(s)
        if getattr(self, "rigorous", None) is not None:
            self._mark_rigorous_stale()

    def _draw_fan(self):
        s, fan = self.shown, self.fan
        a = np.radians(s.incidence_deg)
        side = 1.0 if s.kind == "reflection" else -1.0            # orders above (reflection) or below the grating

        def direction(beta_deg, length):
            b = np.radians(np.asarray(beta_deg, dtype=float))
            return -np.sin(b) * length, side * np.cos(b) * length

        rays = fan["rays"]
        lengths = np.array([_ray_length(m) for m in rays["order"]])
        x1, y1 = direction(rays["beta"], lengths)
        n = len(rays["order"])
        self.ray_src.data = dict(x0=np.zeros(n), y0=np.zeros(n), x1=x1, y1=y1, color=rays["color"],
                                 order=[_order_text(m) for m in rays["order"]], wl=rays["wl"], beta=rays["beta"])
        labels = dict(x=[], y=[], text=[], order=[], span=[])
        for row in fan["rows"]:
            m = row["order"]
            mid = 0.5 * (row["beta_lo"] + row["beta_hi"])
            if not np.isfinite(mid):
                continue
            x, y = direction(mid, _ray_length(m) + 0.1)
            labels["x"].append(float(x))
            labels["y"].append(float(y))
            labels["text"].append(_order_text(m) if m else "0")
            labels["order"].append(m)
            labels["span"].append(f"{row['beta_lo']:.1f}…{row['beta_hi']:.1f}°")
        self.fan_label_src.data = labels
        x0, y0 = direction(-s.incidence_deg, 1.25)
        self.zero_src.data = dict(x0=[0.0], y0=[0.0], x1=[float(x0)], y1=[float(y0)], beta=[-s.incidence_deg])
        bx, by = -1.6 * np.sin(a), 1.6 * np.cos(a)
        self.beam_src.data = dict(x0=[bx], y0=[by], x1=[0.0], y1=[0.0])
        left = bx <= 1e-9                                  # label on the side of the beam facing the normal
        self.note_src.data = dict(x=[bx + (0.06 if left else -0.06)], y=[by - 0.04],
                                  text=[f"incident, α = {s.incidence_deg:g}°"], align=["left" if left else "right"])
        # angle scale on the diffraction side: ticks every 30°; ±90° lie along the grating; no label under
        # the incident beam (reflection: the beam is drawn along β = +α)
        ticks = np.arange(-60, 61, 30)
        if s.kind == "reflection":
            ticks = ticks[np.abs(ticks - s.incidence_deg) > 6]
        tx, ty = direction(ticks, 1.4)
        lx0, ly0 = direction(ticks, 0.0)
        lx1, ly1 = direction(ticks, 1.32)
        self.scale_src.data = dict(x=list(tx), y=list(ty), text=[f"{t:+d}°" if t else "0° (normal)" for t in ticks])
        self.scale_line_src.data = dict(x0=list(lx0), y0=list(ly0), x1=list(lx1), y1=list(ly1))
        if s.kind == "reflection":
            self.body_src.data = dict(left=[-1.45], right=[1.45], top=[0.0], bottom=[-0.12])
        else:
            self.body_src.data = dict(left=[-1.45], right=[1.45], top=[0.03], bottom=[-0.03])
        self.fan_fig.height = FAN_HEIGHT_PX[s.kind]
        self.fan_fig.title.text = (f"{s.lines_per_mm:g} lines/mm {s.kind}, {s.band_lo_nm:g}–{s.band_hi_nm:g} nm, "
                                   f"α = {s.incidence_deg:g}°")
        # caption
        drawn = fan["drawn"]
        parts = []
        for row in fan["rows"]:
            m = row["order"]
            if m == 0:
                continue
            w = f"{row['wl_lo']:.0f}–{row['wl_hi']:.0f} nm"
            partial_note = "" if (abs(row["wl_lo"] - s.band_lo_nm) < 0.5 and abs(row["wl_hi"] - s.band_hi_nm) < 0.5) \
                else f" (only {w})"
            parts.append(f"{_order_text(m)}: {_deg(row['beta_lo'], 1)} … {_deg(row['beta_hi'], 1)}{partial_note}")
        hidden = len(fan["orders"]) - len(drawn)
        zero = "specular reflection" if s.kind == "reflection" else "undeviated, straight through"
        if len(fan["orders"]) == 1:
            self.fan_caption.object = (
                f"<b>Only the zero order propagates</b> (β = {_deg(-s.incidence_deg, 1)}): the groove spacing "
                f"{self.readouts['spacing_nm']:.0f} nm is too fine to diffract {s.band_lo_nm:g}–{s.band_hi_nm:g} nm "
                "at this incidence. Black arrow: incident beam.")
            return
        self.fan_caption.object = (
            f"<b>Propagating orders</b> {_order_text(min(fan['orders']))} … {_order_text(max(fan['orders']))}"
            + (f" ({hidden} beyond ±{MAX_FAN_ORDER} not drawn)" if hidden else "") + ". "
            + "; ".join(parts) + f". Order 0 at β = {_deg(-s.incidence_deg, 1)} ({zero}). "
            "Black arrow: incident beam. Rays every "
            f"{(s.band_hi_nm - s.band_lo_nm) / (FAN_RAYS - 1):.3g} nm in display colours (grey: UV or IR). "
            "Other orders are evanescent.")

    def _draw_readouts(self):
        s, r = self.shown, self.readouts
        m = s.order
        c = s.centre_nm
        mt = _order_text(m)

        def angle(x):
            return _deg(x) if np.isfinite(x) else "<span style='color:#b00020'>evanescent</span>"

        rows = [
            ("groove spacing d", f"{r['spacing_nm']:.1f} nm"),
            (f"β at {s.band_lo_nm:g} nm", angle(r["beta_lo_deg"])),
            (f"β at {s.band_hi_nm:g} nm", angle(r["beta_hi_deg"])),
            (f"angular dispersion at {c:g} nm", f"{_num(r['angular_dispersion_deg_per_nm'], '{:.4f}')} °/nm"),
            (f"reciprocal linear dispersion, f = {s.focal_length_mm:g} mm",
             f"{_num(r['reciprocal_linear_dispersion_nm_per_mm'], '{:.3f}')} nm/mm"),
            (f"resolving power |m|·N, N = {r['grooves_lit']:,.0f} grooves lit", f"{r['resolving_power']:,.0f}"),
            (f"smallest resolvable Δλ at {c:g} nm", f"{r['resolvable_nm']:.4g} nm"),
            (f"free spectral range λ/|m| from {s.band_lo_nm:g} nm",
             f"{r['free_spectral_range_nm']:.4g} nm"),
            (f"Littrow angle at {c:g} nm", _deg(r["littrow_deg"]) if np.isfinite(r["littrow_deg"])
             else "none (|m|·λ > 2d)"),
            (f"groove efficiency at {c:g} nm (scalar, relative)", f"{r['efficiency']:.3f}"),
        ]
        if s.groove == "blazed":
            facet = "" if s.kind == "reflection" else " (as a reflecting facet)"
            rows.append((f"blaze wavelength, Littrow{facet}",
                         f"{r['blaze_nm']:.1f} nm" if r["blaze_nm"] is not None else "— (blazed for m > 0)"))
            if r["blaze_at_deviation_nm"] is not None:
                rows.append((f"blaze wavelength at the planner's {r['deviation_deg']:g}° deviation",
                             f"{r['blaze_at_deviation_nm']:.1f} nm"))
        ray = "<br>".join(f"{_order_text(k)}: {v:.1f} nm" + (" <span style='color:#b00020'>in band</span>"
                                                            if s.band_lo_nm <= v <= s.band_hi_nm else "")
                          for k, v in sorted(r["rayleigh_nm"].items()))
        rows.append(("Rayleigh anomalies (order goes grazing)", ray or "—"))
        if r["missing_orders"]:
            half = " (50 % duty cycle: every even order)" if abs(s.duty_cycle - 0.5) < 1e-9 else ""
            rows.append(("missing orders (the grooves send no light)",
                         ", ".join(_order_text(k) for k in r["missing_orders"]) + half))
        warn = ""
        if not (np.isfinite(r["beta_lo_deg"]) and np.isfinite(r["beta_hi_deg"])):
            bad = r["status_lo"] if not np.isfinite(r["beta_lo_deg"]) else r["status_hi"]
            warn = f"<div style='color:#b00020;font-size:12px;margin:2px 0'>{_esc(bad[0].upper() + bad[1:])}.</div>"
        body = "".join(f"<tr><td style='padding:1px 8px 1px 0;color:#444;vertical-align:top'>{k}</td>"
                       f"<td style='white-space:nowrap;vertical-align:top'><b>{v}</b></td></tr>" for k, v in rows)
        self.readout_html.object = (f"<div class='fg-readout-values' style='font-size:12px'><div style='font-size:13px;margin-bottom:2px'>"
                                    f"<b>Read-outs for order {mt}</b> <span style='color:#666'>(β from the normal, + on the "
                                    f"incident side)</span></div>{warn}"
                                    f"<table style='font-size:12px;border-collapse:collapse'>{body}</table></div>")

    def _draw_overlaps(self):
        s, o = self.shown, self.overlaps
        mt = _order_text(s.order)
        laser = s.source == "laser"
        src = (f"a {s.laser_nm:g} nm laser line" if laser else
               f"source taken to emit {s.source_lo_nm:g}–{s.source_hi_nm:g} nm")
        beams = ""
        if laser:
            where = [(_order_text(m), _deg(b)) for m, b in compute_laser_orders(s)]
            beams = ("<div style='font-size:13px;margin:2px 0'><b>Beams leaving the grating</b> (every one carries "
                     f"laser light; block those you do not use):</div>"
                     + _table(["order", "β"], where, css="fg-laser-orders"))
        if o["error"]:
            self.overlap_html.object = (f"<h4 style='margin:4px 0'>Order overlap (order {mt})</h4>"
                                        f"<div style='color:#b00020;font-size:13px'>{_esc(o['error'])}</div>{beams}")
            return
        rows = [(_order_text(r["order"]), f"{r['lo_nm']:.0f}–{r['hi_nm']:.0f}",
                 f"{r['at_band_nm'][0]:.0f}–{r['at_band_nm'][1]:.0f}") for r in o["rows"]]
        table = (_table(["other order", "its wavelengths (nm)", f"land where order {mt} has (nm)"], rows)
                 if rows else "<div style='font-size:13px'>No other order of the same sign lands on the band.</div>")
        flt = o["filter"]
        cover = ("" if laser or (s.source_lo_nm <= s.band_lo_nm and s.band_hi_nm <= s.source_hi_nm) else
                 "<div style='font-size:12px;color:#8a5a00'>The source band "
                 f"({s.source_lo_nm:g}–{s.source_hi_nm:g} nm) "
                 f"does not cover all of the band ({s.band_lo_nm:g}–{s.band_hi_nm:g} nm); set it under Light.</div>")
        self.overlap_html.object = (
            f"<h4 style='margin:4px 0'>Order overlap on the band in order {mt} ({src})</h4>{cover}{table}"
            f"<div style='font-size:13px;margin-top:4px'><b>Order-sorting filter:</b> {_esc(flt['note'])}</div>{beams}")

    def _draw_line_shape(self):
        s = self.shown
        n = int(self.n_slits.value)
        log_scale = self.scale.value == "log"
        ls = self.line_shape = compute_line_shape(s, n)
        self.shape_src.data = dict(beta=ls["beta"].astype(np.float32),
                                   y=(ls["db"] if log_scale else ls["rel"]).astype(np.float32))
        self.shape_hover.tooltips = [("β", "@beta{0.000}°"), ("I/N²", "@y{0.0} dB" if log_scale else "@y{0.0000}")]
        top = 3.0 if log_scale else 1.12
        bottom = LOG_FLOOR_DB if log_scale else 0.0
        label_y = top - (6 if log_scale else 0.1)
        peaks = [o for o in ls["orders"] if not o["missing"]]
        missing = [o for o in ls["orders"] if o["missing"]]
        self.peak_src.data = dict(beta=[o["beta"] for o in peaks], y=[label_y] * len(peaks),
                                  label=[f"m = {_order_text(o['order'])}" for o in peaks],
                                  efficiency=[o["efficiency"] for o in peaks])
        self.missing_src.data = dict(beta=[o["beta"] for o in missing], y=[bottom + (3 if log_scale else 0.02)] * len(missing),
                                     label=[f"m = {_order_text(o['order'])} missing" for o in missing],
                                     align=[_align(o["beta"], ls["beta"]) for o in missing])
        blazed = s.groove == "blazed"
        eff = [o for o in ls["orders"] if blazed]
        self.eff_src.data = dict(beta=[o["beta"] for o in eff],
                                 y=[(10 * np.log10(max(o["efficiency"], 10 ** (LOG_FLOOR_DB / 10))) if log_scale
                                     else o["efficiency"]) for o in eff],
                                 order=[_order_text(o["order"]) for o in eff], efficiency=[o["efficiency"] for o in eff])
        self.eff_renderer.visible = blazed
        self.shape_fig.y_range.update(start=bottom, end=top)
        self.shape_fig.yaxis.axis_label = "intensity / N² (dB)" if log_scale else "intensity / N²"
        where = (f"around order {_order_text(s.order)}" if ls["around"]
                 else f"over all angles (order {_order_text(s.order)} does not reach {s.centre_nm:g} nm)")
        self.shape_fig.title.text = f"N-slit line shape at {s.centre_nm:g} nm {where}, N = {n} grooves lit"
        grooves = (f"slits {ls['slit_width_nm']:.0f} nm wide (duty cycle {s.duty_cycle:g}) in a "
                   f"{ls['spacing_nm']:.0f} nm period: orders where the single-slit envelope is zero are missing"
                   if not blazed else
                   "blazed grooves: the curve is the interference of N grooves alone; orange dots give each "
                   "order's scalar blaze efficiency")
        self.line_caption.object = (
            f"N = {n} is a small number chosen for display (the grating lights {self.readouts['grooves_lit']:,.0f} "
            f"grooves): principal maxima at the orders, N − 2 = {n - 2} weaker secondary maxima between neighbours; "
            f"{grooves}.")

    def _draw_strip(self):
        s, st = self.shown, self.strip
        dv = VIEW_DEG[1] - VIEW_DEG[0]
        self.strip_src.data = dict(image=[_rgba(st["rgb"][None, :, :])], L=[st["lab"][None, :, 0]],
                                   a=[st["lab"][None, :, 1]], b=[st["lab"][None, :, 2]],
                                   orders=[np.array(st["orders_text"], dtype=object)[None, :]],
                                   x=[VIEW_DEG[0] - dv / 2], y=[0], dw=[VIEW_DEG[-1] - VIEW_DEG[0] + dv], dh=[1])
        self.strip_specular.location = -s.incidence_deg
        self.strip_fig.title.text = (f"Colour seen at each viewing angle: {s.lines_per_mm:g} lines/mm, lamp "
                                     f"{s.illuminant} at α = {s.incidence_deg:g}°")

    def _plan_ranking(self):
        """(designs in the order shown, the current rigorous ranking or None, scalar means by design)."""
        s, plan, eff = self.shown, list(self.plan or []), self.plan_efficiency
        current = (eff is not None and eff["settings"] == (s, *self._rigorous_request_quiet(),
                                                           self.rigorous_state.polarization)
                   and set(eff["scalar"]) == {(d.lines_per_mm, d.order) for d in plan})
        scalar = eff["scalar"] if current else {(d.lines_per_mm, d.order): plan_scalar_efficiency(s, d) for d in plan}
        if not current:
            return plan, None, scalar

        def rank(d):
            r = eff["rigorous"].get((d.lines_per_mm, d.order))
            computed = isinstance(r, float)
            return (0 if computed else 1 if r is None else 2, -(r if computed else scalar[(d.lines_per_mm, d.order)]))
        return sorted(plan, key=rank), eff, scalar

    def _draw_plan(self):
        s = self.shown
        plan, eff, scalar = self._plan_ranking()
        pol = self.rigorous_state.polarization
        head = ["lines/mm", "order", "incidence α (°)", "β range", "spread (mm)", "fill", "nm/pixel",
                "resolution (nm)", "free spectral range (nm)", "scalar efficiency (band mean, relative)",
                f"rigorous efficiency (band mean, {pol}, absolute)"]
        rows = []
        for d in plan:
            r = eff["rigorous"].get((d.lines_per_mm, d.order)) if eff is not None else None
            rig = (f"<b>{r:.3f}</b>" if isinstance(r, float) else
                   f"<span title='{_esc(r)}'>not computed (see tooltip)</span>" if isinstance(r, str) else "—")
            mark = " ◀ current density" if abs(d.lines_per_mm - s.lines_per_mm) < 1e-9 else ""
            rows.append((f"<b>{d.lines_per_mm:g}</b>{mark}", f"{d.order:+d}", f"{d.incidence_deg:.1f}",
                         f"{_deg(d.beta_range_deg[0], 1)} … {_deg(d.beta_range_deg[1], 1)}", f"{d.spread_mm:.1f}",
                         f"{100 * d.fill_fraction:.0f}%", f"{d.nm_per_pixel:.3f}", f"{d.resolution_nm:.2f}",
                         f"{d.free_spectral_range_nm:.0f}", f"{scalar[(d.lines_per_mm, d.order)]:.2f}", rig))
            if d.filter_edges_nm:
                rows[-1] = rows[-1] + (f"stepped, edges {', '.join(f'{e:.0f}' for e in d.filter_edges_nm)} nm",)
            else:
                rows[-1] = rows[-1] + ("—",)
        head.append("order-sorting filter")
        what = (f"{s.band_lo_nm:g}–{s.band_hi_nm:g} nm on a {s.detector_length_mm:g} mm detector with "
                f"{s.pixel_pitch_um:g} µm pixels, f = {s.focal_length_mm:g} mm")
        body = _table(head, rows, css="fg-plan-designs") if rows else (
            "<div style='font-size:13px;color:#b00020'>No listed groove density (150–3600 lines/mm) in orders 1–3 "
            "fits this band on this detector; the reasons for each are below. Try another focal length, detector, "
            "deviation or band.</div>")
        why = "".join(f"<li>{r.lines_per_mm:g} lines/mm, order {r.order:+d}: {_esc(r.reason)}</li>"
                      for r in self.plan_rejected)
        dropped = (f"<details class='fg-plan-rejected' style='font-size:12px;margin-top:3px'{' open' if not rows else ''}>"
                   f"<summary>Why the other {len(self.plan_rejected)} densities and orders dropped out</summary>"
                   f"<ul style='margin:2px 0'>{why}</ul></details>") if why else ""
        source = (f"the {s.laser_nm:g} nm laser line" if s.source == "laser"
                  else f"a source emitting {s.source_lo_nm:g}–{s.source_hi_nm:g} nm")
        self.plan_html.object = (
            f"<h4 style='margin:4px 0'>Spectrometer planning: {what}</h4>{body}{dropped}"
            f"<div style='font-size:12px;color:#555;margin-top:3px'>{s.deviation_deg:g}° between incident and "
            "diffracted beams at the band centre (the Deviation setting, also used by the blaze read-out), flat "
            "detector; resolution = 3 pixels of the reciprocal linear dispersion. A band "
            f"wider than one free spectral range is kept when a stepped long-pass filter clears it for {source}."
            f" {self._plan_order_text(eff)}</div>")

    def _plan_order_text(self, eff) -> str:
        if eff is None:
            return (f"Best resolution first. 'Rank by rigorous efficiency' solves the groove (the profile, depth and "
                    f"material of the rigorous curve below) for up to {PLAN_RIGOROUS_MAX} designs, those with the "
                    f"best scalar estimate first, at {gr.PLAN_EFFICIENCY_SAMPLES} wavelengths across the band each.")
        rest = eff["total"] - eff["computed"]
        return (f"Ranked by rigorous efficiency (mean {self.rigorous_state.polarization} absolute efficiency of the "
                f"order over the band, {gr.PLAN_EFFICIENCY_SAMPLES} wavelengths) for the {eff['computed']} of "
                f"{eff['total']} designs with the best scalar estimate"
                + (f"; the other {rest} follow by their scalar estimate" if rest else "") + ".")

    # ------------------------------------------------------------------ rigorous efficiency (on request)
    def _build_rigorous(self):
        st = self.rigorous_state = RigorousSettings(profile="blazed" if self.settings.groove == "blazed" else "lamellar")
        self.rig_profile = pn.widgets.Select.from_param(st.param.profile, name="Profile", width=130, margin=(2, 5))
        self.rig_material = pn.widgets.Select.from_param(st.param.material, name="Material", width=90, margin=(2, 5))
        self.rig_depth = pn.widgets.TextInput(label="Depth (nm)", placeholder="auto", width=100, margin=(2, 5))
        self.rig_button = pn.widgets.Button(label="Compute rigorous efficiency", color="primary", width=230,
                                            margin=(20, 5, 2, 5), css_classes=["fg-rigorous-compute"])
        self.rig_progress = pn.indicators.Progress(value=0, max=100, width=200, visible=False, margin=(24, 5, 2, 5))
        self.rig_status = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#444"},
                                       sizing_mode="stretch_width", css_classes=["fg-rigorous-status"])
        self.rig_text = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#444"},
                                     sizing_mode="stretch_width", css_classes=["fg-rigorous-text"])
        self.rig_src = ColumnDataSource(dict(wl=[], te=[], tm=[], unpolarized=[], scalar=[]))
        self.rig_ray_src = ColumnDataSource(dict(x=[], y0=[], y1=[], label=[]))
        self.rig_trust_src = ColumnDataSource(dict(left=[], right=[]))
        f = figure(height=300, sizing_mode="stretch_width", y_range=Range1d(0.0, 1.08), x_range=DataRange1d(),
                   tools="pan,wheel_zoom,box_zoom,reset,save", toolbar_location="right", min_border=4,
                   title="Efficiency vs wavelength (press the button to compute)",
                   x_axis_label="wavelength (nm)", y_axis_label="efficiency")
        f.title.text_font_size = "12px"
        f.quad(left="left", right="right", bottom=0.0, top=1.08, source=self.rig_trust_src, fill_color="#f3e6c8",
               fill_alpha=0.6, line_alpha=0.0, legend_label="d/λ < 3: scalar untrustworthy")
        f.segment(x0="x", x1="x", y0="y0", y1="y1", source=self.rig_ray_src, line_color="#7a4f9e", line_dash="dotted",
                  line_width=1.5)
        f.text(x="x", y="y1", text="label", source=self.rig_ray_src, angle=np.pi / 2, text_font_size="10px",
               text_color="#7a4f9e", text_align="right", text_baseline="bottom", x_offset=-2)
        f.line("wl", "te", source=self.rig_src, color="#1f5fa8", line_width=1.8, legend_label="TE (s), rigorous")
        f.line("wl", "tm", source=self.rig_src, color="#c0392b", line_width=1.8, legend_label="TM (p), rigorous")
        f.line("wl", "unpolarized", source=self.rig_src, color="#222", line_width=2.6,
               legend_label="unpolarized, rigorous")
        f.line("wl", "scalar", source=self.rig_src, color="#888", line_width=1.8, line_dash="dashed",
               legend_label="scalar (relative)")
        f.add_tools(HoverTool(tooltips=[("λ", "@wl{0.0} nm"), ("TE", "@te{0.000}"), ("TM", "@tm{0.000}"),
                                        ("unpolarized", "@unpolarized{0.000}"), ("scalar", "@scalar{0.000}")],
                              mode="vline", renderers=[f.renderers[-2]]))
        f.legend.location = "bottom_left"         # efficiencies rarely fall that low; the Rayleigh labels sit on top
        f.legend.click_policy = "hide"
        f.legend.label_text_font_size = "11px"
        f.legend.background_fill_alpha = 0.7
        self.rig_fig = f
        self.rig_holder = RangeHolder(f, x=(400.0, 700.0), y=(0.0, 1.0))     # an empty figure still has a range
        self.rig_button.on_click(lambda e: self.compute_rigorous())
        self.rig_depth.param.watch(self._on_rig_depth, "value")
        self.rig_pol = pn.widgets.Select.from_param(st.param.polarization, name="Rank by", width=120, margin=(2, 5))
        self.plan_button = pn.widgets.Button(label="Rank by rigorous efficiency", color="primary", width=220,
                                             margin=(20, 5, 2, 5), css_classes=["fg-plan-rank"])
        self.plan_progress = pn.indicators.Progress(value=0, max=100, width=200, visible=False, margin=(24, 5, 2, 5))
        self.plan_status = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px", "color": "#444"},
                                        sizing_mode="stretch_width", css_classes=["fg-plan-status"])
        self.plan_button.on_click(lambda e: self.rank_plan())
        st.param.watch(self._rigorous_changed, ["profile", "depth_nm", "material", "polarization"])

    def _on_rig_depth(self, _event):
        try:
            self._rigorous_request()               # a valid typed depth goes into the declared state at once
        except InputError as exc:
            self._rigorous_error(exc)
        else:
            self.rig_status.object = ""

    def _rigorous_changed(self, *_):
        """A rigorous setting changed: the planner's ranking may be stale, and the page address follows."""
        if self.plan is not None:
            self._draw_plan()
        self._changed()

    def _rigorous_request(self):
        """(profile, depth_nm, material) from the widgets; raises InputError for a bad depth."""
        text = (self.rig_depth.value or "").strip()
        if text:
            try:
                depth = float(text.replace(",", "."))
            except ValueError:
                raise InputError(f"Depth {text!r} is not a number; give the groove depth in nm (e.g. 100) or "
                                 "leave it empty for the default.") from None
            lo, hi = RigorousSettings.param.depth_nm.bounds
            if not (np.isfinite(depth) and lo <= depth <= hi):
                raise InputError(f"Depth {text} nm is outside {lo:g}–{hi:g} nm; give the groove depth peak to "
                                 "valley in that range, or leave it empty for the default.")
            self.rigorous_state.depth_nm = depth
        else:
            self.rigorous_state.depth_nm = None
        st = self.rigorous_state
        return st.profile, st.depth_nm, st.material

    def compute_rigorous(self, sync: bool = False) -> bool:
        """Compute the rigorous efficiency curve of the current settings (in a worker process when served;
        about a second). Returns True when a computation was started (or done, when not served)."""
        try:
            profile, depth, material = self._rigorous_request()
        except InputError as exc:
            self._rigorous_error(exc)
            return False
        self.rig_button.disabled = True
        self.rig_progress.visible, self.rig_progress.value = True, 0
        self.rig_status.object = "computing the rigorous efficiency (about a second)…"
        return self._run_job("_rigorous_job", RIGOROUS_SAMPLES, partial(compute_rigorous, self.shown, profile, depth,
                                                                        material),
                             self._rigorous_progress, self._rigorous_done, sync)

    def rank_plan(self, sync: bool = False) -> bool:
        """Rank the planner's designs by rigorous efficiency over the band (at most PLAN_RIGOROUS_MAX of them;
        in a worker process when served). Returns True when a computation was started (or done)."""
        try:
            profile, depth, material = self._rigorous_request()
        except InputError as exc:
            self.plan_status.object = f"<span style='color:#b00020'>{_esc(str(exc))}</span>"
            return False
        if not self.plan:
            self.plan_status.object = "No design to rank: the planner has found none for these settings."
            return False
        self.plan_button.disabled = True
        self.plan_progress.visible, self.plan_progress.value = True, 0
        self.plan_status.object = "computing the rigorous efficiency of the designs…"
        fn = partial(compute_plan_efficiency, self.shown, list(self.plan), profile, depth, material,
                     self.rigorous_state.polarization)
        return self._run_job("_plan_job", gr.PLAN_EFFICIENCY_SAMPLES * min(len(self.plan), PLAN_RIGOROUS_MAX), fn,
                             self._plan_progress, self._plan_done, sync)

    def _run_job(self, counter: str, size: int, fn, on_progress, on_done, sync: bool) -> bool:
        """Run ``fn(channel)`` in a worker process when served (here otherwise, or with ``sync``), as job
        number ``self.<counter>`` + 1: progress goes to ``on_progress(job, fraction, text)``, the result or
        an InputError with a sentence to ``on_done(job, out)``. A newer job of the same counter supersedes."""
        setattr(self, counter, getattr(self, counter) + 1)
        job = getattr(self, counter)
        doc = pn.state.curdoc
        live = served(doc)
        session = session_key(self)

        def gone():
            return job != getattr(self, counter) or (live and not served(doc))

        if sync or not live:
            channel = workers.LocalChannel(partial(on_progress, job), gone)
            try:
                with heavy_job("grating_efficiency", size, session):
                    out = fn(channel)
            except InputError as exc:
                out = exc
            except JobCancelled:
                return True
            on_done(job, out)
            return True

        async def run():
            limits = Limits.from_env()
            try:
                with heavy_job("grating_efficiency", size, session, limits):
                    channel = await workers.new_channel()
                    out = await workers.run_in_worker(
                        limits.max_jobs_server, fn, channel=channel, cancelled=gone,
                        on_progress=lambda f, text: post_to_page(doc, partial(on_progress, job, f, text)))
            except InputError as exc:
                out = exc
            except JobCancelled:
                return
            except workers.WorkerLost as exc:
                log.error("grating efficiency: worker process lost", extra={"session": session})
                out = InputError(str(exc))
            except Exception:  # never lose the session to one failed computation
                log.exception("grating efficiency failed")
                out = InputError("The rigorous efficiency failed unexpectedly; the server log has the details.")
            post_to_page(doc, partial(on_done, job, out))
        pn.state.execute(run)
        return True

    def _plan_progress(self, job, fraction, text):
        if job == self._plan_job:
            self.plan_progress.value = int(round(100 * fraction))
            self.plan_status.object = f"ranking by rigorous efficiency: {_esc(text)}"

    def _plan_done(self, job, out):
        if job != self._plan_job:
            return
        self.plan_button.disabled = False
        self.plan_progress.visible = False
        if isinstance(out, Exception):
            self.plan_status.object = f"<span style='color:#b00020'>{_esc(str(out))}</span>"
            return
        self.plan_efficiency = out
        self.plan_status.object = ""
        self._draw_plan()

    def _rigorous_progress(self, job, fraction, text):
        if job == self._rigorous_job:
            self.rig_progress.value = int(round(100 * fraction))
            self.rig_status.object = f"computing the rigorous efficiency: {_esc(text)}"

    def _rigorous_error(self, exc):
        self.rig_status.object = f"<span style='color:#b00020'>{_esc(str(exc))}</span>"

    def _rigorous_done(self, job, out):
        if job != self._rigorous_job:                    # superseded by a newer request
            return
        self.rig_button.disabled = False
        self.rig_progress.visible = False
        if isinstance(out, Exception):
            self._rigorous_error(out)
            return
        self.rigorous = out
        self.rig_status.object = ""
        self._draw_rigorous()

    def _draw_rigorous(self):
        r = self.rigorous
        s, profile, depth, material = r["settings"]
        wl = r["wavelength_nm"]
        self.rig_src.data = dict(wl=wl, te=r["te"], tm=r["tm"], unpolarized=r["unpolarized"], scalar=r["scalar"])
        self.rig_holder.release()
        self.rig_ray_src.data = dict(x=[lam for _, lam in r["rayleigh"]], y0=[0.0] * len(r["rayleigh"]),
                                     y1=[1.06] * len(r["rayleigh"]),
                                     label=[f"Rayleigh (order {_order_text(k)})" for k, _ in r["rayleigh"]])
        edge, hi = r["trust_edge_nm"], float(wl[-1])
        self.rig_trust_src.data = (dict(left=[max(edge, float(wl[0]))], right=[hi]) if edge < hi
                                   else dict(left=[], right=[]))
        depth_text = f"{depth:g} nm deep" if depth is not None else "default depth"
        grooves = (f"blazed {s.blaze_angle_deg:g}°" if profile == "blazed" else
                   f"lamellar, duty {s.duty_cycle:g}" if profile == "lamellar" else "sinusoidal")
        self.rig_fig.title.text = (f"Order {_order_text(s.order)} {s.kind} efficiency: {s.lines_per_mm:g} lines/mm "
                                   f"{material}, {grooves}, {depth_text}, α = {s.incidence_deg:g}°")
        orders = (f"{r['orders_te']} Fourier orders for TE, {r['orders_tm']} for TM"
                  + (f", {r['slices']} slices of the profile" if r["slices"] > 1 else ""))
        conv = ("converged to 0.001" if r["converged"] else
                f"<b>not converged</b> to 0.001 at the cap (last change {r['change']:.2g}; TM on metals converges "
                "slowly), so read the curve to about that")
        stale = "" if (s, profile, depth, material) == (self.shown, *self._rigorous_request_quiet()) else \
            "<br><i>The settings have changed since: press the button again for the current ones.</i>"
        self.rig_text.object = (f"{_esc(r['trust'])} {orders}; {conv}. {RIGOROUS_NOTE}{stale}")

    def _rigorous_request_quiet(self):
        st = self.rigorous_state
        return st.profile, st.depth_nm, st.material

    def _mark_rigorous_stale(self):
        if self.rigorous is not None:
            self._draw_rigorous()

    # ------------------------------------------------------------------ colour map (background)
    def _refresh_map(self, s: GratingSettings, sync: bool = False):
        key = s.map_key()
        if key in (self._map_shown_key, self._map_pending_key):
            return
        self._map_job += 1
        job = self._map_job
        self._map_pending_key = key
        doc = pn.state.curdoc
        if sync or not served(doc):
            try:
                result = _timed(compute_colour_map, s)
            except InputError as exc:                  # over the server's grid limit
                result = exc
            self._apply_map(job, key, s, result)
            return
        self.map_status.object = "computing the colour map…"

        async def run():
            try:
                result = await asyncio.get_running_loop().run_in_executor(interactive_executor(), _timed,
                                                                          compute_colour_map, s)
            except InputError as exc:                  # over the server's grid limit
                result = exc
            except Exception as exc:  # never lose the session to one failed computation
                log.exception("grating colour map failed")
                result = exc
            post_to_page(doc, partial(self._apply_map, job, key, s, result))
        pn.state.execute(run)

    def _apply_map(self, job, key, s, result):
        if job != self._map_job:                       # superseded by a newer request
            return
        self._map_pending_key = None
        if isinstance(result, Exception):
            self.map_status.object = f"<span style='color:#b00020'>colour map failed: {_esc(str(result))}</span>"
            return
        cm, ms = result
        self.timings_ms["colour_map"] = ms
        self.colour_map, self._map_shown_key, self._map_settings = cm, key, s
        dv = VIEW_DEG[1] - VIEW_DEG[0]
        dens = cm["lines_per_mm"]
        dg = dens[1] - dens[0]
        self.map_src.data = dict(image=[_rgba(cm["rgb"])], L=[cm["lab"][..., 0]], a=[cm["lab"][..., 1]],
                                 b=[cm["lab"][..., 2]], x=[VIEW_DEG[0] - dv / 2], y=[dens[0] - dg / 2],
                                 dw=[VIEW_DEG[-1] - VIEW_DEG[0] + dv], dh=[dens[-1] - dens[0] + dg])
        self.map_fig.y_range.update(start=float(dens[0]), end=float(dens[-1]))
        grooves = f"blazed {s.blaze_angle_deg:g}°" if s.groove == "blazed" else f"lamellar, duty {s.duty_cycle:g}"
        self.map_fig.title.text = (f"Colour vs viewing angle and groove density ({dens[0]:g}–{dens[-1]:g} "
                                   f"lines/mm): α = {s.incidence_deg:g}°, {grooves}, lamp {s.illuminant}")
        self.map_status.object = ""

    # ------------------------------------------------------------------ downloads
    def _fan_csv(self):
        s, r = self.shown, self.readouts
        out = io.StringIO()
        out.write("# fringegauge grating orders and angles (computed)\n"
                  f"# date: {date.today().isoformat()}\n"
                  f"# grating: {s.describe()}\n"
                  f"# convention: {CONVENTION}\n"
                  f"# focal_length_mm: {s.focal_length_mm:g}; illuminated_width_mm: {s.illuminated_width_mm:g}\n"
                  f"# read-outs for order {s.order:+d} at band centre {s.centre_nm:g} nm: "
                  f"groove_spacing_nm {r['spacing_nm']:.6g}; angular_dispersion_deg_per_nm "
                  f"{r['angular_dispersion_deg_per_nm']:.6g}; reciprocal_linear_dispersion_nm_per_mm "
                  f"{r['reciprocal_linear_dispersion_nm_per_mm']:.6g}; resolving_power {r['resolving_power']:.6g}; "
                  f"resolvable_nm {r['resolvable_nm']:.6g}; free_spectral_range_nm {r['free_spectral_range_nm']:.6g}; "
                  f"littrow_deg {r['littrow_deg']:.6g}\n")
        wl = csv_wavelengths_nm(s.band)
        out.write(f"# rows: every propagating order drawn on the page (|m| <= {MAX_FAN_ORDER}), every "
                  f"{csv_step_nm(s.band):g} nm across the band; wavelengths at which an "
                  "order is evanescent (no diffracted beam) are left out\n")
        w = csv.writer(out, lineterminator="\n")
        w.writerow(["order", "wavelength_nm", "beta_deg", "angular_dispersion_deg_per_nm",
                    "reciprocal_linear_dispersion_nm_per_mm", "relative_efficiency"])
        for m in self.fan["drawn"]:
            beta = np.atleast_1d(gr.diffraction_angle_deg(wl, s.lines_per_mm, m, s.incidence_deg))
            eff = np.broadcast_to(gr.groove_efficiency(wl, s.lines_per_mm, m, **s.groove_kw(),
                                                      incidence_deg=s.incidence_deg), wl.shape)
            if m:
                disp = np.atleast_1d(gr.angular_dispersion_deg_per_nm(wl, s.lines_per_mm, m, s.incidence_deg))
                rld = np.atleast_1d(gr.reciprocal_linear_dispersion_nm_per_mm(wl, s.lines_per_mm, s.focal_length_mm,
                                                                             m, s.incidence_deg))
            else:
                disp = rld = np.full(wl.shape, np.nan)
            for i, lam in enumerate(wl):
                if not np.isfinite(beta[i]):
                    continue
                w.writerow([m, f"{lam:.6g}", f"{beta[i]:.6f}",
                            f"{disp[i]:.6g}" if np.isfinite(disp[i]) else "",
                            f"{rld[i]:.6g}" if np.isfinite(rld[i]) else "", f"{eff[i]:.6g}"])
        out.seek(0)
        return out

    def _current_map(self):
        s = self.shown
        if self.colour_map is None or self._map_shown_key != s.map_key():
            return compute_colour_map(s)
        return self.colour_map

    def _map_png(self):
        s, cm = self.shown, self._current_map()
        png = render.map_png(cm["rgb"], VIEW_DEG, cm["lines_per_mm"], x_label="viewing angle β (°)",
                             y_label="groove density (lines/mm)",
                             title="Grating colour vs viewing angle and groove density",
                             subtitle=(f"{self._conditions_text()}. Crosshair: {s.lines_per_mm:g} lines/mm and the "
                                       "zero order (β = −α)."),
                             crosshair=(-s.incidence_deg, s.lines_per_mm), footer=_footer())
        return io.BytesIO(png)

    def _strip_png(self):
        """The colour strip shown on the page (the current groove density), as a PNG."""
        s = self.shown
        png = _strip_image_png(self.strip["rgb"], VIEW_DEG, -s.incidence_deg,
                               title=f"Grating colour at each viewing angle, {s.lines_per_mm:g} lines/mm",
                               subtitle=(f"{self._conditions_text()}. Vertical line: the zero order (β = −α), "
                                         "left out of the colours."),
                               x_label="viewing angle β (° from the normal; + on the lamp's side)", footer=_footer())
        return io.BytesIO(png)

    def _conditions_text(self):
        s = self.shown
        return (f"{s.kind}, {self._grooves_text()}, incidence α = {s.incidence_deg:g}°, lamp {s.illuminant}, CIE 2° "
                f"observer; {self._brightness_text()}")

    def _brightness_text(self):
        return ("each direction at full brightness" if self.shown.brightness == "per_direction"
                else "relative brightness (the most intense direction at full display brightness)")

    def _grooves_text(self):
        s = self.shown
        return f"blazed {s.blaze_angle_deg:g}°" if s.groove == "blazed" else f"lamellar grooves, duty {s.duty_cycle:g}"

    # ------------------------------------------------------------------ layout
    def panel(self):
        head = lambda t: pn.pane.HTML(f"<h3 style='margin:8px 5px 0;font-size:15px'>{t}</h3>")  # noqa: E731
        controls = pn.Column(
            head("Grating"), self.preset, self.scenario,
            field_pair(self.density, self.order),
            _label("Kind"), self.kind, _label("Grooves"), self.groove,
            self.blaze.view(), self.duty.view(),
            head("Light"),
            field_pair(self.incidence, self.illuminant),
            field_pair(self.band_lo, self.band_hi),
            _label("Source"), self.source,
            field_pair(self.source_lo, self.source_hi),
            self.laser.view(),
            pn.pane.HTML("<div style='font-size:12px;color:#555'>Source: what the lamp emits and the detector "
                         "sees (or the one laser line), for the order overlaps and the order-sorting filter.</div>",
                         width=300, margin=(0, 5)),
            head("Spectrometer"),
            field_pair(self.focal, self.width),
            field_pair(self.det_len, self.pitch),
            self.deviation.view(),
            pn.pane.HTML(f"<div style='font-size:12px;color:#555'>{CONVENTION}</div>", width=300, margin=(6, 5)),
            head("Downloads"), self.dl_csv, self.dl_map, self.dl_strip,
            width=320, margin=(0, 5), scroll=True, sizing_mode="stretch_height",
            styles={"background": "#f6f6f4", "border-right": "1px solid #ddd"})
        views = pn.Column(
            self.caution, self.laser_caution,
            pn.Row(pn.pane.Bokeh(self.fan_fig), self.readout_html, sizing_mode="stretch_width", margin=0),
            self.fan_caption,
            self.overlap_html,
            _rule(),
            pn.Row(_label("Grooves lit (display)"), self.n_slits, _label("Scale"), self.scale, margin=0),
            pn.pane.Bokeh(self.shape_fig, sizing_mode="stretch_width"),
            self.line_caption,
            _rule(),
            pn.Row(_label("Colours"), self.brightness, margin=0),
            pn.pane.Bokeh(self.strip_fig, sizing_mode="stretch_width"),
            self.map_status,
            pn.pane.Bokeh(self.map_fig, sizing_mode="stretch_width"),
            self.colour_caption,
            _rule(),
            pn.Row(self.rig_profile, self.rig_depth, self.rig_material, self.rig_button, self.rig_progress, margin=0),
            self.rig_status,
            pn.pane.Bokeh(self.rig_fig, sizing_mode="stretch_width"),
            self.rig_text,
            _rule(),
            pn.Row(self.rig_pol, self.plan_button, self.plan_progress, margin=0),
            self.plan_status,
            self.plan_html,
            self.caution_end,
            sizing_mode="stretch_both", scroll=True, margin=(0, 5))
        return pn.Row(controls, views, sizing_mode="stretch_both", css_classes=["fg-gratings"])


def _strip_image_png(rgb, view_deg, zero_deg, *, title, subtitle, x_label, footer) -> bytes:
    """One row of colours along the viewing angle as a PNG: title, subtitle, the strip framed, a dashed
    white-and-black line at ``zero_deg``, round-number ticks, axis label and footer (drawn with the
    helpers of :mod:`views.render`, at the colour map's plot width)."""
    arr = np.clip(np.asarray(rgb, dtype=float).reshape(1, -1, 3), 0.0, 1.0)
    pad, tick, plot_w, plot_h = render._PAD, render._TICK, render._MAP_WIDTH, STRIP_PNG_HEIGHT_PX
    f_title, f_sub, f_lab, f_tick, f_foot = (render._font(30, bold=True), render._font(20), render._font(20),
                                             render._font(18), render._font(15))
    xe = render._cell_edges(np.asarray(view_deg, dtype=float))
    x_lo, x_hi = float(xe[0]), float(xe[-1])
    xt, xl = render._fit_ticks(x_lo, x_hi, plot_w, f_tick, horizontal=True)
    left = right = pad + 10
    width = left + plot_w + right
    text_w = width - 2 * pad
    title_lines = render._wrap(title, f_title, text_w)
    sub_lines = render._wrap(subtitle, f_sub, text_w)
    foot_lines = render._wrap(footer, f_foot, text_w)
    top = pad + render._block_height(title_lines, f_title, 6) + 10 + render._block_height(sub_lines, f_sub) + 22
    height = (top + plot_h + tick + 4 + render._lh(f_tick) + 12 + render._lh(f_lab) + 16
              + render._block_height(foot_lines, f_foot) + pad)
    cv = render._Canvas(width, height)
    y = cv.text_block(pad, pad, title_lines, f_title, gap=6)
    cv.text_block(pad, y - 6 + 10, sub_lines, f_sub)
    ix = render._cell_index(xe, plot_w)
    cv.img.paste(Image.fromarray(render._to_uint8(arr)[np.zeros(plot_h, dtype=int)][:, ix], "RGB"), (left, top))
    if x_lo <= zero_deg <= x_hi:
        px = min(render._px(zero_deg, x_lo, x_hi, left, plot_w), left + plot_w - 1)
        cv.two_tone_vline(px, top, top + plot_h - 1)
    cv.draw.rectangle((left - 1, top - 1, left + plot_w, top + plot_h), outline=render.BLACK, width=1)
    render._draw_x_axis(cv, left, plot_w, top + plot_h, x_lo, x_hi, xt, xl, f_tick)
    cv.text(left + plot_w / 2, top + plot_h + tick + 4 + render._lh(f_tick) + 12, x_label, f_lab, ha="c")
    cv.text_block(pad, height - pad - render._block_height(foot_lines, f_foot), foot_lines, f_foot,
                  fill=render.FOOTER_INK)
    return render._png(cv.img, title=title, dpi=150)


def _align(x: float, axis) -> str:
    """Text alignment that keeps a label near either end of an axis inside the plot."""
    lo, hi = float(axis[0]), float(axis[-1])
    t = (x - lo) / (hi - lo) if hi > lo else 0.5
    return "left" if t < 0.15 else ("right" if t > 0.85 else "center")


def _ray_length(m: int) -> float:
    """Drawn length of an order's rays: shorter for higher orders so overlapping orders stay apart."""
    return max(0.55, 1.0 - 0.09 * (abs(m) - 1))


def _timed(fn, *args):
    t0 = time.perf_counter()
    out = fn(*args)
    return out, 1000 * (time.perf_counter() - t0)
