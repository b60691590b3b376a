"""Camera calibration: from a camera's linear RGB to CIE XYZ, and the lamp's fall-off across the field.

A photo's code values are not display sRGB: an inspection camera has its own primaries, a dark
level, an exposure, and the lamp and optics darken the field toward its corners. This module fits
those once per camera + lamp + optics and applies them to later photos.

Public API
----------
``flat_field(image) -> FlatField``
    From a photo of a uniform bare substrate: the field's fall-off per channel, smoothed (a 2-D
    Legendre polynomial of total degree :data:`FLAT_POLY_DEGREE` fitted to block means) and
    normalized to mean 1. ``FlatField.apply(linear_rgb, dark=None, box=None)`` subtracts ``dark`` and
    divides by it (the whole photo, or its part ``box``); ``FlatField.gain(dark=None, box=None)``
    gives the (h, w, 3) divisor; ``to_dict()`` /
    ``FlatField.from_dict()`` store it as a coarse grid of :data:`FLAT_GRID_NODES` x
    :data:`FLAT_GRID_NODES` nodes, bilinearly interpolated on apply. ``width``, ``height``.
``calibrate_from_reference(image, boxes, thickness_nm, stack, layer=0, *, illuminant="D65",
observer="2", angle_deg=0.0, model="matrix", flat_field=None, polarization="unpolarized", na=0.0,
window_nm=(0, 1000), dark=None, camera="", lamp="", objective="", objective_na=None, date="")
-> CameraCalibration``
    Boxes on a photo of a sample of known thicknesses (a step wafer, monitor wafers); each box's
    target is the stack's computed XYZ at its thickness (:func:`physics.appearance.color_map`).
``calibrate_from_target(image, boxes, reference_lab, *, illuminant="D65", observer="2",
model="matrix", flat_field=None, dark=None, ...) -> CameraCalibration``
    Boxes on the patches of a colour reference target whose CIELAB under the illuminant is known
    (``reference_lab`` (N, 3)); :func:`read_target` reads a target file, :func:`builtin_target`
    gives colour-science's averaged ColorChecker data.
``CameraCalibration``
    Frozen dataclass: ``model`` ("matrix" or "root-polynomial"), ``matrix`` (3 x terms, from the
    expanded dark-subtracted, flat-fielded camera RGB to XYZ with Y = 1 for a perfect reflector),
    ``dark`` (3,), ``illuminant``, ``observer``, ``width``, ``height`` (``image_size``), ``boxes``,
    ``thickness_nm`` (reference only), ``reference_lab`` (N, 3), ``residual_delta_e`` (ΔE00 per box),
    ``residual_nm`` (reference only: thickness each box's corrected colour maps to minus its known
    thickness), ``holdout_delta_e`` (each box predicted from the others), ``rms_delta_e``,
    ``colour_error_de``, ``condition_number``, ``kind`` ("reference"/"target"),
    ``flat_field`` (the FlatField it was made with, or None), metadata ``camera``, ``lamp``,
    ``objective``, ``objective_na`` (float or None; also read as ``na``), ``date`` (strings), ``message``.
    ``xyz_from_linear(rgb, flat_field=None, box=None)`` applies it; ``lab_from_linear`` gives CIELAB;
    ``check_photo(photo)`` refuses a photo of another size; ``with_metadata(**fields)`` sets camera,
    lamp, objective, objective_na, date; ``to_dict()`` / ``CameraCalibration.from_dict()``
    round-trip through plain JSON types (the flat field inside, about 20 kB in all).
``read_target(source, *, illuminant="D65", observer="2") -> ColourTarget`` and
``builtin_target(name="BabelColor Average", *, illuminant="D65", observer="2") -> ColourTarget``
    ``ColourTarget.lab_of(names)`` gives the patches' CIELAB in the order named, refusing a
    missing patch with a sentence.
``pixel_lab(photo, roi, calibration, flat_field, denoise, illuminant, observer, progress=None)``
    The per-pixel CIELAB :func:`physics.inverse.thickness_map` matches (used by it; band by band, with
    progress between bands). ``check_flat(flat, photo)`` refuses a flat field of another photo size.
``DENOISE_FILTERS``
    The edge-preserving filters ``thickness_map(denoise=...)`` offers: "median" (5 x 5), "median3",
    "median7", each scipy.ndimage.median_filter per channel of the linear image.

:func:`physics.inverse.thickness_map` takes ``calibration=``, ``flat_field=`` and ``denoise=``; its
result's ``uncertainty_nm`` uses :attr:`CameraCalibration.colour_error_de` (formula in
``physics.inverse._uncertainty_nm``).

The model
---------
A pixel's camera linear RGB ``p`` (``Photo.linear_rgb()``) at image position x is taken to be
``p = v(x) * A @ XYZ + dark``: a fall-off ``v`` per channel, a linear camera response ``A`` and a
dark offset. The flat-field photo gives ``F(x) = v(x) * A @ XYZ_bare + dark``, stored as
``F = f(x) * level`` with ``f`` of mean 1. Dark-subtracted, flat-fielded values are
``q = (p - dark) * (level - dark) / (f(x) * level - dark)``; then
``XYZ = matrix @ expansion(q)``. The expansion is ``q`` itself for ``model="matrix"``
(colour-science "Cheung 2004", 3 terms) and the root-polynomial of degree 2 for
``model="root-polynomial"`` (colour-science "Finlayson 2015": R, G, B, √RG, √GB, √RB, which keeps
the correction independent of exposure). The dark offset is fitted explicitly (the constant of the
affine model; with a flat field it also enters the divisor): for a trial dark the matrix is the
least-squares fit of colour-science's ``matrix_colour_correction`` in XYZ, and the dark is chosen by
``scipy.optimize.least_squares`` to minimize the boxes' CIELAB residuals (variable projection).
Give ``dark=`` (3 linear values, e.g. from a lens-cap frame) to fix it instead.

A calibration needs boxes that constrain it: at least :data:`MIN_BOXES` per model (the model's
terms, one for the dark offset, one to spare so a residual means something), and colours that are
not (nearly) collinear: the design matrix ``[expansion(q), 1]`` with unit-norm columns must have
full rank and a condition number at most :data:`MAX_CONDITION` (per model).

References
----------
V. Cheung, S. Westland, C. Li, J. Hardeberg, D. Connah, "Characterization of trichromatic color cameras
by using a new multispectral imaging technique", J. Opt. Soc. Am. A 21, 1125 (2004) (polynomial colour
correction); G. D. Finlayson, M. Mackiewicz, A. Hurlbert, "Color correction using root-polynomial regression", IEEE Trans. Image
Process. 24, 1460 (2015); both as implemented in colour-science (``colour.characterisation``,
BSD-3-Clause). CIE 015:2018 (CIELAB); CIE 142-2001 (CIEDE2000). Flat-field correction
(dark-subtracted division by a uniform-scene frame) is common practice in imaging.
"""

from __future__ import annotations

import csv
import io
import math
import warnings
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import ndimage, optimize

from .errors import InputError, require_finite

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    import colour
    from colour.characterisation import (apply_matrix_colour_correction, matrix_colour_correction,
                                         polynomial_expansion_Finlayson2015)

__all__ = ["CameraCalibration", "FlatField", "ColourTarget", "calibrate_from_reference", "calibrate_from_target",
           "flat_field", "read_target", "builtin_target", "pixel_lab", "check_flat", "MODELS",
           "MIN_BOXES",
           "DENOISE_FILTERS"]

#: Calibration models: name -> (colour-science method, its keyword arguments, expansion terms).
MODELS = {"matrix": ("Cheung 2004", {"terms": 3}, 3),
          "root-polynomial": ("Finlayson 2015", {"degree": 2, "root_polynomial_expansion": True}, 6)}
#: Fewest boxes per model: its terms, one for the dark offset, one to spare (a residual that can be non-zero).
MIN_BOXES = {name: terms + 2 for name, (_, _, terms) in MODELS.items()}
#: Largest condition number of the design matrix [expansion(q), 1] (unit-norm columns) accepted per model:
#: beyond it the boxes' colours are so nearly collinear that the fit amplifies their noise too much (our own
#: choice: five well spread oxide steps give 10-60 for the matrix). The root-polynomial's terms are correlated
#: by construction (√RG lies near (R+G)/2 for colours near grey), so the same boxes give it about ten times
#: more: eight oxide steps 0-470 nm give about 900, a 24-patch colour chart about 120.
MAX_CONDITION = {"matrix": 300.0, "root-polynomial": 3000.0}
#: Relative singular value below which a design direction counts as missing (rank deficiency).
RANK_RTOL = 1e-6
#: Allowed range of a fitted dark offset (linear light): a little below zero (noise around a black
#: level), at most this fraction of the darkest box's signal.
DARK_MIN = -0.02
DARK_MAX_FRACTION = 0.9
#: Most boxes in one calibration (each box is a patch a person drew or a file row).
MAX_BOXES = 500
#: Longest metadata text kept (camera, lamp, objective, date), characters.
MAX_META_CHARS = 200
#: Smoothing of a flat field: total degree of the 2-D Legendre polynomial fitted to block means
#: (degree 4 follows a lens's cos^4-like fall-off within 1 % and cannot follow dust or a pattern).
FLAT_POLY_DEGREE = 4
#: Blocks along the photo's larger side whose means the flat-field polynomial is fitted to.
FLAT_BLOCKS = 48
#: Grid nodes per side of a stored flat field (bilinear interpolation between them on apply: the
#: degree-4 surface deviates from its bilinear interpolant by under 0.1 % between nodes).
FLAT_GRID_NODES = 33
#: A flat-field block may have at most this fraction of clipped pixels.
FLAT_MAX_CLIPPED_FRACTION = 0.01
#: Darkest flat-field block mean accepted (linear light): below it the division amplifies noise.
FLAT_MIN_LINEAR = 0.02
#: A block whose mean departs from the smooth surface by more than this fraction shows structure
#: (a pattern, a film edge, dirt); a flat-field photo may have at most FLAT_MAX_STRUCTURE_FRACTION such.
FLAT_STRUCTURE_DEVIATION = 0.08
FLAT_MAX_STRUCTURE_FRACTION = 0.05
#: Smallest flat-field photo side, pixels (enough blocks for the fit).
FLAT_MIN_SIDE = 16
#: Largest stored flat-field grid read back (nodes per side).
FLAT_MAX_NODES = 257
#: Edge-preserving filters offered on the linear image before matching: name -> (scipy function, size px).
#: A median keeps a step edge where it is (it moves no edge that spans the window) and removes
#: single-pixel noise; scipy.ndimage.median_filter, per channel. Its cost grows with the window: measured on a
#: shared 2-core machine, about 3-4 s per megapixel for 5 x 5 and 1 s for 3 x 3 (a 12 MP photo: 40-50 s and
#: 10-15 s), far more than the rest of a map.
DENOISE_FILTERS = {"median": 5, "median3": 3, "median7": 7}
#: Pixels per chunk when a calibration is applied to a photo (working arrays stay some tens of MB).
APPLY_CHUNK_PIXELS = 1 << 20
#: Largest target file read, bytes; most patches.
MAX_TARGET_BYTES = 1_000_000
MAX_TARGET_PATCHES = 1000
#: Format name and version written by to_dict.
CALIBRATION_FORMAT = "fringegauge camera calibration"
FLAT_FORMAT = "fringegauge flat field"
FORMAT_VERSION = 1


# ---------------------------------------------------------------------- photos
def _photo(image):
    from .imageio import Photo, load_image
    return image if isinstance(image, Photo) else load_image(image)


def _clipped(photo, y0=0, y1=None, x0=0, x1=None) -> np.ndarray:
    """(h, w) bool: any channel at the largest code value (clipped, not a true colour)."""
    return (photo.rgb[y0:y1, x0:x1] == photo.max_code).any(axis=2)


def _check_box(photo, box, what="box"):
    from .imageio import _check_box as check
    try:
        return check(photo, box)
    except InputError as exc:
        raise InputError(f"The {what}: {exc}") from None


def check_flat(flat, photo) -> None:
    """InputError unless ``flat`` is a FlatField made on a photo of ``photo``'s size."""
    if not isinstance(flat, FlatField):
        raise InputError(f"flat_field must be a FlatField (from physics.camera.flat_field); got {type(flat).__name__}.")
    _check_size(flat.width, flat.height, photo, "flat field")


def _check_size(width, height, photo, what):
    if (photo.width, photo.height) != (int(width), int(height)):
        raise InputError(f"The {what} was made on a {width} x {height} photo but this photo is {photo.width} x "
                         f"{photo.height} pixels: use photos of the same camera, resolution and crop, or make the "
                         f"{what} again on a photo of this size.")


# ---------------------------------------------------------------------- flat field
def _legendre_design(u, v, degree):
    """(n, terms) Legendre products P_i(u) P_j(v), i + j <= degree, u and v in [-1, 1]."""
    pu = np.polynomial.legendre.legvander(u, degree)
    pv = np.polynomial.legendre.legvander(v, degree)
    cols = [pu[:, i] * pv[:, j] for i in range(degree + 1) for j in range(degree + 1 - i)]
    return np.stack(cols, axis=1)


def _interp_weights(start, stop, size, nodes):
    """(i0, w1): pixel centres start..stop-1 of a side of ``size`` pixels lie between grid nodes i0 and i0 + 1
    (``nodes`` nodes spread evenly over pixel centres 0..size-1) with weight w1 on i0 + 1 (bilinear)."""
    pos = np.arange(start, stop, dtype=np.float64) * (nodes - 1) / max(size - 1, 1)
    i0 = np.clip(np.floor(pos).astype(int), 0, nodes - 2)
    return i0, (pos - i0).astype(np.float32)


def _lerp(values, i0, w1, axis):
    """Linear interpolation of ``values`` along ``axis`` at (i0, w1) from :func:`_interp_weights`."""
    a, b = np.take(values, i0, axis=axis), np.take(values, i0 + 1, axis=axis)
    shape = [1] * values.ndim
    shape[axis] = -1
    w = w1.reshape(shape)
    return a + (b - a) * w


@dataclass(frozen=True, eq=False)
class FlatField:
    """The field's fall-off per channel from a photo of a uniform bare substrate.

    Attributes
    ----------
    width, height : int
        Size of the photo it was made on (pixels); it applies to photos of this size only.
    grid : (FLAT_GRID_NODES, FLAT_GRID_NODES, 3) float
        The smoothed relative level f (mean 1 over the image) at grid nodes spread evenly over the
        pixel centres (rows top to bottom, columns left to right), per channel R, G, B.
    level : (3,) float
        Mean linear-light level of the flat-field photo per channel (so F = f * level).
    degree : int
        Total degree of the fitted polynomial.
    """

    width: int
    height: int
    grid: np.ndarray
    level: np.ndarray
    degree: int = FLAT_POLY_DEGREE

    def _divisor_columns(self, dark, box):
        """(rows (i0, w1), (nodes, w, 3) float32 node rows interpolated to the box's columns, box): the divisor
        (f * level - dark) / (level - dark) is these node rows interpolated to the box's rows (bilinear
        interpolation is linear, so the nodes are scaled first)."""
        x0, y0, x1, y1 = box if box is not None else (0, 0, self.width, self.height)
        gh, gw = self.grid.shape[:2]
        d = np.zeros(3) if dark is None else np.asarray(dark, dtype=float)
        nodes = ((self.grid * self.level - d) / (self.level - d)).astype(np.float32)     # (gh, gw, 3)
        cols = _lerp(nodes, *_interp_weights(x0, x1, self.width, gw), axis=1)           # (gh, w, 3)
        return _interp_weights(y0, y1, self.height, gh), cols, (x0, y0, x1, y1)

    def gain(self, dark=None, box=None) -> np.ndarray:
        """(h, w, 3) float32 divisor (f * level - dark) / (level - dark) over ``box`` (x0, y0, x1, y1;
        default the whole photo), with ``dark`` (3,) linear (default 0)."""
        (i0, w1), cols, _ = self._divisor_columns(dark, box)
        return _lerp(cols, i0, w1, axis=0)

    def apply(self, linear_rgb, dark=None, box=None) -> np.ndarray:
        """Dark-subtracted, flat-fielded values (linear_rgb - dark) / gain(dark), float32 (h, w, 3).

        ``linear_rgb`` is the whole photo (H, W, 3) of this flat field's size, or the part ``box`` of it.

        Raises
        ------
        InputError
            When the photo's size differs from the flat field's.
        """
        rgb = np.asarray(linear_rgb)
        x0, y0, x1, y1 = box if box is not None else (0, 0, self.width, self.height)
        if rgb.ndim != 3 or rgb.shape[2] != 3:
            raise InputError(f"A flat field applies to an (height, width, 3) image; got shape {rgb.shape}.")
        if box is None and rgb.shape[:2] != (self.height, self.width):
            raise InputError(f"The flat field was made on a {self.width} x {self.height} photo but this photo is "
                             f"{rgb.shape[1]} x {rgb.shape[0]} pixels: take the flat field with the same camera, "
                             "resolution and crop, or leave it out.")
        if box is not None and rgb.shape[:2] != (y1 - y0, x1 - x0):
            raise InputError(f"The image part is {rgb.shape[1]} x {rgb.shape[0]} pixels but the box is "
                             f"{x1 - x0} x {y1 - y0}.")
        d = np.zeros(3, dtype=np.float32) if dark is None else np.asarray(dark, dtype=np.float32)
        (i0, w1), cols, _ = self._divisor_columns(dark, (x0, y0, x1, y1))
        out = np.empty(rgb.shape, dtype=np.float32)
        rows = max(1, APPLY_CHUNK_PIXELS // 8 // max(rgb.shape[1], 1))      # row bands that stay in cache
        for a in range(0, rgb.shape[0], rows):
            g = _lerp(cols, i0[a:a + rows], w1[a:a + rows], axis=0)
            np.divide(rgb[a:a + rows] - d, g, out=out[a:a + rows])
        return out

    def to_dict(self) -> dict:
        """Plain JSON types: the coarse grid (about 33 x 33 x 3 numbers), the level and the size."""
        return {"format": FLAT_FORMAT, "version": FORMAT_VERSION, "width": int(self.width),
                "height": int(self.height), "degree": int(self.degree),
                "level": [float(v) for v in self.level],
                "grid": np.round(self.grid, 6).tolist()}

    @classmethod
    def from_dict(cls, data) -> FlatField:
        """A flat field from :meth:`to_dict` output, every field checked (InputError otherwise)."""
        d = _mapping(data, "flat field")
        if d.get("format") != FLAT_FORMAT:
            raise InputError(f"This is not a saved flat field (format {d.get('format')!r}, expected {FLAT_FORMAT!r}).")
        _version(d, "flat field")
        width, height = _int_field(d, "width", FLAT_MIN_SIDE, 1_000_000), _int_field(d, "height", FLAT_MIN_SIDE,
                                                                                     1_000_000)
        degree = _int_field(d, "degree", 0, 12)
        level = _float_array(d, "level", (3,), minimum=1e-6, maximum=1e6)
        grid = d.get("grid")
        if not isinstance(grid, list) or not 2 <= len(grid) <= FLAT_MAX_NODES:
            raise InputError(f"The saved flat field's grid must be a list of 2-{FLAT_MAX_NODES} rows; save it again.")
        if not all(isinstance(r, list) and 2 <= len(r) <= FLAT_MAX_NODES for r in grid):
            raise InputError("The saved flat field's grid rows must be lists of nodes; save it again.")
        g = _float_array(d, "grid", None, minimum=1e-3, maximum=1e3)
        if g.ndim != 3 or g.shape[2] != 3:
            raise InputError("The saved flat field's grid must be rows of nodes of 3 numbers (R, G, B); save it again.")
        return cls(width, height, g, level, degree)


def flat_field(image, *, degree: int = FLAT_POLY_DEGREE) -> FlatField:
    """The field's fall-off from a photo of a uniform bare substrate, per channel, smoothed.

    The photo is cut into :data:`FLAT_BLOCKS` blocks along its larger side; the block means of each
    channel's linear light are fitted by least squares with a 2-D Legendre polynomial of total degree
    ``degree`` (a smooth surface that follows a lamp's and a lens's fall-off and not dust or noise),
    evaluated at :data:`FLAT_GRID_NODES` x :data:`FLAT_GRID_NODES` nodes and normalized to mean 1.

    Parameters
    ----------
    image : array (H, W, 3), bytes, path or ``physics.imageio.Photo``
        A photo of bare substrate (or any uniform surface) filling the field, taken with the camera,
        lamp, optics and exposure of the photos it will correct.
    degree : int
        Total degree of the smoothing polynomial, 1-8.

    Returns
    -------
    FlatField

    Raises
    ------
    InputError
        When the photo is smaller than :data:`FLAT_MIN_SIDE` pixels a side, has clipped or too dark
        areas, or shows structure (not a uniform surface).

    References
    ----------
    Flat-field correction by a uniform-scene frame: common practice in imaging.
    """
    photo = _photo(image)
    if not isinstance(degree, (int, np.integer)) or not 1 <= degree <= 8:
        raise InputError(f"The flat-field smoothing degree must be a whole number 1-8; got {degree!r}.")
    H, W = photo.height, photo.width
    if min(H, W) < FLAT_MIN_SIDE:
        raise InputError(f"A flat-field photo must be at least {FLAT_MIN_SIDE} x {FLAT_MIN_SIDE} pixels; this one is "
                         f"{W} x {H}. Use a full-size photo of the bare substrate.")
    b = max(1, int(math.ceil(max(H, W) / FLAT_BLOCKS)))
    nby, nbx = H // b, W // b
    deg = int(min(degree, nby - 1, nbx - 1))
    lin = photo.linear_rgb()
    crop = lin[:nby * b, :nbx * b].reshape(nby, b, nbx, b, 3)
    means = crop.mean(axis=(1, 3), dtype=np.float64)                     # (nby, nbx, 3)
    clip = _clipped(photo, 0, nby * b, 0, nbx * b).reshape(nby, b, nbx, b).mean(axis=(1, 3))
    where = lambda mask: _where_text(mask, b)                            # noqa: E731
    hot = clip > FLAT_MAX_CLIPPED_FRACTION
    if hot.any():
        raise InputError(f"The flat-field photo is overexposed in {int(hot.sum())} of {hot.size} areas "
                         f"({where(hot)}): take it again with less exposure so no pixel is clipped.")
    dark = means.min(axis=2) < FLAT_MIN_LINEAR
    if dark.any():
        raise InputError(f"The flat-field photo is too dark in {int(dark.sum())} of {dark.size} areas ({where(dark)}; "
                         f"linear level below {FLAT_MIN_LINEAR:g}): light the whole field evenly or expose longer, "
                         "and photograph only the bare substrate.")
    cy = ((np.arange(nby) + 0.5) * b - 0.5) / max(H - 1, 1) * 2 - 1
    cx = ((np.arange(nbx) + 0.5) * b - 0.5) / max(W - 1, 1) * 2 - 1
    vv, uu = np.meshgrid(cy, cx, indexing="ij")
    X = _legendre_design(uu.ravel(), vv.ravel(), deg)
    coef, *_ = np.linalg.lstsq(X, means.reshape(-1, 3), rcond=None)
    fitted = (X @ coef).reshape(nby, nbx, 3)
    deviation = np.abs(means / np.maximum(fitted, 1e-12) - 1.0).max(axis=2)
    structured = deviation > FLAT_STRUCTURE_DEVIATION
    if structured.mean() > FLAT_MAX_STRUCTURE_FRACTION:
        raise InputError(f"The flat-field photo is not uniform: {structured.mean():.0%} of its areas "
                         f"({where(structured)}) differ by more than {FLAT_STRUCTURE_DEVIATION:.0%} from a smooth "
                         "fall-off. Photograph a clean, "
                         "bare, unpatterned part of the substrate (or a uniform card) filling the field.")
    n = FLAT_GRID_NODES
    gv, gu = np.meshgrid(np.linspace(-1, 1, n), np.linspace(-1, 1, n), indexing="ij")
    grid = (_legendre_design(gu.ravel(), gv.ravel(), deg) @ coef).reshape(n, n, 3)
    if np.any(grid <= 0):
        raise InputError("The flat-field photo's fall-off could not be fitted (it reaches zero); photograph a "
                         "uniformly lit bare substrate.")
    level = means.reshape(-1, 3).mean(axis=0)
    return FlatField(W, H, grid / level, level, deg)


def _where_text(mask, block_px):
    ys, xs = np.nonzero(mask)
    k = len(ys) // 2
    return f"for example around x {int((xs[k] + 0.5) * block_px)}, y {int((ys[k] + 0.5) * block_px)}"


# ---------------------------------------------------------------------- calibration
@dataclass(frozen=True, eq=False)
class CameraCalibration:
    """A camera + lamp + optics calibration from linear RGB to CIE XYZ (see the module docstring).

    Attributes
    ----------
    model : "matrix" or "root-polynomial"
    matrix : (3, terms) float
        From the expanded dark-subtracted, flat-fielded camera RGB to XYZ (Y = 1 for a perfect reflector).
    dark : (3,) float, the dark offset in linear camera RGB.
    illuminant, observer : str, the lamp and observer of the target colours (and of every later map).
    width, height : int, size of the photo it was made on; ``image_size`` is (width, height).
    boxes : tuple of (x0, y0, x1, y1)
    reference_lab : (N, 3) float, each box's target CIELAB.
    residual_delta_e : (N,) float, ΔE00 between each box's corrected colour and its target.
    thickness_nm : (N,) float, known thicknesses (reference sample; empty for a target).
    residual_nm : (N,) float, thickness each box's corrected colour maps to (in its known order) minus the
        known thickness (reference sample; empty for a target).
    condition_number : float, of the design matrix (see :data:`MAX_CONDITION`).
    holdout_delta_e : (N,) float, ΔE00 of each box predicted by the matrix fitted to the other boxes (the dark
        offset kept): how well the calibration predicts colours between its boxes.
    kind : "reference" or "target"
    flat_field : FlatField or None, the flat field the box colours were corrected with; a map with this
        calibration uses it unless another is given.
    camera, lamp, objective, date : str;  objective_na : float or None
    message : str, a sentence on the fit's quality.
    """

    model: str
    matrix: np.ndarray
    dark: np.ndarray
    illuminant: str
    observer: str
    width: int
    height: int
    boxes: tuple
    reference_lab: np.ndarray
    residual_delta_e: np.ndarray
    thickness_nm: np.ndarray = field(default_factory=lambda: np.zeros(0))
    residual_nm: np.ndarray = field(default_factory=lambda: np.zeros(0))
    condition_number: float = float("nan")
    holdout_delta_e: np.ndarray = field(default_factory=lambda: np.zeros(0))
    kind: str = "reference"
    flat_field: FlatField | None = None
    camera: str = ""
    lamp: str = ""
    objective: str = ""
    objective_na: float | None = None
    date: str = ""
    message: str = ""

    @property
    def image_size(self) -> tuple:
        return int(self.width), int(self.height)

    @property
    def na(self) -> float | None:
        """The objective's numerical aperture as recorded (``objective_na``; not a viewing cone of the map)."""
        return self.objective_na

    @property
    def rms_delta_e(self) -> float:
        """Root mean square of the boxes' ΔE00."""
        r = np.asarray(self.residual_delta_e, dtype=float)
        return float(np.sqrt(np.mean(r ** 2))) if r.size else 0.0

    @property
    def colour_error_de(self) -> float:
        """The calibration's own colour error (ΔE00): the larger of the boxes' RMS ΔE00 and the RMS of their
        hold-out ΔE00 (a fit with few boxes matches its own boxes better than colours between them)."""
        h = np.asarray(self.holdout_delta_e, dtype=float)
        return max(self.rms_delta_e, float(np.sqrt(np.mean(h ** 2))) if h.size else 0.0)

    def with_metadata(self, **fields) -> CameraCalibration:
        """A copy with camera, lamp, objective, objective_na or date set (checked)."""
        bad = set(fields) - {"camera", "lamp", "objective", "objective_na", "date"}
        if bad:
            raise InputError(f"Calibration metadata are camera, lamp, objective, objective_na and date; not "
                             f"{', '.join(sorted(bad))}.")
        return replace(self, **_metadata(**{k: getattr(self, k) for k in ("camera", "lamp", "objective",
                                                                            "objective_na", "date")} | fields))

    def xyz_from_linear(self, rgb, flat_field=None, box=None) -> np.ndarray:
        """CIE XYZ (..., 3) of camera linear RGB (..., 3): dark offset subtracted, divided by ``flat_field``
        when given (``rgb`` is then the (H, W, 3) photo, or its part ``box``), the fitted matrix applied."""
        rgb = np.asarray(rgb, dtype=np.float64)
        q = flat_field.apply(rgb, self.dark, box) if flat_field is not None else rgb - self.dark
        return _apply(q, self.matrix, self.model)

    def lab_from_linear(self, rgb, flat_field=None, box=None) -> np.ndarray:
        """CIELAB relative to the calibration's illuminant of camera linear RGB (see :meth:`xyz_from_linear`)."""
        from .color import xyz_to_lab
        return xyz_to_lab(_positive(self.xyz_from_linear(rgb, flat_field, box)), self.illuminant, self.observer)

    def check_photo(self, photo) -> None:
        """InputError when ``photo`` is not of the size this calibration was made on."""
        _check_size(self.width, self.height, photo, "camera calibration")

    def to_dict(self) -> dict:
        """Plain JSON types (lists, floats, strings, None), read back by :meth:`from_dict`."""
        return {"format": CALIBRATION_FORMAT, "version": FORMAT_VERSION, "kind": self.kind, "model": self.model,
                "matrix": np.asarray(self.matrix, dtype=float).tolist(),
                "dark": [float(v) for v in self.dark], "illuminant": self.illuminant, "observer": self.observer,
                "width": int(self.width), "height": int(self.height),
                "boxes": [[int(v) for v in b] for b in self.boxes],
                "reference_lab": np.asarray(self.reference_lab, dtype=float).tolist(),
                "residual_delta_e": [float(v) for v in self.residual_delta_e],
                "thickness_nm": [float(v) for v in self.thickness_nm],
                "residual_nm": [float(v) for v in self.residual_nm],
                "condition_number": float(self.condition_number),
                "holdout_delta_e": [float(v) for v in self.holdout_delta_e],
                "flat_field": self.flat_field.to_dict() if self.flat_field is not None else None,
                "camera": self.camera, "lamp": self.lamp, "objective": self.objective,
                "objective_na": self.objective_na, "date": self.date, "message": self.message}

    @classmethod
    def from_dict(cls, data) -> CameraCalibration:
        """A calibration from :meth:`to_dict` output; every field is checked and a bad or missing one
        raises InputError with a sentence (never another exception)."""
        from .color import ILLUMINANTS, OBSERVERS
        d = _mapping(data, "camera calibration")
        if d.get("format") != CALIBRATION_FORMAT:
            raise InputError(f"This is not a saved camera calibration (format {d.get('format')!r}, expected "
                             f"{CALIBRATION_FORMAT!r}).")
        _version(d, "camera calibration")
        model = d.get("model")
        if not isinstance(model, str) or model not in MODELS:
            raise InputError(f"The saved calibration's model {model!r} is not one of {', '.join(MODELS)}.")
        kind = d.get("kind")
        if not isinstance(kind, str) or kind not in ("reference", "target"):
            raise InputError(f"The saved calibration's kind {kind!r} is not 'reference' or 'target'.")
        terms = MODELS[model][2]
        matrix = _float_array(d, "matrix", (3, terms), minimum=-1e6, maximum=1e6)
        dark = _float_array(d, "dark", (3,), minimum=-1.0, maximum=1.0)
        illuminant, observer = d.get("illuminant"), d.get("observer")
        if not isinstance(illuminant, str) or (illuminant.strip().upper() not in ILLUMINANTS
                                               and illuminant.strip() not in ILLUMINANTS):
            raise InputError(f"The saved calibration's illuminant {illuminant!r} is not a known lamp name.")
        if not isinstance(observer, str) or observer.replace("°", "").strip() not in OBSERVERS:
            raise InputError(f"The saved calibration's observer {observer!r} is not '2' or '10'.")
        width, height = _int_field(d, "width", 1, 1_000_000), _int_field(d, "height", 1, 1_000_000)
        boxes_raw = d.get("boxes")
        if not isinstance(boxes_raw, list) or not 1 <= len(boxes_raw) <= MAX_BOXES:
            raise InputError(f"The saved calibration's boxes must be a list of 1-{MAX_BOXES} boxes.")
        boxes = []
        for b in boxes_raw:
            if (not isinstance(b, list) or len(b) != 4
                    or not all(isinstance(v, int) and not isinstance(v, bool) for v in b)):
                raise InputError("Each saved calibration box is four whole pixel numbers [x0, y0, x1, y1].")
            x0, y0, x1, y1 = b
            if not (0 <= x0 < x1 <= width and 0 <= y0 < y1 <= height):
                raise InputError(f"The saved calibration box {b} is not inside its {width} x {height} photo.")
            boxes.append(tuple(b))
        n = len(boxes)
        ref_lab = _float_array(d, "reference_lab", (n, 3), minimum=-500.0, maximum=500.0)
        res_de = _float_array(d, "residual_delta_e", (n,), minimum=0.0, maximum=1000.0)
        held = _float_array(d, "holdout_delta_e", (n,), minimum=0.0, maximum=1e6)
        want = (n,) if kind == "reference" else (0,)
        thick = _float_array(d, "thickness_nm", want, minimum=0.0, maximum=1e6)
        res_nm = _float_array(d, "residual_nm", want, minimum=-1e6, maximum=1e6, allow_nan=True)
        cond = d.get("condition_number")
        if not isinstance(cond, (int, float)) or isinstance(cond, bool) or not (cond >= 1 or math.isnan(cond)):
            raise InputError("The saved calibration's condition_number must be a number >= 1.")
        flat = d.get("flat_field")
        flat = FlatField.from_dict(flat) if flat is not None else None
        if flat is not None and (flat.width, flat.height) != (width, height):
            raise InputError("The saved calibration's flat field is of another photo size than the calibration.")
        message = d.get("message", "")
        if not isinstance(message, str) or len(message) > 4000:
            raise InputError("The saved calibration's message must be text of at most 4000 characters.")
        meta = _metadata(**{k: d.get(k, None if k == "objective_na" else "")
                            for k in ("camera", "lamp", "objective", "objective_na", "date")})
        return cls(model, matrix, dark, illuminant, observer, width, height, tuple(boxes), ref_lab, res_de,
                   thick, res_nm, float(cond), held, kind, flat, message=message, **meta)


def _mapping(data, what):
    if not isinstance(data, dict):
        raise InputError(f"A saved {what} is a JSON object (a dict); got {type(data).__name__}.")
    return data


def _version(d, what):
    v = d.get("version")
    if not isinstance(v, int) or isinstance(v, bool) or v < 1:
        raise InputError(f"The saved {what} has no valid version number.")
    if v > FORMAT_VERSION:
        raise InputError(f"The saved {what} is of version {v}, newer than this program reads ({FORMAT_VERSION}); "
                         "update fringegauge.")


def _int_field(d, name, lo, hi):
    v = d.get(name)
    if not isinstance(v, int) or isinstance(v, bool) or not lo <= v <= hi:
        raise InputError(f"The saved field {name!r} must be a whole number {lo}-{hi:,}; got {v!r}.")
    return v


def _float_array(d, name, shape, *, minimum, maximum, allow_nan=False):
    v = d.get(name)
    if v is None:
        raise InputError(f"The saved field {name!r} is missing.")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            arr = np.array(v, dtype=float)
    except (TypeError, ValueError, OverflowError, RecursionError):
        raise InputError(f"The saved field {name!r} must hold numbers only.") from None
    if arr.dtype != np.float64 or (shape is not None and arr.shape != shape):
        raise InputError(f"The saved field {name!r} must have shape {shape}; got {arr.shape}.")
    ok = np.isfinite(arr) | (np.isnan(arr) if allow_nan else False)
    if not np.all(ok) or np.any(arr[np.isfinite(arr)] < minimum) or np.any(arr[np.isfinite(arr)] > maximum):
        raise InputError(f"The saved field {name!r} must hold finite numbers within {minimum:g}-{maximum:g}.")
    return arr


def _metadata(camera="", lamp="", objective="", objective_na=None, date=""):
    out = {}
    for name, v in (("camera", camera), ("lamp", lamp), ("objective", objective), ("date", date)):
        if v is None:
            v = ""
        if not isinstance(v, str) or len(v) > MAX_META_CHARS:
            raise InputError(f"The calibration's {name} is text of at most {MAX_META_CHARS} characters; got {v!r:.60}.")
        out[name] = v
    if objective_na is not None:
        if isinstance(objective_na, bool) or not isinstance(objective_na, (int, float, np.floating, np.integer)):
            raise InputError(f"The objective's NA is a number 0-1.7 (or empty); got {objective_na!r:.60}.")
        objective_na = float(require_finite("objective_na", objective_na, minimum=0.0, maximum=1.7))
    out["objective_na"] = objective_na
    return out


def _expand(q, model):
    q = np.asarray(q, dtype=float)
    if model == "matrix":
        return q
    return polynomial_expansion_Finlayson2015(q, **{k: v for k, v in MODELS[model][1].items()})


def _apply(q, matrix, model):
    method, kwargs, _ = MODELS[model]
    q = np.asarray(q, dtype=np.float64)
    out = np.empty(q.shape, dtype=np.float64)
    flat_q, flat_o = q.reshape(-1, 3), out.reshape(-1, 3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for s in range(0, flat_q.shape[0], APPLY_CHUNK_PIXELS):
            flat_o[s:s + APPLY_CHUNK_PIXELS] = apply_matrix_colour_correction(
                flat_q[s:s + APPLY_CHUNK_PIXELS], matrix, method=method, **kwargs)
    return out


def _fit_matrix(q, xyz, model):
    method, kwargs, _ = MODELS[model]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(matrix_colour_correction(q, xyz, method=method, **kwargs), dtype=float)


def _positive(xyz):
    """XYZ with negative components (a fit's overshoot on a black) raised to a tiny positive value, so CIELAB
    stays defined."""
    return np.maximum(xyz, 1e-6)


@dataclass
class _Boxes:
    """Pixels of each calibration box: linear RGB (n_i, 3) and the flat field's relative level f (n_i, 3)."""
    rgb: list
    f: list
    level: np.ndarray | None

    def prepared(self, dark) -> np.ndarray:
        """(N, 3) box means of the dark-subtracted, flat-fielded values for a trial dark offset."""
        d = np.asarray(dark, dtype=float)
        if self.level is None:
            return np.stack([p.mean(axis=0) for p in self.rgb]) - d
        L = self.level
        return np.stack([((p - d) * (L - d) / (f * L - d)).mean(axis=0) for p, f in zip(self.rgb, self.f)])


def _box_pixels(photo, boxes, flat):
    from .inverse import MAX_SATURATED_FRACTION, MIN_BOX_LINEAR
    if not isinstance(boxes, (list, tuple)) or not boxes:
        raise InputError("Give the calibration boxes as a list of (x0, y0, x1, y1) pixel boxes.")
    if len(boxes) > MAX_BOXES:
        raise InputError(f"{len(boxes)} boxes given; a calibration takes at most {MAX_BOXES}.")
    if flat is not None:
        check_flat(flat, photo)
    checked, rgb, fs = [], [], []
    for k, box in enumerate(boxes):
        x0, y0, x1, y1 = _check_box(photo, box, f"calibration box {k + 1}")
        sat = float(_clipped(photo, y0, y1, x0, x1).mean())
        if sat > MAX_SATURATED_FRACTION:
            raise InputError(f"Calibration box {k + 1} ({x0}, {y0}, {x1}, {y1}) is overexposed: {sat:.0%} of its "
                             "pixels are clipped. Draw it on an area that is not blown out, or take the photo with "
                             "less exposure.")
        p = photo.linear_rgb((x0, y0, x1, y1)).reshape(-1, 3).astype(np.float64)
        if np.any(p.mean(axis=0) < MIN_BOX_LINEAR):
            raise InputError(f"Calibration box {k + 1} ({x0}, {y0}, {x1}, {y1}) is too dark to read its colour; "
                             "draw it on a lit area or expose the photo longer.")
        checked.append((x0, y0, x1, y1))
        rgb.append(p)
        fs.append(flat.gain(None, (x0, y0, x1, y1)).reshape(-1, 3).astype(np.float64) if flat is not None else None)
    return tuple(checked), _Boxes(rgb, fs, None if flat is None else np.asarray(flat.level, dtype=float))


def _design_check(q, model, n_boxes):
    """Condition number of [expansion(q), 1]; InputError when the boxes cannot constrain the model."""
    need = MIN_BOXES[model]
    terms = MODELS[model][2]
    if n_boxes < need:
        more = need - n_boxes
        raise InputError(f"A {model} calibration needs at least {need} boxes ({terms} colour terms, a dark offset and "
                         f"one to check the fit); {n_boxes} given. Add at least {more} more "
                         f"box{'es' if more > 1 else ''} "
                         "of clearly different colour, such as thicker or thinner steps.")
    X = np.column_stack([_expand(q, model), np.ones(n_boxes)])
    X = X / np.maximum(np.linalg.norm(X, axis=0), 1e-300)
    s = np.linalg.svd(X, compute_uv=False)
    rank = int(np.sum(s > RANK_RTOL * s[0]))
    cond = float(s[0] / s[-1]) if s[-1] > 0 else float("inf")
    if rank < X.shape[1] or cond > MAX_CONDITION[model]:
        more = max(1, X.shape[1] - rank)
        other = " (or use the matrix model)" if model != "matrix" else ""
        raise InputError(f"The {n_boxes} boxes' colours are too alike to fix a {model} calibration (they span "
                         f"{rank} of its {X.shape[1]} directions; condition number {cond:.3g}, at most "
                         f"{MAX_CONDITION[model]:g} allowed): add at least {more + 1} boxes of clearly different "
                         "colour, "
                         f"such as thicker steps or other hues, rather than more boxes of the same colours{other}.")
    return cond


def _fit(boxes: _Boxes, xyz_target, lab_target, model, illuminant, observer, dark):
    """(matrix, dark) minimizing the boxes' CIELAB residuals; the matrix by colour-science's least squares."""
    from .color import xyz_to_lab

    def solve(d):
        q = boxes.prepared(d)
        return _fit_matrix(q, xyz_target, model), q

    def residual(d):
        M, q = solve(d)
        return (xyz_to_lab(_positive(_apply(q, M, model)), illuminant, observer) - lab_target).ravel()

    if dark is not None:
        d = np.asarray(require_finite("dark", dark, minimum=-1.0, maximum=1.0), dtype=float).ravel()
        if d.size == 1:
            d = np.repeat(d, 3)
        if d.size != 3:
            raise InputError(f"dark is one linear value or three (R, G, B); got {d.size}.")
    else:
        means = np.stack([p.mean(axis=0) for p in boxes.rgb]).min(axis=0)
        if boxes.level is not None:
            means = np.minimum(means, boxes.level * min(float(f.min()) for f in boxes.f))
        hi = np.maximum(DARK_MAX_FRACTION * means, DARK_MIN + 1e-6)
        sol = optimize.least_squares(residual, np.zeros(3), bounds=(np.full(3, DARK_MIN), hi), x_scale=0.01,
                                     method="trf")
        d = sol.x
    M, _ = solve(d)
    return M, d


def _target_lab_from_xyz(xyz, illuminant, observer):
    from .color import xyz_to_lab
    return xyz_to_lab(xyz, illuminant, observer)


def _illuminant_name(illuminant):
    from .color import _illuminant_values
    if not isinstance(illuminant, str):
        raise InputError("A camera calibration is saved with its lamp's name: give the illuminant as a name "
                         "(e.g. 'D65', 'A', 'LED-B3'), not a spectrum.")
    _illuminant_values(illuminant)                                        # refuses an unknown name
    return illuminant.strip()


def _lamp_key(illuminant):
    """The colour tables' key of a named lamp (aliases such as F2 / FL2 agree), None for a spectrum."""
    from .color import _illuminant_values
    return _illuminant_values(illuminant)[0] if isinstance(illuminant, str) else None


def _observer_key(observer):
    from .color import _observer
    return _observer(observer)


def _check_model(model):
    if not isinstance(model, str) or model not in MODELS:
        raise InputError(f"model must be one of {', '.join(repr(m) for m in MODELS)}; got {model!r}.")


def _calibrate(photo, boxes, lab_target, xyz_target, model, illuminant, observer, flat, dark, meta, kind):
    from .color import delta_e_2000
    checked, px = _box_pixels(photo, boxes, flat)
    if len(lab_target) != len(checked):
        raise InputError(f"{len(checked)} boxes but {len(lab_target)} reference colours: give one per box.")
    cond = _design_check(px.prepared(np.zeros(3)), model, len(checked))
    M, d = _fit(px, xyz_target, lab_target, model, illuminant, observer, dark)
    q = px.prepared(d)
    lab_fit = _target_lab_from_xyz(_positive(_apply(q, M, model)), illuminant, observer)
    res = np.asarray(delta_e_2000(lab_fit, lab_target), dtype=float)
    held = np.empty(len(checked))
    for i in range(len(checked)):                                     # each box predicted by the others
        keep = np.arange(len(checked)) != i
        Mi = _fit_matrix(q[keep], xyz_target[keep], model)
        lab_i = _target_lab_from_xyz(_positive(_apply(q[i:i + 1], Mi, model)), illuminant, observer)
        held[i] = float(delta_e_2000(lab_i[0], lab_target[i]))
    cal = CameraCalibration(model, M, np.asarray(d, dtype=float), illuminant, str(observer), photo.width,
                            photo.height, checked, np.asarray(lab_target, dtype=float), res, condition_number=cond,
                            kind=kind, flat_field=flat, holdout_delta_e=held, **_metadata(**meta))
    return cal, lab_fit


def calibrate_from_reference(image, boxes, thickness_nm, stack, layer: int = 0, *, illuminant="D65", observer="2",
                             angle_deg: float = 0.0, model: str = "matrix", flat_field=None,
                             polarization: str = "unpolarized", na: float = 0.0, window_nm=(0.0, 1000.0), dark=None,
                             camera: str = "", lamp: str = "", objective: str = "", objective_na=None,
                             date: str = "") -> CameraCalibration:
    """Calibrate a camera from a photo of a sample of known thicknesses.

    Parameters
    ----------
    image : array (H, W, 3), bytes, path or ``physics.imageio.Photo``
        The photo of the reference sample, taken as the later photos will be.
    boxes : list of (x0, y0, x1, y1)
        Pixel boxes (x right, y down, ends exclusive), each on an area of one known thickness.
    thickness_nm : list of float
        The known thickness (nm) of ``layer`` in each box, within ``window_nm``.
    stack : Stack
        The sample's stack (the layer's own thickness in it is ignored).
    layer, illuminant, observer, angle_deg, polarization, na :
        As for :func:`physics.appearance.color_map`; the illuminant is a lamp name.
    model : "matrix" or "root-polynomial"
        See :data:`MODELS` and :data:`MIN_BOXES`.
    flat_field : FlatField, optional
        The station's flat field (from a photo of bare substrate of the same size), applied first.
    window_nm : (lo, hi)
        Thicknesses searched when each box's corrected colour is mapped back to a thickness (``residual_nm``).
    dark : float or (3,), optional
        A known dark offset (linear light); by default it is fitted.
    camera, lamp, objective, objective_na, date :
        What the calibration is for, saved with it.

    Returns
    -------
    CameraCalibration

    Raises
    ------
    InputError
        A box outside the photo, clipped or too dark; a thickness outside the window; too few boxes or
        colours too alike for the model; a flat field of another photo size.

    References
    ----------
    Cheung et al. 2004 and Finlayson, Mackiewicz and Hurlbert 2015 via colour-science (see the module).
    """
    from .appearance import color_map
    from .inverse import _colour_path, _window
    from .stack import Stack, _check_layer_index

    _check_model(model)
    photo = _photo(image)
    if not isinstance(stack, Stack):
        raise InputError(f"calibrate_from_reference needs a Stack; got {type(stack).__name__}.")
    _check_layer_index(stack, layer)
    name = _illuminant_name(illuminant)
    lo, hi = _window(window_nm, None, None)
    t = np.asarray(require_finite("thickness_nm", thickness_nm, minimum=0.0, unit="nm"), dtype=float).ravel()
    if not isinstance(boxes, (list, tuple)) or len(t) != len(boxes):
        raise InputError(f"Give one known thickness per box: {len(boxes) if isinstance(boxes, (list, tuple)) else 0} "
                         f"box(es) but {len(t)} thickness(es).")
    outside = [f"{v:g}" for v in t if not lo <= v <= hi]
    if outside:
        raise InputError(f"Known thickness {', '.join(outside)} nm lies outside the window {lo:g}-{hi:g} nm: widen "
                         "window_nm, or check the value typed.")
    cm = color_map(stack, layer, t, [float(angle_deg)], illuminant=name, observer=observer,
                   polarization=polarization, na=na)
    xyz_target, lab_target = cm.xyz[:, 0, :], cm.lab[:, 0, :]
    meta = dict(camera=camera, lamp=lamp, objective=objective, objective_na=objective_na, date=date)
    cal, lab_fit = _calibrate(photo, boxes, lab_target, xyz_target, model, name, str(observer), flat_field, dark,
                              meta, "reference")
    path = _colour_path(stack, layer, lo, hi, float(angle_deg), name, str(observer), polarization, float(na))
    res_nm = np.array([_thickness_in_order(path, lab, known) - known for lab, known in zip(lab_fit, t)])
    worst = int(np.argmax(np.abs(res_nm)))
    message = (f"{model} calibration from {len(t)} boxes: ΔE00 {cal.rms_delta_e:.2f} RMS (largest "
               f"{cal.residual_delta_e.max():.2f}; each box predicted from the others: largest "
               f"{cal.holdout_delta_e.max():.2f}); thickness residual {np.sqrt(np.mean(res_nm ** 2)):.1f} nm RMS, "
               "largest "
               f"{res_nm[worst]:+.1f} nm at the {t[worst]:g} nm box.")
    return replace(cal, thickness_nm=t, residual_nm=res_nm, message=message)


def _thickness_in_order(path, lab, known_nm) -> float:
    """Thickness of the path point (parabola-refined) nearest in ΔE00 to ``lab`` within the fringe order of
    ``known_nm``: where a map would put this colour once its order is known."""
    from .color import delta_e_2000
    from .inverse import _parabolic_min
    i = int(np.argmin(np.abs(path.thickness_nm - known_nm)))
    sel = np.flatnonzero(path.order == path.order[i])
    de = np.asarray(delta_e_2000(path.lab[sel], lab[None, :]), dtype=float)
    return _parabolic_min(path.thickness_nm[sel], de, int(np.argmin(de)))


def calibrate_from_target(image, boxes, reference_lab, *, illuminant="D65", observer="2", model: str = "matrix",
                          flat_field=None, dark=None, camera: str = "", lamp: str = "", objective: str = "",
                          objective_na=None, date: str = "") -> CameraCalibration:
    """Calibrate a camera from a photo of a colour reference target whose patches' CIELAB is known.

    Parameters
    ----------
    image : array (H, W, 3), bytes, path or ``physics.imageio.Photo``
    boxes : list of (x0, y0, x1, y1), one per patch used
    reference_lab : (N, 3) CIELAB of each box's patch under ``illuminant`` (relative to its white), e.g.
        ``read_target(...).lab_of(names)`` or ``builtin_target().lab_of(names)``.
    illuminant, observer, model, flat_field, dark, camera, lamp, objective, objective_na, date :
        As for :func:`calibrate_from_reference`.

    Returns
    -------
    CameraCalibration (``kind`` "target"; no thickness residuals)

    References
    ----------
    Cheung et al. 2004 and Finlayson, Mackiewicz and Hurlbert 2015 via colour-science (see the module).
    """
    from .color import lab_to_xyz
    _check_model(model)
    photo = _photo(image)
    name = _illuminant_name(illuminant)
    lab = np.asarray(require_finite("reference_lab", reference_lab, minimum=-500.0, maximum=500.0), dtype=float)
    if lab.ndim != 2 or lab.shape[1] != 3:
        raise InputError(f"reference_lab is one (L*, a*, b*) per box, shape (N, 3); got shape {lab.shape}.")
    if np.any(lab[:, 0] < 0) or np.any(lab[:, 0] > 100):
        raise InputError("reference_lab L* values run from 0 to 100; check the target data.")
    meta = dict(camera=camera, lamp=lamp, objective=objective, objective_na=objective_na, date=date)
    cal, _ = _calibrate(photo, boxes, lab, lab_to_xyz(lab, name, observer), model, name, str(observer), flat_field,
                        dark, meta, "target")
    message = (f"{model} calibration from {len(lab)} target patches: ΔE00 {cal.rms_delta_e:.2f} RMS (largest "
               f"{cal.residual_delta_e.max():.2f}; each patch predicted from the others: largest "
               f"{cal.holdout_delta_e.max():.2f}).")
    return replace(cal, message=message)


# ---------------------------------------------------------------------- applying to a photo
def pixel_lab(photo, roi, calibration, flat, denoise, illuminant, observer, progress=None):
    """Per-pixel CIELAB of a photo's region ``roi`` (x0, y0, x1, y1), for the map's matcher.

    Pixels are read as linear light (``Photo.linear_rgb``), the flat field divided out (with the
    calibration's dark offset), optionally denoised (:data:`DENOISE_FILTERS`), then turned to XYZ by the
    calibration; without one, the caller applies its gains to the returned linear values.

    Returns
    -------
    (values (h*w, 3), calibrated) : CIELAB (float32) when ``calibrated`` (True with a calibration), else
    the prepared linear RGB (float64), for the sRGB route.
    """
    say = progress or (lambda f, t: None)
    x0, y0, x1, y1 = roi
    if calibration is not None:
        if not isinstance(calibration, CameraCalibration):
            raise InputError(f"calibration must be a CameraCalibration; got {type(calibration).__name__}.")
        calibration.check_photo(photo)
        if _lamp_key(calibration.illuminant) != _lamp_key(illuminant) or \
                _observer_key(calibration.observer) != _observer_key(observer):
            raise InputError(f"The calibration was made for lamp {calibration.illuminant} and observer "
                             f"{calibration.observer}°, but the map asks for {illuminant} and {observer}°: map under "
                             "the calibration's lamp, or calibrate under this one.")
    if flat is not None:
        check_flat(flat, photo)
        if calibration is not None and calibration.flat_field is None:
            raise InputError("This camera calibration was made without a flat field, so its colours are those of "
                             "the uncorrected field: map without a flat field, or make the calibration again with "
                             "the flat field.")
    if denoise is not None and (not isinstance(denoise, str) or denoise not in DENOISE_FILTERS):
        raise InputError(f"denoise must be None or one of {', '.join(repr(k) for k in DENOISE_FILTERS)}; "
                         f"got {denoise!r}.")
    lin = photo.linear_rgb((x0, y0, x1, y1))
    dark = calibration.dark if calibration is not None else None
    if calibration is not None and denoise is None:                  # band by band: no whole-image temporaries
        h, w = lin.shape[:2]
        out = np.empty((h * w, 3), dtype=np.float32)
        rows = max(1, APPLY_CHUNK_PIXELS // max(w, 1))
        for a in range(0, h, rows):
            say(0.22 + 0.13 * a / max(h, 1), "applying the flat field and the camera calibration")
            b = min(a + rows, h)
            q = (flat.apply(lin[a:b], dark, (x0, y0 + a, x1, y0 + b)) if flat is not None
                 else lin[a:b] - np.asarray(dark, dtype=np.float32))
            out[a * w:b * w] = _lab_of_prepared(q.reshape(-1, 3), calibration)
        return out, True
    if flat is not None:
        say(0.22, "dividing out the flat field")
        lin = flat.apply(lin, dark, (x0, y0, x1, y1))
    elif dark is not None:
        lin = lin - np.asarray(dark, dtype=np.float32)
    if denoise is not None:
        say(0.25, f"denoising ({denoise} filter)")
        size = DENOISE_FILTERS[denoise]
        lin = ndimage.median_filter(lin, size=(size, size, 1), mode="nearest")
    flat_lin = lin.reshape(-1, 3)
    if calibration is None:
        return flat_lin.astype(np.float64), False
    say(0.3, "applying the camera calibration")
    return _lab_of_prepared(flat_lin, calibration), True


def _lab_of_prepared(q, calibration) -> np.ndarray:
    """float32 (n, 3) CIELAB of dark-subtracted, flat-fielded camera RGB (n, 3) through the calibration."""
    from .color import illuminant_white_xyz, xyz_to_lab
    white = illuminant_white_xyz(calibration.illuminant, calibration.observer)
    try:                                                  # the fast float32 CIELAB of the colour table
        from .colourtable import lab_from_linear, lab_from_xyz
    except ImportError:                                   # pragma: no cover - before that module is present
        lab_from_linear = lab_from_xyz = None
    if lab_from_linear is not None and calibration.model == "matrix":
        return lab_from_linear(q, calibration.matrix, white)
    out = np.empty(q.shape, dtype=np.float32)
    for s in range(0, q.shape[0], APPLY_CHUNK_PIXELS):
        xyz = _positive(_apply(q[s:s + APPLY_CHUNK_PIXELS], calibration.matrix, calibration.model))
        out[s:s + APPLY_CHUNK_PIXELS] = (lab_from_xyz(xyz, white) if lab_from_xyz is not None
                                         else xyz_to_lab(xyz, calibration.illuminant, calibration.observer))
    return out


# ---------------------------------------------------------------------- targets
@dataclass(frozen=True, eq=False)
class ColourTarget:
    """Patches of a colour reference target with their CIELAB under one illuminant.

    Attributes
    ----------
    names : tuple of str;  lab : (N, 3) float;  illuminant, observer : str
    source : str, where the values came from (a file's kind, or colour-science's data set and its licence).
    """

    names: tuple
    lab: np.ndarray
    illuminant: str
    observer: str
    source: str = ""

    def lab_of(self, names) -> np.ndarray:
        """(len(names), 3) CIELAB of the named patches in that order (names matched without case or spaces
        at the ends). InputError naming every missing patch."""
        index = {n.strip().casefold(): i for i, n in enumerate(self.names)}
        names = [str(n) for n in names]
        missing = [n for n in names if n.strip().casefold() not in index]
        if missing:
            listed = ", ".join(self.names[:8]) + (", ..." if len(self.names) > 8 else "")
            raise InputError(f"The target data have no patch named {', '.join(repr(m) for m in missing)} (they list "
                             f"{listed}): check the patch names of the boxes, or add those patches to the target file.")
        return np.stack([self.lab[index[n.strip().casefold()]] for n in names])


_LAB_HEADERS = {"l": 0, "l*": 0, "a": 1, "a*": 1, "b": 2, "b*": 2}


def read_target(source, *, illuminant="D65", observer="2", patches=None) -> ColourTarget:
    """Read a colour target's data from CSV text (or bytes, or a file path).

    Two layouts, each with a header row and one row per patch, the patch name first:

    - ``name, L*, a*, b*`` : CIELAB under ``illuminant`` (as the target's data sheet gives it for that lamp);
    - ``name, 380, 390, ..., 730`` : reflectance spectra, headers the wavelengths in nm (within
      360-830 nm, at least 5), values 0-1 (or percent 0-100 when any exceeds 1.5); their CIELAB is computed
      under ``illuminant`` with :func:`physics.color.spectrum_to_xyz`.

    ``patches`` (optional list of names) must all be present, else InputError naming the missing ones.

    References
    ----------
    CIE 015:2018 (tristimulus integration, CIELAB).
    """
    from .color import spectrum_to_xyz, xyz_to_lab
    name = _illuminant_name(illuminant)
    text = _target_text(source)
    rows = [r for r in csv.reader(io.StringIO(text)) if any(c.strip() for c in r)]
    if len(rows) < 2:
        raise InputError("The target file needs a header row and at least one patch row (name, L*, a*, b*, or name "
                         "and a reflectance per wavelength).")
    if len(rows) - 1 > MAX_TARGET_PATCHES:
        raise InputError(f"The target file has {len(rows) - 1:,} patch rows; at most {MAX_TARGET_PATCHES} are read.")
    header = [h.strip().casefold() for h in rows[0]]
    cols = header[1:]
    if [_LAB_HEADERS.get(c) for c in cols[:3]] == [0, 1, 2] and len(cols) == 3:
        kind = "lab"
    else:
        try:
            wl = np.array([float(c.replace("nm", "")) for c in cols])
        except ValueError:
            raise InputError(f"The target file's header {', '.join(rows[0])!r} is neither 'name, L*, a*, b*' nor a "
                             "name followed by wavelengths in nm.") from None
        if wl.size < 5 or wl.min() < 360 or wl.max() > 830 or np.any(np.diff(wl) <= 0):
            raise InputError("A spectral target file lists at least 5 increasing wavelengths within 360-830 nm in its "
                             "header.")
        kind = "spectra"
    names, values = [], []
    for k, r in enumerate(rows[1:], start=2):
        cells = [c.strip() for c in r]
        if len(cells) != len(header) or any(c == "" for c in cells):
            raise InputError(f"Row {k} of the target file has {sum(1 for c in cells if c)} of {len(header)} values: "
                             "fill "
                             "every cell (a patch without data cannot be used; delete its row instead).")
        try:
            vals = [float(c) for c in cells[1:]]
        except ValueError:
            raise InputError(f"Row {k} of the target file ({cells[0]!r}) holds a value that is not a number.") from None
        if not all(math.isfinite(v) for v in vals):
            raise InputError(f"Row {k} of the target file ({cells[0]!r}) holds a value that is not finite.")
        names.append(cells[0][:MAX_META_CHARS])
        values.append(vals)
    folded = [n.casefold() for n in names]
    dup = sorted({n for n in names if folded.count(n.casefold()) > 1})
    if dup:
        raise InputError(f"The target file names patch(es) {', '.join(dup)} more than once; each patch once.")
    v = np.array(values, dtype=float)
    if kind == "lab":
        if np.any(v[:, 0] < 0) or np.any(v[:, 0] > 100) or np.any(np.abs(v[:, 1:]) > 200):
            raise InputError("The target file's CIELAB values are out of range: L* 0-100, a* and b* within ±200.")
        lab, what = v, "CIELAB from a target file"
    else:
        if np.any(v < 0):
            raise InputError("The target file's reflectances must not be negative.")
        if v.max() > 1.5:
            v = v / 100.0
        if v.max() > 1.5:
            raise InputError("The target file's reflectances run above 150 %; give fractions 0-1 or percent 0-100.")
        lab = xyz_to_lab(spectrum_to_xyz(v, wl, name, observer), name, observer)
        what = f"reflectance spectra from a target file, CIELAB computed under {name}"
    target = ColourTarget(tuple(names), lab, name, str(observer), what)
    if patches is not None:
        target.lab_of(patches)
    return target


def _target_text(source) -> str:
    from pathlib import Path
    if isinstance(source, (bytes, bytearray)):
        data = bytes(source)
    elif isinstance(source, Path) or (isinstance(source, str) and "\n" not in source and "," not in source):
        p = Path(source)
        try:
            size = p.stat().st_size
        except OSError as exc:
            raise InputError(f"The target file {str(source)!r:.80} cannot be read ({exc.strerror}).") from None
        if size > MAX_TARGET_BYTES:
            raise InputError(f"The target file is {size:,} bytes; at most {MAX_TARGET_BYTES:,} are read.")
        data = p.read_bytes()
    elif isinstance(source, str):
        data = source.encode("utf-8", "replace")
    else:
        raise InputError(f"A target file is CSV text, bytes or a path; got {type(source).__name__}.")
    if len(data) > MAX_TARGET_BYTES:
        raise InputError(f"The target file is {len(data):,} bytes; at most {MAX_TARGET_BYTES:,} are read.")
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError:
        return data.decode("latin-1")


def builtin_target(name: str = "BabelColor Average", *, illuminant="D65", observer="2") -> ColourTarget:
    """A 24-patch ColorChecker's CIELAB under ``illuminant`` from colour-science's reflectance spectra.

    ``name`` is a key of ``colour.SDS_COLOURCHECKERS`` ("BabelColor Average": the average of 30 charts
    measured by BabelColor; "ColorChecker N Ohta"). The data are read at run time from the installed
    colour-science package (BSD-3-Clause licence; the BabelColor data are © 2004-2012 Danny Pascale,
    included in colour-science by his permission), not copied into this program. An individual chart
    differs from the average by about 1 ΔE00 or more: for measurement use the data sheet of your own chart
    through :func:`read_target`.

    References
    ----------
    BabelColor, "The ColorChecker (since 1976!)" (2012); N. Ohta, The Basis of Color Reproduction
    Engineering (1997); via colour-science ``colour.SDS_COLOURCHECKERS``.
    """
    from .color import spectrum_to_xyz, xyz_to_lab
    ill = _illuminant_name(illuminant)
    sds = colour.SDS_COLOURCHECKERS.get(name) if isinstance(name, str) else None
    if sds is None:
        raise InputError(f"No built-in target {name!r}; use 'BabelColor Average' or 'ColorChecker N Ohta', or read "
                         "your chart's data sheet with read_target.")
    names = tuple(sds.keys())
    wl = np.asarray(sds[names[0]].wavelengths, dtype=float)
    R = np.stack([np.asarray(sds[n].values, dtype=float) for n in names])
    lab = xyz_to_lab(spectrum_to_xyz(R, wl, ill, observer), ill, observer)
    return ColourTarget(names, lab, ill, str(observer),
                        f"colour-science SDS_COLOURCHECKERS[{name!r}] (BSD-3-Clause), CIELAB under {ill}")

