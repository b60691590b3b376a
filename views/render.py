"""Printable PNG figures drawn with Pillow alone.

Three figures, each returned as PNG bytes:

- :func:`map_png`: a colour map (display sRGB per grid point) over two axes, e.g. the colour
  seen against thickness and viewing angle, with round-number ticks, an optional crosshair
  and a footer line.
- :func:`strip_png`: a reference colour chart along thickness, sized for A4 landscape, split
  into up to three rows with a thickness ruler under each, interference-order marks and
  thickness-candidate markers.
- :func:`colorbar_png`: a scalar map (e.g. thickness per image pixel) coloured through a
  perceptual lookup table taken from Bokeh's palettes, with missing values (NaN) hatched grey
  and a colour bar.

:func:`nice_ticks` picks axis ticks at 1, 2 or 5 x 10^k steps. :func:`strip_layout` gives the
pixel geometry of a strip chart, so a page can tell which thickness lies under a pixel.

Conventions: colours are display-encoded sRGB in 0..1 (values outside are clipped; NaN is
refused); thicknesses in nm; a map's row 0 is its lowest y value and is drawn at the bottom.
Text uses DejaVu Sans when the system has it (it covers Greek letters, degree signs and
subscripts), else Pillow's built-in scalable font, else Pillow's fixed bitmap font; layout is
measured from the font in use, so text is never clipped whichever font is found.

Every bad argument raises :class:`physics.errors.InputError` (a ``ValueError``) saying what
was wrong and how to fix it.
"""

from __future__ import annotations

import functools
import io
import math
from dataclasses import dataclass

import numpy as np
from PIL import Image, ImageDraw, ImageFont
from PIL.PngImagePlugin import PngInfo

from physics.errors import InputError

__all__ = ["map_png", "strip_png", "colorbar_png", "nice_ticks", "strip_layout",
           "StripLayout", "StripRow", "COLORMAPS"]

WHITE = (255, 255, 255)
BLACK = (0, 0, 0)
FOOTER_INK = (60, 60, 60)
#: Colour of a missing (NaN) value in a scalar map, and of its hatching.
MISSING = (221, 221, 221)
MISSING_HATCH = (190, 190, 190)
#: Colour-map names accepted by :func:`colorbar_png` → Bokeh palette names (256 entries each).
COLORMAPS = {"viridis": "Viridis256", "cividis": "Cividis256", "plasma": "Plasma256",
             "inferno": "Inferno256", "magma": "Magma256", "turbo": "Turbo256"}

_PAD = 24          # outer margin, px
_TICK = 7          # axis tick length, px
_MAP_WIDTH = 960   # plot-area width of a colour map, px
_STRIP_WIDTH = 2000  # strip chart image width, px (A4 landscape at 190 dpi is ~2200 px)
_STRIP_MARGIN = 70   # left and right margin of the strip rows, px
_STRIP_HEIGHT = 128  # height of one colour strip, px
_STRIP_ROW_NM = 400.0  # a strip longer than this per row is split (at most 3 rows)
_STEP_W, _STEP_H = 168, 112   # one chart step's patch (its thickness, hex and L*a*b* printed on it), px
_STEP_GAP = 8                 # space between patches, px


# --------------------------------------------------------------------------------------------
# Fonts and text
# --------------------------------------------------------------------------------------------

_DEJAVU = {False: "DejaVuSans.ttf", True: "DejaVuSans-Bold.ttf"}


@functools.lru_cache(maxsize=None)
def _font_source() -> str:
    """Which fonts this system offers: ``"dejavu"``, ``"default"`` (Pillow's scalable) or ``"bitmap"``."""
    try:
        ImageFont.truetype(_DEJAVU[False], 12)
        return "dejavu"
    except (OSError, ImportError):
        pass
    try:
        if isinstance(ImageFont.load_default(size=12), ImageFont.FreeTypeFont):
            return "default"
    except (OSError, ImportError, TypeError):
        pass
    return "bitmap"


@functools.lru_cache(maxsize=None)
def _font(size: int, bold: bool = False):
    """A font of ``size`` px (ignored by the bitmap fallback), bold when DejaVu offers it."""
    source = _font_source()
    if source == "dejavu":
        try:
            return ImageFont.truetype(_DEJAVU[bold], size)
        except OSError:
            return ImageFont.truetype(_DEJAVU[False], size)
    if source == "default":
        return ImageFont.load_default(size=size)
    return ImageFont.load_default_imagefont()


def _clean(text: str, font) -> str:
    """Text the font can encode (the bitmap font takes Latin-1 only)."""
    if isinstance(font, ImageFont.FreeTypeFont):
        return text
    return text.encode("latin-1", "replace").decode("latin-1")


def _line_box(font) -> tuple[int, int]:
    """Top offset and height of one line of text (ascender to descender) in ``font``."""
    _, top, _, bottom = font.getbbox("Ahgjy|(")
    return top, bottom - top


def _lh(font) -> int:
    """Height of one line of text, px."""
    return _line_box(font)[1]


def _tw(font, text: str) -> int:
    """Width of ``text``, px."""
    if not text:
        return 0
    x0, _, x1, _ = font.getbbox(_clean(text, font))
    return x1 - x0


def _wrap(text: str, font, width: int) -> list[str]:
    """``text`` broken at spaces (and at its own newlines) into lines at most ``width`` px wide."""
    lines: list[str] = []
    for para in text.split("\n"):
        words = para.split(" ")
        line = ""
        for word in words:
            trial = word if not line else line + " " + word
            if line and _tw(font, trial) > width:
                lines.append(line)
                line = word
            else:
                line = trial
        lines.append(line)
    while lines and not lines[-1].strip():
        lines.pop()
    return lines


class _Canvas:
    """A white RGB image with text placement by alignment box (works with every font kind)."""

    def __init__(self, width: int, height: int):
        self.img = Image.new("RGB", (int(width), int(height)), WHITE)
        self.draw = ImageDraw.Draw(self.img)

    def text(self, x, y, text, font, ha="l", va="t", fill=BLACK, backing=False):
        """Draw one line; (x, y) is the point named by ``ha`` (l/c/r) and ``va`` (t/m/b).

        Returns the box (x0, y0, x1, y1) the line occupies.
        """
        text = _clean(text, font)
        top, h = _line_box(font)
        bx0, _, bx1, _ = font.getbbox(text) if text else (0, 0, 0, 0)
        w = bx1 - bx0
        x0 = x - {"l": 0, "c": w / 2, "r": w}[ha]
        y0 = y - {"t": 0, "m": h / 2, "b": h}[va]
        x0, y0 = int(round(x0)), int(round(y0))
        if backing:
            self.draw.rectangle((x0 - 3, y0 - 2, x0 + w + 3, y0 + h + 2), fill=WHITE)
        if text:
            self.draw.text((x0 - bx0, y0 - top), text, font=font, fill=fill)
        return x0, y0, x0 + w, y0 + h

    def vtext(self, x, y, text, font, ha="c", va="m", fill=BLACK):
        """Draw one line turned 90° anticlockwise (reads bottom to top), aligned like :meth:`text`.

        ``ha``/``va`` refer to the turned text's box on the page.
        """
        text = _clean(text, font)
        if not text:
            return
        top, h = _line_box(font)
        bx0, _, bx1, _ = font.getbbox(text)
        w = bx1 - bx0
        mask = Image.new("L", (w + 2, h + 2), 0)
        ImageDraw.Draw(mask).text((1 - bx0, 1 - top), text, font=font, fill=255)
        mask = mask.rotate(90, expand=True)
        mw, mh = mask.size
        x0 = x - {"l": 0, "c": mw / 2, "r": mw}[ha]
        y0 = y - {"t": 0, "m": mh / 2, "b": mh}[va]
        self.img.paste(fill, (int(round(x0)), int(round(y0)), int(round(x0)) + mw, int(round(y0)) + mh),
                       mask)

    def text_block(self, x, y, lines, font, fill=BLACK, gap=4) -> int:
        """Draw left-aligned lines from top ``y``; return the y below the last line."""
        for line in lines:
            self.text(x, y, line, font, fill=fill)
            y += _lh(font) + gap
        return y

    def two_tone_vline(self, x, y0, y1):
        """A 1 px black vertical line edged in white, visible over any colour."""
        self.draw.rectangle((x - 1, y0, x + 1, y1), fill=WHITE)
        self.draw.line((x, y0, x, y1), fill=BLACK, width=1)

    def two_tone_hline(self, x0, x1, y):
        """A 1 px black horizontal line edged in white, visible over any colour."""
        self.draw.rectangle((x0, y - 1, x1, y + 1), fill=WHITE)
        self.draw.line((x0, y, x1, y), fill=BLACK, width=1)


def _block_height(lines: list[str], font, gap: int = 4) -> int:
    """Height of ``lines`` drawn by :meth:`_Canvas.text_block`, without the trailing gap."""
    return 0 if not lines else len(lines) * (_lh(font) + gap) - gap


def _png(img: Image.Image, *, title: str, dpi: int) -> bytes:
    """Encode ``img`` as PNG with a title and print resolution."""
    info = PngInfo()
    info.add_text("Title", title)
    info.add_text("Software", "fringegauge")
    buf = io.BytesIO()
    img.save(buf, format="PNG", pnginfo=info, dpi=(dpi, dpi))
    return buf.getvalue()


# --------------------------------------------------------------------------------------------
# Ticks
# --------------------------------------------------------------------------------------------

def nice_ticks(lo, hi, target=8) -> np.ndarray:
    """Round-number tick positions inside ``[lo, hi]``.

    The step is 1, 2 or 5 x 10^k, chosen so that the number of ticks inside the range is as
    close to ``target`` as possible (ties go to the larger step); at least two ticks are
    returned whenever ``lo < hi``. Neighbouring ticks are one step apart and the first and last
    lie within one step of ``lo`` and ``hi``.

    Parameters
    ----------
    lo, hi : float
        The axis range in data units, ``lo <= hi``, both finite.
    target : int
        Wanted number of ticks, at least 2.

    Returns
    -------
    numpy.ndarray
        Tick values (float64, increasing), rounded so they print exactly. ``[lo]`` when
        ``lo == hi``.

    Raises
    ------
    InputError
        When a bound is not a finite number, ``lo > hi`` or ``target < 2``.
    """
    try:
        lo_f, hi_f = float(lo), float(hi)
    except (TypeError, ValueError):
        raise InputError(f"nice_ticks needs two numbers for the range, got lo={lo!r}, hi={hi!r}.") from None
    if not (math.isfinite(lo_f) and math.isfinite(hi_f)):
        raise InputError(f"nice_ticks needs a finite range, got lo={lo_f}, hi={hi_f}.")
    if lo_f > hi_f:
        raise InputError(f"nice_ticks needs lo <= hi, got lo={lo_f:g} > hi={hi_f:g}; swap them.")
    try:
        n_target = int(target)
    except (TypeError, ValueError):
        raise InputError(f"target must be a whole number of ticks (>= 2), got {target!r}.") from None
    if n_target < 2:
        raise InputError(f"target must be at least 2 ticks, got {target!r}.")
    if lo_f == hi_f:
        return np.array([lo_f])

    if hi_f - lo_f <= 1e-10 * max(abs(lo_f), abs(hi_f)):  # below float resolution for round steps
        return np.array([lo_f, hi_f])
    raw = (hi_f - lo_f) / n_target
    e0 = math.floor(math.log10(raw))
    best = None
    for e in (e0 - 1, e0, e0 + 1):
        for m in (1, 2, 5):
            step = m * 10.0 ** e
            tol = 1e-9 + 1e-13 * max(abs(lo_f), abs(hi_f)) / step  # rounding of lo/step, hi/step
            k0 = math.ceil(lo_f / step - tol)
            k1 = math.floor(hi_f / step + tol)
            n = k1 - k0 + 1
            key = (n < 2, abs(n - n_target), -step)
            if best is None or key < best[0]:
                best = (key, m, e, k0, k1)
    (few, _, _), m, e, k0, k1 = best
    if few:
        return np.array([lo_f, hi_f])
    k = np.arange(k0, k1 + 1, dtype=float) * m
    ticks = k * 10.0 ** e if e >= 0 else k / 10.0 ** (-e)
    ticks[ticks == 0] = 0.0  # no negative zero
    return ticks


def _tick_labels(ticks: np.ndarray) -> list[str]:
    """Tick values as text with just enough decimals for their step."""
    ticks = np.asarray(ticks, dtype=float)
    if ticks.size == 0:
        return []
    if ticks.size >= 2:
        step = float(np.min(np.diff(ticks)))
    else:
        step = abs(float(ticks[0])) or 1.0
    decimals = max(0, -int(math.floor(math.log10(step) + 1e-9)))
    big = float(np.max(np.abs(ticks)))
    if big >= 1e6 or decimals > 6:
        return [f"{v:.6g}" for v in ticks]
    out = []
    for v in ticks:
        if abs(v) < step * 1e-6:
            v = 0.0
        out.append(f"{v:.{decimals}f}")
    return out


def _fit_ticks(lo: float, hi: float, length_px: float, font, horizontal: bool):
    """Ticks for an axis of ``length_px`` whose labels do not collide: (values, labels)."""
    ticks, labels = np.array([lo]), _tick_labels(np.array([lo]))
    for target in (8, 7, 6, 5, 4, 3, 2):
        ticks = nice_ticks(lo, hi, target)
        labels = _tick_labels(ticks)
        if ticks.size < 2:
            break
        spacing = length_px * (ticks[1] - ticks[0]) / (hi - lo)
        need = (max(_tw(font, s) for s in labels) + 16) if horizontal else (_lh(font) + 10)
        if spacing >= need:
            break
    return ticks, labels


def _cell_edges(values: np.ndarray) -> np.ndarray:
    """Cell edges around increasing sample positions (midpoints, half a step beyond the ends).

    A single sample gets a cell 10 % of max(|value|, 1) wide.
    """
    if values.size == 1:
        half = 0.05 * max(abs(float(values[0])), 1.0)
        return np.array([values[0] - half, values[0] + half])
    mid = 0.5 * (values[1:] + values[:-1])
    return np.concatenate([[2 * values[0] - mid[0]], mid, [2 * values[-1] - mid[-1]]])


def _cell_index(edges: np.ndarray, n_px: int) -> np.ndarray:
    """For each of ``n_px`` pixels spanning ``edges[0]..edges[-1]``, the cell under its centre."""
    centres = edges[0] + (np.arange(n_px) + 0.5) / n_px * (edges[-1] - edges[0])
    return np.clip(np.searchsorted(edges, centres, side="right") - 1, 0, edges.size - 2)


def _px(value: float, lo: float, hi: float, start: int, length: int) -> int:
    """Pixel column (or row counted from ``start``) of a data value on an axis."""
    return int(math.floor(start + (value - lo) / (hi - lo) * length))


def _draw_x_axis(cv: _Canvas, left, width, y, lo, hi, ticks, labels, font):
    """Ticks below the plot's bottom edge ``y`` and their labels."""
    for v, s in zip(ticks, labels):
        x = min(max(_px(v, lo, hi, left, width), left - 1), left + width)
        cv.draw.line((x, y, x, y + _TICK), fill=BLACK, width=1)
        cv.text(x, y + _TICK + 4, s, font, ha="c", va="t")


def _draw_y_axis(cv: _Canvas, top, height, x, lo, hi, ticks, labels, font, side="left"):
    """Ticks outside the plot's vertical edge ``x`` (``side`` left or right) and their labels."""
    for v, s in zip(ticks, labels):
        y = min(max(top + height - 1 - (_px(v, lo, hi, 0, height)), top - 1), top + height)
        if side == "left":
            cv.draw.line((x - _TICK, y, x, y), fill=BLACK, width=1)
            cv.text(x - _TICK - 5, y, s, font, ha="r", va="m")
        else:
            cv.draw.line((x, y, x + _TICK, y), fill=BLACK, width=1)
            cv.text(x + _TICK + 5, y, s, font, ha="l", va="m")


# --------------------------------------------------------------------------------------------
# Input checks
# --------------------------------------------------------------------------------------------

def _text_arg(name: str, value) -> str:
    """A text argument: ``None`` becomes empty; anything but ``str`` is refused."""
    if value is None:
        return ""
    if not isinstance(value, str):
        raise InputError(f"{name} must be text (str), got {type(value).__name__} {value!r}.")
    return value


def _float_array(name: str, value) -> np.ndarray:
    """``value`` as a float64 array, or InputError when it is not numeric."""
    try:
        return np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be an array of numbers, got {type(value).__name__}.") from None


def _require_finite_colours(name: str, rgb: np.ndarray) -> None:
    """Refuse NaN or infinite colour components, naming the first one."""
    bad = ~np.isfinite(rgb)
    if bad.any():
        where = tuple(int(i) for i in np.argwhere(bad)[0])
        raise InputError(
            f"{name} has {int(bad.sum())} NaN or infinite value(s), the first at index {where}; "
            "every colour component must be a number in 0..1. Replace missing points "
            "(e.g. with grey) before drawing.")


def _axis_values(name: str, value, n: int, unit_hint: str) -> np.ndarray:
    """A 1-D, finite, strictly increasing coordinate array of length ``n``."""
    arr = _float_array(name, value)
    if arr.ndim != 1:
        raise InputError(f"{name} must be a 1-D array, got shape {arr.shape}.")
    if arr.size != n:
        raise InputError(f"{name} has {arr.size} values but rgb has {n} {unit_hint}; they must match.")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} contains NaN or infinite values; give finite numbers.")
    if arr.size > 1 and not np.all(np.diff(arr) > 0):
        i = int(np.argmax(np.diff(arr) <= 0))
        raise InputError(
            f"{name} must be strictly increasing, but {name}[{i}] = {arr[i]:g} is followed by "
            f"{arr[i + 1]:g}; sort the grid (and the colours with it).")
    return arr


def _to_uint8(rgb: np.ndarray) -> np.ndarray:
    """Display sRGB in 0..1 (clipped) → 8-bit."""
    return np.round(np.clip(rgb, 0.0, 1.0) * 255.0).astype(np.uint8)


def _labelled_marks(name: str, marks) -> list[tuple[float, str]]:
    """An iterable of (thickness_nm, label) pairs, checked."""
    if marks is None:
        return []
    try:
        items = list(marks)
    except TypeError:
        raise InputError(f"{name} must be a list of (thickness_nm, label) pairs, got {marks!r}.") from None
    out = []
    for i, item in enumerate(items):
        try:
            t, label = item
            t = float(t)
        except (TypeError, ValueError):
            raise InputError(
                f"{name}[{i}] must be a (thickness_nm, label) pair such as (190.0, 'm=1'), "
                f"got {item!r}.") from None
        if not math.isfinite(t):
            raise InputError(f"{name}[{i}] has thickness {t}; give a finite number in nm.")
        out.append((t, _text_arg(f"{name}[{i}] label", label)))
    return out


# --------------------------------------------------------------------------------------------
# Colour map over two axes
# --------------------------------------------------------------------------------------------

def map_png(rgb, x_values, y_values, *, x_label, y_label, title, subtitle="", crosshair=None,
            footer="") -> bytes:
    """Draw a colour map over two axes as a PNG.

    Each grid point is drawn as a cell reaching halfway to its neighbours, scaled to a plot
    area 960 px wide (nearest-neighbour), y increasing upward, framed, with round-number ticks.

    Parameters
    ----------
    rgb : array_like, shape (n_y, n_x, 3)
        Display sRGB in 0..1 (clipped); ``rgb[0]`` is the row at the lowest y. No NaN.
    x_values : array_like, shape (n_x,)
        Strictly increasing x coordinates of the columns (e.g. thickness in nm).
    y_values : array_like, shape (n_y,)
        Strictly increasing y coordinates of the rows (e.g. viewing angle in degrees).
    x_label, y_label : str
        Axis labels with units, e.g. ``"Thickness (nm)"``.
    title : str
        Title line (wrapped when long).
    subtitle : str
        Optional second line, e.g. stack, lamp and observer.
    crosshair : (float, float), optional
        A point (x, y) in data units marked by thin black-and-white lines across the map;
        parts outside the map are not drawn.
    footer : str
        Optional small note under the figure.

    Returns
    -------
    bytes
        PNG image (RGB, 150 dpi).

    Raises
    ------
    InputError
        Wrong shapes, empty arrays, NaN/infinite colours or coordinates, coordinates not
        strictly increasing, a crosshair that is not two finite numbers, or non-text labels.
    """
    arr = _float_array("rgb", rgb)
    if arr.ndim != 3 or arr.shape[2] != 3:
        raise InputError(f"rgb must have shape (n_y, n_x, 3), got {arr.shape}.")
    n_y, n_x = arr.shape[:2]
    if n_y == 0 or n_x == 0:
        raise InputError(f"rgb is empty (shape {arr.shape}); give at least one row and one column.")
    _require_finite_colours("rgb", arr)
    xs = _axis_values("x_values", x_values, n_x, "columns")
    ys = _axis_values("y_values", y_values, n_y, "rows")
    x_label, y_label = _text_arg("x_label", x_label), _text_arg("y_label", y_label)
    title, subtitle = _text_arg("title", title), _text_arg("subtitle", subtitle)
    footer = _text_arg("footer", footer)
    cross = None
    if crosshair is not None:
        try:
            cx, cy = (float(c) for c in crosshair)
        except (TypeError, ValueError):
            raise InputError(f"crosshair must be an (x, y) pair of numbers, got {crosshair!r}.") from None
        if not (math.isfinite(cx) and math.isfinite(cy)):
            raise InputError(f"crosshair must be finite, got {crosshair!r}.")
        cross = (cx, cy)

    f_title, f_sub, f_lab = _font(30, bold=True), _font(20), _font(20)
    f_tick, f_foot = _font(18), _font(15)
    plot_w = _MAP_WIDTH
    plot_h = int(np.clip(round(_MAP_WIDTH * n_y / n_x), 360, 720))
    xe, ye = _cell_edges(xs), _cell_edges(ys)
    x_lo, x_hi, y_lo, y_hi = float(xe[0]), float(xe[-1]), float(ye[0]), float(ye[-1])
    xt, xl = _fit_ticks(x_lo, x_hi, plot_w, f_tick, horizontal=True)
    yt, yl = _fit_ticks(y_lo, y_hi, plot_h, f_tick, horizontal=False)

    y_tick_w = max(_tw(f_tick, s) for s in yl)
    left = _PAD + (_lh(f_lab) + 12 if y_label else 0) + y_tick_w + 5 + _TICK + 2
    right = max(_PAD + 8, _tw(f_tick, xl[-1]) // 2 + _PAD)
    width = left + plot_w + right
    text_w = width - 2 * _PAD
    title_lines = _wrap(title, f_title, text_w)
    sub_lines = _wrap(subtitle, f_sub, text_w) if subtitle else []
    foot_lines = _wrap(footer, f_foot, text_w) if footer else []
    top = _PAD + _block_height(title_lines, f_title, 6) + (10 + _block_height(sub_lines, f_sub) if sub_lines else 0) + 22
    bottom = (_TICK + 4 + _lh(f_tick) + (12 + _lh(f_lab) if x_label else 0)
              + (16 + _block_height(foot_lines, f_foot) if foot_lines else 0) + _PAD)
    height = top + plot_h + bottom

    cv = _Canvas(width, height)
    y = cv.text_block(_PAD, _PAD, title_lines, f_title, gap=6)
    if sub_lines:
        cv.text_block(_PAD, y - 6 + 10, sub_lines, f_sub)

    # Map: pixel rows top → bottom run from the highest y to the lowest.
    ix = _cell_index(xe, plot_w)
    iy = _cell_index(ye, plot_h)[::-1]
    cv.img.paste(Image.fromarray(_to_uint8(arr)[iy][:, ix], "RGB"), (left, top))
    cv.draw.rectangle((left - 1, top - 1, left + plot_w, top + plot_h), outline=BLACK, width=1)

    if cross is not None:
        cx, cy = cross
        if x_lo <= cx <= x_hi:
            px = min(_px(cx, x_lo, x_hi, left, plot_w), left + plot_w - 1)
            cv.two_tone_vline(px, top, top + plot_h - 1)
        if y_lo <= cy <= y_hi:
            py = max(top + plot_h - 1 - _px(cy, y_lo, y_hi, 0, plot_h), top)
            cv.two_tone_hline(left, left + plot_w - 1, py)
        cv.draw.rectangle((left - 1, top - 1, left + plot_w, top + plot_h), outline=BLACK, width=1)

    _draw_x_axis(cv, left, plot_w, top + plot_h, x_lo, x_hi, xt, xl, f_tick)
    _draw_y_axis(cv, top, plot_h, left - 1, y_lo, y_hi, yt, yl, f_tick)
    y_axis_label_bottom = top + plot_h + _TICK + 4 + _lh(f_tick)
    if x_label:
        cv.text(left + plot_w / 2, y_axis_label_bottom + 12, x_label, f_lab, ha="c")
    if y_label:
        cv.vtext(_PAD, top + plot_h / 2, y_label, f_lab, ha="l", va="m")
    if foot_lines:
        cv.text_block(_PAD, height - _PAD - _block_height(foot_lines, f_foot), foot_lines, f_foot,
                      fill=FOOTER_INK)
    return _png(cv.img, title=title, dpi=150)


# --------------------------------------------------------------------------------------------
# Reference strip along thickness
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class StripRow:
    """One row of a strip chart.

    Attributes
    ----------
    lo_nm, hi_nm : float
        Thickness range of the row, nm.
    x0, x1 : int
        Pixel columns of the row's strip: thickness ``lo_nm`` at the left edge of ``x0``,
        ``hi_nm`` at the left edge of ``x1`` (exclusive).
    y0, y1 : int
        Pixel rows of the strip, ``y1`` exclusive.
    """

    lo_nm: float
    hi_nm: float
    x0: int
    x1: int
    y0: int
    y1: int


@dataclass(frozen=True)
class StripLayout:
    """Pixel geometry of a strip chart drawn by :func:`strip_png`.

    Attributes
    ----------
    width, height : int
        Image size, px.
    px_per_nm : float
        Horizontal scale, the same in every row.
    rows : tuple of StripRow
        The rows, top to bottom, in increasing thickness.
    """

    width: int
    height: int
    px_per_nm: float
    rows: tuple

    def thickness_at(self, x: int, row: int) -> float:
        """Thickness (nm) at the centre of pixel column ``x`` in row index ``row``."""
        r = self.rows[row]
        return r.lo_nm + (x - r.x0 + 0.5) / self.px_per_nm

    def pixel_of(self, thickness_nm: float):
        """Pixel (x, y) at the vertical middle of the strip whose column holds ``thickness_nm``.

        Returns ``None`` outside the chart's range.
        """
        t = float(thickness_nm)
        for i, r in enumerate(self.rows):
            last = i == len(self.rows) - 1
            if r.lo_nm <= t < r.hi_nm or (last and t == r.hi_nm):
                x = min(r.x0 + int(math.floor((t - r.lo_nm) * self.px_per_nm)), r.x1 - 1)
                return x, (r.y0 + r.y1) // 2
        return None


@dataclass
class _StripPlan:
    """Everything :func:`strip_png` draws, placed."""

    layout: StripLayout
    header: list          # (lines, font, gap) blocks
    major: float
    minor: float | None
    marks: list           # per row: [(x, label, level)]
    cands: list           # per row: [(x, label, level)]
    mark_top: list        # per row: y of level-0 mark label bottom
    cand_top: list        # per row: y of candidate triangle tip
    outside: list         # (kind, thickness, label) not on the chart
    caption_y: int
    note_lines: list
    foot_lines: list
    foot_y: int
    steps_y: int = 0             # top of the chart steps' patches
    steps_per_row: int = 1
    steps_caption: list = ()


def _stagger(items, font, x_min, x_max, gap=10):
    """Assign text levels so centred labels at x never overlap: [(x, label, level)], n_levels."""
    ends: list[float] = []
    out = []
    for x, label in sorted(items, key=lambda it: it[0]):
        w = _tw(font, label)
        a = min(max(x - w / 2, x_min), x_max - w)
        level = next((i for i, e in enumerate(ends) if a >= e + gap), len(ends))
        if level == len(ends):
            ends.append(a + w)
        else:
            ends[level] = a + w
        out.append((x, label, level))
    return out, len(ends)


def _strip_fonts():
    return dict(title=_font(40, bold=True), sub=_font(26), tick=_font(22), mark=_font(22),
                cand=_font(22, bold=True), foot=_font(20), caption=_font(22), step=_font(18))


def _plan_strip(t: np.ndarray, title, subtitle, order_marks, candidates, footer, steps=(),
                steps_caption="") -> _StripPlan:
    f = _strip_fonts()
    t_lo, t_hi = float(t[0]), float(t[-1])
    span = t_hi - t_lo
    n_rows = int(min(3, max(1, math.ceil(span / _STRIP_ROW_NM - 1e-9))))
    row_nm = span if n_rows == 1 else math.ceil(span / n_rows / 50.0 - 1e-9) * 50.0
    usable = _STRIP_WIDTH - 2 * _STRIP_MARGIN
    ppn = usable / row_nm

    major = next((s for s in _ruler_steps() if s * ppn >= 120), None)
    if major is None:
        major = _ruler_steps()[-1]
    minor = None
    for s in (10.0, major / 5, major / 2):
        if s < major and abs(major / s - round(major / s)) < 1e-9 and s * ppn >= 8:
            minor = s
            break

    text_w = _STRIP_WIDTH - 2 * _PAD
    header = [(_wrap(title, f["title"], text_w), f["title"], 8)]
    if subtitle:
        header.append((_wrap(subtitle, f["sub"], text_w), f["sub"], 4))
    y = _PAD
    for i, (lines, font, gap) in enumerate(header):
        y += (12 if i else 0) + _block_height(lines, font, gap)
    y += 26

    lh_mark, lh_cand, lh_tick = _lh(f["mark"]), _lh(f["cand"]), _lh(f["tick"])
    rows, marks_rows, cands_rows, mark_top, cand_top = [], [], [], [], []
    outside = []
    placed_marks, placed_cands = set(), set()
    for i in range(n_rows):
        lo = t_lo + i * row_nm
        hi = t_hi if i == n_rows - 1 else min(t_lo + (i + 1) * row_nm, t_hi)
        x0 = _STRIP_MARGIN
        x1 = x0 + int(round((hi - lo) * ppn))
        last = i == n_rows - 1

        def on_row(v):
            return lo <= v < hi or (last and v == hi)

        def xpix(v):
            return min(x0 + int(math.floor((v - lo) * ppn)), x1 - 1)

        m_items = [(xpix(v), s) for j, (v, s) in enumerate(order_marks) if on_row(v)]
        placed_marks.update(j for j, (v, _) in enumerate(order_marks) if on_row(v))
        c_items = [(xpix(v), s) for j, (v, s) in enumerate(candidates) if on_row(v)]
        placed_cands.update(j for j, (v, _) in enumerate(candidates) if on_row(v))
        m_st, m_levels = _stagger(m_items, f["mark"], _PAD, _STRIP_WIDTH - _PAD)
        c_st, c_levels = _stagger(c_items, f["cand"], _PAD, _STRIP_WIDTH - _PAD)

        band = m_levels * (lh_mark + 6) + (8 if m_levels else 0)
        mark_top.append(y + band - 8)
        y0 = y + band
        y1 = y0 + _STRIP_HEIGHT
        rows.append(StripRow(lo, hi, x0, x1, y0, y1))
        y = y1 + 16 + 6 + lh_tick      # major ticks, labels
        if c_levels:
            cand_top.append(y + 8)
            y += 8 + 18 + 4 + c_levels * (lh_cand + 4)
        else:
            cand_top.append(y)
        y += 30
        marks_rows.append(m_st)
        cands_rows.append(c_st)

    outside += [("mark", v, s) for j, (v, s) in enumerate(order_marks) if j not in placed_marks]
    outside += [("candidate", v, s) for j, (v, s) in enumerate(candidates) if j not in placed_cands]
    caption_y = y - 20
    y = caption_y + _lh(f["caption"]) + 18
    note_lines = []
    if outside:
        parts = ", ".join(f"{s or kind} at {v:g} nm" for kind, v, s in outside)
        note_lines = _wrap(f"Not on this chart ({t_lo:g}-{t_hi:g} nm): {parts}.", f["foot"], text_w)
        y += _block_height(note_lines, f["foot"]) + 10
    steps_y, per_row, cap_lines = 0, 1, []
    if steps:
        cap_lines = _wrap(steps_caption, f["sub"], text_w) if steps_caption else []
        y += _block_height(cap_lines, f["sub"]) + 10 if cap_lines else 0
        steps_y = y
        per_row = max(1, (_STRIP_WIDTH - 2 * _PAD + _STEP_GAP) // (_STEP_W + _STEP_GAP))
        n_step_rows = math.ceil(len(steps) / per_row)
        y += n_step_rows * (_STEP_H + _STEP_GAP) + 16
    foot_lines = _wrap(footer, f["foot"], text_w) if footer else []
    foot_y = y
    y += _block_height(foot_lines, f["foot"]) + _PAD
    layout = StripLayout(_STRIP_WIDTH, int(y), ppn, tuple(rows))
    return _StripPlan(layout, header, major, minor, marks_rows, cands_rows, mark_top, cand_top,
                      outside, caption_y, note_lines, foot_lines, foot_y, steps_y, per_row, cap_lines)


def _ruler_steps():
    return [1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0, 200.0, 500.0, 1000.0, 2000.0, 5000.0, 10000.0]


def _check_steps(steps) -> list:
    """Chart steps as [(thickness_nm, '#rrggbb', (L*, a*, b*))], each checked."""
    out = []
    for i, step in enumerate(steps or ()):
        try:
            t, hex_, lab = step
            t, lab = float(t), tuple(float(v) for v in lab)
        except (TypeError, ValueError):
            raise InputError(f"steps[{i}] must be (thickness_nm, '#rrggbb', (L*, a*, b*)); got {step!r}.") from None
        if len(lab) != 3 or not all(math.isfinite(v) for v in (t, *lab)):
            raise InputError(f"steps[{i}]: the thickness and L*a*b* must be 3 finite numbers.")
        if not (isinstance(hex_, str) and len(hex_) == 7 and hex_[0] == "#"
                and all(c in "0123456789abcdefABCDEF" for c in hex_[1:])):
            raise InputError(f"steps[{i}]: the colour must be '#rrggbb'; got {hex_!r}.")
        out.append((t, hex_.lower(), lab))
    return out


def _check_strip_args(thickness_nm, title, subtitle, order_marks, candidates, footer, n=None):
    t = _float_array("thickness_nm", thickness_nm)
    if t.ndim != 1:
        raise InputError(f"thickness_nm must be a 1-D array, got shape {t.shape}.")
    if t.size < 2:
        raise InputError(f"thickness_nm needs at least 2 values to draw a strip, got {t.size}.")
    if n is not None and t.size != n:
        raise InputError(f"thickness_nm has {t.size} values but rgb has {n} colours; they must match.")
    if not np.all(np.isfinite(t)):
        raise InputError("thickness_nm contains NaN or infinite values; give finite thicknesses in nm.")
    d = np.diff(t)
    if not np.all(d > 0):
        i = int(np.argmax(d <= 0))
        raise InputError(
            f"thickness_nm must be strictly increasing, but thickness_nm[{i}] = {t[i]:g} nm is "
            f"followed by {t[i + 1]:g} nm; sort the thicknesses (and the colours with them).")
    return (t, _text_arg("title", title), _text_arg("subtitle", subtitle),
            _labelled_marks("order_marks", order_marks), _labelled_marks("candidates", candidates),
            _text_arg("footer", footer))


def strip_layout(thickness_nm, *, title, subtitle="", order_marks=(), candidates=(),
                 footer="", steps=(), steps_caption="") -> StripLayout:
    """Pixel geometry of the strip chart :func:`strip_png` draws for the same arguments.

    Parameters are those of :func:`strip_png` without ``rgb``.

    Returns
    -------
    StripLayout
        Image size, scale and the rows' thickness ranges and pixel boxes.
    """
    args = _check_strip_args(thickness_nm, title, subtitle, order_marks, candidates, footer)
    return _plan_strip(*args, _check_steps(steps), _text_arg("steps_caption", steps_caption)).layout


def strip_png(rgb, thickness_nm, *, title, subtitle="", order_marks=(), candidates=(),
              footer="", steps=(), steps_caption="") -> bytes:
    """Draw a reference colour chart along thickness, for printing, as a PNG.

    The image is 2000 px wide (A4 landscape at 190 dpi). A range longer than 400 nm is split
    into two or three rows at a common scale; each row is a 128 px tall strip whose pixel
    columns take the colour at their central thickness (linear interpolation between samples),
    with a thickness ruler under it: labelled major ticks every 50 nm or 100 nm (other round
    steps for very short or long ranges) and minor ticks every 10 nm where they are at least
    8 px apart.

    Parameters
    ----------
    rgb : array_like, shape (n, 3)
        Display sRGB in 0..1 (clipped) at each thickness. No NaN.
    thickness_nm : array_like, shape (n,)
        Strictly increasing thicknesses, nm; n >= 2.
    title : str
        Title line.
    subtitle : str
        Conditions, e.g. stack, illuminant, observer and viewing angle.
    order_marks : iterable of (float, str)
        (thickness_nm, label) drawn as a vertical line through the strip, label above,
        e.g. ``(190.0, "m=1")``.
    candidates : iterable of (float, str)
        (thickness_nm, label) drawn as a triangle under the ruler pointing at the thickness,
        label below it.
    footer : str
        Note printed at the bottom, e.g. that the colours are computed.
    steps : iterable of (float, str, (float, float, float))
        Chart steps (thickness_nm, '#rrggbb', (L*, a*, b*)) printed as patches under the strip,
        each with its thickness, hex and L*a*b* written on it.
    steps_caption : str
        Line above the patches, e.g. the step (thickness per step) and the lamp.

    Marks and candidates outside the chart's range are listed in a line above the footer.

    Returns
    -------
    bytes
        PNG image (RGB, 190 dpi).

    Raises
    ------
    InputError
        Wrong shapes, fewer than 2 samples, NaN colours, thicknesses not finite or not strictly
        increasing, malformed marks or non-text labels.
    """
    arr = _float_array("rgb", rgb)
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise InputError(f"rgb must have shape (n, 3), one colour per thickness, got {arr.shape}.")
    if arr.shape[0] == 0:
        raise InputError("rgb is empty; give at least 2 colours.")
    _require_finite_colours("rgb", arr)
    t, title, subtitle, order_marks, candidates, footer = _check_strip_args(
        thickness_nm, title, subtitle, order_marks, candidates, footer, n=arr.shape[0])
    steps = _check_steps(steps)
    plan = _plan_strip(t, title, subtitle, order_marks, candidates, footer, steps,
                       _text_arg("steps_caption", steps_caption))
    lay, f = plan.layout, _strip_fonts()
    cv = _Canvas(lay.width, lay.height)

    y = _PAD
    for i, (lines, font, gap) in enumerate(plan.header):
        y = cv.text_block(_PAD, y + (12 if i else 0), lines, font, gap=gap) - gap

    for i, row in enumerate(lay.rows):
        n_px = row.x1 - row.x0
        tc = row.lo_nm + (np.arange(n_px) + 0.5) / lay.px_per_nm
        cols = np.stack([np.interp(tc, t, arr[:, c]) for c in range(3)], axis=-1)
        band = np.repeat(_to_uint8(cols)[None, :, :], row.y1 - row.y0, axis=0)
        cv.img.paste(Image.fromarray(band, "RGB"), (row.x0, row.y0))
        cv.draw.rectangle((row.x0 - 1, row.y0 - 1, row.x1, row.y1), outline=BLACK, width=1)

        # Ruler.
        base = row.y1
        k0 = math.ceil(row.lo_nm / plan.major - 1e-9)
        k1 = math.floor(row.hi_nm / plan.major + 1e-9)
        if plan.minor:
            for k in range(math.ceil(row.lo_nm / plan.minor - 1e-9), math.floor(row.hi_nm / plan.minor + 1e-9) + 1):
                x = min(_px(k * plan.minor, row.lo_nm, row.hi_nm, row.x0, n_px), row.x1)
                cv.draw.line((x, base, x, base + 7), fill=BLACK, width=1)
        for k in range(k0, k1 + 1):
            v = k * plan.major
            x = min(_px(v, row.lo_nm, row.hi_nm, row.x0, n_px), row.x1)
            cv.draw.line((x, base, x, base + 16), fill=BLACK, width=2)
            cv.text(x, base + 16 + 6, _tick_labels(np.array([v, v + plan.major]))[0], f["tick"],
                    ha="c", va="t")

        # Order marks: line through the strip, label above (staggered levels).
        # Lines and leaders first, so that no line crosses a label drawn after them.
        def mark_bottom(level):
            return plan.mark_top[i] - level * (_lh(f["mark"]) + 6)

        for x, label, level in plan.marks[i]:
            cv.draw.line((x, mark_bottom(level) + 2, x, row.y0 - 1), fill=(120, 120, 120), width=1)
            cv.two_tone_vline(x, row.y0, row.y1 - 1)
        for x, label, level in plan.marks[i]:
            cv.text(x, mark_bottom(level), label, f["mark"], ha="c", va="b", backing=True)

        # Candidates: a notch at the strip's lower edge and a triangle under the ruler
        # pointing up at the thickness, label below.
        tip = plan.cand_top[i]
        for x, label, level in plan.cands[i]:
            cv.two_tone_vline(x, row.y1 - 12, row.y1 - 1)
            cv.draw.polygon([(x, tip), (x - 10, tip + 18), (x + 10, tip + 18)], fill=BLACK)
        for x, label, level in plan.cands[i]:
            label_top = tip + 18 + 4 + level * (_lh(f["cand"]) + 4)
            cv.text(x, label_top, label, f["cand"], ha="c", va="t", backing=True)
        cv.draw.rectangle((row.x0 - 1, row.y0 - 1, row.x1, row.y1), outline=BLACK, width=1)

    last = lay.rows[-1]
    cv.text(last.x1, plan.caption_y, "Ruler: thickness in nm", f["caption"], ha="r", va="t",
            fill=FOOTER_INK)
    if plan.note_lines:
        cv.text_block(_PAD, plan.caption_y + _lh(f["caption"]) + 18, plan.note_lines, f["foot"])
    if steps:
        _draw_steps(cv, plan, steps, f)
    if plan.foot_lines:
        cv.text_block(_PAD, plan.foot_y, plan.foot_lines, f["foot"], fill=FOOTER_INK)
    return _png(cv.img, title=title, dpi=190)


#: Above this L* a patch's writing is black, below it white (L* = 50 is the middle grey of CIELAB).
_STEP_INK_L = 50.0


def _draw_steps(cv: "_Canvas", plan: _StripPlan, steps, f) -> None:
    """The chart steps as patches, each with its thickness, hex and L*a*b* written on it."""
    if plan.steps_caption:
        top = plan.steps_y - _block_height(list(plan.steps_caption), f["sub"]) - 10
        cv.text_block(_PAD, top, list(plan.steps_caption), f["sub"])
    for k, (t, hex_, (L, a, b)) in enumerate(steps):
        r, c = divmod(k, plan.steps_per_row)
        x = _PAD + c * (_STEP_W + _STEP_GAP)
        y = plan.steps_y + r * (_STEP_H + _STEP_GAP)
        fill = tuple(int(hex_[i:i + 2], 16) for i in (1, 3, 5))
        cv.draw.rectangle((x, y, x + _STEP_W - 1, y + _STEP_H - 1), fill=fill, outline=BLACK, width=1)
        ink = BLACK if L > _STEP_INK_L else (255, 255, 255)
        lines = [f"{t:g} nm", hex_, f"L*{L:.0f} a*{a:.0f} b*{b:.0f}"]
        cv.text_block(x + 8, y + 10, lines, f["step"], fill=ink, gap=8)


# --------------------------------------------------------------------------------------------
# Scalar map with colour bar
# --------------------------------------------------------------------------------------------

@functools.lru_cache(maxsize=None)
def _lut(cmap: str) -> np.ndarray:
    """(256, 3) uint8 lookup table of a colour map from Bokeh's palettes."""
    from bokeh import palettes
    hexes = getattr(palettes, COLORMAPS[cmap])
    return np.array([[int(h[i:i + 2], 16) for i in (1, 3, 5)] for h in hexes], dtype=np.uint8)


def _apply_lut(values: np.ndarray, lo: float, hi: float, lut: np.ndarray) -> np.ndarray:
    """Colours of ``values`` (NaN → grey) on a LUT spanning lo..hi; values outside are clipped."""
    n = lut.shape[0]
    frac = (values - lo) / (hi - lo)
    idx = np.clip(np.floor(np.nan_to_num(frac, nan=0.0) * n), 0, n - 1).astype(int)
    out = lut[idx]
    out[np.isnan(values)] = MISSING
    return out


def colorbar_png(values_2d, *, label, title, cmap="viridis", vmin=None, vmax=None, footer="",
                 origin="lower") -> bytes:
    """Draw a scalar map coloured through a colour map, with a colour bar, as a PNG.

    Cells are square where possible (map area at most 800 x 640 px, nearest-neighbour),
    framed, with column and row index ticks. Missing values (NaN) are drawn light grey with a
    diagonal hatch and a "no value" key appears under the bar.

    Parameters
    ----------
    values_2d : array_like, shape (n_rows, n_cols)
        The values, e.g. thickness in nm per image pixel; NaN marks a missing value.
    label : str
        Quantity and unit shown along the colour bar, e.g. ``"Thickness (nm)"``.
    title : str
        Title line.
    cmap : str
        One of :data:`COLORMAPS` (``"viridis"`` default); the table comes from Bokeh's palettes.
    vmin, vmax : float, optional
        Value range of the colour bar; defaults to the finite values' minimum and maximum.
        Values outside are drawn in the end colours.
    footer : str
        Optional small note under the figure.
    origin : {"lower", "upper"}
        ``"lower"``: row 0 at the bottom (as :func:`map_png`); ``"upper"``: row 0 at the top
        (as a camera image).

    Returns
    -------
    bytes
        PNG image (RGB, 150 dpi).

    Raises
    ------
    InputError
        Not 2-D, empty, infinite values, no finite value and no range given, vmin > vmax,
        unknown colour map or origin, non-text labels.
    """
    vals = _float_array("values_2d", values_2d)
    if vals.ndim != 2:
        raise InputError(f"values_2d must be a 2-D array (n_rows, n_cols), got shape {vals.shape}.")
    n_r, n_c = vals.shape
    if n_r == 0 or n_c == 0:
        raise InputError(f"values_2d is empty (shape {vals.shape}); give at least one value.")
    if np.isinf(vals).any():
        raise InputError("values_2d contains infinite values; use NaN for missing values.")
    label, title, footer = _text_arg("label", label), _text_arg("title", title), _text_arg("footer", footer)
    if not isinstance(cmap, str) or cmap.lower() not in COLORMAPS:
        raise InputError(f"cmap {cmap!r} is not known; choose one of {', '.join(COLORMAPS)}.")
    if origin not in ("lower", "upper"):
        raise InputError(f"origin must be 'lower' (row 0 at the bottom) or 'upper', got {origin!r}.")
    finite = vals[np.isfinite(vals)]
    lo = None if vmin is None else _scalar("vmin", vmin)
    hi = None if vmax is None else _scalar("vmax", vmax)
    if finite.size == 0 and (lo is None or hi is None):
        raise InputError("values_2d has no finite value; give vmin and vmax to draw an empty map.")
    lo = float(finite.min()) if lo is None else lo
    hi = float(finite.max()) if hi is None else hi
    if lo > hi:
        raise InputError(f"vmin = {lo:g} is above vmax = {hi:g}; swap them.")
    if lo == hi:
        pad = 0.05 * max(abs(lo), 1.0)
        lo, hi = lo - pad, hi + pad
    lut = _lut(cmap.lower())

    f_title, f_lab, f_tick, f_foot = _font(30, bold=True), _font(20), _font(18), _font(15)
    cell = min(800.0 / n_c, 640.0 / n_r)
    plot_w = int(min(800, max(320, round(n_c * cell))))
    plot_h = int(min(640, max(80, round(n_r * cell))))
    bar_h = max(plot_h, 300)
    bar_w = 32

    xe = np.arange(n_c + 1) - 0.5
    ye = np.arange(n_r + 1) - 0.5
    xt, xl = _index_ticks(n_c, plot_w, f_tick, horizontal=True)
    yt, yl = _index_ticks(n_r, plot_h, f_tick, horizontal=False)
    bt, bl = _fit_ticks(lo, hi, bar_h, f_tick, horizontal=False)
    has_missing = bool(np.isnan(vals).any())

    left = _PAD + _lh(f_lab) + 12 + max(_tw(f_tick, s) for s in yl) + 5 + _TICK + 2
    bar_x = left + plot_w + 40
    right_part = bar_w + _TICK + 5 + max(_tw(f_tick, s) for s in bl) + 14 + _lh(f_lab)
    if has_missing:
        right_part = max(right_part, 22 + 8 + _tw(f_tick, "no value"))
    width = bar_x + right_part + _PAD
    text_w = width - 2 * _PAD
    title_lines = _wrap(title, f_title, text_w)
    foot_lines = _wrap(footer, f_foot, text_w) if footer else []
    top = _PAD + _block_height(title_lines, f_title, 6) + 22
    area_h = max(bar_h + (34 if has_missing else 0), plot_h + _TICK + 4 + _lh(f_tick) + 12 + _lh(f_lab))
    height = top + area_h + (16 + _block_height(foot_lines, f_foot) if foot_lines else 0) + _PAD + 8

    cv = _Canvas(width, height)
    cv.text_block(_PAD, _PAD, title_lines, f_title, gap=6)

    ix = _cell_index(xe.astype(float), plot_w)
    iy = _cell_index(ye.astype(float), plot_h)
    if origin == "lower":
        iy = iy[::-1]
    sub = vals[iy][:, ix]
    pix = _apply_lut(sub, lo, hi, lut)
    if has_missing:
        yy, xx = np.mgrid[0:plot_h, 0:plot_w]
        hatch = np.isnan(sub) & (((xx + yy) % 10) == 0)
        pix[hatch] = MISSING_HATCH
    cv.img.paste(Image.fromarray(pix.astype(np.uint8), "RGB"), (left, top))
    cv.draw.rectangle((left - 1, top - 1, left + plot_w, top + plot_h), outline=BLACK, width=1)
    _draw_x_axis(cv, left, plot_w, top + plot_h, -0.5, n_c - 0.5, xt, xl, f_tick)
    if origin == "lower":
        _draw_y_axis(cv, top, plot_h, left - 1, -0.5, n_r - 0.5, yt, yl, f_tick)
    else:
        _draw_y_axis(cv, top, plot_h, left - 1, -0.5, n_r - 0.5, (n_r - 1) - yt, yl, f_tick)
    cv.text(left + plot_w / 2, top + plot_h + _TICK + 4 + _lh(f_tick) + 12, "column", f_lab, ha="c")
    cv.vtext(_PAD, top + plot_h / 2, "row", f_lab, ha="l", va="m")

    # Colour bar: top = hi.
    bar_vals = hi - (np.arange(bar_h) + 0.5) / bar_h * (hi - lo)
    bar = np.repeat(_apply_lut(bar_vals, lo, hi, lut)[:, None, :], bar_w, axis=1)
    cv.img.paste(Image.fromarray(bar.astype(np.uint8), "RGB"), (bar_x, top))
    cv.draw.rectangle((bar_x - 1, top - 1, bar_x + bar_w, top + bar_h), outline=BLACK, width=1)
    _draw_y_axis(cv, top, bar_h, bar_x + bar_w, lo, hi, bt, bl, f_tick, side="right")
    label_x = bar_x + bar_w + _TICK + 5 + max(_tw(f_tick, s) for s in bl) + 14
    cv.vtext(label_x, top + bar_h / 2, label, f_lab, ha="l", va="m")
    if has_missing:
        ky = top + bar_h + 12
        cv.draw.rectangle((bar_x, ky, bar_x + 22, ky + 18), fill=MISSING, outline=BLACK)
        cv.text(bar_x + 30, ky + 9, "no value", f_tick, va="m")
    if foot_lines:
        cv.text_block(_PAD, height - _PAD - _block_height(foot_lines, f_foot), foot_lines, f_foot,
                      fill=FOOTER_INK)
    return _png(cv.img, title=title, dpi=150)


def _scalar(name: str, value) -> float:
    """A finite number, or InputError."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number, got {value!r}.") from None
    if not math.isfinite(v):
        raise InputError(f"{name} must be finite, got {v}.")
    return v


def _index_ticks(n: int, length_px: int, font, horizontal: bool):
    """Whole-number index ticks for ``n`` cells drawn over ``length_px``."""
    if n == 1:
        return np.array([0.0]), ["0"]
    ticks, _ = _fit_ticks(0.0, float(n - 1), length_px * (n - 1) / n, font, horizontal)
    if ticks.size >= 2 and ticks[1] - ticks[0] < 1:
        ticks = np.arange(0.0, n)
    return ticks, [str(int(round(v))) for v in ticks]
