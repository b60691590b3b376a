"""Speed of the optics core, each figure beside a reference computed in the same run.

Run:  python benchmarks/bench_core.py

1. A colour map's optics: one layer swept over 400 thicknesses x 91 angles x 81
   wavelengths, unpolarized, thermal oxide on (absorbing) silicon. Reference:
   colour-science's ``thin_film_tmm`` on the same grid and the same indices.
   Goal: at least 20x faster.
2. The same sweep of a middle layer of a 6-layer stack. Goal: within 1.5x of (1).
3. 10^5 reflectance spectra (81 wavelengths) to display sRGB. Reference:
   colour-science's ``msds_to_XYZ`` (integration) + ``XYZ_to_sRGB``.
4. A colour map seen through a viewing cone (NA 0.5 and 0.9; 400 thicknesses x 91 angles of
   thermal oxide on silicon, 0-1000 nm and 0-5000 nm). Reference: the same map on the fixed cone
   rule it replaced (8 Gauss-Legendre nodes in α x 12 in φ, linear interpolation on a 0.5° grid).
   Goal: the converged cone within 2x of the fixed rule's time.
"""

from __future__ import annotations

import os
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
warnings.simplefilter("ignore")

import colour  # noqa: E402
from colour.phenomena import thin_film_tmm  # noqa: E402

from physics import Layer, Stack, spectra_to_srgb, sweep  # noqa: E402
import physics.appearance as appearance  # noqa: E402

REPEATS = 3


def best_of(fn, repeats=REPEATS):
    fn()  # warm caches (material tables, colour weights)
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def _fixed_cone_matrix(view_deg, na, n0):
    """The fixed cone rule the adaptive one replaced: 8 x 12 Gauss-Legendre rays, linear on a 0.5° grid."""
    amax = np.arcsin(na / n0)
    xa, wa = np.polynomial.legendre.leggauss(8)
    alpha = 0.5 * amax * (xa + 1)
    w_alpha = 0.5 * amax * wa * np.sin(alpha) * np.cos(alpha)
    xp, wp = np.polynomial.legendre.leggauss(12)
    phi = 0.5 * np.pi * (xp + 1)
    a, p = np.meshgrid(alpha, phi, indexing="ij")
    w = (w_alpha[:, None] * (0.5 * np.pi * wp)[None, :]).ravel()
    tv = np.radians(view_deg)[:, None]
    cos_t = np.cos(tv) * np.cos(a.ravel()) + np.sin(tv) * np.sin(a.ravel()) * np.cos(p.ravel())
    theta = np.degrees(np.arccos(np.clip(cos_t, -1.0, 1.0)))
    weights = np.where(theta < 89.9, w[None, :], 0.0)
    weights /= weights.sum(axis=1, keepdims=True)
    angles = np.minimum(theta, 89.9)
    lo, hi = float(angles[weights > 0].min()), float(angles[weights > 0].max())
    grid = np.linspace(lo, hi, max(2, int(np.ceil((hi - lo) / 0.5)) + 1))
    pos = np.interp(angles, grid, np.arange(grid.size))
    i0 = np.clip(np.floor(pos).astype(int), 0, grid.size - 2)
    f = pos - i0
    M = np.zeros((view_deg.size, grid.size))
    rows = np.repeat(np.arange(view_deg.size), angles.shape[1])
    np.add.at(M, (rows, i0.ravel()), (weights * (1 - f)).ravel())
    np.add.at(M, (rows, i0.ravel() + 1), (weights * f).ravel())
    return grid, M


def _fixed_map_reflectance(stack, layer, d, ang, wl, polarization, na, cone=None, lab=None):
    grid, M = _fixed_cone_matrix(ang, na, float(stack.ambient.nk(wl).real.min()))
    return np.einsum("ag,tgw->taw", M, sweep(stack, layer, d, grid, wl, polarization))


def cone_map_times():
    """[(case, seconds on the fixed rule, seconds converged)] for colour maps through a viewing cone."""
    ang = np.linspace(0.0, 89.9, 91)
    out = []
    for top, na in ((1000.0, 0.5), (1000.0, 0.9), (5000.0, 0.5)):
        d = np.linspace(0.0, top, 400)
        oxide = Stack([Layer("SiO2", 100.0)], substrate="Si")
        new = appearance._map_reflectance, appearance._map_cone
        appearance._map_reflectance, appearance._map_cone = _fixed_map_reflectance, lambda *a: None
        try:
            t_fixed = best_of(lambda: appearance.color_map(oxide, 0, d, ang, na=na))
        finally:
            appearance._map_reflectance, appearance._map_cone = new
        t_new = best_of(lambda: appearance.color_map(oxide, 0, d, ang, na=na))
        out.append((f"oxide 0-{top:g} nm, NA {na:g}", t_fixed, t_new))
    return out


def main():
    d = np.linspace(0.0, 1000.0, 400)
    d_irregular = np.sort(np.random.default_rng(1).uniform(0, 1000, 400))
    ang = np.linspace(0.0, 89.0, 91)
    wl = np.linspace(380.0, 780.0, 81)
    one = Stack([Layer("SiO2", 100.0)], substrate="Si")
    six = Stack([Layer("SiO2", 80.0), Layer("Si3N4", 60.0), Layer("SiO2", 100.0), Layer("Si3N4", 40.0),
                 Layer("TiO2", 30.0), Layer("SiO2", 200.0)], substrate="Si")
    n_cs = np.array([one.ambient.nk(wl), one.layers[0].material.nk(wl), one.substrate.nk(wl)])

    t_ours = best_of(lambda: sweep(one, 0, d, ang, wl))
    t_ours_irr = best_of(lambda: sweep(one, 0, d_irregular, ang, wl))
    t_cs = best_of(lambda: thin_film_tmm(n_cs, d, wl, ang), repeats=1)
    t_six = best_of(lambda: sweep(six, 2, d, ang, wl))
    R_cs = thin_film_tmm(n_cs, d, wl, ang)[0].mean(-1).transpose(2, 1, 0)
    R_ours = sweep(one, 0, d, ang, wl)
    diff_normal = np.abs(R_cs[:, 0, :] - R_ours[:, 0, :]).max()

    spectra = np.random.default_rng(2).uniform(0, 1, (100_000, wl.size))
    t_rgb = best_of(lambda: spectra_to_srgb(spectra, wl))
    cmfs = colour.MSDS_CMFS["CIE 1931 2 Degree Standard Observer"]
    ill = colour.SDS_ILLUMINANTS["D65"]
    shape = colour.SpectralShape(380, 780, 5)

    def reference_rgb():
        xyz = colour.msds_to_XYZ(spectra, cmfs, ill, method="Integration", shape=shape) / 100
        return colour.XYZ_to_sRGB(xyz)

    t_rgb_ref = best_of(reference_rgb, repeats=1)
    points = d.size * ang.size * wl.size
    print(f"grid: {d.size} thickness x {ang.size} angle x {wl.size} wavelength = {points:,} points, unpolarized")
    print(f"{'case':58s} {'seconds':>9s} {'ratio':>8s}")
    print(f"{'colour-science thin_film_tmm, SiO2 on Si (reference)':58s} {t_cs:9.3f} {'1.0':>8s}")
    print(f"{'fringegauge sweep, SiO2 on Si, uniform thickness grid':58s} {t_ours:9.3f} {t_cs / t_ours:7.1f}x")
    print(f"{'fringegauge sweep, SiO2 on Si, irregular thickness grid':58s} {t_ours_irr:9.3f} {t_cs / t_ours_irr:7.1f}x")
    print(f"{'fringegauge sweep, middle of a 6-layer stack':58s} {t_six:9.3f} "
          f"{t_six / t_ours:6.2f}x of 1 layer")
    print(f"max |R difference| at normal incidence vs colour-science: {diff_normal:.1e}")
    print(f"{'colour-science msds_to_XYZ + XYZ_to_sRGB, 1e5 spectra (reference)':58s} {t_rgb_ref:9.3f} {'1.0':>8s}")
    print(f"{'fringegauge spectra_to_srgb, 1e5 spectra':58s} {t_rgb:9.3f} {t_rgb_ref / t_rgb:7.1f}x")
    cone = cone_map_times()
    for case, t_fixed, t_new in cone:
        print(f"{'colour map, fixed 8x12 cone rule (reference), ' + case:58s} {t_fixed:9.3f} {'1.0':>8s}")
        print(f"{'colour map, converged cone, ' + case:58s} {t_new:9.3f} {t_new / t_fixed:6.2f}x of fixed")
    ok = t_cs / t_ours >= 20 and t_six / t_ours <= 1.5 and all(t / f <= 2.0 for _, f, t in cone)
    print("goals (>= 20x colour-science; 6-layer within 1.5x; converged cone map within 2x of the fixed rule):",
          "met" if ok else "NOT met")


if __name__ == "__main__":
    main()
