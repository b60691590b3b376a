"""Rigorous diffraction efficiency of one-dimensional surface-relief gratings (RCWA).

Maxwell's equations are solved for a periodic groove profile by rigorous coupled-wave analysis
(the Fourier modal method): the permittivity of each slice of the groove is expanded in a Fourier
series, the field in each slice is a sum of 2N + 1 plane-wave harmonics (orders −N … N), and the
slices are joined by the enhanced transmittance matrix, which stays stable for deep grooves and
metals. Two independent solvers sit behind :func:`solve_orders`: the project's own
(:mod:`physics.fmm`, numpy, every wavelength of a curve in one stacked eigen-solve per slice; the
default) and the numpy back end of the meent package (MIT licence), kept as the second
implementation the tests and the benchmark compare against.

Conventions (stated once):

- Angles and orders as in :mod:`physics.grating`: m·λ = d·(sin α + sin β), β positive on the
  side of the incident beam, zero order β = −α.
- Geometry: a vacuum/air ambient (n = 1 exactly) above; the grooves; below them a semi-infinite
  substrate of the grating material. Light arrives from the ambient in the plane perpendicular
  to the grooves (no conical mount).
- Polarization: TE (s) has its electric field along the grooves, TM (p) its magnetic field along
  the grooves; "unpolarized" is their mean.
- Reflection: the orders sent back into the ambient. Transmission: the orders carried into the
  substrate that leave it into air through a flat back face parallel to the grating (those with
  |sin β| <= 1, the same grating equation); the value is the power carried in the substrate, so the
  back face's own Fresnel loss (about 4 % for glass) is not included, and orders trapped in the
  substrate by total internal reflection are reported as 0 (they are still counted in
  ``transmitted_total``). Transmission is only meaningful for a transparent (dielectric)
  grating on a substrate of the same material.
- Index N = n + ik with k >= 0 (the package's convention, exp(−iωt)); meent works with exp(+jωt),
  so it is handed the complex conjugate. Both solvers agree to about 1e-11 at the same harmonic
  count (tests/test_rcwa.py).
- Profiles (depth = peak to valley): "lamellar" (rectangular ridges, ``duty_cycle`` = ridge width
  / period), "sinusoidal" and "blazed" (sawtooth: a facet at the blaze angle θ_B whose normal leans
  toward the positive orders, and a steep back side; a right-angle apex by default), the last two
  cut into a staircase of thin slices.

References
----------
M. G. Moharam and T. K. Gaylord, J. Opt. Soc. Am. 71, 811-818 (1981) (RCWA of planar gratings);
M. G. Moharam, E. B. Grann, D. A. Pommet and T. K. Gaylord, J. Opt. Soc. Am. A 12, 1068-1076
(1995) (stable formulation, enhanced transmittance matrix); L. Li, J. Opt. Soc. Am. A 13,
1870-1876 (1996) (Fourier factorization of TM fields, which meent applies); Y. Kim et al., meent,
https://github.com/kc-ml2/meent (the solver).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
from threadpoolctl import threadpool_limits

from .errors import InputError

__all__ = ["RigorousEfficiency", "solve_orders", "converged_orders", "harmonic_cap", "solver_threads", "BACKENDS", "starting_harmonics", "profile_slices", "PROFILES", "POLARIZATIONS",
           "check_profile", "DEFAULT_DEPTH_NM", "CONVERGENCE_TOL", "MAX_HARMONICS", "TRANSPARENT_K_MAX"]

#: Groove profiles understood by :func:`profile_slices`.
PROFILES = ("lamellar", "sinusoidal", "blazed")
#: Accepted polarization words and the solver's pol numbers they stand for (0 TE, 1 TM).
POLARIZATIONS = {"te": (0,), "s": (0,), "tm": (1,), "p": (1,), "unpolarized": (0, 1)}
#: Default groove depth (peak to valley) for lamellar and sinusoidal grooves, nm: a typical
#: holographic/etched visible grating depth (common practice: about λ/4 to λ/6 in the visible).
DEFAULT_DEPTH_NM = 100.0
#: Convergence: the harmonic count grows until the quoted efficiencies change by less than this
#: (absolute) from one count to the next: below what a practitioner reads off an efficiency curve.
CONVERGENCE_TOL = 1e-3
#: Largest harmonic index N tried (2N + 1 plane waves) for a one-slice groove unless the grating
#: needs more to hold its propagating orders: TM on metals converges slowly (the field is singular
#: at the metal's corners); past this a curve costs over a second on two cores, so the result is
#: reported as not converged (with its last change) instead.
MAX_HARMONICS = 32
#: Work bound of a curve: a solve costs about (slices with grooves) × (2N + 1)³ per wavelength (one
#: eigen-decomposition per slice), so a staircase of S slices is capped where S·(2N + 1)³ reaches
#: one slice at MAX_HARMONICS: N about MAX_HARMONICS / S^(1/3).
WORK_CAP = (2 * MAX_HARMONICS + 1) ** 3
#: Smallest harmonic index tried; and the margin above the highest propagating order.
MIN_HARMONICS = 8
HARMONIC_MARGIN = 6
#: Growth factor of the harmonic index between convergence steps (doubling: each step at least
#: halves a truncation error that falls like 1/N, so a small change means a small error).
HARMONIC_GROWTH = 2.0
#: Wavelengths of a curve at which convergence is checked (spread over the curve, ends included).
CONVERGENCE_PROBES = 5
#: BLAS threads while the Fourier modal method runs. Its matrices are small (2N + 1 ≤ 65 rows), and a
#: multi-threaded BLAS spends more on waking its threads than it gains on them: measured here, a
#: 200-wavelength lamellar Al curve took 0.47 s with one BLAS thread and 1.7-4.3 s with two. The
#: solver's own threads (:func:`solver_threads`) split the wavelengths instead.
SOLVER_BLAS_THREADS = 1
#: Solvers behind :func:`solve_orders`: the project's Fourier modal method and meent's.
BACKENDS = ("fmm", "meent")
#: Fewest wavelengths per thread when a curve is split over threads (below it, threads cost more
#: than they give).
THREAD_MIN_WAVELENGTHS = 16
#: Staircase of a smooth profile: each slice at most this fraction of the shortest wavelength thick,
#: and between STAIR_STEPS_MIN and STAIR_STEPS_MAX slices (slices much thinner than the wavelength
#: represent a smooth profile; common practice).
STAIR_STEP_FRACTION = 1.0 / 20.0
STAIR_STEPS_MIN = 10
STAIR_STEPS_MAX = 20
#: Power an absorbing material's backing slab may let through (it stands for a semi-infinite
#: substrate: its thickness is −ln(BACKING_LEAK)·λ/(4πk), the Beer-Lambert depth for this leak).
BACKING_LEAK = 1e-10
#: Largest k for a transmission grating's material: above it the substrate absorbs the transmitted
#: orders and "transmission into the substrate" means nothing.
TRANSPARENT_K_MAX = 1e-3


@dataclass(frozen=True)
class RigorousEfficiency:
    """Rigorous efficiencies of some orders over a wavelength axis, and how they were obtained.

    Arrays have the wavelength axis first: ``efficiency`` is (W, O) for the ``orders`` asked (the
    polarization asked), ``te`` and ``tm`` likewise per polarization (None if not computed).
    ``reflected_total`` / ``transmitted_total`` / ``absorbed`` are (W, P) for the polarizations
    computed (``polarizations``, solver numbers 0 TE / 1 TM): the sum over every propagating
    reflected order, over every order carried into the substrate, and 1 minus both.
    """

    wavelength_nm: np.ndarray
    orders: tuple
    efficiency: np.ndarray
    te: np.ndarray | None
    tm: np.ndarray | None
    polarizations: tuple
    reflected_total: np.ndarray
    transmitted_total: np.ndarray
    absorbed: np.ndarray
    harmonics: int                      #: harmonic index N used (2N + 1 plane waves)
    converged: bool                     #: the last change was below the tolerance
    change: float                       #: largest change of a quoted efficiency at the last step
    slices: int                         #: slices of the groove profile (1 for lamellar)
    kind: str = "reflection"
    note: str = field(default="")
    harmonics_by_polarization: dict = field(default_factory=dict)   #: {"TE": N, "TM": N} as computed

    @property
    def fourier_orders(self) -> int:
        """Plane waves kept per slice (2N + 1)."""
        return 2 * self.harmonics + 1


# ---------------------------------------------------------------------- profile
def profile_slices(profile, depth_nm, duty_cycle, blaze_angle_deg, period_nm, shortest_nm):
    """Slices of one groove period, top (ambient side) first.

    Returns
    -------
    (thickness_nm, intervals) : list of slice thicknesses (nm) and, per slice, the (x0, x1)
    fraction of the period filled by the grating material (0 <= x0 < x1 <= 1).
    """
    if profile == "lamellar":
        f = float(duty_cycle)
        return [float(depth_nm)], [(0.5 - f / 2, 0.5 + f / 2)]
    steps = int(np.clip(np.ceil(depth_nm / (STAIR_STEP_FRACTION * shortest_nm)), STAIR_STEPS_MIN, STAIR_STEPS_MAX))
    z = (np.arange(steps)[::-1] + 0.5) / steps                         # slice mid-heights / depth, top first
    if profile == "sinusoidal":
        # h(x) = depth·(1 − cos 2πx)/2: material where h > z·depth
        xa = np.arccos(1.0 - 2.0 * z) / (2 * np.pi)
        intervals = [(float(a), float(1.0 - a)) for a in xa]
    else:
        # sawtooth: facet of horizontal length L_f = depth / tan θ_B falling toward +x (its normal leans to
        # the side the positive orders leave on), back side rising over the rest of the period
        lf = depth_nm / np.tan(np.radians(blaze_angle_deg)) / period_nm
        intervals = [(float(zz * (1.0 - lf)), float(1.0 - zz * lf)) for zz in z]
    return [float(depth_nm) / steps] * steps, intervals


def _conv_matrices(intervals, n_material, harmonics):
    """meent's Fourier-series convolution matrices (ε, its inverse rule, and 1/ε) for each slice."""
    from meent.on_numpy.emsolver.convolution_matrix import to_conv_mat_vector

    nm = np.conj(complex(n_material))                                  # meent: exp(+jωt), N = n − ik
    info = []
    for x0, x1 in intervals:
        cells, edges = [], []
        if x0 > 0:
            cells.append(1.0), edges.append(x0)
        cells.append(nm), edges.append(x1)
        if x1 < 1:
            cells.append(1.0), edges.append(1.0)
        info.append((np.array([cells], dtype=complex), np.array(edges, dtype=float).reshape(-1, 1),
                     np.array([[1.0]])))
    return to_conv_mat_vector(info, harmonics, 0, type_complex=np.complex128)


def solver_threads() -> int:
    """Threads one curve may use: ``FRINGEGAUGE_SOLVER_THREADS`` if set (at least 1), else the cores this
    process may run on, at most 2 (the stacked eigen-solves release the interpreter lock)."""
    text = os.environ.get("FRINGEGAUGE_SOLVER_THREADS", "").strip()
    if text.isdigit() and int(text) > 0:
        return int(text)
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cores = os.cpu_count() or 1
    return max(1, min(2, cores))


def solve_orders(wavelength_nm, period_nm, incidence_deg, thickness_nm, intervals, n_material, harmonics,
                 pols=(0, 1), *, backend="fmm", threads=None):
    """Reflected and transmitted efficiencies of orders −N … N for each wavelength and polarization.

    Parameters
    ----------
    wavelength_nm : (W,) vacuum wavelengths, nm
    period_nm : groove period d, nm
    incidence_deg : angle of incidence α, degrees
    thickness_nm, intervals : slices from :func:`profile_slices`
    n_material : (W,) complex index n + ik of the grating and substrate at each wavelength
    harmonics : harmonic index N (orders −N … N are kept)
    pols : solver polarization numbers (0 TE, 1 TM)
    backend : "fmm" (:mod:`physics.fmm`, all wavelengths at once) or "meent" (the second implementation)
    threads : threads to split the wavelengths over ("fmm" only); default :func:`solver_threads`

    Returns
    -------
    (R, T) : arrays (W, P, 2N + 1); column N + m holds order m (sign convention of the module). T is
    the power carried into the substrate (for an absorbing substrate: the power it absorbs).
    """
    if backend == "meent":
        return _solve_orders_meent(wavelength_nm, period_nm, incidence_deg, thickness_nm, intervals, n_material,
                                   harmonics, pols)
    if backend != "fmm":
        raise InputError(f"backend must be one of {', '.join(BACKENDS)}; got {backend!r}.")
    from . import fmm

    wl = np.asarray(wavelength_nm, dtype=float).ravel()
    nk = np.broadcast_to(np.asarray(n_material, dtype=complex).ravel(), wl.shape)
    args = (period_nm, incidence_deg, thickness_nm, intervals)
    parts = int(min(threads or solver_threads(), max(1, wl.size // THREAD_MIN_WAVELENGTHS)))
    with threadpool_limits(limits=SOLVER_BLAS_THREADS, user_api="blas"):
        if parts <= 1:
            return fmm.solve_orders(wl, *args, nk, harmonics, pols)
        from concurrent.futures import ThreadPoolExecutor

        chunks = np.array_split(np.arange(wl.size), parts)
        with ThreadPoolExecutor(parts) as pool:
            out = list(pool.map(lambda ix: fmm.solve_orders(wl[ix], *args, nk[ix], harmonics, pols), chunks))
    return np.concatenate([r for r, _ in out]), np.concatenate([t for _, t in out])


def _solve_orders_meent(wavelength_nm, period_nm, incidence_deg, thickness_nm, intervals, n_material, harmonics,
                        pols=(0, 1)):
    """:func:`solve_orders` by meent's 1D solver, one wavelength and polarization at a time."""
    wl = np.asarray(wavelength_nm, dtype=float).ravel()
    nk = np.broadcast_to(np.asarray(n_material, dtype=complex).ravel(), wl.shape)
    size = 2 * harmonics + 1
    R = np.zeros((wl.size, len(pols), size))
    T = np.zeros((wl.size, len(pols), size))
    import meent

    # meent's +x points away from the incident beam's side: θ_meent = −α makes its order index m ours
    mee = meent.call_mee(backend=0, pol=pols[0], n_top=1.0, n_bot=1.0, theta=-np.radians(incidence_deg), phi=None,
                         fto=[harmonics, 0], period=[float(period_nm)], wavelength=float(wl[0]),
                         thickness=list(thickness_nm), type_complex=np.complex128)
    absorbing = float(nk.imag.max()) > TRANSPARENT_K_MAX
    if absorbing:
        # meent's semi-infinite substrate takes a real index only (it conjugates k_z but not ε in TM):
        # an absorbing substrate is a uniform slab of the material thick enough that what crosses it
        # is below BACKING_LEAK, over an ambient-index half-space.
        backing = float(np.max(-np.log(BACKING_LEAK) * wl / (4 * np.pi * nk.imag)))
        mee.thickness = list(thickness_nm) + [backing]
        intervals = list(intervals) + [(0.0, 1.0)]
    cache = {}
    for i in range(wl.size):
        n = complex(nk[i])
        conv = cache.get(n)
        if conv is None:
            conv = cache[n] = _conv_matrices(intervals, n, harmonics)
        mee.n_bot = 1.0 if absorbing else n.real
        mee.wavelength = wl[i]
        for j, pol in enumerate(pols):
            mee.pol = pol
            res = mee.solve_1d(wl[i], *conv)["res"]
            R[i, j] = np.asarray(res["de_ri"]).real.ravel()
            T[i, j] = np.asarray(res["de_ti"]).real.ravel()
    return R, T


def starting_harmonics(period_nm, shortest_nm, incidence_deg, n_substrate, orders):
    """First harmonic index tried: above every order that propagates (in the ambient or the substrate)."""
    nk = np.asarray(n_substrate, dtype=complex)
    n_top = 1.0 if float(nk.imag.max()) > TRANSPARENT_K_MAX else max(1.0, float(nk.real.max()))
    top = np.ceil(period_nm * (n_top + abs(np.sin(np.radians(incidence_deg)))) / shortest_nm)
    return int(max(MIN_HARMONICS, top + HARMONIC_MARGIN, max(abs(int(m)) for m in orders) + HARMONIC_MARGIN))


def harmonic_cap(intervals, start):
    """Largest harmonic index the convergence search may reach for these slices: :data:`WORK_CAP` shared
    over the slices that have grooves (uniform ones cost no eigen-solve), :data:`MAX_HARMONICS` for one
    slice; at least ``start`` + 2, so one step is always taken."""
    grooved = max(1, sum(1 for x0, x1 in intervals if 0.0 < x1 - x0 < 1.0))
    return int(max((round((WORK_CAP / grooved) ** (1.0 / 3.0)) - 1) // 2, start + 2))


def converged_orders(wavelength_nm, period_nm, incidence_deg, thickness_nm, intervals, n_material, orders, pols,
                     kind, tol=CONVERGENCE_TOL, *, backend="fmm"):
    """(R, T, harmonics, converged, change): :func:`solve_orders` with the harmonic count chosen.

    The count starts above every propagating order and doubles (:data:`HARMONIC_GROWTH`) up to the cap
    :func:`harmonic_cap` (a work bound: fewer harmonics for more slices); each count is compared with
    the next (the last with twice itself: the check may look beyond the cap, at
    :data:`CONVERGENCE_PROBES` wavelengths only) on the quoted efficiencies (``orders`` in ``kind``,
    every polarization), and the first count whose change is below ``tol`` is used (an a-posteriori
    error estimate). If none is, the curve is computed at the cap with ``converged`` False and
    ``change`` the last change.
    """
    wl = np.asarray(wavelength_nm, dtype=float).ravel()
    nk = np.broadcast_to(np.asarray(n_material, dtype=complex).ravel(), wl.shape)
    probe = np.unique(np.round(np.linspace(0, wl.size - 1, min(CONVERGENCE_PROBES, wl.size))).astype(int))
    start = starting_harmonics(period_nm, float(wl.min()), incidence_deg, nk, orders)
    cap = harmonic_cap(intervals, start)
    counts = [start]
    while counts[-1] < cap:
        counts.append(min(cap, int(np.ceil(counts[-1] * HARMONIC_GROWTH))))
    cols = np.asarray(orders, dtype=int)

    def quoted(h):
        R, T = solve_orders(wl[probe], period_nm, incidence_deg, thickness_nm, intervals, nk[probe], h, pols,
                            backend=backend, threads=1)
        return (R if kind == "reflection" else T)[:, :, h + cols]

    converged, change = False, np.inf
    prev = quoted(counts[0])
    for i, n in enumerate(counts):
        nxt = counts[i + 1] if i + 1 < len(counts) else int(np.ceil(n * HARMONIC_GROWTH))
        cur = quoted(nxt)
        change = float(np.max(np.abs(cur - prev)))
        if change < tol:
            converged = True
            break
        prev = cur
    R, T = solve_orders(wl, period_nm, incidence_deg, thickness_nm, intervals, nk, n, pols, backend=backend)
    return R, T, n, converged, change


def _number(value) -> float:
    """``value`` as a float, NaN when it is not a real number (so the range check below refuses it)."""
    try:
        return float(value)
    except (TypeError, ValueError):
        return float("nan")


def check_profile(profile, depth_nm, duty_cycle, blaze_angle_deg, period_nm):
    """Validate the groove description; return the depth (nm) to use."""
    if profile not in PROFILES:
        raise InputError(f"profile must be one of {', '.join(PROFILES)}; got {profile!r}.")
    tb = _number(blaze_angle_deg)
    if profile == "blazed":
        if blaze_angle_deg is None:
            raise InputError("A blazed profile needs blaze_angle_deg (the facet angle, between 0° and 90°).")
        if not 0.0 < tb < 90.0:
            raise InputError(f"blaze_angle_deg = {blaze_angle_deg!r} is not allowed; the facet angle must lie "
                             "strictly between 0° and 90°.")
        if depth_nm is None:                                            # right-angle apex: h = d sin θ_B cos θ_B
            depth_nm = period_nm * np.sin(np.radians(tb)) * np.cos(np.radians(tb))
    elif depth_nm is None:
        depth_nm = DEFAULT_DEPTH_NM
    h = _number(depth_nm)
    if not (np.isfinite(h) and h > 0):
        raise InputError(f"depth_nm = {depth_nm!r} is not allowed; give the groove depth (peak to valley) as a "
                         "positive number of nm, e.g. 100.")
    if profile == "lamellar" and not 0.0 < _number(duty_cycle) < 1.0:
        raise InputError(f"duty_cycle = {duty_cycle!r} is not allowed; the ridge width over the period must "
                         "lie strictly between 0 and 1 (0.5 for equal ridges and grooves).")
    if profile == "blazed" and h / np.tan(np.radians(tb)) > period_nm:
        raise InputError(f"depth_nm = {h:g} nm is too deep for a {tb:g}° facet on a {period_nm:.1f} nm period: "
                         f"the facet would be longer than the period. Give at most "
                         f"{period_nm * np.tan(np.radians(tb)):.0f} nm (or leave the depth out for a right-angle apex).")
    return h
