"""What an observer sees from a stack: colour over thickness and viewing angle, a viewing cone, fringe orders.

A microscope objective or a loupe collects light over a cone of directions of
numerical aperture NA = n₀ sin α_max around the viewing direction. The colour
seen is the average reflectance over that cone. With the pupil uniformly filled
(Köhler illumination, common practice for inspection microscopes) each ray's
weight is proportional to its projected solid angle, sin α cos α dα dφ. A ray at
cone angle α and azimuth φ around a viewing direction tilted by θᵥ meets the
sample at the incidence angle

    cos θ = cos θᵥ cos α + sin θᵥ sin α cos φ

(spherical law of cosines). Rays that would arrive from below the surface
(θ >= 90°) are dropped. With a cone, "s" and "p" refer to each ray's own plane
of incidence.

Fringe order: the optical path difference of one round trip in the swept layer,
OPD = 2 d Re(N cos θ_layer), in units of a reference wavelength; a colour of
order m lies between OPD/λ₀ = m − 1 and m (interface phase shifts not counted).

References
----------
M. Born and E. Wolf, Principles of Optics, 7th ed., sec. 8.5 (image-forming
pencils and numerical aperture); sec. 7.6 (fringes of equal thickness).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .color import (spectrum_to_xyz, xyz_to_lab, _illuminant_values, _linear_srgb, GAMUT_TOLERANCE, delta_e_2000,
                    luminous_reflectance)
from .errors import InputError, WavelengthRangeError, require_finite
from .stack import MAX_ANGLE_DEG, Layer, Stack, _Optics, sweep, _check_layer_index

__all__ = ["ColorMap", "color_map", "colour_wavelengths_nm", "fringe_path_nm", "colour_map_points", "SAMPLES_PER_FRINGE", "samples_per_fringe", "cone_rays", "cone_reflectance", "interference_order",
           "order_thicknesses_nm", "colour_band_nm", "DEFAULT_BAND_NM", "MAX_NA", "point_color",
           "scaled_colors", "PointColor", "BRIGHTNESS", "band_average", "scaled_stack", "tolerance_run",
           "ToleranceResult", "MAX_TOLERANCE_TRIALS", "MAX_TOLERANCE_PCT"]

#: The colour band used by default: CIE tables are significant from 380 to 780 nm.
DEFAULT_BAND_NM = (380.0, 780.0)
#: Reference wavelength for fringe orders: near the peak of the eye's sensitivity.
ORDER_WAVELENGTH_NM = 550.0
#: Largest numerical aperture accepted (dry objectives stop near 0.95).
MAX_NA = 0.95
#: Below this NA the cone is one ray: its solid-angle weights would underflow, and the colour
#: differs from a single ray by far less than any display can show.
MIN_NA = 1e-6
#: Largest incidence angle kept on a cone's grid (90° is grazing and never seen).
_GRAZING_DEG = 89.9
#: Gauss-Legendre points across the cone radius and around half its rim.
_CONE_RADIAL, _CONE_AZIMUTH = 8, 12
#: Samples per fringe on a wavenumber-uniform grid under a lamp with narrow lines (fluorescents): the
#: colour then rests on R at the lines themselves, so the linear interpolant between samples must follow
#: each fringe closely (at 10 its error is under 5 % of the fringe's swing; tests check ΔE00 < 1 against
#: a 0.05 nm integration).
SAMPLES_PER_FRINGE = 10
#: Samples per fringe under a smooth lamp (daylight, incandescent, LEDs): the sum over samples then
#: integrates a smooth weight times a periodic R, which errs only by the harmonics that alias, the n-th
#: having amplitude |r₁r₂|ⁿ (a silicon membrane's |r₁r₂| ≈ 0.36 leaves 2 % at n = 4 of a fringe swing).
SMOOTH_SAMPLES_PER_FRINGE = 4
#: A lamp counts as having lines when its 1 nm spectrum departs from its own 11 nm running mean by more
#: than this fraction of its peak (F2 0.41, F11 0.28, yellow room 0.25; D65 0.04, LED-B3 0.08, A 0.003).
LINE_LAMP_RATIO = 0.15
#: Most wavelengths one colour is integrated on: a 100 µm layer of n = 2.5 needs about 4,000; the bound
#: keeps memory finite for twelve such layers (the colour then tends to, but misses, the incoherent limit).
MAX_COLOUR_SAMPLES = 20_000
#: Working-array size (thickness rows × angles × wavelengths) of one piece of an adaptive colour map.
_MAP_PIECE_POINTS = 1 << 22
#: Ratio between successive sample counts of an adaptive colour map's thickness groups.
_GROUP_RATIO = 2 ** 0.5
#: Step of the incidence-angle grid on which a cone-averaged map is interpolated.
_CONE_GRID_STEP_DEG = 0.5


def colour_band_nm(stack: Stack, step_nm: float = 5.0) -> np.ndarray:
    """Wavelengths (nm) for colour: 380-780 nm at ``step_nm``, cut to where every medium has data.

    Raises
    ------
    WavelengthRangeError
        When the stack's materials leave less than 420-680 nm, too little for a colour.
    """
    lo, hi = stack.wavelength_range_nm()
    lo, hi = max(DEFAULT_BAND_NM[0], lo), min(DEFAULT_BAND_NM[1], hi)
    if lo > 420 or hi < 680:
        raise WavelengthRangeError(
            f"The stack's materials have data only from {lo:g} to {hi:g} nm together; a colour needs "
            "at least 420-680 nm. Choose material pages that cover the visible.")
    start = np.ceil(lo / step_nm) * step_nm
    return np.arange(start, hi + 1e-9, step_nm)


#: Round-trip amplitude below which a layer's fringes no longer show in a colour: light that comes back
#: through it carries its fringes with this weight (e^-9 ≈ 1.2e-4, below a thousandth of a colour step).
_FRINGE_ATTENUATION = 9.0


def _fringe_paths(stack: Stack, wl: np.ndarray, layer: int | None = None, thickness_nm=None) -> np.ndarray:
    """Round-trip group path (nm) through the coherent layers at each wavelength; (T, W) with a swept layer.

    A layer of thickness d and group index n_g = d(nσ)/dσ (σ = 1/λ) makes fringes spaced
    Δσ = 1/(2 n_g d) in wavenumber (Δλ ≈ λ²/(2 n_g d) at normal incidence, the densest case); paths of
    all layers add, since their beats are fringes too. Where a layer's round trip attenuates the light
    by more than e^-9 (4π k d/λ > 9) its fringes are gone and its path is not counted.

    References
    ----------
    M. Born and E. Wolf, Principles of Optics, 7th ed., sec. 7.5 (fringes of equal inclination).
    """
    sigma = 1.0 / wl
    total = np.zeros(wl.shape)
    swept = None
    for i, l in enumerate(stack.layers):
        nk = l.material.nk(wl)
        ng = np.maximum(np.gradient(nk.real * sigma, sigma), nk.real) if wl.size > 2 else nk.real
        if i == layer:
            swept = (ng, nk.imag)
            continue
        seen = 4 * np.pi * nk.imag * l.thickness_nm * sigma <= _FRINGE_ATTENUATION
        total += 2.0 * ng * l.thickness_nm * seen
    if swept is None:
        return total
    d = np.atleast_1d(np.asarray(thickness_nm, dtype=float))[:, None]
    ng, k = swept
    seen = 4 * np.pi * k[None, :] * d * sigma[None, :] <= _FRINGE_ATTENUATION
    return total[None, :] + 2.0 * ng[None, :] * d * seen


def fringe_path_nm(stack: Stack, wavelength_nm=None) -> float:
    """Largest round-trip group path (nm) of the stack's coherent layers over the colour band: its fringes
    are spaced 1/path in wavenumber. See :func:`_fringe_paths`."""
    wl = colour_band_nm(stack) if wavelength_nm is None else np.asarray(wavelength_nm, dtype=float)
    return float(np.max(_fringe_paths(stack, wl))) if wl.size else 0.0


def samples_per_fringe(illuminant=None) -> int:
    """Samples per fringe the colour under ``illuminant`` needs (None: the strictest, as for a line lamp)."""
    if illuminant is None:
        return SAMPLES_PER_FRINGE
    _, spd = _illuminant_values(illuminant)
    inner = slice(20, -20)                  # away from the table's ends, where the running mean is cut
    smooth = np.convolve(spd, np.ones(11) / 11, mode="same")
    lines = float(np.max(np.abs(spd - smooth)[inner]) / max(float(spd[inner].max()), 1e-300))
    return SAMPLES_PER_FRINGE if lines > LINE_LAMP_RATIO else SMOOTH_SAMPLES_PER_FRINGE


def _sample_count(path_nm, lo: float, hi: float, spf: int = SAMPLES_PER_FRINGE) -> np.ndarray:
    """Wavenumber-uniform samples over lo-hi nm for ``spf`` samples per fringe of ``path_nm``."""
    fringes = np.asarray(path_nm, dtype=float) * (1.0 / lo - 1.0 / hi)
    return np.minimum(np.ceil(fringes * spf).astype(int) + 1, MAX_COLOUR_SAMPLES)


def _base_suffices(path_nm, base: np.ndarray, spf: int = SAMPLES_PER_FRINGE) -> np.ndarray:
    """Whether the base grid's step at its blue end gives ``spf`` samples per fringe of ``path_nm``."""
    step_sigma = 1.0 / base[0] - 1.0 / base[1]
    return np.asarray(path_nm, dtype=float) * step_sigma * spf <= 1.0


def _wavenumber_grid(lo: float, hi: float, n: int) -> np.ndarray:
    return np.sort(1.0 / np.linspace(1.0 / lo, 1.0 / hi, max(int(n), 2)))


def colour_wavelengths_nm(stack: Stack, step_nm: float = 5.0, illuminant=None) -> np.ndarray:
    """Wavelengths (nm) fine enough for the colour of ``stack``: :func:`colour_band_nm` while its step
    resolves the fringes, else a grid uniform in wavenumber with SAMPLES_PER_FRINGE per fringe (and at
    least as many points as the base grid), so the colour of a thick layer converges to the average
    over its fringes instead of aliasing. ``illuminant`` (the lamp the colour is for) sets the samples per
    fringe (:func:`samples_per_fringe`); None takes the strictest.
    """
    base = colour_band_nm(stack, step_nm)
    path = fringe_path_nm(stack, base)
    spf = samples_per_fringe(illuminant)
    if base.size < 2 or _base_suffices(path, base, spf):
        return base
    return _wavenumber_grid(base[0], base[-1], max(int(_sample_count(path, base[0], base[-1], spf)), base.size))


def colour_map_points(stack: Stack, layer: int, thickness_nm, n_angle: int, illuminant=None) -> int:
    """Grid points (thickness × angle × wavelength) an adaptive :func:`color_map` evaluates."""
    base = colour_band_nm(stack)
    groups = _thickness_groups(stack, layer, thickness_nm, base, samples_per_fringe(illuminant))
    return n_angle * int(sum(w.size * rows.size for rows, w in groups))


def _thickness_groups(stack: Stack, layer: int, thickness_nm, base: np.ndarray, spf: int = SAMPLES_PER_FRINGE):
    """[(row indices, wavelengths)] covering every thickness: the base grid where it suffices, else
    wavenumber grids whose sizes step by _GROUP_RATIO (rows of similar thickness share one grid)."""
    d = np.atleast_1d(np.asarray(thickness_nm, dtype=float))
    path = _fringe_paths(stack, base, layer, d).max(axis=1)
    ok = _base_suffices(path, base, spf) if base.size >= 2 else np.ones(d.size, bool)
    if ok.all():
        return [(np.arange(d.size), base)]
    groups = [(np.flatnonzero(ok), base)] if ok.any() else []
    need = np.maximum(_sample_count(path, base[0], base[-1], spf), base.size)
    level = np.ceil(np.log(need / base.size) / np.log(_GROUP_RATIO) - 1e-9).astype(int)
    for k in np.unique(level[~ok]):
        rows = np.flatnonzero(~ok & (level == k))
        n = min(max(int(np.ceil(base.size * _GROUP_RATIO ** k)), int(need[rows].max())), MAX_COLOUR_SAMPLES)
        groups.append((rows, _wavenumber_grid(base[0], base[-1], n)))
    return groups


def cone_rays(view_deg, na: float, ambient_n: float = 1.0):
    """Incidence angles and weights of the rays in a viewing cone.

    Parameters
    ----------
    view_deg : array_like, (A,)
        Viewing directions, degrees from the normal.
    na : float
        Numerical aperture n₀ sin α_max (0 = a single ray).
    ambient_n : float
        Index of the ambient (n₀).

    Returns
    -------
    (angles, weights) : arrays (A, K) of incidence angles in degrees and weights
        summing to 1 along K; dropped rays have weight 0.
    """
    view = np.atleast_1d(require_finite("angle_deg", view_deg, minimum=0.0, maximum=MAX_ANGLE_DEG,
                                        max_inclusive=False, unit="deg")).ravel()
    na = float(require_finite("na", na, minimum=0.0, maximum=MAX_NA))
    if na < MIN_NA:                     # narrower than any real aperture: one ray (and no weight underflow)
        return view[:, None].copy(), np.ones((view.size, 1))
    if na >= ambient_n:
        raise InputError(f"NA = {na:g} is not possible in an ambient of index {ambient_n:g}; NA < n₀.")
    amax = np.arcsin(na / ambient_n)
    # Gauss-Legendre in α on [0, α_max] and in φ on [0, π] (the cone is symmetric about the plane of incidence)
    xa, wa = np.polynomial.legendre.leggauss(_CONE_RADIAL)
    alpha = 0.5 * amax * (xa + 1)
    w_alpha = 0.5 * amax * wa * np.sin(alpha) * np.cos(alpha)
    xp, wp = np.polynomial.legendre.leggauss(_CONE_AZIMUTH)
    phi = 0.5 * np.pi * (xp + 1)
    w_phi = 0.5 * np.pi * wp
    a, p = np.meshgrid(alpha, phi, indexing="ij")
    w = (w_alpha[:, None] * w_phi[None, :]).ravel()
    tv = np.radians(view)[:, None]
    cos_t = np.cos(tv) * np.cos(a.ravel())[None, :] + np.sin(tv) * np.sin(a.ravel())[None, :] * np.cos(p.ravel())[None, :]
    theta = np.degrees(np.arccos(np.clip(cos_t, -1.0, 1.0)))
    weights = np.where(theta < _GRAZING_DEG, w[None, :], 0.0)
    total = weights.sum(axis=1, keepdims=True)
    if np.any(total <= 0):
        raise InputError("The viewing cone lies wholly below the surface at some viewing angle; "
                         "lower the angle or the NA.")
    return np.minimum(theta, _GRAZING_DEG), weights / total


def cone_reflectance(stack: Stack, wavelength_nm, view_deg=0.0, na: float = 0.0,
                     polarization: str = "unpolarized", quantity: str = "reflectance") -> np.ndarray:
    """R (or T) averaged over a viewing cone; shape ``shape(view_deg) + shape(wavelength_nm)``."""
    view = np.asarray(view_deg, dtype=float)
    wl = np.asarray(wavelength_nm, dtype=float)
    n0 = float(np.real(stack.ambient.nk(np.atleast_1d(wl)).min())) if wl.size else 1.0
    angles, weights = cone_rays(view, na, n0)
    uniq, inverse = np.unique(angles, return_inverse=True)
    if quantity == "reflectance":
        vals = stack.reflectance(wl.ravel(), uniq, polarization)
    elif quantity == "transmittance":
        vals = stack.transmittance(wl.ravel(), uniq, polarization)
    else:
        raise InputError(f"quantity must be 'reflectance' or 'transmittance'; got {quantity!r}.")
    per_ray = vals[inverse.reshape(angles.shape)]                       # (A, K, W)
    out = np.einsum("ak,akw->aw", weights, per_ray)
    return out.reshape(view.shape + wl.shape)


def _cone_matrix(view_deg: np.ndarray, na: float, n0: float):
    """(grid angles G, matrix (A, G)) that maps R on an angle grid to cone-averaged R per view angle."""
    angles, weights = cone_rays(view_deg, na, n0)
    lo, hi = float(angles[weights > 0].min()), float(angles[weights > 0].max())
    n_grid = max(2, int(np.ceil((hi - lo) / _CONE_GRID_STEP_DEG)) + 1)
    grid = np.linspace(lo, hi, n_grid)
    pos = np.interp(angles, grid, np.arange(n_grid))
    i0 = np.clip(np.floor(pos).astype(int), 0, n_grid - 2)
    f = pos - i0
    M = np.zeros((view_deg.size, n_grid))
    rows = np.repeat(np.arange(view_deg.size), angles.shape[1])
    np.add.at(M, (rows, i0.ravel()), (weights * (1 - f)).ravel())
    np.add.at(M, (rows, i0.ravel() + 1), (weights * f).ravel())
    return grid, M


@dataclass(frozen=True)
class ColorMap:
    """Colours over a (thickness, angle) grid. Arrays are ordered (thickness, angle, ...).

    Attributes
    ----------
    thickness_nm : (T,)   angle_deg : (A,)   wavelength_nm : (W,)
    xyz, lab, rgb : (T, A, 3)  CIE XYZ (Y = 1 perfect reflector, before brightness scaling),
        CIELAB (after scaling) and display sRGB 0..1 (after scaling).
    out_of_gamut : (T, A) bool
    scale : float  brightness factor applied (1 for absolute; 1/Y_max for normalized).
    """

    thickness_nm: np.ndarray
    angle_deg: np.ndarray
    wavelength_nm: np.ndarray
    xyz: np.ndarray
    lab: np.ndarray
    rgb: np.ndarray
    out_of_gamut: np.ndarray
    scale: float


BRIGHTNESS = ("absolute", "normalized")


def _scale_for(xyz, brightness):
    if brightness not in BRIGHTNESS:
        raise InputError(f"brightness must be 'absolute' or 'normalized'; got {brightness!r}.")
    if brightness == "absolute":
        return 1.0
    ymax = float(xyz[..., 1].max()) if xyz.size else 0.0
    return 1.0 / ymax if ymax > 0 else 1.0


def scaled_colors(xyz, illuminant="D65", observer="2", scale: float = 1.0):
    """Display sRGB (0..1), CIELAB and the out-of-gamut flag of XYZ times a brightness ``scale``.

    Returns
    -------
    (rgb, lab, out_of_gamut) : (..., 3), (..., 3), (...)
    """
    lin = _linear_srgb(xyz * scale, illuminant, observer)
    oog = np.any((lin < -GAMUT_TOLERANCE) | (lin > 1 + GAMUT_TOLERANCE), axis=-1)
    np.clip(lin, 0.0, 1.0, out=lin)
    # IEC 61966-2-1 encoding (checked against colour-science in tests/test_color.py)
    rgb = np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * np.power(lin, 1 / 2.4) - 0.055)
    return rgb, xyz_to_lab(xyz * scale, illuminant, observer), oog


def color_map(stack: Stack, layer: int, thickness_nm, angle_deg, wavelength_nm=None, *,
              illuminant="D65", observer="2", polarization="unpolarized", na: float = 0.0,
              brightness: str = "absolute") -> ColorMap:
    """Colour seen for each (thickness of one layer, viewing angle).

    Parameters
    ----------
    stack : Stack
    layer : int
        Swept layer, 0 = top.
    thickness_nm : array_like (T,)
    angle_deg : array_like (A,)
        Viewing angles, degrees, 0 <= angle < 90.
    wavelength_nm : array_like (W,), optional
        Default: adaptive. Thicknesses whose fringes the :func:`colour_band_nm` grid (380-780 nm at
        5 nm, cut to the materials' data) resolves use it; thicker ones are integrated on wavenumber
        grids with :func:`samples_per_fringe` samples per fringe (see :func:`fringe_path_nm`), so the
        colour converges toward the fringe-averaged (incoherent) limit instead of aliasing. The map's
        ``wavelength_nm`` is then the base grid.
    illuminant, observer : see :func:`physics.spectrum_to_xyz`.
    polarization : {"s", "p", "unpolarized"}
    na : float
        Viewing-cone numerical aperture (0 = a single direction).
    brightness : {"absolute", "normalized"}
        "normalized" scales so the brightest colour of the map is display white.

    Returns
    -------
    ColorMap
    """
    ang = np.atleast_1d(require_finite("angle_deg", angle_deg, minimum=0.0, maximum=MAX_ANGLE_DEG,
                                       max_inclusive=False, unit="deg")).ravel()
    d = np.atleast_1d(np.asarray(thickness_nm, dtype=float)).ravel()
    if wavelength_nm is None:
        wl = colour_band_nm(stack)
        groups = _thickness_groups(stack, layer, d, wl, samples_per_fringe(illuminant))
    else:
        wl = np.asarray(wavelength_nm, dtype=float)
        groups = [(np.arange(d.size), wl)]
    xyz = np.empty((d.size, ang.size, 3))
    for rows, wl_g in groups:
        piece = max(1, _MAP_PIECE_POINTS // max(1, ang.size * wl_g.size))
        for start in range(0, rows.size, piece):
            r = rows[start:start + piece]
            R = _map_reflectance(stack, layer, d[r], ang, wl_g, polarization, na)
            xyz[r] = spectrum_to_xyz(R, wl_g, illuminant, observer)
    scale = _scale_for(xyz, brightness)
    rgb, lab, oog = scaled_colors(xyz, illuminant, observer, scale)
    return ColorMap(d, ang, wl, xyz, lab, rgb, oog, scale)


def _map_reflectance(stack, layer, d, ang, wl, polarization, na):
    """R (T, A, W) of the swept layer over thickness × viewing angle, averaged over the cone when na > 0."""
    if na and na > 0:
        n0 = float(stack.ambient.nk(wl).real.min())
        grid, M = _cone_matrix(ang, na, n0)
        R_grid = sweep(stack, layer, d, grid, wl, polarization)          # (T, G, W)
        return np.einsum("ag,tgw->taw", M, R_grid)
    return sweep(stack, layer, d, ang, wl, polarization)                 # (T, A, W)


@dataclass(frozen=True)
class PointColor:
    """The colour at one (thickness, angle): XYZ (unscaled), CIELAB, sRGB, xy, gamut flag."""

    xyz: np.ndarray
    lab: np.ndarray
    rgb: np.ndarray
    xy: tuple
    out_of_gamut: bool


def point_color(R, wavelength_nm, *, illuminant="D65", observer="2", scale: float = 1.0) -> PointColor:
    """Colour of one spectrum ``R`` (W,), with a brightness factor ``scale``."""
    xyz = spectrum_to_xyz(R, wavelength_nm, illuminant, observer)
    rgb, lab, oog = scaled_colors(xyz, illuminant, observer, scale)
    s = float(xyz.sum())
    xy = (float(xyz[0] / s), float(xyz[1] / s)) if s > 0 else (float("nan"), float("nan"))
    return PointColor(xyz, lab, rgb, xy, bool(oog))


def interference_order(stack: Stack, layer: int, thickness_nm, angle_deg=0.0,
                       wavelength_nm: float = ORDER_WAVELENGTH_NM) -> np.ndarray:
    """Round-trip optical path in the layer in waves, OPD/λ₀ = 2 d Re(N cos θ)/λ₀; shape of thickness_nm.

    The fringe order of a colour is ``floor(value) + 1``.
    """
    _check_layer_index(stack, layer)
    d = require_finite("thickness_nm", thickness_nm, minimum=0.0, unit="nm")
    kz = _Optics(stack, np.array([float(wavelength_nm)]), np.array([float(angle_deg)])).kz[layer + 1, 0, 0]
    return 2.0 * d * kz.real / wavelength_nm


def order_thicknesses_nm(stack: Stack, layer: int, angle_deg: float, thickness_max_nm: float,
                         wavelength_nm: float = ORDER_WAVELENGTH_NM) -> np.ndarray:
    """Thicknesses (nm) where the round-trip path is a whole number m = 1, 2, ... of λ₀, up to the maximum."""
    per_wave = 1.0 / float(interference_order(stack, layer, 1.0, angle_deg, wavelength_nm))
    m = np.arange(1, int(thickness_max_nm / per_wave) + 1)
    return m * per_wave



def scaled_stack(stack: Stack, factors) -> Stack:
    """A copy of ``stack`` with each layer's thickness times its factor (one factor, or one per layer)."""
    f = np.broadcast_to(np.asarray(factors, dtype=float), (len(stack.layers),))
    if np.any(~np.isfinite(f)) or np.any(f < 0):
        raise InputError("Thickness factors must be finite and >= 0.")
    layers = [Layer(l.material, l.thickness_nm * float(k)) for l, k in zip(stack.layers, f)]
    return Stack(layers, stack.substrate, stack.ambient, stack.substrate_thickness_mm)


def band_average(stack: Stack, band_nm, angle_deg: float = 0.0, na: float = 0.0,
                 polarization: str = "unpolarized") -> tuple[float, float]:
    """Mean reflectance and transmittance (fractions) over a wavelength band, each wavelength weighted equally.

    Sampled every 1 nm, or finer where the stack's fringes need it (SMOOTH_SAMPLES_PER_FRINGE per fringe:
    the weight is flat),
    averaged by the trapezoid rule.

    Parameters
    ----------
    band_nm : (lo, hi) in nm, lo < hi, inside the materials' data.
    """
    lo, hi = (float(x) for x in band_nm)
    if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= lo:
        raise InputError(f"A band is two wavelengths lo < hi in nm; got {lo:g}-{hi:g}.")
    data_lo, data_hi = stack.wavelength_range_nm()
    if lo < data_lo or hi > data_hi:
        raise WavelengthRangeError(f"The band {lo:g}-{hi:g} nm leaves the materials' data ({data_lo:g}-"
                                   f"{data_hi:g} nm); choose a band inside it.")
    wl = np.linspace(lo, hi, 64)
    path = float(np.max(_fringe_paths(stack, wl)))
    step = min(1.0, lo * lo / path / SMOOTH_SAMPLES_PER_FRINGE) if path > 0 else 1.0
    n = int(min(max(np.ceil((hi - lo) / step) + 1, 2), MAX_COLOUR_SAMPLES))
    wl = np.linspace(lo, hi, n)
    R = cone_reflectance(stack, wl, angle_deg, na, polarization)
    T = cone_reflectance(stack, wl, angle_deg, na, polarization, "transmittance")
    return (float(np.trapezoid(R, wl) / (hi - lo)), float(np.trapezoid(T, wl) / (hi - lo)))


#: Most trials of a tolerance run (bounds its time: about a millisecond each for a thin stack).
MAX_TOLERANCE_TRIALS = 2000
#: Most wavelength × ray × interface evaluations of one tolerance run (about 9 s on one core of this machine,
#: measured: 7.8 million take 0.7 s): bounds the time a
#: run from a page may hold a worker thread.
MAX_TOLERANCE_WORK = 100_000_000
#: Largest thickness tolerance accepted, ± % of each layer.
MAX_TOLERANCE_PCT = 50.0


@dataclass(frozen=True)
class ToleranceResult:
    """Colours of a stack whose layer thicknesses each vary at random within ± ``tolerance_pct``.

    Arrays run over trials: ``factors`` (N, layers), ``lab`` and ``rgb`` (N, 3), ``delta_e`` (N,) CIEDE2000
    from the nominal colour, ``luminous`` (N,) luminous reflectance (D65, V(λ)) as fractions;
    ``lab_absolute`` (N, 3) CIELAB at absolute brightness (a perfect mirror is white), the scale on which
    a coating's reflex colour (a*, b*) is specified.
    """

    tolerance_pct: float
    seed: int
    factors: np.ndarray
    lab: np.ndarray
    rgb: np.ndarray
    delta_e: np.ndarray
    luminous: np.ndarray
    nominal_lab: np.ndarray
    nominal_luminous: float
    lab_absolute: np.ndarray | None = None


def tolerance_run(stack: Stack, tolerance_pct: float, trials: int = 200, seed: int = 1, *, angle_deg: float = 0.0,
                  na: float = 0.0, polarization: str = "unpolarized", illuminant="D65", observer="2",
                  scale: float = 1.0) -> ToleranceResult:
    """Monte-Carlo tolerance run: every layer's thickness times 1 + u·tolerance/100, u uniform in [-1, 1],
    drawn independently per layer and trial from a generator seeded with ``seed`` (the same run every time).

    ``scale`` is the brightness factor of the colours (as on the page); ΔE00 is taken at that brightness.

    References
    ----------
    CIE 142-2001 (CIEDE2000); ISO 13666:2019 (luminous reflectance).
    """
    tol = float(require_finite("tolerance_pct", tolerance_pct, minimum=0.0, maximum=MAX_TOLERANCE_PCT, unit="%"))
    if not isinstance(trials, (int, np.integer)) or not 1 <= trials <= MAX_TOLERANCE_TRIALS:
        raise InputError(f"trials is a whole number from 1 to {MAX_TOLERANCE_TRIALS}; got {trials!r}.")
    if not stack.layers:
        raise InputError("The stack has no layers to vary; add a layer first.")
    rng = np.random.default_rng(int(seed))
    factors = 1.0 + tol / 100.0 * rng.uniform(-1.0, 1.0, (int(trials), len(stack.layers)))
    wl = colour_wavelengths_nm(scaled_stack(stack, 1.0 + tol / 100.0), illuminant=illuminant)
    n0 = float(np.real(stack.ambient.nk(wl).min()))
    rays = cone_rays(angle_deg, na, n0)[0].shape[1]
    work = int(trials) * wl.size * rays * (len(stack.layers) + 1)
    if work > MAX_TOLERANCE_WORK:
        raise InputError(f"This tolerance run needs {work:,} evaluations ({int(trials)} trials x {wl.size} wavelengths x "
                         f"{rays} rays of the viewing cone x {len(stack.layers) + 1} interfaces); at most "
                         f"{MAX_TOLERANCE_WORK:,} are allowed. Use fewer trials or a smaller viewing-cone NA.")
    R0 = cone_reflectance(stack, wl, angle_deg, na, polarization)
    R = np.stack([cone_reflectance(scaled_stack(stack, f), wl, angle_deg, na, polarization) for f in factors])
    xyz0 = spectrum_to_xyz(R0, wl, illuminant, observer)
    xyz = spectrum_to_xyz(R, wl, illuminant, observer)
    _, lab0, _ = scaled_colors(xyz0, illuminant, observer, scale)
    rgb, lab, _ = scaled_colors(xyz, illuminant, observer, scale)
    return ToleranceResult(tol, int(seed), factors, lab, rgb, delta_e_2000(lab, lab0[None, :]),
                           luminous_reflectance(R, wl), lab0, float(luminous_reflectance(R0, wl)),
                           xyz_to_lab(xyz, illuminant, observer))
