"""Diffraction gratings: orders, angles, dispersion, resolution, overlaps, line shape and colour.

Convention (stated once; the page shows it too)::

    m·λ = d·(sin α + sin β)

α is the angle of incidence and β the angle of diffraction, both measured from the
grating normal and positive on the side of the incident beam; d = 1/(groove density)
is the groove spacing. The zero order is then β = −α (the specular beam of a
reflection grating; the undeviated beam of a transmission grating, whose β is
measured on the far side mirrored through the grating plane so that the same
equation holds). An order propagates when |m·λ/d − sin α| <= 1; otherwise it is
evanescent and its angle is NaN, with the reason given by :func:`order_status`.
Units: wavelengths in nm, groove density in lines per mm, angles in degrees,
lengths in mm unless the name says otherwise.

References
----------
C. Palmer and E. Loewen, Diffraction Grating Handbook, 8th ed. (MKS Newport, 2020),
ch. 2 (grating equation, dispersion, resolving power, free spectral range, Littrow,
blaze), ch. 9 (anomalies); M. Born and E. Wolf, Principles of Optics, 7th ed.,
sec. 8.6.1 (N-slit diffraction pattern); E. G. Loewen and E. Popov, Diffraction
Gratings and Applications (1997), ch. 4 (scalar efficiency of lamellar and blazed
grooves).
"""

from __future__ import annotations

from dataclasses import dataclass

import warnings

import numpy as np

from .color import GAMUT_TOLERANCE, _linear_srgb, _observer, colour, spectrum_to_xyz, xyz_to_lab
from .errors import InputError, require_finite

__all__ = [
    "groove_spacing_nm", "diffraction_angle_deg", "order_status", "propagating_orders", "order_band_nm",
    "angular_dispersion_deg_per_nm", "linear_dispersion_mm_per_nm", "reciprocal_linear_dispersion_nm_per_mm",
    "resolving_power", "resolvable_difference_nm", "free_spectral_range_nm", "free_spectral_range_exact_nm",
    "order_overlaps", "order_sorting_filter_nm", "littrow_angle_deg", "blaze_wavelength_nm",
    "blaze_wavelength_at_deviation_nm", "plan_spectrometer_report", "PlanRejection", "rayleigh_wavelength_nm", "n_slit_intensity", "groove_efficiency",
    "grating_spectrum", "grating_color", "grating_color_map", "plan_spectrometer", "SpectrometerDesign",
    "display_srgb", "spectral_line_srgb", "rigorous_efficiency", "rigorous_efficiency_detail", "band_efficiency",
    "SCALAR_TRUST_D_OVER_LAMBDA",
]

#: Largest |incidence| accepted: 90° is grazing and illuminates nothing.
MAX_INCIDENCE_DEG = 90.0
#: Tolerance on |sin β| <= 1 so an order exactly at grazing counts as propagating (rounding).
_GRAZING_TOL = 1e-12
#: Wavelength band summed for a grating's colour (CIE tables are significant here).
COLOUR_BAND_NM = (380.0, 780.0)
#: Wavelengths at which a grating colour is evaluated (1 nm steps across COLOUR_BAND_NM).
COLOUR_BAND_SAMPLES = int(COLOUR_BAND_NM[1] - COLOUR_BAND_NM[0]) + 1
#: Pixels per resolution element assumed when a spectrometer's resolution is quoted (Nyquist-type
#: sampling of the slit image, common practice).
PIXELS_PER_RESOLUTION_ELEMENT = 3.0
#: Relative luminance of the sRGB primaries (IEC 61966-2-1, the Y row of its RGB-to-XYZ matrix,
#: taken from colour-science): the luminance of a linear sRGB colour is this dot product.
SRGB_LUMINANCE = np.asarray(colour.RGB_COLOURSPACES["sRGB"].matrix_RGB_to_XYZ, dtype=float)[1]


# ---------------------------------------------------------------------- validation
def _density(lines_per_mm):
    return require_finite("lines_per_mm", lines_per_mm, minimum=0.0, min_inclusive=False, unit="lines/mm")


def _incidence(incidence_deg):
    a = require_finite("incidence_deg", incidence_deg, unit="deg")
    if a.size and np.max(np.abs(a)) >= MAX_INCIDENCE_DEG:
        raise InputError(f"incidence_deg = {a.flat[np.argmax(np.abs(a))]:g}° is grazing or beyond; the incidence "
                         "must satisfy |angle| < 90° from the grating normal.")
    return a


def _wavelength(wavelength_nm, name="wavelength_nm"):
    return require_finite(name, wavelength_nm, minimum=0.0, min_inclusive=False, unit="nm")


def _order(order, *, nonzero=False, what="this quantity"):
    o = np.asarray(order)
    if not np.issubdtype(o.dtype, np.integer):
        try:
            f = o.astype(float)
        except (TypeError, ValueError):
            f = np.array(np.nan)
        if not np.all(np.isfinite(f)) or np.any(f % 1 != 0):
            raise InputError(f"order must be a whole number (…, −2, −1, 0, 1, 2, …); got {order!r}.")
        o = f.astype(int)
    if nonzero and np.any(o == 0):
        raise InputError(f"The zero order does not disperse; {what} needs order ≠ 0.")
    return o


def groove_spacing_nm(lines_per_mm) -> np.ndarray:
    """Groove spacing d in nm for a groove density in lines per mm (d = 10⁶ / density)."""
    return 1e6 / _density(lines_per_mm)


# ---------------------------------------------------------------------- angles
def _sin_beta(wavelength_nm, lines_per_mm, order, incidence_deg):
    wl = _wavelength(wavelength_nm)
    d = groove_spacing_nm(lines_per_mm)
    m = _order(order)
    a = np.radians(_incidence(incidence_deg))
    return m * wl / d - np.sin(a)


def diffraction_angle_deg(wavelength_nm, lines_per_mm, order=1, incidence_deg=0.0):
    """Angle β of diffraction order ``order`` (degrees); NaN where the order is evanescent.

    Parameters broadcast against each other. See :func:`order_status` for the reason of a NaN.

    References
    ----------
    Palmer & Loewen, Diffraction Grating Handbook, eq. 2-1 (grating equation).
    """
    s = _sin_beta(wavelength_nm, lines_per_mm, order, incidence_deg)
    with np.errstate(invalid="ignore"):
        beta = np.degrees(np.arcsin(np.clip(s, -1.0, 1.0)))
    out = np.where(np.abs(s) <= 1.0 + _GRAZING_TOL, beta, np.nan)
    return float(out) if out.ndim == 0 else out


def order_status(wavelength_nm, lines_per_mm, order=1, incidence_deg=0.0) -> str:
    """A sentence saying whether an order propagates, and if not, why (for one wavelength)."""
    s = float(_sin_beta(wavelength_nm, lines_per_mm, order, incidence_deg))
    if abs(s) <= 1.0 + _GRAZING_TOL:
        return f"order {int(order)} propagates at β = {np.degrees(np.arcsin(np.clip(s, -1, 1))):.3f}°"
    d = float(groove_spacing_nm(lines_per_mm))
    return (f"order {int(order)} is evanescent at {float(wavelength_nm):g} nm: it would need sin β = {s:.3f}, "
            f"beyond ±1 (groove spacing {d:.1f} nm is too fine for this order and wavelength)")


def propagating_orders(wavelength_nm, lines_per_mm, incidence_deg=0.0) -> list[int]:
    """All orders m (zero included) with |m·λ/d − sin α| <= 1, in increasing order."""
    wl = float(_wavelength(wavelength_nm))
    d = float(groove_spacing_nm(lines_per_mm))
    sa = float(np.sin(np.radians(_incidence(incidence_deg))))
    lo = int(np.ceil((sa - 1.0) * d / wl - 1e-9))
    hi = int(np.floor((sa + 1.0) * d / wl + 1e-9))
    return [m for m in range(lo, hi + 1) if abs(m * wl / d - sa) <= 1.0 + _GRAZING_TOL]


def order_band_nm(lines_per_mm, order, incidence_deg=0.0, beta_min_deg=-90.0, beta_max_deg=90.0):
    """Wavelengths (lo, hi) that order ``order`` sends into the angular window [β_min, β_max] (nm).

    Returns None when no wavelength of that order reaches the window.
    """
    m = int(_order(order, nonzero=True, what="a wavelength band"))
    d = float(groove_spacing_nm(lines_per_mm))
    sa = float(np.sin(np.radians(_incidence(incidence_deg))))
    b0, b1 = sorted((float(beta_min_deg), float(beta_max_deg)))
    if b0 < -90 or b1 > 90:
        raise InputError("The detector window must lie within −90° to 90° of the grating normal.")
    lam = sorted(d * (sa + np.sin(np.radians(b))) / m for b in (b0, b1))
    lo, hi = max(lam[0], 0.0), lam[1]
    return None if hi <= 0 else (lo, hi)


# ---------------------------------------------------------------------- dispersion and resolution
def angular_dispersion_deg_per_nm(wavelength_nm, lines_per_mm, order=1, incidence_deg=0.0):
    """dβ/dλ = m / (d cos β), in degrees per nm (NaN where the order is evanescent).

    References
    ----------
    Palmer & Loewen, Diffraction Grating Handbook, eq. 2-13.
    """
    m = _order(order, nonzero=True, what="a dispersion")
    beta = np.radians(np.asarray(diffraction_angle_deg(wavelength_nm, lines_per_mm, m, incidence_deg)))
    d = groove_spacing_nm(lines_per_mm)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.degrees(m / (d * np.cos(beta)))
    return float(out) if np.ndim(out) == 0 else out


def linear_dispersion_mm_per_nm(wavelength_nm, lines_per_mm, focal_length_mm, order=1, incidence_deg=0.0):
    """Linear dispersion at the focal plane, f·dβ/dλ, in mm per nm (exit focal length in mm)."""
    f = require_finite("focal_length_mm", focal_length_mm, minimum=0.0, min_inclusive=False, unit="mm")
    out = f * np.radians(angular_dispersion_deg_per_nm(wavelength_nm, lines_per_mm, order, incidence_deg))
    return float(out) if np.ndim(out) == 0 else out


def reciprocal_linear_dispersion_nm_per_mm(wavelength_nm, lines_per_mm, focal_length_mm, order=1, incidence_deg=0.0):
    """Reciprocal linear dispersion d cos β / (m f), in nm per mm (Palmer & Loewen, eq. 2-16)."""
    out = 1.0 / np.abs(linear_dispersion_mm_per_nm(wavelength_nm, lines_per_mm, focal_length_mm, order, incidence_deg))
    return float(out) if np.ndim(out) == 0 else out


def resolving_power(lines_per_mm, illuminated_width_mm, order=1):
    """Resolving power R = λ/Δλ = |m|·N for N illuminated grooves (Palmer & Loewen, eq. 2-17)."""
    w = require_finite("illuminated_width_mm", illuminated_width_mm, minimum=0.0, min_inclusive=False, unit="mm")
    m = _order(order, nonzero=True, what="a resolving power")
    out = np.abs(m) * _density(lines_per_mm) * w
    return float(out) if np.ndim(out) == 0 else out


def resolvable_difference_nm(wavelength_nm, lines_per_mm, illuminated_width_mm, order=1):
    """Smallest separable wavelength difference Δλ = λ/R (nm)."""
    out = _wavelength(wavelength_nm) / resolving_power(lines_per_mm, illuminated_width_mm, order)
    return float(out) if np.ndim(out) == 0 else out


def free_spectral_range_nm(wavelength_nm, order=1):
    """Free spectral range λ/|m| (nm): exact when λ is the short end of the band (see the exact form)."""
    m = _order(order, nonzero=True, what="a free spectral range")
    out = _wavelength(wavelength_nm) / np.abs(m)
    return float(out) if np.ndim(out) == 0 else out


def free_spectral_range_exact_nm(wavelength_nm, order=1):
    """Free spectral range from the overlap condition, for λ the LONG end of the band (nm).

    Order m at λ shares its angle with order m+1 at λ·m/(m+1): the overlap-free band ending at λ
    starts there, so FSR = λ/(|m|+1). (With λ the short end, the band is λ … λ(m+1)/m and FSR = λ/|m|.)
    """
    m = _order(order, nonzero=True, what="a free spectral range")
    out = _wavelength(wavelength_nm) / (np.abs(m) + 1)
    return float(out) if np.ndim(out) == 0 else out


def order_overlaps(band_nm, lines_per_mm, order=1, incidence_deg=0.0, source_band_nm=(200.0, 1100.0)):
    """Other orders that land on the same angles as ``band_nm`` in ``order``.

    For each other order m' ≠ 0 of the same sign, the wavelengths λ' = m·λ/m' (λ in the band)
    that the source emits (``source_band_nm``) and that propagate.

    Returns
    -------
    list of dict with keys ``order``, ``lo_nm``, ``hi_nm`` (the overlapping wavelengths), and
    ``at_band_nm`` (lo, hi) (the part of the band they fall on); sorted by order.
    """
    lo, hi = _band(band_nm)
    m = int(_order(order, nonzero=True, what="an order overlap"))
    s_lo, s_hi = _band(source_band_nm, "source_band_nm")
    beta = diffraction_angle_deg(np.linspace(lo, hi, 201), lines_per_mm, m, incidence_deg)
    ok = ~np.isnan(beta)
    if not ok.any():
        raise InputError(f"Order {m} does not propagate anywhere in {lo:g}-{hi:g} nm at {float(incidence_deg):g}° "
                         f"incidence with {float(np.asarray(lines_per_mm)):g} lines/mm; choose a coarser grating, "
                         "a lower order or another band.")
    lam = np.linspace(lo, hi, 201)[ok]
    lo, hi = float(lam[0]), float(lam[-1])                              # the part of the band that propagates
    rows = []
    sign = 1 if m > 0 else -1
    for k in range(1, 40):
        mp = k * sign
        if mp == m:
            continue
        a, b = m * lo / mp, m * hi / mp                                 # λ' = m·λ/m' shares β with λ
        a, b = max(a, s_lo), min(b, s_hi)
        if a >= b:
            continue
        rows.append({"order": mp, "lo_nm": float(a), "hi_nm": float(b),
                     "at_band_nm": (float(mp * a / m), float(mp * b / m))})
    return rows


def order_sorting_filter_nm(band_nm, order=1, source_band_nm=(200.0, 1100.0)):
    """Long-pass filter edges (nm) that remove other orders from a band observed in ``order``.

    Higher orders m' > |m| bring shorter wavelengths |m|·λ/m' onto band position λ; the nearest,
    m' = |m| + 1, brings the longest of them. They matter only where the source emits them: at
    band positions below ``clean_below_nm`` = (|m|+1)/|m| × (source's short end) every such
    wavelength is shorter than the source emits, and no filter is needed there. Above it, a
    long-pass edge e placed over band positions [e, e·(|m|+1)/|m|) passes the band light (λ >= e)
    and blocks the next order's (|m|·λ/(|m|+1) < e); a band wider than that needs a stepped filter
    with further sections at (|m|+1)/|m| times the previous edge. Lower orders (m' < |m|) bring
    longer wavelengths |m|·λ/m' that only a short-pass filter, a detector blind to them or a source
    without them removes: they are listed.

    Returns
    -------
    dict with ``edges_nm`` (long-pass edges, each applying from that wavelength of the band up;
    empty when no filter is needed), ``clean_below_nm`` (band positions below this need no
    long-pass filter), ``longer_orders`` (lower orders whose longer wavelengths, emitted by the
    source, also land on the band), ``longer_from_nm`` (the shortest of those wavelengths, or None)
    and ``note`` (sentences for the page).

    References
    ----------
    Palmer & Loewen, Diffraction Grating Handbook, sec. 2.7 (overlapping orders, order sorting).
    """
    lo, hi = _band(band_nm)
    m = abs(int(_order(order, nonzero=True, what="order sorting")))
    s_lo, s_hi = _band(source_band_nm, "source_band_nm")
    step = (m + 1) / m
    start = max(lo, s_lo * step)                                    # below this no higher order is emitted
    edges = []
    nxt = start
    while nxt < hi:
        edges.append(nxt)
        nxt = nxt * step
    longer = [mp for mp in range(1, m) if m * lo / mp < s_hi]
    notes = []
    if not edges:
        notes.append(f"No long-pass filter is needed: the higher orders would bring light shorter than "
                     f"{hi / step:.0f} nm onto the band, and the source emits nothing below {s_lo:.0f} nm.")
    else:
        clean = (f"The band below {start:.0f} nm needs no filter: the source emits nothing short enough to "
                 "reach it in a higher order. " if start > lo else "")
        if len(edges) == 1:
            notes.append(f"{clean}One long-pass filter with its edge just below {edges[0]:.0f} nm removes the "
                         f"higher orders" + (f" from {edges[0]:.0f} nm up." if start > lo else "."))
        else:
            notes.append(f"{clean}The part to filter ({start:.0f}–{hi:.0f} nm) spans more than ×{step:.3g}, so "
                         "one long-pass filter is not enough: use a stepped (segmented) filter with long-pass "
                         "sections whose edges sit at "
                         + _join_nm(edges) + " nm, each section covering the band from its edge to the next.")
    if longer:
        which = (f"Order {longer[0]} also brings" if len(longer) == 1 else
                 "Orders " + _join_words([str(k) for k in longer]) + " also bring")
        notes.append(f"{which} longer wavelengths onto the band (from {m * lo / max(longer):.0f} nm; the source "
                     f"emits up to {s_hi:.0f} nm). A long-pass filter cannot remove this light: use a short-pass "
                     "filter, a detector blind to it, or a source without it.")
    return {"edges_nm": edges, "clean_below_nm": start, "longer_orders": longer,
            "longer_from_nm": (m * lo / max(longer)) if longer else None, "note": " ".join(notes)}


def _join_words(words: list[str]) -> str:
    """'a', 'a and b', 'a, b and c'."""
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " and " + words[-1]


def _join_nm(values) -> str:
    return _join_words([f"{v:.0f}" for v in values])


# ---------------------------------------------------------------------- Littrow, blaze, anomalies
def littrow_angle_deg(wavelength_nm, lines_per_mm, order=1):
    """Littrow angle (α = β): sin θ = m·λ/(2d), degrees; NaN where m·λ > 2d (Palmer & Loewen, eq. 2-9)."""
    s = _order(order) * _wavelength(wavelength_nm) / (2 * groove_spacing_nm(lines_per_mm))
    with np.errstate(invalid="ignore"):
        out = np.where(np.abs(s) <= 1.0, np.degrees(np.arcsin(np.clip(s, -1, 1))), np.nan)
    return float(out) if out.ndim == 0 else out


def blaze_wavelength_nm(blaze_angle_deg, lines_per_mm, order=1):
    """Blaze wavelength in Littrow, λ_B = 2·d·sin θ_B / m (nm) (Palmer & Loewen, eq. 2-11)."""
    tb = require_finite("blaze_angle_deg", blaze_angle_deg, minimum=0.0, maximum=90.0, max_inclusive=False, unit="deg")
    m = _order(order, nonzero=True, what="a blaze wavelength")
    if np.any(m < 0):
        raise InputError("Facets at a blaze angle θ_B >= 0 blaze the positive orders; for a negative order "
                         "mirror the geometry (use order |m| with the angles' signs flipped).")
    out = 2 * groove_spacing_nm(lines_per_mm) * np.sin(np.radians(tb)) / m
    return float(out) if np.ndim(out) == 0 else out


def blaze_wavelength_at_deviation_nm(blaze_angle_deg, lines_per_mm, order=1, deviation_deg=0.0):
    """Blaze wavelength when the angle between incident and diffracted beams is ``deviation_deg``:
    λ_B = (2d/m)·sin θ_B·cos(D/2) (Palmer & Loewen, eq. 2-12; D = 0 is Littrow)."""
    dv = require_finite("deviation_deg", deviation_deg, minimum=0.0, maximum=180.0, max_inclusive=False, unit="deg")
    out = blaze_wavelength_nm(blaze_angle_deg, lines_per_mm, order) * np.cos(np.radians(dv) / 2)
    return float(out) if np.ndim(out) == 0 else out


def rayleigh_wavelength_nm(lines_per_mm, order=1, incidence_deg=0.0):
    """Wavelength at which order ``order`` goes grazing (β = ±90°): a Rayleigh (Wood) anomaly, nm.

    λ = d·(sin α + 1)/m for m > 0, d·(sin α − 1)/m for m < 0 (Palmer & Loewen, ch. 9).
    """
    m = _order(order, nonzero=True, what="a Rayleigh wavelength")
    sa = np.sin(np.radians(_incidence(incidence_deg)))
    out = groove_spacing_nm(lines_per_mm) * (sa + np.sign(m)) / m
    return float(out) if np.ndim(out) == 0 else out


# ---------------------------------------------------------------------- line shape and efficiency
def n_slit_intensity(angle_deg, wavelength_nm, lines_per_mm, n_slits, slit_width_nm=None, incidence_deg=0.0):
    """Far-field intensity of N slits of width a and period d, relative to one slit's central peak.

    I = sinc²(π a u/λ) · [sin(N π d u/λ) / sin(π d u/λ)]², u = sin α + sin β. Principal maxima
    reach N² (times the envelope); between them lie N − 2 secondary maxima; orders fall on zeros of
    the single-slit envelope are missing (Born & Wolf, sec. 8.6.1).

    Parameters
    ----------
    angle_deg : array_like  diffraction angles β
    n_slits : int  illuminated slits (grooves), >= 1
    slit_width_nm : float, optional  slit width a (default d/2)
    """
    beta = np.radians(require_finite("angle_deg", angle_deg, minimum=-90.0, maximum=90.0, unit="deg"))
    wl = _wavelength(wavelength_nm)
    d = groove_spacing_nm(lines_per_mm)
    if not isinstance(n_slits, (int, np.integer)) or n_slits < 1:
        raise InputError(f"n_slits must be a whole number >= 1; got {n_slits!r}.")
    a = d / 2 if slit_width_nm is None else require_finite("slit_width_nm", slit_width_nm, minimum=0.0,
                                                            min_inclusive=False, unit="nm")
    if np.any(a > d):
        raise InputError(f"The slit width ({float(a):g} nm) cannot exceed the period ({float(d):g} nm).")
    u = np.sin(np.radians(_incidence(incidence_deg))) + np.sin(beta)
    phase = np.pi * d * u / wl
    env = np.sinc(a * u / wl) ** 2                                     # numpy sinc(x) = sin(πx)/(πx)
    num = np.sin(n_slits * phase)
    den = np.sin(phase)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(np.abs(den) > 1e-12, num / den, n_slits * np.cos(n_slits * phase) / np.cos(phase))
    return env * ratio ** 2


def _sinc2(x):
    """sinc²(x) with exact zeros at nonzero whole x (missing orders carry no light, not 1e-33)."""
    x = np.asarray(x, dtype=float)
    k = np.round(x)
    return np.where((k != 0) & (np.abs(x - k) <= 1e-12 * np.maximum(1.0, np.abs(x))), 0.0, np.sinc(x) ** 2)


def groove_efficiency(wavelength_nm, lines_per_mm, order, kind="lamellar", duty_cycle=0.5, blaze_angle_deg=None,
                      incidence_deg=0.0):
    """Relative efficiency of an order in the scalar approximation (0..1).

    ``"lamellar"``: rectangular grooves of open fraction f, sinc²(m·f) (amplitude grating).
    ``"blazed"``: sawtooth facets at θ_B lit at incidence α (degrees, ``incidence_deg``); the
    Kirchhoff integral over one facet gives sinc²(m − (d/λ)·tan θ_B·(cos α + cos β)), which is 1
    on the facet-specular direction α + β = 2θ_B at any deviation (in Littrow, α = β = θ_B, it
    reduces to sinc²(m − λ_B/λ) with λ_B = 2d sin θ_B); an order that does not propagate at this
    incidence carries nothing (0). Scalar theory holds for d ≫ λ; below d/λ ≈ 3 (common practice)
    it is only indicative: :func:`rigorous_efficiency` solves Maxwell's equations for the groove.

    References
    ----------
    Loewen & Popov, Diffraction Gratings and Applications, ch. 4 (scalar efficiency of lamellar
    and blazed grooves); Palmer & Loewen, Diffraction Grating Handbook, sec. 2.9 (blaze on the
    facet-specular direction).
    """
    m = _order(order)
    wl = _wavelength(wavelength_nm)
    d = groove_spacing_nm(lines_per_mm)                                 # validates the groove density
    if kind == "lamellar":
        f = float(require_finite("duty_cycle", duty_cycle, minimum=0.0, maximum=1.0, min_inclusive=False))
        return _sinc2(m * f) * np.ones_like(wl)
    if kind == "blazed":
        if blaze_angle_deg is None:
            raise InputError("A blazed groove needs blaze_angle_deg.")
        tb = np.radians(float(require_finite("blaze_angle_deg", blaze_angle_deg, minimum=0.0, maximum=89.0,
                                             unit="deg")))
        a = np.radians(_incidence(incidence_deg))
        sb = m * wl / d - np.sin(a)                                     # grating equation: sin β
        live = np.abs(sb) <= 1.0 + _GRAZING_TOL
        cb = np.sqrt(np.clip(1.0 - sb ** 2, 0.0, None))
        # phase across one facet, in waves: (d/λ)[(sin α + sin β) − tan θ_B (cos α + cos β)] = m − …
        return np.where(live, _sinc2(m - d / wl * np.tan(tb) * (np.cos(a) + cb)), 0.0)
    raise InputError(f"kind must be 'lamellar' or 'blazed'; got {kind!r}.")


# ---------------------------------------------------------------------- rigorous efficiency
#: Most wavelengths one rigorous curve may hold (each costs a few ms to tens of ms): a bound on the
#: work one request can ask for.
MAX_RIGOROUS_WAVELENGTHS = 2000
#: Below this groove spacing over wavelength, scalar efficiency theory is not to be trusted: the
#: efficiency depends on polarization and shows anomalies (common practice).
SCALAR_TRUST_D_OVER_LAMBDA = 3.0


def _rigorous_inputs(wavelength_nm, lines_per_mm, order, incidence_deg, profile, depth_nm, duty_cycle,
                     blaze_angle_deg, material, polarization, kind):
    from . import rcwa
    from .materials import material as _material

    wl = np.atleast_1d(_wavelength(wavelength_nm)).astype(float).ravel()
    if wl.size > MAX_RIGOROUS_WAVELENGTHS:
        raise InputError(f"{wl.size} wavelengths asked; a rigorous curve holds at most {MAX_RIGOROUS_WAVELENGTHS}. "
                         "Use fewer samples or split the band.")
    for name, value in (("lines_per_mm", lines_per_mm), ("incidence_deg", incidence_deg)):
        if np.ndim(value) != 0:
            raise InputError(f"{name} must be one number for a rigorous curve; got {value!r}.")
    d = float(groove_spacing_nm(lines_per_mm))
    scalar = np.ndim(order) == 0
    orders = tuple(int(m) for m in np.atleast_1d(_order(order)).ravel())
    if not orders:
        raise InputError("orders is empty; give one order or a list of orders (…, −1, 0, 1, …).")
    alpha = float(_incidence(incidence_deg))
    pol = str(polarization).strip().lower() if isinstance(polarization, str) else None
    if pol not in rcwa.POLARIZATIONS:
        raise InputError(f"polarization must be 'TE' (or 's'), 'TM' (or 'p') or 'unpolarized'; got {polarization!r}.")
    if kind not in ("reflection", "transmission"):
        raise InputError(f"kind must be 'reflection' or 'transmission'; got {kind!r}.")
    depth = rcwa.check_profile(profile, depth_nm, duty_cycle, blaze_angle_deg, d)
    mat = _material(material)
    nk = np.asarray(mat.nk(wl), dtype=complex)
    if kind == "transmission" and float(nk.imag.max()) > rcwa.TRANSPARENT_K_MAX:
        raise InputError(f"{mat.name} absorbs (k up to {float(nk.imag.max()):.3g}); a transmission grating needs a "
                         f"transparent material (k <= {rcwa.TRANSPARENT_K_MAX:g}), such as a glass or SiO2. Use "
                         "kind='reflection' for a metal.")
    return rcwa, wl, d, scalar, orders, alpha, pol, depth, nk


def rigorous_efficiency_detail(wavelength_nm, lines_per_mm, order, incidence_deg=0.0, *, profile="lamellar",
                               depth_nm=None, duty_cycle=0.5, blaze_angle_deg=None, material="Al",
                               polarization="unpolarized", kind="reflection", backend="fmm"):
    """:func:`rigorous_efficiency` with how it was obtained: a :class:`physics.rcwa.RigorousEfficiency`.

    ``backend``: "fmm" (the project's solver, :mod:`physics.fmm`) or "meent" (the second, independent
    implementation, many times slower: for checks).

    Its ``efficiency`` is always (W, O) (O orders asked); it also holds the TE and TM curves, the
    reflected and transmitted totals over all orders, the absorbed fraction, the harmonic count
    chosen (``harmonics`` N, the larger of the two polarizations', ``fourier_orders`` = 2N + 1, and
    ``harmonics_by_polarization``) and whether it converged.
    """
    rcwa, wl, d, scalar, orders, alpha, pol, depth, nk = _rigorous_inputs(
        wavelength_nm, lines_per_mm, order, incidence_deg, profile, depth_nm, duty_cycle, blaze_angle_deg,
        material, polarization, kind)
    thickness, intervals = rcwa.profile_slices(profile, depth, duty_cycle, blaze_angle_deg, d, float(wl.min()))
    pols = rcwa.POLARIZATIONS[pol]
    quoted, r_tot, t_tot, counts, converged, change = [], [], [], [], True, 0.0
    for p in pols:                              # each polarization converges at its own pace (TM on metals slowly)
        R, T, n, ok, ch = rcwa.converged_orders(wl, d, alpha, thickness, intervals, nk, orders, (p,), kind,
                                                backend=backend)
        quoted.append((R if kind == "reflection" else T)[:, 0, n + np.asarray(orders)])
        r_tot.append(R[:, 0].sum(axis=1))
        t_tot.append(T[:, 0].sum(axis=1))
        counts.append(int(n))
        converged, change = converged and ok, max(change, ch if not ok else 0.0)
    quoted = np.stack(quoted, axis=1)                                   # (W, P, O)
    r_tot, t_tot = np.stack(r_tot, axis=1), np.stack(t_tot, axis=1)     # (W, P)
    live = np.abs(np.asarray(orders)[None, :] * wl[:, None] / d - np.sin(np.radians(alpha))) <= 1.0 + _GRAZING_TOL
    quoted = np.where(live[:, None, :], np.clip(quoted, 0.0, None), 0.0)
    te = quoted[:, pols.index(0)] if 0 in pols else None
    tm = quoted[:, pols.index(1)] if 1 in pols else None
    eff = quoted.mean(axis=1)
    lossless = float(nk.imag.max()) <= rcwa.TRANSPARENT_K_MAX
    absorbed = 1.0 - r_tot - (t_tot if lossless else 0.0)               # an absorbing substrate keeps what enters it
    names = {0: "TE", 1: "TM"}
    note = (", ".join(f"{2 * n + 1} Fourier orders for {names[p]}" for p, n in zip(pols, counts))
            + ("" if converged else f"; not converged to {rcwa.CONVERGENCE_TOL:g} at the cap (last change {change:.2g})"))
    return rcwa.RigorousEfficiency(wl, orders, eff, te, tm, pols, r_tot, t_tot, absorbed, max(counts),
                                   bool(converged), float(change), len(thickness), kind, note,
                                   dict(zip((names[p] for p in pols), counts)))


def rigorous_efficiency(wavelength_nm, lines_per_mm, order, incidence_deg=0.0, *, profile="lamellar", depth_nm=None,
                        duty_cycle=0.5, blaze_angle_deg=None, material="Al", polarization="unpolarized",
                        kind="reflection"):
    """Absolute diffraction efficiency of an order from Maxwell's equations (rigorous coupled waves).

    Parameters
    ----------
    wavelength_nm : array_like
        Vacuum wavelengths, nm (one axis W; a single number gives W = 1).
    lines_per_mm : float
        Groove density.
    order : int or sequence of int
        Diffraction order(s), sign convention m·λ = d(sin α + sin β) of this module.
    incidence_deg : float
        Angle of incidence α from the grating normal, degrees (|α| < 90°), in the plane
        perpendicular to the grooves.
    profile : {"lamellar", "sinusoidal", "blazed"}
        Groove shape; "sinusoidal" and "blazed" are cut into a staircase of 10 to 20 slices, each at
        most 1/20 of the shortest wavelength thick.
    depth_nm : float, optional
        Groove depth peak to valley, nm. Default (None): 100 nm for lamellar and sinusoidal grooves;
        for blazed grooves the right-angle apex depth d·sin θ_B·cos θ_B.
    duty_cycle : float
        Ridge width over the period, strictly between 0 and 1 (lamellar only).
    blaze_angle_deg : float
        Facet angle θ_B, 0° < θ_B < 90° (blazed only); the facet blazes the positive orders.
    material : str, number or Material
        Grating and substrate material, anything :func:`physics.material` accepts ("Al", "Ag",
        "Au", "SiO2", 1.5, "1.2+7i" …); the ambient above is vacuum/air with n = 1 exactly.
    polarization : {"TE", "s", "TM", "p", "unpolarized"}
        TE/s: electric field along the grooves; TM/p: magnetic field along the grooves;
        unpolarized: their mean.
    kind : {"reflection", "transmission"}
        Reflected orders, or orders transmitted into the substrate that leave through a flat
        back face (power carried in the substrate; back-face Fresnel loss not included). Transmission
        is only meaningful for a transparent grating on a substrate of the same material.

    Returns
    -------
    numpy.ndarray
        Efficiencies 0..1 (fraction of the incident power), shape (W,) for one order and (W, O)
        for a sequence of O orders; an order that does not propagate is 0. The harmonic count is
        chosen by convergence (:func:`rigorous_efficiency_detail` reports it).

    Raises
    ------
    InputError
        Bad depth, duty cycle, blaze angle, profile, polarization or kind; an unknown material; a
        wavelength outside the material's data.

    References
    ----------
    M. G. Moharam and T. K. Gaylord, J. Opt. Soc. Am. 71, 811 (1981); M. G. Moharam et al.,
    J. Opt. Soc. Am. A 12, 1068 (1995); L. Li, J. Opt. Soc. Am. A 13, 1870 (1996); the project's
    Fourier modal method (:mod:`physics.fmm`), checked against the meent solver (:mod:`physics.rcwa`).
    """
    res = rigorous_efficiency_detail(wavelength_nm, lines_per_mm, order, incidence_deg, profile=profile,
                                     depth_nm=depth_nm, duty_cycle=duty_cycle, blaze_angle_deg=blaze_angle_deg,
                                     material=material, polarization=polarization, kind=kind)
    return res.efficiency[:, 0] if np.ndim(order) == 0 else res.efficiency


#: Wavelengths at which a planner candidate's band is sampled for its mean rigorous efficiency: enough to
#: average a smooth curve and give a Rayleigh dip its share, at about a tenth of a full curve's cost.
PLAN_EFFICIENCY_SAMPLES = 21


def band_efficiency(band_nm, lines_per_mm, order, incidence_deg=0.0, *, samples=PLAN_EFFICIENCY_SAMPLES,
                    polarization="unpolarized", **rigorous):
    """Mean absolute efficiency of one order over a band (unpolarized by default), from :func:`rigorous_efficiency`.

    Parameters
    ----------
    band_nm : (short, long) nm; sampled at ``samples`` evenly spaced wavelengths, ends included
    lines_per_mm, order, incidence_deg : the grating, its order and the angle of incidence (degrees)
    polarization, **rigorous : polarization, profile, depth_nm, duty_cycle, blaze_angle_deg, material and
        kind as for :func:`rigorous_efficiency`

    Returns
    -------
    float : the mean over the samples (an order that does not propagate counts as 0).
    """
    lo, hi = _band(band_nm)
    n = int(samples)
    if not 2 <= n <= MAX_RIGOROUS_WAVELENGTHS:
        raise InputError(f"samples = {samples!r} is not allowed; give 2 to {MAX_RIGOROUS_WAVELENGTHS} wavelengths.")
    eff = rigorous_efficiency(np.linspace(lo, hi, n), lines_per_mm, int(order), incidence_deg,
                              polarization=polarization, **rigorous)
    return float(np.mean(eff))


# ---------------------------------------------------------------------- colour
def _band(band, name="band_nm"):
    b = _wavelength(band, name).ravel()
    if b.size != 2 or not b[0] < b[1]:
        raise InputError(f"{name} is (short end, long end) in nm with short < long; got {band!r}.")
    return float(b[0]), float(b[1])


def grating_spectrum(view_deg, lines_per_mm, incidence_deg=0.0, *, kind="lamellar", duty_cycle=0.5,
                     blaze_angle_deg=None, wavelength_nm=None):
    """Relative spectral power reaching an eye at β = ``view_deg``, summed over all nonzero orders.

    For each order m the grating sends λ_m = d(sin α + sin β)/m toward the eye; a small fixed pupil
    collects the band dλ = d cos β/|m| dβ, so each order contributes efficiency × d cos β/|m| at λ_m
    (Palmer & Loewen, eq. 2-13 inverted). The result is a spectrum sampled on ``wavelength_nm``
    (default 380-780 nm at 1 nm) with each order's line spread over the nearest samples (linear
    weights), in units of "one nm of the lamp per degree of view".

    Returns
    -------
    (wavelength_nm, power, orders) : arrays (W,), (..., W) for view angles (...,), and a list of
    (order, λ_m) pairs per view angle for the first view angle.
    """
    wl = np.arange(COLOUR_BAND_NM[0], COLOUR_BAND_NM[1] + 0.5, 1.0) if wavelength_nm is None else _wavelength(
        wavelength_nm).ravel()
    view = np.atleast_1d(require_finite("view_deg", view_deg, minimum=-90.0, maximum=90.0, unit="deg"))
    d = float(groove_spacing_nm(lines_per_mm))
    sa = float(np.sin(np.radians(_incidence(incidence_deg))))
    u = sa + np.sin(np.radians(view))                                   # (V,)
    cosb = np.cos(np.radians(view))
    power = np.zeros(view.shape + wl.shape)
    m_max = int(np.ceil(2 * d / wl[0])) + 1
    first = []
    for m in [k for k in range(-m_max, m_max + 1) if k != 0]:
        lam = d * u / m                                                 # (V,)
        inside = (lam >= wl[0]) & (lam <= wl[-1])
        if not inside.any():
            continue
        eff = groove_efficiency(np.where(inside, lam, wl[0]), lines_per_mm, m, kind, duty_cycle, blaze_angle_deg,
                                incidence_deg)
        weight = np.where(inside, eff * d * np.abs(cosb) / abs(m), 0.0)
        pos = np.interp(lam, wl, np.arange(wl.size))
        i0 = np.clip(np.floor(pos).astype(int), 0, wl.size - 1)
        i1 = np.minimum(i0 + 1, wl.size - 1)
        frac = pos - i0
        step = np.gradient(wl)[i0]
        flat_v = np.arange(view.size)
        np.add.at(power.reshape(-1, wl.size), (flat_v, i0.ravel()), (weight * (1 - frac) / step).ravel())
        np.add.at(power.reshape(-1, wl.size), (flat_v, i1.ravel()), (weight * frac / step).ravel())
        if inside.ravel()[0]:
            first.append((m, float(lam.ravel()[0])))
    return wl, power, first


def _desaturated_linear(xyz, illuminant, observer):
    """Linear sRGB of ``xyz`` (adapted to the display white) with negative channels removed by
    mixing in the display white of the same luminance, as little as needed; see :func:`display_srgb`."""
    lin = _linear_srgb(np.asarray(xyz, dtype=float), illuminant, observer)
    y = np.clip(lin @ SRGB_LUMINANCE, 0.0, None)[..., None]        # luminance: kept by the mixing
    with np.errstate(divide="ignore", invalid="ignore"):
        need = np.where(lin < 0.0, -lin / (y - lin), 0.0)           # (1 − t)·c + t·Y = 0 for c < 0
    t = np.clip(np.max(need, axis=-1, keepdims=True), 0.0, 1.0)
    return (1.0 - t) * lin + t * y, lin


def display_srgb(xyz, illuminant="D65", observer="2"):
    """Display sRGB (encoded, 0..1) of XYZ (Y = 1 is the lamp's white), gamut-mapped without hue shifts.

    Gamut mapping: constant-luminance desaturation toward the white point, then uniform scaling.
    A colour with a negative linear sRGB channel (a chromaticity outside the sRGB triangle, such as
    every spectral line) is mixed with the display white of the same luminance Y, by the least
    amount that makes every channel >= 0: its chromaticity moves along the straight line toward
    the white point (dominant wavelength kept) and its luminance is unchanged. A colour with a
    channel above 1 is then scaled down as a whole (chromaticity kept, luminance lowered) until its
    largest channel is 1, instead of clipping each channel: clipping the blue of an over-bright
    violet while its red also saturates would show it as magenta. Straight-line mapping toward a
    neutral point is one of the standard gamut-mapping families (J. Morovič, Color Gamut Mapping,
    Wiley 2008, ch. 10; cited from memory); the sRGB matrix, CAT02 adaptation and encoding come from
    colour-science (IEC 61966-2-1:1999).

    Returns
    -------
    (rgb, out_of_gamut) : (..., 3) encoded sRGB in 0..1, and (...) True where mapping changed the colour.
    """
    mapped, lin = _desaturated_linear(xyz, illuminant, observer)
    oog = np.any((lin < -GAMUT_TOLERANCE) | (lin > 1.0 + GAMUT_TOLERANCE), axis=-1)
    peak = np.max(mapped, axis=-1, keepdims=True)
    mapped = np.clip(mapped / np.where(peak > 1.0, peak, 1.0), 0.0, 1.0)   # the clip only trims rounding
    return np.asarray(colour.models.eotf_inverse_sRGB(mapped), dtype=float), oog


def spectral_line_srgb(wavelength_nm, observer="2"):
    """Display sRGB (encoded, 0..1) of monochromatic lines seen on a display adapted to D65.

    Each line is shown at the brightest display level its chromaticity allows after the gamut
    mapping of :func:`display_srgb` (constant-luminance desaturation toward the white point, then
    uniform scaling): the hue of a line at full display brightness. The display's blue primary has
    a relative luminance of 0.07, so violet lines come out dim (Y about 0.13) and never magenta.
    Wavelengths outside the CIE tables' 360-830 nm are black.

    Returns
    -------
    (..., 3) array of display sRGB.

    References
    ----------
    CIE 015:2018 colour-matching functions, via colour-science (``colour.wavelength_to_XYZ``).
    """
    wl = np.atleast_1d(_wavelength(wavelength_nm)).astype(float)
    inside = (wl >= 360.0) & (wl <= 830.0)
    cmfs = colour.MSDS_CMFS[_observer(observer)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        xyz = np.asarray(colour.wavelength_to_XYZ(np.where(inside, wl, 555.0), cmfs), dtype=float).reshape(-1, 3)
    mapped, _ = _desaturated_linear(xyz, "D65", observer)
    peak = np.max(mapped, axis=-1, keepdims=True)
    mapped = np.clip(mapped / np.where(peak > 0, peak, 1.0), 0.0, 1.0) * inside.reshape(-1, 1)
    rgb = np.asarray(colour.models.eotf_inverse_sRGB(mapped), dtype=float)
    return rgb.reshape(np.shape(wavelength_nm) + (3,))


def _shown(xyz, scale, illuminant, observer):
    """rgb, lab and out-of-gamut flag of ``xyz`` times ``scale`` (a number or one per direction)."""
    scaled = xyz * np.asarray(scale)[..., None] if np.ndim(scale) else xyz * scale
    rgb, oog = display_srgb(scaled, illuminant, observer)
    return rgb, xyz_to_lab(scaled, illuminant, observer), oog


def grating_color(view_deg, lines_per_mm, incidence_deg=0.0, illuminant="D65", observer="2", *, kind="lamellar",
                  duty_cycle=0.5, blaze_angle_deg=None, normalize="per_direction"):
    """Display sRGB of the light a grating sends to an eye at ``view_deg`` under white light.

    Parameters
    ----------
    normalize : {"per_direction", "common"} or float
        "per_direction" (default): each direction is shown at full display brightness (its largest
        linear sRGB channel = 1 after the gamut mapping of :func:`display_srgb`), so the hue of every
        direction is visible; "common": one scale for all directions given, the largest that keeps
        every direction inside the display (the most intense direction has a channel at 1), so
        relative brightness is kept; a number: that Y is display white (brighter colours are scaled
        down into the display by :func:`display_srgb`).

    Returns
    -------
    dict with ``rgb`` (..., 3), ``xyz`` (..., 3, unscaled), ``lab`` (..., 3), ``out_of_gamut`` (...),
    ``orders`` (the (m, λ) pairs reaching the first view angle), ``dark`` (...) True where no
    visible light arrives, and ``scale`` (... or scalar).
    """
    wl, power, first = grating_spectrum(view_deg, lines_per_mm, incidence_deg, kind=kind, duty_cycle=duty_cycle,
                                        blaze_angle_deg=blaze_angle_deg)
    xyz = spectrum_to_xyz(power, wl, illuminant, observer)
    scale = _scale(xyz, normalize, illuminant, observer)
    rgb, lab, oog = _shown(xyz, scale, illuminant, observer)
    return {"rgb": rgb, "xyz": xyz, "lab": lab, "out_of_gamut": oog, "orders": first,
            "dark": xyz[..., 1] <= 0, "scale": scale}


def _scale(xyz, normalize, illuminant, observer):
    if normalize in ("per_direction", "common"):
        peak = np.max(_desaturated_linear(xyz, illuminant, observer)[0], axis=-1)
        if normalize == "per_direction":
            return np.where(peak > 0, 1.0 / np.where(peak > 0, peak, 1.0), 0.0)
        top = float(peak.max()) if peak.size else 0.0
        return 1.0 / top if top > 0 else 1.0
    y = float(require_finite("normalize", normalize, minimum=0.0, min_inclusive=False))
    return 1.0 / y


def grating_color_map(view_deg, lines_per_mm, incidence_deg=0.0, illuminant="D65", observer="2",
                      normalize="per_direction", **kw):
    """Colours over (groove density, view angle): ``rgb`` (n_density, n_view, 3) and the axes."""
    dens = np.atleast_1d(_density(lines_per_mm)).ravel()
    view = np.atleast_1d(np.asarray(view_deg, dtype=float)).ravel()
    xyz = np.stack([grating_color(view, g, incidence_deg, illuminant, observer, normalize=1.0, **kw)["xyz"]
                    for g in dens])
    scale = _scale(xyz, normalize, illuminant, observer)
    rgb, lab, oog = _shown(xyz, scale, illuminant, observer)
    return {"rgb": rgb, "lab": lab, "out_of_gamut": oog, "dark": xyz[..., 1] <= 0, "lines_per_mm": dens,
            "view_deg": view}


# ---------------------------------------------------------------------- spectrometer planning
@dataclass(frozen=True)
class SpectrometerDesign:
    """One grating and order that fit the band on the detector without order overlap."""

    lines_per_mm: float
    order: int
    incidence_deg: float
    beta_range_deg: tuple
    spread_mm: float
    fill_fraction: float
    nm_per_pixel: float
    resolution_nm: float
    free_spectral_range_nm: float
    note: str
    filter_edges_nm: tuple = ()     #: long-pass edges of the stepped order-sorting filter the band needs (nm)


@dataclass(frozen=True)
class PlanRejection:
    """A groove density and order the planner left out, and why (a sentence)."""

    lines_per_mm: float
    order: int
    reason: str


def plan_spectrometer(band_nm, focal_length_mm, detector_length_mm, pixel_pitch_um, *, deviation_deg=30.0,
                      densities=(150, 300, 600, 900, 1200, 1800, 2400, 3600), orders=(1, 2, 3),
                      min_fill=0.3, source_band_nm=None) -> list[SpectrometerDesign]:
    """Propose groove densities and orders that fit a band on a detector without order overlap.

    Geometry: a fixed angle ``deviation_deg`` between incident and diffracted beams at the band
    centre (a common compact mount), the grating rotated so the centre wavelength hits the detector
    centre; the spread on the detector is f·(β(long) − β(short)) (flat detector, small angles);
    resolution is :data:`PIXELS_PER_RESOLUTION_ELEMENT` pixels of the reciprocal linear dispersion.

    ``source_band_nm`` (nm, optional): what the source emits. Without it a band wider than one free
    spectral range is left out; with it such a band is kept when a stepped long-pass order-sorting
    filter (:func:`order_sorting_filter_nm`) clears it, its edges given in ``filter_edges_nm``, and
    left out when lower orders bring longer light onto it that no long-pass filter removes.

    Returns
    -------
    list of SpectrometerDesign, best resolution first; designs that overflow the detector, overlap
    orders, or fill less than ``min_fill`` of it are left out (:func:`plan_spectrometer_report` says why).

    References
    ----------
    Palmer & Loewen, Diffraction Grating Handbook, sec. 2.7 (order sorting) and ch. 6 (mounts).
    """
    return plan_spectrometer_report(band_nm, focal_length_mm, detector_length_mm, pixel_pitch_um,
                                    deviation_deg=deviation_deg, densities=densities, orders=orders,
                                    min_fill=min_fill, source_band_nm=source_band_nm)[0]


def plan_spectrometer_report(band_nm, focal_length_mm, detector_length_mm, pixel_pitch_um, *, deviation_deg=30.0,
                             densities=(150, 300, 600, 900, 1200, 1800, 2400, 3600), orders=(1, 2, 3),
                             min_fill=0.3, source_band_nm=None):
    """(designs, rejections): :func:`plan_spectrometer`'s designs, and a :class:`PlanRejection` for every
    density and order it left out, in the order tried."""
    lo, hi = _band(band_nm)
    f = float(require_finite("focal_length_mm", focal_length_mm, minimum=0.0, min_inclusive=False, unit="mm"))
    L = float(require_finite("detector_length_mm", detector_length_mm, minimum=0.0, min_inclusive=False, unit="mm"))
    p = float(require_finite("pixel_pitch_um", pixel_pitch_um, minimum=0.0, min_inclusive=False, unit="µm")) / 1000
    dv = float(require_finite("deviation_deg", deviation_deg, minimum=0.0, maximum=120.0, unit="deg"))
    dens = [float(g) for g in np.atleast_1d(_density(densities)).ravel()]
    ords = [int(m) for m in np.atleast_1d(_order(orders, nonzero=True, what="a spectrometer design")).ravel()]
    source = _band(source_band_nm, "source_band_nm") if source_band_nm is not None else None
    centre = 0.5 * (lo + hi)
    out, dropped = [], []
    for g in dens:
        d = 1e6 / g
        for m in ords:
            def drop(reason):
                dropped.append(PlanRejection(g, m, reason))
            edges = ()
            if hi > lo * (abs(m) + 1) / abs(m):                        # wider than one free spectral range
                if source is None:
                    drop(f"the band is wider than one free spectral range in order {m} ({lo:g}–{lo * (abs(m) + 1) / abs(m):.0f} nm)")
                    continue
                sorting = order_sorting_filter_nm((lo, hi), m, source)
                if sorting["longer_orders"]:
                    drop(f"lower orders bring longer light (from {sorting['longer_from_nm']:.0f} nm) onto the band, "
                         "which no long-pass filter removes")
                    continue
                edges = tuple(float(e) for e in sorting["edges_nm"])
            # grating rotation θ with α = θ + D/2, β = θ − D/2: m λc = 2 d sin θ cos(D/2)
            s = m * centre / (2 * d * np.cos(np.radians(dv) / 2))
            if abs(s) >= 1:
                drop(f"the centre wavelength cannot reach the {dv:g}° deviation (grooves too dense for order {m})")
                continue
            theta = np.degrees(np.arcsin(s))
            alpha = theta + dv / 2
            if abs(alpha) >= 89:
                drop(f"it needs a grazing incidence ({alpha:.0f}°)")
                continue
            b = [diffraction_angle_deg(w, g, m, alpha) for w in (lo, hi)]
            if any(np.isnan(b)):
                drop("part of the band does not propagate (evanescent) in this order")
                continue
            spread = f * np.radians(abs(b[1] - b[0]))
            if spread > L:
                drop(f"the band spreads over {spread:.1f} mm, more than the {L:g} mm detector")
                continue
            if spread < min_fill * L:
                drop(f"the band fills only {100 * spread / L:.0f} % of the detector (less than {100 * min_fill:.0f} %)")
                continue
            rld = reciprocal_linear_dispersion_nm_per_mm(centre, g, f, m, alpha)
            nm_px = rld * p
            out.append(SpectrometerDesign(float(g), int(m), float(alpha), (float(b[0]), float(b[1])), float(spread),
                                          float(spread / L), float(nm_px), float(nm_px * PIXELS_PER_RESOLUTION_ELEMENT),
                                          float(lo / abs(m)),
                                          f"{g:g} lines/mm, order {m}: {lo:g}-{hi:g} nm spans {spread:.1f} of "
                                          f"{L:g} mm; {nm_px:.3f} nm/pixel"
                                          + (f"; stepped order-sorting filter, edges {_join_nm(edges)} nm" if edges else ""),
                                          edges))
    out.sort(key=lambda x: x.resolution_nm)
    return out, dropped
