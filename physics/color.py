"""Colour of a spectrum: CIE XYZ, CIELAB, sRGB and CIEDE2000.

All CIE data (colour-matching functions, illuminant spectra) and the standard
conversions come from colour-science; nothing is retyped here.

Fast path: for a wavelength grid, an illuminant and an observer the integration
XYZ = Σ R(λᵢ) wᵢ reduces to a (n_wavelength, 3) weight matrix computed once and
cached, so millions of spectra cost one matrix product. The weights integrate
illuminant × colour-matching function on colour-science's 1 nm table against the
piecewise-linear interpolant of the samples (each sample's "hat" function), so a
5 nm grid keeps most of the accuracy of a 1 nm one, and a grid finer than 1 nm (the fringes
of a thick layer) is integrated on the union of both grids rather than read at whole
nanometres. Spectra sampled coarser than that, as measured or lamp spectra come, are
integrated as ASTM E308 does: uniform 10 nm samples with the ASTM E2022 weights,
uniform 20 nm samples interpolated to 10 nm first (ASTM E308's method for 20 nm data),
both through colour-science's ASTM E308 implementation; other coarse samplings are
interpolated to 1 nm by a cubic spline before integrating (:func:`_integration_weights`
picks the route). Beyond the sampled band the end values are held constant; the
weights are normalised so that a perfect reflector has Y = 1.

Conventions: XYZ scaled so a perfect reflector has Y = 1; CIELAB L* in 0..100;
sRGB values are display-encoded in 0..1 (IEC 61966-2-1). Colours under an
illuminant other than D65 are adapted to the sRGB white with CAT02 before
display (the eye adapts to the lamp).

References
----------
CIE 015:2018 Colorimetry, 4th ed. (XYZ, CIELAB). IEC 61966-2-1:1999 (sRGB).
CIE 142-2001 / G. Sharma, W. Wu, E. N. Dalal, Color Res. Appl. 30, 21 (2005) (CIEDE2000).
CIE 159:2004 (CAT02). T. Mansencal et al., colour-science (software, doi:10.5281/zenodo.3757045).
ASTM E308-15 (computing the colors of objects); ASTM E2022-11 (weighting factors), via colour-science.
"""

from __future__ import annotations

import functools
import warnings

import numpy as np

from .errors import InputError, WavelengthRangeError, require_finite

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    import colour
    from colour.colorimetry import (adjust_tristimulus_weighting_factors_ASTME308, lagrange_coefficients_ASTME2022,
                                    reshape_sd, tristimulus_weighting_factors_ASTME2022)
    from colour.utilities import CACHE_REGISTRY
from scipy.interpolate import CubicSpline, PchipInterpolator

__all__ = [
    "spectrum_to_xyz", "xyz_to_lab", "xyz_to_srgb", "srgb_out_of_gamut", "delta_e_2000",
    "illuminant_white_xyz", "spectra_to_srgb", "srgb_to_hex", "ILLUMINANTS", "OBSERVERS",
    "color_weights", "srgb_to_xyz", "lab_to_xyz", "luminous_reflectance", "luminous_weights",
    "planck_spd", "lamp_label", "LED_ILLUMINANTS", "LAMP_DESCRIPTIONS", "YELLOW_ROOM", "yellow_filter_transmittance",
]

#: White-LED illuminants of CIE 015:2018 in colour-science's table: B phosphor-converted blue, BH blue
#: and red hybrid, RGB three-colour mixing, V violet-pumped phosphor (kinds recalled from CIE 015:2018).
LED_ILLUMINANTS = ("LED-B1", "LED-B2", "LED-B3", "LED-B4", "LED-B5", "LED-BH1", "LED-RGB1", "LED-V1", "LED-V2")
#: The lithography-area "yellow light": a cool-white fluorescent (CIE F2) behind a filter that passes
#: nothing below about 500 nm, where photoresists are sensitive (common practice). The filter is our own
#: approximation, a logistic edge at YELLOW_EDGE_NM of width YELLOW_EDGE_WIDTH_NM, not a product's data.
YELLOW_ROOM = "YELLOW"
YELLOW_EDGE_NM = 500.0
YELLOW_EDGE_WIDTH_NM = 6.0
#: Illuminant names accepted (aliases map to colour-science's keys).
ILLUMINANTS = {"D65": "D65", "D50": "D50", "A": "A", "F2": "FL2", "F11": "FL11",
               "FL2": "FL2", "FL11": "FL11", "D55": "D55", "D75": "D75", "E": "E",
               "F7": "FL7", "FL7": "FL7", YELLOW_ROOM: YELLOW_ROOM}
ILLUMINANTS.update({k: k for k in LED_ILLUMINANTS if k in colour.SDS_ILLUMINANTS})
#: Words beside the CIE codes (kinds of lamp as CIE 015:2018 describes them, recalled from memory).
LAMP_DESCRIPTIONS = {
    "D65": "daylight, 6500 K", "D50": "daylight, 5000 K (graphic arts)", "D55": "daylight, 5500 K",
    "D75": "north-sky daylight, 7500 K", "A": "incandescent (tungsten), 2856 K", "E": "equal energy",
    "F2": "cool-white fluorescent", "F7": "broadband daylight fluorescent", "F11": "tri-band fluorescent",
    "LED-B1": "white LED, phosphor", "LED-B2": "white LED, phosphor", "LED-B3": "white LED, phosphor",
    "LED-B4": "white LED, phosphor", "LED-B5": "white LED, phosphor", "LED-BH1": "white LED, hybrid",
    "LED-RGB1": "white LED, red-green-blue", "LED-V1": "white LED, violet-pumped",
    "LED-V2": "white LED, violet-pumped",
    YELLOW_ROOM: "yellow room (lithography): F2 cut below 500 nm, an approximation",
}
#: Colour temperatures a Planck radiator (a halogen lamp) may be given, K.
PLANCK_CCT_LIMITS_K = (1000.0, 10000.0)
#: Observer names accepted → colour-science's CMF tables.
OBSERVERS = {"2": "CIE 1931 2 Degree Standard Observer", "10": "CIE 1964 10 Degree Standard Observer"}
OBSERVERS.update({v: v for v in list(OBSERVERS.values())})
#: Linear-RGB slack before a colour counts as outside the sRGB gamut: the
#: published 4-digit sRGB matrix maps the D65 white to 1 within 2e-4.
GAMUT_TOLERANCE = 1e-3
#: Longest wavelength a user's lamp spectrum may list, nm.
MAX_SPD_WAVELENGTH_NM = 100_000.0
#: The 1 nm grid of the CIE tables used for every integration.
_FINE = colour.SpectralShape(360, 830, 1)
#: Uniform sample steps (nm) integrated as ASTM E308 does (colour-science's implementation): 10 nm with the
#: ASTM E2022 weights, 20 nm interpolated to 10 nm first. The samples must lie on whole tens of nm.
ASTM_E308_STEPS_NM = (10, 20)
#: Largest sample step (nm) integrated with the samples' piecewise-linear interpolant: at 5 nm it errs by at
#: most 0.14 ΔE00 on a 25 nm wide band (tests/test_colour_sampling.py; thin-film spectra are far smoother),
#: and the thin-film colour grids (5 nm, or uniform in wavenumber) stay on it. Coarser samplings other than
#: ASTM E308's are interpolated to 1 nm by a cubic spline first.
LINEAR_MAX_STEP_NM = 5.0
#: Slack (nm) in telling a uniform sampling and its step: far below any spectrometer's wavelength error.
_STEP_ATOL_NM = 1e-6
#: Most samples a spectrum is spline-interpolated from: its interpolation matrix is samples × 471, and a
#: spectrum with more samples than the 1 nm grid is fine where it is dense (the linear route serves it).
_SPLINE_MAX_SAMPLES = 471


def _observer(observer) -> str:
    key = str(observer).replace("°", "").replace("deg", "").strip()
    try:
        return OBSERVERS[key]
    except KeyError:
        raise InputError(f"observer must be '2' (CIE 1931 2°) or '10' (CIE 1964 10°); got {observer!r}.") from None


@functools.lru_cache(maxsize=64)
def _cmfs(observer: str) -> np.ndarray:
    cmfs = colour.MSDS_CMFS[observer].copy().align(_FINE)
    return np.asarray(cmfs.values, dtype=float)                    # (471, 3)


def _illuminant_values(illuminant) -> tuple[str, np.ndarray]:
    """(key, S(λ) on the 1 nm grid) for a name or a user SPD (wavelengths, values)."""
    if isinstance(illuminant, str):
        name = ILLUMINANTS.get(illuminant.strip().upper()) or ILLUMINANTS.get(illuminant.strip())
        if name is None:
            raise InputError(f"Unknown illuminant {illuminant!r}; use one of "
                             f"{', '.join(sorted(set(ILLUMINANTS) - set(ILLUMINANTS.values()) | {'D65', 'D50', 'A'}))} "
                             "or give an SPD as (wavelength_nm, values).")
        return name, _named_spd(name)
    if isinstance(illuminant, colour.SpectralDistribution):
        wl, val = illuminant.wavelengths, illuminant.values
    else:
        try:
            wl, val = illuminant
        except (TypeError, ValueError):
            raise InputError("An illuminant is a name (e.g. 'D65') or an SPD given as "
                             "(wavelength_nm, values) arrays.") from None
    spd = user_spd_on_fine_grid(wl, val)
    return "spd", spd                     # the cache keys carry the SPD's bytes


@functools.lru_cache(maxsize=32)
def _named_spd(name: str) -> np.ndarray:
    if name == YELLOW_ROOM:
        fine = np.arange(360, 831, dtype=float)
        return _named_spd("FL2") * yellow_filter_transmittance(fine)
    sd = reshape_sd(colour.SDS_ILLUMINANTS[name], _FINE)           # colour's own extension, as its sd_to_XYZ does
    return np.asarray(sd.values, dtype=float)


def yellow_filter_transmittance(wavelength_nm) -> np.ndarray:
    """The yellow-light filter assumed for lithography areas: 1/(1 + exp(−(λ − 500 nm)/6 nm)).

    An approximation of the long-pass sleeves used over fluorescent tubes (common practice), not the data
    of a product: it passes under 0.2 % below 460 nm and over 99 % above 530 nm.
    """
    wl = np.asarray(wavelength_nm, dtype=float)
    return 1.0 / (1.0 + np.exp(-(wl - YELLOW_EDGE_NM) / YELLOW_EDGE_WIDTH_NM))


def planck_spd(cct_k: float) -> tuple[np.ndarray, np.ndarray]:
    """A Planck radiator (a halogen lamp) at ``cct_k`` kelvin: (wavelength_nm 360-830 every 1 nm, relative power).

    References
    ----------
    CIE 015:2018, sec. 11.1 (Planck's law, c₂ = 1.4388e-2 m·K); via colour-science ``planck_law``.
    """
    t = float(require_finite("colour temperature", cct_k, minimum=PLANCK_CCT_LIMITS_K[0],
                             maximum=PLANCK_CCT_LIMITS_K[1], unit="K"))
    wl = np.arange(360, 831, dtype=float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        v = np.asarray(colour.colorimetry.planck_law(wl * 1e-9, t), dtype=float)
    return wl, v / v.max()


def lamp_label(code: str) -> str:
    """'F11 tri-band fluorescent': the code people share, with the kind of lamp beside it."""
    desc = LAMP_DESCRIPTIONS.get(code)
    if code == YELLOW_ROOM:
        return desc[0].upper() + desc[1:]
    return f"{code} {desc}" if desc else code


def user_spd_on_fine_grid(wavelength_nm, values) -> np.ndarray:
    """A user's lamp spectrum on the 360-830 nm 1 nm grid: linearly interpolated between samples at most
    :data:`LINEAR_MAX_STEP_NM` apart (a spectrometer's), by a shape-preserving cubic (PCHIP) between
    coarser ones (10 nm, 20 nm, irregular).

    Outside the supplied range the lamp is taken to emit nothing; the range must
    cover at least 400-700 nm, where the eye is sensitive.
    """
    wl = require_finite("illuminant wavelength_nm", wavelength_nm, minimum=0.0, min_inclusive=False, unit="nm").ravel()
    v = require_finite("illuminant values", values, minimum=0.0).ravel()
    if wl.size != v.size or wl.size < 2:
        raise InputError(f"An SPD needs matching wavelength and value columns with at least 2 rows "
                         f"(got {wl.size} and {v.size}).")
    order = np.argsort(wl)
    wl, v = wl[order], v[order]
    if wl[0] > 400 or wl[-1] < 700:
        raise WavelengthRangeError(f"The lamp spectrum covers {wl[0]:g}-{wl[-1]:g} nm; it must cover at least "
                                   "400-700 nm. Measure or extend it over the visible.")
    if wl[-1] > MAX_SPD_WAVELENGTH_NM:
        raise InputError(f"The lamp spectrum reaches {wl[-1]:g} nm; give wavelengths in nm up to "
                         f"{MAX_SPD_WAVELENGTH_NM:g} (a value in Å or pm, or a typing error?).")
    if not np.any(v > 0):
        raise InputError("The lamp spectrum is zero everywhere; give a spectrum with some power.")
    fine = np.arange(360, 831, dtype=float)
    out = np.interp(fine, wl, v, left=0.0, right=0.0)
    if np.all(np.diff(wl) > 0) and _integration_route(wl) != "linear":
        # Coarse samples (10 nm, 20 nm, irregular): a shape-preserving cubic (PCHIP; F. N. Fritsch and
        # R. E. Carlson, SIAM J. Numer. Anal. 17, 238 (1980)) to 1 nm. It never leaves the range of the
        # neighbouring samples, so a lamp's dark bands stay dark and its power never goes negative.
        inside = (fine >= wl[0]) & (fine <= wl[-1])
        out[inside] = PchipInterpolator(wl, v)(fine[inside])
    if not np.any(out[(fine >= 400) & (fine <= 700)] > 0):
        raise InputError("The lamp spectrum has no power from 400 to 700 nm, where the eye sees; "
                         "give a lamp that emits visible light.")
    return out


def _sample_weights(wavelength_nm: np.ndarray, table: np.ndarray) -> np.ndarray:
    """(n_samples, 3) integrals of each sample's linear-interpolation hat times ``table`` (471, 3).

    ``table`` is illuminant × colour-matching function on the 1 nm grid, taken as piecewise linear.
    Both are evaluated on the union of that grid and the samples and summed with each point's share
    of the union grid (its half-distance to each neighbour; a 1 nm point keeps weight 1), so a coarse
    grid (5 nm) integrates as before and a grid finer than 1 nm (a thick layer's fringes) is not
    reduced to its values at whole nanometres. Beyond the sampled band the end values are held
    constant (as colour-science extends a spectral distribution), so a perfect reflector sampled on
    380-780 nm has exactly the illuminant's white.
    """
    fine = np.arange(360, 831, dtype=float)
    n = wavelength_nm.size
    if n == 1:
        return table[np.argmin(np.abs(fine - wavelength_nm[0]))][None, :].astype(float)
    G = np.union1d(fine, wavelength_nm)
    S = np.stack([np.interp(G, fine, table[:, k]) for k in range(table.shape[1])], axis=1)
    share = np.empty(G.size)
    share[1:-1] = 0.5 * (G[2:] - G[:-2])
    share[0], share[-1] = G[1] - G[0], G[-1] - G[-2]
    j = np.clip(np.searchsorted(wavelength_nm, G, side="right") - 1, 0, n - 2)
    f = np.clip((G - wavelength_nm[j]) / (wavelength_nm[j + 1] - wavelength_nm[j]), 0.0, 1.0)
    W = np.zeros((n, table.shape[1]))
    np.add.at(W, j, ((1.0 - f) * share)[:, None] * S)
    np.add.at(W, j + 1, (f * share)[:, None] * S)
    return W


def _integration_route(wavelength_nm: np.ndarray) -> str:
    """How samples at ``wavelength_nm`` are integrated: "astm-e308", "spline" or "linear".

    "astm-e308": uniform at a step of :data:`ASTM_E308_STEPS_NM` on whole tens of nm. "linear": steps of
    at most :data:`LINEAR_MAX_STEP_NM`, or a grid uniform in wavenumber (the fringe-resolving grids of
    thin-film colour), or too few or too many samples for a spline. "spline": any other coarse sampling.
    """
    wl = wavelength_nm
    if wl.size < 4:
        return "linear"
    d = np.diff(wl)
    if d.max() - d.min() <= _STEP_ATOL_NM:                           # uniform in wavelength
        step = (wl[-1] - wl[0]) / (wl.size - 1)
        on_tens = abs(wl[0] - 10.0 * round(wl[0] / 10.0)) <= _STEP_ATOL_NM
        if on_tens and any(abs(step - s) <= _STEP_ATOL_NM for s in ASTM_E308_STEPS_NM):
            return "astm-e308"
        return "linear" if step <= LINEAR_MAX_STEP_NM + _STEP_ATOL_NM else "spline"
    ds = np.diff(1.0 / wl)
    if np.ptp(ds) <= 1e-6 * abs(ds.mean()):                          # uniform in wavenumber
        return "linear"
    coarse = d.max() > LINEAR_MAX_STEP_NM + _STEP_ATOL_NM
    return "spline" if coarse and wl.size <= _SPLINE_MAX_SAMPLES else "linear"


def _integration_weights(wavelength_nm: np.ndarray, table: np.ndarray) -> np.ndarray:
    """(n_samples, k) weights of samples at ``wavelength_nm`` against ``table`` (471, k) on the 1 nm grid,
    by the route :func:`_integration_route` picks (unnormalised)."""
    route = _integration_route(wavelength_nm)
    if route == "astm-e308":
        return _astm_e308_weights(wavelength_nm, table)
    if route == "spline":
        return _spline_weights(wavelength_nm, table)
    return _sample_weights(wavelength_nm, table)


#: colour-science's cache of ASTM E2022 weight tables: it keeps one per table, so it is emptied after use
#: (ours are kept, bounded, by :func:`_weights_cached`).
_COLOUR_WEIGHTS_CACHE = "colour.colorimetry.tristimulus_values._CACHE_TRISTIMULUS_WEIGHTING_FACTORS"


def _astm_e308_weights(wavelength_nm: np.ndarray, table: np.ndarray) -> np.ndarray:
    """(n_samples, k) ASTM E308 weights of uniform 10 or 20 nm samples against ``table`` (471, k).

    The ASTM E2022 weights of the 10 nm interval (colour-science's
    ``tristimulus_weighting_factors_ASTME2022``), folded onto the samples' band with
    ``adjust_tristimulus_weighting_factors_ASTME308`` (the weights beyond the band go to its end samples,
    which holds the end values); 20 nm samples are first interpolated to 10 nm with ASTM E2022's Lagrange
    coefficients (``lagrange_coefficients_ASTME2022``), ASTM E308's method for 20 nm data. The weights
    depend on illuminant × colour-matching function only through their product, so ``table`` is passed as
    the functions with an equal-energy illuminant. Equal to colour-science's
    ``sd_to_XYZ(method="ASTM E308", use_practice_range=False)`` on the same samples (tests check it).

    References
    ----------
    ASTM E308-15, sec. 7 and ASTM E2022-11 (via colour-science, T. Mansencal et al.).
    """
    n = wavelength_nm.size
    step = int(round((wavelength_nm[-1] - wavelength_nm[0]) / (n - 1)))
    start = int(round(wavelength_nm[0]))
    k = table.shape[1]
    funcs = table if k == 3 else np.repeat(table[:, :1], 3, axis=1)     # ASTM's tables are for 3 functions
    fine = _FINE.wavelengths
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cmfs = colour.MultiSpectralDistributions(funcs, fine)
        flat = colour.SpectralDistribution(np.ones(fine.size), fine)
        W = tristimulus_weighting_factors_ASTME2022(cmfs, flat, colour.SpectralShape(_FINE.start, _FINE.end, 10))
        table_shape = colour.SpectralShape(_FINE.start, _FINE.start + 10 * (len(W) - 1), 10)
        W = adjust_tristimulus_weighting_factors_ASTME308(
            W, table_shape, colour.SpectralShape(start, start + step * (n - 1), 10))
        if step == 20:
            W = _astm_e308_20nm_to_10nm(n).T @ W
        if _COLOUR_WEIGHTS_CACHE in CACHE_REGISTRY.registry:
            CACHE_REGISTRY.clear_cache(_COLOUR_WEIGHTS_CACHE)
    return np.asarray(W, dtype=float)[:, :k]


def _astm_e308_20nm_to_10nm(n: int) -> np.ndarray:
    """(2n − 1, n) matrix that interpolates n samples at 20 nm to the 10 nm grid between them: each
    midpoint from the four samples around it (three in the end intervals), with ASTM E2022's Lagrange
    coefficients as colour-science gives them, as ASTM E308 prescribes for 20 nm data."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        inner = np.asarray(lagrange_coefficients_ASTME2022(2, "inner"), dtype=float)[0]      # 4 coefficients
        edge = np.asarray(lagrange_coefficients_ASTME2022(2, "boundary"), dtype=float)[0]    # 3 coefficients
    L = np.zeros((2 * n - 1, n))
    L[0::2] = np.eye(n)
    for i in range(n - 1):
        if i == 0:
            L[1, 0:3] = edge
        elif i == n - 2:
            L[2 * i + 1, n - 3:n] = edge[::-1]
        else:
            L[2 * i + 1, i - 1:i + 3] = inner
    return L


def _spline_weights(wavelength_nm: np.ndarray, table: np.ndarray) -> np.ndarray:
    """(n_samples, k) weights of coarse samples against ``table`` (471, k): the samples' cubic spline
    (not-a-knot, as colour-science interpolates irregular data) on the 1 nm grid, end values held beyond
    them, summed against the table."""
    fine = np.arange(_FINE.start, _FINE.end + 1.0)
    n = wavelength_nm.size
    B = np.zeros((fine.size, n))                                        # 1 nm values from the samples
    inside = (fine >= wavelength_nm[0]) & (fine <= wavelength_nm[-1])
    B[inside] = CubicSpline(wavelength_nm, np.eye(n), axis=0)(fine[inside])
    B[fine < wavelength_nm[0], 0] = 1.0
    B[fine > wavelength_nm[-1], -1] = 1.0
    return B.T @ table


@functools.lru_cache(maxsize=64)
def _weights_cached(wl_bytes: bytes, illum_key: str, observer: str, spd_bytes: bytes) -> np.ndarray:
    wl = np.frombuffer(wl_bytes)
    spd = np.frombuffer(spd_bytes)
    SxCMF = spd[:, None] * _cmfs(observer)                          # (471, 3)
    W = _integration_weights(wl, SxCMF)                             # (n, 3)
    norm = W[:, 1].sum()
    if norm <= 0:
        raise InputError("The illuminant has no power where the samples lie; widen the wavelength range.")
    W = W / norm
    W.setflags(write=False)
    return W


def color_weights(wavelength_nm, illuminant="D65", observer="2") -> np.ndarray:
    """The (n_wavelength, 3) matrix that turns a sampled reflectance into XYZ (Y = 1 for R = 1).

    Parameters
    ----------
    wavelength_nm : array_like, 1-D, strictly increasing, inside 360-830 nm.
    illuminant : str or (wavelength_nm, values)
    observer : "2" or "10"
    """
    wl = require_finite("wavelength_nm", wavelength_nm, unit="nm").ravel()
    if wl.size == 0:
        raise InputError("wavelength_nm is empty; give the wavelengths of the spectrum.")
    if wl.size > 1 and np.any(np.diff(wl) <= 0):
        raise InputError("wavelength_nm must increase strictly (sort the spectrum, drop repeats).")
    if wl[0] < 360 - 1e-9 or wl[-1] > 830 + 1e-9:
        raise WavelengthRangeError(f"Colour needs wavelengths inside 360-830 nm (the CIE tables); "
                                   f"got {wl[0]:g}-{wl[-1]:g} nm.")
    if wl[0] > 420 or wl[-1] < 680:
        raise WavelengthRangeError(f"A colour needs the spectrum over the visible, at least 420-680 nm; "
                                   f"got {wl[0]:g}-{wl[-1]:g} nm.")
    key, spd = _illuminant_values(illuminant)
    return _weights_cached(wl.tobytes(), key, _observer(observer), spd.tobytes())


def spectrum_to_xyz(R, wavelength_nm, illuminant="D65", observer="2") -> np.ndarray:
    """CIE XYZ of reflectance (or transmittance) spectra.

    Parameters
    ----------
    R : array_like, (..., n_wavelength)
        Spectra as fractions (0..1), last axis wavelength.
    wavelength_nm : array_like, (n_wavelength,)
        Sample wavelengths in nm, increasing, within 360-830 nm.
    illuminant : str or (wavelength_nm, values)
        "D65", "D50", "A", "F2", "F11" (and others of colour-science), or a lamp SPD.
    observer : "2" or "10"
        CIE 1931 2° or CIE 1964 10° standard observer.

    Returns
    -------
    numpy.ndarray, (..., 3): X, Y, Z with Y = 1 for a perfect reflector.

    References
    ----------
    CIE 015:2018, eq. 7.1-7.3 (tristimulus integration).
    """
    W = color_weights(wavelength_nm, illuminant, observer)
    R = np.asarray(R, dtype=float)
    if R.shape[-1:] != (W.shape[0],):
        raise InputError(f"The spectra's last axis has {R.shape[-1] if R.ndim else 0} values but there are "
                         f"{W.shape[0]} wavelengths; they must match.")
    if not np.all(np.isfinite(R)):
        raise InputError("The spectra contain NaN or infinite values; remove or fill them first.")
    return R @ W


@functools.lru_cache(maxsize=32)
def _white_cached(illum_key: str, observer: str, spd_bytes: bytes) -> np.ndarray:
    spd = np.frombuffer(spd_bytes)
    xyz = (spd[:, None] * _cmfs(observer)).sum(axis=0)
    return xyz / xyz[1]


def illuminant_white_xyz(illuminant="D65", observer="2") -> np.ndarray:
    """XYZ (Y = 1) of the illuminant itself: the white point of CIELAB and of adaptation."""
    key, spd = _illuminant_values(illuminant)
    return _white_cached(key, _observer(observer), spd.tobytes()).copy()


def xyz_to_lab(xyz, illuminant="D65", observer="2") -> np.ndarray:
    """CIELAB L*, a*, b* of XYZ (Y = 1 scale) relative to the illuminant's white.

    References
    ----------
    CIE 015:2018, sec. 8.2.1 (via colour-science ``XYZ_to_Lab``).
    """
    xyz = _xyz_array(xyz)
    white = illuminant_white_xyz(illuminant, observer)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(colour.XYZ_to_Lab(xyz, colour.XYZ_to_xy(white)), dtype=float)


def lab_to_xyz(lab, illuminant="D65", observer="2") -> np.ndarray:
    """Inverse of :func:`xyz_to_lab` (Y = 1 scale)."""
    lab = np.asarray(lab, dtype=float)
    white = illuminant_white_xyz(illuminant, observer)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(colour.Lab_to_XYZ(lab, colour.XYZ_to_xy(white)), dtype=float)


def _xyz_array(xyz) -> np.ndarray:
    xyz = np.asarray(xyz, dtype=float)
    if xyz.shape[-1:] != (3,):
        raise InputError(f"XYZ arrays have 3 values on the last axis; got shape {xyz.shape}.")
    if not np.all(np.isfinite(xyz)):
        raise InputError("XYZ contains NaN or infinite values.")
    return xyz


@functools.lru_cache(maxsize=32)
def _xyz_to_linear_srgb_matrix(white_bytes: bytes) -> np.ndarray:
    """CAT02 from the illuminant white to the sRGB white, then the sRGB matrix, as one 3×3."""
    white = np.frombuffer(white_bytes)
    cs = colour.RGB_COLOURSPACES["sRGB"]
    srgb_white = colour.xy_to_XYZ(cs.whitepoint)
    cat = colour.adaptation.matrix_chromatic_adaptation_VonKries(white, srgb_white, transform="CAT02")
    return np.asarray(cs.matrix_XYZ_to_RGB, dtype=float) @ cat


def _linear_srgb(xyz, illuminant, observer) -> np.ndarray:
    white = illuminant_white_xyz(illuminant, observer)
    return xyz @ _xyz_to_linear_srgb_matrix(white.tobytes()).T


def xyz_to_srgb(xyz, illuminant="D65", observer="2", clip=True) -> np.ndarray:
    """Display sRGB (0..1, encoded) of XYZ (Y = 1 scale).

    Parameters
    ----------
    xyz : array_like, (..., 3)
    illuminant : str or SPD
        The white the XYZ are relative to; it is adapted to the sRGB (D65) white
        with CAT02, as the eye adapts to the lamp.
    observer : "2" or "10"
    clip : bool
        Clip to the displayable 0..1 (default). Use :func:`srgb_out_of_gamut` to flag
        colours that clipping changed.

    References
    ----------
    IEC 61966-2-1:1999 (matrix and encoding, via colour-science); CIE 159:2004 (CAT02).
    """
    rgb = _linear_srgb(_xyz_array(xyz), illuminant, observer)
    if clip:
        rgb = np.clip(rgb, 0.0, 1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(colour.models.eotf_inverse_sRGB(rgb), dtype=float)


def srgb_to_xyz(srgb, illuminant="D65", observer="2") -> np.ndarray:
    """Inverse of :func:`xyz_to_srgb` (without clipping): display sRGB 0..1 to XYZ (Y = 1)."""
    srgb = np.asarray(srgb, dtype=float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lin = np.asarray(colour.models.eotf_sRGB(srgb), dtype=float)
    white = illuminant_white_xyz(illuminant, observer)
    return lin @ np.linalg.inv(_xyz_to_linear_srgb_matrix(white.tobytes())).T


def srgb_out_of_gamut(xyz, illuminant="D65", observer="2") -> np.ndarray:
    """True where the colour lies outside the sRGB gamut (a display cannot show it exactly)."""
    rgb = _linear_srgb(_xyz_array(xyz), illuminant, observer)
    return np.any((rgb < -GAMUT_TOLERANCE) | (rgb > 1.0 + GAMUT_TOLERANCE), axis=-1)


def spectra_to_srgb(R, wavelength_nm, illuminant="D65", observer="2", normalize=False):
    """Display sRGB (0..1) and the out-of-gamut flag for many spectra at once.

    Parameters
    ----------
    R : array_like, (..., n_wavelength)
    normalize : bool
        Scale so the brightest colour (largest Y) of the batch is display white
        (the eye adapts to the brightest thing in view).

    Returns
    -------
    (rgb, out_of_gamut) : (..., 3) float array and (...) bool array.
    """
    xyz = spectrum_to_xyz(R, wavelength_nm, illuminant, observer)
    if normalize:
        ymax = float(xyz[..., 1].max()) if xyz.size else 0.0
        if ymax > 0:
            xyz = xyz / ymax
    lin = _linear_srgb(xyz, illuminant, observer)
    oog = np.any((lin < -GAMUT_TOLERANCE) | (lin > 1.0 + GAMUT_TOLERANCE), axis=-1)
    np.clip(lin, 0.0, 1.0, out=lin)
    # IEC 61966-2-1 encoding, evaluated here for speed; checked against colour-science in the tests.
    rgb = np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * np.power(lin, 1 / 2.4) - 0.055)
    return rgb, oog


def srgb_to_hex(rgb) -> str:
    """'#rrggbb' of one display sRGB triple (0..1)."""
    r = np.clip(np.round(np.asarray(rgb, dtype=float) * 255), 0, 255).astype(int)
    return "#{:02x}{:02x}{:02x}".format(*r)


def delta_e_2000(lab1, lab2) -> np.ndarray:
    """CIEDE2000 colour difference ΔE00 between CIELAB colours (broadcast on the last axis).

    References
    ----------
    CIE 142-2001; G. Sharma, W. Wu, E. N. Dalal, Color Res. Appl. 30, 21 (2005)
    (via colour-science ``delta_E_CIE2000``).
    """
    a = np.asarray(lab1, dtype=float)
    b = np.asarray(lab2, dtype=float)
    if a.shape[-1:] != (3,) or b.shape[-1:] != (3,):
        raise InputError("CIELAB colours have 3 values (L*, a*, b*) on the last axis.")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(colour.difference.delta_E_CIE2000(a, b), dtype=float)


#: The photopic luminous efficiency function V(λ) used for luminous reflectance (colour-science's table).
PHOTOPIC_LEF = "CIE 1924 Photopic Standard Observer"


@functools.lru_cache(maxsize=32)
def _luminous_cached(wl_bytes: bytes, illum_key: str, spd_bytes: bytes) -> np.ndarray:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        V = reshape_sd(colour.colorimetry.SDS_LEFS_PHOTOPIC[PHOTOPIC_LEF], _FINE).values
    w = _integration_weights(np.frombuffer(wl_bytes), (np.frombuffer(spd_bytes) * np.asarray(V, float))[:, None])[:, 0]
    w = w / w.sum()
    w.setflags(write=False)
    return w


def luminous_weights(wavelength_nm, illuminant="D65") -> np.ndarray:
    """(n_wavelength,) weights that turn a sampled R (or T) into its luminous value (weights sum to 1)."""
    wl = require_finite("wavelength_nm", wavelength_nm, unit="nm").ravel()
    color_weights(wl, illuminant)                   # the same checks of the grid and the lamp
    key, spd = _illuminant_values(illuminant)
    return _luminous_cached(wl.tobytes(), key, spd.tobytes())


def luminous_reflectance(R, wavelength_nm, illuminant="D65") -> np.ndarray:
    """Luminous reflectance (or transmittance) ρ_v = ∫ R S V dλ / ∫ S V dλ, as a fraction; shape R.shape[:-1].

    With ``illuminant="D65"`` this is the luminous reflectance of spectacle-lens coatings: V(λ) is the
    CIE 1924 photopic luminous efficiency, S the CIE D65 spectrum (both from colour-science), over the
    samples' band with the end values held beyond it.

    References
    ----------
    ISO 13666:2019, Ophthalmic optics — Vocabulary (luminous reflectance, weighting V(λ)·S_D65(λ));
    CIE 015:2018 (V(λ), D65).
    """
    w = luminous_weights(wavelength_nm, illuminant)
    R = np.asarray(R, dtype=float)
    if R.shape[-1:] != w.shape:
        raise InputError(f"The spectra's last axis has {R.shape[-1] if R.ndim else 0} values but there are "
                         f"{w.size} wavelengths; they must match.")
    return R @ w


@functools.lru_cache(maxsize=2)
def srgb_decode_table(bit_depth: int = 8) -> np.ndarray:
    """Linear light of every sRGB code value (256 or 65536 entries), IEC 61966-2-1 via colour-science."""
    if bit_depth not in (8, 16):
        raise InputError(f"bit_depth is 8 or 16; got {bit_depth!r}.")
    codes = np.arange(2 ** bit_depth, dtype=float) / (2 ** bit_depth - 1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = np.asarray(colour.models.eotf_sRGB(codes), dtype=np.float32)
    table.setflags(write=False)
    return table
