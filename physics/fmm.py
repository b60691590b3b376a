"""Fourier modal method for one-dimensional gratings, batched over wavelengths (TE and TM).

The groove is cut into slices uniform in depth; in each slice the permittivity is a Fourier series
over one period and the field a sum of 2N + 1 plane-wave harmonics. The slice's modes are the
eigenvectors of a (2N + 1)-square matrix, found for every wavelength at once (numpy's stacked
eigen-solver on arrays (W, M, M)); the slices are joined from the substrate up by the enhanced
transmittance matrix, which never multiplies growing exponentials, so deep grooves, metals and
many slices stay stable. TM light uses the inverse rule for the field component normal to the
slice's vertical walls, which makes metallic TM gratings converge with the harmonic count.

Conventions (stated once; the same as :mod:`physics.rcwa`):

- Time dependence exp(−iωt); index N = n + ik with k >= 0; ε = N². A wave travelling down (into
  the grating) is exp(+i k_z z) with Im k_z >= 0.
- Harmonic m has k_x,m / k0 = m·λ/d − sin α (the incident beam travels toward −x), so order m
  leaves at sin β = m·λ/d − sin α, β positive on the side of the incident beam (zero order
  β = −α), x and the filled fractions of the period measured along +x.
- Coordinates: z' = k0·z; tangential fields (e, v): TE e = E_y, v = −Z0·H_x; TM e = Z0·H_y,
  v = E_x. In a slice, fields = W (exp(i k_z z') c⁺ + exp(i k_z (D − z')) c⁻), v = V (…c⁺ − …c⁻).
- Geometry: ambient (n = 1 by default) above, slices top first, a semi-infinite substrate below.
  A slice's material fills the fractions (x0, x1) of the period; the rest is ambient.

References
----------
M. G. Moharam, E. B. Grann, D. A. Pommet and T. K. Gaylord, J. Opt. Soc. Am. A 12, 1068-1076
(1995) (formulation of the coupled-wave equations, the enhanced transmittance matrix, eq. 15-20
and 35-38); L. Li, J. Opt. Soc. Am. A 13, 1870-1876 (1996) (Fourier factorization: the inverse
rule for products with concurrent jumps); P. Lalanne and G. M. Morris, J. Opt. Soc. Am. A 13,
779-784 (1996) (the same rule for TM lamellar gratings).
"""

from __future__ import annotations

import numpy as np

__all__ = ["indicator_toeplitz", "solve_orders"]

#: A mode's k_z/k0 closer to zero than this is moved off zero (the slice's V matrix is divided by
#: k_z); far below any efficiency the solver quotes.
_KZ_FLOOR = 1e-12


def indicator_toeplitz(intervals, harmonics):
    """Toeplitz matrices G (S, M, M) of each slice's filling function (1 on (x0, x1), else 0).

    G[m, p] = ∫₀¹ f(u) exp(−2πi (m − p) u) du, so that [[ε]] = ε_ambient·I + (ε_material − ε_ambient)·G
    projects ε(x)·exp(i k_x,p x) on exp(i k_x,m x) for the harmonics of the module's convention.
    """
    n = np.arange(-harmonics, harmonics + 1)
    h = n[:, None] - n[None, :]                                          # m − p (k_x,m − k_x,p = (m − p)·λ/d)
    out = np.empty((len(intervals), n.size, n.size), dtype=complex)
    safe = np.where(h == 0, 1, h)
    for i, (x0, x1) in enumerate(intervals):
        # ∫_{x0}^{x1} exp(−2πi h u) du, closed form; x1 − x0 at h = 0
        g = (np.exp(-2j * np.pi * safe * x0) - np.exp(-2j * np.pi * safe * x1)) / (2j * np.pi * safe)
        out[i] = np.where(h == 0, x1 - x0, g)
    return out


def _kz(eig):
    """k_z/k0 from k_z² with Im k_z >= 0 (decaying or travelling downward)."""
    kz = np.sqrt(eig.astype(complex))
    flip = (kz.imag < 0) & (-kz.imag > kz.real)         # principal root on the wrong side of a negative k_z²
    kz = np.where(flip, -kz, kz)
    return np.where(np.abs(kz) < _KZ_FLOOR, _KZ_FLOOR, kz)


def _uniform_kz(eps, kx):
    """(W, M) k_z/k0 of the plane waves in a uniform medium of permittivity eps (W,)."""
    return _kz(eps[:, None] - kx ** 2)


def _slice_modes(pol, eps, G, kx, cache):
    """(W, kz, Winv, V, Vinv_left) of one slice for all wavelengths: eigenvectors W (W, M, M), k_z (W, M),
    W⁻¹, V and the left factor of V⁻¹ (V⁻¹ = diag(1/k_z)·Vinv_left)."""
    key = (pol, G.tobytes())
    hit = cache.get(key)
    if hit is not None:
        return hit
    nw, m = eps.shape[0], kx.shape[1]
    eye = np.eye(m)
    d_eps = (eps - 1.0)[:, None, None]
    E = eye + d_eps * G                                                  # [[ε]] (Laurent rule)
    Kx = kx[:, :, None] * eye                                            # diag(k_x) as (W, M, M)
    if pol == 0:                                                         # TE: k_z² = eig([[ε]] − Kx²)
        kz2, W = np.linalg.eig(E - Kx * kx[:, None, :])
        Winv = np.linalg.inv(W)
        kz = _kz(kz2)
        V = W * kz[:, None, :]
        left = Winv
    else:
        # TM: ∂²(H_y)/∂z'² = −P⁻¹(I − Kx [[ε]]⁻¹ Kx) H_y with P = [[1/ε]] (inverse rule, Li 1996)
        P = eye + (1.0 / eps - 1.0)[:, None, None] * G
        Einv = np.linalg.inv(E)
        kz2, W = np.linalg.eig(np.linalg.solve(P, eye - kx[:, :, None] * Einv * kx[:, None, :]))
        Winv = np.linalg.inv(W)
        kz = _kz(kz2)
        PW = P @ W
        V = PW * kz[:, None, :]                                          # E_x = P W k_z (c⁺ − c⁻)
        left = np.linalg.inv(PW)                                         # W⁻¹ P⁻¹
    out = (W, kz, Winv, V, left)
    cache[key] = out
    return out


def solve_orders(wavelength_nm, period_nm, incidence_deg, thickness_nm, intervals, n_material, harmonics,
                 pols=(0, 1), n_ambient=1.0):
    """Reflected and transmitted efficiencies of orders −N … N for each wavelength and polarization.

    Parameters
    ----------
    wavelength_nm : (W,) vacuum wavelengths, nm
    period_nm : groove period d, nm
    incidence_deg : angle of incidence α (from the ambient), degrees
    thickness_nm : slice thicknesses, nm, top first
    intervals : per slice, the (x0, x1) fractions of the period filled by the material
    n_material : (W,) complex index n + ik of the grating and substrate at each wavelength
    harmonics : harmonic index N (orders −N … N are kept)
    pols : polarizations (0 TE, 1 TM)
    n_ambient : real index of the ambient above (and in the grooves)

    Returns
    -------
    (R, T) : arrays (W, P, 2N + 1); column N + m holds order m. T is the power carried into the
    substrate (an absorbing substrate absorbs it).
    """
    wl = np.asarray(wavelength_nm, dtype=float).ravel()
    nk = np.broadcast_to(np.asarray(n_material, dtype=complex).ravel(), wl.shape)
    na = float(n_ambient)
    # everything relative to the ambient: ε_ambient = 1 in the algebra, k0 scaled by n_ambient
    eps = (nk / na) ** 2
    lam = wl / na
    size = 2 * harmonics + 1
    orders = np.arange(-harmonics, harmonics + 1)
    kx = orders[None, :] * lam[:, None] / float(period_nm) - np.sin(np.radians(incidence_deg))   # (W, M)
    k0 = 2 * np.pi / lam
    G = indicator_toeplitz(intervals, harmonics) if len(intervals) else np.zeros((0, size, size))
    kz_amb = _uniform_kz(np.ones_like(eps), kx)
    kz_sub = _uniform_kz(eps, kx)
    R = np.zeros((wl.size, len(pols), size))
    T = np.zeros((wl.size, len(pols), size))
    eye = np.eye(size)
    cache = {}
    for j, pol in enumerate(pols):
        y_amb = kz_amb                                                   # TE and TM alike: ε_ambient = 1
        y_sub = kz_sub if pol == 0 else kz_sub / eps[:, None]
        f = np.broadcast_to(eye, (wl.size, size, size)).astype(complex)
        g = eye * y_sub[:, None, :]
        steps = []
        for i in reversed(range(len(intervals))):
            x0, x1 = intervals[i]
            if x1 - x0 >= 1.0 or x1 <= x0:                               # uniform slice: plane waves
                e_sl = eps if x1 > x0 else np.ones_like(eps)
                kz = _uniform_kz(e_sl, kx)
                y = kz if pol == 0 else kz / e_sl[:, None]
                a = 0.5 * (f + g / y[:, :, None])
                b = 0.5 * (f - g / y[:, :, None])
                W = V = None
            else:
                W, kz, Winv, V, left = _slice_modes(pol, eps, G[i], kx, cache)
                if steps:
                    wf, vg = Winv @ f, (left @ g) / kz[:, :, None]
                else:                                                    # on the substrate: f = I, g = diag(Y)
                    wf, vg = Winv, left * (y_sub[:, None, :] / kz[:, :, None])
                a, b = 0.5 * (wf + vg), 0.5 * (wf - vg)
            X = np.exp(1j * kz * (k0 * float(thickness_nm[i]))[:, None])  # (W, M), |X| <= 1
            ainv = np.linalg.inv(a)
            xbax = X[:, :, None] * (b @ ainv) * X[:, None, :]             # X b a⁻¹ X
            if W is None:
                f = eye + xbax
                g = y[:, :, None] * (eye - xbax)
            else:
                f = W + W @ xbax
                g = V - V @ xbax
            steps.append((ainv, X))
        # ambient: [δ + r; Y δ − Y r] = [f; g] c  →  (g + Y f) c = 2 Y δ
        rhs = np.zeros((wl.size, size), dtype=complex)
        rhs[:, harmonics] = 2.0 * y_amb[:, harmonics]
        c = np.linalg.solve(g + y_amb[:, :, None] * f, rhs[:, :, None])[:, :, 0]
        r = np.einsum("wij,wj->wi", f, c)
        r[:, harmonics] -= 1.0
        for ainv, X in reversed(steps):                                   # down to the substrate
            c = np.einsum("wij,wj->wi", ainv, X * c)
        inc = y_amb[:, harmonics].real
        R[:, j] = np.abs(r) ** 2 * y_amb.real / inc[:, None]
        T[:, j] = np.abs(c) ** 2 * y_sub.real / inc[:, None]
    return R, T
