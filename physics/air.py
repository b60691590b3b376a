"""Refractive index of standard dry air, and the curated "air" that uses it beyond its database page.

Standard air (Ciddor 1996): dry air at 15 °C, 101 325 Pa, 0 % humidity, 450 ppm CO2. The
refractiveindex.info page ``other/air/Ciddor`` tabulates exactly this air (its COMMENTS say "Standard
air: dry air at 15 °C, 101.325 kPa and with 450 ppm CO2 content", its CONDITIONS temperature 288.15 K
and pressure 101325 Pa), as formula 6 with the coefficients 0.05792105, 238.0185, 0.00167917, 57.362,
but only from 230 to 1690 nm. Beyond the page the same published formula is evaluated here:

    10⁸ (n_as − 1) = k1/(k0 − σ²) + k3/(k2 − σ²),   σ = 1/λ in µm⁻¹           (Ciddor 1996, eq. 1)
    (n_axs − 1) = (n_as − 1) [1 + 0.534×10⁻⁶ (x_c − 450)],  x_c in ppm CO2       (Ciddor 1996, eq. 2)

with k0 = 238.0185, k1 = 5 792 105, k2 = 57.362, k3 = 167 917 (µm⁻²). The paper then scales
n_axs − 1 by the density of the air asked relative to the density of standard air (dry part and water
vapour part, each through the BIPM compressibility). At the standard conditions themselves that ratio
is 1 by definition and the water term is 0 (dry air), so the index is the standard-air formula with the
CO2 term; this module implements that reduced form only, for that one air (no temperature, pressure or
humidity argument; the compressibility part is not needed and not implemented). Equation numbers are
recalled from memory.

Validity: the paper fits data from about 300 to 1690 nm (recalled from memory); the database page uses
the formula from 230 nm. Between 1690 and 2500 nm, and from 200 to 230 nm, the formula is extrapolated,
as is common practice for air. The paper does not bound the error there; the formula's own dispersion
beyond 1690 nm is tiny (n − 1 changes by 2.9e-7 from 1690 to 2500 nm), far below what a reflectance or a
colour can show. Below 200 nm oxygen begins to absorb (recalled from memory) and the formula's pole
(σ² = k2, at 132 nm) nears, so nothing below 200 nm is given.

References
----------
P. E. Ciddor, "Refractive index of air: new equations for the visible and near infrared",
Appl. Opt. 35, 1566-1573 (1996), doi:10.1364/AO.35.001566.
M. N. Polyanskiy, refractiveindex.info database, page other/air/Ciddor (Sci. Data 11, 94 (2024)).
"""

from __future__ import annotations

import numpy as np

from .errors import require_finite
from .materials import DatabaseMaterial

__all__ = ["standard_air_index", "StandardAirMaterial", "CIDDOR_PAGE", "AIR_RANGE_NM",
           "FORMULA_FIT_RANGE_NM", "STANDARD_CO2_PPM"]

#: The database page of standard air (Ciddor 1996), used wherever it has data.
CIDDOR_PAGE = "other/air/Ciddor"
#: Ciddor 1996, eq. 1: standard-air dispersion constants, µm⁻² (k1, k3 carry the 10⁻⁸ of the equation).
K0, K1, K2, K3 = 238.0185, 5792105.0, 57.362, 167917.0
#: CO2 content of Ciddor's standard air, ppm (eq. 2 is referred to it).
STANDARD_CO2_PPM = 450.0
#: Ciddor 1996, eq. 2: relative change of n − 1 per ppm of CO2 away from 450 ppm.
CO2_COEFFICIENT_PER_PPM = 0.534e-6
#: Band of the data the paper's formula was fitted to, nm (recalled from memory).
FORMULA_FIT_RANGE_NM = (300.0, 1690.0)
#: Band the curated air covers, nm: the page where it has data, the formula beyond (extrapolated,
#: common practice; see the module docstring for why it stops at 200 nm).
AIR_RANGE_NM = (200.0, 2500.0)


def standard_air_index(wavelength_nm, co2_ppm: float = STANDARD_CO2_PPM) -> np.ndarray:
    """Refractive index n of dry air at 15 °C and 101 325 Pa with ``co2_ppm`` CO2 (real, no k).

    Parameters
    ----------
    wavelength_nm : array_like
        Vacuum wavelength(s) in nm, any shape, above the formula's pole at 132 nm (the curated air
        is limited to :data:`AIR_RANGE_NM`).
    co2_ppm : float
        CO2 content in ppm (450 is Ciddor's standard air).

    Returns
    -------
    numpy.ndarray of float, same shape as ``wavelength_nm``.

    References
    ----------
    P. E. Ciddor, Appl. Opt. 35, 1566 (1996), eqs. 1-2 (equation numbers recalled from memory).
    """
    wl = require_finite("wavelength_nm", wavelength_nm, minimum=1e3 / np.sqrt(K2), min_inclusive=False,
                        unit="nm")
    xc = float(require_finite("co2_ppm", co2_ppm, minimum=0.0, unit="ppm"))
    sigma2 = (1e3 / wl) ** 2                                             # σ² in µm⁻²
    n_as = 1e-8 * (K1 / (K0 - sigma2) + K3 / (K2 - sigma2))            # eq. 1: n_as − 1
    return 1.0 + n_as * (1.0 + CO2_COEFFICIENT_PER_PPM * (xc - STANDARD_CO2_PPM))   # eq. 2


class StandardAirMaterial(DatabaseMaterial):
    """Standard air: the database page ``other/air/Ciddor`` where it has data, the same formula
    (:func:`standard_air_index`) beyond it, over :data:`AIR_RANGE_NM`.

    References
    ----------
    P. E. Ciddor, Appl. Opt. 35, 1566 (1996); refractiveindex.info other/air/Ciddor.
    """

    def __init__(self, name: str | None = None, range_nm=AIR_RANGE_NM):
        super().__init__(CIDDOR_PAGE, name=name)
        self.page_range_nm = self.range_nm
        lo, hi = self.page_range_nm
        self.range_nm = (min(float(range_nm[0]), lo), max(float(range_nm[1]), hi))
        #: What the source line adds to the page's reference.
        self.beyond_page = f"; Ciddor (1996) formula beyond the page's range ({lo:g}-{hi:g} nm)"
        self.source += self.beyond_page

    def _nk(self, wl):
        lo, hi = self.page_range_nm
        on_page = (wl >= lo) & (wl <= hi)
        if on_page.all():
            return super()._nk(wl)
        out = standard_air_index(wl) + 0j
        if on_page.any():
            out[on_page] = super()._nk(wl[on_page])
        return out
