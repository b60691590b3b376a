"""Curves of a film fit: the model spectrum at the fitted parameters, and the 1σ band of the fitted n and k.

Both read a :class:`~physics.filmfit.FilmFitResult` and compute what :func:`~physics.filmfit.fit_film` fitted:

- :func:`film_fit_reflectance`: the stack with the fitted film (and its roughness layer), averaged over the
  fitted thickness spread, times the fitted scale plus the fitted offset — the model the fit compared with
  the measurement.
- :func:`nk_sigma`: 1σ of n(λ) and k(λ) by linear propagation of the fitted parameters' covariance,
  σ_n² = gᵀ C g with g = ∂n/∂p (forward differences) and C the covariance block of the dispersion
  parameters (the correlation times the σs). Linear propagation holds while n and k are close to linear in
  the parameters over ±1σ (Press et al. sec. 15.6; JCGM 100:2008 (GUM) sec. 5.1).

References
----------
W. H. Press et al., Numerical Recipes, 3rd ed., sec. 15.6 (confidence limits from the covariance) and
sec. 4.6 (Gauss-Hermite quadrature); JCGM 100:2008, Evaluation of measurement data - Guide to the
expression of uncertainty in measurement, sec. 5.1 (law of propagation of uncertainty).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError, require_finite
from .filmfit import SPREAD_NODES, FilmFitResult, _MODELS, _with_film, fit_film
from .stack import Stack, sweep

__all__ = ["film_fit_reflectance", "nk_sigma", "fit_film_curves", "FilmFitCurves", "parameters_at_bounds"]

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
    Press et al. sec. 4.6 (the spread's Gauss-Hermite average, as in :func:`physics.fit_film`).
    """
    wl = require_finite("wavelength_nm", wavelength_nm, minimum=0.0, min_inclusive=False, unit="nm")
    st = _with_film(stack, layer, result.material, result.thickness_nm, result.roughness_nm)
    if result.spread_nm is None:
        R = st.reflectance(wl, angle_deg, polarization)
    else:
        x, w = np.polynomial.hermite.hermgauss(SPREAD_NODES)
        nodes = np.clip(result.thickness_nm + np.sqrt(2.0) * result.spread_nm * x, 0.0, None)
        film = layer + int(result.roughness_nm is not None)
        R = (w / np.sqrt(np.pi)) @ sweep(st, film, nodes, [angle_deg], wl, polarization)[:, 0, :]
    return result.parameters.get("scale", 1.0) * R + result.parameters.get("offset", 0.0)


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
    idx = [result.parameter_names.index(name) for name in family.names]
    p = np.array([result.parameters[name] for name in family.names])
    sig = np.array([result.uncertainties[name] for name in family.names])
    cov = result.correlation[np.ix_(idx, idx)] * np.outer(sig, sig)
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
    sigma_n, sigma_k : (m,) their 1σ (:func:`nk_sigma`), None for model "fixed"
    at_bounds : names of the fitted parameters that ended at a bound of their model
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


def parameters_at_bounds(result: FilmFitResult) -> tuple:
    """Names of the dispersion parameters of ``result`` that ended at a bound of their model (the data wanted
    a value beyond it, or do not fix it); their ±1σ says little."""
    family = _MODELS.get(result.model)
    if family is None:
        return ()
    out = []
    for name, lo, hi in zip(family.names, family.lower, family.upper):
        v, tol = result.parameters[name], AT_BOUND_FRACTION * (hi - lo)
        if v - lo <= tol or hi - v <= tol:
            out.append(name)
    return tuple(out)


def fit_film_curves(wavelength_nm, reflectance, stack: Stack, layer: int = 0, *, angle_deg: float = 0.0,
                    polarization: str = "unpolarized", **kwargs) -> tuple[FilmFitResult, FilmFitCurves]:
    """:func:`physics.fit_film` of one spectrum, and the curves a page draws of it (one call, for a worker).

    Parameters are those of :func:`physics.fit_film` for one spectrum (``kwargs``: model, thickness_nm,
    roughness, spread, free_scale, free_offset).

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
    return result, FilmFitCurves(wl, R, model, R - model, grid, nk.real, nk.imag,
                                 None if sigma is None else sigma[0], None if sigma is None else sigma[1],
                                 parameters_at_bounds(result))
