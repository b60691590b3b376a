"""The colour tab's reading of a colour: how it was read (its declared reading error) and the sentences of
the answer (the viewing conditions, the stack searched, the tolerance verdict).

Every number comes from ``physics.inverse``; this module only names and words it.
"""

from __future__ import annotations

import json

import param

from physics.inverse import AMBIGUOUS_DE, MATCH_DE_MAX, READING_ERROR_MAX_DE

from .explorer import _spec_text

#: Colour reading errors (ΔE00) by how the colour was read (common practice): a colour judged by eye or
#: read off a display is good to about 5 (a difference "clearly seen side by side"); a camera without a
#: colour calibration to about 4; a calibrated camera or a colorimeter to about one just-noticeable
#: difference, :data:`physics.inverse.AMBIGUOUS_DE`.
READING_PRESETS = {"by eye / on a display": 5.0, "uncalibrated camera": 4.0, "calibrated camera": AMBIGUOUS_DE}
#: The preset name for a reading error typed by hand.
CUSTOM_READING = "custom"


class ColourReading(param.Parameterized):
    """How the colour given on the colour tab was read: its reading error decides which thicknesses are possible."""

    reading = param.Selector(default="by eye / on a display", objects=[*READING_PRESETS, CUSTOM_READING],
                             doc="How the colour was read; each choice sets its usual reading error (common practice).")
    reading_error_de = param.Number(default=READING_PRESETS["by eye / on a display"],
                                    bounds=(0.1, READING_ERROR_MAX_DE),
                                    doc="Colour reading error, ΔE00: every thickness of another fringe order whose "
                                        "colour is within this of the best match is a possible answer.")

    @param.depends("reading", watch=True)
    def _preset(self):
        if self.reading in READING_PRESETS:
            self.reading_error_de = READING_PRESETS[self.reading]

    @param.depends("reading_error_de", watch=True)
    def _custom(self):
        if READING_PRESETS.get(self.reading) != self.reading_error_de:
            self.reading = CUSTOM_READING


def _searched_stack_text(s, window) -> str:
    """The stack with the unknown layer named by the thickness range searched, not by the explorer's
    thickness: 'air / SiO2 (unknown, searched 0–450 nm) / Si'."""
    d = json.loads(s.stack_json)
    parts = [_spec_text(d["ambient"])]
    for i, layer in enumerate(d["layers"]):
        name = _spec_text(layer["material"])
        parts.append(f"{name} (unknown, searched {window[0]:g}–{window[1]:g} nm)" if i == s.swept_layer
                     else f"{name} {layer['thickness_nm']:g} nm")
    sub = _spec_text(d["substrate"])
    if d.get("substrate_thickness_mm"):
        sub += f" ({d['substrate_thickness_mm']:g} mm plate)"
    return " / ".join([*parts, sub])


def _viewing_text(s) -> str:
    """The viewing conditions an answer was computed for, as a phrase."""
    return (f"at {s.angle_deg:g}° from the normal, lamp {s.illuminant}, CIE {s.observer}° observer, {s.polarization}"
            + (f" light, viewing cone NA {s.na:g}" if s.na else " light"))


def _tolerance_verdict(cands, nominal: float, tol: float, kind: str) -> tuple[str, str]:
    """The in-tolerance reading of a search that has a nominal and a tolerance: (alert kind, sentence)."""
    span = f"{nominal:g} ± {tol:g} nm"
    best = cands[0]
    if best.in_tolerance:
        return kind, f" The best match is within {span}."
    inside = [(i, c) for i, c in enumerate(cands) if c.in_tolerance and c.delta_e <= MATCH_DE_MAX]
    if not inside:
        return "danger", f" Out of tolerance: no acceptable match lies within {span}."
    i, c = inside[0]
    return "warning", (f" The best match is outside {span}, but #{i + 1} ({c.thickness_nm:.0f} nm, ΔE00 "
                       f"{c.delta_e:.1f}) is inside it: colour alone cannot tell which.")
