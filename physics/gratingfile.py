"""Grating files: one grating, the light on it and the spectrometer around it, as plain JSON.

The shipped grating presets (``presets/gratings/*.json``) use this format; version 1::

    {
      "format": "fringegauge-grating",
      "version": 1,
      "name": "1200 lines/mm blazed grating, compact spectrometer",
      "scenario": "Invented scenario: ...",
      "lines_per_mm": 1200,
      "kind": "reflection",
      "groove": "blazed",
      "blaze_angle_deg": 17.5,
      "duty_cycle": 0.5,
      "incidence_deg": 35.0,
      "band_nm": [400, 700],
      "focal_length_mm": 75,
      "illuminated_width_mm": 10,
      "detector_length_mm": 28.7,
      "pixel_pitch_um": 14
    }

An optional ``"rigorous"`` object holds the groove the rigorous efficiency is solved for:
``{"profile": "blazed", "depth_nm": null, "material": "Al", "polarization": "unpolarized"}``
(profile one of :data:`RIGOROUS_PROFILES`, depth in nm or null for the default, material one of
:data:`RIGOROUS_MATERIALS`, polarization one of :data:`RIGOROUS_POLARIZATIONS`); the duty cycle
and kind are the file's own fields. Files without it read as before.

Angles follow :mod:`physics.grating` (m·λ = d·(sin α + sin β), degrees from the grating
normal). ``presets/README.md`` lists every field with its type and range (the "Gratings"
section); :data:`LIMITS` holds the ranges, and the page checks typed values against the same
table.

Reading never evaluates anything: the text is parsed as JSON and every field is checked; any
problem raises :class:`~physics.errors.InputError` whose message starts with the offending
field (e.g. ``band_nm[1]``) and says what is allowed.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from .errors import InputError
from .stackfile import (_check_fields, _fail, _got, _number, _string, load_shipped,
                        read_json_document)

__all__ = ["GratingFile", "grating_from_dict", "load_grating_file", "load_grating_preset", "dump_grating_file",
           "list_grating_presets", "FORMAT", "VERSION", "LIMITS", "KINDS", "GROOVES",
           "MAX_FILE_BYTES", "GRATING_PRESET_DIR", "RIGOROUS_PROFILES", "RIGOROUS_MATERIALS",
           "RIGOROUS_POLARIZATIONS", "RIGOROUS_DEPTH_NM"]

#: Value of the "format" field.
FORMAT = "fringegauge-grating"
#: The one format version this module reads.
VERSION = 1
#: Largest file accepted, bytes, checked before parsing.
MAX_FILE_BYTES = 100_000
MAX_NAME_CHARS = 200
MAX_SCENARIO_CHARS = 1000
DEFAULT_NAME = "untitled grating"
#: Where the shipped grating presets live.
GRATING_PRESET_DIR = Path(__file__).resolve().parent.parent / "presets" / "gratings"

KINDS = ("reflection", "transmission")
GROOVES = ("lamellar", "blazed")
#: (lowest, highest, unit) of each numeric field, both ends allowed. band_nm's limits apply to
#: each end.
LIMITS = {
    "lines_per_mm": (10.0, 10_000.0, "lines/mm"),
    "blaze_angle_deg": (0.1, 89.0, "deg"),
    "duty_cycle": (0.01, 0.99, ""),
    "incidence_deg": (-89.9, 89.9, "deg"),
    "band_nm": (100.0, 20_000.0, "nm"),
    "focal_length_mm": (1.0, 10_000.0, "mm"),
    "illuminated_width_mm": (0.001, 1000.0, "mm"),
    "detector_length_mm": (0.1, 1000.0, "mm"),
    "pixel_pitch_um": (0.1, 1000.0, "µm"),
}

#: The optional "rigorous" object: groove profiles, materials (physics.material names) and polarizations
#: the page offers for the rigorous efficiency, and the depth range (nm, both ends allowed).
RIGOROUS_PROFILES = ("lamellar", "sinusoidal", "blazed")
RIGOROUS_MATERIALS = ("Al", "Ag", "Au", "SiO2")
RIGOROUS_POLARIZATIONS = ("unpolarized", "TE", "TM")
RIGOROUS_DEPTH_NM = (1.0, 5000.0)
_RIGOROUS_FIELDS = ("profile", "depth_nm", "material", "polarization")

_FIELDS = ("format", "version", "name", "scenario", "lines_per_mm", "kind", "groove", "blaze_angle_deg",
           "duty_cycle", "incidence_deg", "band_nm", "focal_length_mm", "illuminated_width_mm",
           "detector_length_mm", "pixel_pitch_um", "rigorous")
_REQUIRED = tuple(f for f in _FIELDS if f not in ("name", "scenario", "rigorous"))


@dataclass(frozen=True)
class GratingFile:
    """A grating read from a grating file (units in the field names; angles in degrees)."""

    name: str
    scenario: str
    lines_per_mm: float
    kind: str
    groove: str
    blaze_angle_deg: float | None
    duty_cycle: float
    incidence_deg: float
    band_nm: tuple
    focal_length_mm: float
    illuminated_width_mm: float
    detector_length_mm: float
    pixel_pitch_um: float
    rigorous: dict | None = None    #: {"profile", "depth_nm" (None: default), "material", "polarization"} or None


def _rigorous(data) -> dict:
    """Check the optional "rigorous" object; every field is required in it."""
    if not isinstance(data, dict):
        _fail("rigorous", f"must be an object {{\"profile\": ..., \"depth_nm\": ..., \"material\": ..., "
                          f"\"polarization\": ...}}, got {_got(data)}.")
    _check_fields("rigorous", data, _RIGOROUS_FIELDS, _RIGOROUS_FIELDS)
    depth = data["depth_nm"]
    if depth is not None:
        depth = _number("rigorous.depth_nm", depth, *RIGOROUS_DEPTH_NM, "nm")
    return {"profile": _choice("rigorous.profile", data["profile"], RIGOROUS_PROFILES), "depth_nm": depth,
            "material": _choice("rigorous.material", data["material"], RIGOROUS_MATERIALS),
            "polarization": _choice("rigorous.polarization", data["polarization"], RIGOROUS_POLARIZATIONS)}


def _limited(where: str, value) -> float:
    lo, hi, unit = LIMITS[where.split("[")[0]]
    return _number(where, value, lo, hi, unit)


def _choice(where: str, value, allowed) -> str:
    if not isinstance(value, str) or value not in allowed:
        _fail(where, f"must be one of {', '.join(repr(a) for a in allowed)} (a string), got {_got(value)}.")
    return value


def grating_from_dict(data) -> GratingFile:
    """Check a parsed grating file (the top-level JSON object) and build its :class:`GratingFile`.

    ``name`` and ``scenario`` are optional (defaults "untitled grating" and ""); every other
    field is required. ``blaze_angle_deg`` is a number for blazed grooves and a number or null
    for lamellar ones (where it is not used).

    Raises
    ------
    InputError
        A field missing, unknown, of the wrong type or out of range; the message starts with
        the field's name.
    """
    if not isinstance(data, dict):
        raise InputError(f"A grating file must hold one JSON object {{...}} at the top level; got {_got(data)}.")
    _check_fields("file", data, _FIELDS, _REQUIRED)
    if not isinstance(data["format"], str) or data["format"] != FORMAT:
        _fail("format", f"must be {FORMAT!r}, got {_got(data['format'])}; this is not a fringegauge "
                        "grating file or its header is damaged.")
    version = data["version"]
    if isinstance(version, bool) or not isinstance(version, int) or version != VERSION:
        _fail("version", f"must be the whole number {VERSION}, got {_got(version)}.")
    name = _string("name", data.get("name", DEFAULT_NAME), MAX_NAME_CHARS)
    scenario = _string("scenario", data.get("scenario", ""), MAX_SCENARIO_CHARS)
    kind = _choice("kind", data["kind"], KINDS)
    groove = _choice("groove", data["groove"], GROOVES)
    blaze = data["blaze_angle_deg"]
    if blaze is None:
        if groove == "blazed":
            _fail("blaze_angle_deg", "is null but the groove is 'blazed'; give the facet angle in degrees "
                                     f"({LIMITS['blaze_angle_deg'][0]:g} to {LIMITS['blaze_angle_deg'][1]:g}).")
    else:
        blaze = _limited("blaze_angle_deg", blaze)
    band = data["band_nm"]
    if not isinstance(band, list) or len(band) != 2:
        _fail("band_nm", f"must be a list of two wavelengths [short, long] in nm, got {_got(band)}.")
    lo, hi = (_limited(f"band_nm[{i}]", v) for i, v in enumerate(band))
    if not lo < hi:
        _fail("band_nm", f"[{lo:g}, {hi:g}]: the short end must come first and be below the long end.")
    return GratingFile(
        name=name, scenario=scenario, lines_per_mm=_limited("lines_per_mm", data["lines_per_mm"]), kind=kind,
        groove=groove, blaze_angle_deg=blaze, duty_cycle=_limited("duty_cycle", data["duty_cycle"]),
        incidence_deg=_limited("incidence_deg", data["incidence_deg"]), band_nm=(lo, hi),
        focal_length_mm=_limited("focal_length_mm", data["focal_length_mm"]),
        illuminated_width_mm=_limited("illuminated_width_mm", data["illuminated_width_mm"]),
        detector_length_mm=_limited("detector_length_mm", data["detector_length_mm"]),
        pixel_pitch_um=_limited("pixel_pitch_um", data["pixel_pitch_um"]),
        rigorous=_rigorous(data["rigorous"]) if "rigorous" in data else None)


def load_grating_file(content: bytes | str) -> GratingFile:
    """Parse and check the text of a grating file (str, or bytes decoded as UTF-8; at most 100 kB).

    Raises
    ------
    InputError
        Too large, not UTF-8, not JSON (with line and column), or any check of
        :func:`grating_from_dict`.
    """
    data = read_json_document(content, "grating file", MAX_FILE_BYTES)
    return grating_from_dict(data)


def dump_grating_file(gf: GratingFile) -> str:
    """The text of a grating file for ``gf`` (2-space JSON, final newline); it reads back equal.

    Raises
    ------
    InputError
        A field out of range (checked by reading the text back, so nothing invalid is written).
    """
    data = {"format": FORMAT, "version": VERSION, "name": gf.name, "scenario": gf.scenario,
            "lines_per_mm": gf.lines_per_mm, "kind": gf.kind, "groove": gf.groove,
            "blaze_angle_deg": gf.blaze_angle_deg, "duty_cycle": gf.duty_cycle,
            "incidence_deg": gf.incidence_deg, "band_nm": list(gf.band_nm),
            "focal_length_mm": gf.focal_length_mm, "illuminated_width_mm": gf.illuminated_width_mm,
            "detector_length_mm": gf.detector_length_mm, "pixel_pitch_um": gf.pixel_pitch_um}
    if gf.rigorous is not None:
        data["rigorous"] = {k: gf.rigorous.get(k) for k in _RIGOROUS_FIELDS}
    text = json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    load_grating_file(text)
    return text


def list_grating_presets() -> list[tuple[str, str]]:
    """The shipped grating presets as ``(file stem, display name)``, sorted by stem."""
    return [(p.stem, load_grating_preset(p.stem).name) for p in sorted(GRATING_PRESET_DIR.glob("*.json"))]


def load_grating_preset(stem: str) -> GratingFile:
    """Read one shipped grating preset by its file stem (e.g. ``"optical_disc_track"``).

    Raises
    ------
    InputError
        No preset of that name (the message lists them), or the file is invalid.
    """
    return load_shipped(GRATING_PRESET_DIR, stem, "grating preset", load_grating_file)
