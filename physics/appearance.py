"""What an observer sees from a stack: colour over thickness and viewing angle, a viewing cone, fringe orders.

A microscope objective or a loupe collects light over a cone of directions of
numerical aperture NA = n₀ sin α_max around the viewing direction. The colour
seen is the average reflectance over that cone. With the pupil uniformly filled
(Köhler illumination, common practice for inspection microscopes) each ray's
weight is proportional to its projected solid angle, sin α cos α dα dφ. A ray at
cone angle α and azimuth φ around a viewing direction tilted by θᵥ meets the
sample at the incidence angle

    cos θ = cos θᵥ cos α + sin θᵥ sin α cos φ

(spherical law of cosines). Rays past grazing (θ > 89.9°) are dropped: the average
runs over the kept part of the pupil only. The rule (:func:`cone_rays`) is Gauss-Legendre
in u = sin²α, where the weight is uniform, times the periodic midpoint rule in φ, with
as many nodes as the cone's width and the fringes its layers sweep across it need
(converged to 1e-4 in R for films up to 5 µm at NA 0.95). With a cone, polarization
"s" and "p" refer to each ray's own plane of incidence; a real linear polarizer and
analyzer are modelled in the lab frame (``polarizer_deg``, ``analyzer_deg`` of
:func:`cone_reflectance`), each ray's field carried by an ideal aplanatic lens and
resolved on its own s and p. The NA may reach MAX_NA in a gas and
IMMERSION_NA_FRACTION of the ambient's index in an immersion liquid (:func:`max_na`).
Where an immersion ambient is denser than a layer, R has a kink at the critical angle
and the average converges more slowly than the 1e-4 above.

Fringe order: the optical path difference of one round trip in the swept layer,
OPD = 2 d Re(N cos θ_layer), in units of a reference wavelength; a colour of
order m lies between OPD/λ₀ = m − 1 and m (interface phase shifts not counted).

References
----------
M. Born and E. Wolf, Principles of Optics, 7th ed., sec. 8.5 (image-forming
pencils and numerical aperture); sec. 7.6 (fringes of equal thickness).
B. Richards and E. Wolf, Proc. R. Soc. A 253, 358 (1959) (fields through an aplanatic lens).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from .color import (spectrum_to_xyz, xyz_to_lab, _illuminant_values, _linear_srgb, GAMUT_TOLERANCE, delta_e_2000,
                    luminous_reflectance)
from .errors import InputError, WavelengthRangeError, require_finite
from .stack import MAX_ANGLE_DEG, Layer, Stack, _Optics, sweep, _check_layer_index, _abs2

__all__ = ["ColorMap", "color_map", "colour_wavelengths_nm", "fringe_path_nm", "colour_map_points", "SAMPLES_PER_FRINGE", "samples_per_fringe", "cone_rays", "cone_reflectance", "interference_order",
           "order_thicknesses_nm", "colour_band_nm", "DEFAULT_BAND_NM", "MAX_NA", "point_color",
           "scaled_colors", "PointColor", "BRIGHTNESS", "band_average", "scaled_stack", "tolerance_run",
           "ToleranceResult", "MAX_TOLERANCE_TRIALS", "MAX_TOLERANCE_PCT", "max_na", "DRY_INDEX_MAX",
           "IMMERSION_NA_FRACTION", "MAX_OFFERED_NA", "ambient_index", "check_na_for"]

#: The colour band used by default: CIE tables are significant from 380 to 780 nm.
DEFAULT_BAND_NM = (380.0, 780.0)
#: Reference wavelength for fringe orders: near the peak of the eye's sensitivity.
ORDER_WAVELENGTH_NM = 550.0
#: Largest numerical aperture of a dry objective (the ambient a gas): dry objectives stop near 0.95.
MAX_NA = 0.95
#: Ambient indices up to this count as a gas (air is 1.00028 near 1 atm): the dry cap MAX_NA applies.
DRY_INDEX_MAX = 1.01
#: Largest NA a stack file or the page offers: oil-immersion objectives (1.4-1.45 are the usual ones,
#: common practice); whether a given NA is possible depends on the ambient (:func:`max_na`).
MAX_OFFERED_NA = 1.45
#: In a liquid or solid ambient the NA may reach this fraction of its index (a half-angle of 78.5°):
#: water-immersion objectives reach NA 1.2-1.27 in n = 1.333, oil 1.4-1.49 in n = 1.515 (common practice).
IMMERSION_NA_FRACTION = 0.98
#: Below this NA the cone is one ray: its solid-angle weights would underflow, and the colour
#: differs from a single ray by far less than any display can show.
MIN_NA = 1e-6
#: Largest incidence angle kept on a cone's grid (90° is grazing and never seen).
_GRAZING_DEG = 89.9
#: Fewest Gauss-Legendre nodes across the cone's radius, and of the midpoint rule around half its rim
#: (6 integrate the lab-frame polarization terms, harmonics up to cos 4φ, exactly).
_CONE_MIN_RADIAL, _CONE_MIN_AZIMUTH = 6, 6
#: One more node each way per this many degrees of the cone's half-angle: the bare Fresnel curves' own
#: variation across a wide cone (tests/test_cone.py converges to 1e-4 on bare and coated silicon).
_CONE_DEG_PER_NODE = 6.0
#: Nodes per fringe the stack's layers sweep across the cone (radially) and around its rim (half of it):
#: Gauss-Legendre and the periodic rule resolve an oscillation of 2π·F in about πF nodes; the Airy sum's
#: harmonics, sharp near grazing where the top face reflects nearly all, and the 1e-4 goal take a margin
#: (tests/test_cone.py: 5 µm films at NA 0.95).
_CONE_RADIAL_PER_FRINGE, _CONE_AZIMUTH_PER_FRINGE = 6.0, 10.0
#: Most nodes each way (a 100 µm layer would ask for thousands; the average is then near the incoherent
#: limit, reached to well under a colour step with this many).
_CONE_MAX_RADIAL, _CONE_MAX_AZIMUTH = 256, 256
#: Most rays of one view's (half) cone: bounds a colour map's cone matrix (91 views x this x a few arrays of
#: 8 bytes, about 100 MB) for layers of tens of µm; a 5 µm film at NA 0.95 needs about 11,000.
_CONE_MAX_RAYS = 16_384
#: Most ray x wavelength evaluations of one view in :func:`cone_reflectance` (about 1 s on one core for a
#: single layer): a thick layer's colour wants thousands of wavelengths, and its cone, then averaging over
#: many fringes in angle and in wavelength, fewer rays (81 wavelengths are never limited).
_CONE_MAX_WORK = 1 << 22
#: Elements (angles x wavelengths) evaluated at once by :func:`cone_reflectance` (bounds its memory).
_CONE_CHUNK = 1 << 20
#: Wavelengths the fringe count across a cone is probed at (it is smooth in λ; the blue end is included).
_FRINGE_PROBE_WAVELENGTHS = 9
#: Below this sine a ray counts as normal to the sample (its plane of incidence is undefined: any ŝ serves).
_NORMAL_RAY_SINE = 1e-12
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
#: Fewest points of the cos θ grid on which a cone-averaged map is interpolated (the bare Fresnel curves).
_GRID_MIN_POINTS = 24
#: Points of that grid per fringe of the map's thickest row across it: cubic interpolation errs by
#: about 0.02 (2π/n)⁴ of a fringe's swing, 1e-4 of it at 16 points.
_GRID_POINTS_PER_FRINGE = 16
#: Most points of that grid (bounds the map's memory for layers of tens of µm).
_GRID_MAX_POINTS = 4096
#: Smallest span of cos θ the grid covers (a cone of one ray, or a map of one angle).
_GRID_MIN_SPAN = 1e-6


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


def colour_map_points(stack: Stack, layer: int, thickness_nm, n_angle: int, illuminant=None, *,
                      na: float = 0.0) -> int:
    """Grid points (thickness × angle × wavelength) an adaptive :func:`color_map` evaluates; with a viewing
    cone (``na``) each row is evaluated on the cone's angle grid when that is the larger (thick layers)."""
    base = colour_band_nm(stack)
    d = np.atleast_1d(np.asarray(thickness_nm, dtype=float))
    groups = _thickness_groups(stack, layer, d, base, samples_per_fringe(illuminant))
    total = 0
    for rows, w in groups:
        angles = n_angle
        if na and na >= MIN_NA and rows.size:
            n0 = float(stack.ambient.nk(w).real.min())
            thick = stack.with_thickness(layer, float(d[rows].max()))
            angles = max(n_angle, _grid_points(thick, w, 0.0, _GRAZING_DEG, n0))
        total += angles * w.size * rows.size
    return int(total)


def _grid_points(stack, wavelength_nm, theta_lo_deg: float, theta_hi_deg: float, n0: float) -> int:
    """Points of a cone-averaged map's cos θ grid between two incidence angles (see :func:`_cone_matrix`)."""
    fringes = float(_cone_path_fringes(stack, wavelength_nm, theta_lo_deg, theta_hi_deg, n0)[0]) if stack else 0.0
    return int(min(_GRID_MIN_POINTS + np.ceil(_GRID_POINTS_PER_FRINGE * fringes), _GRID_MAX_POINTS))


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


def max_na(ambient_n: float) -> float:
    """Largest viewing-cone NA accepted in an ambient of index ``ambient_n``.

    A gas (n₀ <= DRY_INDEX_MAX: a dry objective) allows MAX_NA; a liquid or solid immersion allows
    IMMERSION_NA_FRACTION·n₀, which keeps the cone's half-angle below about 79° (water n₀ = 1.333 allows
    1.306: water-immersion objectives reach 1.2-1.27; oil n₀ = 1.515 allows 1.485: oil objectives
    reach 1.4-1.49, common practice).
    """
    n0 = float(ambient_n)
    return MAX_NA if n0 <= DRY_INDEX_MAX else IMMERSION_NA_FRACTION * n0


def ambient_index(stack: Stack) -> float:
    """Lowest real index of the stack's ambient over the colour band (380-780 nm, cut to its data)."""
    lo, hi = DEFAULT_BAND_NM
    if stack.ambient.range_nm is not None:
        lo, hi = max(lo, stack.ambient.range_nm[0]), min(hi, stack.ambient.range_nm[1])
    wl = np.linspace(lo, hi, 41) if hi > lo else np.array([float(stack.ambient.range_nm[0])])
    return float(np.real(stack.ambient.nk(wl)).min())


def check_na_for(stack: Stack, na) -> float:
    """``na`` as a float after checking it is possible in the stack's ambient (InputError otherwise)."""
    return _check_na(na, ambient_index(stack))


def _check_na(na, ambient_n: float) -> float:
    """``na`` as a float after checking it against :func:`max_na` of the ambient."""
    value = float(require_finite("na", na, minimum=0.0))
    limit = max_na(ambient_n)
    if value > limit:
        where = ("in a gas (a dry objective)" if float(ambient_n) <= DRY_INDEX_MAX else
                 f"in a liquid or solid, {IMMERSION_NA_FRACTION:g} of n₀, since NA = n₀ sin α never reaches n₀")
        raise InputError(f"NA = {value:g} is too large for an ambient of index n₀ = {float(ambient_n):.5g}: the "
                         f"largest NA accepted {where} is {limit:.3g}. Lower the NA, or choose an immersion "
                         "ambient (water, oil) of higher index.")
    return value


@dataclass(frozen=True)
class _Cone:
    """The rays of a viewing cone: half of it (the other half is the mirror image in the plane of tilt).

    alpha, phi : (A, K) cone angle and azimuth (radians) of each ray about the viewing direction
        (φ = 0 leans toward the normal).
    cos_theta, theta_deg, weights : (A, K) the incidence angle's cosine, the angle in degrees, and the
        weights (summing to 1 along K; padding rays weigh 0).
    view_deg : (A,)
    """

    alpha: np.ndarray
    phi: np.ndarray
    cos_theta: np.ndarray
    theta_deg: np.ndarray
    weights: np.ndarray
    view_deg: np.ndarray

    @property
    def direction(self) -> np.ndarray:
        """(A, K, 3) unit vectors of the observed rays, from the sample toward the observer, in the lab
        frame (x along the plane of tilt, toward the viewing direction; z the sample normal):
        cos α v + sin α (cos φ a + sin φ ŷ), v = (sin θᵥ, 0, cos θᵥ), a = (−cos θᵥ, 0, sin θᵥ)."""
        tv = np.radians(self.view_deg)[:, None]
        sa, ca, cp = np.sin(self.alpha), np.cos(self.alpha), np.cos(self.phi)
        return np.stack([ca * np.sin(tv) - sa * cp * np.cos(tv), sa * np.sin(self.phi),
                         ca * np.cos(tv) + sa * cp * np.sin(tv)], axis=-1)


def _cone_path_fringes(stack, wavelength_nm, theta_lo_deg, theta_hi_deg, n0: float):
    """Fringes the stack's coherent layers sweep between two incidence angles: max over wavelength of
    Σ 2 d_i |Re kz_i(θ_lo) − Re kz_i(θ_hi)| / λ, kz_i = sqrt(N_i² − n₀² sin²θ). Shapes of the angles.

    Layers whose round trip attenuates by more than e^-9 (see :func:`_fringe_paths`) show no fringes and
    are not counted.
    """
    lo = np.atleast_1d(np.asarray(theta_lo_deg, dtype=float))
    hi = np.atleast_1d(np.asarray(theta_hi_deg, dtype=float))
    if stack is None or not stack.layers:
        return np.zeros(lo.shape)
    wl = np.atleast_1d(np.asarray(wavelength_nm, dtype=float)).ravel()
    if wl.size > _FRINGE_PROBE_WAVELENGTHS:       # the count is smooth in λ: a few wavelengths bound it
        wl = np.unique(np.concatenate([wl[:1], np.quantile(wl, np.linspace(0, 1, _FRINGE_PROBE_WAVELENGTHS))]))
    b_lo = (n0 * np.sin(np.radians(lo)))[..., None] ** 2
    b_hi = (n0 * np.sin(np.radians(hi)))[..., None] ** 2
    total = np.zeros(lo.shape + wl.shape)
    for l in stack.layers:
        N = l.material.nk(wl)
        if l.thickness_nm == 0:
            continue
        seen = 4 * np.pi * N.imag * l.thickness_nm / wl <= _FRINGE_ATTENUATION
        dk = np.abs(np.sqrt(N * N - b_lo).real - np.sqrt(N * N - b_hi).real)
        total += 2.0 * l.thickness_nm * dk * seen / wl
    return total.max(axis=-1)


def _cone_fringes(stack, wavelength_nm, view_deg: np.ndarray, na: float, n0: float):
    """(radial, azimuthal) fringe counts across each view's cone: over the whole kept cone, and around its rim."""
    amax = np.degrees(np.arcsin(min(na / n0, 1.0)))
    hi = np.minimum(view_deg + amax, _GRAZING_DEG)
    rim_lo = np.minimum(np.abs(view_deg - amax), hi)
    return (_cone_path_fringes(stack, wavelength_nm, np.maximum(view_deg - amax, 0.0), hi, n0),
            _cone_path_fringes(stack, wavelength_nm, rim_lo, hi, n0))


def _node_count(base: int, fringes: float, per_fringe: float, largest: int) -> int:
    return int(min(base + np.ceil(per_fringe * float(fringes)), largest))


@functools.lru_cache(maxsize=max(_CONE_MAX_RADIAL, _CONE_MAX_AZIMUTH))
def _gauss_legendre(n: int):
    """Gauss-Legendre nodes and weights on [-1, 1] (cached: every count the cone may ask for fits)."""
    x, w = np.polynomial.legendre.leggauss(n)
    x.setflags(write=False)
    w.setflags(write=False)
    return x, w


def _cone_of_view(view_rad: float, rho_max: float, n_rad: int, n_az: int):
    """Nodes (alpha, phi) and weights of one view's half cone (phi in [0, π]); see :func:`_cone`."""
    graze = np.radians(_GRAZING_DEG)
    a_full = graze - view_rad                 # rings of cone angle below this lie wholly above grazing
    a_none = view_rad - graze                 # rings below this lie wholly below it (views past 89.9°)
    rho_full = np.sin(np.clip(a_full, 0.0, np.pi / 2))
    rho_none = np.sin(np.clip(a_none, 0.0, np.pi / 2))
    u_full, u_none, u_max = rho_full ** 2, rho_none ** 2, rho_max ** 2
    xr, wr = _gauss_legendre(n_rad)
    parts = []
    if a_full > 0:
        # whole rings: Gauss-Legendre in u = sin²α, in which the projected solid angle ρ dρ dφ = du dφ/2 is
        # uniform (and each layer's phase, through sqrt(N² − n₀² sin²θ), nearly linear), and the midpoint
        # (periodic trapezoid) rule in φ, spectrally accurate for the ring's periodic integrand
        top = min(u_full, u_max)
        u = 0.5 * top * (xr + 1)
        w_u = 0.5 * top * wr
        phi = (np.arange(n_az) + 0.5) * np.pi / n_az
        parts.append((np.repeat(u, n_az), np.tile(phi, n_rad), np.repeat(w_u, n_az) * (np.pi / n_az)))
    start = max(u_full if a_full > 0 else 0.0, u_none)
    if u_max > start:
        # cut rings: φ from 0 to where the ray reaches grazing, φ_max = arccos((cos 89.9° − cos θᵥ cos α)/(sin θᵥ sin α)),
        # which departs from π (or 0) like a square root: u = start + L t² makes the integrand smooth in t
        length = u_max - start
        t = 0.5 * (xr + 1)
        u = start + length * t * t
        w_u = 0.5 * wr * 2.0 * length * t
        alpha = np.arcsin(np.sqrt(u))
        with np.errstate(divide="ignore", invalid="ignore"):
            x = (np.cos(graze) - np.cos(view_rad) * np.cos(alpha)) / (np.sin(view_rad) * np.sin(alpha))
        phi_max = np.arccos(np.clip(np.nan_to_num(x, nan=1.0), -1.0, 1.0))
        xa, wa = _gauss_legendre(n_az)
        phi = 0.5 * phi_max[:, None] * (xa[None, :] + 1)
        w = w_u[:, None] * 0.5 * phi_max[:, None] * wa[None, :]
        parts.append((np.repeat(u, n_az), phi.ravel(), w.ravel()))
    if not parts:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    u, phi, w = (np.concatenate(p) for p in zip(*parts))
    return np.arcsin(np.sqrt(u)), phi, w


def _cone(view_deg, na: float, ambient_n: float, stack=None, wavelength_nm=None,
          max_rays: int = _CONE_MAX_RAYS) -> _Cone:
    """The viewing cone's rays, as many as the cone's width and the stack's fringes across it need, at most
    ``max_rays`` per view (both node counts then shrink by the same factor)."""
    view = np.atleast_1d(require_finite("angle_deg", view_deg, minimum=0.0, maximum=MAX_ANGLE_DEG,
                                        max_inclusive=False, unit="deg")).ravel()
    na = _check_na(na, ambient_n)
    if na < MIN_NA:                     # narrower than any real aperture: one ray (and no weight underflow)
        zero = np.zeros((view.size, 1))
        return _Cone(zero, zero, np.cos(np.radians(view))[:, None], view[:, None].copy(), zero + 1.0, view)
    rho_max = na / ambient_n
    if stack is not None and wavelength_nm is None:
        raise InputError("A stack-driven cone needs the wavelengths (nm) it is evaluated at.")
    f_rad, f_az = _cone_fringes(stack, wavelength_nm, view, na, ambient_n)
    width = np.degrees(np.arcsin(rho_max)) / _CONE_DEG_PER_NODE   # the bare Fresnel curves' own variation
    cones = []
    for i, v in enumerate(view):
        n_rad = _node_count(_CONE_MIN_RADIAL + int(np.ceil(width)), f_rad[i], _CONE_RADIAL_PER_FRINGE,
                            _CONE_MAX_RADIAL)
        n_az = _node_count(_CONE_MIN_AZIMUTH + int(np.ceil(width * np.sin(np.radians(v)))), f_az[i],
                           _CONE_AZIMUTH_PER_FRINGE, _CONE_MAX_AZIMUTH)
        if n_rad * n_az > max_rays:
            shrink = np.sqrt(max_rays / (n_rad * n_az))
            n_rad = max(_CONE_MIN_RADIAL, int(n_rad * shrink))
            n_az = max(_CONE_MIN_AZIMUTH, int(n_az * shrink))
        cones.append(_cone_of_view(float(np.radians(v)), rho_max, n_rad, n_az))
    if any(c[0].size == 0 for c in cones):
        raise InputError("The viewing cone lies wholly below the surface at some viewing angle; "
                         "lower the angle or the NA.")
    K = max(c[0].size for c in cones)
    alpha, phi, w = (np.zeros((view.size, K)) for _ in range(3))
    for i, (a, p, ww) in enumerate(cones):
        # padding repeats the view's first ray with weight 0 (no new incidence angle to evaluate)
        alpha[i], phi[i] = a[0], p[0]
        alpha[i, :a.size], phi[i, :a.size], w[i, :a.size] = a, p, ww
    w /= w.sum(axis=1, keepdims=True)
    tv = np.radians(view)[:, None]
    cos_t = np.clip(np.cos(tv) * np.cos(alpha) + np.sin(tv) * np.sin(alpha) * np.cos(phi), -1.0, 1.0)
    # the rule integrates only over rays above grazing: rays past 89.9° are dropped (weight 0), as the
    # eye never sees them; rounding may leave a kept ray a hair past the limit
    cos_t = np.maximum(cos_t, np.cos(np.radians(_GRAZING_DEG)))
    return _Cone(alpha, phi, cos_t, np.degrees(np.arccos(cos_t)), w, view)


def cone_rays(view_deg, na: float, ambient_n: float = 1.0, *, stack=None, wavelength_nm=None):
    """Incidence angles and weights of the rays in a viewing cone.

    The pupil is uniformly filled, so each ray weighs its projected solid angle, ρ dρ dφ with
    ρ = sin α the pupil radius: Gauss-Legendre in ρ and the periodic (midpoint) rule in the azimuth φ
    around the cone's axis. Where the cone reaches past grazing (89.9°) the rings are cut at grazing and
    integrated over their kept part only (those rays are dropped: weight 0), with ρ = ρ_c + L t² to absorb
    the square-root edge of the cut. The ray count grows with the cone's width and, given ``stack`` and
    ``wavelength_nm``, with the fringes its layers sweep across the cone (at least
    _CONE_RADIAL_PER_FRINGE and _CONE_AZIMUTH_PER_FRINGE nodes per fringe), so the average converges for thick films too.

    Parameters
    ----------
    view_deg : array_like, (A,)
        Viewing directions, degrees from the normal.
    na : float
        Numerical aperture n₀ sin α_max (0 = a single ray); at most :func:`max_na` of the ambient.
    ambient_n : float
        Index of the ambient (n₀).
    stack : Stack, optional
        The stack the cone is for: its layers' fringes set the ray count (None: a bare substrate).
    wavelength_nm : array_like, optional
        Wavelengths (nm) the cone is evaluated at (needed with ``stack``).

    Returns
    -------
    (angles, weights) : arrays (A, K) of incidence angles in degrees and weights
        summing to 1 along K; the rays cover half the cone (the other half is its mirror image in the
        plane of tilt, with the same angles); padding rays and dropped rays have weight 0.

    References
    ----------
    M. Born and E. Wolf, Principles of Optics, 7th ed., sec. 8.5 (pupil and numerical aperture);
    P. J. Davis and P. Rabinowitz, Methods of Numerical Integration, 2nd ed. (1984), secs. 2.7, 2.9
    (Gauss-Legendre; trapezoid rule for periodic integrands).
    """
    cone = _cone(view_deg, na, ambient_n, stack, wavelength_nm)
    return cone.theta_deg, cone.weights


def _rotate(a, b, x):
    """x turned by the rotation that takes unit vector a into unit vector b (about a × b; a·b > −1).

    Rodrigues' formula R = I + [w]ₓ + [w]ₓ²/(1 + a·b), w = a × b. Arrays (..., 3)."""
    w = np.cross(a, b)
    c = np.sum(a * b, axis=-1, keepdims=True)
    wx = np.cross(w, x)
    return x + wx + np.cross(w, wx) / (1.0 + c)


def _polarization_coefficients(cone: _Cone, polarizer_deg, analyzer_deg):
    """Weights (c_ss, c_pp, c_sp), each (A, 2K) over the full cone (the half cone, then its mirror image),
    of the detected power Σ c_ss |r_s|² + c_pp |r_p|² + c_sp Re(r_s r_p*) at each ray's incidence angle.

    Lab frame (stated in :func:`cone_reflectance`): the polarizer sits in the pupil of the illuminating
    cone, whose axis is the viewing direction mirrored in the normal, v' = (−sin θᵥ, 0, cos θᵥ); its
    transmission axis is P = cos ψ e' + sin ψ ŷ with e' = (cos θᵥ, 0, sin θᵥ) in the plane of tilt. The
    analyzer sits in the pupil of the viewing cone (axis v) at A = cos ψ_A e + sin ψ_A ŷ, e = (cos θᵥ, 0,
    −sin θᵥ), the mirror image of e' in the sample plane: an analyzer parallel to the polarizer passes all
    that a perfect mirror returns. An ideal aplanatic lens carries a pupil field onto each ray by the
    rotation that turns the lens axis into the ray (its meridional part stays meridional, its sagittal
    part is unchanged). Each ray's field is resolved on ŝ = ẑ × k̂/|ẑ × k̂| (common to the incident and
    reflected wave) and p̂ = ŝ × k̂ (each wave's own k̂), the basis of the amplitudes of
    :meth:`physics.Stack.reflection_amplitudes`. ``polarizer_deg`` None: unpolarized light (the mean of
    two crossed polarizers).

    References
    ----------
    B. Richards and E. Wolf, Proc. R. Soc. A 253, 358 (1959) (aplanatic lens); S. J. Byrnes,
    arXiv:1603.02720 (2016) (s, p amplitudes).
    """
    k_out = np.concatenate([cone.direction, cone.direction * np.array([1.0, -1.0, 1.0])], axis=1)  # (A, 2K, 3)
    w = np.concatenate([cone.weights, cone.weights], axis=1) * 0.5
    k_in = k_out * np.array([1.0, 1.0, -1.0])                  # the incident ray, travelling to the sample
    tv = np.radians(cone.view_deg)[:, None] * np.ones(w.shape)
    zero, one = np.zeros_like(tv), np.ones_like(tv)
    v = np.stack([np.sin(tv), zero, np.cos(tv)], axis=-1)      # viewing axis, sample to observer
    v_ill = v * np.array([-1.0, 1.0, 1.0])                     # illuminating axis, sample to lamp
    e = np.stack([np.cos(tv), zero, -np.sin(tv)], axis=-1)
    e_ill = e * np.array([1.0, 1.0, -1.0])
    y = np.stack([zero, one, zero], axis=-1)
    s_vec = np.cross(np.array([0.0, 0.0, 1.0]), k_out)
    s_len = np.linalg.norm(s_vec, axis=-1, keepdims=True)
    s_vec = np.where(s_len > _NORMAL_RAY_SINE, s_vec / np.maximum(s_len, _NORMAL_RAY_SINE), y)  # normal ray: any ŝ
    p_in = np.cross(s_vec, k_in)
    p_out = np.cross(s_vec, k_out)
    if analyzer_deg is not None:
        psi_a = np.radians(float(analyzer_deg))
        A = _rotate(v, k_out, np.cos(psi_a) * e + np.sin(psi_a) * y)
        a_s, a_p = np.sum(A * s_vec, axis=-1), np.sum(A * p_out, axis=-1)
    settings = ([float(polarizer_deg)] if polarizer_deg is not None
                else [0.0, 90.0])                              # unpolarized: two crossed polarizers, averaged
    c_ss = c_pp = c_sp = 0.0
    for psi in settings:
        psi = np.radians(psi)
        E = _rotate(-v_ill, k_in, np.cos(psi) * e_ill + np.sin(psi) * y)
        e_s, e_p = np.sum(E * s_vec, axis=-1), np.sum(E * p_in, axis=-1)
        if analyzer_deg is not None:
            e_s, e_p = e_s * a_s, e_p * a_p
            c_sp = c_sp + 2.0 * w * e_s * e_p / len(settings)
        c_ss = c_ss + w * e_s ** 2 / len(settings)
        c_pp = c_pp + w * e_p ** 2 / len(settings)
    return c_ss, c_pp, (c_sp if analyzer_deg is not None else None)


def _cone_sum(view_count: int, angles, weights):
    """(unique angles U, matrix (A, U)) that sums per-angle values with the rays' weights for each view."""
    uniq, inverse = np.unique(angles, return_inverse=True)
    rows = np.repeat(np.arange(view_count), angles.shape[1])
    M = np.bincount(rows * uniq.size + inverse.ravel(), weights=np.asarray(weights).ravel(),
                    minlength=view_count * uniq.size).reshape(view_count, uniq.size)
    return uniq, M


def _check_lab_frame(stack, polarization, quantity, polarizer_deg, analyzer_deg) -> bool:
    """Whether a lab-frame polarizer or analyzer is asked for, after checking it can be modelled."""
    if polarizer_deg is None and analyzer_deg is None:
        return False
    if polarization != "unpolarized":
        raise InputError(f"polarization={polarization!r} (each ray's own s or p) and a polarizer in the lab "
                         "frame exclude each other; with polarizer_deg or analyzer_deg give "
                         "polarization='unpolarized'.")
    for name, value in (("polarizer_deg", polarizer_deg), ("analyzer_deg", analyzer_deg)):
        if value is not None:
            require_finite(name, value, unit="deg")
    if analyzer_deg is not None and quantity == "transmittance":
        raise InputError("An analyzer is modelled in the reflected beam only; for transmittance give "
                         "polarizer_deg alone (the detected power of each ray's s and p parts).")
    if analyzer_deg is not None and stack.substrate_thickness_mm is not None:
        raise InputError("An analyzer needs the reflected amplitudes of a coherent stack; this stack's thick "
                         "substrate adds its back-face light in power. Give polarizer_deg alone, or make the "
                         "substrate semi-infinite.")
    return True


def cone_reflectance(stack: Stack, wavelength_nm, view_deg=0.0, na: float = 0.0,
                     polarization: str = "unpolarized", quantity: str = "reflectance", *,
                     polarizer_deg=None, analyzer_deg=None) -> np.ndarray:
    """R (or T) averaged over a viewing cone; shape ``shape(view_deg) + shape(wavelength_nm)``.

    The cone's rays are those of :func:`cone_rays` for this stack and these wavelengths (converged to
    about 1e-4 in R for NA <= 0.95, views <= 75° and films up to 5 µm; tests/test_cone.py).

    Parameters
    ----------
    polarization : {"s", "p", "unpolarized"}
        With ``polarizer_deg`` None: "s" and "p" are each ray's own s or p (as from a source whose
        polarization follows every ray's plane of incidence).
    polarizer_deg : float, optional
        A linear polarizer in the illuminating beam, its axis at this angle (degrees) to the plane of tilt
        (the plane of the normal and the viewing direction): 90° puts the field perpendicular to that
        plane (s at the cone's axis), 0° in it (p). Each ray's field is resolved on its own s and p
        (see :func:`_polarization_coefficients` for the lab frame and the lens model). Then
        ``polarization`` must be "unpolarized".
    analyzer_deg : float, optional
        A linear analyzer in the viewing beam, at this angle to the plane of tilt, measured so that
        analyzer = polarizer passes all that a perfect mirror returns; analyzer = polarizer + 90° is
        crossed. The reflected rays' amplitudes are projected on it, so their s/p phase difference counts.
        Without ``polarizer_deg`` the light is unpolarized. Reflectance of a coherent stack only.
    """
    view = np.asarray(view_deg, dtype=float)
    wl = np.asarray(wavelength_nm, dtype=float)
    if quantity not in ("reflectance", "transmittance"):
        raise InputError(f"quantity must be 'reflectance' or 'transmittance'; got {quantity!r}.")
    lab = _check_lab_frame(stack, polarization, quantity, polarizer_deg, analyzer_deg)
    n0 = float(np.real(stack.ambient.nk(np.atleast_1d(wl)).min())) if wl.size else 1.0
    # two rays per pupil point in the lab frame (the half cone and its mirror image): half as many points
    cone = _cone(view, na, n0, stack, wl.ravel() if wl.size else None,
                 min(_CONE_MAX_RAYS, _CONE_MAX_WORK // max(wl.size, 1) // (2 if lab else 1)))
    A = cone.view_deg.size
    power = stack.reflectance if quantity == "reflectance" else stack.transmittance
    if not lab:
        uniq, M = _cone_sum(A, cone.theta_deg, cone.weights)
        evaluate = lambda ang: [power(wl.ravel(), ang, polarization)]          # noqa: E731
        mats = [M]
    else:
        coefficients = [c for c in _polarization_coefficients(cone, polarizer_deg, analyzer_deg) if c is not None]
        angles = np.concatenate([cone.theta_deg, cone.theta_deg], axis=1)
        uniq, mats = None, []
        for c in coefficients:
            uniq, M = _cone_sum(A, angles, c)
            mats.append(M)
        if analyzer_deg is None:
            evaluate = lambda ang: [power(wl.ravel(), ang, "s"), power(wl.ravel(), ang, "p")]   # noqa: E731
        else:
            def evaluate(ang):
                r_s, r_p = stack.reflection_amplitudes(wl.ravel(), ang)
                return [_abs2(r_s), _abs2(r_p), (r_s * np.conj(r_p)).real]
    out = np.zeros((A, wl.size))
    step = max(1, _CONE_CHUNK // max(wl.size, 1))
    for start in range(0, uniq.size, step):           # bounded memory: a chunk of the angles at a time
        part = slice(start, start + step)
        for M, values in zip(mats, evaluate(uniq[part])):
            out += M[:, part] @ values
    return out.reshape(view.shape + wl.shape)


def _cone_matrix(view_deg: np.ndarray, na: float, n0: float, stack=None, wavelength_nm=None, coefficients=None):
    """(grid angles G, matrices [(A, G)]) mapping R on an angle grid to cone-averaged R per view angle.

    The grid is uniform in cos θ (R and every layer's phase are smooth in cos θ, even at the normal) with
    _GRID_POINTS_PER_FRINGE points per fringe the stack's layers sweep across it; values between grid
    points are taken by 4-point (cubic) Lagrange interpolation. ``coefficients``: per-ray weights (A, K')
    on the rays' angles repeated to K' (the lab-frame polarization terms); default the cone's weights.
    """
    cone = _cone(view_deg, na, n0, stack, wavelength_nm)
    weights = [cone.weights] if coefficients is None else coefficients(cone)
    reps = weights[0].shape[1] // cone.theta_deg.shape[1]
    kept = np.any([w != 0 for w in weights], axis=0)
    rows, cols = np.nonzero(kept)                      # only the kept rays (views pad to the largest cone)
    c = cone.cos_theta[rows, cols % cone.cos_theta.shape[1]]
    lo, hi = float(c.min()), float(c.max())
    n_grid = _grid_points(stack, wavelength_nm, np.degrees(np.arccos(hi)), np.degrees(np.arccos(lo)), n0)
    if hi - lo < _GRID_MIN_SPAN:
        lo, hi = lo - _GRID_MIN_SPAN, hi + _GRID_MIN_SPAN
        hi, lo = min(hi, 1.0), max(lo, np.cos(np.radians(_GRAZING_DEG)))
    grid_c = np.linspace(lo, hi, n_grid)
    pos = np.clip((c - lo) / (hi - lo) * (n_grid - 1), 0.0, n_grid - 1)
    i0 = np.clip(np.floor(pos).astype(int) - 1, 0, n_grid - 4)
    t = pos - i0
    lagrange = (-(t - 1) * (t - 2) * (t - 3) / 6, t * (t - 2) * (t - 3) / 2, -t * (t - 1) * (t - 3) / 2,
                t * (t - 1) * (t - 2) / 6)
    size = kept.shape[0] * n_grid
    index = np.concatenate([rows * n_grid + i0 + j for j in range(4)])
    mats = []
    for w in weights:
        wk = w[rows, cols]
        M = np.bincount(index, weights=np.concatenate([wk * L for L in lagrange]), minlength=size)
        mats.append(M.reshape(kept.shape[0], n_grid))
    return np.degrees(np.arccos(np.clip(grid_c, -1.0, 1.0))), mats


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
              brightness: str = "absolute", polarizer_deg=None, analyzer_deg=None) -> ColorMap:
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
    polarizer_deg, analyzer_deg : float, optional
        A linear polarizer and analyzer in the lab frame, as in :func:`cone_reflectance` (with or without
        a cone). With an analyzer each row's amplitudes are computed in full (slower than the sweep).

    Returns
    -------
    ColorMap
    """
    lab = (polarizer_deg, analyzer_deg) if _check_lab_frame(stack, polarization, "reflectance", polarizer_deg,
                                                             analyzer_deg) else None
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
        # one cone (rays, grid, matrix) per group, for its thickest row; pieces are sized on the larger of
        # the map's angles and the cone's grid
        cone = _map_cone(stack, layer, float(d[rows].max()), ang, wl_g, na, lab)
        width = max(ang.size, cone[0].size if cone is not None else 0)
        piece = max(1, _MAP_PIECE_POINTS // max(1, width * wl_g.size))
        for start in range(0, rows.size, piece):
            r = rows[start:start + piece]
            R = _map_reflectance(stack, layer, d[r], ang, wl_g, polarization, na, cone, lab)
            xyz[r] = spectrum_to_xyz(R, wl_g, illuminant, observer)
    scale = _scale_for(xyz, brightness)
    rgb, lab, oog = scaled_colors(xyz, illuminant, observer, scale)
    return ColorMap(d, ang, wl, xyz, lab, rgb, oog, scale)


def _map_cone(stack, layer, thickest_nm, ang, wl, na, lab=None):
    """(grid angles, [matrices]) for map rows up to ``thickest_nm`` thick: the cone's (see
    :func:`_cone_matrix`), or with a lab-frame ``lab`` = (polarizer_deg, analyzer_deg) and no cone the map's
    own angles with diagonal matrices; None without either."""
    n0 = float(stack.ambient.nk(wl).real.min())
    coefficients = None if lab is None else (lambda cone: [c for c in _polarization_coefficients(cone, *lab)
                                                           if c is not None])
    if na and na >= MIN_NA:
        return _cone_matrix(ang, na, n0, stack.with_thickness(layer, thickest_nm), wl, coefficients)
    if lab is None:
        return None
    return ang, [np.diag(c.sum(axis=1)) for c in coefficients(_cone(ang, 0.0, n0))]


def _map_reflectance(stack, layer, d, ang, wl, polarization, na, cone=None, lab=None):
    """R (T, A, W) of the swept layer over thickness × viewing angle, averaged over the cone when na > 0
    (``cone`` from :func:`_map_cone`, made for the thickest row here when not given); ``lab`` =
    (polarizer_deg, analyzer_deg) for a lab-frame polarizer."""
    if cone is None:
        cone = _map_cone(stack, layer, float(np.max(d)), ang, wl, na, lab)
    if cone is None:
        return sweep(stack, layer, d, ang, wl, polarization)                 # (T, A, W)
    grid, mats = cone
    if lab is None:
        return np.einsum("ag,tgw->taw", mats[0], sweep(stack, layer, d, grid, wl, polarization), optimize=True)
    if lab[1] is None:                  # polarizer alone: the s and p powers, each with its share
        return sum(np.einsum("ag,tgw->taw", M, sweep(stack, layer, d, grid, wl, p), optimize=True)
                   for M, p in zip(mats, ("s", "p")))
    out = np.empty((len(d), len(ang), len(wl)))
    M_s, M_p, M_x = mats
    for i, t in enumerate(d):           # an analyzer needs the amplitudes' phases: each row in full
        r_s, r_p = stack.with_thickness(layer, float(t)).reflection_amplitudes(wl, grid)
        out[i] = M_s @ _abs2(r_s) + M_p @ _abs2(r_p) + M_x @ (r_s * np.conj(r_p)).real
    return out


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
                 polarization: str = "unpolarized", *, polarizer_deg=None, analyzer_deg=None) -> tuple[float, float]:
    """Mean reflectance and transmittance (fractions) over a wavelength band, each wavelength weighted equally.

    Sampled every 1 nm, or finer where the stack's fringes need it (SMOOTH_SAMPLES_PER_FRINGE per fringe:
    the weight is flat),
    averaged by the trapezoid rule.

    Parameters
    ----------
    band_nm : (lo, hi) in nm, lo < hi, inside the materials' data.
    polarizer_deg, analyzer_deg : float, optional
        A lab-frame polarizer and analyzer (:func:`cone_reflectance`); T takes the polarizer alone.
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
    R = cone_reflectance(stack, wl, angle_deg, na, polarization, polarizer_deg=polarizer_deg,
                         analyzer_deg=analyzer_deg)
    T = cone_reflectance(stack, wl, angle_deg, na, polarization, "transmittance", polarizer_deg=polarizer_deg)
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
                  scale: float = 1.0, polarizer_deg=None, analyzer_deg=None) -> ToleranceResult:
    """Monte-Carlo tolerance run: every layer's thickness times 1 + u·tolerance/100, u uniform in [-1, 1],
    drawn independently per layer and trial from a generator seeded with ``seed`` (the same run every time).

    ``scale`` is the brightness factor of the colours (as on the page); ΔE00 is taken at that brightness.
    ``polarizer_deg``, ``analyzer_deg``: a lab-frame polarizer and analyzer (:func:`cone_reflectance`).

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
    rays = cone_rays(angle_deg, na, n0, stack=scaled_stack(stack, 1.0 + tol / 100.0), wavelength_nm=wl)[0].shape[1]
    work = int(trials) * wl.size * rays * (len(stack.layers) + 1)
    if work > MAX_TOLERANCE_WORK:
        raise InputError(f"This tolerance run needs {work:,} evaluations ({int(trials)} trials x {wl.size} wavelengths x "
                         f"{rays} rays of the viewing cone x {len(stack.layers) + 1} interfaces); at most "
                         f"{MAX_TOLERANCE_WORK:,} are allowed. Use fewer trials or a smaller viewing-cone NA.")
    lab = {"polarizer_deg": polarizer_deg, "analyzer_deg": analyzer_deg}
    R0 = cone_reflectance(stack, wl, angle_deg, na, polarization, **lab)
    R = np.stack([cone_reflectance(scaled_stack(stack, f), wl, angle_deg, na, polarization, **lab) for f in factors])
    xyz0 = spectrum_to_xyz(R0, wl, illuminant, observer)
    xyz = spectrum_to_xyz(R, wl, illuminant, observer)
    _, lab0, _ = scaled_colors(xyz0, illuminant, observer, scale)
    rgb, lab, _ = scaled_colors(xyz, illuminant, observer, scale)
    return ToleranceResult(tol, int(seed), factors, lab, rgb, delta_e_2000(lab, lab0[None, :]),
                           luminous_reflectance(R, wl), lab0, float(luminous_reflectance(R0, wl)),
                           xyz_to_lab(xyz, illuminant, observer))
