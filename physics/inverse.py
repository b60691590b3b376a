"""Thickness from colour: ranked candidates for an observed colour, and thickness maps of photos.

One colour matches several thicknesses (one per fringe order), so the answer is
a ranked list with the ambiguity stated, never a single number presented as
certain. The method is a lookup: the colour of the stack is computed once over
a dense grid of the unknown layer's thickness (the "colour path"), and observed
colours are compared with it by CIEDE2000.

Conventions: thicknesses in nm; a photo's pixels are display sRGB (IEC
61966-2-1), decoded to linear light before any averaging or calibration;
colours are compared in CIELAB relative to the chosen illuminant's white, the
observed sRGB being read as the display of an eye adapted to that lamp (the
inverse of :func:`physics.xyz_to_srgb`).

Calibration of a photo: a box of bare substrate (the stack with the unknown
layer at zero thickness), or of a grey card of known reflectance, fixes one gain
per linear channel so that the box shows its computed colour; this corrects
white balance and exposure together (a von Kries-type correction in the
camera's linear RGB, taken as sRGB primaries).

Reading error: an observed colour is only as good as the way it was read (an eye, a display, a
camera, a colorimeter). Every candidate of another order whose ΔE00 is within that reading error
of the best match's is as possible an answer as the best, and the verdict lists them all; a
plain colour word ("gold") is read as an approximate colour with its own, large reading error.

Order ambiguity in a map is resolved by continuity: pixels whose best match is
better than the best match of any other order by at least the reading error set a smoothed reference
thickness field, and every other pixel takes the candidate nearest to it (or to
the nominal thickness, when given).

References
----------
CIE 015:2018 (CIELAB); CIE 142-2001 and G. Sharma, W. Wu, E. N. Dalal, Color
Res. Appl. 30, 21 (2005) (CIEDE2000); IEC 61966-2-1:1999 (sRGB);
J. von Kries (1902), chromatic adaptation by independent channel gains.
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from .appearance import color_map, interference_order
from .colour_words import colour_word
from .color import (_linear_srgb, _xyz_to_linear_srgb_matrix, delta_e_2000, illuminant_white_xyz, srgb_decode_table,
                    srgb_to_hex, srgb_to_xyz, xyz_to_lab)
from .errors import InputError, require_finite
from .stack import Stack, _check_layer_index

__all__ = ["Candidate", "Candidates", "thickness_candidates", "thickness_map", "ThicknessMap", "parse_color",
           "MATCH_DE_MAX", "AMBIGUOUS_DE", "READING_ERROR_MAX_DE"]

#: Largest CIEDE2000 difference accepted as a match. Beyond about 5 a difference is obvious
#: side by side (common practice); 6 leaves room for camera and display error.
MATCH_DE_MAX = 6.0
#: Two candidates closer than this in ΔE00 cannot be told apart by colour (about one just-noticeable
#: difference, common practice). It is also the default colour reading error: that of a calibrated
#: camera or a colorimeter, whose reading is good to about one just-noticeable difference.
AMBIGUOUS_DE = 1.0
#: Largest colour reading error accepted (ΔE00): beyond this a colour names hardly more than a hue family
#: (the broadest colour word is :data:`physics.colour_words.WORD_ERROR_BROAD_DE`).
READING_ERROR_MAX_DE = 30.0
#: Thickness step of the colour path (nm): fine enough that the path's ΔE00 steps stay well below 1.
LUT_STEP_NM = 0.5
#: Colours matched per chunk: progress is reported (and a cancel noticed) between chunks, each about a tenth of
#: a second with the colour table (which shares a chunk between two threads from 262,144 colours), and the
#: working arrays stay a few tens of MB.
MATCH_CHUNK_COLOURS = 500_000
#: Most points on a colour path (a wide window gets a coarser step, and the verdict says so).
LUT_MAX_POINTS = 20_001
#: Widest window scanned at the full :data:`LUT_STEP_NM` step (nm).
FULL_STEP_WINDOW_NM = (LUT_MAX_POINTS - 1) * LUT_STEP_NM
#: Thickness step (nm) of the local colour path computed around each candidate: its thickness and
#: its colour-equal range are read there, so their precision does not depend on the window's width.
REFINE_STEP_NM = 0.1
#: Most points of one local path (a basin wider than this times REFINE_STEP_NM is sampled more coarsely).
REFINE_MAX_POINTS = 4001
#: Times a local path is widened when the colour-equal range reaches its end.
REFINE_WIDENINGS = 4
#: Local minima of the scanned path refined into candidates, best first: enough for the ``top``
#: returned and a rival of another order; a wide window has hundreds of minima, mostly poor.
MINIMA_REFINED_PER_TOP = 3
MINIMA_REFINED_MIN = 12
#: Nearest path points (by CIELAB distance) examined per order before ranking by ΔE00.
KNN_PER_ORDER = 4
#: Orders (nearest first by CIELAB distance) whose best match is ranked by ΔE00 for each colour.
ORDERS_COMPARED = 3
#: A pixel is "confident" when the best match of any other order is worse by at least this ΔE00.
CONFIDENT_MARGIN_DE = 2.0
#: Smoothing window of the reference thickness field, as a fraction of the image's larger side.
CONTINUITY_WINDOW_FRACTION = 0.06
#: A calibration box may have at most this fraction of clipped pixels.
MAX_SATURATED_FRACTION = 0.01
#: A calibration box darker than this (linear light) carries no usable colour.
MIN_BOX_LINEAR = 0.003
#: Percentiles of a map's thickness reported as its robust range (1st-99th: common practice for
#: setting aside a few stray pixels without hiding a real spread).
ROBUST_PERCENTILES = (1.0, 99.0)


# ---------------------------------------------------------------------- colours
_HEX = re.compile(r"^#?([0-9a-fA-F]{6}|[0-9a-fA-F]{3})$")
# One way only to read each number (no nested optional digit runs), so a long string of digits
# cannot make the match backtrack for minutes.
_NUM = r"[-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?"
#: Longest typed colour read, characters.
MAX_COLOUR_CHARS = 200
_LAB = re.compile(rf"^\s*(?:lab|l\*?a\*?b\*?)\s*[:(]?\s*({_NUM})[\s,;]+({_NUM})[\s,;]+({_NUM})\s*\)?\s*$", re.I)
_TRIPLE = re.compile(rf"^\s*(?:rgb)?\s*\(?\s*({_NUM})[\s,;]+({_NUM})[\s,;]+({_NUM})\s*\)?\s*$", re.I)


def parse_color(value):
    """Read a typed colour: ``("srgb", rgb 0..1)`` or ``("lab", (L*, a*, b*))``.

    Accepted: ``"#4f719f"``, ``"4f719f"``, ``"#47a"``; a 0-255 triple ``"79, 113, 159"``,
    ``"rgb(79 113 159)"`` or a tuple/list of three numbers; CIELAB ``"lab(52.1, -3.2, -27.5)"``
    or ``"L*a*b* 52.1 -3.2 -27.5"``.

    Raises
    ------
    InputError
        When the value is not one of these forms or is out of range.
    """
    how = ("Give a colour as #rrggbb, as three 0-255 numbers 'r, g, b', or as 'lab(L, a, b)'.")
    if isinstance(value, (tuple, list, np.ndarray)):
        arr = np.asarray(value, dtype=float).ravel() if np.size(value) == 3 else None
        if arr is None or not np.all(np.isfinite(arr)):
            raise InputError(f"A colour needs three numbers; got {value!r}. {how}")
        return _rgb255(arr, how)
    if not isinstance(value, str):
        raise InputError(f"{value!r} is not a colour. {how}")
    text = value.strip()
    if len(text) > MAX_COLOUR_CHARS:
        raise InputError(f"The colour is {len(text):,} characters long; a colour is at most "
                         f"{MAX_COLOUR_CHARS} characters. {how}")
    m = _HEX.match(text)
    if m:
        h = m.group(1)
        if len(h) == 3:
            h = "".join(c * 2 for c in h)
        return "srgb", np.array([int(h[i:i + 2], 16) for i in (0, 2, 4)], dtype=float) / 255.0
    m = _LAB.match(text)
    if m:
        L, a, b = (float(x) for x in m.groups())
        if not 0 <= L <= 100 or abs(a) > 200 or abs(b) > 200:
            raise InputError(f"CIELAB {text!r} is out of range: L* 0-100, a* and b* within ±200.")
        return "lab", np.array([L, a, b])
    m = _TRIPLE.match(text)
    if m:
        return _rgb255(np.array([float(x) for x in m.groups()]), how)
    raise InputError(f"{value!r} is not a colour. {how}")


def _rgb255(arr, how):
    if np.any(arr < 0) or np.any(arr > 255):
        raise InputError(f"sRGB values run from 0 to 255; got {', '.join(f'{x:g}' for x in arr)}. {how}")
    return "srgb", arr / 255.0


def _observed_lab(value, illuminant, observer):
    """(CIELAB of the observed colour, whether it came as display sRGB)."""
    kind, v = parse_color(value)
    if kind == "lab":
        return v, False
    return xyz_to_lab(srgb_to_xyz(v, illuminant, observer), illuminant, observer), True


# ---------------------------------------------------------------------- colour path
@dataclass(frozen=True)
class _Path:
    thickness_nm: np.ndarray     # (N,)
    xyz: np.ndarray              # (N, 3)
    lab: np.ndarray              # (N, 3)
    lab_display: np.ndarray      # (N, 3) CIELAB of the display colour (clipped into the sRGB gamut)
    order: np.ndarray            # (N,) fringe order of each point

    def lab_for(self, display: bool) -> np.ndarray:
        """Colours to compare with: sRGB observations (screens, cameras) are gamut-clipped like the path's
        display colours; CIELAB measurements compare with the unclipped colour."""
        return self.lab_display if display else self.lab


def _window(thickness_nm, nominal_nm, tolerance_nm):
    if nominal_nm is not None and tolerance_nm is not None and thickness_nm is None:
        nominal = float(require_finite("nominal_nm", nominal_nm, minimum=0.0, unit="nm"))
        tol = float(require_finite("tolerance_nm", tolerance_nm, minimum=0.0, min_inclusive=False, unit="nm"))
        return max(0.0, nominal - tol), nominal + tol
    if thickness_nm is None:
        thickness_nm = (0.0, 1000.0)
    w = require_finite("thickness_nm", thickness_nm, minimum=0.0, unit="nm").ravel()
    if w.size != 2 or not w[0] < w[1]:
        raise InputError(f"thickness_nm is a window (lowest, highest) in nm with lowest < highest; got {thickness_nm!r}.")
    return float(w[0]), float(w[1])


def _colour_path(stack, layer, lo, hi, angle_deg, illuminant, observer, polarization, na) -> _Path:
    """The colour path, cached for repeated look-ups with the same stack and viewing settings."""
    key = (stack, layer, lo, hi, float(angle_deg), illuminant, str(observer), polarization, float(na))
    try:
        return _cached_path(*key)
    except TypeError:                      # an unhashable part (a custom lamp spectrum): compute afresh
        return _compute_path(*key)


def _path_points(lo, hi) -> int:
    """Points of the scanned colour path over [lo, hi] nm: a LUT_STEP_NM step, at most LUT_MAX_POINTS."""
    return max(3, int(min(LUT_MAX_POINTS, np.ceil((hi - lo) / LUT_STEP_NM) + 1)))


def _compute_path(stack, layer, lo, hi, angle_deg, illuminant, observer, polarization, na, n=None) -> _Path:
    """Colour path over [lo, hi] nm in ``n`` evenly spaced thicknesses (default :func:`_path_points`)."""
    d = np.linspace(lo, hi, _path_points(lo, hi) if n is None else max(int(n), 3))
    cm = color_map(stack, layer, d, [angle_deg], illuminant=illuminant, observer=observer,
                   polarization=polarization, na=na)
    order = np.floor(interference_order(stack, layer, d, angle_deg)).astype(int) + 1
    lab_display = xyz_to_lab(srgb_to_xyz(cm.rgb[:, 0, :], illuminant, observer), illuminant, observer)
    return _Path(d, cm.xyz[:, 0, :], cm.lab[:, 0, :], lab_display, order)


@functools.lru_cache(maxsize=16)
def _cached_path(*key) -> _Path:
    return _compute_path(*key)


def _refine_minima(de: np.ndarray) -> np.ndarray:
    """Indices of local minima of a sampled curve (ends included), best first."""
    n = de.size
    left = np.r_[np.inf, de[:-1]]
    right = np.r_[de[1:], np.inf]
    idx = np.flatnonzero((de <= left) & (de < right) | (de < left) & (de <= right))
    if n == 1:
        idx = np.array([0])
    return idx[np.argsort(de[idx], kind="stable")]


# ---------------------------------------------------------------------- candidates
@dataclass(frozen=True)
class Candidate:
    """One thickness that matches the observed colour.

    Attributes
    ----------
    thickness_nm : float
    delta_e : float
        CIEDE2000 difference (root mean square over the viewing angles given).
    order : int
        Fringe order (1 = first order) at the first viewing angle.
    range_nm : (float, float)
        Thicknesses around this one whose colour is within one ΔE00 of this match:
        how precisely colour alone pins it down.
    lab : (3,) predicted CIELAB at the first angle;  rgb : (3,) display sRGB;  hex : str
    delta_e_per_angle : tuple of float
    in_tolerance : bool or None
        Inside nominal ± tolerance, when those were given.
    """

    thickness_nm: float
    delta_e: float
    order: int
    range_nm: tuple
    lab: np.ndarray
    rgb: np.ndarray
    hex: str
    delta_e_per_angle: tuple
    in_tolerance: bool | None = None


class Candidates(list):
    """Candidates best first, with the verdict on the whole list.

    Attributes
    ----------
    acceptable : bool
        The best match is within :data:`MATCH_DE_MAX` (or within the reading error, when that is larger).
    ambiguous : bool
        Another candidate of a different order is within the colour reading error (``reading_error_de``,
        default :data:`AMBIGUOUS_DE`) of the best: colour alone cannot decide between them.
    possible : list of Candidate
        Every answer the colour allows, best first: the best, and each candidate of another order within
        the reading error of it (and acceptable). One entry when the colour decides.
    reading_error_de : float
        The colour reading error used (ΔE00); a colour word's own error when a word was given.
    reading_range_nm : (float, float)
        Thicknesses of the best's order around it whose colour is within the reading error of the best:
        how precisely the colour, read with that error, pins the best down.
    words : list of ColourWord
        The colour words read (each an approximate colour), empty when every colour was a value.
    message : str
        A sentence for the user saying what the colour tells and what would decide.
    observed_lab : list of (3,) arrays, one per viewing angle.
    window_nm : (lo, hi)
    scan_step_nm : float
        Step of the scan that finds the candidates (nm): :data:`LUT_STEP_NM`, coarser for a window wider
        than :data:`FULL_STEP_WINDOW_NM` (the message then says so). Each candidate's thickness and
        range are refined locally at :data:`REFINE_STEP_NM` whatever the window.
    """

    acceptable: bool = False
    ambiguous: bool = False
    possible: list = []
    reading_error_de: float = AMBIGUOUS_DE
    reading_range_nm: tuple = (0.0, 0.0)
    words: list = []
    message: str = ""
    observed_lab: list = []
    window_nm: tuple = (0.0, 0.0)
    scan_step_nm: float = LUT_STEP_NM


def thickness_candidates(color, stack: Stack, layer: int = 0, thickness_nm=(0, 1000), angle_deg=0.0,
                         illuminant="D65", top: int = 5, *, observer="2", polarization="unpolarized",
                         na: float = 0.0, nominal_nm: float | None = None,
                         tolerance_nm: float | None = None, reading_error_de: float = AMBIGUOUS_DE) -> Candidates:
    """Rank the thicknesses of one layer whose colour matches an observed colour.

    Parameters
    ----------
    color : str, tuple, or a list of them
        The observed colour (see :func:`parse_color`), or a plain colour word ("gold", "light blue":
        :func:`physics.colour_words.colour_word`), read as an approximate colour. A list gives the same spot
        seen at several viewing angles; ``angle_deg`` is then a list of the same length.
    stack : Stack
        The stack as built; the unknown layer's thickness in it is ignored.
    layer : int
        Index of the unknown layer, 0 = top.
    thickness_nm : (lo, hi)
        Window searched, nm. ``None`` with ``nominal_nm`` and ``tolerance_nm`` searches nominal ± tolerance.
    angle_deg : float or list of float
        Viewing angle(s), degrees from the normal.
    illuminant, observer, polarization, na :
        As for :func:`physics.appearance.color_map`.
    top : int
        Most candidates returned.
    nominal_nm, tolerance_nm : float, optional
        The process target: marks candidates in tolerance and breaks near-ties toward the nominal.
    reading_error_de : float
        How far (ΔE00) the observed colour may lie from the true one: a candidate of another order whose
        ΔE00 is within this of the best's is as possible as the best. The default, :data:`AMBIGUOUS_DE`,
        suits a calibrated camera; a colour judged by eye or on a display needs about 5 (common practice).
        A colour word brings its own, larger error, which replaces this. Matches up to this error are
        accepted when it exceeds :data:`MATCH_DE_MAX`.

    Returns
    -------
    Candidates
        A list of :class:`Candidate`, best first, with ``acceptable``, ``ambiguous``, ``possible`` and
        ``message``.

    References
    ----------
    CIE 142-2001 (CIEDE2000); the reading errors are common practice, not a standard.
    """
    if not isinstance(stack, Stack):
        raise InputError(f"thickness_candidates needs a Stack; got {type(stack).__name__}.")
    _check_layer_index(stack, layer)
    colors = list(color) if isinstance(color, list) else [color]
    angles = list(np.atleast_1d(angle_deg).astype(float)) if np.ndim(angle_deg) else [float(angle_deg)] * len(colors)
    if len(angles) != len(colors):
        raise InputError(f"Give one viewing angle per colour: {len(colors)} colour(s) but {len(angles)} angle(s).")
    if not isinstance(top, (int, np.integer)) or top < 1:
        raise InputError(f"top must be a positive whole number; got {top!r}.")
    lo, hi = _window(thickness_nm, nominal_nm, tolerance_nm)
    err = float(require_finite("reading_error_de", reading_error_de, minimum=0.0, maximum=READING_ERROR_MAX_DE,
                               min_inclusive=False))
    words = [colour_word(c) for c in colors]
    if any(words):
        err = max(w.reading_error_de for w in words if w)
        colors = [w.hex if w else c for w, c in zip(words, colors)]
    limit = max(MATCH_DE_MAX, err)
    obs = [_observed_lab(c, illuminant, observer) for c in colors]
    observed = [o for o, _ in obs]
    display = [dsp for _, dsp in obs]
    paths = [_colour_path(stack, layer, lo, hi, a, illuminant, observer, polarization, na) for a in angles]
    de_each = np.stack([delta_e_2000(p.lab_for(dsp), o[None, :])
                        for p, o, dsp in zip(paths, observed, display)])   # (n_angles, N)
    de = np.sqrt(np.mean(de_each ** 2, axis=0))
    minima = _refine_minima(de)[:max(MINIMA_REFINED_MIN, MINIMA_REFINED_PER_TOP * int(top))]
    path = paths[0]
    result = Candidates(_candidates_at(minima, de, path, stack, layer, angles, observed, display, illuminant,
                                       observer, polarization, na, nominal_nm, tolerance_nm))
    result.sort(key=lambda c: c.delta_e)
    result = _break_ties_by_nominal(result, nominal_nm, err, limit)
    best = result[0]
    others = [c for c in _distinct(result)[1:]
              if c.order != best.order and abs(c.thickness_nm - best.thickness_nm) > 2 * LUT_STEP_NM]
    out = Candidates(_distinct(result)[:top])
    out.observed_lab = observed
    out.window_nm = (lo, hi)
    out.scan_step_nm = float(path.thickness_nm[1] - path.thickness_nm[0])
    out.reading_error_de, out.words = err, [w for w in words if w]
    out.acceptable = best.delta_e <= limit
    best_de = min(c.delta_e for c in result)
    rivals = [c for c in others if c.delta_e - best_de < err and c.delta_e <= limit] if out.acceptable else []
    out.possible = [best, *rivals] if out.acceptable else []
    out.ambiguous = bool(rivals)
    out.reading_range_nm = (best.range_nm if err <= AMBIGUOUS_DE
                            else _reading_range(path, de, best.thickness_nm, best_de + err))
    rival = others[0] if others else None
    out.message = _verdict(out, best, rival, lo, hi, nominal_nm, len(colors), limit)
    if not out.acceptable and len(colors) > 1:
        out.message += _conflict(colors, angles, stack, layer, (lo, hi), illuminant, observer, polarization, na,
                                 err, limit)
    if out.scan_step_nm > LUT_STEP_NM * (1 + 1e-9):
        out.message += (f" The {hi - lo:g} nm window was scanned every {out.scan_step_nm:.2g} nm (a window up to "
                        f"{FULL_STEP_WINDOW_NM:g} nm is scanned every {LUT_STEP_NM:g} nm), so a match between "
                        "samples can be missed; narrow the window for a full search.")
    return out


def _parabolic_min(d, de, i):
    """Vertex of the parabola through the three samples around a minimum (clamped to them)."""
    if 0 < i < d.size - 1:
        y0, y1, y2 = de[i - 1], de[i], de[i + 1]
        denom = y0 - 2 * y1 + y2
        if denom > 0:
            shift = 0.5 * (y0 - y2) / denom
            return float(d[i] + np.clip(shift, -1, 1) * (d[i + 1] - d[i]))
    return float(d[i])


def _contiguous(mask: np.ndarray, i: int) -> tuple[int, int]:
    """First and last index of the run of True in ``mask`` that holds index ``i``."""
    j0 = j1 = i
    while j0 > 0 and mask[j0 - 1]:
        j0 -= 1
    while j1 < mask.size - 1 and mask[j1 + 1]:
        j1 += 1
    return j0, j1


def _local_de(stack, layer, a, b, n, angles, observed, display, illuminant, observer, polarization, na):
    """Thicknesses (n,) of a local path over [a, b] nm and their ΔE00 to the observation, each angle (n_angles, n)."""
    paths = [_compute_path(stack, layer, a, b, ang, illuminant, observer, polarization, na, n=n) for ang in angles]
    de_each = np.stack([delta_e_2000(p.lab_for(dsp), o[None, :]) for p, o, dsp in zip(paths, observed, display)])
    return paths[0].thickness_nm, de_each


def _candidate_at(i, de, path, stack, layer, angles, observed, display, illuminant, observer,
                  polarization, na, nominal_nm, tolerance_nm) -> Candidate:
    """The candidate of the scanned path's local minimum ``i``, refined on a local path.

    The basin around ``i`` (thicknesses within one ΔE00 of its minimum, plus one scan step each side)
    is sampled again every :data:`REFINE_STEP_NM`, widened while the colour-equal range reaches an end
    short of the window; the thickness is the parabola vertex there and the range is read there, so
    neither depends on the scan step.
    """
    d_scan = path.thickness_nm
    lo_w, hi_w = float(d_scan[0]), float(d_scan[-1])
    j0, j1 = _contiguous(de <= de[i] + AMBIGUOUS_DE, i)
    a, b = float(d_scan[max(j0 - 1, 0)]), float(d_scan[min(j1 + 1, d_scan.size - 1)])
    for _ in range(REFINE_WIDENINGS + 1):
        n = int(np.clip(np.ceil((b - a) / REFINE_STEP_NM) + 1, 3, REFINE_MAX_POINTS))
        d, de_each = _local_de(stack, layer, a, b, n, angles, observed, display, illuminant, observer,
                               polarization, na)
        de_loc = np.sqrt(np.mean(de_each ** 2, axis=0))
        k = int(np.argmin(de_loc))
        k0, k1 = _contiguous(de_loc <= de_loc[k] + AMBIGUOUS_DE, k)
        width = b - a
        grow_lo, grow_hi = k0 == 0 and a > lo_w, k1 == n - 1 and b < hi_w
        if not (grow_lo or grow_hi):
            break
        a = max(lo_w, a - width) if grow_lo else a
        b = min(hi_w, b + width) if grow_hi else b
    t = _parabolic_min(d, de_loc, k)
    per_angle = []
    lab0 = rgb0 = None
    for q, ang in enumerate(angles):
        cm = color_map(stack, layer, [t], [ang], illuminant=illuminant, observer=observer, polarization=polarization,
                       na=na)
        lab_q = (xyz_to_lab(srgb_to_xyz(cm.rgb[0, 0], illuminant, observer), illuminant, observer)
                 if display[q] else cm.lab[0, 0])
        per_angle.append(float(delta_e_2000(lab_q, observed[q])))
        if q == 0:
            lab0, rgb0 = cm.lab[0, 0], cm.rgb[0, 0]
    d_e = float(np.sqrt(np.mean(np.square(per_angle))))
    if d_e > de_loc[k]:                    # the vertex was no better than the sample
        t, d_e, per_angle = float(d[k]), float(de_loc[k]), [float(x[k]) for x in de_each]
        cm = color_map(stack, layer, [t], [angles[0]], illuminant=illuminant, observer=observer,
                       polarization=polarization, na=na)
        lab0, rgb0 = cm.lab[0, 0], cm.rgb[0, 0]
    r0, r1 = _contiguous(de_loc <= d_e + AMBIGUOUS_DE, k)
    order = int(np.floor(interference_order(stack, layer, t, angles[0]))) + 1
    in_tol = None
    if nominal_nm is not None and tolerance_nm is not None:
        in_tol = bool(abs(t - nominal_nm) <= tolerance_nm)
    return Candidate(t, d_e, order, (float(d[r0]), float(d[r1])), lab0, rgb0,
                     srgb_to_hex(rgb0), tuple(per_angle), in_tol)


def _candidates_at(minima, de, path, stack, layer, angles, observed, display, illuminant, observer,
                   polarization, na, nominal_nm, tolerance_nm) -> list:
    """:func:`_candidate_at` of every local minimum, with the colours computed together: one colour map
    per angle for all the minima's local paths and one for all their vertices (a dozen small colour maps
    cost far more than one of the same points). A minimum whose basin reaches an end of its local path is
    refined on its own by :func:`_candidate_at`, which widens the path."""
    d_scan = path.thickness_nm
    lo_w, hi_w = float(d_scan[0]), float(d_scan[-1])
    spans = []
    for i in minima:
        j0, j1 = _contiguous(de <= de[i] + AMBIGUOUS_DE, i)
        a, b = float(d_scan[max(j0 - 1, 0)]), float(d_scan[min(j1 + 1, d_scan.size - 1)])
        spans.append((a, b, int(np.clip(np.ceil((b - a) / REFINE_STEP_NM) + 1, 3, REFINE_MAX_POINTS))))
    if not spans:
        return []
    grids = [np.linspace(a, b, n) for a, b, n in spans]
    d_all = np.concatenate(grids)
    cut = np.cumsum([g.size for g in grids])[:-1]
    de_all = []
    for q, ang in enumerate(angles):
        cm = color_map(stack, layer, d_all, [ang], illuminant=illuminant, observer=observer,
                       polarization=polarization, na=na)
        lab = (xyz_to_lab(srgb_to_xyz(cm.rgb[:, 0, :], illuminant, observer), illuminant, observer)
               if display[q] else cm.lab[:, 0, :])
        de_all.append(delta_e_2000(lab, observed[q][None, :]))
    de_each_all = np.stack(de_all)                                      # (n_angles, points)
    out, vertices = [None] * len(spans), []
    for m, (i, (a, b, n), d, de_each) in enumerate(zip(minima, spans, grids, np.split(de_each_all, cut, axis=1))):
        de_loc = np.sqrt(np.mean(de_each ** 2, axis=0))
        k = int(np.argmin(de_loc))
        k0, k1 = _contiguous(de_loc <= de_loc[k] + AMBIGUOUS_DE, k)
        if (k0 == 0 and a > lo_w) or (k1 == n - 1 and b < hi_w):       # the basin goes on: widen, alone
            out[m] = _candidate_at(i, de, path, stack, layer, angles, observed, display, illuminant, observer,
                                   polarization, na, nominal_nm, tolerance_nm)
        else:
            vertices.append((m, d, de_each, de_loc, k, _parabolic_min(d, de_loc, k)))
    if vertices:
        t_all = np.array([v[5] for v in vertices])
        per_angle, lab0, rgb0 = [], None, None
        for q, ang in enumerate(angles):
            cm = color_map(stack, layer, t_all, [ang], illuminant=illuminant, observer=observer,
                           polarization=polarization, na=na)
            lab_q = (xyz_to_lab(srgb_to_xyz(cm.rgb[:, 0, :], illuminant, observer), illuminant, observer)
                     if display[q] else cm.lab[:, 0, :])
            per_angle.append(np.atleast_1d(delta_e_2000(lab_q, observed[q][None, :])))
            if q == 0:
                lab0, rgb0 = cm.lab[:, 0, :], cm.rgb[:, 0, :]
        per_angle = np.stack(per_angle)                                 # (n_angles, vertices)
        d_e = np.sqrt(np.mean(np.square(per_angle), axis=0))
        worse = [j for j, v in enumerate(vertices) if d_e[j] > v[3][v[4]]]   # the vertex no better than the sample
        if worse:
            t_all[worse] = [vertices[j][1][vertices[j][4]] for j in worse]
            cm = color_map(stack, layer, t_all[worse], [angles[0]], illuminant=illuminant, observer=observer,
                           polarization=polarization, na=na)
            lab0, rgb0 = lab0.copy(), rgb0.copy()
            lab0[worse], rgb0[worse] = cm.lab[:, 0, :], cm.rgb[:, 0, :]
        orders = np.floor(np.atleast_1d(interference_order(stack, layer, t_all, angles[0]))).astype(int) + 1
        for j, (m, d, de_each, de_loc, k, _) in enumerate(vertices):
            t = float(t_all[j])
            if j in worse:
                dj, pa = float(de_loc[k]), tuple(float(x[k]) for x in de_each)
            else:
                dj, pa = float(d_e[j]), tuple(float(x) for x in per_angle[:, j])
            r0, r1 = _contiguous(de_loc <= dj + AMBIGUOUS_DE, k)
            in_tol = None
            if nominal_nm is not None and tolerance_nm is not None:
                in_tol = bool(abs(t - nominal_nm) <= tolerance_nm)
            out[m] = Candidate(t, dj, int(orders[j]), (float(d[r0]), float(d[r1])), lab0[j], rgb0[j],
                               srgb_to_hex(rgb0[j]), pa, in_tol)
    return out


def _distinct(cands):
    """Drop candidates that fall inside a better candidate's range (the same minimum twice)."""
    kept = []
    for c in cands:
        if not any(k.range_nm[0] <= c.thickness_nm <= k.range_nm[1] for k in kept):
            kept.append(c)
    return kept


def _break_ties_by_nominal(cands, nominal_nm, reading_error_de=AMBIGUOUS_DE, limit=MATCH_DE_MAX):
    """Candidates within the reading error of the best (and acceptable) first, nearest the nominal first."""
    if nominal_nm is None or len(cands) < 2:
        return cands
    best = cands[0].delta_e
    near = [c for c in cands if c.delta_e - best < reading_error_de and c.delta_e <= limit]
    if not near:
        return cands
    near.sort(key=lambda c: abs(c.thickness_nm - nominal_nm))
    rest = [c for c in cands if c not in near]
    return near + rest


def _reading_range(path: _Path, de: np.ndarray, t_nm: float, threshold: float) -> tuple[float, float]:
    """Thicknesses of the scanned path around ``t_nm``, in its order, whose ΔE00 stays at most ``threshold``."""
    i = int(np.argmin(np.abs(path.thickness_nm - t_nm)))
    j0, j1 = _contiguous((de <= max(threshold, de[i])) & (path.order == path.order[i]), i)
    return float(path.thickness_nm[j0]), float(path.thickness_nm[j1])


def _or_list(items) -> str:
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + " or " + items[-1]


def _verdict(out, best, rival, lo, hi, nominal_nm, n_angles, limit=MATCH_DE_MAX) -> str:
    if not out.acceptable:
        what = "these colours together" if n_angles > 1 else "this colour"
        return (f"No thickness in {lo:g}-{hi:g} nm matches {what} within ΔE00 {limit:g}: the nearest is "
                f"{best.thickness_nm:.0f} nm at ΔE00 {best.delta_e:.1f}. Check the stack, the lamp, the viewing "
                "angle and the calibration, or widen the window; do not take the nearest as the answer.")
    err = out.reading_error_de
    r0, r1 = out.reading_range_nm
    if not out.ambiguous:
        text = (f"Best match {best.thickness_nm:.0f} nm (order {best.order}, ΔE00 {best.delta_e:.1f}); colour alone "
                f"places it within {r0:.0f}-{r1:.0f} nm")
        text += (". " if err <= AMBIGUOUS_DE else f" (colour reading error ΔE00 {err:g}). ")
        text += f"No other order lies within the reading error ΔE00 {err:g} of it."
        if nominal_nm is not None and rival is not None and abs(rival.delta_e - best.delta_e) < err:
            text += " A near-equal match of another order was set aside as farther from the nominal thickness."
        return text
    alts = " / ".join(f"{c.thickness_nm:.0f}" for c in out.possible[1:])
    hint = [] if n_angles > 1 else ["tilt the part (a second viewing angle of the same spot)"]
    if nominal_nm is None:
        hint.append("give a nominal")
    hint.append("measure a spectrum")
    each = ", ".join(f"{c.thickness_nm:.0f} nm (order {c.order}, ΔE00 {c.delta_e:.1f})" for c in out.possible)
    text = (f"{best.thickness_nm:.0f} nm, or {alts} nm: colour alone cannot decide; {_or_list(hint)}. "
            f"Within the colour reading error ΔE00 {err:g} of the best match: {each}.")
    if nominal_nm is not None:
        text += f" {best.thickness_nm:.0f} nm comes first as the nearest to the nominal {nominal_nm:g} nm."
    return text


def _conflict(colors, angles, stack, layer, window, illuminant, observer, polarization, na, err, limit) -> str:
    """Why several views of one spot match no thickness together: which view conflicts with the first."""
    def alone(k):
        return thickness_candidates(colors[k], stack, layer, window, angles[k], illuminant, top=3, observer=observer,
                                    polarization=polarization, na=na, reading_error_de=err)
    first = alone(0)
    if not first.acceptable:
        return (f" The {angles[0]:g}° colour alone matches nothing within ΔE00 {limit:g} either: check it, the "
                "stack and the lamp first.")
    fits = " / ".join(f"{c.thickness_nm:.0f}" for c in first.possible)
    parts = []
    for k in range(1, len(colors)):
        lab_k = _observed_lab(colors[k], illuminant, observer)
        worst = None
        for c in first.possible:
            cm = color_map(stack, layer, [c.thickness_nm], [angles[k]], illuminant=illuminant, observer=observer,
                           polarization=polarization, na=na)
            pred = (xyz_to_lab(srgb_to_xyz(cm.rgb[0, 0], illuminant, observer), illuminant, observer)
                    if lab_k[1] else cm.lab[0, 0])
            d = float(delta_e_2000(pred, lab_k[0]))
            if worst is None or d < worst[0]:
                worst = (d, c.thickness_nm, srgb_to_hex(cm.rgb[0, 0]))
        if worst[0] <= limit:
            continue
        own = alone(k)
        where = (f"; alone it matches {' / '.join(f'{c.thickness_nm:.0f}' for c in own.possible)} nm"
                 if own.acceptable else "; alone it matches nothing in the window either")
        parts.append(f"the {angles[k]:g}° colour matches nothing within ΔE00 {limit:g} of it (at {worst[1]:.0f} nm "
                     f"it would look {worst[2]}, ΔE00 {worst[0]:.1f} from the one given{where})")
    if not parts:
        return (f" Each colour is near a match of {fits} nm, but not all at once within ΔE00 {limit:g}: check the "
                "tilt angles.")
    return (f" The {angles[0]:g}° colour matches {fits} nm, but " + "; and ".join(parts)
            + ". Check the tilt angle and that both colours are of the same spot under the same lamp.")


# ---------------------------------------------------------------------- photos
@dataclass(frozen=True)
class ThicknessMap:
    """Per-pixel thickness of a photo.

    Attributes
    ----------
    thickness_nm : (H, W) float, NaN where no acceptable match or outside the region of interest
    delta_e : (H, W) float, ΔE00 of the chosen match (NaN outside the region)
    margin : (H, W) float, ΔE00 of the best match of any other order minus the chosen one's
        (large = the order is clear from colour alone; NaN when only one order exists in the window)
    order : (H, W) int, fringe order of the chosen match (0 where none)
    gains : (3,) linear RGB gains applied by the calibration (1 without)
    stats : dict
        mean_nm, median_nm, std_nm, min_nm, max_nm; p_low_nm and p_high_nm, the
        :data:`ROBUST_PERCENTILES` of the thickness (its robust range); uniformity = (max - min)/(2 mean)
        and uniformity_robust = (p_high - p_low)/(2 mean); valid_fraction and pixels (matched);
        order_outliers and order_outlier_fraction (of matched pixels), see ``order_outlier``.
    message : str
    order_outlier : (H, W) bool
        Matched pixels whose fringe order differs from the dominant order of their neighbourhood
        (a window of :data:`CONTINUITY_WINDOW_FRACTION` of the image's larger side): most likely a
        wrong order, flagged for review and kept in the map.
    undecided : (H, W) bool
        Matched pixels whose best match of another order (itself acceptable) is within the colour
        reading error of the chosen one's: colour alone cannot decide their order, which follows
        their confident neighbours (or the nominal). Counted in ``stats["undecided"]``.
    uncertainty_nm : (H, W) float
        Thickness uncertainty of each matched pixel (NaN elsewhere), see :func:`_uncertainty_nm`;
        ``stats["median_uncertainty_nm"]`` and ``stats["p95_uncertainty_nm"]`` summarise it.
    """

    thickness_nm: np.ndarray
    delta_e: np.ndarray
    margin: np.ndarray
    order: np.ndarray
    gains: np.ndarray
    stats: dict = field(default_factory=dict)
    message: str = ""
    order_outlier: np.ndarray | None = None
    undecided: np.ndarray | None = None
    uncertainty_nm: np.ndarray | None = None


def _lab_from_linear(lin: np.ndarray, illuminant, observer, gains=None) -> np.ndarray:
    """CIELAB (float32) of linear sRGB (n, 3), each channel first multiplied by ``gains`` when given."""
    from .colourtable import lab_from_linear               # the CIE formula in float32, fast on millions of pixels

    white = illuminant_white_xyz(illuminant, observer)
    M = np.linalg.inv(_xyz_to_linear_srgb_matrix(white.tobytes()))
    return lab_from_linear(lin, M if gains is None else M * np.asarray(gains, dtype=float)[None, :], white)


def _lab_of_codes(region: np.ndarray, linear: bool, gains, illuminant, observer) -> np.ndarray:
    """CIELAB (n, 3) float32 of every pixel of a 16-bit region (h, w, 3): decoded (sRGB, or code / 65535 when
    ``linear``), multiplied by the gains and turned into CIELAB, without the full-size linear copy (compiled,
    in two threads; :func:`_unique_linear` and :func:`_lab_from_linear` where numba is not at hand)."""
    from concurrent.futures import ThreadPoolExecutor

    from .colourkernel import kernels

    k = kernels()
    if k is None:
        codes, _, lin = _unique_linear(region, 16, linear)
        return _lab_from_linear(lin, illuminant, observer, gains)
    table = (np.arange(65536, dtype=np.float32) / np.float32(65535) if linear else srgb_decode_table(16))
    table = np.ascontiguousarray(table, dtype=np.float32)
    white = illuminant_white_xyz(illuminant, observer)
    white = white / white[1]
    M = np.linalg.inv(_xyz_to_linear_srgb_matrix(illuminant_white_xyz(illuminant, observer).tobytes()))
    coef = np.ascontiguousarray((M * np.asarray(gains, dtype=float)[None, :]) / white[:, None], dtype=np.float32)
    codes = np.ascontiguousarray(region.reshape(-1, 3))
    lab = np.empty(codes.shape, dtype=np.float32)
    edges = np.linspace(0, codes.shape[0], 3).astype(int)
    with ThreadPoolExecutor(2) as pool:                          # the loop holds no interpreter lock
        list(pool.map(lambda j: k.lab_of_codes(codes[edges[j]:edges[j + 1]], table, coef, lab[edges[j]:edges[j + 1]]),
                      range(2)))
    return lab


def _calibration_gains(photo, box, reference, stack, layer, angle_deg, illuminant, observer, polarization, na,
                       flat=None):
    from .imageio import _check_box, box_mean_linear, box_saturated_fraction

    if box is None:
        return np.ones(3)
    sat = box_saturated_fraction(photo, box)
    if sat > MAX_SATURATED_FRACTION:
        raise InputError(f"The calibration box is overexposed: {sat:.0%} of its pixels are clipped. Draw it on an "
                         "area that is not blown out, or take the photo with less exposure.")
    if flat is not None:                                              # the box as flat-fielded
        from .camera import check_flat
        check_flat(flat, photo)
        bx0, by0, bx1, by1 = b = _check_box(photo, box)
        measured = flat.apply(photo.linear_rgb(b), None, b).reshape(-1, 3).mean(axis=0, dtype=float)
    else:
        measured = box_mean_linear(photo, box)
    if np.any(measured < MIN_BOX_LINEAR):
        raise InputError("The calibration box is too dark to read its colour; draw it on a lit area of bare "
                         "substrate or the grey card, or expose the photo longer.")
    if reference == "substrate":
        bare = stack.with_thickness(layer, 0.0)
        cm = color_map(bare, layer, [0.0], [angle_deg], illuminant=illuminant, observer=observer,
                       polarization=polarization, na=na)
        target = _linear_srgb(cm.xyz[0, 0], illuminant, observer)
    else:
        rho = float(require_finite("reference", reference, minimum=0.0, maximum=1.0, min_inclusive=False))
        target = np.full(3, rho) @ np.eye(3)          # a grey card is neutral: equal linear RGB
    return target / measured


def thickness_map(image, stack: Stack, layer: int = 0, thickness_nm=(0, 1000), reference_box=None,
                  illuminant="D65", *, angle_deg: float = 0.0, observer="2", polarization="unpolarized",
                  na: float = 0.0, reference="substrate", roi=None, nominal_nm: float | None = None,
                  max_delta_e: float = MATCH_DE_MAX, progress=None,
                  reading_error_de: float | None = None, calibration=None, flat_field=None,
                  denoise: str | None = None) -> ThicknessMap:
    """Thickness of one layer at every pixel of a photo.

    Parameters
    ----------
    image : array (H, W, 3) uint8/uint16, bytes, path, or a loaded ``physics.imageio.Photo``
        Display sRGB pixels; 16-bit values are read as 0..65535.
    stack, layer, thickness_nm, illuminant, angle_deg, observer, polarization, na :
        As for :func:`thickness_candidates`.
    reference_box : (x0, y0, x1, y1) or None
        Pixel box (x right, y down, ends exclusive) of the calibration reference; None = no calibration.
    reference : "substrate" or float
        What the box shows: bare substrate (the stack with the layer at zero thickness), or a grey
        card of this reflectance (e.g. 0.18).
    roi : (x0, y0, x1, y1) or None
        Region of interest; pixels outside it are NaN.
    nominal_nm : float, optional
        Breaks order ambiguity where continuity cannot.
    max_delta_e : float
        Pixels whose best match is worse than this are left empty (NaN), not guessed.
    progress : callable(fraction, text), optional
    reading_error_de : float, optional
        Colour reading error (ΔE00), as for :func:`thickness_candidates`: a pixel whose best match of
        another order is within this of its best match is one whose order colour cannot decide; its
        order is chosen by continuity (or the nominal) and it is flagged in ``undecided``. Default
        :data:`CONFIDENT_MARGIN_DE`.
    calibration : physics.camera.CameraCalibration, optional
        The station's camera calibration (made on photos of this size, under this illuminant and observer):
        pixels are read as linear light, flat-fielded, and turned into XYZ by it instead of the sRGB decode
        and ``reference_box`` gains (``reference_box`` is then not used); they are then compared with the
        path's unclipped colours. Its own flat field is used unless ``flat_field`` is given (a newer flat
        field of the same station); one made without a flat field refuses one.
    flat_field : physics.camera.FlatField, optional
        Divides out the lamp's fall-off across the field (with the calibration's dark offset, when given)
        before the gains or the calibration; colours are then matched per pixel.
    denoise : None or a key of :data:`physics.camera.DENOISE_FILTERS`
        An edge-preserving median filter of the linear image (scipy.ndimage.median_filter, 5 x 5 for
        "median") before matching: it removes sensor noise from smooth films at the cost of a pixel or two
        of sharpness at edges.

    Returns
    -------
    ThicknessMap
    """
    from .imageio import Photo, load_image

    say = progress or (lambda f, t: None)
    photo = image if isinstance(image, Photo) else load_image(image)
    if not isinstance(stack, Stack):
        raise InputError(f"thickness_map needs a Stack; got {type(stack).__name__}.")
    _check_layer_index(stack, layer)
    lo, hi = _window(thickness_nm, None, None)
    max_de = float(require_finite("max_delta_e", max_delta_e, minimum=0.0, min_inclusive=False))
    margin_de = CONFIDENT_MARGIN_DE if reading_error_de is None else float(require_finite(
        "reading_error_de", reading_error_de, minimum=0.0, maximum=READING_ERROR_MAX_DE, min_inclusive=False))
    H, W = photo.height, photo.width
    x0, y0, x1, y1 = _box(roi, W, H, "roi") if roi is not None else (0, 0, W, H)
    say(0.05, "calibrating")
    flat = flat_field if flat_field is not None else getattr(calibration, "flat_field", None)
    per_pixel = calibration is not None or flat is not None or denoise is not None
    gains = np.ones(3) if calibration is not None else _calibration_gains(
        photo, reference_box, reference, stack, layer, angle_deg, illuminant, observer, polarization, na, flat)
    say(0.1, "computing the colour path")
    path = _colour_path(stack, layer, lo, hi, angle_deg, illuminant, observer, polarization, na)
    say(0.2, "reading colours")
    if per_pixel:                                                    # every pixel its own colour
        from .camera import pixel_lab
        values, calibrated = pixel_lab(photo, (x0, y0, x1, y1), calibration, flat, denoise, illuminant, observer, say)
        lab = values if calibrated else _lab_from_linear(values * gains, illuminant, observer)
        inverse = None                                               # the identity: no gathers
        path = _true_colour_path(path) if calibrated else path       # calibrated XYZ is not gamut-clipped
        what = "pixels"
    else:
        region = photo.rgb[y0:y1, x0:x1]
        if photo.bit_depth == 16 and region.shape[0] * region.shape[1] > UNIQUE_16BIT_MAX_PIXELS:
            lab = _lab_of_codes(region, photo.linear, gains, illuminant, observer)
            inverse = None                                           # kept pixel by pixel: the identity
        else:
            codes, inverse, lin = _unique_linear(region, photo.bit_depth, photo.linear)
            lab = _lab_from_linear(lin, illuminant, observer, gains)
        what = "distinct colours"
    n = len(lab)
    matched = tuple(np.empty(n, dtype=dt) for dt in (np.float32, np.float32, np.int16) * 2)
    for start in range(0, max(n, 1), MATCH_CHUNK_COLOURS):           # in chunks: progress, and less memory
        say(0.35 + 0.4 * start / max(n, 1), f"matching {n:,} {what}")
        g = slice(start, start + MATCH_CHUNK_COLOURS)                # answers written in place
        _match(lab[g], path, out=tuple(a[g] for a in matched))
    t1, de1, o1, t2, de2, o2 = matched
    say(0.75, "resolving orders by continuity")
    shape = (y1 - y0, x1 - x0)
    T, D, O, M, undecided = _resolve(t1, de1, o1, t2, de2, o2, inverse, shape, max_de, nominal_nm, margin_de)
    full = lambda a, fill: _embed(a, (H, W), (x0, y0, x1, y1), fill)  # noqa: E731
    thick = full(T, np.nan)
    outlier = _order_outliers(O, np.isfinite(T))
    stats = _stats(T, outlier)
    stats["undecided"] = int(np.count_nonzero(undecided))
    stats["undecided_fraction"] = stats["undecided"] / stats["pixels"] if stats["pixels"] else 0.0
    stats["reading_error_de"] = margin_de
    U = _uncertainty_nm(T, D, path, calibration.colour_error_de if calibration is not None else AMBIGUOUS_DE, hi - lo)
    u = _finite(U)
    p50, p95 = (float(v) for v in _percentiles(u, [50.0, 95.0])) if u.size else (float("nan"),) * 2
    stats["median_uncertainty_nm"], stats["p95_uncertainty_nm"] = p50, p95
    stats["calibrated"], stats["flat_fielded"], stats["denoise"] = calibration is not None, flat is not None, denoise
    say(1.0, "done")
    return ThicknessMap(thick, full(D, np.nan), full(M, np.nan), full(O, 0), gains, stats, _map_message(stats, max_de),
                        full(outlier, False), full(undecided, False), full(U, np.nan))


#: Thickness span (nm) over which the colour path's slope (nm per ΔE00) is measured for the uncertainty:
#: wide enough to stay finite where the path turns, narrow against a fringe (our own choice).
SLOPE_SPAN_NM = 5.0


def _true_colour_path(path: _Path) -> _Path:
    """The path with its unclipped CIELAB in the place of the display colours, for calibrated (true XYZ) pixels."""
    from dataclasses import replace
    return replace(path, lab_display=path.lab)


def _nm_per_de(path: _Path) -> np.ndarray:
    """(N,) nm per ΔE00 along the path: thickness step over the ΔE00 between the path points
    ±SLOPE_SPAN_NM/2 around each point (the colours the matcher compares with)."""
    t, ref = path.thickness_nm, path.lab_display
    step = float(t[1] - t[0]) if t.size > 1 else 1.0
    k = max(1, int(round(SLOPE_SPAN_NM / 2 / step)))
    i = np.arange(t.size)
    a, b = np.clip(i - k, 0, t.size - 1), np.clip(i + k, 0, t.size - 1)
    return (t[b] - t[a]) / np.maximum(delta_e_2000(ref[a], ref[b]), 1e-9)


def _uncertainty_nm(T, D, path: _Path, floor_de: float, cap_nm: float) -> np.ndarray:
    """Per-pixel thickness uncertainty (nm), NaN where unmatched, at most ``cap_nm``:

        u = sqrt( (s(t) * sqrt(ΔE00_match² + floor_de²))² + step² / 12 )

    with s(t) the path's nm per ΔE00 at the pixel's thickness (:func:`_nm_per_de`), ΔE00_match the
    pixel's own colour residual (noise, a colour the stack cannot show), ``floor_de`` the calibration's
    colour error (:attr:`physics.camera.CameraCalibration.colour_error_de`, or :data:`AMBIGUOUS_DE`, one
    just-noticeable difference, with gains or none) and ``step`` the path's thickness step (a rounding's
    standard uncertainty, step/√12). One ΔE00 moves the thickness by s(t), so where colour changes slowly
    with thickness the uncertainty is large. First-order propagation of about one standard uncertainty,
    not a certified one: in the simulated camera check (tests/test_camera_outside.py) 0.53 of pixels lie
    within 1 u of the truth, 0.79 within 2 u and 0.89 within 3 u, so it is short in the tail.
    """
    t = path.thickness_nm
    step = float(t[1] - t[0]) if t.size > 1 else 1.0
    slope = _nm_per_de(path).astype(np.float32)
    unmatched = ~np.isfinite(T)
    x = T - np.float32(t[0])                                        # whole maps in float32, in place, no masks
    x /= np.float32(step)
    np.rint(x, out=x)
    np.clip(x, 0, t.size - 1, out=x)
    np.putmask(x, unmatched, 0)
    u = slope[x.astype(np.int32)]                                   # the nearest path point's slope
    del x
    u *= u
    d = D.astype(np.float32)                                        # a copy: squared in place
    with np.errstate(invalid="ignore", over="ignore"):              # unmatched pixels, set NaN below
        d *= d
        d += np.float32(floor_de) ** 2
        u *= d
        del d
        u += np.float32(step ** 2 / 12.0)
        np.sqrt(u, out=u)
    np.minimum(u, np.float32(cap_nm), out=u)
    u[unmatched] = np.nan
    return u


def _map_message(stats: dict, max_de: float) -> str:
    """One paragraph on a map's statistics: matched share, mean, robust and full range, stray orders."""
    if not stats["pixels"]:
        return f"No pixel matched within ΔE00 {max_de:g}: check the stack, lamp and calibration."
    p0, p1 = ROBUST_PERCENTILES
    msg = (f"{stats['valid_fraction']:.0%} of the region matched within ΔE00 {max_de:g}; "
           f"mean {stats['mean_nm']:.1f} nm, range {stats['p_low_nm']:.1f}-{stats['p_high_nm']:.1f} nm "
           f"(percentiles P{p0:g}-P{p1:g}; min-max {stats['min_nm']:.1f}-{stats['max_nm']:.1f} nm).")
    if stats.get("undecided"):
        msg += (f" At {stats['undecided']:,} matched pixels ({stats['undecided_fraction']:.1%}) colour alone cannot "
                f"decide the fringe order (another order within the reading error ΔE00 {stats['reading_error_de']:g}); "
                "their order follows their neighbours or the nominal.")
    if stats["order_outliers"]:
        msg += (f" {stats['order_outliers']:,} matched pixels ({stats['order_outlier_fraction']:.1%}) take another "
                "fringe order than their neighbourhood: most likely a wrong order; check them before using "
                "the min-max.")
    return msg


def _box(box, W, H, name):
    try:
        x0, y0, x1, y1 = (int(round(float(v))) for v in box)
    except (TypeError, ValueError):
        raise InputError(f"{name} is a pixel box (x0, y0, x1, y1); got {box!r}.") from None
    if not (0 <= x0 < x1 <= W and 0 <= y0 < y1 <= H):
        raise InputError(f"{name} ({x0}, {y0}, {x1}, {y1}) is not inside the {W} x {H} image; "
                         "give x0 < x1 <= width and y0 < y1 <= height.")
    return x0, y0, x1, y1


#: A 16-bit region of more pixels than this is matched pixel by pixel: its codes are nearly all distinct, and
#: sorting them to find the distinct ones costs more than the colour table's lookup it would save.
UNIQUE_16BIT_MAX_PIXELS = 1 << 20


def _unique_linear(rgb: np.ndarray, bit_depth: int, linear: bool = False):
    """Distinct pixel codes, the pixel → code index, and each code's linear RGB (sRGB decode, or
    code / max_code when ``linear``). A 16-bit region of more than :data:`UNIQUE_16BIT_MAX_PIXELS` pixels
    keeps every pixel as its own code (the index is the identity)."""
    table = (np.arange(2 ** bit_depth, dtype=np.float32) / np.float32(2 ** bit_depth - 1) if linear
             else srgb_decode_table(bit_depth))
    flat = rgb.reshape(-1, 3)
    if bit_depth == 16 and flat.shape[0] > UNIQUE_16BIT_MAX_PIXELS:
        return flat, np.arange(flat.shape[0]), table[flat]
    if bit_depth == 8:
        quad = np.zeros((flat.shape[0], 4), dtype=np.uint8)            # R, G, B, 0 → one little-endian uint32
        quad[:, :3] = flat
        packed = quad.view("<u4").ravel()
        present = np.zeros(1 << 24, dtype=bool)
        present[packed] = True
        codes = np.flatnonzero(present).astype(np.uint32)
        index = np.zeros(1 << 24, dtype=np.int32)                      # code -> position among distinct codes
        index[codes] = np.arange(codes.size, dtype=np.int32)
        inverse = index[packed]
        channels = np.stack([codes & 255, (codes >> 8) & 255, (codes >> 16) & 255], axis=1)
    else:
        packed = (flat[:, 0].astype(np.uint64) << 32) | (flat[:, 1].astype(np.uint64) << 16) | flat[:, 2]
        codes, inverse = np.unique(packed, return_inverse=True)
        channels = np.stack([(codes >> 32) & 65535, (codes >> 16) & 65535, codes & 65535], axis=1).astype(np.int64)
    lin = table[channels]
    return codes, inverse.ravel(), lin


def _match(lab: np.ndarray, path: _Path, out=None):
    """Best match overall and best match of any other order, for each colour (by ΔE00).

    Returns ``(t1, de1, o1, t2, de2, o2)``: thickness (nm), ΔE00 and fringe order of the best path match,
    and of the best match of another order (NaN, inf, 0 when the window holds one order). A lookup in the
    path's cached :class:`physics.colourtable.ColourTable` (CIELAB cells holding the path minima that can
    win in them, solved exactly and corrected to first order for each colour), whose cost per colour does
    not depend on how many distinct colours a photo has. Measured against brute force (ΔE00 against every
    path point) in ``benchmarks/bench_inverse.py``: the thickness is within one path step, or at a point as
    good (within 0.02 ΔE00, on a flat stretch of the path), for about 99.9 % of a photo's matched colours.
    """
    from .colourtable import colour_table

    return colour_table(path.lab_display, path.thickness_nm, path.order).match(lab, out=out)


def _smooth_reference(T1, confident):
    """Thickness averaged over confident pixels in a window (normalized box filter) on a reduced grid.

    Returns ``(ref_small, step)``: the field on a grid ``step`` times coarser, NaN where no confident
    pixel lies within the window.
    """
    h, w = T1.shape
    size = max(3, int(round(CONTINUITY_WINDOW_FRACTION * max(h, w))))
    step = max(1, size // 6)                                            # work on a reduced grid for speed
    hh, ww = -(-h // step) * step, -(-w // step) * step
    if step > 1:                                                        # band by band of `step` rows: the
        gh, gw = hh // step, ww // step                                 # same block sums, no full-size arrays
        wgt, val = np.empty((gh, gw), dtype=np.float32), np.empty((gh, gw), dtype=np.float32)
        bw, bv = np.zeros((step, ww), dtype=np.float32), np.zeros((step, ww), dtype=np.float32)
        for g in range(gh):
            a, b = g * step, min(g * step + step, h)
            if b - a < step:                                            # the last band, padded with zeros
                bw[:], bv[:] = 0, 0
            bw[:b - a, :w] = confident[a:b]
            bv[:b - a, :w] = np.where(confident[a:b], T1[a:b], np.float32(0))
            wgt[g] = bw.reshape(1, step, gw, step).sum(axis=(1, 3))[0]
            val[g] = bv.reshape(1, step, gw, step).sum(axis=(1, 3))[0]
    else:
        wgt = confident.astype(np.float32)
        val = np.where(confident, T1, np.float32(0))
    k = max(1, size // step)
    num = ndimage.uniform_filter(val.astype(np.float64), k, mode="nearest")
    den = ndimage.uniform_filter(wgt.astype(np.float64), k, mode="nearest")
    return np.where(den > 1e-9, num / np.maximum(den, 1e-12), np.nan), step


def _resolve(t1, de1, o1, t2, de2, o2, inverse, shape, max_de, nominal_nm, margin_de=CONFIDENT_MARGIN_DE):
    """Choose per pixel between the best match and the best of another order.

    Per distinct colour: the two candidates and whether the best is confident (its
    margin over any other order is at least ``margin_de``, the colour reading error). Per pixel,
    only the non-confident ones consult the smoothed reference field of confident neighbours.
    ``inverse`` maps pixels to colours; None when every pixel is its own colour (nothing is gathered, and
    ``t1``, ``de1`` and ``o1`` become the returned maps, changed in place).

    Returns ``(T, D, O, M, undecided)``, each (h, w): thickness, ΔE00, order, |margin| and the matched
    pixels whose other order is acceptable and within ``margin_de`` (see ``ThicknessMap.undecided``).
    """
    if inverse is None:
        from .colourkernel import kernels
        k = kernels()
        if k is not None:                                               # one compiled pass, no temporaries
            return _resolve_compiled(k, t1, de1, o1, t2, de2, o2, shape, max_de, nominal_nm, margin_de)

    def per_pixel(a):                                                   # a per-colour array, per pixel
        return (a if inverse is None else a[inverse]).reshape(shape)

    margin_u = (de2 - de1).astype(np.float32)
    M_u = np.abs(margin_u)
    M_u[~np.isfinite(margin_u)] = np.nan
    confident_u = (de1 <= max_de) & (margin_u >= margin_de)
    maybe_u = (de2 <= max_de) & (M_u < margin_de)                       # the other order acceptable and close
    T = per_pixel(t1.astype(np.float32, copy=False))                   # with inverse None: t1, de1 and o1
    D = per_pixel(de1.astype(np.float32, copy=False))                  # themselves, overwritten below
    O = per_pixel(o1.astype(np.int16, copy=False))
    M = per_pixel(M_u)
    confident = per_pixel(confident_u)
    if not confident.all() and np.any(de2 <= max_de):
        iu = np.flatnonzero(~confident.ravel())
        if confident.any():
            ref_small, step = _smooth_reference(T, confident)
            r = ref_small[(iu // shape[1]) // step, (iu % shape[1]) // step]
        else:
            r = np.full(iu.size, np.nan)
        if nominal_nm is not None:
            r = np.where(np.isnan(r), float(nominal_nm), r)
        idx = iu if inverse is None else inverse[iu]
        a, b = t1[idx], t2[idx]
        d2 = de2[idx]
        use2 = (d2 <= max_de) & np.isfinite(r) & (np.abs(b - r) < np.abs(a - r))
        pick = iu[use2]
        T.ravel()[pick] = b[use2]
        D.ravel()[pick] = d2[use2]
        O.ravel()[pick] = o2[idx[use2]]
    bad = D > max_de
    T[bad] = np.nan
    O[bad] = 0
    undecided = per_pixel(maybe_u)
    undecided &= np.isfinite(T)
    return T, D, O, M, undecided


def _resolve_compiled(k, t1, de1, o1, t2, de2, o2, shape, max_de, nominal_nm, margin_de):
    """:func:`_resolve` for a photo whose every pixel is its own colour, in the compiled loops of
    :mod:`physics.colourkernel` (the same choices; t1, de1 and o1 become the maps)."""
    margins, choose = k.margins, k.choose
    n = t1.size
    t1 = np.ascontiguousarray(t1, dtype=np.float32)
    de1 = np.ascontiguousarray(de1, dtype=np.float32)
    o1 = np.ascontiguousarray(o1, dtype=np.int16)
    t2, de2 = np.ascontiguousarray(t2, dtype=np.float32), np.ascontiguousarray(de2, dtype=np.float32)
    o2 = np.ascontiguousarray(o2, dtype=np.int16)
    M = np.empty(n, dtype=np.float32)
    confident = np.empty(n, dtype=bool)
    max32, margin32 = np.float32(max_de), np.float32(margin_de)
    n_conf, any_other = margins(de1, de2, max32, margin32, M, confident)
    use_ref = n_conf < n and any_other
    ref, step = np.full((1, 1), np.nan), max(shape)                 # no confident pixel: no reference
    if use_ref and n_conf:
        ref, step = _smooth_reference(t1.reshape(shape), confident.reshape(shape))
    undecided = np.empty(n, dtype=bool)
    nominal = float("nan") if nominal_nm is None else float(nominal_nm)
    choose(t1, de1, o1, t2, de2, o2, M, confident, np.ascontiguousarray(ref, dtype=np.float64), int(step),
           int(shape[1]), bool(use_ref), nominal, max32, margin32, undecided)
    return (t1.reshape(shape), de1.reshape(shape), o1.reshape(shape), M.reshape(shape), undecided.reshape(shape))


def _embed(a, shape, box, fill):
    x0, y0, x1, y1 = box
    if (x0, y0, x1, y1) == (0, 0, shape[1], shape[0]):
        return a
    out = np.full(shape, fill, dtype=np.result_type(a.dtype, np.asarray(fill).dtype))
    out[y0:y1, x0:x1] = a
    return out


def _order_outliers(O: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Matched pixels whose order is the most common one nowhere around them, (h, w) bool.

    The most common order is counted in windows of the continuity size (:data:`CONTINUITY_WINDOW_FRACTION`
    of the larger side), centred on the cells of the reduced grid of :func:`_smooth_reference`. A pixel
    is flagged when its order is the most common in neither its own cell nor any of the eight around
    it, so a pixel beside a true order boundary is not flagged, and a stray one inside a region is.
    """
    h, w = O.shape
    lo, hi = (int(O.min()), int(O.max())) if O.size else (0, 0)
    size = max(3, int(round(CONTINUITY_WINDOW_FRACTION * max(h, w))))
    step = max(1, size // 6)
    k = max(1, size // step)
    gh, gw = -(-h // step), -(-w // step)
    from .colourkernel import kernels
    jit = kernels() if hi - lo < 256 and O.size > UNIQUE_16BIT_MAX_PIXELS else None
    if jit is not None:                                                 # the same bins, without full-size copies
        values, nv = np.arange(lo, hi + 1), hi - lo + 1
        O, valid = np.ascontiguousarray(O), np.ascontiguousarray(valid)
        per_cell = np.zeros(gh * gw * (nv + 1), dtype=np.int64)
        jit.order_counts(O, valid, lo, nv, step, gw, per_cell)
        per_cell = per_cell.reshape(gh, gw, nv + 1)
    else:
        if hi - lo < 256:                                               # fringe orders: a short range
            values = np.arange(lo, hi + 1)
            r = np.subtract(O, lo, dtype=np.int32)
        else:
            values, r = np.unique(O, return_inverse=True)
            r = r.reshape(h, w).astype(np.int32)
        nv = values.size                                                # bin nv: unmatched pixels
        np.putmask(r, ~valid, nv)
        # each pixel's (cell of the reduced grid, order) bin; the matched pixels of each order in each cell are
        # counted exactly (as the block sums of 0/1 indicators were) and then averaged over the window
        code = np.add.outer((np.arange(h, dtype=np.int32) // step) * np.int32(gw * (nv + 1)),
                            (np.arange(w, dtype=np.int32) // step) * np.int32(nv + 1))
        code += r
        del r
        per_cell = np.bincount(code.ravel(), minlength=gh * gw * (nv + 1)).reshape(gh, gw, nv + 1)
    total = per_cell[:, :, :nv].sum(axis=(0, 1))
    present = np.flatnonzero(total)                                     # as np.unique of the matched orders
    if present.size < 2:
        return np.zeros((h, w), dtype=bool)
    counts = total[present]
    best = np.full((gh, gw), -1.0)
    dominant = np.zeros((gh, gw), dtype=np.intp)                        # bin of the dominant order
    for j in present[np.argsort(counts)[::-1]]:                         # the most common first: it wins ties
        c = ndimage.uniform_filter(per_cell[:, :, j].astype(np.float64), k, mode="nearest")
        take = c > best + 1e-12
        best = np.where(take, c, best)
        dominant = np.where(take, j, dominant)
    padded = np.pad(dominant, 1, mode="edge")
    allowed = np.zeros((gh, gw, nv + 1), dtype=bool)                    # the dominant orders around each cell
    allowed[:, :, nv] = True                                            # (unmatched pixels are never flagged)
    cells = np.arange(gh * gw).reshape(gh, gw) * (nv + 1)
    for dy in (0, 1, 2):
        for dx in (0, 1, 2):
            allowed.reshape(-1)[cells + padded[dy:dy + gh, dx:dx + gw]] = True
    if jit is not None:
        flags = np.empty((h, w), dtype=bool)
        jit.order_flags(O, valid, lo, nv, step, gw, allowed.reshape(-1), flags)
        return flags
    return ~allowed.reshape(-1)[code]


#: Bins of the histogram that narrows each order statistic of :func:`_percentiles` to one bin's values.
PERCENTILE_BINS = 4096


def _order_statistics(x: np.ndarray, ks: np.ndarray) -> np.ndarray:
    """The ``ks``-th smallest values of a 1-D finite float array (as ``np.sort(x)[ks]``, without sorting):
    a histogram of the values finds the bin that holds each, and only that bin's values are partitioned.
    The bin index is a monotone function of the value, so each bin holds a contiguous run of the sorted
    values and the result is exact."""
    lo, hi = x.min(), x.max()
    if not hi > lo:
        return np.full(ks.shape, lo, dtype=x.dtype)
    scale = np.float64(PERCENTILE_BINS) / (np.float64(hi) - np.float64(lo))
    from .colourkernel import kernels
    jit = kernels() if x.size > UNIQUE_16BIT_MAX_PIXELS and x.dtype in (np.float32, np.float64) else None
    if jit is not None:                                                 # the same bins, in one compiled pass
        x = np.ascontiguousarray(x)
        counts = np.zeros(PERCENTILE_BINS, dtype=np.int64)
        jit.histogram(x, lo, x.dtype.type(scale), PERCENTILE_BINS, counts)
    else:
        b = ((x - lo) * x.dtype.type(scale)).astype(np.int32)         # >= 0: truncation is the floor
        np.minimum(b, PERCENTILE_BINS - 1, out=b)
        counts = np.bincount(b, minlength=PERCENTILE_BINS)
    below = np.concatenate(([0], np.cumsum(counts)))
    out = np.empty(ks.shape, dtype=x.dtype)
    bins = np.searchsorted(below, ks, side="right") - 1                # below[j] <= k < below[j + 1]
    for j in np.unique(bins):
        if jit is not None:
            inside = np.empty(int(counts[j]), dtype=x.dtype)
            jit.in_bin(x, lo, x.dtype.type(scale), PERCENTILE_BINS, int(j), inside)
        else:
            inside = x[b == j]
        rank = ks[bins == j] - below[j]
        out[bins == j] = np.partition(inside, np.unique(rank))[rank]
    return out


def _percentiles(x: np.ndarray, q, dtype=None) -> np.ndarray:
    """``np.percentile(x.astype(dtype), q)`` (the linear method) of a 1-D finite float array with a list of
    float ``q``, from :func:`_order_statistics` and the same interpolation (``a + (b - a) g``, or
    ``b - (b - a)(1 - g)`` when g >= 0.5); checked equal to ``np.percentile`` in tests/test_inverse.py."""
    q = np.asarray(q, dtype=np.float64)
    virtual = (x.size - 1) * (q / 100)
    prev = np.floor(virtual)
    gamma = virtual - prev
    prev = prev.astype(np.intp)
    nxt = np.minimum(prev + 1, x.size - 1)
    ks = np.unique(np.concatenate([prev, nxt]))
    values = _order_statistics(x, ks).astype(dtype or x.dtype)
    a, b = values[np.searchsorted(ks, prev)], values[np.searchsorted(ks, nxt)]
    d = b - a
    r = a + d * gamma
    np.subtract(b, d * (1 - gamma), out=r, where=gamma >= 0.5)
    return r


def _finite(x: np.ndarray) -> np.ndarray:
    """The finite values of an array, flattened (``x[np.isfinite(x)]``; compiled past a million values)."""
    from .colourkernel import kernels
    flat = x.reshape(-1)
    jit = kernels() if flat.size > UNIQUE_16BIT_MAX_PIXELS and flat.dtype in (np.float32, np.float64) else None
    if jit is None:
        return flat[np.isfinite(flat)]
    out = np.empty(flat.size, dtype=flat.dtype)
    return out[:jit.finite_values(np.ascontiguousarray(flat), out)]


def _stats(T, outlier=None):
    """Statistics of a thickness region (nm), NaN = unmatched; ``outlier`` flags stray-order pixels."""
    v = _finite(T)
    if v.size == 0:
        nan = float("nan")
        return {"mean_nm": nan, "median_nm": nan, "std_nm": nan, "min_nm": nan, "max_nm": nan, "p_low_nm": nan,
                "p_high_nm": nan, "uniformity": nan, "uniformity_robust": nan, "valid_fraction": 0.0, "pixels": 0,
                "order_outliers": 0, "order_outlier_fraction": 0.0}
    p_low, median, p_high = (float(x) for x in _percentiles(v, [ROBUST_PERCENTILES[0], 50.0, ROBUST_PERCENTILES[1]],
                                                            np.float64))
    from .colourkernel import kernels
    jit = kernels() if v.size > UNIQUE_16BIT_MAX_PIXELS else None
    if jit is not None:                                                 # one pass, no float64 copy
        total, squares, v_min, v_max = (float(a) for a in jit.moments(v))
    else:
        v = v.astype(np.float64)
        total, squares, v_min, v_max = float(v.sum()), float(np.dot(v, v)), float(v.min()), float(v.max())
    mean = total / v.size
    std = float(np.sqrt(max(squares / v.size - mean * mean, 0.0)))
    n_out = int(np.count_nonzero(outlier)) if outlier is not None else 0
    return {"mean_nm": mean, "median_nm": median, "std_nm": std, "min_nm": v_min, "max_nm": v_max,
            "p_low_nm": p_low, "p_high_nm": p_high,
            "uniformity": float((v_max - v_min) / (2 * mean)) if mean > 0 else float("nan"),
            "uniformity_robust": float((p_high - p_low) / (2 * mean)) if mean > 0 else float("nan"),
            "valid_fraction": float(v.size / T.size), "pixels": int(v.size),
            "order_outliers": n_out, "order_outlier_fraction": n_out / v.size}
