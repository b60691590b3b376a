"""The page address carries the whole view state, so a link pasted into a lab chat opens the same view.

The stack travels as compressed JSON in URL-safe base64 (compact, and never
mistaken for a number or an object by URL parsers); the other fields as plain
text. Reading a link validates every field like typed input: a bad field is
reported and skipped, never applied.
"""

from __future__ import annotations

import base64
import json
import math
import zlib
from urllib.parse import parse_qsl, urlencode

import param

from physics import InputError
from physics.stackfile import load_stack_file, read_json_document

from .state import ExplorerState

#: State field → URL key.
URL_KEYS = {
    "stack_json": "stack", "swept_layer": "layer", "thickness_nm": "d", "thickness_max_nm": "dmax",
    "angle_deg": "angle", "polarization": "pol", "illuminant": "lamp", "spd_json": "spd",
    "observer": "obs", "na": "na", "brightness": "bright",
}
#: Longest URL value read (characters); a link is not a file upload.
MAX_VALUE_CHARS = 20_000
#: Largest decompressed stack accepted (bytes).
MAX_STACK_BYTES = 200_000


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
    for name, key in URL_KEYS.items():
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
    if "stack_json" in update:
        update["preset_name"] = ""                 # a link carries a stack, not which preset it came from
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
    lo, hi = p.bounds
    if value < lo or value > hi:
        raise InputError(f"it must lie from {lo:g} to {hi:g}")
    return value


def _decode_spd(text: str):
    """(wavelengths, values) of a lamp spectrum written as [[nm, ...], [value, ...]]."""
    data = read_json_document(text, "lamp spectrum", 4 * MAX_VALUE_CHARS)
    if (not isinstance(data, list) or len(data) != 2 or not all(isinstance(c, list) for c in data)
            or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for c in data for x in c)):
        raise InputError("the lamp spectrum must be [[wavelengths in nm], [values]]")
    return data
