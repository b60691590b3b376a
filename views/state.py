"""Page state of the film explorer, declared with param, and the physics calls it drives.

Every number the page shows comes from one function here, and every function
here calls ``physics``: the widgets in :mod:`views.explorer` only display.
The state holds only valid values; a rejected input leaves it as it was.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import re
from dataclasses import dataclass

import numpy as np
import param

from physics import InputError, Layer, Stack, material
from physics.appearance import (MAX_TOLERANCE_PCT, ToleranceResult, band_average, scaled_stack, tolerance_run)
from physics.color import luminous_reflectance
from physics.appearance import (ColorMap, color_map, colour_band_nm, colour_map_points, colour_wavelengths_nm, fringe_path_nm, cone_reflectance, interference_order,
                                order_thicknesses_nm, point_color, scaled_colors, MAX_OFFERED_NA)
from physics.color import (ILLUMINANTS, LED_ILLUMINANTS, PLANCK_CCT_LIMITS_K, YELLOW_ROOM, lamp_label, planck_spd,
                           srgb_to_hex, user_spd_on_fine_grid)
from physics.fit import text_lines
from physics.stackfile import (StackFile, dump_stack_file, load_preset, load_stack_file, stack_from_dict,
                               stack_to_dict)

#: Map grid: at least 400 thicknesses x 91 angles (colour over 81 wavelengths, 380-780 nm at 5 nm).
MAP_THICKNESS_POINTS = 400
MAP_ANGLE_POINTS = 91
#: Largest viewing angle on the page (90° is grazing: nothing is seen).
ANGLE_MAX_DEG = 89.9
#: Thickness limits a user may type (nm).
THICKNESS_LIMITS_NM = (0.0, 100_000.0)
#: Largest number of coherent layers in the editor.
MAX_LAYERS = 12
#: Substrates with k below this show a transmittance curve (light enters them and goes on).
TRANSPARENT_SUBSTRATE_K = 0.01
#: Points along the reference strip.
STRIP_POINTS = 600
#: Lamps on the page: the CIE codes old links carry first, then more daylights, fluorescents, white LEDs,
#: the lithography yellow light, a halogen (Planck radiator) at a chosen temperature, and an uploaded lamp.
HALOGEN = "halogen"
ILLUMINANT_CHOICES = ["D65", "D50", "A", "F2", "F11", "custom", "D55", "D75", "F7",
                      *[k for k in LED_ILLUMINANTS if k in ILLUMINANTS], YELLOW_ROOM, HALOGEN]
#: Colour temperature of the halogen lamp by default, K (a 12 V projector or work lamp runs near 3000 K).
DEFAULT_HALOGEN_K = 3000.0
DEFAULT_PRESET = "thermal_oxide_on_silicon"


#: Angles a polarizer or analyzer axis may be typed at, degrees (a half turn either way covers every axis).
POLARIZER_LIMITS_DEG = (-180.0, 180.0)
#: Largest whole-stack thickness error on the page, ± % (a deposition-rate error of a few % is common).
MAX_STACK_SCALE_PCT = 50.0
#: Default band of the band-average read-out, nm: where the eye is sensitive enough for a visible coating.
DEFAULT_BAND_NM = (420.0, 680.0)
#: Most trials of a tolerance run from the page (about 3 s for a 12-layer stack) and its fixed seed.
MAX_PAGE_TRIALS = 1000
TOLERANCE_SEED = 20261203

#: The spectrum plot's views and the words the page gives them.
SPECTRUM_VIEWS = {"linear": "R and T, 0–100 %", "zoom": "R only, zoomed", "log": "R, log scale"}

#: What "brightest = white" is measured on, with the words the page uses.
BRIGHTNESS_REFERENCES = {"strip": "the strip at the current angle", "map": "the whole map"}


#: Added to the name of a loaded stack once its layers, ambient or substrate are changed.
EDITED_MARK = " (edited)"


class ExplorerState(param.Parameterized):
    """Everything that defines the view; the URL carries all of it."""

    stack_json = param.String(default="", doc="The stack (ambient, layers, substrate) as compact JSON.")
    swept_layer = param.Integer(default=0, bounds=(0, MAX_LAYERS - 1), doc="Layer whose thickness is swept (0 = top).")
    thickness_nm = param.Number(default=100.0, bounds=THICKNESS_LIMITS_NM, doc="Current thickness of the swept layer, nm.")
    thickness_max_nm = param.Number(default=1000.0, bounds=(10.0, THICKNESS_LIMITS_NM[1]),
                                    doc="Right end of the colour map and strip, nm.")
    angle_deg = param.Number(default=0.0, bounds=(0.0, ANGLE_MAX_DEG), doc="Viewing angle from the normal, degrees.")
    polarization = param.Selector(default="unpolarized", objects=["unpolarized", "s", "p"])
    illuminant = param.Selector(default="D65", objects=ILLUMINANT_CHOICES)
    lamp_cct_k = param.Number(default=DEFAULT_HALOGEN_K, bounds=PLANCK_CCT_LIMITS_K,
                              doc="Colour temperature of the halogen lamp (a Planck radiator), K.")
    spd_json = param.String(default="", doc="A custom lamp spectrum [[nm...], [values...]] (illuminant 'custom').")
    observer = param.Selector(default="2", objects=["2", "10"], doc="CIE 1931 2° or CIE 1964 10° observer.")
    na = param.Number(default=0.0, bounds=(0.0, MAX_OFFERED_NA),
                      doc="Numerical aperture of the viewing cone (0 = one direction); above 0.95 only in an immersion "
                          "ambient (the physics refuses an NA the ambient's index does not allow, with a message).")
    polarizer = param.Selector(default="none", objects=["none", "linear"],
                               doc="A linear polarizer in the light: 'none', or 'linear' at polarizer_deg. With one "
                                   "(or an analyzer) the per-ray polarization choice gives way to the lab frame.")
    polarizer_deg = param.Number(default=90.0, bounds=POLARIZER_LIMITS_DEG,
                                 doc="Polarizer axis, degrees to the plane of tilt (normal and viewing direction): "
                                     "90 = field perpendicular to it (s), 0 = in it (p).")
    analyzer = param.Selector(default="none", objects=["none", "parallel", "crossed", "angle"],
                              doc="A linear analyzer in the viewing beam: parallel to or crossed with the polarizer "
                                  "(at polarizer_deg even without one), or at analyzer_deg.")
    analyzer_deg = param.Number(default=0.0, bounds=POLARIZER_LIMITS_DEG,
                                doc="Analyzer axis with analyzer 'angle', degrees to the plane of tilt.")
    brightness = param.Selector(default="absolute", objects=["absolute", "normalized"],
                                doc="Absolute reflectance, or scaled so the brightest colour of a reference is white.")
    brightness_reference = param.Selector(default="strip", objects=list(BRIGHTNESS_REFERENCES),
                                          doc="With brightness 'normalized': 'strip' makes white the brightest colour "
                                              "along the current angle's strip inside the normalizing thickness range; "
                                              "'map' the brightest of the whole map.")
    normalize_min_nm = param.Number(default=0.0, bounds=THICKNESS_LIMITS_NM,
                                    doc="Start of the thickness range whose brightest colour is white ('strip'), nm.")
    normalize_max_nm = param.Number(default=THICKNESS_LIMITS_NM[1], bounds=THICKNESS_LIMITS_NM,
                                    doc="End of that range, nm (the strip ends at the map's end).")
    thickness_scale_pct = param.Number(default=0.0, bounds=(-MAX_STACK_SCALE_PCT, MAX_STACK_SCALE_PCT),
                                       doc="Whole-stack thickness error, % applied to every layer (a deposition-rate "
                                           "error); the map's thickness axis stays the nominal thickness.")
    band_min_nm = param.Number(default=DEFAULT_BAND_NM[0], bounds=(200.0, 3000.0),
                               doc="Start of the band whose mean R and T are read out, nm.")
    band_max_nm = param.Number(default=DEFAULT_BAND_NM[1], bounds=(200.0, 3000.0),
                               doc="End of that band, nm.")
    spectrum_view = param.Selector(default="linear", objects=list(SPECTRUM_VIEWS),
                                   doc="Spectrum plot: R and T on 0-100 %, R alone scaled to its values, or R on a "
                                       "log scale.")
    tolerance_pct = param.Number(default=2.0, bounds=(0.0, MAX_TOLERANCE_PCT),
                                 doc="Tolerance run: each layer's thickness varies at random within ± this %.")
    tolerance_trials = param.Integer(default=200, bounds=(10, MAX_PAGE_TRIALS),
                                     doc="Tolerance run: number of random stacks (seeded: the same every run).")
    preset_name = param.String(default="", doc="Name of the loaded preset or file, marked once the stack is "
                                               "edited (a preset's name only while it is what is shown).")

    # ------------------------------------------------------------------ stack
    def stack_file(self) -> StackFile:
        """The stack as parsed from ``stack_json`` (raises InputError if malformed); parsed once per text."""
        return _parsed_stack_file(self.stack_json)

    @property
    def stack(self) -> Stack:
        """The stack as built: the swept layer at the current thickness, every layer times the
        whole-stack thickness factor."""
        nominal = self.nominal_stack
        return nominal if self.thickness_factor == 1.0 else scaled_stack(nominal, self.thickness_factor)

    @property
    def nominal_stack(self) -> Stack:
        """The stack without the whole-stack thickness error (what a stack file saves)."""
        sf = self.stack_file()
        layers = list(sf.stack.layers)
        if layers:
            j = min(self.swept_layer, len(layers) - 1)
            layers[j] = Layer(layers[j].material, self.thickness_nm)
        return Stack(layers, sf.stack.substrate, sf.stack.ambient, sf.stack.substrate_thickness_mm)

    def lab_frame(self) -> dict:
        """The lab-frame polarizer and analyzer as keywords of the physics (both None without them)."""
        polarizer = self.polarizer_deg if self.polarizer == "linear" else None
        analyzer = {"none": None, "parallel": self.polarizer_deg, "crossed": self.polarizer_deg + 90.0,
                    "angle": self.analyzer_deg}[self.analyzer]
        return {"polarizer_deg": polarizer, "analyzer_deg": analyzer}

    def polarization_text(self) -> str:
        """The polarization in words: 'unpolarized', 's', 'p', or the polarizer and analyzer with their axes."""
        lab = self.lab_frame()
        if all(v is None for v in lab.values()):
            return self.polarization
        words = [f"polarizer {lab['polarizer_deg']:g}°" if lab["polarizer_deg"] is not None else "unpolarized light"]
        if lab["analyzer_deg"] is not None:
            words.append(f"analyzer {self.analyzer}" if self.analyzer in ("parallel", "crossed")
                         else f"analyzer {lab['analyzer_deg']:g}°")
        return ", ".join(words) + " (to the plane of tilt)"

    @property
    def ray_polarization(self) -> str:
        """The per-ray polarization the physics gets: 'unpolarized' when a lab-frame polarizer takes over."""
        return "unpolarized" if any(v is not None for v in self.lab_frame().values()) else self.polarization

    @property
    def thickness_factor(self) -> float:
        """1 + the whole-stack thickness error."""
        return 1.0 + self.thickness_scale_pct / 100.0

    def layer_rows(self) -> list[dict]:
        """The editor rows: [{"material": spec, "thickness_nm": float}, ...] top to bottom.

        The swept layer's row carries the current thickness.
        """
        rows = json.loads(self.stack_json)["layers"]
        if rows:
            rows[min(self.swept_layer, len(rows) - 1)]["thickness_nm"] = self.thickness_nm
        return rows

    def set_stack(self, *, ambient=None, layers=None, substrate=None, substrate_thickness_mm=...,
                  swept_layer=None) -> None:
        """Replace parts of the stack after validating the whole; raises InputError and changes nothing if bad."""
        d = json.loads(self.stack_json)
        if layers is not None and len(layers) > MAX_LAYERS:
            raise InputError(f"At most {MAX_LAYERS} layers; remove one before adding another.")
        changes = {k: v for k, v in (("ambient", ambient), ("layers", layers), ("substrate", substrate))
                   if v is not None}
        if substrate_thickness_mm is not ...:
            changes["substrate_thickness_mm"] = substrate_thickness_mm
        edited = any(d.get(k) != v for k, v in changes.items())
        d.update(changes)
        n = len(d["layers"])
        swept = self.swept_layer if swept_layer is None else swept_layer
        swept = min(max(swept, 0), max(n - 1, 0))
        d["swept_layer"] = swept
        sf = stack_from_dict(d)                      # validates materials, thicknesses, fields
        _ = colour_band_nm(sf.stack)                 # the stack must have data over the visible
        thickness = sf.stack.layers[swept].thickness_nm if n else self.thickness_nm
        with param.parameterized.batch_call_watchers(self):
            if edited and not self.preset_name.endswith(EDITED_MARK):
                self.preset_name = (self.preset_name or d.get("name", "") or "stack") + EDITED_MARK
            self.stack_json = _compact(d)
            self.swept_layer = swept
            if n:
                self.thickness_nm = min(thickness, THICKNESS_LIMITS_NM[1])

    def load(self, sf: StackFile, name: str = "") -> None:
        """Take a parsed stack file (a preset or an uploaded file) and its view settings."""
        d = stack_to_dict(sf.stack, name=sf.name, scenario=sf.scenario, swept_layer=sf.swept_layer)
        d.pop("view", None)
        v = sf.view
        n = len(sf.stack.layers)
        with param.parameterized.batch_call_watchers(self):
            self.stack_json = _compact(d)
            self.swept_layer = min(sf.swept_layer, max(n - 1, 0))
            if n:
                self.thickness_nm = sf.stack.layers[self.swept_layer].thickness_nm
            self.thickness_max_nm = max(float(v.get("thickness_max_nm", 1000.0)), 10.0)
            self.angle_deg = float(v.get("angle_deg", 0.0))
            self.polarization = v.get("polarization", "unpolarized")
            self.observer = str(v.get("observer", "2"))
            self.na = float(v.get("na", 0.0))
            self.lamp_cct_k = float(v.get("lamp_cct_k", DEFAULT_HALOGEN_K))
            ill = v.get("illuminant", "D65")
            if ill == "custom" and v.get("lamp_spectrum"):
                self.set_spd(*v["lamp_spectrum"])
            else:
                self.illuminant = ill if ill in ILLUMINANT_CHOICES and ill != "custom" else "D65"
            self.polarizer = v.get("polarizer", "none")
            self.polarizer_deg = float(v.get("polarizer_deg", 90.0))
            self.analyzer = v.get("analyzer", "none")
            self.analyzer_deg = float(v.get("analyzer_deg", 0.0))
            self.preset_name = name or sf.name

    def load_preset(self, stem: str) -> None:
        self.load(load_preset(stem), stem)

    def file_text(self) -> str:
        """The stack with its current thickness and view, as the text of a stack file."""
        sf = self.stack_file()
        return dump_stack_file(self.nominal_stack, name=sf.name, scenario=sf.scenario, swept_layer=self.swept_layer,
                               view={"angle_deg": self.angle_deg, "polarization": self.polarization,
                                     "illuminant": self.illuminant, "lamp_cct_k": self.lamp_cct_k,
                                     "lamp_spectrum": self._lamp_spectrum(),
                                     "observer": self.observer, "na": self.na,
                                     "thickness_max_nm": self.thickness_max_nm,
                                     "polarizer": self.polarizer, "polarizer_deg": self.polarizer_deg,
                                     "analyzer": self.analyzer, "analyzer_deg": self.analyzer_deg})

    def _lamp_spectrum(self):
        """The measured lamp as [[nm], [power]] when the illuminant is 'custom', else None."""
        if self.illuminant != "custom":
            return None
        wl, power = self.illuminant_spec()
        return [wl.tolist(), power.tolist()]

    # ------------------------------------------------------------------ light
    def illuminant_spec(self):
        """What physics.color takes: a name, or the custom SPD as (wavelengths, values)."""
        if self.illuminant == HALOGEN:
            return planck_spd(self.lamp_cct_k)
        if self.illuminant != "custom":
            return self.illuminant
        if not self.spd_json:
            raise InputError("Illuminant 'custom' needs a lamp spectrum: upload a CSV of wavelength (nm), value.")
        wl, v = json.loads(self.spd_json)
        return (np.asarray(wl, dtype=float), np.asarray(v, dtype=float))

    def lamp_text(self) -> str:
        """The lamp in words: 'F11 tri-band fluorescent', 'halogen 3000 K', 'custom (uploaded)'."""
        if self.illuminant == HALOGEN:
            return f"halogen {self.lamp_cct_k:.0f} K"
        if self.illuminant == "custom":
            return "custom lamp (uploaded)"
        return lamp_label(self.illuminant)

    def lamp_short(self) -> str:
        """The lamp as a code for titles: 'F11', 'halogen 3000 K', 'custom lamp'."""
        if self.illuminant == HALOGEN:
            return f"halogen {self.lamp_cct_k:.0f} K"
        return "custom lamp" if self.illuminant == "custom" else self.illuminant

    def set_spd(self, wavelength_nm, values) -> None:
        """Store a custom lamp spectrum after validating it; selects illuminant 'custom'."""
        user_spd_on_fine_grid(wavelength_nm, values)          # raises InputError if unusable
        wl = np.asarray(wavelength_nm, dtype=float)
        v = np.asarray(values, dtype=float)
        order = np.argsort(wl)
        wl, v = wl[order], v[order]
        grid = np.arange(np.ceil(wl[0] / 5) * 5, wl[-1] + 1e-9, 5.0)
        vals = np.interp(grid, wl, v)
        vals = vals / vals.max()
        with param.parameterized.batch_call_watchers(self):
            self.spd_json = json.dumps([grid.round(1).tolist(), [float(f"{x:.4g}") for x in vals]],
                                       separators=(",", ":"))
            self.illuminant = "custom"

    # ------------------------------------------------------------------ grids
    def thickness_grid(self) -> np.ndarray:
        return np.linspace(0.0, self.thickness_max_nm, MAP_THICKNESS_POINTS)

    def angle_grid(self) -> np.ndarray:
        return np.linspace(0.0, ANGLE_MAX_DEG, MAP_ANGLE_POINTS)

    def map_key(self) -> tuple:
        """Everything the colour map depends on (the current thickness and angle do not)."""
        return (self.stack_json, self.swept_layer, self.thickness_max_nm, self.polarization, self.illuminant,
                self.spd_json if self.illuminant == "custom" else "", self.observer, self.na, self.brightness,
                self.thickness_scale_pct, self.lamp_cct_k if self.illuminant == HALOGEN else 0.0)

    def normalize_range_nm(self) -> tuple[float, float]:
        """The thickness range (nm) whose brightest strip colour is white, cut to the map's range."""
        lo = min(self.normalize_min_nm, self.normalize_max_nm)
        hi = max(self.normalize_min_nm, self.normalize_max_nm)
        return min(lo, self.thickness_max_nm), min(hi, self.thickness_max_nm)

    def brightness_text(self) -> str:
        """What the colours' brightness is relative to, in the page's words."""
        if self.brightness == "absolute":
            return "absolute reflectance (a perfect mirror is white)"
        if self.brightness_reference == "map":
            return "white = brightest of the whole map"
        lo, hi = self.normalize_range_nm()
        span = "" if (lo, hi) == (0.0, self.thickness_max_nm) else f", {lo:g}–{hi:g} nm"
        return f"white = brightest along the {self.angle_deg:.1f}° strip{span}"


@functools.lru_cache(maxsize=64)
def _parsed_stack_file(stack_json: str) -> StackFile:
    return load_stack_file(stack_json)


def _compact(d: dict) -> str:
    return json.dumps(d, separators=(",", ":"), ensure_ascii=False)


# ---------------------------------------------------------------------- computations
@dataclass(frozen=True)
class PointResult:
    """What the page shows for the current thickness and angle.

    When the fringes are finer than the spectrum's step (a thick layer), ``R``, ``Rs``, ``Rp`` and ``T``
    are averages over each step (centred on ``wavelength_nm``), ``R_low``/``R_high`` the range of R
    inside it, and ``fringe_spacing_nm`` the fringe spacing at 550 nm; otherwise they are samples and
    ``R_low`` is None.
    """

    wavelength_nm: np.ndarray
    R: np.ndarray
    Rs: np.ndarray
    Rp: np.ndarray
    T: np.ndarray | None
    rgb: np.ndarray
    hex: str
    lab: np.ndarray
    xy: tuple
    out_of_gamut: bool
    order: int
    opd_waves: float
    R_low: np.ndarray | None = None
    R_high: np.ndarray | None = None
    fringe_spacing_nm: float = float("inf")
    luminous_R: float = float("nan")          # ISO 13666 luminous reflectance (D65, V(λ)), fraction
    luminous_T: float = float("nan")          # the same weighting of T; NaN when nothing comes through
    band_R: float = float("nan")              # mean R over the read-out band, fraction
    band_T: float = float("nan")
    band_error: str = ""                      # why the band read-out is missing


def compute_map(s: ExplorerState, max_grid_points: int | None = None) -> ColorMap:
    """The colour map over (thickness, angle) for the swept layer.

    With ``max_grid_points`` (a server's limit on thickness x angle x wavelength points), a grid
    that would exceed it is made coarser on both axes by one factor (at least 16 points each);
    the returned map's ``thickness_nm`` and ``angle_deg`` say what was computed.
    """
    stack = s.stack
    if not stack.layers:
        raise InputError("Add a layer to see how its colour changes with thickness.")
    d, a = s.thickness_grid(), s.angle_grid()
    if max_grid_points is not None:
        max_grid_points = min(max_grid_points, MAP_POINT_BUDGET)
        # thick layers are integrated on finer wavelength grids: count the points the map really needs
        ill = s.illuminant_spec()
        per_cell = colour_map_points(stack, s.swept_layer, d * s.thickness_factor, 1, ill) / d.size
        nd, na = map_grid_counts(d.size, a.size, per_cell, max_grid_points)
        d = np.linspace(0.0, s.thickness_max_nm, nd)
        points = colour_map_points(stack, s.swept_layer, d * s.thickness_factor, na, ill, na=s.na)
        if points > max_grid_points:
            cone = (" (the viewing cone's angle grid follows the layer's fringes: a smaller NA or map thickness "
                    "needs fewer)" if s.na > 0 else "")
            raise InputError(f"Even a {nd} x {na} colour map needs {points:,} grid points{cone}; this "
                             f"server allows {int(max_grid_points):,}. Ask whoever runs it to raise --max-grid-points.")
        a = np.linspace(0.0, ANGLE_MAX_DEG, na)
    f = s.thickness_factor
    cm = color_map(stack, s.swept_layer, d * f, a,
                   illuminant=s.illuminant_spec(), observer=s.observer, polarization=s.ray_polarization,
                   na=s.na, brightness=s.brightness, **s.lab_frame())
    return cm if f == 1.0 else dataclasses.replace(cm, thickness_nm=d)     # the axis stays nominal


#: Most grid points (thickness × angle × wavelength) of the page's colour map, whatever the server allows: a
#: thick layer's map is integrated on fine wavelength grids, and beyond this the map is made coarser so it
#: comes back within about a second on a shared 2-core machine (a 1 µm map needs 3 million).
MAP_POINT_BUDGET = 8_000_000
#: Fewest thickness or angle samples a coarsened colour map keeps.
MIN_MAP_POINTS = 16


def map_grid_counts(n_thickness: int, n_angle: int, n_wavelength: int, max_grid_points: int) -> tuple:
    """(thickness, angle) counts, shrunk by one common factor so the map fits ``max_grid_points``
    (``n_wavelength`` may be a mean over the rows: thick rows are integrated on finer grids)."""
    total = n_thickness * n_angle * n_wavelength
    if total <= max_grid_points:
        return n_thickness, n_angle
    f = (max_grid_points / total) ** 0.5
    return max(MIN_MAP_POINTS, int(n_thickness * f)), max(MIN_MAP_POINTS, int(n_angle * f))


#: Samples per fringe a plotted spectrum needs to show its fringes (fewer and they alias into false shapes).
SPECTRUM_SAMPLES_PER_FRINGE = 4
#: Most sub-samples per plotted step when the fringes are finer than the step (bounds the work per move).
MAX_SUBSAMPLES = 64
#: Optical path below which a layer makes no fringes worth sampling, nm (a typed 1e-300 nm would overflow).
MIN_FRINGE_PATH_NM = 1e-6
#: Reference wavelength at which the fringe spacing is quoted, nm (near the eye's peak sensitivity).
SPACING_WAVELENGTH_NM = 550.0


def _spectrum_grid(stack: Stack, wl: np.ndarray):
    """(sub-samples per step m, fringe spacing at 550 nm): m = 1 while the step resolves the fringes."""
    path = fringe_path_nm(stack, wl) if wl.size > 2 else 0.0
    if not path > MIN_FRINGE_PATH_NM:              # no layer to speak of (a typed 1e-300 nm): no fringes
        path = 0.0
    spacing = SPACING_WAVELENGTH_NM ** 2 / path if path > 0 else float("inf")
    if wl.size < 2 or path <= 0:
        return 1, spacing
    step = float(np.max(np.diff(wl)))
    fringe_blue = wl[0] ** 2 / path
    m = int(np.ceil(step * SPECTRUM_SAMPLES_PER_FRINGE / fringe_blue))
    return (1 if m <= 1 else min(m, MAX_SUBSAMPLES)), spacing


def compute_point(s: ExplorerState, scale: float = 1.0, spectrum_wavelength_nm=None) -> PointResult:
    """Spectrum and colour at the current thickness and angle (``scale``: the map's brightness factor).

    The colour is integrated on :func:`physics.appearance.colour_wavelengths_nm` (fine enough for a
    thick layer's fringes). The spectrum is sampled at ``spectrum_wavelength_nm``, or averaged over
    each of its steps when the fringes are finer than the step (see :class:`PointResult`).
    """
    stack = s.stack
    wl_colour = colour_wavelengths_nm(stack, illuminant=s.illuminant_spec())
    wl = colour_band_nm(stack) if spectrum_wavelength_nm is None else np.asarray(spectrum_wavelength_nm, float)
    m, spacing = _spectrum_grid(stack, wl)
    if m > 1:
        step = float(np.max(np.diff(wl)))
        sub = wl[:, None] + step * ((np.arange(m) + 0.5) / m - 0.5)[None, :]
        sub = np.clip(sub, wl[0], wl[-1]).ravel()
    else:
        sub = wl
    Rs = cone_reflectance(stack, sub, s.angle_deg, s.na, "s")
    Rp = cone_reflectance(stack, sub, s.angle_deg, s.na, "p")
    lab, pol = s.lab_frame(), s.ray_polarization
    polarizer_only = {"polarizer_deg": lab["polarizer_deg"]}        # an analyzer is in the reflected beam only
    if any(v is not None for v in lab.values()):
        R = cone_reflectance(stack, sub, s.angle_deg, s.na, pol, **lab)
    else:
        R = {"s": Rs, "p": Rp}.get(s.polarization, 0.5 * (Rs + Rp))
    transmits = (stack.substrate_thickness_mm is not None
                 or bool(np.all(stack.substrate.nk(wl).imag < TRANSPARENT_SUBSTRATE_K)))
    T = (cone_reflectance(stack, sub, s.angle_deg, s.na, pol, "transmittance", **polarizer_only) if transmits
         else None)
    same = spectrum_wavelength_nm is None and m == 1 and wl_colour.size == wl.size
    Rc = R if same else cone_reflectance(stack, wl_colour, s.angle_deg, s.na, pol, **lab)
    pc = point_color(Rc, wl_colour, illuminant=s.illuminant_spec(), observer=s.observer, scale=scale)
    lum_R = float(luminous_reflectance(Rc, wl_colour))
    lum_T = (float(luminous_reflectance(cone_reflectance(stack, wl_colour, s.angle_deg, s.na, pol, "transmittance",
                                                         **polarizer_only), wl_colour)) if transmits else float("nan"))
    band_error = ""
    try:
        band_R, band_T = band_average(stack, (s.band_min_nm, s.band_max_nm), s.angle_deg, s.na, pol, **lab)
    except InputError as exc:
        band_R = band_T = float("nan")
        band_error = str(exc)
    if not transmits:
        band_T = float("nan")
    low = high = None
    if m > 1:
        per_step = lambda a: a.reshape(wl.size, m)           # noqa: E731
        low, high = per_step(R).min(axis=1), per_step(R).max(axis=1)
        R, Rs, Rp = (per_step(a).mean(axis=1) for a in (R, Rs, Rp))
        T = per_step(T).mean(axis=1) if T is not None else None

    if stack.layers:
        opd = float(interference_order(stack, s.swept_layer, stack.layers[s.swept_layer].thickness_nm, s.angle_deg))
    else:
        opd = 0.0
    return PointResult(wl, R, Rs, Rp, T, pc.rgb, srgb_to_hex(pc.rgb), pc.lab, pc.xy, pc.out_of_gamut,
                       int(np.floor(opd)) + 1, opd, low, high, spacing, lum_R, lum_T, band_R, band_T, band_error)


def compute_tolerance(s: ExplorerState, scale: float = 1.0) -> ToleranceResult:
    """The tolerance run of the stack as shown (current thickness, whole-stack factor, angle, cone, lamp)."""
    return tolerance_run(s.stack, s.tolerance_pct, s.tolerance_trials, TOLERANCE_SEED, angle_deg=s.angle_deg,
                         na=s.na, polarization=s.ray_polarization, illuminant=s.illuminant_spec(), observer=s.observer,
                         scale=scale, **s.lab_frame())


@dataclass(frozen=True)
class StripResult:
    thickness_nm: np.ndarray
    rgb: np.ndarray            # (n, 3)
    lab: np.ndarray            # (n, 3)
    order_marks: np.ndarray    # thicknesses where a new fringe order starts
    xyz: np.ndarray | None = None   # (n, 3) before brightness scaling


def compute_strip(s: ExplorerState, scale: float = 1.0) -> StripResult:
    """Colours along thickness at the current angle (the printable reference chart).

    ``scale`` is the colour map's brightness factor, so strip and map agree.
    """
    stack = s.stack
    d = np.linspace(0.0, s.thickness_max_nm, STRIP_POINTS)
    ill = s.illuminant_spec()
    f = s.thickness_factor
    cm = color_map(stack, s.swept_layer, d * f, [s.angle_deg], illuminant=ill, observer=s.observer,
                   polarization=s.ray_polarization, na=s.na, **s.lab_frame())
    rgb, lab, _ = scaled_colors(cm.xyz[:, 0, :], ill, s.observer, scale)
    marks = order_thicknesses_nm(stack, s.swept_layer, s.angle_deg, s.thickness_max_nm * f) / f
    return StripResult(d, rgb, lab, marks, cm.xyz[:, 0, :])


#: Most chart steps printed with their hex and L*a*b* (a page of patches under the strip).
MAX_CHART_STEPS = 44
#: Round thickness steps a chart may use, nm.
_CHART_STEPS_NM = (1, 2, 5, 10, 20, 25, 50, 100, 200, 250, 500, 1000, 2000, 2500, 5000, 10000)


@dataclass(frozen=True)
class ChartSteps:
    """The printed chart's steps: thickness (n,) nm every ``step_nm``, display sRGB and CIELAB (n, 3), hexes."""

    step_nm: float
    thickness_nm: np.ndarray
    rgb: np.ndarray
    lab: np.ndarray
    hex: tuple


def compute_chart_steps(s: ExplorerState, scale: float = 1.0) -> ChartSteps:
    """Colours at round thickness steps over the map's range (at most MAX_CHART_STEPS + 1), at the current angle."""
    step = next((x for x in _CHART_STEPS_NM if s.thickness_max_nm / x <= MAX_CHART_STEPS), _CHART_STEPS_NM[-1])
    d = np.arange(0.0, s.thickness_max_nm + 1e-9, float(step))
    ill = s.illuminant_spec()
    f = s.thickness_factor
    cm = color_map(s.stack, s.swept_layer, d * f, [s.angle_deg], illuminant=ill, observer=s.observer,
                   polarization=s.ray_polarization, na=s.na, **s.lab_frame())
    rgb, lab, _ = scaled_colors(cm.xyz[:, 0, :], ill, s.observer, scale)
    return ChartSteps(float(step), d, rgb, lab, tuple(srgb_to_hex(c) for c in rgb))


def brightness_scale(s: ExplorerState, cm: ColorMap | None, strip: StripResult | None) -> float:
    """The factor on every colour's XYZ: 1 (absolute), or 1/Y of the brightest colour of the reference
    (:attr:`ExplorerState.brightness_reference`): the map, or the strip inside the normalizing range
    (the strip point nearest the range when none lies in it)."""
    if s.brightness == "absolute":
        return 1.0
    if s.brightness_reference == "map" or strip is None or strip.xyz is None:
        if cm is None:
            return 1.0
        ymax = float(cm.xyz[..., 1].max()) if cm.xyz.size else 0.0
        return 1.0 / ymax if ymax > 0 else 1.0
    lo, hi = s.normalize_range_nm()
    d = strip.thickness_nm
    inside = (d >= lo) & (d <= hi)
    if not inside.any():
        inside = np.abs(d - 0.5 * (lo + hi)) == np.abs(d - 0.5 * (lo + hi)).min()
    ymax = float(strip.xyz[inside, 1].max())
    return 1.0 / ymax if ymax > 0 else 1.0


def rescaled_map(s: ExplorerState, cm: ColorMap, scale: float) -> ColorMap:
    """``cm`` with its colours at brightness ``scale`` (no optics recomputed)."""
    if scale == cm.scale:
        return cm
    rgb, lab, oog = scaled_colors(cm.xyz, s.illuminant_spec(), s.observer, scale)
    return dataclasses.replace(cm, rgb=rgb, lab=lab, out_of_gamut=oog, scale=scale)


def rescaled_strip(s: ExplorerState, strip: StripResult, scale: float) -> StripResult:
    """``strip`` with its colours at brightness ``scale``."""
    rgb, lab, _ = scaled_colors(strip.xyz, s.illuminant_spec(), s.observer, scale)
    return dataclasses.replace(strip, rgb=rgb, lab=lab)


#: Digits, then groups of exactly three digits after a comma or a space (a thousands separator), and
#: an optional decimal part after a point: "1,200", "12 500", "1,200.5".
_GROUPED = re.compile(r"^[+-]?\d{1,3}(?:([, \u00a0\u202f])\d{3})(?:\1\d{3})*(?:\.\d*)?$")


def parse_number(text: str, name: str, lo: float, hi: float, unit: str = "") -> float:
    """A typed number checked against its range; InputError with a sentence otherwise.

    A comma is a decimal comma ("1,5" is 1.5). A comma or space before exactly three digits may be a
    thousands separator: "1,200" is 1200 where 1.2 is out of range, and refused with a sentence where
    1.2 is in range (a guess could be wrong by a factor of 1000). A typographic minus (U+2212) is
    read as a minus.
    """
    u = f" {unit}" if unit else ""
    t = str(text).strip().replace("\u2212", "-")
    if _GROUPED.match(t):
        grouped = float(re.sub(r"[, \u00a0\u202f]", "", t))
        decimal = float(t.replace(",", ".")) if t.count(",") == 1 and "." not in t else None
        if decimal is not None and lo <= decimal <= hi:         # a guess either way could be wrong by 1000x
            raise InputError(f"{name}: '{text}' could be read as {decimal:g} (decimal comma) or {grouped:g} "
                             f"(thousands separator); type {decimal:g} or {grouped:g} without a comma.")
        if lo <= grouped <= hi:
            return grouped
        raise InputError(f"{name}: {grouped:g}{u} (from '{text}') is outside {lo:g} to {hi:g}{u}; type a value "
                         "in that range, without a thousands separator.")
    try:
        value = float(t.replace(",", "."))
    except ValueError:
        raise InputError(f"{name}: '{text}' is not a number; type a value from {lo:g} to {hi:g}{u}.") from None
    if np.isnan(value):
        raise InputError(f"{name}: '{text}' is not a number; type a value from {lo:g} to {hi:g}{u}.")
    if not np.isfinite(value):
        raise InputError(f"{name}: '{text}' is not finite; type a value from {lo:g} to {hi:g}{u}.")
    if value < lo or value > hi:
        raise InputError(f"{name}: {text} is outside {lo:g} to {hi:g}{u}; type a value in that range.")
    return value


def parse_material(text: str):
    """A material field: a curated name, a page, or 'n' / 'n+ik'. Returns the spec to store."""
    text = str(text).strip()
    if not text:
        raise InputError("Type a material: a name such as SiO2, a page shelf/book/page, or a number n or n+ik.")
    m = material(text)                       # raises InputError with suggestions
    spec = m.spec()
    return spec if isinstance(spec, (dict, str)) else text


#: Largest lamp spectrum file accepted (bytes; 1 MB = 10**6 bytes): a 1 nm table with comments is a few kB.
MAX_SPD_BYTES = 2_000_000
#: Most lines read from a lamp spectrum file; reading stops at the next one. The page uses a lamp on a 1 nm
#: grid over 360-830 nm (physics.color.user_spd_on_fine_grid), which a few hundred rows fill; 20,000 lines
#: is a 0.025 nm step over that band, finer than any spectrometer export (common practice: 0.1-1 nm).
MAX_SPD_LINES = 20_000
#: Time allowed for reading one lamp spectrum file (s): MAX_SPD_LINES lines read in about 0.05 s; the
#: budget stops a read that a busy server or an unusual file drags on.
SPD_READ_BUDGET_S = 5.0


def parse_spd_csv(content: bytes, progress=None) -> tuple[np.ndarray, np.ndarray]:
    """A lamp spectrum file: two numeric columns, wavelength (nm) and relative power.

    At most :data:`MAX_SPD_BYTES` bytes and :data:`MAX_SPD_LINES` lines of at most
    ``physics.fit.MAX_LINE_CHARS`` characters are read, within :data:`SPD_READ_BUDGET_S`;
    ``progress(lines read)`` is called now and then and may raise to stop the reading.
    """
    if len(content) > MAX_SPD_BYTES:
        raise InputError(f"The lamp spectrum file is larger than {MAX_SPD_BYTES / 1e6:g} MB; give a CSV of two "
                         "columns, nm and power.")
    try:
        text = bytes(content).decode("utf-8-sig")
    except UnicodeDecodeError:
        raise InputError("The lamp spectrum file is not text; give a CSV of two columns, nm and power.") from None
    rows = []
    lines = text_lines(text, what="lamp spectrum file", max_lines=MAX_SPD_LINES, budget_s=SPD_READ_BUDGET_S,
                       fix="Export it every 1 nm over the visible (360-830 nm) and upload it again.", progress=progress)
    for _, line in lines:
        parts = [p for p in line.replace(";", ",").replace("\t", ",").replace(" ", ",").split(",") if p]
        if len(parts) < 2:
            continue
        try:
            rows.append((float(parts[0]), float(parts[1])))
        except ValueError:
            continue                          # a header line
    if len(rows) < 5:
        raise InputError("The lamp spectrum needs at least 5 rows of two numeric columns: wavelength (nm), power.")
    arr = np.array(rows)
    if not np.all(np.isfinite(arr)):
        raise InputError("The lamp spectrum contains NaN or infinite values; remove those rows.")
    return arr[:, 0], arr[:, 1]


def default_state() -> ExplorerState:
    s = ExplorerState()
    s.load_preset(DEFAULT_PRESET)
    return s
