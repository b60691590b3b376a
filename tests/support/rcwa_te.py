"""A small, plain rigorous coupled-wave solver for TE light on lamellar gratings (test oracle).

Written from the published formulation, independently of the solver the package uses:
M. G. Moharam and T. K. Gaylord, J. Opt. Soc. Am. 71, 811-818 (1981) (coupled-wave equations of
a planar grating, TE); M. G. Moharam, E. B. Grann, D. A. Pommet and T. K. Gaylord, J. Opt. Soc.
Am. A 12, 1068-1076 (1995), sec. 3 and 5 (the enhanced transmittance matrix for stacked slices).
The papers' time dependence exp(+jωt) is kept (so an evanescent order has Im k_z < 0); dielectric
(real-index) ridges and substrate only; the ambient (n = 1) above; fields E_y = Σ S_m(z)
exp(−j k_x,m x); orders numbered so that m·λ = d·(sin α + sin β) with the zero order at β = −α.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla


def _toeplitz_eps(eps_ridge, eps_groove, x0, x1, harmonics):
    """Toeplitz matrix [[ε]]_{mp} = ε_{m−p} of one slice: ε_ridge on (x0, x1) of the period (fractions)."""
    h = np.arange(-2 * harmonics, 2 * harmonics + 1)
    coef = np.empty(h.size, dtype=complex)
    nz = h != 0
    # ε_h = ∫ ε(x) e^{−i2πhx} dx over one period (closed form for a rectangle)
    coef[nz] = (eps_ridge - eps_groove) * (np.exp(-2j * np.pi * h[nz] * x0) - np.exp(-2j * np.pi * h[nz] * x1)) \
        / (2j * np.pi * h[nz])
    coef[~nz] = eps_groove + (eps_ridge - eps_groove) * (x1 - x0)
    idx = np.arange(-harmonics, harmonics + 1)
    return coef[(idx[:, None] - idx[None, :]) + 2 * harmonics]


def te_efficiencies(wavelength_nm, period_nm, incidence_deg, slices, n_ridge, n_substrate, harmonics):
    """Reflected and transmitted efficiencies of orders −N … N for TE light.

    slices : list of (thickness_nm, x0, x1), top first; the ridge material fills (x0, x1) of the period.

    Returns
    -------
    (R, T) : arrays (2N + 1,), index N + m for order m.
    """
    k0 = 2 * np.pi / wavelength_nm
    m = np.arange(-harmonics, harmonics + 1)
    kx = -np.sin(np.radians(incidence_deg)) + m * wavelength_nm / period_nm       # k_x,m / k0
    Kx2 = np.diag(kx ** 2)

    def kz(n):                                   # k_z / k0: real, or −j|κ| (decaying under exp(+jωt))
        return np.conj(np.sqrt(float(n) ** 2 - kx ** 2 + 0j))

    kz_top, kz_bot = kz(1.0), kz(n_substrate)
    size = m.size
    eye = np.eye(size)
    f = eye.astype(complex)                       # bottom boundary: [f; g] = [I; i Y_sub]
    g = 1j * np.diag(kz_bot)
    a_x = []
    for thickness, x0, x1 in reversed(slices):
        E = _toeplitz_eps(complex(n_ridge) ** 2, 1.0, x0, x1, harmonics)
        w2, W = sla.eig(Kx2 - E)                   # d²S/d(k0 z)² = (Kx² − E) S
        q = np.sqrt(w2 + 0j)
        q = np.where(q.real < 0, -q, q)           # decaying away from each slice face
        V = W * q
        X = np.exp(-k0 * q * thickness)
        ab = sla.solve(np.block([[W, W], [V, -V]]), np.vstack([f, g]))
        a, b = ab[:size], ab[size:]
        bai = X[:, None] * sla.solve(a.T, b.T).T * X[None, :]      # X b a⁻¹ X
        f = W @ (eye + bai)
        g = V @ (eye - bai)
        a_x.append((a, X))
    inc = np.zeros(size, dtype=complex)
    inc[harmonics] = 1.0
    # [δ; i cos α δ] + [I; −i Y_top] R = [f; g] T1  (ambient side, E_y and its z-derivative)
    t1 = sla.solve(g + 1j * np.diag(kz_top) @ f, 1j * kz_top * inc + 1j * kz_top[harmonics] * inc)
    r = f @ t1 - inc
    t = t1
    for a, X in reversed(a_x):
        t = sla.solve(a, X * t)
    cos_in = kz_top[harmonics].real
    R = np.abs(r) ** 2 * (kz_top / cos_in).real
    T = np.abs(t) ** 2 * (kz_bot / cos_in).real
    return R, T
