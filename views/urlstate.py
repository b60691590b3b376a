"""The page address carries the whole view state, so a link pasted into a lab chat opens the same view.

The film explorer's fields keep their short keys (``d``, ``angle``, ``stack``, …; links made
before the other tabs joined still open). Each other tab's fields carry a prefix of their own
(``c_`` colour → thickness, ``s_`` spectrum → thickness, ``g_`` gratings) and ``tab`` names the
open tab. A tab never opened on the page adds nothing (it shows its defaults), so a link stays
short. The stack travels as compressed JSON in URL-safe base64 (compact, and never mistaken for
a number or an object by URL parsers); the other fields as plain text. Reading a link validates
every field like typed input: a bad field is reported by name and skipped, never applied; a key
this page does not know is ignored with a note; a link longer than :data:`MAX_LINK_CHARS` is
refused whole. Uploaded files (photos, spectra, lamp files other than the explorer's lamp) never
travel in a link.
"""

from __future__ import annotations

import base64
import json
import math
import re
import zlib
from dataclasses import dataclass
from html import unescape
from typing import Callable
from urllib.parse import parse_qsl, urlencode

import param

from physics import InputError
from physics.stackfile import list_presets, load_stack_file, read_json_document

from .state import ExplorerState, parse_number

#: State field → URL key.
URL_KEYS = {
    "stack_json": "stack", "swept_layer": "layer", "thickness_nm": "d", "thickness_max_nm": "dmax",
    "angle_deg": "angle", "polarization": "pol", "illuminant": "lamp", "spd_json": "spd",
    "observer": "obs", "na": "na", "brightness": "bright",
}
#: Explorer fields a link carries only when they differ from their defaults (so a link of a plain view stays
#: short): the brightness reference, the coating read-outs and checks, the halogen's colour temperature.
URL_KEYS_WHEN_SET = {
    "brightness_reference": "bref", "normalize_min_nm": "nmin", "normalize_max_nm": "nmax",
    "thickness_scale_pct": "dscale", "band_min_nm": "band0", "band_max_nm": "band1", "spectrum_view": "view",
    "tolerance_pct": "tol", "tolerance_trials": "trials", "lamp_cct_k": "cct",
    "polarizer": "polz", "polarizer_deg": "polz_deg", "analyzer": "anlz", "analyzer_deg": "anlz_deg",
}
#: Longest URL value read (characters); a link is not a file upload.
MAX_VALUE_CHARS = 20_000
#: Largest decompressed stack accepted (bytes).
MAX_STACK_BYTES = 200_000
#: Longest query a link may have (characters): a 12-layer stack with a lamp spectrum fits; browsers and
#: chat tools start cutting addresses not far above this, and a cut link would open a different view.
MAX_LINK_CHARS = 30_000
#: Longest text a link may type into one field of a tab (characters): colours, numbers, names.
MAX_TEXT_CHARS = 200
#: Key of the open tab, and the word each tab goes by in a link.
TAB_KEY = "tab"
TAB_WORDS = {"Film explorer": "film", "Colour → thickness": "colour", "Spectrum → thickness": "spectrum",
             "Gratings": "gratings", "Lab library": "library"}
#: Key of the stack's name (the preset, file or library item it was loaded from).
NAME_KEY = "name"
#: Query keys a link from another program may carry that mean nothing to the page (Bokeh's own).
FOREIGN_PREFIXES = ("bokeh-",)


def encode_stack(stack_json: str) -> str:
    return base64.urlsafe_b64encode(zlib.compress(stack_json.encode("utf-8"), 9)).decode("ascii").rstrip("=")


def decode_stack(text: str) -> str:
    try:
        raw = base64.urlsafe_b64decode(text + "=" * (-len(text) % 4))
        d = zlib.decompressobj()
        data = d.decompress(raw, MAX_STACK_BYTES)
        if d.unconsumed_tail:
            raise InputError("The stack in the link is too large; save it as a stack file and share the file.")
        stack_json = data.decode("utf-8-sig")            # a leading BOM is not part of the JSON
        load_stack_file(stack_json)                          # the same checks as an uploaded file
        return stack_json
    except InputError:
        raise
    except Exception:
        raise InputError("The stack in the link is damaged (it was cut or edited); ask for the link again.") from None


def state_to_query(state: ExplorerState) -> str:
    """The '?…' part of the page address for this state."""
    values = {}
    for name, key in URL_KEYS.items():
        v = getattr(state, name)
        if name == "stack_json":
            v = encode_stack(v)
        elif name == "spd_json" and (not v or state.illuminant != "custom"):
            continue
        elif isinstance(v, float):
            v = f"{v:.6g}"
        values[key] = str(v)
    for name, key in URL_KEYS_WHEN_SET.items():
        v = getattr(state, name)
        if v != state.param[name].default:
            values[key] = f"{v:.6g}" if isinstance(v, float) else str(v)
    if state.preset_name:
        values[NAME_KEY] = state.preset_name[:MAX_TEXT_CHARS]
    return "?" + urlencode(values)


def apply_query(state: ExplorerState, query) -> list[str]:
    """Apply a '?…' string (or a {key: value} mapping) to ``state``; returns messages for skipped fields.

    Never raises for a bad link: each bad field is skipped with a plain-text sentence that does
    not repeat the value itself (a link is text from anyone).
    """
    if isinstance(query, str):
        items = dict(parse_qsl(query.lstrip("?"), keep_blank_values=True))
    else:
        items = {k: (v[0] if v else "") if isinstance(v, (list, tuple)) else v for k, v in query.items()}
        items = {k: (v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v)) for k, v in items.items()}
    errors, update = [], {}
    for name, key in (URL_KEYS | URL_KEYS_WHEN_SET).items():
        if key not in items:
            continue
        try:
            value = _field_value(state, name, items[key])
            if name == "spd_json":
                state.set_spd(*value)
                continue
            update[name] = value
        except InputError as exc:
            errors.append(f"Link field '{key}' was not applied: {exc}".rstrip(".") + ".")
    if update.get("illuminant") == "custom" and not state.spd_json:
        update.pop("illuminant")
        errors.append("Link field 'lamp' was not applied: 'custom' needs the lamp spectrum (field 'spd'), "
                      "which the link does not carry.")
    if "stack_json" in update or "swept_layer" in update:
        n = len(json.loads(update.get("stack_json", state.stack_json) or '{"layers": []}')["layers"])
        if update.get("swept_layer", state.swept_layer) > max(n - 1, 0):
            if "swept_layer" in update:
                errors.append(f"Link field 'layer' was not applied: the stack has {n} layer(s); "
                              f"layer {update['swept_layer'] + 1} does not exist.")
            update["swept_layer"] = 0
    if "stack_json" in update or NAME_KEY in items:
        update["preset_name"] = _link_name(items.get(NAME_KEY, ""), update.get("stack_json", state.stack_json))
    if "thickness_nm" in update and "thickness_max_nm" not in update:
        update["thickness_max_nm"] = max(state.thickness_max_nm, update["thickness_nm"])
    state.param.update(**update)
    return errors


def _field_value(state: ExplorerState, name: str, text: str):
    """The checked value of one link field; InputError with a sentence (without the value) if bad."""
    if len(text) > MAX_VALUE_CHARS:
        raise InputError(f"the value is longer than {MAX_VALUE_CHARS:,} characters")
    p = state.param[name]
    if name == "stack_json":
        return decode_stack(text)
    if name == "spd_json":
        return _decode_spd(text)
    try:
        if isinstance(p, param.Integer):
            value = int(text.strip()) if text.strip().isascii() else None
        elif isinstance(p, param.Number):
            value = float(text.strip()) if text.strip().isascii() else None
        else:
            value = text
    except ValueError:
        value = None
    if isinstance(p, param.Selector):
        if value not in p.objects:
            raise InputError(f"give one of {', '.join(map(str, p.objects))}")
        return value
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        raise InputError("it is not a " + ("whole number" if isinstance(p, param.Integer) else "finite number"))
    lo, hi = p.bounds or (None, None)
    if (lo is not None and value < lo) or (hi is not None and value > hi):
        raise InputError(f"it must lie from {lo:g} to {hi:g}" if None not in (lo, hi)
                         else f"it must be at least {lo:g}" if lo is not None else f"it must be at most {hi:g}")
    return value


def _decode_spd(text: str):
    """(wavelengths, values) of a lamp spectrum written as [[nm, ...], [value, ...]]."""
    data = read_json_document(text, "lamp spectrum", 4 * MAX_VALUE_CHARS)
    if (not isinstance(data, list) or len(data) != 2 or not all(isinstance(c, list) for c in data)
            or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for c in data for x in c)):
        raise InputError("the lamp spectrum must be [[wavelengths in nm], [values]]")
    return data


def _link_name(text: str, stack_json: str) -> str:
    """The stack's name as a link gives it: a preset's name only while the link's stack is that preset's
    (so the preset menu never claims a preset that is not shown); any other name as plain text."""
    name = _plain_text(text)
    if name in dict(list_presets()):
        probe = ExplorerState()
        probe.load_preset(name)
        return name if probe.stack_json == stack_json else ""
    return name


def _plain_text(text: str) -> str:
    """``text`` without control characters, at most :data:`MAX_TEXT_CHARS` long."""
    return "".join(c for c in str(text) if c.isprintable())[:MAX_TEXT_CHARS].strip()


# ---------------------------------------------------------------------- the other tabs
@dataclass(frozen=True)
class LinkField:
    """One setting of a tab as a link carries it: ``read()`` gives its text (None: leave it out of the link);
    ``write(text)`` applies a link's text and returns None, or the sentence saying why it was not applied."""

    key: str
    label: str
    read: Callable[[], "str | None"]
    write: Callable[[str], "str | None"]
    source: object = None            #: the widget (with a ``value``) whose changes the page address follows


def _message_text(field) -> str | None:
    """The plain text of a :class:`views.explorer.Field`'s message, or None when it shows none."""
    if not field.message.visible or not field.message.object:
        return None
    return unescape(re.sub(r"<[^>]+>", "", field.message.object)).strip() or None


def text_field(key: str, label: str, field, number: tuple | None = None) -> LinkField:
    """A typed field (:class:`views.explorer.Field`). ``number`` = (lowest, highest[, unit]) checks the text as a
    number first; either way the field's own check runs, and a message it shows is the link's message."""

    def write(text):
        text = _plain_text(text)
        if number is not None and text:
            try:
                parse_number(text, label, *number)
            except InputError as exc:
                return str(exc)
        field.input.value = text
        return _message_text(field)

    return LinkField(key, label, lambda: field.input.value.strip() or None, write, field.input)


def choice_field(key: str, label: str, widget) -> LinkField:
    """A Select or button group: the link carries its value (not its words)."""
    def values():
        opts = widget.options
        return list(opts.values()) if isinstance(opts, dict) else list(opts)

    def write(text):
        match = next((v for v in values() if str(v) == text), None)
        if match is None:
            return f"give one of {', '.join(str(v) for v in values())}"
        widget.value = match
        return None

    return LinkField(key, label, lambda: str(widget.value), write, widget)


def tick_field(key: str, label: str, box) -> LinkField:
    """A tick box (``value`` True/False) as "1" or "0"."""
    def write(text):
        if text not in ("0", "1"):
            return "give 1 (ticked) or 0 (not ticked)"
        box.value = text == "1"
        return None

    return LinkField(key, label, lambda: "1" if box.value else "0", write, box)


def param_field(key: str, label: str, owner, name: str) -> LinkField:
    """A declared parameter ``name`` of ``owner`` (a param.Parameterized), checked like the explorer's link
    fields; carried only when it differs from its default (None: never carried)."""
    p = owner.param[name]

    def read():
        v = getattr(owner, name)
        if v is None or v == p.default:
            return None
        return f"{v:.6g}" if isinstance(v, float) else str(v)

    def write(text):
        try:
            if isinstance(p, param.Selector):
                value = next((v for v in p.objects if str(v) == text), None)
                if value is None:
                    raise InputError(f"give one of {', '.join(map(str, p.objects))}")
            else:
                value = _field_value(owner, name, text)
            owner.param.update({name: value})
        except InputError as exc:
            return str(exc)
        except ValueError as exc:        # a bound the declaration checks that the text did not show
            return str(exc).split(":")[0]
        return None

    return LinkField(key, label, read, write, (owner, name))


def fields_state(fields) -> dict[str, str]:
    """{key: text} of every field that has something to carry."""
    return {f.key: v for f in fields if (v := f.read()) is not None}


def apply_fields(fields, items: dict) -> list[str]:
    """Apply the link's texts to ``fields`` in their order; a sentence per field not applied."""
    errors = []
    for f in fields:
        if f.key in items:
            why = f.write(items[f.key])
            if why:
                errors.append(_skipped(f.key, f.label, why))
    return errors


def _skipped(key: str, label: str, why: str) -> str:
    return f"Link field '{key}' ({label}) was not applied: {why}".rstrip(".") + "."


def widget_fields(section, table) -> list[LinkField]:
    """:class:`LinkField` s of ``section``'s widgets from rows (key, label, attribute name, kind[, number]):
    kind "text" (a Field; ``number`` = (lowest, highest) checks it as a number), "choice", "tick", or "param"
    (the attribute is a dotted path to a declared parameter: ``"reading.reading_error_de"``)."""
    make = {"text": text_field, "choice": choice_field, "tick": tick_field}
    out = []
    for key, label, attr, kind, *rest in table:
        if kind == "param":
            *path, name = attr.split(".")
            owner = section
            for part in path:
                owner = getattr(owner, part)
            out.append(param_field(key, label, owner, name))
        else:
            out.append(make[kind](key, label, getattr(section, attr), *rest))
    return out


#: The colour → thickness inputs a link carries (typed colours, tilt, window, target, photo reference);
#: the photo and its boxes are an upload and stay out of links.
COLOUR_TAB_LINK = (("c_colour", "Observed colour", "colour", "text"),
                   ("c_colour2", "Tilted colour", "colour2", "text"),
                   ("c_tilt", "Tilt angle", "angle2", "text"),
                   ("c_from", "Window from", "win_lo", "text"),
                   ("c_to", "Window to", "win_hi", "text"),
                   ("c_nominal", "Nominal", "nominal", "text"),
                   ("c_tol", "Tolerance", "tolerance", "text"),
                   ("c_ref", "Photo reference", "reference", "choice"),
                   ("c_grey", "Grey card reflectance", "grey", "text", (0.0, 1.0)),
                   ("c_read", "Colour read", "reading.reading", "param"),
                   ("c_error", "Colour reading error", "reading.reading_error_de", "param"),
                   ("c_wafer", "Wafer diameter", "tools.settings.diameter_mm", "param"),
                   ("c_pixel", "Pixel size", "tools.settings.mm_per_px", "param"),
                   ("c_edge", "Edge exclusion", "tools.settings.edge_exclusion_mm", "param"),
                   ("c_sites", "Sites", "tools.settings.pattern", "param"),
                   ("c_cam", "Camera calibration", "camcal.settings.method", "param"),
                   ("c_cam_from", "Calibrate from", "camcal.settings.source", "param"),
                   ("c_cam_model", "Calibration model", "camcal.settings.model", "param"),
                   ("c_cam_na", "Objective NA", "camcal.settings.na", "param"),
                   ("c_denoise", "Denoise", "camcal.settings.denoise", "param"))


class _Fields:
    """A section whose link is a list of :class:`LinkField` (``fields_of(section)``)."""

    def __init__(self, fields):
        self.fields = fields

    def link_state(self) -> dict[str, str]:
        return fields_state(self.fields)

    def apply_link_state(self, items: dict) -> list[str]:
        return apply_fields(self.fields, items)

    def link_keys(self) -> set[str]:
        return {f.key for f in self.fields}

    def follow(self, callback) -> None:
        for f in self.fields:
            if isinstance(f.source, tuple):                    # a declared parameter: (owner, name)
                f.source[0].param.watch(callback, f.source[1])
            elif f.source is not None:
                f.source.param.watch(callback, "value")


#: Each tab's key prefix in a link, and how to reach its link from its section.
SECTION_PREFIXES = {"Colour → thickness": "c_", "Spectrum → thickness": "s_", "Gratings": "g_"}


def _section_link(title: str, section):
    """The link of a tab's section: its own ``link_state``, else its ``link_fields()``, else (the colour tab)
    :data:`COLOUR_TAB_LINK`."""
    if hasattr(section, "link_state"):
        return section
    if hasattr(section, "link_fields"):
        return _Fields(section.link_fields())
    return _Fields(widget_fields(section, COLOUR_TAB_LINK))


class PageLink:
    """The whole page's link: the explorer's state, every opened tab's settings, and the open tab.

    ``tabs`` maps a tab title to its :class:`views.pagebuild.BuiltOnFirstOpen` (a section with
    ``link_state()``, ``apply_link_state(items)`` and ``link_keys()``); ``switcher`` is the page's ``pn.Tabs`` (None in a
    script: no open tab then) and ``titles`` its titles in order.
    """

    def __init__(self, explorer, tabs: dict, switcher=None, titles=()):
        self.ex, self.tabs, self.switcher, self.titles = explorer, tabs, switcher, list(titles)

    def follow(self, title: str, section, callback) -> None:
        """Call ``callback()`` whenever a setting of ``section`` (the tab ``title``) that the link carries
        changes (the page calls this as each tab is built, to keep its address current)."""
        link = _section_link(title, section)
        if hasattr(link, "follow"):
            link.follow(callback)
        elif hasattr(link, "on_change"):
            link.on_change.append(callback)

    def open_tab(self) -> str:
        if self.switcher is None or not self.titles:
            return "Film explorer"
        return self.titles[self.switcher.active]

    def link_state(self) -> dict[str, str]:
        """{query key: text} of everything the page shows that a link carries."""
        items = dict(parse_qsl(state_to_query(self.ex.state)[1:], keep_blank_values=True))
        for title, tab in self.tabs.items():
            if title in SECTION_PREFIXES and tab.built:
                items.update(_section_link(title, tab.get()).link_state())
        tab = self.open_tab()
        if tab != "Film explorer":
            items[TAB_KEY] = TAB_WORDS.get(tab, "film")
        return items

    def query(self) -> str:
        """The '?…' part of the page address; a lamp spectrum too long for a link is left out (the lamp then
        reads "custom" without it, and opening the link says so)."""
        items = self.link_state()
        q = "?" + urlencode(items)
        if len(q) > MAX_LINK_CHARS:
            items.pop(URL_KEYS["spd_json"], None)
            q = "?" + urlencode(items)
        return q

    def apply_link_state(self, query) -> list[str]:
        """Apply a link ('?…' or a {key: value} mapping, as Panel's session arguments are) to every tab it
        names; returns a sentence per field not applied or key ignored. Never raises for a bad link."""
        items = _query_items(query)
        size = sum(len(k) + len(v) + 2 for k, v in items.items())
        if size > MAX_LINK_CHARS:
            return [f"This link is {size:,} characters long, more than the {MAX_LINK_CHARS:,} a link may have "
                    "(it was probably joined to other text or edited); nothing from it was applied. Ask for the "
                    "link again, or share the stack as a file."]
        known = set(URL_KEYS.values()) | set(URL_KEYS_WHEN_SET.values()) | {NAME_KEY, TAB_KEY}
        errors = apply_query(self.ex.state, {k: v for k, v in items.items() if k in known})
        self.ex._sync_widgets()
        for title, prefix in SECTION_PREFIXES.items():
            mine = {k: v for k, v in items.items() if k.startswith(prefix)}
            if mine and title in self.tabs:
                section = _section_link(title, self.tabs[title].get())
                errors += section.apply_link_state(mine)
                known |= section.link_keys()
        unknown = sorted(k for k in items if k not in known and not k.startswith(FOREIGN_PREFIXES))
        if unknown:
            shown = ", ".join(f"'{_plain_text(k)[:40]}'" for k in unknown[:5]) + (" …" if len(unknown) > 5 else "")
            errors.append(f"This page does not know the link field{'s' if len(unknown) > 1 else ''} {shown} "
                          "(a newer or older version of the page may have made it); ignored.")
        if TAB_KEY in items:
            words = {w: t for t, w in TAB_WORDS.items()}
            title = words.get(items[TAB_KEY])
            if title is None or title not in self.titles:
                errors.append(_skipped(TAB_KEY, "open tab", f"give one of {', '.join(w for t, w in TAB_WORDS.items() if t in self.titles)}"))
            elif self.switcher is not None:
                self.switcher.active = self.titles.index(title)
        return errors


def _query_items(query) -> dict[str, str]:
    if isinstance(query, str):
        return dict(parse_qsl(query.lstrip("?")[:4 * MAX_LINK_CHARS], keep_blank_values=True))
    items = {k: (v[0] if v else "") if isinstance(v, (list, tuple)) else v for k, v in query.items()}
    return {str(k): (v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v)) for k, v in items.items()}
