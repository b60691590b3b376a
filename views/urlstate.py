"""The page address carries the whole view state, so a link pasted into a lab chat opens the same view.

The stack travels as compressed JSON in URL-safe base64 (compact, and never
mistaken for a number or an object by URL parsers); the other fields as plain
text. Reading a link validates every field like typed input: a bad field is
reported and skipped, never applied.
"""

from __future__ import annotations

import base64
import json
import zlib
from urllib.parse import parse_qsl, urlencode

from physics import InputError
from physics.stackfile import load_stack_file

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
            raise InputError("the stack in the link is too large")
        stack_json = data.decode("utf-8")
        load_stack_file(stack_json)                          # the same checks as an uploaded file
        return stack_json
    except InputError:
        raise
    except Exception:
        raise InputError("the stack in the link is damaged (it was cut or edited); ask for the link again") from None


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
    """Apply a '?…' string (or a {key: value} mapping) to ``state``; returns messages for skipped fields."""
    if isinstance(query, str):
        items = dict(parse_qsl(query.lstrip("?"), keep_blank_values=True))
    else:
        items = {k: (v[0] if isinstance(v, (list, tuple)) else v) for k, v in query.items()}
        items = {k: (v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v)) for k, v in items.items()}
    errors, update = [], {}
    for name, key in URL_KEYS.items():
        if key not in items:
            continue
        text = items[key]
        try:
            if len(text) > MAX_VALUE_CHARS:
                raise InputError("the value is too long")
            p = state.param[name]
            if name == "stack_json":
                value = decode_stack(text)
            elif name == "spd_json":
                wl, v = json.loads(text)
                state.set_spd(wl, v)
                continue
            elif isinstance(p, __import__("param").Integer):
                value = int(text)
            elif isinstance(p, __import__("param").Number):
                value = float(text)
            else:
                value = text
            p._validate(value)
            update[name] = value
        except (InputError, ValueError, TypeError) as exc:
            errors.append(f"Link field '{key}' was not applied: {exc}".rstrip(".") + ".")
    if "stack_json" in update:
        n = len(json.loads(update["stack_json"])["layers"])
        if update.get("swept_layer", state.swept_layer) > max(n - 1, 0):
            update["swept_layer"] = 0
    if "thickness_nm" in update and "thickness_max_nm" not in update:
        update["thickness_max_nm"] = max(state.thickness_max_nm, update["thickness_nm"])
    state.param.update(**update)
    return errors
