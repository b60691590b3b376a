"""fringegauge shared lab library: stacks, gratings and calibrations saved on the server.

Pure Python (no user-interface imports). See :mod:`library.store` for the layout on disk and its rules
(regular files only, links never followed, signed metadata, the root's marker), and
``python -m library sign --help`` for accepting files saved before the metadata was signed.
"""

from physics.errors import InputError

from .store import (KEY_FILE_ENV, KINDS, MAX_CONTENT_BYTES, MAX_NAME_CHARS, NOUNS, Entry, ItemMissing, Library,
                    LibraryKeyError, LibraryWriteError, Problem, SaveResult, load_or_create_key, prepare_root,
                    sanitize_name, sign_library, validate_calibration,
                    validate_camera_calibration)

__all__ = ["InputError", "Library", "Entry", "Problem", "SaveResult", "LibraryWriteError", "LibraryKeyError",
           "ItemMissing", "sanitize_name", "validate_calibration", "validate_camera_calibration", "prepare_root", "load_or_create_key",
           "sign_library", "KINDS", "NOUNS", "MAX_CONTENT_BYTES", "MAX_NAME_CHARS", "KEY_FILE_ENV"]
