"""A film's thickness and optical constants together, from one or more reflectance spectra.

:func:`fit_film` fits one layer of a stack: its thickness and the parameters of a dispersion model
(Cauchy, Cauchy with an Urbach tail, one-term Sellmeier, Tauc-Lorentz), optionally a surface
roughness layer and a thickness spread across the measured spot, to spectra at one or more angles
(a joint fit with shared parameters).

Method.

1. Global search. The start is the stack's own layer material, turned into the model (its
   coefficients when it already is one; otherwise the model fitted to its n and k over the band).
   Starting materials are then drawn over the usual range of each model parameter (a seeded Latin
   hypercube, scipy.stats.qmc); for each, the film's thickness window is scanned densely with the
   O(1)-per-point sweep of :mod:`physics.stack`, solving the optional scale and offset in closed form
   (the scan of :mod:`physics.fit`), on at most :data:`SCAN_WAVELENGTHS` points of each spectrum. With the
   optical constants fixed the thickness search is :func:`physics.fit_thickness` itself.
2. The best (material, thickness) pairs get a short first pass of bounded non-linear least squares over
   every free parameter on those points (scipy.optimize.least_squares, trust-region reflective); the best
   one, and any other that ends in another thickness with a sum of squares close to it, are refined to
   convergence on every point. The lowest is the answer; another whose χ² lies within
   :data:`COMPETING_DELTA_CHI2` of it is named in the message (a thin transparent film seen at one angle
   can have two: the quarter-wave minimum R = ((n_s − n²)/(n_s + n²))² is as deep for n as for n_s/n,
   n_s the substrate's index; Born & Wolf, Principles of Optics, sec. 7.6.1).
3. Uncertainties: 1σ from the square roots of the diagonal of (JᵀJ)⁻¹·s², J the Jacobian at the
   solution and s² = SSR/(n − p), the curvature scaled by the residual; the correlation matrix is the
   covariance over the product of the σs. A pair with |correlation| > :data:`CORRELATION_WARN` is
   named in the message.

Roughness: a top layer of the film's own material mixed 50/50 with void by the Bruggeman rule
(:class:`physics.filmmodels.EffectiveMedium`), of free thickness. Thickness spread: the spectrum is
the average over a Gaussian distribution of thickness of width σ (free), by Gauss-Hermite quadrature
with :data:`SPREAD_NODES` nodes (nodes below zero thickness are taken at zero).

References
----------
W. H. Press et al., Numerical Recipes, 3rd ed., sec. 15.5-15.6 (non-linear least squares, covariance
from the curvature) and sec. 4.6 (Gauss-Hermite quadrature); P. Virtanen et al., SciPy 1.0, Nat. Methods
17, 261 (2020); D. E. Aspnes, Thin Solid Films 89, 249 (1982) (roughness as an effective medium);
G. E. Jellison Jr. and F. A. Modine, Appl. Phys. Lett. 69, 371 (1996) (Tauc-Lorentz).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy.optimize import least_squares
from scipy.stats import qmc

from .errors import InputError, require_finite
from .filmmodels import EffectiveMedium, TaucLorentzMaterial
from .fit import (SAMPLES_PER_FRINGE, MAX_SCAN_POINTS, FitResult, _bin_dense, _judge, _linear_fit, _local_minima,
                  _prepare, _scan_grid, _window, fit_thickness, noise_rms)
from .materials import CauchyMaterial, ConstantMaterial, HC_EV_NM, Material, SellmeierMaterial
from .stack import Layer, Stack, _check_layer_index, _check_polarization, sweep

__all__ = ["fit_film", "FilmFitResult", "MODELS", "CORRELATION_WARN", "POINTS_PER_PARAMETER"]

#: Dispersion models :func:`fit_film` fits ("fixed": optical constants as in the stack).
MODELS = ("fixed", "cauchy", "cauchy-urbach", "sellmeier", "tauc-lorentz")
#: A pair of parameters whose |correlation| exceeds this trades one against the other: the spectrum
#: fixes a combination of the two, not each (common practice in ellipsometry and reflectometry).
CORRELATION_WARN = 0.95
#: Fewest spectrum points per free parameter: with fewer, noise alone can be fitted (common practice).
POINTS_PER_PARAMETER = 5
#: Volume fraction of void in the roughness layer (the usual 50/50 surface layer; Aspnes 1982).
ROUGHNESS_VOID_FRACTION = 0.5
#: Roughness searched (nm): a surface layer thicker than this is a second film, not roughness.
ROUGHNESS_MAX_NM = 100.0
#: Roughness the refinement starts from (nm): a few atomic layers, inside every plausible answer.
ROUGHNESS_START_NM = 2.0
#: Gauss-Hermite nodes for a thickness spread: exact for the fringe term at a phase spread of several
#: radians (the error falls faster than any power of the node count; Press et al. sec. 4.6).
SPREAD_NODES = 16
#: Largest thickness spread σ searched, as a fraction of the top of the thickness window.
SPREAD_MAX_FRACTION = 0.2
#: The spread starts where it halves the fringe contrast at the shortest wavelength:
#: exp(−(4π n σ/λ)²/2) = 1/2 at σ = 0.094 λ/n.
SPREAD_START_WAVES = np.sqrt(2 * np.log(2)) / (4 * np.pi)
#: Starting materials drawn per model parameter, besides the start itself, and scan minima kept per material.
SAMPLES_PER_PARAMETER = 6
MINIMA_PER_SAMPLE = 2
#: Wavelengths of each spectrum the global search (scans and first refinements) uses at most, evenly picked:
#: it only ranks starts, and model and data are compared at the same points, so a coarser comb still puts
#: the truth lowest. The final refinement uses every point.
SCAN_WAVELENGTHS = 160
#: (material, thickness) candidates refined by least squares, and model evaluations each gets at first;
#: only the best is then run to convergence.
CANDIDATES_REFINED = 4
FIRST_NFEV = 10
FINAL_NFEV = 100
#: Least-squares stopping tolerances (relative change of the sum of squares and of the parameters). A film
#: model often has a flat valley (parameters that trade); 1e-6 of the sum of squares is far below what the
#: noise can tell, and beyond it the optimizer only walks along the valley.
FTOL = XTOL = 1e-6
#: ... and of the first passes, which only rank the starts: 1e-4 of the sum of squares tells basins apart.
FIRST_TOL = 1e-4
#: Another solution whose χ² (sum of squares over the residual variance) exceeds the best one's by less
#: than this is not ruled out by the data: 9 is a 3σ difference for one parameter (Press et al., sec. 15.6).
#: Rivals are finished on all points when their first-pass sum of squares is within RIVAL_COST_RATIO of the best.
COMPETING_DELTA_CHI2 = 9.0
RIVAL_COST_RATIO = 2.0
#: The model fitted to the start material's n and k is only a start among the drawn ones: a loose fit will do.
START_FTOL = 1e-4
START_NFEV = 30
#: Residual returned where a trial material has no valid index (n <= 0): larger than any reflectance
#: misfit, so the optimizer steps back.
INVALID_RESIDUAL = 10.0
#: Most spectra in one joint fit: each adds a full model evaluation per step (a dozen angles or polarizations
#: is more than any film needs), and the bound keeps one call's time and memory limited.
MAX_SPECTRA = 12
#: Seed of the draw of starting materials: the same spectrum always gives the same fit.
SEED = 20260
#: Urbach tail start when the start has none: k = 0.001 at the band's short end, falling e-fold per eV.
URBACH_START = (1e-3, 1.0)

VOID = ConstantMaterial(1.0, name="void")


class _AtWavelengths(Material):
    """A material whose n + ik at the fit's wavelength arrays is computed once (the media the fit does not
    change are evaluated at every step otherwise); any other wavelengths go to the material itself."""

    def __init__(self, inner: Material, grids):
        self.inner, self.name, self.source, self.range_nm = inner, inner.name, inner.source, inner.range_nm
        self._known = {np.asarray(g, dtype=float).tobytes(): inner.nk(g) for g in grids}

    def nk(self, wavelength_nm) -> np.ndarray:
        """The values computed (and checked by :meth:`Material.nk`) once, or the material's own elsewhere."""
        wl = np.asarray(wavelength_nm)
        known = self._known.get(wl.tobytes()) if wl.ndim == 1 and wl.dtype == float else None
        return self.inner.nk(wavelength_nm) if known is None else known

    def _nk(self, wl):
        return self.inner.nk(wl)

    def spec(self):
        return self.inner.spec()


@dataclass(frozen=True)
class _Model:
    """A dispersion model's free parameters: names, hard bounds, the box starts are drawn from, and
    ``build(params, band_nm) -> Material`` and ``read(material, band_nm) -> params or None``."""

    names: tuple
    lower: tuple
    upper: tuple
    draw_lower: tuple
    draw_upper: tuple
    build: Callable
    read: Callable


def _cauchy_model(urbach: bool):
    def build(p, band):
        tail = dict(k_amplitude=p[3], k_exponent_per_ev=p[4], k_band_edge_nm=band[0]) if urbach else {}
        return CauchyMaterial(p[0], p[1], p[2], range_nm=band, name="Cauchy" + (" + Urbach" if urbach else ""),
                              source="fitted to the measured spectrum", **tail)

    def read(m, band):
        if not isinstance(m, CauchyMaterial):
            return None
        p = (m.A, m.B, m.C)
        if urbach:
            if m.k_amplitude:      # k at the band's short end, same fall-off
                p += (m.k_amplitude * np.exp(m.k_exponent_per_ev * (HC_EV_NM / band[0] - HC_EV_NM / m.k_band_edge_nm)),
                      m.k_exponent_per_ev)
            else:
                p += URBACH_START
        return p

    # Bounds keep n > 0 down to 300 nm; the draw box is the range of deposited dielectrics (common practice).
    names, lo, hi, dlo, dhi = ("A", "B_um2", "C_um4"), (1.0, -0.02, -0.002), (4.0, 0.3, 0.05), \
        (1.3, 0.0, 0.0), (2.6, 0.04, 0.002)
    if urbach:
        names, lo, hi = names + ("k_amplitude", "k_exponent_per_ev"), lo + (0.0, 0.0), hi + (2.0, 30.0)
        dlo, dhi = dlo + (0.0, 0.5), dhi + (0.05, 5.0)
    return _Model(names, lo, hi, dlo, dhi, build, read)


def _sellmeier_model():
    def build(p, band):
        return SellmeierMaterial([p[0]], [p[1]], range_nm=band, name="Sellmeier",
                                 source="fitted to the measured spectrum")

    def read(m, band):
        return (m.B[0], m.C[0]) if isinstance(m, SellmeierMaterial) and len(m.B) == 1 else None

    # C1 (the resonance, µm²) stays below (0.3 µm)², so no pole falls in a band from 300 nm up.
    return _Model(("B1", "C1_um2"), (0.1, 0.0), (15.0, 0.09), (0.8, 0.0), (6.0, 0.03), build, read)


def _tauc_lorentz_model():
    def build(p, band):
        return TaucLorentzMaterial(*p, range_nm=band, name="Tauc-Lorentz", source="fitted to the measured spectrum")

    def read(m, band):
        return m.parameters if isinstance(m, TaucLorentzMaterial) else None

    # C <= 4.9 eV < 2·E0 for E0 >= 2.5 eV, so every point of the box has a defined ε1.
    return _Model(("eps_inf", "gap_ev", "amplitude_ev", "center_ev", "broadening_ev"),
                  (1.0, 0.3, 1.0, 2.5, 0.1), (10.0, 8.0, 1000.0, 20.0, 4.9),
                  (1.0, 1.5, 20.0, 3.0, 0.5), (3.0, 6.0, 300.0, 12.0, 4.0), build, read)


_MODELS = {"cauchy": _cauchy_model(False), "cauchy-urbach": _cauchy_model(True), "sellmeier": _sellmeier_model(),
           "tauc-lorentz": _tauc_lorentz_model()}


@dataclass(frozen=True)
class FilmFitResult:
    """Result of :func:`fit_film`.

    Attributes
    ----------
    thickness_nm, uncertainty_nm : the film's thickness and its 1σ (nm)
    material : the fitted Material (the stack's own for model "fixed")
    parameters, uncertainties : dicts by parameter name (thickness_nm, the model's, roughness_nm,
        spread_nm, scale, offset, as free), values and 1σ
    correlation : (p, p) correlation matrix, in the order of ``parameter_names``
    parameter_names : tuple of str
    roughness_nm, spread_nm : fitted roughness layer and thickness spread σ (nm), None when not fitted
    message : plain sentences on what the fit could not settle ("" when nothing)
    rms : root-mean-square residual over all points (fraction)
    n_points : points fitted (all spectra)
    model : the dispersion model
    thickness_fit : the :class:`~physics.fit.FitResult` of the thickness search (model "fixed", one
        spectrum), else None
    quality : "good", "misfit" or "poor", judged as :func:`physics.fit_thickness` judges its fits (the
        residual against the noise seen in the spectra and against their spread); "misfit" and "poor" add
        a sentence to ``message``
    """

    thickness_nm: float
    uncertainty_nm: float
    material: Material
    parameters: dict
    uncertainties: dict
    correlation: np.ndarray
    parameter_names: tuple
    roughness_nm: float | None
    spread_nm: float | None
    message: str
    rms: float = 0.0
    n_points: int = 0
    model: str = "fixed"
    thickness_fit: FitResult | None = field(default=None, repr=False)
    quality: str = "good"

    def n_at(self, wavelength_nm) -> np.ndarray:
        """Refractive index n of the fitted film at vacuum wavelengths (nm)."""
        return self.material.nk(wavelength_nm).real

    def k_at(self, wavelength_nm) -> np.ndarray:
        """Extinction coefficient k of the fitted film at vacuum wavelengths (nm)."""
        return self.material.nk(wavelength_nm).imag


def _spectra(wavelength_nm, reflectance, angle_deg, stack, layer, window):
    """[(wl, R, angle)] of one or several spectra, each checked, sorted and (when dense) binned."""
    several = isinstance(wavelength_nm, (list, tuple)) and len(wavelength_nm) > 0 and np.ndim(wavelength_nm[0]) >= 1
    if several and len(wavelength_nm) > MAX_SPECTRA:
        raise InputError(f"{len(wavelength_nm)} spectra were given; a joint fit takes at most {MAX_SPECTRA}. Fit the "
                         "angles that separate the parameters best (e.g. normal incidence and one near 65°).")
    if not several:
        wavelength_nm, reflectance, angle_deg = [wavelength_nm], [reflectance], [angle_deg]
    elif not isinstance(reflectance, (list, tuple)) or len(reflectance) != len(wavelength_nm):
        raise InputError(f"{len(wavelength_nm)} wavelength arrays were given; give as many reflectance spectra, "
                         "one per wavelength array, in a list.")
    if np.ndim(angle_deg) == 0:
        angle_deg = [angle_deg] * len(wavelength_nm)
    if len(angle_deg) != len(wavelength_nm):
        raise InputError(f"{len(wavelength_nm)} spectra and {len(angle_deg)} angles were given; give one angle "
                         "per spectrum (angle_deg as a list of the same length).")
    out = []
    for wl, R, ang in zip(wavelength_nm, reflectance, angle_deg):
        ang = float(require_finite("angle_deg", ang, minimum=0.0, maximum=89.9, unit="deg"))
        wl, R = _prepare(wl, R, stack, None)
        wl, R, _ = _bin_dense(stack, wl, R, ang, {layer: window[1]})
        out.append((wl, R, ang))
    return out


def _start(family: _Model, start: Material, band, model: str):
    """The model's parameters for the stack's own layer material: read, or fitted to its n and k."""
    p = family.read(start, band)
    if p is not None:
        p = np.asarray(p, dtype=float)
        bad = [(nm, v, lo, hi) for nm, v, lo, hi in zip(family.names, p, family.lower, family.upper)
               if not lo <= v <= hi]
        if bad:
            nm, v, lo, hi = bad[0]
            raise InputError(f"The starting {model} parameter {nm} = {v:g} lies outside the range the fit searches "
                             f"({lo:g} to {hi:g}); start from a material whose {nm} lies inside it.")
        return p
    wl = np.linspace(band[0], band[1], 40)
    target = start.nk(wl)
    p0 = 0.5 * (np.asarray(family.draw_lower) + np.asarray(family.draw_upper))

    def resid(p):
        try:
            nk = family.build(p, band).nk(wl)
        except InputError:
            return np.full(2 * wl.size, INVALID_RESIDUAL)
        return np.r_[nk.real - target.real, nk.imag - target.imag]

    return least_squares(resid, p0, bounds=(family.lower, family.upper), x_scale="jac", ftol=START_FTOL,
                         max_nfev=START_NFEV).x


def _draws(family: _Model, p0, n):
    """``n`` starting parameter sets over the model's draw box (seeded Latin hypercube), after ``p0``."""
    sample = qmc.LatinHypercube(d=len(family.names), seed=SEED).random(n)
    return [np.asarray(p0)] + list(qmc.scale(sample, family.draw_lower, family.draw_upper))


def _grid_for(material, window, spectra):
    """Thickness samples fine enough for the fringes of ``material`` at the shortest wavelength (capped)."""
    wl_min = min(float(s[0][0]) for s in spectra)
    n = float(material.nk([wl_min]).real[0])
    count = int(np.ceil((window[1] - window[0]) * 2.0 * n / wl_min * SAMPLES_PER_FRINGE)) + 1
    return np.linspace(window[0], window[1], min(max(count, 21), MAX_SCAN_POINTS))


def fit_film(wavelength_nm, reflectance, stack, layer=0, *, model="cauchy", thickness_nm=(0, 3000), angle_deg=0.0,
             polarization="unpolarized", roughness=False, spread=False, free_scale=False,
             free_offset=False) -> FilmFitResult:
    """Fit a film's thickness and optical constants to measured reflectance.

    Parameters
    ----------
    wavelength_nm, reflectance : (n,) arrays, or lists of such arrays for a joint fit of several spectra
        (one per angle); reflectance as a fraction
    stack : Stack  the model; the fitted layer's material is the start, its thickness is ignored
    layer : int  index of the film (0 = top)
    model : {"fixed", "cauchy", "cauchy-urbach", "sellmeier", "tauc-lorentz"}  "fixed" keeps the stack's
        optical constants and fits the thickness (with one spectrum, by :func:`physics.fit_thickness`)
    thickness_nm : (lo, hi)  window searched, nm
    angle_deg : float, or a list with one angle per spectrum (degrees)
    polarization : {"s", "p", "unpolarized"}
    roughness : bool  add a 50 % void Bruggeman layer of the film on top, thickness free (needs layer 0)
    spread : bool  average over a Gaussian thickness spread σ (nm), free
    free_scale, free_offset : fit R_measured ≈ scale·R_model + offset, shared by all spectra

    Returns
    -------
    FilmFitResult

    Raises
    ------
    InputError
        Unknown model, NaN in the data, a start outside the model's bounds, more free parameters than the
        points can constrain (:data:`POINTS_PER_PARAMETER`), roughness on a buried layer.

    References
    ----------
    See the module notes.
    """
    if not isinstance(stack, Stack):
        raise InputError(f"fit_film needs a Stack; got {type(stack).__name__}.")
    if model not in MODELS:
        raise InputError(f"model must be one of {', '.join(MODELS)}; got {model!r}.")
    _check_layer_index(stack, layer)
    _check_polarization(polarization)
    if roughness and layer != 0:
        raise InputError("A roughness layer sits on the stack's top surface: fit the top layer (layer=0) "
                         "with roughness=True, or leave roughness off for a buried layer.")
    window = _window(thickness_nm, "thickness window")
    spectra = _spectra(wavelength_nm, reflectance, angle_deg, stack, layer, window)
    band = (min(s[0][0] for s in spectra), max(s[0][-1] for s in spectra))
    start_material = stack.layers[layer].material
    coarse = [_comb(*s) for s in spectra]
    given = stack
    stack = _frozen(stack, layer, [s[0] for s in spectra + coarse])
    family = _MODELS.get(model)
    n_mat = len(family.names) if family else 0
    names = (("thickness_nm",) + (family.names if family else ()) + (("roughness_nm",) if roughness else ())
             + (("spread_nm",) if spread else ()) + (("scale",) if free_scale else ()) + (("offset",) if free_offset else ()))
    n_points = sum(s[0].size for s in spectra)
    if n_points < POINTS_PER_PARAMETER * len(names):
        raise InputError(f"{len(names)} free parameters ({', '.join(names)}) need at least "
                         f"{POINTS_PER_PARAMETER * len(names)} spectrum points ({POINTS_PER_PARAMETER} each) and "
                         f"{n_points} were given: fix some (model='fixed', no roughness or spread, no free scale "
                         "or offset) or measure more points.")
    _scan_grid(stack, layer, window, spectra[0][0], spectra[0][2], "thickness window")   # refuses a window too wide

    hosts = [start_material] if family is None else None
    if family is not None:
        p_start = _start(family, start_material, band, model)
        hosts = _draws(family, p_start, SAMPLES_PER_PARAMETER * n_mat)
    spread_start = SPREAD_START_WAVES * band[0] / float(start_material.nk([band[0]]).real[0])
    lower = [window[0], *(family.lower if family else ()), *([0.0] if roughness else []),
             *([0.0] if spread else []), *([-np.inf] * (int(free_scale) + int(free_offset)))]
    upper = [window[1], *(family.upper if family else ()), *([ROUGHNESS_MAX_NM] if roughness else []),
             *([SPREAD_MAX_FRACTION * window[1]] if spread else []), *([np.inf] * (int(free_scale) + int(free_offset)))]

    def unpack(p):
        i = 1 + n_mat
        mat = family.build(p[1:i], band) if family else start_material
        rough = p[i] if roughness else None
        i += int(roughness)
        sigma = p[i] if spread else None
        i += int(spread)
        sc = p[i] if free_scale else 1.0
        of = p[i + int(free_scale)] if free_offset else 0.0
        return float(p[0]), mat, rough, sigma, sc, of

    def spectra_at(d, mat, rough, sigma, specs):
        st = _with_film(stack, layer, mat, d, rough)
        film = layer + int(rough is not None)
        if sigma is None:
            return [st.reflectance(wl, ang, polarization) for wl, _, ang in specs]
        x, w = np.polynomial.hermite.hermgauss(SPREAD_NODES)
        nodes = np.clip(d + np.sqrt(2.0) * sigma * x, 0.0, None)
        return [(w / np.sqrt(np.pi)) @ sweep(st, film, nodes, [ang], wl, polarization)[:, 0, :] for wl, _, ang in specs]

    def residual_on(specs):
        measured = np.concatenate([s[1] for s in specs])

        def residual(p):
            d, mat, rough, sigma, sc, of = unpack(p)
            try:
                return sc * np.concatenate(spectra_at(d, mat, rough, sigma, specs)) + of - measured
            except InputError:
                return np.full(measured.size, INVALID_RESIDUAL)
        return residual

    thickness_fit = None
    if family is None and len(spectra) == 1:
        wl, R, ang = spectra[0]
        thickness_fit = fit_thickness(wl, R, given, layer, window, ang, polarization=polarization,
                                      free_scale=free_scale, free_offset=free_offset)
        candidates = [(0, t) for t, _ in thickness_fit.minima[:CANDIDATES_REFINED]]
    else:
        candidates = _scan_candidates(stack, layer, hosts, window, coarse, polarization, free_scale, free_offset,
                                      family, band)
    if not candidates:
        raise InputError(f"No starting {model} material gives a valid index over {band[0]:g}-{band[1]:g} nm; start "
                         "from a material with data over the whole band, or choose another model.")
    refined, first = [], residual_on(coarse)
    for h, d0 in candidates:
        p_mat = list(hosts[h]) if family else []
        extra = ([ROUGHNESS_START_NM] if roughness else []) + ([spread_start] if spread else [])
        p0 = [d0, *p_mat, *extra]
        if free_scale or free_offset:
            model0 = np.concatenate(spectra_at(*unpack(np.r_[p0, [1.0] * free_scale, [0.0] * free_offset])[:4], coarse))
            s0, o0, _ = _linear_fit(model0[None, :], np.concatenate([c[1] for c in coarse]), free_scale, free_offset)
            p0 += ([float(s0[0])] if free_scale else []) + ([float(o0[0])] if free_offset else [])
        p0 = np.clip(p0, lower, upper)
        refined.append(_finish(first, p0, lower, upper, first=True))
    refined.sort(key=lambda s: s.cost)
    full = residual_on(spectra)
    finals = [_finish(full, refined[0].x, lower, upper)]
    apart = max(3.0 * _result(finals[0], names, unpack, model, n_points, None, window).uncertainty_nm, 1.0)
    for sol in refined[1:]:
        if sol.cost <= RIVAL_COST_RATIO * refined[0].cost and all(abs(sol.x[0] - f.x[0]) > apart for f in finals):
            finals.append(_finish(full, sol.x, lower, upper))
    finals.sort(key=lambda s: s.cost)
    best = finals[0]
    result = _result(best, names, unpack, model, n_points, thickness_fit, window)
    noise = float(np.sqrt(np.mean([noise_rms(R) ** 2 for _, R, _ in spectra])))
    quality, note, _ = _judge(result.rms, noise, float(np.std(np.concatenate([R for _, R, _ in spectra]))), None, 0.0,
                              window, f"layer {layer + 1}")
    result = dataclasses.replace(result, quality=quality, message=(result.message + " " + note).strip())
    s2 = 2.0 * best.cost / max(n_points - best.x.size, 1)
    for rival in finals[1:]:
        delta = 2.0 * (rival.cost - best.cost) / s2
        if abs(rival.x[0] - best.x[0]) > max(3 * result.uncertainty_nm, 1.0) and delta < COMPETING_DELTA_CHI2:
            mid = 0.5 * (band[0] + band[1])
            n_best, n_rival = (float(unpack(x)[1].nk([mid]).real[0]) for x in (best.x, rival.x))
            note = (f"Another solution fits the data as well: {rival.x[0]:.1f} nm with n = {n_rival:.3f} at {mid:.0f} nm "
                    f"(this fit: {best.x[0]:.1f} nm, n = {n_best:.3f}; χ² only {delta:.1f} higher). These spectra cannot "
                    "choose between them: add a spectrum at another angle, or fix the index.")
            result = dataclasses.replace(result, message=(note + " " + result.message).strip())
            break
    return result


def _finish(residual, p0, lower, upper, first=False):
    """Bounded least squares from ``p0``: a first pass (:data:`FIRST_NFEV`, :data:`FIRST_TOL`) that only ranks the
    starts, or the refinement run to convergence (:data:`FINAL_NFEV`, :data:`FTOL`, :data:`XTOL`)."""
    tol = FIRST_TOL if first else FTOL
    return least_squares(residual, p0, bounds=(lower, upper), x_scale="jac", method="trf", xtol=tol, ftol=tol,
                         max_nfev=FIRST_NFEV if first else FINAL_NFEV)


def _comb(wl, R, angle):
    """At most :data:`SCAN_WAVELENGTHS` evenly picked points of a spectrum, for the global search."""
    pick = np.unique(np.linspace(0, wl.size - 1, min(wl.size, SCAN_WAVELENGTHS)).round().astype(int))
    return wl[pick], R[pick], angle


def _frozen(stack, layer, grids):
    """``stack`` with every medium but the film replaced by its values at the fit's wavelengths."""
    keep = lambda m: _AtWavelengths(m, grids)                                   # noqa: E731
    layers = [l if i == layer else Layer(keep(l.material), l.thickness_nm) for i, l in enumerate(stack.layers)]
    return Stack(layers, keep(stack.substrate), keep(stack.ambient), stack.substrate_thickness_mm)


def _with_film(stack, layer, mat, d, rough):
    """``stack`` with the film's material and thickness, and a roughness layer on top when ``rough`` is set."""
    layers = list(stack.layers)
    layers[layer] = Layer(mat, d)
    if rough is not None:
        layers.insert(0, Layer(EffectiveMedium(mat, VOID, ROUGHNESS_VOID_FRACTION), rough))
    return Stack(layers, stack.substrate, stack.ambient, stack.substrate_thickness_mm)


def _scan_candidates(stack, layer, hosts, window, spectra, polarization, free_scale, free_offset, family, band):
    """(host index, thickness) pairs: the best local minima of a dense thickness scan for each starting material."""
    found = []
    for h, p in enumerate(hosts):
        try:
            mat = family.build(p, band) if family else p
            grid = _grid_for(mat, window, spectra)
            st = _with_film(stack, layer, mat, window[0], None)
            ssr = sum(_linear_fit(sweep(st, layer, grid, [ang], wl, polarization)[:, 0, :], R, free_scale,
                                  free_offset)[2] for wl, R, ang in spectra)
        except InputError:          # a drawn material with no valid index in the band
            continue
        found += [(float(ssr[i]), h, float(grid[i])) for i in _local_minima(ssr)[:MINIMA_PER_SAMPLE]]
    found.sort()
    return [(h, d) for _, h, d in found[:CANDIDATES_REFINED]]


def _result(sol, names, unpack, model, n, thickness_fit, window) -> FilmFitResult:
    p, J = sol.x, sol.jac
    ssr = float(np.sum(sol.fun ** 2))
    cov = np.linalg.pinv(J.T @ J) * (ssr / max(n - p.size, 1))
    sig = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    with np.errstate(divide="ignore", invalid="ignore"):
        corr = cov / np.outer(sig, sig)
    corr = np.where(np.isfinite(corr), np.clip(corr, -1.0, 1.0), 0.0)
    np.fill_diagonal(corr, 1.0)
    d, mat, rough, sigma, _, _ = unpack(p)
    notes = []
    pairs = [(abs(corr[i, j]), i, j) for i in range(len(names)) for j in range(i + 1, len(names))
             if abs(corr[i, j]) > CORRELATION_WARN]
    if pairs:
        c, i, j = max(pairs)
        notes.append(f"{names[i]} and {names[j]} trade against each other (correlation {corr[i, j]:+.3f}): the "
                     "spectrum fixes a combination of the two, so each is uncertain"
                     + (" (of a transparent film the spectrum mostly fixes the optical thickness n·d, and the "
                        "thinner the film the less it tells n from d). Fix the index "
                        "(model='fixed' with a known material) or add a spectrum at another angle."
                        if "thickness_nm" in (names[i], names[j]) else
                        ". Fix one of them or use a model with fewer parameters."))
    if d - window[0] < sig[0] or window[1] - d < sig[0]:
        notes.append("The fitted thickness is at the edge of its window; the true value may lie outside it. "
                     "Widen the window.")
    if thickness_fit is not None and thickness_fit.warning and not notes:
        notes.append(thickness_fit.warning)
    return FilmFitResult(thickness_nm=d, uncertainty_nm=float(sig[0]), material=mat,
                         parameters={k: float(v) for k, v in zip(names, p)},
                         uncertainties={k: float(v) for k, v in zip(names, sig)}, correlation=corr,
                         parameter_names=tuple(names), roughness_nm=None if rough is None else float(rough),
                         spread_nm=None if sigma is None else float(sigma), message=" ".join(notes),
                         rms=float(np.sqrt(ssr / n)), n_points=int(n), model=model, thickness_fit=thickness_fit)
