"""Curves of a film fit: the model spectrum at the fitted parameters, and the 1σ band of the fitted n and k.

Both read a :class:`~physics.filmfit.FilmFitResult` and compute what :func:`~physics.filmfit.fit_film` fitted:

- :func:`film_fit_reflectance`: the stack with the fitted film (and its roughness layer), averaged over the
  fitted thickness spread, read through the instrument's slit when the fit had one, times the fitted scale
  plus the fitted offset — the model the fit compared with the measurement.
- :func:`nk_sigma`: 1σ of n(λ) and k(λ) by linear propagation of the fitted parameters' covariance,
  σ_n² = gᵀ C g with g = ∂n/∂p (forward differences) and C the covariance block of the dispersion
  parameters (the correlation times the σs). Linear propagation holds while n and k are close to linear in
  the parameters over ±1σ (Press et al. sec. 15.6; JCGM 100:2008 (GUM) sec. 5.1).
- :func:`nk_band`: the central 68 % band of n(λ) and k(λ) by propagating distributions (JCGM 101:2008, the
  GUM's Monte Carlo supplement): :data:`BAND_DRAWS` parameter sets drawn from the multivariate normal of the
  fitted values and covariance (seeded), each turned into n and k, and the 15.87th and 84.13th percentiles
  taken at each wavelength. A draw outside the model's range is put at the bound it crossed (the fit cannot
  go beyond it either; k >= 0 stays true). This is the band the page draws. Linear propagation is not: an
  Urbach tail k = k₀·exp(s·(E − E₀)) is exponential in its slope s, so far from E₀ a ±1σ of s spans a factor
  exp(σ_s·|E − E₀|) in k, and the linear band k(1 ± σ_s·|E − E₀|) is too narrow above and reaches below 0.

References
----------
W. H. Press et al., Numerical Recipes, 3rd ed., sec. 15.6 (confidence limits from the covariance) and
sec. 4.6 (Gauss-Hermite quadrature); JCGM 100:2008, Evaluation of measurement data - Guide to the
expression of uncertainty in measurement, sec. 5.1 (law of propagation of uncertainty); JCGM 101:2008,
Supplement 1 to the GUM - Propagation of distributions using a Monte Carlo method, sec. 7.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError, require_finite
from .filmfit import FilmFitResult, _MODELS, _Spectrum, _evaluate, _groups, _with_film, _with_slit, fit_film
from .stack import Stack

__all__ = ["film_fit_reflectance", "nk_sigma", "nk_band", "fit_film_curves", "FilmFitCurves", "parameters_at_bounds",
           "BAND_DRAWS"]

#: Step of the forward differences, as a fraction of each parameter's 1σ: small enough that n and k are
#: linear over it, large enough that the difference is far above rounding (n is known to ~1e-15).
STEP_OF_SIGMA = 1e-3


def film_fit_reflectance(result: FilmFitResult, stack: Stack, layer: int, wavelength_nm, angle_deg: float = 0.0,
                         polarization: str = "unpolarized") -> np.ndarray:
    """Reflectance of the fitted model (fraction) at ``wavelength_nm``, as the fit compared it with the data.

    Parameters
    ----------
    result : FilmFitResult  from :func:`physics.fit_film`
    stack : Stack  the stack given to the fit (the fitted layer's material and thickness are replaced)
    layer : int  index of the fitted layer (0 = top)
    wavelength_nm : (n,) array  vacuum wavelengths, nm
    angle_deg : float  angle of incidence, degrees
    polarization : {"s", "p", "unpolarized"}

    Returns
    -------
    (n,) numpy.ndarray  scale·R_model + offset (scale 1 and offset 0 when not fitted)

    References
    ----------
    Press et al. sec. 4.6 (the spread's Gauss-Hermite average, as in :func:`physics.fit_film`); the slit as in
    :func:`physics.filmfit.slit_matrix`.
    """
    given = require_finite("wavelength_nm", wavelength_nm, minimum=0.0, min_inclusive=False, unit="nm").ravel()
    order = np.argsort(given, kind="stable")
    wl = given[order]
    spec = _Spectrum(wl, wl, float(angle_deg), wl)
    if result.bandwidth_nm > 0:
        spec = _with_slit([spec], stack, layer, (0.0, result.thickness_nm), result.material, result.bandwidth_nm,
                          result.slit, result.material.range_nm)[0]
    st = _with_film(stack, layer, result.material, result.thickness_nm, result.roughness_nm)
    R = _evaluate(st, layer + int(result.roughness_nm is not None), [spec], _groups([spec]), [result.thickness_nm],
                  result.spread_nm, polarization)[0]
    out = np.empty_like(R)
    out[order] = R                                                       # in the order asked
    return result.parameters.get("scale", 1.0) * out + result.parameters.get("offset", 0.0)


def nk_sigma(result: FilmFitResult, wavelength_nm) -> tuple[np.ndarray, np.ndarray] | None:
    """1σ of the fitted film's n and k at ``wavelength_nm`` (see the module notes), or None for model "fixed".

    Parameters
    ----------
    result : FilmFitResult  from :func:`physics.fit_film`
    wavelength_nm : (n,) array  vacuum wavelengths inside the fitted band, nm

    Returns
    -------
    (sigma_n, sigma_k) : two (n,) numpy.ndarray, or None when the optical constants were not fitted

    References
    ----------
    JCGM 100:2008 (GUM) sec. 5.1; Press et al. sec. 15.6.
    """
    family = _MODELS.get(result.model)
    if family is None:
        return None
    wl = require_finite("wavelength_nm", wavelength_nm, minimum=0.0, min_inclusive=False, unit="nm")
    p, cov = _covariance(result, family)
    sig = np.sqrt(np.diag(cov))
    band = result.material.range_nm
    base = result.material.nk(wl)
    grad = np.zeros((p.size, wl.size), dtype=complex)          # (parameter, wavelength)
    for i in range(p.size):
        if sig[i] == 0:
            continue
        h = STEP_OF_SIGMA * sig[i]
        for step in (h, -h):                                    # backwards where a bound stops the forward step
            q = p.copy()
            q[i] += step
            try:
                grad[i] = (family.build(q, band).nk(wl) - base) / step
                break
            except InputError:
                continue
    var_n = np.einsum("iw,ij,jw->w", grad.real, cov, grad.real)
    var_k = np.einsum("iw,ij,jw->w", grad.imag, cov, grad.imag)
    return np.sqrt(np.clip(var_n, 0.0, None)), np.sqrt(np.clip(var_k, 0.0, None))


def _covariance(result: FilmFitResult, family):
    """(values, covariance) of the dispersion parameters of ``result``."""
    idx = [result.parameter_names.index(name) for name in family.names]
    p = np.array([result.parameters[name] for name in family.names])
    sig = np.array([result.uncertainties[name] for name in family.names])
    return p, result.correlation[np.ix_(idx, idx)] * np.outer(sig, sig)


#: Parameter sets drawn for :func:`nk_band`: the 15.87th and 84.13th percentiles of 200 draws are known to about
#: ±0.1σ (a sample quantile's asymptotic standard error, sqrt(p(1 − p)/N)/φ(z) = 0.107σ at N = 200), plenty for a
#: band drawn on a plot, at 200 evaluations of the dispersion alone (each well under a millisecond).
BAND_DRAWS = 200
#: Seed of the draws: the same fit always draws the same band.
BAND_SEED = 633
#: The central 68.27 % (±1σ of a normal) interval's ends, in percent.
BAND_PERCENTILES = (15.865, 84.135)


def nk_band(result: FilmFitResult, wavelength_nm, draws: int = BAND_DRAWS):
    """The central 68 % band of the fitted film's n and k at ``wavelength_nm`` (see the module notes).

    Parameters
    ----------
    result : FilmFitResult  from :func:`physics.fit_film`
    wavelength_nm : (n,) array  vacuum wavelengths inside the fitted band, nm
    draws : int  parameter sets drawn (default :data:`BAND_DRAWS`)

    Returns
    -------
    (n_lo, n_hi, k_lo, k_hi) : four (n,) numpy.ndarray, or None when the optical constants were not fitted

    References
    ----------
    JCGM 101:2008 (GUM Supplement 1), sec. 7 (propagation of distributions by Monte Carlo, coverage intervals
    from the percentiles).
    """
    family = _MODELS.get(result.model)
    if family is None:
        return None
    wl = require_finite("wavelength_nm", wavelength_nm, minimum=0.0, min_inclusive=False, unit="nm")
    p, cov = _covariance(result, family)
    # draws p + (V√λ)z, z standard normal, from the eigen-decomposition of the symmetrized covariance (its
    # rounding-level negative eigenvalues held at 0)
    lam, vec = np.linalg.eigh(0.5 * (cov + cov.T))
    z = np.random.default_rng(BAND_SEED).standard_normal((int(draws), p.size))
    sample = np.clip(p + z @ (vec * np.sqrt(np.clip(lam, 0.0, None))).T, family.lower, family.upper)
    band = result.material.range_nm
    nk = []
    for q in sample:
        try:
            nk.append(family.build(q, band).nk(wl))
        except InputError:               # a draw with no valid index (e.g. a Sellmeier pole in the band): left out
            continue
    if not nk:
        base = result.material.nk(wl)
        return base.real, base.real, base.imag, base.imag
    nk = np.array(nk)                                                    # (draw, wavelength)
    n_lo, n_hi = np.percentile(nk.real, BAND_PERCENTILES, axis=0)
    k_lo, k_hi = np.percentile(nk.imag, BAND_PERCENTILES, axis=0)
    return n_lo, n_hi, k_lo, k_hi


#: Points of the fitted n(λ) and k(λ) curves across the fitted band (smooth curves; the model is analytic).
NK_POINTS = 200
#: A parameter this close to a bound of its model (relative to the bounds' span) is reported as at the bound: the
#: trust-region solver keeps strictly inside its bounds and stops a few 1e-6 of the span from one it presses on
#: (seen: 1.4e-6 and 2.2e-6); 1e-4 of the span is still far below any 1σ worth quoting.
AT_BOUND_FRACTION = 1e-4


@dataclass(frozen=True)
class FilmFitCurves:
    """What a page draws of a film fit.

    Attributes
    ----------
    wavelength_nm, measured, model, residual : (n,) the spectrum fitted (fractions), the model at the fitted
        parameters (:func:`film_fit_reflectance`) and measured − model
    nk_wavelength_nm, n, k : (m,) the fitted film's n and k across the band
    sigma_n, sigma_k : (m,) their 1σ (:func:`nk_sigma`, linear), None for model "fixed"
    at_bounds : names of the fitted parameters that ended at a bound of their model
    n_lo, n_hi, k_lo, k_hi : (m,) the central 68 % band of n and k (:func:`nk_band`, sampled), None for "fixed"
    """

    wavelength_nm: np.ndarray
    measured: np.ndarray
    model: np.ndarray
    residual: np.ndarray
    nk_wavelength_nm: np.ndarray
    n: np.ndarray
    k: np.ndarray
    sigma_n: np.ndarray | None
    sigma_k: np.ndarray | None
    at_bounds: tuple = ()
    n_lo: np.ndarray | None = None
    n_hi: np.ndarray | None = None
    k_lo: np.ndarray | None = None
    k_hi: np.ndarray | None = None


#: A roughness layer or thickness spread below this (nm) is at its floor, 0: the data want none (a spread's effect
#: is quadratic in σ, so at 0 its 1σ from the curvature is meaningless).
AT_ZERO_NM = 1e-3


def parameters_at_bounds(result: FilmFitResult) -> tuple:
    """Names of the dispersion parameters of ``result`` that ended at a bound of their model (the data wanted
    a value beyond it, or do not fix it), and a roughness or spread that ended at 0; their ±1σ says little."""
    family = _MODELS.get(result.model)
    out = []
    for name, lo, hi in zip(family.names, family.lower, family.upper) if family is not None else ():
        v, tol = result.parameters[name], AT_BOUND_FRACTION * (hi - lo)
        if name not in result.fixed and (v - lo <= tol or hi - v <= tol):     # a held value is where it was put
            out.append(name)
    out += [name for name in ("roughness_nm", "spread_nm") if name in result.parameters
            and result.parameters[name] <= AT_ZERO_NM]
    return tuple(out)


def fit_film_curves(wavelength_nm, reflectance, stack: Stack, layer: int = 0, *, angle_deg: float = 0.0,
                    polarization: str = "unpolarized", **kwargs) -> tuple[FilmFitResult, FilmFitCurves]:
    """:func:`physics.fit_film` of one spectrum, and the curves a page draws of it (one call, for a worker).

    Parameters are those of :func:`physics.fit_film` for one spectrum (``kwargs``: model, thickness_nm,
    roughness, spread, free_scale, free_offset, bandwidth_nm, slit, bounds, progress, cancel).

    Returns
    -------
    (FilmFitResult, FilmFitCurves)

    References
    ----------
    See :func:`physics.fit_film` and the module notes.
    """
    result = fit_film(wavelength_nm, reflectance, stack, layer, angle_deg=angle_deg, polarization=polarization,
                      **kwargs)
    wl = np.asarray(wavelength_nm, dtype=float)
    R = np.asarray(reflectance, dtype=float)
    order = np.argsort(wl, kind="stable")
    wl, R = wl[order], R[order]
    model = film_fit_reflectance(result, stack, layer, wl, angle_deg, polarization)
    grid = np.linspace(wl[0], wl[-1], NK_POINTS)
    nk = result.material.nk(grid)
    sigma = nk_sigma(result, grid)
    drawn = nk_band(result, grid) or (None,) * 4
    return result, FilmFitCurves(wl, R, model, R - model, grid, nk.real, nk.imag,
                                 None if sigma is None else sigma[0], None if sigma is None else sigma[1],
                                 parameters_at_bounds(result), *drawn)
