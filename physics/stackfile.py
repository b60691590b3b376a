"""Stack files: a layer stack and its viewing settings as plain JSON.

One format serves the shipped presets (``presets/*.json``) and the files users
save and load. Version 1 looks like this::

    {
      "format": "fringegauge-stack",
      "version": 1,
      "name": "Thermal oxide on silicon",
      "scenario": "Invented scenario: ...",
      "ambient": "air",
      "layers": [{"material": "SiO2", "thickness_nm": 100.0}],
      "substrate": "Si",
      "substrate_thickness_mm": null,
      "swept_layer": 0,
      "view": {"angle_deg": 0.0, "polarization": "unpolarized", "illuminant": "D65",
               "observer": "2", "na": 0.0, "thickness_max_nm": 1000.0,
               "lamp_cct_k": 3000.0, "lamp_spectrum": null,
               "polarizer": "none", "polarizer_deg": 90.0, "analyzer": "none", "analyzer_deg": 0.0}
    }

The illuminant is any lamp of the page: a CIE or LED code, "halogen" (a Planck
radiator at ``lamp_cct_k``) or "custom" (the measured spectrum in
``lamp_spectrum``). Files written before the lamp and polarizer fields existed
read with their defaults.

Layers are listed from the ambient side down. A material is a string (curated
name, alias, ``"shelf/book/page"`` or a number written as text) or a material
description object as written by ``Material.spec()``: kinds constant, cauchy
(with an optional Urbach tail ``"urbach": [k at the band edge, exponent per eV,
band-edge wavelength in nm]``), sellmeier, table, tauc-lorentz (eps_inf, gap_ev,
amplitude_ev, center_ev, broadening_ev), effective-medium (materials ``"a"`` and
``"b"``, each a string or an object checked the same way, at most
:data:`MAX_MIX_DEPTH` mixtures deep; ``fraction_b`` of b from 0 to 1; ``rule``
bruggeman or maxwell-garnett), database and curated. ``presets/README.md``
lists every field with its type, range and default.

Reading never evaluates anything: the text is parsed as JSON and every field is
checked; any problem raises :class:`~physics.errors.InputError` whose message
starts with the offending field (e.g. ``layers[2].thickness_nm``) and says what
is allowed.
"""

from __future__ import annotations

import json
import math
import reprlib
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .appearance import MAX_OFFERED_NA, check_na_for
from .color import ILLUMINANTS as COLOUR_ILLUMINANTS, PLANCK_CCT_LIMITS_K, user_spd_on_fine_grid
from .errors import InputError
from .filmmodels import EMA_RULES, EPS_INF_MIN
from .materials import K_MAX, Material, material
from .stack import Layer, Stack

__all__ = [
    "StackFile", "stack_from_dict", "stack_to_dict", "load_stack_file", "dump_stack_file",
    "load_preset", "list_presets", "FORMAT", "VERSION", "MAX_LAYERS", "MAX_FILE_BYTES",
    "VIEW_DEFAULTS", "PRESET_DIR", "MAX_TABLE_POINTS", "STACK_READ_BUDGET_S",
]

#: Value of the "format" field.
FORMAT = "fringegauge-stack"
#: The one format version this module reads and writes.
VERSION = 1
#: Most layers in a stack file.
MAX_LAYERS = 12
#: Largest layer thickness accepted, nm.
MAX_THICKNESS_NM = 100_000.0
#: Largest file accepted, bytes (1 MB of 10**6 bytes), checked before parsing.
MAX_FILE_BYTES = 1_000_000
#: Most entries in one list of a material table or dispersion formula (wavelengths, n, k, B, C): the rows
#: a stack file may hold per material. Measured optical constants come at 1-10 nm steps, a few hundred
#: rows over the visible and near infrared; 10,000 is a 0.1 nm step over 1000 nm.
MAX_TABLE_POINTS = 10_000
#: Time allowed for checking one stack file and building its materials (s): a file at MAX_FILE_BYTES full
#: of tables takes about 1 s (measured); the check between materials stops one that a busy server or many
#: database pages drag on far longer.
STACK_READ_BUDGET_S = 5.0
#: Longest name and scenario, characters.
MAX_NAME_CHARS = 200
MAX_SCENARIO_CHARS = 1000
#: Longest material string (a name, an alias, a page or a number), characters.
MAX_MATERIAL_CHARS = 200
#: Where the shipped presets live.
PRESET_DIR = Path(__file__).resolve().parent.parent / "presets"

DEFAULT_NAME = "untitled stack"
#: Viewing settings used for keys missing from "view".
VIEW_DEFAULTS = {"angle_deg": 0.0, "polarization": "unpolarized", "illuminant": "D65",
                 "observer": "2", "na": 0.0, "thickness_max_nm": 1000.0,
                 "lamp_cct_k": 3000.0, "lamp_spectrum": None,
                 "polarizer": "none", "polarizer_deg": 90.0, "analyzer": "none", "analyzer_deg": 0.0}
POLARIZATIONS = ("s", "p", "unpolarized")
#: A halogen lamp: a Planck radiator at ``lamp_cct_k``.
HALOGEN = "halogen"
#: A measured lamp: its spectrum in ``lamp_spectrum``.
CUSTOM_LAMP = "custom"
#: Every lamp the page offers: the CIE and LED codes of physics.color, the halogen and a measured lamp.
ILLUMINANTS = (*COLOUR_ILLUMINANTS, HALOGEN, CUSTOM_LAMP)
OBSERVERS = ("2", "10")
POLARIZERS = ("none", "linear")
ANALYZERS = ("none", "parallel", "crossed", "angle")
#: (lowest, highest, unit) of each numeric view setting.
VIEW_RANGES = {"angle_deg": (0.0, 89.9, "deg"), "na": (0.0, MAX_OFFERED_NA, ""),     # NA also below the ambient's cap
               "thickness_max_nm": (10.0, 100_000.0, "nm"), "lamp_cct_k": (*PLANCK_CCT_LIMITS_K, "K"),
               "polarizer_deg": (-180.0, 180.0, "deg"), "analyzer_deg": (-180.0, 180.0, "deg")}
#: Most rows of a measured lamp spectrum kept in a stack file.
MAX_LAMP_POINTS = 2000

_REQUIRED = ("format", "version", "ambient", "layers", "substrate")
_TOP_FIELDS = ("format", "version", "name", "scenario", "ambient", "layers", "substrate",
               "substrate_thickness_mm", "swept_layer", "view")
_LAYER_FIELDS = ("material", "thickness_nm")
#: Fields of a material description object, by kind (as written by Material.spec()).
_MATERIAL_FIELDS = {
    "constant": (("n",), ("k", "name")),
    "cauchy": (("coefficients",), ("range_nm", "name", "source", "urbach")),
    "sellmeier": (("B", "C"), ("range_nm", "name", "source")),
    "table": (("wavelength_nm", "n"), ("k", "name", "source")),
    "tauc-lorentz": (("eps_inf", "gap_ev", "amplitude_ev", "center_ev", "broadening_ev"),
                     ("range_nm", "name", "source")),
    "effective-medium": (("a", "b", "fraction_b"), ("rule", "name")),
    "database": (("page",), ()),
    "curated": (("name",), ()),
}
#: Effective media inside one another a material description may hold (a mixture of a mixture of a
#: mixture): enough for a graded or rough film, and it bounds the work and the recursion of one field.
MAX_MIX_DEPTH = 3
#: Longest name of an effective medium, characters: its default name spells out both materials, and
#: nested mixtures of database pages pass MAX_MATERIAL_CHARS.
MAX_MIX_NAME_CHARS = 1000
#: Ranges of the Urbach tail of a Cauchy film, written ``"urbach": [k at the band edge, exponent, band
#: edge]`` (as CauchyMaterial.spec() writes them): k at most physics.materials.K_MAX; the exponent is
#: 1/E_u, and Urbach energies of real films lie above 10 meV (common practice), so at most 100 per eV;
#: the band edge is a wavelength as the stack file's others are.
URBACH_RANGES = ((0.0, K_MAX, ""), (0.0, 100.0, "1/eV"), (1.0, 100_000.0, "nm"))
URBACH_NAMES = ("k at the band edge", "exponent", "band-edge wavelength")
#: Ranges of the Tauc-Lorentz parameters (eV, except ε∞): ε∞ from physics.filmmodels.EPS_INF_MIN; the upper
#: ends lie well beyond fitted films (ε∞ < 10, Eg and E0 in the UV, A up to a few hundred eV) and refuse
#: only numbers no film has. A, E0 and C must be above zero; C below 2·E0 is checked by the model.
TAUC_LORENTZ_RANGES = {"eps_inf": (EPS_INF_MIN, 100.0, ""), "gap_ev": (0.0, 50.0, "eV"),
                       "amplitude_ev": (0.0, 10_000.0, "eV"), "center_ev": (0.0, 50.0, "eV"),
                       "broadening_ev": (0.0, 50.0, "eV")}
_POSITIVE = ("amplitude_ev", "center_ev", "broadening_ev")
#: Sellmeier terms, n² = 1 + Σ Bᵢλ²/(λ² − Cᵢ) (λ in µm, Cᵢ in µm²): one or two for a fitted film, three in glass
#: catalogues; Bᵢ >= 0 (an oscillator strength) and Cᵢ >= 0 (a resonance wavelength squared), each at most the
#: upper end given (an infrared term of a database page reaches B ≈ 4e4 at C ≈ 1.5e6 µm²: Luke et al. 2015).
MAX_SELLMEIER_TERMS = 6
SELLMEIER_RANGES = {"B": (0.0, 1e7, ""), "C": (0.0, 1e8, "µm²")}
#: Wavelengths across a dispersion model's range at which a file's model is evaluated once when read:
#: an Urbach tail or Tauc-Lorentz parameters that give no usable index anywhere in the range are refused
#: there, naming the field, not later in a view.
PROBE_POINTS = 64


@dataclass(frozen=True)
class StackFile:
    """A stack read from a stack file, with its name, scenario and viewing settings.

    Attributes
    ----------
    name : str
        Display name (at most 200 characters).
    scenario : str
        Free text describing the situation ("" when absent; at most 1000 characters).
    stack : Stack
        Ambient, layers (top to bottom) and substrate.
    swept_layer : int
        Index of the layer whose thickness the views sweep (0 = top); 0 for a stack without layers.
    view : dict
        Viewing settings, every key of :data:`VIEW_DEFAULTS` present: angle_deg (deg),
        polarization, illuminant, observer, na, thickness_max_nm (nm); lamp_cct_k (K, the
        halogen's colour temperature), lamp_spectrum ([[nm], [power]] of the illuminant
        "custom", else None); polarizer ("none"/"linear"), polarizer_deg, analyzer
        ("none"/"parallel"/"crossed"/"angle"), analyzer_deg (deg to the plane of tilt).
    """

    name: str
    scenario: str
    stack: Stack
    swept_layer: int = 0
    view: dict = field(default_factory=lambda: dict(VIEW_DEFAULTS))


# ---------------------------------------------------------------------- checks
def _fail(where: str, message: str):
    raise InputError(f"{where}: {message}")


_SHORT = reprlib.Repr()
_SHORT.maxstring = _SHORT.maxother = 60
_SHORT.maxlevel = 3


def _describe(value) -> str:
    """A short, bounded repr of a value for messages (safe on deep or huge structures)."""
    try:
        return _SHORT.repr(value)
    except ValueError:          # an integer too long to print
        return "<a number too long to print>"


def _type_name(value) -> str:
    return {dict: "an object", list: "a list", tuple: "a list", str: "a string",
            int: "a number", float: "a number"}.get(type(value), type(value).__name__)


def _got(value) -> str:
    """What was found, in JSON words: 'null', 'true', or the kind and a short repr."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    return f"{_type_name(value)} {_describe(value)}"


def _check_fields(where: str, obj: dict, allowed, required=()):
    unknown = [k for k in obj if k not in allowed]
    if unknown:
        _fail(where, f"unknown field {_describe(unknown[0])}; the allowed fields are "
                     f"{', '.join(allowed)}. Remove it or correct its spelling.")
    for k in required:
        if k not in obj:
            _fail(f"{where}.{k}" if where != "file" else k,
                  f"missing; {where if where != 'file' else 'the file'} needs the field {k!r}.")


def _number(where: str, value, lo=None, hi=None, unit="") -> float:
    """A finite real number (not true/false) in [lo, hi], as float."""
    u = f" {unit}" if unit else ""
    in_unit = f" (in {unit})" if unit else ""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        _fail(where, f"must be a number{in_unit}, got {_got(value)}.")
    try:
        x = float(value)
    except OverflowError:
        x = math.inf
    if not math.isfinite(x):
        _fail(where, f"must be a finite number{in_unit}, got {_describe(value)}.")
    if lo is not None and x < lo or hi is not None and x > hi:
        allowed = (f"from {lo:g} to {hi:g}{u}" if lo is not None and hi is not None
                   else f">= {lo:g}{u}" if lo is not None else f"<= {hi:g}{u}")
        _fail(where, f"{x:.10g}{u} is out of range; give a value {allowed}.")
    return x


def _string(where: str, value, max_chars: int) -> str:
    if not isinstance(value, str):
        _fail(where, f"must be a string (text in double quotes), got {_got(value)}.")
    if len(value) > max_chars:
        _fail(where, f"is {len(value)} characters long; shorten it to at most {max_chars}.")
    return value


def _number_list(where: str, value, min_len=1, max_len=None) -> list:
    if not isinstance(value, (list, tuple)):
        _fail(where, f"must be a list of numbers, got {_got(value)}.")
    if len(value) < min_len or (max_len is not None and len(value) > max_len):
        size = f"{min_len}" if max_len == min_len else (
            f"{min_len} to {max_len}" if max_len is not None else f"at least {min_len}")
        _fail(where, f"has {len(value)} entries; give {size}.")
    return [_number(f"{where}[{i}]", v) for i, v in enumerate(value)]


def _material_description(where: str, d: dict, depth: int = 0) -> dict:
    """Check a material description object's fields and types; return a clean copy (the two materials
    of an effective medium built, each checked the same way; ``depth``: mixtures around this one)."""
    kind = d.get("kind")
    if not isinstance(kind, str) or kind not in _MATERIAL_FIELDS:
        _fail(f"{where}.kind", f"must be one of {', '.join(_MATERIAL_FIELDS)}, got {_got(kind)}.")
    required, optional = _MATERIAL_FIELDS[kind]
    _check_fields(where, d, ("kind", *required, *optional), required)
    if kind == "effective-medium" and depth >= MAX_MIX_DEPTH:
        _fail(where, f"is an effective medium inside {depth} others; a stack file nests mixtures at most "
                     f"{MAX_MIX_DEPTH} deep. Describe the film with fewer mixtures.")
    out = {"kind": kind}
    for key, value in d.items():
        w = f"{where}.{key}"
        if key == "kind":
            continue
        if key == "name" and kind == "effective-medium":
            out[key] = _string(w, value, MAX_MIX_NAME_CHARS)
        elif key in ("name", "source", "page"):
            out[key] = _string(w, value, MAX_MATERIAL_CHARS if key != "source" else MAX_SCENARIO_CHARS)
        elif key == "range_nm":
            out[key] = _number_list(w, value, 2, 2)
        elif key == "coefficients":
            out[key] = _number_list(w, value, 1, 3)
        elif key == "urbach":
            values = _number_list(w, value, 3, 3)
            for i, (x, (lo, hi, unit), label) in enumerate(zip(values, URBACH_RANGES, URBACH_NAMES)):
                _number(f"{w}[{i}] ({label})", x, lo, hi, unit)
            out[key] = values
        elif key in TAUC_LORENTZ_RANGES:
            lo, hi, unit = TAUC_LORENTZ_RANGES[key]
            out[key] = _number(w, value, lo, hi, unit)
            if key in _POSITIVE and out[key] <= 0:
                _fail(w, f"must be above 0 {unit}, got {out[key]:g}; give a value up to {hi:g} {unit}.")
        elif key in ("a", "b"):
            out[key] = _material(w, value, depth + 1)
        elif key == "fraction_b":
            out[key] = _number(w, value, 0.0, 1.0)
        elif key == "rule":
            if not isinstance(value, str) or value not in EMA_RULES:
                _fail(w, f"must be one of {', '.join(repr(r) for r in EMA_RULES)} (a string), got {_got(value)}.")
            out[key] = value
        elif kind == "sellmeier" and key in SELLMEIER_RANGES:
            lo, hi, unit = SELLMEIER_RANGES[key]
            out[key] = [_number(f"{w}[{i}]", x, lo, hi, unit)
                        for i, x in enumerate(_number_list(w, value, 1, MAX_SELLMEIER_TERMS))]
        elif kind == "constant":             # n, k
            out[key] = _number(w, value)
        else:                                # B, C, wavelength_nm, n, k of sellmeier/table
            out[key] = _number_list(w, value, 1, MAX_TABLE_POINTS)
    return out


def _probe(m: Material) -> None:
    """Evaluate a dispersion model across its range once (raises InputError where it gives no usable index)."""
    if m.range_nm is not None:
        m.nk(np.geomspace(*m.range_nm, PROBE_POINTS))


def _sellmeier_poles(where: str, spec: dict) -> None:
    """Refuse a Sellmeier term whose resonance, λ = √Cᵢ, lies inside the material's range (n is infinite there)."""
    lo, hi = spec.get("range_nm", (300.0, 2500.0))
    for i, c in enumerate(spec["C"]):
        pole_nm = 1000.0 * np.sqrt(c)
        if lo <= pole_nm <= hi:
            _fail(f"{where}.C[{i}]", f"puts a resonance at {pole_nm:.4g} nm, inside the range {lo:g}-{hi:g} nm where "
                                     "the index is used; give range_nm on one side of it, or a C whose square root "
                                     "(µm) lies outside the range.")


def _material(where: str, value, depth: int = 0) -> Material:
    """A material from a file field (string or description object), errors prefixed by ``where``."""
    probe = False
    if isinstance(value, str):
        _string(where, value, MAX_MATERIAL_CHARS)
        spec = value
    elif isinstance(value, dict):
        spec = _material_description(where, value, depth)
        probe = spec["kind"] in ("tauc-lorentz", "effective-medium", "sellmeier") or "urbach" in spec
        if spec["kind"] == "sellmeier":
            _sellmeier_poles(where, spec)
    else:
        _fail(where, f"must be a material name or page as a string (e.g. \"SiO2\", "
                     f"\"main/Si/Green-2008\", \"1.46\") or a material description object "
                     f"(e.g. {{\"kind\": \"constant\", \"n\": 1.46, \"k\": 0.0}}); "
                     f"got {_got(value)}.")
    m = None
    try:
        m = material(spec)
        if probe:
            _probe(m)
        return m
    except InputError as exc:
        if m is not None and spec["kind"] == "cauchy":         # built, but its Urbach tail runs away
            raise InputError(f"{where}.urbach: {exc} The tail grows too fast: give a smaller exponent or "
                             "k at the band edge.") from None
        raise InputError(f"{where}: {exc}") from None
    except (TypeError, ValueError, ArithmeticError, IndexError, KeyError) as exc:
        raise InputError(f"{where}: not a usable material description ({exc}); "
                         "check its fields and numbers.") from None


def _check_view(view) -> dict:
    if view is None:
        view = {}
    if not isinstance(view, dict):
        _fail("view", f"must be an object of viewing settings, got {_got(view)}.")
    _check_fields("view", view, tuple(VIEW_DEFAULTS))
    out = dict(VIEW_DEFAULTS)
    for key, value in view.items():
        w = f"view.{key}"
        if key in VIEW_RANGES:
            lo, hi, unit = VIEW_RANGES[key]
            out[key] = _number(w, value, lo, hi, unit)
        elif key == "lamp_spectrum":
            out[key] = None if value is None else _lamp_spectrum(w, value)
        else:
            allowed = {"polarization": POLARIZATIONS, "illuminant": ILLUMINANTS, "observer": OBSERVERS,
                       "polarizer": POLARIZERS, "analyzer": ANALYZERS}[key]
            if not isinstance(value, str) or value not in allowed:
                _fail(w, f"must be one of {', '.join(repr(a) for a in allowed)} (a string), "
                         f"got {_got(value)}.")
            out[key] = value
    if out["illuminant"] == CUSTOM_LAMP and out["lamp_spectrum"] is None:
        _fail("view.lamp_spectrum", "missing; the illuminant 'custom' needs the lamp's spectrum as "
                                    "[[wavelengths in nm], [relative powers]].")
    return out


def _lamp_spectrum(where: str, value) -> list:
    """A measured lamp: [[nm, ...], [power, ...]] of equal length, usable as an illuminant."""
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        _fail(where, f"must be [[wavelengths in nm], [relative powers]], got {_got(value)}.")
    wl = _number_list(f"{where}[0]", value[0], 2, MAX_LAMP_POINTS)
    power = _number_list(f"{where}[1]", value[1], 2, MAX_LAMP_POINTS)
    if len(wl) != len(power):
        _fail(where, f"has {len(wl)} wavelengths but {len(power)} powers; give one power per wavelength.")
    try:
        user_spd_on_fine_grid(wl, power)
    except InputError as e:
        _fail(where, f"is not a usable lamp: {e}")
    return [wl, power]


def _check_swept(value, n_layers: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        _fail("swept_layer", f"must be a whole number (a layer index), got {_got(value)}.")
    if n_layers == 0:
        if value != 0:
            _fail("swept_layer", f"is {_describe(value)} but the stack has no layers; use 0.")
    elif not 0 <= value < n_layers:
        _fail("swept_layer", f"is {_describe(value)}; with {n_layers} layers use an index from 0 "
                             f"(top, next to the ambient) to {n_layers - 1}.")
    return value


def _check_time(deadline: float, where: str) -> None:
    if time.monotonic() > deadline:
        raise InputError(f"Checking the stack file took longer than {STACK_READ_BUDGET_S:g} s (stopped at {where}); "
                         "the server is busy or the file's materials are very large. Use shorter material tables "
                         "and try again.")


# ---------------------------------------------------------------------- public API
def stack_from_dict(data: dict) -> StackFile:
    """Check a parsed stack file and build its :class:`StackFile`.

    Parameters
    ----------
    data : dict
        The file's top-level object (as from ``json.loads``).

    Returns
    -------
    StackFile
        Missing optional fields take their defaults: name "untitled stack",
        scenario "", substrate_thickness_mm None (semi-infinite), swept_layer 0,
        and :data:`VIEW_DEFAULTS` for missing view settings.

    Raises
    ------
    InputError
        Any field missing, unknown, of the wrong type or out of range; the
        message starts with the field's path, e.g. ``layers[1].thickness_nm``.
    """
    if not isinstance(data, dict):
        raise InputError(f"A stack file must hold one JSON object {{...}} at the top level; "
                         f"got {_got(data)}.")
    _check_fields("file", data, _TOP_FIELDS)
    for key in _REQUIRED:
        if key not in data:
            _fail(key, f"missing; a stack file needs the fields {', '.join(_REQUIRED)}.")
    if data["format"] != FORMAT or not isinstance(data["format"], str):
        _fail("format", f"must be {FORMAT!r}, got {_got(data['format'])}; this is not a "
                        "fringegauge stack file or its header is damaged.")
    version = data["version"]
    if isinstance(version, bool) or not isinstance(version, int):
        _fail("version", f"must be the whole number {VERSION}, got {_got(version)}.")
    if version != VERSION:
        _fail("version", f"{_describe(version)} is not supported; this fringegauge reads version {VERSION}. "
                         "Open the file with the fringegauge that wrote it, or rewrite it as version 1.")
    name = _string("name", data.get("name", DEFAULT_NAME), MAX_NAME_CHARS)
    scenario = _string("scenario", data.get("scenario", ""), MAX_SCENARIO_CHARS)

    raw_layers = data["layers"]
    if not isinstance(raw_layers, list):
        _fail("layers", f"must be a list of layers [{{\"material\": ..., \"thickness_nm\": ...}}, ...], "
                        f"got {_got(raw_layers)}.")
    if len(raw_layers) > MAX_LAYERS:
        _fail("layers", f"has {len(raw_layers)} layers; a stack file holds at most {MAX_LAYERS}. "
                        "Remove layers or merge thin ones.")
    layers = []
    deadline = time.monotonic() + STACK_READ_BUDGET_S
    for i, raw in enumerate(raw_layers):
        where = f"layers[{i}]"
        _check_time(deadline, where)
        if not isinstance(raw, dict):
            _fail(where, f"must be an object {{\"material\": ..., \"thickness_nm\": ...}}, "
                         f"got {_got(raw)}.")
        _check_fields(where, raw, _LAYER_FIELDS, _LAYER_FIELDS)
        thickness = _number(f"{where}.thickness_nm", raw["thickness_nm"], 0.0, MAX_THICKNESS_NM, "nm")
        layers.append(Layer(_material(f"{where}.material", raw["material"]), thickness))

    _check_time(deadline, "ambient")
    ambient = _material("ambient", data["ambient"])
    _check_time(deadline, "substrate")
    substrate = _material("substrate", data["substrate"])
    d_mm = data.get("substrate_thickness_mm")
    if d_mm is not None:
        d_mm = _number("substrate_thickness_mm", d_mm, unit="mm")
        if d_mm <= 0:
            _fail("substrate_thickness_mm", f"{d_mm:g} mm is not allowed; give a plate thickness "
                                            "> 0 mm, or null for a semi-infinite substrate.")
    swept = _check_swept(data.get("swept_layer", 0), len(layers))
    view = _check_view(data.get("view"))
    try:
        stack = Stack(layers, substrate=substrate, ambient=ambient, substrate_thickness_mm=d_mm)
    except InputError as exc:  # pragma: no cover - every part is checked above
        raise InputError(f"stack: {exc}") from None
    try:
        check_na_for(stack, view["na"])
    except InputError as exc:
        raise InputError(f"view.na: {exc}") from None
    return StackFile(name=name, scenario=scenario, stack=stack, swept_layer=swept, view=view)


def stack_to_dict(stack: Stack, *, name: str = DEFAULT_NAME, scenario: str = "",
                  swept_layer: int = 0, view: dict | None = None) -> dict:
    """The stack-file object for a stack (the inverse of :func:`stack_from_dict`).

    Parameters
    ----------
    stack : Stack
        Layers (at most 12, each 0 to 100000 nm), substrate and ambient.
    name : str
        Display name, at most 200 characters.
    scenario : str
        Free text, at most 1000 characters.
    swept_layer : int
        Index of the layer the views sweep (0 = top).
    view : dict or None
        Viewing settings; missing keys take :data:`VIEW_DEFAULTS`.

    Returns
    -------
    dict
        JSON-friendly object with every field written out (view complete);
        materials as ``Material.spec()``.

    Raises
    ------
    InputError
        The result would not be a valid stack file (the same checks as reading).
    """
    if not isinstance(stack, Stack):
        raise InputError(f"stack_to_dict needs a Stack; got {type(stack).__name__}.")
    full_view = _check_view(view)
    data = {
        "format": FORMAT,
        "version": VERSION,
        "name": name,
        "scenario": scenario,
        "ambient": stack.ambient.spec(),
        "layers": [{"material": layer.material.spec(), "thickness_nm": layer.thickness_nm}
                   for layer in stack.layers],
        "substrate": stack.substrate.spec(),
        "substrate_thickness_mm": stack.substrate_thickness_mm,
        "swept_layer": swept_layer,
        "view": full_view,
    }
    stack_from_dict(data)   # write only what reads back
    return data


def load_stack_file(content: bytes | str) -> StackFile:
    """Parse and check the text of a stack file.

    Parameters
    ----------
    content : bytes or str
        The file's content; bytes are decoded as UTF-8 (a leading byte-order mark is allowed).
        At most 1 MB.

    Returns
    -------
    StackFile

    Raises
    ------
    InputError
        Too large, not UTF-8, not JSON (with line and column), or any field check of
        :func:`stack_from_dict`.
    """
    return stack_from_dict(read_json_document(content, "stack file", MAX_FILE_BYTES))


def read_json_document(content, what: str, max_bytes: int):
    """Decode and parse the text of one of our JSON files, strictly.

    Bytes are decoded as UTF-8 (a leading byte-order mark is allowed); the size is checked before
    parsing; NaN/Infinity, a field given twice in one object and runaway nesting are refused.

    Parameters
    ----------
    content : bytes, bytearray, memoryview or str
    what : str  how messages name the file, e.g. ``"stack file"``
    max_bytes : int  largest size accepted (UTF-8 bytes)

    Returns
    -------
    The parsed JSON value.

    Raises
    ------
    InputError
        Too large, not UTF-8, not JSON (with line and column), or one of the refusals above.
    """
    limit = f"{max_bytes:,} bytes ({max_bytes / 1e6:g} MB)"
    if isinstance(content, (bytearray, memoryview)):
        content = bytes(content)
    if isinstance(content, bytes):
        if len(content) > max_bytes:
            raise InputError(f"The file is {len(content):,} bytes; a {what} may be at most {limit}.")
        try:
            text = content.decode("utf-8-sig")
        except UnicodeDecodeError as exc:
            raise InputError(f"The file is not UTF-8 text (bad byte at position {exc.start}); "
                             "save it as UTF-8 JSON.") from None
    elif isinstance(content, str):
        size = len(content) if len(content) > max_bytes else len(
            content.encode("utf-8", errors="surrogatepass"))
        if size > max_bytes:
            raise InputError(f"The file is {size:,} bytes; a {what} may be at most {limit}.")
        text = content[1:] if content.startswith("\ufeff") else content
    else:
        raise InputError(f"A {what}'s content is text or bytes; got {type(content).__name__}.")

    def reject_constant(token: str):
        raise InputError(f"The file is not valid JSON: {token} is not a JSON number; write a finite number.")

    def no_duplicates(pairs):
        out = {}
        for key, value in pairs:
            if key in out:
                raise InputError(f"The file is not a valid {what}: the field {key!r} appears twice "
                                 "in one object; keep one.")
            out[key] = value
        return out

    try:
        return json.loads(text, parse_constant=reject_constant, object_pairs_hook=no_duplicates)
    except json.JSONDecodeError as exc:
        raise InputError(f"The file is not valid JSON: {exc.msg} at line {exc.lineno}, "
                         f"column {exc.colno}. Fix the text there (a missing comma, quote or "
                         "bracket is the usual cause).") from None
    except RecursionError:
        raise InputError(f"The file is not a usable {what}: its brackets nest too deeply.") from None
    except InputError:
        raise
    except ValueError as exc:   # e.g. an integer with too many digits
        raise InputError(f"The file is not a usable {what}: {exc}.") from None


def dump_stack_file(stack: Stack, *, name: str = DEFAULT_NAME, scenario: str = "",
                    swept_layer: int = 0, view: dict | None = None) -> str:
    """The text of a stack file: :func:`stack_to_dict` as JSON, 2-space indent, final newline.

    Parameters and errors are those of :func:`stack_to_dict`.

    Returns
    -------
    str
        UTF-8-ready JSON text.
    """
    data = stack_to_dict(stack, name=name, scenario=scenario, swept_layer=swept_layer, view=view)
    return json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def list_presets() -> list[tuple[str, str]]:
    """The shipped presets as ``(file stem, display name)``, sorted by file stem.

    Returns
    -------
    list of (str, str)
        Pass the stem to :func:`load_preset`.
    """
    return [(path.stem, load_preset(path.stem).name) for path in sorted(PRESET_DIR.glob("*.json"))]


def load_preset(name: str) -> StackFile:
    """Read one shipped preset.

    Parameters
    ----------
    name : str
        The preset's file stem, e.g. ``"thermal_oxide_on_silicon"``.

    Returns
    -------
    StackFile

    Raises
    ------
    InputError
        No preset of that name (the message lists them), or the file is invalid.
    """
    return load_shipped(PRESET_DIR, name, "preset", load_stack_file)


def load_shipped(folder, stem, what: str, loader):
    """Read the shipped file ``folder/stem.json`` with ``loader``; messages name it as ``what``."""
    stems = sorted(p.stem for p in folder.glob("*.json"))
    if not isinstance(stem, str) or stem not in stems:
        raise InputError(f"No {what} {_describe(stem)}; the {what}s are {', '.join(stems) or '(none)'}.")
    try:
        return loader((folder / f"{stem}.json").read_bytes())
    except InputError as exc:
        raise InputError(f"{what} {stem}: {exc}") from None
