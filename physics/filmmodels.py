"""Dispersion models for deposited films: Tauc-Lorentz, and effective media of two materials.

Both are :class:`~physics.materials.Material` subclasses: usable as a stack layer, written by
``spec()`` and read back by :func:`physics.material` (kinds ``"tauc-lorentz"``, ``"effective-medium"``).

Conventions: ε = ε1 + iε2 = N², N = n + ik with k >= 0 (as in :mod:`physics.materials`); N is the
principal square root of ε, which has Re N >= 0 and Im N >= 0 whenever ε2 >= 0. Photon energy
E = hc/λ in eV with hc = :data:`~physics.materials.HC_EV_NM`.

Tauc-Lorentz (Jellison & Modine 1996, eqs. 4 and 5, with the erratum): the product of the Tauc joint
density of states above the gap and a Lorentz oscillator,

    ε2(E) = A E0 C (E − Eg)² / [((E² − E0²)² + C² E²) E]   for E > Eg,   0 for E <= Eg,

and ε1 its Kramers-Kronig transform in closed form (see :func:`tauc_lorentz_epsilon`). ε2 >= 0 by
construction, so k >= 0.

Effective media (Aspnes 1982): inclusions b (volume fraction f) in a host a.

- Bruggeman: f_a (ε_a − ε)/(ε_a + 2ε) + f_b (ε_b − ε)/(ε_b + 2ε) = 0, i.e. the quadratic
  2ε² − bε − ε_a ε_b = 0 with b = (3f_a − 1)ε_a + (3f_b − 1)ε_b. Of its two roots this module takes
  the one with the larger imaginary part (Im ε >= 0) and, when both are real, the positive one. At
  f = 0 the roots are ε_a and −ε_b/2 (at f = 1, ε_b and −ε_a/2), so this is the root that runs
  continuously from ε_a to ε_b.
- Maxwell Garnett: (ε − ε_a)/(ε + 2ε_a) = f_b (ε_b − ε_a)/(ε_b + 2ε_a).

References
----------
G. E. Jellison Jr. and F. A. Modine, "Parameterization of the optical functions of amorphous
materials in the interband region", Appl. Phys. Lett. 69, 371 (1996); erratum 69, 2137 (1996).
D. A. G. Bruggeman, Ann. Phys. (Leipzig) 416, 636 (1935). J. C. Maxwell Garnett, Philos. Trans. R.
Soc. London A 203, 385 (1904). D. E. Aspnes, "Optical properties of thin films", Thin Solid Films 89,
249 (1982).
"""

from __future__ import annotations

import numpy as np

from .errors import InputError, require_finite
from .materials import HC_EV_NM, Material, _check_range, material

__all__ = ["TaucLorentzMaterial", "EffectiveMedium", "tauc_lorentz_epsilon", "effective_epsilon",
           "material_from_dict", "EMA_RULES", "EPS_INF_MIN"]

#: Rules of mixing understood by :class:`EffectiveMedium`.
EMA_RULES = ("bruggeman", "maxwell-garnett")
#: Smallest ε∞ accepted: ε1 tends to ε∞ far above every transition modelled, and a real medium's
#: ε1 there is at least that of vacuum (1). A fit that wants less is hiding absorption outside the model.
EPS_INF_MIN = 1.0
#: Default range of a Tauc-Lorentz film (nm): the model holds across the UV-visible-near-IR where
#: interband absorption dominates; below the gap it has no free-carrier or phonon terms.
TL_RANGE_NM = (190.0, 2500.0)


def tauc_lorentz_epsilon(energy_ev, eps_inf, gap_ev, amplitude_ev, center_ev, broadening_ev) -> np.ndarray:
    """Complex dielectric function ε1 + iε2 of the Tauc-Lorentz model at photon energies (eV).

    Parameters
    ----------
    energy_ev : array_like  photon energies E > 0, eV
    eps_inf : float  ε1 at infinite energy
    gap_ev : float  Tauc gap Eg, eV (>= 0)
    amplitude_ev : float  oscillator amplitude A, eV (> 0)
    center_ev : float  Lorentz peak energy E0, eV (> 0)
    broadening_ev : float  broadening C, eV (0 < C < 2·E0)

    Returns
    -------
    numpy.ndarray of complex, shape of ``energy_ev``.

    References
    ----------
    Jellison & Modine, Appl. Phys. Lett. 69, 371 (1996), eq. 4 (ε2) and eq. 5 (ε1, as corrected in
    the erratum, Appl. Phys. Lett. 69, 2137 (1996)).
    """
    E = np.asarray(energy_ev, dtype=float)
    Eg, A, E0, C = float(gap_ev), float(amplitude_ev), float(center_ev), float(broadening_ev)
    E2, Eg2, E02, C2 = E * E, Eg * Eg, E0 * E0, C * C
    with np.errstate(divide="ignore", invalid="ignore"):
        eps2 = np.where(E > Eg, A * E0 * C * (E - Eg) ** 2 / (((E2 - E02) ** 2 + C2 * E2) * E), 0.0)
    alpha = np.sqrt(4.0 * E02 - C2)
    gamma2 = E02 - C2 / 2.0
    zeta4 = (E2 - gamma2) ** 2 + alpha * alpha * C2 / 4.0
    a_ln = (Eg2 - E02) * E2 + Eg2 * C2 - E02 * (E02 + 3.0 * Eg2)
    a_atan = (E2 - E02) * (E02 + Eg2) + Eg2 * C2
    pi = np.pi
    t1 = (A * C * a_ln / (2.0 * pi * zeta4 * alpha * E0)
          * np.log((E02 + Eg2 + alpha * Eg) / (E02 + Eg2 - alpha * Eg)))
    t2 = -(A * a_atan / (pi * zeta4 * E0)
           * (pi - np.arctan((2.0 * Eg + alpha) / C) + np.arctan((alpha - 2.0 * Eg) / C)))
    t3 = (2.0 * A * E0 * Eg / (pi * zeta4 * alpha) * (E2 - gamma2)
          * (pi + 2.0 * np.arctan(2.0 * (gamma2 - Eg2) / (alpha * C))))
    # The two logarithms of |E − Eg| in eq. 5 combine to −(E − Eg)²/E · ln|E − Eg|, which tends to 0 at E = Eg.
    d = np.abs(E - Eg)
    with np.errstate(divide="ignore", invalid="ignore"):
        d2lnd = np.where(d > 0, d * d * np.log(np.where(d > 0, d, 1.0)), 0.0)
    t4 = (A * E0 * C / (pi * zeta4)) * (-d2lnd / E + (E2 + Eg2) / E * np.log(E + Eg)
                                         + 2.0 * Eg * np.log(E + Eg)
                                         - Eg * np.log((E02 - Eg2) ** 2 + Eg2 * C2))
    return eps_inf + t1 + t2 + t3 + t4 + 1j * eps2


class TaucLorentzMaterial(Material):
    """An amorphous film described by the Tauc-Lorentz model (see :func:`tauc_lorentz_epsilon`).

    Parameters
    ----------
    eps_inf : float  ε1 at infinite energy (>= :data:`EPS_INF_MIN`)
    gap_ev : float  Tauc gap Eg, eV (>= 0); the film is transparent (k = 0) below it
    amplitude_ev : float  A, eV (> 0)
    center_ev : float  E0, eV (> 0)
    broadening_ev : float  C, eV (> 0 and < 2·E0, where the closed form of ε1 is defined)
    range_nm : (lo, hi)  wavelengths where the film is described (default :data:`TL_RANGE_NM`)

    References
    ----------
    Jellison & Modine, Appl. Phys. Lett. 69, 371 (1996); erratum 69, 2137 (1996).
    """

    def __init__(self, eps_inf, gap_ev, amplitude_ev, center_ev, broadening_ev, *, range_nm=TL_RANGE_NM,
                 name: str = "Tauc-Lorentz", source: str = "Tauc-Lorentz parameters given by the user"):
        self.eps_inf = float(require_finite("eps_inf", eps_inf, minimum=EPS_INF_MIN))
        self.gap_ev = float(require_finite("gap_ev", gap_ev, minimum=0.0, unit="eV"))
        self.amplitude_ev = float(require_finite("amplitude_ev", amplitude_ev, minimum=0.0, min_inclusive=False,
                                                 unit="eV"))
        self.center_ev = float(require_finite("center_ev", center_ev, minimum=0.0, min_inclusive=False, unit="eV"))
        self.broadening_ev = float(require_finite("broadening_ev", broadening_ev, minimum=0.0, min_inclusive=False,
                                                  unit="eV"))
        if self.broadening_ev >= 2.0 * self.center_ev:
            raise InputError(f"broadening_ev = {self.broadening_ev:g} eV is not below 2·center_ev = "
                             f"{2 * self.center_ev:g} eV, where the Tauc-Lorentz ε1 is not defined; give a "
                             "narrower broadening or a higher center energy.")
        self.range_nm = _check_range(range_nm)
        self.name, self.source = name, source

    @property
    def parameters(self) -> tuple[float, float, float, float, float]:
        """(eps_inf, gap_ev, amplitude_ev, center_ev, broadening_ev)."""
        return self.eps_inf, self.gap_ev, self.amplitude_ev, self.center_ev, self.broadening_ev

    def epsilon(self, wavelength_nm) -> np.ndarray:
        """ε1 + iε2 at vacuum wavelengths (nm)."""
        return tauc_lorentz_epsilon(HC_EV_NM / np.asarray(wavelength_nm, dtype=float), *self.parameters)

    def _nk(self, wl):
        return np.sqrt(self.epsilon(wl) + 0j)

    def spec(self):
        return {"kind": "tauc-lorentz", "eps_inf": self.eps_inf, "gap_ev": self.gap_ev,
                "amplitude_ev": self.amplitude_ev, "center_ev": self.center_ev,
                "broadening_ev": self.broadening_ev, "range_nm": list(self.range_nm), "name": self.name,
                "source": self.source}


def effective_epsilon(eps_a, eps_b, fraction_b, rule: str = "bruggeman") -> np.ndarray:
    """ε of a mixture of ε_b (volume fraction ``fraction_b``) in ε_a by the given rule (see the module notes).

    Parameters
    ----------
    eps_a, eps_b : array_like complex  dielectric functions of host and inclusions (broadcast together)
    fraction_b : float  volume fraction of b, 0 to 1
    rule : {"bruggeman", "maxwell-garnett"}

    References
    ----------
    Aspnes, Thin Solid Films 89, 249 (1982) (both rules in this form).
    """
    ea, eb = np.asarray(eps_a, dtype=complex), np.asarray(eps_b, dtype=complex)
    f = float(fraction_b)
    if rule == "maxwell-garnett":
        return ea * (eb + 2 * ea + 2 * f * (eb - ea)) / (eb + 2 * ea - f * (eb - ea))
    b = (3 * (1 - f) - 1) * ea + (3 * f - 1) * eb
    s = np.sqrt(b * b + 8 * ea * eb)
    r1, r2 = (b + s) / 4, (b - s) / 4
    tie = np.isclose(r1.imag, r2.imag, rtol=0.0, atol=1e-12 * (np.abs(r1) + np.abs(r2)))
    take1 = np.where(tie, r1.real >= r2.real, r1.imag > r2.imag)
    return np.where(take1, r1, r2)


class EffectiveMedium(Material):
    """A mixture of two materials: ``material_b`` (volume fraction ``fraction_b``) in ``material_a``.

    Parameters
    ----------
    material_a, material_b : anything :func:`physics.material` accepts (host, inclusions)
    fraction_b : float  volume fraction of b, 0 to 1 (e.g. 0.5 void for a rough surface)
    rule : {"bruggeman", "maxwell-garnett"}  see :func:`effective_epsilon`

    The range is where both materials have data.

    References
    ----------
    Aspnes, Thin Solid Films 89, 249 (1982); Bruggeman (1935); Maxwell Garnett (1904).
    """

    def __init__(self, material_a, material_b, fraction_b, rule: str = "bruggeman", *, name: str | None = None):
        self.material_a, self.material_b = material(material_a), material(material_b)
        self.fraction_b = float(require_finite("fraction_b", fraction_b, minimum=0.0, maximum=1.0))
        if rule not in EMA_RULES:
            raise InputError(f"rule must be one of {', '.join(EMA_RULES)}; got {rule!r}.")
        self.rule = rule
        ranges = [m.range_nm for m in (self.material_a, self.material_b) if m.range_nm is not None]
        lo = max((r[0] for r in ranges), default=None)
        hi = min((r[1] for r in ranges), default=None)
        if ranges and lo >= hi:
            raise InputError(f"{self.material_a.name} and {self.material_b.name} have no wavelengths in common; "
                             "mix materials whose data overlap.")
        self.range_nm = (lo, hi) if ranges else None
        self.name = name or (f"{self.material_a.name} + {100 * self.fraction_b:g} % {self.material_b.name} "
                             f"({rule})")
        self.source = f"{rule} mixture (Aspnes 1982) of {self.material_a.source} and {self.material_b.source}"

    def _nk(self, wl):
        ea, eb = self.material_a.nk(wl) ** 2, self.material_b.nk(wl) ** 2
        e = effective_epsilon(ea, eb, self.fraction_b, self.rule)
        # an exactly real root comes out with Im ε of a few ulp either side of 0: held at 0 (k >= 0)
        return np.sqrt(e.real + 1j * np.maximum(e.imag, 0.0))

    def spec(self):
        return {"kind": "effective-medium", "a": self.material_a.spec(), "b": self.material_b.spec(),
                "fraction_b": self.fraction_b, "rule": self.rule, "name": self.name}


def material_from_dict(d: dict) -> Material:
    """A film model from its ``spec()`` description (kinds ``tauc-lorentz``, ``effective-medium``)."""
    kind = d.get("kind")
    if kind == "tauc-lorentz":
        return TaucLorentzMaterial(d["eps_inf"], d["gap_ev"], d["amplitude_ev"], d["center_ev"], d["broadening_ev"],
                                   range_nm=tuple(d.get("range_nm", TL_RANGE_NM)),
                                   name=d.get("name", "Tauc-Lorentz"), source=d.get("source", "user Tauc-Lorentz fit"))
    if kind == "effective-medium":
        return EffectiveMedium(d["a"], d["b"], d["fraction_b"], d.get("rule", "bruggeman"), name=d.get("name"))
    raise InputError(f"Unknown film model kind {kind!r}; use tauc-lorentz or effective-medium.")
