"""A film's thickness and optical constants together, from one or more reflectance spectra.

:func:`fit_film` fits one layer of a stack: its thickness and the parameters of a dispersion model
(Cauchy, Cauchy with an Urbach tail, Sellmeier of one or two terms, Tauc-Lorentz), optionally a surface
roughness layer and a thickness spread across the measured spot, to spectra at one or more angles
(a joint fit with shared parameters), or to spectra of several points of one wafer that share the
dispersion and each have their own thickness (``thickness_per_spectrum=True``: a thickness map with
one index). A finite spectral bandwidth of the instrument can be applied to the model (``bandwidth_nm``).

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

Points of one wafer (``thickness_per_spectrum``). The problem is separable: with the dispersion fixed,
each point's thickness (and its own scale and offset) is a one-dimensional scan of that spectrum alone.
The global search therefore scans every point's thickness for each starting material (the materials
ranked on at most :data:`RANK_SPECTRA` of the points first) and scores a material by the sum of the
points' best sums of squares; the least-squares refinement then runs over the shared parameters and
every point's own ones at once. Its Jacobian is block-sparse (a point's residuals depend on the
shared parameters and on that point's parameters only), so it is built by finite differences with
the columns grouped as in Curtis, Powell and Reid (1974): every point's thickness is stepped in one
model evaluation, so one Jacobian costs 1 + (shared) + (per-point kinds) evaluations, not
1 + (shared) + (points × kinds). Points that share their wavelengths and angle are evaluated in one
sweep over their thicknesses. Competing minima are not searched per point (each point has its own
scan; its own second fringe order is a question for that point's fit).

Instrument bandwidth (``bandwidth_nm``, the full width at half maximum of the slit function, nm).
The model spectrum is computed on a uniform wavelength grid fine enough to resolve the fringes of the
stack at the shortest wavelength (:data:`SLIT_SAMPLES_PER_FRINGE` points per fringe for an optical
thickness :data:`SLIT_INDEX_MARGIN` times the start's, and at least :data:`SLIT_SAMPLES_PER_FWHM` per
FWHM), then convolved with the slit function and read at the measured wavelengths: R_meas(λ) =
∫ g(λ' − λ) R(λ') dλ' / ∫ g. The slit is "gaussian" (g = exp(−4 ln 2 x²/FWHM²), cut at
:data:`GAUSSIAN_CUT_FWHM` FWHM either side) or "triangular" (g = 1 − |x|/FWHM for |x| < FWHM: the
image of an entrance slit swept across an exit slit of the same width in a grating monochromator, the
convolution of two equal rectangles: standard monochromator theory, stated from memory; an array
spectrometer's line is closer to Gaussian). The bandwidth is constant
in wavelength across the band (a grating instrument's is, to first order). The reading at the band's
ends holds light from up to one slit half-width beyond them, so the fine grid reaches that far where
every medium has data, and the fitted dispersion's range includes that reach; where a medium's data
end, the slit is cut there and renormalized. The bandwidth is an instrument constant
and is given, not fitted: it damps the fringes as a thickness spread does (both wash out contrast most
at short wavelengths), so a free bandwidth would trade against a free spread.

Progress and cancel: ``progress(fraction, text)`` is told how far the fit has come at each step of the
global search and every few model evaluations (at most every :data:`PROGRESS_EVERY_S`); ``cancel`` (a
callable returning True, or anything with ``is_set()``, such as a threading.Event) is checked at each
model evaluation, and :class:`FitCancelled` is raised when it is set. ``progress`` may itself raise to stop.

Roughness: a top layer of the film's own material mixed 50/50 with void by the Bruggeman rule
(:class:`physics.filmmodels.EffectiveMedium`), of free thickness. Thickness spread: the spectrum is
the average over a Gaussian distribution of thickness of width σ (free), by Gauss-Hermite quadrature
with :data:`SPREAD_NODES` nodes (nodes below zero thickness are taken at zero).

References
----------
W. H. Press et al., Numerical Recipes, 3rd ed., sec. 15.5-15.6 (non-linear least squares, covariance
from the curvature) and sec. 4.6 (Gauss-Hermite quadrature); P. Virtanen et al., SciPy 1.0, Nat. Methods
17, 261 (2020); D. E. Aspnes, Thin Solid Films 89, 249 (1982) (roughness as an effective medium);
G. E. Jellison Jr. and F. A. Modine, Appl. Phys. Lett. 69, 371 (1996) (Tauc-Lorentz); A. R. Curtis,
M. J. D. Powell and J. K. Reid, "On the estimation of sparse Jacobian matrices", J. Inst. Maths Applics
13, 117 (1974) (grouped finite differences); W. Sellmeier, Ann. Phys. Chem. 219, 272 (1871). The slit
shapes are stated from memory (see the notes above); the Gaussian's damping of a cosine,
exp(−(π·FWHM/P)²/(4 ln 2)), is its Fourier transform and is checked in the tests.
"""

from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy import sparse
from scipy.optimize import least_squares
from scipy.stats import qmc

from .errors import InputError, require_finite
from .filmmodels import EffectiveMedium, TaucLorentzMaterial
from .fit import (SAMPLES_PER_FRINGE, MAX_SCAN_POINTS, FitResult, _bin_dense, _judge, _linear_fit, _local_minima,
                  _prepare, _scan_grid, _window, fit_thickness, noise_rms)
from .materials import CauchyMaterial, ConstantMaterial, HC_EV_NM, Material, SellmeierMaterial
from .stack import Layer, Stack, _check_layer_index, _check_polarization, sweep

__all__ = ["fit_film", "FilmFitResult", "FitCancelled", "MODELS", "SLITS", "CORRELATION_WARN", "POINTS_PER_PARAMETER",
           "slit_matrix", "model_parameters", "PARAMETER_UNITS"]

#: Dispersion models :func:`fit_film` fits ("fixed": optical constants as in the stack; "sellmeier" has one
#: term, "sellmeier-2" two).
MODELS = ("fixed", "cauchy", "cauchy-urbach", "sellmeier", "sellmeier-2", "tauc-lorentz")
#: Shapes of the instrument's slit function (see the module notes).
SLITS = ("gaussian", "triangular")
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
#: Most spectra in one joint fit. Time grows in proportion to the spectra (each adds its points to every model
#: evaluation; with thickness_per_spectrum the grouped Jacobian keeps the evaluations per step constant, and
#: LSMR's work per step grows with the Jacobian's non-zeros, (all points) x (shared + 3)), and so does memory:
#: the Jacobian is kept sparse, so 50 spectra of MAX_FIT_POINTS points are about 100 000 x 8 non-zeros (6 MB)
#: where a dense one would be 100 000 x 160 (128 MB). 49 sites is the largest common wafer map (a 7 x 7 grid);
#: 25 and 50 sites of 500 points fit in 3-6 s on a busy 2-core machine (benchmarks/bench_fit.py).
MAX_SPECTRA = 50
#: Spectra on which the starting materials of a thickness_per_spectrum fit are ranked, evenly picked: the
#: ranking only chooses which materials all points are scanned with.
RANK_SPECTRA = 5
#: Widest instrument bandwidth accepted (FWHM, nm): wider than a reflectometer's worst setting (common
#: practice: 0.5-10 nm), and a wider slit leaves no fringe of a film worth fitting.
BANDWIDTH_MAX_NM = 50.0
#: The slit's fine model grid: points per fringe at the shortest wavelength, the margin on the start's optical
#: thickness (a fit may raise the index that much), points per FWHM at least, and most points per spectrum.
SLIT_SAMPLES_PER_FRINGE = 16
SLIT_INDEX_MARGIN = 1.5
#: Per FWHM: a Gaussian sampled every FWHM/2 (σ/step = 0.85) keeps its variance to 4e-5 (computed); a triangle's
#: kink needs FWHM/4 to keep its variance 6 % of the continuous FWHM²/6 (sampled at FWHM/2 it loses 25 %). The
#: variance sets how much the slit damps fringes wider than it.
SLIT_SAMPLES_PER_FWHM = {"gaussian": 2, "triangular": 4}
MAX_SLIT_POINTS = 40_000
#: A Gaussian slit is cut this many FWHM either side of its centre (weight there exp(−4 ln 2 · 2.5²) = 3e-8).
GAUSSIAN_CUT_FWHM = 2.5
#: Shortest interval between two progress reports (s).
PROGRESS_EVERY_S = 0.2
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


def _sellmeier_model(terms: int = 1):
    """n² = 1 + Σ Bᵢλ²/(λ² − Cᵢ). One term: a resonance C₁ below (0.3 µm)², so no pole falls in a band from
    300 nm up. Two terms: the near-UV resonance C₁ between (0.1 µm)² and (0.3 µm)² and a far-UV one C₂ below
    (0.1 µm)², which over the visible acts nearly as a constant (B₂λ²/(λ² − C₂) ≈ B₂(1 + C₂/λ²)) and so frees the
    index at long wavelengths from the dispersion. Bᵢ >= 0 (oscillator strengths are positive), Cᵢ >= 0 (a real
    resonance wavelength); B up to 15 (n∞ ≈ 4). The poles are ordered (C₂ < C₁), so the two terms never swap."""
    def build(p, band):
        return SellmeierMaterial(list(p[0::2]), list(p[1::2]), range_nm=band,
                                 name="Sellmeier" + (f" ({terms} terms)" if terms > 1 else ""),
                                 source="fitted to the measured spectrum")

    def read(m, band):
        if not isinstance(m, SellmeierMaterial) or len(m.B) != terms:
            return None
        order = np.argsort(m.C)[::-1]                                # the near-UV term first
        return tuple(float(v) for i in order for v in (m.B[i], m.C[i]))

    if terms == 1:
        return _Model(("B1", "C1_um2"), (0.1, 0.0), (15.0, 0.09), (0.8, 0.0), (6.0, 0.03), build, read)
    return _Model(("B1", "C1_um2", "B2", "C2_um2"), (0.0, 0.01, 0.0, 0.0), (15.0, 0.09, 15.0, 0.01),
                  (0.3, 0.01, 0.3, 0.0), (5.0, 0.06, 4.0, 0.01), build, read)


def _tauc_lorentz_model():
    def build(p, band):
        return TaucLorentzMaterial(*p, range_nm=band, name="Tauc-Lorentz", source="fitted to the measured spectrum")

    def read(m, band):
        return m.parameters if isinstance(m, TaucLorentzMaterial) else None

    # C <= 4.9 eV < 2·E0 for E0 >= 2.5 eV, so every point of the box has a defined ε1.
    return _Model(("eps_inf", "gap_ev", "amplitude_ev", "center_ev", "broadening_ev"),
                  (1.0, 0.3, 1.0, 2.5, 0.1), (10.0, 8.0, 1000.0, 20.0, 4.9),
                  (1.0, 1.5, 20.0, 3.0, 0.5), (3.0, 6.0, 300.0, 12.0, 4.0), build, read)


#: Unit of each dispersion parameter ("" for a pure number).
PARAMETER_UNITS = {"A": "", "B_um2": "µm²", "C_um4": "µm⁴", "k_amplitude": "", "k_exponent_per_ev": "1/eV",
                   "B1": "", "C1_um2": "µm²", "B2": "", "C2_um2": "µm²", "eps_inf": "", "gap_ev": "eV",
                   "amplitude_ev": "eV", "center_ev": "eV", "broadening_ev": "eV"}

_MODELS = {"cauchy": _cauchy_model(False), "cauchy-urbach": _cauchy_model(True), "sellmeier": _sellmeier_model(1),
           "sellmeier-2": _sellmeier_model(2),
           "tauc-lorentz": _tauc_lorentz_model()}


def model_parameters(model: str) -> list[tuple[str, float, float, float, str]]:
    """The dispersion parameters ``model`` fits: (name, generic start, lowest, highest, unit) each, in the order
    :func:`fit_film` takes them. The start is the middle of the box the fit draws its starts from (a generic film of
    that model, not any material's page); lowest and highest are the model's physical range (``bounds``, ``start``
    and ``fixed`` of :func:`fit_film` must lie inside it). Model "fixed" has none (an empty list)."""
    if model not in MODELS:
        raise InputError(f"model must be one of {', '.join(MODELS)}; got {model!r}.")
    family = _MODELS.get(model)
    if family is None:
        return []
    return [(nm, 0.5 * (dlo + dhi), lo, hi, PARAMETER_UNITS.get(nm, ""))
            for nm, lo, hi, dlo, dhi in zip(family.names, family.lower, family.upper, family.draw_lower,
                                             family.draw_upper)]


def _named(what: str, values, family, model):
    """``values`` ({name: number}) checked: names of ``model``'s parameters, finite numbers; as floats."""
    if values is None:
        return {}
    if not isinstance(values, dict):
        raise InputError(f"{what} must be a dict of {{parameter name: value}}; got {type(values).__name__}.")
    names = family.names if family else ()
    unknown = [k for k in values if k not in names]
    if unknown:
        raise InputError(f"{what} names {', '.join(map(repr, unknown))}, which model {model!r} does not have; its "
                         f"parameters are {', '.join(names) or 'none (fit a dispersion model to fix or start them)'}.")
    return {k: float(require_finite(f"{what}[{k!r}]", v)) for k, v in values.items()}


def _outside(what, model, nm, v, lo, hi, given):
    """The sentence for a start or fixed value ``v`` of ``nm`` outside (``lo``, ``hi``): the bounds given
    (``nm`` in ``given``) or the model's range."""
    if nm in given:
        return InputError(f"The {what} {model} parameter {nm} = {v:g} lies outside the bounds you gave "
                          f"({lo:g} to {hi:g}); widen bounds[{nm!r}] to include it, or choose a value inside them.")
    return InputError(f"The {what} {model} parameter {nm} = {v:g} lies outside the range the fit searches "
                      f"({lo:g} to {hi:g}); choose a value inside it.")


def _held(family: _Model, fixed: dict, model: str, given) -> _Model:
    """``family`` with the parameters in ``fixed`` held at their values: its names, bounds and draws are the free
    ones', and ``build``/``read`` fill in the held values."""
    for i, nm in enumerate(family.names):
        if nm in fixed and not family.lower[i] <= fixed[nm] <= family.upper[i]:
            raise _outside("fixed", model, nm, fixed[nm], family.lower[i], family.upper[i], given)
    free = [i for i, nm in enumerate(family.names) if nm not in fixed]
    if not free:
        raise InputError(f"Every parameter of the {model} model is fixed ({', '.join(family.names)}), so there is "
                         "nothing of the film's optical constants left to fit: free at least one, or fit the "
                         "thickness alone with model='fixed' and a layer material of these constants.")
    full = np.array([fixed.get(nm, 0.0) for nm in family.names], dtype=float)
    inner_build, inner_read = family.build, family.read

    def build(p, band):
        q = full.copy()
        q[free] = p
        return inner_build(q, band)

    def read(m, band):
        p = inner_read(m, band)
        return None if p is None else tuple(np.asarray(p, dtype=float)[free])

    pick = lambda v: tuple(v[i] for i in free)                                   # noqa: E731
    return _Model(pick(family.names), pick(family.lower), pick(family.upper), pick(family.draw_lower),
                  pick(family.draw_upper), build, read)


def _with_held(result, i_mat, all_names, fixed):
    """``result`` with the held parameters put back among the model's: in ``parameters`` at their values, with
    uncertainty 0 and no correlation, and named in ``fixed``."""
    names = list(result.parameter_names)
    full = names[:i_mat[0]] + list(all_names) + names[i_mat[-1] + 1:]
    old = [names.index(nm) if nm not in fixed else None for nm in full]
    corr = np.eye(len(full))
    for a, i in enumerate(old):
        for b, j in enumerate(old):
            if i is not None and j is not None:
                corr[a, b] = result.correlation[i, j]
    return dataclasses.replace(
        result, parameter_names=tuple(full), correlation=corr,
        parameters={nm: fixed[nm] if nm in fixed else result.parameters[nm] for nm in full},
        uncertainties={nm: 0.0 if nm in fixed else result.uncertainties[nm] for nm in full},
        fixed=tuple(nm for nm in all_names if nm in fixed))


class FitCancelled(Exception):
    """:func:`fit_film` stopped because its ``cancel`` was set (not bad input: nothing to tell the user)."""


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
    thicknesses_nm, thickness_uncertainties_nm : one thickness and its 1σ per spectrum, in the order given
        (with ``thickness_per_spectrum``; otherwise the one shared thickness repeated). ``thickness_nm`` is
        then the first spectrum's, and ``parameters`` holds ``thickness_nm[i]`` (and ``scale[i]``,
        ``offset[i]`` when free) for each spectrum i
    bandwidth_nm, slit : the instrument bandwidth (FWHM, nm) and slit shape the model was convolved with
    fixed : names of the model parameters held at the values given (``fixed`` of :func:`fit_film`): in
        ``parameters`` and ``parameter_names`` with uncertainty 0 and correlation 0 with every other parameter
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
    thicknesses_nm: tuple = ()
    thickness_uncertainties_nm: tuple = ()
    bandwidth_nm: float = 0.0
    slit: str = "gaussian"
    fixed: tuple = ()

    def n_at(self, wavelength_nm) -> np.ndarray:
        """Refractive index n of the fitted film at vacuum wavelengths (nm)."""
        return self.material.nk(wavelength_nm).real

    def k_at(self, wavelength_nm) -> np.ndarray:
        """Extinction coefficient k of the fitted film at vacuum wavelengths (nm)."""
        return self.material.nk(wavelength_nm).imag


@dataclass
class _Spectrum:
    """One spectrum as the fit uses it: wavelengths (nm), reflectance, angle (deg), and where the model is
    computed: ``fine`` (the slit's fine grid, or ``wl`` itself) and ``blur``, the sparse (wl, fine) slit matrix
    that turns a model on ``fine`` into the instrument's reading at ``wl`` (None: no slit)."""

    wl: np.ndarray
    R: np.ndarray
    angle: float
    fine: np.ndarray
    blur: object = None

    def reading(self, R_fine):
        """The instrument's reading at ``wl`` of model spectra (..., fine) on ``fine``."""
        return R_fine if self.blur is None else np.asarray(self.blur @ np.asarray(R_fine).T).T


def _spectra(wavelength_nm, reflectance, angle_deg, stack, layer, window):
    """[_Spectrum] of one or several spectra, each checked, sorted and (when dense) binned."""
    several = isinstance(wavelength_nm, (list, tuple)) and len(wavelength_nm) > 0 and np.ndim(wavelength_nm[0]) >= 1
    if several and len(wavelength_nm) > MAX_SPECTRA:
        raise InputError(f"{len(wavelength_nm)} spectra were given; a joint fit takes at most {MAX_SPECTRA}. Fit the "
                         "angles that separate the parameters best (e.g. normal incidence and one near 65°), or a "
                         f"wafer map in parts of at most {MAX_SPECTRA} points.")
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
        out.append(_Spectrum(wl, R, ang, wl))
    return out


def slit_matrix(wavelength_nm, fine_nm, bandwidth_nm: float, slit: str = "gaussian"):
    """The instrument's slit as a sparse matrix: row i weighs a spectrum on ``fine_nm`` into the reading at
    ``wavelength_nm[i]`` (rows sum to 1; the slit is cut at the grid's ends and renormalized there).

    Parameters
    ----------
    wavelength_nm : (n,) array  wavelengths read (nm), inside the fine grid's span
    fine_nm : (m,) array  uniform, increasing grid the spectrum is given on (nm)
    bandwidth_nm : float  full width at half maximum of the slit function (nm, > 0)
    slit : {"gaussian", "triangular"}  see the module notes

    Returns
    -------
    scipy.sparse.csr_matrix of shape (n, m)

    References
    ----------
    The module notes (the shapes; a Gaussian's Fourier transform gives the damping the tests check).
    """
    wl, fine = np.asarray(wavelength_nm, dtype=float), np.asarray(fine_nm, dtype=float)
    step = (fine[-1] - fine[0]) / max(fine.size - 1, 1)
    half = bandwidth_nm * (GAUSSIAN_CUT_FWHM if slit == "gaussian" else 1.0)
    reach = int(np.ceil(half / step)) + 1
    centre = np.rint((wl - fine[0]) / step).astype(int)
    cols = centre[:, None] + np.arange(-reach, reach + 1)[None, :]            # (n, band of the slit)
    inside = (cols >= 0) & (cols < fine.size)
    cols = np.clip(cols, 0, fine.size - 1)
    x = fine[cols] - wl[:, None]
    if slit == "gaussian":
        w = np.exp(-4.0 * np.log(2.0) * (x / bandwidth_nm) ** 2) * (np.abs(x) <= half)
    else:
        w = np.clip(1.0 - np.abs(x) / bandwidth_nm, 0.0, None)
    w = np.where(inside, w, 0.0)
    w /= np.maximum(w.sum(axis=1, keepdims=True), 1e-300)
    rows = np.repeat(np.arange(wl.size), cols.shape[1])
    return sparse.csr_matrix((w.ravel(), (rows, cols.ravel())), shape=(wl.size, fine.size))


def _with_slit(spectra, stack, layer, window, film_material, bandwidth_nm, slit, film_range=None):
    """The spectra with the slit's fine grid and matrix (see the module notes); refuses a grid too fine.

    The fine grid reaches the slit's half-width beyond each spectrum's ends where every medium has data (the
    reading at a band's end holds light from beyond it); ``film_range`` is where the film may be evaluated (None:
    anywhere, for a model built to cover the grid)."""
    half = bandwidth_nm * (GAUSSIAN_CUT_FWHM if slit == "gaussian" else 1.0)
    others = [stack.ambient, stack.substrate] + [l.material for i, l in enumerate(stack.layers) if i != layer]
    ranges = [m.range_nm for m in others if m.range_nm is not None] + ([film_range] if film_range else [])
    span = (max([r[0] for r in ranges], default=0.0), min([r[1] for r in ranges], default=np.inf))
    out = []
    for s in spectra:
        lo, hi = max(float(s.wl[0]) - half, span[0], 1e-3), min(float(s.wl[-1]) + half, span[1])
        opd = sum(float(l.material.nk([s.wl[0]]).real[0]) * (window[1] if i == layer else l.thickness_nm)
                  for i, l in enumerate(stack.layers))
        opd += (SLIT_INDEX_MARGIN - 1.0) * float(film_material.nk([s.wl[0]]).real[0]) * window[1]
        period = lo * lo / (2.0 * max(opd, 1e-9))                     # fringe period in λ (Born & Wolf 7.5.1)
        step = min(period / SLIT_SAMPLES_PER_FRINGE, bandwidth_nm / SLIT_SAMPLES_PER_FWHM[slit])
        count = int(np.ceil((hi - lo) / step)) + 1
        if count > MAX_SLIT_POINTS:
            raise InputError(f"Applying a {bandwidth_nm:g} nm bandwidth to fringes {period:.3g} nm apart over "
                             f"{s.wl[0]:g}-{s.wl[-1]:g} nm needs {count} model wavelengths, more than the fit computes "
                             f"({MAX_SLIT_POINTS}); narrow the thickness window, the wavelength range, or give "
                             "bandwidth_nm=0 when the fringes are much wider than the bandwidth.")
        fine = np.linspace(lo, hi, max(count, 2))
        out.append(_Spectrum(s.wl, s.R, s.angle, fine, slit_matrix(s.wl, fine, bandwidth_nm, slit)))
    return out


def _groups(specs):
    """Spectra evaluated together: [(indices, angle, fine grid)] of the spectra sharing angle and model grid."""
    found = {}
    for i, s in enumerate(specs):
        found.setdefault((s.angle, s.fine.size, s.fine.tobytes()), []).append(i)
    return [(idx, specs[idx[0]].angle, specs[idx[0]].fine) for idx in found.values()]


def _evaluate(st, film, specs, groups, d, sigma, polarization):
    """Model readings [(n_i,)] of each spectrum, spectrum i with the film at thickness ``d[i]`` (one sweep over the
    thicknesses of each group), averaged over a thickness spread ``sigma`` when it is set."""
    out = [None] * len(specs)
    for idx, ang, fine in groups:
        dd = np.asarray([d[i] for i in idx], dtype=float)
        if sigma is None:
            R = sweep(st, film, dd, [ang], fine, polarization)[:, 0, :]
        else:
            x, w = np.polynomial.hermite.hermgauss(SPREAD_NODES)
            nodes = np.clip(dd[:, None] + np.sqrt(2.0) * sigma * x[None, :], 0.0, None)
            R = sweep(st, film, nodes.ravel(), [ang], fine, polarization)[:, 0, :].reshape(dd.size, x.size, -1)
            R = np.einsum("n,mnf->mf", w / np.sqrt(np.pi), R)
        for j, i in enumerate(idx):
            out[i] = specs[i].reading(R[j])
    return out


def _start(family: _Model, start: Material, band, model: str, given=(), chosen=None):
    """The model's parameters for the stack's own layer material: read, or fitted to its n and k (``given``: the
    names whose bounds the caller set; ``chosen``: {name: start} the caller set, in place of those)."""
    p = family.read(start, band)
    if chosen:
        if p is None:
            p = _start(family, start, band, model)
        p = np.array([chosen.get(nm, v) for nm, v in zip(family.names, p)], dtype=float)
        for nm, v, lo, hi in zip(family.names, p, family.lower, family.upper):
            if nm in chosen and not lo <= v <= hi:
                raise _outside("starting", model, nm, v, lo, hi, given)
    if p is not None:
        p = np.asarray(p, dtype=float)
        bad = [(nm, v, lo, hi) for nm, v, lo, hi in zip(family.names, p, family.lower, family.upper)
               if not lo <= v <= hi]
        if bad:
            nm, v, lo, hi = bad[0]
            if nm in given:
                raise InputError(f"The starting {model} parameter {nm} = {v:g} lies outside the bounds you gave "
                                 f"({lo:g} to {hi:g}); widen bounds[{nm!r}] to include it, or start from a material "
                                 f"whose {nm} lies inside them.")
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
    wl_min = min(float(s.wl[0]) for s in spectra)
    n = float(material.nk([wl_min]).real[0])
    count = int(np.ceil((window[1] - window[0]) * 2.0 * n / wl_min * SAMPLES_PER_FRINGE)) + 1
    return np.linspace(window[0], window[1], min(max(count, 21), MAX_SCAN_POINTS))


def fit_film(wavelength_nm, reflectance, stack, layer=0, *, model="cauchy", thickness_nm=(0, 3000), angle_deg=0.0,
             polarization="unpolarized", roughness=False, spread=False, free_scale=False,
             free_offset=False, thickness_per_spectrum=False, bandwidth_nm=0.0, slit="gaussian", bounds=None,
             progress=None, cancel=None, fixed=None, start=None) -> FilmFitResult:
    """Fit a film's thickness and optical constants to measured reflectance.

    Parameters
    ----------
    wavelength_nm, reflectance : (n,) arrays, or lists of such arrays for a joint fit of several spectra
        (one per angle, or one per point of a wafer); reflectance as a fraction
    stack : Stack  the model; the fitted layer's material is the start, its thickness is ignored
    layer : int  index of the film (0 = top)
    model : {"fixed", "cauchy", "cauchy-urbach", "sellmeier", "sellmeier-2", "tauc-lorentz"}  "fixed" keeps the
        stack's optical constants and fits the thickness (with one spectrum, by :func:`physics.fit_thickness`);
        "sellmeier" has one term, "sellmeier-2" two
    thickness_nm : (lo, hi)  window searched, nm
    angle_deg : float, or a list with one angle per spectrum (degrees)
    polarization : {"s", "p", "unpolarized"}
    roughness : bool  add a 50 % void Bruggeman layer of the film on top, thickness free (needs layer 0)
    spread : bool  average over a Gaussian thickness spread σ (nm), free
    free_scale, free_offset : fit R_measured ≈ scale·R_model + offset, shared by all spectra (each spectrum's
        own with ``thickness_per_spectrum``)
    thickness_per_spectrum : bool  each spectrum has its own thickness (points of one wafer sharing the
        dispersion, roughness and spread); see the module notes
    bandwidth_nm : float  the instrument's spectral bandwidth, FWHM of its slit function (nm, 0 = none, at most
        :data:`BANDWIDTH_MAX_NM`); given, not fitted
    slit : {"gaussian", "triangular"}  shape of the slit function
    bounds : dict or None  narrower (lo, hi) for any model parameter, "roughness_nm" or "spread_nm", inside the
        model's own range; the start must lie inside them
    fixed : dict or None  {model parameter name: value} held at the value, not fitted (reported with uncertainty 0
        and named in ``FilmFitResult.fixed``); inside the model's range and the bounds given. Fixing the index of a
        thin transparent film, whose n and d trade, narrows its thickness. At least one model parameter stays free
    start : dict or None  {model parameter name: value} the fit starts from in place of the layer material's
        (the global search still draws its other starts across the bounds); inside the bounds
    progress : callable(fraction, text) or None  told how far the fit has come; it may raise to stop the fit
    cancel : callable returning bool, or an object with ``is_set()`` (threading.Event), or None

    Returns
    -------
    FilmFitResult

    Raises
    ------
    InputError
        Unknown model or slit, NaN in the data, a start outside the model's bounds or the bounds given, bounds
        outside the model's range, more free parameters than the points can constrain
        (:data:`POINTS_PER_PARAMETER`), roughness on a buried layer, a bandwidth out of range.
    FitCancelled
        ``cancel`` was set.

    References
    ----------
    See the module notes.
    """
    if not isinstance(stack, Stack):
        raise InputError(f"fit_film needs a Stack; got {type(stack).__name__}.")
    if model not in MODELS:
        raise InputError(f"model must be one of {', '.join(MODELS)}; got {model!r}.")
    if slit not in SLITS:
        raise InputError(f"slit must be one of {', '.join(SLITS)}; got {slit!r}.")
    bandwidth_nm = float(require_finite("bandwidth_nm", bandwidth_nm, minimum=0.0, maximum=BANDWIDTH_MAX_NM,
                                        unit="nm"))
    _check_layer_index(stack, layer)
    _check_polarization(polarization)
    if roughness and layer != 0:
        raise InputError("A roughness layer sits on the stack's top surface: fit the top layer (layer=0) "
                         "with roughness=True, or leave roughness off for a buried layer.")
    if progress is not None and not callable(progress):
        raise InputError(f"progress must be a function of (fraction, text) or None; got {type(progress).__name__}.")
    if cancel is not None and not (callable(cancel) or callable(getattr(cancel, "is_set", None))):
        raise InputError(f"cancel must be a function returning True to stop, an object with is_set() (such as a "
                         f"threading.Event) or None; got {type(cancel).__name__}.")
    say = _Reporter(progress, cancel)
    held, chosen = _named("fixed", fixed, _MODELS.get(model), model), _named("start", start, _MODELS.get(model), model)
    window = _window(thickness_nm, "thickness window")
    spectra = _spectra(wavelength_nm, reflectance, angle_deg, stack, layer, window)
    n_spec, each = len(spectra), bool(thickness_per_spectrum)
    band = (min(s.wl[0] for s in spectra), max(s.wl[-1] for s in spectra))
    start_material = stack.layers[layer].material
    if bandwidth_nm > 0:
        spectra = _with_slit(spectra, stack, layer, window, start_material, bandwidth_nm, slit,
                             start_material.range_nm if model == "fixed" else None)
    # the fitted model is defined wherever it is evaluated: the band, and a slit's reach beyond it
    model_band = (min(s.fine[0] for s in spectra), max(s.fine[-1] for s in spectra))
    coarse = [_comb(s) for s in spectra]
    given = stack
    stack = _frozen(stack, layer, [g for s in spectra + coarse for g in (s.wl, s.fine)])
    family = _MODELS.get(model)
    family = _bounded(family, bounds, model, roughness, spread) if family is not None or bounds else family
    all_names = family.names if family else ()
    if held:
        family = _held(family, held, model, tuple(bounds or ()))
    chosen = {k: v for k, v in chosen.items() if k not in held}           # a held value is its own start
    n_mat = len(family.names) if family else 0

    names, lower, upper = [], [], []

    def add(name, lo, hi):
        names.append(name)
        lower.append(lo)
        upper.append(hi)
        return len(names) - 1

    rough_hi = _user_bound(bounds, "roughness_nm", (0.0, ROUGHNESS_MAX_NM))
    spread_hi = _user_bound(bounds, "spread_nm", (0.0, SPREAD_MAX_FRACTION * window[1]))
    i_d = [] if each else [add("thickness_nm", *window)] * n_spec
    i_mat = [add(nm, lo, hi) for nm, lo, hi in zip(family.names, family.lower, family.upper)] if family else []
    i_rough = add("roughness_nm", *rough_hi) if roughness else None
    i_spread = add("spread_nm", *spread_hi) if spread else None
    i_sc = [] if each or not free_scale else [add("scale", -np.inf, np.inf)] * n_spec
    i_of = [] if each or not free_offset else [add("offset", -np.inf, np.inf)] * n_spec
    if each:
        for i in range(n_spec):
            i_d.append(add(f"thickness_nm[{i}]", *window))
            if free_scale:
                i_sc.append(add(f"scale[{i}]", -np.inf, np.inf))
            if free_offset:
                i_of.append(add(f"offset[{i}]", -np.inf, np.inf))
    lower, upper = np.asarray(lower, dtype=float), np.asarray(upper, dtype=float)
    n_points = sum(s.wl.size for s in spectra)
    if n_points < POINTS_PER_PARAMETER * len(names):
        shown = ", ".join(names) if len(names) <= 12 else ", ".join(names[:10]) + ", …"
        raise InputError(f"{len(names)} free parameters ({shown}) need at least "
                         f"{POINTS_PER_PARAMETER * len(names)} spectrum points ({POINTS_PER_PARAMETER} each) and "
                         f"{n_points} were given: fix some (model='fixed', no roughness or spread, no free scale "
                         "or offset) or measure more points.")
    own = 1 + int(free_scale) + int(free_offset)
    short = [i for i, s in enumerate(spectra) if s.wl.size < POINTS_PER_PARAMETER * own] if each else []
    if short:
        raise InputError(f"Spectrum {short[0]} has {spectra[short[0]].wl.size} points for its own {own} free parameters "
                         f"(thickness{', scale' if free_scale else ''}{', offset' if free_offset else ''}), fewer than "
                         f"{POINTS_PER_PARAMETER * own} ({POINTS_PER_PARAMETER} each): measure more points there, or "
                         "leave the scale and offset fixed.")
    _scan_grid(stack, layer, window, spectra[0].wl, spectra[0].angle, "thickness window")   # refuses a window too wide

    hosts = [start_material] if family is None else None
    if family is not None:
        p_start = _start(family, start_material, model_band, model, tuple(bounds or ()), chosen)
        hosts = _draws(family, p_start, SAMPLES_PER_PARAMETER * n_mat)
    spread_start = float(np.clip(SPREAD_START_WAVES * band[0] / float(start_material.nk([band[0]]).real[0]),
                                 *spread_hi))
    rough_start = float(np.clip(ROUGHNESS_START_NM, *rough_hi))

    def unpack(p):
        mat = family.build(p[i_mat], model_band) if family else start_material
        rough = float(p[i_rough]) if roughness else None
        sigma = float(p[i_spread]) if spread else None
        sc = p[i_sc] if free_scale else np.ones(n_spec)
        of = p[i_of] if free_offset else np.zeros(n_spec)
        return p[i_d], mat, rough, sigma, sc, of

    def residual_on(specs):
        measured = np.concatenate([s.R for s in specs])
        groups = _groups(specs)
        edges = np.cumsum([0] + [s.wl.size for s in specs])
        memo = {}

        def residual(p):
            key = p.tobytes()
            if key in memo:
                return memo[key]
            say.evaluation()
            d, mat, rough, sigma, sc, of = unpack(p)
            try:
                st = _with_film(stack, layer, mat, float(d[0]), rough)
                R = _evaluate(st, layer + int(rough is not None), specs, groups, d, sigma, polarization)
                out = np.concatenate([sc[i] * R[i] + of[i] for i in range(len(specs))]) - measured
            except InputError:
                out = np.full(measured.size, INVALID_RESIDUAL)
            memo.clear()
            memo[key] = out
            return out

        residual.rows = [slice(a, b) for a, b in zip(edges[:-1], edges[1:])]
        return residual

    # columns stepped together in a Jacobian: every spectrum's own parameter of one kind (they share no rows)
    col_groups = ([[i] for i in i_mat] + [[i] for i in (i_rough, i_spread) if i is not None]
                  + [g for g in (i_d, i_sc, i_of) if g]) if each else None

    thickness_fit = None
    if family is None and n_spec == 1 and bandwidth_nm == 0:
        s = spectra[0]
        thickness_fit = fit_thickness(s.wl, s.R, given, layer, window, s.angle, polarization=polarization,
                                      free_scale=free_scale, free_offset=free_offset,
                                      progress=lambda f, text: say.stage(0.6 * f, text))
        candidates = [(0, (t,)) for t, _ in thickness_fit.minima[:CANDIDATES_REFINED]]
    else:
        candidates = _scan_candidates(stack, layer, hosts, window, coarse, polarization, free_scale, free_offset,
                                      family, model_band, each, say)
    if not candidates:
        raise InputError(f"No starting {model} material gives a valid index over {band[0]:g}-{band[1]:g} nm; start "
                         "from a material with data over the whole band, or choose another model.")
    refined, first = [], residual_on(coarse)
    measured_coarse = [c.R for c in coarse]
    for k, (h, ds) in enumerate(candidates):
        say.stage(0.6 + 0.15 * k / len(candidates), f"first refinement {k + 1} of {len(candidates)}")
        p0 = np.zeros(len(names))
        p0[i_d] = ds if each else ds[0]
        if family:
            p0[i_mat] = hosts[h]
        if roughness:
            p0[i_rough] = rough_start
        if spread:
            p0[i_spread] = spread_start
        if free_scale or free_offset:
            ones = p0.copy()
            ones[i_sc], ones[i_of] = 1.0, 0.0
            d, mat, rough, sigma, _, _ = unpack(ones)
            model0 = _evaluate(_with_film(stack, layer, mat, float(d[0]), rough), layer + int(rough is not None),
                               coarse, _groups(coarse), d, sigma, polarization)
            if each:
                for i in range(n_spec):
                    s0, o0, _ = _linear_fit(model0[i][None, :], measured_coarse[i], free_scale, free_offset)
                    if free_scale:
                        p0[i_sc[i]] = s0[0]
                    if free_offset:
                        p0[i_of[i]] = o0[0]
            else:
                s0, o0, _ = _linear_fit(np.concatenate(model0)[None, :], np.concatenate(measured_coarse),
                                        free_scale, free_offset)
                if free_scale:
                    p0[i_sc[0]] = s0[0]
                if free_offset:
                    p0[i_of[0]] = o0[0]
        p0 = np.clip(p0, lower, upper)
        refined.append(_finish(first, p0, lower, upper, first=True, col_groups=col_groups))
    refined.sort(key=lambda s: s.cost)
    full = residual_on(spectra)
    say.stage(0.75, "refining on every point", final=True)
    finals = [_finish(full, refined[0].x, lower, upper, col_groups=col_groups)]
    layout = (i_d, unpack)
    apart = max(3.0 * _result(finals[0], names, layout, model, n_points, None, window).uncertainty_nm, 1.0)
    for sol in ([] if each else refined[1:]):
        if sol.cost <= RIVAL_COST_RATIO * refined[0].cost and all(abs(sol.x[0] - f.x[0]) > apart for f in finals):
            finals.append(_finish(full, sol.x, lower, upper))
    finals.sort(key=lambda s: s.cost)
    best = finals[0]
    result = _result(best, names, layout, model, n_points, thickness_fit, window)
    noise = float(np.sqrt(np.mean([noise_rms(s.R) ** 2 for s in spectra])))
    quality, note, _ = _judge(result.rms, noise, float(np.std(np.concatenate([s.R for s in spectra]))), None, 0.0,
                              window, f"layer {layer + 1}")
    result = dataclasses.replace(result, quality=quality, message=(result.message + " " + note).strip(),
                                 bandwidth_nm=bandwidth_nm, slit=slit)
    if held:
        result = _with_held(result, i_mat, all_names, held)
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
    say.stage(1.0, "done", force=True)
    return result


class _Reporter:
    """Progress and cancel of one fit: ``stage(fraction, text)`` at each step, ``evaluation()`` at each model
    evaluation (cancel checked every time, progress at most every :data:`PROGRESS_EVERY_S`)."""

    def __init__(self, progress, cancel):
        self.progress, self.cancel = progress, cancel
        self.last, self.fraction, self.text, self.final, self.evals = -np.inf, 0.0, "", False, 0

    def check(self):
        c = self.cancel
        if c is not None and (c.is_set() if hasattr(c, "is_set") else c()):
            raise FitCancelled("The film fit was cancelled.")

    def stage(self, fraction, text, final=False, force=False):
        self.fraction, self.text, self.final, self.evals = fraction, text, final, 0
        self._tell(force)

    def evaluation(self):
        self.evals += 1
        if self.final:                  # the refinement's length is not known: approach the end, never reach it
            self.fraction = 0.75 + 0.24 * (1.0 - np.exp(-self.evals / 60.0))
        self._tell(False)

    def _tell(self, force):
        self.check()
        now = time.monotonic()
        if self.progress is not None and (force or now - self.last >= PROGRESS_EVERY_S):
            self.last = now
            self.progress(float(self.fraction), self.text + (f" ({self.evals} model evaluations)" if self.final else ""))


def _user_bound(bounds, name, hard):
    """(lo, hi) of ``name``: ``bounds[name]`` checked to lie inside ``hard``, else ``hard``."""
    if not bounds or name not in bounds:
        return hard
    lo, hi = (float(v) for v in require_finite(f"bounds[{name!r}]", bounds[name]).ravel()[:2])
    if not hard[0] <= lo < hi <= hard[1]:
        raise InputError(f"bounds[{name!r}] = ({lo:g}, {hi:g}) must be increasing and lie inside the range the fit "
                         f"allows ({hard[0]:g} to {hard[1]:g}); give bounds inside it.")
    return lo, hi


def _bounded(family, bounds, model, roughness, spread):
    """``family`` with the bounds given for its parameters (draws kept inside them); unknown names refused."""
    known = (family.names if family else ()) + (("roughness_nm",) if roughness else ()) + (("spread_nm",) if spread
                                                                                           else ())
    unknown = [k for k in (bounds or {}) if k not in known]
    if unknown:
        raise InputError(f"bounds names {', '.join(map(repr, unknown))}, which model {model!r} does not fit here; "
                         f"its free parameters with bounds are {', '.join(known) or 'none'} (the thickness window "
                         "is thickness_nm).")
    if family is None or not bounds:
        return family
    lo, hi, dlo, dhi = (list(v) for v in (family.lower, family.upper, family.draw_lower, family.draw_upper))
    for i, name in enumerate(family.names):
        if name in bounds:
            lo[i], hi[i] = _user_bound(bounds, name, (family.lower[i], family.upper[i]))
            dlo[i], dhi[i] = max(dlo[i], lo[i]), min(dhi[i], hi[i])
            if dlo[i] >= dhi[i]:
                dlo[i], dhi[i] = lo[i], hi[i]
    return dataclasses.replace(family, lower=tuple(lo), upper=tuple(hi), draw_lower=tuple(dlo), draw_upper=tuple(dhi))


def _grouped_jacobian(residual, col_groups, upper):
    """Forward-difference Jacobian, sparse, with the columns of each group stepped together (Curtis, Powell and
    Reid 1974): a group's columns touch disjoint rows (one spectrum each, ``residual.rows``), so one evaluation
    gives them all. Steps as scipy's '2-point' (√eps relative, backwards at an upper bound)."""
    rel = np.sqrt(np.finfo(float).eps)

    def jac(p):
        r0 = residual(p)
        vals, rows, cols_out = [], [], []
        for cols in col_groups:
            h = rel * np.maximum(1.0, np.abs(p[cols]))
            h = np.where(p[cols] + h > upper[cols], -h, h)
            q = p.copy()
            q[cols] += h
            dr = residual(q) - r0
            if len(cols) == 1:
                parts = [(cols[0], h[0], slice(0, r0.size))]
            else:
                parts = zip(cols, h, residual.rows)
            for c, hc, rs in parts:
                idx = np.arange(r0.size)[rs]
                vals.append(dr[rs] / hc)
                rows.append(idx)
                cols_out.append(np.full(idx.size, c))
        return sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols_out))),
                                 shape=(r0.size, p.size))
    return jac


def _finish(residual, p0, lower, upper, first=False, col_groups=None):
    """Bounded least squares from ``p0``: a first pass (:data:`FIRST_NFEV`, :data:`FIRST_TOL`) that only ranks the
    starts, or the refinement run to convergence (:data:`FINAL_NFEV`, :data:`FTOL`, :data:`XTOL`); with
    ``col_groups`` the Jacobian is :func:`_grouped_jacobian`'s, sparse, and the trust-region steps are solved by
    LSMR (an SVD of the tall Jacobian of a wafer map costs more than the model evaluations)."""
    tol = FIRST_TOL if first else FTOL
    if col_groups is None:
        return least_squares(residual, p0, bounds=(lower, upper), x_scale="jac", method="trf", xtol=tol, ftol=tol,
                             max_nfev=FIRST_NFEV if first else FINAL_NFEV)
    jac = _grouped_jacobian(residual, col_groups, np.asarray(upper, dtype=float))
    return least_squares(residual, p0, jac=jac, bounds=(lower, upper), x_scale="jac", method="trf", xtol=tol,
                         ftol=tol, max_nfev=FIRST_NFEV if first else FINAL_NFEV, tr_solver="lsmr")


def _comb(s: _Spectrum) -> _Spectrum:
    """At most :data:`SCAN_WAVELENGTHS` evenly picked points of a spectrum, for the global search (read through the
    same slit, on the same fine grid)."""
    pick = np.unique(np.linspace(0, s.wl.size - 1, min(s.wl.size, SCAN_WAVELENGTHS)).round().astype(int))
    if s.blur is None:
        return _Spectrum(s.wl[pick], s.R[pick], s.angle, s.wl[pick])
    return _Spectrum(s.wl[pick], s.R[pick], s.angle, s.fine, s.blur[pick])


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


def _scan_candidates(stack, layer, hosts, window, spectra, polarization, free_scale, free_offset, family, band, each,
                     say):
    """(host index, thicknesses) pairs: the best local minima of a dense thickness scan for each starting material
    (one thickness), or with ``each`` every spectrum's own best thickness (materials ranked by the sum over the
    spectra of their best sums of squares, first on :data:`RANK_SPECTRA` of them)."""
    def scans(mat, specs):
        grid = _grid_for(mat, window, specs)
        st = _with_film(stack, layer, mat, window[0], None)
        return grid, [_linear_fit(s.reading(sweep(st, layer, grid, [s.angle], s.fine, polarization)[:, 0, :]), s.R,
                                  free_scale, free_offset)[2] for s in specs]

    rank = spectra
    if each and len(spectra) > RANK_SPECTRA:
        rank = [spectra[i] for i in np.unique(np.linspace(0, len(spectra) - 1, RANK_SPECTRA).round().astype(int))]
    found = []
    for h, p in enumerate(hosts):
        say.stage(0.6 * h / len(hosts), f"thickness scan {h + 1} of {len(hosts)} starting materials")
        try:
            mat = family.build(p, band) if family else p
            grid, ssr = scans(mat, rank)
        except InputError:          # a drawn material with no valid index in the band
            continue
        if each:
            found.append((float(sum(np.min(s) for s in ssr)), h, None))
        else:
            total = sum(ssr)
            found += [(float(total[i]), h, (float(grid[i]),)) for i in _local_minima(total)[:MINIMA_PER_SAMPLE]]
    found.sort(key=lambda f: f[:2])
    found = found[:CANDIDATES_REFINED]
    if not each:
        return [(h, d) for _, h, d in found]
    out = []
    for k, (_, h, _) in enumerate(found):
        say.stage(0.5 + 0.1 * k / len(found), f"every point's thickness scan, start {k + 1} of {len(found)}")
        grid, ssr = scans(family.build(hosts[h], band) if family else hosts[h], spectra)
        out.append((h, np.array([grid[int(np.argmin(s))] for s in ssr])))
    return out


def _result(sol, names, layout, model, n, thickness_fit, window) -> FilmFitResult:
    i_d, unpack = layout
    p, J = sol.x, sol.jac
    ssr = float(np.sum(sol.fun ** 2))
    jtj = J.T @ J                                    # sparse for a wafer map: only the (p, p) product is dense
    cov = np.linalg.pinv(jtj.toarray() if sparse.issparse(jtj) else jtj) * (ssr / max(n - p.size, 1))
    sig = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    with np.errstate(divide="ignore", invalid="ignore"):
        corr = cov / np.outer(sig, sig)
    corr = np.where(np.isfinite(corr), np.clip(corr, -1.0, 1.0), 0.0)
    np.fill_diagonal(corr, 1.0)
    ds, mat, rough, sigma, _, _ = unpack(p)
    d, sd = float(ds[0]), float(sig[i_d[0]])
    notes = []
    # two points' own parameters correlate only through the shared ones: the pair to name includes a shared one
    pairs = [(abs(corr[i, j]), i, j) for i in range(len(names)) for j in range(i + 1, len(names))
             if abs(corr[i, j]) > CORRELATION_WARN and not ("[" in names[i] and "[" in names[j])]
    if pairs:
        c, i, j = max(pairs)
        notes.append(f"{names[i]} and {names[j]} trade against each other (correlation {corr[i, j]:+.3f}): the "
                     "spectrum fixes a combination of the two, so each is uncertain"
                     + (" (of a transparent film the spectrum mostly fixes the optical thickness n·d, and the "
                        "thinner the film the less it tells n from d). Fix the index "
                        "(model='fixed' with a known material) or add a spectrum at another angle."
                        if names[i].startswith("thickness_nm") or names[j].startswith("thickness_nm") else
                        ". Fix one of them or use a model with fewer parameters."))
    edge = [i for i, k in enumerate(i_d) if p[k] - window[0] < sig[k] or window[1] - p[k] < sig[k]]
    if edge:
        which = "" if len(set(i_d)) == 1 else f" of spectrum {', '.join(str(i) for i in sorted(set(edge))[:5])}"
        notes.append(f"The fitted thickness{which} is at the edge of its window; the true value may lie outside "
                     "it. Widen the window.")
    if thickness_fit is not None and thickness_fit.warning and not notes:
        notes.append(thickness_fit.warning)
    return FilmFitResult(thickness_nm=d, uncertainty_nm=sd, material=mat,
                         parameters={k: float(v) for k, v in zip(names, p)},
                         uncertainties={k: float(v) for k, v in zip(names, sig)}, correlation=corr,
                         parameter_names=tuple(names), roughness_nm=None if rough is None else float(rough),
                         spread_nm=None if sigma is None else float(sigma), message=" ".join(notes),
                         rms=float(np.sqrt(ssr / n)), n_points=int(n), model=model, thickness_fit=thickness_fit,
                         thicknesses_nm=tuple(float(x) for x in ds),
                         thickness_uncertainties_nm=tuple(float(sig[k]) for k in i_d))
