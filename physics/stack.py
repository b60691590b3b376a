"""Reflectance and transmittance of a layer stack by the transfer-matrix method.

Conventions (stated once, tested in tests/test_stack.py):

- Index N = n + ik, k >= 0 absorbing (see :mod:`physics.materials`).
- Light comes from the ambient (medium 0, transparent) at ``angle_deg`` from the
  normal, crosses layers 0, 1, ... (top to bottom), and exits into the substrate.
- In each medium the normal wavevector component is kz = N cos θ = sqrt(N² − (N₀ sin θ₀)²)
  on the branch of the forward wave: Im(kz) > 0, or Re(kz) > 0 where kz is real
  (Byrnes 2016, sec. 4).
- Fresnel amplitudes (s: E perpendicular to the plane of incidence; p: in it):
  r_s = (kz_i − kz_j)/(kz_i + kz_j),  t_s = 2 kz_i/(kz_i + kz_j),
  r_p = (N_j cos θ_i − N_i cos θ_j)/(N_j cos θ_i + N_i cos θ_j),
  t_p = 2 N_i cos θ_i/(N_j cos θ_i + N_i cos θ_j)            (Byrnes 2016, eqs. 3-4).
- Power: R = |r|²; T_s = |t|² Re(kz_out)/Re(kz_in); T_p = |t|² Re(N_out cos θ_out*)/Re(N_in cos θ_in*)
  (Byrnes 2016, eqs. 21-22); unpolarized light is the mean of s and p powers.
- Arrays: results are shaped ``shape(angle) + shape(wavelength)``; a sweep is
  ``(thickness, angle, wavelength)``.

Method: the stack is built as two-port scattering coefficients (r, t from above;
r', t' from below) composed interface by interface (Redheffer star product), which
never overflows in thick absorbing layers. A sweep of one layer's thickness keeps
the part above and the part below that layer fixed, so each (thickness, angle,
wavelength) point costs one complex exponential and a few multiplications,
whatever the number of layers (Airy summation of the swept layer between two
effective interfaces).

A thick substrate (``substrate_thickness_mm``) is treated incoherently: the
coherent stack on its front, single-pass absorption exp(−4π Im(kz) d/λ), and the
bare back face into the ambient are summed in intensity (Byrnes 2016, sec. 6;
Centurioni, Appl. Opt. 44, 7532 (2005)).

References
----------
S. J. Byrnes, "Multilayer optical calculations", arXiv:1603.02720 (2016).
M. Born and E. Wolf, Principles of Optics, 7th ed., sec. 1.6 (stratified media).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from .errors import InputError, WavelengthRangeError, require_finite
from .materials import Material, material

__all__ = ["Layer", "Stack", "sweep", "POLARIZATIONS", "MAX_ANGLE_DEG"]

POLARIZATIONS = ("s", "p", "unpolarized")
#: Largest viewing angle accepted: 90° itself is grazing incidence, where R = 1 and nothing is seen.
MAX_ANGLE_DEG = 90.0
#: Largest k of an ambient treated as transparent: water and glass pages carry k ~ 1e-8 in the
#: visible, which over a viewing path of centimetres is negligible for colour (it is dropped).
AMBIENT_K_MAX = 1e-6
#: Branch test tolerance for Im(kz) near zero (Byrnes 2016 uses 100 machine epsilons).
_BRANCH_EPS = 100 * np.finfo(float).eps
#: A wave's power flow below this fraction of its size is a rounding residue: it carries no power.
POWER_FLOW_EPS = 100 * np.finfo(float).eps
#: Elements per chunk of a sweep: keeps the working arrays in cache and memory bounded.
_SWEEP_CHUNK = 1 << 17
#: Thicknesses a uniform sweep carries its phase recurrence across before re-evaluating the exponential
#: (each step adds at most an ulp or two; 64 steps stay far below what a colour can show).
_RESYNC_ROWS = 64
#: Relative tolerance for treating a thickness grid as uniform (phase recurrence instead of exp).
_UNIFORM_RTOL = 1e-9


@dataclass(frozen=True)
class Layer:
    """A coherent layer: a material and a physical thickness in nm.

    Parameters
    ----------
    material : str, number or Material
        Anything :func:`physics.material` accepts.
    thickness_nm : float
        Physical thickness in nm, >= 0.
    """

    material: Material
    thickness_nm: float = 0.0

    def __post_init__(self):
        object.__setattr__(self, "material", material(self.material))
        t = float(require_finite("thickness_nm", self.thickness_nm, minimum=0.0, unit="nm"))
        object.__setattr__(self, "thickness_nm", t)


def _as_layer(x) -> Layer:
    if isinstance(x, Layer):
        return x
    if isinstance(x, (tuple, list)) and len(x) == 2:
        return Layer(x[0], x[1])
    raise InputError(f"A layer is Layer(material, thickness_nm) or a (material, thickness_nm) pair; got {x!r}.")


@dataclass(frozen=True)
class Stack:
    """Ambient / layers (top to bottom) / substrate, optionally a thick incoherent substrate.

    Parameters
    ----------
    layers : sequence of Layer
        Coherent thin layers from the ambient side down.
    substrate : str or Material
        The medium below the layers.
    ambient : str or Material
        The medium light comes from; it must be transparent (k = 0).
    substrate_thickness_mm : float or None
        None: the substrate is semi-infinite (e.g. a wafer seen from the front).
        A thickness: the substrate is a plate of that thickness, treated
        incoherently, with its back face bare in the ambient (glass plates, lenses).
    """

    layers: Sequence[Layer] = ()
    substrate: Material = "Si"
    ambient: Material = "air"
    substrate_thickness_mm: float | None = None
    _media: tuple = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        layers = tuple(_as_layer(x) for x in self.layers)
        object.__setattr__(self, "layers", layers)
        object.__setattr__(self, "substrate", material(self.substrate))
        object.__setattr__(self, "ambient", material(self.ambient))
        if self.substrate_thickness_mm is not None:
            d = float(require_finite("substrate_thickness_mm", self.substrate_thickness_mm,
                                     minimum=0.0, min_inclusive=False, unit="mm"))
            object.__setattr__(self, "substrate_thickness_mm", d)
        object.__setattr__(self, "_media", (self.ambient, *(l.material for l in layers), self.substrate))

    # ------------------------------------------------------------------ public API
    def reflectance(self, wavelength_nm, angle_deg=0.0, polarization="unpolarized"):
        """Reflectance R (fraction) seen from the ambient.

        Parameters
        ----------
        wavelength_nm : array_like
            Vacuum wavelengths in nm.
        angle_deg : array_like
            Angle(s) of incidence in the ambient, degrees from the normal, 0 <= angle < 90.
        polarization : {"s", "p", "unpolarized"}

        Returns
        -------
        numpy.ndarray, shape ``shape(angle_deg) + shape(wavelength_nm)``.
        """
        return self._power(wavelength_nm, angle_deg, polarization)[0]

    def transmittance(self, wavelength_nm, angle_deg=0.0, polarization="unpolarized"):
        """Transmittance T (fraction) into the substrate (or, with a thick substrate, out of its back face).

        Same parameters and shape as :meth:`reflectance`.
        """
        return self._power(wavelength_nm, angle_deg, polarization)[1]

    def absorptance(self, wavelength_nm, angle_deg=0.0, polarization="unpolarized"):
        """Absorptance A = 1 − R − T: power absorbed in the layers (and a thick substrate)."""
        R, T = self._power(wavelength_nm, angle_deg, polarization)
        return 1.0 - R - T

    def reflectance_transmittance(self, wavelength_nm, angle_deg=0.0, polarization="unpolarized"):
        """(R, T) in one computation; same parameters and shapes as :meth:`reflectance`."""
        return self._power(wavelength_nm, angle_deg, polarization)

    def reflection_amplitudes(self, wavelength_nm, angle_deg=0.0):
        """Complex reflection amplitudes (r_s, r_p) seen from the ambient, reference plane at the top face.

        The p amplitude follows the module's Fresnel convention (r_p = −r_s at normal incidence): each
        wave's p unit vector is ŝ × k̂ for its own direction k̂, ŝ being common to the incident and the
        reflected wave. Same parameters and shape as :meth:`reflectance`; |r_s|², |r_p|² are R_s, R_p.

        Raises
        ------
        InputError
            For a thick (incoherent) substrate, whose back-face light adds in power, not in amplitude.

        References
        ----------
        S. J. Byrnes, arXiv:1603.02720 (2016), eqs. 3-4 and sec. 4.
        """
        if self.substrate_thickness_mm is not None:
            raise InputError("Reflection amplitudes exist only for a coherent stack; this one has a thick substrate "
                             "whose back-face light adds in power. Use reflectance(), or a semi-infinite substrate.")
        wl, ang, out_shape = _grid(wavelength_nm, angle_deg)
        optics = _Optics(self, wl, ang)
        last = len(optics.N) - 1
        return tuple(optics.two_port(0, last, p)[0].reshape(out_shape) for p in ("s", "p"))

    def roles(self) -> list[str]:
        """Names of the media top to bottom, as people count layers: 'ambient', 'layer 1', ..., 'substrate'
        (layer 1 is ``layers[0]``, next to the ambient)."""
        return ["ambient", *(f"layer {i + 1}" for i in range(len(self.layers))), "substrate"]

    def wavelength_range_nm(self) -> tuple[float, float]:
        """The band (nm) where every medium of the stack has data: the intersection of their ranges."""
        lo, hi = 0.0, np.inf
        for m in self._media:
            if m.range_nm is not None:
                lo, hi = max(lo, m.range_nm[0]), min(hi, m.range_nm[1])
        return lo, hi

    def with_thickness(self, layer: int, thickness_nm: float) -> "Stack":
        """A copy with layer ``layer`` set to ``thickness_nm``."""
        _check_layer_index(self, layer)
        layers = list(self.layers)
        layers[layer] = Layer(layers[layer].material, thickness_nm)
        return Stack(layers, self.substrate, self.ambient, self.substrate_thickness_mm)

    # ------------------------------------------------------------------ internals
    def _power(self, wavelength_nm, angle_deg, polarization):
        pol = _check_polarization(polarization)
        wl, ang, out_shape = _grid(wavelength_nm, angle_deg)
        optics = _Optics(self, wl, ang)
        Rs = Ts = Rp = Tp = None
        if pol in ("s", "unpolarized"):
            Rs, Ts = optics.full_power("s")
        if pol in ("p", "unpolarized"):
            Rp, Tp = optics.full_power("p")
        if pol == "s":
            R, T = Rs, Ts
        elif pol == "p":
            R, T = Rp, Tp
        else:
            R, T = 0.5 * (Rs + Rp), 0.5 * (Ts + Tp)
        return R.reshape(out_shape), T.reshape(out_shape)


def _nk_in_role(m: Material, wl, role: str):
    try:
        return m.nk(wl)
    except WavelengthRangeError as exc:
        raise WavelengthRangeError(f"{role} ({m.name}): {exc}") from None


def _check_polarization(p):
    if p not in POLARIZATIONS:
        raise InputError(f"polarization must be one of {', '.join(POLARIZATIONS)}; got {p!r}.")
    return p


def _check_layer_index(stack, layer):
    if not isinstance(layer, (int, np.integer)) or isinstance(layer, bool) or not 0 <= layer < len(stack.layers):
        raise InputError(f"layer must be an index 0..{len(stack.layers) - 1} of the stack's layers "
                         f"(0 = top, next to the ambient); got {layer!r}."
                         if stack.layers else "The stack has no layers to sweep; add a layer first.")


def _grid(wavelength_nm, angle_deg):
    wl_in = require_finite("wavelength_nm", wavelength_nm, minimum=0.0, min_inclusive=False, unit="nm")
    ang_in = require_finite("angle_deg", angle_deg, minimum=0.0, maximum=MAX_ANGLE_DEG,
                            max_inclusive=False, unit="deg")
    return wl_in.ravel(), ang_in.ravel(), ang_in.shape + wl_in.shape


def _forward_kz(N, beta):
    """N cos θ on the forward-wave branch (Byrnes 2016, sec. 4). N: (W,), beta = N₀ sin θ₀: (A, W)."""
    kz = np.sqrt(N * N - beta * beta)
    forward = np.where(np.abs(kz.imag) > _BRANCH_EPS, kz.imag > 0, kz.real > 0)
    return np.where(forward, kz, -kz)


class _Optics:
    """Media indices and kz on an (angle, wavelength) grid, and the two-port algebra."""

    def __init__(self, stack: Stack, wl: np.ndarray, ang_deg: np.ndarray):
        self.stack, self.wl = stack, wl
        N = np.array([_nk_in_role(m, wl, role) for m, role in zip(stack._media, stack.roles())])  # (M, W)
        if np.any(N[0].imag > AMBIENT_K_MAX):
            raise InputError(f"The ambient ({stack.ambient.name}) absorbs (k up to {N[0].imag.max():.2g}) in the "
                             f"band asked; light must come from a transparent medium (k <= {AMBIENT_K_MAX:g}). "
                             "Choose a transparent ambient.")
        N[0] = N[0].real                                              # weak absorption of the ambient is neglected
        beta = N[0].real[None, :] * np.sin(np.radians(ang_deg))[:, None]   # (A, W), real, conserved
        self.N = N
        self.kz = np.stack([_forward_kz(N[m][None, :], beta) for m in range(len(N))])  # (M, A, W)
        self.cos = self.kz / N[:, None, :]
        self.thick = np.array([0.0, *(l.thickness_nm for l in stack.layers), 0.0])
        self.phase_per_nm = 2 * np.pi * self.kz / wl                  # kz·2π/λ, (M, A, W)

    def interface(self, i, j, pol):
        """Fresnel (r_ij, t_ij, r_ji, t_ji) between media i and j (Byrnes 2016, eqs. 3-4)."""
        if pol == "s":
            a, b = self.kz[i], self.kz[j]
            s = a + b
            return (a - b) / s, 2 * a / s, (b - a) / s, 2 * b / s
        Ni, Nj, ci, cj = self.N[i][None, :], self.N[j][None, :], self.cos[i], self.cos[j]
        s = Nj * ci + Ni * cj
        return (Nj * ci - Ni * cj) / s, 2 * Ni * ci / s, (Ni * cj - Nj * ci) / s, 2 * Nj * cj / s

    def two_port(self, first, last, pol):
        """Scattering coefficients (r, t, r', t') from medium ``first`` to medium ``last``.

        Reference planes: the bottom face of ``first`` and the top face of ``last``;
        the media strictly between them are propagated through with their thickness.
        Redheffer star product, interface by interface (stable: |exp(i kz d)| <= 1).
        """
        r, t, rb, tb = self.interface(first, first + 1, pol)
        for m in range(first + 1, last):
            e = np.exp(1j * self.phase_per_nm[m] * self.thick[m])
            t, tb, rb = t * e, tb * e, rb * e * e
            ri, ti, rib, tib = self.interface(m, m + 1, pol)
            D = 1.0 / (1.0 - rb * ri)
            r, t, rb, tb = r + t * tb * ri * D, t * ti * D, rib + tib * ti * rb * D, tib * tb * D
        return r, t, rb, tb

    def power_factor(self, into, outof, pol):
        """T = |t|² × this factor, for a wave from medium ``outof`` into medium ``into`` (Byrnes eqs. 21-22)."""
        if pol == "s":
            num, full = self.kz[into].real, self.kz[outof]
        else:
            num = (self.N[into][None, :] * np.conj(self.cos[into])).real
            full = self.N[outof][None, :] * np.conj(self.cos[outof])
        den = full.real
        # A wave that carries no power (evanescent in a transparent medium, past total internal
        # reflection) transmits none: 0, not 0/0; nor does one whose power flow is a rounding residue
        # of its size (a k of 1e-311 past total reflection), which would overflow the ratio.
        carries = np.abs(den) > POWER_FLOW_EPS * np.abs(full)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            factor = num / np.where(carries, den, 1.0)
        return np.where(carries, factor, 0.0)

    def single_pass(self):
        """Intensity transmitted on one pass through the thick substrate, exp(−4π Im(kz) d/λ)."""
        d_nm = self.stack.substrate_thickness_mm * 1e6
        return np.exp(-2.0 * self.phase_per_nm[-1].imag * d_nm)

    def incoherent(self, Rf, Tf, Rfb, Tfb, pol):
        """Sum the thick substrate's multiple passes in intensity (Byrnes 2016, sec. 6).

        Rf, Tf: front stack from the ambient; Rfb, Tfb: front stack from inside the
        substrate; the back face is bare substrate → ambient.
        """
        M = len(self.N) - 1
        rb, tb, _, _ = self.interface(M, 0, pol)
        Rb = np.abs(rb) ** 2
        Tb = np.abs(tb) ** 2 * self.power_factor(0, M, pol)
        P = self.single_pass()
        denom = 1.0 / (1.0 - Rfb * Rb * P * P)
        return Rf + Tf * Tfb * Rb * P * P * denom, Tf * Tb * P * denom

    def full_power(self, pol):
        M = len(self.N) - 1
        r, t, rb, tb = self.two_port(0, M, pol)
        R = np.abs(r) ** 2
        T = np.abs(t) ** 2 * self.power_factor(M, 0, pol)
        if self.stack.substrate_thickness_mm is None:
            return R, T
        return self.incoherent(R, T, np.abs(rb) ** 2, np.abs(tb) ** 2 * self.power_factor(0, M, pol), pol)


def sweep(st: Stack, layer: int = 0, thickness_nm=None, angle_deg=0.0, wavelength_nm=None,
          polarization: str = "unpolarized", quantity: str = "reflectance") -> np.ndarray:
    """R (or T) over a grid of one layer's thickness × angle × wavelength.

    Parameters
    ----------
    st : Stack
    layer : int
        Index of the swept layer, 0 = top (next to the ambient).
    thickness_nm : array_like, 1-D
        Thicknesses of that layer in nm (>= 0).
    angle_deg : array_like, 1-D or scalar
        Angles of incidence in the ambient, degrees, 0 <= angle < 90.
    wavelength_nm : array_like, 1-D
        Vacuum wavelengths in nm.
    polarization : {"s", "p", "unpolarized"}
    quantity : {"reflectance", "transmittance"}

    Returns
    -------
    numpy.ndarray, shape (n_thickness, n_angle, n_wavelength)
        A scalar angle counts as one angle.

    Notes
    -----
    The layers above and below the swept one are reduced once to effective
    two-ports; every grid point then costs one complex exponential (Airy
    summation in the swept layer), independent of the number of layers.
    """
    pol = _check_polarization(polarization)
    if quantity not in ("reflectance", "transmittance"):
        raise InputError(f"quantity must be 'reflectance' or 'transmittance'; got {quantity!r}.")
    if not isinstance(st, Stack):
        raise InputError(f"sweep needs a Stack; got {type(st).__name__}.")
    _check_layer_index(st, layer)
    if thickness_nm is None or wavelength_nm is None:
        raise InputError("sweep needs thickness_nm and wavelength_nm arrays (nm).")
    d = require_finite("thickness_nm", thickness_nm, minimum=0.0, unit="nm")
    for name, arr in (("thickness_nm", d), ("angle_deg", np.asarray(angle_deg)),
                      ("wavelength_nm", np.asarray(wavelength_nm))):
        if arr.ndim > 1:
            raise InputError(f"{name} must be a number or a 1-D array; got shape {arr.shape}.")
    d = d.ravel()
    wl, ang, _ = _grid(wavelength_nm, angle_deg)
    optics = _Optics(st, wl, ang)
    pols = ("s", "p") if pol == "unpolarized" else (pol,)
    weight = 1.0 / len(pols)
    m = layer + 1                                   # medium index of the swept layer
    M = len(optics.N) - 1
    want_T = quantity == "transmittance" or st.substrate_thickness_mm is not None
    coeffs = []
    for p in pols:
        ra, ta, rab, tab = optics.two_port(0, m, p)          # ambient -> top of swept layer
        rbl, tbl, rblb, tblb = optics.two_port(m, M, p)      # bottom of swept layer -> substrate
        c = {"ra": ra, "V": rab * rbl, "Q": ta * tab * rbl - ra * rab * rbl}
        if want_T:
            c.update(W=ta * tbl, fT=optics.power_factor(M, 0, p))
        if st.substrate_thickness_mm is not None:
            c.update(rblb=rblb, Qb=tblb * tbl * rab - rblb * rab * rbl, Wb=tblb * tab,
                     fTb=optics.power_factor(0, M, p), p=p)
        coeffs.append(c)
    k2 = 2.0 * optics.phase_per_nm[m]                      # (A, W): x = exp(i·k2·d)
    A, W = k2.shape
    out = np.empty((d.size, A, W))
    step = max(1, _SWEEP_CHUNK // max(1, A * W))
    uniform = d.size > 2 and np.allclose(np.diff(d), d[1] - d[0], rtol=_UNIFORM_RTOL, atol=0.0)
    x_step = np.exp(1j * k2 * (d[1] - d[0])) if uniform else None
    fast = quantity == "reflectance" and st.substrate_thickness_mm is None
    if fast:
        for c in coeffs:
            _expand_for_real_path(c)
    x = None
    for start in range(0, d.size, step):
        # on a uniform grid a chunk continues from the last one's phase, re-evaluated every _RESYNC_ROWS rows
        carry = x[-1] if x is not None and uniform and start % _RESYNC_ROWS >= step else None
        x = _round_trip_phase(k2, d[start:start + step], x_step, carry)   # e^{2iδ}, shared by s and p
        if fast:
            out[start:start + step] = _reflectance_real_path(x, coeffs, weight)
            continue
        ax = np.abs(x) if want_T else None                  # |e^{iδ}|² = |e^{2iδ}|
        acc = None
        for c in coeffs:
            den = c["V"] * x
            np.subtract(1.0, den, out=den)
            den = _abs2(den)
            # r = (r_a + Q x)/(1 − r_a' r_b x): Airy sum in the swept layer, Q = t_a t_a' r_b − r_a r_a' r_b
            num = c["Q"] * x
            num += c["ra"]
            R = _abs2(num) / den
            if want_T:
                T = _abs2(c["W"]) * ax / den * c["fT"]
            if st.substrate_thickness_mm is None:
                val = R if quantity == "reflectance" else T
            else:
                num = c["Qb"] * x
                num += c["rblb"]
                Rfb = _abs2(num) / den
                Tfb = _abs2(c["Wb"]) * ax / den * c["fTb"]
                Ri, Ti = optics.incoherent(R, T, Rfb, Tfb, c["p"])
                val = Ri if quantity == "reflectance" else Ti
            acc = val if acc is None else acc + val
        if len(coeffs) > 1:
            acc *= weight
        out[start:start + step] = acc
    return out


def _expand_for_real_path(c):
    """Real coefficients of |r_a + Q x|² and |1 − V x|² as polynomials in Re x, Im x and |x|²."""
    ra, Q, V = c["ra"], c["Q"], c["V"]
    P = np.conj(ra) * Q
    c.update(A0=np.abs(ra) ** 2, A2=np.abs(Q) ** 2, Pr=2 * P.real, Pi=-2 * P.imag,
             B2=np.abs(V) ** 2, Vr=-2 * V.real, Vi=2 * V.imag)


def _reflectance_real_path(x, coeffs, weight):
    """R = |r_a + Q x|² / |1 − V x|² summed over polarizations, in real arithmetic:
    |r_a + Q x|² = |r_a|² + |Q|²|x|² + 2 Re(r_a* Q x) and |1 − V x|² = 1 + |V|²|x|² − 2 Re(V x)."""
    xr = np.ascontiguousarray(x.real)
    xi = np.ascontiguousarray(x.imag)
    x2 = xr * xr
    x2 += xi * xi
    acc = None
    for c in coeffs:
        num = c["Pr"] * xr
        num += c["Pi"] * xi
        num += c["A0"]
        num += c["A2"] * x2
        den = c["Vr"] * xr
        den += c["Vi"] * xi
        den += 1.0
        den += c["B2"] * x2
        num /= den
        if acc is None:
            acc = num
        else:
            acc += num
    if len(coeffs) > 1:
        acc *= weight
    return acc


def _round_trip_phase(k2, d, x_step, carry=None):
    """exp(i·k2·d) for a run of thicknesses, (len(d), A, W).

    On a uniform grid the factor for each next thickness is one complex product
    with exp(i·k2·Δd), continuing from ``carry`` (the previous thickness's factor) when
    given; the exponential is re-evaluated at least every _RESYNC_ROWS thicknesses, so
    the rounding error stays below ~_RESYNC_ROWS ulp. Otherwise one exponential per point.
    """
    if x_step is None:
        return np.exp(1j * k2 * d[:, None, None])
    x = np.empty((d.size,) + k2.shape, dtype=complex)
    x[0] = np.exp(1j * k2 * d[0]) if carry is None else carry * x_step
    x[1:] = x_step
    np.cumprod(x, axis=0, out=x)
    return x


def _abs2(z):
    """|z|² without the square root of abs()."""
    return z.real * z.real + z.imag * z.imag
