"""The shared lab library: stacks, gratings and calibrations saved on the server.

Layout on disk (one folder per kind under the library root)::

    <root>/.fringegauge-library                   marker: this folder is a lab library
    <root>/stacks/Oxide wafer 7.json              version 1 of "Oxide wafer 7"
    <root>/stacks/Oxide wafer 7.json.meta.json    its metadata sidecar
    <root>/stacks/Oxide wafer 7.v2.json           version 2 (a later save of the same name)
    <root>/stacks/Oxide wafer 7.v2.json.meta.json
    <root>/stacks/.archive/...                    archived files (never deleted)
    <root>/stacks/.lock                           lock file serialising savers
    <root>/stacks/.changed                        a fresh token after every save or archive
    <root>/camera_calibrations/Line 3 scope.json  a camera calibration (see validate_camera_calibration)

The saved file holds exactly the text the user saved (UTF-8), so it loads back
identical. Metadata lives in a sidecar ``<file>.meta.json``: kind, name,
version, user, whether that user name was verified by a login (``user_verified``),
saved_at (UTC, ISO 8601), size (bytes) and sha256 of the file, and ``hmac``:
an HMAC-SHA256 with the server's key over those eight fields in a canonical
form (:func:`meta_mac`). A data file whose sidecar is missing, unreadable,
unsigned, signed with another key, or does not match its sha256 counts as
corrupt or hand-made: :meth:`Library.list` skips it and
:meth:`Library.list_problems` reports it; :meth:`Library.load` refuses it.
Anyone who can write the folder can copy files in, but only the server (or the
administrator with ``python -m library sign``) can make them count.

The key is 32 random bytes (64 hex digits) in a key file outside the library
folder: ``FRINGEGAUGE_LIBRARY_KEY_FILE``, by default
``~/.config/fringegauge/library.key``. :func:`load_or_create_key` creates it
with mode 0600 (``O_EXCL``, links not followed) when it is missing and refuses a
key file inside the library folder (whoever can write the folder could then
read or replace the key) or one that other accounts may read. Files saved by
versions before the signature have no ``hmac`` and are listed as problems until
the administrator accepts them: ``python -m library sign ROOT`` re-signs every
file whose sha256 still matches (:func:`sign_library`), recording its user as
typed, since nothing proves who saved it.

Who saved: :meth:`Library.save` records ``user`` and ``user_verified`` as its
caller says. The tab (views/library.py) passes the login name with
``user_verified=True`` only when the server checks a password per user or uses
OAuth; a typed name is recorded as typed and shown as such
(:attr:`Entry.saved_by`, e.g. ``"J. Ortiz (typed name)"``).

A hostile folder. The library reads only regular files: every file is first
``lstat``-ed, then opened with ``O_NOFOLLOW | O_NONBLOCK`` (a pipe opened so
returns at once instead of waiting for a writer) and ``fstat``-ed to confirm it
is a regular file no larger than its cap before a byte is read, and at most the
cap is read (1 MB for items, ``MAX_META_BYTES`` for sidecars). Links are never
followed below the root: data files, sidecars, ``.lock``, ``.changed``,
``.archive`` and the kind folders are opened relative to their folder's
descriptor with ``O_NOFOLLOW``, and a link or special file is reported by name
with the reason ("is a link", "is not a regular file", "is larger than ...").
The root path itself is trusted as given: it may be, or pass through, a link
the administrator made (for example to a mounted share). A listing looks at no
more than ``MAX_SCAN_ENTRIES`` entries of a kind's folder and says so when it
stops there, so a folder of a million files costs no more than one of that size.

The root and its marker. :func:`prepare_root` is called once when the server
starts: it creates the root when it is missing (first start), writes the marker
``.fringegauge-library`` into a new or empty folder or a folder that already
holds kind folders (an older library), refuses any other folder, and removes
temporary files of interrupted saves older than an hour. A process that never
called it prepares the root at its first save the same way (scripts and tests).
From then on :meth:`Library.save` and :meth:`Library.archive` refuse, with a
sentence, when the root or its marker is missing (the folder was deleted, or the
share is unmounted and its empty mount point is showing): they never recreate
the root. A kind folder inside a marked root is created when needed.

Saving never overwrites: a name that exists is saved as the next version.
Names are one item whatever their upper and lower case ("Oxide 640 nm" and
"oxide 640 NM" are the same item), because shared folders on Windows and macOS
would make such files collide: a save joins the existing item, under the name
as it was first saved, and its version numbers are counted across every case
form. Folders written before this rule may hold several case forms of a name;
they are all still listed and loaded as they are.

Every file is written to a temporary file in the same folder, flushed and
fsynced, then moved into place with ``os.replace``. The temporary file is created
with mode 0o666 less the process umask, as any ordinary file, so backups and
other accounts in the server's group can read the library. The choice of version and
the move happen under a lock (a process-wide thread lock plus an OS file lock
on ``.lock``), so concurrent savers of one name get distinct versions. Any
``OSError`` while saving becomes :class:`LibraryWriteError` and leaves no
temporary or half-written file behind.

Names are checked by :func:`sanitize_name`. Messages meant for people name
items, kinds and file names inside a kind's folder, never the server's paths.

:meth:`Library.change_marker` is a cheap fingerprint of a kind's folder (its
stat and the ``.changed`` token), for pages that watch the folder without
re-reading every file.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import hmac
import json
import math
import os
import re
import secrets
import stat
import threading
import time
import unicodedata
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

from physics.errors import InputError
from physics.gratingfile import load_grating_file
from physics.stackfile import load_stack_file, read_json_document

try:                                    # POSIX
    import fcntl
except ImportError:                     # pragma: no cover - Windows
    fcntl = None

__all__ = [
    "Library", "Entry", "Problem", "SaveResult", "LibraryWriteError", "LibraryKeyError", "ItemMissing",
    "sanitize_name", "clean_note", "validate_calibration", "validate_camera_calibration", "prepare_root", "load_or_create_key", "key_file_path",
    "sign_library", "meta_mac", "saver_text", "error_text",
    "KINDS", "NOUNS", "DEFAULT_ROOT", "MAX_NOTE_CHARS", "MAX_CONTENT_BYTES", "MAX_NAME_CHARS", "MAX_META_BYTES", "MAX_SCAN_ENTRIES",
    "KEY_FILE_ENV", "MARKER_NAME",
]

#: The kinds of item the library holds (one folder each).
KINDS = ("stacks", "gratings", "calibrations", "camera_calibrations")
#: The singular noun of each kind, for messages.
NOUNS = {"stacks": "stack", "gratings": "grating", "calibrations": "calibration",
         "camera_calibrations": "camera calibration"}
#: Largest content accepted, bytes of UTF-8.
MAX_CONTENT_BYTES = 1_000_000
#: Longest library name, characters.
MAX_NAME_CHARS = 80
#: Longest library name, bytes of UTF-8 (keeps file names well under 255 bytes).
MAX_NAME_BYTES = 160
#: Longest user name kept in the metadata, characters.
MAX_USER_CHARS = 100
#: Longest note saved with an item (characters): a few sentences on why it was saved and what it is for.
MAX_NOTE_CHARS = 500
#: Largest sidecar read, bytes. A sidecar the server writes is under 2 KB (a name of at most 160 bytes,
#: a user of at most 100 characters, fixed fields); anything larger was not written by it, and the cap
#: bounds what a listing reads for each file.
MAX_META_BYTES = 16_384
#: Most directory entries a listing looks at in one kind's folder (files and sidecars count one each,
#: so about half as many items). Bounds the cost of opening the tab whatever the folder holds; the
#: listing says when it stops here.
MAX_SCAN_ENTRIES = 4000
#: Environment variable naming the key file that signs the metadata.
KEY_FILE_ENV = "FRINGEGAUGE_LIBRARY_KEY_FILE"
#: The key file used when KEY_FILE_ENV is not set, under the home folder of the server's account.
DEFAULT_KEY_FILE = Path(".config", "fringegauge", "library.key")
#: The library folder when none is given (``serve.py --library`` and a page served without it, as by
#: ``panel serve app.py``), relative to the folder the server starts in; created on the first save.
DEFAULT_ROOT = Path("lab-library")
#: Bytes of random key.
KEY_BYTES = 32
#: The file in the root that marks it as a lab library (see prepare_root).
MARKER_NAME = ".fringegauge-library"
#: Temporary files of ours older than this are left from a killed save and removed by prepare_root (s).
#: A save holds its temporary file for milliseconds, so an hour never catches one in progress.
TMP_MAX_AGE_S = 3600

META_FORMAT = "fringegauge-library-meta"
#: Version 2 sidecars are signed (``user_verified``, ``hmac``); version 1 came before the signature.
META_VERSION = 2
_META_V1_FIELDS = {"format", "version", "kind", "name", "file_version", "user", "saved_at", "size", "sha256"}
_META_FIELDS = _META_V1_FIELDS | {"user_verified", "hmac"}
#: Prefix of the signed text: names what it signs, so the key signs nothing else by accident.
_MAC_CONTEXT = b"fringegauge library metadata v2\n"
_META_SUFFIX = ".meta.json"
_ARCHIVE = ".archive"
_LOCK = ".lock"
#: Rewritten with a fresh random token after every save or archive (see Library.change_marker).
_CHANGED = ".changed"
#: Longest .changed read (the token is 32 hex digits).
_CHANGED_CAP = 64
_TMP_PREFIX = ".tmp-"
_TMP_SUFFIX = ".part"
#: Mode asked for new files; the process umask is taken off it, as for any ordinary file.
_FILE_MODE = 0o666
#: Attempts at a free random temporary name before giving up (a clash of 64 random bits is not expected).
_TMP_ATTEMPTS = 20
#: Safe in file names on every common file system and in shells when quoted.
_ALLOWED_PUNCT = " -_.()+,"
_WINDOWS_RESERVED = {"CON", "PRN", "AUX", "NUL", "CONIN$", "CONOUT$",
                     *(f"COM{i}" for i in range(10)), *(f"LPT{i}" for i in range(10))}
_VERSION_RE = re.compile(r"^(?P<name>.+)\.v(?P<version>[0-9]+)$")
_RESERVED_ENDING_RE = re.compile(r"(\.v[0-9]+|\.json|\.meta)$", re.IGNORECASE)

_O_NOFOLLOW = getattr(os, "O_NOFOLLOW", 0)
_O_CLOEXEC = getattr(os, "O_CLOEXEC", 0)
_O_DIRECTORY = getattr(os, "O_DIRECTORY", 0)
#: Opening a file to read: a link fails, a pipe opens at once (it is then refused by fstat).
_READ_FLAGS = os.O_RDONLY | _O_NOFOLLOW | getattr(os, "O_NONBLOCK", 0) | _O_CLOEXEC | getattr(os, "O_BINARY", 0)
_DIR_FLAGS = os.O_RDONLY | _O_DIRECTORY | _O_CLOEXEC

_WRITE_ADVICE = "your work is still in this page — download it as a file."
_MISSING_ROOT = ("The lab library folder is missing (deleted or unmounted?); nothing was {done} — {advice} "
                 "Whoever looks after the server can restore the folder (or mount the share) and restart it.")
_SIGN_HINT = "whoever looks after the server can accept it with 'python -m library sign'"
#: What a file is when it cannot be read as one: the reasons the listing gives.
_IS_LINK = "is a link; the library never follows links"
_NOT_REGULAR = "is not a regular file (a pipe, device, socket or folder)"
_NOT_FOLDER = "is not a folder"
TYPED_MARK = "(typed name)"


class LibraryWriteError(InputError):
    """The library folder could not be written (read-only, full, or gone)."""


class ItemMissing(InputError):
    """The named version is not (or no longer) in the library: archived or never saved."""


class LibraryKeyError(InputError):
    """The key that signs the library's metadata cannot be read, created or trusted."""


class _Refused(Exception):
    """A library entry that is not what it must be (a link, a special file, too large): ``reason``."""

    def __init__(self, reason: str):
        super().__init__(reason)
        self.reason = reason


# ---------------------------------------------------------------------- records
@dataclass(frozen=True)
class SaveResult:
    """What :meth:`Library.save` did.

    Attributes
    ----------
    path_name : str
        File name inside the kind's folder, e.g. ``"Oxide wafer 7.v2.json"``.
    version : int
        1 for the first save of a name, then 2, 3, ...
    message : str
        A sentence for the user ("Saved ..." or "A stack named ... already exists ...").
    name : str
        The name it is stored under: the name as first saved when the typed name differs
        from an existing one only in upper and lower case.
    """

    path_name: str
    version: int
    message: str
    name: str = ""


@dataclass(frozen=True)
class Entry:
    """One valid saved item as listed by :meth:`Library.list`.

    ``saved_at`` is UTC ISO 8601 text; ``size`` is in bytes. ``user_verified`` is True when the
    user name came from a login the server checks per user (see :attr:`saved_by`).
    """

    name: str
    version: int
    user: str
    saved_at: str
    size: int
    file_name: str
    sha256: str
    user_verified: bool = False
    note: str = ""                   #: the saver's note, signed with the rest of the metadata

    @property
    def saved_by(self) -> str:
        """The user as people should read it: ``"ak"`` when verified, ``"ak (typed name)"`` otherwise."""
        return saver_text(self.user, self.user_verified)


@dataclass(frozen=True)
class Problem:
    """A file in a kind's folder that :meth:`Library.list` skipped, and why."""

    file_name: str
    message: str

    def __str__(self) -> str:
        """``"name: message"``, the name's control and invisible characters escaped (a hostile folder chooses
        its file names: a right-to-left mark could make one read as another)."""
        return f"{_printable(self.file_name)}: {self.message}"


def _printable(text: str) -> str:
    return "".join(ch if ch.isprintable() else f"\\u{ord(ch):04x}" for ch in text)


def saver_text(user: str, verified: bool) -> str:
    """``user`` as shown to people: marked ``(typed name)`` unless a per-user login verified it."""
    return user if verified else f"{user} {TYPED_MARK}"


def error_text(exc: BaseException) -> str:
    """A sentence about ``exc`` fit to show a user: an InputError's own message; for an OSError only its
    reason (``strerror``), never the file name it carries (a server path)."""
    if isinstance(exc, InputError):
        return str(exc)
    if isinstance(exc, OSError):
        return _os_reason(exc)
    return type(exc).__name__


def _os_reason(exc: OSError) -> str:
    """The reason of an OSError without its file names, e.g. "No space left on device"."""
    if exc.strerror:
        return exc.strerror
    if exc.errno:
        return os.strerror(exc.errno)
    return "an operating-system error"


# ---------------------------------------------------------------------- names
def sanitize_name(text) -> str:
    """Check a library name and return it in its stored form.

    Surrounding spaces and one trailing ``.json`` are dropped and the text is
    NFC-normalised. Allowed: letters, digits, space and ``- _ . ( ) + ,``;
    at most 80 characters.

    Raises
    ------
    InputError
        Empty; too long; a character outside the allowed set (path separators,
        NUL, control characters, ...); ``..``; a leading dot; a trailing dot;
        an ending reserved for the library's own files (``.v2``, ``.json``,
        ``.meta``); a Windows reserved device name (CON, NUL, COM1, ...).
    """
    allowed = "Library names may use letters, digits, spaces and - _ . ( ) + ,"
    if not isinstance(text, str):
        raise InputError(f"{allowed}; got {type(text).__name__} instead of text.")
    original = text
    name = unicodedata.normalize("NFC", text).strip(" ")
    if name.lower().endswith(".json"):
        name = name[:-5].rstrip(" ")
    if not name:
        raise InputError(f"{allowed}; the name is empty. Type a name for the library entry.")
    shown = _show(original)
    for ch in name:
        if not _name_char_ok(ch):
            raise InputError(f"{allowed}; {shown} has {_show_char(ch)}.")
    if len(name) > MAX_NAME_CHARS:
        raise InputError(f"{allowed}; {_show(original[:40] + '…')} is {len(name)} characters long; "
                         f"shorten it to at most {MAX_NAME_CHARS}.")
    if len(name.encode("utf-8")) > MAX_NAME_BYTES:
        raise InputError(f"{allowed}; {shown} is too long for a file name; shorten it.")
    if ".." in name:
        raise InputError(f"{allowed}; {shown} has '..' (two dots in a row), which is not allowed.")
    if name.startswith("."):
        raise InputError(f"{allowed}; {shown} starts with a dot, which would hide the file. "
                         "Start the name with a letter or digit.")
    if name.endswith("."):
        raise InputError(f"{allowed}; {shown} ends with a dot; remove it.")
    if _RESERVED_ENDING_RE.search(name):
        raise InputError(f"{allowed}; {shown} ends with {_RESERVED_ENDING_RE.search(name).group(0)!r}, "
                         "which the library uses for versions and its own files. Change the ending "
                         "(e.g. '-v2' instead of '.v2').")
    stem = name.split(".")[0].rstrip(" ").upper()
    if stem in _WINDOWS_RESERVED:
        raise InputError(f"{allowed}; {shown} is a reserved device name on Windows; choose another name.")
    return name


def name_key(name: str) -> str:
    """The identity of a library name: NFC-normalised and case-folded, so names that differ only in
    upper and lower case are one item (they would be one file on Windows and macOS shares)."""
    return unicodedata.normalize("NFC", unicodedata.normalize("NFC", name).casefold())


def _name_char_ok(ch: str) -> bool:
    if ch in _ALLOWED_PUNCT:
        return True
    cat = unicodedata.category(ch)
    return cat.startswith("L") or cat == "Nd"


def _show(text: str) -> str:
    """A short quoted form of user text for messages, with control characters escaped."""
    if len(text) > 60:
        text = text[:57] + "…"
    return f"'{_printable(text)}'"


def _show_char(ch: str) -> str:
    if ch in "/\\":
        return f"'{ch}'"
    if not ch.isprintable() or ch.isspace():
        return f"a control or invisible character (U+{ord(ch):04X})"
    return f"'{ch}'"


def _clean_user(user) -> str:
    if not isinstance(user, str):
        raise InputError(f"The user saving to the library must be given as text; got {type(user).__name__}.")
    user = "".join(ch for ch in user if ch.isprintable()).strip()
    return user[:MAX_USER_CHARS] or "unknown"


def clean_note(note) -> str:
    """A note to save with an item: printable text (line breaks become spaces), at most MAX_NOTE_CHARS.

    Raises InputError for a note that is not text or is too long (it is never cut silently)."""
    if not isinstance(note, str):
        raise InputError(f"A note is text; got {type(note).__name__}.")
    note = " ".join("".join(ch if ch.isprintable() else " " for ch in note).split())
    if len(note) > MAX_NOTE_CHARS:
        raise InputError(f"The note is {len(note):,} characters; a note holds at most {MAX_NOTE_CHARS}. "
                         "Shorten it.")
    return note


# ---------------------------------------------------------------------- calibrations
_CAL_FIELDS = ("name", "box", "reference", "note")
_CAL_REQUIRED = ("name", "box", "reference")


def validate_calibration(content) -> dict:
    """Check the text of a calibration file and return it parsed.

    Format: one JSON object ``{"name": str, "box": [x0, y0, x1, y1],
    "reference": "substrate" | number, "note": str}``; ``note`` is optional.
    The box is in image pixels: four finite numbers >= 0 with x0 < x1 and
    y0 < y1. A numeric reference is a finite number >= 0. The name has at
    most 200 characters, the note at most 2000.

    Raises
    ------
    InputError
        Too large, not JSON, or a field missing, unknown, of the wrong type or
        out of range; the message starts with the field.
    """
    data = read_json_document(content, "calibration", MAX_CONTENT_BYTES)
    if not isinstance(data, dict):
        raise InputError("A calibration must hold one JSON object {\"name\": ..., \"box\": [x0, y0, x1, y1], "
                         "\"reference\": ...} at the top level.")
    _check_field_names(data, _CAL_FIELDS, _CAL_REQUIRED, "calibration")
    if not isinstance(data["name"], str) or len(data["name"]) > 200:
        raise InputError("name: must be text of at most 200 characters.")
    note = data.get("note", "")
    if not isinstance(note, str) or len(note) > 2000:
        raise InputError("note: must be text of at most 2000 characters.")
    box = data["box"]
    if not isinstance(box, list) or len(box) != 4:
        raise InputError("box: must be a list of four pixel coordinates [x0, y0, x1, y1].")
    for i, v in enumerate(box):
        if not _finite_number(v) or v < 0:
            raise InputError(f"box[{i}]: must be a finite number >= 0 (pixels), got {_short(v)}.")
    x0, y0, x1, y1 = box
    if not (x0 < x1 and y0 < y1):
        raise InputError(f"box: [{x0:g}, {y0:g}, {x1:g}, {y1:g}] is empty or reversed; give the "
                         "top-left corner first (x0 < x1 and y0 < y1).")
    ref = data["reference"]
    if ref != "substrate" and not (_finite_number(ref) and ref >= 0):
        raise InputError(f"reference: must be \"substrate\" or a finite number >= 0, got {_short(ref)}.")
    return data


def _check_field_names(data: dict, fields, required, noun: str) -> None:
    """InputError naming the first unknown or missing field of a JSON object of this kind."""
    unknown = [k for k in data if k not in fields]
    if unknown:
        raise InputError(f"{_show(unknown[0])}: unknown field; a {noun} has the fields "
                         f"{', '.join(fields)}. Remove it or correct its spelling.")
    for key in required:
        if key not in data:
            raise InputError(f"{key}: missing; a {noun} needs the fields {', '.join(required)}.")


def _finite_number(v) -> bool:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return False
    try:
        return math.isfinite(float(v))
    except OverflowError:
        return False


def _short(v) -> str:
    text = repr(v) if not isinstance(v, int) or abs(v) < 10**30 else "a very long number"
    return text if len(text) <= 60 else text[:57] + "…"


# ---------------------------------------------------------------------- camera calibrations
#: The ``format`` of a camera calibration file (a fitted colour correction of one camera + lamp + optics).
CAMERA_CAL_FORMAT = "fringegauge-camera-calibration"
CAMERA_CAL_VERSION = 1
_CAMCAL_FIELDS = ("format", "version", "name", "camera", "lamp", "objective", "na", "date", "note",
                  "calibration", "flat_field")
_CAMCAL_REQUIRED = ("format", "version", "calibration")
_CAMCAL_TEXT = ("name", "camera", "lamp", "objective", "note")
#: Longest text of a camera calibration's describing fields (characters).
_CAMCAL_TEXT_CHARS = 2000
_DATE_RE = re.compile(r"^[0-9]{4}-[0-9]{2}-[0-9]{2}$")


def validate_camera_calibration(content) -> dict:
    """Check the text of a camera calibration file and return it parsed.

    Format: one JSON object ``{"format": "fringegauge-camera-calibration", "version": 1,
    "name": str, "camera": str, "lamp": str, "objective": str, "na": number or null,
    "date": "YYYY-MM-DD", "note": str, "calibration": {...}, "flat_field": {...} or null}``.
    ``calibration`` is ``physics.camera.CameraCalibration.to_dict()`` and ``flat_field``
    ``physics.camera.FlatField.to_dict()``; both are rebuilt with their ``from_dict`` here, so a
    file that would not load is refused when saved and skipped when listed.

    Raises
    ------
    InputError
        Too large, not JSON, or a field missing, unknown, of the wrong type or out of
        range; the message starts with the field.
    """
    data = read_json_document(content, "camera calibration", MAX_CONTENT_BYTES)
    if not isinstance(data, dict):
        raise InputError("A camera calibration must hold one JSON object {\"format\": "
                         f"\"{CAMERA_CAL_FORMAT}\", \"calibration\": ...}} at the top level.")
    _check_field_names(data, _CAMCAL_FIELDS, _CAMCAL_REQUIRED, "camera calibration")
    if data["format"] != CAMERA_CAL_FORMAT:
        raise InputError(f"format: must be \"{CAMERA_CAL_FORMAT}\", got {_short(data['format'])}.")
    if data["version"] != CAMERA_CAL_VERSION or isinstance(data["version"], bool):
        raise InputError(f"version: this server reads version {CAMERA_CAL_VERSION}, got {_short(data['version'])}.")
    for key in _CAMCAL_TEXT:
        v = data.get(key, "")
        if not isinstance(v, str) or len(v) > _CAMCAL_TEXT_CHARS:
            raise InputError(f"{key}: must be text of at most {_CAMCAL_TEXT_CHARS} characters.")
    na = data.get("na")
    if na is not None and not (_finite_number(na) and 0 <= na < 2):
        raise InputError(f"na: must be null or a numerical aperture from 0 to below 2, got {_short(na)}.")
    when = data.get("date", "")
    if not isinstance(when, str) or (when and not _DATE_RE.match(when)):
        raise InputError(f"date: must be a date written YYYY-MM-DD, got {_short(when)}.")
    if not isinstance(data["calibration"], dict):
        raise InputError("calibration: must be a JSON object (a fitted camera calibration).")
    if data.get("flat_field") is not None and not isinstance(data["flat_field"], dict):
        raise InputError("flat_field: must be null or a JSON object (a flat field).")
    from physics import camera                   # imported here: the library's other kinds never need it
    for key, cls in (("calibration", camera.CameraCalibration), ("flat_field", camera.FlatField)):
        if data.get(key) is None:
            continue
        try:
            cls.from_dict(data[key])
        except InputError as exc:
            raise InputError(f"{key}: {exc}") from None
        except Exception as exc:                 # a hostile file must give a sentence, never a crash
            raise InputError(f"{key}: not a usable {key.replace('_', ' ')} ({type(exc).__name__}); the file was "
                             "not written by this server or was damaged.") from None
    return data


_VALIDATORS = {
    "stacks": load_stack_file,
    "gratings": load_grating_file,
    "calibrations": validate_calibration,
    "camera_calibrations": validate_camera_calibration,
}


def _validate(kind: str, content: str) -> None:
    try:
        _VALIDATORS[kind](content)
    except InputError:
        raise
    except (ValueError, TypeError, ArithmeticError, LookupError, RecursionError) as exc:
        raise InputError(f"This is not a usable {NOUNS[kind]} file ({type(exc).__name__}); "
                         "check its fields and numbers.") from None


# ---------------------------------------------------------------------- reading files safely
def _check_entry(st: os.stat_result, cap: int) -> None:
    """Refuse an lstat/fstat result that is not a regular file of at most ``cap`` bytes."""
    if stat.S_ISLNK(st.st_mode):
        raise _Refused(_IS_LINK)
    if not stat.S_ISREG(st.st_mode):
        raise _Refused(_NOT_REGULAR)
    if st.st_size > cap:
        raise _Refused(f"is larger than {_size_text(cap)}")


def _size_text(n: int) -> str:
    return f"{n // 1_000_000} MB" if n % 1_000_000 == 0 else f"{n // 1024} KB" if n % 1024 == 0 else f"{n:,} bytes"


def _lstat(dir_fd: int, name: str) -> os.stat_result:
    return os.stat(name, dir_fd=dir_fd, follow_symlinks=False)


def _read_regular(dir_fd: int, name: str, cap: int) -> bytes:
    """The bytes of the regular file ``name`` in the folder ``dir_fd``, at most ``cap`` of them.

    lstat first (a link, pipe, device or oversized file is refused before it is opened), then
    ``O_NOFOLLOW | O_NONBLOCK`` (a link swapped in meanwhile fails; a pipe does not wait for a
    writer), then fstat of what was opened, and at most ``cap + 1`` bytes read (a file that grew).

    Raises
    ------
    _Refused
        Not a regular file, a link, or larger than ``cap``.
    OSError
        FileNotFoundError when it is missing; any other failure to read.
    """
    _check_entry(_lstat(dir_fd, name), cap)
    try:
        fd = os.open(name, _READ_FLAGS, dir_fd=dir_fd)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise _Refused(_IS_LINK) from None
        raise
    try:
        _check_entry(os.fstat(fd), cap)
        chunks, total = [], 0
        while total <= cap:
            chunk = os.read(fd, min(1 << 16, cap + 1 - total))
            if not chunk:
                break
            chunks.append(chunk)
            total += len(chunk)
        if total > cap:
            raise _Refused(f"is larger than {_size_text(cap)}")
        return b"".join(chunks)
    finally:
        os.close(fd)


def _open_dir(name, dir_fd: int | None = None) -> int:
    """A descriptor of the folder ``name`` (in ``dir_fd``), never through a link.

    Raises _Refused (a link, or not a folder) or OSError (FileNotFoundError when missing).
    """
    try:
        return os.open(name, _DIR_FLAGS | _O_NOFOLLOW, dir_fd=dir_fd)
    except OSError as exc:
        if exc.errno not in (errno.ELOOP, errno.ENOTDIR):
            raise
    try:
        st = os.stat(name, dir_fd=dir_fd, follow_symlinks=False)
    except OSError:
        raise _Refused(_NOT_FOLDER) from None
    raise _Refused(_IS_LINK if stat.S_ISLNK(st.st_mode) else _NOT_FOLDER)


def _dir_names(dir_fd: int, cap: int | None = None):
    """(names, more): the entry names of the folder ``dir_fd``, at most ``cap``; ``more`` when it holds more."""
    names = []
    with os.scandir(dir_fd) as it:
        for entry in it:
            if cap is not None and len(names) >= cap:
                return names, True
            names.append(entry.name)
    return names, False


def _exists(dir_fd: int, name: str) -> bool:
    try:
        _lstat(dir_fd, name)
        return True
    except FileNotFoundError:
        return False


# ---------------------------------------------------------------------- the key
def key_file_path() -> Path:
    """Where the signing key is kept: ``FRINGEGAUGE_LIBRARY_KEY_FILE``, else ``~/.config/fringegauge/library.key``.

    Raises
    ------
    LibraryKeyError
        The variable is not set and the account has no home folder.
    """
    given = os.environ.get(KEY_FILE_ENV, "").strip()
    if given:
        return Path(given).expanduser().absolute()
    try:
        return Path.home() / DEFAULT_KEY_FILE
    except RuntimeError:
        raise LibraryKeyError(f"The server's account has no home folder for the library key; set {KEY_FILE_ENV} "
                              "to a file outside the lab library folder.") from None


def _inside_folder(path: Path, folder: Path) -> bool:
    """True when ``path`` (its folder resolved through any links) lies in ``folder`` (resolved)."""
    where = path.parent.resolve() / path.name
    return where.is_relative_to(Path(folder).resolve())


def load_or_create_key(path=None, *, library_root=None, create: bool = True) -> bytes:
    """The key that signs the library's metadata, created when its file is missing.

    Parameters
    ----------
    path : Path or str, optional
        The key file; None: :func:`key_file_path` (``FRINGEGAUGE_LIBRARY_KEY_FILE`` or
        ``~/.config/fringegauge/library.key``).
    library_root : Path or str, optional
        The library folder: a key file inside it is refused (anyone who can write the folder could
        then read or replace the key and forge metadata).
    create : bool
        False: a missing file is an error (for tools that must use the server's existing key).

    The file holds 64 hexadecimal digits (32 random bytes) and a newline. A missing file is created
    with ``O_CREAT | O_EXCL | O_NOFOLLOW`` and mode 0600 (its folder with 0700 when missing). An
    existing file must be a regular file (not a link) that no other account may read or write.

    Returns
    -------
    bytes
        The 32-byte key.

    Raises
    ------
    LibraryKeyError
        The file lies inside the library, is a link or special file, is readable by others, is not a
        key, or cannot be read or created. The message names the file (it is meant for the server's log).
    """
    path = Path(path).expanduser().absolute() if path is not None else key_file_path()
    if library_root is not None and _inside_folder(path, library_root):
        raise LibraryKeyError(
            f"The library key file {path} is inside the lab library folder {Path(library_root)}: anyone who can "
            f"write that folder could read or replace the key and forge who saved an item. Keep the key "
            f"outside it (the default is ~/{DEFAULT_KEY_FILE}; or set {KEY_FILE_ENV}).")
    for attempt in range(20):
        try:
            return _read_key(path)
        except FileNotFoundError:
            if not create:
                raise LibraryKeyError(f"There is no library key file {path}: run this as the account the server "
                                      f"runs as, or give its key file (the server creates it when it starts).") \
                    from None
        except _ShortKey:
            if attempt < 19:               # another process is writing it right now: wait for it
                time.sleep(0.05)
                continue
            raise LibraryKeyError(f"The library key file {path} is not a key: it must hold "
                                  f"{2 * KEY_BYTES} hexadecimal digits.") from None
        try:
            return _create_key(path)
        except FileExistsError:
            continue                       # created by another process meanwhile: read that one
    raise LibraryKeyError(f"The library key file {path} keeps changing; check what else writes it.")


class _ShortKey(Exception):
    """The key file holds fewer characters than a key (perhaps being written)."""


def _read_key(path: Path) -> bytes:
    try:
        st = os.lstat(path)
        if stat.S_ISLNK(st.st_mode):
            raise LibraryKeyError(f"The library key file {path} is a link; links are not followed for the key. "
                                  "Put the key file itself there.")
        if not stat.S_ISREG(st.st_mode):
            raise LibraryKeyError(f"The library key file {path} is not a regular file.")
        fd = os.open(path, _READ_FLAGS)
    except FileNotFoundError:
        raise
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise LibraryKeyError(f"The library key file {path} is a link; links are not followed.") from None
        raise LibraryKeyError(f"The library key file {path} cannot be read: {_os_reason(exc)}.") from None
    try:
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode) or st.st_size > 1024:
            raise LibraryKeyError(f"The library key file {path} is not a key file (not a small regular file).")
        if os.name == "posix" and st.st_mode & 0o077:
            raise LibraryKeyError(
                f"The library key file {path} may be read or written by other accounts (mode "
                f"{stat.S_IMODE(st.st_mode):04o}); anyone who reads it can forge metadata. Make it private: "
                f"chmod 600 {path}")
        raw = os.read(fd, 1025)
    except OSError as exc:
        raise LibraryKeyError(f"The library key file {path} cannot be read: {_os_reason(exc)}.") from None
    finally:
        os.close(fd)
    text = raw.decode("ascii", "replace").strip()
    if len(text) < 2 * KEY_BYTES and re.fullmatch(r"[0-9a-fA-F]*", text):
        raise _ShortKey()
    if not re.fullmatch(r"[0-9a-fA-F]{%d}" % (2 * KEY_BYTES), text):
        raise LibraryKeyError(f"The library key file {path} is not a key: it must hold {2 * KEY_BYTES} "
                              "hexadecimal digits.")
    return bytes.fromhex(text)


def _create_key(path: Path) -> bytes:
    key = secrets.token_bytes(KEY_BYTES)
    try:
        path.parent.mkdir(mode=0o700, parents=True, exist_ok=True)
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | _O_NOFOLLOW | _O_CLOEXEC, 0o600)
    except FileExistsError:
        raise
    except OSError as exc:
        raise LibraryKeyError(f"The library key file {path} cannot be created: {_os_reason(exc)}.") from None
    try:
        if hasattr(os, "fchmod"):
            os.fchmod(fd, 0o600)
        os.write(fd, (key.hex() + "\n").encode("ascii"))
        os.fsync(fd)
    except OSError as exc:
        os.close(fd)
        with contextlib.suppress(OSError):
            os.unlink(path)
        raise LibraryKeyError(f"The library key file {path} cannot be written: {_os_reason(exc)}.") from None
    os.close(fd)
    return key


def _check_key(key) -> bytes:
    if not isinstance(key, (bytes, bytearray)) or len(key) < 16:
        raise LibraryKeyError("The library key must be bytes, at least 16 of them (load_or_create_key gives 32).")
    return bytes(key)


# ---------------------------------------------------------------------- metadata
def meta_mac(key: bytes, meta: dict) -> str:
    """The HMAC-SHA256 (hex) of a sidecar's signed fields: kind, name, version (``file_version``), user,
    user_verified, saved_at, size and sha256, as compact JSON with sorted keys after a fixed prefix."""
    signed = {"kind": meta["kind"], "name": meta["name"], "version": meta["file_version"], "user": meta["user"],
              "user_verified": meta["user_verified"], "saved_at": meta["saved_at"], "size": meta["size"],
              "sha256": meta["sha256"]}
    if "note" in meta:                                 # signed when present; sidecars without one verify as before
        signed["note"] = meta["note"]
    text = json.dumps(signed, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hmac.new(key, _MAC_CONTEXT + text.encode("ascii"), hashlib.sha256).hexdigest()


def _meta_bytes(key: bytes, kind: str, name: str, version: int, user: str, verified: bool, saved_at: str,
                size: int, sha256: str, note: str = "") -> bytes:
    meta = {"format": META_FORMAT, "version": META_VERSION, "kind": kind, "name": name, "file_version": version,
            "user": user, "user_verified": bool(verified), "saved_at": saved_at, "size": size, "sha256": sha256}
    if note:
        meta["note"] = note
    meta["hmac"] = meta_mac(key, meta)
    return (json.dumps(meta, indent=2, ensure_ascii=False) + "\n").encode("utf-8")


def _parse_meta(raw: bytes):
    """A sidecar's text as a dict (version 1 or 2, not yet checked against a key), or a sentence (str)."""
    try:
        meta = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError, RecursionError):
        return "its metadata file is damaged (not JSON)."
    ok = (isinstance(meta, dict) and meta.get("format") == META_FORMAT
          and meta.get("version") in (1, META_VERSION)
          and isinstance(meta.get("kind"), str) and isinstance(meta.get("name"), str)
          and type(meta.get("file_version")) is int and isinstance(meta.get("user"), str)
          and isinstance(meta.get("saved_at"), str) and type(meta.get("size")) is int
          and isinstance(meta.get("sha256"), str) and re.fullmatch(r"[0-9a-f]{64}", meta["sha256"]) is not None)
    if not ok:
        return "its metadata file is damaged (fields missing or of the wrong type)."
    return meta


def _verify_meta(meta: dict, key: bytes):
    """None when ``meta`` is signed with ``key``; else the sentence saying why it is not trusted."""
    if meta["version"] == 1 or "hmac" not in meta:
        return ("its metadata has no signature from this server (saved by an older version of fringegauge, "
                f"or made by hand), so it is not offered for loading; {_SIGN_HINT}.")
    forged = "its metadata was not written by this server (hand-made or edited metadata); it is not offered for loading."
    if (set(meta) - {"note"} != _META_FIELDS or type(meta.get("user_verified")) is not bool
            or not isinstance(meta["hmac"], str)
            or not (isinstance(meta.get("note", ""), str) and len(meta.get("note", "")) <= MAX_NOTE_CHARS)):
        return forged
    if not hmac.compare_digest(meta["hmac"], meta_mac(key, meta)):
        return forged
    return None


def _read_or_why(dir_fd: int, name: str, cap: int, subject: str):
    """(bytes, None) of the regular file ``name``, or (None, a sentence about ``subject``) when it is refused
    or cannot be read. FileNotFoundError propagates (a missing file means different things to callers)."""
    try:
        return _read_regular(dir_fd, name, cap), None
    except FileNotFoundError:
        raise
    except _Refused as r:
        return None, f"{subject} {r.reason}."
    except OSError as exc:
        return None, f"{subject} cannot be read ({_os_reason(exc)})."


def _read_meta_at(dir_fd: int, name: str, key: bytes | None):
    """The sidecar ``name`` in ``dir_fd`` as a dict, checked against ``key`` (None: parsed only), or a
    sentence (str) saying what is wrong with it."""
    try:
        raw, why = _read_or_why(dir_fd, name, MAX_META_BYTES, "its metadata file")
    except FileNotFoundError:
        return "has no metadata file; it was not saved by fringegauge (or was copied in by hand)."
    if why:
        return why
    meta = _parse_meta(raw)
    if isinstance(meta, str) or key is None:
        return meta
    return _verify_meta(meta, key) or meta


# ---------------------------------------------------------------------- locking
_THREAD_LOCKS: dict = {}
_THREAD_LOCKS_GUARD = threading.Lock()


def _thread_lock(key: str) -> threading.Lock:
    with _THREAD_LOCKS_GUARD:
        return _THREAD_LOCKS.setdefault(key, threading.Lock())


@contextlib.contextmanager
def _folder_lock(dir_fd: int, key: str, kind: str, done: str):
    """Hold the kind folder's lock: a thread lock (``key``) and, where available, an OS file lock on its
    ``.lock``, which must be a regular file (a link there would make the lock create a file elsewhere).
    ``done`` says in a refusal what did not happen ("saved", "archived")."""
    with _thread_lock(key):
        try:
            fd = os.open(_LOCK, os.O_RDWR | os.O_CREAT | _O_NOFOLLOW | getattr(os, "O_NONBLOCK", 0) | _O_CLOEXEC,
                         0o644, dir_fd=dir_fd)
        except OSError as exc:
            if exc.errno != errno.ELOOP:
                raise
            raise LibraryWriteError(_bad_lock(kind, _IS_LINK, done)) from None
        try:
            if not stat.S_ISREG(os.fstat(fd).st_mode):
                raise LibraryWriteError(_bad_lock(kind, _NOT_REGULAR, done))
            if fcntl is not None:
                fcntl.flock(fd, fcntl.LOCK_EX)
            yield
        finally:
            os.close(fd)            # closing releases the OS lock


def _bad_lock(kind: str, reason: str, done: str) -> str:
    advice = _WRITE_ADVICE if done == "saved" else "nothing was changed."
    return (f"The lock file of the lab library's {kind} folder {reason}, so nothing was {done}: whoever looks "
            f"after the server should remove it (the next save makes a new one). {advice[0].upper()}{advice[1:]}")


# ---------------------------------------------------------------------- low-level writing
def _write_bytes(f, data: bytes) -> None:
    """Write all of ``data`` to the open binary file ``f`` (a seam for tests)."""
    f.write(data)


def _fsync_folder(dir_fd: int) -> None:
    if os.name != "posix":          # pragma: no cover
        return
    with contextlib.suppress(OSError):
        os.fsync(dir_fd)


def _create_temp(dir_fd: int):
    """A new, empty temporary file in the folder ``dir_fd``: (open binary file, its name).

    Made with ``os.open`` and mode 0o666, so the process umask decides who may read it, as for any
    ordinary file (``tempfile`` would make it readable by this account only). ``O_EXCL`` with a
    random name never opens an existing file, nor follows a link.
    """
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0) | _O_NOFOLLOW | _O_CLOEXEC
    for _ in range(_TMP_ATTEMPTS):
        name = f"{_TMP_PREFIX}{secrets.token_hex(8)}{_TMP_SUFFIX}"
        try:
            fd = os.open(name, flags, _FILE_MODE, dir_fd=dir_fd)
        except FileExistsError:
            continue
        return os.fdopen(fd, "wb"), name
    raise OSError(errno.EEXIST, f"no free temporary file name after {_TMP_ATTEMPTS} attempts")


def _atomic_write(dir_fd: int, target: str, data: bytes, durable: bool = True) -> None:
    """Write ``data`` to ``target`` in the folder ``dir_fd`` via a temporary file there and os.replace
    (which replaces a link or special file of that name rather than writing through it).

    ``durable`` flushes the file to the disk (fsync) before the move. On any failure the temporary
    file is removed and the exception propagates.
    """
    tmp_name = None
    try:
        f, tmp_name = _create_temp(dir_fd)
        with f:
            _write_bytes(f, data)
            f.flush()
            if durable:
                os.fsync(f.fileno())
        os.replace(tmp_name, target, src_dir_fd=dir_fd, dst_dir_fd=dir_fd)
        tmp_name = None
    finally:
        if tmp_name is not None:
            with contextlib.suppress(OSError):
                os.unlink(tmp_name, dir_fd=dir_fd)


def _mark_changed(dir_fd: int) -> None:
    """Write a fresh token to the folder's ``.changed`` (called under the folder lock).

    Watchers compare it with the folder's own stat; it is a hint, not data, so a failure to
    write it is ignored (the folder's modification time has changed anyway).
    """
    with contextlib.suppress(OSError):
        _atomic_write(dir_fd, _CHANGED, secrets.token_hex(16).encode("ascii"), durable=False)


def _now_iso() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds")


def _file_name(name: str, version: int) -> str:
    return f"{name}.json" if version == 1 else f"{name}.v{version}.json"


def _parse_file_name(file_name: str):
    """(name, version) of a data file name, or None when it is not one."""
    if not file_name.endswith(".json") or file_name.endswith(_META_SUFFIX) or file_name.startswith("."):
        return None
    stem = file_name[:-5]
    m = _VERSION_RE.match(stem)
    if m:
        version = int(m.group("version"))
        return (m.group("name"), version) if version >= 2 and str(version) == m.group("version") else None
    return stem, 1


@contextlib.contextmanager
def _closing_fd(fd):
    try:
        yield fd
    finally:
        if fd is not None:
            os.close(fd)


# ---------------------------------------------------------------------- the root
_PREPARED: set = set()
_PREPARED_GUARD = threading.Lock()
#: One preparation at a time in this process: two first saves at once would otherwise each see the
#: other's new marker as a foreign file.
_PREPARE_ONE_AT_A_TIME = threading.Lock()
_MARKER_TEXT = (b"This folder is a fringegauge lab library. Keep this file: the server refuses to save when it\n"
                b"is missing, which is how it tells a deleted folder or an unmounted share from the library.\n")


class _PrepareError(Exception):
    """prepare_root cannot use the folder; the reason names no path (the caller adds it for the log)."""


def _root_keys(root: Path) -> set:
    keys = {str(Path(root).absolute())}
    with contextlib.suppress(OSError, RuntimeError):
        keys.add(str(Path(root).resolve()))
    return keys


def _is_prepared(root: Path) -> bool:
    with _PREPARED_GUARD:
        return bool(_root_keys(root) & _PREPARED)


def prepare_root(root) -> list:
    """Make ``root`` ready as the lab library; the server calls this once when it starts.

    - Creates the root (and its parents) when it is missing: the first start.
    - Writes the marker ``.fringegauge-library`` into it when the folder is new, empty, or already
      holds kind folders (a library from before the marker); any other folder is refused, as it is
      not a library (a wrong path, or something else mounted there).
    - Removes temporary files of interrupted saves (``.tmp-*.part``) older than an hour from the
      root and the kind folders: regular files only, links never followed.
    - Remembers, for this process, that the root is prepared: from then on :meth:`Library.save` and
      :meth:`Library.archive` refuse when the root or its marker goes missing, instead of recreating it.

    Parameters
    ----------
    root : Path or str
        The library folder. It may be, or pass through, a link the administrator made.

    Returns
    -------
    list of str
        One short note per thing it did, for the server's log (they name the folder).

    Raises
    ------
    LibraryWriteError
        The folder cannot be created, is not a folder, holds other things and no marker, or its
        marker is not a regular file. The message names the folder (it is meant for the log).
    """
    root = Path(root).expanduser().absolute()
    try:
        notes = _prepare(root)
    except _PrepareError as exc:
        raise LibraryWriteError(f"The lab library folder {root} {exc}") from None
    return [f"{note} (lab library {root})" for note in notes]


def _prepare(root: Path) -> list:
    """prepare_root's work; raises _PrepareError with a reason that names no path."""
    with _PREPARE_ONE_AT_A_TIME:
        return _prepare_now(root)


def _prepare_once(root: Path) -> None:
    """_prepare unless this process has prepared ``root`` already (checked under the same lock, so two
    first saves at once prepare it once)."""
    with _PREPARE_ONE_AT_A_TIME:
        if not _is_prepared(root):
            _prepare_now(root)


def _prepare_now(root: Path) -> list:
    notes = []
    try:
        if not root.exists():
            root.mkdir(parents=True, exist_ok=True)
            notes.append("created the folder (first start)")
        fd = os.open(root, _DIR_FLAGS)
    except NotADirectoryError:
        raise _PrepareError("is not a folder.") from None
    except OSError as exc:
        raise _PrepareError(f"cannot be created or opened: {_os_reason(exc)}.") from None
    with _closing_fd(fd):
        try:
            notes.extend(_mark_root(fd))
            for kind in (None, *KINDS):
                notes.extend(_clean_temps(fd, kind))
        except OSError as exc:
            raise _PrepareError(f"cannot be prepared: {_os_reason(exc)}.") from None
    with _PREPARED_GUARD:
        _PREPARED.update(_root_keys(root))
    return notes


def _mark_root(root_fd: int) -> list:
    try:
        st = _lstat(root_fd, MARKER_NAME)
    except FileNotFoundError:
        st = None
    if st is not None:
        if stat.S_ISREG(st.st_mode):
            return []
        raise _PrepareError(f"holds a marker {MARKER_NAME} that {_IS_LINK if stat.S_ISLNK(st.st_mode) else _NOT_REGULAR}; "
                            "remove it and start again.")
    names, _ = _dir_names(root_fd, 1000)
    ours = [n for n in names if n in KINDS]
    others = [n for n in names if n not in KINDS and n != MARKER_NAME   # another process's marker, just written
              and not (n.startswith(_TMP_PREFIX) and n.endswith(_TMP_SUFFIX))]
    if others and not ours:
        raise _PrepareError(f"holds other files and no {MARKER_NAME} marker, so it is not a lab library (a wrong "
                            "path, or another disk mounted there?). Give an empty folder or an existing library.")
    _atomic_write(root_fd, MARKER_NAME, _MARKER_TEXT)
    _fsync_folder(root_fd)
    return [f"wrote the marker {MARKER_NAME} ({'a library from before the marker' if ours else 'a new library'})"]


def _clean_temps(root_fd: int, kind: str | None) -> list:
    """Remove our temporary files older than TMP_MAX_AGE_S from the root (kind None) or a kind folder."""
    try:
        fd = os.dup(root_fd) if kind is None else _open_dir(kind, root_fd)
    except FileNotFoundError:
        return []
    except _Refused as r:
        return [f"did not clean the {kind} folder: it {r.reason}"]
    removed = 0
    with _closing_fd(fd):
        names, _ = _dir_names(fd)
        cutoff = time.time() - TMP_MAX_AGE_S
        for name in names:
            if not (name.startswith(_TMP_PREFIX) and name.endswith(_TMP_SUFFIX)):
                continue
            try:
                st = _lstat(fd, name)
                if stat.S_ISREG(st.st_mode) and st.st_mtime < cutoff:
                    os.unlink(name, dir_fd=fd)
                    removed += 1
            except FileNotFoundError:
                continue
    if not removed:
        return []
    where = kind or "library"
    return [f"removed {removed} temporary file{'' if removed == 1 else 's'} of interrupted saves from the "
            f"{where} folder"]


# ---------------------------------------------------------------------- the library
class Library:
    """The shared lab library rooted at one folder.

    Parameters
    ----------
    root : Path or str
        The library folder (see :func:`prepare_root`; a kind's sub-folder is created on its first save).
    key : bytes, optional
        The key that signs and checks the metadata; None: :func:`load_or_create_key` from
        ``FRINGEGAUGE_LIBRARY_KEY_FILE`` or its default, when first needed.
    """

    def __init__(self, root, key=None):
        self.root = Path(root).absolute()
        self._key = _check_key(key) if key is not None else None
        self._key_guard = threading.Lock()
        self._cache: dict = {}
        self._cache_guard = threading.Lock()

    # ------------------------------------------------------------ paths and the key
    def _root_resolved(self) -> Path:
        return self.root.resolve()

    def _inside(self, path: Path) -> Path:
        """``path`` if it resolves inside the root; InputError otherwise."""
        if not path.resolve().is_relative_to(self._root_resolved()):
            raise InputError("Refusing a path that lies outside the lab library folder.")
        return path

    def _kind_dir(self, kind) -> Path:
        if kind not in KINDS:
            raise InputError(f"Unknown library kind {_show(str(kind))}; use one of {', '.join(KINDS)}.")
        return self.root / kind

    def path_for(self, kind: str, name: str, version: int = 1) -> Path:
        """Where ``name`` version ``version`` of ``kind`` is (or would be) stored."""
        name = sanitize_name(name)
        version = _check_version(version)
        return self._inside(self._kind_dir(kind) / _file_name(name, version))

    def signing_key(self) -> bytes:
        """The key that signs this library's metadata (loaded or created on first use).

        Raises
        ------
        LibraryKeyError
            With a sentence for users (no paths); :func:`load_or_create_key` gives the detail.
        """
        with self._key_guard:
            if self._key is None:
                try:
                    self._key = load_or_create_key(library_root=self.root)
                except LibraryKeyError:
                    raise LibraryKeyError(
                        "The lab library cannot check or sign its files: the server's library key is missing, "
                        "unsafe or unreadable. Ask whoever looks after the server (its start-up log says why); "
                        "until then nothing can be loaded from or saved to the library.") from None
            return self._key

    def _lock_key(self, kind: str) -> str:
        return os.path.join(os.path.realpath(self.root), kind)

    def root_problem(self):
        """A sentence when saving is refused because the root or its marker is missing (after this process
        prepared it); None otherwise. Cheap: an open and a stat."""
        if not _is_prepared(self.root):
            return None
        try:
            with _closing_fd(os.open(self.root, _DIR_FLAGS)) as fd:
                if _marker_ok(fd):
                    return None
        except OSError:
            pass
        return ("The lab library folder is missing (deleted or unmounted?): nothing can be saved or archived until "
                "whoever looks after the server restores it (or mounts the share again). What is on each tab "
                "stays there, ready to download.")

    @contextlib.contextmanager
    def _writable_root(self, done: str, create: bool = True):
        """The root's descriptor, for a save or archive: prepared once per process (``create``: even when it
        is missing, as at a first start), then required to exist with its marker (LibraryWriteError
        otherwise; it is never recreated)."""
        advice = _WRITE_ADVICE if done == "saved" else "nothing was changed."
        if not _is_prepared(self.root) and (create or self.root.is_dir()):
            try:
                _prepare_once(self.root)
            except _PrepareError as exc:
                raise LibraryWriteError(
                    f"The lab library folder cannot be used: it {exc} Nothing was {done}; {advice} "
                    "Ask whoever looks after the server.") from None
        try:
            fd = os.open(self.root, _DIR_FLAGS)
        except (FileNotFoundError, NotADirectoryError):
            raise LibraryWriteError(_MISSING_ROOT.format(done=done, advice=advice)) from None
        with _closing_fd(fd):
            if not _marker_ok(fd):
                raise LibraryWriteError(_MISSING_ROOT.format(done=done, advice=advice))
            yield fd

    # ------------------------------------------------------------ saving
    def save(self, kind: str, name: str, content: str, *, user: str, user_verified: bool = False,
             note: str = "") -> SaveResult:
        """Save ``content`` under ``name``; never overwrites (a taken name gets the next version).

        ``user`` is recorded as the saver; ``user_verified`` says whether a per-user login vouches for it
        (the caller knows: the page passes True only for a login the server checks per user). ``note`` (at
        most :data:`MAX_NOTE_CHARS` characters, see :func:`clean_note`) is kept in the signed metadata.

        Raises
        ------
        InputError
            Bad kind, name, user, content over 1 MB, or content that is not a
            valid file of this kind.
        LibraryWriteError
            The folder cannot be written (read-only, full, missing, its lock file is a link ...);
            nothing is left half-written.
        LibraryKeyError
            The library key cannot be had.
        """
        self._kind_dir(kind)
        name = sanitize_name(name)
        user = _clean_user(user)
        note = clean_note(note)
        if not isinstance(content, str):
            raise InputError(f"Library content is text; got {type(content).__name__}.")
        if len(content) > MAX_CONTENT_BYTES:
            raise InputError(f"The {NOUNS[kind]} is {len(content):,} characters; the library takes at most "
                             f"{MAX_CONTENT_BYTES:,} bytes (1 MB).")
        try:
            data = content.encode("utf-8")
        except UnicodeEncodeError:
            raise InputError(f"The {NOUNS[kind]} holds characters that cannot be stored as UTF-8 text "
                             "(unpaired surrogates); remove them.") from None
        if len(data) > MAX_CONTENT_BYTES:
            raise InputError(f"The {NOUNS[kind]} is {len(data):,} bytes; the library takes at most "
                             f"{MAX_CONTENT_BYTES:,} bytes (1 MB).")
        _validate(kind, content)
        key = self.signing_key()
        try:
            with self._writable_root("saved") as root_fd:
                return self._save_locked(kind, root_fd, name, data, user, bool(user_verified), key, note)
        except LibraryWriteError:
            raise
        except OSError as exc:
            raise LibraryWriteError(
                f"The lab library folder cannot be written (read-only or full): "
                f"{_os_reason(exc)}; {_WRITE_ADVICE}") from exc

    def _kind_fd_for_writing(self, root_fd: int, kind: str, done: str) -> int:
        """The kind folder's descriptor, created in the (marked) root when missing; never through a link."""
        try:
            os.mkdir(kind, 0o777, dir_fd=root_fd)
        except FileExistsError:
            pass
        try:
            return _open_dir(kind, root_fd)
        except _Refused as r:
            advice = _WRITE_ADVICE if done == "saved" else "nothing was changed."
            raise LibraryWriteError(
                f"The lab library's {kind} folder {r.reason}, so nothing was {done} (it could lead outside the "
                f"lab library folder); whoever looks after the server should make it a real folder. "
                f"{advice[0].upper()}{advice[1:]}") from None

    def _save_locked(self, kind, root_fd: int, name: str, data: bytes, user: str, verified: bool,
                     key: bytes, note: str = "") -> SaveResult:
        typed = name
        with _closing_fd(self._kind_fd_for_writing(root_fd, kind, "saved")) as fd, \
                _folder_lock(fd, self._lock_key(kind), kind, "saved"):
            variants = self._variants(fd, name)
            if variants:
                name = self._first_saved(fd, variants, typed, key)
            taken = set().union(*variants.values())          # one count across every case form
            version = max(taken, default=0) + 1
            target = _file_name(name, version)
            meta_name = target + _META_SUFFIX
            if _exists(fd, target) or _exists(fd, meta_name):      # pragma: no cover - guarded by the scan
                raise LibraryWriteError(f"{target} appeared while saving; save again. {_WRITE_ADVICE}")
            previous = self._latest_meta(fd, name, key) if taken else None
            meta_bytes = _meta_bytes(key, kind, name, version, user, verified, _now_iso(), len(data),
                                     hashlib.sha256(data).hexdigest(), note)
            _atomic_write(fd, target, data)
            try:
                _atomic_write(fd, meta_name, meta_bytes)
            except BaseException:
                with contextlib.suppress(OSError):
                    os.unlink(target, dir_fd=fd)        # our own file of this save: roll it back
                raise
            _fsync_folder(fd)
            _mark_changed(fd)
        noun = NOUNS[kind]
        if version == 1:
            message = f"Saved the {noun} '{name}' to the lab library."
        else:
            who = (f" (saved by {saver_text(previous['user'], previous['user_verified'])} on "
                   f"{previous['saved_at'][:10]} {previous['saved_at'][11:16]} UTC)" if previous else "")
            if typed == name:
                message = f"A {noun} named '{name}' already exists{who}; yours is saved as version {version}."
            else:
                message = (f"A {noun} named '{name}' already exists{who}. Library names do not distinguish "
                           f"upper and lower case, so yours ('{typed}') is saved as version {version} "
                           f"of '{name}'.")
        return SaveResult(path_name=target, version=version, message=message, name=name)

    def _variants(self, fd: int, name: str, archived: bool = True) -> dict:
        """{stored name: versions} of every case form of ``name`` in the folder ``fd`` (and its archive),
        counting data and sidecar files. An archive that is a link is not looked into."""
        key = name_key(name)
        found: dict = {}
        places = [("", fd)]
        archive_fd = None
        if archived:
            with contextlib.suppress(OSError, _Refused):
                archive_fd = _open_dir(_ARCHIVE, fd)
                places.append((_ARCHIVE, archive_fd))
        with _closing_fd(archive_fd):
            for _, where in places:
                for fn in _dir_names(where)[0]:
                    if fn.endswith(_META_SUFFIX):
                        fn = fn[:-len(_META_SUFFIX)]
                    parsed = _parse_file_name(fn)
                    if parsed and name_key(parsed[0]) == key:
                        found.setdefault(parsed[0], set()).add(parsed[1])
        return found

    def _first_saved(self, fd: int, variants: dict, typed: str, key: bytes) -> str:
        """The stored name a save of ``typed`` joins: ``typed`` itself when it is stored as typed,
        otherwise the case form saved first (lowest version, then earliest signed saved_at)."""
        if typed in variants:
            return typed

        def first(stored):
            v = min(variants[stored])
            meta = _read_meta_at(fd, _file_name(stored, v) + _META_SUFFIX, key)
            if isinstance(meta, str):
                with contextlib.suppress(OSError, _Refused), _closing_fd(_open_dir(_ARCHIVE, fd)) as afd:
                    meta = _read_meta_at(afd, _file_name(stored, v) + _META_SUFFIX, key)
            return (v, meta["saved_at"] if isinstance(meta, dict) else "~", stored)
        return min(variants, key=first)

    def _stored_name(self, fd: int, name: str, version: int | None = None) -> str:
        """The stored case form of ``name`` for reading: ``name`` when it has files in the folder
        (of ``version`` when given), else the one case form that has, else ``name`` unchanged."""
        variants = self._variants(fd, name, archived=False)
        matching = [n for n, vs in variants.items() if version is None or version in vs]
        if name in matching or not matching:
            return name
        return self._first_saved(fd, {n: variants[n] for n in matching}, name, self.signing_key())

    def _versions_taken(self, fd: int, name: str, archived: bool = True) -> set:
        """Versions of exactly ``name`` present in the folder or its archive (data or sidecar files)."""
        return self._variants(fd, name, archived).get(name, set())

    def _latest_meta(self, fd: int, name: str, key: bytes):
        """The newest signed sidecar of ``name`` (for "saved by ..." in a message), or None."""
        for version in sorted(self._versions_taken(fd, name, archived=False), reverse=True):
            meta = _read_meta_at(fd, _file_name(name, version) + _META_SUFFIX, key)
            if isinstance(meta, dict):
                return meta
        return None

    def change_marker(self, kind: str):
        """A cheap fingerprint of ``kind``'s folder that changes when an item is saved, archived, added
        or removed: the folder's inode and modification time and the ``.changed`` token.

        Costs a few ``stat``-sized system calls and one small read, whatever the number of files, so a
        page may call it every few seconds and re-read the folder (:meth:`list`) only when it differs.
        Never raises for a missing or unreadable folder (that is a state of its own), and never follows
        a link or waits on a pipe.
        """
        folder = self._kind_dir(kind)
        try:
            st = os.stat(folder, follow_symlinks=False)
            here = (st.st_ino, st.st_mtime_ns, st.st_ctime_ns, stat.S_IFMT(st.st_mode))
        except OSError as exc:
            return ("unreadable", exc.errno)
        token = b""
        with contextlib.suppress(OSError, _Refused), _closing_fd(_open_dir(folder)) as fd:
            token = _read_regular(fd, _CHANGED, _CHANGED_CAP)
        return here, token

    # ------------------------------------------------------------ reading
    def _scan(self, kind: str):
        """(entries newest first, problems) of one kind; never raises for bad files."""
        self._kind_dir(kind)
        entries, problems = [], []
        try:
            root_fd = os.open(self.root, _DIR_FLAGS)
        except OSError:
            return entries, problems
        with _closing_fd(root_fd):
            try:
                fd = _open_dir(kind, root_fd)
            except (FileNotFoundError, NotADirectoryError):
                return entries, problems
            except _Refused as r:
                return entries, [Problem(kind, f"the {kind} folder {r.reason}, so nothing in it is listed (it "
                                               "could lead outside the lab library folder).")]
            except OSError as exc:
                return entries, [Problem(kind, f"the folder cannot be read ({_os_reason(exc)}).")]
            with _closing_fd(fd):
                try:
                    names, more = _dir_names(fd, MAX_SCAN_ENTRIES)
                except OSError as exc:
                    return entries, [Problem(kind, f"the folder cannot be read ({_os_reason(exc)}).")]
                key = self.signing_key()
                self._scan_names(kind, fd, sorted(names), key, entries, problems)
        if more:                                            # first: the tab shows the first few problems
            problems.insert(0, Problem(kind, f"the folder holds more than {MAX_SCAN_ENTRIES:,} files, so only "
                                          f"{MAX_SCAN_ENTRIES:,} of them (in the folder's own order) were looked "
                                          "at and some items may be missing from the list; whoever looks after "
                                          "the server can archive or move old files."))
        entries.sort(key=lambda e: (e.saved_at, e.version, e.name), reverse=True)
        return entries, problems

    def _scan_names(self, kind: str, fd: int, names: list, key: bytes, entries: list, problems: list) -> None:
        present = set(names)
        for fn in names:
            if fn.startswith("."):
                problem = _special_problem(fd, fn)
                if problem:
                    problems.append(problem)
                continue
            if fn.endswith(_META_SUFFIX):
                if fn[:-len(_META_SUFFIX)] not in present and _parse_file_name(fn[:-len(_META_SUFFIX)]):
                    problems.append(Problem(fn, "metadata without its file; the file is missing."))
                continue
            parsed = _parse_file_name(fn)
            if parsed is None:
                problems.append(Problem(fn, "not a library file (library files end in .json); skipped."))
                continue
            try:
                entries.append(self._check_file(kind, fd, fn, parsed, key)[0])
            except FileNotFoundError:
                continue                                   # archived while the folder was being read
            except InputError as exc:
                problems.append(Problem(fn, str(exc)))
            except OSError as exc:
                problems.append(Problem(fn, f"cannot be read ({_os_reason(exc)})."))

    def _check_file(self, kind: str, fd: int, fn: str, parsed, key: bytes, use_cache: bool = True):
        """Check one data file of the folder ``fd`` and its sidecar: (Entry, text) or InputError.

        The text is None when the file was found valid before, unchanged (``use_cache``). The text
        returned is exactly the bytes whose sha256 was checked.
        """
        name, version = parsed
        noun = NOUNS[kind]
        try:
            sanitize_name(name)
        except InputError:
            raise InputError("its name is not a valid library name; it was not saved by fringegauge.") from None
        st = _lstat(fd, fn)
        try:
            _check_entry(st, MAX_CONTENT_BYTES)
        except _Refused as r:
            raise InputError(f"{r.reason}, so it is skipped.") from None
        meta = _read_meta_at(fd, fn + _META_SUFFIX, key)
        if isinstance(meta, str):
            raise InputError(meta)
        if meta["name"] != name or meta["file_version"] != version or meta["kind"] != kind:
            raise InputError("its metadata belongs to another file; it was renamed or copied by hand.")
        changed = (f"the {noun} was changed outside fringegauge after it was saved "
                   "(its checksum no longer matches); it is not offered for loading.")
        if st.st_size != meta["size"]:
            raise InputError(changed)
        entry = Entry(name=name, version=version, user=meta["user"], saved_at=meta["saved_at"], size=meta["size"],
                      file_name=fn, sha256=meta["sha256"], user_verified=meta["user_verified"],
                      note=meta.get("note", ""))
        cache_key = (kind, fn, st.st_dev, st.st_ino, st.st_mtime_ns, st.st_ctime_ns, st.st_size, meta["sha256"])
        if use_cache:
            with self._cache_guard:
                if cache_key in self._cache:
                    return entry, None
        try:
            raw = _read_regular(fd, fn, MAX_CONTENT_BYTES)
        except _Refused as r:
            raise InputError(f"{r.reason}, so it is skipped.") from None
        if len(raw) != meta["size"] or hashlib.sha256(raw).hexdigest() != meta["sha256"]:
            raise InputError(changed)
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError:
            raise InputError("is not UTF-8 text.") from None
        try:
            _validate(kind, text)
        except InputError as exc:
            raise InputError(f"is not a valid {noun} file: {exc}") from None
        with self._cache_guard:              # remembers only that the file checked out, not its text
            if len(self._cache) > 10_000:
                self._cache.clear()
            self._cache[cache_key] = True
        return entry, text

    def list(self, kind: str) -> list:
        """Valid saved items of ``kind``, newest first (corrupt files are skipped; see list_problems)."""
        return self._scan(kind)[0]

    def list_with_problems(self, kind: str) -> tuple:
        """(:meth:`list`, :meth:`list_problems`) from one reading of the folder."""
        return self._scan(kind)

    def list_problems(self, kind: str) -> list:
        """Files of ``kind`` that :meth:`list` skipped, as :class:`Problem` (file name and sentence): links,
        special and oversized files, unsigned or forged metadata, changed content, and a note when the
        folder holds more than ``MAX_SCAN_ENTRIES`` entries."""
        return self._scan(kind)[1]

    def load(self, kind: str, name: str, version: int | None = None) -> str:
        """The text saved under ``name`` (latest valid version by default), checked on read.

        A name that differs from the stored one only in upper and lower case finds it.

        Raises
        ------
        ItemMissing
            Unknown name or version (never saved, or archived since).
        InputError
            The file is corrupt, was changed by hand, or its metadata is not signed by this server.
        """
        self._kind_dir(kind)
        name = sanitize_name(name)
        noun = NOUNS[kind]
        if version is not None:
            version = _check_version(version)
        key = self.signing_key()
        with self._read_fd(kind) as fd:
            if fd is None:
                raise ItemMissing(f"There is no {noun} named '{name}' in the lab library.")
            name = self._stored_name(fd, name, version)
            if version is None:
                versions = [e.version for e in self.list(kind) if e.name == name]
                if not versions:        # only damaged versions: name the newest in the error
                    versions = [v for v in self._versions_taken(fd, name, archived=False)
                                if _exists(fd, _file_name(name, v))]
                if not versions:
                    raise ItemMissing(f"There is no {noun} named '{name}' in the lab library.")
                version = max(versions)
            fn = _file_name(name, version)
            try:
                text = self._check_file(kind, fd, fn, (name, version), key, use_cache=False)[1]
            except FileNotFoundError:
                raise ItemMissing(f"There is no version {version} of the {noun} '{name}' in the lab library.") \
                    from None
            except InputError as exc:
                raise InputError(f"The {noun} '{name}' (version {version}) cannot be loaded: {exc}") from None
            except OSError as exc:
                raise InputError(f"The {noun} '{name}' (version {version}) cannot be read: "
                                 f"{_os_reason(exc)}.") from None
        return text

    @contextlib.contextmanager
    def _read_fd(self, kind: str):
        """The kind folder's descriptor for reading, or None when the root or folder is missing.

        Raises InputError when the folder is a link or cannot be opened.
        """
        try:
            root_fd = os.open(self.root, _DIR_FLAGS)
        except OSError:
            yield None
            return
        with _closing_fd(root_fd):
            try:
                fd = _open_dir(kind, root_fd)
            except (FileNotFoundError, NotADirectoryError):
                fd = None
            except _Refused as r:
                raise InputError(f"The lab library's {kind} folder {r.reason}; nothing in it is loaded.") from None
            except OSError as exc:
                raise InputError(f"The lab library's {kind} folder cannot be read: {_os_reason(exc)}.") from None
            with _closing_fd(fd):
                yield fd

    # ------------------------------------------------------------ archiving
    def archive(self, kind: str, name: str, version: int) -> Path:
        """Move one version (file and metadata) into ``<root>/<kind>/.archive/``; nothing is deleted.

        Works for corrupt files too (and for links: the link itself moves), so an administrator can
        clear list_problems.

        Returns
        -------
        Path
            Where the file now is.

        Raises
        ------
        ItemMissing
            Unknown name or version (never saved, or archived already).
        InputError
            A bad kind, name or version.
        LibraryWriteError
            The folder cannot be written, or is missing (deleted or unmounted).
        """
        self._kind_dir(kind)
        name = sanitize_name(name)
        version = _check_version(version)
        try:
            with self._writable_root("archived", create=False) as root_fd:
                try:
                    fd = _open_dir(kind, root_fd)
                except (FileNotFoundError, NotADirectoryError):
                    raise ItemMissing(f"There is no version {version} of the {NOUNS[kind]} '{name}' to archive.") \
                        from None
                except _Refused as r:
                    raise LibraryWriteError(f"The lab library's {kind} folder {r.reason}; nothing was archived.") \
                        from None
                with _closing_fd(fd):
                    return self._archive_in(kind, fd, name, version)
        except (LibraryWriteError, InputError):
            raise
        except OSError as exc:
            raise LibraryWriteError(
                f"The lab library folder cannot be written (read-only or full): "
                f"{_os_reason(exc)}; nothing was archived.") from exc

    def _archive_in(self, kind: str, fd: int, name: str, version: int) -> Path:
        name = self._stored_name(fd, name, version)
        fn = _file_name(name, version)
        missing = f"There is no version {version} of the {NOUNS[kind]} '{name}' to archive."
        if not _exists(fd, fn):
            raise ItemMissing(missing)
        with contextlib.suppress(FileExistsError):
            os.mkdir(_ARCHIVE, 0o777, dir_fd=fd)
        try:
            archive_fd = _open_dir(_ARCHIVE, fd)
        except _Refused as r:
            raise LibraryWriteError(f"The archive folder of the lab library's {kind} {r.reason}; nothing was "
                                    "archived. Whoever looks after the server should make it a real folder.") \
                from None
        with _closing_fd(archive_fd), _folder_lock(fd, self._lock_key(kind), kind, "archived"):
            if not _exists(fd, fn):       # archived by another saver since the check above
                raise ItemMissing(missing)
            moved = None
            for src in (fn, fn + _META_SUFFIX):
                if not _exists(fd, src):
                    continue
                dest = _free_name(archive_fd, src)
                os.rename(src, dest, src_dir_fd=fd, dst_dir_fd=archive_fd)
                moved = moved or dest
            _fsync_folder(fd)
            _fsync_folder(archive_fd)
            _mark_changed(fd)
        return self.root / kind / _ARCHIVE / moved


def _marker_ok(root_fd: int) -> bool:
    try:
        return stat.S_ISREG(_lstat(root_fd, MARKER_NAME).st_mode)
    except OSError:
        return False


def _special_problem(fd: int, fn: str):
    """A Problem when one of the folder's own entries (``.lock``, ``.changed``, ``.archive``) is not what it
    must be; None otherwise (and for other hidden names, such as temporary files)."""
    if fn not in (_LOCK, _CHANGED, _ARCHIVE):
        return None
    try:
        st = _lstat(fd, fn)
    except OSError:
        return None
    if fn == _ARCHIVE:
        if stat.S_ISDIR(st.st_mode):
            return None
        reason = _IS_LINK if stat.S_ISLNK(st.st_mode) else _NOT_FOLDER
        return Problem(fn, f"the archive folder {reason}; archiving is refused until whoever looks after the "
                           "server makes it a real folder.")
    if stat.S_ISREG(st.st_mode):
        return None
    reason = _IS_LINK if stat.S_ISLNK(st.st_mode) else _NOT_REGULAR
    if fn == _LOCK:
        return Problem(fn, f"the folder's lock file {reason}; saving is refused until whoever looks after the "
                           "server removes it.")
    return Problem(fn, f"the folder's change token {reason}; it is not read, and the next save replaces it.")


def _free_name(dir_fd: int, name: str) -> str:
    """``name``, or ``name`` with ``.1``, ``.2``, ... appended when taken in ``dir_fd`` (archive never overwrites)."""
    candidate, i = name, 0
    while _exists(dir_fd, candidate):
        i += 1
        candidate = f"{name}.{i}"
    return candidate


def _check_version(version) -> int:
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise InputError(f"A library version is a whole number from 1; got {_short(version)}.")
    return version


# ---------------------------------------------------------------------- accepting older files
def sign_library(root, kinds=None, key: bytes | None = None, dry_run: bool = False) -> list:
    """Sign the metadata of files the administrator trusts; the work of ``python -m library sign``.

    For every data file of ``kinds`` (default: all) whose sidecar is unsigned (saved before the
    signature) or signed with another key, and whose size and sha256 still match the sidecar and whose
    content is a valid file of its kind, the sidecar is rewritten signed with ``key``. Its user is kept
    and recorded as typed (nothing proves who saved it). Links and special files are never touched;
    files already signed with ``key`` are left alone.

    Parameters
    ----------
    root : Path or str
        The library folder (it must exist).
    kinds : iterable of str, optional
        Kinds to sign (``KINDS`` by default).
    key : bytes, optional
        The server's key; None: :func:`load_or_create_key` (refusing a key file inside ``root``).
    dry_run : bool
        Say what would be signed, change nothing.

    Returns
    -------
    list of str
        One line per file signed or refused, then one summary line per kind.

    Raises
    ------
    InputError
        Unknown kind; LibraryWriteError: the root is missing or cannot be written;
        LibraryKeyError: no usable key.
    """
    root = Path(root).expanduser().absolute()
    kinds = list(KINDS if kinds is None else kinds)
    for kind in kinds:
        if kind not in KINDS:
            raise InputError(f"Unknown library kind {_show(str(kind))}; use one of {', '.join(KINDS)}.")
    key = _check_key(key) if key is not None else load_or_create_key(library_root=root)
    try:
        root_fd = os.open(root, _DIR_FLAGS)
    except OSError as exc:
        raise LibraryWriteError(f"The lab library folder {root} cannot be opened: {_os_reason(exc)}.") from None
    lines = []
    with _closing_fd(root_fd):
        for kind in kinds:
            try:
                fd = _open_dir(kind, root_fd)
            except FileNotFoundError:
                continue
            except _Refused as r:
                lines.append(f"{kind}: the folder {r.reason}; not signed.")
                continue
            with _closing_fd(fd):
                try:
                    lines.extend(_sign_folder(kind, fd, key, dry_run, os.path.join(os.path.realpath(root), kind)))
                except OSError as exc:
                    raise LibraryWriteError(f"The {kind} folder of {root} cannot be written: "
                                            f"{_os_reason(exc)}.") from None
    return lines


def _sign_folder(kind: str, fd: int, key: bytes, dry_run: bool, lock_key: str) -> list:
    lines, signed, already = [], 0, 0
    with _folder_lock(fd, lock_key, kind, "signed"):
        for fn in sorted(_dir_names(fd)[0]):
            parsed = _parse_file_name(fn)
            if parsed is None:
                continue
            verdict = _sign_one(kind, fd, fn, parsed, key, dry_run)
            if verdict is None:
                already += 1
            elif verdict == "signed":
                signed += 1
                lines.append(f"{kind}/{fn}: {'would be signed' if dry_run else 'signed'}.")
            else:
                lines.append(f"{kind}/{fn}: not signed: {verdict}")
        if signed and not dry_run:
            _fsync_folder(fd)
            _mark_changed(fd)
    lines.append(f"{kind}: {signed} file{'' if signed == 1 else 's'} {'to sign' if dry_run else 'signed'}, "
                 f"{already} already signed.")
    return lines


def _sign_one(kind: str, fd: int, fn: str, parsed, key: bytes, dry_run: bool):
    """None (already signed), "signed", or why the file is not signed."""
    name, version = parsed
    try:
        sanitize_name(name)
        raw, why = _read_or_why(fd, fn, MAX_CONTENT_BYTES, "it")
    except InputError:
        return "its name is not a valid library name."
    except FileNotFoundError:
        return "it was removed meanwhile."
    if why:
        return why
    meta = _read_meta_at(fd, fn + _META_SUFFIX, None)
    if isinstance(meta, str):
        return meta
    if _verify_meta(meta, key) is None:
        return None
    if meta["name"] != name or meta["file_version"] != version or meta["kind"] != kind:
        return "its metadata belongs to another file (renamed or copied by hand)."
    if len(raw) != meta["size"] or hashlib.sha256(raw).hexdigest() != meta["sha256"]:
        return "its checksum does not match its metadata (changed after it was saved)."
    try:
        _validate(kind, raw.decode("utf-8"))
    except UnicodeDecodeError:
        return "it is not UTF-8 text."
    except InputError as exc:
        return f"it is not a valid {NOUNS[kind]} file: {exc}"
    if not dry_run:
        user = _clean_user(meta["user"])
        note = meta.get("note", "") if isinstance(meta.get("note", ""), str) else ""
        _atomic_write(fd, fn + _META_SUFFIX, _meta_bytes(key, kind, name, version, user, False, meta["saved_at"],
                                                         meta["size"], meta["sha256"], note[:MAX_NOTE_CHARS]))
    return "signed"
