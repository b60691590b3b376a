"""The shared lab library: stacks, gratings and calibrations saved on the server.

Layout on disk (one folder per kind under the library root)::

    <root>/stacks/Oxide wafer 7.json              version 1 of "Oxide wafer 7"
    <root>/stacks/Oxide wafer 7.json.meta.json    its metadata sidecar
    <root>/stacks/Oxide wafer 7.v2.json           version 2 (a later save of the same name)
    <root>/stacks/Oxide wafer 7.v2.json.meta.json
    <root>/stacks/.archive/...                    archived files (never deleted)
    <root>/stacks/.lock                           lock file serialising savers
    <root>/stacks/.changed                        a fresh token after every save or archive

The saved file holds exactly the text the user saved (UTF-8), so it loads back
identical. Metadata lives in a sidecar ``<file>.meta.json``: kind, name,
version, user, saved_at (UTC, ISO 8601), size (bytes) and sha256 of the file.
A data file whose sidecar is missing, unreadable or does not match its sha256
counts as corrupt or hand-edited: :meth:`Library.list` skips it and
:meth:`Library.list_problems` reports it; :meth:`Library.load` refuses it.

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

Names are checked by :func:`sanitize_name`; every path read or written is
checked to resolve inside the library root.

:meth:`Library.change_marker` is a cheap fingerprint of a kind's folder (its
stat and the ``.changed`` token), for pages that watch the folder without
re-reading every file.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import math
import os
import re
import secrets
import threading
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
    "Library", "Entry", "Problem", "SaveResult", "LibraryWriteError", "ItemMissing", "sanitize_name",
    "validate_calibration", "KINDS", "NOUNS", "MAX_CONTENT_BYTES", "MAX_NAME_CHARS",
]

#: The kinds of item the library holds (one folder each).
KINDS = ("stacks", "gratings", "calibrations")
#: The singular noun of each kind, for messages.
NOUNS = {"stacks": "stack", "gratings": "grating", "calibrations": "calibration"}
#: Largest content accepted, bytes of UTF-8.
MAX_CONTENT_BYTES = 1_000_000
#: Longest library name, characters.
MAX_NAME_CHARS = 80
#: Longest library name, bytes of UTF-8 (keeps file names well under 255 bytes).
MAX_NAME_BYTES = 160
#: Longest user name kept in the metadata, characters.
MAX_USER_CHARS = 100

META_FORMAT = "fringegauge-library-meta"
META_VERSION = 1
_META_SUFFIX = ".meta.json"
_ARCHIVE = ".archive"
_LOCK = ".lock"
#: Rewritten with a fresh random token after every save or archive (see Library.change_marker).
_CHANGED = ".changed"
_TMP_PREFIX = ".tmp-"
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

_WRITE_ADVICE = "your work is still in this page — download it as a file."


class LibraryWriteError(InputError):
    """The library folder could not be written (read-only, full, or gone)."""


class ItemMissing(InputError):
    """The named version is not (or no longer) in the library: archived or never saved."""


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

    ``saved_at`` is UTC ISO 8601 text; ``size`` is in bytes.
    """

    name: str
    version: int
    user: str
    saved_at: str
    size: int
    file_name: str
    sha256: str


@dataclass(frozen=True)
class Problem:
    """A file in a kind's folder that :meth:`Library.list` skipped, and why."""

    file_name: str
    message: str

    def __str__(self) -> str:
        return f"{self.file_name}: {self.message}"


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
    out = "".join(ch if ch.isprintable() else f"\\u{ord(ch):04x}" for ch in text)
    return f"'{out}'"


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
    unknown = [k for k in data if k not in _CAL_FIELDS]
    if unknown:
        raise InputError(f"{_show(unknown[0])}: unknown field; a calibration has the fields "
                         f"{', '.join(_CAL_FIELDS)}. Remove it or correct its spelling.")
    for key in _CAL_REQUIRED:
        if key not in data:
            raise InputError(f"{key}: missing; a calibration needs the fields {', '.join(_CAL_REQUIRED)}.")
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


_VALIDATORS = {
    "stacks": load_stack_file,
    "gratings": load_grating_file,
    "calibrations": validate_calibration,
}


def _validate(kind: str, content: str) -> None:
    try:
        _VALIDATORS[kind](content)
    except InputError:
        raise
    except (ValueError, TypeError, ArithmeticError, LookupError, RecursionError) as exc:
        raise InputError(f"This is not a usable {NOUNS[kind]} file ({type(exc).__name__}); "
                         "check its fields and numbers.") from None


# ---------------------------------------------------------------------- locking
_THREAD_LOCKS: dict = {}
_THREAD_LOCKS_GUARD = threading.Lock()


def _thread_lock(key: str) -> threading.Lock:
    with _THREAD_LOCKS_GUARD:
        return _THREAD_LOCKS.setdefault(key, threading.Lock())


@contextlib.contextmanager
def _folder_lock(folder: Path):
    """Hold the kind folder's lock: a thread lock and, where available, an OS file lock."""
    with _thread_lock(str(folder)):
        fd = os.open(folder / _LOCK, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            if fcntl is not None:
                fcntl.flock(fd, fcntl.LOCK_EX)
            yield
        finally:
            os.close(fd)            # closing releases the OS lock


# ---------------------------------------------------------------------- low-level writing
def _write_bytes(f, data: bytes) -> None:
    """Write all of ``data`` to the open binary file ``f`` (a seam for tests)."""
    f.write(data)


def _fsync_folder(folder: Path) -> None:
    if os.name != "posix":          # pragma: no cover
        return
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _create_temp(folder: Path):
    """A new, empty temporary file in ``folder``: (open binary file, path).

    Made with ``os.open`` and mode 0o666, so the process umask decides who may read it, as for any
    ordinary file (``tempfile`` would make it readable by this account only). ``O_EXCL`` with a
    random name never opens an existing file.
    """
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0) | getattr(os, "O_NOFOLLOW", 0)
    for _ in range(_TMP_ATTEMPTS):
        path = folder / f"{_TMP_PREFIX}{secrets.token_hex(8)}.part"
        try:
            fd = os.open(path, flags, _FILE_MODE)
        except FileExistsError:
            continue
        return os.fdopen(fd, "wb"), path
    raise OSError(f"no free temporary file name in {folder.name} after {_TMP_ATTEMPTS} attempts")


def _atomic_write(folder: Path, target: Path, data: bytes, durable: bool = True) -> None:
    """Write ``data`` to ``target`` via a temporary file in ``folder`` and os.replace.

    ``durable`` flushes the file to the disk (fsync) before the move. On any failure the temporary
    file is removed and the exception propagates.
    """
    tmp_name = None
    try:
        f, tmp_name = _create_temp(folder)
        with f:
            _write_bytes(f, data)
            f.flush()
            if durable:
                os.fsync(f.fileno())
        os.replace(tmp_name, target)
        tmp_name = None
    finally:
        if tmp_name is not None:
            with contextlib.suppress(OSError):
                os.unlink(tmp_name)


def _mark_changed(folder: Path) -> None:
    """Write a fresh token to the folder's ``.changed`` (called under the folder lock).

    Watchers compare it with the folder's own stat; it is a hint, not data, so a failure to
    write it is ignored (the folder's modification time has changed anyway).
    """
    with contextlib.suppress(OSError):
        _atomic_write(folder, folder / _CHANGED, secrets.token_hex(16).encode("ascii"), durable=False)


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


# ---------------------------------------------------------------------- the library
class Library:
    """The shared lab library rooted at one folder.

    Parameters
    ----------
    root : Path or str
        The library folder; created (with one sub-folder per kind) on the first save.
    """

    def __init__(self, root):
        self.root = Path(root).absolute()
        self._cache: dict = {}
        self._cache_guard = threading.Lock()

    # ------------------------------------------------------------ paths
    def _root_resolved(self) -> Path:
        return self.root.resolve()

    def _inside(self, path: Path) -> Path:
        """``path`` if it resolves inside the root; InputError otherwise."""
        resolved = path.resolve()
        if not resolved.is_relative_to(self._root_resolved()):
            raise InputError(f"Refusing to use {_show(str(path))}: it lies outside the lab library folder.")
        return path

    def _kind_dir(self, kind) -> Path:
        if kind not in KINDS:
            raise InputError(f"Unknown library kind {_show(str(kind))}; use one of {', '.join(KINDS)}.")
        return self._inside(self.root / kind)

    def path_for(self, kind: str, name: str, version: int = 1) -> Path:
        """Where ``name`` version ``version`` of ``kind`` is (or would be) stored."""
        name = sanitize_name(name)
        version = _check_version(version)
        return self._inside(self._kind_dir(kind) / _file_name(name, version))

    # ------------------------------------------------------------ saving
    def save(self, kind: str, name: str, content: str, *, user: str) -> SaveResult:
        """Save ``content`` under ``name``; never overwrites (a taken name gets the next version).

        Raises
        ------
        InputError
            Bad kind, name, user, content over 1 MB, or content that is not a
            valid file of this kind.
        LibraryWriteError
            The folder cannot be written (read-only, full, ...); nothing is left half-written.
        """
        folder = self._kind_dir(kind)
        name = sanitize_name(name)
        user = _clean_user(user)
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
        try:
            return self._save_locked(kind, folder, name, data, user)
        except LibraryWriteError:
            raise
        except OSError as exc:
            raise LibraryWriteError(
                f"The lab library folder cannot be written (read-only or full): "
                f"{exc.strerror or exc}; {_WRITE_ADVICE}") from exc

    def _save_locked(self, kind, folder: Path, name: str, data: bytes, user: str) -> SaveResult:
        self._inside(self.root)
        folder.mkdir(parents=True, exist_ok=True)
        self._inside(folder)
        typed = name
        with _folder_lock(folder):
            variants = self._variants(folder, name)
            if variants:
                name = self._first_saved(folder, variants, typed)
            taken = set().union(*variants.values())          # one count across every case form
            version = max(taken, default=0) + 1
            target = self._inside(folder / _file_name(name, version))
            meta_path = self._inside(folder / (target.name + _META_SUFFIX))
            if target.exists() or meta_path.exists():      # pragma: no cover - guarded by the scan
                raise LibraryWriteError(f"{target.name} appeared while saving; save again. {_WRITE_ADVICE}")
            previous = self._latest_meta(folder, name) if taken else None
            meta = {
                "format": META_FORMAT, "version": META_VERSION, "kind": kind, "name": name,
                "file_version": version, "user": user, "saved_at": _now_iso(),
                "size": len(data), "sha256": hashlib.sha256(data).hexdigest(),
            }
            meta_bytes = (json.dumps(meta, indent=2, ensure_ascii=False) + "\n").encode("utf-8")
            _atomic_write(folder, target, data)
            try:
                _atomic_write(folder, meta_path, meta_bytes)
            except BaseException:
                with contextlib.suppress(OSError):
                    os.unlink(target)        # our own file of this save: roll it back
                raise
            _fsync_folder(folder)
            _mark_changed(folder)
        noun = NOUNS[kind]
        if version == 1:
            message = f"Saved the {noun} '{name}' to the lab library."
        else:
            who = (f" (saved by {previous['user']} on {previous['saved_at'][:10]} {previous['saved_at'][11:16]} UTC)"
                   if previous else "")
            if typed == name:
                message = f"A {noun} named '{name}' already exists{who}; yours is saved as version {version}."
            else:
                message = (f"A {noun} named '{name}' already exists{who}. Library names do not distinguish "
                           f"upper and lower case, so yours ('{typed}') is saved as version {version} "
                           f"of '{name}'.")
        return SaveResult(path_name=target.name, version=version, message=message, name=name)

    def _variants(self, folder: Path, name: str, archived: bool = True) -> dict:
        """{stored name: versions} of every case form of ``name`` in the folder (and its archive),
        counting data and sidecar files."""
        key = name_key(name)
        found: dict = {}
        for where in (folder, folder / _ARCHIVE) if archived else (folder,):
            try:
                names = os.listdir(where)
            except (FileNotFoundError, NotADirectoryError):
                continue
            for fn in names:
                if fn.endswith(_META_SUFFIX):
                    fn = fn[:-len(_META_SUFFIX)]
                parsed = _parse_file_name(fn)
                if parsed and name_key(parsed[0]) == key:
                    found.setdefault(parsed[0], set()).add(parsed[1])
        return found

    def _first_saved(self, folder: Path, variants: dict, typed: str) -> str:
        """The stored name a save of ``typed`` joins: ``typed`` itself when it is stored as typed,
        otherwise the case form saved first (lowest version, then earliest saved_at)."""
        if typed in variants:
            return typed

        def first(stored):
            v = min(variants[stored])
            meta = _read_meta(folder / (_file_name(stored, v) + _META_SUFFIX))
            if isinstance(meta, str):
                meta = _read_meta(folder / _ARCHIVE / (_file_name(stored, v) + _META_SUFFIX))
            return (v, meta["saved_at"] if isinstance(meta, dict) else "~", stored)
        return min(variants, key=first)

    def _stored_name(self, folder: Path, name: str, version: int | None = None) -> str:
        """The stored case form of ``name`` for reading: ``name`` when it has files in the folder
        (of ``version`` when given), else the one case form that has, else ``name`` unchanged."""
        variants = self._variants(folder, name, archived=False)
        matching = [n for n, vs in variants.items() if version is None or version in vs]
        if name in matching or not matching:
            return name
        return self._first_saved(folder, {n: variants[n] for n in matching}, name)

    def _versions_taken(self, folder: Path, name: str, archived: bool = True) -> set:
        """Versions of exactly ``name`` present in the folder or its archive (data or sidecar files)."""
        return self._variants(folder, name, archived).get(name, set())

    def _latest_meta(self, folder: Path, name: str):
        for version in sorted(self._versions_taken(folder, name), reverse=True):
            meta = _read_meta(folder / (_file_name(name, version) + _META_SUFFIX))
            if isinstance(meta, dict):
                return meta
        return None

    def change_marker(self, kind: str):
        """A cheap fingerprint of ``kind``'s folder that changes when an item is saved, archived, added
        or removed: the folder's inode and modification time and the ``.changed`` token.

        Costs two ``stat``-sized system calls and one small read, whatever the number of files, so a
        page may call it every few seconds and re-read the folder (:meth:`list`) only when it differs.
        Never raises for a missing or unreadable folder (that is a state of its own).
        """
        folder = self._kind_dir(kind)
        try:
            st = os.stat(folder)
            here = (st.st_ino, st.st_mtime_ns, st.st_ctime_ns)
        except OSError as exc:
            return ("unreadable", exc.errno)
        try:
            with open(folder / _CHANGED, "rb") as f:
                token = f.read(64)
        except OSError:
            token = b""
        return here, token

    # ------------------------------------------------------------ reading
    def _scan(self, kind: str):
        """(entries newest first, problems) of one kind; never raises for bad files."""
        folder = self._kind_dir(kind)
        entries, problems = [], []
        try:
            names = sorted(os.listdir(folder))
        except (FileNotFoundError, NotADirectoryError):
            return entries, problems
        except OSError as exc:
            return entries, [Problem(kind, f"the folder cannot be read ({exc.strerror or exc}).")]
        present = set(names)
        for fn in names:
            if fn.startswith("."):
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
                entries.append(self._check_file(kind, folder, fn, parsed))
            except InputError as exc:
                problems.append(Problem(fn, str(exc)))
            except OSError as exc:
                problems.append(Problem(fn, f"cannot be read ({exc.strerror or exc})."))
        entries.sort(key=lambda e: (e.saved_at, e.version, e.name), reverse=True)
        return entries, problems

    def _check_file(self, kind: str, folder: Path, fn: str, parsed) -> Entry:
        """Check one data file and its sidecar; return its Entry or raise InputError."""
        name, version = parsed
        noun = NOUNS[kind]
        path = folder / fn
        try:
            self._inside(path)
        except InputError:
            raise InputError("points outside the lab library folder; skipped.") from None
        if not path.is_file():
            raise InputError("is not a regular file; skipped.")
        try:
            sanitize_name(name)
        except InputError:
            raise InputError("its name is not a valid library name; it was not saved by fringegauge.") from None
        meta_path = folder / (fn + _META_SUFFIX)
        self._inside(meta_path)
        meta = _read_meta(meta_path)
        if isinstance(meta, str):
            raise InputError(meta)
        if meta["name"] != name or meta["file_version"] != version or meta["kind"] != kind:
            raise InputError("its metadata belongs to another file; it was renamed or copied by hand.")
        stat = path.stat()
        if stat.st_size > MAX_CONTENT_BYTES:
            raise InputError(f"is {stat.st_size:,} bytes, over the 1 MB limit; it was changed by hand.")
        key = (str(path), stat.st_mtime_ns, stat.st_size, meta["sha256"])
        with self._cache_guard:
            cached = self._cache.get(key)
        if cached is None:
            raw = path.read_bytes()
            if len(raw) != meta["size"] or hashlib.sha256(raw).hexdigest() != meta["sha256"]:
                raise InputError(f"the {noun} was changed outside fringegauge after it was saved "
                                 "(its checksum no longer matches); it is not offered for loading.")
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError:
                raise InputError("is not UTF-8 text.") from None
            try:
                _validate(kind, text)
            except InputError as exc:
                raise InputError(f"is not a valid {noun} file: {exc}") from None
            with self._cache_guard:
                if len(self._cache) > 10_000:
                    self._cache.clear()
                self._cache[key] = text
        return Entry(name=name, version=version, user=meta["user"], saved_at=meta["saved_at"],
                     size=meta["size"], file_name=fn, sha256=meta["sha256"])

    def list(self, kind: str) -> list:
        """Valid saved items of ``kind``, newest first (corrupt files are skipped; see list_problems)."""
        return self._scan(kind)[0]

    def list_with_problems(self, kind: str) -> tuple:
        """(:meth:`list`, :meth:`list_problems`) from one reading of the folder."""
        return self._scan(kind)

    def list_problems(self, kind: str) -> list:
        """Files of ``kind`` that :meth:`list` skipped, as :class:`Problem` (file name and sentence)."""
        return self._scan(kind)[1]

    def load(self, kind: str, name: str, version: int | None = None) -> str:
        """The text saved under ``name`` (latest valid version by default), checked on read.

        A name that differs from the stored one only in upper and lower case finds it.

        Raises
        ------
        ItemMissing
            Unknown name or version (never saved, or archived since).
        InputError
            The file is corrupt or was changed by hand.
        """
        folder = self._kind_dir(kind)
        name = sanitize_name(name)
        noun = NOUNS[kind]
        if version is not None:
            version = _check_version(version)
        name = self._stored_name(folder, name, version)
        if version is None:
            versions = [e.version for e in self.list(kind) if e.name == name]
            if not versions:        # only damaged versions: name the newest in the error
                versions = [v for v in self._versions_taken(folder, name, archived=False)
                            if (folder / _file_name(name, v)).exists()]
            if not versions:
                raise ItemMissing(f"There is no {noun} named '{name}' in the lab library.")
            version = max(versions)
        fn = _file_name(name, version)
        path = self._inside(folder / fn)
        if not path.exists():
            raise ItemMissing(f"There is no version {version} of the {noun} '{name}' in the lab library.")
        try:
            self._check_file(kind, folder, fn, (name, version))
            text = path.read_bytes().decode("utf-8")
        except InputError as exc:
            raise InputError(f"The {noun} '{name}' (version {version}) cannot be loaded: {exc}") from None
        except OSError as exc:
            raise InputError(f"The {noun} '{name}' (version {version}) cannot be read: "
                             f"{exc.strerror or exc}.") from None
        except UnicodeDecodeError:
            raise InputError(f"The {noun} '{name}' (version {version}) is not UTF-8 text.") from None
        meta = _read_meta(folder / (fn + _META_SUFFIX))
        if isinstance(meta, str) or hashlib.sha256(text.encode("utf-8")).hexdigest() != meta["sha256"]:
            raise InputError(f"The {noun} '{name}' (version {version}) changed while it was being read; "
                             "load it again.")
        return text

    # ------------------------------------------------------------ archiving
    def archive(self, kind: str, name: str, version: int) -> Path:
        """Move one version (file and metadata) into ``<root>/<kind>/.archive/``; nothing is deleted.

        Works for corrupt files too, so an administrator can clear list_problems.

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
            The folder cannot be written.
        """
        folder = self._kind_dir(kind)
        name = sanitize_name(name)
        version = _check_version(version)
        name = self._stored_name(folder, name, version)
        fn = _file_name(name, version)
        source = self._inside(folder / fn)
        if not source.exists():
            raise ItemMissing(f"There is no version {version} of the {NOUNS[kind]} '{name}' to archive.")
        try:
            archive_dir = folder / _ARCHIVE
            archive_dir.mkdir(exist_ok=True)
            self._inside(archive_dir)
            with _folder_lock(folder):
                if not source.exists():       # archived by another saver since the check above
                    raise ItemMissing(f"There is no version {version} of the {NOUNS[kind]} '{name}' to archive.")
                moved = None
                for src in (source, folder / (fn + _META_SUFFIX)):
                    if not src.exists():
                        continue
                    dest = self._inside(_free_path(archive_dir / src.name))
                    os.rename(src, dest)
                    moved = moved or dest
                _fsync_folder(folder)
                _fsync_folder(archive_dir)
                _mark_changed(folder)
        except OSError as exc:
            raise LibraryWriteError(
                f"The lab library folder cannot be written (read-only or full): "
                f"{exc.strerror or exc}; nothing was archived.") from exc
        return moved


def _free_path(path: Path) -> Path:
    """``path``, or ``path`` with ``.1``, ``.2``, ... appended when taken (archive never overwrites)."""
    candidate, i = path, 0
    while candidate.exists():
        i += 1
        candidate = path.with_name(f"{path.name}.{i}")
    return candidate


def _check_version(version) -> int:
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise InputError(f"A library version is a whole number from 1; got {_short(version)}.")
    return version


def _read_meta(path: Path):
    """The sidecar as a dict, or a sentence (str) saying what is wrong with it."""
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        return "has no metadata file; it was not saved by fringegauge (or was copied in by hand)."
    except OSError as exc:
        return f"its metadata cannot be read ({exc.strerror or exc})."
    if len(raw) > 100_000:
        return "its metadata file is too large; it was changed by hand."
    try:
        meta = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError, RecursionError):
        return "its metadata file is damaged (not JSON)."
    ok = (isinstance(meta, dict) and meta.get("format") == META_FORMAT
          and meta.get("version") == META_VERSION
          and isinstance(meta.get("kind"), str) and isinstance(meta.get("name"), str)
          and type(meta.get("file_version")) is int and isinstance(meta.get("user"), str)
          and isinstance(meta.get("saved_at"), str) and type(meta.get("size")) is int
          and isinstance(meta.get("sha256"), str) and re.fullmatch(r"[0-9a-f]{64}", meta["sha256"]))
    if not ok:
        return "its metadata file is damaged (fields missing or of the wrong type)."
    return meta
