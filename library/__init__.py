"""fringegauge shared lab library: stacks, gratings and calibrations saved on the server.

Pure Python (no user-interface imports). See :mod:`library.store` for the layout on disk.
"""

from physics.errors import InputError

from .store import (KINDS, MAX_CONTENT_BYTES, MAX_NAME_CHARS, Entry, Library, LibraryWriteError,
                    Problem, SaveResult, sanitize_name, validate_calibration)

__all__ = ["InputError", "Library", "Entry", "Problem", "SaveResult", "LibraryWriteError", "sanitize_name",
           "validate_calibration", "KINDS", "MAX_CONTENT_BYTES", "MAX_NAME_CHARS"]
