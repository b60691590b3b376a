"""Plain colour words ("gold", "light blue", "straw") read as approximate colours.

Inspectors often say a film's colour in words. A word names a broad region of colours,
not a point, so each word here is an approximate display sRGB colour with a large
reading error (ΔE00): a search with a word treats every thickness whose colour lies
within that error as a possible answer. The table is this project's own approximation
of what each word means for the muted colours of thin films seen in white light
(interference colours on a reflecting substrate are less saturated than paints); it
is approximate and not a standard, and the page says so whenever a word is used.

Words are matched after lower-casing and reading hyphens, underscores and repeated
spaces as one space ("Light-Blue" is "light blue"); nothing else is guessed.

References
----------
None: the table is an approximation made for this tool (no published colour-name
standard is followed); IEC 61966-2-1:1999 defines the sRGB encoding of its values.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

__all__ = ["ColourWord", "colour_word", "colour_words", "WORD_ERROR_BROAD_DE", "WORD_ERROR_NARROW_DE"]

#: Reading error (ΔE00) of a bare hue word ("blue", "green"): it covers light and dark, dull and
#: vivid shades of its hue, about the distance to a neighbouring hue word (an approximation made here).
WORD_ERROR_BROAD_DE = 15.0
#: Reading error (ΔE00) of a word that names a shade ("light blue", "gold", "straw"): narrower than a
#: bare hue, still far wider than any instrument (an approximation made here).
WORD_ERROR_NARROW_DE = 12.0


@dataclass(frozen=True)
class ColourWord:
    """One colour word as an approximate colour.

    Attributes
    ----------
    word : str
        The word as listed (lower case).
    hex : str
        Approximate display sRGB colour, ``#rrggbb``.
    reading_error_de : float
        CIEDE2000 distance within which the colour the word stands for may lie.
    """

    word: str
    hex: str
    reading_error_de: float

    @property
    def rgb(self) -> np.ndarray:
        """Display sRGB, 0..1."""
        return np.array([int(self.hex[i:i + 2], 16) for i in (1, 3, 5)], dtype=float) / 255.0


_B, _N = WORD_ERROR_BROAD_DE, WORD_ERROR_NARROW_DE
#: word -> (approximate sRGB, reading error ΔE00); synonyms share a colour.
_TABLE = {
    "silver": ("#a2a6ae", _N), "grey": ("#8e8e92", _B), "gray": ("#8e8e92", _B),
    "tan": ("#a89070", _N), "brown": ("#84665a", _B), "gold": ("#b89a5a", _N), "straw": ("#b8ac7c", _N),
    "yellow": ("#c0b050", _B), "orange": ("#c08050", _B), "red": ("#a85a5a", _B), "pink": ("#c08aa0", _N),
    "magenta": ("#a05c9c", _N), "violet": ("#7a5aa8", _N), "purple": ("#7a4a8c", _B),
    "dark blue": ("#3c4c88", _N), "navy": ("#3c4c88", _N), "blue": ("#4a6cb0", _B),
    "light blue": ("#80a8d0", _N), "pale blue": ("#80a8d0", _N), "sky blue": ("#80a8d0", _N),
    "cyan": ("#40a0a8", _N), "turquoise": ("#40a0a8", _N), "teal": ("#3a8a88", _N),
    "green": ("#50a070", _B), "dark green": ("#3a7a5a", _N), "light green": ("#90b070", _N),
    "yellow green": ("#90b070", _N),
}
_WORDS = {w: ColourWord(w, h, e) for w, (h, e) in _TABLE.items()}
_SEPARATORS = re.compile(r"[\s_\-]+")
#: Longest text looked up as a word (characters): the longest word is far shorter.
_MAX_WORD_CHARS = 40


def colour_word(text) -> ColourWord | None:
    """The :class:`ColourWord` that ``text`` names, or None when it names none of :func:`colour_words`."""
    if not isinstance(text, str) or len(text) > _MAX_WORD_CHARS:
        return None
    return _WORDS.get(_SEPARATORS.sub(" ", text.strip().lower()))


def colour_words() -> list[ColourWord]:
    """Every word accepted, in the table's order."""
    return list(_WORDS.values())
